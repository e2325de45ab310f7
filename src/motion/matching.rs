//! Block matching of one feature between two cloud maps: coarse-to-fine normalized
//! cross-correlation, sub-cell peak and Lucas–Kanade refinement (see the parent module's method).

use rayon::prelude::*;

use super::features::{MapFeatures, Plane, Prepared};
use super::{BlockVector, Motion, MotionParams};
use crate::cloudmap::CloudMap;

/// Dot product in eight lanes (vectorizes).
#[inline]
fn dot(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0f32; 8];
    let (ca, cb) = (a.chunks_exact(8), b.chunks_exact(8));
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for k in 0..8 {
            acc[k] += x[k] * y[k];
        }
    }
    let mut s: f32 = acc.iter().sum();
    for (x, y) in ra.iter().zip(rb) {
        s += x * y;
    }
    s
}

/// NCC of block `a` (side `b`, top-left `(ax, ay)` in map `pa`) against map `pb` displaced by
/// `(dx, dy)`, over cells known in both; `None` when too few overlap.
#[allow(clippy::too_many_arguments)]
fn ncc(pa: &Plane, tpl: (f64, f64, u32), pb: &Plane, n: usize, ax: usize, ay: usize, b: usize, dx: i64, dy: i64, min_pairs: usize) -> Option<f64> {
    // Fast path: the displaced block lies on the map and both windows are fully known (`tpl`: the
    // template block's sums).
    let (bx, by) = (ax as i64 + dx, ay as i64 + dy);
    if bx >= 0 && by >= 0 && bx as usize + b <= n && by as usize + b <= n {
        let (bx, by) = (bx as usize, by as usize);
        let (sa, saa, ka) = tpl;
        let (sb, sbb, kb) = pb.window(bx, by, b);
        if ka as usize == b * b && kb as usize == b * b {
            if b * b < min_pairs {
                return None;
            }
            let mut sab = 0f64;
            for j in 0..b {
                let (ra, rb) = ((ay + j) * n + ax, (by + j) * n + bx);
                sab += dot(&pa.v[ra..ra + b], &pb.v[rb..rb + b]) as f64;
            }
            return correlation((b * b) as f64, sa, sb, saa, sbb, sab);
        }
    }
    let (mut sw, mut sa, mut sb, mut saa, mut sbb, mut sab) = (0f64, 0f64, 0f64, 0f64, 0f64, 0f64);
    // Columns of the block that stay on the map after the shift.
    let i0 = (-(ax as i64 + dx)).max(0) as usize;
    let i1 = ((n as i64 - ax as i64 - dx).min(b as i64)).max(0) as usize;
    if i1 <= i0 {
        return None;
    }
    for j in 0..b {
        let yb = (ay + j) as i64 + dy;
        if yb < 0 || yb >= n as i64 {
            continue;
        }
        let ra = (ay + j) * n + ax;
        let rb = (yb as usize * n) as i64 + ax as i64 + dx;
        let (av, am) = (&pa.v[ra + i0..ra + i1], &pa.m[ra + i0..ra + i1]);
        let rb0 = (rb + i0 as i64) as usize;
        let (bv, bm) = (&pb.v[rb0..rb0 + (i1 - i0)], &pb.m[rb0..rb0 + (i1 - i0)]);
        // Six sums in eight lanes each, so that they vectorize.
        let (mut lw, mut la, mut lb, mut laa, mut lbb, mut lab) = ([0f32; 8], [0f32; 8], [0f32; 8], [0f32; 8], [0f32; 8], [0f32; 8]);
        let lanes = av.chunks_exact(8).zip(am.chunks_exact(8)).zip(bv.chunks_exact(8)).zip(bm.chunks_exact(8));
        for (((a, am), b), bm) in lanes {
            for l in 0..8 {
                let w = am[l] * bm[l];
                let (x, y) = (a[l] * w, b[l] * w);
                lw[l] += w;
                la[l] += x;
                lb[l] += y;
                laa[l] += x * a[l];
                lbb[l] += y * b[l];
                lab[l] += x * b[l];
            }
        }
        for k in av.len() / 8 * 8..av.len() {
            let w = am[k] * bm[k];
            let (x, y) = (av[k] * w, bv[k] * w);
            lw[0] += w;
            la[0] += x;
            lb[0] += y;
            laa[0] += x * av[k];
            lbb[0] += y * bv[k];
            lab[0] += x * bv[k];
        }
        let acc = [lw, la, lb, laa, lbb, lab];
        let t = acc.map(|v| v.iter().sum::<f32>() as f64);
        sw += t[0];
        sa += t[1];
        sb += t[2];
        saa += t[3];
        sbb += t[4];
        sab += t[5];
    }
    if (sw as usize) < min_pairs {
        return None;
    }
    correlation(sw, sa, sb, saa, sbb, sab)
}

