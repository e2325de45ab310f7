//! The incoming folder over polls: which files are ready (unchanged over two polls; an empty file
//! once it has stayed empty for [`EMPTY_FILE_AFTER_S`]), which changed after they were taken
//! (watched for [`TAKEN_WATCH_S`]); and the folder's listing ([`Folder`]), made again only when the
//! folder changed or [`FULL_LISTING_EVERY_S`] has passed.

use std::collections::{HashMap, HashSet};
use std::ffi::OsString;
use std::path::Path;
use std::time::{Duration, Instant, SystemTime};

use chrono::{DateTime, Utc};

/// An empty frame file is judged (and refused as truncated) once it has stayed empty this long
/// \[s\]: a writer that creates the file first fills it within seconds; one that never does (a
/// failed capture, a full disk) must show in the counts and the log, not wait unseen forever.
pub(super) const EMPTY_FILE_AFTER_S: u64 = 60;

/// A taken file is watched for changes (and read again when it changed before a newer frame was
/// used) for this long after it was taken \[s\]; later it is only listed, not examined, so a
/// folder that keeps weeks of frames costs a listing per poll, not a `stat` of every file.
pub(super) const TAKEN_WATCH_S: u64 = 120;

/// The incoming folder is listed at least this often \[s\], even when its own stamp
/// ([`Folder`]) says nothing changed: a directory time that a file system or share keeps coarsely
/// or late delays a new file by this much at most.
pub(super) const FULL_LISTING_EVERY_S: u64 = 5;

/// A folder stamp is trusted to show the next change only once its times are this much older than
/// the clock when it was read \[s\]: a file added within the same tick of a coarse directory time
/// (1 s or 2 s on some file systems) would leave the stamp as it was.
const STAMP_SETTLE_S: u64 = 3;

/// A folder's stamp: modification and (on Unix) change time, size and inode. Renaming a file
/// into the folder, creating, removing or renaming one in it changes it; writing into a file does
/// not (pending files are examined every poll regardless: [`Watcher`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Stamp {
    modified: SystemTime,
    changed: Option<SystemTime>,
    len: u64,
    inode: u64,
}

impl Stamp {
    fn of(dir: &Path) -> Option<Stamp> {
        let m = std::fs::metadata(dir).ok()?;
        #[cfg(unix)]
        let (changed, inode) = {
            use std::os::unix::fs::MetadataExt;
            let ctime = u64::try_from(m.ctime()).ok().map(|s| SystemTime::UNIX_EPOCH + Duration::new(s, m.ctime_nsec().clamp(0, 999_999_999) as u32));
            (ctime, m.ino())
        };
        #[cfg(not(unix))]
        let (changed, inode) = (None, 0);
        Some(Stamp { modified: m.modified().ok()?, changed, len: m.len(), inode })
    }

    /// Whether its times are older than `wall` by [`STAMP_SETTLE_S`] (a time in the future, a
    /// share's clock ahead of ours, never is).
    fn settled(&self, wall: SystemTime) -> bool {
        let Some(limit) = wall.checked_sub(Duration::from_secs(STAMP_SETTLE_S)) else { return false };
        self.modified <= limit && self.changed.is_none_or(|c| c <= limit)
    }
}

/// The incoming folder's listing, made again only when the folder's [`Stamp`] changed, when the
/// last stamp was too recent to trust, or [`FULL_LISTING_EVERY_S`] after the last listing: with
/// 50,000 kept frames, listing the folder and reading every name was nearly all of an idle poll.
#[derive(Default)]
pub(super) struct Folder {
    frames: Vec<crate::io::FrameRef>,
    /// Image files in the last listing whose names carry no time.
    pub(super) untimed: usize,
    /// The stamp read before the last listing, when it can be trusted to show the next change.
    stamp: Option<Stamp>,
    listed_at: Option<Instant>,
}

impl Folder {
    /// Refresh the listing of `dir` if needed: `Some(frames)` when it was listed this time, `None`
    /// when it is unchanged since the last listing.
    ///
    /// # Errors
    /// The folder cannot be read.
    pub(super) fn refresh(&mut self, dir: &Path, naming: &crate::io::FrameNaming) -> Result<Option<&[crate::io::FrameRef]>, crate::io::InputError> {
        self.refresh_at(dir, naming, Instant::now(), SystemTime::now())
    }

