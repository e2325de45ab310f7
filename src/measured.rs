//! Scores of a replay against measurements: the forecasts in `forecasts.csv` (and the ensemble in
//! `ensemble_plant.csv`) against pyranometer readings, where no synthetic truth exists.
//!
//! # What is compared
//! * **Plant:** the forecast plant-mean GHI against the mean of the site's pyranometers
//!   (`ghi_<name>_wm2` columns) valid at the target time.
//! * **Blocks:** each block's forecast against the pyranometers inside its footprint (blocks
//!   without one are not scored).
//! * A reading is the row whose averaging period contains the target time (1-minute means stamped
//!   at the start of their minute). It is left out, and counted by reason, when it was flagged by the
//!   screening ([`crate::io::Measurements::screen`]: non-finite, outside the BSRN limits), is stuck
//!   (the run test of [`crate::qc`]), is missing, or when the clear-sky GHI is under 50 W/m².
//!
//! # Metrics
//! RMSE, MAE and MBE per horizon; skill against smart persistence (the clear-sky index of the
//! newest completed reading at the issue time, times the clear-sky GHI at the target:
//! Coimbra, Kleissl & Marquez 2013); CRPS of the plant ensemble (Gneiting & Raftery 2007); the share
//! of readings inside P10–P90.
//!
//! # Plant power
//! When the measurements hold the plant's meters ([`crate::meter`]: `power_plant_kw`, or
//! `power_<block>_kw` for every block), the plant's forecast AC power (`power_kw`, with
//! `power_p10_kw`/`power_p90_kw`) is scored against the metered power at the target time per
//! horizon ([`PowerHorizon`]): RMSE, MAE, MBE, skill against plain persistence of the metered power
//! completed by the issue time (power is not scaled by the clear-sky index: clipping breaks the
//! proportion), and the share of readings inside P10–P90. Rows with the clear-sky GHI under 50
//! W/m² are left out, as for irradiance. Live mode reads the same meter columns with the same
//! screening.
//!
//! # Ramps
//! Under `[evaluation.ramps]` ([`EvalRampParams`]): ramps in the pyranometers' mean GHI (a change
//! over `window_min` of at least `threshold_pct` of 1000 W/m² or of the clear-sky GHI; a run of
//! such windows is one ramp, as in [`crate::ramp::find_ramps`]) against the forecast's events in
//! `ramps.csv`, per lead: POD, FAR and CSI over issue times ([`MeasuredRampScore`]).
//!
//! # Sky types
//! Each issue time is classed from the measured plant-mean clear-sky index `kc = GHI / GHI_clear`
//! over the 30 minutes before it: its mean and the standard deviation of its 1-minute changes
//! (`σΔkc`, a variability measure after Perez et al. 2011, *Solar Energy* 85:1343, from memory):
//! **clear** when mean `kc ≥ 0.8` and `σΔkc ≤ 0.03`, **overcast** when mean `kc ≤ 0.5` and
//! `σΔkc ≤ 0.03`, **variable** otherwise (thresholds own choice); **unknown** with fewer than 10
//! readings. Each class is scored on its own (pooled over 5–15 min).

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::config::Site;
use crate::io::{InputError, Measurements};
use crate::settings::{ConfigError, check_range};
use crate::verify::{crps_ensemble, read_rows};

/// Scores of one target at one horizon.
#[derive(Debug, Clone, Serialize)]
pub struct MeasuredHorizon {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Pairs scored.
    pub n: usize,
    /// RMSE \[W/m²\].
    pub rmse_wm2: f64,
    /// MAE \[W/m²\].
    pub mae_wm2: f64,
    /// MBE (forecast − measured) \[W/m²\].
    pub mbe_wm2: f64,
    /// RMSE of smart persistence on the same pairs \[W/m²\].
    pub rmse_persistence_wm2: f64,
    /// `1 − RMSE / RMSE_persistence`.
    pub skill: f64,
    /// Mean CRPS of the ensemble (plant only; NaN without members) \[W/m²\].
    pub crps_wm2: f64,
    /// Share of readings inside P10–P90.
    pub coverage_p10_p90: f64,
}

/// Plant AC power scores at one horizon against the plant's meters.
#[derive(Debug, Clone, Serialize)]
pub struct PowerHorizon {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Pairs scored.
    pub n: usize,
    /// RMSE \[kW\].
    pub rmse_kw: f64,
    /// MAE \[kW\].
    pub mae_kw: f64,
    /// MBE (forecast − metered) \[kW\].
    pub mbe_kw: f64,
    /// RMSE of plain persistence of the metered power on the same pairs \[kW\].
    pub rmse_persistence_kw: f64,
    /// `1 − RMSE / RMSE_persistence`.
    pub skill: f64,
    /// Share of readings inside P10–P90.
    pub coverage_p10_p90: f64,
}

