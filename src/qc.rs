//! Frame quality control: decide whether a frame can be used, and say why not.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::config::{ConfigError, check_range};

/// `[qc]` in `site.toml`.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct QcParams {
    /// Frames with the sun lower than this are skipped \[°\]; default 5.
    pub min_sun_elevation_deg: f64,
    /// Frames whose sky pixels are on average darker than this (0–255) are under-exposed; default 20.
    pub min_mean_level: f64,
    /// Frames whose sky pixels are on average brighter than this (0–255) are over-exposed; default 235.
    pub max_mean_level: f64,
    /// Largest share of sky pixels that may be saturated (all channels ≥ 250); default 0.25.
    pub max_saturated_fraction: f64,
}

impl Default for QcParams {
    fn default() -> Self {
        Self { min_sun_elevation_deg: 5.0, min_mean_level: 20.0, max_mean_level: 235.0, max_saturated_fraction: 0.25 }
    }
}

impl QcParams {
    /// Check ranges.
    ///
    /// # Errors
    /// The first field out of range.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        check_range(file, "qc.min_sun_elevation_deg", self.min_sun_elevation_deg, -10.0, 60.0)?;
        check_range(file, "qc.min_mean_level", self.min_mean_level, 0.0, 255.0)?;
        check_range(file, "qc.max_mean_level", self.max_mean_level, self.min_mean_level, 255.0)?;
        check_range(file, "qc.max_saturated_fraction", self.max_saturated_fraction, 0.0, 1.0)
    }
}
