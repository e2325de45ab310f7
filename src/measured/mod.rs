//! Scores of a replay against measurements: the forecasts in `forecasts.csv` (and the ensemble in
//! `ensemble_plant.csv`) against pyranometer readings, where no synthetic truth exists.
//!
//! # What is compared
//! * **Plant:** the forecast plant-mean GHI against the mean of the site's pyranometers
//!   (`ghi_<name>_wm2` columns) valid at the target time; without any of them, a plain `ghi`
//!   column (one station, as BSRN and other networks write it) stands for them.
//! * **Blocks:** each block's forecast against the pyranometers inside its footprint (blocks
//!   without one are not scored).
//! * A reading is the row whose averaging period contains the target time (1-minute means stamped
//!   at the start of their minute, or as `[measurements] time_label` says: [`crate::io::TimeLabel`]). It is left out, and counted by reason, when it was flagged by the
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
//! With plant power in the measurements (`power_plant_kw` from the plant meter, `power_<block>_kw`
//! from block meters), the forecast's AC power is scored the same way against it, with smart
//! persistence of power through the clear-sky power ([`power`]).
//!
//! # Ramps
//! Under `[evaluation.ramps]` ([`EvalRampParams`]), in one quantity on both sides: plant AC power
//! when the plant's power is measured, else GHI ([`ramps`]); POD, FAR and CSI per lead over issue
//! times ([`MeasuredRampScore`]).
//!
//! # Sky types
//! Each issue time is classed from the measured plant clear-sky index `kc` — GHI over clear-sky
//! GHI of the pyranometers' mean, or without pyranometers the measured plant power over the
//! clear-sky power — over the 30 minutes from 10 minutes before the issue time to 20 after it (the
//! forecast's own 20 minutes and the 10 before; [`SKY_WINDOW_MIN`]), from its mean and the standard
//! deviation of its 1-minute changes `σΔkc`, the variability measure of Hoff & Perez ("Quantifying
//! PV power output variability", *Solar Energy* 84:1782, 2010; from memory): **clear** when mean
//! `kc ≥ 0.8` and `σΔkc ≤ 0.03`, **overcast** when mean `kc ≤ 0.5` and `σΔkc ≤ 0.03`,
//! **variable** otherwise (thresholds own choice); **unknown** with fewer than 10 readings. Each
//! class is scored on its own (pooled over 5–15 min). Batches sum the same classes per day
//! ([`crate::stats::SkyStats`]).

pub mod power;
pub mod ramps;

pub use ramps::{EvalRampParams, EvaluationSection, MAX_RAMP_LEADS, MeasuredRamp, MeasuredRampScore, RampBasis, find_series_ramps, measured_ramps, ramp_contingency};

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use chrono::{DateTime, Utc};
use serde::Serialize;

use crate::config::Site;
use crate::io::{InputError, Measurements};
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
    /// The quantity the ramps were found in, on both sides.
    pub ramp_quantity: Quantity,
    /// Ramp POD, FAR and CSI per lead time.
    pub ramps: Vec<MeasuredRampScore>,
    /// What the sky types were classed from: `ghi` (the pyranometers) or `power` (the plant meter).
    pub sky_index: Quantity,
    /// The forecast's AC power against the plant's meters (when the measurements hold power).
    pub power: Option<power::PowerEvaluation>,
}

/// The quantity a comparison is made in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Quantity {
    /// Plant-mean GHI: the forecast's `plant` row against the pyranometers' mean \[W/m²\].
    Ghi,
    /// Plant AC power: the forecast's `power_kw` against the plant meter \[kW\].
    Power,
}

impl Quantity {
    /// The forecast's column in `forecasts.csv`.
    pub fn forecast_column(self) -> &'static str {
        match self {
            Quantity::Ghi => "ghi_wm2",
            Quantity::Power => "power_kw",
        }
    }

    /// The members' column in `ensemble_plant.csv`.
    pub fn member_column(self) -> &'static str {
        match self {
            Quantity::Ghi => "plant_ghi_wm2",
            Quantity::Power => "plant_power_kw",
        }
    }

    /// In words, for reports.
    pub fn describe(self) -> &'static str {
        match self {
            Quantity::Ghi => "plant-mean GHI (the pyranometers' mean)",
            Quantity::Power => "plant AC power (the plant's meter)",
        }
    }
}