    /// [`Folder::refresh`] at `now`, with the wall clock reading `wall`.
    fn refresh_at(&mut self, dir: &Path, naming: &crate::io::FrameNaming, now: Instant, wall: SystemTime) -> Result<Option<&[crate::io::FrameRef]>, crate::io::InputError> {
        // Read before listing: a change during the listing shows at the next poll.
        let stamp = Stamp::of(dir);
        let due = self.listed_at.is_none_or(|t| now.saturating_duration_since(t) >= Duration::from_secs(FULL_LISTING_EVERY_S));
        if !due && stamp.is_some() && stamp == self.stamp {
            return Ok(None);
        }
        let (frames, untimed) = crate::io::list_frames_named(dir, naming).inspect_err(|_| {
            self.stamp = None;
            self.listed_at = None;
        })?;
        (self.frames, self.untimed, self.listed_at) = (frames, untimed, Some(now));
        self.stamp = stamp.filter(|s| s.settled(wall));
        Ok(Some(&self.frames))
    }
}

/// A frame file's signature: size and modification time.
type Signature = (u64, Option<std::time::SystemTime>);

fn signature(p: &std::path::Path) -> Signature {
    // Of the path itself, not a link's target: a special file is judged (and refused) by intake.
    std::fs::symlink_metadata(p).map(|m| (m.len(), m.modified().ok())).unwrap_or((0, None))
}

#[derive(Debug, Clone, Copy)]
enum Track {
    /// Not taken yet: its signature at the last poll, and since when it has had it.
    Pending(Signature, Instant),
    /// Taken with this signature, when; whether the engine used it.
    Taken(Signature, Instant, bool),
}

/// The incoming folder's files over polls, by file name (one folder).
#[derive(Default)]
pub(super) struct Watcher {
    tracks: HashMap<OsString, (DateTime<Utc>, Track)>,
    /// The files the last poll examined (not taken, or taken within [`TAKEN_WATCH_S`]): all that a
    /// poll of an unchanged folder looks at.
    active: Vec<crate::io::FrameRef>,
    /// The newest frame time the engine used, among the files listed.
    newest_used: Option<DateTime<Utc>>,
    /// Files that changed after they were taken.
    pub(super) changed: usize,
}

/// What one poll found.
pub(super) struct Poll {
    /// Files ready to be read (unchanged over two polls).
    pub(super) ready: Vec<crate::io::FrameRef>,
    /// Lines to log.
    pub(super) notes: Vec<String>,
}

fn key(f: &crate::io::FrameRef) -> OsString {
    f.path.file_name().map(|n| n.to_os_string()).unwrap_or_else(|| f.path.clone().into_os_string())
}

impl Watcher {
    /// A poll over the folder's new listing, or (`None`) over the files still examined when the
    /// folder is unchanged since the last listing ([`Folder::refresh`]).
    pub(super) fn poll(&mut self, listing: Option<&[crate::io::FrameRef]>) -> Poll {
        self.poll_at(listing, Instant::now())
    }

