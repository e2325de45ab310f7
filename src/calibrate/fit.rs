//! The fit itself: the least-squares problem of one lens family (projection, optional bloom lean,
//! principal-point prior), its robust solution, the held-out error over blocks of zenith angle, and
//! the [`Fit`] made of a solved problem (residuals, standard errors, field from the image circle).

use levenberg_marquardt::{LeastSquaresProblem, LevenbergMarquardt};
use nalgebra::{DMatrix, DVector, Dyn, Owned};

use super::{Coverage, Detection, Fit, ImageCircle, LensFamily};
use crate::camera::{Camera, Orientation, Projection};

/// The image circle's centre as a prior on the principal point: `weight` is 1/σ \[1/px\]. When
/// `held`, the principal point is not fitted at all (it stays where the starting parameters put
/// it, the circle's centre) and the prior only enters the covariance, as the centre's own
/// uncertainty.
#[derive(Clone, Copy, Debug)]
pub(super) struct CentrePrior {
    pub(super) cx: f64,
    pub(super) cy: f64,
    pub(super) weight: f64,
    pub(super) held: bool,
}

impl CentrePrior {
    /// Whether the principal point is held (not fitted).
    pub(super) fn holds(prior: Option<CentrePrior>) -> bool {
        prior.is_some_and(|c| c.held)
    }
}

#[derive(Clone)]
pub(super) struct Problem {
    pub(super) family: LensFamily,
    pub(super) size: (u32, u32),
    pub(super) max_field_rad: f64,
    pub(super) dets: Vec<Detection>,
    /// Huber weights × quality weights.
    pub(super) weights: Vec<f64>,
    pub(super) prior: Option<CentrePrior>,
    /// The bare disc's radius \[px\] when the fit carries a bloom lean (its coefficient is the
    /// last parameter); `None` without one.
    pub(super) lean_ref_px: Option<f64>,
    pub(super) p: DVector<f64>,
}

impl Problem {
    pub(super) fn camera(&self, p: &DVector<f64>) -> Camera {
        let proj = if self.family == LensFamily::Polynomial { Projection::Polynomial { k: [p[6], p[7], 0.0, 0.0] } } else { self.family.projection() };
        Camera::new(
            self.size.0,
            self.size.1,
            p[0],
            p[1],
            p[2].exp(),
            proj,
            self.max_field_rad,
            Orientation { yaw_rad: p[3], pitch_rad: p[4], roll_rad: p[5] },
        )
    }

    /// The radial lean \[px\] the bloom model puts on detection `d`: the lean coefficient times
    /// how far the blob's equivalent radius has grown past the bare disc's, times the sine of the
    /// sun's zenith angle (a glare lobe has no direction to lean toward with the sun overhead).
    pub(super) fn lean_px(&self, p: &DVector<f64>, d: &Detection) -> f64 {
        match self.lean_ref_px {
            Some(r0) if d.blob_px > 0 => {
                let grown = ((d.blob_px as f64 / std::f64::consts::PI).sqrt() - r0).max(0.0);
                let sin_z = (1.0 - d.dir[2] * d.dir[2]).max(0.0).sqrt();
                p[p.len() - 1] * grown * sin_z
            }
            _ => 0.0,
        }
    }

    pub(super) fn rows(&self) -> usize {
        2 * self.dets.len() + if self.prior.is_some() { 2 } else { 0 }
    }

    pub(super) fn residuals_of(&self, p: &DVector<f64>, weighted: bool) -> DVector<f64> {
        let cam = self.camera(p);
        let mut r = DVector::zeros(self.rows());
        for (i, d) in self.dets.iter().enumerate() {
            let w = if weighted { self.weights[i].sqrt() } else { 1.0 };
            let (mut x, mut y) = project_unchecked(&cam, d.dir);
            let lean = self.lean_px(p, d);
            if lean != 0.0 {
                let (ux, uy) = (x - p[0], y - p[1]);
                let n = ux.hypot(uy).max(1e-9);
                x += lean * ux / n;
                y += lean * uy / n;
            }
            r[2 * i] = w * (x - d.px.0);
            r[2 * i + 1] = w * (y - d.px.1);
        }
        if let Some(c) = self.prior {
            let n = 2 * self.dets.len();
            let w = if weighted { c.weight } else { 0.0 };
            r[n] = w * (p[0] - c.cx);
            r[n + 1] = w * (p[1] - c.cy);
        }
        r
    }

