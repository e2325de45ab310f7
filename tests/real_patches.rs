//! Segmentation of real sky patches against hand-made masks, and night frames refused.
//!
//! Data (read from `$NEPHOCAST_DATASETS`, set by `.ci/run`; licensed CC BY-NC 4.0, so nothing of
//! them is copied into this repository):
//! * SWIMSEG (S. Dev, Y. H. Lee, S. Winkler, "Color-based segmentation of sky/cloud images from
//!   ground-based cameras", IEEE JSTARS 10(1):231–242, 2017): daytime patches of the WAHRSIS
//!   whole-sky imager (Singapore, 1.34° N 103.68° E), each undistorted into a virtual normal-lens
//!   view pointing at the elevation and azimuth of its `index.csv` row, with binary masks
//!   (255 cloud, 0 sky).
//! * SWINSEG (S. Dev, F. M. Savoy, Y. H. Lee, S. Winkler, "Nighttime sky/cloud image
//!   segmentation", Proc. IEEE ICIP 2017): night patches of the same camera.
//!
//! Every image found in the folders is used (the count is printed, never assumed).
//!
//! Geometry of a SWIMSEG patch, as assumed here (the folder holds no readme of its own; the shared
//! datasets README says "a virtual normal-lens view of about 62 degrees"): a rectilinear view
//! [`PATCH_FOV_DEG`] wide across the square patch, centred on `Elevation` and `Azimuth` (taken as
//! degrees clockwise from north), image up toward the zenith, not mirrored. Measured: of the eight
//! orientations (the azimuth as read or mirrored, each turned by 0/90/180/270°) the one assumed
//! scores best (mean 0.857 against 0.830–0.854; without a sun 0.850), and 50° or 75° instead of
//! 62° moves the mean by at most 0.002. Note that no `Azimuth` above 255 occurs: the column may have
//! been stored in one byte, so a patch read as 255 may look further round.
mod common;

use std::path::{Path, PathBuf};

use chrono::{DateTime, NaiveDate, NaiveDateTime, NaiveTime, Utc};
use nephocast::config::Site;
use nephocast::nowcast::{Frame, Nowcaster, Rejection};
use nephocast::qc::{QcParams, SkyLevels, judge_sky, judge_sun};
use nephocast::segment::{Class, ImageGeometry, Reference, SegmentParams, segment_image};
use nephocast::sun::{Observer, position};

/// WAHRSIS, Nanyang Technological University, Singapore.
const SITE_LAT_DEG: f64 = 1.34;
const SITE_LON_DEG: f64 = 103.68;
/// Singapore local time is UTC+8.
const UTC_OFFSET_H: i64 = 8;
/// Field of view of the virtual camera across the (square) patch \[°\]: the dataset's description
/// says "about 62°" and gives no more; taken here across the width (and so the height).
const PATCH_FOV_DEG: f64 = 62.0;
/// Fixed red/blue threshold of the baseline: cloud from R/B ≥ 0.6 (Long et al. 2006; the value
/// from memory, see ../shared/REFERENCES.md).
const FIXED_RB_THRESHOLD: f64 = 0.6;

/// One row of an `index.csv`: the columns by name.
type Row = std::collections::HashMap<String, String>;

fn read_index(path: &Path) -> Vec<Row> {
    let mut rdr = csv::Reader::from_path(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let h = rdr.headers().unwrap_or_else(|e| panic!("{}: header: {e}", path.display())).clone();
    rdr.records()
        .enumerate()
        .map(|(i, r)| {
            let r = r.unwrap_or_else(|e| panic!("{} line {}: {e}", path.display(), i + 2));
            h.iter().zip(r.iter()).map(|(a, b)| (a.to_string(), b.trim().to_string())).collect()
        })
        .collect()
}

/// The images found in `dir/images` (sorted by name), each with its `index.csv` row when it has
/// one. Every row must name an image that is there.
fn patches(dir: &Path) -> (PathBuf, Vec<(String, Option<Row>)>) {
    let index = dir.join("index.csv");
    let rows = read_index(&index);
    let images = dir.join("images");
    let mut names: Vec<String> = std::fs::read_dir(&images)
        .unwrap_or_else(|e| panic!("{}: {e}", images.display()))
        .flatten()
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| !n.starts_with('.'))
        .collect();
    names.sort();
    for row in &rows {
        let n = field(row, "image", &index);
        assert!(names.iter().any(|m| m == n), "{}: row for {n}, but {} holds no such image", index.display(), images.display());
    }
    let found = names.into_iter().map(|n| {
        let row = rows.iter().find(|r| r.get("image").is_some_and(|m| *m == n)).cloned();
        (n, row)
    });
    (index, found.collect())
}

