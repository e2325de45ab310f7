//! What the engine takes and gives: a frame, the nowcast it makes, why a frame was refused, the
//! set-up's errors, per-stage times and the engine's counters.

use std::sync::Arc;

use chrono::{DateTime, Utc};

use crate::cloudmap::CloudMap;
use crate::forecast::{Forecast, IrradianceParams};
use crate::motion::{Motion, MotionMeasurement, TrackedLayer};
use crate::sun::SunPosition;

/// A decoded frame.
#[derive(Debug, Clone)]
pub struct Frame {
    /// Capture time (UTC).
    pub time: DateTime<Utc>,
    /// Pixels.
    pub image: image::RgbImage,
}

/// Why the engine could not be set up.
#[derive(Debug, thiserror::Error)]
pub enum SetupError {
    /// The site or calibration file is bad.
    #[error(transparent)]
    Config(#[from] crate::config::ConfigError),
    /// A series or measurements file is bad.
    #[error(transparent)]
    Input(#[from] crate::io::InputError),
}

/// Why a frame was not used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum Rejection {
    /// The file could not be decoded.
    #[error("unreadable: {0}")]
    Unreadable(String),
    /// The image size differs from the calibration's.
    #[error("wrong size: {got_w}x{got_h} px, calibration says {want_w}x{want_h}")]
    WrongSize {
        /// Width found.
        got_w: u32,
        /// Height found.
        got_h: u32,
        /// Width expected.
        want_w: u32,
        /// Height expected.
        want_h: u32,
    },
    /// Same time as the previous frame.
    #[error("duplicated time")]
    Duplicate,
    /// Earlier than the previous frame.
    #[error("out of order in time")]
    OutOfOrder,
    /// The sun is too low.
    #[error("sun elevation {0:.1}° below the limit")]
    SunTooLow(f64),
    /// Too dark.
    #[error("under-exposed (mean level {0:.0})")]
    UnderExposed(f64),
    /// The sky reads redder than any daylight sky ([`crate::qc::QcParams::max_sky_red_blue`]).
    #[error("not daylight: the sky reads mean red/blue {red_blue:.2}, above the limit {limit:.2} (a night sky under artificial light, not a daytime one)")]
    NotDaylight {
        /// Mean red over mean blue of the sky pixels.
        red_blue: f64,
        /// The limit `qc.max_sky_red_blue`.
        limit: f64,
    },
    /// Too bright.
    #[error("over-exposed (mean level {0:.0}, saturated share {1:.2})")]
    OverExposed(f64, f64),
    /// No cloud base height for the frame's time.
    #[error("no cloud base height for this time (the series does not cover it)")]
    NoCloudBase,
    /// Refused at intake ([`crate::intake`]): special file, too large, incomplete, corrupt.
    #[error("{0}")]
    Intake(crate::intake::IntakeError),
    /// The frame's time is ahead of the system clock by more than the tolerance.
    #[error("time {ahead_s:.0} s ahead of the system clock (tolerance {tolerance_s:.0} s)")]
    AheadOfClock {
        /// How far ahead \[s\].
        ahead_s: f64,
        /// The tolerance `qc.max_ahead_of_clock_s` \[s\].
        tolerance_s: f64,
    },
}

impl Rejection {
    /// A short code for CSV files.
    pub fn code(&self) -> &'static str {
        match self {
            Rejection::Unreadable(_) => "unreadable",
            Rejection::WrongSize { .. } => "wrong_size",
            Rejection::Duplicate => "duplicate",
            Rejection::OutOfOrder => "out_of_order",
            Rejection::SunTooLow(_) => "sun_too_low",
            Rejection::UnderExposed(_) => "under_exposed",
            Rejection::OverExposed(..) => "over_exposed",
            Rejection::NotDaylight { .. } => "not_daylight",
            Rejection::NoCloudBase => "no_cloud_base",
            Rejection::Intake(e) => e.code(),
            Rejection::AheadOfClock { .. } => "ahead_of_clock",
        }
    }
}

/// Time spent in each stage of a step \[ms\].
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct StageTimes {
    /// Quality control.
    pub qc_ms: f64,
    /// Cloud map (sampling + segmentation).
    pub map_ms: f64,
    /// Motion.
    pub motion_ms: f64,
    /// Central forecast, ramps and alarm.
    pub forecast_ms: f64,
    /// Ensemble members, bands and ramp events (their probabilities come from the members).
    pub ensemble_ms: f64,
}