    pub(super) fn jacobian_of(&self, p: &DVector<f64>, weighted: bool) -> DMatrix<f64> {
        let mut j = DMatrix::zeros(self.rows(), p.len());
        for k in 0..p.len() {
            let (a, b, h) = perturbed(p, k);
            let d = (self.residuals_of(&a, weighted) - self.residuals_of(&b, weighted)) / (2.0 * h);
            j.set_column(k, &d);
        }
        j
    }
}

/// Parameters `p` moved up and down in component `k` for a central difference, and the step: 1e-4
/// for the principal point \[px\], 1e-7 for the rest (log focal length, angles \[rad\], k1, k2).
pub(super) fn perturbed(p: &DVector<f64>, k: usize) -> (DVector<f64>, DVector<f64>, f64) {
    let h = if k <= 1 { 1e-4 } else { 1e-7 };
    let (mut a, mut b) = (p.clone(), p.clone());
    a[k] += h;
    b[k] -= h;
    (a, b, h)
}

/// Where a camera puts a direction, ignoring its field and the image bounds.
pub(super) fn project_unchecked(cam: &Camera, dir: [f64; 3]) -> (f64, f64) {
    cam.project_camera_frame(cam.enu_to_camera_frame(dir))
}

impl LeastSquaresProblem<f64, Dyn, Dyn> for Problem {
    type ResidualStorage = Owned<f64, Dyn>;
    type JacobianStorage = Owned<f64, Dyn, Dyn>;
    type ParameterStorage = Owned<f64, Dyn>;

    // A held principal point (see [`CentrePrior`]) is not among the parameters the solver moves.
    fn set_params(&mut self, x: &DVector<f64>) {
        if CentrePrior::holds(self.prior) {
            self.p.rows_mut(2, x.len()).copy_from(x);
        } else {
            self.p.copy_from(x);
        }
    }
    fn params(&self) -> DVector<f64> {
        if CentrePrior::holds(self.prior) { self.p.rows(2, self.p.len() - 2).into_owned() } else { self.p.clone() }
    }
    fn residuals(&self) -> Option<DVector<f64>> {
        Some(self.residuals_of(&self.p, true))
    }
    fn jacobian(&self) -> Option<DMatrix<f64>> {
        let j = self.jacobian_of(&self.p, true);
        Some(if CentrePrior::holds(self.prior) { j.remove_columns(0, 2) } else { j })
    }
}

/// Angle between two unit vectors \[°\].
pub(super) fn angle_deg(a: [f64; 3], b: [f64; 3]) -> f64 {
    (a[0] * b[0] + a[1] * b[1] + a[2] * b[2]).clamp(-1.0, 1.0).acos().to_degrees()
}

/// Starting parameters for a family from a camera: the focal length that keeps the camera's
/// image-circle rim where it is.
pub(super) fn start_params(start: &Camera, family: LensFamily) -> DVector<f64> {
    let base = match family {
        LensFamily::Polynomial => Projection::Equidistant,
        f => f.projection(),
    };
    let rim = start.f_px * start.projection.radial(std::f64::consts::FRAC_PI_2);
    let f0 = (rim / base.radial(std::f64::consts::FRAC_PI_2)).abs().max(1.0);
    let o = start.orientation;
    let mut p0 = vec![start.cx_px, start.cy_px, f0.ln(), o.yaw_rad, o.pitch_rad, o.roll_rad];
    if family == LensFamily::Polynomial {
        p0.extend([0.0, 0.0]);
    }
    DVector::from_vec(p0)
}

/// Robust weighted fit of one family from starting parameters; returns the solved problem.
pub(super) fn solve(mut prob: Problem) -> Problem {
    let quality: Vec<f64> = prob.dets.iter().map(|d| d.weight).collect();
    prob.weights = quality.clone();
    for _ in 0..4 {
        let (solved, _) = LevenbergMarquardt::new().minimize(prob.clone());
        prob = solved;
        let r = prob.residuals_of(&prob.p, false);
        prob.weights = (0..prob.dets.len())
            .map(|i| {
                let e = (r[2 * i].powi(2) + r[2 * i + 1].powi(2)).sqrt();
                quality[i] * if e <= 1.5 { 1.0 } else { 1.5 / e }
            })
            .collect();
    }
    prob
}