/// A scored plant pair: forecast, measured, smart persistence, CRPS, inside P10–P90 (1 or 0).
pub(crate) type Pair = (f64, f64, f64, f64, f64);

/// Smallest clear-sky GHI scored \[W/m²\].
pub(crate) const MIN_CLEAR_WM2: f64 = 50.0;

/// The sky-type window: minutes before the issue time and after it.
pub const SKY_WINDOW_MIN: (i64, i64) = (10, 20);

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

pub(crate) fn pooled(pairs: &[(f64, f64, f64)]) -> Pooled {
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
    rows: Vec<HashMap<String, String>>,
    clear_at_issue: HashMap<(String, DateTime<Utc>), f64>,
    meters: power::Meters,
    plant: crate::plant::Plant,
}

/// Score a replay's forecasts against a measurements CSV for a site.
///
/// # Errors
/// Unreadable or malformed files, a measurements file without any of the site's pyranometers and
/// without plant power.
pub fn evaluate_measured(site: &Site, replay_out: &Path, measurements: &Path) -> Result<MeasuredEvaluation, InputError> {
    let sp = scored_pairs(site, replay_out, measurements)?;
    if sp.plant_columns.is_empty() && !sp.meters.any() {
        return Err(InputError::Other {
            file: measurements.into(),
            message: format!(
                "nothing to score against: expected a pyranometer column ghi_<name>_wm2 (for {}), a station's ghi column, or plant power ({})",
                site.file.pyranometers.iter().map(|p| p.name.as_str()).collect::<Vec<_>>().join(", "),
                power::expected_columns(&sp.plant)
            ),
        });
    }
    let m = &sp.measurements;
    let sky = SkyClassifier::new(site, &sp);
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
                by_sky.entry(sky.of(p.issue).to_string()).or_default().push((p.forecast, p.observed, p.persistence));
            }
        } else if (300..=900).contains(&h) {
            by_block.entry(p.target.clone()).or_default().push((p.forecast, p.observed, p.persistence));
        }
    }
    let clear_power = power::ClearPower::new(site, &sp.plant, m);
    let power = sp.meters.any().then(|| {
        let members = members_of(replay_out, Quantity::Power)?;
        Ok::<_, InputError>(power::evaluate_power(&power::PowerInputs { meters: &sp.meters, m, clear: &clear_power, clear_ghi_at_issue: &sp.clear_at_issue, members: &members, sky_of: &|t| sky.of(t) }, &sp.rows))
    }).transpose()?;
    let clear = ClearSky::new(site);
    let quantity = if sp.meters.has_plant() { Quantity::Power } else { Quantity::Ghi };
    let ramps = if quantity == Quantity::Ghi && sp.plant_columns.is_empty() {
        vec![]
    } else {
        let ghi_at = |t: DateTime<Utc>| mean_reading(m, &sp.plant_columns, &t, &mut BTreeMap::new()).unwrap_or(f64::NAN);
        let power_at = |t: DateTime<Utc>| power::measured_plant_at(&sp.meters, m, t);
        let ghi_basis = |t: DateTime<Utc>| clear.ghi_basis(t);
        let power_basis = |t: DateTime<Utc>| clear.ghi_basis(t).map(|_| clear_power.at(crate::plant::PLANT_TARGET, &t));
        let inp = match quantity {
            Quantity::Ghi => ramps::RampInputs { quantity, m, measured_at: &ghi_at, basis_at: &ghi_basis, capacity: ramps::GHI_CAPACITY_WM2 },
            Quantity::Power => ramps::RampInputs { quantity, m, measured_at: &power_at, basis_at: &power_basis, capacity: sp.meters.plant_ac_kw },
        };
        ramps::ramp_scores(&site.file.evaluation.ramps, &inp, &sp.rows, replay_out, &sp.issues)?
    };
    let mut screened = sp.screened.clone();
    screened.extend(sp.meters.screened.clone());
    Ok(MeasuredEvaluation {
        plant: horizon_scores(per_h),
        by_sky_type: by_sky.iter().map(|(k, v)| (k.clone(), pooled(v))).collect(),
        issues_by_sky_type: sky.counts().into_iter().map(|(k, v)| (k, v as usize)).collect(),
        by_block: by_block.iter().map(|(k, v)| (k.clone(), pooled(v))).collect(),
        excluded: sp.excluded.clone(),
        screened,
        ramp_definition: site.file.evaluation.ramps.clone(),
        ramp_quantity: quantity,
        ramps,
        sky_index: sky.index,
        power,
    })
}

