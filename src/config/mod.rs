//! Site and calibration files: types, loading and validation.
//!
//! Both are TOML. Every error names the file, the field path and what was expected, e.g.
//! `site.toml: field site.latitude_deg: expected a number from -90 to 90, got 123`.
//! Relative paths inside a file are resolved against the file's own folder.

mod calibration;
mod limits;
mod modbus_feed;
mod webhook;

pub use webhook::WebhookSection;
pub use modbus_feed::{MAX_MODBUS_REGISTERS, ModbusFeedSection, Quantity, RegisterFormat, RegisterKind, RegisterSpec, WordOrder};
pub use calibration::{CalibrationFile, CameraCalibration, FitRecord, MIN_DETECTIONS_PER_PARAMETER, MIN_FIT_AZIMUTH_SPAN_DEG, MIN_FIT_DETECTIONS, MIN_ZENITH_SPAN_PER_RADIAL_TERM_DEG};
pub use limits::{MAX_BLOCKS, MAX_LAYOUT_CELLS, MAX_PLANT_POINTS, MAX_POLYGON_VERTICES, MAX_PYRANOMETERS, MEMORY_CAP_BYTES, MemoryEstimate, layout_cells_of, polygon_area_m2};

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::camera::Camera;
use crate::clearsky::ClearSkyModel;
use crate::sun::Observer;
pub use crate::cbh::CloudSection;
pub use crate::plant::{BlockSpec, MountKind, PlantSection};
pub use crate::settings::{ConfigError, parse_toml, read_toml};
use crate::settings::Check;

/// A path written in the file `base`, resolved against that file's folder (absolute paths stay).
pub fn resolve(base: &Path, p: &Path) -> PathBuf {
    if p.is_absolute() { p.to_path_buf() } else { base.parent().unwrap_or(Path::new(".")).join(p) }
}

// ---------------------------------------------------------------------------------------------
// site.toml

/// The whole `site.toml`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SiteFile {
    /// Where the site is.
    pub site: SiteSection,
    /// Which camera, and where it stands.
    pub camera: CameraSection,
    /// Cloud base height.
    #[serde(default)]
    pub clouds: CloudSection,
    /// The plant footprint and its blocks.
    #[serde(default)]
    pub plant: PlantSection,
    /// Forecast horizons.
    #[serde(default)]
    pub forecast: ForecastSection,
    /// Cloud segmentation thresholds.
    #[serde(default)]
    pub segment: crate::segment::SegmentParams,
    /// Frame quality control.
    #[serde(default)]
    pub qc: crate::qc::QcParams,
    /// Cloud motion estimation.
    #[serde(default)]
    pub motion: crate::motion::MotionParams,
    /// The cloud-map grid.
    #[serde(default)]
    pub map: crate::cloudmap::MapParams,
    /// Beam transmittance and diffuse settings of the forecast.
    #[serde(default)]
    pub irradiance: crate::forecast::IrradianceParams,
    /// PV power model.
    #[serde(default)]
    pub power: crate::power::PowerParams,
    /// Ramp definition and alarm states.
    #[serde(default)]
    pub ramps: crate::ramp::RampParams,
    /// How `evaluate --measurements` scores (the ramp definition of `[evaluation.ramps]`).
    #[serde(default, skip_serializing_if = "crate::measured::EvaluationSection::is_default")]
    pub evaluation: crate::measured::EvaluationSection,
    /// Pyranometers whose readings a measurements CSV may hold (`ghi_<name>_wm2` columns).
    #[serde(default)]
    pub pyranometers: Vec<PyranometerSpec>,
    /// How the measurements CSV's times label their averaging periods.
    #[serde(default, skip_serializing_if = "crate::io::MeasurementsSection::is_default")]
    pub measurements: crate::io::MeasurementsSection,
    /// Pyranometers or a plant meter polled over Modbus TCP as live mode's measurement feed.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub measurements_modbus: Option<ModbusFeedSection>,
    /// A second camera for the cloud base height from stereo ([`crate::stereo`]).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub second_camera: Option<SecondCameraSection>,
    /// How live mode delivers webhook notifications (the URL comes from `--webhook-url-file`).
    #[serde(default, skip_serializing_if = "WebhookSection::is_default")]
    pub webhook: WebhookSection,
}

