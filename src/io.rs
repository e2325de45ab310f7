//! Files in and out: atomic writes, frame names with UTC times, CSV series.

use std::io::Write;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Datelike, NaiveDateTime, Utc};

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

/// Write a file atomically: write to a temporary name beside it (`.<name>.tmp<pid>`), flush, then
/// rename. A crash never leaves a half-written file under the final name; the temporary files a
/// killed run leaves are removed by [`clean_stale_temps`].
///
/// # Errors
/// Any I/O error, with the path.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    let dir = path.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir)?;
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let tmp = dir.join(format!(".{name}{TEMP_MARK}{}", std::process::id()));
    let written = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()
    })();
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(std::io::Error::new(e.kind(), format!("{}: {e}", tmp.display())));
    }
    std::fs::rename(&tmp, path).map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        std::io::Error::new(e.kind(), format!("{}: {e}", path.display()))
    })
}

/// What [`write_atomic`] puts between a file's name and the writer's process id in its temporary name.
const TEMP_MARK: &str = ".tmp";

/// Temporary files and folders older than this are stale whoever owns them \[s\].
pub const STALE_AFTER_S: u64 = 24 * 3600;

/// Whether a process with this id is running. On Linux from `/proc/<pid>`; elsewhere it cannot be
/// told, and every process counts as running (stale files then go by age alone).
pub fn process_alive(pid: u32) -> bool {
    if pid == std::process::id() {
        return true;
    }
    if cfg!(target_os = "linux") { Path::new("/proc").join(pid.to_string()).exists() } else { true }
}

/// The owner of a temporary name `<prefix><pid>` or `<prefix><pid><rest>`: the decimal digits
/// right after `prefix`.
pub(crate) fn owner_pid(name: &str, prefix: &str) -> Option<u32> {
    let rest = name.strip_prefix(prefix)?;
    let digits: String = rest.chars().take_while(char::is_ascii_digit).collect();
    digits.parse().ok()
}

/// Whether a leftover owned by `pid` at `path` is stale: its owner is gone or it is older than
/// [`STALE_AFTER_S`].
pub(crate) fn is_stale(path: &Path, pid: u32) -> bool {
    if pid == std::process::id() {
        return false;
    }
    if !process_alive(pid) {
        return true;
    }
    std::fs::symlink_metadata(path)
        .and_then(|m| m.modified())
        .ok()
        .and_then(|t| t.elapsed().ok())
        .is_some_and(|age| age.as_secs() > STALE_AFTER_S)
}

/// Remove the temporary files of [`write_atomic`] that killed runs left in `dir`: names
/// `.<name>.tmp<pid>` whose process is gone (or older than [`STALE_AFTER_S`]). Returns how many
/// were removed; an unreadable folder removes nothing.
pub fn clean_stale_temps(dir: &Path) -> usize {
    let Ok(rd) = std::fs::read_dir(dir) else { return 0 };
    let mut removed = 0;
    for e in rd.flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        if !name.starts_with('.') {
            continue;
        }
        let Some(at) = name.rfind(TEMP_MARK) else { continue };
        let tail = &name[at + TEMP_MARK.len()..];
        if tail.is_empty() || !tail.chars().all(|c| c.is_ascii_digit()) {
            continue;
        }
        let Some(pid) = owner_pid(&name[at..], TEMP_MARK) else { continue };
        let p = e.path();
        if e.file_type().is_ok_and(|t| t.is_file()) && is_stale(&p, pid) && std::fs::remove_file(&p).is_ok() {
            removed += 1;
        }
    }
    removed
}

/// A CSV table built in memory (the `csv` crate's writer, `QuoteStyle::Necessary`): every field
/// that holds a comma, a quote, CR or LF is quoted, so any text round-trips through a CSV reader;
/// plain fields are written as they are. Numbers are formatted by the caller.
pub struct CsvTable {
    w: csv::Writer<Vec<u8>>,
    /// A number being formatted ([`CsvTable::field_fixed`]).
    scratch: Vec<u8>,
}

impl std::fmt::Debug for CsvTable {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("CsvTable").finish_non_exhaustive()
    }
}

impl CsvTable {
    /// A table with this header row.
    pub fn new<I, T>(header: I) -> CsvTable
    where
        I: IntoIterator<Item = T>,
        T: AsRef<[u8]>,
    {
        let mut t = CsvTable { w: csv::WriterBuilder::new().quote_style(csv::QuoteStyle::Necessary).flexible(false).from_writer(Vec::new()), scratch: Vec::new() };
        t.row(header);
        t
    }

