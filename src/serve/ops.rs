//! Live mode's operation: the measurement feed, the per-frame log line, the Prometheus metrics
//! and the retention of processed frames; the health state and its settings are in
//! [`super::health`] (re-exported here).
//!
//! **Health**: [`super::health`] (re-exported here).
//!
//! **Measurement feed**: a CSV file that a logger appends to, or a folder of CSV files with
//! rotation. Each file is read from where the last poll stopped (per file, by device and inode, so
//! a renamed file keeps its place); a file that shrank is read again from the start; a partial last
//! line waits for the next poll. Every piece is screened as replay screens a whole file
//! ([`crate::io::Measurements::screen`]: BSRN limits, ranges, kW/m²), then appended to the
//! engine ([`crate::nowcast::Nowcaster::append_measurements`]); the tuning skips stuck values and
//! gaps as in replay. When the feed stops, readings more than three averaging periods old are not
//! used by the tuning; once the newest reading is older than `measurement_max_age_s` (against the
//! clock) the health state turns `no_measurements`, and once it is that old at the newest frame's
//! time the tuning forgets what it learnt and goes back to the site's configured transmittances
//! (band calibration keeps its last scale and learns again when readings return).
//! The Modbus TCP feed (`[measurements_modbus]`, [`super::modbus_feed`]) hands over averaged rows
//! that are screened and appended the same way, and ages the same way when the device stops.
use std::collections::{BTreeMap, HashMap, HashSet};
use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};

use crate::io::{Measurements, fmt_time};

pub use super::health::{HEALTH_TICK_MS, Retention, HealthInputs, HealthOptions, HealthState, age_s, evaluate};

/// Most bytes read from one measurement file per poll.
pub const FEED_MAX_BYTES_PER_POLL: u64 = 16 << 20;
/// Measurement rows older than this before the newest are forgotten \[s\].
pub const FEED_KEEP_S: f64 = 6.0 * 3600.0;
/// Upper bounds of the latency histogram's buckets \[s\].
pub const LATENCY_BUCKETS_S: [f64; 9] = [0.05, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0, 10.0, 30.0];



/// One measurement file's read position.
#[derive(Debug, Clone, Default)]
struct FileState {
    path: PathBuf,
    offset: u64,
    header: Option<Vec<u8>>,
    /// Data lines consumed so far.
    lines: u64,
    /// The newest row's time as written, for the averaging period of a piece of one row.
    last_time: Option<chrono::DateTime<chrono::Utc>>,
}

/// A measurement feed read a piece at a time.
#[derive(Debug, Default)]
pub struct MeasurementFeed {
    path: PathBuf,
    files: HashMap<(u64, u64), FileState>,
    /// Rows read so far.
    pub rows_read: usize,
    /// Refusals: lines that do not parse (or are not after the row before them), rows ahead of
    /// the clock, pieces refused whole by screening (kW/m²).
    pub errors: usize,
}

/// One poll's outcome.
#[derive(Debug, Default)]
pub struct FeedPoll {
    /// Screened rows per piece, with what screening flagged.
    pub pieces: Vec<(Measurements, BTreeMap<String, usize>)>,
    /// Lines to log.
    pub notes: Vec<String>,
}

#[cfg(unix)]
fn file_id(m: &std::fs::Metadata) -> (u64, u64) {
    use std::os::unix::fs::MetadataExt;
    (m.dev(), m.ino())
}

#[cfg(not(unix))]
fn file_id(_: &std::fs::Metadata) -> (u64, u64) {
    (0, 0)
}

impl MeasurementFeed {
    /// A feed reading `path` (a CSV file, or a folder of `*.csv` files).
    pub fn new(path: &Path) -> MeasurementFeed {
        MeasurementFeed { path: path.to_path_buf(), ..Default::default() }
    }

