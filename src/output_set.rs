//! A folder of outputs committed as a set.
//!
//! A run writes every output into a staging folder beside the output folder (same parent, so the
//! same file system), writes `manifest.json` (every file with its size and FNV-1a digest, and the
//! finish time) last, and then swaps the staging folder into place in one step: on Linux
//! `renameat2(…, RENAME_EXCHANGE)` when the old folder exists (a plain rename when it does not),
//! after which the old set is removed. Elsewhere the old folder is first renamed aside; a run
//! killed between the two renames leaves no output folder, and the next run puts the old set back.
//! A reader therefore sees the old complete set or the new one, never a mix.
//!
//! Names beside an output folder `out`:
//! * `.out.lock` — held (`File::try_lock`) for the whole run, removed at its end; a second run
//!   into `out` is refused;
//! * `.out.staging<pid>` — the set being written;
//! * `.out.old<pid>` — the previous set while it is swapped out (portable fallback only).
//!
//! Leftovers of killed runs (their process gone, or older than [`crate::io::STALE_AFTER_S`]) are
//! removed when the next run takes the lock, as are `io::write_atomic`'s temporary files beside
//! and inside the folder.
//!
//! Test hook: the environment variable `NEPHOCAST_TEST_PAUSE_MS` (milliseconds) makes a run sleep
//! before each file it writes and before the swap, so a test can kill it inside the write phase.
//! It has no other effect and is meant for tests only.

use std::fs::File;
use std::io::Write;
use std::path::{Path, PathBuf};

/// The manifest a committed set holds, written last.
pub const MANIFEST: &str = "manifest.json";

/// The environment variable of the test hook (see the module documentation).
pub const PAUSE_ENV: &str = "NEPHOCAST_TEST_PAUSE_MS";

/// An error committing a set of outputs.
#[derive(Debug, thiserror::Error)]
pub enum OutputSetError {
    /// Another run holds the folder's lock.
    #[error("{folder}: in use by another run (lock {lock} is held); wait for it to finish or choose another output folder")]
    InUse {
        /// The output folder.
        folder: PathBuf,
        /// Its lock file.
        lock: PathBuf,
    },
    /// The output path does not name a folder that can be replaced.
    #[error("{folder}: {message}")]
    BadFolder {
        /// The output folder.
        folder: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// A file system operation failed.
    #[error("{path}: {source}")]
    Io {
        /// The path.
        path: PathBuf,
        /// Why.
        source: std::io::Error,
    },
}

fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> OutputSetError + '_ {
    move |source| OutputSetError::Io { path: path.to_path_buf(), source }
}

/// The parent folder and file name of an output folder.
fn split(out: &Path) -> Result<(PathBuf, String), OutputSetError> {
    let name = out.file_name().map(|n| n.to_string_lossy().into_owned()).ok_or_else(|| OutputSetError::BadFolder {
        folder: out.into(),
        message: "expected a path that ends in a folder name (not `.`, `..` or `/`)".into(),
    })?;
    let parent = out.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new(".")).to_path_buf();
    Ok((parent, name))
}

/// The lock file beside an output folder.
pub fn lock_path(out: &Path) -> Option<PathBuf> {
    split(out).ok().map(|(p, n)| p.join(format!(".{n}.lock")))
}

/// An exclusive lock on an output folder, released when dropped. On Unix the lock file is
/// removed while still held (a run that opened it meanwhile finds, after locking, that the path no
/// longer names its file and starts over), so no lock file stays behind.
#[derive(Debug)]
pub struct FolderLock {
    file: File,
    path: PathBuf,
}

impl Drop for FolderLock {
    fn drop(&mut self) {
        if cfg!(unix) {
            let _ = std::fs::remove_file(&self.path);
        }
        let _ = self.file.unlock();
    }
}

/// Whether the open file is still the one at `path` (Unix: same device and inode).
#[cfg(unix)]
fn still_at(file: &File, path: &Path) -> bool {
    use std::os::unix::fs::MetadataExt;
    match (file.metadata(), std::fs::metadata(path)) {
        (Ok(a), Ok(b)) => a.dev() == b.dev() && a.ino() == b.ino(),
        _ => false,
    }
}

