//! Fisheye camera model: projection, orientation, pixel ↔ sky direction, sky mask.
//!
//! Camera frame: `z` along the optical axis (up for a level sky camera), `x` toward increasing
//! image columns, `y` toward increasing image rows. A direction at angle θ from the axis and
//! angle φ = atan2(y, x) around it lands at radius `r = f · g(θ)` from the principal point:
//!
//! | model | g(θ) |
//! |---|---|
//! | equidistant | θ |
//! | equisolid | 2 sin(θ/2) |
//! | stereographic | 2 tan(θ/2) |
//! | polynomial (Kannala & Brandt 2006) | θ (1 + k1 θ² + k2 θ⁴ + k3 θ⁶ + k4 θ⁸) |
//!
//! The polynomial is the form of OpenCV's fisheye module; `tests/reference_camera.rs` checks it
//! against `cv2.fisheye.projectPoints`.
//!
//! Orientation: the rotation from camera to (east, north, up) is
//! `R = Rz(yaw) · Ry(pitch) · Rx(roll)` (nalgebra's `from_euler_angles(roll, pitch, yaw)`).
//! With all three zero the camera looks straight up, image columns grow toward east and image rows
//! toward north. Positive yaw turns the camera counter-clockwise seen from above.
//!
//! Handedness: a camera looking up sees the sky as from below, so with north at the top of the
//! image east is on the left (rotate the convention above by 180°). Frames that show it the other
//! way round, east on the right with north up as on a map (a camera that images the sky through a
//! mirror, or software that flips its frames), are [`Camera::mirrored`]: the camera frame's `x` is
//! negated between the rotation and the lens, which is the same as flipping the unmirrored
//! camera's image left–right about the principal point.
//!
//! # References
//! * J. Kannala, S. S. Brandt, "A generic camera model and calibration method for conventional,
//!   wide-angle, and fish-eye lenses", *IEEE TPAMI* 28(8):1335–1340, 2006.

use nalgebra::{Rotation3, Vector3};

/// A fisheye projection model.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Projection {
    /// `r = f θ`.
    Equidistant,
    /// `r = 2 f sin(θ/2)`.
    Equisolid,
    /// `r = 2 f tan(θ/2)`.
    Stereographic,
    /// `r = f θ (1 + k1 θ² + k2 θ⁴ + k3 θ⁶ + k4 θ⁸)`.
    Polynomial {
        /// Coefficients k1…k4.
        k: [f64; 4],
    },
}

impl Projection {
    /// g(θ): radius over focal length.
    pub fn radial(&self, theta_rad: f64) -> f64 {
        match *self {
            Projection::Equidistant => theta_rad,
            Projection::Equisolid => 2.0 * (theta_rad / 2.0).sin(),
            Projection::Stereographic => 2.0 * (theta_rad / 2.0).tan(),
            Projection::Polynomial { k } => {
                let t2 = theta_rad * theta_rad;
                theta_rad * (1.0 + t2 * (k[0] + t2 * (k[1] + t2 * (k[2] + t2 * k[3]))))
            }
        }
    }

    /// dg/dθ.
    pub fn radial_derivative(&self, theta_rad: f64) -> f64 {
        match *self {
            Projection::Equidistant => 1.0,
            Projection::Equisolid => (theta_rad / 2.0).cos(),
            Projection::Stereographic => 1.0 / (theta_rad / 2.0).cos().powi(2),
            Projection::Polynomial { k } => {
                let t2 = theta_rad * theta_rad;
                1.0 + t2 * (3.0 * k[0] + t2 * (5.0 * k[1] + t2 * (7.0 * k[2] + t2 * 9.0 * k[3])))
            }
        }
    }