/// Pooled 5–15 min scores of a subset (a sky type or a block).
#[derive(Debug, Clone, Serialize)]
pub struct Pooled {
    /// Pairs.
    pub n: usize,
    /// RMSE \[W/m²\].
    pub rmse_wm2: f64,
    /// Smart persistence's RMSE \[W/m²\].
    pub rmse_persistence_wm2: f64,
    /// Skill.
    pub skill: f64,
    /// MBE \[W/m²\].
    pub mbe_wm2: f64,
}

/// Everything [`evaluate_measured`] finds.
#[derive(Debug, Clone, Serialize)]
pub struct MeasuredEvaluation {
    /// Plant scores per horizon.
    pub plant: Vec<MeasuredHorizon>,
    /// Pooled 5–15 min plant scores per sky type.
    pub by_sky_type: BTreeMap<String, Pooled>,
    /// Issue times per sky type.
    pub issues_by_sky_type: BTreeMap<String, usize>,
    /// Pooled 5–15 min scores per block that holds a pyranometer.
    pub by_block: BTreeMap<String, Pooled>,
    /// Forecast rows left out, by reason.
    pub excluded: BTreeMap<String, usize>,
    /// Values the screening flagged, by column and reason.
    pub screened: BTreeMap<String, usize>,
    /// The ramp definition of `[evaluation.ramps]` the ramp scores use.
    pub ramp_definition: EvalRampParams,
    /// Ramp POD, FAR and CSI per lead time (empty without `ramps.csv`).
    pub ramps: Vec<MeasuredRampScore>,
    /// Plant AC power against the plant's meters per horizon (empty without meter columns).
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub plant_power: Vec<PowerHorizon>,
}

/// A scored plant pair: forecast, measured, smart persistence, CRPS, inside P10–P90 (1 or 0).
type Pair = (f64, f64, f64, f64, f64);

/// Smallest clear-sky GHI scored \[W/m²\].
const MIN_CLEAR_WM2: f64 = 50.0;

/// The sky type of an issue time from the measured clear-sky index before it.
pub fn sky_type(kc: &[f64]) -> &'static str {
    let v: Vec<f64> = kc.iter().copied().filter(|x| x.is_finite()).collect();
    if v.len() < 10 {
        return "unknown";
    }
    let mean = v.iter().sum::<f64>() / v.len() as f64;
    let d: Vec<f64> = v.windows(2).map(|w| w[1] - w[0]).collect();
    let md = d.iter().sum::<f64>() / d.len() as f64;
    let sd = (d.iter().map(|x| (x - md).powi(2)).sum::<f64>() / d.len() as f64).sqrt();
    if sd <= 0.03 && mean >= 0.8 {
        "clear"
    } else if sd <= 0.03 && mean <= 0.5 {
        "overcast"
    } else {
        "variable"
    }
}

fn pooled(pairs: &[(f64, f64, f64)]) -> Pooled {
    let n = pairs.len();
    let rm = |k: usize| (pairs.iter().map(|p| (if k == 0 { p.0 } else { p.2 } - p.1).powi(2)).sum::<f64>() / n.max(1) as f64).sqrt();
    let (r, rp) = (rm(0), rm(2));
    Pooled { n, rmse_wm2: r, rmse_persistence_wm2: rp, skill: 1.0 - r / rp, mbe_wm2: pairs.iter().map(|p| p.0 - p.1).sum::<f64>() / n.max(1) as f64 }
}

/// One scored pair of [`scored_pairs`]: a forecast row with its reading and smart persistence.
#[derive(Debug, Clone)]
pub struct MeasuredPair {
    /// Issue time.
    pub issue: DateTime<Utc>,
    /// Target: a block or `plant`.
    pub target: String,
    /// Horizon \[s\] (never 0).
    pub horizon_s: u32,
    /// Forecast GHI \[W/m²\].
    pub forecast: f64,
    /// Measured GHI (mean of the target's valid pyranometers) \[W/m²\].
    pub observed: f64,
    /// Smart persistence \[W/m²\].
    pub persistence: f64,
    /// CRPS of the plant ensemble (plant rows with members only) \[W/m²\].
    pub crps: Option<f64>,
    /// The forecast's P10 \[W/m²\], when given.
    pub p10: Option<f64>,
    /// The forecast's P90 \[W/m²\], when given.
    pub p90: Option<f64>,
}

