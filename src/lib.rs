//! # nephocast — sky-camera nowcasting
//!
//! nephocast turns the frames of a fisheye sky camera beside a solar plant into minute-by-minute
//! irradiance forecasts for every part of the plant, up to about 20 minutes ahead.
//!
//! The pipeline, one module per stage:
//!
//! | stage | module |
//! |---|---|
//! | solar position, air mass, extraterrestrial irradiance | [`sun`] |
//! | clear-sky irradiance | [`clearsky`] |
//! | fisheye camera model, pixel ↔ sky direction | [`camera`] |
//! | settings errors, TOML reading and range checks (the bottom layer) | [`settings`] |
//! | site and calibration files | [`config`] |
//! | synthetic scenes with ground truth | [`synth`] |
//! | frame intake: complete, bounded frame files only | [`intake`] |
//! | frame quality control | [`qc`] |
//! | cloud segmentation | [`segment`] |
//! | cloud-plane map | [`cloudmap`] |
//! | cloud motion | [`motion`] |
//! | shadow projection onto the ground | [`shadow`] |
//! | plane-of-array transposition, tracker orientation | [`transposition`] |
//! | irradiance and power forecast, ensemble, bands | [`forecast`] |
//! | the per-frame engine | [`nowcast`] |
//! | replay of recorded sequences, scoring | [`replay`], [`verify`] |
//! | measurements: screening, the plant's power meters, scores against them | [`io`], [`meter`], [`measured`] |
//! | batches of days, mergeable statistics, shard merge | [`batch`], [`stats`], [`merge`] |
//!
//! ## Conventions (used everywhere)
//!
//! * Local frame: east, north, up, in metres.
//! * Azimuth clockwise from north (0 = N, 90° = E); zenith angle from the vertical. Degrees at the
//!   edges (files, command line), radians inside. Names carry units: `zenith_rad`, `ghi_wm2`, `cbh_m`.
//! * A sky direction is `d = (sin z sin A, sin z cos A, cos z)` in (east, north, up).
//! * Image pixels: `(x, y)` = (column, row) from the top-left; integer coordinates are pixel
//!   **centres** (the OpenCV convention), so pixel `(i, j)` covers `[i − 0.5, i + 0.5)`.
//! * Times are UTC ([`chrono::DateTime<Utc>`]).
//!
//! Forecasts and alarms are advisory. They are not a protection system.
#![deny(missing_docs)]

/// Print a line to standard output, ignoring a closed pipe (e.g. `| head`).
#[macro_export]
macro_rules! say {
    ($($t:tt)*) => {{
        use std::io::Write as _;
        let _ = writeln!(std::io::stdout(), $($t)*);
    }};
}

pub mod batch;
pub mod bench;
pub mod calibrate;
pub mod camera;
pub mod cbh;
#[cfg(feature = "cli")]
pub mod cli;
pub mod clearsky;
pub mod cloudmap;
pub mod config;
pub mod farfield;
pub mod forecast;
pub mod intake;
pub mod fixed_text;
pub mod io;
pub mod measured;
pub mod meter;
pub mod merge;
pub mod motion;
pub mod multicam;
pub mod nowcast;
pub mod output_set;
pub mod overlay;
#[cfg(feature = "parquet")]
pub mod parquet_out;
pub mod plant;
mod pool;
pub mod power;
pub mod qc;
pub mod ramp;
pub mod records;
pub mod rng;
pub mod robust;
pub mod replay;
pub mod report;
pub mod segment;
#[cfg(feature = "server")]
pub mod serve;
pub mod settings;
pub mod shadow;
pub mod stats;
pub mod stereo;
pub mod sun;
pub mod sundisk;
pub mod synth;
pub mod transposition;
pub mod verify;
