//! Ramp events and alarm states.
//!
//! A **ramp** is a change of plant AC power over a window of `window_min` minutes of at least
//! `rate_pct_per_min × window_min` percent of the plant's AC capacity. The default rate, 10 % of
//! capacity per minute, is a ramp-rate limit found in grid codes (e.g. Puerto Rico's; V. Gevorgian,
//! S. Booth, *Review of PREPA technical requirements for interconnecting wind and solar generation*,
//! NREL/TP-5D00-57089, 2013) and is configurable.
//!
//! From each forecast (and its ensemble) come ramp events: expected start, lead time, direction,
//! magnitude, and probability — the share of ensemble members that show a ramp in the same
//! direction within `match_window_min` of it.
//!
//! **Alarm states** (own names): `calm` → `caution` (a ramp is likely within the forecast's reach) →
//! `alert` (a ramp is likely within `alert_lead_min`). States rise at once; they fall only when the
//! probability has dropped `release_margin` below the threshold that raised them and the state has
//! been held `min_hold_s`, so they do not chatter.

use std::path::Path;

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::config::{ConfigError, check_range};

/// `[ramps]` in `site.toml`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RampParams {
    /// Ramp-rate threshold \[% of AC capacity per minute\]; default 10.
    pub rate_pct_per_min: f64,
    /// Window over which the change is measured \[min\]; default 1.
    pub window_min: u32,
    /// Probability from which the state is `caution`; default 0.3.
    pub caution_probability: f64,
    /// Probability from which the state is `alert` (for ramps within `alert_lead_min`); default 0.6.
    pub alert_probability: f64,
    /// Lead time within which a likely ramp raises `alert` \[min\]; default 10.
    pub alert_lead_min: f64,
    /// A state falls only when the probability is this far below its threshold; default 0.1.
    pub release_margin: f64,
    /// A state is held at least this long before it may fall \[s\]; default 120.
    pub min_hold_s: f64,
    /// Ensemble members agree on a ramp when their starts are this close \[min\]; default 2.
    pub match_window_min: f64,
}

impl Default for RampParams {
    fn default() -> Self {
        Self {
            rate_pct_per_min: 10.0,
            window_min: 1,
            caution_probability: 0.3,
            alert_probability: 0.6,
            alert_lead_min: 10.0,
            release_margin: 0.1,
            min_hold_s: 120.0,
            match_window_min: 2.0,
        }
    }
}

impl RampParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "ramps.rate_pct_per_min", self.rate_pct_per_min, 0.1, 100.0)?;
        check_range(file, "ramps.window_min", self.window_min as f64, 1.0, 15.0)?;
        check_range(file, "ramps.caution_probability", self.caution_probability, 0.0, 1.0)?;
        check_range(file, "ramps.alert_probability", self.alert_probability, self.caution_probability, 1.0)?;
        check_range(file, "ramps.alert_lead_min", self.alert_lead_min, 0.0, 60.0)?;
        check_range(file, "ramps.release_margin", self.release_margin, 0.0, 0.5)?;
        check_range(file, "ramps.min_hold_s", self.min_hold_s, 0.0, 3600.0)?;
        check_range(file, "ramps.match_window_min", self.match_window_min, 0.0, 10.0)
    }
}

/// Up or down.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Direction {
    /// Power rises.
    Up,
    /// Power falls.
    Down,
}

/// A ramp found in one power series.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Ramp {
    /// Start, minutes after the series' first point.
    pub start_min: f64,
    /// Direction.
    pub direction: Direction,
    /// Total change over the ramp \[kW\] (signed).
    pub change_kw: f64,
}

