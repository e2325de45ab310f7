//! Robust summaries shared by the stages: the median, and the scale that turns a median absolute
//! deviation into a standard deviation.

/// A normal distribution's standard deviation per unit of median absolute deviation:
/// `1 / Φ⁻¹(3/4)` = 1.4826 (Rousseeuw & Croux 1993, *JASA* 88:1273, from memory; the value is
/// checked below against the normal quantile itself).
pub const MAD_TO_SIGMA: f64 = 1.4826;

/// The median of `v` (the mean of the middle two for an even count), sorting `v` in place; NaN for
/// an empty slice.
pub fn median(v: &mut [f64]) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n == 0 {
        f64::NAN
    } else if n % 2 == 1 {
        v[n / 2]
    } else {
        0.5 * (v[n / 2 - 1] + v[n / 2])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn median_of_odd_even_and_empty() {
        assert_eq!(median(&mut [3.0, 1.0, 2.0]), 2.0);
        assert_eq!(median(&mut [4.0, 1.0, 3.0, 2.0]), 2.5);
        assert!(median(&mut []).is_nan());
    }

    #[test]
    fn mad_scale_is_the_normal_quartile() {
        // The upper quartile q of N(0, 1), Φ(q) = 0.75, by bisection; the scale is 1 / q.
        let (mut lo, mut hi) = (0.0_f64, 2.0_f64);
        for _ in 0..60 {
            let mid = 0.5 * (lo + hi);
            if normal_cdf(mid) < 0.75 { lo = mid } else { hi = mid }
        }
        assert!((1.0 / lo - MAD_TO_SIGMA).abs() < 1e-4, "1/q75 = {}", 1.0 / lo);
        // A normal sample of σ = 2: the scaled median absolute deviation recovers σ.
        let mut dev: Vec<f64> =
            (0..20_000u64).map(|i| (2.0 * crate::rng::gaussian(crate::rng::hash64(2 * i), crate::rng::hash64(2 * i + 1))).abs()).collect();
        let sigma = MAD_TO_SIGMA * median(&mut dev);
        assert!((sigma - 2.0).abs() < 0.06, "σ {sigma}");
    }

    /// Φ(x) for x ≥ 0: ½ + the normal density's integral over [0, x] by Simpson's rule.
    fn normal_cdf(x: f64) -> f64 {
        let n = 2000;
        let h = x / n as f64;
        let f = |t: f64| (-0.5 * t * t).exp();
        let mut s = f(0.0) + f(x);
        for i in 1..n {
            s += f(i as f64 * h) * if i % 2 == 1 { 4.0 } else { 2.0 };
        }
        0.5 + s * h / 3.0 / (2.0 * std::f64::consts::PI).sqrt()
    }
}
