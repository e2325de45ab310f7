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
//! * Health: [`health`]; measurement feed, per-frame log line, `/metrics` and retention: [`ops`].
//!   The health state (starting, ok, no_measurements, stale, camera_down, night) is judged on its own timer and is
//!   separate from the ramp alarm; `data_valid` goes with every output.
//!
//! Forecasts and alarms are advisory, not a protection system.

mod api;
pub mod db;
mod engine;
mod error;
pub mod guard;
pub mod health;
pub mod http;
pub mod modbus;
pub mod modbus_feed;
mod net;
pub mod notify;
pub mod ops;
mod shared;
mod watch;

pub use api::{ACK_BODY_MAX_BYTES, SHELVE_MAX_MIN};
pub use error::ServeError;
pub use http::{ServerOptions, TlsFiles};

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use serde::Serialize;
use tokio::sync::broadcast;

use api::{App, router};
use engine::LiveEngine;
use shared::{Shared, health_loop};
use crate::nowcast::Nowcaster;

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
    /// Health state ([`health::HealthState`]): starting, ok, no_measurements, stale, camera_down, night.
    pub health_state: String,
    /// The forecasts come from a fresh frame (a controller falls back when false).
    pub data_valid: bool,
    /// Rises every health evaluation (every [`ops::HEALTH_TICK_MS`] ms) while the service lives.
    pub heartbeat: u64,
    /// Time of the newest frame read (used or not, e.g. at night).
    pub newest_frame_utc: Option<String>,
    /// Age of the frame behind the newest forecast \[s\] (what staleness and data-valid are judged
    /// on; frames read but refused do not count).
    pub frame_age_s: Option<f64>,
    /// Measurement rows the engine holds (the feed's, bounded to the last hours).
    pub measurement_rows: usize,
    /// Measurement rows taken from the feed since start.
    pub measurement_rows_read: usize,
    /// Age of the end of the newest measurement's averaging period \[s\].
    pub measurement_age_s: Option<f64>,
    /// Measurement pieces refused (unparsable lines, kW/m²).
    pub measurement_errors: usize,
    /// The Modbus measurement feed's state and counters (connection, failed requests, outages,
    /// refused samples), when the site polls one (`[measurements_modbus]`).
    pub measurement_feed_modbus: Option<modbus_feed::ModbusFeedStatus>,
    /// Times the tuning went back to the configured transmittances because the feed stopped.
    pub tuning_resets: usize,
    /// Pyranometer readings the transmittance tuning holds now.
    pub tuning_rows: usize,
    /// The factor by which the frames' red/blue ratios read above the clear-sky library's colour
    /// balance, as followed now (1: as learnt; `segment.follow_colour_balance`); none before a
    /// frame was used.
    pub clear_rb_scale: Option<f64>,
    /// The frames' exposure against the library's clear-sky brightness (geometric mean over the
    /// frames that measured it since start), when any did.
    pub exposure: Option<f64>,
    /// Frame-like files whose name holds no time (seen since start).
    pub frames_untimed: usize,
    /// The newest of their names (at most 20).
    pub untimed_files: Vec<String>,
    /// Frame files archived or deleted by the retention.
    pub frames_retired: usize,
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
    let modbus_feed = one_feed(&opts, &nowcaster.site().file)?;
    // The feed's reader; a Modbus poller starts polling now (it stops when dropped).
    let measurements = engine::FeedSource::open(&opts, &nowcaster.site().file)
        .map_err(|e| ServeError::Feed(format!("{} [measurements_modbus]: cannot start the poller: {e}", opts.site.display())))?;
    std::fs::create_dir_all(&opts.incoming)?;
    let database = |error| ServeError::Database { path: opts.db.clone(), error };
    let conn = db::open(&opts.db).map_err(database)?;
    if let Some((s, since)) = db::last_change(&conn).map_err(database)? {
        nowcaster.restore_alarm(s, since, db::last_frame_time(&conn).map_err(database)?);
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
        s.ops.modbus_feed = modbus_feed;
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
    let notifier = match webhook_options(&opts, &nowcaster.site().file) {
        Some(w) => Some(notify::Notifier::start(w).map_err(webhook_error)?),
        None => None,
    };
    let (stop2, stop3, shared3, tx3, log_json) = (stop.clone(), stop.clone(), shared.clone(), tx.clone(), opts.health.log_json);
    let (feed2, feed3) = (feed.clone(), feed.clone());
    let engine = std::thread::spawn(move || LiveEngine::new(opts, nowcaster, conn, shared, tx, feed2, notifier, measurements).run(stop2));
    let ticker = std::thread::spawn(move || health_loop(shared3, tx3, stop3, log_json, feed3));
    Ok(LiveHandle { addr, warnings, tls: is_tls, stop, engine: Some(engine), ticker: Some(ticker), server: Some(server), shutdown: Some(sd_tx), modbus_addr, modbus, feed })
}

