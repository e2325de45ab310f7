//! Mergeable forecast statistics: per target (a block or `plant`) and horizon, the counts and sums
//! that the scores are made from, never the scores themselves.
//!
//! A day's replay gives one [`StatsTable`] (pairs added in the order of its `forecasts.csv`). Tables
//! of several days are added field by field ([`StatsTable::add`]), always starting from an empty
//! table and taking the days in sorted order, so a batch, its aggregate and a merge of shards of it
//! sum the same numbers in the same order and give bit-identical scores. Sums are written with the
//! shortest text that reads back to the same `f64` (`stats.csv`), so nothing is lost on disk.
//!
//! Scores from the sums ([`StatsTable::scores`]):
//! * RMSE `√(Σe²/n)`, MAE `Σ|e|/n`, MBE `Σe/n` with `e = forecast − observed`;
//! * the same for smart persistence on the same pairs, and skill `1 − RMSE/RMSE_persistence`
//!   (Coimbra, Kleissl & Marquez 2013; "not applicable", empty, at horizon 0 where persistence is
//!   the observation itself, or when persistence is exact);
//! * CRPS: mean of the per-pair ensemble CRPS (`verify::crps_ensemble`, plant only);
//! * P10–P90 coverage: share of observations inside the band, and the band's mean width.
//!
//! What a pair is (the observation, which rows count) is decided by the sources:
//! [`from_truth`] (a synthetic day's `truth/irradiance.csv`, with the selection of
//! [`crate::verify::score_forecasts`] and [`crate::verify::score_bands`]) and [`from_measured`]
//! (a measurements CSV, with the selection of [`crate::measured::evaluate_measured`]).

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use chrono::{DateTime, Utc};
use serde::Serialize;

use crate::io::{CsvTable, InputError};
use crate::verify::{Truth, crps_ensemble, read_rows};

/// The sums of one target at one horizon.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct Sums {
    /// Pairs (forecast, observed, persistence) scored.
    pub n: u64,
    /// Σ (forecast − observed) \[W/m²\].
    pub sum_err: f64,
    /// Σ (forecast − observed)² \[(W/m²)²\].
    pub sum_sq_err: f64,
    /// Σ |forecast − observed| \[W/m²\].
    pub sum_abs_err: f64,
    /// Σ observed \[W/m²\].
    pub sum_obs: f64,
    /// Σ (persistence − observed) \[W/m²\].
    pub pers_sum_err: f64,
    /// Σ (persistence − observed)² \[(W/m²)²\].
    pub pers_sum_sq_err: f64,
    /// Σ |persistence − observed| \[W/m²\].
    pub pers_sum_abs_err: f64,
    /// Observations with an ensemble.
    pub crps_n: u64,
    /// Σ CRPS \[W/m²\].
    pub crps_sum: f64,
    /// Observations with a P10–P90 band.
    pub band_n: u64,
    /// Observations inside the band.
    pub band_inside: u64,
    /// Σ (P90 − P10) \[W/m²\].
    pub band_width_sum: f64,
}

impl Sums {
    /// Add another's sums field by field.
    pub fn add(&mut self, o: &Sums) {
        self.n += o.n;
        self.sum_err += o.sum_err;
        self.sum_sq_err += o.sum_sq_err;
        self.sum_abs_err += o.sum_abs_err;
        self.sum_obs += o.sum_obs;
        self.pers_sum_err += o.pers_sum_err;
        self.pers_sum_sq_err += o.pers_sum_sq_err;
        self.pers_sum_abs_err += o.pers_sum_abs_err;
        self.crps_n += o.crps_n;
        self.crps_sum += o.crps_sum;
        self.band_n += o.band_n;
        self.band_inside += o.band_inside;
        self.band_width_sum += o.band_width_sum;
    }

    fn add_pair(&mut self, forecast: f64, observed: f64, persistence: f64) {
        let (e, p) = (forecast - observed, persistence - observed);
        self.n += 1;
        self.sum_err += e;
        self.sum_sq_err += e * e;
        self.sum_abs_err += e.abs();
        self.sum_obs += observed;
        self.pers_sum_err += p;
        self.pers_sum_sq_err += p * p;
        self.pers_sum_abs_err += p.abs();
    }

