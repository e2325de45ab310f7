//! `calibrate` (the camera from the sun's track) and `camera` (directions to pixels and back).

use std::path::PathBuf;

use anyhow::{Result, bail};

use super::args::{CalibrateArgs, CameraCommand, MAX_CALIBRATE_BYTES, MAX_CALIBRATE_FRAMES};
use crate::sun::position;

/// `calibrate`: fit the camera from the sun's track and write the calibration file with its outputs.
pub(super) fn cmd_calibrate(a: CalibrateArgs) -> Result<()> {
    // The site file only: the calibration it names may not exist yet, nor a cloud base.
    let site = crate::config::Site::load_for_calibrate(&a.site)?;
    let (frames, chroma_dc) = load_calibration_frames(&a.frames, &site.camera.frame_naming())?;
    let clip = match a.clip_test.as_str() {
        "channels" => crate::calibrate::ClipTest::Channels,
        "luma" => crate::calibrate::ClipTest::Luma,
        _ => crate::calibrate::ClipTest::for_chroma_quantizer(chroma_dc),
    };
    let why = match (a.clip_test.as_str(), chroma_dc) {
        ("auto", Some(q)) => format!("the frames' JPEG chroma quantizer is {q} levels, the channels test's margin {}", crate::calibrate::clip::CHANNELS_MARGIN),
        ("auto", None) => "no JPEG chroma table in the frames".to_string(),
        _ => "--clip-test".to_string(),
    };
    crate::say!("sun's clipped core judged by {} ({why})", clip.name());
    let options = crate::calibrate::CalibrateOptions {
        min_detections: a.min_detections,
        min_sun_elevation_deg: a.min_sun_elevation_deg,
        lens: a.lens.as_deref().and_then(crate::calibrate::LensFamily::from_name),
        map_max_zenith_deg: site.map.max_zenith_deg,
        clip,
        ..Default::default()
    };
    let (fit, dets) = crate::calibrate::calibrate(&frames, &site.site.observer(), &options)?;
    let name = a.out.file_stem().map(|s| s.to_string_lossy().into_owned()).unwrap_or_else(|| "camera".into());
    let mut cal = crate::calibrate::calibration_record(&name, &fit, &dets);
    // The loader's own rules, before anything is written: never write a file `replay` refuses.
    cal.validate(&a.out).map_err(|e| crate::calibrate::CalibrationError::Unusable(e.to_string()))?;
    let dir = a.out.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(std::path::Path::new("."));
    crate::io::clean_stale_temps(dir);
    let (day, suns): (Vec<&image::RgbImage>, Vec<[f64; 3]>) = frames
        .iter()
        .filter_map(|(t, i)| position(t, &site.site.observer()).ok().filter(|s| s.elevation_rad().to_degrees() > 10.0).map(|s| (i, s.direction_enu())))
        .unzip();
    let sectors = crate::calibrate::sun_sectors(&suns);
    let circle = day.first().copied().and_then(crate::calibrate::fit_image_circle);
    // Text or a logo burnt into the frames inside the image circle is masked even when no
    // obstruction mask was asked for: the map would read it as cloud that never moves. Inside the
    // fitted camera's image circle.
    let fitted = crate::calibrate::ImageCircle { cx_px: fit.camera.cx_px, cy_px: fit.camera.cy_px, radius_px: fit.camera.image_circle_radius_px() };
    let overlay = if a.obstruction_mask || day.is_empty() { None } else { crate::calibrate::overlay_mask(&day, &sectors, fitted) };
    if let Some((m, inside)) = overlay {
        let mask = crate::io::encode_png_gray(&m);
        let file = content_named(&name, "mask", "png", &mask);
        let mp = dir.join(&file);
        crate::io::write_atomic(&mp, &mask)?;
        cal.camera.obstruction_mask = Some(PathBuf::from(file));
        crate::say!("wrote {} (text or a logo burnt into the frames covers {inside} px inside the image circle; masked as an obstruction)", mp.display());
    }
    if a.obstruction_mask {
        let circle = circle.ok_or(crate::calibrate::CalibrationError::NoCircle)?;
        if !day.is_empty() {
            let mask = crate::io::encode_png_gray(&crate::calibrate::obstruction_mask(&day, &sectors, circle));
            let file = content_named(&name, "mask", "png", &mask);
            let mp = dir.join(&file);
            crate::io::write_atomic(&mp, &mask)?;
            cal.camera.obstruction_mask = Some(PathBuf::from(file));
            crate::say!("wrote {}", mp.display());
        }
    }
    // The clear-sky library of this camera from the same frames.
    let reference = crate::calibrate::clear_sky_reference(&frames, &fit, &dets, &site.segment);
    let library = reference.to_csv();
    let file = content_named(&name, "clear-sky", "csv", library.as_bytes());
    let rp = dir.join(&file);
    crate::io::write_atomic(&rp, library.as_bytes())?;
    cal.camera.clear_reference = Some(PathBuf::from(file));
    crate::say!("wrote {} (clear-sky library: {} bins of zenith × sun angle from {} frames)", rp.display(), reference.library_bins(), reference.library_frames);
    let clipped = reference.clipped_bins();
    if clipped > 0 {
        crate::say!(
            "  the clear sky clipped in {clipped} more bins (near the sun, low in the sky: the camera is exposed for the zenith); without pyranometers their pixels are unknown, not cloud"
        );
    }
    let plot = crate::calibrate::residual_plot(&frames[frames.len() / 2].1, &fit, &dets);
    let pp = dir.join(format!("{name}-residuals.png"));
    crate::io::write_atomic(&pp, &crate::io::encode_png_rgb(&plot))?;
    let dp = dir.join(format!("{name}-detections.csv"));
    crate::io::write_atomic(&dp, crate::calibrate::detections_csv(&fit, &dets).as_bytes())?;
    // The calibration file last, as the commit point: the mask and library it names carry their
    // content's digest in their names, so a run stopped before this point leaves the old file
    // naming its own, untouched side files. Once it is in place, the side files it no longer names
    // go.
    let text = format!("# Fitted by `nephocast calibrate` from the sun's track.\n{}", toml::to_string(&cal)?);
    crate::io::write_atomic(&a.out, text.as_bytes())?;
    let keep: Vec<String> = [&cal.camera.obstruction_mask, &cal.camera.clear_reference].iter().filter_map(|p| p.as_ref().map(|p| p.display().to_string())).collect();
    remove_superseded(dir, &name, &keep);
    print_fit(&fit, dets.len());
    crate::say!("wrote {}, {} and {}", a.out.display(), pp.display(), dp.display());
    Ok(())
}

