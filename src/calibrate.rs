//! Camera calibration from the sun's track.
//!
//! 1. **Sun detection** in each frame: the densest cluster of saturated pixels (all channels ≥ 250),
//!    its centroid over the rows at least three pixels wide (so a one-pixel blooming streak does not
//!    pull it), rejected when the blob is too small (sun clouded), too large, or when much saturated
//!    area lies elsewhere (bright cloud: ambiguous). Each detection is paired with the SPA sun
//!    direction at the frame's time.
//! 2. **Initial guess** without user input: the image circle (fit to the bright disc) gives the
//!    centre and, for a 90° rim, the focal length; the yaw is the circular mean of the angle between
//!    where a level camera would put the sun and where it is.
//! 3. **Fit** by Levenberg–Marquardt (the `levenberg-marquardt` crate) of principal point, focal
//!    length, yaw, pitch, roll and, for the polynomial model, k1 and k2, minimizing the reprojection
//!    error with a Huber loss (iteratively reweighted, δ = 1.5 px). The model — equidistant,
//!    equisolid or polynomial — is chosen by the Bayesian information criterion, a richer model only
//!    when it lowers it by more than 10.
//! 4. **Report**: RMS and largest residual in pixels and degrees, standard errors from the
//!    covariance `σ² (JᵀJ)⁻¹`, and a warning for parameters the data leave loose.
//!
//! The projection is [`Camera`]'s, the same code the pipeline uses.
//!
//! # References
//! * B. Urquhart, B. Kurtz, J. Kleissl, "Sky camera geometric calibration using solar observations",
//!   *Atmos. Meas. Tech.* 9:4279–4294, 2016.
//! * K. Levenberg 1944; D. W. Marquardt, *J. SIAM* 11(2):431–441, 1963.

use chrono::{DateTime, Utc};
use levenberg_marquardt::{LeastSquaresProblem, LevenbergMarquardt};
use nalgebra::{DMatrix, DVector, Dyn, Owned};

use crate::camera::{Camera, Orientation, Projection};
use crate::segment::fit_image_circle;
use crate::sun::{Observer, direction_enu, position};

/// One sun detection paired with the sun's direction.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Detection {
    /// Frame time.
    pub time: DateTime<Utc>,
    /// Detected centroid (column, row) \[px\].
    pub px: (f64, f64),
    /// Sun direction (east, north, up), apparent.
    pub dir: [f64; 3],
}

/// Find the sun disk in a frame. `radius_px` is the image circle's radius.
pub fn detect_sun(img: &image::RgbImage, radius_px: f64) -> Option<(f64, f64, usize)> {
    let (cx, cy, n) = crate::segment::find_sun_blob(img, 250, 3, 0.05 * radius_px)?;
    let r = 0.05 * radius_px;
    // Saturated pixels far from the sun (other than its blooming column) make the detection
    // ambiguous.
    let elsewhere = img
        .enumerate_pixels()
        .filter(|(x, y, p)| {
            p.0.iter().all(|c| *c >= 250) && (*x as f64 - cx).abs() > 2.0 && ((*x as f64 - cx).powi(2) + (*y as f64 - cy).powi(2)) > 4.0 * r * r
        })
        .count();
    if n < 3 || (n as f64) > 0.02 * radius_px * radius_px || elsewhere as f64 > 0.25 * n as f64 {
        return None;
    }
    // Centroid over the rows at least 3 px wide within the neighbourhood (a blooming streak is
    // one or two pixels wide).
    let (w, h) = img.dimensions();
    let rr = 2.0 * r;
    let (y0, y1) = (((cy - rr).floor().max(0.0)) as u32, ((cy + rr).ceil() as u32).min(h - 1));
    let (x0, x1) = (((cx - rr).floor().max(0.0)) as u32, ((cx + rr).ceil() as u32).min(w - 1));
    let (mut sx, mut sy, mut k) = (0.0, 0.0, 0usize);
    for y in y0..=y1 {
        let row: Vec<u32> = (x0..=x1).filter(|&x| img.get_pixel(x, y).0.iter().all(|c| *c >= 250)).collect();
        if row.len() >= 3 {
            for x in &row {
                sx += *x as f64;
                sy += y as f64;
                k += 1;
            }
        }
    }
    (k >= 3).then(|| (sx / k as f64, sy / k as f64, k))
}

