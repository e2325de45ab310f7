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
//! The block vectors (m/s east and north) give a robust global vector (component median) and, by
//! 2-means clustering, up to two layers, accepted only when well separated. The layer that carries
//! the most opaque cloud (largest share of thick cells in its blocks) drives the forecast. A Kalman
//! filter per component smooths it over time, with gating of outliers; its standard deviation is the reported uncertainty.
//!
//! # References
//! * C. W. Chow et al., *Solar Energy* 85:2881–2893, 2011 (cross-correlation cloud motion from sky
//!   images).
//! * J. P. Lewis, "Fast normalized cross-correlation", *Vision Interface* 1995.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::cloudmap::CloudMap;
use crate::config::{ConfigError, check_range};

mod matching;
pub use matching::Feature;
use matching::block_vectors;

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
}

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
        check_range(file, "motion.filter_process_noise", self.filter_process_noise, 0.0, 10.0)
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
    /// Mean thick-cloud share of its blocks: the layer with the most drives the forecast.
    pub thick_share: f64,
}

/// Motion measured between two maps.
#[derive(Debug, Clone, PartialEq)]
pub struct Measurement {
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
}

/// Measure motion from map `a` (earlier) to map `b`, `dt_s` apart. Both maps must share a grid.
///
/// The score is matched; when thin cloud covers at least 5 % of the known cells, two passes match
/// thick cloud alone and thin cloud alone, so that a thin layer moving differently from the thick
/// one yields vectors of its own and does not blur the other's. All vectors are then clustered.
pub fn measure(a: &CloudMap, b: &CloudMap, dt_s: f64, params: &MotionParams, prior: Option<Motion>) -> Measurement {
    let mut vectors = vec![];
    let mut tried = 0;
    let known = a.class.iter().filter(|c| **c != 0).count().max(1);
    let thin = a.class.iter().filter(|c| **c == crate::segment::Class::Thin as u8).count();
    let passes: &[Feature] =
        if thin as f64 >= 0.05 * known as f64 { &[Feature::ThickOnly, Feature::ThinOnly] } else { &[Feature::Score] };
    for f in passes {
        let (v, t) = block_vectors(a, b, dt_s, params, *f, prior);
        vectors.extend(v);
        tried += t;
    }
    summarize(vectors, tried, dt_s, params)
}

fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n == 0 {
        f64::NAN
    } else if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

fn dist(a: [f64; 2], b: [f64; 2]) -> f64 {
    ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2)).sqrt()
}

fn summarize(vectors: Vec<BlockVector>, tried: usize, dt_s: f64, params: &MotionParams) -> Measurement {
    if vectors.is_empty() {
        return Measurement { dt_s, vectors, blocks_tried: tried, global_mps: None, layers: vec![], spread_mps: f64::NAN };
    }
    let g = [
        median(&mut vectors.iter().map(|v| v.v_mps[0]).collect::<Vec<_>>()),
        median(&mut vectors.iter().map(|v| v.v_mps[1]).collect::<Vec<_>>()),
    ];
    // 2-means from the median and the vector farthest from it.
    let far = vectors.iter().map(|v| v.v_mps).max_by(|a, b| dist(*a, g).total_cmp(&dist(*b, g))).unwrap_or(g);
    let mut c = [g, far];
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
    let layer = |ci: usize| {
        let members: Vec<&BlockVector> = vectors.iter().zip(&assign).filter(|(_, a)| **a == ci).map(|(v, _)| v).collect();
        let ms = members.iter().map(|v| v.mean_score).sum::<f64>() / members.len().max(1) as f64;
        let ts = members.iter().map(|v| v.thick_share).sum::<f64>() / members.len().max(1) as f64;
        let spread = (members.iter().map(|v| dist(v.v_mps, c[ci]).powi(2)).sum::<f64>() / members.len().max(1) as f64).sqrt();
        (LayerMotion { v_mps: c[ci], blocks: members.len(), mean_score: ms, thick_share: ts }, spread)
    };
    let (l0, s0) = layer(0);
    let (l1, s1) = layer(1);
    let nmin = 3.max((0.12 * vectors.len() as f64).ceil() as usize);
    let sep = dist(l0.v_mps, l1.v_mps);
    let two = l0.blocks >= nmin && l1.blocks >= nmin && sep >= params.two_layer_separation_mps && sep > 2.5 * s0.max(s1);
    let (layers, spread) = if two {
        let mut ls = vec![(l0, s0), (l1, s1)];
        ls.sort_by(|a, b| b.0.thick_share.total_cmp(&a.0.thick_share));
        let spread = ls[0].1;
        (ls.into_iter().map(|l| l.0).collect(), spread)
    } else {
        // One layer: robust mean of the inliers around the median.
        let mut devs: Vec<f64> = vectors.iter().map(|v| dist(v.v_mps, g)).collect();
        let mad = median(&mut devs);
        let lim = (3.0 * 1.4826 * mad).max(0.5);
        let inl: Vec<&BlockVector> = vectors.iter().filter(|v| dist(v.v_mps, g) <= lim).collect();
        let m = inl.len().max(1) as f64;
        let v = [inl.iter().map(|v| v.v_mps[0]).sum::<f64>() / m, inl.iter().map(|v| v.v_mps[1]).sum::<f64>() / m];
        let spread = (inl.iter().map(|b| dist(b.v_mps, v).powi(2)).sum::<f64>() / m).sqrt();
        let ms = inl.iter().map(|v| v.mean_score).sum::<f64>() / m;
        let ts = inl.iter().map(|v| v.thick_share).sum::<f64>() / m;
        (vec![LayerMotion { v_mps: v, blocks: inl.len(), mean_score: ms, thick_share: ts }], spread)
    };
    Measurement { dt_s, vectors, blocks_tried: tried, global_mps: Some(g), layers, spread_mps: spread }
}

