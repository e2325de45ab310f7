//! The live server under hostile clients: Host allow-list, security headers, the acknowledgement
//! rate limit, append-only acknowledgements, bounded fields and bodies, where it may listen, where
//! the token comes from, and idle or slow connections. Each test starts the service on an
//! ephemeral loopback port with the demo site and no frames (the alarm log is seeded directly).
#![cfg(feature = "server")]
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream};
use std::path::Path;
use std::time::{Duration, Instant};

use nephocast::serve::{LiveHandle, LiveOptions, ServerOptions, start};

const TOKEN: &str = "a-long-enough-test-token-0123456789";

fn options(d: &Path, token: Option<&str>, server: ServerOptions) -> LiveOptions {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    LiveOptions {
        site: demo.join("site.toml"),
        incoming: d.join("incoming"),
        db: d.join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: token.map(String::from),
        server,
        keep_s: 86_400,
        poll_ms: 200,
        overlay_every: 0,
        health: Default::default(),
    }
}

/// The service with one alarm in its log; returns the handle and the alarm's id.
fn service_with_alarm(d: &Path, server: ServerOptions) -> (LiveHandle, i64) {
    let db = d.join("live.sqlite");
    let c = nephocast::serve::db::open(&db).unwrap();
    let change = nephocast::ramp::AlarmChange {
        time_utc: "2026-06-14T09:00:00Z".into(),
        from: nephocast::ramp::AlarmState::Calm,
        to: nephocast::ramp::AlarmState::Caution,
        probability: 0.7,
        reason: "test".into(),
    };
    let id = nephocast::serve::db::insert_alarm(&c, &change).unwrap();
    drop(c);
    (start(options(d, Some(TOKEN), server)).unwrap(), id)
}

struct Answer {
    code: u16,
    head: String,
    body: String,
}

