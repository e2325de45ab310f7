//! A corpus of bad inputs generated here: mutations of a valid site file, calibration file,
//! measurements CSV, cloud base height series and command lines, each with its expected outcome
//! (accepted, or refused with exit status 2 and a message naming the field, column or line).
//! All cases run through the library entry points; a representative subset also through the
//! binary. Nothing may panic, abort or hang.
#![cfg(feature = "server")]
mod inputs;

use std::path::Path;
use std::process::Command;

use clap::Parser;
use nephocast::cli::{Cli, check_args, exit_status};

/// The expected outcome of a case.
#[derive(Debug, Clone)]
enum Expect {
    /// Accepted.
    Ok,
    /// Accepted, with a measurement flag (`"<column> <reason>"`) counted.
    Flagged(&'static str),
    /// Refused with exit status 2, the message holding every one of these strings.
    Refused(Vec<String>),
}

fn refused(parts: &[&str]) -> Expect {
    Expect::Refused(parts.iter().map(|s| s.to_string()).collect())
}

/// What a case gives: the measurement flags when it read measurements.
type Outcome = Result<Option<std::collections::BTreeMap<String, usize>>, anyhow::Error>;

struct Case {
    name: String,
    expect: Expect,
    run: Box<dyn Fn() -> Outcome>,
}

fn check(c: &Case) -> Result<(), String> {
    let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| (c.run)())).map_err(|_| format!("{}: panicked", c.name))?;
    match (&c.expect, out) {
        (Expect::Ok, Ok(_)) => Ok(()),
        (Expect::Flagged(k), Ok(Some(f))) if f.keys().any(|x| x == k) => Ok(()),
        (Expect::Refused(parts), Err(e)) => {
            let msg = format!("{e:#}");
            let code = exit_status(&e);
            if code != 2 {
                return Err(format!("{}: exit status {code}, expected 2: {msg}", c.name));
            }
            match parts.iter().find(|p| !msg.contains(p.as_str())) {
                Some(p) => Err(format!("{}: message does not name {p:?}: {msg}", c.name)),
                None => Ok(()),
            }
        }
        (want, Ok(f)) => Err(format!("{}: expected {want:?}, accepted (flags {f:?})", c.name)),
        (want, Err(e)) => Err(format!("{}: expected {want:?}, refused: {e:#}", c.name)),
    }
}

/// Replace the line starting with `key =` in a TOML text (the first after `after`, if given).
fn set(text: &str, after: &str, key: &str, value: &str) -> String {
    let start = text.find(after).unwrap_or(0);
    let (head, tail) = text.split_at(start);
    let at = tail.find(&format!("\n{key} =")).map(|i| i + 1).or_else(|| tail.starts_with(&format!("{key} =")).then_some(0)).unwrap_or_else(|| panic!("no {key} after {after}"));
    let end = tail[at..].find('\n').map(|i| at + i).unwrap_or(tail.len());
    format!("{head}{}{key} = {value}{}", &tail[..at], &tail[end..])
}

fn remove_line(text: &str, after: &str, key: &str) -> String {
    let s = set(text, after, key, "REMOVED");
    s.replace(&format!("{key} = REMOVED\n"), "")
}

const NON_FINITE: [&str; 3] = ["nan", "inf", "-inf"];

