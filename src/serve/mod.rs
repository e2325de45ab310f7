//! Live mode: watch a folder of incoming frames, run each through [`Nowcaster::step`], keep an
//! alarm log and recent history in SQLite, and serve a JSON API, a server-sent event stream and the
//! operators' dashboard over HTTP (bound to 127.0.0.1 by default).
//!
//! * Frames appear in the incoming folder by rename: the writer writes a name live mode ignores (one
//!   starting with a dot, or ending in `.part` or `.tmp`, i.e. not `.jpg`/`.jpeg`/`.png`) and renames
//!   it to `frame_<UTC time>.jpg` when done; a rename within one file system is atomic. As a
//!   fallback for writers that write in place, a file is taken only once its size and modification
//!   time have stayed the same over two polls, and then only if it is structurally complete
//!   ([`crate::intake`]: a JPEG's end marker, a PNG's chunks and CRCs up to IEND); an incomplete one is
//!   rejected as `truncated`. A file that changes after it was taken (size or modification time)
//!   is counted (`frames_changed` in health) and logged; once stable again it is read again if it
//!   was not used and no newer frame has been taken since (a frame the engine used stands: the
//!   engine takes each time once). When several new frames wait, the newest is processed and the
//!   others are counted as skipped: the engine keeps real time and never queues without bound.
//! * Clock policy ([`Nowcaster::judge_clock`]): a frame more than `qc.max_ahead_of_clock_s`
//!   (default 120 s) ahead of the system clock is rejected (`ahead_of_clock`) and never becomes
//!   the newest time; out-of-order is judged only against accepted frames; if the system clock steps
//!   back behind the newest accepted time by more than the tolerance, the engine re-anchors and
//!   logs it. This assumes camera and host are NTP-synchronised (a few seconds apart at most); the
//!   tolerance bounds the skew accepted.
//! * Bad frames are counted and skipped; with the sun below the limit the engine idles.
//! * After a restart the alarm state and log come back from the database.
//! * Health, measurement feed, per-frame log line, `/metrics` and retention: [`ops`]. The health
//!   state (starting, ok, no_measurements, stale, camera_down) is judged on its own timer and is
//!   separate from the ramp alarm; `data_valid` goes with every output.
//!
//! Forecasts and alarms are advisory, not a protection system.

pub mod db;
mod error;
pub mod guard;
pub mod http;
pub mod modbus;
mod net;
pub mod notify;
pub mod ops;

pub use error::ServeError;
pub use http::{ServerOptions, TlsFiles};

use std::collections::{BTreeMap, HashMap, HashSet, VecDeque};
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use chrono::{DateTime, Utc};
use futures_util::StreamExt;
use serde::Serialize;
use tokio::sync::broadcast;

use crate::io::{fmt_time, list_frames};
use crate::nowcast::{Frame, Nowcast, Nowcaster, Rejection};
use crate::records::nowcast_json;

/// What the live mode needs.
#[derive(Debug, Clone)]
pub struct LiveOptions {
    /// The site file.
    pub site: PathBuf,
    /// The folder frames arrive in.
    pub incoming: PathBuf,
    /// The database file.
    pub db: PathBuf,
    /// Where to listen (default 127.0.0.1:8765; port 0 picks a free one).
    pub bind: SocketAddr,
    /// Token that acknowledging alarms needs (none: acknowledging is off).
    pub ack_token: Option<String>,
    /// Timeouts, connection cap, Host allow-list, TLS, acknowledgement rate limit.
    pub server: ServerOptions,
    /// History kept \[s\].
    pub keep_s: i64,
    /// Poll interval \[ms\].
    pub poll_ms: u64,
    /// Latest frames' overlay picture every N processed frames (0: none).
    pub overlay_every: usize,
    /// Health, measurement feed, log format and retention ([`ops`]).
    pub health: ops::HealthOptions,
}

/// Health figures.
#[derive(Debug, Clone, Default, Serialize)]
pub struct Health {
    /// Frames processed.
    pub frames_processed: usize,
    /// Frames skipped because a newer one was waiting.
    pub frames_skipped: usize,
    /// Frames rejected, by reason.
    pub frames_rejected: BTreeMap<String, usize>,
    /// Frame files that changed (size or modification time) after they were taken.
    pub frames_changed: usize,
    /// Times the engine dropped its newest time because the system clock fell behind it.
    pub clock_reanchors: usize,
    /// Time of the last processed frame.
    pub last_frame_utc: Option<String>,
    /// Age of the last processed frame when asked \[s\].
    pub last_frame_age_s: Option<f64>,
    /// Processing latency (decode + step), median \[ms\].
    pub latency_ms_median: Option<f64>,
    /// Processing latency, 95th percentile \[ms\].
    pub latency_ms_p95: Option<f64>,
    /// Current alarm state.
    pub alarm: String,
    /// False while the alarm state has no nowcast behind it (before the first nowcast, or restored
    /// after a restart until the next one).
    pub alarm_current: bool,
    /// Engine running.
    pub running: bool,
    /// Health state ([`ops::HealthState`]): starting, ok, no_measurements, stale, camera_down.
    pub health_state: String,
    /// The forecasts come from a fresh frame (a controller falls back when false).
    pub data_valid: bool,
    /// Rises every health evaluation (every [`ops::HEALTH_TICK_MS`] ms) while the service lives.
    pub heartbeat: u64,
    /// Time of the newest frame read (used or not, e.g. at night).
    pub newest_frame_utc: Option<String>,
    /// Age of the newest frame read \[s\].
    pub frame_age_s: Option<f64>,
    /// Measurement rows the engine holds (the feed's, bounded to the last hours).
    pub measurement_rows: usize,
    /// Measurement rows taken from the feed since start.
    pub measurement_rows_read: usize,
    /// Age of the end of the newest measurement's averaging period \[s\].
    pub measurement_age_s: Option<f64>,
    /// Measurement pieces refused (unparsable lines, kW/m²).
    pub measurement_errors: usize,
    /// Times the tuning went back to the configured transmittances because the feed stopped.
    pub tuning_resets: usize,
    /// Pyranometer readings the transmittance tuning holds now.
    pub tuning_rows: usize,
    /// Frame-like files whose name holds no time (seen since start).
    pub frames_untimed: usize,
    /// The newest of their names (at most 20).
    pub untimed_files: Vec<String>,
    /// Frame files archived or deleted by the retention.
    pub frames_retired: usize,
}

#[derive(Default)]
struct Shared {
    latest: Option<serde_json::Value>,
    overlay_png: Option<Vec<u8>>,
    health: Health,
    latencies: VecDeque<f64>,
    last_time: Option<DateTime<Utc>>,
    ops: OpsShared,
}

/// What the health timer judges from.
struct OpsShared {
    started: std::time::Instant,
    newest_read: Option<DateTime<Utc>>,
    last_read_wall: Option<std::time::Instant>,
    measurement_end: Option<DateTime<Utc>>,
    latency: ops::Histogram,
    state: ops::HealthState,
    options: ops::HealthOptions,
}

