//! The irradiance model's settings (`[irradiance]` in `site.toml`): transmittances, diffuse gain,
//! look-up box, ensemble spreads, tuning, and the optional paths, with their defaults and ranges.

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::tables;
use crate::segment::Class;
use crate::settings::{ConfigError, check_range};

/// Transmittance and diffuse settings (`[irradiance]` in `site.toml`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct IrradianceParams {
    /// Beam transmittance of clear sky (relative to the clear-sky model).
    pub beam_clear: f64,
    /// Beam transmittance of thin cloud.
    pub beam_thin: f64,
    /// Beam transmittance of thick cloud.
    pub beam_thick: f64,
    /// Change of a cloudy cell's beam transmittance per unit of its brightness feature (its blue
    /// level less the frame's mean over cloudy cells, over 255; [`crate::cloudmap::CloudMap::brightness_feature`]).
    /// A thick cloud's base darkens as its optical depth grows (Mejia et al. 2016, from memory), so
    /// within one class a darker cell passes less beam. 0 by default (classes alone); learnt
    /// online from pyranometers, where the site has them.
    pub beam_cloud_brightness: f64,
    /// Diffuse gain per unit cloud cover, as a share of clear-sky GHI.
    pub diffuse_per_cover: f64,
    /// Diffuse added by a unit of thin cover, in units of what thick cover adds: thin cloud passes
    /// most of the light it scatters, thick cloud reflects most of it away.
    pub diffuse_thin_weight: f64,
    /// Ground albedo for the plane-of-array ground term.
    pub albedo: f64,
    /// Smallest half-width of the look-up box \[m\] (at the cloud base the forecast uses).
    pub blur_min_m: f64,
    /// Growth of the look-up box with horizon for cloud evolution, on top of the motion uncertainty
    /// \[m/s\] (at the cloud base the forecast uses).
    pub blur_growth_mps: f64,
    /// Weight of the current state at the sun-ray point in the fallback (the rest is the map's
    /// mean transmittance).
    pub fallback_persistence_weight: f64,
    /// Tune the transmittances from measurements when a measurements CSV is given.
    pub tune_from_measurements: bool,
    /// Residual (share of clear-sky GHI) beyond which a reading weighs less in the tuning (Huber's
    /// M-estimator; 0: plain least squares).
    pub tune_robust_scale: f64,
    /// Ensemble members for the uncertainty bands (0: none).
    pub ensemble_members: usize,
    /// Least motion uncertainty the ensemble assumes \[m/s\] (cloud evolution the motion filter does
    /// not see).
    pub ensemble_motion_sigma_mps: f64,
    /// Least relative spread of the cloud base height in the ensemble; the engine widens it to the
    /// combined estimate's relative uncertainty when that is larger ([`crate::cbh`]).
    pub ensemble_cbh_rel_sigma: f64,
    /// Relative spread of the beam transmittance in the ensemble.
    pub ensemble_beam_rel_sigma: f64,
    /// Relative spread of the cloud-scattered diffuse in the ensemble.
    pub ensemble_diffuse_rel_sigma: f64,
    /// Cloud fraction at and above which the clear-sky and whole-beam spreads are full; below it
    /// they shrink in proportion, to a quarter at most (a mostly clear sky's beam is better known).
    pub ensemble_full_spread_cover: f64,
    /// Step of the online band calibration (adaptive conformal inference, Gibbs & Candès 2021):
    /// after each verified plant band the width scale of its horizon changes by
    /// `exp(rate · (miss − 0.2))`, so P10–P90 tends to hold 80 % of the measurements. 0: off.
    /// Needs pyranometers in the measurements.
    pub band_calibration_rate: f64,
    /// Rate of the per-horizon error averages that weigh the camera against smart persistence of
    /// the pyranometers ([`PersistenceBlend`]); 0 turns the combination off.
    pub persistence_blend_rate: f64,
    /// Transmittance tuning uses pyranometer readings at most this old \[s\] (and at most 400
    /// rows): an overcast that thins must be followed. On the independent breaking overcast, 900 s
    /// against the 400 rows alone (about an hour there): pooled skill 0.11 → 0.14, largest |MBE|
    /// 114 → 60 W/m²; the broken cumulus unchanged.
    pub tune_window_s: f64,
    /// Readings the tuning needs before its first solution (with three pyranometers, a row each
    /// per frame). The ridge prior keeps any number well posed; 1 makes the tuning act from the
    /// first completed reading. On the independent breaking overcast (three pyranometers, 30-s
    /// frames) 1 against 20: 1-minute RMSE 95 → 85 W/m², first 5 minutes of the current state
    /// 236 → 147, pooled 5–15 min skill 0.53 → 0.52; but on the project's two-layer stereo scene
    /// (`tests/stereo.rs`) the run with the true heights lost 0.032 of 5-minute skill, so 20 stays
    /// the default, with [`IrradianceParams::tune_before_min_rows`] bridging the start.
    pub tune_min_rows: usize,
    /// Tune from the first reading, before `tune_min_rows` are held, with the prior weighted up
    /// by the rows still missing (each adds its unknown's usual regressor size squared) and the
    /// diffuse gain's mean-residual step scaled by the share of rows held; from `tune_min_rows`
    /// on the tuning is as without it. Off: the configured transmittances serve until then. On
    /// the independent breaking overcast 1-minute RMSE 95.0 → 87.9 W/m², pooled 5–15 min skill
    /// 0.520 → 0.516; the two-layer stereo scene's 5-minute skill with the true heights 0.467 →
    /// 0.463 (with `tune_min_rows = 1` instead: 0.435); the project's scenes within ±0.003.
    pub tune_before_min_rows: bool,
    /// Scale the thin-cloud beam transmittance (the configured value, and the tuning's prior) by how
    /// often thin cloud around the sun let its disk show ([`crate::sundisk::ThinCloudVisibility`]):
    /// a "thin" class that never shows the disk is the optically thick edge of a cloud deck, not a
    /// veil. Needs a camera whose disk clips in clear sky, as `calibrate` requires.
    pub beam_thin_from_sun_disk: bool,
    /// Radius around the sun's computed direction read for its disk \[°\] (wider than the disk's
    /// 0.27° so a calibration error of a few tenths of a degree still finds it).
    pub sun_disk_radius_deg: f64,
    /// With two layers, the layer behind (the second, less opaque one) is unseen, not clear,
    /// where the first layer's cloud hides it: those cells take the shares of its own cells and
    /// clear sky around them, spreading inward ([`TransmittanceMap::for_layer`]), so that a
    /// veil does not get holes where the cumulus under it moves away. Off: they count as clear.
    pub fill_layer_behind: bool,
    /// With two layers tracked, the tuning's diffuse gain takes up the window's mean residual as
    /// with one ([`IrradianceParams::tune_robust_scale`]). Off: it is left alone with two layers,
    /// where the current state's bias at the pyranometers (their look-ups at lead 0 near the
    /// camera's sun direction) is not the forecast's at 5–15 min (figures in docs/checks.md, "Two layers
    /// through each other").
    pub tune_bias_with_two_layers: bool,
    /// The diffuse gain takes up only the part of the window's mean residual beyond two standard
    /// errors (soft thresholding, Donoho & Johnstone 1994, from memory), so the step grows from
    /// nothing as the evidence does; on by default. Off: all of the mean residual once it passes
    /// two standard errors, a jump at the threshold that a change of the decoder's rounding moved
    /// (the gain 0.27 → 0.60 in one frame of a two-layer scene). Figures in docs/checks.md ("The tuning's
    /// bias step, soft").
    pub tune_bias_soft: bool,
    /// A thin cell's transmittance follows its cloudiness score: its optical depth taken as
    /// proportional to its place in the thin band, Beer–Lambert gives `beam_thin^(2u)` (clear
    /// sky's where thin cloud begins, the thin class's at the band's middle), read as a mix of
    /// the classes either side at the values in use
    /// ([`crate::cloudmap::CloudMap::continuous_shares`]), in the forecast's tables and in the
    /// tuning's regressors alike. A veil's optical depth varies continuously inside the one
    /// class; off (the default), every thin cell passes `beam_thin`. Figures in docs/checks.md ("A thin
    /// cell's transmittance from its score").
    pub thin_beam_from_score: bool,
    /// The sun's glare (unknown cells in view) is filled from the recent maps moved by the tracked
    /// motion before the neighbour fill ([`TransmittanceMap::for_layer`]): the glare stays near the
    /// sun while the clouds move through it, so a cell it hides now was seen upstream earlier.
    /// Only the forecast's tables and the tuning's look-ups read the fill; the motion measures the
    /// map as seen. Off (the default): glare cells take their neighbours' shares only.
    pub glare_fill_from_history: bool,
    /// The beam measured along the camera's own line of sight to the sun, from the size of its
    /// clipped glare ([`crate::sundisk::SunLineBeam`]), is the beam transmittance of the cells
    /// within [`crate::sundisk::SUN_RING_DEG`] of the sun that are not thick cloud (the glare,
    /// clear and thin: a veil there) in the forecast's tables (as the mix of the clear and thick
    /// classes that passes it), before the fill; thick cells keep their class. With two layers it
    /// is put on the layer whose cloud is more often thin (a veil), the other layer's table
    /// taking those cells as clear. The tables move with each layer's motion, so the measured
    /// beam is carried downstream with the layer. Off (the default): the glare takes its
    /// neighbours' shares. Figures in docs/checks.md ("The beam along the camera's sun line").
    pub sun_line_beam: bool,
    /// The oldest earlier map [s] the glare fill takes a cell from (the engine keeps maps up to
    /// `motion.max_gap_s`, longer ones are not at hand).
    pub glare_fill_max_age_s: f64,
    /// Correlation length \[m\] of the neighbour fill of unseen cells ([`TransmittanceMap::for_layer`]):
    /// a cell filled `d` metres (counted in cells along the fill's path) from the nearest seen cell
    /// keeps the weight `exp(−d / L)` of what its neighbours say and takes the rest from the mean
    /// of the seen sky's cells, as an exponential covariance model relaxes an estimate toward the
    /// mean far from the data (simple kriging; common practice, no source). A small glare changes
    /// little; deep inside a large unseen region (a sun low in the camera's clipped sky,
    /// `segment.library_keeps_clipped`) the fill no longer carries its edge's state kilometres
    /// inward. 0: no relaxation. The default, 500 m, is about a cumulus cloud's size (from memory,
    /// no source); 250, 500, 1500 and 4000 m were measured (docs/checks.md, "Where the clear sky clips").
    pub fill_correlation_m: f64,
}

