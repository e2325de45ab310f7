//! The glare's lean, measured inside each detection and taken out before the fit.
//!
//! The sun's clipped image is not its disc but a level set of its glare: with a sensor that clips,
//! every pixel within a few degrees of the sun reads full scale. Any asymmetry of that glare (a
//! sky brighter toward the horizon behind it, a lens whose glare spreads outward) moves the level
//! set's centroid away from the sun, and the larger the level set, the further. Because the lean
//! is radial in the image and grows with zenith angle, a fit to the centroids takes it for focal
//! length: the held-out error cannot see it, and the camera is then wrong everywhere away from the
//! track.
//!
//! What breaks that tie is inside each frame: the nested level sets of one glare (pixels at least
//! 236, 240, …, 252 in every channel) share the sun's true position, and differ only in size.
//! Under a glare whose brightness falls off as I(ρ) with the distance ρ from the sun, a background
//! gradient of g (DN per px) moves the boundary of the level set of radius ρ outward by
//! g·cos θ·ρ/|I′(ρ)| at angle θ from the gradient, which moves its centroid by g·ρ·(dρ/dI)
//! (first-order perturbation of the boundary, integrated over the circle). Two forms of that lean
//! factor are tried ([`LeanModel`]): ρ² (a glare that falls off like the log of the distance, so
//! ρ·dρ/dI ∝ ρ²), and ρ·dρ/dI measured from the level sets themselves (any profile, but a noisier
//! regressor). The one whose straight line fits the level sets' positions better, over all
//! detections of the day, is used: the glare's shape is the camera's, the same all day.
//! 1. For each level set (the 4-connected component holding the detection, after runs under three
//!    pixels along a row are cleared so that a blooming column neither pulls it nor joins it to
//!    the window's edge), its equivalent radius √(a/π) and its centroid ([`glare_levels`]).
//! 2. Per detection, the slope g of the centroid's image-radial position against the lean factor
//!    (Theil–Sen over its level sets; only where the factors span at least the model's
//!    [`LeanModel::min_spread`]).
//! 3. The lean grows with the sun's zenith angle in a way no model of ours knows, so the slope used
//!    for a detection is the median of the per-detection slopes of its [`NEIGHBOURS`] nearest
//!    detections in zenith angle, within [`NEIGHBOUR_REACH_DEG`] (robust to one frame's noise or a
//!    passing bright cloud). Fewer than three there, and the detection stays as it is; fewer than
//!    [`MIN_MEASURED_FEW`] slopes in all (or under a quarter of the detections), and nothing moves
//!    (under [`MIN_MEASURED`], the fit keeps the correction only for a larger gain).
//! 4. The detection's position is the mean over its level sets of the centroid moved back along the
//!    image radius by slope × factor: the position the glare's centre would have with no
//!    background gradient. A detection with fewer than three level sets stays as it is.
//!
//! A symmetric glare gives slopes of zero, and nothing moves.
//!
//! Sources: the slope estimator is H. Theil (1950) and P. K. Sen (1968), from memory; the
//! first-order shift of a level set's centroid is derived here (no source).

use crate::robust::median;
use super::Detection;

/// Levels (every channel at least this) of the nested level sets.
pub const LEVELS: [u8; 6] = [236, 240, 244, 248, 250, 252];

/// Smallest level set used \[px\].
const MIN_AREA_PX: usize = 9;

/// The form of a level set's lean factor (see the module docs).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum LeanModel {
    /// Radius² \[px²\]: a glare falling off like the log of the distance.
    #[default]
    Area,
    /// ρ·dρ/dI \[px² per DN\], the profile measured from the level sets.
    Profile,
}

impl LeanModel {
    /// Each level set's lean factor; `levels` in the order of [`glare_levels`] (rising level).
    /// Empty with fewer than two level sets.
    pub fn factors(self, levels: &[GlareLevel]) -> Vec<f64> {
        match self {
            LeanModel::Area if levels.len() >= 2 => levels.iter().map(|l| l.r2_px2).collect(),
            LeanModel::Area => vec![],
            LeanModel::Profile => lean_factors(levels),
        }
    }

    /// Smallest spread of the factor over a detection's level sets for its own slope (a twentieth of
    /// the typical level set's size for [`LeanModel::Area`]; its equivalent for the profile).
    pub fn min_spread(self) -> f64 {
        match self {
            LeanModel::Area => 20.0,
            LeanModel::Profile => 0.5,
        }
    }

    /// Its name in reports.
    pub fn name(self) -> &'static str {
        match self {
            LeanModel::Area => "area",
            LeanModel::Profile => "profile",
        }
    }
}

