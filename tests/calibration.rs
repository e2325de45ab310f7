//! Camera calibration from the sun's track on synthetic clear days with known cameras.
use chrono::{DateTime, Duration, Utc};
use nephocast::calibrate::{CalibrateOptions, DEFAULT_MIN_SUN_ELEVATION_DEG, calibrate};
use nephocast::camera::Camera;
use nephocast::synth::render::PixelRays;
use nephocast::synth::{CameraSpec, Scene, scene};

#[path = "common/calibrated.rs"]
#[allow(dead_code)]
mod calibrated;

/// Frames of a clear day every 10 minutes from `start` for `hours`, through a given camera.
fn clear_day(cam: &CameraSpec, start: &str, hours: f64) -> (Scene, Vec<(DateTime<Utc>, image::RgbImage)>) {
    let mut spec = scene("clear-day").unwrap();
    spec.camera = cam.clone();
    spec.start_utc = start.into();
    spec.duration_min = hours * 60.0;
    spec.mast = false;
    let s = Scene::new(spec, 1).unwrap();
    let rays = PixelRays::new(&s.camera);
    let frames = s.frame_times().iter().enumerate().map(|(i, t)| (*t, s.render_frame(&rays, i, t).rgb)).collect();
    (s, frames)
}

/// RMS angle between true sky directions (zenith < 80°) and where the fitted camera puts them.
fn direction_error_deg(truth: &Camera, fit: &Camera) -> f64 {
    let mut s = 0.0;
    let mut n = 0.0;
    for zi in 0..16 {
        for ai in 0..36 {
            let (z, a) = ((zi as f64 * 5.0 + 2.5).to_radians(), (ai as f64 * 10.0).to_radians());
            if z.to_degrees() >= 80.0 {
                continue;
            }
            let d = nephocast::sun::direction_enu(z, a);
            let Some((x, y)) = truth.project_enu(d) else { continue };
            let Some(e) = fit.unproject_enu(x, y) else { continue };
            let ang = (d[0] * e[0] + d[1] * e[1] + d[2] * e[2]).clamp(-1.0, 1.0).acos().to_degrees();
            s += ang * ang;
            n += 1.0;
        }
    }
    (s / n).sqrt()
}

fn cam(model: &str, k: Vec<f64>, off: [f64; 2], yaw: f64, pitch: f64, roll: f64) -> CameraSpec {
    CameraSpec { name: "cal-test".into(), model: model.into(), k, rim_fraction: 0.95, offset_px: off, yaw_deg: yaw, pitch_deg: pitch, roll_deg: roll, mirrored: false }
}

fn run(spec: &CameraSpec, days: &[(&str, f64)]) -> (f64, nephocast::calibrate::Fit) {
    let mut frames = vec![];
    let mut truth = None;
    let mut obs = None;
    for (start, hours) in days {
        let (s, f) = clear_day(spec, start, *hours);
        truth = Some(s.camera.clone());
        obs = Some(s.world.observer);
        frames.extend(f);
    }
    let (fit, dets) = calibrate(&frames, &obs.unwrap(), &CalibrateOptions::default()).unwrap();
    let err = direction_error_deg(&truth.unwrap(), &fit.camera);
    eprintln!(
        "{} yaw {} pitch {} roll {}: {} detections, model {}, residual RMS {:.2} px / {:.3}°, sky direction error {:.3}° RMS; {:?}",
        spec.model, spec.yaw_deg, spec.pitch_deg, spec.roll_deg, dets.len(), fit.camera.projection.name(), fit.rms_px, fit.rms_deg, err, fit.warnings
    );
    (err, fit)
}

