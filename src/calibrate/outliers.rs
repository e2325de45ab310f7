//! Gross outliers among the sun detections: a glint, or the glare of a sun just outside a frame
//! that cuts the image circle, taken for the sun. The fit's Huber loss bounds each one's pull, but
//! one such detection among a hundred still moved a fit by 0.4° through the lens-lean and held-out
//! choices made on the residuals (a 512×392 frame cut from a 512² sky imager), so `calibrate` drops
//! them and fits again ([`super::calibrate`]).

use crate::robust::MAD_TO_SIGMA;
use chrono::{DateTime, Utc};

/// A detection whose residual exceeds this many robust standard deviations of the fit's residuals
/// (and [`GROSS_OUTLIER_MIN_SHARE`] of the image circle's radius) is a gross outlier.
pub const GROSS_OUTLIER_SIGMAS: f64 = 8.0;
/// The smallest residual, as a share of the image circle's radius, that can make a gross outlier
/// (4.9 px on a 512² sky imager): the glare's lean alone leaves a few pixels on bloomed discs.
pub const GROSS_OUTLIER_MIN_SHARE: f64 = 0.02;
/// At most this share of the detections is dropped as gross outliers; with more, it is the fit
/// that is wrong, not they, and none is dropped.
pub const GROSS_OUTLIER_MAX_SHARE: f64 = 0.1;

/// The residual \[px\] above which a detection is a gross outlier: [`GROSS_OUTLIER_SIGMAS`] robust
/// standard deviations (1.4826 × the median residual's length), at least
/// [`GROSS_OUTLIER_MIN_SHARE`] of the image circle's radius `radius_px`.
pub fn gross_threshold_px(residuals: &[(f64, f64)], radius_px: f64) -> f64 {
    let mut r: Vec<f64> = residuals.iter().map(|e| e.0.hypot(e.1)).collect();
    r.sort_by(f64::total_cmp);
    let median = r.get(r.len() / 2).copied().unwrap_or(0.0);
    (GROSS_OUTLIER_SIGMAS * MAD_TO_SIGMA * median).max(GROSS_OUTLIER_MIN_SHARE * radius_px)
}

/// The times of the detections (`times`, in the order of `residuals`) whose residual exceeds
/// `limit_px`; none when they would be more than [`GROSS_OUTLIER_MAX_SHARE`] of them.
pub fn gross_outliers(residuals: &[(f64, f64)], times: &[DateTime<Utc>], limit_px: f64) -> Vec<DateTime<Utc>> {
    let out: Vec<DateTime<Utc>> = times.iter().zip(residuals).filter(|(_, e)| e.0.hypot(e.1) > limit_px).map(|(t, _)| *t).collect();
    if out.len() as f64 > GROSS_OUTLIER_MAX_SHARE * times.len() as f64 { vec![] } else { out }
}

/// The warning a refit without gross outliers carries.
pub fn dropped_warning(times: &[DateTime<Utc>], limit_px: f64) -> String {
    let at: Vec<String> = times.iter().map(|t| t.format("%Y-%m-%dT%H:%M:%SZ").to_string()).collect();
    format!(
        "{} sun detection(s) dropped as gross outliers (residual above {limit_px:.1} px: {GROSS_OUTLIER_SIGMAS}× the fit's robust spread, at least {:.0} % of the image circle's radius) and the camera fitted again without them, at {}: a glint, or the glare of a sun just outside the frame",
        times.len(),
        100.0 * GROSS_OUTLIER_MIN_SHARE,
        at.join(", ")
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    fn times(n: usize) -> Vec<DateTime<Utc>> {
        (0..n).map(|i| Utc.with_ymd_and_hms(2026, 6, 1, 8, 0, 0).unwrap() + chrono::Duration::minutes(i as i64)).collect()
    }

    #[test]
    fn one_far_detection_among_many_is_dropped() {
        // Residuals of 0.3 px, one of 100 px: the threshold is the radius share (robust spread
        // 8 × 1.4826 × 0.3 = 3.6 px < 2 % of 244 px = 4.9 px).
        let mut r = vec![(0.3, 0.0); 90];
        r[17] = (100.0, 30.0);
        let limit = gross_threshold_px(&r, 244.0);
        assert!((limit - 0.02 * 244.0).abs() < 1e-9, "{limit}");
        assert_eq!(gross_outliers(&r, &times(90), limit), vec![times(90)[17]]);
        // A bloomed detection 3 px off is kept.
        r[17] = (3.0, 0.0);
        assert!(gross_outliers(&r, &times(90), gross_threshold_px(&r, 244.0)).is_empty());
    }

    #[test]
    fn a_wide_spread_raises_the_threshold_and_many_far_ones_are_kept() {
        // Residuals of 2 px: the threshold is 8 × 1.4826 × 2 = 23.7 px, so 20 px is kept.
        let mut r = vec![(2.0, 0.0); 50];
        r[3] = (20.0, 0.0);
        let limit = gross_threshold_px(&r, 244.0);
        assert!((limit - 8.0 * 1.4826 * 2.0).abs() < 1e-9);
        assert!(gross_outliers(&r, &times(50), limit).is_empty());
        // Six of fifty far off (12 %): the fit is what is wrong; none dropped.
        for e in r.iter_mut().take(6) {
            *e = (80.0, 0.0);
        }
        assert!(gross_outliers(&r, &times(50), limit).is_empty());
        for e in r.iter_mut().take(6).skip(5) {
            *e = (2.0, 0.0);
        }
        assert_eq!(gross_outliers(&r, &times(50), limit).len(), 5);
    }
}