/// One request on its own connection; `extra` is raw header lines.
fn request(addr: SocketAddr, method: &str, path: &str, host: Option<&str>, extra: &str, body: &str) -> Answer {
    let mut s = TcpStream::connect(addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    let host = host.map(|h| format!("Host: {h}\r\n")).unwrap_or_default();
    let req = format!("{method} {path} HTTP/1.1\r\n{host}Connection: close\r\n{extra}Content-Length: {}\r\n\r\n{body}", body.len());
    s.write_all(req.as_bytes()).unwrap();
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    parse(&String::from_utf8_lossy(&out))
}

fn parse(text: &str) -> Answer {
    let code = text.split_whitespace().nth(1).and_then(|c| c.parse().ok()).unwrap_or(0);
    let (head, body) = text.split_once("\r\n\r\n").unwrap_or((text, ""));
    Answer { code, head: head.to_ascii_lowercase(), body: body.to_string() }
}

fn ack(addr: SocketAddr, body: &str) -> Answer {
    request(addr, "POST", "/api/alarms/ack", Some("localhost"), "Content-Type: application/json\r\n", body)
}

#[test]
fn other_hosts_are_refused_and_every_answer_has_the_security_headers() {
    let d = tempfile::tempdir().unwrap();
    let h = start(options(d.path(), None, ServerOptions::default())).unwrap();
    let port = h.addr.port();
    for host in ["localhost".to_string(), format!("localhost:{port}"), format!("127.0.0.1:{port}"), "[::1]".into(), format!("[::1]:{port}")] {
        assert_eq!(request(h.addr, "GET", "/api/health", Some(&host), "", "").code, 200, "{host}");
    }
    // A rebinding page's name, another address, no Host at all, an absolute URI naming another host.
    for host in [Some("evil.example"), Some(&*format!("evil.example:{port}")), Some("localhost.evil.example"), Some("10.1.2.3"), None] {
        let a = request(h.addr, "GET", "/api/health", host, "", "");
        assert_eq!(a.code, 421, "{host:?}: {}", a.body);
        assert!(a.head.contains("x-frame-options: deny"), "{}", a.head);
    }
    assert_eq!(request(h.addr, "GET", "http://evil.example/api/health", Some("localhost"), "", "").code, 421);
    // The dashboard with its headers; the CSP allows its inline script and style by hash only.
    let page = request(h.addr, "GET", "/", Some("localhost"), "", "");
    assert_eq!(page.code, 200);
    for want in ["x-frame-options: deny", "x-content-type-options: nosniff", "referrer-policy: no-referrer", "content-security-policy: default-src 'none'", "frame-ancestors 'none'", "script-src 'sha256-"] {
        assert!(page.head.contains(want), "{want} missing in\n{}", page.head);
    }
    assert!(!page.head.contains("unsafe-inline"));
    let api = request(h.addr, "GET", "/api/alarms", Some("localhost"), "", "");
    assert!(api.head.contains("x-content-type-options: nosniff") && api.head.contains("content-security-policy"));
    h.stop();
}

#[test]
fn a_burst_of_wrong_tokens_is_held_back() {
    let d = tempfile::tempdir().unwrap();
    let (h, id) = service_with_alarm(d.path(), ServerOptions::default());
    let (mut checked, mut held, mut other) = (0, 0, 0);
    let t = Instant::now();
    for k in 0..1000 {
        // One connection per guess: a refused guess's body is not read, so the server may close a
        // kept-alive connection after answering it.
        let a = ack(h.addr, &format!("{{\"id\":{id},\"token\":\"guess-{k}\"}}"));
        match a.code {
            403 => checked += 1,
            429 => {
                assert!(a.head.contains("retry-after:"), "{}", a.head);
                held += 1
            }
            _ => other += 1,
        }
    }
    eprintln!("1000 wrong tokens in {:.3} s: {checked} checked (403), {held} held back (429), {other} other", t.elapsed().as_secs_f64());
    // The lock-out doubles (1 s, 2 s, 4 s ...): however long the burst takes, only a handful of
    // guesses are ever compared.
    assert!((1..=10).contains(&checked), "{checked} guesses checked");
    assert_eq!(other, 0);
    // While locked out, even the right token is not looked at.
    assert_eq!(ack(h.addr, &format!("{{\"id\":{id},\"token\":\"{TOKEN}\"}}")).code, 429);
    h.stop();
}

#[test]
fn the_first_acknowledgement_is_kept_and_fields_are_bounded() {
    let d = tempfile::tempdir().unwrap();
    let (h, id) = service_with_alarm(d.path(), ServerOptions::default());
    // Refused before the token is looked at: overlong or unprintable `by`, big or non-JSON bodies.
    let long = "x".repeat(65);
    let a = ack(h.addr, &format!("{{\"id\":{id},\"token\":\"{TOKEN}\",\"by\":\"{long}\"}}"));
    assert_eq!(a.code, 422, "{}", a.body);
    assert!(a.body.contains("by: expected at most 64"), "{}", a.body);
    assert_eq!(ack(h.addr, &format!("{{\"id\":{id},\"token\":\"{TOKEN}\",\"by\":\"a\\u0007b\"}}")).code, 422);
    let big = format!("{{\"id\":{id},\"token\":\"{TOKEN}\",\"pad\":\"{}\"}}", "p".repeat(5000));
    assert_eq!(ack(h.addr, &big).code, 413);
    let form = request(h.addr, "POST", "/api/alarms/ack", Some("localhost"), "Content-Type: application/x-www-form-urlencoded\r\n", "id=1");
    assert_eq!(form.code, 415);
    assert_eq!(ack(h.addr, "{\"id\":\"one\"}").code, 400);
    // The first acknowledgement ...
    let first = ack(h.addr, &format!("{{\"id\":{id},\"token\":\"{TOKEN}\",\"by\":\"  Ana  \"}}"));
    assert_eq!(first.code, 200, "{}", first.body);
    // ... is kept: a second one is a conflict that names it.
    let second = ack(h.addr, &format!("{{\"id\":{id},\"token\":\"{TOKEN}\",\"by\":\"Bo\"}}"));
    assert_eq!(second.code, 409, "{}", second.body);
    assert!(second.body.contains("already acknowledged") && second.body.contains("Ana"), "{}", second.body);
    let log: serde_json::Value = serde_json::from_str(&request(h.addr, "GET", "/api/alarms", Some("localhost"), "", "").body).unwrap();
    assert_eq!(log["log"][0]["acked_by"], "Ana");
    assert_eq!(ack(h.addr, &format!("{{\"id\":{},\"token\":\"{TOKEN}\"}}", id + 100)).code, 404);
    h.stop();
}

#[test]
fn a_non_loopback_address_needs_a_token_or_an_explicit_flag() {
    let d = tempfile::tempdir().unwrap();
    let mut o = options(d.path(), None, ServerOptions::default());
    o.bind = "0.0.0.0:0".parse().unwrap();
    let e = start(o.clone()).err().expect("refused without a token").to_string();
    assert!(e.contains("non-loopback") && e.contains("--allow-non-loopback"), "{e}");
    o.server.allow_non_loopback = true;
    let h = start(o.clone()).unwrap();
    assert!(h.warnings.iter().any(|w| w.contains("non-loopback") && w.contains("without an acknowledgement token")), "{:?}", h.warnings);
    h.stop();
    let mut o = options(d.path(), Some(TOKEN), ServerOptions::default());
    o.bind = "0.0.0.0:0".parse().unwrap();
    let h = start(o).unwrap();
    assert!(h.warnings.iter().any(|w| w.contains("clear text")), "{:?}", h.warnings);
    h.stop();
    // Loopback needs neither, and says nothing.
    let h = start(options(d.path(), None, ServerOptions::default())).unwrap();
    assert!(h.warnings.iter().all(|w| !w.contains("non-loopback")), "{:?}", h.warnings);
    h.stop();
}

#[test]
fn the_token_comes_from_a_file_or_the_environment_never_argv() {
    use clap::Parser;
    use nephocast::cli::Cli;
    use nephocast::serve::guard::read_ack_token;
    let base = ["nephocast", "live", "--site", "s.toml", "--incoming", "in"];
    let argv = Cli::try_parse_from(base.iter().copied().chain(["--ack-token", "s3cret"]));
    assert!(argv.is_err(), "--ack-token must not exist");
    assert!(Cli::try_parse_from(base.iter().copied().chain(["--ack-token-file", "/run/t"])).is_ok());
    let d = tempfile::tempdir().unwrap();
    let f = d.path().join("token");
    std::fs::write(&f, format!("{TOKEN}\n")).unwrap();
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt as _;
        std::fs::set_permissions(&f, std::fs::Permissions::from_mode(0o644)).unwrap();
        let (t, w) = read_ack_token(Some(&f), None).unwrap();
        assert_eq!(t.as_deref(), Some(TOKEN));
        assert!(w.iter().any(|w| w.contains("readable by others")), "{w:?}");
        std::fs::set_permissions(&f, std::fs::Permissions::from_mode(0o600)).unwrap();
    }
    let (t, w) = read_ack_token(Some(&f), None).unwrap();
    assert_eq!(t.as_deref(), Some(TOKEN));
    assert!(w.is_empty(), "{w:?}");
    let (t, _) = read_ack_token(None, Some(format!(" {TOKEN} "))).unwrap();
    assert_eq!(t.as_deref(), Some(TOKEN));
    assert_eq!(read_ack_token(None, None).unwrap().0, None);
    let (_, w) = read_ack_token(None, Some("short".into())).unwrap();
    assert!(w.iter().any(|w| w.contains("5 characters")), "{w:?}");
    assert!(read_ack_token(Some(&f), Some("x".into())).unwrap_err().to_string().contains("both"));
    std::fs::write(&f, "\n").unwrap();
    assert!(read_ack_token(Some(&f), None).unwrap_err().to_string().contains("empty"));
    std::fs::write(&f, "one\ntwo\n").unwrap();
    assert!(read_ack_token(Some(&f), None).unwrap_err().to_string().contains("one line"));
    let missing = d.path().join("missing");
    assert!(read_ack_token(Some(&missing), None).unwrap_err().to_string().contains("missing"));
}