    /// θ for a given g(θ) (= radius / f); `None` where the model has no inverse.
    /// The polynomial is inverted by Newton iteration from θ = ρ.
    pub fn inverse_radial(&self, rho: f64) -> Option<f64> {
        match *self {
            Projection::Equidistant => Some(rho),
            Projection::Equisolid => (rho <= 2.0).then(|| 2.0 * (rho / 2.0).asin()),
            Projection::Stereographic => Some(2.0 * (rho / 2.0).atan()),
            Projection::Polynomial { .. } => {
                let mut theta = rho;
                for _ in 0..50 {
                    let d = self.radial_derivative(theta);
                    if d.abs() < 1e-12 {
                        return None;
                    }
                    let step = (self.radial(theta) - rho) / d;
                    theta -= step;
                    if step.abs() < 1e-15 {
                        break;
                    }
                }
                ((self.radial(theta) - rho).abs() < 1e-10 && theta >= 0.0).then_some(theta)
            }
        }
    }

    /// The model's name as written in calibration files.
    pub fn name(&self) -> &'static str {
        match self {
            Projection::Equidistant => "equidistant",
            Projection::Equisolid => "equisolid",
            Projection::Stereographic => "stereographic",
            Projection::Polynomial { .. } => "polynomial",
        }
    }
}

/// Camera orientation \[rad\]; see the module docs for the convention.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Orientation {
    /// Rotation about the up axis \[rad\].
    pub yaw_rad: f64,
    /// Rotation about the camera's y axis (tilt) \[rad\].
    pub pitch_rad: f64,
    /// Rotation about the camera's x axis (tilt) \[rad\].
    pub roll_rad: f64,
}

/// A calibrated fisheye camera.
#[derive(Debug, Clone, PartialEq)]
pub struct Camera {
    /// Image width \[px\].
    pub width_px: u32,
    /// Image height \[px\].
    pub height_px: u32,
    /// Principal point column \[px\].
    pub cx_px: f64,
    /// Principal point row \[px\].
    pub cy_px: f64,
    /// Focal length \[px per rad\] (`r = f g(θ)`).
    pub f_px: f64,
    /// Projection model.
    pub projection: Projection,
    /// Largest angle from the optical axis that the lens images \[rad\].
    pub max_field_angle_rad: f64,
    /// Orientation.
    pub orientation: Orientation,
    /// The frames are mirrored left–right (see the module docs on handedness).
    pub mirrored: bool,
    cam_to_enu: Rotation3<f64>,
}

