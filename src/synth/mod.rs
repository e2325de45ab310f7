//! Synthetic sky-camera sequences with ground truth.
//!
//! No open data set gives sky frames, cloud truth, wind, cloud base height and plant irradiance
//! together, so the project renders its own: a [`world::World`] of cloud layers over the fictional
//! Larkspur Flats plant, seen through the same [`Camera`] model the engine uses.
//!
//! A written sequence (the layout `replay` reads):
//!
//! ```text
//! <out>/site.toml                      site, camera reference, cloud base height, plant
//! <out>/calibration/<camera>.toml      the camera as rendered
//! <out>/frames/frame_<UTC>.jpg         frames, UTC time in the name
//! <out>/measurements.csv               simulated pyranometers, 1-minute means
//! <out>/truth/scene.toml               the scene spec and seed (the world can be rebuilt from it)
//! <out>/truth/layers.csv               base height and wind of each layer
//! <out>/truth/frames.csv               per frame: cloud fraction (zenith < 70°), mask file
//! <out>/truth/masks/<frame>.png        per-pixel class: 0 unknown, 1 clear, 2 thin, 3 thick
//! <out>/truth/irradiance.csv           GHI/DNI/DHI per block and plant, to 20 min past the last frame
//! ```
//!
//! A scene may add the imperfections of a real camera ([`nuisance::Nuisances`]: lens field other
//! than 90°, ground and skyline, bloom and smear, vignetting, exposure drift, haze, dirt), all off
//! by default; the `nuisance-*` scenes turn them on.

pub mod noise;
pub mod nuisance;
pub mod render;
pub mod world;
pub mod yardstick;

use std::path::{Path, PathBuf};

use chrono::{DateTime, Utc};
use serde::{Deserialize, Serialize};

use crate::camera::{Camera, Orientation, Projection};
use crate::config::{BlockSpec, CalibrationFile, CameraSection, CloudSection, ForecastSection, MountKind, PlantSection, SiteFile, SiteSection};
use crate::io::{CsvTable, fmt_time, frame_name, write_atomic};
use crate::plant::Plant;
use nuisance::{Bloom, Dirt, ExposureDrift, Horizon, NuisanceMap, Nuisances, Vignetting};
use render::{Mast, PixelRays, render_with};
use world::{LayerSpec, World};

/// The camera of a scene.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CameraSpec {
    /// Camera name (calibration file name).
    pub name: String,
    /// `"equidistant"`, `"equisolid"`, `"stereographic"`, `"polynomial"` or `"equisolid-like"`: a
    /// real lens close to equisolid that fits no ideal model exactly, the polynomial model with the
    /// coefficients of equisolid's series (`2 sin(θ/2) = θ (1 − θ²/24 + θ⁴/1920 − θ⁶/322560 +
    /// θ⁸/92897280 − …)`) plus `k`.
    pub model: String,
    /// Polynomial coefficients (polynomial model; for `"equisolid-like"`, added to equisolid's).
    #[serde(default)]
    pub k: Vec<f64>,
    /// Radius of the 90° field angle as a share of half the image size.
    pub rim_fraction: f64,
    /// Principal point offset from the image centre \[px at 512²; scaled with size\].
    pub offset_px: [f64; 2],
    /// Yaw \[°\].
    pub yaw_deg: f64,
    /// Pitch \[°\].
    pub pitch_deg: f64,
    /// Roll \[°\].
    pub roll_deg: f64,
    /// Frames mirrored left–right (east on the right with north up; see [`Camera::mirrored`]).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub mirrored: bool,
}

impl CameraSpec {
    /// The camera at a square image size.
    pub fn camera(&self, size_px: u32) -> Camera {
        let projection = match self.model.as_str() {
            "equisolid" => Projection::Equisolid,
            "stereographic" => Projection::Stereographic,
            "polynomial" => {
                let mut k = [0.0; 4];
                for (i, v) in self.k.iter().take(4).enumerate() {
                    k[i] = *v;
                }
                Projection::Polynomial { k }
            }
            "equisolid-like" => {
                let mut k = [-1.0 / 24.0, 1.0 / 1920.0, -1.0 / 322_560.0, 1.0 / 92_897_280.0];
                for (i, v) in self.k.iter().take(4).enumerate() {
                    k[i] += *v;
                }
                Projection::Polynomial { k }
            }
            _ => Projection::Equidistant,
        };
        let half = size_px as f64 / 2.0;
        let rim = self.rim_fraction * half;
        let f = rim / projection.radial(std::f64::consts::FRAC_PI_2);
        let scale = size_px as f64 / 512.0;
        Camera::new(
            size_px,
            size_px,
            half - 0.5 + self.offset_px[0] * scale,
            half - 0.5 + self.offset_px[1] * scale,
            f,
            projection,
            std::f64::consts::FRAC_PI_2,
            Orientation {
                yaw_rad: self.yaw_deg.to_radians(),
                pitch_rad: self.pitch_deg.to_radians(),
                roll_rad: self.roll_deg.to_radians(),
            },
        )
        .with_mirrored(self.mirrored)
    }
}

