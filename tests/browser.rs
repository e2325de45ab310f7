//! The dashboard in headless Chromium (Debian's `chromium`, installed by `.ci/run`), against a
//! running service, in four states: empty (no frame yet), normal (frames arriving: chart, shadow
//! map, per-block table, alarm rows), restarted on the same database (no forecast yet, so no alarm
//! shown) and stale (the last frame is old). Screenshots are kept as
//! `target/dashboard-<state>.png` (`target/dashboard-screenshot.png` is the normal state).
#![cfg(feature = "server")]
mod common;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use chrono::{DateTime, Utc};
use nephocast::serve::{LiveHandle, LiveOptions, start};
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
            "--window-size=1400,1360",
        ])
        .arg(format!("--user-data-dir={}", profile.display()))
        .args(extra)
        .arg(url)
        .output()
        .expect("chromium runs")
}

/// The demo site moved in longitude so that the sun is high now (the demo frames are replayed
/// with times near the present, so that their age is that of a live feed).
fn site_for_now(dir: &Path) -> PathBuf {
    common::demo_site_for_now(dir, 5.0)
}

fn live(site: &Path, incoming: &Path, db: &Path, measurements: Option<&Path>) -> LiveHandle {
    std::fs::create_dir_all(incoming).unwrap();
    start(LiveOptions {
        site: site.to_path_buf(),
        incoming: incoming.to_path_buf(),
        db: db.to_path_buf(),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: Some("t".into()),
        server: Default::default(),
        keep_s: 86_400,
        poll_ms: 40,
        overlay_every: 1,
        health: nephocast::serve::ops::HealthOptions { measurements: measurements.map(Path::to_path_buf), ..Default::default() },
    })
    .unwrap()
}

fn health(h: &LiveHandle) -> serde_json::Value {
    let out = std::net::TcpStream::connect(h.addr).ok().and_then(|mut s| {
        use std::io::{Read, Write};
        write!(s, "GET /api/health HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").ok()?;
        let mut b = String::new();
        s.read_to_string(&mut b).ok()?;
        b.split("\r\n\r\n").nth(1).map(String::from)
    });
    out.and_then(|b| serde_json::from_str(&b).ok()).unwrap_or(serde_json::Value::Null)
}

/// POST a JSON body; the status line and the body.
fn post(h: &LiveHandle, path: &str, body: &str) -> (String, String) {
    use std::io::{Read, Write};
    let mut s = std::net::TcpStream::connect(h.addr).unwrap();
    write!(s, "POST {path} HTTP/1.1\r\nHost: localhost\r\nContent-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}", body.len()).unwrap();
    let mut b = String::new();
    s.read_to_string(&mut b).unwrap();
    let (head, body) = b.split_once("\r\n\r\n").unwrap_or((&b, ""));
    (head.lines().next().unwrap_or("").to_string(), body.to_string())
}

/// Put demo frames into the folder under new times (`first`, then every 30 s), by rename, each
/// waited for.
fn feed(h: &LiveHandle, incoming: &Path, frames: &[PathBuf], first: DateTime<Utc>) {
    let before = health(h)["frames_processed"].as_u64().unwrap_or(0);
    for (i, f) in frames.iter().enumerate() {
        let t = first + chrono::Duration::seconds(30 * i as i64);
        let tmp = incoming.join(".incoming.part");
        std::fs::copy(f, &tmp).unwrap();
        std::fs::rename(&tmp, incoming.join(nephocast::io::frame_name(&t, "jpg"))).unwrap();
        let t0 = Instant::now();
        while health(h)["frames_processed"].as_u64() != Some(before + i as u64 + 1) {
            assert!(t0.elapsed() < Duration::from_secs(120), "frame not processed: {}", health(h));
            std::thread::sleep(Duration::from_millis(50));
        }
    }
}