/// Two days at different seasons: direction error over the sky (zenith < 80°) ≤ 0.1° RMS.
#[test]
fn two_seasons_recover_each_model() {
    for spec in [
        cam("equidistant", vec![], [12.0, -17.0], 137.0, 2.1, -1.4),
        cam("equisolid", vec![], [-19.0, 8.0], -64.0, -1.2, 2.8),
        cam("polynomial", vec![-0.03, 0.002], [5.0, 15.0], 23.0, 0.8, -2.5),
    ] {
        let (err, _) = run(&spec, &[("2026-06-14T05:00:00Z", 14.0), ("2026-12-14T07:40:00Z", 9.0)]);
        assert!(err <= 0.1, "{}: {err}°", spec.model);
    }
}

/// A clear day at another latitude: the renderer's sun moved to a fictional site (longitude of the
/// scene's site, so that the frame times stay in daylight), the camera fitted from that day alone.
fn run_at(spec: &CameraSpec, start: &str, hours: f64, latitude_deg: f64) -> (f64, nephocast::calibrate::Fit, Vec<f64>) {
    let mut sc = scene("clear-day").unwrap();
    sc.camera = spec.clone();
    sc.start_utc = start.into();
    sc.duration_min = hours * 60.0;
    sc.mast = false;
    let mut s = Scene::new(sc, 1).unwrap();
    let o = s.world.observer;
    s.world.observer = nephocast::sun::Observer::new(latitude_deg, o.longitude_deg, o.elevation_m);
    let rays = PixelRays::new(&s.camera);
    let frames: Vec<_> = s.frame_times().iter().enumerate().map(|(i, t)| (*t, s.render_frame(&rays, i, t).rgb)).collect();
    let (fit, dets) = calibrate(&frames, &s.world.observer, &CalibrateOptions::default()).unwrap();
    let err = direction_error_deg(&s.camera, &fit.camera);
    let az: Vec<f64> = dets.iter().map(|d| d.dir[0].atan2(d.dir[1]).to_degrees()).collect();
    eprintln!(
        "latitude {latitude_deg}°, {start}: {} detections, zenith {:.0}–{:.0}°, model {}, sky direction error {err:.3}° RMS; {:?}",
        dets.len(), fit.coverage.zenith_min_deg, fit.coverage.zenith_max_deg, fit.camera.projection.name(), fit.warnings
    );
    (err, fit, az)
}

/// The sun's arc on the other side of the sky: a southern site in its summer (the sun through the
/// north) and a tropical one whose sun passes almost through the zenith. Nothing in `calibrate` may
/// assume a northern sky: one day each, direction error ≤ 0.3° RMS as
/// `single_day_within_a_third_of_a_degree`, and the detections really north of the camera (or
/// crossing overhead).
#[test]
fn southern_and_tropical_skies() {
    let spec = cam("equisolid", vec![], [7.0, -11.0], 205.0, 1.3, -0.9);
    let (err, _, az) = run_at(&spec, "2026-12-14T05:00:00Z", 14.0, -33.5);
    let northward = az.iter().filter(|a| a.abs() < 90.0).count();
    assert!(northward * 2 > az.len(), "the southern test needs the sun in the north: {northward} of {} detections", az.len());
    assert!(err <= 0.3, "southern summer day: {err}°");
    let (err, fit, _) = run_at(&spec, "2026-06-14T05:00:00Z", 14.0, 21.0);
    assert!(fit.coverage.zenith_min_deg < 10.0, "the tropical test needs the sun near the zenith: from {:.1}°", fit.coverage.zenith_min_deg);
    assert!(err <= 0.3, "tropical day, sun through the zenith: {err}°");
}

/// A single day: direction error ≤ 0.3° RMS.
#[test]
fn single_day_within_a_third_of_a_degree() {
    let (err, _) = run(&cam("equidistant", vec![], [-8.0, 14.0], 250.0, -2.6, 1.9), &[("2026-06-14T05:00:00Z", 14.0)]);
    assert!(err <= 0.3, "{err}°");
}