    /// [`Watcher::poll`] at `now`.
    fn poll_at(&mut self, listing: Option<&[crate::io::FrameRef]>, now: Instant) -> Poll {
        let active = std::mem::take(&mut self.active);
        let frames = listing.unwrap_or(&active);
        let keys: Vec<OsString> = frames.iter().map(key).collect();
        if listing.is_some() {
            // Forget files that are gone (the camera's own clean-up), so the memory stays bounded.
            let present: HashSet<&OsString> = keys.iter().collect();
            self.tracks.retain(|k, _| present.contains(k));
            self.newest_used = self.tracks.values().filter(|(_, t)| matches!(t, Track::Taken(_, _, true))).map(|(t, _)| *t).max();
        }
        let newest_used = self.newest_used;
        let watch = Duration::from_secs(TAKEN_WATCH_S);
        let (mut ready, mut notes) = (vec![], vec![]);
        for (f, k) in frames.iter().zip(keys) {
            let track = self.tracks.get(&k).map(|x| x.1);
            if let Some(Track::Taken(_, at, _)) = track
                && now.saturating_duration_since(at) > watch
            {
                continue;
            }
            self.active.push(f.clone());
            let sig = signature(&f.path);
            let name = k.to_string_lossy().into_owned();
            match track {
                None => {
                    self.tracks.insert(k, (f.time, Track::Pending(sig, now)));
                }
                Some(Track::Pending(prev, since)) => {
                    // An empty regular file is still being written, until it has stayed empty too
                    // long; anything else that is stable is judged (a special file is refused by
                    // intake, without being opened).
                    let empty_file = sig.0 == 0 && std::fs::symlink_metadata(&f.path).is_ok_and(|m| m.is_file());
                    let waited = now.saturating_duration_since(since) >= Duration::from_secs(EMPTY_FILE_AFTER_S);
                    if prev == sig && (!empty_file || waited) {
                        ready.push((f.clone(), k, sig));
                    } else if prev != sig {
                        self.tracks.insert(k, (f.time, Track::Pending(sig, now)));
                    }
                }
                Some(Track::Taken(prev, at, used)) if prev != sig => {
                    self.changed += 1;
                    let newer_used = newest_used.is_some_and(|t| t > f.time);
                    if used || newer_used {
                        let why = if used { "its first version was used and stands" } else { "a newer frame was used since" };
                        notes.push(format!("{name} changed after it was taken ({} → {} bytes); not read again: {why}", prev.0, sig.0));
                        self.tracks.insert(k, (f.time, Track::Taken(sig, at, used)));
                    } else {
                        notes.push(format!("{name} changed after it was taken ({} → {} bytes); read again once it is stable", prev.0, sig.0));
                        self.tracks.insert(k, (f.time, Track::Pending(sig, now)));
                    }
                }
                Some(Track::Taken(..)) => {}
            }
        }
        // Every ready file counts as taken (the newest is read, the others skipped).
        let mut out = Vec::with_capacity(ready.len());
        for (f, k, sig) in ready {
            self.tracks.insert(k, (f.time, Track::Taken(sig, now, false)));
            out.push(f);
        }
        Poll { ready: out, notes }
    }

