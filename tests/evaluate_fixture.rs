//! `evaluate --measurements` on small hand-made replay outputs and a measurements CSV, with every
//! score worked out by hand in the comments and asserted exactly (to 1e-9).
//!
//! The fixture: the demo site (Larkspur Flats, 37.4° N, 14 June 2026, about 10:00 UTC, sun high),
//! one pyranometer (`north-fixed`) with 1-minute means stamped at the start of their minute. With
//! `i` the minute after 10:00 UTC, the reading is
//! * `700 + i mod 3` for `i ≤ 10` (from 09:50; `i mod 3` taken as the Euclidean remainder),
//! * `400 + i mod 3` for `11 ≤ i ≤ 20`,
//! * `700 + i mod 3` for `i ≥ 21` (to 10:40),
//!
//! so it drops by 299 W/m² over the minute 10:10–10:11 and rises by 298 W/m² over 10:20–10:21;
//! every other 1-minute change is 1 or 2 W/m² (and no value repeats, so nothing is stuck).
use std::path::{Path, PathBuf};

use nephocast::config::Site;
use nephocast::measured::evaluate_measured;

const BIN: &str = env!("CARGO_BIN_EXE_nephocast");

fn reading(i: i64) -> f64 {
    let base = if (11..=20).contains(&i) { 400.0 } else { 700.0 };
    base + i.rem_euclid(3) as f64
}

/// `HH:MM` at minute `i` after 10:00 UTC, as an RFC 3339 time.
fn at(i: i64) -> String {
    let t = chrono::DateTime::parse_from_rfc3339("2026-06-14T10:00:00Z").unwrap() + chrono::Duration::minutes(i);
    t.with_timezone(&chrono::Utc).format("%Y-%m-%dT%H:%M:%SZ").to_string()
}

/// The demo site file copied to `dir` (calibration path made absolute) with `extra` appended.
fn site_file(dir: &Path, extra: &str) -> PathBuf {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let text = std::fs::read_to_string(demo.join("site.toml")).unwrap();
    let cal = demo.join("calibration").join("larkspur-sky1.toml");
    let text = text.replace("calibration = \"calibration/larkspur-sky1.toml\"", &format!("calibration = {:?}", cal.display().to_string()));
    assert!(text.contains(&cal.display().to_string()));
    let p = dir.join("site.toml");
    std::fs::write(&p, format!("{text}\n{extra}")).unwrap();
    p
}

fn measurements(dir: &Path) -> PathBuf {
    let mut s = String::from("time_utc,ghi_north-fixed_wm2\n");
    for i in -10..=40 {
        s += &format!("{},{}\n", at(i), reading(i));
    }
    let p = dir.join("measurements.csv");
    std::fs::write(&p, s).unwrap();
    p
}

const FC_HEADER: &str = "issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2,ghi_p10_wm2,ghi_p90_wm2,ghi_clear_wm2\n";