/// A fitted calibration.
#[derive(Debug, Clone)]
pub struct Fit {
    /// The camera.
    pub camera: Camera,
    /// Parameter names, values and standard errors (angles in degrees).
    pub params: Vec<(String, f64, f64)>,
    /// RMS residual \[px\].
    pub rms_px: f64,
    /// Largest residual \[px\].
    pub max_px: f64,
    /// RMS residual \[°\].
    pub rms_deg: f64,
    /// Largest residual \[°\].
    pub max_deg: f64,
    /// Residuals per detection \[px\] (dx, dy).
    pub residuals: Vec<(f64, f64)>,
    /// Warnings (parameters the data leave loose).
    pub warnings: Vec<String>,
    /// Bayesian information criterion of the fit.
    pub bic: f64,
}

/// An error of calibration.
#[derive(Debug, thiserror::Error)]
pub enum CalibrationError {
    /// Not enough usable detections.
    #[error("{found} sun detections, {needed} needed ({frames} frames read, {night} with the sun below {min_elevation_deg}°)")]
    TooFewDetections {
        /// Detections found.
        found: usize,
        /// Needed.
        needed: usize,
        /// Frames read.
        frames: usize,
        /// Frames with the sun too low.
        night: usize,
        /// The lowest sun elevation used \[°\].
        min_elevation_deg: f64,
    },
    /// No image circle.
    #[error("no image circle found in the frames (are they black?)")]
    NoCircle,
}

#[derive(Clone)]
struct Problem {
    model: Projection,
    poly: bool,
    size: (u32, u32),
    dets: Vec<Detection>,
    weights: Vec<f64>,
    p: DVector<f64>,
}

impl Problem {
    fn camera(&self, p: &DVector<f64>) -> Camera {
        let proj = if self.poly { Projection::Polynomial { k: [p[6], p[7], 0.0, 0.0] } } else { self.model };
        Camera::new(
            self.size.0,
            self.size.1,
            p[0],
            p[1],
            p[2],
            proj,
            95f64.to_radians(),
            Orientation { yaw_rad: p[3], pitch_rad: p[4], roll_rad: p[5] },
        )
    }

    fn residuals_of(&self, p: &DVector<f64>, weighted: bool) -> DVector<f64> {
        let cam = self.camera(p);
        let mut r = DVector::zeros(2 * self.dets.len());
        for (i, d) in self.dets.iter().enumerate() {
            let w = if weighted { self.weights[i].sqrt() } else { 1.0 };
            let (x, y) = match cam.project_enu(d.dir) {
                Some(v) => v,
                None => cam.project_camera_frame({
                    let v = cam.cam_to_enu().inverse_transform_vector(&nalgebra::Vector3::new(d.dir[0], d.dir[1], d.dir[2]));
                    [v[0], v[1], v[2]]
                }),
            };
            r[2 * i] = w * (x - d.px.0);
            r[2 * i + 1] = w * (y - d.px.1);
        }
        r
    }

    fn jacobian_of(&self, p: &DVector<f64>, weighted: bool) -> DMatrix<f64> {
        let m = 2 * self.dets.len();
        let mut j = DMatrix::zeros(m, p.len());
        for k in 0..p.len() {
            let h = if k <= 2 { 1e-4 } else { 1e-7 };
            let mut a = p.clone();
            let mut b = p.clone();
            a[k] += h;
            b[k] -= h;
            let d = (self.residuals_of(&a, weighted) - self.residuals_of(&b, weighted)) / (2.0 * h);
            j.set_column(k, &d);
        }
        j
    }
}

impl LeastSquaresProblem<f64, Dyn, Dyn> for Problem {
    type ResidualStorage = Owned<f64, Dyn>;
    type JacobianStorage = Owned<f64, Dyn, Dyn>;
    type ParameterStorage = Owned<f64, Dyn>;

