//! The engine's stage objects and steps that own no engine state: frame exposure check, the map
//! stage (tables, cell sky, clear-sky reference learning), the motion stage (earlier maps and the
//! layer tracker) and the per-layer transmittance tables.

use std::sync::Arc;

use chrono::{DateTime, Utc};

use super::{Rejection, SUN_ANGLE_REUSE_DEG};
use crate::cloudmap::{CellPixels, CloudMap, LutCache, build_map_exposed};
use crate::motion::{LayerTracker, MapFeatures, MotionMeasurement, TrackedLayer, label_layers_with, measure_layers};
use crate::segment::Reference;
use crate::sun::SunPosition;

/// The frame QC stage: the clock policy, admission (image size, time order, sun elevation) and the
/// exposure check, with the newest accepted frame time they judge against.
#[derive(Default)]
pub(super) struct FrameQcStage {
    /// The newest accepted frame time.
    pub(super) last_time: Option<DateTime<Utc>>,
}

impl FrameQcStage {
    /// The clock policy (see `Nowcaster::judge_clock`): a note when the newest accepted time is more
    /// than `tol_s` ahead of `now` (it is forgotten: the caller drops the map history), and a
    /// rejection when `time` itself is.
    pub(super) fn judge_clock(&mut self, time: DateTime<Utc>, now: DateTime<Utc>, tol_s: f64) -> (Option<String>, Result<(), Rejection>) {
        let ahead = |t: DateTime<Utc>| (t - now).num_milliseconds() as f64 / 1000.0;
        let mut note = None;
        if let Some(last) = self.last_time
            && ahead(last) > tol_s
        {
            note = Some(format!(
                "clock re-anchored: the newest accepted frame ({}) is {:.0} s ahead of the system clock ({}), beyond the tolerance of {tol_s:.0} s; its time and the map history are dropped",
                crate::io::fmt_time(&last),
                ahead(last),
                crate::io::fmt_time(&now)
            ));
            self.last_time = None;
        }
        let a = ahead(time);
        (note, if a > tol_s { Err(Rejection::AheadOfClock { ahead_s: a, tolerance_s: tol_s }) } else { Ok(()) })
    }

    /// Admission: the calibration's image size (`whole_px`, or `reduced_px` for a frame decoded at
    /// reduced scale), a time after the newest accepted frame, and the sun at least
    /// `min_sun_elevation_deg` high. Returns the sun's position at the frame time and whether the
    /// frame is reduced.
    pub(super) fn admit(&self, frame: &super::Frame, whole_px: (u32, u32), reduced_px: (u32, u32), observer: &crate::sun::Observer, min_sun_elevation_deg: f64) -> Result<(SunPosition, bool), Rejection> {
        let reduced = match frame.image.dimensions() {
            d if d == whole_px => false,
            d if d == reduced_px => true,
            (w, h) => return Err(Rejection::WrongSize { got_w: w, got_h: h, want_w: whole_px.0, want_h: whole_px.1 }),
        };
        if let Some(last) = self.last_time {
            if frame.time == last {
                return Err(Rejection::Duplicate);
            }
            if frame.time < last {
                return Err(Rejection::OutOfOrder);
            }
        }
        let sun = crate::qc::judge_sun(&frame.time, observer, min_sun_elevation_deg)?;
        Ok((sun, reduced))
    }

    /// Exposure and colour over the map's pixels (every fifth map pixel): the mean level, the
    /// share of saturated pixels and the mean red over blue, judged by [`crate::qc::judge_sky`].
    pub(super) fn check_exposure(&self, pixels: &CellPixels, lut: &crate::cloudmap::Lut, qc: &crate::qc::QcParams) -> Result<(), Rejection> {
        let seen = lut.pixel.iter().zip(&pixels.nearest).step_by(5).filter(|(p, _)| **p != crate::cloudmap::NO_PIXEL).map(|(_, rgb)| *rgb);
        crate::qc::judge_sky(&crate::qc::SkyLevels::measure(seen), qc)
    }

