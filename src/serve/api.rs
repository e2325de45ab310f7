//! The HTTP routes: dashboard, JSON API, event stream, overlay, metrics, and the operator actions
//! (acknowledge, shelve) behind their guards.

use std::collections::VecDeque;
use std::path::PathBuf;
use std::sync::{Arc, Mutex};

use axum::extract::State;
use axum::http::{StatusCode, header};
use axum::response::sse::{Event, KeepAlive, Sse};
use axum::response::{Html, IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use futures_util::StreamExt;
use chrono::Utc;
use tokio::sync::broadcast;

use super::shared::Shared;
use super::{db, guard, http, ops};
use crate::io::fmt_time;

/// What every handler is given: the shared state, the event channel, the alarm log and the
/// acknowledgement guards.
#[derive(Clone)]
pub(super) struct App {
    pub(super) shared: Arc<Mutex<Shared>>,
    pub(super) tx: broadcast::Sender<String>,
    pub(super) db: PathBuf,
    /// SHA-256 of the acknowledgement token (none: acknowledging is off).
    pub(super) token: Option<guard::TokenDigest>,
    pub(super) limiter: Arc<guard::AckLimiter>,
    pub(super) body_timeout: std::time::Duration,
    /// The site's display time zone ([`crate::config::SiteTimeZone`]), for times in the alarm log.
    pub(super) time_zone: serde_json::Value,
}

/// The routes, behind the Host check and with the security headers on every answer.
pub(super) fn router(app: App, allowed: Arc<Vec<String>>) -> Router {
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

fn pct(v: &VecDeque<f64>, p: f64) -> Option<f64> {
    if v.is_empty() {
        return None;
    }
    let mut s: Vec<f64> = v.iter().copied().collect();
    s.sort_by(f64::total_cmp);
    Some(s[((s.len() - 1) as f64 * p).round() as usize])
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
            let valid = app.shared.lock().map(|s| s.health.data_valid).unwrap_or(false);
            let _ = app.tx.send(serde_json::json!({"type": "ack", "id": req.id, "data_valid": valid}).to_string());
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
            let valid = app.shared.lock().map(|s| s.health.data_valid).unwrap_or(false);
            let _ = app.tx.send(serde_json::json!({"type": "shelve", "shelf": row, "data_valid": valid}).to_string());
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

#[cfg(test)]
mod tests {
    /// The published API description parses as YAML and lists every route this file registers
    /// (except the dashboard page and the description itself).
    #[test]
    fn openapi_lists_every_route() {
        let doc: serde_yaml::Value = serde_yaml::from_str(include_str!("openapi.yaml")).expect("openapi.yaml parses");
        let paths = doc["paths"].as_mapping().expect("paths");
        let source = include_str!("api.rs");
        let routes: Vec<&str> = source.split(".route(\"").skip(1).filter_map(|r| r.split('"').next()).filter(|r| r.starts_with('/')).collect();
        assert!(routes.len() >= 9, "{routes:?}");
        for r in routes.into_iter().filter(|r| *r != "/" && *r != "/openapi.yaml") {
            assert!(paths.contains_key(serde_yaml::Value::from(r)), "{r} is not in openapi.yaml");
        }
    }
}
