//! Cloud base height (CBH) without a ceilometer: an estimate from shadow timing at the plant's
//! pyranometers ([`ShadowTiming`]) and the combination of every available estimate (ceilometer
//! series, shadow timing, the configured value as a prior) into one height with its uncertainty
//! ([`combine`]). Shadow timing's method is in [`shadow`].

use serde::{Deserialize, Serialize};

use chrono::{DateTime, Utc};

use crate::forecast::TransmittanceMap;

mod shadow;
pub use shadow::{NoFit, NullTest, Reading, ShadowFit, ShadowParams, ShadowTiming, readings};

/// Where a cloud base height came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum CbhSource {
    /// A ceilometer series (`[clouds] base_height_csv`).
    Ceilometer,
    /// Shadow timing at the pyranometers ([`ShadowTiming`]).
    ShadowTiming,
    /// The configured value (`[clouds] base_height_m`) with its prior uncertainty.
    Configured,
    /// Two cameras ([`crate::stereo`], fed through [`CbhState::observe_stereo`]).
    Stereo,
    /// The unconfigured prior of a site that names no base ([`UNCONFIGURED_PRIOR_M`]).
    Prior,
}

impl CbhSource {
    /// The name written in `motion.csv` and the live API.
    pub fn name(self) -> &'static str {
        match self {
            CbhSource::Ceilometer => "ceilometer",
            CbhSource::ShadowTiming => "shadow_timing",
            CbhSource::Configured => "configured",
            CbhSource::Stereo => "stereo",
            CbhSource::Prior => "prior",
        }
    }
}

/// A cloud base height with its one-sigma uncertainty and its (dominant) source.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CbhEstimate {
    /// Cloud base height above ground \[m\].
    pub cbh_m: f64,
    /// One-sigma uncertainty \[m\] (`cbh_m` times the sigma of `ln h`).
    pub sigma_m: f64,
    /// The source with the largest weight in the combination.
    pub source: CbhSource,
}

impl CbhEstimate {
    /// Relative one-sigma uncertainty (sigma of `ln h`).
    pub fn rel_sigma(&self) -> f64 {
        if self.cbh_m > 0.0 { self.sigma_m / self.cbh_m } else { f64::NAN }
    }
}

/// Default prior uncertainty of a configured cloud base height, as the sigma of `ln h` (about 30 %;
/// common practice, no source): a value typed into a site file is a climatological guess.
pub const CONFIGURED_REL_SIGMA: f64 = 0.3;
/// The prior of a site that configures no base (neither `base_height_m` nor `base_height_csv`, with
/// at least [`MIN_SHADOW_SENSORS`] pyranometers to estimate it) \[m\]: a low-to-mid cumulus base
/// (common practice, no source), only where the estimation starts from.
pub const UNCONFIGURED_PRIOR_M: f64 = 1500.0;
/// Its uncertainty, as the sigma of `ln h` (about 50 %, own choice: bases from 500 to 4000 m are
/// within two sigmas of it). Shadow timing's fits are combined with it from the first.
pub const UNCONFIGURED_REL_SIGMA: f64 = 0.5;
/// Uncertainty of a ceilometer's cloud base, as the sigma of `ln h` (5 %; common practice, no
/// source: a ceilometer measures the base directly but the base varies over the plant).
pub const CEILOMETER_REL_SIGMA: f64 = 0.05;
/// Growth of an estimate's uncertainty with its age, as the sigma of `ln h` per second (0.1 per
/// 10 minutes: cumulus bases drift by some tens of metres in minutes; own choice, no source).
pub const AGE_REL_SIGMA_PER_S: f64 = 0.1 / 600.0;
/// With `[clouds] shadow_timing` unset, shadow timing checks the configured base instead of
/// always pulling on it: a fit disagrees with the configured base when `|ln(fit / configured)|`
/// exceeds [`CHECK_SIGMAS`] × √(σ_fit² + [`CHECK_FLOOR_REL`]²). The floor stands for the fits'
/// error beyond their stated spread: with the true base configured, the project's scenes gave
/// fits up to ~10 % off (the demo's three close pyranometers: median error 9.4 %, README), and a
/// floor of 5 % let them reject the true base on four of six scenes (own choice from those runs).
pub const CHECK_FLOOR_REL: f64 = 0.10;
/// How many of those sigmas a fit must lie off the configured base to disagree with it (own
/// choice: two, a 5 % false alarm for a Gaussian).
pub const CHECK_SIGMAS: f64 = 2.0;
/// Consecutive disagreeing fits, on the same side, after which the configured base is taken as
/// wrong and the fits are combined with it (own choice: stray fits must not move the base).
pub const CHECK_MIN_DISAGREEING: usize = 3;

