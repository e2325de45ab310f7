//! Live mode's frame intake: a slow writer that writes in place (no rename) and a future-dated
//! frame, with the service on an ephemeral loopback port.
#![cfg(feature = "server")]
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use nephocast::serve::{LiveOptions, start};

fn health(addr: SocketAddr) -> serde_json::Value {
    get(addr, "/api/health")
}

fn get(addr: SocketAddr, path: &str) -> serde_json::Value {
    let mut s = TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(s, "GET {path} HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").unwrap();
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    let text = String::from_utf8_lossy(&out).to_string();
    serde_json::from_str(text.split("\r\n\r\n").nth(1).unwrap_or("")).unwrap_or(serde_json::Value::Null)
}

/// Wait (bounded) until `f` holds; the bound is a safety stop, not a timing assertion.
fn wait_for(what: &str, mut f: impl FnMut() -> bool) {
    let t = Instant::now();
    while !f() {
        assert!(t.elapsed() < Duration::from_secs(120), "gave up waiting for {what}");
        std::thread::sleep(Duration::from_millis(40));
    }
}

fn demo_frames() -> Vec<PathBuf> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/frames");
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir).unwrap().flatten().map(|e| e.path()).collect();
    v.sort();
    v
}

fn options(d: &Path) -> LiveOptions {
    let incoming = d.join("incoming");
    std::fs::create_dir_all(&incoming).unwrap();
    LiveOptions {
        site: Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml"),
        incoming,
        db: d.join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: None,
        keep_s: 86_400,
        poll_ms: 30,
        overlay_every: 0,
        health: Default::default(),
        server: Default::default(),
    }
}

fn drop_by_rename(src: &Path, incoming: &Path, name: &str) {
    let tmp = incoming.join(format!("{name}.part"));
    std::fs::copy(src, &tmp).unwrap();
    std::fs::rename(&tmp, incoming.join(name)).unwrap();
}

/// A writer that writes a frame in place in five pieces with pauses of ten polls: the partial
/// file is judged (stable over two polls) and refused as `truncated`, never processed; every
/// change is noticed, and the finished file is read again and processed.
#[test]
fn slow_writer_partial_frame_is_never_processed() {
    let d = tempfile::tempdir().unwrap();
    let opts = options(d.path());
    let h = start(opts.clone()).unwrap();
    let src = &demo_frames()[3];
    let bytes = std::fs::read(src).unwrap();
    let target = opts.incoming.join(src.file_name().unwrap());
    let mut f = std::fs::File::create(&target).unwrap();
    let pieces = 5;
    for k in 0..pieces {
        let (a, b) = (bytes.len() * k / pieces, bytes.len() * (k + 1) / pieces);
        f.write_all(&bytes[a..b]).unwrap();
        f.flush().unwrap();
        if k + 1 < pieces {
            let before = health(h.addr)["frames_rejected"]["truncated"].as_u64().unwrap_or(0);
            wait_for("the partial file to be judged", || health(h.addr)["frames_rejected"]["truncated"].as_u64().unwrap_or(0) > before);
            assert_eq!(health(h.addr)["frames_processed"].as_u64(), Some(0), "a partial frame was processed");
        }
    }
    drop(f);
    wait_for("the finished frame", || health(h.addr)["frames_processed"].as_u64() == Some(1));
    let hl = health(h.addr);
    println!("slow writer: {hl}");
    assert_eq!(hl["frames_rejected"]["truncated"].as_u64(), Some(pieces as u64 - 1), "{hl}");
    assert!(hl["frames_changed"].as_u64().unwrap() >= pieces as u64 - 1, "{hl}");
    let nc = get(h.addr, "/api/nowcast");
    let name = src.file_name().unwrap().to_string_lossy().into_owned();
    let t = nephocast::io::time_from_frame_name(&name).unwrap();
    assert_eq!(nc["issue_time_utc"].as_str(), Some(nephocast::io::fmt_time(&t).as_str()));
    // The cloud base height assumed: the demo's configured value with its 30 % prior uncertainty.
    assert_eq!((nc["cbh_source"].as_str(), nc["cbh_m"].as_f64().map(f64::round)), (Some("configured"), Some(1400.0)), "{nc}");
    assert!((nc["cbh_sigma_m"].as_f64().unwrap() - 420.0).abs() < 1e-6, "{nc}");
    h.stop();
}

/// A frame dated a day ahead of the clock is rejected (`ahead_of_clock`); the good frames after it
/// are accepted. After a restart with the future file still in the folder, the newest good frame
/// is processed, not blocked.
#[test]
fn future_dated_frame_then_good_frames_are_accepted() {
    let d = tempfile::tempdir().unwrap();
    let opts = options(d.path());
    let frames = demo_frames();
    let h = start(opts.clone()).unwrap();
    let future = nephocast::io::frame_name(&(chrono::Utc::now() + chrono::Duration::days(1)), "jpg");
    drop_by_rename(&frames[0], &opts.incoming, &future);
    wait_for("the future frame to be rejected", || health(h.addr)["frames_rejected"]["ahead_of_clock"].as_u64() == Some(1));
    for (i, f) in frames[1..4].iter().enumerate() {
        drop_by_rename(f, &opts.incoming, f.file_name().unwrap().to_str().unwrap());
        wait_for("a good frame", || health(h.addr)["frames_processed"].as_u64() == Some(i as u64 + 1));
    }
    let hl = health(h.addr);
    assert!(hl["frames_rejected"].get("out_of_order").is_none(), "{hl}");
    h.stop();
    // Restart: the future file is still there and is the newest name.
    let h2 = start(opts.clone()).unwrap();
    wait_for("the newest good frame after the restart", || health(h2.addr)["frames_processed"].as_u64() == Some(1));
    let hl = health(h2.addr);
    assert_eq!(hl["frames_rejected"]["ahead_of_clock"].as_u64(), Some(1), "{hl}");
    let t = nephocast::io::time_from_frame_name(frames[3].file_name().unwrap().to_str().unwrap()).unwrap();
    assert_eq!(hl["last_frame_utc"].as_str(), Some(nephocast::io::fmt_time(&t).as_str()), "{hl}");
    // A later good frame is taken too.
    drop_by_rename(&frames[4], &opts.incoming, frames[4].file_name().unwrap().to_str().unwrap());
    wait_for("a good frame after the restart", || health(h2.addr)["frames_processed"].as_u64() == Some(2));
    println!("future-dated frame: {}", health(h2.addr));
    h2.stop();
}
