//! Cloud base height from shadow timing at the plant's pyranometers ([`ShadowTiming`]).
//!
//! The cloud map is built on a plane at an assumed height `h_map`. The camera only measures
//! directions, so a cloud truly at `h` lies on the map `h_map / h` times as far from the camera as
//! it really is, and the motion measured on the map is `h_map / h` times its true speed. A ground
//! point `g` (relative to the camera) is shaded by the map point `g · h_map / h` plus its sun-ray
//! offset at the map's height; a reading taken `lag` seconds before the frame is shaded by the map
//! point that has since moved by `v_map · lag` (both exactly as the forecast looks up the map with
//! [`crate::forecast::Advection::cbh_factor`]). Only the pyranometers' positions on the map depend
//! on the candidate height: where they are, and so when a mapped cloud edge reached each of them.
//!
//! For each frame and each candidate height (a log-spaced scan around the map height) the
//! predicted beam transmittance at every pyranometer reading of the last
//! [`ShadowParams::sample_window_s`] is paired with the measured clear-sky index; the cost of a
//! candidate is `1 − r²` of the straight-line fit of measured on predicted (so the diffuse level
//! and the transmittances' scale do not matter, only where and when the shadows fall). Costs are
//! summed over the frames of the last [`ShadowParams::window_s`] (their sufficient statistics are
//! kept, so the sum is exact); the estimate is the minimum, refined by a parabola in `ln h`. Its
//! uncertainty is the spread of the minimum over a block bootstrap (blocks of
//! [`ShadowParams::block_s`] of frames), never below half a scan step. No estimate is given
//! without shadow events (clear sky or overcast: the measured index does not move), with fewer
//! than [`ShadowParams::min_blocks`] blocks, a flat cost curve or a minimum at the end of the scan.
//!
//! A fit also carries a [`NullTest`]: the window's readings paired with the map at shifted times
//! (circularly within the window, 120 … 600 s with a full window of 1-minute readings). Readings
//! that really follow the map's shadows fit best at their own times; a fit may judge (and so
//! override) a configured base only when it beats every shift, pooled and within frames
//! ([`ShadowFit::follows_map`]).
//!
//! Coarser readings ([`ShadowParams::for_period`]): a frame is paired with readings up to one
//! period old past their middle (a 5-minute mean is 150 s old when complete), each predicted by
//! the map's mean over its period; the fit's window spans at least five periods; the shifts step
//! by whole periods, and the null test looks at a longer window of frames
//! ([`ShadowParams::null_window_s`], ten periods), so that it can reach its nine shifts, with a
//! detrended cost in place of the within-frame one ([`NullTest`]).

use std::collections::VecDeque;

mod null_test;
pub use null_test::NullTest;
use null_test::{detrended_costs, null_test, within_cost};

use chrono::{DateTime, Utc};

use crate::cloudmap::Grid;
use crate::forecast::TransmittanceMap;

/// Settings of [`ShadowTiming`] (own first choices, no source; not tuned: they worked on the
/// synthetic `cbh-network` scene and the demo as first set).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShadowParams {
    /// Frames whose costs are summed: the last this many seconds \[s\].
    pub window_s: f64,
    /// Readings paired with each frame: those whose period ended in the last this many seconds \[s\].
    pub sample_window_s: f64,
    /// Bootstrap block length \[s\].
    pub block_s: f64,
    /// Fewest blocks in the window for an estimate.
    pub min_blocks: usize,
    /// Fewest shadow events (a reading whose clear-sky index differs from the previous one by at
    /// least [`ShadowParams::event_dk`]) in the window.
    pub min_events: usize,
    /// Change in clear-sky index between consecutive readings that counts as a shadow edge.
    pub event_dk: f64,
    /// Scan: candidate heights from `h_map / span` to `h_map · span`.
    pub span: f64,
    /// Scan: number of candidates (log-spaced).
    pub candidates: usize,
    /// Bootstrap resamples.
    pub resamples: usize,
    /// The cost minimum must be below this share of the median cost (else the curve is flat).
    pub max_contrast: f64,
    /// Null test (whether the readings follow the map's shadows at all, [`NullTest`]): the
    /// window's readings are also paired with the map shifted in time, circularly within the
    /// window, by `sample_window_s + k · null_step_s` \[s\] for every `k` that keeps the shift at
    /// least `sample_window_s` from a whole turn (so that no frame is paired with any of its own
    /// readings, either way round).
    pub null_step_s: f64,
    /// Null test: fewest distinct shifts for a verdict. The readings follow the map when their
    /// fit beats every shifted one: a rank test, so readings unrelated to the map pass it with
    /// probability `1 / (n + 1)` for `n` shifts (9: at most 0.1). With the defaults a full
    /// window (600 s of frames, their readings spanning 720 s) gives exactly 9 shifts
    /// (120 … 600 s), so a verdict needs a full window.
    pub null_min_shifts: usize,
    /// Null test: frames whose readings it shifts, the last this many seconds \[s\] (at least
    /// [`ShadowParams::window_s`]; frames are kept that long). The fit itself uses the last
    /// `window_s` of them; when this is longer, the unshifted statistics the shifts are compared
    /// with are taken over these frames too (the lowest pooled cost over the scan and the
    /// within-frame cost at its candidate), so the test asks whether the readings of this longer
    /// window follow the map's shadows.
    pub null_window_s: f64,
    /// Readings' averaging period \[s\] over which each reading's prediction is averaged (the
    /// mean of the look-ups along the map's motion over the period, at most [`MEAN_STEP_S`] apart);
    /// 0: the look-up at the reading's middle alone (the default, and for readings of a minute or
    /// finer, [`ShadowParams::for_period`]).
    pub mean_over_s: f64,
}

