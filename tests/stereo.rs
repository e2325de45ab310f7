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
    let (eval, motion) = replay_edited(dir, tag, &site_with(dir, truth_m, base_m, pos_b, map_cells, None));
    let rows = motion.iter().map(|r| (r["cbh_m"].parse().unwrap(), r["cbh_sigma_m"].parse().unwrap(), r["cbh_source"].clone())).collect();
    (eval, rows)
}

/// The site file written for the pair in `dir` with the configured base `truth_m` replaced by
/// `base_m`, `[clouds] layers` added when given (lower base and direction, upper base and direction), and the second camera when `pos_b`
/// is given (its map cells taken when `map_cells`).
fn site_with(dir: &std::path::Path, truth_m: f64, base_m: f64, pos_b: Option<[f64; 3]>, map_cells: bool, upper_m: Option<[f64; 4]>) -> String {
    let site = std::fs::read_to_string(dir.join("site.toml")).unwrap();
    let from = format!("base_height_m = {truth_m:.1}");
    assert!(site.contains(&from), "the written site holds {from}");
    let upper = upper_m.map(|[lo, lo_deg, up, up_deg]| format!("\nlayers = [{{ base_height_m = {lo:.1}, toward_deg = {lo_deg:.1} }}, {{ base_height_m = {up:.1}, toward_deg = {up_deg:.1} }}]")).unwrap_or_default();
    let mut site = site.replace(&from, &format!("base_height_m = {base_m:.1}{upper}"));
    if let Some(p) = pos_b {
        site += &format!("\n[second_camera]\ncalibration = \"calibration/second.toml\"\nposition_m = [{:.1}, {:.1}, {:.1}]\nframes = \"frames2\"\nevery_s = 60.0\nmap_cells = {map_cells}\n", p[0], p[1], p[2]);
    }
    site
}

