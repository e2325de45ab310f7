//! Bright structure that is not the sun: text or a logo burnt into the frames, a lamp, whatever
//! is bright beyond the image circle. The sun's glare passes over a pixel within minutes, so a
//! pixel bright in a good share of the frames in each third of the sun's azimuth range
//! ([`sun_sectors`]) is an overlay. The sun finder leaves such pixels out ([`static_bright`]), and
//! the clear-sky library and obstruction masks leave out the white ones ([`burnt_in`]).

use super::ImageCircle;
use super::clip::ClipTest;
use super::lean;

/// The share of a third of the day's frames in which a pixel must be bright for it to count as
/// static (an overlay, not the sun): the sun's glare passes over a pixel within minutes.
pub const STATIC_BRIGHT_SHARE: f64 = 0.2;

/// How far outside the image circle's rim \[px\] the sun cannot be (the rim's blur).
const RIM_MARGIN_PX: f64 = 3.0;

/// How far an overlay is widened \[px\]: JPEG rings around sharp text.
const WIDEN_PX: i64 = 2;

/// The third (0, 1 or 2) of the sun's azimuth range each frame's sun lies in, from the sun's
/// (east, north, up) directions: the range is the smallest arc holding every azimuth (so a sun
/// that crosses north, south of the equator, is one arc). Frames in different thirds see the sun in
/// different parts of the sky, whether the frames are of one day or of several (a split of the
/// frames by their order would put each of three days in its own third, and the sun's path
/// repeats).
pub fn sun_sectors(dirs: &[[f64; 3]]) -> Vec<usize> {
    use std::f64::consts::TAU;
    let az: Vec<f64> = dirs.iter().map(|d| d[0].atan2(d[1]).rem_euclid(TAU)).collect();
    let mut sorted = az.clone();
    sorted.sort_by(f64::total_cmp);
    let Some(&last) = sorted.last() else { return vec![] };
    // The arc starts after the largest gap between neighbouring azimuths (round the circle).
    let mut start = sorted[0];
    let mut gap = sorted[0] + TAU - last;
    for w in sorted.windows(2) {
        if w[1] - w[0] > gap {
            gap = w[1] - w[0];
            start = w[1];
        }
    }
    let rel: Vec<f64> = az.iter().map(|a| (a - start).rem_euclid(TAU)).collect();
    let range = rel.iter().copied().fold(0.0, f64::max);
    rel.iter().map(|r| if range > 0.0 { ((3.0 * r / range) as usize).min(2) } else { 0 }).collect()
}

/// Per pixel, in how many frames of each sector it is `bright`, and the frames per sector.
/// `None` when the frames differ in size or do not match their sectors.
fn bright_counts(frames: &[&image::RgbImage], sectors: &[usize], bright: impl Fn([u8; 3]) -> bool) -> Option<(Vec<[u16; 3]>, [usize; 3])> {
    let (w, h) = frames.first()?.dimensions();
    if sectors.len() != frames.len() || frames.iter().any(|img| img.dimensions() != (w, h)) {
        return None;
    }
    let mut counts = vec![[0u16; 3]; (w * h) as usize];
    let mut sizes = [0usize; 3];
    for (img, &third) in frames.iter().zip(sectors) {
        let third = third.min(2);
        sizes[third] += 1;
        for (c, p) in counts.iter_mut().zip(img.pixels()) {
            if bright(p.0) {
                c[third] = c[third].saturating_add(1);
            }
        }
    }
    Some((counts, sizes))
}

/// Whether a pixel of these counts is bright in at least [`STATIC_BRIGHT_SHARE`] of the frames
/// of every sector.
fn static_in_every_sector(c: &[u16; 3], sizes: &[usize; 3]) -> bool {
    (0..3).all(|t| c[t] as f64 >= STATIC_BRIGHT_SHARE * sizes[t] as f64)
}

/// Pixels the sun finder must not take for the sun's glare (at least the lowest glare level,
/// [`lean::LEVELS`]\[0\], by `clip`), in daytime `frames` with their [`sun_sectors`]: bright
/// beyond the image circle (a time stamp or a logo burnt into the frame's corner), or static
/// ([`STATIC_BRIGHT_SHARE`]: an overlay inside the circle, a lamp), widened by 2 px. `None` when no
/// pixel is, so frames without such structure are read as they are.
pub(super) fn static_bright(frames: &[&image::RgbImage], sectors: &[usize], circle: ImageCircle, clip: ClipTest) -> Option<Vec<bool>> {
    let low = lean::LEVELS[0];
    let (counts, sizes) = bright_counts(frames, sectors, |p| clip.value(p) >= low)?;
    if sizes.contains(&0) {
        return None;
    }
    let (w, h) = frames[0].dimensions();
    let rim2 = (circle.radius_px + RIM_MARGIN_PX).powi(2);
    let outside = |i: usize| ((i % w as usize) as f64 - circle.cx_px).powi(2) + ((i / w as usize) as f64 - circle.cy_px).powi(2) > rim2;
    let seed: Vec<bool> = counts.iter().enumerate().map(|(i, c)| (c.iter().any(|&k| k > 0) && outside(i)) || static_in_every_sector(c, &sizes)).collect();
    seed.iter().any(|&b| b).then(|| widened(&seed, w, h, WIDEN_PX))
}

