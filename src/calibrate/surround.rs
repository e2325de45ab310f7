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
//! Measured (relative spread (q90 − q10) / mean of the ring's mean-channel brightness, ring 1.25–2.5 %
//! of the image circle's radius outside the core): see [`RING_SPREAD_LIMIT`] and docs/checks.md.

use super::clip::ClipTest;
use super::detect::ImageCircle;

/// Inner and outer distance of the ring from the clipped core, as shares of the image circle's
/// radius (3 and 6 px on a 244-px circle): beyond the pixels that JPEG's colour subsampling
/// blurs into the core's edge, within the glare the core's level set belongs to.
pub const RING_SHARES: (f64, f64) = (0.0125, 0.025);

/// A ring whose brightness spreads more than this, (q90 − q10) / mean after the glare's fall with
/// distance, is not a clear sky's glare, unless the day's own clearest rings say the camera's
/// glare is rougher (see [`ring_spread_limit`]). Measured: the independent renderer's clear days
/// at most 0.03 (their cloudy frames' detections off the sun by 2–12 px: 0.06–0.3, a mast across
/// the glare over 0.3); this project's renderer's clear days up to 0.06.
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
/// not clipped (by `clip`) at a distance of [`RING_SHARES`] of the image circle's radius outside
/// the clipped core nearest `(x, y)` (its 4-connected component, sought within 2 px, after runs
/// under three pixels along a row are cleared so that a blooming column is not part of it), inside
/// the image circle. Infinite when the core reaches beyond `reach_px` of `(x, y)`: a clipped core
/// that long is a glare run into bright cloud (a clear sun's core is refused by the detector well
/// before: at most 2 % of the radius² in area, a disc of 8 % of the radius). `None` when there is
/// no core there or the ring has fewer than 12 pixels.
pub fn ring_spread(img: &image::RgbImage, x: f64, y: f64, circle: ImageCircle, reach_px: f64, clip: ClipTest) -> Option<f64> {
    let (w, h) = img.dimensions();
    let (d1, d2) = (RING_SHARES.0 * circle.radius_px, RING_SHARES.1 * circle.radius_px);
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
    // The core: clipped pixels in row runs of three or more.
    let mut wide = clipped.clone();
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
            return Some(f64::INFINITY);
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
    let (x0, x1) = (edge.iter().map(|e| e.0).min()? - pad, edge.iter().map(|e| e.0).max()? + pad);
    let (y0, y1) = (edge.iter().map(|e| e.1).min()? - pad, edge.iter().map(|e| e.1).max()? + pad);
    let mut ring = vec![];
    for dy in y0..=y1 {
        for dx in x0..=x1 {
            if clipped[idx(dx, dy)] {
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
    Some((q(0.9) - q(0.1)) / mv.max(1.0))
}

/// A clipped core smaller than this share of the bare disc's (the 20th percentile of the blob
/// areas of the detections whose ring was judged clear, as the bloom screening takes it) is a sun
/// dimmed by cloud, whose brightest spot need not be the sun: the mirror of the bloom screening's
/// rule that drops a blob four times the bare disc's.
pub const DIMMED_SHARE: f64 = 0.25;

/// The detections dropped for what surrounds the sun, by time.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Clouded {
    /// The brightness around the clipped core spread beyond [`RING_SPREAD_LIMIT`] (or the core ran
    /// beyond the reach).
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
    pub fn judge(dets: &[super::Detection], spreads: &[Option<f64>]) -> Self {
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
            "{} sun detection(s) dropped for cloud at or near the sun, or something fixed across its glare: {} with the brightness around the clipped core spread more than {:.0} % (the kept detections' median {:.1} %), {} with a clipped core under {:.0} % of the bare disc's (the sun dimmed); at {}{}",
            self.len(),
            self.spread.len(),
            100.0 * self.limit,
            100.0 * self.kept_median_spread,
            self.dimmed.len(),
            100.0 * DIMMED_SHARE,
            at.join(", "),
            if all.len() > at.len() { ", …" } else { "" }
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

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
