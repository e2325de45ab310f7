//! Shadow casting and the irradiance forecast for every plant point and horizon.
//!
//! # Method
//! Frozen advection of the current cloud map: for a plant point `p` and a target time `t + k`, the
//! sun at `t + k` gives the point where the ray from `p` to the sun crosses the cloud plane,
//! `q = p + H tan z (sin A, cos A)` (H the cloud base height above ground); the cloud that will be
//! there at `t + k` is the cloud now at `q − v k` (v the cloud motion). The map's class there gives the
//! beam transmittance (clear / thin / thick, defaults below, tuned from measurements when given),
//! averaged over a box that grows with the motion's uncertainty and a cloud-evolution rate times the
//! horizon, so that long horizons forecast a probability-weighted beam rather than a sharp shadow. Then
//!
//! * `DNI = DNI_clear(t + k) · T`,
//! * `DHI = DHI_clear(t + k) + c · d · GHI_clear(t + k)` with `c` the current cloud fraction and `d`
//!   the diffuse gain per unit cover (clouds scatter beam light into the diffuse),
//! * `GHI = DNI cos z + DHI`,
//! * plane-of-array irradiance by the Hay & Davies (1980) transposition for fixed-tilt blocks and
//!   horizontal single-axis trackers (true tracking without backtracking, limited rotation;
//!   Marion & Dobos 2013), ground reflection with an albedo.
//!
//! Where the look-up leaves the observed map (or lands on unknown cells) the point falls back to
//! a blend of persistence of its current state (the cloud at `q` now) and the map's mean
//! transmittance, and is flagged.
//!
//! # References
//! * J. E. Hay, J. A. Davies, "Calculation of the solar radiation incident on an inclined surface",
//!   *Proc. First Canadian Solar Radiation Data Workshop*, 59–72, 1980 (as in pvlib's `haydavies`).
//! * W. F. Marion, A. P. Dobos, *Rotation angle for the optimum tracking of one-axis trackers*,
//!   NREL/TP-6A20-58891, 2013.


use chrono::{DateTime, Duration, Utc};

use crate::clearsky::{ClearSkyModel, Irradiance, clear_sky};
use crate::plant::Plant;
use crate::sun::{Observer, position};
pub use crate::shadow::sun_ray_plane_point;
pub use crate::transposition::{aoi_rad, block_plane, poa_hay_davies, tracker_orientation};

mod blend;
mod ensemble;
#[cfg(target_arch = "x86_64")]
mod lanes;
mod lookup;
mod params;
mod tables;
pub use blend::PersistenceBlend;
pub use ensemble::{Band, BandWidening, ensemble_with, quantile_sorted};
pub use params::IrradianceParams;
pub use tables::{SharedTables, TransmittanceMap};
use lookup::{HorizonLookUp, ScaledPoint, scaled_points};

/// The sun and the clear sky at one forecast horizon (shared by the central forecast and every
/// ensemble member).
#[derive(Debug, Clone, Copy)]
pub struct HorizonSky {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Target time.
    pub time: DateTime<Utc>,
    /// Sun position.
    pub sun: crate::sun::SunPosition,
    /// Clear-sky irradiance.
    pub clear: Irradiance,
}

/// The sun and clear sky at every horizon of a forecast (horizons whose sun cannot be computed are
/// left out).
pub fn horizon_skies(input: &ForecastInput) -> Vec<HorizonSky> {
    input
        .horizons_s
        .iter()
        .filter_map(|&h| {
            let t = input.issue + Duration::seconds(h as i64);
            let sun = position(&t, &input.observer).ok()?;
            let clear = clear_sky(&sun, input.altitude_m, input.clear_model);
            Some(HorizonSky { horizon_s: h, time: t, sun, clear })
        })
        .collect()
}