/// A scene: what the sky does, when, and how it is filmed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SceneSpec {
    /// Name used on the command line.
    pub name: String,
    /// One line saying what the scene shows.
    pub description: String,
    /// First frame (UTC, RFC 3339).
    pub start_utc: String,
    /// Length of the frame sequence \[min\].
    pub duration_min: f64,
    /// Time between frames \[s\].
    pub frame_step_s: f64,
    /// Square image size \[px\].
    pub size_px: u32,
    /// Cloud layers.
    pub layers: Vec<LayerSpec>,
    /// The camera.
    pub camera: CameraSpec,
    /// Whether a mast stands in the view.
    pub mast: bool,
    /// JPEG quality (1–100).
    pub jpeg_quality: u8,
    /// Write a truth mask for every n-th frame.
    pub truth_mask_every: usize,
    /// Imperfections of a real camera (all off by default; not written when off).
    #[serde(default, skip_serializing_if = "Nuisances::is_off")]
    pub nuisances: Nuisances,
    /// A network of fast pyranometers in place of the three block-centre ones (off by default and
    /// not written when off, so older scenes render byte for byte as before).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub pyranometer_network: Option<PyranometerNetwork>,
    /// The plant (every block, and the pyranometers on them) moved by this much (east, north) from
    /// its place in [`larkspur_site`] \[m\]; the camera stays at the origin. Zero by default and
    /// not written when zero, so older scenes render byte for byte as before.
    #[serde(default, skip_serializing_if = "is_zero_offset")]
    pub plant_offset_m: [f64; 2],
}

fn is_zero_offset(v: &[f64; 2]) -> bool {
    *v == [0.0, 0.0]
}

/// Pyranometers spread over and around the plant, read faster than once a minute (for the cloud
/// base height from shadow timing, [`crate::cbh`]). `measurements.csv` then holds their means over
/// `sample_s` (of 1-s samples), one row per period, columns `ghi_<name>_wm2`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PyranometerNetwork {
    /// Averaging period of each reading \[s\] (whole seconds, 1–60).
    pub sample_s: u32,
    /// Names and positions (east, north) \[m\].
    pub sensors: Vec<(String, [f64; 2])>,
}

/// The network of the `cbh-network` scene: six pyranometers 10-s means, spread over about 1.3 km
/// around the plant (corners a few hundred metres outside it, two inside).
pub fn larkspur_network() -> PyranometerNetwork {
    let s = |n: &str, x: f64, y: f64| (n.to_string(), [x, y]);
    PyranometerNetwork {
        sample_s: 10,
        sensors: vec![s("n1", -650.0, 420.0), s("n2", 560.0, 380.0), s("n3", 620.0, -480.0), s("n4", -700.0, -520.0), s("n5", -120.0, 60.0), s("n6", 200.0, -260.0)],
    }
}

/// The fictional site of all scenes: Larkspur Flats.
pub fn larkspur_site(cbh_m: f64, camera_file: &str) -> SiteFile {
    let block = |name: &str, poly: [[f64; 2]; 4], mount: MountKind| BlockSpec {
        name: name.into(),
        polygon_m: poly.to_vec(),
        capacity_kw: 6000.0,
        ac_capacity_kw: Some(5000.0),
        mount,
        tilt_deg: (mount == MountKind::Fixed).then_some(25.0),
        azimuth_deg: (mount == MountKind::Fixed).then_some(180.0),
        axis_azimuth_deg: (mount == MountKind::SingleAxis).then_some(0.0),
        max_angle_deg: (mount == MountKind::SingleAxis).then_some(60.0),
    };
    SiteFile {
        site: SiteSection {
            name: "Larkspur Flats (fictional)".into(),
            latitude_deg: 37.412,
            longitude_deg: -3.21,
            elevation_m: 640.0,
            pressure_hpa: None,
            temperature_c: Some(22.0),
            clear_sky_model: "ineichen-perez".into(),
            linke_turbidity: 3.0,
            timezone: Some("Europe/Madrid".into()),
        },
        camera: CameraSection { calibration: PathBuf::from(format!("calibration/{camera_file}.toml")), position_m: [0.0, 0.0, 3.0], frame_time_format: None, frame_time_zone: None },
        clouds: CloudSection { base_height_m: Some(cbh_m), ..Default::default() },
        plant: PlantSection {
            point_spacing_m: 25.0,
            blocks: vec![
                block("north-fixed", [[-350.0, 150.0], [-50.0, 150.0], [-50.0, 350.0], [-350.0, 350.0]], MountKind::Fixed),
                block("east-tracker", [[100.0, -100.0], [400.0, -100.0], [400.0, 100.0], [100.0, 100.0]], MountKind::SingleAxis),
                block("south-tracker", [[-250.0, -400.0], [50.0, -400.0], [50.0, -200.0], [-250.0, -200.0]], MountKind::SingleAxis),
                block("west-fixed", [[-500.0, -150.0], [-300.0, -150.0], [-300.0, 100.0], [-500.0, 100.0]], MountKind::Fixed),
            ],
        },
        forecast: ForecastSection::default(),
        segment: Default::default(),
        qc: Default::default(),
        motion: Default::default(),
        map: Default::default(),
        irradiance: Default::default(),
        power: Default::default(),
        ramps: Default::default(),
        evaluation: Default::default(),
        pyranometers: vec![],
        measurements: Default::default(),
        measurements_modbus: None,
        second_camera: None,
        webhook: Default::default(),
    }
}

