//! Cloud motion: block matching between successive cloud maps.
//!
//! # Method
//! The matched quantity is the continuous cloudiness score of each map cell (not the binary mask),
//! clipped to [−0.5, 1.5]. The previous map is cut into square blocks; blocks with too few known
//! cells or too little texture (standard deviation) are skipped. Each block is searched for in the
//! current map by normalized cross-correlation (NCC), coarse to fine: a search on maps reduced 4×,
//! around the filtered motion when it is well known, else over the window set by the largest
//! plausible speed and the **measured** time step; then a hill climb at full resolution within ±3
//! cells of the coarse peak (edge peaks rejected); the peak is refined to a fraction of a cell by a
//! parabola through the NCC on each axis, then by Lucas–Kanade. A block is rejected when its peak is
//! weak, lies on the window's edge, is ambiguous (a second peak away from the first almost as high)
//! or implies a speed beyond the plausible one. The matching is in the `matching` submodule.
//!
//! Two layers: when the first pass's motion leaves enough of the cloud unexplained (the maps
//! still differ around those cells once the earlier map is moved by it), a second pass matches
//! that residual cloud alone on a clear background ([`measure`]). The block vectors (m/s east and
//! north) give a robust global vector (component median) and, by 2-means clustering seeded at the
//! densest vectors, up to two layers, accepted only when well separated and only after a second
//! pass. Each cloudy cell is labelled with the layer whose motion explains its neighbourhood
//! ([`label_layers`]); the layer with the larger thick-cloud share of its cells is reported first.
//!
//! When the residual pass finds no second layer — a layer whose texture wins every block of the
//! first pass and hides the other, as a thin veil 6 km up does over cumulus at 1 km — and
//! `motion.cancelled_layer_pass` is on, a third map about one step older gives the
//! cancelled-layer pass ([`measure_layers`]): the dominant layer's displacement cancels it from
//! two successive differences, and block matching of one difference against the other measures
//! what is left, the other layer (the three-frame method for two additive motions). Off by
//! default: with it, the layers' motions are right on the project's two-layer scenes, but how the
//! forecast labels and advects two layers' cells limits what that gains, and on an independent
//! breaking overcast it read the layer's evolution as a slow second layer (docs/checks.md, "Two layers
//! through each other").
//!
//! A [`LayerTracker`] smooths each layer over time with its own Kalman filter (gating of
//! outliers, restart when it has locked onto something else, expiry); the filter's standard
//! deviation is the reported uncertainty.
//!
//! # References
//! * C. W. Chow et al., *Solar Energy* 85:2881–2893, 2011 (cross-correlation cloud motion from sky
//!   images).
//! * J. P. Lewis, "Fast normalized cross-correlation", *Vision Interface* 1995.
//! * J. R. Bergen, P. J. Burt, R. Hingorani and S. Peleg, "A three-frame algorithm for estimating
//!   two-component image motion", *IEEE PAMI* 14:886–896, 1992 (citation from memory).

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::robust::{MAD_TO_SIGMA, median};
use crate::cloudmap::CloudMap;
use crate::settings::{ConfigError, check_range};

mod features;
mod filter;
mod matching;
pub use features::MapFeatures;
pub use filter::{LayerTracker, Motion, MotionFilter, TrackedLayer};
use features::{box_mismatch, cancelled_difference, residual_features};
use matching::{block_vectors, block_vectors_between};

/// `[motion]` in `site.toml`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MotionParams {
    /// Largest plausible cloud speed \[m/s\]; sets the search window with the time step.
    pub max_speed_mps: f64,
    /// Block side \[cells\].
    pub block_cells: usize,
    /// Least standard deviation of the score in a block.
    pub min_texture: f64,
    /// Least NCC peak.
    pub min_peak: f64,
    /// A second peak above this share of the best makes a block ambiguous.
    pub ambiguity: f64,
    /// Least share of known cells in a block.
    pub min_known: f64,
    /// Frames further apart than this are not matched \[s\].
    pub max_gap_s: f64,
    /// Match against the newest earlier map at least this old (longer baselines measure slow
    /// clouds better) \[s\].
    pub baseline_s: f64,
    /// Two layers are reported only when their vectors differ by at least this \[m/s\].
    pub two_layer_separation_mps: f64,
    /// Process noise of the temporal filter \[(m/s)² per s\].
    pub filter_process_noise: f64,
    /// A cell's cloud counts as explained by a layer's displacement when the two maps differ there
    /// by less than this (score units, smallest over the 3 × 3 neighbourhood).
    pub residual_tolerance: f64,
    /// The unexplained cloud is matched in a second pass when it is at least this share of the
    /// cloudy cells (judged at half resolution). Cloud evolving and edges leave 0.4–10 %
    /// unexplained on the single-layer synthetic scenes (10th–90th percentile over frames), the
    /// other layer 31–38 % on the two-layer scene (three seeds).
    pub residual_min_share: f64,
    /// A layer's filter is dropped after this long without a measurement \[s\].
    pub layer_expiry_s: f64,
    /// A second layer enters the forecast after this many measurements.
    pub layer_confirm: usize,
    /// A block whose best match lies within a cell of zero shift and whose feature changed by less
    /// than this (mean absolute difference at zero shift, score units) is static structure — glare,
    /// vignetting, the horizon, a mast, dirt on the dome — and gives no vector. A cloud that
    /// truly stands still still evolves above it.
    pub static_tolerance: f64,
    /// The first (dominant-layer) pass matches blocks centred within this zenith angle \[°\]; the
    /// residual pass for a second layer uses the whole map. Nearer the horizon a pixel spans
    /// several cells and clouds are seen edge-on. Measured on the independent renderer's broken
    /// cumulus (camera from `calibrate`), mean vector error with the limit at 72 / 78 / 80 / 85° (before
    /// blocks were weighted by zenith): 0.04 / 0.21 / 0.26 / 0.6 m/s; on the project's two-layer
    /// scene, 10-minute skill 0.22 / 0.31 / 0.30 / 0.38 (at 72° its layers swap). With the weights,
    /// 80°: 0.14 m/s there, 0.19 m/s on the breaking overcast, two-layer 10-minute skill 0.33.
    pub first_pass_max_zenith_deg: f64,
    /// Run the cancelled-layer pass ([`measure_layers`]) when the residual pass finds no second
    /// layer. Off by default: see docs/checks.md, "Two layers", for what it changes.
    pub cancelled_layer_pass: bool,
    /// Half-side of the box over which a cloudy cell's mismatch under each layer's motion is
    /// averaged to label it with a layer ([`label_layers`]) \[cells\].
    pub label_radius_cells: usize,
    /// Until the tracked motion is confirmed (the alarms' `ramps.motion_confirm_measurements`
    /// consistent measurements, and no second layer seen but not yet confirmed), the forecast
    /// advects each layer with at least the spread [`LayerTracker::unconfirmed_spread_mps`] gives.
    pub widen_unconfirmed: bool,
}