impl Default for OpsShared {
    fn default() -> Self {
        OpsShared {
            started: std::time::Instant::now(),
            newest_read: None,
            last_read_wall: None,
            measurement_end: None,
            latency: Default::default(),
            state: Default::default(),
            options: Default::default(),
        }
    }
}

impl Shared {
    /// Judge the health now; returns the previous state when it changed.
    fn refresh_health(&mut self, heartbeat: bool) -> Option<ops::HealthState> {
        let now = Utc::now();
        let o = &self.ops;
        let inputs = ops::HealthInputs {
            uptime_s: o.started.elapsed().as_secs_f64(),
            frame_age_s: o.newest_read.map(|t| ops::age_s(&t, &now)),
            since_frame_read_s: o.last_read_wall.map(|w| w.elapsed().as_secs_f64()),
            measurement_age_s: o.measurement_end.map(|t| ops::age_s(&t, &now)),
            feed: o.options.measurements.is_some(),
        };
        let state = ops::evaluate(&inputs, &o.options);
        let prev = o.state;
        self.ops.state = state;
        let h = &mut self.health;
        h.health_state = state.name().into();
        h.data_valid = state.data_valid();
        h.frame_age_s = inputs.frame_age_s;
        h.measurement_age_s = inputs.measurement_age_s;
        if heartbeat {
            h.heartbeat += 1;
        }
        (prev != state).then_some(prev)
    }

    fn metrics(&self) -> ops::MetricsInput {
        let h = &self.health;
        ops::MetricsInput {
            processed: h.frames_processed,
            skipped: h.frames_skipped,
            rejected: h.frames_rejected.clone(),
            untimed: h.frames_untimed,
            measurement_rows: h.measurement_rows_read,
            latency: self.ops.latency.clone(),
            alarm: h.alarm.clone(),
            health: self.ops.state,
            heartbeat: h.heartbeat,
            frame_age_s: h.frame_age_s,
            measurement_age_s: h.measurement_age_s,
        }
    }
}

/// The health timer: judge the health every [`ops::HEALTH_TICK_MS`] ms, log and send each change,
/// and send the heartbeat every 10 s.
fn health_loop(shared: Arc<Mutex<Shared>>, tx: broadcast::Sender<String>, stop: Arc<AtomicBool>, log_json: bool) {
    // The state last logged and sent (the engine also judges the health when a frame arrives).
    let mut announced = shared.lock().map(|s| s.ops.state).unwrap_or_default();
    while !stop.load(Ordering::SeqCst) {
        std::thread::sleep(std::time::Duration::from_millis(ops::HEALTH_TICK_MS));
        let Ok(mut s) = shared.lock() else { return };
        s.refresh_health(true);
        let changed = (s.ops.state != announced).then_some(announced);
        announced = s.ops.state;
        let h = &s.health;
        let event = serde_json::json!({"type": "health", "state": h.health_state, "data_valid": h.data_valid, "heartbeat": h.heartbeat,
            "frame_age_s": h.frame_age_s, "measurement_age_s": h.measurement_age_s});
        if let Some(prev) = changed {
            let f = |v: Option<f64>| v.map(|x| format!("{x:.1}")).unwrap_or_default();
            eprintln!(
                "{}",
                ops::log_line(
                    &[("event", "health".into()), ("state", h.health_state.clone()), ("previous", prev.name().into()), ("data_valid", h.data_valid.to_string()),
                      ("frame_age_s", f(h.frame_age_s)), ("measurement_age_s", f(h.measurement_age_s)), ("heartbeat", h.heartbeat.to_string())],
                    log_json
                )
            );
        }
        if changed.is_some() || h.heartbeat.is_multiple_of(10_000 / ops::HEALTH_TICK_MS) {
            let _ = tx.send(event.to_string());
        }
    }
}

#[derive(Clone)]
struct App {
    shared: Arc<Mutex<Shared>>,
    tx: broadcast::Sender<String>,
    db: PathBuf,
    /// SHA-256 of the acknowledgement token (none: acknowledging is off).
    token: Option<guard::TokenDigest>,
    limiter: Arc<guard::AckLimiter>,
    body_timeout: std::time::Duration,
    /// The site's display time zone ([`crate::config::SiteTimeZone`]), for times in the alarm log.
    time_zone: serde_json::Value,
}

/// A running live service.
pub struct LiveHandle {
    /// Where it listens.
    pub addr: SocketAddr,
    /// What the operator should know about how it was started (non-loopback address, lowered
    /// connection cap).
    pub warnings: Vec<String>,
    /// Serving HTTPS.
    pub tls: bool,
    stop: Arc<AtomicBool>,
    engine: Option<std::thread::JoinHandle<()>>,
    ticker: Option<std::thread::JoinHandle<()>>,
    server: Option<std::thread::JoinHandle<()>>,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    /// Where the Modbus server listens, when it runs.
    pub modbus_addr: Option<SocketAddr>,
    modbus: Option<modbus::ModbusServer>,
    feed: Arc<modbus::Feed>,
}

impl LiveHandle {
    /// Stop the engine and the server and wait for both.
    pub fn stop(mut self) {
        self.stop.store(true, Ordering::SeqCst);
        if let Some(s) = self.shutdown.take() {
            let _ = s.send(());
        }
        if let Some(h) = self.engine.take() {
            let _ = h.join();
        }
        if let Some(h) = self.ticker.take() {
            let _ = h.join();
        }
        if let Some(h) = self.server.take() {
            let _ = h.join();
        }
        if let Some(m) = self.modbus.take() {
            m.stop();
        }
    }

    /// What the Modbus registers are made from (the latest published nowcast).
    pub fn modbus_feed(&self) -> Arc<modbus::Feed> {
        self.feed.clone()
    }

    /// Block until stopped from elsewhere (the command-line use).
    pub fn wait(mut self) {
        if let Some(h) = self.server.take() {
            let _ = h.join();
        }
    }
}


fn pct(v: &VecDeque<f64>, p: f64) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    let mut s: Vec<f64> = v.iter().copied().collect();
    s.sort_by(f64::total_cmp);
    Some(s[((s.len() - 1) as f64 * p).round() as usize])
}

/// Check the server options and the address: a non-loopback address needs an acknowledgement
/// token or `allow_non_loopback`, and is served with a warning. Returns the warnings.
fn exposure_warnings(opts: &LiveOptions) -> Result<Vec<String>, ServeError> {
    opts.server.validate().map_err(ServeError::ServerOptions)?;
    opts.health.validate().map_err(ServeError::HealthOptions)?;
    let mut w = vec![];
    if !opts.bind.ip().is_loopback() {
        if opts.ack_token.is_none() && !opts.server.allow_non_loopback {
            return Err(ServeError::NonLoopback(opts.bind));
        }
        w.push(format!(
            "serving on the non-loopback address {}{}: anyone who reaches it sees the forecasts and alarms{}",
            opts.bind,
            if opts.ack_token.is_none() { " without an acknowledgement token" } else { "" },
            if opts.server.tls.is_none() { ", in clear text (no TLS)" } else { "" },
        ));
        if opts.server.allowed_hosts.is_empty() && opts.bind.ip().is_unspecified() {
            w.push("only loopback names are allowed in the Host header: give the names clients use with --allow-host".into());
        }
    }
    Ok(w)
}

