//! Transmittance tables of a cloud map: summed-area tables of the clear, thin and thick shares and
//! of the cloudy cells' relative brightness, with the sun's glare filled from its neighbours.

use super::IrradianceParams;
use crate::cloudmap::CloudMap;
use crate::segment::Class;

/// Summed-area tables of the clear, thin and thick shares of a cloud map and of its cloudy cells'
/// relative brightness ([`CloudMap::brightness_feature`]), so that the mean beam transmittance over
/// any box is `Σ feature_k · beam_k` for any coefficients (the ensemble varies them without
/// rebuilding the tables). Each cell's transmittance is thus continuous: its class's value plus
/// `beam_cloud_brightness` times its brightness feature.
#[derive(Debug, Clone)]
pub struct TransmittanceMap {
    pub(super) n: usize,
    /// Summed-area table, `(n + 1)²` entries of (clear, thin, thick) shares and the brightness
    /// feature in units of 1/[`SHARE_UNIT`], and the known-cell count: exact integer sums.
    pub(super) sat: Vec<[i32; FEATURES + 1]>,
    beams: [f64; FEATURES],
    /// Mean transmittance of the known cells.
    pub mean: f64,
    total_shares: [f64; FEATURES],
    /// What of the settings the summed-area table was built from ([`TableKey`]).
    key: TableKey,
}

/// What a summed-area table depends on besides its map: whether it is the whole map's (no layer,
/// no patch), and the settings read while building it (the class transmittances only through
/// `thin_beam_from_score`). The coefficients of the features (`beams`) and the mean are not in it:
/// they can be set afresh on a built table ([`SharedTables::take_for`]). Compared bit for bit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct TableKey {
    whole: bool,
    thin_beam_from_score: bool,
    class_beams: [u64; 3],
    fill_correlation_m: u64,
    fill_layer_behind: bool,
}

impl TableKey {
    fn of(p: &IrradianceParams, whole: bool) -> TableKey {
        let continuous = p.thin_beam_from_score;
        TableKey {
            whole,
            thin_beam_from_score: continuous,
            class_beams: if continuous { [p.beam_clear, p.beam_thin, p.beam_thick].map(f64::to_bits) } else { [0; 3] },
            fill_correlation_m: p.fill_correlation_m.to_bits(),
            fill_layer_behind: p.fill_layer_behind,
        }
    }
}

/// A frame's whole-map tables ([`TransmittanceMap::new`]), built at most once and shared by the
/// stages that read them: the shadow timing of the cloud base ([`crate::cbh`]) and the forecast's
/// single layer. Each stage asks for the map and settings it
/// would have built from and gets the kept tables only when those would be the same table
/// ([`TableKey`]); otherwise it builds its own, so sharing never changes a result.
pub struct SharedTables<'a> {
    map: &'a CloudMap,
    tables: std::cell::OnceCell<TransmittanceMap>,
}

