//! Files in and out: atomic writes, frame names with UTC times, CSV series.

use std::io::Write;
use std::path::{Path, PathBuf};

use chrono::{DateTime, NaiveDateTime, Utc};

/// An error reading an input file.
#[derive(Debug, thiserror::Error)]
pub enum InputError {
    /// The file could not be read.
    #[error("{file}: cannot read: {source}")]
    Read {
        /// The file.
        file: PathBuf,
        /// Why.
        source: std::io::Error,
    },
    /// A CSV file is malformed.
    #[error("{file}: line {line}: {message}")]
    Csv {
        /// The file.
        file: PathBuf,
        /// 1-based line number.
        line: u64,
        /// What is wrong.
        message: String,
    },
    /// Anything else wrong with an input, with its file.
    #[error("{file}: {message}")]
    Other {
        /// The file or folder.
        file: PathBuf,
        /// What is wrong.
        message: String,
    },
}

/// Write a file atomically: write to a temporary name beside it, flush, then rename.
/// A crash never leaves a half-written file under the final name.
///
/// # Errors
/// Any I/O error, with the path.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let dir = path.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)?;
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let tmp = dir.join(format!(".{name}.tmp{}", std::process::id()));
    {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
    }
    std::fs::rename(&tmp, path).map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        std::io::Error::new(e.kind(), format!("{}: {e}", path.display()))
    })
}

/// Frame file names carry their UTC time as `…YYYYMMDDTHHMMSS[.fff]Z…`, e.g.
/// `frame_20260614T101530Z.jpg` or `cam-20260614T101530.250Z.jpg`.
pub const FRAME_NAME_PATTERN: &str = "<anything>YYYYMMDDTHHMMSS[.fff]Z<anything>.jpg|.jpeg|.png";

/// The UTC time in a frame file name, if it carries one (see [`FRAME_NAME_PATTERN`]).
pub fn time_from_frame_name(name: &str) -> Option<DateTime<Utc>> {
    let b = name.as_bytes();
    // Find "dddddddd T dddddd" followed by optional .fff and Z.
    for start in 0..b.len().saturating_sub(15) {
        let s = &b[start..];
        if s.len() < 16 || !s[..8].iter().all(u8::is_ascii_digit) || s[8] != b'T' || !s[9..15].iter().all(u8::is_ascii_digit) {
            continue;
        }
        let mut end = 15;
        let mut frac = "";
        if s.get(15) == Some(&b'.') {
            let n = s[16..].iter().take_while(|c| c.is_ascii_digit()).count();
            if n == 0 {
                continue;
            }
            frac = std::str::from_utf8(&s[16..16 + n]).ok()?;
            end = 16 + n;
        }
        if s.get(end) != Some(&b'Z') {
            continue;
        }
        let base = std::str::from_utf8(&s[..15]).ok()?;
        let t = NaiveDateTime::parse_from_str(base, "%Y%m%dT%H%M%S").ok()?.and_utc();
        let nanos = if frac.is_empty() {
            0
        } else {
            let digits: String = frac.chars().chain(std::iter::repeat('0')).take(9).collect();
            digits.parse::<i64>().ok()?
        };
        return Some(t + chrono::Duration::nanoseconds(nanos));
    }
    None
}

/// The file name for a frame at a time: `frame_YYYYMMDDTHHMMSS.fffZ.<ext>`.
pub fn frame_name(time: &DateTime<Utc>, ext: &str) -> String {
    format!("frame_{}.{ext}", time.format("%Y%m%dT%H%M%S%.3fZ"))
}

/// Parse an RFC 3339 time, naming the field in the error.
///
/// # Errors
/// A message saying what was expected.
pub fn parse_time(field: &str, s: &str) -> Result<DateTime<Utc>, String> {
    DateTime::parse_from_rfc3339(s.trim())
        .map(|t| t.with_timezone(&Utc))
        .map_err(|e| format!("{field}: expected an RFC 3339 time such as 2026-06-14T10:15:00Z, got {s:?} ({e})"))
}

