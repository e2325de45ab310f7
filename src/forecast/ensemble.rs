//! The ensemble: members drawn around the central forecast, and their P10 / P50 / P90 bands.

use super::{Forecast, ForecastInput, HorizonSky, TargetForecast, TransmittanceMap, block_planes, forecast_with_planes};

/// Uncertainty bands of one target and horizon.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Band {
    /// GHI P10, P50, P90 \[W m⁻²\].
    pub ghi_wm2: [f64; 3],
    /// Power P10, P50, P90 \[kW\].
    pub power_kw: [f64; 3],
}

/// Quantile of a sorted slice (linear interpolation).
pub fn quantile_sorted(v: &[f64], q: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    let x = q * (v.len() - 1) as f64;
    let (i, f) = (x.floor() as usize, x - x.floor());
    if i + 1 < v.len() { v[i] * (1.0 - f) + v[i + 1] * f } else { v[i] }
}

/// An ensemble: sharp members (no horizon blur) drawn around the central forecast by perturbing the
/// motion (by its uncertainty, at least `ensemble_motion_sigma_mps`), the cloud base height, the
/// beam transmittance and the cloud-scattered diffuse; deterministic for a given issue time. The
/// transmittance tables and horizon skies are the central forecast's.
pub fn ensemble_with(
    tms: &[TransmittanceMap],
    grid: crate::cloudmap::Grid,
    input: &ForecastInput,
    skies: &[HorizonSky],
    central: &Forecast,
) -> (Vec<Forecast>, Vec<Band>) {
    use crate::rng::{gaussian, hash64};
    let p = &input.params;
    let seed = input.issue.timestamp_millis() as u64;
    use rayon::prelude::*;
    // Under little cloud the beam is better known: the clear-sky and whole-beam spreads are full at
    // cloud cover `ensemble_full_spread_cover` and shrink in proportion below it, never below a
    // quarter (the clear-sky model itself is uncertain by a few per cent).
    // The blocks' planes against the sun at each horizon: the same for every member.
    let planes = block_planes(input.plant, skies);
    let cover_share = if p.ensemble_full_spread_cover > 0.0 { (input.cloud_fraction / p.ensemble_full_spread_cover).clamp(0.25, 1.0) } else { 1.0 };
    let members: Vec<Forecast> = (0..p.ensemble_members)
        .into_par_iter()
        .map(|m| {
            let g = |k: u64| gaussian(hash64(seed ^ (m as u64 * 97 + k)), hash64(seed.rotate_left(13) ^ (m as u64 * 89 + k)));
            let mut inp = input.clone();
            let cbh_g = g(3);
            for (l, ad) in inp.layers.iter_mut().enumerate() {
                let sigma = ad.sigma_mps.max(p.ensemble_motion_sigma_mps);
                let o = 10 * l as u64;
                ad.v_mps = [ad.v_mps[0] + sigma * g(1 + o), ad.v_mps[1] + sigma * g(2 + o)];
                // The first layer's base spreads around the central one (its estimate, see
                // `crate::cbh`); a second layer's log-normally by its own uncertainty (wide when
                // one camera cannot tell its height: `crate::cbh::UPPER_LAYER_PRIOR_REL_SIGMA`).
                ad.cbh_factor = if l == 0 { ad.cbh_factor * (1.0 + p.ensemble_cbh_rel_sigma * cbh_g).max(0.3) } else { ad.cbh_factor * (ad.cbh_log_sigma * g(9 + o)).exp() };
                // Members are sharp: their spread, not a blur, carries the uncertainty.
                ad.sigma_mps = 0.0;
            }
            // Per-class transmittances: clear sky varies little, thin and thick cloud a lot.
            let gb = g(4);
            inp.params.beam_clear = p.beam_clear * (1.0 + 0.1 * p.ensemble_beam_rel_sigma * cover_share * gb);
            inp.params.beam_thin = (p.beam_thin * (1.0 + p.ensemble_beam_rel_sigma * g(6))).clamp(0.0, 1.0);
            inp.params.beam_thick = (p.beam_thick * (1.0 + 2.0 * p.ensemble_beam_rel_sigma * g(7)).max(0.0)).min(0.6);
            // And the beam as a whole (aerosol, calibration, cloud optical depth): half the class
            // spread.
            inp.beam_scale = (1.0 + 0.5 * p.ensemble_beam_rel_sigma * cover_share * g(8)).max(0.0);
            inp.diffuse_scale = (1.0 + p.ensemble_diffuse_rel_sigma * g(5)).max(0.0);
            inp.point_stride = 3;
            inp.params.blur_growth_mps = 0.0;
            forecast_with_planes(tms, grid, &inp, skies, &planes)
        })
        .collect();
    // Row r's band from the r-th row of every member that has one: the members' rows are read in
    // step, into two buffers kept for all rows. (The order in which values enter does not
    // matter: sorted by `total_cmp`, equal values are the same bits.)
    let mut member_rows: Vec<_> = members.iter().map(|m| m.rows().map(|(_, x): (&str, &TargetForecast)| x)).collect();
    let (mut ghi, mut pw) = (Vec::with_capacity(members.len()), Vec::with_capacity(members.len()));
    let bands = (0..central.row_count())
        .map(|_| {
            ghi.clear();
            pw.clear();
            for x in member_rows.iter_mut().filter_map(Iterator::next) {
                ghi.push(x.irradiance.ghi_wm2);
                pw.push(x.power_kw);
            }
            ghi.sort_unstable_by(f64::total_cmp);
            pw.sort_unstable_by(f64::total_cmp);
            let q = |v: &[f64]| [quantile_sorted(v, 0.1), quantile_sorted(v, 0.5), quantile_sorted(v, 0.9)];
            Band { ghi_wm2: q(&ghi), power_kw: q(&pw) }
        })
        .collect();
    drop(member_rows);
    (members, bands)
}

