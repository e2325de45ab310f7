//! `calibration/<camera>.toml`: the camera's fitted model and the record of its fit, loading and
//! the rules shared with `calibrate` ([`CalibrationFile::validate`]).

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::camera::{Camera, Orientation, Projection};
use crate::settings::{Check, ConfigError};

/// The whole calibration file.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CalibrationFile {
    /// The camera model and orientation.
    pub camera: CameraCalibration,
    /// How the calibration was obtained, when fitted.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fit: Option<FitRecord>,
}

/// `[camera]` in a calibration file.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CameraCalibration {
    /// A name for the camera.
    pub name: String,
    /// Image width \[px\].
    pub width_px: u32,
    /// Image height \[px\].
    pub height_px: u32,
    /// `"equidistant"`, `"equisolid"`, `"stereographic"` or `"polynomial"`.
    pub model: String,
    /// Focal length \[px per rad\].
    pub f_px_per_rad: f64,
    /// Principal point column \[px\] (pixel centres at integers).
    pub cx_px: f64,
    /// Principal point row \[px\].
    pub cy_px: f64,
    /// Polynomial coefficients k1…k4 (polynomial model only; missing ones are zero).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub k: Vec<f64>,
    /// Largest field angle the lens images \[°\]; default 90.
    #[serde(default = "default_fov")]
    pub max_field_angle_deg: f64,
    /// Yaw \[°\].
    #[serde(default)]
    pub yaw_deg: f64,
    /// Pitch \[°\].
    #[serde(default)]
    pub pitch_deg: f64,
    /// Roll \[°\].
    #[serde(default)]
    pub roll_deg: f64,
    /// The frames are mirrored left–right: east on the right with north up, as on a map (a camera
    /// that sees the sky through a mirror, or software that flips its frames). Default `false`.
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub mirrored: bool,
    /// An obstruction mask image (white = sky, black = blocked), relative to this file.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub obstruction_mask: Option<PathBuf>,
    /// This camera's clear-sky R/B library (CSV written by `nephocast calibrate` from its clear
    /// frames), relative to this file; the segmentation starts from it instead of the parametric
    /// default.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub clear_reference: Option<PathBuf>,
}

fn default_fov() -> f64 {
    90.0
}

/// `[fit]`: how a calibration was fitted.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FitRecord {
    /// When the fit was made (UTC, RFC 3339).
    pub fitted_utc: String,
    /// First frame used.
    pub span_start_utc: String,
    /// Last frame used.
    pub span_end_utc: String,
    /// Sun detections used.
    pub detections: usize,
    /// RMS direction residual \[°\].
    pub rms_deg: f64,
    /// Largest direction residual \[°\].
    pub max_deg: f64,
    /// RMS image residual \[px\].
    pub rms_px: f64,
    /// Largest image residual \[px\].
    pub max_px: f64,
    /// Standard error of each fitted parameter, by name.
    #[serde(default)]
    pub std_errors: std::collections::BTreeMap<String, f64>,
    /// Held-out (cross-validated) RMS error of each lens family tried \[px\], by name.
    #[serde(default, skip_serializing_if = "std::collections::BTreeMap::is_empty")]
    pub lens_cv_rms_px: std::collections::BTreeMap<String, f64>,
    /// Zenith range \[°\] of the detections that carry weight.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub detections_zenith_deg: Option<[f64; 2]>,
    /// Azimuth span \[°\] of the detections that carry weight.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub detections_azimuth_span_deg: Option<f64>,
    /// Stated direction-error bound by zenith band: rows of `[from_deg, to_deg, bound_deg]`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub direction_bound_deg: Vec<[f64; 3]>,
    /// What the fit could not vouch for (read back and repeated when the file is used).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub warnings: Vec<String>,
    /// Parameters held by the image circle, not fitted to the detections (the principal point of a
    /// fit from few detections); their standard errors are the circle's uncertainty, and they do
    /// not count as free parameters.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub held: Vec<String>,
}

/// Fewest sun detections per free parameter of a fit (each gives two residuals; common practice,
/// no source).
pub const MIN_DETECTIONS_PER_PARAMETER: usize = 3;
/// Fewest sun detections of any fit.
pub const MIN_FIT_DETECTIONS: usize = 10;
/// Smallest azimuth span \[°\] of a fit's detections (the sun's arc over about 40 minutes; common
/// practice, no source): a shorter arc cannot separate yaw from the principal point.
pub const MIN_FIT_AZIMUTH_SPAN_DEG: f64 = 10.0;
/// Smallest zenith span \[°\] of a fit's detections per free radial parameter (the focal length and
/// each distortion term; common practice, no source): a radial profile is only pinned where the
/// detections spread along it.
pub const MIN_ZENITH_SPAN_PER_RADIAL_TERM_DEG: f64 = 5.0;

