//! Cloud base height from two cameras ([`nephocast::stereo`]) on synthetic scenes with known truth.
//!
//! Frames of single-layer scenes are rendered from the scene's camera (at its site position, 3 m
//! up) and from a second camera 800 m east and 300 m north of it (same lens, turned by 70° in
//! yaw, without the mast) at the same instants, at 384² to stay fast. The estimator is given the
//! cameras **as rendered** (calibration from the truth, not from `calibrate`), the default
//! clear-sky reference and segmentation settings, and the true sun direction. So this checks the
//! estimator, not the calibration chain: camera errors would widen its errors beyond what it
//! reports.
//!
//! Targets: over all frames, the median relative CBH error ≤ 10 % and the stated one-sigma
//! interval covering the truth in ≥ 80 % of the frames with an estimate; the figures are printed.
use nephocast::camera::Camera;
use nephocast::segment::{Reference, SegmentParams};
use nephocast::stereo::{StereoParams, StereoView, estimate};
use nephocast::synth::render::PixelRays;
use nephocast::synth::{Scene, scene};

/// Second camera's position relative to the first (east, north, up) \[m\].
const OFFSET_M: [f64; 3] = [800.0, 300.0, 0.0];
/// Image size \[px\].
const SIZE_PX: u32 = 384;
/// Frames per scene, spread over the scene.
const FRAMES: usize = 6;

struct Frame {
    scene: String,
    truth_m: f64,
    result: Result<(f64, f64, f64), String>,
    /// Time the estimator took \[ms\].
    ms: f64,
}

fn run_scene(name: &str, seed: u64, frames: usize) -> Vec<Frame> {
    let mut spec = scene(name).unwrap();
    spec.size_px = SIZE_PX;
    let cam_spec_b = nephocast::synth::CameraSpec { yaw_deg: spec.camera.yaw_deg + 70.0, ..spec.camera.clone() };
    let sc = Scene::new(spec, seed).unwrap();
    // The lowest layer's base (the one the estimate should find, if any).
    let base_m = sc.world.layers.iter().map(|l| l.spec.base_height_m).fold(f64::NAN, f64::min);
    // Heights are above camera A.
    let truth_m = base_m - sc.cam_pos_m[2];
    let cam_a: &Camera = &sc.camera;
    let cam_b = cam_spec_b.camera(SIZE_PX);
    let pos_b = [sc.cam_pos_m[0] + OFFSET_M[0], sc.cam_pos_m[1] + OFFSET_M[1], sc.cam_pos_m[2] + OFFSET_M[2]];
    let (rays_a, rays_b) = (PixelRays::new(cam_a), PixelRays::new(&cam_b));
    let reference = Reference::default();
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
            let img_b = jpeg(&sc.render_frame_from(&cam_b, pos_b, &rays_b, i, &t).rgb);
            let sun = sc.world.instant(&t).sun.direction_enu();
            let sun = Some([sun[0] as f32, sun[1] as f32, sun[2] as f32]);
            let a = StereoView { camera: cam_a, obstruction: None, position_m: sc.cam_pos_m, reference: &reference, image: &img_a };
            let b = StereoView { camera: &cam_b, obstruction: None, position_m: pos_b, reference: &reference, image: &img_b };
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

/// The engine end to end: `broken-cumulus-fast` (base 1200 m) written by `synth` at 384², a second
/// camera's frames (800 m east, 300 m north, as rendered) in `frames2` with its true calibration,
/// `[second_camera]` added to the site file and the configured base set 1.6 times too high. After
/// the first stereo run, `motion.csv` must report `cbh_source = stereo` and a base within 10 % of
/// the truth.
#[test]
fn replay_with_a_second_camera() {
    use nephocast::config::CalibrationFile;
    use nephocast::replay::{ReplayOptions, replay};
    let d = tempfile::tempdir().unwrap();
    let mut spec = scene("broken-cumulus-fast").unwrap();
    spec.size_px = SIZE_PX;
    spec.duration_min = 4.0;
    let cam_spec_b = nephocast::synth::CameraSpec { name: "second".into(), yaw_deg: spec.camera.yaw_deg + 70.0, ..spec.camera.clone() };
    let sc = Scene::new(spec, 3).unwrap();
    nephocast::synth::write_sequence(&sc, d.path(), false).unwrap();
    let cam_b = cam_spec_b.camera(SIZE_PX);
    let pos_b = [sc.cam_pos_m[0] + OFFSET_M[0], sc.cam_pos_m[1] + OFFSET_M[1], sc.cam_pos_m[2] + OFFSET_M[2]];
    let rays_b = PixelRays::new(&cam_b);
    std::fs::create_dir_all(d.path().join("frames2")).unwrap();
    for (i, t) in sc.frame_times().iter().enumerate() {
        let rgb = sc.render_frame_from(&cam_b, pos_b, &rays_b, i, t).rgb;
        std::fs::write(d.path().join("frames2").join(nephocast::io::frame_name(t, "jpg")), nephocast::synth::encode_jpeg(&rgb, sc.spec.jpeg_quality)).unwrap();
    }
    let cal = CalibrationFile::from_camera("second", &cam_b);
    std::fs::write(d.path().join("calibration/second.toml"), toml::to_string(&cal).unwrap()).unwrap();
    let site = std::fs::read_to_string(d.path().join("site.toml")).unwrap();
    assert!(site.contains("base_height_m = 1200.0"));
    let site = site.replace("base_height_m = 1200.0", "base_height_m = 1920.0")
        + &format!("\n[second_camera]\ncalibration = \"calibration/second.toml\"\nposition_m = [{:.1}, {:.1}, {:.1}]\nframes = \"frames2\"\nevery_s = 60.0\n", pos_b[0], pos_b[1], pos_b[2]);
    std::fs::write(d.path().join("site.toml"), site).unwrap();
    let out = d.path().join("out");
    let opts = ReplayOptions { site: d.path().join("site.toml"), frames: d.path().join("frames"), out: out.clone(), measurements: None, overlays_every: 0, progress: false };
    let sum = replay(&opts).unwrap();
    assert_eq!(sum.counters.rejected.values().sum::<usize>(), 0, "{:?}", sum.counters.rejected);
    let mut rdr = csv::Reader::from_path(out.join("motion.csv")).unwrap();
    let h = rdr.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap();
    let (a, b, c) = (col("cbh_m"), col("cbh_sigma_m"), col("cbh_source"));
    let rows: Vec<(f64, f64, String)> = rdr.records().map(|r| r.unwrap()).map(|r| (r[a].parse().unwrap(), r[b].parse().unwrap(), r[c].to_string())).collect();
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