/// Fewest readings per sensor the fit's window spans with coarse readings
/// ([`ShadowParams::for_period`]: the window is at least this many periods).
pub const FIT_MIN_READINGS: f64 = 5.0;

/// Longest step between the look-ups averaged over a coarse reading's period
/// ([`ShadowParams::mean_over_s`]) \[s\].
pub const MEAN_STEP_S: f64 = 30.0;

impl ShadowParams {
    /// These settings scaled to readings every `period_s` seconds (the measurements' averaging
    /// period): unchanged for periods up to the null test's step (60 s with the defaults: 1-minute
    /// and finer readings are paired and tested as before). Coarser:
    /// * [`ShadowParams::window_s`] at least [`FIT_MIN_READINGS`] periods: the fit sees at least
    ///   five readings per sensor (5-minute means: 1500 s; over 600 s, two readings a sensor gave
    ///   fits scattered over half to one and a quarter times the true base, below their stated σ);
    /// * [`ShadowParams::sample_window_s`] at least one period: a frame is paired with its
    ///   sensors' readings up to one period old past their middle, so a 5-minute mean (150 s old
    ///   when complete) is paired at all, and a frame holds at most one reading per sensor;
    /// * [`ShadowParams::null_step_s`] at least one period: the shifts move the readings by whole
    ///   readings;
    /// * [`ShadowParams::null_window_s`] at least `(null_min_shifts + 1)` steps: the window of
    ///   frames the null test shifts the readings of holds ten readings per sensor or more, which
    ///   give its nine shifts of 1 … 9 readings (2-minute means: 20 minutes; 5-minute: 50);
    /// * [`ShadowParams::mean_over_s`] the period: a coarse reading is predicted by the mean of
    ///   the map's look-ups over its period, not the one at its middle.
    ///
    /// A period that is not finite or not positive leaves the settings as they are.
    pub fn for_period(self, period_s: f64) -> ShadowParams {
        if !(period_s.is_finite() && period_s > 0.0) {
            return self;
        }
        let null_step_s = self.null_step_s.max(period_s);
        ShadowParams {
            window_s: self.window_s.max(FIT_MIN_READINGS * period_s),
            sample_window_s: self.sample_window_s.max(period_s),
            null_step_s,
            null_window_s: self.null_window_s.max(self.window_s).max((self.null_min_shifts + 1) as f64 * null_step_s),
            mean_over_s: if period_s > self.null_step_s { period_s } else { self.mean_over_s },
            ..self
        }
    }
}

impl Default for ShadowParams {
    fn default() -> Self {
        ShadowParams {
            window_s: 600.0,
            sample_window_s: 120.0,
            block_s: 60.0,
            min_blocks: 3,
            min_events: 4,
            event_dk: 0.15,
            span: 3.0,
            candidates: 49,
            resamples: 64,
            max_contrast: 0.9,
            null_step_s: 60.0,
            null_min_shifts: 9,
            null_window_s: 600.0,
            mean_over_s: 0.0,
        }
    }
}

