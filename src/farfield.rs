//! The far field read by what the same clouds turned out to be nearer. Toward the horizon the
//! map's features (red/blue against the clear sky, brightness) separate cloud from clear sky less
//! well: haze, a low sun's glow and the slant path mix them (`distance`, `brightness`). But the
//! engine tracks the clouds' motion, and a piece of cloud plane seen at zenith 80° now is seen
//! nearer some minutes later, where the same rules classify it well. This module keeps a short
//! history of the far cells' features, follows each piece of plane forward by the tracked motion
//! (frozen advection, the forecast's own model), and where it lands within
//! [`NEAR_ZENITH_DEG`] pairs the old far features with the class read there now. From those pairs
//! it learns, per 5° zenith band from [`FIRST_BAND_DEG`] to [`LAST_BAND_DEG`], two logistic
//! regressions (common practice, no source): cloud (thin or thick) against clear, and thick against
//! not thick. Whether a far cell holds cloud is then the fit's; cloud the rule found keeps the
//! rule's thickness, cloud only the fit finds takes the fit's more probable of thin and thick
//! (thickness depends on the path through the cloud, which overhead is not the beam's slant:
//! [`decide`]).
//!
//! * Features per far cell: the rule's class (thin, thick as indicators), the raw cloudiness score
//!   (`segment`), the log of its brightness against the learned clear sky's at the frame's exposure
//!   (0 where either is unknown), the cosine of its angle to the sun, that log times the cosine, and
//!   its place within the band.
//! * Shrinkage toward the current rule: the fit is the maximum a posteriori estimate under a
//!   Gaussian prior centred on weights that reproduce the rule (logit ±[`PRIOR_LOGIT`] for the
//!   rule's class), precision [`PRIOR_PRECISION`] (penalised logistic regression, solved by Newton
//!   steps warm-started from the last fit; common practice, no source). With few pairs the model is
//!   the rule.
//! * A band is fitted from [`MIN_PAIRS`] pairs and used only once its predictions, made for each
//!   pair *before* that pair was fitted (a prequential test: Dawid 1984, from memory), have been
//!   right about cloud or clear more often than the rule's by [`MIN_GAIN`] over at least [`MIN_EVALUATED`] pairs from
//!   [`MIN_EVALUATED_FRAMES`] frames. So it is applied only beyond the zenith where the pairs show
//!   it helps, and in no band on a sky whose far field the rules already read as well.
//! * Cells the camera sees within [`PLANT_RAY_MARGIN_DEG`] of where the plant's sun rays cross
//!   the plane now keep the rules' class (the engine passes that zenith): the current state reads
//!   them, and the pyranometers' transmittance tuning calibrates the classes as the rules give
//!   them (measured on the independent breaking overcast, whose plant's rays cross at ~70°:
//!   reclassified there too, the 1-minute RMSE rose 88 → 100 W/m²).
//! * The history, pairs and fits are reset when frames are more than the motion's gap limit apart
//!   or the grid changes; no pair is made while motion is unconfirmed or two layers are tracked
//!   (one motion cannot follow both), and no band is applied then either.
//!
//! Pairs carry the cloud's evolution over the lag as well as the reading's error: the later near
//! class is what the plant meets when that cloud arrives, which is what the forecast's look-up
//! into the far field asks for.
//!
//! A. P. Dawid, "Statistical theory: the prequential approach", *J. R. Statist. Soc. A*
//! 147:278–292, 1984 (from memory).

use std::collections::VecDeque;

use crate::cloudmap::CloudMap;
use crate::segment::{Class, Reference};

