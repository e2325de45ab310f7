//! Replay of a recorded sequence: every frame through [`Nowcaster::step`], outputs committed as
//! one set when the run ends ([`crate::output_set`]: a staging folder swapped into place, with a
//! `manifest.json`; a lock keeps a second run out of the folder).
//!
//! Outputs (`--out DIR`):
//! * `forecasts.csv` — `issue_time_utc, target_time_utc, horizon_s, block, ghi_wm2, dni_wm2, dhi_wm2,
//!   poa_wm2, ghi_clear_wm2, fallback_share, fallback` (one row per frame, horizon and block, and the
//!   plant as block `plant`);
//! * `forecasts.parquet` — with the Cargo feature `parquet`: the same table in Apache Parquet
//!   ([`crate::parquet_out`]: times as UTC timestamps in microseconds, `horizon_s` and `fallback` as
//!   u32, `block` as UTF-8, the rest f64, empty cells null);
//! * `motion.csv` — per frame: time step, blocks tried and used, global and per-layer vectors, the
//!   filtered vector, its uncertainty, speed and direction, and the cloud base height used with its
//!   one-sigma uncertainty and source (`cbh_m, cbh_sigma_m, cbh_source`: `ceilometer`,
//!   `shadow_timing`, `configured`; see [`crate::cbh`]);
//! * `ramps.csv` / `ramps.jsonl` — ramp events of every forecast: issue time, expected start, lead
//!   time, direction, change in kW and % of AC capacity, probability (ensemble agreement);
//! * `alarms.csv` — every change of alarm state, with the probability and the reason, and the
//!   ramp behind the new state (expected start, lead from the change, change in MW and % of AC
//!   capacity, probability; empty for `calm`);
//! * `ensemble_plant.csv` — the plant-mean GHI and plant AC power of every ensemble member per
//!   horizon (for CRPS);
//! * `frames.csv` — per frame: status (`ok` or the rejection code), reason, cloud fraction, cloud base
//!   height, sun elevation, and the time of each stage. Frames are read through [`crate::intake`]
//!   (codes `special_file`, `file_too_large`, `unknown_format`, `truncated`, `corrupt`,
//!   `too_many_pixels`, `wrong_size`, `unreadable`) after the clock policy
//!   ([`Nowcaster::judge_clock`], code `ahead_of_clock`, against the system clock: a recorded frame
//!   cannot come from the future);
//! * `overlays/` (with `--overlays N`): every N-th frame with its cloud classes and the shadow map
//!   over the plant;
//! * `manifest.json` — every file of the set with its size and digest, and the finish time.
//!
//! Every CSV goes through [`crate::io::CsvTable`], so a comma, quote or line break in a reason or a
//! file name is quoted and reads back whole.

use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};

use crate::io::{CsvTable, InputError, fmt_time};
use crate::nowcast::{Counters, Nowcaster, Rejection};
use crate::output_set::{OutputSet, OutputSetError};
pub use crate::records::{FORECAST_HEADER, MOTION_HEADER, forecast_rows, motion_row};

/// What a replay needs.
#[derive(Debug, Clone)]
pub struct ReplayOptions {
    /// The site file.
    pub site: PathBuf,
    /// The frames folder.
    pub frames: PathBuf,
    /// Output folder.
    pub out: PathBuf,
    /// A measurements CSV for transmittance tuning.
    pub measurements: Option<PathBuf>,
    /// Write an overlay image every N frames (0 = none).
    pub overlays_every: usize,
    /// Show a progress bar.
    pub progress: bool,
}