fn field<'a>(row: &'a Row, k: &str, path: &Path) -> &'a str {
    row.get(k).map(String::as_str).unwrap_or_else(|| panic!("{}: no column {k}", path.display()))
}

fn number(row: &Row, k: &str, path: &Path) -> f64 {
    let v = field(row, k, path);
    v.parse().unwrap_or_else(|_| panic!("{}: column {k}: not a number: {v:?}", path.display()))
}

/// The UTC time of a row's `Date` (YYYYMMDD) and local `Time` (HHMMSS, leading zeros dropped).
fn utc_time(row: &Row, path: &Path) -> DateTime<Utc> {
    let (d, t) = (field(row, "Date", path), field(row, "Time", path));
    let date = NaiveDate::parse_from_str(d, "%Y%m%d").unwrap_or_else(|e| panic!("{}: Date {d:?}: {e}", path.display()));
    let time = NaiveTime::parse_from_str(&format!("{t:0>6}"), "%H%M%S").unwrap_or_else(|e| panic!("{}: Time {t:?}: {e}", path.display()));
    NaiveDateTime::new(date, time).and_utc() - chrono::Duration::hours(UTC_OFFSET_H)
}

/// Per-pixel geometry of a rectilinear (pinhole) view `fov_deg` wide, looking at `elev_deg` above
/// the horizon toward azimuth `az_deg` (clockwise from north), not rolled (image up toward the
/// zenith, right clockwise in azimuth). Pixels below the horizon are outside the sky (NaN).
fn pinhole_geometry(w: u32, h: u32, elev_deg: f64, az_deg: f64, fov_deg: f64) -> ImageGeometry {
    let (e, a) = (elev_deg.to_radians(), az_deg.to_radians());
    let fwd = [a.sin() * e.cos(), a.cos() * e.cos(), e.sin()];
    let right = [a.cos(), -a.sin(), 0.0];
    let up = [-a.sin() * e.sin(), -a.cos() * e.sin(), e.cos()];
    let f = f64::from(w) / 2.0 / (fov_deg.to_radians() / 2.0).tan();
    let (cx, cy) = (f64::from(w) / 2.0, f64::from(h) / 2.0);
    let n = (w * h) as usize;
    let (mut z_deg, mut dir) = (Vec::with_capacity(n), Vec::with_capacity(n));
    for y in 0..h {
        for x in 0..w {
            let (u, v) = (f64::from(x) + 0.5 - cx, cy - (f64::from(y) + 0.5));
            let d: [f64; 3] = std::array::from_fn(|k| f * fwd[k] + u * right[k] + v * up[k]);
            let norm = (d[0] * d[0] + d[1] * d[1] + d[2] * d[2]).sqrt();
            let d = d.map(|c| c / norm);
            if d[2] > 0.0 {
                z_deg.push(d[2].acos().to_degrees() as f32);
                dir.push(d.map(|c| c as f32));
            } else {
                z_deg.push(f32::NAN);
                dir.push([0.0; 3]);
            }
        }
    }
    ImageGeometry { width: w, height: h, z_deg, dir }
}

/// Share of the pixels whose call (`cloud(i)`) agrees with the mask (cloud where it reads ≥ 128).
fn accuracy(mask: &image::GrayImage, cloud: impl Fn(usize) -> bool) -> f64 {
    let ok = mask.as_raw().iter().enumerate().filter(|(i, m)| cloud(*i) == (**m >= 128)).count();
    ok as f64 / mask.as_raw().len() as f64
}

fn red_blue(raw: &[u8], i: usize) -> f64 {
    f64::from(raw[3 * i]) / f64::from(raw[3 * i + 2]).max(1.0)
}