/// The result of one frame.
#[derive(Debug, Clone)]
pub struct Nowcast {
    /// Frame time.
    pub time: DateTime<Utc>,
    /// Seconds since the previous used frame.
    pub dt_s: Option<f64>,
    /// Baseline of the motion measurement \[s\] (the earlier map's age).
    pub baseline_s: Option<f64>,
    /// Sun at the frame time.
    pub sun: SunPosition,
    /// Height of the cloud map's plane \[m\]: the configured value or ceilometer series, or the
    /// estimated base the plane followed (`[clouds] map_follows_estimate`).
    pub cbh_m: f64,
    /// The cloud base height the forecast used (all estimates combined), its uncertainty and source.
    pub cbh: crate::cbh::CbhEstimate,
    /// With two layers advected, the second layer's base: its prior combined with its own stereo
    /// estimate ([`crate::cbh::CbhState::upper`]); `None` with one layer.
    pub cbh_upper: Option<crate::cbh::CbhEstimate>,
    /// Cloud fraction of the map within the configured zenith.
    pub cloud_fraction: f64,
    /// The cloud map.
    pub map: Arc<CloudMap>,
    /// Motion measured against the previous map.
    pub measurement: Option<MotionMeasurement>,
    /// Filtered motion of the forecast's first (most opaque) layer.
    pub motion: Option<Motion>,
    /// Every layer the forecast advected, the most opaque first.
    pub layers: Vec<TrackedLayer>,
    /// The forecast, each row with its P10 / P50 / P90 band (none without an ensemble).
    pub forecast: Forecast,
    /// Plant-mean GHI of every ensemble member, per horizon \[W m⁻²\] (for CRPS).
    pub plant_members_ghi_wm2: Vec<Vec<f64>>,
    /// Plant AC power of every ensemble member, per horizon \[kW\] (for CRPS of power).
    pub plant_members_power_kw: Vec<Vec<f64>>,
    /// Ramp events of this forecast.
    pub ramps: Vec<crate::ramp::RampEvent>,
    /// Alarm state after this frame.
    pub alarm: crate::ramp::AlarmState,
    /// The alarm change this frame caused, if any.
    pub alarm_change: Option<crate::ramp::AlarmChange>,
    /// Why the alarm is in its state (cites the ramp behind it).
    pub alarm_reason: String,
    /// The ramp behind the alarm state, if any.
    pub alarm_basis: Option<crate::ramp::AlarmBasis>,
    /// Transmittance settings used (after tuning).
    pub irradiance: IrradianceParams,
    /// Pyranometer readings the transmittance tuning held at this frame.
    pub tuning_rows: usize,
    /// The factor by which the frames' red/blue ratios read above the clear-sky library's colour
    /// balance, as followed after this frame (1: as learnt; `segment.follow_colour_balance`).
    pub clear_rb_scale: f64,
    /// The frame's exposure against the clear-sky library's brightness, from its own clear sky
    /// (`brightness::ExposureMeter`); `None` when it could not be measured (overcast).
    pub exposure: Option<f64>,
    /// Width scale of the P10–P90 bands at 5, 10 and 15 minutes from the online calibration (1
    /// until calibrated; see [`crate::forecast::BandWidening`]).
    pub band_scale: [f64; 3],
    /// The sun's disk in this frame ([`crate::sundisk`]): `None` when it could not be read (sun
    /// outside the image or behind the obstruction mask).
    pub sun_disk: Option<crate::sundisk::SunDisk>,
    /// Stage timings.
    pub times: StageTimes,
}

/// Counters over a run.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Counters {
    /// Frames used.
    pub used: usize,
    /// Frames rejected, by reason code.
    pub rejected: std::collections::BTreeMap<String, usize>,
    /// Times the newest accepted time was dropped because the system clock fell behind it by more
    /// than the tolerance ([`Nowcaster::judge_clock`]).
    pub clock_reanchors: usize,
    /// Measurement values flagged and left out when the measurements were read, by
    /// `"<column> <reason>"` ([`crate::io::Measurements::screen`]).
    pub measurements_flagged: std::collections::BTreeMap<String, usize>,
    /// Notes on the measurements' columns when the engine was set up: a site pyranometer without
    /// its column, or a file the site finds nothing in.
    pub measurement_notes: Vec<String>,
}

/// One frame through [`super::Nowcaster::step_with`]: the frame as read (or why it was not), the
/// nowcast (or why there is none), and the clock policy's note when it re-anchored.
#[derive(Debug)]
pub struct Stepped {
    /// The frame, or the rejection before the engine (clock policy, intake).
    pub frame: Result<Frame, Rejection>,
    /// The nowcast, or the rejection (the frame's, or the engine's).
    pub result: Result<Nowcast, Rejection>,
    /// The clock policy re-anchored before this frame (a message to log).
    pub clock_note: Option<String>,
}
