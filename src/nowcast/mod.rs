//! The per-frame engine: [`Nowcaster::step`] turns one frame into a [`Nowcast`]. Replay, the demo
//! and live mode all call it; its state (the previous map, the motion filter, the learned clear-sky
//! reference, the look-up tables, the transmittance tuning) lives in it.

use std::time::Instant as Clock;

use chrono::{DateTime, Utc};

use crate::cloudmap::CloudMap;
use crate::config::Site;
use crate::forecast::{Forecast, forecast_with, horizon_skies};
use crate::io::{InputError, Measurements, Series, fmt_time};
use crate::plant::Plant;
use crate::segment::Reference;
use crate::sun::SunPosition;
use second_camera::StereoInput;
use stages::{FrameQcStage, MapStage, MotionStage, layer_labels};
use forecast_stages::{EnsembleStage, ForecastStage, SiteInputs};

mod forecast_stages;
pub mod glare_fill;
mod plane;
mod second_camera;
mod stages;
mod tuner;
mod types;

pub use types::{Counters, Frame, Nowcast, Rejection, SetupError, StageTimes, Stepped};

/// A pyranometer's column in the measurements and its position (east, north) \[m\].
type PyranometerColumn = (usize, [f64; 2]);

/// The measurements with the pyranometers' columns in them (none when only plant meters are
/// measured).
type Pyranometers = (Measurements, Vec<PyranometerColumn>);

/// The weather columns the power model reads when present (module temperature from the air's
/// temperature and the wind, `power`).
const WEATHER_COLUMNS: [&str; 2] = ["temp_air_c", "wind_speed_mps"];

/// Whether the measurements hold anything the site uses besides its pyranometers: a plant meter
/// column ([`crate::meter`]) or a weather column ([`WEATHER_COLUMNS`]).
fn has_other_used_columns(site: &crate::config::SiteFile, m: &Measurements) -> bool {
    crate::meter::MeterColumns::find(site, m).any() || WEATHER_COLUMNS.iter().any(|c| m.column(c).is_some())
}

/// The measurements with the site's pyranometer columns found, when they hold a pyranometer, a
/// plant meter or a weather column; `None` otherwise (nothing in them is used).
fn used_columns(site: &crate::config::SiteFile, m: Measurements) -> Option<Pyranometers> {
    let cols: Vec<PyranometerColumn> = site.pyranometers.iter().filter_map(|p| m.column(&format!("ghi_{}_wm2", p.name)).map(|c| (c, p.position_m))).collect();
    (!cols.is_empty() || has_other_used_columns(site, &m)).then_some((m, cols))
}

/// Notes on a measurements file whose columns the site does not find: a `[[pyranometers]]` entry
/// without its `ghi_<name>_wm2` column is left out of the tuning, the bands and shadow timing, and
/// a file with no pyranometer, meter or weather column of the site is not used at all
/// ([`used_columns`]).
/// Neither is an error (a logger may lack a sensor for a day), but a misspelt column would
/// otherwise pass unseen.
fn measurement_column_notes(path: &std::path::Path, site: &crate::config::SiteFile, m: &Measurements) -> Vec<String> {
    let file = path.display();
    let wanted: Vec<String> = site.pyranometers.iter().map(|p| format!("ghi_{}_wm2", p.name)).collect();
    let missing: Vec<&str> = wanted.iter().filter(|c| m.column(c).is_none()).map(String::as_str).collect();
    const SHOWN: usize = 12;
    let has = match m.names.len() {
        0 => "only time_utc".to_string(),
        n if n <= SHOWN => format!("the columns {}", m.names.join(", ")),
        n => format!("the columns {}, … ({n} in all)", m.names[..SHOWN].join(", ")),
    };
    if missing.len() == wanted.len() && !has_other_used_columns(site, m) {
        let expected = if wanted.is_empty() {
            "the site names no [[pyranometers]] (each is read from a column ghi_<name>_wm2)".to_string()
        } else {
            format!("no column of the site's [[pyranometers]] ({})", wanted.join(", "))
        };
        return vec![format!(
            "nothing in {file} is used: {expected} and no power_plant_kw, power_<block>_kw, temp_air_c or wind_speed_mps column; it has {has}. The run is as without --measurements"
        )];
    }
    if missing.is_empty() {
        return vec![];
    }
    vec![format!(
        "{file} has no column {} for the site's [[pyranometers]]: {} left out (it has {has})",
        missing.join(", "),
        if missing.len() == 1 { "that sensor is" } else { "those sensors are" }
    )]
}

/// The measurements held with their pyranometer columns, when they have any (what the tuning,
/// the band calibration and shadow timing read).
fn pyranometers_of(m: &Option<Pyranometers>) -> Option<&Pyranometers> {
    m.as_ref().filter(|(_, cols)| !cols.is_empty())
}

/// The cells' sun angles are recomputed when the sun has moved more than this \[°\].
const SUN_ANGLE_REUSE_DEG: f32 = 0.25;

