//! Fisheye projection against OpenCV's fisheye model (Kannala & Brandt 2006 form).
mod common;

use common::{num, read_table};
use nephocast::camera::{Camera, Orientation, Projection};

/// `cv2.fisheye.projectPoints` from OpenCV (opencv-python-headless, table written by
/// `tools/gen_fixtures.py`) for four cameras, 60 points each with field angles 0–88°.
/// With rvec = tvec = 0 the camera frame is our camera frame; a level, yaw-0 camera maps it
/// to (east, north, up) unchanged, so the point's direction is the sky direction.
#[test]
fn polynomial_projection_matches_opencv() {
    let rows = read_table("fisheye_opencv.csv");
    assert!(rows.len() >= 200);
    let mut worst = 0.0f64;
    for r in &rows {
        let k = [num(r, "k1"), num(r, "k2"), num(r, "k3"), num(r, "k4")];
        let cam = Camera::new(
            2048,
            2048,
            num(r, "cx_px"),
            num(r, "cy_px"),
            num(r, "f_px"),
            Projection::Polynomial { k },
            89f64.to_radians(),
            Orientation::default(),
        );
        let d = [num(r, "x"), num(r, "y"), num(r, "z")];
        let (x, y) = cam.project_camera_frame(d);
        let err = ((x - num(r, "u_px")).powi(2) + (y - num(r, "v_px")).powi(2)).sqrt();
        worst = worst.max(err);
        assert!(err < 1e-3, "{err} px at {r:?}");
        // And through the sky-direction path.
        let n = (d[0] * d[0] + d[1] * d[1] + d[2] * d[2]).sqrt();
        if let Some((x2, y2)) = cam.project_enu([d[0] / n, d[1] / n, d[2] / n]) {
            assert!((x2 - x).abs() < 1e-9 && (y2 - y).abs() < 1e-9);
            // Round trip pixel → direction → pixel.
            let back = cam.unproject_enu(x2, y2).unwrap();
            let (x3, y3) = cam.project_enu(back).unwrap();
            assert!((x3 - x2).abs() < 1e-6 && (y3 - y2).abs() < 1e-6);
        }
    }
    eprintln!("OpenCV fisheye: worst error {worst:.2e} px over {} points", rows.len());
}