/// What a replay did.
#[derive(Debug, Clone, Default)]
pub struct ReplaySummary {
    /// Frames found.
    pub frames_found: usize,
    /// Files without a time in their name.
    pub untimed_files: usize,
    /// Counters.
    pub counters: Counters,
    /// Median time per used frame for map + motion + forecast \[ms\].
    pub median_step_ms: f64,
    /// Median decode time \[ms\].
    pub median_decode_ms: f64,
    /// Wall time of the whole replay \[s\].
    pub wall_s: f64,
    /// Last filtered motion (east, north) \[m/s\].
    pub last_motion_mps: Option<[f64; 2]>,
    /// The cloud base height the last used frame assumed, with its uncertainty and source.
    pub last_cbh: Option<crate::cbh::CbhEstimate>,
    /// Height of the cloud map's plane at the last used frame \[m\], and how often it moved to
    /// follow the estimated base (`clouds.map_follows_estimate`).
    pub map_plane: Option<(f64, usize)>,
    /// Whether shadow timing rejected the configured base (or the ceilometer's series) during the
    /// run ([`crate::cbh::CbhState::prior_rejected`]).
    pub prior_base_rejected: bool,
    /// Shadow-timing fits that disagreed with the configured base but were held back from judging
    /// it, their readings not following the map's shadows better than the same readings shifted
    /// in time ([`crate::cbh::CbhState::fits_held_back`]).
    pub shadow_fits_held_back: usize,
    /// Shadow-timing fits that disagreed with the configured base while none could be checked
    /// against time-shifted readings ([`crate::cbh::CbhState::fits_unjudged_disagreeing`]).
    pub shadow_fits_unjudged: usize,
    /// The stretch of frames with readings the time-shift check needs \[s\]
    /// ([`crate::cbh::CbhState::shadow_check_window_s`]; `None` without shadow timing).
    pub shadow_check_window_s: Option<f64>,
    /// How the measurements' times were read (`[measurements] time_label`).
    pub time_label: crate::io::TimeLabel,
    /// The factor by which the frames' red/blue ratios read above the clear-sky library's colour
    /// balance at the end ([`crate::segment::Reference::ratio_scale`]), and the frames whose clear sky
    /// measured it.
    pub clear_rb_scale: (f64, usize),
    /// The frames' exposure against the library's clear-sky brightness and the frames that
    /// measured it ([`crate::segment::Reference::mean_exposure`]).
    pub exposure: Option<(f64, usize)>,
    /// Output tables written (final paths; overlays not listed).
    pub outputs: Vec<PathBuf>,
}

/// Frames whose exposure must have been measured before [`camera_setting_notes`] judges it.
pub const EXPOSURE_NOTE_MIN_FRAMES: usize = 10;
/// Exposure against the calibration day's beyond which [`exposure_note`] speaks (a factor
/// either way): a tenth, beyond the spread of a fixed camera's clear sky between days (the
/// independent scenes' frames read 0.977 and 1.007 as medians over their cloudy days, 1.002 and
/// 0.998 over their clear days, single frames 0.82–1.09; own choice otherwise).
pub const EXPOSURE_NOTE_FACTOR: f64 = 1.1;

/// What a run's frames said of the camera's settings against the calibration day's, for the
/// operator: [`colour_balance_note`] and [`exposure_note`].
pub fn camera_setting_notes(clear_rb_scale: (f64, usize), exposure: Option<(f64, usize)>) -> Vec<String> {
    colour_balance_note(clear_rb_scale, exposure).into_iter().chain(exposure_note(clear_rb_scale, exposure)).collect()
}

/// Whether the exposure differs from the calibration day's by more than [`EXPOSURE_NOTE_FACTOR`]
/// either way over at least [`EXPOSURE_NOTE_MIN_FRAMES`] frames.
fn exposure_differs(exposure: Option<(f64, usize)>) -> Option<(f64, usize)> {
    exposure.filter(|(e, n)| *n >= EXPOSURE_NOTE_MIN_FRAMES && (*e > EXPOSURE_NOTE_FACTOR || *e < 1.0 / EXPOSURE_NOTE_FACTOR))
}

/// The note on a followed colour balance (`clear_rb_scale` not 1, with the frames that measured
/// it). An exposure that differs too is named in it: the exposure is read from each pixel's
/// largest channel, which a change of white balance moves as well.
pub fn colour_balance_note(clear_rb_scale: (f64, usize), exposure: Option<(f64, usize)>) -> Option<String> {
    let (scale, frames) = clear_rb_scale;
    (scale != 1.0).then(|| {
        let brightness = exposure_differs(exposure).map(|(e, _)| format!(" (and the clear sky's brightest channel ×{e:.2}: part of the same change)")).unwrap_or_default();
        format!(
            "the frames' clear sky read red/blue ×{scale:.2}{brightness} against the clear-sky library from `calibrate` ({frames} frames measured it): the camera's white balance differs from the calibration day's. It was followed (clear_rb_scale in frames.csv), but frames without clear sky before it was measured were read as they are: set the white balance as it was on the calibration day, or calibrate from a clear day taken with today's settings"
        )
    })
}