/// Ramps in a power series sampled every `step_min` minutes: each run of windows whose change
/// exceeds the threshold is one ramp, starting at the run's first window.
pub fn find_ramps(power_kw: &[f64], step_min: f64, capacity_kw: f64, p: &RampParams) -> Vec<Ramp> {
    let w = ((p.window_min as f64 / step_min).round() as usize).max(1);
    let limit = p.rate_pct_per_min / 100.0 * capacity_kw * p.window_min as f64;
    let mut out: Vec<Ramp> = vec![];
    let mut current: Option<(usize, Direction, usize)> = None;
    for k in 0..power_kw.len().saturating_sub(w) {
        let d = power_kw[k + w] - power_kw[k];
        let dir = if d >= limit {
            Some(Direction::Up)
        } else if d <= -limit {
            Some(Direction::Down)
        } else {
            None
        };
        match (current, dir) {
            (Some((s, cd, _)), Some(nd)) if cd == nd => current = Some((s, cd, k + w)),
            (cur, nd) => {
                if let Some((s, cd, e)) = cur {
                    out.push(Ramp { start_min: s as f64 * step_min, direction: cd, change_kw: power_kw[e] - power_kw[s] });
                }
                current = nd.map(|d| (k, d, k + w));
            }
        }
    }
    if let Some((s, cd, e)) = current {
        out.push(Ramp { start_min: s as f64 * step_min, direction: cd, change_kw: power_kw[e] - power_kw[s] });
    }
    out
}

/// A forecast ramp event with its probability.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RampEvent {
    /// When the forecast was issued.
    pub issue_time_utc: String,
    /// Expected start.
    pub expected_start_utc: String,
    /// Lead time \[s\].
    pub lead_time_s: f64,
    /// Direction.
    pub direction: Direction,
    /// Change \[kW\] (signed).
    pub change_kw: f64,
    /// Change in % of AC capacity.
    pub change_pct: f64,
    /// Share of ensemble members that agree.
    pub probability: f64,
}

/// Ramp events of a forecast: the ramps of the central series, each with the share of members that
/// show one in the same direction within the match window; then the ramps the members agree on
/// that the central series does not show (its look-up box widens with the horizon, which can smooth
/// a ramp below the threshold): member ramps grouped by direction and start within the match
/// window, each group one event with the median start and change of its members.
pub fn ramp_events(issue: &DateTime<Utc>, central: &[f64], members: &[Vec<f64>], step_min: f64, capacity_kw: f64, p: &RampParams) -> Vec<RampEvent> {
    let member_ramps: Vec<Vec<Ramp>> = members.iter().map(|m| find_ramps(m, step_min, capacity_kw, p)).collect();
    let event = |r: &Ramp, prob: f64| {
        let start = *issue + chrono::Duration::milliseconds((r.start_min * 60_000.0) as i64);
        RampEvent {
            issue_time_utc: crate::io::fmt_time(issue),
            expected_start_utc: crate::io::fmt_time(&start),
            lead_time_s: r.start_min * 60.0,
            direction: r.direction,
            change_kw: r.change_kw,
            change_pct: 100.0 * r.change_kw / capacity_kw,
            probability: prob,
        }
    };
    let near = |a: &Ramp, b: &Ramp| a.direction == b.direction && (a.start_min - b.start_min).abs() <= p.match_window_min;
    let central_ramps = find_ramps(central, step_min, capacity_kw, p);
    let mut out: Vec<RampEvent> = central_ramps
        .iter()
        .map(|r| {
            let agree = member_ramps.iter().filter(|rs| rs.iter().any(|m| near(m, r))).count();
            event(r, if members.is_empty() { 1.0 } else { agree as f64 / members.len() as f64 })
        })
        .collect();
    // Member ramps away from every central ramp, grouped around the most agreed start first: the
    // ramp that the most members have a ramp near is the next event's centre, and the member
    // ramps near it are its group (grouping from the earliest instead split one ramp the members
    // place a little apart into two events of low probability each).
    let rest: Vec<(usize, Ramp)> = member_ramps
        .iter()
        .enumerate()
        .flat_map(|(k, rs)| rs.iter().map(move |r| (k, *r)))
        .filter(|(_, r)| !central_ramps.iter().any(|c| near(c, r)))
        .collect();
    let mut used = vec![false; rest.len()];
    let members_near = |i: usize, used: &[bool]| {
        let mut who: Vec<usize> = (0..rest.len()).filter(|&j| !used[j] && near(&rest[j].1, &rest[i].1)).map(|j| rest[j].0).collect();
        who.sort_unstable();
        who.dedup();
        who.len()
    };
    while let Some(i) = (0..rest.len()).filter(|&i| !used[i]).max_by(|&a, &b| members_near(a, &used).cmp(&members_near(b, &used)).then(rest[b].1.start_min.total_cmp(&rest[a].1.start_min))) {
        let first = rest[i].1;
        let group: Vec<usize> = (0..rest.len()).filter(|&j| !used[j] && near(&rest[j].1, &first)).collect();
        let mut who: Vec<usize> = group.iter().map(|&j| rest[j].0).collect();
        who.sort_unstable();
        who.dedup();
        for &j in &group {
            used[j] = true;
        }
        let median = |mut v: Vec<f64>| {
            v.sort_by(f64::total_cmp);
            v[v.len() / 2]
        };
        let r = Ramp {
            start_min: median(group.iter().map(|&j| rest[j].1.start_min).collect()),
            direction: first.direction,
            change_kw: median(group.iter().map(|&j| rest[j].1.change_kw).collect()),
        };
        out.push(event(&r, who.len() as f64 / members.len() as f64));
    }
    out.sort_by(|a, b| a.lead_time_s.total_cmp(&b.lead_time_s));
    out
}