/// Frames mirrored left–right (the renderer's camera `mirrored`: east on the right with north up):
/// `calibrate` finds the handedness by held-out error (the upright fit of these detections is not
/// a usable camera, or predicts the held-out blocks far worse) and recovers the camera as well as
/// an upright one (≤ 0.3° RMS from one day, as `single_day_within_a_third_of_a_degree`). The same
/// camera upright is found upright.
#[test]
fn mirrored_frames_are_found_and_fitted() {
    for mirrored in [true, false] {
        let spec = CameraSpec { mirrored, ..cam("equisolid", vec![], [6.0, -9.0], 40.0, 1.1, -0.7) };
        let (err, fit) = run(&spec, &[("2026-06-14T05:00:00Z", 14.0)]);
        let [up, mi] = fit.handedness_held_out_px;
        eprintln!("mirrored {mirrored}: held-out error upright {up:.3} px, mirrored {mi:.3} px; {:?}", fit.mirrored_because);
        assert_eq!(fit.camera.mirrored, mirrored, "{:?}", fit.handedness_held_out_px);
        assert_eq!(fit.mirrored_because.is_some(), mirrored);
        assert!(err <= 0.3, "mirrored {mirrored}: {err}°");
        // The written file reads back as the same camera.
        let file = nephocast::config::CalibrationFile::from_camera("c", &fit.camera);
        let text = toml::to_string(&file).unwrap();
        assert_eq!(text.contains("mirrored = true"), mirrored, "{text}");
        let back: nephocast::config::CalibrationFile = toml::from_str(&text).unwrap();
        let back = back.camera(std::path::Path::new("c.toml")).unwrap();
        assert_eq!(back.mirrored, mirrored);
        for (z, a) in [(0.3, 0.5), (0.9, 2.0), (1.3, 4.4)] {
            let (p, q) = (back.project(z, a).unwrap(), fit.camera.project(z, a).unwrap());
            assert!((p.0 - q.0).abs() < 1e-6 && (p.1 - q.1).abs() < 1e-6, "{p:?} {q:?}");
        }
    }
}

/// A time stamp burnt into every frame as white text, in the corner outside the image circle and
/// inside it near the rim (its digits change from frame to frame): before, the saturated text made
/// every frame's sun ambiguous (0 detections, no calibration). Now the sun finder leaves out what is
/// bright outside the circle or through the day, the camera comes out as from clean frames
/// (≤ 0.3° RMS from one day), and the overlay inside the circle is found for the obstruction mask.
#[test]
fn time_stamps_burnt_into_the_frames() {
    let spec = cam("equidistant", vec![], [-8.0, 14.0], 250.0, -2.6, 1.9);
    let (s, mut frames) = clear_day(&spec, "2026-06-14T05:00:00Z", 14.0);
    // Crude digits: a 2 px white bar per "segment", some fixed (the date), some changing (the time).
    let stamp = |img: &mut image::RgbImage, x0: u32, y0: u32, k: usize| {
        for (j, on) in (0..24).map(|j| (j, j < 12 || (k >> (j % 6)) & 1 == 1)) {
            if !on {
                continue;
            }
            let (x, y) = (x0 + 7 * (j as u32 % 12), y0 + 9 * (j as u32 / 12));
            for dy in 0..7 {
                for dx in 0..2 {
                    img.put_pixel(x + dx, y + dy, image::Rgb([255, 255, 255]));
                    img.put_pixel(x + dy.min(4), y + dx, image::Rgb([255, 255, 255]));
                }
            }
        }
    };
    for (k, (_, img)) in frames.iter_mut().enumerate() {
        stamp(img, 2, 2, k);
        stamp(img, 200, 470, k);
    }
    let (fit, dets) = calibrate(&frames, &s.world.observer, &CalibrateOptions::default()).unwrap();
    let err = direction_error_deg(&s.camera, &fit.camera);
    eprintln!("stamped frames: {} detections, sky direction error {err:.3}° RMS", dets.len());
    assert!(dets.len() >= 40 && err <= 0.3, "{} detections, {err}°", dets.len());
    let day: Vec<&image::RgbImage> = frames.iter().map(|(_, i)| i).collect();
    let suns: Vec<[f64; 3]> = frames.iter().map(|(t, _)| nephocast::sun::position(t, &s.world.observer).unwrap().direction_enu()).collect();
    let sectors = nephocast::calibrate::sun_sectors(&suns);
    let circle = nephocast::calibrate::fit_image_circle(day[day.len() / 2]).unwrap();
    let (mask, inside) = nephocast::calibrate::overlay_mask(&day, &sectors, circle).expect("the stamp inside the circle is found");
    assert!(inside > 100, "{inside}");
    assert_eq!(mask.get_pixel(205, 474).0[0], 0);
    assert_eq!(mask.get_pixel(256, 256).0[0], 255);
    // Clean frames have no overlay.
    let (_, clean) = clear_day(&spec, "2026-06-14T05:00:00Z", 14.0);
    let day: Vec<&image::RgbImage> = clean.iter().map(|(_, i)| i).collect();
    assert!(nephocast::calibrate::overlay_mask(&day, &sectors, circle).is_none());
    // Three copies of the clean day, one after another (three days as three folders): the sun's
    // glare repeats each day but stays in one third of the sun's azimuths, so still no overlay.
    let three: Vec<&image::RgbImage> = day.iter().chain(&day).chain(&day).copied().collect();
    let sectors3: Vec<usize> = sectors.iter().chain(&sectors).chain(&sectors).copied().collect();
    assert!(nephocast::calibrate::overlay_mask(&three, &sectors3, circle).is_none());
}