    fn set_params(&mut self, x: &DVector<f64>) {
        self.p.copy_from(x);
    }
    fn params(&self) -> DVector<f64> {
        self.p.clone()
    }
    fn residuals(&self) -> Option<DVector<f64>> {
        Some(self.residuals_of(&self.p, true))
    }
    fn jacobian(&self) -> Option<DMatrix<f64>> {
        Some(self.jacobian_of(&self.p, true))
    }
}

/// Angle between two unit vectors \[°\].
fn angle_deg(a: [f64; 3], b: [f64; 3]) -> f64 {
    (a[0] * b[0] + a[1] * b[1] + a[2] * b[2]).clamp(-1.0, 1.0).acos().to_degrees()
}

/// Fit one model to detections from a starting camera.
fn fit_model(start: &Camera, model: Projection, dets: &[Detection]) -> Fit {
    let poly = matches!(model, Projection::Polynomial { .. });
    let base = match model {
        Projection::Equisolid => Projection::Equisolid,
        Projection::Stereographic => Projection::Stereographic,
        _ => Projection::Equidistant,
    };
    // The focal length that keeps the image circle's rim at 90°.
    let rim = start.f_px * start.projection.radial(std::f64::consts::FRAC_PI_2);
    let f0 = rim / base.radial(std::f64::consts::FRAC_PI_2);
    let o = start.orientation;
    let mut p0 = vec![start.cx_px, start.cy_px, f0, o.yaw_rad, o.pitch_rad, o.roll_rad];
    if poly {
        p0.extend([0.0, 0.0]);
    }
    let mut prob = Problem { model: base, poly, size: (start.width_px, start.height_px), dets: dets.to_vec(), weights: vec![1.0; dets.len()], p: DVector::from_vec(p0) };
    // Huber loss by iterative reweighting.
    for _ in 0..4 {
        let (solved, _) = LevenbergMarquardt::new().minimize(prob.clone());
        prob = solved;
        let r = prob.residuals_of(&prob.p, false);
        prob.weights = (0..dets.len())
            .map(|i| {
                let e = (r[2 * i].powi(2) + r[2 * i + 1].powi(2)).sqrt();
                if e <= 1.5 { 1.0 } else { 1.5 / e }
            })
            .collect();
    }
    let p = prob.p.clone();
    let cam = prob.camera(&p);
    let r = prob.residuals_of(&p, false);
    let n = dets.len();
    let resid: Vec<(f64, f64)> = (0..n).map(|i| (r[2 * i], r[2 * i + 1])).collect();
    let rss: f64 = r.iter().map(|v| v * v).sum();
    let dof = (2 * n).saturating_sub(p.len()).max(1) as f64;
    let sigma2 = rss / dof;
    let j = prob.jacobian_of(&p, false);
    let jtj = j.transpose() * &j;
    let cov = jtj.clone().try_inverse().unwrap_or_else(|| DMatrix::from_element(p.len(), p.len(), f64::NAN)) * sigma2;
    let names = ["cx_px", "cy_px", "f_px_per_rad", "yaw_deg", "pitch_deg", "roll_deg", "k1", "k2"];
    let mut params = vec![];
    let mut warnings = vec![];
    for k in 0..p.len() {
        let ang = (3..=5).contains(&k);
        let (v, se) = (p[k], cov[(k, k)].max(0.0).sqrt());
        let (v, se) = if ang { (v.to_degrees(), se.to_degrees()) } else { (v, se) };
        if ang && se > 0.3 || !se.is_finite() {
            warnings.push(format!("{} is poorly constrained by these detections (standard error {se:.2}°): add frames from another season or time of day", names[k]));
        }
        params.push((names[k].to_string(), v, se));
    }
    let degs: Vec<f64> = dets
        .iter()
        .zip(&resid)
        .map(|(d, e)| cam.unproject_enu(d.px.0 + e.0, d.px.1 + e.1).zip(cam.unproject_enu(d.px.0, d.px.1)).map(|(a, b)| angle_deg(a, b)).unwrap_or(f64::NAN))
        .collect();
    let px: Vec<f64> = resid.iter().map(|e| e.0.hypot(e.1)).collect();
    let rms = |v: &[f64]| (v.iter().map(|x| x * x).sum::<f64>() / v.len().max(1) as f64).sqrt();
    let m = 2.0 * n as f64;
    Fit {
        camera: cam,
        params,
        rms_px: rms(&px),
        max_px: px.iter().cloned().fold(0.0, f64::max),
        rms_deg: rms(&degs),
        max_deg: degs.iter().cloned().fold(0.0, f64::max),
        residuals: resid,
        warnings,
        bic: m * (rss / m).max(1e-12).ln() + p.len() as f64 * m.ln(),
    }
}

