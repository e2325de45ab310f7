//! Cloud base height without a ceilometer, end to end on synthetic scenes with known truth.
//!
//! The camera of every replay here comes from `calibrate` on a clear day rendered for the scenes'
//! camera (`common/calibrated.rs`: fitted camera, obstruction mask and clear-sky library), never
//! from the truth; the renderer alone uses the true camera.
//!
//! The `cbh-network` scene (broken cumulus at 1300 m, six pyranometers read as 10-s means) is
//! replayed three times from one rendering: with the true base configured, with a prior 1.6 times
//! too high and shadow timing on (the map's plane following the estimate, `[clouds]
//! map_follows_estimate`, the default), and with that wrong prior alone. Targets: over the frames
//! with a shadow-timing estimate, the median CBH error ≤ 10 % and the ±2σ interval covering the
//! truth in ≥ 80 % of them; plant-mean GHI skill against smart persistence with the estimated base
//! (and the plane that followed it) within 0.03 of the skill with the map on the true base at 5,
//! 10 and 15 minutes. Shortfalls that are known are
//! listed in `KNOWN_SHORTFALLS`: the test checks they still fall short (so the list stays true)
//! and prints every figure.
#[path = "common/calibrated.rs"]
mod calibrated;

use std::path::Path;
use std::sync::OnceLock;

use nephocast::replay::{ReplayOptions, replay};
use nephocast::synth::{Scene, larkspur_network, scene, write_sequence};
use nephocast::verify::{Evaluation, evaluate};

/// Metrics that do not yet meet their target.
///
/// `default: skill gap`: a fit may override the configured base only once it has shown that the
/// readings follow the map's shadows better than the same readings shifted in time (the null test
/// of `cbh::shadow`), which needs a full window (10 minutes of frames). The default run therefore
/// keeps the wrong prior for the first ~12 of the scene's 30 minutes (before the test: ~4), and
/// its skill moves toward the wrong prior's: true minus default at 5/10/15 min
/// [0.025, −0.031, −0.036] (before [0.009, −0.007, −0.021]); the negative gaps are the default
/// beating the true base, as the wrong prior alone does at 10/15 minutes on this scene.
const KNOWN_SHORTFALLS: &[&str] = &["default: skill gap"];

/// The scene's true cloud base \[m\].
const TRUTH_M: f64 = 1300.0;

struct Run {
    eval: Evaluation,
    /// Per frame: cbh_m, cbh_sigma_m, cbh_source from motion.csv.
    cbh: Vec<(f64, f64, String)>,
    /// Per frame: the map's plane \[m\] (motion.csv) and the QC stage's time \[ms\] (frames.csv;
    /// it builds a new look-up table when the plane has moved).
    plane: Vec<(f64, f64)>,
    /// Whether shadow timing rejected the configured base, and how many disagreeing fits it held
    /// back (the replay's summary).
    rejected: (bool, usize),
}

impl Run {
    /// The frames at which the plane moved, with the new plane and the QC stage's time there.
    fn moves(&self) -> Vec<(usize, f64, f64)> {
        (1..self.plane.len()).filter(|&i| self.plane[i].0 != self.plane[i - 1].0).map(|i| (i, self.plane[i].0, self.plane[i].1)).collect()
    }
}

/// Size of the scenes' frames \[px\] (the catalogue's).
const SIZE_PX: u32 = 512;

/// The scenes' camera (all here share it) from `calibrate` on its clear day (every 15 minutes),
/// once per test run.
fn calibrated_camera() -> &'static calibrated::Calibrated {
    static CELL: OnceLock<calibrated::Calibrated> = OnceLock::new();
    CELL.get_or_init(|| calibrated::clear_day(&scene("cbh-network").unwrap().camera, SIZE_PX, None, 900.0))
}

/// Put the calibrated camera in the place of the true one the sequence in `dir` names.
fn use_calibrated_camera(dir: &Path, camera_name: &str) {
    calibrated_camera().write(&dir.join("calibration"), camera_name);
}

