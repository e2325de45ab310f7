//! The user's path on scenes from an independent renderer (not the project's own): `calibrate` on
//! a camera's clear day, then `replay` of its cloudy sequence and of the clear day, scored by the
//! scenes' own `score.py`, through the committed harness `tools/independent_scenes.py`.
//!
//! Data: `$NEPHOCAST_DATASETS/independent-scenes` (set by `.ci/run`; see that folder's README: the
//! scenes come with their truth and scorer and are not the project's to copy). The camera always
//! comes from `calibrate`; the truth camera is read only by the scorer. These scenes are a check,
//! not a tuning target: other cameras and scenes of that renderer are held back.
//!
//! Targets are the robustness issue's. A target not met yet is listed in [`KNOWN_SHORTFALLS`]
//! with its figure printed; the test fails when a listed shortfall starts meeting its target (so
//! the list stays true) and when an unlisted target is missed.
use std::path::PathBuf;
use std::process::Command;

use serde_json::Value;

/// Direction error p95 at zenith < 80° \[°\] (calibration from one clear day).
const TARGET_CAL_P95_DEG: f64 = 0.2;
/// Beyond this the calibration has regressed, shortfall or not \[°\].
const LOOSE_CAL_P95_DEG: f64 = 0.6;
/// Mean vector error of the filtered cloud motion, one layer \[m/s\].
const TARGET_MOTION_MPS: f64 = 0.5;
/// Pooled 5–15 min skill against smart persistence, as a share of the perfect-perception yardstick.
const TARGET_YARDSTICK_SHARE: f64 = 0.8;
/// Clear-day RMSE at every horizon \[W/m²\].
const TARGET_CLEAR_RMSE: f64 = 20.0;
/// Largest |MBE| over the horizons \[W/m²\].
const TARGET_MAX_MBE: f64 = 50.0;

/// Targets not met yet (metric names as printed).
const KNOWN_SHORTFALLS: &[&str] = &[
    "camera2 pooled skill",
    // A low arc of the sun (`calibration_from_a_low_sun`): 0.220° against 0.2°, the bound covering;
    // and beyond zenith 55° too few detections (8 / 4) for any calibration, even a held one.
    "camera2 (low sun, zenith > 45°) calibration p95",
    "camera1 (low sun, zenith > 55°) calibrates",
    "camera2 (low sun, zenith > 55°) calibrates",
    // Without pyranometers (`without_pyranometers`): the documented default transmittances.
    "camera1 without pyranometers largest |MBE|",
    "camera2 without pyranometers pooled skill",
];

fn check(metric: &str, ok: bool, figure: String, failures: &mut Vec<String>) {
    eprintln!("{metric}: {figure} -> {}", if ok { "meets" } else { "misses" });
    if KNOWN_SHORTFALLS.contains(&metric) {
        if ok {
            failures.push(format!("{metric} now meets its target ({figure}): remove it from KNOWN_SHORTFALLS"));
        }
    } else if !ok {
        failures.push(format!("{metric}: {figure}"));
    }
}

fn num(v: &Value, path: &[&str]) -> f64 {
    let mut x = v;
    for p in path {
        x = &x[*p];
    }
    x.as_f64().unwrap_or(f64::NAN)
}

/// The independent scenes and a Python able to score them, or why the test is skipped.
fn scenes_or_skip() -> Option<PathBuf> {
    let Some(root) = std::env::var_os("NEPHOCAST_DATASETS").map(PathBuf::from) else {
        eprintln!("skipped: NEPHOCAST_DATASETS is not set, so the independent scenes are absent (.ci/run sets it)");
        return None;
    };
    let scenes = root.join("independent-scenes");
    if !scenes.join("score.py").exists() {
        eprintln!("skipped: {} has no independent scenes", scenes.display());
        return None;
    }
    let py_ok = Command::new("python3").args(["-c", "import numpy, pandas, cv2, pvlib"]).status().map(|s| s.success()).unwrap_or(false);
    if !py_ok {
        eprintln!("skipped: python3 with numpy, pandas, opencv-python-headless and pvlib (the scenes' scorer) is absent (.ci/run installs them)");
        return None;
    }
    Some(scenes)
}