#[cfg(not(unix))]
fn still_at(_file: &File, _path: &Path) -> bool {
    true
}

/// Take the lock of an output folder without waiting.
///
/// # Errors
/// [`OutputSetError::InUse`] when another run holds it; an I/O error creating the lock file.
pub fn lock(out: &Path) -> Result<FolderLock, OutputSetError> {
    let (parent, name) = split(out)?;
    std::fs::create_dir_all(&parent).map_err(io_err(&parent))?;
    let lp = parent.join(format!(".{name}.lock"));
    for _ in 0..100 {
        let file = File::options().create(true).truncate(false).write(true).open(&lp).map_err(io_err(&lp))?;
        match file.try_lock() {
            Ok(()) if still_at(&file, &lp) => return Ok(FolderLock { file, path: lp }),
            // The holder removed the file between our open and lock: open the new one.
            Ok(()) => continue,
            Err(std::fs::TryLockError::WouldBlock) => return Err(OutputSetError::InUse { folder: out.into(), lock: lp }),
            Err(std::fs::TryLockError::Error(e)) => return Err(OutputSetError::Io { path: lp, source: e }),
        }
    }
    Err(OutputSetError::InUse { folder: out.into(), lock: lp })
}

/// One file of a manifest.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
pub struct ManifestFile {
    /// Path inside the set, `/`-separated.
    pub path: String,
    /// Size \[bytes\].
    pub bytes: u64,
    /// FNV-1a 64-bit digest of the content, 16 hex digits.
    pub fnv1a64: String,
}

/// The manifest of a committed set.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct Manifest {
    /// Format version (1).
    pub format: u32,
    /// When the set was finished (RFC 3339 UTC).
    pub finished_utc: String,
    /// The command that wrote it.
    pub written_by: String,
    /// Every file of the set except the manifest, sorted by path.
    pub files: Vec<ManifestFile>,
}

/// FNV-1a 64-bit digest as 16 hex digits (a cheap content check, not a cryptographic hash).
pub fn fnv1a64(bytes: &[u8]) -> String {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    for b in bytes {
        h ^= u64::from(*b);
        h = h.wrapping_mul(0x0100_0000_01b3);
    }
    format!("{h:016x}")
}

/// Check a folder against its manifest: every listed file present with its size and digest. A
/// folder without a manifest (written before sets were committed) passes.
///
/// # Errors
/// A message naming the folder and the first file that does not match.
pub fn check_manifest(dir: &Path) -> Result<(), crate::io::InputError> {
    let mp = dir.join(MANIFEST);
    let bad = |message: String| crate::io::InputError::Other { file: dir.into(), message };
    let text = match std::fs::read_to_string(&mp) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(()),
        Err(source) => return Err(crate::io::InputError::Read { file: mp, source }),
    };
    let m: Manifest = serde_json::from_str(&text).map_err(|e| bad(format!("{MANIFEST}: {e}")))?;
    for f in &m.files {
        let bytes = std::fs::read(dir.join(&f.path)).map_err(|e| bad(format!("{} listed in {MANIFEST}: {e}", f.path)))?;
        if bytes.len() as u64 != f.bytes || fnv1a64(&bytes) != f.fnv1a64 {
            return Err(bad(format!("{}: does not match {MANIFEST} (expected {} bytes, digest {}; found {} bytes, digest {})", f.path, f.bytes, f.fnv1a64, bytes.len(), fnv1a64(&bytes))));
        }
    }
    Ok(())
}