/// The correlation coefficient from the sums over `n` pairs; `None` for a flat window.
#[inline]
fn correlation(n: f64, sa: f64, sb: f64, saa: f64, sbb: f64, sab: f64) -> Option<f64> {
    let cov = sab - sa * sb / n;
    let va = saa - sa * sa / n;
    let vb = sbb - sb * sb / n;
    if va <= 1e-9 || vb <= 1e-9 {
        return None;
    }
    Some(cov / (va * vb).sqrt())
}

/// Sub-cell peak offset from three samples: a Gaussian fit (parabola through the logarithms) when
/// all three are positive, else a parabola.
fn parabola_offset(l: f64, c: f64, r: f64) -> f64 {
    if l > 0.0 && c > 0.0 && r > 0.0 {
        let (ll, lc, lr) = (l.ln(), c.ln(), r.ln());
        let d = ll - 2.0 * lc + lr;
        if d < -1e-12 {
            return (0.5 * (ll - lr) / d).clamp(-0.5, 0.5);
        }
    }
    let d = l - 2.0 * c + r;
    if d.abs() < 1e-12 { 0.0 } else { (0.5 * (l - r) / d).clamp(-0.5, 0.5) }
}


/// Block vectors between maps `a` and `b` on their score feature.
pub(super) fn block_vectors(a: &CloudMap, xa: &MapFeatures, xb: &MapFeatures, dt_s: f64, params: &MotionParams, prior: Option<Motion>) -> (Vec<BlockVector>, usize, usize) {
    let r = a.grid.height_m * params.first_pass_max_zenith_deg.to_radians().tan();
    block_vectors_with(&xa.prepared, &xb.prepared, a, dt_s, params, prior, r)
}

/// Block vectors between two feature maps (`fa` earlier, `fb` later) on `a`'s grid (the features
/// are given back to the pool).
pub(super) fn block_vectors_between(fa: Vec<f32>, fb: Vec<f32>, a: &CloudMap, dt_s: f64, params: &MotionParams, prior: Option<Motion>) -> (Vec<BlockVector>, usize, usize) {
    let n = a.grid.n;
    block_vectors_with(&Prepared::new(fa, n, false), &Prepared::new(fb, n, true), a, dt_s, params, prior, f64::INFINITY)
}

