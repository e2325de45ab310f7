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
//! `alert` (a ramp is likely within `alert_lead_min`) and `variable` (distinct likely ramps keep
//! coming: a state of its own that holds through broken cloud instead of an alert that never
//! clears). No state rises before the motion is confirmed; each state holds the ramp that
//! justifies it and cites it; see [`Alarm`] for the dwell and hysteresis. Alarms are advisory, not
//! a protection system.

use std::path::Path;

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::settings::{ConfigError, check_range};

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
    /// No state above `calm` until the forecast's motion stands on this many consistent
    /// measurements in a row (accepted by the motion filter's gate); default 3.
    pub motion_confirm_measurements: u32,
    /// Window over which distinct alert-level ramps are counted for `variable` \[min\]; default 30.
    pub variable_window_min: f64,
    /// Distinct alert-level ramps within the window that make the sky `variable`; default 3.
    pub variable_enter_ramps: u32,
    /// `variable` falls once no alert-level ramp has been forecast for this long \[min\]; default 15.
    pub variable_release_min: f64,
    /// `variable` is held at least this long \[min\]; default 20.
    pub variable_min_dwell_min: f64,
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
            motion_confirm_measurements: 3,
            variable_window_min: 30.0,
            variable_enter_ramps: 3,
            variable_release_min: 15.0,
            variable_min_dwell_min: 20.0,
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
        check_range(file, "ramps.match_window_min", self.match_window_min, 0.0, 10.0)?;
        check_range(file, "ramps.motion_confirm_measurements", self.motion_confirm_measurements as f64, 0.0, 100.0)?;
        check_range(file, "ramps.variable_window_min", self.variable_window_min, 1.0, 240.0)?;
        check_range(file, "ramps.variable_enter_ramps", self.variable_enter_ramps as f64, 2.0, 100.0)?;
        check_range(file, "ramps.variable_release_min", self.variable_release_min, 0.0, 240.0)?;
        check_range(file, "ramps.variable_min_dwell_min", self.variable_min_dwell_min, 0.0, 240.0)
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
    /// No ramp expected (or motion not yet confirmed).
    Calm,
    /// A ramp is likely within the forecast's reach.
    Caution,
    /// A ramp is likely within the alert window.
    Alert,
    /// Ramps keep coming: at least `variable_enter_ramps` distinct likely ramps within the alert
    /// window over the last `variable_window_min`. Held until none has been forecast for
    /// `variable_release_min`.
    Variable,
}

impl AlarmState {
    /// Name as written in files.
    pub fn name(&self) -> &'static str {
        match self {
            AlarmState::Calm => "calm",
            AlarmState::Caution => "caution",
            AlarmState::Alert => "alert",
            AlarmState::Variable => "variable",
        }
    }

    /// The state of a name written by [`AlarmState::name`].
    pub fn from_name(s: &str) -> Option<AlarmState> {
        Some(match s {
            "calm" => AlarmState::Calm,
            "caution" => AlarmState::Caution,
            "alert" => AlarmState::Alert,
            "variable" => AlarmState::Variable,
            _ => return None,
        })
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

/// The ramp that justifies the current state, as the alarm holds it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AlarmBasis {
    /// The ramp (from the forecast that set or last confirmed it).
    pub ramp: RampEvent,
    /// Its expected start.
    #[serde(skip)]
    pub start: DateTime<Utc>,
}

/// Words for a ramp as seen at `now`: direction, MW and % of capacity, expected start, lead from
/// `now`, probability.
pub fn describe_ramp(e: &RampEvent, start: &DateTime<Utc>, now: &DateTime<Utc>) -> String {
    let lead_s = (*start - *now).num_milliseconds() as f64 / 1000.0;
    let when = if lead_s >= 0.0 { format!("lead {lead_s:.0} s") } else { format!("began {:.0} s ago", -lead_s) };
    format!(
        "{} ramp of {:.2} MW ({:.0} % of capacity) expected at {} ({when}, probability {:.2})",
        match e.direction {
            Direction::Up => "up",
            Direction::Down => "down",
        },
        e.change_kw.abs() / 1000.0,
        e.change_pct.abs(),
        crate::io::fmt_time(start),
        e.probability
    )
}