/// Format a time as RFC 3339 UTC with a `Z`.
pub fn fmt_time(t: &DateTime<Utc>) -> String {
    t.to_rfc3339_opts(chrono::SecondsFormat::AutoSi, true)
}

/// A frame found on disk.
#[derive(Debug, Clone)]
pub struct FrameRef {
    /// Its time.
    pub time: DateTime<Utc>,
    /// Its path.
    pub path: PathBuf,
}

/// List the frames in a folder by the times in their names, sorted by time; files without a time
/// in their name are counted in the second value.
///
/// # Errors
/// When the folder cannot be read.
pub fn list_frames(dir: &Path) -> Result<(Vec<FrameRef>, usize), InputError> {
    let rd = std::fs::read_dir(dir).map_err(|source| InputError::Read { file: dir.into(), source })?;
    let mut frames = vec![];
    let mut untimed = 0;
    for e in rd.flatten() {
        let p = e.path();
        let name = e.file_name().to_string_lossy().into_owned();
        let ext = p.extension().map(|x| x.to_string_lossy().to_lowercase()).unwrap_or_default();
        if !["jpg", "jpeg", "png"].contains(&ext.as_str()) || name.starts_with('.') {
            continue;
        }
        match time_from_frame_name(&name) {
            Some(time) => frames.push(FrameRef { time, path: p }),
            None => untimed += 1,
        }
    }
    frames.sort_by(|a, b| a.time.cmp(&b.time).then(a.path.cmp(&b.path)));
    Ok((frames, untimed))
}

/// A time series of one value, e.g. cloud base height.
#[derive(Debug, Clone)]
pub struct Series {
    /// Times, strictly increasing.
    pub times: Vec<DateTime<Utc>>,
    /// Values.
    pub values: Vec<f64>,
}

impl Series {
    /// Read a two-column CSV `time_utc,<column>`; times must be strictly increasing.
    ///
    /// # Errors
    /// Malformed lines, missing column, duplicated or unordered times, non-finite values.
    pub fn read_csv(path: &Path, column: &str) -> Result<Series, InputError> {
        let m = Measurements::read_csv(path)?;
        let c = m.column(column).ok_or_else(|| InputError::Csv { file: path.into(), line: 1, message: format!("expected a column named {column}") })?;
        if let Some(i) = m.columns[c].iter().position(|v| !v.is_finite()) {
            return Err(InputError::Other {
                file: path.into(),
                message: format!("{column}: row {} (time {}): expected a finite number", i + 1, fmt_time(&m.times[i])),
            });
        }
        if m.times.is_empty() {
            return Err(InputError::Other { file: path.into(), message: "no rows".into() });
        }
        Ok(Series { times: m.times.clone(), values: m.columns[c].clone() })
    }

