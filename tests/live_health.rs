//! Live mode's operation: a measurement feed appended to and rotated while the service runs,
//! the health state turning stale on the timer, the metrics page, retention of judged frames,
//! untimed files named, and `--check`'s exit statuses.
#![cfg(feature = "server")]
mod common;
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use nephocast::serve::ops::{HealthOptions, Retention};
use nephocast::serve::{LiveOptions, start};

fn get(addr: SocketAddr, path: &str) -> String {
    let mut s = TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(s, "GET {path} HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").unwrap();
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    let text = String::from_utf8_lossy(&out).to_string();
    text.split("\r\n\r\n").nth(1).unwrap_or("").to_string()
}

fn health(addr: SocketAddr) -> serde_json::Value {
    serde_json::from_str(&get(addr, "/api/health")).unwrap_or(serde_json::Value::Null)
}

/// Wait (bounded) until `f` holds; the bound is a safety stop, not a timing assertion.
fn wait_for(what: &str, limit: Duration, mut f: impl FnMut() -> bool) {
    let t = Instant::now();
    while !f() {
        assert!(t.elapsed() < limit, "gave up waiting for {what}");
        std::thread::sleep(Duration::from_millis(20));
    }
}

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

fn demo_frames() -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    v.sort();
    v
}

fn options(d: &Path, health: HealthOptions) -> LiveOptions {
    options_for(d, health, demo().join("site.toml"))
}

/// [`options`] for frames stamped with the wall clock: the demo site moved so that its sun is up
/// now ([`common::demo_site_for_now`]).
fn options_now(d: &Path, health: HealthOptions) -> LiveOptions {
    options_for(d, health, common::demo_site_for_now(d, 5.0))
}

fn options_for(d: &Path, health: HealthOptions, site: PathBuf) -> LiveOptions {
    let incoming = d.join("incoming");
    std::fs::create_dir_all(&incoming).unwrap();
    LiveOptions {
        site,
        incoming,
        db: d.join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: None,
        server: Default::default(),
        keep_s: 86_400,
        poll_ms: 30,
        overlay_every: 0,
        health,
    }
}

fn drop_by_rename(src: &Path, incoming: &Path, name: &str) {
    let tmp = incoming.join(format!(".{name}.part"));
    std::fs::copy(src, &tmp).unwrap();
    std::fs::rename(&tmp, incoming.join(name)).unwrap();
}

fn u(v: &serde_json::Value) -> u64 {
    v.as_u64().unwrap_or(u64::MAX)
}

const GUARD: Duration = Duration::from_secs(60);

#[test]
fn measurement_feed_appended_and_rotated_while_live_reaches_the_tuner() {
    let d = tempfile::tempdir().unwrap();
    let feed = d.path().join("feed");
    std::fs::create_dir_all(&feed).unwrap();
    let o = options(d.path(), HealthOptions { measurements: Some(feed.clone()), ..Default::default() });
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    let lines: Vec<String> = std::fs::read_to_string(demo().join("measurements.csv")).unwrap().lines().filter(|l| !l.starts_with('#')).map(str::to_owned).collect();
    let (header, rows) = (&lines[0], &lines[1..]);
    let frames = demo_frames();
    // Frames without measurements: nothing to tune with.
    for (i, f) in frames.iter().take(2).enumerate() {
        drop_by_rename(f, &incoming, f.file_name().unwrap().to_str().unwrap());
        wait_for("a frame", GUARD, || u(&health(addr)["frames_processed"]) == i as u64 + 1);
    }
    let hl = health(addr);
    assert_eq!(u(&hl["tuning_rows"]), 0);
    // The demo camera's frames match its library's colour balance (own data: the demo is rendered
    // with one camera throughout).
    assert_eq!(hl["clear_rb_scale"].as_f64(), Some(1.0), "{hl}");
    assert_eq!(hl["health_state"], "stale", "demo frames are months old: {hl}");
    assert_eq!(hl["data_valid"], false);
    // The logger starts its file after the service started: 10 rows and half of the 11th.
    let live = feed.join("pyr.csv");
    let mut text = format!("{header}\n{}\n", rows[..10].join("\n"));
    text.push_str(&rows[10][..8]);
    std::fs::write(&live, &text).unwrap();
    wait_for("10 rows", GUARD, || u(&health(addr)["measurement_rows_read"]) == 10);
    // The rest of the line and three more.
    std::fs::OpenOptions::new().append(true).open(&live).unwrap().write_all(format!("{}\n{}\n", &rows[10][8..], rows[11..14].join("\n")).as_bytes()).unwrap();
    wait_for("14 rows", GUARD, || u(&health(addr)["measurement_rows"]) == 14);
    // Rotation: the file is renamed (its place is kept, nothing is read twice), a new one starts,
    // and the old one is removed later.
    let rotated = feed.join("pyr-1.csv");
    std::fs::rename(&live, &rotated).unwrap();
    std::fs::write(&live, format!("{header}\n{}\n", rows[14..20].join("\n"))).unwrap();
    wait_for("20 rows", GUARD, || u(&health(addr)["measurement_rows"]) == 20);
    std::fs::remove_file(&rotated).unwrap();
    std::fs::OpenOptions::new().append(true).open(&live).unwrap().write_all(format!("{}\n", rows[20]).as_bytes()).unwrap();
    wait_for("21 rows", GUARD, || u(&health(addr)["measurement_rows"]) == 21);
    assert_eq!(u(&health(addr)["measurement_rows_read"]), 21);
    // Frames within the measured minutes: the rows reach the transmittance tuning.
    for (i, f) in frames.iter().enumerate().skip(2).take(10) {
        drop_by_rename(f, &incoming, f.file_name().unwrap().to_str().unwrap());
        wait_for("a frame", GUARD, || u(&health(addr)["frames_processed"]) == i as u64 + 1);
    }
    let hl = health(addr);
    assert!(u(&hl["tuning_rows"]) > 0, "{hl}");
    assert_eq!(u(&hl["measurement_errors"]), 0);
    assert!(hl["measurement_age_s"].as_f64().unwrap() > 86_400.0);
    h.stop();
}