/// Labels come from cells within this zenith angle \[°\] (the near field of `distance`, where the
/// rules read cloud well).
pub const NEAR_ZENITH_DEG: f32 = crate::segment::distance::NEAR_ZENITH_DEG;
/// The first far band starts here \[°\].
pub const FIRST_BAND_DEG: f32 = 60.0;
/// The last far band ends here \[°\] (the map reaches 84° by default).
pub const LAST_BAND_DEG: f32 = 85.0;
/// Band width \[°\].
const BAND_DEG: f32 = 5.0;
/// Number of far bands.
pub const BANDS: usize = 5;
/// Features per pair.
const D: usize = 8;
/// A snapshot of the far cells is kept this often \[s\].
pub const SNAPSHOT_EVERY_S: f64 = 60.0;
/// Snapshots older than this are dropped \[s\]: frozen advection over longer than the forecast's
/// reach (15 min) plus a margin says little (own choice).
pub const MAX_LAG_S: f64 = 1200.0;
/// Consecutive accepted motion measurements before pairs are made (the alarms' "confirmed
/// motion").
pub const MIN_CONFIRMED_RUN: usize = 3;
/// Far cells are reclassified only this far \[°\] beyond the zenith at which the camera sees the
/// plant's sun rays cross the plane now: the cells the current state reads, and which the
/// pyranometers' transmittance tuning calibrates as the rules classify them, stay the rules'.
pub const PLANT_RAY_MARGIN_DEG: f32 = 5.0;
/// Pairs kept per band (the newest; a sliding window, so the fit follows a changing sky).
pub const WINDOW_PAIRS: usize = 8000;
/// Most pairs a band takes from one frame (evenly spaced among its candidates). One frame's pairs
/// all label the one piece of cloud then overhead, seen at many lags, so they say little more
/// than a few hundred would; the cap makes the window span [`WINDOW_PAIRS`] / this frames (about
/// 16 minutes at 30-s frames) instead of the last three or so (on an independent breaking
/// overcast every candidate kept made about 2400 pairs per band and frame: the window then held
/// about 1.5 minutes of sky).
pub const PAIRS_PER_FRAME: usize = 250;
/// Pairs a band needs before it is fitted.
pub const MIN_PAIRS: usize = 1500;
/// Prequentially evaluated pairs a band needs before it is used.
pub const MIN_EVALUATED: usize = 1000;
/// Frames that must have contributed evaluated pairs before a band is used.
pub const MIN_EVALUATED_FRAMES: usize = 5;
/// Least gain in the share of pairs right (model against rule) for a band to be used.
pub const MIN_GAIN: f64 = 0.02;
/// The prior's logit for the rule's class (probability 0.88).
pub const PRIOR_LOGIT: f64 = 2.0;
/// The prior's precision about the rule's weights (about 200 pairs' worth of evidence at p = ½).
pub const PRIOR_PRECISION: f64 = 50.0;
/// Newton steps per refit (warm-started; the first fit takes [`FIRST_FIT_STEPS`]).
const REFIT_STEPS: usize = 2;
const FIRST_FIT_STEPS: usize = 8;

/// One far cell's features as read in its frame.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FarCell {
    /// Map cell index.
    pub cell: u32,
    /// Zenith of the cell \[°\].
    pub z_deg: f32,
    /// Cloudiness score (`segment`, before any far-field correction).
    pub score: f32,
    /// `ln(reading / (exposure × clear-sky brightness))`, the largest channel against the learned
    /// clear sky's at the frame's exposure; NaN when either is unknown.
    pub ln_brightness_ratio: f32,
    /// Cosine of the angle between the cell's direction and the sun's.
    pub cos_sun: f32,
    /// The rule's class (`Class` as u8, never unknown).
    pub rule: u8,
}

impl FarCell {
    /// The band (0 from [`FIRST_BAND_DEG`]) of this cell, if it lies in one.
    pub fn band(&self) -> Option<usize> {
        band_of(self.z_deg)
    }

    /// The regression's inputs.
    fn x(&self) -> [f64; D] {
        let l = if self.ln_brightness_ratio.is_finite() { self.ln_brightness_ratio.clamp(-1.0, 0.5) as f64 } else { 0.0 };
        let c = self.cos_sun.clamp(-1.0, 1.0) as f64;
        let mid = self.band().map_or(0.0, |b| FIRST_BAND_DEG + BAND_DEG * (b as f32 + 0.5));
        [
            1.0,
            f64::from(self.rule == Class::Thin as u8),
            f64::from(self.rule == Class::Thick as u8),
            self.score.clamp(-1.0, 2.0) as f64,
            l,
            l * c,
            c,
            ((self.z_deg - mid) / BAND_DEG) as f64,
        ]
    }
}