/// Whether the scenes folder holds `camera`'s clear day: tests that probe one named camera of the
/// shared set say so and skip where another set of scenes (e.g. a held-out one) has no such camera.
fn has_camera(scenes: &std::path::Path, camera: &str) -> bool {
    let found = std::fs::read_dir(scenes)
        .map(|d| d.flatten().any(|e| e.file_name().to_string_lossy().starts_with(&format!("{camera}-")) && e.file_name().to_string_lossy().ends_with("clear-day")))
        .unwrap_or(false);
    if !found {
        eprintln!("skipped: {} holds no {camera}-…clear-day folder (this check probes that camera of the shared scenes)", scenes.display());
    }
    found
}

/// One named camera of the shared scenes replayed under a probe (`extra`): the harness's JSON and
/// that camera's entry, its cloudy replay checked to have run; `None` (saying so) where the scenes
/// folder has no such camera.
fn probe_camera(scenes: &std::path::Path, camera: &str, extra: &[&str]) -> Option<(Value, Value)> {
    if !has_camera(scenes, camera) {
        return None;
    }
    let r = run_harness(scenes, &[&["--cameras", camera], extra].concat());
    let c = r["cameras"][0].clone();
    let rc = &c["replay_cloudy"];
    assert_eq!(rc["exit_code"].as_i64(), Some(0), "replay failed: {rc}");
    Some((r, c))
}

