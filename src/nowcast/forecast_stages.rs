//! The forecast stage (the transmittances in use, tuned from the pyranometers, and the forecast's
//! inputs) and the ensemble stage (members and bands, band widening, combination with smart
//! persistence of the pyranometers), each owning its state.

use chrono::{DateTime, Utc};

use super::Pyranometers;
use super::tuner::Tuner;
use crate::cloudmap::{CloudMap, Grid};
use crate::config::Site;
use crate::forecast::{Advection, BandWidening, Forecast, ForecastInput, HorizonSky, IrradianceParams, PersistenceBlend, TransmittanceMap, ensemble_with, quantile_sorted, sun_ray_plane_point};
use crate::motion::TrackedLayer;
use crate::plant::Plant;
use crate::segment::Class;
use crate::sun::{SunPosition, position};

/// What the forecast and ensemble stages read of the engine: the site, its plant and the
/// pyranometers' readings with their columns.
#[derive(Clone, Copy)]
pub(super) struct SiteInputs<'a> {
    pub(super) site: &'a Site,
    pub(super) plant: &'a Plant,
    pub(super) pyranometers: Option<&'a Pyranometers>,
    /// The whole measurements file, for its weather columns (read with or without pyranometers).
    pub(super) measurements: Option<&'a crate::io::Measurements>,
}

impl SiteInputs<'_> {
    /// A weather value from the measurements CSV at a time (column `temp_air_c` or `wind_speed_mps`).
    fn weather(&self, t: &DateTime<Utc>, column: &str) -> Option<f64> {
        let m = self.measurements?;
        let v = m.at(m.column(column)?, t);
        v.is_finite().then_some(v)
    }


    /// Horizons \[s\] from the site's forecast settings.
    pub(super) fn horizons_s(&self) -> Vec<u32> {
        let f = &self.site.file.forecast;
        (0..=f.horizon_min * 60).step_by(f.step_s as usize).collect()
    }
}

/// The forecast stage: the transmittances in use (the site's, then as tuned) and their tuner.
pub(super) struct ForecastStage {
    irradiance: IrradianceParams,
    tuner: Tuner,
    /// The tuning's prior: the configured transmittances, the thin-cloud beam scaled by how often
    /// thin cloud around the sun let its disk show ([`crate::sundisk::ThinCloudVisibility`]).
    prior: IrradianceParams,
    thin_visibility: crate::sundisk::ThinCloudVisibility,
    /// The clear sun's glare, for the beam along the camera's sun line
    /// ([`IrradianceParams::sun_line_beam`]).
    pub(super) sun_line: crate::sundisk::SunLineBeam,
    /// Whether the tuning has given a solution since the start (or the last reset).
    tuned: bool,
}

impl ForecastStage {
    /// Start from the site's configured transmittances.
    pub(super) fn new(configured: IrradianceParams) -> ForecastStage {
        ForecastStage { irradiance: configured, tuner: Tuner::default(), prior: configured, thin_visibility: Default::default(), sun_line: Default::default(), tuned: false }
    }

    /// The transmittances in use.
    pub(super) fn params(&self) -> &IrradianceParams {
        &self.irradiance
    }

    /// Pyranometer readings the tuning holds.
    pub(super) fn tuning_rows(&self) -> usize {
        self.tuner.len()
    }

    /// Record what the sun's disk showed through the cloud around it ([`crate::sundisk`]) and set
    /// the thin-cloud beam transmittance of the prior (and, until the tuning has a solution, of the
    /// transmittances in use) from `configured` and the record.
    pub(super) fn observe_sun(&mut self, configured: &IrradianceParams, seen: Option<crate::sundisk::SunThroughCloud>) {
        if !configured.beam_thin_from_sun_disk {
            return;
        }
        if let Some(o) = seen {
            self.thin_visibility.observe(o);
        }
        self.prior.beam_thin = configured.beam_thin * self.thin_visibility.beam_factor();
        if !self.tuned {
            self.irradiance.beam_thin = self.prior.beam_thin;
        }
    }

    /// Forget what the tuning learnt and go back to `configured`; returns whether anything was
    /// forgotten.
    pub(super) fn reset(&mut self, configured: IrradianceParams) -> bool {
        let tuned = !self.tuner.is_empty();
        self.tuner = Tuner::default();
        self.irradiance = configured;
        self.prior = configured;
        self.thin_visibility = Default::default();
        self.sun_line = Default::default();
        self.tuned = false;
        tuned
    }