#[test]
fn health_turns_stale_on_the_timer_within_a_second_of_the_threshold() {
    let d = tempfile::tempdir().unwrap();
    // Stale after 2 × 0.5 + 60 = 61 s.
    let o = options_now(d.path(), HealthOptions { frame_interval_s: 0.5, ..Default::default() });
    let threshold_s = 61.0;
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    assert_eq!(health(addr)["health_state"], "starting");
    assert_eq!(health(addr)["data_valid"], false);
    // A frame 59 s old: fresh now, stale in about 2 s with no further frame.
    let t = chrono::Utc::now() - chrono::Duration::milliseconds(59_000);
    let name = nephocast::io::frame_name(&t, "jpg");
    drop_by_rename(&demo_frames()[0], &incoming, &name);
    wait_for("the frame to be read", GUARD, || health(addr)["newest_frame_utc"].is_string());
    let hl = health(addr);
    assert_eq!(hl["health_state"], "ok", "{hl}");
    assert_eq!(hl["data_valid"], true);
    // The controller interface's data-valid register follows the health state (judged here with a
    // register frame-age limit of a day, so that only the health state decides).
    let data_valid_register = || {
        let at = nephocast::serve::modbus::header_fields().iter().find(|f| f.name == "data_valid").unwrap().offset as usize;
        h.modbus_feed().image(chrono::Utc::now(), 86_400.0)[at]
    };
    assert_eq!(data_valid_register(), 1);
    let beat = u(&hl["heartbeat"]);
    // Guard: the state must turn stale by the time the age passes the threshold plus 1 s (and some
    // slack for a loaded machine); the measured delay is printed.
    let crossing = t + chrono::Duration::milliseconds((threshold_s * 1000.0) as i64);
    let limit = (crossing - chrono::Utc::now()).to_std().unwrap_or_default() + Duration::from_millis(2500);
    wait_for("the stale state", limit, || health(addr)["health_state"] == "stale");
    let late_s = (chrono::Utc::now() - crossing).num_milliseconds() as f64 / 1000.0;
    println!("stale seen {late_s:.2} s after the threshold");
    let hl = health(addr);
    assert_eq!(hl["data_valid"], false);
    assert_eq!(data_valid_register(), 0, "the registers still read valid while the health is stale");
    assert!(hl["frame_age_s"].as_f64().unwrap() > threshold_s);
    assert!(u(&hl["heartbeat"]) > beat, "the heartbeat rises without frames");
    let m = get(addr, "/metrics");
    assert!(m.contains("nephocast_health_state{state=\"stale\"} 1"), "{m}");
    assert!(m.contains("nephocast_data_valid 0"));
    h.stop();
}