impl MeasuredPair {
    /// Whether the reading lies inside P10–P90 (false without a band).
    pub fn inside(&self) -> bool {
        matches!((self.p10, self.p90), (Some(lo), Some(hi)) if self.observed >= lo && self.observed <= hi)
    }
}

/// The pairs of a replay against measurements, in the order of `forecasts.csv`, with what was left
/// out.
#[derive(Debug)]
pub struct ScoredPairs {
    /// Every scored pair (plant and blocks with pyranometers, horizons after 0).
    pub pairs: Vec<MeasuredPair>,
    /// Forecast rows left out, by reason.
    pub excluded: BTreeMap<String, usize>,
    /// Values the screening flagged, by column and reason.
    pub screened: BTreeMap<String, usize>,
    measurements: Measurements,
    plant_columns: Vec<usize>,
    issues: Vec<DateTime<Utc>>,
    /// Plant power pairs per horizon (forecast, metered, persistence, unused, inside P10–P90).
    power_pairs: BTreeMap<u32, Vec<Pair>>,
}

/// Score a replay's forecasts against a measurements CSV for a site.
///
/// # Errors
/// Unreadable or malformed files, a measurements file without any of the site's pyranometers.
pub fn evaluate_measured(site: &Site, replay_out: &Path, measurements: &Path) -> Result<MeasuredEvaluation, InputError> {
    let sp = scored_pairs(site, replay_out, measurements)?;
    // Sky type per issue time.
    let mut sky_of: HashMap<DateTime<Utc>, &'static str> = HashMap::new();
    // Per horizon: (forecast, measured, persistence, CRPS, inside P10–P90).
    let mut per_h: BTreeMap<u32, Vec<Pair>> = BTreeMap::new();
    let mut by_sky: BTreeMap<String, Vec<(f64, f64, f64)>> = BTreeMap::new();
    let mut by_block: BTreeMap<String, Vec<(f64, f64, f64)>> = BTreeMap::new();
    for p in &sp.pairs {
        let h = p.horizon_s;
        if p.target == crate::plant::PLANT_TARGET {
            let inside = p.inside() as u8 as f64;
            per_h.entry(h).or_default().push((p.forecast, p.observed, p.persistence, p.crps.unwrap_or(f64::NAN), inside));
            if (300..=900).contains(&h) {
                let sky = *sky_of.entry(p.issue).or_insert_with(|| sky_type_before(site, &sp.measurements, &sp.plant_columns, p.issue));
                by_sky.entry(sky.to_string()).or_default().push((p.forecast, p.observed, p.persistence));
            }
        } else if (300..=900).contains(&h) {
            by_block.entry(p.target.clone()).or_default().push((p.forecast, p.observed, p.persistence));
        }
    }
    let plant = horizon_scores(per_h);
    let ramps = ramp_scores(site, &sp.measurements, &sp.plant_columns, &sp.issues, replay_out)?;
    let mut issues_by_sky_type: BTreeMap<String, usize> = BTreeMap::new();
    for s in sky_of.values() {
        *issues_by_sky_type.entry(s.to_string()).or_default() += 1;
    }
    Ok(MeasuredEvaluation {
        plant,
        by_sky_type: by_sky.iter().map(|(k, v)| (k.clone(), pooled(v))).collect(),
        issues_by_sky_type,
        by_block: by_block.iter().map(|(k, v)| (k.clone(), pooled(v))).collect(),
        excluded: sp.excluded,
        screened: sp.screened,
        ramp_definition: site.file.evaluation.ramps.clone(),
        ramps,
        plant_power: power_scores(&sp.power_pairs),
    })
}

/// The pyranometers' mean GHI at each row of a measurements CSV (the valid readings only: as for
/// the scores, flagged, missing and stuck readings are left out; NaN where none is left).
///
/// # Errors
/// As [`evaluate_measured`].
pub fn measured_mean_ghi(site: &Site, measurements: &Path) -> Result<Vec<(DateTime<Utc>, f64)>, InputError> {
    let mut m = Measurements::read_csv(measurements)?;
    m.screen_site(measurements, &site.file)?;
    let cols: Vec<usize> = pyranometer_columns(site, &m, measurements)?.iter().map(|c| c.0).collect();
    let mut none = BTreeMap::new();
    Ok(m.times.iter().map(|t| (*t, mean_reading(&m, &cols, t, &mut none).unwrap_or(f64::NAN))).collect())
}

