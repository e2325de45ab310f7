//! The imperfections of a real sky camera, as options of a scene (all off by default, so a scene
//! without them renders exactly as before).
//!
//! | option | what it does | default |
//! |---|---|---|
//! | [`Nuisances::field_deg`] | largest field angle the lens images: under 90° the horizon is cut off, beyond 90° ground shows inside the image circle | `None` (90°) |
//! | [`Nuisances::ground`] | textured, static brown ground below the horizon (instead of one flat colour) | `false` |
//! | [`Nuisances::horizon`] | a static skyline (tree lines and building silhouettes, zenith 80–90°) | `None` |
//! | [`Nuisances::bloom`] | a halo around the sun that leans toward the horizon and a vertical smear column, both growing as the sun gets lower | `None` |
//! | [`Nuisances::vignetting`] | radial brightness fall-off `cos^n(θ/2)` from a centre off the principal point | `None` |
//! | [`Nuisances::exposure_drift`] | a slow global gain change over the sequence | `None` |
//! | [`Nuisances::haze`] | whitening of the sky and clouds toward the horizon | `0` |
//! | [`Nuisances::dirt`] | static, soft-edged dark spots on the dome | `None` |
//!
//! A lens that fits no ideal model exactly is a camera model, not a nuisance: see the
//! `"equisolid-like"` model of [`super::CameraSpec`].
//!
//! Order of the effects on a pixel: scene radiance (sky, haze, clouds, sun, mast, skyline, ground) →
//! dirt on the dome → vignetting → exposure gain → sensor bloom and smear → sensor noise → clipping
//! to 0–255. Truth masks mark the ground, the skyline and dirt whose opacity reaches
//! [`Dirt::unknown_from`] as unknown (0).
//!
//! The skyline and the dirt come from [`Nuisances::layout_seed`], not from the scene's seed: scenes
//! filmed by the same camera share them (as a real camera keeps its dirt and its horizon from one
//! day to the next), and everything stays deterministic.

use serde::{Deserialize, Serialize};

use super::noise::{Fbm, gradient_noise, hash64, unit};
use crate::camera::Camera;

/// Imperfections of a real camera (see the module docs). Every option is off by default.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Nuisances {
    /// Largest field angle the lens images \[°\] (`None`: 90°). Allowed 80–110°.
    pub field_deg: Option<f64>,
    /// Textured, static ground (browns, fBm) below the horizon; `false`: one flat dark colour.
    pub ground: bool,
    /// A static skyline near the horizon.
    pub horizon: Option<Horizon>,
    /// Sun bloom and smear.
    pub bloom: Option<Bloom>,
    /// Vignetting.
    pub vignetting: Option<Vignetting>,
    /// Slow exposure drift.
    pub exposure_drift: Option<ExposureDrift>,
    /// Haze: share of whitening reached at the horizon, growing as `(z / 90°)³` (0: none; 0.3 is
    /// a hazy summer day). Added on top of the clear-sky model's own whitening.
    pub haze: f64,
    /// Dirt on the dome.
    pub dirt: Option<Dirt>,
    /// Seed of the skyline and the dirt (static camera features).
    pub layout_seed: u64,
}

/// A skyline: tree lines and buildings standing on the horizon.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Horizon {
    /// Number of tree lines (each 30–80° of azimuth wide, 1.5–5° high with a ragged top).
    pub tree_lines: usize,
    /// Number of buildings (each 2–9° wide, 2–9° high, flat or stepped roofs).
    pub buildings: usize,
}

/// Bloom of the sun: a halo that saturates and leans toward the horizon, and a vertical smear
/// column through the sun along the sensor's columns. Both grow with `L = (z_sun / 90°)²` (a low sun
/// has the most glare) and are dimmed by cloud in front of the sun.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Bloom {
    /// Peak of the halo \[display levels\] at `L = 0.5` (scaled by `0.5 + L`), before clipping at 255.
    pub halo_level: f64,
    /// E-folding radius of the halo across and toward the image centre \[px at 512²\], times `1 + 0.5 L`.
    pub halo_radius_px: f64,
    /// How much farther the halo reaches outward (toward the horizon) for a sun on the horizon:
    /// outward radius = radius · (1 + lean · L).
    pub lean: f64,
    /// Peak of the smear column at the sun's row \[levels\] at `L = 0.5` (scaled by `0.4 + L`).
    pub smear_level: f64,
    /// Gaussian half width (σ) of the smear column \[px at 512²\].
    pub smear_width_px: f64,
}