fn cam(yaw: f64) -> CameraSpec {
    CameraSpec {
        name: "larkspur-sky1".into(),
        model: "equidistant".into(),
        k: vec![],
        rim_fraction: 0.97,
        offset_px: [2.9, -3.4],
        yaw_deg: yaw,
        pitch_deg: 1.2,
        roll_deg: -0.8,
        mirrored: false,
    }
}

fn layer(h: f64, speed: f64, toward: f64, c0: f64, c1: f64, tau: f64, wl: f64) -> LayerSpec {
    LayerSpec {
        base_height_m: h,
        wind_speed_mps: speed,
        wind_toward_deg: toward,
        cover_start: c0,
        cover_end: c1,
        tau_max: tau,
        wavelength_m: wl,
        evolution_min: 45.0,
    }
}

/// The scene catalogue.
///
/// One piece on purpose: a table of scene specifications, one entry per scene.
pub fn scenes() -> Vec<SceneSpec> {
    let base = |name: &str, desc: &str, layers: Vec<LayerSpec>| SceneSpec {
        name: name.into(),
        description: desc.into(),
        start_utc: "2026-06-14T08:30:00Z".into(),
        duration_min: 50.0,
        frame_step_s: 20.0,
        size_px: 512,
        layers,
        camera: cam(23.0),
        mast: true,
        jpeg_quality: 85,
        truth_mask_every: 3,
        nuisances: Nuisances::default(),
        pyranometer_network: None,
        plant_offset_m: [0.0, 0.0],
    };
    let mut v = vec![
        base("broken-cumulus-fast", "broken cumulus at 1200 m moving at 12 m/s toward the east-north-east",
             vec![layer(1200.0, 12.0, 70.0, 0.45, 0.45, 35.0, 1400.0)]),
        base("scattered-slow", "scattered small cumulus at 1800 m drifting at 4 m/s toward the south-east",
             vec![layer(1800.0, 4.0, 135.0, 0.22, 0.22, 25.0, 1100.0)]),
        base("overcast-breaking", "low overcast at 900 m breaking up (cover 95 % to 45 %), 7 m/s toward the north-east",
             vec![layer(900.0, 7.0, 40.0, 0.95, 0.45, 30.0, 1800.0)]),
        base("two-layers", "cumulus at 1000 m toward the north-east at 9 m/s under thin altocumulus at 3800 m toward the south-east at 16 m/s",
             vec![layer(1000.0, 9.0, 45.0, 0.30, 0.30, 30.0, 1300.0), layer(3800.0, 16.0, 150.0, 0.45, 0.45, 2.2, 3000.0)]),
        SceneSpec {
            start_utc: "2026-06-14T05:30:00Z".into(),
            duration_min: 420.0,
            frame_step_s: 600.0,
            truth_mask_every: 1,
            ..base("clear-day", "a clear day, frames every 10 minutes for 7 hours (camera calibration from the sun's track)", vec![])
        },
    ];
    v.push(SceneSpec {
        duration_min: 45.0,
        frame_step_s: 30.0,
        jpeg_quality: 80,
        truth_mask_every: 3,
        ..base("larkspur-demo", "the shipped demo: broken cumulus at 1400 m moving at 9 m/s toward the east over the plant",
               vec![layer(1400.0, 9.0, 85.0, 0.40, 0.40, 35.0, 1500.0)])
    });
    v.push(SceneSpec {
        pyranometer_network: Some(larkspur_network()),
        ..base("cbh-network", "broken cumulus at 1300 m moving at 10 m/s toward the east-north-east over a network of six fast pyranometers (cloud base height from shadow timing)",
               vec![layer(1300.0, 10.0, 60.0, 0.40, 0.40, 35.0, 1400.0)])
    });
    // One imperfect camera (and its wide-lens variant) for the nuisance scenes.
    let nuisance = |name: &str, desc: &str, layers: Vec<LayerSpec>, wide: bool| {
        let (camera, nuisances) = nuisance_camera(wide);
        SceneSpec { camera, nuisances, duration_min: 30.0, ..base(name, desc, layers) }
    };
    let clear_day = |name: &str, desc: &str, wide: bool| SceneSpec {
        start_utc: "2026-06-14T05:00:00Z".into(),
        duration_min: 840.0,
        frame_step_s: 600.0,
        truth_mask_every: 1,
        ..nuisance(name, desc, vec![], wide)
    };
    v.push(clear_day(
        "nuisance-clear-day",
        "the imperfect camera (tilted, 88° lens, not quite equisolid, bloom, vignetting, dirt, haze, drifting exposure, skyline) on a clear day, every 10 minutes for 14 hours: the day a user calibrates from",
        false,
    ));
    // The same camera on a winter clear day: at the site's 37.4° N in mid-December the sun stays
    // beyond zenith 60.6° and crosses the south in one low arc (calibration from a winter day).
    v.push(SceneSpec {
        start_utc: "2026-12-15T07:30:00Z".into(),
        duration_min: 560.0,
        ..clear_day(
            "nuisance-winter-clear-day",
            "the imperfect camera of nuisance-clear-day on a clear mid-December day, every 10 minutes from sunrise to sunset: the sun never climbs above 29° (zenith 60.7° at noon), one low arc through the south",
            false,
        )
    });
    v.push(nuisance(
        "nuisance-broken",
        "the imperfect camera under broken cumulus at 1200 m moving at 10 m/s toward the east-north-east",
        vec![layer(1200.0, 10.0, 65.0, 0.42, 0.42, 35.0, 1400.0)],
        false,
    ));
    v.push(nuisance(
        "nuisance-two-layer",
        "the imperfect camera: cumulus at 1100 m toward the north-east at 8 m/s under thin high cloud at 6500 m toward the east-south-east at 18 m/s",
        vec![layer(1100.0, 8.0, 40.0, 0.30, 0.30, 30.0, 1300.0), layer(6500.0, 18.0, 110.0, 0.50, 0.50, 1.6, 4000.0)],
        false,
    ));
    // The plant 1.3 km downwind of the camera under slow cloud: the shadow look-ups of the plant
    // at 4–8 min ahead (plant point − wind × lead, then toward the sun by cbh·tan(zenith)) pass
    // through the camera's own sun direction on the cloud plane (cbh·tan(zenith) toward the sun
    // from the camera), where bloom and glare sit. With the sun at azimuth 90–95°, zenith 49–44°
    // over the run (08:30–09:00 UTC), wind 3.3 m/s toward 135°: the plant's centre sits at
    // (965, −853) m, 1.29 km toward 131°, so the look-up from it crosses the camera's sun point
    // at 6.3 min (wind × lead, plus ≈ 60 m east for the sun's own drift over the lead).
    v.push(SceneSpec {
        plant_offset_m: [1065.0, -835.0],
        ..nuisance(
            "nuisance-scattered-slow",
            "the imperfect camera under slow scattered small cumulus at 1800 m drifting at 3.3 m/s toward the south-east, the plant 1.3 km downwind of the camera so that its 4–8 min shadow look-ups cross the camera's circumsolar region (fictional site and geometry, made for this check)",
            vec![layer(1800.0, 3.3, 135.0, 0.20, 0.20, 25.0, 1100.0)],
            false,
        )
    });
    v.push(clear_day(
        "nuisance-wide-clear-day",
        "the imperfect camera with a 97° lens (ground and skyline inside the image circle) on a clear day, every 10 minutes for 14 hours",
        true,
    ));
    v.push(nuisance(
        "nuisance-wide-broken",
        "the imperfect camera with a 97° lens (ground and skyline inside the image circle) under broken cumulus at 1200 m moving at 10 m/s toward the east-north-east",
        vec![layer(1200.0, 10.0, 65.0, 0.42, 0.42, 35.0, 1400.0)],
        true,
    ));
    v
}

