//! What calibration reads from the frames: the sun's clipped disc (its centroid and blob area, and
//! the bloom screening that weighs detections by how far their glare has spread) and the image
//! circle (found, then refined from the lens edge), and a camera guessed from the image alone.

use nalgebra::{DMatrix, DVector};

use super::Detection;
use super::clip::ClipTest;
use crate::robust::MAD_TO_SIGMA;
use crate::camera::{Camera, Orientation, Projection};

/// Find the sun disk in a frame, its clipped core judged by `clip`. `radius_px` is the image
/// circle's radius. Returns (column, row, pixels used for the centroid); `None` also when the
/// clipped core touches the frame's edge (cut by the frame, its centroid is not the sun's).
pub fn detect_sun(img: &image::RgbImage, radius_px: f64, clip: ClipTest) -> Option<(f64, f64, usize)> {
    let (cx, cy, n) = find_sun_blob(img, clip, clip.core_level(), 3, 0.05 * radius_px)?;
    let r = 0.05 * radius_px;
    // Saturated pixels far from the sun (other than its blooming column) make the detection
    // ambiguous.
    let elsewhere = img
        .enumerate_pixels()
        .filter(|(x, y, p)| {
            clip.clipped(p.0) && (*x as f64 - cx).abs() > 2.0 && ((*x as f64 - cx).powi(2) + (*y as f64 - cy).powi(2)) > 4.0 * r * r
        })
        .count();
    if n < 3 || (n as f64) > 0.02 * radius_px * radius_px || elsewhere as f64 > 0.25 * n as f64 {
        return None;
    }
    // Centroid over the rows at least 3 px wide within the neighbourhood (a blooming streak is
    // one or two pixels wide).
    let (w, h) = img.dimensions();
    let rr = 2.0 * r;
    let (y0, y1) = (((cy - rr).floor().max(0.0)) as u32, ((cy + rr).ceil() as u32).min(h - 1));
    let (x0, x1) = (((cx - rr).floor().max(0.0)) as u32, ((cx + rr).ceil() as u32).min(w - 1));
    let (mut sx, mut sy, mut k) = (0.0, 0.0, 0usize);
    let mut on_border = false;
    for y in y0..=y1 {
        let row: Vec<u32> = (x0..=x1).filter(|&x| clip.clipped(img.get_pixel(x, y).0)).collect();
        if row.len() >= 3 {
            for x in &row {
                sx += *x as f64;
                sy += y as f64;
                k += 1;
                on_border |= *x == 0 || y == 0 || *x == w - 1 || y == h - 1;
            }
        }
    }
    // A clipped disc that reaches the frame's edge is cut by it (a sensor that clips the image
    // circle): its centroid leans away from the edge, or it is the glare of a sun outside the
    // frame altogether. Such a frame gives no detection.
    (k >= 3 && !on_border).then(|| (sx / k as f64, sy / k as f64, k))
}

/// Area \[px\] of the 4-connected clipped blob (the sun's core by `clip`) nearest to (x, y),
/// searched within `reach_px`; 0 when there is none.
pub fn saturated_blob_area(img: &image::RgbImage, x: f64, y: f64, reach_px: f64, clip: ClipTest) -> usize {
    let (w, h) = img.dimensions();
    let sat = |x: i64, y: i64| x >= 0 && y >= 0 && x < w as i64 && y < h as i64 && clip.clipped(img.get_pixel(x as u32, y as u32).0);
    let (xi, yi) = (x.round() as i64, y.round() as i64);
    let reach = reach_px.ceil() as i64;
    let mut seed = None;
    'find: for d in 0..=reach {
        for dy in -d..=d {
            for dx in -d..=d {
                if (dx.abs() == d || dy.abs() == d) && sat(xi + dx, yi + dy) {
                    seed = Some((xi + dx, yi + dy));
                    break 'find;
                }
            }
        }
    }
    let Some(seed) = seed else { return 0 };
    let mut seen = std::collections::HashSet::new();
    let mut stack = vec![seed];
    seen.insert(seed);
    while let Some((x, y)) = stack.pop() {
        for (dx, dy) in [(1, 0), (-1, 0), (0, 1), (0, -1)] {
            let q = (x + dx, y + dy);
            if sat(q.0, q.1) && seen.insert(q) {
                stack.push(q);
            }
        }
    }
    seen.len()
}

