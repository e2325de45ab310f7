//! What the segmentation needs of each sample (a map cell or an image pixel) that changes only
//! with the sun, built once per grid and sun position ([`SkyGeometry`]), with its per-sample views.
use super::{SegmentParams, gamma_deg, lib_index};

/// A [`SkyGeometry`]'s entries of samples `0..n` as slices of length `n` ([`SkyGeometry::slices`]).
#[derive(Debug, Clone, Copy)]
pub struct SkySlices<'a> {
    plain: &'a [bool],
    gamma_deg: &'a [f32],
    bin: &'a [u16],
    default_rb: &'a [f32],
    thick_score: &'a [f32],
}

impl SkySlices<'_> {
    /// Sample `k`'s entries.
    #[inline]
    pub fn get(&self, k: usize) -> SampleSky {
        SampleSky { plain: self.plain[k], gamma_deg: self.gamma_deg[k], bin: self.bin[k], default_rb: self.default_rb[k], thick_score: self.thick_score[k] }
    }
}

/// What the segmentation needs of each sample (a map cell or an image pixel) that changes only with
/// the sun: its angle to the sun \[°\] (180 without a sun), parametric default reference R/B,
/// library bin, whether it is judged by its ratio alone, and its thick-cloud score. The engine's map
/// (`cloudmap::CellSky`) and [`segment_image`] build it the same way and classify through
/// [`FrameReference::classify_sample`]: one segmentation path.
#[derive(Debug, Clone)]
pub struct SkyGeometry {
    /// Angle to the sun per sample \[°\].
    pub gamma_deg: Vec<f32>,
    /// Parametric default reference R/B per sample ([`SegmentParams::default_reference`]).
    pub default_rb: Vec<f32>,
    /// Library bin per sample ([`lib_index`]).
    pub bin: Vec<u16>,
    /// Whether the sample is judged by its ratio alone ([`SegmentParams::plain_sky`]).
    pub plain: Vec<bool>,
    /// Score from which the sample is thick cloud ([`SegmentParams::thick_at`]).
    pub thick_score: Vec<f32>,
}

/// One sample's entries of a [`SkyGeometry`].
#[derive(Debug, Clone, Copy)]
pub struct SampleSky {
    /// Whether the sample is judged by its ratio alone.
    pub plain: bool,
    /// Angle to the sun \[°\].
    pub gamma_deg: f32,
    /// Library bin.
    pub bin: u16,
    /// Parametric default reference R/B.
    pub default_rb: f32,
    /// Score from which the sample is thick cloud.
    pub thick_score: f32,
}

impl SkyGeometry {
    /// Sample `k`'s entries.
    #[inline]
    pub fn sample(&self, k: usize) -> SampleSky {
        SampleSky { plain: self.plain[k], gamma_deg: self.gamma_deg[k], bin: self.bin[k], default_rb: self.default_rb[k], thick_score: self.thick_score[k] }
    }

    /// The entries of samples `0..n`, as slices of length `n` (for loops without bounds checks).
    ///
    /// # Panics
    /// When the geometry has fewer than `n` samples.
    pub fn slices(&self, n: usize) -> SkySlices<'_> {
        SkySlices { plain: &self.plain[..n], gamma_deg: &self.gamma_deg[..n], bin: &self.bin[..n], default_rb: &self.default_rb[..n], thick_score: &self.thick_score[..n] }
    }

    /// From each sample's zenith \[°\] and unit ENU direction; samples for which `seen` is false keep
    /// placeholders and are never classified.
    pub fn from_directions(z_deg: &[f32], dir: &[[f32; 3]], seen: impl Fn(usize) -> bool, sun_dir: Option<[f32; 3]>, params: &SegmentParams) -> SkyGeometry {
        let n = z_deg.len();
        let (z_deg, dir) = (&z_deg[..n], &dir[..n]);
        // In passes over slices, the same operations per sample as `gamma_deg`,
        // `SegmentParams::default_reference`, `lib_index`, `plain_sky` and `thick_at` (so the same
        // values bit for bit): the sun angles for every sample (branch-free, so the pass
        // vectorizes), the exponential of the default reference (a library call), then the entries
        // of the samples seen. Per sample in one loop they took about three times the
        // instructions (a 1024² frame's 65,536 cells every few frames).
        let mut gamma: Vec<f32> = dir.iter().map(|d| gamma_deg(*d, sun_dir)).collect();
        let scale_deg = params.reference_gamma_scale_deg as f32;
        let glow: Vec<f32> = gamma.iter().map(|g| (-g / scale_deg).exp()).collect();
        let (c0, c1, c2) = (params.reference_c0 as f32, params.reference_c1 as f32, params.reference_c2 as f32);
        let (max_z, min_gamma) = (params.max_zenith_deg as f32, params.sun_exclusion_deg.max(params.glare_zone_deg) as f32);
        let (thick, drop) = (params.thick_score as f32, params.thick_horizon_drop as f32);
        let (mut default_rb, mut bin, mut plain, mut thick_score) = (vec![0.0; n], vec![0; n], vec![false; n], vec![0.0; n]);
        let (rb_s, bin_s, plain_s, thick_s, gamma_s, glow) = (&mut default_rb[..n], &mut bin[..n], &mut plain[..n], &mut thick_score[..n], &mut gamma[..n], &glow[..n]);
        for k in 0..n {
            if !seen(k) {
                gamma_s[k] = 180.0;
                continue;
            }
            let (z, g) = (z_deg[k], gamma_s[k]);
            let zr = z / 90.0;
            rb_s[k] = c0 + c1 * glow[k] + c2 * zr * zr * zr * zr;
            bin_s[k] = lib_index(z, g) as u16;
            plain_s[k] = z <= max_z && g >= min_gamma;
            thick_s[k] = thick - drop * zr * zr * zr * zr;
        }
        SkyGeometry { gamma_deg: gamma, default_rb, bin, plain, thick_score }
    }
}