/// The alarm state machine.
///
/// * No state above `calm` rises before the motion is confirmed (the caller says so: the tracker's
///   first layer has `motion_confirm_measurements` consistent measurements in a row).
/// * `alert` is held by a ramp of probability ≥ `alert_probability` within `alert_lead_min`
///   (its *basis*); a later such ramp replaces it. It falls once its basis has begun more than
///   `window_min` ago with no new one, or once `min_hold_s` has passed and no ramp within the
///   window reaches `alert_probability − release_margin`.
/// * `variable` rises when `variable_enter_ramps` distinct alert-level ramps (told apart by
///   direction and expected start more than `match_window_min` apart) were forecast over the last
///   `variable_window_min`, and falls once none has been forecast for `variable_release_min`
///   (and it has been held `variable_min_dwell_min`).
/// * `caution` (a ramp of probability ≥ `caution_probability` anywhere in the forecast) falls after
///   `min_hold_s` when no ramp reaches `caution_probability − release_margin`.
///
/// The reason always cites the basis of the current state, inside that state's window.
#[derive(Debug, Clone)]
pub struct Alarm {
    /// Current state.
    pub state: AlarmState,
    /// False until a forecast has been through [`Alarm::update`] (a new alarm, or a state restored
    /// after a restart): the state then has no forecast behind it.
    pub current: bool,
    since: Option<DateTime<Utc>>,
    basis: Option<AlarmBasis>,
    reason: String,
    /// Distinct alert-level ramps seen: expected start, direction, when last forecast.
    seen: Vec<(DateTime<Utc>, Direction, DateTime<Utc>)>,
    last_alert_level: Option<DateTime<Utc>>,
    /// A state restored after a restart: the newest frame nowcast before it. The state is held
    /// (not current) while the motion behind a new nowcast is not confirmed yet, for frames up to
    /// `alert_lead_min` after that one.
    restored_from: Option<DateTime<Utc>>,
}

impl Default for Alarm {
    fn default() -> Self {
        Self { state: AlarmState::Calm, current: false, since: None, basis: None, reason: "no forecast yet".into(), seen: vec![], last_alert_level: None, restored_from: None }
    }
}

fn secs(a: &DateTime<Utc>, b: &DateTime<Utc>) -> f64 {
    (*a - *b).num_milliseconds() as f64 / 1000.0
}

impl Alarm {
    /// A state restored from a log: kept, but not current until a forecast confirms it. `since`:
    /// the frame time of the change into it; `last_frame`: the newest frame nowcast before the
    /// restart. With `last_frame`, the state is held while the motion is being confirmed again
    /// (the first frames after a restart have none), for frames up to `alert_lead_min` after
    /// `last_frame`: a restart does not log (and notify) a fall to calm and a rise back a minute
    /// later. A state it was held in counts as having seen an alert-level ramp at `last_frame`.
    pub fn restored(state: AlarmState, since: Option<DateTime<Utc>>, last_frame: Option<DateTime<Utc>>) -> Alarm {
        let alert_level = matches!(state, AlarmState::Alert | AlarmState::Variable);
        Alarm {
            state,
            current: false,
            since,
            reason: "restored after a restart; no nowcast yet".into(),
            last_alert_level: last_frame.filter(|_| alert_level),
            restored_from: last_frame,
            ..Alarm::default()
        }
    }

    /// Why the alarm is in its state, citing its basis.
    pub fn reason(&self) -> &str {
        &self.reason
    }

    /// The ramp behind the current state, if any.
    pub fn basis(&self) -> Option<&AlarmBasis> {
        self.basis.as_ref()
    }

