//! The incoming folder over polls: which files are ready (unchanged over two polls; an empty file
//! once it has stayed empty for [`EMPTY_FILE_AFTER_S`]), which changed after they were taken.

use std::collections::{HashMap, HashSet};
use std::path::PathBuf;
use std::time::{Duration, Instant};

use chrono::{DateTime, Utc};

/// An empty frame file is judged (and refused as truncated) once it has stayed empty this long
/// \[s\]: a writer that creates the file first fills it within seconds; one that never does (a
/// failed capture, a full disk) must show in the counts and the log, not wait unseen forever.
pub(super) const EMPTY_FILE_AFTER_S: u64 = 60;

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
    /// Taken with this signature; whether the engine used it.
    Taken(Signature, bool),
}

/// The incoming folder's files over polls.
#[derive(Default)]
pub(super) struct Watcher {
    tracks: HashMap<PathBuf, (DateTime<Utc>, Track)>,
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

impl Watcher {
    pub(super) fn poll(&mut self, frames: &[crate::io::FrameRef]) -> Poll {
        self.poll_at(frames, Instant::now())
    }

    /// [`Watcher::poll`] at `now`.
    fn poll_at(&mut self, frames: &[crate::io::FrameRef], now: Instant) -> Poll {
        // Forget files that are gone (the camera's own clean-up), so the memory stays bounded.
        let present: HashSet<&PathBuf> = frames.iter().map(|f| &f.path).collect();
        self.tracks.retain(|p, _| present.contains(p));
        let newest_used = self.tracks.values().filter(|(_, t)| matches!(t, Track::Taken(_, true))).map(|(t, _)| *t).max();
        let (mut ready, mut notes) = (vec![], vec![]);
        for f in frames {
            let sig = signature(&f.path);
            let name = f.path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
            match self.tracks.get(&f.path).map(|x| x.1) {
                None => {
                    self.tracks.insert(f.path.clone(), (f.time, Track::Pending(sig, now)));
                }
                Some(Track::Pending(prev, since)) => {
                    // An empty regular file is still being written, until it has stayed empty too
                    // long; anything else that is stable is judged (a special file is refused by
                    // intake, without being opened).
                    let empty_file = sig.0 == 0 && std::fs::symlink_metadata(&f.path).is_ok_and(|m| m.is_file());
                    let waited = now.saturating_duration_since(since) >= Duration::from_secs(EMPTY_FILE_AFTER_S);
                    if prev == sig && (!empty_file || waited) {
                        ready.push((f.clone(), sig));
                    } else if prev != sig {
                        self.tracks.insert(f.path.clone(), (f.time, Track::Pending(sig, now)));
                    }
                }
                Some(Track::Taken(prev, used)) if prev != sig => {
                    self.changed += 1;
                    let newer_used = newest_used.is_some_and(|t| t > f.time);
                    if used || newer_used {
                        let why = if used { "its first version was used and stands" } else { "a newer frame was used since" };
                        notes.push(format!("{name} changed after it was taken ({} → {} bytes); not read again: {why}", prev.0, sig.0));
                        self.tracks.insert(f.path.clone(), (f.time, Track::Taken(sig, used)));
                    } else {
                        notes.push(format!("{name} changed after it was taken ({} → {} bytes); read again once it is stable", prev.0, sig.0));
                        self.tracks.insert(f.path.clone(), (f.time, Track::Pending(sig, now)));
                    }
                }
                Some(Track::Taken(..)) => {}
            }
        }
        // Every ready file counts as taken (the newest is read, the others skipped).
        for (f, sig) in &ready {
            self.tracks.insert(f.path.clone(), (f.time, Track::Taken(*sig, false)));
        }
        Poll { ready: ready.into_iter().map(|r| r.0).collect(), notes }
    }

    /// The file read this poll, and whether the engine used it.
    pub(super) fn taken(&mut self, f: &crate::io::FrameRef, used: bool) {
        if let Some((_, Track::Taken(_, u))) = self.tracks.get_mut(&f.path) {
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
}