fn site_cases() -> Vec<Case> {
    // (section marker, key, field path, values out of range)
    let fields: &[(&str, &str, &str, &[&str])] = &[
        ("[site]", "latitude_deg", "site.latitude_deg", &["90.5", "-123.0", "1e308"]),
        ("[site]", "longitude_deg", "site.longitude_deg", &["181.0", "-400.0"]),
        ("[site]", "elevation_m", "site.elevation_m", &["-1000.0", "1e9"]),
        ("[site]", "pressure_hpa", "site.pressure_hpa", &["0.0", "5000.0"]),
        ("[site]", "temperature_c", "site.temperature_c", &["-300.0", "100.0"]),
        ("[site]", "linke_turbidity", "site.linke_turbidity", &["0.0", "-3.0", "11.0"]),
        ("[camera]", "position_m", "camera.position_m[0]", &["[1e9, 0.0, 0.0]", "[nan, 0.0, 0.0]"]),
        ("[clouds]", "base_height_m", "clouds.base_height_m", &["-1000.0", "0.0", "49.0", "15001.0", "1e308"]),
        ("[plant]", "point_spacing_m", "plant.point_spacing_m", &["0.0", "-25.0", "0.5", "5000.0"]),
        ("[[plant.blocks]]", "capacity_kw", "plant.blocks[0].capacity_kw", &["0.0", "-5.0", "1e12"]),
        ("[[plant.blocks]]", "ac_capacity_kw", "plant.blocks[0].ac_capacity_kw", &["0.0", "-1.0"]),
        ("[[plant.blocks]]", "tilt_deg", "plant.blocks[0].tilt_deg", &["-5.0", "91.0"]),
        ("[[plant.blocks]]", "azimuth_deg", "plant.blocks[0].azimuth_deg", &["-1.0", "361.0"]),
        ("name = \"b\"", "max_angle_deg", "plant.blocks[1].max_angle_deg", &["-1.0", "95.0"]),
        ("name = \"b\"", "axis_azimuth_deg", "plant.blocks[1].axis_azimuth_deg", &["400.0"]),
        ("[map]", "cells", "map.cells", &["0", "8", "100000"]),
        ("[map]", "max_zenith_deg", "map.max_zenith_deg", &["89.9", "10.0"]),
        ("[map]", "height_bucket_m", "map.height_bucket_m", &["0.0", "1e6"]),
        ("[map]", "decode_reduction", "map.decode_reduction", &["3", "16"]),
        ("[irradiance]", "ensemble_members", "irradiance.ensemble_members", &["201", "100000"]),
        ("[[pyranometers]]", "position_m", "pyranometers[0].position_m[0]", &["[1e7, 0.0]"]),
    ];
    let mut cases = vec![];
    let push = |cases: &mut Vec<Case>, name: String, text: String, expect: Expect| {
        cases.push(Case { name, expect, run: Box::new(move || inputs::site(&text).map(|_| None)) });
    };
    push(&mut cases, "site: valid".into(), inputs::SITE.into(), Expect::Ok);
    for (after, key, field, bad) in fields {
        let floats = !matches!(*key, "cells" | "ensemble_members" | "position_m" | "decode_reduction");
        let mut values: Vec<&str> = bad.to_vec();
        if floats {
            values.extend(NON_FINITE);
        }
        for v in values {
            push(&mut cases, format!("site: {field} = {v}"), set(inputs::SITE, after, key, v), refused(&["site.toml", field]));
        }
        // Wrong type: the parser names the field and line.
        push(&mut cases, format!("site: {field} as text"), set(inputs::SITE, after, key, "\"x\""), refused(&["site.toml", key, "line"]));
    }
    // Integers written where a whole number is expected.
    for (after, key, field, v) in [
        ("[forecast]", "horizon_min", "forecast.horizon_min", "0"),
        ("[forecast]", "horizon_min", "forecast.horizon_min", "61"),
        ("[forecast]", "step_s", "forecast.step_s", "7"),
        ("[forecast]", "step_s", "forecast.step_s", "0"),
    ] {
        push(&mut cases, format!("site: {field} = {v}"), set(inputs::SITE, after, key, v), refused(&[field]));
    }
    for (after, key, v) in [("[forecast]", "horizon_min", "-5"), ("[forecast]", "horizon_min", "1e9"), ("[forecast]", "step_s", "99999999999")] {
        push(&mut cases, format!("site: forecast.{key} = {v}"), set(inputs::SITE, after, key, v), refused(&[key]));
    }
    // Required fields missing.
    for (after, key) in [("[site]", "latitude_deg"), ("[site]", "name"), ("[camera]", "calibration"), ("[[plant.blocks]]", "capacity_kw"), ("[[plant.blocks]]", "mount"), ("[[plant.blocks]]", "polygon_m")] {
        push(&mut cases, format!("site: {key} missing"), remove_line(inputs::SITE, after, key), refused(&[key]));
    }
    // A fixed block without its angles.
    push(&mut cases, "site: fixed block without tilt".into(), remove_line(inputs::SITE, "[[plant.blocks]]", "tilt_deg"), refused(&["plant.blocks[0].tilt_deg"]));
    // Choices.
    push(&mut cases, "site: unknown clear-sky model".into(), set(inputs::SITE, "[site]", "linke_turbidity", "3.0\nclear_sky_model = \"bird\""), refused(&["site.clear_sky_model"]));
    push(&mut cases, "site: unknown mount".into(), set(inputs::SITE, "[[plant.blocks]]", "mount", "\"floating\""), refused(&["mount"]));
    push(&mut cases, "site: unknown field".into(), set(inputs::SITE, "[clouds]", "base_height_m", "1500.0\nbase_hieght_m = 3.0"), refused(&["base_hieght_m"]));
    push(&mut cases, "site: both cloud bases".into(), set(inputs::SITE, "[clouds]", "base_height_m", "1500.0\nbase_height_csv = \"cbh.csv\""), refused(&["clouds"]));
    push(&mut cases, "site: no cloud base".into(), remove_line(inputs::SITE, "[clouds]", "base_height_m"), refused(&["clouds"]));
    push(&mut cases, "site: empty camera calibration".into(), set(inputs::SITE, "[camera]", "calibration", "\"\""), refused(&["camera.calibration"]));
    push(&mut cases, "site: empty second camera calibration".into(), format!("{}\n[second_camera]\ncalibration = \"\"\nposition_m = [1000.0, 0.0, 3.0]\n", inputs::SITE), refused(&["second_camera.calibration"]));
    // Polygons.
    for (poly, why) in [
        ("[[0.0, 0.0], [1.0, 0.0]]", "two vertices"),
        ("[]", "no vertices"),
        ("[[0.0, 0.0], [100.0, 0.0], [200.0, 0.0]]", "zero area"),
        ("[[0.0, 0.0], [nan, 0.0], [0.0, 100.0]]", "nan vertex"),
        ("[[0.0, 0.0], [1e9, 0.0], [0.0, 100.0]]", "vertex far away"),
    ] {
        push(&mut cases, format!("site: polygon {why}"), set(inputs::SITE, "[[plant.blocks]]", "polygon_m", poly), refused(&["plant.blocks[0].polygon_m"]));
    }
    // Arrays with a value too many (once read silently without it) or too few.
    push(&mut cases, "site: polygon vertex of three numbers".into(), set(inputs::SITE, "[[plant.blocks]]", "polygon_m", "[[0.0, 0.0, 1.5], [400.0, 0.0], [400.0, 300.0]]"), refused(&["plant.blocks[0].polygon_m", "vertex [0]", "invalid length 3", "2 numbers"]));
    push(&mut cases, "site: polygon vertex of one number".into(), set(inputs::SITE, "[[plant.blocks]]", "polygon_m", "[[0.0, 0.0], [400.0], [400.0, 300.0]]"), refused(&["plant.blocks[0].polygon_m", "vertex [1]", "invalid length 1"]));
    push(&mut cases, "site: camera position of four numbers".into(), set(inputs::SITE, "[camera]", "position_m", "[0.0, 0.0, 3.0, 1.0]"), refused(&["camera.position_m", "invalid length 4", "3 numbers"]));
    push(&mut cases, "site: camera position of two numbers".into(), set(inputs::SITE, "[camera]", "position_m", "[0.0, 0.0]"), refused(&["camera.position_m", "invalid length 2", "3 numbers"]));
    push(&mut cases, "site: pyranometer position with a height".into(), set(inputs::SITE, "[[pyranometers]]", "position_m", "[200.0, 150.0, 1.5]"), refused(&["pyranometers[0].position_m", "invalid length 3", "2 numbers"]));
    push(&mut cases, "site: camera position absent (default)".into(), remove_line(inputs::SITE, "[camera]", "position_m"), Expect::Ok);
    let huge_vertices: String = format!("[{}]", (0..10_001).map(|i| { let a = i as f64 / 10_001.0 * std::f64::consts::TAU; format!("[{:.3}, {:.3}]", 100.0 * a.cos(), 100.0 * a.sin()) }).collect::<Vec<_>>().join(", "));
    push(&mut cases, "site: 10001 vertices".into(), set(inputs::SITE, "[[plant.blocks]]", "polygon_m", &huge_vertices), refused(&["plant.blocks[0].polygon_m", "10000 vertices"]));
    // Bounded work: the ±50 km block at 1 m spacing, and its smaller relatives.
    let square = |h: f64| format!("[[{}, {}], [{h}, {}], [{h}, {h}], [{}, {h}]]", -h, -h, -h, -h);
    let big = set(&set(inputs::SITE, "[[plant.blocks]]", "polygon_m", &square(50_000.0)), "[plant]", "point_spacing_m", "1.0");
    push(&mut cases, "site: ±50 km block at 1 m".into(), big, refused(&["plant.blocks[0].polygon_m", "cells", "point_spacing_m"]));
    let many_points = set(&set(inputs::SITE, "[[plant.blocks]]", "polygon_m", &square(1_000.0)), "[plant]", "point_spacing_m", "1.0");
    push(&mut cases, "site: 4 million points".into(), many_points, refused(&["plant.point_spacing_m", "1000000 forecast points"]));
    let heavy = set(&set(&set(&set(inputs::SITE, "[[plant.blocks]]", "polygon_m", &square(1_000.0)), "[plant]", "point_spacing_m", "5.0"), "[forecast]", "step_s", "15"), "[irradiance]", "ensemble_members", "200");
    push(&mut cases, "site: memory over the cap".into(), heavy, refused(&["irradiance.ensemble_members", "MB", "points"]));
    let fine = set(&set(inputs::SITE, "[[plant.blocks]]", "polygon_m", &square(500.0)), "[plant]", "point_spacing_m", "5.0");
    push(&mut cases, "site: 40 000 points within the cap".into(), fine, Expect::Ok);
    push(&mut cases, "site: the largest map within the cap".into(), set(inputs::SITE, "[map]", "cells", "2048"), Expect::Ok);
    let many_blocks = {
        let mut s = inputs::SITE.to_string();
        for i in 0..10_001 {
            s += &format!("\n[[plant.blocks]]\nname = \"x{i}\"\npolygon_m = [[0.0, 0.0], [10.0, 0.0], [0.0, 10.0]]\ncapacity_kw = 1.0\nmount = \"single-axis\"\n");
        }
        s
    };
    push(&mut cases, "site: 10003 blocks".into(), many_blocks, refused(&["plant.blocks", "10000 blocks"]));
    // The Modbus measurement feed's section.
    let modbus = |fields: &str, register: &str| {
        format!("{}\n[measurements_modbus]\naddress = \"127.0.0.1:5502\"\n{fields}\n[[measurements_modbus.registers]]\ncolumn = \"ghi_a_wm2\"\naddress = 0\n{register}\n", inputs::SITE)
    };
    push(&mut cases, "site: modbus feed valid".into(), modbus("unit_id = 3\npoll_s = 1.0", "format = \"f32\"\nword_order = \"little\"\nkind = \"holding\"\nscale = 0.1"), Expect::Ok);
    for (fields, register, field) in [
        ("", "", "measurements_modbus.address"),
        ("poll_s = 0.0", "", "measurements_modbus.poll_s"),
        ("poll_s = 120.0", "", "measurements_modbus.poll_s"),
        ("averaging_s = 30.5", "", "measurements_modbus.averaging_s"),
        ("averaging_s = nan", "", "measurements_modbus.averaging_s"),
        ("timeout_s = 0.0", "", "measurements_modbus.timeout_s"),
        ("", "scale = 0.0", "measurements_modbus.registers[0].scale"),
        ("", "offset = inf", "measurements_modbus.registers[0].offset"),
    ] {
        let mut text = modbus(fields, register);
        if field.ends_with(".address") {
            text = text.replace("address = \"127.0.0.1:5502\"", "address = \"127.0.0.1\"");
        }
        push(&mut cases, format!("site: {field} ({fields}{register})"), text, refused(&["site.toml", field]));
    }
    push(&mut cases, "site: modbus column of no pyranometer".into(), modbus("", "").replace("ghi_a_wm2", "ghi_b_wm2"), refused(&["measurements_modbus.registers[0].column", "ghi_a_wm2"]));
    push(&mut cases, "site: modbus u32 past the last register".into(), modbus("", "format = \"u32\"").replace("address = 0\n", "address = 65535\n"), refused(&["measurements_modbus.registers[0].address"]));
    push(&mut cases, "site: modbus unknown format".into(), modbus("", "format = \"f64\""), refused(&["site.toml", "format"]));
    push(&mut cases, "site: modbus unit id 300".into(), modbus("unit_id = 300", ""), refused(&["site.toml", "unit_id"]));
    let twice = format!("{}[[measurements_modbus.registers]]\ncolumn = \"ghi_a_wm2\"\naddress = 4\n", modbus("", ""));
    push(&mut cases, "site: modbus column twice".into(), twice, refused(&["measurements_modbus.registers[1].column"]));
    // Plant meter registers: power_plant_kw / power_<block>_kw with a power unit.
    let meter = |column: &str, unit: &str| modbus("", "").replace("column = \"ghi_a_wm2\"", &format!("column = \"{column}\"\nunit = \"{unit}\""));
    push(&mut cases, "site: modbus plant meter in MW".into(), meter("power_plant_kw", "MW"), Expect::Ok);
    push(&mut cases, "site: modbus plant meter in W/m2".into(), meter("power_plant_kw", "W/m2"), refused(&["measurements_modbus.registers[0].unit", "\"kW\", \"W\", \"MW\""]));
    push(&mut cases, "site: modbus pyranometer in kW".into(), meter("ghi_a_wm2", "kW"), refused(&["measurements_modbus.registers[0].unit", "W/m2"]));
    push(&mut cases, "site: modbus meter of no block".into(), meter("power_nowhere_kw", "kW"), refused(&["measurements_modbus.registers[0].column", "power_plant_kw"]));
    // The webhook's delivery settings.
    let webhook = |fields: &str| format!("{}\n[webhook]\n{fields}\n", inputs::SITE);
    push(&mut cases, "site: webhook settings valid".into(), webhook("max_attempts = 3\nbackoff_first_s = 0.5\nbackoff_max_s = 30\nqueue_max = 10"), Expect::Ok);
    for (fields, field) in [
        ("max_attempts = 0", "webhook.max_attempts"),
        ("max_attempts = 21", "webhook.max_attempts"),
        ("backoff_first_s = nan", "webhook.backoff_first_s"),
        ("backoff_first_s = 10\nbackoff_max_s = 5", "webhook.backoff_max_s"),
        ("attempt_timeout_s = 1000", "webhook.attempt_timeout_s"),
        ("queue_max = 0", "webhook.queue_max"),
    ] {
        push(&mut cases, format!("site: {field} ({fields})"), webhook(fields), refused(&["site.toml", field]));
    }
    push(&mut cases, "site: modbus without registers".into(), format!("{}\n[measurements_modbus]\naddress = \"h:502\"\nregisters = []\n", inputs::SITE), refused(&["measurements_modbus.registers"]));
    // Syntax.
    for (bad, why) in [("[site\n", "unclosed table"), ("latitude_deg = = 4\n", "double equals"), ("\u{0}\n", "NUL byte"), ("[site]\n", "duplicate table")] {
        push(&mut cases, format!("site: {why}"), format!("{bad}{}", inputs::SITE), refused(&["site.toml"]));
    }
    push(&mut cases, "site: empty".into(), String::new(), refused(&["site.toml", "site"]));
    push(&mut cases, "site: truncated".into(), inputs::SITE[..inputs::SITE.len() / 3].to_string(), refused(&["site.toml"]));
    cases
}