fn render(name: &str, minutes: f64, edit: impl Fn(&mut nephocast::synth::SceneSpec)) -> tempfile::TempDir {
    let d = tempfile::tempdir().unwrap();
    let mut spec = scene(name).unwrap();
    spec.duration_min = minutes;
    edit(&mut spec);
    assert_eq!((&spec.camera, spec.size_px), (&scene("cbh-network").unwrap().camera, SIZE_PX), "{name}: the calibrated camera is this scene's");
    let cam_name = spec.camera.name.clone();
    write_sequence(&Scene::new(spec, 3).unwrap(), d.path(), false).unwrap();
    use_calibrated_camera(d.path(), &cam_name);
    d
}

/// The `cbh-network` scene (30 minutes, seed 3, 10-s readings) rendered once per test run into
/// the target's scratch folder (cleared first), with the calibrated camera: the 10-s and 1-minute
/// tests replay the same frames, each with its own readings.
fn network_scene() -> &'static Path {
    static CELL: OnceLock<std::path::PathBuf> = OnceLock::new();
    CELL.get_or_init(|| {
        let dir = Path::new(env!("CARGO_TARGET_TMPDIR")).join("cbh-network");
        if dir.exists() {
            std::fs::remove_dir_all(&dir).unwrap();
        }
        std::fs::create_dir_all(&dir).unwrap();
        let mut spec = scene("cbh-network").unwrap();
        spec.duration_min = 30.0;
        write_sequence(&Scene::new(spec.clone(), 3).unwrap(), &dir, false).unwrap();
        use_calibrated_camera(&dir, &spec.camera.name);
        dir
    })
}

/// Replay with the written site file edited by `edit_site` (a text replacement).
fn run(dir: &Path, tag: &str, edit_site: impl Fn(&str) -> String) -> Run {
    run_with(dir, tag, &dir.join("measurements.csv"), edit_site)
}

/// [`run`] with the measurements read from `measurements`.
fn run_with(dir: &Path, tag: &str, measurements: &Path, edit_site: impl Fn(&str) -> String) -> Run {
    let site = std::fs::read_to_string(dir.join("site.toml")).unwrap();
    let edited = edit_site(&site);
    let site_path = dir.join(format!("site-{tag}.toml"));
    std::fs::write(&site_path, edited).unwrap();
    let out = dir.join(format!("out-{tag}"));
    let opts = ReplayOptions {
        site: site_path,
        frames: dir.join("frames"),
        out: out.clone(),
        measurements: Some(measurements.to_path_buf()),
        overlays_every: 0,
        progress: false,
    };
    let sum = replay(&opts).unwrap();
    let rejected = (sum.prior_base_rejected, sum.shadow_fits_held_back);
    assert_eq!(sum.counters.rejected.values().sum::<usize>(), 0, "{tag}: frames rejected {:?}", sum.counters.rejected);
    let eval = evaluate(dir, &out).unwrap();
    let mut rdr = csv::Reader::from_path(out.join("motion.csv")).unwrap();
    let h = rdr.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap_or_else(|| panic!("motion.csv has no {n}"));
    let (a, b, c, p) = (col("cbh_m"), col("cbh_sigma_m"), col("cbh_source"), col("map_plane_m"));
    let rows: Vec<csv::StringRecord> = rdr.records().map(|r| r.unwrap()).collect();
    let cbh = rows.iter().map(|r| (r[a].parse().unwrap(), r[b].parse().unwrap(), r[c].to_string())).collect();
    let mut frames = csv::Reader::from_path(out.join("frames.csv")).unwrap();
    let qc = frames.headers().unwrap().iter().position(|x| x == "qc_ms").expect("frames.csv has qc_ms");
    let qc_ms: Vec<f64> = frames.records().map(|r| r.unwrap()[qc].parse().unwrap()).collect();
    assert_eq!(qc_ms.len(), rows.len(), "{tag}: every frame used");
    let plane = rows.iter().zip(qc_ms).map(|(r, q)| (r[p].parse().unwrap(), q)).collect();
    Run { eval, cbh, plane, rejected }
}

