//! What calibration writes besides the camera: the camera's clear-sky library, the detections
//! table, the residual plot and the obstruction mask.

use chrono::{DateTime, Utc};

use super::{Detection, Fit, ImageCircle, UNCONSTRAINED_BOUND_DEG};
use crate::sun::{direction_enu, zenith_azimuth_of};

/// The library's samples per image circle radius: the clear-sky library reads every
/// [`library_sample_step`]-th pixel in each direction, a step of about this share of the radius, so
/// that a bin holds about as many samples whatever the camera's resolution (a circle of radius
/// 168–280 px, as 384² and 512² frames have: every second pixel, as before; 1024²: every fourth;
/// 256²: every pixel).
pub const LIBRARY_SAMPLES_PER_RADIUS: f64 = 112.0;

/// The pixel step of the clear-sky library's samples for a camera (see
/// [`LIBRARY_SAMPLES_PER_RADIUS`]). A bin needs 3 unclipped samples in a frame to count in it, so a
/// step fixed in pixels made the library depend on the resolution: at 1024² a bin mostly clipped
/// around the sun still held 3 unclipped samples and was learnt from its few darker pixels instead
/// of being marked clipped.
pub fn library_sample_step(cam: &crate::camera::Camera) -> usize {
    let step = (cam.image_circle_radius_px() / LIBRARY_SAMPLES_PER_RADIUS).round();
    if step.is_finite() { (step as usize).max(1) } else { 1 }
}

/// The clear-sky reference of this camera from its calibration frames: the R/B library
/// ([`crate::segment::Reference`]) of the frames whose sun was detected (an unclouded sun), binned
/// by zenith and sun angle through the fitted camera. A bin needs data from at least 3 frames.
pub fn clear_sky_reference(frames: &[(DateTime<Utc>, image::RgbImage)], fit: &Fit, dets: &[Detection], params: &crate::segment::SegmentParams) -> crate::segment::Reference {
    clear_sky_reference_of(frames, &fit.camera, dets, params)
}

/// [`clear_sky_reference`] through a given camera.
pub fn clear_sky_reference_of(frames: &[(DateTime<Utc>, image::RgbImage)], cam: &crate::camera::Camera, dets: &[Detection], params: &crate::segment::SegmentParams) -> crate::segment::Reference {
    let mask = cam.sky_mask(std::f64::consts::FRAC_PI_2, None);
    let (w, h) = (cam.width_px as usize, cam.height_px as usize);
    // Every `step`-th pixel in each direction: a step that is a share of the image circle.
    let step = library_sample_step(cam);
    let pixels: Vec<(usize, [f32; 3], f32)> = (0..h)
        .step_by(step)
        .flat_map(|y| (0..w).step_by(step).map(move |x| (x, y)))
        .filter_map(|(x, y)| {
            let i = y * w + x;
            if !mask.sky[i] {
                return None;
            }
            let d = direction_enu(mask.zenith_rad[i] as f64, mask.azimuth_rad[i] as f64);
            Some((i, [d[0] as f32, d[1] as f32, d[2] as f32], mask.zenith_rad[i].to_degrees()))
        })
        .collect();
    let times: std::collections::HashSet<DateTime<Utc>> = dets.iter().map(|d| d.time).collect();
    let used: Vec<(&image::RgbImage, [f32; 3])> = frames
        .iter()
        .filter(|(t, _)| times.contains(t))
        .filter_map(|(t, img)| dets.iter().find(|d| d.time == *t).map(|d| (img, [d.dir[0] as f32, d.dir[1] as f32, d.dir[2] as f32])))
        .collect();
    // Text or a logo burnt into the frames is not clear sky (see `obstruction_mask`).
    let imgs: Vec<&image::RgbImage> = used.iter().map(|(img, _)| *img).collect();
    let sectors = super::overlay::sun_sectors(&used.iter().map(|(_, d)| [d[0] as f64, d[1] as f64, d[2] as f64]).collect::<Vec<_>>());
    let overlay = if imgs.is_empty() { vec![false; w * h] } else { super::overlay::burnt_in(&imgs, &sectors) };
    let pixels: Vec<(usize, [f32; 3], f32)> = pixels.into_iter().filter(|(i, _, _)| !overlay[*i]).collect();
    let samples = used.iter().map(|(img, sun)| {
        let raw = img.as_raw();
        pixels.iter().map(move |(i, d, z)| {
            let g = crate::segment::gamma_deg(*d, Some(*sun));
            ([raw[3 * i], raw[3 * i + 1], raw[3 * i + 2]], crate::segment::PixelGeom { z_deg: *z, gamma_deg: g })
        })
    });
    crate::segment::Reference::from_clear_samples(params, samples, 3)
}

