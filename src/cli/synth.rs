//! `synth` (a synthetic sequence with its truth) and `sun` (a table of solar position and clear-sky
//! irradiance).

use std::io::Write;

use anyhow::{Context, Result, bail};
use chrono::{DateTime, Utc};

use super::args::{MAX_SUN_ROWS, MAX_SYNTH_FRAMES, SunArgs, SynthArgs, parse_duration_s};
use crate::clearsky::{ClearSkyModel, clear_sky};
use crate::config::{DEFAULT_LINKE_TURBIDITY, Site};
use crate::io::parse_time;
use crate::sun::{Observer, position, relative_airmass};

/// `synth`: list the scenes, or render one with its truth.
pub(super) fn cmd_synth(a: SynthArgs) -> Result<()> {
    use crate::synth;
    if a.list {
        for s in synth::scenes() {
            crate::say!("{:<22} {}", s.name, s.description);
            crate::say!(
                "{:<22} start {}, {} min, a frame every {} s, {}x{} px, {} layer(s)",
                "", s.start_utc, s.duration_min, s.frame_step_s, s.size_px, s.size_px, s.layers.len()
            );
            for l in &s.layers {
                crate::say!(
                    "{:<22}   base {} m, wind {} m/s toward {}°, cover {}→{}, tau_max {}",
                    "", l.base_height_m, l.wind_speed_mps, l.wind_toward_deg, l.cover_start, l.cover_end, l.tau_max
                );
            }
        }
        return Ok(());
    }
    let name = a.scene.unwrap_or_default();
    let out = a.out.unwrap_or_default();
    let mut spec = synth::scene(&name).ok_or_else(|| synth::SynthError::UnknownScene(name.clone()))?;
    if let Some(s) = a.size {
        spec.size_px = s;
    }
    if let Some(m) = a.minutes {
        spec.duration_min = m;
    }
    if let Some(s) = a.step_s {
        spec.frame_step_s = s;
    }
    let frames = spec.duration_min * 60.0 / spec.frame_step_s;
    if !(frames.is_finite() && frames <= MAX_SYNTH_FRAMES) {
        bail!("--minutes/--step-s: {} min at a frame every {} s give {frames:.0} frames; at most {MAX_SYNTH_FRAMES}", spec.duration_min, spec.frame_step_s);
    }
    let scene = synth::Scene::new(spec, a.seed)?;
    let sum = synth::write_sequence(&scene, &out, !a.quiet)?;
    // The perfect-perception yardstick, scored by `evaluate` beside the replay.
    synth::yardstick::write_yardstick(&scene, &out)?;
    crate::say!(
        "wrote {} frames ({:.1} MB) to {} in {:.3} s per frame",
        sum.frames,
        sum.bytes as f64 / 1e6,
        out.display(),
        sum.render_s_per_frame
    );
    Ok(())
}

/// A `sun --start`/`--end` time: RFC 3339, or a date alone (`YYYY-MM-DD`) meaning 00:00 UTC that
/// day, or with `end_of_day` 24:00 UTC (00:00 of the next day).
fn parse_sun_time(field: &str, s: &str, end_of_day: bool) -> Result<DateTime<Utc>> {
    if let Ok(d) = chrono::NaiveDate::parse_from_str(s.trim(), "%Y-%m-%d") {
        let d = if end_of_day { d.succ_opt().ok_or_else(|| anyhow::anyhow!("{field}: {s:?} is the last representable day"))? } else { d };
        return Ok(d.and_time(chrono::NaiveTime::MIN).and_utc());
    }
    parse_time(field, s).map_err(|e| anyhow::anyhow!("{e}; or a date alone such as 2026-06-14"))
}

/// `sun`: a CSV table of solar position and clear-sky irradiance.
pub(super) fn cmd_sun(a: SunArgs) -> Result<()> {
    let (observer, model, altitude_m) = if let Some(p) = &a.site {
        let site = Site::load(p)?;
        let mut model = site.clear_sky_model();
        if let (Some(l), ClearSkyModel::IneichenPerez { .. }) = (a.linke, model) {
            model = ClearSkyModel::IneichenPerez { linke_turbidity: l };
        }
        (site.observer(), model, site.file.site.elevation_m)
    } else {
        let (Some(lat), Some(lon)) = (a.lat, a.lon) else {
            bail!("give --site FILE, or both --lat and --lon");
        };
        if !(-90.0..=90.0).contains(&lat) {
            bail!("--lat: expected a number from -90 to 90, got {lat}");
        }
        if !(-180.0..=180.0).contains(&lon) {
            bail!("--lon: expected a number from -180 to 180, got {lon}");
        }
        let mut o = Observer::new(lat, lon, a.elevation_m);
        if let Some(p) = a.pressure_hpa {
            o.pressure_hpa = p;
        }
        o.temperature_c = a.temperature_c;
        let tl = a.linke.unwrap_or(DEFAULT_LINKE_TURBIDITY);
        if !(1.0..=10.0).contains(&tl) {
            bail!("--linke: expected a number from 1 to 10, got {tl}");
        }
        (o, ClearSkyModel::IneichenPerez { linke_turbidity: tl }, a.elevation_m)
    };
    let start = parse_sun_time("--start", &a.start, false)?;
    let end = parse_sun_time("--end", &a.end, true)?;
    let step_s = parse_duration_s(&a.step).context("--step")?;
    if end < start {
        bail!("--end is before --start");
    }
    // Counted in floating point before any conversion, so no step can wrap the count.
    let rows = ((end - start).num_milliseconds() as f64 / 1000.0 / step_s).floor() + 1.0;
    if !(rows.is_finite() && rows <= MAX_SUN_ROWS) {
        bail!("--start/--end/--step give {rows:.3e} rows; at most {MAX_SUN_ROWS:.0}");
    }
    let n = rows as u64;
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    writeln!(
        out,
        "time_utc,zenith_deg,azimuth_deg,elevation_deg,true_zenith_deg,airmass_relative,dni_extra_wm2,ghi_clear_wm2,dni_clear_wm2,dhi_clear_wm2"
    )?;
    for i in 0..n {
        let t: DateTime<Utc> = start + chrono::Duration::milliseconds((i as f64 * step_s * 1000.0).round() as i64);
        let sp = position(&t, &observer)?;
        let cs = clear_sky(&sp, altitude_m, model);
        let am = relative_airmass(sp.apparent_zenith_rad).map(|m| format!("{m:.5}")).unwrap_or_default();
        writeln!(
            out,
            "{},{:.6},{:.6},{:.6},{:.6},{},{:.3},{:.3},{:.3},{:.3}",
            crate::io::fmt_time(&t),
            sp.apparent_zenith_rad.to_degrees(),
            sp.azimuth_rad.to_degrees(),
            90.0 - sp.apparent_zenith_rad.to_degrees(),
            sp.zenith_rad.to_degrees(),
            am,
            sp.dni_extra_wm2(),
            cs.ghi_wm2,
            cs.dni_wm2,
            cs.dhi_wm2
        )?;
    }
    out.flush()?;
    Ok(())
}
