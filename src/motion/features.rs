//! What motion prepares of each cloud map: the matched feature, its reductions, value/mask planes
//! with summed-area tables ([`MapFeatures`], kept with the map in the engine's history), and the
//! neighbourhood mismatch of two maps under a displacement with the residual cloud it leaves.

use crate::cloudmap::CloudMap;

/// Buffers reused from frame to frame: the feature maps, planes and tables are the same size every
/// frame, and taking fresh ones from the system allocator each time cost page faults (measured on
/// 512² frames: the first pass's preparation 1.1 ms with fresh buffers).
pub(super) mod pool {
    crate::pool::typed_pool!(take_f32, give_f32, f32, F32);
    crate::pool::typed_pool!(give_f64, f64, F64, sized = take_f64_sized);
    crate::pool::typed_pool!(give_u32, u32, U32, sized = take_u32_sized);
}

/// Mean over `f × f` cells, where at least half of them are known (NaN elsewhere).
///
/// A row of output cells at a time, each cell's known values summed in the order of the cell by
/// cell loop (its rows top to bottom, each left to right): an unknown value adds +0.0, which leaves
/// a sum that starts at +0.0 unchanged (such a sum is never −0.0), so the means are bit for bit
/// those of skipping it, without a branch per value (the passes over a row then vectorise).
pub(super) fn downsample(m: &[f32], n: usize, f: usize) -> (Vec<f32>, usize) {
    let nc = n / f;
    let mut out = pool::take_f32();
    out.resize(nc * nc, f32::NAN);
    if nc == 0 {
        return (out, nc);
    }
    match f {
        2 => downsample_rows(m, n, 2, &mut out),
        4 => downsample_rows(m, n, 4, &mut out),
        _ => downsample_rows(m, n, f, &mut out),
    }
    (out, nc)
}

/// [`downsample`]'s rows (always inlined: called with the factors 2 and 4 as constants, its inner
/// loop is unrolled for them).
#[inline(always)]
fn downsample_rows(m: &[f32], n: usize, f: usize, out: &mut [f32]) {
    let nc = n / f;
    let (mut s, mut c) = (vec![0f32; nc], vec![0u32; nc]);
    for (j, out_row) in out.chunks_exact_mut(nc).enumerate() {
        s.fill(0.0);
        c.fill(0);
        for dj in 0..f {
            let row = &m[(j * f + dj) * n..(j * f + dj) * n + nc * f];
            for ((si, ci), vs) in s.iter_mut().zip(c.iter_mut()).zip(row.chunks_exact(f)) {
                for v in vs {
                    let known = !v.is_nan();
                    *si += if known { *v } else { 0.0 };
                    *ci += known as u32;
                }
            }
        }
        mean_where_half_known(out_row, &s, &c, (f * f) as u32);
    }
}

/// An output row of [`downsample`]: the mean where at least half of the `cells` are known.
fn mean_where_half_known(out_row: &mut [f32], s: &[f32], c: &[u32], cells: u32) {
    for ((o, si), ci) in out_row.iter_mut().zip(s).zip(c) {
        if 2 * ci >= cells {
            *o = si / *ci as f32;
        }
    }
}

/// A feature map split into values (unknown set to zero) and a 0/1 mask, for branch-free sums,
/// optionally with summed-area tables of the values, their squares and the mask: a window that is
/// fully known in both maps then gets its sums in O(1) and only the cross term is summed cell by
/// cell. The searched (later) map needs the tables; the template side sums each block once.
pub(super) struct Plane {
    n: usize,
    pub(super) v: Vec<f32>,
    pub(super) m: Vec<f32>,
    s1: Vec<f64>,
    s2: Vec<f64>,
    cnt: Vec<u32>,
}

/// Of a summed-area table with rows of `w` entries: table row `j` (entries 1..w, read) and rows
/// `j + 1` and `j + 2` (entries 1..w, to write; their entry 0 set to zero here).
#[inline(always)]
fn two_rows<T: Copy + Default>(t: &mut [T], j: usize, w: usize) -> (&[T], &mut [T], &mut [T]) {
    let n = w - 1;
    let (above, below) = t.split_at_mut((j + 1) * w);
    let (a, b) = below[..2 * w].split_at_mut(w);
    a[0] = T::default();
    b[0] = T::default();
    // Each of length n exactly (so the caller's loop over 0..n needs no bounds checks).
    (&above[j * w + 1..j * w + 1 + n], &mut a[1..1 + n], &mut b[1..1 + n])
}