    /// The file read this poll, and whether the engine used it.
    pub(super) fn taken(&mut self, f: &crate::io::FrameRef, used: bool) {
        if let Some((t, Track::Taken(_, _, u))) = self.tracks.get_mut(&key(f)) {
            *u = used;
            if used {
                self.newest_used = self.newest_used.max(Some(*t));
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A file that stays empty is judged after [`EMPTY_FILE_AFTER_S`] (and then refused by intake,
    /// counted and logged); one filled in time is judged whole.
    #[test]
    fn an_empty_file_is_judged_once_it_has_stayed_empty() {
        let d = tempfile::tempdir().unwrap();
        let (empty, filled) = (d.path().join("frame_20260614T100000Z.jpg"), d.path().join("frame_20260614T100030Z.jpg"));
        std::fs::write(&empty, b"").unwrap();
        std::fs::write(&filled, b"").unwrap();
        let t: chrono::DateTime<chrono::Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let frames = [crate::io::FrameRef { time: t, path: empty.clone() }, crate::io::FrameRef { time: t + chrono::Duration::seconds(30), path: filled.clone() }];
        let mut w = Watcher::default();
        let t0 = Instant::now();
        let ready = |p: &Poll| p.ready.iter().map(|f| f.path.clone()).collect::<Vec<_>>();
        assert!(ready(&w.poll_at(Some(&frames), t0)).is_empty());
        assert!(ready(&w.poll_at(Some(&frames), t0 + Duration::from_secs(1))).is_empty());
        std::fs::write(&filled, b"whole").unwrap();
        assert!(ready(&w.poll_at(Some(&frames), t0 + Duration::from_secs(2))).is_empty(), "changed: wait for a stable size");
        assert_eq!(ready(&w.poll_at(Some(&frames), t0 + Duration::from_secs(3))), vec![filled.clone()]);
        assert!(ready(&w.poll_at(Some(&frames), t0 + Duration::from_secs(EMPTY_FILE_AFTER_S - 1))).is_empty());
        assert_eq!(ready(&w.poll_at(Some(&frames), t0 + Duration::from_secs(EMPTY_FILE_AFTER_S))), vec![empty]);
    }

    /// A taken file that changes is noted and read again while it is watched; after
    /// [`TAKEN_WATCH_S`] it is no longer examined (nor counted).
    #[test]
    fn a_taken_file_is_watched_for_a_while() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("frame_20260614T100000Z.jpg");
        std::fs::write(&p, b"half").unwrap();
        let frames = [crate::io::FrameRef { time: "2026-06-14T10:00:00Z".parse().unwrap(), path: p.clone() }];
        let mut w = Watcher::default();
        let t0 = Instant::now();
        w.poll_at(Some(&frames), t0);
        assert_eq!(w.poll_at(Some(&frames), t0 + Duration::from_secs(1)).ready.len(), 1);
        w.taken(&frames[0], false);
        std::fs::write(&p, b"half and the rest").unwrap();
        let n = w.poll_at(Some(&frames), t0 + Duration::from_secs(2));
        assert!(n.notes[0].contains("read again once it is stable"), "{:?}", n.notes);
        assert_eq!(w.poll_at(Some(&frames), t0 + Duration::from_secs(3)).ready.len(), 1);
        assert_eq!(w.changed, 1);
        w.taken(&frames[0], false);
        std::fs::write(&p, b"rewritten much later").unwrap();
        let late = w.poll_at(Some(&frames), t0 + Duration::from_secs(4 + TAKEN_WATCH_S));
        assert!(late.ready.is_empty() && late.notes.is_empty());
        assert_eq!(w.changed, 1);
    }

    /// The folder is listed again when it changed (a file renamed in), while its stamp is too
    /// recent to trust, and every [`FULL_LISTING_EVERY_S`]; not while it is unchanged.
    #[test]
    fn an_unchanged_folder_is_listed_again_only_when_changed_or_due() {
        let d = tempfile::tempdir().unwrap();
        std::fs::write(d.path().join("frame_20260614T100000Z.jpg"), b"a").unwrap();
        // An old folder time, so the rename below changes it whatever the clock's tick.
        std::fs::File::open(d.path()).unwrap().set_modified(SystemTime::now() - Duration::from_secs(3600)).unwrap();
        let naming = crate::io::FrameNaming::default();
        let (mut f, t0) = (Folder::default(), Instant::now());
        let settled = SystemTime::now() + Duration::from_secs(60);
        let listed = |f: &mut Folder, after_ms: u64, wall: SystemTime| f.refresh_at(d.path(), &naming, t0 + Duration::from_millis(after_ms), wall).unwrap().map(<[_]>::len);
        assert_eq!(listed(&mut f, 0, settled), Some(1));
        assert_eq!(listed(&mut f, 500, settled), None, "unchanged: not listed again");
        std::fs::write(d.path().join(".b.part"), b"b").unwrap();
        std::fs::rename(d.path().join(".b.part"), d.path().join("frame_20260614T100030Z.jpg")).unwrap();
        assert_eq!(listed(&mut f, 1000, SystemTime::now()), Some(2), "a file renamed in is seen at once");
        assert_eq!(listed(&mut f, 1500, SystemTime::now()), Some(2), "a stamp of the last seconds is not trusted");
        assert_eq!(listed(&mut f, 2000, settled), Some(2));
        assert_eq!(listed(&mut f, 2500, settled), None);
        assert_eq!(listed(&mut f, 2000 + FULL_LISTING_EVERY_S * 1000 - 1, settled), None);
        assert_eq!(listed(&mut f, 2000 + FULL_LISTING_EVERY_S * 1000, settled), Some(2), "listed in full when due");
    }

    /// While the folder is unchanged, a pending file is still examined (written in place, it is
    /// taken once stable) and a taken one watched for [`TAKEN_WATCH_S`]; then nothing is examined.
    #[test]
    fn an_unchanged_folder_still_has_its_pending_files_examined() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("frame_20260614T100000Z.jpg");
        std::fs::write(&p, b"half").unwrap();
        let frames = [crate::io::FrameRef { time: "2026-06-14T10:00:00Z".parse().unwrap(), path: p.clone() }];
        let (mut w, t0) = (Watcher::default(), Instant::now());
        assert!(w.poll_at(Some(&frames), t0).ready.is_empty());
        std::fs::write(&p, b"half and the rest").unwrap();
        assert!(w.poll_at(None, t0 + Duration::from_secs(1)).ready.is_empty(), "written in place: wait for a stable size");
        assert_eq!(w.poll_at(None, t0 + Duration::from_secs(2)).ready.len(), 1);
        w.taken(&frames[0], false);
        std::fs::write(&p, b"half and the rest, again").unwrap();
        assert!(w.poll_at(None, t0 + Duration::from_secs(3)).notes[0].contains("read again once it is stable"));
        assert_eq!(w.poll_at(None, t0 + Duration::from_secs(4)).ready.len(), 1);
        w.taken(&frames[0], true);
        assert_eq!(w.active.len(), 1);
        w.poll_at(None, t0 + Duration::from_secs(5 + TAKEN_WATCH_S));
        assert!(w.active.is_empty(), "a file taken long ago is no longer examined");
        assert_eq!(w.changed, 1);
    }
}