/// Vignetting: gain `cos^n(θ/2)`, θ the field angle that the pixel's distance from the fall-off
/// centre would have on an equidistant scale with the 90° rim at the lens's 90° radius; `n` gives
/// `rim_gain` at 90°.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Vignetting {
    /// Gain at the 90° field angle relative to the centre (0.3–1).
    pub rim_gain: f64,
    /// Offset of the fall-off's centre from the principal point \[px at 512²\] (asymmetry).
    pub centre_offset_px: [f64; 2],
}

/// Exposure drift: global gain `1 + amplitude · sin(2π t / period + φ)`, φ from the scene seed.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ExposureDrift {
    /// Amplitude (0.04 = ±4 %).
    pub amplitude: f64,
    /// Period \[min\].
    pub period_min: f64,
}

/// Dirt on the dome: soft-edged (out of focus) dark brownish spots, opacity profile
/// `opacity · exp(−r² / 2σ²)` with σ half the spot radius.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Dirt {
    /// Number of spots.
    pub spots: usize,
    /// Range of spot radii \[px at 512²\].
    pub radius_px: [f64; 2],
    /// Range of peak opacities (0–1).
    pub opacity: [f64; 2],
    /// Pixels whose dirt opacity reaches this are unknown in the truth masks.
    pub unknown_from: f64,
}

impl Nuisances {
    /// Whether every option is off (then the scene renders as without them).
    pub fn is_off(&self) -> bool {
        *self == Nuisances::default()
    }

    /// What is out of range, if anything.
    pub fn check(&self) -> Result<(), String> {
        if let Some(f) = self.field_deg
            && !(80.0..=110.0).contains(&f)
        {
            return Err("nuisances.field_deg must be 80–110".into());
        }
        if !(0.0..=0.9).contains(&self.haze) {
            return Err("nuisances.haze must be 0–0.9".into());
        }
        if let Some(v) = &self.vignetting
            && !(0.3..=1.0).contains(&v.rim_gain)
        {
            return Err("nuisances.vignetting.rim_gain must be 0.3–1".into());
        }
        if let Some(e) = &self.exposure_drift
            && !((0.0..=0.5).contains(&e.amplitude) && e.period_min > 0.0)
        {
            return Err("nuisances.exposure_drift: amplitude 0–0.5 and period_min > 0".into());
        }
        if let Some(d) = &self.dirt
            && !(d.spots <= 50 && d.radius_px[0] > 0.0 && d.radius_px[1] >= d.radius_px[0] && (0.0..=1.0).contains(&d.opacity[0]) && (d.opacity[0]..=1.0).contains(&d.opacity[1]))
        {
            return Err("nuisances.dirt: at most 50 spots, radii 0 < lo ≤ hi, opacities 0 ≤ lo ≤ hi ≤ 1".into());
        }
        if let Some(b) = &self.bloom
            && !(b.halo_radius_px > 0.0 && b.smear_width_px > 0.0 && b.lean >= 0.0 && b.halo_level >= 0.0 && b.smear_level >= 0.0)
        {
            return Err("nuisances.bloom: radii and width > 0, levels and lean ≥ 0".into());
        }
        Ok(())
    }