/// The names allowed in the Host header: the loopback names, the bound address when it is a
/// specific one, and the extra ones asked for.
fn allowed_hosts(opts: &LiveOptions) -> Vec<String> {
    let mut v: Vec<String> = guard::LOOPBACK_HOSTS.iter().map(|h| guard::normalise_host_name(h)).collect();
    if !opts.bind.ip().is_unspecified() {
        v.push(guard::normalise_host_name(&opts.bind.ip().to_string()));
    }
    v.extend(opts.server.allowed_hosts.iter().filter_map(|h| guard::host_name(h)));
    v.sort();
    v.dedup();
    v
}

/// The routes, behind the Host check and with the security headers on every answer.
fn router(app: App, allowed: Arc<Vec<String>>) -> Router {
    Router::new()
        .route("/", get(dashboard))
        .route("/api/nowcast", get(api_nowcast))
        .route("/api/alarms", get(api_alarms))
        .route("/api/alarms/ack", post(api_ack))
        .route("/api/alarms/shelve", post(api_shelve))
        .route("/api/health", get(api_health))
        .route("/api/history", get(api_history))
        .route("/api/events", get(api_events))
        .route("/api/overlay.png", get(api_overlay))
        .route("/metrics", get(metrics))
        .route("/openapi.yaml", get(|| async { ([(header::CONTENT_TYPE, "application/yaml")], include_str!("openapi.yaml")) }))
        .with_state(app)
        .layer(axum::extract::DefaultBodyLimit::max(ACK_BODY_MAX_BYTES))
        .layer(axum::middleware::from_fn_with_state(allowed, guard_request))
}

/// Refuse a Host that is not allowed (421), and put the security headers on every response.
async fn guard_request(State(allowed): State<Arc<Vec<String>>>, req: axum::extract::Request, next: axum::middleware::Next) -> Response {
    let host = req.headers().get(header::HOST).and_then(|h| h.to_str().ok()).map(str::to_owned).or_else(|| req.uri().authority().map(|a| a.to_string()));
    let authority_ok = req.uri().authority().is_none_or(|a| guard::host_allowed(a.as_str(), &allowed));
    let mut res = match host {
        Some(h) if authority_ok && guard::host_allowed(&h, &allowed) => next.run(req).await,
        _ => (
            StatusCode::MISDIRECTED_REQUEST,
            Json(serde_json::json!({"error": "Host: not served here (allowed: loopback names and those given with --allow-host)"})),
        )
            .into_response(),
    };
    let h = res.headers_mut();
    if let Ok(v) = header::HeaderValue::from_str(&guard::CONTENT_SECURITY_POLICY) {
        h.insert(header::CONTENT_SECURITY_POLICY, v);
    }
    h.insert(header::X_FRAME_OPTIONS, header::HeaderValue::from_static("DENY"));
    h.insert(header::X_CONTENT_TYPE_OPTIONS, header::HeaderValue::from_static("nosniff"));
    h.insert(header::REFERRER_POLICY, header::HeaderValue::from_static("no-referrer"));
    res
}

/// Largest acknowledgement request body \[bytes\].
pub const ACK_BODY_MAX_BYTES: usize = 4096;

/// Start the live service: the engine in a thread, the HTTP server in another.
///
/// # Errors
/// Bad site files, an unusable database, an address that cannot be bound, a non-loopback address
/// without a token (unless allowed), bad server options or TLS files.
pub fn start(opts: LiveOptions) -> Result<LiveHandle, ServeError> {
    let mut warnings = exposure_warnings(&opts)?;
    let tls = http::tls_acceptor(opts.server.tls.as_ref())?;
    let is_tls = tls.is_some();
    let (max_connections, lowered) = http::effective_max_connections(opts.server.max_connections);
    warnings.extend(lowered);
    let mut nowcaster = Nowcaster::open(&opts.site, None, None)?;
    std::fs::create_dir_all(&opts.incoming)?;
    let database = |error| ServeError::Database { path: opts.db.clone(), error };
    let conn = db::open(&opts.db).map_err(database)?;
    if let Some(s) = db::last_state(&conn).map_err(database)? {
        nowcaster.restore_alarm(s);
    }
    let feed = Arc::new(modbus::Feed::new(modbus::targets_of(&nowcaster.site().file)));
    let mb = opts.server.modbus.as_ref().map(|m| modbus::start(m, feed.clone())).transpose()?;
    let (modbus, modbus_addr) = match mb {
        Some((m, w)) => {
            warnings.extend(w);
            let a = m.addr;
            (Some(m), Some(a))
        }
        None => (None, None),
    };
    let shared = Arc::new(Mutex::new(Shared::default()));
    {
        let mut s = shared.lock().map_err(|_| ServeError::StateLock)?;
        s.health.alarm = nowcaster.alarm_state().name().into();
        s.ops.options = opts.health.clone();
        s.refresh_health(false);
    }
    let (tx, _) = broadcast::channel::<String>(64);
    let stop = Arc::new(AtomicBool::new(false));
    // Bind first so the caller learns the port.
    let std_listener = http::listen(opts.bind).map_err(|e| std::io::Error::new(e.kind(), format!("--bind {}: {e}", opts.bind)))?;
    std_listener.set_nonblocking(true)?;
    let addr = std_listener.local_addr()?;
    let app = App {
        shared: shared.clone(),
        tx: tx.clone(),
        db: opts.db.clone(),
        token: opts.ack_token.as_deref().map(guard::token_digest),
        limiter: Arc::new(guard::AckLimiter::new(opts.server.ack_limits.clone())),
        body_timeout: opts.server.body_timeout,
        time_zone: serde_json::to_value(nowcaster.site().file.site.time_zone()).unwrap_or_default(),
    };
    let (sd_tx, sd_rx) = tokio::sync::oneshot::channel::<()>();
    let server_opts = opts.server.clone();
    let allowed = Arc::new(allowed_hosts(&opts));
    let server = std::thread::spawn(move || {
        let Ok(rt) = tokio::runtime::Builder::new_multi_thread().worker_threads(1).enable_all().build() else { return };
        rt.block_on(async move {
            let Ok(listener) = tokio::net::TcpListener::from_std(std_listener) else { return };
            let router = router(app, allowed);
            http::serve(listener, router, server_opts, max_connections, tls, sd_rx).await;
        });
        rt.shutdown_timeout(std::time::Duration::from_secs(1));
    });
    let notifier = match opts.server.webhook.clone() {
        Some(w) => Some(notify::Notifier::start(w).map_err(ServeError::Webhook)?),
        None => None,
    };
    let (stop2, stop3, shared3, tx3, log_json) = (stop.clone(), stop.clone(), shared.clone(), tx.clone(), opts.health.log_json);
    let feed2 = feed.clone();
    let engine = std::thread::spawn(move || LiveEngine::new(opts, nowcaster, conn, shared, tx, feed2, notifier).run(stop2));
    let ticker = std::thread::spawn(move || health_loop(shared3, tx3, stop3, log_json));
    Ok(LiveHandle { addr, warnings, tls: is_tls, stop, engine: Some(engine), ticker: Some(ticker), server: Some(server), shutdown: Some(sd_tx), modbus_addr, modbus, feed })
}

