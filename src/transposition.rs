//! Plane-of-array physics: the angle of incidence, single-axis tracker orientation, and the Hay &
//! Davies transposition of GHI/DNI/DHI onto a block's modules (checked against pvlib in
//! `tests/reference_transposition.rs`).

use crate::clearsky::Irradiance;
use crate::plant::Mount;
use crate::sun::direction_enu;

/// Angle of incidence \[rad\] on a plane of given tilt and azimuth \[rad\] for a sun direction.
pub fn aoi_rad(tilt_rad: f64, surface_azimuth_rad: f64, sun_zenith_rad: f64, sun_azimuth_rad: f64) -> f64 {
    let proj = tilt_rad.cos() * sun_zenith_rad.cos()
        + tilt_rad.sin() * sun_zenith_rad.sin() * (sun_azimuth_rad - surface_azimuth_rad).cos();
    proj.clamp(-1.0, 1.0).acos()
}

/// Orientation (tilt, azimuth) \[rad\] of a horizontal single-axis tracker following the sun
/// without backtracking, its rotation limited to `max_angle_rad`.
pub fn tracker_orientation(axis_azimuth_rad: f64, max_angle_rad: f64, sun_zenith_rad: f64, sun_azimuth_rad: f64) -> (f64, f64) {
    let s = direction_enu(sun_zenith_rad, sun_azimuth_rad);
    // Horizontal unit vector perpendicular to the axis, 90° clockwise from it.
    let perp = [axis_azimuth_rad.cos(), -axis_azimuth_rad.sin(), 0.0];
    let sp = s[0] * perp[0] + s[1] * perp[1];
    let theta = sp.atan2(s[2]).clamp(-max_angle_rad, max_angle_rad);
    let tilt = theta.abs();
    let mut az = if theta >= 0.0 { axis_azimuth_rad + std::f64::consts::FRAC_PI_2 } else { axis_azimuth_rad - std::f64::consts::FRAC_PI_2 };
    az = az.rem_euclid(std::f64::consts::TAU);
    (tilt, az)
}

/// Plane-of-array global irradiance \[W m⁻²\] by Hay & Davies, as pvlib's
/// `get_total_irradiance(model='haydavies')`.
#[allow(clippy::too_many_arguments)]
pub fn poa_hay_davies(
    tilt_rad: f64,
    surface_azimuth_rad: f64,
    sun_zenith_rad: f64,
    sun_azimuth_rad: f64,
    irr: &Irradiance,
    dni_extra_wm2: f64,
    albedo: f64,
) -> f64 {
    let aoi = aoi_rad(tilt_rad, surface_azimuth_rad, sun_zenith_rad, sun_azimuth_rad);
    let cos_tt = aoi.cos().max(0.0);
    let beam = (irr.dni_wm2 * aoi.cos()).max(0.0);
    let cos_z = sun_zenith_rad.cos().max(0.01745);
    let rb = cos_tt / cos_z;
    let ai = irr.dni_wm2 / dni_extra_wm2;
    let iso = (irr.dhi_wm2 * (1.0 - ai) * 0.5 * (1.0 + tilt_rad.cos())).max(0.0);
    let circ = (irr.dhi_wm2 * ai * rb).max(0.0);
    let ground = irr.ghi_wm2 * albedo * (1.0 - tilt_rad.cos()) * 0.5;
    beam + iso + circ + ground
}

/// The plane of a block at a sun position: (tilt, azimuth) \[rad\].
pub fn block_plane(mount: &Mount, sun_zenith_rad: f64, sun_azimuth_rad: f64) -> (f64, f64) {
    match *mount {
        Mount::Fixed { tilt_rad, azimuth_rad } => (tilt_rad, azimuth_rad),
        Mount::SingleAxis { axis_azimuth_rad, max_angle_rad } => {
            tracker_orientation(axis_azimuth_rad, max_angle_rad, sun_zenith_rad, sun_azimuth_rad)
        }
    }
}
