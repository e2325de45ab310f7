//! Aggregates of batch days, and the merge of shard outputs into one aggregate.
//!
//! An aggregate is made from the days' `stats.csv` only ([`crate::stats`]): the days are taken in
//! sorted order and their sums added to an empty table, and every score is computed from the
//! summed table. A batch's own aggregate and a merge of its shards therefore add the same numbers
//! in the same order, and their `stats.csv` and `scores.csv` are identical byte for byte.
//!
//! Folder (`OUT/aggregate/` of a batch, or `merge --out`): `stats.csv`, `scores.csv`,
//! `scores.json`, `days.csv` (every day with its frames, data range, reference, issue times per
//! sky type and the sky type most of them had), `sky_stats.csv` and `sky_scores.csv` (the plant's
//! sums and scores per sky type, the days' sums added in order), `report.html`
//! (plots and tables from the summed and the days' statistics only,
//! [`crate::report::aggregate_report`], so it too is the same byte for byte) and `run.json`
//! ([`RunMeta`]), committed as one set.
//!
//! `merge` refuses shard folders made with different site configurations (SHA-256 of the site
//! file and the files it refers to) or holding the same day, naming both folders, and any day that is not complete.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use chrono::Utc;
use serde::{Deserialize, Serialize};

use crate::io::{CsvTable, InputError, fmt_time};
use crate::output_set::{OutputSet, OutputSetError};
use crate::report::ReportDay;
use crate::stats::{Score, SkyStats, StatsTable};

/// The marker a completed day's folder holds, written last.
pub const COMPLETE: &str = "complete.json";
/// The run metadata every output folder holds.
pub const RUN_META: &str = "run.json";
/// The plant's sums per sky type, in a day and in an aggregate.
pub const SKY_STATS: &str = "sky_stats.csv";

/// An error of a merge, a shard specification, a completed day or an aggregate.
#[derive(Debug, thiserror::Error)]
pub enum MergeError {
    /// An input file or folder is bad.
    #[error(transparent)]
    Input(#[from] InputError),
    /// An output folder is in use or could not be written.
    #[error(transparent)]
    Output(#[from] OutputSetError),
    /// The `--shard` argument is malformed.
    #[error("--shard {spec:?}: {message}")]
    Shard {
        /// As given.
        spec: String,
        /// What is wrong.
        message: String,
    },
    /// A day already in the output folder was made with another site configuration.
    #[error("{folder}: this day was completed with site configuration {found} (SHA-256), this run's is {expected}; use another output folder, or remove the day to redo it")]
    ConfigChanged {
        /// The day's output folder.
        folder: PathBuf,
        /// This run's digest.
        expected: String,
        /// The day's digest.
        found: String,
    },
    /// Shards to merge were made with different site configurations.
    #[error("cannot merge {a} (site configuration {digest_a}) with {b} (site configuration {digest_b}): the site configurations differ")]
    DigestMismatch {
        /// One shard folder.
        a: PathBuf,
        /// Its digest.
        digest_a: String,
        /// The other shard folder.
        b: PathBuf,
        /// Its digest.
        digest_b: String,
    },
    /// Shards to merge share a day.
    #[error("cannot merge: day {day} is in both {a} and {b}")]
    Overlap {
        /// The day.
        day: String,
        /// One shard folder.
        a: PathBuf,
        /// The other.
        b: PathBuf,
    },
}

/// Which part of the day list a run takes: the days with index `i mod count == index`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Shard {
    /// K, 0-based.
    pub index: usize,
    /// N.
    pub count: usize,
}

impl std::fmt::Display for Shard {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.index, self.count)
    }
}

/// Most shards.
pub const MAX_SHARDS: usize = 100_000;

