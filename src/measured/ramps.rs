//! Ramps against measurements, found in one quantity on both sides.
//!
//! Under `[evaluation.ramps]` ([`EvalRampParams`]) a ramp is a change over `window_min` of at least
//! `threshold_pct` of the basis (the capacity, or the clear-sky value at the window's two ends);
//! a run of such windows in one direction is one ramp, starting at its first window, as
//! [`crate::ramp::find_ramps`] does. The same definition is applied to the measured series and to
//! the forecast's, in the same quantity ([`super::Quantity`]): the plant AC power when the
//! measurements hold the plant's power (capacity: the plant's AC rating; clear sky: the clear-sky
//! power of [`super::power::clear_sky_power_kw`]), else the pyranometers' mean GHI against the
//! forecast plant-mean GHI (capacity: 1000 W/m², the irradiance of the DC rating; clear sky: the
//! clear-sky GHI). The forecast's ramps come from its series in `forecasts.csv` (central) and
//! `ensemble_plant.csv` (members); `ramps.csv`, found in power under `[ramps]`, is not used.
//!
//! Per issue time and lead, the forecast announces a ramp in a direction when its probability is
//! at least `min_probability`: the share of ensemble members with a ramp in that direction starting
//! within `match_window_min` of the lead (without members: 1 when the central forecast has one, else
//! 0). A measured ramp counts when it starts within `match_window_min` of issue + lead.

use std::collections::{BTreeSet, HashMap};
use std::path::Path;

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::io::{InputError, Measurements};
use crate::ramp::Direction;
use crate::settings::{ConfigError, check_range};
use crate::verify::read_rows;

use super::Quantity;

/// What a measured ramp's threshold is a percentage of.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RampBasis {
    /// The plant's capacity, taken in GHI as the 1000 W/m² at which its DC rating is given.
    Capacity,
    /// The clear-sky GHI (mean of the model's values at the window's two ends).
    ClearSky,
}

/// `[evaluation.ramps]` in `site.toml`: the ramp definition `evaluate --measurements` uses on the
/// pyranometers' mean GHI, and how forecast ramp events are matched to it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct EvalRampParams {
    /// What `threshold_pct` is a percentage of: `capacity` (1000 W/m²) or `clear_sky`; default
    /// `capacity`.
    pub basis: RampBasis,
    /// Least change over `window_min` that makes a ramp \[% of the basis\]; default 10.
    pub threshold_pct: f64,
    /// Window over which the change is measured \[min\]; default 1.
    pub window_min: u32,
    /// Lead times scored \[min\]; default 5, 10, 15.
    pub lead_min: Vec<f64>,
    /// A forecast ramp matches a lead when its lead time is this close to it, and a measured ramp
    /// when its start is this close to issue + lead \[min\]; default 2.
    pub match_window_min: f64,
    /// Least probability (ensemble agreement in `ramps.csv`) for a forecast ramp to count;
    /// default 0.5.
    pub min_probability: f64,
}

impl Default for EvalRampParams {
    fn default() -> Self {
        Self { basis: RampBasis::Capacity, threshold_pct: 10.0, window_min: 1, lead_min: vec![5.0, 10.0, 15.0], match_window_min: 2.0, min_probability: 0.5 }
    }
}

/// Most lead times in `[evaluation.ramps]`.
pub const MAX_RAMP_LEADS: usize = 60;

impl EvalRampParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range, named `evaluation.ramps.<field>`.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "evaluation.ramps.threshold_pct", self.threshold_pct, 0.1, 100.0)?;
        check_range(file, "evaluation.ramps.window_min", self.window_min as f64, 1.0, 15.0)?;
        if self.lead_min.is_empty() || self.lead_min.len() > MAX_RAMP_LEADS {
            return Err(ConfigError::Invalid {
                file: file.into(),
                field: "evaluation.ramps.lead_min".into(),
                expected: format!("from 1 to {MAX_RAMP_LEADS} lead times"),
                got: format!("{} lead times", self.lead_min.len()),
            });
        }
        for (i, l) in self.lead_min.iter().enumerate() {
            check_range(file, &format!("evaluation.ramps.lead_min[{i}]"), *l, 0.0, 60.0)?;
        }
        check_range(file, "evaluation.ramps.match_window_min", self.match_window_min, 0.0, 10.0)?;
        check_range(file, "evaluation.ramps.min_probability", self.min_probability, 0.0, 1.0)
    }
}