/// Add or replace one file of a committed set in place (atomically per file) and update its
/// manifest to match. The caller holds the folder's [`lock`]. Returns the file's path.
///
/// # Errors
/// An I/O error, with the path; a manifest that cannot be read.
pub fn update_file(dir: &Path, rel: &str, bytes: &[u8]) -> Result<PathBuf, OutputSetError> {
    let p = dir.join(rel);
    crate::io::write_atomic(&p, bytes).map_err(io_err(&p))?;
    let mp = dir.join(MANIFEST);
    if let Ok(text) = std::fs::read_to_string(&mp) {
        let mut m: Manifest = serde_json::from_str(&text)
            .map_err(|e| OutputSetError::Io { path: mp.clone(), source: std::io::Error::new(std::io::ErrorKind::InvalidData, e) })?;
        m.files.retain(|f| f.path != rel);
        m.files.push(ManifestFile { path: rel.into(), bytes: bytes.len() as u64, fnv1a64: fnv1a64(bytes) });
        m.files.sort_by(|a, b| a.path.cmp(&b.path));
        crate::io::write_atomic(&mp, serde_json::to_string_pretty(&m).unwrap_or_default().as_bytes()).map_err(io_err(&mp))?;
    }
    Ok(p)
}

fn pause() {
    if let Some(ms) = std::env::var(PAUSE_ENV).ok().and_then(|v| v.parse::<u64>().ok()) {
        std::thread::sleep(std::time::Duration::from_millis(ms.min(10_000)));
    }
}

/// A set of outputs being written; see the module documentation. Dropped without
/// [`OutputSet::commit`], it removes its staging folder and leaves the old set as it was.
#[derive(Debug)]
pub struct OutputSet {
    out: PathBuf,
    parent: PathBuf,
    name: String,
    staging: PathBuf,
    files: Vec<ManifestFile>,
    written_by: String,
    committed: bool,
    _lock: FolderLock,
}

impl OutputSet {
    /// Lock `out`, clean up what killed runs left, and start an empty staging folder.
    ///
    /// # Errors
    /// The folder is in use, is not a folder, or the staging folder cannot be made.
    pub fn begin(out: &Path, written_by: &str) -> Result<OutputSet, OutputSetError> {
        let lock = lock(out)?;
        let (parent, name) = split(out)?;
        if out.exists() && !out.is_dir() {
            return Err(OutputSetError::BadFolder { folder: out.into(), message: "exists and is not a folder".into() });
        }
        recover(out, &parent, &name);
        let staging = parent.join(format!(".{name}.staging{}", std::process::id()));
        if staging.exists() {
            std::fs::remove_dir_all(&staging).map_err(io_err(&staging))?;
        }
        std::fs::create_dir(&staging).map_err(io_err(&staging))?;
        Ok(OutputSet { out: out.into(), parent, name, staging, files: vec![], written_by: written_by.into(), committed: false, _lock: lock })
    }

    /// The staging folder (read what was written so far from here, e.g. for a report).
    pub fn dir(&self) -> &Path {
        &self.staging
    }

    /// The output folder the set will replace.
    pub fn out(&self) -> &Path {
        &self.out
    }

    /// Write a file of the set (`rel` is `/`-separated inside the folder). Returns its final path.
    ///
    /// # Errors
    /// An I/O error, with the path.
    pub fn write(&mut self, rel: &str, bytes: &[u8]) -> Result<PathBuf, OutputSetError> {
        pause();
        let p = self.staging.join(rel);
        if let Some(d) = p.parent() {
            std::fs::create_dir_all(d).map_err(io_err(d))?;
        }
        let mut f = File::create(&p).map_err(io_err(&p))?;
        f.write_all(bytes).map_err(io_err(&p))?;
        f.sync_all().map_err(io_err(&p))?;
        self.files.retain(|m| m.path != rel);
        self.files.push(ManifestFile { path: rel.into(), bytes: bytes.len() as u64, fnv1a64: fnv1a64(bytes) });
        Ok(self.out.join(rel))
    }

