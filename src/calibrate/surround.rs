//! What surrounds the sun's clipped core: whether the glare around a detection is a clear sky's.
//!
//! The clipped core's centroid marks the sun only while the core is a level set of a smooth glare
//! (the sun's own, over a smooth sky): then the pixels just outside its edge lie close to the next
//! level set down and differ little from one another. A cloud at or near the sun (the sun hidden
//! or dimmed, a cloud edge leaning the clipped core toward its bright side, a cloud rim lit by the
//! sun) or something fixed that crosses the glare (a mast, a pole, a branch) breaks that: the
//! ring of pixels outside the core then holds cloud and sky, or the silhouette and the glare,
//! and its brightness spreads widely. [`ring_spread`] measures that spread; a detection whose
//! ring spreads beyond [`ring_spread_limit`] is dropped before the fit ([`super::calibrate`]).
//!
//! Measured (relative spread (q90 − q10) / mean of the ring's mean-channel brightness, ring
//! [`ring_distances_px`] outside the core): see [`RING_SPREAD_LIMIT`], [`RING_MIN_PX`] and
//! docs/checks.md. When the detections left after the drop cannot be fitted, or give a camera that
//! lost the orientation every detection gives, the fit from every detection stands
//! ([`keep_orientation`]).

use super::clip::ClipTest;
use super::detect::ImageCircle;
use super::{Detection, Fit};

/// Inner and outer distance of the ring from the clipped core, as shares of the image circle's
/// radius, within the glare the core's level set belongs to; never nearer or narrower than
/// [`RING_MIN_PX`] (which sets the ring below a radius of 320 px).
pub const RING_SHARES: (f64, f64) = (0.0125, 0.025);

/// A ring whose brightness spreads more than this, (q90 − q10) / mean after the glare's fall with
/// distance, is not a clear sky's glare, unless the day's own clearest rings say the camera's
/// glare is rougher (see [`ring_spread_limit`]). Measured with the ring 3–6 px out on a 244-px
/// circle (before [`RING_MIN_PX`]): the independent renderer's clear days at most 0.03 (their
/// cloudy frames' detections off the sun by 2–12 px: 0.06–0.3, a mast across the glare over 0.3);
/// with the ring at [`ring_distances_px`] (4–8 px there), this project's renderer's clear days at
/// most 0.057, and the independent clear days' own limits rose to 7–8 % (docs/checks.md).
pub const RING_SPREAD_LIMIT: f64 = 0.06;

/// The limit is at least this many times the day's lower-quartile ring spread: a camera whose clear
/// glare is rougher (a bloom that leans and smears, dirt on the dome: this project's nuisance
/// camera, whose clear day's rings spread 3–8 %) keeps its clear suns, while a quarter of the
/// detections in clear sky is enough to set it.
pub const RING_SPREAD_OVER_QUARTILE: f64 = 4.0;

/// The ring-spread limit for a day's detections: [`RING_SPREAD_LIMIT`], or
/// [`RING_SPREAD_OVER_QUARTILE`] times the lower quartile of the spreads, whichever is larger.
pub fn ring_spread_limit(spreads: &[Option<f64>]) -> f64 {
    let mut v: Vec<f64> = spreads.iter().flatten().copied().filter(|s| s.is_finite()).collect();
    if v.is_empty() {
        return RING_SPREAD_LIMIT;
    }
    v.sort_by(f64::total_cmp);
    RING_SPREAD_LIMIT.max(RING_SPREAD_OVER_QUARTILE * v[(v.len() - 1) / 4])
}

/// Fewest ring pixels for a judgement.
const MIN_RING_PX: usize = 12;

/// The relative spread (q90 − q10) / mean of the brightness (mean of the channels) of the pixels
/// not clipped (by `clip`) at [`ring_distances_px`] outside the clipped core nearest `(x, y)` (its
/// 4-connected component, sought within 2 px, after one-pixel gaps between clipped pixels are
/// closed and runs under three pixels along a row are cleared so that a blooming column is not
/// part of it, with the holes it encloses), inside the image circle, less those within
/// [`HALO_PX`] of clipped pixels apart from the core. Infinite when the core reaches beyond
/// `reach_px` of `(x, y)`: a clipped core that long is a glare run into bright cloud (a clear
/// sun's core is refused by the detector well before: at most 2 % of the radius² in area, a disc
/// of 8 % of the radius). `None` when there is no core there or the ring has fewer than 12 pixels.
pub fn ring_spread(img: &image::RgbImage, x: f64, y: f64, circle: ImageCircle, reach_px: f64, clip: ClipTest) -> Option<f64> {
    ring_at(img, (x, y), circle, reach_px, clip, ring_distances_px(circle.radius_px), HALO_PX).map(|r| r.spread)
}