    /// The forecast's inputs at a frame: the tracked layers' advection (or a still sky with a wide
    /// speed spread when nothing is tracked yet), the cover, the weather and the probe points.
    /// `cbh_factor` scales the first layer's look-ups from the map's plane to the combined cloud
    /// base height; `cbh_rel_sigma` is that height's relative uncertainty, which widens the
    /// ensemble's spread of the base when it exceeds the configured one. `upper` is the second
    /// layer's (factor, sigma of `ln h`) ([`crate::cbh::CbhState::upper`]).
    pub(super) fn input<'a>(&self, cx: SiteInputs<'a>, t: &DateTime<Utc>, (cbh, cbh_factor, cbh_rel_sigma): (f64, f64, f64), upper: (f64, f64), layers: &[TrackedLayer], [cf, thin_cf]: [f64; 2]) -> ForecastInput<'a> {
        let mut params = self.irradiance;
        params.ensemble_cbh_rel_sigma = params.ensemble_cbh_rel_sigma.max(cbh_rel_sigma);
        ForecastInput {
            issue: *t,
            observer: cx.site.observer(),
            clear_model: cx.site.clear_sky_model(),
            altitude_m: cx.site.file.site.elevation_m,
            camera_m: cx.site.file.camera.position_m,
            cbh_m: cbh,
            layers: if layers.is_empty() {
                vec![Advection { v_mps: [0.0, 0.0], sigma_mps: crate::motion::UNKNOWN_MOTION_SIGMA_MPS, cbh_factor, cbh_log_sigma: cbh_rel_sigma }]
            } else {
                let base = |i: usize| if i == 0 { (cbh_factor, cbh_rel_sigma) } else { upper };
                layers.iter().enumerate().map(|(i, l)| Advection { v_mps: l.motion.v_mps, sigma_mps: l.motion.sigma_mps, cbh_factor: base(i).0, cbh_log_sigma: base(i).1 }).collect()
            },
            cloud_fraction: if cf.is_nan() { 0.0 } else { cf },
            thin_fraction: if thin_cf.is_nan() { 0.0 } else { thin_cf },
            horizons_s: cx.horizons_s(),
            plant: cx.plant,
            params,
            power: cx.site.file.power,
            temp_air_c: cx.weather(t, "temp_air_c").unwrap_or(cx.site.file.power.default_temp_air_c),
            wind_mps: cx.weather(t, "wind_speed_mps").unwrap_or(cx.site.file.power.default_wind_speed_mps),
            beam_scale: 1.0,
            diffuse_scale: 1.0,
            point_stride: 1,
            // The pyranometers, when the bands are calibrated against them.
            probes_m: match cx.pyranometers {
                Some((_, cols)) if (self.irradiance.band_calibration_rate > 0.0 && self.irradiance.ensemble_members > 0) || self.irradiance.persistence_blend_rate > 0.0 => {
                    cols.iter().map(|c| c.1).collect()
                }
                _ => vec![],
            },
        }
    }

    /// Tune the transmittances from the pyranometers (when `tune_from_measurements`); `[cf,
    /// thin_cf]` is the frame's cover, from which [`IrradianceParams::diffuse_cover`] is taken.
    ///
    /// Each pyranometer's newest completed reading is paired with the map where the cloud that
    /// shaded it then has moved to now (its sun-ray point advected by `v_mps` over the time since
    /// the middle of the reading's period): a reading is never used before its period has ended.
    ///
    /// With two layers tracked the brightness feature is left out (its regressor is 0), as in the
    /// forecast ([`crate::forecast::forecast_with`]).
    #[allow(clippy::too_many_arguments)]
    pub(super) fn tune(&mut self, cx: SiteInputs, t: &DateTime<Utc>, sun: &SunPosition, map: &CloudMap, [cf, thin_cf]: [f64; 2], (cbh, cbh_factor): (f64, f64), v_mps: Option<[f64; 2]>, two_layers: bool) {
        if !self.irradiance.tune_from_measurements {
            return;
        }
        let diffuse_cover = self.irradiance.diffuse_cover(cf, thin_cf);
        let Some((m, cols)) = cx.pyranometers else { return };
        let clear = crate::clearsky::clear_sky(sun, cx.site.file.site.elevation_m, cx.site.clear_sky_model());
        let cz = sun.apparent_zenith_rad.cos();
        if clear.ghi_wm2 < 50.0 || cz <= 0.05 {
            return;
        }
        let r = (self.irradiance.blur_min_m / cbh_factor.max(0.1) / map.grid.cell_m).max(0.5);
        let continuous = self.irradiance.thin_beam_from_score;
        let class_beams = [self.irradiance.beam_clear, self.irradiance.beam_thin, self.irradiance.beam_thick];
        let mut rows = vec![];
        for (col, pos) in cols {
            let Some((y, mid)) = m.completed_at(*col, t) else { continue };
            let lag_s = (*t - mid).num_milliseconds() as f64 / 1000.0;
            // Readings outside the BSRN physically-possible or extremely-rare GHI limits are not
            // learnt from.
            let bad = crate::qc::FLAG_GHI_PHYSICAL | crate::qc::FLAG_GHI_RARE;
            if !y.is_finite() || crate::qc::bsrn_flags_partial(y, None, None, sun.zenith_rad, sun.earth_sun_distance_au) & bad != 0 {
                continue;
            }
            // Nor stuck readings (gaps give NaN above).
            if m.stuck_at(*col, &mid, crate::qc::STUCK_RUN) {
                continue;
            }
            // At a base `cbh_factor` times the map's, the pyranometer looks up the map nearer the camera.
            let (inv_f, cam) = (1.0 / cbh_factor.max(0.1), cx.site.file.camera.position_m);
            let q = sun_ray_plane_point([pos[0] * inv_f, pos[1] * inv_f], cbh, [cam[0] * inv_f, cam[1] * inv_f, cam[2]], sun.apparent_zenith_rad, sun.azimuth_rad);
            let v = v_mps.unwrap_or([0.0, 0.0]);
            let (cx, cy) = map.grid.to_cell([q[0] + v[0] * lag_s, q[1] + v[1] * lag_s]);
            // Class shares and the brightness feature in the look-up box, counted on the map as seen
            // (unknown cells left out), not read from the forecast's tables (`box_shares`), which
            // hold the map with its unknown cells filled from their neighbours: the tuning learns
            // only from what the camera saw.
            let mut share = [0f64; 4];
            let mut k = 0.0;
            let n = map.grid.n as i64;
            for j in (cy - r).round() as i64..=(cy + r).round() as i64 {
                for i in (cx - r).round() as i64..=(cx + r).round() as i64 {
                    if i < 0 || j < 0 || i >= n || j >= n {
                        continue;
                    }
                    let c = (j * n + i) as usize;
                    let class = Class::from_u8(map.class[c]);
                    if class == Class::Unknown {
                        continue;
                    }
                    let cs = CloudMap::continuous_shares(class, if continuous { map.thin_depth(c) } else { 0.5 }, class_beams);
                    for (s, v) in share.iter_mut().zip(cs) {
                        *s += v as f64;
                    }
                    share[3] += map.brightness_feature(c) as f64;
                    k += 1.0;
                }
            }
            if k == 0.0 {
                continue;
            }
            let beam = clear.dni_wm2 * cz / clear.ghi_wm2;
            let bright = if two_layers { 0.0 } else { beam * share[3] / k };
            let x = [beam * share[0] / k, beam * share[1] / k, beam * share[2] / k, bright, if diffuse_cover.is_nan() { 0.0 } else { diffuse_cover }];
            rows.push((x, (y - clear.dhi_wm2) / clear.ghi_wm2));
        }
        let max_age_s = cx.site.file.irradiance.tune_window_s;
        for (x, y) in rows {
            self.tuner.push(*t, x, y, max_age_s);
        }
        // With two layers and `tune_bias_with_two_layers` off the window's mean residual is left
        // alone: the current state's bias at the pyranometers (their look-ups at lead 0 lie near
        // the camera's sun direction) is not the forecast's at 5–15 min, where the look-ups have
        // left that region (docs/checks.md, "Two layers through each other").
        let take_bias = !two_layers || self.prior.tune_bias_with_two_layers;
        if let Some(p) = self.tuner.solve_with(&self.prior, take_bias) {
            self.irradiance = p;
            self.tuned = true;
        }
    }
}

