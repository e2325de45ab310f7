//! Cloud segmentation: a class per sky pixel (clear, thin, thick, unknown) and the cloud fraction.
//!
//! # Method
//! The feature is the red/blue ratio `R/B` (Long et al. 2006), compared not with one fixed threshold
//! but with the ratio the *clear* sky has in the same place: a clear-sky reference indexed by the
//! pixel's zenith angle `z` and its angle to the sun `γ` (Chow et al. 2011; Ghonima et al. 2012), so the
//! white circumsolar sky and horizon haze are not called cloud. The reference is, in order of
//! preference,
//! 1. a **library learned from clear frames** of this camera (bins of 2° in `z` and `γ`, updated with
//!    an exponential mean from frames whose cloud fraction is small), where a bin has data;
//! 2. else a **parametric default** `c0 + c1 exp(−γ / γs) + c2 (z / 90°)⁴` shifted by a per-frame
//!    offset: the `offset_quantile` of `R/B − default` over the pixels that sit at most
//!    `offset_band` above the default (the frame's own clear sky), when at least `offset_min_share` of
//!    the sky qualifies, or else of the sky within `cloud_fraction_zenith_deg` (then over that sky
//!    alone: a hazy far field leaves too little of a map's cells near the default, though the near
//!    sky is clear). The default constants were fitted to the clear pixels of the WSISEG
//!    sample (Xie et al. 2020) and are configurable.
//!
//! A pixel's cloudiness score is `s = (R/B − ref) / (cloud_rb − ref)`: 0 on the clear-sky reference,
//! 1 at the ratio of white cloud. Thin cloud from `s ≥ thin_score`, thick from `s ≥ thick_score`
//! (thin cloud lets the sky's blue through, so its ratio lies between the two). The saturated sun disk
//! (all channels ≥ `saturation_level` within `sun_exclusion_deg` of the sun) is *unknown*, and so is
//! any pixel within `glare_zone_deg` of the sun whose blue channel is clipped, unless even the upper
//! bound of its ratio (R / 255) says clear sky — or unless its ring of sky at the same angle from the
//! sun (1° wide) is mostly *not* clipped: glare is a ring around the sun, while a cloud lit from
//! behind saturates in patches, so a clipped pixel in a mostly unclipped ring is thick cloud.
//! The continuous score also feeds cloud motion.
//!
//! # References
//! * C. N. Long, J. M. Sabburg, J. Calbó, D. Pagès, "Retrieving cloud characteristics from
//!   ground-based daytime color all-sky images", *J. Atmos. Oceanic Technol.* 23:633–652, 2006.
//! * C. W. Chow et al., "Intra-hour forecasting with a total sky imager at the UC San Diego solar
//!   energy testbed", *Solar Energy* 85(11):2881–2893, 2011.
//! * M. S. Ghonima et al., "A method for cloud detection and opacity classification based on ground
//!   based sky imagery", *Atmos. Meas. Tech.* 5:2881–2892, 2012.
//! * W. Xie et al., "SegCloud: a novel cloud image segmentation model using a deep convolutional
//!   neural network for ground-based all-sky-view camera observation", *Atmos. Meas. Tech.*
//!   13:1953–1961, 2020 (the WSISEG data).

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::camera::Camera;
use crate::settings::{ConfigError, check_range};

mod library;
pub use library::{Reference, lib_index};
mod sky;
pub use sky::{SampleSky, SkyGeometry, SkySlices};

/// Pixel class as written in class masks.
#[repr(u8)]
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Class {
    /// Outside the sky, obstructed, or not judged (sun disk).
    Unknown = 0,
    /// Clear sky.
    Clear = 1,
    /// Thin cloud.
    Thin = 2,
    /// Thick cloud.
    Thick = 3,
}