/// Detections (nearest in zenith angle, itself included) whose median slope is used.
pub const NEIGHBOURS: usize = 15;

/// How far in zenith angle a neighbour's slope may come from \[°\].
pub const NEIGHBOUR_REACH_DEG: f64 = 10.0;

/// Detections with a slope of their own for a correction judged by the usual gain
/// ([`super::LEAN_MIN_GAIN`]): two neighbourhoods' worth, so that each median over [`NEIGHBOURS`]
/// stands on its own slopes (with fewer and that gain, a day of 20 detections took a 0.08° camera
/// to 0.12°). Between [`MIN_MEASURED_FEW`] and this, the correction is made but must lower the
/// held-out error by more (see `calibrate::lean_gain_needed`).
pub const MIN_MEASURED: usize = 2 * NEIGHBOURS;

/// Fewest detections with a slope of their own for any correction (and at least a quarter of all).
/// A low arc of the sun (a winter day), where every detection is bloomed, gives fewer detections
/// than a summer day and leans most: on the independent clear days' frames with the sun beyond
/// zenith 45°, 26 and 24 detections at zenith 45–58° leaned +1.1 px (the least bloomed) to +4 px
/// outward, and the fit without the correction was 0.59–0.62° off (p95) beyond its stated bound.
pub const MIN_MEASURED_FEW: usize = 10;

/// One level set of a glare.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GlareLevel {
    /// Its level: every channel at least this \[DN\].
    pub level_dn: u8,
    /// Its equivalent radius², area / π \[px²\].
    pub r2_px2: f64,
    /// Its centroid (column, row) \[px\].
    pub x_px: f64,
    /// See `x_px`.
    pub y_px: f64,
}

/// The nested level sets (`LEVELS`, 236–252) of the glare around `(x, y)`: for each level, the 4-connected
/// component of pixels at least that (by `clip`: in every channel, or the luma) that holds the pixel nearest `(x, y)` (or the
/// nearest such pixel within 2 px), over its rows at least three pixels wide. A level whose
/// component reaches `reach_px` from `(x, y)` (the glare runs into bright cloud or the frame),
/// touches the frame's edge (a sensor that cuts the image circle cuts the glare, and its centroid
/// leans away from the edge) or has fewer than `MIN_AREA_PX` (9) pixels is left out.
pub fn glare_levels(img: &image::RgbImage, x: f64, y: f64, reach_px: f64, clip: super::clip::ClipTest) -> Vec<GlareLevel> {
    let (w, h) = img.dimensions();
    let reach = reach_px.ceil().max(3.0) as i64;
    let (xi, yi) = (x.round() as i64, y.round() as i64);
    let side = (2 * reach + 1) as usize;
    // The window's darkest channel, so that every level is one comparison.
    let mut low = vec![0u8; side * side];
    let mut outside = vec![false; side * side];
    for dy in -reach..=reach {
        for dx in -reach..=reach {
            let (px, py) = (xi + dx, yi + dy);
            let i = ((dy + reach) as usize) * side + (dx + reach) as usize;
            if px >= 0 && py >= 0 && px < w as i64 && py < h as i64 {
                low[i] = clip.value(img.get_pixel(px as u32, py as u32).0);
            } else {
                outside[i] = true;
            }
        }
    }
    LEVELS.iter().filter_map(|&level| level_set(&low, &outside, side, reach, level).map(|(n, sx, sy, r2)| GlareLevel { level_dn: level, r2_px2: r2, x_px: (xi - reach) as f64 + sx / n, y_px: (yi - reach) as f64 + sy / n })).collect()
}