/// The page's DOM after its scripts ran, checked against its Content-Security-Policy, and a
/// screenshot `target/dashboard-<name>.png`.
fn snapshot(bin: &Path, h: &LiveHandle, profile: &Path, name: &str) -> String {
    // "?once": one snapshot without the event stream, whose open connection would hold headless
    // Chromium's virtual time still.
    let url = format!("http://{}/?once", h.addr);
    let dom = browse(bin, &url, &["--dump-dom", "--enable-logging=stderr", "--v=0"], profile);
    let dom_text = String::from_utf8_lossy(&dom.stdout).to_string();
    // The page runs under its own Content-Security-Policy: nothing on it may be refused.
    let console = String::from_utf8_lossy(&dom.stderr);
    assert!(!console.contains("Content Security Policy"), "{name}: the dashboard breaks its CSP:\n{console}");
    assert!(!console.contains("Uncaught"), "{name}: script error:\n{console}");
    assert!(dom_text.contains("nephocast ramp desk"));
    assert!(dom_text.contains("not a protection system"));
    let shot = Path::new(env!("CARGO_MANIFEST_DIR")).join("target").join(format!("dashboard-{name}.png"));
    let out = browse(bin, &url, &[&format!("--screenshot={}", shot.display())], profile);
    assert!(shot.is_file(), "no screenshot: {}", String::from_utf8_lossy(&out.stderr));
    eprintln!("dashboard screenshot ({name}): {}", shot.display());
    // What the page shows, not its script's templates (which hold the same markup).
    rendered(&dom_text)
}

/// The page without its script (whose source holds the same markup as templates).
fn rendered(dom: &str) -> String {
    match (dom.find("<script"), dom.rfind("</script>")) {
        (Some(a), Some(b)) if b > a => format!("{}{}", &dom[..a], &dom[b + "</script>".len()..]),
        _ => dom.to_string(),
    }
}

fn head(dom: &str) -> &str {
    &dom[..dom.len().min(3000)]
}