/// The bloom screening of step 2: sets each detection's weight from its blob area and drops the
/// ones whose blob is more than four times the bare disc's. Detections of unknown area keep weight 1.
pub fn screen_bloom(dets: &mut Vec<Detection>) {
    let mut areas: Vec<f64> = dets.iter().filter(|d| d.blob_px > 0).map(|d| d.blob_px as f64).collect();
    if areas.len() < 5 {
        return;
    }
    areas.sort_by(f64::total_cmp);
    let reference = areas[(0.2 * (areas.len() - 1) as f64).round() as usize].max(1.0);
    dets.retain(|d| d.blob_px == 0 || (d.blob_px as f64) <= 4.0 * reference);
    for d in dets.iter_mut() {
        if d.blob_px > 0 {
            let excess = (d.blob_px as f64 / reference - 1.0).max(0.0);
            d.weight = 1.0 / (1.0 + (excess / 0.5).powi(2));
        }
    }
}

/// Refine an image circle from the lens edge: along 360 rays from the rough centre, the outermost
/// radius where any channel is still above a dark level (12), with the next 3 px at or below it; a
/// least-squares circle (Kåsa 1976) through those edge points, refitted without points more than
/// 2 px off. The rough circle (the area of pixels above 40) is biased where a dark ground or a
/// vignetted rim lies inside the lens field; the edge is not. `None` with too few edge points
/// (a circle cut by the frame on most sides).
pub fn refine_image_circle(img: &image::RgbImage, rough: ImageCircle) -> Option<ImageCircle> {
    let (w, h) = img.dimensions();
    let level = |x: f64, y: f64| -> Option<u8> {
        let (xi, yi) = (x.round() as i64, y.round() as i64);
        (xi >= 0 && yi >= 0 && xi < w as i64 && yi < h as i64).then(|| *img.get_pixel(xi as u32, yi as u32).0.iter().max().unwrap_or(&0))
    };
    const DARK: u8 = 12;
    let mut pts = vec![];
    for k in 0..360 {
        let a = (k as f64).to_radians();
        let (dx, dy) = (a.cos(), a.sin());
        let mut r = 1.4 * rough.radius_px;
        let mut edge = None;
        let mut cut = false;
        while r > 0.6 * rough.radius_px {
            let (x, y) = (rough.cx_px + r * dx, rough.cy_px + r * dy);
            match level(x, y) {
                None => {}
                Some(v) if v > DARK => {
                    // The first lit pixel from outside: the edge, unless the frame cuts the circle.
                    let beyond = (1..=3).all(|d| level(x + d as f64 * dx, y + d as f64 * dy).map(|v| v <= DARK).unwrap_or(false));
                    if beyond {
                        edge = Some((x + 0.5 * dx, y + 0.5 * dy));
                    } else {
                        cut = true;
                    }
                    break;
                }
                Some(_) => {}
            }
            r -= 0.5;
        }
        if let (Some(p), false) = (edge, cut) {
            pts.push(p);
        }
    }
    let fit = |pts: &[(f64, f64)]| if pts.len() < 60 { None } else { kasa_circle(pts) };
    let mut first = fit(&pts)?;
    // Lit structure beyond the rim (a time stamp or logo in the frame's corner) gives edge points
    // far off the circle on a few rays, which would pull the first fit; then the first fit is the
    // outlier-resistant one.
    if pts.iter().any(|(x, y)| ((x - first.cx_px).hypot(y - first.cy_px) - first.radius_px).abs() > GROSS_EDGE_OUTLIER_PX) {
        first = robust_circle(&pts, 60).unwrap_or(first);
    }
    let kept: Vec<(f64, f64)> = pts.into_iter().filter(|(x, y)| ((x - first.cx_px).hypot(y - first.cy_px) - first.radius_px).abs() <= 2.0).collect();
    fit(&kept)
}

/// An edge point this far off the first circle \[px\] is not the lens edge (see
/// [`refine_image_circle`]).
const GROSS_EDGE_OUTLIER_PX: f64 = 10.0;