/// Everything a forecast needs besides the map.
#[derive(Debug, Clone)]
pub struct ForecastInput<'a> {
    /// Issue time.
    pub issue: DateTime<Utc>,
    /// The site.
    pub observer: Observer,
    /// Clear-sky model.
    pub clear_model: ClearSkyModel,
    /// Site height \[m\].
    pub altitude_m: f64,
    /// Camera position (east, north, up) \[m\].
    pub camera_m: [f64; 3],
    /// Cloud base height above ground \[m\] (the map's).
    pub cbh_m: f64,
    /// Motion of each cloud layer, aligned with the transmittance tables given to
    /// [`forecast_with`] (one layer: the whole map).
    pub layers: Vec<Advection>,
    /// Current cloud fraction.
    pub cloud_fraction: f64,
    /// Share of the sky (same zenith limit) that is thin cloud.
    pub thin_fraction: f64,
    /// Horizons \[s\].
    pub horizons_s: Vec<u32>,
    /// The plant.
    pub plant: &'a Plant,
    /// Irradiance settings.
    pub params: IrradianceParams,
    /// Power model settings.
    pub power: crate::power::PowerParams,
    /// Air temperature \[°C\].
    pub temp_air_c: f64,
    /// Wind speed \[m/s\].
    pub wind_mps: f64,
    /// Scale of the beam (DNI) of this run (1 for the central forecast; ensemble members vary it).
    pub beam_scale: f64,
    /// Scale of the cloud-scattered diffuse (1 for the central forecast).
    pub diffuse_scale: f64,
    /// Points forecast besides the plant, e.g. the pyranometers (east, north) \[m\]: their mean GHI
    /// per horizon goes to [`Forecast::probes_ghi_wm2`], to verify the forecast where it is measured.
    pub probes_m: Vec<[f64; 2]>,
    /// Use every n-th point of each block (1 for the central forecast; ensemble members thin the
    /// points, their block means change little).
    pub point_stride: usize,
}

/// How one cloud layer moves.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Advection {
    /// Velocity (east, north) on the cloud plane \[m/s\].
    pub v_mps: [f64; 2],
    /// Its one-sigma uncertainty per component \[m/s\].
    pub sigma_mps: f64,
    /// The layer's true base height over the map's (1 for the central forecast; ensemble members
    /// vary it). The map places clouds where the camera sees them at the map's base height: at a
    /// base `f` times higher, everything on the map lies `f` times farther from the camera, so a
    /// plant point looks up the map at its offset from the camera divided by `f`, plus its sun-ray
    /// offset at the map's height (motion is measured on the map, so it needs no change).
    pub cbh_factor: f64,
    /// Uncertainty of the layer's base as the sigma of `ln h`: the ensemble spreads a second
    /// layer's `cbh_factor` by it (the first layer's spread is
    /// [`IrradianceParams::ensemble_cbh_rel_sigma`], widened by the engine to its estimate's).
    pub cbh_log_sigma: f64,
}

/// Forecast for one target (block or plant) and horizon.
#[derive(Debug, Clone, PartialEq)]
pub struct TargetForecast {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Target time.
    pub time: DateTime<Utc>,
    /// Mean GHI, DNI, DHI.
    pub irradiance: Irradiance,
    /// Mean plane-of-array irradiance \[W m⁻²\].
    pub poa_wm2: f64,
    /// Clear-sky GHI at the target time \[W m⁻²\].
    pub ghi_clear_wm2: f64,
    /// AC power \[kW\] (blocks: from their mean plane-of-array irradiance; plant: the sum).
    pub power_kw: f64,
    /// Share of points that fell back to persistence.
    pub fallback_share: f64,
    /// P10, P50, P90 from the ensemble (widened, and combined with persistence when that is on);
    /// none without an ensemble.
    pub band: Option<Band>,
}

/// One block's forecast, one row per horizon in order.
#[derive(Debug, Clone, PartialEq)]
pub struct BlockForecast {
    /// The block's name.
    pub name: String,
    /// One row per horizon.
    pub rows: Vec<TargetForecast>,
}

/// A whole forecast: the plant and each block, every horizon.
#[derive(Debug, Clone, Default)]
pub struct Forecast {
    /// The whole plant, one row per horizon in order (irradiance the mean over the blocks' points,
    /// power the blocks' sum).
    pub plant: Vec<TargetForecast>,
    /// Each block, in the plant's block order.
    pub blocks: Vec<BlockForecast>,
    /// Per horizon (in order), the mean GHI at the probe points ([`ForecastInput::probes_m`])
    /// \[W m⁻²\]; empty without probes.
    pub probes_ghi_wm2: Vec<f64>,
}

