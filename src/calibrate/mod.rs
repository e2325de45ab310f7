//! Camera calibration from the sun's track.
//!
//! 1. **Sun detection** in each frame: the densest cluster of saturated pixels (all channels ≥ 250),
//!    its centroid over the rows at least three pixels wide (so a one-pixel blooming streak does not
//!    pull it), rejected when the blob is too small (sun clouded), too large, or when much saturated
//!    area lies elsewhere (bright cloud: ambiguous). Each detection is paired with the SPA sun
//!    direction at the frame's time and keeps the area of its saturated blob.
//!    **Glare lean** ([`correct_glare_lean`], `calibrate/lean.rs`): the clipped image is a level set of the sun's glare, and an
//!    asymmetric glare moves its centroid outward by an amount that grows with its size and that a
//!    fit would take for focal length. The nested level sets of each detection (236 … 252) measure
//!    that growth; the detection is moved back to where a level set of no size would sit.
//!    **Cloud or something fixed at the sun** ([`surround`]): a detection whose core is not a level
//!    set of a clear sky's glare (the unclipped ring just outside it spreads widely once the glare's
//!    fall with distance is removed, the core runs far, or it is a cloud-dimmed fraction of the
//!    bare disc) is dropped before anything else is measured from the detections.
//! 2. **Bloom screening.** Glare that spreads around a low or hazy sun is rarely symmetric, so its
//!    centroid leans away from the sun; the blob then grows beyond the sun's own clipped disc. The
//!    smallest blobs of the set (the 20th percentile of areas) stand for the bare disc; a detection
//!    whose blob is more than four times that is dropped, and the others are weighted by
//!    `1 / (1 + (excess / 0.5)²)`, excess being the relative growth of the area.
//! 3. **Initial guess** without user input: the image circle (fit to the lens edge, see
//!    [`refine_image_circle`]) gives the
//!    principal point and, for a 90° rim, the focal length; the yaw is the circular mean of the
//!    angle between where a level camera would put the sun and where it is.
//! 4. **Fit** by Levenberg–Marquardt (the `levenberg-marquardt` crate) of principal point, focal
//!    length (as its logarithm, so a fit can never reach a mirrored, negative focal length), yaw,
//!    pitch, roll and, for the polynomial model, k1 and k2, minimizing the weighted reprojection error
//!    with a Huber loss (iteratively reweighted, δ = 1.5 px). The centre of the image circle enters as
//!    a prior on the principal point (σ = 1 px): on a fisheye the imaged field is a disc about the
//!    principal point, and without it a principal-point shift and a tilt trade off along one arc.
//! 5. **Model choice** by cross-validation over blocks of zenith angle: the detections are cut into
//!    five contiguous blocks of the sun's zenith angle, each block is predicted by a fit to the other
//!    four (the outermost by extrapolation, as the map needs beyond the track), and the ideal lens
//!    families (equidistant, equisolid, stereographic) compete on that held-out error; free
//!    distortion terms (the polynomial) are admitted only when they lower the held-out error by more
//!    than 10 %, never because the in-sample residual falls. `--lens` forces a family.
//!    A family whose fitted lens puts the image circle's rim outside 85–100° from the axis (a sky
//!    imager sees the whole sky) loses to any family that puts it inside: a centroid bias that
//!    grows with zenith angle looks like distortion on the detections alone, but bends the rim.
//! 6. **Field**: the largest field angle is where the fitted lens puts the image circle's rim.
//! 7. **What the detections constrain**: the parameter covariance `s² (JᵀWJ)⁻¹`, with `s` the
//!    held-out (not in-sample) error, is carried to each sky direction's image position; twice that
//!    standard deviation plus the spread between the lens families that predict the held-out blocks
//!    about as well (within 25 %, plausible rim), plus a scale term for a radial lean of the clipped
//!    disc common to all detections (which the fit takes for focal length and the held-out error
//!    cannot see: as large as the held-out error or 5 % of the bare disc's radius), is the stated
//!    direction-error bound, tabulated by zenith band
//!    (largest over azimuth). The report names the zenith and azimuth span of the detections and
//!    warns where the map reaches beyond what they constrain.
//! 8. **Checks before writing**: a camera the site loader would refuse (or with tilt beyond 20°, or
//!    detections spanning under 20° of azimuth) is an error, never a file.
//! 9. **Few detections** (a winter day's low arc): from [`HELD_FIT_DETECTIONS`] (12) up to what a
//!    free fit needs (`min_detections`, 20, and three per parameter), the fit is *held* to the
//!    image circle: the principal point stays at its centre (its σ enters the covariance only), the
//!    lens is one of the ideal families, a bloom lean only from 15 detections, and of the glare-lean
//!    forms that earn their place the one that moves the detections least (with the centre held
//!    and no bloom lean, a correction that goes too far reads as focal length). Each family's fit
//!    with the centre free stands in the bound as a competitor, and the bound's radial allowance
//!    grows by [`HELD_RADIAL_SCALE`]. The fit names the held parameters (`fit.held`, not counted as
//!    free by the loader) and warns which part of the sky its detections constrain (as does any
//!    fit whose detections span under [`NARROW_ZENITH_SPAN_DEG`] of zenith). Fewer than 12 are
//!    refused with the reason.
//!
//! The projection is [`Camera`]'s, the same code the pipeline uses.
//!
//! # References
//! * B. Urquhart, B. Kurtz, J. Kleissl, "Sky camera geometric calibration using solar observations",
//!   *Atmos. Meas. Tech.* 9:4279–4294, 2016.
//! * K. Levenberg 1944; D. W. Marquardt, *J. SIAM* 11(2):431–441, 1963.
//! * P. J. Huber, "Robust estimation of a location parameter", *Ann. Math. Statist.* 35:73–101, 1964.
//! * Blocked cross-validation for dependent data: D. R. Roberts et al., *Ecography* 40:913–929, 2017.