impl Class {
    /// From the mask value.
    pub fn from_u8(v: u8) -> Class {
        match v {
            1 => Class::Clear,
            2 => Class::Thin,
            3 => Class::Thick,
            _ => Class::Unknown,
        }
    }
}

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
    /// - the dark-cloud test ([`crate::brightness::darker_than_clear`]) compares an unclipped
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

/// Below this gap between the cloud ratio and the clear-sky reference (R/B) a pixel is unknown: the
/// clear sky there (bloom, a white horizon) is as white as cloud.
pub const MIN_CONTRAST: f32 = 0.06;
/// 1° rings around the sun for the glare test (the glare zone's upper limit).
const GLARE_RINGS: usize = 60;
/// Fewer sampled pixels than this in a ring: its clipped pixels are taken for glare.
const GLARE_RING_MIN_SAMPLES: u32 = 8;

/// A pixel's geometry for segmentation: zenith and angle to the sun \[°\].
#[derive(Debug, Clone, Copy)]
pub struct PixelGeom {
    /// Zenith angle \[°\].
    pub z_deg: f32,
    /// Angle to the sun \[°\] (180 when no sun is known).
    pub gamma_deg: f32,
}

/// The reference state for one frame (library + offset).
#[derive(Debug, Clone, Copy)]
pub struct FrameReference<'a> {
    reference: &'a Reference,
    params: &'a SegmentParams,
    /// The frame's offset from the default.
    pub offset: f32,
    /// Per 1° ring around the sun: whether its clipped pixels are glare ([`SegmentParams::glare_ring_share`]).
    glare_ring: [bool; GLARE_RINGS],
    /// The angle from the sun \[°\] out to which every ring is mostly clipped: the bloom, unbroken
    /// from the sun (a low or hazy sun spreads it far beyond the configured zone).
    pub glare_extent_deg: f32,
    /// This frame's glare zone \[°\]: the configured one, or the bloom's extent when wider.
    pub glare_zone_deg: f32,
    /// The frame's exposure against the library's clear-sky brightness (`brightness::ExposureMeter`);
    /// `None` when it could not be measured or the dark-cloud test is off.
    pub exposure: Option<f32>,
    /// The factor by which this frame's ratios read above the library's colour balance
    /// ([`Reference::ratio_scale`]); its samples' ratios are divided by it before they are judged.
    pub ratio_scale: f32,
    /// `1 / ratio_scale`.
    inv_ratio_scale: f32,
    /// This frame's clear-sky shift of ln(R/B) against the library, when found
    /// (`library::clear_ratio_shift`).
    pub ratio_shift_measured: Option<f32>,
    /// The running mean of the shift after this frame (for [`Reference::keep_ratio_shift`]).
    pub ratio_shift_ln: f32,
    /// The exposure at which a clipped blue channel is judged
    /// ([`SegmentParams::exposure_past_clipping`]): the frame's own, else the frames' mean so far;
    /// `None` with the setting off or before any exposure was measured.
    pub clip_exposure: Option<f32>,
}