    /// Seconds since the newest accepted frame.
    pub(super) fn since_last_s(&self, t: &DateTime<Utc>) -> Option<f64> {
        self.last_time.map(|l| (*t - l).num_milliseconds() as f64 / 1000.0)
    }
}

/// The map stage's state: the look-up tables per plane height, the learned clear-sky reference,
/// and the cells' sun angles (reused while the sun moves little).
#[derive(Default)]
pub(super) struct MapStage {
    luts: LutCache,
    pub(super) reference: Reference,
    cell_sky: Option<(usize, [f32; 3], crate::cloudmap::CellSky)>,
    /// Whether the last frame's motion tracked two layers: the distant-contrast correction
    /// (`segment.distant_contrast`) takes the cloud field as alike across the sky, which a veil over
    /// cumulus is not, so it rests while two layers are tracked.
    pub(super) layered: bool,
    /// The last map's exposure against the library's clear-sky brightness, when it was measured.
    pub(super) last_exposure: Option<f32>,
    /// The far-field learner (`segment.far_field_learning`, [`crate::farfield`]).
    far_field: crate::farfield::FarFieldLearner,
    /// What it did at the newest frame.
    pub(super) far_outcome: crate::farfield::FarOutcome,
}

impl MapStage {
    /// A map stage starting from a clear-sky reference.
    pub(super) fn new(reference: Reference) -> MapStage {
        let mut reference = reference;
        reference.follows_frames = true;
        MapStage { reference, ..Default::default() }
    }

    /// The look-up table of a camera (whole or reduced frames) for a cloud plane `height_m` above it.
    pub(super) fn lut(&mut self, cam: &crate::camera::Camera, obstruction: Option<&image::GrayImage>, params: &crate::cloudmap::MapParams, height_m: f64) -> Arc<crate::cloudmap::Lut> {
        self.luts.get(cam, obstruction, params, height_m)
    }

    /// The cloud map of a frame and its cover `[cloud, thin]`; a nearly clear frame also teaches
    /// the clear-sky reference.
    ///
    /// With `segment.far_field_learning` it also returns the map's far cells' features
    /// ([`crate::farfield::far_cells`]) for [`MapStage::far_field`].
    pub(super) fn build(&mut self, pixels: &CellPixels, lut: &Arc<crate::cloudmap::Lut>, sun: &SunPosition, sp: &crate::segment::SegmentParams) -> (Arc<CloudMap>, [f64; 2], Option<Vec<crate::farfield::FarCell>>) {
        let sd = sun.direction_enu();
        let sd3 = [sd[0] as f32, sd[1] as f32, sd[2] as f32];
        let sun_dir = Some(sd3);
        // The cells' sun angles and default references are reused until the sun has moved
        // `SUN_ANGLE_REUSE_DEG` (about a minute): that shifts a default reference by at most
        // c1/γs · 0.25° ≈ 0.0024 in R/B (defaults; the score thresholds sit ~0.1 apart) and the
        // glare-zone edges by 0.25°.
        let key = Arc::as_ptr(lut) as usize;
        let stale = match &self.cell_sky {
            Some((k, d, _)) => *k != key || crate::segment::gamma_deg(*d, sun_dir) > SUN_ANGLE_REUSE_DEG,
            None => true,
        };
        if stale {
            self.cell_sky = None;
        }
        let sky = &self.cell_sky.get_or_insert_with(|| (key, sd3, crate::cloudmap::CellSky::new(lut, sun_dir, sp))).2;
        let single_layer;
        let map_sp = if self.layered && sp.distant_contrast {
            single_layer = crate::segment::SegmentParams { distant_contrast: false, ..sp.clone() };
            &single_layer
        } else {
            sp
        };
        let (map, settings) = build_map_exposed(pixels, lut, sky, map_sp, &self.reference);
        self.reference.keep_ratio_shift(settings.ratio_shift_ln, settings.ratio_shift_measured.is_some());
        self.reference.keep_exposure(settings.exposure);
        self.last_exposure = settings.exposure;
        let exposure = settings.exposure;
        let far = sp.far_field_learning.then(|| {
            crate::farfield::far_cells(&crate::farfield::FrameCells { map: &map, z_deg: &lut.z_deg, gamma_deg: &sky.gamma_deg, bin: &sky.bin, rgb: &pixels.plain, reference: &self.reference, exposure })
        });
        let map = Arc::new(map);
        let [cf, thin_cf] = map.cover(lut, sp.cloud_fraction_zenith_deg as f32);
        let sample = (0..lut.pixel.len())
            .filter(|&k| lut.pixel[k] != crate::cloudmap::NO_PIXEL)
            .map(|k| (pixels.nearest[k], crate::segment::PixelGeom { z_deg: lut.z_deg[k], gamma_deg: sky.gamma_deg[k] }));
        self.reference.learn_if_clear(sp, cf, sample);
        (map, [cf, thin_cf], far)
    }

