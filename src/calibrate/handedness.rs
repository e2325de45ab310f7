//! Both handednesses of the fit on the screened detections, and the choice between them: the
//! frames may show the sky as a camera looking up sees it, or mirrored (moved out of `mod.rs`
//! unchanged).

use super::*;

/// Steps 2–8 on the detections: the bloom screening, both handednesses of the fit and the choice
/// between them. `counts` are the frames read and those with the sun too low (for the error).
pub(super) fn fit_screened(
    raw: &[Detection],
    levels: &[Vec<GlareLevel>],
    circle: ImageCircle,
    size: (u32, u32),
    (n_frames, night, clouded): (usize, usize, usize),
    options: &CalibrateOptions,
) -> Result<(Fit, Vec<Detection>), CalibrationError> {
    let low = |found: usize, bloom: usize| CalibrationError::TooFewDetections {
        found,
        needed: options.min_detections,
        held: HELD_FIT_DETECTIONS,
        frames: n_frames,
        night,
        bloom,
        clouded,
        min_elevation_deg: options.min_sun_elevation_deg,
    };
    let found = raw.len();
    let mut screened = raw.to_vec();
    screen_bloom(&mut screened);
    let bloom = found - screened.len();
    if screened.len() < HELD_FIT_DETECTIONS {
        return Err(low(screened.len(), bloom));
    }
    // Fewer than a free fit needs (the user's minimum, and three per parameter of the free fit),
    // but enough for one held to the image circle: the principal point stays at the circle's
    // centre and the lens is one of the ideal families.
    let free_needed = options.min_detections.max(FREE_FIT_PARAMETERS * crate::config::MIN_DETECTIONS_PER_PARAMETER);
    let held_options;
    let options = if screened.len() < free_needed && !options.hold_centre {
        held_options = CalibrateOptions { hold_centre: true, centre_prior_px: Some(options.centre_prior_px.unwrap_or(HELD_CENTRE_SIGMA_PX)), ..options.clone() };
        &held_options
    } else {
        options
    };
    let coverage = coverage_of(&screened);
    if coverage.azimuth_span_deg < 20.0 {
        return Err(CalibrationError::Unusable(format!("the detections span only {:.1}° of azimuth, 20° needed", coverage.azimuth_span_deg)));
    }
    // Handedness: the frames may show the sky as a camera looking up sees it, or mirrored (east
    // on the right with north up). The same fit runs on the detections as found and on them
    // mirrored about the image circle's centre; the mirrored one is kept only when the upright one
    // cannot be used or the mirrored one predicts the held-out blocks at least twice as well (an
    // upright camera fitted mirrored needs a tilt of tens of degrees).
    let upright = fit_one_handedness(raw, levels, circle, size, coverage, options);
    let mirror_x = |x: f64| 2.0 * circle.cx_px - x;
    let raw_m: Vec<Detection> = raw.iter().map(|d| Detection { px: (mirror_x(d.px.0), d.px.1), ..*d }).collect();
    let levels_m: Vec<Vec<GlareLevel>> = levels.iter().map(|ls| ls.iter().map(|l| GlareLevel { x_px: mirror_x(l.x_px), ..*l }).collect()).collect();
    let mirrored = fit_one_handedness(&raw_m, &levels_m, circle, size, coverage, options).map(|(mut fit, mut dets)| {
        fit.camera.cx_px = mirror_x(fit.camera.cx_px);
        fit.camera.mirrored = true;
        for p in fit.params.iter_mut().filter(|p| p.0 == "cx_px") {
            p.1 = mirror_x(p.1);
        }
        for r in &mut fit.residuals {
            r.0 = -r.0;
        }
        for d in &mut dets {
            d.px.0 = mirror_x(d.px.0);
        }
        // The covariance is in the mirrored parametrization (its bound is already tabulated).
        fit.cov = None;
        (fit, dets)
    });
    let cv = |r: &Result<(Fit, Vec<Detection>), CalibrationError>| r.as_ref().map(|(f, _)| held_out_of_chosen(f)).unwrap_or(f64::INFINITY);
    let both = [cv(&upright), cv(&mirrored)];
    let chosen = match (upright, mirrored) {
        (Ok(u), Ok(m)) if both[1] < MIRRORED_MIN_GAIN * both[0] => Ok(with_mirror_note(m, Some(&u.0))),
        (Ok(u), _) => Ok(u),
        // Frames no upright camera explains are taken as mirrored only when a level mirrored camera
        // explains them (a clock far off also defeats the upright fit, with a large tilt).
        (Err(_), Ok(m)) if tilt_deg(&m.0.camera) <= LEVEL_WARN_TILT_DEG => Ok(with_mirror_note(m, None)),
        (Err(e), _) => Err(e),
    };
    chosen.map(|(mut fit, dets)| {
        fit.handedness_held_out_px = both;
        (fit, dets)
    })
}

/// The mirrored fit is kept only when its held-out error is below this share of the upright fit's.
pub const MIRRORED_MIN_GAIN: f64 = 0.5;

/// The held-out error \[px\] of the family a fit chose.
fn held_out_of_chosen(fit: &Fit) -> f64 {
    fit.scores.iter().find(|s| s.family == fit.family).map(|s| s.cv_rms_px).unwrap_or(f64::INFINITY)
}

/// Say why the frames were taken as mirrored.
fn with_mirror_note((mut fit, dets): (Fit, Vec<Detection>), upright: Option<&Fit>) -> (Fit, Vec<Detection>) {
    fit.mirrored_because = Some(match upright {
        Some(u) => format!("held-out error {:.3} px mirrored against {:.3} px upright", held_out_of_chosen(&fit), held_out_of_chosen(u)),
        None => "the upright fit was not usable".to_string(),
    });
    (fit, dets)
}
