//! Command-line interface: argument types (clap) and the `run` entry point the binary calls.

use std::io::Write;
use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use chrono::{DateTime, Utc};
use clap::{Parser, Subcommand};

use crate::clearsky::{ClearSkyModel, clear_sky};
use crate::config::{DEFAULT_LINKE_TURBIDITY, Site};
use crate::io::parse_time;
use crate::sun::{Observer, position, relative_airmass};

/// nephocast: sky-camera nowcasting of irradiance for solar plants (advisory, not a protection system).
#[derive(Debug, Parser)]
#[command(name = "nephocast", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
// Parsed once per run: the live command's many options make its variant large, and boxing it
// buys nothing.
#[allow(clippy::large_enum_variant)]
pub enum Command {
    /// Print a CSV table of solar position and clear-sky irradiance.
    Sun(SunArgs),
    /// Render a synthetic sky-camera sequence with ground truth.
    Synth(SynthArgs),
    /// Replay a recorded sequence: forecasts, motion and per-frame records.
    Replay(ReplayArgs),
    /// Score a replay of a synthetic sequence against its truth.
    Evaluate(EvaluateArgs),
    /// Replay the shipped demo data end to end and score it.
    Demo(DemoArgs),
    /// Segment sky images into clear / thin / thick cloud and print their cloud fraction.
    Segment(SegmentArgs),
    /// Time the engine on synthetic frames (per stage, one core by default).
    Bench(BenchArgs),
    /// Calibrate a camera from the sun's track in its frames.
    Calibrate(CalibrateArgs),
    /// Live mode: take frames from a folder as they arrive, serve forecasts, alarms and the dashboard.
    Live(LiveArgs),
    /// Quality control of a measurements CSV (BSRN limits, closure, stuck values, gaps).
    Qc(QcArgs),
    /// Print the Modbus register map for a site as markdown.
    Registers(RegistersArgs),
    /// Where directions land in the image and back (a researcher's check of a calibration).
    #[command(subcommand)]
    Camera(CameraCommand),
}

/// Arguments of `nephocast qc`.
#[derive(Debug, clap::Args)]
pub struct QcArgs {
    /// The site file (location for the sun).
    #[arg(long)]
    pub site: PathBuf,
    /// The measurements CSV: `ghi`, `dni`, `dhi` columns, or `ghi_<name>_wm2` per pyranometer.
    #[arg(long)]
    pub measurements: PathBuf,
    /// Write per-row flags to this CSV.
    #[arg(long)]
    pub out: Option<PathBuf>,
}

/// Arguments of `nephocast live`.
#[derive(Debug, clap::Args)]
pub struct LiveArgs {
    /// The site file.
    #[arg(long)]
    pub site: PathBuf,
    /// The folder the camera writes frames into (by rename), named with their UTC time.
    #[arg(long)]
    pub incoming: PathBuf,
    /// The database (alarm log and history).
    #[arg(long, default_value = "nephocast-live.sqlite")]
    pub db: PathBuf,
    /// Address to serve on.
    #[arg(long, default_value = crate::serve::DEFAULT_BIND)]
    pub bind: std::net::SocketAddr,
    /// File holding the token operators give to acknowledge alarms (one line; keep it mode 600).
    /// The token may instead come from the environment variable NEPHOCAST_ACK_TOKEN; it is never
    /// taken from the command line, where `ps` shows it. Without one, acknowledging is off.
    #[arg(long, value_name = "PATH")]
    pub ack_token_file: Option<PathBuf>,
    /// File holding the webhook URL (one line, `http://host[:port]/path[?query]`) that alarm-state
    /// changes are POSTed to as JSON, with retries; a file because the URL may carry a token. Logs
    /// show it without its query. Without one, no notifications.
    #[arg(long, value_name = "PATH")]
    pub webhook_url_file: Option<PathBuf>,
    /// Also allow this name (or IP literal) in the Host header; repeat for several. Loopback
    /// names are always allowed.
    #[arg(long = "allow-host", value_name = "NAME")]
    pub allow_hosts: Vec<String>,
    /// Serve on a non-loopback address even without an acknowledgement token.
    #[arg(long)]
    pub allow_non_loopback: bool,
    /// Connections open at once (lowered to fit the open-file limit).
    #[arg(long, default_value_t = 2048)]
    pub max_connections: usize,
    /// Time for a request's headers, also the idle time allowed between requests [s].
    #[arg(long, default_value_t = 10.0)]
    pub header_timeout_s: f64,
    /// Time for a request body [s].
    #[arg(long, default_value_t = 10.0)]
    pub body_timeout_s: f64,
    /// A connection on which nothing moves for this long is closed [s] (more than 15).
    #[arg(long, default_value_t = 60.0)]
    pub idle_timeout_s: f64,
    /// Serve HTTPS with this certificate chain (PEM; needs a build with `--features tls`).
    #[arg(long, value_name = "PATH", requires = "tls_key")]
    pub tls_cert: Option<PathBuf>,
    /// The private key for --tls-cert (PEM).
    #[arg(long, value_name = "PATH", requires = "tls_cert")]
    pub tls_key: Option<PathBuf>,
    /// History kept [days].
    #[arg(long, default_value_t = 30.0, allow_hyphen_values = true)]
    pub keep_days: f64,
    /// Poll interval [ms].
    #[arg(long, default_value_t = 500, allow_hyphen_values = true)]
    pub poll_ms: u64,
    /// Measurement feed: a CSV file a logger appends to, or a folder of CSV files (rotation).
    #[arg(long, value_name = "PATH")]
    pub measurements: Option<PathBuf>,
    /// The camera's frame interval [s]; a frame older than 2 intervals + 60 s is stale.
    #[arg(long, default_value_t = 30.0, allow_hyphen_values = true)]
    pub frame_interval_s: f64,
    /// No frame read for this long is `camera_down` [s].
    #[arg(long, default_value_t = 600.0, allow_hyphen_values = true)]
    pub camera_down_after_s: f64,
    /// Measurements older than this are not used; the tuning goes back to the configured
    /// transmittances [s].
    #[arg(long, default_value_t = 900.0, allow_hyphen_values = true)]
    pub measurement_max_age_s: f64,
    /// Move judged frames to <DIR>/<YYYY-MM-DD>/ (bounded disk in the incoming folder).
    #[arg(long, value_name = "DIR", conflicts_with = "delete_processed")]
    pub archive: Option<PathBuf>,
    /// With --archive: remove dated archive folders older than this many days.
    #[arg(long, value_name = "DAYS", requires = "archive")]
    pub archive_keep_days: Option<u32>,
    /// Delete judged frames.
    #[arg(long)]
    pub delete_processed: bool,
    /// Log one JSON object per line instead of key=value pairs.
    #[arg(long)]
    pub log_json: bool,
    /// Check the configuration (site, calibration, measurement feed, folders, options) and exit:
    /// 0 when it is usable, 2 when not.
    #[arg(long)]
    pub check: bool,
    /// Serve read-only Modbus TCP registers for plant controllers on this address (off unless
    /// given; e.g. 127.0.0.1:5020). Map: `nephocast registers --site SITE`.
    #[arg(long, value_name = "ADDR")]
    pub modbus_bind: Option<std::net::SocketAddr>,
    /// Serve Modbus on a non-loopback address (Modbus TCP has no authentication).
    #[arg(long)]
    pub modbus_allow_non_loopback: bool,
    /// Modbus connections open at once.
    #[arg(long, default_value_t = 16)]
    pub modbus_max_connections: usize,
    /// The Modbus data-valid register reads 1 only while the latest frame is at most this old [s].
    #[arg(long, default_value_t = 120.0, allow_hyphen_values = true)]
    pub modbus_max_frame_age_s: f64,
}

