//! The ensemble: members drawn around the central forecast, and their P10 / P50 / P90 bands.

use super::{Forecast, ForecastInput, HorizonSky, TransmittanceMap, forecast_with};

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
    use crate::synth::noise::{gaussian, hash64};
    let p = &input.params;
    let seed = input.issue.timestamp_millis() as u64;
    use rayon::prelude::*;
    // Under little cloud the beam is better known: the clear-sky and whole-beam spreads are full at
    // cloud cover `ensemble_full_spread_cover` and shrink in proportion below it, never below a
    // quarter (the clear-sky model itself is uncertain by a few per cent).
    let cover_share = if p.ensemble_full_spread_cover > 0.0 { (input.cloud_fraction / p.ensemble_full_spread_cover).clamp(0.25, 1.0) } else { 1.0 };
    let members: Vec<Forecast> = (0..p.ensemble_members)
        .into_par_iter()
        .map(|m| {
            let g = |k: u64| gaussian(hash64(seed ^ (m as u64 * 97 + k)), hash64(seed.rotate_left(13) ^ (m as u64 * 89 + k)));
            let mut inp = input.clone();
            for (l, ad) in inp.layers.iter_mut().enumerate() {
                let sigma = ad.sigma_mps.max(p.ensemble_motion_sigma_mps);
                let o = 10 * l as u64;
                ad.v_mps = [ad.v_mps[0] + sigma * g(1 + o), ad.v_mps[1] + sigma * g(2 + o)];
                // Members are sharp: their spread, not a blur, carries the uncertainty.
                ad.sigma_mps = 0.0;
            }
            inp.cbh_m = input.cbh_m * (1.0 + p.ensemble_cbh_rel_sigma * g(3)).max(0.3);
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
            forecast_with(tms, grid, &inp, skies)
        })
        .collect();
    let bands = (0..central.rows.len())
        .map(|r| {
            let mut ghi: Vec<f64> = members.iter().filter_map(|m| m.rows.get(r)).map(|x| x.irradiance.ghi_wm2).collect();
            let mut pw: Vec<f64> = members.iter().filter_map(|m| m.rows.get(r)).map(|x| x.power_kw).collect();
            ghi.sort_by(f64::total_cmp);
            pw.sort_by(f64::total_cmp);
            let q = |v: &[f64]| [quantile_sorted(v, 0.1), quantile_sorted(v, 0.5), quantile_sorted(v, 0.9)];
            Band { ghi_wm2: q(&ghi), power_kw: q(&pw) }
        })
        .collect();
    (members, bands)
}
