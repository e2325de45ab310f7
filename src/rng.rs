//! The random source of the engine and the renderer: counter-based, so a draw depends only on
//! its seed and index (the ensemble and the synthetic scenes are reproducible whatever order
//! they are computed in). A leaf: it imports nothing of the crate.

/// Mix 64 bits (SplitMix64 finaliser; S. Vigna, public domain reference code).
#[inline]
pub fn hash64(mut x: u64) -> u64 {
    x = x.wrapping_add(0x9E37_79B9_7F4A_7C15);
    x = (x ^ (x >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    x = (x ^ (x >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    x ^ (x >> 31)
}

/// A uniform number in [0, 1) from a hash.
#[inline]
pub fn unit(h: u64) -> f64 {
    (h >> 11) as f64 / (1u64 << 53) as f64
}

/// A standard normal number from two hashes (Box–Muller).
#[inline]
pub fn gaussian(h1: u64, h2: u64) -> f64 {
    let u1 = unit(h1).max(1e-300);
    let u2 = unit(h2);
    (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
}