impl Camera {
    /// Build a camera.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        width_px: u32,
        height_px: u32,
        cx_px: f64,
        cy_px: f64,
        f_px: f64,
        projection: Projection,
        max_field_angle_rad: f64,
        orientation: Orientation,
    ) -> Self {
        let cam_to_enu =
            Rotation3::from_euler_angles(orientation.roll_rad, orientation.pitch_rad, orientation.yaw_rad);
        Self { width_px, height_px, cx_px, cy_px, f_px, projection, max_field_angle_rad, orientation, mirrored: false, cam_to_enu }
    }

    /// The same camera with its frames mirrored left–right (`true`) or not.
    pub fn with_mirrored(mut self, mirrored: bool) -> Self {
        self.mirrored = mirrored;
        self
    }

    /// The camera an image flipped left–right (column `x` to `width − 1 − x`) was taken with: the
    /// principal point moves to `width − 1 − cx` and the handedness turns over; directions and the
    /// lens stay.
    pub fn flipped_left_right(&self) -> Self {
        let mut c = self.clone();
        c.cx_px = self.width_px as f64 - 1.0 - self.cx_px;
        c.mirrored = !self.mirrored;
        c
    }

    /// A camera-frame direction from an (east, north, up) one (rotation, then the handedness).
    pub fn enu_to_camera_frame(&self, d_enu: [f64; 3]) -> [f64; 3] {
        let v = self.cam_to_enu.inverse_transform_vector(&Vector3::new(d_enu[0], d_enu[1], d_enu[2]));
        [if self.mirrored { -v[0] } else { v[0] }, v[1], v[2]]
    }

    /// An (east, north, up) direction from a camera-frame one (the inverse of
    /// [`Camera::enu_to_camera_frame`]).
    pub fn camera_frame_to_enu(&self, v: [f64; 3]) -> [f64; 3] {
        let x = if self.mirrored { -v[0] } else { v[0] };
        let w = self.cam_to_enu * Vector3::new(x, v[1], v[2]);
        [w[0], w[1], w[2]]
    }

    /// A level, centred equidistant camera whose 90° field angle meets the image edge.
    pub fn ideal(size_px: u32) -> Self {
        let c = (size_px as f64 - 1.0) / 2.0;
        let f = (size_px as f64 / 2.0 - 1.0) / std::f64::consts::FRAC_PI_2;
        Self::new(size_px, size_px, c, c, f, Projection::Equidistant, std::f64::consts::FRAC_PI_2, Orientation::default())
    }

    /// Same camera with another orientation.
    pub fn with_orientation(&self, orientation: Orientation) -> Self {
        let mirrored = self.mirrored;
        Self::new(
            self.width_px,
            self.height_px,
            self.cx_px,
            self.cy_px,
            self.f_px,
            self.projection,
            self.max_field_angle_rad,
            orientation,
        )
        .with_mirrored(mirrored)
    }

    /// The same camera seen through its frames reduced by `reduce` (each side divided, rounded up;
    /// pixel `u` of the reduced frame stands for full-size pixels `reduce·u … reduce·u + reduce − 1`,
    /// centred at `reduce·u + (reduce − 1)/2`), as a JPEG decoded at reduced scale gives them.
    pub fn reduced(&self, reduce: u32) -> Self {
        let r = reduce.max(1) as f64;
        let to_reduced = |c: f64| (c - (r - 1.0) / 2.0) / r;
        Self::new(
            self.width_px.div_ceil(reduce.max(1)),
            self.height_px.div_ceil(reduce.max(1)),
            to_reduced(self.cx_px),
            to_reduced(self.cy_px),
            self.f_px / r,
            self.projection,
            self.max_field_angle_rad,
            self.orientation,
        )
        .with_mirrored(self.mirrored)
    }

    /// Rotation camera → (east, north, up) (before the handedness: see
    /// [`Camera::enu_to_camera_frame`]).
    pub fn cam_to_enu(&self) -> &Rotation3<f64> {
        &self.cam_to_enu
    }

    /// Project a camera-frame direction to a pixel, without field or image-bound checks.
    pub fn project_camera_frame(&self, v: [f64; 3]) -> (f64, f64) {
        let rho_xy = (v[0] * v[0] + v[1] * v[1]).sqrt();
        if rho_xy < 1e-300 {
            return (self.cx_px, self.cy_px);
        }
        let theta = rho_xy.atan2(v[2]);
        let r = self.f_px * self.projection.radial(theta);
        (self.cx_px + r * v[0] / rho_xy, self.cy_px + r * v[1] / rho_xy)
    }

    /// Pixel of an (east, north, up) direction; `None` outside the lens field or the image.
    pub fn project_enu(&self, d_enu: [f64; 3]) -> Option<(f64, f64)> {
        let v = self.enu_to_camera_frame(d_enu);
        let n = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
        let theta = (v[2] / n).clamp(-1.0, 1.0).acos();
        if theta > self.max_field_angle_rad {
            return None;
        }
        let (x, y) = self.project_camera_frame(v);
        self.in_image(x, y).then_some((x, y))
    }

    /// Pixel of a sky direction given by zenith and azimuth \[rad\].
    pub fn project(&self, zenith_rad: f64, azimuth_rad: f64) -> Option<(f64, f64)> {
        self.project_enu(crate::sun::direction_enu(zenith_rad, azimuth_rad))
    }

    /// Whether a pixel coordinate lies on the image (pixel centres at integers).
    pub fn in_image(&self, x: f64, y: f64) -> bool {
        x >= -0.5 && y >= -0.5 && x < self.width_px as f64 - 0.5 && y < self.height_px as f64 - 0.5
    }

    /// Unit direction in the camera frame of a pixel and its field angle; `None` outside the lens
    /// field.
    pub fn unproject_camera_frame(&self, x: f64, y: f64) -> Option<([f64; 3], f64)> {
        let dx = (x - self.cx_px) / self.f_px;
        let dy = (y - self.cy_px) / self.f_px;
        let rho = (dx * dx + dy * dy).sqrt();
        let theta = self.projection.inverse_radial(rho)?;
        if theta > self.max_field_angle_rad {
            return None;
        }
        let (st, ct) = theta.sin_cos();
        let v = if rho < 1e-300 { [0.0, 0.0, 1.0] } else { [st * dx / rho, st * dy / rho, ct] };
        Some((v, theta))
    }

    /// Unit (east, north, up) direction of a pixel; `None` outside the lens field.
    pub fn unproject_enu(&self, x: f64, y: f64) -> Option<[f64; 3]> {
        let (v, _) = self.unproject_camera_frame(x, y)?;
        Some(self.camera_frame_to_enu(v))
    }

    /// Zenith and azimuth \[rad\] of a pixel; `None` outside the lens field.
    pub fn unproject(&self, x: f64, y: f64) -> Option<(f64, f64)> {
        self.unproject_enu(x, y).map(crate::sun::zenith_azimuth_of)
    }

    /// Radius of the image circle \[px\] (where the maximum field angle lands).
    pub fn image_circle_radius_px(&self) -> f64 {
        self.f_px * self.projection.radial(self.max_field_angle_rad)
    }

    /// The sky mask: pixels inside the lens field whose direction is above the horizon
    /// (zenith < `max_zenith_rad`) and not obstructed.
    pub fn sky_mask(&self, max_zenith_rad: f64, obstruction: Option<&image::GrayImage>) -> SkyMask {
        let (w, h) = (self.width_px as usize, self.height_px as usize);
        let mut sky = vec![false; w * h];
        let mut zen = vec![f32::NAN; w * h];
        let mut azi = vec![f32::NAN; w * h];
        for y in 0..h {
            for x in 0..w {
                if let Some((z, a)) = self.unproject(x as f64, y as f64) {
                    let i = y * w + x;
                    zen[i] = z as f32;
                    azi[i] = a as f32;
                    let free = obstruction
                        .map(|m| m.get_pixel_checked(x as u32, y as u32).map(|p| p.0[0] > 127).unwrap_or(false))
                        .unwrap_or(true);
                    sky[i] = z < max_zenith_rad && free;
                }
            }
        }
        SkyMask { width_px: self.width_px, height_px: self.height_px, sky, zenith_rad: zen, azimuth_rad: azi }
    }
}

