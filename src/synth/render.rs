//! Rendering of fisheye sky frames from the synthetic world, with the per-pixel truth.
//!
//! Per pixel ray (direction from the same [`Camera`] the engine uses):
//! * clear sky: luminance from the CIE standard clear sky (ISO 15469 / CIE S 011, type 12:
//!   a = −1, b = −0.32, c = 10, d = −3, e = 0.45), colour from the R/B profile of real clear sky by
//!   sun angle ([`clear_sky_rb`]), whitening toward the horizon and the sun;
//! * cloud layers, highest first, composited where the ray meets each layer's plane: opacity
//!   `1 − exp(−0.7 τ_slant)`; brightness falling with optical depth (a thick base is grey, a thin edge
//!   white) and rising toward the sun (forward scattering, bright sunlit edges);
//! * the sun disk and glare, dimmed by the cloud in front of the sun, with a blooming streak;
//! * an optional mast, black outside the image circle, sensor noise;
//! * optionally the imperfections of a real camera ([`super::nuisance`]: ground and skyline, haze,
//!   dirt, vignetting, exposure drift, bloom and smear), through [`render_with`].

use rayon::prelude::*;

use super::noise::{gaussian, hash64};
use super::nuisance::{NuisanceMap, Nuisances};
use super::world::{Instant, TAU_CLEAR_MAX, TAU_THIN_MAX, World};
use crate::camera::Camera;

/// Truth class of a pixel, as written in truth masks.
#[repr(u8)]
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TruthClass {
    /// Outside the image circle, below the horizon or obstructed.
    Unknown = 0,
    /// Clear sky.
    Clear = 1,
    /// Thin cloud (slant optical depth below 2).
    Thin = 2,
    /// Thick cloud.
    Thick = 3,
}

/// A mast standing in the camera's view.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Mast {
    /// Azimuth of the mast seen from the camera \[rad\].
    pub azimuth_rad: f64,
    /// The mast reaches up to this zenith angle \[rad\].
    pub top_zenith_rad: f64,
    /// Half width \[rad\] of azimuth at the horizon.
    pub half_width_rad: f64,
}

/// Precomputed per-pixel geometry of a camera.
#[derive(Debug, Clone)]
pub struct PixelRays {
    /// Unit ENU direction per pixel; `None` outside the lens field.
    pub dirs: Vec<Option<[f32; 3]>>,
    /// Width \[px\].
    pub width: usize,
    /// Height \[px\].
    pub height: usize,
}

impl PixelRays {
    /// Compute for a camera.
    pub fn new(cam: &Camera) -> PixelRays {
        let (w, h) = (cam.width_px as usize, cam.height_px as usize);
        let dirs = (0..w * h)
            .into_par_iter()
            .map(|i| cam.unproject_enu((i % w) as f64, (i / w) as f64).map(|d| [d[0] as f32, d[1] as f32, d[2] as f32]))
            .collect();
        PixelRays { dirs, width: w, height: h }
    }
}

/// One rendered frame with its truth.
#[derive(Debug, Clone)]
pub struct Rendered {
    /// The RGB frame.
    pub rgb: image::RgbImage,
    /// Truth class per pixel ([`TruthClass`] as u8).
    pub truth: image::GrayImage,
    /// Share of cloudy (thin or thick) sky pixels with zenith < 70°.
    pub cloud_fraction: f64,
}

fn cie_clear_sky(z: f64, gamma: f64) -> f64 {
    // ISO 15469 type 12 (CIE standard clear sky, low illuminance turbidity).
    let (a, b, c, d, e) = (-1.0, -0.32, 10.0, -3.0, 0.45);
    let phi = 1.0 + a * (b / z.cos().max(0.02)).exp();
    let f = 1.0 + c * ((d * gamma).exp() - (d * std::f64::consts::FRAC_PI_2).exp()) + e * gamma.cos().powi(2);
    phi * f
}