fn skill(e: &Evaluation, min: u32) -> f64 {
    e.plant.iter().find(|h| h.horizon_s == min * 60).map(|h| h.skill).unwrap_or(f64::NAN)
}

fn check(metric: &str, ok: bool, figure: String) {
    if KNOWN_SHORTFALLS.contains(&metric) {
        assert!(!ok, "{metric} now meets its target ({figure}): remove it from KNOWN_SHORTFALLS");
        eprintln!("  known shortfall: {metric}: {figure}");
    } else {
        assert!(ok, "{metric} misses its target: {figure}");
        eprintln!("  {metric}: {figure}");
    }
}

/// The site with the base configured 1.6 × too high and `shadow_timing` set to `shadow` (unset
/// with `None`: the default, where the fits check the configured base).
fn wrong_prior(site: &str, shadow: Option<bool>) -> String {
    let from = format!("base_height_m = {TRUTH_M:.1}");
    assert!(site.contains(&from), "the written site holds {from}");
    let to = format!("base_height_m = {:.1}{}", 1.6 * TRUTH_M, shadow.map(|on| format!("\nshadow_timing = {on}")).unwrap_or_default());
    site.replace(&from, &to)
}

#[test]
fn shadow_timing_finds_the_cloud_base_from_a_wrong_prior() {
    let d = network_scene();
    let truth = run(d, "truth", |s| s.to_string());
    let est = run(d, "shadow", |s| wrong_prior(s, Some(true)));
    let wrong = run(d, "wrong", |s| wrong_prior(s, Some(false)));
    let auto = run(d, "auto", |s| wrong_prior(s, None));
    // No base configured at all: estimated from the unconfigured prior (1500 m, ±50 %).
    let unset = run(d, "unset", |s| s.replace(&format!("base_height_m = {TRUTH_M:.1}\n"), ""));
    // Without shadow timing every frame reports the configured value and its 30 % prior, and the
    // map stays on it.
    for (h, sd, src) in &wrong.cbh {
        assert_eq!((src.as_str(), *h), ("configured", 1.6 * TRUTH_M));
        assert!((sd - 0.3 * 1.6 * TRUTH_M).abs() <= 1.0, "{sd}");
    }
    assert!(wrong.plane.iter().all(|p| p.0 == 1.6 * TRUTH_M) && truth.plane.iter().all(|p| p.0 == TRUTH_M), "without an estimate the plane stays");
    // With shadow timing the plane follows the estimate once it is trustworthy.
    let moves = est.moves();
    let mut qc: Vec<f64> = est.plane.iter().map(|p| p.1).collect();
    qc.sort_by(f64::total_cmp);
    eprintln!(
        "cbh-network: map plane {:.0} m at the start, moved at frames (index, plane m, QC stage ms) {moves:?}; median QC stage {:.1} ms",
        est.plane[0].0,
        qc[qc.len() / 2]
    );
    let fits: Vec<&(f64, f64, String)> = est.cbh.iter().filter(|c| c.2 == "shadow_timing").collect();
    let share = fits.len() as f64 / est.cbh.len() as f64;
    let mut errs: Vec<f64> = fits.iter().map(|c| (c.0 - TRUTH_M).abs() / TRUTH_M).collect();
    errs.sort_by(f64::total_cmp);
    let median = errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN);
    let covered = fits.iter().filter(|c| (c.0 - TRUTH_M).abs() <= 2.0 * c.1).count() as f64 / fits.len().max(1) as f64;
    let mean_sigma = fits.iter().map(|c| c.1 / c.0).sum::<f64>() / fits.len().max(1) as f64;
    eprintln!(
        "cbh-network: shadow-timing estimate in {:.2} of {} frames; median CBH error {:.3}, 90th percentile {:.3}; mean stated sigma {:.3}; 2σ covers the truth in {:.2}",
        share,
        est.cbh.len(),
        median,
        errs.get(errs.len() * 9 / 10).copied().unwrap_or(f64::NAN),
        mean_sigma,
        covered
    );
    assert_eq!((unset.cbh[0].0, unset.cbh[0].2.as_str()), (nephocast::cbh::UNCONFIGURED_PRIOR_M, "prior"), "the unconfigured prior is where the run starts");
    assert!(!unset.rejected.0, "an unconfigured prior is not judged, so never rejected");
    for (tag, r) in [("true base", &truth), ("estimated base", &est), ("wrong prior only", &wrong), ("default (checked)", &auto), ("no base configured", &unset)] {
        eprintln!("cbh-network: skill 5/10/15 min with the {tag:<16} {:.3} {:.3} {:.3}", skill(&r.eval, 5), skill(&r.eval, 10), skill(&r.eval, 15));
    }
    check("estimate share", share >= 0.5, format!("{share:.2} of frames (target ≥ 0.5)"));
    check("median error", median <= 0.10, format!("{median:.3} (target ≤ 0.10)"));
    check("2σ coverage", covered >= 0.80, format!("{covered:.2} (target ≥ 0.80)"));
    let last = est.plane.last().unwrap().0;
    check("plane followed", !moves.is_empty() && (last / TRUTH_M - 1.0).abs() <= 0.10, format!("{} moves, ending at {last:.0} m (target within 10 % of {TRUTH_M:.0} m)", moves.len()));
    let gaps: Vec<f64> = [5, 10, 15].iter().map(|m| skill(&truth.eval, *m) - skill(&est.eval, *m)).collect();
    check("skill gap", gaps.iter().all(|g| g.abs() <= 0.03), format!("true minus estimated at 5/10/15 min {gaps:.3?} (target within ±0.03)"));
    // The default (shadow_timing unset): the fits disagree with the wrong configured base, take
    // over from it, and the plane follows them as with shadow timing asked for. No base configured:
    // the fits are combined from the first, and the plane follows them too.
    for (tag, r) in [("default", &auto), ("no base", &unset)] {
        let last = r.plane.last().unwrap().0;
        check(
            &format!("{tag}: plane followed"),
            !r.moves().is_empty() && (last / TRUTH_M - 1.0).abs() <= 0.10,
            format!("{} moves, ending at {last:.0} m (target within 10 % of {TRUTH_M:.0} m)", r.moves().len()),
        );
        let gaps: Vec<f64> = [5, 10, 15].iter().map(|m| skill(&truth.eval, *m) - skill(&r.eval, *m)).collect();
        check(&format!("{tag}: skill gap"), gaps.iter().all(|g| g.abs() <= 0.03), format!("true minus {tag} at 5/10/15 min {gaps:.3?} (target within ±0.03)"));
    }
}