/// At night the frames keep coming and are refused for the sun's elevation: the state is `night`
/// (not `stale`, which would page a monitor every evening), data are not valid, and the metrics
/// say so.
#[test]
fn frames_refused_for_a_low_sun_read_as_night_not_stale() {
    let d = tempfile::tempdir().unwrap();
    let o = options_for(d.path(), HealthOptions { frame_interval_s: 0.5, ..Default::default() }, common::demo_site_at_solar_hour(d.path(), 5.0, 0.0));
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    let name = nephocast::io::frame_name(&chrono::Utc::now(), "jpg");
    drop_by_rename(&demo_frames()[0], &incoming, &name);
    wait_for("the frame to be judged", GUARD, || health(addr)["newest_frame_utc"].is_string() && health(addr)["health_state"] != "starting");
    let hl = health(addr);
    assert_eq!(hl["health_state"], "night", "{hl}");
    assert_eq!(hl["data_valid"], false);
    assert_eq!(u(&hl["frames_processed"]), 0, "{hl}");
    assert_eq!(u(&hl["frames_rejected"]["sun_too_low"]), 1, "{hl}");
    // A late upload of an older frame (5 min, beyond the 61-s stale age) is refused too, and
    // leaves the state as the newest frame read says: still night, not a stale flicker.
    let late = nephocast::io::frame_name(&(chrono::Utc::now() - chrono::Duration::seconds(300)), "jpg");
    drop_by_rename(&demo_frames()[1], &incoming, &late);
    wait_for("the late frame to be judged", GUARD, || u(&health(addr)["frames_rejected"]["sun_too_low"]) == 2);
    let hl = health(addr);
    assert_eq!(hl["health_state"], "night", "{hl}");
    let m = get(addr, "/metrics");
    assert!(m.contains("nephocast_health_state{state=\"night\"} 1"), "{m}");
    assert!(m.contains("nephocast_health_state{state=\"stale\"} 0"), "{m}");
    h.stop();
}

#[test]
fn metrics_page_parses_and_retention_archives_or_deletes_judged_frames() {
    let d = tempfile::tempdir().unwrap();
    let archive = d.path().join("archive");
    let o = options(d.path(), HealthOptions { retention: Retention::Archive(archive.clone()), ..Default::default() });
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    let frames = demo_frames();
    std::fs::write(incoming.join("snapshot.jpg"), b"no time in this name").unwrap();
    for (i, f) in frames.iter().take(3).enumerate() {
        drop_by_rename(f, &incoming, f.file_name().unwrap().to_str().unwrap());
        wait_for("a frame", GUARD, || u(&health(addr)["frames_processed"]) == i as u64 + 1);
    }
    // A corrupt frame is judged (rejected) and archived too.
    std::fs::write(incoming.join("frame_20260614T083200.000Z.jpg"), b"not a jpeg").unwrap();
    wait_for("the archive", GUARD, || u(&health(addr)["frames_retired"]) == 4);
    let day = archive.join("2026-06-14");
    let mut kept: Vec<String> = std::fs::read_dir(&day).unwrap().flatten().map(|e| e.file_name().to_string_lossy().into_owned()).collect();
    kept.sort();
    assert_eq!(kept.len(), 4, "{kept:?}");
    let left: Vec<String> = std::fs::read_dir(&incoming).unwrap().flatten().map(|e| e.file_name().to_string_lossy().into_owned()).collect();
    assert_eq!(left, vec!["snapshot.jpg".to_string()], "only the untimed file stays");
    let hl = health(addr);
    assert_eq!(u(&hl["frames_untimed"]), 1);
    assert_eq!(hl["untimed_files"][0], "snapshot.jpg");
    // The metrics page: every sample line is `name{labels} value` with a number.
    let m = get(addr, "/metrics");
    let mut names = std::collections::BTreeSet::new();
    for l in m.lines().filter(|l| !l.is_empty()) {
        if let Some(rest) = l.strip_prefix("# ") {
            assert!(rest.starts_with("HELP nephocast_") || rest.starts_with("TYPE nephocast_"), "{l}");
            continue;
        }
        let (name, v) = l.rsplit_once(' ').unwrap();
        assert!(v.parse::<f64>().is_ok(), "{l}");
        let base = name.split('{').next().unwrap();
        assert!(base.chars().all(|c| c.is_ascii_alphanumeric() || c == '_'), "{l}");
        if let Some(labels) = name.strip_prefix(base) {
            assert!(labels.is_empty() || (labels.starts_with('{') && labels.ends_with('}')), "{l}");
        }
        names.insert(base.to_string());
    }
    for want in [
        "nephocast_frames_processed_total",
        "nephocast_frames_skipped_total",
        "nephocast_frames_rejected_total",
        "nephocast_frame_latency_seconds_bucket",
        "nephocast_frame_latency_seconds_count",
        "nephocast_alarm_state",
        "nephocast_health_state",
        "nephocast_frame_age_seconds",
        "nephocast_measurement_age_seconds",
        "nephocast_heartbeat_total",
    ] {
        assert!(names.contains(want), "{want} missing from {m}");
    }
    assert!(m.contains("nephocast_frames_processed_total 3"), "{m}");
    assert!(m.contains("nephocast_frame_latency_seconds_count 3"), "{m}");
    h.stop();

    // Deleting instead.
    let d2 = tempfile::tempdir().unwrap();
    let o = options(d2.path(), HealthOptions { retention: Retention::Delete, ..Default::default() });
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    for f in frames.iter().take(2) {
        drop_by_rename(f, &incoming, f.file_name().unwrap().to_str().unwrap());
    }
    wait_for("deletion", GUARD, || u(&health(addr)["frames_retired"]) == 2);
    assert_eq!(std::fs::read_dir(&incoming).unwrap().count(), 0);
    h.stop();
}