/// Check the configuration without starting: options and address, the site file with its
/// calibration and base-height series, the Modbus server's and the webhook's options, the
/// measurement feed, and the folders. Returns what was
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
    check_interfaces(opts, f, &mut out)?;
    let m = f.memory_estimate();
    out.push(format!("estimated forecast working memory: {:.0} MB ({m}; the site check refuses over {} MB)", m.bytes as f64 / 1e6, crate::config::MEMORY_CAP_BYTES / 1_000_000));
    if one_feed(opts, f)?
        && let Some(m) = &f.measurements_modbus
    {
        out.push(format!("measurements feed: Modbus TCP {} unit {}, {} register(s), poll {} s, averaging {} s", m.address, m.unit_id, m.registers.len(), m.poll_s, m.averaging_s));
        // One read now; a device out of reach is a warning (live mode starts and keeps trying).
        match modbus_feed::probe(m) {
            Ok(values) => {
                let unit = |c: &str| if crate::config::Quantity::of(c) == Some(crate::config::Quantity::Power) { "kW" } else { "W/m²" };
                let v: Vec<String> = values.iter().map(|(c, v)| format!("{c} {v:.1} {}", unit(c))).collect();
                out.push(format!("measurements feed: read now: {}", v.join(", ")));
            }
            Err(e) => out.push(format!("warning: measurements feed: Modbus TCP {e}; live mode starts anyway and keeps connecting")),
        }
    }
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

/// The webhook's options: the URL of `--webhook-url-file` with the site's `[webhook]` settings.
fn webhook_options(opts: &LiveOptions, site: &crate::config::SiteFile) -> Option<notify::WebhookOptions> {
    opts.server.webhook.as_ref().map(|w| notify::WebhookOptions::configured(w.url.clone(), &site.webhook, &opts.site))
}

/// A refused webhook, naming the option or field at fault.
fn webhook_error(e: String) -> ServeError {
    ServeError::Webhook(if e.starts_with("webhook URL") { format!("--webhook-url-file: {e}") } else { e })
}

/// Check the Modbus server's options and the webhook's (URL, `[webhook]`, certificates for
/// `https://`); one line each, warnings first.
fn check_interfaces(opts: &LiveOptions, site: &crate::config::SiteFile, out: &mut Vec<String>) -> Result<(), ServeError> {
    if let Some(m) = &opts.server.modbus {
        for w in m.check().map_err(ServeError::ModbusOptions)? {
            out.push(format!("warning: {w}"));
        }
        out.push(format!(
            "Modbus TCP server: --modbus-bind {} (read-only; not bound by the check), at most {} connection(s), data valid while the frame is at most {} s old",
            m.bind, m.max_connections, m.max_frame_age_s
        ));
    }
    if let Some(w) = webhook_options(opts, site) {
        out.push(w.check().map_err(webhook_error)?);
    }
    Ok(())
}

/// Whether the site polls a Modbus measurement feed; refused together with `--measurements`
/// (one feed at a time, so rows from two sources never interleave).
fn one_feed(opts: &LiveOptions, f: &crate::config::SiteFile) -> Result<bool, ServeError> {
    match (&f.measurements_modbus, &opts.health.measurements) {
        (Some(_), Some(p)) => Err(ServeError::Feed(format!(
            "--measurements {} and the site's [measurements_modbus] are both given: expected one measurement feed",
            p.display()
        ))),
        (m, _) => Ok(m.is_some()),
    }
}

/// The default listening address.
pub const DEFAULT_BIND: &str = "127.0.0.1:8765";