/// A problem to solve. With `lean_ref_px`, `start_p` carries the lean coefficient as its last
/// entry (see [`with_lean`]).
pub(super) fn problem(start_p: DVector<f64>, family: LensFamily, size: (u32, u32), dets: &[Detection], prior: Option<CentrePrior>, lean_ref_px: Option<f64>) -> Problem {
    Problem { family, size, max_field_rad: 95f64.to_radians(), dets: dets.to_vec(), weights: vec![1.0; dets.len()], prior, lean_ref_px, p: start_p }
}

/// Starting parameters with a lean coefficient of 0 appended.
pub(super) fn with_lean(p: &DVector<f64>) -> DVector<f64> {
    let mut v: Vec<f64> = p.iter().copied().collect();
    v.push(0.0);
    DVector::from_vec(v)
}

/// Weighted RMS of residual vectors.
pub(super) fn weighted_rms(res: &[(f64, f64)], w: &[f64]) -> f64 {
    let (mut s, mut sw) = (0.0, 0.0);
    for (e, w) in res.iter().zip(w) {
        s += w * (e.0 * e.0 + e.1 * e.1);
        sw += w;
    }
    (s / sw.max(1e-12)).sqrt()
}

/// Held-out residuals of a family: the detections, ordered by the sun's zenith angle, cut into
/// `folds` contiguous blocks, each predicted by a fit to the others. The outermost blocks are
/// predicted by extrapolation, which is what a lens model must do beyond the sun's track; blocks
/// of time would hold out morning detections whose twins at the same zenith angle remain in the
/// afternoon, and so cannot tell a lens distortion from a bias that grows with zenith angle.
pub(super) fn held_out(p_full: &DVector<f64>, family: LensFamily, size: (u32, u32), dets: &[Detection], prior: Option<CentrePrior>, lean_ref_px: Option<f64>, folds: usize) -> Vec<(f64, f64)> {
    let n = dets.len();
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&i, &j| dets[i].dir[2].total_cmp(&dets[j].dir[2]));
    let mut out = vec![(f64::NAN, f64::NAN); n];
    for k in 0..folds {
        let (a, b) = (k * n / folds, (k + 1) * n / folds);
        if b <= a {
            continue;
        }
        let train: Vec<Detection> = order[..a].iter().chain(&order[b..]).map(|&i| dets[i]).collect();
        let prob = solve(problem(p_full.clone(), family, size, &train, prior, lean_ref_px));
        let held: Vec<Detection> = order[a..b].iter().map(|&i| dets[i]).collect();
        let test = Problem { dets: held, weights: vec![1.0; b - a], prior: None, ..prob.clone() };
        let r = test.residuals_of(&prob.p, false);
        for (j, &i) in order[a..b].iter().enumerate() {
            out[i] = (r[2 * j], r[2 * j + 1]);
        }
    }
    out
}

/// Fit one family to detections from a starting camera, without prior or model choice (the
/// building block of [`calibrate`]).
pub fn fit_detections(start: &Camera, model: Projection, dets: &[Detection]) -> Fit {
    let family = match model {
        Projection::Equidistant => LensFamily::Equidistant,
        Projection::Equisolid => LensFamily::Equisolid,
        Projection::Stereographic => LensFamily::Stereographic,
        Projection::Polynomial { .. } => LensFamily::Polynomial,
    };
    let size = (start.width_px, start.height_px);
    let prob = solve(problem(start_params(start, family), family, size, dets, None, None));
    finish(&prob, None, None)
}

