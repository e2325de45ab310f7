//! Combination of the camera's forecast with smart persistence of the plant's pyranometers.
//!
//! Where the camera reads the sky poorly (a veil over the sun, an overcast whose optical depth the
//! three cloud classes cannot follow, a plant whose sun ray runs near the horizon), its forecast
//! can be worse than persistence at short horizons. Each horizon keeps an exponentially weighted
//! mean squared error of both, verified against the pyranometer mean once the target's
//! averaging period has been measured, and the two are combined with inverse-MSE weights
//! (Bates & Granger 1969), `w_camera = MSE_persistence / (MSE_camera + MSE_persistence)`, where
//! persistence has been the better of the two (elsewhere the camera keeps its forecast). Smart
//! persistence keeps the newest completed reading's clear-sky index.
//!
//! The combined plant GHI sets a factor (combined / camera) applied alike to that horizon's
//! GHI, DNI, DHI, plane-of-array irradiance, power and bands of every block: the combination
//! knows the plant's total, not how it splits.
//!
//! # References
//! * J. M. Bates, C. W. J. Granger, "The combination of forecasts", *Operational Research
//!   Quarterly* 20(4):451–468, 1969.

use std::collections::{BTreeMap, VecDeque};

use chrono::{DateTime, Utc};

use super::Forecast;

/// Verifications of a horizon needed before its weights leave all to the camera.
pub const MIN_VERIFIED: usize = 10;

/// Issued pairs kept awaiting their measurement at most.
const MAX_PENDING: usize = 20_000;

/// The per-horizon error record and the pairs awaiting verification.
#[derive(Debug, Clone, Default)]
pub struct PersistenceBlend {
    /// Per horizon \[s\]: weighted MSE of the camera and of persistence, and verifications.
    mse: BTreeMap<u32, (f64, f64, usize)>,
    /// (target time, horizon, camera GHI, persistence GHI) at the pyranometers.
    pending: VecDeque<(DateTime<Utc>, u32, f64, f64)>,
}

impl PersistenceBlend {
    /// Verify the pending pairs: `measured(t)` is `None` while the period holding `t` has not been
    /// measured, `Some(None)` when it never will be, else the pyranometer mean.
    pub fn verify(&mut self, rate: f64, mut measured: impl FnMut(&DateTime<Utc>) -> Option<Option<f64>>) {
        let mse = &mut self.mse;
        self.pending.retain(|&(t, h, cam, sp)| match measured(&t) {
            None => true,
            Some(None) => false,
            Some(Some(y)) => {
                let e = mse.entry(h).or_insert(((cam - y).powi(2), (sp - y).powi(2), 0));
                e.0 += rate * ((cam - y).powi(2) - e.0);
                e.1 += rate * ((sp - y).powi(2) - e.1);
                e.2 += 1;
                false
            }
        });
    }

    /// Keep an issued pair for verification.
    pub fn push(&mut self, target: DateTime<Utc>, horizon_s: u32, camera_ghi_wm2: f64, persistence_ghi_wm2: f64) {
        if camera_ghi_wm2.is_finite() && persistence_ghi_wm2.is_finite() {
            self.pending.push_back((target, horizon_s, camera_ghi_wm2, persistence_ghi_wm2));
            while self.pending.len() > MAX_PENDING {
                self.pending.pop_front();
            }
        }
    }

    /// The camera's weight at a horizon (1 until [`MIN_VERIFIED`] verifications).
    pub fn camera_weight(&self, horizon_s: u32) -> f64 {
        match self.mse.get(&horizon_s) {
            // Only where persistence has been the better forecast: the verification compares
            // with means over the pyranometers' averaging period, which favour persistence (itself
            // such a mean) over a sharp forecast, so where the camera wins it keeps its forecast.
            Some(&(c, p, n)) if n >= MIN_VERIFIED && p < c => p / (c + p),
            _ => 1.0,
        }
    }

    /// Combine a forecast (its rows and their bands) with persistence of clear-sky index `kstar`.
    pub fn apply(&self, forecast: &mut Forecast, kstar: f64) {
        // The factor per horizon, from the plant row.
        let mut factor: BTreeMap<u32, f64> = BTreeMap::new();
        for r in &forecast.plant {
            let w = self.camera_weight(r.horizon_s);
            if w < 1.0 && r.irradiance.ghi_wm2 > 1.0 {
                let combined = w * r.irradiance.ghi_wm2 + (1.0 - w) * kstar * r.ghi_clear_wm2;
                factor.insert(r.horizon_s, (combined / r.irradiance.ghi_wm2).clamp(0.0, 5.0));
            }
        }
        for r in forecast.rows_mut() {
            let Some(&f) = factor.get(&r.horizon_s) else { continue };
            r.irradiance.ghi_wm2 *= f;
            r.irradiance.dni_wm2 *= f;
            r.irradiance.dhi_wm2 *= f;
            r.poa_wm2 *= f;
            r.power_kw *= f;
            if let Some(b) = &mut r.band {
                for q in b.ghi_wm2.iter_mut().chain(b.power_kw.iter_mut()) {
                    *q *= f;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weights_follow_the_smaller_error() {
        let mut b = PersistenceBlend::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        for k in 0..40 {
            let t = t0 + chrono::Duration::seconds(60 * k);
            // The camera is off by 200, persistence by 100.
            b.push(t, 60, 700.0, 400.0);
            b.verify(0.1, |_| Some(Some(500.0)));
        }
        // Inverse-MSE weight: 100² / (200² + 100²) = 0.2.
        assert!((b.camera_weight(60) - 0.2).abs() < 1e-9, "{}", b.camera_weight(60));
        assert_eq!(b.camera_weight(120), 1.0);
        // Where the camera is the better one it keeps its forecast.
        let mut c = PersistenceBlend::default();
        for k in 0..40 {
            c.push(t0 + chrono::Duration::seconds(60 * k), 60, 550.0, 300.0);
            c.verify(0.1, |_| Some(Some(500.0)));
        }
        assert_eq!(c.camera_weight(60), 1.0);
    }

    #[test]
    fn too_few_verifications_leave_the_camera_alone() {
        let mut b = PersistenceBlend::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        for k in 0..(MIN_VERIFIED as i64 - 1) {
            b.push(t0 + chrono::Duration::seconds(k), 60, 700.0, 500.0);
        }
        b.verify(0.1, |_| Some(Some(500.0)));
        assert_eq!(b.camera_weight(60), 1.0);
    }
}
