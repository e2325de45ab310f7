//! `evaluate --measurements` against plant power: hand-made replay outputs and a measurements CSV
//! with the plant meter (`power_plant_kw`) and one block meter, every score worked out by hand in the
//! comments and asserted exactly (to 1e-9).
//!
//! The fixture: the demo site (Larkspur Flats, 37.4° N, 3.2° W, 14 June 2026, about 10:00 UTC,
//! sun about 58° high) with each of its four blocks rated 6000 kW DC and 2000 kW AC (DC/AC 3), so
//! that under a clear sky every block's inverter clips at its AC rating: the clear-sky power is
//! exactly 2000 kW per block and 8000 kW for the plant at every time used (the PVWatts inverter
//! model caps AC power at its rating, Dobos 2014; checked below through the library before the
//! arithmetic relies on it). Smart persistence of power, `P(t) / P_clear(t) · P_clear(t + h)`, is
//! then the newest reading itself.
//!
//! With `i` the minute after 10:00 UTC (1-minute means stamped at the start of their minute), the
//! plant meter reads `6000 + i mod 3` kW for `i ≤ 10`, `3000 + i mod 3` for `11 ≤ i ≤ 20`,
//! `6000 + i mod 3` for `i ≥ 21`, except 9999 kW at `i = 30` (over 110 % of the 8000 kW rating:
//! screened out); the block meter of `north-fixed` reads `1500 + i mod 3` for `i ≤ 10`, `700 + i
//! mod 3` after, and is empty at `i = 20`. No pyranometer: the sky types come from the power's
//! clear-sky index.
use std::path::{Path, PathBuf};

use nephocast::config::Site;
use nephocast::measured::Quantity;
use nephocast::measured::evaluate_measured;

const BIN: &str = env!("CARGO_BIN_EXE_nephocast");

fn plant_kw(i: i64) -> String {
    if i == 30 {
        return "9999".into();
    }
    let base = if (11..=20).contains(&i) { 3000.0 } else { 6000.0 };
    (base + i.rem_euclid(3) as f64).to_string()
}

fn block_kw(i: i64) -> String {
    if i == 20 {
        return String::new();
    }
    let base = if i <= 10 { 1500.0 } else { 700.0 };
    (base + i.rem_euclid(3) as f64).to_string()
}

/// Minute `i` after 10:00 UTC, as an RFC 3339 time.
fn at(i: i64) -> String {
    let t = chrono::DateTime::parse_from_rfc3339("2026-06-14T10:00:00Z").unwrap() + chrono::Duration::minutes(i);
    t.with_timezone(&chrono::Utc).format("%Y-%m-%dT%H:%M:%SZ").to_string()
}

/// The demo site with 2000 kW AC per block (calibration path made absolute), `extra` appended.
fn site_file(dir: &Path, extra: &str) -> PathBuf {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let text = std::fs::read_to_string(demo.join("site.toml")).unwrap();
    let cal = demo.join("calibration").join("larkspur-sky1.toml");
    let text = text.replace("calibration = \"calibration/larkspur-sky1.toml\"", &format!("calibration = {:?}", cal.display().to_string()));
    assert_eq!(text.matches("ac_capacity_kw = 5000.0").count(), 4);
    let text = text.replace("ac_capacity_kw = 5000.0", "ac_capacity_kw = 2000.0");
    let p = dir.join("site.toml");
    std::fs::write(&p, format!("{text}\n{extra}")).unwrap();
    p
}

fn measurements(dir: &Path) -> PathBuf {
    let mut s = String::from("time_utc,power_plant_kw,power_north-fixed_kw\n");
    for i in -10..=40 {
        s += &format!("{},{},{}\n", at(i), plant_kw(i), block_kw(i));
    }
    let p = dir.join("measurements.csv");
    std::fs::write(&p, s).unwrap();
    p
}

const FC_HEADER: &str = "issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2,ghi_clear_wm2,power_kw,power_p10_kw,power_p90_kw\n";