/// The imperfect camera of the `nuisance-*` scenes: tilted by 1.7° (pitch −1.4°, roll 0.9°), a lens
/// close to equisolid with an extra θ⁷ term (≈ 2.5 px at the 90° rim) that images an 88° field,
/// or 97° for the wide variant (a shorter focal length, so the ground and skyline fit inside the
/// image), sun bloom leaning toward the horizon and a smear column, vignetting to 65 % at the rim
/// from a centre off the principal point, ±3 % exposure drift over 80 minutes, haze, six dirt spots
/// and a skyline of tree lines and buildings. The dirt and skyline are the same in every scene.
pub fn nuisance_camera(wide: bool) -> (CameraSpec, Nuisances) {
    let camera = CameraSpec {
        name: if wide { "larkspur-sky2-wide" } else { "larkspur-sky2" }.into(),
        model: "equisolid-like".into(),
        k: vec![0.0, 0.0, 6e-4, 0.0],
        rim_fraction: if wide { 0.90 } else { 0.97 },
        offset_px: [-6.3, 4.1],
        yaw_deg: 131.0,
        pitch_deg: -1.4,
        roll_deg: 0.9,
        mirrored: false,
    };
    let nuisances = Nuisances {
        field_deg: Some(if wide { 97.0 } else { 88.0 }),
        ground: true,
        horizon: Some(Horizon { tree_lines: 3, buildings: 4 }),
        bloom: Some(Bloom { halo_level: 260.0, halo_radius_px: 2.2, lean: 2.0, smear_level: 110.0, smear_width_px: 0.7 }),
        vignetting: Some(Vignetting { rim_gain: 0.65, centre_offset_px: [9.0, -6.0] }),
        exposure_drift: Some(ExposureDrift { amplitude: 0.03, period_min: 80.0 }),
        haze: 0.25,
        dirt: Some(Dirt { spots: 6, radius_px: [4.0, 11.0], opacity: [0.3, 0.65], unknown_from: 0.2 }),
        layout_seed: 2026,
    };
    (camera, nuisances)
}