    /// The feed's files, oldest modification first (a folder's rotated files before the live one).
    fn list(&self) -> Vec<(PathBuf, std::fs::Metadata)> {
        if self.path.is_dir() {
            let mut v: Vec<(PathBuf, std::fs::Metadata)> = std::fs::read_dir(&self.path)
                .map(|rd| {
                    rd.flatten()
                        .filter(|e| {
                            let n = e.file_name().to_string_lossy().into_owned();
                            !n.starts_with('.') && n.to_ascii_lowercase().ends_with(".csv")
                        })
                        .filter_map(|e| std::fs::metadata(e.path()).ok().filter(|m| m.is_file()).map(|m| (e.path(), m)))
                        .collect()
                })
                .unwrap_or_default();
            v.sort_by(|a, b| a.1.modified().ok().cmp(&b.1.modified().ok()).then(a.0.cmp(&b.0)));
            v
        } else {
            std::fs::metadata(&self.path).ok().filter(|m| m.is_file()).map(|m| vec![(self.path.clone(), m)]).unwrap_or_default()
        }
    }

    /// Read what was added since the last poll and screen it.
    pub fn poll(&mut self, site: &crate::config::SiteFile) -> FeedPoll {
        self.poll_at(site, Utc::now())
    }

    /// [`MeasurementFeed::poll`] with the clock reading `now`: rows dated more than the site's
    /// `qc.max_ahead_of_clock_s` after it are left out (a logger whose clock ran ahead must not
    /// make every later reading look old, nor push the held readings out).
    pub fn poll_at(&mut self, site: &crate::config::SiteFile, now: DateTime<Utc>) -> FeedPoll {
        let mut out = FeedPoll::default();
        let files = self.list();
        let present: HashSet<(u64, u64)> = files.iter().map(|f| file_id(&f.1)).collect();
        self.files.retain(|id, _| present.contains(id));
        for (path, meta) in files {
            let st = self.files.entry(file_id(&meta)).or_default();
            st.path = path.clone();
            if meta.len() < st.offset {
                out.notes.push(format!("measurements {}: shrank from {} to {} bytes (truncated); read again from the start", path.display(), st.offset, meta.len()));
                *st = FileState { path: path.clone(), ..Default::default() };
            }
            if meta.len() == st.offset {
                continue;
            }
            let bytes = match read_range(&path, st.offset, FEED_MAX_BYTES_PER_POLL) {
                Ok(b) => b,
                Err(e) => {
                    out.notes.push(format!("measurements {}: {e}", path.display()));
                    continue;
                }
            };
            // Only whole lines; a partial last line waits for the next poll.
            let Some(end) = bytes.iter().rposition(|b| *b == b'\n') else { continue };
            let mut body = &bytes[..=end];
            st.offset += body.len() as u64;
            if st.header.is_none() {
                let h = body.iter().position(|b| *b == b'\n').unwrap_or(body.len() - 1);
                st.header = Some(body[..=h].to_vec());
                body = &body[h + 1..];
            }
            let n_lines = body.iter().filter(|b| **b == b'\n').count() as u64;
            if n_lines == 0 {
                continue;
            }
            let header = st.header.clone().unwrap_or_default();
            let lines_before = st.lines;
            st.lines += n_lines;
            let last_time = st.last_time;
            let tolerance_s = site.qc.max_ahead_of_clock_s;
            let ahead = |t: &DateTime<Utc>| (age_s(&now, t) > tolerance_s).then(|| ahead_note(t, now, tolerance_s));
            let (piece, refused) = parse_piece(&path, &header, body, lines_before, ahead);
            self.errors += refused.len();
            out.notes.extend(refused.into_iter().map(|e| format!("measurements: {e}; left out")));
            let parsed = piece.and_then(|mut m| {
                // A piece of one row takes its period from the row before it in the file.
                if let Some((n, line, t)) = drop_ahead_of_clock(&mut m, now, tolerance_s) {
                    self.errors += n;
                    let more = if n > 1 { format!(" (and {} later rows)", n - 1) } else { String::new() };
                    out.notes.push(format!("measurements: {}: line {line}: {}; left out{more}", path.display(), ahead_note(&t, now, tolerance_s)));
                }
                let hint = last_time.zip(m.times.first()).map(|(a, b)| (*b - a).num_milliseconds() as f64 / 1000.0).filter(|p| *p > 0.0);
                let newest = m.times.last().copied();
                m.label_at_start(site.measurements.time_label, hint);
                let report = m.screen_site(&path, site)?;
                Ok((m, report, newest))
            });
            let parsed = parsed.map(|(m, report, newest)| {
                if newest.is_some() {
                    st.last_time = newest;
                }
                if report.flagged() > 0 {
                    out.notes.push(format!("measurements {}: {report}", path.display()));
                }
                (m, report.counts())
            });
            match parsed {
                Ok((m, counts)) => {
                    self.rows_read += m.times.len();
                    out.pieces.push((m, counts));
                }
                Err(e) => {
                    self.errors += 1;
                    out.notes.push(format!("measurements: {e}; these {n_lines} lines are left out"));
                }
            }
        }
        out
    }
}

