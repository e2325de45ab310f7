//! Cloud base height from two cameras ([`nephocast::stereo`]) on synthetic scenes with known truth.
//!
//! Frames of single-layer scenes are rendered from the scene's camera (at its site position, 3 m
//! up, with its mast) and from a second camera 800 m east and 300 m north of it (same lens, turned
//! by 70° in yaw, without the mast) at the same instants, at 384² to stay fast. Both cameras the
//! estimator and the engine are given come from `calibrate` on a clear day rendered for each
//! camera at its place (`common/calibrated.rs`: the fitted camera, the obstruction mask and the
//! clear-sky library of that day), never from the truth; the renderer alone uses the true cameras.
//! The true sun direction is given (the engine computes it from the clock and the site).
//!
//! Targets (issue: CBH without a ceilometer): over all frames, the median relative CBH error ≤ 10 %
//! and the stated one-sigma interval covering the truth in ≥ 80 % of the frames with an estimate;
//! the figures are printed.
#[path = "common/calibrated.rs"]
mod calibrated;

use std::sync::OnceLock;

use calibrated::Calibrated;
use nephocast::segment::SegmentParams;
use nephocast::stereo::{StereoParams, StereoView, estimate};
use nephocast::synth::render::PixelRays;
use nephocast::synth::{CameraSpec, Scene, scene};

/// Second camera's position relative to the first (east, north, up) \[m\].
const OFFSET_M: [f64; 3] = [800.0, 300.0, 0.0];
/// Image size \[px\].
const SIZE_PX: u32 = 384;
/// Frames per scene, spread over the scene.
const FRAMES: usize = 6;
/// Step of the calibration days' frames \[s\] (15 min over the `clear-day` scene's 7 hours).
const CALIBRATION_STEP_S: f64 = 900.0;

/// The first camera of the single-layer scenes (all share it) and the second camera's spec.
fn camera_specs() -> (CameraSpec, CameraSpec) {
    let a = scene("broken-cumulus-fast").unwrap().camera;
    let b = CameraSpec { name: "second".into(), yaw_deg: a.yaw_deg + 70.0, ..a.clone() };
    (a, b)
}

/// Both cameras from `calibrate` on their clear days, once per test run.
fn cameras() -> &'static (Calibrated, Calibrated) {
    static CELL: OnceLock<(Calibrated, Calibrated)> = OnceLock::new();
    CELL.get_or_init(|| {
        let (a, b) = camera_specs();
        let pos_a = Scene::new(scene("clear-day").unwrap(), 1).unwrap().cam_pos_m;
        let pos_b = [pos_a[0] + OFFSET_M[0], pos_a[1] + OFFSET_M[1], pos_a[2] + OFFSET_M[2]];
        (calibrated::clear_day(&a, SIZE_PX, None, CALIBRATION_STEP_S), calibrated::clear_day(&b, SIZE_PX, Some(pos_b), CALIBRATION_STEP_S))
    })
}

struct Frame {
    scene: String,
    truth_m: f64,
    result: Result<(f64, f64, f64), String>,
    /// Time the estimator took \[ms\].
    ms: f64,
}