    /// Update from a forecast's ramp events; `confirmed_measurements` is the number of consistent
    /// motion measurements behind the forecast. Returns the change, if any.
    pub fn update(&mut self, t: &DateTime<Utc>, events: &[RampEvent], confirmed_measurements: usize, p: &RampParams) -> Option<AlarmChange> {
        let confirmed = confirmed_measurements >= p.motion_confirm_measurements as usize;
        if let Some(last) = self.restored_from {
            if !confirmed && secs(t, &last) <= p.alert_lead_min * 60.0 {
                self.reason = format!(
                    "restored after a restart; held while motion is confirmed again ({confirmed_measurements} of {} consistent measurements)",
                    p.motion_confirm_measurements
                );
                return None;
            }
            self.restored_from = None;
        }
        self.current = true;
        let none: [RampEvent; 0] = [];
        let events = if confirmed { events } else { &none };
        let start_of = |e: &RampEvent| *t + chrono::Duration::milliseconds((e.lead_time_s * 1000.0) as i64);
        let lead_s = p.alert_lead_min * 60.0;
        let best = |min_p: f64, max_lead_s: f64| {
            events
                .iter()
                .filter(|e| e.probability >= min_p && e.lead_time_s <= max_lead_s)
                .max_by(|a, b| a.probability.total_cmp(&b.probability).then(b.lead_time_s.total_cmp(&a.lead_time_s)))
        };
        let soon = best(p.alert_probability, lead_s);
        // Distinct alert-level ramps over the variable window.
        for e in events.iter().filter(|e| e.probability >= p.alert_probability && e.lead_time_s <= lead_s) {
            let s = start_of(e);
            match self.seen.iter_mut().find(|(s0, d, _)| *d == e.direction && secs(&s, s0).abs() <= p.match_window_min * 60.0) {
                Some(x) => *x = (s, e.direction, *t),
                None => self.seen.push((s, e.direction, *t)),
            }
        }
        let window_s = p.variable_window_min * 60.0;
        self.seen.retain(|(_, _, seen)| secs(t, seen) <= window_s);
        if soon.is_some() {
            self.last_alert_level = Some(*t);
        }
        let held_s = self.since.map(|s| secs(t, &s)).unwrap_or(f64::INFINITY);
        let any_caution = best(p.caution_probability, f64::INFINITY);
        let lower = || if any_caution.is_some() { AlarmState::Caution } else { AlarmState::Calm };
        let variable_now = self.seen.len() >= p.variable_enter_ramps as usize && soon.is_some();
        let next = match self.state {
            _ if variable_now => AlarmState::Variable,
            AlarmState::Variable => {
                let quiet_s = self.last_alert_level.map(|l| secs(t, &l)).unwrap_or(f64::INFINITY);
                if quiet_s > p.variable_release_min * 60.0 && held_s >= p.variable_min_dwell_min * 60.0 { lower() } else { AlarmState::Variable }
            }
            _ if soon.is_some() => AlarmState::Alert,
            AlarmState::Alert => {
                let over = self.basis.as_ref().is_none_or(|b| secs(t, &b.start) > p.window_min as f64 * 60.0);
                let released = held_s >= p.min_hold_s && best(p.alert_probability - p.release_margin, lead_s).is_none();
                if over || released || !confirmed { lower() } else { AlarmState::Alert }
            }
            AlarmState::Caution | AlarmState::Calm if any_caution.is_some() => AlarmState::Caution,
            AlarmState::Caution => {
                let released = held_s >= p.min_hold_s && best(p.caution_probability - p.release_margin, f64::INFINITY).is_none();
                if released || !confirmed { AlarmState::Calm } else { AlarmState::Caution }
            }
            AlarmState::Calm => AlarmState::Calm,
        };
        // The basis: the ramp that justifies the new state, from this forecast when it has one.
        let pick = match next {
            AlarmState::Alert | AlarmState::Variable => soon,
            AlarmState::Caution => any_caution.or_else(|| best(p.caution_probability - p.release_margin, f64::INFINITY)),
            AlarmState::Calm => None,
        };
        if let Some(e) = pick {
            self.basis = Some(AlarmBasis { ramp: e.clone(), start: start_of(e) });
        } else if next == AlarmState::Calm || next != self.state {
            self.basis = None;
        }
        self.reason = self.reason_for(next, t, confirmed_measurements, p);
        if next == self.state {
            return None;
        }
        let ch = AlarmChange {
            time_utc: crate::io::fmt_time(t),
            from: self.state,
            to: next,
            probability: self.basis.as_ref().map(|b| b.ramp.probability).unwrap_or(0.0),
            reason: self.reason.clone(),
        };
        self.state = next;
        self.since = Some(*t);
        Some(ch)
    }