/// `<name>-<kind>-<first 8 hex digits of the content's SHA-256>.<ext>`: a side file named by what it
/// holds, so a new calibration never overwrites the one the current calibration file names.
fn content_named(name: &str, kind: &str, ext: &str, bytes: &[u8]) -> String {
    use sha2::Digest;
    let d = sha2::Sha256::digest(bytes);
    let hex: String = d.iter().take(4).map(|b| format!("{b:02x}")).collect();
    format!("{name}-{kind}-{hex}.{ext}")
}

/// Remove the mask and clear-sky library files of calibration `name` in `dir` that `keep` does not
/// name: content-named ones ([`content_named`]) and the unversioned ones of earlier versions.
fn remove_superseded(dir: &std::path::Path, name: &str, keep: &[String]) {
    let Ok(entries) = std::fs::read_dir(dir) else { return };
    for e in entries.flatten() {
        let f = e.file_name().to_string_lossy().into_owned();
        let ours = [("mask", "png"), ("clear-sky", "csv")].iter().any(|(kind, ext)| {
            f.strip_prefix(&format!("{name}-{kind}")).and_then(|r| r.strip_suffix(&format!(".{ext}"))).is_some_and(|mid| {
                mid.is_empty() || (mid.len() == 9 && mid.starts_with('-') && mid[1..].bytes().all(|b| b.is_ascii_hexdigit()))
            })
        });
        if ours && !keep.contains(&f) {
            let _ = std::fs::remove_file(e.path());
        }
    }
}