/// `[clouds]`: a fixed cloud base height or a series.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CloudSection {
    /// Fixed cloud base height above the site origin \[m\] (the camera's height, `camera.position_m[2]`,
    /// is taken off for the map).
    #[serde(default)]
    pub base_height_m: Option<f64>,
    /// A CSV series `time_utc,cbh_m` (e.g. from a ceilometer), relative to the site file.
    #[serde(default)]
    pub base_height_csv: Option<std::path::PathBuf>,
    /// Prior uncertainty of `base_height_m` as a share of it (the sigma of `ln h`); default
    /// [`CONFIGURED_REL_SIGMA`].
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub base_height_rel_sigma: Option<f64>,
    /// Estimate the cloud base height from shadow timing at the `[[pyranometers]]`
    /// ([`ShadowTiming`]) and combine it with the configured value or series. Unset (the
    /// default): on whenever the measurements hold at least [`MIN_SHADOW_SENSORS`] pyranometer
    /// columns, since a typed-in base is a guess (without it a base 1.6 × or 0.5 × the truth
    /// costs most of the forecast's skill: DEVELOPERS.md, "Shadow timing is on by default");
    /// `true` asks for it (a site with fewer pyranometers is refused); `false` turns it off.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shadow_timing: Option<bool>,
    /// Known cloud layers (e.g. from a sounding or a weather model), each a base height and the
    /// direction it moves toward: a tracked layer moving within [`LAYER_PRIOR_MAX_ANGLE_DEG`] of a
    /// known layer's direction takes that base as its prior (with `base_height_rel_sigma`), in
    /// place of `base_height_m`. The direction tells layers apart because the camera measures it
    /// right at any assumed height (only the speed scales with the height).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub layers: Vec<LayerPrior>,
    /// Move the cloud map's plane to the estimated base once the estimate (stereo or shadow
    /// timing) is trustworthy (default true; see `nowcast::plane`). Without a ceilometer series
    /// only: with one the plane stays on the series. Written only when false.
    #[serde(default = "yes", skip_serializing_if = "is_yes")]
    pub map_follows_estimate: bool,
}

fn yes() -> bool {
    true
}

fn is_yes(v: &bool) -> bool {
    *v
}

impl CloudSection {
    /// Whether the site configures no base at all (neither a value nor a series): the base is then
    /// estimated by shadow timing from [`UNCONFIGURED_PRIOR_M`] (the site file's validation asks
    /// for the pyranometers that needs).
    pub fn base_unconfigured(&self) -> bool {
        self.base_height_m.is_none() && self.base_height_csv.is_none()
    }
}

impl Default for CloudSection {
    fn default() -> Self {
        CloudSection { base_height_m: None, base_height_csv: None, base_height_rel_sigma: None, shadow_timing: None, layers: vec![], map_follows_estimate: true }
    }
}

/// A known cloud layer (`[[clouds.layers]]`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LayerPrior {
    /// Base height above the site \[m\].
    pub base_height_m: f64,
    /// Direction the layer moves toward \[° from north, clockwise\].
    pub toward_deg: f64,
}