/// `[second_camera]`: a second sky camera some hundreds of metres or more from the first, used only
/// for the cloud base height from stereo ([`crate::stereo`]).
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SecondCameraSection {
    /// The camera's calibration file (relative to the site file). Its obstruction mask and its
    /// clear-sky library (from its own `calibrate` run) are used for its segmentation.
    pub calibration: PathBuf,
    /// Position relative to the site origin, (east, north, up) \[m\]; at least
    /// [`crate::stereo::MIN_BASELINE_M`] horizontally from `[camera]`.
    #[serde(deserialize_with = "crate::settings::exact::numbers")]
    pub position_m: [f64; 3],
    /// Folder of its frames for `replay` (relative to the site file), named like the first camera's;
    /// a frame within [`SECOND_FRAME_SLACK_S`] of a first-camera frame is paired with it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub frames: Option<PathBuf>,
    /// Folder its frames arrive in for `live` (relative to the site file; written by rename, named
    /// like the first camera's); each stepped frame is paired with the frame nearest in time within
    /// [`SECOND_FRAME_SLACK_S`].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub incoming: Option<PathBuf>,
    /// Run the stereo estimate at most this often \[s\] (default 60).
    #[serde(default = "default_stereo_every_s")]
    pub every_s: f64,
    /// Take the cloud map's cells this camera sees better (nearer its zenith, away from its sun
    /// glare, where the first camera is masked) from its paired frame ([`crate::multicam`];
    /// default true).
    #[serde(default = "default_true")]
    pub map_cells: bool,
}

fn default_true() -> bool {
    true
}

fn default_stereo_every_s() -> f64 {
    60.0
}

/// Largest time between a first- and a second-camera frame paired for stereo \[s\].
pub const SECOND_FRAME_SLACK_S: f64 = 5.0;

/// `[[pyranometers]]`: a GHI sensor on the plant.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PyranometerSpec {
    /// Name; its column in a measurements CSV is `ghi_<name>_wm2`.
    pub name: String,
    /// Position (east, north) \[m\] from the site origin.
    #[serde(deserialize_with = "crate::settings::exact::numbers")]
    pub position_m: [f64; 2],
}

/// `[site]`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SiteSection {
    /// A name for display.
    pub name: String,
    /// Latitude \[°\], north positive.
    pub latitude_deg: f64,
    /// Longitude \[°\], east positive.
    pub longitude_deg: f64,
    /// Height above sea level \[m\].
    pub elevation_m: f64,
    /// Mean pressure \[hPa\]; default from the standard atmosphere at `elevation_m`.
    #[serde(default)]
    pub pressure_hpa: Option<f64>,
    /// Mean temperature \[°C\] for refraction; default 12.
    #[serde(default)]
    pub temperature_c: Option<f64>,
    /// `"ineichen-perez"` (default) or `"haurwitz"`.
    #[serde(default = "default_clear_sky_model")]
    pub clear_sky_model: String,
    /// Linke turbidity for Ineichen–Perez; default 3.0.
    #[serde(default = "default_linke")]
    pub linke_turbidity: f64,
    /// The site's time zone for displays: an IANA name (`"Europe/Madrid"`) or a fixed offset from
    /// UTC (`"+02:00"`, `"UTC-5"`); default UTC. Every file and API time stays in UTC.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub timezone: Option<String>,
}

/// A site's display time zone, checked.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct SiteTimeZone {
    /// The name as given (`"UTC"` when none was).
    pub name: String,
    /// A fixed offset east of UTC \[min\]; none for an IANA name.
    pub fixed_offset_min: Option<i32>,
}

/// Where IANA time zone names are checked, when the system has the database.
const ZONEINFO_DIR: &str = "/usr/share/zoneinfo";