/// The precondition of the arithmetic: clear-sky power is the AC rating (clipping) from 09:50 to
/// 10:40, for the plant and for a block.
fn check_clipping(site: &Site) {
    let plant = nephocast::plant::Plant::from_section(&site.file.plant);
    for i in -10..=40 {
        let t: chrono::DateTime<chrono::Utc> = at(i).parse().unwrap();
        let pw = &site.file.power;
        for (block, rating) in [(None, 8000.0), (Some("north-fixed"), 2000.0)] {
            let p = nephocast::measured::power::clear_sky_power_kw(site, &plant, &t, block, pw.default_temp_air_c, pw.default_wind_speed_mps);
            assert_eq!(p, rating, "clear-sky power at {} of {block:?}", at(i));
        }
    }
}

/// RMSE, MAE, MBE, smart persistence, skill, CRPS and P10–P90 coverage of plant power for three
/// issue times (10:00, 10:05, 10:10) at 5 and 10 minutes, and of the `north-fixed` block at 5 and
/// 10 minutes.
///
/// Smart persistence = newest completed reading at the issue (the minute before it) × 8000/8000:
/// 10:00 → 09:59 = 6002; 10:05 → 10:04 = 6001; 10:10 → 10:09 = 6000.
///
/// Measured at the targets: 5 min: 10:05 = 6002, 10:10 = 6001, 10:15 = 3000;
/// 10 min: 10:10 = 6001, 10:15 = 3000, 10:20 = 3002.
///
/// Forecasts (error = forecast − measured): 5 min: 5990 (−12), 6011 (+10), 3030 (+30);
/// 10 min: 6005 (+4), 3020 (+20), 2992 (−10).
#[test]
fn hand_computed_power_scores() {
    let d = tempfile::tempdir().unwrap();
    let site = Site::load(&site_file(d.path(), "")).unwrap();
    check_clipping(&site);
    let meas = measurements(d.path());
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    // (issue minute, horizon s, plant forecast kW)
    let fc = [(0, 300, 5990.0), (0, 600, 6005.0), (5, 300, 6011.0), (5, 600, 3020.0), (10, 300, 3030.0), (10, 600, 2992.0)];
    // (issue minute, horizon s, block forecast kW)
    let block_fc = [(0, 300, 1490.0), (5, 300, 1511.0), (10, 300, 730.0), (10, 600, 700.0)];
    let mut f = String::from(FC_HEADER);
    let mut ens = String::from("issue_time_utc,horizon_s,member,plant_ghi_wm2,plant_power_kw\n");
    for i in [0, 5, 10] {
        f += &format!("{},{},0,plant,700,800,6000,,\n", at(i), at(i));
        f += &format!("{},{},0,north-fixed,700,800,1500,,\n", at(i), at(i));
    }
    for (i, h, p) in fc {
        // P10 and P90 15 kW either side of the forecast; two members 10 kW either side.
        f += &format!("{},{},{h},plant,700,800,{p},{},{}\n", at(i), at(i + h / 60), p - 15.0, p + 15.0);
        ens += &format!("{},{h},0,700,{}\n{},{h},1,700,{}\n", at(i), p - 10.0, at(i), p + 10.0);
    }
    for (i, h, p) in block_fc {
        f += &format!("{},{},{h},north-fixed,700,800,{p},,\n", at(i), at(i + h / 60));
    }
    std::fs::write(out.join("forecasts.csv"), f).unwrap();
    std::fs::write(out.join("ensemble_plant.csv"), ens).unwrap();
    let e = evaluate_measured(&site, &out, &meas).unwrap();
    assert!(e.plant.is_empty(), "no pyranometers, no GHI scores");
    let p = e.power.as_ref().expect("power scores");
    assert_eq!(p.plant_source, "plant meter (power_plant_kw)");
    assert_eq!(p.plant_ac_rating_kw, 8000.0);
    let close = |a: f64, b: f64, what: &str| assert!((a - b).abs() < 1e-9, "{what}: {a} against {b} by hand");
    let (h5, h10) = (&p.plant[0], &p.plant[1]);
    assert_eq!((p.plant.len(), h5.horizon_s, h5.n, h10.horizon_s, h10.n), (2, 300, 3, 600, 3));

    // 5 min: RMSE = √((12² + 10² + 30²)/3) = √(1144/3); MAE = 52/3; MBE = (−12 + 10 + 30)/3 = 28/3.
    close(h5.rmse_kw, (1144.0f64 / 3.0).sqrt(), "5-min RMSE");
    close(h5.mae_kw, 52.0 / 3.0, "5-min MAE");
    close(h5.mbe_kw, 28.0 / 3.0, "5-min MBE");
    // Persistence errors: 6002 − 6002 = 0, 6001 − 6001 = 0, 6000 − 3000 = 3000:
    // RMSE_p = √(3000²/3) = 3000/√3; skill = 1 − √(1144/3) / (3000/√3) = 1 − √1144 / 3000.
    close(h5.rmse_persistence_kw, 3000.0 / 3f64.sqrt(), "5-min persistence RMSE");
    close(h5.skill, 1.0 - 1144f64.sqrt() / 3000.0, "5-min skill");
    // CRPS of members f ± 10 (Gneiting & Raftery 2007, eq. 20): (|a − y| + |b − y|)/2 − 20/4:
    // (5980, 6000 | 6002): 12 − 5 = 7; (6001, 6021 | 6001): 10 − 5 = 5; (3020, 3040 | 3000):
    // 30 − 5 = 25; mean 37/3.
    close(h5.crps_kw, 37.0 / 3.0, "5-min CRPS");
    // P10–P90 = f ± 15: [5975, 6005] ∋ 6002, [5996, 6026] ∋ 6001, [3015, 3045] ∌ 3000 → 2/3.
    close(h5.coverage_p10_p90, 2.0 / 3.0, "5-min coverage");

    // 10 min: RMSE = √((4² + 20² + 10²)/3) = √172; MAE = 34/3; MBE = 14/3.
    close(h10.rmse_kw, 172f64.sqrt(), "10-min RMSE");
    close(h10.mae_kw, 34.0 / 3.0, "10-min MAE");
    close(h10.mbe_kw, 14.0 / 3.0, "10-min MBE");
    // Persistence errors: 6002 − 6001 = 1, 6001 − 3000 = 3001, 6000 − 3002 = 2998:
    // RMSE_p = √((1 + 9006001 + 8988004)/3) = √(17994006/3).
    let rp10 = (17_994_006.0f64 / 3.0).sqrt();
    close(h10.rmse_persistence_kw, rp10, "10-min persistence RMSE");
    close(h10.skill, 1.0 - 172f64.sqrt() / rp10, "10-min skill");
    // CRPS: (5995, 6015 | 6001): 10 − 5 = 5; (3010, 3030 | 3000): 20 − 5 = 15; (2982, 3002 | 3002):
    // 10 − 5 = 5 → 25/3. Coverage: [5990, 6020] ∋ 6001, [3005, 3035] ∌ 3000, [2977, 3007] ∋ 3002.
    close(h10.crps_kw, 25.0 / 3.0, "10-min CRPS");
    close(h10.coverage_p10_p90, 2.0 / 3.0, "10-min coverage");

    // Block north-fixed (its meter; clear-sky power 2000 = its rating, so persistence is the
    // newest reading): 5 min: 10:00 → 1490 against 10:05 = 1502 (−12), persistence 09:59 = 1502
    // (0); 10:05 → 1511 against 10:10 = 1501 (+10), persistence 10:04 = 1501 (0); 10:10 → 730
    // against 10:15 = 700 (+30), persistence 10:09 = 1500 (800). RMSE √(1144/3), MAE 52/3,
    // persistence RMSE 800/√3, skill 1 − √1144/800; no ensemble for blocks, no band.
    // 10 min: 10:10 → 10:20, whose reading is empty: left out, counted.
    let b = &p.by_block["north-fixed"];
    assert_eq!(b.len(), 1, "only 5 min is left for the block: {b:?}");
    close(b[0].rmse_kw, (1144.0f64 / 3.0).sqrt(), "block RMSE");
    close(b[0].mae_kw, 52.0 / 3.0, "block MAE");
    close(b[0].rmse_persistence_kw, 800.0 / 3f64.sqrt(), "block persistence RMSE");
    close(b[0].skill, 1.0 - 1144f64.sqrt() / 800.0, "block skill");
    assert!(b[0].crps_kw.is_nan() && b[0].coverage_p10_p90.is_nan());
    assert_eq!(p.excluded.get("no valid power reading at the target time (missing or flagged)"), Some(&1), "{:?}", p.excluded);
    assert_eq!(p.excluded.values().sum::<usize>(), 1, "{:?}", p.excluded);
    // The 9999 kW reading is screened out as impossible for an 8000 kW plant.
    assert_eq!(e.screened.get("power_plant_kw outside -5 … 110 % of the AC rating"), Some(&1), "{:?}", e.screened);
    // Sky types from the power's clear-sky index P / 8000: each window of 10:00 … 10:10 (from 10
    // minutes before to 20 after) holds the drop 0.75 → 0.375 (Δkc = −0.375) among changes of
    // 1/8000 and 2/8000, so σΔkc > 0.03: variable.
    assert_eq!(e.sky_index, Quantity::Power);
    assert_eq!(e.issues_by_sky_type.get("variable"), Some(&3), "{:?}", e.issues_by_sky_type);
    assert_eq!(p.by_sky_type["variable"].n, 6);
}