/// The ring's inner and outer distance from the core \[px\] for an image circle of `radius_px`.
pub fn ring_distances_px(radius_px: f64) -> (f64, f64) {
    let d1 = (RING_SHARES.0 * radius_px).max(RING_MIN_PX.0);
    (d1, (RING_SHARES.1 * radius_px).max(d1 + RING_MIN_PX.1))
}

/// Least inner distance and width of the ring \[px\]: half a JPEG block (the ringing of the
/// clipped edge, and colour subsampling's blur, reach that far) and as much again. Measured on this
/// project's clean clear days through JPEG at quality 85 (the clear detections' largest spread, with
/// the core closed and the smear column left out): at 384², 15-minute frames, a ring 2.3–4.7 px
/// (the shares) 0.08 / 0.11, 3–6 px 0.057 / 0.073, 4–8 px 0.054 / 0.054 (first camera / a second
/// one turned 70°); at 512² 3.1–6.2 px 0.059 / 0.070, 4–8 px 0.050 / 0.057; the nuisance camera at
/// 384² 4–8 px 0.048; at 256² 4–8 px 0.068, under that day's own limit (4 × its lower quartile,
/// about 0.15). Rings from 2 px spread up to 0.14 on clear suns (0.35 before the core was closed).
pub const RING_MIN_PX: (f64, f64) = (4.0, 4.0);

/// Pixels within this distance \[px\] of a clipped pixel apart from the core (a blooming smear
/// column, a glint) are left out of the ring: JPEG blurs the column's brightness into its
/// neighbours, which a small core's ring crosses twice.
pub const HALO_PX: i64 = 1;

/// A ring's judgement: its spread and how many pixels it holds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ring {
    /// (q90 − q10) / mean of the brightness after the glare's fall with distance.
    pub spread: f64,
    /// Pixels in the ring.
    pub pixels: usize,
}