/// Parse a time zone: `UTC`, a fixed offset (`+02:00`, `-0530`, `UTC+2`, `GMT-03:30`, at most
/// 14 h) or an IANA name (letters, digits, `_`, `+`, `-` in `/`-separated parts; when the system
/// has its zone database in `/usr/share/zoneinfo`, the name must be in it).
///
/// # Errors
/// What was expected, in words.
pub fn parse_time_zone(s: &str) -> Result<SiteTimeZone, String> {
    const EXPECTED: &str = "an IANA time zone name such as \"Europe/Madrid\" or an offset such as \"+02:00\" (at most 14 h)";
    let t = s.trim();
    let upper = t.to_ascii_uppercase();
    if ["UTC", "Z", "GMT"].contains(&upper.as_str()) {
        return Ok(SiteTimeZone { name: "UTC".into(), fixed_offset_min: Some(0) });
    }
    let rest = upper.strip_prefix("UTC").or_else(|| upper.strip_prefix("GMT")).unwrap_or(&upper);
    if let Some(sign) = rest.chars().next().filter(|c| *c == '+' || *c == '-') {
        let digits = &rest[1..];
        let (h, m) = match digits.split_once(':') {
            Some((h, m)) => (h, m),
            None if digits.len() == 4 => digits.split_at(2),
            None => (digits, "0"),
        };
        let ok = |x: &str| !x.is_empty() && x.len() <= 2 && x.bytes().all(|b| b.is_ascii_digit());
        if !(ok(h) && ok(m)) {
            return Err(EXPECTED.into());
        }
        let (h, m): (i32, i32) = (h.parse().map_err(|_| EXPECTED)?, m.parse().map_err(|_| EXPECTED)?);
        let total = h * 60 + m;
        if m >= 60 || total > 14 * 60 {
            return Err(EXPECTED.into());
        }
        return Ok(SiteTimeZone { name: t.to_string(), fixed_offset_min: Some(if sign == '-' { -total } else { total }) });
    }
    let part_ok = |p: &str| !p.is_empty() && p != "." && p != ".." && p.bytes().all(|b| b.is_ascii_alphanumeric() || b"_+-".contains(&b));
    if t.is_empty() || t.len() > 64 || !t.split('/').all(part_ok) || !t.as_bytes()[0].is_ascii_alphabetic() {
        return Err(EXPECTED.into());
    }
    let db = Path::new(ZONEINFO_DIR);
    if db.is_dir() && !db.join(t).is_file() {
        return Err(format!("{EXPECTED}; {t:?} is not in {ZONEINFO_DIR}"));
    }
    Ok(SiteTimeZone { name: t.to_string(), fixed_offset_min: None })
}

fn default_clear_sky_model() -> String {
    "ineichen-perez".into()
}
/// Default Linke turbidity: 3.0, a typical clean rural mid-latitude value (common practice, no source).
pub const DEFAULT_LINKE_TURBIDITY: f64 = 3.0;
fn is_empty_path(p: &std::path::Path) -> bool {
    p.as_os_str().is_empty()
}
fn default_linke() -> f64 {
    DEFAULT_LINKE_TURBIDITY
}

/// `[camera]`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CameraSection {
    /// The camera's calibration file (relative to the site file). `calibrate` does not read it
    /// (it writes the file), so a site file for `calibrate` may leave it out; `replay` and `live`
    /// need it.
    #[serde(default, skip_serializing_if = "is_empty_path")]
    pub calibration: PathBuf,
    /// Camera position relative to the site origin, (east, north, up) \[m\].
    #[serde(default, deserialize_with = "crate::settings::exact::numbers")]
    pub position_m: [f64; 3],
    /// How the frames' names carry their time, when not as `…YYYYMMDDTHHMMSS[.fff]Z…`: a chrono
    /// `strftime` pattern found anywhere in the name, e.g. `"%Y-%m-%d_%H-%M-%S"`, `"%Y%m%d%H%M"`,
    /// `"%s"` (Unix seconds) or with `%z` when the names carry their offset.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub frame_time_format: Option<String>,
    /// The zone of the names' times when the pattern carries no offset: `"UTC"` (the default) or a
    /// fixed offset such as `"+01:00"` (a camera that keeps local standard time). A zone with
    /// daylight saving time is refused: its names repeat an hour each autumn.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub frame_time_zone: Option<String>,
}

impl CameraSection {
    /// How the frames' names carry their time, checked.
    ///
    /// # Errors
    /// The field that is wrong and what was expected.
    pub(crate) fn frame_naming_checked(&self, c: &Check<'_>) -> Result<crate::io::FrameNaming, ConfigError> {
        let offset_min = match &self.frame_time_zone {
            None => 0,
            Some(z) => {
                let expected = "\"UTC\" or a fixed offset such as \"+01:00\" (names in a zone with daylight saving time repeat an hour each autumn: have the camera name its frames in UTC or standard time)";
                let tz = parse_time_zone(z).map_err(|_| c.invalid("camera.frame_time_zone", expected, format!("{z:?}")))?;
                tz.fixed_offset_min.ok_or_else(|| c.invalid("camera.frame_time_zone", expected, format!("{z:?}")))?
            }
        };
        crate::io::FrameNaming::new(self.frame_time_format.clone(), offset_min)
            .map_err(|expected| c.invalid("camera.frame_time_format", expected, format!("{:?}", self.frame_time_format.as_deref().unwrap_or(""))))
    }