/// The note on an exposure that differs from the calibration day's ([`exposure_differs`]), when
/// the colour balance was not followed (else [`colour_balance_note`] names it).
pub fn exposure_note(clear_rb_scale: (f64, usize), exposure: Option<(f64, usize)>) -> Option<String> {
    let (e, n) = exposure_differs(exposure).filter(|_| clear_rb_scale.0 == 1.0)?;
    Some(format!(
        "the frames' clear sky read ×{e:.2} as bright as on the calibration day ({n} frames measured it; exposure in frames.csv): the camera's exposure differs. The segmentation judges clipping at the frames' exposure (segment.exposure_past_clipping), but forecasts are less skilful under a changed exposure, most of all near the sun where bright cloud clips as the clear sky does. Fix the camera's exposure, or calibrate from a clear day taken with the same settings"
    ))
}

/// `frames.csv`'s columns.
const FRAMES_HEADER: &str = "time_utc,file,status,reason,cloud_fraction,cbh_m,sun_elevation_deg,decode_ms,qc_ms,map_ms,motion_ms,forecast_ms,ensemble_ms,band_scale_5min,band_scale_10min,band_scale_15min,sun_disk_clipped_share,beam_thin,beam_clear,beam_thick,beam_cloud_brightness,diffuse_per_cover,tuning_rows,clear_rb_scale,exposure";

