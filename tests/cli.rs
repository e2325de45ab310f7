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
        (good.clone() + "\n[motion]\nresidual_min_share = 1.5\n", "field motion.residual_min_share: expected a number from 0 to 1"),
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

fn demo() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data")
}

/// Copy the first `n` demo frames into a folder.
fn demo_frames(dir: &std::path::Path, n: usize) {
    std::fs::create_dir_all(dir).unwrap();
    let mut f: Vec<_> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    f.sort();
    for p in f.iter().take(n) {
        std::fs::copy(p, dir.join(p.file_name().unwrap())).unwrap();
    }
}

#[test]
fn synth_lists_scenes() {
    let out = bin().args(["synth", "--list"]).output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    for s in ["broken-cumulus-fast", "scattered-slow", "overcast-breaking", "two-layers", "clear-day", "larkspur-demo"] {
        assert!(text.contains(s), "{s} missing from --list");
    }
    let out = bin().args(["synth", "--scene", "no-such", "--out", "/tmp/x"]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
}

/// A corrupt frame, a wrongly sized one, and a duplicate are counted and skipped; the rest is used.
#[test]
fn replay_counts_bad_frames_and_keeps_going() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    demo_frames(&frames, 6);
    std::fs::write(frames.join("frame_20260614T083010.000Z.jpg"), b"not a jpeg at all").unwrap();
    image::RgbImage::new(64, 64).save(frames.join("frame_20260614T083015.000Z.png")).unwrap();
    std::fs::write(frames.join("notes.jpg"), b"x").unwrap();
    let out = d.path().join("out");
    let o = bin()
        .args(["replay", "--site", demo().join("site.toml").to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", out.to_str().unwrap(), "--quiet"])
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(text.contains("8 found, 6 used, 2 rejected"), "{text}");
    assert!(text.contains("1 files without a time"), "{text}");
    let frames_csv = std::fs::read_to_string(out.join("frames.csv")).unwrap();
    assert!(frames_csv.contains(",unknown_format,") && frames_csv.contains(",wrong_size,"), "{frames_csv}");
    let fc = std::fs::read_to_string(out.join("forecasts.csv")).unwrap();
    assert!(fc.starts_with("issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2,dni_wm2,dhi_wm2,poa_wm2"));
    // 6 frames x 21 horizons x (4 blocks + plant).
    assert_eq!(fc.lines().count(), 1 + 6 * 21 * 5);
}

/// Frames named in a camera's own convention (`[camera] frame_time_format`, `frame_time_zone`):
/// local standard time two hours east of UTC, dashes, a prefix with digits. The replay reads the
/// same times and writes the same forecasts as with the project's own names; a name the pattern does
/// not match is counted as untimed, and a pattern that cannot carry a time is refused naming the field.
#[test]
fn frames_named_in_the_camera_s_own_convention() {
    let d = tempfile::tempdir().unwrap();
    let ours = d.path().join("ours");
    demo_frames(&ours, 4);
    let theirs = d.path().join("theirs");
    std::fs::create_dir_all(&theirs).unwrap();
    for e in std::fs::read_dir(&ours).unwrap().flatten() {
        let name = e.file_name().to_string_lossy().into_owned();
        let t = nephocast::io::time_from_frame_name(&name).unwrap() + chrono::Duration::hours(2);
        std::fs::copy(e.path(), theirs.join(format!("cam07_{}.jpg", t.format("%Y-%m-%d_%H-%M-%S")))).unwrap();
    }
    std::fs::write(theirs.join("cam07_latest.jpg"), b"x").unwrap();
    let site_text = std::fs::read_to_string(demo().join("site.toml")).unwrap().replace(
        "calibration = \"calibration/larkspur-sky1.toml\"",
        &format!("calibration = {:?}\nframe_time_format = \"%Y-%m-%d_%H-%M-%S\"\nframe_time_zone = \"+02:00\"", demo().join("calibration/larkspur-sky1.toml").to_str().unwrap()),
    );
    let site = d.path().join("site.toml");
    std::fs::write(&site, &site_text).unwrap();
    let run = |site: &std::path::Path, frames: &std::path::Path, out: &str| {
        let o = bin()
            .args(["replay", "--site", site.to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", d.path().join(out).to_str().unwrap(), "--quiet"])
            .output()
            .unwrap();
        (o.status.code(), String::from_utf8_lossy(&o.stdout).into_owned() + &String::from_utf8_lossy(&o.stderr))
    };
    let (code, text) = run(&demo().join("site.toml"), &ours, "a");
    assert_eq!(code, Some(0), "{text}");
    let (code, text) = run(&site, &theirs, "b");
    assert_eq!(code, Some(0), "{text}");
    assert!(text.contains("4 found, 4 used") && text.contains("1 files without a time"), "{text}");
    let read = |o: &str| std::fs::read_to_string(d.path().join(o).join("forecasts.csv")).unwrap();
    assert_eq!(read("a"), read("b"));
    // Our own names do not match that pattern: no frames, and the message says what was expected.
    let (code, text) = run(&site, &ours, "c");
    assert_eq!(code, Some(2), "{text}");
    assert!(text.contains("%Y-%m-%d_%H-%M-%S") && text.contains("UTC+02:00"), "{text}");
    // A pattern without the time of day, or a zone with daylight saving time, is refused.
    for (bad, field) in [("frame_time_format = \"%Y-%m-%d\"", "camera.frame_time_format"), ("frame_time_zone = \"Europe/Madrid\"", "camera.frame_time_zone")] {
        let key = bad.split(' ').next().unwrap();
        let text2: String = site_text.lines().map(|l| if l.starts_with(key) { bad.to_string() } else { l.to_string() }).collect::<Vec<_>>().join("\n");
        std::fs::write(&site, text2).unwrap();
        let (code, text) = run(&site, &theirs, "d");
        assert_eq!(code, Some(2), "{text}");
        assert!(text.contains(field), "{field}: {text}");
    }
}

/// Bad inputs stop a replay with exit status 2, a message naming the file, and no output files.
#[test]
fn replay_refuses_bad_inputs_without_partial_outputs() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    demo_frames(&frames, 3);
    let site = std::fs::read_to_string(demo().join("site.toml")).unwrap();
    let cal_dir = d.path().join("calibration");
    std::fs::create_dir_all(&cal_dir).unwrap();
    for e in std::fs::read_dir(demo().join("calibration")).unwrap().flatten() {
        std::fs::copy(e.path(), cal_dir.join(e.file_name())).unwrap();
    }
    // (site text, what the message must say)
    let no_blocks = {
        let i = site.find("[[plant.blocks]]").unwrap();
        let j = site[i..].find("\n[forecast]").map(|k| i + k).unwrap_or(site.len());
        format!("{}{}", &site[..i], &site[j..])
    };
    let cbh_csv = d.path().join("cbh.csv");
    std::fs::write(&cbh_csv, "time_utc,cbh_m\n2020-01-01T00:00:00Z,1000\n2020-01-01T01:00:00Z,1100\n").unwrap();
    let series = site.replace("base_height_m = 1400.0", "base_height_csv = \"cbh.csv\"");
    let cases = [(no_blocks, "plant.blocks"), (series, "does not cover the frames")];
    for (i, (text, want)) in cases.iter().enumerate() {
        let sp = d.path().join(format!("site{i}.toml"));
        std::fs::write(&sp, text).unwrap();
        let out = d.path().join(format!("out{i}"));
        let o = bin()
            .args(["replay", "--site", sp.to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", out.to_str().unwrap(), "--quiet"])
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "case {i}: {err}");
        assert!(err.contains(want), "case {i}: {err}");
        assert!(!out.exists(), "case {i}: partial outputs written");
    }
    // An empty frames folder.
    let empty = d.path().join("empty");
    std::fs::create_dir_all(&empty).unwrap();
    let o = bin()
        .args(["replay", "--site", demo().join("site.toml").to_str().unwrap(), "--frames", empty.to_str().unwrap(), "--out", d.path().join("o").to_str().unwrap()])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("no frames"));
}

/// `segment` writes a class mask of the same size and prints the cloud fraction.
#[test]
fn segment_writes_masks() {
    let d = tempfile::tempdir().unwrap();
    let mut f: Vec<_> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    f.sort();
    let o = bin().args(["segment", f[0].to_str().unwrap(), "--out", d.path().to_str().unwrap()]).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout).to_string();
    let mut lines = text.lines();
    assert_eq!(lines.next(), Some("image,cloud_fraction,classes_png,preview_png"), "{text}");
    let line = lines.next().unwrap();
    let cf: f64 = line.split(',').nth(1).unwrap().parse().unwrap();
    assert!((0.0..=1.0).contains(&cf));
    let mask_path = line.trim().split(',').nth(2).unwrap().to_string();
    let m = image::open(&mask_path).unwrap().to_luma8();
    assert_eq!(m.dimensions(), (512, 512));
    assert!(m.pixels().all(|p| p.0[0] <= 3));
    // The colour preview beside the mask: each class in its own colour, pixel for pixel.
    let preview_path = line.trim().split(',').nth(3).unwrap().to_string();
    assert!(preview_path.ends_with("_preview.png") && mask_path.ends_with("_classes.png"), "{line}");
    let pv = image::open(&preview_path).unwrap().to_rgb8();
    assert_eq!(pv.dimensions(), m.dimensions());
    let palette = [[0u8, 0, 0], [70, 130, 220], [205, 205, 205], [90, 90, 90]];
    for (c, p) in m.pixels().zip(pv.pixels()) {
        assert_eq!(p.0, palette[usize::from(c.0[0])]);
    }
    let classes_seen: std::collections::BTreeSet<u8> = m.pixels().map(|p| p.0[0]).collect();
    assert!(classes_seen.len() >= 3, "a demo frame shows unknown, clear and cloud: {classes_seen:?}");
    let o = bin().args(["segment", "/nonexistent.jpg", "--out", d.path().to_str().unwrap()]).output().unwrap();
    assert_eq!(o.status.code(), Some(2));
}

/// `segment --site` starts from the site camera's clear-sky library when its calibration names one
/// (`camera.clear_reference`), as the engine and `verify` do: a library far bluer than the parametric
/// default makes the same frame cloudier.
#[test]
fn segment_uses_the_sites_clear_sky_library() {
    let d = tempfile::tempdir().unwrap();
    let mut f: Vec<_> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    f.sort();
    let site_dir = d.path().join("site");
    std::fs::create_dir_all(site_dir.join("calibration")).unwrap();
    std::fs::copy(demo().join("site.toml"), site_dir.join("site.toml")).unwrap();
    let cal = site_dir.join("calibration").join("larkspur-sky1.toml");
    std::fs::copy(demo().join("calibration").join("larkspur-sky1.toml"), &cal).unwrap();
    let cloud_fraction = |out: &std::path::Path| -> (f64, Vec<u8>) {
        let o = bin()
            .args(["segment", f[0].to_str().unwrap(), "--site", site_dir.join("site.toml").to_str().unwrap(), "--out", out.to_str().unwrap()])
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let text = String::from_utf8_lossy(&o.stdout).to_string();
        let line = text.lines().nth(1).unwrap_or_else(|| panic!("{text}")).to_string();
        let cf: f64 = line.split(',').nth(1).unwrap().parse().unwrap();
        let mask = image::open(line.trim().split(',').nth(2).unwrap()).unwrap().to_luma8().into_raw();
        (cf, mask)
    };
    let (cf_default, mask_default) = cloud_fraction(&d.path().join("default"));
    // Every bin of the library (2° of zenith by 2° from the sun) at R/B 0.10.
    let mut lib = String::from("zenith_from_deg,gamma_from_deg,rb,weight\n");
    for z in (0..100).step_by(2) {
        for g in (0..180).step_by(2) {
            lib.push_str(&format!("{z},{g},0.10,50\n"));
        }
    }
    std::fs::write(site_dir.join("calibration").join("clear.csv"), lib).unwrap();
    let text = std::fs::read_to_string(&cal).unwrap();
    std::fs::write(&cal, text.replace("[camera]\n", "[camera]\nclear_reference = \"clear.csv\"\n")).unwrap();
    let (cf_lib, mask_lib) = cloud_fraction(&d.path().join("lib"));
    assert_ne!(mask_lib, mask_default, "the library changed no pixel's class");
    assert!(cf_lib > cf_default + 0.05, "cloud fraction {cf_lib} with the library, {cf_default} without");
}

/// `calibrate` on frames without a visible sun (overcast demo frames are cloudy; use night-time
/// names) says what it found, with exit status 2; `camera project` / `unproject` round-trip.
#[test]
fn calibrate_refuses_sunless_frames_and_camera_round_trips() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("night");
    std::fs::create_dir_all(&frames).unwrap();
    let mut f: Vec<_> = std::fs::read_dir(demo().join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    f.sort();
    for (i, p) in f.iter().take(4).enumerate() {
        std::fs::copy(p, frames.join(format!("frame_20260614T2{i}0000Z.jpg"))).unwrap();
    }
    let o = bin()
        .args(["calibrate", "--site", demo().join("site.toml").to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", d.path().join("c.toml").to_str().unwrap()])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("0 sun detections, 20 needed (4 frames read, 4 with the sun below 20°"), "{err}");
    let cal = demo().join("calibration/larkspur-sky1.toml");
    let run = |sub: &str, input: &str| {
        use std::io::Write;
        let mut c = bin().args(["camera", sub, "--calibration", cal.to_str().unwrap()]).stdin(std::process::Stdio::piped()).stdout(std::process::Stdio::piped()).spawn().unwrap();
        c.stdin.take().unwrap().write_all(input.as_bytes()).unwrap();
        String::from_utf8(c.wait_with_output().unwrap().stdout).unwrap()
    };
    let px = run("project", "zenith_deg,azimuth_deg\n40,123\n95,0\n");
    let lines: Vec<&str> = px.lines().collect();
    assert_eq!(lines[0], "x_px,y_px");
    assert_eq!(lines[2], ",", "below the horizon is outside the image");
    let back = run("unproject", &format!("{}\n", lines[1]));
    let v: Vec<f64> = back.lines().nth(1).unwrap().split(',').map(|x| x.parse().unwrap()).collect();
    assert!((v[0] - 40.0).abs() < 1e-3 && (v[1] - 123.0).abs() < 1e-3, "{back}");
}

/// `qc` flags an impossible pyranometer reading and a stuck run, and writes per-row flags.
#[test]
fn qc_flags_bad_measurements() {
    let d = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(demo().join("measurements.csv")).unwrap();
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    // Row 10 (after the comment and header): an impossible GHI in the first pyranometer column.
    let mut cells: Vec<String> = lines[12].split(',').map(String::from).collect();
    cells[1] = "3000.0".into();
    lines[12] = cells.join(",");
    // Rows 20–31: the second column stuck.
    for l in lines.iter_mut().skip(22).take(12) {
        let mut c: Vec<String> = l.split(',').map(String::from).collect();
        c[2] = "432.0".into();
        *l = c.join(",");
    }
    let p = d.path().join("m.csv");
    std::fs::write(&p, lines.join("\n") + "\n").unwrap();
    let out = d.path().join("flags.csv");
    let o = bin()
        .args(["qc", "--site", demo().join("site.toml").to_str().unwrap(), "--measurements", p.to_str().unwrap(), "--out", out.to_str().unwrap()])
        .output()
        .unwrap();
    let s = String::from_utf8_lossy(&o.stdout);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(s.contains("ghi_physically_impossible 1"), "{s}");
    assert!(s.contains("stuck 12"), "{s}");
    let flags = std::fs::read_to_string(&out).unwrap();
    assert_eq!(flags.lines().count(), 1 + lines.len() - 2);

    // --fail-on-impossible: exit status 3 naming the file and the row count, the report and the
    // flags file still written; the clean demo file passes with it.
    std::fs::remove_file(&out).unwrap();
    let o = bin()
        .args(["qc", "--site", demo().join("site.toml").to_str().unwrap(), "--measurements", p.to_str().unwrap(), "--out", out.to_str().unwrap(), "--fail-on-impossible"])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(3), "{err}");
    assert!(err.contains(p.to_str().unwrap()) && err.contains("1 row(s)") && err.contains("physically possible"), "{err}");
    assert!(String::from_utf8_lossy(&o.stdout).contains("ghi_physically_impossible 1"));
    assert!(out.exists());
    let o = bin()
        .args(["qc", "--site", demo().join("site.toml").to_str().unwrap(), "--measurements", demo().join("measurements.csv").to_str().unwrap(), "--fail-on-impossible"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let help = bin().args(["qc", "--help"]).output().unwrap();
    assert!(String::from_utf8_lossy(&help.stdout).contains("status 3"));
}

/// `sun --start`/`--end` take a date alone: 00:00 UTC for the start, 24:00 (the next day's 00:00)
/// for the end; the help says so.
#[test]
fn sun_takes_a_date_alone() {
    let o = bin().args(["sun", "--lat", "37.4", "--lon", "-122.1", "--start", "2026-06-14", "--end", "2026-06-14", "--step", "1h"]).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8(o.stdout).unwrap();
    let times: Vec<&str> = text.lines().skip(1).map(|l| l.split(',').next().unwrap()).collect();
    assert_eq!(times.len(), 25, "00:00 to 24:00 inclusive");
    assert_eq!(times[0], "2026-06-14T00:00:00Z");
    assert_eq!(times[24], "2026-06-15T00:00:00Z");
    // Mixed with a full time.
    let o = bin().args(["sun", "--lat", "37.4", "--lon", "-122.1", "--start", "2026-06-14T22:00:00Z", "--end", "2026-06-14", "--step", "1h"]).output().unwrap();
    assert_eq!(String::from_utf8_lossy(&o.stdout).lines().count(), 1 + 3);
    let o = bin().args(["sun", "--lat", "37.4", "--lon", "-122.1", "--start", "14/06/2026", "--end", "2026-06-14"]).output().unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("--start"));
    let help = String::from_utf8(bin().args(["sun", "--help"]).output().unwrap().stdout).unwrap();
    assert!(help.contains("date alone") && help.contains("24:00"), "{help}");
}

/// A missing input is reported once, with its path: each cause of the error chain once.
#[test]
fn missing_inputs_are_reported_once_with_their_path() {
    let d = tempfile::tempdir().unwrap();
    let missing = d.path().join("nonexist");
    let site = demo().join("site.toml");
    let (out_o, out_s) = (d.path().join("o"), d.path().join("s"));
    let cases: [Vec<&str>; 3] = [
        vec!["replay", "--site", site.to_str().unwrap(), "--frames", missing.to_str().unwrap(), "--out", out_o.to_str().unwrap()],
        vec!["segment", missing.to_str().unwrap(), "--out", out_s.to_str().unwrap()],
        vec!["qc", "--site", site.to_str().unwrap(), "--measurements", missing.to_str().unwrap()],
    ];
    for args in cases {
        let o = bin().args(&args).output().unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {err}");
        assert_eq!(err.matches(missing.to_str().unwrap()).count(), 1, "{args:?}: {err}");
        assert_eq!(err.matches("No such file or directory").count(), 1, "{args:?}: {err}");
        assert_eq!(err.trim_end().lines().count(), 1, "{args:?}: {err}");
    }
}

/// The calibration workflow end to end: `synth` a clear day, `calibrate` from its frames, point the
/// site file at the written calibration and `replay` the frames with it; the fitted camera agrees
/// with the scene's true camera file to a fraction of a degree in yaw.
#[test]
fn calibrate_then_replay_with_the_written_file() {
    let d = tempfile::tempdir().unwrap();
    let seq = d.path().join("day");
    let o = bin().args(["synth", "--scene", "clear-day", "--minutes", "420", "--step-s", "900", "--quiet", "--out", seq.to_str().unwrap()]).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let out = seq.join("calibration/fitted.toml");
    let o = bin()
        .args(["calibrate", "--site", seq.join("site.toml").to_str().unwrap(), "--frames", seq.join("frames").to_str().unwrap(), "--out", out.to_str().unwrap()])
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&o.stdout).into_owned() + &String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{text}");
    assert!(seq.join("calibration/fitted-residuals.png").exists(), "{text}");
    // The clear-sky library is named by its content and named in the file; a second run over the
    // same frames writes the same names and removes this calibration's superseded side files only.
    let library = |p: &std::path::Path| -> String {
        let v: toml::Value = toml::from_str(&std::fs::read_to_string(p).unwrap()).unwrap();
        v["camera"]["clear_reference"].as_str().unwrap().to_string()
    };
    let first = library(&out);
    assert!(first.starts_with("fitted-clear-sky-") && seq.join("calibration").join(&first).is_file(), "{first}");
    std::fs::write(seq.join("calibration/fitted-clear-sky-deadbeef.csv"), "old").unwrap();
    std::fs::write(seq.join("calibration/fitted-clear-sky.csv"), "older").unwrap();
    std::fs::write(seq.join("calibration/other-clear-sky-deadbeef.csv"), "another camera's").unwrap();
    let o = bin()
        .args(["calibrate", "--site", seq.join("site.toml").to_str().unwrap(), "--frames", seq.join("frames").to_str().unwrap(), "--out", out.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert_eq!(library(&out), first, "the same frames give the same library");
    let libraries: Vec<String> = std::fs::read_dir(seq.join("calibration")).unwrap().flatten().map(|e| e.file_name().to_string_lossy().into_owned()).filter(|f| f.contains("-clear-sky")).collect();
    assert_eq!(libraries.len(), 2, "{libraries:?}");
    assert!(libraries.contains(&first) && libraries.contains(&"other-clear-sky-deadbeef.csv".to_string()), "{libraries:?}");
    let yaw = |p: &std::path::Path| -> f64 {
        let v: toml::Value = toml::from_str(&std::fs::read_to_string(p).unwrap()).unwrap();
        v.get("camera").and_then(|o| o.get("yaw_deg")).and_then(|y| y.as_float()).unwrap_or_else(|| panic!("no camera.yaw_deg in {}", p.display()))
    };
    let site = std::fs::read_to_string(seq.join("site.toml")).unwrap();
    let truth_file = site.lines().find_map(|l| l.trim().strip_prefix("calibration = ")).unwrap().trim_matches('"').to_string();
    let dy = (yaw(&out) - yaw(&seq.join(&truth_file))).abs();
    assert!(dy < 0.2, "fitted yaw differs from the true camera's by {dy}°");
    std::fs::write(seq.join("site.toml"), site.replace(&format!("calibration = \"{truth_file}\""), "calibration = \"calibration/fitted.toml\"")).unwrap();
    let o = bin()
        .args(["replay", "--site", seq.join("site.toml").to_str().unwrap(), "--frames", seq.join("frames").to_str().unwrap(), "--out", d.path().join("out").to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let fc = std::fs::read_to_string(d.path().join("out/forecasts.csv")).unwrap();
    assert!(fc.lines().count() > 100, "{} forecast rows", fc.lines().count());
    // One camera, no estimate of the base: the map's plane stays where the site puts it, and the
    // summary says so.
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(text.lines().any(|l| l.starts_with("cloud map plane: ") && l.contains("where it started")), "{text}");
    // The library carries the clear sky's brightness (the dark-cloud test's reference).
    let lib = std::fs::read_to_string(seq.join("calibration").join(&first)).unwrap();
    assert_eq!(lib.lines().next(), Some("zenith_from_deg,gamma_from_deg,rb,weight,brightness,clear_sky_clips"));
    // Bins learnt from unclipped clear sky carry a brightness; bins where the clear sky clipped
    // (`clear_sky_clips` 1) carry none.
    let rows: Vec<(f64, &str)> = lib.lines().skip(1).filter_map(|l| { let f: Vec<&str> = l.split(',').collect(); Some((f.get(4)?.parse().ok()?, *f.get(5)?)) }).collect();
    let bright: Vec<f64> = rows.iter().filter(|(_, c)| *c == "0").map(|(b, _)| *b).collect();
    assert!(!bright.is_empty() && bright.iter().all(|v| (1.0..=255.0).contains(v)), "brightness column {:?}", &bright[..bright.len().min(5)]);
    assert!(rows.iter().all(|(b, c)| *c == "0" || (*c == "1" && *b == 0.0)), "a clipped bin with a brightness");
}

/// The horizon-0 skill (persistence is exact there) is shown as "n/a", never NaN: on the console
/// of `demo` and `evaluate` and in the HTML report (outside its inline pictures).
#[test]
fn horizon_zero_skill_is_not_nan() {
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("demo");
    let o = bin().args(["demo", "--quiet", "--out", out.to_str().unwrap()]).output().unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(!text.to_lowercase().contains("nan"), "{text}");
    let zero = text.lines().find(|l| l.trim_start().starts_with("0 min")).unwrap_or_else(|| panic!("no horizon-0 row: {text}"));
    assert!(zero.trim_end().ends_with("n/a"), "{zero}");
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    let without_pictures: String = html.split("data:image/png;base64,").enumerate().map(|(i, part)| if i == 0 { part } else { part.split_once('\'').map_or("", |p| p.1) }).collect();
    assert!(!without_pictures.contains("NaN"), "NaN in the report");
    assert!(without_pictures.contains("<td>0 min</td>") && without_pictures.contains("<td>n/a</td>"));
    for args in [
        vec!["evaluate", "--replay", out.to_str().unwrap(), "--sequence", demo().to_str().unwrap()],
        vec!["evaluate", "--replay", out.to_str().unwrap(), "--measurements", demo().join("measurements.csv").to_str().unwrap(), "--site", demo().join("site.toml").to_str().unwrap()],
    ] {
        let o = bin().args(&args).output().unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let text = String::from_utf8_lossy(&o.stdout);
        assert!(!text.to_lowercase().contains("nan") && !text.contains("inf"), "{args:?}: {text}");
    }
}

/// A measurements file with only the weather (`temp_air_c`, `wind_speed_mps`) is read by the power
/// model without pyranometers (before, a file without a pyranometer or meter column was ignored
/// whole): hot still air heats the modules, and the power forecast falls by the temperature
/// coefficient (the Faiman model, `power`), while the irradiance is unchanged.
#[test]
fn weather_alone_reaches_the_power_model() {
    let d = tempfile::tempdir().unwrap();
    let frames = d.path().join("frames");
    demo_frames(&frames, 3);
    let run = |measurements: Option<&std::path::Path>, out: &str| {
        let out = d.path().join(out);
        let mut args: Vec<String> = ["replay", "--site", demo().join("site.toml").to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", out.to_str().unwrap(), "--quiet"].map(String::from).to_vec();
        if let Some(m) = measurements {
            args.extend(["--measurements".to_string(), m.to_str().unwrap().to_string()]);
        }
        let o = bin().args(&args).output().unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let stdout = String::from_utf8_lossy(&o.stdout).into_owned();
        (std::fs::read_to_string(out.join("forecasts.csv")).unwrap(), stdout)
    };
    let mut csv = String::from("time_utc,temp_air_c,wind_speed_mps\n");
    for k in 0..120 {
        csv += &format!("2026-06-14T{:02}:{:02}:00Z,45.0,0.5\n", 7 + k / 60, k % 60);
    }
    let m = d.path().join("weather.csv");
    std::fs::write(&m, csv).unwrap();
    let (plain, _) = run(None, "plain");
    let (hot, stdout) = run(Some(&m), "hot");
    assert!(!stdout.contains("nothing in"), "{stdout}");
    let col = |fc: &str, name: &str| fc.lines().next().unwrap().split(',').position(|c| c == name).unwrap();
    let plant = |fc: &str, name: &str| -> f64 { let c = col(fc, name); fc.lines().skip(1).filter(|l| l.contains(",plant,")).map(|l| l.split(',').nth(c).unwrap().parse::<f64>().unwrap()).sum() };
    assert_eq!(plant(&plain, "ghi_wm2"), plant(&hot, "ghi_wm2"), "the weather must not move the irradiance");
    let (p0, p1) = (plant(&plain, "power_kw"), plant(&hot, "power_kw"));
    assert!(p1 < 0.97 * p0, "45 °C still air should cut the power: {p1:.0} against {p0:.0} kW summed");
}