/// One pyranometer reading for [`ShadowTiming::observe`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    /// Which pyranometer (index into the positions given to `observe`).
    pub sensor: usize,
    /// Middle of the averaging period.
    pub mid: DateTime<Utc>,
    /// Measured clear-sky index (GHI over clear-sky GHI).
    pub kstar: f64,
    /// Sun zenith at `mid` \[rad\].
    pub zenith_rad: f64,
    /// Sun azimuth at `mid` \[rad\].
    pub azimuth_rad: f64,
}

/// Sufficient statistics of a straight-line fit: n, Σx, Σy, Σxx, Σxy, Σyy.
pub(super) type Stats = [f64; 6];

pub(super) fn r2_cost(s: &Stats) -> f64 {
    let n = s[0];
    if n < 3.0 {
        return f64::NAN;
    }
    let sxx = s[3] - s[1] * s[1] / n;
    let sxy = s[4] - s[1] * s[2] / n;
    let syy = s[5] - s[2] * s[2] / n;
    if sxx <= 1e-12 || syy <= 1e-12 {
        return 1.0;
    }
    // Shade must lower the index: a negative slope explains nothing.
    if sxy <= 0.0 {
        return 1.0;
    }
    (1.0 - sxy * sxy / (sxx * syy)).clamp(0.0, 1.0)
}

/// What [`ShadowTiming::estimate`] found.
#[derive(Debug, Clone, PartialEq)]
pub struct ShadowFit {
    /// Estimated cloud base height \[m\].
    pub cbh_m: f64,
    /// Sigma of `ln h`.
    pub rel_sigma: f64,
    /// Shadow events in the window.
    pub events: usize,
    /// Frames in the window.
    pub frames: usize,
    /// Cost (`1 − r²`) at the minimum and its median over the scan.
    pub cost_min: f64,
    /// Median cost over the scan.
    pub cost_median: f64,
    /// Whether the readings follow the map's shadows at all ([`NullTest`]).
    pub null: NullTest,
}

impl ShadowFit {
    /// Whether the fit showed that the readings follow the map's shadows ([`NullTest::passed`]):
    /// only then may it judge a configured base.
    pub fn follows_map(&self) -> bool {
        self.null.passed
    }
}

/// Why [`ShadowTiming::estimate`] gave no height.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum NoFit {
    /// Too few frames with readings in the window.
    TooFewFrames,
    /// Too few shadow events (clear sky or overcast).
    NoEvents,
    /// The cost curve is flat.
    Flat,
    /// The minimum lies at the end of the scan.
    AtScanEnd,
}

#[derive(Debug, Clone)]
struct FrameCost {
    time: DateTime<Utc>,
    stats: Vec<Stats>,
    /// The readings paired (sensor, middle, clear-sky index), for the null test.
    pairs: Vec<(usize, DateTime<Utc>, f64)>,
    /// Their predicted transmittances, candidate by candidate (`xs[c * pairs.len() + j]`; NaN
    /// off the map).
    xs: Vec<f64>,
    events: usize,
}

/// The shadow-timing estimator (see the module documentation).
#[derive(Debug, Clone)]
pub struct ShadowTiming {
    /// Settings.
    pub params: ShadowParams,
    frames: VecDeque<FrameCost>,
    /// `ln` of the height the scan is centred on (the first map height seen).
    centre_ln: Option<f64>,
    /// Newest reading time seen per sensor and its index (for events, counted once).
    last: Vec<Option<(DateTime<Utc>, f64)>>,
    /// Time of the newest frame given to [`ShadowTiming::observe`] (with readings or not): the
    /// windows end there.
    newest: Option<DateTime<Utc>>,
}

impl ShadowTiming {
    /// An estimator for `sensors` pyranometers.
    pub fn new(params: ShadowParams, sensors: usize) -> ShadowTiming {
        ShadowTiming { params, frames: VecDeque::new(), centre_ln: None, last: vec![None; sensors], newest: None }
    }

    /// Candidate factors of the scan, relative to its centre (the first map height seen).
    pub fn factors(&self) -> Vec<f64> {
        let n = self.params.candidates.max(3);
        let l = self.params.span.max(1.01).ln();
        (0..n).map(|i| (-l + 2.0 * l * i as f64 / (n - 1) as f64).exp()).collect()
    }