#[test]
fn health_answers_with_a_thousand_idle_connections_open() {
    let d = tempfile::tempdir().unwrap();
    let h = start(options(d.path(), None, ServerOptions::default())).unwrap();
    let t = Instant::now();
    let idle: Vec<TcpStream> = (0..1000).map(|_| TcpStream::connect(h.addr).unwrap()).collect();
    eprintln!("1000 idle connections opened in {:.2} s", t.elapsed().as_secs_f64());
    // Half of them have started a request and stalled.
    for s in idle.iter().step_by(2) {
        let mut s = s;
        let _ = s.write_all(b"GET /api/health HTTP/1.1\r\nHost: local");
    }
    let mut latencies = vec![];
    for _ in 0..5 {
        let t = Instant::now();
        let a = request(h.addr, "GET", "/api/health", Some("localhost"), "", "");
        latencies.push(t.elapsed().as_secs_f64() * 1000.0);
        assert_eq!(a.code, 200, "health did not answer within the 10 s guard");
    }
    eprintln!("health latency with 1000 idle connections open: {latencies:.1?} ms");
    drop(idle);
    h.stop();
}

#[test]
fn connections_beyond_the_cap_wait_and_stalled_ones_are_dropped() {
    let d = tempfile::tempdir().unwrap();
    let server = ServerOptions { max_connections: 3, header_timeout: Duration::from_secs(2), ..Default::default() };
    let h = start(options(d.path(), None, server)).unwrap();
    // A client that stops mid-headers is closed by the header timeout (the guard turns a hang into a failure).
    let mut slow = TcpStream::connect(h.addr).unwrap();
    slow.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    slow.write_all(b"GET /api/health HTTP/1.1\r\nHost: loc").unwrap();
    let mut buf = Vec::new();
    let r = slow.read_to_end(&mut buf);
    assert!(r.is_ok(), "the stalled connection was not closed: {r:?}");
    // Three idle connections fill the cap; a fourth is answered only once one of them goes.
    let idle: Vec<TcpStream> = (0..3).map(|_| TcpStream::connect(h.addr).unwrap()).collect();
    std::thread::sleep(Duration::from_millis(100));
    let mut s = TcpStream::connect(h.addr).unwrap();
    s.write_all(b"GET /api/health HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").unwrap();
    s.set_read_timeout(Some(Duration::from_millis(300))).unwrap();
    let mut first = [0u8; 1];
    assert!(s.read(&mut first).is_err(), "answered beyond the cap");
    drop(idle);
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    assert_eq!(parse(&String::from_utf8_lossy(&out)).code, 200);
    h.stop();
}

