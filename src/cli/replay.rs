//! `replay`, `demo` and `evaluate`.

use std::path::PathBuf;

use anyhow::{Result, bail};

use super::args::{DemoArgs, EvaluateArgs, MergeArgs, ReplayArgs};

/// `merge`: shard outputs of batch replays into one aggregate.
pub(super) fn cmd_merge(a: MergeArgs) -> Result<()> {
    let s = crate::merge::merge(&a.shards, &a.out)?;
    crate::merge::print_merge(&s, &a.out);
    Ok(())
}

/// `replay`: a sequence through the engine into an output set (or, with `--batch`, a folder of
/// days, one output set each, and their aggregate).
pub(super) fn cmd_replay(a: ReplayArgs) -> Result<()> {
    if a.batch {
        let shard = a.shard.as_deref().map(crate::merge::parse_shard).transpose()?;
        let opts = crate::batch::BatchOptions { site: a.site, days: a.frames, out: a.out, measurements: a.measurements, overlays_every: a.overlays, progress: !a.quiet, shard };
        crate::batch::print_summary(&crate::batch::run_batch(&opts)?);
        return Ok(());
    }
    let opts = crate::replay::ReplayOptions {
        site: a.site,
        frames: a.frames,
        out: a.out,
        measurements: a.measurements,
        overlays_every: a.overlays,
        progress: !a.quiet,
    };
    let (mut s, mut set) = crate::replay::replay_staged(&opts)?;
    // The report joins the set before it is committed.
    let report = if a.report {
        let seq = opts.frames.parent().map(|p| p.to_path_buf()).unwrap_or_default();
        let truth = crate::verify::Truth::read(&seq.join("truth").join("irradiance.csv")).ok();
        let eval = truth.as_ref().and_then(|_| crate::verify::evaluate(&seq, set.dir()).ok());
        // With measurements: their scores (also written as evaluation-measured.json) and line.
        // A measurements file without pyranometer columns (weather only) leaves the report as it
        // was, with a note.
        let measured = match &opts.measurements {
            Some(mp) => {
                let site = crate::config::Site::load(&opts.site)?;
                match crate::measured::evaluate_measured(&site, set.dir(), mp) {
                    Ok(e) => {
                        set.write("evaluation-measured.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
                        Some((e, crate::measured::measured_mean_ghi(&site, mp)?))
                    }
                    Err(e) => {
                        crate::say!("report: not scored against the measurements ({e})");
                        None
                    }
                }
            }
            None => None,
        };
        let mr = measured.as_ref().map(|(e, line)| crate::report::MeasuredReport { evaluation: e, mean_ghi: line });
        crate::report::write_report_with(set.dir(), truth.as_ref(), eval.as_ref(), mr.as_ref(), "nephocast replay")?;
        Some(set.adopt("report.html")?)
    } else {
        None
    };
    set.commit()?;
    s.outputs.extend(report.clone());
    print_replay_summary(&s);
    if let Some(r) = report {
        crate::say!("report: {}", r.display());
    }
    Ok(())
}

/// Write `report.html` into a replay's output set before it is committed; returns its final path.
fn report_into(set: &mut crate::output_set::OutputSet, truth: Option<&crate::verify::Truth>, eval: Option<&crate::verify::Evaluation>, title: &str) -> Result<PathBuf> {
    crate::report::write_report(set.dir(), truth, eval, title)?;
    Ok(set.adopt("report.html")?)
}

/// Print what a replay did.
pub fn print_replay_summary(s: &crate::replay::ReplaySummary) {
    let rejected: usize = s.counters.rejected.values().sum();
    crate::say!("frames: {} found, {} used, {} rejected {:?}, {} files without a time in their name",
        s.frames_found, s.counters.used, rejected, s.counters.rejected, s.untimed_files);
    crate::say!("speed: median {:.2} ms per frame (map + motion + forecast), {:.2} ms decode; {:.1} s in all",
        s.median_step_ms, s.median_decode_ms, s.wall_s);
    if !s.counters.measurements_flagged.is_empty() {
        let n: usize = s.counters.measurements_flagged.values().sum();
        crate::say!("measurements: {n} values flagged and left out {:?}", s.counters.measurements_flagged);
    }
    for note in &s.counters.measurement_notes {
        crate::say!("note: {note}");
    }
    if let Some(v) = s.last_motion_mps {
        crate::say!("cloud motion at the end: {:.1} m/s toward {:.0}°", v[0].hypot(v[1]), v[0].atan2(v[1]).to_degrees().rem_euclid(360.0));
    }
    if let Some(c) = s.last_cbh {
        crate::say!("cloud base height at the end: {:.0} m ± {:.0} m (1σ), {} (per frame in motion.csv)", c.cbh_m, c.sigma_m, c.source.name());
    }
    if s.prior_base_rejected {
        crate::say!(
            "note: shadow timing at the pyranometers rejected the configured cloud base. If that base is right, check the readings' times: their clock and time zone (UTC expected), and what they label ([measurements] time_label, read as \"{}\": a logger that stamps the end of each interval read as its start moves every shadow by a period); and the pyranometers' positions",
            s.time_label.name()
        );
    } else if s.shadow_fits_held_back > 0 {
        crate::say!(
            "note: {} shadow-timing fit{} disagreed with the configured cloud base, but the pyranometer readings did not follow the cloud map's shadows better than the same readings shifted in time, so the configured base was kept. Check the readings' clock and time zone (UTC expected), what they label ([measurements] time_label, read as \"{}\") and the pyranometers' positions",
            s.shadow_fits_held_back,
            if s.shadow_fits_held_back == 1 { "" } else { "s" },
            s.time_label.name()
        );
    } else if s.shadow_fits_unjudged >= crate::cbh::CHECK_MIN_DISAGREEING {
        crate::say!(
            "note: {} shadow-timing fits disagreed with the configured cloud base, but none could be checked against the same readings shifted in time: that check needs {:.0} minutes of frames with pyranometer readings, without gaps (ten readings per sensor for readings coarser than a minute), and this run did not hold them, so the configured base was kept unchecked. Check the base, or set [clouds] shadow_timing = true to combine the fits with it",
            s.shadow_fits_unjudged,
            s.shadow_check_window_s.unwrap_or(600.0) / 60.0
        );
    }
    for note in crate::replay::camera_setting_notes(s.clear_rb_scale, s.exposure) {
        crate::say!("note: {note}");
    }
    if let Some((h, moves)) = s.map_plane {
        match moves {
            0 => crate::say!("cloud map plane: {h:.0} m, where it started (map_plane_m in motion.csv)"),
            n => crate::say!("cloud map plane at the end: {h:.0} m, moved {n} time{} to follow the estimated base (map_plane_m in motion.csv)", if n == 1 { "" } else { "s" }),
        }
    }
    for p in &s.outputs {
        crate::say!("wrote {}", p.display());
    }
}

/// `demo`: replay the shipped demo data, score it and write the report.
pub(super) fn cmd_demo(a: DemoArgs) -> Result<()> {
    let data = a.data.unwrap_or_else(|| {
        let here = PathBuf::from("demo-data");
        if here.join("site.toml").is_file() { here } else { PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("demo-data") }
    });
    if !data.join("site.toml").is_file() {
        bail!("{}: no demo data here (expected site.toml, frames/, measurements.csv, truth/)", data.display());
    }
    crate::say!("nephocast demo: the fictional Larkspur Flats plant, data in {}", data.display());
    crate::say!("Forecasts are advisory, not a protection system.");
    let opts = crate::replay::ReplayOptions {
        site: data.join("site.toml"),
        frames: data.join("frames"),
        out: a.out.clone(),
        measurements: Some(data.join("measurements.csv")).filter(|p| p.is_file()),
        overlays_every: 10,
        progress: !a.quiet,
    };
    // Outputs, evaluation and report are committed to `a.out` as one set at the end.
    let (s, mut set) = crate::replay::replay_staged(&opts)?;
    print_replay_summary(&s);
    let mut eval = None;
    if data.join("truth").join("irradiance.csv").is_file() {
        let e = crate::verify::evaluate(&data, set.dir())?;
        let layers = crate::verify::read_rows(&data.join("truth").join("layers.csv"))?;
        if let Some(l) = layers.first() {
            crate::say!("true cloud motion: {} m/s toward {}° at {} m", l["wind_speed_mps"], l["wind_toward_deg"], l["base_height_m"]);
        }
        crate::say!("");
        crate::say!("Plant-mean GHI against the scene's truth (skill against smart persistence):");
        crate::verify::print_evaluation(&e);
        set.write("evaluation.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
        eval = Some(e);
    }
    let truth = crate::verify::Truth::read(&data.join("truth").join("irradiance.csv")).ok();
    let r = report_into(&mut set, truth.as_ref(), eval.as_ref(), "nephocast demo — Larkspur Flats (fictional)")?;
    set.commit()?;
    crate::say!("overlays (frame with cloud classes | shadow map over the plant): {}", a.out.join("overlays").display());
    crate::say!("report: {}", r.display());
    Ok(())
}

/// `evaluate`: score a replay against a synthetic truth or against measurements.
pub(super) fn cmd_evaluate(a: EvaluateArgs) -> Result<()> {
    // Keep a replay from swapping the folder while it is read and added to.
    let _lock = crate::output_set::lock(&a.replay)?;
    crate::output_set::check_manifest(&a.replay)?;
    if let (Some(mp), Some(sp)) = (&a.measurements, &a.site) {
        let site = crate::config::Site::load(sp)?;
        let e = crate::measured::evaluate_measured(&site, &a.replay, mp)?;
        crate::measured::print_measured(&e);
        let p = crate::output_set::update_file(&a.replay, "evaluation-measured.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
        crate::say!("wrote {}", p.display());
        if a.report {
            let line = crate::measured::measured_mean_ghi(&site, mp)?;
            let mr = crate::report::MeasuredReport { evaluation: &e, mean_ghi: &line };
            let html = crate::report::report_html(&a.replay, None, None, Some(&mr), "nephocast evaluate")?;
            let p = crate::output_set::update_file(&a.replay, "report.html", html.as_bytes())?;
            crate::say!("report: {}", p.display());
        }
        return Ok(());
    }
    let Some(sequence) = &a.sequence else { bail!("--sequence or --measurements is needed") };
    let e = crate::verify::evaluate(sequence, &a.replay)?;
    crate::verify::print_evaluation(&e);
    let p = crate::output_set::update_file(&a.replay, "evaluation.json", serde_json::to_string_pretty(&e)?.as_bytes())?;
    crate::say!("wrote {}", p.display());
    Ok(())
}