/// The `cbh-network` scene's readings (30 minutes, seed 3, as [`network_scene`] renders) written
/// as 1-minute means stamped at the start of their minute.
fn one_minute_readings() -> Vec<u8> {
    let mut spec = scene("cbh-network").unwrap();
    spec.duration_min = 30.0;
    spec.pyranometer_network.as_mut().expect("cbh-network has a pyranometer network").sample_s = 60;
    nephocast::synth::measurements_csv(&Scene::new(spec, 3).unwrap())
}

/// The same network read as 1-minute means (the usual logger setting; the same frames, the
/// readings written for a 60-s period): recorded figures. The stated uncertainty must stay honest
/// (±2σ covering the truth in ≥ 80 % of the frames with an estimate); how often there is an
/// estimate and how close it is are printed.
#[test]
fn one_minute_readings_figures() {
    let d = network_scene();
    let m60 = tempfile::tempdir().unwrap();
    let path = m60.path().join("measurements.csv");
    std::fs::write(&path, one_minute_readings()).unwrap();
    let est = run_with(d, "shadow60", &path, |s| wrong_prior(s, Some(true)));
    let fits: Vec<&(f64, f64, String)> = est.cbh.iter().filter(|c| c.2 == "shadow_timing").collect();
    let mut errs: Vec<f64> = fits.iter().map(|c| (c.0 - TRUTH_M).abs() / TRUTH_M).collect();
    errs.sort_by(f64::total_cmp);
    let covered = fits.iter().filter(|c| (c.0 - TRUTH_M).abs() <= 2.0 * c.1).count() as f64 / fits.len().max(1) as f64;
    eprintln!(
        "cbh-network, 1-minute readings: estimate in {:.2} of {} frames; median CBH error {:.3}; mean stated sigma {:.3}; 2σ covers the truth in {:.2}; skill 5/10/15 min {:.3} {:.3} {:.3}",
        fits.len() as f64 / est.cbh.len() as f64,
        est.cbh.len(),
        errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN),
        fits.iter().map(|c| c.1 / c.0).sum::<f64>() / fits.len().max(1) as f64,
        covered,
        skill(&est.eval, 5),
        skill(&est.eval, 10),
        skill(&est.eval, 15)
    );
    check("1-minute 2σ coverage", fits.is_empty() || covered >= 0.80, format!("{covered:.2} of {} frames (target ≥ 0.80)", fits.len()));
}