/// Parse `K/N` (K 0-based: `0 ≤ K < N`, `1 ≤ N ≤ 100000`).
///
/// # Errors
/// A clear message for anything else.
pub fn parse_shard(spec: &str) -> Result<Shard, MergeError> {
    let bad = |message: String| MergeError::Shard { spec: spec.to_string(), message };
    let (k, n) = spec.split_once('/').ok_or_else(|| bad("expected K/N, e.g. 0/4 (K is 0-based: 0 … N−1)".into()))?;
    let k: usize = k.trim().parse().map_err(|_| bad(format!("K: expected a whole number ≥ 0, got {k:?}")))?;
    let n: usize = n.trim().parse().map_err(|_| bad(format!("N: expected a whole number ≥ 1, got {n:?}")))?;
    if n == 0 || n > MAX_SHARDS {
        return Err(bad(format!("N: expected 1 to {MAX_SHARDS}, got {n}")));
    }
    if k >= n {
        return Err(bad(format!("K must be below N (K is 0-based: 0 … {}), got K = {k}", n - 1)));
    }
    Ok(Shard { index: k, count: n })
}

/// The metadata every output folder of a batch or merge carries (`run.json`).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct RunMeta {
    /// `day`, `aggregate` or `merge`.
    pub kind: String,
    /// The nephocast version that wrote it.
    pub nephocast_version: String,
    /// SHA-256 of the configuration: the site file and the files it refers to ([`crate::batch::config_digest`]).
    pub config_sha256: String,
    /// The site file.
    pub site_file: String,
    /// First frame time of the data (UTC).
    pub first_frame_utc: Option<String>,
    /// Last frame time of the data (UTC).
    pub last_frame_utc: Option<String>,
    /// When the run started (UTC).
    pub run_start_utc: String,
    /// When the run ended (UTC; the folder is committed right after).
    pub run_end_utc: String,
    /// The shard, `K/N` with K 0-based, if the run was one.
    pub shard: Option<String>,
    /// What the forecasts were scored against: `truth`, `measurements` or `none` (per day; the
    /// kinds present, for an aggregate).
    pub reference: String,
    /// The days it covers, sorted.
    pub days: Vec<String>,
    /// For a merge: the shard folders merged, as given.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub merged_from: Vec<String>,
}

/// A completed day (`complete.json`, written last into the day's folder).
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct DayRecord {
    /// The day's name.
    pub day: String,
    /// SHA-256 of the configuration: the site file and the files it refers to ([`crate::batch::config_digest`]).
    pub config_sha256: String,
    /// Frames found.
    pub frames: usize,
    /// Frames used by the engine.
    pub frames_used: usize,
    /// First frame time (UTC).
    pub first_frame_utc: String,
    /// Last frame time (UTC).
    pub last_frame_utc: String,
    /// `truth`, `measurements` or `none`.
    pub reference: String,
    /// Issue times per sky type (clear, variable, overcast, unknown; those with a plant pair at
    /// 5–15 min). Absent in days written before sky types were kept: none.
    #[serde(default)]
    pub sky_issues: BTreeMap<String, u64>,
}

/// Read a day's `complete.json`, if the folder has one that parses.
pub fn read_record(day_out: &Path) -> Option<DayRecord> {
    let text = std::fs::read_to_string(day_out.join(COMPLETE)).ok()?;
    serde_json::from_str(&text).ok()
}

/// Where a day's outputs go.
pub fn day_out(out: &Path, day: &str) -> PathBuf {
    out.join("days").join(day)
}

/// Pretty JSON bytes (with a final line break) of a value that always serializes.
pub fn json<T: Serialize>(v: &T) -> Vec<u8> {
    let mut s = serde_json::to_string_pretty(v).unwrap_or_default();
    s.push('\n');
    s.into_bytes()
}

/// Print the plant's scores per horizon (whole minutes).
pub fn print_plant_scores(scores: &[crate::stats::Score]) {
    let f = |v: Option<f64>, k: usize| v.map(|x| format!("{x:.k$}")).unwrap_or_else(|| "n/a".into());
    crate::say!("plant   horizon      n   RMSE    MAE    MBE  skill   CRPS  P10–P90");
    for s in scores.iter().filter(|s| s.target == crate::plant::PLANT_TARGET && s.horizon_s % 300 == 0) {
        crate::say!("{:>12} min {:>6} {:>6.1} {:>6.1} {:>6.1} {:>6} {:>6} {:>8}", s.horizon_s / 60, s.n, s.rmse_wm2, s.mae_wm2, s.mbe_wm2, f(s.skill, 3), f(s.crps_wm2, 1), f(s.coverage_p10_p90, 2));
    }
}