fn calibration_cases() -> Vec<Case> {
    let fields: &[(&str, &str, &str, &[&str])] = &[
        ("[camera]", "f_px_per_rad", "camera.f_px_per_rad", &["-158.0", "0.0", "1e9"]),
        ("[camera]", "cx_px", "camera.cx_px", &["-1.0", "600.0"]),
        ("[camera]", "cy_px", "camera.cy_px", &["-1.0", "1e308"]),
        ("[camera]", "max_field_angle_deg", "camera.max_field_angle_deg", &["0.0", "200.0"]),
        ("[camera]", "yaw_deg", "camera.yaw_deg", &["720.0"]),
        ("[camera]", "pitch_deg", "camera.pitch_deg", &["46.0", "-90.0"]),
        ("[camera]", "roll_deg", "camera.roll_deg", &["46.0", "-46.0"]),
        ("[fit]", "rms_deg", "fit.rms_deg", &["-1.0"]),
        ("[fit]", "max_px", "fit.max_px", &["-0.5"]),
        ("[fit]", "detections_azimuth_span_deg", "fit.detections_azimuth_span_deg", &["0.0", "3.0", "-10.0"]),
        ("[fit.std_errors]", "roll_deg", "fit.std_errors.roll_deg", &["0.0", "-0.1"]),
        ("[fit.std_errors]", "f_px_per_rad", "fit.std_errors.f_px_per_rad", &["0.0"]),
    ];
    let mut cases = vec![];
    let push = |cases: &mut Vec<Case>, name: String, text: String, expect: Expect| {
        cases.push(Case { name, expect, run: Box::new(move || inputs::calibration(&text).map(|_| None)) });
    };
    push(&mut cases, "calibration: valid".into(), inputs::CALIBRATION.into(), Expect::Ok);
    for (after, key, field, bad) in fields {
        let mut values: Vec<&str> = bad.to_vec();
        values.extend(NON_FINITE);
        for v in values {
            push(&mut cases, format!("calibration: {field} = {v}"), set(inputs::CALIBRATION, after, key, v), refused(&["cam.toml", field]));
        }
    }
    for (key, v, field) in [("width_px", "0", "camera.width_px"), ("width_px", "100000", "camera.width_px"), ("height_px", "8", "camera.height_px"), ("width_px", "-5", "width_px"), ("width_px", "512.5", "width_px")] {
        push(&mut cases, format!("calibration: {key} = {v}"), set(inputs::CALIBRATION, "[camera]", key, v), refused(&[field]));
    }
    for (v, field) in [("\"fisheye\"", "camera.model"), ("3", "model")] {
        push(&mut cases, format!("calibration: model = {v}"), set(inputs::CALIBRATION, "[camera]", "model", v), refused(&[field]));
    }
    let poly = set(inputs::CALIBRATION, "[camera]", "model", "\"polynomial\"");
    for (k, field) in [("[1.0, -0.2, 0.0, 0.0, 0.1]", "camera.k"), ("[1.0, nan]", "camera.k[1]"), ("[1.0, 50.0]", "camera.k[1]"), ("[1.0, -0.9]", "camera.k")] {
        push(&mut cases, format!("calibration: k = {k}"), set(&poly, "[camera]", "model", &format!("\"polynomial\"\nk = {k}")), refused(&[field]));
    }
    push(&mut cases, "calibration: k on an ideal lens".into(), set(inputs::CALIBRATION, "[camera]", "model", "\"equidistant\"\nk = [1.0]"), refused(&["camera.k"]));
    // Too few detections for the free parameters (the fit once written from 2 detections).
    for n in ["2", "0", "17"] {
        push(&mut cases, format!("calibration: {n} detections"), set(inputs::CALIBRATION, "[fit]", "detections", n), refused(&["fit.detections", "18"]));
    }
    push(&mut cases, "calibration: 18 detections".into(), set(inputs::CALIBRATION, "[fit]", "detections", "18"), Expect::Ok);
    push(&mut cases, "calibration: no fit record".into(), inputs::CALIBRATION[..inputs::CALIBRATION.find("[fit]").unwrap()].to_string(), Expect::Ok);
    push(&mut cases, "calibration: zenith range reversed".into(), set(inputs::CALIBRATION, "[fit]", "detections_zenith_deg", "[80.0, 22.0]"), refused(&["fit.detections_zenith_deg[1]"]));
    // One free radial parameter (the focal length) needs 5° of zenith; with k1 and k2 free, 15°.
    push(&mut cases, "calibration: zenith span 3°".into(), set(inputs::CALIBRATION, "[fit]", "detections_zenith_deg", "[40.0, 43.0]"), refused(&["fit.detections_zenith_deg", "5°"]));
    push(&mut cases, "calibration: zenith span 6°".into(), set(inputs::CALIBRATION, "[fit]", "detections_zenith_deg", "[40.0, 46.0]"), Expect::Ok);
    push(
        &mut cases,
        "calibration: zenith span 12° with k1 and k2 free".into(),
        set(set(inputs::CALIBRATION, "[fit]", "detections_zenith_deg", "[40.0, 52.0]").as_str(), "[fit.std_errors]", "roll_deg", "0.01\nk1 = 0.001\nk2 = 0.001"),
        refused(&["fit.detections_zenith_deg", "15°"]),
    );
    push(&mut cases, "calibration: bound with nan".into(), set(inputs::CALIBRATION, "[fit]", "detections", "60\ndirection_bound_deg = [[0.0, 40.0, nan]]"), refused(&["fit.direction_bound_deg[0]"]));
    push(&mut cases, "calibration: missing f".into(), remove_line(inputs::CALIBRATION, "[camera]", "f_px_per_rad"), refused(&["f_px_per_rad"]));
    push(&mut cases, "calibration: empty".into(), String::new(), refused(&["cam.toml", "camera"]));
    cases
}