/// Check the configuration without starting: options and address, the site file with its
/// calibration and base-height series, the measurement feed, and the folders. Returns what was
/// checked, one line each.
///
/// # Errors
/// The first problem found, naming the file or option (never an I/O error type, so the command
/// exits with status 2).
pub fn check(opts: &LiveOptions) -> Result<Vec<String>, ServeError> {
    let mut out = vec![];
    for w in exposure_warnings(opts)? {
        out.push(format!("warning: {w}"));
    }
    let nc = Nowcaster::open(&opts.site, None, None)?;
    let f = &nc.site().file;
    out.push(format!(
        "site {}: {} block(s), {} pyranometer(s), camera {}x{} px",
        opts.site.display(),
        f.plant.blocks.len(),
        f.pyranometers.len(),
        nc.site().camera.width_px,
        nc.site().camera.height_px
    ));
    if let Some(m) = &opts.health.measurements {
        out.push(ops::check_feed(m).map_err(ServeError::Feed)?);
        if f.pyranometers.is_empty() {
            out.push("warning: the site names no pyranometers: the measurement feed is read but not used for tuning".into());
        }
    }
    let dir_ok = |option: &'static str, p: &std::path::Path| -> Result<(), ServeError> {
        let parent = if p.is_dir() { p } else { p.parent().filter(|x| !x.as_os_str().is_empty()).unwrap_or(std::path::Path::new(".")) };
        if !parent.is_dir() {
            return Err(ServeError::MissingFolder { option, path: p.to_path_buf(), folder: parent.to_path_buf() });
        }
        Ok(())
    };
    dir_ok("--incoming", &opts.incoming)?;
    dir_ok("--db", &opts.db)?;
    if let ops::Retention::Archive(d) = &opts.health.retention {
        dir_ok("--archive", d)?;
    }
    out.push(format!("incoming {}, database {}, stale after {:.0} s", opts.incoming.display(), opts.db.display(), opts.health.stale_after_s()));
    Ok(out)
}

/// A frame file's signature: size and modification time.
type Signature = (u64, Option<std::time::SystemTime>);

fn signature(p: &std::path::Path) -> Signature {
    // Of the path itself, not a link's target: a special file is judged (and refused) by intake.
    std::fs::symlink_metadata(p).map(|m| (m.len(), m.modified().ok())).unwrap_or((0, None))
}

#[derive(Debug, Clone, Copy)]
enum Track {
    /// Not taken yet: its signature at the last poll.
    Pending(Signature),
    /// Taken with this signature; whether the engine used it.
    Taken(Signature, bool),
}

/// The incoming folder's files over polls.
#[derive(Default)]
struct Watcher {
    tracks: HashMap<PathBuf, (DateTime<Utc>, Track)>,
    /// Files that changed after they were taken.
    changed: usize,
}

/// What one poll found.
struct Poll {
    /// Files ready to be read (unchanged over two polls).
    ready: Vec<crate::io::FrameRef>,
    /// Lines to log.
    notes: Vec<String>,
}

impl Watcher {
    fn poll(&mut self, frames: &[crate::io::FrameRef]) -> Poll {
        // Forget files that are gone (the camera's own clean-up), so the memory stays bounded.
        let present: HashSet<&PathBuf> = frames.iter().map(|f| &f.path).collect();
        self.tracks.retain(|p, _| present.contains(p));
        let newest_used = self.tracks.values().filter(|(_, t)| matches!(t, Track::Taken(_, true))).map(|(t, _)| *t).max();
        let (mut ready, mut notes) = (vec![], vec![]);
        for f in frames {
            let sig = signature(&f.path);
            let name = f.path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
            match self.tracks.get(&f.path).map(|x| x.1) {
                None => {
                    self.tracks.insert(f.path.clone(), (f.time, Track::Pending(sig)));
                }
                Some(Track::Pending(prev)) => {
                    // An empty regular file is still being written; anything else that is stable is
                    // judged (a special file is refused by intake, without being opened).
                    let empty_file = sig.0 == 0 && std::fs::symlink_metadata(&f.path).is_ok_and(|m| m.is_file());
                    if prev == sig && !empty_file {
                        ready.push((f.clone(), sig));
                    } else {
                        self.tracks.insert(f.path.clone(), (f.time, Track::Pending(sig)));
                    }
                }
                Some(Track::Taken(prev, used)) if prev != sig => {
                    self.changed += 1;
                    let newer_used = newest_used.is_some_and(|t| t > f.time);
                    if used || newer_used {
                        let why = if used { "its first version was used and stands" } else { "a newer frame was used since" };
                        notes.push(format!("{name} changed after it was taken ({} → {} bytes); not read again: {why}", prev.0, sig.0));
                        self.tracks.insert(f.path.clone(), (f.time, Track::Taken(sig, used)));
                    } else {
                        notes.push(format!("{name} changed after it was taken ({} → {} bytes); read again once it is stable", prev.0, sig.0));
                        self.tracks.insert(f.path.clone(), (f.time, Track::Pending(sig)));
                    }
                }
                Some(Track::Taken(..)) => {}
            }
        }
        // Every ready file counts as taken (the newest is read, the others skipped).
        for (f, sig) in &ready {
            self.tracks.insert(f.path.clone(), (f.time, Track::Taken(*sig, false)));
        }
        Poll { ready: ready.into_iter().map(|r| r.0).collect(), notes }
    }

    /// The file read this poll, and whether the engine used it.
    fn taken(&mut self, f: &crate::io::FrameRef, used: bool) {
        if let Some((_, Track::Taken(_, u))) = self.tracks.get_mut(&f.path) {
            *u = used;
        }
    }
}