fn run_scene(name: &str, seed: u64, frames: usize) -> Vec<Frame> {
    let (cal_a, cal_b) = cameras();
    let mut spec = scene(name).unwrap();
    spec.size_px = SIZE_PX;
    let (_, cam_spec_b) = camera_specs();
    assert_eq!(spec.camera, camera_specs().0, "{name}: the scene's camera is the calibrated one");
    let sc = Scene::new(spec, seed).unwrap();
    // The lowest layer's base (the one the estimate should find, if any).
    let base_m = sc.world.layers.iter().map(|l| l.spec.base_height_m).fold(f64::NAN, f64::min);
    // Heights are above camera A.
    let truth_m = base_m - sc.cam_pos_m[2];
    // The true cameras render; the fitted ones estimate.
    let true_b = cam_spec_b.camera(SIZE_PX);
    let pos_b = [sc.cam_pos_m[0] + OFFSET_M[0], sc.cam_pos_m[1] + OFFSET_M[1], sc.cam_pos_m[2] + OFFSET_M[2]];
    let (rays_a, rays_b) = (PixelRays::new(&sc.camera), PixelRays::new(&true_b));
    let seg = SegmentParams::default();
    let params = StereoParams::default();
    let times = sc.frame_times();
    let step = times.len() / frames;
    (0..frames)
        .map(|f| {
            let i = f * step;
            let t = times[i];
            let jpeg = |rgb: &image::RgbImage| image::load_from_memory(&nephocast::synth::encode_jpeg(rgb, sc.spec.jpeg_quality)).unwrap().to_rgb8();
            let img_a = jpeg(&sc.render_frame(&rays_a, i, &t).rgb);
            let img_b = jpeg(&sc.render_frame_from(&true_b, pos_b, &rays_b, i, &t).rgb);
            let sun = sc.world.instant(&t).sun.direction_enu();
            let sun = Some([sun[0] as f32, sun[1] as f32, sun[2] as f32]);
            let a = StereoView { camera: &cal_a.fit.camera, obstruction: Some(&cal_a.mask), position_m: sc.cam_pos_m, reference: &cal_a.reference, image: &img_a };
            let b = StereoView { camera: &cal_b.fit.camera, obstruction: Some(&cal_b.mask), position_m: pos_b, reference: &cal_b.reference, image: &img_b };
            let t0 = std::time::Instant::now();
            let result = estimate(&a, &b, sun, &seg, &params).map(|fit| (fit.cbh_m, fit.rel_sigma, fit.peak_ncc)).map_err(|e| e.to_string());
            Frame { scene: name.to_string(), truth_m, result, ms: t0.elapsed().as_secs_f64() * 1e3 }
        })
        .collect()
}

#[test]
fn stereo_cbh_on_synthetic_scenes() {
    for f in run_scene("clear-day", 3, 2) {
        eprintln!("  clear-day: {:?}", f.result);
        assert!(f.result.is_err(), "a clear sky gave a stereo estimate: {:?}", f.result);
    }
    // Two layers (cumulus at 1000 m under thin altocumulus at 3800 m): one layer's base or no
    // estimate; reported, not in the figures. Known shortfall: the estimate may be the upper
    // layer's base (it was for one of four frames at its introduction, three were refused as
    // ambiguous), which the engine would take for the lower layer's.
    for f in run_scene("two-layers", 3, 4) {
        eprintln!("  two-layers (bases {:.0} and 3797 m): {:?}", f.truth_m, f.result);
        if let Ok((h, _, _)) = f.result {
            let near = |b: f64| (h / b - 1.0).abs() <= 0.10;
            assert!(near(f.truth_m) || near(3797.0), "two-layers: {h:.0} m is neither layer's base");
        }
    }
    let mut frames = run_scene("broken-cumulus-fast", 3, FRAMES);
    frames.extend(run_scene("scattered-slow", 3, FRAMES));
    frames.extend(run_scene("overcast-breaking", 3, FRAMES));
    let (mut errors, mut covered, mut refused) = (vec![], 0usize, 0usize);
    for f in &frames {
        match &f.result {
            Ok((h, rel, ncc)) => {
                let err = h / f.truth_m - 1.0;
                let inside = (h / f.truth_m).ln().abs() <= *rel;
                eprintln!("  {}: truth {:.0} m, estimate {h:.0} m ± {:.1} % (NCC {ncc:.2}), error {:+.1} %{}", f.scene, f.truth_m, 100.0 * rel, 100.0 * err, if inside { "" } else { "  (outside 1σ)" });
                errors.push(err.abs());
                covered += usize::from(inside);
            }
            Err(e) => {
                eprintln!("  {}: truth {:.0} m, no estimate: {e}", f.scene, f.truth_m);
                refused += 1;
            }
        }
    }
    let mut ms: Vec<f64> = frames.iter().map(|f| f.ms).collect();
    ms.sort_by(f64::total_cmp);
    eprintln!("  estimator time per frame pair: median {:.0} ms", ms[ms.len() / 2]);
    let given = errors.len();
    assert!(given * 4 >= frames.len() * 3, "estimates for only {given} of {} frames", frames.len());
    errors.sort_by(f64::total_cmp);
    let median = errors[given / 2];
    let coverage = covered as f64 / given as f64;
    eprintln!(
        "stereo CBH: {given} of {} frames estimated ({refused} refused), median |error| {:.1} %, max {:.1} %, 1σ coverage {:.0} %",
        frames.len(),
        100.0 * median,
        100.0 * errors[given - 1],
        100.0 * coverage
    );
    assert!(median <= 0.10, "median CBH error {:.1} % > 10 %", 100.0 * median);
    assert!(coverage >= 0.8, "one-sigma coverage {:.0} % < 80 %", 100.0 * coverage);
}