/// The detections as CSV: time, centroid, sun zenith and azimuth, blob area, weight, residual.
pub fn detections_csv(fit: &Fit, dets: &[Detection]) -> String {
    let mut out = crate::io::CsvTable::with_header_line("time_utc,x_px,y_px,sun_zenith_deg,sun_azimuth_deg,blob_px,weight,residual_x_px,residual_y_px");
    for (d, e) in dets.iter().zip(&fit.residuals) {
        let (z, a) = zenith_azimuth_of(d.dir);
        out.row([
            crate::io::fmt_time(&d.time),
            format!("{:.3}", d.px.0),
            format!("{:.3}", d.px.1),
            format!("{:.3}", z.to_degrees()),
            format!("{:.3}", a.to_degrees()),
            d.blob_px.to_string(),
            format!("{:.4}", d.weight),
            format!("{:.3}", e.0),
            format!("{:.3}", e.1),
        ]);
    }
    out.into_string()
}

/// The residual plot: the frame (dimmed); zenith circles every 10° out to the lens field, coloured
/// by the stated direction-error bound (green ≤ 0.2°, yellow ≤ 0.5°, orange ≤ 2°, red beyond);
/// the detections (green, or grey when the bloom screening down-weighted them below 0.3), fitted
/// positions (red) and error arrows (×20).
pub fn residual_plot(background: &image::RgbImage, fit: &Fit, dets: &[Detection]) -> image::RgbImage {
    let mut img = background.clone();
    for p in img.pixels_mut() {
        for c in p.0.iter_mut() {
            *c /= 3;
        }
    }
    let put = |img: &mut image::RgbImage, x: i64, y: i64, c: [u8; 3]| {
        if x >= 0 && y >= 0 && (x as u32) < img.width() && (y as u32) < img.height() {
            img.put_pixel(x as u32, y as u32, image::Rgb(c));
        }
    };
    let cam = &fit.camera;
    let max_z = cam.max_field_angle_rad.to_degrees().min(90.0);
    let mut z = 10.0;
    while z <= max_z + 1e-9 {
        let colour = match fit.bound_at_deg(z - 0.01) {
            Some(b) if b <= 0.2 => [40, 200, 60],
            Some(b) if b <= UNCONSTRAINED_BOUND_DEG => [230, 210, 40],
            Some(b) if b <= 2.0 => [240, 140, 30],
            _ => [230, 40, 40],
        };
        for ai in 0..1440 {
            let a = (ai as f64 * 0.25).to_radians();
            if let Some((x, y)) = cam.project(z.to_radians(), a) {
                put(&mut img, x.round() as i64, y.round() as i64, colour);
            }
        }
        z += 10.0;
    }
    // North marker: a short line from the zenith toward north at 20°.
    if let (Some(a), Some(b)) = (cam.project(0.0, 0.0), cam.project(20f64.to_radians(), 0.0)) {
        crate::overlay::line(&mut img, (a.0 as i64, a.1 as i64), (b.0 as i64, b.1 as i64), [200, 200, 255]);
    }
    for (d, e) in dets.iter().zip(&fit.residuals) {
        let (x, y) = d.px;
        let a = (x as i64, y as i64);
        let b = ((x + 20.0 * e.0) as i64, (y + 20.0 * e.1) as i64);
        let used = d.weight >= 0.3;
        crate::overlay::line(&mut img, a, b, if used { [255, 200, 0] } else { [120, 110, 60] });
        for (dx, dy) in [(0, 0), (1, 0), (0, 1), (-1, 0), (0, -1)] {
            put(&mut img, a.0 + dx, a.1 + dy, if used { [40, 220, 40] } else { [150, 150, 150] });
            put(&mut img, (x + e.0) as i64 + dx, (y + e.1) as i64 + dy, [230, 40, 40]);
        }
    }
    img
}