/// One level set in the window `low` (side × side, centred): (pixels, Σx, Σy, radius²) in window
/// coordinates, or `None` (see [`glare_levels`]). Runs of fewer than three pixels along a row are
/// cleared before the component is traced, so that a blooming column neither pulls the centroid
/// nor joins the glare to the window's edge.
fn level_set(low: &[u8], outside: &[bool], side: usize, reach: i64, level: u8) -> Option<(f64, f64, f64, f64)> {
    let c = reach as usize;
    let mut mask: Vec<bool> = low.iter().map(|v| *v >= level).collect();
    for row in mask.chunks_mut(side) {
        let mut x = 0;
        while x < side {
            if !row[x] {
                x += 1;
                continue;
            }
            let start = x;
            while x < side && row[x] {
                x += 1;
            }
            if x - start < 3 {
                row[start..x].iter_mut().for_each(|m| *m = false);
            }
        }
    }
    let seed = (0..=2usize).flat_map(|d| (c - d..=c + d).flat_map(move |y| (c - d..=c + d).map(move |x| (x, y)))).find(|&(x, y)| mask[y * side + x])?;
    let mut seen = vec![false; side * side];
    let mut stack = vec![seed];
    seen[seed.1 * side + seed.0] = true;
    let (mut n, mut sx, mut sy) = (0.0, 0.0, 0.0);
    while let Some((x, y)) = stack.pop() {
        if x == 0 || y == 0 || x == side - 1 || y == side - 1 {
            return None;
        }
        n += 1.0;
        sx += x as f64;
        sy += y as f64;
        for (nx, ny) in [(x + 1, y), (x - 1, y), (x, y + 1), (x, y - 1)] {
            if outside[ny * side + nx] {
                return None; // the frame's edge cuts this level set: its centroid leans
            }
            if !seen[ny * side + nx] && mask[ny * side + nx] {
                seen[ny * side + nx] = true;
                stack.push((nx, ny));
            }
        }
    }
    (n >= MIN_AREA_PX as f64).then(|| (n, sx, sy, n / std::f64::consts::PI))
}

/// Each level set's lean factor ρ·dρ/dI \[px² per DN\] (see the module docs), with dρ/dI from the
/// level sets on either side (one side at the ends); `levels` in the order of [`glare_levels`]
/// (rising level). Empty with fewer than two level sets.
fn lean_factors(levels: &[GlareLevel]) -> Vec<f64> {
    if levels.len() < 2 {
        return vec![];
    }
    let rho: Vec<f64> = levels.iter().map(|l| l.r2_px2.sqrt()).collect();
    let last = levels.len() - 1;
    (0..levels.len())
        .map(|i| {
            let (a, b) = (i.saturating_sub(1), (i + 1).min(last));
            let d_level = levels[b].level_dn as f64 - levels[a].level_dn as f64;
            // Higher levels are smaller: dρ/dI is negative, and the factor uses its size.
            rho[i] * ((rho[a] - rho[b]) / d_level).max(0.0)
        })
        .collect()
}

/// One detection's own slope of the radial centroid position against the lean factor of `model`,
/// over its level sets, with `u` the image-radial unit vector: the median of the slopes between
/// pairs of level sets whose factors differ by at least a fifth of the model's
/// [`LeanModel::min_spread`] (Theil–Sen, so one level set caught on a bright speck does not decide
/// it). `None` with fewer than three level sets, a spread of factors under the model's
/// [`LeanModel::min_spread`] or fewer than three such pairs.
pub fn own_slope(levels: &[GlareLevel], u: (f64, f64), model: LeanModel) -> Option<f64> {
    if levels.len() < 3 {
        return None;
    }
    let k = model.factors(levels);
    let spread = k.iter().copied().fold(f64::NEG_INFINITY, f64::max) - k.iter().copied().fold(f64::INFINITY, f64::min);
    if spread < model.min_spread() {
        return None;
    }
    let pos = |l: &GlareLevel| l.x_px * u.0 + l.y_px * u.1;
    let mut slopes = vec![];
    for i in 0..levels.len() {
        for j in i + 1..levels.len() {
            let dk = k[j] - k[i];
            if dk.abs() >= 0.2 * model.min_spread() {
                slopes.push((pos(&levels[j]) - pos(&levels[i])) / dk);
            }
        }
    }
    (slopes.len() >= 3).then(|| median(&mut slopes))
}

/// What the correction did, for the report.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct LeanCorrection {
    /// The lean factor's form used.
    pub model: LeanModel,
    /// Detections with a slope of their own.
    pub measured: usize,
    /// Median inward move of the detections \[px\].
    pub median_move_px: f64,
    /// Largest inward move \[px\] (outward moves are negative).
    pub largest_move_px: f64,
    /// Held-out RMS of the fit without the correction, when it was kept \[px\] (0 when not known).
    pub held_out_without_px: f64,
}