    fn add_band(&mut self, observed: f64, p10: f64, p90: f64) {
        self.band_n += 1;
        self.band_inside += u64::from(observed >= p10 && observed <= p90);
        self.band_width_sum += p90 - p10;
    }

    fn add_crps(&mut self, crps: f64) {
        if crps.is_finite() {
            self.crps_n += 1;
            self.crps_sum += crps;
        }
    }
}

/// The columns of `stats.csv`, in order.
pub const STATS_HEADER: &str = "target,horizon_s,n,sum_err,sum_sq_err,sum_abs_err,sum_obs,pers_sum_err,pers_sum_sq_err,pers_sum_abs_err,crps_n,crps_sum,band_n,band_inside,band_width_sum";

/// The columns of `scores.csv`, in order.
pub const SCORES_HEADER: &str = "target,horizon_s,n,rmse_wm2,mae_wm2,mbe_wm2,mean_observed_wm2,rmse_persistence_wm2,mae_persistence_wm2,mbe_persistence_wm2,skill,crps_n,crps_wm2,band_n,coverage_p10_p90,mean_band_width_wm2";

/// Sums per (target, horizon).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StatsTable {
    /// The sums, keyed by (target, horizon \[s\]).
    pub rows: BTreeMap<(String, u32), Sums>,
}

/// Scores of one target at one horizon, computed from its [`Sums`] only.
#[derive(Debug, Clone, Serialize)]
pub struct Score {
    /// Target: a block's name or `plant`.
    pub target: String,
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Pairs.
    pub n: u64,
    /// RMSE \[W/m²\].
    pub rmse_wm2: f64,
    /// MAE \[W/m²\].
    pub mae_wm2: f64,
    /// MBE, forecast − observed \[W/m²\].
    pub mbe_wm2: f64,
    /// Mean observation \[W/m²\].
    pub mean_observed_wm2: f64,
    /// Smart persistence's RMSE \[W/m²\].
    pub rmse_persistence_wm2: f64,
    /// Smart persistence's MAE \[W/m²\].
    pub mae_persistence_wm2: f64,
    /// Smart persistence's MBE \[W/m²\].
    pub mbe_persistence_wm2: f64,
    /// Skill against smart persistence; `None` (not applicable) at horizon 0 or when persistence
    /// is exact.
    pub skill: Option<f64>,
    /// Observations with an ensemble.
    pub crps_n: u64,
    /// Mean CRPS \[W/m²\] (`None` without an ensemble).
    pub crps_wm2: Option<f64>,
    /// Observations with a band.
    pub band_n: u64,
    /// Share inside P10–P90 (`None` without a band).
    pub coverage_p10_p90: Option<f64>,
    /// Mean P10–P90 width \[W/m²\] (`None` without a band).
    pub mean_band_width_wm2: Option<f64>,
}

/// Shortest text that reads back to the same `f64` (Rust's `Display` for floats).
fn exact(v: f64) -> String {
    format!("{v}")
}

fn opt(v: Option<f64>) -> String {
    v.map(exact).unwrap_or_default()
}

impl StatsTable {
    fn at(&mut self, target: &str, horizon_s: u32) -> &mut Sums {
        self.rows.entry((target.to_string(), horizon_s)).or_default()
    }

    /// Add another table field by field (`self + other`).
    pub fn add(&mut self, other: &StatsTable) {
        for (k, s) in &other.rows {
            self.rows.entry(k.clone()).or_default().add(s);
        }
    }