/// Night-only frames give a clear error saying what was found.
#[test]
fn night_frames_are_refused_with_a_count() {
    let (s, frames) = clear_day(&cam("equidistant", vec![], [0.0, 0.0], 0.0, 0.0, 0.0), "2026-06-14T21:00:00Z", 3.0);
    let e = calibrate(&frames, &s.world.observer, &CalibrateOptions::default()).unwrap_err().to_string();
    assert!(e.starts_with("0 sun detections, 20 needed"), "{e}");
}

/// The reported standard errors are honest: with detections simulated from a known camera plus
/// Gaussian centroid noise (0.3 px), the fitted yaw, pitch, roll and principal point fall within
/// two standard errors of the truth about 95 % of the time over many seeds.
#[test]
fn standard_errors_cover_the_truth() {
    use nephocast::calibrate::{Detection, fit_detections};
    use nephocast::camera::{Orientation, Projection};
    use nephocast::synth::noise::{gaussian, hash64};
    let obs = nephocast::sun::Observer::new(37.4, -3.2, 640.0);
    let truth = Camera::new(512, 512, 262.0, 249.0, 156.0, Projection::Equidistant, 95f64.to_radians(), Orientation { yaw_rad: 0.9, pitch_rad: 0.03, roll_rad: -0.02 });
    let (mut inside, mut total) = (0, 0);
    for seed in 0..40u64 {
        let mut dets = vec![];
        for day in ["2026-06-14", "2026-12-14"] {
            for k in 0..90 {
                let t: DateTime<Utc> = format!("{day}T05:00:00Z").parse::<DateTime<Utc>>().unwrap() + Duration::minutes(10 * k);
                let sp = nephocast::sun::position(&t, &obs).unwrap();
                if sp.elevation_rad().to_degrees() < 10.0 {
                    continue;
                }
                let dir = nephocast::sun::direction_enu(sp.apparent_zenith_rad, sp.azimuth_rad);
                let (x, y) = truth.project_enu(dir).unwrap();
                let i = seed * 1000 + k as u64 + if day.ends_with("12-14") { 500 } else { 0 };
                let nx = 0.3 * gaussian(hash64(i * 4 + 1), hash64(i * 4 + 2));
                let ny = 0.3 * gaussian(hash64(i * 4 + 3), hash64(i * 4 + 4));
                dets.push(Detection::new(t, (x + nx, y + ny), dir));
            }
        }
        let start = truth.with_orientation(Orientation { yaw_rad: 0.85, pitch_rad: 0.0, roll_rad: 0.0 });
        let fit = fit_detections(&start, Projection::Equidistant, &dets);
        let want = [("cx_px", 262.0), ("cy_px", 249.0), ("yaw_deg", 0.9f64.to_degrees()), ("pitch_deg", 0.03f64.to_degrees()), ("roll_deg", -0.02f64.to_degrees())];
        for (name, v) in want {
            let (_, est, se) = fit.params.iter().find(|p| p.0 == name).unwrap();
            total += 1;
            inside += ((est - v).abs() <= 2.0 * se) as usize;
        }
    }
    let share = inside as f64 / total as f64;
    eprintln!("parameters within 2 standard errors of the truth: {inside} of {total} ({:.0} %)", 100.0 * share);
    assert!((0.88..=1.0).contains(&share), "{share}");
}