impl Forecast {
    /// Every row with its target's name (a block's, or [`crate::plant::PLANT_TARGET`]) in the
    /// output order: horizon-major, each horizon's blocks in order, then the plant, the order of
    /// `forecasts.csv` and of the bands [`ensemble_with`] gives.
    pub fn rows(&self) -> impl Iterator<Item = (&str, &TargetForecast)> {
        (0..self.plant.len()).flat_map(move |k| {
            let blocks = self.blocks.iter().filter_map(move |b| b.rows.get(k).map(|r| (b.name.as_str(), r)));
            blocks.chain(std::iter::once((crate::plant::PLANT_TARGET, &self.plant[k])))
        })
    }

    /// Every row, mutable, in the order of [`Forecast::rows`].
    pub fn rows_mut(&mut self) -> Vec<&mut TargetForecast> {
        let horizons = self.plant.len();
        let mut series: Vec<std::slice::IterMut<'_, TargetForecast>> =
            self.blocks.iter_mut().map(|b| b.rows.iter_mut()).chain(std::iter::once(self.plant.iter_mut())).collect();
        let mut out = Vec::with_capacity(horizons * series.len());
        for _ in 0..horizons {
            out.extend(series.iter_mut().filter_map(Iterator::next));
        }
        out
    }

    /// Number of rows (blocks and plant, every horizon).
    pub fn row_count(&self) -> usize {
        self.plant.len() + self.blocks.iter().map(|b| b.rows.len()).sum::<usize>()
    }

    /// Put bands (in the order of [`Forecast::rows`]) into the rows.
    pub fn set_bands(&mut self, bands: Vec<Band>) {
        for (r, b) in self.rows_mut().into_iter().zip(bands) {
            r.band = Some(b);
        }
    }

    /// Whether the rows carry bands.
    pub fn has_bands(&self) -> bool {
        self.plant.iter().any(|r| r.band.is_some())
    }

    /// A block's forecast by name.
    pub fn block(&self, name: &str) -> Option<&BlockForecast> {
        self.blocks.iter().find(|b| b.name == name)
    }

    /// The whole plant's AC power per horizon \[kW\].
    pub fn plant_power_kw(&self) -> Vec<f64> {
        self.plant.iter().map(|r| r.power_kw).collect()
    }
}

/// Forecast irradiance for all plant points and horizons from the current map's transmittance
/// tables (one per frame and layer, shared with the ensemble) and the horizons' sun and clear sky
/// ([`horizon_skies`], also shared).
///
/// Per point only the beam transmittance is looked up: the diffuse is the same for every point at a
/// horizon, and GHI and the Hay–Davies plane-of-array terms are linear in DNI and DHI, so a block's
/// means follow from its mean transmittance exactly. With two layers (`tms[k]` moving by
/// `input.layers[k]`), a sun ray crosses both: its transmittance is the product of the layers'
/// transmittances relative to clear sky, times the clear-sky one.
///
/// One piece on purpose: the forecast's hot loop, in parallel over points with per-horizon
/// accumulators shared by the look-up, the block sums and the plant sum; split, the accumulators
/// would be passed around per point.
pub fn forecast_with(tms: &[TransmittanceMap], grid: crate::cloudmap::Grid, input: &ForecastInput, skies: &[HorizonSky]) -> Forecast {
    forecast_with_planes(tms, grid, input, skies, &block_planes(input.plant, skies))
}

/// Each block's plane against the sun at each horizon ([`block_planes`]): the cosine of the
/// angle of incidence and of the plane's tilt.
pub type PlaneSun = [f64; 2];