/// A piece of a feed file (`body`: whole lines after `lines_before` data lines) parsed under its
/// `header`. When it does not parse as a whole, it is read line by line: each line that does not
/// parse, whose time is not after the row kept before it, or that is dated ahead of the clock
/// (`ahead`), is refused (the reason, naming the file and line, is returned) and the others are
/// kept with their line numbers — one line cut by a logger's power loss or holding a stray value
/// must not cost the rows around it. `Err` is the piece's error when no line could be kept.
fn parse_piece(path: &Path, header: &[u8], body: &[u8], lines_before: u64, ahead: impl Fn(&DateTime<Utc>) -> Option<String>) -> (Result<Measurements, crate::io::InputError>, Vec<String>) {
    let whole = [header, body].concat();
    let first_error = match Measurements::read_csv_text(path, &whole, lines_before) {
        Ok(m) => return (Ok(m), vec![]),
        Err(e) => e,
    };
    let (mut kept, mut lines, mut refused) = (header.to_vec(), vec![], vec![]);
    let mut last: Option<DateTime<Utc>> = None;
    for (i, line) in body.split_inclusive(|b| *b == b'\n').enumerate() {
        let at = format!("{}: line {}", path.display(), lines_before + 2 + i as u64);
        match Measurements::read_csv_text(path, &[header, line].concat(), lines_before + i as u64) {
            Ok(one) if one.times.len() == 1 => {
                let t = one.times[0];
                if let Some(why) = ahead(&t) {
                    refused.push(format!("{at}: {why}"));
                } else if last.is_some_and(|l| t <= l) {
                    refused.push(format!("{at}: time_utc {} is not after the previous row: duplicated or out of order", fmt_time(&t)));
                } else {
                    last = Some(t);
                    kept.extend_from_slice(line);
                    lines.push(one.lines[0]);
                }
            }
            Ok(_) => {}
            // The CSV reader's own text counts within the one line read here: say it for the file.
            Err(crate::io::InputError::Csv { message, .. }) if message.contains("found record with") => {
                let (want, got) = (header.split(|b| *b == b',').count(), line.split(|b| *b == b',').count());
                refused.push(format!("{at}: expected {want} comma-separated fields as in the header, got {got}"));
            }
            Err(e) => refused.push(e.to_string()),
        }
    }
    match Measurements::read_csv_text(path, &kept, 0) {
        Ok(mut m) if !m.times.is_empty() && m.times.len() == lines.len() => {
            m.lines = lines;
            (Ok(m), refused)
        }
        _ => (Err(first_error), vec![]),
    }
}

fn ahead_note(t: &DateTime<Utc>, now: DateTime<Utc>, tolerance_s: f64) -> String {
    format!("time_utc {} is {:.0} s ahead of the clock (at most qc.max_ahead_of_clock_s = {tolerance_s} s expected; check the logger's clock)", fmt_time(t), age_s(&now, t))
}

