//! Cloud base height (CBH) from two sky cameras (stereo): the height at which the two cameras'
//! cloud maps agree best.
//!
//! # Method
//!
//! A camera measures only directions. A cloud point `X` at the true height `H`, projected by camera
//! `A` (at `p_A`) onto a plane at a candidate height `h`, lands at `p_A + (X − p_A) · h / H`
//! (heights from the cameras); camera `B` puts it at `p_B + (X − p_B) · h / H`. The two projections
//! differ by `(p_A − p_B) · (1 − h / H)`: they coincide only at `h = H`. So for each candidate
//! height on a log-spaced scan ([`StereoParams::min_height_m`] to [`StereoParams::max_height_m`])
//! both cameras' cloudiness-score maps are built on one grid on the plane at that height (the
//! engine's own tables and segmentation: [`Lut::build_from`] with each camera's position,
//! [`build_map`]), centred between the cameras, with the same angular coverage at every height
//! (the grid's extent grows with `h`). Their agreement is the normalized cross-correlation (NCC)
//! of the two score maps over the cells both cameras see within [`StereoParams::max_zenith_deg`],
//! each map first high-passed (its local mean over a box of [`StereoParams::highpass_cells`]
//! removed), so smooth trends tied to each camera's own view (horizon brightening, the
//! circumsolar sky) do not correlate at every height. The estimate is the scan's best height,
//! refined by a parabola through the best NCC and its two neighbours in `ln h`.
//!
//! **Uncertainty** (one sigma of `ln h`): a spatial block bootstrap. The grid is cut into
//! [`StereoParams::tiles`]² tiles (in grid-index space, so a tile covers the same part of the sky at
//! every height); each tile keeps the sufficient statistics of the NCC at every height, so a
//! resample of tiles (with replacement, [`StereoParams::resamples`] draws, deterministic) gives a
//! whole NCC curve and its refined peak. Sigma is the standard deviation of the resampled peaks,
//! never below half a scan step. This measures how much the peak depends on which clouds happened
//! to be in view; it does not measure calibration errors of the cameras or their positions.
//!
//! **Refused** ([`NoStereo`]) when no height has [`StereoParams::min_overlap_cells`] cells seen by
//! both cameras, when at the best height either map's high-passed score varies by less than
//! [`StereoParams::min_texture_std`] (clear sky, uniform overcast), when the peak is weak or flat
//! (NCC under [`StereoParams::min_peak_ncc`], or less than [`StereoParams::min_contrast`] above
//! the scan's median), when the best height is at an end of the scan, or when the bootstrap's sigma
//! exceeds [`StereoParams::max_rel_sigma`] (the peak is not pinned down).
//!
//! Heights are above camera `A` (the engine adds its height to put them above the site origin);
//! camera positions are (east, north, up) in metres in one site frame.
//!
//! Published basis: stereographic CBH from two sky imagers, Nguyen & Kleissl 2014, *Solar Energy*
//! (from memory, not checked). The settings below are own first choices, not tuned.

use crate::camera::Camera;
use crate::cloudmap::{Grid, Lut, build_map};
use crate::segment::{Reference, SegmentParams};

/// One camera of a stereo pair with its frame.
#[derive(Debug, Clone, Copy)]
pub struct StereoView<'a> {
    /// The calibrated camera.
    pub camera: &'a Camera,
    /// Obstruction mask (white = sky), if any.
    pub obstruction: Option<&'a image::GrayImage>,
    /// Position (east, north, up) in the site frame \[m\].
    pub position_m: [f64; 3],
    /// The camera's clear-sky reference.
    pub reference: &'a Reference,
    /// The frame.
    pub image: &'a image::RgbImage,
}