/// The spread of speed the forecast gives a sky whose motion is not known yet \[m/s\] (one sigma
/// per component; a chosen value, no source).
pub const UNKNOWN_MOTION_SIGMA_MPS: f64 = 3.0;

impl Default for MotionParams {
    fn default() -> Self {
        Self {
            max_speed_mps: 30.0,
            block_cells: 32,
            min_texture: 0.08,
            min_peak: 0.5,
            ambiguity: 0.97,
            min_known: 0.7,
            max_gap_s: 180.0,
            baseline_s: 100.0,
            two_layer_separation_mps: 2.0,
            filter_process_noise: 0.002,
            residual_tolerance: 0.25,
            residual_min_share: 0.2,
            layer_expiry_s: 300.0,
            layer_confirm: 2,
            static_tolerance: 0.02,
            first_pass_max_zenith_deg: 80.0,
            cancelled_layer_pass: false,
            label_radius_cells: 4,
            widen_unconfirmed: true,
        }
    }
}

impl MotionParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "motion.max_speed_mps", self.max_speed_mps, 1.0, 100.0)?;
        check_range(file, "motion.block_cells", self.block_cells as f64, 8.0, 256.0)?;
        check_range(file, "motion.min_texture", self.min_texture, 0.0, 1.0)?;
        check_range(file, "motion.min_peak", self.min_peak, 0.0, 1.0)?;
        check_range(file, "motion.ambiguity", self.ambiguity, 0.5, 1.0)?;
        check_range(file, "motion.min_known", self.min_known, 0.1, 1.0)?;
        check_range(file, "motion.max_gap_s", self.max_gap_s, 1.0, 3600.0)?;
        check_range(file, "motion.baseline_s", self.baseline_s, 0.0, self.max_gap_s)?;
        check_range(file, "motion.two_layer_separation_mps", self.two_layer_separation_mps, 0.1, 50.0)?;
        check_range(file, "motion.filter_process_noise", self.filter_process_noise, 0.0, 10.0)?;
        check_range(file, "motion.residual_tolerance", self.residual_tolerance, 0.01, 2.0)?;
        check_range(file, "motion.residual_min_share", self.residual_min_share, 0.0, 1.0)?;
        check_range(file, "motion.layer_expiry_s", self.layer_expiry_s, 1.0, 3600.0)?;
        check_range(file, "motion.layer_confirm", self.layer_confirm as f64, 1.0, 100.0)?;
        check_range(file, "motion.static_tolerance", self.static_tolerance, 0.0, 1.0)?;
        check_range(file, "motion.first_pass_max_zenith_deg", self.first_pass_max_zenith_deg, 30.0, 90.0)?;
        check_range(file, "motion.label_radius_cells", self.label_radius_cells as f64, 0.0, 16.0)
    }
}

/// One block's displacement.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BlockVector {
    /// Block centre (east, north) from the camera \[m\].
    pub centre_m: [f64; 2],
    /// Velocity (east, north) \[m/s\].
    pub v_mps: [f64; 2],
    /// NCC peak.
    pub peak: f64,
    /// Mean score of the block.
    pub mean_score: f64,
    /// Share of the block's known cells that are thick cloud (opacity).
    pub thick_share: f64,
    /// Weight in a single layer's motion, from the block centre's zenith angle `z`:
    /// `min(1, (cos z / cos 60°)²)`. A cell's angular size falls as cos² z, so nearer the horizon
    /// a block holds fewer pixels of its own and clouds are seen edge-on; full weight within 60°.
    pub weight: f64,
}

/// The weight of a block centred at `dist_m` from the camera on a plane `height_m` above it.
pub fn block_weight(dist_m: f64, height_m: f64) -> f64 {
    let c = height_m / dist_m.hypot(height_m);
    (c * c / 0.25).min(1.0)
}