use chrono::{DateTime, Utc};
use nalgebra::{DMatrix, DVector};

use crate::camera::{Camera, Orientation, Projection};
use crate::sun::{Observer, direction_enu, position};

mod bound;
mod detect;
mod families;
mod fit;
mod handedness;
mod lean;
mod outliers;
mod overlay;
mod outputs;
pub mod surround;
use bound::{bound_table, coverage_of, reach_warnings, sky_warning};
pub use bound::NARROW_ZENITH_SPAN_DEG;
use families::LeanCandidate;
use fit::{CentrePrior, Problem, finish, held_out, problem, solve, start_params, weighted_rms, with_lean};
pub use fit::fit_detections;
use handedness::fit_screened;
pub use handedness::MIRRORED_MIN_GAIN;
pub mod clip;
pub use clip::{ClipTest, chroma_dc_quantizer};
pub use detect::{ImageCircle, detect_sun, find_sun_blob, fit_image_circle, geometry_free, refine_image_circle, saturated_blob_area, screen_bloom, sky_edge_circle};
pub use lean::{GlareLevel, LeanCorrection, LeanModel, correct_glare_lean, glare_levels};
pub use outputs::{LIBRARY_SAMPLES_PER_RADIUS, calibration_record, clear_sky_reference, detections_csv, library_sample_step, obstruction_mask, residual_plot};
pub use overlay::{STATIC_BRIGHT_SHARE, overlay_mask, sun_sectors};
use overlay::{static_bright, without_static_bright};

/// One sun detection paired with the sun's direction.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Detection {
    /// Frame time.
    pub time: DateTime<Utc>,
    /// Detected centroid (column, row) \[px\].
    pub px: (f64, f64),
    /// Sun direction (east, north, up), apparent.
    pub dir: [f64; 3],
    /// Area of the saturated blob \[px\] (0 when unknown).
    pub blob_px: usize,
    /// Quality weight in 0..1 from the bloom screening (1: a bare disc).
    pub weight: f64,
}

impl Detection {
    /// A detection of full weight and unknown blob size.
    pub fn new(time: DateTime<Utc>, px: (f64, f64), dir: [f64; 3]) -> Self {
        Self { time, px, dir, blob_px: 0, weight: 1.0 }
    }
}

/// A lens family to fit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LensFamily {
    /// `r = f θ`.
    Equidistant,
    /// `r = 2 f sin(θ/2)`.
    Equisolid,
    /// `r = 2 f tan(θ/2)`.
    Stereographic,
    /// `r = f θ (1 + k1 θ² + k2 θ⁴)`.
    Polynomial,
}

impl LensFamily {
    /// All families, simplest first.
    pub const ALL: [LensFamily; 4] = [LensFamily::Equidistant, LensFamily::Equisolid, LensFamily::Stereographic, LensFamily::Polynomial];

    fn projection(self) -> Projection {
        match self {
            LensFamily::Equidistant => Projection::Equidistant,
            LensFamily::Equisolid => Projection::Equisolid,
            LensFamily::Stereographic => Projection::Stereographic,
            LensFamily::Polynomial => Projection::Polynomial { k: [0.0; 4] },
        }
    }

    /// Its name as written in calibration files.
    pub fn name(self) -> &'static str {
        self.projection().name()
    }

    /// Parse a name.
    pub fn from_name(s: &str) -> Option<Self> {
        Self::ALL.into_iter().find(|f| f.name() == s)
    }
}

/// Settings of [`calibrate`].
#[derive(Debug, Clone)]
pub struct CalibrateOptions {
    /// Fewest usable detections.
    pub min_detections: usize,
    /// Lowest sun elevation for a detection \[°\].
    pub min_sun_elevation_deg: f64,
    /// A forced lens family; `None` chooses by cross-validation.
    pub lens: Option<LensFamily>,
    /// Standard deviation of the image circle's centre as a prior on the principal point \[px\];
    /// `None` leaves the principal point free.
    pub centre_prior_px: Option<f64>,
    /// The largest zenith angle the map uses \[°\], to warn when it reaches beyond the detections.
    pub map_max_zenith_deg: f64,
    /// How the sun's clipped core is judged ([`ClipTest::for_chroma_quantizer`] of the frames).
    pub clip: ClipTest,
    /// Hold the principal point at the image circle's centre (not fitted; `centre_prior_px` is
    /// then its uncertainty in the bound) and fit the ideal lens families only. [`calibrate`]
    /// sets it itself when the detections are too few for a free fit (see [`HELD_FIT_DETECTIONS`]).
    pub hold_centre: bool,
}

impl Default for CalibrateOptions {
    fn default() -> Self {
        Self {
            min_detections: 20,
            min_sun_elevation_deg: DEFAULT_MIN_SUN_ELEVATION_DEG,
            lens: None,
            centre_prior_px: Some(1.0),
            map_max_zenith_deg: 84.0,
            clip: ClipTest::Channels,
            hold_centre: false,
        }
    }
}