/// Runs the committed harness with the camera from `calibrate` and extra arguments; its JSON.
fn run_harness(scenes: &std::path::Path, extra: &[&str]) -> Value {
    let work = tempfile::tempdir().unwrap();
    let json = work.path().join("result.json");
    let out = Command::new("python3")
        .arg(concat!(env!("CARGO_MANIFEST_DIR"), "/tools/independent_scenes.py"))
        .args(["--bin", env!("CARGO_BIN_EXE_nephocast"), "--camera-from", "calibrate"])
        .args(extra)
        .arg("--scenes")
        .arg(scenes)
        .arg("--work")
        .arg(work.path().join("w"))
        .arg("--json")
        .arg(&json)
        .output()
        .unwrap();
    assert!(out.status.success(), "harness failed:\n{}\n{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    // Python writes NaN and Infinity, which JSON has not: read them as null (NaN below).
    let text = std::fs::read_to_string(&json).unwrap().replace("-Infinity", "null").replace("Infinity", "null").replace("NaN", "null");
    serde_json::from_str(&text).unwrap()
}

/// The calibration's checks for one camera (`label` names it in the metrics): written, not
/// mirrored, p95 within the target, and the stated bound covering the true error in every band.
fn check_calibration(label: &str, cal: &Value, failures: &mut Vec<String>) {
    assert_eq!(cal["exit_code"].as_i64(), Some(0), "{label}: calibrate failed: {cal}");
    let f = num(cal, &["fields", "f_px_per_rad"]);
    assert!(f > 0.0, "{label}: calibrate wrote a focal length of {f}");
    // Calibration against the true camera (the scorer's view).
    let p95 = num(cal, &["error", "deg_p95_z_lt_80"]);
    assert!(p95 <= LOOSE_CAL_P95_DEG, "{label}: calibration p95 {p95:.3}° beyond the loose bound {LOOSE_CAL_P95_DEG}°");
    check(&format!("{label} calibration p95"), p95 <= TARGET_CAL_P95_DEG, format!("{p95:.3}° at zenith < 80° (target {TARGET_CAL_P95_DEG}°)"), failures);
    // The stated bound covers the true error in every band it states.
    let bounds: Vec<[f64; 3]> = cal["fit"]["direction_bound_deg"]
        .as_array()
        .unwrap()
        .iter()
        .map(|b| {
            let v: Vec<f64> = b.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect();
            [v[0], v[1], v[2]]
        })
        .collect();
    for band in cal["error"]["bands"].as_array().unwrap() {
        let name = band["band"].as_str().unwrap();
        let (lo, hi): (f64, f64) = match name.split_once('-') {
            Some((a, b)) => (a.parse().unwrap(), b.parse().unwrap()),
            None => (0.0, name.trim_start_matches('<').parse().unwrap()),
        };
        let stated = bounds.iter().filter(|b| b[0] < hi && b[1] > lo).map(|b| b[2]).fold(0.0, f64::max);
        let truth = band["deg_p95"].as_f64().unwrap_or(f64::NAN);
        check(&format!("{label} bound covers the error at zenith {name}"), truth <= stated, format!("true p95 {truth:.3}°, stated bound {stated:.3}°"), failures);
    }
}

/// A user may have only part of a clear day: a morning, an afternoon, the middle of the day, or a
/// frame every 15 minutes. The calibration target holds on each (the harness's `--clear-subset`).
#[test]
fn calibration_from_part_of_the_clear_day() {
    let Some(scenes) = scenes_or_skip() else { return };
    let mut failures = vec![];
    for subset in ["morning", "afternoon", "every3"] {
        let r = run_harness(&scenes, &["--calibration-only", "--clear-subset", subset]);
        for c in r["cameras"].as_array().unwrap() {
            let label = format!("{} ({subset}, {} frames)", c["camera"].as_str().unwrap(), c["calibration"]["clear_frames"]);
            check_calibration(&label, &c["calibration"], &mut failures);
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A low arc of the sun, as a winter day gives (the harness's `--clear-subset low-sun`: only the
/// clear day's frames whose sun is lower than a zenith angle): every detection is bloomed, its
/// clipped glare leaning 1–4 px outward. Beyond zenith 45° (26 / 24 detections at 45–58°) the
/// calibration was off by a focal length 0.5–0.7 % long, p95 0.591° / 0.616°, beyond its stated
/// bound from zenith 40° on, while the glare-lean correction waited for 30 detections; it is now
/// made from 10 and kept when it lowers the held-out error by more than an RMS's sampling error
/// over that many: 0.045° / 0.220°, within the bound. Beyond zenith 50° the arc gives 16 / 14
/// detections, under the 20 a free fit needs: `calibrate` refused; it now fits them held to the
/// image circle (principal point at its centre, an ideal lens): 0.114° / 0.108°, within the bound.
/// Beyond zenith 55° (8 / 4) it refuses and says so, writing no file. Either way the stated bound
/// must cover the true error.
#[test]
fn calibration_from_a_low_sun() {
    let Some(scenes) = scenes_or_skip() else { return };
    let mut failures = vec![];
    for zenith in ["45", "50", "55"] {
        let r = run_harness(&scenes, &["--calibration-only", "--clear-subset", "low-sun", "--low-sun-zenith-deg", zenith]);
        for c in r["cameras"].as_array().unwrap() {
            let label = format!("{} (low sun, zenith > {zenith}°)", c["camera"].as_str().unwrap());
            let cal = &c["calibration"];
            eprintln!("{label}: {} frames", cal["clear_frames"]);
            let calibrated = cal["exit_code"].as_i64() == Some(0);
            // Listed where it is known to refuse, so that a calibration that starts to succeed
            // is reported and taken off the list.
            check(&format!("{label} calibrates"), calibrated, if calibrated { "a camera written".to_string() } else { cal["stderr"].as_str().unwrap_or("").trim().to_string() }, &mut failures);
            if calibrated {
                check_calibration(&label, cal, &mut failures);
            } else {
                // A refusal must say why and leave no file the replay could pick up.
                let err = cal["stderr"].as_str().unwrap_or("");
                eprintln!("{label}: refused: {}", err.trim());
                assert!(err.contains("sun detections") && err.contains("needed"), "{label}: calibrate failed without the detection count: {cal}");
                assert!(cal["fields"].is_null(), "{label}: a refused calibration left a file: {cal}");
            }
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A camera whose frames are mirrored left–right (east on the right with north up, as through a
/// mirror or a camera's flip setting): both clear days flipped (the harness's `--mirror`, OpenCV at
/// JPEG quality 95). `calibrate` finds the handedness and writes `mirrored = true`; before it did,
/// it stopped with "a tilt of 28.0°" on camera1 and wrote nothing. The calibration target holds, and
/// the upright frames at the same quality are found upright.
#[test]
fn calibration_from_mirrored_frames() {
    let Some(scenes) = scenes_or_skip() else { return };
    let mut failures = vec![];
    for (extra, mirrored) in [(&["--calibration-only", "--mirror"][..], true), (&["--calibration-only", "--jpeg-quality", "95"][..], false)] {
        let r = run_harness(&scenes, extra);
        for c in r["cameras"].as_array().unwrap() {
            let label = format!("{} ({})", c["camera"].as_str().unwrap(), if mirrored { "mirrored" } else { "upright, quality 95" });
            let out = c["calibration"]["stdout"].as_str().unwrap_or("");
            assert_eq!(c["calibration"]["fields"]["mirrored"].as_bool().unwrap_or(false), mirrored, "{label}: {out}");
            assert!(out.contains(if mirrored { "handedness     mirrored" } else { "handedness     upright" }), "{label}: {out}");
            check_calibration(&label, &c["calibration"], &mut failures);
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// Other geometries of the same cameras (the harness's `--rotate`, `--flip-vertical`, `--crop`;
/// both clear days changed alike, re-encoded at JPEG quality 95): mounted at another azimuth about
/// the optical axis (37°, resampled on the same 512² canvas), flipped upside down (found mirrored:
/// a flip is a mirror and a half turn), and sensors that cut the image circle: 4:3 (512×416),
/// 16:9 (512×288) and an off-centre 452×392. On the cut frames the sun's track leaves the frame;
/// a disc or glare the frame's edge cut gave detections leaning up to 20 px toward the edge, and
/// the glare of a sun just outside the frame one 100 px off: camera2 measured 1.660° (16:9) and
/// 0.485° (452×392). The calibration target holds on each, with the stated bound covering.
#[test]
fn calibration_from_other_geometries() {
    let Some(scenes) = scenes_or_skip() else { return };
    let mut failures = vec![];
    for (extra, mirrored) in [
        (&["--rotate", "37"][..], false),
        (&["--flip-vertical"][..], true),
        (&["--crop", "0,48,0,48"][..], false),
        (&["--crop", "0,112,0,112"][..], false),
        (&["--crop", "60,20,0,100"][..], false),
    ] {
        let r = run_harness(&scenes, &[&["--calibration-only"][..], extra].concat());
        for c in r["cameras"].as_array().unwrap() {
            let label = format!("{} ({})", c["camera"].as_str().unwrap(), extra.join(" "));
            assert_eq!(c["calibration"]["fields"]["mirrored"].as_bool().unwrap_or(false), mirrored, "{label}: {}", c["calibration"]["stdout"]);
            check_calibration(&label, &c["calibration"], &mut failures);
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A time stamp burnt into every frame as white text (the harness's `--stamp`): in the corner
/// outside the image circle, `calibrate` used to find no sun at all (0 detections); inside the circle
/// near its rim, the text entered the clear-sky library and camera2's pooled skill fell 0.58 → 0.52.
/// Now the calibration target holds with the stamp in the corner, and with it inside the circle
/// camera2's replay scores within 0.02 of the same frames without a stamp.
#[test]
fn time_stamps_burnt_into_the_frames() {
    let Some(scenes) = scenes_or_skip() else { return };
    let mut failures = vec![];
    let r = run_harness(&scenes, &["--calibration-only", "--stamp", "corner"]);
    for c in r["cameras"].as_array().unwrap() {
        check_calibration(&format!("{} (time stamp in the corner)", c["camera"].as_str().unwrap()), &c["calibration"], &mut failures);
    }
    if !has_camera(&scenes, "camera2") {
        assert!(failures.is_empty(), "{failures:#?}");
        return;
    }
    let pooled = |extra: &[&str]| {
        let r = run_harness(&scenes, &[&["--cameras", "camera2"], extra].concat());
        let c = &r["cameras"][0];
        (num(c, &["replay_cloudy", "forecast_summary", "skill_pooled_5_15"]), c["calibration"]["stdout"].as_str().unwrap_or("").to_string())
    };
    let (stamped, out) = pooled(&["--stamp", "inside"]);
    let (clean, _) = pooled(&["--jpeg-quality", "95"]);
    assert!(out.contains("masked as an obstruction"), "{out}");
    check("camera2 with a time stamp inside the image circle", (stamped - clean).abs() <= 0.02, format!("pooled skill {stamped:.3} against {clean:.3} without it"), &mut failures);
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A calibration day that is not wholly clear, and one with something fixed across the sun's track
/// (the harness's `--calibrate-with-cloudy N`: every N-th frame of the camera's cloudy scene given
/// to `calibrate` besides the clear day's, with cloud over, beside and around the sun; `--pole`:
/// a dark mast or branch painted across the clear day's sun track, hiding the sun in some frames
/// and cutting its glare in others, and `--reflection 1`: a small saturated blob that is not the
/// sun in every frame). Detections whose glare is not a clear sky's are dropped before the fit
/// (`calibrate::surround`). Before, on the shared scenes: cloudy frames every 6th 0.177° / 0.267°
/// (p95, camera1 / camera2), every one 0.332° / refused (the cloud-dimmed discs became the bloom
/// screening's bare disc and the clear day's were dropped as bloom); a mast at 0.3 / 0.55 / 0.8 of
/// the track 0.450° / 0.495°, 0.255° / 0.481°, 0.270° / 0.201°. Now every one meets the target
/// with the stated bound covering. Runs on every camera of the scenes folder.
#[test]
fn calibration_on_days_not_wholly_clear() {
    let Some(scenes) = scenes_or_skip() else { return };
    let mut failures = vec![];
    for extra in [
        &["--calibrate-with-cloudy", "6"][..],
        &["--calibrate-with-cloudy", "1"][..],
        &["--pole", "0.3:10"][..],
        &["--pole", "0.55:14", "--reflection", "1"][..],
        &["--pole", "0.8:8:40"][..],
    ] {
        let r = run_harness(&scenes, &[&["--calibration-only"][..], extra].concat());
        for c in r["cameras"].as_array().unwrap() {
            let label = format!("{} ({})", c["camera"].as_str().unwrap(), extra.join(" "));
            let out = c["calibration"]["stdout"].as_str().unwrap_or("");
            eprintln!("{label}: {}", out.lines().find(|l| l.contains("dropped for cloud")).unwrap_or("no detection dropped for cloud"));
            check_calibration(&label, &c["calibration"], &mut failures);
        }
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A camera set to compress harder than the scenes' own (quality ~90): both clear days re-encoded
/// at JPEG quality 75 (OpenCV, the harness's `--jpeg-quality`). `calibrate` reads the frames'
/// chroma table and judges the sun's clipped core by its luma (`calibrate::clip`); judged by every
/// channel, camera1 measured 0.278° here. The calibration target holds.
#[test]
fn calibration_from_frames_compressed_harder() {
    let Some(scenes) = scenes_or_skip() else { return };
    let r = run_harness(&scenes, &["--calibration-only", "--jpeg-quality", "75"]);
    let mut failures = vec![];
    for c in r["cameras"].as_array().unwrap() {
        let label = format!("{} (JPEG quality 75)", c["camera"].as_str().unwrap());
        let out = c["calibration"]["stdout"].as_str().unwrap_or("");
        assert!(out.contains("clipped core judged by luma"), "{label}: {out}");
        check_calibration(&label, &c["calibration"], &mut failures);
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

#[test]
fn calibrate_then_replay_on_independent_scenes() {
    let Some(scenes) = scenes_or_skip() else { return };
    let r = run_harness(&scenes, &[]);
    let mut failures = vec![];
    for c in r["cameras"].as_array().unwrap() {
        let cam = c["camera"].as_str().unwrap();
        check_calibration(cam, &c["calibration"], &mut failures);
        let rc = &c["replay_cloudy"];
        assert_eq!(rc["exit_code"].as_i64(), Some(0), "{cam}: replay failed");
        let mv = num(rc, &["motion_summary", "mean_vector_error_ms"]);
        check(&format!("{cam} motion"), mv <= TARGET_MOTION_MPS, format!("mean vector error {mv:.2} m/s (target {TARGET_MOTION_MPS})"), &mut failures);
        let fs = &rc["forecast_summary"];
        let pooled = num(fs, &["skill_pooled_5_15"]);
        let yard = num(&r, &["yardsticks", c["cloudy_scene"].as_str().unwrap(), "pooled"]);
        check(
            &format!("{cam} pooled skill"),
            pooled >= TARGET_YARDSTICK_SHARE * yard,
            format!("5–15 min {pooled:.3} against {TARGET_YARDSTICK_SHARE} × yardstick {yard:.2} = {:.3}", TARGET_YARDSTICK_SHARE * yard),
            &mut failures,
        );
        let (r1, sp1) = (num(fs, &["rmse_1"]), num(fs, &["rmse_sp_1"]));
        check(&format!("{cam} 1-min RMSE below smart persistence"), r1 < sp1, format!("{r1:.1} against {sp1:.1} W/m²"), &mut failures);
        let mbe = num(fs, &["max_abs_mbe"]);
        check(&format!("{cam} largest |MBE|"), mbe <= TARGET_MAX_MBE, format!("{mbe:.1} W/m² (target {TARGET_MAX_MBE})"), &mut failures);
        let cs = &c["replay_clear"]["forecast_summary"];
        let clear = ["rmse_1", "rmse_5", "rmse_10", "rmse_15"].iter().map(|k| num(cs, &[k])).fold(0.0, f64::max);
        check(&format!("{cam} clear-day RMSE"), clear <= TARGET_CLEAR_RMSE, format!("largest over 1/5/10/15 min {clear:.1} W/m² (target {TARGET_CLEAR_RMSE})"), &mut failures);
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// The same path for a plant without pyranometers (`--no-measurements`: nothing to tune the
/// transmittances from, as the scenes' `input/` holds none): the forecast targets with the
/// documented defaults. Calibration and motion do not depend on the readings and are checked above.
#[test]
fn without_pyranometers() {
    let Some(scenes) = scenes_or_skip() else { return };
    let r = run_harness(&scenes, &["--no-measurements"]);
    let mut failures = vec![];
    for c in r["cameras"].as_array().unwrap() {
        let cam = c["camera"].as_str().unwrap();
        let rc = &c["replay_cloudy"];
        assert_eq!(rc["exit_code"].as_i64(), Some(0), "{cam}: replay failed");
        let fs = &rc["forecast_summary"];
        let pooled = num(fs, &["skill_pooled_5_15"]);
        let yard = num(&r, &["yardsticks", c["cloudy_scene"].as_str().unwrap(), "pooled"]);
        let name = |m: &str| format!("{cam} without pyranometers {m}");
        check(
            &name("pooled skill"),
            pooled >= TARGET_YARDSTICK_SHARE * yard,
            format!("5–15 min {pooled:.3} against {TARGET_YARDSTICK_SHARE} × yardstick {yard:.2} = {:.3}", TARGET_YARDSTICK_SHARE * yard),
            &mut failures,
        );
        let (r1, sp1) = (num(fs, &["rmse_1"]), num(fs, &["rmse_sp_1"]));
        check(&name("1-min RMSE below smart persistence"), r1 < sp1, format!("{r1:.1} against {sp1:.1} W/m²"), &mut failures);
        let mbe = num(fs, &["max_abs_mbe"]);
        check(&name("largest |MBE|"), mbe <= TARGET_MAX_MBE, format!("{mbe:.1} W/m² (target {TARGET_MAX_MBE})"), &mut failures);
    }
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A camera whose white balance changed between the clear day it was calibrated from and the day
/// it forecasts (the harness's `--cloudy-gain 1.08,1,0.93` on camera1's cloudy frames only: red
/// ×1.08, blue ×0.93, so every clear ratio ×1.161), without pyranometers. The colour balance is
/// followed (`segment.follow_colour_balance`): `replay` names the factor it read, and the
/// forecast keeps the skill target. Measured 2026-12-05: factor 1.16, pooled 0.524 (0.8 ×
/// yardstick 0.504), largest |MBE| 121 W/m²; with the setting off pooled 0.23, largest |MBE| 356.
#[test]
fn a_changed_white_balance_is_followed() {
    let Some(scenes) = scenes_or_skip() else { return };
    let Some((r, c)) = probe_camera(&scenes, "camera1", &["--no-measurements", "--cloudy-gain", "1.08,1,0.93"]) else { return };
    let mut failures = vec![];
    let rc = &c["replay_cloudy"];
    let stdout = rc["stdout"].as_str().unwrap_or_default();
    let factor = stdout
        .lines()
        .find_map(|l| l.split("clear sky read red/blue ×").nth(1))
        .and_then(|t| t.split_whitespace().next())
        .and_then(|t| t.parse::<f64>().ok());
    let truth = 1.08 / 0.93;
    assert!(factor.is_some_and(|f| (f - truth).abs() <= 0.03), "the colour-balance note should read ×{truth:.2} (±0.03); replay said:\n{stdout}");
    let fs = &rc["forecast_summary"];
    let pooled = num(fs, &["skill_pooled_5_15"]);
    let yard = num(&r, &["yardsticks", c["cloudy_scene"].as_str().unwrap(), "pooled"]);
    check(
        "camera1 with a warmer white balance pooled skill",
        pooled >= TARGET_YARDSTICK_SHARE * yard,
        format!("5–15 min {pooled:.3} against {TARGET_YARDSTICK_SHARE} × yardstick {yard:.2} = {:.3}", TARGET_YARDSTICK_SHARE * yard),
        &mut failures,
    );
    let mbe = num(fs, &["max_abs_mbe"]);
    assert!(mbe < 200.0, "largest |MBE| {mbe:.1} W/m²: the balance is not followed (356 with the setting off)");
    assert!(failures.is_empty(), "{failures:#?}");
}

/// A camera exposed brighter on the day it forecasts than on the clear day it was calibrated from
/// (the harness's `--cloudy-gain 1.2,1.2,1.2` on camera2's cloudy frames only; the pixels it
/// lifts past 255 clip), without pyranometers. The clear sky's blue then clips near the horizon
/// and around the glare, and grey cloud's blue clips where the clear day's sky clipped; both are
/// judged against the clear sky as it reads at the frame's exposure
/// (`segment.exposure_past_clipping`). Not yet the skill target (known shortfall); the 1-minute
/// forecast must beat smart persistence and the bias stay within the target. Measured
/// 2026-12-05: pooled 0.31, 1-min RMSE 132.8 against persistence's 165.6 W/m², largest |MBE|
/// 14.6 W/m²; before the setting pooled −0.08, 1-min RMSE 225.0, largest |MBE| 118.2 W/m².
#[test]
fn a_brighter_exposure_is_judged_past_the_clipping() {
    let Some(scenes) = scenes_or_skip() else { return };
    let Some((r, c)) = probe_camera(&scenes, "camera2", &["--no-measurements", "--cloudy-gain", "1.2,1.2,1.2"]) else { return };
    let fs = &c["replay_cloudy"]["forecast_summary"];
    let (pooled, r1, sp1, mbe) = (num(fs, &["skill_pooled_5_15"]), num(fs, &["rmse_1"]), num(fs, &["rmse_sp_1"]), num(fs, &["max_abs_mbe"]));
    let yard = num(&r, &["yardsticks", c["cloudy_scene"].as_str().unwrap(), "pooled"]);
    let mut failures = vec![];
    check("camera2 exposed x1.2: 1-min RMSE below smart persistence", r1 < sp1, format!("{r1:.1} against {sp1:.1} W/m²"), &mut failures);
    check("camera2 exposed x1.2: largest |MBE|", mbe <= TARGET_MAX_MBE, format!("{mbe:.1} W/m² (target {TARGET_MAX_MBE})"), &mut failures);
    // Reported, not asserted: the skill target is not met under this exposure change yet.
    eprintln!(
        "{} camera2 exposed x1.2 pooled skill: 5–15 min {pooled:.3} against {TARGET_YARDSTICK_SHARE} × yardstick {yard:.2} = {:.3}",
        if pooled >= TARGET_YARDSTICK_SHARE * yard { "meets:" } else { "known shortfall:" },
        TARGET_YARDSTICK_SHARE * yard
    );
    assert!(pooled > 0.15, "pooled skill {pooled:.3}: the exposure is not judged past the clipping (−0.08 with the setting off)");
    assert!(failures.is_empty(), "{failures:#?}");
}

/// The same camera exposed darker on the day it forecasts (`--cloudy-gain 0.8,0.8,0.8`, camera2's
/// cloudy frames only), with pyranometers. The dark-cloud test applies where the library's own
/// brightness is bright enough, whatever the exposure (`segment.exposure_past_clipping`); before,
/// the floor applied to it times the exposure and the test was off over most of the far field.
/// Measured 2026-12-05: pooled 0.43 (0.39 before), 1-min RMSE 108.3 against persistence's 165.6
/// W/m², largest |MBE| 55.2 W/m² at 10 min (26.2 before): reported as a known shortfall.
#[test]
fn a_darker_exposure_keeps_the_dark_cloud_test() {
    let Some(scenes) = scenes_or_skip() else { return };
    let Some((_, c)) = probe_camera(&scenes, "camera2", &["--cloudy-gain", "0.8,0.8,0.8"]) else { return };
    let fs = &c["replay_cloudy"]["forecast_summary"];
    let (pooled, r1, sp1, mbe) = (num(fs, &["skill_pooled_5_15"]), num(fs, &["rmse_1"]), num(fs, &["rmse_sp_1"]), num(fs, &["max_abs_mbe"]));
    let mut failures = vec![];
    check("camera2 exposed x0.8: 1-min RMSE below smart persistence", r1 < sp1, format!("{r1:.1} against {sp1:.1} W/m²"), &mut failures);
    eprintln!("{} camera2 exposed x0.8: largest |MBE| {mbe:.1} W/m² (target {TARGET_MAX_MBE}); pooled {pooled:.3}", if mbe <= TARGET_MAX_MBE { "meets:" } else { "known shortfall:" });
    assert!(pooled >= 0.39, "pooled skill {pooled:.3} below the 0.39 of before the dark test followed the library's brightness");
    assert!(failures.is_empty(), "{failures:#?}");
}
