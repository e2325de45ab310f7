//! Distant cloud's lost contrast. Far from the zenith the line of sight to a cloud crosses
//! kilometres of lit haze, whose airlight adds the clear sky's colour to the cloud's: a cloud's
//! red/blue score is pulled toward the clear sky's, the more the longer the path. Koschmieder's law
//! gives the apparent contrast of an object at distance `d` as `C₀·exp(−σ·d)` (Koschmieder 1924,
//! from memory). For a cloud on a plane at height `h` seen at zenith `z`, `d = h / cos z`, so the
//! scores of a frame's far cloud fall as `exp(−k·(1/cos z − m₀))` against the near field's, with one
//! unknown `k = σ·h` per frame.
//!
//! This module measures `k` on the frame itself: in 5° bands from [`NEAR_ZENITH_DEG`] outward, the
//! spread between two levels of the scores (halfway into the near field's cloud, from the top, and
//! halfway into its clear sky, from the bottom, at the near field's cloudy share) against the same
//! spread within [`NEAR_ZENITH_DEG`], fitted through the origin in `ln(ratio)` against
//! `1/cos z − m₀` (the cloud field's make-up taken as alike across the sky, as a cloud plane's
//! statistics are; own choice). A far cloudy sample's departure above its band's clear level is then
//! divided by the expected loss and the thick threshold applied again, so a distant cumulus reads
//! thick as it would overhead. What is cloud and what is clear is left as read: lifting the clear
//! sky's own spread by the same factor made false cloud far away (measured: on an independent
//! renderer's broken cumulus, cloud called at zenith 80–85° rose from 27 % to 54 % of the samples
//! against a true 39 %). Frames with little cloud near the zenith, with much thin cloud there (a
//! veil over cumulus mixes two layers in the far scores), or whose far bands show no loss, are left
//! as they were; so are frames after one in which motion tracked two layers (the engine's
//! `MapStage`). Within a frame, a band is neither measured nor lifted when its cloud cover is unlike
//! the near field's (`MAX_SHARE_GAP`) or beyond 85°, and only samples judged against a learned
//! clear-sky library take part (the callers' `plain`).
use crate::segment::Class;

// The far field's thickness, first by a frame's measured loss of contrast (below), and, off by
// default, by holding the far bands' thick share to the near field's (`far_thickness`).

/// Samples within this zenith angle set the near field's reference quantile \[°\].
pub const NEAR_ZENITH_DEG: f32 = 50.0;
/// Width of the far bands \[°\].
const BAND_DEG: f32 = 5.0;
/// The far bands end here \[°\] (beyond it a pixel spans too much of the plane to measure).
const LAST_BAND_END_DEG: f32 = 85.0;
/// Judged samples a band (or the near field) needs before its quantile is used.
const MIN_SAMPLES: usize = 200;
/// Least cloudy share of the near field's judged samples for a measurement.
const MIN_NEAR_CLOUDY_SHARE: f32 = 0.10;
/// Largest share of thin cloud among the near field's cloud for a measurement: a field with much
/// thin cloud overhead may be a veil over cumulus, whose far scores mix two layers (own choice).
const MAX_NEAR_THIN_SHARE: f32 = 0.25;
/// Largest gap between a far band's cloudy share and the near field's for the band to be measured
/// and lifted: the measurement takes the cloud field as alike across the sky, and a band whose
/// cover departs that far from it is cloud of another kind, or sky the reference does not know
/// (own choice).
const MAX_SHARE_GAP: f32 = 0.25;
/// Largest lift of a far score (the loss is never taken as below 1 / this).
const MAX_LIFT: f32 = 4.0;

/// The frame's measured loss of contrast with distance.
#[derive(Debug, Clone, PartialEq)]
pub struct ContrastLoss {
    /// Loss rate per unit of relative path `1/cos z` (`k = σ·h`).
    pub k: f32,
    /// Mean relative path of the near field's judged samples.
    pub m0: f32,
    /// The near field's clear-sky level (score at the middle of its clear samples).
    pub clear_near: f32,
    /// Each far band's clear-sky level, from [`NEAR_ZENITH_DEG`] in steps of 5° to 85° (NaN: not
    /// measured, and not lifted).
    pub clear_band: Vec<f32>,
}