impl<'a> SharedTables<'a> {
    /// Nothing built yet, for `map`.
    pub fn new(map: &'a CloudMap) -> SharedTables<'a> {
        SharedTables { map, tables: Default::default() }
    }

    /// The whole-map tables of `map` under `p`, built on the first call; `None` when `map` is not
    /// the shared one or the kept tables were built under settings that give another table.
    /// Their `beams` and `mean` are the first caller's: read them with explicit coefficients
    /// ([`TransmittanceMap::box_mean_with`], [`TransmittanceMap::box_shares`]).
    pub fn get(&self, map: &CloudMap, p: &IrradianceParams) -> Option<&TransmittanceMap> {
        if !std::ptr::eq(map, self.map) {
            return None;
        }
        let t = self.tables.get_or_init(|| TransmittanceMap::new(map, p));
        (t.key == TableKey::of(p, true)).then_some(t)
    }

    /// The kept tables for [`TransmittanceMap::for_layer_with`]`(map, p, layer, patch)`, with the
    /// coefficients and mean of `p`, when they are that table: the shared map's whole tables
    /// (no layer, no patch) built under the same [`TableKey`]. Else `None` (nothing built here).
    pub fn take_for(&mut self, map: &CloudMap, p: &IrradianceParams, layer: Option<(&[u8], u8)>, patch: Option<(&[usize], [f32; FEATURES])>) -> Option<TransmittanceMap> {
        if !std::ptr::eq(map, self.map) || layer.is_some() || patch.is_some() {
            return None;
        }
        let mut t = self.tables.take().filter(|t| t.key == TableKey::of(p, true))?;
        t.beams = p.beams();
        t.mean = mean_of(&t.total_shares, &t.beams);
        Some(t)
    }
}

/// The mean transmittance of the known cells from their mean features and the coefficients.
fn mean_of(total_shares: &[f64; FEATURES], beams: &[f64; FEATURES]) -> f64 {
    total_shares.iter().zip(beams).map(|(s, b)| s * b).sum()
}

/// Buffers reused from frame to frame: a 256² map's summed-area table is 1 MB; a fresh one each
/// frame cost page faults.
mod pool {
    crate::pool::typed_pool!(give_sat, [i32; super::FEATURES + 1], SAT, sized = take_sat_sized);
    crate::pool::typed_pool!(take_u32, give_u32, u32, U32);
    crate::pool::typed_pool!(take_shares, give_shares, [f32; super::FEATURES], SHARES);
}

impl Drop for TransmittanceMap {
    fn drop(&mut self) {
        pool::give_sat(std::mem::take(&mut self.sat));
    }
}

/// The fill's relaxation takes the seen sky's mean from every this many cells along each axis.
const SEEN_MEAN_STRIDE: usize = 4;

/// Each filled cell's features moved toward the mean of the seen cells' (`seen`): the weight of its
/// own is `exp(−depth · cells_per_length)` ([`IrradianceParams::fill_correlation_m`]). Unchanged
/// when no cell is seen.
fn relax_toward_mean(filled: &mut [[f32; FEATURES]], depth: &[u16], cells_per_length: f64, seen: impl Iterator<Item = [f32; FEATURES]>) {
    let (mut sum, mut count) = ([0f64; FEATURES], 0usize);
    for v in seen {
        for q in 0..FEATURES {
            sum[q] += f64::from(v[q]);
        }
        count += 1;
    }
    if count == 0 {
        return;
    }
    let mean = sum.map(|v| (v / count as f64) as f32);
    for (f, d) in filled.iter_mut().zip(depth) {
        let w = (-f64::from(*d) * cells_per_length).exp() as f32;
        for q in 0..FEATURES {
            f[q] = w * f[q] + (1.0 - w) * mean[q];
        }
    }
}

/// Largest look-up half-width \[cells\] handled by exact truncations without saturation (any
/// sensible box is far smaller: a 256² map is 256 cells across).
pub(super) const MAX_EXACT_HALF_WIDTH: f64 = 1e8;

/// Class shares are summed as integers in units of 1/1024 (a 256² map sums to under 2³¹).
pub(super) const SHARE_UNIT: f64 = 1024.0;

/// Per-cell features whose box means the tables give: clear, thin and thick shares, and the
/// brightness feature.
pub const FEATURES: usize = 4;

impl TransmittanceMap {
    /// Build from a map and per-class transmittances. Unknown cells that the camera sees (the sun's
    /// glare) take the class shares of their known neighbours, spreading inward a cell at a time.
    pub fn new(map: &CloudMap, p: &IrradianceParams) -> TransmittanceMap {
        Self::for_layer(map, p, None)
    }

    /// [`TransmittanceMap::new`] for one layer of a map whose cloudy cells carry layer labels
    /// (`labels[k]` = layer index): the other layers' cloud counts as clear sky here, except for a
    /// layer behind the first with [`IrradianceParams::fill_layer_behind`]: there the first
    /// layer's cloud hides it, and those cells are unseen and filled from their neighbours like
    /// the sun's glare.
    ///
    /// One piece on purpose: the class shares, the brightness feature and the inward fill of
    /// glare cells are built in passes over the same per-cell buffers, once per frame and layer.
    pub fn for_layer(map: &CloudMap, p: &IrradianceParams, layer: Option<(&[u8], u8)>) -> TransmittanceMap {
        Self::for_layer_with(map, p, layer, None)
    }