/// Turn a solved problem into a [`Fit`]: residuals, standard errors (scaled by `sigma_px` when
/// given, else by the in-sample residual), field from the image circle.
pub(super) fn finish(prob: &Problem, sigma_px: Option<f64>, circle: Option<ImageCircle>) -> Fit {
    let p = prob.p.clone();
    let mut cam = prob.camera(&p);
    if let Some(c) = circle {
        let g = c.radius_px / cam.f_px;
        if let Some(t) = cam.projection.inverse_radial(g) {
            cam = Camera::new(cam.width_px, cam.height_px, cam.cx_px, cam.cy_px, cam.f_px, cam.projection, t.clamp(30f64.to_radians(), 110f64.to_radians()), cam.orientation)
                .with_mirrored(cam.mirrored);
        }
    }
    let r = prob.residuals_of(&p, false);
    let n = prob.dets.len();
    let resid: Vec<(f64, f64)> = (0..n).map(|i| (r[2 * i], r[2 * i + 1])).collect();
    let wq: Vec<f64> = prob.dets.iter().map(|d| d.weight).collect();
    let rss: f64 = resid.iter().zip(&wq).map(|(e, w)| w * (e.0 * e.0 + e.1 * e.1)).sum();
    let neff = wq.iter().sum::<f64>().max(1.0);
    let dof = (2.0 * neff - p.len() as f64).max(1.0);
    let s2 = match sigma_px {
        Some(s) => s * s / 2.0,
        None => rss / dof,
    };
    // Covariance from the weighted Jacobian (quality and Huber weights), prior rows included.
    let j = prob.jacobian_of(&p, true);
    let jtj = j.transpose() * &j;
    let cov = jtj.try_inverse().map(|m| m * s2);
    let names = ["cx_px", "cy_px", "f_px_per_rad", "yaw_deg", "pitch_deg", "roll_deg", "k1", "k2"];
    let lean_at = prob.lean_ref_px.map(|_| p.len() - 1);
    let mut params = vec![];
    let mut warnings = vec![];
    for k in 0..p.len() {
        let ang = (3..=5).contains(&k);
        let var = cov.as_ref().map(|c| c[(k, k)].max(0.0)).unwrap_or(f64::NAN);
        let (v, se) = match k {
            2 => (p[2].exp(), p[2].exp() * var.sqrt()),
            _ if ang => (p[k].to_degrees(), var.sqrt().to_degrees()),
            _ => (p[k], var.sqrt()),
        };
        let v = if k == 3 { (v + 180.0).rem_euclid(360.0) - 180.0 } else { v };
        if ang && se > 0.3 || !se.is_finite() {
            let name = if Some(k) == lean_at { "bloom_lean" } else { names[k] };
            warnings.push(format!("{name} is poorly constrained by these detections (standard error {se:.2}°): add frames from another season or time of day"));
        }
        let name = if Some(k) == lean_at { "bloom_lean" } else { names[k] };
        params.push((name.to_string(), v, se));
    }
    let degs: Vec<f64> = prob
        .dets
        .iter()
        .zip(&resid)
        .map(|(d, e)| cam.unproject_enu(d.px.0 + e.0, d.px.1 + e.1).zip(cam.unproject_enu(d.px.0, d.px.1)).map(|(a, b)| angle_deg(a, b)).unwrap_or(f64::NAN))
        .collect();
    let px: Vec<f64> = resid.iter().map(|e| e.0.hypot(e.1)).collect();
    let deg_pairs: Vec<(f64, f64)> = degs.iter().map(|d| (*d, 0.0)).collect();
    let m = 2.0 * neff;
    let yaw = (cam.orientation.yaw_rad + std::f64::consts::PI).rem_euclid(std::f64::consts::TAU) - std::f64::consts::PI;
    let cam = cam.with_orientation(Orientation { yaw_rad: yaw, ..cam.orientation });
    Fit {
        camera: cam,
        family: prob.family,
        params,
        rms_px: weighted_rms(&resid, &wq),
        max_px: px.iter().cloned().fold(0.0, f64::max),
        rms_deg: weighted_rms(&deg_pairs, &wq),
        max_deg: degs.iter().cloned().filter(|d| d.is_finite()).fold(0.0, f64::max),
        residuals: resid,
        warnings,
        bic: m * (rss / m).max(1e-12).ln() + p.len() as f64 * m.ln(),
        scores: vec![],
        bounds: vec![],
        coverage: Coverage::default(),
        glare_lean: Default::default(),
        mirrored_because: None,
        handedness_held_out_px: [f64::NAN; 2],
        held: if CentrePrior::holds(prob.prior) { vec!["cx_px".into(), "cy_px".into()] } else { vec![] },
        clouded: vec![],
        cov: cov.map(|c| (p, c)),
    }
}