    /// The sum of tables, taken in the order given from an empty table.
    pub fn sum<'a>(tables: impl IntoIterator<Item = &'a StatsTable>) -> StatsTable {
        let mut t = StatsTable::default();
        for x in tables {
            t.add(x);
        }
        t
    }

    /// The table as `stats.csv` (every sum exact).
    pub fn to_csv(&self) -> Vec<u8> {
        self.to_csv_keyed("target")
    }

    /// The table as CSV with the first column named `key` (`sky_type` for [`SkyStats`]).
    pub fn to_csv_keyed(&self, key: &str) -> Vec<u8> {
        let mut t = CsvTable::with_header_line(&STATS_HEADER.replacen("target", key, 1));
        for ((target, h), s) in &self.rows {
            t.row([
                target.clone(),
                h.to_string(),
                s.n.to_string(),
                exact(s.sum_err),
                exact(s.sum_sq_err),
                exact(s.sum_abs_err),
                exact(s.sum_obs),
                exact(s.pers_sum_err),
                exact(s.pers_sum_sq_err),
                exact(s.pers_sum_abs_err),
                s.crps_n.to_string(),
                exact(s.crps_sum),
                s.band_n.to_string(),
                s.band_inside.to_string(),
                exact(s.band_width_sum),
            ]);
        }
        t.into_bytes()
    }

    /// Read a `stats.csv`.
    ///
    /// # Errors
    /// An unreadable file, a missing column or a value that is not a number, naming the line and
    /// column.
    pub fn read_csv(path: &Path) -> Result<StatsTable, InputError> {
        Self::read_csv_keyed(path, "target")
    }

    /// Read a table written by [`StatsTable::to_csv_keyed`] with the same `key`.
    ///
    /// # Errors
    /// As [`StatsTable::read_csv`].
    pub fn read_csv_keyed(path: &Path, key: &str) -> Result<StatsTable, InputError> {
        let expected = STATS_HEADER.replacen("target", key, 1);
        let mut rdr = csv::ReaderBuilder::new().from_path(path).map_err(|e| csv_err(path, &e))?;
        let header = rdr.headers().map_err(|e| csv_err(path, &e))?.clone();
        if header.iter().collect::<Vec<_>>().join(",") != expected {
            return Err(InputError::Csv { file: path.into(), line: 1, message: format!("expected the header {expected}") });
        }
        let mut t = StatsTable::default();
        for (i, r) in rdr.records().enumerate() {
            let r = r.map_err(|e| csv_err(path, &e))?;
            let line = r.position().map(|p| p.line()).unwrap_or(i as u64 + 2);
            let f = |k: usize| -> Result<f64, InputError> { field(path, line, &header, &r, k) };
            let c = |k: usize| -> Result<u64, InputError> { count(path, line, &header, &r, k) };
            let s = Sums {
                n: c(2)?,
                sum_err: f(3)?,
                sum_sq_err: f(4)?,
                sum_abs_err: f(5)?,
                sum_obs: f(6)?,
                pers_sum_err: f(7)?,
                pers_sum_sq_err: f(8)?,
                pers_sum_abs_err: f(9)?,
                crps_n: c(10)?,
                crps_sum: f(11)?,
                band_n: c(12)?,
                band_inside: c(13)?,
                band_width_sum: f(14)?,
            };
            t.rows.insert((r[0].to_string(), c(1)? as u32), s);
        }
        Ok(t)
    }

    /// The scores of every (target, horizon), from the sums alone.
    pub fn scores(&self) -> Vec<Score> {
        self.rows.iter().map(|((target, h), s)| score_of(target, *h, s)).collect()
    }

    /// The scores as `scores.csv` (every figure exact; empty where not applicable).
    pub fn scores_csv(&self) -> Vec<u8> {
        self.scores_csv_keyed("target")
    }

    /// The scores as CSV with the first column named `key`.
    pub fn scores_csv_keyed(&self, key: &str) -> Vec<u8> {
        let mut t = CsvTable::with_header_line(&SCORES_HEADER.replacen("target", key, 1));
        for s in self.scores() {
            t.row([
                s.target.clone(),
                s.horizon_s.to_string(),
                s.n.to_string(),
                exact(s.rmse_wm2),
                exact(s.mae_wm2),
                exact(s.mbe_wm2),
                exact(s.mean_observed_wm2),
                exact(s.rmse_persistence_wm2),
                exact(s.mae_persistence_wm2),
                exact(s.mbe_persistence_wm2),
                opt(s.skill),
                s.crps_n.to_string(),
                opt(s.crps_wm2),
                s.band_n.to_string(),
                opt(s.coverage_p10_p90),
                opt(s.mean_band_width_wm2),
            ]);
        }
        t.into_bytes()
    }
}