/// `[evaluation]` in `site.toml`.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct EvaluationSection {
    /// The ramp definition for scoring against measurements.
    pub ramps: EvalRampParams,
}

impl EvaluationSection {
    /// Whether every setting is its default (the section is then left out when written).
    pub fn is_default(&self) -> bool {
        *self == Self::default()
    }
}

/// Ramp detection against measurements at one lead time, as a contingency over issue times.
#[derive(Debug, Clone, Serialize)]
pub struct MeasuredRampScore {
    /// Lead time \[min\].
    pub lead_min: f64,
    /// Issue times scored.
    pub issues_scored: usize,
    /// Issue times not scored: a window within the match window of issue + lead lacks a valid
    /// reading (missing, flagged, stuck, sun low, or beyond the measurements).
    pub issues_not_scored: usize,
    /// Hits: a forecast ramp and a measured ramp in the same direction.
    pub hits: usize,
    /// Misses: a measured ramp and no forecast ramp in its direction.
    pub misses: usize,
    /// False alarms: a forecast ramp and no measured ramp in its direction.
    pub false_alarms: usize,
    /// Probability of detection, hits / (hits + misses); NaN without either.
    pub pod: f64,
    /// False-alarm ratio, false alarms / (hits + false alarms); NaN without either.
    pub far: f64,
    /// Critical success index, hits / (hits + misses + false alarms); NaN without any.
    pub csi: f64,
}


/// Hits, misses and false alarms of one issue time: forecast and measured ramp directions.
/// Both present and sharing a direction: a hit; both present in opposite directions: a miss and a
/// false alarm; only forecast: a false alarm; only measured: a miss.
pub fn ramp_contingency(fc: &[Direction], obs: &[Direction]) -> (usize, usize, usize) {
    match (fc.is_empty(), obs.is_empty()) {
        (false, false) if fc.iter().any(|d| obs.contains(d)) => (1, 0, 0),
        (false, false) => (0, 1, 1),
        (false, true) => (0, 0, 1),
        (true, false) => (0, 1, 0),
        (true, true) => (0, 0, 0),
    }
}


/// The definition in words, for reports: the threshold, its basis in the quantity, the window and
/// how forecasts are matched.
pub fn describe_definition(d: &EvalRampParams, q: Quantity) -> String {
    let basis = match (d.basis, q) {
        (RampBasis::Capacity, Quantity::Ghi) => "1000 W/m² (capacity)",
        (RampBasis::Capacity, Quantity::Power) => "the plant's AC rating",
        (RampBasis::ClearSky, Quantity::Ghi) => "the clear-sky GHI",
        (RampBasis::ClearSky, Quantity::Power) => "the clear-sky power",
    };
    format!(
        "a change of at least {} % of {basis} over {} min; forecast ramps with probability ≥ {} within ±{} min of the lead",
        d.threshold_pct, d.window_min, d.min_probability, d.match_window_min
    )
}

/// A ramp found in a series: start (the first window of its run) and direction.
pub type MeasuredRamp = (DateTime<Utc>, Direction);

/// Ramps in a series under a definition, and the window starts that could be judged.
///
/// `starts` are the window starts in time order; `value_at(t)` the quantity at `t` (NaN when
/// there is no valid value); `basis_at(t)` the clear-sky value of the quantity at `t`, or `None`
/// where the sun is too low to judge (clear-sky GHI under 50 W/m²); `capacity` the value the
/// capacity basis takes (1000 W/m², or the AC rating in kW). A window is judged when both ends have
/// a value and a basis.
pub fn find_series_ramps(
    starts: impl IntoIterator<Item = DateTime<Utc>>,
    value_at: impl Fn(DateTime<Utc>) -> f64,
    basis_at: impl Fn(DateTime<Utc>) -> Option<f64>,
    capacity: f64,
    p: &EvalRampParams,
) -> (Vec<MeasuredRamp>, Vec<DateTime<Utc>>) {
    let w = chrono::Duration::minutes(i64::from(p.window_min));
    let (mut ramps, mut judged) = (vec![], vec![]);
    let mut run: Option<MeasuredRamp> = None;
    for s in starts {
        let d = value_at(s + w) - value_at(s);
        let dir = match (basis_at(s), basis_at(s + w)) {
            (Some(c0), Some(c1)) if d.is_finite() => {
                judged.push(s);
                let limit = p.threshold_pct / 100.0 * match p.basis {
                    RampBasis::Capacity => capacity,
                    RampBasis::ClearSky => 0.5 * (c0 + c1),
                };
                if d >= limit {
                    Some(Direction::Up)
                } else if d <= -limit {
                    Some(Direction::Down)
                } else {
                    None
                }
            }
            _ => None,
        };
        match (run, dir) {
            (Some((_, rd)), Some(nd)) if rd == nd => {}
            (r, nd) => {
                ramps.extend(r);
                run = nd.map(|d| (s, d));
            }
        }
    }
    ramps.extend(run);
    (ramps, judged)
}