/// [`ring_spread`] of the core nearest `(x, y)` with the ring's inner and outer distance from the
/// core \[px\] and the halo left out around other clipped pixels \[px\] given (to measure other
/// rings), and how many pixels the ring holds.
pub fn ring_at(img: &image::RgbImage, (x, y): (f64, f64), circle: ImageCircle, reach_px: f64, clip: ClipTest, (d1, d2): (f64, f64), halo: i64) -> Option<Ring> {
    let (w, h) = img.dimensions();
    let reach = reach_px.ceil() as i64;
    let pad = d2.ceil() as i64 + 1;
    let half = reach + pad;
    let (xi, yi) = (x.round() as i64, y.round() as i64);
    let side = (2 * half + 1) as usize;
    let at = |dx: i64, dy: i64| -> Option<[u8; 3]> {
        let (px, py) = (xi + dx, yi + dy);
        (px >= 0 && py >= 0 && px < w as i64 && py < h as i64).then(|| img.get_pixel(px as u32, py as u32).0)
    };
    let idx = |dx: i64, dy: i64| ((dy + half) as usize) * side + (dx + half) as usize;
    let clipped: Vec<bool> = (-half..=half).flat_map(|dy| (-half..=half).map(move |dx| (dx, dy))).map(|(dx, dy)| at(dx, dy).is_some_and(|p| clip.clipped(p))).collect();
    // The core: clipped pixels in row runs of three or more, after gaps of one pixel between
    // clipped ones are closed (a small image's clipped disc is ragged with JPEG's noise).
    let mut wide = closed(&clipped, side);
    for row in wide.chunks_mut(side) {
        let mut i = 0;
        while i < side {
            let start = i;
            while i < side && row[i] {
                i += 1;
            }
            if i - start < 3 {
                row[start..i].iter_mut().for_each(|m| *m = false);
            }
            i = i.max(start + 1);
        }
    }
    let seed = (0..=2i64).flat_map(|d| (-d..=d).flat_map(move |dy| (-d..=d).map(move |dx| (dx, dy)))).find(|&(dx, dy)| wide[idx(dx, dy)])?;
    let mut core = vec![false; side * side];
    core[idx(seed.0, seed.1)] = true;
    let mut stack = vec![seed];
    let mut edge = vec![];
    while let Some((dx, dy)) = stack.pop() {
        if dx.abs() > reach || dy.abs() > reach {
            return Some(Ring { spread: f64::INFINITY, pixels: 0 });
        }
        let mut on_edge = false;
        for (nx, ny) in [(dx + 1, dy), (dx - 1, dy), (dx, dy + 1), (dx, dy - 1)] {
            if wide[idx(nx, ny)] {
                if !core[idx(nx, ny)] {
                    core[idx(nx, ny)] = true;
                    stack.push((nx, ny));
                }
            } else {
                on_edge = true;
            }
        }
        if on_edge {
            edge.push((dx, dy));
        }
    }
    fill_holes(&mut core, side, &mut edge, &idx, half);
    let (x0, x1) = (edge.iter().map(|e| e.0).min()? - pad, edge.iter().map(|e| e.0).max()? + pad);
    let (y0, y1) = (edge.iter().map(|e| e.1).min()? - pad, edge.iter().map(|e| e.1).max()? + pad);
    let edge_dist = |dx: i64, dy: i64| edge.iter().map(|e| ((e.0 - dx).pow(2) + (e.1 - dy).pow(2)) as f64).fold(f64::INFINITY, f64::min).sqrt();
    // Clipped pixels apart from the core (a smear column, a glint) and the pixels JPEG blurs
    // their brightness into are no part of the glare's level sets.
    let (hx0, hx1, hy0, hy1) = ((x0 - halo).max(-half), (x1 + halo).min(half), (y0 - halo).max(-half), (y1 + halo).min(half));
    let mut near_other = vec![false; side * side];
    if halo > 0 {
        for dy in hy0..=hy1 {
            for dx in hx0..=hx1 {
                if clipped[idx(dx, dy)] && !core[idx(dx, dy)] && edge_dist(dx, dy) > 1.5 {
                    for ey in (dy - halo).max(-half)..=(dy + halo).min(half) {
                        for ex in (dx - halo).max(-half)..=(dx + halo).min(half) {
                            near_other[idx(ex, ey)] = true;
                        }
                    }
                }
            }
        }
    }
    let mut ring = vec![];
    for dy in y0..=y1 {
        for dx in x0..=x1 {
            if clipped[idx(dx, dy)] || core[idx(dx, dy)] || near_other[idx(dx, dy)] {
                continue;
            }
            let (px, py) = ((xi + dx) as f64, (yi + dy) as f64);
            if (px - circle.cx_px).hypot(py - circle.cy_px) > circle.radius_px - 1.0 {
                continue;
            }
            let d2_min = edge.iter().map(|e| ((e.0 - dx).pow(2) + (e.1 - dy).pow(2)) as f64).fold(f64::INFINITY, f64::min);
            let d = d2_min.sqrt();
            if d > d1 && d <= d2 {
                let Some(p) = at(dx, dy) else { continue };
                ring.push((d, (p[0] as f64 + p[1] as f64 + p[2] as f64) / 3.0));
            }
        }
    }
    if ring.len() < MIN_RING_PX {
        return None;
    }
    // The glare's fall with the distance from the core is taken out first: each pixel against the
    // median of the ring's pixels at about its distance (half-pixel steps). A steep glare falls by
    // tens of levels across the ring all round; what is left is what differs around it.
    let step = |d: f64| (2.0 * d).round() as i64;
    let mut by_step: std::collections::BTreeMap<i64, Vec<f64>> = Default::default();
    for (d, v) in &ring {
        by_step.entry(step(*d)).or_default().push(*v);
    }
    let medians: std::collections::BTreeMap<i64, f64> = by_step
        .into_iter()
        .map(|(k, mut v)| {
            v.sort_by(f64::total_cmp);
            (k, v[v.len() / 2])
        })
        .collect();
    let mv = ring.iter().map(|r| r.1).sum::<f64>() / ring.len() as f64;
    let mut resid: Vec<f64> = ring.iter().map(|(d, v)| v - medians[&step(*d)]).collect();
    resid.sort_by(f64::total_cmp);
    let q = |p: f64| resid[((p * (resid.len() - 1) as f64).round() as usize).min(resid.len() - 1)];
    Some(Ring { spread: (q(0.9) - q(0.1)) / mv.max(1.0), pixels: ring.len() })
}