/// Of a summed-area table with rows of `w` entries: table row `j` (entries 1..w, read) and row
/// `j + 1` (entries 1..w, to write; its entry 0 set to zero here).
#[inline(always)]
fn one_row<T: Copy + Default>(t: &mut [T], j: usize, w: usize) -> (&[T], &mut [T]) {
    let n = w - 1;
    let (above, below) = t.split_at_mut((j + 1) * w);
    let a = &mut below[..w];
    a[0] = T::default();
    (&above[j * w + 1..j * w + 1 + n], &mut a[1..1 + n])
}

impl Plane {
    fn new(f: &[f32], n: usize, tables: bool) -> Plane {
        let (mut v, mut m) = (pool::take_f32(), pool::take_f32());
        v.extend(f.iter().map(|x| if x.is_nan() { 0.0 } else { *x }));
        m.extend(f.iter().map(|x| if x.is_nan() { 0.0 } else { 1.0 }));
        if !tables {
            return Plane { n, v, m, s1: vec![], s2: vec![], cnt: vec![] };
        }
        let w = n + 1;
        // Pooled tables of the same size when there are (their old entries, each overwritten
        // below: row 0 and column 0 zero, every other entry its sum), so no zero-fill and no copy.
        let (mut s1, mut s2, mut cnt) = (pool::take_f64_sized(w * w, 0.0), pool::take_f64_sized(w * w, 0.0), pool::take_u32_sized(w * w, 0));
        s1[..w].fill(0.0);
        s2[..w].fill(0.0);
        cnt[..w].fill(0);
        // Each table row is its row's prefix sums plus the table row above, built in one pass in
        // place (no zero-fill first, no second pass): the same additions of the same operands as
        // prefix sums first and a pass adding each row's above after. Two rows at a time (six
        // independent running sums, so the adds' latency overlaps), on row slices of length n (no
        // bounds checks).
        let mut j = 0;
        while j + 1 < n {
            let (va, vb) = (&v[j * n..j * n + n], &v[(j + 1) * n..(j + 1) * n + n]);
            let (ma, mb) = (&m[j * n..j * n + n], &m[(j + 1) * n..(j + 1) * n + n]);
            let ((u1, ra1, rb1), (u2, ra2, rb2), (uc, rac, rbc)) = (two_rows(&mut s1, j, w), two_rows(&mut s2, j, w), two_rows(&mut cnt, j, w));
            let (u1, ra1, rb1, u2, ra2, rb2) = (&u1[..n], &mut ra1[..n], &mut rb1[..n], &u2[..n], &mut ra2[..n], &mut rb2[..n]);
            let (uc, rac, rbc) = (&uc[..n], &mut rac[..n], &mut rbc[..n]);
            let (mut a1, mut a2, mut ac) = (0f64, 0f64, 0u32);
            let (mut b1, mut b2, mut bc) = (0f64, 0f64, 0u32);
            for i in 0..n {
                let (x, y) = (va[i] as f64, vb[i] as f64);
                a1 += x;
                a2 += x * x;
                ac += ma[i] as u32;
                b1 += y;
                b2 += y * y;
                bc += mb[i] as u32;
                let (t1, t2, tc) = (a1 + u1[i], a2 + u2[i], ac + uc[i]);
                ra1[i] = t1;
                ra2[i] = t2;
                rac[i] = tc;
                rb1[i] = b1 + t1;
                rb2[i] = b2 + t2;
                rbc[i] = bc + tc;
            }
            j += 2;
        }
        if j < n {
            let (vr, mr) = (&v[j * n..j * n + n], &m[j * n..j * n + n]);
            let ((u1, t1), (u2, t2), (uc, tc)) = (one_row(&mut s1, j, w), one_row(&mut s2, j, w), one_row(&mut cnt, j, w));
            let (u1, t1, u2, t2, uc, tc) = (&u1[..n], &mut t1[..n], &u2[..n], &mut t2[..n], &uc[..n], &mut tc[..n]);
            let (mut r1, mut r2, mut rc) = (0f64, 0f64, 0u32);
            for i in 0..n {
                let x = vr[i] as f64;
                r1 += x;
                r2 += x * x;
                rc += mr[i] as u32;
                t1[i] = r1 + u1[i];
                t2[i] = r2 + u2[i];
                tc[i] = rc + uc[i];
            }
        }
        Plane { n, v, m, s1, s2, cnt }
    }

