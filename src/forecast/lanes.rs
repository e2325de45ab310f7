//! Four look-ups at once on CPUs with AVX2: [`HorizonLookUp::sum`]'s one-layer loop, four plant
//! points to a vector register. Lane by lane the same IEEE operations in the same order as the
//! scalar look-up ([`TransmittanceMap::box_mean_with`] after `Grid::to_cell`), and the points'
//! transmittances are summed one by one in the points' order, so the sums are bit for bit the
//! scalar loop's (a unit test compares them).

use std::arch::x86_64::*;

use super::lookup::{HorizonLookUp, ScaledPoint};
use super::tables::{FEATURES, SHARE_UNIT};

/// Whether the four-lane loop can run: AVX2, one layer, a box half-width whose bounds truncate
/// exactly to i32 ([`super::tables::MAX_EXACT_HALF_WIDTH`]) and a table whose indices fit i32.
pub(super) fn usable(look: &HorizonLookUp) -> bool {
    look.n_layers == 1
        && look.r_cells[0].abs() <= super::tables::MAX_EXACT_HALF_WIDTH
        && look.tms[0].n < 40_000
        && std::arch::is_x86_feature_detected!("avx2")
}

/// Sum of the points' beam transmittances (as used) and how many fell back, four points at a
/// time. Only when [`usable`].
///
/// One piece on purpose: the four lanes' look-up from point to capped transmittance, in vector
/// registers throughout; split, the lanes would be stored and reloaded between the parts.
///
/// # Safety
/// The CPU must have AVX2 ([`usable`] checks it).
#[target_feature(enable = "avx2")]
pub(super) unsafe fn sum_one_layer(look: &HorizonLookUp, points: &[ScaledPoint]) -> (f64, usize) {
    let tm = &look.tms[0];
    let (adv, r, beams, bs) = (look.adv[0], look.r_cells[0], look.beams, look.beam_scale);
    let n = tm.n;
    let (w, top) = (n + 1, n as i32);
    let sat = &tm.sat;
    debug_assert_eq!(sat.len(), w * w);
    let splat = _mm256_set1_pd;
    let (advx, advy, cell, h) = (splat(adv[0]), splat(adv[1]), splat(look.grid.cell_m), splat(look.grid.n as f64 / 2.0));
    let (half, one_half, m_half, n_m_half, rv) = (splat(0.5), splat(1.5), splat(-0.5), splat(n as f64 - 0.5), splat(r));
    let (zero_i, top_i, w_i) = (_mm_setzero_si128(), _mm_set1_epi32(top), _mm_set1_epi32(w as i32));
    let (unit, one, cap, bsv) = (splat(SHARE_UNIT), splat(1.0), splat(1.3), splat(bs));
    let bv: [__m256d; FEATURES] = std::array::from_fn(|q| splat(beams[q]));
    let (mut tr_sum, mut fb_sum) = (0f64, 0usize);
    let mut chunks = points.chunks_exact(4);
    for ch in &mut chunks {
        let x = _mm256_set_pd(ch[3][0][0], ch[2][0][0], ch[1][0][0], ch[0][0][0]);
        let y = _mm256_set_pd(ch[3][0][1], ch[2][0][1], ch[1][0][1], ch[0][0][1]);
        // Grid::to_cell: (p / cell_m + n / 2) − 0.5.
        let cx = _mm256_sub_pd(_mm256_add_pd(_mm256_div_pd(_mm256_add_pd(x, advx), cell), h), half);
        let cy = _mm256_sub_pd(_mm256_add_pd(_mm256_div_pd(_mm256_add_pd(y, advy), cell), h), half);
        // Inside the map (ordered comparisons: NaN is outside); lanes outside take centre 0 so
        // that every truncation below is of a finite number under 2^30 in magnitude.
        let inside = _mm256_and_pd(
            _mm256_and_pd(_mm256_cmp_pd::<_CMP_GE_OQ>(cx, m_half), _mm256_cmp_pd::<_CMP_GE_OQ>(cy, m_half)),
            _mm256_and_pd(_mm256_cmp_pd::<_CMP_LE_OQ>(cx, n_m_half), _mm256_cmp_pd::<_CMP_LE_OQ>(cy, n_m_half)),
        );
        let (cx, cy) = (_mm256_and_pd(cx, inside), _mm256_and_pd(cy, inside));
        // (Macros, not closures: a closure would not share the function's target features.)
        macro_rules! clamp {
            ($v:expr) => {
                _mm_min_epi32(_mm_max_epi32($v, zero_i), top_i)
            };
        }
        let x0 = clamp!(_mm256_cvttpd_epi32(_mm256_add_pd(_mm256_sub_pd(cx, rv), half)));
        let x1 = clamp!(_mm256_cvttpd_epi32(_mm256_add_pd(_mm256_add_pd(cx, rv), one_half)));
        let y0 = clamp!(_mm256_cvttpd_epi32(_mm256_add_pd(_mm256_sub_pd(cy, rv), half)));
        let y1 = clamp!(_mm256_cvttpd_epi32(_mm256_add_pd(_mm256_add_pd(cy, rv), one_half)));
        let nonempty = _mm_and_si128(_mm_cmpgt_epi32(x1, x0), _mm_cmpgt_epi32(y1, y0));
        let mut valid = _mm256_movemask_pd(inside) & _mm_movemask_ps(_mm_castsi128_ps(nonempty));
        // Corners' indices; every bound is clamped to 0..=n, so every index is below (n + 1)²
        // whether the lane is valid or not.
        let mut idx = [[0i32; 4]; 4];
        for (out, (yy, xx)) in idx.iter_mut().zip([(y1, x1), (y0, x1), (y1, x0), (y0, x0)]) {
            // SAFETY: four i32 into a [i32; 4].
            unsafe { _mm_storeu_si128(out.as_mut_ptr().cast(), _mm_add_epi32(_mm_mullo_epi32(yy, w_i), xx)) };
        }
        let [ia, ib, ic, id] = idx;
        let mut shares = [_mm_setzero_si128(); 4];
        let mut cnt = [0i32; 4];
        for i in 0..4 {
            // SAFETY: indices below (n + 1)² = the table's length (above); each entry is five
            // i32, of which the first four (16 bytes) are the features.
            let (a, b, c, d) = unsafe { (sat.get_unchecked(ia[i] as usize), sat.get_unchecked(ib[i] as usize), sat.get_unchecked(ic[i] as usize), sat.get_unchecked(id[i] as usize)) };
            let (va, vb, vc, vd) = unsafe { (_mm_loadu_si128(a.as_ptr().cast()), _mm_loadu_si128(b.as_ptr().cast()), _mm_loadu_si128(c.as_ptr().cast()), _mm_loadu_si128(d.as_ptr().cast())) };
            shares[i] = _mm_add_epi32(_mm_sub_epi32(_mm_sub_epi32(va, vb), vc), vd);
            cnt[i] = a[FEATURES] - b[FEATURES] - c[FEATURES] + d[FEATURES];
        }
        // SAFETY: four i32 from a [i32; 4].
        let cnt_i = unsafe { _mm_loadu_si128(cnt.as_ptr().cast()) };
        valid &= _mm_movemask_ps(_mm_castsi128_ps(_mm_cmpgt_epi32(cnt_i, zero_i)));
        // Features across the lanes (a 4 × 4 transpose of the lanes' feature sums).
        let (t0, t1) = (_mm_unpacklo_epi32(shares[0], shares[1]), _mm_unpacklo_epi32(shares[2], shares[3]));
        let (t2, t3) = (_mm_unpackhi_epi32(shares[0], shares[1]), _mm_unpackhi_epi32(shares[2], shares[3]));
        let feat = [_mm_unpacklo_epi64(t0, t1), _mm_unpackhi_epi64(t0, t1), _mm_unpacklo_epi64(t2, t3), _mm_unpackhi_epi64(t2, t3)];
        // f = 1 / (SHARE_UNIT · cnt); share_q = sum_q · f; mean = Σ share_q · beam_q in order, ≥ 0.
        let cnt_f = _mm256_cvtepi32_pd(_mm_max_epi32(cnt_i, _mm_set1_epi32(1)));
        let f = _mm256_div_pd(one, _mm256_mul_pd(unit, cnt_f));
        let mut term = [_mm256_setzero_pd(); FEATURES];
        for q in 0..FEATURES {
            term[q] = _mm256_mul_pd(_mm256_mul_pd(_mm256_cvtepi32_pd(feat[q]), f), bv[q]);
        }
        let sum = _mm256_add_pd(_mm256_add_pd(_mm256_add_pd(term[0], term[1]), term[2]), term[3]);
        let mean = _mm256_max_pd(sum, _mm256_setzero_pd());
        let used = _mm256_min_pd(_mm256_mul_pd(mean, bsv), cap);
        let mut u = [0f64; 4];
        // SAFETY: four f64 into a [f64; 4].
        unsafe { _mm256_storeu_pd(u.as_mut_ptr(), used) };
        for (i, ui) in u.iter().enumerate() {
            if valid & (1 << i) != 0 {
                tr_sum += ui;
            } else {
                fb_sum += 1;
                tr_sum += (look.fallback(0, ch[i][0]) * bs).min(1.3);
            }
        }
    }
    // The last points (fewer than four), one by one after the others, as the scalar loop would.
    for ps in chunks.remainder() {
        let (tr, fell_back) = look.point_tr(ps);
        tr_sum += tr;
        fb_sum += fell_back as usize;
    }
    (tr_sum, fb_sum)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cloudmap::{CloudMap, Grid, MapParams};
    use crate::forecast::{IrradianceParams, TransmittanceMap};
    use crate::rng::hash64;
    use crate::segment::Class;

    /// The four-lane sums against the scalar loop, bit for bit, on a random map with unknown cells
    /// in and out of view, points on and off the map (so some fall back) and box half-widths from
    /// none to several cells (common practice, no source: a vectorised loop must give its scalar
    /// loop's results).
    #[test]
    fn four_lanes_sum_as_the_scalar_loop() {
        if !std::arch::is_x86_feature_detected!("avx2") {
            eprintln!("no AVX2 on this CPU: the four-lane loop is not used");
            return;
        }
        let g = Grid::new(&MapParams { cells: 64, ..Default::default() }, 1000.0);
        let n = g.n;
        let h = |k: u64| hash64(k ^ 0x5eed);
        let class: Vec<u8> = (0..n * n).map(|k| [Class::Clear, Class::Thin, Class::Thick, Class::Unknown][(h(k as u64) % 4) as usize] as u8).collect();
        let in_view = (0..n * n).map(|k| h(k as u64 + 7) % 3 != 0).collect();
        let brightness = (0..n * n).map(|k| (h(k as u64 + 11) % 200) as f32 / 1000.0 - 0.1).collect();
        let map = CloudMap { grid: g, score: vec![0.0; n * n], class, in_view, offset: 0.0, brightness, thin_depth: vec![] };
        let p = IrradianceParams { beam_cloud_brightness: 0.7, ..Default::default() };
        let tms = [TransmittanceMap::new(&map, &p)];
        let extent = g.cell_m * n as f64;
        // 103 points (not a multiple of four), some beyond the map's edge.
        let points: Vec<ScaledPoint> = (0..103u64)
            .map(|k| {
                let u = |s: u64| (h(k * 31 + s) % 10_000) as f64 / 10_000.0 - 0.5;
                [[u(1) * 1.3 * extent, u(2) * 1.3 * extent], [0.0; 2]]
            })
            .collect();
        for (r_cells, beam_scale) in [(0.0, 1.0), (0.4, 0.9), (1.7, 1.2), (6.0, 1.0)] {
            let look = HorizonLookUp {
                tms: &tms,
                grid: g,
                n_layers: 1,
                beams: [1.0, 0.45, 0.03, 0.7],
                off: [[130.0, -70.0], [0.0; 2]],
                adv: [[-220.0, 95.0], [0.0; 2]],
                r_cells: [r_cells, 0.0],
                means: [0.6, 1.0],
                rel: 1.0,
                wp: 0.5,
                beam_scale,
            };
            assert!(usable(&look));
            // SAFETY: AVX2 checked above.
            let lanes = unsafe { sum_one_layer(&look, &points) };
            let scalar = look.sum_scalar(&points);
            assert!(scalar.1 > 0 && scalar.1 < points.len(), "some points fall back, not all: {}", scalar.1);
            assert_eq!(lanes.0.to_bits(), scalar.0.to_bits(), "r {r_cells}: {} vs {}", lanes.0, scalar.0);
            assert_eq!(lanes.1, scalar.1);
        }
    }
}