/// Alarm state.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum AlarmState {
    /// No ramp expected.
    Calm,
    /// A ramp is likely within the forecast's reach.
    Caution,
    /// A ramp is likely soon.
    Alert,
}

impl AlarmState {
    /// Name as written in files.
    pub fn name(&self) -> &'static str {
        match self {
            AlarmState::Calm => "calm",
            AlarmState::Caution => "caution",
            AlarmState::Alert => "alert",
        }
    }
}

/// A change of alarm state.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AlarmChange {
    /// When.
    pub time_utc: String,
    /// From.
    pub from: AlarmState,
    /// To.
    pub to: AlarmState,
    /// The probability behind it.
    pub probability: f64,
    /// Why, in words.
    pub reason: String,
}

/// The alarm state machine with hysteresis and minimum hold.
#[derive(Debug, Clone)]
pub struct Alarm {
    /// Current state.
    pub state: AlarmState,
    since: Option<DateTime<Utc>>,
}

impl Default for Alarm {
    fn default() -> Self {
        Self { state: AlarmState::Calm, since: None }
    }
}

impl Alarm {
    /// Update from a forecast's ramp events; returns the change, if any.
    pub fn update(&mut self, t: &DateTime<Utc>, events: &[RampEvent], p: &RampParams) -> Option<AlarmChange> {
        let p_any = events.iter().map(|e| e.probability).fold(0.0, f64::max);
        let soon: Vec<&RampEvent> = events.iter().filter(|e| e.lead_time_s <= p.alert_lead_min * 60.0).collect();
        let p_soon = soon.iter().map(|e| e.probability).fold(0.0, f64::max);
        let raise = if p_soon >= p.alert_probability {
            AlarmState::Alert
        } else if p_any >= p.caution_probability {
            AlarmState::Caution
        } else {
            AlarmState::Calm
        };
        let held = self.since.map(|s| (*t - s).num_milliseconds() as f64 / 1000.0 >= p.min_hold_s).unwrap_or(true);
        let next = if raise > self.state {
            raise
        } else if raise < self.state && held {
            // Fall only below the release level of the current state.
            match self.state {
                AlarmState::Alert if p_soon < p.alert_probability - p.release_margin => {
                    if p_any >= p.caution_probability { AlarmState::Caution } else { AlarmState::Calm }
                }
                AlarmState::Caution if p_any < p.caution_probability - p.release_margin => AlarmState::Calm,
                s => s,
            }
        } else {
            self.state
        };
        if next == self.state {
            return None;
        }
        let lead = events
            .iter()
            .max_by(|a, b| a.probability.total_cmp(&b.probability))
            .map(|e| format!("{} ramp of {:.0} % of capacity expected at {} (lead {:.0} s, probability {:.2})", match e.direction { Direction::Up => "up", Direction::Down => "down" }, e.change_pct.abs(), e.expected_start_utc, e.lead_time_s, e.probability))
            .unwrap_or_else(|| "no ramp expected".into());
        let ch = AlarmChange { time_utc: crate::io::fmt_time(t), from: self.state, to: next, probability: p_any, reason: lead };
        self.state = next;
        self.since = Some(*t);
        Some(ch)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_a_down_ramp_by_hand() {
        // Capacity 1000 kW, 10 %/min over 1 min → 100 kW per step. 900 → 600 over minutes 3–5.
        let p = RampParams::default();
        let s = [900.0, 900.0, 900.0, 900.0, 750.0, 600.0, 600.0, 620.0];
        let r = find_ramps(&s, 1.0, 1000.0, &p);
        assert_eq!(r.len(), 1);
        assert_eq!(r[0].direction, Direction::Down);
        assert_eq!(r[0].start_min, 3.0);
        assert_eq!(r[0].change_kw, -300.0);
        // A slow drift of 50 kW/min is no ramp.
        let drift: Vec<f64> = (0..10).map(|k| 900.0 - 50.0 * k as f64).collect();
        assert!(find_ramps(&drift, 1.0, 1000.0, &p).is_empty());
    }

    #[test]
    fn members_agreeing_on_a_ramp_the_smooth_central_series_misses_give_an_event() {
        // Capacity 1000 kW. The central series drifts 60 kW/min (no ramp); three of four members
        // drop 300 kW at minutes 3, 4 and 4, the fourth stays flat: one down event, probability 3/4,
        // median start 4 min, median change −300 kW.
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let central: Vec<f64> = (0..8).map(|k| 900.0 - 60.0 * k as f64).collect();
        let drop_at = |m: usize| (0..8).map(|k| if k <= m { 900.0 } else { 600.0 }).collect::<Vec<f64>>();
        let members = vec![drop_at(3), drop_at(4), drop_at(4), vec![900.0; 8]];
        let ev = ramp_events(&t0, &central, &members, 1.0, 1000.0, &p);
        assert_eq!(ev.len(), 1, "{ev:?}");
        assert_eq!(ev[0].direction, Direction::Down);
        assert!((ev[0].probability - 0.75).abs() < 1e-12);
        assert_eq!(ev[0].lead_time_s, 240.0);
        assert_eq!(ev[0].change_kw, -300.0);
    }

    #[test]
    fn member_ramps_group_around_the_most_agreed_start() {
        // Ten members drop 300 kW: one at minute 2, five at 4, four at 6 (agreement window ±2 min).
        // Grouping from the earliest would make two events (minutes 2–4: 0.6; minute 6: 0.4); around
        // the most agreed start (4, within 2 min of all ten) it is one event of probability 1.
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let central: Vec<f64> = (0..10).map(|k| 900.0 - 60.0 * k as f64).collect();
        let drop_at = |m: usize| (0..10).map(|k| if k <= m { 900.0 } else { 600.0 }).collect::<Vec<f64>>();
        let starts = [2, 4, 4, 4, 4, 4, 6, 6, 6, 6];
        let members: Vec<Vec<f64>> = starts.iter().map(|&m| drop_at(m)).collect();
        let ev = ramp_events(&t0, &central, &members, 1.0, 1000.0, &p);
        assert_eq!(ev.len(), 1, "{ev:?}");
        assert!((ev[0].probability - 1.0).abs() < 1e-12);
        assert_eq!(ev[0].lead_time_s, 240.0);
    }

    #[test]
    fn alarm_rises_at_once_and_falls_after_hold_with_margin() {
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let ev = |prob: f64, lead: f64| vec![RampEvent {
            issue_time_utc: String::new(),
            expected_start_utc: String::new(),
            lead_time_s: lead,
            direction: Direction::Down,
            change_kw: -300.0,
            change_pct: -30.0,
            probability: prob,
        }];
        let mut a = Alarm::default();
        assert_eq!(a.update(&t0, &ev(0.7, 300.0), &p).unwrap().to, AlarmState::Alert);
        // 30 s later the probability dips a little: held (minimum hold and margin).
        let t1 = t0 + chrono::Duration::seconds(30);
        assert!(a.update(&t1, &ev(0.55, 300.0), &p).is_none());
        // After the hold, still above the release level (0.5): stays.
        let t2 = t0 + chrono::Duration::seconds(200);
        assert!(a.update(&t2, &ev(0.55, 300.0), &p).is_none());
        // Below it: falls to caution (0.45 ≥ 0.3).
        assert_eq!(a.update(&t2, &ev(0.45, 300.0), &p).unwrap().to, AlarmState::Caution);
        let t3 = t2 + chrono::Duration::seconds(300);
        assert_eq!(a.update(&t3, &[], &p).unwrap().to, AlarmState::Calm);
    }
}