/// Red/blue ratio of the clear sky at zenith `z` and sun angle `gamma` \[rad\]: a piecewise-linear
/// profile in γ through the medians of R/B that hand-labelled clear pixels of the WSISEG images
/// (Xie et al. 2020) show in 15° bands of sun angle, whitening toward the horizon.
pub fn clear_sky_rb(z: f64, gamma: f64) -> f64 {
    const PROFILE: [(f64, f64); 10] =
        [(0.0, 0.86), (7.5, 0.84), (22.5, 0.73), (37.5, 0.66), (52.5, 0.61), (67.5, 0.55), (82.5, 0.49), (97.5, 0.45), (120.0, 0.43), (180.0, 0.42)];
    let g = gamma.to_degrees();
    let mut rb = PROFILE[PROFILE.len() - 1].1;
    for w in PROFILE.windows(2) {
        if g <= w[1].0 {
            let f = (g - w[0].0) / (w[1].0 - w[0].0);
            rb = w[0].1 + f * (w[1].1 - w[0].1);
            break;
        }
    }
    rb + 0.12 * (z / std::f64::consts::FRAC_PI_2).powi(6)
}

/// Render one frame.
///
/// * `cam_pos_m`: camera position (east, north, up) \[m\].
/// * `noise_seed`: seeds the sensor noise (differs per frame).
pub fn render(
    world: &World,
    inst: &Instant,
    cam: &Camera,
    rays: &PixelRays,
    cam_pos_m: [f64; 3],
    mast: Option<Mast>,
    noise_seed: u64,
) -> Rendered {
    render_with(world, inst, cam, rays, cam_pos_m, mast, noise_seed, None)
}