/// Obstruction mask from daylight frames: white = open sky; black where a pixel inside the image
/// circle stays dark (mean level below 50) or unchanged (standard deviation of its level below 1.5)
/// across the frames — masts, the horizon line, the housing — or is white (every channel at least
/// 236) in at least a fifth of the frames of each third of the sun's azimuth range (`sectors`, per
/// frame: [`super::sun_sectors`]), widened by 2 px: text or a logo burnt into the frame, whose
/// changing digits and JPEG rings are not unchanged, while the sun's glare passes over a pixel
/// within minutes.
pub fn obstruction_mask(frames: &[&image::RgbImage], sectors: &[usize], circle: ImageCircle) -> image::GrayImage {
    let (w, h) = frames[0].dimensions();
    let n = frames.len() as f64;
    let overlay = super::overlay::burnt_in(frames, sectors);
    let mut out = image::GrayImage::new(w, h);
    for y in 0..h {
        for x in 0..w {
            let inside = ((x as f64 - circle.cx_px).powi(2) + (y as f64 - circle.cy_px).powi(2)).sqrt() <= circle.radius_px;
            if !inside {
                continue;
            }
            let (mut s, mut ss) = (0.0, 0.0);
            for f in frames {
                let p = f.get_pixel(x, y).0;
                let v = (p[0] as f64 + p[1] as f64 + p[2] as f64) / 3.0;
                s += v;
                ss += v * v;
            }
            let mean = s / n;
            let sd = (ss / n - mean * mean).max(0.0).sqrt();
            let open = mean >= 50.0 && sd >= 1.5 && !overlay[(y * w + x) as usize];
            out.put_pixel(x, y, image::Luma([if open { 255 } else { 0 }]));
        }
    }
    out
}