    /// Linear interpolation at `t`; `None` outside the series' span (more than `slack_s` beyond an end).
    pub fn at(&self, t: &DateTime<Utc>, slack_s: f64) -> Option<f64> {
        let first = self.times.first()?;
        let last = self.times.last()?;
        if (*first - *t).num_milliseconds() as f64 / 1000.0 > slack_s || (*t - *last).num_milliseconds() as f64 / 1000.0 > slack_s {
            return None;
        }
        let i = self.times.partition_point(|x| x <= t);
        if i == 0 {
            return Some(self.values[0]);
        }
        if i >= self.times.len() {
            return self.values.last().copied();
        }
        let (t0, t1) = (self.times[i - 1], self.times[i]);
        let w = (*t - t0).num_milliseconds() as f64 / (t1 - t0).num_milliseconds() as f64;
        Some(self.values[i - 1] * (1.0 - w) + self.values[i] * w)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frame_names_round_trip() {
        let t: DateTime<Utc> = "2026-06-14T10:15:30.250Z".parse().unwrap();
        let n = frame_name(&t, "jpg");
        assert_eq!(n, "frame_20260614T101530.250Z.jpg");
        assert_eq!(time_from_frame_name(&n), Some(t));
        assert_eq!(
            time_from_frame_name("cam2-20260614T101530Z.png"),
            Some("2026-06-14T10:15:30Z".parse().unwrap())
        );
        assert_eq!(time_from_frame_name("image_001.jpg"), None);
        assert_eq!(time_from_frame_name("20261314T101530Z.jpg"), None);
    }

    #[test]
    fn atomic_write_leaves_no_temp() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("a.csv");
        write_atomic(&p, b"x,y\n").unwrap();
        assert_eq!(std::fs::read(&p).unwrap(), b"x,y\n");
        assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 1);
    }

    #[test]
    fn stuck_readings_are_recognised_looking_back() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("m.csv");
        // Minutes 0–3 vary, 4–13 hold 612 (ten equal readings), 14 varies again.
        let mut text = String::from("time_utc,ghi_a_wm2\n");
        let vals = [600.0, 605.0, 610.0, 611.0].into_iter().chain([612.0; 10]).chain([640.0]);
        for (k, v) in vals.enumerate() {
            text += &format!("2026-06-14T10:{k:02}:00Z,{v}\n");
        }
        std::fs::write(&p, text).unwrap();
        let m = Measurements::read_csv(&p).unwrap();
        let at = |min: u32| -> DateTime<Utc> { format!("2026-06-14T10:{min:02}:30Z").parse().unwrap() };
        assert!(!m.stuck_at(0, &at(12), 10), "nine equal so far");
        assert!(m.stuck_at(0, &at(13), 10), "the tenth equal reading");
        assert!(!m.stuck_at(0, &at(14), 10), "moving again");
    }

    #[test]
    fn series_rejects_duplicates_with_line() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("cbh.csv");
        std::fs::write(&p, "time_utc,cbh_m\n2026-01-01T10:00:00Z,1000\n2026-01-01T10:00:00Z,1100\n").unwrap();
        let e = Series::read_csv(&p, "cbh_m").unwrap_err().to_string();
        assert!(e.contains("line 3") && e.contains("duplicated"), "{e}");
        std::fs::write(&p, "time_utc,cbh_m\n2026-01-01T10:00:00Z,1000\n2026-01-01T10:10:00Z,2000\n").unwrap();
        let s = Series::read_csv(&p, "cbh_m").unwrap();
        let t: DateTime<Utc> = "2026-01-01T10:05:00Z".parse().unwrap();
        assert_eq!(s.at(&t, 0.0), Some(1500.0));
        let late: DateTime<Utc> = "2026-01-01T11:00:00Z".parse().unwrap();
        assert_eq!(s.at(&late, 60.0), None);
    }
}

/// A measurements CSV: a `time_utc` column and one column per sensor with its unit in the name
/// (e.g. `ghi_pyr1_wm2`); empty cells are missing values (NaN).
#[derive(Debug, Clone)]
pub struct Measurements {
    /// Times, strictly increasing.
    pub times: Vec<DateTime<Utc>>,
    /// Column names (without `time_utc`).
    pub names: Vec<String>,
    /// Values per column.
    pub columns: Vec<Vec<f64>>,
    /// Averaging period of each row \[s\] (from the time step), for centring.
    pub period_s: f64,
}