/// The pairs a replay's forecasts make with a measurements CSV (see the module documentation for
/// which readings count), in the order of `forecasts.csv`.
///
/// # Errors
/// As [`evaluate_measured`].
pub fn scored_pairs(site: &Site, replay_out: &Path, measurements: &Path) -> Result<ScoredPairs, InputError> {
    let mut m = Measurements::read_csv(measurements)?;
    let screen = m.screen_site(measurements, &site.file)?;
    let cols = pyranometer_columns(site, &m, measurements)?;
    let mut excluded: BTreeMap<String, usize> = BTreeMap::new();
    let all: Vec<usize> = cols.iter().map(|c| c.0).collect();
    let rows = read_rows(&replay_out.join("forecasts.csv"))?;
    let (clear_at_issue, members) = issue_tables(&rows, replay_out)?;
    let mut issues: Vec<DateTime<Utc>> = rows.iter().filter_map(|r| r.get("issue_time_utc").and_then(|v| v.parse::<DateTime<Utc>>().ok())).collect();
    issues.sort();
    issues.dedup();
    let mut pairs = vec![];
    for r in &rows {
        if let Some(p) = pair_of(r, &m, &cols, &all, &clear_at_issue, &members, &mut excluded) {
            pairs.push(p);
        }
    }
    let meters = crate::meter::MeterColumns::find(&site.file, &m);
    let mut power_pairs: BTreeMap<u32, Vec<Pair>> = BTreeMap::new();
    if meters.has_plant_power() {
        for r in rows.iter().filter(|r| r.get("block").is_some_and(|b| b == crate::plant::PLANT_TARGET)) {
            if let Some((h, p)) = power_pair_of(r, &m, &meters) {
                power_pairs.entry(h).or_default().push(p);
            }
        }
    }
    Ok(ScoredPairs { pairs, excluded, screened: screen.counts(), measurements: m, plant_columns: all, issues, power_pairs })
}

/// The pair of one forecast row, or `None` (counted in `excluded` by reason) when it cannot be
/// scored.
#[allow(clippy::type_complexity)]
fn pair_of(
    r: &HashMap<String, String>,
    m: &Measurements,
    cols: &[(usize, Option<String>)],
    all: &[usize],
    clear_at_issue: &HashMap<(String, DateTime<Utc>), f64>,
    members: &HashMap<(DateTime<Utc>, u32), Vec<f64>>,
    excluded: &mut BTreeMap<String, usize>,
) -> Option<MeasuredPair> {
    let num = |k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    let time = |k: &str| r.get(k).and_then(|v| v.parse::<DateTime<Utc>>().ok());
    let (Some(issue), Some(target), Some(block)) = (time("issue_time_utc"), time("target_time_utc"), r.get("block")) else { return None };
    let h = num("horizon_s");
    if h.is_nan() || h <= 0.0 {
        return None;
    }
    let h = h as u32;
    let is_plant = block == crate::plant::PLANT_TARGET;
    let cs: Vec<usize> = if is_plant { all.to_vec() } else { cols.iter().filter(|c| c.1.as_deref() == Some(block.as_str())).map(|c| c.0).collect() };
    if cs.is_empty() {
        return None;
    }
    let mut why = |reason: &str| *excluded.entry(reason.into()).or_default() += 1;
    let clear = num("ghi_clear_wm2");
    if clear.is_nan() || clear < MIN_CLEAR_WM2 {
        why("sun low (clear-sky GHI < 50 W/m²)");
        return None;
    }
    let Some(obs) = mean_reading(m, &cs, &target, excluded) else {
        *excluded.entry("no valid reading at the target time".into()).or_default() += 1;
        return None;
    };
    let newest: Vec<f64> = cs.iter().filter_map(|&c| m.completed_at(c, &issue).map(|x| x.0)).collect();
    let newest = (!newest.is_empty()).then(|| newest.iter().sum::<f64>() / newest.len() as f64);
    let clear0 = clear_at_issue.get(&(block.clone(), issue)).copied().unwrap_or(f64::NAN);
    let Some(sp) = newest.filter(|_| clear0 >= MIN_CLEAR_WM2).map(|v| v / clear0 * clear) else {
        *excluded.entry("no reading for smart persistence at the issue time".into()).or_default() += 1;
        return None;
    };
    let crps = if is_plant { members.get(&(issue, h)).map(|v| crps_ensemble(v, obs)) } else { None };
    let band = |k: &str| Some(num(k)).filter(|v| !v.is_nan());
    Some(MeasuredPair { issue, target: block.clone(), horizon_s: h, forecast: num("ghi_wm2"), observed: obs, persistence: sp, crps, p10: band("ghi_p10_wm2"), p90: band("ghi_p90_wm2") })
}

