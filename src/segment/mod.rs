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

use crate::camera::Camera;

pub mod brightness;
pub mod distance;
mod library;
mod params;
pub use params::SegmentParams;
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
        if p.dark_cloud_margin > 0.0 && crate::segment::brightness::reading(rgb) < (1.0 - p.dark_cloud_margin as f32) * expected { Class::Thick } else { Class::Unknown }
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
            && crate::segment::brightness::darker_than_clear(rgb, self.reference.bright[g.bin as usize], e, p.dark_cloud_margin as f32, p.dark_cloud_min_level as f32, p.exposure_past_clipping.then_some(f32::from(p.saturation_level)))
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
/// ([`SkyGeometry`], [`FrameReference::classify_sample`], [`crate::segment::distance::far_thickness`]); only the samples differ
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
        crate::segment::distance::correct(&score, &geom.z_deg, &learned, &mut classes, |z| params.thick_at(z));
    }
    crate::segment::distance::far_thickness(&mut classes, &score, &geom.z_deg, params);
    crate::segment::brightness::promote_dark(&mut classes, &geom.z_deg, &dark);
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