impl Default for IrradianceParams {
    fn default() -> Self {
        // Defaults: thin cloud passes about half the beam (slant optical depth near 1) and thick cloud
        // almost none (common practice, no source); clouds add diffuse light of about a quarter of the
        // clear-sky GHI at full cover (own choice, tuned from measurements when available); albedo
        // 0.2 (common practice, no source).
        Self {
            beam_clear: 1.0,
            beam_thin: 0.45,
            beam_thick: 0.03,
            beam_cloud_brightness: 0.0,
            diffuse_per_cover: 0.25,
            // Two-stream estimate: total transmittance 1 / (1 + 0.75 (1 − g) τ) with g = 0.85
            // (common practice, no source) leaves 0.86 of the clear-sky GHI through τ = 1.5 and
            // 0.23 through τ = 30; less the beam each keeps (exp(−τ m), m ≈ 1.5), about 0.75 and
            // 0.23 of it is diffuse: 3×. Own estimate.
            diffuse_thin_weight: 3.0,
            albedo: 0.2,
            blur_min_m: 40.0,
            blur_growth_mps: 0.5,
            fallback_persistence_weight: 0.5,
            tune_from_measurements: true,
            fill_layer_behind: false,
            tune_bias_with_two_layers: true,
            tune_bias_soft: true,
            thin_beam_from_score: false,
            glare_fill_from_history: false,
            sun_line_beam: false,
            // The motion's gap limit: a cloud is taken as frozen over the same span the motion
            // is measured over (own choice).
            glare_fill_max_age_s: 180.0,
            // A cumulus cloud's size (from memory, no source).
            fill_correlation_m: 500.0,
            // Huber (1964); 0.05 of clear-sky GHI, about the scatter of a well-placed reading
            // (own choice: 0.05, 0.1 and 0.2 were tried; 0.05 gave the best skill on four of five
            // synthetic scenes, e.g. broken cumulus 0.71 → 0.79 at 5 min).
            tune_robust_scale: 0.05,
            // Spreads calibrated so that P10–P90 covers 70–90 % of the truth at 5–15 min on the
            // synthetic broken-cloud scenes (own calibration; see tests/pipeline.rs).
            ensemble_members: 20,
            // 0.4 m/s: the lowest ensemble CRPS on the synthetic scenes among floors that keep
            // their P10–P90 coverage in 70–90 % (0.6 → 0.4 cut CRPS by 8–18 % at 5–15 min; 0.2
            // cut it further but let the overcast scene's 15-minute coverage fall to 68 %).
            ensemble_motion_sigma_mps: 0.4,
            ensemble_cbh_rel_sigma: 0.15,
            ensemble_beam_rel_sigma: 0.5,
            ensemble_diffuse_rel_sigma: 0.3,
            // 0.8 (was 0.4): mostly clear skies were over-covered (slow scattered cloud: 97 % at
            // 5 min); with the online calibration below every synthetic scene's coverage lies in
            // 73–90 % at 5–15 min and the CRPS falls by 1–14 %.
            ensemble_full_spread_cover: 0.8,
            // 0.15: among 0.07, 0.1, 0.15 and 0.2 the one whose coverage stayed in 70–90 % on all
            // five synthetic scenes (30 min each, so at 15 min the calibration acts on the last
            // half only).
            band_calibration_rate: 0.15,
            persistence_blend_rate: 0.0,
            tune_window_s: 900.0,
            tune_min_rows: 20,
            tune_before_min_rows: true,
            beam_thin_from_sun_disk: true,
            sun_disk_radius_deg: 1.0,
        }
    }
}