/// Settings of the stereo estimator (own first choices, no source).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StereoParams {
    /// Lowest candidate height above camera A \[m\].
    pub min_height_m: f64,
    /// Highest candidate height \[m\].
    pub max_height_m: f64,
    /// Candidate heights (log-spaced).
    pub heights: usize,
    /// Cells along each side of the common grid.
    pub cells: usize,
    /// Cells are used out to this zenith angle from each camera \[°\].
    pub max_zenith_deg: f64,
    /// Half width of the high-pass box \[cells\] (0: no high-pass).
    pub highpass_cells: usize,
    /// The grid is cut into this many tiles per side for the bootstrap.
    pub tiles: usize,
    /// Bootstrap resamples.
    pub resamples: usize,
    /// Fewest cells seen by both cameras for a height to count.
    pub min_overlap_cells: usize,
    /// Smallest standard deviation of each high-passed score map at the best height.
    pub min_texture_std: f64,
    /// Smallest NCC at the peak.
    pub min_peak_ncc: f64,
    /// Smallest NCC of the peak above the scan's median.
    pub min_contrast: f64,
    /// Largest one-sigma uncertainty (sigma of `ln h`) of an estimate given.
    pub max_rel_sigma: f64,
}

impl Default for StereoParams {
    fn default() -> Self {
        Self {
            min_height_m: 300.0,
            max_height_m: 8000.0,
            heights: 48,
            cells: 160,
            max_zenith_deg: 65.0,
            highpass_cells: 12,
            tiles: 8,
            resamples: 64,
            min_overlap_cells: 800,
            min_texture_std: 0.03,
            min_peak_ncc: 0.3,
            min_contrast: 0.1,
            max_rel_sigma: 0.35,
        }
    }
}

impl StereoParams {
    /// The candidate heights \[m\], log-spaced.
    pub fn scan_heights_m(&self) -> Vec<f64> {
        let n = self.heights.max(3);
        let (a, b) = (self.min_height_m.ln(), self.max_height_m.ln());
        (0..n).map(|i| (a + (b - a) * i as f64 / (n - 1) as f64).exp()).collect()
    }

    /// The common grid at a candidate height: centred between the cameras, reaching
    /// `h tan(max_zenith)` beyond each camera.
    pub fn grid(&self, height_m: f64, baseline_m: f64) -> Grid {
        let extent = 2.0 * height_m * self.max_zenith_deg.to_radians().tan() + baseline_m;
        Grid { n: self.cells, cell_m: extent / self.cells as f64, height_m }
    }
}

/// A stereo estimate.
#[derive(Debug, Clone, PartialEq)]
pub struct StereoFit {
    /// Cloud base height above camera A \[m\].
    pub cbh_m: f64,
    /// One-sigma uncertainty as the sigma of `ln h` (block bootstrap, at least half a scan step).
    pub rel_sigma: f64,
    /// NCC at the best scan height.
    pub peak_ncc: f64,
    /// Median NCC over the scan.
    pub median_ncc: f64,
    /// Cells seen by both cameras at the best scan height.
    pub overlap_cells: usize,
    /// The scan: (height \[m\], NCC; NaN where the overlap was too small).
    pub curve: Vec<(f64, f64)>,
}

impl StereoFit {
    /// One-sigma uncertainty \[m\] (`cbh_m` times the sigma of `ln h`).
    pub fn sigma_m(&self) -> f64 {
        self.cbh_m * self.rel_sigma
    }
}

/// Why no stereo estimate was given.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum NoStereo {
    /// The cameras stand (almost) at one place: no baseline.
    #[error("the cameras are {baseline_m:.1} m apart; stereo needs a baseline of at least {min_m} m")]
    NoBaseline {
        /// Horizontal distance \[m\].
        baseline_m: f64,
        /// Least distance \[m\].
        min_m: f64,
    },
    /// Too few cells seen by both cameras at every height.
    #[error("at most {cells} cells are seen by both cameras (need {needed})")]
    TooLittleOverlap {
        /// Most overlapping cells at any height.
        cells: usize,
        /// Needed.
        needed: usize,
    },
    /// The sky has too little structure to match (clear or uniform).
    #[error("too little texture: score standard deviation {std:.3} (need {needed})")]
    WeakTexture {
        /// The smaller of the two maps' standard deviations at the best height.
        std: f64,
        /// Needed.
        needed: f64,
    },
    /// The agreement has no clear peak.
    #[error("flat agreement: peak NCC {peak:.3}, median {median:.3}")]
    FlatPeak {
        /// Best NCC.
        peak: f64,
        /// Median NCC.
        median: f64,
    },
    /// The peak moves too much between resamples of the sky.
    #[error("ambiguous peak: one-sigma uncertainty {rel_sigma:.2} of ln h (at most {max})")]
    Ambiguous {
        /// Sigma of `ln h`.
        rel_sigma: f64,
        /// Allowed.
        max: f64,
    },
    /// The best height is an end of the scan.
    #[error("best agreement at the end of the scan ({height_m:.0} m)")]
    AtScanEnd {
        /// That height \[m\].
        height_m: f64,
    },
}