/// `mask` (a `side`² window, row by row) closed with a 3 × 3 square: dilated, then eroded.
fn closed(mask: &[bool], side: usize) -> Vec<bool> {
    let morph = |m: &[bool], any: bool| -> Vec<bool> {
        (0..side * side)
            .map(|i| {
                let (x, y) = ((i % side) as i64, (i / side) as i64);
                let mut hits = (-1..=1).flat_map(|dy| (-1..=1).map(move |dx| (x + dx, y + dy))).map(|(nx, ny)| {
                    if nx < 0 || ny < 0 || nx >= side as i64 || ny >= side as i64 { m[i] } else { m[ny as usize * side + nx as usize] }
                });
                if any { hits.any(|h| h) } else { hits.all(|h| h) }
            })
            .collect()
    };
    morph(&morph(mask, true), false)
}

/// Add to `core` the pixels it encloses (not reachable from the window's border through pixels
/// outside it), and recompute its `edge` (core pixels with a 4-neighbour outside it).
fn fill_holes(core: &mut [bool], side: usize, edge: &mut Vec<(i64, i64)>, idx: &dyn Fn(i64, i64) -> usize, half: i64) {
    let mut outside = vec![false; side * side];
    let mut stack: Vec<(i64, i64)> = (-half..=half).flat_map(|k| [(k, -half), (k, half), (-half, k), (half, k)]).filter(|&(x, y)| !core[idx(x, y)]).collect();
    for &(x, y) in &stack {
        outside[idx(x, y)] = true;
    }
    while let Some((x, y)) = stack.pop() {
        for (nx, ny) in [(x + 1, y), (x - 1, y), (x, y + 1), (x, y - 1)] {
            if nx.abs() <= half && ny.abs() <= half && !core[idx(nx, ny)] && !outside[idx(nx, ny)] {
                outside[idx(nx, ny)] = true;
                stack.push((nx, ny));
            }
        }
    }
    for (c, o) in core.iter_mut().zip(&outside) {
        *c = !*o;
    }
    edge.clear();
    for y in -half..=half {
        for x in -half..=half {
            if core[idx(x, y)] && [(x + 1, y), (x - 1, y), (x, y + 1), (x, y - 1)].iter().any(|&(nx, ny)| nx.abs() > half || ny.abs() > half || !core[idx(nx, ny)]) {
                edge.push((x, y));
            }
        }
    }
}

/// A clipped core smaller than this share of the bare disc's (the 20th percentile of the blob
/// areas of the detections whose ring was judged clear, as the bloom screening takes it) is a sun
/// dimmed by cloud, whose brightest spot need not be the sun: the mirror of the bloom screening's
/// rule that drops a blob four times the bare disc's.
pub const DIMMED_SHARE: f64 = 0.25;

/// The detections dropped for what surrounds the sun, by time.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Clouded {
    /// The brightness around the clipped core spread beyond the day's limit (`limit`, from
    /// [`ring_spread_limit`]: [`RING_SPREAD_LIMIT`] or more), or the core ran beyond the reach.
    pub spread: Vec<chrono::DateTime<chrono::Utc>>,
    /// The clipped core under [`DIMMED_SHARE`] of the bare disc's.
    pub dimmed: Vec<chrono::DateTime<chrono::Utc>>,
    /// The median ring spread of the kept detections that had one.
    pub kept_median_spread: f64,
    /// The limit used ([`ring_spread_limit`]).
    pub limit: f64,
}

impl Clouded {
    /// Judge the detections `dets` by their ring spreads (`spreads`, in the same order).
    pub fn judge(dets: &[Detection], spreads: &[Option<f64>]) -> Self {
        let limit = ring_spread_limit(spreads);
        let over = |s: &Option<f64>| s.is_some_and(|s| s > limit);
        let spread: Vec<_> = dets.iter().zip(spreads).filter(|(_, s)| over(s)).map(|(d, _)| d.time).collect();
        let mut clear_areas: Vec<f64> = dets.iter().zip(spreads).filter(|(d, s)| s.is_some() && !over(s) && d.blob_px > 0).map(|(d, _)| d.blob_px as f64).collect();
        clear_areas.sort_by(f64::total_cmp);
        let dimmed = if clear_areas.len() >= 5 {
            let bare = clear_areas[(0.2 * (clear_areas.len() - 1) as f64).round() as usize];
            dets.iter().zip(spreads).filter(|(d, s)| !over(s) && d.blob_px > 0 && (d.blob_px as f64) < DIMMED_SHARE * bare).map(|(d, _)| d.time).collect()
        } else {
            vec![]
        };
        let mut kept: Vec<f64> = dets.iter().zip(spreads).filter(|(d, _)| !spread.contains(&d.time) && !dimmed.contains(&d.time)).filter_map(|(_, s)| *s).collect();
        kept.sort_by(f64::total_cmp);
        let kept_median_spread = kept.get(kept.len() / 2).copied().unwrap_or(f64::NAN);
        Self { spread, dimmed, kept_median_spread, limit }
    }