/// The plant power pair of one plant forecast row: its horizon and (forecast, metered,
/// persistence, NaN, inside P10–P90); `None` at horizon 0, with the sun low, or without a metered
/// value at the target or the issue time.
fn power_pair_of(r: &HashMap<String, String>, m: &Measurements, meters: &crate::meter::MeterColumns) -> Option<(u32, Pair)> {
    let num = |k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    let time = |k: &str| r.get(k).and_then(|v| v.parse::<DateTime<Utc>>().ok());
    let (issue, target, h) = (time("issue_time_utc")?, time("target_time_utc")?, num("horizon_s"));
    let forecast = num("power_kw");
    let clear = num("ghi_clear_wm2");
    if h.is_nan() || h <= 0.0 || !forecast.is_finite() || clear.is_nan() || clear < MIN_CLEAR_WM2 {
        return None;
    }
    let observed = crate::meter::plant_power_at(m, meters, &target)?;
    let persistence = crate::meter::plant_power_completed_at(m, meters, &issue)?;
    let inside = (num("power_p10_kw")..=num("power_p90_kw")).contains(&observed);
    Some((h as u32, (forecast, observed, persistence, f64::NAN, f64::from(u8::from(inside)))))
}

/// The plant power scores per horizon from its pairs.
fn power_scores(per_h: &BTreeMap<u32, Vec<Pair>>) -> Vec<PowerHorizon> {
    per_h
        .iter()
        .map(|(h, v)| {
            let pairs: Vec<(f64, f64, f64)> = v.iter().map(|x| (x.0, x.1, x.2)).collect();
            let p = pooled(&pairs);
            let n = v.len() as f64;
            PowerHorizon {
                horizon_s: *h,
                n: v.len(),
                rmse_kw: p.rmse_wm2,
                mae_kw: v.iter().map(|x| (x.0 - x.1).abs()).sum::<f64>() / n,
                mbe_kw: p.mbe_wm2,
                rmse_persistence_kw: p.rmse_persistence_wm2,
                skill: p.skill,
                coverage_p10_p90: v.iter().map(|x| x.4).sum::<f64>() / n,
            }
        })
        .collect()
}

/// The sky type of the 30 minutes before `issue`, from the clear-sky index of the mean of the
/// pyranometers `all`.
fn sky_type_before(site: &Site, m: &Measurements, all: &[usize], issue: DateTime<Utc>) -> &'static str {
    let f = &site.file.site;
    let observer = f.observer();
    let kc_at = |t: DateTime<Utc>| -> f64 {
        let Ok(sp) = crate::sun::position(&t, &observer) else { return f64::NAN };
        let clear = crate::clearsky::clear_sky(&sp, f.elevation_m, f.clear_sky()).ghi_wm2;
        if clear < MIN_CLEAR_WM2 {
            return f64::NAN;
        }
        let mut none = BTreeMap::new();
        mean_reading(m, all, &t, &mut none).map(|v| v / clear).unwrap_or(f64::NAN)
    };
    let kc: Vec<f64> = (0..30).rev().map(|k| kc_at(issue - chrono::Duration::minutes(k))).collect();
    sky_type(&kc)
}

/// Each configured pyranometer's column in the measurements and the block it lies in.
fn pyranometer_columns(site: &Site, m: &Measurements, measurements: &Path) -> Result<Vec<(usize, Option<String>)>, InputError> {
    let cols: Vec<(usize, Option<String>)> = site
        .file
        .pyranometers
        .iter()
        .filter_map(|p| {
            let c = m.column(&format!("ghi_{}_wm2", p.name))?;
            let block = site.file.plant.blocks.iter().find(|b| crate::plant::point_in_polygon(p.position_m, &b.polygon_m)).map(|b| b.name.clone());
            Some((c, block))
        })
        .collect();
    if cols.is_empty() {
        return Err(InputError::Other {
            file: measurements.into(),
            message: format!(
                "none of the site's pyranometers has a column here (expected ghi_<name>_wm2 for {})",
                site.file.pyranometers.iter().map(|p| p.name.as_str()).collect::<Vec<_>>().join(", ")
            ),
        });
    }
    Ok(cols)
}

/// Mean of the valid readings at `t` over some columns; a missing, flagged or stuck reading is
/// left out and counted in `why`.
fn mean_reading(m: &Measurements, cs: &[usize], t: &DateTime<Utc>, why: &mut BTreeMap<String, usize>) -> Option<f64> {
    let (mut s, mut k) = (0.0, 0usize);
    for &c in cs {
        let v = m.at(c, t);
        if !v.is_finite() {
            *why.entry("reading missing or flagged".into()).or_default() += 1;
            continue;
        }
        if m.stuck_at(c, t, crate::qc::STUCK_RUN) {
            *why.entry("reading stuck".into()).or_default() += 1;
            continue;
        }
        s += v;
        k += 1;
    }
    (k > 0).then(|| s / k as f64)
}

