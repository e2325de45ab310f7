//! The sun's glare filled from the recent maps: the glare stays near the sun while the clouds move
//! through it, so a cell hidden by glare now was seen upstream in an earlier map. Used by the
//! forecast's tables and the tuning only ([`crate::forecast::IrradianceParams::glare_fill_from_history`]);
//! motion keeps measuring on the map as seen, so the sun's own region is never advected as cloud.

use crate::cloudmap::CloudMap;
use crate::segment::Class;

/// `map` with each glare cell (unknown, in view) taken from the most recent earlier map that saw
/// it: content at cell `x` now is the content at `x − v·Δt` in the map `Δt` ago (frozen cloud
/// moving at `v_mps` on the map's plane, the motion's own model), nearest cell, where that cell
/// was in view and known. `earlier` holds `(age_s, map)`, newest first; maps older than
/// `max_age_s` or on another grid are passed over. Cells no earlier map covers stay unknown (the
/// tables fill them from their neighbours). `None` when no cell was filled. Each filled cell's
/// index is returned with the map.
pub fn fill_glare_from_history<'a>(map: &CloudMap, earlier: impl IntoIterator<Item = (f64, &'a CloudMap)>, v_mps: [f64; 2], max_age_s: f64) -> Option<(CloudMap, Vec<usize>)> {
    let n = map.grid.n;
    let glare: Vec<usize> = (0..n * n).filter(|&k| map.in_view.get(k).copied().unwrap_or(false) && Class::from_u8(map.class[k]) == Class::Unknown).collect();
    if glare.is_empty() || !v_mps.iter().all(|v| v.is_finite()) {
        return None;
    }
    let mut out = map.clone();
    let mut open = glare.clone();
    let mut filled = vec![];
    for (age_s, e) in earlier {
        if open.is_empty() {
            break;
        }
        if !(age_s > 0.0 && age_s <= max_age_s) || e.grid != map.grid || e.class.len() != n * n {
            continue;
        }
        let (di, dj) = (v_mps[0] * age_s / map.grid.cell_m, v_mps[1] * age_s / map.grid.cell_m);
        open.retain(|&k| {
            let (i, j) = ((k % n) as f64 - di, (k / n) as f64 - dj);
            let (i, j) = (i.round(), j.round());
            if i < 0.0 || j < 0.0 || i >= n as f64 || j >= n as f64 {
                return true;
            }
            let s = j as usize * n + i as usize;
            if !e.in_view.get(s).copied().unwrap_or(false) || Class::from_u8(e.class[s]) == Class::Unknown {
                return true;
            }
            out.class[k] = e.class[s];
            out.score[k] = e.score.get(s).copied().unwrap_or(f32::NAN);
            if let (Some(b), Some(&v)) = (out.brightness.get_mut(k), e.brightness.get(s)) {
                *b = v;
            }
            if let (Some(d), Some(&v)) = (out.thin_depth.get_mut(k), e.thin_depth.get(s)) {
                *d = v;
            }
            filled.push(k);
            false
        });
    }
    (!filled.is_empty()).then_some((out, filled))
}