fn write_tmp(dir: &Path, name: &str, text: &str) -> std::path::PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

/// Replace the value of a column in data row `row` (0-based) of a CSV text.
fn set_cell(text: &str, row: usize, col: usize, v: &str) -> String {
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    let mut cells: Vec<String> = lines[row + 1].split(',').map(String::from).collect();
    cells[col] = v.into();
    lines[row + 1] = cells.join(",");
    lines.join("\n") + "\n"
}

fn measurement_cases(dir: &Path) -> Vec<Case> {
    let base = inputs::measurements();
    let mut cases = vec![];
    let mut n = 0;
    let mut push = |name: String, text: String, expect: Expect| {
        n += 1;
        let p = write_tmp(dir, &format!("m{n}.csv"), &text);
        cases.push(Case { name, expect, run: Box::new(move || inputs::measurements_file(&p).map(Some)) });
    };
    push("measurements: valid".into(), base.clone(), Expect::Ok);
    for row in [0, 37, 119] {
        // Line of data row `row` is row + 2.
        let line = format!("line {}", row + 2);
        for (v, e) in [
            ("inf", Expect::Flagged("ghi_a_wm2 not finite")),
            ("-inf", Expect::Flagged("ghi_a_wm2 not finite")),
            ("1e308", Expect::Flagged("ghi_a_wm2 physically impossible")),
            ("-50", Expect::Flagged("ghi_a_wm2 physically impossible")),
            ("5000", Expect::Flagged("ghi_a_wm2 physically impossible")),
            ("-3", Expect::Flagged("ghi_a_wm2 extremely rare")),
            ("nan", Expect::Ok),
            ("", Expect::Ok),
            ("abc", refused(&["ghi_a_wm2", &line])),
            ("0x10", refused(&["ghi_a_wm2", &line])),
            ("1,2", refused(&[&line, "fields"])),
        ] {
            push(format!("measurements: row {row} ghi = {v:?}"), set_cell(&base, row, 1, v), e);
        }
        for (col, v, e) in [
            (2, "500", Expect::Flagged("temp_air_c physically impossible")),
            (2, "-273", Expect::Flagged("temp_air_c physically impossible")),
            (2, "inf", Expect::Flagged("temp_air_c not finite")),
            (3, "-5", Expect::Flagged("wind_speed_mps physically impossible")),
            (3, "1e300", Expect::Flagged("wind_speed_mps physically impossible")),
            (0, "2026-13-40T00:00:00Z", refused(&["time_utc", &line])),
            (0, "yesterday", refused(&["time_utc", &line])),
        ] {
            push(format!("measurements: row {row} column {col} = {v:?}"), set_cell(&base, row, col, v), e);
        }
    }
    // Time order.
    push("measurements: duplicated time".into(), set_cell(&base, 5, 0, "2026-06-14T10:04:00Z"), refused(&["line 7", "duplicated or out of order"]));
    push("measurements: time backwards".into(), set_cell(&base, 50, 0, "2026-06-14T09:00:00Z"), refused(&["line 52", "out of order"]));
    // Units: the whole GHI column in kW/m².
    let kw: String = base.lines().enumerate().map(|(i, l)| {
        if i == 0 { return format!("{l}\n"); }
        let mut c: Vec<String> = l.split(',').map(String::from).collect();
        c[1] = format!("{:.4}", c[1].parse::<f64>().unwrap() / 1000.0);
        c.join(",") + "\n"
    }).collect();
    push("measurements: GHI in kW/m²".into(), kw.clone(), refused(&["m", "column ghi_a_wm2", "kW/m²"]));
    push("measurements: kW/m² with one gap".into(), set_cell(&kw, 3, 1, ""), refused(&["column ghi_a_wm2", "kW/m²"]));
    // Headers.
    push("measurements: no time column".into(), base.replacen("time_utc", "time", 1), refused(&["line 1", "time_utc"]));
    push("measurements: header only".into(), "time_utc,ghi_a_wm2\n".into(), Expect::Ok);
    push("measurements: empty".into(), String::new(), refused(&["time_utc"]));
    let wide = format!("time_utc,{}\n", (0..1001).map(|i| format!("c{i}")).collect::<Vec<_>>().join(","));
    push("measurements: 1001 columns".into(), wide, refused(&["line 1", "1000 value columns"]));
    push("measurements: short row".into(), base.replacen(",21.5,3.0\n", ",21.5\n", 1), refused(&["line 2"]));
    cases
}