/// Sun detections against the true sun (sun at least as high as calibration uses): each detected
/// centroid is compared with where the known camera projects the SPA sun direction; prints the mean
/// radial and tangential offsets (a bias the fit would absorb into the lens) and the RMS.
#[test]
fn sun_detections_sit_on_the_true_sun() {
    use nephocast::calibrate::detect_sun;
    let spec = cam("equisolid", vec![], [-19.0, 8.0], -64.0, -1.2, 2.8);
    let (mut sr, mut st, mut ss, mut n) = (0.0, 0.0, 0.0, 0.0);
    for (start, hours) in [("2026-06-14T05:00:00Z", 14.0), ("2026-12-14T07:40:00Z", 9.0)] {
        let (s, frames) = clear_day(&spec, start, hours);
        let c = &s.camera;
        let radius_px = nephocast::calibrate::fit_image_circle(&frames[frames.len() / 2].1).unwrap().radius_px;
        for (t, img) in &frames {
            let sp = nephocast::sun::position(t, &s.world.observer).unwrap();
            if sp.elevation_rad().to_degrees() < DEFAULT_MIN_SUN_ELEVATION_DEG {
                continue;
            }
            let Some((tx, ty)) = c.project_enu(nephocast::sun::direction_enu(sp.apparent_zenith_rad, sp.azimuth_rad)) else { continue };
            let Some((x, y, _)) = detect_sun(img, radius_px, nephocast::calibrate::ClipTest::Channels) else { continue };
            // Radial unit vector from the principal point through the true sun.
            let (ux, uy) = (tx - c.cx_px, ty - c.cy_px);
            let l = (ux * ux + uy * uy).sqrt().max(1e-9);
            let (dx, dy) = (x - tx, y - ty);
            let (r, tg) = ((dx * ux + dy * uy) / l, (-dx * uy + dy * ux) / l);
            sr += r;
            st += tg;
            ss += dx * dx + dy * dy;
            n += 1.0;
            eprintln!("{t} zenith {:5.1}° offset radial {r:+.3} px, tangential {tg:+.3} px", 90.0 - sp.elevation_rad().to_degrees());
        }
    }
    let rms = (ss / n).sqrt();
    eprintln!("{n} detections: mean radial {:+.3} px, mean tangential {:+.3} px, RMS {rms:.3} px", sr / n, st / n);
    assert!(n >= 40.0 && rms < 0.3 && (sr / n).abs() < 0.15, "{n} detections, RMS {rms} px, mean radial {} px", sr / n);
}