/// A scene written by `synth` at 384² for `minutes`, with the second camera's frames in `frames2`,
/// and both cameras' calibrations from `calibrate` in `calibration/` (the written true calibration
/// of the first camera replaced by the fitted one); the site file names the first.
fn write_pair(name: &str, minutes: f64) -> (tempfile::TempDir, [f64; 3]) {
    let (cal_a, cal_b) = cameras();
    let d = tempfile::tempdir().unwrap();
    let mut spec = scene(name).unwrap();
    spec.size_px = SIZE_PX;
    spec.duration_min = minutes;
    let cam_name = spec.camera.name.clone();
    let sc = Scene::new(spec, 3).unwrap();
    nephocast::synth::write_sequence(&sc, d.path(), false).unwrap();
    let true_b = camera_specs().1.camera(SIZE_PX);
    let pos_b = [sc.cam_pos_m[0] + OFFSET_M[0], sc.cam_pos_m[1] + OFFSET_M[1], sc.cam_pos_m[2] + OFFSET_M[2]];
    let rays_b = PixelRays::new(&true_b);
    std::fs::create_dir_all(d.path().join("frames2")).unwrap();
    for (i, t) in sc.frame_times().iter().enumerate() {
        let rgb = sc.render_frame_from(&true_b, pos_b, &rays_b, i, t).rgb;
        std::fs::write(d.path().join("frames2").join(nephocast::io::frame_name(t, "jpg")), nephocast::synth::encode_jpeg(&rgb, sc.spec.jpeg_quality)).unwrap();
    }
    cal_a.write(&d.path().join("calibration"), &cam_name);
    cal_b.write(&d.path().join("calibration"), "second");
    (d, pos_b)
}

/// Per frame of a replay: `cbh_m`, `cbh_sigma_m`, `cbh_source` from `motion.csv`.
type CbhRows = Vec<(f64, f64, String)>;

/// Replay the pair in `dir` with the configured base set to `base_m`, with the second camera when
/// `pos_b` is given (its map cells taken when `map_cells`), and the pyranometers' measurements;
/// the evaluation against the truth and the base-height rows.
fn replay_pair(dir: &std::path::Path, tag: &str, truth_m: f64, base_m: f64, pos_b: Option<[f64; 3]>, map_cells: bool) -> (nephocast::verify::Evaluation, CbhRows) {
    use nephocast::replay::{ReplayOptions, replay};
    let site = std::fs::read_to_string(dir.join("site.toml")).unwrap();
    let from = format!("base_height_m = {truth_m:.1}");
    assert!(site.contains(&from), "the written site holds {from}");
    let mut site = site.replace(&from, &format!("base_height_m = {base_m:.1}"));
    if let Some(p) = pos_b {
        site += &format!("\n[second_camera]\ncalibration = \"calibration/second.toml\"\nposition_m = [{:.1}, {:.1}, {:.1}]\nframes = \"frames2\"\nevery_s = 60.0\nmap_cells = {map_cells}\n", p[0], p[1], p[2]);
    }
    let site_path = dir.join(format!("site-{tag}.toml"));
    std::fs::write(&site_path, site).unwrap();
    let out = dir.join(format!("out-{tag}"));
    let opts = ReplayOptions { site: site_path, frames: dir.join("frames"), out: out.clone(), measurements: Some(dir.join("measurements.csv")), overlays_every: 0, progress: false };
    let sum = replay(&opts).unwrap();
    assert_eq!(sum.counters.rejected.values().sum::<usize>(), 0, "{tag}: {:?}", sum.counters.rejected);
    let eval = nephocast::verify::evaluate(dir, &out).unwrap();
    let mut rdr = csv::Reader::from_path(out.join("motion.csv")).unwrap();
    let h = rdr.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap();
    let (a, b, c) = (col("cbh_m"), col("cbh_sigma_m"), col("cbh_source"));
    let rows = rdr.records().map(|r| r.unwrap()).map(|r| (r[a].parse().unwrap(), r[b].parse().unwrap(), r[c].to_string())).collect();
    (eval, rows)
}