fn series_cases(dir: &Path) -> Vec<Case> {
    let base = inputs::series();
    let mut cases = vec![];
    let mut n = 0;
    let mut push = |name: String, text: String, expect: Expect| {
        n += 1;
        let p = write_tmp(dir, &format!("s{n}.csv"), &text);
        cases.push(Case { name, expect, run: Box::new(move || inputs::series_file(&p).map(|_| None)) });
    };
    push("series: valid".into(), base.clone(), Expect::Ok);
    for row in [0, 14, 29] {
        let line = format!("line {}", row + 2);
        for v in ["-1000", "0", "49.9", "15000.5", "1e308", "-inf"] {
            push(format!("series: row {row} cbh = {v}"), set_cell(&base, row, 1, v), refused(&["cbh_m", &line]));
        }
        for v in ["nan", ""] {
            push(format!("series: row {row} cbh = {v:?}"), set_cell(&base, row, 1, v), refused(&["cbh_m", "finite"]));
        }
        push(format!("series: row {row} cbh = 50"), set_cell(&base, row, 1, "50"), Expect::Ok);
    }
    push("series: wrong column".into(), base.replacen("cbh_m", "cbh_ft", 1), refused(&["cbh_m", "line 1"]));
    push("series: no rows".into(), "time_utc,cbh_m\n".into(), refused(&["no rows"]));
    cases
}