/// Replay the pair in `dir` with the site file `site` and the pyranometers' measurements: the
/// evaluation against the truth and `motion.csv`'s rows by column name.
fn replay_edited(dir: &std::path::Path, tag: &str, site: &str) -> (nephocast::verify::Evaluation, Vec<std::collections::BTreeMap<String, String>>) {
    use nephocast::replay::{ReplayOptions, replay};
    let site_path = dir.join(format!("site-{tag}.toml"));
    std::fs::write(&site_path, site).unwrap();
    let out = dir.join(format!("out-{tag}"));
    let opts = ReplayOptions { site: site_path, frames: dir.join("frames"), out: out.clone(), measurements: Some(dir.join("measurements.csv")), overlays_every: 0, progress: false };
    let sum = replay(&opts).unwrap();
    assert_eq!(sum.counters.rejected.values().sum::<usize>(), 0, "{tag}: {:?}", sum.counters.rejected);
    let eval = nephocast::verify::evaluate(dir, &out).unwrap();
    let mut rdr = csv::Reader::from_path(out.join("motion.csv")).unwrap();
    let h = rdr.headers().unwrap().clone();
    let rows = rdr.records().map(|r| h.iter().map(str::to_string).zip(r.unwrap().iter().map(str::to_string)).collect()).collect();
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

/// Per-layer stereo on `two-layers` (cumulus at 1000 m, thin altocumulus at 3800 m, 30 minutes),
/// both cameras from `calibrate`, no ceilometer: the configured base set 1.6 times too high and no
/// second layer's base configured. The engine tracks the two layers; the stereo match takes each
/// layer's cells on its own and gives each its height. Targets (issue: CBH without a ceilometer,
/// per layer): over the frames whose base for a layer came from stereo (at least half of them),
/// that layer's median error ≤ 10 % and its stated ±2σ interval covering the truth in ≥ 80 %;
/// plant-mean GHI skill with the estimated heights, the map's plane following the estimate
/// (`[clouds] map_follows_estimate`, the default), within 0.03 of the skill with both true heights
/// configured (`[[clouds.layers]]`: each layer's base and the direction it moves toward, from
/// `truth/layers.csv`) and the map on the lower layer's true base, at 5, 10 and 15 minutes. The
/// plane must have moved to within 10 % of the lower base. A third replay keeps the plane on the
/// configured 1600 m (`map_follows_estimate = false`): its figures are printed (at 15 minutes it
/// fell about 0.1 short), with the time of the frames that built a new table.
#[test]
fn per_layer_stereo_on_two_layers() {
    let (truth_lower, truth_upper) = (1000.0, 3800.0);
    let (d, pos_b) = write_pair("two-layers", 30.0);
    // The true layers: base and direction from the truth file.
    let layers = std::fs::read_to_string(d.path().join("truth/layers.csv")).unwrap();
    let truth_layers: Vec<(f64, f64)> = layers.lines().skip(1).map(|l| l.split(',').collect::<Vec<_>>()).map(|c| (c[1].parse().unwrap(), c[3].parse().unwrap())).collect();
    assert_eq!(truth_layers.iter().map(|l| l.0).collect::<Vec<f64>>(), vec![truth_lower, truth_upper], "{layers}");
    let known = [truth_layers[0].0, truth_layers[0].1, truth_layers[1].0, truth_layers[1].1];
    let (truth, _) = replay_edited(d.path(), "truth", &site_with(d.path(), truth_lower, truth_lower, None, false, Some(known)));
    let (est, rows) = replay_edited(d.path(), "layers", &site_with(d.path(), truth_lower, 1.6 * truth_lower, Some(pos_b), false, None));
    // The stereo heights with the map kept on the configured 1600 m plane.
    let fixed_site = site_with(d.path(), truth_lower, 1.6 * truth_lower, Some(pos_b), false, None).replace("base_height_m = 1600.0", "base_height_m = 1600.0\nmap_follows_estimate = false");
    let (fixed, fixed_rows) = replay_edited(d.path(), "fixed", &fixed_site);
    for (tag, e) in [("true heights", &truth), ("stereo heights, plane followed", &est), ("stereo heights, 1600 m plane", &fixed)] {
        let all: Vec<String> = (1..=20).map(|m| format!("{:.2}", skill(e, m))).collect();
        eprintln!("two-layers: skill 1..20 min with the {tag:<30} {}; 5/10/15 min {:.3} / {:.3} / {:.3}", all.join(" "), skill(e, 5), skill(e, 10), skill(e, 15));
    }
    let mut failures = vec![];
    let two = rows.iter().filter(|r| !r["layer2_cbh_m"].is_empty()).count();
    eprintln!("two-layers: two layers advected in {two} of {} frames", rows.len());
    // The map's plane: where it went, when, and what the frames that built a new table took.
    let planes: Vec<f64> = rows.iter().map(|r| r["map_plane_m"].parse().unwrap()).collect();
    let moves: Vec<usize> = (1..planes.len()).filter(|&i| planes[i] != planes[i - 1]).collect();
    let frames = std::fs::read_to_string(d.path().join("out-layers/frames.csv")).unwrap();
    let qc_ms: Vec<f64> = frames.lines().skip(1).map(|l| l.split(',').nth(8).unwrap().parse().unwrap()).collect();
    let mut sorted = qc_ms.clone();
    sorted.sort_by(f64::total_cmp);
    eprintln!(
        "two-layers: map plane {:.0} m at the start, moved at frames {moves:?} to {:?} m; QC stage (the table built there) {:?} ms at those frames, median {:.1} ms",
        planes[0],
        moves.iter().map(|&i| planes[i]).collect::<Vec<f64>>(),
        moves.iter().map(|&i| qc_ms[i]).collect::<Vec<f64>>(),
        sorted[sorted.len() / 2]
    );
    assert!(fixed_rows.iter().all(|r| r["map_plane_m"] == "1600"), "the plane moved with map_follows_estimate = false");
    let last_plane = *planes.last().unwrap();
    if (last_plane / truth_lower - 1.0).abs() > 0.10 {
        failures.push(format!("the map's plane ended at {last_plane:.0} m, not within 10 % of the lower base {truth_lower:.0} m"));
    }
    // Each forecast layer of a frame is the true layer nearest its direction of motion (the
    // forecast puts the more opaque layer first, and the order may change from frame to frame).
    let dir_of = |e: &str, n: &str| -> Option<f64> { Some(e.parse::<f64>().ok()?.atan2(n.parse::<f64>().ok()?).to_degrees()) };
    let off = |a: f64, b: f64| (a - b).rem_euclid(360.0).min((b - a).rem_euclid(360.0));
    // Per layer, the frames' (index, base, sigma, source); printed for both replays, judged for the
    // one whose plane followed.
    for (tag, rows, judged) in [("plane followed", &rows, true), ("1600 m plane", &fixed_rows, false)] {
        let mut per_truth: Vec<Vec<(usize, f64, f64, String)>> = vec![vec![], vec![]];
        for (i, r) in rows.iter().enumerate() {
            for (prefix, e, n) in [("", "east_mps", "north_mps"), ("layer2_", "second_east_mps", "second_north_mps")] {
                let (Some(d), Ok(h), Ok(s)) = (dir_of(&r[e], &r[n]), r[&format!("{prefix}cbh_m")].parse::<f64>(), r[&format!("{prefix}cbh_sigma_m")].parse::<f64>()) else { continue };
                let k = if off(d, truth_layers[0].1) <= off(d, truth_layers[1].1) { 0 } else { 1 };
                per_truth[k].push((i, h, s, r[&format!("{prefix}cbh_source")].clone()));
            }
        }
        for (k, truth_m) in [truth_lower, truth_upper].into_iter().enumerate() {
            let fits: Vec<(usize, f64, f64)> = per_truth[k].iter().filter(|f| f.3 == "stereo").map(|f| (f.0, f.1, f.2)).collect();
            let mut errs: Vec<(f64, usize)> = fits.iter().map(|(i, h, _)| ((h / truth_m - 1.0).abs(), *i)).collect();
            errs.sort_by(|a, b| a.0.total_cmp(&b.0));
            let median = errs.get(errs.len() / 2).map_or(f64::NAN, |e| e.0);
            let within = |k: f64| fits.iter().filter(|(_, h, s)| (h - truth_m).abs() <= k * s).count() as f64 / fits.len().max(1) as f64;
            let share = fits.len() as f64 / rows.len() as f64;
            let mean_sigma = fits.iter().map(|(_, h, s)| s / h).sum::<f64>() / fits.len().max(1) as f64;
            eprintln!(
                "two-layers ({tag}), layer at {truth_m:.0} m: tracked in {} of {} frames, stereo base in {}; median error {median:.3}, max {:.3} (frame {}); mean stated sigma {mean_sigma:.3}; 1σ covers the truth in {:.2}, 2σ in {:.2}",
                per_truth[k].len(),
                rows.len(),
                fits.len(),
                errs.last().map_or(f64::NAN, |e| e.0),
                errs.last().map_or(0, |e| e.1),
                within(1.0),
                within(2.0)
            );
            if !judged {
                continue;
            }
            if share < 0.5 {
                failures.push(format!("layer at {truth_m:.0} m: stereo base in only {share:.2} of the frames (target ≥ 0.5)"));
            }
            if median.is_nan() || median > 0.10 {
                failures.push(format!("layer at {truth_m:.0} m: median error {median:.3} (target ≤ 0.10)"));
            }
            if within(2.0) < 0.80 {
                failures.push(format!("layer at {truth_m:.0} m: ±2σ covers the truth in {:.2} (target ≥ 0.80)", within(2.0)));
            }
        }
    }
    let gap = |a: &nephocast::verify::Evaluation, b: &nephocast::verify::Evaluation| -> Vec<f64> { [5, 10, 15].iter().map(|m| skill(a, *m) - skill(b, *m)).collect() };
    let followed = gap(&truth, &est);
    eprintln!("two-layers: true heights on the 1000 m plane minus stereo heights, plane followed, at 5/10/15 min: {followed:+.3?}");
    if !followed.iter().all(|g| g.abs() <= 0.03) {
        failures.push(format!("skill with the true heights minus with the stereo heights (plane followed) at 5/10/15 min: {followed:.3?} (target within ±0.03)"));
    }
    eprintln!("two-layers: true heights on the 1000 m plane minus stereo heights, 1600 m plane, at 5/10/15 min: {:+.3?}", gap(&truth, &fixed));
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// Two layers in synthetic score maps (no rendering): a lower field at 900 m seen where it is
/// cloud (score above 0.6), and elsewhere a fainter upper field with structures 1.2 times larger
/// at 3500 m (each camera's view of it hidden where its own ray meets the lower cloud). The cells
/// camera A sees of each layer form a group of [`nephocast::stereo::estimate_groups_with`]; each
/// group's height must be its layer's (within 5 %), while the whole sky's single estimate, if
/// any, can be only one of them.
#[test]
fn groups_find_each_layers_height() {
    use nephocast::stereo::{estimate_groups_with, estimate_with};
    let p = StereoParams { cells: 96, heights: 40, ..Default::default() };
    let (lower_m, upper_m, baseline): (f64, f64, [f64; 2]) = (900.0, 3500.0, [800.0, 300.0]);
    let field = |x: f64, y: f64| {
        let waves = [(0.0123, 0.0041, 0.3), (-0.0052, 0.0117, 1.1), (0.0071, -0.0089, 2.3), (0.0167, 0.0113, 0.7), (-0.0031, -0.0061, 1.9)];
        let v: f64 = waves.iter().map(|(kx, ky, ph)| (kx * x + ky * y + ph).sin()).sum::<f64>() / 2.2;
        1.0 / (1.0 + (-4.0 * v).exp())
    };
    // Each camera's score per cell at candidate height h, and whether camera A sees the lower layer.
    let maps = |h: f64| {
        let grid = p.grid(h, baseline[0].hypot(baseline[1]));
        let half = [baseline[0] / 2.0, baseline[1] / 2.0];
        let tan_max = p.max_zenith_deg.to_radians().tan();
        let n = p.cells;
        let mut out = [vec![f32::NAN; n * n], vec![f32::NAN; n * n]];
        let mut member = vec![0u8; n * n];
        for (ci, c) in [[-half[0], -half[1]], half].iter().enumerate() {
            for j in 0..n {
                for i in 0..n {
                    let x = grid.cell_centre_m(i, j);
                    let r = [x[0] - c[0], x[1] - c[1]];
                    if r[0].hypot(r[1]) > h * tan_max {
                        continue;
                    }
                    let at = |hh: f64| [c[0] + r[0] * hh / h, c[1] + r[1] * hh / h];
                    let lo = at(lower_m);
                    let low = field(lo[0], lo[1]);
                    let up = at(upper_m);
                    let (score, bit) = if low > 0.6 { (low, 1) } else { (0.6 * field(up[0] / 1.2 + 5000.0, up[1] / 1.2 - 7000.0), 2) };
                    out[ci][j * n + i] = score as f32;
                    if ci == 0 {
                        member[j * n + i] = bit;
                    }
                }
            }
        }
        (out, Some(member))
    };
    let fits = estimate_groups_with(&p, 2, maps);
    for (fit, truth) in fits.iter().zip([lower_m, upper_m]) {
        let fit = fit.as_ref().unwrap_or_else(|e| panic!("layer at {truth} m: {e}"));
        eprintln!("  group at {truth} m: {:.0} m ± {:.1} % (NCC {:.2})", fit.cbh_m, 100.0 * fit.rel_sigma, fit.peak_ncc);
        assert!((fit.cbh_m / truth - 1.0).abs() <= 0.05, "layer at {truth} m: {:.0} m", fit.cbh_m);
    }
    let whole = estimate_with(&p, |h| maps(h).0);
    eprintln!("  whole sky: {:?}", whole.as_ref().map(|w| (w.cbh_m.round(), w.rel_sigma)));
    if let Ok(w) = whole {
        assert!([lower_m, upper_m].iter().any(|t| (w.cbh_m / t - 1.0).abs() <= 0.1), "whole sky {:.0} m", w.cbh_m);
    }
}