/// Clear-sky GHI at issue time per (block, issue) from the horizon-0 rows, and the plant ensemble's
/// members per (issue, horizon) from `ensemble_plant.csv` when the replay wrote it.
#[allow(clippy::type_complexity)]
fn issue_tables(rows: &[HashMap<String, String>], replay_out: &Path) -> Result<(HashMap<(String, DateTime<Utc>), f64>, HashMap<(DateTime<Utc>, u32), Vec<f64>>), InputError> {
    let num = |r: &HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    let time = |r: &HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<DateTime<Utc>>().ok());
    // Clear-sky GHI at each issue time (the horizon-0 plant row).
    let mut clear_at_issue: HashMap<(String, DateTime<Utc>), f64> = HashMap::new();
    for r in rows {
        if num(r, "horizon_s") == 0.0
            && let (Some(t), Some(b)) = (time(r, "issue_time_utc"), r.get("block"))
        {
            clear_at_issue.insert((b.clone(), t), num(r, "ghi_clear_wm2"));
        }
    }
    // Members of the plant ensemble per (issue, horizon).
    let mut members: HashMap<(DateTime<Utc>, u32), Vec<f64>> = HashMap::new();
    let mp = replay_out.join("ensemble_plant.csv");
    if mp.is_file() {
        for r in read_rows(&mp)? {
            if let Some(t) = time(&r, "issue_time_utc") {
                members.entry((t, num(&r, "horizon_s") as u32)).or_default().push(num(&r, "plant_ghi_wm2"));
            }
        }
    }
    Ok((clear_at_issue, members))
}

/// The plant's scores per horizon from its (forecast, measured, persistence, CRPS, inside) pairs.
fn horizon_scores(per_h: BTreeMap<u32, Vec<Pair>>) -> Vec<MeasuredHorizon> {
    per_h
        .into_iter()
        .map(|(h, v)| {
            let n = v.len() as f64;
            let pairs: Vec<(f64, f64, f64)> = v.iter().map(|x| (x.0, x.1, x.2)).collect();
            let p = pooled(&pairs);
            let crps: Vec<f64> = v.iter().map(|x| x.3).filter(|x| x.is_finite()).collect();
            MeasuredHorizon {
                horizon_s: h,
                n: v.len(),
                rmse_wm2: p.rmse_wm2,
                mae_wm2: v.iter().map(|x| (x.0 - x.1).abs()).sum::<f64>() / n,
                mbe_wm2: p.mbe_wm2,
                rmse_persistence_wm2: p.rmse_persistence_wm2,
                skill: p.skill,
                crps_wm2: if crps.is_empty() { f64::NAN } else { crps.iter().sum::<f64>() / crps.len() as f64 },
                coverage_p10_p90: v.iter().map(|x| x.4).sum::<f64>() / n,
            }
        })
        .collect()
}

