//! The per-frame log lines of `nephocast live`, read from the running command's standard error as
//! an operator's `grep` would: one `event=frame` line per frame with the frame's file and time, its
//! outcome (and reason when rejected), the alarm state, the health state, `data_valid` and the
//! frame age; an `event=health` line when the health changes; an `event=untimed` line naming a file
//! without a time. The same keys come as JSON objects with `--log-json`.
#![cfg(feature = "cli")]
mod common;
use std::collections::BTreeMap;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc::{Receiver, RecvTimeoutError};
use std::time::Duration;

use chrono::{DateTime, Utc};

const BIN: &str = env!("CARGO_BIN_EXE_nephocast");
const ALARM_STATES: [&str; 4] = ["calm", "caution", "alert", "variable"];

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

/// The demo site moved in longitude so that the sun is high now.
fn site_for_now(dir: &Path) -> PathBuf {
    common::demo_site_for_now(dir, 5.0)
}

/// Split a `key=value key="quoted value"` line (values quoted as Rust strings are).
fn fields(line: &str) -> BTreeMap<String, String> {
    let mut out = BTreeMap::new();
    let mut rest = line.trim();
    while let Some(eq) = rest.find('=') {
        let key = rest[..eq].trim().to_string();
        let after = &rest[eq + 1..];
        let (value, next) = if let Some(q) = after.strip_prefix('"') {
            let mut v = String::new();
            let mut chars = q.char_indices();
            let mut end = q.len();
            while let Some((i, c)) = chars.next() {
                match c {
                    '\\' => {
                        if let Some((_, e)) = chars.next() {
                            v.push(e);
                        }
                    }
                    '"' => {
                        end = i + 1;
                        break;
                    }
                    c => v.push(c),
                }
            }
            (v, &q[end..])
        } else {
            let end = after.find(' ').unwrap_or(after.len());
            (after[..end].to_string(), &after[end..])
        };
        out.insert(key, value);
        rest = next.trim_start();
    }
    out
}

/// A running `nephocast live` whose standard error arrives line by line.
struct Live {
    child: Child,
    lines: Receiver<String>,
    seen: Vec<String>,
}

impl Live {
    fn start(site: &Path, d: &Path, extra: &[&str]) -> Live {
        let mut child = Command::new(BIN)
            .args(["live", "--bind", "127.0.0.1:0", "--poll-ms", "50", "--frame-interval-s", "2", "--site"])
            .arg(site)
            .arg("--incoming")
            .arg(d.join("incoming"))
            .arg("--db")
            .arg(d.join("live.sqlite"))
            .args(extra)
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let err = child.stderr.take().unwrap();
        let (tx, lines) = std::sync::mpsc::channel();
        std::thread::spawn(move || {
            for l in BufReader::new(err).lines().map_while(Result::ok) {
                if tx.send(l).is_err() {
                    break;
                }
            }
        });
        Live { child, lines, seen: vec![] }
    }

    /// The first line so far holding `needle`, or the next one to come (a bounded wait: a safety
    /// stop, not a timing assertion). Lines of the engine and the health timer may interleave.
    fn line_with(&mut self, needle: &str) -> String {
        if let Some(l) = self.seen.iter().find(|l| l.contains(needle)) {
            return l.clone();
        }
        loop {
            match self.lines.recv_timeout(Duration::from_secs(120)) {
                Ok(l) => {
                    self.seen.push(l.clone());
                    if l.contains(needle) {
                        return l;
                    }
                }
                Err(RecvTimeoutError::Timeout | RecvTimeoutError::Disconnected) => panic!("no line with {needle:?}; seen:\n{}", self.seen.join("\n")),
            }
        }
    }