/// The far band holding zenith `z_deg`.
pub fn band_of(z_deg: f32) -> Option<usize> {
    (FIRST_BAND_DEG..LAST_BAND_DEG).contains(&z_deg).then(|| (((z_deg - FIRST_BAND_DEG) / BAND_DEG) as usize).min(BANDS - 1))
}

/// What [`far_cells`] reads of one frame's map.
pub struct FrameCells<'a> {
    /// The map (its classes are the rule's).
    pub map: &'a CloudMap,
    /// Zenith per cell \[°\].
    pub z_deg: &'a [f32],
    /// Angle to the sun per cell \[°\].
    pub gamma_deg: &'a [f32],
    /// Clear-sky library bin per cell.
    pub bin: &'a [u16],
    /// Each cell's reading of plain sky (8-bit RGB).
    pub rgb: &'a [[u8; 3]],
    /// The clear-sky reference.
    pub reference: &'a Reference,
    /// The frame's exposure against the library's brightness.
    pub exposure: Option<f32>,
}

/// The far cells of a frame (zenith [`FIRST_BAND_DEG`]–[`LAST_BAND_DEG`], known class and
/// score), in cell order.
pub fn far_cells(f: &FrameCells) -> Vec<FarCell> {
    let n = f.map.class.len();
    let mut out = vec![];
    for k in 0..n {
        let (z, c, s) = (f.z_deg[k], f.map.class[k], f.map.score[k]);
        if band_of(z).is_none() || c == Class::Unknown as u8 || !s.is_finite() {
            continue;
        }
        let ratio = match (f.exposure, f.reference.clear_brightness(f.bin[k] as usize)) {
            (Some(e), Some(b)) if e > 0.0 => {
                let expected = (e * b).min(255.0);
                (crate::segment::brightness::reading(f.rgb[k]).max(1.0) / expected).ln()
            }
            _ => f32::NAN,
        };
        out.push(FarCell { cell: k as u32, z_deg: z, score: s, ln_brightness_ratio: ratio, cos_sun: f.gamma_deg[k].to_radians().cos(), rule: c });
    }
    out
}

/// One pair: far features then, the near class now, and who had it right before it was fitted.
#[derive(Debug, Clone, Copy)]
struct Pair {
    x: [f64; D],
    label: u8,
    rule: u8,
    /// The band's prediction before this pair was fitted (`None`: the band was not fitted yet).
    model: Option<u8>,
}

/// A logistic regression's weights.
type Weights = [f64; D];

/// Weights that reproduce the rule: `[cloudy, thick]`.
fn rule_weights() -> [Weights; 2] {
    let a = PRIOR_LOGIT;
    let mut cloudy = [0.0; D];
    cloudy[..3].copy_from_slice(&[-a, 2.0 * a, 2.0 * a]);
    let mut thick = [0.0; D];
    thick[..3].copy_from_slice(&[-a, 0.0, 2.0 * a]);
    [cloudy, thick]
}

fn sigmoid(t: f64) -> f64 {
    1.0 / (1.0 + (-t).exp())
}

fn dot(w: &Weights, x: &[f64; D]) -> f64 {
    w.iter().zip(x).map(|(a, b)| a * b).sum()
}

/// Whether a class is cloud.
fn cloudy(c: u8) -> bool {
    c == Class::Thin as u8 || c == Class::Thick as u8
}

