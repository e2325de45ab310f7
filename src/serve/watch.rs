//! The incoming folder over polls: which files are ready (unchanged over two polls; an empty file
//! once it has stayed empty for [`EMPTY_FILE_AFTER_S`]), which changed after they were taken
//! (watched for [`TAKEN_WATCH_S`]).

use std::collections::{HashMap, HashSet};
use std::ffi::OsString;
use std::time::{Duration, Instant};

use chrono::{DateTime, Utc};

/// An empty frame file is judged (and refused as truncated) once it has stayed empty this long
/// \[s\]: a writer that creates the file first fills it within seconds; one that never does (a
/// failed capture, a full disk) must show in the counts and the log, not wait unseen forever.
pub(super) const EMPTY_FILE_AFTER_S: u64 = 60;

/// A taken file is watched for changes (and read again when it changed before a newer frame was
/// used) for this long after it was taken \[s\]; later it is only listed, not examined, so a
/// folder that keeps weeks of frames costs a listing per poll, not a `stat` of every file.
pub(super) const TAKEN_WATCH_S: u64 = 120;

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
    pub(super) fn poll(&mut self, frames: &[crate::io::FrameRef]) -> Poll {
        self.poll_at(frames, Instant::now())
    }

    /// [`Watcher::poll`] at `now`.
    fn poll_at(&mut self, frames: &[crate::io::FrameRef], now: Instant) -> Poll {
        let keys: Vec<OsString> = frames.iter().map(key).collect();
        // Forget files that are gone (the camera's own clean-up), so the memory stays bounded.
        let present: HashSet<&OsString> = keys.iter().collect();
        self.tracks.retain(|k, _| present.contains(k));
        let newest_used = self.tracks.values().filter(|(_, t)| matches!(t, Track::Taken(_, _, true))).map(|(t, _)| *t).max();
        let watch = Duration::from_secs(TAKEN_WATCH_S);
        let (mut ready, mut notes) = (vec![], vec![]);
        for (f, k) in frames.iter().zip(keys) {
            let track = self.tracks.get(&k).map(|x| x.1);
            if let Some(Track::Taken(_, at, _)) = track
                && now.saturating_duration_since(at) > watch
            {
                continue;
            }
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
        if let Some((_, Track::Taken(_, _, u))) = self.tracks.get_mut(&key(f)) {
            *u = used;
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
        assert!(ready(&w.poll_at(&frames, t0)).is_empty());
        assert!(ready(&w.poll_at(&frames, t0 + Duration::from_secs(1))).is_empty());
        std::fs::write(&filled, b"whole").unwrap();
        assert!(ready(&w.poll_at(&frames, t0 + Duration::from_secs(2))).is_empty(), "changed: wait for a stable size");
        assert_eq!(ready(&w.poll_at(&frames, t0 + Duration::from_secs(3))), vec![filled.clone()]);
        assert!(ready(&w.poll_at(&frames, t0 + Duration::from_secs(EMPTY_FILE_AFTER_S - 1))).is_empty());
        assert_eq!(ready(&w.poll_at(&frames, t0 + Duration::from_secs(EMPTY_FILE_AFTER_S))), vec![empty]);
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
        w.poll_at(&frames, t0);
        assert_eq!(w.poll_at(&frames, t0 + Duration::from_secs(1)).ready.len(), 1);
        w.taken(&frames[0], false);
        std::fs::write(&p, b"half and the rest").unwrap();
        let n = w.poll_at(&frames, t0 + Duration::from_secs(2));
        assert!(n.notes[0].contains("read again once it is stable"), "{:?}", n.notes);
        assert_eq!(w.poll_at(&frames, t0 + Duration::from_secs(3)).ready.len(), 1);
        assert_eq!(w.changed, 1);
        w.taken(&frames[0], false);
        std::fs::write(&p, b"rewritten much later").unwrap();
        let late = w.poll_at(&frames, t0 + Duration::from_secs(4 + TAKEN_WATCH_S));
        assert!(late.ready.is_empty() && late.notes.is_empty());
        assert_eq!(w.changed, 1);
    }
}
