//! `bench`: the engine timed on synthetic frames.

use anyhow::{Result, bail};

use super::args::BenchArgs;

/// `bench`: time the engine on synthetic frames and print the figures (and JSON when asked).
pub(super) fn cmd_bench(a: BenchArgs) -> Result<()> {
    if !(64..=4096).contains(&a.size) || a.frames < 2 {
        bail!("--size must be 64 to 4096 and --frames at least 2");
    }
    let o = crate::bench::BenchOptions { size_px: a.size, frames: a.frames, threads: a.threads, plant_points: a.plant_points, step_s: a.step_s, horizon_min: a.horizon_min, members: a.members, decode_reduction: a.decode_reduction, map_cells: a.map_cells, overlap_threads: a.overlap_threads };
    let r = crate::bench::run_with(&o)?;
    crate::say!("{}x{} px, {} frames, {} thread(s), {} plant points x {} horizons, {}² map cells", r.size_px, r.size_px, r.frames, r.threads, r.plant_points, r.horizons, r.map_cells);
    crate::say!("render (synthetic, all cores): {:.1} ms per frame ({:.1} frames/s)", r.render_ms, 1000.0 / r.render_ms);
    crate::say!("JPEG decode: median {:.2} ms by the intake at 1/{} scale ({:.2} ms whole by the general decoder)", r.decode_ms, r.decode_reduction, r.decode_whole_ms);
    crate::say!("engine step (QC, map, motion, forecast): median {:.2} ms, 95th percentile {:.2} ms", r.step_ms_median, r.step_ms_p95);
    crate::say!("  stages (median): QC {:.2} ms, map+segmentation {:.2} ms, motion {:.2} ms, forecast {:.2} ms", r.stage_ms[0], r.stage_ms[1], r.stage_ms[2], r.stage_ms[3]);
    crate::say!("with the ensemble ({:.2} ms median): {:.2} ms median per frame", r.stage_ms[4], r.step_with_ensemble_ms_median);
    crate::say!("CPU time on the engine's thread (median): decode {:.2} ms, whole step {:.2} ms", r.decode_cpu_ms, r.step_with_ensemble_cpu_ms);
    crate::say!("throughput including decode, one after the other: {:.1} frames/s (median frame: {:.1} frames/s)", r.throughput_fps, r.throughput_fps_median);
    if r.overlap_threads > 0 {
        crate::say!("throughput with decoding overlapping the step (as replay), engine pool of {}: {:.1} frames/s", r.overlap_threads, r.throughput_fps_overlapped);
    }
    if a.json {
        println!("{}", serde_json::to_string(&r)?);
    }
    Ok(())
}