    /// A table whose header is one comma-separated line of plain names (e.g. `"time_utc,ghi_wm2"`).
    pub fn with_header_line(line: &str) -> CsvTable {
        CsvTable::new(line.trim_end().split(','))
    }

    /// Append a row. Writing into memory cannot fail; a row of the wrong length is a bug in the
    /// caller and panics in debug builds only.
    pub fn row<I, T>(&mut self, fields: I)
    where
        I: IntoIterator<Item = T>,
        T: AsRef<[u8]>,
    {
        let r = self.w.write_record(fields);
        debug_assert!(r.is_ok(), "CSV row: {r:?}");
    }

    /// Append one field to the row being written; [`CsvTable::end_row`] ends it. For rows of many
    /// numbers, with [`CsvTable::field_fixed`]: no `String` per field.
    pub fn field(&mut self, field: impl AsRef<[u8]>) {
        let r = self.w.write_field(field);
        debug_assert!(r.is_ok(), "CSV field: {r:?}");
    }

    /// Append a number with `decimals` digits after the point, the same text as
    /// `format!("{x:.decimals$}")`, to the row being written.
    pub fn field_fixed(&mut self, x: f64, decimals: usize) {
        let mut s = std::mem::take(&mut self.scratch);
        s.clear();
        push_fixed(&mut s, x, decimals);
        self.field(&s);
        self.scratch = s;
    }

    /// End the row that [`CsvTable::field`] and [`CsvTable::field_fixed`] wrote.
    pub fn end_row(&mut self) {
        let r = self.w.write_record(None::<&[u8]>);
        debug_assert!(r.is_ok(), "CSV row: {r:?}");
    }

    /// The table's bytes.
    pub fn into_bytes(self) -> Vec<u8> {
        self.w.into_inner().unwrap_or_default()
    }

    /// The table as text (every field is UTF-8 text).
    pub fn into_string(self) -> String {
        String::from_utf8(self.into_bytes()).unwrap_or_else(|e| String::from_utf8_lossy(e.as_bytes()).into_owned())
    }
}

pub use crate::fixed_text::push_fixed;