/// [`PlaneSun`] of every horizon (outer) and block (inner), the same for the central forecast and
/// every ensemble member (computed once for them all).
pub fn block_planes(plant: &Plant, skies: &[HorizonSky]) -> Vec<PlaneSun> {
    let mut out = Vec::with_capacity(skies.len() * plant.blocks.len());
    for hs in skies {
        let (z, a) = (hs.sun.apparent_zenith_rad, hs.sun.azimuth_rad);
        for b in &plant.blocks {
            let (tilt, saz) = block_plane(&b.mount, z, a);
            out.push([aoi_rad(tilt, saz, z, a).cos(), tilt.cos()]);
        }
    }
    out
}

/// [`forecast_with`] with the blocks' planes against the sun given ([`block_planes`] of the same
/// plant and skies).
///
/// One piece on purpose, as [`forecast_with`] says.
pub fn forecast_with_planes(tms: &[TransmittanceMap], grid: crate::cloudmap::Grid, input: &ForecastInput, skies: &[HorizonSky], planes: &[PlaneSun]) -> Forecast {
    let n_blocks = input.plant.blocks.len();
    debug_assert_eq!(planes.len(), skies.len() * n_blocks);
    let mut out = Forecast {
        plant: Vec::with_capacity(skies.len()),
        blocks: input.plant.blocks.iter().map(|b| BlockForecast { name: b.name.clone(), rows: Vec::with_capacity(skies.len()) }).collect(),
        probes_ghi_wm2: vec![],
    };
    let p = &input.params;
    let n_layers = tms.len().min(input.layers.len()).min(MAX_LAYERS);
    let mut beams = p.beams();
    // The brightness coefficient is learnt with one layer in view of the look-up; across two
    // layers (a bright veil over darker cumulus) the frame's brightness mixes them, so classes
    // alone set each layer's transmittance (the feature has zero mean over the frame's cloud, so
    // the classes' means stay right). On the synthetic two-layer scene keeping it cost 0.1 of skill.
    if n_layers > 1 {
        beams[3] = 0.0;
    }
    let mut means = [p.beam_clear; MAX_LAYERS];
    for (m, tm) in means.iter_mut().zip(tms) {
        let v = tm.mean_with(beams);
        if !v.is_nan() {
            *m = v;
        }
    }
    // Each further layer's transmittance is taken relative to clear sky.
    let rel = if n_layers > 1 && p.beam_clear > 0.0 { p.beam_clear.powi(1 - n_layers as i32) } else { 1.0 };
    let wp = p.fallback_persistence_weight;
    let stride = input.point_stride.max(1);
    // Each layer's points on the map's plane: at a base `f` times the map's, a point looks up the
    // map at its offset divided by `f` (the same for every horizon).
    let mut inv_f = [1.0; MAX_LAYERS];
    for (l, ad) in input.layers.iter().take(n_layers).enumerate() {
        inv_f[l] = 1.0 / ad.cbh_factor.max(0.1);
    }
    let block_points: Vec<Vec<ScaledPoint>> = input.plant.blocks.iter().map(|b| scaled_points(&b.points_m, stride, &inv_f)).collect();
    let probe_points = scaled_points(&input.probes_m, 1, &inv_f);
    for (i, hs) in skies.iter().enumerate() {
        let planes = &planes[i * n_blocks..(i + 1) * n_blocks];
        let (h, t, sun, clear) = (hs.horizon_s, hs.time, &hs.sun, hs.clear);
        let (z, a) = (sun.apparent_zenith_rad, sun.azimuth_rad);
        let cz = z.cos();
        let up = cz > 0.0 && clear.ghi_wm2 > 0.0;
        let k = h as f64;
        let dhi = clear.dhi_wm2 + input.diffuse_scale * p.diffuse_cover(input.cloud_fraction, input.thin_fraction) * p.diffuse_per_cover * clear.ghi_wm2;
        let mut plant_acc = [0f64; 6];
        let mut plant_power = 0.0;
        // Shift from a plant point to the cloud-map point its sun ray comes from (relative to the
        // camera, advected back by each layer's motion), and each layer's look-up radius: the same
        // for every point at this horizon.
        let cam = input.camera_m;
        let mut look = HorizonLookUp { tms, grid, n_layers, beams, off: [[0.0; 2]; MAX_LAYERS], adv: [[0.0; 2]; MAX_LAYERS], r_cells: [0.0; MAX_LAYERS], means, rel, wp, beam_scale: input.beam_scale };
        for (l, ad) in input.layers.iter().take(n_layers).enumerate() {
            let off = sun_ray_plane_point([0.0, 0.0], input.cbh_m, [cam[0] * inv_f[l], cam[1] * inv_f[l], cam[2]], z, a);
            look.off[l] = off;
            look.adv[l] = [off[0] - ad.v_mps[0] * k, off[1] - ad.v_mps[1] * k];
            // The box's settings are on the ground (at the layer's base): on the map they scale by
            // 1 / cbh_factor, like the points; the motion uncertainty is the map's own.
            let blur_m = ((p.blur_min_m * inv_f[l]).powi(2) + (ad.sigma_mps * k).powi(2) + (p.blur_growth_mps * inv_f[l] * k).powi(2)).sqrt();
            look.r_cells[l] = blur_m / grid.cell_m;
        }
        if !input.probes_m.is_empty() {
            let ghi = if up {
                let tr = probe_points.iter().map(|q| look.point_tr(q).0).sum::<f64>() / input.probes_m.len() as f64;
                clear.dni_wm2 * tr * cz + dhi
            } else {
                0.0
            };
            out.probes_ghi_wm2.push(ghi);
        }
        let dni_extra = sun.dni_extra_wm2();
        for (((b, series), points), &[cos_aoi, cos_tilt]) in input.plant.blocks.iter().zip(out.blocks.iter_mut()).zip(&block_points).zip(planes) {
            // Hay & Davies terms that depend only on the plane and the sun (see `poa_hay_davies`).
            let rb = cos_aoi.max(0.0) / cz.max(0.01745);
            let iso = 0.5 * (1.0 + cos_tilt);
            let ground = p.albedo * 0.5 * (1.0 - cos_tilt);
            // Sum of the points' beam transmittance (as used: scaled and capped), fallbacks, points.
            let count = points.len();
            let (tr_sum, fb_sum) = if up { look.sum(points) } else { (0.0, 0) };
            let nf = count.max(1) as f64;
            let acc = if up {
                let dni = clear.dni_wm2 * tr_sum / nf;
                let ghi = dni * cz + dhi;
                let ai = dni / dni_extra;
                // Each point's terms are non-negative, so the mean of the sums is the sum of the means.
                let poa = (dni * cos_aoi).max(0.0) + (dhi * (1.0 - ai) * iso).max(0.0) + (dhi * ai * rb).max(0.0) + ghi * ground;
                [ghi * nf, dni * nf, dhi * nf, poa * nf, fb_sum as f64, nf]
            } else {
                [0.0, 0.0, 0.0, 0.0, 0.0, nf]
            };
            for (s, v) in plant_acc.iter_mut().zip(acc) {
                *s += v;
            }
            let mut r = row(h, t, &acc, clear.ghi_wm2);
            r.power_kw = crate::power::block_ac_kw(r.poa_wm2, b.capacity_kw, b.ac_capacity_kw, input.temp_air_c, input.wind_mps, &input.power);
            plant_power += r.power_kw;
            series.rows.push(r);
        }
        let mut pr = row(h, t, &plant_acc, clear.ghi_wm2);
        pr.power_kw = plant_power;
        out.plant.push(pr);
    }
    out
}

