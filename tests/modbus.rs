//! The plant controller's Modbus TCP interface: the committed register table is the generated one,
//! and a real Modbus client reads a live service while frames arrive, checks the registers against
//! the JSON API, is refused when it writes, and measures how soon the registers follow a nowcast.
#![cfg(feature = "server")]
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};

use nephocast::serve::modbus::{self, HORIZONS_MIN, ModbusOptions, POWER_MISSING, QUANTILES, TARGET_BASE, TARGET_STRIDE};
use nephocast::serve::{LiveOptions, ServerOptions, start};
use tokio_modbus::ExceptionCode;
use tokio_modbus::client::sync::{Context, Reader, Writer, tcp};

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

#[test]
fn committed_register_table_is_the_generated_one() {
    let site = nephocast::config::Site::load_without_camera(&demo().join("site.toml")).unwrap();
    let generated = modbus::markdown(&modbus::targets_of(&site));
    let committed = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/modbus-registers.md")).unwrap();
    assert!(
        committed == generated,
        "docs/modbus-registers.md differs from the register map: regenerate it with `nephocast registers --site demo-data/site.toml > docs/modbus-registers.md`"
    );
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
        std::thread::sleep(Duration::from_millis(20));
    }
}

fn client(addr: SocketAddr) -> Context {
    let mut c = tcp::connect_with_timeout(addr, Some(Duration::from_secs(10))).unwrap();
    c.set_timeout(Duration::from_secs(10));
    c
}

/// The whole image, in reads of at most 125 registers.
fn read_all(c: &mut Context, len: u16) -> Vec<u16> {
    let mut v = vec![];
    let mut a = 0;
    while a < len {
        let n = (len - a).min(125);
        v.extend(c.read_input_registers(a, n).unwrap().unwrap());
        a += n;
    }
    v
}

fn u32_at(w: &[u16], a: usize) -> u32 {
    (u32::from(w[a]) << 16) | u32::from(w[a + 1])
}

fn i32_at(w: &[u16], a: usize) -> i32 {
    u32_at(w, a) as i32
}

fn header(name: &str) -> usize {
    modbus::header_fields().into_iter().find(|f| f.name == name).unwrap().offset as usize
}