/// The site's clear-sky GHI at a time.
pub(crate) struct ClearSky {
    observer: crate::sun::Observer,
    altitude_m: f64,
    model: crate::clearsky::ClearSkyModel,
}

impl ClearSky {
    pub fn new(site: &Site) -> ClearSky {
        let f = &site.file.site;
        ClearSky { observer: f.observer(), altitude_m: f.elevation_m, model: f.clear_sky() }
    }

    /// Clear-sky GHI at `t` \[W/m²\] (NaN outside the solar position algorithm's range).
    pub fn ghi(&self, t: DateTime<Utc>) -> f64 {
        crate::sun::position(&t, &self.observer).map(|sp| crate::clearsky::clear_sky(&sp, self.altitude_m, self.model).ghi_wm2).unwrap_or(f64::NAN)
    }

    /// Clear-sky GHI at `t` when it is at least 50 W/m² (else the sun is too low to judge).
    pub fn ghi_basis(&self, t: DateTime<Utc>) -> Option<f64> {
        Some(self.ghi(t)).filter(|c| *c >= MIN_CLEAR_WM2)
    }
}

/// The sky type of issue times from the measurements (module documentation), cached.
pub struct SkyClassifier<'a> {
    /// What the clear-sky index is made from.
    pub index: Quantity,
    sp: &'a ScoredPairs,
    clear: ClearSky,
    clear_power: power::ClearPower<'a>,
    cache: std::cell::RefCell<BTreeMap<DateTime<Utc>, &'static str>>,
}

impl<'a> SkyClassifier<'a> {
    /// A classifier over the pairs' measurements: from the pyranometers when there are any, else
    /// from the plant's power.
    pub fn new(site: &'a Site, sp: &'a ScoredPairs) -> SkyClassifier<'a> {
        let index = if sp.plant_columns.is_empty() && sp.meters.has_plant() { Quantity::Power } else { Quantity::Ghi };
        SkyClassifier { index, sp, clear: ClearSky::new(site), clear_power: power::ClearPower::new(site, &sp.plant, &sp.measurements), cache: Default::default() }
    }

    fn kc_at(&self, t: DateTime<Utc>) -> f64 {
        let Some(clear) = self.clear.ghi_basis(t) else { return f64::NAN };
        let m = &self.sp.measurements;
        match self.index {
            Quantity::Ghi => mean_reading(m, &self.sp.plant_columns, &t, &mut BTreeMap::new()).map(|v| v / clear).unwrap_or(f64::NAN),
            Quantity::Power => {
                let c = self.clear_power.at(crate::plant::PLANT_TARGET, &t);
                if c > 0.0 { power::measured_plant_at(&self.sp.meters, m, t) / c } else { f64::NAN }
            }
        }
    }

    /// The sky type of an issue time.
    pub fn of(&self, issue: DateTime<Utc>) -> &'static str {
        if let Some(s) = self.cache.borrow().get(&issue) {
            return s;
        }
        let s = sky_type_around(issue, |t| self.kc_at(t));
        self.cache.borrow_mut().insert(issue, s);
        s
    }

    /// Issue times classed so far, per sky type.
    pub fn counts(&self) -> BTreeMap<String, u64> {
        let mut out = BTreeMap::new();
        for s in self.cache.borrow().values() {
            *out.entry(s.to_string()).or_default() += 1;
        }
        out
    }
}

/// The sky type of an issue time from the clear-sky index `kc_at` at 1-minute steps over
/// [`SKY_WINDOW_MIN`] around it (from 10 minutes before to 20 after, 30 values).
pub fn sky_type_around(issue: DateTime<Utc>, kc_at: impl Fn(DateTime<Utc>) -> f64) -> &'static str {
    let kc: Vec<f64> = (-SKY_WINDOW_MIN.0..SKY_WINDOW_MIN.1).map(|k| kc_at(issue + chrono::Duration::minutes(k))).collect();
    sky_type(&kc)
}