/// A tracked layer takes a known layer's base when their directions differ by at most this \[°\]
/// (own choice).
pub const LAYER_PRIOR_MAX_ANGLE_DEG: f64 = 45.0;

/// A stereo estimate belongs to a tracked layer when their motions on the map differ by at most
/// this share of the layer's speed, and at least [`STEREO_MATCH_MIN_MPS`] (own choice: the
/// filtered motion of one layer moves much less between stereo runs).
pub const STEREO_MATCH_SHARE: f64 = 0.35;
/// See [`STEREO_MATCH_SHARE`] \[m/s\].
pub const STEREO_MATCH_MIN_MPS: f64 = 2.0;

/// One stereo estimate kept by [`CbhState`]: its time, height above the site origin \[m\], sigma
/// of `ln h` and the motion on the map of the layer it was made for (none when no motion was known).
#[derive(Debug, Clone, Copy, PartialEq)]
struct StereoEntry {
    time: DateTime<Utc>,
    cbh_m: f64,
    rel_sigma: f64,
    v_map_mps: Option<[f64; 2]>,
}

fn dist(a: [f64; 2], b: [f64; 2]) -> f64 {
    (a[0] - b[0]).hypot(a[1] - b[1])
}

/// Prior uncertainty of a second cloud layer's base, as the sigma of `ln h`, when only the first
/// layer's base is configured (own choice: a factor of 0.6–1.65 at one sigma; the camera alone
/// cannot tell its height). The ensemble spreads that layer's base by it.
pub const UPPER_LAYER_PRIOR_REL_SIGMA: f64 = 0.5;

/// Fewest pyranometers for shadow timing (`[clouds] shadow_timing`).
pub const MIN_SHADOW_SENSORS: usize = 3;

/// One input to [`combine`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CbhInput {
    /// Height \[m\].
    pub cbh_m: f64,
    /// Sigma of `ln h` when fresh.
    pub rel_sigma: f64,
    /// Age of the estimate \[s\] (inflates its variance by [`AGE_REL_SIGMA_PER_S`]).
    pub age_s: f64,
    /// Source.
    pub source: CbhSource,
}

/// Inverse-variance combination in `ln h`; each input's variance is inflated by its age
/// (`σ² + (age · AGE_REL_SIGMA_PER_S)²`). Inputs that are not finite and positive are ignored;
/// `None` without any.
pub fn combine(inputs: &[CbhInput]) -> Option<CbhEstimate> {
    let (mut sw, mut swx, mut best) = (0.0, 0.0, None::<(f64, CbhSource)>);
    for i in inputs {
        if !(i.cbh_m.is_finite() && i.cbh_m > 0.0 && i.rel_sigma.is_finite() && i.rel_sigma > 0.0) {
            continue;
        }
        let var = i.rel_sigma.powi(2) + (i.age_s.max(0.0) * AGE_REL_SIGMA_PER_S).powi(2);
        let w = 1.0 / var;
        sw += w;
        swx += w * i.cbh_m.ln();
        if best.is_none_or(|(bw, _)| w > bw) {
            best = Some((w, i.source));
        }
    }
    let (_, source) = best?;
    let cbh_m = (swx / sw).exp();
    Some(CbhEstimate { cbh_m, sigma_m: cbh_m / sw.sqrt(), source })
}

/// Whether a shadow-timing fit of `fit_m` with stated relative sigma `fit_rel` disagrees with the
/// configured base `prior_m` ([`CHECK_SIGMAS`], [`CHECK_FLOOR_REL`]): +1 above it, −1 below, 0
/// when it agrees.
pub fn disagreement(fit_m: f64, fit_rel: f64, prior_m: f64) -> i64 {
    let d = (fit_m / prior_m).ln();
    let limit = CHECK_SIGMAS * (fit_rel * fit_rel + CHECK_FLOOR_REL * CHECK_FLOOR_REL).sqrt();
    if !d.is_finite() || d.abs() <= limit { 0 } else { d.signum() as i64 }
}