/// RMSE, MBE, MAE, smart persistence, skill, CRPS and P10–P90 coverage of three issue times
/// (10:00, 10:05, 10:10) at 5 and 10 minutes.
///
/// Smart persistence = newest completed reading at the issue (the minute before it) / clear-sky GHI
/// at the issue (the horizon-0 row: 800) × clear-sky GHI at the target (840 at 5 min, 880 at 10):
/// * 10:00: newest 09:59 = 702 → 702 × 840/800 = 737.1 (5 min), 702 × 880/800 = 772.2 (10 min)
/// * 10:05: newest 10:04 = 701 → 736.05, 771.1
/// * 10:10: newest 10:09 = 700 → 735, 770
///
/// Measured at the targets: 5 min: 10:05 = 702, 10:10 = 701, 10:15 = 400;
/// 10 min: 10:10 = 701, 10:15 = 400, 10:20 = 402.
///
/// Forecasts (error = forecast − measured): 5 min: 690 (−12), 711 (+10), 430 (+30);
/// 10 min: 705 (+4), 420 (+20), 392 (−10).
#[test]
fn hand_computed_scores_against_measurements() {
    let d = tempfile::tempdir().unwrap();
    let site = Site::load(&site_file(d.path(), "")).unwrap();
    let meas = measurements(d.path());
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    // (issue minute, horizon s, forecast)
    let fc = [(0, 300, 690.0), (0, 600, 705.0), (5, 300, 711.0), (5, 600, 420.0), (10, 300, 430.0), (10, 600, 392.0)];
    let mut f = String::from(FC_HEADER);
    let mut ens = String::from("issue_time_utc,horizon_s,member,plant_ghi_wm2\n");
    for i in [0, 5, 10] {
        f += &format!("{},{},0,plant,700,,,800\n", at(i), at(i));
    }
    for (i, h, g) in fc {
        let clear = if h == 300 { 840 } else { 880 };
        // P10 and P90 15 W/m² either side of the forecast.
        f += &format!("{},{},{h},plant,{g},{},{},{clear}\n", at(i), at(i + h / 60), g - 15.0, g + 15.0);
        // Two members, 10 W/m² either side of the forecast.
        ens += &format!("{},{h},0,{}\n{},{h},1,{}\n", at(i), g - 10.0, at(i), g + 10.0);
    }
    std::fs::write(out.join("forecasts.csv"), f).unwrap();
    std::fs::write(out.join("ensemble_plant.csv"), ens).unwrap();
    let e = evaluate_measured(&site, &out, &meas).unwrap();
    assert!(e.excluded.is_empty(), "{:?}", e.excluded);
    assert!(e.screened.is_empty(), "{:?}", e.screened);
    // Ramps are found in GHI on both sides (no plant power measured); the forecast rows hold 0, 5
    // and 10 minutes only, so no 1-minute window of the forecast has both ends: no forecast ramp.
    assert_eq!(e.ramp_quantity, nephocast::measured::Quantity::Ghi);
    assert!(e.ramps.iter().all(|r| r.hits == 0 && r.false_alarms == 0), "{:?}", e.ramps);
    assert_eq!(e.plant.len(), 2);
    let close = |a: f64, b: f64, what: &str| assert!((a - b).abs() < 1e-9, "{what}: {a} against {b} by hand");
    let (h5, h10) = (&e.plant[0], &e.plant[1]);
    assert_eq!((h5.horizon_s, h5.n, h10.horizon_s, h10.n), (300, 3, 600, 3));

    // 5 min: RMSE = √((12² + 10² + 30²)/3) = √(1144/3); MAE = (12 + 10 + 30)/3 = 52/3;
    // MBE = (−12 + 10 + 30)/3 = 28/3.
    close(h5.rmse_wm2, (1144.0f64 / 3.0).sqrt(), "5-min RMSE");
    close(h5.mae_wm2, 52.0 / 3.0, "5-min MAE");
    close(h5.mbe_wm2, 28.0 / 3.0, "5-min MBE");
    // Persistence errors: 737.1 − 702 = 35.1, 736.05 − 701 = 35.05, 735 − 400 = 335;
    // RMSE_p = √((35.1² + 35.05² + 335²)/3) = √((1232.01 + 1228.5025 + 112225)/3) = √(114685.5125/3).
    let rp5 = (114_685.512_5_f64 / 3.0).sqrt();
    close(h5.rmse_persistence_wm2, rp5, "5-min persistence RMSE");
    // Skill = 1 − RMSE / RMSE_p = 1 − √1144 / √114685.5125 ≈ 0.9000.
    close(h5.skill, 1.0 - (1144.0f64 / 3.0).sqrt() / rp5, "5-min skill");
    // CRPS of two members a = f − 10, b = f + 10 is (|a − y| + |b − y|)/2 − |a − b|/4
    // (E|X − y| − ½E|X − X′| with E|X − X′| = 2·20/4 = 10): 10:00 (680, 700 | 702): 12 − 5 = 7;
    // 10:05 (701, 721 | 701): 10 − 5 = 5; 10:10 (420, 440 | 400): 30 − 5 = 25; mean 37/3.
    close(h5.crps_wm2, 37.0 / 3.0, "5-min CRPS");
    // P10–P90 = f ± 15: [675, 705] ∋ 702, [696, 726] ∋ 701, [415, 445] ∌ 400 → 2/3.
    close(h5.coverage_p10_p90, 2.0 / 3.0, "5-min P10–P90 coverage");

    // 10 min: RMSE = √((4² + 20² + 10²)/3) = √172; MAE = 34/3; MBE = (4 + 20 − 10)/3 = 14/3.
    close(h10.rmse_wm2, 172.0f64.sqrt(), "10-min RMSE");
    close(h10.mae_wm2, 34.0 / 3.0, "10-min MAE");
    close(h10.mbe_wm2, 14.0 / 3.0, "10-min MBE");
    // Persistence errors: 772.2 − 701 = 71.2, 771.1 − 400 = 371.1, 770 − 402 = 368;
    // RMSE_p = √((5069.44 + 137715.21 + 135424)/3) = √(278208.65/3).
    let rp10 = (278_208.65_f64 / 3.0).sqrt();
    close(h10.rmse_persistence_wm2, rp10, "10-min persistence RMSE");
    close(h10.skill, 1.0 - 172.0f64.sqrt() / rp10, "10-min skill");
    // CRPS: 10:00 (695, 715 | 701): 10 − 5 = 5; 10:05 (410, 430 | 400): 20 − 5 = 15;
    // 10:10 (382, 402 | 402): 10 − 5 = 5; mean 25/3.
    close(h10.crps_wm2, 25.0 / 3.0, "10-min CRPS");
    // [690, 720] ∋ 701, [405, 435] ∌ 400, [377, 407] ∋ 402 → 2/3.
    close(h10.coverage_p10_p90, 2.0 / 3.0, "10-min P10–P90 coverage");
}

