//! Live mode's Modbus TCP measurement feed against a real Modbus TCP server (tokio-modbus) serving
//! three pyranometers in input and holding registers (u16, f32 with the low word first, i16
//! scaled): the rows reach the health and the transmittance tuning, a sensor's error code is
//! refused and counted, and when the server stops the feed is reported in outage, the health turns
//! `no_measurements` and the tuning goes back to the configured transmittances; when the server
//! comes back the poller reconnects by itself. `live --check` reads the device once and refuses a
//! second feed; the README's example section is valid.
#![cfg(feature = "server")]
mod common;
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use chrono::{Datelike, Utc};
use nephocast::serve::ops::HealthOptions;
use nephocast::serve::{LiveOptions, check, start};
use tokio_modbus::{ExceptionCode, Request, Response, SlaveRequest};

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

fn demo_frames() -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    v.sort();
    v
}

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

fn u(v: &serde_json::Value) -> u64 {
    v.as_u64().unwrap_or(u64::MAX)
}

/// Poll (a bounded number of times, 50 ms apart) until `f` holds: a safety stop, not a timing
/// assertion.
fn wait_for(what: &str, mut f: impl FnMut() -> bool) {
    for _ in 0..4000 {
        if f() {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    panic!("gave up waiting for {what}");
}

/// The unit id the server answers to.
const UNIT: u8 = 7;

/// Three pyranometers: `ghi_north-fixed_wm2` in input register 0 (u16; every 7th read gives the
/// sensor's error code 65535), `ghi_east-tracker_wm2` in input registers 10–11 (f32, low word
/// first) and `ghi_south-tracker_wm2` in holding register 100 (i16 in 0.1 W/m²). The values move
/// with each read, so no run of equal rows looks stuck.
struct Pyranometers {
    reads: Arc<AtomicU64>,
}

impl Pyranometers {
    fn answer(&self, req: &SlaveRequest<'static>) -> Result<Response, ExceptionCode> {
        if req.slave != UNIT {
            return Err(ExceptionCode::GatewayTargetDevice);
        }
        let n = self.reads.fetch_add(1, Ordering::SeqCst);
        match req.request {
            Request::ReadInputRegisters(0, 1) => Ok(Response::ReadInputRegisters(vec![if n % 7 == 3 { 0xFFFF } else { 800 + (n % 11) as u16 }])),
            Request::ReadInputRegisters(10, 2) => {
                let bits = (650.5_f32 + (n % 5) as f32).to_bits();
                Ok(Response::ReadInputRegisters(vec![(bits & 0xFFFF) as u16, (bits >> 16) as u16]))
            }
            Request::ReadHoldingRegisters(100, 1) => Ok(Response::ReadHoldingRegisters(vec![(7000 + (n % 13) * 3) as u16])),
            Request::ReadInputRegisters(..) | Request::ReadHoldingRegisters(..) => Err(ExceptionCode::IllegalDataAddress),
            _ => Err(ExceptionCode::IllegalFunction),
        }
    }
}

impl tokio_modbus::server::Service for Pyranometers {
    type Request = SlaveRequest<'static>;
    type Response = Response;
    type Exception = ExceptionCode;
    type Future = std::future::Ready<Result<Response, ExceptionCode>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        std::future::ready(self.answer(&req))
    }
}

/// A Modbus TCP server in a thread of its own; stopping it closes its connections.
struct Device {
    addr: SocketAddr,
    reads: Arc<AtomicU64>,
    shutdown: tokio::sync::oneshot::Sender<()>,
    thread: std::thread::JoinHandle<()>,
}

impl Device {
    fn start(bind: SocketAddr) -> Device {
        let listener = std::net::TcpListener::bind(bind).unwrap();
        listener.set_nonblocking(true).unwrap();
        let addr = listener.local_addr().unwrap();
        let reads = Arc::new(AtomicU64::new(0));
        let (shutdown, rx) = tokio::sync::oneshot::channel::<()>();
        let r = reads.clone();
        let thread = std::thread::spawn(move || {
            let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
            rt.block_on(async move {
                let server = tokio_modbus::server::tcp::Server::new(tokio::net::TcpListener::from_std(listener).unwrap());
                let on_connected = |stream, _peer| std::future::ready(Ok(Some((Pyranometers { reads: r.clone() }, stream))));
                let _ = server.serve_until(&on_connected, |_err| {}, async move { let _ = rx.await; }).await;
            });
            rt.shutdown_timeout(Duration::from_secs(1));
        });
        Device { addr, reads, shutdown, thread }
    }

    fn stop(self) {
        let _ = self.shutdown.send(());
        self.thread.join().unwrap();
    }
}

/// The demo site moved to where the sun stands high now (its local noon, some 20° of latitude
/// from the sun's declination), polling `device`.
fn site_file(dir: &Path, device: SocketAddr) -> PathBuf {
    let now = Utc::now();
    let decl = -23.44 * (std::f64::consts::TAU * (f64::from(now.ordinal()) + 10.0) / 365.0).cos();
    let text = std::fs::read_to_string(common::demo_site_for_now(dir, decl - 20.0)).unwrap();
    let modbus = format!(
        r#"
[measurements_modbus]
address = "{device}"
unit_id = {UNIT}
poll_s = 0.2
averaging_s = 2
timeout_s = 1.0

[[measurements_modbus.registers]]
column = "ghi_north-fixed_wm2"
address = 0

[[measurements_modbus.registers]]
column = "ghi_east-tracker_wm2"
address = 10
format = "f32"
word_order = "little"

[[measurements_modbus.registers]]
column = "ghi_south-tracker_wm2"
address = 100
kind = "holding"
format = "i16"
scale = 0.1
"#
    );
    let p = dir.join("site.toml");
    std::fs::write(&p, text + &modbus).unwrap();
    p
}

fn options(d: &Path, site: PathBuf) -> LiveOptions {
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
        // The feed counts as stopped 10 s after its newest row ended.
        health: HealthOptions { measurement_max_age_s: 10.0, ..Default::default() },
    }
}