/// Temporal filter of the forecast's motion vector (a Kalman filter per component with gating).
#[derive(Debug, Clone, Default)]
pub struct MotionFilter {
    state: Option<([f64; 2], f64)>,
    /// Measurements rejected by the gate.
    pub gated: usize,
}

/// The filtered motion at one frame.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Motion {
    /// Velocity (east, north) \[m/s\].
    pub v_mps: [f64; 2],
    /// One-sigma uncertainty of each component \[m/s\].
    pub sigma_mps: f64,
}

impl MotionFilter {
    /// Current estimate.
    pub fn current(&self) -> Option<Motion> {
        self.state.map(|(v, p)| Motion { v_mps: v, sigma_mps: p.sqrt() })
    }

    /// Advance by `dt_s` and fold in a measurement (if any).
    pub fn update(&mut self, m: Option<&Measurement>, dt_s: f64, params: &MotionParams) -> Option<Motion> {
        let meas = m.and_then(|m| m.layers.first().map(|l| (l.v_mps, m.spread_mps, l.blocks)));
        match (&mut self.state, meas) {
            (None, Some((v, spread, nb))) => {
                let r = spread.powi(2) / nb.max(1) as f64 + 0.05;
                self.state = Some((v, r.max(0.25)));
            }
            (Some((x, p)), Some((v, spread, nb))) => {
                *p += params.filter_process_noise * dt_s;
                let r = spread.powi(2) / nb.max(1) as f64 + 0.05;
                let innov = dist(v, *x);
                let r_eff = if innov > 3.0 * (*p + r).sqrt() && *p < 1.0 {
                    self.gated += 1;
                    r * 25.0
                } else {
                    r
                };
                let k = *p / (*p + r_eff);
                x[0] += k * (v[0] - x[0]);
                x[1] += k * (v[1] - x[1]);
                *p *= 1.0 - k;
            }
            (Some((_, p)), None) => *p += params.filter_process_noise * dt_s,
            (None, None) => {}
        }
        self.current()
    }
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
        CloudMap { grid, class: vec![1; n * n], in_view: vec![true; n * n], score, offset: 0.0 }
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
        let m = measure(&a, &b, dt, &MotionParams::default(), None);
        let l = m.layers[0];
        assert!(m.vectors.len() > 10, "{} vectors", m.vectors.len());
        assert!((l.v_mps[0] - v[0]).abs() < 0.1 && (l.v_mps[1] - v[1]).abs() < 0.1, "{:?}", l.v_mps);
        assert_eq!(m.layers.len(), 1);
    }

    #[test]
    fn featureless_maps_give_no_vectors() {
        let g = Grid::new(&MapParams { cells: 128, ..Default::default() }, 1500.0);
        let a = map_from(|_, _| 0.0, g);
        let m = measure(&a, &a, 20.0, &MotionParams::default(), None);
        assert!(m.vectors.is_empty() && m.global_mps.is_none());
    }

    #[test]
    fn filter_gates_an_outlier() {
        let p = MotionParams::default();
        let mk = |v: [f64; 2]| Measurement {
            dt_s: 20.0,
            vectors: vec![],
            blocks_tried: 1,
            global_mps: Some(v),
            layers: vec![LayerMotion { v_mps: v, blocks: 30, mean_score: 1.0, thick_share: 0.5 }],
            spread_mps: 0.3,
        };
        let mut f = MotionFilter::default();
        for _ in 0..10 {
            f.update(Some(&mk([5.0, 0.0])), 20.0, &p);
        }
        let m = f.update(Some(&mk([15.0, 0.0])), 20.0, &p).unwrap();
        assert!(m.v_mps[0] < 6.0, "{:?}", m);
        assert_eq!(f.gated, 1);
    }
}