/// Least horizontal baseline \[m\].
pub const MIN_BASELINE_M: f64 = 50.0;

/// Sufficient statistics of the NCC of two maps over some cells: count, Σa, Σb, Σa², Σb², Σab.
type Sums = [f64; 6];

fn ncc_of(s: &Sums) -> (f64, f64, f64) {
    let n = s[0];
    if n < 2.0 {
        return (f64::NAN, 0.0, 0.0);
    }
    let (ma, mb) = (s[1] / n, s[2] / n);
    let va = (s[3] / n - ma * ma).max(0.0);
    let vb = (s[4] / n - mb * mb).max(0.0);
    let cov = s[5] / n - ma * mb;
    let d = (va * vb).sqrt();
    (if d > 1e-12 { cov / d } else { f64::NAN }, va.sqrt(), vb.sqrt())
}

/// Subtract each valid cell's local mean over a `(2r+1)²` box of valid cells (summed-area tables).
fn highpass(map: &[f32], valid: &[bool], n: usize, r: usize) -> Vec<f32> {
    if r == 0 {
        return map.to_vec();
    }
    let w = n + 1;
    let (mut s, mut c) = (vec![0f64; w * w], vec![0u32; w * w]);
    for j in 0..n {
        for i in 0..n {
            let k = j * n + i;
            let (v, m) = if valid[k] { (map[k] as f64, 1) } else { (0.0, 0) };
            s[(j + 1) * w + i + 1] = v + s[j * w + i + 1] + s[(j + 1) * w + i] - s[j * w + i];
            c[(j + 1) * w + i + 1] = m + c[j * w + i + 1] + c[(j + 1) * w + i] - c[j * w + i];
        }
    }
    let mut out = vec![f32::NAN; n * n];
    for j in 0..n {
        for i in 0..n {
            let k = j * n + i;
            if !valid[k] {
                continue;
            }
            let (i0, i1, j0, j1) = (i.saturating_sub(r), (i + r + 1).min(n), j.saturating_sub(r), (j + r + 1).min(n));
            let box_s = s[j1 * w + i1] - s[j0 * w + i1] - s[j1 * w + i0] + s[j0 * w + i0];
            let box_c = c[j1 * w + i1] + c[j0 * w + i0] - c[j0 * w + i1] - c[j1 * w + i0];
            out[k] = map[k] - (box_s / box_c.max(1) as f64) as f32;
        }
    }
    out
}

/// Per-tile sums of one height's pair of score maps (NaN = not seen), after the high-pass, for
/// each of `groups` groups of cells: without `member` every cell seen by both cameras is in group
/// 0; with it, cell `k` is in group `g` when bit `g` of `member[k]` is set. Also the cells of
/// each group.
fn tile_sums(a: &[f32], b: &[f32], n: usize, p: &StereoParams, member: Option<&[u8]>, groups: usize) -> (Vec<Vec<Sums>>, Vec<usize>) {
    let valid: Vec<bool> = a.iter().zip(b).map(|(x, y)| x.is_finite() && y.is_finite()).collect();
    let (ha, hb) = (highpass(a, &valid, n, p.highpass_cells), highpass(b, &valid, n, p.highpass_cells));
    let t = p.tiles.max(1);
    let mut sums = vec![vec![[0.0; 6]; t * t]; groups];
    let mut cells = vec![0; groups];
    for j in 0..n {
        for i in 0..n {
            let k = j * n + i;
            if !valid[k] {
                continue;
            }
            let bits = member.map_or(1, |m| m[k]);
            let (x, y) = (ha[k] as f64, hb[k] as f64);
            for g in (0..groups).filter(|g| bits & (1 << g) != 0) {
                cells[g] += 1;
                let s = &mut sums[g][(j * t / n) * t + i * t / n];
                s[0] += 1.0;
                s[1] += x;
                s[2] += y;
                s[3] += x * x;
                s[4] += y * y;
                s[5] += x * y;
            }
        }
    }
    (sums, cells)
}

