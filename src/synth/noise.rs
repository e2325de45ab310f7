//! Seeded 2-D gradient noise and its fractal (fBm) sum: the raw material of synthetic cloud fields.
//!
//! Gradient noise after K. Perlin, "Improving noise", *SIGGRAPH* 2002 (quintic fade), with gradients
//! from an integer hash of the lattice point and the seed, so that the field is defined everywhere
//! (no tiling, no grid in memory) and identical whatever order it is evaluated in.

pub use crate::rng::{gaussian, hash64, unit};

#[inline]
fn fade(t: f64) -> f64 {
    t * t * t * (t * (t * 6.0 - 15.0) + 10.0)
}

#[inline]
fn grad(seed: u64, ix: i64, iy: i64, dx: f64, dy: f64) -> f64 {
    let h = hash64(seed ^ hash64((ix as u64).wrapping_mul(0x8DA6_B343) ^ (iy as u64).wrapping_mul(0xD816_3841)));
    // 16 evenly spaced unit gradients.
    let a = (h & 15) as f64 * (std::f64::consts::TAU / 16.0);
    let (s, c) = a.sin_cos();
    c * dx + s * dy
}

/// Gradient noise at (x, y) in lattice units; roughly in [−0.7, 0.7], zero mean.
#[inline]
pub fn gradient_noise(seed: u64, x: f64, y: f64) -> f64 {
    let (fx, fy) = (x.floor(), y.floor());
    let (ix, iy) = (fx as i64, fy as i64);
    let (dx, dy) = (x - fx, y - fy);
    let (u, v) = (fade(dx), fade(dy));
    let n00 = grad(seed, ix, iy, dx, dy);
    let n10 = grad(seed, ix + 1, iy, dx - 1.0, dy);
    let n01 = grad(seed, ix, iy + 1, dx, dy - 1.0);
    let n11 = grad(seed, ix + 1, iy + 1, dx - 1.0, dy - 1.0);
    let a = n00 + u * (n10 - n00);
    let b = n01 + u * (n11 - n01);
    a + v * (b - a)
}

/// Fractal Brownian motion: a sum of octaves of gradient noise.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Fbm {
    /// Seed.
    pub seed: u64,
    /// Wavelength of the first octave \[m\].
    pub wavelength_m: f64,
    /// Number of octaves.
    pub octaves: u32,
    /// Amplitude ratio between octaves (0.5 gives a spectrum near k^−2 in power per octave).
    pub gain: f64,
}

impl Fbm {
    /// Value at a point \[m\]; zero mean, standard deviation of order 0.25.
    #[inline]
    pub fn at(&self, x_m: f64, y_m: f64) -> f64 {
        self.at_lod(x_m, y_m, 0.0)
    }

    /// Value at a point averaged over a footprint of `footprint_m`: octaves whose wavelength is
    /// under two footprints are left out, and those under four faded, so that distant, foreshortened
    /// cloud does not alias into noise.
    #[inline]
    pub fn at_lod(&self, x_m: f64, y_m: f64, footprint_m: f64) -> f64 {
        let mut f = 1.0 / self.wavelength_m;
        let mut amp = 1.0;
        let mut sum = 0.0;
        for o in 0..self.octaves {
            let weight = if footprint_m > 0.0 { ((1.0 / f / footprint_m - 2.0) / 2.0).clamp(0.0, 1.0) } else { 1.0 };
            if weight <= 0.0 {
                break;
            }
            // Rotate each octave a little so lattice artefacts do not line up.
            let (s, c) = (0.5 * o as f64).sin_cos();
            let (xr, yr) = (c * x_m - s * y_m, s * x_m + c * y_m);
            sum += weight * amp * gradient_noise(self.seed.wrapping_add(o as u64 * 0x1234_5677), xr * f + 17.3 * o as f64, yr * f - 9.1 * o as f64);
            f *= 2.0;
            amp *= self.gain;
        }
        sum
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn noise_is_zero_at_lattice_points_and_bounded() {
        assert_eq!(gradient_noise(7, 3.0, -4.0), 0.0);
        let mut maxabs = 0.0f64;
        for i in 0..10_000 {
            let v = gradient_noise(7, i as f64 * 0.173, i as f64 * 0.311);
            maxabs = maxabs.max(v.abs());
        }
        assert!(maxabs < 1.0 && maxabs > 0.3);
    }

    #[test]
    fn fbm_is_deterministic_and_seed_dependent() {
        let a = Fbm { seed: 1, wavelength_m: 1000.0, octaves: 5, gain: 0.5 };
        let b = Fbm { seed: 2, ..a };
        assert_eq!(a.at(123.4, 567.8), a.at(123.4, 567.8));
        assert_ne!(a.at(123.4, 567.8), b.at(123.4, 567.8));
    }

    #[test]
    fn gaussian_has_unit_variance() {
        let n = 20_000;
        let xs: Vec<f64> = (0..n).map(|i| gaussian(hash64(i), hash64(i + 1_000_000))).collect();
        let m = xs.iter().sum::<f64>() / n as f64;
        let v = xs.iter().map(|x| (x - m).powi(2)).sum::<f64>() / n as f64;
        assert!(m.abs() < 0.03 && (v - 1.0).abs() < 0.05, "{m} {v}");
    }
}