/// The engine's cloud base height state: the shadow-timing estimator (when `[clouds]
/// shadow_timing` is on) and its newest fit, combined each frame with the configured value or the
/// ceilometer series ([`CbhState::update`]).
#[derive(Debug, Clone)]
pub struct CbhState {
    /// `[clouds] shadow_timing`: `None` checks the configured base (the fits join the combination
    /// only once [`CHECK_MIN_DISAGREEING`] in a row disagree with it), `Some(true)` always combines
    /// the fits, `Some(false)` runs no shadow timing. It runs once the measurements hold enough
    /// pyranometer columns.
    shadow_mode: Option<bool>,
    /// The site names no base: nothing to judge the fits against, and the prior is reported as
    /// [`CbhSource::Prior`].
    unconfigured: bool,
    /// Consecutive shadow-timing fits that disagreed with the configured base, signed by the side
    /// (positive: above it).
    disagreeing: i64,
    /// Whether the fits have shown the configured base wrong (then they are combined from there
    /// on: dropping them again at one agreeing fit would throw the base back to the wrong value).
    prior_rejected: bool,
    /// Fits that disagreed with the configured base but did not show that the readings follow the
    /// map's shadows ([`ShadowFit::follows_map`]): held back from judging it.
    held_back: usize,
    /// Fits that disagreed with the configured base before any fit could be judged.
    unjudged_disagreeing: usize,
    /// Times of the first and the newest of them.
    unjudged_span: Option<(DateTime<Utc>, DateTime<Utc>)>,
    /// Fits the time-shift check gave a verdict on.
    judged: usize,
    /// The estimator, made on the first frame with enough pyranometer columns (in live mode the
    /// measurements may arrive after start).
    shadow: Option<ShadowTiming>,
    last_fit: Option<(DateTime<Utc>, ShadowFit)>,
    /// Why the newest frame gave no shadow-timing fit, if it gave none.
    pub last_no_fit: Option<NoFit>,
    /// The newest stereo estimates, one per layer (told apart by their motion on the map), the
    /// newest last.
    stereo: Vec<StereoEntry>,
    prior_rel_sigma: f64,
    /// `[[clouds.layers]]`.
    layer_priors: Vec<LayerPrior>,
    /// Estimates made since the start: stereo fits taken and shadow-timing fits.
    estimates_made: usize,
}

/// A pyranometer's column in the measurements and its position (east, north) \[m\].
pub type SensorColumn = (usize, [f64; 2]);

/// The frame's inputs to [`CbhState::update`].
pub struct CbhFrame<'a> {
    /// Frame time.
    pub time: DateTime<Utc>,
    /// The frame's cloud map.
    pub map: &'a crate::cloudmap::CloudMap,
    /// Transmittance settings.
    pub params: &'a crate::forecast::IrradianceParams,
    /// Height of the map's plane \[m\] (the configured value or ceilometer series, or where the
    /// plane followed the estimate to).
    pub map_cbh_m: f64,
    /// The configured value or the ceilometer series \[m\]: the prior.
    pub prior_cbh_m: f64,
    /// Whether `map_cbh_m` comes from a ceilometer series.
    pub from_series: bool,
    /// Motion of the first layer on the map \[m/s\], if known.
    pub v_map_mps: Option<[f64; 2]>,
    /// Motion of a second layer on the map \[m/s\], when one is tracked.
    pub v_other_mps: Option<[f64; 2]>,
    /// Camera position (east, north, up) \[m\].
    pub camera_m: [f64; 3],
    /// Measurements and the pyranometer columns with their positions.
    pub measurements: Option<(&'a crate::io::Measurements, &'a [SensorColumn])>,
    /// The site (solar position, clear sky).
    pub observer: crate::sun::Observer,
    /// Site height \[m\].
    pub altitude_m: f64,
    /// Clear-sky model.
    pub model: crate::clearsky::ClearSkyModel,
    /// The frame's whole-map tables shared with the other stages ([`crate::forecast::SharedTables`]);
    /// `None`, or tables that do not fit `map` and `params`: the shadow timing builds its own.
    pub tables: Option<&'a crate::forecast::SharedTables<'a>>,
}