/// A demo frame dropped (by rename) under the name of the time now.
fn drop_frame_now(src: &Path, incoming: &Path) {
    let name = nephocast::io::frame_name(&Utc::now(), "jpg");
    let tmp = incoming.join(format!(".{name}.part"));
    std::fs::copy(src, &tmp).unwrap();
    std::fs::rename(&tmp, incoming.join(name)).unwrap();
}

#[test]
fn modbus_feed_reaches_the_tuner_and_a_stopped_device_is_reported_and_rejoined() {
    let d = tempfile::tempdir().unwrap();
    let device = Device::start("127.0.0.1:0".parse().unwrap());
    let device_addr = device.addr;
    let o = options(d.path(), site_file(d.path(), device_addr));
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    // Rows come every 2 s from the device.
    wait_for("3 rows from the device", || (3..u64::MAX).contains(&u(&health(addr)["measurement_rows_read"])));
    let hl = health(addr);
    let m = &hl["measurement_feed_modbus"];
    assert_eq!(m["address"], device_addr.to_string(), "{hl}");
    assert_eq!(m["unit_id"], UNIT);
    assert_eq!(m["connected"], true, "{hl}");
    assert_eq!(m["in_outage"], false, "{hl}");
    assert!(u(&m["reads_ok"]) >= 10, "{hl}");
    assert_eq!(u(&m["errors"]), 0, "{hl}");
    assert!(u(&m["values_refused"]) >= 1, "the error code 65535 is refused: {hl}");
    assert!(u(&m["rows_made"]) >= 3, "{hl}");
    assert_eq!(u(&hl["measurement_errors"]), 0, "{hl}");
    assert!(u(&hl["measurement_rows"]) >= 3, "{hl}");
    assert!(device.reads.load(Ordering::SeqCst) >= 30);
    // Frames of the time now, each after a fresh row: the rows reach the transmittance tuning.
    let frames = demo_frames();
    for (i, f) in frames.iter().take(6).enumerate() {
        let rows = u(&health(addr)["measurement_rows_read"]);
        wait_for("a fresh row", || u(&health(addr)["measurement_rows_read"]) > rows);
        drop_frame_now(f, &incoming);
        wait_for("the frame", || u(&health(addr)["frames_processed"]) == i as u64 + 1);
    }
    let hl = health(addr);
    assert!(u(&hl["tuning_rows"]) > 0, "{hl}");
    assert_eq!(hl["health_state"], "ok", "{hl}");
    assert_eq!(hl["data_valid"], true);
    assert!(hl["measurement_age_s"].as_f64().unwrap() < 10.0, "{hl}");
    assert_eq!(u(&hl["tuning_resets"]), 0);
    assert!(hl["frames_rejected"].as_object().is_none_or(|r| r.is_empty()), "{hl}");

    // The device stops: the outage is counted and the connection state shown.
    device.stop();
    wait_for("the outage", || health(addr)["measurement_feed_modbus"]["in_outage"] == true);
    let hl = health(addr);
    let m = &hl["measurement_feed_modbus"];
    assert_eq!(m["connected"], false, "{hl}");
    assert_eq!(u(&m["outages"]), 1, "{hl}");
    assert!(u(&m["errors"]) >= 1, "{hl}");
    assert!(m["last_error"].as_str().is_some_and(|e| e.contains(&device_addr.to_string())), "{hl}");
    // Once the newest row ended more than 10 s ago the health says so; the forecasts stay valid.
    wait_for("no_measurements", || health(addr)["health_state"] == "no_measurements");
    assert_eq!(health(addr)["data_valid"], true);
    assert!(u(&health(addr)["measurement_feed_modbus"]["errors"]) >= 2, "failed reconnections are counted");
    // A frame then: the tuning forgets what it learnt and uses the configured transmittances.
    drop_frame_now(&frames[6], &incoming);
    wait_for("the frame", || u(&health(addr)["frames_processed"]) == 7);
    wait_for("the tuning reset", || u(&health(addr)["tuning_resets"]) == 1);
    assert_eq!(u(&health(addr)["tuning_rows"]), 0);

    // The device comes back on the same address: the poller reconnects (after its backoff) and
    // rows flow again.
    let rows = u(&health(addr)["measurement_rows_read"]);
    let device = Device::start(device_addr);
    wait_for("rows again", || u(&health(addr)["measurement_rows_read"]) > rows);
    let hl = health(addr);
    let m = &hl["measurement_feed_modbus"];
    assert_eq!(m["connected"], true, "{hl}");
    assert_eq!(m["in_outage"], false, "{hl}");
    assert_eq!(u(&m["outages"]), 1, "{hl}");
    wait_for("ok again", || health(addr)["health_state"] == "ok");
    let metrics = get(addr, "/metrics");
    assert!(metrics.contains("nephocast_modbus_feed_connected 1"), "{metrics}");
    assert!(metrics.lines().any(|l| l.starts_with("nephocast_modbus_feed_errors_total ") && !l.ends_with(" 0")), "{metrics}");
    h.stop();
    device.stop();
}

