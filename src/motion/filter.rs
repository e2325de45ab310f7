//! The forecast's motion over time: the temporal filter of the motion vector and the tracker that
//! keeps each cloud layer's motion from frame to frame (the measurement itself is in the parent
//! module).

use super::{LayerMotion, MotionMeasurement, MotionParams, dist};

/// Temporal filter of the forecast's motion vector (a Kalman filter per component with gating).
#[derive(Debug, Clone, Default)]
pub struct MotionFilter {
    state: Option<([f64; 2], f64)>,
    /// Measurements rejected by the gate.
    pub gated: usize,
    /// Measurements rejected in a row.
    gated_run: usize,
    /// Measurements accepted in a row since the filter started or restarted (a gated one resets
    /// it to 0).
    accepted_run: usize,
}

/// After this many measurements in a row rejected by the gate, the filter restarts from the
/// newest: it had locked onto something else (a blend of layers while the motion was first
/// being found, or a wind shift).
const RESTART_AFTER_GATED: usize = 3;

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

    /// Measurements accepted in a row by the gate since the filter started or last restarted:
    /// how many consistent measurements the current estimate stands on.
    pub fn accepted_run(&self) -> usize {
        self.accepted_run
    }

    /// The map's plane moved by `ratio` (new height over old): every speed on the map scales by it,
    /// the estimate and its variance with it.
    pub fn rescale(&mut self, ratio: f64) {
        if let Some((v, p)) = &mut self.state {
            *v = [v[0] * ratio, v[1] * ratio];
            *p *= ratio * ratio;
        }
    }

    /// Advance by `dt_s` and fold in a measured layer (if any).
    pub fn update(&mut self, m: Option<&LayerMotion>, dt_s: f64, params: &MotionParams) -> Option<Motion> {
        let meas = m.map(|l| (l.v_mps, l.spread_mps, l.blocks));
        match (&mut self.state, meas) {
            (None, Some((v, spread, nb))) => {
                let r = spread.powi(2) / nb.max(1) as f64 + 0.05;
                self.state = Some((v, r.max(0.25)));
                self.accepted_run = 1;
            }
            (Some((x, p)), Some((v, spread, nb))) => {
                *p += params.filter_process_noise * dt_s;
                let r = spread.powi(2) / nb.max(1) as f64 + 0.05;
                let innov = dist(v, *x);
                let r_eff = if innov > 3.0 * (*p + r).sqrt() && *p < 1.0 {
                    self.gated += 1;
                    self.gated_run += 1;
                    self.accepted_run = 0;
                    r * 25.0
                } else {
                    self.gated_run = 0;
                    self.accepted_run += 1;
                    r
                };
                if self.gated_run >= RESTART_AFTER_GATED {
                    self.gated_run = 0;
                    self.accepted_run = 1;
                    self.state = Some((v, r.max(0.25)));
                } else {
                    let k = *p / (*p + r_eff);
                    x[0] += k * (v[0] - x[0]);
                    x[1] += k * (v[1] - x[1]);
                    *p *= 1.0 - k;
                }
            }
            (Some((_, p)), None) => *p += params.filter_process_noise * dt_s,
            (None, None) => {}
        }
        self.current()
    }
}

/// A tracked layer's filtered motion at one frame.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrackedLayer {
    /// Filtered motion.
    pub motion: Motion,
    /// Opacity: smoothed thick-cloud share of its blocks' matched cloud.
    pub thick_share: f64,
}

#[derive(Debug, Clone, Default)]
struct Slot {
    filter: MotionFilter,
    since_s: f64,
    hits: usize,
    blocks: f64,
    thick_share: f64,
    /// The last measurement's spread of block vectors \[m/s\].
    spread_mps: f64,
}

/// Up to two layers tracked over time, each by its own [`MotionFilter`]. Each frame's measured
/// layers go to the filters nearest them (a layer far from every tracked one starts a new track);
/// a track without measurements for `layer_expiry_s` is dropped; a second track enters the forecast
/// once it has `layer_confirm` measurements.
#[derive(Debug, Clone, Default)]
pub struct LayerTracker {
    slots: [Slot; 2],
    /// The track put first (the forecast's primary layer) last time.
    primary: usize,
    /// `layer_confirm` at the last update.
    confirm_at: usize,
    /// Directions the known layers move toward (`[[clouds.layers]]`) \[° from north\], and the
    /// largest angle at which a track is taken for one \[°\].
    known: (Vec<f64>, f64),
}