impl ContrastLoss {
    /// The share of its overhead contrast a cloud keeps at zenith `z_deg` (1 within the near field).
    pub fn kept(&self, z_deg: f32) -> f32 {
        if z_deg <= NEAR_ZENITH_DEG {
            return 1.0;
        }
        let m = 1.0 / z_deg.min(89.0).to_radians().cos();
        (-self.k * (m - self.m0)).exp().clamp(1.0 / MAX_LIFT, 1.0)
    }

    /// The clear-sky level at zenith `z_deg`: linear between the measured bands' centres, the
    /// near field's level within it, the last measured band's beyond.
    pub fn clear_at(&self, z_deg: f32) -> f32 {
        let mut prev = (NEAR_ZENITH_DEG, self.clear_near);
        for (b, &c) in self.clear_band.iter().enumerate() {
            if !c.is_finite() {
                continue;
            }
            let mid = NEAR_ZENITH_DEG + BAND_DEG * (b as f32 + 0.5);
            if z_deg <= mid {
                let t = ((z_deg - prev.0) / (mid - prev.0)).clamp(0.0, 1.0);
                return prev.1 + t * (c - prev.1);
            }
            prev = (mid, c);
        }
        prev.1
    }

    /// A far sample's score as it would read overhead: its departure above its band's clear sky,
    /// lifted by the lost contrast. A score at or below the band's clear sky, and one in a band that
    /// was not measured (too few samples, cover unlike the near field's, or beyond 85°), is left as
    /// it is.
    pub fn lift(&self, score: f32, z_deg: f32) -> f32 {
        if z_deg <= NEAR_ZENITH_DEG {
            return score;
        }
        if !self.clear_band.get(band_of(z_deg)).is_some_and(|c| c.is_finite()) {
            return score;
        }
        let clear = self.clear_at(z_deg);
        if score <= clear {
            return score;
        }
        clear + (score - clear) / self.kept(z_deg)
    }
}

/// What the correction needs of one frame's samples (map cells or pixels).
pub struct Samples<'a> {
    /// Score per sample (NaN where not judged).
    pub score: &'a [f32],
    /// Class per sample (as u8).
    pub class: &'a [u8],
    /// Zenith per sample \[°\].
    pub z_deg: &'a [f32],
    /// Whether the sample was judged by its ratio alone (plain sky outside the glare) against a
    /// learned clear-sky reference: only those are measured and corrected (against the parametric
    /// default the far field's clear sky is not known well enough to measure a loss from). One
    /// entry per sample (a slice, not a closure: read for most samples of every frame).
    pub plain: &'a [bool],
}

/// The scores of `v` at the cloud and clear levels (quantiles, nearest rank), reordering `v`.
///
/// By selection, not a sort: the value of rank `k` in `f32::total_cmp`'s total order is the
/// sorted slice's `v[k]` bit for bit (values equal in that order have the same bits), found in
/// linear time. The higher rank first; the lower one is then among the values before it.
fn levels(v: &mut [f32], cloud_level: f32, clear_level: f32) -> (f32, f32) {
    let rank = |q: f32| ((v.len() - 1) as f32 * q).round() as usize;
    let (ic, il) = (rank(cloud_level), rank(clear_level));
    let (lo, hi) = (ic.min(il), ic.max(il));
    let (below, &mut at_hi, _) = v.select_nth_unstable_by(hi, f32::total_cmp);
    let at_lo = if lo == hi { at_hi } else { *below.select_nth_unstable_by(lo, f32::total_cmp).1 };
    if ic >= il { (at_hi, at_lo) } else { (at_lo, at_hi) }
}

/// The far band (0 from [`NEAR_ZENITH_DEG`], in steps of 5°) holding zenith `z_deg` > the near field.
///
/// Through i32 (a float-to-usize conversion is a slow instruction sequence on x86-64; this runs for
/// every far cell of every frame): the same band as the direct conversion for every zenith, with
/// NaN and anything below the near field band 0 either way.
fn band_of(z_deg: f32) -> usize {
    (((z_deg - NEAR_ZENITH_DEG) / BAND_DEG) as i32).max(0) as usize
}

/// Measure the frame's contrast loss and lift the far samples' classes by it (see the module's
/// documentation); returns the loss when one was measured.
pub fn correct(score: &[f32], z_deg: &[f32], plain: &[bool], class: &mut [u8], thick_at: impl Fn(f32) -> f32) -> Option<ContrastLoss> {
    let loss = measure(&Samples { score, class, z_deg, plain })?;
    reclassify(score, z_deg, plain, &loss, class, thick_at);
    Some(loss)
}

