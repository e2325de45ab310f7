//! End to end on synthetic scenes with known truth: render, replay, score against the truth.
//!
//! Targets (the pipeline's acceptance figures): segmentation ≥ 95 % correct (zenith < 70°, outside
//! 10° around the sun) and ≥ 90 % in the 5–15° circumsolar ring; single-layer motion within 0.5 m/s
//! and 5°; plant-mean GHI skill against smart persistence ≥ 0.30 at 5, 10 and 15 minutes on
//! broken-cloud scenes and ≥ 0 (no worse than persistence) on clear and overcast scenes; on
//! broken-cloud scenes the P10–P90 band covers 70–90 % of the truth at 5–15 minutes and ramps at
//! 5 minutes' lead are found with POD ≥ 0.8 and FAR ≤ 0.3.
//! Shortfalls that are known are listed in `KNOWN_SHORTFALLS`: the test checks they still fall short
//! (so the list is kept honest) and prints every figure.
use std::collections::BTreeMap;
use std::path::Path;

use nephocast::replay::{ReplayOptions, replay};
use nephocast::synth::{Scene, scene, write_sequence};
use nephocast::verify::{Evaluation, evaluate};

/// (scene, metric) pairs that do not yet meet their target (none at present: broken cumulus band
/// coverage at 5 min, 0.93, came within its target, 0.88, when the ensemble's cloud base spread took
/// the configured base's 30 % prior uncertainty; see `nephocast::cbh`).
const KNOWN_SHORTFALLS: &[(&str, &str)] = &[];

fn run(name: &str, minutes: f64, spec_edit: impl Fn(&mut nephocast::synth::SceneSpec)) -> Evaluation {
    let d = tempfile::tempdir().unwrap();
    let mut spec = scene(name).unwrap();
    spec.duration_min = minutes;
    spec_edit(&mut spec);
    let s = Scene::new(spec, 3).unwrap();
    write_sequence(&s, d.path(), false).unwrap();
    let out = d.path().join("out");
    let opts = ReplayOptions {
        site: d.path().join("site.toml"),
        frames: d.path().join("frames"),
        out: out.clone(),
        measurements: Some(d.path().join("measurements.csv")),
        overlays_every: 0,
        progress: false,
    };
    let sum = replay(&opts).unwrap();
    assert_eq!(sum.counters.rejected.values().sum::<usize>(), 0, "{name}: frames rejected {:?}", sum.counters.rejected);
    let e = evaluate(d.path(), &out).unwrap();
    print(name, &e);
    same_figures(name, &e);
    e
}

/// Every figure of a scene, to compare a change that should not alter results (a refactor) with the
/// record in `tests/fixtures/figures/<scene>.json`. `NEPHOCAST_RECORD_FIGURES=1` writes the record
/// instead; a change that alters results on purpose re-records it and says why in its commit.
fn figures(e: &Evaluation) -> BTreeMap<String, f64> {
    let mut f = BTreeMap::new();
    f.insert("segmentation_accuracy".to_string(), e.segmentation.accuracy);
    f.insert("segmentation_circumsolar_accuracy".to_string(), e.segmentation.circumsolar_accuracy);
    f.insert("motion_speed_error_mps".to_string(), e.motion.speed_error_mps);
    f.insert("motion_direction_error_deg".to_string(), e.motion.direction_error_deg);
    for h in &e.plant {
        f.insert(format!("rmse_wm2_{}s", h.horizon_s), h.rmse_wm2);
        f.insert(format!("mbe_wm2_{}s", h.horizon_s), h.mbe_wm2);
        f.insert(format!("skill_{}s", h.horizon_s), h.skill);
    }
    for b in &e.bands {
        f.insert(format!("band_coverage_{}s", b.horizon_s), b.coverage);
    }
    if let Some(r) = &e.ramps {
        f.insert("ramp_pod".to_string(), r.pod);
        f.insert("ramp_far".to_string(), r.far);
    }
    f
}

fn same_figures(name: &str, e: &Evaluation) {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/figures").join(format!("{name}.json"));
    let now = figures(e);
    if std::env::var_os("NEPHOCAST_RECORD_FIGURES").is_some() {
        std::fs::create_dir_all(path.parent().unwrap()).unwrap();
        std::fs::write(&path, serde_json::to_string_pretty(&now).unwrap()).unwrap();
        return;
    }
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e} (record it with NEPHOCAST_RECORD_FIGURES=1)", path.display()));
    let before: BTreeMap<String, Option<f64>> = serde_json::from_str(&text).unwrap();
    let mut changed = vec![];
    for (k, v) in &now {
        let b = before.get(k).copied().flatten().unwrap_or(f64::NAN);
        // NaN (nothing to score) is recorded as null and must stay so.
        let same = (v.is_nan() && b.is_nan()) || (v - b).abs() <= 1e-6 * (1.0 + b.abs());
        if !same {
            changed.push(format!("{k}: {b} -> {v}"));
        }
    }
    assert!(before.len() == now.len() && changed.is_empty(), "{name}: figures differ from {}:\n{}", path.display(), changed.join("\n"));
}

