//! The synthetic world: cloud layers with known optical depth, wind and base height, and the
//! irradiance they let through at any ground point.
//!
//! # Cloud field
//! Each layer's field is `n(x, t) = cos α(t) · n₁(x − v t) + sin α(t) · n₂(x − v t)`: two independent
//! fBm fields moved by the layer's wind `v` and slowly blended (α grows by one radian per
//! `evolution_min`), so frozen advection is good but not perfect. Cloud is where `n` exceeds the
//! threshold for the requested cover (the cover's quantile of `n`, which may change linearly over the
//! scene: growth or decay). Vertical optical depth inside cloud:
//! `τ = τ_max (1 − exp(−(n − threshold) / s))`, `s` 0.6 of the field's standard deviation, so
//! edges are thin and cores thick.
//!
//! # Irradiance at a ground point
//! * Beam (Beer–Lambert): `DNI = DNI_clear · exp(−τ_sun · m)`, with `τ_sun` the summed vertical optical
//!   depth where the ray from the point to the sun crosses each layer and `m = 1 / cos z` the slant
//!   factor of a plane-parallel layer.
//! * Diffuse: over the sky seen from the plant (zenith < 70°, cosine-weighted samples) the cloudy share
//!   `c` and mean cloud optical depth `τ̄` give the light a cloud layer lets through by multiple
//!   scattering, `T = 1 / (1 + 0.75 (1 − g) τ̄)` with asymmetry `g = 0.85` (two-stream total
//!   transmittance of a conservative scattering layer; C. F. Bohren, "Multiple scattering of light and
//!   some of its observable consequences", *Am. J. Phys.* 55:524, 1987). Its diffuse part,
//!   `D = max(0, T · GHI_clear − exp(−τ̄ m) · DNI_clear cos z)`, is added in proportion to the cover:
//!   `DHI = DHI_clear + c · D`. Diffuse thus rises with cloud cover, and a sunlit point under a broken
//!   sky gets more than the clear-sky GHI (cloud enhancement).
//! * `GHI = DNI cos z + DHI`. Under a cloud-free sky all three equal the clear-sky values exactly.

use chrono::{DateTime, Duration, Utc};
use serde::{Deserialize, Serialize};

use super::noise::{Fbm, hash64};
use crate::clearsky::{ClearSkyModel, Irradiance, clear_sky};
use crate::sun::{Observer, SunPosition, position};

/// One cloud layer as specified.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LayerSpec {
    /// Cloud base height above ground \[m\].
    pub base_height_m: f64,
    /// Wind speed \[m/s\].
    pub wind_speed_mps: f64,
    /// Direction the clouds move toward, clockwise from north \[°\].
    pub wind_toward_deg: f64,
    /// Cloud cover at the start (0–1).
    pub cover_start: f64,
    /// Cloud cover at the end (0–1).
    pub cover_end: f64,
    /// Largest vertical optical depth.
    pub tau_max: f64,
    /// Wavelength of the largest cloud structures \[m\].
    pub wavelength_m: f64,
    /// Time for the field to decorrelate by one radian of blending \[min\].
    pub evolution_min: f64,
}

impl LayerSpec {
    /// Wind as (east, north) \[m/s\].
    pub fn wind_enu(&self) -> [f64; 2] {
        let a = self.wind_toward_deg.to_radians();
        [self.wind_speed_mps * a.sin(), self.wind_speed_mps * a.cos()]
    }
}

/// Vertical optical depth below which a column counts as clear.
pub const TAU_CLEAR_MAX: f64 = 0.4;
/// Slant optical depth from which cloud counts as thick (below: thin, the sky still shows through:
/// opacity `1 − exp(−0.7 τ)` below 75 %).
pub const TAU_THIN_MAX: f64 = 2.0;