    fn stop(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// Copy `src` into `incoming` under the name of `t` (by rename, as a camera does).
fn drop_frame(src: &Path, incoming: &Path, t: DateTime<Utc>) -> String {
    let name = nephocast::io::frame_name(&t, "jpg");
    let tmp = incoming.join(format!(".{name}.part"));
    std::fs::copy(src, &tmp).unwrap();
    std::fs::rename(&tmp, incoming.join(&name)).unwrap();
    name
}

/// The time a frame's name carries, as the log writes times.
fn name_time(name: &str) -> String {
    nephocast::io::fmt_time(&nephocast::io::time_from_frame_name(name).unwrap())
}

fn age(f: &BTreeMap<String, String>) -> f64 {
    f.get("frame_age_s").and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN)
}

#[test]
fn per_frame_log_lines_carry_time_age_health_alarm_and_data_valid() {
    let d = tempfile::tempdir().unwrap();
    let incoming = d.path().join("incoming");
    std::fs::create_dir_all(&incoming).unwrap();
    let site = site_for_now(d.path());
    let mut frames: Vec<PathBuf> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    let mut live = Live::start(&site, d.path(), &[]);

    // A frame 100 s old: used, but older than 2 × 2 s + 60 s, so stale and not valid.
    let t_old = Utc::now() - chrono::Duration::seconds(100);
    let name = drop_frame(&frames[0], &incoming, t_old);
    let l = live.line_with(&format!("file={name}"));
    assert!(l.starts_with("event=frame "), "{l}");
    let f = fields(&l);
    assert_eq!(f["time"], name_time(&name), "{l}");
    assert_eq!(f["outcome"], "used", "{l}");
    assert_eq!((f["health"].as_str(), f["data_valid"].as_str()), ("stale", "false"), "{l}");
    assert!((100.0..130.0).contains(&age(&f)), "frame age: {l}");
    assert!(ALARM_STATES.contains(&f["alarm"].as_str()), "{l}");
    assert!(f["latency_ms"].parse::<f64>().is_ok() && f["cloud_fraction"].parse::<f64>().is_ok(), "{l}");
    for key in ["event", "file", "time", "outcome", "reason", "skipped", "latency_ms", "cloud_fraction", "alarm", "health", "data_valid", "frame_age_s", "measurement_age_s"] {
        assert!(f.contains_key(key), "no {key}: {l}");
    }

    // A frame of now: used, health ok and valid, a few seconds old at most; the health change is
    // logged on its own line.
    let name = drop_frame(&frames[1], &incoming, Utc::now());
    let l = live.line_with(&format!("file={name}"));
    let f = fields(&l);
    assert_eq!((f["outcome"].as_str(), f["health"].as_str(), f["data_valid"].as_str()), ("used", "ok", "true"), "{l}");
    assert!((0.0..30.0).contains(&age(&f)), "frame age: {l}");
    let h = fields(&live.line_with("event=health state=ok"));
    assert_eq!((h["state"].as_str(), h["previous"].as_str(), h["data_valid"].as_str()), ("ok", "stale", "true"), "{h:?}");

    // A corrupt file with a time in its name: rejected with its reason, in the same format.
    let bad = nephocast::io::frame_name(&(Utc::now() + chrono::Duration::seconds(1)), "jpg");
    std::fs::write(incoming.join(format!(".{bad}.part")), b"\xFF\xD8 not a picture").unwrap();
    std::fs::rename(incoming.join(format!(".{bad}.part")), incoming.join(&bad)).unwrap();
    let l = live.line_with(&format!("file={bad}"));
    let f = fields(&l);
    assert_eq!(f["event"], "frame", "{l}");
    assert_eq!(f["outcome"], "rejected", "{l}");
    assert!(!f["reason"].is_empty(), "{l}");
    assert!(f.contains_key("data_valid") && f.contains_key("health") && ALARM_STATES.contains(&f["alarm"].as_str()), "{l}");

    // A file without a time in its name is named.
    std::fs::write(incoming.join("snapshot.jpg"), b"x").unwrap();
    let f = fields(&live.line_with("event=untimed"));
    assert_eq!(f["file"], "snapshot.jpg");
    assert!(f["reason"].starts_with("no time in the name"), "{f:?}");
    live.stop();

    // --log-json: the same keys, one JSON object per line.
    let d2 = tempfile::tempdir().unwrap();
    std::fs::create_dir_all(d2.path().join("incoming")).unwrap();
    let mut live = Live::start(&site, d2.path(), &["--log-json"]);
    let t = Utc::now();
    let name = drop_frame(&frames[2], &d2.path().join("incoming"), t);
    let l = live.line_with(&format!("\"file\":\"{name}\""));
    let j: serde_json::Value = serde_json::from_str(&l).unwrap_or_else(|e| panic!("{e}: {l}"));
    assert_eq!(j["event"], "frame");
    assert_eq!(j["time"], name_time(&name));
    assert_eq!((j["outcome"].as_str(), j["health"].as_str(), j["data_valid"].as_str()), (Some("used"), Some("ok"), Some("true")), "{l}");
    assert!(j["frame_age_s"].as_str().and_then(|v| v.parse::<f64>().ok()).is_some_and(|a| (0.0..30.0).contains(&a)), "{l}");
    assert!(ALARM_STATES.contains(&j["alarm"].as_str().unwrap_or("")), "{l}");
    live.stop();
}