    /// Add a frame: its transmittance tables `tm` on the map `grid` (built at `map_cbh_m`), the
    /// motion on the map `v_map_mps`, the camera position `camera_m`, the pyranometers' positions
    /// (east, north) \[m\] and their readings completed by `t` (older ones are ignored).
    #[allow(clippy::too_many_arguments)]
    pub fn observe(
        &mut self,
        t: DateTime<Utc>,
        tm: &TransmittanceMap,
        beams: [f64; 4],
        grid: Grid,
        map_cbh_m: f64,
        camera_m: [f64; 3],
        v_map_mps: [f64; 2],
        radius_m: f64,
        positions_m: &[[f64; 2]],
        readings: &[Reading],
    ) {
        let p = self.params;
        let age = |x: &DateTime<Utc>| (t - *x).num_milliseconds() as f64 / 1000.0;
        let keep_s = p.window_s.max(p.null_window_s);
        self.frames.retain(|f| age(&f.time) <= keep_s);
        self.newest = Some(t);
        // Events among readings not seen before.
        let mut events = 0;
        let mut sorted: Vec<&Reading> = readings.iter().filter(|r| r.sensor < self.last.len()).collect();
        sorted.sort_by_key(|r| (r.sensor, r.mid));
        for r in &sorted {
            match self.last[r.sensor] {
                Some((tm0, _)) if r.mid <= tm0 => continue,
                Some((_, k0)) if (r.kstar - k0).abs() >= p.event_dk => events += 1,
                _ => {}
            }
            self.last[r.sensor] = Some((r.mid, r.kstar));
        }
        let use_r: Vec<&Reading> = readings
            .iter()
            .filter(|r| r.sensor < positions_m.len() && r.kstar.is_finite() && age(&r.mid) >= 0.0 && age(&r.mid) <= p.sample_window_s)
            .collect();
        if use_r.is_empty() {
            return;
        }
        let r_cells = (radius_m / grid.cell_m).max(0.5);
        let centre_ln = *self.centre_ln.get_or_insert(map_cbh_m.ln());
        let n_pairs = use_r.len();
        let mut xs = vec![f64::NAN; self.factors().len() * n_pairs];
        let stats = self
            .factors()
            .iter()
            .enumerate()
            .map(|(c, f)| {
                // The candidate height over the map's.
                let inv_f = 1.0 / (f * (centre_ln - map_cbh_m.ln()).exp());
                let mut s = [0.0; 6];
                for (j, r) in use_r.iter().enumerate() {
                    let lag = age(&r.mid);
                    let g = positions_m[r.sensor];
                    let off = crate::forecast::sun_ray_plane_point([0.0, 0.0], map_cbh_m, [camera_m[0] * inv_f, camera_m[1] * inv_f, camera_m[2]], r.zenith_rad, r.azimuth_rad);
                    let at = |lag: f64| {
                        let q = [g[0] * inv_f + off[0] + v_map_mps[0] * lag, g[1] * inv_f + off[1] + v_map_mps[1] * lag];
                        let (cx, cy) = grid.to_cell(q);
                        tm.box_mean_with(cx, cy, r_cells, beams)
                    };
                    let x = if p.mean_over_s > 0.0 {
                        // The mean over the reading's period: the look-ups at the middles of its
                        // `steps` equal parts (all on the map, else none).
                        let steps = (p.mean_over_s / MEAN_STEP_S).ceil().max(1.0) as usize;
                        let part = p.mean_over_s / steps as f64;
                        let sum = (0..steps).map(|k| at(lag - 0.5 * p.mean_over_s + (k as f64 + 0.5) * part)).try_fold(0.0, |a, x| x.map(|x| a + x));
                        sum.map(|v| v / steps as f64)
                    } else {
                        at(lag)
                    };
                    let Some(x) = x else { continue };
                    add(&mut s, x, r.kstar);
                    xs[c * n_pairs + j] = x;
                }
                s
            })
            .collect();
        let pairs = use_r.iter().map(|r| (r.sensor, r.mid, r.kstar)).collect();
        self.frames.push_back(FrameCost { time: t, stats, pairs, xs, events });
    }