/// The engine thread of live mode: the nowcaster with its state and everything it reports to
/// (SQLite log, shared health and latest nowcast, event stream, Modbus registers, webhook). Each
/// poll: prune the archive, take measurement rows, note untimed files, reject frames dated ahead of
/// the clock, then step the newest ready frame and report it.
struct LiveEngine {
    opts: LiveOptions,
    nc: Nowcaster,
    conn: rusqlite::Connection,
    shared: Arc<Mutex<Shared>>,
    tx: broadcast::Sender<String>,
    registers: Arc<modbus::Feed>,
    notifier: Option<notify::Notifier>,
    watch: Watcher,
    intake: crate::intake::IntakeOptions,
    /// The site's display time zone, given with every nowcast (times stay UTC).
    time_zone: serde_json::Value,
    processed: usize,
    feed: Option<ops::MeasurementFeed>,
    tuning_reset_done: bool,
    untimed_seen: HashSet<String>,
    untimed_in_folder: usize,
    pruned_at: Option<std::time::Instant>,
}

/// What a frame's step gave, for the reports after it.
struct Stepped {
    frame: Result<Frame, Rejection>,
    result: Result<Nowcast, Rejection>,
    latency_ms: f64,
}

impl LiveEngine {
    fn new(opts: LiveOptions, nc: Nowcaster, conn: rusqlite::Connection, shared: Arc<Mutex<Shared>>, tx: broadcast::Sender<String>, registers: Arc<modbus::Feed>, notifier: Option<notify::Notifier>) -> LiveEngine {
        let intake = nc.intake_options();
        let time_zone = serde_json::to_value(nc.site().file.site.time_zone()).unwrap_or_default();
        let feed = opts.health.measurements.as_deref().map(ops::MeasurementFeed::new);
        LiveEngine {
            opts,
            nc,
            conn,
            shared,
            tx,
            registers,
            notifier,
            watch: Watcher::default(),
            intake,
            time_zone,
            processed: 0,
            feed,
            tuning_reset_done: false,
            untimed_seen: HashSet::new(),
            untimed_in_folder: 0,
            pruned_at: None,
        }
    }

    fn log(&self, fields: &[(&str, String)]) {
        eprintln!("{}", ops::log_line(fields, self.opts.health.log_json));
    }

    /// Poll until `stop` is set.
    fn run(mut self, stop: Arc<AtomicBool>) {
        if let Ok(mut s) = self.shared.lock() {
            s.health.running = true;
        }
        while !stop.load(Ordering::SeqCst) {
            std::thread::sleep(std::time::Duration::from_millis(self.opts.poll_ms));
            self.prune_archive();
            if let Some(f) = self.feed.as_mut() {
                feed_step(f, &mut self.nc, &self.shared, &mut self.tuning_reset_done, &self.opts.health);
            }
            let Ok((frames, untimed)) = list_frames(&self.opts.incoming) else { continue };
            self.note_untimed(untimed);
            let poll = self.watch.poll(&frames);
            for note in &poll.notes {
                eprintln!("nephocast live: {note}");
            }
            if !poll.notes.is_empty()
                && let Ok(mut s) = self.shared.lock()
            {
                s.health.frames_changed = self.watch.changed;
            }
            // Frames dated ahead of the clock are rejected one by one (they must not hide the
            // newest good frame, e.g. after a restart with a future-dated file still in the folder).
            let now = Utc::now();
            let tol = self.nc.site().file.qc.max_ahead_of_clock_s;
            let (future, ready): (Vec<_>, Vec<_>) = poll.ready.into_iter().partition(|f| (f.time - now).num_milliseconds() as f64 / 1000.0 > tol);
            self.reject_future(&future, now);
            let Some(newest) = ready.iter().max_by_key(|f| f.time).cloned() else { continue };
            for f in ready.iter().filter(|f| f.path != newest.path) {
                self.log(&[("event", "frame".into()), ("file", file_name(&f.path)), ("time", fmt_time(&f.time)), ("outcome", "skipped".into()), ("reason", "a newer frame was waiting".into())]);
            }
            let stepped = self.step(&newest);
            self.report(&newest, stepped, ready.len() - 1);
            retire_all(&ready, &self.opts.health.retention, &self.shared, self.opts.health.log_json);
        }
        if let Ok(mut s) = self.shared.lock() {
            s.health.running = false;
        }
    }

    /// Remove archived frames beyond their keep time, at most once an hour.
    fn prune_archive(&mut self) {
        if let (ops::Retention::Archive(dir), Some(days)) = (&self.opts.health.retention, self.opts.health.archive_keep_days)
            && self.pruned_at.is_none_or(|t| t.elapsed().as_secs() >= 3600)
        {
            self.pruned_at = Some(std::time::Instant::now());
            for p in ops::prune_archive(dir, days, Utc::now().date_naive()) {
                self.log(&[("event", "retention".into()), ("folder", p.display().to_string()), ("done", format!("removed (older than {days} days)"))]);
            }
        }
    }

    /// Log each file without a time in its name once, and show the last 20 in the health.
    fn note_untimed(&mut self, untimed: usize) {
        if untimed == self.untimed_in_folder {
            return;
        }
        self.untimed_in_folder = untimed;
        let new: Vec<String> = ops::untimed_files(&self.opts.incoming).into_iter().filter(|n| self.untimed_seen.insert(n.clone())).collect();
        for n in &new {
            self.log(&[("event", "untimed".into()), ("file", n.clone()), ("reason", format!("no time in the name (expected {})", crate::io::FRAME_NAME_PATTERN))]);
        }
        if !new.is_empty()
            && let Ok(mut s) = self.shared.lock()
        {
            s.health.frames_untimed = self.untimed_seen.len();
            s.health.untimed_files.extend(new);
            let n = s.health.untimed_files.len();
            s.health.untimed_files.drain(..n.saturating_sub(20));
        }
    }

    /// Reject (count, announce, log, retire) the frames dated beyond the clock's tolerance.
    fn reject_future(&mut self, future: &[crate::io::FrameRef], now: DateTime<Utc>) {
        let valid_now = self.shared.lock().map(|s| s.health.data_valid).unwrap_or(false);
        for f in future {
            if let Err(r) = self.nc.judge_clock(f.time, now) {
                let _ = self.tx.send(serde_json::json!({"type": "rejected", "file": f.path.file_name().map(|x| x.to_string_lossy().into_owned()), "reason": r.to_string(), "data_valid": valid_now}).to_string());
                self.log(&[("event", "frame".into()), ("file", file_name(&f.path)), ("time", fmt_time(&f.time)), ("outcome", "rejected".into()), ("reason", r.to_string())]);
            }
        }
        retire_all(future, &self.opts.health.retention, &self.shared, self.opts.health.log_json);
        if !future.is_empty()
            && let Ok(mut s) = self.shared.lock()
        {
            s.health.frames_rejected = self.nc.counters.rejected.clone();
        }
    }