/// [`render`] with a camera's imperfections (`None`: exactly [`render`]). The map must come from
/// [`Nuisances::prepare`] for the same camera.
///
/// One piece on purpose: the per-pixel radiative transfer (sky, sun, cloud, shadowed ground, then
/// each nuisance) runs in one parallel pass over rows with shared per-row state.
#[allow(clippy::too_many_arguments)]
pub fn render_with(
    world: &World,
    inst: &Instant,
    cam: &Camera,
    rays: &PixelRays,
    cam_pos_m: [f64; 3],
    mast: Option<Mast>,
    noise_seed: u64,
    nuisances: Option<(&Nuisances, &NuisanceMap)>,
) -> Rendered {
    let (w, h) = (rays.width, rays.height);
    let sun_d = inst.sun.direction_enu();
    let sun_z = inst.sun.apparent_zenith_rad;
    // Normalise the CIE distribution by its zenith value, then set exposure so the zenith sky
    // reads about 150 in blue.
    let norm = cie_clear_sky(0.0, sun_z);
    // How much the cloud in front of the sun dims the disk and glare.
    let sun_tau = world.tau_along(inst, cam_pos_m, sun_d);
    let sun_vis = (-sun_tau / sun_d[2].max(0.05)).exp();
    let sun_px = cam.project_enu(sun_d);
    let sun_up = sun_d[2] > 0.0;
    let n_layers = world.layers.len();
    // Angular size of a pixel near the image centre.
    let pixel_rad = 1.0 / (cam.f_px * cam.projection.radial_derivative(0.0));
    let extra = nuisances.map(|(n, map)| FrameNuisances::new(n, map, cam, inst, sun_px, sun_vis, h));
    let rows: Vec<(Vec<u8>, Vec<u8>, usize, usize)> = (0..h)
        .into_par_iter()
        .map(|y| {
            let mut rgb = vec![0u8; w * 3];
            let mut tr = vec![0u8; w];
            let mut taus = Vec::with_capacity(n_layers);
            let (mut cloudy, mut sky70) = (0usize, 0usize);
            for x in 0..w {
                let Some(df) = rays.dirs[y * w + x] else { continue };
                let d = [df[0] as f64, df[1] as f64, df[2] as f64];
                let mut col;
                let mut class = TruthClass::Unknown;
                let z = d[2].clamp(-1.0, 1.0).acos();
                let fixed = extra.as_ref().and_then(|e| e.map.fixed[y * w + x]);
                if d[2] <= 0.0 {
                    // Ground and horizon objects.
                    col = match fixed {
                        Some(c) => [c[0] as f64, c[1] as f64, c[2] as f64],
                        None => [62.0, 58.0, 50.0],
                    };
                } else {
                    let cos_g = (d[0] * sun_d[0] + d[1] * sun_d[1] + d[2] * sun_d[2]).clamp(-1.0, 1.0);
                    let gamma = cos_g.acos();
                    let lum = if sun_up { cie_clear_sky(z, gamma) / norm } else { 0.05 };
                    // Display level of the blue channel: the CIE luminance through a soft camera
                    // shoulder; red and green from the clear-sky colour ratios.
                    let level = 258.0 * (1.0 - (-lum / 2.5).exp()).powf(0.8);
                    let rb = clear_sky_rb(z, gamma);
                    col = [level * rb, level * (rb + 0.12).min(1.0), level];
                    // Clouds, highest first.
                    world.taus_along(inst, cam_pos_m, d, pixel_rad, &mut taus);
                    let mut slant_total = 0.0;
                    for li in (0..n_layers).rev() {
                        let tau = taus[li];
                        if tau <= 0.0 {
                            continue;
                        }
                        let slant = tau / d[2].max(0.02);
                        slant_total += slant;
                        let alpha = 1.0 - (-0.7 * slant).exp();
                        let base = 0.42 + 0.58 / (1.0 + 0.09 * tau);
                        let fwd = 1.0 + 0.9 * (-gamma / 0.3).exp();
                        let level = (205.0 * base * fwd).min(255.0);
                        let tint = [0.94, 0.96, 1.0];
                        for c in 0..3 {
                            col[c] = alpha * level * tint[c] + (1.0 - alpha) * col[c];
                        }
                    }
                    if let Some(e) = &extra
                        && e.spec.haze > 0.0
                    {
                        // Haze whitens toward a grey a little brighter than the pixel's brightest channel.
                        let hw = e.spec.haze_weight(z);
                        let white = (1.05 * col[0].max(col[1]).max(col[2])).min(250.0);
                        for c in col.iter_mut() {
                            *c += hw * (white - *c);
                        }
                    }
                    // Sun disk and glare, dimmed by cloud in front of the sun.
                    if sun_up {
                        let g_deg = gamma.to_degrees();
                        let glare = sun_vis * (4000.0 * (-g_deg / 0.6).exp() + 60.0 * (-g_deg / 3.0).exp());
                        for c in col.iter_mut() {
                            *c += glare;
                        }
                        if g_deg < 0.6 && sun_vis > 0.2 {
                            col = [255.0; 3];
                        }
                    }
                    let vertical_total: f64 = taus.iter().sum();
                    class = if vertical_total < TAU_CLEAR_MAX {
                        TruthClass::Clear
                    } else if slant_total < TAU_THIN_MAX {
                        TruthClass::Thin
                    } else {
                        TruthClass::Thick
                    };
                    if let Some(m) = mast {
                        let mut da = (crate::sun::zenith_azimuth_of(d).1 - m.azimuth_rad).abs();
                        da = da.min(std::f64::consts::TAU - da);
                        if z > m.top_zenith_rad && da * z.sin() < m.half_width_rad {
                            col = [38.0, 38.0, 40.0];
                            class = TruthClass::Unknown;
                        }
                    }
                    if let Some(e) = &extra {
                        if let Some(c) = fixed {
                            col = [c[0] as f64, c[1] as f64, c[2] as f64];
                            class = TruthClass::Unknown;
                        }
                        if let Some(dirt) = &e.spec.dirt
                            && e.map.dirt_alpha[y * w + x] as f64 >= dirt.unknown_from
                        {
                            class = TruthClass::Unknown;
                        }
                    }
                    if z < 70f64.to_radians() && class != TruthClass::Unknown {
                        sky70 += 1;
                        if class != TruthClass::Clear {
                            cloudy += 1;
                        }
                    }
                }
                // Blooming streak along the sensor column through the sun.
                if let Some((sx, sy)) = sun_px
                    && (x as f64 - sx).abs() < 1.0 && sun_vis > 0.3 {
                        let add = 160.0 * sun_vis * (-(y as f64 - sy).abs() / (0.15 * h as f64)).exp();
                        for c in col.iter_mut() {
                            *c += add;
                        }
                    }
                if let Some(e) = &extra {
                    e.apply(&mut col, x, y);
                }
                let i = (y * w + x) as u64;
                for c in 0..3 {
                    let n = 1.2 * gaussian(hash64(noise_seed ^ (i * 3 + c as u64)), hash64(noise_seed.rotate_left(17) ^ (i * 3 + c as u64)));
                    rgb[x * 3 + c] = (col[c] + n).round().clamp(0.0, 255.0) as u8;
                }
                tr[x] = class as u8;
            }
            (rgb, tr, cloudy, sky70)
        })
        .collect();
    let mut rgb = Vec::with_capacity(w * h * 3);
    let mut truth = Vec::with_capacity(w * h);
    let (mut cloudy, mut sky70) = (0, 0);
    for (r, t, c, s) in rows {
        rgb.extend_from_slice(&r);
        truth.extend_from_slice(&t);
        cloudy += c;
        sky70 += s;
    }
    Rendered {
        rgb: image::RgbImage::from_raw(w as u32, h as u32, rgb).expect("buffer sized w*h*3"),
        truth: image::GrayImage::from_raw(w as u32, h as u32, truth).expect("buffer sized w*h"),
        cloud_fraction: if sky70 > 0 { cloudy as f64 / sky70 as f64 } else { 0.0 },
    }
}

