//! Where the cloud map's plane lies: at the configured base (or the ceilometer series) until the
//! estimated base (stereo, shadow timing) is trustworthy, then at the estimate, moved again only
//! when the estimate has moved by more than [`MOVE_REL`] (a move builds a new look-up table).
//!
//! A move loses nothing: the grid reaches the same zenith angle at every height, so a cell looks
//! the same way at any height and a plane `r` times higher is the same map with cells `r` times
//! larger, scaled about the camera's nadir ([`crate::cloudmap::LutCache::grid_for`]). The engine
//! relabels the kept maps onto the new grid and scales everything measured in metres on the plane
//! by `r`: the tracked motions and their variances, and the motions the stereo estimates are kept
//! by. Restarting would lose the motion history and the layer tracks for `baseline_s` and
//! `layer_confirm` frames.

use crate::cbh::{CbhEstimate, CbhSource};

/// The plane follows an estimate only when its stated relative one-sigma uncertainty (sigma of
/// `ln h`) is at most this (own choice: a third of the configured prior's 0.3; stereo states
/// 3.5–5 %, shadow timing 5–10 % on the scenes).
pub const FOLLOW_MAX_REL_SIGMA: f64 = 0.10;

/// … and only after this many estimates (stereo fits taken, shadow-timing fits) since the start
/// (own choice: one estimate may be a stray match).
pub const FOLLOW_MIN_ESTIMATES: usize = 2;

/// The plane moves when the estimate differs from it by more than this share (`|ln(h/plane)|`;
/// own choice: about one 50-m table bucket at 1000 m, and well inside the stated uncertainties).
pub const MOVE_REL: f64 = 0.05;

/// The plane's state: where it was moved to (above the site origin), if it was.
#[derive(Debug, Clone, Default)]
pub(super) struct MapPlane {
    moved_to_m: Option<f64>,
    /// Moves so far.
    pub(super) moves: usize,
}

impl MapPlane {
    /// The plane's height above the site origin \[m\]: where it was moved to, else `configured_m`
    /// (the configured base or the ceilometer series).
    pub(super) fn height_m(&self, configured_m: f64) -> f64 {
        self.moved_to_m.unwrap_or(configured_m)
    }

    /// Record a move to `height_m` (above the site origin).
    pub(super) fn moved(&mut self, height_m: f64) {
        self.moved_to_m = Some(height_m);
        self.moves += 1;
    }
}

/// Whether an estimate may place the plane: from stereo or shadow timing, stated uncertainty at
/// most [`FOLLOW_MAX_REL_SIGMA`].
fn trustworthy(e: &CbhEstimate) -> bool {
    matches!(e.source, CbhSource::Stereo | CbhSource::ShadowTiming) && e.rel_sigma() <= FOLLOW_MAX_REL_SIGMA
}

/// Where the plane should go, given the frame's estimates of the tracked layers' bases (the first
/// and, with two layers, the second) and the estimates made so far: the lowest trustworthy base,
/// when it lies more than [`MOVE_REL`] from the plane `plane_m`; `None` to stay. The lowest,
/// because the tracker's order of the layers (most opaque first) can swap between frames while
/// the lower layer stays the lower, and the low cloud is what shades the plant first.
pub(super) fn target(layers: [Option<&CbhEstimate>; 2], estimates_made: usize, plane_m: f64) -> Option<f64> {
    if estimates_made < FOLLOW_MIN_ESTIMATES {
        return None;
    }
    let h = layers.into_iter().flatten().filter(|e| trustworthy(e)).map(|e| e.cbh_m).min_by(f64::total_cmp)?;
    ((h / plane_m).ln().abs() > MOVE_REL).then_some(h)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn est(cbh_m: f64, rel: f64, source: CbhSource) -> CbhEstimate {
        CbhEstimate { cbh_m, sigma_m: cbh_m * rel, source }
    }

    /// The plane moves only for a trustworthy estimate, after enough estimates, beyond the
    /// hysteresis; with two layers it goes to the lower base.
    #[test]
    fn the_plane_follows_only_a_trustworthy_estimate_beyond_the_hysteresis() {
        let stereo = est(1000.0, 0.04, CbhSource::Stereo);
        assert_eq!(target([Some(&stereo), None], 2, 1600.0), Some(1000.0));
        assert_eq!(target([Some(&stereo), None], 1, 1600.0), None, "too few estimates");
        assert_eq!(target([Some(&est(1000.0, 0.15, CbhSource::ShadowTiming)), None], 5, 1600.0), None, "too uncertain");
        assert_eq!(target([Some(&est(1000.0, 0.04, CbhSource::Configured)), None], 5, 1600.0), None, "the prior itself");
        assert_eq!(target([Some(&est(1000.0, 0.04, CbhSource::Ceilometer)), None], 5, 1600.0), None);
        assert_eq!(target([Some(&stereo), None], 5, 1040.0), None, "within the hysteresis");
        assert_eq!(target([Some(&stereo), None], 5, 1060.0), Some(1000.0));
        let upper = est(3800.0, 0.04, CbhSource::Stereo);
        assert_eq!(target([Some(&upper), Some(&stereo)], 5, 1600.0), Some(1000.0), "the lower layer");
        assert_eq!(target([Some(&upper), Some(&est(1000.0, 0.5, CbhSource::Configured))], 5, 1600.0), Some(3800.0));
        let mut p = MapPlane::default();
        assert_eq!(p.height_m(1600.0), 1600.0);
        p.moved(1003.0);
        assert_eq!((p.height_m(1600.0), p.moves), (1003.0, 1));
    }
}
