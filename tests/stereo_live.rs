//! Live mode with a second camera: frames of both cameras dropped by rename into their incoming
//! folders (`--incoming` and `[second_camera] incoming`), both cameras from `calibrate` on their
//! clear days (never the truth), the configured base 1.6 times too high. Each stepped frame is
//! paired with the second camera's frame within 5 s, as replay pairs them: the live API must report
//! the stereo base within 10 % of the truth, and the paired second frames are retired with the
//! first camera's under `--delete-processed`.
#![cfg(feature = "server")]
#[path = "common/calibrated.rs"]
mod calibrated;

use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::Path;
use std::time::{Duration, Instant};

use nephocast::serve::{LiveOptions, start};
use nephocast::synth::render::PixelRays;
use nephocast::synth::{CameraSpec, Scene, encode_jpeg, scene};

/// Image size \[px\].
const SIZE_PX: u32 = 384;
/// Second camera's position relative to the first (east, north, up) \[m\].
const OFFSET_M: [f64; 3] = [800.0, 300.0, 0.0];

fn get_json(addr: SocketAddr, path: &str) -> serde_json::Value {
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
        assert!(t.elapsed() < Duration::from_secs(300), "gave up waiting for {what}");
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn drop_by_rename(bytes: &[u8], dir: &Path, name: &str) {
    let tmp = dir.join(format!(".{name}.part"));
    std::fs::write(&tmp, bytes).unwrap();
    std::fs::rename(&tmp, dir.join(name)).unwrap();
}

#[test]
fn live_mode_pairs_the_second_cameras_frames() {
    let d = tempfile::tempdir().unwrap();
    let mut spec = scene("broken-cumulus-fast").unwrap();
    spec.size_px = SIZE_PX;
    spec.duration_min = 1.0;
    let cam_a = spec.camera.clone();
    let cam_b = CameraSpec { name: "second".into(), yaw_deg: cam_a.yaw_deg + 70.0, ..cam_a.clone() };
    let sc = Scene::new(spec, 3).unwrap();
    nephocast::synth::write_sequence(&sc, d.path(), false).unwrap();
    let pos_b = [sc.cam_pos_m[0] + OFFSET_M[0], sc.cam_pos_m[1] + OFFSET_M[1], sc.cam_pos_m[2] + OFFSET_M[2]];
    calibrated::clear_day(&cam_a, SIZE_PX, None, 900.0).write(&d.path().join("calibration"), &cam_a.name);
    calibrated::clear_day(&cam_b, SIZE_PX, Some(pos_b), 900.0).write(&d.path().join("calibration"), "second");
    let site = std::fs::read_to_string(d.path().join("site.toml")).unwrap();
    assert!(site.contains("base_height_m = 1200.0"));
    let site = site.replace("base_height_m = 1200.0", "base_height_m = 1920.0")
        + &format!("\n[second_camera]\ncalibration = \"calibration/second.toml\"\nposition_m = [{:.1}, {:.1}, {:.1}]\nincoming = \"incoming2\"\n", pos_b[0], pos_b[1], pos_b[2]);
    std::fs::write(d.path().join("site.toml"), site).unwrap();
    let (incoming, incoming2) = (d.path().join("incoming"), d.path().join("incoming2"));
    std::fs::create_dir_all(&incoming).unwrap();
    std::fs::create_dir_all(&incoming2).unwrap();
    let health = nephocast::serve::ops::HealthOptions { retention: nephocast::serve::ops::Retention::Delete, ..Default::default() };
    let opts = LiveOptions {
        site: d.path().join("site.toml"),
        incoming: incoming.clone(),
        db: d.path().join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: None,
        server: Default::default(),
        keep_s: 86_400,
        poll_ms: 40,
        overlay_every: 1,
        health,
    };
    let h = start(opts).unwrap();
    let true_b = cam_b.camera(SIZE_PX);
    let rays_b = PixelRays::new(&true_b);
    let frames_a: Vec<_> = std::fs::read_dir(d.path().join("frames")).unwrap().flatten().map(|e| e.path()).collect::<std::collections::BTreeSet<_>>().into_iter().collect();
    let times = sc.frame_times();
    assert_eq!(frames_a.len(), times.len());
    // The second camera's clock runs 2 s late; an unpaired frame of it, 30 s before the first, is
    // too old to pair and is retired.
    let late = chrono::Duration::seconds(2);
    let stale = nephocast::io::frame_name(&(times[0] - chrono::Duration::seconds(30)), "jpg");
    drop_by_rename(b"not read", &incoming2, &stale);
    for (i, (t, a)) in times.iter().zip(&frames_a).enumerate() {
        let rgb = sc.render_frame_from(&true_b, pos_b, &rays_b, i, t).rgb;
        drop_by_rename(&encode_jpeg(&rgb, sc.spec.jpeg_quality), &incoming2, &nephocast::io::frame_name(&(*t + late), "jpg"));
        drop_by_rename(&std::fs::read(a).unwrap(), &incoming, a.file_name().unwrap().to_str().unwrap());
        wait_for("a frame to be processed", || get_json(h.addr, "/api/health")["frames_processed"].as_u64() == Some(i as u64 + 1));
        let nc = get_json(h.addr, "/api/nowcast");
        let (cbh, source) = (nc["cbh_m"].as_f64().unwrap(), nc["cbh_source"].as_str().unwrap().to_string());
        eprintln!("  live frame {i}: cbh {cbh:.0} m ± {:.0} m ({source})", nc["cbh_sigma_m"].as_f64().unwrap());
        assert_eq!(source, "stereo", "frame {i}: {nc}");
        assert!((cbh / 1200.0 - 1.0).abs() <= 0.10, "frame {i}: stereo base {cbh:.0} m vs 1200 m");
    }
    // Paired and stale second frames are retired with the first camera's.
    wait_for("the second folder to be emptied", || std::fs::read_dir(&incoming2).unwrap().count() == 0);
    h.stop();
}