    /// The clock policy (from the name alone), intake, then the engine; the controller's
    /// registers are published first, before logging and pictures. Older than what was already
    /// processed: out of order, counted by the engine.
    fn step(&mut self, newest: &crate::io::FrameRef) -> Stepped {
        let t0 = std::time::Instant::now();
        let frame = match self.nc.judge_clock(newest.time, Utc::now()) {
            Err(r) => Err(r),
            Ok(note) => {
                if let Some(n) = note {
                    eprintln!("nephocast live: {n}");
                }
                crate::intake::read_frame(&newest.path, &self.intake).map(|image| Frame { time: newest.time, image }).map_err(|e| self.nc.reject(Rejection::Intake(e)))
            }
        };
        let result = match &frame {
            Ok(fr) => self.nc.step(fr),
            Err(r) => Err(r.clone()),
        };
        if let Ok(n) = &result {
            self.registers.publish(n);
        }
        self.watch.taken(newest, result.is_ok());
        Stepped { frame, result, latency_ms: t0.elapsed().as_secs_f64() * 1000.0 }
    }

    /// Report a stepped frame: health, history and alarm log, notification, events, overlay, the
    /// per-frame log line and the shared state.
    fn report(&mut self, newest: &crate::io::FrameRef, st: Stepped, skipped: usize) {
        let (valid, health_state, frame_age) = match self.shared.lock() {
            Ok(mut s) => {
                if st.frame.is_ok() {
                    s.ops.newest_read = s.ops.newest_read.max(Some(newest.time));
                    s.ops.last_read_wall = Some(std::time::Instant::now());
                    s.health.newest_frame_utc = s.ops.newest_read.map(|t| fmt_time(&t));
                }
                s.refresh_health(false);
                (s.health.data_valid, s.health.health_state.clone(), s.health.frame_age_s)
            }
            Err(_) => (false, String::new(), None),
        };
        let mut events = vec![];
        let (mut overlay, mut latest) = (None, None);
        match &st.result {
            Ok(n) => {
                self.processed += 1;
                let mut j = nowcast_json(n);
                j["site_time_zone"] = self.time_zone.clone();
                latest = Some(j);
                self.log_nowcast(n, valid, &mut events);
                events.push(serde_json::json!({"type": "nowcast", "issue_time_utc": fmt_time(&n.time), "alarm": n.alarm.name(), "data_valid": valid, "health": health_state}).to_string());
                if self.opts.overlay_every > 0 && (self.processed - 1).is_multiple_of(self.opts.overlay_every)
                    && let Ok(fr) = &st.frame {
                        overlay = Some(crate::overlay::overlay_png(&fr.image, n, &self.nc));
                    }
            }
            Err(r) => events.push(serde_json::json!({"type": "rejected", "file": newest.path.file_name().map(|x| x.to_string_lossy().into_owned()), "reason": r.to_string(), "data_valid": valid}).to_string()),
        }
        self.log_frame(newest, &st, skipped, (valid, &health_state, frame_age));
        if let Ok(mut s) = self.shared.lock() {
            s.health.frames_skipped += skipped;
            s.health.frames_processed = self.nc.counters.used;
            s.health.frames_rejected = self.nc.counters.rejected.clone();
            s.health.clock_reanchors = self.nc.counters.clock_reanchors;
            s.health.frames_changed = self.watch.changed;
            s.health.alarm = self.nc.alarm_state().name().into();
            s.health.alarm_current = self.nc.alarm_current();
            if st.result.is_ok() {
                s.ops.latency.observe(st.latency_ms / 1000.0);
                s.latencies.push_back(st.latency_ms);
                if s.latencies.len() > 500 {
                    s.latencies.pop_front();
                }
                s.last_time = Some(newest.time);
                s.health.last_frame_utc = Some(fmt_time(&newest.time));
            }
            if latest.is_some() {
                s.latest = latest;
            }
            if overlay.is_some() {
                s.overlay_png = overlay;
            }
        }
        for e in events {
            let _ = self.tx.send(e);
        }
    }

    /// The nowcast into the history, an alarm change into the alarm log, the webhook (held back
    /// while shelved) and the event stream.
    fn log_nowcast(&self, n: &Nowcast, valid: bool, events: &mut Vec<String>) {
        let plant: Vec<&crate::forecast::TargetForecast> = n.forecast.plant().collect();
        let h = db::HistoryRow {
            time_utc: fmt_time(&n.time),
            cloud_fraction: n.cloud_fraction,
            plant_ghi_wm2: plant.first().map(|r| r.irradiance.ghi_wm2).unwrap_or(f64::NAN),
            plant_power_kw: plant.first().map(|r| r.power_kw).unwrap_or(f64::NAN),
            speed_mps: n.motion.map(|m| m.v_mps[0].hypot(m.v_mps[1])).unwrap_or(f64::NAN),
            toward_deg: n.motion.map(|m| m.v_mps[0].atan2(m.v_mps[1]).to_degrees().rem_euclid(360.0)).unwrap_or(f64::NAN),
            alarm: n.alarm.name().into(),
        };
        let _ = db::insert_history(&self.conn, n.time.timestamp(), &h, self.opts.keep_s);
        let Some(ch) = &n.alarm_change else { return };
        let id = db::insert_alarm(&self.conn, ch).ok();
        if let Some(nf) = &self.notifier {
            match db::active_shelf(&self.conn, Utc::now()) {
                Ok(Some(shelf)) => eprintln!("alarm {} -> {} not notified: shelved until {} by {}", ch.from.name(), ch.to.name(), shelf.until_utc, shelf.shelved_by),
                _ => {
                    nf.send(serde_json::json!({"type": "alarm_change", "id": id, "change": ch, "basis": n.alarm_basis, "current": true,
                        "advisory": "Forecasts and alarms are advisory, not a protection system."}).to_string());
                }
            }
        }
        events.push(serde_json::json!({"type": "alarm", "change": ch, "data_valid": valid}).to_string());
    }

    /// The per-frame log line.
    fn log_frame(&self, newest: &crate::io::FrameRef, st: &Stepped, skipped: usize, (valid, health_state, frame_age): (bool, &str, Option<f64>)) {
        let f1 = |v: Option<f64>| v.map(|x| format!("{x:.1}")).unwrap_or_default();
        let measurement_age = self.shared.lock().ok().and_then(|s| s.health.measurement_age_s);
        self.log(&[
            ("event", "frame".into()),
            ("file", file_name(&newest.path)),
            ("time", fmt_time(&newest.time)),
            ("outcome", if st.result.is_ok() { "used" } else { "rejected" }.into()),
            ("reason", st.result.as_ref().err().map(|r| r.to_string()).unwrap_or_default()),
            ("skipped", skipped.to_string()),
            ("latency_ms", format!("{:.0}", st.latency_ms)),
            ("cloud_fraction", st.result.as_ref().ok().map(|n| format!("{:.3}", n.cloud_fraction)).unwrap_or_default()),
            ("alarm", self.nc.alarm_state().name().into()),
            ("health", health_state.to_string()),
            ("data_valid", valid.to_string()),
            ("frame_age_s", f1(frame_age)),
            ("measurement_age_s", f1(measurement_age)),
        ]);
    }
}

fn file_name(p: &std::path::Path) -> String {
    p.file_name().map(|x| x.to_string_lossy().into_owned()).unwrap_or_default()
}

