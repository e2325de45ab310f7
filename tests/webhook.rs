//! Webhook notifications against a local test server: JSON body, a retry after a failure with
//! back-off, a refusal not retried, a bounded queue, and no query in the logs' URL.
#![cfg(feature = "server")]

use std::io::{Read, Write};
use std::net::TcpListener;
use std::sync::atomic::Ordering;
use std::sync::mpsc;
use std::time::{Duration, Instant};

use nephocast::serve::notify::{Notifier, WebhookOptions, redact};

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
