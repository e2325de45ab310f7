//! The transmittance tuner: ridge regression of the beam transmittances and diffuse gain on the
//! pyranometers' readings, toward the configured values, over a sliding window, Huber-weighted.

use chrono::{DateTime, Utc};

use crate::forecast::IrradianceParams;

/// Tuning of beam transmittances and diffuse gain from pyranometer readings (ridge regression toward
/// the configured values over a sliding window).
#[derive(Debug, Clone, Default)]
pub(super) struct Tuner {
    rows: std::collections::VecDeque<([f64; TUNED], f64)>,
    /// Time of each row.
    times: std::collections::VecDeque<DateTime<Utc>>,
}

impl Tuner {
    const WINDOW: usize = 400;
    const PRIOR_WEIGHT: f64 = 4.0;
    /// Each unknown's prior weight relative to `PRIOR_WEIGHT`, in proportion to the usual size of
    /// its regressor: the brightness feature is a few hundredths where class shares are near 1.
    const PRIOR_SCALE: [f64; TUNED] = [1.0, 1.0, 1.0, 0.05, 1.0];
    const IRLS_ITERATIONS: usize = 6;
    /// Rows the age limit always keeps.
    const MIN_KEPT: usize = 20;

    /// Rows held.
    pub(super) fn len(&self) -> usize {
        self.rows.len()
    }

    /// No rows held.
    pub(super) fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    pub(super) fn push(&mut self, t: DateTime<Utc>, x: [f64; TUNED], y: f64, max_age_s: f64) {
        self.rows.push_back((x, y));
        self.times.push_back(t);
        // At most WINDOW rows, none older than `max_age_s` (an overcast that thins must be
        // followed), but never fewer than `MIN_KEPT`.
        while self.rows.len() > Self::WINDOW
            || (self.rows.len() > Self::MIN_KEPT && self.times.front().map(|t0| (t - *t0).num_milliseconds() as f64 / 1000.0 > max_age_s).unwrap_or(false))
        {
            self.rows.pop_front();
            self.times.pop_front();
        }
    }

    /// The transmittances fitted to the window's rows, with the diffuse gain taking up a clear
    /// mean residual ([`Tuner::solve_with`]).
    #[cfg(test)]
    pub(super) fn solve(&self, prior: &IrradianceParams) -> Option<IrradianceParams> {
        self.solve_with(prior, true)
    }