#[test]
fn the_event_stream_outlives_the_header_timeout() {
    let d = tempfile::tempdir().unwrap();
    let server = ServerOptions { header_timeout: Duration::from_millis(300), ..Default::default() };
    let (h, id) = service_with_alarm(d.path(), server);
    let mut es = TcpStream::connect(h.addr).unwrap();
    es.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    es.write_all(b"GET /api/events HTTP/1.1\r\nHost: localhost\r\n\r\n").unwrap();
    let mut got = Vec::new();
    let mut chunk = [0u8; 4096];
    while !String::from_utf8_lossy(&got).contains("\r\n\r\n") {
        let n = es.read(&mut chunk).unwrap();
        assert!(n > 0, "stream closed before its headers");
        got.extend_from_slice(&chunk[..n]);
    }
    assert!(String::from_utf8_lossy(&got).to_ascii_lowercase().contains("text/event-stream"));
    // Well past the header timeout, an acknowledgement still reaches the open stream.
    std::thread::sleep(Duration::from_millis(1000));
    assert_eq!(ack(h.addr, &format!("{{\"id\":{id},\"token\":\"{TOKEN}\"}}")).code, 200);
    while !String::from_utf8_lossy(&got).contains("\"type\":\"ack\"") {
        let n = es.read(&mut chunk).expect("the event stream was cut");
        assert!(n > 0, "the event stream was closed");
        got.extend_from_slice(&chunk[..n]);
    }
    // Every event carries the data-valid flag, the acknowledgement's too.
    let text = String::from_utf8_lossy(&got);
    let line = text.lines().find(|l| l.contains("\"type\":\"ack\"")).unwrap();
    assert!(line.contains("\"data_valid\":"), "{line}");
    h.stop();
}

fn tls_fixture() -> nephocast::serve::TlsFiles {
    let fx = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests").join("fixtures").join("tls");
    nephocast::serve::TlsFiles { cert_pem: fx.join("cert.pem"), key_pem: fx.join("key.pem") }
}

#[cfg(not(feature = "tls"))]
#[test]
fn asking_for_tls_without_the_feature_is_a_clear_error() {
    let d = tempfile::tempdir().unwrap();
    let server = ServerOptions { tls: Some(tls_fixture()), ..Default::default() };
    let e = start(options(d.path(), None, server)).err().expect("refused").to_string();
    assert!(e.contains("--features tls") && e.contains("cert.pem"), "{e}");
}

