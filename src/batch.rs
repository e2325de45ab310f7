//! Replay of many days: one output folder per day plus an aggregate, resumable, shardable.
//!
//! The input is a folder whose subfolders are days, or a text file listing day folders (one a
//! line, relative to the list file; `#` starts a comment). A day folder holds its frames, or has
//! them in `frames/` (the layout `synth` writes); `truth/irradiance.csv` beside them makes the day
//! scored against that truth, else a measurements CSV (the batch's `--measurements`, or the day's
//! own `measurements.csv`) makes it scored against the pyranometers. Days are sorted by folder
//! name; a day's name is its folder's name and must be unique.
//!
//! Outputs (`--out OUT`):
//! * `OUT/days/<day>/` — the replay's tables ([`crate::replay`]) plus `stats.csv` (the mergeable
//!   sums, [`crate::stats`]), `scores.csv` (scores from those sums), `sky_stats.csv` (the plant's
//!   sums per sky type of the issue time, [`crate::stats::SkyStats`]), `run.json` ([`RunMeta`])
//!   and, last, `complete.json` ([`DayRecord`], with the issue times per sky type); the folder is committed as one set
//!   ([`crate::output_set`]), so a day with `complete.json` is whole;
//! * `OUT/aggregate/` — the days' sums added in day order, their scores, `days.csv`, `report.html`
//!   and `run.json` ([`crate::merge::write_aggregate`]).
//!
//! A second run into the same `OUT` skips every day that is complete with the same site
//! configuration (resume after a kill: a killed day left only a staging folder, which is removed
//! and the day redone); a day completed with another configuration is an error. One progress bar
//! counts the frames of all days still to do; when standard error is not a terminal (a cluster
//! job's log, a pipe) a line per completed day takes its place.
//!
//! Sharding: `K/N` (K 0-based, `0 ≤ K < N`) takes the days whose index `i` in the sorted day list
//! has `i mod N = K`. Each shard's `OUT` holds its days and its own aggregate; `merge`
//! ([`crate::merge`]) adds the shards' day sums into one aggregate, bit-identical to a single run.

use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};
use sha2::Digest;

use crate::io::{InputError, fmt_time};
use crate::output_set::OutputSetError;
use crate::replay::{ReplayError, ReplayOptions};
use crate::merge::{COMPLETE, DayRecord, MergeError, RUN_META, RunMeta, Shard, day_out, json, read_record};
use crate::stats::StatsTable;