/// Leave out the rows dated more than `tolerance_s` after `now`; returns how many, with the first
/// one's line and time.
fn drop_ahead_of_clock(m: &mut Measurements, now: DateTime<Utc>, tolerance_s: f64) -> Option<(usize, u64, DateTime<Utc>)> {
    let ahead = |t: &DateTime<Utc>| age_s(&now, t) > tolerance_s;
    let first = m.times.iter().position(ahead)?;
    let found = (m.times.iter().filter(|t| ahead(t)).count(), m.lines.get(first).copied().unwrap_or(0), m.times[first]);
    let keep: Vec<bool> = m.times.iter().map(|t| !ahead(t)).collect();
    let pick = |v: &mut Vec<f64>| *v = v.iter().zip(&keep).filter(|(_, k)| **k).map(|(x, _)| *x).collect();
    for c in &mut m.columns {
        pick(c);
    }
    m.lines = m.lines.iter().zip(&keep).filter(|(_, k)| **k).map(|(x, _)| *x).collect();
    m.times.retain(|t| !ahead(t));
    Some(found)
}

fn read_range(path: &Path, offset: u64, max: u64) -> std::io::Result<Vec<u8>> {
    use std::io::{Read, Seek, SeekFrom};
    let mut f = std::fs::File::open(path)?;
    f.seek(SeekFrom::Start(offset))?;
    let mut v = vec![];
    f.take(max).read_to_end(&mut v)?;
    Ok(v)
}

/// Check that a measurement feed path can be read: a folder, or a CSV file whose header has a
/// `time_utc` column and whose rows parse.
///
/// # Errors
/// What is wrong, naming the path (and line).
pub fn check_feed(path: &Path) -> Result<String, String> {
    if path.is_dir() {
        std::fs::read_dir(path).map_err(|e| format!("measurements feed {}: {e}", path.display()))?;
        return Ok(format!("measurements feed: folder {}", path.display()));
    }
    let m = Measurements::read_csv(path).map_err(|e| format!("measurements feed: {e}"))?;
    Ok(format!("measurements feed: {} ({} rows, columns {})", path.display(), m.times.len(), m.names.join(", ")))
}

/// Frame-like files (`.jpg`, `.jpeg`, `.png`, not hidden) in a folder whose name holds no time.
pub fn untimed_files(dir: &Path, naming: &crate::io::FrameNaming) -> Vec<String> {
    let Ok(rd) = std::fs::read_dir(dir) else { return vec![] };
    let mut v: Vec<String> = rd
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| {
            let l = n.to_ascii_lowercase();
            !n.starts_with('.') && (l.ends_with(".jpg") || l.ends_with(".jpeg") || l.ends_with(".png")) && naming.time_of(n).is_none()
        })
        .collect();
    v.sort();
    v
}

/// Apply the retention to a judged frame file. Returns what was done, for the log.
///
/// # Errors
/// The move or delete failed.
pub fn retire(path: &Path, time: &DateTime<Utc>, r: &Retention) -> std::io::Result<Option<String>> {
    retire_as(path, time, r, "")
}

/// [`retire`], an archived file's name prefixed by `prefix` (the second camera's frames carry
/// `second-`, so that they never replace the first camera's of the same time in the archive).
///
/// # Errors
/// The file system's.
pub fn retire_as(path: &Path, time: &DateTime<Utc>, r: &Retention, prefix: &str) -> std::io::Result<Option<String>> {
    match r {
        Retention::Keep => Ok(None),
        Retention::Delete => {
            std::fs::remove_file(path)?;
            Ok(Some("deleted".into()))
        }
        Retention::Archive(dir) => {
            let day = dir.join(time.format("%Y-%m-%d").to_string());
            std::fs::create_dir_all(&day)?;
            let to = day.join(format!("{prefix}{}", path.file_name().unwrap_or_default().to_string_lossy()));
            std::fs::rename(path, &to)?;
            Ok(Some(format!("archived to {}", to.display())))
        }
    }
}