    /// Sums of values, squares and known cells over the window of side `b` at `(x, y)` (from the
    /// tables).
    #[inline]
    pub(super) fn window(&self, x: usize, y: usize, b: usize) -> (f64, f64, u32) {
        let w = self.n + 1;
        let (a, c, d, e) = (y * w + x, y * w + x + b, (y + b) * w + x, (y + b) * w + x + b);
        (
            self.s1[e] - self.s1[c] - self.s1[d] + self.s1[a],
            self.s2[e] - self.s2[c] - self.s2[d] + self.s2[a],
            self.cnt[e] + self.cnt[a] - self.cnt[c] - self.cnt[d],
        )
    }

    /// The same sums, cell by cell (for a template block, once).
    pub(super) fn block_sums(&self, x: usize, y: usize, b: usize) -> (f64, f64, u32) {
        let (mut s1, mut s2, mut k) = (0f64, 0f64, 0u32);
        for j in y..y + b {
            for i in j * self.n + x..j * self.n + x + b {
                let v = self.v[i] as f64;
                s1 += v;
                s2 += v * v;
                k += self.m[i] as u32;
            }
        }
        (s1, s2, k)
    }
}

/// Give a feature map back to the buffer pool.
pub(super) fn recycle(v: Vec<f32>) {
    pool::give_f32(v);
}

impl Drop for Plane {
    /// Give the buffers back to the pool.
    fn drop(&mut self) {
        for v in [std::mem::take(&mut self.v), std::mem::take(&mut self.m)] {
            if v.capacity() > 0 {
                pool::give_f32(v);
            }
        }
        for v in [std::mem::take(&mut self.s1), std::mem::take(&mut self.s2)] {
            if v.capacity() > 0 {
                pool::give_f64(v);
            }
        }
        let c = std::mem::take(&mut self.cnt);
        if c.capacity() > 0 {
            pool::give_u32(c);
        }
    }
}

/// A feature map prepared for block matching: the feature, and its planes at full resolution and
/// reduced 4× (with summed-area tables when the map is searched).
pub(super) struct Prepared {
    pub(super) feature: Vec<f32>,
    pub(super) fine: Plane,
    pub(super) coarse: Plane,
    pub(super) nc: usize,
}

impl Prepared {
    pub(super) fn new(feature: Vec<f32>, n: usize, tables: bool) -> Prepared {
        let (coarse_raw, nc) = downsample(&feature, n, 4);
        let coarse = Plane::new(&coarse_raw, nc, tables);
        pool::give_f32(coarse_raw);
        let fine = Plane::new(&feature, n, tables);
        Prepared { feature, fine, coarse, nc }
    }
}

impl Drop for Prepared {
    fn drop(&mut self) {
        let f = std::mem::take(&mut self.feature);
        if f.capacity() > 0 {
            pool::give_f32(f);
        }
    }
}

/// What motion needs of one cloud map, computed once: a map is searched when it is the later of a
/// pair and serves as the template when a later frame is matched against it, so the engine keeps
/// these with the map in its history (before, each map's feature, planes and reductions were
/// computed twice, and the score feature four times).
pub struct MapFeatures {
    pub(super) prepared: Prepared,
    /// The feature reduced 2× (for the residual share).
    half: Vec<f32>,
    nh: usize,
}

impl MapFeatures {
    /// Prepare a map, matching cells up to [`MATCH_MAX_ZENITH_DEG`].
    pub fn new(m: &CloudMap) -> MapFeatures {
        Self::within_zenith(m, MATCH_MAX_ZENITH_DEG)
    }

