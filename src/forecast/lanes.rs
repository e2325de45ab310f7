//! Four look-ups at once on CPUs with AVX2: [`HorizonLookUp::sum`]'s one-layer loop, four plant
//! points to a vector register. Lane by lane the same IEEE operations in the same order as the
//! scalar look-up ([`TransmittanceMap::box_mean_with`] after `Grid::to_cell`), and the points'
//! transmittances are summed one by one in the points' order, so the sums are bit for bit the
//! scalar loop's (a unit test compares them).

use std::arch::x86_64::*;

use super::lookup::{HorizonLookUp, ScaledPoint};
use super::tables::{FEATURES, SHARE_UNIT};

/// Whether the four-lane loop can run: AVX2, one layer, a box half-width whose bounds truncate
/// exactly to i32 ([`super::tables::MAX_EXACT_HALF_WIDTH`]) and a table whose offsets in i32
/// (five per entry, `5 (n + 1)²`) fit i32.
pub(super) fn usable(look: &HorizonLookUp) -> bool {
    look.n_layers == 1
        && look.r_cells[0].abs() <= super::tables::MAX_EXACT_HALF_WIDTH
        && look.tms[0].n < 20_000
        && std::arch::is_x86_feature_detected!("avx2")
}

/// Chunks of four points whose corners are found before any of their corners is read
/// ([`sum_one_layer`]).
const BATCH: usize = 8;

