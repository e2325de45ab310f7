//! The second camera of a pair (`[second_camera]`): the frames it offers, the cells of the map it
//! sees better ([`crate::multicam`]) and the stereo cloud base height ([`crate::stereo`]).

use chrono::{DateTime, Utc};

use super::{Frame, Nowcaster};
use crate::cloudmap::CloudMap;
use crate::sun::SunPosition;

/// The second camera's side of the stereo cloud base height ([`Nowcaster::offer_second_frame`]).
#[derive(Debug, Default)]
pub(super) struct StereoInput {
    /// The newest offered frame and its time.
    pending: Option<(DateTime<Utc>, image::RgbImage)>,
    /// When the estimator last ran.
    last_run: Option<DateTime<Utc>>,
    /// Why its newest run gave no estimate, if it gave none.
    last_refusal: Option<String>,
    /// The second frame the estimator last used (a frame is used once).
    last_pair: Option<DateTime<Utc>>,
    /// The second camera's table on the map grid ([`crate::multicam`]).
    view: crate::multicam::SecondView,
    /// The newest frame's combined base height above camera A \[m\], for placing the second
    /// camera's view on the map (the map's own plane before the first frame).
    pub(super) cbh_above_a_m: Option<f64>,
    /// What the newest frame's map took from the second camera.
    last_merge: Option<crate::multicam::MergeCount>,
}

impl Nowcaster {
    /// Whether both cameras' libraries use their clipped bins' marks this frame
    /// ([`crate::segment::Reference::clipped_marks_in_use`]): the second camera's (its map cells
    /// and the stereo pair) follows the first's.
    pub(super) fn use_clipped_marks(&mut self, marks: bool) {
        self.map_stage.reference.clipped_marks_in_use = marks;
        if let Some(r) = self.site.second_camera.as_mut().and_then(|sc| sc.clear_reference.as_mut()) {
            r.clipped_marks_in_use = marks;
        }
    }

    /// Give the engine the second camera's frame taken at `time` (`[second_camera]`): the next
    /// [`Nowcaster::step`] whose frame lies within [`crate::config::SECOND_FRAME_SLACK_S`] of it
    /// runs the stereo estimate ([`crate::stereo`], at most every `every_s`) and combines it into
    /// the cloud base height as source `stereo`. Ignored without a second camera.
    pub fn offer_second_frame(&mut self, time: DateTime<Utc>, image: image::RgbImage) {
        if self.site.second_camera.is_some() {
            self.stereo.pending = Some((time, image));
        }
    }

    /// Why the newest stereo run gave no estimate (`None` after an estimate, or before any run).
    pub fn stereo_refusal(&self) -> Option<&str> {
        self.stereo.last_refusal.as_deref()
    }

    /// What the newest frame's cloud map took from the second camera (`None` when it took nothing:
    /// no second camera, `map_cells = false`, or no paired frame).
    pub fn second_map_cells(&self) -> Option<crate::multicam::MergeCount> {
        self.stereo.last_merge
    }

