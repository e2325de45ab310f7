//! The command line's argument types (clap derive) and their range checks.

use anyhow::{Context, Result, bail};
use clap::{Parser, Subcommand};
use std::path::PathBuf;

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
    /// Score a replay against a synthetic sequence's truth, or against measured pyranometers and power meters.
    Evaluate(EvaluateArgs),
    /// Replay the shipped demo data end to end and score it.
    Demo(DemoArgs),
    /// Segment sky images into clear / thin / thick cloud; print a CSV (header
    /// `image,cloud_fraction,classes_png,preview_png`) and write each class mask with a colour preview.
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
    /// Merge the output folders of sharded batch replays (`replay --batch --shard K/N`) into one
    /// aggregate, from the days' summed statistics.
    Merge(MergeArgs),
}

/// Arguments of `nephocast merge`.
#[derive(Debug, clap::Args)]
pub struct MergeArgs {
    /// The shards' output folders (each the --out of a `replay --batch` run).
    #[arg(required = true)]
    pub shards: Vec<PathBuf>,
    /// The aggregate folder to write.
    #[arg(long)]
    pub out: PathBuf,
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
    /// Exit with status 3 (after the report and the --out file) when any value is outside the
    /// physically possible limits (flags 1, 4 or 16); without it `qc` exits 0 whatever it flags.
    #[arg(long)]
    pub fail_on_impossible: bool,
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
    /// Refused when the site file polls a Modbus feed (`[measurements_modbus]`).
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
    /// The site file (location for the sun's position; the calibration its [camera] names need
    /// not exist yet: name the --out file there, which replay then reads).
    #[arg(long)]
    pub site: PathBuf,
    /// Folders of clear-sky frames whose names carry their UTC time (…YYYYMMDDTHHMMSS[.fff]Z…, or
    /// as the site's [camera] frame_time_format says); repeat for several days.
    #[arg(long, required = true)]
    pub frames: Vec<PathBuf>,
    /// The calibration file to write (a residual plot PNG is written beside it).
    #[arg(long)]
    pub out: PathBuf,
    /// Also write an obstruction mask (pixels that stay dark or unchanged) beside it.
    #[arg(long)]
    pub obstruction_mask: bool,
    /// Fewest sun detections for a fit with every parameter free; from 12 up to it the fit is held
    /// to the image circle (principal point at its centre, an ideal lens), with a warning.
    #[arg(long, default_value_t = 20, allow_hyphen_values = true)]
    pub min_detections: usize,
    /// Lowest sun elevation for a detection [°] (nearer the horizon the glare leans toward the
    /// bright horizon sky).
    #[arg(long, default_value_t = crate::calibrate::DEFAULT_MIN_SUN_ELEVATION_DEG, allow_hyphen_values = true)]
    pub min_sun_elevation_deg: f64,
    /// Force a lens family instead of choosing by held-out error.
    #[arg(long, value_parser = ["equidistant", "equisolid", "stereographic", "polynomial"])]
    pub lens: Option<String>,
    /// How the sun's clipped core is judged: `auto` by the frames' JPEG chroma table (every
    /// channel at least 250 while its DC step is within that 5-level margin, else the luma at
    /// least 253), or forced.
    #[arg(long, default_value = "auto", value_parser = ["auto", "channels", "luma"])]
    pub clip_test: String,
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
    /// `map.decode_reduction`: 0 automatic, 1 whole frames, 2, 4 or 8.
    #[arg(long, default_value_t = 0, allow_hyphen_values = true)]
    pub decode_reduction: u32,
    /// `map.cells`: cloud-map cells along each side (0: the scene's, 256). Fewer cells make the
    /// map, motion and tables cheaper and change the forecasts (docs/speed.md).
    #[arg(long, default_value_t = 0, allow_hyphen_values = true)]
    pub map_cells: usize,
    /// Threads of the engine's pool in a second pass with the frames decoded ahead as jobs on
    /// that pool, overlapping the step (0: no such pass).
    #[arg(long, default_value_t = 2, allow_hyphen_values = true)]
    pub overlap_threads: usize,
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
    /// Output folder for the class masks `<stem>_classes.png` (grey values 0 unknown, 1 clear, 2
    /// thin, 3 thick) and their colour previews `<stem>_preview.png` (black unknown, blue clear,
    /// light grey thin, dark grey thick).
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
    /// With --measurements: also (re)write the replay's report.html with the measured line and
    /// the score tables.
    #[arg(long, requires = "measurements")]
    pub report: bool,
}

/// Arguments of `nephocast replay`.
#[derive(Debug, clap::Args)]
pub struct ReplayArgs {
    /// The site file: site, camera calibration, cloud base height, plant blocks, pyranometers
    /// (a commented example: examples/site.toml).
    #[arg(long)]
    pub site: PathBuf,
    /// Folder of frames whose names carry their UTC time (…YYYYMMDDTHHMMSS[.fff]Z…, or as the
    /// site's [camera] frame_time_format says).
    #[arg(long)]
    pub frames: PathBuf,
    /// Output folder (replaced as a whole; with --batch, each day's folder and the aggregate).
    #[arg(long)]
    pub out: PathBuf,
    /// Measurements CSV: time_utc and a ghi_<name>_wm2 column per [[pyranometers]] entry of the
    /// site (means over each row's period, labelled as [measurements] time_label says, default
    /// its start); they tune the transmittances, calibrate the bands and, with at least three
    /// sensors, check the cloud base. Optional columns: temp_air_c and wind_speed_mps (the
    /// modules' temperature in the power model), power_plant_kw and power_<block>_kw (meters).
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
    /// Batch: --frames is a folder whose subfolders are days (or a text file listing day folders);
    /// writes OUT/days/<day>/ per day and OUT/aggregate/, and skips days already complete.
    #[arg(long, conflicts_with = "report")]
    pub batch: bool,
    /// With --batch: only the days whose index i (0-based, days sorted by name) has i mod N = K;
    /// K is 0-based (0 … N−1).
    #[arg(long, value_name = "K/N", requires = "batch")]
    pub shard: Option<String>,
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
    /// First time (UTC, RFC 3339), e.g. 2026-06-14T04:00:00Z; a date alone (2026-06-14) means
    /// 00:00 UTC that day.
    #[arg(long)]
    pub start: String,
    /// Last time (UTC, RFC 3339), included; a date alone (2026-06-14) means the end of that day
    /// (24:00 UTC, i.e. 00:00 of the next day).
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
            if ![0, 1, 2, 4, 8].contains(&a.decode_reduction) {
                bail!("--decode-reduction must be 0 (automatic), 1, 2, 4 or 8, not {}", a.decode_reduction);
            }
            check_arg("--overlap-threads", a.overlap_threads as f64, 0.0, 256.0)?;
            if a.map_cells != 0 {
                check_arg("--map-cells", a.map_cells as f64, 32.0, 2048.0)?;
            }
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
        Command::Evaluate(_) | Command::Demo(_) | Command::Segment(_) | Command::Qc(_) | Command::Camera(_) | Command::Merge(_) => {}
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