/// A sensor that cuts the image circle (here a 16:9 frame cut from the rendered square one, across
/// the sun's track, so that the sun leaves the frame in the morning or evening): before, frames
/// whose sun sat on or beyond the edge gave detections of its cut disc or of its glare (leaning
/// up to 20 px toward the frame, or 100 px off), and the fit was off by 0.4–1.7° on the
/// independent scenes. Now a disc or glare level the edge cuts gives no detection, a gross outlier
/// is dropped and the fit made again, and the camera comes out as from whole frames (≤ 0.3° RMS
/// from one day, as `single_day_within_a_third_of_a_degree`).
#[test]
fn frames_that_cut_the_image_circle() {
    let spec = cam("equidistant", vec![], [-8.0, 14.0], 250.0, -2.6, 1.9);
    let (s, frames) = clear_day(&spec, "2026-06-14T05:00:00Z", 14.0);
    let (w, h) = frames[0].1.dimensions();
    // The sun's track in the whole frame: cut across its longer extent.
    let track: Vec<(f64, f64)> = frames
        .iter()
        .filter_map(|(t, _)| nephocast::sun::position(t, &s.world.observer).ok())
        .filter(|p| p.elevation_rad().to_degrees() >= DEFAULT_MIN_SUN_ELEVATION_DEG)
        .filter_map(|p| s.camera.project_enu(p.direction_enu()))
        .collect();
    let extent = |f: fn(&(f64, f64)) -> f64| track.iter().map(f).fold(f64::INFINITY, f64::min)..track.iter().map(f).fold(f64::NEG_INFINITY, f64::max);
    let (xs, ys) = (extent(|p| p.0), extent(|p| p.1));
    let across_rows = ys.end - ys.start >= xs.end - xs.start;
    let cut = (if across_rows { h } else { w }) * 7 / 32; // 512 -> 288
    let (x0, y0, cw, ch) = if across_rows { (0, cut, w, h - 2 * cut) } else { (cut, 0, w - 2 * cut, h) };
    let cut_frames: Vec<(DateTime<Utc>, image::RgbImage)> =
        frames.iter().map(|(t, img)| (*t, image::imageops::crop_imm(img, x0, y0, cw, ch).to_image())).collect();
    let c = &s.camera;
    let truth = Camera::new(cw, ch, c.cx_px - x0 as f64, c.cy_px - y0 as f64, c.f_px, c.projection, c.max_field_angle_rad, c.orientation).with_mirrored(c.mirrored);
    let outside = track.iter().filter(|p| truth.project_enu(c.unproject_enu(p.0, p.1).unwrap()).is_none()).count();
    assert!(outside >= 5 && outside + 20 < track.len(), "the cut should take part of the track: {outside} of {}", track.len());
    let (fit, dets) = calibrate(&cut_frames, &s.world.observer, &CalibrateOptions::default()).unwrap();
    let err = direction_error_deg(&truth, &fit.camera);
    eprintln!("cut frames {cw}x{ch} ({outside} of {} suns outside): {} detections, sky direction error {err:.3}° RMS; {:?}", track.len(), dets.len(), fit.warnings);
    assert!(dets.iter().all(|d| truth.project_enu(d.dir).is_some()), "a detection of a sun outside the frame");
    assert!(err <= 0.3, "{err}°");
}

/// True sun pixel of each detection's time through the scene's camera.
fn true_sun_px(s: &Scene, t: &DateTime<Utc>) -> Option<(f64, f64)> {
    let sp = nephocast::sun::position(t, &s.world.observer).ok()?;
    s.camera.project_enu(nephocast::sun::direction_enu(sp.apparent_zenith_rad, sp.azimuth_rad))
}