fn print(name: &str, e: &Evaluation) {
    let sk = |m: u32| e.plant.iter().find(|h| h.horizon_s == m * 60).map(|h| h.skill).unwrap_or(f64::NAN);
    let cov = |m: u32| e.bands.iter().find(|b| b.horizon_s == m * 60).map(|b| b.coverage).unwrap_or(f64::NAN);
    if let Some(r) = &e.ramps {
        eprintln!("{name:<20} bands 5/10/15 min {:.2} {:.2} {:.2} | ramps POD {:.2} FAR {:.2} CSI {:.2} ({} in truth)", cov(5), cov(10), cov(15), r.pod, r.far, r.csi, r.truth_ramps);
    }
    eprintln!(
        "{name:<20} seg {:.3} ring {:.3} | motion speed err {:.2} m/s dir err {:.1}° | skill 5/10/15 min {:.3} {:.3} {:.3}",
        e.segmentation.accuracy,
        e.segmentation.circumsolar_accuracy,
        e.motion.speed_error_mps,
        e.motion.direction_error_deg,
        sk(5),
        sk(10),
        sk(15)
    );
}

fn check(name: &str, metric: &str, ok: bool, figure: String) {
    let known = KNOWN_SHORTFALLS.contains(&(name, metric));
    if known {
        assert!(!ok, "{name} {metric} now meets its target ({figure}): remove it from KNOWN_SHORTFALLS");
        eprintln!("  known shortfall: {name} {metric}: {figure}");
    } else {
        assert!(ok, "{name} {metric} misses its target: {figure}");
    }
}

fn check_scene(name: &str, e: &Evaluation, broken: bool) {
    let s = &e.segmentation;
    check(name, "segmentation", s.accuracy >= 0.95, format!("{:.3}", s.accuracy));
    check(name, "circumsolar", s.circumsolar_accuracy >= 0.90 || s.circumsolar_accuracy.is_nan(), format!("{:.3}", s.circumsolar_accuracy));
    let m = &e.motion;
    if m.frames > 0 {
        check(name, "motion", m.speed_error_mps <= 0.5 && m.direction_error_deg <= 5.0, format!("{:.2} m/s, {:.1}°", m.speed_error_mps, m.direction_error_deg));
    }
    // Each metric is judged over the 5, 10 and 15 minute horizons together.
    let target = if broken { 0.30 } else { 0.0 };
    let skills: Vec<f64> = [5u32, 10, 15].iter().map(|m| e.plant.iter().find(|h| h.horizon_s == m * 60).unwrap().skill).collect();
    check(name, "skill", skills.iter().all(|s| *s >= target), format!("5/10/15 min: {:.3?} (target {target})", skills));
    if broken {
        let cover: Vec<f64> = [5u32, 10, 15].iter().map(|m| e.bands.iter().find(|b| b.horizon_s == m * 60).unwrap().coverage).collect();
        check(name, "bands", cover.iter().all(|c| (0.70..=0.90).contains(c)), format!("P10–P90 coverage at 5/10/15 min: {:.2?} (target 0.70–0.90)", cover));
    }
    if broken {
        // Ramps of at least the threshold in the truth, at 5 minutes' lead (±2 min, probability ≥ 0.5).
        let r = e.ramps.as_ref().unwrap();
        check(name, "ramps", r.pod >= 0.8 && r.far <= 0.3, format!("POD {:.2} FAR {:.2} ({} truth ramps)", r.pod, r.far, r.truth_ramps));
    }
}

#[test]
fn broken_cumulus_fast() {
    let e = run("broken-cumulus-fast", 30.0, |_| {});
    check_scene("broken-cumulus-fast", &e, true);
}

#[test]
fn scattered_slow() {
    let e = run("scattered-slow", 30.0, |_| {});
    check_scene("scattered-slow", &e, true);
}

#[test]
fn overcast_breaking() {
    let e = run("overcast-breaking", 30.0, |_| {});
    check_scene("overcast-breaking", &e, false);
}

#[test]
fn two_layers() {
    let e = run("two-layers", 30.0, |_| {});
    check_scene("two-layers", &e, true);
    // Both layers are found (the higher one's apparent vector on the lower plane).
    let share = e.motion.second_layer_found_share.unwrap();
    assert!(share >= 0.8, "second layer found in {share:.2} of frames");
}

/// A clear sky: the forecast is no worse than smart persistence (which is exact here, the truth being
/// the clear-sky model itself) within 2 % of the mean clear-sky GHI, and nothing is called cloud.
#[test]
fn clear_sky_no_worse_than_persistence() {
    let e = run("clear-day", 20.0, |s| {
        s.start_utc = "2026-06-14T08:30:00Z".into();
        s.frame_step_s = 20.0;
        s.truth_mask_every = 5;
    });
    for h in &e.plant {
        let tol = 0.02 * h.mean_observed_wm2;
        assert!(h.rmse_wm2 <= h.rmse_persistence_wm2 + tol, "horizon {} s: RMSE {} vs persistence {}", h.horizon_s, h.rmse_wm2, h.rmse_persistence_wm2);
    }
    assert!(e.segmentation.accuracy >= 0.99, "clear sky accuracy {}", e.segmentation.accuracy);
}

#[test]
fn demo_data_replays_with_skill() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let d = tempfile::tempdir().unwrap();
    let opts = ReplayOptions {
        site: root.join("site.toml"),
        frames: root.join("frames"),
        out: d.path().to_path_buf(),
        measurements: Some(root.join("measurements.csv")),
        overlays_every: 30,
        progress: false,
    };
    replay(&opts).unwrap();
    let e = evaluate(&root, d.path()).unwrap();
    print("larkspur-demo", &e);
    same_figures("larkspur-demo", &e);
    check_scene("larkspur-demo", &e, true);
    assert!(d.path().join("overlays").read_dir().unwrap().count() >= 3);
}