/// The frame with the bright pixels of `ignore` darkened (black), or `None` when it has none
/// there.
pub(super) fn without_static_bright(img: &image::RgbImage, ignore: &[bool], clip: ClipTest) -> Option<image::RgbImage> {
    if ignore.len() != (img.width() * img.height()) as usize {
        return None;
    }
    let low = lean::LEVELS[0];
    let hit = |(i, p): (usize, &image::Rgb<u8>)| ignore[i] && clip.value(p.0) >= low;
    if !img.pixels().enumerate().any(hit) {
        return None;
    }
    let mut out = img.clone();
    for (i, p) in out.pixels_mut().enumerate() {
        if ignore[i] && clip.value(p.0) >= low {
            *p = image::Rgb([0, 0, 0]);
        }
    }
    Some(out)
}

/// Pixels white (every channel at least 236) and static ([`STATIC_BRIGHT_SHARE`] of the frames of
/// every sector, `sectors` from [`sun_sectors`]), widened by 2 px: text or a logo burnt into the
/// frames (see [`super::obstruction_mask`]). All false when the frames cannot be counted.
pub(super) fn burnt_in(frames: &[&image::RgbImage], sectors: &[usize]) -> Vec<bool> {
    let n = frames.first().map_or(0, |f| (f.width() * f.height()) as usize);
    let Some((counts, sizes)) = bright_counts(frames, sectors, |p| p.iter().all(|&c| c >= 236)) else { return vec![false; n] };
    if sizes.contains(&0) {
        return vec![false; n];
    }
    let (w, h) = frames[0].dimensions();
    let seed: Vec<bool> = counts.iter().map(|c| static_in_every_sector(c, &sizes)).collect();
    widened(&seed, w, h, WIDEN_PX)
}

/// The burnt-in overlay alone ([`burnt_in`]) as an obstruction mask, when any of it lies inside
/// the image circle: white = open sky. With it, the count of its pixels there.
pub fn overlay_mask(frames: &[&image::RgbImage], sectors: &[usize], circle: ImageCircle) -> Option<(image::GrayImage, usize)> {
    let (w, h) = frames.first()?.dimensions();
    let overlay = burnt_in(frames, sectors);
    let mut out = image::GrayImage::from_pixel(w, h, image::Luma([255]));
    let mut inside = 0;
    for (i, _) in overlay.iter().enumerate().filter(|(_, o)| **o) {
        let (x, y) = ((i % w as usize) as u32, (i / w as usize) as u32);
        out.put_pixel(x, y, image::Luma([0]));
        if ((x as f64 - circle.cx_px).powi(2) + (y as f64 - circle.cy_px).powi(2)).sqrt() <= circle.radius_px {
            inside += 1;
        }
    }
    (inside > 0).then_some((out, inside))
}

/// A mask of `w × h` pixels widened by `r` pixels (a square neighbourhood).
fn widened(mask: &[bool], w: u32, h: u32, r: i64) -> Vec<bool> {
    let (wi, hi) = (w as i64, h as i64);
    let mut out = vec![false; mask.len()];
    for (i, _) in mask.iter().enumerate().filter(|(_, b)| **b) {
        let (x, y) = (i as i64 % wi, i as i64 / wi);
        for yy in (y - r).max(0)..=(y + r).min(hi - 1) {
            for xx in (x - r).max(0)..=(x + r).min(wi - 1) {
                out[(yy * wi + xx) as usize] = true;
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The sun's azimuth range in thirds: a northern day (east → south → west), a southern one
    /// crossing north (azimuth 60° → 0° → 300° is one arc), and three such days one after another.
    #[test]
    fn sun_sectors_split_the_sun_s_arc() {
        let dir = |az_deg: f64| crate::sun::direction_enu(0.6, az_deg.to_radians());
        let north: Vec<[f64; 3]> = [100.0, 140.0, 180.0, 220.0, 260.0].map(dir).to_vec();
        assert_eq!(sun_sectors(&north), vec![0, 0, 1, 2, 2]);
        let south: Vec<[f64; 3]> = [60.0, 30.0, 0.0, 330.0, 300.0].map(dir).to_vec();
        assert_eq!(sun_sectors(&south), vec![2, 2, 1, 0, 0]);
        let three: Vec<[f64; 3]> = north.iter().chain(&north).chain(&north).copied().collect();
        assert_eq!(sun_sectors(&three), [0, 0, 1, 2, 2].repeat(3));
        assert!(sun_sectors(&[]).is_empty());
    }
}