/// The pyranometers' mean GHI at each row of a measurements CSV (the valid readings only: as for
/// the scores, flagged, missing and stuck readings are left out; NaN where none is left; empty
/// without pyranometers).
///
/// # Errors
/// As [`evaluate_measured`].
pub fn measured_mean_ghi(site: &Site, measurements: &Path) -> Result<Vec<(DateTime<Utc>, f64)>, InputError> {
    let f = &site.file.site;
    let mut m = Measurements::read_csv(measurements)?;
    m.label_at_start(site.file.measurements.time_label, None);
    m.screen(measurements, &f.observer(), f.clear_sky(), f.elevation_m)?;
    let cols: Vec<usize> = pyranometer_columns(site, &m).iter().map(|c| c.0).collect();
    if cols.is_empty() {
        return Ok(vec![]);
    }
    let mut none = BTreeMap::new();
    Ok(m.times.iter().map(|t| (*t, mean_reading(&m, &cols, t, &mut none).unwrap_or(f64::NAN))).collect())
}

/// The pairs a replay's forecasts make with a measurements CSV (see the module documentation for
/// which readings count), in the order of `forecasts.csv`.
///
/// # Errors
/// Unreadable or malformed files.
pub fn scored_pairs(site: &Site, replay_out: &Path, measurements: &Path) -> Result<ScoredPairs, InputError> {
    let f = &site.file.site;
    let mut m = Measurements::read_csv(measurements)?;
    m.label_at_start(site.file.measurements.time_label, None);
    let screen = m.screen(measurements, &f.observer(), f.clear_sky(), f.elevation_m)?;
    let plant = crate::plant::Plant::from_section(&site.file.plant);
    let meters = power::Meters::find(site, &plant, &mut m);
    let cols = pyranometer_columns(site, &m);
    let mut excluded: BTreeMap<String, usize> = BTreeMap::new();
    let all: Vec<usize> = cols.iter().map(|c| c.0).collect();
    let rows = read_rows(&replay_out.join("forecasts.csv"))?;
    let clear_at_issue = clear_at_issue(&rows);
    let members = members_of(replay_out, Quantity::Ghi)?;
    let mut issues: Vec<DateTime<Utc>> = rows.iter().filter_map(|r| r.get("issue_time_utc").and_then(|v| v.parse::<DateTime<Utc>>().ok())).collect();
    issues.sort();
    issues.dedup();
    let mut pairs = vec![];
    for r in &rows {
        if let Some(p) = pair_of(r, &m, &cols, &all, &clear_at_issue, &members, &mut excluded) {
            pairs.push(p);
        }
    }
    Ok(ScoredPairs { pairs, excluded, screened: screen.counts(), measurements: m, plant_columns: all, issues, rows, clear_at_issue, meters, plant })
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

/// Each configured pyranometer's column in the measurements and the block it lies in. A file with
/// none of the site's `ghi_<name>_wm2` columns but a plain `ghi` column (as station networks such as
/// BSRN write it) has that one station, for the plant only. Empty when neither is there.
fn pyranometer_columns(site: &Site, m: &Measurements) -> Vec<(usize, Option<String>)> {
    let named: Vec<(usize, Option<String>)> = site
        .file
        .pyranometers
        .iter()
        .filter_map(|p| {
            let c = m.column(&format!("ghi_{}_wm2", p.name))?;
            let block = site.file.plant.blocks.iter().find(|b| crate::plant::point_in_polygon(p.position_m, &b.polygon_m)).map(|b| b.name.clone());
            Some((c, block))
        })
        .collect();
    if named.is_empty() { m.column("ghi").map(|c| vec![(c, None)]).unwrap_or_default() } else { named }
}

/// Mean of the valid readings at `t` over some columns; a missing, flagged or stuck reading is
/// left out and counted in `why`.
pub(crate) fn mean_reading(m: &Measurements, cs: &[usize], t: &DateTime<Utc>, why: &mut BTreeMap<String, usize>) -> Option<f64> {
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

/// Clear-sky GHI at issue time per (target, issue) from the horizon-0 rows.
fn clear_at_issue(rows: &[HashMap<String, String>]) -> HashMap<(String, DateTime<Utc>), f64> {
    let num = |r: &HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    let time = |r: &HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<DateTime<Utc>>().ok());
    let mut out = HashMap::new();
    for r in rows {
        if num(r, "horizon_s") == 0.0
            && let (Some(t), Some(b)) = (time(r, "issue_time_utc"), r.get("block"))
        {
            out.insert((b.clone(), t), num(r, "ghi_clear_wm2"));
        }
    }
    out
}

/// Ensemble members' values per (issue time, horizon \[s\]).
pub(crate) type Members = HashMap<(DateTime<Utc>, u32), Vec<f64>>;

/// The plant ensemble's members per (issue, horizon) in a quantity, from `ensemble_plant.csv`
/// when the replay wrote it with that quantity's column (empty otherwise).
///
/// # Errors
/// An unreadable or malformed file.
pub(crate) fn members_of(replay_out: &Path, q: Quantity) -> Result<Members, InputError> {
    let mut members = Members::new();
    let mp = replay_out.join("ensemble_plant.csv");
    if mp.is_file() {
        for r in read_rows(&mp)? {
            let Some(v) = r.get(q.member_column()).and_then(|v| v.parse::<f64>().ok()) else { continue };
            if let (Some(t), Some(h)) = (r.get("issue_time_utc").and_then(|v| v.parse::<DateTime<Utc>>().ok()), r.get("horizon_s").and_then(|v| v.parse::<f64>().ok())) {
                members.entry((t, h as u32)).or_default().push(v);
            }
        }
    }
    Ok(members)
}

/// The plant's scores per horizon from its (forecast, measured, persistence, CRPS, inside) pairs.
pub(crate) fn horizon_scores(per_h: BTreeMap<u32, Vec<Pair>>) -> Vec<MeasuredHorizon> {
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
    if !e.plant.is_empty() {
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
    }
    crate::say!("by sky type (issue times, classed from the {}; GHI pooled 5–15 min):", e.sky_index.describe());
    for (k, n) in &e.issues_by_sky_type {
        match e.by_sky_type.get(k) {
            Some(p) => crate::say!("  {k:<9} {n:>4} issues, n {:>5}, RMSE {:.1} vs persistence {:.1}, skill {}, MBE {:.1}", p.n, p.rmse_wm2, p.rmse_persistence_wm2, fmt_score(p.skill, 2), p.mbe_wm2),
            None => crate::say!("  {k:<9} {n:>4} issues"),
        }
    }
    if !e.by_block.is_empty() {
        crate::say!("by block (its own pyranometers; pooled 5–15 min):");
        for (k, p) in &e.by_block {
            crate::say!("  {k:<12} n {:>5}, RMSE {:.1} vs persistence {:.1}, skill {}, MBE {:.1}", p.n, p.rmse_wm2, p.rmse_persistence_wm2, fmt_score(p.skill, 2), p.mbe_wm2);
        }
    }
    if let Some(pw) = &e.power {
        power::print_power(pw);
    }
    if !e.ramps.is_empty() {
        crate::say!("ramps of the {} ({}):", e.ramp_quantity.describe(), ramps::describe_definition(&e.ramp_definition, e.ramp_quantity));
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
    let excl: Vec<String> = e.excluded.iter().map(|(k, n)| format!("{k}: {n}")).collect();
    crate::say!("left out: {}", if excl.is_empty() { "none".to_string() } else { excl.join("; ") });
    let scr: Vec<String> = e.screened.iter().map(|(k, n)| format!("{k}: {n}")).collect();
    crate::say!("screened measurements: {}", if scr.is_empty() { "nothing flagged".to_string() } else { scr.join("; ") });
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

    /// The window runs from 10 minutes before the issue time to 20 after: a drop at +19 min is in
    /// it, one at +20 min is not.
    #[test]
    fn sky_window_around_the_issue() {
        let issue: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let drop_at = |k: i64| move |t: DateTime<Utc>| if t >= issue + chrono::Duration::minutes(k) { 0.3 } else { 0.95 };
        assert_eq!(sky_type_around(issue, drop_at(19)), "variable");
        assert_eq!(sky_type_around(issue, drop_at(20)), "clear");
        assert_eq!(sky_type_around(issue, drop_at(-10)), "overcast");
    }
}