#[test]
fn check_reads_the_device_once_warns_when_it_is_away_and_refuses_two_feeds() {
    let d = tempfile::tempdir().unwrap();
    let device = Device::start("127.0.0.1:0".parse().unwrap());
    let device_addr = device.addr;
    let mut o = options(d.path(), site_file(d.path(), device_addr));
    let out = check(&o).unwrap().join("\n");
    assert!(out.contains(&format!("measurements feed: Modbus TCP {device_addr} unit {UNIT}, 3 register(s)")), "{out}");
    assert!(out.contains("read now: ghi_north-fixed_wm2 80"), "{out}");
    assert!(out.contains("ghi_east-tracker_wm2 65") && out.contains("ghi_south-tracker_wm2 70") && out.contains(" W/m²"), "{out}");
    device.stop();
    // Away: a warning naming the address, not a refusal (live mode keeps trying).
    let out = check(&o).unwrap().join("\n");
    assert!(out.lines().any(|l| l.starts_with("warning: measurements feed: Modbus TCP") && l.contains(&device_addr.to_string())), "{out}");
    // A CSV feed as well: refused before anything starts, naming both.
    o.health.measurements = Some(demo().join("measurements.csv"));
    let e = check(&o).unwrap_err().to_string();
    assert!(e.contains("--measurements") && e.contains("[measurements_modbus]"), "{e}");
    let e = start(o).err().expect("refused").to_string();
    assert!(e.contains("expected one measurement feed"), "{e}");
}

#[test]
fn readme_example_section_is_valid() {
    let readme = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md")).unwrap();
    let block = readme.split("```toml\n").skip(1).filter_map(|b| b.split("```").next()).find(|b| b.starts_with("[measurements_modbus]")).expect("the README's [measurements_modbus] example");
    let d = tempfile::tempdir().unwrap();
    let site = std::fs::read_to_string(demo().join("site.toml")).unwrap().replace("calibration = \"calibration/", &format!("calibration = \"{}/calibration/", demo().display()));
    let p = d.path().join("site.toml");
    std::fs::write(&p, format!("{site}\n{block}")).unwrap();
    let s = nephocast::config::Site::load(&p).unwrap_or_else(|e| panic!("{e}"));
    let m = s.file.measurements_modbus.expect("the section");
    assert_eq!((m.address.as_str(), m.unit_id, m.registers.len()), ("192.168.1.20:502", 1, 4));
    assert_eq!(m.registers[1].word_order, nephocast::config::WordOrder::Little);
    // The meters: 1234.5 kW in tenths of kW; 2.5 MW as an f32 (0x4020_0000) read as kW.
    assert_eq!(m.registers[2].decode(&[0, 12_345]), 1234.5);
    assert_eq!(m.registers[3].decode(&[0x4020, 0]), 2500.0);
}