/// Remove the archive's dated folders (`YYYY-MM-DD`) older than `keep_days` before `today`.
/// Returns the folders removed; other entries are left alone.
pub fn prune_archive(dir: &Path, keep_days: u32, today: chrono::NaiveDate) -> Vec<PathBuf> {
    let Ok(rd) = std::fs::read_dir(dir) else { return vec![] };
    let mut gone = vec![];
    for e in rd.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        let Ok(day) = chrono::NaiveDate::parse_from_str(&name, "%Y-%m-%d") else { continue };
        if (today - day).num_days() > i64::from(keep_days) && e.path().is_dir() && std::fs::remove_dir_all(e.path()).is_ok() {
            gone.push(e.path());
        }
    }
    gone.sort();
    gone
}

/// A latency histogram (cumulative buckets as Prometheus wants them).
#[derive(Debug, Clone, Default)]
pub struct Histogram {
    /// Counts per bucket of [`LATENCY_BUCKETS_S`] (not cumulative).
    pub buckets: [u64; LATENCY_BUCKETS_S.len()],
    /// Sum \[s\].
    pub sum_s: f64,
    /// Observations.
    pub count: u64,
}

impl Histogram {
    /// Add one observation \[s\].
    pub fn observe(&mut self, v_s: f64) {
        if let Some(i) = LATENCY_BUCKETS_S.iter().position(|b| v_s <= *b) {
            self.buckets[i] += 1;
        }
        self.sum_s += v_s;
        self.count += 1;
    }
}

/// Figures for the metrics page.
#[derive(Debug, Clone, Default)]
pub struct MetricsInput {
    /// Frames processed.
    pub processed: usize,
    /// Frames skipped for a newer one.
    pub skipped: usize,
    /// Frames rejected, by reason.
    pub rejected: BTreeMap<String, usize>,
    /// Untimed frame files seen.
    pub untimed: usize,
    /// Measurement rows appended.
    pub measurement_rows: usize,
    /// Latency.
    pub latency: Histogram,
    /// Alarm state name.
    pub alarm: String,
    /// Health.
    pub health: HealthState,
    /// Heartbeat.
    pub heartbeat: u64,
    /// Newest frame's age \[s\].
    pub frame_age_s: Option<f64>,
    /// Newest measurement's age \[s\].
    pub measurement_age_s: Option<f64>,
    /// The Modbus measurement feed's state, when the site polls one.
    pub modbus_feed: Option<ModbusFeedStatus>,
}

fn label(v: &str) -> String {
    v.replace('\\', "\\\\").replace('"', "\\\"").replace('\n', "\\n")
}