/// An error that stops a replay.
#[derive(Debug, thiserror::Error)]
pub enum ReplayError {
    /// The engine could not be set up (site, calibration, series or measurements).
    #[error(transparent)]
    Setup(#[from] crate::nowcast::SetupError),
    /// The site or calibration file is bad.
    #[error(transparent)]
    Config(#[from] crate::config::ConfigError),
    /// An input file is bad.
    #[error(transparent)]
    Input(#[from] InputError),
    /// The output folder is in use or could not be written.
    #[error(transparent)]
    Output(#[from] OutputSetError),
    /// A table could not be written as Parquet (feature `parquet`).
    #[cfg(feature = "parquet")]
    #[error(transparent)]
    Parquet(#[from] crate::parquet_out::ParquetOutError),
}

/// Set up the engine for a replay ([`Nowcaster::open`]).
///
/// # Errors
/// Bad files, an empty plant, a base-height series that misses the frames.
pub fn prepare(opts: &ReplayOptions, frame_span: Option<(DateTime<Utc>, DateTime<Utc>)>) -> Result<Nowcaster, ReplayError> {
    Ok(Nowcaster::open(&opts.site, opts.measurements.as_deref(), frame_span)?)
}

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}


/// Run a replay and commit its outputs as one set into `opts.out`.
///
/// # Errors
/// Bad site, calibration, series or measurement files; an empty frames folder; an output folder
/// in use by another run; write failures.
pub fn replay(opts: &ReplayOptions) -> Result<ReplaySummary, ReplayError> {
    let (summary, set) = replay_staged(opts)?;
    set.commit()?;
    Ok(summary)
}

/// Run a replay and leave its outputs in a staging set (holding the output folder's lock) for the
/// caller to add files to (e.g. a report read from [`OutputSet::dir`]) and then commit.
/// `ReplaySummary::outputs` lists the tables written (not the overlays), by their final paths.
///
/// # Errors
/// As [`replay`].
pub fn replay_staged(opts: &ReplayOptions) -> Result<(ReplaySummary, OutputSet), ReplayError> {
    let (frames, _) = frames_of(&opts.frames, &crate::config::frame_naming_of(&opts.site)?)?;
    let bar = crate::io::progress_bar(frames.len() as u64, opts.progress, "replaying");
    let r = replay_staged_with(opts, &bar);
    bar.finish_and_clear();
    r
}

/// As [`replay_staged`], advancing a progress bar the caller owns by one per frame (a batch
/// shows one bar over all its days); `opts.progress` is not used.
///
/// # Errors
/// As [`replay`].
pub fn replay_staged_with(opts: &ReplayOptions, bar: &indicatif::ProgressBar) -> Result<(ReplaySummary, OutputSet), ReplayError> {
    let wall = std::time::Instant::now();
    let naming = crate::config::frame_naming_of(&opts.site)?;
    let (frames, untimed) = frames_of(&opts.frames, &naming)?;
    let span = Some((frames[0].time, frames[frames.len() - 1].time));
    let mut nowcaster = prepare(opts, span)?;
    let intake = nowcaster.intake_options();
    // The second camera's frames (`[second_camera] frames`), decoded whole when paired.
    let second: Vec<crate::io::FrameRef> = match nowcaster.site().second_camera.as_ref().and_then(|s| s.frames.clone()) {
        Some(dir) => frames_of(&dir, &naming)?.0,
        None => vec![],
    };
    let mut set = OutputSet::begin(&opts.out, "nephocast replay")?;
    let mut tables = ReplayTables::new();
    let (mut step_ms, mut decode_ms) = (vec![], vec![]);
    let mut last_motion = None;
    let mut last_cbh = None;
    let mut last_plane_m = None;
    let mut outputs = vec![];
    // Frames are read and decoded ahead ([`crate::intake::read_ahead_frames`]: 8 at 1024²) as jobs
    // on the engine's pool ([`crate::intake::ahead`]), so that decoding frame n + 1 overlaps the
    // engine's step on frame n and every core is busy with one or the other.
    let decode = |k: usize| {
        let td = std::time::Instant::now();
        let r = crate::intake::read_frame(&frames[k].path, &intake);
        (r, td.elapsed().as_secs_f64() * 1000.0)
    };
    let ahead = crate::intake::ahead::Ahead::new(frames.len(), crate::intake::read_ahead_frames(&intake), &decode);
    rayon::scope_fifo(|scope| -> Result<(), ReplayError> {
        let _stop = ahead.stop_on_exit();
        for (i, f) in frames.iter().enumerate() {
            let name = f.path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
            let (decoded, dms) = ahead.take(scope, i);
            // The clock policy first (from the name alone), then intake, then the engine.
            offer_second_frame(&mut nowcaster, &second, &f.time);
            let crate::nowcast::Stepped { frame, result, .. } = nowcaster.step_with(f.time, Utc::now(), || decoded);
            match result {
                Ok(nc) => {
                    decode_ms.push(dms);
                    step_ms.push(nc.times.map_ms + nc.times.motion_ms + nc.times.forecast_ms + nc.times.ensemble_ms + nc.times.qc_ms);
                    tables.add(&nc, &f.time, &name, dms);
                    last_cbh = Some(nc.cbh);
                    last_plane_m = Some(nc.cbh_m);
                    if nc.motion.is_some() {
                        last_motion = nc.motion.map(|m| m.v_mps);
                    }
                    if opts.overlays_every > 0 && i % opts.overlays_every == 0
                        && let Ok(fr) = &frame {
                            let png = crate::overlay::overlay_png(&fr.image, &nc, &nowcaster);
                            let stem = name.rsplit_once('.').map(|x| x.0).unwrap_or(&name);
                            set.write(&format!("overlays/{stem}.png"), &png)?;
                        }
                }
                Err(rej) => {
                    tables.add_rejected(&f.time, &name, &rej, dms);
                }
            }
            // The frame's buffer goes back for a later decode.
            if let Ok(fr) = frame {
                crate::intake::recycle(fr.image);
            }
            bar.inc(1);
        }
        Ok(())
    })?;
    outputs.extend(tables.write(&mut set)?);
    let summary = ReplaySummary {
        frames_found: frames.len(),
        untimed_files: untimed,
        counters: nowcaster.counters.clone(),
        median_step_ms: median(step_ms),
        median_decode_ms: median(decode_ms),
        wall_s: wall.elapsed().as_secs_f64(),
        last_motion_mps: last_motion,
        last_cbh,
        map_plane: last_plane_m.map(|h| (h, nowcaster.map_plane_moves())),
        prior_base_rejected: nowcaster.cbh_state().prior_rejected(),
        shadow_fits_held_back: nowcaster.cbh_state().fits_held_back(),
        shadow_fits_unjudged: nowcaster.cbh_state().fits_unjudged_disagreeing(),
        shadow_check_window_s: nowcaster.cbh_state().shadow_check_window_s(),
        time_label: nowcaster.site().file.measurements.time_label,
        clear_rb_scale: (f64::from(nowcaster.reference().ratio_scale()), nowcaster.reference().ratio_shift_frames),
        exposure: nowcaster.reference().mean_exposure(),
        outputs,
    };
    Ok((summary, set))
}

/// The timed frames of a folder (at least one) and the count of files without a time.
///
/// # Errors
/// An unreadable folder, or one without timed frames.
pub fn frames_of(dir: &Path, naming: &crate::io::FrameNaming) -> Result<(Vec<crate::io::FrameRef>, usize), ReplayError> {
    let (frames, untimed) = crate::io::list_frames_named(dir, naming)?;
    if frames.is_empty() {
        return Err(InputError::Other { file: dir.to_path_buf(), message: format!("no frames: expected image files named {}{}", naming.expected(), crate::io::untimed_hint(dir, naming)) }.into());
    }
    Ok((frames, untimed))
}

/// The tables a replay writes, filled frame by frame: forecasts, motion, frames, ramps (CSV and
/// JSON lines), alarm changes and the plant ensemble's members.
struct ReplayTables {
    fc: CsvTable,
    mo: CsvTable,
    ramps: CsvTable,
    ramps_jsonl: String,
    alarms: CsvTable,
    members: CsvTable,
    fr: CsvTable,
}

impl ReplayTables {
    fn new() -> ReplayTables {
        ReplayTables {
            fc: CsvTable::with_header_line(FORECAST_HEADER),
            mo: CsvTable::with_header_line(MOTION_HEADER),
            ramps: CsvTable::with_header_line("issue_time_utc,expected_start_utc,lead_time_s,direction,change_kw,change_pct,probability"),
            ramps_jsonl: String::new(),
            alarms: CsvTable::with_header_line("time_utc,from,to,probability,reason,basis_expected_start_utc,basis_lead_s,basis_change_mw,basis_change_pct,basis_probability"),
            members: CsvTable::with_header_line("issue_time_utc,horizon_s,member,plant_ghi_wm2,plant_power_kw"),
            fr: CsvTable::with_header_line(FRAMES_HEADER),
        }
    }

    /// A used frame's rows.
    fn add(&mut self, nc: &crate::nowcast::Nowcast, time: &DateTime<Utc>, name: &str, dms: f64) {
        forecast_rows(nc, &mut self.fc);
        let issue = fmt_time(&nc.time);
        for (k, ms) in nc.plant_members_ghi_wm2.iter().enumerate() {
            let horizon = nc.forecast.plant.get(k).map(|r| r.horizon_s).unwrap_or(0).to_string();
            for (m, &v) in ms.iter().enumerate() {
                let t = &mut self.members;
                t.field(&issue);
                t.field(&horizon);
                t.field(m.to_string());
                t.field_fixed(v, 1);
                match nc.plant_members_power_kw.get(k).and_then(|p| p.get(m)) {
                    Some(&p) => t.field_fixed(p, 1),
                    None => t.field(""),
                }
                t.end_row();
            }
        }
        for e in &nc.ramps {
            self.ramps.row([
                e.issue_time_utc.to_string(),
                e.expected_start_utc.to_string(),
                format!("{:.0}", e.lead_time_s),
                match e.direction { crate::ramp::Direction::Up => "up", crate::ramp::Direction::Down => "down" }.to_string(),
                format!("{:.1}", e.change_kw),
                format!("{:.2}", e.change_pct),
                format!("{:.3}", e.probability),
            ]);
            if let Ok(j) = serde_json::to_string(e) {
                self.ramps_jsonl += &j;
                self.ramps_jsonl.push('\n');
            }
        }
        if let Some(c) = &nc.alarm_change {
            // The ramp behind the new state: its lead counted from this frame.
            let b = nc.alarm_basis.as_ref();
            let opt = |v: Option<String>| v.unwrap_or_default();
            self.alarms.row([
                c.time_utc.to_string(),
                c.from.name().to_string(),
                c.to.name().to_string(),
                format!("{:.3}", c.probability),
                c.reason.clone(),
                opt(b.map(|b| fmt_time(&b.start))),
                opt(b.map(|b| format!("{:.0}", (b.start - nc.time).num_milliseconds() as f64 / 1000.0))),
                opt(b.map(|b| format!("{:.3}", b.ramp.change_kw / 1000.0))),
                opt(b.map(|b| format!("{:.1}", b.ramp.change_pct))),
                opt(b.map(|b| format!("{:.3}", b.ramp.probability))),
            ]);
        }
        motion_row(nc, &mut self.mo);
        self.fr.row([
            fmt_time(time),
            name.to_string(),
            "ok".into(),
            String::new(),
            format!("{:.4}", nc.cloud_fraction),
            format!("{:.0}", nc.cbh.cbh_m),
            format!("{:.2}", nc.sun.elevation_rad().to_degrees()),
            format!("{dms:.2}"),
            format!("{:.2}", nc.times.qc_ms),
            format!("{:.2}", nc.times.map_ms),
            format!("{:.2}", nc.times.motion_ms),
            format!("{:.2}", nc.times.forecast_ms),
            format!("{:.2}", nc.times.ensemble_ms),
            format!("{:.3}", nc.band_scale[0]),
            format!("{:.3}", nc.band_scale[1]),
            format!("{:.3}", nc.band_scale[2]),
            nc.sun_disk.map(|d| format!("{:.3}", d.clipped_share)).unwrap_or_default(),
            format!("{:.3}", nc.irradiance.beam_thin),
            format!("{:.3}", nc.irradiance.beam_clear),
            format!("{:.3}", nc.irradiance.beam_thick),
            format!("{:.3}", nc.irradiance.beam_cloud_brightness),
            format!("{:.3}", nc.irradiance.diffuse_per_cover),
            nc.tuning_rows.to_string(),
            format!("{:.3}", nc.clear_rb_scale),
            nc.exposure.map(|e| format!("{e:.3}")).unwrap_or_default(),
        ]);
    }

    /// A rejected frame's row in `frames.csv`.
    fn add_rejected(&mut self, time: &DateTime<Utc>, name: &str, rej: &Rejection, dms: f64) {
        let mut row = vec![fmt_time(time), name.to_string(), rej.code().to_string(), rej.to_string(), String::new(), String::new(), String::new(), format!("{dms:.2}")];
        row.resize(FRAMES_HEADER.split(',').count(), String::new());
        self.fr.row(row);
    }

    /// Write every table into the output set; returns their final paths.
    fn write(self, set: &mut OutputSet) -> Result<Vec<PathBuf>, ReplayError> {
        let mut outputs = vec![];
        let fc = self.fc.into_bytes();
        // The same table for pandas and polars, converted from the CSV bytes just made.
        #[cfg(feature = "parquet")]
        let parquet = crate::parquet_out::csv_to_parquet("forecasts.csv", &fc)?;
        for (file, bytes) in [
            ("forecasts.csv", fc),
            ("motion.csv", self.mo.into_bytes()),
            ("frames.csv", self.fr.into_bytes()),
            ("ramps.csv", self.ramps.into_bytes()),
            ("ramps.jsonl", self.ramps_jsonl.into_bytes()),
            ("alarms.csv", self.alarms.into_bytes()),
            ("ensemble_plant.csv", self.members.into_bytes()),
        ] {
            outputs.push(set.write(file, &bytes)?);
        }
        #[cfg(feature = "parquet")]
        outputs.push(set.write("forecasts.parquet", &parquet)?);
        Ok(outputs)
    }
}

/// The default output folder for a replay of `frames`.
pub fn default_out(frames: &Path) -> PathBuf {
    frames.parent().unwrap_or(Path::new(".")).join("replay-out")
}

/// Offer the engine the second camera's frame nearest in time to `t`, when it is within
/// [`crate::config::SECOND_FRAME_SLACK_S`] and reads (for the stereo base height).
fn offer_second_frame(nowcaster: &mut Nowcaster, second: &[crate::io::FrameRef], t: &DateTime<Utc>) {
    if let Some(s) = second.iter().min_by_key(|s| (s.time - *t).num_milliseconds().abs())
        && ((s.time - *t).num_milliseconds().abs() as f64) <= crate::config::SECOND_FRAME_SLACK_S * 1000.0
        && let Ok(img) = crate::intake::read_frame(&s.path, &crate::intake::IntakeOptions::default())
    {
        nowcaster.offer_second_frame(s.time, img);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The notes speak only past their thresholds (own choice: the thresholds are the constants'
    /// documented ones).
    #[test]
    fn camera_setting_notes_speak_past_their_thresholds() {
        assert!(camera_setting_notes((1.0, 50), Some((1.04, 200))).is_empty());
        assert!(camera_setting_notes((1.0, 0), None).is_empty());
        // Too few frames measured the exposure.
        assert!(camera_setting_notes((1.0, 0), Some((1.3, EXPOSURE_NOTE_MIN_FRAMES - 1))).is_empty());
        // A changed white balance moves the largest channel too: one note names both.
        let n = camera_setting_notes((1.16, 88), Some((0.907, 271)));
        assert_eq!(n.len(), 1, "{n:?}");
        assert!(n[0].contains("×1.16") && n[0].contains("88 frames") && n[0].contains("white balance") && n[0].contains("×0.91"), "{}", n[0]);
        let n = camera_setting_notes((1.0, 0), Some((0.79, 181)));
        assert_eq!(n.len(), 1, "{n:?}");
        assert!(n[0].contains("×0.79") && n[0].contains("181 frames") && n[0].contains("exposure"), "{}", n[0]);
        // A factor 1.1 either way.
        assert_eq!(camera_setting_notes((1.0, 0), Some((1.11, 181))).len(), 1);
        assert_eq!(camera_setting_notes((1.0, 0), Some((0.90, 181))).len(), 1);
        assert!(camera_setting_notes((1.0, 0), Some((0.92, 181))).is_empty());
    }
}