    /// How the frames' names carry their time (the default naming when the fields do not check:
    /// a file that was not validated).
    pub fn frame_naming(&self) -> crate::io::FrameNaming {
        self.frame_naming_checked(&Check { file: Path::new("site.toml") }).unwrap_or_default()
    }
}

/// `[forecast]`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ForecastSection {
    /// Longest horizon \[min\]; default 20.
    #[serde(default = "default_horizon")]
    pub horizon_min: u32,
    /// Horizon step \[s\]; default 60 (30 allowed).
    #[serde(default = "default_step")]
    pub step_s: u32,
}

impl Default for ForecastSection {
    fn default() -> Self {
        Self { horizon_min: default_horizon(), step_s: default_step() }
    }
}
fn default_horizon() -> u32 {
    20
}
fn default_step() -> u32 {
    60
}

/// A loaded, validated site with its camera.
#[derive(Debug, Clone)]
pub struct Site {
    /// The file as read.
    pub file: SiteFile,
    /// Where it was read from.
    pub path: PathBuf,
    /// The camera from its calibration file.
    pub camera: Camera,
    /// The calibration file as read.
    pub calibration: CalibrationFile,
    /// Path of the calibration file.
    pub calibration_path: PathBuf,
    /// The obstruction mask, if the calibration names one.
    pub obstruction: Option<image::GrayImage>,
    /// The camera's clear-sky library, if the calibration names one.
    pub clear_reference: Option<crate::segment::Reference>,
    /// The cloud base height series path, resolved.
    pub cbh_csv: Option<PathBuf>,
    /// The second camera (`[second_camera]`), if any.
    pub second_camera: Option<SecondCamera>,
}

/// A loaded second camera.
#[derive(Debug, Clone)]
pub struct SecondCamera {
    /// The camera from its calibration file.
    pub camera: Camera,
    /// Its obstruction mask, if the calibration names one.
    pub obstruction: Option<image::GrayImage>,
    /// Its own clear-sky library, if its calibration names one (its segmentation's reference).
    pub clear_reference: Option<crate::segment::Reference>,
    /// Position (east, north, up) \[m\].
    pub position_m: [f64; 3],
    /// Its frames folder for replay, resolved.
    pub frames: Option<PathBuf>,
    /// Its incoming folder for live mode, resolved.
    pub incoming: Option<PathBuf>,
    /// Least time between stereo estimates \[s\].
    pub every_s: f64,
    /// Whether the map takes cells from this camera ([`crate::multicam`]).
    pub map_cells: bool,
}

/// How the frames' names carry their time, from a site file's `[camera]` (without loading its
/// calibration).
///
/// # Errors
/// An unreadable or malformed site file, or a bad `frame_time_format` / `frame_time_zone`.
pub fn frame_naming_of(site: &Path) -> Result<crate::io::FrameNaming, ConfigError> {
    let file: SiteFile = read_toml(site)?;
    file.camera.frame_naming_checked(&Check { file: site })
}

impl Site {
    /// Load and validate a site file alone, without its calibration (live mode's checks before
    /// its engine starts; `calibrate` reads it with [`Self::load_for_calibrate`]).
    ///
    /// # Errors
    /// A [`ConfigError`] naming the file and field.
    pub fn load_without_camera(path: &Path) -> Result<SiteFile, ConfigError> {
        Self::read_site_file(path, true)
    }

    /// As [`Self::load_without_camera`], for `calibrate`: the site file may name no cloud base yet
    /// (the sun's track needs none).
    ///
    /// # Errors
    /// A [`ConfigError`] naming the file and field.
    pub fn load_for_calibrate(path: &Path) -> Result<SiteFile, ConfigError> {
        Self::read_site_file(path, false)
    }

    fn read_site_file(path: &Path, require_base: bool) -> Result<SiteFile, ConfigError> {
        let file: SiteFile = read_toml(path)?;
        file.validate_with(path, require_base)?;
        Ok(file)
    }

