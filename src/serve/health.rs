//! Live mode's health state, separate from the ramp alarm.
//!
//! The state ([`HealthState`]), evaluated on a timer every [`HEALTH_TICK_MS`] ms and not only
//! when a frame arrives, from the clock:
//!
//! | state | when | data valid |
//! |---|---|---|
//! | `starting` | no frame read yet, and the service is younger than the stale age | no |
//! | `camera_down` | no frame file read for `camera_down_after_s` of wall time (since start when none) | no |
//! | `night` | the newest frame read is fresh (within the stale age) and was refused only because the sun is below `qc.min_sun_elevation_deg` | no |
//! | `stale` | the frame behind the newest forecast is older than 2 frame intervals + 60 s (frames read but refused do not count) | no |
//! | `no_measurements` | a measurement feed is configured and its newest reading ended more than `measurement_max_age_s` ago (or none came) | yes |
//! | `ok` | none of the above | yes |
//!
//! The heartbeat counts the timer's evaluations: it rises while the service is alive, also when
//! no frame arrives. Data valid means a forecast made from a fresh frame; a controller falls back
//! when it is false. `night` tells a monitor that the camera is working and nothing is wrong,
//! where `stale` would page someone every evening. Forecasts and alarms are advisory, not a
//! protection system.
use std::path::PathBuf;

use chrono::{DateTime, Utc};

/// The health timer's period \[ms\].
pub const HEALTH_TICK_MS: u64 = 250;

/// What becomes of a frame file once it has been judged (used, rejected or skipped).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub enum Retention {
    /// Left in the incoming folder (the default).
    #[default]
    Keep,
    /// Moved to `<folder>/<YYYY-MM-DD of the frame's UTC time>/`.
    Archive(PathBuf),
    /// Deleted.
    Delete,
}

/// Live mode's health, feed, log and retention settings.
#[derive(Debug, Clone)]
pub struct HealthOptions {
    /// The camera's frame interval \[s\]: a frame older than 2 intervals + 60 s is stale.
    pub frame_interval_s: f64,
    /// No frame file read for this long turns the state `camera_down` \[s\].
    pub camera_down_after_s: f64,
    /// The measurement feed: a CSV file or a folder of CSV files (none: no feed).
    pub measurements: Option<PathBuf>,
    /// A feed whose newest reading ended longer ago than this is not used \[s\].
    pub measurement_max_age_s: f64,
    /// What becomes of judged frames.
    pub retention: Retention,
    /// With [`Retention::Archive`]: dated folders older than this many days are removed (checked
    /// hourly), so the archive's disk use is bounded too (none: kept).
    pub archive_keep_days: Option<u32>,
    /// The per-frame log line as JSON instead of key=value.
    pub log_json: bool,
}

impl Default for HealthOptions {
    fn default() -> Self {
        HealthOptions { frame_interval_s: 30.0, camera_down_after_s: 600.0, measurements: None, measurement_max_age_s: 900.0, retention: Retention::Keep, archive_keep_days: None, log_json: false }
    }
}

impl HealthOptions {
    /// The frame age beyond which the state is stale \[s\].
    pub fn stale_after_s(&self) -> f64 {
        2.0 * self.frame_interval_s + 60.0
    }

    /// Check the bounds.
    ///
    /// # Errors
    /// A value out of range, naming the option.
    pub fn validate(&self) -> Result<(), String> {
        let check = |name: &str, v: f64, lo: f64, hi: f64| {
            if v.is_finite() && (lo..=hi).contains(&v) { Ok(()) } else { Err(format!("--{name}: expected {lo} to {hi} s, got {v}")) }
        };
        check("frame-interval-s", self.frame_interval_s, 0.1, 3600.0)?;
        check("camera-down-after-s", self.camera_down_after_s, 1.0, 86_400.0)?;
        check("measurement-max-age-s", self.measurement_max_age_s, 10.0, 86_400.0)?;
        Ok(())
    }
}

/// The service's health, separate from the ramp alarm.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum HealthState {
    /// No frame yet, shortly after start.
    #[default]
    Starting,
    /// Frames and (when configured) measurements are fresh.
    Ok,
    /// Frames are fresh; the measurement feed is configured but old or empty.
    NoMeasurements,
    /// The newest frame is too old.
    Stale,
    /// No frame arrives.
    CameraDown,
    /// Frames arrive and read, but the sun is below the elevation limit: no forecast, nothing wrong.
    Night,
}

impl HealthState {
    /// Every state, in the order of their metric codes.
    pub const ALL: [HealthState; 6] = [HealthState::Starting, HealthState::Ok, HealthState::NoMeasurements, HealthState::Stale, HealthState::CameraDown, HealthState::Night];

