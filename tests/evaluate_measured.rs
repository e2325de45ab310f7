//! `evaluate --measurements`: a replay of the demo data scored against its pyranometers, with the
//! 5-minute plant RMSE recomputed here from the two CSV files by hand (the mean of the three
//! pyranometers' minute means, the row whose minute holds the target time).
use std::collections::HashMap;
use std::path::Path;
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_nephocast");

#[test]
fn demo_replay_scored_against_its_pyranometers() {
    let demo = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data");
    let d = tempfile::tempdir().unwrap();
    let out = d.path().join("out");
    let r = Command::new(BIN)
        .args(["replay", "--quiet", "--site"])
        .arg(demo.join("site.toml"))
        .arg("--frames")
        .arg(demo.join("frames"))
        .arg("--measurements")
        .arg(demo.join("measurements.csv"))
        .arg("--out")
        .arg(&out)
        .arg("--report")
        .output()
        .unwrap();
    assert!(r.status.success(), "{}", String::from_utf8_lossy(&r.stderr));
    let e = Command::new(BIN)
        .args(["evaluate", "--replay"])
        .arg(&out)
        .arg("--measurements")
        .arg(demo.join("measurements.csv"))
        .arg("--site")
        .arg(demo.join("site.toml"))
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&e.stdout);
    assert!(e.status.success(), "{}{}", text, String::from_utf8_lossy(&e.stderr));
    eprintln!("{text}");
    let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("evaluation-measured.json")).unwrap()).unwrap();
    let h5 = j["plant"].as_array().unwrap().iter().find(|h| h["horizon_s"] == 300).unwrap().clone();
    // By hand: measurements by minute.
    let mut meas: HashMap<String, f64> = HashMap::new();
    let mut rd = csv::ReaderBuilder::new().comment(Some(b'#')).from_path(demo.join("measurements.csv")).unwrap();
    let hdr = rd.headers().unwrap().clone();
    let cols: Vec<usize> = hdr.iter().enumerate().filter(|(_, h)| h.starts_with("ghi_")).map(|(i, _)| i).collect();
    for rec in rd.records() {
        let rec = rec.unwrap();
        let v: Vec<f64> = cols.iter().map(|&c| rec[c].parse().unwrap()).collect();
        meas.insert(rec[0][..16].to_string(), v.iter().sum::<f64>() / v.len() as f64);
    }
    let mut rf = csv::Reader::from_path(out.join("forecasts.csv")).unwrap();
    let fh = rf.headers().unwrap().clone();
    let col = |n: &str| fh.iter().position(|h| h == n).unwrap();
    let (ct, ch, cb, cg) = (col("target_time_utc"), col("horizon_s"), col("block"), col("ghi_wm2"));
    let mut se = vec![];
    for rec in rf.records() {
        let rec = rec.unwrap();
        if &rec[ch] == "300" && &rec[cb] == "plant"
            && let Some(m) = meas.get(&rec[ct][..16])
        {
            se.push((rec[cg].parse::<f64>().unwrap() - m).powi(2));
        }
    }
    // The tool leaves out what it cannot pair with smart persistence, so compare on its count.
    let n = h5["n"].as_u64().unwrap() as usize;
    assert!(n >= 10 && n <= se.len(), "n {n} of {}", se.len());
    let by_hand = (se[se.len() - n..].iter().sum::<f64>() / n as f64).sqrt();
    let rmse = h5["rmse_wm2"].as_f64().unwrap();
    assert!((rmse - by_hand).abs() < 0.5, "5-min RMSE {rmse} against {by_hand} by hand");
    // The main job: better than smart persistence of the pyranometers at 5 minutes.
    assert!(h5["skill"].as_f64().unwrap() > 0.2, "5-min skill {}", h5["skill"]);
    assert!(j["by_sky_type"].as_object().unwrap().values().map(|p| p["n"].as_u64().unwrap()).sum::<u64>() > 0);
    // Ramps at the default leads (5, 10, 15 min).
    let ramps = j["ramps"].as_array().unwrap();
    assert_eq!(ramps.len(), 3, "{ramps:?}");
    assert!(ramps[0]["issues_scored"].as_u64().unwrap() > 0);

    // `replay --report` with measurements: the report draws the pyranometers' mean against the
    // forecast at 5, 10 and 15 minutes and holds the score tables and the exclusions.
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert_eq!(html.matches("pyranometers, measured mean").count(), 3, "a measured line in each of the 5/10/15-min charts");
    for id in ["measured-horizons", "measured-sky-types", "measured-blocks", "measured-ramps", "measured-excluded", "measured-screened"] {
        assert!(html.contains(&format!("id='{id}'")), "report lacks table {id}");
    }
    // The 5-minute row shows the same RMSE as the JSON.
    let row5 = format!("<tr><td>5 min</td><td>{}</td><td>{:.1}</td>", h5["n"], h5["rmse_wm2"].as_f64().unwrap());
    assert!(html.contains(&row5), "no {row5}");
    // Each exclusion reason of the evaluation is listed with its count.
    let replay_eval: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("evaluation-measured.json")).unwrap()).unwrap();
    for (k, n) in replay_eval["excluded"].as_object().unwrap() {
        let k = k.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;");
        assert!(html.contains(&format!("<td style='text-align:left'>{k}</td><td>{n}</td>")), "no exclusion row {k}: {n}");
    }
    assert!(!html.contains("NaN"), "a NaN in the report");

    // `evaluate --measurements --report` rewrites the committed set's report the same way, and
    // the set's manifest still matches.
    let e = Command::new(BIN)
        .args(["evaluate", "--report", "--replay"])
        .arg(&out)
        .arg("--measurements")
        .arg(demo.join("measurements.csv"))
        .arg("--site")
        .arg(demo.join("site.toml"))
        .output()
        .unwrap();
    assert!(e.status.success(), "{}", String::from_utf8_lossy(&e.stderr));
    let again = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(again.contains("<title>nephocast evaluate</title>"), "report.html was not rewritten");
    assert_eq!(again.matches("pyranometers, measured mean").count(), 3);
    assert!(again.contains(&row5) && again.contains("id='measured-excluded'"));
    nephocast::output_set::check_manifest(&out).unwrap();

    // A plant meter: the measurements with a power_plant_kw column reading the scene's true plant
    // AC power (`verify::truth_power_kw`, the truth's block irradiance through the power model),
    // one value per minute row. The plant power scores are recomputed here by hand from the CSVs.
    let site = nephocast::config::Site::load(&demo.join("site.toml")).unwrap();
    let truth = nephocast::verify::Truth::read(&demo.join("truth/irradiance.csv")).unwrap();
    let text = std::fs::read_to_string(demo.join("measurements.csv")).unwrap();
    let first: chrono::DateTime<chrono::Utc> = text.lines().find(|l| l.starts_with("20")).unwrap().split(',').next().unwrap().parse().unwrap();
    let power: HashMap<String, f64> = nephocast::verify::truth_power_kw(&truth, &site, first, 200).into_iter().map(|(t, p)| (nephocast::io::fmt_time(&t)[..16].to_string(), p)).collect();
    assert!(power.len() > 60, "{} minutes of truth power", power.len());
    let metered: Vec<String> = text
        .lines()
        .map(|l| match l {
            l if l.starts_with('#') => l.to_string(),
            l if l.starts_with("time_utc") => format!("{l},power_plant_kw"),
            l => format!("{l},{}", power.get(&l[..16]).map(|p| format!("{p:.1}")).unwrap_or_default()),
        })
        .collect();
    let meas2 = d.path().join("measurements-metered.csv");
    std::fs::write(&meas2, metered.join("\n") + "\n").unwrap();
    let e = Command::new(BIN).args(["evaluate", "--replay"]).arg(&out).arg("--measurements").arg(&meas2).arg("--site").arg(demo.join("site.toml")).output().unwrap();
    let text = String::from_utf8_lossy(&e.stdout);
    assert!(e.status.success(), "{}{}", text, String::from_utf8_lossy(&e.stderr));
    assert!(text.contains("plant AC power [kW] against the"), "{text}");
    let j: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(out.join("evaluation-measured.json")).unwrap()).unwrap();
    let p5 = j["power"]["plant"].as_array().unwrap().iter().find(|h| h["horizon_s"] == 300).unwrap().clone();
    let (cp, cp10, cp90) = (col("power_kw"), col("power_p10_kw"), col("power_p90_kw"));
    let (mut se, mut inside) = (vec![], vec![]);
    let mut rf = csv::Reader::from_path(out.join("forecasts.csv")).unwrap();
    for rec in rf.records() {
        let rec = rec.unwrap();
        if &rec[ch] == "300" && &rec[cb] == "plant"
            && let Some(m) = power.get(&rec[ct][..16])
        {
            let f = |c: usize| rec[c].parse::<f64>().unwrap();
            se.push((f(cp) - (m * 10.0).round() / 10.0).powi(2));
            inside.push(f(cp10) <= *m && *m <= f(cp90));
        }
    }
    let n = p5["n"].as_u64().unwrap() as usize;
    assert!(n >= 10 && n <= se.len(), "n {n} of {}", se.len());
    let by_hand = (se[se.len() - n..].iter().sum::<f64>() / n as f64).sqrt();
    let rmse = p5["rmse_kw"].as_f64().unwrap();
    eprintln!("plant power at 5 min against the true power as a meter: n {n}, RMSE {rmse:.0} kW (by hand {by_hand:.0}), skill {}, P10–P90 {}", p5["skill"], p5["coverage_p10_p90"]);
    assert!((rmse - by_hand).abs() < 1.0, "5-min power RMSE {rmse} kW against {by_hand} by hand");
    let cover = inside[inside.len() - n..].iter().filter(|x| **x).count() as f64 / n as f64;
    assert!((p5["coverage_p10_p90"].as_f64().unwrap() - cover).abs() < 1e-9, "coverage {} against {cover}", p5["coverage_p10_p90"]);
}