/// The scores of one set of sums (`target` and `h` only label them).
pub fn score_of(target: &str, h: u32, s: &Sums) -> Score {
    let n = s.n as f64;
    let rmse = (s.sum_sq_err / n).sqrt();
    let rmse_p = (s.pers_sum_sq_err / n).sqrt();
    let per = |count: u64, v: f64| (count > 0).then(|| v / count as f64);
    Score {
        target: target.to_string(),
        horizon_s: h,
        n: s.n,
        rmse_wm2: rmse,
        mae_wm2: s.sum_abs_err / n,
        mbe_wm2: s.sum_err / n,
        mean_observed_wm2: s.sum_obs / n,
        rmse_persistence_wm2: rmse_p,
        mae_persistence_wm2: s.pers_sum_abs_err / n,
        mbe_persistence_wm2: s.pers_sum_err / n,
        skill: (h > 0 && s.n > 0 && rmse_p > 1e-6).then(|| 1.0 - rmse / rmse_p),
        crps_n: s.crps_n,
        crps_wm2: per(s.crps_n, s.crps_sum),
        band_n: s.band_n,
        coverage_p10_p90: per(s.band_n, s.band_inside as f64),
        mean_band_width_wm2: per(s.band_n, s.band_width_sum),
    }
}

fn csv_err(path: &Path, e: &csv::Error) -> InputError {
    InputError::Csv { file: path.into(), line: e.position().map(|p| p.line()).unwrap_or(0), message: e.to_string() }
}

fn field(path: &Path, line: u64, header: &csv::StringRecord, r: &csv::StringRecord, k: usize) -> Result<f64, InputError> {
    let v = r.get(k).unwrap_or("");
    v.parse::<f64>().map_err(|_| InputError::Csv { file: path.into(), line, message: format!("column {}: expected a number, got {v:?}", header.get(k).unwrap_or("?")) })
}

fn count(path: &Path, line: u64, header: &csv::StringRecord, r: &csv::StringRecord, k: usize) -> Result<u64, InputError> {
    let v = r.get(k).unwrap_or("");
    v.parse::<u64>().map_err(|_| InputError::Csv { file: path.into(), line, message: format!("column {}: expected a whole number, got {v:?}", header.get(k).unwrap_or("?")) })
}

/// Smallest clear-sky GHI scored \[W/m²\] (as `verify` and `measured`).
const MIN_CLEAR_WM2: f64 = 50.0;

/// The plant's sums per sky type of the issue time (keyed by (sky type, horizon) in a
/// [`StatsTable`], written as `sky_stats.csv` with the first column `sky_type`), and the issue
/// times per sky type: the per-day classification of [`crate::measured`] (clear / variable /
/// overcast / unknown from the clear-sky index and its variability around each issue time), kept
/// as counts and sums so that days and shards add up exactly.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SkyStats {
    /// Sums of the plant's pairs, keyed by (sky type, horizon).
    pub table: StatsTable,
    /// Issue times per sky type (those with a plant pair at 5–15 min).
    pub issues: BTreeMap<String, u64>,
}

impl SkyStats {
    /// The sky type most issue times had (ties to the first name in order); `none` without any.
    pub fn dominant(issues: &BTreeMap<String, u64>) -> &str {
        issues.iter().filter(|(_, n)| **n > 0).fold(None, |best: Option<(&String, u64)>, (k, n)| if best.is_none_or(|b| *n > b.1) { Some((k, *n)) } else { best }).map_or("none", |b| b.0.as_str())
    }

    /// Pooled 5–15 min scores per sky type (horizons added in order), with its issue times.
    pub fn pooled(&self) -> Vec<(String, u64, Score)> {
        let mut by: BTreeMap<&str, Sums> = BTreeMap::new();
        for ((k, h), s) in &self.table.rows {
            if (300..=900).contains(h) {
                by.entry(k.as_str()).or_default().add(s);
            }
        }
        by.into_iter().map(|(k, s)| (k.to_string(), self.issues.get(k).copied().unwrap_or(0), score_of(k, 300, &s))).collect()
    }
}

/// The day's statistics and its sky-type statistics.
pub type DayStats = (StatsTable, SkyStats);