/// The forecast plant-mean GHI of one issue time at horizons 0 … 15 min: 700 W/m² from horizon 0,
/// then each `(h, v)` sets the value from horizon `h` on.
fn series(steps: &[(i64, f64)]) -> Vec<(i64, f64)> {
    (0..=15).map(|h| (h, steps.iter().filter(|s| s.0 <= h).map(|s| s.1).next_back().unwrap_or(700.0))).collect()
}

/// Ramp POD, FAR and CSI under `[evaluation.ramps]` (10 % of capacity = 100 W/m² over 1 minute,
/// leads 5 and 10 min matched within 1 minute, probability ≥ 0.5), in GHI on both sides (the
/// measurements hold pyranometers only).
///
/// Measured ramps: down starting 10:10 (−299 W/m²), up starting 10:20 (+298 W/m²); no other.
///
/// Issue times 10:00, 10:05, 10:10, 10:15, 10:30. The forecast plant-mean GHI (`forecasts.csv`,
/// horizons 0 … 15 min, 700 W/m² unless set; every change is 200 W/m², a ramp starting at the
/// window before it, i.e. one minute earlier):
/// * 10:00: 500 from 6, 300 from 11, 500 from 13 → down at lead 5, down at 10, up at 12 (12 is
///   more than 1 min from either lead);
/// * 10:05: 500 from 6, 700 from 12 → down at 5, up at 11;
/// * 10:10: 900 from 6, 700 from 11 → up at 5, down at 10; this issue has 10 ensemble members
///   (`ensemble_plant.csv`): 3 follow the central forecast, 7 only its drop at 10 (900 … 700 from
///   11 on as 700 … 500), so an up ramp near 5 min has probability 3/10 < 0.5 (not announced) and
///   a down ramp near 10 min 10/10;
/// * 10:15, 10:30: flat.
///
/// Lead 5 min (centres 10:05, 10:10, 10:15, 10:20, 10:35 ± 1 min):
/// * 10:00: forecast down, nothing measured at 10:05 → false alarm;
/// * 10:05: forecast down, measured down at 10:10 → hit;
/// * 10:10: the up ramp is not announced, nothing at 10:15 → correct negative;
/// * 10:15: nothing forecast, measured up at 10:20 → miss;
/// * 10:30: nothing, nothing → correct negative.
///
/// → 5 issues, hits 1, misses 1, false alarms 1: POD = 1/(1+1) = 1/2, FAR = 1/(1+1) = 1/2,
/// CSI = 1/(1+1+1) = 1/3.
///
/// Lead 10 min (centres 10:10, 10:15, 10:20, 10:25, and 10:40 — whose window 10:41 lies beyond
/// the readings, so 10:30 is not scored):
/// * 10:00: down, measured down → hit;
/// * 10:05: up (at 11), nothing at 10:15 → false alarm;
/// * 10:10: down, measured up → miss and false alarm;
/// * 10:15: nothing, nothing → correct negative.
///
/// → 4 issues (1 not scored), hits 1, misses 1, false alarms 2: POD = 1/2, FAR = 2/(2+1) = 2/3,
/// CSI = 1/(1+1+2) = 1/4.
#[test]
fn hand_computed_ramp_scores_against_measurements() {
    let d = tempfile::tempdir().unwrap();
    let sp = site_file(
        d.path(),
        "[evaluation.ramps]\nbasis = \"capacity\"\nthreshold_pct = 10.0\nwindow_min = 1\nlead_min = [5.0, 10.0]\nmatch_window_min = 1.0\nmin_probability = 0.5\n",
    );
    let meas = measurements(d.path());
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    let mut f = String::from(FC_HEADER);
    let flat = series(&[]);
    let issues: [(i64, Vec<(i64, f64)>); 5] = [
        (0, series(&[(6, 500.0), (11, 300.0), (13, 500.0)])),
        (5, series(&[(6, 500.0), (12, 700.0)])),
        (10, series(&[(6, 900.0), (11, 700.0)])),
        (15, flat.clone()),
        (30, flat),
    ];
    for (i, s) in &issues {
        for (h, v) in s {
            f += &format!("{},{},{},plant,{v},,,800\n", at(*i), at(i + h), h * 60);
        }
    }
    std::fs::write(out.join("forecasts.csv"), f).unwrap();
    // Members of 10:10 only: 3 as the central forecast, 7 with its drop at 10 alone.
    let mut ens = String::from("issue_time_utc,horizon_s,member,plant_ghi_wm2\n");
    let follower = series(&[(11, 500.0)]);
    for k in 0..10 {
        for (h, v) in if k < 3 { &issues[2].1 } else { &follower } {
            ens += &format!("{},{},{k},{v}\n", at(10), h * 60);
        }
    }
    std::fs::write(out.join("ensemble_plant.csv"), ens).unwrap();

    let site = Site::load(&sp).unwrap();
    let e = evaluate_measured(&site, &out, &meas).unwrap();
    assert_eq!(e.ramp_quantity, nephocast::measured::Quantity::Ghi);
    assert_eq!(e.ramps.len(), 2);
    let (l5, l10) = (&e.ramps[0], &e.ramps[1]);
    assert_eq!((l5.lead_min, l5.issues_scored, l5.issues_not_scored, l5.hits, l5.misses, l5.false_alarms), (5.0, 5, 0, 1, 1, 1));
    assert_eq!((l5.pod, l5.far, l5.csi), (0.5, 0.5, 1.0 / 3.0));
    assert_eq!((l10.lead_min, l10.issues_scored, l10.issues_not_scored, l10.hits, l10.misses, l10.false_alarms), (10.0, 4, 1, 1, 1, 2));
    assert_eq!((l10.pod, l10.far, l10.csi), (0.5, 2.0 / 3.0, 0.25));

    // The same through the command line, into evaluation-measured.json.
    let o = std::process::Command::new(BIN).args(["evaluate", "--replay"]).arg(&out).arg("--measurements").arg(&meas).arg("--site").arg(&sp).output().unwrap();
    let text = String::from_utf8_lossy(&o.stdout).to_string() + &String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{text}");
    assert!(text.contains("POD") && text.contains("1 issue times not scored") && text.contains("ramps of the plant-mean GHI"), "{text}");
    let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("evaluation-measured.json")).unwrap()).unwrap();
    assert_eq!(j["ramps"][1]["false_alarms"], 2);
    assert_eq!(j["ramps"][0]["csi"], 1.0 / 3.0);
    assert_eq!(j["ramp_definition"]["basis"], "capacity");
    assert_eq!(j["ramp_quantity"], "ghi");
}