/// Sum the days in `day_folders` (taken in the order given: sorted by day) into an aggregate
/// folder `agg`, with `meta` completed by the data range, reference and end time. Returns the
/// aggregate's scores.
///
/// # Errors
/// A day folder that is not complete, does not match its manifest, was made with another
/// configuration than `meta`'s, or whose `stats.csv` is malformed; write failures.
pub fn write_aggregate(agg: &Path, day_folders: &[PathBuf], mut meta: RunMeta) -> Result<Vec<Score>, MergeError> {
    let mut tables = Vec::with_capacity(day_folders.len());
    let mut records = Vec::with_capacity(day_folders.len());
    let mut sky = SkyStats::default();
    for dir in day_folders {
        let record = complete_day(dir, &meta.config_sha256)?;
        tables.push(StatsTable::read_csv(&dir.join("stats.csv"))?);
        // A day written before sky types were kept has none.
        let sp = dir.join(SKY_STATS);
        if sp.is_file() {
            sky.table.add(&StatsTable::read_csv_keyed(&sp, "sky_type")?);
        }
        for (k, n) in &record.sky_issues {
            *sky.issues.entry(k.clone()).or_default() += n;
        }
        records.push(record);
    }
    let total = StatsTable::sum(&tables);
    let mut days = CsvTable::with_header_line("day,frames,frames_used,first_frame_utc,last_frame_utc,reference,issues_clear,issues_variable,issues_overcast,issues_unknown,sky_type");
    for r in &records {
        let n = |k: &str| r.sky_issues.get(k).copied().unwrap_or(0).to_string();
        days.row([
            r.day.clone(),
            r.frames.to_string(),
            r.frames_used.to_string(),
            r.first_frame_utc.clone(),
            r.last_frame_utc.clone(),
            r.reference.clone(),
            n("clear"),
            n("variable"),
            n("overcast"),
            n("unknown"),
            SkyStats::dominant(&r.sky_issues).to_string(),
        ]);
    }
    // Times are written in one fixed format, so their text sorts as the times do.
    meta.first_frame_utc = records.iter().map(|r| r.first_frame_utc.clone()).min();
    meta.last_frame_utc = records.iter().map(|r| r.last_frame_utc.clone()).max();
    let mut refs: Vec<&str> = records.iter().map(|r| r.reference.as_str()).collect();
    refs.sort_unstable();
    refs.dedup();
    meta.reference = refs.join("+");
    meta.days = records.iter().map(|r| r.day.clone()).collect();
    let scores = total.scores();
    let mut set = OutputSet::begin(agg, "nephocast batch aggregate")?;
    set.write("stats.csv", &total.to_csv())?;
    set.write("scores.csv", &total.scores_csv())?;
    set.write("scores.json", &json(&scores))?;
    set.write("days.csv", &days.into_bytes())?;
    set.write(SKY_STATS, &sky.table.to_csv_keyed("sky_type"))?;
    set.write("sky_scores.csv", &sky.table.scores_csv_keyed("sky_type"))?;
    let report_days: Vec<ReportDay<'_>> = records
        .iter()
        .zip(&tables)
        .map(|(r, t)| ReportDay { name: &r.day, frames: r.frames, frames_used: r.frames_used, reference: &r.reference, stats: t, sky_type: SkyStats::dominant(&r.sky_issues) })
        .collect();
    let title = format!("nephocast: aggregate of {} day{}", records.len(), if records.len() == 1 { "" } else { "s" });
    set.write("report.html", crate::report::aggregate_report(&title, &total, &sky, &report_days).as_bytes())?;
    meta.run_end_utc = fmt_time(&Utc::now());
    set.write(RUN_META, &json(&meta))?;
    set.commit()?;
    Ok(scores)
}

/// A day folder's record, when the day is complete, whole and of the configuration `digest`.
fn complete_day(dir: &Path, digest: &str) -> Result<DayRecord, MergeError> {
    let record = read_record(dir).ok_or_else(|| InputError::Other {
        file: dir.to_path_buf(),
        message: format!("the day is not complete (no readable {}); run the batch again to finish it", COMPLETE),
    })?;
    crate::output_set::check_manifest(dir)?;
    if record.config_sha256 != digest {
        return Err(MergeError::ConfigChanged { folder: dir.to_path_buf(), expected: digest.to_string(), found: record.config_sha256 });
    }
    Ok(record)
}

