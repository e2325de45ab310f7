//! Soak: as many frames as a camera at 30 s makes in 24 hours (2,880), fed to the live service as
//! fast as it takes them (10 s apart in camera time, so that all of them fall in daylight, when the
//! engine works). Resident memory, open files and disk use (alarm log with its write-ahead log, and
//! the incoming folder) are recorded every 10 % (figures in the test output, not a timed
//! assertion); memory and open files must stay flat, the history within the configured retention,
//! and the watcher forgets removed files.
#![cfg(feature = "server")]
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use nephocast::serve::{LiveOptions, start};

fn rss_kb() -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| s.lines().find(|l| l.starts_with("VmRSS:")).and_then(|l| l.split_whitespace().nth(1)?.parse().ok()))
        .unwrap_or(0)
}

/// Frames judged so far (processed, skipped or rejected), from the health API.
fn judged(addr: std::net::SocketAddr) -> u64 {
    use std::io::{Read, Write};
    let Ok(mut s) = std::net::TcpStream::connect(addr) else { return 0 };
    let _ = s.set_read_timeout(Some(Duration::from_secs(10)));
    let _ = write!(s, "GET /api/health HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n");
    let mut out = String::new();
    let _ = s.read_to_string(&mut out);
    let v: serde_json::Value = out.split("\r\n\r\n").nth(1).and_then(|b| serde_json::from_str(b).ok()).unwrap_or_default();
    let n = |k: &str| v[k].as_u64().unwrap_or(0);
    n("frames_processed") + n("frames_skipped") + v["frames_rejected"].as_object().map(|o| o.values().filter_map(|x| x.as_u64()).sum()).unwrap_or(0)
}

#[test]
fn a_day_of_frames_stays_flat_and_within_history() {
    let d = tempfile::tempdir().unwrap();
    let incoming = d.path().join("incoming");
    std::fs::create_dir_all(&incoming).unwrap();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let keep_s = 3600;
    let h = start(LiveOptions {
        site: demo.join("site.toml"),
        incoming: incoming.clone(),
        db: d.path().join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: None,
        server: Default::default(),
        keep_s,
        poll_ms: 5,
        overlay_every: 20,
        health: Default::default(),
    })
    .unwrap();
    let mut frames: Vec<PathBuf> = std::fs::read_dir(demo.join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    let start_t: chrono::DateTime<chrono::Utc> = "2026-06-14T08:30:00Z".parse().unwrap();
    let n = 2880;
    let step_s = 10;
    let open_files = || std::fs::read_dir("/proc/self/fd").map(|d| d.count()).unwrap_or(0);
    let disk_bytes = |dir: &Path| -> u64 { std::fs::read_dir(dir).map(|d| d.flatten().filter_map(|e| e.metadata().ok()).filter(|m| m.is_file()).map(|m| m.len()).sum()).unwrap_or(0) };
    let mut samples: Vec<(usize, u64, usize, u64, u64)> = vec![];
    let db = d.path().join("live.sqlite");
    let processed = || -> i64 { nephocast::serve::db::open(&db).ok().and_then(|c| nephocast::serve::db::history_len(&c).ok()).unwrap_or(0) };
    let mut rss0 = 0;
    let t0 = Instant::now();
    let mut last_name: Option<PathBuf> = None;
    for i in 0..n {
        let t = start_t + chrono::Duration::seconds(step_s * i as i64);
        let name = incoming.join(nephocast::io::frame_name(&t, "jpg"));
        let tmp = incoming.join(".soak.part");
        std::fs::copy(&frames[i % frames.len()], &tmp).unwrap();
        std::fs::rename(&tmp, &name).unwrap();
        // The camera's clean-up: the previous frame goes once the next one is there.
        if let Some(p) = last_name.take() {
            let _ = std::fs::remove_file(p);
        }
        last_name = Some(name);
        let w = Instant::now();
        // Each frame is judged before the next is written (history rows alone stop rising once
        // retention drops old rows, and cannot tell).
        while judged(h.addr) < i as u64 + 1 {
            assert!(w.elapsed() < Duration::from_secs(60), "frame {i} not processed");
            std::thread::sleep(Duration::from_millis(5));
        }
        if i == 10 {
            rss0 = rss_kb();
        }
        if (i + 1) % (n / 10) == 0 {
            samples.push((i + 1, rss_kb(), open_files(), disk_bytes(d.path()), disk_bytes(&incoming)));
        }
    }
    let rss1 = rss_kb();
    let rows = processed();
    eprintln!(
        "soak: {n} frames (24 h of a 30 s camera) in {:.1} s; resident memory {} MB after 10 frames, {} MB at the end; history rows {rows} (retention {} s)",
        t0.elapsed().as_secs_f64(),
        rss0 / 1024,
        rss1 / 1024,
        keep_s
    );
    for (k, rss, fds, db_bytes, incoming_bytes) in &samples {
        eprintln!("soak: after {k:>4} frames: resident {:>4} MB, open files {fds:>3}, alarm log and WAL {:>5} kB, incoming {:>4} kB", rss / 1024, db_bytes / 1024, incoming_bytes / 1024);
    }
    assert!(rows <= keep_s / step_s + 1, "history grew beyond retention: {rows}");
    assert!(rss1 < rss0 + 150 * 1024, "resident memory grew from {rss0} kB to {rss1} kB");
    // Flat over the second half: memory within 30 MB, open files within 8, the alarm log within
    // 2 MB (retention drops old rows; the write-ahead log is checkpointed).
    let (half, last) = (&samples[samples.len() / 2 - 1], &samples[samples.len() - 1]);
    assert!(last.1 < half.1 + 30 * 1024, "resident memory still growing: {} kB at half, {} kB at the end", half.1, last.1);
    assert!(last.2 <= half.2 + 8, "open files growing: {} at half, {} at the end", half.2, last.2);
    assert!(last.3 < half.3 + 2 * 1024 * 1024, "alarm log growing: {} B at half, {} B at the end", half.3, last.3);
    h.stop();
}
