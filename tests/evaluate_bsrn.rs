//! `evaluate --measurements` on a real BSRN station file, as the file comes: its plain `ghi`
//! column is the station's pyranometer.
//!
//! Data (read from `$NEPHOCAST_DATASETS/irradiance`, not copied here): BSRN Payerne (46.815 N,
//! 6.944 E, 491 m), 1–15 June 2016, 1-minute values — BSRN (Driemel et al., *Earth Syst. Sci.
//! Data* 10:1491, 2018), station run by MeteoSwiss; free for scientific use with BSRN and the
//! station cited; taken from pvlib's test data (see `../shared/datasets/README.md`).
//!
//! There are no sky-camera frames of Payerne, so the forecast is made here from the measurements
//! themselves: at each issue time (every 10 minutes, 06:00–16:00 UTC, on 5, 6 and 9 June, days of
//! broken cloud), for every horizon 0 … 20 min, the measured GHI at the target minus 20 W/m². Its
//! scores are then known without the engine: RMSE = MAE = 20 W/m², MBE = −20 W/m² exactly, and the
//! smart persistence, its RMSE and the skill are recomputed here from the file with the same rules
//! (the reading of the minute before the issue, times clear-sky GHI at the target over clear-sky
//! GHI at the issue, both from the forecast rows; pairs with clear-sky GHI under 50 W/m² or a
//! missing or screened reading left out; the forecast is empty where the reading is). The forecast's ramps are the measured ramps (the offset cancels in
//! every change), so every scored issue time is a hit or a correct negative: POD 1, FAR 0.
mod common;

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use chrono::{DateTime, Duration, Utc};

const FILE: &str = "irradiance/bsrn_payerne_2016_06/bsrn_pay_2016-06-01_to_15_1min.csv";
const OFFSET_WM2: f64 = 20.0;

/// The demo site moved to Payerne (calibration path made absolute; its named pyranometers have no
/// column in the BSRN file).
fn payerne_site(dir: &Path) -> PathBuf {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let text = std::fs::read_to_string(demo.join("site.toml")).unwrap();
    let cal = demo.join("calibration").join("larkspur-sky1.toml");
    let mut text = text.replace("calibration = \"calibration/larkspur-sky1.toml\"", &format!("calibration = {:?}", cal.display().to_string()));
    for (from, to) in [("latitude_deg = 37.412", "latitude_deg = 46.815"), ("longitude_deg = -3.21", "longitude_deg = 6.944"), ("elevation_m = 640.0", "elevation_m = 491.0"), ("timezone = \"Europe/Madrid\"", "timezone = \"Europe/Zurich\"")] {
        assert!(text.contains(from), "{from}");
        text = text.replace(from, to);
    }
    let p = dir.join("site.toml");
    std::fs::write(&p, text).unwrap();
    p
}

/// The file's GHI by time, read here with the csv crate (empty cells as missing), less the values
/// the measurement screening leaves out (BSRN "physically possible" and "extremely rare" limits,
/// Long & Dutton; the screening itself is checked in `tests/real_measurements.rs` and
/// `tests/bad_inputs.rs`). Returns the map and how many GHI values were screened out.
fn read_ghi(path: &Path, site: &nephocast::config::Site) -> (HashMap<DateTime<Utc>, f64>, usize) {
    let mut rdr = csv::Reader::from_path(path).unwrap();
    let h = rdr.headers().unwrap().clone();
    let (ct, cg) = (h.iter().position(|x| x == "time_utc").unwrap(), h.iter().position(|x| x == "ghi").unwrap());
    let mut ghi: HashMap<DateTime<Utc>, f64> = rdr.records().map(|r| r.unwrap()).map(|r| (r[ct].parse().unwrap(), r[cg].parse::<f64>().unwrap_or(f64::NAN))).collect();
    let f = &site.file.site;
    let mut m = nephocast::io::Measurements::read_csv(path).unwrap();
    m.screen(path, &f.observer(), f.clear_sky(), f.elevation_m).unwrap();
    let c = m.column("ghi").unwrap();
    let mut screened = 0;
    for (t, v) in m.times.iter().zip(&m.columns[c]) {
        if v.is_nan() && ghi[t].is_finite() {
            ghi.insert(*t, f64::NAN);
            screened += 1;
        }
    }
    (ghi, screened)
}