impl CbhState {
    /// The state for a site file's `[clouds]`.
    pub fn new(clouds: &CloudSection) -> CbhState {
        CbhState {
            // Nothing configured to check: the fits are combined from the first.
            shadow_mode: if clouds.base_unconfigured() { Some(true) } else { clouds.shadow_timing },
            unconfigured: clouds.base_unconfigured(),
            disagreeing: 0,
            prior_rejected: false,
            held_back: 0,
            unjudged_disagreeing: 0,
            unjudged_span: None,
            judged: 0,
            shadow: None,
            last_fit: None,
            last_no_fit: None,
            stereo: vec![],
            prior_rel_sigma: clouds.base_height_rel_sigma.unwrap_or(if clouds.base_unconfigured() { UNCONFIGURED_REL_SIGMA } else { CONFIGURED_REL_SIGMA }),
            layer_priors: clouds.layers.clone(),
            estimates_made: 0,
        }
    }

    /// Estimates made since the start (stereo fits taken, shadow-timing fits): the cloud map's
    /// plane follows the estimate only after a few.
    pub fn estimates_made(&self) -> usize {
        self.estimates_made
    }

    /// The cloud map's plane moved by `ratio` (new height over old): the motions on the map kept
    /// with the stereo estimates scale by it, so that they still match their layers.
    pub fn rescale_map_motion(&mut self, ratio: f64) {
        for e in &mut self.stereo {
            if let Some(v) = &mut e.v_map_mps {
                *v = [v[0] * ratio, v[1] * ratio];
            }
        }
    }

    /// The newest shadow-timing fit and its time.
    pub fn last_fit(&self) -> Option<&(DateTime<Utc>, ShadowFit)> {
        self.last_fit.as_ref()
    }

    /// Take a stereo estimate made from frames taken at `time` ([`crate::stereo::estimate`]); from
    /// then on [`CbhState::update`] combines it (aged) with the other sources as `stereo`. A
    /// refusal leaves the previous estimate in place (it keeps ageing).
    pub fn observe_stereo(&mut self, time: DateTime<Utc>, fit: &crate::stereo::StereoFit) {
        self.observe_stereo_layer(None, time, fit);
    }

    /// Take a stereo estimate made at `time` for the layer moving at `v_map_mps` on the map
    /// ([`crate::stereo::estimate_layers`], or the whole sky's with the first layer's motion; `None`
    /// when no motion is known). It replaces the estimate kept for that layer unless that one,
    /// aged to `time` ([`AGE_REL_SIGMA_PER_S`]), is still the more certain (a poorly matched run
    /// does not undo a good one a minute old); each tracked layer later takes the newest estimate
    /// whose motion matches its own ([`STEREO_MATCH_SHARE`]), so the forecast's layers may change
    /// order between runs.
    pub fn observe_stereo_layer(&mut self, v_map_mps: Option<[f64; 2]>, time: DateTime<Utc>, fit: &crate::stereo::StereoFit) {
        self.estimates_made += 1;
        let same = |e: &StereoEntry| match (e.v_map_mps, v_map_mps) {
            (Some(a), Some(b)) => dist(a, b) <= Self::gate(b),
            (a, b) => a.is_some() == b.is_some(),
        };
        let aged_var = |e: &StereoEntry| e.rel_sigma.powi(2) + ((time - e.time).num_milliseconds() as f64 / 1000.0 * AGE_REL_SIGMA_PER_S).powi(2);
        if self.stereo.iter().any(|e| same(e) && aged_var(e) < fit.rel_sigma.powi(2)) {
            return;
        }
        self.stereo.retain(|e| !same(e));
        self.stereo.push(StereoEntry { time, cbh_m: fit.cbh_m, rel_sigma: fit.rel_sigma, v_map_mps });
        if self.stereo.len() > 4 {
            self.stereo.remove(0);
        }
    }

