//! The bottom layer every stage may use: the error of a settings file, TOML reading that reports
//! the field path and line, range checks, and the bounds shared by several files. It imports no
//! other module of the crate, so a stage's parameter section can validate itself without
//! reaching up to the site file that holds it ([`crate::config`]).

use std::path::Path;

use serde::Deserialize;

/// Lowest cloud base height \[m\] accepted anywhere (site default, series): fog and stratus
/// below it do not form a cloud map (common practice, no source).
pub const CBH_MIN_M: f64 = 50.0;
/// Highest cloud base height \[m\]: above the tropopause of mid-latitudes nothing a sky camera
/// maps forms (common practice, no source).
pub const CBH_MAX_M: f64 = 15_000.0;

/// An error in a site or calibration file.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    /// The file could not be read.
    #[error("{file}: cannot read: {source}")]
    Read {
        /// The file.
        file: std::path::PathBuf,
        /// Why.
        source: std::io::Error,
    },
    /// The file is not valid TOML or a field has the wrong type.
    #[error("{file}: field {path}: {message}")]
    Parse {
        /// The file.
        file: std::path::PathBuf,
        /// Dotted field path.
        path: String,
        /// What the parser said.
        message: String,
    },
    /// A field has a value outside its allowed range.
    #[error("{file}: field {field}: expected {expected}, got {got}")]
    Invalid {
        /// The file.
        file: std::path::PathBuf,
        /// Dotted field path.
        field: String,
        /// What was expected.
        expected: String,
        /// What was found.
        got: String,
    },
}

/// Read and deserialize a TOML file, reporting the field path of any error.
pub fn read_toml<T: for<'de> Deserialize<'de>>(path: &Path) -> Result<T, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read { file: path.into(), source })?;
    parse_toml(&text, path)
}

/// Deserialize TOML text that came from `path` (used in messages only).
pub fn parse_toml<T: for<'de> Deserialize<'de>>(text: &str, path: &Path) -> Result<T, ConfigError> {
    let de = toml::Deserializer::new(text);
    serde_path_to_error::deserialize(de).map_err(|e| {
        let field = e.path().to_string();
        let message = e.inner().message().to_string();
        let loc = e
            .inner()
            .span()
            .map(|s| {
                let line = text[..s.start.min(text.len())].matches('\n').count() + 1;
                format!(" (line {line})")
            })
            .unwrap_or_default();
        ConfigError::Parse {
            file: path.into(),
            path: if field == "." { "(top level)".into() } else { field },
            message: format!("{}{loc}", message.trim_end()),
        }
    })
}

/// Fixed-length arrays of numbers in site files, read so that extra values are refused: serde's
/// arrays stop after their length and `toml` does not check what is left, so `[east, north, up]`
/// where `[east, north]` was meant (or a fourth value in a camera position) once passed silently.
pub mod exact {
    use serde::{Deserialize, Deserializer, de::Error as _};

    /// `[f64; N]`, exactly N numbers.
    ///
    /// # Errors
    /// Not an array of numbers, or not N of them.
    pub fn numbers<'de, D: Deserializer<'de>, const N: usize>(d: D) -> Result<[f64; N], D::Error> {
        let v = Vec::<f64>::deserialize(d)?;
        let n = v.len();
        v.try_into().map_err(|_| D::Error::invalid_length(n, &format!("an array of {N} numbers").as_str()))
    }

    /// `Vec<[f64; N]>` (a polygon's vertices), each exactly N numbers.
    ///
    /// # Errors
    /// Not an array of arrays of numbers, or one of them not N long.
    pub fn points<'de, D: Deserializer<'de>, const N: usize>(d: D) -> Result<Vec<[f64; N]>, D::Error> {
        let v = Vec::<Vec<f64>>::deserialize(d)?;
        v.into_iter()
            .enumerate()
            .map(|(i, p)| {
                let n = p.len();
                p.try_into().map_err(|_| D::Error::custom(format!("vertex [{i}]: invalid length {n}, expected an array of {N} numbers")))
            })
            .collect()
    }
}

pub(crate) struct Check<'a> {
    pub(crate) file: &'a Path,
}

impl Check<'_> {
    pub(crate) fn range(&self, field: &str, v: f64, lo: f64, hi: f64) -> Result<(), ConfigError> {
        if v.is_finite() && v >= lo && v <= hi {
            Ok(())
        } else {
            Err(self.invalid(field, format!("a number from {lo} to {hi}"), v.to_string()))
        }
    }
    pub(crate) fn invalid(&self, field: &str, expected: impl Into<String>, got: impl Into<String>) -> ConfigError {
        ConfigError::Invalid { file: self.file.into(), field: field.into(), expected: expected.into(), got: got.into() }
    }
}

/// Range check shared by stage parameter sections.
pub(crate) fn check_range(file: &Path, field: &str, v: f64, lo: f64, hi: f64) -> Result<(), ConfigError> {
    Check { file }.range(field, v, lo, hi)
}