/// A layer ready to evaluate.
#[derive(Debug, Clone)]
pub struct Layer {
    /// The spec.
    pub spec: LayerSpec,
    f1: Fbm,
    f2: Fbm,
    wind: [f64; 2],
    /// Sorted samples of the field value, for cover quantiles.
    quantiles: Vec<f64>,
    softness: f64,
    duration_s: f64,
    /// Extra round clouds ("puffs") carried by the layer's wind: (east, north) centre at the scene
    /// start \[m\], radius \[m\], vertical optical depth. Used by geometry checks.
    pub puffs: Vec<([f64; 2], f64, f64)>,
}

impl Layer {
    /// Build a layer; `duration_s` is the span over which cover goes from start to end.
    pub fn new(spec: LayerSpec, seed: u64, duration_s: f64) -> Layer {
        let f1 = Fbm { seed: hash64(seed), wavelength_m: spec.wavelength_m, octaves: 5, gain: 0.5 };
        let f2 = Fbm { seed: hash64(seed ^ 0xABCD_EF01), ..f1 };
        // Field statistics from 40 000 points spread over 100 wavelengths.
        let n = 40_000u64;
        let span = 100.0 * spec.wavelength_m;
        let mut q: Vec<f64> = (0..n)
            .map(|i| {
                let x = super::noise::unit(hash64(seed ^ (2 * i + 1))) * span;
                let y = super::noise::unit(hash64(seed ^ (2 * i + 2) ^ 0x5555)) * span;
                f1.at(x, y)
            })
            .collect();
        q.sort_by(f64::total_cmp);
        let mean = q.iter().sum::<f64>() / n as f64;
        let sd = (q.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n as f64).sqrt();
        let wind = spec.wind_enu();
        Layer { spec, f1, f2, wind, quantiles: q, softness: 0.6 * sd, duration_s: duration_s.max(1.0), puffs: vec![] }
    }

    /// Field threshold for a cover fraction.
    pub fn threshold_for_cover(&self, cover: f64) -> f64 {
        let c = cover.clamp(0.0, 1.0);
        let n = self.quantiles.len();
        let idx = ((1.0 - c) * (n - 1) as f64).round() as usize;
        if c <= 0.0 { f64::INFINITY } else if c >= 1.0 { f64::NEG_INFINITY } else { self.quantiles[idx.min(n - 1)] }
    }

    /// Requested cover at `t_s` seconds from the scene start.
    pub fn cover_at(&self, t_s: f64) -> f64 {
        let w = (t_s / self.duration_s).clamp(0.0, 1.0);
        self.spec.cover_start * (1.0 - w) + self.spec.cover_end * w
    }

    /// Field value at cloud-plane point (east, north) \[m\] at `t_s` seconds from the scene start.
    #[inline]
    pub fn field(&self, x_m: f64, y_m: f64, t_s: f64) -> f64 {
        self.field_lod(x_m, y_m, t_s, 0.0)
    }

    /// [`Layer::field`] averaged over a footprint \[m\] (see [`Fbm::at_lod`]).
    #[inline]
    pub fn field_lod(&self, x_m: f64, y_m: f64, t_s: f64, footprint_m: f64) -> f64 {
        let (xs, ys) = (x_m - self.wind[0] * t_s, y_m - self.wind[1] * t_s);
        let a = t_s / 60.0 / self.spec.evolution_min;
        let (s, c) = a.sin_cos();
        c * self.f1.at_lod(xs, ys, footprint_m) + s * self.f2.at_lod(xs, ys, footprint_m)
    }

    /// Vertical optical depth at a cloud-plane point, for a given threshold.
    #[inline]
    pub fn tau_with(&self, x_m: f64, y_m: f64, t_s: f64, threshold: f64) -> f64 {
        self.tau_lod(x_m, y_m, t_s, threshold, 0.0)
    }