    /// Record a file that something else wrote into [`OutputSet::dir`] (e.g. a report).
    ///
    /// # Errors
    /// The file cannot be read.
    pub fn adopt(&mut self, rel: &str) -> Result<PathBuf, OutputSetError> {
        let p = self.staging.join(rel);
        let bytes = std::fs::read(&p).map_err(io_err(&p))?;
        self.files.retain(|m| m.path != rel);
        self.files.push(ManifestFile { path: rel.into(), bytes: bytes.len() as u64, fnv1a64: fnv1a64(&bytes) });
        Ok(self.out.join(rel))
    }

    /// Write the manifest and swap the set into place. Returns the final paths of the files.
    ///
    /// # Errors
    /// An I/O error, with the path; the old set then stays in place.
    pub fn commit(mut self) -> Result<Vec<PathBuf>, OutputSetError> {
        self.files.sort_by(|a, b| a.path.cmp(&b.path));
        let m = Manifest {
            format: 1,
            finished_utc: crate::io::fmt_time(&chrono::Utc::now()),
            written_by: self.written_by.clone(),
            files: self.files.clone(),
        };
        let text = serde_json::to_string_pretty(&m).unwrap_or_default();
        pause();
        let mp = self.staging.join(MANIFEST);
        {
            let mut f = File::create(&mp).map_err(io_err(&mp))?;
            f.write_all(text.as_bytes()).map_err(io_err(&mp))?;
            f.sync_all().map_err(io_err(&mp))?;
        }
        sync_dir(&self.staging);
        pause();
        swap_into_place(&self.staging, &self.out, &self.parent, &self.name)?;
        self.committed = true;
        sync_dir(&self.parent);
        // The staging path now holds the old set (or nothing).
        if self.staging.exists() {
            let _ = std::fs::remove_dir_all(&self.staging);
        }
        Ok(self.files.iter().map(|f| self.out.join(&f.path)).collect())
    }
}

impl Drop for OutputSet {
    fn drop(&mut self) {
        if !self.committed {
            let _ = std::fs::remove_dir_all(&self.staging);
        }
    }
}

fn sync_dir(dir: &Path) {
    if let Ok(f) = File::open(dir) {
        let _ = f.sync_all();
    }
}

/// Put `staging` in place of `out`.
fn swap_into_place(staging: &Path, out: &Path, parent: &Path, name: &str) -> Result<(), OutputSetError> {
    if !out.exists() {
        return std::fs::rename(staging, out).map_err(io_err(out));
    }
    #[cfg(target_os = "linux")]
    {
        match exchange(staging, out) {
            Ok(()) => return Ok(()),
            // File systems without RENAME_EXCHANGE: use the fallback.
            Err(e) if matches!(e.raw_os_error(), Some(libc::EINVAL) | Some(libc::ENOSYS) | Some(libc::EOPNOTSUPP)) => {}
            Err(source) => return Err(OutputSetError::Io { path: out.into(), source }),
        }
    }
    swap_portable(staging, out, parent, name)
}

/// The portable swap: the old set aside, the new one in, the old one to the staging path.
fn swap_portable(staging: &Path, out: &Path, parent: &Path, name: &str) -> Result<(), OutputSetError> {
    let old = parent.join(format!(".{name}.old{}", std::process::id()));
    std::fs::rename(out, &old).map_err(io_err(out))?;
    if let Err(source) = std::fs::rename(staging, out) {
        let _ = std::fs::rename(&old, out);
        return Err(OutputSetError::Io { path: out.into(), source });
    }
    // The staging path is gone; move the old set there for the caller to remove.
    std::fs::rename(&old, staging).map_err(io_err(&old))
}

/// Exchange two paths atomically (Linux `renameat2` with `RENAME_EXCHANGE`).
#[cfg(target_os = "linux")]
fn exchange(a: &Path, b: &Path) -> std::io::Result<()> {
    use std::os::unix::ffi::OsStrExt;
    let ca = std::ffi::CString::new(a.as_os_str().as_bytes()).map_err(|_| std::io::Error::from(std::io::ErrorKind::InvalidInput))?;
    let cb = std::ffi::CString::new(b.as_os_str().as_bytes()).map_err(|_| std::io::Error::from(std::io::ErrorKind::InvalidInput))?;
    // SAFETY: both arguments are valid NUL-terminated paths that outlive the call.
    let r = unsafe { libc::renameat2(libc::AT_FDCWD, ca.as_ptr(), libc::AT_FDCWD, cb.as_ptr(), libc::RENAME_EXCHANGE) };
    if r == 0 { Ok(()) } else { Err(std::io::Error::last_os_error()) }
}