/// The least-squares circle through points by the linear method of Kåsa (1976):
/// `x² + y² + D x + E y + F = 0`. `None` when the system is degenerate.
fn kasa_circle(pts: &[(f64, f64)]) -> Option<ImageCircle> {
    let mut a = DMatrix::zeros(pts.len(), 3);
    let mut b = DVector::zeros(pts.len());
    for (i, (x, y)) in pts.iter().enumerate() {
        a[(i, 0)] = *x;
        a[(i, 1)] = *y;
        a[(i, 2)] = 1.0;
        b[i] = -(x * x + y * y);
    }
    let sol = a.svd(true, true).solve(&b, 1e-12).ok()?;
    let (cx, cy) = (-sol[0] / 2.0, -sol[1] / 2.0);
    let r2 = cx * cx + cy * cy - sol[2];
    (r2 > 0.0).then(|| ImageCircle { cx_px: cx, cy_px: cy, radius_px: r2.sqrt() })
}

/// Kåsa circle refitted without outliers: five passes, each dropping the points whose distance
/// from the circle exceeds 2.5 robust standard deviations (1.4826 × the median absolute residual,
/// plus 0.5 px for the pixel grid). `None` with fewer than `min_pts` points left.
fn robust_circle(pts: &[(f64, f64)], min_pts: usize) -> Option<ImageCircle> {
    let mut kept: Vec<(f64, f64)> = pts.to_vec();
    let mut c = kasa_circle(&kept)?;
    for _ in 0..5 {
        let res = |p: &(f64, f64)| ((p.0 - c.cx_px).hypot(p.1 - c.cy_px) - c.radius_px).abs();
        let mut r: Vec<f64> = kept.iter().map(res).collect();
        r.sort_by(f64::total_cmp);
        let sigma = MAD_TO_SIGMA * r[r.len() / 2] + 0.5;
        kept = pts.iter().copied().filter(|p| res(p) < 2.5 * sigma).collect();
        if kept.len() < min_pts {
            return None;
        }
        c = kasa_circle(&kept)?;
    }
    Some(c)
}

/// Fewest edge points (of 360 rays) for a sky-edge circle.
const SKY_EDGE_MIN_POINTS: usize = 60;

/// The image circle as the edge of the imaged sky: along 360 rays from the rough centre, walking
/// outward in 1 px steps from 0.8 to 1.2 rough radii, the first pixel where the brightest channel
/// falls below 0.4 × the median of the 8 pixels before it (and the next pixel does too; that
/// median at least 20), i.e. the drop from sky to the dark lens rim. The circle is
/// [`robust_circle`] through those points, and the rays are cast once more from its centre. A
/// cloud edge, a mast or a horizon building gives a drop inside the circle on a few rays only,
/// and the outlier passes remove them. Unlike the area of the lit pixels
/// ([`fit_image_circle`]), the edge is not moved by a dark overcast inside the circle or a lit
/// lens rim and flare outside it; unlike the outermost lit pixel ([`refine_image_circle`]), it
/// holds when the frame cuts the circle or glow lies beyond it. The levels are own choices, set
/// by how little the circle moves between the frames of one fixed camera. `None` with fewer than
/// 60 edge points.
pub fn sky_edge_circle(img: &image::RgbImage, rough: ImageCircle) -> Option<ImageCircle> {
    let (w, h) = img.dimensions();
    let level = |x: f64, y: f64| -> Option<f64> {
        let (xi, yi) = (x.round() as i64, y.round() as i64);
        (xi >= 0 && yi >= 0 && xi < w as i64 && yi < h as i64).then(|| *img.get_pixel(xi as u32, yi as u32).0.iter().max().unwrap_or(&0) as f64)
    };
    const RUN: usize = 8;
    let mut c = rough;
    for _ in 0..2 {
        let mut pts = vec![];
        for k in 0..360 {
            let a = (k as f64).to_radians();
            let (dx, dy) = (a.cos(), a.sin());
            let steps = (0.4 * c.radius_px).floor() as usize;
            let at = |j: usize| {
                let r = 0.8 * c.radius_px + j as f64;
                level(c.cx_px + r * dx, c.cy_px + r * dy)
            };
            let mut run: Vec<f64> = Vec::with_capacity(RUN);
            for j in 0..steps.saturating_sub(1) {
                let Some(v) = at(j) else { break };
                if run.len() == RUN {
                    let mut sorted = run.clone();
                    sorted.sort_by(f64::total_cmp);
                    let median = 0.5 * (sorted[RUN / 2 - 1] + sorted[RUN / 2]);
                    if median >= 20.0 && v < 0.4 * median && at(j + 1).is_some_and(|n| n < 0.4 * median) {
                        let r = 0.8 * c.radius_px + j as f64 - 0.5;
                        pts.push((c.cx_px + r * dx, c.cy_px + r * dy));
                        break;
                    }
                    run.remove(0);
                }
                run.push(v);
            }
        }
        if pts.len() < SKY_EDGE_MIN_POINTS {
            return None;
        }
        c = robust_circle(&pts, SKY_EDGE_MIN_POINTS)?;
    }
    Some(c)
}