/// The class a far cell of features `x`, which the rule calls `rule`, is given: whether there is
/// cloud comes from the fit; cloud the rule found keeps the rule's thickness, and cloud only the fit
/// finds takes the fit's. Only the presence of cloud is carried from the near view: it belongs to
/// the piece of plane, and the advection moves it unchanged, while thin or thick depends on the
/// path the light takes through the cloud, and the forecast's beam crosses the far field at the
/// sun's slant, not overhead (measured on the independent breaking overcast with the near view's
/// thickness applied as well: pooled 5–15 min skill 0.52 → 0.45, 5 min 0.58 → 0.34; with the
/// rule's thickness kept 0.53).
fn decide(w: &[Weights; 2], x: &[f64; D], rule: u8) -> u8 {
    let m = predict(w, x);
    if cloudy(m) && cloudy(rule) { rule } else { m }
}

/// The most probable class of `x` under the two models.
fn predict(w: &[Weights; 2], x: &[f64; D]) -> u8 {
    let (p_cloud, p_thick) = (sigmoid(dot(&w[0], x)), sigmoid(dot(&w[1], x)));
    let p_thick = p_thick.min(p_cloud);
    let p = [1.0 - p_cloud, p_cloud - p_thick, p_thick];
    let best = (0..3).max_by(|&a, &b| p[a].total_cmp(&p[b])).unwrap_or(0);
    [Class::Clear, Class::Thin, Class::Thick][best] as u8
}

/// The penalised loss `−Σ log-likelihood + ½ PRIOR_PRECISION ‖w − prior‖²`.
fn loss(w: &Weights, prior: &Weights, pairs: &VecDeque<Pair>, y: &impl Fn(&Pair) -> bool) -> f64 {
    let pen: f64 = w.iter().zip(prior).map(|(a, b)| (a - b) * (a - b)).sum::<f64>() * 0.5 * PRIOR_PRECISION;
    // −log σ(±t) = softplus(∓t), written to stay finite for large |t|.
    let softplus = |t: f64| if t > 30.0 { t } else { t.exp().ln_1p() };
    pen + pairs.iter().map(|p| { let t = dot(w, &p.x); if y(p) { softplus(-t) } else { softplus(t) } }).sum::<f64>()
}

/// Newton steps of penalised logistic regression (the loss of [`loss`]) from `w`, each halved
/// until the loss falls (a plain Newton step overshoots where the fit saturates).
fn newton(w: &mut Weights, prior: &Weights, pairs: &VecDeque<Pair>, y: impl Fn(&Pair) -> bool, steps: usize) {
    let mut current = loss(w, prior, pairs, &y);
    for _ in 0..steps {
        let mut g = [0.0; D];
        let mut h = nalgebra::SMatrix::<f64, D, D>::identity() * PRIOR_PRECISION;
        for (gi, (wi, pi)) in g.iter_mut().zip(w.iter().zip(prior)) {
            *gi = PRIOR_PRECISION * (wi - pi);
        }
        for p in pairs {
            let q = sigmoid(dot(w, &p.x));
            let r = q - f64::from(y(p));
            let v = (q * (1.0 - q)).max(1e-9);
            for a in 0..D {
                g[a] += r * p.x[a];
                for b in a..D {
                    h[(a, b)] += v * p.x[a] * p.x[b];
                }
            }
        }
        for a in 0..D {
            for b in 0..a {
                h[(a, b)] = h[(b, a)];
            }
        }
        let Some(ch) = h.cholesky() else { return };
        let step = ch.solve(&nalgebra::SVector::<f64, D>::from(g));
        let mut scale = 1.0;
        let mut moved = false;
        for _ in 0..12 {
            let mut trial = *w;
            for (wi, s) in trial.iter_mut().zip(step.iter()) {
                *wi -= scale * s;
            }
            let l = loss(&trial, prior, pairs, &y);
            if l < current {
                (*w, current, moved) = (trial, l, true);
                break;
            }
            scale *= 0.5;
        }
        if !moved {
            return;
        }
    }
}

/// One far band's pairs and fit.
#[derive(Debug, Clone, Default)]
struct Band {
    pairs: VecDeque<Pair>,
    /// `[cloudy, thick]` weights once fitted.
    fit: Option<[Weights; 2]>,
    /// Frames that contributed prequentially evaluated pairs.
    evaluated_frames: usize,
}