/// The per-frame engine.
pub struct Nowcaster {
    site: Site,
    plant: Plant,
    map_stage: MapStage,
    motion_stage: MotionStage,
    frame_qc: FrameQcStage,
    cbh_series: Option<Series>,
    measurements: Option<Pyranometers>,
    cbh_state: crate::cbh::CbhState,
    /// Where the cloud map's plane lies ([`plane`]).
    plane: plane::MapPlane,
    forecast_stage: ForecastStage,
    ensemble_stage: EnsembleStage,
    alarm: crate::ramp::Alarm,
    image_geometry: std::sync::OnceLock<crate::segment::ImageGeometry>,
    /// The camera for frames decoded at reduced scale ([`crate::intake`]).
    reduced: crate::intake::ReducedFrames,
    /// The second camera's newest frame and the stereo estimator's state.
    stereo: StereoInput,
    /// Counters.
    pub counters: Counters,
}

impl Nowcaster {
    /// Build for a loaded site, with the cloud base height series (if the site names one) and
    /// optional measurements for transmittance tuning.
    pub fn new(site: Site, cbh_series: Option<Series>, measurements: Option<Measurements>) -> Nowcaster {
        let plant = Plant::from_section(&site.file.plant);
        let forecast_stage = ForecastStage::new(site.file.irradiance);
        let measurements = measurements.and_then(|m| used_columns(&site.file, m));
        let reference = site.clear_reference.clone().unwrap_or_default();
        let cbh_state = crate::cbh::CbhState::new(&site.file.clouds);
        let reduce = crate::intake::frame_reduction(site.camera.width_px, site.file.map.cells, site.file.map.decode_reduction);
        let reduced = crate::intake::ReducedFrames::new(&site.camera, site.obstruction.as_ref(), reduce);
        // Known layers (`[[clouds.layers]]`) confirm a second track that moves their way at once.
        let mut motion_stage = MotionStage::default();
        let known: Vec<f64> = site.file.clouds.layers.iter().map(|l| l.toward_deg).collect();
        motion_stage.tracker.set_known_directions(&known, crate::cbh::LAYER_PRIOR_MAX_ANGLE_DEG);
        Nowcaster {
            site,
            plant,
            map_stage: MapStage::new(reference),
            motion_stage,
            frame_qc: FrameQcStage::default(),
            cbh_series,
            measurements,
            cbh_state,
            plane: plane::MapPlane::default(),
            forecast_stage,
            ensemble_stage: EnsembleStage::default(),
            alarm: Default::default(),
            image_geometry: std::sync::OnceLock::new(),
            reduced,
            stereo: StereoInput::default(),
            counters: Counters::default(),
        }
    }

    /// Set the engine up from a site file: load the site and its camera, the base-height series
    /// (which must cover `frame_span` when given) and the measurements (screened; flagged values are
    /// counted). Replay and live mode both start here.
    ///
    /// # Errors
    /// Bad files, an empty plant, a base-height series that misses the frames.
    pub fn open(site_path: &std::path::Path, measurements: Option<&std::path::Path>, frame_span: Option<(DateTime<Utc>, DateTime<Utc>)>) -> Result<Nowcaster, SetupError> {
        let site = Site::load(site_path)?;
        if site.file.plant.blocks.is_empty() {
            return Err(crate::config::ConfigError::Invalid {
                file: site_path.to_path_buf(),
                field: "plant.blocks".into(),
                expected: "at least one block with a footprint".into(),
                got: "none".into(),
            }
            .into());
        }
        let series = match &site.cbh_csv {
            Some(p) => {
                let s = Series::read_cbh_csv(p)?;
                if let Some((a, b)) = frame_span {
                    let (s0, s1) = (s.times[0], *s.times.last().unwrap_or(&s.times[0]));
                    if s1 < a || s0 > b {
                        return Err(InputError::Other {
                            file: p.clone(),
                            message: format!(
                                "cloud base height series ({} to {}) does not cover the frames ({} to {})",
                                fmt_time(&s0),
                                fmt_time(&s1),
                                fmt_time(&a),
                                fmt_time(&b)
                            ),
                        }
                        .into());
                    }
                }
                Some(s)
            }
            None => None,
        };
        let mut flagged = std::collections::BTreeMap::new();
        let mut notes = vec![];
        let meas = match measurements {
            Some(p) => {
                let mut m = Measurements::read_csv(p)?;
                m.label_at_start(site.file.measurements.time_label, None);
                let report = m.screen_site(p, &site.file)?;
                flagged = report.counts();
                notes = measurement_column_notes(p, &site.file, &m);
                Some(m)
            }
            None => None,
        };
        let mut nc = Nowcaster::new(site, series, meas);
        nc.counters.measurements_flagged = flagged;
        nc.counters.measurement_notes = notes;
        Ok(nc)
    }