#[test]
fn bsrn_payerne_as_the_measurement_series() {
    let Some(root) = common::datasets() else { return };
    let bsrn = root.join(FILE);
    let d = tempfile::tempdir().unwrap();
    let site_path = payerne_site(d.path());
    let site = nephocast::config::Site::load(&site_path).unwrap();
    let f = &site.file.site;
    let clear = |t: &DateTime<Utc>| nephocast::clearsky::clear_sky(&nephocast::sun::position(t, &f.observer()).unwrap(), f.elevation_m, f.clear_sky()).ghi_wm2;
    let (ghi, screened) = read_ghi(&bsrn, &site);
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    let mut fc = String::from("issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2,ghi_clear_wm2\n");
    let fmt = |t: &DateTime<Utc>| t.format("%Y-%m-%dT%H:%M:%SZ").to_string();
    // Expected pairs per horizon (5, 10, 15 min): (forecast − measured, persistence − measured).
    let mut expected: HashMap<i64, Vec<f64>> = HashMap::new();
    let mut issues = 0;
    for day in ["2016-06-05", "2016-06-06", "2016-06-09"] {
        let start: DateTime<Utc> = format!("{day}T06:00:00Z").parse().unwrap();
        for k in 0..=60 {
            let issue = start + Duration::minutes(10 * k);
            issues += 1;
            for h in 0..=20 {
                let target = issue + Duration::minutes(h);
                let obs = ghi.get(&target).copied().unwrap_or(f64::NAN);
                let v = if obs.is_finite() { format!("{}", obs - OFFSET_WM2) } else { String::new() };
                fc += &format!("{},{},{},plant,{v},{}\n", fmt(&issue), fmt(&target), h * 60, clear(&target));
                let (c0, c1) = (clear(&issue), clear(&target));
                let newest = ghi.get(&(issue - Duration::minutes(1))).copied().unwrap_or(f64::NAN);
                if [5, 10, 15].contains(&h) && c0 >= 50.0 && c1 >= 50.0 && obs.is_finite() && newest.is_finite() {
                    expected.entry(h).or_default().push(newest / c0 * c1 - obs);
                }
            }
        }
    }
    std::fs::write(out.join("forecasts.csv"), fc).unwrap();
    let e = nephocast::measured::evaluate_measured(&site, &out, &bsrn).unwrap();
    eprintln!("BSRN Payerne, 5/6/9 June 2016, {issues} issue times; screened: {:?}; left out: {:?}", e.screened, e.excluded);
    eprintln!("sky types (from the station's clear-sky index): {:?}", e.issues_by_sky_type);
    // The published BSRN GHI holds nothing physically impossible; what is flagged is counted.
    assert_eq!(e.screened.iter().filter(|(k, _)| k.starts_with("ghi ")).map(|x| x.1).sum::<usize>(), screened, "{:?}", e.screened);
    assert!(!e.screened.contains_key("ghi physically impossible"), "{:?}", e.screened);
    for h in [5i64, 10, 15] {
        let s = e.plant.iter().find(|x| i64::from(x.horizon_s) == h * 60).unwrap();
        let p = &expected[&h];
        let rmse_p = (p.iter().map(|x| x * x).sum::<f64>() / p.len() as f64).sqrt();
        eprintln!("{h:>2} min: n {}, RMSE {:.3}, persistence RMSE {:.3}, skill {:.4}", s.n, s.rmse_wm2, s.rmse_persistence_wm2, s.skill);
        assert_eq!(s.n, p.len(), "{h} min: pairs");
        assert!((s.rmse_wm2 - OFFSET_WM2).abs() < 1e-9 && (s.mae_wm2 - OFFSET_WM2).abs() < 1e-9 && (s.mbe_wm2 + OFFSET_WM2).abs() < 1e-9, "{h} min: {s:?}");
        assert!((s.rmse_persistence_wm2 - rmse_p).abs() < 1e-9 * rmse_p, "{h} min: persistence RMSE {} against {rmse_p} here", s.rmse_persistence_wm2);
        assert!((s.skill - (1.0 - OFFSET_WM2 / rmse_p)).abs() < 1e-12, "{h} min: skill");
    }
    // Broken-cloud days: most issue times are variable.
    let variable = e.issues_by_sky_type.get("variable").copied().unwrap_or(0);
    assert!(2 * variable > e.issues_by_sky_type.values().sum::<usize>(), "{:?}", e.issues_by_sky_type);
    // Ramps in GHI on both sides: the forecast's are the measured ones.
    assert_eq!(e.ramp_quantity, nephocast::measured::Quantity::Ghi);
    for r in &e.ramps {
        eprintln!("ramps at {} min: {} scored ({} not), hits {}, misses {}, false alarms {}", r.lead_min, r.issues_scored, r.issues_not_scored, r.hits, r.misses, r.false_alarms);
        assert!(r.hits > 0, "{r:?}");
        assert_eq!((r.misses, r.false_alarms), (0, 0), "{r:?}");
    }
}