/// Measure the frame's contrast loss (the near field's clear and cloud levels against each far
/// band's); `None` when the frame cannot say (too little cloud near the zenith, much thin cloud
/// there, no far band with enough samples and a cover like the near field's) or shows none.
pub fn measure(s: &Samples) -> Option<ContrastLoss> {
    let judged = |k: usize| s.class[k] != Class::Unknown as u8 && s.plain[k] && s.score[k].is_finite();
    let cloudy = |c: u8| c == Class::Thin as u8 || c == Class::Thick as u8;
    let (mut near, mut near_cloudy, mut near_thin, mut m_sum) = (Vec::new(), 0usize, 0usize, 0.0f64);
    let n_bands = ((LAST_BAND_END_DEG - NEAR_ZENITH_DEG) / BAND_DEG) as usize;
    let mut bands: Vec<Vec<f32>> = vec![Vec::new(); n_bands];
    let mut band_cloudy = vec![0usize; n_bands];
    for k in (0..s.class.len()).filter(|&k| judged(k)) {
        let z = s.z_deg[k];
        if z < NEAR_ZENITH_DEG {
            near.push(s.score[k]);
            near_cloudy += cloudy(s.class[k]) as usize;
            near_thin += (s.class[k] == Class::Thin as u8) as usize;
            m_sum += 1.0 / f64::from(z.to_radians().cos());
        } else if z < LAST_BAND_END_DEG {
            let b = band_of(z);
            bands[b].push(s.score[k]);
            band_cloudy[b] += cloudy(s.class[k]) as usize;
        }
    }
    if near.len() < MIN_SAMPLES {
        return None;
    }
    let cloudy_share = near_cloudy as f32 / near.len() as f32;
    if cloudy_share < MIN_NEAR_CLOUDY_SHARE || near_thin as f32 > MAX_NEAR_THIN_SHARE * near_cloudy as f32 {
        return None;
    }
    // The levels halfway into the near field's cloud (from the top) and its clear sky (from
    // the bottom).
    let (cloud_level, clear_level) = (1.0 - 0.5 * cloudy_share, 0.5 * (1.0 - cloudy_share));
    let m0 = (m_sum / near.len() as f64) as f32;
    let (q_near, clear_near) = levels(&mut near, cloud_level, clear_level);
    if q_near - clear_near <= 0.0 {
        return None;
    }
    let (mut sxy, mut sxx) = (0.0f64, 0.0f64);
    let mut clear_band = vec![f32::NAN; bands.len()];
    for (b, v) in bands.iter_mut().enumerate() {
        if v.len() < MIN_SAMPLES || (band_cloudy[b] as f32 / v.len() as f32 - cloudy_share).abs() > MAX_SHARE_GAP {
            continue;
        }
        let z_mid = NEAR_ZENITH_DEG + BAND_DEG * (b as f32 + 0.5);
        let x = f64::from(1.0 / z_mid.to_radians().cos() - m0);
        let (q, c) = levels(v, cloud_level, clear_level);
        clear_band[b] = c;
        let ratio = ((q - c) / (q_near - clear_near)).clamp(1.0 / MAX_LIFT, 1.0);
        let w = v.len() as f64;
        sxy += w * x * f64::from(ratio.ln());
        sxx += w * x * x;
    }
    if sxx <= 0.0 {
        return None;
    }
    let k = (-sxy / sxx) as f32;
    (k > 0.0).then_some(ContrastLoss { k, m0, clear_near, clear_band })
}

/// Thin or thick again for the plain far cloudy samples (`plain`, as in [`Samples`]), from their
/// scores lifted by the frame's loss (`thick_at(z)`: the segmentation's thick threshold). Clear,
/// unknown and near samples and the scores are left as read; returns how many samples changed class.
pub fn reclassify(score: &[f32], z_deg: &[f32], plain: &[bool], loss: &ContrastLoss, class: &mut [u8], thick_at: impl Fn(f32) -> f32) -> usize {
    let mut changed = 0;
    for k in 0..class.len() {
        let z = z_deg[k];
        if z <= NEAR_ZENITH_DEG || class[k] <= Class::Clear as u8 || !plain[k] || !score[k].is_finite() {
            continue;
        }
        let lifted = loss.lift(score[k], z);
        let c = Class::Thin as u8 + u8::from(lifted >= thick_at(z));
        changed += usize::from(c != class[k]);
        class[k] = c;
    }
    changed
}