    /// Restore the alarm state (live mode, after a restart): the state, the frame time of the
    /// change into it, and the newest frame nowcast before the restart ([`crate::ramp::Alarm::restored`]).
    pub fn restore_alarm(&mut self, state: crate::ramp::AlarmState, since: Option<DateTime<Utc>>, last_frame: Option<DateTime<Utc>>) {
        self.alarm = crate::ramp::Alarm::restored(state, since, last_frame);
    }

    /// Current alarm state.
    pub fn alarm_state(&self) -> crate::ramp::AlarmState {
        self.alarm.state
    }

    /// False while the alarm state is restored and no nowcast has confirmed it yet.
    pub fn alarm_current(&self) -> bool {
        self.alarm.current
    }

    /// The plant.
    pub fn plant(&self) -> &Plant {
        &self.plant
    }

    /// Per-pixel geometry of the camera (for whole-image segmentation), computed on first use.
    pub fn image_geometry(&self) -> &crate::segment::ImageGeometry {
        self.image_geometry.get_or_init(|| crate::segment::ImageGeometry::from_camera(&self.site.camera, self.site.obstruction.as_ref()))
    }

    /// Per-pixel geometry for a frame of `width_px` (whole or decoded at reduced scale).
    pub fn image_geometry_for(&self, width_px: u32) -> &crate::segment::ImageGeometry {
        if width_px == self.reduced.camera.width_px && self.reduced.reduce > 1 { self.reduced.geometry() } else { self.image_geometry() }
    }

    /// The site.
    pub fn site(&self) -> &Site {
        &self.site
    }

    /// The learned clear-sky reference.
    pub fn reference(&self) -> &Reference {
        &self.map_stage.reference
    }

    /// Count a frame that could not even be decoded.
    pub fn reject_unreadable(&mut self, why: &str) -> Rejection {
        let r = Rejection::Unreadable(why.to_string());
        self.count(&r);
        r
    }

    /// Count a rejection made outside [`Nowcaster::step`] (e.g. at intake) and hand it back.
    pub fn reject(&mut self, r: Rejection) -> Rejection {
        self.count(&r);
        r
    }

    /// Intake limits for this site's frames: the defaults with the camera's size expected, JPEG
    /// decoded at the reduction the map needs ([`crate::intake::frame_reduction`]).
    pub fn intake_options(&self) -> crate::intake::IntakeOptions {
        crate::intake::IntakeOptions::expecting(self.site.camera.width_px, self.site.camera.height_px).reduced(self.reduced.reduce)
    }

    /// The newest accepted frame time.
    pub fn newest_time(&self) -> Option<DateTime<Utc>> {
        self.frame_qc.last_time
    }

    /// The clock policy, judged before a frame is read. With `tol` = `qc.max_ahead_of_clock_s`:
    /// * a frame more than `tol` ahead of `now` (the system clock) is rejected and counted
    ///   (`ahead_of_clock`); it never becomes the newest time, so it cannot make later frames
    ///   out of order;
    /// * duplicates and out-of-order frames are judged only against accepted frames, which were
    ///   never more than `tol` ahead when accepted;
    /// * should the system clock step back so that the newest accepted time is more than `tol`
    ///   ahead of `now`, the engine re-anchors: it forgets the newest time and its map history (the
    ///   motion filter restarts from the next frame), counts it in [`Counters::clock_reanchors`] and
    ///   returns a message to log.
    ///
    /// # Errors
    /// [`Rejection::AheadOfClock`] (counted).
    pub fn judge_clock(&mut self, time: DateTime<Utc>, now: DateTime<Utc>) -> Result<Option<String>, Rejection> {
        let (note, verdict) = self.frame_qc.judge_clock(time, now, self.site.file.qc.max_ahead_of_clock_s);
        if note.is_some() {
            self.motion_stage.history.clear();
            self.map_stage.reset_far_field();
            self.counters.clock_reanchors += 1;
        }
        verdict.map_err(|r| self.reject(r))?;
        Ok(note)
    }

    /// One frame from its time and a way to read it: the clock policy (from the time alone, so a
    /// frame beyond it is never read), then `read`, then [`Nowcaster::step`]; every rejection counted.
    /// Replay (which reads ahead on another thread) and live mode both go through here.
    pub fn step_with(&mut self, time: DateTime<Utc>, now: DateTime<Utc>, read: impl FnOnce() -> Result<image::RgbImage, crate::intake::IntakeError>) -> Stepped {
        let (note, frame) = match self.judge_clock(time, now) {
            Err(r) => (None, Err(r)),
            Ok(note) => (note, read().map(|image| Frame { time, image }).map_err(|e| self.reject(Rejection::Intake(e)))),
        };
        let result = match &frame {
            Ok(f) => self.step(f),
            Err(r) => Err(r.clone()),
        };
        Stepped { frame, result, clock_note: note }
    }

    fn count(&mut self, r: &Rejection) {
        *self.counters.rejected.entry(r.code().to_string()).or_default() += 1;
    }

