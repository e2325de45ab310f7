//! The segmentation's settings (`[segment]` in `site.toml`): [`SegmentParams`], its defaults,
//! range checks, and the per-pixel thresholds and default reference it defines.
use std::path::Path;

use serde::{Deserialize, Serialize};

use super::GLARE_RINGS;
use crate::settings::{ConfigError, check_range};

/// `[segment]` in `site.toml`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct SegmentParams {
    /// Default reference: constant term.
    pub reference_c0: f64,
    /// Default reference: circumsolar term.
    pub reference_c1: f64,
    /// Default reference: angular scale of the circumsolar term \[°\].
    pub reference_gamma_scale_deg: f64,
    /// Default reference: horizon term.
    pub reference_c2: f64,
    /// R/B of white cloud.
    pub cloud_rb: f64,
    /// Score from which a pixel is thin cloud.
    pub thin_score: f64,
    /// Score from which a pixel is thick cloud (at the zenith; see `thick_horizon_drop`).
    pub thick_score: f64,
    /// The thick-cloud score falls by this much toward the horizon, as `(z / 90°)⁴`: the sky
    /// brightens toward the horizon, so the same opacity of cloud mixes more sky light there and
    /// scores lower.
    pub thick_horizon_drop: f64,
    /// Per-frame offset: pixels at most this far above the default count as the frame's clear sky.
    pub offset_band: f64,
    /// Per-frame offset: quantile of their departure from the default.
    pub offset_quantile: f64,
    /// Per-frame offset: least share of the sky that must qualify.
    pub offset_min_share: f64,
    /// Per-frame offset: lower limit.
    pub offset_min: f64,
    /// Per-frame offset: upper limit.
    pub offset_max: f64,
    /// Saturated pixels within this angle of the sun are unknown \[°\].
    pub sun_exclusion_deg: f64,
    /// Within this angle of the sun, a pixel whose blue channel is clipped is unknown (its ratio
    /// means nothing) \[°\].
    pub glare_zone_deg: f64,
    /// A channel at or above this level is saturated.
    pub saturation_level: u8,
    /// In the glare zone, a clipped pixel is glare (unknown) when at least this share of the sky
    /// at the same angle from the sun (1° rings) is clipped too, and thick cloud otherwise: the
    /// sun's glare is a ring around it, a bright cloud lit from behind is a patch.
    pub glare_ring_share: f64,
    /// Pixels beyond this zenith angle are not classified \[°\].
    pub max_zenith_deg: f64,
    /// From this zenith angle on, the map holds its cloudy cells' thick share to that of the
    /// cloudy cells near the zenith (distant cloud mixes with gaps and haze and reads thin;
    /// `distance::far_thickness`) \[°\]. 90 (the default) turns it off. Measured at 70° (with
    /// the score floor halfway between the thin and thick thresholds): on the independent broken
    /// cumulus the largest |MBE| fell 100 → 48 W/m² (15 min), pooled skill 0.59 → 0.58; on the
    /// independent breaking overcast pooled skill 0.30 → 0.29 and the largest |MBE| rose 71 → 88;
    /// on the project's two-layer scene the 5-minute skill fell 0.40 → 0.33 (a high veil's far cells
    /// made thick) and on its breaking overcast the 15-minute skill 0.50 → 0.44. It stays off until
    /// it can tell a veil from distant cumulus.
    pub far_thickness_from_zenith_deg: f64,
    /// Lift far cloud's scores by the frame's measured loss of contrast with distance before the
    /// thresholds apply (`distance`: haze between a distant cloud and the camera pulls its colour
    /// toward the clear sky's, so distant cumulus reads thin or clear).
    pub distant_contrast: bool,
    /// A sample darker than the clear sky would be at its place (the learned library's brightness at
    /// the frame's exposure) by more than this share is thick cloud (`brightness`); 0 turns the test
    /// off. Only with a learned clear-sky library, outside the sun's glare.
    pub dark_cloud_margin: f64,
    /// The dark-cloud test applies only where the clear sky reads at least this bright (8-bit
    /// largest channel, at the frame's exposure): near the sun and the horizon, where the red/blue
    /// ratio of clear sky nears a cloud's.
    pub dark_cloud_min_level: f64,
    /// Read the far field (zenith 60–85°) by what the same clouds turned out to be nearer: pairs
    /// of far cells' features with the class read where the tracked motion later brings them
    /// within 50°, learnt online per 5° band (`farfield`), applied (cloud or clear only) in the
    /// bands where the pairs show it reads them better than the rules. Off by default: measured
    /// on, the independent breaking overcast's pooled 5–15 min skill went 0.516 → 0.518 (largest
    /// |MBE| 21.0 → 15.4 W/m²), the broken cumulus stayed 0.567 (no band passed its test), and
    /// the project's `overcast-breaking` went 0.778 / 0.664 / 0.488 → 0.778 / 0.681 / 0.483 at
    /// 5 / 10 / 15 min but fell 0.526 → 0.495 at 20 min, more than the 0.03 allowed.
    pub far_field_learning: bool,
    /// Cloud fraction is counted within this zenith angle \[°\].
    pub cloud_fraction_zenith_deg: f64,
    /// Frames with a cloud fraction at most this update the learned clear-sky library.
    pub library_max_cloud_fraction: f64,
    /// Weight of a new frame in the library's exponential mean.
    pub library_rate: f64,
    /// A clear day's library ([`Reference::from_clear_samples`]) also marks the bins where the
    /// clear sky itself clips (`clear_sky_clips`): the ratio cannot tell clear from cloud where the
    /// clear sky is clipped near-white, so while no pyranometer is held (or with
    /// [`SegmentParams::clipped_marks_with_pyranometers`]) the samples there are judged by their
    /// brightness ([`SegmentParams::judge_clipped_bins`], the default) or, with that off, are
    /// unknown. Unmarked, such bins have no library value and the parametric default judges them,
    /// which on a camera exposed for the zenith calls the low circumsolar sky cloud; with
    /// pyranometers the transmittance tuning learns what that "cloud" passes (its brightness
    /// feature), so then the bins are judged as unmarked ([`Reference::clipped_marks_in_use`]).
    /// Acts at `calibrate` (the marks are in the library file). Measured on the independent
    /// scenes (camera from `calibrate`), with `irradiance.fill_correlation_m` at 500 m: the
    /// breaking overcast without pyranometers went from pooled 5–15 min skill 0.29 to 0.40, 1-min
    /// RMSE 165.2 → 138.6 W/m² (persistence 165.6), largest |MBE| 108.9 → 17.7 W/m²; the broken
    /// cumulus is unchanged (0.56); the clear days' RMSE fell 11.6 / 11.9 → 7.4 / 6.9 W/m².
    pub library_keeps_clipped: bool,
    /// Judge the samples in a bin marked as clipped clear sky ([`SegmentParams::library_keeps_clipped`])
    /// by their brightness instead of leaving them unknown, wherever the marks are used (without
    /// pyranometers, or with [`SegmentParams::clipped_marks_with_pyranometers`]). The clear sky
    /// there read at or above `saturation_level` on the clear day, so:
    /// - a sample that clips (any channel at `saturation_level`) reads as that clear sky does:
    ///   clear, in a frame whose exposure was measured from its own clear samples (otherwise, in
    ///   overcast, unknown: a camera that brightens an overcast frame clips its bright cloud);
    /// - a sample darker than the clipped clear sky by more than [`SegmentParams::dark_cloud_margin`]
    ///   at the frame's exposure cannot be clear sky, and near the sun a cloud that sends less
    ///   light than the clear sky scatters is an optically thick one (a thin cloud scatters
    ///   forward and reads bright; `brightness`): thick. A frame whose exposure cannot be
    ///   measured (overcast: too few clear samples) takes 1, exact for a fixed exposure and erring
    ///   toward unknown for a camera that brightens its frames under cloud;
    /// - a sample in between stays unknown: a bright cloud and a clear sky just short of clipping
    ///   both read there.
    ///
    /// Within the frame's glare zone (beyond `sun_exclusion_deg`) only the thick side applies: the
    /// glare brightens what it covers, so a dark sample there is cloud, but a clipped one may be
    /// the bloom. The dark-cloud test's least level and veil gate (`brightness`) are not applied:
    /// a marked bin's clear sky is bright by construction, and a veil near the sun reads brighter,
    /// not darker. With `dark_cloud_margin` 0 (the dark-cloud test off) the exposure is not
    /// measured and nothing is judged thick, so every marked sample stays unknown.
    ///
    /// Measured against the independent renderer's true masks (breaking overcast, camera and
    /// library from `calibrate`, every 6th frame, zenith 0–85°): of the samples made clear,
    /// 99–100 % were clear in every 5–10° zenith band; of those made thick, 100 % were cloud; of
    /// the unclipped bright ones left unknown, 43–59 % were cloud (docs/checks.md, "Where the clear sky
    /// clips"). Off: every sample in a marked bin is unknown where the marks are used.
    pub judge_clipped_bins: bool,
    /// Use the clipped bins' marks while pyranometers are held too (off: with pyranometers the
    /// bins are judged as unmarked and the tuning learns what that sky passes). Measured on, with
    /// `judge_clipped_bins` (camera from `calibrate`): the independent breaking overcast's pooled
    /// 5–15 min skill 0.52 → 0.59 and 1-min RMSE 88.3 → 52.4 W/m², largest |MBE| 26.8 →
    /// 18.7 W/m²; the independent broken cumulus, `tests/pipeline.rs` and the nuisance scenes
    /// unchanged. It was off while one start-up issue time decided the two-layer stereo scene's
    /// gap (`tests/stereo.rs`: −0.019 / −0.092 / +0.030 at 5 / 10 / 15 min); with
    /// `motion.widen_unconfirmed` the gap is −0.003 / −0.027 / +0.015, within the ±0.03 it allows.
    pub clipped_marks_with_pyranometers: bool,
    /// Follow a change of the camera's colour balance since the library was learnt: each frame's
    /// clear sky, where it is found, gives the shift of its red/blue ratio against the learned
    /// library's (`library::clear_ratio_shift`), and the library's ratios are read scaled by the
    /// shift's running mean ([`Reference::ratio_scale`]): the frame's ratios are divided by it
    /// before they are judged (against the library, the parametric default and `cloud_rb` alike).
    /// Off: the frames' ratios are judged as read.
    pub follow_colour_balance: bool,
    /// Judge samples against the clear sky as it is at the frame's exposure, past the image's
    /// clipping, where the exposure differs from the library's (the clear day's):
    /// - a sample whose blue clips, away from the sun's glare, where the learned clear sky's blue
    ///   (exposure × the library's brightness) clips too, is compared with the clear sky's ratio
    ///   as it then reads, `min(R, 255) / 255`, above the library's: a clipped blue lifts the
    ///   ratio of bright clear sky (near the horizon, around the glare) toward cloud's, and read
    ///   against the unclipped library it became cloud. Where the clear sky would not clip, a
    ///   clipped sample is brighter than clear sky and is judged as read. The exposure here is
    ///   the frame's own, else the frames' mean so far (an overcast frame measures none; the
    ///   reference only decides samples whose blue clips, where the unclipped library is wrong
    ///   whatever the exposure);
    /// - the dark-cloud test ([`crate::segment::brightness::darker_than_clear`]) compares an unclipped
    ///   sample with the clear sky's brightness at the frame's own exposure even beyond 255, not
    ///   with 255 (a linear response up to the saturation level is assumed), and applies where the
    ///   library's own brightness reaches `dark_cloud_min_level` (not that times the exposure);
    /// - in the clear day's clipped bins ([`FrameReference::judge_in_clipped_bin`]) the dark test
    ///   likewise, and in a frame exposed brighter than the clear day a sample whose blue clips
    ///   but whose red reads is thick where that red is darker than the clear sky's red there.
    ///
    /// The last two need the frame's own exposure, so they act only with the dark-cloud test on
    /// (`dark_cloud_margin` > 0, which meters the exposure). Off: the library's ratios as learnt,
    /// and the expectation held at 255.
    pub exposure_past_clipping: bool,
}