/// Apply the retention to judged frames, logging what was done.
fn retire_all(frames: &[crate::io::FrameRef], r: &ops::Retention, shared: &Arc<Mutex<Shared>>, log_json: bool) {
    if *r == ops::Retention::Keep {
        return;
    }
    let mut n = 0;
    for f in frames {
        match ops::retire(&f.path, &f.time, r) {
            Ok(Some(what)) => {
                n += 1;
                eprintln!("{}", ops::log_line(&[("event", "retention".into()), ("file", file_name(&f.path)), ("done", what)], log_json));
            }
            Ok(None) => {}
            Err(e) => eprintln!("{}", ops::log_line(&[("event", "retention".into()), ("file", file_name(&f.path)), ("error", e.to_string())], log_json)),
        }
    }
    if n > 0
        && let Ok(mut s) = shared.lock()
    {
        s.health.frames_retired += n;
    }
}

/// Read the measurement feed, append to the engine, and go back to the configured
/// transmittances once the feed is older than its limit.
fn feed_step(feed: &mut ops::MeasurementFeed, nc: &mut Nowcaster, shared: &Arc<Mutex<Shared>>, reset_done: &mut bool, o: &ops::HealthOptions) {
    let poll = feed.poll(&nc.site().file);
    for n in &poll.notes {
        eprintln!("nephocast live: {n}");
    }
    for (m, counts) in poll.pieces {
        for (k, v) in counts {
            *nc.counters.measurements_flagged.entry(k).or_default() += v;
        }
        nc.append_measurements(m, ops::FEED_KEEP_S);
    }
    let (rows, end) = nc.measurements_newest();
    // The tuning works in the frames' time: the feed has stopped for it when its newest reading is
    // older than the limit at the newest frame's time.
    let newest_frame = shared.lock().ok().and_then(|s| s.ops.newest_read);
    let old = newest_frame.is_some_and(|f| end.is_none_or(|t| ops::age_s(&t, &f) > o.measurement_max_age_s));
    let mut reset = false;
    if old && !*reset_done {
        reset = nc.reset_tuning();
        *reset_done = true;
        if reset {
            eprintln!("nephocast live: the measurement feed is older than {:.0} s: the tuning goes back to the configured transmittances", o.measurement_max_age_s);
        }
    } else if !old {
        *reset_done = false;
    }
    if let Ok(mut s) = shared.lock() {
        s.health.measurement_rows = rows;
        s.health.measurement_rows_read = feed.rows_read;
        s.health.measurement_errors = feed.errors;
        s.health.tuning_resets += usize::from(reset);
        s.health.tuning_rows = nc.tuning_rows();
        s.ops.measurement_end = end;
    }
}

async fn dashboard() -> Html<&'static str> {
    Html(guard::DASHBOARD_HTML)
}

async fn api_nowcast(State(app): State<App>) -> Response {
    let got = app.shared.lock().ok().and_then(|s| {
        s.latest.clone().map(|mut v| {
            v["data_valid"] = s.health.data_valid.into();
            v["health"] = s.health.health_state.clone().into();
            v["frame_age_s"] = s.health.frame_age_s.into();
            v["heartbeat"] = s.health.heartbeat.into();
            v
        })
    });
    match got {
        Some(v) => Json(v).into_response(),
        None => (StatusCode::SERVICE_UNAVAILABLE, Json(serde_json::json!({"error": "no nowcast yet"}))).into_response(),
    }
}

async fn api_health(State(app): State<App>) -> Response {
    let Ok(s) = app.shared.lock() else { return StatusCode::INTERNAL_SERVER_ERROR.into_response() };
    let mut h = s.health.clone();
    h.latency_ms_median = pct(&s.latencies, 0.5);
    h.latency_ms_p95 = pct(&s.latencies, 0.95);
    h.last_frame_age_s = s.last_time.map(|t| (Utc::now() - t).num_milliseconds() as f64 / 1000.0);
    Json(h).into_response()
}