/// The other track becomes the primary layer only when its opacity exceeds the primary's by this.
const PRIMARY_MARGIN: f64 = 0.01;

impl LayerTracker {
    fn active(&self, k: usize) -> Option<Motion> {
        self.slots[k].filter.current()
    }

    /// Consistent measurements behind the forecast's first layer: the accepted run of the track
    /// put first last time (0 before any motion is known).
    pub fn primary_accepted_run(&self) -> usize {
        if self.active(self.primary).is_some() { self.slots[self.primary].filter.accepted_run() } else { 0 }
    }

    /// Known layers' directions (`[[clouds.layers]]` toward, degrees from north; set once, when the
    /// engine is made) and the largest
    /// angle at which a track moving that way is taken for that layer: a second track is then
    /// confirmed from its first measurement when it moves the way a known layer does that the
    /// other track does not (prior knowledge that the layer is there). Empty: every second track
    /// waits for `layer_confirm` measurements.
    pub fn set_known_directions(&mut self, toward_deg: &[f64], max_angle_deg: f64) {
        self.known = (toward_deg.to_vec(), max_angle_deg);
    }

    /// The known layer track `k` moves toward (its index), if any.
    fn known_layer(&self, k: usize) -> Option<usize> {
        let v = self.active(k)?.v_mps;
        if v[0].hypot(v[1]) <= 0.0 {
            return None;
        }
        let toward = v[0].atan2(v[1]).to_degrees();
        let off = |d: f64| (d - toward).rem_euclid(360.0).min((toward - d).rem_euclid(360.0));
        let (dirs, max_deg) = &self.known;
        dirs.iter().enumerate().filter(|(_, d)| off(**d) <= *max_deg).min_by(|a, b| off(*a.1).total_cmp(&off(*b.1))).map(|(i, _)| i)
    }

    /// Whether active track `k` enters the forecast: the only track, one with `layer_confirm`
    /// measurements, or one moving the way a known layer does that the other track does not.
    fn in_forecast(&self, k: usize, n_active: usize) -> bool {
        n_active == 1 || self.slots[k].hits >= self.confirm_at || self.known_layer(k).is_some_and(|l| self.known_layer(1 - k) != Some(l))
    }

    /// The least one-sigma spread of speed \[m/s\] the forecast should give its layers while the
    /// tracked motion is not yet confirmed; 0 once it is. Two cases:
    /// * a track in the forecast stands on fewer than `confirm` consistent measurements in a row:
    ///   its last measurement's spread of block vectors (the spread itself, not its standard
    ///   error: until measurements agree, the blocks may be following more than one layer);
    /// * a second layer was measured at this frame but is not yet confirmed, so the forecast
    ///   advects its cloud with the first layer's motion: the distance between the two tracks.
    pub fn unconfirmed_spread_mps(&self, confirm: usize) -> f64 {
        let active: Vec<usize> = (0..2).filter(|&k| self.active(k).is_some()).collect();
        let mut spread = 0f64;
        for &k in &active {
            let s = &self.slots[k];
            if self.in_forecast(k, active.len()) {
                if s.filter.accepted_run() < confirm {
                    spread = spread.max(s.spread_mps);
                }
            } else if s.since_s == 0.0
                && let (Some(a), Some(b)) = (self.active(0), self.active(1))
            {
                spread = spread.max(dist(a.v_mps, b.v_mps));
            }
        }
        spread
    }

    /// The map's plane moved by `ratio` (new height over old): each track's motion scales by it
    /// ([`MotionFilter::rescale`]); their order, opacity and counts stay.
    pub fn rescale(&mut self, ratio: f64) {
        for s in &mut self.slots {
            s.filter.rescale(ratio);
        }
    }

    /// Filtered motions to search around, the track with the most blocks first.
    pub fn priors(&self) -> Vec<Motion> {
        let mut v: Vec<(f64, Motion)> = (0..2).filter_map(|k| self.active(k).map(|m| (self.slots[k].blocks, m))).collect();
        v.sort_by(|a, b| b.0.total_cmp(&a.0));
        v.into_iter().map(|x| x.1).collect()
    }