impl FitRecord {
    /// Check the record: enough detections for the free parameters, spread over the sky, and a
    /// finite, non-zero standard error for each parameter (a zero says the fit had no freedom,
    /// i.e. too few detections, not a perfect one).
    ///
    /// # Errors
    /// The first field that fails, naming `file`.
    pub fn validate(&self, file: &Path) -> Result<(), ConfigError> {
        let c = Check { file };
        for name in &self.held {
            if !self.std_errors.contains_key(name) {
                return Err(c.invalid("fit.held", "names of parameters listed in fit.std_errors", name.clone()));
            }
        }
        let free = self.std_errors.keys().filter(|k| !self.held.contains(k)).count();
        let needed = (MIN_DETECTIONS_PER_PARAMETER * free).max(MIN_FIT_DETECTIONS);
        if self.detections < needed {
            return Err(c.invalid(
                "fit.detections",
                format!("at least {needed} sun detections ({MIN_DETECTIONS_PER_PARAMETER} per free parameter, {free} free, and at least {MIN_FIT_DETECTIONS})"),
                self.detections.to_string(),
            ));
        }
        for (name, se) in &self.std_errors {
            if !(se.is_finite() && *se > 0.0) {
                return Err(c.invalid(&format!("fit.std_errors.{name}"), "a finite standard error above 0 (0 means the fit had no freedom left)", se.to_string()));
            }
        }
        for (field, v) in [("fit.rms_deg", self.rms_deg), ("fit.max_deg", self.max_deg), ("fit.rms_px", self.rms_px), ("fit.max_px", self.max_px)] {
            c.range(field, v, 0.0, 1e6)?;
        }
        if let Some(span) = self.detections_azimuth_span_deg
            && !(span.is_finite() && span >= MIN_FIT_AZIMUTH_SPAN_DEG)
        {
            return Err(c.invalid(
                "fit.detections_azimuth_span_deg",
                format!("detections over at least {MIN_FIT_AZIMUTH_SPAN_DEG}° of the sun's azimuth"),
                span.to_string(),
            ));
        }
        if let Some([z0, z1]) = self.detections_zenith_deg {
            c.range("fit.detections_zenith_deg[0]", z0, 0.0, 90.0)?;
            c.range("fit.detections_zenith_deg[1]", z1, z0, 90.0)?;
            // Spread per free parameter along the radius: the focal length and each free
            // distortion term.
            let radial = self.std_errors.keys().filter(|k| k.as_str() == "f_px_per_rad" || (k.starts_with('k') && k[1..].parse::<u8>().is_ok())).count();
            let needed = MIN_ZENITH_SPAN_PER_RADIAL_TERM_DEG * radial as f64;
            if z1 - z0 < needed {
                return Err(c.invalid(
                    "fit.detections_zenith_deg",
                    format!("detections over at least {needed}° of zenith ({MIN_ZENITH_SPAN_PER_RADIAL_TERM_DEG}° per free radial parameter, {radial} free)"),
                    format!("[{z0}, {z1}]"),
                ));
            }
        }
        for (i, b) in self.direction_bound_deg.iter().enumerate() {
            if !b.iter().all(|x| x.is_finite()) || b[2] < 0.0 {
                return Err(c.invalid(&format!("fit.direction_bound_deg[{i}]"), "[from_deg, to_deg, bound_deg] with finite values and bound ≥ 0", format!("{b:?}")));
            }
        }
        Ok(())
    }

    /// The stated direction-error bound \[°\] at a zenith angle; `None` when the file has none.
    pub fn bound_at_deg(&self, zenith_deg: f64) -> Option<f64> {
        self.direction_bound_deg.iter().find(|b| zenith_deg >= b[0] && zenith_deg < b[1]).map(|b| b[2])
    }
}

impl CalibrationFile {
    /// Build from a camera.
    pub fn from_camera(name: &str, cam: &Camera) -> Self {
        let k = match cam.projection {
            Projection::Polynomial { k } => k.to_vec(),
            _ => vec![],
        };
        CalibrationFile {
            camera: CameraCalibration {
                name: name.into(),
                width_px: cam.width_px,
                height_px: cam.height_px,
                model: cam.projection.name().into(),
                f_px_per_rad: cam.f_px,
                cx_px: cam.cx_px,
                cy_px: cam.cy_px,
                k,
                max_field_angle_deg: cam.max_field_angle_rad.to_degrees(),
                yaw_deg: cam.orientation.yaw_rad.to_degrees(),
                pitch_deg: cam.orientation.pitch_rad.to_degrees(),
                roll_deg: cam.orientation.roll_rad.to_degrees(),
                mirrored: cam.mirrored,
                obstruction_mask: None,
                clear_reference: None,
            },
            fit: None,
        }
    }

    /// Validate the whole file (camera and fit record) and build the camera: the rules `replay`,
    /// `live` and `calibrate` (before it writes) all apply.
    ///
    /// # Errors
    /// A field out of range, naming `file`.
    pub fn validate(&self, file: &Path) -> Result<Camera, ConfigError> {
        let cam = self.camera(file)?;
        if let Some(f) = &self.fit {
            f.validate(file)?;
        }
        Ok(cam)
    }