/// The ensemble stage: members and P10–P90 bands around the central forecast, their online
/// widening against the pyranometers and the optional combination with smart persistence, with
/// the state both learn.
#[derive(Default)]
pub(super) struct EnsembleStage {
    band_widening: BandWidening,
    blend: PersistenceBlend,
}

impl EnsembleStage {
    /// Members for the central forecast `fc` and its rows' bands (none without members), the bands
    /// widened, then `fc` with its bands combined with persistence. `params` are the
    /// transmittances in use.
    #[allow(clippy::too_many_arguments)]
    pub(super) fn run(
        &mut self,
        cx: SiteInputs,
        params: &IrradianceParams,
        now: &DateTime<Utc>,
        tms: &[TransmittanceMap],
        grid: Grid,
        input: &ForecastInput,
        skies: &[HorizonSky],
        fc: &mut Forecast,
    ) -> Vec<Forecast> {
        let members = if params.ensemble_members > 0 {
            let (members, bands) = ensemble_with(tms, grid, input, skies, fc);
            fc.set_bands(bands);
            members
        } else {
            vec![]
        };
        self.widen_bands(cx, params, now, fc, &members);
        self.blend_with_persistence(cx, params, now, fc);
        members
    }

    /// The band width scale at a horizon \[s\].
    pub(super) fn band_scale(&self, horizon_s: u32) -> f64 {
        self.band_widening.scale(horizon_s)
    }