/// What a merge did.
#[derive(Debug, Clone)]
pub struct MergeSummary {
    /// Shard folders merged.
    pub shards: usize,
    /// Days merged.
    pub days: usize,
    /// Shards of the same split that were not given (e.g. `2/4`), if the inputs were shards.
    pub missing_shards: Vec<String>,
    /// The merged aggregate's scores.
    pub scores: Vec<Score>,
}

/// Read a shard folder's aggregate metadata.
fn shard_meta(shard: &Path) -> Result<RunMeta, MergeError> {
    let p = shard.join("aggregate").join(RUN_META);
    let text = std::fs::read_to_string(&p).map_err(|e| InputError::Other {
        file: shard.to_path_buf(),
        message: format!("not a batch output folder (aggregate/{RUN_META}: {e}); give the --out folders of `replay --batch` runs"),
    })?;
    Ok(serde_json::from_str(&text).map_err(|e| InputError::Other { file: p.clone(), message: format!("malformed run metadata: {e}") })?)
}

/// Merge shard output folders into one aggregate at `out`, from the days' summed statistics.
///
/// # Errors
/// No shard folders; a folder that is not a batch output; shards with different site
/// configurations or a shared day (naming both folders); incomplete days; write failures.
pub fn merge(shards: &[PathBuf], out: &Path) -> Result<MergeSummary, MergeError> {
    let start = Utc::now();
    let Some(first) = shards.first() else {
        return Err(InputError::Other { file: out.to_path_buf(), message: "no shard folders to merge".into() }.into());
    };
    let metas: Vec<RunMeta> = shards.iter().map(|s| shard_meta(s)).collect::<Result<_, _>>()?;
    let mut owner: BTreeMap<String, &PathBuf> = BTreeMap::new();
    for (s, m) in shards.iter().zip(&metas) {
        if m.config_sha256 != metas[0].config_sha256 {
            return Err(MergeError::DigestMismatch { a: first.clone(), digest_a: metas[0].config_sha256.clone(), b: s.clone(), digest_b: m.config_sha256.clone() });
        }
        for d in &m.days {
            if let Some(a) = owner.insert(d.clone(), s) {
                return Err(MergeError::Overlap { day: d.clone(), a: a.clone(), b: s.clone() });
            }
        }
    }
    let folders: Vec<PathBuf> = owner.iter().map(|(d, s)| day_out(s, d)).collect();
    let meta = RunMeta {
        kind: "merge".into(),
        nephocast_version: env!("CARGO_PKG_VERSION").into(),
        config_sha256: metas[0].config_sha256.clone(),
        site_file: metas[0].site_file.clone(),
        first_frame_utc: None,
        last_frame_utc: None,
        run_start_utc: fmt_time(&start),
        run_end_utc: String::new(),
        shard: None,
        reference: String::new(),
        days: vec![],
        merged_from: shards.iter().map(|s| s.display().to_string()).collect(),
    };
    let scores = write_aggregate(out, &folders, meta)?;
    Ok(MergeSummary { shards: shards.len(), days: folders.len(), missing_shards: missing_shards(&metas), scores })
}

/// The shards of the inputs' split (`K/N`) that are not among them.
fn missing_shards(metas: &[RunMeta]) -> Vec<String> {
    let given: Vec<Shard> = metas.iter().filter_map(|m| m.shard.as_deref()).filter_map(|s| parse_shard(s).ok()).collect();
    let Some(n) = given.iter().map(|s| s.count).max() else { return vec![] };
    (0..n).filter(|k| !given.iter().any(|s| s.index == *k && s.count == n)).map(|k| format!("{k}/{n}")).collect()
}

/// Print a merge's summary.
pub fn print_merge(s: &MergeSummary, out: &Path) {
    crate::say!("merged {} days from {} shard folders into {}", s.days, s.shards, out.display());
    if !s.missing_shards.is_empty() {
        crate::say!("warning: shards not given: {} (their days are not in the aggregate)", s.missing_shards.join(", "));
    }
    print_plant_scores(&s.scores);
}
