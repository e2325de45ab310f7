//! `segment` (classes and cloud fraction of frames) and `qc` (quality control of a measurements
//! table).

use anyhow::{Result, bail};

use super::args::{QcArgs, SegmentArgs};
use crate::io::parse_time;
use crate::sun::position;

/// `segment`: classify frames and print their cloud fraction (and class pictures when asked).
pub(super) fn cmd_segment(a: SegmentArgs) -> Result<()> {
    use crate::calibrate::geometry_free;
    use crate::segment::{ImageGeometry, segment_image};
    let site = a.site.as_ref().map(|p| crate::config::Site::load(p)).transpose()?;
    let cal_cam = match &a.calibration {
        Some(p) => {
            let c: crate::config::CalibrationFile = crate::config::read_toml(p)?;
            Some(c.validate(p)?)
        }
        None => None,
    };
    let fixed_time = a.time.as_deref().map(|t| parse_time("--time", t)).transpose().map_err(anyhow::Error::msg)?;
    let params = site.as_ref().map(|s| s.file.segment.clone()).unwrap_or_default();
    // The engine's starting reference: the site camera's clear-sky library when its calibration has
    // one, else the parametric default.
    let reference = site.as_ref().and_then(|s| s.clear_reference.clone()).unwrap_or_default();
    let mut geoms: Vec<(crate::camera::Camera, ImageGeometry)> = vec![];
    crate::say!("image,cloud_fraction,classes_png,preview_png");
    for path in &a.images {
        let img = crate::intake::read_frame(path, &crate::intake::IntakeOptions::default())?;
        let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let (cam, sun) = if let Some(s) = &site {
            let naming = s.file.camera.frame_naming();
            let t = fixed_time.or_else(|| naming.time_of(&name)).ok_or_else(|| {
                anyhow::anyhow!("{}: no time: give --time or name the file with its time ({})", path.display(), naming.expected())
            })?;
            let sp = position(&t, &s.observer())?;
            let d = sp.direction_enu();
            (s.camera.clone(), Some([d[0] as f32, d[1] as f32, d[2] as f32]))
        } else if let Some(c) = &cal_cam {
            let sun = crate::calibrate::find_sun_blob(&img, crate::calibrate::ClipTest::Channels, 245, 5, 0.06 * c.image_circle_radius_px())
                .and_then(|(x, y, _)| c.unproject_enu(x, y))
                .map(|d| [d[0] as f32, d[1] as f32, d[2] as f32]);
            (c.clone(), sun)
        } else {
            geometry_free(&img).ok_or_else(|| anyhow::anyhow!("{}: no image circle found (is the frame black?)", path.display()))?
        };
        if (cam.width_px, cam.height_px) != img.dimensions() {
            bail!("{}: image is {}x{} px, the calibration says {}x{}", path.display(), img.width(), img.height(), cam.width_px, cam.height_px);
        }
        let geom = match geoms.iter().find(|(c, _)| *c == cam) {
            Some((_, g)) => g.clone(),
            None => {
                let g = ImageGeometry::from_camera(&cam, site.as_ref().and_then(|s| s.obstruction.as_ref()));
                geoms.push((cam.clone(), g.clone()));
                g
            }
        };
        let seg = segment_image(&img, &geom, sun, &params, &reference);
        let stem = path.file_stem().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
        let out = a.out.join(format!("{stem}_classes.png"));
        crate::io::write_atomic(&out, &crate::io::encode_png_gray(&seg.classes))?;
        let preview = a.out.join(format!("{stem}_preview.png"));
        crate::io::write_atomic(&preview, &crate::io::encode_png_rgb(&crate::overlay::class_preview(&seg.classes)))?;
        crate::say!("{}", crate::io::csv_line([path.display().to_string(), format!("{:.4}", seg.cloud_fraction), out.display().to_string(), preview.display().to_string()]));
    }
    Ok(())
}

/// `qc --fail-on-impossible` found values outside the physically possible limits (exit status
/// [`ImpossibleValues::EXIT_STATUS`]).
#[derive(Debug, thiserror::Error)]
#[error("{}: {rows} row(s) with values outside the physically possible limits (--fail-on-impossible)", file.display())]
pub struct ImpossibleValues {
    /// The measurements file.
    pub file: std::path::PathBuf,
    /// Rows with at least one impossible value.
    pub rows: usize,
}

impl ImpossibleValues {
    /// The exit status `qc --fail-on-impossible` ends with when it finds one.
    pub const EXIT_STATUS: u8 = 3;
}

/// `qc`: quality control of a measurements table, flag counts per column.
pub(super) fn cmd_qc(a: QcArgs) -> Result<()> {
    use crate::qc::*;
    let site = crate::config::Site::load(&a.site)?;
    let mut m = crate::io::Measurements::read_csv(&a.measurements)?;
    m.label_at_start(site.file.measurements.time_label, None);
    let col = |n: &str| m.column(n).map(|c| m.columns[c].as_slice());
    // (label, GHI, DNI, DHI)
    type Set<'a> = (String, &'a [f64], Option<&'a [f64]>, Option<&'a [f64]>);
    let mut sets: Vec<Set> = vec![];
    if let Some(g) = col("ghi") {
        sets.push(("ghi".into(), g, col("dni"), col("dhi")));
    }
    for (i, n) in m.names.iter().enumerate() {
        if n.starts_with("ghi_") && n.ends_with("_wm2") {
            sets.push((n.clone(), m.columns[i].as_slice(), None, None));
        }
    }
    if sets.is_empty() {
        bail!("{}: no irradiance columns (expected ghi[, dni, dhi] or ghi_<name>_wm2)", a.measurements.display());
    }
    let mut header = vec!["time_utc".to_string()];
    let mut all = vec![];
    for (label, g, dn, dh) in &sets {
        let f = qc_series_partial(&m.times, g, *dn, *dh, &site.observer());
        let counts: Vec<String> = flag_counts(&f).into_iter().map(|(n, c)| format!("{n} {c}")).collect();
        crate::say!("{label}: {} rows, {} flagged{}{}", f.len(), f.iter().filter(|x| **x != 0).count(), if counts.is_empty() { "" } else { ": " }, counts.join(", "));
        header.push(format!("{label}_flags"));
        all.push(f);
    }
    if let Some(out) = &a.out {
        let mut csv = crate::io::CsvTable::new(header);
        for (i, t) in m.times.iter().enumerate() {
            csv.row(std::iter::once(crate::io::fmt_time(t)).chain(all.iter().map(|f| f[i].to_string())));
        }
        crate::io::write_atomic(out, &csv.into_bytes())?;
        crate::say!("wrote {} (flags are bit sets: 1 GHI impossible, 2 GHI rare, 4/8 DNI, 16/32 DHI, 64 closure, 128 missing, 256 stuck, 512 gap)", out.display());
    }
    let impossible = (0..m.times.len()).filter(|&i| all.iter().any(|f| f[i] & FLAGS_PHYSICAL != 0)).count();
    if a.fail_on_impossible && impossible > 0 {
        return Err(ImpossibleValues { file: a.measurements.clone(), rows: impossible }.into());
    }
    Ok(())
}
