//! The state the engine thread, the health timer and the HTTP handlers share: the latest nowcast
//! and overlay, health figures and what the health is judged from; the health timer.

use std::collections::VecDeque;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use chrono::{DateTime, Utc};
use tokio::sync::broadcast;

use super::{Health, ops};

#[derive(Default)]
pub(super) struct Shared {
    pub(super) latest: Option<serde_json::Value>,
    pub(super) overlay_png: Option<Vec<u8>>,
    pub(super) health: Health,
    pub(super) latencies: VecDeque<f64>,
    pub(super) last_time: Option<DateTime<Utc>>,
    pub(super) ops: OpsShared,
}

/// What the health timer judges from.
pub(super) struct OpsShared {
    pub(super) started: std::time::Instant,
    pub(super) newest_read: Option<DateTime<Utc>>,
    pub(super) last_read_wall: Option<std::time::Instant>,
    /// The newest frame read, when the engine refused it only because the sun was too low.
    pub(super) sun_down_frame: Option<DateTime<Utc>>,
    pub(super) measurement_end: Option<DateTime<Utc>>,
    /// The site polls a Modbus measurement feed (`[measurements_modbus]`).
    pub(super) modbus_feed: bool,
    pub(super) latency: ops::Histogram,
    pub(super) state: ops::HealthState,
    /// Changes of state judged since the health timer last logged them, oldest first (previous,
    /// new): a frame may change the state and the next frame change it back within one tick, and
    /// each change is still logged.
    pub(super) changes: Vec<(ops::HealthState, ops::HealthState)>,
    pub(super) options: ops::HealthOptions,
}

impl Default for OpsShared {
    fn default() -> Self {
        OpsShared {
            started: std::time::Instant::now(),
            newest_read: None,
            last_read_wall: None,
            sun_down_frame: None,
            measurement_end: None,
            modbus_feed: false,
            latency: Default::default(),
            state: Default::default(),
            changes: Vec::new(),
            options: Default::default(),
        }
    }
}

impl Shared {
    /// Judge the health now; returns the previous state when it changed.
    pub(super) fn refresh_health(&mut self, heartbeat: bool) -> Option<ops::HealthState> {
        let now = Utc::now();
        let o = &self.ops;
        let inputs = ops::HealthInputs {
            uptime_s: o.started.elapsed().as_secs_f64(),
            // The age of the frame the outputs rest on (the newest forecast's): frames read but
            // refused by the engine (a low sun, exposure) keep the camera from counting as down but
            // do not make an old forecast current.
            frame_age_s: self.last_time.map(|t| ops::age_s(&t, &now)),
            since_frame_read_s: o.last_read_wall.map(|w| w.elapsed().as_secs_f64()),
            measurement_age_s: o.measurement_end.map(|t| ops::age_s(&t, &now)),
            feed: o.options.measurements.is_some() || o.modbus_feed,
            sun_down_frame_age_s: o.sun_down_frame.map(|t| ops::age_s(&t, &now)),
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
        if prev != state {
            // Bounded, should the timer not run: the oldest changes go first.
            if self.ops.changes.len() >= 64 {
                self.ops.changes.remove(0);
            }
            self.ops.changes.push((prev, state));
        }
        (prev != state).then_some(prev)
    }

    pub(super) fn metrics(&self) -> ops::MetricsInput {
        let h = &self.health;
        ops::MetricsInput {
            processed: h.frames_processed,
            skipped: h.frames_skipped,
            rejected: h.frames_rejected.clone(),
            untimed: h.frames_untimed,
            measurement_rows: h.measurement_rows_read,
            latency: self.ops.latency.clone(),
            // A state restored after a restart, with no nowcast behind it yet, is not reported as one.
            alarm: if h.alarm_current { h.alarm.clone() } else { "none".into() },
            health: self.ops.state,
            heartbeat: h.heartbeat,
            frame_age_s: h.frame_age_s,
            measurement_age_s: h.measurement_age_s,
            modbus_feed: h.measurement_feed_modbus.clone(),
        }
    }
}

/// The health timer: judge the health every [`ops::HEALTH_TICK_MS`] ms, log and send each change,
/// and send the heartbeat every 10 s. The Modbus registers' data-valid flag follows the judged state.
pub(super) fn health_loop(shared: Arc<Mutex<Shared>>, tx: broadcast::Sender<String>, stop: Arc<AtomicBool>, log_json: bool, registers: Arc<super::modbus::Feed>) {
    while !stop.load(Ordering::SeqCst) {
        std::thread::sleep(std::time::Duration::from_millis(ops::HEALTH_TICK_MS));
        let Ok(mut s) = shared.lock() else { return };
        s.refresh_health(true);
        registers.set_health_valid(s.health.data_valid);
        // Every change judged since the last tick (here or by the engine when a frame arrived).
        let changes = std::mem::take(&mut s.ops.changes);
        let h = &s.health;
        let event = serde_json::json!({"type": "health", "state": h.health_state, "data_valid": h.data_valid, "heartbeat": h.heartbeat,
            "frame_age_s": h.frame_age_s, "measurement_age_s": h.measurement_age_s});
        for (prev, state) in &changes {
            let f = |v: Option<f64>| v.map(|x| format!("{x:.1}")).unwrap_or_default();
            eprintln!(
                "{}",
                ops::log_line(
                    &[("event", "health".into()), ("state", state.name().into()), ("previous", prev.name().into()), ("data_valid", state.data_valid().to_string()),
                      ("frame_age_s", f(h.frame_age_s)), ("measurement_age_s", f(h.measurement_age_s)), ("heartbeat", h.heartbeat.to_string())],
                    log_json
                )
            );
        }
        let changed = !changes.is_empty();
        if changed || h.heartbeat.is_multiple_of(10_000 / ops::HEALTH_TICK_MS) {
            let _ = tx.send(event.to_string());
        }
    }
}
