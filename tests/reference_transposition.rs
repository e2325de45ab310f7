//! Plane-of-array irradiance and tracker orientation against pvlib 0.16.1 (table from
//! `tools/gen_fixtures.py`): `tracking.singleaxis(axis_tilt=0, backtrack=False)`, `irradiance.aoi`
//! and `get_total_irradiance(model='haydavies', albedo=0.2)`.
mod common;

use common::{num, read_table};
use nephocast::clearsky::Irradiance;
use nephocast::transposition::{aoi_rad, poa_hay_davies, tracker_orientation};

#[test]
fn hay_davies_and_tracker_match_pvlib() {
    let rows = read_table("transposition_pvlib.csv");
    assert!(rows.len() > 150);
    for r in &rows {
        let (z, a) = (num(r, "solar_zenith_deg").to_radians(), num(r, "solar_azimuth_deg").to_radians());
        let (tilt, az) = if r["kind"] == "fixed" {
            (num(r, "surface_tilt_deg").to_radians(), num(r, "surface_azimuth_deg").to_radians())
        } else {
            let (t, s) = tracker_orientation(num(r, "axis_azimuth_deg").to_radians(), num(r, "max_angle_deg").to_radians(), z, a);
            assert!((t.to_degrees() - num(r, "surface_tilt_deg")).abs() < 1e-6, "tilt {} vs {r:?}", t.to_degrees());
            if t > 1e-6 {
                let mut d = (s.to_degrees() - num(r, "surface_azimuth_deg")).abs();
                d = d.min(360.0 - d);
                assert!(d < 1e-6, "azimuth {} vs {r:?}", s.to_degrees());
            }
            (t, s)
        };
        let aoi = aoi_rad(tilt, az, z, a).to_degrees();
        assert!((aoi - num(r, "aoi_deg")).abs() < 1e-6, "aoi {aoi} vs {r:?}");
        let irr = Irradiance { ghi_wm2: num(r, "ghi_wm2"), dni_wm2: num(r, "dni_wm2"), dhi_wm2: num(r, "dhi_wm2") };
        let poa = poa_hay_davies(tilt, az, z, a, &irr, num(r, "dni_extra_wm2"), 0.2);
        let want = num(r, "poa_global_wm2");
        assert!((poa - want).abs() < 1e-6 * want.max(1.0), "poa {poa} vs {want} in {r:?}");
    }
}