    /// Online band calibration against the pyranometers' mean (when there are pyranometers and
    /// bands): verify the plant bands whose target minute has been measured, then scale this
    /// forecast's bands.
    fn widen_bands(&mut self, cx: SiteInputs, params: &IrradianceParams, now: &DateTime<Utc>, fc: &mut Forecast, members: &[Forecast]) {
        let rate = params.band_calibration_rate;
        let Some((m, cols)) = cx.pyranometers else { return };
        if rate <= 0.0 || !fc.has_bands() {
            return;
        }
        let period = chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64);
        self.band_widening.verify(rate, |t| {
            // The averaging period holding the target must have ended.
            if *t + period > *now {
                return None;
            }
            let v: Vec<f64> = cols.iter().map(|(c, _)| m.at(*c, t)).filter(|y| y.is_finite() && *y >= 0.0).collect();
            Some((v.len() == cols.len()).then(|| v.iter().sum::<f64>() / v.len() as f64))
        });
        let probe_bands: Vec<[f64; 3]> = (0..fc.probes_ghi_wm2.len())
            .map(|i| {
                let mut v: Vec<f64> = members.iter().filter_map(|m| m.probes_ghi_wm2.get(i).copied()).collect();
                v.sort_by(f64::total_cmp);
                [quantile_sorted(&v, 0.1), quantile_sorted(&v, 0.5), quantile_sorted(&v, 0.9)]
            })
            .collect();
        self.band_widening.apply(fc, &probe_bands);
    }

    /// Combine the forecast with smart persistence of the pyranometers ([`crate::forecast::PersistenceBlend`]):
    /// verify the pairs whose target has been measured, keep this forecast's pairs, and weigh.
    fn blend_with_persistence(&mut self, cx: SiteInputs, params: &IrradianceParams, now: &DateTime<Utc>, fc: &mut Forecast) {
        let rate = params.persistence_blend_rate;
        let Some((m, cols)) = cx.pyranometers else { return };
        if rate <= 0.0 || fc.probes_ghi_wm2.is_empty() {
            return;
        }
        let period = chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64);
        let mean_at = |t: &DateTime<Utc>| {
            let v: Vec<f64> = cols.iter().map(|(c, _)| m.at(*c, t)).filter(|y| y.is_finite() && *y >= 0.0).collect();
            (v.len() == cols.len()).then(|| v.iter().sum::<f64>() / v.len() as f64)
        };
        self.blend.verify(rate, |t| if *t + period > *now { None } else { Some(mean_at(t)) });
        // The newest completed reading's clear-sky index at the pyranometers.
        let newest: Vec<(f64, DateTime<Utc>)> = cols.iter().filter_map(|(c, _)| m.completed_at(*c, now)).collect();
        if newest.len() != cols.len() {
            return;
        }
        let mid = newest[0].1;
        let y = newest.iter().map(|v| v.0).sum::<f64>() / newest.len() as f64;
        let Ok(sun_then) = position(&mid, &cx.site.observer()) else { return };
        let clear_then = crate::clearsky::clear_sky(&sun_then, cx.site.file.site.elevation_m, cx.site.clear_sky_model()).ghi_wm2;
        if clear_then < 50.0 {
            return;
        }
        let kstar = (y / clear_then).clamp(0.0, 1.5);
        let plant_rows: Vec<(DateTime<Utc>, u32, f64)> = fc.plant.iter().map(|r| (r.time, r.horizon_s, r.ghi_clear_wm2)).collect();
        for ((t, h, clear), cam) in plant_rows.into_iter().zip(fc.probes_ghi_wm2.iter()) {
            self.blend.push(t, h, *cam, kstar * clear);
        }
        self.blend.apply(fc, kstar);
    }
}