/// Print the scores as tables.
pub fn print_measured(e: &MeasuredEvaluation) {
    use crate::verify::fmt_score;
    crate::say!("plant-mean GHI against the mean of the pyranometers");
    crate::say!("horizon      n   RMSE    MAE    MBE  RMSE(pers)  skill   CRPS  P10–P90");
    for h in &e.plant {
        crate::say!(
            "{:>5} min {:>5} {:>6.1} {:>6.1} {:>6.1} {:>11.1} {:>6} {:>6} {:>7}",
            h.horizon_s / 60,
            h.n,
            h.rmse_wm2,
            h.mae_wm2,
            h.mbe_wm2,
            h.rmse_persistence_wm2,
            fmt_score(h.skill, 2),
            fmt_score(h.crps_wm2, 1),
            fmt_score(h.coverage_p10_p90, 2)
        );
    }
    crate::say!("by sky type (issue times; pooled 5–15 min):");
    for (k, p) in &e.by_sky_type {
        crate::say!("  {k:<9} {:>4} issues, n {:>5}, RMSE {:.1} vs persistence {:.1}, skill {}, MBE {:.1}", e.issues_by_sky_type.get(k).copied().unwrap_or(0), p.n, p.rmse_wm2, p.rmse_persistence_wm2, fmt_score(p.skill, 2), p.mbe_wm2);
    }
    if !e.by_block.is_empty() {
        crate::say!("by block (its own pyranometers; pooled 5–15 min):");
        for (k, p) in &e.by_block {
            crate::say!("  {k:<12} n {:>5}, RMSE {:.1} vs persistence {:.1}, skill {}, MBE {:.1}", p.n, p.rmse_wm2, p.rmse_persistence_wm2, fmt_score(p.skill, 2), p.mbe_wm2);
        }
    }
    if !e.ramps.is_empty() {
        let d = &e.ramp_definition;
        crate::say!(
            "ramps of the pyranometers' mean GHI (change ≥ {} % of {} over {} min; forecast events with probability ≥ {}, matched within {} min):",
            d.threshold_pct,
            match d.basis {
                RampBasis::Capacity => "capacity (1000 W/m²)",
                RampBasis::ClearSky => "clear-sky GHI",
            },
            d.window_min,
            d.min_probability,
            d.match_window_min
        );
        crate::say!("   lead  issues  hits  misses  false    POD    FAR    CSI");
        for r in &e.ramps {
            crate::say!(
                "{:>4} min {:>7} {:>5} {:>7} {:>6} {:>6} {:>6} {:>6}  ({} issue times not scored)",
                r.lead_min,
                r.issues_scored,
                r.hits,
                r.misses,
                r.false_alarms,
                fmt_score(r.pod, 2),
                fmt_score(r.far, 2),
                fmt_score(r.csi, 2),
                r.issues_not_scored
            );
        }
    }
    if !e.plant_power.is_empty() {
        crate::say!("plant AC power against the plant's meters [kW] (persistence: the metered power at issue)");
        crate::say!("horizon      n     RMSE      MAE      MBE  RMSE(pers)  skill  P10–P90");
        for h in &e.plant_power {
            crate::say!(
                "{:>5} min {:>5} {:>8.1} {:>8.1} {:>8.1} {:>11.1} {:>6} {:>8}",
                h.horizon_s / 60,
                h.n,
                h.rmse_kw,
                h.mae_kw,
                h.mbe_kw,
                h.rmse_persistence_kw,
                fmt_score(h.skill, 2),
                fmt_score(h.coverage_p10_p90, 2)
            );
        }
    }
    let excl: Vec<String> = e.excluded.iter().map(|(k, n)| format!("{k}: {n}")).collect();
    crate::say!("left out: {}", if excl.is_empty() { "none".to_string() } else { excl.join("; ") });
    let scr: Vec<String> = e.screened.iter().map(|(k, n)| format!("{k}: {n}")).collect();
    crate::say!("screened measurements: {}", if scr.is_empty() { "nothing flagged".to_string() } else { scr.join("; ") });
}

// ---------------------------------------------------------------------------------------------
// Ramps against measurements

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

/// A ramp found in the measured mean GHI: start (the first window of its run) and direction.
pub type MeasuredRamp = (DateTime<Utc>, crate::ramp::Direction);