    /// Append measurement rows that arrived after start (live mode's feed), already screened
    /// ([`Measurements::screen`]): columns are matched by name (a column the engine does not hold
    /// is ignored, one the rows lack is missing), rows not after the newest held are dropped, and
    /// rows more than `keep_s` older than the newest are forgotten, so memory stays bounded.
    /// Returns the rows appended. Without measurements so far the rows become the engine's
    /// measurements when they hold a configured pyranometer's, a meter's or a weather column
    /// ([`used_columns`]).
    pub fn append_measurements(&mut self, rows: Measurements, keep_s: f64) -> usize {
        let added = match &mut self.measurements {
            None => {
                let n = rows.times.len();
                let Some(used) = used_columns(&self.site.file, rows) else { return 0 };
                self.measurements = Some(used);
                n
            }
            Some((m, _)) => {
                let idx: Vec<Option<usize>> = m.names.iter().map(|n| rows.column(n)).collect();
                let mut added = 0;
                for (i, t) in rows.times.iter().enumerate() {
                    if m.times.last().is_some_and(|l| t <= l) {
                        continue;
                    }
                    m.times.push(*t);
                    m.lines.push(rows.lines.get(i).copied().unwrap_or(0));
                    for (c, k) in idx.iter().enumerate() {
                        m.columns[c].push(k.map(|k| rows.columns[k][i]).unwrap_or(f64::NAN));
                    }
                    added += 1;
                }
                added
            }
        };
        if let Some((m, _)) = &mut self.measurements {
            if let Some(newest) = m.times.last().copied() {
                let cut = m.times.partition_point(|t| (newest - *t).num_milliseconds() as f64 / 1000.0 > keep_s);
                if cut > 0 {
                    m.times.drain(..cut);
                    m.lines.drain(..cut.min(m.lines.len()));
                    for c in &mut m.columns {
                        c.drain(..cut);
                    }
                }
            }
            if m.times.len() >= 2 {
                let mut steps: Vec<i64> = m.times.windows(2).map(|w| (w[1] - w[0]).num_seconds()).collect();
                steps.sort_unstable();
                m.period_s = steps[steps.len() / 2] as f64;
            }
        }
        added
    }

    /// The cloud base height state (the shadow-timing fit and why there is none).
    pub fn cbh_state(&self) -> &crate::cbh::CbhState {
        &self.cbh_state
    }

    /// Pyranometer readings the transmittance tuning holds now.
    pub fn tuning_rows(&self) -> usize {
        self.forecast_stage.tuning_rows()
    }

    /// The configured pyranometers' mean measured GHI \[W m⁻²\] for each row held whose averaging
    /// period began at or after `since`, stamped at the middle of its period (rows where no
    /// pyranometer reads are left out): what live mode shows against the forecast.
    pub fn measured_pyranometer_mean(&self, since: DateTime<Utc>) -> Vec<(DateTime<Utc>, f64)> {
        let Some((m, cols)) = &self.measurements else { return vec![] };
        let half = chrono::Duration::milliseconds((m.period_s.max(1.0) * 500.0) as i64);
        let from = m.times.partition_point(|t| *t < since);
        (from..m.times.len())
            .filter_map(|i| {
                let v: Vec<f64> = cols.iter().map(|(c, _)| m.columns[*c][i]).filter(|v| v.is_finite()).collect();
                (!v.is_empty()).then(|| (m.times[i] + half, v.iter().sum::<f64>() / v.len() as f64))
            })
            .collect()
    }

    /// The measured plant power \[kW\] of each row held whose averaging period began at or after
    /// `since`, stamped at the middle of its period ([`crate::meter::plant_power_since`]: the plant
    /// meter, or every block's meter summed; out-of-range, stuck and missing readings left out):
    /// what live mode shows against the forecast.
    pub fn measured_plant_power(&self, since: DateTime<Utc>) -> Vec<(DateTime<Utc>, f64)> {
        let Some((m, _)) = &self.measurements else { return vec![] };
        crate::meter::plant_power_since(m, &crate::meter::MeterColumns::find(&self.site.file, m), since)
    }

    /// Each block meter's newest usable reading held (block, middle of its period, kW;
    /// [`crate::meter::block_power_latest`]).
    pub fn measured_block_power(&self) -> Vec<(String, DateTime<Utc>, f64)> {
        let Some((m, _)) = &self.measurements else { return vec![] };
        crate::meter::block_power_latest(m, &crate::meter::MeterColumns::find(&self.site.file, m), &self.site.file)
    }