    /// [`TransmittanceMap::for_layer`] with the cells of `patch` given fixed features (whatever
    /// the map says of them), before the fill: the fill then spreads them into the rest of the
    /// glare. Used for the beam measured along the camera's line of sight to the sun
    /// ([`IrradianceParams::sun_line_beam`]).
    pub fn for_layer_with(map: &CloudMap, p: &IrradianceParams, layer: Option<(&[u8], u8)>, patch: Option<(&[usize], [f32; FEATURES])>) -> TransmittanceMap {
        let n = map.grid.n;
        let relabelled: Option<Vec<u8>> = layer.map(|(labels, l)| {
            let (thin, thick) = (Class::Thin as u8, Class::Thick as u8);
            let other = if l > 0 && p.fill_layer_behind { Class::Unknown as u8 } else { Class::Clear as u8 };
            map.class.iter().zip(labels).map(|(c, lb)| if (*c == thin || *c == thick) && *lb != l { other } else { *c }).collect()
        });
        let class: &[u8] = relabelled.as_deref().unwrap_or(&map.class);
        let w = n + 1;
        // Known cells are one class; unknown in-view cells (the sun's glare) get filled shares.
        // `state`: 0 unknown, 1 known class, 3 queued, FILLED + i filled with `filled[i]`; buffers
        // come from a per-thread pool.
        const FILLED: u32 = 4;
        let class_known = |c: u8| Class::from_u8(c) != Class::Unknown;
        let mut state = pool::take_u32();
        state.extend(class.iter().map(|c| class_known(*c) as u32));
        let mut filled = pool::take_shares();
        let in_view = |m: usize| map.in_view.get(m).copied().unwrap_or(false);
        let neighbours = |k: usize| {
            let (i, j) = ((k % n) as i64, (k / n) as i64);
            [(-1i64, 0i64), (1, 0), (0, -1), (0, 1)].into_iter().filter_map(move |(di, dj)| {
                let (a, b) = (i + di, j + dj);
                (a >= 0 && b >= 0 && a < n as i64 && b < n as i64).then_some(b as usize * n + a as usize)
            })
        };
        let bright = |k: usize| map.brightness_feature(k);
        // A thin cell's class shares: the thin class, or with `thin_beam_from_score` its mix of the
        // neighbouring classes by its score (`CloudMap::continuous_shares`).
        let continuous = p.thin_beam_from_score;
        let class_beams = [p.beam_clear, p.beam_thin, p.beam_thick];
        let thin_shares = |k: usize| if continuous { CloudMap::continuous_shares(Class::Thin, map.thin_depth(k), class_beams) } else { [0.0, 1.0, 0.0] };
        let shares = |k: usize, state: &[u32], filled: &[[f32; FEATURES]]| -> Option<[f32; FEATURES]> {
            match (state[k], Class::from_u8(class[k])) {
                (1, Class::Clear) => Some([1.0, 0.0, 0.0, 0.0]),
                (1, Class::Thin) => {
                    let t = thin_shares(k);
                    Some([t[0], t[1], t[2], bright(k)])
                }
                (1, Class::Thick) => Some([0.0, 0.0, 1.0, bright(k)]),
                (f, _) if f >= FILLED => Some(filled[(f - FILLED) as usize]),
                _ => None,
            }
        };
        // Breadth-first fill: each unknown in-view cell takes the mean shares of its neighbours
        // already known or filled when the front reaches it. The front starts at the known cells
        // that border an unknown in-view cell (marked 3 while queued, then back to 1).
        let mut front: std::collections::VecDeque<usize> = Default::default();
        for k in 0..n * n {
            if state[k] != 0 || !in_view(k) {
                continue;
            }
            for m in neighbours(k) {
                if state[m] == 1 {
                    state[m] = 3;
                    front.push_back(m);
                }
            }
        }
        for &k in &front {
            state[k] = 1;
        }
        let mut depth: Vec<u16> = Vec::new();
        if let Some((cells, features)) = patch {
            for &k in cells.iter().filter(|&&k| k < n * n && in_view(k)) {
                if state[k] < FILLED {
                    state[k] = FILLED + filled.len() as u32;
                    filled.push(features);
                    depth.push(0);
                    front.push_back(k);
                }
            }
        }
        while let Some(k) = front.pop_front() {
            let d = if state[k] >= FILLED { depth[(state[k] - FILLED) as usize] } else { 0 };
            for m in neighbours(k) {
                if state[m] != 0 || !in_view(m) {
                    continue;
                }
                let (mut s, mut c) = ([0f32; FEATURES], 0f32);
                for v in neighbours(m).filter_map(|e| shares(e, &state, &filled)) {
                    for q in 0..FEATURES {
                        s[q] += v[q];
                    }
                    c += 1.0;
                }
                state[m] = FILLED + filled.len() as u32;
                filled.push(s.map(|v| v / c));
                depth.push(d.saturating_add(1));
                front.push_back(m);
            }
        }
        if p.fill_correlation_m > 0.0 && !filled.is_empty() {
            // The seen sky's mean from every fourth cell each way (a 256² map: 4096 cells; all of
            // them cost 2.6 % of a replay's instructions for a mean that moves in the third digit).
            let sampled = (0..n).step_by(SEEN_MEAN_STRIDE).flat_map(|j| (0..n).step_by(SEEN_MEAN_STRIDE).map(move |i| j * n + i));
            relax_toward_mean(&mut filled, &depth, map.grid.cell_m / p.fill_correlation_m, sampled.filter(|&k| state[k] == 1).filter_map(|k| shares(k, &state, &[])));
        }
        // Row by row, in place: the table is 1 MB, the pass memory-bound. The table is a pooled
        // one of the same size when there is one (its old entries, each overwritten below: row 0
        // and column 0 zero, every other entry its sum), so there is no zero-fill and no copy.
        let unit = SHARE_UNIT as i32;
        let step: [[i32; FEATURES]; 4] = [[0, 0, 0, 0], [unit, 0, 0, 0], [0, unit, 0, 0], [0, 0, unit, 0]];
        let quantise = |v: f32| round_i32(v as f64 * SHARE_UNIT);
        // Each row is built from row slices (no bounds checks in the loop). The four features'
        // running sums are kept apart from the count's, so that they stay in one vector register
        // (as one array of five they were taken apart and put together again for every cell).
        let mut sat = pool::take_sat_sized(w * w, [0i32; FEATURES + 1]);
        sat[..w].fill([0i32; FEATURES + 1]);
        for j in 0..n {
            let (mut rs, mut rc) = (RowSums::default(), 0i32);
            let (above, below) = sat.split_at_mut((j + 1) * w);
            let (up, row) = (&above[j * w + 1..(j + 1) * w], &mut below[..w]);
            row[0] = [0i32; FEATURES + 1];
            let out = &mut row[1..w];
            let (cls, st) = (&class[j * n..j * n + n], &state[j * n..j * n + n]);
            for i in 0..n {
                // The cell's first three features, its brightness feature (added apart, into the
                // fourth lane) and its count.
                let (add, b, count) = if st[i] >= FILLED {
                    let f = filled[(st[i] - FILLED) as usize];
                    ([quantise(f[0]), quantise(f[1]), quantise(f[2]), 0], quantise(f[3]), 1)
                } else {
                    let c = (cls[i] & 3) as usize;
                    let a = if continuous && c == Class::Thin as usize {
                        let t = thin_shares(j * n + i);
                        // The three shares sum to one unit exactly.
                        let (x, z) = (quantise(t[0]), quantise(t[2]));
                        [x, unit - x - z, z, 0]
                    } else {
                        step[c]
                    };
                    // Cloud (thin or thick) carries its brightness; a thin cell's shares always
                    // hold some cloud, a thick one's all.
                    let b = if c >= Class::Thin as usize { quantise(bright(j * n + i)) } else { 0 };
                    (a, b, (c != 0) as i32)
                };
                rs = add_features(rs, add, b);
                rc += count;
                out[i] = with_above(&up[i], rs, rc);
            }
        }
        pool::give_u32(state);
        pool::give_shares(filled);
        let total = sat[w * w - 1];
        let total_shares =
            if total[FEATURES] > 0 { std::array::from_fn(|q| total[q] as f64 / SHARE_UNIT / total[FEATURES] as f64) } else { [f64::NAN; FEATURES] };
        let beams = p.beams();
        let mean = mean_of(&total_shares, &beams);
        TransmittanceMap { n, sat, beams, mean, total_shares, key: TableKey::of(p, layer.is_none() && patch.is_none()) }
    }

