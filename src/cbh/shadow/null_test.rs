//! The time-shift check of a shadow-timing fit ([`NullTest`]): whether the readings follow the
//! map's shadows at all, against the same readings shifted in time (see the parent module's
//! documentation).

use chrono::{DateTime, Utc};

use super::{FrameCost, ShadowParams, Stats, add, r2_cost};

/// The test of a fit against the same readings shifted in time, circularly within the window
/// ([`ShadowParams::null_step_s`]): readings of this sky fit the map's shadows better at their own
/// times than at any shifted time; readings of another sky (a clock an hour off, another site's
/// logger) fit as well shifted as not. Each shift gets the whole scan, as the fit does.
///
/// Two statistics, each of which must beat every shift: the cost at the minimum over the scan
/// ([`ShadowFit::cost_min`](super::ShadowFit::cost_min), all pairs pooled) and the within-frame cost (each frame's pairs taken
/// about their own means, so a slow drift that readings and map share, such as overcast thinning
/// over the window, explains nothing: only where and when the shadows fall within a frame counts).
/// Over a null window longer than the fit's (coarse readings, [`ShadowParams::for_period`]) both
/// unshifted statistics are the lowest over the scan, as the shifts' are, and the within-frame
/// cost gives way to the detrended one (each sensor's straight line in time taken out of readings
/// and predictions: a frame holds one reading per sensor there, too few to take about its mean).
#[derive(Debug, Clone, PartialEq)]
pub struct NullTest {
    /// Distinct shifts compared (none until the window's readings span enough time, see
    /// [`ShadowParams::null_step_s`]).
    pub shifts: usize,
    /// The unshifted pooled cost compared with the shifts': the fit's [`ShadowFit::cost_min`](super::ShadowFit::cost_min), or
    /// over a longer null window ([`ShadowParams::null_window_s`]) the lowest over the scan.
    pub cost: f64,
    /// The lowest pooled cost over the scan and the shifts (`1.0` without any).
    pub cost_min: f64,
    /// The fit's within-frame cost at the estimate (over a longer null window
    /// ([`ShadowParams::null_window_s`]), the lowest over the scan).
    pub within: f64,
    /// The lowest within-frame cost over the scan and the shifts (`1.0` without any).
    pub within_min: f64,
    /// At least [`ShadowParams::null_min_shifts`] shifts: the test gave a verdict.
    pub judged: bool,
    /// Judged, and both of the fit's costs below their lowest over the shifts.
    pub passed: bool,
}
/// `1 − r²` from the centred sums `[Σxx, Σxy, Σyy]`: 1 (no fit) for a degenerate or falling line
/// (the same slope rule as [`r2_cost`]).
fn cost_of_sums(w: [f64; 3]) -> f64 {
    if w[0] <= 1e-12 || w[2] <= 1e-12 || w[1] <= 0.0 { 1.0 } else { (1.0 - w[1] * w[1] / (w[0] * w[2])).clamp(0.0, 1.0) }
}

/// `1 − r²` of the pairs taken about their own frame's means, summed over `frames`, for candidate
/// `c` of the statistics `get` gives (the same slope rule as [`r2_cost`]).
pub(super) fn within_cost(frames: &[&FrameCost], get: impl Fn(&FrameCost) -> &[Stats], c: usize) -> f64 {
    let mut w = [0.0; 3];
    for f in frames {
        let s = get(f)[c];
        if s[0] < 2.0 {
            continue;
        }
        w[0] += s[3] - s[1] * s[1] / s[0];
        w[1] += s[4] - s[1] * s[2] / s[0];
        w[2] += s[5] - s[2] * s[2] / s[0];
    }
    cost_of_sums(w)
}