impl IrradianceParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "irradiance.beam_clear", self.beam_clear, 0.5, 1.3)?;
        check_range(file, "irradiance.beam_thin", self.beam_thin, 0.0, 1.0)?;
        check_range(file, "irradiance.beam_thick", self.beam_thick, 0.0, 1.0)?;
        check_range(file, "irradiance.beam_cloud_brightness", self.beam_cloud_brightness, -3.0, 3.0)?;
        check_range(file, "irradiance.diffuse_per_cover", self.diffuse_per_cover, 0.0, 1.0)?;
        check_range(file, "irradiance.diffuse_thin_weight", self.diffuse_thin_weight, 0.0, 10.0)?;
        check_range(file, "irradiance.tune_robust_scale", self.tune_robust_scale, 0.0, 1.0)?;
        check_range(file, "irradiance.albedo", self.albedo, 0.0, 1.0)?;
        check_range(file, "irradiance.blur_min_m", self.blur_min_m, 0.0, 5000.0)?;
        check_range(file, "irradiance.blur_growth_mps", self.blur_growth_mps, 0.0, 20.0)?;
        check_range(file, "irradiance.fallback_persistence_weight", self.fallback_persistence_weight, 0.0, 1.0)?;
        check_range(file, "irradiance.ensemble_members", self.ensemble_members as f64, 0.0, 200.0)?;
        check_range(file, "irradiance.ensemble_motion_sigma_mps", self.ensemble_motion_sigma_mps, 0.0, 20.0)?;
        check_range(file, "irradiance.ensemble_cbh_rel_sigma", self.ensemble_cbh_rel_sigma, 0.0, 1.0)?;
        check_range(file, "irradiance.ensemble_full_spread_cover", self.ensemble_full_spread_cover, 0.0, 1.0)?;
        check_range(file, "irradiance.ensemble_beam_rel_sigma", self.ensemble_beam_rel_sigma, 0.0, 1.0)?;
        check_range(file, "irradiance.ensemble_diffuse_rel_sigma", self.ensemble_diffuse_rel_sigma, 0.0, 2.0)?;
        check_range(file, "irradiance.band_calibration_rate", self.band_calibration_rate, 0.0, 1.0)?;
        check_range(file, "irradiance.persistence_blend_rate", self.persistence_blend_rate, 0.0, 1.0)?;
        check_range(file, "irradiance.tune_window_s", self.tune_window_s, 60.0, 86_400.0)?;
        check_range(file, "irradiance.tune_min_rows", self.tune_min_rows as f64, 1.0, 400.0)?;
        check_range(file, "irradiance.sun_disk_radius_deg", self.sun_disk_radius_deg, 0.3, 5.0)?;
        check_range(file, "irradiance.fill_correlation_m", self.fill_correlation_m, 0.0, 100_000.0)?;
        check_range(file, "irradiance.glare_fill_max_age_s", self.glare_fill_max_age_s, 1.0, 3600.0)
    }

    /// The cover that sets the cloud-scattered diffuse: thick cover plus `diffuse_thin_weight` times
    /// thin cover (`cloud_fraction` = thin + thick).
    #[inline]
    pub fn diffuse_cover(&self, cloud_fraction: f64, thin_fraction: f64) -> f64 {
        let cf = cloud_fraction.clamp(0.0, 1.0);
        let thin = thin_fraction.clamp(0.0, cf);
        cf - thin + self.diffuse_thin_weight * thin
    }

    /// The coefficients of the transmittance tables' features ([`TransmittanceMap`]): clear, thin
    /// and thick shares, brightness feature.
    #[inline]
    pub fn beams(&self) -> [f64; tables::FEATURES] {
        [self.beam_clear, self.beam_thin, self.beam_thick, self.beam_cloud_brightness]
    }

    /// Beam transmittance of a class (NaN for unknown).
    #[inline]
    pub fn beam(&self, c: Class) -> f64 {
        match c {
            Class::Clear => self.beam_clear,
            Class::Thin => self.beam_thin,
            Class::Thick => self.beam_thick,
            Class::Unknown => f64::NAN,
        }
    }
}