/// Arguments of `nephocast registers`.
#[derive(Debug, clap::Args)]
pub struct RegistersArgs {
    /// The site file (its blocks give the target areas).
    #[arg(long)]
    pub site: PathBuf,
}

/// Arguments of `nephocast calibrate`.
#[derive(Debug, clap::Args)]
pub struct CalibrateArgs {
    /// The site file (location for the sun's position).
    #[arg(long)]
    pub site: PathBuf,
    /// Folders of frames named with their UTC time (repeat for several days).
    #[arg(long, required = true)]
    pub frames: Vec<PathBuf>,
    /// The calibration file to write (a residual plot PNG is written beside it).
    #[arg(long)]
    pub out: PathBuf,
    /// Also write an obstruction mask (pixels that stay dark or unchanged) beside it.
    #[arg(long)]
    pub obstruction_mask: bool,
    /// Fewest sun detections to accept.
    #[arg(long, default_value_t = 20, allow_hyphen_values = true)]
    pub min_detections: usize,
    /// Lowest sun elevation for a detection [°] (nearer the horizon the glare leans toward the
    /// bright horizon sky).
    #[arg(long, default_value_t = crate::calibrate::DEFAULT_MIN_SUN_ELEVATION_DEG, allow_hyphen_values = true)]
    pub min_sun_elevation_deg: f64,
    /// Force a lens family instead of choosing by held-out error.
    #[arg(long, value_parser = ["equidistant", "equisolid", "stereographic", "polynomial"])]
    pub lens: Option<String>,
}

/// `nephocast camera …`.
#[derive(Debug, Subcommand)]
pub enum CameraCommand {
    /// Read `zenith_deg,azimuth_deg` rows on standard input, print `x_px,y_px` (empty outside the image).
    Project {
        /// The calibration file.
        #[arg(long)]
        calibration: PathBuf,
    },
    /// Read `x_px,y_px` rows on standard input, print `zenith_deg,azimuth_deg` (empty outside the lens field).
    Unproject {
        /// The calibration file.
        #[arg(long)]
        calibration: PathBuf,
    },
}

/// Arguments of `nephocast bench`.
#[derive(Debug, clap::Args)]
pub struct BenchArgs {
    /// Square image size [px].
    #[arg(long, default_value_t = 1024, allow_hyphen_values = true)]
    pub size: u32,
    /// Frames.
    #[arg(long, default_value_t = 60, allow_hyphen_values = true)]
    pub frames: usize,
    /// Threads for the engine.
    #[arg(long, default_value_t = 1, allow_hyphen_values = true)]
    pub threads: usize,
    /// About this many plant points.
    #[arg(long, default_value_t = 1000, allow_hyphen_values = true)]
    pub plant_points: usize,
    /// Forecast step [s]: 15, 30, 60 or 120.
    #[arg(long, default_value_t = 60, allow_hyphen_values = true)]
    pub step_s: u32,
    /// Forecast horizon [min].
    #[arg(long, default_value_t = 20, allow_hyphen_values = true)]
    pub horizon_min: u32,
    /// Ensemble members (0 = none).
    #[arg(long, default_value_t = 20, allow_hyphen_values = true)]
    pub members: usize,
    /// Also print the figures as one line of JSON, last.
    #[arg(long)]
    pub json: bool,
}

/// Arguments of `nephocast demo`.
#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// The demo data folder (default: demo-data/ here, else the one in the source tree).
    #[arg(long)]
    pub data: Option<PathBuf>,
    /// Output folder.
    #[arg(long, default_value = "demo-out")]
    pub out: PathBuf,
    /// Hide the progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Arguments of `nephocast segment`.
#[derive(Debug, clap::Args)]
pub struct SegmentArgs {
    /// Images (JPEG or PNG).
    #[arg(required = true)]
    pub images: Vec<PathBuf>,
    /// Output folder for the class masks (0 unknown, 1 clear, 2 thin, 3 thick).
    #[arg(long)]
    pub out: PathBuf,
    /// A site file: camera from its calibration, sun from the time.
    #[arg(long, conflicts_with = "calibration")]
    pub site: Option<PathBuf>,
    /// A calibration file (the sun is then found in the image).
    #[arg(long)]
    pub calibration: Option<PathBuf>,
    /// Capture time (UTC, RFC 3339); default: from the file name. Needs --site.
    #[arg(long, requires = "site")]
    pub time: Option<String>,
}

/// Arguments of `nephocast evaluate`.
#[derive(Debug, clap::Args)]
pub struct EvaluateArgs {
    /// The synthetic sequence (with its truth/ folder), to score against its truth.
    #[arg(long, required_unless_present = "measurements")]
    pub sequence: Option<PathBuf>,
    /// The replay's output folder.
    #[arg(long)]
    pub replay: PathBuf,
    /// A measurements CSV (`ghi_<name>_wm2` per pyranometer), to score against measurements
    /// instead of a synthetic truth (needs `--site`).
    #[arg(long, requires = "site", conflicts_with = "sequence")]
    pub measurements: Option<PathBuf>,
    /// The site file the replay ran with (pyranometer positions, blocks).
    #[arg(long)]
    pub site: Option<PathBuf>,
}