/// The shipped demo's three block-centre pyranometers (1-minute means, at most 500 m apart) with a
/// prior 1.6 times the true 1400 m base: recorded figures, with the same honesty check of the
/// stated uncertainty.
#[test]
fn demo_three_pyranometers_figures() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let d = tempfile::tempdir().unwrap();
    let site = std::fs::read_to_string(root.join("site.toml")).unwrap();
    assert!(site.contains("base_height_m = 1400.0"));
    std::fs::write(d.path().join("site.toml"), site.replace("base_height_m = 1400.0", "base_height_m = 2240.0\nshadow_timing = true")).unwrap();
    // The demo's camera is the scenes' camera at the same size: its calibration from `calibrate`.
    assert_eq!((&scene("larkspur-demo").unwrap().camera, scene("larkspur-demo").unwrap().size_px), (&scene("cbh-network").unwrap().camera, SIZE_PX));
    use_calibrated_camera(d.path(), "larkspur-sky1");
    let out = d.path().join("out");
    let opts = ReplayOptions {
        site: d.path().join("site.toml"),
        frames: root.join("frames"),
        out: out.clone(),
        measurements: Some(root.join("measurements.csv")),
        overlays_every: 0,
        progress: false,
    };
    replay(&opts).unwrap();
    let e = evaluate(&root, &out).unwrap();
    let mut rdr = csv::Reader::from_path(out.join("motion.csv")).unwrap();
    let h = rdr.headers().unwrap().clone();
    let col = |n: &str| h.iter().position(|x| x == n).unwrap();
    let (a, b, c) = (col("cbh_m"), col("cbh_sigma_m"), col("cbh_source"));
    let rows: Vec<(f64, f64, String)> = rdr.records().map(|r| r.unwrap()).map(|r| (r[a].parse().unwrap(), r[b].parse().unwrap(), r[c].to_string())).collect();
    let fits: Vec<&(f64, f64, String)> = rows.iter().filter(|c| c.2 == "shadow_timing").collect();
    let truth = 1400.0;
    let mut errs: Vec<f64> = fits.iter().map(|c| (c.0 - truth).abs() / truth).collect();
    errs.sort_by(f64::total_cmp);
    let covered = fits.iter().filter(|c| (c.0 - truth).abs() <= 2.0 * c.1).count() as f64 / fits.len().max(1) as f64;
    eprintln!(
        "larkspur-demo, 3 pyranometers, 1-minute readings: estimate in {:.2} of {} frames; median CBH error {:.3}; mean stated sigma {:.3}; 2σ covers the truth in {:.2}; skill 5/10/15 min {:.3} {:.3} {:.3}",
        fits.len() as f64 / rows.len() as f64,
        rows.len(),
        errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN),
        fits.iter().map(|c| c.1 / c.0).sum::<f64>() / fits.len().max(1) as f64,
        covered,
        skill(&e, 5),
        skill(&e, 10),
        skill(&e, 15)
    );
    check("demo 2σ coverage", fits.is_empty() || covered >= 0.80, format!("{covered:.2} of {} frames (target ≥ 0.80)", fits.len()));
}