/// One CSV line (no header, no line end) quoted by the same writer as [`CsvTable`], for rows
/// printed one at a time (e.g. `segment`'s standard output).
pub fn csv_line<I, T>(fields: I) -> String
where
    I: IntoIterator<Item = T>,
    T: AsRef<[u8]>,
{
    let mut t = CsvTable { w: csv::WriterBuilder::new().quote_style(csv::QuoteStyle::Necessary).flexible(true).from_writer(Vec::new()), scratch: Vec::new() };
    t.row(fields);
    t.into_string().trim_end_matches(['\r', '\n']).to_string()
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

/// How frame file names carry their time (`[camera] frame_time_format`, `frame_time_zone`).
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct FrameNaming {
    /// A chrono `strftime` pattern found anywhere in the name (e.g. `%Y-%m-%d_%H-%M-%S`, `%s` for
    /// Unix seconds, `%z` for an offset the name carries); `None`: [`FRAME_NAME_PATTERN`].
    pub format: Option<String>,
    /// The zone of times whose pattern carries no offset, minutes east of UTC.
    pub offset_min: i32,
    /// Whether the pattern carries an offset or Unix seconds (then the zone does not apply).
    with_offset: bool,
}

/// A time read from a frame name must fall within these years (a pattern can match a run of
/// digits that is not the time, e.g. a camera's serial number).
const FRAME_YEARS: std::ops::RangeInclusive<i32> = 1990..=2200;

impl FrameNaming {
    /// Check a pattern (and zone): it must parse back a time it wrote, to the minute at least.
    ///
    /// # Errors
    /// What is wrong with the pattern, in words.
    pub fn new(format: Option<String>, offset_min: i32) -> Result<Self, String> {
        if let Some(f) = &format {
            use chrono::format::{Item, StrftimeItems};
            if f.trim().is_empty() || StrftimeItems::new(f).any(|i| matches!(i, Item::Error)) {
                return Err(format!("a chrono strftime pattern such as \"%Y-%m-%d_%H-%M-%S\" (got {f:?}, which does not parse as one)"));
            }
            let t0 = NaiveDateTime::parse_from_str("2026-06-14T10:17:00", "%Y-%m-%dT%H:%M:%S").map_err(|e| e.to_string())?.and_utc();
            let text = t0.format(f).to_string();
            let naming = FrameNaming { format: format.clone(), offset_min: 0, with_offset: carries_offset(f) };
            if naming.time_of(&text) != Some(t0) {
                return Err(format!("a pattern that carries the date and the time to the minute at least (a name written with {f:?} reads {text:?})"));
            }
        }
        let with_offset = format.as_deref().is_some_and(carries_offset);
        Ok(FrameNaming { format, offset_min, with_offset })
    }

    /// The UTC time in a frame file name, if it carries one.
    pub fn time_of(&self, name: &str) -> Option<DateTime<Utc>> {
        let Some(f) = &self.format else { return time_from_frame_name(name) };
        for (i, _) in name.char_indices() {
            let rest = &name[i..];
            let t = if self.with_offset {
                DateTime::parse_and_remainder(rest, f).ok().map(|(t, _)| t.with_timezone(&Utc))
            } else {
                NaiveDateTime::parse_and_remainder(rest, f).ok().map(|(t, _)| t.and_utc() - chrono::Duration::minutes(self.offset_min as i64))
            };
            if let Some(t) = t.filter(|t| FRAME_YEARS.contains(&t.year())) {
                return Some(t);
            }
        }
        None
    }

    /// What a frame name is expected to look like, for messages.
    pub fn expected(&self) -> String {
        match &self.format {
            None => FRAME_NAME_PATTERN.to_string(),
            Some(f) => {
                let sign = if self.offset_min < 0 { '-' } else { '+' };
                let m = self.offset_min.unsigned_abs();
                format!("a time as `{f}` ([camera] frame_time_format) at UTC{sign}{:02}:{:02}", m / 60, m % 60)
            }
        }
    }
}

/// Whether a chrono pattern carries an offset or Unix seconds (a time that needs no zone).
fn carries_offset(f: &str) -> bool {
    use chrono::format::{Fixed, Item, Numeric, StrftimeItems};
    StrftimeItems::new(f).any(|i| {
        matches!(
            i,
            Item::Fixed(Fixed::TimezoneOffset | Fixed::TimezoneOffsetColon | Fixed::TimezoneOffsetDoubleColon | Fixed::TimezoneOffsetTripleColon | Fixed::TimezoneOffsetColonZ | Fixed::TimezoneOffsetZ)
                | Item::Numeric(Numeric::Timestamp, _)
        )
    })
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
    list_frames_named(dir, &FrameNaming::default())
}

/// As [`list_frames`], with the times read from the names as `naming` says.
///
/// # Errors
/// When the folder cannot be read.
pub fn list_frames_named(dir: &Path, naming: &FrameNaming) -> Result<(Vec<FrameRef>, usize), InputError> {
    let rd = std::fs::read_dir(dir).map_err(|source| InputError::Read { file: dir.into(), source })?;
    let mut frames = vec![];
    let mut untimed = 0;
    for e in rd.flatten() {
        let p = e.path();
        let name = e.file_name().to_string_lossy().into_owned();
        if !is_frame_file(&name) {
            continue;
        }
        match naming.time_of(&name) {
            Some(time) => frames.push(FrameRef { time, path: p }),
            None => untimed += 1,
        }
    }
    frames.sort_by(|a, b| a.time.cmp(&b.time).then_with(|| a.path.cmp(&b.path)));
    Ok((frames, untimed))
}

/// Whether a file name is one a frames folder's listing considers: a JPEG or PNG extension (any
/// case), not a hidden file.
pub fn is_frame_file(name: &str) -> bool {
    !name.starts_with('.') && Path::new(name).extension().is_some_and(|x| ["jpg", "jpeg", "png"].contains(&x.to_string_lossy().to_lowercase().as_str()))
}

/// What a folder without timed frames holds instead, for the error that says so: the image files
/// whose names carry no time as `naming` reads them (their count and the first by name), or that it
/// holds no image files (and, when it has one, that its subfolder `frames/` may be the one meant).
pub fn untimed_hint(dir: &Path, naming: &FrameNaming) -> String {
    let Ok(rd) = std::fs::read_dir(dir) else { return String::new() };
    let mut untimed: Vec<String> = rd
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| is_frame_file(n) && naming.time_of(n).is_none())
        .collect();
    untimed.sort();
    match untimed.first() {
        Some(first) => format!("; {} image file{} without a time so read, e.g. `{first}`", untimed.len(), if untimed.len() == 1 { "" } else { "s" }),
        None if dir.join("frames").is_dir() => "; it holds no JPEG or PNG files, but has a subfolder `frames/`: give that folder".to_string(),
        None => "; it holds no JPEG or PNG files".to_string(),
    }
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
            return Err(InputError::Csv {
                file: path.into(),
                line: m.lines.get(i).copied().unwrap_or(0),
                message: format!("{column}: row {} (time {}): expected a finite number", i + 1, fmt_time(&m.times[i])),
            });
        }
        if m.times.is_empty() {
            return Err(InputError::Other { file: path.into(), message: "no rows".into() });
        }
        Ok(Series { times: m.times.clone(), values: m.columns[c].clone() })
    }

    /// Read a cloud base height series (`time_utc,cbh_m`), every value from [`CBH_MIN_M`] to
    /// [`CBH_MAX_M`].
    ///
    /// # Errors
    /// As [`Series::read_csv`], and a value out of range with its line.
    pub fn read_cbh_csv(path: &Path) -> Result<Series, InputError> {
        let m = Measurements::read_csv(path)?;
        let s = Series::read_csv(path, "cbh_m")?;
        if let Some(i) = s.values.iter().position(|v| !(*v >= CBH_MIN_M && *v <= CBH_MAX_M)) {
            return Err(InputError::Csv {
                file: path.into(),
                line: m.lines.get(i).copied().unwrap_or(0),
                message: format!("cbh_m: expected a cloud base height from {CBH_MIN_M} to {CBH_MAX_M} m, got {}", s.values[i]),
            });
        }
        Ok(s)
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

// ---------------------------------------------------------------------------------------------
// Encoders and progress

use image::ImageEncoder as _;

/// Encode a frame as JPEG.
pub fn encode_jpeg(rgb: &image::RgbImage, quality: u8) -> Vec<u8> {
    let mut buf = Vec::new();
    let enc = image::codecs::jpeg::JpegEncoder::new_with_quality(&mut buf, quality);
    enc.write_image(rgb.as_raw(), rgb.width(), rgb.height(), image::ExtendedColorType::Rgb8).expect("in-memory JPEG encoding of a valid RGB buffer");
    buf
}

/// Encode a grey image as PNG.
pub fn encode_png_gray(g: &image::GrayImage) -> Vec<u8> {
    let mut buf = Vec::new();
    image::codecs::png::PngEncoder::new(&mut buf)
        .write_image(g.as_raw(), g.width(), g.height(), image::ExtendedColorType::L8)
        .expect("in-memory PNG encoding of a valid grey buffer");
    buf
}

/// Encode an RGB image as PNG.
pub fn encode_png_rgb(g: &image::RgbImage) -> Vec<u8> {
    let mut buf = Vec::new();
    image::codecs::png::PngEncoder::new(&mut buf)
        .write_image(g.as_raw(), g.width(), g.height(), image::ExtendedColorType::Rgb8)
        .expect("in-memory PNG encoding of a valid RGB buffer");
    buf
}

/// A progress bar on standard error (hidden when `show` is false).
pub fn progress_bar(len: u64, show: bool, what: &str) -> indicatif::ProgressBar {
    if !show {
        return indicatif::ProgressBar::hidden();
    }
    let b = indicatif::ProgressBar::new(len);
    b.set_style(
        indicatif::ProgressStyle::with_template("{msg:>10} [{bar:40}] {pos}/{len} frames, {per_sec}, eta {eta}")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
            .progress_chars("=> "),
    );
    b.set_message(what.to_string());
    b
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rows written field by field: numbers as `format!` writes them, text quoted when needed.
    #[test]
    fn field_by_field_rows() {
        let mut t = CsvTable::with_header_line("a,b,c");
        t.field("x,y");
        t.field_fixed(-12.3456, 2);
        t.field_fixed(7.0, 0);
        t.end_row();
        assert_eq!(t.into_string(), "a,b,c\n\"x,y\",-12.35,7\n");
    }

    /// `csv_line` quotes like the table writer (RFC 4180: fields with a comma, quote or line break
    /// quoted, inner quotes doubled) and reads back through a CSV reader.
    #[test]
    fn csv_line_quotes_and_round_trips() {
        let fields = ["plain", "a,b", "say \"hi\"", "two\nlines"];
        let line = csv_line(fields);
        assert_eq!(line, "plain,\"a,b\",\"say \"\"hi\"\"\",\"two\nlines\"");
        let mut r = csv::ReaderBuilder::new().has_headers(false).from_reader(line.as_bytes());
        let back: Vec<String> = r.records().next().unwrap().unwrap().iter().map(String::from).collect();
        assert_eq!(back, fields);
    }

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

    /// Names in a camera's own convention (`[camera] frame_time_format`, `frame_time_zone`).
    #[test]
    fn frame_names_in_a_camera_s_own_convention() {
        let utc = |s: &str| s.parse::<DateTime<Utc>>().unwrap();
        let n = |f: &str, off: i32| FrameNaming::new(Some(f.into()), off).unwrap();
        // Local standard time an hour east of UTC, a prefix with digits and a suffix.
        assert_eq!(n("%Y%m%d_%H%M%S", 60).time_of("cam2_20231108_113000_raw.jpg"), Some(utc("2023-11-08T10:30:00Z")));
        assert_eq!(n("%Y-%m-%d %H-%M-%S%.f", 0).time_of("2023-11-08 10-30-00.250.png"), Some(utc("2023-11-08T10:30:00.250Z")));
        // The offset the name carries wins over the configured zone; Unix seconds are UTC.
        assert_eq!(n("%Y-%m-%dT%H:%M:%S%:z", 300).time_of("2023-11-08T11:30:00+01:00.jpg"), Some(utc("2023-11-08T10:30:00Z")));
        assert_eq!(n("%s", 60).time_of("img_1699439400.jpg"), Some(utc("2023-11-08T10:30:00Z")));
        // To the minute is enough; a serial number is not a time.
        assert_eq!(n("%Y%m%d%H%M", 0).time_of("sky202311081030.jpg"), Some(utc("2023-11-08T10:30:00Z")));
        assert_eq!(n("%Y%m%d_%H%M%S", 0).time_of("image_001.jpg"), None);
        // The default is the built-in pattern.
        assert_eq!(FrameNaming::default().time_of("frame_20231108T103000Z.jpg"), Some(utc("2023-11-08T10:30:00Z")));
        assert!(FrameNaming::default().expected().contains("YYYYMMDDTHHMMSS"));
        assert!(n("%Y%m%d_%H%M%S", -330).expected().contains("UTC-05:30"), "{}", n("%Y%m%d_%H%M%S", -330).expected());
        assert!(n("%Y%m%d_%H%M%S", -30).expected().contains("UTC-00:30"), "{}", n("%Y%m%d_%H%M%S", -30).expected());
        assert_eq!(n("%Y-%m-%dT%H:%M:%S%::z", 300).time_of("2023-11-08T11:30:00+01:00:00.jpg"), Some(utc("2023-11-08T10:30:00Z")));
        // Patterns that cannot carry a frame's time are refused, saying why.
        for bad in ["%H%M%S", "%Y%m%d", "", "%Q"] {
            assert!(FrameNaming::new(Some(bad.into()), 0).is_err(), "{bad:?} accepted");
        }
    }

    #[test]
    fn csv_fields_with_commas_quotes_and_line_breaks_read_back_whole() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("frames.csv");
        let nasty = ["a,b", "say \"no\"", "line one\nline two", "cr\r\nlf", "", " lead", "#hash", "plain"];
        let mut t = CsvTable::with_header_line("time_utc,file,status,reason");
        t.row(["2026-06-14T10:00:00Z", "plain.jpg", "ok", ""]);
        for (i, n) in nasty.iter().enumerate() {
            t.row(["2026-06-14T10:00:00Z", &format!("f{i},{n}.jpg"), "unreadable", n]);
        }
        write_atomic(&p, &t.into_bytes()).unwrap();
        let text = std::fs::read_to_string(&p).unwrap();
        // Plain fields are written as they are.
        assert!(text.starts_with("time_utc,file,status,reason\n2026-06-14T10:00:00Z,plain.jpg,ok,\n"), "{text}");
        let rows = crate::verify::read_rows(&p).unwrap();
        assert_eq!(rows.len(), nasty.len() + 1);
        for (i, n) in nasty.iter().enumerate() {
            assert_eq!(rows[i + 1]["reason"], *n);
            assert_eq!(rows[i + 1]["file"], format!("f{i},{n}.jpg"));
        }
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


mod measurements;
pub use crate::settings::{CBH_MAX_M, CBH_MIN_M};
pub use measurements::{ColumnScreen, KW_CHECK_CLEAR_WM2, KW_SUSPECT_MAX, MAX_CSV_COLUMNS, MAX_CSV_ROWS, Measurements, MeasurementsSection, ScreenReport, TEMP_AIR_RANGE_C, TimeLabel, WIND_SPEED_RANGE_MPS};