/// Weighted median of values with weights (the smallest value whose cumulative weight reaches
/// half the total).
fn weighted_median(v: &[(f64, f64)]) -> f64 {
    let mut s: Vec<(f64, f64)> = v.iter().filter(|(x, w)| x.is_finite() && *w > 0.0).copied().collect();
    if s.is_empty() {
        return f64::NAN;
    }
    s.sort_by(|a, b| a.0.total_cmp(&b.0));
    let half = 0.5 * s.iter().map(|p| p.1).sum::<f64>();
    let mut acc = 0.0;
    for (x, w) in &s {
        acc += w;
        if acc >= half {
            return *x;
        }
    }
    s[s.len() - 1].0
}

/// A motion layer.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LayerMotion {
    /// Velocity (east, north) \[m/s\].
    pub v_mps: [f64; 2],
    /// Blocks in this layer.
    pub blocks: usize,
    /// Mean block score.
    pub mean_score: f64,
    /// Mean thick-cloud share of its blocks' matched cloud (opacity).
    pub thick_share: f64,
    /// Spread of its block vectors around it \[m/s\].
    pub spread_mps: f64,
}

/// Motion measured between two maps.
#[derive(Debug, Clone, PartialEq)]
pub struct MotionMeasurement {
    /// Time step \[s\].
    pub dt_s: f64,
    /// Accepted block vectors.
    pub vectors: Vec<BlockVector>,
    /// Blocks tried.
    pub blocks_tried: usize,
    /// Robust global vector (m/s); `None` without accepted blocks.
    pub global_mps: Option<[f64; 2]>,
    /// One or two layers, the forecast's layer first.
    pub layers: Vec<LayerMotion>,
    /// Spread of the accepted vectors around their layer \[m/s\].
    pub spread_mps: f64,
    /// With two layers: the layer (index into `layers`) of each cloudy cell of the later map
    /// ([`label_layers`]).
    pub labels: Option<Vec<u8>>,
    /// Blocks dropped as static structure ([`MotionParams::static_tolerance`]).
    pub blocks_static: usize,
    /// The measurement reads (nearly) zero motion while the map changed: locked onto something
    /// that does not move with the clouds. Such a measurement is reported but kept out of the
    /// filter.
    pub locked_at_zero: bool,
}

impl MotionMeasurement {
    /// Flag a measurement locked at zero: its dominant motion moves less than half a cell over the
    /// baseline while the two maps differ at zero shift by more than twice the static tolerance.
    pub fn check_locked(&mut self, a: &CloudMap, b: &CloudMap, params: &MotionParams) {
        let Some(l) = self.layers.first() else { return };
        let shift_cells = l.v_mps[0].hypot(l.v_mps[1]) * self.dt_s / a.grid.cell_m;
        if shift_cells >= 0.5 {
            return;
        }
        let (mut s, mut k) = (0.0f64, 0usize);
        for (x, y) in a.score.iter().zip(&b.score) {
            if !x.is_nan() && !y.is_nan() {
                s += (x.clamp(-0.5, 1.5) - y.clamp(-0.5, 1.5)).abs() as f64;
                k += 1;
            }
        }
        self.locked_at_zero = k > 0 && s / k as f64 > 2.0 * params.static_tolerance;
    }
}

/// Measure motion from map `a` (earlier) to map `b`, `dt_s` apart. Both maps must share a grid.
/// `priors` are the tracked layers' filtered motions, the one expected to dominate first: the
/// first pass searches around the first, the residual pass around the second.
///
/// The first pass matches the score. When its dominant layer's displacement leaves at least
/// `residual_min_share` of the cloudy cells unexplained (another layer moving otherwise), a second
/// pass matches that residual cloud alone on a clear background ([`features::residual_features`]),
/// so that a layer too sparse or too faint to win blocks in the first pass yields vectors of its
/// own. All vectors are then clustered; without a second pass there is one layer.
pub fn measure(a: &CloudMap, b: &CloudMap, dt_s: f64, params: &MotionParams, priors: &[Motion]) -> MotionMeasurement {
    measure_with((a, &MapFeatures::new(a)), (b, &MapFeatures::new(b)), dt_s, params, priors)
}

/// [`measure`] with each map's [`MapFeatures`] given (the engine keeps them with its maps).
pub fn measure_with(a: (&CloudMap, &MapFeatures), b: (&CloudMap, &MapFeatures), dt_s: f64, params: &MotionParams, priors: &[Motion]) -> MotionMeasurement {
    measure_layers(a, b, None, dt_s, params, priors)
}

/// A map earlier than a measured pair's earlier map, for the cancelled-layer pass: the map, its
/// features, and how long before the pair's earlier map it was taken \[s\].
pub type OlderMap<'a> = (&'a CloudMap, &'a MapFeatures, f64);

/// The cancelled-layer pass runs only when the older map's step to the pair's earlier map is within
/// this share of the pair's own step: the dominant layer cancels whatever the steps, but the other
/// layer's two differences are the same pattern moved by its displacement only over equal steps
/// (with unequal ones, the difference's earlier half moves by the first layer's motion over the
/// mismatch).
const EQUAL_STEP_TOLERANCE: f64 = 0.1;