    /// The transmittances fitted to the window's rows (Huber-weighted least squares with a prior);
    /// `None` with fewer than `prior.tune_min_rows` (at least 1; the ridge prior keeps the system
    /// well posed with any number of rows). `take_bias` false leaves out the diffuse gain's taking
    /// up of the window's mean residual (with two layers tracked, see
    /// [`super::forecast_stages::ForecastStage::tune`]).
    pub(super) fn solve_with(&self, prior: &IrradianceParams, take_bias: bool) -> Option<IrradianceParams> {
        let min_rows = prior.tune_min_rows.max(1);
        let early = prior.tune_before_min_rows && !self.rows.is_empty();
        if self.rows.len() < min_rows && !early {
            return None;
        }
        // Before `tune_min_rows` (with `tune_before_min_rows`) the prior weighs as much more as the
        // rows still missing would: each missing row adds its unknown's usual regressor size
        // squared to the prior's weight, and the mean-residual step below acts in the share of
        // rows held. From `tune_min_rows` on both are as without it.
        let missing = min_rows.saturating_sub(self.rows.len()) as f64;
        let held_share = (self.rows.len() as f64 / min_rows as f64).min(1.0);
        // Unknowns: beam_clear, beam_thin, beam_thick, beam_cloud_brightness, diffuse_per_cover.
        // Rows are scaled to W/m² of clear-sky GHI so every frame weighs alike.
        let p0 = [prior.beam_clear, prior.beam_thin, prior.beam_thick, prior.beam_cloud_brightness, prior.diffuse_per_cover];
        let n = self.rows.len() + TUNED;
        // Huber weights by iteratively reweighted least squares: rows whose reading the look-up
        // misplaces (a cloud edge a few cells off: the map says thick while the pyranometer is in
        // sun) are outliers that, unweighted, pulled the thick transmittance up and the clear one
        // down (0.2–0.3 and ~0.87 on the synthetic scenes), flattening every forecast ramp.
        let huber = prior.tune_robust_scale;
        let mut w = vec![1.0f64; self.rows.len()];
        let mut sol = nalgebra::DVector::<f64>::from_row_slice(&p0);
        for _ in 0..if huber > 0.0 { Self::IRLS_ITERATIONS } else { 1 } {
            let mut a = nalgebra::DMatrix::<f64>::zeros(n, TUNED);
            let mut b = nalgebra::DVector::<f64>::zeros(n);
            for (r, (x, y)) in self.rows.iter().enumerate() {
                let sw = w[r].sqrt();
                for c in 0..TUNED {
                    a[(r, c)] = sw * x[c];
                }
                b[r] = sw * *y;
            }
            for c in 0..TUNED {
                let r = self.rows.len() + c;
                let wc = Self::PRIOR_SCALE[c] * (Self::PRIOR_WEIGHT * Self::PRIOR_WEIGHT + missing).sqrt();
                a[(r, c)] = wc;
                b[r] = wc * p0[c];
            }
            sol = a.svd(true, true).solve(&b, 1e-12).ok()?;
            for (r, (x, y)) in self.rows.iter().enumerate() {
                let res = (y - (0..TUNED).map(|c| x[c] * sol[c]).sum::<f64>()).abs();
                w[r] = if res > huber { huber / res } else { 1.0 };
            }
        }
        // The robust fit follows the typical reading; under broken overcast the misplaced ones are
        // skewed (a sensor in a gap reads far above the fit, one under cloud a little below), so
        // the fit runs biased. The diffuse gain, which adds the same to every point, takes up the
        // window's mean residual, so the current state is unbiased over the window.
        if huber > 0.0 && take_bias {
            let (mut res, mut res2, mut cover) = (0.0, 0.0, 0.0);
            for (x, y) in &self.rows {
                let e = y - (0..TUNED).map(|c| x[c] * sol[c]).sum::<f64>();
                res += e;
                res2 += e * e;
                cover += x[TUNED - 1];
            }
            // Only a bias the window clearly shows (beyond 2 standard errors of its mean): all of
            // it, or with `tune_bias_soft` only the part beyond (soft thresholding).
            let n = self.rows.len() as f64;
            let se = ((res2 / n - (res / n).powi(2)).max(0.0) / n).sqrt();
            let beyond = (res / n).abs() - 2.0 * se;
            if cover > 0.05 * n && beyond > 0.0 {
                let step = if prior.tune_bias_soft { (res / n).signum() * beyond * n } else { res };
                sol[TUNED - 1] += held_share * step / cover;
            }
        }
        let mut p = *prior;
        p.beam_clear = sol[0].clamp(0.8, 1.25);
        p.beam_thin = sol[1].clamp(0.05, 0.95);
        p.beam_thick = sol[2].clamp(0.0, 0.5);
        p.beam_cloud_brightness = sol[3].clamp(-3.0, 3.0);
        p.diffuse_per_cover = sol[4].clamp(0.0, 0.8);
        Some(p)
    }
}

/// Unknowns of the transmittance tuning: the four table coefficients and the diffuse gain.
pub(super) const TUNED: usize = 5;

#[cfg(test)]
mod tests {
    use super::*;