/// The index of the best finite value and its parabola-refined position (in scan steps).
fn refined_peak(v: &[f64]) -> Option<(usize, f64)> {
    let (i, _) = v.iter().enumerate().filter(|(_, x)| x.is_finite()).max_by(|a, b| a.1.total_cmp(b.1))?;
    let mut x = i as f64;
    if i > 0 && i + 1 < v.len() && v[i - 1].is_finite() && v[i + 1].is_finite() {
        let (a, b, c) = (v[i - 1], v[i], v[i + 1]);
        let den = a - 2.0 * b + c;
        if den < 0.0 {
            x += (0.5 * (a - c) / den).clamp(-0.5, 0.5);
        }
    }
    Some((i, x))
}

/// Spread (standard deviation) of the peak's ln height over a spatial block bootstrap: each of
/// `resamples` draws weights the `n_tiles` tiles by how often they were drawn with replacement
/// (xorshift, seeded by `seed` so the result is reproducible), `curve` gives the NCC curve for
/// those weights, and `ln_at` turns a refined peak index into ln height.
fn bootstrap_ln_sd(curve: &dyn Fn(&[f64]) -> Vec<f64>, n_tiles: usize, resamples: usize, seed: u64, ln_at: &dyn Fn(f64) -> f64) -> f64 {
    let mut state = 0x9E37_79B9_7F4A_7C15u64 ^ seed.wrapping_mul(0x2545_F491_4F6C_DD1D);
    let mut next = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        state
    };
    let mut draws = Vec::with_capacity(resamples);
    for _ in 0..resamples {
        let mut w = vec![0.0; n_tiles];
        for _ in 0..n_tiles {
            w[(next() % n_tiles as u64) as usize] += 1.0;
        }
        if let Some((_, xb)) = refined_peak(&curve(&w)) {
            draws.push(ln_at(xb));
        }
    }
    let m = draws.iter().sum::<f64>() / draws.len().max(1) as f64;
    (draws.iter().map(|v| (v - m).powi(2)).sum::<f64>() / (draws.len().max(2) - 1) as f64).sqrt()
}

/// The estimator on score maps given per candidate height: `maps(h)` returns camera A's and
/// camera B's cloudiness-score maps (`cells × cells`, row-major, NaN where not seen) on the
/// common grid at height `h` above camera A. [`estimate`] gives it the engine's maps; unit tests
/// give it synthetic ones.
///
/// # Errors
/// [`NoStereo`] (see the module docs).
pub fn estimate_with(p: &StereoParams, mut maps: impl FnMut(f64) -> [Vec<f32>; 2]) -> Result<StereoFit, NoStereo> {
    let mut fits = estimate_groups_with(p, 1, |h| (maps(h), None));
    fits.remove(0)
}

/// [`estimate_with`] for each of `groups` groups of cells (at most 8): `maps(h)` also returns, per
/// cell, the groups it belongs to as bits (bit `g` for group `g`; `None`: every cell in group 0).
/// Each group gets its own agreement curve, peak, bootstrap and refusals, as if its cells were the
/// whole sky; [`estimate_layers`] makes one group per cloud layer.
pub fn estimate_groups_with(p: &StereoParams, groups: usize, mut maps: impl FnMut(f64) -> ([Vec<f32>; 2], Option<Vec<u8>>)) -> Vec<Result<StereoFit, NoStereo>> {
    let groups = groups.clamp(1, 8);
    let heights = p.scan_heights_m();
    let mut per_height: Vec<Vec<Vec<Sums>>> = vec![Vec::with_capacity(heights.len()); groups];
    let mut overlap: Vec<Vec<usize>> = vec![Vec::with_capacity(heights.len()); groups];
    for &h in &heights {
        let ([a, b], member) = maps(h);
        let (sums, cells) = tile_sums(&a, &b, p.cells, p, member.as_deref(), groups);
        for (g, (s, c)) in sums.into_iter().zip(cells).enumerate() {
            per_height[g].push(s);
            overlap[g].push(c);
        }
    }
    per_height.iter().zip(&overlap).map(|(ph, ov)| fit_curve(p, &heights, ph, ov)).collect()
}