impl Measurements {
    /// Read a measurements CSV.
    ///
    /// # Errors
    /// Malformed rows, unparsable numbers, duplicated or unordered times — with the line number.
    pub fn read_csv(path: &Path) -> Result<Measurements, InputError> {
        let mut rdr = csv::ReaderBuilder::new()
            .comment(Some(b'#'))
            .from_path(path)
            .map_err(|e| InputError::Other { file: path.into(), message: e.to_string() })?;
        let headers = rdr.headers().map_err(|e| InputError::Other { file: path.into(), message: e.to_string() })?.clone();
        let ti = headers.iter().position(|h| h == "time_utc").ok_or_else(|| InputError::Csv {
            file: path.into(),
            line: 1,
            message: "expected a column named time_utc".into(),
        })?;
        let names: Vec<String> = headers.iter().enumerate().filter(|(i, _)| *i != ti).map(|(_, h)| h.to_string()).collect();
        let mut m = Measurements { times: vec![], names: names.clone(), columns: vec![vec![]; names.len()], period_s: 60.0 };
        for rec in rdr.records() {
            let rec = rec.map_err(|e| InputError::Csv {
                file: path.into(),
                line: e.position().map(|p| p.line()).unwrap_or(0),
                message: e.to_string(),
            })?;
            let line = rec.position().map(|p| p.line()).unwrap_or(0);
            let bad = |msg: String| InputError::Csv { file: path.into(), line, message: msg };
            let t = parse_time("time_utc", rec.get(ti).unwrap_or("")).map_err(bad)?;
            if let Some(last) = m.times.last()
                && t <= *last {
                    return Err(bad(format!("time_utc {} is not after the previous row: duplicated or out of order", fmt_time(&t))));
                }
            m.times.push(t);
            let mut k = 0;
            for (i, v) in rec.iter().enumerate() {
                if i == ti {
                    continue;
                }
                let v = v.trim();
                let x = if v.is_empty() || v.eq_ignore_ascii_case("nan") {
                    f64::NAN
                } else {
                    v.parse::<f64>().map_err(|_| bad(format!("{}: expected a number or an empty cell, got {v:?}", m.names[k])))?
                };
                if k < m.columns.len() {
                    m.columns[k].push(x);
                }
                k += 1;
            }
            if k != m.names.len() {
                return Err(bad(format!("expected {} values, got {k}", m.names.len())));
            }
        }
        if m.times.len() >= 2 {
            let mut steps: Vec<i64> = m.times.windows(2).map(|w| (w[1] - w[0]).num_seconds()).collect();
            steps.sort_unstable();
            m.period_s = steps[steps.len() / 2] as f64;
        }
        Ok(m)
    }

    /// Column index by name.
    pub fn column(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| n == name)
    }

    /// Whether the row covering `t` ends a run of `run` equal readings in a column above 5 (the
    /// stuck-value test of [`crate::qc`], looking back only, so it works in live mode too).
    pub fn stuck_at(&self, col: usize, t: &DateTime<Utc>, run: usize) -> bool {
        let i = self.times.partition_point(|x| x <= t);
        if i < run.max(1) {
            return false;
        }
        let v = &self.columns[col][i - run..i];
        v[0] > 5.0 && v.iter().all(|x| *x == v[0])
    }

    /// The newest reading of a column whose averaging period had ended by `t` (a live system has
    /// nothing newer), with the middle of that period; `None` when there is none within two
    /// periods of `t`.
    pub fn completed_at(&self, col: usize, t: &DateTime<Utc>) -> Option<(f64, DateTime<Utc>)> {
        let period = chrono::Duration::milliseconds((self.period_s.max(1.0) * 1000.0) as i64);
        // Rows whose period ended by t: start + period <= t.
        let i = self.times.partition_point(|x| *x + period <= *t);
        if i == 0 {
            return None;
        }
        let start = self.times[i - 1];
        if *t - start > period * 3 {
            return None;
        }
        let v = self.columns[col][i - 1];
        v.is_finite().then(|| (v, start + period / 2))
    }

    /// Value of a column at a time: the row whose averaging period (starting at its time stamp)
    /// contains `t`; NaN when none does.
    pub fn at(&self, col: usize, t: &DateTime<Utc>) -> f64 {
        let i = self.times.partition_point(|x| x <= t);
        if i == 0 {
            return f64::NAN;
        }
        let start = self.times[i - 1];
        if (*t - start).num_milliseconds() as f64 / 1000.0 < self.period_s {
            self.columns[col][i - 1]
        } else {
            f64::NAN
        }
    }
}
