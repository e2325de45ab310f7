//! Clear-sky irradiance.
//!
//! # References
//! * P. Ineichen, R. Perez, "A new airmass independent formulation for the Linke turbidity
//!   coefficient", *Solar Energy* 73(3):151–157, 2002 (with the correction of *Solar Energy*
//!   73(5):312). Implemented as in pvlib's `clearsky.ineichen` without the Perez enhancement.
//! * B. Haurwitz, "Insolation in relation to cloudiness and cloud density", *J. Meteorology*
//!   2:154–166, 1945.
//! * D. G. Erbs, S. A. Klein, J. A. Duffie, "Estimation of the diffuse radiation fraction for hourly,
//!   daily and monthly-average global radiation", *Solar Energy* 28(4):293–302, 1982 (used to split
//!   the Haurwitz GHI).

use crate::sun::{SunPosition, absolute_airmass, altitude_to_pressure_pa, relative_airmass};

/// Global, direct normal and diffuse horizontal irradiance \[W m⁻²\].
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Irradiance {
    /// Global horizontal irradiance \[W m⁻²\].
    pub ghi_wm2: f64,
    /// Direct normal irradiance \[W m⁻²\].
    pub dni_wm2: f64,
    /// Diffuse horizontal irradiance \[W m⁻²\].
    pub dhi_wm2: f64,
}

/// Which clear-sky model to use.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case", deny_unknown_fields)]
pub enum ClearSkyModel {
    /// Ineichen & Perez (2002) with a Linke turbidity.
    IneichenPerez {
        /// Linke turbidity factor \[unitless\], typically 2 (very clear) to 6 (hazy).
        linke_turbidity: f64,
    },
    /// Haurwitz (1945): GHI from the zenith only, split by Erbs (1982).
    Haurwitz,
}

/// Ineichen–Perez clear-sky irradiance.
///
/// * `apparent_zenith_rad`: refracted solar zenith.
/// * `airmass_absolute`: pressure-corrected Kasten–Young air mass.
/// * `linke_turbidity`: Linke turbidity factor.
/// * `altitude_m`: site height above sea level.
/// * `dni_extra_wm2`: extraterrestrial normal irradiance.
///
/// Zero when the sun is at or below the horizon.
pub fn ineichen_perez(
    apparent_zenith_rad: f64,
    airmass_absolute: f64,
    linke_turbidity: f64,
    altitude_m: f64,
    dni_extra_wm2: f64,
) -> Irradiance {
    let cos_z = apparent_zenith_rad.cos().max(0.0);
    if cos_z <= 0.0 || !airmass_absolute.is_finite() {
        return Irradiance::default();
    }
    let tl = linke_turbidity;
    let fh1 = (-altitude_m / 8000.0).exp();
    let fh2 = (-altitude_m / 1250.0).exp();
    let cg1 = 5.09e-5 * altitude_m + 0.868;
    let cg2 = 3.92e-5 * altitude_m + 0.0387;
    let g = (-cg2 * airmass_absolute * (fh1 + fh2 * (tl - 1.0))).exp();
    let ghi = cg1 * dni_extra_wm2 * cos_z * g.max(0.0);
    let b = 0.664 + 0.163 / fh1;
    let bnci = dni_extra_wm2 * (b * (-0.09 * airmass_absolute * (tl - 1.0)).exp()).max(0.0);
    let bnci2 = ghi * ((1.0 - (0.1 - 0.2 * (-tl).exp()) / (0.1 + 0.882 / fh1)) / cos_z).clamp(0.0, 1e20);
    let dni = bnci.min(bnci2);
    Irradiance { ghi_wm2: ghi, dni_wm2: dni, dhi_wm2: ghi - dni * cos_z }
}

/// Haurwitz clear-sky GHI \[W m⁻²\]: `1098 cos z exp(−0.059 / cos z)`; zero below the horizon.
pub fn haurwitz_ghi_wm2(apparent_zenith_rad: f64) -> f64 {
    let c = apparent_zenith_rad.cos();
    if c <= 0.0 { 0.0 } else { 1098.0 * c * (-0.059 / c).exp() }
}

/// Erbs (1982) diffuse fraction of GHI for a clearness index `kt`.
pub fn erbs_diffuse_fraction(kt: f64) -> f64 {
    if kt <= 0.22 {
        1.0 - 0.09 * kt
    } else if kt <= 0.8 {
        0.9511 - 0.1604 * kt + 4.388 * kt.powi(2) - 16.638 * kt.powi(3) + 12.336 * kt.powi(4)
    } else {
        0.165
    }
}

/// Split a GHI into DNI and DHI by Erbs (1982).
pub fn erbs_split(ghi_wm2: f64, zenith_rad: f64, dni_extra_wm2: f64) -> Irradiance {
    let cos_z = zenith_rad.cos();
    // Below about 87° zenith the split is ill-conditioned; keep it all diffuse there.
    if cos_z <= 0.065 || ghi_wm2 <= 0.0 {
        return Irradiance { ghi_wm2: ghi_wm2.max(0.0), dni_wm2: 0.0, dhi_wm2: ghi_wm2.max(0.0) };
    }
    let kt = (ghi_wm2 / (dni_extra_wm2 * cos_z)).clamp(0.0, 1.0);
    let dhi = ghi_wm2 * erbs_diffuse_fraction(kt);
    Irradiance { ghi_wm2, dni_wm2: (ghi_wm2 - dhi) / cos_z, dhi_wm2: dhi }
}

/// Clear-sky irradiance for a sun position at a site of given height.
pub fn clear_sky(sun: &SunPosition, altitude_m: f64, model: ClearSkyModel) -> Irradiance {
    let z = sun.apparent_zenith_rad;
    match model {
        ClearSkyModel::IneichenPerez { linke_turbidity } => match relative_airmass(z) {
            Some(am) => ineichen_perez(
                z,
                absolute_airmass(am, altitude_to_pressure_pa(altitude_m)),
                linke_turbidity,
                altitude_m,
                sun.dni_extra_wm2(),
            ),
            None => Irradiance::default(),
        },
        ClearSkyModel::Haurwitz => erbs_split(haurwitz_ghi_wm2(z), z, sun.dni_extra_wm2()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn closure_holds() {
        let z = 0.7f64;
        let am = absolute_airmass(relative_airmass(z).unwrap(), 95_000.0);
        let c = ineichen_perez(z, am, 3.0, 500.0, 1366.1);
        assert!((c.ghi_wm2 - (c.dni_wm2 * z.cos() + c.dhi_wm2)).abs() < 1e-9);
        assert!(c.dhi_wm2 > 0.0 && c.dni_wm2 > 0.0);
    }

    #[test]
    fn zero_below_horizon() {
        let c = ineichen_perez(1.6, f64::NAN, 3.0, 0.0, 1366.1);
        assert_eq!(c, Irradiance::default());
        assert_eq!(haurwitz_ghi_wm2(1.6), 0.0);
    }

    #[test]
    fn erbs_is_continuous_at_breakpoints() {
        // Erbs et al. 1982, eq. for the three kt ranges: continuity is a property of the fit.
        assert!((erbs_diffuse_fraction(0.22) - erbs_diffuse_fraction(0.2200001)).abs() < 1e-3);
        assert!((erbs_diffuse_fraction(0.8) - erbs_diffuse_fraction(0.8000001)).abs() < 2e-3);
    }
}