/// [`measure_with`], and with an `older` map (about `dt_s` before `a`) a third pass: the
/// cancelled-layer pass.
///
/// Two layers seen through each other add (to a first approximation) in the score: a thin veil
/// over cumulus, each moving its own way, and one layer's texture can win every block of the first
/// pass (on the project's two-layer scene the veil's, whose apparent texture on the cumulus plane
/// is finer and covers more of the sky). With three maps at equal steps and the dominant layer's
/// displacement `d` per step, the differences `a − older(· − d)` and `b − a(· − d)`
/// ([`features::cancelled_difference`]) no longer hold the dominant layer; what is left of the
/// other layer is the same pattern in both, moved by that layer's own displacement, and block
/// matching of the first difference against the second measures it (the three-frame method for
/// two motions of J. R. Bergen, P. J. Burt, R. Hingorani and S. Peleg, *IEEE PAMI* 14:886–896,
/// 1992; citation from memory). Its vectors within the two-layer separation of the dominant layer are what the
/// dominant layer's own small misregistration left and are dropped; the rest join the first pass's
/// for the clustering into layers, as the residual pass's do.
pub fn measure_layers((a, xa): (&CloudMap, &MapFeatures), (b, xb): (&CloudMap, &MapFeatures), older: Option<OlderMap>, dt_s: f64, params: &MotionParams, priors: &[Motion]) -> MotionMeasurement {
    let (mut vectors, mut tried, mut static_blocks) = block_vectors(a, xa, xb, dt_s, params, priors.first().copied());
    // One motion unless a later pass finds cloud the first does not explain: a split of the first
    // pass's vectors alone is more often cloud evolving than a second layer.
    let mut first = summarize(vectors.clone(), tried, dt_s, params, false);
    first.blocks_static = static_blocks;
    first.check_locked(a, b, params);
    let Some(dominant) = first.layers.first().copied() else { return first };
    let cell = a.grid.cell_m;
    let shift = |v: [f64; 2], t_s: f64| [v[0] * t_s / cell, v[1] * t_s / cell];
    let mut others = vec![];
    let mut second_pass = false;
    if let (Some((ra, rb)), _share) = residual_features(a, b, xa, xb, shift(dominant.v_mps, dt_s), params.residual_tolerance as f32, params.residual_min_share) {
        let (v2, t2, s2) = block_vectors_between(ra, rb, a, dt_s, params, priors.get(1).copied());
        (tried, static_blocks) = (tried + t2, static_blocks + s2);
        others.extend(v2);
        second_pass = true;
    }
    // The residual pass's second layer, when it found one, stands; else the cancelled-layer pass.
    let kept = |v: &&BlockVector| dist(v.v_mps, dominant.v_mps) >= params.two_layer_separation_mps;
    let found = second_pass && summarize(vectors.iter().chain(others.iter().filter(kept)).copied().collect(), tried, dt_s, params, true).layers.len() == 2;
    let older = older.filter(|o| params.cancelled_layer_pass && !found && o.0.grid == a.grid && (o.2 - dt_s).abs() <= EQUAL_STEP_TOLERANCE * dt_s);
    if let Some((_, xo, gap_s)) = older {
        let n = a.grid.n;
        let da = cancelled_difference(xo.feature(), xa.feature(), n, shift(dominant.v_mps, gap_s));
        let db = cancelled_difference(xa.feature(), xb.feature(), n, shift(dominant.v_mps, dt_s));
        let (v3, t3, s3) = block_vectors_between(da, db, a, dt_s, params, priors.get(1).copied());
        // Static structure (glare, a mast) survives the cancellation as the same pattern in both
        // differences: a vector within a cell of zero shift cannot be told from it.
        let moving = v3.len() - v3.iter().filter(|v| v.v_mps[0].hypot(v.v_mps[1]) * dt_s < cell).count();
        (tried, static_blocks) = (tried + t3, static_blocks + s3 + v3.len() - moving);
        others.extend(v3.into_iter().filter(|v| v.v_mps[0].hypot(v.v_mps[1]) * dt_s >= cell));
        second_pass = true;
    }
    if !second_pass {
        return first;
    }
    let cancelled = older.is_some();
    // Vectors of the later passes near the dominant layer re-measure it from what its displacement
    // left (rims, misregistration): only the other motions are kept.
    vectors.extend(others.iter().filter(kept));
    let mut m = summarize(vectors, tried, dt_s, params, true);
    m.blocks_static = static_blocks;
    m.check_locked(a, b, params);
    // A layer only the cancelled-layer pass sees must hold at least as many blocks as the
    // dominant layer after the split: a true layer seen through another is exposed wherever it
    // is, while a thinning or growing deck leaves a few scattered vectors in the differences.
    if cancelled && m.layers.len() == 2 {
        let near = |l: &LayerMotion| dist(l.v_mps, dominant.v_mps);
        let (dom, new) = if near(&m.layers[0]) <= near(&m.layers[1]) { (&m.layers[0], &m.layers[1]) } else { (&m.layers[1], &m.layers[0]) };
        if new.blocks < dom.blocks {
            return first;
        }
    }
    if m.layers.len() == 2 {
        order_two_layers(&mut m, xa.feature(), xb.feature(), b, params.label_radius_cells);
    }
    m
}