/// Most cloud layers a forecast advects separately.
pub const MAX_LAYERS: usize = 2;

fn row(h: u32, t: DateTime<Utc>, acc: &[f64; 6], ghi_clear: f64) -> TargetForecast {
    let n = acc[5].max(1.0);
    TargetForecast {
        horizon_s: h,
        time: t,
        irradiance: Irradiance { ghi_wm2: acc[0] / n, dni_wm2: acc[1] / n, dhi_wm2: acc[2] / n },
        poa_wm2: acc[3] / n,
        ghi_clear_wm2: ghi_clear,
        power_kw: 0.0,
        fallback_share: acc[4] / n,
        band: None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::cloudmap::{CloudMap, Grid, MapParams};
    use crate::segment::Class;

    /// A veil (layer 1, thin everywhere) behind a thick patch of layer 0: the veil's table counts
    /// the hidden cells as clear by default, and with `fill_layer_behind` fills them from the
    /// veil around them (so the veil has no hole when the patch moves away). Layer 0's table is
    /// the same either way.
    #[test]
    fn layer_behind_is_filled_where_the_first_layer_hides_it() {
        let g = Grid::new(&MapParams { cells: 32, ..Default::default() }, 1000.0);
        let n = g.n;
        let mut class = vec![Class::Thin as u8; n * n];
        let mut labels = vec![1u8; n * n];
        for j in 14..=18 {
            for i in 14..=18 {
                class[j * n + i] = Class::Thick as u8;
                labels[j * n + i] = 0;
            }
        }
        let map = CloudMap { grid: g, score: vec![0.0; n * n], class, in_view: vec![true; n * n], offset: 0.0, brightness: vec![], thin_depth: vec![] };
        let (off, on) = (IrradianceParams::default(), IrradianceParams { fill_layer_behind: true, ..Default::default() });
        let veil = |p: &IrradianceParams| TransmittanceMap::for_layer(&map, p, Some((&labels, 1))).box_shares(16.0, 16.0, 0.0).unwrap();
        let (a, b) = (veil(&off), veil(&on));
        assert!((a[0] - 1.0).abs() < 1e-3 && a[1].abs() < 1e-3, "hidden cell clear without the fill: {a:?}");
        assert!(b[0].abs() < 1e-3 && (b[1] - 1.0).abs() < 1e-3, "hidden cell thin veil with the fill: {b:?}");
        let front = |p: &IrradianceParams| TransmittanceMap::for_layer(&map, p, Some((&labels, 0))).box_shares(16.0, 16.0, 2.0).unwrap();
        assert_eq!(front(&off), front(&on));
    }

    /// Two layers: a thick patch in layer 0 and a thin one in layer 1, each moving its own way.
    /// A point under neither now is shaded at the horizon when the layer whose motion carries a
    /// patch over it says so, and under both when both do (product of transmittances).
    #[test]
    fn each_layer_moves_with_its_own_motion() {
        use crate::plant::{Block, Mount, Plant};
        let g = Grid::new(&MapParams { cells: 64, ..Default::default() }, 1000.0);
        let n = g.n;
        let mut class = vec![Class::Clear as u8; n * n];
        let mut labels = vec![0u8; n * n];
        // Cell centre (east, north) of cell (i, j) is ((i + ½ − n/2)·cell, (j + ½ − n/2)·cell).
        let patch = |class: &mut Vec<u8>, labels: &mut Vec<u8>, ci: usize, cj: usize, c: Class, l: u8| {
            for j in cj - 2..=cj + 2 {
                for i in ci - 2..=ci + 2 {
                    class[j * n + i] = c as u8;
                    labels[j * n + i] = l;
                }
            }
        };
        patch(&mut class, &mut labels, 40, 32, Class::Thick, 0);
        patch(&mut class, &mut labels, 32, 40, Class::Thin, 1);
        let map = CloudMap { grid: g, score: vec![0.0; n * n], class, in_view: vec![true; n * n], offset: 0.0, brightness: vec![], thin_depth: vec![] };
        let p = IrradianceParams { blur_min_m: 1.0, blur_growth_mps: 0.0, ..Default::default() };
        let tms = [TransmittanceMap::for_layer(&map, &p, Some((&labels, 0))), TransmittanceMap::for_layer(&map, &p, Some((&labels, 1)))];
        // The point sits under the sun ray through cell (32, 32) at every horizon: camera and point
        // at the origin, sun overhead enough that the offset is small — use the offset itself.
        let plant = Plant {
            blocks: vec![Block {
                name: "b".into(),
                capacity_kw: 100.0,
                ac_capacity_kw: None,
                mount: Mount::Fixed { tilt_rad: 0.0, azimuth_rad: std::f64::consts::PI },
                polygon_m: vec![],
                points_m: vec![[0.0, 0.0]],
            }],
        };
        let cell = g.cell_m;
        let mut input = test_input(&plant, p);
        let skies = horizon_skies(&input);
        let off = sun_ray_plane_point([0.0, 0.0], 1000.0, [0.0; 3], skies[1].sun.apparent_zenith_rad, skies[1].sun.azimuth_rad);
        // Velocities that bring each patch centre to the point's sun-ray cell in 100 s.
        let to_point = |ci: f64, cj: f64| {
            let c = [(ci + 0.5 - n as f64 / 2.0) * cell, (cj + 0.5 - n as f64 / 2.0) * cell];
            [(off[0] - c[0]) / 100.0, (off[1] - c[1]) / 100.0]
        };
        let away = [0.0, -30.0];
        let dni_ratio = |input: &ForecastInput| {
            let f = forecast_with(&tms, g, input, &skies);
            let r = f.block("b").unwrap().rows.iter().find(|r| r.horizon_s == 100).unwrap();
            r.irradiance.dni_wm2 / skies[1].clear.dni_wm2
        };
        let adv = |v: [f64; 2]| Advection { v_mps: v, sigma_mps: 0.0, cbh_factor: 1.0, cbh_log_sigma: 0.5 };
        input.layers = vec![adv(to_point(40.0, 32.0)), adv(away)];
        assert!((dni_ratio(&input) - p.beam_thick).abs() < 1e-9, "thick layer over the point: {}", dni_ratio(&input));
        input.layers = vec![adv(away), adv(to_point(32.0, 40.0))];
        assert!((dni_ratio(&input) - p.beam_thin).abs() < 1e-9, "thin layer over the point: {}", dni_ratio(&input));
        input.layers = vec![adv(to_point(40.0, 32.0)), adv(to_point(32.0, 40.0))];
        let both = p.beam_thick * p.beam_thin / p.beam_clear;
        assert!((dni_ratio(&input) - both).abs() < 1e-9, "both: {} vs {both}", dni_ratio(&input));
        input.layers = vec![adv(away), adv(away)];
        assert!((dni_ratio(&input) - p.beam_clear).abs() < 1e-9, "neither: {}", dni_ratio(&input));
    }

    /// A forecast input at noon on the equator, camera at the origin, map base 1000 m, horizons 0
    /// and 100 s.
    fn test_input(plant: &crate::plant::Plant, p: IrradianceParams) -> ForecastInput<'_> {
        ForecastInput {
            issue: "2026-06-21T12:00:00Z".parse().unwrap(),
            observer: Observer::new(0.0, 0.0, 0.0),
            clear_model: ClearSkyModel::IneichenPerez { linke_turbidity: 3.0 },
            altitude_m: 0.0,
            camera_m: [0.0; 3],
            cbh_m: 1000.0,
            layers: vec![],
            cloud_fraction: 0.0,
            thin_fraction: 0.0,
            horizons_s: vec![0, 100],
            plant,
            params: p,
            power: Default::default(),
            temp_air_c: 20.0,
            wind_mps: 1.0,
            beam_scale: 1.0,
            diffuse_scale: 1.0,
            point_stride: 1,
            probes_m: vec![],
        }
    }

    /// A base `f` times higher than the map's puts every mapped cloud `f` times farther from the
    /// camera: a point 1.2 km east of the camera is shaded by the cloud mapped 0.6 km east (plus
    /// the sun-ray offset) when f = 2, by the one mapped 1.2 km east when f = 1; a point at the
    /// camera sees the same cloud whatever the height (the camera looks along its sun ray). The
    /// probes report the mean GHI at their points.
    #[test]
    fn a_higher_base_pulls_the_look_up_toward_the_camera() {
        use crate::plant::{Block, Mount, Plant};
        let g = Grid::new(&MapParams { cells: 128, ..Default::default() }, 1000.0);
        let n = g.n;
        let p = IrradianceParams { blur_min_m: 1.0, blur_growth_mps: 0.0, ..Default::default() };
        let block = |name: &str, pt: [f64; 2]| Block {
            name: name.into(),
            capacity_kw: 100.0,
            ac_capacity_kw: None,
            mount: Mount::Fixed { tilt_rad: 0.0, azimuth_rad: std::f64::consts::PI },
            polygon_m: vec![],
            points_m: vec![pt],
        };
        let plant = Plant { blocks: vec![block("far", [1200.0, 0.0]), block("camera", [0.0, 0.0])] };
        let mut input = test_input(&plant, p);
        let skies = horizon_skies(&input);
        let off = sun_ray_plane_point([0.0, 0.0], 1000.0, [0.0; 3], skies[0].sun.apparent_zenith_rad, skies[0].sun.azimuth_rad);
        // Thick cloud where the far point looks when f = 2, and where the camera looks.
        let mut class = vec![Class::Clear as u8; n * n];
        for q in [[600.0 + off[0], off[1]], off] {
            let (ci, cj) = g.to_cell(q);
            for j in cj.round() as usize - 2..=cj.round() as usize + 2 {
                for i in ci.round() as usize - 2..=ci.round() as usize + 2 {
                    class[j * n + i] = Class::Thick as u8;
                }
            }
        }
        let map = CloudMap { grid: g, score: vec![0.0; n * n], class, in_view: vec![true; n * n], offset: 0.0, brightness: vec![], thin_depth: vec![] };
        let tms = [TransmittanceMap::new(&map, &p)];
        input.probes_m = vec![[1200.0, 0.0], [0.0, 0.0]];
        let ratio = |input: &ForecastInput, name: &str| {
            let f = forecast_with(&tms, g, input, &skies);
            let r = f.block(name).unwrap().rows.iter().find(|r| r.horizon_s == 0).unwrap();
            (r.irradiance.dni_wm2 / skies[0].clear.dni_wm2, r.irradiance.ghi_wm2, f.probes_ghi_wm2[0])
        };
        for (f, far_shaded) in [(1.0, false), (2.0, true)] {
            input.layers = vec![Advection { v_mps: [0.0, 0.0], sigma_mps: 0.0, cbh_factor: f, cbh_log_sigma: 0.3 }];
            let (far, far_ghi, probes) = ratio(&input, "far");
            let (cam, cam_ghi, _) = ratio(&input, "camera");
            let want = if far_shaded { p.beam_thick } else { p.beam_clear };
            assert!((far - want).abs() < 1e-9, "f = {f}: far point transmittance {far}, expected {want}");
            assert!((cam - p.beam_thick).abs() < 1e-9, "f = {f}: camera point transmittance {cam}");
            assert!((probes - 0.5 * (far_ghi + cam_ghi)).abs() < 1e-9, "probe mean {probes} vs {far_ghi}, {cam_ghi}");
        }
    }

    #[test]
    fn diffuse_cover_weighs_thin_cloud() {
        let p = IrradianceParams { diffuse_thin_weight: 3.0, ..Default::default() };
        // 0.6 cover of which 0.2 thin: 0.4 + 3 × 0.2 = 1.0; thin beyond the cover is cut to it.
        assert!((p.diffuse_cover(0.6, 0.2) - 1.0).abs() < 1e-12);
        assert!((p.diffuse_cover(0.3, 0.5) - 0.9).abs() < 1e-12);
    }

    #[test]
    fn tracker_faces_the_sun_when_unconstrained() {
        // Sun due east at 60° zenith, north-south axis: the tracker tilts 60° toward the east.
        let (tilt, az) = tracker_orientation(0.0, 80f64.to_radians(), 60f64.to_radians(), 90f64.to_radians());
        assert!((tilt.to_degrees() - 60.0).abs() < 1e-9 && (az.to_degrees() - 90.0).abs() < 1e-9);
        assert!(aoi_rad(tilt, az, 60f64.to_radians(), 90f64.to_radians()).abs() < 1e-7);
    }

    #[test]
    fn sun_ray_meets_the_plane_toward_the_sun() {
        // Sun at 45° zenith due south: the ray from the origin meets a 1000 m plane 1000 m south.
        let q = sun_ray_plane_point([0.0, 0.0], 1000.0, [0.0; 3], 45f64.to_radians(), 180f64.to_radians());
        assert!(q[0].abs() < 1e-9 && (q[1] + 1000.0).abs() < 1e-9);
    }
}
