//! Block matching of one feature between two cloud maps: coarse-to-fine normalized
//! cross-correlation, sub-cell peak and Lucas–Kanade refinement (see the parent module's method).

use rayon::prelude::*;

use super::{BlockVector, Motion, MotionParams};
use crate::cloudmap::CloudMap;

/// Buffers reused from frame to frame: the feature maps, planes and tables are the same size every
/// frame, and taking fresh ones from the system allocator each time cost page faults (measured on
/// 512² frames: the first pass's preparation 1.1 ms with fresh buffers).
mod pool {
    crate::pool::typed_pool!(take_f32, give_f32, f32, F32);
    crate::pool::typed_pool!(take_f64, give_f64, f64, F64);
    crate::pool::typed_pool!(take_u32, give_u32, u32, U32);
}

/// Mean over `f × f` cells, where at least half of them are known (NaN elsewhere).
fn downsample(m: &[f32], n: usize, f: usize) -> (Vec<f32>, usize) {
    let nc = n / f;
    let mut out = pool::take_f32();
    out.resize(nc * nc, f32::NAN);
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
    (out, nc)
}

/// A feature map split into values (unknown set to zero) and a 0/1 mask, for branch-free sums,
/// optionally with summed-area tables of the values, their squares and the mask: a window that is
/// fully known in both maps then gets its sums in O(1) and only the cross term is summed cell by
/// cell. The searched (later) map needs the tables; the template side sums each block once.
struct Plane {
    n: usize,
    v: Vec<f32>,
    m: Vec<f32>,
    s1: Vec<f64>,
    s2: Vec<f64>,
    cnt: Vec<u32>,
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
        let (mut s1, mut s2, mut cnt) = (pool::take_f64(), pool::take_f64(), pool::take_u32());
        s1.resize(w * w, 0.0);
        s2.resize(w * w, 0.0);
        cnt.resize(w * w, 0);
        // Row prefix sums first (six independent running sums: two rows at a time, so the adds'
        // latency overlaps), then each table row adds the one above (vectorizes).
        let prefix = |j: usize, s1: &mut [f64], s2: &mut [f64], cnt: &mut [u32]| {
            let (mut r1, mut r2, mut rc) = (0f64, 0f64, 0u32);
            for i in 0..n {
                let x = v[j * n + i] as f64;
                r1 += x;
                r2 += x * x;
                rc += m[j * n + i] as u32;
                s1[(j + 1) * w + i + 1] = r1;
                s2[(j + 1) * w + i + 1] = r2;
                cnt[(j + 1) * w + i + 1] = rc;
            }
        };
        let mut j = 0;
        while j + 1 < n {
            let (mut a1, mut a2, mut ac) = (0f64, 0f64, 0u32);
            let (mut b1, mut b2, mut bc) = (0f64, 0f64, 0u32);
            for i in 0..n {
                let (x, y) = (v[j * n + i] as f64, v[(j + 1) * n + i] as f64);
                a1 += x;
                a2 += x * x;
                ac += m[j * n + i] as u32;
                b1 += y;
                b2 += y * y;
                bc += m[(j + 1) * n + i] as u32;
                s1[(j + 1) * w + i + 1] = a1;
                s2[(j + 1) * w + i + 1] = a2;
                cnt[(j + 1) * w + i + 1] = ac;
                s1[(j + 2) * w + i + 1] = b1;
                s2[(j + 2) * w + i + 1] = b2;
                cnt[(j + 2) * w + i + 1] = bc;
            }
            j += 2;
        }
        if j < n {
            prefix(j, &mut s1, &mut s2, &mut cnt);
        }
        for j in 1..=n {
            let (above, row) = s1.split_at_mut(j * w);
            for (r, a) in row[..w].iter_mut().zip(&above[(j - 1) * w..]) {
                *r += a;
            }
            let (above, row) = s2.split_at_mut(j * w);
            for (r, a) in row[..w].iter_mut().zip(&above[(j - 1) * w..]) {
                *r += a;
            }
            let (above, row) = cnt.split_at_mut(j * w);
            for (r, a) in row[..w].iter_mut().zip(&above[(j - 1) * w..]) {
                *r += a;
            }
        }
        Plane { n, v, m, s1, s2, cnt }
    }

    /// Sums of values, squares and known cells over the window of side `b` at `(x, y)` (from the
    /// tables).
    #[inline]
    fn window(&self, x: usize, y: usize, b: usize) -> (f64, f64, u32) {
        let w = self.n + 1;
        let (a, c, d, e) = (y * w + x, y * w + x + b, (y + b) * w + x, (y + b) * w + x + b);
        (
            self.s1[e] - self.s1[c] - self.s1[d] + self.s1[a],
            self.s2[e] - self.s2[c] - self.s2[d] + self.s2[a],
            self.cnt[e] + self.cnt[a] - self.cnt[c] - self.cnt[d],
        )
    }

    /// The same sums, cell by cell (for a template block, once).
    fn block_sums(&self, x: usize, y: usize, b: usize) -> (f64, f64, u32) {
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
    feature: Vec<f32>,
    fine: Plane,
    coarse: Plane,
    nc: usize,
}