/// Ramps in the measured mean GHI of the pyranometer columns `all` (the valid readings only) from
/// `from` to `to`, with the window starts that could be judged: [`find_series_ramps`] over the
/// rows, with the clear-sky GHI as the basis and 1000 W/m² as the capacity.
pub fn measured_ramps(site: &crate::config::Site, m: &Measurements, all: &[usize], p: &EvalRampParams, from: DateTime<Utc>, to: DateTime<Utc>) -> (Vec<MeasuredRamp>, Vec<DateTime<Utc>>) {
    let clear = super::ClearSky::new(site);
    let value = |t: DateTime<Utc>| super::mean_reading(m, all, &t, &mut Default::default()).unwrap_or(f64::NAN);
    let starts = m.times.iter().copied().filter(|t| *t >= from && *t <= to);
    find_series_ramps(starts, value, |t| clear.ghi_basis(t), GHI_CAPACITY_WM2, p)
}

/// The capacity basis in GHI: the irradiance at which the DC rating is given \[W/m²\].
pub const GHI_CAPACITY_WM2: f64 = 1000.0;

/// The measured side of a ramp comparison: a quantity's value and clear-sky basis at a time.
pub(crate) struct RampInputs<'a> {
    /// The quantity both sides are in.
    pub quantity: Quantity,
    /// The measurements (their rows give the window starts).
    pub m: &'a Measurements,
    /// The measured value at a time (NaN when not valid).
    pub measured_at: &'a dyn Fn(DateTime<Utc>) -> f64,
    /// The clear-sky value of the quantity at a time; `None` with the sun low.
    pub basis_at: &'a dyn Fn(DateTime<Utc>) -> Option<f64>,
    /// The capacity basis (1000 W/m² or the plant's AC rating in kW).
    pub capacity: f64,
}

/// One issue time's forecast series: target times with the central value, and each member's.
#[derive(Default)]
struct IssueSeries {
    central: std::collections::BTreeMap<DateTime<Utc>, f64>,
    members: std::collections::BTreeMap<u32, HashMap<DateTime<Utc>, f64>>,
}

/// The forecast plant series per issue time, in the quantity's columns.
fn forecast_series(q: Quantity, rows: &[HashMap<String, String>], replay_out: &Path) -> Result<HashMap<DateTime<Utc>, IssueSeries>, InputError> {
    let time = |r: &HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<DateTime<Utc>>().ok());
    let num = |r: &HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    let mut out: HashMap<DateTime<Utc>, IssueSeries> = HashMap::new();
    for r in rows.iter().filter(|r| r.get("block").map(String::as_str) == Some(crate::plant::PLANT_TARGET)) {
        if let (Some(i), Some(t)) = (time(r, "issue_time_utc"), time(r, "target_time_utc")) {
            out.entry(i).or_default().central.insert(t, num(r, q.forecast_column()));
        }
    }
    let mp = replay_out.join("ensemble_plant.csv");
    if mp.is_file() {
        for r in read_rows(&mp)? {
            if !r.contains_key(q.member_column()) {
                break;
            }
            let (Some(i), h, k) = (time(&r, "issue_time_utc"), num(&r, "horizon_s"), num(&r, "member")) else { continue };
            if h.is_finite() && k.is_finite() {
                let t = i + chrono::Duration::seconds(h as i64);
                out.entry(i).or_default().members.entry(k as u32).or_default().insert(t, num(&r, q.member_column()));
            }
        }
    }
    Ok(out)
}

/// An issue time's forecast ramps: the central forecast's and each member's.
type ForecastRamps = (Vec<MeasuredRamp>, Vec<Vec<MeasuredRamp>>);

/// Whether every row start within `mw` of `centre` was judged, with no gap in the rows across the
/// window.
fn covered(m: &Measurements, judged: &BTreeSet<DateTime<Utc>>, centre: DateTime<Utc>, mw: chrono::Duration, period: chrono::Duration) -> bool {
    let starts: Vec<DateTime<Utc>> = m.times.iter().copied().filter(|s| (*s - centre).abs() <= mw).collect();
    !starts.is_empty()
        && starts.iter().all(|s| judged.contains(s))
        && starts.windows(2).all(|w| w[1] - w[0] <= period)
        && starts[0] - (centre - mw) < period
        && (centre + mw) - starts[starts.len() - 1] < period
}