    /// Validate and build the camera (the `[camera]` section only; see [`CalibrationFile::validate`]).
    ///
    /// # Errors
    /// A field out of range, naming `file`.
    pub fn camera(&self, file: &Path) -> Result<Camera, ConfigError> {
        let c = Check { file };
        let k = &self.camera;
        c.range("camera.width_px", k.width_px as f64, 16.0, 16384.0)?;
        c.range("camera.height_px", k.height_px as f64, 16.0, 16384.0)?;
        c.range("camera.f_px_per_rad", k.f_px_per_rad, 1.0, 20_000.0)?;
        c.range("camera.cx_px", k.cx_px, 0.0, k.width_px as f64)?;
        c.range("camera.cy_px", k.cy_px, 0.0, k.height_px as f64)?;
        c.range("camera.max_field_angle_deg", k.max_field_angle_deg, 10.0, 120.0)?;
        c.range("camera.yaw_deg", k.yaw_deg, -360.0, 360.0)?;
        c.range("camera.pitch_deg", k.pitch_deg, -45.0, 45.0)?;
        c.range("camera.roll_deg", k.roll_deg, -45.0, 45.0)?;
        let projection = match k.model.as_str() {
            "equidistant" => Projection::Equidistant,
            "equisolid" => Projection::Equisolid,
            "stereographic" => Projection::Stereographic,
            "polynomial" => {
                if k.k.len() > 4 {
                    return Err(c.invalid("camera.k", "at most 4 coefficients", k.k.len().to_string()));
                }
                let mut kk = [0.0; 4];
                for (i, v) in k.k.iter().enumerate() {
                    c.range(&format!("camera.k[{i}]"), *v, -10.0, 10.0)?;
                    kk[i] = *v;
                }
                Projection::Polynomial { k: kk }
            }
            other => {
                return Err(c.invalid(
                    "camera.model",
                    "\"equidistant\", \"equisolid\", \"stereographic\" or \"polynomial\"",
                    format!("{other:?}"),
                ));
            }
        };
        if !matches!(projection, Projection::Polynomial { .. }) && !k.k.is_empty() {
            return Err(c.invalid("camera.k", "no coefficients for this model", format!("{} coefficients", k.k.len())));
        }
        let cam = Camera::new(
            k.width_px,
            k.height_px,
            k.cx_px,
            k.cy_px,
            k.f_px_per_rad,
            projection,
            k.max_field_angle_deg.to_radians(),
            Orientation {
                yaw_rad: k.yaw_deg.to_radians(),
                pitch_rad: k.pitch_deg.to_radians(),
                roll_rad: k.roll_deg.to_radians(),
            },
        )
        .with_mirrored(k.mirrored);
        // The model must be invertible over its whole field.
        let g_max = projection.radial(cam.max_field_angle_rad);
        if projection.inverse_radial(g_max).is_none() || projection.radial_derivative(cam.max_field_angle_rad) <= 0.0 {
            return Err(c.invalid("camera.k", "a projection that grows monotonically over the lens field", "a folding polynomial"));
        }
        Ok(cam)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn record(detections: usize, held: &[&str]) -> FitRecord {
        let names = ["cx_px", "cy_px", "f_px_per_rad", "yaw_deg", "pitch_deg", "roll_deg"];
        FitRecord {
            fitted_utc: "2026-12-05T00:00:00Z".into(),
            span_start_utc: String::new(),
            span_end_utc: String::new(),
            detections,
            rms_deg: 0.1,
            max_deg: 0.2,
            rms_px: 0.3,
            max_px: 0.6,
            std_errors: names.iter().map(|n| (n.to_string(), 0.5)).collect(),
            lens_cv_rms_px: Default::default(),
            detections_zenith_deg: Some([51.0, 58.0]),
            detections_azimuth_span_deg: Some(180.0),
            direction_bound_deg: vec![],
            warnings: vec![],
            held: held.iter().map(|s| s.to_string()).collect(),
        }
    }

    /// Parameters held by the image circle are not free: 14 detections carry a fit of six
    /// parameters of which two are held (12 needed), not one of six free (18).
    #[test]
    fn held_parameters_are_not_counted_as_free() {
        let file = Path::new("cal.toml");
        assert!(record(14, &["cx_px", "cy_px"]).validate(file).is_ok());
        let e = record(14, &[]).validate(file).unwrap_err().to_string();
        assert!(e.contains("fit.detections") && e.contains("18"), "{e}");
        let e = record(11, &["cx_px", "cy_px"]).validate(file).unwrap_err().to_string();
        assert!(e.contains("12"), "{e}");
        let e = record(14, &["k9"]).validate(file).unwrap_err().to_string();
        assert!(e.contains("fit.held"), "{e}");
    }
}