/// Arguments of `nephocast replay`.
#[derive(Debug, clap::Args)]
pub struct ReplayArgs {
    /// The site file.
    #[arg(long)]
    pub site: PathBuf,
    /// Folder of frames named with their UTC time.
    #[arg(long)]
    pub frames: PathBuf,
    /// Output folder.
    #[arg(long)]
    pub out: PathBuf,
    /// Measurements CSV (pyranometers) to tune beam transmittances from.
    #[arg(long)]
    pub measurements: Option<PathBuf>,
    /// Write an overlay picture every N frames (0: none).
    #[arg(long, default_value_t = 0, allow_hyphen_values = true)]
    pub overlays: usize,
    /// Also write report.html (plots; against the sequence's truth/ when it has one).
    #[arg(long)]
    pub report: bool,
    /// Hide the progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Arguments of `nephocast synth`.
#[derive(Debug, clap::Args)]
pub struct SynthArgs {
    /// List the scenes and their parameters, then stop.
    #[arg(long)]
    pub list: bool,
    /// Scene name (see --list).
    #[arg(long, required_unless_present = "list")]
    pub scene: Option<String>,
    /// Seed of the cloud field and sensor noise.
    #[arg(long, default_value_t = 1, allow_hyphen_values = true)]
    pub seed: u64,
    /// Output folder (the recorded-sequence layout).
    #[arg(long, required_unless_present = "list")]
    pub out: Option<PathBuf>,
    /// Square image size [px] (default: the scene's, 512).
    #[arg(long, allow_hyphen_values = true)]
    pub size: Option<u32>,
    /// Length [min] (default: the scene's).
    #[arg(long, allow_hyphen_values = true)]
    pub minutes: Option<f64>,
    /// Frame step [s] (default: the scene's).
    #[arg(long, allow_hyphen_values = true)]
    pub step_s: Option<f64>,
    /// Hide the progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Arguments of `nephocast sun`.
#[derive(Debug, clap::Args)]
pub struct SunArgs {
    /// A site file to take the location from.
    #[arg(long, conflicts_with_all = ["lat", "lon"])]
    pub site: Option<PathBuf>,
    /// Latitude [°], north positive.
    #[arg(long, allow_hyphen_values = true)]
    pub lat: Option<f64>,
    /// Longitude [°], east positive.
    #[arg(long, allow_hyphen_values = true)]
    pub lon: Option<f64>,
    /// Height above sea level [m].
    #[arg(long, default_value_t = 0.0, allow_hyphen_values = true)]
    pub elevation_m: f64,
    /// Pressure [hPa] for refraction; default: standard atmosphere at the height.
    #[arg(long, allow_hyphen_values = true)]
    pub pressure_hpa: Option<f64>,
    /// Temperature [°C] for refraction.
    #[arg(long, default_value_t = 12.0, allow_hyphen_values = true)]
    pub temperature_c: f64,
    /// First time (UTC, RFC 3339), e.g. 2026-06-14T04:00:00Z.
    #[arg(long)]
    pub start: String,
    /// Last time (UTC, RFC 3339).
    #[arg(long)]
    pub end: String,
    /// Step, e.g. 60s, 10m, 1h.
    #[arg(long, default_value = "10m", allow_hyphen_values = true)]
    pub step: String,
    /// Linke turbidity for the Ineichen–Perez clear sky (default 3.0; from the site file with --site).
    #[arg(long, allow_hyphen_values = true)]
    pub linke: Option<f64>,
}

/// Shortest duration [`parse_duration_s`] accepts \[s\].
pub const MIN_DURATION_S: f64 = 0.001;
/// Longest duration [`parse_duration_s`] accepts \[s\] (a leap year).
pub const MAX_DURATION_S: f64 = 366.0 * 86_400.0;
/// Longest synthetic sequence \[min\] (a day).
pub const MAX_SYNTH_MINUTES: f64 = 1440.0;
/// Most frames of a synthetic sequence.
pub const MAX_SYNTH_FRAMES: f64 = 20_000.0;
/// Most rows `sun` prints.
pub const MAX_SUN_ROWS: f64 = 10_000_000.0;
/// Most frames `calibrate` reads.
pub const MAX_CALIBRATE_FRAMES: usize = 5_000;
/// Most decoded frame bytes `calibrate` holds.
pub const MAX_CALIBRATE_BYTES: u64 = 2_000_000_000;
/// Shortest `sun --step` \[s\].
pub const MIN_SUN_STEP_S: f64 = 1.0;

/// A numeric argument in a closed range (NaN and infinities refused), naming the argument.
///
/// # Errors
/// A message naming the argument, the range and the value.
pub fn check_arg(name: &str, v: f64, lo: f64, hi: f64) -> Result<()> {
    if v.is_finite() && v >= lo && v <= hi {
        Ok(())
    } else {
        bail!("{name}: expected a number from {lo} to {hi}, got {v}")
    }
}

/// Check every numeric argument of a parsed command line against its range (before anything is
/// read or written).
///
/// # Errors
/// The first argument out of range, named.
pub fn check_args(cli: &Cli) -> Result<()> {
    match &cli.command {
        Command::Sun(a) => {
            if let Some(v) = a.lat {
                check_arg("--lat", v, -90.0, 90.0)?;
            }
            if let Some(v) = a.lon {
                check_arg("--lon", v, -180.0, 180.0)?;
            }
            check_arg("--elevation-m", a.elevation_m, -500.0, 9000.0)?;
            if let Some(v) = a.pressure_hpa {
                check_arg("--pressure-hpa", v, 300.0, 1100.0)?;
            }
            check_arg("--temperature-c", a.temperature_c, -80.0, 60.0)?;
            if let Some(v) = a.linke {
                check_arg("--linke", v, 1.0, 10.0)?;
            }
            let step = parse_duration_s(&a.step).context("--step")?;
            if step < MIN_SUN_STEP_S {
                bail!("--step: expected at least {MIN_SUN_STEP_S} s, got {step} s");
            }
        }
        Command::Synth(a) => {
            if let Some(v) = a.size {
                check_arg("--size", f64::from(v), 64.0, 4096.0)?;
            }
            if let Some(v) = a.minutes {
                check_arg("--minutes", v, 0.1, MAX_SYNTH_MINUTES)?;
            }
            if let Some(v) = a.step_s {
                check_arg("--step-s", v, 1.0, 3600.0)?;
            }
        }
        Command::Replay(a) => check_arg("--overlays", a.overlays as f64, 0.0, 1e6)?,
        Command::Bench(a) => {
            check_arg("--size", f64::from(a.size), 64.0, 4096.0)?;
            check_arg("--frames", a.frames as f64, 2.0, 10_000.0)?;
            check_arg("--threads", a.threads as f64, 1.0, 256.0)?;
            check_arg("--plant-points", a.plant_points as f64, 10.0, 20_000.0)?;
            if ![15, 30, 60, 120].contains(&a.step_s) {
                bail!("--step-s must be 15, 30, 60 or 120, not {}", a.step_s);
            }
            check_arg("--horizon-min", f64::from(a.horizon_min), 1.0, 60.0)?;
            check_arg("--members", a.members as f64, 0.0, 200.0)?;
        }
        Command::Calibrate(a) => {
            check_arg("--min-detections", a.min_detections as f64, crate::config::MIN_FIT_DETECTIONS as f64, 1e6)?;
            check_arg("--min-sun-elevation-deg", a.min_sun_elevation_deg, 0.0, 60.0)?;
        }
        Command::Live(a) => {
            check_arg("--keep-days", a.keep_days, 0.001, 3650.0)?;
            check_arg("--poll-ms", a.poll_ms as f64, 20.0, 60_000.0)?;
        }
        Command::Registers(_) => {}
        Command::Evaluate(_) | Command::Demo(_) | Command::Segment(_) | Command::Qc(_) | Command::Camera(_) => {}
    }
    Ok(())
}

/// Parse a duration such as `30s`, `10m`, `1h` or a bare number of seconds, from
/// [`MIN_DURATION_S`] to [`MAX_DURATION_S`].
///
/// # Errors
/// A message naming the expected form.
pub fn parse_duration_s(s: &str) -> Result<f64> {
    let s = s.trim();
    let (num, mult) = if let Some(n) = s.strip_suffix("ms") {
        (n, 0.001)
    } else if let Some(n) = s.strip_suffix('s') {
        (n, 1.0)
    } else if let Some(n) = s.strip_suffix("min") {
        (n, 60.0)
    } else if let Some(n) = s.strip_suffix('m') {
        (n, 60.0)
    } else if let Some(n) = s.strip_suffix('h') {
        (n, 3600.0)
    } else {
        (s, 1.0)
    };
    let v: f64 = num.trim().parse().with_context(|| format!("expected a duration such as 30s, 10m or 1h, got {s:?}"))?;
    let secs = v * mult;
    if !(secs.is_finite() && (MIN_DURATION_S..=MAX_DURATION_S).contains(&secs)) {
        bail!("expected a duration from {MIN_DURATION_S} s to {MAX_DURATION_S} s (366 days), got {s:?}");
    }
    Ok(secs)
}

/// Run a parsed command line.
///
/// One piece on purpose: one match arm per command, each handing its arguments to the library.
///
/// # Errors
/// Any failure, with context naming the file or argument.
pub fn run(cli: Cli) -> Result<()> {
    check_args(&cli)?;
    match cli.command {
        Command::Sun(a) => cmd_sun(a),
        Command::Synth(a) => cmd_synth(a),
        Command::Replay(a) => cmd_replay(a),
        Command::Demo(a) => cmd_demo(a),
        Command::Segment(a) => cmd_segment(a),
        Command::Calibrate(a) => cmd_calibrate(a),
        Command::Qc(a) => cmd_qc(a),
        Command::Live(a) => {
            let (ack_token, mut warnings) = crate::serve::guard::read_ack_token(a.ack_token_file.as_deref(), std::env::var(crate::serve::guard::ACK_TOKEN_ENV).ok())?;
            let secs = |name: &str, v: f64| -> Result<std::time::Duration> {
                if !(0.1..=3600.0).contains(&v) {
                    bail!("--{name}: expected 0.1 to 3600 s, got {v}");
                }
                Ok(std::time::Duration::from_secs_f64(v))
            };
            let server = crate::serve::ServerOptions {
                header_timeout: secs("header-timeout-s", a.header_timeout_s)?,
                body_timeout: secs("body-timeout-s", a.body_timeout_s)?,
                idle_timeout: secs("idle-timeout-s", a.idle_timeout_s)?,
                max_connections: a.max_connections,
                allowed_hosts: a.allow_hosts,
                allow_non_loopback: a.allow_non_loopback,
                tls: a.tls_cert.zip(a.tls_key).map(|(cert_pem, key_pem)| crate::serve::TlsFiles { cert_pem, key_pem }),
                modbus: a.modbus_bind.map(|bind| crate::serve::modbus::ModbusOptions {
                    bind,
                    allow_non_loopback: a.modbus_allow_non_loopback,
                    max_connections: a.modbus_max_connections,
                    max_frame_age_s: a.modbus_max_frame_age_s,
                    ..Default::default()
                }),
                webhook: match &a.webhook_url_file {
                    Some(p) => {
                        let text = std::fs::read_to_string(p).map_err(|e| anyhow::anyhow!("--webhook-url-file {}: {e}", p.display()))?;
                        Some(crate::serve::notify::WebhookOptions::new(text.trim()))
                    }
                    None => None,
                },
                ..Default::default()
            };
            let health = crate::serve::ops::HealthOptions {
                frame_interval_s: a.frame_interval_s,
                camera_down_after_s: a.camera_down_after_s,
                measurements: a.measurements,
                measurement_max_age_s: a.measurement_max_age_s,
                retention: match (a.archive, a.delete_processed) {
                    (Some(d), _) => crate::serve::ops::Retention::Archive(d),
                    (None, true) => crate::serve::ops::Retention::Delete,
                    (None, false) => crate::serve::ops::Retention::Keep,
                },
                archive_keep_days: a.archive_keep_days,
                log_json: a.log_json,
            };
            let opts = crate::serve::LiveOptions {
                site: a.site,
                incoming: a.incoming.clone(),
                db: a.db,
                bind: a.bind,
                ack_token,
                server,
                keep_s: (a.keep_days * 86400.0) as i64,
                poll_ms: a.poll_ms.max(20),
                overlay_every: 1,
                health,
            };
            if a.check {
                for line in crate::serve::check(&opts)? {
                    crate::say!("{line}");
                }
                crate::say!("configuration OK");
                return Ok(());
            }
            let h = crate::serve::start(opts)?;
            warnings.extend(h.warnings.iter().cloned());
            for w in &warnings {
                eprintln!("warning: {w}");
            }
            let scheme = if h.tls { "https" } else { "http" };
            crate::say!("live on {} — dashboard at {scheme}://{}/ (advisory only, not a protection system)", a.incoming.display(), h.addr);
            if let Some(m) = h.modbus_addr {
                crate::say!("Modbus TCP registers (read-only) at {m}");
            }
            h.wait();
            Ok(())
        }
        Command::Registers(a) => {
            let site = crate::config::Site::load_without_camera(&a.site)?;
            print!("{}", crate::serve::modbus::markdown(&crate::serve::modbus::targets_of(&site)));
            Ok(())
        }
        Command::Camera(c) => cmd_camera(c),
        Command::Bench(a) => {
            if !(64..=4096).contains(&a.size) || a.frames < 2 {
                bail!("--size must be 64 to 4096 and --frames at least 2");
            }
            let o = crate::bench::BenchOptions { size_px: a.size, frames: a.frames, threads: a.threads, plant_points: a.plant_points, step_s: a.step_s, horizon_min: a.horizon_min, members: a.members };
            let r = crate::bench::run_with(&o)?;
            crate::say!("{}x{} px, {} frames, {} thread(s), {} plant points x {} horizons", r.size_px, r.size_px, r.frames, r.threads, r.plant_points, r.horizons);
            crate::say!("render (synthetic, all cores): {:.1} ms per frame ({:.1} frames/s)", r.render_ms, 1000.0 / r.render_ms);
            crate::say!("JPEG decode: median {:.2} ms by the intake at 1/{} scale ({:.2} ms whole by the general decoder)", r.decode_ms, r.decode_reduction, r.decode_whole_ms);
            crate::say!("engine step (QC, map, motion, forecast): median {:.2} ms, 95th percentile {:.2} ms", r.step_ms_median, r.step_ms_p95);
            crate::say!("  stages (median): QC {:.2} ms, map+segmentation {:.2} ms, motion {:.2} ms, forecast {:.2} ms", r.stage_ms[0], r.stage_ms[1], r.stage_ms[2], r.stage_ms[3]);
            crate::say!("with the ensemble ({:.2} ms median): {:.2} ms median per frame", r.stage_ms[4], r.step_with_ensemble_ms_median);
            crate::say!("replay throughput including decode: {:.1} frames/s", r.throughput_fps);
            if a.json {
                println!("{}", serde_json::to_string(&r)?);
            }
            Ok(())
        }
        Command::Evaluate(a) => {
            // Keep a replay from swapping the folder while it is read and added to.
            let _lock = crate::output_set::lock(&a.replay)?;
            crate::output_set::check_manifest(&a.replay)?;
            if let (Some(mp), Some(sp)) = (&a.measurements, &a.site) {
                let site = crate::config::Site::load(sp)?;
                let e = crate::measured::evaluate_measured(&site, &a.replay, mp)?;
                crate::measured::print_measured(&e);
                let p = crate::output_set::update_file(&a.replay, "evaluation-measured.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
                crate::say!("wrote {}", p.display());
                return Ok(());
            }
            let Some(sequence) = &a.sequence else { bail!("--sequence or --measurements is needed") };
            let e = crate::verify::evaluate(sequence, &a.replay)?;
            crate::verify::print_evaluation(&e);
            let p = crate::output_set::update_file(&a.replay, "evaluation.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
            crate::say!("wrote {}", p.display());
            Ok(())
        }
    }
}

fn cmd_synth(a: SynthArgs) -> Result<()> {
    use crate::synth;
    if a.list {
        for s in synth::scenes() {
            crate::say!("{:<22} {}", s.name, s.description);
            crate::say!(
                "{:<22} start {}, {} min, a frame every {} s, {}x{} px, {} layer(s)",
                "", s.start_utc, s.duration_min, s.frame_step_s, s.size_px, s.size_px, s.layers.len()
            );
            for l in &s.layers {
                crate::say!(
                    "{:<22}   base {} m, wind {} m/s toward {}°, cover {}→{}, tau_max {}",
                    "", l.base_height_m, l.wind_speed_mps, l.wind_toward_deg, l.cover_start, l.cover_end, l.tau_max
                );
            }
        }
        return Ok(());
    }
    let name = a.scene.unwrap_or_default();
    let out = a.out.unwrap_or_default();
    let mut spec = synth::scene(&name).ok_or_else(|| synth::SynthError::UnknownScene(name.clone()))?;
    if let Some(s) = a.size {
        spec.size_px = s;
    }
    if let Some(m) = a.minutes {
        spec.duration_min = m;
    }
    if let Some(s) = a.step_s {
        spec.frame_step_s = s;
    }
    let frames = spec.duration_min * 60.0 / spec.frame_step_s;
    if !(frames.is_finite() && frames <= MAX_SYNTH_FRAMES) {
        bail!("--minutes/--step-s: {} min at a frame every {} s give {frames:.0} frames; at most {MAX_SYNTH_FRAMES}", spec.duration_min, spec.frame_step_s);
    }
    let scene = synth::Scene::new(spec, a.seed)?;
    let sum = synth::write_sequence(&scene, &out, !a.quiet)?;
    crate::say!(
        "wrote {} frames ({:.1} MB) to {} in {:.3} s per frame",
        sum.frames,
        sum.bytes as f64 / 1e6,
        out.display(),
        sum.render_s_per_frame
    );
    Ok(())
}

fn cmd_replay(a: ReplayArgs) -> Result<()> {
    let opts = crate::replay::ReplayOptions {
        site: a.site,
        frames: a.frames,
        out: a.out,
        measurements: a.measurements,
        overlays_every: a.overlays,
        progress: !a.quiet,
    };
    let (mut s, mut set) = crate::replay::replay_staged(&opts)?;
    // The report joins the set before it is committed.
    let report = if a.report {
        let seq = opts.frames.parent().map(|p| p.to_path_buf()).unwrap_or_default();
        let truth = crate::verify::Truth::read(&seq.join("truth").join("irradiance.csv")).ok();
        let eval = truth.as_ref().and_then(|_| crate::verify::evaluate(&seq, set.dir()).ok());
        Some(report_into(&mut set, truth.as_ref(), eval.as_ref(), "nephocast replay")?)
    } else {
        None
    };
    set.commit()?;
    s.outputs.extend(report.clone());
    print_replay_summary(&s);
    if let Some(r) = report {
        crate::say!("report: {}", r.display());
    }
    Ok(())
}

/// Write `report.html` into a replay's output set before it is committed; returns its final path.
fn report_into(set: &mut crate::output_set::OutputSet, truth: Option<&crate::verify::Truth>, eval: Option<&crate::verify::Evaluation>, title: &str) -> Result<PathBuf> {
    crate::report::write_report(set.dir(), truth, eval, title)?;
    Ok(set.adopt("report.html")?)
}

/// Print what a replay did.
pub fn print_replay_summary(s: &crate::replay::ReplaySummary) {
    let rejected: usize = s.counters.rejected.values().sum();
    crate::say!("frames: {} found, {} used, {} rejected {:?}, {} files without a time in their name",
        s.frames_found, s.counters.used, rejected, s.counters.rejected, s.untimed_files);
    crate::say!("speed: median {:.2} ms per frame (map + motion + forecast), {:.2} ms decode; {:.1} s in all",
        s.median_step_ms, s.median_decode_ms, s.wall_s);
    if !s.counters.measurements_flagged.is_empty() {
        let n: usize = s.counters.measurements_flagged.values().sum();
        crate::say!("measurements: {n} values flagged and left out {:?}", s.counters.measurements_flagged);
    }
    if let Some(v) = s.last_motion_mps {
        crate::say!("cloud motion at the end: {:.1} m/s toward {:.0}°", v[0].hypot(v[1]), v[0].atan2(v[1]).to_degrees().rem_euclid(360.0));
    }
    if let Some(c) = s.last_cbh {
        crate::say!("cloud base height at the end: {:.0} m ± {:.0} m (1σ), {} (per frame in motion.csv)", c.cbh_m, c.sigma_m, c.source.name());
    }
    for p in &s.outputs {
        crate::say!("wrote {}", p.display());
    }
}

fn cmd_demo(a: DemoArgs) -> Result<()> {
    let data = a.data.unwrap_or_else(|| {
        let here = PathBuf::from("demo-data");
        if here.join("site.toml").is_file() { here } else { PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("demo-data") }
    });
    if !data.join("site.toml").is_file() {
        bail!("{}: no demo data here (expected site.toml, frames/, measurements.csv, truth/)", data.display());
    }
    crate::say!("nephocast demo: the fictional Larkspur Flats plant, data in {}", data.display());
    crate::say!("Forecasts are advisory, not a protection system.");
    let opts = crate::replay::ReplayOptions {
        site: data.join("site.toml"),
        frames: data.join("frames"),
        out: a.out.clone(),
        measurements: Some(data.join("measurements.csv")).filter(|p| p.is_file()),
        overlays_every: 10,
        progress: !a.quiet,
    };
    // Outputs, evaluation and report are committed to `a.out` as one set at the end.
    let (s, mut set) = crate::replay::replay_staged(&opts)?;
    print_replay_summary(&s);
    let mut eval = None;
    if data.join("truth").join("irradiance.csv").is_file() {
        let e = crate::verify::evaluate(&data, set.dir())?;
        let layers = crate::verify::read_rows(&data.join("truth").join("layers.csv"))?;
        if let Some(l) = layers.first() {
            crate::say!("true cloud motion: {} m/s toward {}° at {} m", l["wind_speed_mps"], l["wind_toward_deg"], l["base_height_m"]);
        }
        crate::say!("");
        crate::say!("Plant-mean GHI against the scene's truth (skill against smart persistence):");
        crate::verify::print_evaluation(&e);
        set.write("evaluation.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
        eval = Some(e);
    }
    let truth = crate::verify::Truth::read(&data.join("truth").join("irradiance.csv")).ok();
    let r = report_into(&mut set, truth.as_ref(), eval.as_ref(), "nephocast demo — Larkspur Flats (fictional)")?;
    set.commit()?;
    crate::say!("overlays (frame with cloud classes | shadow map over the plant): {}", a.out.join("overlays").display());
    crate::say!("report: {}", r.display());
    Ok(())
}

fn cmd_segment(a: SegmentArgs) -> Result<()> {
    use crate::calibrate::geometry_free;
    use crate::segment::{ImageGeometry, Reference, segment_image};
    let site = a.site.as_ref().map(|p| crate::config::Site::load(p)).transpose()?;
    let cal_cam = match &a.calibration {
        Some(p) => {
            let c: crate::config::CalibrationFile = crate::config::read_toml(p)?;
            Some(c.validate(p)?)
        }
        None => None,
    };
    let fixed_time = a.time.as_deref().map(|t| parse_time("--time", t)).transpose().map_err(anyhow::Error::msg)?;
    let params = site.as_ref().map(|s| s.file.segment.clone()).unwrap_or_default();
    let mut geoms: Vec<(crate::camera::Camera, ImageGeometry)> = vec![];
    for path in &a.images {
        let img = crate::intake::read_frame(path, &crate::intake::IntakeOptions::default())?;
        let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let (cam, sun) = if let Some(s) = &site {
            let t = fixed_time.or_else(|| crate::io::time_from_frame_name(&name)).ok_or_else(|| {
                anyhow::anyhow!("{}: no time: give --time or name the file with its UTC time ({})", path.display(), crate::io::FRAME_NAME_PATTERN)
            })?;
            let sp = position(&t, &s.observer())?;
            let d = sp.direction_enu();
            (s.camera.clone(), Some([d[0] as f32, d[1] as f32, d[2] as f32]))
        } else if let Some(c) = &cal_cam {
            let sun = crate::calibrate::find_sun_blob(&img, 245, 5, 0.06 * c.image_circle_radius_px())
                .and_then(|(x, y, _)| c.unproject_enu(x, y))
                .map(|d| [d[0] as f32, d[1] as f32, d[2] as f32]);
            (c.clone(), sun)
        } else {
            geometry_free(&img).ok_or_else(|| anyhow::anyhow!("{}: no image circle found (is the frame black?)", path.display()))?
        };
        if (cam.width_px, cam.height_px) != img.dimensions() {
            bail!("{}: image is {}x{} px, the calibration says {}x{}", path.display(), img.width(), img.height(), cam.width_px, cam.height_px);
        }
        let geom = match geoms.iter().find(|(c, _)| *c == cam) {
            Some((_, g)) => g.clone(),
            None => {
                let g = ImageGeometry::from_camera(&cam, site.as_ref().and_then(|s| s.obstruction.as_ref()));
                geoms.push((cam.clone(), g.clone()));
                g
            }
        };
        let seg = segment_image(&img, &geom, sun, &params, &Reference::default());
        let stem = path.file_stem().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let out = a.out.join(format!("{stem}_classes.png"));
        crate::io::write_atomic(&out, &crate::io::encode_png_gray(&seg.classes))?;
        crate::say!("{},{:.4},{}", path.display(), seg.cloud_fraction, out.display());
    }
    Ok(())
}

fn cmd_qc(a: QcArgs) -> Result<()> {
    use crate::qc::*;
    let site = crate::config::Site::load(&a.site)?;
    let m = crate::io::Measurements::read_csv(&a.measurements)?;
    let col = |n: &str| m.column(n).map(|c| m.columns[c].as_slice());
    // (label, GHI, DNI, DHI)
    type Set<'a> = (String, &'a [f64], Option<&'a [f64]>, Option<&'a [f64]>);
    let mut sets: Vec<Set> = vec![];
    if let Some(g) = col("ghi") {
        sets.push(("ghi".into(), g, col("dni"), col("dhi")));
    }
    for (i, n) in m.names.iter().enumerate() {
        if n.starts_with("ghi_") && n.ends_with("_wm2") {
            sets.push((n.clone(), m.columns[i].as_slice(), None, None));
        }
    }
    if sets.is_empty() {
        bail!("{}: no irradiance columns (expected ghi[, dni, dhi] or ghi_<name>_wm2)", a.measurements.display());
    }
    let mut header = vec!["time_utc".to_string()];
    let mut all = vec![];
    for (label, g, dn, dh) in &sets {
        let f = qc_series_partial(&m.times, g, *dn, *dh, &site.observer());
        let counts: Vec<String> = flag_counts(&f).into_iter().map(|(n, c)| format!("{n} {c}")).collect();
        crate::say!("{label}: {} rows, {} flagged{}{}", f.len(), f.iter().filter(|x| **x != 0).count(), if counts.is_empty() { "" } else { ": " }, counts.join(", "));
        header.push(format!("{label}_flags"));
        all.push(f);
    }
    if let Some(out) = &a.out {
        let mut csv = crate::io::CsvTable::new(header);
        for (i, t) in m.times.iter().enumerate() {
            csv.row(std::iter::once(crate::io::fmt_time(t)).chain(all.iter().map(|f| f[i].to_string())));
        }
        crate::io::write_atomic(out, &csv.into_bytes())?;
        crate::say!("wrote {} (flags are bit sets: 1 GHI impossible, 2 GHI rare, 4/8 DNI, 16/32 DHI, 64 closure, 128 missing, 256 stuck, 512 gap)", out.display());
    }
    Ok(())
}

fn cmd_calibrate(a: CalibrateArgs) -> Result<()> {
    // The site file only: the calibration it names may not exist yet.
    let site = crate::config::Site::load_without_camera(&a.site)?;
    let frames = load_calibration_frames(&a.frames)?;
    let options = crate::calibrate::CalibrateOptions {
        min_detections: a.min_detections,
        min_sun_elevation_deg: a.min_sun_elevation_deg,
        lens: a.lens.as_deref().and_then(crate::calibrate::LensFamily::from_name),
        map_max_zenith_deg: site.map.max_zenith_deg,
        ..Default::default()
    };
    let (fit, dets) = crate::calibrate::calibrate(&frames, &site.site.observer(), &options)?;
    let name = a.out.file_stem().map(|s| s.to_string_lossy().into_owned()).unwrap_or_else(|| "camera".into());
    let mut cal = crate::calibrate::calibration_record(&name, &fit, &dets);
    // The loader's own rules, before anything is written: never write a file `replay` refuses.
    cal.validate(&a.out).map_err(|e| crate::calibrate::CalibrationError::Unusable(e.to_string()))?;
    let dir = a.out.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(std::path::Path::new("."));
    crate::io::clean_stale_temps(dir);
    if a.obstruction_mask {
        let circle = crate::calibrate::fit_image_circle(&frames[0].1).ok_or(crate::calibrate::CalibrationError::NoCircle)?;
        let day: Vec<&image::RgbImage> = frames
            .iter()
            .filter(|(t, _)| position(t, &site.site.observer()).map(|s| s.elevation_rad().to_degrees() > 10.0).unwrap_or(false))
            .map(|(_, i)| i)
            .collect();
        if !day.is_empty() {
            let mask = crate::calibrate::obstruction_mask(&day, circle);
            let mp = dir.join(format!("{name}-mask.png"));
            crate::io::write_atomic(&mp, &crate::io::encode_png_gray(&mask))?;
            cal.camera.obstruction_mask = Some(PathBuf::from(format!("{name}-mask.png")));
            crate::say!("wrote {}", mp.display());
        }
    }
    // The clear-sky library of this camera from the same frames.
    let reference = crate::calibrate::clear_sky_reference(&frames, &fit, &dets, &site.segment);
    let rp = dir.join(format!("{name}-clear-sky.csv"));
    crate::io::write_atomic(&rp, reference.to_csv().as_bytes())?;
    cal.camera.clear_reference = Some(PathBuf::from(format!("{name}-clear-sky.csv")));
    crate::say!("wrote {} (clear-sky library: {} bins of zenith × sun angle from {} frames)", rp.display(), reference.library_bins(), reference.library_frames);
    let plot = crate::calibrate::residual_plot(&frames[frames.len() / 2].1, &fit, &dets);
    let pp = dir.join(format!("{name}-residuals.png"));
    crate::io::write_atomic(&pp, &crate::io::encode_png_rgb(&plot))?;
    let dp = dir.join(format!("{name}-detections.csv"));
    crate::io::write_atomic(&dp, crate::calibrate::detections_csv(&fit, &dets).as_bytes())?;
    // The calibration file last: a run stopped before this point leaves the old one, which still
    // names its own (unchanged-name) mask and library files.
    let text = format!("# Fitted by `nephocast calibrate` from the sun's track.\n{}", toml::to_string(&cal)?);
    crate::io::write_atomic(&a.out, text.as_bytes())?;
    print_fit(&fit, dets.len());
    crate::say!("wrote {}, {} and {}", a.out.display(), pp.display(), dp.display());
    Ok(())
}

/// The frames of `calibrate`, decoded, within the count and memory caps; unreadable ones are
/// skipped with a message.
fn load_calibration_frames(dirs: &[PathBuf]) -> Result<Vec<(chrono::DateTime<chrono::Utc>, image::RgbImage)>> {
    let mut frames = vec![];
    let mut untimed = 0;
    let mut held_bytes = 0u64;
    for dir in dirs {
        let (list, u) = crate::io::list_frames(dir)?;
        untimed += u;
        for f in list {
            if frames.len() >= MAX_CALIBRATE_FRAMES {
                bail!("--frames: more than {MAX_CALIBRATE_FRAMES} frames; give fewer folders or thin them (a frame every few minutes is enough)");
            }
            match crate::intake::read_frame(&f.path, &crate::intake::IntakeOptions::default()) {
                Ok(img) => {
                    held_bytes += img.as_raw().len() as u64;
                    if held_bytes > MAX_CALIBRATE_BYTES {
                        bail!("--frames: the frames need more than {} MB decoded (at {} frames); give fewer frames", MAX_CALIBRATE_BYTES / 1_000_000, frames.len() + 1);
                    }
                    frames.push((f.time, img))
                }
                Err(e) => eprintln!("skipped {}: {e}", f.path.display()),
            }
        }
    }
    if frames.is_empty() {
        bail!("no frames with a UTC time in their name in {:?} ({untimed} files without one; expected {})", dirs, crate::io::FRAME_NAME_PATTERN);
    }
    Ok(frames)
}

/// Print a fit: residuals, lens families, parameters, field, coverage, bounds and warnings.
fn print_fit(fit: &crate::calibrate::Fit, detections: usize) {
    crate::say!("{} sun detections; model {}; residual RMS {:.2} px ({:.3}°), largest {:.2} px ({:.3}°)", detections, fit.camera.projection.name(), fit.rms_px, fit.rms_deg, fit.max_px, fit.max_deg);
    for s in &fit.scores {
        crate::say!("  lens {:<14} held-out RMS {:.3} px (in-sample {:.3} px){}", s.family.name(), s.cv_rms_px, s.fit_rms_px, if s.family == fit.family { "  <- chosen" } else { "" });
    }
    for (n, v, se) in &fit.params {
        crate::say!("  {n:<14} {v:>12.4} ± {se:.4}");
    }
    crate::say!("  field          {:>12.2}° from the axis (where the lens puts the image circle's rim)", fit.camera.max_field_angle_rad.to_degrees());
    crate::say!(
        "detections cover zenith {:.0}–{:.0}° over {:.0}° of azimuth; stated direction-error bound by zenith band:",
        fit.coverage.zenith_min_deg,
        fit.coverage.zenith_max_deg,
        fit.coverage.azimuth_span_deg
    );
    for b in &fit.bounds {
        crate::say!("  {:>4.0}–{:<4.0}° {:>8.3}°", b.zenith_from_deg, b.zenith_to_deg, b.bound_deg);
    }
    for w in &fit.warnings {
        crate::say!("warning: {w}");
    }
}

fn cmd_camera(c: CameraCommand) -> Result<()> {
    use std::io::BufRead;
    let (path, forward) = match &c {
        CameraCommand::Project { calibration } => (calibration, true),
        CameraCommand::Unproject { calibration } => (calibration, false),
    };
    let cal: crate::config::CalibrationFile = crate::config::read_toml(path)?;
    let cam = cal.validate(path)?;
    crate::say!("{}", if forward { "x_px,y_px" } else { "zenith_deg,azimuth_deg" });
    for (i, line) in std::io::stdin().lock().lines().enumerate() {
        let line = line?;
        let t = line.trim();
        if t.is_empty() || (i == 0 && t.chars().next().is_some_and(|c| c.is_alphabetic())) {
            continue;
        }
        let v: Vec<f64> = t
            .split(',')
            .map(|x| x.trim().parse::<f64>())
            .collect::<Result<_, _>>()
            .map_err(|_| anyhow::anyhow!("standard input line {}: expected two numbers separated by a comma, got {t:?}", i + 1))?;
        if v.len() != 2 {
            bail!("standard input line {}: expected two numbers, got {}", i + 1, v.len());
        }
        if forward {
            match cam.project(v[0].to_radians(), v[1].to_radians()) {
                Some((x, y)) => crate::say!("{x:.4},{y:.4}"),
                None => crate::say!(","),
            }
        } else {
            match cam.unproject(v[0], v[1]) {
                Some((z, a)) => crate::say!("{:.6},{:.6}", z.to_degrees(), a.to_degrees()),
                None => crate::say!(","),
            }
        }
    }
    Ok(())
}

fn cmd_sun(a: SunArgs) -> Result<()> {
    let (observer, model, altitude_m) = if let Some(p) = &a.site {
        let site = Site::load(p)?;
        let mut model = site.clear_sky_model();
        if let (Some(l), ClearSkyModel::IneichenPerez { .. }) = (a.linke, model) {
            model = ClearSkyModel::IneichenPerez { linke_turbidity: l };
        }
        (site.observer(), model, site.file.site.elevation_m)
    } else {
        let (Some(lat), Some(lon)) = (a.lat, a.lon) else {
            bail!("give --site FILE, or both --lat and --lon");
        };
        if !(-90.0..=90.0).contains(&lat) {
            bail!("--lat: expected a number from -90 to 90, got {lat}");
        }
        if !(-180.0..=180.0).contains(&lon) {
            bail!("--lon: expected a number from -180 to 180, got {lon}");
        }
        let mut o = Observer::new(lat, lon, a.elevation_m);
        if let Some(p) = a.pressure_hpa {
            o.pressure_hpa = p;
        }
        o.temperature_c = a.temperature_c;
        let tl = a.linke.unwrap_or(DEFAULT_LINKE_TURBIDITY);
        if !(1.0..=10.0).contains(&tl) {
            bail!("--linke: expected a number from 1 to 10, got {tl}");
        }
        (o, ClearSkyModel::IneichenPerez { linke_turbidity: tl }, a.elevation_m)
    };
    let start = parse_time("--start", &a.start).map_err(anyhow::Error::msg)?;
    let end = parse_time("--end", &a.end).map_err(anyhow::Error::msg)?;
    let step_s = parse_duration_s(&a.step).context("--step")?;
    if end < start {
        bail!("--end is before --start");
    }
    // Counted in floating point before any conversion, so no step can wrap the count.
    let rows = ((end - start).num_milliseconds() as f64 / 1000.0 / step_s).floor() + 1.0;
    if !(rows.is_finite() && rows <= MAX_SUN_ROWS) {
        bail!("--start/--end/--step give {rows:.3e} rows; at most {MAX_SUN_ROWS:.0}");
    }
    let n = rows as u64;
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    writeln!(
        out,
        "time_utc,zenith_deg,azimuth_deg,elevation_deg,true_zenith_deg,airmass_relative,dni_extra_wm2,ghi_clear_wm2,dni_clear_wm2,dhi_clear_wm2"
    )?;
    for i in 0..n {
        let t: DateTime<Utc> = start + chrono::Duration::milliseconds((i as f64 * step_s * 1000.0).round() as i64);
        let sp = position(&t, &observer)?;
        let cs = clear_sky(&sp, altitude_m, model);
        let am = relative_airmass(sp.apparent_zenith_rad).map(|m| format!("{m:.5}")).unwrap_or_default();
        writeln!(
            out,
            "{},{:.6},{:.6},{:.6},{:.6},{},{:.3},{:.3},{:.3},{:.3}",
            crate::io::fmt_time(&t),
            sp.apparent_zenith_rad.to_degrees(),
            sp.azimuth_rad.to_degrees(),
            90.0 - sp.apparent_zenith_rad.to_degrees(),
            sp.zenith_rad.to_degrees(),
            am,
            sp.dni_extra_wm2(),
            cs.ghi_wm2,
            cs.dni_wm2,
            cs.dhi_wm2
        )?;
    }
    out.flush()?;
    Ok(())
}

/// Exit status for an error: 2 for bad input (files, arguments, data), 1 for anything else.
pub fn exit_status(e: &anyhow::Error) -> u8 {
    let system = e.downcast_ref::<std::io::Error>().is_some() || e.downcast_ref::<crate::serve::ServeError>().is_some_and(crate::serve::ServeError::is_system);
    if system { 1 } else { 2 }
}
