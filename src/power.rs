//! PV block power: cell temperature, DC power, inverter efficiency and AC clipping.
//!
//! * Cell temperature by Faiman (2008): `T_cell = T_air + POA / (u0 + u1 · wind)`.
//! * DC power by the linear model with a temperature coefficient (PVWatts; Dobos 2014):
//!   `P_dc = P_dc0 · POA / 1000 · (1 + γ (T_cell − 25 °C))`.
//! * AC power by the PVWatts inverter curve: efficiency
//!   `η = η_nom / η_ref · (−0.0162 ζ − 0.0059 / ζ + 0.9858)` with `ζ = P_dc / P_dc,lim`
//!   (η_ref = 0.9637), clipped at the block's AC rating `P_ac0 = η_nom · P_dc,lim` and at zero.
//!
//! Checked against pvlib's `temperature.faiman`, `pvsystem.pvwatts_dc` and `inverter.pvwatts` in
//! `tests/reference_power.rs`.
//!
//! # References
//! * D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules", *Progress in
//!   Photovoltaics* 16(4):307–315, 2008.
//! * A. P. Dobos, *PVWatts Version 5 Manual*, NREL/TP-6A20-62641, 2014.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::settings::{ConfigError, check_range};

/// `[power]` in `site.toml`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct PowerParams {
    /// Faiman constant heat-loss factor \[W m⁻² K⁻¹\]; default 25.0 (pvlib's default).
    pub faiman_u0: f64,
    /// Faiman wind heat-loss factor \[W m⁻³ s K⁻¹\]; default 6.84 (pvlib's default).
    pub faiman_u1: f64,
    /// Temperature coefficient of power \[1/°C\]; default −0.004 (typical crystalline silicon,
    /// from memory).
    pub gamma_pdc_per_c: f64,
    /// DC/AC ratio used when a block gives no AC rating; default 1.2 (common practice, no source).
    pub dc_ac_ratio: f64,
    /// Nominal inverter efficiency; default 0.96 (PVWatts default).
    pub inverter_efficiency: f64,
    /// Air temperature when no measurement is given \[°C\].
    pub default_temp_air_c: f64,
    /// Wind speed when no measurement is given \[m/s\].
    pub default_wind_speed_mps: f64,
}

impl Default for PowerParams {
    fn default() -> Self {
        Self {
            faiman_u0: 25.0,
            faiman_u1: 6.84,
            gamma_pdc_per_c: -0.004,
            dc_ac_ratio: 1.2,
            inverter_efficiency: 0.96,
            default_temp_air_c: 20.0,
            default_wind_speed_mps: 2.0,
        }
    }
}

impl PowerParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "power.faiman_u0", self.faiman_u0, 1.0, 100.0)?;
        check_range(file, "power.faiman_u1", self.faiman_u1, 0.0, 50.0)?;
        check_range(file, "power.gamma_pdc_per_c", self.gamma_pdc_per_c, -0.02, 0.0)?;
        check_range(file, "power.dc_ac_ratio", self.dc_ac_ratio, 0.5, 3.0)?;
        check_range(file, "power.inverter_efficiency", self.inverter_efficiency, 0.5, 1.0)?;
        check_range(file, "power.default_temp_air_c", self.default_temp_air_c, -50.0, 60.0)?;
        check_range(file, "power.default_wind_speed_mps", self.default_wind_speed_mps, 0.0, 60.0)
    }
}

/// Faiman cell temperature \[°C\].
pub fn faiman_cell_temp_c(poa_wm2: f64, temp_air_c: f64, wind_mps: f64, u0: f64, u1: f64) -> f64 {
    temp_air_c + poa_wm2 / (u0 + u1 * wind_mps)
}

/// Linear DC power \[kW\] for a DC rating `pdc0_kw`.
pub fn dc_power_kw(poa_wm2: f64, cell_temp_c: f64, pdc0_kw: f64, gamma_per_c: f64) -> f64 {
    pdc0_kw * poa_wm2 / 1000.0 * (1.0 + gamma_per_c * (cell_temp_c - 25.0))
}

/// PVWatts inverter: AC power \[kW\] from DC power, for an AC rating `pac0_kw` and nominal efficiency.
pub fn inverter_ac_kw(pdc_kw: f64, pac0_kw: f64, eta_nom: f64) -> f64 {
    const ETA_REF: f64 = 0.9637;
    if pdc_kw <= 0.0 {
        return 0.0;
    }
    let pdc0 = pac0_kw / eta_nom;
    let zeta = pdc_kw / pdc0;
    let eta = eta_nom / ETA_REF * (-0.0162 * zeta - 0.0059 / zeta + 0.9858);
    (eta * pdc_kw).min(pac0_kw).max(0.0)
}

/// AC power of a block \[kW\] from its mean plane-of-array irradiance.
pub fn block_ac_kw(poa_wm2: f64, capacity_kw: f64, ac_kw: Option<f64>, temp_air_c: f64, wind_mps: f64, p: &PowerParams) -> f64 {
    let tc = faiman_cell_temp_c(poa_wm2, temp_air_c, wind_mps, p.faiman_u0, p.faiman_u1);
    let pdc = dc_power_kw(poa_wm2, tc, capacity_kw, p.gamma_pdc_per_c);
    inverter_ac_kw(pdc, ac_kw.unwrap_or(capacity_kw / p.dc_ac_ratio), p.inverter_efficiency)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stc_gives_rated_dc_power() {
        // At 1000 W/m² and 25 °C cell temperature the linear model gives the rating (definition).
        assert!((dc_power_kw(1000.0, 25.0, 500.0, -0.004) - 500.0).abs() < 1e-12);
    }

    #[test]
    fn inverter_clips_and_never_goes_negative() {
        // 40 % more DC than the inverter takes at its rating: clipped to the AC rating.
        assert_eq!(inverter_ac_kw(1.4 * 100.0 / 0.96, 100.0, 0.96), 100.0);
        assert_eq!(inverter_ac_kw(0.0, 100.0, 0.96), 0.0);
        assert_eq!(inverter_ac_kw(0.01, 100.0, 0.96), 0.0);
    }
}