/// The map as each layer's table reads it: its glare filled ([`fill_glare_from_history`]) from the
/// kept maps `earlier()` gives (`(age_s, map)`, newest first), moved by each layer's motion
/// `layer_v`, with the layer labels where there are two (a filled cell goes with the layer whose
/// motion filled it: the kept maps carry no labels, so cloud of the other layer seen there counts
/// in both). Empty when no motion is tracked or no glare cell was filled.
pub fn layer_views<'a, I>(map: &CloudMap, earlier: impl Fn() -> I, layer_v: &[[f64; 2]], labels: Option<&[u8]>, max_age_s: f64) -> Vec<(CloudMap, Option<Vec<u8>>)>
where
    I: IntoIterator<Item = (f64, &'a CloudMap)>,
{
    if layer_v.is_empty() {
        return vec![];
    }
    let n_views = if labels.is_some() { layer_v.len().min(2) } else { 1 };
    let views: Vec<_> = layer_v[..n_views]
        .iter()
        .enumerate()
        .map(|(l, v)| match fill_glare_from_history(map, earlier(), *v, max_age_s) {
            Some((m, cells)) => {
                let lb = labels.map(|lb| {
                    let mut lb = lb.to_vec();
                    for k in cells {
                        lb[k] = l as u8;
                    }
                    lb
                });
                (Some(m), lb)
            }
            None => (None, labels.map(<[u8]>::to_vec)),
        })
        .collect();
    if views.iter().all(|(m, _)| m.is_none()) {
        return vec![];
    }
    views.into_iter().map(|(m, lb)| (m.unwrap_or_else(|| map.clone()), lb)).collect()
}

/// The cells the beam measured along the camera's sun line is put on
/// ([`crate::forecast::IrradianceParams::sun_line_beam`]): the cells in view within
/// [`crate::sundisk::SUN_RING_DEG`] of the sun's direction `sun_d` that are not thick cloud (the
/// glare, and the clear and thin classes, which near the sun the forward-scattered light whitens
/// alike; `dirs`: each cell's direction from the camera, the map's look-up table). Thick cells
/// keep their class: a cumulus there shades with its own transmittance.
pub fn sun_line_cells(map: &CloudMap, dirs: &[[f32; 3]], sun_d: [f64; 3]) -> Vec<usize> {
    let cos_ring = crate::sundisk::SUN_RING_DEG.to_radians().cos();
    let d = sun_d.map(|v| v as f32);
    (0..map.class.len().min(dirs.len()))
        .filter(|&k| {
            let u = dirs[k];
            map.in_view.get(k).copied().unwrap_or(false) && Class::from_u8(map.class[k]) != Class::Thick && u[0] * d[0] + u[1] * d[1] + u[2] * d[2] >= cos_ring
        })
        .collect()
}

/// The table features of a cell passing beam transmittance `t`: the mix of the clear and thick
/// classes whose beam at `beams` (clear, thin, thick, brightness) is `t` (clamped to the two).
pub fn sun_line_features(t: f64, beams: [f64; 4]) -> [f32; 4] {
    let span = beams[0] - beams[2];
    let w = if span > 1e-9 { ((t - beams[2]) / span).clamp(0.0, 1.0) } else { 1.0 };
    [w as f32, 0.0, (1.0 - w) as f32, 0.0]
}

/// With two layers (`labels`), the layer whose cloudy cells are more often thin: the veil, which
/// carries the sun line's beam (a cumulus layer under it is thick where it is cloud).
pub fn veil_layer(map: &CloudMap, labels: &[u8]) -> u8 {
    let mut thin = [0usize; 2];
    let mut cloudy = [0usize; 2];
    for (c, l) in map.class.iter().zip(labels) {
        let l = (*l as usize).min(1);
        match Class::from_u8(*c) {
            Class::Thin => {
                thin[l] += 1;
                cloudy[l] += 1;
            }
            Class::Thick => cloudy[l] += 1,
            _ => {}
        }
    }
    let share = |l: usize| if cloudy[l] > 0 { thin[l] as f64 / cloudy[l] as f64 } else { 0.0 };
    u8::from(share(1) > share(0))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_sun_line_beam_is_a_mix_of_clear_and_thick() {
        let beams = [1.0, 0.45, 0.05, 0.0];
        for t in [0.05, 0.3, 0.7, 1.0] {
            let f = sun_line_features(t, beams);
            let b: f64 = f.iter().zip(beams).map(|(s, b)| *s as f64 * b).sum();
            assert!((b - t).abs() < 1e-6 && (f[0] + f[2] - 1.0).abs() < 1e-6, "{t}: {f:?}");
        }
        assert_eq!(sun_line_features(1.5, beams), [1.0, 0.0, 0.0, 0.0]);
        assert_eq!(sun_line_features(0.0, beams), [0.0, 0.0, 1.0, 0.0]);
    }
    use crate::cloudmap::Grid;

    fn map(n: usize, class: impl Fn(usize, usize) -> Class) -> CloudMap {
        let class: Vec<u8> = (0..n * n).map(|k| class(k % n, k / n) as u8).collect();
        CloudMap { grid: Grid { n, cell_m: 100.0, height_m: 1000.0 }, score: vec![0.0; n * n], class, in_view: vec![true; n * n], offset: 0.0, brightness: vec![0.0; n * n], thin_depth: vec![0.5; n * n] }
    }

    /// A cloud edge at column 6 moving +x at 10 m/s (one 100-m cell per 10 s): 30 s ago the
    /// column-3 edge was seen; now a glare patch over columns 5..=8 hides it. The patch is filled
    /// from that map shifted three cells (thick left of column 6, clear from it on); with no
    /// history, or history too old, nothing is filled.
    #[test]
    fn glare_patch_is_filled_from_the_earlier_map_moved_by_the_motion() {
        let n = 16;
        let edge = |x: usize| if x < 6 { Class::Thick } else { Class::Clear };
        let earlier = map(n, |i, _| edge(i + 3));
        let glare = |i: usize, j: usize| (5..=8).contains(&i) && (5..=8).contains(&j);
        let now = map(n, |i, j| if glare(i, j) { Class::Unknown } else { edge(i) });
        let (filled, cells) = fill_glare_from_history(&now, [(30.0, &earlier)], [10.0, 0.0], 180.0).expect("filled");
        assert_eq!(cells.len(), 16);
        for j in 0..n {
            for i in 0..n {
                assert_eq!(filled.class[j * n + i], edge(i) as u8, "cell ({i}, {j})");
            }
        }
        assert!(fill_glare_from_history(&now, [(300.0, &earlier)], [10.0, 0.0], 180.0).is_none());
        assert!(fill_glare_from_history(&now, std::iter::empty(), [10.0, 0.0], 180.0).is_none());
        // An earlier map whose own glare covers the source cells leaves them to an older map.
        let older = map(n, |i, _| edge(i + 4));
        let blind = map(n, |i, j| if (3..=6).contains(&i) && (5..=8).contains(&j) { Class::Unknown } else { edge(i + 2) });
        let (filled, _) = fill_glare_from_history(&now, [(20.0, &blind), (40.0, &older)], [10.0, 0.0], 180.0).expect("filled");
        assert!((0..n * n).all(|k| filled.class[k] == edge(k % n) as u8));
    }
}