    /// The measurements held: rows, and the end of the newest row's averaging period.
    pub fn measurements_newest(&self) -> (usize, Option<DateTime<Utc>>) {
        match &self.measurements {
            Some((m, _)) => (m.times.len(), m.times.last().map(|t| *t + chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64))),
            None => (0, None),
        }
    }

    /// Forget what the transmittance tuning learnt and go back to the site's configured
    /// transmittances (live mode calls this when the measurement feed has stopped). Returns whether
    /// anything was forgotten.
    pub fn reset_tuning(&mut self) -> bool {
        self.forecast_stage.reset(self.site.file.irradiance)
    }

    /// Cloud base height above ground at a time \[m\].
    pub fn cbh_at(&self, t: &DateTime<Utc>) -> Option<f64> {
        match (&self.cbh_series, self.site.file.clouds.base_height_m) {
            (Some(s), _) => s.at(t, 600.0),
            (None, Some(h)) => Some(h),
            (None, None) if self.site.file.clouds.base_unconfigured() => Some(crate::cbh::UNCONFIGURED_PRIOR_M),
            (None, None) => None,
        }
    }

    /// Horizons \[s\] from the site's forecast settings.
    pub fn horizons_s(&self) -> Vec<u32> {
        self.inputs().horizons_s()
    }

    /// What the forecast and ensemble stages read of the engine.
    fn inputs(&self) -> SiteInputs<'_> {
        SiteInputs { site: &self.site, plant: &self.plant, pyranometers: pyranometers_of(&self.measurements), measurements: self.measurements.as_ref().map(|(m, _)| m) }
    }

    /// Process one frame.
    ///
    /// # Errors
    /// A [`Rejection`] (counted) when the frame cannot be used.
    pub fn step(&mut self, frame: &Frame) -> Result<Nowcast, Rejection> {
        let r = self.step_inner(frame);
        match &r {
            Ok(_) => self.counters.used += 1,
            Err(e) => self.count(e),
        }
        r
    }

    /// The step as a sequence of stages, each a method below with typed output: admission (size,
    /// time order, sun), the map (with its exposure check and clear-sky reference learning), motion,
    /// the forecast (tuning, central, ensemble and bands), then ramps and the alarm. `configured` is
    /// the configured base or the series (the prior), `cbh` the map's plane ([`plane`]).
    fn step_inner(&mut self, frame: &Frame) -> Result<Nowcast, Rejection> {
        let t0 = Clock::now();
        let cam = &self.site.camera;
        let whole = (cam.width_px, cam.height_px);
        let reduced_px = (self.reduced.camera.width_px, self.reduced.camera.height_px);
        let (sun, reduced) = self.frame_qc.admit(frame, whole, reduced_px, &self.site.observer(), self.site.file.qc.min_sun_elevation_deg)?;
        let (configured, cam_z) = (self.cbh_at(&frame.time).ok_or(Rejection::NoCloudBase)?, self.site.file.camera.position_m[2]);
        let cbh = self.plane.height_m(configured);
        // Where the clear sky clips, the pyranometers let the tuning learn what the sky there means
        // (unless `segment.clipped_marks_with_pyranometers`); without them its samples are judged
        // by brightness or unknown (`segment.judge_clipped_bins`, `segment.library_keeps_clipped`).
        self.use_clipped_marks(self.site.file.segment.clipped_marks_with_pyranometers || pyranometers_of(&self.measurements).is_none());
        let (cam, obstruction) = if reduced { (&self.reduced.camera, self.reduced.obstruction.as_ref()) } else { (&self.site.camera, self.site.obstruction.as_ref()) };
        let lut = self.map_stage.lut(cam, obstruction, &self.site.file.map, (cbh - cam_z).max(10.0));
        let pixels = crate::cloudmap::CellPixels::gather(&frame.image, &lut);
        self.frame_qc.check_exposure(&pixels, &lut, &self.site.file.qc)?;
        let t_qc = Clock::now();
        let disk = crate::sundisk::observe(&frame.image, cam, obstruction, &sun, self.site.file.irradiance.sun_disk_radius_deg, self.site.file.segment.saturation_level);
        let (map, [cf, thin_cf], far) = self.map_stage.build(&pixels, &lut, &sun, &self.site.file.segment);
        drop(pixels);
        // The sun's record reads this camera's own map, before the second camera fills it.
        let seen = disk.and_then(|d| crate::sundisk::SunThroughCloud::read(d, &map, &lut, &sun));
        self.forecast_stage.observe_sun(&self.site.file.irradiance, seen);
        // The far field read by what the same clouds turned out to be nearer (`farfield`), on this
        // camera's own map.
        let map = match far {
            Some(far) => self.map_stage.far_field(&frame.time, map, &lut, (far, self.plant_ray_zenith_deg(&sun, lut.grid.height_m) + crate::farfield::PLANT_RAY_MARGIN_DEG), &self.motion_stage.tracker, &self.site.file.motion),
            None => map,
        };
        // With `sun_line_beam`, the beam measured along the camera's sun line and the cells around the
        // sun that carry it.
        let sun_line = if self.site.file.irradiance.sun_line_beam {
            crate::sundisk::observe_glare(&frame.image, cam, obstruction, &sun, self.site.file.segment.saturation_level)
                .and_then(|r| self.forecast_stage.sun_line.observe(r, crate::sundisk::ring_cloud_share(&map, &lut, &sun)))
                .map(|t| (glare_fill::sun_line_cells(&map, &lut.dir, sun.direction_enu()), t))
        } else {
            None
        };
        let map = self.second_map_stage(&frame.time, map, &lut, &sun);
        let t_map = Clock::now();
        let dt_s = self.frame_qc.since_last_s(&frame.time);
        let moved = self.motion_stage.update(&frame.time, &map, dt_s, &self.site.file.motion);
        let motion = moved.layers.first().map(|l| l.motion);
        self.map_stage.layered = moved.layers.len() > 1;
        let labels = layer_labels(&map, &moved, self.site.file.motion.label_radius_cells);
        let t_motion = Clock::now();
        let layer_v: Vec<[f64; 2]> = moved.layers.iter().map(|l| l.motion.v_mps).collect();
        self.stereo_stage(frame, reduced, &sun, labels.as_deref().map(|l| crate::stereo::LayerCells::from_labels(&map, l, 2)), &layer_v);
        // The map's whole tables, built at most once for the stages that read them unchanged.
        let mut whole = crate::forecast::SharedTables::new(&map);
        let cbh_est = self.cbh_stage(&frame.time, &map, (cbh, configured), motion.map(|m| m.v_mps), layer_v.get(1).copied(), &whole);
        let cbh_factor = cbh_est.cbh_m / cbh;
        // The second layer's base: its prior and its own stereo estimate (exactly the prior, at
        // factor 1 and the prior's spread, with one camera and no known layers).
        let cbh_upper = match layer_v.as_slice() {
            [v0, v1, ..] => Some(self.cbh_state.upper(frame.time, configured, *v1, *v0)),
            _ => None,
        };
        let upper = cbh_upper.map_or((1.0, crate::cbh::UPPER_LAYER_PRIOR_REL_SIGMA), |u| (u.cbh_m / cbh, u.rel_sigma()));
        self.stereo.cbh_above_a_m = Some((cbh_est.cbh_m - cam_z).max(10.0));
        let cx = SiteInputs { site: &self.site, plant: &self.plant, pyranometers: pyranometers_of(&self.measurements), measurements: self.measurements.as_ref().map(|(m, _)| m) };
        // With `glare_fill_from_history`, each layer's view of the map with the glare filled from
        // the kept maps moved by that layer's motion (the motion above measured the map as seen).
        let glare_filled = self.glare_filled(&frame.time, &map, &layer_v, labels.as_deref());
        let tune_map = glare_filled.first().map_or(&*map, |(m, _)| m);
        self.forecast_stage.tune(cx, &frame.time, &sun, tune_map, [cf, thin_cf], (cbh, cbh_factor), motion.map(|m| m.v_mps), moved.layers.len() > 1);
        // Until the tracked motion is confirmed, the forecast's advection carries a wider spread.
        let spread_mps = if self.site.file.motion.widen_unconfirmed { self.motion_stage.tracker.unconfirmed_spread_mps(self.site.file.ramps.motion_confirm_measurements as usize) } else { 0.0 };
        let advected: std::borrow::Cow<[crate::motion::TrackedLayer]> = if spread_mps > 0.0 {
            moved.layers.iter().map(|l| crate::motion::TrackedLayer { motion: crate::motion::Motion { sigma_mps: l.motion.sigma_mps.max(spread_mps), ..l.motion }, ..*l }).collect()
        } else {
            std::borrow::Cow::Borrowed(&moved.layers)
        };
        let input = self.forecast_stage.input(cx, &frame.time, (cbh, cbh_factor, cbh_est.rel_sigma()), upper, &advected, [cf, thin_cf]);
        // Each layer's view of the map: the map itself, or its glare filled from the kept maps.
        let views: Vec<(&CloudMap, Option<&[u8]>)> = match (glare_filled.as_slice(), labels.as_deref()) {
            ([], Some(lb)) => vec![(&*map, Some(lb)), (&*map, Some(lb))],
            ([], None) => vec![(&*map, None)],
            ([(m, _)], None) => vec![(m, None)],
            (views, _) => views.iter().map(|(m, lb)| (m, lb.as_deref())).collect(),
        };
        let veil = match (views.len(), labels.as_deref()) {
            (2.., Some(lb)) => Some(glare_fill::veil_layer(&map, lb)),
            _ => None,
        };
        let tms: Vec<_> = views
            .iter()
            .enumerate()
            .map(|(l, (m, lb))| {
                let patch = sun_line.as_ref().map(|(cells, t)| {
                    let t = if veil.is_none_or(|v| v as usize == l) { *t } else { f64::INFINITY };
                    (cells.as_slice(), glare_fill::sun_line_features(t, input.params.beams()))
                });
                let layer = lb.map(|lb| (lb, l as u8));
                whole.take_for(m, &input.params, layer, patch).unwrap_or_else(|| crate::forecast::TransmittanceMap::for_layer_with(m, &input.params, layer, patch))
            })
            .collect();
        drop(whole);
        let skies = horizon_skies(&input);
        let mut fc = forecast_with(&tms, map.grid, &input, &skies);
        let t_central = Clock::now();
        let members = self.ensemble_stage.run(cx, self.forecast_stage.params(), &frame.time, &tms, map.grid, &input, &skies, &mut fc);
        let (ramps, plant_members_ghi_wm2, plant_members_power_kw) = self.ramps_of(&frame.time, &fc, &members);
        let t_ens = Clock::now();
        let alarm_change = self.alarm.update(&frame.time, &ramps, self.motion_stage.tracker.primary_accepted_run(), &self.site.file.ramps);
        let t_fc = Clock::now();
        self.motion_stage.remember(frame.time, map.clone(), moved.features);
        self.follow_estimate([Some(&cbh_est), cbh_upper.as_ref()], map.grid, cbh);
        self.frame_qc.last_time = Some(frame.time);
        let ms = |a: Clock, b: Clock| (b - a).as_secs_f64() * 1000.0;
        Ok(Nowcast {
            time: frame.time,
            dt_s,
            baseline_s: moved.measurement.as_ref().map(|m| m.dt_s),
            sun,
            cbh_m: cbh,
            cbh: cbh_est,
            cbh_upper,
            cloud_fraction: cf,
            map,
            measurement: moved.measurement,
            motion,
            layers: moved.layers,
            forecast: fc,
            plant_members_ghi_wm2,
            plant_members_power_kw,
            ramps,
            alarm: self.alarm.state,
            alarm_change,
            alarm_reason: self.alarm.reason().to_string(),
            alarm_basis: self.alarm.basis().cloned(),
            irradiance: *self.forecast_stage.params(),
            tuning_rows: self.forecast_stage.tuning_rows(),
            clear_rb_scale: f64::from(self.map_stage.reference.ratio_scale()),
            exposure: self.map_stage.last_exposure.map(f64::from),
            band_scale: [300, 600, 900].map(|h| self.ensemble_stage.band_scale(h)),
            sun_disk: disk,
            times: StageTimes { qc_ms: ms(t0, t_qc), map_ms: ms(t_qc, t_map), motion_ms: ms(t_map, t_motion), forecast_ms: ms(t_motion, t_central) + ms(t_ens, t_fc), ensemble_ms: ms(t_central, t_ens) },
        })
    }

    /// The map as each layer's table reads it with `irradiance.glare_fill_from_history`
    /// ([`glare_fill::layer_views`]); empty when the setting is off.
    fn glare_filled(&self, t: &DateTime<Utc>, map: &CloudMap, layer_v: &[[f64; 2]], labels: Option<&[u8]>) -> Vec<(CloudMap, Option<Vec<u8>>)> {
        let p = &self.site.file.irradiance;
        if !p.glare_fill_from_history {
            return vec![];
        }
        let earlier = || self.motion_stage.history.iter().rev().map(|(e, m, _)| ((*t - *e).num_milliseconds() as f64 / 1000.0, &**m));
        glare_fill::layer_views(map, earlier, layer_v, labels, p.glare_fill_max_age_s)
    }

    /// Cloud base height: every estimate combined (ceilometer or configured value `prior_cbh_m`,
    /// stereo, shadow timing at the pyranometers); the map lies on its plane `map_cbh_m` and the
    /// forecast scales its look-ups by the ratio (`cbh_factor`).
    fn cbh_stage(
        &mut self,
        t: &DateTime<Utc>,
        map: &CloudMap,
        (map_cbh_m, prior_cbh_m): (f64, f64),
        v_map_mps: Option<[f64; 2]>,
        v_other_mps: Option<[f64; 2]>,
        tables: &crate::forecast::SharedTables,
    ) -> crate::cbh::CbhEstimate {
        self.cbh_state.update(&crate::cbh::CbhFrame {
            time: *t,
            map,
            params: self.forecast_stage.params(),
            map_cbh_m,
            prior_cbh_m,
            from_series: self.cbh_series.is_some(),
            v_map_mps,
            v_other_mps,
            camera_m: self.site.file.camera.position_m,
            measurements: pyranometers_of(&self.measurements).map(|(m, c)| (m, c.as_slice())),
            observer: self.site.observer(),
            altitude_m: self.site.file.site.elevation_m,
            model: self.site.clear_sky_model(),
            tables: Some(tables),
        })
    }

    /// The largest zenith angle \[°\] at which the camera sees a point where the sun's ray to one
    /// of the plant's points crosses the map's plane (`plane_above_camera_m` above the camera): the
    /// cells the current state reads, which the far-field learner leaves to the rules
    /// ([`crate::farfield::PLANT_RAY_MARGIN_DEG`]). 0 with the sun below the horizon.
    fn plant_ray_zenith_deg(&self, sun: &SunPosition, plane_above_camera_m: f64) -> f32 {
        let d = sun.direction_enu();
        if d[2] <= 0.0 {
            return 0.0;
        }
        let cam = self.site.file.camera.position_m;
        let reach = [plane_above_camera_m * d[0] / d[2], plane_above_camera_m * d[1] / d[2]];
        let far_m = self.plant.blocks.iter().flat_map(|b| &b.points_m).map(|p| (p[0] + reach[0] - cam[0]).hypot(p[1] + reach[1] - cam[1])).fold(0.0, f64::max);
        far_m.atan2(plane_above_camera_m).to_degrees() as f32
    }

    /// Move the map's plane for the next frame when the layers' estimated bases (`layers`: the
    /// first's, the second's) say so ([`plane::target`]; with `[clouds] map_follows_estimate` and
    /// no ceilometer series): the kept maps go onto the new grid and the speeds measured on the
    /// plane scale by the ratio ([`plane`]). `grid` is this frame's map's, on the plane `plane_m`
    /// (above the site origin). The new table is built by the next frame.
    fn follow_estimate(&mut self, layers: [Option<&crate::cbh::CbhEstimate>; 2], grid: crate::cloudmap::Grid, plane_m: f64) {
        if !self.site.file.clouds.map_follows_estimate || self.cbh_series.is_some() {
            return;
        }
        let Some(h) = plane::target(layers, self.cbh_state.estimates_made(), plane_m) else { return };
        let cam_z = self.site.file.camera.position_m[2];
        let new = crate::cloudmap::LutCache::grid_for(&self.site.file.map, (h - cam_z).max(10.0));
        if new == grid {
            return;
        }
        let ratio = new.cell_m / grid.cell_m;
        self.motion_stage.rescale(new, ratio);
        self.cbh_state.rescale_map_motion(ratio);
        self.plane.moved(cam_z + new.height_m);
    }

    /// How often the cloud map's plane moved to follow the estimated base ([`plane`]).
    pub fn map_plane_moves(&self) -> usize {
        self.plane.moves
    }

    /// Ramp events from the plant's power series (central and members), and the members' plant
    /// GHI and plant power per horizon.
    #[allow(clippy::type_complexity)]
    fn ramps_of(&self, t: &DateTime<Utc>, fc: &Forecast, members: &[Forecast]) -> (Vec<crate::ramp::RampEvent>, Vec<Vec<f64>>, Vec<Vec<f64>>) {
        let step_min = self.site.file.forecast.step_s as f64 / 60.0;
        let cap_ac: f64 = self.plant.blocks.iter().map(|b| b.ac_capacity_kw.unwrap_or(b.capacity_kw / self.site.file.power.dc_ac_ratio)).sum();
        let member_series: Vec<Vec<f64>> = members.iter().map(|m| m.plant_power_kw()).collect();
        let ramps = crate::ramp::ramp_events(t, &fc.plant_power_kw(), &member_series, step_min, cap_ac, &self.site.file.ramps);
        let plant_members_ghi_wm2: Vec<Vec<f64>> =
            (0..fc.plant.len()).map(|k| members.iter().filter_map(|m| m.plant.get(k).map(|r| r.irradiance.ghi_wm2)).collect()).collect();
        let plant_members_power_kw: Vec<Vec<f64>> = (0..fc.plant.len()).map(|k| members.iter().filter_map(|m| m.plant.get(k).map(|r| r.power_kw)).collect()).collect();
        (ramps, plant_members_ghi_wm2, plant_members_power_kw)
    }

}