    /// Mean features (clear, thin and thick shares, brightness feature) over the box of half-width
    /// `r` cells around continuous cell coordinates; `None` when the box holds no known cell or its
    /// centre is off the map.
    ///
    /// Always inlined (as is [`TransmittanceMap::box_mean_with`]): the forecast and every ensemble
    /// member call it for each point and horizon, and as a call it cost a third more instructions.
    #[inline(always)]
    pub fn box_shares(&self, cx: f64, cy: f64, r: f64) -> Option<[f64; FEATURES]> {
        let n = self.n as f64;
        // Written so that NaN fails it: a NaN centre gave an empty box below, i.e. `None`, too.
        if !(cx >= -0.5 && cy >= -0.5 && cx <= n - 0.5 && cy <= n - 0.5) {
            return None;
        }
        let top = self.n as i64;
        let (x0, x1, y0, y1) = if r.abs() <= MAX_EXACT_HALF_WIDTH {
            // The centre is within the map and the half-width finite and bounded, so every bound
            // below is a finite number of magnitude under 2^30: its truncation is exact and needs
            // none of the saturation and NaN handling of `as i64` (four per look-up).
            // SAFETY: finite and within i64's range, as just said.
            let t = |v: f64| unsafe { v.to_int_unchecked::<i64>() };
            let lo = |c: f64| t(c - r + 0.5).clamp(0, top) as usize;
            let hi = |c: f64| t(c + r + 1.5).clamp(0, top) as usize;
            (lo(cx), hi(cx), lo(cy), hi(cy))
        } else {
            // Rounding half up by truncation through i64: every negative bound clamps to 0 either
            // way, and on baseline x86-64 `f64::round` is a library call and a float-to-usize cast
            // a slow instruction sequence. The clamp is on the integer (a negative or NaN value
            // truncates to at most 0 and clamps to 0, as `max(0.0)` first did, without its NaN
            // handling).
            let lo = |c: f64| ((c - r + 0.5) as i64).clamp(0, top) as usize;
            let hi = |c: f64| ((c + r + 1.5) as i64).clamp(0, top) as usize;
            (lo(cx), hi(cx), lo(cy), hi(cy))
        };
        if x1 <= x0 || y1 <= y0 {
            return None;
        }
        let w = self.n + 1;
        debug_assert!(self.sat.len() == w * w && x1 <= self.n && y1 <= self.n);
        // SAFETY: the table holds (n + 1)² entries (built so in `for_layer`, never resized) and the
        // bounds are clamped to 0..=n, so every index is at most (n + 1)² − 1.
        let at = |y: usize, x: usize| unsafe { *self.sat.get_unchecked(y * w + x) };
        let (a, b, c, d) = (at(y1, x1), at(y0, x1), at(y1, x0), at(y0, x0));
        let cnt = a[FEATURES] - b[FEATURES] - c[FEATURES] + d[FEATURES];
        if cnt <= 0 {
            return None;
        }
        let f = 1.0 / (SHARE_UNIT * cnt as f64);
        Some(std::array::from_fn(|q| (a[q] - b[q] - c[q] + d[q]) as f64 * f))
    }

