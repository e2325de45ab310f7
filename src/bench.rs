//! The command-line benchmark: synthetic frames through the whole engine, timed per stage.
//!
//! Frames are rendered and JPEG-encoded in memory first (timed separately), then decoded and
//! stepped through [`Nowcaster::step`] in a pool of the requested number of threads (one by
//! default, to measure per-core cost).

use std::time::Instant;

use crate::config::{CalibrationFile, Site};
use crate::nowcast::{Frame, Nowcaster};
use crate::synth::render::PixelRays;
use crate::io::encode_jpeg;
use crate::synth::{Scene, scene};

/// Benchmark figures.
#[derive(Debug, Clone, serde::Serialize)]
pub struct BenchReport {
    /// Image size \[px\].
    pub size_px: u32,
    /// Frames stepped.
    pub frames: usize,
    /// Threads used for the engine.
    pub threads: usize,
    /// Forecast points.
    pub plant_points: usize,
    /// Cloud-map cells along each side.
    pub map_cells: usize,
    /// Horizons per forecast.
    pub horizons: usize,
    /// Rendering time per frame \[ms\] (all cores).
    pub render_ms: f64,
    /// Reduction of the engine's decode (1 = whole frames; see [`crate::intake::map_reduction`]).
    pub decode_reduction: u32,
    /// Median JPEG decode time of the engine's intake, at its reduction \[ms\].
    pub decode_ms: f64,
    /// Median JPEG decode time of whole frames by the general decoder (`image` crate, fresh
    /// buffers) \[ms\].
    pub decode_whole_ms: f64,
    /// Median time of QC + map + motion + central forecast per frame \[ms\].
    pub step_ms_median: f64,
    /// 95th percentile of that time \[ms\].
    pub step_ms_p95: f64,
    /// Median of the whole step including the ensemble \[ms\].
    pub step_with_ensemble_ms_median: f64,
    /// Median per stage \[ms\]: QC, map, motion, central forecast, ensemble.
    pub stage_ms: [f64; 5],
    /// Median CPU time of the intake's decode on its thread \[ms\]: time on a core only, so a
    /// loaded machine's wait for a core does not count (cache effects still do).
    pub decode_cpu_ms: f64,
    /// Median CPU time of the whole step (ensemble included) on the engine's thread \[ms\]; with
    /// `threads` = 1 every stage runs on it. NaN with more threads (members run elsewhere).
    pub step_with_ensemble_cpu_ms: f64,
    /// Frames per second including decoding, decode and step one after the other on one thread
    /// (the engine's pool has `threads` threads).
    pub throughput_fps: f64,
    /// Frames per second from the median frame: 1000 over the median of each frame's wall time
    /// from the start of its decode to the end of its step, one after the other on one thread.
    /// The steady state (set-up at the first frame and the occasional heavier frame left out), the
    /// way a benchmark that times one step repeatedly measures it; `throughput_fps` is the mean over
    /// the whole run.
    pub throughput_fps_median: f64,
    /// Threads of the engine's pool in the overlapped pass (0: not run).
    pub overlap_threads: usize,
    /// Frames per second including decoding, with the frames decoded ahead as jobs on the engine's
    /// pool of `overlap_threads` threads while the engine steps the frame before (as `replay` does,
    /// [`crate::intake::ahead`]; the same pool runs the ensemble members and block matching); a
    /// second pass over the same frames with a fresh engine. NaN when not run.
    pub throughput_fps_overlapped: f64,
}

/// Why the benchmark could not run (each would be a bug: the scene is built in).
#[derive(Debug, thiserror::Error)]
pub enum BenchError {
    /// The scene, its thread pool or its site could not be set up.
    #[error("benchmark set-up: {0}")]
    Setup(String),
    /// A frame failed in intake or in the engine.
    #[error("benchmark frame {index}: {message}")]
    Frame {
        /// Frame index.
        index: usize,
        /// What failed.
        message: String,
    },
}

fn pct(mut v: Vec<f64>, p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[((v.len() - 1) as f64 * p).round() as usize]
}

/// What to benchmark.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BenchOptions {
    /// Square image size \[px\].
    pub size_px: u32,
    /// Frames stepped.
    pub frames: usize,
    /// Threads for the engine.
    pub threads: usize,
    /// About this many plant points (the layout spacing is set to give it).
    pub plant_points: usize,
    /// Forecast step \[s\] (15, 30, 60 or 120).
    pub step_s: u32,
    /// Forecast horizon \[min\].
    pub horizon_min: u32,
    /// Ensemble members (0 = none).
    pub members: usize,
    /// `map.decode_reduction` (0: automatic).
    pub decode_reduction: u32,
    /// `map.cells` (0: the scene's).
    pub map_cells: usize,
    /// Threads of the engine's pool in the overlapped pass (0: no such pass).
    pub overlap_threads: usize,
}