impl FrameReference<'_> {
    /// Reference R/B at a pixel.
    #[inline]
    pub fn at(&self, g: PixelGeom) -> f32 {
        self.at_with(g, self.params.default_reference(g.z_deg, g.gamma_deg))
    }

    /// Reference R/B at a pixel whose parametric default is given.
    #[inline]
    fn at_with(&self, g: PixelGeom, default_rb: f32) -> f32 {
        self.reference_in_bin(lib_index(g.z_deg, g.gamma_deg), default_rb)
    }

    /// Reference R/B of a pixel from its library bin ([`lib_index`]) and parametric default.
    #[inline]
    pub fn reference_in_bin(&self, bin: usize, default_rb: f32) -> f32 {
        if self.reference.weight[bin] > 0.5 { self.reference.lib[bin] } else { default_rb + self.offset }
    }

    /// Whether a sample in library bin `bin` cannot be judged by its ratio because the clear sky
    /// there clips ([`SegmentParams::library_keeps_clipped`]): a bright cloud and the clear sky both
    /// read as near-white there ([`FrameReference::judge_in_clipped_bin`] judges it instead).
    #[inline]
    fn clear_sky_clips(&self, bin: usize) -> bool {
        self.reference.clipped_marks_in_use && self.reference.clipped[bin]
    }

    /// The clear sky's R/B (in the library's colour balance) as this frame reads it in library bin
    /// `bin` when its blue channel clips at the frame's exposure
    /// ([`SegmentParams::exposure_past_clipping`]); `None` where the learned clear sky's blue
    /// stays below the saturation level at that exposure, or the bin has no learned value.
    #[inline]
    fn clipped_blue_reference(&self, bin: usize) -> Option<f32> {
        let e = self.clip_exposure?;
        let r = self.reference;
        let (v, lib) = (r.bright[bin], r.lib[bin]);
        if r.weight[bin] <= 0.5 || v <= 0.0 {
            return None;
        }
        // The library's brightness is the clear sky's largest channel: its blue, or its red where
        // the learned ratio (in the frame's balance) is above 1.
        let rb = lib * self.ratio_scale;
        let blue = e * v / rb.max(1.0);
        if blue < f32::from(self.params.saturation_level) {
            return None;
        }
        let red = rb * blue;
        Some(red.min(255.0) / blue.min(255.0) * self.inv_ratio_scale)
    }

    /// Reference R/B of a sample reading `rgb` in library bin `bin`, outside the glare: the clear
    /// sky's ratio as read at the frame's exposure where the sample's blue clips and so would the
    /// clear sky's ([`FrameReference::clipped_blue_reference`]), else the bin's
    /// ([`FrameReference::reference_in_bin`]). The map's cells and the per-pixel path share it.
    #[inline]
    fn reference_outside_glare(&self, rgb: [u8; 3], bin: usize, default_rb: f32) -> f32 {
        let clipped = if rgb[2] >= self.params.saturation_level { self.clipped_blue_reference(bin) } else { None };
        clipped.unwrap_or_else(|| self.reference_in_bin(bin, default_rb))
    }

    /// Whether sample `k` of `sky` is judged by its ratio alone in this frame (plain sky outside the
    /// glare) against a learned clear-sky reference (not the parametric default): the samples the
    /// far field's contrast correction measures and lifts (`distance`).
    #[inline]
    pub fn plain_and_learned(&self, sky: &SkyGeometry, k: usize) -> bool {
        sky.plain[k] && self.outside_glare(sky.gamma_deg[k]) && self.reference.weight[sky.bin[k] as usize] > 0.5
    }

    /// [`FrameReference::plain_and_learned`] of samples `0..n` (over slices, in one pass).
    ///
    /// # Panics
    /// When the geometry has fewer than `n` samples.
    ///
    /// Each bin's "learned" looked up once, and the three tests combined without branches (the same
    /// values as `plain && outside_glare && weight > 0.5` for every sample: every sample's bin is a
    /// library bin, placeholders included).
    pub fn plain_and_learned_all(&self, sky: &SkyGeometry, n: usize) -> Vec<bool> {
        let learned: Vec<bool> = self.reference.weight.iter().map(|w| *w > 0.5).collect();
        let glare = self.glare_zone_deg;
        sky.plain[..n].iter().zip(&sky.gamma_deg[..n]).zip(&sky.bin[..n]).map(|((p, g), b)| *p & (*g >= glare) & learned[*b as usize]).collect()
    }

    /// The class of a sample reading `rgb` in library bin `bin` of clipped clear sky
    /// ([`SegmentParams::judge_clipped_bins`]): clear where it clips as that clear sky does, thick
    /// where it reads below `1 − dark_cloud_margin` of the saturation level at the frame's exposure
    /// (1 when it was not measured), unknown in between (and always, with the setting off). With
    /// [`SegmentParams::exposure_past_clipping`] the dark test's level is not held at 255 (from an
    /// exposure of about 1.13 on, every unclipped sample here is then thick: the clear sky here
    /// reads at least the saturation level times the exposure, under a linear response), and in a
    /// frame exposed brighter than the clear day a sample whose blue clips but whose red
    /// still reads is thick where that red is below `1 − dark_cloud_margin` of the clear sky's red
    /// there (read on the clear day under its clipped blue) at the frame's exposure: a brighter
    /// exposure clips the blue of grey cloud that is darker than the clear sky.
    #[inline]
    fn judge_in_clipped_bin(&self, rgb: [u8; 3], bin: usize) -> Class {
        let p = self.params;
        if !p.judge_clipped_bins {
            return Class::Unknown;
        }
        if rgb.iter().any(|c| *c >= p.saturation_level) {
            // Clear only in a frame whose exposure was measured from its own clear samples: an
            // overcast frame has too few, and a camera that brightens it clips its bright cloud.
            let Some(e) = self.exposure else { return Class::Unknown };
            let sat = p.saturation_level;
            if p.exposure_past_clipping && p.dark_cloud_margin > 0.0 && e > 1.0 && rgb[2] >= sat && rgb[0] < sat {
                // A brighter exposure than the clear day's clipped this sample's blue but its red
                // still reads: the clear sky's red here at this exposure is the clear day's
                // (its ratio read under a clipped blue, taken as read at 255: an approximation,
                // the bin is marked from the saturation level on) times the exposure, in the
                // frame's colour balance.
                let red = e * self.reference.clipped_read[bin].0 * 255.0 * self.ratio_scale;
                if f32::from(rgb[0]) < (1.0 - p.dark_cloud_margin as f32) * red {
                    return Class::Thick;
                }
            }
            return Class::Clear;
        }
        // The clear sky here read at least the saturation level; past the clipping
        // ([`SegmentParams::exposure_past_clipping`]) at least that times the exposure.
        let at_exposure = self.exposure.unwrap_or(1.0) * f32::from(p.saturation_level);
        let expected = if p.exposure_past_clipping { at_exposure } else { at_exposure.min(255.0) };
        if p.dark_cloud_margin > 0.0 && crate::brightness::reading(rgb) < (1.0 - p.dark_cloud_margin as f32) * expected { Class::Thick } else { Class::Unknown }
    }

    /// Whether sample `k` of `sky`, reading `rgb`, is darker than the clear sky would be there
    /// (`brightness::darker_than_clear`): only plain samples outside the glare, with a learned
    /// brightness, in a frame whose exposure was measured.
    #[inline]
    pub fn darker_than_clear(&self, sky: &SkyGeometry, k: usize, rgb: [u8; 3]) -> bool {
        self.darker_than_clear_at(sky.sample(k), rgb)
    }

    /// [`FrameReference::darker_than_clear`] for one sample's geometry.
    #[inline]
    pub fn darker_than_clear_at(&self, g: SampleSky, rgb: [u8; 3]) -> bool {
        let Some(e) = self.exposure else { return false };
        let p = self.params;
        g.plain
            && self.outside_glare(g.gamma_deg)
            && crate::brightness::darker_than_clear(rgb, self.reference.bright[g.bin as usize], e, p.dark_cloud_margin as f32, p.dark_cloud_min_level as f32, p.exposure_past_clipping.then_some(f32::from(p.saturation_level)))
    }

    /// Whether a pixel at this angle from the sun is judged by its ratio alone in this frame.
    #[inline]
    pub fn outside_glare(&self, gamma_deg: f32) -> bool {
        gamma_deg >= self.glare_zone_deg
    }

    /// Score and class (as u8) of a pixel away from the sun's glare zone and within the zenith limit
    /// ([`SegmentParams::plain_sky`]), given its reference R/B: the same result as
    /// [`FrameReference::classify`] there, without branches.
    #[inline]
    pub fn classify_plain(&self, rgb: [u8; 3], reference_rb: f32, thick_score: f32) -> (f32, u8) {
        let p = self.params;
        let rb = rgb[0] as f32 / (rgb[2] as f32).max(1.0) * self.inv_ratio_scale;
        let contrast = p.cloud_rb as f32 - reference_rb;
        let denom = contrast.max(0.03);
        let s = (rb - reference_rb) / denom;
        // Where the clear sky is itself as white as cloud the ratio cannot tell them apart: unknown.
        let judged = (contrast >= MIN_CONTRAST) as u8;
        (s, judged * (1 + (s >= p.thin_score as f32) as u8 + (s >= thick_score) as u8))
    }

    /// The segmentation's one classification of a sample `k` of `sky` (a map cell or an image pixel):
    /// its reading, score and class (as u8). Plain sky ([`SegmentParams::plain_sky`] and outside this
    /// frame's glare) is judged from `plain_rgb` by [`FrameReference::classify_plain`]; near the sun,
    /// where clipping is judged, from `exact_rgb` (the nearest pixel: interpolation would blur a
    /// clipped disc's edge into near-white unclipped values) by [`FrameReference::classify_with`].
    #[inline]
    pub fn classify_sample(&self, sky: &SkyGeometry, k: usize, z_deg: f32, plain_rgb: impl FnOnce() -> [u8; 3], exact_rgb: impl FnOnce() -> [u8; 3]) -> ([u8; 3], f32, u8) {
        self.classify_at(sky.sample(k), z_deg, plain_rgb, exact_rgb)
    }

    /// [`FrameReference::classify_sample`] for one sample's geometry (read once from the
    /// [`SkyGeometry`], e.g. from slices of known length in a map's loop over its cells).
    #[inline]
    pub fn classify_at(&self, g: SampleSky, z_deg: f32, plain_rgb: impl FnOnce() -> [u8; 3], exact_rgb: impl FnOnce() -> [u8; 3]) -> ([u8; 3], f32, u8) {
        if g.plain && self.outside_glare(g.gamma_deg) {
            let rgb = plain_rgb();
            if self.clear_sky_clips(g.bin as usize) {
                let c = self.judge_in_clipped_bin(rgb, g.bin as usize);
                return (rgb, f32::NAN, c as u8);
            }
            let (s, c) = self.classify_plain(rgb, self.reference_outside_glare(rgb, g.bin as usize, g.default_rb), g.thick_score);
            (rgb, s, c)
        } else {
            let rgb = exact_rgb();
            let (s, c) = self.classify_with(rgb, PixelGeom { z_deg, gamma_deg: g.gamma_deg }, g.default_rb);
            (rgb, s, c as u8)
        }
    }

    /// Cloudiness score and class of one pixel.
    #[inline]
    pub fn classify(&self, rgb: [u8; 3], g: PixelGeom) -> (f32, Class) {
        self.classify_with(rgb, g, self.params.default_reference(g.z_deg, g.gamma_deg))
    }

    /// [`FrameReference::classify`] with the pixel's parametric default reference given
    /// ([`SegmentParams::default_reference`]; a cloud map computes it once per cell and sun position).
    #[inline]
    pub fn classify_with(&self, rgb: [u8; 3], g: PixelGeom, default_rb: f32) -> (f32, Class) {
        let p = self.params;
        if g.z_deg > p.max_zenith_deg as f32 {
            return (f32::NAN, Class::Unknown);
        }
        let sat = p.saturation_level;
        if g.gamma_deg < p.sun_exclusion_deg as f32 && rgb[0] >= sat && rgb[1] >= sat && rgb[2] >= sat {
            return (f32::NAN, Class::Unknown);
        }
        let bin = lib_index(g.z_deg, g.gamma_deg);
        if self.clear_sky_clips(bin) {
            // Judged by brightness outside the glare; within it (beyond the sun's own disc) only a
            // sample judged thick is (darker than the clear sky, or with a brighter exposure a red
            // darker than its red): one that reads as the clipped clear sky may be the bloom over
            // cloud, and glare only brightens.
            let j = self.judge_in_clipped_bin(rgb, bin);
            return (f32::NAN, if self.outside_glare(g.gamma_deg) || (j == Class::Thick && g.gamma_deg >= p.sun_exclusion_deg as f32) { j } else { Class::Unknown });
        }
        let rb = rgb[0] as f32 / (rgb[2] as f32).max(1.0) * self.inv_ratio_scale;
        // Outside the glare a clipped blue is judged as the map's cells are (`classify_at`).
        let r = if self.outside_glare(g.gamma_deg) { self.reference_outside_glare(rgb, bin, default_rb) } else { self.reference_in_bin(bin, default_rb) };
        let denom = (p.cloud_rb as f32 - r).max(0.03);
        let s = (rb - r) / denom;
        if p.cloud_rb as f32 - r < MIN_CONTRAST {
            return (f32::NAN, Class::Unknown);
        }
        if g.gamma_deg < self.glare_zone_deg && rgb[2] >= sat {
            // Blue is clipped, so the true ratio is at most R/255: clear when even that bound is
            // clear, else not judged.
            return if s < p.thin_score as f32 {
                (s, Class::Clear)
            } else if g.gamma_deg < self.glare_extent_deg || self.glare_ring[(g.gamma_deg as usize).min(GLARE_RINGS - 1)] {
                (f32::NAN, Class::Unknown)
            } else {
                (s, Class::Thick)
            };
        }
        let c = if s >= p.thick_at(g.z_deg) {
            Class::Thick
        } else if s >= p.thin_score as f32 {
            Class::Thin
        } else {
            Class::Clear
        };
        (s, c)
    }
}


