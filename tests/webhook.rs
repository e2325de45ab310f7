//! Webhook notifications against a local test server: JSON body, a retry after a failure with
//! back-off, a refusal not retried, a bounded queue; attempts and back-off from the site file's
//! `[webhook]`; no secret of the URL in any log line (every line the notifier writes is collected);
//! `live --check` validating the webhook and Modbus server options, naming the option at fault;
//! `https://` refused in a build without the `tls` feature, and delivered over TLS (checked against
//! `webhook.ca_file`) in a build with it.
#![cfg(feature = "server")]

use std::io::{Read, Write};
use std::net::TcpListener;
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::sync::{Arc, Mutex, mpsc};
use std::time::{Duration, Instant};

use nephocast::serve::notify::{LogSink, Notifier, WebhookOptions, redact};

/// A log sink that keeps every line.
fn collector() -> (LogSink, Arc<Mutex<Vec<String>>>) {
    let lines = Arc::new(Mutex::new(vec![]));
    let l2 = lines.clone();
    (Arc::new(move |line: &str| l2.lock().unwrap().push(line.to_string())), lines)
}

fn demo() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

/// The demo site with `extra` appended, in `dir`.
fn site_with(dir: &Path, extra: &str) -> PathBuf {
    let text = std::fs::read_to_string(demo().join("site.toml")).unwrap().replace("calibration = \"calibration/", &format!("calibration = \"{}/calibration/", demo().display()));
    let p = dir.join("site.toml");
    std::fs::write(&p, format!("{text}\n{extra}")).unwrap();
    p
}

/// A test server answering each request with the next status of `statuses`; sends each request
/// (head and body) to the channel.
fn server(statuses: Vec<u16>) -> (u16, mpsc::Receiver<String>) {
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let port = l.local_addr().unwrap().port();
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        for status in statuses {
            let Ok((mut s, _)) = l.accept() else { return };
            s.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
            let mut buf = vec![];
            let mut chunk = [0u8; 4096];
            // Read the head, then the body by Content-Length.
            loop {
                let n = s.read(&mut chunk).unwrap_or(0);
                if n == 0 {
                    break;
                }
                buf.extend_from_slice(&chunk[..n]);
                let text = String::from_utf8_lossy(&buf).to_string();
                if let Some(i) = text.find("\r\n\r\n") {
                    let len = text.lines().find_map(|l| l.to_ascii_lowercase().strip_prefix("content-length:").map(|v| v.trim().parse::<usize>().unwrap())).unwrap_or(0);
                    if buf.len() >= i + 4 + len {
                        break;
                    }
                }
            }
            let _ = tx.send(String::from_utf8_lossy(&buf).to_string());
            let _ = write!(s, "HTTP/1.1 {status} X\r\ncontent-length: 0\r\nconnection: close\r\n\r\n");
        }
    });
    (port, rx)
}

fn wait_for(what: impl Fn() -> bool) {
    // Guard against a hang only.
    let t0 = Instant::now();
    while !what() {
        assert!(t0.elapsed() < Duration::from_secs(60), "timed out");
        std::thread::sleep(Duration::from_millis(10));
    }
}