impl Prepared {
    fn new(feature: Vec<f32>, n: usize, tables: bool) -> Prepared {
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
    prepared: Prepared,
    /// The feature reduced 2× (for the residual share).
    half: Vec<f32>,
    nh: usize,
}

impl MapFeatures {
    /// Prepare a map.
    pub fn new(m: &CloudMap) -> MapFeatures {
        let n = m.grid.n;
        let feature = score_feature(m);
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
pub(super) fn box_mismatch(fa: &[f32], fb: &[f32], n: usize, d: [f64; 2], r: usize) -> Vec<f32> {
    // Per-cell differences and counts (row slices, so the inner loops vectorize), then the box
    // sums: a sliding window along each row, then running sums down the columns.
    let (mut dv, mut dc) = (pool::take_f32(), pool::take_f32());
    dv.resize(n * n, 0.0);
    dc.resize(n * n, 0.0);
    // a at y − d: integer part o, fractions (fx, fy) toward the next cell.
    let (ox, oy) = ((-d[0]).floor() as i64, (-d[1]).floor() as i64);
    let (fx, fy) = ((-d[0] - ox as f64) as f32, (-d[1] - oy as f64) as f32);
    let (w00, w10, w01, w11) = ((1.0 - fx) * (1.0 - fy), fx * (1.0 - fy), (1.0 - fx) * fy, fx * fy);
    // Columns i whose samples i + ox and i + ox + 1 are on the map.
    let (i0, i1) = ((-ox).max(0) as usize, (n as i64 - 1 - ox).clamp(0, n as i64) as usize);
    if i1 > i0 {
        let len = i1 - i0;
        let c0 = (i0 as i64 + ox) as usize;
        for j in 0..n {
            let ja = j as i64 + oy;
            if ja < 0 || ja + 1 >= n as i64 {
                continue;
            }
            let ja = ja as usize;
            let (r0, r1) = (&fa[ja * n + c0..ja * n + c0 + len + 1], &fa[(ja + 1) * n + c0..(ja + 1) * n + c0 + len + 1]);
            let rb = &fb[j * n + i0..j * n + i1];
            let (ov, oc) = (&mut dv[j * n + i0..j * n + i1], &mut dc[j * n + i0..j * n + i1]);
            for i in 0..len {
                let y = w00 * r0[i] + w10 * r0[i + 1] + w01 * r1[i] + w11 * r1[i + 1];
                let e = (rb[i] - y).abs();
                let ok = !e.is_nan();
                ov[i] = if ok { e } else { 0.0 };
                oc[i] = if ok { 1.0 } else { 0.0 };
            }
        }
    }
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

/// Block vectors between maps `a` and `b` on their score feature.
pub(super) fn block_vectors(a: &CloudMap, xa: &MapFeatures, xb: &MapFeatures, dt_s: f64, params: &MotionParams, prior: Option<Motion>) -> (Vec<BlockVector>, usize) {
    block_vectors_on(&xa.prepared, &xb.prepared, a, dt_s, params, prior)
}

/// Block vectors between two feature maps (`fa` earlier, `fb` later) on `a`'s grid (the features
/// are given back to the pool).
pub(super) fn block_vectors_between(fa: Vec<f32>, fb: Vec<f32>, a: &CloudMap, dt_s: f64, params: &MotionParams, prior: Option<Motion>) -> (Vec<BlockVector>, usize) {
    let n = a.grid.n;
    block_vectors_on(&Prepared::new(fa, n, false), &Prepared::new(fb, n, true), a, dt_s, params, prior)
}

/// Block vectors between two prepared feature maps on `a`'s grid.
fn block_vectors_on(xa: &Prepared, xb: &Prepared, a: &CloudMap, dt_s: f64, params: &MotionParams, prior: Option<Motion>) -> (Vec<BlockVector>, usize) {
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
            starts.push((x, y));
            x += bs;
        }
        y += bs;
    }
    let tried = starts.len();
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
            Some(BlockVector { centre_m: c, v_mps, peak: fb_best.0, mean_score: mean, thick_share: thick })
        })
        .collect();
    (vectors, tried)
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

#[cfg(test)]
mod tests {
    use super::*;

    /// The box mismatch against a direct sum over each box.
    #[test]
    fn box_mismatch_matches_a_direct_sum() {
        let n = 24;
        let val = |k: usize| -> f32 {
            let h = crate::synth::noise::hash64(k as u64);
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
}