fn mean(v: &[f64]) -> f64 {
    v.iter().sum::<f64>() / v.len() as f64
}

fn lowest(v: &[f64]) -> f64 {
    v.iter().cloned().fold(f64::INFINITY, f64::min)
}

/// SWIMSEG: the engine's segmentation (default parameters, no learned clear-sky library: the
/// parametric reference with its per-frame offset) against the masks, beside a fixed R/B
/// threshold. Thin and thick both count as cloud; pixels left unknown count as wrong (the masks
/// label every pixel).
///
/// Known shortfalls (measured over the 41 shared patches, see README "How it is checked"):
/// * brightly exposed patches whose clear sky reads pale (mean level above 200, clear-sky R/B
///   0.78–0.83 against a parametric reference near 0.5) show less than the share of sky near the
///   reference that the per-frame offset needs, so they keep offset 0 and their clear sky is called
///   cloud (0126, 0926, 0976, 1001: ours 0.99–1.00 cloud against 0.44–0.84 labelled);
/// * a veil over blue sky that the annotators drew as cloud reads clear or thin-but-below-threshold
///   (0326: 0.26 cloud against 0.78 labelled; 0776, 0751, 0576);
/// * one fixed threshold tuned on these very patches (an upper bound for any fixed threshold, not a
///   fair baseline) is printed too.
#[test]
fn swimseg_pixel_accuracy() {
    let Some(root) = common::datasets() else { return };
    let dir = root.join("swimseg");
    let (index, found) = patches(&dir);
    let observer = Observer::new(SITE_LAT_DEG, SITE_LON_DEG, 0.0);
    let params = SegmentParams::default();
    let thresholds: Vec<f64> = (40..=120).map(|t| f64::from(t) / 100.0).collect();
    let (mut accs, mut base_accs, mut unknown_share) = (vec![], vec![], vec![]);
    let mut tuned = vec![0.0; thresholds.len()];
    let mut no_row = vec![];
    eprintln!("image     elev  az   sun elev/az     sun-view  accuracy  R/B≥{FIXED_RB_THRESHOLD}  unknown  cloud (ours / labels)  offset");
    for (name, row) in &found {
        // Without its row a patch has no view direction or time to place it by.
        let Some(row) = row else {
            no_row.push(name.as_str());
            continue;
        };
        let img = image::open(dir.join("images").join(name)).unwrap_or_else(|e| panic!("{name}: {e}")).to_rgb8();
        let gt_name = field(row, "gt", &index);
        let mask = image::open(dir.join("GTmaps").join(gt_name)).unwrap_or_else(|e| panic!("{gt_name}: {e}")).to_luma8();
        assert_eq!(img.dimensions(), mask.dimensions(), "{name}: image and mask sizes differ");
        let (elev, az) = (number(row, "Elevation", &index), number(row, "Azimuth", &index));
        let geom = pinhole_geometry(img.width(), img.height(), elev, az, PATCH_FOV_DEG);
        let sun = position(&utc_time(row, &index), &observer).expect("sun position");
        let sd = sun.direction_enu();
        let sun_dir = [sd[0] as f32, sd[1] as f32, sd[2] as f32];
        let seg = segment_image(&img, &geom, Some(sun_dir), &params, &Reference::default());
        let class = |i: usize| Class::from_u8(seg.classes.as_raw()[i]);
        let is_cloud = |i: usize| matches!(class(i), Class::Thin | Class::Thick);
        let acc = accuracy(&mask, is_cloud);
        let raw = img.as_raw();
        let base = accuracy(&mask, |i| red_blue(raw, i) >= FIXED_RB_THRESHOLD);
        for (t, a) in thresholds.iter().zip(tuned.iter_mut()) {
            *a += accuracy(&mask, |i| red_blue(raw, i) >= *t);
        }
        let n = mask.as_raw().len();
        let unknown = (0..n).filter(|&i| class(i) == Class::Unknown).count() as f64 / n as f64;
        let ours_cloud = (0..n).filter(|&i| is_cloud(i)).count() as f64 / n as f64;
        let lab_cloud = mask.as_raw().iter().filter(|m| **m >= 128).count() as f64 / n as f64;
        let (e, a) = (elev.to_radians(), az.to_radians());
        let centre = [a.sin() * e.cos(), a.cos() * e.cos(), e.sin()];
        let sun_view = (centre[0] * sd[0] + centre[1] * sd[1] + centre[2] * sd[2]).clamp(-1.0, 1.0).acos().to_degrees();
        eprintln!(
            "{name:<9} {elev:>4} {az:>4}  {:>5.1} / {:>5.1}  {sun_view:>6.1}     {acc:.3}     {base:.3}     {unknown:.3}    {ours_cloud:.3} / {lab_cloud:.3}        {:+.3}",
            sun.elevation_rad().to_degrees(),
            sun.azimuth_rad.to_degrees(),
            seg.offset
        );
        accs.push(acc);
        base_accs.push(base);
        unknown_share.push(unknown);
    }
    if !no_row.is_empty() {
        eprintln!("SWIMSEG: {} image(s) without an index.csv row, not scored: {}", no_row.len(), no_row.join(", "));
    }
    assert!(!accs.is_empty(), "{}: no patch with its row to score", dir.display());
    let (best, best_t) = tuned.iter().zip(&thresholds).map(|(a, t)| (a / accs.len() as f64, *t)).fold((0.0, 0.0), |b, x| if x.0 > b.0 { x } else { b });
    let (m, m_base) = (mean(&accs), mean(&base_accs));
    eprintln!("SWIMSEG over {} patches: mean pixel accuracy {m:.4}, lowest {:.4} (unknown share {:.4})", accs.len(), lowest(&accs), mean(&unknown_share));
    eprintln!("  fixed R/B ≥ {FIXED_RB_THRESHOLD} (Long et al. 2006, value from memory): mean {m_base:.4}, lowest {:.4}", lowest(&base_accs));
    eprintln!("  one fixed R/B threshold tuned on these patches (not a fair baseline): {best_t:.2} → mean {best:.4}");
    // 0.857 measured over the 41 shared patches; their accuracies spread by about 0.12, so the
    // mean of a sample that size is known to about ±0.02: the floor sits 1.5 of that below.
    assert!(m >= 0.83, "mean accuracy {m:.4} below 0.83");
    assert!(m >= m_base - 0.02, "mean accuracy {m:.4} more than 0.02 below the fixed threshold's {m_base:.4}");
}