    /// Load and validate a site file, its calibration file and obstruction mask.
    ///
    /// # Errors
    /// A [`ConfigError`] naming the file and field.
    pub fn load(path: &Path) -> Result<Site, ConfigError> {
        let file: SiteFile = read_toml(path)?;
        file.validate(path)?;
        let calibration_path = resolve(path, &file.camera.calibration);
        let calibration: CalibrationFile = read_calibration(path, "camera.calibration", &calibration_path)?;
        let camera = calibration.validate(&calibration_path)?;
        let obstruction = obstruction_mask(&calibration, &calibration_path, &camera)?;
        let clear_reference = read_clear_reference(&calibration, &calibration_path)?;
        let cbh_csv = file.clouds.base_height_csv.as_ref().map(|p| resolve(path, p));
        let second_camera = match &file.second_camera {
            Some(s) => {
                let cp = resolve(path, &s.calibration);
                let cal: CalibrationFile = read_calibration(path, "second_camera.calibration", &cp)?;
                let camera = cal.validate(&cp)?;
                let obstruction = obstruction_mask(&cal, &cp, &camera)?;
                let clear_reference = read_clear_reference(&cal, &cp)?;
                Some(SecondCamera { camera, obstruction, clear_reference, position_m: s.position_m, frames: s.frames.as_ref().map(|f| resolve(path, f)), incoming: s.incoming.as_ref().map(|f| resolve(path, f)), every_s: s.every_s, map_cells: s.map_cells })
            }
            None => None,
        };
        Ok(Site { file, path: path.into(), camera, calibration, calibration_path, obstruction, clear_reference, cbh_csv, second_camera })
    }

    /// The observer for solar position.
    pub fn observer(&self) -> Observer {
        self.file.site.observer()
    }

    /// The clear-sky model.
    pub fn clear_sky_model(&self) -> ClearSkyModel {
        self.file.site.clear_sky()
    }
}

/// The calibration file a site file names in `field`. One that is not there is the site file's
/// error, naming the field and where it was looked for (relative paths are taken from the site
/// file's folder), and how to write one.
fn read_calibration(site_path: &Path, field: &str, calibration_path: &Path) -> Result<CalibrationFile, ConfigError> {
    if !calibration_path.exists() {
        return Err(ConfigError::Invalid {
            file: site_path.to_path_buf(),
            field: field.into(),
            expected: format!(
                "an existing calibration file, relative to the site file's folder (write it with `nephocast calibrate --site {} --frames <a clear day> --out {}`)",
                site_path.display(),
                calibration_path.display()
            ),
            got: format!("{}, which does not exist", calibration_path.display()),
        });
    }
    read_toml(calibration_path)
}

/// A calibration's clear-sky library (`camera.clear_reference`), if it names one.
fn read_clear_reference(calibration: &CalibrationFile, calibration_path: &Path) -> Result<Option<crate::segment::Reference>, ConfigError> {
    let Some(p) = &calibration.camera.clear_reference else { return Ok(None) };
    let rp = resolve(calibration_path, p);
    let invalid = |got: String| ConfigError::Invalid {
        file: calibration_path.to_path_buf(),
        field: "camera.clear_reference".into(),
        expected: "a clear-sky library CSV written by `nephocast calibrate`".into(),
        got,
    };
    let text = std::fs::read_to_string(&rp).map_err(|e| invalid(format!("{}: {e}", rp.display())))?;
    Ok(Some(crate::segment::Reference::from_csv(&text).map_err(|e| invalid(format!("{}: {e}", rp.display())))?))
}

/// A calibration's obstruction mask (white = sky), checked against the camera's size.
fn obstruction_mask(calibration: &CalibrationFile, calibration_path: &Path, camera: &Camera) -> Result<Option<image::GrayImage>, ConfigError> {
    let Some(p) = &calibration.camera.obstruction_mask else { return Ok(None) };
    let mp = resolve(calibration_path, p);
    let img = image::open(&mp).map_err(|e| ConfigError::Invalid {
        file: calibration_path.to_path_buf(),
        field: "camera.obstruction_mask".into(),
        expected: "a readable greyscale PNG".into(),
        got: format!("{}: {e}", mp.display()),
    })?;
    let g = img.to_luma8();
    if g.dimensions() != (camera.width_px, camera.height_px) {
        return Err(ConfigError::Invalid {
            file: calibration_path.to_path_buf(),
            field: "camera.obstruction_mask".into(),
            expected: format!("an image of {}x{} px", camera.width_px, camera.height_px),
            got: format!("{}x{} px", g.width(), g.height()),
        });
    }
    Ok(Some(g))
}

