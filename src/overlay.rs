//! Pictures for people: a frame with its cloud classes, and the shadow map over the plant.

use image::{Rgb, RgbImage};

use crate::forecast::sun_ray_plane_point;
use crate::nowcast::{Nowcast, Nowcaster};
use crate::segment::{Class, segment_image};

/// Class tints (own palette): thin cloud amber, thick cloud violet.
pub const THIN_TINT: [u8; 3] = [255, 196, 40];
/// Thick cloud tint.
pub const THICK_TINT: [u8; 3] = [176, 60, 200];

fn blend(p: &mut Rgb<u8>, c: [u8; 3], a: f32) {
    for (v, ck) in p.0.iter_mut().zip(c) {
        *v = (*v as f32 * (1.0 - a) + ck as f32 * a).round() as u8;
    }
}

/// Draw a line (Bresenham).
pub fn line(img: &mut RgbImage, a: (i64, i64), b: (i64, i64), c: [u8; 3]) {
    let (mut x, mut y) = a;
    let (dx, dy) = ((b.0 - a.0).abs(), -(b.1 - a.1).abs());
    let (sx, sy) = (if a.0 < b.0 { 1 } else { -1 }, if a.1 < b.1 { 1 } else { -1 });
    let mut err = dx + dy;
    loop {
        if x >= 0 && y >= 0 && (x as u32) < img.width() && (y as u32) < img.height() {
            img.put_pixel(x as u32, y as u32, Rgb(c));
        }
        if (x, y) == b {
            break;
        }
        let e2 = 2 * err;
        if e2 >= dy {
            err += dy;
            x += sx;
        }
        if e2 <= dx {
            err += dx;
            y += sy;
        }
    }
}

/// The frame with its classes tinted.
pub fn class_overlay(frame: &RgbImage, classes: &image::GrayImage) -> RgbImage {
    let mut out = frame.clone();
    for (p, c) in out.pixels_mut().zip(classes.pixels()) {
        match Class::from_u8(c.0[0]) {
            Class::Thin => blend(p, THIN_TINT, 0.45),
            Class::Thick => blend(p, THICK_TINT, 0.45),
            _ => {}
        }
    }
    out
}

/// Preview colours of the classes (own palette), by class value 0–3: unknown black, clear sky
/// blue, thin cloud light grey, thick cloud dark grey.
pub const PREVIEW_COLOURS: [[u8; 3]; 4] = [[0, 0, 0], [70, 130, 220], [205, 205, 205], [90, 90, 90]];

/// A class mask (0 unknown, 1 clear, 2 thin, 3 thick) in [`PREVIEW_COLOURS`] for a person to look at;
/// any other value is shown magenta.
pub fn class_preview(classes: &image::GrayImage) -> RgbImage {
    RgbImage::from_fn(classes.width(), classes.height(), |x, y| {
        Rgb(PREVIEW_COLOURS.get(usize::from(classes.get_pixel(x, y).0[0])).copied().unwrap_or([255, 0, 255]))
    })
}

/// The shadow map: ground around the plant seen from above (north up), sunlit ground pale, thin-cloud
/// shade amber, thick-cloud shadow dark, unknown grey; block outlines white; the motion arrow shows
/// where the clouds go in 10 minutes.
pub fn shadow_map(nc: &Nowcast, nowcaster: &Nowcaster, size_px: u32) -> RgbImage {
    let plant = nowcaster.plant();
    let site = nowcaster.site();
    let (mut x0, mut y0, mut x1, mut y1) = (f64::MAX, f64::MAX, f64::MIN, f64::MIN);
    for b in &plant.blocks {
        for v in &b.polygon_m {
            x0 = x0.min(v[0]);
            y0 = y0.min(v[1]);
            x1 = x1.max(v[0]);
            y1 = y1.max(v[1]);
        }
    }
    let margin = 600.0;
    let (cx, cy) = ((x0 + x1) / 2.0, (y0 + y1) / 2.0);
    let half = ((x1 - x0).max(y1 - y0) / 2.0 + margin).max(500.0);
    let scale = size_px as f64 / (2.0 * half);
    let to_px = |p: [f64; 2]| (((p[0] - cx + half) * scale) as i64, ((cy + half - p[1]) * scale) as i64);
    let cam = site.file.camera.position_m;
    let (z, a) = (nc.sun.apparent_zenith_rad, nc.sun.azimuth_rad);
    let mut img = RgbImage::new(size_px, size_px);
    for (px, py, p) in img.enumerate_pixels_mut() {
        let g = [cx - half + (px as f64 + 0.5) / scale, cy + half - (py as f64 + 0.5) / scale];
        let q = sun_ray_plane_point(g, nc.cbh_m, cam, z, a);
        let (i, j) = nc.map.grid.to_cell(q);
        *p = Rgb(match nc.map.class_at(i, j) {
            Some(Class::Clear) => [236, 226, 180],
            Some(Class::Thin) => [200, 150, 60],
            Some(Class::Thick) => [70, 70, 90],
            _ => [128, 128, 128],
        });
    }
    for b in &plant.blocks {
        let n = b.polygon_m.len();
        for k in 0..n {
            line(&mut img, to_px(b.polygon_m[k]), to_px(b.polygon_m[(k + 1) % n]), [255, 255, 255]);
        }
    }
    if let Some(m) = nc.motion {
        let c = plant.centre_m();
        let tip = [c[0] + m.v_mps[0] * 600.0, c[1] + m.v_mps[1] * 600.0];
        let (a0, a1) = (to_px(c), to_px(tip));
        for d in -1..=1 {
            line(&mut img, (a0.0 + d, a0.1), (a1.0 + d, a1.1), [20, 120, 255]);
        }
        let ang = ((a1.1 - a0.1) as f64).atan2((a1.0 - a0.0) as f64);
        for s in [2.6f64, -2.6] {
            let h = (a1.0 + (10.0 * (ang + s).cos()) as i64, a1.1 + (10.0 * (ang + s).sin()) as i64);
            line(&mut img, a1, h, [20, 120, 255]);
        }
    }
    img
}

/// Frame with classes beside the shadow map, as PNG bytes.
pub fn overlay_png(frame: &RgbImage, nc: &Nowcast, nowcaster: &Nowcaster) -> Vec<u8> {
    let site = nowcaster.site();
    let geom = nowcaster.image_geometry_for(frame.width());
    let sd = nc.sun.direction_enu();
    let seg = segment_image(frame, geom, Some([sd[0] as f32, sd[1] as f32, sd[2] as f32]), &site.file.segment, nowcaster.reference());
    let left = class_overlay(frame, &seg.classes);
    let h = left.height();
    let right = shadow_map(nc, nowcaster, h);
    let mut out = RgbImage::new(left.width() + right.width(), h);
    image::imageops::replace(&mut out, &left, 0, 0);
    image::imageops::replace(&mut out, &right, left.width() as i64, 0);
    crate::io::encode_png_rgb(&out)
}