/// The metrics in the Prometheus text exposition format (version 0.0.4).
pub fn metrics_text(m: &MetricsInput) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let mut metric = |name: &str, kind: &str, help: &str, lines: Vec<(String, f64)>| {
        let _ = writeln!(s, "# HELP {name} {help}\n# TYPE {name} {kind}");
        for (labels, v) in lines {
            let _ = writeln!(s, "{name}{labels} {v}");
        }
    };
    metric("nephocast_frames_processed_total", "counter", "Frames the engine used.", vec![(String::new(), m.processed as f64)]);
    metric("nephocast_frames_skipped_total", "counter", "Frames skipped because a newer one was waiting.", vec![(String::new(), m.skipped as f64)]);
    metric(
        "nephocast_frames_rejected_total",
        "counter",
        "Frames rejected, by reason.",
        m.rejected.iter().map(|(k, v)| (format!("{{reason=\"{}\"}}", label(k)), *v as f64)).collect(),
    );
    metric("nephocast_frames_untimed_total", "counter", "Frame files whose name holds no time.", vec![(String::new(), m.untimed as f64)]);
    metric("nephocast_measurement_rows_total", "counter", "Measurement rows taken from the feed.", vec![(String::new(), m.measurement_rows as f64)]);
    let mut lines = vec![];
    let mut cum = 0;
    for (b, n) in LATENCY_BUCKETS_S.iter().zip(m.latency.buckets.iter()) {
        cum += n;
        lines.push((format!("_bucket{{le=\"{b}\"}}"), cum as f64));
    }
    lines.push(("_bucket{le=\"+Inf\"}".into(), m.latency.count as f64));
    lines.push(("_sum".into(), m.latency.sum_s));
    lines.push(("_count".into(), m.latency.count as f64));
    metric("nephocast_frame_latency_seconds", "histogram", "Frame processing time (decode and engine step).", lines);
    let alarms = ["none", "calm", "caution", "variable", "alert"];
    let mut al: Vec<(String, f64)> = alarms.iter().map(|a| (format!("{{state=\"{a}\"}}"), f64::from(u8::from(m.alarm == *a)))).collect();
    if !alarms.contains(&m.alarm.as_str()) {
        al.push((format!("{{state=\"{}\"}}", label(&m.alarm)), 1.0));
    }
    metric("nephocast_alarm_state", "gauge", "The ramp alarm's state (1 for the current one; none while no nowcast is behind it, e.g. after a restart; advisory).", al);
    metric(
        "nephocast_health_state",
        "gauge",
        "The health state (1 for the current one).",
        HealthState::ALL.iter().map(|h| (format!("{{state=\"{}\"}}", h.name()), f64::from(u8::from(*h == m.health)))).collect(),
    );
    metric("nephocast_data_valid", "gauge", "1 when the forecasts come from a fresh frame.", vec![(String::new(), f64::from(u8::from(m.health.data_valid())))]);
    metric("nephocast_heartbeat_total", "counter", "Health timer evaluations.", vec![(String::new(), m.heartbeat as f64)]);
    let nan = f64::NAN;
    metric("nephocast_frame_age_seconds", "gauge", "Age of the newest frame read (NaN: none).", vec![(String::new(), m.frame_age_s.unwrap_or(nan))]);
    metric("nephocast_measurement_age_seconds", "gauge", "Age of the newest measurement (NaN: none).", vec![(String::new(), m.measurement_age_s.unwrap_or(nan))]);
    if let Some(f) = &m.modbus_feed {
        metric("nephocast_modbus_feed_connected", "gauge", "1 while the Modbus measurement feed has a connection open.", vec![(String::new(), f64::from(u8::from(f.connected)))]);
        metric("nephocast_modbus_feed_errors_total", "counter", "Failed connection attempts and requests of the Modbus measurement feed.", vec![(String::new(), f.errors as f64)]);
        metric("nephocast_modbus_feed_outages_total", "counter", "Outages of the Modbus measurement feed begun.", vec![(String::new(), f.outages as f64)]);
        metric(
            "nephocast_modbus_feed_values_refused_total",
            "counter",
            "Modbus samples left out of the means (not finite, or outside the physically possible limits).",
            vec![(String::new(), f.values_refused as f64)],
        );
    }
    s
}

/// One log line: key=value pairs (values with spaces or quotes quoted), or a JSON object.
pub fn log_line(fields: &[(&str, String)], json: bool) -> String {
    if json {
        let o: serde_json::Map<String, serde_json::Value> = fields.iter().map(|(k, v)| ((*k).to_string(), serde_json::Value::String(v.clone()))).collect();
        return serde_json::Value::Object(o).to_string();
    }
    fields
        .iter()
        .map(|(k, v)| if v.is_empty() || v.contains([' ', '"', '=']) { format!("{k}={v:?}") } else { format!("{k}={v}") })
        .collect::<Vec<_>>()
        .join(" ")
}

/// A time for the log.
pub fn log_time(t: &DateTime<Utc>) -> String {
    fmt_time(t)
}