/// Two layers: each one's opacity from the cells it explains (the blocks mix both layers), the
/// more opaque first, and the cells' labels.
fn order_two_layers(m: &mut MotionMeasurement, fa: &[f32], fb: &[f32], b: &CloudMap, radius_cells: usize) {
    let mut labels = label_layers_with(fa, fb, b, m.dt_s, &[m.layers[0].v_mps, m.layers[1].v_mps], radius_cells);
    let (thin, thick) = (crate::segment::Class::Thin as u8, crate::segment::Class::Thick as u8);
    // Per layer: cloudy cells, thick cells.
    let mut counts = [[0usize; 2]; 2];
    for (c, lb) in b.class.iter().zip(&labels) {
        if *c == thin || *c == thick {
            counts[(*lb as usize).min(1)][0] += 1;
            counts[(*lb as usize).min(1)][1] += (*c == thick) as usize;
        }
    }
    for (l, [n, nt]) in m.layers.iter_mut().zip(counts) {
        if n > 0 {
            l.thick_share = nt as f64 / n as f64;
        }
    }
    if m.layers[1].thick_share > m.layers[0].thick_share {
        m.layers.swap(0, 1);
        for l in labels.iter_mut() {
            *l = 1 - *l;
        }
    }
    m.labels = Some(labels);
}

impl MotionMeasurement {
    /// The cell labels ([`MotionMeasurement::labels`]) for two tracked layers moving at `v0` and `v1`:
    /// label 0 for the measured layer nearer `v0`. `None` unless this measurement saw two layers.
    pub fn labels_for(&self, v0: [f64; 2], v1: [f64; 2]) -> Option<Vec<u8>> {
        let (lb, [m0, m1]) = (self.labels.as_ref()?, self.layers.as_slice()) else { return None };
        if dist(v0, m0.v_mps) + dist(v1, m1.v_mps) <= dist(v0, m1.v_mps) + dist(v1, m0.v_mps) {
            Some(lb.clone())
        } else {
            Some(lb.iter().map(|l| 1 - l.min(&1)).collect())
        }
    }
}

fn dist(a: [f64; 2], b: [f64; 2]) -> f64 {
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2)).sqrt()
}

fn summarize(vectors: Vec<BlockVector>, tried: usize, dt_s: f64, params: &MotionParams, allow_two: bool) -> MotionMeasurement {
    if vectors.is_empty() {
        return MotionMeasurement { dt_s, vectors, blocks_tried: tried, global_mps: None, layers: vec![], spread_mps: f64::NAN, labels: None, blocks_static: 0, locked_at_zero: false };
    }
    let g = [
        median(&mut vectors.iter().map(|v| v.v_mps[0]).collect::<Vec<_>>()),
        median(&mut vectors.iter().map(|v| v.v_mps[1]).collect::<Vec<_>>()),
    ];
    // 2-means seeded at the two densest vectors (most neighbours within 1 m/s) at least the
    // two-layer separation apart: false matches scatter, layers crowd.
    let density: Vec<usize> = vectors.iter().map(|v| vectors.iter().filter(|w| dist(v.v_mps, w.v_mps) < 1.0).count()).collect();
    let densest = |ok: &dyn Fn([f64; 2]) -> bool| {
        vectors.iter().zip(&density).filter(|(v, _)| ok(v.v_mps)).max_by_key(|(_, d)| **d).map(|(v, _)| v.v_mps)
    };
    let s0 = densest(&|_| true).unwrap_or(g);
    let s1 = densest(&|v| dist(v, s0) >= params.two_layer_separation_mps).unwrap_or(g);
    let mut c = [s0, s1];
    let mut assign = vec![0usize; vectors.len()];
    for _ in 0..20 {
        for (k, v) in vectors.iter().enumerate() {
            assign[k] = if dist(v.v_mps, c[0]) <= dist(v.v_mps, c[1]) { 0 } else { 1 };
        }
        for (ci, cc) in c.iter_mut().enumerate() {
            let mut xs: Vec<f64> = vectors.iter().zip(&assign).filter(|(_, a)| **a == ci).map(|(v, _)| v.v_mps[0]).collect();
            let mut ys: Vec<f64> = vectors.iter().zip(&assign).filter(|(_, a)| **a == ci).map(|(v, _)| v.v_mps[1]).collect();
            if !xs.is_empty() {
                *cc = [median(&mut xs), median(&mut ys)];
            }
        }
    }
    // Each cluster's members without its outliers (farther from the centre than three robust
    // standard deviations, at least 0.5 m/s): a few false matches must not hide a clear split.
    let layer = |ci: usize| {
        let all: Vec<&BlockVector> = vectors.iter().zip(&assign).filter(|(_, a)| **a == ci).map(|(v, _)| v).collect();
        let mad = median(&mut all.iter().map(|v| dist(v.v_mps, c[ci])).collect::<Vec<_>>());
        let lim = (3.0 * MAD_TO_SIGMA * mad).max(0.5);
        let members: Vec<&BlockVector> = all.into_iter().filter(|v| dist(v.v_mps, c[ci]) <= lim).collect();
        let ms = members.iter().map(|v| v.mean_score).sum::<f64>() / members.len().max(1) as f64;
        let ts = members.iter().map(|v| v.thick_share).sum::<f64>() / members.len().max(1) as f64;
        let spread = (members.iter().map(|v| dist(v.v_mps, c[ci]).powi(2)).sum::<f64>() / members.len().max(1) as f64).sqrt();
        (LayerMotion { v_mps: c[ci], blocks: members.len(), mean_score: ms, thick_share: ts, spread_mps: spread }, spread)
    };
    let (l0, s0) = layer(0);
    let (l1, s1) = layer(1);
    let nmin = 3.max((0.12 * vectors.len() as f64).ceil() as usize);
    let sep = dist(l0.v_mps, l1.v_mps);
    let two = allow_two && l0.blocks >= nmin && l1.blocks >= nmin && sep >= params.two_layer_separation_mps && sep > 2.5 * s0.max(s1);
    let (layers, spread) = if two {
        let mut ls = vec![(l0, s0), (l1, s1)];
        ls.sort_by(|a, b| b.0.thick_share.total_cmp(&a.0.thick_share));
        let spread = ls[0].1;
        (ls.into_iter().map(|l| l.0).collect(), spread)
    } else {
        // One layer: weighted robust mean of the inliers around the weighted median (blocks near
        // the horizon weigh less, see `BlockVector::weight`).
        let gw = [
            weighted_median(&vectors.iter().map(|v| (v.v_mps[0], v.weight)).collect::<Vec<_>>()),
            weighted_median(&vectors.iter().map(|v| (v.v_mps[1], v.weight)).collect::<Vec<_>>()),
        ];
        let gw = if gw[0].is_finite() && gw[1].is_finite() { gw } else { g };
        let mut devs: Vec<f64> = vectors.iter().map(|v| dist(v.v_mps, gw)).collect();
        let mad = median(&mut devs);
        let lim = (3.0 * MAD_TO_SIGMA * mad).max(0.5);
        let inl: Vec<&BlockVector> = vectors.iter().filter(|v| dist(v.v_mps, gw) <= lim).collect();
        let m = inl.len().max(1) as f64;
        let wsum = inl.iter().map(|v| v.weight).sum::<f64>();
        let v = if wsum > 0.0 {
            [inl.iter().map(|v| v.weight * v.v_mps[0]).sum::<f64>() / wsum, inl.iter().map(|v| v.weight * v.v_mps[1]).sum::<f64>() / wsum]
        } else {
            [inl.iter().map(|v| v.v_mps[0]).sum::<f64>() / m, inl.iter().map(|v| v.v_mps[1]).sum::<f64>() / m]
        };
        let spread = (inl.iter().map(|b| dist(b.v_mps, v).powi(2)).sum::<f64>() / m).sqrt();
        let ms = inl.iter().map(|v| v.mean_score).sum::<f64>() / m;
        let ts = inl.iter().map(|v| v.thick_share).sum::<f64>() / m;
        (vec![LayerMotion { v_mps: v, blocks: inl.len(), mean_score: ms, thick_share: ts, spread_mps: spread }], spread)
    };
    MotionMeasurement { dt_s, vectors, blocks_tried: tried, global_mps: Some(g), layers, spread_mps: spread, labels: None, blocks_static: 0, locked_at_zero: false }
}