    fn gate(v: [f64; 2]) -> f64 {
        (STEREO_MATCH_SHARE * v[0].hypot(v[1])).max(STEREO_MATCH_MIN_MPS)
    }

    /// The newest stereo estimate of the layer moving at `v` on the map, when another layer moves
    /// at `other`: one whose motion is within the gate of `v` and nearer `v` than `other`; else,
    /// with one layer, one made before any motion was known. Without `v`, the newest.
    fn stereo_for(&self, v: Option<[f64; 2]>, other: Option<[f64; 2]>) -> Option<StereoEntry> {
        let Some(v) = v else { return self.stereo.last().copied() };
        let matching = self.stereo.iter().rev().find(|e| e.v_map_mps.is_some_and(|w| dist(w, v) <= Self::gate(v) && other.is_none_or(|o| dist(w, v) < dist(w, o))));
        matching.or_else(|| if other.is_none() { self.stereo.iter().rev().find(|e| e.v_map_mps.is_none()) } else { None }).copied()
    }

    /// The prior of the layer moving at `v` on the map: the known layer (`[[clouds.layers]]`)
    /// nearest its direction within [`LAYER_PRIOR_MAX_ANGLE_DEG`] with the configured prior
    /// uncertainty, else `fallback`.
    fn prior_for(&self, v: Option<[f64; 2]>, fallback: (f64, f64)) -> (f64, f64) {
        let Some(v) = v.filter(|v| v[0].hypot(v[1]) > 0.0) else { return fallback };
        let toward = v[0].atan2(v[1]).to_degrees();
        let off = |l: &LayerPrior| (l.toward_deg - toward).rem_euclid(360.0).min((toward - l.toward_deg).rem_euclid(360.0));
        self.layer_priors
            .iter()
            .filter(|l| off(l) <= LAYER_PRIOR_MAX_ANGLE_DEG)
            .min_by(|a, b| off(a).total_cmp(&off(b)))
            .map_or(fallback, |l| (l.base_height_m, self.prior_rel_sigma))
    }

    /// The second cloud layer's base at `time`, that layer moving at `v_map_mps` on the map and the
    /// first at `first_v_map_mps`: its prior (a known layer in its direction, else the first
    /// layer's configured base `prior_cbh_m` with [`UPPER_LAYER_PRIOR_REL_SIGMA`]) combined with its
    /// stereo estimate, aged. Without either, exactly the prior.
    pub fn upper(&self, time: DateTime<Utc>, prior_cbh_m: f64, v_map_mps: [f64; 2], first_v_map_mps: [f64; 2]) -> CbhEstimate {
        let (h, rel) = self.prior_for(Some(v_map_mps), (prior_cbh_m, UPPER_LAYER_PRIOR_REL_SIGMA));
        let prior = CbhEstimate { cbh_m: h, sigma_m: h * rel, source: CbhSource::Configured };
        let Some(e) = self.stereo_for(Some(v_map_mps), Some(first_v_map_mps)) else { return prior };
        let inputs = [
            CbhInput { cbh_m: h, rel_sigma: rel, age_s: 0.0, source: CbhSource::Configured },
            CbhInput { cbh_m: e.cbh_m, rel_sigma: e.rel_sigma, age_s: (time - e.time).num_milliseconds() as f64 / 1000.0, source: CbhSource::Stereo },
        ];
        combine(&inputs).unwrap_or(prior)
    }

    /// Whether shadow-timing fits have rejected the configured base or the ceilometer's series
    /// ([`CHECK_MIN_DISAGREEING`] disagreeing fits in a row on the same side).
    pub fn prior_rejected(&self) -> bool {
        self.prior_rejected
    }