/// Under the lock: put back an old set a killed portable swap left aside, then remove the staging
/// and old folders and temporary files of runs that are gone.
fn recover(out: &Path, parent: &Path, name: &str) {
    let staging_prefix = format!(".{name}.staging");
    let old_prefix = format!(".{name}.old");
    let mut leftovers = vec![];
    if let Ok(rd) = std::fs::read_dir(parent) {
        for e in rd.flatten() {
            let n = e.file_name().to_string_lossy().into_owned();
            for prefix in [&staging_prefix, &old_prefix] {
                if let Some(pid) = crate::io::owner_pid(&n, prefix)
                    && n[prefix.len()..].chars().all(|c| c.is_ascii_digit())
                    && crate::io::is_stale(&e.path(), pid)
                {
                    leftovers.push((prefix == &old_prefix, e.path()));
                }
            }
        }
    }
    for (is_old, p) in leftovers {
        if is_old && !out.exists() && std::fs::rename(&p, out).is_ok() {
            continue;
        }
        let _ = std::fs::remove_dir_all(&p);
    }
    crate::io::clean_stale_temps(parent);
    if out.is_dir() {
        crate::io::clean_stale_temps(out);
    }
}

/// The leftovers of runs beside an output folder (staging and old folders, and temporary files):
/// their names. For tests and diagnostics.
pub fn leftovers(out: &Path) -> Vec<String> {
    let Ok((parent, name)) = split(out) else { return vec![] };
    let mut v: Vec<String> = std::fs::read_dir(&parent)
        .map(|rd| {
            rd.flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .filter(|n| n.starts_with(&format!(".{name}.staging")) || n.starts_with(&format!(".{name}.old")) || n.contains(".tmp"))
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

#[cfg(test)]
mod tests {
    use super::*;

    fn listing(dir: &Path) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(dir).unwrap().flatten().map(|e| e.file_name().to_string_lossy().into_owned()).collect();
        v.sort();
        v
    }

    #[test]
    fn commit_replaces_the_whole_set_and_writes_a_manifest() {
        let d = tempfile::tempdir().unwrap();
        let out = d.path().join("out");
        let mut s = OutputSet::begin(&out, "test").unwrap();
        s.write("a.csv", b"x\n1\n").unwrap();
        s.write("sub/b.png", b"png").unwrap();
        s.commit().unwrap();
        assert_eq!(listing(&out), ["a.csv", "manifest.json", "sub"]);
        check_manifest(&out).unwrap();
        let mut s = OutputSet::begin(&out, "test").unwrap();
        s.write("c.csv", b"y\n2\n").unwrap();
        s.commit().unwrap();
        assert_eq!(listing(&out), ["c.csv", "manifest.json"]);
        check_manifest(&out).unwrap();
        assert_eq!(leftovers(&out), Vec::<String>::new());
        assert!(!lock_path(&out).unwrap().exists());
        // A changed file is noticed.
        std::fs::write(out.join("c.csv"), b"y\n3\n").unwrap();
        assert!(check_manifest(&out).unwrap_err().to_string().contains("c.csv"));
    }

    #[test]
    fn a_dropped_set_leaves_the_old_one() {
        let d = tempfile::tempdir().unwrap();
        let out = d.path().join("out");
        let mut s = OutputSet::begin(&out, "test").unwrap();
        s.write("a.csv", b"old\n").unwrap();
        s.commit().unwrap();
        let mut s = OutputSet::begin(&out, "test").unwrap();
        s.write("a.csv", b"new\n").unwrap();
        drop(s);
        assert_eq!(std::fs::read(out.join("a.csv")).unwrap(), b"old\n");
        assert_eq!(leftovers(&out), Vec::<String>::new());
    }

    #[test]
    fn a_second_run_is_refused_while_the_first_holds_the_folder() {
        let d = tempfile::tempdir().unwrap();
        let out = d.path().join("out");
        let first = OutputSet::begin(&out, "test").unwrap();
        let e = OutputSet::begin(&out, "test").unwrap_err();
        assert!(matches!(e, OutputSetError::InUse { .. }), "{e}");
        let msg = e.to_string();
        assert!(msg.contains(&out.display().to_string()) && msg.contains("in use"), "{msg}");
        assert!(lock(&out).is_err());
        drop(first);
        OutputSet::begin(&out, "test").unwrap().commit().unwrap();
    }

    #[test]
    fn leftovers_of_dead_runs_are_removed_and_live_ones_kept() {
        let d = tempfile::tempdir().unwrap();
        let out = d.path().join("out");
        std::fs::create_dir(&out).unwrap();
        std::fs::write(out.join("a.csv"), b"old\n").unwrap();
        // A process id that is not running: beyond the kernel's pid_max (at most 2^22).
        let dead = 9_999_999u32;
        let mine = std::process::id();
        std::fs::create_dir(d.path().join(format!(".out.staging{dead}"))).unwrap();
        std::fs::write(d.path().join(format!(".out.staging{dead}/forecasts.csv")), b"half").unwrap();
        std::fs::write(d.path().join(format!(".x.csv.tmp{dead}")), b"half").unwrap();
        std::fs::write(out.join(format!(".a.csv.tmp{dead}")), b"half").unwrap();
        // Our own process counts as alive: its temp file stays.
        std::fs::write(d.path().join(format!(".y.csv.tmp{mine}")), b"busy").unwrap();
        // Something that only looks alike stays.
        std::fs::write(d.path().join(".notes.tmpfile"), b"keep").unwrap();
        let s = OutputSet::begin(&out, "test").unwrap();
        let names = listing(d.path());
        assert!(!names.iter().any(|n| n.contains(&dead.to_string())), "{names:?}");
        assert!(names.contains(&format!(".y.csv.tmp{mine}")) && names.contains(&".notes.tmpfile".to_string()), "{names:?}");
        assert_eq!(listing(&out), ["a.csv"]);
        drop(s);
    }

    #[test]
    fn an_old_set_left_aside_by_a_killed_swap_is_put_back() {
        let d = tempfile::tempdir().unwrap();
        let out = d.path().join("out");
        let aside = d.path().join(".out.old9999999");
        std::fs::create_dir(&aside).unwrap();
        std::fs::write(aside.join("a.csv"), b"old\n").unwrap();
        let s = OutputSet::begin(&out, "test").unwrap();
        assert_eq!(std::fs::read(out.join("a.csv")).unwrap(), b"old\n");
        assert!(!aside.exists());
        drop(s);
    }

    #[test]
    fn the_portable_swap_leaves_the_new_set_in_place_and_the_old_at_the_staging_path() {
        let d = tempfile::tempdir().unwrap();
        let (out, staging) = (d.path().join("out"), d.path().join(".out.staging1"));
        std::fs::create_dir(&out).unwrap();
        std::fs::write(out.join("a.csv"), b"old\n").unwrap();
        std::fs::create_dir(&staging).unwrap();
        std::fs::write(staging.join("a.csv"), b"new\n").unwrap();
        swap_portable(&staging, &out, d.path(), "out").unwrap();
        assert_eq!(std::fs::read(out.join("a.csv")).unwrap(), b"new\n");
        assert_eq!(std::fs::read(staging.join("a.csv")).unwrap(), b"old\n");
        assert_eq!(listing(d.path()), [".out.staging1", "out"]);
    }

    #[test]
    fn a_path_without_a_folder_name_is_refused() {
        assert!(matches!(OutputSet::begin(Path::new(".."), "test"), Err(OutputSetError::BadFolder { .. })));
    }
}