    /// [`Layer::tau_with`] averaged over a footprint \[m\].
    #[inline]
    pub fn tau_lod(&self, x_m: f64, y_m: f64, t_s: f64, threshold: f64, footprint_m: f64) -> f64 {
        let mut tau = 0.0;
        for (c, r, t) in &self.puffs {
            let (dx, dy) = (x_m - c[0] - self.wind[0] * t_s, y_m - c[1] - self.wind[1] * t_s);
            if dx * dx + dy * dy <= r * r {
                tau += t;
            }
        }
        if threshold.is_infinite() && threshold > 0.0 {
            return tau;
        }
        let n = self.field_lod(x_m, y_m, t_s, footprint_m);
        if n <= threshold { tau } else { tau + self.spec.tau_max * (1.0 - (-(n - threshold) / self.softness).exp()) }
    }
}

/// The world: layers, site and sun.
#[derive(Debug, Clone)]
pub struct World {
    /// Layers, lowest first.
    pub layers: Vec<Layer>,
    /// The site.
    pub observer: Observer,
    /// Clear-sky model.
    pub clear_model: ClearSkyModel,
    /// Site height \[m\].
    pub altitude_m: f64,
    /// Scene start.
    pub start: DateTime<Utc>,
    /// Where the diffuse sky view is taken (east, north) \[m\].
    pub diffuse_centre_m: [f64; 2],
}

/// The sky state at one time (per-layer thresholds and the sun), reused for many rays.
#[derive(Debug, Clone)]
pub struct Instant {
    /// Seconds from the scene start.
    pub t_s: f64,
    /// Sun position.
    pub sun: SunPosition,
    /// Clear-sky irradiance.
    pub clear: Irradiance,
    thresholds: Vec<f64>,
    /// Cloudy share of the sky view (for diffuse).
    pub sky_cover: f64,
    /// Mean optical depth of the cloudy part of the sky view.
    pub sky_tau: f64,
    /// Frozen advection: each layer's field is read as it was at `t_s`, carried this many seconds
    /// further by its wind (0 for the true sky; [`World::frozen_instant`]).
    pub advect_s: f64,
}

/// Two-stream asymmetry parameter of cloud droplets (Bohren 1987).
const ASYMMETRY_G: f64 = 0.85;

impl World {
    /// Build a world.
    pub fn new(
        specs: &[LayerSpec],
        seed: u64,
        observer: Observer,
        clear_model: ClearSkyModel,
        start: DateTime<Utc>,
        duration_s: f64,
    ) -> World {
        let mut layers: Vec<Layer> =
            specs.iter().enumerate().map(|(i, s)| Layer::new(s.clone(), hash64(seed.wrapping_add(i as u64 * 7919)), duration_s)).collect();
        layers.sort_by(|a, b| a.spec.base_height_m.total_cmp(&b.spec.base_height_m));
        World { layers, observer, clear_model, altitude_m: observer.elevation_m, start, diffuse_centre_m: [0.0, 0.0] }
    }

    /// Seconds from the scene start.
    pub fn t_s(&self, t: &DateTime<Utc>) -> f64 {
        (*t - self.start).num_milliseconds() as f64 / 1000.0
    }

    /// The sky state at a time.
    pub fn instant(&self, t: &DateTime<Utc>) -> Instant {
        let t_s = self.t_s(t);
        let sun = position(t, &self.observer).unwrap_or(SunPosition {
            zenith_rad: std::f64::consts::PI,
            apparent_zenith_rad: std::f64::consts::PI,
            azimuth_rad: 0.0,
            earth_sun_distance_au: 1.0,
        });
        let clear = clear_sky(&sun, self.altitude_m, self.clear_model);
        let thresholds = self.layers.iter().map(|l| l.threshold_for_cover(l.cover_at(t_s))).collect();
        let mut inst = Instant { t_s, sun, clear, thresholds, sky_cover: 0.0, sky_tau: 0.0, advect_s: 0.0 };
        let (c, tau) = self.sky_view(&inst, self.diffuse_centre_m);
        inst.sky_cover = c;
        inst.sky_tau = tau;
        inst
    }

