//! Helpers shared by the integration tests.
#![allow(dead_code)]

use std::collections::HashMap;
use std::path::{Path, PathBuf};

/// Path of a committed fixture table.
pub fn fixture(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests").join("fixtures").join(name)
}

/// Read a fixture CSV (first line a `#` comment naming its generator) as rows of name → text.
pub fn read_table(name: &str) -> Vec<HashMap<String, String>> {
    let mut rdr = csv::ReaderBuilder::new().comment(Some(b'#')).from_path(fixture(name)).expect("fixture present");
    let h = rdr.headers().unwrap().clone();
    rdr.records()
        .map(|r| {
            let r = r.unwrap();
            h.iter().zip(r.iter()).map(|(a, b)| (a.to_string(), b.to_string())).collect()
        })
        .collect()
}

/// A number from a row.
pub fn num(row: &HashMap<String, String>, k: &str) -> f64 {
    row[k].parse().unwrap_or_else(|_| panic!("column {k}: {:?}", row[k]))
}

/// The shared datasets folder, from `NEPHOCAST_DATASETS` (set by `.ci/run`), or `None` with a
/// message saying plainly that it is absent.
pub fn datasets() -> Option<PathBuf> {
    match std::env::var_os("NEPHOCAST_DATASETS") {
        Some(p) if Path::new(&p).is_dir() => Some(PathBuf::from(p)),
        Some(p) => {
            eprintln!("NEPHOCAST_DATASETS={} is not a folder: the real-data check is SKIPPED", Path::new(&p).display());
            None
        }
        None => {
            eprintln!("NEPHOCAST_DATASETS is not set: the real-data check is SKIPPED (.ci/run sets it)");
            None
        }
    }
}

/// The demo site moved so that the sun is high now: its longitude put where local solar noon is
/// the present UTC hour, its latitude `latitude_deg`, the calibration path made absolute. Tests
/// that stamp frames with the wall clock (live mode judges a frame's age against it) use it, so
/// that they do not fail when the demo site's own sun is down.
pub fn demo_site_for_now(dir: &Path, latitude_deg: f64) -> PathBuf {
    demo_site_at_solar_hour(dir, latitude_deg, 12.0)
}

/// The demo site moved so that its local solar time now is about `solar_hour` (12: the sun high;
/// 0: midnight, the sun far below the horizon), as [`demo_site_for_now`].
pub fn demo_site_at_solar_hour(dir: &Path, latitude_deg: f64, solar_hour: f64) -> PathBuf {
    use chrono::Timelike;
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let now = chrono::Utc::now();
    let hours = f64::from(now.hour()) + f64::from(now.minute()) / 60.0;
    let lon = ((solar_hour - hours) * 15.0 + 540.0).rem_euclid(360.0) - 180.0;
    let text = std::fs::read_to_string(demo.join("site.toml")).unwrap();
    let text = text
        .lines()
        .map(|l| {
            if l.starts_with("longitude_deg") {
                format!("longitude_deg = {lon:.3}")
            } else if l.starts_with("latitude_deg") {
                format!("latitude_deg = {latitude_deg:.3}")
            } else if l.starts_with("calibration = ") {
                format!("calibration = {:?}", demo.join("calibration/larkspur-sky1.toml").display().to_string())
            } else {
                l.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n");
    let p = dir.join("site.toml");
    std::fs::write(&p, text + "\n").unwrap();
    p
}