/// The stated direction-error bound over one zenith band.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BandBound {
    /// Lower edge of the band \[°\].
    pub zenith_from_deg: f64,
    /// Upper edge of the band \[°\].
    pub zenith_to_deg: f64,
    /// Largest bound over the band's azimuths \[°\].
    pub bound_deg: f64,
}

/// Which part of the sky the detections cover.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Coverage {
    /// Smallest zenith angle of a weighted detection \[°\].
    pub zenith_min_deg: f64,
    /// Largest zenith angle of a weighted detection \[°\].
    pub zenith_max_deg: f64,
    /// Azimuth span of the weighted detections \[°\] (the smallest arc holding them all).
    pub azimuth_span_deg: f64,
    /// Where that arc starts \[°\] (it runs clockwise, through east, for `azimuth_span_deg`).
    pub azimuth_from_deg: f64,
}

/// Held-out error of one lens family.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FamilyScore {
    /// The family.
    pub family: LensFamily,
    /// Weighted RMS of the held-out residuals \[px\].
    pub cv_rms_px: f64,
    /// Weighted RMS of the in-sample residuals \[px\].
    pub fit_rms_px: f64,
    /// Whether the fit carries a bloom lean (the held-out error said it helps).
    pub bloom_lean: bool,
}


/// A fitted calibration.
#[derive(Debug, Clone)]
pub struct Fit {
    /// The camera.
    pub camera: Camera,
    /// The lens family.
    pub family: LensFamily,
    /// Parameter names, values and standard errors (angles in degrees).
    pub params: Vec<(String, f64, f64)>,
    /// Weighted RMS residual \[px\].
    pub rms_px: f64,
    /// Largest residual \[px\].
    pub max_px: f64,
    /// Weighted RMS residual \[°\].
    pub rms_deg: f64,
    /// Largest residual \[°\].
    pub max_deg: f64,
    /// Residuals per detection \[px\] (dx, dy).
    pub residuals: Vec<(f64, f64)>,
    /// Warnings (parameters the data leave loose, parts of the sky the data do not constrain).
    pub warnings: Vec<String>,
    /// Bayesian information criterion of the fit.
    pub bic: f64,
    /// Held-out error of every family tried (empty for a single fit).
    pub scores: Vec<FamilyScore>,
    /// The stated direction-error bound by zenith band.
    pub bounds: Vec<BandBound>,
    /// The part of the sky the detections cover.
    pub coverage: Coverage,
    /// How far the glare's lean was taken out of the detections (see [`correct_glare_lean`]).
    pub glare_lean: LeanCorrection,
    /// Why the frames were taken as mirrored (see [`Camera::mirrored`]); `None` for upright frames.
    pub mirrored_because: Option<String>,
    /// Held-out error \[px\] of the chosen family fitted to the detections as found and mirrored
    /// (infinite where that handedness gave no usable camera).
    pub handedness_held_out_px: [f64; 2],
    /// Parameters held by the image circle rather than fitted to the detections (their standard
    /// errors are the circle's own uncertainty); empty for a free fit.
    pub held: Vec<String>,
    /// Times of the detections dropped for cloud at or near the sun, or something fixed across
    /// its glare, before the fit (see [`surround`]).
    pub clouded: Vec<DateTime<Utc>>,
    /// Parameter vector and covariance (internal parametrization), for the bound.
    cov: Option<(DVector<f64>, DMatrix<f64>)>,
}

impl Fit {
    /// The stated direction-error bound \[°\] at a zenith angle (the band's), or `None` beyond the
    /// tabulated bands.
    pub fn bound_at_deg(&self, zenith_deg: f64) -> Option<f64> {
        self.bounds.iter().find(|b| zenith_deg >= b.zenith_from_deg && zenith_deg < b.zenith_to_deg).map(|b| b.bound_deg)
    }
}

/// An error of calibration.
#[derive(Debug, thiserror::Error)]
pub enum CalibrationError {
    /// Not enough usable detections.
    #[error(
        "{found} sun detections, {needed} needed ({frames} frames read, {night} with the sun below {min_elevation_deg}°, {clouded} with cloud or something fixed at the sun, {bloom} dropped as bloom); even a fit held to an ideal lens with the principal point at the image circle's centre needs {held} (three per free parameter: focal length, yaw, pitch, roll): add frames from more of the day or another day"
    )]
    TooFewDetections {
        /// Detections found.
        found: usize,
        /// Needed for a free fit.
        needed: usize,
        /// Needed for a held fit ([`HELD_FIT_DETECTIONS`]).
        held: usize,
        /// Frames read.
        frames: usize,
        /// Frames with the sun too low.
        night: usize,
        /// Detections dropped by the bloom screening.
        bloom: usize,
        /// Detections dropped because the glare around the sun was not a clear sky's (cloud, or
        /// something fixed crossing it; see `surround`).
        clouded: usize,
        /// The lowest sun elevation used \[°\].
        min_elevation_deg: f64,
    },
    /// No image circle.
    #[error("no image circle found in the frames (are they black?)")]
    NoCircle,
    /// The fit is not a camera the pipeline may use.
    #[error("the fit is not usable ({0}); no calibration written: add frames from more of the day or another season")]
    Unusable(String),
}