/// Take each detection's glare lean out (see the module docs). `levels[i]` are detection `i`'s
/// level sets, `centre` the image circle's centre. The detections keep their order.
pub fn correct_glare_lean(dets: &mut [Detection], levels: &[Vec<GlareLevel>], centre: (f64, f64), model: LeanModel) -> LeanCorrection {
    let unit = |d: &Detection| {
        let (ux, uy) = (d.px.0 - centre.0, d.px.1 - centre.1);
        let n = ux.hypot(uy);
        (n > 1e-6).then(|| (ux / n, uy / n))
    };
    let units: Vec<Option<(f64, f64)>> = dets.iter().map(unit).collect();
    let own: Vec<Option<f64>> = units.iter().zip(levels).map(|(u, l)| u.and_then(|u| own_slope(l, u, model))).collect();
    let measured: Vec<(f64, f64)> = dets.iter().zip(&own).filter_map(|(d, s)| s.map(|s| (zenith_deg(d), s))).collect();
    if measured.len() < MIN_MEASURED_FEW.max(dets.len() / 4) {
        return LeanCorrection { model, measured: measured.len(), ..Default::default() };
    }
    let mut moves = vec![];
    for (d, l) in dets.iter_mut().zip(levels) {
        let Some(u) = unit(d) else { continue };
        let Some(slope) = neighbour_median(&measured, zenith_deg(d)) else { continue };
        if l.len() < 3 {
            continue;
        }
        let k = model.factors(l);
        let n = l.len() as f64;
        let (x, y) = (l.iter().zip(&k).map(|(g, k)| g.x_px - slope * k * u.0).sum::<f64>() / n, l.iter().zip(&k).map(|(g, k)| g.y_px - slope * k * u.1).sum::<f64>() / n);
        moves.push((d.px.0 - x) * u.0 + (d.px.1 - y) * u.1);
        d.px = (x, y);
    }
    let mut sorted = moves.clone();
    sorted.sort_by(f64::total_cmp);
    LeanCorrection {
        model,
        measured: measured.len(),
        median_move_px: sorted.get(sorted.len() / 2).copied().unwrap_or(0.0),
        largest_move_px: sorted.last().copied().unwrap_or(0.0),
        held_out_without_px: 0.0,
    }
}

/// The sun's zenith angle at a detection \[°\].
fn zenith_deg(d: &Detection) -> f64 {
    d.dir[2].clamp(-1.0, 1.0).acos().to_degrees()
}

