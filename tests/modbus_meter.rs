//! The plant's power meters polled over Modbus TCP as live mode's measurement feed, against a real
//! Modbus TCP server (tokio-modbus) in the test: the plant meter as an f32 in MW (input registers
//! 0–1, high word first) and the north-fixed block's meter as a u16 in kW (holding register 200).
//! The meter sends an error value now and then (a NaN float; 65535 kW from a 5 MW block); those
//! samples are refused and counted, and the nowcast JSON carries the metered plant power of the
//! last 30 minutes (`plant_power_measured`) and the block meter's newest reading
//! (`blocks_power_measured`), every value within what the meter served. `live
//! --check` reads the registers once in their units and names the field of a bad register.
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

fn get(addr: SocketAddr, path: &str) -> String {
    let mut s = TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(s, "GET {path} HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").unwrap();
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    let text = String::from_utf8_lossy(&out).to_string();
    text.split("\r\n\r\n").nth(1).unwrap_or("").to_string()
}

fn json(addr: SocketAddr, path: &str) -> serde_json::Value {
    serde_json::from_str(&get(addr, path)).unwrap_or(serde_json::Value::Null)
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

/// The plant meter serves 12.50–12.54 MW (every 8th read a NaN float); the block meter 3100–3106
/// kW (every 9th read 65535). Values move with each read so no run of equal rows looks stuck.
const PLANT_KW: (f64, f64) = (12_500.0, 12_540.0);
const BLOCK_KW: (f64, f64) = (3100.0, 3106.0);

struct Meters {
    reads: Arc<AtomicU64>,
}

impl Meters {
    fn answer(&self, req: &SlaveRequest<'static>) -> Result<Response, ExceptionCode> {
        let n = self.reads.fetch_add(1, Ordering::SeqCst);
        match req.request {
            Request::ReadInputRegisters(0, 2) => {
                let mw = if n % 8 == 5 { f32::NAN } else { 12.5 + (n % 5) as f32 * 0.01 };
                let bits = mw.to_bits();
                Ok(Response::ReadInputRegisters(vec![(bits >> 16) as u16, (bits & 0xFFFF) as u16]))
            }
            Request::ReadHoldingRegisters(200, 1) => Ok(Response::ReadHoldingRegisters(vec![if n % 9 == 4 { 0xFFFF } else { 3100 + (n % 7) as u16 }])),
            Request::ReadInputRegisters(..) | Request::ReadHoldingRegisters(..) => Err(ExceptionCode::IllegalDataAddress),
            _ => Err(ExceptionCode::IllegalFunction),
        }
    }
}

impl tokio_modbus::server::Service for Meters {
    type Request = SlaveRequest<'static>;
    type Response = Response;
    type Exception = ExceptionCode;
    type Future = std::future::Ready<Result<Response, ExceptionCode>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        std::future::ready(self.answer(&req))
    }
}

/// A Modbus TCP server in a thread of its own.
struct Device {
    addr: SocketAddr,
    shutdown: tokio::sync::oneshot::Sender<()>,
    thread: std::thread::JoinHandle<()>,
}

impl Device {
    fn start() -> Device {
        let listener = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
        listener.set_nonblocking(true).unwrap();
        let addr = listener.local_addr().unwrap();
        let reads = Arc::new(AtomicU64::new(0));
        let (shutdown, rx) = tokio::sync::oneshot::channel::<()>();
        let thread = std::thread::spawn(move || {
            let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
            rt.block_on(async move {
                let server = tokio_modbus::server::tcp::Server::new(tokio::net::TcpListener::from_std(listener).unwrap());
                let on_connected = |stream, _peer| std::future::ready(Ok(Some((Meters { reads: reads.clone() }, stream))));
                let _ = server.serve_until(&on_connected, |_err| {}, async move { let _ = rx.await; }).await;
            });
            rt.shutdown_timeout(Duration::from_secs(1));
        });
        Device { addr, shutdown, thread }
    }

    fn stop(self) {
        let _ = self.shutdown.send(());
        self.thread.join().unwrap();
    }
}

/// The registers of the two meters (`extra` is appended to the first register's entry).
fn meter_section(device: SocketAddr, extra: &str) -> String {
    format!(
        r#"
[measurements_modbus]
address = "{device}"
poll_s = 0.1
averaging_s = 1
timeout_s = 1.0

[[measurements_modbus.registers]]
column = "power_plant_kw"
address = 0
format = "f32"
unit = "MW"
{extra}
[[measurements_modbus.registers]]
column = "power_north-fixed_kw"
address = 200
kind = "holding"
unit = "kW"
"#
    )
}

/// The demo site moved to where the sun stands high now, with `section` appended.
fn site_file(dir: &Path, section: &str) -> PathBuf {
    let now = Utc::now();
    let decl = -23.44 * (std::f64::consts::TAU * (f64::from(now.ordinal()) + 10.0) / 365.0).cos();
    let text = std::fs::read_to_string(common::demo_site_for_now(dir, decl - 20.0)).unwrap();
    let p = dir.join("site.toml");
    std::fs::write(&p, text + section).unwrap();
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
        health: HealthOptions { measurement_max_age_s: 10.0, ..Default::default() },
    }
}