/// Initial camera from the image circle and the first detections.
pub fn initial_camera(circle: ImageCircle, size: (u32, u32), dets: &[Detection]) -> Camera {
    let f = circle.radius_px / std::f64::consts::FRAC_PI_2;
    let level = Camera::new(size.0, size.1, circle.cx_px, circle.cy_px, f, Projection::Equidistant, 95f64.to_radians(), Orientation::default());
    // Yaw: circular mean of (angle where a level, yaw-0 camera puts the sun) − (where it is).
    let (mut s, mut c) = (0.0, 0.0);
    for d in dets {
        let Some((x, y)) = level.project_enu(d.dir) else { continue };
        let want = (y - circle.cy_px).atan2(x - circle.cx_px);
        let got = (d.px.1 - circle.cy_px).atan2(d.px.0 - circle.cx_px);
        let dd = got - want;
        s += dd.sin();
        c += dd.cos();
    }
    level.with_orientation(Orientation { yaw_rad: s.atan2(c), pitch_rad: 0.0, roll_rad: 0.0 })
}

/// The default lowest sun elevation for detections \[°\]. Lower, the glare merges with the bright
/// horizon sky and the saturated blob leans toward the horizon: on the synthetic clear days its
/// centroid sits 0.1–0.15 px outward of the true sun at 45–65° zenith but 0.3 px at 72° and 1.4–2.2 px
/// at 79–80° (test `sun_detections_sit_on_the_true_sun`), and a fit that keeps those detections
/// bends the lens model to follow them.
pub const DEFAULT_MIN_SUN_ELEVATION_DEG: f64 = 20.0;

/// The zenith bands of the stated bound \[°\].
pub const BOUND_BANDS_DEG: [(f64, f64); 7] = [(0.0, 40.0), (40.0, 50.0), (50.0, 60.0), (60.0, 70.0), (70.0, 80.0), (80.0, 85.0), (85.0, 90.0)];

/// The field angles \[°\] at which a sky imager's image-circle rim is plausible: all-sky lenses are
/// built to image the whole sky hemisphere, rim at or a little beyond the horizon (common practice,
/// no source). A fitted lens whose rim falls outside loses to one whose rim falls inside.
pub const PLAUSIBLE_RIM_DEG: (f64, f64) = (85.0, 100.0);

/// Smallest share by which a glare-lean correction must lower the held-out error to be kept.
pub const LEAN_MIN_GAIN: f64 = 0.05;

/// The share by which a glare-lean correction measured on `measured` detections must lower the
/// held-out error to be kept: [`LEAN_MIN_GAIN`] from `lean::MIN_MEASURED` (30) detections on;
/// below that, also at least 1/√(2n) (22 % for 10, 14 % for 24, 13 % for 29, then 5 % from 30: a
/// step). A heuristic scale, not a test: 1/√(2n) is the relative sampling error of one RMS over n
/// independent residuals, while the held-out RMS is over all the detections' weighted residuals,
/// both compared on the same detections. With few detections a correction of the wrong form can
/// win the held-out comparison by chance, while the lean of a low sun, which every detection
/// shares, lowers it by far more (the independent cameras' low arcs, 26 and 24 detections: 34 %
/// and 24 %).
fn lean_gain_needed(measured: usize) -> f64 {
    if measured >= lean::MIN_MEASURED { LEAN_MIN_GAIN } else { LEAN_MIN_GAIN.max(1.0 / (2.0 * measured.max(1) as f64).sqrt()) }
}

/// Parameters of a free fit of an ideal lens: principal point (2), focal length, yaw, pitch, roll.
pub const FREE_FIT_PARAMETERS: usize = 6;

/// Fewest detections for a fit held to the image circle (`CalibrateOptions::hold_centre`): three
/// per free parameter (focal length, yaw, pitch, roll), the loader's rule
/// ([`crate::config::MIN_DETECTIONS_PER_PARAMETER`]).
pub const HELD_FIT_DETECTIONS: usize = 4 * crate::config::MIN_DETECTIONS_PER_PARAMETER;

/// The uncertainty \[px\] of the image circle's centre as the principal point when the fit holds it
/// and no prior was given (the prior's usual σ).
pub const HELD_CENTRE_SIGMA_PX: f64 = 1.0;

/// A radial scale \[share of the image radius\] added to the bound's allowance of a fit held to the
/// image circle. Such a fit assumes an ideal lens family over a narrow band of zenith angle, where
/// every detection may be bloomed (no bare disc to measure the lean against): a real lens departs
/// from its family (our nuisance camera's by 0.15 % of the radius at zenith 65°), and a bloomed
/// glare leans by a share of the radius the held-out error reads as focal length (ours +0.3 % at
/// zenith 60–70°). An assumption, not a measurement: set after the nuisance winter day's held fit
/// (14 detections) fell 0.02–0.03° short of its bound at zenith 40–60° with a focal length 0.7 %
/// long, as a round figure above that shortfall.
pub const HELD_RADIAL_SCALE: f64 = 0.005;

/// A bound above this \[°\] is reported as the detections not constraining that part of the sky.
pub const UNCONSTRAINED_BOUND_DEG: f64 = 1.0;