impl Band {
    /// `(evaluated pairs, share right by the model, share right by the rule)` over the window's
    /// pairs that had a prediction when they came; right is cloud or clear as the near view found.
    fn record(&self) -> (usize, f64, f64) {
        let (mut n, mut model, mut rule) = (0usize, 0usize, 0usize);
        for p in &self.pairs {
            if let Some(m) = p.model {
                n += 1;
                model += usize::from(cloudy(m) == cloudy(p.label));
                rule += usize::from(cloudy(p.rule) == cloudy(p.label));
            }
        }
        let share = |k: usize| if n > 0 { k as f64 / n as f64 } else { 0.0 };
        (n, share(model), share(rule))
    }

    fn active(&self) -> bool {
        let (n, model, rule) = self.record();
        self.fit.is_some() && n >= MIN_EVALUATED && self.evaluated_frames >= MIN_EVALUATED_FRAMES && model >= rule + MIN_GAIN
    }

    /// Refit from [`MIN_PAIRS`] pairs on.
    fn refit(&mut self) {
        if self.pairs.len() < MIN_PAIRS {
            return;
        }
        self.refit_with(if self.fit.is_some() { REFIT_STEPS } else { FIRST_FIT_STEPS });
    }

    /// `steps` Newton steps from the last fit (the rule's weights before the first).
    fn refit_with(&mut self, steps: usize) {
        let prior = rule_weights();
        let mut w = self.fit.unwrap_or(prior);
        let thin_or_thick = |p: &Pair| p.label == Class::Thin as u8 || p.label == Class::Thick as u8;
        newton(&mut w[0], &prior[0], &self.pairs, thin_or_thick, steps);
        newton(&mut w[1], &prior[1], &self.pairs, |p| p.label == Class::Thick as u8, steps);
        if w.iter().flatten().all(|v| v.is_finite()) {
            self.fit = Some(w);
        } else {
            self.fit = None;
        }
    }
}

/// One frame's input to [`FarFieldLearner::step`].
pub struct FarStep<'a> {
    /// Frame time \[s\] (any fixed origin).
    pub time_s: f64,
    /// The frame's map as the rules read it.
    pub map: &'a CloudMap,
    /// Zenith per cell \[°\].
    pub z_deg: &'a [f32],
    /// The frame's far cells ([`far_cells`]).
    pub far: Vec<FarCell>,
    /// The confirmed single-layer motion on the map's plane \[m/s\] (east, north); `None` when
    /// motion is unconfirmed or two layers are tracked: no pairs are made and nothing is applied.
    pub motion_mps: Option<[f64; 2]>,
    /// Frames further apart than this reset the learner \[s\] (the motion's gap limit).
    pub max_gap_s: f64,
    /// Far cells are reclassified only from this zenith angle on \[°\].
    pub apply_from_zenith_deg: f32,
}

/// What a step did.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct FarOutcome {
    /// Pairs made at this frame.
    pub pairs: usize,
    /// Bit `b` set: band `b` is in use.
    pub active_bands: u8,
    /// Far cells whose class changed.
    pub changed: usize,
}

/// A kept snapshot of far cells.
#[derive(Debug, Clone)]
struct Snapshot {
    time_s: f64,
    cells: Vec<FarCell>,
}

/// The far-field learner's state (see the module's documentation).
#[derive(Debug, Clone, Default)]
pub struct FarFieldLearner {
    snapshots: VecDeque<Snapshot>,
    bands: [Band; BANDS],
    last_time_s: Option<f64>,
    grid_n: usize,
}

impl FarFieldLearner {
    /// Forget everything (history, pairs, fits).
    pub fn reset(&mut self) {
        *self = FarFieldLearner::default();
    }

    /// Pairs held per band.
    pub fn pairs_held(&self) -> [usize; BANDS] {
        std::array::from_fn(|b| self.bands[b].pairs.len())
    }