#[test]
fn check_exits_0_on_a_usable_configuration_and_2_on_a_bad_one() {
    let d = tempfile::tempdir().unwrap();
    let run = |extra: &[&str]| {
        let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_nephocast"));
        c.args(["live", "--check", "--site"]).arg(demo().join("site.toml")).arg("--incoming").arg(d.path()).arg("--db").arg(d.path().join("x.sqlite"));
        c.args(extra);
        let o = c.output().unwrap();
        (o.status.code(), String::from_utf8_lossy(&o.stdout).into_owned(), String::from_utf8_lossy(&o.stderr).into_owned())
    };
    let meas = demo().join("measurements.csv");
    let (code, out, err) = run(&["--measurements", meas.to_str().unwrap()]);
    assert_eq!(code, Some(0), "{out}{err}");
    assert!(out.contains("configuration OK") && out.contains("measurements feed") && out.contains("estimated forecast working memory"), "{out}");
    let (code, _, err) = run(&["--measurements", d.path().join("missing.csv").to_str().unwrap()]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("missing.csv"), "{err}");
    let bad = d.path().join("bad.csv");
    std::fs::write(&bad, "time_utc,ghi_north-fixed_wm2\n2026-06-14T08:30:00Z,abc\n").unwrap();
    let (code, _, err) = run(&["--measurements", bad.to_str().unwrap()]);
    assert_eq!(code, Some(2), "{err}");
    assert!(err.contains("line 2"), "{err}");
    let (code, _, err) = run(&["--frame-interval-s", "0"]);
    assert_eq!(code, Some(2), "{err}");
    let mut c = std::process::Command::new(env!("CARGO_BIN_EXE_nephocast"));
    let o = c.args(["live", "--check", "--site"]).arg(d.path().join("nosite.toml")).arg("--incoming").arg(d.path()).output().unwrap();
    assert_eq!(o.status.code(), Some(2), "{}", String::from_utf8_lossy(&o.stderr));
}

/// A frame that is read but refused by the engine (here an all-white, overexposed frame) is counted
/// as read (the camera is not down) but does not make the older forecast current: the health's frame
/// age stays that of the forecast's frame.
#[test]
fn a_refused_frame_does_not_make_an_old_forecast_current() {
    let d = tempfile::tempdir().unwrap();
    let o = options_now(d.path(), HealthOptions::default());
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    let good = &demo_frames()[0];
    let t_good = chrono::Utc::now() - chrono::Duration::seconds(40);
    drop_by_rename(good, &incoming, &nephocast::io::frame_name(&t_good, "jpg"));
    wait_for("the good frame's forecast", GUARD, || u(&health(addr)["frames_processed"]) == 1);
    // The same size, every pixel white.
    let (w, hgt) = image::image_dimensions(good).unwrap();
    let white = d.path().join("white.png");
    image::RgbImage::from_pixel(w, hgt, image::Rgb([255, 255, 255])).save(&white).unwrap();
    let t_white = chrono::Utc::now() - chrono::Duration::seconds(2);
    drop_by_rename(&white, &incoming, &nephocast::io::frame_name(&t_white, "png"));
    let white_utc = nephocast::io::fmt_time(&t_white);
    wait_for("the white frame to be read", GUARD, || health(addr)["newest_frame_utc"].as_str().is_some_and(|s| s[..19] == white_utc[..19]));
    let hl = health(addr);
    assert_eq!(u(&hl["frames_processed"]), 1, "the white frame was used: {hl}");
    let refused: u64 = hl["frames_rejected"].as_object().map(|m| m.values().filter_map(|v| v.as_u64()).sum()).unwrap_or(0);
    assert!(refused >= 1, "the white frame was not refused: {hl}");
    let age = hl["frame_age_s"].as_f64().unwrap();
    assert!(age >= 39.0, "frame age {age} s is the refused frame's, not the forecast's: {hl}");
    h.stop();
}