/// A day that is not wholly clear: broken cumulus (cover 0.45 at 1200 m, 12 m/s) over the whole
/// day at the calibration cadence (every 10 minutes), so that in many frames cloud hides the sun,
/// dims it, or lies beside it and leans its clipped core. Frames with the sun hidden give no
/// detection; a detection whose glare is not a clear sky's is dropped (`calibrate::surround`): no
/// kept one lies more than 2.5 px off the true sun (a clear day's sit within 0.12 px RMS,
/// `sun_detections_sit_on_the_true_sun`; the most bloomed of them up to 2.3 px off before the
/// glare-lean correction's choice), and the fit is as good as a clear day's (≤ 0.3° RMS,
/// `single_day_within_a_third_of_a_degree`). Measured when added: without the drop 45 detections
/// kept, three of them 3.0–3.5 px off (cloud leaning the clipped core), 0.076° RMS; with it (ring
/// at least 4 px out and 4 px wide) 27 kept, 18 dropped, 0.089° RMS (fewer detections; on this renderer the
/// cloud-leaned cores barely move the fit; on the independent renderer's they did: docs/checks.md).
#[test]
fn a_partly_cloudy_day_keeps_the_clear_suns_only() {
    let mut spec = scene("broken-cumulus-fast").unwrap();
    spec.camera = cam("equidistant", vec![], [-8.0, 14.0], 250.0, -2.6, 1.9);
    spec.start_utc = "2026-06-14T05:00:00Z".into();
    spec.duration_min = 14.0 * 60.0;
    spec.frame_step_s = 600.0;
    spec.mast = false;
    let s = Scene::new(spec, 3).unwrap();
    let rays = PixelRays::new(&s.camera);
    let frames: Vec<_> = s.frame_times().iter().enumerate().map(|(i, t)| (*t, s.render_frame(&rays, i, t).rgb)).collect();
    let (fit, dets) = calibrate(&frames, &s.world.observer, &CalibrateOptions::default()).unwrap();
    let err = direction_error_deg(&s.camera, &fit.camera);
    let offsets: Vec<f64> = dets.iter().filter_map(|d| true_sun_px(&s, &d.time).map(|p| (d.px.0 - p.0).hypot(d.px.1 - p.1))).collect();
    let largest = offsets.iter().copied().fold(0.0, f64::max);
    for (d, o) in dets.iter().zip(&offsets).filter(|(_, o)| **o > 1.0) {
        eprintln!("  kept {} {o:.2} px off the true sun, zenith {:.1}°, blob {} px, weight {:.2}", d.time, d.dir[2].acos().to_degrees(), d.blob_px, d.weight);
    }
    eprintln!(
        "partly cloudy day: {} frames, {} detections kept ({} dropped for cloud at the sun), largest offset from the true sun {largest:.2} px, sky direction error {err:.3}° RMS; {:?}",
        frames.len(), dets.len(), fit.clouded.len(), fit.warnings
    );
    assert!(!fit.clouded.is_empty(), "the cloud should have touched some suns");
    assert!(largest <= 2.5, "a kept detection {largest:.2} px off the true sun");
    assert!(err <= 0.3, "{err}°");
}

