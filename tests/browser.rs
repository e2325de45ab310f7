//! The dashboard in headless Chromium (Debian's `chromium`, installed by `.ci/run`): it loads against
//! a running service, and once a nowcast is there the chart, the shadow map and an alarm row
//! render. A screenshot is kept as `target/dashboard-screenshot.png`.
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use nephocast::serve::{LiveOptions, start};

fn chromium() -> Option<PathBuf> {
    ["/usr/bin/chromium", "/usr/bin/chromium-browser"].iter().map(PathBuf::from).find(|p| p.is_file())
}

fn browse(bin: &Path, url: &str, extra: &[&str], profile: &Path) -> std::process::Output {
    Command::new(bin)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--virtual-time-budget=8000",
            "--window-size=1400,1000",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(extra)
        .arg(url)
        .output()
        .expect("chromium runs")
}

#[test]
fn dashboard_renders_chart_shadow_map_and_alarms() {
    let Some(bin) = chromium() else {
        eprintln!("chromium is not installed: the browser test is SKIPPED (.ci/run installs Debian's chromium)");
        return;
    };
    let d = tempfile::tempdir().unwrap();
    let incoming = d.path().join("incoming");
    std::fs::create_dir_all(&incoming).unwrap();
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let h = start(LiveOptions {
        site: demo.join("site.toml"),
        incoming: incoming.clone(),
        db: d.path().join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: Some("t".into()),
        server: Default::default(),
        keep_s: 86_400,
        poll_ms: 40,
        overlay_every: 1,
        health: Default::default(),
    })
    .unwrap();
    let mut frames: Vec<PathBuf> = std::fs::read_dir(demo.join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    let health = || -> serde_json::Value {
        let out = std::net::TcpStream::connect(h.addr).ok().and_then(|mut s| {
            use std::io::{Read, Write};
            write!(s, "GET /api/health HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").ok()?;
            let mut b = String::new();
            s.read_to_string(&mut b).ok()?;
            b.split("\r\n\r\n").nth(1).map(String::from)
        });
        out.and_then(|b| serde_json::from_str(&b).ok()).unwrap_or(serde_json::Value::Null)
    };
    for (i, f) in frames.iter().take(4).enumerate() {
        let tmp = incoming.join(".incoming.part");
        std::fs::copy(f, &tmp).unwrap();
        std::fs::rename(&tmp, incoming.join(f.file_name().unwrap())).unwrap();
        let t = Instant::now();
        while health()["frames_processed"].as_u64() != Some(i as u64 + 1) {
            assert!(t.elapsed() < Duration::from_secs(120), "frame not processed");
            std::thread::sleep(Duration::from_millis(50));
        }
    }
    // "?once": one snapshot without the event stream, whose open connection would hold headless
    // Chromium's virtual time still.
    let url = format!("http://{}/?once", h.addr);
    let profile = d.path().join("profile");
    let dom = browse(&bin, &url, &["--dump-dom", "--enable-logging=stderr", "--v=0"], &profile);
    let dom_text = String::from_utf8_lossy(&dom.stdout).to_string();
    // The page runs under its own Content-Security-Policy: nothing on it may be refused.
    let console = String::from_utf8_lossy(&dom.stderr);
    assert!(!console.contains("Content Security Policy"), "the dashboard breaks its CSP:\n{console}");
    assert!(dom_text.contains("id=\"powerchart\""), "chart missing: {}", &dom_text[..dom_text.len().min(2000)]);
    assert!(dom_text.contains("class=\"band\""), "P10–P90 band missing");
    assert!(dom_text.contains("/api/overlay.png?"), "shadow map picture not requested");
    assert!(dom_text.contains("class=\"alarmrow\""), "no alarm row");
    assert!(dom_text.contains("not a protection system"));
    let shot = Path::new(env!("CARGO_MANIFEST_DIR")).join("target").join("dashboard-screenshot.png");
    let out = browse(&bin, &url, &[&format!("--screenshot={}", shot.display())], &profile);
    assert!(shot.is_file(), "no screenshot: {}", String::from_utf8_lossy(&out.stderr));
    eprintln!("dashboard screenshot: {}", shot.display());
    h.stop();
}