/// The [`NullTest`] of the window's `frames`, their readings unshifted giving the pooled cost
/// `cost` and the within-frame cost `within` (with `detrend`, the detrended cost of
/// [`detrended_costs`] in place of the within-frame one, for the shifts too).
///
/// Each sensor's readings in the window (every reading some frame was paired with) are put in
/// time order; a shift of `Δ` replaces each paired reading by the one `round(Δ / spacing)` places
/// earlier, wrapping round (the sensor's spacing: its readings' span over their count less one).
/// With readings coarser than the step ([`ShadowParams::for_period`]) the shifts are 1, 2, …
/// readings, up to one fewer than the sensor's readings in the window.
pub(super) fn null_test(p: &ShadowParams, frames: &[&FrameCost], candidates: usize, cost: f64, within: f64, detrend: bool) -> NullTest {
    let mut out = NullTest { shifts: 0, cost, cost_min: 1.0, within, within_min: 1.0, judged: false, passed: false };
    let sensors = frames.iter().flat_map(|f| f.pairs.iter().map(|q| q.0 + 1)).max().unwrap_or(0);
    let mut seen: Vec<std::collections::BTreeMap<DateTime<Utc>, f64>> = vec![Default::default(); sensors];
    for f in frames {
        for &(s, mid, k) in &f.pairs {
            seen[s].insert(mid, k);
        }
    }
    let series: Vec<Vec<(DateTime<Utc>, f64)>> = seen.into_iter().map(|m| m.into_iter().collect()).collect();
    // Per sensor: its spacing [s] and the span of a whole turn [s].
    let turn: Vec<Option<(f64, f64)>> = series
        .iter()
        .map(|v| {
            let n = v.len();
            (n >= 2).then(|| {
                let spacing = (v[n - 1].0 - v[0].0).num_milliseconds() as f64 / 1000.0 / (n - 1) as f64;
                (spacing, spacing * n as f64)
            })
        })
        .collect();
    let used: Vec<&(f64, f64)> = turn.iter().flatten().collect();
    let Some(span_s) = used.iter().map(|t| t.1).reduce(f64::min) else { return out };
    let mut last: Option<Vec<usize>> = None;
    let mut k = 0;
    loop {
        let shift_s = p.sample_window_s + k as f64 * p.null_step_s.max(1.0);
        k += 1;
        if shift_s > span_s - p.sample_window_s {
            break;
        }
        // Places each sensor's readings move by; a shift that moves none differently from the
        // previous one is the same shift.
        let offsets: Vec<usize> = turn.iter().map(|t| t.map_or(0, |(sp, _)| if sp > 0.0 { (shift_s / sp).round() as usize } else { 0 })).collect();
        if offsets.iter().zip(&series).any(|(o, v)| v.len() >= 2 && (*o == 0 || *o >= v.len())) || last.as_ref() == Some(&offsets) {
            continue;
        }
        last = Some(offsets.clone());
        out.shifts += 1;
        let mut sums = vec![[0.0; 6]; candidates];
        let mut within = vec![[0.0; 3]; candidates];
        for f in frames {
            let n = f.pairs.len();
            let ys: Vec<Option<f64>> = f
                .pairs
                .iter()
                .map(|&(s, mid, _)| {
                    let v = &series[s];
                    let i = v.binary_search_by(|x| x.0.cmp(&mid)).ok()?;
                    Some(v[(i + v.len() - offsets[s] % v.len()) % v.len()].1)
                })
                .collect();
            for c in 0..candidates {
                let mut st = [0.0; 6];
                for (j, y) in ys.iter().enumerate() {
                    let x = f.xs[c * n + j];
                    if let (Some(y), true) = (y, x.is_finite()) {
                        add(&mut st, x, *y);
                    }
                }
                for (a, b) in sums[c].iter_mut().zip(&st) {
                    *a += b;
                }
                if st[0] >= 2.0 {
                    within[c][0] += st[3] - st[1] * st[1] / st[0];
                    within[c][1] += st[4] - st[1] * st[2] / st[0];
                    within[c][2] += st[5] - st[2] * st[2] / st[0];
                }
            }
        }
        for c in 0..candidates {
            let pooled = r2_cost(&sums[c]);
            if pooled.is_finite() {
                out.cost_min = out.cost_min.min(pooled);
            }
            if !detrend {
                let w = within[c];
                let wc = cost_of_sums(w);
                out.within_min = out.within_min.min(wc);
            }
        }
        if detrend {
            let shifted = |f: &FrameCost, j: usize| {
                let (s, mid, _) = f.pairs[j];
                let v = &series[s];
                let i = v.binary_search_by(|x| x.0.cmp(&mid)).ok()?;
                Some(v[(i + v.len() - offsets[s] % v.len()) % v.len()].1)
            };
            out.within_min = detrended_costs(frames, candidates, shifted).into_iter().fold(out.within_min, f64::min);
        }
    }
    out.judged = out.shifts >= p.null_min_shifts;
    out.passed = out.judged && out.cost < out.cost_min && out.within < out.within_min;
    out
}

/// Per candidate, `1 − r²` of the pairs of `frames` (the reading of pair `j` of frame `f` being
/// `y(f, j)`) after each sensor's straight line in time (of the reading's middle) is taken out of
/// its readings and of their predictions alike: a drift that readings and map share over a long
/// window (overcast thinning) explains nothing, only the shadows' coming and going about it. The
/// null test's stand-in for the within-frame cost when a frame holds one reading per sensor
/// (coarse readings), where the within-frame cost has one degree of freedom per sensor less one.
/// A sensor with fewer than 3 pairs or a single time is left out; same slope rule as [`r2_cost`].
pub(super) fn detrended_costs(frames: &[&FrameCost], candidates: usize, y: impl Fn(&FrameCost, usize) -> Option<f64>) -> Vec<f64> {
    let sensors = frames.iter().flat_map(|f| f.pairs.iter().map(|q| q.0 + 1)).max().unwrap_or(0);
    let Some(t0) = frames.first().map(|f| f.time) else { return vec![1.0; candidates] };
    // Per candidate and sensor: n, Σt, Σtt, Σx, Σy, Σxt, Σyt, Σxx, Σxy, Σyy (t in kiloseconds).
    let mut acc = vec![[0.0; 10]; candidates * sensors];
    for f in frames {
        let n = f.pairs.len();
        for j in 0..n {
            let Some(yv) = y(f, j) else { continue };
            let (s, mid, _) = f.pairs[j];
            let t = (mid - t0).num_milliseconds() as f64 / 1e6;
            for c in 0..candidates {
                let x = f.xs[c * n + j];
                if x.is_finite() {
                    let a = &mut acc[c * sensors + s];
                    for (k, v) in [1.0, t, t * t, x, yv, x * t, yv * t, x * x, x * yv, yv * yv].into_iter().enumerate() {
                        a[k] += v;
                    }
                }
            }
        }
    }
    (0..candidates)
        .map(|c| {
            let mut w = [0.0; 3];
            for a in &acc[c * sensors..(c + 1) * sensors] {
                let det = a[0] * a[2] - a[1] * a[1];
                if a[0] < 3.0 || det <= 1e-12 * a[0] * a[0] {
                    continue;
                }
                // Residual cross-products after the straight line in t: S_uv − (u, ut)ᵀ G⁻¹ (v, vt).
                let fit = |u: [f64; 2], v: [f64; 2]| (a[2] * u[0] * v[0] - a[1] * (u[0] * v[1] + u[1] * v[0]) + a[0] * u[1] * v[1]) / det;
                let (xs, ys) = ([a[3], a[5]], [a[4], a[6]]);
                w[0] += a[7] - fit(xs, xs);
                w[1] += a[8] - fit(xs, ys);
                w[2] += a[9] - fit(ys, ys);
            }
            cost_of_sums(w)
        })
        .collect()
}