/// The statistics of a replay's outputs (`forecasts.csv`, `ensemble_plant.csv` in `replay_out`)
/// against a synthetic day's truth, for every target of the forecasts, with the plant's per sky
/// type (classed from the truth's plant clear-sky index). Pairs as in
/// [`crate::verify::score_forecasts`] (clear-sky GHI ≥ 50 W/m² at issue and target time, smart
/// persistence from the truth at the issue time); bands and CRPS as in
/// [`crate::verify::score_bands`] (clear-sky GHI ≥ 50 W/m² at the target time).
///
/// # Errors
/// Unreadable or malformed tables, naming the file and line.
pub fn from_truth(replay_out: &Path, truth: &Truth) -> Result<DayStats, InputError> {
    let fpath = replay_out.join("forecasts.csv");
    let mut t = StatsTable::default();
    let mut sky = SkyStats::default();
    let mut sky_of: BTreeMap<DateTime<Utc>, &'static str> = BTreeMap::new();
    let mut seen = std::collections::BTreeSet::new();
    let mut sky_at = |issue: DateTime<Utc>| *sky_of.entry(issue).or_insert_with(|| crate::measured::sky_type_around(issue, |x| truth.plant_kc_at(&x)));
    let plant = crate::plant::PLANT_TARGET;
    for (i, r) in read_rows(&fpath)?.iter().enumerate() {
        let line = i as u64 + 2;
        let Some(target) = r.get("block") else { continue };
        let issue = time_of(&fpath, line, r, "issue_time_utc")?;
        let tt = time_of(&fpath, line, r, "target_time_utc")?;
        let h = num_of(&fpath, line, r, "horizon_s")? as u32;
        let Some((obs, clear_t)) = truth.at(&tt, target) else { continue };
        if let (Some(lo), Some(hi)) = (opt_num(r, "ghi_p10_wm2"), opt_num(r, "ghi_p90_wm2"))
            && clear_t >= MIN_CLEAR_WM2
        {
            t.at(target, h).add_band(obs, lo, hi);
            if target == plant {
                sky.table.at(sky_at(issue), h).add_band(obs, lo, hi);
            }
        }
        let Some((obs_i, clear_i)) = truth.at(&issue, target) else { continue };
        if clear_t < MIN_CLEAR_WM2 || clear_i < MIN_CLEAR_WM2 {
            continue;
        }
        let f = num_of(&fpath, line, r, "ghi_wm2")?;
        t.at(target, h).add_pair(f, obs, obs_i / clear_i * clear_t);
        if target == plant {
            let k = sky_at(issue);
            sky.table.at(k, h).add_pair(f, obs, obs_i / clear_i * clear_t);
            if (300..=900).contains(&h) {
                seen.insert((k, issue));
            }
        }
    }
    for ((issue, h), ms) in members_of(replay_out)? {
        let tt = issue + chrono::Duration::seconds(i64::from(h));
        if let Some((obs, clear)) = truth.at(&tt, plant)
            && clear >= MIN_CLEAR_WM2
        {
            let c = crps_ensemble(&ms, obs);
            t.at(plant, h).add_crps(c);
            sky.table.at(sky_at(issue), h).add_crps(c);
        }
    }
    sky.issues = issue_counts(&seen);
    Ok((t, sky))
}

/// Issue times per sky type from the (sky type, issue) pairs seen.
fn issue_counts(seen: &std::collections::BTreeSet<(&str, DateTime<Utc>)>) -> BTreeMap<String, u64> {
    let mut out = BTreeMap::new();
    for (k, _) in seen {
        *out.entry(k.to_string()).or_default() += 1;
    }
    out
}

/// The statistics of a replay's outputs against a measurements CSV: the pairs
/// [`crate::measured::evaluate_measured`] scores (every target with pyranometers, every horizon
/// after 0), in the order of `forecasts.csv`, with the plant's per sky type as `evaluate` classes
/// them.
///
/// # Errors
/// Unreadable or malformed files.
pub fn from_measured(site: &crate::config::Site, replay_out: &Path, measurements: &Path) -> Result<DayStats, InputError> {
    let mut t = StatsTable::default();
    let mut sky = SkyStats::default();
    let sp = crate::measured::scored_pairs(site, replay_out, measurements)?;
    let classes = crate::measured::SkyClassifier::new(site, &sp);
    let mut seen = std::collections::BTreeSet::new();
    for p in &sp.pairs {
        let add = |s: &mut Sums| {
            s.add_pair(p.forecast, p.observed, p.persistence);
            if let (Some(lo), Some(hi)) = (p.p10, p.p90) {
                s.add_band(p.observed, lo, hi);
            }
            if let Some(c) = p.crps {
                s.add_crps(c);
            }
        };
        add(t.at(&p.target, p.horizon_s));
        if p.target == crate::plant::PLANT_TARGET {
            let k = classes.of(p.issue);
            add(sky.table.at(k, p.horizon_s));
            if (300..=900).contains(&p.horizon_s) {
                seen.insert((k, p.issue));
            }
        }
    }
    sky.issues = issue_counts(&seen);
    Ok((t, sky))
}