/// The Modbus measurement feed's poller state and counters, readable while it runs (health
/// `measurement_feed_modbus`; the poller is `serve::modbus_feed`).
#[derive(Debug, Clone, Default, PartialEq, Eq, serde::Serialize)]
pub struct ModbusFeedStatus {
    /// The device as configured (`host:port`).
    pub address: String,
    /// The unit id sent.
    pub unit_id: u8,
    /// A connection is open.
    pub connected: bool,
    /// An outage is going on (the last read did not give every value).
    pub in_outage: bool,
    /// Reads of the whole register list that gave every value.
    pub reads_ok: u64,
    /// Failures: connection attempts, requests that failed, timed out or drew an exception.
    pub errors: u64,
    /// Outages begun.
    pub outages: u64,
    /// Samples left out of the means: not a finite number, or outside the physically possible
    /// limits.
    pub values_refused: u64,
    /// Rows dropped because the engine had not taken the queue's worth of earlier ones
    /// (`modbus_feed::QUEUE_LEN`).
    pub rows_dropped: u64,
    /// Averaged rows handed to the engine.
    pub rows_made: u64,
    /// The last failure, with its UTC time.
    pub last_error: Option<String>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn feed_reads_appended_lines_keeps_partial_line_and_survives_truncation() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("m.csv");
        let site = crate::config::Site::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap().file;
        std::fs::write(&p, "time_utc,ghi_a_wm2\n2026-06-14T10:00:00Z,500\n2026-06-14T10:01:00Z,5").unwrap();
        let mut f = MeasurementFeed::new(&p);
        let r = f.poll(&site);
        assert_eq!(r.pieces.len(), 1);
        assert_eq!(r.pieces[0].0.times.len(), 1);
        use std::io::Write;
        let mut h = std::fs::OpenOptions::new().append(true).open(&p).unwrap();
        h.write_all(b"10\n2026-06-14T10:02:00Z,520\n").unwrap();
        let r = f.poll(&site);
        assert_eq!(r.pieces[0].0.times.len(), 2);
        assert_eq!(r.pieces[0].0.columns[0][0], 510.0);
        assert_eq!(r.pieces[0].0.lines, vec![3, 4]);
        std::fs::write(&p, "time_utc,ghi_a_wm2\n2026-06-14T10:03:00Z,530\n").unwrap();
        let r = f.poll(&site);
        assert!(r.notes.iter().any(|n| n.contains("truncated")), "{:?}", r.notes);
        assert_eq!(r.pieces[0].0.times.len(), 1);
        // A bad line is named and skipped.
        std::fs::OpenOptions::new().append(true).open(&p).unwrap().write_all(b"2026-06-14T10:04:00Z,abc\n").unwrap();
        let r = f.poll(&site);
        assert!(r.pieces.is_empty() && r.notes[0].contains("line 3"), "{:?}", r.notes);
    }

    /// One bad line (a stray value, a line cut by a power loss, a row out of order) costs only
    /// itself: the rows around it are kept with their line numbers, and each refusal names its line.
    #[test]
    fn feed_keeps_the_good_lines_around_a_bad_one() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("m.csv");
        let site = crate::config::Site::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap().file;
        let text = "time_utc,ghi_a_wm2\n2026-06-14T10:00:00Z,500\n2026-06-14T10:01:00Z,5x0\n2026-06-14T10:0\n2026-06-14T10:02:00Z,520\n2026-06-14T10:01:30Z,515\n2026-06-14T10:03:00Z,530\n";
        std::fs::write(&p, text).unwrap();
        let mut f = MeasurementFeed::new(&p);
        let now = "2026-06-14T10:05:00Z".parse().unwrap();
        let r = f.poll_at(&site, now);
        assert_eq!(r.pieces.len(), 1, "{:?}", r.notes);
        let m = &r.pieces[0].0;
        assert_eq!(m.lines, vec![2, 5, 7]);
        assert_eq!(m.columns[0], vec![500.0, 520.0, 530.0]);
        assert_eq!(f.errors, 3);
        for (line, what) in [(3, "5x0"), (4, "expected 2 comma-separated fields as in the header, got 1"), (6, "not after the previous row")] {
            assert!(r.notes.iter().any(|n| n.contains(&format!("line {line}")) && n.contains(what) && n.contains("m.csv")), "line {line}: {:?}", r.notes);
        }
    }

    /// A row dated ahead of the clock (a logger whose clock ran a year ahead) is left out and named;
    /// the readings held and those that follow with the right time are kept.
    #[test]
    fn feed_leaves_out_rows_ahead_of_the_clock() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("m.csv");
        let site = crate::config::Site::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap().file;
        std::fs::write(&p, "time_utc,ghi_a_wm2\n2026-06-14T10:00:00Z,500\n2027-06-14T10:01:00Z,510\n2026-06-14T10:01:00Z,505\n").unwrap();
        let mut f = MeasurementFeed::new(&p);
        let r = f.poll_at(&site, "2026-06-14T10:02:30Z".parse().unwrap());
        let m = &r.pieces[0].0;
        assert_eq!(m.columns[0], vec![500.0, 505.0], "{:?}", r.notes);
        assert!(r.notes.iter().any(|n| n.contains("line 3") && n.contains("ahead of the clock")), "{:?}", r.notes);
        assert_eq!(f.errors, 1);
        // Within the tolerance (120 s) a row is taken.
        use std::io::Write;
        std::fs::OpenOptions::new().append(true).open(&p).unwrap().write_all(b"2026-06-14T10:04:00Z,520\n").unwrap();
        let r = f.poll_at(&site, "2026-06-14T10:02:30Z".parse().unwrap());
        assert_eq!(r.pieces[0].0.columns[0], vec![520.0], "{:?}", r.notes);
    }

    /// With `[measurements] time_label = "end"` a live feed's rows are moved to the start of their
    /// minute, also a piece of one row (its period from the row before it in the file).
    #[test]
    fn feed_moves_end_stamped_rows_to_their_start() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("m.csv");
        let mut site = crate::config::Site::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap().file;
        site.measurements.time_label = crate::io::TimeLabel::End;
        std::fs::write(&p, "time_utc,ghi_a_wm2\n2026-06-14T10:00:30Z,500\n2026-06-14T10:01:00Z,510\n").unwrap();
        let mut f = MeasurementFeed::new(&p);
        let r = f.poll(&site);
        let t = |s: &str| s.parse::<chrono::DateTime<chrono::Utc>>().unwrap();
        assert_eq!(r.pieces[0].0.times, vec![t("2026-06-14T10:00:00Z"), t("2026-06-14T10:00:30Z")]);
        use std::io::Write;
        std::fs::OpenOptions::new().append(true).open(&p).unwrap().write_all(b"2026-06-14T10:01:30Z,520\n").unwrap();
        let r = f.poll(&site);
        assert_eq!(r.pieces[0].0.times, vec![t("2026-06-14T10:01:00Z")]);
        assert_eq!(r.pieces[0].0.period_s, 30.0);
    }

    #[test]
    fn archive_pruning_removes_only_old_dated_folders() {
        let d = tempfile::tempdir().unwrap();
        for n in ["2026-06-01", "2026-06-10", "2026-06-14", "notes"] {
            std::fs::create_dir_all(d.path().join(n)).unwrap();
        }
        let today = chrono::NaiveDate::from_ymd_opt(2026, 6, 14).unwrap();
        let gone = prune_archive(d.path(), 7, today);
        assert_eq!(gone, vec![d.path().join("2026-06-01")]);
        assert!(d.path().join("2026-06-10").is_dir() && d.path().join("notes").is_dir());
    }

    #[test]
    fn metrics_lines_are_well_formed() {
        let mut m = MetricsInput { alarm: "calm".into(), modbus_feed: Some(Default::default()), ..Default::default() };
        m.latency.observe(0.2);
        m.rejected.insert("sun too \"low\"".into(), 2);
        for l in metrics_text(&m).lines().filter(|l| !l.starts_with('#')) {
            let (name, v) = l.rsplit_once(' ').unwrap();
            assert!(v.parse::<f64>().is_ok() || v == "NaN", "{l}");
            assert!(name.starts_with("nephocast_"), "{l}");
        }
    }

    #[test]
    fn log_line_quotes() {
        assert_eq!(log_line(&[("a", "1".into()), ("b", "x y".into())], false), "a=1 b=\"x y\"");
        assert_eq!(log_line(&[("a", "1".into())], true), "{\"a\":\"1\"}");
    }
}