/// The peak of one group's agreement over the scan (`per_height[i]` its tiles' sums at
/// `heights[i]`, `overlap[i]` its cells), its bootstrap uncertainty and the refusals.
fn fit_curve(p: &StereoParams, heights: &[f64], per_height: &[Vec<Sums>], overlap: &[usize]) -> Result<StereoFit, NoStereo> {
    let max_overlap = overlap.iter().copied().max().unwrap_or(0);
    if max_overlap < p.min_overlap_cells {
        return Err(NoStereo::TooLittleOverlap { cells: max_overlap, needed: p.min_overlap_cells });
    }
    let curve_with = |weights: &[f64]| -> Vec<f64> {
        per_height
            .iter()
            .zip(overlap)
            .map(|(tiles, &cells)| {
                if cells < p.min_overlap_cells {
                    return f64::NAN;
                }
                let mut s = [0.0; 6];
                for (t, w) in tiles.iter().zip(weights) {
                    for q in 0..6 {
                        s[q] += w * t[q];
                    }
                }
                ncc_of(&s).0
            })
            .collect()
    };
    let n_tiles = p.tiles.max(1).pow(2);
    let ncc = curve_with(&vec![1.0; n_tiles]);
    let curve: Vec<(f64, f64)> = heights.iter().copied().zip(ncc.iter().copied()).collect();
    let Some((best, x)) = refined_peak(&ncc) else {
        return Err(NoStereo::FlatPeak { peak: f64::NAN, median: f64::NAN });
    };
    let mut total = [0.0; 6];
    for t in &per_height[best] {
        for q in 0..6 {
            total[q] += t[q];
        }
    }
    let (_, sa, sb) = ncc_of(&total);
    if sa.min(sb) < p.min_texture_std {
        return Err(NoStereo::WeakTexture { std: sa.min(sb), needed: p.min_texture_std });
    }
    let mut sorted: Vec<f64> = ncc.iter().copied().filter(|v| v.is_finite()).collect();
    sorted.sort_by(f64::total_cmp);
    let median = sorted[sorted.len() / 2];
    if ncc[best] < p.min_peak_ncc || ncc[best] - median < p.min_contrast {
        return Err(NoStereo::FlatPeak { peak: ncc[best], median });
    }
    let finite_idx: Vec<usize> = (0..ncc.len()).filter(|&i| ncc[i].is_finite()).collect();
    if Some(&best) == finite_idx.first() || Some(&best) == finite_idx.last() {
        return Err(NoStereo::AtScanEnd { height_m: heights[best] });
    }
    let step = (p.max_height_m / p.min_height_m).ln() / (heights.len() - 1) as f64;
    let ln_at = |x: f64| p.min_height_m.ln() + x * step;
    let sd = bootstrap_ln_sd(&curve_with, n_tiles, p.resamples, max_overlap as u64, &ln_at);
    let rel_sigma = sd.max(0.5 * step);
    if rel_sigma > p.max_rel_sigma {
        return Err(NoStereo::Ambiguous { rel_sigma, max: p.max_rel_sigma });
    }
    Ok(StereoFit {
        cbh_m: ln_at(x).exp(),
        rel_sigma,
        peak_ncc: ncc[best],
        median_ncc: median,
        overlap_cells: overlap[best],
        curve,
    })
}

/// The stereo estimate from two cameras' frames taken at (nearly) the same time, with the sun
/// direction (unit ENU) and the segmentation settings of the engine.
///
/// # Errors
/// [`NoStereo`] (see the module docs).
pub fn estimate(a: &StereoView, b: &StereoView, sun_dir: Option<[f32; 3]>, seg: &SegmentParams, p: &StereoParams) -> Result<StereoFit, NoStereo> {
    estimate_pair(a, b, sun_dir, seg, p, None).remove(0)
}

/// The stereo estimate per cloud layer: each layer's cells ([`LayerCells`], from the engine's
/// layer labels on camera A's map) matched on their own, so each layer gets its own height,
/// uncertainty and refusals (the first result is the first layer's). A layer's cells are camera
/// A's cells of its cloud and the clear cells next to that cloud only; cells next to both layers'
/// clouds are left out of both.
///
/// # Errors
/// Each layer's [`NoStereo`] (see the module docs); a too short baseline refuses every layer.
pub fn estimate_layers(a: &StereoView, b: &StereoView, sun_dir: Option<[f32; 3]>, seg: &SegmentParams, p: &StereoParams, layers: &LayerCells) -> Vec<Result<StereoFit, NoStereo>> {
    estimate_pair(a, b, sun_dir, seg, p, Some(layers))
}