/// The frames of `calibrate`, decoded, within the count and memory caps; unreadable ones are
/// skipped with a message. With them, the largest JPEG chroma DC quantizer among the frames
/// ([`crate::calibrate::chroma_dc_quantizer`]; `None` without any JPEG chroma table).
type CalibrationFrames = (Vec<(chrono::DateTime<chrono::Utc>, image::RgbImage)>, Option<u16>);

fn load_calibration_frames(dirs: &[PathBuf], naming: &crate::io::FrameNaming) -> Result<CalibrationFrames> {
    let mut frames = vec![];
    let mut chroma_dc: Option<u16> = None;
    let mut untimed = 0;
    let mut unreadable = 0;
    let mut held_bytes = 0u64;
    for dir in dirs {
        let (list, u) = crate::io::list_frames_named(dir, naming)?;
        untimed += u;
        for f in list {
            if frames.len() >= MAX_CALIBRATE_FRAMES {
                bail!("--frames: more than {MAX_CALIBRATE_FRAMES} frames; give fewer folders or thin them (a frame every few minutes is enough)");
            }
            match crate::intake::read_frame(&f.path, &crate::intake::IntakeOptions::default()) {
                Ok(img) => {
                    if let Some(q) = read_head(&f.path).as_deref().and_then(crate::calibrate::chroma_dc_quantizer) {
                        chroma_dc = Some(chroma_dc.map_or(q, |m| m.max(q)));
                    }
                    held_bytes += img.as_raw().len() as u64;
                    if held_bytes > MAX_CALIBRATE_BYTES {
                        bail!("--frames: the frames need more than {} MB decoded (at {} frames); give fewer frames", MAX_CALIBRATE_BYTES / 1_000_000, frames.len() + 1);
                    }
                    frames.push((f.time, img))
                }
                Err(e) => {
                    unreadable += 1;
                    eprintln!("skipped {}: {e}", f.path.display())
                }
            }
        }
    }
    if frames.is_empty() && unreadable > 0 {
        bail!("--frames: {unreadable} frame{} had a time in {} name but none could be read (each is named above as skipped, with the reason)", if unreadable == 1 { "" } else { "s" }, if unreadable == 1 { "its" } else { "their" });
    }
    if frames.is_empty() {
        let hints: Vec<String> = dirs.iter().map(|d| format!("{}{}", d.display(), crate::io::untimed_hint(d, naming))).collect();
        bail!("no frames with a time in their name in --frames ({untimed} files without one; expected {}): {}", naming.expected(), hints.join(" | "));
    }
    Ok((frames, chroma_dc))
}

/// The first 64 KiB of a file (a JPEG's tables come before its scan), `None` when unreadable.
fn read_head(path: &std::path::Path) -> Option<Vec<u8>> {
    use std::io::Read;
    let mut v = vec![];
    std::fs::File::open(path).ok()?.take(64 * 1024).read_to_end(&mut v).ok()?;
    Some(v)
}