/// Which layer each cloudy cell of map `b` belongs to, given the layers' velocities `vs` (m/s,
/// from the earlier map `a`, `dt_s` before): the one whose displacement makes `a` match `b` best
/// over the cell's neighbourhood (mean absolute score difference over a 9 × 9 box; broad cloud
/// interiors match under many displacements, their edges only under the right one). Other cells,
/// and cells no displacement can judge, get layer 0.
pub fn label_layers(a: &CloudMap, b: &CloudMap, dt_s: f64, vs: &[[f64; 2]]) -> Vec<u8> {
    let (fa, fb) = (features::score_feature(a), features::score_feature(b));
    let labels = label_layers_with(&fa, &fb, b, dt_s, vs, MotionParams::default().label_radius_cells);
    features::recycle(fa);
    features::recycle(fb);
    labels
}

/// [`label_layers`] on the maps' score features (`fa` of the earlier map, `fb` of `b`), the
/// mismatch averaged over the (2 `radius_cells` + 1)² box around each cell.
pub fn label_layers_with(fa: &[f32], fb: &[f32], b: &CloudMap, dt_s: f64, vs: &[[f64; 2]], radius_cells: usize) -> Vec<u8> {
    let n = b.grid.n;
    let cloudy = |c: u8| c == crate::segment::Class::Thin as u8 || c == crate::segment::Class::Thick as u8;
    let mut best = vec![(f32::INFINITY, 0u8); n * n];
    for (l, v) in vs.iter().enumerate().take(u8::MAX as usize) {
        let d = [v[0] * dt_s / b.grid.cell_m, v[1] * dt_s / b.grid.cell_m];
        let mis = box_mismatch(fa, fb, n, d, radius_cells);
        for (k, (m, bst)) in mis.iter().zip(best.iter_mut()).enumerate() {
            if cloudy(b.class[k]) && *m < bst.0 {
                *bst = (*m, l as u8);
            }
        }
        features::recycle(mis);
    }
    best.into_iter().map(|b| b.1).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cloudmap::{Grid, MapParams};

    fn map_from(f: impl Fn(f64, f64) -> f64, grid: Grid) -> CloudMap {
        let n = grid.n;
        let mut score = vec![0f32; n * n];
        for j in 0..n {
            for i in 0..n {
                let c = grid.cell_centre_m(i, j);
                score[j * n + i] = f(c[0], c[1]) as f32;
            }
        }
        CloudMap { grid, class: vec![1; n * n], in_view: vec![true; n * n], score, offset: 0.0, brightness: vec![], thin_depth: vec![] }
    }

    fn blobs(x: f64, y: f64) -> f64 {
        let mut s = 0.0;
        for k in 0..60 {
            let cx = ((k * 7919) % 9000) as f64 - 4500.0;
            let cy = ((k * 104_729) % 9000) as f64 - 4500.0;
            let r2 = (x - cx).powi(2) + (y - cy).powi(2);
            s += (-r2 / (2.0 * 300f64.powi(2))).exp();
        }
        s.min(1.2)
    }

    #[test]
    fn recovers_a_known_shift_to_a_tenth_of_a_metre_per_second() {
        let g = Grid::new(&MapParams { max_zenith_deg: 77.0, ..Default::default() }, 1500.0);
        let v = [7.3, -4.1];
        let dt = 20.0;
        let a = map_from(blobs, g);
        let b = map_from(|x, y| blobs(x - v[0] * dt, y - v[1] * dt), g);
        let m = measure(&a, &b, dt, &MotionParams::default(), &[]);
        let l = m.layers[0];
        assert!(m.vectors.len() > 10, "{} vectors", m.vectors.len());
        assert!((l.v_mps[0] - v[0]).abs() < 0.1 && (l.v_mps[1] - v[1]).abs() < 0.1, "{:?}", l.v_mps);
        assert_eq!(m.layers.len(), 1);
    }

    /// The same two maps on a plane 1.6 times higher (relabelled: the same cells, each 1.6 times
    /// larger, as the engine does when its plane moves) measure the motion 1.6 times faster, block
    /// for block, when the speed limits in m/s are 1.6 times higher too (with the same limits the
    /// search reaches fewer cells: that is how the plane's height changes the measurement); a
    /// tracker rescaled by 1.6 holds the scaled motion and spread. Geometry of a flat plane's
    /// central projection: common practice, no source.
    #[test]
    fn a_relabelled_plane_scales_the_measured_and_tracked_motion() {
        let p = MapParams { max_zenith_deg: 77.0, ..Default::default() };
        let (g, g_hi) = (Grid::new(&p, 1500.0), Grid::new(&p, 2400.0));
        let (v, dt) = ([7.3, -4.1], 20.0);
        let a = map_from(blobs, g);
        let b = map_from(|x, y| blobs(x - v[0] * dt, y - v[1] * dt), g);
        let on = |m: &CloudMap| m.on_grid(g_hi);
        let params = MotionParams::default();
        let scaled = MotionParams { max_speed_mps: 1.6 * params.max_speed_mps, two_layer_separation_mps: 1.6 * params.two_layer_separation_mps, ..params };
        let (lo, hi) = (measure(&a, &b, dt, &params, &[]), measure(&on(&a), &on(&b), dt, &scaled, &[]));
        assert_eq!(lo.vectors.len(), hi.vectors.len());
        assert!(lo.vectors.len() > 10);
        for (x, y) in lo.vectors.iter().zip(&hi.vectors) {
            for c in 0..2 {
                assert!((y.v_mps[c] - 1.6 * x.v_mps[c]).abs() < 1e-6, "{:?} {:?}", x.v_mps, y.v_mps);
            }
        }
        let mut t = LayerTracker::default();
        let l = t.update(Some(&lo), dt, &params)[0].motion;
        t.rescale(1.6);
        let r = t.priors()[0];
        assert!((r.v_mps[0] - 1.6 * l.v_mps[0]).abs() < 1e-9 && (r.v_mps[1] - 1.6 * l.v_mps[1]).abs() < 1e-9 && (r.sigma_mps - 1.6 * l.sigma_mps).abs() < 1e-9, "{l:?} {r:?}");
    }

    /// Blobs of a given count and radius, seeded differently.
    fn blobs_of(x: f64, y: f64, count: usize, radius_m: f64, seed: usize) -> f64 {
        let mut s = 0.0;
        for k in 0..count {
            let h = crate::rng::hash64((k + seed) as u64);
            let cx = (h % 9000) as f64 - 4500.0;
            let cy = ((h >> 32) % 9000) as f64 - 4500.0;
            let r2 = (x - cx).powi(2) + (y - cy).powi(2);
            s += (-r2 / (2.0 * radius_m.powi(2))).exp();
        }
        s.min(1.2)
    }

    /// A map whose classes follow the score (thin from 0.5, thick from 0.8: the segmenter's
    /// defaults).
    fn classed(f: impl Fn(f64, f64) -> f64, grid: Grid) -> CloudMap {
        let mut m = map_from(f, grid);
        m.class = m.score.iter().map(|s| 1 + (*s >= 0.5) as u8 + (*s >= 0.8) as u8).collect();
        m
    }

    /// Two layers: many small faint clouds moving one way over a few large opaque ones moving
    /// another. The first pass follows the many; the residual pass finds the few.
    fn two_layer_maps(v_many: [f64; 2], v_few: [f64; 2], dt: f64) -> (CloudMap, CloudMap) {
        let g = Grid::new(&MapParams { max_zenith_deg: 77.0, ..Default::default() }, 1500.0);
        let field = |x: f64, y: f64, t: f64| {
            let many = 0.7 * blobs_of(x - v_many[0] * t, y - v_many[1] * t, 90, 180.0, 0);
            let few = 1.2 * blobs_of(x - v_few[0] * t, y - v_few[1] * t, 14, 450.0, 500);
            many.max(few)
        };
        (classed(|x, y| field(x, y, 0.0), g), classed(|x, y| field(x, y, dt), g))
    }

    #[test]
    fn residual_pass_finds_a_second_layer_and_cells_go_with_their_layer() {
        let (v_many, v_few, dt) = ([2.0, -3.5], [6.5, 6.5], 100.0);
        let (a, b) = two_layer_maps(v_many, v_few, dt);
        // Synthetic maps have no pixels to quantize them: match out to their edge.
        let m = measure_with((&a, &MapFeatures::within_zenith(&a, 90.0)), (&b, &MapFeatures::within_zenith(&b, 90.0)), dt, &MotionParams::default(), &[]);
        assert_eq!(m.layers.len(), 2, "{:?} {:?}", m.layers, m.vectors.iter().map(|v| v.v_mps).collect::<Vec<_>>());
        let near = |t: [f64; 2]| m.layers.iter().any(|l| dist(l.v_mps, t) < 0.5);
        assert!(near(v_many) && near(v_few), "{:?}", m.layers);
        // Each cloudy cell of the newer map is labelled with the layer whose cloud covers it (where
        // only one does).
        let labels = label_layers(&a, &b, dt, &[v_many, v_few]);
        let (mut ok, mut n) = (0, 0);
        for j in 0..b.grid.n {
            for i in 0..b.grid.n {
                let k = j * b.grid.n + i;
                if b.class[k] < 2 {
                    continue;
                }
                let c = b.grid.cell_centre_m(i, j);
                let many = 0.7 * blobs_of(c[0] - v_many[0] * dt, c[1] - v_many[1] * dt, 90, 180.0, 0);
                let few = 1.2 * blobs_of(c[0] - v_few[0] * dt, c[1] - v_few[1] * dt, 14, 450.0, 500);
                if (many >= 0.5) == (few >= 0.5) {
                    continue;
                }
                n += 1;
                ok += (labels[k] == (few >= 0.5) as u8) as usize;
            }
        }
        assert!(ok as f64 >= 0.85 * n as f64, "{ok} of {n} cells labelled with their layer");
    }

    /// Two layers seen through each other (their scores add): a fine, faint texture covering
    /// much of the sky moving one way over a coarse, opaque one moving faster another way, as a
    /// high veil looks over cumulus on the cumulus's plane. With the residual pass unable to help
    /// (its share set out of reach) only one layer is found from two maps; the cancelled-layer
    /// pass over three maps at equal steps finds both, each within 0.5 m/s. Additive two-motion
    /// model and its three-frame cancellation: J. R. Bergen et al., IEEE PAMI 14:886–896, 1992 (from memory).
    #[test]
    fn cancelled_layer_pass_finds_two_layers_of_different_speed_and_texture_scale() {
        let g = Grid::new(&MapParams { max_zenith_deg: 77.0, ..Default::default() }, 1500.0);
        let (v_fine, v_coarse, dt) = ([2.9, -1.0], [5.1, 6.1], 100.0);
        let field = |x: f64, y: f64, t: f64| {
            let fine = 0.6 * blobs_of(x - v_fine[0] * t, y - v_fine[1] * t, 400, 140.0, 0);
            let coarse = blobs_of(x - v_coarse[0] * t, y - v_coarse[1] * t, 40, 420.0, 900);
            fine + coarse
        };
        let maps: Vec<CloudMap> = (0..3).map(|k| classed(|x, y| field(x, y, k as f64 * dt), g)).collect();
        let xs: Vec<MapFeatures> = maps.iter().map(|m| MapFeatures::within_zenith(m, 90.0)).collect();
        let p = MotionParams { residual_min_share: 1.0, ..Default::default() };
        let near = |m: &MotionMeasurement, t: [f64; 2]| m.layers.iter().any(|l| dist(l.v_mps, t) < 0.5);
        let two = measure_layers((&maps[1], &xs[1]), (&maps[2], &xs[2]), Some((&maps[0], &xs[0], dt)), dt, &p, &[]);
        assert_eq!(two.layers.len(), 1, "the pass is off by default: {:?}", two.layers);
        let on = MotionParams { cancelled_layer_pass: true, ..p };
        let m = measure_layers((&maps[1], &xs[1]), (&maps[2], &xs[2]), Some((&maps[0], &xs[0], dt)), dt, &on, &[]);
        assert_eq!(m.layers.len(), 2, "{:?}", m.layers);
        assert!(near(&m, v_fine) && near(&m, v_coarse), "{:?}", m.layers);
        // Unequal steps: the other layer's two differences are not the same pattern; no pass.
        let uneven = measure_layers((&maps[1], &xs[1]), (&maps[2], &xs[2]), Some((&maps[0], &xs[0], 1.5 * dt)), dt, &on, &[]);
        assert_eq!(uneven.layers.len(), 1, "{:?}", uneven.layers);
    }

    #[test]
    fn featureless_maps_give_no_vectors() {
        let g = Grid::new(&MapParams { cells: 128, ..Default::default() }, 1500.0);
        let a = map_from(|_, _| 0.0, g);
        let m = measure(&a, &a, 20.0, &MotionParams::default(), &[]);
        assert!(m.vectors.is_empty() && m.global_mps.is_none());
    }
}