/// A segmented image.
#[derive(Debug, Clone)]
pub struct Segmentation {
    /// Class per pixel ([`Class`] as u8).
    pub classes: image::GrayImage,
    /// Cloudy share of classified sky pixels within the cloud-fraction zenith.
    pub cloud_fraction: f64,
    /// The frame's reference offset.
    pub offset: f32,
}

/// Per-pixel geometry of an image: zenith and unit ENU direction, with the sky mask.
#[derive(Debug, Clone)]
pub struct ImageGeometry {
    /// Width.
    pub width: u32,
    /// Height.
    pub height: u32,
    /// Zenith \[°\] per pixel; NaN outside the sky.
    pub z_deg: Vec<f32>,
    /// Unit ENU direction per pixel.
    pub dir: Vec<[f32; 3]>,
}

impl ImageGeometry {
    /// From a camera and an optional obstruction mask (white = sky).
    pub fn from_camera(cam: &Camera, obstruction: Option<&image::GrayImage>) -> ImageGeometry {
        use rayon::prelude::*;
        let (w, h) = (cam.width_px as usize, cam.height_px as usize);
        let v: Vec<(f32, [f32; 3])> = (0..w * h)
            .into_par_iter()
            .map(|i| {
                let (x, y) = ((i % w) as u32, (i / w) as u32);
                let blocked = obstruction.map(|m| m.get_pixel(x, y).0[0] < 128).unwrap_or(false);
                match cam.unproject_enu(x as f64, y as f64) {
                    Some(d) if !blocked && d[2] > 0.0 => (d[2].acos().to_degrees() as f32, [d[0] as f32, d[1] as f32, d[2] as f32]),
                    _ => (f32::NAN, [0.0; 3]),
                }
            })
            .collect();
        ImageGeometry { width: cam.width_px, height: cam.height_px, z_deg: v.iter().map(|p| p.0).collect(), dir: v.iter().map(|p| p.1).collect() }
    }
}