/// [`estimate`] (`layers` `None`: one result for the whole sky) and [`estimate_layers`].
fn estimate_pair(a: &StereoView, b: &StereoView, sun_dir: Option<[f32; 3]>, seg: &SegmentParams, p: &StereoParams, layers: Option<&LayerCells>) -> Vec<Result<StereoFit, NoStereo>> {
    let groups = layers.map_or(1, |l| l.layers);
    let d = [b.position_m[0] - a.position_m[0], b.position_m[1] - a.position_m[1], b.position_m[2] - a.position_m[2]];
    let baseline_m = d[0].hypot(d[1]);
    if baseline_m < MIN_BASELINE_M {
        return vec![Err(NoStereo::NoBaseline { baseline_m, min_m: MIN_BASELINE_M }); groups];
    }
    // Grid origin midway between the cameras, at camera A's height.
    let at_a = [-d[0] / 2.0, -d[1] / 2.0, 0.0];
    let at_b = [d[0] / 2.0, d[1] / 2.0, d[2]];
    let max_z = p.max_zenith_deg as f32;
    let map_of = |v: &StereoView, at: [f64; 3], grid: Grid| {
        let lut = Lut::build_from(v.camera, v.obstruction, grid, at);
        let map = build_map(v.image, &lut, sun_dir, seg, v.reference);
        let score = map.score.iter().zip(&lut.z_deg).map(|(s, z)| if *z <= max_z { *s } else { f32::NAN }).collect::<Vec<f32>>();
        (score, lut)
    };
    estimate_groups_with(p, groups, |h| {
        let grid = p.grid(h, baseline_m);
        let ((sa, lut_a), (sb, _)) = (map_of(a, at_a, grid), map_of(b, at_b, grid));
        // Camera A's direction through each cell finds its layer on the engine's map.
        let member = layers.map(|l| lut_a.dir.iter().map(|d| l.at(*d)).collect());
        ([sa, sb], member)
    })
}

/// Which cloud layer each cell of camera A's map belongs to, for [`estimate_layers`]: bit `l` of a
/// cell is set when the cell is cloud of layer `l`, or clear within [`LayerCells::REACH_CELLS`] of
/// layer `l`'s cloud and of no other layer's. Looked up by direction from camera A, so it holds at
/// every candidate height.
#[derive(Debug, Clone)]
pub struct LayerCells {
    grid: Grid,
    member: Vec<u8>,
    layers: usize,
}

impl LayerCells {
    /// How far a layer's clear surroundings reach from its cloud \[cells of the engine's map\]
    /// (own choice: the edges of a cloud carry most of the match).
    pub const REACH_CELLS: usize = 3;

    /// From the engine's map (on camera A, its grid centred on the camera) and its per-cell layer
    /// labels (the layer of each cloudy cell; other cells' labels are ignored), for `layers` layers
    /// (at most 8).
    pub fn from_labels(map: &crate::cloudmap::CloudMap, labels: &[u8], layers: usize) -> LayerCells {
        use crate::segment::Class;
        let layers = layers.clamp(1, 8);
        let n = map.grid.n;
        let cloudy = |k: usize| map.class[k] == Class::Thin as u8 || map.class[k] == Class::Thick as u8;
        let mut member = vec![0u8; n * n];
        for (k, m) in member.iter_mut().enumerate() {
            if cloudy(k) && (labels.get(k).copied().unwrap_or(u8::MAX) as usize) < layers {
                *m = 1 << labels[k];
            }
        }
        // Clear cells: the layers with cloud within the reach (a summed-area table per layer).
        let (r, w) = (Self::REACH_CELLS, n + 1);
        let mut near = vec![0u8; n * n];
        for l in 0..layers {
            let mut s = vec![0u32; w * w];
            for j in 0..n {
                for i in 0..n {
                    let v = u32::from(member[j * n + i] & (1 << l) != 0);
                    s[(j + 1) * w + i + 1] = v + s[j * w + i + 1] + s[(j + 1) * w + i] - s[j * w + i];
                }
            }
            for j in 0..n {
                for i in 0..n {
                    let (i0, i1, j0, j1) = (i.saturating_sub(r), (i + r + 1).min(n), j.saturating_sub(r), (j + r + 1).min(n));
                    if s[j1 * w + i1] + s[j0 * w + i0] > s[j0 * w + i1] + s[j1 * w + i0] {
                        near[j * n + i] |= 1 << l;
                    }
                }
            }
        }
        for (k, m) in member.iter_mut().enumerate() {
            if map.class[k] == Class::Clear as u8 && near[k].count_ones() == 1 {
                *m = near[k];
            }
        }
        LayerCells { grid: map.grid, member, layers }
    }

