//! Cameras from `calibrate`, never from the truth: a clear day rendered for a scene's camera (or a
//! second camera elsewhere), written through JPEG as a user's frames arrive, calibrated from the
//! sun's track with the library's `calibrate`, with the obstruction mask and clear-sky library that
//! `nephocast calibrate --obstruction-mask` writes beside it.
use std::path::Path;

use nephocast::calibrate::{CalibrateOptions, Fit, calibrate, calibration_record, clear_sky_reference, fit_image_circle, obstruction_mask};
use nephocast::segment::{Reference, SegmentParams};
use nephocast::synth::render::PixelRays;
use nephocast::synth::{CameraSpec, Scene, encode_jpeg, encode_png_gray, scene};

/// A camera fitted by `calibrate` from a rendered clear day.
pub struct Calibrated {
    /// The fit (its `camera` is what the engine gets).
    pub fit: Fit,
    /// The detections it was fitted from.
    pub detections: Vec<nephocast::calibrate::Detection>,
    /// The obstruction mask of the clear day's daylight frames (white = sky).
    pub mask: image::GrayImage,
    /// The clear-sky library of the calibration frames.
    pub reference: Reference,
}

/// Render the `clear-day` scene (its day, every `step_s`) at `size_px` for the camera `spec`,
/// standing at the scene's camera position with its mast when `at` is `None`, else at `at` (east,
/// north, up, no mast), through JPEG at the scene's quality, and calibrate it as `calibrate` does.
pub fn clear_day(spec: &CameraSpec, size_px: u32, at: Option<[f64; 3]>, step_s: f64) -> Calibrated {
    clear_day_of("clear-day", spec, size_px, at, step_s)
}

/// [`clear_day`] on the clear-day scene `day` (e.g. `nuisance-clear-day`, whose camera's
/// imperfections come with it).
pub fn clear_day_of(day: &str, spec: &CameraSpec, size_px: u32, at: Option<[f64; 3]>, step_s: f64) -> Calibrated {
    let mut day = scene(day).unwrap();
    day.camera = spec.clone();
    day.size_px = size_px;
    day.frame_step_s = step_s;
    let s = Scene::new(day, 1).unwrap();
    // The scene's own camera (with the clear-day scene's lens field, when it limits it).
    let truth = s.camera.clone();
    let rays = PixelRays::new(&truth);
    let q = s.spec.jpeg_quality;
    let frames: Vec<_> = s
        .frame_times()
        .iter()
        .enumerate()
        .map(|(i, t)| {
            let r = match at {
                None => s.render_frame(&rays, i, t),
                Some(p) => s.render_frame_from(&truth, p, &rays, i, t),
            };
            (*t, image::load_from_memory(&encode_jpeg(&r.rgb, q)).unwrap().to_rgb8())
        })
        .collect();
    let (fit, detections) = calibrate(&frames, &s.world.observer, &CalibrateOptions::default()).unwrap_or_else(|e| panic!("calibration of {}'s clear day: {e}", spec.name));
    let circle = fit_image_circle(&frames[frames.len() / 2].1).expect("image circle");
    let (daylight, suns): (Vec<&image::RgbImage>, Vec<[f64; 3]>) = frames
        .iter()
        .filter_map(|(t, i)| nephocast::sun::position(t, &s.world.observer).ok().filter(|p| p.elevation_rad().to_degrees() > 10.0).map(|p| (i, p.direction_enu())))
        .unzip();
    let mask = obstruction_mask(&daylight, &nephocast::calibrate::sun_sectors(&suns), circle);
    let reference = clear_sky_reference(&frames, &fit, &detections, &SegmentParams::default());
    eprintln!(
        "calibrated {} ({} frames, {size_px}² px{}): {} detections, model {}, residual RMS {:.3}°, direction error against the scene's camera {:.3}° RMS (zenith < 80°), glare lean {:?}",
        spec.name,
        frames.len(),
        if at.is_some() { ", second position" } else { "" },
        detections.len(),
        fit.camera.projection.name(),
        fit.rms_deg,
        direction_error_rms_deg(&truth, &fit.camera),
        fit.glare_lean
    );
    Calibrated { fit, detections, mask, reference }
}

/// RMS direction error \[°\] of `fit` against `truth` over sky directions at zenith < 80° (every 5°
/// of zenith, 10° of azimuth) that the true camera images.
pub fn direction_error_rms_deg(truth: &nephocast::camera::Camera, fit: &nephocast::camera::Camera) -> f64 {
    let (mut s, mut n) = (0.0, 0.0);
    for zi in 0..16 {
        for ai in 0..36 {
            let d = nephocast::sun::direction_enu((zi as f64 * 5.0 + 2.5).to_radians(), (ai as f64 * 10.0).to_radians());
            let Some((x, y)) = truth.project_enu(d) else { continue };
            let Some(e) = fit.unproject_enu(x, y) else { continue };
            s += (d[0] * e[0] + d[1] * e[1] + d[2] * e[2]).clamp(-1.0, 1.0).acos().to_degrees().powi(2);
            n += 1.0;
        }
    }
    (s / n).sqrt()
}

impl Calibrated {
    /// Write `<dir>/<name>.toml` naming `<name>-mask.png` and `<name>-clear-sky.csv` beside it.
    pub fn write(&self, dir: &Path, name: &str) {
        std::fs::create_dir_all(dir).unwrap();
        let mut cal = calibration_record(name, &self.fit, &self.detections);
        std::fs::write(dir.join(format!("{name}-mask.png")), encode_png_gray(&self.mask)).unwrap();
        cal.camera.obstruction_mask = Some(format!("{name}-mask.png").into());
        std::fs::write(dir.join(format!("{name}-clear-sky.csv")), self.reference.to_csv()).unwrap();
        cal.camera.clear_reference = Some(format!("{name}-clear-sky.csv").into());
        std::fs::write(dir.join(format!("{name}.toml")), toml::to_string(&cal).unwrap()).unwrap();
    }
}