/// The median slope of the [`NEIGHBOURS`] measured detections nearest in zenith angle, among those
/// within [`NEIGHBOUR_REACH_DEG`]; `None` with fewer than three there (the lean is not known at that
/// height of the sun, and the detection is left as it is).
fn neighbour_median(measured: &[(f64, f64)], zenith_deg: f64) -> Option<f64> {
    let mut near: Vec<(f64, f64)> = measured.iter().map(|(z, s)| ((z - zenith_deg).abs(), *s)).filter(|(dz, _)| *dz <= NEIGHBOUR_REACH_DEG).collect();
    near.sort_by(|a, b| a.0.total_cmp(&b.0));
    let mut s: Vec<f64> = near.iter().take(NEIGHBOURS).map(|p| p.1).collect();
    (s.len() >= 3).then(|| median(&mut s))
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::Utc;

    /// A glare that falls off like the log of the distance from `(sx, sy)`, on a background that
    /// brightens along `u` by `g` per px, clipped at 255 (see the module docs).
    fn glare(sx: f64, sy: f64, u: (f64, f64), g: f64) -> image::RgbImage {
        image::RgbImage::from_fn(96, 96, |x, y| {
            let (dx, dy) = (x as f64 - sx, y as f64 - sy);
            let rho = dx.hypot(dy).max(0.5);
            let v = 300.0 - 30.0 * rho.ln() + g * (dx * u.0 + dy * u.1);
            let v = v.clamp(0.0, 255.0) as u8;
            image::Rgb([v, v, v])
        })
    }

    #[test]
    fn nested_level_sets_grow_and_lean_with_the_background() {
        let u = (0.6, 0.8);
        let img = glare(48.3, 47.6, u, 0.4);
        let levels = glare_levels(&img, 48.0, 48.0, 30.0, super::super::clip::ClipTest::Channels);
        assert!(levels.len() >= 4, "{levels:?}");
        assert!(levels.windows(2).all(|w| w[0].r2_px2 > w[1].r2_px2), "higher levels are smaller");
        let lean = |l: &GlareLevel| (l.x_px - 48.3) * u.0 + (l.y_px - 47.6) * u.1;
        assert!(lean(&levels[0]) > lean(&levels[levels.len() - 1]) + 0.2, "the larger level set leans further");
        assert!(own_slope(&levels, u, LeanModel::Area).unwrap() > 0.0);
    }

    /// Level sets the frame's edge cuts are left out (their centroids lean away from the edge);
    /// those the frame holds are kept, where they are when the frame is wider.
    #[test]
    fn level_sets_cut_by_the_frame_are_left_out() {
        let img = glare(48.3, 47.6, (1.0, 0.0), 0.0);
        let whole = glare_levels(&img, 48.0, 48.0, 30.0, super::super::clip::ClipTest::Channels);
        // The same glare in a frame whose top edge is 8 rows above the sun.
        let cut = image::imageops::crop_imm(&img, 0, 40, 96, 56).to_image();
        let levels = glare_levels(&cut, 48.0, 8.0, 30.0, super::super::clip::ClipTest::Channels);
        assert!(!levels.is_empty() && levels.len() < whole.len(), "{} of {}", levels.len(), whole.len());
        for l in &levels {
            let w = whole.iter().find(|w| w.level_dn == l.level_dn).unwrap();
            assert!((l.x_px - w.x_px).abs() < 1e-9 && (l.y_px + 40.0 - w.y_px).abs() < 1e-9, "{l:?} vs {w:?}");
            assert!(l.y_px - l.r2_px2.sqrt() > 0.0, "a kept level lies inside the frame: {l:?}");
        }
    }

    #[test]
    fn the_profile_factor_is_rho_times_drho_di() {
        // I = 300 − 30 ln ρ: dρ/dI = −ρ/30, so ρ·|dρ/dI| = ρ²/30 (the area form up to a constant).
        let img = glare(48.3, 47.6, (1.0, 0.0), 0.0);
        let levels = glare_levels(&img, 48.0, 48.0, 30.0, super::super::clip::ClipTest::Channels);
        let k = LeanModel::Profile.factors(&levels);
        for (l, k) in levels.iter().zip(&k).skip(1).take(levels.len() - 2) {
            let expected = l.r2_px2 / 30.0;
            assert!((k - expected).abs() < 0.25 * expected, "level {}: {k:.3} against {expected:.3}", l.level_dn);
        }
        assert!(LeanModel::Area.factors(&levels[..1]).is_empty() && LeanModel::Profile.factors(&levels[..1]).is_empty());
    }

    #[test]
    fn a_symmetric_glare_has_no_slope_and_does_not_move() {
        let img = glare(48.3, 47.6, (1.0, 0.0), 0.0);
        let levels = glare_levels(&img, 48.0, 48.0, 30.0, super::super::clip::ClipTest::Channels);
        let g = own_slope(&levels, (0.6, 0.8), LeanModel::Area).unwrap();
        assert!(g.abs() < 2e-3, "{g} px per px²");
        // A pixelated disc's centroid is off its centre by up to a few tenths of a pixel; the
        // level sets' mean much less.
        for l in &levels {
            assert!((l.x_px - 48.3).abs() < 0.25 && (l.y_px - 47.6).abs() < 0.25, "{l:?}");
        }
        let n = levels.len() as f64;
        let (mx, my) = (levels.iter().map(|l| l.x_px).sum::<f64>() / n, levels.iter().map(|l| l.y_px).sum::<f64>() / n);
        assert!((mx - 48.3).abs() < 0.1 && (my - 47.6).abs() < 0.1, "{mx} {my}");
    }

    #[test]
    fn leaning_detections_move_back_onto_the_sun() {
        // Suns along a track, all leaning away from the image centre (0, 0) at their position.
        let mut dets = vec![];
        let mut levels = vec![];
        for k in 0..40 {
            let (sx, sy) = (30.0 + 0.37 * k as f64, 40.0 + 0.21 * k as f64);
            let n = sx.hypot(sy);
            let u = (sx / n, sy / n);
            let img = glare(sx, sy, u, 0.5);
            let l = glare_levels(&img, sx, sy, 30.0, super::super::clip::ClipTest::Channels);
            let raw = l.last().map(|g| (g.x_px, g.y_px)).unwrap();
            let zenith = (30.0 + 0.25 * k as f64).to_radians();
            dets.push(Detection::new(Utc::now(), raw, [zenith.sin(), 0.0, zenith.cos()]));
            levels.push(l);
        }
        let sun = |k: usize| (30.0 + 0.37 * k as f64, 40.0 + 0.21 * k as f64);
        let before: Vec<f64> = dets.iter().enumerate().map(|(k, d)| (d.px.0 - sun(k).0).hypot(d.px.1 - sun(k).1)).collect();
        let report = correct_glare_lean(&mut dets, &levels, (0.0, 0.0), LeanModel::Area);
        assert_eq!(report.measured, 40);
        assert!(report.median_move_px > 0.1, "{report:?}");
        for (k, d) in dets.iter().enumerate() {
            let (sx, sy) = sun(k);
            let err = (d.px.0 - sx).hypot(d.px.1 - sy);
            assert!(err < 0.5 * before[k].max(0.1) || err < 0.05, "detection {k}: {err:.3} px after, from {:.3}", before[k]);
        }
    }
}