    /// Prepare the static per-pixel parts for a camera (ground, skyline, dirt, vignetting).
    /// `scene_seed` only sets the exposure drift's phase.
    pub fn prepare(&self, cam: &Camera, scene_seed: u64) -> NuisanceMap {
        let (w, h) = (cam.width_px as usize, cam.height_px as usize);
        let scale = w as f64 / 512.0;
        let skyline = self.horizon.as_ref().map(|hz| Skyline::new(hz, self.layout_seed));
        let ground = self.ground.then(|| Fbm { seed: hash64(self.layout_seed ^ 0x6A0D), wavelength_m: 9.0, octaves: 4, gain: 0.55 });
        // Dirt spots in pixel coordinates, inside 85 % of the image circle.
        let circle = cam.image_circle_radius_px();
        let spots: Vec<(f64, f64, f64, f64)> = self
            .dirt
            .as_ref()
            .map(|d| {
                (0..d.spots as u64)
                    .map(|i| {
                        let u = |k: u64| unit(hash64(self.layout_seed ^ hash64(0xD127 + 8 * i + k)));
                        let (r, a) = (0.85 * circle * u(0).sqrt(), std::f64::consts::TAU * u(1));
                        let rad = (d.radius_px[0] + (d.radius_px[1] - d.radius_px[0]) * u(2)) * scale;
                        let op = d.opacity[0] + (d.opacity[1] - d.opacity[0]) * u(3);
                        (cam.cx_px + r * a.cos(), cam.cy_px + r * a.sin(), 0.5 * rad, op)
                    })
                    .collect()
            })
            .unwrap_or_default();
        let r90 = cam.f_px * cam.projection.radial(std::f64::consts::FRAC_PI_2);
        let vig = self.vignetting.as_ref().map(|v| {
            let n = v.rim_gain.ln() / std::f64::consts::FRAC_PI_4.cos().ln();
            (cam.cx_px + v.centre_offset_px[0] * scale, cam.cy_px + v.centre_offset_px[1] * scale, n)
        });
        let mut optics = vec![[1.0f32; 3]; w * h];
        let mut dirt_alpha = vec![0.0f32; w * h];
        let mut fixed: Vec<Option<[f32; 3]>> = vec![None; w * h];
        for y in 0..h {
            for x in 0..w {
                let i = y * w + x;
                let (xf, yf) = (x as f64, y as f64);
                let Some(d) = cam.unproject_enu(xf, yf) else { continue };
                let (z, az) = crate::sun::zenith_azimuth_of(d);
                if d[2] <= 0.0
                    && let Some(g) = &ground
                {
                    // Texture in (azimuth, depression) degrees: near ground is coarse, far is fine.
                    let dep = (-d[2]).asin().to_degrees().max(0.05);
                    let v = g.at(az.to_degrees() * 0.9, 12.0 * dep.ln());
                    let k = (0.78 + 0.9 * v).clamp(0.45, 1.25) * (0.85 + 0.15 * (dep / 10.0).min(1.0));
                    fixed[i] = Some([(96.0 * k) as f32, (78.0 * k) as f32, (55.0 * k) as f32]);
                }
                // The skyline stands in front of the ground (its foot a little below the horizon).
                if let Some(s) = &skyline
                    && z < 90.5f64.to_radians()
                    && let Some(c) = s.colour(z, az)
                {
                    fixed[i] = Some(c);
                }
                let mut a = 0.0;
                for &(sx, sy, sigma, op) in &spots {
                    let r2 = (xf - sx).powi(2) + (yf - sy).powi(2);
                    a = 1.0 - (1.0 - a) * (1.0 - op * (-r2 / (2.0 * sigma * sigma)).exp());
                }
                dirt_alpha[i] = a as f32;
                let mut g = [1.0 - a * (1.0 - 0.35), 1.0 - a * (1.0 - 0.30), 1.0 - a * (1.0 - 0.24)];
                if let Some((vx, vy, n)) = vig {
                    let theta = ((xf - vx).hypot(yf - vy) / r90) * std::f64::consts::FRAC_PI_2;
                    let gain = (theta / 2.0).cos().max(0.0).powf(n);
                    for c in g.iter_mut() {
                        *c *= gain;
                    }
                }
                optics[i] = [g[0] as f32, g[1] as f32, g[2] as f32];
            }
        }
        let phase = std::f64::consts::TAU * unit(hash64(scene_seed ^ 0xE7A0));
        NuisanceMap { optics, dirt_alpha, fixed, phase, scale }
    }

    /// Global exposure gain at `t_s` seconds from the scene start.
    pub fn gain_at(&self, map: &NuisanceMap, t_s: f64) -> f64 {
        match &self.exposure_drift {
            Some(e) => 1.0 + e.amplitude * (std::f64::consts::TAU * t_s / (60.0 * e.period_min) + map.phase).sin(),
            None => 1.0,
        }
    }

    /// Haze whitening weight at zenith `z` \[rad\].
    #[inline]
    pub fn haze_weight(&self, z: f64) -> f64 {
        self.haze * (z / std::f64::consts::FRAC_PI_2).clamp(0.0, 1.0).powi(3)
    }
}

/// The static per-pixel parts of the nuisances for one camera ([`Nuisances::prepare`]).
#[derive(Debug, Clone)]
pub struct NuisanceMap {
    /// Per-pixel, per-channel gain of dirt and vignetting.
    pub optics: Vec<[f32; 3]>,
    /// Per-pixel dirt opacity.
    pub dirt_alpha: Vec<f32>,
    /// Per-pixel static colour (ground or skyline) where they hide the sky.
    pub fixed: Vec<Option<[f32; 3]>>,
    /// Phase of the exposure drift \[rad\].
    pub phase: f64,
    /// Image size over 512.
    pub scale: f64,
}