impl SiteSection {
    /// The observer for solar position.
    pub fn observer(&self) -> Observer {
        let mut o = Observer::new(self.latitude_deg, self.longitude_deg, self.elevation_m);
        if let Some(p) = self.pressure_hpa {
            o.pressure_hpa = p;
        }
        if let Some(t) = self.temperature_c {
            o.temperature_c = t;
        }
        o
    }

    /// The display time zone (UTC when none is given). A zone that does not parse (a file that
    /// was not validated) reads as UTC.
    pub fn time_zone(&self) -> SiteTimeZone {
        self.timezone.as_deref().and_then(|z| parse_time_zone(z).ok()).unwrap_or(SiteTimeZone { name: "UTC".into(), fixed_offset_min: Some(0) })
    }

    /// The clear-sky model.
    pub fn clear_sky(&self) -> ClearSkyModel {
        if self.clear_sky_model == "haurwitz" {
            ClearSkyModel::Haurwitz
        } else {
            ClearSkyModel::IneichenPerez { linke_turbidity: self.linke_turbidity }
        }
    }
}

impl SiteFile {
    /// Check every value's range.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, path: &Path) -> Result<(), ConfigError> {
        self.validate_with(path, true)
    }

    /// As [`Self::validate`]; without `require_base` (`calibrate`'s check) a site with no cloud base
    /// at all (no `base_height_m`, no `base_height_csv`, too few pyranometers for shadow timing)
    /// passes, as `calibrate` needs no base: a clear day's ceilometer reads none; nor does it need
    /// `camera.calibration`, the file it writes.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate_with(&self, path: &Path, require_base: bool) -> Result<(), ConfigError> {
        let c = Check { file: path };
        self.validate_site(&c)?;
        for (i, v) in self.camera.position_m.iter().enumerate() {
            c.range(&format!("camera.position_m[{i}]"), *v, -50_000.0, 50_000.0)?;
        }
        self.camera.frame_naming_checked(&c)?;
        if require_base && self.camera.calibration.as_os_str().is_empty() {
            return Err(c.invalid("camera.calibration", "the camera's calibration file, relative to the site file (`nephocast calibrate --out FILE` writes it)", "nothing"));
        }
        self.validate_clouds(&c, require_base)?;
        self.validate_plant(&c)?;
        let fc = &self.forecast;
        if !(1..=60).contains(&fc.horizon_min) {
            return Err(c.invalid("forecast.horizon_min", "a whole number from 1 to 60", fc.horizon_min.to_string()));
        }
        if ![15, 30, 60, 120].contains(&fc.step_s) {
            return Err(c.invalid("forecast.step_s", "15, 30, 60 or 120", fc.step_s.to_string()));
        }
        self.segment.validate(path)?;
        self.qc.validate(path)?;
        self.motion.validate(path)?;
        self.map.validate(path)?;
        self.irradiance.validate(path)?;
        self.power.validate(path)?;
        self.ramps.validate(path)?;
        self.evaluation.ramps.validate(path)?;
        if self.pyranometers.len() > MAX_PYRANOMETERS {
            return Err(c.invalid("pyranometers", format!("at most {MAX_PYRANOMETERS} pyranometers"), self.pyranometers.len().to_string()));
        }
        for (i, p) in self.pyranometers.iter().enumerate() {
            for (k, v) in p.position_m.iter().enumerate() {
                c.range(&format!("pyranometers[{i}].position_m[{k}]"), *v, -50_000.0, 50_000.0)?;
            }
        }
        if let Some(m) = &self.measurements_modbus {
            let names: Vec<String> = self.pyranometers.iter().map(|p| p.name.clone()).collect();
            let meters: Vec<String> = crate::meter::capacities_kw(self).into_iter().map(|x| x.0).collect();
            m.validate(&c, &names, &meters)?;
        }
        self.webhook.validate(&c)?;
        if let Some(s) = &self.second_camera {
            if s.calibration.as_os_str().is_empty() {
                return Err(c.invalid("second_camera.calibration", "the second camera's calibration file, relative to the site file (from its own `calibrate` run)", "an empty path"));
            }
            for (i, v) in s.position_m.iter().enumerate() {
                c.range(&format!("second_camera.position_m[{i}]"), *v, -50_000.0, 50_000.0)?;
            }
            let b = (s.position_m[0] - self.camera.position_m[0]).hypot(s.position_m[1] - self.camera.position_m[1]);
            if b < crate::stereo::MIN_BASELINE_M {
                return Err(c.invalid("second_camera.position_m", format!("at least {} m from camera.position_m horizontally", crate::stereo::MIN_BASELINE_M), format!("{b:.1} m")));
            }
            c.range("second_camera.every_s", s.every_s, 1.0, 86_400.0)?;
        }
        self.check_budget(path)?;
        Ok(())
    }

    /// `[site]`: position, atmosphere, clear-sky model, time zone.
    fn validate_site(&self, c: &Check<'_>) -> Result<(), ConfigError> {
        let s = &self.site;
        c.range("site.latitude_deg", s.latitude_deg, -90.0, 90.0)?;
        c.range("site.longitude_deg", s.longitude_deg, -180.0, 180.0)?;
        c.range("site.elevation_m", s.elevation_m, -500.0, 9000.0)?;
        if let Some(p) = s.pressure_hpa {
            c.range("site.pressure_hpa", p, 300.0, 1100.0)?;
        }
        if let Some(t) = s.temperature_c {
            c.range("site.temperature_c", t, -80.0, 60.0)?;
        }
        c.range("site.linke_turbidity", s.linke_turbidity, 1.0, 10.0)?;
        if !["ineichen-perez", "haurwitz"].contains(&s.clear_sky_model.as_str()) {
            return Err(c.invalid("site.clear_sky_model", "\"ineichen-perez\" or \"haurwitz\"", format!("{:?}", s.clear_sky_model)));
        }
        if let Some(z) = &s.timezone {
            parse_time_zone(z).map_err(|expected| c.invalid("site.timezone", expected, format!("{z:?}")))?;
        }
        Ok(())
    }

    /// `[clouds]`: one source of the base height, its prior spread, shadow timing's pyranometers.
    fn validate_clouds(&self, c: &Check<'_>, require_base: bool) -> Result<(), ConfigError> {
        match (&self.clouds.base_height_m, &self.clouds.base_height_csv) {
            (Some(h), None) => c.range("clouds.base_height_m", *h, crate::settings::CBH_MIN_M, crate::settings::CBH_MAX_M)?,
            (None, Some(_)) => {}
            (Some(_), Some(_)) => {
                return Err(c.invalid("clouds", "one of base_height_m or base_height_csv", "both"));
            }
            // No base at all: estimated by shadow timing, which needs the pyranometers.
            (None, None) if !require_base || (self.pyranometers.len() >= crate::cbh::MIN_SHADOW_SENSORS && self.clouds.shadow_timing != Some(false)) => {}
            (None, None) => {
                return Err(c.invalid(
                    "clouds",
                    format!(
                        "base_height_m or base_height_csv (or, to estimate the base by shadow timing, at least {} [[pyranometers]] and shadow_timing not false)",
                        crate::cbh::MIN_SHADOW_SENSORS
                    ),
                    "neither",
                ));
            }
        }
        for (i, l) in self.clouds.layers.iter().enumerate() {
            c.range(&format!("clouds.layers[{i}].base_height_m"), l.base_height_m, crate::settings::CBH_MIN_M, crate::settings::CBH_MAX_M)?;
            c.range(&format!("clouds.layers[{i}].toward_deg"), l.toward_deg, 0.0, 360.0)?;
        }
        if let Some(r) = self.clouds.base_height_rel_sigma {
            c.range("clouds.base_height_rel_sigma", r, 0.01, 2.0)?;
        }
        if self.clouds.shadow_timing == Some(true) && self.pyranometers.len() < crate::cbh::MIN_SHADOW_SENSORS {
            return Err(c.invalid(
                "clouds.shadow_timing",
                format!("at least {} [[pyranometers]] (shadow timing compares their readings)", crate::cbh::MIN_SHADOW_SENSORS),
                self.pyranometers.len().to_string(),
            ));
        }
        Ok(())
    }

    /// `[plant]`: spacing, and each block's name, footprint, capacity and mount.
    fn validate_plant(&self, c: &Check<'_>) -> Result<(), ConfigError> {
        let p = &self.plant;
        c.range("plant.point_spacing_m", p.point_spacing_m, 1.0, 1000.0)?;
        for (i, b) in p.blocks.iter().enumerate() {
            let f = |n: &str| format!("plant.blocks[{i}].{n}");
            if let Err((expected, got)) = crate::plant::check_block_name(&b.name, &p.blocks[..i]) {
                return Err(c.invalid(&f("name"), expected, got));
            }
            if b.polygon_m.len() < 3 {
                return Err(c.invalid(&f("polygon_m"), "at least 3 vertices", format!("{}", b.polygon_m.len())));
            }
            for (j, v) in b.polygon_m.iter().enumerate() {
                for (k, x) in v.iter().enumerate() {
                    c.range(&format!("plant.blocks[{i}].polygon_m[{j}][{k}]"), *x, -50_000.0, 50_000.0)?;
                }
            }
            if polygon_area_m2(&b.polygon_m) < 1.0 {
                return Err(c.invalid(&f("polygon_m"), "a polygon of non-zero area", "an area below 1 m²"));
            }
            c.range(&f("capacity_kw"), b.capacity_kw, 0.001, 1e7)?;
            if let Some(ac) = b.ac_capacity_kw {
                c.range(&f("ac_capacity_kw"), ac, 0.001, 1e7)?;
            }
            match b.mount {
                MountKind::Fixed => {
                    let t = b.tilt_deg.ok_or_else(|| c.invalid(&f("tilt_deg"), "a tilt for a fixed block", "nothing"))?;
                    c.range(&f("tilt_deg"), t, 0.0, 90.0)?;
                    let a = b.azimuth_deg.ok_or_else(|| c.invalid(&f("azimuth_deg"), "an azimuth for a fixed block", "nothing"))?;
                    c.range(&f("azimuth_deg"), a, 0.0, 360.0)?;
                }
                MountKind::SingleAxis => {
                    let a = b.axis_azimuth_deg.unwrap_or(0.0);
                    c.range(&f("axis_azimuth_deg"), a, 0.0, 360.0)?;
                    c.range(&f("max_angle_deg"), b.max_angle_deg.unwrap_or(60.0), 0.0, 90.0)?;
                }
            }
        }
        Ok(())
    }

    /// Check the plant's size and the memory the configuration needs against the caps
    /// ([`MAX_BLOCKS`], [`MAX_POLYGON_VERTICES`], [`MAX_LAYOUT_CELLS`], [`MAX_PLANT_POINTS`],
    /// [`MEMORY_CAP_BYTES`]), before anything is allocated.
    ///
    /// # Errors
    /// The first field over its limit, with the figure.
    pub fn check_budget(&self, path: &Path) -> Result<MemoryEstimate, ConfigError> {
        let c = Check { file: path };
        let p = &self.plant;
        if p.blocks.len() > MAX_BLOCKS {
            return Err(c.invalid("plant.blocks", format!("at most {MAX_BLOCKS} blocks"), p.blocks.len().to_string()));
        }
        let mut layout_cells = 0.0;
        for (i, b) in p.blocks.iter().enumerate() {
            if b.polygon_m.len() > MAX_POLYGON_VERTICES {
                return Err(c.invalid(&format!("plant.blocks[{i}].polygon_m"), format!("at most {MAX_POLYGON_VERTICES} vertices"), b.polygon_m.len().to_string()));
            }
            let cells = layout_cells_of(&b.polygon_m, p.point_spacing_m);
            layout_cells += cells;
            if layout_cells > MAX_LAYOUT_CELLS as f64 {
                return Err(c.invalid(
                    &format!("plant.blocks[{i}].polygon_m"),
                    format!("footprints whose bounding boxes hold at most {MAX_LAYOUT_CELLS} grid cells of plant.point_spacing_m = {} m in all", p.point_spacing_m),
                    format!("{layout_cells:.3e} cells up to this block (this one {cells:.3e}): raise plant.point_spacing_m or shrink the footprint"),
                ));
            }
        }
        let est = self.memory_estimate();
        if est.points > MAX_PLANT_POINTS {
            return Err(c.invalid(
                "plant.point_spacing_m",
                format!("a spacing that gives at most {MAX_PLANT_POINTS} forecast points"),
                format!("about {} points at {} m", est.points, p.point_spacing_m),
            ));
        }
        if est.bytes > MEMORY_CAP_BYTES {
            return Err(c.invalid(
                "plant.point_spacing_m, forecast.horizon_min/step_s, irradiance.ensemble_members, map.cells",
                format!("a configuration that needs at most {} MB", MEMORY_CAP_BYTES / 1_000_000),
                format!("about {} MB ({est})", est.bytes / 1_000_000),
            ));
        }
        Ok(est)
    }
}

#[cfg(test)]
mod tests;