/// Online calibration of the band widths per horizon against measurements: adaptive conformal
/// inference (I. Gibbs, E. Candès, "Adaptive conformal inference under distribution shift",
/// NeurIPS 2021) applied to a width scale. The ensemble also forecasts the mean GHI at the
/// pyranometers (the probes): each issued probe band is kept until its target time has been
/// measured; a miss (measurement outside P10–P90) widens that horizon's bands, a hit narrows them,
/// with the steady state at the nominal 20 % misses. The scale multiplies the distances of P10 and
/// P90 from P50, for every block and the plant, GHI and power alike (the error sources, motion and
/// transmittance, are shared; verifying the plant band against a few points would judge a mean by
/// points and widen it).
#[derive(Debug, Clone, Default)]
pub struct BandWidening {
    /// Width scale per horizon \[s\].
    scale: std::collections::BTreeMap<u32, f64>,
    /// Issued probe GHI bands awaiting their measurement: (target time, horizon, P10, P90).
    pending: std::collections::VecDeque<(chrono::DateTime<chrono::Utc>, u32, f64, f64)>,
    /// Bands verified so far.
    pub verified: usize,
}

impl BandWidening {
    /// Nominal share of measurements outside P10–P90.
    const NOMINAL_MISS: f64 = 0.2;
    /// Limits of the width scale.
    const SCALE_LIMITS: (f64, f64) = (0.5, 2.0);
    /// Bands kept awaiting their measurement at most.
    const MAX_PENDING: usize = 20_000;

    /// The width scale of a horizon (1 until calibrated).
    pub fn scale(&self, horizon_s: u32) -> f64 {
        self.scale.get(&horizon_s).copied().unwrap_or(1.0)
    }

    /// Verify pending bands whose target is measured: `measured(t)` gives `None` while the
    /// measurement at `t` is not complete yet, `Some(None)` when there will be none (a gap: the
    /// band is dropped), `Some(Some(ghi))` with the mean GHI the probes measured.
    pub fn verify(&mut self, rate: f64, mut measured: impl FnMut(&chrono::DateTime<chrono::Utc>) -> Option<Option<f64>>) {
        let (scale, verified) = (&mut self.scale, &mut self.verified);
        self.pending.retain(|&(t, h, lo, hi)| match measured(&t) {
            None => true,
            Some(None) => false,
            Some(Some(y)) => {
                let miss = if y < lo || y > hi { 1.0 } else { 0.0 };
                let k = scale.entry(h).or_insert(1.0);
                *k = (*k * (rate * (miss - Self::NOMINAL_MISS)).exp()).clamp(Self::SCALE_LIMITS.0, Self::SCALE_LIMITS.1);
                *verified += 1;
                false
            }
        });
    }

    /// Scale the bands of a forecast's rows and keep the probe bands (`probe_bands`: P10, P50, P90
    /// per horizon, in the forecast's horizon order) for verification.
    pub fn apply(&mut self, forecast: &mut Forecast, probe_bands: &[[f64; 3]]) {
        let scaled = |k: f64, q: &mut [f64; 3]| {
            let mid = q[1];
            q[0] = (mid - k * (mid - q[0])).max(0.0);
            q[2] = mid + k * (q[2] - mid);
        };
        for r in forecast.rows_mut() {
            let k = self.scale(r.horizon_s);
            let Some(b) = &mut r.band else { continue };
            scaled(k, &mut b.ghi_wm2);
            scaled(k, &mut b.power_kw);
        }
        let horizons = forecast.plant.iter();
        for (r, pb) in horizons.zip(probe_bands) {
            if self.pending.len() < Self::MAX_PENDING {
                let mut q = *pb;
                scaled(self.scale(r.horizon_s), &mut q);
                self.pending.push_back((r.time, r.horizon_s, q[0], q[2]));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::{Duration, TimeZone, Utc};

    #[test]
    fn band_scale_settles_where_a_fifth_of_measurements_fall_outside() {
        // Measurements spread evenly over ±100 around P50 = 500: a band of ±50 must widen until
        // it holds 80 % of them, i.e. to ±80 (scale 1.6), and one of ±100 narrow to ±80 (0.8).
        for half in [50.0, 100.0] {
            let mut c = BandWidening::default();
            let t0 = Utc.with_ymd_and_hms(2026, 6, 14, 9, 0, 0).unwrap();
            for i in 0..4000 {
                let t = t0 + Duration::seconds(i);
                let mut fc = Forecast { plant: vec![super::super::row(300, t, &[0.0; 6], 1000.0)], blocks: vec![], probes_ghi_wm2: vec![500.0] };
                let band = [500.0 - half, 500.0, 500.0 + half];
                fc.set_bands(vec![Band { ghi_wm2: band, power_kw: [0.0; 3] }]);
                c.apply(&mut fc, &[band]);
                // A deterministic, evenly spread sequence in [−100, 100).
                let y = 500.0 + ((i as f64 * 0.618_034) % 1.0) * 200.0 - 100.0;
                c.verify(0.05, |tt| (*tt == t).then_some(Some(y)));
            }
            assert_eq!(c.verified, 4000);
            let k = c.scale(300);
            let expect = 80.0 / half;
            assert!((k - expect).abs() < 0.1 * expect, "half-width {half}: scale {k}, expected about {expect}");
        }
    }
}