/// Ramps in plant power on both sides (the plant meter is there): `[evaluation.ramps]` at 10 % of
/// the plant's AC rating (800 kW) over 1 minute, leads 5 and 10 min matched within 1 minute.
///
/// Measured ramps: down starting 10:10 (6001 → 3002 kW at 10:11), up starting 10:20 (3002 →
/// 6000 at 10:21); the 9999 kW reading at 10:30 is screened out, so no ramp there.
///
/// The forecast's power at horizons 0 … 12 min (its GHI stays 700 W/m², so ramps looked for in
/// GHI would find none): 10:00 flat 6000; 10:05 6000 then 3000 from 6 min (down at lead 5);
/// 10:15 3000 then 6000 from 6 min (up at lead 5). No members: the central forecast decides.
///
/// Lead 5 (centres 10:05, 10:10, 10:20): 10:00 nothing/nothing; 10:05 down/down → hit; 10:15
/// up/up → hit. POD 1, FAR 0, CSI 1.
/// Lead 10 (centres 10:10, 10:15, 10:25): 10:00 nothing/down → miss; the others nothing/nothing.
/// POD 0, FAR n/a, CSI 0.
#[test]
fn ramps_in_plant_power() {
    let d = tempfile::tempdir().unwrap();
    let sp = site_file(d.path(), "[evaluation.ramps]\nthreshold_pct = 10.0\nwindow_min = 1\nlead_min = [5.0, 10.0]\nmatch_window_min = 1.0\n");
    let site = Site::load(&sp).unwrap();
    check_clipping(&site);
    let meas = measurements(d.path());
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    let mut f = String::from(FC_HEADER);
    for (i, from, to) in [(0, 6000.0, 6000.0), (5, 6000.0, 3000.0), (15, 3000.0, 6000.0)] {
        for h in 0..=12 {
            let p = if h < 6 { from } else { to };
            f += &format!("{},{},{},plant,700,800,{p},,\n", at(i), at(i + h), h * 60);
        }
    }
    std::fs::write(out.join("forecasts.csv"), f).unwrap();
    let e = evaluate_measured(&site, &out, &meas).unwrap();
    assert_eq!(e.ramp_quantity, Quantity::Power);
    let (l5, l10) = (&e.ramps[0], &e.ramps[1]);
    assert_eq!((l5.issues_scored, l5.hits, l5.misses, l5.false_alarms), (3, 2, 0, 0));
    assert_eq!((l5.pod, l5.far, l5.csi), (1.0, 0.0, 1.0));
    assert_eq!((l10.issues_scored, l10.hits, l10.misses, l10.false_alarms), (3, 0, 1, 0));
    assert_eq!((l10.pod, l10.csi), (0.0, 0.0));
    assert!(l10.far.is_nan());
    // The command line says which quantity.
    let o = std::process::Command::new(BIN).args(["evaluate", "--replay"]).arg(&out).arg("--measurements").arg(&meas).arg("--site").arg(&sp).output().unwrap();
    let text = String::from_utf8_lossy(&o.stdout).to_string() + &String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{text}");
    assert!(text.contains("ramps of the plant AC power (the plant's meter)") && text.contains("of the plant's AC rating"), "{text}");
    let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("evaluation-measured.json")).unwrap()).unwrap();
    assert_eq!((j["ramp_quantity"].as_str(), j["sky_index"].as_str()), (Some("power"), Some("power")));
}