/// Something fixed across the sun's track: a dark mast (14 px wide, radial as a vertical mast
/// images in a level fisheye) painted over a clear day's frames through the middle of the track,
/// so that the sun is hidden in some frames and half hidden in others, and a small saturated
/// reflection (radius 3 px) elsewhere in every frame. No detection is kept whose sun lies within
/// the mast's half width + 3 px of its axis (its clipped core cut), the reflection is never taken
/// for the sun, and the fit is as good as a clear day's (≤ 0.3° RMS,
/// `single_day_within_a_third_of_a_degree`). Measured when added: without the drop two detections
/// of a cut core kept, 0.051° RMS; with it none (6 dropped), 0.017° RMS.
#[test]
fn a_mast_across_the_sun_track_and_a_reflection() {
    let spec = cam("equidistant", vec![], [-8.0, 14.0], 250.0, -2.6, 1.9);
    let (s, mut frames) = clear_day(&spec, "2026-06-14T05:00:00Z", 14.0);
    let c = &s.camera;
    let track: Vec<(f64, f64)> = frames
        .iter()
        .filter(|(t, _)| nephocast::sun::position(t, &s.world.observer).is_ok_and(|p| p.elevation_rad().to_degrees() >= DEFAULT_MIN_SUN_ELEVATION_DEG))
        .filter_map(|(t, _)| true_sun_px(&s, t))
        .collect();
    let p = track[track.len() * 2 / 5];
    let rim = c.f_px * c.max_field_angle_rad;
    let (ux, uy) = {
        let (dx, dy) = (p.0 - c.cx_px, p.1 - c.cy_px);
        let n = dx.hypot(dy);
        (dx / n, dy / n)
    };
    let half_width = 7.0;
    // From 0.3 radii inward of the track out past the rim.
    let (a, b) = ((p.0 - 0.3 * rim * ux, p.1 - 0.3 * rim * uy), (c.cx_px + 1.1 * rim * ux, c.cy_px + 1.1 * rim * uy));
    let to_axis = |x: f64, y: f64| {
        let (abx, aby) = (b.0 - a.0, b.1 - a.1);
        let t = (((x - a.0) * abx + (y - a.1) * aby) / (abx * abx + aby * aby)).clamp(0.0, 1.0);
        (x - a.0 - t * abx).hypot(y - a.1 - t * aby)
    };
    let glint = (c.cx_px - 0.55 * rim * ux, c.cy_px - 0.55 * rim * uy);
    for (_, img) in frames.iter_mut() {
        for (x, y, px) in img.enumerate_pixels_mut() {
            let (xf, yf) = (x as f64, y as f64);
            if to_axis(xf, yf) <= half_width {
                *px = image::Rgb([28, 29, 31]);
            } else if (xf - glint.0).hypot(yf - glint.1) <= 3.0 {
                *px = image::Rgb([255, 255, 255]);
            }
        }
    }
    let (fit, dets) = calibrate(&frames, &s.world.observer, &CalibrateOptions::default()).unwrap();
    let err = direction_error_deg(c, &fit.camera);
    let cut: Vec<f64> = dets.iter().filter_map(|d| true_sun_px(&s, &d.time)).map(|p| to_axis(p.0, p.1)).filter(|d| *d <= half_width + 3.0).collect();
    let on_glint = dets.iter().filter(|d| (d.px.0 - glint.0).hypot(d.px.1 - glint.1) < 5.0).count();
    eprintln!(
        "mast and reflection: {} detections kept ({} dropped for cloud or the mast at the sun), {} with the sun within {:.0} px of the mast's axis, {on_glint} on the reflection, sky direction error {err:.3}° RMS; {:?}",
        dets.len(), fit.clouded.len(), cut.len(), half_width + 3.0, fit.warnings
    );
    assert!(cut.is_empty(), "detections of a sun the mast cuts were kept: their suns {cut:?} px from its axis");
    assert_eq!(on_glint, 0, "the reflection was taken for the sun");
    assert!(err <= 0.3, "{err}°");
}

/// This project's clean clear day at 384² every 15 minutes through JPEG, for the first camera of
/// the single-layer scenes and a second one turned 70° and 850 m away (the cameras of
/// `tests/stereo.rs`): 22 suns found, a ring only 2.3–4.7 px wide at 1.25–2.5 % of the radius. No
/// clear sun is taken for clouded and nothing falls back to the fit from every detection (a ring
/// that narrow dropped 9–10 of them, and the second camera's held fit on the rest came out pitched
/// −181°, so `calibrate` refused).
#[test]
fn a_small_clean_clear_day_drops_no_sun() {
    let a = scene("broken-cumulus-fast").unwrap().camera;
    let b = CameraSpec { name: "second".into(), yaw_deg: a.yaw_deg + 70.0, ..a.clone() };
    let p = Scene::new(scene("clear-day").unwrap(), 1).unwrap().cam_pos_m;
    for (spec, at) in [(a, None), (b, Some([p[0] + 800.0, p[1] + 300.0, p[2]]))] {
        let c = calibrated::clear_day(&spec, 384, at, 900.0);
        assert!(c.fit.clouded.is_empty(), "{}: clear suns dropped at {:?}", spec.name, c.fit.clouded);
        assert!(!c.fit.warnings.iter().any(|w| w.contains("judged clouded")), "{}: {:?}", spec.name, c.fit.warnings);
        assert!(c.detections.len() >= 20, "{}: {} detections", spec.name, c.detections.len());
    }
}
