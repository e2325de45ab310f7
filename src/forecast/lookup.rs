//! The forecast's look-ups: each plant point's beam transmittance at one horizon, from the layers'
//! transmittance tables.

use super::{MAX_LAYERS, TransmittanceMap, tables::FEATURES};
use crate::cloudmap::Grid;

/// Plant points as each layer looks them up: `p / cbh_factor` per layer (constant over the
/// horizons of a run, so computed once per run).
pub(super) type ScaledPoint = [[f64; 2]; MAX_LAYERS];

/// Points of a list (every `stride`-th) scaled per layer by `inv_f`.
pub(super) fn scaled_points(points: &[[f64; 2]], stride: usize, inv_f: &[f64; MAX_LAYERS]) -> Vec<ScaledPoint> {
    points.iter().step_by(stride).map(|p| std::array::from_fn(|l| [p[0] * inv_f[l], p[1] * inv_f[l]])).collect()
}

/// What every point's look-up at one horizon shares: each layer's table, the shift from a scaled
/// point to the map point its sun ray comes from (advected back by the layer's motion, `adv`, and
/// not advected, `off`, for the fallback), the box's half-width and the fallback's mean.
pub(super) struct HorizonLookUp<'a> {
    pub tms: &'a [TransmittanceMap],
    pub grid: Grid,
    pub n_layers: usize,
    pub beams: [f64; FEATURES],
    pub off: [[f64; 2]; MAX_LAYERS],
    pub adv: [[f64; 2]; MAX_LAYERS],
    pub r_cells: [f64; MAX_LAYERS],
    pub means: [f64; MAX_LAYERS],
    /// Transmittance the layers' product starts from (clear sky's, relative, with two layers).
    pub rel: f64,
    /// Weight of the current state in the fallback.
    pub wp: f64,
    pub beam_scale: f64,
}

impl HorizonLookUp<'_> {
    /// A point's beam transmittance (as used: scaled and capped) and whether it fell back.
    #[inline]
    pub fn point_tr(&self, ps: &ScaledPoint) -> (f64, bool) {
        let mut tr = self.rel;
        let mut fell_back = false;
        for (l, &pt) in ps.iter().enumerate().take(self.n_layers) {
            let (sx, sy) = self.grid.to_cell([pt[0] + self.adv[l][0], pt[1] + self.adv[l][1]]);
            tr *= match self.tms[l].box_mean_with(sx, sy, self.r_cells[l], self.beams) {
                Some(v) => v,
                None => {
                    fell_back = true;
                    self.fallback(l, pt)
                }
            };
        }
        ((tr * self.beam_scale).min(1.3), fell_back)
    }

    /// Where the look-up leaves the map: a blend of the state now at the point's sun-ray point and
    /// the map's mean.
    #[cold]
    #[inline(never)]
    pub(super) fn fallback(&self, l: usize, pt: [f64; 2]) -> f64 {
        let (qx, qy) = self.grid.to_cell([pt[0] + self.off[l][0], pt[1] + self.off[l][1]]);
        self.fallback_blend(l, self.tms[l].box_mean_with(qx, qy, self.r_cells[l], self.beams))
    }

    /// The fallback's blend of the state now at the point's sun-ray point (`now`: its box mean,
    /// none where that box is off the map or unseen) and layer `l`'s mean
    /// ([`HorizonLookUp::fallback`]; the four-lane loop looks `now` up four points at a time).
    #[inline]
    pub(super) fn fallback_blend(&self, l: usize, now: Option<f64>) -> f64 {
        let now = now.unwrap_or(self.means[l]);
        self.wp * now + (1.0 - self.wp) * self.means[l]
    }

    /// Sum of the points' beam transmittances (as used) and how many fell back: four points at a
    /// time on a CPU with AVX2 (`forecast/lanes.rs`, the same sums bit for bit). With one layer
    /// (the usual case) a loop of its own: the same operations as [`HorizonLookUp::point_tr`]
    /// (`rel` is 1 then), without the loop over layers per point.
    pub fn sum(&self, points: &[ScaledPoint]) -> (f64, usize) {
        #[cfg(target_arch = "x86_64")]
        if super::lanes::usable(self) {
            // SAFETY: `usable` checked that the CPU has AVX2.
            return unsafe { super::lanes::sum_one_layer(self, points) };
        }
        self.sum_scalar(points)
    }

    /// [`HorizonLookUp::sum`] one point at a time.
    pub fn sum_scalar(&self, points: &[ScaledPoint]) -> (f64, usize) {
        let (mut tr_sum, mut fb_sum) = (0f64, 0usize);
        if self.n_layers == 1 {
            let (tm, adv, r) = (&self.tms[0], self.adv[0], self.r_cells[0]);
            for ps in points {
                let pt = ps[0];
                let (sx, sy) = self.grid.to_cell([pt[0] + adv[0], pt[1] + adv[1]]);
                let tr = match tm.box_mean_with(sx, sy, r, self.beams) {
                    Some(v) => v,
                    None => {
                        fb_sum += 1;
                        self.fallback(0, pt)
                    }
                };
                tr_sum += (tr * self.beam_scale).min(1.3);
            }
        } else {
            for ps in points {
                let (tr, fell_back) = self.point_tr(ps);
                fb_sum += fell_back as usize;
                tr_sum += tr;
            }
        }
        (tr_sum, fb_sum)
    }
}