/// The image circle found in an image: centre and radius \[px\].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ImageCircle {
    /// Centre column.
    pub cx_px: f64,
    /// Centre row.
    pub cy_px: f64,
    /// Radius.
    pub radius_px: f64,
}

/// Find the image circle of a fisheye frame: the pixels brighter than a dark level (max channel
/// above 40) give the centre (their centroid) and the radius (from their area).
pub fn fit_image_circle(img: &image::RgbImage) -> Option<ImageCircle> {
    let (mut sx, mut sy, mut n) = (0.0, 0.0, 0.0);
    for (x, y, p) in img.enumerate_pixels() {
        if p.0.iter().copied().max().unwrap_or(0) > 40 {
            sx += x as f64;
            sy += y as f64;
            n += 1.0;
        }
    }
    (n > 100.0).then(|| ImageCircle { cx_px: sx / n, cy_px: sy / n, radius_px: (n / std::f64::consts::PI).sqrt() })
}

/// Find the sun in an image: among the blobs of saturated pixels (`clip`'s value ≥ `level`, at least
/// `min_px` pixels), the one whose neighbourhood (`radius_px`) holds the most saturated pixels — the
/// sun with its glare, rather than one bright cloud — and the centroid of the saturated pixels in
/// that neighbourhood. Returns (column, row, saturated pixels counted).
pub fn find_sun_blob(img: &image::RgbImage, clip: ClipTest, level: u8, min_px: usize, radius_px: f64) -> Option<(f64, f64, usize)> {
    let (w, h) = img.dimensions();
    let sat: Vec<bool> = img.pixels().map(|p| clip.value(p.0) >= level).collect();
    let mut seen = vec![false; sat.len()];
    let mut seeds: Vec<(f64, f64)> = vec![];
    let mut stack = vec![];
    for start in 0..sat.len() {
        if !sat[start] || seen[start] {
            continue;
        }
        let (mut sx, mut sy, mut n) = (0.0, 0.0, 0usize);
        stack.push(start);
        seen[start] = true;
        while let Some(i) = stack.pop() {
            let (x, y) = ((i as u32 % w) as i64, (i as u32 / w) as i64);
            sx += x as f64;
            sy += y as f64;
            n += 1;
            for (dx, dy) in [(1, 0), (-1, 0), (0, 1), (0, -1)] {
                let (nx, ny) = (x + dx, y + dy);
                if nx >= 0 && ny >= 0 && nx < w as i64 && ny < h as i64 {
                    let j = (ny as u32 * w + nx as u32) as usize;
                    if sat[j] && !seen[j] {
                        seen[j] = true;
                        stack.push(j);
                    }
                }
            }
        }
        if n >= min_px {
            seeds.push((sx / n as f64, sy / n as f64));
        }
    }
    if seeds.is_empty() {
        return None;
    }
    let sat_pts: Vec<(f64, f64)> =
        sat.iter().enumerate().filter(|(_, s)| **s).map(|(i, _)| ((i as u32 % w) as f64, (i as u32 / w) as f64)).collect();
    let r2 = radius_px * radius_px;
    let near = |c: (f64, f64)| sat_pts.iter().filter(move |p| (p.0 - c.0).powi(2) + (p.1 - c.1).powi(2) <= r2);
    let best = seeds.iter().max_by_key(|c| near(**c).count())?;
    let (mut sx, mut sy, mut n) = (0.0, 0.0, 0usize);
    for p in near(*best) {
        sx += p.0;
        sy += p.1;
        n += 1;
    }
    Some((sx / n as f64, sy / n as f64, n))
}