/// Angle \[°\] between a pixel direction and the sun direction; 180 without a sun.
#[inline]
pub fn gamma_deg(dir: [f32; 3], sun: Option<[f32; 3]>) -> f32 {
    match sun {
        Some(s) => acos_approx(dir[0] * s[0] + dir[1] * s[1] + dir[2] * s[2]).to_degrees(),
        None => 180.0,
    }
}

/// Arc cosine \[rad\] by the polynomial of Abramowitz & Stegun (1964), eq. 4.4.46 (absolute error
/// ≤ 2·10⁻⁸ rad on [0, 1]; `acos(−x) = π − acos(x)`), inlined where `f32::acos` is a library call.
#[inline]
pub fn acos_approx(x: f32) -> f32 {
    const A: [f32; 8] = [std::f32::consts::FRAC_PI_2, -0.214_598_8, 0.088_978_99, -0.050_174_304, 0.030_891_88, -0.017_088_126, 0.006_670_09, -0.001_262_491_1];
    let a = x.abs().min(1.0);
    let p = A[0] + a * (A[1] + a * (A[2] + a * (A[3] + a * (A[4] + a * (A[5] + a * (A[6] + a * A[7]))))));
    let r = (1.0 - a).sqrt() * p;
    if x < 0.0 { std::f32::consts::PI - r } else { r }
}