/// Ramps in the measured mean GHI of the columns `all` under a definition, and the start times of
/// the windows that could be judged (valid readings at both ends, clear-sky GHI ≥ 50 W/m²). Each
/// run of consecutive windows (over the rows) whose change passes the threshold in one direction
/// is one ramp, starting at the run's first window, as [`crate::ramp::find_ramps`] does.
pub fn measured_ramps(site: &Site, m: &Measurements, all: &[usize], p: &EvalRampParams, from: DateTime<Utc>, to: DateTime<Utc>) -> (Vec<MeasuredRamp>, Vec<DateTime<Utc>>) {
    use crate::ramp::Direction;
    let f = &site.file.site;
    let observer = f.observer();
    let clear_at = |t: DateTime<Utc>| -> f64 {
        crate::sun::position(&t, &observer).map(|sp| crate::clearsky::clear_sky(&sp, f.elevation_m, f.clear_sky()).ghi_wm2).unwrap_or(f64::NAN)
    };
    let ghi_at = |t: DateTime<Utc>| -> f64 {
        let mut none = BTreeMap::new();
        mean_reading(m, all, &t, &mut none).unwrap_or(f64::NAN)
    };
    let w = chrono::Duration::minutes(i64::from(p.window_min));
    let (mut ramps, mut judged) = (vec![], vec![]);
    let mut run: Option<(DateTime<Utc>, Direction)> = None;
    for &s in m.times.iter().filter(|t| **t >= from && **t <= to) {
        let (c0, c1) = (clear_at(s), clear_at(s + w));
        let d = ghi_at(s + w) - ghi_at(s);
        let dir = if d.is_finite() && c0 >= MIN_CLEAR_WM2 && c1 >= MIN_CLEAR_WM2 {
            judged.push(s);
            let limit = p.threshold_pct / 100.0 * match p.basis {
                RampBasis::Capacity => 1000.0,
                RampBasis::ClearSky => 0.5 * (c0 + c1),
            };
            if d >= limit {
                Some(Direction::Up)
            } else if d <= -limit {
                Some(Direction::Down)
            } else {
                None
            }
        } else {
            None
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

/// Hits, misses and false alarms of one issue time: forecast and measured ramp directions.
/// Both present and sharing a direction: a hit; both present in opposite directions: a miss and a
/// false alarm; only forecast: a false alarm; only measured: a miss.
pub fn ramp_contingency(fc: &[crate::ramp::Direction], obs: &[crate::ramp::Direction]) -> (usize, usize, usize) {
    match (fc.is_empty(), obs.is_empty()) {
        (false, false) if fc.iter().any(|d| obs.contains(d)) => (1, 0, 0),
        (false, false) => (0, 1, 1),
        (false, true) => (0, 0, 1),
        (true, false) => (0, 1, 0),
        (true, true) => (0, 0, 0),
    }
}

/// Ramp POD, FAR and CSI per lead of `[evaluation.ramps]`: the forecast's ramp events
/// (`ramps.csv`) against the ramps of the pyranometers' mean GHI.
fn ramp_scores(site: &Site, m: &Measurements, all: &[usize], issues: &[DateTime<Utc>], replay_out: &Path) -> Result<Vec<MeasuredRampScore>, InputError> {
    let p = &site.file.evaluation.ramps;
    let path = replay_out.join("ramps.csv");
    if !path.is_file() || issues.is_empty() {
        return Ok(vec![]);
    }
    let events = read_rows(&path)?;
    let mw = chrono::Duration::milliseconds((p.match_window_min * 60_000.0).round() as i64);
    let max_lead = chrono::Duration::milliseconds((p.lead_min.iter().copied().fold(0.0, f64::max) * 60_000.0).round() as i64);
    let from = issues[0] - mw;
    let to = issues[issues.len() - 1] + max_lead + mw;
    let (ramps, judged) = measured_ramps(site, m, all, p, from, to);
    let judged: std::collections::BTreeSet<DateTime<Utc>> = judged.into_iter().collect();
    let period = chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64);
    let mut by_issue: HashMap<DateTime<Utc>, Vec<(f64, f64, crate::ramp::Direction)>> = HashMap::new();
    for e in &events {
        let Some(t) = e.get("issue_time_utc").and_then(|x| x.parse::<DateTime<Utc>>().ok()) else { continue };
        let num = |k: &str| e.get(k).and_then(|x| x.parse::<f64>().ok()).unwrap_or(f64::NAN);
        let dir = if e.get("direction").map(String::as_str) == Some("up") { crate::ramp::Direction::Up } else { crate::ramp::Direction::Down };
        by_issue.entry(t).or_default().push((num("lead_time_s"), num("probability"), dir));
    }
    let mut out = vec![];
    for &lead in &p.lead_min {
        let (mut scored, mut skipped, mut h, mut mi, mut fa) = (0, 0, 0, 0, 0);
        for &t in issues {
            let centre = t + chrono::Duration::milliseconds((lead * 60_000.0).round() as i64);
            // Every row start within the match window must have been judged.
            let starts: Vec<DateTime<Utc>> = m.times.iter().copied().filter(|s| (*s - centre).abs() <= mw).collect();
            let covered = !starts.is_empty() && starts.iter().all(|s| judged.contains(s)) && {
                // No gap in the rows across the match window.
                starts.windows(2).all(|w| w[1] - w[0] <= period) && starts[0] - (centre - mw) < period && (centre + mw) - starts[starts.len() - 1] < period
            };
            if !covered {
                skipped += 1;
                continue;
            }
            scored += 1;
            let fc: Vec<crate::ramp::Direction> = by_issue
                .get(&t)
                .map(|v| v.iter().filter(|(l, pr, _)| (l - lead * 60.0).abs() <= p.match_window_min * 60.0 && *pr >= p.min_probability).map(|x| x.2).collect())
                .unwrap_or_default();
            let obs: Vec<crate::ramp::Direction> = ramps.iter().filter(|(s, _)| (*s - centre).abs() <= mw).map(|x| x.1).collect();
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sky_types_from_the_clear_sky_index() {
        let clear = vec![0.95; 30];
        let overcast: Vec<f64> = (0..30).map(|i| 0.3 + 0.005 * (i % 2) as f64).collect();
        let variable: Vec<f64> = (0..30).map(|i| if i % 4 < 2 { 1.0 } else { 0.3 }).collect();
        assert_eq!(sky_type(&clear), "clear");
        assert_eq!(sky_type(&overcast), "overcast");
        assert_eq!(sky_type(&variable), "variable");
        assert_eq!(sky_type(&[0.9; 5]), "unknown");
    }
}