/// Where the sun is in the image, for bloom and smear.
#[derive(Clone, Copy)]
struct SunInImage {
    /// Sun pixel (column, row).
    px: (f64, f64),
    /// Unit vector from the principal point outward through the sun (toward the horizon).
    outward: (f64, f64),
    /// Visibility of the sun through cloud (0–1).
    vis: f64,
    /// `L = (z_sun / 90°)²`.
    low: f64,
}

/// The nuisances of one frame: the static map, the exposure gain and where the sun is.
struct FrameNuisances<'a> {
    spec: &'a Nuisances,
    map: &'a NuisanceMap,
    gain: f64,
    sun: Option<SunInImage>,
    width: usize,
    height: usize,
}

impl<'a> FrameNuisances<'a> {
    fn new(spec: &'a Nuisances, map: &'a NuisanceMap, cam: &Camera, inst: &Instant, sun_px: Option<(f64, f64)>, sun_vis: f64, height: usize) -> Self {
        let sun = sun_px.filter(|_| inst.sun.apparent_zenith_rad < std::f64::consts::FRAC_PI_2).map(|(sx, sy)| {
            let (ux, uy) = (sx - cam.cx_px, sy - cam.cy_px);
            let l = ux.hypot(uy);
            let u = if l > 1e-6 { (ux / l, uy / l) } else { (0.0, 0.0) };
            let low = (inst.sun.apparent_zenith_rad / std::f64::consts::FRAC_PI_2).powi(2);
            SunInImage { px: (sx, sy), outward: u, vis: sun_vis, low }
        });
        FrameNuisances { spec, map, gain: spec.gain_at(map, inst.t_s), sun, width: cam.width_px as usize, height }
    }

    /// Dirt, vignetting, exposure gain, then bloom and smear (sensor effects, after the optics).
    #[inline]
    fn apply(&self, col: &mut [f64; 3], x: usize, y: usize) {
        let g = self.map.optics[y * self.width + x];
        for c in 0..3 {
            col[c] *= g[c] as f64 * self.gain;
        }
        if let (Some(b), Some(SunInImage { px: (sx, sy), outward: (ux, uy), vis, low })) = (&self.spec.bloom, self.sun) {
            let s = self.map.scale;
            let (dx, dy) = (x as f64 - sx, y as f64 - sy);
            let (along, across) = (dx * ux + dy * uy, -dx * uy + dy * ux);
            let r_across = b.halo_radius_px * s * (1.0 + 0.5 * low);
            let r_along = if along > 0.0 { r_across * (1.0 + b.lean * low) } else { r_across };
            let rho = ((along / r_along).powi(2) + (across / r_across).powi(2)).sqrt();
            let mut add = 0.0;
            if rho < 12.0 {
                add += vis * b.halo_level * (0.5 + low) * (-rho).exp();
            }
            let w = b.smear_width_px * s;
            if dx.abs() < 4.0 * w {
                let fall = 0.3 + 0.7 * (-dy.abs() / (0.2 * self.height as f64)).exp();
                add += vis * b.smear_level * (0.4 + low) * (-dx * dx / (2.0 * w * w)).exp() * fall;
            }
            for c in col.iter_mut() {
                *c += add;
            }
        }
    }
}