#[test]
fn modbus_client_reads_registers_that_match_the_api_while_frames_arrive() {
    let d = tempfile::tempdir().unwrap();
    let incoming = d.path().join("incoming");
    std::fs::create_dir_all(&incoming).unwrap();
    // The demo frames are dated months back: data-valid is judged with a wide age here, and
    // against the usual age below.
    let mb = ModbusOptions { bind: "127.0.0.1:0".parse().unwrap(), max_connections: 3, max_frame_age_s: 1e9, idle_timeout: Duration::from_secs(1), ..Default::default() };
    let opts = LiveOptions {
        site: demo().join("site.toml"),
        incoming: incoming.clone(),
        db: d.path().join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: None,
        server: ServerOptions { modbus: Some(mb), ..Default::default() },
        keep_s: 86_400,
        poll_ms: 40,
        overlay_every: 0,
        health: Default::default(),
    };
    let h = start(opts).unwrap();
    let (http, maddr) = (h.addr, h.modbus_addr.unwrap());
    let feed = h.modbus_feed();
    let targets = feed.targets().to_vec();
    assert_eq!(targets.len(), 5);
    let len = TARGET_BASE + TARGET_STRIDE * targets.len() as u16;
    let mut c = client(maddr);

    // Before the first nowcast: not valid, no heartbeat, age unknown.
    let w = read_all(&mut c, len);
    assert_eq!(w[header("map_version")], modbus::MAP_VERSION);
    assert_eq!(w[header("data_valid")], 0);
    assert_eq!(w[header("heartbeat")], 0);
    assert_eq!(u32_at(&w, header("frame_age_s")), u32::MAX);
    assert_eq!(w[header("target_count")] as usize, targets.len());
    // Holding registers read the same image.
    assert_eq!(c.read_holding_registers(0, 17).unwrap().unwrap(), w[..17].to_vec());

    // Read-only: writes are refused, and so are reads outside the image.
    assert_eq!(c.write_single_register(0, 1).unwrap(), Err(ExceptionCode::IllegalFunction));
    assert_eq!(c.write_multiple_registers(100, &[1, 2]).unwrap(), Err(ExceptionCode::IllegalFunction));
    assert_eq!(c.write_single_coil(0, true).unwrap(), Err(ExceptionCode::IllegalFunction));
    assert_eq!(c.read_input_registers(len - 1, 2).unwrap(), Err(ExceptionCode::IllegalDataAddress));
    assert_eq!(c.read_input_registers(0, 17).unwrap().unwrap(), w[..17].to_vec(), "nothing written");

    // A second client polls the heartbeat as fast as it can and notes when each nowcast shows.
    let stop = Arc::new(AtomicBool::new(false));
    let (stop2, feed2) = (stop.clone(), feed.clone());
    let (ready_tx, ready_rx) = std::sync::mpsc::channel();
    let poller = std::thread::spawn(move || {
        let mut p = client(maddr);
        p.read_input_registers(0, 1).unwrap().unwrap();
        ready_tx.send(()).unwrap();
        let (mut last, mut delays_ms) = (0u16, vec![]);
        let t0 = Instant::now();
        while !stop2.load(Ordering::SeqCst) && t0.elapsed() < Duration::from_secs(300) {
            let hb = p.read_input_registers(2, 1).unwrap().unwrap()[0];
            let seen = Instant::now();
            if hb != last {
                last = hb;
                if let Some(s) = feed2.latest().filter(|s| s.heartbeat % 65536 == u64::from(hb)) {
                    delays_ms.push(seen.duration_since(s.published).as_secs_f64() * 1000.0);
                }
            }
        }
        delays_ms
    });

    ready_rx.recv_timeout(Duration::from_secs(60)).unwrap();
    // The cap: a third connection is served, a fourth is closed at once.
    let mut third = client(maddr);
    assert!(third.read_input_registers(0, 1).unwrap().is_ok());
    let mut fourth = tcp::connect_with_timeout(maddr, Some(Duration::from_secs(10))).unwrap();
    fourth.set_timeout(Duration::from_secs(10));
    assert!(fourth.read_input_registers(0, 1).is_err(), "a connection beyond the cap is closed");
    drop(third);
    drop(c);
    // A connection that stays silent past the idle time is closed, and its place freed.
    // (It is first answered once, which shows it was admitted: the closed ones' places are freed
    // as the server notices them.)
    let mut silent = None;
    wait_for("a place for one more connection", || {
        let mut t = TcpStream::connect(maddr).unwrap();
        t.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
        // Read input register 0, once, as raw Modbus TCP.
        t.write_all(&[0, 1, 0, 0, 0, 6, 1, 4, 0, 0, 0, 1]).unwrap();
        let mut answer = [0u8; 11];
        let ok = t.read_exact(&mut answer).is_ok() && answer[7] == 4;
        silent = ok.then_some(t);
        ok
    });
    let mut buf = [0u8; 1];
    assert!(matches!(silent.unwrap().read(&mut buf), Ok(0) | Err(_)), "the idle connection is closed");

    let mut frames: Vec<PathBuf> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    frames.sort();
    let mut heartbeats = vec![];
    let mut codes_seen = std::collections::BTreeSet::new();
    let mut ramps_checked = 0;
    for (i, f) in frames.iter().take(10).enumerate() {
        let name = f.file_name().unwrap().to_str().unwrap();
        let tmp = incoming.join(format!(".{name}.part"));
        std::fs::copy(f, &tmp).unwrap();
        std::fs::rename(&tmp, incoming.join(name)).unwrap();
        wait_for("the frame to be processed", || get(http, "/api/health")["frames_processed"].as_u64() == Some(i as u64 + 1));
        let api = get(http, "/api/nowcast");
        let mut c = client(maddr);
        let w = read_all(&mut c, len);
        let health = get(http, "/api/health");
        // The same nowcast on both sides.
        let issue = chrono::DateTime::parse_from_rfc3339(api["issue_time_utc"].as_str().unwrap()).unwrap();
        assert_eq!(i64::from(u32_at(&w, header("frame_time_unix_s"))), issue.timestamp());
        heartbeats.push(w[header("heartbeat")]);
        // The demo frames are months old, so the health state calls them stale: the registers'
        // data-valid flag agrees with the API's (tests/live_health.rs sees it read 1 on fresh frames).
        assert_eq!(w[header("data_valid")], u16::from(health["data_valid"].as_bool().unwrap()), "{health}");
        let age = f64::from(u32_at(&w, header("frame_age_s")));
        assert!((age - health["last_frame_age_s"].as_f64().unwrap()).abs() <= 2.0, "{age} vs {health}");
        let code = ["calm", "caution", "alert", "variable"].iter().position(|n| api["alarm"] == *n).unwrap() as u16;
        assert_eq!(w[header("alarm_code")], code);
        codes_seen.insert(code);
        // The ramp registers hold the ramp behind the alarm (its basis), none while calm.
        let basis = &api["alarm_basis"];
        if basis.is_null() {
            assert_eq!((w[header("ramp_probability")], w[header("ramp_direction")]), (0, 0), "a ramp without an alarm basis: {api}");
            assert_eq!(u32_at(&w, header("ramp_start_unix_s")), 0);
        } else {
            ramps_checked += 1;
            let p = basis["ramp"]["probability"].as_f64().unwrap();
            assert!((f64::from(w[header("ramp_probability")]) * 0.001 - p).abs() <= 0.0005 + 1e-9, "{p}");
            let dir = if basis["ramp"]["direction"] == "up" { 1 } else { -1 };
            assert_eq!(w[header("ramp_direction")] as i16, dir);
            assert!(u32_at(&w, header("ramp_start_unix_s")) > 0);
        }
        // Every target's P10/P50/P90 at every horizon, within the scaling's rounding (1 W).
        let rows = api["forecast"].as_array().unwrap();
        let tf = modbus::target_fields();
        for (k, t) in targets.iter().enumerate() {
            let base = (TARGET_BASE + TARGET_STRIDE * k as u16) as usize;
            assert_eq!(w[base] as usize, k);
            for (hi, m) in HORIZONS_MIN.iter().enumerate() {
                let row = rows.iter().find(|r| r["block"] == t.as_str() && r["horizon_s"].as_u64() == Some(u64::from(m * 60))).unwrap();
                for (qi, q) in QUANTILES.iter().enumerate() {
                    let field = tf.iter().find(|f| f.source == modbus::Source::Power { h: hi, q: qi }).unwrap();
                    let reg = i32_at(&w, base + field.offset as usize);
                    match row[format!("power_{q}_kw")].as_f64() {
                        Some(kw) => assert!((f64::from(reg) - kw * 1000.0).abs() <= 0.5 + 1e-6, "{t} {m} min {q}: {reg} W vs {kw} kW"),
                        None => assert_eq!(reg, POWER_MISSING, "{t} {m} min {q}"),
                    }
                }
            }
        }
    }
    // One heartbeat per nowcast.
    assert_eq!(heartbeats, (1..=10).collect::<Vec<u16>>());
    // The same frames judged against the usual age are stale: data-valid reads 0.
    assert_eq!(feed.image(chrono::Utc::now(), ModbusOptions::default().max_frame_age_s)[header("data_valid")], 0);
    stop.store(true, Ordering::SeqCst);
    let mut delays = poller.join().unwrap();
    h.stop();
    delays.sort_by(f64::total_cmp);
    assert!(!delays.is_empty());
    println!(
        "nowcast → registers seen by a polling client: {} nowcasts, median {:.3} ms, max {:.3} ms; alarm codes seen {codes_seen:?}; nowcasts with an alarm's ramp {ramps_checked}",
        delays.len(),
        delays[delays.len() / 2],
        delays[delays.len() - 1]
    );
}

#[test]
fn registers_command_prints_the_committed_table() {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_nephocast")).args(["registers", "--site"]).arg(demo().join("site.toml")).output().unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let committed = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("docs/modbus-registers.md")).unwrap();
    assert!(String::from_utf8_lossy(&out.stdout) == committed, "`nephocast registers` differs from docs/modbus-registers.md");
    // A missing site file is named.
    let bad = std::process::Command::new(env!("CARGO_BIN_EXE_nephocast")).args(["registers", "--site", "no/such/site.toml"]).output().unwrap();
    assert!(!bad.status.success());
    assert!(String::from_utf8_lossy(&bad.stderr).contains("no/such/site.toml"), "{}", String::from_utf8_lossy(&bad.stderr));
}