/// Under a clear sky the pyranometers see no shadow: no estimate is given, and the configured
/// value is used with its prior uncertainty.
#[test]
fn no_estimate_without_shadows() {
    let d = render("clear-day", 8.0, |s| {
        s.start_utc = "2026-06-14T08:30:00Z".into();
        s.frame_step_s = 20.0;
        s.truth_mask_every = 10;
        s.pyranometer_network = Some(larkspur_network());
    });
    let site = std::fs::read_to_string(d.path().join("site.toml")).unwrap();
    let r = run(d.path(), "clear", |s| s.replace("base_height_m = 1500.0", "base_height_m = 1500.0\nshadow_timing = true"));
    assert!(site.contains("base_height_m = 1500.0"));
    assert!(!r.cbh.is_empty());
    for (h, sd, src) in &r.cbh {
        assert_eq!((src.as_str(), *h), ("configured", 1500.0));
        assert!((sd - 450.0).abs() <= 1.0, "{sd}");
    }
}

/// A site may leave the base out only where shadow timing can estimate it: with at least three
/// pyranometers and shadow timing not turned off; otherwise it is refused, naming `clouds`.
#[test]
fn a_site_without_a_base_needs_pyranometers() {
    let mut f = nephocast::synth::larkspur_site(1200.0, "cam");
    f.clouds.base_height_m = None;
    f.pyranometers.clear();
    let e = f.validate(Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.contains("field clouds") && e.contains("[[pyranometers]]"), "{e}");
    f.pyranometers = (0..nephocast::cbh::MIN_SHADOW_SENSORS)
        .map(|i| nephocast::config::PyranometerSpec { name: format!("p{i}"), position_m: [100.0 * i as f64, 0.0] })
        .collect();
    assert!(f.clouds.base_unconfigured());
    f.validate(Path::new("site.toml")).expect("a site without a base but with three pyranometers");
    f.clouds.shadow_timing = Some(false);
    let e = f.validate(Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.contains("field clouds"), "{e}");
}

/// Shadow timing needs pyranometers: a site that asks for it without enough is refused, naming
/// the field.
#[test]
fn shadow_timing_without_pyranometers_is_refused() {
    let mut f = nephocast::synth::larkspur_site(1200.0, "cam");
    f.clouds.shadow_timing = Some(true);
    let e = f.validate(Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.contains("clouds.shadow_timing") && e.contains("site.toml"), "{e}");
    f.clouds.shadow_timing = None;
    assert!(f.validate(Path::new("site.toml")).is_ok(), "unset shadow timing needs no pyranometers");
    f.clouds.shadow_timing = Some(false);
    f.clouds.base_height_rel_sigma = Some(5.0);
    let e = f.validate(Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.contains("clouds.base_height_rel_sigma"), "{e}");
}