#[cfg(feature = "tls")]
#[test]
fn https_serves_with_the_given_certificate() {
    use std::sync::Arc;
    use tokio_rustls::rustls;
    use tokio_rustls::rustls::pki_types::pem::PemObject as _;
    use tokio_rustls::rustls::pki_types::{CertificateDer, ServerName};
    let d = tempfile::tempdir().unwrap();
    let files = tls_fixture();
    let server = ServerOptions { tls: Some(files.clone()), ..Default::default() };
    let h = start(options(d.path(), None, server)).unwrap();
    assert!(h.tls);
    let mut roots = rustls::RootCertStore::empty();
    for c in CertificateDer::pem_file_iter(&files.cert_pem).unwrap() {
        roots.add(c.unwrap()).unwrap();
    }
    let config = rustls::ClientConfig::builder_with_provider(Arc::new(rustls::crypto::ring::default_provider()))
        .with_safe_default_protocol_versions()
        .unwrap()
        .with_root_certificates(roots)
        .with_no_client_auth();
    let conn = rustls::ClientConnection::new(Arc::new(config), ServerName::try_from("localhost").unwrap()).unwrap();
    let tcp = TcpStream::connect(h.addr).unwrap();
    tcp.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    let mut tls = rustls::StreamOwned::new(conn, tcp);
    tls.write_all(b"GET /api/health HTTP/1.1\r\nHost: localhost\r\nConnection: close\r\n\r\n").unwrap();
    let mut out = Vec::new();
    let _ = tls.read_to_end(&mut out);
    let a = parse(&String::from_utf8_lossy(&out));
    assert_eq!(a.code, 200, "{}", a.body);
    assert!(a.head.contains("x-frame-options: deny"));
    // Plain HTTP on the HTTPS port gets no HTTP answer.
    assert_eq!(request(h.addr, "GET", "/api/health", Some("localhost"), "", "").code, 0);
    // A broken key file is named.
    let mut bad = files.clone();
    bad.key_pem = files.cert_pem.clone();
    let e = start(options(d.path(), None, ServerOptions { tls: Some(bad), ..Default::default() })).err().expect("refused").to_string();
    assert!(e.contains("cert.pem") && e.contains("private key"), "{e}");
    h.stop();
}

#[test]
fn shelving_takes_the_token_is_bounded_and_is_recorded() {
    let d = tempfile::tempdir().unwrap();
    let (h, _) = service_with_alarm(d.path(), ServerOptions::default());
    let shelve = |body: &str| request(h.addr, "POST", "/api/alarms/shelve", Some("localhost"), "Content-Type: application/json\r\n", body);
    assert_eq!(shelve(r#"{"minutes":30,"token":"wrong","by":"Ann"}"#).code, 403);
    // Out of range: refused with the field named.
    let long = shelve(&format!(r#"{{"minutes":100000,"token":"{TOKEN}","by":"Ann"}}"#));
    assert!(long.code == 422 || long.code == 429, "{}", long.body);
    let mut ok = shelve(&format!(r#"{{"minutes":30,"token":"{TOKEN}","by":"Ann"}}"#));
    // A wrong token above may have locked this client out for a moment.
    let t0 = std::time::Instant::now();
    while ok.code == 429 && t0.elapsed() < Duration::from_secs(30) {
        std::thread::sleep(Duration::from_millis(200));
        ok = shelve(&format!(r#"{{"minutes":30,"token":"{TOKEN}","by":"Ann"}}"#));
    }
    assert_eq!(ok.code, 200, "{}", ok.body);
    let alarms = request(h.addr, "GET", "/api/alarms", Some("localhost"), "", "");
    let v: serde_json::Value = serde_json::from_str(&alarms.body).unwrap();
    assert_eq!(v["shelved"]["shelved_by"], "Ann", "{v}");
    assert!(v["shelved"]["until_utc"].is_string());
    assert_eq!(v["shelvings"].as_array().unwrap().len(), 1);
    // No frame yet: the state has no nowcast behind it.
    assert_eq!(v["current"], false);
    h.stop();
}