#[test]
fn metered_plant_power_reaches_the_nowcast_with_error_values_refused() {
    let d = tempfile::tempdir().unwrap();
    let device = Device::start();
    let o = options(d.path(), site_file(d.path(), &meter_section(device.addr, "")));
    let incoming = o.incoming.clone();
    let h = start(o).unwrap();
    let addr = h.addr;
    // Rows every second from the meters.
    wait_for("3 rows from the meters", || (3..u64::MAX).contains(&u(&json(addr, "/api/health")["measurement_rows_read"])));
    let frame = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).min().unwrap();
    let name = nephocast::io::frame_name(&Utc::now(), "jpg");
    std::fs::copy(&frame, incoming.join(format!(".{name}.part"))).unwrap();
    std::fs::rename(incoming.join(format!(".{name}.part")), incoming.join(&name)).unwrap();
    wait_for("the frame", || u(&json(addr, "/api/health")["frames_processed"]) == 1);
    let hl = json(addr, "/api/health");
    let m = &hl["measurement_feed_modbus"];
    assert!(u(&m["values_refused"]) >= 2, "the NaN float and 65535 kW are refused: {hl}");
    assert_eq!(u(&hl["measurement_errors"]), 0, "{hl}");
    assert_eq!(hl["health_state"], "ok", "{hl}");
    let n = json(addr, "/api/nowcast");
    let measured = n["plant_power_measured"].as_array().unwrap_or_else(|| panic!("no plant_power_measured: {n}"));
    assert!(measured.len() >= 3, "{measured:?}");
    for r in measured {
        let kw = r["power_kw"].as_f64().unwrap();
        // Period means of what the meter served (f32 MW: a few W of rounding).
        assert!(kw >= PLANT_KW.0 - 0.01 && kw <= PLANT_KW.1 + 0.01, "{r}");
        assert!(r["time_utc"].as_str().is_some_and(|t| t.ends_with(".500Z")), "stamped at the middle of its 1-s period: {r}");
    }
    // The forecast it is shown against is in the same nowcast (plant P50 in kW).
    assert!(n["forecast"].as_array().unwrap().iter().any(|r| r["block"] == "plant" && r["power_kw"].as_f64().is_some()));
    // The block meter's newest reading is carried for the per-block table (within what it served;
    // its error code 65535 refused).
    let blocks = n["blocks_power_measured"].as_array().unwrap_or_else(|| panic!("no blocks_power_measured: {n}"));
    assert_eq!(blocks.len(), 1, "only north-fixed has a meter: {blocks:?}");
    assert_eq!(blocks[0]["block"], "north-fixed");
    let kw = blocks[0]["power_kw"].as_f64().unwrap();
    assert!((BLOCK_KW.0..=BLOCK_KW.1).contains(&kw), "{blocks:?}");
    let metrics = get(addr, "/metrics");
    assert!(metrics.lines().any(|l| l.starts_with("nephocast_modbus_feed_values_refused_total ") && !l.ends_with(" 0")), "{metrics}");
    h.stop();

    // `live --check` reads the registers once, in their columns' units.
    let o = options(d.path(), site_file(d.path(), &meter_section(device.addr, "")));
    let out = check(&o).unwrap().join("\n");
    let line = out.lines().find(|l| l.starts_with("measurements feed: read now:")).unwrap_or_else(|| panic!("{out}"));
    let kw = |col: &str| -> f64 {
        let rest = line.split(&format!("{col} ")).nth(1).unwrap_or_else(|| panic!("{line}"));
        assert!(rest.split(',').next().unwrap().ends_with(" kW"), "{line}");
        rest.split(' ').next().unwrap().parse().unwrap_or(f64::NAN)
    };
    let (plant, block) = (kw("power_plant_kw"), kw("power_north-fixed_kw"));
    assert!(plant.is_nan() || (PLANT_KW.0 - 0.01..=PLANT_KW.1 + 0.01).contains(&plant), "{line}");
    assert!(block == 65_535.0 || (BLOCK_KW.0..=BLOCK_KW.1).contains(&block), "{line}");
    device.stop();
}

#[test]
fn check_names_the_field_of_a_bad_meter_register() {
    let d = tempfile::tempdir().unwrap();
    let addr: SocketAddr = "127.0.0.1:9".parse().unwrap();
    let cases = [
        (meter_section(addr, "").replace("power_north-fixed_kw", "power_nowhere_kw"), "measurements_modbus.registers[1].column", "power_plant_kw, power_north-fixed_kw"),
        (meter_section(addr, "").replace("unit = \"MW\"", "unit = \"W/m2\""), "measurements_modbus.registers[0].unit", "\"kW\", \"W\", \"MW\""),
        (meter_section(addr, "").replace("poll_s = 0.1", "poll_s = 5.0"), "measurements_modbus.poll_s", "1"),
    ];
    for (section, field, expected) in cases {
        let o = options(d.path(), site_file(d.path(), &section));
        let e = check(&o).expect_err("refused").to_string();
        assert!(e.contains(field) && e.contains(expected), "{field}: {e}");
    }
}