    /// Mean transmittance over a box with the map's own per-class transmittances.
    pub fn box_mean(&self, cx: f64, cy: f64, r: f64) -> Option<f64> {
        self.box_mean_with(cx, cy, r, self.beams)
    }

    /// Mean transmittance over a box for given coefficients ([`IrradianceParams::beams`]: clear,
    /// thin, thick, brightness), never below 0.
    #[inline(always)]
    pub fn box_mean_with(&self, cx: f64, cy: f64, r: f64, beams: [f64; FEATURES]) -> Option<f64> {
        self.box_shares(cx, cy, r).map(|s| (s[0] * beams[0] + s[1] * beams[1] + s[2] * beams[2] + s[3] * beams[3]).max(0.0))
    }

    /// Mean transmittance of the whole map for given coefficients.
    pub fn mean_with(&self, beams: [f64; FEATURES]) -> f64 {
        self.total_shares.iter().zip(&beams).map(|(s, b)| s * b).sum()
    }
}

/// A row's running sums of the four features in a table build: one SSE2 register on x86-64 (part
/// of its baseline), so that the four integer additions per cell are one instruction; elsewhere
/// the plain array. Integer additions either way: the same sums.
#[cfg(target_arch = "x86_64")]
#[derive(Clone, Copy)]
struct RowSums(std::arch::x86_64::__m128i);

#[cfg(target_arch = "x86_64")]
impl Default for RowSums {
    fn default() -> Self {
        // SAFETY: SSE2 is part of x86-64.
        RowSums(unsafe { std::arch::x86_64::_mm_setzero_si128() })
    }
}

#[cfg(not(target_arch = "x86_64"))]
#[derive(Clone, Copy, Default)]
struct RowSums([i32; FEATURES]);

/// The row's running sums plus one cell's features: `add` and, in the fourth feature, `b`.
#[inline(always)]
fn add_features(rs: RowSums, add: [i32; FEATURES], b: i32) -> RowSums {
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::x86_64::{_mm_add_epi32, _mm_cvtsi32_si128, _mm_loadu_si128, _mm_slli_si128};
        // SAFETY: SSE2 is part of x86-64; an unaligned load of the four i32 of `add`, and `b`
        // moved into the fourth lane of an otherwise zero register.
        RowSums(unsafe { _mm_add_epi32(_mm_add_epi32(rs.0, _mm_loadu_si128(add.as_ptr().cast())), _mm_slli_si128::<12>(_mm_cvtsi32_si128(b))) })
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        RowSums([rs.0[0] + add[0], rs.0[1] + add[1], rs.0[2] + add[2], rs.0[3] + add[3] + b])
    }
}

/// A table entry: the entry above plus the row's running sums (features and count).
#[inline(always)]
fn with_above(up: &[i32; FEATURES + 1], rs: RowSums, rc: i32) -> [i32; FEATURES + 1] {
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::x86_64::{_mm_add_epi32, _mm_loadu_si128, _mm_storeu_si128};
        let mut out = [0i32; FEATURES + 1];
        // SAFETY: SSE2 is part of x86-64; unaligned loads and stores of the first four of five
        // i32.
        unsafe { _mm_storeu_si128(out.as_mut_ptr().cast(), _mm_add_epi32(_mm_loadu_si128(up.as_ptr().cast()), rs.0)) };
        out[FEATURES] = up[FEATURES] + rc;
        out
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        [up[0] + rs.0[0], up[1] + rs.0[1], up[2] + rs.0[2], up[3] + rs.0[3], up[FEATURES] + rc]
    }
}