    /// The estimate from the frames of the window ending at the newest frame.
    ///
    /// # Errors
    /// Why there is none ([`NoFit`]).
    pub fn estimate(&self) -> Result<ShadowFit, NoFit> {
        let p = self.params;
        let (Some(newest), Some(centre_ln), Some(t)) = (self.frames.back(), self.centre_ln, self.newest) else { return Err(NoFit::TooFewFrames) };
        let age = |f: &FrameCost| (t - f.time).num_milliseconds() as f64 / 1000.0;
        // The fit's window (the null test's may be longer: ShadowParams::null_window_s).
        let frames: Vec<&FrameCost> = self.frames.iter().filter(|f| age(f) <= p.window_s).collect();
        if frames.is_empty() {
            return Err(NoFit::TooFewFrames);
        }
        let t0 = frames[0].time;
        let block = |f: &FrameCost| ((f.time - t0).num_milliseconds() as f64 / 1000.0 / p.block_s.max(1.0)).floor() as usize;
        let n_blocks = frames.iter().map(|f| block(f)).max().unwrap_or(0) + 1;
        if n_blocks < p.min_blocks {
            return Err(NoFit::TooFewFrames);
        }
        let events: usize = frames.iter().map(|f| f.events).sum();
        if events < p.min_events {
            return Err(NoFit::NoEvents);
        }
        let factors = self.factors();
        let ln_f: Vec<f64> = factors.iter().map(|f| f.ln()).collect();
        let step = ln_f[1] - ln_f[0];
        let finite: Vec<bool> = frames.iter().map(|f| f.stats.iter().flatten().all(|v| v.is_finite())).collect();
        let sum_costs = |weights: &[f64]| -> Vec<f64> { summed_stats(&frames, &finite, weights, factors.len()).iter().map(r2_cost).collect() };
        let argmin = |costs: &[f64]| -> Option<(usize, f64)> {
            let (i, _) = costs.iter().enumerate().filter(|(_, c)| c.is_finite()).min_by(|a, b| a.1.total_cmp(b.1))?;
            // Parabola through the minimum and its neighbours, in ln h.
            let x = if i > 0 && i + 1 < costs.len() && costs[i - 1].is_finite() && costs[i + 1].is_finite() {
                let (a, b, c) = (costs[i - 1], costs[i], costs[i + 1]);
                let d = a - 2.0 * b + c;
                if d > 0.0 { (0.5 * (a - c) / d).clamp(-0.5, 0.5) } else { 0.0 }
            } else {
                0.0
            };
            Some((i, ln_f[i] + x * step))
        };
        let costs = sum_costs(&vec![1.0; frames.len()]);
        let (i, ln_best) = argmin(&costs).ok_or(NoFit::Flat)?;
        let mut sorted: Vec<f64> = costs.iter().copied().filter(|c| c.is_finite()).collect();
        sorted.sort_by(f64::total_cmp);
        let median = sorted[sorted.len() / 2];
        if costs[i].is_nan() || costs[i] >= p.max_contrast * median {
            return Err(NoFit::Flat);
        }
        if i == 0 || i + 1 == costs.len() {
            return Err(NoFit::AtScanEnd);
        }
        // Block bootstrap: resample blocks with replacement (deterministic generator).
        let mut state = 0x9E37_79B9_7F4A_7C15u64 ^ (frames.len() as u64) ^ ((newest.time.timestamp_millis() as u64) << 1);
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        let mut draws = vec![];
        for _ in 0..p.resamples {
            let mut count = vec![0.0; n_blocks];
            for _ in 0..n_blocks {
                count[(next() % n_blocks as u64) as usize] += 1.0;
            }
            let w: Vec<f64> = frames.iter().map(|f| count[block(f)]).collect();
            if let Some((_, x)) = argmin(&sum_costs(&w)) {
                draws.push(x);
            }
        }
        let m = draws.iter().sum::<f64>() / draws.len().max(1) as f64;
        let sd = (draws.iter().map(|x| (x - m).powi(2)).sum::<f64>() / (draws.len().max(2) - 1) as f64).sqrt();
        let rel_sigma = sd.max(0.5 * step);
        let null_frames: Vec<&FrameCost> = self.frames.iter().filter(|f| age(f) <= p.null_window_s.max(p.window_s)).collect();
        let null = if null_frames.len() == frames.len() {
            null_test(&p, &frames, factors.len(), costs[i], within_cost(&frames, |f| &f.stats, i), false)
        } else {
            // The unshifted statistics over the null test's longer window, each taken as the
            // shifts' are: the lowest over the scan (the test asks whether these readings follow
            // the map's shadows at all, not at this fit's height).
            let finite: Vec<bool> = null_frames.iter().map(|f| f.stats.iter().flatten().all(|v| v.is_finite())).collect();
            let pooled = summed_stats(&null_frames, &finite, &vec![1.0; null_frames.len()], factors.len()).iter().map(r2_cost).filter(|c| c.is_finite()).fold(1.0, f64::min);
            let detrended = detrended_costs(&null_frames, factors.len(), |f, j| Some(f.pairs[j].2)).into_iter().fold(1.0, f64::min);
            null_test(&p, &null_frames, factors.len(), pooled, detrended, true)
        };
        Ok(ShadowFit { cbh_m: (centre_ln + ln_best).exp(), rel_sigma, events, frames: frames.len(), cost_min: costs[i], cost_median: median, null })
    }
}