async fn metrics(State(app): State<App>) -> Response {
    let Ok(s) = app.shared.lock() else { return StatusCode::INTERNAL_SERVER_ERROR.into_response() };
    ([(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")], ops::metrics_text(&s.metrics())).into_response()
}

/// Run `f` on the alarm log; an error is the message for a 500 response ([`db_error`]).
fn with_db<T>(app: &App, f: impl FnOnce(&rusqlite::Connection) -> rusqlite::Result<T>) -> Result<T, String> {
    let c = db::open(&app.db).map_err(|e| e.to_string())?;
    f(&c).map_err(|e| e.to_string())
}

/// The response to a failed alarm-log access.
fn db_error(message: String) -> Response {
    (StatusCode::INTERNAL_SERVER_ERROR, message).into_response()
}

async fn api_alarms(State(app): State<App>) -> Response {
    let (state, current) = app.shared.lock().map(|s| (s.health.alarm.clone(), s.health.alarm_current)).unwrap_or_default();
    match with_db(&app, |c| Ok((db::alarms(c, 200)?, db::active_shelf(c, Utc::now())?, db::shelves(c, 20)?))) {
        Ok((log, shelved, shelvings)) => Json(serde_json::json!({
            "state": state, "current": current, "shelved": shelved, "shelvings": shelvings, "log": log,
            "ack_enabled": app.token.is_some(), "site_time_zone": app.time_zone
        }))
        .into_response(),
        Err(e) => db_error(e),
    }
}

async fn api_history(State(app): State<App>) -> Response {
    match with_db(&app, |c| db::history(c, 2000)) {
        Ok(h) => Json(h).into_response(),
        Err(e) => db_error(e),
    }
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct AckRequest {
    id: i64,
    token: String,
    #[serde(default)]
    by: String,
}

fn ack_error(code: StatusCode, message: impl Into<String>) -> Response {
    (code, Json(serde_json::json!({"error": message.into()}))).into_response()
}

/// The guards every operator action passes: acknowledging on, rate limit per client and globally,
/// JSON body bounded in size and time. Returns the body, the token digest and the client.
async fn guarded_body(
    app: &App,
    client: Option<axum::Extension<http::ClientAddr>>,
    headers: &axum::http::HeaderMap,
    body: axum::body::Body,
) -> Result<(axum::body::Bytes, guard::TokenDigest, std::net::IpAddr), Response> {
    let Some(token) = app.token else {
        return Err(ack_error(StatusCode::FORBIDDEN, "acknowledging is off: start with an acknowledgement token"));
    };
    let ip = client.map(|c| c.0.0.ip()).unwrap_or(std::net::IpAddr::V4(std::net::Ipv4Addr::UNSPECIFIED));
    if let Err(wait) = app.limiter.admit(ip, std::time::Instant::now()) {
        let secs = wait.as_secs_f64().ceil().max(1.0) as u64;
        let mut r = ack_error(StatusCode::TOO_MANY_REQUESTS, format!("too many wrong tokens: try again in {secs} s"));
        if let Ok(v) = header::HeaderValue::from_str(&secs.to_string()) {
            r.headers_mut().insert(header::RETRY_AFTER, v);
        }
        return Err(r);
    }
    let json_type = headers.get(header::CONTENT_TYPE).and_then(|v| v.to_str().ok()).is_some_and(|v| v.trim().to_ascii_lowercase().starts_with("application/json"));
    if !json_type {
        return Err(ack_error(StatusCode::UNSUPPORTED_MEDIA_TYPE, "Content-Type: expected application/json"));
    }
    let declared = headers.get(header::CONTENT_LENGTH).and_then(|v| v.to_str().ok()).and_then(|v| v.parse::<u64>().ok());
    if declared.is_some_and(|n| n > ACK_BODY_MAX_BYTES as u64) {
        return Err(ack_error(StatusCode::PAYLOAD_TOO_LARGE, format!("request body: expected at most {ACK_BODY_MAX_BYTES} bytes")));
    }
    let bytes = match tokio::time::timeout(app.body_timeout, axum::body::to_bytes(body, ACK_BODY_MAX_BYTES)).await {
        Err(_) => return Err(ack_error(StatusCode::REQUEST_TIMEOUT, format!("request body: not complete within {:.0} s", app.body_timeout.as_secs_f64()))),
        Ok(Err(_)) => return Err(ack_error(StatusCode::PAYLOAD_TOO_LARGE, format!("request body: expected at most {ACK_BODY_MAX_BYTES} bytes"))),
        Ok(Ok(b)) => b,
    };
    Ok((bytes, token, ip))
}

/// Acknowledge an alarm: rate-limited per client and globally, the body bounded in size and
/// time, the token compared in constant time, and only the first acknowledgement kept. Recorded
/// in wall time and on the frame clock (the newest frame's time).
async fn api_ack(State(app): State<App>, client: Option<axum::Extension<http::ClientAddr>>, headers: axum::http::HeaderMap, body: axum::body::Body) -> Response {
    let (bytes, token, ip) = match guarded_body(&app, client, &headers, body).await {
        Ok(x) => x,
        Err(r) => return r,
    };
    let req: AckRequest = match serde_json::from_slice(&bytes) {
        Ok(r) => r,
        Err(e) => return ack_error(StatusCode::BAD_REQUEST, format!("request body: expected {{\"id\": integer, \"token\": string, \"by\": optional string}}: {e}")),
    };
    let by = match guard::check_by(&req.by) {
        Ok(b) => b,
        Err(e) => return ack_error(StatusCode::UNPROCESSABLE_ENTITY, e),
    };
    if !guard::token_matches(&req.token, &token) {
        app.limiter.failed(ip, std::time::Instant::now());
        return ack_error(StatusCode::FORBIDDEN, "wrong token");
    }
    app.limiter.succeeded(ip);
    let frame = app.shared.lock().ok().and_then(|s| s.last_time).map(|t| fmt_time(&t));
    match with_db(&app, |c| db::ack(c, req.id, &by, &fmt_time(&Utc::now()), frame.as_deref())) {
        Ok(db::AckOutcome::Acked) => {
            let _ = app.tx.send(serde_json::json!({"type": "ack", "id": req.id}).to_string());
            Json(serde_json::json!({"acked": req.id, "by": by})).into_response()
        }
        Ok(db::AckOutcome::AlreadyAcked { acked_utc, acked_by }) => (
            StatusCode::CONFLICT,
            Json(serde_json::json!({
                "error": format!("alarm {} was already acknowledged at {acked_utc} by {acked_by}; the first acknowledgement is kept", req.id),
                "acked_utc": acked_utc, "acked_by": acked_by,
            })),
        )
            .into_response(),
        Ok(db::AckOutcome::NoSuchAlarm) => ack_error(StatusCode::NOT_FOUND, format!("id: no alarm {}", req.id)),
        Err(e) => db_error(e),
    }
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct ShelveRequest {
    minutes: f64,
    token: String,
    #[serde(default)]
    by: String,
}

/// Longest shelving \[min\].
pub const SHELVE_MAX_MIN: f64 = 480.0;

/// Shelve the alarm's notifications for a while (the state still changes and is logged and shown):
/// the same guards as acknowledging; recorded append-only in wall time and on the frame clock.
async fn api_shelve(State(app): State<App>, client: Option<axum::Extension<http::ClientAddr>>, headers: axum::http::HeaderMap, body: axum::body::Body) -> Response {
    let (bytes, token, ip) = match guarded_body(&app, client, &headers, body).await {
        Ok(x) => x,
        Err(r) => return r,
    };
    let req: ShelveRequest = match serde_json::from_slice(&bytes) {
        Ok(r) => r,
        Err(e) => return ack_error(StatusCode::BAD_REQUEST, format!("request body: expected {{\"minutes\": number, \"token\": string, \"by\": optional string}}: {e}")),
    };
    let by = match guard::check_by(&req.by) {
        Ok(b) => b,
        Err(e) => return ack_error(StatusCode::UNPROCESSABLE_ENTITY, e),
    };
    if !(req.minutes.is_finite() && req.minutes > 0.0 && req.minutes <= SHELVE_MAX_MIN) {
        return ack_error(StatusCode::UNPROCESSABLE_ENTITY, format!("minutes: expected more than 0 and at most {SHELVE_MAX_MIN}, got {}", req.minutes));
    }
    if !guard::token_matches(&req.token, &token) {
        app.limiter.failed(ip, std::time::Instant::now());
        return ack_error(StatusCode::FORBIDDEN, "wrong token");
    }
    app.limiter.succeeded(ip);
    let frame = app.shared.lock().ok().and_then(|s| s.last_time);
    match with_db(&app, |c| db::shelve(c, &by, Utc::now(), frame, req.minutes)) {
        Ok(row) => {
            let _ = app.tx.send(serde_json::json!({"type": "shelve", "shelf": row}).to_string());
            Json(serde_json::json!({"shelved": row})).into_response()
        }
        Err(e) => db_error(e),
    }
}

async fn api_events(State(app): State<App>) -> Sse<impl futures_util::Stream<Item = Result<Event, std::convert::Infallible>>> {
    let rx = app.tx.subscribe();
    let stream = tokio_stream::wrappers::BroadcastStream::new(rx).filter_map(|m| async move { m.ok().map(|s| Ok(Event::default().data(s))) });
    Sse::new(stream).keep_alive(KeepAlive::new().interval(http::SSE_KEEP_ALIVE))
}

async fn api_overlay(State(app): State<App>) -> Response {
    match app.shared.lock().ok().and_then(|s| s.overlay_png.clone()) {
        Some(png) => ([(header::CONTENT_TYPE, "image/png"), (header::CACHE_CONTROL, "no-store")], png).into_response(),
        None => StatusCode::NOT_FOUND.into_response(),
    }
}

/// The default listening address.
pub const DEFAULT_BIND: &str = "127.0.0.1:8765";