/// Block vectors between two prepared feature maps on `a`'s grid.
///
/// One piece on purpose: it is the motion stage's hot loop (per block: search window, NCC peak,
/// sub-cell refinement, acceptance tests), and its locals (pooled buffers, the prior's window, the
/// counters) are shared across those steps for every block; split, they would be passed by the
/// dozen or reallocated per block.
fn block_vectors_with(xa: &Prepared, xb: &Prepared, a: &CloudMap, dt_s: f64, params: &MotionParams, prior: Option<Motion>, max_radius_m: f64) -> (Vec<BlockVector>, usize, usize) {
    let n = a.grid.n;
    let cell = a.grid.cell_m;
    let nc = xa.nc;
    let (ca, cb, pa, pb) = (&xa.coarse, &xb.coarse, &xa.fine, &xb.fine);
    let (fa, fb) = (&xa.feature, &xb.feature);
    let bs = params.block_cells.min(n / 2).max(8) / 4 * 4;
    let reach_cells = params.max_speed_mps * dt_s / cell;
    let rc = (reach_cells / 4.0).ceil() as i64 + 1;
    // Predictive window: around the filtered motion when it is well known, else the full window.
    let (pcx, pcy, prc) = match prior {
        Some(m) if m.sigma_mps < 2.0 => {
            let r = (((3.0 * m.sigma_mps + 3.0) * dt_s / cell) / 4.0).ceil() as i64 + 1;
            ((m.v_mps[0] * dt_s / cell / 4.0).round() as i64, (m.v_mps[1] * dt_s / cell / 4.0).round() as i64, r.min(rc))
        }
        _ => (0, 0, rc),
    };
    let mut starts = vec![];
    let mut y = 0;
    while y + bs <= n {
        let mut x = 0;
        while x + bs <= n {
            let c = a.grid.cell_centre_m(x + bs / 2, y + bs / 2);
            if c[0].hypot(c[1]) > max_radius_m {
                x += bs;
                continue;
            }
            starts.push((x, y));
            x += bs;
        }
        y += bs;
    }
    let tried = starts.len();
    let static_blocks = std::sync::atomic::AtomicUsize::new(0);
    let vectors: Vec<BlockVector> = starts
        .par_iter()
        .filter_map(|&(ax, ay)| {
            // Block statistics (the template's sums, reused by every fine NCC).
            let fine_tpl = pa.block_sums(ax, ay, bs);
            let (s, ss, k) = (fine_tpl.0, fine_tpl.1, fine_tpl.2 as usize);
            if (k as f64) < params.min_known * (bs * bs) as f64 {
                return None;
            }
            let mean = s / k as f64;
            let sd = (ss / k as f64 - mean * mean).max(0.0).sqrt();
            if sd < params.min_texture {
                return None;
            }
            // Coarse search on the maps reduced 4×: the predictive window first, the full window
            // when the peak sits on the predictive window's edge.
            let (cbx, cby, cbs) = (ax / 4, ay / 4, bs / 4);
            let min_c = (cbs * cbs) / 2;
            let coarse_tpl = ca.block_sums(cbx, cby, cbs);
            let search = |cx: i64, cy: i64, r: i64| {
                let mut scores = vec![];
                let mut best = (f64::MIN, 0i64, 0i64);
                for dy in cy - r..=cy + r {
                    for dx in cx - r..=cx + r {
                        if let Some(v) = ncc(ca, coarse_tpl, cb, nc, cbx, cby, cbs, dx, dy, min_c) {
                            scores.push((v, dx, dy));
                            if v > best.0 {
                                best = (v, dx, dy);
                            }
                        }
                    }
                }
                (scores, best)
            };
            let (mut scores, mut best) = search(pcx, pcy, prc);
            if prc < rc && ((best.1 - pcx).abs() == prc || (best.2 - pcy).abs() == prc) {
                (scores, best) = search(0, 0, rc);
            }
            if best.0 == f64::MIN || best.1.abs() >= rc || best.2.abs() >= rc {
                return None;
            }
            let second = scores
                .iter()
                .filter(|(_, dx, dy)| (dx - best.1).abs() > 2 || (dy - best.2).abs() > 2)
                .map(|s| s.0)
                .fold(f64::MIN, f64::max);
            if second > params.ambiguity * best.0 {
                return None;
            }
            // Fine search at full resolution around the coarse peak.
            let min_f = (params.min_known * (bs * bs) as f64 * 0.8) as usize;
            let (bx0, by0) = (best.1 * 4, best.2 * 4);
            // Hill climb within ±3 cells, starting where a parabola through the coarse peak and its
            // neighbours puts it: the 3×3 around the current best until the best is its centre.
            let mut fine = [[f64::NAN; 7]; 7];
            let eval = |ox: i64, oy: i64, fine: &mut [[f64; 7]; 7]| -> f64 {
                let (ix, iy) = ((ox + 3) as usize, (oy + 3) as usize);
                if fine[iy][ix].is_nan() {
                    fine[iy][ix] = ncc(pa, fine_tpl, pb, n, ax, ay, bs, bx0 + ox, by0 + oy, min_f).unwrap_or(f64::MIN);
                }
                fine[iy][ix]
            };
            let coarse_at = |dx: i64, dy: i64| scores.iter().find(|s| s.1 == dx && s.2 == dy).map(|s| s.0).unwrap_or(f64::NAN);
            let start = |l: f64, r: f64| {
                let o = parabola_offset(l, best.0, r);
                if o.is_nan() { 0 } else { (4.0 * o).round().clamp(-2.0, 2.0) as i64 }
            };
            let (sx0, sy0) = (
                start(coarse_at(best.1 - 1, best.2), coarse_at(best.1 + 1, best.2)),
                start(coarse_at(best.1, best.2 - 1), coarse_at(best.1, best.2 + 1)),
            );
            let mut fb_best = (eval(sx0, sy0, &mut fine), sx0, sy0);
            loop {
                let (cx0, cy0) = (fb_best.1, fb_best.2);
                for oy in (cy0 - 1).max(-3)..=(cy0 + 1).min(3) {
                    for ox in (cx0 - 1).max(-3)..=(cx0 + 1).min(3) {
                        let v = eval(ox, oy, &mut fine);
                        if v > fb_best.0 {
                            fb_best = (v, ox, oy);
                        }
                    }
                }
                if (fb_best.1, fb_best.2) == (cx0, cy0) || fb_best.1.abs() == 3 || fb_best.2.abs() == 3 {
                    break;
                }
            }
            if fb_best.0 < params.min_peak || fb_best.1.abs() == 3 || fb_best.2.abs() == 3 {
                return None;
            }
            let (bxf, byf) = (fb_best.1, fb_best.2);
            for (ox, oy) in [(bxf - 1, byf), (bxf + 1, byf), (bxf, byf - 1), (bxf, byf + 1)] {
                eval(ox, oy, &mut fine);
            }
            let (fx, fy) = ((bxf + 3) as usize, (byf + 3) as usize);
            let sub_x = parabola_offset(fine[fy][fx - 1], fine[fy][fx], fine[fy][fx + 1]);
            let sub_y = parabola_offset(fine[fy - 1][fx], fine[fy][fx], fine[fy + 1][fx]);
            let sub_x = if sub_x.is_nan() { 0.0 } else { sub_x };
            let sub_y = if sub_y.is_nan() { 0.0 } else { sub_y };
            let (dxc, dyc) = refine_lk(fa, fb, n, ax, ay, bs, ((bx0 + fb_best.1) as f64 + sub_x, (by0 + fb_best.2) as f64 + sub_y));
            // Static structure: matched within a cell of zero shift and unchanged there.
            if dxc.hypot(dyc) < 1.0 && zero_shift_change(fa, fb, n, ax, ay, bs) < params.static_tolerance {
                static_blocks.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                return None;
            }
            let c = a.grid.cell_centre_m(ax + bs / 2, ay + bs / 2);
            let v_mps = [dxc * cell / dt_s, dyc * cell / dt_s];
            // The search window has a cell of margin: a match beyond the largest plausible speed
            // is a false one.
            if v_mps[0].hypot(v_mps[1]) > params.max_speed_mps {
                return None;
            }
            // Opacity: the share of the block's matched cloud (cloudy cells whose feature is not
            // blanked) that is thick.
            let (thin_u8, thick_u8) = (crate::segment::Class::Thin as u8, crate::segment::Class::Thick as u8);
            let (mut n_thick, mut n_cloud) = (0usize, 0usize);
            for j in ay..ay + bs {
                for (c, f) in a.class[j * n + ax..j * n + ax + bs].iter().zip(&fa[j * n + ax..j * n + ax + bs]) {
                    if (*c == thin_u8 || *c == thick_u8) && *f != 0.0 && !f.is_nan() {
                        n_cloud += 1;
                        n_thick += (*c == thick_u8) as usize;
                    }
                }
            }
            let thick = n_thick as f64 / n_cloud.max(1) as f64;
            Some(BlockVector { centre_m: c, v_mps, peak: fb_best.0, mean_score: mean, thick_share: thick, weight: super::block_weight(c[0].hypot(c[1]), a.grid.height_m) })
        })
        .collect();
    (vectors, tried, static_blocks.into_inner())
}