/// Calibrate from frames: detect the sun, screen the bloom, start from the image circle, fit each
/// lens family, choose by held-out error, bound the direction error. Frames whose sun is below
/// `options.min_sun_elevation_deg` are skipped.
///
/// # Errors
/// Fewer than `min_detections` usable detections, no image circle, or a fit the pipeline could not
/// use.
pub fn calibrate(frames: &[(DateTime<Utc>, image::RgbImage)], observer: &Observer, options: &CalibrateOptions) -> Result<(Fit, Vec<Detection>), CalibrationError> {
    let low = |found: usize, frames: usize, night: usize, bloom: usize| CalibrationError::TooFewDetections {
        found,
        needed: options.min_detections,
        held: HELD_FIT_DETECTIONS,
        frames,
        night,
        bloom,
        clouded: 0,
        min_elevation_deg: options.min_sun_elevation_deg,
    };
    let first = frames.first().ok_or(low(0, 0, 0, 0))?;
    let day: Vec<bool> = frames
        .iter()
        .map(|(t, _)| position(t, observer).map(|s| s.elevation_rad().to_degrees() >= options.min_sun_elevation_deg).unwrap_or(false))
        .collect();
    let night = day.iter().filter(|d| !**d).count();
    if night == frames.len() {
        return Err(low(0, frames.len(), night, 0));
    }
    let circle = median_circle(frames, &day)?;
    let size = first.1.dimensions();
    let (lit, suns): (Vec<&image::RgbImage>, Vec<[f64; 3]>) = frames
        .iter()
        .zip(&day)
        .filter(|(_, d)| **d)
        .filter_map(|((t, img), _)| position(t, observer).ok().map(|sp| (img, direction_enu(sp.apparent_zenith_rad, sp.azimuth_rad))))
        .unzip();
    let ignore = static_bright(&lit, &sun_sectors(&suns), circle, options.clip);
    let (raw, levels, spreads) = sun_detections(frames, &day, observer, circle, options.clip, ignore.as_deref());
    // Detections whose glare is not a clear sky's (cloud at the sun, or something fixed across
    // its glare) are dropped before anything is measured from them (see `surround`), unless what
    // is left cannot be fitted or loses the orientation that every detection gives.
    let clouded = surround::Clouded::judge(&raw, &spreads);
    let counts = (frames.len(), night);
    let kept = fit_kept(&raw, &levels, &clouded, circle, size, counts, options);
    if clouded.is_empty() {
        return kept;
    }
    let all = fit_kept(&raw, &levels, &surround::Clouded::default(), circle, size, counts, options);
    surround::keep_orientation(kept, all, &clouded, &raw)
}

/// The fit on the detections `raw` less those `clouded` drops, made again without the gross
/// outliers when there are any.
fn fit_kept(
    raw: &[Detection],
    levels: &[Vec<GlareLevel>],
    clouded: &surround::Clouded,
    circle: ImageCircle,
    size: (u32, u32),
    (n_frames, night): (usize, usize),
    options: &CalibrateOptions,
) -> Result<(Fit, Vec<Detection>), CalibrationError> {
    let (raw, levels): (Vec<Detection>, Vec<Vec<GlareLevel>>) = raw.iter().zip(levels).filter(|(d, _)| !clouded.contains(&d.time)).map(|(d, l)| (*d, l.clone())).unzip();
    let counts = (n_frames, night, clouded.len());
    let first_pass = fit_screened(&raw, &levels, circle, size, counts, options).map(|(mut fit, dets)| {
        fit.warnings.extend(clouded.warning());
        fit.clouded = clouded.times();
        (fit, dets)
    });
    // Gross outliers (a glint, or the glare of a sun just outside a frame that cuts the image
    // circle, taken for the sun) are dropped and the fit made again: one such detection among a
    // hundred moved the fit by 0.4° through its lens-lean and held-out choices.
    let Ok((fit, dets)) = &first_pass else { return first_pass };
    let times: Vec<DateTime<Utc>> = dets.iter().map(|d| d.time).collect();
    let limit_px = outliers::gross_threshold_px(&fit.residuals, circle.radius_px);
    let gross = outliers::gross_outliers(&fit.residuals, &times, limit_px);
    if gross.is_empty() {
        return first_pass;
    }
    let keep: Vec<bool> = raw.iter().map(|d| !gross.contains(&d.time)).collect();
    let raw2: Vec<Detection> = raw.iter().zip(&keep).filter(|(_, k)| **k).map(|(d, _)| *d).collect();
    let levels2: Vec<Vec<GlareLevel>> = levels.into_iter().zip(&keep).filter(|(_, k)| **k).map(|(l, _)| l).collect();
    match fit_screened(&raw2, &levels2, circle, size, counts, options) {
        Ok((mut fit, dets)) => {
            fit.warnings.extend(clouded.warning());
            fit.clouded = clouded.times();
            fit.warnings.push(outliers::dropped_warning(&gross, limit_px));
            Ok((fit, dets))
        }
        Err(_) => first_pass,
    }
}