/// Fit one lens model to detections from a starting camera (the building block of [`calibrate`]).
pub fn fit_detections(start: &Camera, model: Projection, dets: &[Detection]) -> Fit {
    fit_model(start, model, dets)
}

/// Initial camera from the image circle and the first detections.
pub fn initial_camera(circle: crate::segment::ImageCircle, size: (u32, u32), dets: &[Detection]) -> Camera {
    let f = circle.radius_px / std::f64::consts::FRAC_PI_2;
    let level = Camera::new(size.0, size.1, circle.cx_px, circle.cy_px, f, Projection::Equidistant, 95f64.to_radians(), Orientation::default());
    // Yaw: circular mean of (angle where a level, yaw-0 camera puts the sun) − (where it is).
    let (mut s, mut c) = (0.0, 0.0);
    for d in dets {
        let Some((x, y)) = level.project_enu(d.dir) else { continue };
        let want = (y - circle.cy_px).atan2(x - circle.cx_px);
        let got = (d.px.1 - circle.cy_px).atan2(d.px.0 - circle.cx_px);
        let dd = got - want;
        s += dd.sin();
        c += dd.cos();
    }
    level.with_orientation(Orientation { yaw_rad: s.atan2(c), pitch_rad: 0.0, roll_rad: 0.0 })
}

/// The default lowest sun elevation for detections \[°\]. Lower, the glare merges with the bright
/// horizon sky and the saturated blob leans toward the horizon: on the synthetic clear days its
/// centroid sits 0.1–0.15 px outward of the true sun at 45–65° zenith but 0.3 px at 72° and 1.4–2.2 px
/// at 79–80° (test `sun_detections_sit_on_the_true_sun`), and a fit that keeps those detections
/// bends the lens model to follow them.
pub const DEFAULT_MIN_SUN_ELEVATION_DEG: f64 = 20.0;

/// Calibrate from frames: detect the sun, start from the image circle, fit each model, keep the best
/// by BIC. Frames whose sun is below `min_sun_elevation_deg` are skipped.
///
/// # Errors
/// Fewer than `min_detections` usable detections, or no image circle.
pub fn calibrate(
    frames: &[(DateTime<Utc>, image::RgbImage)],
    observer: &Observer,
    min_detections: usize,
    min_sun_elevation_deg: f64,
) -> Result<(Fit, Vec<Detection>), CalibrationError> {
    let low = |found: usize, frames: usize, night: usize| CalibrationError::TooFewDetections {
        found,
        needed: min_detections,
        frames,
        night,
        min_elevation_deg: min_sun_elevation_deg,
    };
    let first = frames.first().ok_or(low(0, 0, 0))?;
    let day: Vec<bool> =
        frames.iter().map(|(t, _)| position(t, observer).map(|s| s.elevation_rad().to_degrees() >= min_sun_elevation_deg).unwrap_or(false)).collect();
    let night = day.iter().filter(|d| !**d).count();
    if night == frames.len() {
        return Err(low(0, frames.len(), night));
    }
    // The image circle from the daytime frames (the largest fitted).
    let circle = frames
        .iter()
        .zip(&day)
        .filter(|(_, d)| **d)
        .filter_map(|((_, img), _)| fit_image_circle(img))
        .max_by(|a, b| a.radius_px.total_cmp(&b.radius_px))
        .ok_or(CalibrationError::NoCircle)?;
    let size = first.1.dimensions();
    let mut dets = vec![];
    for ((t, img), is_day) in frames.iter().zip(&day) {
        let Ok(sp) = position(t, observer) else { continue };
        if !is_day {
            continue;
        }
        if let Some((x, y, _)) = detect_sun(img, circle.radius_px) {
            dets.push(Detection { time: *t, px: (x, y), dir: direction_enu(sp.apparent_zenith_rad, sp.azimuth_rad) });
        }
    }
    if dets.len() < min_detections {
        return Err(low(dets.len(), frames.len(), night));
    }
    let start = initial_camera(circle, size, &dets);
    let fits = [Projection::Equidistant, Projection::Equisolid, Projection::Polynomial { k: [0.0; 4] }].map(|m| fit_model(&start, m, &dets));
    // The simplest model unless a richer one lowers the BIC by more than 10 ("very strong"
    // evidence; Kass & Raftery, J. Am. Stat. Assoc. 90:773, 1995).
    let mut best = fits[0].clone();
    for f in fits.iter().skip(1) {
        if f.bic < best.bic - 10.0 {
            best = f.clone();
        }
    }
    Ok((best, dets))
}