/// Mean absolute difference of two feature maps over a block at zero shift (cells known in both).
fn zero_shift_change(fa: &[f32], fb: &[f32], n: usize, ax: usize, ay: usize, bs: usize) -> f64 {
    let (mut s, mut k) = (0.0f64, 0usize);
    for j in ay..ay + bs {
        for (x, y) in fa[j * n + ax..j * n + ax + bs].iter().zip(&fb[j * n + ax..j * n + ax + bs]) {
            if !x.is_nan() && !y.is_nan() {
                s += (x - y).abs() as f64;
                k += 1;
            }
        }
    }
    if k == 0 { f64::INFINITY } else { s / k as f64 }
}

/// Most Gauss–Newton steps of [`refine_lk`], and the step below which it stops \[cells\]: 0.02 of
/// a ~75 m cell over a 100 s baseline is 0.015 m/s. (4 steps to 0.005 cells gave the same motion
/// errors and skills on every synthetic scene to within 0.01 m/s and 0.006, at a third more cost.)
const LK_ITERATIONS: usize = 3;
const LK_TOLERANCE_CELLS: f64 = 0.02;

/// Sub-cell refinement of a block's displacement by Gauss–Newton on the squared difference,
/// with the template's own gradient (Lucas & Kanade 1981; the inverse-compositional idea of Baker
/// & Matthews 2004), starting from the NCC peak and kept within one cell of it. The displacement is
/// the same for every cell, so each iteration samples the current map bilinearly with one set of
/// weights, row by row.
///
/// One piece on purpose: one Gauss–Newton iteration loop whose sums are accumulated in a single
/// pass over the block's rows.
#[allow(clippy::too_many_arguments)]
fn refine_lk(fa: &[f32], fb: &[f32], n: usize, ax: usize, ay: usize, bs: usize, d0: (f64, f64)) -> (f64, f64) {
    // Template (value, gradient) per interior cell, zero where unknown; Hessian once.
    let m = bs - 2;
    let (mut ta, mut tgx, mut tgy) = (vec![0f32; m * m], vec![0f32; m * m], vec![0f32; m * m]);
    let (mut h11, mut h12, mut h22) = (0.0, 0.0, 0.0);
    for j in 1..bs - 1 {
        for i in 1..bs - 1 {
            let k = (ay + j) * n + ax + i;
            let (a, l, r, u, d) = (fa[k], fa[k - 1], fa[k + 1], fa[k - n], fa[k + n]);
            if a.is_nan() || l.is_nan() || r.is_nan() || u.is_nan() || d.is_nan() {
                continue;
            }
            let (gx, gy) = (0.5 * (r - l), 0.5 * (d - u));
            h11 += (gx * gx) as f64;
            h12 += (gx * gy) as f64;
            h22 += (gy * gy) as f64;
            let t = (j - 1) * m + i - 1;
            (ta[t], tgx[t], tgy[t]) = (a, gx, gy);
        }
    }
    let det = h11 * h22 - h12 * h12;
    if det.abs() < 1e-9 {
        return d0;
    }
    let mut d = d0;
    for _ in 0..LK_ITERATIONS {
        let (fx0, fy0) = (d.0.floor(), d.1.floor());
        let (fx, fy) = ((d.0 - fx0) as f32, (d.1 - fy0) as f32);
        let (w00, w10, w01, w11) = ((1.0 - fx) * (1.0 - fy), fx * (1.0 - fy), (1.0 - fx) * fy, fx * fy);
        let (ox, oy) = (fx0 as i64, fy0 as i64);
        // Interior columns whose four samples lie on the map.
        let x_lo = (-(ax as i64 + 1 + ox)).max(0);
        let x_hi = (n as i64 - 1 - (ax as i64 + 1 + ox)).min(m as i64);
        let (mut b1, mut b2) = (0f64, 0f64);
        if x_hi > x_lo {
            let (x_lo, x_hi) = (x_lo as usize, x_hi as usize);
            for j in 0..m {
                let y0 = (ay + 1 + j) as i64 + oy;
                if y0 < 0 || y0 + 1 >= n as i64 {
                    continue;
                }
                // First sampled column (on the map by the choice of x_lo, even when the block's
                // own first column plus the offset is not).
                let c0 = (ax as i64 + 1 + ox + x_lo as i64) as usize;
                let r0 = &fb[y0 as usize * n + c0..];
                let r1 = &fb[(y0 as usize + 1) * n + c0..];
                let t = j * m;
                let len = x_hi - x_lo;
                let (p00, p10) = (&r0[..len], &r0[1..1 + len]);
                let (p01, p11) = (&r1[..len], &r1[1..1 + len]);
                let (va, vx, vy) = (&ta[t + x_lo..t + x_hi], &tgx[t + x_lo..t + x_hi], &tgy[t + x_lo..t + x_hi]);
                // Eight lanes so that the sums vectorize; unknown cells give NaN and count zero.
                let (mut s1, mut s2) = ([0f32; 8], [0f32; 8]);
                let lanes = p00
                    .chunks_exact(8)
                    .zip(p10.chunks_exact(8))
                    .zip(p01.chunks_exact(8))
                    .zip(p11.chunks_exact(8))
                    .zip(va.chunks_exact(8))
                    .zip(vx.chunks_exact(8))
                    .zip(vy.chunks_exact(8));
                for ((((((a, b), c), d), v), gx), gy) in lanes {
                    for l in 0..8 {
                        let e = v[l] - (w00 * a[l] + w10 * b[l] + w01 * c[l] + w11 * d[l]);
                        let e = if e.is_nan() { 0.0 } else { e };
                        s1[l] += gx[l] * e;
                        s2[l] += gy[l] * e;
                    }
                }
                for i in len / 8 * 8..len {
                    let e = va[i] - (w00 * p00[i] + w10 * p10[i] + w01 * p01[i] + w11 * p11[i]);
                    let e = if e.is_nan() { 0.0 } else { e };
                    s1[0] += vx[i] * e;
                    s2[0] += vy[i] * e;
                }
                b1 += s1.iter().sum::<f32>() as f64;
                b2 += s2.iter().sum::<f32>() as f64;
            }
        }
        let (sx, sy) = ((h22 * b1 - h12 * b2) / det, (h11 * b2 - h12 * b1) / det);
        d = (d.0 + sx, d.1 + sy);
        if (d.0 - d0.0).abs() > 1.0 || (d.1 - d0.1).abs() > 1.0 {
            return d0;
        }
        if sx.abs() < LK_TOLERANCE_CELLS && sy.abs() < LK_TOLERANCE_CELLS {
            break;
        }
    }
    d
}
