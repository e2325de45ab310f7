//! The command-line interface, run as a user would.
mod common;

use std::process::Command;

use common::{num, read_table};

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_nephocast"))
}

/// `nephocast sun` for the SPA report's site (Reda & Andreas 2004) over a day of 2026, against
/// pvlib 0.16.1 `Location.get_solarposition` / `get_clearsky(model='ineichen', linke_turbidity=3)`
/// (table from `tools/gen_fixtures.py`). pvlib estimates ΔT its own way, so positions agree to
/// 0.003° (ΔT differences of a second move the sun by up to 0.004°); clear sky to 0.5 % or 1 W/m².
#[test]
fn sun_command_agrees_with_pvlib() {
    let out = bin()
        .args([
            "sun", "--lat", "39.742476", "--lon", "-105.1786", "--elevation-m", "1830.14", "--pressure-hpa", "820",
            "--temperature-c", "11", "--start", "2026-06-14T00:00:00Z", "--end", "2026-06-15T00:00:00Z", "--step", "30m",
            "--linke", "3",
        ])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let text = String::from_utf8(out.stdout).unwrap();
    let mut rdr = csv::Reader::from_reader(text.as_bytes());
    let h = rdr.headers().unwrap().clone();
    for col in ["time_utc", "zenith_deg", "azimuth_deg", "elevation_deg", "ghi_clear_wm2", "dni_clear_wm2", "dhi_clear_wm2"] {
        assert!(h.iter().any(|x| x == col), "missing column {col}");
    }
    let ours: Vec<csv::StringRecord> = rdr.records().map(|r| r.unwrap()).collect();
    let refs = read_table("cli_sun_pvlib.csv");
    assert_eq!(ours.len(), refs.len());
    let col = |name: &str| h.iter().position(|x| x == name).unwrap();
    for (o, r) in ours.iter().zip(&refs) {
        assert_eq!(&o[0], r["time_utc"].as_str());
        let z: f64 = o[col("zenith_deg")].parse().unwrap();
        let a: f64 = o[col("azimuth_deg")].parse().unwrap();
        assert!((z - num(r, "zenith_deg")).abs() < 3e-3, "{} zenith {z} vs {}", r["time_utc"], r["zenith_deg"]);
        let da = (a - num(r, "azimuth_deg")).abs();
        assert!(da.min(360.0 - da) < 3e-3, "{} azimuth", r["time_utc"]);
        for (c, rc) in [("ghi_clear_wm2", "ghi_clear_wm2"), ("dni_clear_wm2", "dni_clear_wm2"), ("dhi_clear_wm2", "dhi_clear_wm2")] {
            let v: f64 = o[col(c)].parse().unwrap();
            let w = num(r, rc);
            assert!((v - w).abs() <= (0.005 * w.abs()).max(1.0), "{} {c}: {v} vs {w}", r["time_utc"]);
        }
    }
}

/// A malformed site file gives a one-line error naming the field path, and exit status 2.
#[test]
fn malformed_site_file_exits_2_with_field_path() {
    let d = tempfile::tempdir().unwrap();
    let good = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/examples/site.toml")).unwrap();
    let cases = [
        (good.replace("latitude_deg = 37.412", "latitude_deg = \"north\""), "field site.latitude_deg"),
        (good.replace("latitude_deg = 37.412", "latitude_deg = 137.4"), "field site.latitude_deg: expected a number from -90 to 90"),
        (good.replace("capacity_kw = 6000.0\nmount = \"fixed\"", "capacity_kw = -5.0\nmount = \"fixed\""), "field plant.blocks[0].capacity_kw"),
        (good.replace("[clouds]\nbase_height_m = 1500.0", "[clouds]"), "field clouds"),
        (good.replace("mount = \"fixed\"", "mount = \"floating\""), "field plant.blocks[0].mount"),
        (good + "\n[bogus]\nx = 1\n", "bogus"),
    ];
    for (i, (text, want)) in cases.iter().enumerate() {
        let p = d.path().join(format!("site{i}.toml"));
        std::fs::write(&p, text.replace("../calibration/", concat!(env!("CARGO_MANIFEST_DIR"), "/calibration/"))).unwrap();
        let out = bin()
            .args(["sun", "--site", p.to_str().unwrap(), "--start", "2026-06-14T10:00:00Z", "--end", "2026-06-14T11:00:00Z"])
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "case {i}: {err}");
        assert!(err.contains(want), "case {i}: {err}");
        assert_eq!(err.trim_end().lines().count(), 1, "case {i}: one line expected: {err}");
        assert!(!err.contains("panicked"));
    }
}

/// Bad arguments are refused with exit status 2, never a panic.
#[test]
fn bad_sun_arguments() {
    for args in [
        vec!["sun", "--lat", "95", "--lon", "0", "--start", "2026-01-01T00:00:00Z", "--end", "2026-01-01T01:00:00Z"],
        vec!["sun", "--lat", "10", "--lon", "0", "--start", "yesterday", "--end", "2026-01-01T01:00:00Z"],
        vec!["sun", "--lat", "10", "--lon", "0", "--start", "2026-01-01T00:00:00Z", "--end", "2026-01-01T01:00:00Z", "--step", "-3m"],
    ] {
        let out = bin().args(&args).output().unwrap();
        assert_eq!(out.status.code(), Some(2), "{args:?}");
        assert!(!String::from_utf8_lossy(&out.stderr).contains("panicked"));
    }
}