/// A bad `[evaluation.ramps]` value is refused with the field named.
#[test]
fn ramp_definition_errors_name_the_field() {
    let d = tempfile::tempdir().unwrap();
    for (extra, field) in [
        ("[evaluation.ramps]\nthreshold_pct = 0.0\n", "evaluation.ramps.threshold_pct"),
        ("[evaluation.ramps]\nwindow_min = 0\n", "evaluation.ramps.window_min"),
        ("[evaluation.ramps]\nlead_min = []\n", "evaluation.ramps.lead_min"),
        ("[evaluation.ramps]\nlead_min = [5.0, 90.0]\n", "evaluation.ramps.lead_min[1]"),
        ("[evaluation.ramps]\nmatch_window_min = -1.0\n", "evaluation.ramps.match_window_min"),
        ("[evaluation.ramps]\nmin_probability = 1.5\n", "evaluation.ramps.min_probability"),
        ("[evaluation.ramps]\nbasis = \"power\"\n", "evaluation.ramps.basis"),
        ("[evaluation.ramps]\nthreshold = 10.0\n", "evaluation.ramps"),
    ] {
        let e = Site::load(&site_file(d.path(), extra)).unwrap_err().to_string();
        assert!(e.contains(field), "{extra}: {e}");
    }
}

/// With `basis = "clear_sky"` the threshold is `threshold_pct` of the clear-sky GHI (the mean of
/// the model's values at the window's two ends): the fixture's drop of 299 W/m² over 10:10–10:11
/// and rise of 298 W/m² over 10:20–10:21 are ramps just below the threshold that equals them and
/// not just above it; under the capacity basis a threshold of 29.7 % (297 W/m²) finds both and
/// 29.95 % (299.5 W/m²) neither.
#[test]
fn clear_sky_basis_threshold() {
    use nephocast::measured::{EvalRampParams, RampBasis, measured_ramps};
    use nephocast::ramp::Direction;
    let d = tempfile::tempdir().unwrap();
    let site = Site::load(&site_file(d.path(), "")).unwrap();
    let meas_path = measurements(d.path());
    let m = nephocast::io::Measurements::read_csv(&meas_path).unwrap();
    let col = m.column("ghi_north-fixed_wm2").unwrap();
    let f = &site.file.site;
    let clear = |i: i64| {
        let t: chrono::DateTime<chrono::Utc> = at(i).parse().unwrap();
        let sp = nephocast::sun::position(&t, &f.observer()).unwrap();
        nephocast::clearsky::clear_sky(&sp, f.elevation_m, f.clear_sky()).ghi_wm2
    };
    // The share of the clear-sky GHI each ramp is.
    let down = 299.0 / (0.5 * (clear(10) + clear(11))) * 100.0;
    let up = 298.0 / (0.5 * (clear(20) + clear(21))) * 100.0;
    assert!(up < down, "the rise is the smaller share ({up} %, {down} %)");
    let (from, to) = (at(-10).parse().unwrap(), at(40).parse().unwrap());
    let found = |basis: RampBasis, pct: f64| -> Vec<(String, Direction)> {
        let p = EvalRampParams { basis, threshold_pct: pct, ..Default::default() };
        measured_ramps(&site, &m, &[col], &p, from, to).0.into_iter().map(|(t, d)| (t.format("%H:%M").to_string(), d)).collect()
    };
    let both = vec![("10:10".to_string(), Direction::Down), ("10:20".to_string(), Direction::Up)];
    assert_eq!(found(RampBasis::ClearSky, up * 0.999), both);
    assert_eq!(found(RampBasis::ClearSky, (up + down) / 2.0), vec![("10:10".to_string(), Direction::Down)]);
    assert_eq!(found(RampBasis::ClearSky, down * 1.001), vec![]);
    assert_eq!(found(RampBasis::Capacity, 29.7), both);
    assert_eq!(found(RampBasis::Capacity, 29.95), vec![]);
}