/// Print a fit: residuals, lens families, parameters, field, coverage, bounds and warnings.
fn print_fit(fit: &crate::calibrate::Fit, detections: usize) {
    crate::say!("{} sun detections; model {}; residual RMS {:.2} px ({:.3}°), largest {:.2} px ({:.3}°)", detections, fit.camera.projection.name(), fit.rms_px, fit.rms_deg, fit.max_px, fit.max_deg);
    for s in &fit.scores {
        crate::say!("  lens {:<14} held-out RMS {:.3} px (in-sample {:.3} px){}", s.family.name(), s.cv_rms_px, s.fit_rms_px, if s.family == fit.family { "  <- chosen" } else { "" });
    }
    for (n, v, se) in &fit.params {
        let held = if fit.held.contains(n) { "  (held at the image circle's centre, not fitted)" } else { "" };
        crate::say!("  {n:<14} {v:>12.4} ± {se:.4}{held}");
    }
    if fit.glare_lean.measured > 0 {
        crate::say!(
            "  glare lean     detections moved back toward the centre by {:.2} px (median; largest {:.2} px), from the level sets of {} detections ({} model; held-out RMS {:.3} px without it)",
            fit.glare_lean.median_move_px,
            fit.glare_lean.largest_move_px,
            fit.glare_lean.measured,
            fit.glare_lean.model.name(),
            fit.glare_lean.held_out_without_px
        );
    }
    crate::say!("  field          {:>12.2}° from the axis (where the lens puts the image circle's rim)", fit.camera.max_field_angle_rad.to_degrees());
    if let Some(why) = &fit.mirrored_because {
        crate::say!(
            "  handedness     mirrored: the frames show east on the right with north up, as on a map (through a mirror, or flipped by the camera's software); {why}; written as `mirrored = true`"
        );
    } else if fit.handedness_held_out_px.iter().all(|v| !v.is_nan()) {
        let [u, m] = fit.handedness_held_out_px;
        crate::say!(
            "  handedness     upright (held-out error {u:.3} px; fitted mirrored {})",
            if m.is_finite() { format!("{m:.3} px") } else { "no usable camera".into() }
        );
    }
    crate::say!(
        "detections cover zenith {:.0}–{:.0}° over {:.0}° of azimuth; stated direction-error bound by zenith band:",
        fit.coverage.zenith_min_deg,
        fit.coverage.zenith_max_deg,
        fit.coverage.azimuth_span_deg
    );
    for b in &fit.bounds {
        crate::say!("  {:>4.0}–{:<4.0}° {:>8.3}°", b.zenith_from_deg, b.zenith_to_deg, b.bound_deg);
    }
    for w in &fit.warnings {
        crate::say!("warning: {w}");
    }
}

/// `camera project` / `camera unproject`: directions to pixels and back, from standard input.
pub(super) fn cmd_camera(c: CameraCommand) -> Result<()> {
    use std::io::BufRead;
    let (path, forward) = match &c {
        CameraCommand::Project { calibration } => (calibration, true),
        CameraCommand::Unproject { calibration } => (calibration, false),
    };
    let cal: crate::config::CalibrationFile = crate::config::read_toml(path)?;
    let cam = cal.validate(path)?;
    crate::say!("{}", if forward { "x_px,y_px" } else { "zenith_deg,azimuth_deg" });
    for (i, line) in std::io::stdin().lock().lines().enumerate() {
        let line = line?;
        let t = line.trim();
        if t.is_empty() || (i == 0 && t.chars().next().is_some_and(|c| c.is_alphabetic())) {
            continue;
        }
        let v: Vec<f64> = t
            .split(',')
            .map(|x| x.trim().parse::<f64>())
            .collect::<Result<_, _>>()
            .map_err(|_| anyhow::anyhow!("standard input line {}: expected two numbers separated by a comma, got {t:?}", i + 1))?;
        if v.len() != 2 {
            bail!("standard input line {}: expected two numbers, got {}", i + 1, v.len());
        }
        if forward {
            match cam.project(v[0].to_radians(), v[1].to_radians()) {
                Some((x, y)) => crate::say!("{x:.4},{y:.4}"),
                None => crate::say!(","),
            }
        } else {
            match cam.unproject(v[0], v[1]) {
                Some((z, a)) => crate::say!("{:.6},{:.6}", z.to_degrees(), a.to_degrees()),
                None => crate::say!(","),
            }
        }
    }
    Ok(())
}
