//! The lens families fitted to one set of detections and the choice among them: every family (or
//! the forced one) with and without a bloom lean, scored by held-out error, the ideal families
//! preferred, a lens whose rim falls far inside the horizon or whose camera the loader refuses
//! not chosen while another will do ([`LeanCandidate`]).
use super::*;

/// The detections after one treatment of the glare's lean, and the lens families fitted to them.
pub(super) struct LeanCandidate {
    pub(super) dets: Vec<Detection>,
    pub(super) glare_lean: LeanCorrection,
    pub(super) solved: Vec<(Problem, FamilyScore)>,
    /// With the principal point held, each family fitted with it free (see
    /// [`fit_families_and_free`]); empty otherwise.
    pub(super) free: Vec<Problem>,
    /// Where each fitted lens puts the image circle's rim \[°\].
    pub(super) rims: Vec<f64>,
    pub(super) any_plausible: bool,
    /// Whether each fitted camera is one the loader accepts.
    pub(super) loads: Vec<bool>,
    pub(super) best: usize,
}

impl LeanCandidate {
    /// Fit every lens family (or the forced one) and choose among them. Where each fitted lens puts
    /// the image circle's rim matters: a sky imager is built to see the whole sky, so a lens that
    /// puts the rim far inside the horizon is fitting something other than the lens (a bias of the
    /// detections that grows with zenith angle). `None` when no family could be fitted.
    pub(super) fn fit(dets: Vec<Detection>, glare_lean: LeanCorrection, circle: ImageCircle, size: (u32, u32), options: &CalibrateOptions) -> Option<Self> {
        let (solved, free) = fit_families_and_free(circle, size, &dets, options);
        let rims: Vec<f64> = solved.iter().map(|(p, _)| finish(p, None, Some(circle)).camera.max_field_angle_rad.to_degrees()).collect();
        let plausible = |i: usize| (PLAUSIBLE_RIM_DEG.0..=PLAUSIBLE_RIM_DEG.1).contains(&rims[i]);
        let any_plausible = (0..solved.len()).any(plausible);
        // A family whose camera the loader would refuse (a polynomial that folds over within the
        // lens field) is never chosen while another family's camera loads: it would stop
        // `calibrate` with no file although a usable camera was fitted.
        let loads: Vec<bool> = solved
            .iter()
            .map(|(p, _)| crate::config::CalibrationFile::from_camera("check", &finish(p, None, Some(circle)).camera).camera(std::path::Path::new("<fitted camera>")).is_ok())
            .collect();
        // The loader also wants the detections to span 5° of zenith per free radial parameter
        // (focal length, and k1, k2 for the polynomial): a narrow arc (a winter day, or one whose
        // detections at a dirt spot were dropped) must not leave a polynomial it would refuse to
        // be chosen. Such a family still stands in the bound (`loads`): the data do not rule it out.
        let cov = super::bound::coverage_of(&dets);
        let span_deg = cov.zenith_max_deg - cov.zenith_min_deg;
        // And its record wants 3 detections per free parameter (`FitRecord::validate`): after
        // detections are dropped (cloud at the sun) a polynomial with its 8–9 free parameters may
        // have too few, while an ideal family still has enough.
        let enough = |p: &super::fit::Problem| {
            let free = p.p.len() - if super::fit::CentrePrior::holds(p.prior) { 2 } else { 0 };
            dets.len() >= (crate::config::MIN_DETECTIONS_PER_PARAMETER * free).max(crate::config::MIN_FIT_DETECTIONS)
        };
        let writable: Vec<bool> = solved
            .iter()
            .zip(&loads)
            .map(|((p, _), l)| *l && enough(p) && span_deg >= crate::config::MIN_ZENITH_SPAN_PER_RADIAL_TERM_DEG * if p.family == LensFamily::Polynomial { 3.0 } else { 1.0 })
            .collect();
        let any_loads = writable.iter().any(|l| *l);
        let best = choose_family(&solved, |i| (!any_loads || writable[i]) && (!any_plausible || plausible(i)))?;
        Some(LeanCandidate { dets, glare_lean, solved, free, rims, any_plausible, loads, best })
    }

    /// The chosen family's held-out RMS \[px\].
    pub(super) fn cv_rms_px(&self) -> f64 {
        self.solved[self.best].1.cv_rms_px
    }
}