fn add(s: &mut Stats, x: f64, y: f64) {
    s[0] += 1.0;
    s[1] += x;
    s[2] += y;
    s[3] += x * x;
    s[4] += x * y;
    s[5] += y * y;
}

/// The statistics of each of the `candidates` heights over `frames`, each frame's times its
/// weight: per candidate, `Σ w · stats` over the frames in their order.
///
/// Summed frame by frame over all candidates at once (each candidate's sums take the same
/// additions in the same order as one candidate at a time, so the same values bit for bit, and
/// the inner loop runs over a frame's contiguous statistics as one flat slice, which vectorises). A frame of weight 0 whose statistics
/// are all finite (`finite`) is skipped: it would add ±0 to sums that start at +0 and so never are
/// −0, which changes none of them; the block bootstrap gives about a third of the frames weight 0.
fn summed_stats(frames: &[&FrameCost], finite: &[bool], weights: &[f64], candidates: usize) -> Vec<Stats> {
    let mut sums = vec![[0.0; 6]; candidates];
    let flat = sums.as_flattened_mut();
    for ((f, w), ok) in frames.iter().zip(weights).zip(finite) {
        if *w == 0.0 && *ok {
            continue;
        }
        debug_assert!(f.stats.len() >= candidates, "a frame's statistics cover every candidate");
        for (a, b) in flat.iter_mut().zip(f.stats.as_flattened()) {
            *a += w * b;
        }
    }
    sums
}