    /// The sky of perfect perception and frozen advection: the cloud field exactly as it was at
    /// `issue` (cover and evolution included), each layer carried by its true wind to `valid`, under
    /// the sun and clear sky of `valid`. What a forecaster that saw the sky and its wind perfectly at
    /// the issue time, and assumed it does not change, would expect at `valid`: the yardstick a
    /// nowcast is measured against (`synth::yardstick`).
    pub fn frozen_instant(&self, issue: &DateTime<Utc>, valid: &DateTime<Utc>) -> Instant {
        let at_issue = self.instant(issue);
        let at_valid = self.instant(valid);
        let mut inst = Instant { advect_s: at_valid.t_s - at_issue.t_s, sun: at_valid.sun, clear: at_valid.clear, sky_cover: 0.0, sky_tau: 0.0, ..at_issue };
        let (c, tau) = self.sky_view(&inst, self.diffuse_centre_m);
        inst.sky_cover = c;
        inst.sky_tau = tau;
        inst
    }

    /// Summed vertical optical depth along a ray from ground point `p` (east, north, up) \[m\] in
    /// direction `d` (unit, ENU); zero for rays at or below the horizon.
    #[inline]
    pub fn tau_along(&self, inst: &Instant, p: [f64; 3], d: [f64; 3]) -> f64 {
        if d[2] <= 1e-3 {
            return 0.0;
        }
        let mut tau = 0.0;
        for (l, thr) in self.layers.iter().zip(&inst.thresholds) {
            let s = (l.spec.base_height_m - p[2]) / d[2];
            if s <= 0.0 {
                continue;
            }
            tau += l.tau_with(p[0] + s * d[0] - l.wind[0] * inst.advect_s, p[1] + s * d[1] - l.wind[1] * inst.advect_s, inst.t_s, *thr);
        }
        tau
    }

    /// Per-layer vertical optical depth along a ray (lowest layer first), averaged over the
    /// footprint of a pixel of angular size `pixel_rad`.
    pub fn taus_along(&self, inst: &Instant, p: [f64; 3], d: [f64; 3], pixel_rad: f64, out: &mut Vec<f64>) {
        out.clear();
        for (l, thr) in self.layers.iter().zip(&inst.thresholds) {
            let s = (l.spec.base_height_m - p[2]) / d[2].max(1e-3);
            let footprint = s * pixel_rad / d[2].max(1e-3).sqrt();
            out.push(if d[2] <= 1e-3 || s <= 0.0 {
                0.0
            } else {
                l.tau_lod(p[0] + s * d[0] - l.wind[0] * inst.advect_s, p[1] + s * d[1] - l.wind[1] * inst.advect_s, inst.t_s, *thr, footprint)
            });
        }
    }

    /// Cloudy share and mean cloud optical depth of the sky seen from a ground point (zenith < 70°,
    /// 96 cosine-weighted directions on a golden-angle spiral).
    pub fn sky_view(&self, inst: &Instant, p: [f64; 2]) -> (f64, f64) {
        let n = 96;
        let max_sin2 = 70f64.to_radians().sin().powi(2);
        let (mut cloudy, mut tau_sum) = (0usize, 0.0);
        for i in 0..n {
            // Cosine-weighted: sin² z uniform.
            let s2 = (i as f64 + 0.5) / n as f64 * max_sin2;
            let z = s2.sqrt().asin();
            let a = i as f64 * 2.399_963_229_728_653;
            let d = crate::sun::direction_enu(z, a);
            let tau = self.tau_along(inst, [p[0], p[1], 0.0], d);
            if tau > TAU_CLEAR_MAX {
                cloudy += 1;
                tau_sum += tau.min(80.0);
            }
        }
        let c = cloudy as f64 / n as f64;
        (c, if cloudy > 0 { tau_sum / cloudy as f64 } else { 0.0 })
    }