    /// Prepare a map, matching only cells whose direction is within `max_zenith_deg` of the
    /// zenith: nearer the horizon a pixel spans several cells, the map moves in whole-pixel steps
    /// and a match there is pulled toward zero shift.
    pub fn within_zenith(m: &CloudMap, max_zenith_deg: f64) -> MapFeatures {
        let n = m.grid.n;
        let mut feature = score_feature(m);
        for &k in beyond_zenith(&m.grid, max_zenith_deg).iter() {
            feature[k as usize] = f32::NAN;
        }
        let (half, nh) = downsample(&feature, n, 2);
        MapFeatures { prepared: Prepared::new(feature, n, true), half, nh }
    }

    /// The score feature.
    pub fn feature(&self) -> &[f32] {
        &self.prepared.feature
    }
}

impl Drop for MapFeatures {
    fn drop(&mut self) {
        let h = std::mem::take(&mut self.half);
        if h.capacity() > 0 {
            pool::give_f32(h);
        }
    }
}

/// Cells beyond this zenith angle \[°\] are not matched (the map reaches at most 85°, so by
/// default all are). Near the horizon a pixel spans several cells (about 1.4 per pixel radially at
/// 70° on a 256-cell map of a 512² fisheye, 3 at 80°); the map reads those pixels bilinearly
/// ([`crate::cloudmap::Lut::bilinear`]) so that it moves smoothly there rather than in whole-pixel
/// steps. Measured on the independent renderer's broken cumulus with the camera from `calibrate`:
/// nearest-pixel reading biased the motion 0.5 m/s slow, bilinear 0.4 m/s mean vector error with
/// all cells, 0.03 m/s within 72°; on the project's two-layer scene a 72° limit lost the upper
/// layer (10-minute skill 0.32 → −0.05), so the whole map is matched.
pub const MATCH_MAX_ZENITH_DEG: f64 = 85.0;

/// The cells of a grid whose centre lies beyond `max_zenith_deg` from the camera (on the grid's
/// plane), computed once per grid and limit and kept per thread: the grid changes only with the
/// cloud base height, and computing them for every map (a `hypot` per cell) was a tenth of the
/// engine's instructions per 1024² frame.
fn beyond_zenith(grid: &crate::cloudmap::Grid, max_zenith_deg: f64) -> std::rc::Rc<Vec<u32>> {
    type Key = (usize, u64, u64, u64);
    thread_local! {
        static KEPT: std::cell::RefCell<Option<(Key, std::rc::Rc<Vec<u32>>)>> = const { std::cell::RefCell::new(None) };
    }
    let key = (grid.n, grid.cell_m.to_bits(), grid.height_m.to_bits(), max_zenith_deg.to_bits());
    if let Some(v) = KEPT.with(|k| k.borrow().as_ref().filter(|(kk, _)| *kk == key).map(|(_, v)| v.clone())) {
        return v;
    }
    let n = grid.n;
    let r_max = grid.height_m * max_zenith_deg.to_radians().tan();
    // Nothing to blank when the limit lies beyond the grid's corners.
    let corner_m = std::f64::consts::SQRT_2 * grid.cell_m * n as f64 / 2.0;
    let mut out = vec![];
    for j in 0..if r_max >= corner_m { 0 } else { n } {
        for i in 0..n {
            let c = grid.cell_centre_m(i, j);
            if c[0].hypot(c[1]) > r_max {
                out.push((j * n + i) as u32);
            }
        }
    }
    let v = std::rc::Rc::new(out);
    KEPT.with(|k| *k.borrow_mut() = Some((key, v.clone())));
    v
}

/// The matched feature of a map: the cloudiness score clipped to [−0.5, 1.5], NaN where unknown.
pub(super) fn score_feature(m: &CloudMap) -> Vec<f32> {
    let mut out = pool::take_f32();
    out.extend(m.score.iter().map(|v| if v.is_nan() { f32::NAN } else { v.clamp(-0.5, 1.5) }));
    out
}