    /// How many were dropped.
    pub fn len(&self) -> usize {
        self.spread.len() + self.dimmed.len()
    }

    /// Whether none was.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The times of the dropped detections, in order.
    pub fn times(&self) -> Vec<chrono::DateTime<chrono::Utc>> {
        let mut all: Vec<_> = self.spread.iter().chain(&self.dimmed).copied().collect();
        all.sort();
        all
    }

    /// Whether the detection at `t` was dropped.
    pub fn contains(&self, t: &chrono::DateTime<chrono::Utc>) -> bool {
        self.spread.contains(t) || self.dimmed.contains(t)
    }

    /// The warning (none when nothing was dropped): how many, why, when (the first ten).
    pub fn warning(&self) -> Option<String> {
        if self.is_empty() {
            return None;
        }
        let all = self.times();
        let at: Vec<String> = all.iter().take(10).map(|t| t.format("%Y-%m-%dT%H:%M:%SZ").to_string()).collect();
        Some(format!(
            "{} sun detection(s) dropped for cloud at or near the sun, or something fixed across its glare: {} with the brightness around the clipped core spread more than {:.0} % ({}), {} with a clipped core under {:.0} % of the bare disc's (the sun dimmed); at {}{}",
            self.len(),
            self.spread.len(),
            100.0 * self.limit,
            if self.kept_median_spread.is_finite() { format!("the kept detections' median {:.1} %", 100.0 * self.kept_median_spread) } else { "no kept detection had a ring to measure".into() },
            self.dimmed.len(),
            100.0 * DIMMED_SHARE,
            at.join(", "),
            if all.len() > at.len() { ", …" } else { "" }
        ))
    }
}

/// Two fits whose cameras put a detection's pixel this far apart \[°\] are different solutions, not
/// the same one moved by the detections that differ: cloud-leaned detections moved the
/// independent cameras' fits by at most 0.33° (p95 over the sky), while a held fit that lost its
/// orientation came out pitched by 180°.
pub const ORIENTATION_GAP_DEG: f64 = 2.0;

/// The fit without the clouded detections (`kept`) unless dropping them lost what every
/// detection (`all`, fitted from `raw`) gives: `kept` could not be fitted while `all` could (a
/// clean day whose clear detections were taken for clouded must not be refused), or the two
/// cameras lie more than [`ORIENTATION_GAP_DEG`] apart at the detections and `all` explains the
/// detections better (median pixel residual over every one: a flipped or mirrored solution
/// misses the dropped ones by far more than their cloud's lean). Either way the camera written is
/// one the loader accepts (each fit is checked before it is returned).
pub(super) fn keep_orientation(kept: FitResult, all: FitResult, clouded: &Clouded, raw: &[Detection]) -> FitResult {
    let back = |(mut fit, dets): (Fit, Vec<Detection>), why: String| {
        fit.warnings.push(format!(
            "{} sun detection(s) judged clouded (the brightness around the clipped core spread, or the core dimmed) were kept after all: without them {why}; the camera is fitted from every detection, cloud-leaned ones included: calibrate again from a clearer day if the sun was clouded",
            clouded.len()
        ));
        Ok((fit, dets))
    };
    match (kept, all) {
        (Ok(k), Ok(a)) => {
            let gap = camera_gap_deg(&k.0.camera, &a.0.camera, raw);
            let (mk, ma) = (median_miss_px(&k.0.camera, raw), median_miss_px(&a.0.camera, raw));
            if gap > ORIENTATION_GAP_DEG && ma < mk {
                back(a, format!("the fit came out {gap:.1}° from the one with every detection at the detections, and missed them by {mk:.1} px (median) against {ma:.1} px"))
            } else {
                Ok(k)
            }
        }
        (Err(e), Ok(a)) => {
            let why = match e {
                super::CalibrationError::Unusable(m) => m,
                e => e.to_string(),
            };
            back(a, format!("the rest gave no usable fit ({why})"))
        }
        (k, _) => k,
    }
}