    /// Irradiance at a ground point (east, north) \[m\].
    pub fn irradiance_at(&self, inst: &Instant, p: [f64; 2]) -> Irradiance {
        let cz = inst.sun.apparent_zenith_rad.cos();
        if cz <= 0.0 || inst.clear.ghi_wm2 <= 0.0 {
            return Irradiance::default();
        }
        let m = 1.0 / cz.max(0.05);
        let d = inst.sun.direction_enu();
        let tau_sun = self.tau_along(inst, [p[0], p[1], 0.0], d);
        let dni = inst.clear.dni_wm2 * (-tau_sun * m).exp();
        let dhi = inst.clear.dhi_wm2 + inst.sky_cover * scattered_diffuse_wm2(inst.sky_tau, m, &inst.clear, cz);
        Irradiance { ghi_wm2: dni * cz + dhi, dni_wm2: dni, dhi_wm2: dhi }
    }

    /// Truth at a list of points and times.
    pub fn irradiance_series(&self, times: &[DateTime<Utc>], points: &[[f64; 2]]) -> Vec<Vec<Irradiance>> {
        use rayon::prelude::*;
        times
            .par_iter()
            .map(|t| {
                let inst = self.instant(t);
                points.iter().map(|p| self.irradiance_at(&inst, *p)).collect()
            })
            .collect()
    }

    /// Times from `start` every `step_s` for `count` steps.
    pub fn times(start: DateTime<Utc>, step_s: f64, count: usize) -> Vec<DateTime<Utc>> {
        (0..count).map(|i| start + Duration::milliseconds((i as f64 * step_s * 1000.0).round() as i64)).collect()
    }
}

/// Diffuse light scattered through cloud of mean optical depth `tau`, beyond what its beam keeps
/// \[W m⁻²\] (see the module docs).
pub fn scattered_diffuse_wm2(tau: f64, m: f64, clear: &Irradiance, cos_z: f64) -> f64 {
    if tau <= 0.0 {
        return 0.0;
    }
    let t_total = 1.0 / (1.0 + 0.75 * (1.0 - ASYMMETRY_G) * tau);
    (t_total * clear.ghi_wm2 - (-tau * m).exp() * clear.dni_wm2 * cos_z).max(0.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(cover: f64) -> LayerSpec {
        LayerSpec {
            base_height_m: 1500.0,
            wind_speed_mps: 10.0,
            wind_toward_deg: 60.0,
            cover_start: cover,
            cover_end: cover,
            tau_max: 30.0,
            wavelength_m: 1500.0,
            evolution_min: 40.0,
        }
    }

    #[test]
    fn field_moves_with_the_wind() {
        let l = Layer::new(spec(0.5), 3, 3600.0);
        let v = l.spec.wind_enu();
        // With no evolution (t small vs evolution time) the field at x + v t equals the field at x
        // at t = 0 up to the blend: compare with evolution switched off.
        let mut s = spec(0.5);
        s.evolution_min = 1e12;
        let l = Layer::new(s, 3, 3600.0);
        let t = 120.0;
        assert!((l.field(100.0 + v[0] * t, 200.0 + v[1] * t, t) - l.field(100.0, 200.0, 0.0)).abs() < 1e-9);
    }

    #[test]
    fn cover_matches_request() {
        for &c in &[0.1, 0.3, 0.5, 0.8] {
            let l = Layer::new(spec(c), 11, 3600.0);
            let thr = l.threshold_for_cover(c);
            let n = 20_000;
            let mut cloudy = 0;
            for i in 0..n {
                let x = super::super::noise::unit(hash64(i * 2 + 99)) * 300_000.0;
                let y = super::super::noise::unit(hash64(i * 2 + 100)) * 300_000.0;
                if l.field(x, y, 0.0) > thr {
                    cloudy += 1;
                }
            }
            let f = cloudy as f64 / n as f64;
            assert!((f - c).abs() < 0.02, "cover {c}: measured {f}");
        }
    }
}