/// Steps 4–8 for one handedness of the detections: the glare's lean, the lens families, the
/// bound and the checks.
fn fit_one_handedness(
    raw: &[Detection],
    levels: &[Vec<GlareLevel>],
    circle: ImageCircle,
    size: (u32, u32),
    coverage: Coverage,
    options: &CalibrateOptions,
) -> Result<(Fit, Vec<Detection>), CalibrationError> {
    // The glare's lean: as measured (either form of its factor) or left in, whichever the
    // held-out blocks of the fit prefer (see `lean`).
    let candidates = [None, Some(LeanModel::Area), Some(LeanModel::Profile)].map(|model| {
        let mut dets = raw.to_vec();
        let glare_lean = model.map(|m| correct_glare_lean(&mut dets, levels, (circle.cx_px, circle.cy_px), m)).unwrap_or_default();
        screen_bloom(&mut dets);
        LeanCandidate::fit(dets, glare_lean, circle, size, options)
    });
    // A correction must earn its place: it is kept only when it lowers the held-out error by more
    // than `lean_gain_needed` of its measured detections (LEAN_MIN_GAIN from lean::MIN_MEASURED
    // on; with few detections the held-out error is noisy, and a correction of the wrong form
    // moves every detection).
    let [plain, area, profile] = candidates;
    // With the principal point held (few detections, no bloom lean), a radial shift common to all
    // detections is focal length to the held-out error, which then cannot tell a correction that
    // goes too far: of the forms that earn their place, the one that moves the detections least.
    let earns = |c: &LeanCandidate| plain.as_ref().is_some_and(|p| c.cv_rms_px() < (1.0 - lean_gain_needed(c.glare_lean.measured)) * p.cv_rms_px());
    let corrected = if options.hold_centre && plain.is_some() {
        [area, profile].into_iter().flatten().filter(earns).min_by(|a, b| a.glare_lean.median_move_px.total_cmp(&b.glare_lean.median_move_px))
    } else {
        [area, profile].into_iter().flatten().min_by(|a, b| a.cv_rms_px().total_cmp(&b.cv_rms_px()))
    };
    let chosen = match (plain, corrected) {
        (Some(p), Some(mut c)) => {
            if c.cv_rms_px() < (1.0 - lean_gain_needed(c.glare_lean.measured)) * p.cv_rms_px() {
                c.glare_lean.held_out_without_px = p.cv_rms_px();
                c
            } else {
                p
            }
        }
        (p, c) => p.or(c).ok_or_else(|| CalibrationError::Unusable("no lens family could be fitted".into()))?,
    };
    let LeanCandidate { dets, glare_lean, solved, free, rims, any_plausible, loads, best } = chosen;
    let plausible = |i: usize| (PLAUSIBLE_RIM_DEG.0..=PLAUSIBLE_RIM_DEG.1).contains(&rims[i]);
    let rim_warning = (!any_plausible).then(|| {
        format!(
            "no lens family puts the image circle's rim within {:.0}–{:.0}° of the axis (the chosen one puts it at {:.1}°): check the frames show the whole lens field",
            PLAUSIBLE_RIM_DEG.0, PLAUSIBLE_RIM_DEG.1, rims[best]
        )
    });
    let scores: Vec<FamilyScore> = solved.iter().map(|s| s.1).collect();
    let best_cv = scores[best].cv_rms_px;
    let (prob, _) = &solved[best];
    let mut fit = finish(prob, Some(best_cv.max(1e-3)), Some(circle));
    // Families that predict the held-out blocks about as well stand for what the data cannot tell
    // apart.
    let mut competitors: Vec<Camera> = solved
        .iter()
        .enumerate()
        .filter(|(i, s)| *i != best && s.1.cv_rms_px <= 1.25 * best_cv && (!any_plausible || plausible(*i)) && loads[*i])
        .map(|(_, s)| finish(&s.0, None, Some(circle)).camera)
        .collect();
    // A held principal point: the same family fitted with it free stands for what holding it
    // decided (the centre and the tilt trade off along one arc of the sun).
    if let Some(f) = free.get(best) {
        let cam = finish(f, None, Some(circle)).camera;
        if crate::config::CalibrationFile::from_camera("check", &cam).camera(std::path::Path::new("<fitted camera>")).is_ok() {
            competitors.push(cam);
        }
    }
    fit.scores = scores;
    fit.warnings.extend(rim_warning);
    fit.coverage = coverage;
    fit.glare_lean = glare_lean;
    let scale_sys = systematic_scale(&dets, &fit.camera, best_cv) + if options.hold_centre { HELD_RADIAL_SCALE } else { 0.0 };
    fit.bounds = bound_table(&fit, prob, &competitors, scale_sys);
    check_usable(&fit)?;
    fit.warnings.extend(sky_warning(&fit, dets.len(), options));
    reach_warnings(&mut fit, options);
    fit.warnings.extend(tilt_warning(&fit.camera));
    Ok((fit, dets))
}

/// The image circle: the median of the daytime frames' fits (robust to a frame with a bright rim
/// or a dark one).
fn median_circle(frames: &[(DateTime<Utc>, image::RgbImage)], day: &[bool]) -> Result<ImageCircle, CalibrationError> {
    let circles: Vec<ImageCircle> =
        frames.iter().zip(day).filter(|(_, d)| **d).filter_map(|((_, img), _)| fit_image_circle(img).map(|c| refine_image_circle(img, c).unwrap_or(c))).collect();
    if circles.is_empty() {
        return Err(CalibrationError::NoCircle);
    }
    let median = |f: &dyn Fn(&ImageCircle) -> f64| {
        let mut v: Vec<f64> = circles.iter().map(f).collect();
        v.sort_by(f64::total_cmp);
        v[v.len() / 2]
    };
    Ok(ImageCircle { cx_px: median(&|c| c.cx_px), cy_px: median(&|c| c.cy_px), radius_px: median(&|c| c.radius_px) })
}

/// The sun found in each daytime frame, with its direction and blob area, in time order, the
/// nested level sets of its glare (within three times the detection's neighbourhood) and the
/// spread of the brightness around its clipped core ([`surround::ring_spread`]).
type SunDetections = (Vec<Detection>, Vec<Vec<GlareLevel>>, Vec<Option<f64>>);