    /// Readings misplaced by the look-up (the map says thick cloud on the sun ray while the
    /// pyranometer is in sun) must not drag the tuned thick-cloud transmittance up: with Huber
    /// weights it stays near the truth, with plain least squares it does not.
    #[test]
    fn robust_tuning_resists_misplaced_readings() {
        let truth = [0.95, 0.45, 0.05, 0.0, 0.3];
        let prior = IrradianceParams { beam_clear: 1.0, beam_thin: 0.45, beam_thick: 0.03, diffuse_per_cover: 0.25, ..Default::default() };
        let mut t = Tuner::default();
        for i in 0..300 {
            let beam = 0.85;
            let cover = 0.2 + 0.4 * ((i * 7 % 11) as f64 / 10.0);
            // Class shares on the sun ray cycle through clear, thin and thick.
            let share = match i % 3 {
                0 => [1.0, 0.0, 0.0],
                1 => [0.0, 1.0, 0.0],
                _ => [0.0, 0.0, 1.0],
            };
            let x = [beam * share[0], beam * share[1], beam * share[2], 0.0, cover];
            let mut y: f64 = (0..TUNED).map(|c| x[c] * truth[c]).sum();
            // One thick reading in four is misplaced: the sensor is in sun.
            if i % 3 == 2 && i % 4 == 0 {
                y = beam * truth[0] + cover * truth[4];
            }
            t.push(DateTime::<Utc>::UNIX_EPOCH + chrono::Duration::seconds(i), x, y, 1e9);
        }
        let robust = t.solve(&IrradianceParams { tune_robust_scale: 0.05, ..prior }).unwrap();
        let plain = t.solve(&IrradianceParams { tune_robust_scale: 0.0, ..prior }).unwrap();
        assert!((robust.beam_thick - truth[2]).abs() < 0.03, "robust beam_thick {}", robust.beam_thick);
        assert!(plain.beam_thick > truth[2] + 0.1, "plain least squares should be pulled up: {}", plain.beam_thick);
        assert!((robust.beam_clear - truth[0]).abs() < 0.03, "robust beam_clear {}", robust.beam_clear);
    }

    /// Where darker cloud passes less light, the tuning learns the brightness coefficient from a
    /// window of readings, despite a prior of 0 (ridge shrinkage keeps it somewhat short).
    #[test]
    fn tuning_learns_the_brightness_coefficient() {
        let truth = [1.0, 0.4, 0.05, 1.5, 0.2];
        let mut t = Tuner::default();
        for i in 0..90 {
            let beam = 0.8;
            let thin = (i % 2) as f64;
            let bright = 0.12 * (((i * 5) % 7) as f64 / 3.0 - 1.0);
            let x = [beam * (1.0 - thin), beam * thin, 0.0, beam * thin * bright, 0.6];
            let y: f64 = (0..TUNED).map(|c| x[c] * truth[c]).sum();
            t.push(DateTime::<Utc>::UNIX_EPOCH + chrono::Duration::seconds(i * 10), x, y, 1e9);
        }
        let p = t.solve(&IrradianceParams::default()).unwrap();
        assert!((p.beam_cloud_brightness - truth[3]).abs() < 0.4, "beam_cloud_brightness {}", p.beam_cloud_brightness);
        assert!((p.beam_thin - truth[1]).abs() < 0.03, "beam_thin {}", p.beam_thin);
    }

    /// With `tune_bias_soft` the diffuse gain's bias step is continuous in the window's mean
    /// residual: readings just past two standard errors move the gain by little, where the hard
    /// step takes the whole mean residual. Arithmetic of the model, no source.
    #[test]
    fn the_soft_bias_step_grows_from_nothing() {
        // Most readings where the prior puts them, one in six above by `jump`: the robust fit
        // follows the typical reading and leaves the window a mean residual of `jump / 6`.
        let gain = |jump: f64, soft: bool| {
            let mut t = Tuner::default();
            for i in 0..60 {
                let x = [0.5, 0.0, 0.0, 0.0, 0.4];
                let y = 0.5 * 1.0 + 0.4 * 0.25 + if i % 6 == 0 { jump } else { 0.0 };
                t.push(DateTime::<Utc>::UNIX_EPOCH + chrono::Duration::seconds(i), x, y, 1e9);
            }
            t.solve(&IrradianceParams { tune_bias_soft: soft, ..Default::default() }).unwrap().diffuse_per_cover
        };
        let base = gain(0.0, false);
        let steps: Vec<(f64, f64)> = [0.05, 0.1, 0.2, 0.4, 0.8].iter().map(|j| (gain(*j, false) - base, gain(*j, true) - base)).collect();
        // Below the threshold neither takes a step (both move by the fit alone); just past it the
        // hard step takes all of the mean residual, the soft a small part; beyond, the soft step
        // grows with the evidence and never passes the hard.
        let fit = steps[0].0;
        assert!((steps[0].1 - fit).abs() < 1e-12, "{steps:?}");
        assert!(steps[1].0 - fit > 0.02 && steps[1].1 - fit < 0.25 * (steps[1].0 - fit), "{steps:?}");
        assert!(steps.windows(2).all(|w| w[1].1 > w[0].1 - 1e-12) && steps.iter().all(|(h, s)| *s <= *h + 1e-12), "{steps:?}");
        assert!(steps[4].1 > 0.1, "{steps:?}");
    }