impl Default for BenchOptions {
    fn default() -> Self {
        Self { size_px: 1024, frames: 60, threads: 1, plant_points: 1000, step_s: 60, horizon_min: 20, members: 20, decode_reduction: 0, map_cells: 0, overlap_threads: 2 }
    }
}

/// Run the benchmark with the default options but these.
///
/// # Errors
/// When the scene cannot be built or a frame fails (which would be a bug).
pub fn run(size_px: u32, frames: usize, threads: usize) -> Result<BenchReport, BenchError> {
    run_with(&BenchOptions { size_px, frames, threads, ..BenchOptions::default() })
}

/// Run the benchmark.
///
/// # Errors
/// When the scene cannot be built or a frame fails (which would be a bug).
pub fn run_with(o: &BenchOptions) -> Result<BenchReport, BenchError> {
    let (site, times, jpegs, render_ms) = scene_frames(o)?;
    let mut dec_whole = vec![];
    // Whole-frame decoding by the general decoder, for comparison (outside the timed loops).
    for j in jpegs.iter().take(20) {
        let td = Instant::now();
        let img = crate::intake::decode_general(j, crate::intake::Format::Jpeg, &crate::intake::IntakeOptions::default()).map_err(|e| BenchError::Setup(e.to_string()))?;
        dec_whole.push(td.elapsed().as_secs_f64() * 1000.0);
        std::hint::black_box(img);
    }
    let mut r = serial_pass(&site, &times, &jpegs, o.threads.max(1))?;
    r.size_px = o.size_px;
    r.render_ms = render_ms;
    r.decode_whole_ms = pct(dec_whole, 0.5);
    if o.overlap_threads > 0 {
        r.overlap_threads = o.overlap_threads;
        r.throughput_fps_overlapped = overlapped_pass(&site, &times, &jpegs, o.overlap_threads)?;
    }
    Ok(r)
}

/// The synthetic scene's site and its frames, rendered and JPEG-encoded in memory, with the render
/// time per frame \[ms\].
type SceneFrames = (Site, Vec<chrono::DateTime<chrono::Utc>>, Vec<Vec<u8>>, f64);

fn scene_frames(o: &BenchOptions) -> Result<SceneFrames, BenchError> {
    let mut spec = scene("broken-cumulus-fast").ok_or_else(|| BenchError::Setup("scene broken-cumulus-fast missing".into()))?;
    spec.size_px = o.size_px;
    spec.duration_min = o.frames as f64 * spec.frame_step_s / 60.0;
    let mut s = Scene::new(spec, 11).map_err(|e| BenchError::Setup(e.to_string()))?;
    // The plant's layout spacing for about `plant_points` points (15.5 m gives 949 on this plant).
    s.site.plant.point_spacing_m = 15.5 * (949.0 / o.plant_points.max(1) as f64).sqrt();
    s.site.forecast.step_s = o.step_s;
    s.site.forecast.horizon_min = o.horizon_min;
    s.site.irradiance.ensemble_members = o.members;
    s.site.map.decode_reduction = o.decode_reduction;
    if o.map_cells > 0 {
        s.site.map.cells = o.map_cells;
    }
    let rays = PixelRays::new(&s.camera);
    let times = s.frame_times();
    let t0 = Instant::now();
    let jpegs: Vec<Vec<u8>> = times.iter().enumerate().map(|(i, t)| encode_jpeg(&s.render_frame(&rays, i, t).rgb, 85)).collect();
    let render_ms = t0.elapsed().as_secs_f64() * 1000.0 / times.len().max(1) as f64;
    let calibration = CalibrationFile::from_camera(&s.spec.camera.name, &s.camera);
    let site = Site {
        file: s.site.clone(),
        path: "bench/site.toml".into(),
        camera: s.camera.clone(),
        calibration,
        calibration_path: "bench/calibration.toml".into(),
        obstruction: None,
        clear_reference: None,
        cbh_csv: None,
        second_camera: None,
    };
    Ok((site, times, jpegs, render_ms))
}

/// CPU time of the calling thread \[ms\] (NaN where the platform does not tell it).
fn thread_cpu_ms() -> f64 {
    #[cfg(unix)]
    {
        let mut ts = libc::timespec { tv_sec: 0, tv_nsec: 0 };
        // SAFETY: clock_gettime writes into the struct we pass and reads nothing else.
        if unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut ts) } == 0 {
            return ts.tv_sec as f64 * 1000.0 + ts.tv_nsec as f64 / 1e6;
        }
    }
    f64::NAN
}