impl Default for SegmentParams {
    fn default() -> Self {
        Self {
            reference_c0: 0.45,
            reference_c1: 0.38,
            reference_gamma_scale_deg: 40.0,
            reference_c2: 0.0,
            cloud_rb: 0.93,
            thin_score: 0.50,
            thick_score: 0.875,
            // Off by default: 0.1–0.3 raised every synthetic scene's segmentation by 0.3–1.0
            // points (more far cloud called thick, as the truth has it), but the forecast, whose
            // per-class transmittances do not know that far "thick" cells are partly clear at the
            // sun's slant, lost skill under two layers and over breaking overcast.
            thick_horizon_drop: 0.0,
            offset_band: 0.05,
            offset_quantile: 0.70,
            offset_min_share: 0.10,
            offset_min: -0.15,
            offset_max: 0.08,
            sun_exclusion_deg: 4.0,
            glare_zone_deg: 15.0,
            saturation_level: 250,
            glare_ring_share: 0.75,
            max_zenith_deg: 90.0,
            far_thickness_from_zenith_deg: 90.0,
            distant_contrast: true,
            // First guesses (a cloud a good eighth darker than bright clear sky), not tuned.
            dark_cloud_margin: 0.12,
            dark_cloud_min_level: 200.0,
            far_field_learning: false,
            cloud_fraction_zenith_deg: 70.0,
            library_max_cloud_fraction: 0.02,
            library_rate: 0.2,
            library_keeps_clipped: true,
            judge_clipped_bins: true,
            clipped_marks_with_pyranometers: true,
            follow_colour_balance: true,
            exposure_past_clipping: true,
        }
    }
}