/// The calibration file of a fit: the camera, and the record of how it was fitted (span,
/// detections, residuals, standard errors, held-out errors per lens family, coverage, the
/// direction-error bound by zenith band, warnings).
pub fn calibration_record(name: &str, fit: &Fit, dets: &[Detection]) -> crate::config::CalibrationFile {
    let mut cal = crate::config::CalibrationFile::from_camera(name, &fit.camera);
    let (t0, t1) = (dets.first().map(|d| d.time), dets.last().map(|d| d.time));
    cal.fit = Some(crate::config::FitRecord {
        fitted_utc: crate::io::fmt_time(&chrono::Utc::now()),
        span_start_utc: t0.map(|t| crate::io::fmt_time(&t)).unwrap_or_default(),
        span_end_utc: t1.map(|t| crate::io::fmt_time(&t)).unwrap_or_default(),
        detections: dets.len(),
        rms_deg: fit.rms_deg,
        max_deg: fit.max_deg,
        rms_px: fit.rms_px,
        max_px: fit.max_px,
        std_errors: fit.params.iter().map(|(n, _, se)| (n.clone(), *se)).collect(),
        lens_cv_rms_px: fit.scores.iter().map(|s| (s.family.name().to_string(), s.cv_rms_px)).collect(),
        detections_zenith_deg: Some([fit.coverage.zenith_min_deg, fit.coverage.zenith_max_deg]),
        detections_azimuth_span_deg: Some(fit.coverage.azimuth_span_deg),
        direction_bound_deg: fit.bounds.iter().map(|b| [b.zenith_from_deg, b.zenith_to_deg, b.bound_deg]).collect(),
        warnings: fit.warnings.clone(),
        held: fit.held.clone(),
    });
    cal
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::camera::{Camera, Orientation, Projection};
    use crate::segment::{Reference, SegmentParams, lib_index};

    /// The same equisolid camera (rim at 0.95 of the half side) at a square size.
    fn camera(size_px: u32) -> Camera {
        let half = size_px as f64 / 2.0;
        let f = 0.95 * half / Projection::Equisolid.radial(std::f64::consts::FRAC_PI_2);
        Camera::new(size_px, size_px, half - 0.5, half - 0.5, f, Projection::Equisolid, std::f64::consts::FRAC_PI_2, Orientation { yaw_rad: 0.3, pitch_rad: 0.0, roll_rad: 0.0 })
    }

    /// A clear sky as a function of direction only (so every resolution sees the same sky): blue
    /// rising toward the sun into a glare that clips, with a noise (a hash of the direction, so
    /// independent from pixel to pixel at any resolution) that leaves a few of the glare's pixels
    /// just under the saturation level, as the JPEG noise of a clipped sky does.
    fn frame(cam: &Camera, sun: [f64; 3], frame_no: u32) -> image::RgbImage {
        let mask = cam.sky_mask(std::f64::consts::FRAC_PI_2, None);
        let w = cam.width_px as usize;
        image::RgbImage::from_fn(cam.width_px, cam.height_px, |x, y| {
            let i = y as usize * w + x as usize;
            if !mask.sky[i] {
                return image::Rgb([0, 0, 0]);
            }
            let d = direction_enu(mask.zenith_rad[i] as f64, mask.azimuth_rad[i] as f64);
            let gamma_deg = (d[0] * sun[0] + d[1] * sun[1] + d[2] * sun[2]).clamp(-1.0, 1.0).acos().to_degrees();
            let key = ((d[0] * 1e6) as i64 as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15) ^ ((d[1] * 1e6) as i64 as u64).rotate_left(21) ^ u64::from(frame_no) << 40;
            let u = crate::rng::unit(crate::rng::hash64(key));
            let b = (190.0 + 140.0 * (-gamma_deg / 15.0).exp()).min(255.0) - 6.0 * u * u * u;
            image::Rgb([(0.62 * b) as u8, (0.8 * b) as u8, b as u8])
        })
    }

    /// The clear-sky library of the same sky seen at 512² and at 1024² (and 256²): as many bins
    /// marked clipped around the sun, and the bins learnt there as bright. With every second pixel
    /// read at any resolution, the 1024² library held 4 times the samples per bin, so bins whose
    /// pixels mostly clip reached the 3 unclipped samples a bin needs and were learnt from their
    /// darker few: fewer clipped bins and a brighter circumsolar library, which the forecast of a
    /// camera of higher resolution then carried.
    #[test]
    fn the_library_does_not_depend_on_the_resolution() {
        let params = SegmentParams::default();
        assert!(params.library_keeps_clipped);
        let sun_at = |az_deg: f64| direction_enu(50f64.to_radians(), az_deg.to_radians());
        let library = |size_px: u32| -> Reference {
            let cam = camera(size_px);
            let t0 = "2026-06-14T10:00:00Z".parse::<DateTime<Utc>>().unwrap();
            let (mut frames, mut dets) = (vec![], vec![]);
            for k in 0..8 {
                let t = t0 + chrono::Duration::minutes(5 * k);
                let sun = sun_at(120.0 + 2.0 * k as f64);
                frames.push((t, frame(&cam, sun, k as u32)));
                dets.push(Detection::new(t, (0.0, 0.0), sun));
            }
            clear_sky_reference_of(&frames, &cam, &dets, &params)
        };
        let (lo, one, two) = (library(256), library(512), library(1024));
        // The circumsolar bins (sun angle 4–30°): marked clipped, and the mean learnt brightness.
        let glare = |r: &Reference| {
            let marks: Vec<(usize, Option<f32>)> = (0..45)
                .flat_map(|zi| (2..15).map(move |gi| lib_index(2.0 * zi as f32 + 1.0, 2.0 * gi as f32 + 1.0)))
                .map(|b| (b, r.clear_brightness(b)))
                .collect();
            marks
        };
        let (g1, g2, g0) = (glare(&one), glare(&two), glare(&lo));
        let (c1, c2, c0) = (one.clipped_bins(), two.clipped_bins(), lo.clipped_bins());
        // Bins learnt at both resolutions, their brightness.
        let shared: Vec<(f32, f32)> = g1.iter().zip(&g2).filter_map(|((_, a), (_, b))| Some(((*a)?, (*b)?))).collect();
        let mean_diff = shared.iter().map(|(a, b)| b - a).sum::<f32>() / shared.len().max(1) as f32;
        let learnt = |g: &[(usize, Option<f32>)]| g.iter().filter(|(_, v)| v.is_some()).count();
        eprintln!(
            "clipped bins 256²/512²/1024²: {c0}/{c1}/{c2}; circumsolar bins learnt {}/{}/{}; 1024² minus 512² brightness in {} shared bins {mean_diff:+.2}",
            learnt(&g0),
            learnt(&g1),
            learnt(&g2),
            shared.len()
        );
        assert!(c1 >= 20, "the sky must clip around the sun for this test to mean anything: {c1} clipped bins");
        // A bin's 3 unclipped samples out of a few per cent of its pixels are a draw: ±20 % is the
        // sampling's. With every second pixel read at every size: 36/25/0 clipped bins, 198/209/234
        // learnt.
        for (size, c) in [(256, c0), (1024, c2)] {
            assert!((c as f64 - c1 as f64).abs() <= 0.2 * c1 as f64, "{size}²: {c} clipped bins against {c1} at 512²");
        }
        for (size, g) in [(256, &g0), (1024, &g2)] {
            assert!((learnt(g) as f64 - learnt(&g1) as f64).abs() <= 0.05 * learnt(&g1) as f64, "{size}²: {} circumsolar bins learnt against {} at 512²", learnt(g), learnt(&g1));
        }
        assert!(mean_diff.abs() < 1.0, "1024² circumsolar library {mean_diff:+.2} brighter than 512²'s");
        assert_eq!((library_sample_step(&camera(256)), library_sample_step(&camera(512)), library_sample_step(&camera(1024))), (1, 2, 4));
    }
}