/// Mean absolute difference of two feature maps (`n × n`, NaN unknown) around each cell of `fb`
/// under a displacement `d` (cells, from `fa` to `fb`): `|fb(y) − fa(y − d)|`, `fa` sampled
/// bilinearly, averaged over the (2r + 1)² box around y, over the pairs both known. NaN where the
/// box holds no such pair.
///
/// One piece on purpose: the bilinear resampling and the two summed-area tables are built and read
/// in one pass over shared buffers (a hot loop of the residual-cloud search).
pub(super) fn box_mismatch(fa: &[f32], fb: &[f32], n: usize, d: [f64; 2], r: usize) -> Vec<f32> {
    // Per-cell differences and counts (row slices, so the inner loops vectorize), then the box
    // sums: a sliding window along each row, then running sums down the columns.
    let (mut dv, mut dc) = (pool::take_f32(), pool::take_f32());
    dv.resize(n * n, 0.0);
    dc.resize(n * n, 0.0);
    shifted_rows(fa, fb, n, d, |j, i0, r0, r1, rb, [w00, w10, w01, w11]| {
        let (ov, oc) = (&mut dv[j * n + i0..j * n + i0 + rb.len()], &mut dc[j * n + i0..j * n + i0 + rb.len()]);
        for i in 0..rb.len() {
            let y = w00 * r0[i] + w10 * r0[i + 1] + w01 * r1[i] + w11 * r1[i + 1];
            let e = (rb[i] - y).abs();
            let ok = !e.is_nan();
            ov[i] = if ok { e } else { 0.0 };
            oc[i] = if ok { 1.0 } else { 0.0 };
        }
    });
    // Along rows: the window [i − r, i + r] clipped to the map.
    let (mut hv, mut hc) = (pool::take_f32(), pool::take_f32());
    hv.resize(n * n, 0.0);
    hc.resize(n * n, 0.0);
    for (src, dst) in [(&dv, &mut hv), (&dc, &mut hc)] {
        for j in 0..n {
            let (row, out) = (&src[j * n..j * n + n], &mut dst[j * n..j * n + n]);
            let mut acc: f32 = row[..r.min(n)].iter().sum();
            for i in 0..n {
                if i + r < n {
                    acc += row[i + r];
                }
                if i > r {
                    acc -= row[i - r - 1];
                }
                out[i] = acc;
            }
        }
    }
    // Down the columns, a running sum of rows [j − r, j + r].
    let mut out = pool::take_f32();
    out.resize(n * n, f32::NAN);
    let (mut av, mut ac) = (vec![0f32; n], vec![0f32; n]);
    for jj in 0..r.min(n) {
        for i in 0..n {
            av[i] += hv[jj * n + i];
            ac[i] += hc[jj * n + i];
        }
    }
    for j in 0..n {
        if j + r < n {
            let (rv, rc) = (&hv[(j + r) * n..(j + r) * n + n], &hc[(j + r) * n..(j + r) * n + n]);
            for i in 0..n {
                av[i] += rv[i];
                ac[i] += rc[i];
            }
        }
        if j > r {
            let (rv, rc) = (&hv[(j - r - 1) * n..(j - r) * n], &hc[(j - r - 1) * n..(j - r) * n]);
            for i in 0..n {
                av[i] -= rv[i];
                ac[i] -= rc[i];
            }
        }
        for (o, (v, c)) in out[j * n..j * n + n].iter_mut().zip(av.iter().zip(&ac)) {
            // Counts are small whole numbers, exact in f32; a count of zero leaves NaN.
            if *c > 0.5 {
                *o = v / c;
            }
        }
    }
    for v in [dv, dc, hv, hc] {
        pool::give_f32(v);
    }
    out
}

/// The change of a feature map that a layer moving by `d` (cells, from `fa` to `fb`) does not
/// explain: `fb(y) − fa(y − d)`, `fa` sampled bilinearly; NaN where either is unknown or `y − d`
/// leaves the map. A layer that moves by `d` unchanged cancels; what is left of a second layer
/// moving otherwise is its own pattern at the later time minus its pattern at the earlier time
/// moved by `d` (see [`super::measure_with`], the cancelled-layer pass).
pub(super) fn cancelled_difference(fa: &[f32], fb: &[f32], n: usize, d: [f64; 2]) -> Vec<f32> {
    let mut out = pool::take_f32();
    out.resize(n * n, f32::NAN);
    shifted_rows(fa, fb, n, d, |j, i0, r0, r1, rb, [w00, w10, w01, w11]| {
        let o = &mut out[j * n + i0..j * n + i0 + rb.len()];
        for i in 0..rb.len() {
            o[i] = rb[i] - (w00 * r0[i] + w10 * r0[i + 1] + w01 * r1[i] + w11 * r1[i + 1]);
        }
    });
    out
}