fn skill(e: &nephocast::verify::Evaluation, min: u32) -> f64 {
    e.plant.iter().find(|h| h.horizon_s == min * 60).map(|h| h.skill).unwrap_or(f64::NAN)
}

/// The engine end to end: `broken-cumulus-fast` (base 1200 m) with both cameras from `calibrate`,
/// `[second_camera]` added to the site file and the configured base set 1.6 times too high. After
/// the first stereo run, `motion.csv` must report `cbh_source = stereo` and a base within 10 % of
/// the truth.
#[test]
fn replay_with_a_second_camera() {
    let (d, pos_b) = write_pair("broken-cumulus-fast", 4.0);
    let (_, rows) = replay_pair(d.path(), "stereo", 1200.0, 1920.0, Some(pos_b), true);
    let stereo: Vec<&(f64, f64, String)> = rows.iter().filter(|r| r.2 == "stereo").collect();
    for r in &rows {
        eprintln!("  replay: cbh {:.0} m ± {:.0} m ({})", r.0, r.1, r.2);
    }
    assert!(!stereo.is_empty(), "no frame reported a stereo base: {rows:?}");
    assert_eq!(rows[0].2, "stereo", "the first frame runs the stereo estimate");
    for r in &stereo {
        assert!((r.0 / 1200.0 - 1.0).abs() <= 0.10, "stereo base {:.0} m vs 1200 m", r.0);
    }
}

/// Forecast skill (plant-mean GHI against smart persistence, scored on the truth) on
/// `broken-cumulus-fast` (20 minutes), cameras from `calibrate`, three replays:
///
/// * the true base configured, one camera;
/// * the stereo base (no ceilometer, configured prior 1.6 times too high), the map from the first
///   camera alone (`map_cells = false`). Target (issue: CBH without a ceilometer): skill within
///   0.03 of the true base's at 5, 10 and 15 minutes;
/// * the same with the multi-camera map (`map_cells = true`). At 08:30 the sun stands about 50° from
///   the zenith in the east: the cloud that shades the plant (around the first camera) lies in the
///   first camera's sun direction, in its glare zone, while the second camera (800 m east, 300 m
///   north) sees it about 25° from its sun. Recorded figures; the multi-camera map must not lose
///   more than 0.03 of skill at any horizon against the first camera's map.
#[test]
fn stereo_skill_and_the_multi_camera_map() {
    let (d, pos_b) = write_pair("broken-cumulus-fast", 20.0);
    let (truth, _) = replay_pair(d.path(), "truth", 1200.0, 1200.0, None, false);
    let (est, rows) = replay_pair(d.path(), "stereo", 1200.0, 1920.0, Some(pos_b), false);
    let (multi, _) = replay_pair(d.path(), "multi", 1200.0, 1920.0, Some(pos_b), true);
    let stereo = rows.iter().filter(|r| r.2 == "stereo").count();
    let mut errs: Vec<f64> = rows.iter().filter(|r| r.2 == "stereo").map(|r| (r.0 / 1200.0 - 1.0).abs()).collect();
    errs.sort_by(f64::total_cmp);
    eprintln!(
        "broken-cumulus-fast, 20 min: stereo base in {stereo} of {} frames, median error {:.3}",
        rows.len(),
        errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN)
    );
    for (tag, e) in [("true base, one camera's map", &truth), ("stereo base, one camera's map", &est), ("stereo base, two cameras' map", &multi)] {
        eprintln!("broken-cumulus-fast: skill 5/10/15 min with the {tag:<30} {:.3} {:.3} {:.3}", skill(e, 5), skill(e, 10), skill(e, 15));
    }
    assert!(stereo * 2 >= rows.len(), "stereo base in only {stereo} of {} frames", rows.len());
    let gaps: Vec<f64> = [5, 10, 15].iter().map(|m| skill(&truth, *m) - skill(&est, *m)).collect();
    assert!(gaps.iter().all(|g| g.abs() <= 0.03), "skill with the true base minus with the stereo base at 5/10/15 min: {gaps:.3?} (target within ±0.03)");
    let gain: Vec<f64> = [5, 10, 15].iter().map(|m| skill(&multi, *m) - skill(&est, *m)).collect();
    eprintln!("broken-cumulus-fast: the two cameras' map minus one camera's at 5/10/15 min: {gain:+.3?}");
    assert!(gain.iter().all(|g| *g >= -0.03), "the multi-camera map lost skill: {gain:.3?}");
}