/// Look up a scene by name.
pub fn scene(name: &str) -> Option<SceneSpec> {
    scenes().into_iter().find(|s| s.name == name)
}

/// The scene's world and camera.
pub struct Scene {
    /// The spec.
    pub spec: SceneSpec,
    /// The seed.
    pub seed: u64,
    /// The world.
    pub world: World,
    /// The camera.
    pub camera: Camera,
    /// The site file written beside the frames.
    pub site: SiteFile,
    /// The plant of the site.
    pub plant: Plant,
    /// Camera position (east, north, up) \[m\].
    pub cam_pos_m: [f64; 3],
    /// First frame time.
    pub start: DateTime<Utc>,
    /// The static per-pixel parts of the camera's imperfections (`None` when they are all off).
    pub nuisance_map: Option<NuisanceMap>,
}

/// An error building or writing a scene.
#[derive(Debug, thiserror::Error)]
pub enum SynthError {
    /// No such scene.
    #[error("no scene named {0:?}; `nephocast synth --list` lists them")]
    UnknownScene(String),
    /// The spec is invalid.
    #[error("scene {name}: {message}")]
    Invalid {
        /// Scene.
        name: String,
        /// What is wrong.
        message: String,
    },
    /// Writing failed.
    #[error("{path}: {source}")]
    Write {
        /// File.
        path: PathBuf,
        /// Why.
        source: std::io::Error,
    },
}

impl Scene {
    /// Build a scene from its spec and seed.
    ///
    /// # Errors
    /// An invalid spec (time, sizes, layer values).
    pub fn new(spec: SceneSpec, seed: u64) -> Result<Scene, SynthError> {
        let bad = |m: &str| SynthError::Invalid { name: spec.name.clone(), message: m.into() };
        let start = crate::io::parse_time("start_utc", &spec.start_utc).map_err(|e| bad(&e))?;
        if !(64..=4096).contains(&spec.size_px) {
            return Err(bad("size_px must be from 64 to 4096"));
        }
        if !(spec.frame_step_s >= 1.0 && spec.duration_min > 0.0) {
            return Err(bad("frame_step_s must be ≥ 1 and duration_min > 0"));
        }
        spec.nuisances.check().map_err(|m| bad(&m))?;
        if let Some(n) = &spec.pyranometer_network
            && (!(1..=60).contains(&n.sample_s) || n.sensors.is_empty() || n.sensors.len() > crate::config::MAX_PYRANOMETERS)
        {
            return Err(bad("pyranometer_network: sample_s must be 1–60 s and there must be 1 to MAX_PYRANOMETERS sensors"));
        }
        for l in &spec.layers {
            if !(50.0..=15000.0).contains(&l.base_height_m) || !(0.0..=60.0).contains(&l.wind_speed_mps) {
                return Err(bad("layer base height must be 50–15000 m and wind 0–60 m/s"));
            }
        }
        let cbh = spec.layers.iter().map(|l| l.base_height_m).fold(f64::INFINITY, f64::min);
        if !spec.plant_offset_m.iter().all(|v| v.is_finite() && v.abs() <= 20_000.0) {
            return Err(bad("plant_offset_m must be finite and within 20 km"));
        }
        let mut site = larkspur_site(if cbh.is_finite() { cbh } else { 1500.0 }, &spec.camera.name);
        for b in site.plant.blocks.iter_mut().filter(|_| !is_zero_offset(&spec.plant_offset_m)) {
            for p in &mut b.polygon_m {
                p[0] += spec.plant_offset_m[0];
                p[1] += spec.plant_offset_m[1];
            }
        }
        let plant = Plant::from_section(&site.plant);
        let sensors = match &spec.pyranometer_network {
            Some(n) => n.sensors.iter().map(|(name, p)| (format!("pyr_{name}"), *p)).collect(),
            None => pyranometers(&plant),
        };
        site.pyranometers = sensors
            .into_iter()
            .map(|(name, position_m)| crate::config::PyranometerSpec { name: name.trim_start_matches("pyr_").to_string(), position_m })
            .collect();
        let mut camera = spec.camera.camera(spec.size_px);
        if let Some(f) = spec.nuisances.field_deg {
            camera = Camera::new(camera.width_px, camera.height_px, camera.cx_px, camera.cy_px, camera.f_px, camera.projection, f.to_radians(), camera.orientation)
                .with_mirrored(camera.mirrored);
        }
        let nuisance_map = (!spec.nuisances.is_off()).then(|| spec.nuisances.prepare(&camera, seed));
        let mut world = World::new(
            &spec.layers,
            seed,
            site.site.observer(),
            site.site.clear_sky(),
            start,
            spec.duration_min * 60.0,
        );
        world.diffuse_centre_m = plant.centre_m();
        let cam_pos_m = site.camera.position_m;
        Ok(Scene { spec, seed, world, camera, site, plant, cam_pos_m, start, nuisance_map })
    }