/// Fit every lens family asked for (all by default) and score each by its held-out error. Each
/// family is fitted with and without a bloom lean (see [`Problem::lean_px`]); the lean is kept
/// only when it lowers the held-out error by more than [`LEAN_GAIN`]. With the principal point
/// held, also each family's fit with it free within the image circle's prior (the held fit starts from it; it stands in the bound for what holding the centre
/// decided); that second list is empty for a free fit.
pub(super) fn fit_families_and_free(circle: ImageCircle, size: (u32, u32), dets: &[Detection], options: &CalibrateOptions) -> (Vec<(Problem, FamilyScore)>, Vec<Problem>) {
    let start = initial_camera(circle, size, dets);
    let held = options.hold_centre;
    let prior = options.centre_prior_px.map(|s| CentrePrior { cx: circle.cx_px, cy: circle.cy_px, weight: 1.0 / s.max(1e-3), held });
    // With the principal point held, the ideal families only: the few detections that call for it
    // cannot pin free distortion terms.
    let families: Vec<LensFamily> = match options.lens {
        Some(f) => vec![f],
        None if held => LensFamily::ALL.into_iter().filter(|f| *f != LensFamily::Polynomial).collect(),
        None => LensFamily::ALL.to_vec(),
    };
    let folds = 5.min(dets.len() / 4).max(2);
    // A bloom lean is one more free parameter: with the principal point held, only when the
    // detections are three for each of the five.
    let lean_ref = bare_disc_radius_px(dets).filter(|_| !held || dets.len() >= 5 * crate::config::MIN_DETECTIONS_PER_PARAMETER);
    let wq: Vec<f64> = dets.iter().map(|d| d.weight).collect();
    let fit_and_score = |p0: DVector<f64>, fam: LensFamily, lean: Option<f64>| {
        let prob = solve(problem(p0, fam, size, dets, prior, lean));
        let cv = held_out(&prob.p, fam, size, dets, prior, lean, folds);
        let r = prob.residuals_of(&prob.p, false);
        let fit_res: Vec<(f64, f64)> = (0..dets.len()).map(|i| (r[2 * i], r[2 * i + 1])).collect();
        let score = FamilyScore { family: fam, cv_rms_px: weighted_rms(&cv, &wq), fit_rms_px: weighted_rms(&fit_res, &wq), bloom_lean: lean.is_some() };
        (prob, score)
    };
    let mut solved = vec![];
    let mut free = vec![];
    for fam in &families {
        let mut p0 = start_params(&start, *fam);
        if let Some(c) = prior.filter(|c| c.held) {
            // The held fit starts where the free one (the circle as a prior) ends, its centre put
            // back on the circle's: from the image-only guess the held fit can stall far off. A
            // single low arc also leaves the free fit a false minimum (a tilt of tens of degrees),
            // so it is also started from the first family's solution, its focal length scaled to
            // keep the detections' median image radius, and the lower cost kept.
            let soft = Some(CentrePrior { held: false, ..c });
            let mut f = solve(problem(p0, *fam, size, dets, soft, None));
            if let Some(first) = free.first() {
                let f2 = solve(problem(rescaled(first, *fam, dets), *fam, size, dets, soft, None));
                if f2.residuals_of(&f2.p, true).norm_squared() < f.residuals_of(&f.p, true).norm_squared() {
                    f = f2;
                }
            }
            p0 = f.p.clone();
            p0[0] = c.cx;
            p0[1] = c.cy;
            free.push(f);
        }
        let plain = fit_and_score(p0.clone(), *fam, None);
        let leaning = lean_ref.map(|r0| fit_and_score(with_lean(&plain.0.p), *fam, Some(r0)));
        match leaning {
            Some(l) if l.1.cv_rms_px < (1.0 - LEAN_GAIN) * plain.1.cv_rms_px => solved.push(l),
            _ => solved.push(plain),
        }
    }
    (solved, free)
}

/// The parameters of a solved problem for another family: the same principal point and
/// orientation, the focal length that puts the sun at the detections' median zenith angle at the
/// same image radius.
fn rescaled(from: &Problem, family: LensFamily, dets: &[Detection]) -> DVector<f64> {
    let mut z: Vec<f64> = dets.iter().map(|d| d.dir[2].clamp(-1.0, 1.0).acos()).collect();
    z.sort_by(f64::total_cmp);
    let theta = z[z.len() / 2].max(1e-3);
    let cam = from.camera(&from.p);
    let r = cam.f_px * cam.projection.radial(theta);
    let mut p = start_params(&cam, family);
    p[2] = (r / family.projection().radial(theta)).max(1.0).ln();
    p
}

/// How much a bloom lean must lower the held-out error to be kept (a fraction).
const LEAN_GAIN: f64 = 0.05;

/// The bare disc's equivalent radius \[px\]: that of the blob area at the 20th percentile of the
/// detections (as in the bloom screening). `None` when fewer than 8 detections know their blob, or
/// when no blob has grown 1 px past it (nothing for a lean to explain).
fn bare_disc_radius_px(dets: &[Detection]) -> Option<f64> {
    let mut radii: Vec<f64> = dets.iter().filter(|d| d.blob_px > 0).map(|d| (d.blob_px as f64 / std::f64::consts::PI).sqrt()).collect();
    if radii.len() < 8 {
        return None;
    }
    radii.sort_by(f64::total_cmp);
    let r0 = radii[(0.2 * (radii.len() - 1) as f64).round() as usize];
    (radii[radii.len() - 1] > r0 + 1.0).then_some(r0)
}

/// The ideal family with the lowest held-out error among the `eligible`; the polynomial only when
/// it beats that by more than 10 %.
fn choose_family(solved: &[(Problem, FamilyScore)], eligible: impl Fn(usize) -> bool) -> Option<usize> {
    let mut best: Option<usize> = None;
    for (i, (_, s)) in solved.iter().enumerate() {
        if !s.cv_rms_px.is_finite() || !eligible(i) {
            continue;
        }
        let better = match best {
            None => true,
            Some(b) => {
                let b = &solved[b].1;
                if s.family == LensFamily::Polynomial && b.family != LensFamily::Polynomial { s.cv_rms_px < 0.9 * b.cv_rms_px } else { s.cv_rms_px < b.cv_rms_px }
            }
        };
        if better {
            best = Some(i);
        }
    }
    best
}