    /// The far-field learner's step ([`crate::farfield::FarFieldLearner::step`]) on a frame's map
    /// and its far cells, with the zenith from which they may be reclassified: pairs are made and
    /// the far bands in use applied only with one tracked layer whose motion has been accepted
    /// [`crate::farfield::MIN_CONFIRMED_RUN`] times in a row (`tracker`'s motion as of the
    /// previous frame). Returns the map with its far cells reclassified (the same map when none
    /// changed).
    pub(super) fn far_field(&mut self, t: &DateTime<Utc>, map: Arc<CloudMap>, lut: &crate::cloudmap::Lut, (far, apply_from_zenith_deg): (Vec<crate::farfield::FarCell>, f32), tracker: &LayerTracker, mp: &crate::motion::MotionParams) -> Arc<CloudMap> {
        let priors = tracker.priors();
        let motion = match priors.as_slice() {
            [one] if !self.layered && tracker.primary_accepted_run() >= crate::farfield::MIN_CONFIRMED_RUN => Some(one.v_mps),
            _ => None,
        };
        let mut out = CloudMap::clone(&map);
        let step = crate::farfield::FarStep { time_s: t.timestamp_millis() as f64 / 1000.0, map: &map, z_deg: &lut.z_deg, far, motion_mps: motion, max_gap_s: mp.max_gap_s, apply_from_zenith_deg };
        self.far_outcome = self.far_field.step(step, &mut out);
        if self.far_outcome.changed > 0 { Arc::new(out) } else { map }
    }

    /// Forget the far-field learner's history (the map history was dropped).
    pub(super) fn reset_far_field(&mut self) {
        self.far_field.reset();
    }
}

/// Maps are kept for the cancelled-layer pass this share longer than twice the earlier map's age,
/// so that one about twice as old is at hand when the frame steps jitter.
const OLDER_MARGIN: f64 = 0.1;

/// An earlier map with its motion features (computed once per map).
type KeptMap = (DateTime<Utc>, Arc<CloudMap>, Arc<MapFeatures>);

/// The motion stage's state: earlier maps and the layer tracker.
#[derive(Default)]
pub(super) struct MotionStage {
    pub(super) history: std::collections::VecDeque<KeptMap>,
    pub(super) tracker: LayerTracker,
}

/// What the motion stage found at a frame.
pub(super) struct Moved {
    /// The measurement between the earlier map and this one (none without an earlier map).
    pub(super) measurement: Option<MotionMeasurement>,
    /// The tracked layers after the update.
    pub(super) layers: Vec<TrackedLayer>,
    /// The earlier map measured against, and its age \[s\].
    pub(super) earlier: Option<(KeptMap, f64)>,
    /// This map's motion features.
    pub(super) features: Arc<MapFeatures>,
}