    /// Its name in the API, the log and the metrics.
    pub fn name(self) -> &'static str {
        match self {
            HealthState::Starting => "starting",
            HealthState::Ok => "ok",
            HealthState::NoMeasurements => "no_measurements",
            HealthState::Stale => "stale",
            HealthState::CameraDown => "camera_down",
            HealthState::Night => "night",
        }
    }

    /// Whether the forecasts behind it come from a fresh frame.
    pub fn data_valid(self) -> bool {
        matches!(self, HealthState::Ok | HealthState::NoMeasurements)
    }
}

/// What the health is judged from.
#[derive(Debug, Clone, Copy)]
pub struct HealthInputs {
    /// Seconds since the service started.
    pub uptime_s: f64,
    /// Age of the newest frame read (its time against the clock) \[s\].
    pub frame_age_s: Option<f64>,
    /// Wall time since a frame file was last read \[s\].
    pub since_frame_read_s: Option<f64>,
    /// Age of the end of the newest measurement's period \[s\].
    pub measurement_age_s: Option<f64>,
    /// A feed is configured.
    pub feed: bool,
    /// Age of the newest frame read when the engine refused it only because the sun was too low
    /// (none when the newest frame read was used or refused for another reason) \[s\].
    pub sun_down_frame_age_s: Option<f64>,
}

/// Judge the health.
pub fn evaluate(i: &HealthInputs, o: &HealthOptions) -> HealthState {
    let quiet_s = i.since_frame_read_s.unwrap_or(i.uptime_s);
    match i.frame_age_s {
        _ if quiet_s > o.camera_down_after_s => HealthState::CameraDown,
        _ if i.sun_down_frame_age_s.is_some_and(|a| a <= o.stale_after_s()) => HealthState::Night,
        None if i.uptime_s <= o.stale_after_s() => HealthState::Starting,
        None => HealthState::Stale,
        Some(a) if a > o.stale_after_s() => HealthState::Stale,
        Some(_) if i.feed && i.measurement_age_s.is_none_or(|m| m > o.measurement_max_age_s) => HealthState::NoMeasurements,
        Some(_) => HealthState::Ok,
    }
}

/// Seconds from `t` to `now`.
pub fn age_s(t: &DateTime<Utc>, now: &DateTime<Utc>) -> f64 {
    (*now - *t).num_milliseconds() as f64 / 1000.0
}

#[cfg(test)]
mod tests {
    use super::*;

    fn inputs() -> HealthInputs {
        HealthInputs { uptime_s: 1000.0, frame_age_s: Some(10.0), since_frame_read_s: Some(5.0), measurement_age_s: Some(30.0), feed: true, sun_down_frame_age_s: None }
    }

    #[test]
    fn health_states() {
        let o = HealthOptions { frame_interval_s: 10.0, ..Default::default() };
        assert_eq!(evaluate(&inputs(), &o), HealthState::Ok);
        assert_eq!(evaluate(&HealthInputs { frame_age_s: Some(80.5), ..inputs() }, &o), HealthState::Stale);
        assert_eq!(evaluate(&HealthInputs { frame_age_s: Some(79.5), ..inputs() }, &o), HealthState::Ok);
        assert_eq!(evaluate(&HealthInputs { since_frame_read_s: Some(601.0), ..inputs() }, &o), HealthState::CameraDown);
        assert_eq!(evaluate(&HealthInputs { measurement_age_s: None, ..inputs() }, &o), HealthState::NoMeasurements);
        assert_eq!(evaluate(&HealthInputs { measurement_age_s: Some(901.0), feed: false, ..inputs() }, &o), HealthState::Ok);
        assert_eq!(evaluate(&HealthInputs { uptime_s: 5.0, frame_age_s: None, since_frame_read_s: None, ..inputs() }, &o), HealthState::Starting);
        assert!(HealthState::NoMeasurements.data_valid() && !HealthState::Stale.data_valid());
    }

    /// Night: fresh frames refused for the sun's elevation, whatever the last forecast's age; a
    /// camera that stopped is still down, and night frames that stop coming turn stale.
    #[test]
    fn night_needs_fresh_frames_refused_for_a_low_sun() {
        let o = HealthOptions { frame_interval_s: 10.0, ..Default::default() };
        let dusk = HealthInputs { frame_age_s: Some(3600.0), sun_down_frame_age_s: Some(20.0), ..inputs() };
        assert_eq!(evaluate(&dusk, &o), HealthState::Night);
        assert!(!HealthState::Night.data_valid());
        // Before any forecast (started at night).
        assert_eq!(evaluate(&HealthInputs { frame_age_s: None, ..dusk }, &o), HealthState::Night);
        assert_eq!(evaluate(&HealthInputs { sun_down_frame_age_s: Some(80.5), ..dusk }, &o), HealthState::Stale);
        assert_eq!(evaluate(&HealthInputs { since_frame_read_s: Some(601.0), ..dusk }, &o), HealthState::CameraDown);
        assert_eq!(HealthState::ALL.iter().filter(|h| h.name() == "night").count(), 1);
    }

}