/// Segment a whole image, pixel by pixel, through the same path as the engine's map
/// ([`SkyGeometry`], [`FrameReference::classify_sample`], [`crate::distance::far_thickness`]); only the samples differ
/// (every pixel here, one reading per cell there).
pub fn segment_image(
    img: &image::RgbImage,
    geom: &ImageGeometry,
    sun_dir: Option<[f32; 3]>,
    params: &SegmentParams,
    reference: &Reference,
) -> Segmentation {
    let (w, h) = (geom.width as usize, geom.height as usize);
    let raw = img.as_raw();
    let px = |i: usize| [raw[3 * i], raw[3 * i + 1], raw[3 * i + 2]];
    let seen = |i: usize| !geom.z_deg[i].is_nan();
    let sky = SkyGeometry::from_directions(&geom.z_deg, &geom.dir, seen, sun_dir, params);
    let g = |i: usize| PixelGeom { z_deg: geom.z_deg[i], gamma_deg: sky.gamma_deg[i] };
    let sample = (0..w * h).step_by(2).filter(|&i| seen(i)).map(|i| (px(i), g(i), sky.default_rb[i]));
    let fr = reference.for_frame_with(params, sample);
    let mut classes = vec![0u8; w * h];
    let mut score = vec![f32::NAN; w * h];
    let mut dark = vec![false; if fr.exposure.is_some() { w * h } else { 0 }];
    for i in (0..w * h).filter(|&i| seen(i)) {
        let (rgb, s, c) = fr.classify_sample(&sky, i, geom.z_deg[i], || px(i), || px(i));
        (score[i], classes[i]) = (s, c);
        if let Some(d) = dark.get_mut(i) {
            *d = fr.darker_than_clear(&sky, i, rgb);
        }
    }
    if params.distant_contrast {
        let learned = fr.plain_and_learned_all(&sky, w * h);
        crate::distance::correct(&score, &geom.z_deg, &learned, &mut classes, |z| params.thick_at(z));
    }
    crate::distance::far_thickness(&mut classes, &score, &geom.z_deg, params);
    crate::brightness::promote_dark(&mut classes, &geom.z_deg, &dark);
    let (mut cloudy, mut counted) = (0usize, 0usize);
    for i in (0..w * h).filter(|&i| seen(i) && geom.z_deg[i] < params.cloud_fraction_zenith_deg as f32) {
        if classes[i] != Class::Unknown as u8 {
            counted += 1;
            cloudy += usize::from(classes[i] != Class::Clear as u8);
        }
    }
    Segmentation {
        classes: image::GrayImage::from_raw(w as u32, h as u32, classes).expect("w*h buffer"),
        cloud_fraction: if counted > 0 { cloudy as f64 / counted as f64 } else { f64::NAN },
        offset: fr.offset,
    }
}

#[cfg(test)]
mod tests;