/// Decode and step every frame one after the other on one thread (the engine's pool has `threads`
/// threads), timing each stage.
fn serial_pass(site: &Site, times: &[chrono::DateTime<chrono::Utc>], jpegs: &[Vec<u8>], threads: usize) -> Result<BenchReport, BenchError> {
    let mut nc = Nowcaster::new(site.clone(), None, None);
    let plant_points = nc.plant().point_count();
    let map_cells = site.file.map.cells;
    let horizons = nc.horizons_s().len();
    let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().map_err(|e| BenchError::Setup(e.to_string()))?;
    let (mut dec, mut step, mut full, mut st) = (vec![], vec![], vec![], [vec![], vec![], vec![], vec![], vec![]]);
    let (mut dec_cpu, mut full_cpu, mut e2e) = (vec![], vec![], vec![]);
    let wall = Instant::now();
    pool.install(|| -> Result<(), BenchError> {
        for (index, (t, j)) in times.iter().zip(jpegs).enumerate() {
            let (td, cd) = (Instant::now(), thread_cpu_ms());
            // The engine's own intake (structure check and decode), as in replay and live mode.
            let img = crate::intake::from_bytes(j, &nc.intake_options()).map_err(|e| BenchError::Frame { index, message: e.to_string() })?;
            dec.push(td.elapsed().as_secs_f64() * 1000.0);
            let cs = thread_cpu_ms();
            dec_cpu.push(cs - cd);
            let frame = Frame { time: *t, image: img };
            let n = nc.step(&frame).map_err(|e| BenchError::Frame { index, message: e.to_string() })?;
            full_cpu.push(thread_cpu_ms() - cs);
            e2e.push(td.elapsed().as_secs_f64() * 1000.0);
            crate::intake::recycle(frame.image);
            let ts = n.times;
            step.push(ts.qc_ms + ts.map_ms + ts.motion_ms + ts.forecast_ms);
            full.push(ts.qc_ms + ts.map_ms + ts.motion_ms + ts.forecast_ms + ts.ensemble_ms);
            for (k, v) in [ts.qc_ms, ts.map_ms, ts.motion_ms, ts.forecast_ms, ts.ensemble_ms].into_iter().enumerate() {
                st[k].push(v);
            }
        }
        Ok(())
    })?;
    let wall_s = wall.elapsed().as_secs_f64();
    Ok(BenchReport {
        size_px: 0,
        frames: times.len(),
        threads,
        plant_points,
        map_cells,
        horizons,
        render_ms: f64::NAN,
        decode_reduction: nc.intake_options().reduce,
        decode_ms: pct(dec, 0.5),
        decode_whole_ms: f64::NAN,
        step_ms_median: pct(step.clone(), 0.5),
        step_ms_p95: pct(step, 0.95),
        step_with_ensemble_ms_median: pct(full, 0.5),
        stage_ms: st.map(|v| pct(v, 0.5)),
        decode_cpu_ms: pct(dec_cpu, 0.5),
        step_with_ensemble_cpu_ms: if threads == 1 { pct(full_cpu, 0.5) } else { f64::NAN },
        throughput_fps: times.len() as f64 / wall_s,
        throughput_fps_median: 1000.0 / pct(e2e, 0.5),
        overlap_threads: 0,
        throughput_fps_overlapped: f64::NAN,
    })
}

/// Frames per second of the whole engine with the frames decoded ahead (up to
/// [`crate::intake::read_ahead_frames`]) as jobs on the engine's pool of `threads` threads while the
/// engine steps the frame before, as `replay` does ([`crate::intake::ahead`]). A fresh engine over
/// the same frames.
fn overlapped_pass(site: &Site, times: &[chrono::DateTime<chrono::Utc>], jpegs: &[Vec<u8>], threads: usize) -> Result<f64, BenchError> {
    let mut nc = Nowcaster::new(site.clone(), None, None);
    let opts = nc.intake_options();
    let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().map_err(|e| BenchError::Setup(e.to_string()))?;
    let decode = |k: usize| crate::intake::from_bytes(&jpegs[k], &opts);
    let ahead = crate::intake::ahead::Ahead::new(jpegs.len(), crate::intake::read_ahead_frames(&opts), &decode);
    let wall = Instant::now();
    let nc = &mut nc;
    pool.install(|| {
        rayon::scope_fifo(|scope| -> Result<(), BenchError> {
            let _stop = ahead.stop_on_exit();
            for (index, t) in times.iter().enumerate() {
                let failed = |message: String| BenchError::Frame { index, message };
                let img = ahead.take(scope, index).map_err(|e| failed(e.to_string()))?;
                let frame = Frame { time: *t, image: img };
                nc.step(&frame).map_err(|e| failed(e.to_string()))?;
                crate::intake::recycle(frame.image);
            }
            Ok(())
        })
    })?;
    Ok(times.len() as f64 / wall.elapsed().as_secs_f64())
}