/// `fa` sampled bilinearly at y − d beside `fb` at y (maps `n × n`, `d` in cells), row by row: for
/// each row `j` of `fb` whose samples of `fa` are on the map, `row(j, i0, r0, r1, rb, w)` with `rb`
/// the row's columns `i0..i0 + rb.len()` of `fb`, `r0` and `r1` the two rows of `fa` around y − d
/// (one sample longer), and the bilinear weights `w`: `fa(y − d)` at column `i0 + i` is
/// `w[0]·r0[i] + w[1]·r0[i + 1] + w[2]·r1[i] + w[3]·r1[i + 1]`. Row slices, so the callers' inner
/// loops vectorize.
fn shifted_rows(fa: &[f32], fb: &[f32], n: usize, d: [f64; 2], mut row: impl FnMut(usize, usize, &[f32], &[f32], &[f32], [f32; 4])) {
    // a at y − d: integer part o, fractions (fx, fy) toward the next cell.
    let (ox, oy) = ((-d[0]).floor() as i64, (-d[1]).floor() as i64);
    let (fx, fy) = ((-d[0] - ox as f64) as f32, (-d[1] - oy as f64) as f32);
    let w = [(1.0 - fx) * (1.0 - fy), fx * (1.0 - fy), (1.0 - fx) * fy, fx * fy];
    // Columns i whose samples i + ox and i + ox + 1 are on the map.
    let (i0, i1) = ((-ox).max(0) as usize, (n as i64 - 1 - ox).clamp(0, n as i64) as usize);
    if i1 <= i0 {
        return;
    }
    let (len, c0) = (i1 - i0, (i0 as i64 + ox) as usize);
    for j in 0..n {
        let ja = j as i64 + oy;
        if ja < 0 || ja + 1 >= n as i64 {
            continue;
        }
        let ja = ja as usize;
        let (r0, r1) = (&fa[ja * n + c0..ja * n + c0 + len + 1], &fa[(ja + 1) * n + c0..(ja + 1) * n + c0 + len + 1]);
        row(j, i0, r0, r1, &fb[j * n + i0..j * n + i1], w);
    }
}

/// Feature maps of the earlier and the later map.
pub(super) type FeaturePair = (Vec<f32>, Vec<f32>);

