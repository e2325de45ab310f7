//! Replay of a recorded sequence: every frame through [`Nowcaster::step`], outputs written
//! atomically when the run ends.
//!
//! Outputs (`--out DIR`):
//! * `forecasts.csv` — `issue_time_utc, target_time_utc, horizon_s, block, ghi_wm2, dni_wm2, dhi_wm2,
//!   poa_wm2, ghi_clear_wm2, fallback_share, fallback` (one row per frame, horizon and block, and the
//!   plant as block `plant`);
//! * `motion.csv` — per frame: time step, blocks tried and used, global and per-layer vectors, the
//!   filtered vector, its uncertainty, speed and direction;
//! * `ramps.csv` / `ramps.jsonl` — ramp events of every forecast: issue time, expected start, lead
//!   time, direction, change in kW and % of AC capacity, probability (ensemble agreement);
//! * `alarms.csv` — every change of alarm state, with the probability and the reason;
//! * `ensemble_plant.csv` — the plant-mean GHI of every ensemble member per horizon (for CRPS);
//! * `frames.csv` — per frame: status (`ok` or the rejection code), reason, cloud fraction, cloud base
//!   height, sun elevation, and the time of each stage;
//! * `overlays/` (with `--overlays N`): every N-th frame with its cloud classes and the shadow map
//!   over the plant.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};

use crate::config::Site;
use crate::io::{InputError, Measurements, Series, fmt_time, list_frames, write_atomic};
use crate::nowcast::{Counters, Frame, Nowcast, Nowcaster};

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
    /// Output files written.
    pub outputs: Vec<PathBuf>,
}