/// A tree line or building on the horizon.
#[derive(Debug, Clone)]
enum Object {
    Trees { az0: f64, az1: f64, height_deg: f64, seed: u64 },
    Building { az0: f64, az1: f64, height_deg: f64, step: Option<(f64, f64)>, shade: f32 },
}

/// The skyline: top elevation by azimuth.
#[derive(Debug, Clone)]
struct Skyline {
    objects: Vec<Object>,
}

fn az_in(az: f64, az0: f64, az1: f64) -> Option<f64> {
    // Position inside [az0, az1] (degrees, may wrap through north) as 0–1.
    let width = (az1 - az0).rem_euclid(360.0);
    let off = (az - az0).rem_euclid(360.0);
    (off <= width).then(|| off / width)
}

impl Skyline {
    fn new(h: &Horizon, seed: u64) -> Skyline {
        let u = |k: u64| unit(hash64(seed ^ hash64(0x5C1 + k)));
        let mut objects = vec![];
        for i in 0..h.tree_lines as u64 {
            let az0 = 360.0 * u(10 * i);
            let wdt = 30.0 + 50.0 * u(10 * i + 1);
            objects.push(Object::Trees { az0, az1: az0 + wdt, height_deg: 1.5 + 3.5 * u(10 * i + 2), seed: hash64(seed ^ (i + 91)) });
        }
        for i in 0..h.buildings as u64 {
            let k = 1000 + 10 * i;
            let az0 = 360.0 * u(k);
            let wdt = 2.0 + 7.0 * u(k + 1);
            let height = 2.0 + 7.0 * u(k + 2);
            let step = (u(k + 3) < 0.5).then(|| (0.3 + 0.4 * u(k + 4), height * (0.5 + 0.3 * u(k + 5))));
            objects.push(Object::Building { az0, az1: az0 + wdt, height_deg: height, step, shade: (70.0 + 40.0 * u(k + 6)) as f32 });
        }
        Skyline { objects }
    }

    /// Colour of the object hiding direction (zenith, azimuth) \[rad\], if any (the last listed wins).
    fn colour(&self, z: f64, az: f64) -> Option<[f32; 3]> {
        let elev = 90.0 - z.to_degrees();
        if elev > 10.0 {
            return None;
        }
        let azd = az.to_degrees();
        let mut out = None;
        for o in &self.objects {
            match *o {
                Object::Trees { az0, az1, height_deg, seed } => {
                    let Some(p) = az_in(azd, az0, az1) else { continue };
                    // Rounded ends, ragged crowns.
                    let taper = (p * (1.0 - p) * 4.0).sqrt().min(1.0);
                    let crowns = 0.35 * gradient_noise(seed, azd / 2.5, 0.5) + 0.2 * gradient_noise(seed ^ 7, azd / 0.8, 0.5);
                    let top = height_deg * taper * (1.0 + crowns);
                    if elev < top {
                        let v = 0.8 + 0.5 * gradient_noise(seed ^ 11, azd / 0.6, elev / 0.6);
                        out = Some([(38.0 * v) as f32, (50.0 * v) as f32, (33.0 * v) as f32]);
                    }
                }
                Object::Building { az0, az1, height_deg, step, shade } => {
                    let Some(p) = az_in(azd, az0, az1) else { continue };
                    let top = match step {
                        Some((at, lower)) if p > at => lower,
                        _ => height_deg,
                    };
                    if elev < top {
                        // Windows: a darker grid on the facade.
                        let win = ((p * 12.0).fract() < 0.35 && ((elev / top.max(0.1)) * 6.0).fract() < 0.4) as u8 as f32;
                        let s = shade * (1.0 - 0.3 * win);
                        out = Some([s, s * 0.97, s * 0.93]);
                    }
                }
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_is_off_and_valid() {
        let n = Nuisances::default();
        assert!(n.is_off());
        assert!(n.check().is_ok());
    }

    #[test]
    fn skyline_stays_within_ten_degrees_of_the_horizon() {
        let s = Skyline::new(&Horizon { tree_lines: 3, buildings: 5 }, 42);
        let mut hidden = 0;
        for a in 0..720 {
            let az = (a as f64 * 0.5).to_radians();
            assert!(s.colour(79.9f64.to_radians(), az).is_none());
            hidden += s.colour(89.5f64.to_radians(), az).is_some() as usize;
        }
        assert!(hidden > 20, "{hidden}");
    }
}