/// Night patches of SWINSEG (`index.csv`: `Date`, local `Time`, no view direction): every image
/// found, with its UTC time when its row gives one.
fn night_patches(root: &Path) -> Vec<(String, Option<DateTime<Utc>>, image::RgbImage)> {
    let dir = root.join("swinseg");
    let (index, found) = patches(&dir);
    assert!(!found.is_empty(), "{}: no images", dir.join("images").display());
    found
        .into_iter()
        .map(|(name, row)| {
            let img = image::open(dir.join("images").join(&name)).unwrap_or_else(|e| panic!("{name}: {e}")).to_rgb8();
            let t = row.map(|r| utc_time(&r, &index));
            (name, t, img)
        })
        .collect()
}

/// SWINSEG: every night patch is refused by the frame QC twice over: by its time (the sun below
/// `qc.min_sun_elevation_deg`) and, were its time wrong, by its pixels. These patches are brightened
/// by long exposures (1–30 s) to a mean level of 60–100, well above `qc.min_mean_level` (20), so
/// the exposure check alone passes them; they are refused as not daylight (`qc.max_sky_red_blue`:
/// city light makes the night sky orange, mean R/B 1.10–1.46 here, against at most 0.93 for any
/// daytime frame we hold).
#[test]
fn swinseg_night_frames_are_refused() {
    let Some(root) = common::datasets() else { return };
    let patches = night_patches(&root);
    let observer = Observer::new(SITE_LAT_DEG, SITE_LON_DEG, 0.0);
    let qc = QcParams::default();
    eprintln!("image    local time           sun elev  by time                          mean level  R/B   by pixels");
    let (mut min_rb, mut max_level) = (f64::INFINITY, 0.0f64);
    let mut timeless = 0;
    for (name, t, img) in &patches {
        let (by_time, elev, local) = match t {
            Some(t) => (
                Some(judge_sun(t, &observer, qc.min_sun_elevation_deg)),
                position(t, &observer).expect("sun position").elevation_rad().to_degrees(),
                (*t + chrono::Duration::hours(UTC_OFFSET_H)).format("%Y-%m-%d %H:%M:%S").to_string(),
            ),
            None => (None, f64::NAN, "no time (no row)".into()),
        };
        let levels = SkyLevels::measure(img.pixels().map(|p| p.0));
        let by_pixels = judge_sky(&levels, &qc);
        let time_verdict = match &by_time {
            Some(Err(r)) => r.to_string(),
            Some(Ok(_)) => "ACCEPTED".into(),
            None => "-".into(),
        };
        eprintln!(
            "{name:<8} {local:<19}  {elev:>6.1}°   {time_verdict:<32} {:>6.1}    {:.2}  {}",
            levels.mean_level,
            levels.red_blue,
            by_pixels.as_ref().err().map(ToString::to_string).unwrap_or_else(|| "ACCEPTED".into())
        );
        match by_time {
            Some(v) => assert!(matches!(v, Err(Rejection::SunTooLow(e)) if e < 0.0), "{name}: not refused by its time: {v:?}"),
            None => timeless += 1,
        }
        let why = by_pixels.expect_err(&format!("{name}: its pixels pass the frame QC"));
        assert!(matches!(why.code(), "not_daylight" | "under_exposed"), "{name}: refused as {why}");
        min_rb = min_rb.min(levels.red_blue);
        max_level = max_level.max(levels.mean_level);
    }
    eprintln!(
        "SWINSEG: {} night patches, every one refused by its pixels and every one of the {} with a time by that time too (least mean R/B {min_rb:.2}, brightest mean level {max_level:.1})",
        patches.len(),
        patches.len() - timeless
    );
}