/// The residual plot: the frame (dimmed), the sun track, detections (green), fitted positions (red)
/// and error arrows (×20).
pub fn residual_plot(background: &image::RgbImage, fit: &Fit, dets: &[Detection]) -> image::RgbImage {
    let mut img = background.clone();
    for p in img.pixels_mut() {
        for c in p.0.iter_mut() {
            *c /= 3;
        }
    }
    for (d, e) in dets.iter().zip(&fit.residuals) {
        let (x, y) = d.px;
        let a = (x as i64, y as i64);
        let b = ((x + 20.0 * e.0) as i64, (y + 20.0 * e.1) as i64);
        crate::overlay::line(&mut img, a, b, [255, 200, 0]);
        for (dx, dy) in [(0, 0), (1, 0), (0, 1), (-1, 0), (0, -1)] {
            let put = |img: &mut image::RgbImage, x: i64, y: i64, c: [u8; 3]| {
                if x >= 0 && y >= 0 && (x as u32) < img.width() && (y as u32) < img.height() {
                    img.put_pixel(x as u32, y as u32, image::Rgb(c));
                }
            };
            put(&mut img, a.0 + dx, a.1 + dy, [40, 220, 40]);
            put(&mut img, (x + e.0) as i64 + dx, (y + e.1) as i64 + dy, [230, 40, 40]);
        }
    }
    img
}

/// Obstruction mask from daylight frames: white = open sky; black where a pixel inside the image
/// circle stays dark (mean level below 50) or unchanged (standard deviation of its level below 1.5)
/// across the frames — masts, the horizon line, the housing.
pub fn obstruction_mask(frames: &[&image::RgbImage], circle: crate::segment::ImageCircle) -> image::GrayImage {
    let (w, h) = frames[0].dimensions();
    let n = frames.len() as f64;
    let mut out = image::GrayImage::new(w, h);
    for y in 0..h {
        for x in 0..w {
            let inside = ((x as f64 - circle.cx_px).powi(2) + (y as f64 - circle.cy_px).powi(2)).sqrt() <= circle.radius_px;
            if !inside {
                continue;
            }
            let (mut s, mut ss) = (0.0, 0.0);
            for f in frames {
                let p = f.get_pixel(x, y).0;
                let v = (p[0] as f64 + p[1] as f64 + p[2] as f64) / 3.0;
                s += v;
                ss += v * v;
            }
            let mean = s / n;
            let sd = (ss / n - mean * mean).max(0.0).sqrt();
            let open = mean >= 50.0 && sd >= 1.5;
            out.put_pixel(x, y, image::Luma([if open { 255 } else { 0 }]));
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn streak_does_not_pull_the_centroid() {
        let mut img = image::RgbImage::from_pixel(200, 200, image::Rgb([60, 90, 160]));
        for y in 0..200u32 {
            for x in 0..200u32 {
                let r = ((x as f64 - 120.0).powi(2) + (y as f64 - 80.0).powi(2)).sqrt();
                if r < 4.0 {
                    img.put_pixel(x, y, image::Rgb([255, 255, 255]));
                }
            }
        }
        // A one-pixel saturated streak downward from the sun.
        for y in 80..110u32 {
            img.put_pixel(120, y, image::Rgb([255, 255, 255]));
        }
        let (x, y, _) = detect_sun(&img, 100.0).unwrap();
        assert!((x - 120.0).abs() < 0.2 && (y - 80.0).abs() < 0.2, "{x},{y}");
    }
}