/// Per-pixel sky geometry: which pixels see open sky, and their zenith and azimuth.
#[derive(Debug, Clone)]
pub struct SkyMask {
    /// Width \[px\].
    pub width_px: u32,
    /// Height \[px\].
    pub height_px: u32,
    /// `true` where the pixel sees open sky.
    pub sky: Vec<bool>,
    /// Zenith angle of each pixel \[rad\] (NaN outside the lens field).
    pub zenith_rad: Vec<f32>,
    /// Azimuth of each pixel \[rad\] (NaN outside the lens field).
    pub azimuth_rad: Vec<f32>,
}

impl SkyMask {
    /// Number of sky pixels.
    pub fn count(&self) -> usize {
        self.sky.iter().filter(|&&s| s).count()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::FRAC_PI_2;

    fn cams() -> Vec<Camera> {
        let o = Orientation { yaw_rad: 0.7, pitch_rad: 0.03, roll_rad: -0.02 };
        [
            Projection::Equidistant,
            Projection::Equisolid,
            Projection::Stereographic,
            Projection::Polynomial { k: [-0.03, 0.004, -0.0005, 0.00002] },
        ]
        .into_iter()
        .map(|p| Camera::new(640, 600, 322.3, 297.8, 190.0, p, 95f64.to_radians(), o))
        .collect()
    }

    #[test]
    fn zenith_lands_near_principal_point_for_level_camera() {
        let c = Camera::ideal(512);
        let (x, y) = c.project(0.0, 0.0).unwrap();
        assert!((x - 255.5).abs() < 1e-9 && (y - 255.5).abs() < 1e-9);
        // Level, yaw 0: east is +x, north is +y (see module docs).
        let (xe, ye) = c.project(FRAC_PI_2 * 0.5, FRAC_PI_2).unwrap();
        assert!(xe > 300.0 && (ye - 255.5).abs() < 1e-9);
        let (xn, yn) = c.project(FRAC_PI_2 * 0.5, 0.0).unwrap();
        assert!(yn > 300.0 && (xn - 255.5).abs() < 1e-9);
    }

    #[test]
    fn pixel_direction_pixel_round_trip_over_whole_circle() {
        for c in cams() {
            let mut n = 0;
            for y in (0..c.height_px).step_by(7) {
                for x in (0..c.width_px).step_by(7) {
                    let (xf, yf) = (x as f64 + 0.25, y as f64 - 0.125);
                    if let Some(d) = c.unproject_enu(xf, yf) {
                        let (x2, y2) = c.project_enu(d).unwrap_or((f64::NAN, f64::NAN));
                        // Project then checks image bounds; points near the border may fall off by rounding.
                        if x2.is_nan() {
                            continue;
                        }
                        assert!((x2 - xf).abs() < 1e-6 && (y2 - yf).abs() < 1e-6, "{:?} {xf},{yf} -> {x2},{y2}", c.projection);
                        n += 1;
                    }
                }
            }
            assert!(n > 3000);
        }
    }

    #[test]
    fn a_mirrored_camera_sees_the_flipped_image() {
        for c in cams() {
            let m = c.flipped_left_right();
            assert!(m.mirrored && !m.flipped_left_right().mirrored);
            let mut n = 0;
            for i in 0..40 {
                let (z, a) = (0.03 * i as f64, 0.37 * i as f64);
                let (Some((x, y)), Some((xm, ym))) = (c.project(z, a), m.project(z, a)) else { continue };
                assert!((xm - (c.width_px as f64 - 1.0 - x)).abs() < 1e-9 && (ym - y).abs() < 1e-9, "{:?} z {z} a {a}", c.projection);
                let (z2, a2) = m.unproject(xm, ym).unwrap();
                assert!((z2 - z).abs() < 1e-9, "{z2} {z}");
                assert!(((a2 - a).rem_euclid(std::f64::consts::TAU) + 1e-9) % std::f64::consts::TAU < 1e-8 || z < 1e-6);
                n += 1;
            }
            assert!(n > 30);
            // Handedness survives a new orientation and a reduced frame.
            assert!(m.with_orientation(Orientation::default()).mirrored && m.reduced(2).mirrored);
        }
    }

    #[test]
    fn level_mirrored_camera_puts_east_on_the_right_with_north_up() {
        // Unmirrored, level, yaw 180°: north at the top (small rows), east on the left.
        let up = Camera::ideal(512).with_orientation(Orientation { yaw_rad: std::f64::consts::PI, ..Default::default() });
        let (xe, _) = up.project(0.8, FRAC_PI_2).unwrap();
        let (_, yn) = up.project(0.8, 0.0).unwrap();
        assert!(yn < 255.5 && xe < 255.5);
        let mapped = up.with_mirrored(true);
        let (xe, _) = mapped.project(0.8, FRAC_PI_2).unwrap();
        let (_, yn) = mapped.project(0.8, 0.0).unwrap();
        assert!(yn < 255.5 && xe > 255.5);
    }

    #[test]
    fn polynomial_inverse_matches_forward() {
        let p = Projection::Polynomial { k: [0.05, -0.01, 0.002, -0.0004] };
        for i in 0..100 {
            let t = i as f64 * 0.016;
            let back = p.inverse_radial(p.radial(t)).unwrap();
            assert!((back - t).abs() < 1e-12);
        }
    }

    #[test]
    fn sky_mask_excludes_outside_circle_and_obstruction() {
        let c = Camera::ideal(64);
        let mut obs = image::GrayImage::from_pixel(64, 64, image::Luma([255]));
        obs.put_pixel(32, 20, image::Luma([0]));
        let m = c.sky_mask(FRAC_PI_2, Some(&obs));
        assert!(!m.sky[0]);
        assert!(m.sky[32 * 64 + 32]);
        assert!(!m.sky[20 * 64 + 32]);
        // Area ratio of circle to square: π/4 (geometry).
        let frac = m.count() as f64 / (64.0 * 64.0);
        assert!((frac - std::f64::consts::PI / 4.0).abs() < 0.05, "{frac}");
    }
}