    /// Frame times.
    pub fn frame_times(&self) -> Vec<DateTime<Utc>> {
        let n = (self.spec.duration_min * 60.0 / self.spec.frame_step_s).round() as usize;
        World::times(self.start, self.spec.frame_step_s, n)
    }

    /// The mast, if the scene has one.
    pub fn mast(&self) -> Option<Mast> {
        self.spec.mast.then_some(Mast {
            azimuth_rad: 200f64.to_radians(),
            top_zenith_rad: 62f64.to_radians(),
            half_width_rad: 0.9f64.to_radians(),
        })
    }

    /// Render frame `i` at time `t`.
    pub fn render_frame(&self, rays: &PixelRays, i: usize, t: &DateTime<Utc>) -> render::Rendered {
        let inst = self.world.instant(t);
        let nuisances = self.nuisance_map.as_ref().map(|m| (&self.spec.nuisances, m));
        render_with(&self.world, &inst, &self.camera, rays, self.cam_pos_m, self.mast(), noise::hash64(self.seed ^ (i as u64 + 1).wrapping_mul(0x9E37)), nuisances)
    }

    /// Every frame rendered and passed through JPEG at the scene's quality and decoded again, as a
    /// user's frames arrive (for calibrating in-process from what a camera would have written).
    pub fn jpeg_frames(&self) -> Vec<(DateTime<Utc>, image::RgbImage)> {
        let rays = PixelRays::new(&self.camera);
        let q = self.spec.jpeg_quality;
        self.frame_times()
            .iter()
            .enumerate()
            .map(|(i, t)| {
                let jpeg = encode_jpeg(&self.render_frame(&rays, i, t).rgb, q);
                (*t, image::load_from_memory(&jpeg).expect("a JPEG the encoder just wrote decodes").to_rgb8())
            })
            .collect()
    }

    /// Render frame `i` at time `t` from another camera standing at `position_m` (east, north,
    /// up) \[m\] (e.g. the second camera of a stereo pair, [`crate::stereo`]): the same world at
    /// the same time, without the mast and the nuisances (they belong to the scene's own camera),
    /// with sensor noise of its own. `rays` must come from `camera`.
    pub fn render_frame_from(&self, camera: &Camera, position_m: [f64; 3], rays: &PixelRays, i: usize, t: &DateTime<Utc>) -> render::Rendered {
        let inst = self.world.instant(t);
        let seed = noise::hash64(self.seed ^ 0x5EC0_4D00 ^ (i as u64 + 1).wrapping_mul(0x9E37));
        render_with(&self.world, &inst, camera, rays, position_m, None, seed, None)
    }
}

pub use crate::io::{encode_jpeg, encode_png_gray, encode_png_rgb, progress_bar};

/// What writing a sequence produced.
#[derive(Debug, Clone)]
pub struct WriteSummary {
    /// Frames written.
    pub frames: usize,
    /// Bytes written.
    pub bytes: u64,
    /// Rendering time per frame \[s\] (mean).
    pub render_s_per_frame: f64,
}

/// Simulated pyranometer points: the centres of the first three blocks.
pub fn pyranometers(plant: &Plant) -> Vec<(String, [f64; 2])> {
    plant
        .blocks
        .iter()
        .take(3)
        .map(|b| {
            let n = b.points_m.len() as f64;
            let c = b.points_m.iter().fold([0.0, 0.0], |a, p| [a[0] + p[0] / n, a[1] + p[1] / n]);
            (format!("pyr_{}", b.name), c)
        })
        .collect()
}