/// Geometry for an image without calibration or time: the image circle (the sky's edge,
/// [`sky_edge_circle`], else the area of the lit pixels) taken as the 90° field of a level
/// equidistant lens, and the sun found in the image.
pub fn geometry_free(img: &image::RgbImage) -> Option<(Camera, Option<[f32; 3]>)> {
    let rough = fit_image_circle(img)?;
    let c = sky_edge_circle(img, rough).unwrap_or(rough);
    let cam = Camera::new(
        img.width(),
        img.height(),
        c.cx_px,
        c.cy_px,
        c.radius_px / std::f64::consts::FRAC_PI_2,
        Projection::Equidistant,
        std::f64::consts::FRAC_PI_2,
        Orientation::default(),
    );
    let sun = find_sun_blob(img, ClipTest::Channels, 245, 5, 0.12 * c.radius_px)
        .and_then(|(x, y, _)| cam.unproject_enu(x, y))
        .map(|d| [d[0] as f32, d[1] as f32, d[2] as f32]);
    Some((cam, sun))
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::Utc;

    #[test]
    fn streak_does_not_pull_the_centroid() {
        let mut img = image::RgbImage::from_pixel(200, 200, image::Rgb([60, 90, 160]));
        for y in 0..200u32 {
            for x in 0..200u32 {
                let r = ((x as f64 - 120.0).powi(2) + (y as f64 - 80.0).powi(2)).sqrt();
                if r < 4.0 {
                    img.put_pixel(x, y, image::Rgb([255, 255, 255]));
                }
            }
        }
        // A one-pixel saturated streak downward from the sun.
        for y in 80..110u32 {
            img.put_pixel(120, y, image::Rgb([255, 255, 255]));
        }
        let (x, y, _) = detect_sun(&img, 100.0, ClipTest::Channels).unwrap();
        assert!((x - 120.0).abs() < 0.2 && (y - 80.0).abs() < 0.2, "{x},{y}");
        // The blob: the disc (45 lattice points with x² + y² < 16) and the 26 streak pixels below it.
        assert_eq!(saturated_blob_area(&img, x, y, 5.0, ClipTest::Channels), 45 + 26);
    }

    /// A sun disc (radius 4 px) with a wider glare, on a blue sky: found where the frame holds it,
    /// refused where the frame's edge cuts its clipped core (its centroid would lean away from the
    /// edge), or where only the glare of a sun beyond the edge reaches into the frame.
    #[test]
    fn a_sun_cut_by_the_frame_is_not_detected() {
        let frame = |sx: f64, sy: f64| {
            image::RgbImage::from_fn(200, 150, |x, y| {
                let r = (x as f64 - sx).hypot(y as f64 - sy);
                if r < 4.0 {
                    image::Rgb([255, 255, 255])
                } else {
                    let g = (250.0 - 12.0 * (r - 4.0)).max(0.0);
                    image::Rgb([(60.0 + g).min(249.0) as u8, (90.0 + g).min(249.0) as u8, (160.0 + g).min(249.0) as u8])
                }
            })
        };
        let (x, y, _) = detect_sun(&frame(100.0, 8.0), 100.0, ClipTest::Channels).expect("a whole disc near the edge");
        assert!((x - 100.0).abs() < 0.2 && (y - 8.0).abs() < 0.2, "{x},{y}");
        assert_eq!(detect_sun(&frame(100.0, 1.5), 100.0, ClipTest::Channels), None, "the top edge cuts the disc");
        assert_eq!(detect_sun(&frame(198.0, 70.0), 100.0, ClipTest::Channels), None, "the right edge cuts the disc");
        assert_eq!(detect_sun(&frame(100.0, 149.0), 100.0, ClipTest::Channels), None, "the bottom edge cuts the disc");
    }

    /// A sky disc of radius 240 px centred in a 512² frame, cut to 4:3 (512×416) and to 16:9
    /// (512×288) as sensors that clip the image circle do: the lens edge is still found on the
    /// rays the frame leaves, and the circle from it, where the area of the lit pixels is far off.
    #[test]
    fn image_circle_of_a_cut_circle() {
        let (cx, cy, radius) = (255.3, 257.6, 240.0);
        let full = image::RgbImage::from_fn(512, 512, |x, y| {
            let r = (x as f64 - cx).hypot(y as f64 - cy);
            if r < radius {
                let v = (170.0 - 60.0 * r / radius) as u8;
                image::Rgb([v / 2, v / 2 + v / 4, v])
            } else {
                image::Rgb([3, 3, 3])
            }
        });
        for cut in [48u32, 112] {
            let img = image::imageops::crop_imm(&full, 0, cut, 512, 512 - 2 * cut).to_image();
            let rough = fit_image_circle(&img).unwrap();
            assert!((rough.radius_px - radius).abs() > 5.0, "the lit area is biased on a cut circle: {rough:?}");
            let c = refine_image_circle(&img, rough).expect("the edge on the rays the frame leaves");
            let want_cy = cy - cut as f64;
            assert!((c.cx_px - cx).abs() < 0.7 && (c.cy_px - want_cy).abs() < 0.7 && (c.radius_px - radius).abs() < 0.7, "cut {cut}: {c:?}");
            let e = sky_edge_circle(&img, rough).expect("the sky's edge on the rays the frame leaves");
            assert!((e.cx_px - cx).abs() < 0.7 && (e.cy_px - want_cy).abs() < 0.7 && (e.radius_px - radius).abs() < 0.7, "cut {cut}: {e:?}");
        }
    }

    fn det(blob: usize) -> Detection {
        Detection { blob_px: blob, ..Detection::new(Utc::now(), (0.0, 0.0), [0.0, 0.0, 1.0]) }
    }

    #[test]
    fn bloom_screening_drops_doubled_blobs_and_weights_growth() {
        let mut d: Vec<Detection> = [400, 400, 410, 420, 430, 500, 600, 790, 1700, 5000].into_iter().map(det).collect();
        screen_bloom(&mut d);
        // Reference: the 20th percentile of the areas, 410; four times that is 1640.
        assert_eq!(d.len(), 8);
        assert!((d[0].weight - 1.0).abs() < 1e-12);
        let w600 = d.iter().find(|x| x.blob_px == 600).unwrap().weight;
        let excess: f64 = 600.0 / 410.0 - 1.0;
        assert!((w600 - 1.0 / (1.0 + (excess / 0.5).powi(2))).abs() < 1e-12);
    }

    /// A sky disc (radius 100 px) with a dark overcast patch inside its edge, a lit lens rim
    /// beyond a dark gap, glow outside and the frame cutting the top: the sky's edge gives the
    /// disc, where the area of the lit pixels does not.
    #[test]
    fn sky_edge_circle_ignores_rim_patch_and_frame() {
        let (cx, cy, radius) = (160.0, 96.0, 100.0);
        let mut img = image::RgbImage::new(320, 200);
        for (x, y, p) in img.enumerate_pixels_mut() {
            let (dx, dy) = (x as f64 - cx, y as f64 - cy);
            let r = dx.hypot(dy);
            let v = if r < radius {
                // Darker toward the horizon, and a dark patch on the left within 15 px of the edge.
                if dx < -90.0 && r > radius - 15.0 { 30 } else { (140.0 - 50.0 * r / radius) as u8 }
            } else if r < radius + 3.0 {
                8
            } else if r < radius + 7.0 && dx > 0.0 {
                120 // the lens rim, lit on the right
            } else {
                15 // glow
            };
            *p = image::Rgb([v / 2, v / 2 + v / 4, v]);
        }
        let rough = fit_image_circle(&img).unwrap();
        assert!((rough.cx_px - cx).abs() > 2.0 || (rough.radius_px - radius).abs() > 2.0, "the area fit is biased here: {rough:?}");
        let c = sky_edge_circle(&img, rough).unwrap();
        assert!((c.cx_px - cx).abs() < 0.6 && (c.cy_px - cy).abs() < 0.6 && (c.radius_px - radius).abs() < 0.6, "{c:?}");
    }

    #[test]
    fn sun_blob_and_circle_found() {
        let mut img = image::RgbImage::new(100, 100);
        for (x, y, p) in img.enumerate_pixels_mut() {
            let r = ((x as f64 - 50.0).powi(2) + (y as f64 - 48.0).powi(2)).sqrt();
            if r < 40.0 {
                *p = image::Rgb([80, 120, 200]);
            }
            if ((x as f64 - 60.0).powi(2) + (y as f64 - 40.0).powi(2)).sqrt() < 3.0 {
                *p = image::Rgb([255, 255, 255]);
            }
        }
        let c = fit_image_circle(&img).unwrap();
        assert!((c.cx_px - 50.0).abs() < 0.5 && (c.cy_px - 48.0).abs() < 0.5 && (c.radius_px - 40.0).abs() < 1.0);
        let (sx, sy, n) = find_sun_blob(&img, ClipTest::Channels, 250, 5, 10.0).unwrap();
        assert!((sx - 60.0).abs() < 0.01 && (sy - 40.0).abs() < 0.01 && n > 20);
    }
}