    /// Shadow-timing fits that disagreed with the configured base (or the ceilometer's series) but
    /// were held back from judging it, their readings not following the map's shadows better
    /// than the same readings shifted in time ([`ShadowFit::follows_map`]): the readings'
    /// clock, time zone or label is the first suspect.
    pub fn fits_held_back(&self) -> usize {
        self.held_back
    }

    /// Shadow-timing fits that disagreed with the configured base while no fit of the run could be
    /// judged at all (the time-shift check needs [`CbhState::shadow_check_window_s`] of frames
    /// with readings, enough for [`crate::cbh::shadow::ShadowParams::null_min_shifts`] shifts: a
    /// run or a stretch of readings shorter than that, or readings with gaps): the configured
    /// base was kept without a check. 0 once any fit has been judged.
    pub fn fits_unjudged_disagreeing(&self) -> usize {
        if self.judged == 0 { self.unjudged_disagreeing } else { 0 }
    }

    /// How long a stretch of frames with readings the time-shift check of the shadow-timing fits
    /// needs \[s\] ([`crate::cbh::shadow::ShadowParams::null_window_s`], scaled to the readings'
    /// period: 600 s for 1-minute readings, 1200 s for 2-minute, 3000 s for 5-minute); `None`
    /// before shadow timing runs.
    pub fn shadow_check_window_s(&self) -> Option<f64> {
        self.shadow.as_ref().map(|s| s.params.null_window_s.max(s.params.window_s))
    }

    /// For a running engine (live mode): the number of fits that disagreed with the configured base
    /// while none could be judged ([`CbhState::fits_unjudged_disagreeing`]), once they are at least
    /// [`CHECK_MIN_DISAGREEING`] and span at least [`CbhState::shadow_check_window_s`] (the
    /// default 600 s before shadow timing runs; so the
    /// check has had the window it needs and still gave no verdict; before that, coarse readings
    /// are simply not checked yet).
    pub fn base_left_unchecked(&self) -> Option<usize> {
        let n = self.fits_unjudged_disagreeing();
        let (first, last) = self.unjudged_span?;
        let window_s = self.shadow_check_window_s().unwrap_or_else(|| ShadowParams::default().null_window_s);
        (n >= CHECK_MIN_DISAGREEING && (last - first).num_milliseconds() as f64 / 1000.0 >= window_s).then_some(n)
    }

    /// A shadow-timing fit made at `time`, the configured base (or the known layer's) being
    /// `prior_m`: kept as the newest, and judged against that base (with `shadow_timing` unset the
    /// fits join the combination once [`CHECK_MIN_DISAGREEING`] in a row disagree with it on the
    /// same side, and from then on). `None`, or a fit whose readings do not follow the map's
    /// shadows ([`ShadowFit::follows_map`]): the fit cannot judge the base (it breaks a run of
    /// disagreeing fits; one that disagrees is counted in [`CbhState::fits_held_back`]).
    fn take_fit(&mut self, time: DateTime<Utc>, fit: ShadowFit, prior_m: Option<f64>) {
        self.estimates_made += 1;
        let side = prior_m.map_or(0, |p| disagreement(fit.cbh_m, fit.rel_sigma, p));
        self.judged += fit.null.judged as usize;
        if side != 0 && !fit.null.judged {
            self.unjudged_disagreeing += 1;
            self.unjudged_span = Some((self.unjudged_span.map_or(time, |s| s.0), time));
            // Not judged yet (the window's readings span too few shifts): neither counted nor
            // breaking the run, so that a window holding one reading fewer now and then (1-minute
            // readings, 20-s frames: 11 or 12 in a window) does not stop every run.
        } else if side != 0 && !fit.follows_map() {
            self.held_back += 1;
            self.disagreeing = 0;
        } else {
            self.disagreeing = if side != 0 && side == self.disagreeing.signum() { self.disagreeing + side } else { side };
        }
        self.prior_rejected |= self.disagreeing.unsigned_abs() as usize >= CHECK_MIN_DISAGREEING;
        self.last_fit = Some((time, fit));
        self.last_no_fit = None;
    }