/// Render and write a whole sequence (layout in the module docs).
///
/// # Errors
/// Any write failure, with its path.
pub fn write_sequence(scene: &Scene, out: &Path, progress: bool) -> Result<WriteSummary, SynthError> {
    // Temporary files of killed earlier runs.
    for sub in ["", "frames", "truth", "truth/masks", "calibration"] {
        crate::io::clean_stale_temps(&out.join(sub));
    }
    write_site_and_scene(scene, out)?;
    let (frames, bytes, render_s) = write_frames(scene, out, progress)?;
    // Truth and readings reach 20 minutes past the last frame.
    let extra = (20.0 * 60.0 / scene.spec.frame_step_s).ceil() as usize;
    put(out.join("truth").join("irradiance.csv"), &irradiance_truth(scene, frames + extra))?;
    put(out.join("measurements.csv"), &pyranometer_readings(scene, frames + extra))?;
    Ok(WriteSummary { frames, bytes, render_s_per_frame: render_s })
}

/// The pyranometer readings `write_sequence` writes as `measurements.csv` (to 20 minutes past the
/// last frame), without rendering: e.g. the same sequence read with another averaging period.
pub fn measurements_csv(scene: &Scene) -> Vec<u8> {
    let frames = scene.frame_times().len();
    pyranometer_readings(scene, frames + (20.0 * 60.0 / scene.spec.frame_step_s).ceil() as usize)
}

/// Write a file of the sequence atomically.
pub(crate) fn put(path: PathBuf, bytes: &[u8]) -> Result<(), SynthError> {
    write_atomic(&path, bytes).map_err(|source| SynthError::Write { path, source })
}

/// The site file, the true camera's calibration, the scene spec with its seed and the layers'
/// truth.
fn write_site_and_scene(scene: &Scene, out: &Path) -> Result<(), SynthError> {
    let w = put;
    let spec = &scene.spec;
    // Site and calibration.
    let site_text = format!(
        "# Site of the synthetic scene {:?} (fictional plant). Written by `nephocast synth`.\n{}",
        spec.name,
        toml::to_string(&scene.site).map_err(|e| SynthError::Invalid { name: spec.name.clone(), message: e.to_string() })?
    );
    w(out.join("site.toml"), site_text.as_bytes())?;
    let cal = CalibrationFile::from_camera(&spec.camera.name, &scene.camera);
    let cal_text = format!("# Camera of the synthetic scene {:?}: the true camera it was rendered with.\n{}", spec.name, toml::to_string(&cal).unwrap_or_default());
    w(out.join("calibration").join(format!("{}.toml", spec.camera.name)), cal_text.as_bytes())?;
    // Truth: scene and layers.
    #[derive(Serialize)]
    struct SceneFile<'a> {
        seed: u64,
        scene: &'a SceneSpec,
    }
    let scene_text = toml::to_string(&SceneFile { seed: scene.seed, scene: spec }).unwrap_or_default();
    w(out.join("truth").join("scene.toml"), scene_text.as_bytes())?;
    let mut layers = CsvTable::with_header_line("layer,base_height_m,wind_speed_mps,wind_toward_deg,wind_east_mps,wind_north_mps,cover_start,cover_end,tau_max");
    for (i, l) in scene.world.layers.iter().enumerate() {
        let s = &l.spec;
        let v = s.wind_enu();
        layers.row([
            i.to_string(),
            s.base_height_m.to_string(),
            s.wind_speed_mps.to_string(),
            s.wind_toward_deg.to_string(),
            format!("{:.4}", v[0]),
            format!("{:.4}", v[1]),
            s.cover_start.to_string(),
            s.cover_end.to_string(),
            s.tau_max.to_string(),
        ]);
    }
    w(out.join("truth").join("layers.csv"), &layers.into_bytes())?;
    Ok(())
}

/// Render, encode and write every frame and the truth masks; returns the frames, the bytes
/// written and the render time per frame \[s\].
fn write_frames(scene: &Scene, out: &Path, progress: bool) -> Result<(usize, u64, f64), SynthError> {
    let w = put;
    let spec = &scene.spec;
    let mut bytes = 0u64;
    let times = scene.frame_times();
    let rays = PixelRays::new(&scene.camera);
    let bar = progress_bar(times.len() as u64, progress, "rendering");
    let t0 = std::time::Instant::now();
    let mut frames_csv = CsvTable::with_header_line("time_utc,frame,cloud_fraction,truth_mask");
    for (i, t) in times.iter().enumerate() {
        let r = scene.render_frame(&rays, i, t);
        let name = frame_name(t, "jpg");
        let jpg = encode_jpeg(&r.rgb, spec.jpeg_quality);
        bytes += jpg.len() as u64;
        w(out.join("frames").join(&name), &jpg)?;
        let mask_name = if i % spec.truth_mask_every.max(1) == 0 {
            let m = format!("{}.png", name.trim_end_matches(".jpg"));
            let png = encode_png_gray(&r.truth);
            bytes += png.len() as u64;
            w(out.join("truth").join("masks").join(&m), &png)?;
            m
        } else {
            String::new()
        };
        frames_csv.row([fmt_time(t), name, format!("{:.5}", r.cloud_fraction), mask_name]);
        bar.inc(1);
    }
    bar.finish_and_clear();
    let render_s = t0.elapsed().as_secs_f64() / times.len().max(1) as f64;
    w(out.join("truth").join("frames.csv"), &frames_csv.into_bytes())?;
    Ok((times.len(), bytes, render_s))
}