/// Command lines checked by parsing and [`check_args`] (as `cli::run` does first).
fn argument_cases() -> Vec<Case> {
    let sun = |extra: &[&str]| {
        let mut v = vec!["nephocast", "sun", "--lat", "45", "--lon", "7", "--start", "2026-06-14T04:00:00Z", "--end", "2026-06-14T20:00:00Z"];
        v.extend_from_slice(extra);
        v.into_iter().map(String::from).collect::<Vec<_>>()
    };
    let other = |v: &[&str]| std::iter::once("nephocast").chain(v.iter().copied()).map(String::from).collect::<Vec<_>>();
    let mut list: Vec<(Vec<String>, Expect)> = vec![(sun(&[]), Expect::Ok), (sun(&["--step", "1s"]), Expect::Ok), (sun(&["--linke", "7"]), Expect::Ok)];
    for (arg, values) in [
        ("--linke", &["nan", "inf", "-inf", "0", "0.99", "10.5", "1e308"][..]),
        ("--elevation-m", &["nan", "1e9", "-1000"]),
        ("--pressure-hpa", &["nan", "0", "5000"]),
        ("--temperature-c", &["nan", "-300", "inf"]),
    ] {
        for v in values {
            list.push((sun(&[arg, v]), refused(&[arg])));
        }
    }
    for v in ["nan", "91", "-90.5", "inf"] {
        list.push((other(&["sun", "--lat", v, "--lon", "7", "--start", "2026-06-14T04:00:00Z", "--end", "2026-06-14T05:00:00Z"]), refused(&["--lat"])));
    }
    for v in ["nan", "181", "-inf"] {
        list.push((other(&["sun", "--lat", "45", "--lon", v, "--start", "2026-06-14T04:00:00Z", "--end", "2026-06-14T05:00:00Z"]), refused(&["--lon"])));
    }
    for v in ["1e-300s", "0s", "-1s", "0.5s", "999ms", "abc", "nan", "infs", "1e300h", "400d", "367d"] {
        list.push((sun(&["--step", v]), refused(&["--step"])));
    }
    for (extra, arg) in [
        (&["--minutes", "1e9"][..], "--minutes"),
        (&["--minutes", "nan"], "--minutes"),
        (&["--minutes", "0"], "--minutes"),
        (&["--minutes", "-5"], "--minutes"),
        (&["--minutes", "1441"], "--minutes"),
        (&["--step-s", "0"], "--step-s"),
        (&["--step-s", "nan"], "--step-s"),
        (&["--step-s", "1e9"], "--step-s"),
        (&["--size", "10"], "--size"),
        (&["--size", "99999"], "--size"),
        (&["--size", "-3"], "--size"),
        (&["--seed", "-1"], "--seed"),
    ] {
        let mut v = vec!["synth", "--scene", "clear-day", "--out", "/nonexistent/x"];
        v.extend_from_slice(extra);
        list.push((other(&v), refused(&[arg])));
    }
    list.push((other(&["synth", "--scene", "clear-day", "--out", "/nonexistent/x", "--minutes", "1440"]), Expect::Ok));
    for (extra, arg) in [(&["--frames", "1"][..], "--frames"), (&["--frames", "1000000"], "--frames"), (&["--threads", "0"], "--threads"), (&["--threads", "100000"], "--threads"), (&["--size", "63"], "--size"), (&["--plant-points", "5"], "--plant-points"), (&["--step-s", "45"], "--step-s"), (&["--horizon-min", "0"], "--horizon-min"), (&["--members", "1000"], "--members"), (&["--decode-reduction", "3"], "--decode-reduction"), (&["--overlap-threads", "1000"], "--overlap-threads"), (&["--map-cells", "16"], "--map-cells"), (&["--map-cells", "4096"], "--map-cells")] {
        let mut v = vec!["bench"];
        v.extend_from_slice(extra);
        list.push((other(&v), refused(&[arg])));
    }
    for (extra, arg) in [(&["--min-detections", "2"][..], "--min-detections"), (&["--min-detections", "0"], "--min-detections"), (&["--min-sun-elevation-deg", "nan"], "--min-sun-elevation-deg"), (&["--min-sun-elevation-deg", "-10"], "--min-sun-elevation-deg"), (&["--min-sun-elevation-deg", "90"], "--min-sun-elevation-deg")] {
        let mut v = vec!["calibrate", "--site", "s.toml", "--frames", "f", "--out", "c.toml"];
        v.extend_from_slice(extra);
        list.push((other(&v), refused(&[arg])));
    }
    for (extra, arg) in [(&["--keep-days", "0"][..], "--keep-days"), (&["--keep-days", "nan"], "--keep-days"), (&["--keep-days", "1e9"], "--keep-days"), (&["--poll-ms", "1"], "--poll-ms"), (&["--poll-ms", "99999999"], "--poll-ms"), (&["--bind", "999.0.0.1:80"], "--bind")] {
        let mut v = vec!["live", "--site", "s.toml", "--incoming", "in"];
        v.extend_from_slice(extra);
        list.push((other(&v), refused(&[arg])));
    }
    list.push((other(&["replay", "--site", "s", "--frames", "f", "--out", "o", "--overlays", "-1"]), refused(&["--overlays"])));
    list.push((other(&["replay", "--site", "s", "--frames", "f", "--out", "o", "--overlays", "99999999"]), refused(&["--overlays"])));
    list.into_iter()
        .map(|(args, expect)| Case {
            name: format!("args: {}", args[1..].join(" ")),
            expect,
            run: Box::new(move || {
                // clap's own refusals exit with status 2 too (its usage errors).
                let cli = Cli::try_parse_from(&args).map_err(|e| anyhow::anyhow!("{}", e.render()))?;
                check_args(&cli)?;
                Ok(None)
            }),
        })
        .collect()
}

#[test]
fn bad_input_corpus() {
    let d = tempfile::tempdir().unwrap();
    let mut cases = site_cases();
    cases.extend(calibration_cases());
    cases.extend(measurement_cases(d.path()));
    cases.extend(series_cases(d.path()));
    cases.extend(argument_cases());
    let failures: Vec<String> = cases.iter().filter_map(|c| check(c).err()).collect();
    let refused = cases.iter().filter(|c| matches!(c.expect, Expect::Refused(_))).count();
    println!("bad-input corpus: {} cases ({refused} refused, {} accepted or flagged), {} failures", cases.len(), cases.len() - refused, failures.len());
    assert!(cases.len() >= 200, "{} cases", cases.len());
    assert!(failures.is_empty(), "{} of {} cases failed:\n{}", failures.len(), cases.len(), failures.join("\n"));
}

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_nephocast"))
}