/// `x.round() as i32` (half away from zero; NaN gives 0, values beyond `i32` saturate), without
/// the library call `f64::round` is on baseline x86-64: the truncation toward zero is exact, and so
/// is the remaining fraction for every `|x| < 2⁵²`; beyond that `x` is whole already.
#[inline]
fn round_i32(x: f64) -> i32 {
    let t = x as i32;
    let f = x - t as f64;
    if t == i32::MAX || t == i32::MIN {
        return t;
    }
    t + (f >= 0.5) as i32 - (f <= -0.5) as i32
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cloudmap::{Grid, MapParams};

    /// The fill's relaxation (`fill_correlation_m`): a filled cell next to the seen sky keeps most
    /// of its neighbours' state, one far inside a large unseen region tends to the seen cells'
    /// mean, by `exp(−d / L)` (simple kriging with an exponential covariance; common practice, no
    /// source).
    #[test]
    fn relaxed_fill_tends_to_the_seen_mean() {
        // 32 × 32 cells of 100 m: columns 0–7 clear, 8–23 unknown (in view), 24–31 thick; the
        // seen mean (sampled every fourth cell, as of all seen cells) is half clear.
        let n = 32;
        let class: Vec<u8> = (0..n * n).map(|k| match k % n { 0..=7 => Class::Clear as u8, 24.. => Class::Thick as u8, _ => Class::Unknown as u8 }).collect();
        let g = Grid { n, cell_m: 100.0, height_m: 1000.0 };
        let map = CloudMap { grid: g, score: vec![0.0; n * n], class, in_view: vec![true; n * n], offset: 0.0, brightness: vec![], thin_depth: vec![0.5; n * n] };
        let plain = IrradianceParams { fill_correlation_m: 0.0, ..Default::default() };
        let relaxed = IrradianceParams { fill_correlation_m: 200.0, ..Default::default() };
        let (a, b) = (TransmittanceMap::new(&map, &plain), TransmittanceMap::new(&map, &relaxed));
        let clear_share = |m: &TransmittanceMap, i: usize| m.box_shares(i as f64, 16.0, 0.0).unwrap()[0];
        let mean = 0.5;
        // Column 8 is one step from the clear cells: without relaxation clear, with it e^(−0.5) of the way.
        assert!((clear_share(&a, 8) - 1.0).abs() < 1e-3, "{}", clear_share(&a, 8));
        let w = (-0.5f64).exp();
        assert!((clear_share(&b, 8) - (w + (1.0 - w) * mean)).abs() < 2e-3, "{}", clear_share(&b, 8));
        // Column 15 is eight steps from the clear cells: near the mean with relaxation, near
        // its edge's state without.
        assert!((clear_share(&b, 15) - mean).abs() < 0.05, "{}", clear_share(&b, 15));
        assert!(clear_share(&a, 15) > 0.9, "{}", clear_share(&a, 15));
        // Seen cells are never changed.
        assert_eq!(clear_share(&b, 0), 1.0);
        assert_eq!(clear_share(&b, 31), 0.0);
    }

    /// The fast rounding against `f64::round` (common practice, no source: half away from zero).
    #[test]
    fn round_i32_matches_the_library_rounding() {
        let mut xs = vec![0.0, -0.0, 0.5, -0.5, 1.5, -1.5, 2.5, -2.5, 0.49999999999999994, -0.49999999999999994, 1023.5, -1023.5, 1e9 + 0.5, f64::NAN, 3e9, -3e9, 2147483647.4, -2147483648.6];
        for k in 0..20000u64 {
            let h = crate::rng::hash64(k);
            xs.push((h % 4_000_000) as f64 / 1024.0 - 1950.0);
            xs.push(f32::from_bits((h >> 32) as u32 & 0x4fff_ffff) as f64 * if h & 1 == 0 { 1.0 } else { -1.0 });
        }
        for x in xs {
            assert_eq!(round_i32(x), x.round() as i32, "{x}");
        }
    }

    #[test]
    fn box_mean_counts_only_known_cells() {
        let g = Grid::new(&MapParams { cells: 8, ..Default::default() }, 1000.0);
        let mut class = vec![Class::Clear as u8; 64];
        class[0] = Class::Thick as u8;
        class[1] = Class::Unknown as u8;
        let map = CloudMap { grid: g, score: vec![0.0; 64], class, in_view: vec![false; 64], offset: 0.0, brightness: vec![], thin_depth: vec![] };
        let p = IrradianceParams::default();
        let t = TransmittanceMap::new(&map, &p);
        // Box over cells (0..=1, 0..=1): thick, unknown, clear, clear -> (0.03 + 1 + 1) / 3.
        let m = t.box_mean(0.5, 0.5, 0.5).unwrap();
        assert!((m - (0.03 + 2.0) / 3.0).abs() < 1e-12, "{m}");
        assert!(t.box_mean(-3.0, 0.0, 1.0).is_none());
    }

    /// A cloudy cell's transmittance is its class's plus the brightness coefficient times its
    /// brightness feature; clear cells carry no feature.
    #[test]
    fn brightness_feature_moves_cloudy_cells_only() {
        let g = Grid::new(&MapParams { cells: 8, ..Default::default() }, 1000.0);
        let mut class = vec![Class::Clear as u8; 64];
        class[0] = Class::Thick as u8;
        class[1] = Class::Thick as u8;
        let mut brightness = vec![0f32; 64];
        brightness[0] = -0.1;
        brightness[1] = 0.1;
        let map = CloudMap { grid: g, score: vec![0.0; 64], class, in_view: vec![true; 64], offset: 0.0, brightness, thin_depth: vec![] };
        let p = IrradianceParams { beam_cloud_brightness: 0.5, ..Default::default() };
        let t = TransmittanceMap::new(&map, &p);
        let one = |cx: f64| t.box_mean(cx, 0.0, 0.0).unwrap();
        // (transmittance never falls below 0)
        assert!((one(0.0) - (p.beam_thick - 0.05).max(0.0)).abs() < 1e-3, "dark thick cell {}", one(0.0));
        assert!((one(1.0) - (p.beam_thick + 0.05)).abs() < 1e-3, "bright thick cell {}", one(1.0));
        assert!((one(2.0) - p.beam_clear).abs() < 1e-12, "clear cell {}", one(2.0));
        // The features have zero mean over the cloud, so the whole-map mean keeps the classes' own.
        let classes_only = TransmittanceMap::new(&map, &IrradianceParams::default());
        assert!((t.mean - classes_only.mean).abs() < 1e-4);
    }

    /// With `thin_beam_from_score` a thin cell's beam runs with its place `u` in the thin band as
    /// Beer–Lambert gives it, `beam_thin^(2u)` (the clear class's at 0, the thin class's at 0.5,
    /// its square at 1, never below the thick class's); off, every thin cell passes `beam_thin`.
    /// Clear and thick cells are their class either way, and a glare cell filled from thin
    /// neighbours takes their mix.
    #[test]
    fn thin_cells_follow_their_score_when_asked() {
        let g = Grid::new(&MapParams { cells: 8, ..Default::default() }, 1000.0);
        let mut class = vec![Class::Thin as u8; 64];
        class[4] = Class::Clear as u8;
        class[5] = Class::Thick as u8;
        class[63] = Class::Unknown as u8;
        let mut thin_depth = vec![0.5f32; 64];
        for (k, u) in [(0, 0.0), (1, 0.25), (2, 0.75), (3, 1.0), (62, 0.0), (55, 0.0), (54, 0.0)] {
            thin_depth[k] = u;
        }
        let map = CloudMap { grid: g, score: vec![0.0; 64], class, in_view: vec![true; 64], offset: 0.0, brightness: vec![], thin_depth };
        // Without the fill's relaxation toward the mean (`relaxed_fill_tends_to_the_seen_mean`).
        let on = IrradianceParams { thin_beam_from_score: true, fill_correlation_m: 0.0, ..Default::default() };
        let (t, off) = (TransmittanceMap::new(&map, &on), TransmittanceMap::new(&map, &IrradianceParams { fill_correlation_m: 0.0, ..Default::default() }));
        let (b0, b1, b2) = (on.beam_clear, on.beam_thin, on.beam_thick);
        let one = |m: &TransmittanceMap, cx: f64, cy: f64| m.box_mean(cx, cy, 0.0).unwrap();
        let tol = 2e-3;
        for (cx, want) in [(0.0, b0), (1.0, b1.sqrt()), (2.0, b1.powf(1.5)), (3.0, (b1 * b1).max(b2)), (4.0, b0), (5.0, b2), (6.0, b1)] {
            assert!((one(&t, cx, 0.0) - want).abs() < tol, "cell {cx}: {} against {want}", one(&t, cx, 0.0));
        }
        for cx in 0..4 {
            assert!((one(&off, cx as f64, 0.0) - b1).abs() < 1e-12, "off: cell {cx}");
        }
        // The unknown corner cell (63) is filled from its neighbours 62 and 55, both at depth 0.
        assert!((one(&t, 7.0, 7.0) - b0).abs() < tol, "filled cell {}", one(&t, 7.0, 7.0));
        // Shares of one cell always sum to one, also where the class values leave no room (a
        // thin class at or above clear sky's, or below the thick class's: the thin class alone).
        for beams in [[1.0, 0.45, 0.03], [1.0, 0.05, 0.03], [1.0, 0.02, 0.03], [1.0, 1.0, 0.03], [1.0, 0.0, 0.0]] {
            for u in [-1.0f32, 0.0, 0.3, 0.5, 0.9, 1.0, 2.0, f32::NAN] {
                let s = CloudMap::continuous_shares(Class::Thin, u, beams);
                assert!((s.iter().sum::<f32>() - 1.0).abs() < 1e-6 && s.iter().all(|v| *v >= 0.0), "{beams:?} {u}: {s:?}");
            }
        }
        // A dim thin class (the sun disk hidden behind it) keeps the band's lower half dim.
        let s = CloudMap::continuous_shares(Class::Thin, 0.25, [1.0, 0.05, 0.03]);
        let t = s[0] as f64 + 0.05 * s[1] as f64;
        assert!((t - 0.05f64.sqrt()).abs() < 1e-3, "{t}");
    }

    /// The summed-area table is built in place in a pooled buffer of the same size, whose old
    /// entries are those of the table before: every entry must be overwritten. A table built right
    /// after one of another map equals the one built first on a thread of its own (a fresh buffer).
    #[test]
    fn table_over_a_pooled_buffer_is_the_fresh_one() {
        let g = Grid::new(&MapParams { cells: 16, ..Default::default() }, 1000.0);
        let map_of = |salt: u64| {
            let class: Vec<u8> = (0..256u64).map(|k| (crate::rng::hash64(k ^ salt) % 4) as u8).collect();
            let brightness: Vec<f32> = (0..256u64).map(|k| (crate::rng::hash64(k ^ salt ^ 99) % 200) as f32 / 1000.0 - 0.1).collect();
            CloudMap { grid: g, score: vec![0.0; 256], class, in_view: vec![true; 256], offset: 0.0, brightness, thin_depth: vec![] }
        };
        let p = IrradianceParams { beam_cloud_brightness: 0.5, ..Default::default() };
        let (a, b) = (map_of(1), map_of(2));
        let fresh = std::thread::scope(|s| s.spawn(|| TransmittanceMap::new(&b, &p).sat.clone()).join().expect("thread"));
        drop(TransmittanceMap::new(&a, &p));
        assert_eq!(TransmittanceMap::new(&b, &p).sat, fresh);
    }

    /// The shared whole-map tables ([`SharedTables`]): built under one stage's settings and taken
    /// for the forecast's (other coefficients, same table settings) they equal the forecast's own
    /// fresh build in every field; never given for another map, a layer, a patch, or settings that
    /// build another table.
    #[test]
    fn shared_tables_equal_a_fresh_build_or_are_not_given() {
        let g = Grid::new(&MapParams { cells: 16, ..Default::default() }, 1000.0);
        let class: Vec<u8> = (0..256u64).map(|k| (crate::rng::hash64(k ^ 7) % 4) as u8).collect();
        let brightness: Vec<f32> = (0..256u64).map(|k| (crate::rng::hash64(k ^ 99) % 200) as f32 / 1000.0 - 0.1).collect();
        let thin_depth: Vec<f32> = (0..256u64).map(|k| (crate::rng::hash64(k ^ 5) % 1000) as f32 / 1000.0).collect();
        let map = CloudMap { grid: g, score: vec![0.0; 256], class, in_view: vec![true; 256], offset: 0.0, brightness, thin_depth };
        let same = |a: &TransmittanceMap, b: &TransmittanceMap| {
            assert_eq!(a.sat, b.sat);
            assert_eq!(a.beams.map(f64::to_bits), b.beams.map(f64::to_bits));
            assert_eq!(a.mean.to_bits(), b.mean.to_bits());
            assert_eq!(a.total_shares.map(f64::to_bits), b.total_shares.map(f64::to_bits));
            assert_eq!((a.n, a.key), (b.n, b.key));
        };
        for continuous in [false, true] {
            let first = IrradianceParams { thin_beam_from_score: continuous, ..Default::default() };
            // As tuned: other coefficients; with the thin share from the score the class values
            // enter the table, so they stay.
            let tuned = IrradianceParams { beam_cloud_brightness: 0.3, beam_thin: if continuous { first.beam_thin } else { 0.6 }, diffuse_per_cover: 0.1, ..first };
            let mut shared = SharedTables::new(&map);
            let t = shared.get(&map, &first).expect("built for its own map");
            same(t, &TransmittanceMap::new(&map, &first));
            assert!(shared.get(&map, &tuned).is_some());
            let taken = shared.take_for(&map, &tuned, None, None).expect("same table");
            same(&taken, &TransmittanceMap::for_layer_with(&map, &tuned, None, None));
            // Taken once: nothing left to give.
            assert!(shared.take_for(&map, &tuned, None, None).is_none());
        }
        let p = IrradianceParams::default();
        let copy = map.clone();
        let labels = vec![0u8; 256];
        let cells = [3usize, 4];
        let others = [
            IrradianceParams { fill_correlation_m: 200.0, ..p },
            IrradianceParams { thin_beam_from_score: true, ..p },
        ];
        let mut shared = SharedTables::new(&map);
        assert!(shared.get(&copy, &p).is_none(), "another map");
        assert!(shared.get(&map, &p).is_some());
        assert!(shared.take_for(&copy, &p, None, None).is_none());
        assert!(shared.take_for(&map, &p, Some((&labels, 0)), None).is_none());
        assert!(shared.take_for(&map, &p, None, Some((&cells, [1.0, 0.0, 0.0, 0.0]))).is_none());
        for q in others {
            assert!(shared.get(&map, &q).is_none(), "{q:?}");
        }
        // With the thin share from the score, other class values build another table.
        let c = IrradianceParams { thin_beam_from_score: true, ..p };
        let shared = SharedTables::new(&map);
        assert!(shared.get(&map, &c).is_some());
        assert!(shared.get(&map, &IrradianceParams { beam_thin: 0.6, ..c }).is_none());
        let mut shared = shared;
        assert!(shared.take_for(&map, &IrradianceParams { beam_thick: 0.1, ..c }, None, None).is_none());
    }
}