/// The measurements' time label (`[measurements] time_label`): 1-minute means stamped at the end
/// of their minute, with the label saying so, give the start-stamped run exactly (shadow timing on,
/// from a prior 1.6 × the truth, so the readings' timing decides the base); read as starts, the
/// same readings are a minute late and the fitted base moves (printed, and checked to differ, so
/// the label is shown to matter).
#[test]
fn end_stamped_readings_with_their_label_give_the_start_stamped_run() {
    let d = network_scene();
    let m = tempfile::tempdir().unwrap();
    let start = m.path().join("start.csv");
    let text = String::from_utf8(one_minute_readings()).unwrap();
    std::fs::write(&start, &text).unwrap();
    // The same rows, each stamped 60 s later (the end of its minute).
    let end = m.path().join("end.csv");
    let shifted: String = text
        .lines()
        .map(|l| match l.split_once(',') {
            Some((t, rest)) if !l.starts_with('#') && t != "time_utc" => {
                let t: chrono::DateTime<chrono::Utc> = t.parse().unwrap();
                format!("{},{rest}\n", (t + chrono::Duration::seconds(60)).format("%Y-%m-%dT%H:%M:%SZ"))
            }
            _ => format!("{l}\n"),
        })
        .collect();
    std::fs::write(&end, shifted).unwrap();
    let labelled = |s: &str| format!("{}\n[measurements]\ntime_label = \"end\"\n", wrong_prior(s, Some(true)));
    let a = run_with(d, "label-start", &start, |s| wrong_prior(s, Some(true)));
    let b = run_with(d, "label-end", &end, labelled);
    let c = run_with(d, "label-wrong", &end, |s| wrong_prior(s, Some(true)));
    let last = |r: &Run| r.cbh.last().cloned().unwrap();
    eprintln!("base at the end: start-stamped {:?}, end-stamped and labelled {:?}, end-stamped read as starts {:?}", last(&a), last(&b), last(&c));
    assert_eq!(a.cbh, b.cbh, "the labelled end-stamped readings give another base");
    let forecasts = |tag: &str| std::fs::read(d.join(format!("out-{tag}")).join("forecasts.csv")).unwrap();
    assert!(forecasts("label-start") == forecasts("label-end"), "forecasts.csv differs");
    assert_ne!(a.cbh, c.cbh, "read a minute late, the readings gave the same base: the label would not matter");
}

/// The network's 1-minute means averaged in pairs into 2-minute means stamped at the start of
/// their two minutes (a coarser logger; rows of an incomplete pair dropped).
fn two_minute_readings() -> String {
    let text = String::from_utf8(one_minute_readings()).unwrap();
    let mut out = String::new();
    let mut pending: Option<(chrono::DateTime<chrono::Utc>, Vec<f64>)> = None;
    for l in text.lines() {
        let Some((t, rest)) = l.split_once(',').filter(|(t, _)| !l.starts_with('#') && *t != "time_utc") else {
            out.push_str(l);
            out.push('\n');
            continue;
        };
        let t: chrono::DateTime<chrono::Utc> = t.parse().unwrap();
        let v: Vec<f64> = rest.split(',').map(|x| x.parse().unwrap_or(f64::NAN)).collect();
        match pending.take() {
            Some((t0, v0)) if t - t0 == chrono::Duration::minutes(1) => {
                let mean: Vec<String> = v0.iter().zip(&v).map(|(a, b)| if (a + b).is_finite() { format!("{:.3}", 0.5 * (a + b)) } else { String::new() }).collect();
                out.push_str(&format!("{},{}\n", t0.format("%Y-%m-%dT%H:%M:%SZ"), mean.join(",")));
            }
            _ if t.timestamp() % 120 == 0 => pending = Some((t, v)),
            _ => {}
        }
    }
    out
}