/// Residual features of two maps under a displacement `d` (cells, from `a` to `b`): the cloud a
/// layer moving by `d` does not explain.
///
/// A cell's mismatch is the mean absolute difference of the two maps around it under `d`
/// ([`box_mismatch`], 5 × 5 cells: a single cloud interior may match by chance, a neighbourhood
/// with its edges does not). The share of `b`'s cloudy cells (thin or thick) whose mismatch
/// reaches `tolerance` is returned; when it is at least `min_share`, so are the two residual
/// maps: those cells keep their feature, every other known cell becomes clear (0), so that a
/// second pass matches the unexplained cloud on an empty background.
pub(super) fn residual_features(a: &CloudMap, b: &CloudMap, xa: &MapFeatures, xb: &MapFeatures, d: [f64; 2], tolerance: f32, min_share: f64) -> (Option<FeaturePair>, f64) {
    let n = a.grid.n;
    let (fa, fb) = (xa.feature(), xb.feature());
    let cloudy = |c: u8| c == crate::segment::Class::Thin as u8 || c == crate::segment::Class::Thick as u8;
    // The share is judged at half resolution (a quarter of the work; the 3 × 3 box there spans
    // the full resolution's 5 × 5 and more): a half cell is cloudy when most of its cells are.
    let nh = xb.nh;
    let mis_h = box_mismatch(&xa.half, &xb.half, nh, [d[0] / 2.0, d[1] / 2.0], 1);
    let (mut left, mut total) = (0usize, 0usize);
    for j in 0..nh {
        for i in 0..nh {
            let m = mis_h[j * nh + i];
            let k = 2 * j * n + 2 * i;
            let c = cloudy(b.class[k]) as u8 + cloudy(b.class[k + 1]) as u8 + cloudy(b.class[k + n]) as u8 + cloudy(b.class[k + n + 1]) as u8;
            if c >= 3 && !m.is_nan() {
                total += 1;
                left += (m >= tolerance) as usize;
            }
        }
    }
    pool::give_f32(mis_h);
    let share = left as f64 / total.max(1) as f64;
    if share < min_share || total == 0 {
        return (None, share);
    }
    // Mismatch on b's grid; cell x of a pairs with (about) x + d of b.
    let mis = box_mismatch(fa, fb, n, d, 2);
    let keep = |f: &[f32], m: &CloudMap, k: usize, mk: f32| -> f32 {
        let v = f[k];
        if v.is_nan() {
            f32::NAN
        } else if !cloudy(m.class[k]) {
            0.0
        } else if mk.is_nan() {
            // Where the displacement leaves the overlap it can neither explain nor refute: unknown.
            f32::NAN
        } else if mk >= tolerance {
            v
        } else {
            0.0
        }
    };
    let (dx, dy) = (d[0].round() as i64, d[1].round() as i64);
    let mut ra = pool::take_f32();
    for k in 0..n * n {
        let (i, j) = ((k % n) as i64 + dx, (k / n) as i64 + dy);
        let mk = if i < 0 || j < 0 || i >= n as i64 || j >= n as i64 { f32::NAN } else { mis[j as usize * n + i as usize] };
        ra.push(keep(fa, a, k, mk));
    }
    let mut rb = pool::take_f32();
    rb.extend(mis.iter().enumerate().map(|(k, m)| keep(fb, b, k, *m)));
    pool::give_f32(mis);
    (Some((ra, rb)), share)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The row-at-a-time reduction against the cell-by-cell loop it replaced (each known value
    /// added in turn, unknown ones skipped), bit for bit, on maps with unknown cells, signed zeros
    /// and sizes that `f` does not divide (common practice, no source: a rewritten loop must give
    /// its original's results).
    #[test]
    fn downsample_matches_the_cell_by_cell_loop() {
        let direct = |m: &[f32], n: usize, f: usize| -> Vec<f32> {
            let nc = n / f;
            let mut out = vec![f32::NAN; nc * nc];
            for j in 0..nc {
                for i in 0..nc {
                    let (mut s, mut c) = (0.0f32, 0usize);
                    for dj in 0..f {
                        for v in &m[(j * f + dj) * n + i * f..(j * f + dj) * n + i * f + f] {
                            if !v.is_nan() {
                                s += v;
                                c += 1;
                            }
                        }
                    }
                    if 2 * c >= f * f {
                        out[j * nc + i] = s / c as f32;
                    }
                }
            }
            out
        };
        for (n, seed) in [(256usize, 1u64), (37, 2), (9, 3), (3, 4)] {
            let m: Vec<f32> = (0..n * n)
                .map(|k| {
                    let h = crate::rng::hash64(k as u64 ^ (seed << 40));
                    match h % 7 {
                        0 | 1 => f32::NAN,
                        2 => -0.0,
                        _ => (h >> 20) as u32 as f32 / u32::MAX as f32 * 2.0 - 0.5,
                    }
                })
                .collect();
            for f in [2, 4] {
                let (got, nc) = downsample(&m, n, f);
                let want = direct(&m, n, f);
                assert_eq!(nc * nc, want.len());
                for (k, (a, b)) in got.iter().zip(&want).enumerate() {
                    assert_eq!(a.to_bits(), b.to_bits(), "n {n} f {f} cell {k}: {a} vs {b}");
                }
            }
        }
    }

    /// The box mismatch against a direct sum over each box.
    #[test]
    fn box_mismatch_matches_a_direct_sum() {
        let n = 24;
        let val = |k: usize| -> f32 {
            let h = crate::rng::hash64(k as u64);
            if h.is_multiple_of(11) { f32::NAN } else { (h % 1000) as f32 / 500.0 - 0.5 }
        };
        let fa: Vec<f32> = (0..n * n).map(val).collect();
        let fb: Vec<f32> = (0..n * n).map(|k| val(k + 7777)).collect();
        for (d, r) in [([2.3, -1.6], 2usize), ([-4.0, 3.5], 1), ([0.0, 0.0], 4)] {
            let got = box_mismatch(&fa, &fb, n, d, r);
            // a at (i − dx, j − dy), bilinear over its four neighbours.
            let a_at = |x: f64, y: f64| -> f32 {
                let (x0, y0) = (x.floor(), y.floor());
                if x0 < 0.0 || y0 < 0.0 || x0 + 1.0 >= n as f64 || y0 + 1.0 >= n as f64 {
                    return f32::NAN;
                }
                let (i, j, fx, fy) = (x0 as usize, y0 as usize, (x - x0) as f32, (y - y0) as f32);
                (1.0 - fx) * (1.0 - fy) * fa[j * n + i] + fx * (1.0 - fy) * fa[j * n + i + 1] + (1.0 - fx) * fy * fa[(j + 1) * n + i] + fx * fy * fa[(j + 1) * n + i + 1]
            };
            for j in 0..n {
                for i in 0..n {
                    let (mut s, mut c) = (0f64, 0usize);
                    for jj in j.saturating_sub(r)..(j + r + 1).min(n) {
                        for ii in i.saturating_sub(r)..(i + r + 1).min(n) {
                            let e = (fb[jj * n + ii] - a_at(ii as f64 - d[0], jj as f64 - d[1])).abs();
                            if !e.is_nan() {
                                s += e as f64;
                                c += 1;
                            }
                        }
                    }
                    let g = got[j * n + i];
                    if c == 0 {
                        assert!(g.is_nan(), "({i}, {j}): {g} where no pair is known");
                    } else {
                        assert!((g as f64 - s / c as f64).abs() < 1e-4, "({i}, {j}) d {d:?} r {r}: {g} vs {}", s / c as f64);
                    }
                }
            }
        }
    }

    /// Tables are built in place in pooled buffers of the same size, whose old entries are those
    /// of the table before: every entry must be overwritten. A plane built right after another
    /// one (odd and even sizes: the two-row and the last-row passes) has the window sums of a
    /// direct sum over its values, bit for bit.
    #[test]
    fn plane_tables_over_a_pooled_buffer_are_the_direct_sums() {
        for n in [9usize, 10] {
            let val = |k: usize, salt: u64| -> f32 {
                let h = crate::rng::hash64(k as u64 ^ salt);
                if h.is_multiple_of(7) { f32::NAN } else { (h % 1000) as f32 / 100.0 - 5.0 }
            };
            let first: Vec<f32> = (0..n * n).map(|k| val(k, 1)).collect();
            drop(Plane::new(&first, n, true));
            let f: Vec<f32> = (0..n * n).map(|k| val(k, 2)).collect();
            let p = Plane::new(&f, n, true);
            for (y, x, b) in [(0, 0, n), (0, 0, 1), (1, 2, 3), (n - 2, n - 2, 2), (3, 0, 5)] {
                // The table's sums against sums of the same operands in the same order: row prefix
                // sums plus the table row above.
                let w = n + 1;
                let (mut t1, mut t2, mut tc) = (vec![0f64; w * w], vec![0f64; w * w], vec![0u32; w * w]);
                for j in 0..n {
                    let (mut r1, mut r2, mut rc) = (0f64, 0f64, 0u32);
                    for i in 0..n {
                        let v = if f[j * n + i].is_nan() { 0.0 } else { f[j * n + i] as f64 };
                        r1 += v;
                        r2 += v * v;
                        rc += (!f[j * n + i].is_nan()) as u32;
                        t1[(j + 1) * w + i + 1] = r1 + t1[j * w + i + 1];
                        t2[(j + 1) * w + i + 1] = r2 + t2[j * w + i + 1];
                        tc[(j + 1) * w + i + 1] = rc + tc[j * w + i + 1];
                    }
                }
                assert_eq!((p.s1.as_slice(), p.s2.as_slice(), p.cnt.as_slice()), (t1.as_slice(), t2.as_slice(), tc.as_slice()), "n {n}");
                let (s1, s2, k) = p.window(x, y, b);
                let (d1, d2, dk) = p.block_sums(x, y, b);
                assert_eq!(k, dk);
                assert!((s1 - d1).abs() < 1e-9 && (s2 - d2).abs() < 1e-9, "n {n} window ({x}, {y}, {b})");
            }
        }
    }
}