/// The same night patches given to the whole engine (the demo site, its camera) stamped with a
/// daytime time, as a camera with a wrong clock would send them: each is refused, not mapped. With
/// `qc.max_sky_red_blue` turned off (100) the engine's other checks pass them and it maps them as a
/// daytime sky (printed: 12 of the 12 shared patches, cloud fraction 0.99–1.00).
#[test]
fn swinseg_night_frames_with_a_daytime_time_are_not_mapped() {
    let Some(root) = common::datasets() else { return };
    let patches = night_patches(&root);
    let site = Site::load(&Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).expect("demo site");
    let (w, h) = (site.camera.width_px, site.camera.height_px);
    let day = DateTime::parse_from_rfc3339("2026-06-14T08:30:00Z").unwrap().to_utc();
    assert!(judge_sun(&day, &site.file.site.observer(), site.file.qc.min_sun_elevation_deg).is_ok(), "the demo site's sun is up then");
    let mut unguarded_site = site.clone();
    unguarded_site.file.qc.max_sky_red_blue = 100.0;
    let mut nc = Nowcaster::new(site, None, None);
    let mut unguarded = Nowcaster::new(unguarded_site, None, None);
    let mut mapped_unguarded = 0;
    for (k, (name, _, img)) in patches.iter().enumerate() {
        // The patch stretched over the whole frame, so every sky pixel of the map reads night sky.
        let frame = Frame { time: day + chrono::Duration::seconds(30 * k as i64), image: image::imageops::resize(img, w, h, image::imageops::FilterType::Triangle) };
        let without = match unguarded.step(&frame) {
            Ok(n) => {
                mapped_unguarded += 1;
                format!("mapped, cloud fraction {:.3}", n.cloud_fraction)
            }
            Err(r) => format!("refused: {r}"),
        };
        match nc.step(&frame) {
            Err(r) => {
                eprintln!("{name}: refused: {r}  (without the colour check: {without})");
                assert!(matches!(r.code(), "not_daylight" | "under_exposed"), "{name}: refused as {r}");
            }
            Ok(n) => panic!("{name}: a night frame stamped with a daytime time was mapped (cloud fraction {:.3})", n.cloud_fraction),
        }
    }
    eprintln!("SWINSEG through the engine with a daytime time: {} of {} refused; without the colour check {mapped_unguarded} would be mapped", patches.len(), patches.len());
}