/// Run the binary; its exit status and standard error. A guard turns a hang into a failure.
fn run_bin(args: &[&str]) -> (i32, String) {
    let mut child = bin().args(args).stdout(std::process::Stdio::null()).stderr(std::process::Stdio::piped()).spawn().unwrap();
    let start = std::time::Instant::now();
    loop {
        if let Some(status) = child.try_wait().unwrap() {
            let mut err = String::new();
            std::io::Read::read_to_string(child.stderr.as_mut().unwrap(), &mut err).unwrap();
            return (status.code().unwrap_or(-1), err);
        }
        if start.elapsed() > std::time::Duration::from_secs(120) {
            let _ = child.kill();
            panic!("hung: {args:?}");
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
}

/// A representative subset through the binary: exit status 2, the field named, no panic or abort.
/// The demo camera's calibration as `dir/cam.toml` (the corpus site names it) and the demo's first
/// frame in `dir/frames`; returns that folder and the demo's frames, sorted.
fn demo_camera_and_first_frame(dir: &Path) -> (std::path::PathBuf, Vec<std::path::PathBuf>) {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    std::fs::copy(demo.join("calibration").join("larkspur-sky1.toml"), dir.join("cam.toml")).unwrap();
    let frames = dir.join("frames");
    std::fs::create_dir_all(&frames).unwrap();
    let mut f: Vec<_> = std::fs::read_dir(demo.join("frames")).unwrap().flatten().map(|e| e.path()).collect();
    f.sort();
    std::fs::copy(&f[0], frames.join(f[0].file_name().unwrap())).unwrap();
    (frames, f)
}

#[test]
fn bad_inputs_through_the_binary() {
    let d = tempfile::tempdir().unwrap();
    let dir = d.path();
    let (frames, f) = demo_camera_and_first_frame(dir);
    let square = |h: f64| format!("[[{}, {}], [{h}, {}], [{h}, {h}], [{}, {h}]]", -h, -h, -h, -h);
    let site = |name: &str, text: String| {
        let p = dir.join(name);
        std::fs::write(&p, text).unwrap();
        p.to_string_lossy().into_owned()
    };
    let big = site("big.toml", set(&set(inputs::SITE, "[[plant.blocks]]", "polygon_m", &square(50_000.0)), "[plant]", "point_spacing_m", "1.0"));
    let low = site("low.toml", set(inputs::SITE, "[clouds]", "base_height_m", "-1000.0"));
    let cbh_site = site("cbh-site.toml", set(inputs::SITE, "[clouds]", "base_height_m", "REMOVED").replace("base_height_m = REMOVED", "base_height_csv = \"cbh.csv\""));
    std::fs::write(dir.join("cbh.csv"), set_cell(&inputs::series(), 3, 1, "-1000")).unwrap();
    let good = site("good.toml", inputs::SITE.to_string());
    // Measurements in kW/m² at the demo frame's time (the frame is from 14 June at the demo site).
    let t0 = nephocast::io::time_from_frame_name(&f[0].file_name().unwrap().to_string_lossy()).unwrap();
    let mut kw = String::from("time_utc,ghi_a_wm2\n");
    for k in -60..60i64 {
        kw += &format!("{},{:.3}\n", nephocast::io::fmt_time(&(t0 + chrono::Duration::minutes(k))), 0.6 + 0.001 * (k.rem_euclid(5)) as f64);
    }
    let kw_path = dir.join("kw.csv");
    std::fs::write(&kw_path, kw).unwrap();
    let fr = frames.to_string_lossy().into_owned();
    let out = dir.join("out").to_string_lossy().into_owned();
    let span = ["--start", "2026-06-14T04:00:00Z", "--end", "2026-06-14T20:00:00Z"];
    let mut cases: Vec<(Vec<String>, Vec<&str>)> = vec![];
    let mut add = |args: Vec<&str>, names: Vec<&'static str>| cases.push((args.into_iter().map(String::from).collect(), names));
    add(vec!["sun", "--site", &big].into_iter().chain(span).collect(), vec!["plant.blocks[0].polygon_m", "cells"]);
    add(vec!["sun", "--site", &low].into_iter().chain(span).collect(), vec!["clouds.base_height_m"]);
    add(vec!["sun", "--site", &good, "--linke", "nan"].into_iter().chain(span).collect(), vec!["--linke"]);
    add(vec!["sun", "--lat", "45", "--lon", "7", "--step", "1e-300s"].into_iter().chain(span).collect(), vec!["--step"]);
    add(vec!["sun", "--lat", "45", "--lon", "7", "--start", "2000-01-01T00:00:00Z", "--end", "2099-01-01T00:00:00Z", "--step", "1s"], vec!["rows"]);
    add(vec!["synth", "--scene", "clear-day", "--out", &out, "--minutes", "1e9"], vec!["--minutes"]);
    add(vec!["synth", "--scene", "clear-day", "--out", &out, "--minutes", "1440", "--step-s", "1"], vec!["--minutes/--step-s", "frames"]);
    add(vec!["calibrate", "--site", &good, "--frames", &fr, "--out", &out, "--min-detections", "2"], vec!["--min-detections"]);
    add(vec!["live", "--site", &good, "--incoming", &fr, "--keep-days", "nan"], vec!["--keep-days"]);
    add(vec!["replay", "--site", &big, "--frames", &fr, "--out", &out, "--quiet"], vec!["big.toml", "plant.blocks[0].polygon_m"]);
    add(vec!["replay", "--site", &cbh_site, "--frames", &fr, "--out", &out, "--quiet"], vec!["cbh.csv", "line 5", "cbh_m"]);
    let kwp = kw_path.to_string_lossy().into_owned();
    add(vec!["replay", "--site", &good, "--frames", &fr, "--out", &out, "--quiet", "--measurements", &kwp], vec!["kw.csv", "column ghi_a_wm2", "kW/m²"]);
    // A site naming a calibration not yet written: the site file's field, where it was looked
    // for, and how to write it.
    let nocal = site("nocal.toml", inputs::SITE.replace("calibration = \"cam.toml\"", "calibration = \"calibration/new.toml\""));
    add(vec!["replay", "--site", &nocal, "--frames", &fr, "--out", &out, "--quiet"], vec!["nocal.toml", "field camera.calibration", "new.toml", "does not exist", "nephocast calibrate"]);
    // Frames named otherwise than the pattern says: the pattern and a name it did not read.
    let dashed = site("dashed.toml", inputs::SITE.replace("position_m = [0.0, 0.0, 3.0]\n", "position_m = [0.0, 0.0, 3.0]\nframe_time_format = \"%Y-%m-%d_%H-%M-%S\"\n"));
    add(vec!["replay", "--site", &dashed, "--frames", &fr, "--out", &out, "--quiet"], vec!["frame_time_format", "1 image file without a time so read, e.g. `frame_20260614T083000.000Z.jpg`"]);
    // A site without a cloud base (a clear day's ceilometer reads none) and without the
    // calibration line (the file `calibrate` is about to write): `calibrate` reads it and gets as
    // far as the sun's detections (one frame here); `replay` refuses it naming `clouds`, and with
    // a base but no calibration line, naming `camera.calibration`.
    let bare = remove_line(inputs::SITE, "[camera]", "calibration");
    assert!(!bare.contains("cam.toml"), "the calibration line was not removed");
    let nobase = site("nobase.toml", remove_line(&bare, "[clouds]", "base_height_m").replace("[[pyranometers]]\nname = \"a\"\nposition_m = [200.0, 150.0]\n", ""));
    add(vec!["calibrate", "--site", &nobase, "--frames", &fr, "--out", &out], vec!["1 sun detections, 20 needed"]);
    add(vec!["replay", "--site", &nobase, "--frames", &fr, "--out", &out, "--quiet"], vec!["nobase.toml", "field camera.calibration", "nephocast calibrate --out"]);
    let nocalline = site("nocalline.toml", bare);
    add(vec!["replay", "--site", &nocalline, "--frames", &fr, "--out", &out, "--quiet"], vec!["nocalline.toml", "field camera.calibration", "nephocast calibrate --out"]);
    add(vec!["live", "--site", &nocalline, "--incoming", &fr], vec!["nocalline.toml", "field camera.calibration"]);
    let nobase_cal = site("nobase_cal.toml", remove_line(inputs::SITE, "[clouds]", "base_height_m").replace("[[pyranometers]]\nname = \"a\"\nposition_m = [200.0, 150.0]\n", ""));
    add(vec!["replay", "--site", &nobase_cal, "--frames", &fr, "--out", &out, "--quiet"], vec!["nobase_cal.toml", "field clouds", "base_height_m or base_height_csv"]);
    // The folder above the frames: no images there, but a subfolder `frames/`.
    let above = dir.to_string_lossy().into_owned();
    add(vec!["replay", "--site", &good, "--frames", &above, "--out", &out, "--quiet"], vec!["no frames", "subfolder `frames/`"]);
    add(vec!["calibrate", "--site", &good, "--frames", &above, "--out", &out], vec!["no frames", "subfolder `frames/`"]);
    // Frames whose names carry a time but whose contents are not images: said so, not "no frames".
    let junk = dir.join("junk");
    std::fs::create_dir_all(&junk).unwrap();
    for n in ["frame_20260614T083000.000Z.jpg", "frame_20260614T083030.000Z.jpg"] {
        std::fs::write(junk.join(n), b"not a jpeg").unwrap();
    }
    let junk = junk.to_string_lossy().into_owned();
    add(vec!["calibrate", "--site", &good, "--frames", &junk, "--out", &out], vec!["2 frames had a time in their name but none could be read", "skipped"]);
    let n = cases.len();
    for (args, names) in cases {
        let a: Vec<&str> = args.iter().map(String::as_str).collect();
        let (code, err) = run_bin(&a);
        assert_eq!(code, 2, "{a:?}: exit {code}: {err}");
        assert!(!err.contains("panicked"), "{a:?}: {err}");
        for name in names {
            assert!(err.contains(name), "{a:?}: message does not name {name:?}: {err}");
        }
    }
    assert!(!Path::new(&out).join("forecasts.csv").exists(), "no outputs from refused runs");
    println!("bad inputs through the binary: {n} cases");
}

/// A measurements file whose columns the site does not find is not an error (a logger may lack a
/// sensor for a day), but `replay` says so: a pyranometer without its `ghi_<name>_wm2` column, and
/// a file nothing of which is used (a misspelt column once made a run without measurements that
/// looked like one with them).
#[test]
fn measurement_columns_the_site_does_not_find_are_noted() {
    let d = tempfile::tempdir().unwrap();
    let dir = d.path();
    let (frames, _) = demo_camera_and_first_frame(dir);
    let two = format!("{}\n[[pyranometers]]\nname = \"b\"\nposition_m = [-200.0, -200.0]\n", inputs::SITE);
    std::fs::write(dir.join("site.toml"), &two).unwrap();
    let run = |csv: &str| {
        let m = dir.join("m.csv");
        std::fs::write(&m, csv).unwrap();
        let o = bin()
            .args(["replay", "--site", dir.join("site.toml").to_str().unwrap(), "--frames", frames.to_str().unwrap(), "--out", dir.join("out").to_str().unwrap(), "--quiet", "--measurements", m.to_str().unwrap()])
            .output()
            .unwrap();
        assert_eq!(o.status.code(), Some(0), "{}", String::from_utf8_lossy(&o.stderr));
        String::from_utf8_lossy(&o.stdout).into_owned()
    };
    let base = inputs::measurements();
    // Both sensors there: no note.
    let both = base.replace("ghi_a_wm2,", "ghi_a_wm2,ghi_b_wm2,").lines().enumerate().map(|(i, l)| if i == 0 { format!("{l}\n") } else { let (t, rest) = l.split_once(',').unwrap(); format!("{t},{},{rest}\n", rest.split(',').next().unwrap()) }).collect::<String>();
    let out = run(&both);
    assert!(!out.contains("note: "), "{out}");
    // One of two missing.
    let out = run(&base);
    assert!(out.contains("m.csv has no column ghi_b_wm2") && out.contains("that sensor is left out"), "{out}");
    assert!(!out.contains("nothing in"), "{out}");
    // Misspelt (no unit): both sensors left out, the weather columns still read by the power model.
    let misspelt = base.replacen("ghi_a_wm2", "ghi_a", 1);
    let out = run(&misspelt);
    assert!(out.contains("m.csv has no column ghi_a_wm2, ghi_b_wm2") && out.contains("those sensors are left out"), "{out}");
    assert!(!out.contains("nothing in"), "{out}");
    // Misspelt and no weather columns: nothing used, with the columns expected and found.
    let bare: String = misspelt.lines().map(|l| format!("{}\n", l.splitn(3, ',').take(2).collect::<Vec<_>>().join(","))).collect();
    let out = run(&bare);
    for want in ["note: nothing in", "m.csv is used", "ghi_a_wm2, ghi_b_wm2", "it has the columns ghi_a.", "as without --measurements"] {
        assert!(out.contains(want), "{want:?} not in {out}");
    }
}

/// `calibrate` applies the loader's rules before it writes. A day of frames every 25 minutes gives
/// fewer detections than a free fit needs (three per parameter): with the minimum lowered to 10,
/// `calibrate` once wrote nothing and refused, naming `fit.detections`; it now holds the principal
/// point at the image circle's centre, writes that held fit with a warning naming the sky it
/// constrains, and the file it writes is one the loader takes.
#[test]
fn calibrate_writes_nothing_the_loader_would_refuse() {
    let d = tempfile::tempdir().unwrap();
    let seq = d.path().join("seq");
    let (code, err) = run_bin(&["synth", "--scene", "clear-day", "--minutes", "420", "--step-s", "1500", "--quiet", "--out", seq.to_str().unwrap()]);
    assert_eq!(code, 0, "{err}");
    let out = d.path().join("cal").join("c.toml");
    let (code, err) = run_bin(&[
        "calibrate", "--site", seq.join("site.toml").to_str().unwrap(), "--frames", seq.join("frames").to_str().unwrap(), "--out", out.to_str().unwrap(), "--min-detections", "10",
    ]);
    assert_eq!(code, 0, "a held fit was expected from this day: {err}");
    let text = std::fs::read_to_string(&out).unwrap();
    assert!(text.contains("held") && text.contains("cx_px"), "a held fit names its held parameters:\n{text}");
    let file: nephocast::config::CalibrationFile = toml::from_str(&text).unwrap();
    if let Err(e) = file.validate(&out) {
        panic!("the loader refuses what calibrate wrote: {e}");
    }
}