    /// Per band: `(evaluated pairs, share right by the model, share right by the rule)`.
    pub fn records(&self) -> [(usize, f64, f64); BANDS] {
        std::array::from_fn(|b| self.bands[b].record())
    }

    /// Take a frame: pair its near cells with the kept far snapshots moved by the motion, refit the
    /// bands, keep a snapshot when one is due, and reclassify `map`'s far cells in the bands in use.
    pub fn step(&mut self, s: FarStep, map: &mut CloudMap) -> FarOutcome {
        let n = s.map.grid.n;
        if self.grid_n != n || self.last_time_s.is_some_and(|t| !(s.time_s - t <= s.max_gap_s && s.time_s > t)) {
            self.reset();
            self.grid_n = n;
        }
        self.last_time_s = Some(s.time_s);
        self.snapshots.retain(|k| s.time_s - k.time_s <= MAX_LAG_S);
        let mut out = FarOutcome::default();
        if let Some(v) = s.motion_mps.filter(|v| v.iter().all(|x| x.is_finite())) {
            out.pairs = self.pair(&s, v);
            for b in &mut self.bands {
                b.refit();
            }
            for (k, b) in self.bands.iter().enumerate() {
                if b.active() {
                    out.active_bands |= 1 << k;
                }
            }
            out.changed = self.apply(&s.far, out.active_bands, s.apply_from_zenith_deg, map);
        }
        if self.snapshots.back().is_none_or(|k| s.time_s - k.time_s >= SNAPSHOT_EVERY_S) {
            self.snapshots.push_back(Snapshot { time_s: s.time_s, cells: s.far });
        }
        out
    }

    /// Pair each near cell (known class, within [`NEAR_ZENITH_DEG`]) with the far cell of each
    /// snapshot it was `v · age` upwind of; returns the pairs made.
    fn pair(&mut self, s: &FarStep, v: [f64; 2]) -> usize {
        let n = s.map.grid.n;
        let cell_m = s.map.grid.cell_m;
        let near: Vec<usize> = (0..n * n).filter(|&k| s.z_deg[k] < NEAR_ZENITH_DEG && s.map.class[k] != Class::Unknown as u8).collect();
        let mut candidates: [Vec<(FarCell, u8)>; BANDS] = Default::default();
        for snap in &self.snapshots {
            let age = s.time_s - snap.time_s;
            if age <= 0.0 {
                continue;
            }
            let (di, dj) = (v[0] * age / cell_m, v[1] * age / cell_m);
            for &k in &near {
                let (i, j) = (((k % n) as f64 - di).round(), ((k / n) as f64 - dj).round());
                if i < 0.0 || j < 0.0 || i >= n as f64 || j >= n as f64 {
                    continue;
                }
                let src = (j as usize * n + i as usize) as u32;
                let Ok(at) = snap.cells.binary_search_by_key(&src, |c| c.cell) else { continue };
                let c = snap.cells[at];
                if let Some(b) = c.band() {
                    candidates[b].push((c, s.map.class[k]));
                }
            }
        }
        let mut made = 0;
        for (band, cand) in self.bands.iter_mut().zip(&candidates) {
            let take = cand.len().min(PAIRS_PER_FRAME);
            let mut evaluated = false;
            for m in 0..take {
                let (c, label) = cand[m * cand.len() / take];
                let x = c.x();
                let model = band.fit.as_ref().map(|w| decide(w, &x, c.rule));
                evaluated |= model.is_some();
                band.pairs.push_back(Pair { x, label, rule: c.rule, model });
                if band.pairs.len() > WINDOW_PAIRS {
                    band.pairs.pop_front();
                }
            }
            band.evaluated_frames += usize::from(evaluated);
            made += take;
        }
        made
    }