impl MotionStage {
    /// Measure this map against the newest earlier map at least `baseline_s` old (else the oldest
    /// kept, within the gap limit) and update the tracker.
    pub(super) fn update(&mut self, t: &DateTime<Utc>, map: &Arc<CloudMap>, dt_s: Option<f64>, mp: &crate::motion::MotionParams) -> Moved {
        let age = |e: &DateTime<Utc>| (*t - *e).num_milliseconds() as f64 / 1000.0;
        self.history.retain(|(_, m, _)| m.grid == map.grid);
        let in_gap: Vec<&KeptMap> = self.history.iter().filter(|(e, _, _)| age(e) <= mp.max_gap_s).collect();
        let earlier = in_gap.iter().rev().find(|(e, _, _)| age(e) >= mp.baseline_s).or(in_gap.first()).map(|k| (*k).clone());
        // The cancelled-layer pass (when on) needs a map about twice the earlier one's age: maps are
        // then kept that long (at most twice the gap limit).
        let keep_s = earlier.as_ref().filter(|_| mp.cancelled_layer_pass).map_or(mp.max_gap_s, |(e, _, _)| (2.0 * age(e) * (1.0 + OLDER_MARGIN)).max(mp.max_gap_s));
        self.history.retain(|(e, _, _)| age(e) <= keep_s);
        let older = earlier.as_ref().filter(|_| mp.cancelled_layer_pass).and_then(|(e, _, _)| {
            let want_s = 2.0 * age(e);
            self.history.iter().filter(|(o, _, _)| o < e).min_by(|x, y| (age(&x.0) - want_s).abs().total_cmp(&(age(&y.0) - want_s).abs())).cloned()
        });
        let priors = self.tracker.priors();
        let features = Arc::new(MapFeatures::new(map));
        let measurement = earlier.as_ref().map(|(e, pm, pf)| {
            let older = older.as_ref().map(|(o, om, of)| (&**om, &**of, age(o) - age(e)));
            measure_layers((pm, pf), (map, &features), older, age(e), mp, &priors)
        });
        // A measurement locked at zero while the map changes stays out of the filter.
        let layers = self.tracker.update(measurement.as_ref().filter(|m| !m.locked_at_zero), dt_s.unwrap_or(0.0), mp);
        let earlier = earlier.map(|k| {
            let a = age(&k.0);
            (k, a)
        });
        Moved { measurement, layers, earlier, features }
    }

    /// The map's plane moved to `grid` (same cells, `grid.cell_m` over the kept maps' cell size
    /// times larger): the kept maps are relabelled onto it (a cell looks the same way at every
    /// height, [`crate::cloudmap::LutCache::grid_for`], so they are what the new table would have
    /// made of their frames) and the tracked motions scale by the ratio. Their features are kept
    /// (they are in cells).
    pub(super) fn rescale(&mut self, grid: crate::cloudmap::Grid, ratio: f64) {
        for (_, m, _) in &mut self.history {
            if m.grid.n == grid.n {
                *m = Arc::new(m.on_grid(grid));
            }
        }
        self.tracker.rescale(ratio);
    }

    /// Keep an accepted frame's map for the next frames.
    pub(super) fn remember(&mut self, t: DateTime<Utc>, map: Arc<CloudMap>, features: Arc<MapFeatures>) {
        self.history.push_back((t, map, features));
    }
}

/// With two layers tracked, each cloudy cell's layer (the one whose motion explains it): the
/// measurement's own labels when it saw both layers (in the tracked order), else labels from the
/// tracked motions. `None` with one layer or none.
pub(super) fn layer_labels(map: &CloudMap, moved: &Moved, radius_cells: usize) -> Option<Vec<u8>> {
    match (&moved.earlier, moved.layers.as_slice()) {
        (Some(((_, _, pf), age_s)), [l0, l1, ..]) => {
            let (v0, v1) = (l0.motion.v_mps, l1.motion.v_mps);
            Some(moved.measurement.as_ref().and_then(|m| m.labels_for(v0, v1)).unwrap_or_else(|| label_layers_with(pf.feature(), moved.features.feature(), map, *age_s, &[v0, v1], radius_cells)))
        }
        _ => None,
    }
}