/// Sum of the points' beam transmittances (as used) and how many fell back, four points at a
/// time. Only when [`usable`].
///
/// The points go in batches of [`BATCH`] chunks of four, in three passes: each chunk's box
/// corners (offsets into the table), then each chunk's box means from its corners, then the sums
/// in the points' order. Done a chunk at a time, each look-up was one long chain of dependent
/// operations (a division, truncations, the corners' offsets, their reads, a second division)
/// and the CPU could not hold enough chunks in flight to hide it; in passes, the reads of a
/// chunk's corners do not wait on its own arithmetic. Every lane goes through the same operations
/// as before, so the sums are the same.
///
/// The points whose look-up leaves the map (or finds no known cell) fall back as
/// [`HorizonLookUp::fallback`] does: their look-ups at the sun-ray point now run four at a time
/// too, and [`HorizonLookUp::fallback_blend`] blends each. The last points (fewer than four) run
/// as a chunk of four whose spare lanes repeat the last point and are not summed.
///
/// One piece on purpose: the passes share the batch's buffers and the look-up's constants, held
/// in vector registers (the steps are macros within it: a function apart would not share the
/// target features, and its arguments would go through memory).
///
/// # Safety
/// The CPU must have AVX2 ([`usable`] checks it).
#[target_feature(enable = "avx2")]
pub(super) unsafe fn sum_one_layer(look: &HorizonLookUp, points: &[ScaledPoint]) -> (f64, usize) {
    let tm = &look.tms[0];
    let (adv, off, r, beams, bs) = (look.adv[0], look.off[0], look.r_cells[0], look.beams, look.beam_scale);
    let n = tm.n;
    let (w, top) = (n + 1, n as i32);
    let sat = &tm.sat;
    debug_assert_eq!(sat.len(), w * w);
    let flat = sat.as_flattened().as_ptr();
    let splat = _mm256_set1_pd;
    let (advx, advy, cell, h) = (splat(adv[0]), splat(adv[1]), splat(look.grid.cell_m), splat(look.grid.n as f64 / 2.0));
    let (offx, offy) = (splat(off[0]), splat(off[1]));
    let (half, one_half, m_half, n_m_half, rv) = (splat(0.5), splat(1.5), splat(-0.5), splat(n as f64 - 0.5), splat(r));
    let (zero_i, top_i, w_i) = (_mm_setzero_si128(), _mm_set1_epi32(top), _mm_set1_epi32(w as i32));
    let (unit, one, cap, bsv) = (splat(SHARE_UNIT), splat(1.0), splat(1.3), splat(bs));
    let bv: [__m256d; FEATURES] = std::array::from_fn(|q| splat(beams[q]));
    // (Macros, not closures: a closure would not share the function's target features.)
    //
    // Chunk `k`'s points (x, y) and how many of its lanes are points: a last chunk of fewer than
    // four repeats its last point in the spare lanes.
    macro_rules! chunk_xy {
        ($k:expr) => {{
            let base = 4 * $k;
            match points.get(base..base + 4) {
                Some(c) => {
                    // Each point's (x, y) on layer 0 is two f64 in a row: (x0 y0 x2 y2) and
                    // (x1 y1 x3 y3), then their even and odd lanes.
                    // SAFETY: unaligned loads of two f64 from each point's first [f64; 2].
                    let ld = |i: usize| unsafe { _mm_loadu_pd(c[i][0].as_ptr()) };
                    let (a, b) = (_mm256_insertf128_pd::<1>(_mm256_castpd128_pd256(ld(0)), ld(2)), _mm256_insertf128_pd::<1>(_mm256_castpd128_pd256(ld(1)), ld(3)));
                    (_mm256_unpacklo_pd(a, b), _mm256_unpackhi_pd(a, b), 4)
                }
                None => {
                    let rest = &points[base..];
                    let last = rest[rest.len() - 1];
                    let p: [[f64; 2]; 4] = std::array::from_fn(|i| rest.get(i).unwrap_or(&last)[0]);
                    (_mm256_set_pd(p[3][0], p[2][0], p[1][0], p[0][0]), _mm256_set_pd(p[3][1], p[2][1], p[1][1], p[0][1]), rest.len())
                }
            }
        }};
    }
    // The four points' box corners after `Grid::to_cell` of the points shifted by (sx, sy):
    // the corners' offsets into the table's i32 (five per entry) in the order (y1, x1), (y0, x1),
    // (y1, x0), (y0, x0), and a mask of the lanes whose box is on the map and not empty (bit i
    // for lane i).
    macro_rules! corners {
        ($x:expr, $y:expr, $sx:expr, $sy:expr) => {{
            // Grid::to_cell: (p / cell_m + n / 2) − 0.5.
            let cx = _mm256_sub_pd(_mm256_add_pd(_mm256_div_pd(_mm256_add_pd($x, $sx), cell), h), half);
            let cy = _mm256_sub_pd(_mm256_add_pd(_mm256_div_pd(_mm256_add_pd($y, $sy), cell), h), half);
            // Inside the map (ordered comparisons: NaN is outside); lanes outside take centre 0 so
            // that every truncation below is of a finite number under 2^30 in magnitude.
            let inside = _mm256_and_pd(
                _mm256_and_pd(_mm256_cmp_pd::<_CMP_GE_OQ>(cx, m_half), _mm256_cmp_pd::<_CMP_GE_OQ>(cy, m_half)),
                _mm256_and_pd(_mm256_cmp_pd::<_CMP_LE_OQ>(cx, n_m_half), _mm256_cmp_pd::<_CMP_LE_OQ>(cy, n_m_half)),
            );
            let (cx, cy) = (_mm256_and_pd(cx, inside), _mm256_and_pd(cy, inside));
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
            let valid = _mm256_movemask_pd(inside) & _mm_movemask_ps(_mm_castsi128_ps(nonempty));
            // Every bound is clamped to 0..=n, so every entry is below (n + 1)² whether the lane
            // is valid or not, and its offset below 5 (n + 1)² < 2^31 ([`usable`]).
            let offset = |yy: __m128i, xx: __m128i| {
                let e = _mm_add_epi32(_mm_mullo_epi32(yy, w_i), xx);
                _mm_add_epi32(_mm_slli_epi32::<2>(e), e)
            };
            ([offset(y1, x1), offset(y0, x1), offset(y1, x0), offset(y0, x0)], valid)
        }};
    }
    // The four lanes' box means from their corners ([`TransmittanceMap::box_mean_with`]: never
    // below 0), and a mask of the lanes whose box holds a known cell.
    macro_rules! means {
        ($corners:expr) => {{
            let mut offs = [[0u32; 4]; 4];
            for (o, c) in offs.iter_mut().zip($corners) {
                // SAFETY: four u32 into a [u32; 4].
                unsafe { _mm_storeu_si128(o.as_mut_ptr().cast(), c) };
            }
            let [oa, ob, oc, od] = offs;
            let mut shares = [_mm_setzero_si128(); 4];
            let mut counts = [_mm_setzero_si128(); 4];
            // a − b − c + d of four i32 at `at(entry)` of the lane's four corners.
            macro_rules! corner_sums {
                ($a:expr, $b:expr, $c:expr, $d:expr, $at:expr) => {{
                    let at = $at;
                    let (va, vb, vc, vd) = (_mm_loadu_si128(at($a)), _mm_loadu_si128(at($b)), _mm_loadu_si128(at($c)), _mm_loadu_si128(at($d)));
                    _mm_add_epi32(_mm_sub_epi32(_mm_sub_epi32(va, vb), vc), vd)
                }};
            }
            for i in 0..4 {
                // SAFETY: offsets of entries below (n + 1)² (`corners`), each entry five i32: the
                // four features (16 bytes from the entry's start) and the count (the last of the
                // 16 bytes from its second i32).
                unsafe {
                    let (a, b, c, d) = (flat.add(oa[i] as usize), flat.add(ob[i] as usize), flat.add(oc[i] as usize), flat.add(od[i] as usize));
                    shares[i] = corner_sums!(a, b, c, d, |e: *const i32| e.cast::<__m128i>());
                    counts[i] = corner_sums!(a, b, c, d, |e: *const i32| e.add(1).cast::<__m128i>());
                }
            }
            // Each lane's count: the fourth i32 of its `counts`.
            let cnt_i = _mm_unpackhi_epi64(_mm_unpackhi_epi32(counts[0], counts[1]), _mm_unpackhi_epi32(counts[2], counts[3]));
            let known = _mm_movemask_ps(_mm_castsi128_ps(_mm_cmpgt_epi32(cnt_i, zero_i)));
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
            (_mm256_max_pd(sum, _mm256_setzero_pd()), known)
        }};
    }
    let (mut tr_sum, mut fb_sum) = (0f64, 0usize);
    let chunks = points.len().div_ceil(4);
    let mut corner = [[_mm_setzero_si128(); 4]; BATCH];
    let mut valid = [0i32; BATCH];
    let mut used = [[0f64; 4]; BATCH];
    for first in (0..chunks).step_by(BATCH) {
        let batch = (chunks - first).min(BATCH);
        // The batch's corners.
        for k in 0..batch {
            let (x, y, _) = chunk_xy!(first + k);
            (corner[k], valid[k]) = corners!(x, y, advx, advy);
        }
        // Their box means, as used: scaled and capped (none where every lane is off the map).
        for k in 0..batch {
            if valid[k] == 0 {
                continue;
            }
            let (mean, known) = means!(corner[k]);
            valid[k] &= known;
            // SAFETY: four f64 into a [f64; 4].
            unsafe { _mm256_storeu_pd(used[k].as_mut_ptr(), _mm256_min_pd(_mm256_mul_pd(mean, bsv), cap)) };
        }
        // The sums in the points' order.
        for k in 0..batch {
            let u = &used[k];
            if valid[k] & 0b1111 == 0b1111 && 4 * (first + k) + 4 <= points.len() {
                tr_sum += u[0];
                tr_sum += u[1];
                tr_sum += u[2];
                tr_sum += u[3];
                continue;
            }
            let (x, y, lanes) = chunk_xy!(first + k);
            if valid[k] & 0b1111 == 0b1111 {
                for ui in &u[..lanes] {
                    tr_sum += ui;
                }
                continue;
            }
            // Some fall back: the state now at their sun-ray points, blended with the map's mean.
            let (at_now, on_map) = corners!(x, y, offx, offy);
            let (now, known) = means!(at_now);
            let now_valid = on_map & known;
            let mut nows = [0f64; 4];
            // SAFETY: four f64 into a [f64; 4].
            unsafe { _mm256_storeu_pd(nows.as_mut_ptr(), now) };
            for (i, ui) in u[..lanes].iter().enumerate() {
                if valid[k] & (1 << i) != 0 {
                    tr_sum += ui;
                } else {
                    fb_sum += 1;
                    let now = (now_valid & (1 << i) != 0).then_some(nows[i]);
                    tr_sum += (look.fallback_blend(0, now) * bs).min(1.3);
                }
            }
        }
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
            // Short runs (a last chunk of one to three points, or none) and runs that start at
            // every offset, so that each point falls in each lane.
            for (start, len) in [(0, 0), (0, 1), (5, 2), (7, 3), (1, 4), (2, 5), (3, 9), (9, 94)] {
                let part = &points[start..start + len];
                // SAFETY: AVX2 checked above.
                let lanes = unsafe { sum_one_layer(&look, part) };
                let scalar = look.sum_scalar(part);
                assert_eq!((lanes.0.to_bits(), lanes.1), (scalar.0.to_bits(), scalar.1), "r {r_cells}, points {start}..+{len}");
            }
        }
    }
}