/// GHI/DNI/DHI truth per block and plant at every frame step, for `steps` steps (`irradiance.csv`).
fn irradiance_truth(scene: &Scene, steps: usize) -> Vec<u8> {
    let spec = &scene.spec;
    let all_times = World::times(scene.start, spec.frame_step_s, steps);
    let mut pts = vec![];
    let mut owner = vec![];
    for (bi, b) in scene.plant.blocks.iter().enumerate() {
        for p in &b.points_m {
            pts.push(*p);
            owner.push(bi);
        }
    }
    let series = scene.world.irradiance_series(&all_times, &pts);
    let mut irr = CsvTable::with_header_line("time_utc,target,ghi_wm2,dni_wm2,dhi_wm2,ghi_clear_wm2");
    for (t, row) in all_times.iter().zip(&series) {
        let inst_clear = scene.world.instant(t).clear;
        let nb = scene.plant.blocks.len();
        let mut sums = vec![[0.0f64; 4]; nb + 1];
        for (p, v) in row.iter().enumerate() {
            for k in [owner[p], nb] {
                sums[k][0] += v.ghi_wm2;
                sums[k][1] += v.dni_wm2;
                sums[k][2] += v.dhi_wm2;
                sums[k][3] += 1.0;
            }
        }
        for (k, s) in sums.iter().enumerate() {
            let name = if k == nb { crate::plant::PLANT_TARGET } else { scene.plant.blocks[k].name.as_str() };
            irr.row([
                fmt_time(t),
                name.to_string(),
                format!("{:.2}", s[0] / s[3]),
                format!("{:.2}", s[1] / s[3]),
                format!("{:.2}", s[2] / s[3]),
                format!("{:.2}", inst_clear.ghi_wm2),
            ]);
        }
    }
    irr.into_bytes()
}

/// Simulated pyranometer readings over `steps` frame steps (`measurements.csv`).
fn pyranometer_readings(scene: &Scene, steps: usize) -> Vec<u8> {
    let spec = &scene.spec;
    // Pyranometers: 1-minute means (or the network's period) of 1-second samples with 2 % gain
    // error and 3 W/m² noise.
    let (pyr, period) = match &spec.pyranometer_network {
        Some(n) => (n.sensors.iter().map(|(name, p)| (format!("pyr_{name}"), *p)).collect(), n.sample_s as usize),
        None => (pyranometers(&scene.plant), 60),
    };
    let pts: Vec<[f64; 2]> = pyr.iter().map(|p| p.1).collect();
    let total_s = steps as f64 * spec.frame_step_s;
    let minutes = (total_s / period as f64).floor() as usize;
    let secs = World::times(scene.start, 1.0, minutes * period);
    let samples = scene.world.irradiance_series(&secs, &pts);
    let mut header = vec!["time_utc".to_string()];
    header.extend(pyr.iter().map(|(n, _)| format!("ghi_{}_wm2", n.trim_start_matches("pyr_"))));
    header.extend(["temp_air_c".to_string(), "wind_speed_mps".to_string()]);
    let mut meas = CsvTable::new(header);
    for m in 0..minutes {
        let mut row = vec![fmt_time(&secs[m * period])];
        for (k, _) in pyr.iter().enumerate() {
            let mean = (0..period).map(|s| samples[m * period + s][k].ghi_wm2).sum::<f64>() / period as f64;
            let gain = 1.0 + 0.02 * noise::gaussian(noise::hash64(scene.seed ^ (k as u64 + 77)), noise::hash64(scene.seed ^ (k as u64 + 78))).clamp(-1.5, 1.5);
            let n = 3.0 * noise::gaussian(noise::hash64(scene.seed ^ ((m * 16 + k) as u64 + 1000)), noise::hash64(scene.seed ^ ((m * 16 + k) as u64 + 99_999)));
            row.push(format!("{:.1}", (mean * gain + n).max(0.0)));
        }
        row.extend([format!("{:.1}", 22.0 + 4.0 * m as f64 / minutes.max(1) as f64), format!("{:.1}", 3.0)]);
        meas.row(row);
    }
    let mut meas_bytes = if period == 60 {
        b"# Simulated pyranometers (1-minute means of 1-s samples, 2 % gain error, 3 W/m2 noise); time = start of the minute\n".to_vec()
    } else {
        format!("# Simulated pyranometers ({period}-s means of 1-s samples, 2 % gain error, 3 W/m2 noise); time = start of the period\n").into_bytes()
    };
    meas_bytes.extend(meas.into_bytes());
    meas_bytes
}