fn sun_detections(
    frames: &[(DateTime<Utc>, image::RgbImage)],
    day: &[bool],
    observer: &Observer,
    circle: ImageCircle,
    clip: ClipTest,
    ignore: Option<&[bool]>,
) -> SunDetections {
    let mut dets = vec![];
    for ((t, img), is_day) in frames.iter().zip(day) {
        let Ok(sp) = position(t, observer) else { continue };
        if !is_day {
            continue;
        }
        let darkened = ignore.and_then(|m| without_static_bright(img, m, clip));
        let img = darkened.as_ref().unwrap_or(img);
        if let Some((x, y, _)) = detect_sun(img, circle.radius_px, clip) {
            let area = saturated_blob_area(img, x, y, 0.05 * circle.radius_px, clip);
            let levels = glare_levels(img, x, y, 0.15 * circle.radius_px, clip);
            let spread = surround::ring_spread(img, x, y, circle, 0.15 * circle.radius_px, clip);
            dets.push((Detection { time: *t, px: (x, y), dir: direction_enu(sp.apparent_zenith_rad, sp.azimuth_rad), blob_px: area, weight: 1.0 }, levels, spread));
        }
    }
    dets.sort_by_key(|d| d.0.time);
    let mut out: SunDetections = (vec![], vec![], vec![]);
    for (d, l, s) in dets {
        out.0.push(d);
        out.1.push(l);
        out.2.push(s);
    }
    out
}

/// A radial lean of the clipped disc common to all detections reads as focal length: the held-out
/// error cannot see it. Allow a lean as large as the held-out error or 5 % of the bare disc's
/// radius, whichever is larger, over the median image radius of the detections.
fn systematic_scale(dets: &[Detection], camera: &Camera, best_cv: f64) -> f64 {
    let mut areas: Vec<f64> = dets.iter().filter(|d| d.blob_px > 0).map(|d| d.blob_px as f64).collect();
    areas.sort_by(f64::total_cmp);
    let disc_r = areas.get(areas.len() / 5).map(|a| (a / std::f64::consts::PI).sqrt()).unwrap_or(0.0);
    let mut radii: Vec<f64> = dets.iter().map(|d| (d.px.0 - camera.cx_px).hypot(d.px.1 - camera.cy_px)).collect();
    radii.sort_by(f64::total_cmp);
    let r_med = radii[radii.len() / 2].max(1.0);
    best_cv.max(0.05 * disc_r) / r_med
}

/// A tilt of the optical axis beyond this \[°\] draws a warning: sky imagers are levelled to
/// within a degree or so (common practice, no source).
pub const LEVEL_WARN_TILT_DEG: f64 = 3.0;

/// The warning for a camera tilted beyond [`LEVEL_WARN_TILT_DEG`]. From one day a clock offset and
/// a tilt nearly trade off (the sun's arc shifted along itself is nearly the arc seen by a tilted
/// camera): on an independent clear day with its frames' times moved by 10, 30 and 60 minutes,
/// `calibrate` fitted tilts of 2.1°, 5.9° and 12.2° (true 0.5°) with residuals of 0.25, 0.26 and
/// 0.31 px against 0.24 px, and no other sign.
/// The optical axis (camera +z) against the zenith \[°\], through the same rotation the camera uses.
fn tilt_deg(camera: &Camera) -> f64 {
    let up = camera.cam_to_enu() * nalgebra::Vector3::new(0.0, 0.0, 1.0);
    up[2].clamp(-1.0, 1.0).acos().to_degrees()
}

fn tilt_warning(camera: &Camera) -> Option<String> {
    let o = &camera.orientation;
    let tilt_deg = tilt_deg(camera);
    (tilt_deg > LEVEL_WARN_TILT_DEG).then(|| {
        format!(
            "the fitted camera is tilted {tilt_deg:.1}° from level (pitch {:.1}°, roll {:.1}°): if it was levelled, the frames' clock is likely off (a time zone or a camera clock: on a clear day with its times moved 30 or 60 minutes the fit tilted 5.9° or 12.2° and its residuals hardly grew); check the times in the frame names are UTC, and the site's longitude (east positive: a sign slip moves the sun by 4 minutes per degree)",
            o.pitch_rad.to_degrees(),
            o.roll_rad.to_degrees()
        )
    })
}