    /// Advance by `dt_s` and fold in a measurement. Returns the layers for the forecast, the most
    /// opaque first (empty before any motion is known).
    pub fn update(&mut self, m: Option<&MotionMeasurement>, dt_s: f64, params: &MotionParams) -> Vec<TrackedLayer> {
        self.confirm_at = params.layer_confirm;
        let measured: &[LayerMotion] = m.map(|m| m.layers.as_slice()).unwrap_or(&[]);
        // Cost of pairing a measured layer with a track: their distance; a new track costs the
        // two-layer separation.
        let cost = |l: &LayerMotion, k: usize| self.active(k).map(|c| dist(l.v_mps, c.v_mps)).unwrap_or(params.two_layer_separation_mps);
        let mut assign: [Option<usize>; 2] = [None, None]; // track -> measured layer
        match measured {
            [] => {}
            [l] => {
                let k = if cost(l, 0) <= cost(l, 1) { 0 } else { 1 };
                assign[k] = Some(0);
            }
            [l0, l1, ..] => {
                if cost(l0, 0) + cost(l1, 1) <= cost(l0, 1) + cost(l1, 0) {
                    assign = [Some(0), Some(1)];
                } else {
                    assign = [Some(1), Some(0)];
                }
            }
        }
        for (k, slot) in self.slots.iter_mut().enumerate() {
            let l = assign[k].map(|i| &measured[i]);
            slot.filter.update(l, dt_s, params);
            match l {
                Some(l) => {
                    let first = slot.hits == 0;
                    slot.hits += 1;
                    slot.since_s = 0.0;
                    let w = if first { 1.0 } else { 0.3 };
                    slot.blocks += w * (l.blocks as f64 - slot.blocks);
                    slot.thick_share += w * (l.thick_share - slot.thick_share);
                    slot.spread_mps = l.spread_mps;
                }
                None => slot.since_s += dt_s,
            }
            if slot.since_s > params.layer_expiry_s {
                *slot = Slot::default();
            }
        }
        // Two tracks that have converged are one layer: keep the longer.
        if let (Some(a), Some(b)) = (self.active(0), self.active(1))
            && dist(a.v_mps, b.v_mps) < 0.5 * params.two_layer_separation_mps
        {
            let drop = if self.slots[0].hits >= self.slots[1].hits { 1 } else { 0 };
            self.slots[drop] = Slot::default();
        }
        let n_active = (0..2).filter(|&k| self.active(k).is_some()).count();
        let used: Vec<usize> = (0..2).filter(|&k| self.active(k).is_some() && self.in_forecast(k, n_active)).collect();
        if let [one] = used.as_slice() {
            self.primary = *one;
        } else if used.len() == 2 {
            let other = 1 - self.primary;
            if self.slots[other].thick_share > self.slots[self.primary].thick_share + PRIMARY_MARGIN {
                self.primary = other;
            }
        }
        let mut out: Vec<TrackedLayer> =
            used.iter().filter_map(|&k| self.active(k).map(|m| TrackedLayer { motion: m, thick_share: self.slots[k].thick_share })).collect();
        if used.len() == 2 && used[0] != self.primary {
            out.swap(0, 1);
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A measurement 20 s after the last, of these layers.
    fn meas(layers: Vec<LayerMotion>) -> MotionMeasurement {
        MotionMeasurement { dt_s: 20.0, vectors: vec![], blocks_tried: 64, global_mps: Some(layers[0].v_mps), layers, spread_mps: 0.3, labels: None, blocks_static: 0, locked_at_zero: false }
    }

    #[test]
    fn tracker_follows_two_layers_and_confirms_the_second() {
        let p = MotionParams::default();
        let layer = |v: [f64; 2], thick: f64| LayerMotion { v_mps: v, blocks: 10, mean_score: 1.0, thick_share: thick, spread_mps: 0.3 };
        let mut t = LayerTracker::default();
        // The first measurement is a blend; then both layers, in either order.
        let out = t.update(Some(&meas(vec![layer([3.0, 1.0], 0.6)])), 20.0, &p);
        assert_eq!(out.len(), 1);
        let mut out = vec![];
        for k in 0..6 {
            let (a, b) = (layer([6.5, 6.5], 0.95), layer([2.0, -3.5], 0.5));
            out = t.update(Some(&meas(if k % 2 == 0 { vec![a, b] } else { vec![b, a] })), 20.0, &p);
        }
        assert_eq!(out.len(), 2, "{out:?}");
        // The more opaque layer first; the blend was dropped after three gated measurements.
        assert!(dist(out[0].motion.v_mps, [6.5, 6.5]) < 0.3, "{out:?}");
        assert!(dist(out[1].motion.v_mps, [2.0, -3.5]) < 0.3, "{out:?}");
        // A layer unseen for longer than the expiry is dropped.
        for _ in 0..20 {
            out = t.update(Some(&meas(vec![layer([2.0, -3.5], 0.5)])), 20.0, &p);
        }
        assert_eq!(out.len(), 1, "{out:?}");
    }

    #[test]
    fn unconfirmed_motion_carries_its_blocks_spread_and_an_unconfirmed_layer_the_gap() {
        let p = MotionParams::default();
        let layer = |v: [f64; 2], spread: f64| LayerMotion { v_mps: v, blocks: 12, mean_score: 1.0, thick_share: 0.6, spread_mps: spread };
        let mut t = LayerTracker::default();
        assert_eq!(t.unconfirmed_spread_mps(3), 0.0, "nothing tracked: the forecast's own still-sky spread applies");
        // A blend of two layers: its blocks spread widely. Until three measurements agree, that
        // spread is the forecast's least.
        t.update(Some(&meas(vec![layer([2.7, -1.4], 1.7)])), 20.0, &p);
        assert_eq!(t.unconfirmed_spread_mps(3), 1.7);
        t.update(Some(&meas(vec![layer([2.5, -2.0], 1.2)])), 20.0, &p);
        assert_eq!(t.unconfirmed_spread_mps(3), 1.2);
        // A second layer seen for the first time (one measurement, not yet in the forecast): the
        // distance between the tracks.
        t.update(Some(&meas(vec![layer([2.4, -2.9], 0.4), layer([6.4, 6.1], 0.3)])), 20.0, &p);
        let tracks = t.priors();
        assert_eq!(tracks.len(), 2);
        let gap = dist(tracks[0].v_mps, tracks[1].v_mps);
        assert!(gap > 8.0 && (t.unconfirmed_spread_mps(3) - gap).abs() < 1e-12, "{} against {gap}", t.unconfirmed_spread_mps(3));
        // Both layers confirmed and each on three consistent measurements: nothing added.
        for _ in 0..3 {
            t.update(Some(&meas(vec![layer([2.3, -3.5], 0.3), layer([6.4, 6.3], 0.3)])), 20.0, &p);
        }
        assert_eq!(t.unconfirmed_spread_mps(3), 0.0, "{t:?}");
        // A single layer confirmed from the start: only its first measurements carry their spread.
        let mut one = LayerTracker::default();
        for k in 0..4 {
            one.update(Some(&meas(vec![layer([11.2, 4.0], 0.5)])), 20.0, &p);
            assert_eq!(one.unconfirmed_spread_mps(3), if k < 2 { 0.5 } else { 0.0 });
        }
    }

    #[test]
    fn a_known_layers_direction_confirms_a_second_track_at_once() {
        let p = MotionParams::default();
        let layer = |v: [f64; 2]| LayerMotion { v_mps: v, blocks: 12, mean_score: 1.0, thick_share: 0.6, spread_mps: 0.3 };
        let (thin, cumulus) = ([2.3, -3.6], [6.4, 6.2]); // toward 148° and 46°
        let run = |known: &[f64], max_deg: f64| {
            let mut t = LayerTracker::default();
            t.set_known_directions(known, max_deg);
            t.update(Some(&meas(vec![layer(thin)])), 20.0, &p);
            t.update(Some(&meas(vec![layer(thin), layer(cumulus)])), 20.0, &p).len()
        };
        assert_eq!(run(&[], 45.0), 1, "no known layers: the second track waits for confirmation");
        assert_eq!(run(&[45.0, 150.0], 45.0), 2, "the cumulus moves the way the second known layer does");
        assert_eq!(run(&[150.0], 45.0), 1, "no known layer moves the cumulus's way");
        assert_eq!(run(&[96.0], 60.0), 1, "both tracks within reach of the same known layer: not told apart");
    }

    #[test]
    fn filter_gates_an_outlier() {
        let p = MotionParams::default();
        let mk = |v: [f64; 2]| LayerMotion { v_mps: v, blocks: 30, mean_score: 1.0, thick_share: 0.5, spread_mps: 0.3 };
        let mut f = MotionFilter::default();
        for _ in 0..10 {
            f.update(Some(&mk([5.0, 0.0])), 20.0, &p);
        }
        let m = f.update(Some(&mk([15.0, 0.0])), 20.0, &p).unwrap();
        assert!(m.v_mps[0] < 6.0, "{:?}", m);
        assert_eq!(f.gated, 1);
    }
}