    /// Feed a frame to the shadow timing (if on) and combine the estimates at the frame's time.
    pub fn update(&mut self, f: &CbhFrame) -> CbhEstimate {
        if let Some((_, cols)) = f.measurements
            && self.shadow_mode != Some(false)
            && self.shadow.is_none()
            && cols.len() >= MIN_SHADOW_SENSORS
        {
            self.shadow = Some(ShadowTiming::new(ShadowParams::default(), cols.len()));
        }
        // The shadow timing's windows and the null test's shifts follow the readings' period
        // (unchanged for 1-minute and finer readings; a live feed's period may settle as rows come).
        if let (Some(st), Some((m, _))) = (&mut self.shadow, f.measurements) {
            st.params = ShadowParams::default().for_period(m.period_s);
        }
        let (prior_m, prior_rel) = if f.from_series { (f.prior_cbh_m, CEILOMETER_REL_SIGMA) } else { self.prior_for(f.v_map_mps, (f.prior_cbh_m, self.prior_rel_sigma)) };
        if let (Some(st), Some((m, cols)), Some(v)) = (&mut self.shadow, f.measurements, f.v_map_mps) {
            let idx: Vec<usize> = cols.iter().map(|c| c.0).collect();
            let pos: Vec<[f64; 2]> = cols.iter().map(|c| c.1).collect();
            let rs = readings(m, &idx, &f.time, st.params.sample_window_s, &f.observer, f.altitude_m, f.model);
            let own;
            let tm = match f.tables.and_then(|s| s.get(f.map, f.params)) {
                Some(t) => t,
                None => {
                    own = TransmittanceMap::new(f.map, f.params);
                    &own
                }
            };
            st.observe(f.time, tm, f.params.beams(), f.map.grid, f.map_cbh_m, f.camera_m, v, f.params.blur_min_m, &pos, &rs);
            match st.estimate() {
                Ok(fit) => {
                    // One height cannot judge a configured base while two layers are tracked (the
                    // fit mixes their shadows), nor while stereo measures each layer's own.
                    // Nor is an unconfigured prior a base to judge.
                    let judge = f.v_other_mps.is_none() && self.stereo.is_empty() && !self.unconfigured;
                    self.take_fit(f.time, fit, judge.then_some(prior_m));
                }
                Err(e) => self.last_no_fit = Some(e),
            }
        }
        let prior_source = if f.from_series {
            CbhSource::Ceilometer
        } else if self.unconfigured {
            CbhSource::Prior
        } else {
            CbhSource::Configured
        };
        let mut inputs = vec![CbhInput { cbh_m: prior_m, rel_sigma: prior_rel, age_s: 0.0, source: prior_source }];
        let fits_count = match self.shadow_mode {
            None => self.prior_rejected,
            Some(on) => on,
        };
        // Without a configured base, a fit whose readings were shown not to follow the map's
        // shadows (a logger's clock off) is left out, as it could not have judged a base.
        let usable = |fit: &ShadowFit| !(self.unconfigured && fit.null.judged && !fit.follows_map());
        if let Some((t, fit)) = self.last_fit.as_ref().filter(|(_, fit)| fits_count && usable(fit)) {
            inputs.push(CbhInput { cbh_m: fit.cbh_m, rel_sigma: fit.rel_sigma, age_s: (f.time - *t).num_milliseconds() as f64 / 1000.0, source: CbhSource::ShadowTiming });
        }
        if let Some(e) = self.stereo_for(f.v_map_mps, f.v_other_mps) {
            inputs.push(CbhInput { cbh_m: e.cbh_m, rel_sigma: e.rel_sigma, age_s: (f.time - e.time).num_milliseconds() as f64 / 1000.0, source: CbhSource::Stereo });
        }
        combine(&inputs).unwrap_or(CbhEstimate { cbh_m: prior_m, sigma_m: prior_m * prior_rel, source: prior_source })
    }
}

#[cfg(test)]
mod tests;