#[test]
fn a_change_is_posted_as_json_and_retried_after_a_failure() {
    let (port, rx) = server(vec![503, 200, 404]);
    let url = format!("http://127.0.0.1:{port}/hook?token=s3cret");
    let opts = WebhookOptions { backoff_first: Duration::from_millis(50), ..WebhookOptions::new(url.clone()) };
    let n = Notifier::start(opts).unwrap();
    assert!(n.send(r#"{"type":"alarm_change","to":"alert"}"#.into()));
    let first = rx.recv_timeout(Duration::from_secs(30)).unwrap();
    let second = rx.recv_timeout(Duration::from_secs(30)).unwrap();
    for r in [&first, &second] {
        assert!(r.starts_with("POST /hook?token=s3cret HTTP/1.1\r\n"), "{r}");
        assert!(r.to_ascii_lowercase().contains("content-type: application/json"), "{r}");
        assert!(r.ends_with(r#"{"type":"alarm_change","to":"alert"}"#), "{r}");
    }
    wait_for(|| n.stats.delivered.load(Ordering::Relaxed) == 1);
    assert_eq!(n.stats.retries.load(Ordering::Relaxed), 1);
    // A refusal (404) is not retried.
    assert!(n.send("{}".into()));
    rx.recv_timeout(Duration::from_secs(30)).unwrap();
    wait_for(|| n.stats.failed.load(Ordering::Relaxed) == 1);
    assert_eq!(n.stats.retries.load(Ordering::Relaxed), 1);
    assert!(!redact(&url).contains("s3cret"));
}

#[test]
fn the_queue_is_bounded() {
    // Nobody listens on this port (bound, then closed): every attempt fails; long back-off keeps
    // the first notification in flight while the queue fills.
    let port = TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let opts = WebhookOptions { queue_max: 2, backoff_first: Duration::from_secs(30), ..WebhookOptions::new(format!("http://127.0.0.1:{port}/")) };
    let n = Notifier::start(opts).unwrap();
    let sent = (0..10).filter(|_| n.send("{}".into())).count();
    assert!((2..=3).contains(&sent), "{sent}");
    assert_eq!(n.stats.dropped.load(Ordering::Relaxed), 10 - sent);
}

#[test]
fn a_url_that_is_not_http_is_refused_without_its_secrets() {
    let e = Notifier::start(WebhookOptions::new("ftp://user:pw@example.net/x?key=k")).err().unwrap();
    assert!(!e.contains("pw") && !e.contains("key=k"), "{e}");
}

/// The secret in the URL's query, which no log line may show.
const SECRET: &str = "tok-9f3e7a";

#[test]
fn attempts_and_back_off_come_from_the_site_file_and_no_log_line_shows_the_secret() {
    let d = tempfile::tempdir().unwrap();
    let site = nephocast::config::Site::load(&site_with(d.path(), "[webhook]\nmax_attempts = 3\nbackoff_first_s = 0.2\nbackoff_max_s = 0.3\nattempt_timeout_s = 2\nqueue_max = 1\n")).unwrap();
    let w = &site.file.webhook;
    assert_eq!((w.max_attempts, w.queue_max), (3, 1));
    // Three failures: retried after 0.2 s, then 0.3 s (0.4 capped), then given up.
    let (port, rx) = server(vec![503, 500, 503, 404]);
    let url = format!("http://127.0.0.1:{port}/hook?token={SECRET}");
    let opts = WebhookOptions::configured(url.clone(), w, &site.path);
    assert_eq!((opts.max_attempts, opts.backoff_first, opts.backoff_max), (3, Duration::from_millis(200), Duration::from_millis(300)));
    let check = opts.check().unwrap();
    assert!(check.contains(&format!("http://127.0.0.1:{port}/hook (credentials and query hidden)")) && check.contains("3 attempt(s)"), "{check}");
    let (sink, lines) = collector();
    let n = Notifier::start_logged(opts, sink).unwrap();
    let t0 = Instant::now();
    assert!(n.send("{}".into()));
    let mut at = vec![];
    for _ in 0..3 {
        let r = rx.recv_timeout(Duration::from_secs(30)).unwrap();
        assert!(r.contains(SECRET), "the request itself carries the token");
        at.push(t0.elapsed().as_secs_f64());
    }
    wait_for(|| n.stats.failed.load(Ordering::Relaxed) == 1);
    assert_eq!(n.stats.retries.load(Ordering::Relaxed), 2);
    // The waits between attempts (lower bounds only: the machine may be slow, never fast).
    assert!(at[1] - at[0] >= 0.19 && at[2] - at[1] >= 0.29, "{at:?}");
    // A refusal, then a full queue (one waiting at most) while the server is gone.
    assert!(n.send("{}".into()));
    rx.recv_timeout(Duration::from_secs(30)).unwrap();
    wait_for(|| n.stats.failed.load(Ordering::Relaxed) == 2);
    let sent = (0..5).filter(|_| n.send("{}".into())).count();
    assert!(sent <= 2, "{sent}");
    wait_for(|| n.stats.dropped.load(Ordering::Relaxed) >= 3);
    let lines = lines.lock().unwrap().clone();
    let shown = format!("webhook http://127.0.0.1:{port}/hook (credentials and query hidden):");
    for want in ["attempt 1 failed (status 503); retrying in 0.2 s", "attempt 2 failed (status 500); retrying in 0.3 s", "attempt 3 failed (status 503); giving up", "refused with status 404; not retried", "queue full, notification dropped"] {
        assert!(lines.iter().any(|l| l.starts_with(&shown) && l.ends_with(want)), "no line ending {want:?}: {lines:#?}");
    }
    for l in &lines {
        assert!(!l.contains(SECRET) && !l.contains("token="), "a secret in the log: {l}");
    }
}

#[test]
fn webhook_settings_out_of_range_are_named() {
    let d = tempfile::tempdir().unwrap();
    for (section, field) in [
        ("[webhook]\nmax_attempts = 0\n", "webhook.max_attempts"),
        ("[webhook]\nbackoff_first_s = 5\nbackoff_max_s = 2\n", "webhook.backoff_max_s"),
        ("[webhook]\nattempt_timeout_s = 0\n", "webhook.attempt_timeout_s"),
        ("[webhook]\nqueue_max = 0\n", "webhook.queue_max"),
        ("[webhook]\nretries = 3\n", "retries"),
    ] {
        let e = nephocast::config::Site::load(&site_with(d.path(), section)).expect_err("refused").to_string();
        assert!(e.contains(field), "{field}: {e}");
    }
}

fn live_options(d: &Path, site: PathBuf, server: nephocast::serve::ServerOptions) -> nephocast::serve::LiveOptions {
    nephocast::serve::LiveOptions {
        site,
        incoming: d.to_path_buf(),
        db: d.join("live.sqlite"),
        bind: "127.0.0.1:0".parse().unwrap(),
        ack_token: None,
        server,
        keep_s: 86_400,
        poll_ms: 50,
        overlay_every: 0,
        health: Default::default(),
    }
}

#[test]
fn live_check_validates_the_webhook_and_modbus_server_options() {
    use nephocast::serve::modbus::ModbusOptions;
    use nephocast::serve::{ServerOptions, check};
    let d = tempfile::tempdir().unwrap();
    let site = site_with(d.path(), "[webhook]\nmax_attempts = 4\n");
    let good = ServerOptions {
        webhook: Some(WebhookOptions::new(format!("http://127.0.0.1:9/hook?token={SECRET}"))),
        modbus: Some(ModbusOptions { bind: "127.0.0.1:5020".parse().unwrap(), ..Default::default() }),
        ..Default::default()
    };
    let out = check(&live_options(d.path(), site.clone(), good.clone())).unwrap().join("\n");
    assert!(out.contains("webhook: http://127.0.0.1:9/hook (credentials and query hidden), 4 attempt(s)"), "the site's [webhook] applies: {out}");
    assert!(out.contains("Modbus TCP server: --modbus-bind 127.0.0.1:5020"), "{out}");
    assert!(!out.contains(SECRET), "{out}");
    let refused = |server: ServerOptions| check(&live_options(d.path(), site.clone(), server)).expect_err("refused").to_string();
    let e = refused(ServerOptions { webhook: Some(WebhookOptions::new(format!("ftp://127.0.0.1/x?token={SECRET}"))), ..good.clone() });
    assert!(e.starts_with("--webhook-url-file: webhook URL ftp://127.0.0.1/x") && !e.contains(SECRET), "{e}");
    let e = refused(ServerOptions { modbus: Some(ModbusOptions { bind: "0.0.0.0:5020".parse().unwrap(), ..Default::default() }), ..good.clone() });
    assert!(e.starts_with("--modbus-bind 0.0.0.0:5020") && e.contains("--modbus-allow-non-loopback"), "{e}");
    let e = refused(ServerOptions { modbus: Some(ModbusOptions { max_connections: 0, ..Default::default() }), ..good.clone() });
    assert!(e.starts_with("--modbus-max-connections"), "{e}");
    let e = refused(ServerOptions { modbus: Some(ModbusOptions { max_frame_age_s: -1.0, ..Default::default() }), ..good.clone() });
    assert!(e.starts_with("--modbus-max-frame-age-s"), "{e}");
    // Allowed on a non-loopback address: a warning, not a refusal.
    let open = ServerOptions { modbus: Some(ModbusOptions { bind: "0.0.0.0:5020".parse().unwrap(), allow_non_loopback: true, ..Default::default() }), ..good };
    let out = check(&live_options(d.path(), site, open)).unwrap().join("\n");
    assert!(out.lines().any(|l| l.starts_with("warning: Modbus on the non-loopback address 0.0.0.0:5020")), "{out}");
}

#[cfg(not(feature = "tls"))]
#[test]
fn https_needs_the_tls_feature_and_says_so() {
    let e = Notifier::start(WebhookOptions::new(format!("https://hooks.example.net/x?token={SECRET}"))).err().expect("refused");
    assert!(e.contains("--features tls") && !e.contains(SECRET), "{e}");
    let e = WebhookOptions::new(format!("https://hooks.example.net/x?token={SECRET}")).check().unwrap_err();
    assert!(e.contains("http:// only"), "{e}");
}

/// With the `tls` feature: a TLS server with the test certificate (`tests/fixtures/tls`, for
/// `localhost` and 127.0.0.1). Trusted through `webhook.ca_file`, the notification arrives; with the
/// system's roots, which do not hold it, every attempt fails on the certificate.
#[cfg(feature = "tls")]
#[test]
fn https_is_delivered_to_a_server_the_ca_file_trusts() {
    use tokio_rustls::rustls;
    use tokio_rustls::rustls::pki_types::pem::PemObject as _;
    use tokio_rustls::rustls::pki_types::{CertificateDer, PrivateKeyDer};
    let fx = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/tls");
    let certs: Vec<CertificateDer<'static>> = CertificateDer::pem_file_iter(fx.join("cert.pem")).unwrap().map(Result::unwrap).collect();
    let key = PrivateKeyDer::from_pem_file(fx.join("key.pem")).unwrap();
    let config = Arc::new(
        rustls::ServerConfig::builder_with_provider(Arc::new(rustls::crypto::ring::default_provider()))
            .with_safe_default_protocol_versions()
            .unwrap()
            .with_no_client_auth()
            .with_single_cert(certs, key)
            .unwrap(),
    );
    let l = TcpListener::bind("127.0.0.1:0").unwrap();
    let port = l.local_addr().unwrap().port();
    let (tx, rx) = mpsc::channel::<String>();
    std::thread::spawn(move || {
        for s in l.incoming() {
            let Ok(s) = s else { return };
            s.set_read_timeout(Some(Duration::from_secs(5))).unwrap();
            let mut tls = rustls::StreamOwned::new(rustls::ServerConnection::new(config.clone()).unwrap(), s);
            let mut buf = vec![];
            let mut chunk = [0u8; 4096];
            loop {
                let n = tls.read(&mut chunk).unwrap_or(0);
                if n == 0 {
                    break;
                }
                buf.extend_from_slice(&chunk[..n]);
                if String::from_utf8_lossy(&buf).ends_with("}") {
                    break;
                }
            }
            if buf.is_empty() {
                continue;
            }
            let _ = tx.send(String::from_utf8_lossy(&buf).to_string());
            let _ = tls.write_all(b"HTTP/1.1 200 OK\r\ncontent-length: 0\r\nconnection: close\r\n\r\n");
            tls.conn.send_close_notify();
            let _ = tls.flush();
        }
    });
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(fx.join("cert.pem"), d.path().join("hook-ca.pem")).unwrap();
    let site = nephocast::config::Site::load(&site_with(d.path(), "[webhook]\nca_file = \"hook-ca.pem\"\nmax_attempts = 2\nbackoff_first_s = 0.1\n")).unwrap();
    let url = format!("https://localhost:{port}/hook?token={SECRET}");
    let opts = WebhookOptions::configured(url.clone(), &site.file.webhook, &site.path);
    assert!(opts.check().unwrap().contains("hook-ca.pem"));
    let (sink, lines) = collector();
    let n = Notifier::start_logged(opts, sink).unwrap();
    assert!(n.send(r#"{"type":"alarm_change"}"#.into()));
    let r = rx.recv_timeout(Duration::from_secs(30)).unwrap();
    assert!(r.starts_with(&format!("POST /hook?token={SECRET} HTTP/1.1\r\n")) && r.ends_with(r#"{"type":"alarm_change"}"#), "{r}");
    wait_for(|| n.stats.delivered.load(Ordering::Relaxed) == 1);
    assert!(lines.lock().unwrap().is_empty(), "{:?}", lines.lock().unwrap());
    // The system's roots do not trust the test certificate: both attempts fail on it.
    let opts = WebhookOptions::configured(url.clone(), &nephocast::config::WebhookSection { max_attempts: 2, backoff_first_s: 0.1, ..Default::default() }, &site.path);
    // (Only where the machine has a system bundle.)
    if opts.check().is_ok() {
        let (sink, lines) = collector();
        let n = Notifier::start_logged(opts, sink).unwrap();
        assert!(n.send("{}".into()));
        wait_for(|| n.stats.failed.load(Ordering::Relaxed) == 1);
        let lines = lines.lock().unwrap().clone();
        assert!(lines.iter().any(|l| l.contains("TLS:") && l.contains("giving up")), "{lines:#?}");
        assert!(lines.iter().all(|l| !l.contains(SECRET)), "{lines:#?}");
    }
}