/// An error that stops a replay.
#[derive(Debug, thiserror::Error)]
pub enum ReplayError {
    /// The site or calibration file is bad.
    #[error(transparent)]
    Config(#[from] crate::config::ConfigError),
    /// An input file is bad.
    #[error(transparent)]
    Input(#[from] InputError),
    /// Writing an output failed.
    #[error("{path}: {source}")]
    Write {
        /// File.
        path: PathBuf,
        /// Why.
        source: std::io::Error,
    },
}

/// Load the site, its base-height series and measurements, and check they fit the frames.
///
/// # Errors
/// Bad files, an empty plant, a base-height series that misses the frames.
pub fn prepare(opts: &ReplayOptions, frame_span: Option<(DateTime<Utc>, DateTime<Utc>)>) -> Result<Nowcaster, ReplayError> {
    let site = Site::load(&opts.site)?;
    if site.file.plant.blocks.is_empty() {
        return Err(crate::config::ConfigError::Invalid {
            file: opts.site.clone(),
            field: "plant.blocks".into(),
            expected: "at least one block with a footprint".into(),
            got: "none".into(),
        }
        .into());
    }
    let series = match &site.cbh_csv {
        Some(p) => {
            let s = Series::read_cbh_csv(p)?;
            if let Some((a, b)) = frame_span {
                let (s0, s1) = (s.times[0], *s.times.last().unwrap_or(&s.times[0]));
                if s1 < a || s0 > b {
                    return Err(InputError::Other {
                        file: p.clone(),
                        message: format!(
                            "cloud base height series ({} to {}) does not cover the frames ({} to {})",
                            fmt_time(&s0),
                            fmt_time(&s1),
                            fmt_time(&a),
                            fmt_time(&b)
                        ),
                    }
                    .into());
                }
            }
            Some(s)
        }
        None => None,
    };
    let mut flagged = std::collections::BTreeMap::new();
    let meas = match &opts.measurements {
        Some(p) => {
            let mut m = Measurements::read_csv(p)?;
            let f = &site.file.site;
            let report = m.screen(p, &f.observer(), f.clear_sky(), f.elevation_m)?;
            flagged = report.counts();
            Some(m)
        }
        None => None,
    };
    let mut nc = Nowcaster::new(site, series, meas);
    nc.counters.measurements_flagged = flagged;
    Ok(nc)
}

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// Header of `forecasts.csv`.
pub const FORECAST_HEADER: &str = "issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2,dni_wm2,dhi_wm2,poa_wm2,ghi_clear_wm2,fallback_share,fallback,power_kw,ghi_p10_wm2,ghi_p50_wm2,ghi_p90_wm2,power_p10_kw,power_p50_kw,power_p90_kw\n";

/// Append a nowcast's forecast rows.
pub fn forecast_rows(nc: &Nowcast, out: &mut String) {
    let issue = fmt_time(&nc.time);
    for (k, r) in nc.forecast.rows.iter().enumerate() {
        let b = nc.bands.get(k);
        let q = |v: Option<f64>| v.map(|x| format!("{x:.2}")).unwrap_or_default();
        let _ = writeln!(
            out,
            "{issue},{},{},{},{:.2},{:.2},{:.2},{:.2},{:.2},{:.3},{},{:.2},{},{},{},{},{},{}",
            fmt_time(&r.time),
            r.horizon_s,
            r.target,
            r.irradiance.ghi_wm2,
            r.irradiance.dni_wm2,
            r.irradiance.dhi_wm2,
            r.poa_wm2,
            r.ghi_clear_wm2,
            r.fallback_share,
            (r.fallback_share > 0.0) as u8,
            r.power_kw,
            q(b.map(|b| b.ghi_wm2[0])),
            q(b.map(|b| b.ghi_wm2[1])),
            q(b.map(|b| b.ghi_wm2[2])),
            q(b.map(|b| b.power_kw[0])),
            q(b.map(|b| b.power_kw[1])),
            q(b.map(|b| b.power_kw[2]))
        );
    }
}

/// Header of `motion.csv`.
pub const MOTION_HEADER: &str = "time_utc,dt_s,blocks_tried,blocks_used,global_east_mps,global_north_mps,layers,layer1_east_mps,layer1_north_mps,layer1_blocks,layer2_east_mps,layer2_north_mps,layer2_blocks,east_mps,north_mps,sigma_mps,speed_mps,toward_deg,second_east_mps,second_north_mps,second_sigma_mps,blocks_static,locked_at_zero\n";

/// Append a nowcast's motion row.
pub fn motion_row(nc: &Nowcast, out: &mut String) {
    let f = |v: Option<f64>| v.map(|x| format!("{x:.3}")).unwrap_or_default();
    let m = nc.measurement.as_ref();
    let l = |i: usize| m.and_then(|m| m.layers.get(i));
    let _ = write!(
        out,
        "{},{},{},{},{},{},{},",
        fmt_time(&nc.time),
        f(nc.dt_s),
        m.map(|m| m.blocks_tried).unwrap_or(0),
        m.map(|m| m.vectors.len()).unwrap_or(0),
        f(m.and_then(|m| m.global_mps).map(|g| g[0])),
        f(m.and_then(|m| m.global_mps).map(|g| g[1])),
        m.map(|m| m.layers.len()).unwrap_or(0)
    );
    for i in 0..2 {
        let _ = write!(out, "{},{},{},", f(l(i).map(|x| x.v_mps[0])), f(l(i).map(|x| x.v_mps[1])), l(i).map(|x| x.blocks.to_string()).unwrap_or_default());
    }
    let mo = nc.motion;
    let second = nc.layers.get(1).map(|l| l.motion);
    let _ = writeln!(
        out,
        "{},{},{},{},{},{},{},{},{},{}",
        f(mo.map(|m| m.v_mps[0])),
        f(mo.map(|m| m.v_mps[1])),
        f(mo.map(|m| m.sigma_mps)),
        f(mo.map(|m| m.v_mps[0].hypot(m.v_mps[1]))),
        f(mo.map(|m| m.v_mps[0].atan2(m.v_mps[1]).to_degrees().rem_euclid(360.0))),
        f(second.map(|m| m.v_mps[0])),
        f(second.map(|m| m.v_mps[1])),
        f(second.map(|m| m.sigma_mps)),
        m.map(|m| m.blocks_static).unwrap_or(0),
        m.map(|m| m.locked_at_zero as u8).unwrap_or(0)
    );
}

/// Run a replay.
///
/// # Errors
/// Bad site, calibration, series or measurement files; an empty frames folder; write failures.
pub fn replay(opts: &ReplayOptions) -> Result<ReplaySummary, ReplayError> {
    let wall = std::time::Instant::now();
    let (frames, untimed) = list_frames(&opts.frames)?;
    if frames.is_empty() {
        return Err(InputError::Other {
            file: opts.frames.clone(),
            message: format!("no frames: expected image files named {}", crate::io::FRAME_NAME_PATTERN),
        }
        .into());
    }
    let span = Some((frames[0].time, frames[frames.len() - 1].time));
    let mut nowcaster = prepare(opts, span)?;
    let mut fc = String::from(FORECAST_HEADER);
    let mut mo = String::from(MOTION_HEADER);
    let mut ramps = String::from("issue_time_utc,expected_start_utc,lead_time_s,direction,change_kw,change_pct,probability\n");
    let mut ramps_jsonl = String::new();
    let mut alarms = String::from("time_utc,from,to,probability,reason\n");
    let mut members = String::from("issue_time_utc,horizon_s,member,plant_ghi_wm2\n");
    let mut fr = String::from("time_utc,file,status,reason,cloud_fraction,cbh_m,sun_elevation_deg,decode_ms,qc_ms,map_ms,motion_ms,forecast_ms,ensemble_ms,band_scale_5min,band_scale_10min,band_scale_15min\n");
    let bar = crate::synth::progress_bar(frames.len() as u64, opts.progress, "replaying");
    let (mut step_ms, mut decode_ms) = (vec![], vec![]);
    let mut last_motion = None;
    let mut outputs = vec![];
    for (i, f) in frames.iter().enumerate() {
        let name = f.path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let td = std::time::Instant::now();
        let decoded = image::open(&f.path);
        let dms = td.elapsed().as_secs_f64() * 1000.0;
        let frame = decoded.map(|img| Frame { time: f.time, image: img.to_rgb8() });
        let result = match &frame {
            Ok(fr) => nowcaster.step(fr),
            Err(e) => Err(nowcaster.reject_unreadable(&e.to_string())),
        };
        match result {
            Ok(nc) => {
                decode_ms.push(dms);
                step_ms.push(nc.times.map_ms + nc.times.motion_ms + nc.times.forecast_ms + nc.times.ensemble_ms + nc.times.qc_ms);
                forecast_rows(&nc, &mut fc);
                let plant_h: Vec<u32> = nc.forecast.rows.iter().filter(|r| r.target == "plant").map(|r| r.horizon_s).collect();
                for (k, ms) in nc.plant_members_ghi_wm2.iter().enumerate() {
                    for (m, v) in ms.iter().enumerate() {
                        let _ = writeln!(members, "{},{},{m},{v:.1}", fmt_time(&nc.time), plant_h.get(k).copied().unwrap_or(0));
                    }
                }
                for e in &nc.ramps {
                    let _ = writeln!(
                        ramps,
                        "{},{},{:.0},{},{:.1},{:.2},{:.3}",
                        e.issue_time_utc,
                        e.expected_start_utc,
                        e.lead_time_s,
                        match e.direction { crate::ramp::Direction::Up => "up", crate::ramp::Direction::Down => "down" },
                        e.change_kw,
                        e.change_pct,
                        e.probability
                    );
                    if let Ok(j) = serde_json::to_string(e) {
                        ramps_jsonl += &j;
                        ramps_jsonl.push('\n');
                    }
                }
                if let Some(c) = &nc.alarm_change {
                    let _ = writeln!(alarms, "{},{},{},{:.3},\"{}\"", c.time_utc, c.from.name(), c.to.name(), c.probability, c.reason.replace('"', "'"));
                }
                motion_row(&nc, &mut mo);
                let _ = writeln!(
                    fr,
                    "{},{name},ok,,{:.4},{:.0},{:.2},{dms:.2},{:.2},{:.2},{:.2},{:.2},{:.2},{:.3},{:.3},{:.3}",
                    fmt_time(&f.time),
                    nc.cloud_fraction,
                    nc.cbh_m,
                    nc.sun.elevation_rad().to_degrees(),
                    nc.times.qc_ms,
                    nc.times.map_ms,
                    nc.times.motion_ms,
                    nc.times.forecast_ms,
                    nc.times.ensemble_ms,
                    nc.band_scale[0],
                    nc.band_scale[1],
                    nc.band_scale[2]
                );
                if nc.motion.is_some() {
                    last_motion = nc.motion.map(|m| m.v_mps);
                }
                if opts.overlays_every > 0 && i % opts.overlays_every == 0
                    && let Ok(fr) = &frame {
                        let png = crate::overlay::overlay_png(&fr.image, &nc, &nowcaster);
                        let p = opts.out.join("overlays").join(format!("{}.png", name.rsplit_once('.').map(|x| x.0).unwrap_or(&name)));
                        write_atomic(&p, &png).map_err(|source| ReplayError::Write { path: p.clone(), source })?;
                    }
            }
            Err(rej) => {
                let reason = rej.to_string().replace(',', ";");
                let _ = writeln!(fr, "{},{name},{},{reason},,,,{dms:.2},,,,,,,,", fmt_time(&f.time), rej.code());
            }
        }
        bar.inc(1);
    }
    bar.finish_and_clear();
    for (file, text) in [
        ("forecasts.csv", &fc),
        ("motion.csv", &mo),
        ("frames.csv", &fr),
        ("ramps.csv", &ramps),
        ("ramps.jsonl", &ramps_jsonl),
        ("alarms.csv", &alarms),
        ("ensemble_plant.csv", &members),
    ] {
        let p = opts.out.join(file);
        write_atomic(&p, text.as_bytes()).map_err(|source| ReplayError::Write { path: p.clone(), source })?;
        outputs.push(p);
    }
    Ok(ReplaySummary {
        frames_found: frames.len(),
        untimed_files: untimed,
        counters: nowcaster.counters.clone(),
        median_step_ms: median(step_ms),
        median_decode_ms: median(decode_ms),
        wall_s: wall.elapsed().as_secs_f64(),
        last_motion_mps: last_motion,
        outputs,
    })
}

/// The default output folder for a replay of `frames`.
pub fn default_out(frames: &Path) -> PathBuf {
    frames.parent().unwrap_or(Path::new(".")).join("replay-out")
}