    /// The pending second-camera frame when it pairs with a frame at `t` and has its calibration's
    /// size.
    fn paired_second_frame<'a>(pending: Option<&'a (DateTime<Utc>, image::RgbImage)>, sc: &crate::config::SecondCamera, t: &DateTime<Utc>) -> Option<&'a image::RgbImage> {
        let p = pending?;
        let gap_s = (p.0 - *t).num_milliseconds() as f64 / 1000.0;
        (gap_s.abs() <= crate::config::SECOND_FRAME_SLACK_S && p.1.dimensions() == (sc.camera.width_px, sc.camera.height_px)).then_some(&p.1)
    }

    /// The multi-camera map: the cells of `map` (on `lut`) the second camera sees better, from its
    /// paired frame ([`crate::multicam`]), placed at the previous frame's combined base height
    /// over this frame's map plane.
    pub(super) fn second_map_stage(&mut self, t: &DateTime<Utc>, map: std::sync::Arc<CloudMap>, lut: &crate::cloudmap::Lut, sun: &SunPosition) -> std::sync::Arc<CloudMap> {
        self.stereo.last_merge = None;
        let Some(sc) = self.site.second_camera.as_ref().filter(|s| s.map_cells) else { return map };
        let Some(img2) = Self::paired_second_frame(self.stereo.pending.as_ref(), sc, t) else { return map };
        let a_m = self.site.file.camera.position_m;
        let default_b = crate::segment::Reference::default();
        let b = crate::multicam::View {
            camera: &sc.camera,
            obstruction: sc.obstruction.as_ref(),
            offset_m: [sc.position_m[0] - a_m[0], sc.position_m[1] - a_m[1], sc.position_m[2] - a_m[2]],
            reference: sc.clear_reference.as_ref().unwrap_or(&default_b),
            image: img2,
        };
        let d = sun.direction_enu();
        let sun_dir = Some([d[0] as f32, d[1] as f32, d[2] as f32]);
        let factor = self.stereo.cbh_above_a_m.map_or(1.0, |h| h / lut.grid.height_m);
        let (merged, count) = self.stereo.view.merge((&map, lut), &b, factor, sun_dir, &self.site.file.segment, &crate::multicam::MultiParams::default());
        self.stereo.last_merge = Some(count);
        std::sync::Arc::new(merged)
    }

    /// Run the stereo estimate on this frame and the pending second-camera frame, when they pair
    /// and the last run is at least `every_s` old; an estimate goes to the base-height state. With
    /// two layers tracked (`layers`: their cells on this frame's map) each layer is matched on its
    /// own cells and its estimate goes to that layer ([`crate::stereo::estimate_layers`]), known by
    /// its motion on the map (`layer_v`, the tracked layers' in order).
    pub(super) fn stereo_stage(&mut self, frame: &Frame, reduced: bool, sun: &SunPosition, layers: Option<crate::stereo::LayerCells>, layer_v: &[[f64; 2]]) {
        let Some(sc) = &self.site.second_camera else { return };
        let Some((t2, img2)) = &self.stereo.pending else { return };
        let gap_s = (*t2 - frame.time).num_milliseconds() as f64 / 1000.0;
        if gap_s.abs() > crate::config::SECOND_FRAME_SLACK_S || self.stereo.last_pair == Some(*t2) {
            return;
        }
        if self.stereo.last_run.is_some_and(|l| ((frame.time - l).num_milliseconds() as f64) / 1000.0 < sc.every_s) {
            return;
        }
        self.stereo.last_run = Some(frame.time);
        self.stereo.last_pair = Some(*t2);
        if img2.dimensions() != (sc.camera.width_px, sc.camera.height_px) {
            self.stereo.last_refusal = Some(format!("second camera frame is {}x{} px, its calibration {}x{}", img2.width(), img2.height(), sc.camera.width_px, sc.camera.height_px));
            return;
        }
        let (cam, obstruction) = if reduced { (&self.reduced.camera, self.reduced.obstruction.as_ref()) } else { (&self.site.camera, self.site.obstruction.as_ref()) };
        let cam_a_m = self.site.file.camera.position_m;
        // The second camera's own clear-sky library (from its `calibrate` run), else the default.
        let default_b = crate::segment::Reference::default();
        let reference_b = sc.clear_reference.as_ref().unwrap_or(&default_b);
        let a = crate::stereo::StereoView { camera: cam, obstruction, position_m: cam_a_m, reference: &self.map_stage.reference, image: &frame.image };
        let b = crate::stereo::StereoView { camera: &sc.camera, obstruction: sc.obstruction.as_ref(), position_m: sc.position_m, reference: reference_b, image: img2 };
        let d = sun.direction_enu();
        let sun_dir = Some([d[0] as f32, d[1] as f32, d[2] as f32]);
        let (seg, params) = (&self.site.file.segment, crate::stereo::StereoParams::default());
        let fits = match &layers {
            Some(cells) => crate::stereo::estimate_layers(&a, &b, sun_dir, seg, &params, cells),
            None => vec![crate::stereo::estimate(&a, &b, sun_dir, seg, &params)],
        };
        let mut refused = vec![];
        for (l, r) in fits.into_iter().enumerate() {
            match r {
                Ok(mut fit) => {
                    // The estimator's height is above camera A; the engine's is above the site origin.
                    fit.cbh_m += cam_a_m[2];
                    self.cbh_state.observe_stereo_layer(layer_v.get(l).copied(), frame.time, &fit);
                }
                Err(e) if layers.is_some() => refused.push(format!("layer {}: {e}", l + 1)),
                Err(e) => refused.push(e.to_string()),
            }
        }
        self.stereo.last_refusal = (!refused.is_empty()).then(|| refused.join("; "));
    }
}