#[cfg(test)]
mod tests {
    use super::*;

    fn demo_engine() -> Nowcaster {
        let site = Site::load(&std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap();
        Nowcaster::new(site, None, None)
    }

    /// The clock policy: a frame beyond the tolerance ahead of the clock is rejected and counted
    /// and never becomes the newest time; when the clock steps back behind the newest accepted time
    /// by more than the tolerance, the engine re-anchors once and frames at the clock's time are
    /// taken again.
    #[test]
    fn clock_policy_rejects_future_frames_and_reanchors() {
        let mut nc = demo_engine();
        let t = |s: &str| s.parse::<DateTime<Utc>>().unwrap();
        let now = t("2026-06-14T10:00:00Z");
        assert_eq!(nc.judge_clock(t("2026-06-14T10:01:59Z"), now), Ok(None));
        let r = nc.judge_clock(t("2026-06-14T10:02:01Z"), now).unwrap_err();
        assert_eq!(r.code(), "ahead_of_clock");
        assert_eq!(nc.counters.rejected["ahead_of_clock"], 1);
        assert_eq!(nc.newest_time(), None);
        // An accepted frame at 10:00, then the host clock steps back an hour.
        nc.frame_qc.last_time = Some(now);
        assert_eq!(nc.judge_clock(t("2026-06-14T09:59:00Z"), now), Ok(None));
        let back = t("2026-06-14T09:00:00Z");
        let note = nc.judge_clock(t("2026-06-14T09:00:00Z"), back).unwrap().unwrap();
        assert!(note.contains("re-anchored"), "{note}");
        assert_eq!(nc.newest_time(), None);
        assert_eq!(nc.counters.clock_reanchors, 1);
        // Within the tolerance nothing happens.
        nc.frame_qc.last_time = Some(t("2026-06-14T09:01:00Z"));
        assert_eq!(nc.judge_clock(t("2026-06-14T09:00:30Z"), back), Ok(None));
        assert_eq!(nc.counters.clock_reanchors, 1);
    }
}