    /// Without early tuning a solution waits for `tune_min_rows` rows; with 1 the first frame's readings (three rows)
    /// give one, and the mean-residual step sets its level (the readings agree, so their mean is
    /// beyond two standard errors of zero): arithmetic of the model, no source.
    #[test]
    fn the_first_readings_set_the_level_when_allowed() {
        let x = [0.0, 0.85, 0.0, 0.0, 1.0];
        let mut t = Tuner::default();
        for i in 0..3 {
            t.push(DateTime::<Utc>::UNIX_EPOCH + chrono::Duration::seconds(i), x, 0.8, 900.0);
        }
        assert!(t.solve(&IrradianceParams { tune_before_min_rows: false, ..Default::default() }).is_none(), "without early tuning it waits for 20 rows");
        let p = t.solve(&IrradianceParams { tune_min_rows: 1, tune_before_min_rows: false, ..Default::default() }).expect("a solution from three rows");
        let fit: f64 = x[1] * p.beam_thin + x[4] * p.diffuse_per_cover;
        assert!((fit - 0.8).abs() < 0.01, "{p:?}");
    }

    /// With `tune_before_min_rows` the first rows give a solution that moves toward them in
    /// proportion to the rows held (prior weighted up by the missing rows, mean-residual step
    /// scaled by the share held), and from `tune_min_rows` on the solution is the one without it:
    /// arithmetic of the model, no source.
    #[test]
    fn early_tuning_moves_with_the_rows_held_and_joins_the_plain_one() {
        let x = [0.0, 0.85, 0.0, 0.0, 1.0];
        let prior = IrradianceParams { tune_before_min_rows: true, ..Default::default() };
        let plain = IrradianceParams { tune_before_min_rows: false, ..Default::default() };
        let level = |p: &IrradianceParams| x[1] * p.beam_thin + x[4] * p.diffuse_per_cover;
        let prior_level = level(&prior);
        let mut t = Tuner::default();
        let mut gaps = vec![];
        for i in 0..20 {
            t.push(DateTime::<Utc>::UNIX_EPOCH + chrono::Duration::seconds(i), x, 1.0, 900.0);
            let p = t.solve(&prior).expect("a solution from the first row");
            gaps.push((level(&p) - 1.0).abs());
            if t.len() < 20 {
                assert!(t.solve(&plain).is_none());
            }
        }
        assert!((prior_level - 1.0).abs() > 0.2, "the test needs a prior far from the readings: {prior_level}");
        assert!(gaps[0] > 0.5 * (prior_level - 1.0).abs(), "one row moves the level only part of the way: {gaps:?}");
        assert!(gaps.windows(2).all(|w| w[1] <= w[0] + 1e-9), "each row brings the level nearer: {gaps:?}");
        let (a, b) = (t.solve(&prior).unwrap(), t.solve(&plain).unwrap());
        assert!((a.beam_thin - b.beam_thin).abs() < 1e-9 && (a.diffuse_per_cover - b.diffuse_per_cover).abs() < 1e-9, "{a:?} {b:?}");
    }
}