    /// Reclassify the far cells of the bands set in `active` by their fits; returns the cells changed.
    fn apply(&self, far: &[FarCell], active: u8, from_z_deg: f32, map: &mut CloudMap) -> usize {
        if active == 0 {
            return 0;
        }
        let mut changed = 0;
        for c in far.iter().filter(|c| c.z_deg >= from_z_deg) {
            let Some(b) = c.band().filter(|b| active & (1 << b) != 0) else { continue };
            let Some(w) = &self.bands[b].fit else { continue };
            let k = c.cell as usize;
            let new = decide(w, &c.x(), map.class[k]);
            if new != map.class[k] {
                map.class[k] = new;
                if let Some(d) = map.thin_depth.get_mut(k) {
                    *d = 0.5;
                }
                if let Some(br) = map.brightness.get_mut(k) {
                    *br = 0.0;
                }
                changed += 1;
            }
        }
        changed
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cloudmap::Grid;

    /// A map of `n²` cells whose zenith grows with the distance from the centre (linear from 0 at
    /// the centre to 84° at the edge, enough for these tests) and whose classes come from `class`.
    fn map(n: usize, class: impl Fn(usize, usize) -> u8) -> (CloudMap, Vec<f32>) {
        let z: Vec<f32> = (0..n * n)
            .map(|k| {
                let (x, y) = ((k % n) as f32 + 0.5 - n as f32 / 2.0, (k / n) as f32 + 0.5 - n as f32 / 2.0);
                ((x * x + y * y).sqrt() / (n as f32 / 2.0) * 84.0).min(89.0)
            })
            .collect();
        let cls: Vec<u8> = (0..n * n).map(|k| class(k % n, k / n)).collect();
        let m = CloudMap { grid: Grid { n, cell_m: 100.0, height_m: 1000.0 }, score: vec![0.5; n * n], class: cls, in_view: vec![true; n * n], offset: 0.0, brightness: vec![0.0; n * n], thin_depth: vec![0.5; n * n] };
        (m, z)
    }

    #[test]
    fn with_no_pairs_the_model_is_the_rule() {
        let w = rule_weights();
        for rule in [Class::Clear, Class::Thin, Class::Thick] {
            let c = FarCell { cell: 0, z_deg: 80.0, score: 0.7, ln_brightness_ratio: -0.1, cos_sun: 0.5, rule: rule as u8 };
            assert_eq!(predict(&w, &c.x()), rule as u8);
        }
    }

    /// Only whether there is cloud is the fit's: cloud the rule found keeps the rule's thickness,
    /// cloud only the fit finds takes the fit's, and cloud the fit rejects is clear.
    #[test]
    fn the_fit_decides_cloud_or_clear_and_the_rule_keeps_its_thickness() {
        let mut x = [0.0; D];
        x[0] = 1.0;
        let mut thick = rule_weights();
        thick[0][0] = 5.0;
        thick[1][0] = 5.0;
        assert_eq!(decide(&thick, &x, Class::Thin as u8), Class::Thin as u8);
        assert_eq!(decide(&thick, &x, Class::Clear as u8), Class::Thick as u8);
        let mut clear = rule_weights();
        clear[0][0] = -5.0;
        assert_eq!(decide(&clear, &x, Class::Thick as u8), Class::Clear as u8);
    }

    /// Pairs in which the rule calls every bright far cell thick while the near field later finds
    /// it clear (the glowing sky toward a low sun): the fit learns that brightness near the clear
    /// sky's means clear, and a few pairs leave the rule in place (shrinkage).
    #[test]
    fn the_fit_learns_what_the_rule_gets_wrong_and_keeps_the_rule_on_little_data() {
        let cell = |bright: bool| FarCell { cell: 0, z_deg: 81.0, score: 0.9, ln_brightness_ratio: if bright { 0.0 } else { -0.2 }, cos_sun: 0.8, rule: Class::Thick as u8 };
        let pairs = |n: usize| -> VecDeque<Pair> {
            (0..n).map(|i| {
                let bright = i % 2 == 0;
                Pair { x: cell(bright).x(), label: if bright { Class::Clear as u8 } else { Class::Thick as u8 }, rule: Class::Thick as u8, model: None }
            }).collect()
        };
        let fit = |n: usize| {
            let mut b = Band { pairs: pairs(n), ..Default::default() };
            b.fit = Some(rule_weights());
            b.refit_with(FIRST_FIT_STEPS);
            b.fit.expect("fitted")
        };
        let w = fit(2000);
        assert_eq!(predict(&w, &cell(true).x()), Class::Clear as u8);
        assert_eq!(predict(&w, &cell(false).x()), Class::Thick as u8);
        let w = fit(20);
        assert_eq!(predict(&w, &cell(true).x()), Class::Thick as u8, "20 pairs must not overturn the rule");
    }

    /// A far strip that the rule calls thick but that is clear, drifting toward the camera at
    /// 20 m/s: once its cells have been seen near (clear), the band learns and the far field's
    /// strip is reclassified clear; a gap in the frames resets everything.
    #[test]
    fn pairs_follow_the_motion_and_a_gap_resets() {
        let n = 96;
        let mut learner = FarFieldLearner::default();
        // Everything far reads thick (the rule's error), everything near clear (the truth).
        let v = [0.0, -20.0];
        let mut last = FarOutcome::default();
        for f in 0..60 {
            let t = 30.0 * f as f64;
            let (mut m, z) = map(n, |_, _| 0);
            for (c, zk) in m.class.iter_mut().zip(&z) {
                *c = if *zk >= FIRST_BAND_DEG { Class::Thick as u8 } else { Class::Clear as u8 };
            }
            let far: Vec<FarCell> = (0..n * n)
                .filter(|&k| band_of(z[k]).is_some())
                .map(|k| FarCell { cell: k as u32, z_deg: z[k], score: 0.9, ln_brightness_ratio: 0.0, cos_sun: 0.5, rule: Class::Thick as u8 })
                .collect();
            let before = m.clone();
            last = learner.step(FarStep { time_s: t, map: &before, z_deg: &z, far, motion_mps: Some(v), max_gap_s: 180.0, apply_from_zenith_deg: 0.0 }, &mut m);
            if last.active_bands != 0 {
                assert!(last.changed > 0);
                let k = (0..n * n).find(|&k| band_of(z[k]).is_some_and(|b| last.active_bands & (1 << b) != 0)).expect("a cell");
                assert_eq!(m.class[k], Class::Clear as u8);
            }
        }
        assert!(last.pairs > 0, "pairs made");
        assert!(last.active_bands != 0, "a band in use after 30 minutes: {:?} {:?}", learner.pairs_held(), learner.records());
        // Ten minutes without frames: the history goes.
        let (m, z) = map(n, |_, _| Class::Clear as u8);
        let mut m2 = m.clone();
        let o = learner.step(FarStep { time_s: 30.0 * 60.0 + 600.0, map: &m, z_deg: &z, far: vec![], motion_mps: Some(v), max_gap_s: 180.0, apply_from_zenith_deg: 0.0 }, &mut m2);
        assert_eq!(o, FarOutcome::default());
        assert_eq!(learner.pairs_held(), [0; BANDS]);
    }

    #[test]
    fn no_motion_no_pairs_and_nothing_applied() {
        let n = 48;
        let (m, z) = map(n, |_, _| Class::Thick as u8);
        let mut learner = FarFieldLearner::default();
        for f in 0..10 {
            let mut out = m.clone();
            let far = far_cells(&FrameCells { map: &m, z_deg: &z, gamma_deg: &vec![90.0; n * n], bin: &vec![0; n * n], rgb: &vec![[200; 3]; n * n], reference: &Reference::default(), exposure: None });
            assert!(far.iter().all(|c| c.ln_brightness_ratio.is_nan()));
            let o = learner.step(FarStep { time_s: 30.0 * f as f64, map: &m, z_deg: &z, far, motion_mps: None, max_gap_s: 180.0, apply_from_zenith_deg: 0.0 }, &mut out);
            assert_eq!(o, FarOutcome::default());
            assert_eq!(out.class, m.class);
        }
    }
}