/// Ensemble members per (issue time, horizon \[s\]).
type Members = BTreeMap<(DateTime<Utc>, u32), Vec<f64>>;

/// The plant ensemble's members per (issue, horizon), in the order of `ensemble_plant.csv`
/// (sorted by key); empty when the replay wrote none.
fn members_of(replay_out: &Path) -> Result<Members, InputError> {
    let mp = replay_out.join("ensemble_plant.csv");
    let mut groups = Members::new();
    if !mp.is_file() {
        return Ok(groups);
    }
    for (i, r) in read_rows(&mp)?.iter().enumerate() {
        let line = i as u64 + 2;
        let t = time_of(&mp, line, r, "issue_time_utc")?;
        let h = num_of(&mp, line, r, "horizon_s")? as u32;
        groups.entry((t, h)).or_default().push(num_of(&mp, line, r, "plant_ghi_wm2")?);
    }
    Ok(groups)
}

fn opt_num(r: &HashMap<String, String>, k: &str) -> Option<f64> {
    r.get(k).and_then(|v| v.parse::<f64>().ok()).filter(|v| v.is_finite())
}

fn num_of(path: &Path, line: u64, r: &HashMap<String, String>, k: &str) -> Result<f64, InputError> {
    let v = r.get(k).ok_or_else(|| InputError::Csv { file: path.into(), line, message: format!("missing column {k}") })?;
    v.parse().map_err(|_| InputError::Csv { file: path.into(), line, message: format!("column {k}: expected a number, got {v:?}") })
}

fn time_of(path: &Path, line: u64, r: &HashMap<String, String>, k: &str) -> Result<DateTime<Utc>, InputError> {
    crate::io::parse_time(k, r.get(k).map(String::as_str).unwrap_or("")).map_err(|message| InputError::Csv { file: path.into(), line, message })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn table(pairs: &[(f64, f64, f64)]) -> StatsTable {
        let mut t = StatsTable::default();
        for &(f, o, p) in pairs {
            t.at("plant", 300).add_pair(f, o, p);
        }
        t
    }

    #[test]
    fn scores_by_hand() {
        // Errors 10 and −20: RMSE √((100 + 400)/2) = √250, MAE 15, MBE −5; persistence errors
        // 20 and 20: RMSE 20, skill 1 − √250/20.
        let t = table(&[(110.0, 100.0, 120.0), (180.0, 200.0, 220.0)]);
        let s = &t.scores()[0];
        assert_eq!(s.rmse_wm2, 250f64.sqrt());
        assert_eq!((s.mae_wm2, s.mbe_wm2, s.mean_observed_wm2), (15.0, -5.0, 150.0));
        assert_eq!(s.skill, Some(1.0 - 250f64.sqrt() / 20.0));
        assert_eq!(s.crps_wm2, None);
    }

    #[test]
    fn csv_round_trip_is_exact() {
        let mut t = table(&[(0.1, 0.2, 0.3), (1.0 / 3.0, 2.0 / 7.0, 1e-300)]);
        t.at("b1", 0).add_band(5.0, 1.0, 9.0);
        t.at("plant", 300).add_crps(0.1 + 0.2);
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("stats.csv");
        std::fs::write(&p, t.to_csv()).unwrap();
        assert_eq!(StatsTable::read_csv(&p).unwrap(), t);
        assert_eq!(t.scores()[0].skill, None, "horizon 0 has no skill");
    }

    #[test]
    fn bad_stats_name_line_and_column() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("stats.csv");
        std::fs::write(&p, format!("{STATS_HEADER}\nplant,300,x,0,0,0,0,0,0,0,0,0,0,0,0\n")).unwrap();
        let e = StatsTable::read_csv(&p).unwrap_err().to_string();
        assert!(e.contains("line 2") && e.contains("column n"), "{e}");
    }
}