/// An error that stops a batch.
#[derive(Debug, thiserror::Error)]
pub enum BatchError {
    /// A day's replay failed.
    #[error("day {day}: {source}")]
    Replay {
        /// The day.
        day: String,
        /// Why (boxed: a replay error is large).
        source: Box<ReplayError>,
    },
    /// An input file or folder is bad.
    #[error(transparent)]
    Input(#[from] InputError),
    /// The site or calibration file is bad.
    #[error(transparent)]
    Config(#[from] crate::config::ConfigError),
    /// An output folder is in use or could not be written.
    #[error(transparent)]
    Output(#[from] OutputSetError),
    /// A shard, a completed day or the aggregate.
    #[error(transparent)]
    Merge(#[from] MergeError),
}

/// One day of a batch.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Day {
    /// The day's name (its folder's name).
    pub name: String,
    /// The day's folder.
    pub dir: PathBuf,
    /// Its frames.
    pub frames: PathBuf,
    /// Its truth (synthetic days).
    pub truth: Option<PathBuf>,
    /// Its own measurements CSV.
    pub measurements: Option<PathBuf>,
}

impl Day {
    fn of(dir: PathBuf) -> Option<Day> {
        let name = dir.file_name()?.to_string_lossy().into_owned();
        let frames = if dir.join("frames").is_dir() { dir.join("frames") } else { dir.clone() };
        let truth = Some(dir.join("truth").join("irradiance.csv")).filter(|p| p.is_file());
        let measurements = Some(dir.join("measurements.csv")).filter(|p| p.is_file());
        Some(Day { name, dir, frames, truth, measurements })
    }
}

/// The days of a folder (its subfolders, hidden ones left out) or of a list file, sorted by name.
///
/// # Errors
/// An unreadable folder or file, a listed folder that does not exist (naming the line), two days
/// of one name, no days at all.
pub fn list_days(days: &Path) -> Result<Vec<Day>, InputError> {
    let err = |message: String| InputError::Other { file: days.to_path_buf(), message };
    let read_err = |source| InputError::Read { file: days.to_path_buf(), source };
    let mut out: Vec<(Day, u64)> = vec![];
    if days.is_dir() {
        for e in std::fs::read_dir(days).map_err(read_err)? {
            let p = e.map_err(read_err)?.path();
            let hidden = p.file_name().is_some_and(|n| n.to_string_lossy().starts_with('.'));
            if p.is_dir() && !hidden
                && let Some(d) = Day::of(p)
            {
                out.push((d, 0));
            }
        }
    } else {
        let text = std::fs::read_to_string(days).map_err(read_err)?;
        let base = days.parent().unwrap_or(Path::new("."));
        for (i, line) in text.lines().enumerate() {
            let line_no = i as u64 + 1;
            let l = line.split('#').next().unwrap_or("").trim();
            if l.is_empty() {
                continue;
            }
            let p = base.join(l);
            let csv = |message: String| InputError::Csv { file: days.to_path_buf(), line: line_no, message };
            if !p.is_dir() {
                return Err(csv(format!("{}: not a folder", p.display())));
            }
            out.push((Day::of(p).ok_or_else(|| csv(format!("{l:?}: expected a folder name")))?, line_no));
        }
    }
    out.sort_by(|a, b| a.0.name.cmp(&b.0.name));
    for w in out.windows(2) {
        if w[0].0.name == w[1].0.name {
            return Err(err(format!("two days are named {:?}: {} and {} (a day's name is its folder's name)", w[0].0.name, w[0].0.dir.display(), w[1].0.dir.display())));
        }
    }
    if out.is_empty() {
        return Err(err("no days: expected a folder of day folders, or a text file listing day folders one a line".into()));
    }
    Ok(out.into_iter().map(|d| d.0).collect())
}

/// The days a shard takes: index `i` in the sorted list with `i mod N = K`.
pub fn select_shard(days: Vec<Day>, shard: Option<Shard>) -> Vec<Day> {
    match shard {
        None => days,
        Some(s) => days.into_iter().enumerate().filter(|(i, _)| i % s.count == s.index).map(|(_, d)| d).collect(),
    }
}

/// SHA-256 of the configuration, as 64 hex digits: the site file's bytes, then the bytes of each
/// file it refers to, in this fixed order: the calibration (`camera.calibration`), its obstruction
/// mask and clear-sky library (`camera.obstruction_mask`, `camera.clear_reference` of the
/// calibration file), the cloud base height series (`clouds.base_height_csv`), then, with a
/// `[second_camera]`, its calibration, mask and library likewise. Each part enters as
/// its name, its length (8 bytes, little-endian) and its bytes; a reference the files do not make
/// enters as its name and `absent`. Paths resolve as [`crate::config::Site::load`] resolves them.
///
/// # Errors
/// A file that cannot be read (a referenced file that is named but missing included).
pub fn config_digest(site: &Path) -> Result<String, InputError> {
    let read = |p: &Path| std::fs::read(p).map_err(|source| InputError::Read { file: p.to_path_buf(), source });
    let resolve = |base: &Path, p: &str| {
        let p = Path::new(p);
        if p.is_absolute() { p.to_path_buf() } else { base.parent().unwrap_or(Path::new(".")).join(p) }
    };
    // A file's string field at a dotted path, when the file is TOML and holds it.
    let field = |bytes: &[u8], section: &str, key: &str| -> Option<String> {
        let v: toml::Value = toml::from_str(std::str::from_utf8(bytes).ok()?).ok()?;
        v.get(section)?.get(key)?.as_str().filter(|p| !p.is_empty()).map(str::to_string)
    };
    let mut h = sha2::Sha256::new();
    let mut part = |name: &str, bytes: Option<&[u8]>| {
        h.update(name.as_bytes());
        h.update([0u8]);
        match bytes {
            Some(b) => {
                h.update((b.len() as u64).to_le_bytes());
                h.update(b);
            }
            None => h.update(b"absent"),
        }
    };
    let site_bytes = read(site)?;
    part("site", Some(&site_bytes));
    // A camera's calibration (site section `section`) and the side files it names.
    let camera_parts = |section: &str, part: &mut dyn FnMut(&str, Option<&[u8]>)| -> Result<(), InputError> {
        let cal_path = field(&site_bytes, section, "calibration").map(|p| resolve(site, &p));
        let cal = cal_path.as_deref().map(read).transpose()?;
        part(&format!("{section}.calibration"), cal.as_deref());
        for key in ["obstruction_mask", "clear_reference"] {
            let p = cal.as_deref().zip(cal_path.as_deref()).and_then(|(b, cp)| field(b, "camera", key).map(|p| resolve(cp, &p)));
            let bytes = p.as_deref().map(read).transpose()?;
            part(&format!("{section}.{key}"), bytes.as_deref());
        }
        Ok(())
    };
    camera_parts("camera", &mut part)?;
    let cbh = field(&site_bytes, "clouds", "base_height_csv").map(|p| resolve(site, &p));
    let bytes = cbh.as_deref().map(read).transpose()?;
    part("clouds.base_height_csv", bytes.as_deref());
    let second = std::str::from_utf8(&site_bytes).ok().and_then(|t| toml::from_str::<toml::Value>(t).ok()).is_some_and(|v| v.get("second_camera").is_some());
    if second {
        camera_parts("second_camera", &mut part)?;
    }
    Ok(h.finalize().iter().map(|b| format!("{b:02x}")).collect())
}

/// What a batch needs.
#[derive(Debug, Clone)]
pub struct BatchOptions {
    /// The site file (one for all days).
    pub site: PathBuf,
    /// A folder of day folders, or a list file.
    pub days: PathBuf,
    /// Output folder.
    pub out: PathBuf,
    /// A measurements CSV for all days (tuning and scoring); else each day's own.
    pub measurements: Option<PathBuf>,
    /// Write an overlay picture every N frames (0: none).
    pub overlays_every: usize,
    /// Show the progress bar.
    pub progress: bool,
    /// Only this shard of the days.
    pub shard: Option<Shard>,
}

/// What a batch did.
#[derive(Debug, Clone, Default)]
pub struct BatchSummary {
    /// Days of this run (after sharding).
    pub days: usize,
    /// Days replayed now.
    pub replayed: Vec<String>,
    /// Days found complete and skipped.
    pub skipped: Vec<String>,
    /// Frames replayed now.
    pub frames: usize,
    /// The aggregate folder.
    pub aggregate: PathBuf,
    /// Plant scores of the aggregate.
    pub plant_scores: Vec<crate::stats::Score>,
}

/// Run a batch: every day of the (shard's) list not yet complete, then the aggregate.
///
/// # Errors
/// Bad inputs (naming the file, folder or line), a day whose replay fails (naming the day), a day
/// completed with another site configuration, write failures.
pub fn run_batch(opts: &BatchOptions) -> Result<BatchSummary, BatchError> {
    let start = Utc::now();
    // The site file checked first, so that a bad or missing field is named as such (the digest
    // would read an empty `camera.calibration` as the site's folder).
    crate::config::Site::load_without_camera(&opts.site)?;
    let digest = config_digest(&opts.site)?;
    check_out_outside(&opts.days, &opts.out)?;
    let days = select_shard(list_days(&opts.days)?, opts.shard);
    let mut todo = vec![];
    let mut summary = BatchSummary { days: days.len(), ..Default::default() };
    for d in &days {
        let dir = day_out(&opts.out, &d.name);
        match read_record(&dir) {
            Some(r) if r.config_sha256 == digest => summary.skipped.push(d.name.clone()),
            Some(r) => return Err(MergeError::ConfigChanged { folder: dir, expected: digest, found: r.config_sha256 }.into()),
            None => todo.push(d),
        }
    }
    let mut counts = Vec::with_capacity(todo.len());
    for d in &todo {
        let naming = crate::config::frame_naming_of(&opts.site).map_err(|e| BatchError::Replay { day: d.name.clone(), source: Box::new(e.into()) })?;
        let (frames, _) = crate::replay::frames_of(&d.frames, &naming).map_err(|source| BatchError::Replay { day: d.name.clone(), source: Box::new(source) })?;
        counts.push(frames.len());
    }
    let total: usize = counts.iter().sum();
    let bar = crate::io::progress_bar(total as u64, opts.progress, "batch");
    // Without a terminal (a job's log, a pipe) the bar does not draw: one line per day instead.
    let lines = opts.progress && !std::io::IsTerminal::is_terminal(&std::io::stderr());
    if lines {
        eprintln!("batch: {} days to replay ({total} frames), {} already complete", todo.len(), summary.skipped.len());
    }
    for (k, d) in todo.iter().enumerate() {
        bar.set_message(d.name.clone());
        let r = run_day(opts, d, &digest, &bar);
        if r.is_err() {
            bar.abandon();
        }
        summary.frames += r?;
        summary.replayed.push(d.name.clone());
        if lines {
            eprintln!("batch: day {}/{} {} done ({} of {total} frames)", k + 1, todo.len(), d.name, summary.frames);
        }
    }
    bar.finish_and_clear();
    let names: Vec<String> = days.iter().map(|d| d.name.clone()).collect();
    let folders: Vec<PathBuf> = names.iter().map(|n| day_out(&opts.out, n)).collect();
    let meta = RunMeta {
        kind: "aggregate".into(),
        nephocast_version: env!("CARGO_PKG_VERSION").into(),
        config_sha256: digest,
        site_file: opts.site.display().to_string(),
        first_frame_utc: None,
        last_frame_utc: None,
        run_start_utc: fmt_time(&start),
        run_end_utc: String::new(),
        shard: opts.shard.map(|s| s.to_string()),
        reference: String::new(),
        days: names,
        merged_from: vec![],
    };
    summary.aggregate = opts.out.join("aggregate");
    summary.plant_scores = crate::merge::write_aggregate(&summary.aggregate, &folders, meta)?;
    Ok(summary)
}

/// The output folder must not be one of the days (it would be taken for a day on the next run).
fn check_out_outside(days: &Path, out: &Path) -> Result<(), InputError> {
    let (Ok(d), Some(parent)) = (days.canonicalize(), out.parent()) else { return Ok(()) };
    let parent = if parent.as_os_str().is_empty() { Path::new(".") } else { parent };
    if days.is_dir() && parent.canonicalize().is_ok_and(|p| p == d) {
        return Err(InputError::Other { file: out.to_path_buf(), message: format!("the output folder is inside the days folder {}; it would be taken for a day: choose another", days.display()) });
    }
    Ok(())
}

/// Replay one day into its folder with its statistics, metadata and marker; returns its frames.
fn run_day(opts: &BatchOptions, d: &Day, digest: &str, bar: &indicatif::ProgressBar) -> Result<usize, BatchError> {
    let start = Utc::now();
    let wrap = |source: ReplayError| BatchError::Replay { day: d.name.clone(), source: Box::new(source) };
    let measurements = opts.measurements.clone().or_else(|| d.measurements.clone());
    let ro = ReplayOptions {
        site: opts.site.clone(),
        frames: d.frames.clone(),
        out: day_out(&opts.out, &d.name),
        measurements: measurements.clone(),
        overlays_every: opts.overlays_every,
        progress: false,
    };
    let (summary, mut set) = crate::replay::replay_staged_with(&ro, bar).map_err(wrap)?;
    let ((stats, sky), reference) = day_stats(opts, d, measurements.as_deref(), set.dir())?;
    let naming = crate::config::frame_naming_of(&opts.site).map_err(|e| wrap(e.into()))?;
    let (frames, _) = crate::replay::frames_of(&d.frames, &naming).map_err(wrap)?;
    let (first, last) = (frames[0].time, frames[frames.len() - 1].time);
    set.write("stats.csv", &stats.to_csv())?;
    set.write("scores.csv", &stats.scores_csv())?;
    set.write(crate::merge::SKY_STATS, &sky.table.to_csv_keyed("sky_type"))?;
    let meta = day_meta(opts, d, digest, (first, last), start, &reference);
    set.write(RUN_META, &json(&meta))?;
    let record = DayRecord {
        day: d.name.clone(),
        config_sha256: digest.to_string(),
        frames: summary.frames_found,
        frames_used: summary.counters.used,
        first_frame_utc: fmt_time(&first),
        last_frame_utc: fmt_time(&last),
        reference,
        sky_issues: sky.issues,
    };
    set.write(COMPLETE, &json(&record))?;
    set.commit()?;
    Ok(summary.frames_found)
}

fn day_meta(opts: &BatchOptions, d: &Day, digest: &str, span: (DateTime<Utc>, DateTime<Utc>), start: DateTime<Utc>, reference: &str) -> RunMeta {
    RunMeta {
        kind: "day".into(),
        nephocast_version: env!("CARGO_PKG_VERSION").into(),
        config_sha256: digest.to_string(),
        site_file: opts.site.display().to_string(),
        first_frame_utc: Some(fmt_time(&span.0)),
        last_frame_utc: Some(fmt_time(&span.1)),
        run_start_utc: fmt_time(&start),
        run_end_utc: fmt_time(&Utc::now()),
        shard: opts.shard.map(|s| s.to_string()),
        reference: reference.to_string(),
        days: vec![d.name.clone()],
        merged_from: vec![],
    }
}

/// A day's statistics (and the plant's per sky type) against its truth, else against
/// measurements, else none.
fn day_stats(opts: &BatchOptions, d: &Day, measurements: Option<&Path>, staged: &Path) -> Result<(crate::stats::DayStats, String), BatchError> {
    if let Some(t) = &d.truth {
        let truth = crate::verify::Truth::read(t)?;
        return Ok((crate::stats::from_truth(staged, &truth)?, "truth".into()));
    }
    if let Some(m) = measurements {
        let site = crate::config::Site::load(&opts.site)?;
        return Ok((crate::stats::from_measured(&site, staged, m)?, "measurements".into()));
    }
    Ok(((StatsTable::default(), crate::stats::SkyStats::default()), "none".into()))
}

/// Print a batch's summary.
pub fn print_summary(s: &BatchSummary) {
    crate::say!("days: {} in this run, {} replayed ({} frames), {} already complete and skipped", s.days, s.replayed.len(), s.frames, s.skipped.len());
    crate::merge::print_plant_scores(&s.plant_scores);
    crate::say!("aggregate: {}", s.aggregate.display());
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The digest covers the site file and the files it refers to: changing the calibration, its
    /// mask, its clear-sky library or the base-height series changes it; reading twice does not.
    #[test]
    fn config_digest_covers_referenced_files() {
        let d = tempfile::tempdir().unwrap();
        let w = |name: &str, text: &str| std::fs::write(d.path().join(name), text).unwrap();
        w("site.toml", "[camera]\ncalibration = \"cal/cam.toml\"\n[clouds]\nbase_height_csv = \"cbh.csv\"\n");
        std::fs::create_dir_all(d.path().join("cal")).unwrap();
        w("cal/cam.toml", "[camera]\nobstruction_mask = \"mask.png\"\nclear_reference = \"clear.csv\"\nf = 1\n");
        w("cal/mask.png", "mask");
        w("cal/clear.csv", "library");
        w("cbh.csv", "time_utc,cbh_m\n");
        let site = d.path().join("site.toml");
        let first = config_digest(&site).unwrap();
        assert_eq!(first.len(), 64);
        assert_eq!(config_digest(&site).unwrap(), first, "stable");
        let mut seen = vec![first.clone()];
        for (file, text) in [("cal/cam.toml", "[camera]\nobstruction_mask = \"mask.png\"\nclear_reference = \"clear.csv\"\nf = 2\n"), ("cal/mask.png", "mask2"), ("cal/clear.csv", "library2"), ("cbh.csv", "time_utc,cbh_m\n2026-06-14T10:00:00Z,1500\n")] {
            w(file, text);
            let now = config_digest(&site).unwrap();
            assert!(!seen.contains(&now), "changing {file} left the digest as it was");
            seen.push(now);
        }
        // A second camera's calibration and its side files count too.
        w("site.toml", "[camera]\ncalibration = \"cal/cam.toml\"\n[clouds]\nbase_height_csv = \"cbh.csv\"\n[second_camera]\ncalibration = \"cal/two.toml\"\n");
        w("cal/two.toml", "[camera]\nclear_reference = \"two.csv\"\n");
        w("cal/two.csv", "library of two");
        let two = config_digest(&site).unwrap();
        assert!(!seen.contains(&two), "adding a second camera left the digest as it was");
        w("cal/two.csv", "another library of two");
        assert_ne!(config_digest(&site).unwrap(), two, "the second camera's library is covered");
        // A referenced file that is missing is an error naming it.
        std::fs::remove_file(d.path().join("cal/mask.png")).unwrap();
        let e = config_digest(&site).unwrap_err().to_string();
        assert!(e.contains("mask.png"), "{e}");
        // Without references, the site file alone (and the parts marked absent).
        w("site.toml", "[camera]\n");
        assert_ne!(config_digest(&site).unwrap(), first);
    }

    #[test]
    fn shard_specs() {
        assert_eq!(crate::merge::parse_shard("0/4").unwrap(), Shard { index: 0, count: 4 });
        assert_eq!(crate::merge::parse_shard("3/4").unwrap(), Shard { index: 3, count: 4 });
        for (bad, says) in [("4/4", "below N"), ("1/0", "N:"), ("x/2", "K:"), ("2", "K/N"), ("-1/2", "K:"), ("1/2/3", "N:")] {
            let e = crate::merge::parse_shard(bad).unwrap_err().to_string();
            assert!(e.contains(says), "{bad}: {e}");
        }
    }

    #[test]
    fn shards_partition_the_days() {
        let days: Vec<Day> = (0..10).map(|i| Day { name: format!("d{i}"), dir: "x".into(), frames: "x".into(), truth: None, measurements: None }).collect();
        let mut all: Vec<String> = (0..3).flat_map(|k| select_shard(days.clone(), Some(Shard { index: k, count: 3 }))).map(|d| d.name).collect();
        all.sort();
        assert_eq!(all, days.iter().map(|d| d.name.clone()).collect::<Vec<_>>());
        let first: Vec<String> = select_shard(days, Some(Shard { index: 1, count: 3 })).into_iter().map(|d| d.name).collect();
        assert_eq!(first, ["d1", "d4", "d7"]);
    }
}