type FitResult = Result<(Fit, Vec<Detection>), super::CalibrationError>;

/// The largest angle \[°\] between the sky directions cameras `a` and `b` give the pixels of the
/// detections (180 where either gives none).
fn camera_gap_deg(a: &crate::camera::Camera, b: &crate::camera::Camera, dets: &[Detection]) -> f64 {
    dets.iter()
        .map(|d| match (a.unproject_enu(d.px.0, d.px.1), b.unproject_enu(d.px.0, d.px.1)) {
            (Some(u), Some(v)) => (u[0] * v[0] + u[1] * v[1] + u[2] * v[2]).clamp(-1.0, 1.0).acos().to_degrees(),
            _ => 180.0,
        })
        .fold(0.0, f64::max)
}

/// The median distance \[px\] between the detections and where `cam` puts the sun.
fn median_miss_px(cam: &crate::camera::Camera, dets: &[Detection]) -> f64 {
    let mut m: Vec<f64> = dets.iter().map(|d| cam.project_enu(d.dir).map_or(f64::INFINITY, |(x, y)| (x - d.px.0).hypot(y - d.px.1))).collect();
    m.sort_by(f64::total_cmp);
    m.get(m.len() / 2).copied().unwrap_or(f64::INFINITY)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A small image's clipped disc (7 px across) with pixels inside it left unclipped by JPEG,
    /// one of them splitting a row into runs of two and four, and a clipped smear column two
    /// pixels wide through it: the core is the whole disc (its ring the same pixels as the solid
    /// disc's, less those beside the column) and the ring as smooth as the solid disc's.
    #[test]
    fn a_ragged_core_is_closed_and_a_smear_column_left_out() {
        let circle = ImageCircle { cx_px: 192.0, cy_px: 192.0, radius_px: 187.0 };
        let (sx, sy) = (150.0, 120.0);
        let frame = |holes: bool, column: bool| {
            image::RgbImage::from_fn(384, 384, |x, y| {
                let r = (x as f64 - sx).hypot(y as f64 - sy);
                let glare = (110.0 + 140.0 * (-(r - 3.5).max(0.0) / 8.0).exp() + 0.1 * x as f64).min(250.0);
                let mut v = if r < 3.6 { 255.0 } else { glare };
                if holes && [(150, 120), (148, 119), (151, 122)].contains(&(x, y)) {
                    v = 248.0;
                }
                if column && (150..152).contains(&x) && r >= 3.6 {
                    v = 255.0;
                }
                image::Rgb([v as u8; 3])
            })
        };
        let ring = |img: &image::RgbImage| ring_at(img, (sx, sy), circle, 28.0, ClipTest::Channels, ring_distances_px(circle.radius_px), HALO_PX).unwrap();
        let solid = ring(&frame(false, false));
        let ragged = ring(&frame(true, false));
        assert_eq!(ragged, solid, "the holes are closed");
        let smeared = ring(&frame(true, true));
        assert!(smeared.pixels < solid.pixels && smeared.pixels > solid.pixels / 2, "{smeared:?} against {solid:?}");
        assert!(smeared.spread <= solid.spread + 0.01, "{smeared:?} against {solid:?}");
    }

    /// Detections of a known camera along a morning's sun track, each `off_px` off in x.
    fn track(cam: &crate::camera::Camera, off_px: f64) -> Vec<Detection> {
        (0..24)
            .filter_map(|i| {
                let dir = crate::sun::direction_enu((70.0 - 2.5 * i as f64).to_radians(), (80.0 + 4.0 * i as f64).to_radians());
                let (x, y) = cam.project_enu(dir)?;
                Some(Detection { time: chrono::DateTime::from_timestamp(1_781_420_400 + 600 * i, 0).unwrap(), px: (x + off_px, y), dir, blob_px: 40, weight: 1.0 })
            })
            .collect()
    }

    /// A fit without the clouded detections is kept when it agrees with the one from every
    /// detection; one that came out flipped, or none at all, gives way to the one from every
    /// detection, with a warning; with neither usable the error of the first stands.
    #[test]
    fn a_flipped_or_failed_fit_without_the_clouded_gives_way() {
        let truth = crate::synth::scene("clear-day").unwrap().camera.camera(512);
        let raw = track(&truth, 0.0);
        let fit = |cam: &crate::camera::Camera, off: f64| {
            let f = super::super::fit_detections(cam, cam.projection, &track(cam, off));
            let d = track(cam, off);
            (f, d)
        };
        let clouded = Clouded { spread: raw.iter().take(6).map(|d| d.time).collect(), ..Default::default() };
        let all = || Ok(fit(&truth, 0.0));
        // The same camera moved by a fraction of a pixel: kept, no warning.
        let (k, _) = keep_orientation(Ok(fit(&truth, 0.3)), all(), &clouded, &raw).unwrap();
        assert!(k.warnings.is_empty(), "{:?}", k.warnings);
        assert!((k.camera.cx_px - truth.cx_px - 0.3).abs() < 0.1, "the kept fit: {}", k.camera.cx_px - truth.cx_px);
        // Turned over: the fit from every detection, with a warning.
        let o = truth.orientation;
        let flipped = truth.clone().with_orientation(crate::camera::Orientation { yaw_rad: o.yaw_rad + std::f64::consts::PI, pitch_rad: o.pitch_rad + std::f64::consts::PI, ..o });
        let (k, _) = keep_orientation(Ok((Fit { camera: flipped, ..fit(&truth, 0.0).0 }, raw.clone())), all(), &clouded, &raw).unwrap();
        assert!((k.camera.orientation.pitch_rad - truth.orientation.pitch_rad).abs() < 0.01, "{:?}", k.camera.orientation);
        assert!(k.warnings.iter().any(|w| w.contains("6 sun detection(s) judged clouded") && w.contains("from the one with every detection")), "{:?}", k.warnings);
        // No usable fit without them: the one from every detection.
        let (k, _) = keep_orientation(Err(super::super::CalibrationError::Unusable("a tilt of 180.0°".into())), all(), &clouded, &raw).unwrap();
        assert!(k.warnings.iter().any(|w| w.contains("no usable fit (a tilt of 180.0°)")), "{:?}", k.warnings);
        // Neither: the first error.
        let e = keep_orientation(Err(super::super::CalibrationError::NoCircle), Err(super::super::CalibrationError::Unusable("x".into())), &clouded, &raw).unwrap_err();
        assert!(matches!(e, super::super::CalibrationError::NoCircle));
    }

    /// A clipped disc (radius 8 px) in a smooth glare over a sky brightening to one side: a low
    /// spread; the same with a dark band across half the glare, or a grey cloud over one side: a
    /// high one.
    #[test]
    fn a_band_or_a_cloud_across_the_glare_spreads_the_ring() {
        let circle = ImageCircle { cx_px: 100.0, cy_px: 100.0, radius_px: 240.0 };
        let glare = |x: u32, y: u32| {
            let r = (x as f64 - 100.0).hypot(y as f64 - 100.0);
            let v = if r < 8.0 { 255.0 } else { 150.0 + 100.0 * (-(r - 8.0) / 12.0).exp() + 0.2 * x as f64 };
            v.min(255.0)
        };
        let img = |f: &dyn Fn(u32, u32, f64) -> f64| image::RgbImage::from_fn(200, 200, |x, y| {
            let v = f(x, y, glare(x, y)).clamp(0.0, 255.0) as u8;
            image::Rgb([v, v, v])
        });
        let clear = ring_spread(&img(&|_, _, v| v), 100.0, 100.0, circle, 20.0, ClipTest::Channels).unwrap();
        assert!(clear < 0.03, "clear glare: {clear}");
        let pole = ring_spread(&img(&|x, _, v| if (104..112).contains(&x) { 25.0 } else { v }), 97.0, 100.0, circle, 20.0, ClipTest::Channels).unwrap();
        assert!(pole > RING_SPREAD_LIMIT, "a band across the glare: {pole}");
        let cloud = ring_spread(&img(&|_, y, v| if y > 104 { v.min(200.0) } else { v }), 100.0, 99.0, circle, 20.0, ClipTest::Channels).unwrap();
        assert!(cloud > RING_SPREAD_LIMIT, "a cloud over one side: {cloud}");
    }
}