    /// The words behind a state: the ramp it cites, or why there is none.
    fn reason_for(&self, next: AlarmState, t: &DateTime<Utc>, confirmed_measurements: usize, p: &RampParams) -> String {
        match (next, &self.basis) {
            (AlarmState::Calm, _) if confirmed_measurements < p.motion_confirm_measurements as usize => format!(
                "motion not confirmed yet ({confirmed_measurements} of {} consistent measurements); no alarm until it is",
                p.motion_confirm_measurements
            ),
            (AlarmState::Calm, _) => format!("no ramp of probability ≥ {:.2} forecast", p.caution_probability),
            (AlarmState::Caution, Some(b)) => format!("{} within the forecast's reach", describe_ramp(&b.ramp, &b.start, t)),
            (AlarmState::Alert, Some(b)) => format!("{} within the {:.0}-min alert window", describe_ramp(&b.ramp, &b.start, t), p.alert_lead_min),
            (AlarmState::Variable, Some(b)) => format!(
                "variable sky: {} distinct ramps of probability ≥ {:.2} within {:.0} min forecast in the last {:.0} min; now citing the {}",
                self.seen.len(),
                p.alert_probability,
                p.alert_lead_min,
                p.variable_window_min,
                describe_ramp(&b.ramp, &b.start, t)
            ),
            (s, None) => format!("{} (no ramp on record)", s.name()),
        }
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

    fn ev(prob: f64, lead: f64) -> Vec<RampEvent> {
        vec![RampEvent {
            issue_time_utc: String::new(),
            expected_start_utc: String::new(),
            lead_time_s: lead,
            direction: Direction::Down,
            change_kw: -300.0,
            change_pct: -30.0,
            probability: prob,
        }]
    }

    #[test]
    fn alarm_rises_at_once_and_falls_after_hold_with_margin() {
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let mut a = Alarm::default();
        assert!(!a.current);
        let ch = a.update(&t0, &ev(0.7, 300.0), 3, &p).unwrap();
        assert_eq!(ch.to, AlarmState::Alert);
        assert!(a.current);
        assert!(ch.reason.contains("0.30 MW (30 % of capacity)") && ch.reason.contains("lead 300 s"), "{}", ch.reason);
        // 30 s later the probability dips a little: held (minimum hold and margin); the reason
        // still cites the ramp, its lead counted from now.
        let t1 = t0 + chrono::Duration::seconds(30);
        assert!(a.update(&t1, &ev(0.55, 270.0), 3, &p).is_none());
        assert!(a.reason().contains("lead 270 s"), "{}", a.reason());
        // After the hold, still above the release level (0.5): stays.
        let t2 = t0 + chrono::Duration::seconds(200);
        assert!(a.update(&t2, &ev(0.55, 100.0), 3, &p).is_none());
        // Below it: falls to caution (0.45 ≥ 0.3).
        assert_eq!(a.update(&t2, &ev(0.45, 100.0), 3, &p).unwrap().to, AlarmState::Caution);
        let t3 = t2 + chrono::Duration::seconds(300);
        assert_eq!(a.update(&t3, &[], 3, &p).unwrap().to, AlarmState::Calm);
    }

    #[test]
    fn no_alarm_before_motion_is_confirmed() {
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let mut a = Alarm::default();
        for k in 0..3 {
            let t = t0 + chrono::Duration::seconds(30 * k as i64);
            assert!(a.update(&t, &ev(0.9, 120.0), k, &p).is_none());
            assert!(a.reason().contains("motion not confirmed"), "{}", a.reason());
        }
        assert_eq!(a.update(&(t0 + chrono::Duration::seconds(90)), &ev(0.9, 120.0), 3, &p).unwrap().to, AlarmState::Alert);
    }

    #[test]
    fn alert_holds_only_while_its_ramp_is_within_the_window() {
        // A ramp of 0.9 at 5 min lead; then forecasts show nothing. The alert holds its ramp until
        // it has begun more than the ramp window ago, never citing one outside the window.
        let p = RampParams { min_hold_s: 3600.0, ..RampParams::default() };
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let mut a = Alarm::default();
        a.update(&t0, &ev(0.9, 300.0), 3, &p).unwrap();
        for k in 1..=20 {
            let t = t0 + chrono::Duration::seconds(30 * k);
            a.update(&t, &[], 3, &p);
            if a.state == AlarmState::Alert {
                let b = a.basis().unwrap();
                let lead_s = (b.start - t).num_seconds() as f64;
                assert!(b.ramp.probability >= p.alert_probability && lead_s <= p.alert_lead_min * 60.0 && lead_s >= -(p.window_min as f64) * 60.0, "{lead_s}");
            } else {
                assert!(k * 30 > 300 + 60, "fell at {k}");
                assert_eq!(a.state, AlarmState::Calm);
                return;
            }
        }
        panic!("the alert never fell");
    }

    #[test]
    fn ramps_every_few_minutes_make_the_sky_variable_and_it_clears() {
        // A new likely ramp every 4 minutes (each forecast 5 min ahead, for one minute) for an hour:
        // alert, then variable, held through the hour; then quiet: back to calm.
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let mut a = Alarm::default();
        let mut changes = vec![];
        for k in 0..240 {
            let t = t0 + chrono::Duration::seconds(30 * k);
            let in_cycle = k % 8;
            let events = if k < 120 && in_cycle < 2 { ev(0.8, 300.0 - 30.0 * in_cycle as f64) } else { vec![] };
            if let Some(c) = a.update(&t, &events, 3, &p) {
                changes.push((k, c.to));
            }
            if a.state == AlarmState::Variable {
                assert!(a.reason().starts_with("variable sky: "), "{}", a.reason());
            }
        }
        // Two short alerts, then variable by the third ramp (minute 8), held until 15 min after
        // the last ramp (frame 113): six changes in two hours.
        let states: Vec<AlarmState> = changes.iter().map(|c| c.1).collect();
        use AlarmState::*;
        assert_eq!(states, [Alert, Calm, Alert, Calm, Variable, Calm], "{changes:?}");
        assert_eq!(changes[4].0, 16);
        assert!(changes[5].0 >= 113 + 30, "{changes:?}");
    }

    #[test]
    fn a_restored_state_is_not_current_and_falls_without_a_ramp_behind_it() {
        let p = RampParams::default();
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let mut a = Alarm::restored(AlarmState::Alert, None, None);
        assert!(!a.current);
        assert!(a.reason().contains("no nowcast yet"));
        assert_eq!(a.update(&t0, &[], 3, &p).unwrap().to, AlarmState::Calm);
        assert!(a.current);
    }

    /// After a restart the first nowcasts have no confirmed motion: the restored state is held
    /// (no change logged or notified) until motion is confirmed, then judged as usual; a restart
    /// long after the last frame (beyond `alert_lead_min`) is not held.
    #[test]
    fn a_restored_state_is_held_while_motion_is_confirmed_again() {
        let p = RampParams::default();
        let t = |s: i64| "2026-06-14T10:00:00Z".parse::<DateTime<Utc>>().unwrap() + chrono::Duration::seconds(s);
        let mut a = Alarm::restored(AlarmState::Variable, Some(t(-1800)), Some(t(0)));
        for (i, s) in [0, 30, 60].into_iter().enumerate() {
            assert_eq!(a.update(&t(s), &[], i, &p), None, "frame {i}");
            assert!(!a.current && a.reason().contains("held while motion is confirmed"), "{}", a.reason());
        }
        // Confirmed, and no alert-level ramp since the last frame before the restart: variable is
        // released 15 min after it, as without the restart.
        assert_eq!(a.update(&t(90), &[], 3, &p), None);
        assert!(a.current);
        assert_eq!(a.update(&t(15 * 60 + 30), &[], 3, &p).unwrap().to, AlarmState::Calm);
        // Restarted 20 min after the last frame: judged at once.
        let mut late = Alarm::restored(AlarmState::Alert, Some(t(-60)), Some(t(0)));
        assert_eq!(late.update(&t(20 * 60), &[], 0, &p).unwrap().to, AlarmState::Calm);
    }
}