/// Two-minute means (a logger coarser than a minute) with the prior 1.6 times the true base and
/// shadow timing as a check (the default): the check against shifted readings needs ten readings
/// per sensor (`ShadowParams::for_period`: 20 minutes of frames), and then the wrong prior is
/// replaced. Before the check scaled to the readings' period no fit was ever judged and the wrong
/// prior stayed to the end (`replay` noted the unchecked fits).
#[test]
fn two_minute_readings_replace_a_wrong_prior() {
    let d = network_scene();
    let m = tempfile::tempdir().unwrap();
    let path = m.path().join("two-minute.csv");
    std::fs::write(&path, two_minute_readings()).unwrap();
    let r = run_with(d, "shadow120", &path, |s| wrong_prior(s, None));
    let first = r.cbh.iter().position(|c| c.2 == "shadow_timing");
    let last = r.cbh.last().unwrap();
    eprintln!(
        "cbh-network, 2-minute means, prior {:.0} m: rejected {}, first frame on shadow timing {first:?} of {}; at the end {:.0} ± {:.0} m ({}; truth {TRUTH_M:.0} m); skill 5/10/15 min {:.3} {:.3} {:.3}",
        1.6 * TRUTH_M,
        r.rejected.0,
        r.cbh.len(),
        last.0,
        last.1,
        last.2,
        skill(&r.eval, 5),
        skill(&r.eval, 10),
        skill(&r.eval, 15)
    );
    assert!(r.rejected.0, "2-minute means never replaced a prior 1.6 times the true base");
    assert_eq!(last.2, "shadow_timing");
    assert!((last.0 / TRUTH_M - 1.0).abs() <= 0.1, "the base at the end {:.0} m, truth {TRUTH_M:.0} m", last.0);
}

/// Readings an hour late (a logger on local time, an hour ahead of UTC) must not override a
/// correctly configured base: the scene's readings taken an hour before the frames (the same
/// scene started an hour earlier), stamped an hour later. Shadow timing still fits heights from
/// them, but they do not follow the map's shadows better than the same readings shifted in time,
/// so the fits are held back and every frame keeps the configured base. Without the test against
/// shifted readings the fits rejected the true base (kept in 32 of 90 frames). Most of the fits
/// that disagree come before the window is full (not judged yet, so they cannot override); at
/// least one must have been judged and held back.
#[test]
fn readings_an_hour_late_do_not_override_the_configured_base() {
    let d = network_scene();
    let mut spec = scene("cbh-network").unwrap();
    let start: chrono::DateTime<chrono::Utc> = spec.start_utc.parse().unwrap();
    spec.start_utc = (start - chrono::Duration::minutes(60)).format("%Y-%m-%dT%H:%M:%SZ").to_string();
    spec.duration_min = 90.0;
    spec.pyranometer_network.as_mut().expect("cbh-network has a pyranometer network").sample_s = 60;
    let text = String::from_utf8(nephocast::synth::measurements_csv(&Scene::new(spec, 3).unwrap())).unwrap();
    let late: String = text
        .lines()
        .map(|l| match l.split_once(',') {
            Some((t, rest)) if !l.starts_with('#') && t != "time_utc" => {
                let t: chrono::DateTime<chrono::Utc> = t.parse().unwrap();
                format!("{},{rest}\n", (t + chrono::Duration::minutes(60)).format("%Y-%m-%dT%H:%M:%SZ"))
            }
            _ => format!("{l}\n"),
        })
        .collect();
    let m = tempfile::tempdir().unwrap();
    let path = m.path().join("late.csv");
    std::fs::write(&path, late).unwrap();
    let r = run_with(d, "hour-late", &path, |s| s.to_string());
    let kept = r.cbh.iter().filter(|c| c.2 == "configured" && c.0 == TRUTH_M).count();
    eprintln!("cbh-network, readings an hour late: configured base kept in {kept} of {} frames; rejected {}, disagreeing fits held back {}", r.cbh.len(), r.rejected.0, r.rejected.1);
    assert!(!r.rejected.0, "readings an hour late rejected the configured base");
    assert!(r.rejected.1 >= 1, "no disagreeing fit was judged and held back: the test against shifted readings was not exercised");
    assert_eq!(kept, r.cbh.len(), "a frame left the configured base: {:?}", r.cbh.iter().find(|c| c.2 != "configured"));
}