/// Refuse a camera the pipeline could not use or that is not physical.
fn check_usable(fit: &Fit) -> Result<(), CalibrationError> {
    let c = &fit.camera;
    let file = crate::config::CalibrationFile::from_camera("check", c);
    file.camera(std::path::Path::new("<fitted camera>")).map_err(|e| CalibrationError::Unusable(e.to_string()))?;
    let tilt = c.orientation.pitch_rad.abs().max(c.orientation.roll_rad.abs()).to_degrees();
    if tilt > 20.0 {
        return Err(CalibrationError::Unusable(format!("a tilt of {tilt:.1}°, more than 20°")));
    }
    if fit.params.iter().any(|p| !p.1.is_finite()) {
        return Err(CalibrationError::Unusable("a parameter is not finite".into()));
    }
    // A standard error of 0 (or none) says the fit had no freedom left, not that it is exact.
    if let Some((n, _, se)) = fit.params.iter().find(|p| !(p.2.is_finite() && p.2 > 0.0)) {
        return Err(CalibrationError::Unusable(format!("the standard error of {n} is {se}")));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;


    /// A camera tilted beyond 3° draws the clock warning; one levelled within a degree or two
    /// (the renderers' 0.5–1.8°) does not.
    #[test]
    fn a_tilted_fit_warns_of_the_clock() {
        let cam = |pitch_deg: f64, roll_deg: f64| {
            Camera::new(512, 512, 256.0, 256.0, 160.0, Projection::Equidistant, 88f64.to_radians(), Orientation { yaw_rad: 0.3, pitch_rad: pitch_deg.to_radians(), roll_rad: roll_deg.to_radians() })
        };
        assert!(tilt_warning(&cam(1.2, -0.8)).is_none());
        assert!(tilt_warning(&cam(2.0, 2.0)).is_none());
        let w = tilt_warning(&cam(-12.0, -2.3)).expect("a 12° tilt warns");
        assert!(w.contains("tilted 12.2°") && w.contains("clock"), "{w}");
    }

    /// A day of detections from a known equidistant camera, each blob growing past a 10 px disc as
    /// the sun sinks below 35° elevation, its centroid pushed outward by `lean` times that growth
    /// (times sin z), with 0.15 px of noise.
    fn leaning_day(truth: &Camera, lean: f64) -> Vec<Detection> {
        use crate::synth::noise::{gaussian, hash64};
        let obs = Observer::new(32.2, -6.5, 780.0);
        let mut dets = vec![];
        for k in 0..150u64 {
            let t: DateTime<Utc> = "2026-05-10T05:00:00Z".parse::<DateTime<Utc>>().unwrap() + chrono::Duration::minutes(5 * k as i64);
            let sp = position(&t, &obs).unwrap();
            let z = sp.apparent_zenith_rad;
            if z.to_degrees() > 65.0 {
                continue;
            }
            let dir = direction_enu(z, sp.azimuth_rad);
            let (x, y) = truth.project_enu(dir).unwrap();
            let grown = 12.0 * ((z.to_degrees() - 35.0) / 25.0).max(0.0).powi(2);
            let blob_px = (std::f64::consts::PI * (10.0 + grown).powi(2)).round() as usize;
            let (ux, uy) = (x - truth.cx_px, y - truth.cy_px);
            let n = ux.hypot(uy).max(1e-9);
            let push = lean * grown * z.sin();
            let nx = 0.15 * gaussian(hash64(4 * k + 1), hash64(4 * k + 2));
            let ny = 0.15 * gaussian(hash64(4 * k + 3), hash64(4 * k + 4));
            dets.push(Detection { time: t, px: (x + push * ux / n + nx, y + push * uy / n + ny), dir, blob_px, weight: 1.0 });
        }
        screen_bloom(&mut dets);
        dets
    }

    /// Relative focal-length error of the chosen fit, its score, and that of a fit without lean.
    fn lean_fit(lean: f64) -> (f64, FamilyScore, f64) {
        let truth = Camera::new(512, 512, 255.0, 257.0, 160.0, Projection::Equidistant, 88f64.to_radians(), Orientation { yaw_rad: 0.4, pitch_rad: 0.008, roll_rad: -0.005 });
        let dets = leaning_day(&truth, lean);
        let circle = ImageCircle { cx_px: 255.0, cy_px: 257.0, radius_px: 160.0 * 88f64.to_radians() };
        let options = CalibrateOptions { lens: Some(LensFamily::Equidistant), ..CalibrateOptions::default() };
        let solved = families::fit_families_and_free(circle, (512, 512), &dets, &options).0;
        let (prob, score) = &solved[0];
        let f = prob.camera(&prob.p).f_px;
        let start = initial_camera(circle, (512, 512), &dets);
        let plain = solve(problem(start_params(&start, LensFamily::Equidistant), LensFamily::Equidistant, (512, 512), &dets, None, None));
        let f_plain = plain.camera(&plain.p).f_px;
        ((f / 160.0 - 1.0).abs(), *score, (f_plain / 160.0 - 1.0).abs())
    }

    #[test]
    fn bloom_lean_is_kept_when_the_detections_lean() {
        // Without the lean term, an outward lean of half the blob's growth reads as a focal length
        // about 0.5 % long (the bias measured on a renderer's bloom was of this size).
        let (f_err, score, f_err_plain) = lean_fit(0.5);
        eprintln!("focal length error: {:.3} % with the lean, {:.3} % without", 100.0 * f_err, 100.0 * f_err_plain);
        assert!(f_err_plain > 0.002, "the lean should bias a plain fit: {:.3} %", 100.0 * f_err_plain);
        assert!(score.bloom_lean, "the held-out error should keep the lean: {score:?}");
        assert!(f_err < 0.001, "focal length off by {:.3} %", 100.0 * f_err);
    }

    #[test]
    fn bloom_lean_is_left_out_when_nothing_leans() {
        let (f_err, score, _) = lean_fit(0.0);
        assert!(!score.bloom_lean, "no lean in the data, none in the fit: {score:?}");
        assert!(f_err < 0.001, "focal length off by {:.3} %", 100.0 * f_err);
    }

    /// From 30 detections with a slope the usual 5 %; below, the sampling error of an RMS over
    /// that many residuals, which shrinks as they grow.
    #[test]
    fn a_correction_from_few_detections_must_gain_more() {
        assert_eq!(lean_gain_needed(lean::MIN_MEASURED), LEAN_MIN_GAIN);
        assert_eq!(lean_gain_needed(200), LEAN_MIN_GAIN);
        assert!((lean_gain_needed(10) - 0.2236).abs() < 1e-4);
        assert!((lean_gain_needed(24) - 0.1443).abs() < 1e-4);
        assert!((lean::MIN_MEASURED_FEW..lean::MIN_MEASURED).all(|n| lean_gain_needed(n) > lean_gain_needed(n + 1) || n + 1 == lean::MIN_MEASURED));
    }

    #[test]
    fn lens_family_names_round_trip() {
        for f in LensFamily::ALL {
            assert_eq!(LensFamily::from_name(f.name()), Some(f));
        }
        assert_eq!(LensFamily::from_name("fisheye"), None);
    }
}