    /// Number of layers.
    pub fn layers(&self) -> usize {
        self.layers
    }

    /// The layer bits of the map cell camera A sees in direction `dir` (unit, east-north-up); 0
    /// off the map or below the horizon.
    pub fn at(&self, dir: [f32; 3]) -> u8 {
        if dir[2].is_nan() || dir[2] <= 1e-3 {
            return 0;
        }
        let s = self.grid.height_m / dir[2] as f64;
        let (x, y) = self.grid.to_cell([dir[0] as f64 * s, dir[1] as f64 * s]);
        let (i, j) = (x.round(), y.round());
        if i < 0.0 || j < 0.0 || i >= self.grid.n as f64 || j >= self.grid.n as f64 {
            return 0;
        }
        self.member[j as usize * self.grid.n + i as usize]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A smooth random cloud field on the true cloud plane: sum of a few sinusoids with
    /// wavelengths of a few hundred metres, thresholded softly (score 0 clear, 1 cloud).
    fn field(x: f64, y: f64) -> f32 {
        let waves = [(0.0123, 0.0041, 0.3), (-0.0052, 0.0117, 1.1), (0.0071, -0.0089, 2.3), (0.0167, 0.0113, 0.7), (-0.0031, -0.0061, 1.9)];
        let v: f64 = waves.iter().map(|(kx, ky, ph)| (kx * x + ky * y + ph).sin()).sum::<f64>() / 2.2;
        (1.0 / (1.0 + (-4.0 * v).exp())) as f32
    }

    /// Score maps as cameras at `pa`, `pb` (from the grid origin, up from camera A) see `field`
    /// at true height `truth_m` above camera A, on the common grid at candidate height `h`, out
    /// to `max_zenith_deg`; `noise` adds independent per-cell noise to each map.
    fn synthetic(p: &StereoParams, baseline: [f64; 2], truth_m: f64, noise: f32, h: f64) -> [Vec<f32>; 2] {
        synthetic_scaled(p, baseline, truth_m, noise, 1.0, h)
    }

    /// [`synthetic`] with the field's wavelengths times `scale`.
    fn synthetic_scaled(p: &StereoParams, baseline: [f64; 2], truth_m: f64, noise: f32, scale: f64, h: f64) -> [Vec<f32>; 2] {
        let grid = p.grid(h, baseline[0].hypot(baseline[1]));
        let half = [baseline[0] / 2.0, baseline[1] / 2.0];
        let cams = [[-half[0], -half[1]], half];
        let tan_max = p.max_zenith_deg.to_radians().tan();
        let mut out = [vec![f32::NAN; p.cells * p.cells], vec![f32::NAN; p.cells * p.cells]];
        for (c, m) in cams.iter().zip(out.iter_mut()) {
            for j in 0..p.cells {
                for i in 0..p.cells {
                    let x = grid.cell_centre_m(i, j);
                    let r = [x[0] - c[0], x[1] - c[1]];
                    if r[0].hypot(r[1]) > h * tan_max {
                        continue;
                    }
                    let s = truth_m / h;
                    let k = j * p.cells + i;
                    let e = crate::rng::unit(crate::rng::hash64((k as u64) ^ ((c[0] > 0.0) as u64) << 40 ^ (h.to_bits() >> 8))) as f32 - 0.5;
                    m[k] = field((c[0] + r[0] * s) / scale, (c[1] + r[1] * s) / scale) + noise * e;
                }
            }
        }
        out
    }

    fn small() -> StereoParams {
        StereoParams { cells: 96, heights: 40, ..Default::default() }
    }

    #[test]
    fn finds_a_known_height() {
        let p = small();
        for truth in [700.0, 1200.0, 2500.0] {
            let fit = estimate_with(&p, |h| synthetic(&p, [800.0, 300.0], truth, 0.2, h)).unwrap();
            let err = fit.cbh_m / truth - 1.0;
            assert!(err.abs() < 0.05, "truth {truth}: {fit:?}");
            assert!(fit.rel_sigma > 0.0 && fit.rel_sigma < 0.2, "{}", fit.rel_sigma);
            assert!((err.abs()) < 3.0 * fit.rel_sigma, "truth {truth}: error {err:.3}, sigma {:.3}", fit.rel_sigma);
            assert!(fit.peak_ncc > 0.5 && fit.overlap_cells > 1000);
        }
    }

    #[test]
    fn a_longer_baseline_narrows_the_peak() {
        let p = StereoParams { min_texture_std: 0.0, ..small() };
        let width = |b: f64| {
            let fit = estimate_with(&p, |h| synthetic(&p, [b, 0.0], 1500.0, 0.0, h)).unwrap();
            // Scan points within 0.1 of the peak.
            fit.curve.iter().filter(|(_, v)| *v > fit.peak_ncc - 0.1).count()
        };
        assert!(width(1600.0) < width(400.0), "{} {}", width(1600.0), width(400.0));
    }

    #[test]
    fn refuses_flat_untextured_and_out_of_view() {
        let p = small();
        // Uniform sky: no texture.
        let flat = estimate_with(&p, |_| [vec![0.5; p.cells * p.cells], vec![0.5; p.cells * p.cells]]);
        assert!(matches!(flat, Err(NoStereo::WeakTexture { .. } | NoStereo::FlatPeak { .. })), "{flat:?}");
        // Independent noise in each map: no peak.
        let noise = estimate_with(&p, |h| {
            let n = p.cells * p.cells;
            let f = |salt: u64| (0..n).map(|k| crate::rng::unit(crate::rng::hash64(k as u64 ^ salt ^ h.to_bits())) as f32).collect();
            [f(1), f(2 << 50)]
        });
        assert!(matches!(noise, Err(NoStereo::FlatPeak { .. })), "{noise:?}");
        // Maps that never overlap.
        let apart = estimate_with(&p, |_| {
            let n = p.cells;
            let half = |left: bool| (0..n * n).map(|k| if ((k % n) < n / 2) == left { field(k as f64, 0.0) } else { f32::NAN }).collect();
            [half(true), half(false)]
        });
        assert!(matches!(apart, Err(NoStereo::TooLittleOverlap { .. })), "{apart:?}");
        // A cloud (with the larger structures of high cloud) above the scan's top: the best
        // height is the scan's end.
        let high = estimate_with(&p, |h| synthetic_scaled(&p, [800.0, 300.0], 9_500.0, 0.0, 6.0, h));
        assert!(matches!(high, Err(NoStereo::AtScanEnd { .. })), "{high:?}");
        // A peak that moves more between resamples than allowed.
        let strict = StereoParams { max_rel_sigma: 0.01, ..p };
        let loose = estimate_with(&strict, |h| synthetic(&strict, [800.0, 300.0], 1200.0, 0.2, h));
        assert!(matches!(loose, Err(NoStereo::Ambiguous { .. })), "{loose:?}");
    }

    #[test]
    fn refuses_cameras_at_one_place() {
        let cam = Camera::ideal(64);
        let img = image::RgbImage::new(64, 64);
        let r = Reference::default();
        let v = StereoView { camera: &cam, obstruction: None, position_m: [0.0, 0.0, 3.0], reference: &r, image: &img };
        let w = StereoView { position_m: [10.0, 5.0, 3.0], ..v };
        let e = estimate(&v, &w, None, &SegmentParams::default(), &StereoParams::default());
        assert!(matches!(e, Err(NoStereo::NoBaseline { .. })), "{e:?}");
    }

    #[test]
    fn highpass_removes_a_plane() {
        let n = 20;
        let map: Vec<f32> = (0..n * n).map(|k| 0.3 + 0.01 * (k % n) as f32).collect();
        let valid = vec![true; n * n];
        let h = highpass(&map, &valid, n, 3);
        // Away from the edges a linear trend's local mean is the value itself.
        assert!(h[10 * n + 10].abs() < 1e-5, "{}", h[10 * n + 10]);
    }
}
