//! Cell temperature, DC and AC power against pvlib 0.16.1 (table from `tools/gen_fixtures.py`):
//! `temperature.faiman`, `pvsystem.pvwatts_dc`, `inverter.pvwatts` (to 1e-6 relative: the table keeps
//! ten significant digits).
mod common;

use common::{num, read_table};
use nephocast::power::{dc_power_kw, faiman_cell_temp_c, inverter_ac_kw};

#[test]
fn faiman_pvwatts_match_pvlib() {
    let rows = read_table("power_pvlib.csv");
    assert!(rows.len() >= 100);
    for r in &rows {
        let tc = faiman_cell_temp_c(num(r, "poa_wm2"), num(r, "temp_air_c"), num(r, "wind_speed_mps"), num(r, "u0"), num(r, "u1"));
        assert!((tc - num(r, "cell_temp_c")).abs() < 1e-6, "{tc} vs {r:?}");
        let pdc = dc_power_kw(num(r, "poa_wm2"), tc, num(r, "pdc0_kw"), num(r, "gamma_pdc"));
        assert!((pdc - num(r, "pdc_kw")).abs() < 1e-6 * pdc.abs().max(1.0), "{pdc} vs {r:?}");
        let pac = inverter_ac_kw(pdc, num(r, "pac0_kw"), num(r, "eta_inv_nom"));
        assert!((pac - num(r, "pac_kw")).abs() < 1e-6 * pac.abs().max(1.0), "{pac} vs {r:?}");
    }
}