impl SegmentParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        let f = |n: &str| format!("segment.{n}");
        check_range(file, &f("reference_c0"), self.reference_c0, 0.0, 2.0)?;
        check_range(file, &f("reference_c1"), self.reference_c1, 0.0, 2.0)?;
        check_range(file, &f("reference_gamma_scale_deg"), self.reference_gamma_scale_deg, 1.0, 180.0)?;
        check_range(file, &f("reference_c2"), self.reference_c2, -1.0, 2.0)?;
        check_range(file, &f("cloud_rb"), self.cloud_rb, 0.3, 2.0)?;
        check_range(file, &f("thin_score"), self.thin_score, 0.01, 2.0)?;
        check_range(file, &f("thick_score"), self.thick_score, self.thin_score, 3.0)?;
        check_range(file, &f("thick_horizon_drop"), self.thick_horizon_drop, 0.0, self.thick_score - self.thin_score)?;
        check_range(file, &f("offset_band"), self.offset_band, -1.0, 1.0)?;
        check_range(file, &f("offset_quantile"), self.offset_quantile, 0.0, 1.0)?;
        check_range(file, &f("offset_min_share"), self.offset_min_share, 0.0, 1.0)?;
        check_range(file, &f("offset_min"), self.offset_min, -1.0, 0.0)?;
        check_range(file, &f("offset_max"), self.offset_max, 0.0, 1.0)?;
        check_range(file, &f("sun_exclusion_deg"), self.sun_exclusion_deg, 0.0, 45.0)?;
        check_range(file, &f("glare_zone_deg"), self.glare_zone_deg, 0.0, GLARE_RINGS as f64)?;
        check_range(file, &f("glare_ring_share"), self.glare_ring_share, 0.0, 1.0)?;
        check_range(file, &f("max_zenith_deg"), self.max_zenith_deg, 10.0, 100.0)?;
        check_range(file, &f("far_thickness_from_zenith_deg"), self.far_thickness_from_zenith_deg, 30.0, 90.0)?;
        check_range(file, &f("dark_cloud_margin"), self.dark_cloud_margin, 0.0, 0.9)?;
        check_range(file, &f("dark_cloud_min_level"), self.dark_cloud_min_level, 0.0, 255.0)?;
        check_range(file, &f("cloud_fraction_zenith_deg"), self.cloud_fraction_zenith_deg, 5.0, 90.0)?;
        check_range(file, &f("library_max_cloud_fraction"), self.library_max_cloud_fraction, 0.0, 1.0)?;
        check_range(file, &f("library_rate"), self.library_rate, 0.0, 1.0)
    }

    /// Whether a pixel at this geometry is judged by its ratio alone: within the zenith limit and
    /// outside the sun-exclusion and glare zones.
    #[inline]
    pub fn plain_sky(&self, z_deg: f32, gamma_deg: f32) -> bool {
        z_deg <= self.max_zenith_deg as f32 && gamma_deg >= self.sun_exclusion_deg.max(self.glare_zone_deg) as f32
    }

    /// The score from which a pixel at zenith `z_deg` is thick cloud.
    #[inline]
    pub fn thick_at(&self, z_deg: f32) -> f32 {
        let zr = z_deg / 90.0;
        self.thick_score as f32 - self.thick_horizon_drop as f32 * zr * zr * zr * zr
    }

    /// The parametric default reference R/B at zenith `z_deg` and sun angle `gamma_deg`.
    #[inline]
    pub fn default_reference(&self, z_deg: f32, gamma_deg: f32) -> f32 {
        let zr = z_deg / 90.0;
        self.reference_c0 as f32
            + self.reference_c1 as f32 * (-gamma_deg / self.reference_gamma_scale_deg as f32).exp()
            + self.reference_c2 as f32 * zr * zr * zr * zr
    }
}
