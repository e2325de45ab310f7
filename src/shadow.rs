//! Shadow projection: where the sun ray from a ground point crosses the cloud base, so that a
//! cloud-map cell shades the ground point whose sun ray passes through it.

/// Cloud-plane point (east, north, relative to the camera) where the ray from ground point `p`
/// toward the sun crosses the cloud base.
#[inline]
pub fn sun_ray_plane_point(p: [f64; 2], cbh_m: f64, camera_m: [f64; 3], zenith_rad: f64, azimuth_rad: f64) -> [f64; 2] {
    let off = cbh_m * zenith_rad.tan();
    [p[0] + off * azimuth_rad.sin() - camera_m[0], p[1] + off * azimuth_rad.cos() - camera_m[1]]
}