/// Promote far thin cells to thick where [`crate::segment::SegmentParams::far_thickness_from_zenith_deg`] asks for
/// it (see [`promote_far_cells`]); the floor is halfway between the thin and thick scores. Applied
/// to a map's cells and to an image's pixels alike.
pub fn far_thickness(class: &mut [u8], score: &[f32], z_deg: &[f32], params: &crate::segment::SegmentParams) {
    let floor = 0.5 * (params.thin_score + params.thick_score) as f32;
    promote_far_cells(class, score, z_deg, params.far_thickness_from_zenith_deg as f32, floor);
}

/// Zenith below which the cloudy cells set the thick share the far field is held to \[°\].
const SHARE_NEAR_ZENITH_DEG: f32 = 60.0;

/// Cloudy cells the near field needs before it sets the far field's thick share.
const SHARE_NEAR_MIN_CLOUDY: usize = 200;

/// Far from the zenith a pixel spans a wide stretch of the cloud plane and a long path of haze, so a
/// thick cloud there mixes with gaps and sky light and scores as thin: on an independent renderer's
/// broken cumulus the map called 25 % of cloudy cells thick at zenith 75–80° and 7 % at 80–84°,
/// against about 80 % within 60°. From `from_deg` on, in bands of 5°, the cloudy cells with the highest
/// scores are promoted from thin to thick until the band's thick share reaches that of the cloudy
/// cells within [`SHARE_NEAR_ZENITH_DEG`] (the cloud field's thickness taken as alike across the sky;
/// own choice). Only cells scoring at least `floor` are promoted (a veil stays thin); cloud and
/// clear are left as they were, and no cell is demoted. Off by default (see
/// [`crate::segment::SegmentParams::far_thickness_from_zenith_deg`]).
fn promote_far_cells(class: &mut [u8], score: &[f32], z_deg: &[f32], from_deg: f32, floor: f32) {
    let (thin, thick) = (Class::Thin as u8, Class::Thick as u8);
    let (mut near_thick, mut near_cloudy) = (0usize, 0usize);
    for k in 0..class.len() {
        if z_deg[k] < SHARE_NEAR_ZENITH_DEG && (class[k] == thin || class[k] == thick) {
            near_cloudy += 1;
            near_thick += (class[k] == thick) as usize;
        }
    }
    if near_cloudy < SHARE_NEAR_MIN_CLOUDY || from_deg >= 90.0 {
        return;
    }
    let share = near_thick as f64 / near_cloudy as f64;
    let mut lo = from_deg;
    while lo < 90.0 {
        let hi = lo + 5.0;
        let in_band = |k: usize| z_deg[k] >= lo && z_deg[k] < hi;
        let mut thin_cells: Vec<usize> = (0..class.len()).filter(|&k| in_band(k) && class[k] == thin).collect();
        let thick_n = (0..class.len()).filter(|&k| in_band(k) && class[k] == thick).count();
        let want = (share * (thin_cells.len() + thick_n) as f64).round() as usize;
        if want > thick_n {
            thin_cells.sort_by(|&a, &b| score[b].total_cmp(&score[a]));
            for &k in thin_cells.iter().take(want - thick_n).filter(|&&k| score[k] >= floor) {
                class[k] = thick;
            }
        }
        lo = hi;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The band through i32 is the direct conversion's for every zenith a cell can have, below the
    /// near field, at band edges and NaN (common practice, no source: a rewritten conversion must
    /// give the original's results).
    #[test]
    fn band_through_i32_is_the_direct_conversion() {
        let mut zs: Vec<f32> = (0..=18_000).map(|i| i as f32 * 0.01).collect();
        zs.extend([f32::NAN, -1.0, -0.0, NEAR_ZENITH_DEG, NEAR_ZENITH_DEG + BAND_DEG, f32::from_bits(NEAR_ZENITH_DEG.to_bits() + 1), f32::from_bits(NEAR_ZENITH_DEG.to_bits() - 1)]);
        for z in zs {
            assert_eq!(band_of(z), ((z - NEAR_ZENITH_DEG) / BAND_DEG) as usize, "zenith {z}");
        }
    }

    /// A frame of cloud and sky whose cloud scores fall with distance as the law says: the measured
    /// rate comes back, and reclassifying lifts far cumulus from thin to thick while clear sky stays
    /// clear.
    #[test]
    fn the_loss_rate_is_measured_and_far_cloud_lifted() {
        let k_true = 0.12f32;
        let (mut score, mut class, mut z) = (vec![], vec![], vec![]);
        let m0_guess = 1.0 / 30f32.to_radians().cos();
        for i in 0..20_000 {
            let zd = 85.0 * (i as f32 + 0.5) / 20_000.0;
            let cloud = i % 5 < 2; // 40 % cloud, thickness 1.0 overhead
            let m = 1.0 / zd.to_radians().cos();
            let kept = if zd < NEAR_ZENITH_DEG { 1.0 } else { (-k_true * (m - m0_guess)).exp() };
            let s = if cloud { 1.0 * kept } else { 0.05 };
            score.push(s);
            // Cloud is found as cloud (thin where its score fell under the thick threshold).
            class.push(if cloud { 2 + u8::from(s >= 0.875) } else { 1 });
            z.push(zd);
        }
        let plain = vec![true; z.len()];
        let samples = Samples { score: &score, class: &class, z_deg: &z, plain: &plain };
        let loss = measure(&samples).expect("a loss");
        // The near field's mean path differs from the guess used to draw the scores, so the rate
        // comes back up to that offset's effect (the fit goes through the near field's origin).
        assert!((loss.k - k_true).abs() < 0.03, "k {}", loss.k);
        let far_thick_before = (0..class.len()).filter(|&i| z[i] > 75.0 && class[i] == 3).count();
        let mut class2 = class.clone();
        let changed = reclassify(&score, &z, &plain, &loss, &mut class2, |_| 0.875);
        let far_thick_after = (0..class2.len()).filter(|&i| z[i] > 75.0 && class2[i] == 3).count();
        let far_cloud = (0..class2.len()).filter(|&i| z[i] > 75.0 && i % 5 < 2).count();
        assert!(changed > 0);
        assert_eq!(far_thick_before, 0);
        assert!(far_thick_after as f64 > 0.9 * far_cloud as f64, "{far_thick_after} of {far_cloud}");
        assert!((0..class2.len()).all(|i| i % 5 < 2 || class2[i] == 1), "clear sky stays clear");
    }

    /// Too little cloud overhead, no loss with distance, or much thin cloud overhead: nothing is
    /// measured.
    #[test]
    fn no_measurement_without_near_cloud_or_loss() {
        let z: Vec<f32> = (0..10_000).map(|i| 85.0 * (i as f32 + 0.5) / 10_000.0).collect();
        let plain = vec![true; z.len()];
        let clear_score = vec![0.05f32; z.len()];
        let clear_class = vec![1u8; z.len()];
        assert!(measure(&Samples { score: &clear_score, class: &clear_class, z_deg: &z, plain: &plain }).is_none());
        let score: Vec<f32> = (0..z.len()).map(|i| if i % 2 == 0 { 1.0 } else { 0.05 }).collect();
        let class: Vec<u8> = score.iter().map(|&s| if s > 0.5 { 3 } else { 1 }).collect();
        assert!(measure(&Samples { score: &score, class: &class, z_deg: &z, plain: &plain }).is_none());
        // A loss with distance, but a third of the near field's cloud is thin: a veil may lie over
        // the cumulus, and the frame is left alone.
        let lossy: Vec<f32> = (0..z.len()).map(|i| if i % 2 == 0 { (-0.1 * (1.0 / z[i].to_radians().cos() - 1.0)).exp() } else { 0.05 }).collect();
        let lossy_class = |thin_every: usize| -> Vec<u8> { (0..z.len()).map(|i| if i % 2 == 1 { 1 } else if i % thin_every == 0 { 2 } else { 3 }).collect() };
        assert!(measure(&Samples { score: &lossy, class: &lossy_class(1_000_000), z_deg: &z, plain: &plain }).is_some(), "all thick: measured");
        assert!(measure(&Samples { score: &lossy, class: &lossy_class(6), z_deg: &z, plain: &plain }).is_none(), "a third thin: left alone");
    }

    /// A far band whose cover is unlike the near field's (here: all cloud, against 40 % overhead)
    /// is neither measured nor lifted; the other bands still are.
    #[test]
    fn a_band_unlike_the_near_field_is_left_alone() {
        let (mut score, mut class, mut z) = (vec![], vec![], vec![]);
        for i in 0..20_000 {
            let zd = 85.0 * (i as f32 + 0.5) / 20_000.0;
            let in_odd_band = (70.0..75.0).contains(&zd);
            let cloud = in_odd_band || i % 5 < 2;
            let kept = if zd < NEAR_ZENITH_DEG { 1.0 } else { (-0.12 * (1.0 / zd.to_radians().cos() - 1.15)).exp() };
            let s = if cloud { kept } else { 0.05 };
            score.push(s);
            class.push(if cloud { 2 + u8::from(s >= 0.875) } else { 1 });
            z.push(zd);
        }
        let plain = vec![true; z.len()];
        let loss = measure(&Samples { score: &score, class: &class, z_deg: &z, plain: &plain }).expect("a loss");
        assert!(loss.clear_band[4].is_nan(), "70–75° is unlike the near field");
        assert!(loss.clear_band[5].is_finite(), "75–80° is measured");
        assert_eq!(loss.lift(0.6, 72.0), 0.6);
        assert!(loss.lift(0.6, 77.0) > 0.6);
        assert_eq!(loss.lift(0.6, 87.0), 0.6, "beyond 85°: not lifted");
    }

    /// The kept share is 1 near the zenith and falls, bounded, toward the horizon.
    #[test]
    fn kept_share_is_bounded_and_falls() {
        let l = ContrastLoss { k: 0.2, m0: 1.2, clear_near: 0.0, clear_band: vec![] };
        assert_eq!(l.kept(30.0), 1.0);
        assert!(l.kept(70.0) < 1.0 && l.kept(80.0) < l.kept(70.0));
        assert!((l.kept(89.0) - 1.0 / MAX_LIFT).abs() < 1e-6);
    }

    /// Far cloudy cells are promoted, highest score first, until their band's thick share matches
    /// the near field's; cells under the floor, clear cells and near cells stay as they were.
    #[test]
    fn far_thickness_matches_the_near_share() {
        let (clear, thin, thick) = (Class::Clear as u8, Class::Thin as u8, Class::Thick as u8);
        // 400 near cloudy cells, 3 in 4 thick; 100 far cloudy cells (zenith 77°), all thin, scores
        // 0.50–0.99; 50 far clear cells.
        let mut class = vec![];
        let mut score = vec![];
        let mut z = vec![];
        for k in 0..400 {
            class.push(if k % 4 == 0 { thin } else { thick });
            score.push(0.9);
            z.push(30.0);
        }
        for k in 0..100 {
            class.push(thin);
            score.push(0.5 + 0.0049 * k as f32);
            z.push(77.0);
        }
        for _ in 0..50 {
            class.push(clear);
            score.push(0.1);
            z.push(77.0);
        }
        let before = class.clone();
        promote_far_cells(&mut class, &score, &z, 90.0, 0.0);
        assert_eq!(class, before, "90° is off");
        promote_far_cells(&mut class, &score, &z, 70.0, 0.0);
        let far: Vec<u8> = class[400..500].to_vec();
        assert_eq!(far.iter().filter(|c| **c == thick).count(), 75);
        assert!(far[..25].iter().all(|c| *c == thin) && far[25..].iter().all(|c| *c == thick), "highest scores first");
        assert_eq!(&class[..400], &before[..400]);
        assert!(class[500..].iter().all(|c| *c == clear));
        // A floor above most far scores leaves those thin.
        let mut floored = before.clone();
        promote_far_cells(&mut floored, &score, &z, 70.0, 0.9);
        assert_eq!(floored[400..500].iter().filter(|c| **c == thick).count(), 100 - 82);
    }

    /// The levels by selection are the sorted slice's values at the nearest ranks, bit for bit
    /// (ties, signed zeros, one and two samples, either level the higher).
    #[test]
    fn levels_by_selection_are_the_sorted_ranks() {
        for n in [1usize, 2, 3, 10, 57, 400] {
            for (cloud, clear) in [(0.75, 0.25), (0.25, 0.75), (0.5, 0.5), (1.0, 0.0), (0.9, 0.1)] {
                let v: Vec<f32> = (0..n as u64)
                    .map(|k| match crate::rng::hash64(k ^ (n as u64) << 20) % 9 {
                        0 => 0.0,
                        1 => -0.0,
                        2 => 0.5,
                        h => h as f32 / 7.0 - 0.4 + (k % 5) as f32 * 1e-3,
                    })
                    .collect();
                let mut sorted = v.clone();
                sorted.sort_unstable_by(f32::total_cmp);
                let at = |q: f32| sorted[((n - 1) as f32 * q).round() as usize];
                let mut w = v.clone();
                let (c, l) = levels(&mut w, cloud, clear);
                assert_eq!((c.to_bits(), l.to_bits()), (at(cloud).to_bits(), at(clear).to_bits()), "n {n}, levels {cloud} {clear}");
            }
        }
    }
}