#[test]
fn dashboard_empty_normal_shelved_restarted_and_stale() {
    let Some(bin) = chromium() else {
        eprintln!("chromium is not installed: the browser test is SKIPPED (.ci/run installs Debian's chromium)");
        return;
    };
    let d = tempfile::tempdir().unwrap();
    let site = site_for_now(d.path());
    let db = d.path().join("live.sqlite");
    let profile = d.path().join("profile");
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let mut frames: Vec<PathBuf> = std::fs::read_dir(demo.join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();

    // Empty: no frame yet. It says so, shows no alarm state and no broken picture.
    let incoming = d.path().join("incoming");
    // A logger's file of the demo pyranometers' minute means over the last 20 minutes (the site is
    // moved to local noon at 5° N, so 600–900 W/m² are plausible), with the plant meter's power.
    let meas = d.path().join("measurements.csv");
    let header = std::fs::read_to_string(demo.join("measurements.csv")).unwrap().lines().find(|l| l.starts_with("time_utc")).unwrap().to_string() + ",power_plant_kw";
    let start_min = Utc::now() - chrono::Duration::minutes(20);
    let rows: Vec<String> = (0..19)
        .map(|k| {
            let t = start_min + chrono::Duration::minutes(k);
            let g = 750.0 + 150.0 * (k as f64 * 0.7).sin();
            format!("{},{g:.1},{:.1},{:.1},25.0,2.0,{:.1}", nephocast::io::fmt_time(&t), g + 20.0, g - 30.0, g * 17.0)
        })
        .collect();
    std::fs::write(&meas, format!("{header}\n{}\n", rows.join("\n"))).unwrap();
    let h = live(&site, &incoming, &db, Some(&meas));
    let dom = snapshot(&bin, &h, &profile, "empty");
    assert!(dom.contains("class=\"banner wait\">Waiting for the first frame:"), "empty state: {}", head(&dom));
    assert!(dom.contains(">NO FORECAST</span>") && !dom.contains("CALM"), "empty state shows an alarm state: {}", head(&dom));
    assert!(dom.contains("<img id=\"overlay\" class=\"hidden\" alt="), "empty state shows a picture: {}", head(&dom));
    assert!(dom.contains("WAITING"), "health tile: {}", head(&dom));

    // Normal: frames of the last two minutes.
    feed(&h, &incoming, &frames[..4], Utc::now() - chrono::Duration::seconds(100));
    let dom = snapshot(&bin, &h, &profile, "normal");
    std::fs::copy(Path::new(env!("CARGO_MANIFEST_DIR")).join("target/dashboard-normal.png"), Path::new(env!("CARGO_MANIFEST_DIR")).join("target/dashboard-screenshot.png")).unwrap();
    assert!(dom.contains("id=\"powerchart\""), "chart missing: {}", head(&dom));
    assert!(dom.contains("class=\"band\""), "P10–P90 band missing");
    assert!(dom.contains("/api/overlay.png?"), "shadow map picture not requested");
    assert!(dom.contains("class=\"alarmrow\""), "no alarm row");
    assert!(dom.matches("class=\"blockrow\"").count() >= 2, "per-block table missing");
    assert!(dom.contains("Europe/Madrid"), "site time zone not shown");
    assert!(dom.contains(" UTC</title>"), "no UTC tooltips on the time axis");
    let ticks = dom.matches("<text class=\"tick\"").count();
    assert!(ticks >= 3, "{ticks} round ticks");
    assert!(!dom.contains("+20 min</text>"), "relative axis labels");
    assert!(dom.contains(">OK<") && dom.contains("class=\"banner hidden\""), "normal state reads as not OK: {}", head(&dom));
    assert!(dom.contains("change MW") && dom.contains("change %"));
    // Measured against forecast: the pyranometers' mean, one dot per minute held, and the forecast.
    assert!(dom.contains("id=\"ghichart-svg\"") && dom.contains("class=\"probes\""), "GHI chart missing: {}", head(&dom));
    let dots = dom.matches("class=\"measured\"").count();
    assert!(dots >= 10, "{dots} measured points");
    // The plant meter against the forecast plant power, in MW.
    assert!(dom.contains("id=\"mwchart-svg\"") && dom.contains("the meter against the forecast"), "MW chart missing: {}", head(&dom));
    let metered = dom.matches("class=\"metered\"").count();
    assert!(metered >= 10, "{metered} metered points");
    assert!(dom.contains("<title>metered 1"), "values in MW (10–15 MW here): {}", head(&dom));
    assert_eq!(dom.matches("class=\"n metered-cell\"").count(), 1, "the plant row's metered power in the block table (no block meters here)");
    let page = dom.clone();
    assert!(page.contains("notifications go out as usual") && page.contains("never shelved"), "shelving controls: {}", head(&page));

    // Shelved by an operator: the page says until when and by whom, and lists the shelving.
    let (status, body) = post(&h, "/api/alarms/shelve", r#"{"minutes": 30, "token": "t", "by": "operator-a"}"#);
    assert!(status.contains(" 200 "), "{status} {body}");
    let dom = snapshot(&bin, &h, &profile, "shelved");
    let page = dom;
    assert!(page.contains("notifications shelved until") && page.contains("by operator-a"), "shelved state: {}", head(&page));
    assert!(!page.contains("never shelved") && !page.contains("go out as usual"), "shelved state: {}", head(&page));
    assert_eq!(page.matches("class=\"shelfrow\"").count(), 1, "shelving not listed");
    h.stop();

    // Restarted on the same database: no forecast yet, so no alarm shown; the log is still there.
    let incoming2 = d.path().join("incoming2");
    let h = live(&site, &incoming2, &db, None);
    let dom = snapshot(&bin, &h, &profile, "restarted");
    assert!(dom.contains("class=\"banner wait\">Waiting for the first frame since the service started"), "restarted state: {}", head(&dom));
    assert!(dom.contains(">NO FORECAST</span>"), "restarted state shows an alarm: {}", head(&dom));
    assert!(dom.contains("times Europe/Madrid"), "restarted state: site time zone unknown");
    assert!(dom.contains("class=\"alarmrow\""), "alarm log lost over the restart");

    // Stale: the newest frame is half an hour old.
    feed(&h, &incoming2, &frames[4..6], Utc::now() - chrono::Duration::minutes(30));
    let dom = snapshot(&bin, &h, &profile, "stale");
    assert!(dom.contains("class=\"banner stale\">Frames stopped"), "stale state: {}", head(&dom));
    assert!(dom.contains(">STALE<") || dom.contains(">NO<"), "stale state: {}", head(&dom));
    assert!(dom.contains(" old\" title=\"\">"), "the alarm state is not marked old");
    h.stop();
}