/// Gather the readings of the pyranometer columns `cols` of `m` whose averaging period ended by
/// `t` and whose middle lies within `window_s` before it, as clear-sky indices (readings under
/// 50 W/m² of clear-sky GHI, not finite, or negative are left out).
pub fn readings(
    m: &crate::io::Measurements,
    cols: &[usize],
    t: &DateTime<Utc>,
    window_s: f64,
    observer: &crate::sun::Observer,
    altitude_m: f64,
    model: crate::clearsky::ClearSkyModel,
) -> Vec<Reading> {
    let period = chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64);
    let end = m.times.partition_point(|x| *x + period <= *t);
    let from = *t - chrono::Duration::milliseconds((window_s * 1000.0) as i64) - period;
    let start = m.times.partition_point(|x| *x < from);
    let mut out = vec![];
    for i in start..end {
        let mid = m.times[i] + period / 2;
        let Ok(sun) = crate::sun::position(&mid, observer) else { continue };
        let clear = crate::clearsky::clear_sky(&sun, altitude_m, model).ghi_wm2;
        if clear < 50.0 {
            continue;
        }
        for (s, c) in cols.iter().enumerate() {
            let v = m.columns[*c][i];
            if v.is_finite() && v >= 0.0 {
                out.push(Reading { sensor: s, mid, kstar: v / clear, zenith_rad: sun.apparent_zenith_rad, azimuth_rad: sun.azimuth_rad });
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Window frames for [`null_test`]: 31 frames 20 s apart (a full 600-s window), each paired
    /// with the 1-minute readings of three sensors whose middles lie in its last 120 s; reading
    /// `y(sensor, minute)`, prediction `x(candidate, sensor, minute)`.
    fn window(candidates: usize, x: impl Fn(usize, usize, i64) -> f64, y: impl Fn(usize, i64) -> f64) -> Vec<FrameCost> {
        window_every(60, 31, 0..=120, candidates, x, y)
    }

    /// As [`window`], with readings every `period` seconds (reading `k`'s middle `150 − k · period`
    /// seconds from the first frame), `frames` frames 20 s apart, each paired with the readings
    /// whose age lies in `ages` \[s\].
    fn window_every(period: i64, frames: i64, ages: std::ops::RangeInclusive<i64>, candidates: usize, x: impl Fn(usize, usize, i64) -> f64, y: impl Fn(usize, i64) -> f64) -> Vec<FrameCost> {
        let t0: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
        (0..frames)
            .map(|i| {
                let t = t0 + chrono::Duration::seconds(20 * i);
                let mut pairs = vec![];
                for minute in 0..(40 + 20 * frames * 60 / period / 60) {
                    let mid = t0 - chrono::Duration::seconds(150) + chrono::Duration::seconds(period * minute);
                    let age = (t - mid).num_seconds();
                    if ages.contains(&age) {
                        for s in 0..3 {
                            pairs.push((s, mid, y(s, minute)));
                        }
                    }
                }
                let minute_of = |mid: DateTime<Utc>| ((mid - t0).num_seconds() + 150) / period;
                let xs: Vec<f64> = (0..candidates).flat_map(|c| pairs.iter().map(move |q| (c, q))).map(|(c, q)| x(c, q.0, minute_of(q.1))).collect();
                let stats = (0..candidates)
                    .map(|c| {
                        let mut st = [0.0; 6];
                        for (j, q) in pairs.iter().enumerate() {
                            add(&mut st, xs[c * pairs.len() + j], q.2);
                        }
                        st
                    })
                    .collect();
                FrameCost { time: t, stats, pairs, xs, events: 0 }
            })
            .collect()
    }

    /// The null test: readings that are the map's shadows pass it; the same readings five
    /// minutes late (a logger clock five minutes behind) fail it, because a shift of five
    /// minutes fits them better than their own times; a window too short for nine shifts gives
    /// no verdict.
    #[test]
    fn null_test_passes_readings_of_this_sky_only() {
        let p = ShadowParams::default();
        let shade = |s: usize, minute: i64| if crate::rng::hash64(s as u64 * 1000 + minute as u64).is_multiple_of(3) { 0.25 } else { 0.95 };
        // Candidate 2 predicts the shade exactly; the others see it blurred by noise.
        let x = |c: usize, s: usize, minute: i64| {
            let noise = (crate::rng::hash64((c * 7 + s) as u64 * 100_000 + minute as u64) % 1000) as f64 / 1000.0;
            if c == 2 { shade(s, minute) } else { 0.5 * shade(s, minute) + 0.5 * noise }
        };
        let judge = |frames: &[FrameCost]| {
            let refs: Vec<&FrameCost> = frames.iter().collect();
            let ones = vec![1.0; refs.len()];
            let finite = vec![true; refs.len()];
            let costs: Vec<f64> = summed_stats(&refs, &finite, &ones, 5).iter().map(r2_cost).collect();
            let best = (0..5).min_by(|a, b| costs[*a].total_cmp(&costs[*b])).unwrap();
            (null_test(&p, &refs, 5, costs[best], within_cost(&refs, |f| &f.stats, best), false), costs[best])
        };
        let (own, cost) = judge(&window(5, x, |s, m| 0.1 + 0.8 * shade(s, m)));
        assert!(own.judged && own.passed && own.shifts == 9, "{own:?} (cost {cost})");
        let (late, cost) = judge(&window(5, x, |s, m| 0.1 + 0.8 * shade(s, m - 5)));
        assert!(late.judged && !late.passed && late.cost_min < cost, "{late:?} (cost {cost})");
        let short: Vec<FrameCost> = window(5, x, |s, m| 0.1 + 0.8 * shade(s, m)).into_iter().take(18).collect();
        let (early, _) = judge(&short);
        assert!(!early.judged && !early.passed && early.shifts < 9, "{early:?}");
    }

    /// The null test on 2-minute and 5-minute means ([`ShadowParams::for_period`]): one reading per
    /// sensor and frame, shifted by whole readings over the longer window, with the detrended cost
    /// in place of the within-frame one. Readings of this sky pass once the window holds ten
    /// readings per sensor (not before: the 600-s window alone gives at most five shifts); the
    /// same readings ten minutes late fail; readings unrelated to the map that drift with it (a
    /// cover thinning over the window in both) fail the detrended comparison.
    #[test]
    fn null_test_judges_coarse_readings_over_a_longer_window() {
        let shade = |s: usize, k: i64| if crate::rng::hash64(s as u64 * 1000 + k as u64 + 7).is_multiple_of(3) { 0.25 } else { 0.95 };
        let x = |c: usize, s: usize, k: i64| {
            let noise = (crate::rng::hash64((c * 7 + s) as u64 * 100_000 + k as u64) % 1000) as f64 / 1000.0;
            if c == 2 { shade(s, k) } else { 0.5 * shade(s, k) + 0.5 * noise }
        };
        let judge = |p: &ShadowParams, frames: &[FrameCost]| {
            let refs: Vec<&FrameCost> = frames.iter().collect();
            let ones = vec![1.0; refs.len()];
            let finite = vec![true; refs.len()];
            let pooled = summed_stats(&refs, &finite, &ones, 5).iter().map(r2_cost).fold(1.0, f64::min);
            let detrended = detrended_costs(&refs, 5, |f, j| Some(f.pairs[j].2)).into_iter().fold(1.0, f64::min);
            null_test(p, &refs, 5, pooled, detrended, true)
        };
        for period in [120i64, 300] {
            let p = ShadowParams::default().for_period(period as f64);
            assert_eq!((p.sample_window_s, p.null_step_s, p.null_window_s, p.mean_over_s), (period.max(120) as f64, period as f64, 10.0 * period as f64, period as f64));
            // Frames 20 s apart over the null window, each paired with the readings of age
            // period/2 … sample window (at most one per sensor).
            let frames = (p.null_window_s / 20.0) as i64 + 1;
            let ages = period / 2..=p.sample_window_s as i64;
            let own = judge(&p, &window_every(period, frames, ages.clone(), 5, x, |s, k| 0.1 + 0.8 * shade(s, k)));
            assert!(own.judged && own.passed && own.shifts >= 9, "{period} s: {own:?}");
            let late = judge(&p, &window_every(period, frames, ages.clone(), 5, x, |s, k| 0.1 + 0.8 * shade(s, k - 600 / period)));
            assert!(late.judged && !late.passed, "{period} s, 10 min late: {late:?}");
            // Unrelated readings, rising through the window as the map's mean does.
            let drift = |k: i64| 0.05 * k as f64;
            let xd = |c: usize, s: usize, k: i64| 0.2 * x(c, s, k) + drift(k);
            let unrelated = judge(&p, &window_every(period, frames, ages.clone(), 5, xd, |s, k| 0.1 + 0.2 * shade(s + 5, k) + drift(k)));
            assert!(unrelated.cost < unrelated.cost_min, "{period} s: the drift alone passes the pooled comparison: {unrelated:?}");
            assert!(unrelated.judged && !unrelated.passed, "{period} s, unrelated with a shared drift: {unrelated:?}");
            let short = judge(&p, &window_every(period, 31, ages, 5, x, |s, k| 0.1 + 0.8 * shade(s, k)));
            assert!(!short.judged && !short.passed && short.shifts < 9, "{period} s, a 600-s window: {short:?}");
        }
        // A minute or finer: the settings as they were.
        assert_eq!(ShadowParams::default().for_period(60.0), ShadowParams::default());
        assert_eq!(ShadowParams::default().for_period(10.0), ShadowParams::default());
    }

    /// [`summed_stats`] against the sums taken one candidate at a time over every frame (weight 0
    /// included), bit for bit: random statistics with signed zeros, weights 0 to 3, and a frame
    /// with an infinite statistic (not skipped at weight 0: its product is NaN).
    #[test]
    fn summed_stats_are_the_candidate_by_candidate_sums() {
        let candidates = 7;
        let t: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
        let value = |k: u64| match crate::rng::hash64(k) % 9 {
            0 => -0.0,
            1 => 0.0,
            h => (crate::rng::hash64(k ^ 77) % 20_000) as f64 / 997.0 - 3.0 * (h % 2) as f64,
        };
        let mut frames: Vec<FrameCost> = (0..40u64)
            .map(|i| FrameCost { time: t, events: 0, pairs: vec![], xs: vec![], stats: (0..candidates as u64).map(|c| std::array::from_fn(|q| value(i * 1000 + c * 10 + q as u64))).collect() })
            .collect();
        frames[5].stats[2][4] = f64::INFINITY;
        let refs: Vec<&FrameCost> = frames.iter().collect();
        let finite: Vec<bool> = refs.iter().map(|f| f.stats.iter().flatten().all(|v| v.is_finite())).collect();
        for round in 0..20u64 {
            let weights: Vec<f64> = (0..refs.len() as u64).map(|i| (crate::rng::hash64(round * 100 + i) % 4) as f64).collect();
            let want: Vec<Stats> = (0..candidates)
                .map(|c| {
                    let mut s = [0.0; 6];
                    for (f, w) in refs.iter().zip(&weights) {
                        for (a, b) in s.iter_mut().zip(&f.stats[c]) {
                            *a += w * b;
                        }
                    }
                    s
                })
                .collect();
            let got = summed_stats(&refs, &finite, &weights, candidates);
            let bits = |v: &[Stats]| v.iter().flatten().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&got), bits(&want), "round {round}");
        }
    }
}