/// The directions the forecast announces near `centre`: those whose probability (the share of
/// members with such a ramp within `mw`; the central forecast alone without members) is at least
/// `min_probability`.
fn announced(f: &ForecastRamps, centre: DateTime<Utc>, mw: chrono::Duration, min_probability: f64) -> Vec<Direction> {
    let (central, members) = f;
    let near = |rs: &[MeasuredRamp], d: Direction| rs.iter().any(|(s, rd)| *rd == d && (*s - centre).abs() <= mw);
    [Direction::Up, Direction::Down]
        .into_iter()
        .filter(|&d| {
            let prob = if members.is_empty() { f64::from(u8::from(near(central, d))) } else { members.iter().filter(|r| near(r, d)).count() as f64 / members.len() as f64 };
            prob >= min_probability
        })
        .collect()
}

/// Ramp POD, FAR and CSI per lead of `[evaluation.ramps]`: the forecast's ramps against the
/// measured ones, both in `inp.quantity` (module documentation).
pub(crate) fn ramp_scores(p: &EvalRampParams, inp: &RampInputs<'_>, rows: &[HashMap<String, String>], replay_out: &Path, issues: &[DateTime<Utc>]) -> Result<Vec<MeasuredRampScore>, InputError> {
    let m = inp.m;
    if issues.is_empty() || m.times.is_empty() {
        return Ok(vec![]);
    }
    let series = forecast_series(inp.quantity, rows, replay_out)?;
    let ms = |x: f64| chrono::Duration::milliseconds((x * 60_000.0).round() as i64);
    let mw = ms(p.match_window_min);
    let max_lead = ms(p.lead_min.iter().copied().fold(0.0, f64::max));
    let (from, to) = (issues[0] - mw, issues[issues.len() - 1] + max_lead + mw);
    let starts = m.times.iter().copied().filter(|t| *t >= from && *t <= to);
    let (ramps, judged) = find_series_ramps(starts, inp.measured_at, inp.basis_at, inp.capacity, p);
    let judged: BTreeSet<DateTime<Utc>> = judged.into_iter().collect();
    // Each issue's forecast ramps: the central forecast's and each member's.
    let mut fc_ramps: HashMap<DateTime<Utc>, ForecastRamps> = HashMap::new();
    for (i, s) in &series {
        let of = |v: &dyn Fn(DateTime<Utc>) -> f64, times: Vec<DateTime<Utc>>| find_series_ramps(times, v, inp.basis_at, inp.capacity, p).0;
        let central = of(&|t| s.central.get(&t).copied().unwrap_or(f64::NAN), s.central.keys().copied().collect());
        let members = s.members.values().map(|mm| of(&|t| mm.get(&t).copied().unwrap_or(f64::NAN), s.central.keys().copied().collect())).collect();
        fc_ramps.insert(*i, (central, members));
    }
    let period = chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64);
    let mut out = vec![];
    for &lead in &p.lead_min {
        let (mut scored, mut skipped, mut h, mut mi, mut fa) = (0, 0, 0, 0, 0);
        for &t in issues {
            let centre = t + ms(lead);
            if !covered(m, &judged, centre, mw, period) {
                skipped += 1;
                continue;
            }
            scored += 1;
            let fc = fc_ramps.get(&t).map(|f| announced(f, centre, mw, p.min_probability)).unwrap_or_default();
            let obs: Vec<Direction> = ramps.iter().filter(|(s, _)| (*s - centre).abs() <= mw).map(|x| x.1).collect();
            let (a, b, c) = ramp_contingency(&fc, &obs);
            h += a;
            mi += b;
            fa += c;
        }
        let r = |a: usize, b: usize| if a + b > 0 { a as f64 / (a + b) as f64 } else { f64::NAN };
        out.push(MeasuredRampScore {
            lead_min: lead,
            issues_scored: scored,
            issues_not_scored: skipped,
            hits: h,
            misses: mi,
            false_alarms: fa,
            pod: r(h, mi),
            far: r(fa, h),
            csi: if h + mi + fa > 0 { h as f64 / (h + mi + fa) as f64 } else { f64::NAN },
        });
    }
    Ok(out)
}
