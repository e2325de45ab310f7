//! Verification: forecast errors and skill per horizon, motion error, segmentation accuracy.
//!
//! * RMSE, MAE, MBE of GHI per horizon.
//! * Skill against smart persistence, `s = 1 − RMSE_forecast / RMSE_persistence` (Coimbra, Kleissl
//!   & Marquez 2013), where smart persistence keeps the clear-sky index `k* = GHI / GHI_clear` of the
//!   issue time and applies it to the clear-sky GHI at the target time.
//! * Motion: speed and direction error of the filtered motion against a scene's truth.
//! * Segmentation: share of pixels whose class (clear / thin / thick) matches a truth mask, at zenith
//!   < 70° outside 10° around the sun, and in the circumsolar ring 5–15° from the sun.
//!
//! # References
//! * C. F. M. Coimbra, J. Kleissl, R. Marquez, "Overview of solar-forecasting methods and a metric for
//!   accuracy evaluation", in J. Kleissl (ed.), *Solar Energy Forecasting and Resource Assessment*,
//!   Academic Press, 2013, ch. 8.

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use chrono::{DateTime, Utc};
use serde::Serialize;

use crate::config::Site;
use crate::io::{InputError, parse_time};
use crate::segment::{Class, ImageGeometry, gamma_deg, segment_image};

/// Root-mean-square error of pairs (forecast, observed).
pub fn rmse(pairs: &[(f64, f64)]) -> f64 {
    (pairs.iter().map(|(f, o)| (f - o).powi(2)).sum::<f64>() / pairs.len() as f64).sqrt()
}

/// Mean absolute error.
pub fn mae(pairs: &[(f64, f64)]) -> f64 {
    pairs.iter().map(|(f, o)| (f - o).abs()).sum::<f64>() / pairs.len() as f64
}

/// Mean bias error (forecast − observed).
pub fn mbe(pairs: &[(f64, f64)]) -> f64 {
    pairs.iter().map(|(f, o)| f - o).sum::<f64>() / pairs.len() as f64
}

/// Skill against a reference: `1 − RMSE_forecast / RMSE_reference`.
pub fn skill(rmse_forecast: f64, rmse_reference: f64) -> f64 {
    1.0 - rmse_forecast / rmse_reference
}

/// Scores at one horizon.
#[derive(Debug, Clone, Serialize)]
pub struct HorizonScore {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Pairs scored.
    pub n: usize,
    /// RMSE \[W m⁻²\].
    pub rmse_wm2: f64,
    /// MAE \[W m⁻²\].
    pub mae_wm2: f64,
    /// MBE \[W m⁻²\].
    pub mbe_wm2: f64,
    /// Mean observed GHI \[W m⁻²\].
    pub mean_observed_wm2: f64,
    /// RMSE normalised by the mean observed GHI.
    pub nrmse: f64,
    /// RMSE of smart persistence \[W m⁻²\].
    pub rmse_persistence_wm2: f64,
    /// Skill against smart persistence (NaN at horizon 0, where persistence is exact).
    pub skill: f64,
}

/// Truth irradiance of a synthetic sequence: (time, target) → (GHI, clear-sky GHI).
#[derive(Debug, Clone, Default)]
pub struct Truth {
    map: HashMap<(DateTime<Utc>, String), (f64, f64)>,
    beam: HashMap<(DateTime<Utc>, String), (f64, f64)>,
    /// The plant's (time, GHI, clear-sky GHI), sorted by time.
    plant: Vec<(DateTime<Utc>, f64, f64)>,
}

fn csv_err(path: &Path, e: csv::Error) -> InputError {
    InputError::Csv { file: path.into(), line: e.position().map(|p| p.line()).unwrap_or(0), message: e.to_string() }
}

/// Read a CSV into rows of name → text.
pub fn read_rows(path: &Path) -> Result<Vec<HashMap<String, String>>, InputError> {
    let mut rdr = csv::ReaderBuilder::new().comment(Some(b'#')).from_path(path).map_err(|e| csv_err(path, e))?;
    let h = rdr.headers().map_err(|e| csv_err(path, e))?.clone();
    let mut rows = vec![];
    for r in rdr.records() {
        let r = r.map_err(|e| csv_err(path, e))?;
        rows.push(h.iter().zip(r.iter()).map(|(a, b)| (a.to_string(), b.to_string())).collect());
    }
    Ok(rows)
}

fn num(path: &Path, row: &HashMap<String, String>, k: &str) -> Result<f64, InputError> {
    let v = row.get(k).ok_or_else(|| InputError::Other { file: path.into(), message: format!("missing column {k}") })?;
    v.parse().map_err(|_| InputError::Other { file: path.into(), message: format!("column {k}: expected a number, got {v:?}") })
}

fn time(path: &Path, row: &HashMap<String, String>, k: &str) -> Result<DateTime<Utc>, InputError> {
    parse_time(k, row.get(k).map(String::as_str).unwrap_or("")).map_err(|m| InputError::Other { file: path.into(), message: m })
}

impl Truth {
    /// Read `truth/irradiance.csv`.
    ///
    /// # Errors
    /// Unreadable or malformed file.
    pub fn read(path: &Path) -> Result<Truth, InputError> {
        let mut t = Truth::default();
        for r in read_rows(path)? {
            let key = (time(path, &r, "time_utc")?, r["target"].clone());
            t.map.insert(key.clone(), (num(path, &r, "ghi_wm2")?, num(path, &r, "ghi_clear_wm2")?));
            t.beam.insert(key, (num(path, &r, "dni_wm2")?, num(path, &r, "dhi_wm2")?));
        }
        t.plant = t.map.iter().filter(|(k, _)| k.1 == crate::plant::PLANT_TARGET).map(|(k, v)| (k.0, v.0, v.1)).collect();
        t.plant.sort_by_key(|x| x.0);
        Ok(t)
    }

    /// The plant's clear-sky index `GHI / GHI_clear` at the truth sample nearest `t` (within 30 s);
    /// NaN without one or with a clear-sky GHI under 50 W/m².
    pub fn plant_kc_at(&self, t: &DateTime<Utc>) -> f64 {
        let i = self.plant.partition_point(|x| x.0 < *t);
        let near = [i.checked_sub(1), Some(i)].into_iter().flatten().filter_map(|k| self.plant.get(k)).min_by_key(|x| (x.0 - *t).num_milliseconds().abs());
        match near {
            Some(&(s, ghi, clear)) if (s - *t).num_milliseconds().abs() <= 30_000 && clear >= 50.0 => ghi / clear,
            _ => f64::NAN,
        }
    }

    /// GHI and clear-sky GHI of a target at a time.
    pub fn at(&self, t: &DateTime<Utc>, target: &str) -> Option<(f64, f64)> {
        self.map.get(&(*t, target.to_string())).copied()
    }
}

/// Score a replay's `forecasts.csv` against truth for one target (a block or `plant`).
///
/// # Errors
/// Unreadable or malformed forecasts.
pub fn score_forecasts(forecasts: &Path, truth: &Truth, target: &str) -> Result<Vec<HorizonScore>, InputError> {
    // Per horizon: (forecast, truth) pairs and (persistence, truth) pairs.
    type Pairs = Vec<(f64, f64)>;
    let mut by_h: std::collections::BTreeMap<u32, (Pairs, Pairs)> = Default::default();
    for r in read_rows(forecasts)? {
        if r.get("block").map(String::as_str) != Some(target) {
            continue;
        }
        let issue = time(forecasts, &r, "issue_time_utc")?;
        let tt = time(forecasts, &r, "target_time_utc")?;
        let h = num(forecasts, &r, "horizon_s")? as u32;
        let f = num(forecasts, &r, "ghi_wm2")?;
        let (Some((obs, clear_t)), Some((obs_i, clear_i))) = (truth.at(&tt, target), truth.at(&issue, target)) else { continue };
        if clear_t < 50.0 || clear_i < 50.0 {
            continue;
        }
        let p = obs_i / clear_i * clear_t;
        let e = by_h.entry(h).or_default();
        e.0.push((f, obs));
        e.1.push((p, obs));
    }
    Ok(by_h
        .into_iter()
        .map(|(h, (fc, pe))| {
            let r = rmse(&fc);
            let rp = rmse(&pe);
            let mean_obs = fc.iter().map(|p| p.1).sum::<f64>() / fc.len() as f64;
            HorizonScore {
                horizon_s: h,
                n: fc.len(),
                rmse_wm2: r,
                mae_wm2: mae(&fc),
                mbe_wm2: mbe(&fc),
                mean_observed_wm2: mean_obs,
                nrmse: r / mean_obs,
                rmse_persistence_wm2: rp,
                skill: if rp > 1e-6 { skill(r, rp) } else { f64::NAN },
            }
        })
        .collect())
}

/// Motion error against a scene's truth.
#[derive(Debug, Clone, Serialize)]
pub struct MotionScore {
    /// Frames with a motion estimate.
    pub frames: usize,
    /// Median absolute speed error \[m/s\].
    pub speed_error_mps: f64,
    /// Median absolute direction error \[°\].
    pub direction_error_deg: f64,
    /// Share of frames (with two truth layers) where both were found: the forecast's two tracked
    /// layers lie within 1.5 m/s of the two truth layers' apparent vectors, one each.
    pub second_layer_found_share: Option<f64>,
}

fn med(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

/// Score `motion.csv` against `truth/layers.csv`. The first truth layer (the lowest) is the one the
/// site's cloud base height describes; a higher layer appears on that plane with its speed scaled by
/// `h_low / h_high`.
///
/// # Errors
/// Unreadable or malformed files.
pub fn score_motion(motion: &Path, layers: &Path) -> Result<MotionScore, InputError> {
    let truth: Vec<([f64; 2], f64)> = read_rows(layers)?
        .iter()
        .map(|r| Ok(([num(layers, r, "wind_east_mps")?, num(layers, r, "wind_north_mps")?], num(layers, r, "base_height_m")?)))
        .collect::<Result<_, InputError>>()?;
    let Some(&(v0, h0)) = truth.first() else {
        return Ok(MotionScore { frames: 0, speed_error_mps: f64::NAN, direction_error_deg: f64::NAN, second_layer_found_share: None });
    };
    let second = truth.get(1).map(|(v, h)| [v[0] * h0 / h, v[1] * h0 / h]);
    let (mut se, mut de, mut found, mut two_frames) = (vec![], vec![], 0usize, 0usize);
    for (k, r) in read_rows(motion)?.iter().enumerate() {
        let (Ok(e), Ok(n)) = (num(motion, r, "east_mps"), num(motion, r, "north_mps")) else { continue };
        if k < 3 {
            continue;
        }
        se.push((e.hypot(n) - v0[0].hypot(v0[1])).abs());
        let mut d = (e.atan2(n) - v0[0].atan2(v0[1])).to_degrees().abs() % 360.0;
        d = d.min(360.0 - d);
        de.push(d);
        if let Some(s2) = second {
            two_frames += 1;
            let near = |v: [f64; 2], t: [f64; 2]| (v[0] - t[0]).hypot(v[1] - t[1]) < 1.5;
            if let (Ok(e2), Ok(n2)) = (num(motion, r, "second_east_mps"), num(motion, r, "second_north_mps")) {
                let (p, q) = ([e, n], [e2, n2]);
                if (near(p, v0) && near(q, s2)) || (near(p, s2) && near(q, v0)) {
                    found += 1;
                }
            }
        }
    }
    Ok(MotionScore {
        frames: se.len(),
        speed_error_mps: med(se),
        direction_error_deg: med(de),
        second_layer_found_share: second.map(|_| found as f64 / two_frames.max(1) as f64),
    })
}

/// Segmentation accuracy against truth masks.
#[derive(Debug, Clone, Serialize)]
pub struct SegmentationScore {
    /// Frames scored.
    pub frames: usize,
    /// Share correct at zenith < 70°, more than 10° from the sun (all frames pooled).
    pub accuracy: f64,
    /// Lowest per-frame accuracy.
    pub worst_frame_accuracy: f64,
    /// Share correct 5–15° from the sun.
    pub circumsolar_accuracy: f64,
    /// Share correct when thin and thick are pooled as "cloud".
    pub binary_accuracy: f64,
}

/// Segment every frame of a synthetic sequence that has a truth mask and score it.
///
/// # Errors
/// Unreadable site, frames or masks.
pub fn score_segmentation(sequence: &Path) -> Result<SegmentationScore, EvalError> {
    let site = Site::load(&sequence.join("site.toml"))?;
    let geom = ImageGeometry::from_camera(&site.camera, site.obstruction.as_ref());
    let frames_csv = sequence.join("truth").join("frames.csv");
    // The engine's starting reference: the camera's clear-sky library when the calibration has one.
    let mut reference = site.clear_reference.clone().unwrap_or_default();
    let (mut ok, mut n, mut cok, mut cn, mut bok) = (0usize, 0usize, 0usize, 0usize, 0usize);
    let mut worst = 1.0f64;
    let mut frames = 0;
    for r in read_rows(&frames_csv)? {
        let mask_name = r.get("truth_mask").cloned().unwrap_or_default();
        if mask_name.is_empty() {
            continue;
        }
        let t = time(&frames_csv, &r, "time_utc")?;
        let img = crate::intake::read_frame(&sequence.join("frames").join(&r["frame"]), &crate::intake::IntakeOptions::expecting(site.camera.width_px, site.camera.height_px))?;
        let mask_path = sequence.join("truth").join("masks").join(&mask_name);
        let mask = image::open(&mask_path).map_err(|source| EvalError::Image { file: mask_path.clone(), source })?.to_luma8();
        let sun = crate::sun::position(&t, &site.observer())?;
        let sd = sun.direction_enu();
        let sun_dir = Some([sd[0] as f32, sd[1] as f32, sd[2] as f32]);
        let seg = segment_image(&img, &geom, sun_dir, &site.file.segment, &reference);
        let raw = img.as_raw();
        let sample = (0..geom.z_deg.len()).step_by(3).filter(|&i| !geom.z_deg[i].is_nan()).map(|i| {
            ([raw[3 * i], raw[3 * i + 1], raw[3 * i + 2]], crate::segment::PixelGeom { z_deg: geom.z_deg[i], gamma_deg: gamma_deg(geom.dir[i], sun_dir) })
        });
        reference.learn_if_clear(&site.file.segment, seg.cloud_fraction, sample);
        let (mut fok, mut fn_) = (0usize, 0usize);
        for i in 0..geom.z_deg.len() {
            let tr = mask.as_raw()[i];
            if tr == Class::Unknown as u8 || geom.z_deg[i].is_nan() || geom.z_deg[i] >= 70.0 {
                continue;
            }
            let ours = seg.classes.as_raw()[i];
            let g = gamma_deg(geom.dir[i], sun_dir);
            let same = ours == tr;
            if (5.0..15.0).contains(&g) {
                cn += 1;
                cok += same as usize;
            }
            if g > 10.0 {
                fn_ += 1;
                fok += same as usize;
                let cloud = |c: u8| c == Class::Thin as u8 || c == Class::Thick as u8;
                bok += (cloud(ours) == cloud(tr)) as usize;
            }
        }
        ok += fok;
        n += fn_;
        if fn_ > 0 {
            worst = worst.min(fok as f64 / fn_ as f64);
        }
        frames += 1;
    }
    Ok(SegmentationScore {
        frames,
        accuracy: ok as f64 / n.max(1) as f64,
        worst_frame_accuracy: worst,
        circumsolar_accuracy: if cn > 0 { cok as f64 / cn as f64 } else { f64::NAN },
        binary_accuracy: bok as f64 / n.max(1) as f64,
    })
}

/// How often the truth falls inside the P10–P90 band, per horizon.
#[derive(Debug, Clone, Serialize)]
pub struct BandScore {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Pairs scored.
    pub n: usize,
    /// Share of truths inside \[P10, P90\] (ideal 0.8).
    pub coverage: f64,
    /// Mean band width \[W m⁻²\].
    pub mean_width_wm2: f64,
    /// Mean continuous ranked probability score of the ensemble \[W m⁻²\] (NaN without members).
    pub crps_wm2: f64,
}

/// CRPS of an ensemble against an observation: `E|X − y| − ½ E|X − X′|` (Gneiting & Raftery,
/// *J. Am. Stat. Assoc.* 102:359, 2007, eq. 20).
pub fn crps_ensemble(members: &[f64], y: f64) -> f64 {
    let n = members.len() as f64;
    if n == 0.0 {
        return f64::NAN;
    }
    let a = members.iter().map(|x| (x - y).abs()).sum::<f64>() / n;
    let mut b = 0.0;
    for x in members {
        for z in members {
            b += (x - z).abs();
        }
    }
    a - 0.5 * b / (n * n)
}

/// Coverage of the plant-mean GHI band.
///
/// # Errors
/// Unreadable or malformed forecasts.
pub fn score_bands(forecasts: &Path, truth: &Truth, target: &str) -> Result<Vec<BandScore>, InputError> {
    let mut by_h: std::collections::BTreeMap<u32, (usize, usize, f64)> = Default::default();
    for r in read_rows(forecasts)? {
        if r.get("block").map(String::as_str) != Some(target) {
            continue;
        }
        let (Ok(lo), Ok(hi)) = (num(forecasts, &r, "ghi_p10_wm2"), num(forecasts, &r, "ghi_p90_wm2")) else { continue };
        let tt = time(forecasts, &r, "target_time_utc")?;
        let Some((obs, clear)) = truth.at(&tt, target) else { continue };
        if clear < 50.0 {
            continue;
        }
        let e = by_h.entry(num(forecasts, &r, "horizon_s")? as u32).or_default();
        e.0 += 1;
        e.1 += (obs >= lo && obs <= hi) as usize;
        e.2 += hi - lo;
    }
    // CRPS from the members, when the replay wrote them.
    let mut crps: BTreeMap<u32, (f64, usize)> = BTreeMap::new();
    let members_csv = forecasts.with_file_name("ensemble_plant.csv");
    if target == crate::plant::PLANT_TARGET && members_csv.is_file() {
        let mut groups: BTreeMap<(DateTime<Utc>, u32), Vec<f64>> = BTreeMap::new();
        for r in read_rows(&members_csv)? {
            let t = time(&members_csv, &r, "issue_time_utc")?;
            groups.entry((t, num(&members_csv, &r, "horizon_s")? as u32)).or_default().push(num(&members_csv, &r, "plant_ghi_wm2")?);
        }
        for ((t, h), ms) in groups {
            let tt = t + chrono::Duration::seconds(h as i64);
            if let Some((obs, clear)) = truth.at(&tt, target)
                && clear >= 50.0 {
                    let e = crps.entry(h).or_insert((0.0, 0));
                    e.0 += crps_ensemble(&ms, obs);
                    e.1 += 1;
                }
        }
    }
    Ok(by_h
        .into_iter()
        .map(|(h, (n, inside, w))| BandScore {
            horizon_s: h,
            n,
            coverage: inside as f64 / n.max(1) as f64,
            mean_width_wm2: w / n.max(1) as f64,
            crps_wm2: crps.get(&h).map(|c| c.0 / c.1.max(1) as f64).unwrap_or(f64::NAN),
        })
        .collect())
}

/// Ramp detection at a lead time, as a contingency over issue times.
#[derive(Debug, Clone, Serialize)]
pub struct RampScore {
    /// Lead time scored \[s\].
    pub lead_s: f64,
    /// Matching window around it \[s\].
    pub window_s: f64,
    /// Least probability for a forecast ramp to count.
    pub min_probability: f64,
    /// Ramps in the truth's plant power (whole series).
    pub truth_ramps: usize,
    /// Hits.
    pub hits: usize,
    /// Misses.
    pub misses: usize,
    /// False alarms.
    pub false_alarms: usize,
    /// Probability of detection, hits / (hits + misses).
    pub pod: f64,
    /// False-alarm ratio, false / (hits + false).
    pub far: f64,
    /// Critical success index, hits / (hits + misses + false).
    pub csi: f64,
}

/// Plant AC power of the truth at 1-minute steps from its block irradiance (the same transposition
/// and power model as the forecast).
pub fn truth_power_kw(truth: &Truth, site: &Site, start: DateTime<Utc>, minutes: usize) -> Vec<(DateTime<Utc>, f64)> {
    let plant = crate::plant::Plant::from_section(&site.file.plant);
    let pw = site.file.power;
    let mut out = vec![];
    for m in 0..minutes {
        let t = start + chrono::Duration::minutes(m as i64);
        let Ok(sun) = crate::sun::position(&t, &site.observer()) else { continue };
        let (z, a) = (sun.apparent_zenith_rad, sun.azimuth_rad);
        let mut total = 0.0;
        let mut ok = true;
        for b in &plant.blocks {
            let key = (t, b.name.clone());
            let Some(&(ghi, _)) = truth.map.get(&key) else {
                ok = false;
                break;
            };
            let (dni, dhi) = truth.beam.get(&key).copied().unwrap_or((0.0, ghi));
            let irr = crate::clearsky::Irradiance { ghi_wm2: ghi, dni_wm2: dni, dhi_wm2: dhi };
            let (tilt, saz) = crate::forecast::block_plane(&b.mount, z, a);
            let poa = crate::forecast::poa_hay_davies(tilt, saz, z, a, &irr, sun.dni_extra_wm2(), site.file.irradiance.albedo);
            total += crate::power::block_ac_kw(poa, b.capacity_kw, b.ac_capacity_kw, pw.default_temp_air_c, pw.default_wind_speed_mps, &pw);
        }
        if ok {
            out.push((t, total));
        }
    }
    out
}

/// Score ramp events (`ramps.csv`) against ramps in the truth's plant power: for each issue time, a
/// forecast ramp is one with lead within `window_s` of `lead_s` and probability ≥ `min_probability`;
/// an observed ramp is one in the truth starting within the same window of issue + `lead_s`, in the
/// same direction for a hit.
///
/// # Errors
/// Unreadable files.
pub fn score_ramps(sequence: &Path, replay_out: &Path, truth: &Truth, lead_s: f64, window_s: f64, min_probability: f64) -> Result<RampScore, EvalError> {
    let site = Site::load(&sequence.join("site.toml"))?;
    let plant = crate::plant::Plant::from_section(&site.file.plant);
    let cap: f64 = plant.blocks.iter().map(|b| b.ac_capacity_kw.unwrap_or(b.capacity_kw / site.file.power.dc_ac_ratio)).sum();
    let issues: Vec<DateTime<Utc>> = {
        let mut v: Vec<DateTime<Utc>> = read_rows(&replay_out.join("frames.csv"))?
            .iter()
            .filter(|r| r.get("status").map(String::as_str) == Some("ok"))
            .filter_map(|r| parse_time("time_utc", &r["time_utc"]).ok())
            .collect();
        v.sort();
        v
    };
    let Some(&start) = issues.first() else {
        return Err(InputError::Other { file: replay_out.join("frames.csv"), message: "no frame was used (status ok), so there is nothing to score".into() }.into());
    };
    let minutes = (truth.map.keys().map(|k| k.0).max().map(|m| (m - start).num_minutes()).unwrap_or(0) + 1).max(0) as usize;
    let series = truth_power_kw(truth, &site, start, minutes);
    let values: Vec<f64> = series.iter().map(|x| x.1).collect();
    let truth_ramps: Vec<(DateTime<Utc>, crate::ramp::Direction)> = crate::ramp::find_ramps(&values, 1.0, cap, &site.file.ramps)
        .into_iter()
        .map(|r| (start + chrono::Duration::seconds((r.start_min * 60.0) as i64), r.direction))
        .collect();
    let events = read_rows(&replay_out.join("ramps.csv"))?;
    let (mut hits, mut misses, mut fa) = (0, 0, 0);
    let last_truth = series.last().map(|x| x.0).unwrap_or(start);
    for t in &issues {
        let centre = *t + chrono::Duration::seconds(lead_s as i64);
        if centre + chrono::Duration::seconds(window_s as i64) > last_truth {
            continue;
        }
        let fc: Vec<crate::ramp::Direction> = events
            .iter()
            .filter(|e| e.get("issue_time_utc").and_then(|x| parse_time("t", x).ok()) == Some(*t))
            .filter(|e| {
                let lead: f64 = e["lead_time_s"].parse().unwrap_or(f64::NAN);
                let p: f64 = e["probability"].parse().unwrap_or(0.0);
                (lead - lead_s).abs() <= window_s && p >= min_probability
            })
            .map(|e| if e["direction"] == "up" { crate::ramp::Direction::Up } else { crate::ramp::Direction::Down })
            .collect();
        let obs: Vec<crate::ramp::Direction> =
            truth_ramps.iter().filter(|(s, _)| (*s - centre).num_seconds().abs() as f64 <= window_s).map(|x| x.1).collect();
        match (fc.is_empty(), obs.is_empty()) {
            (false, false) if fc.iter().any(|d| obs.contains(d)) => hits += 1,
            (false, false) => {
                misses += 1;
                fa += 1;
            }
            (false, true) => fa += 1,
            (true, false) => misses += 1,
            (true, true) => {}
        }
    }
    let r = |a: usize, b: usize| if a + b > 0 { a as f64 / (a + b) as f64 } else { f64::NAN };
    Ok(RampScore {
        lead_s,
        window_s,
        min_probability,
        truth_ramps: truth_ramps.len(),
        hits,
        misses,
        false_alarms: fa,
        pod: r(hits, misses),
        far: r(fa, hits),
        csi: if hits + misses + fa > 0 { hits as f64 / (hits + misses + fa) as f64 } else { f64::NAN },
    })
}

/// A whole evaluation of a replay of a synthetic sequence.
#[derive(Debug, Clone, Serialize)]
pub struct Evaluation {
    /// Plant-mean GHI scores per horizon.
    pub plant: Vec<HorizonScore>,
    /// Plant-mean GHI band coverage per horizon.
    pub bands: Vec<BandScore>,
    /// Ramp detection at 5 minutes' lead.
    pub ramps: Option<RampScore>,
    /// Motion scores.
    pub motion: MotionScore,
    /// Segmentation scores.
    pub segmentation: SegmentationScore,
    /// The perfect-perception yardstick's scores per horizon (`truth/yardstick.csv`, when the
    /// sequence has one: `synth::yardstick`).
    pub yardstick: Option<Vec<HorizonScore>>,
}

/// Pooled skill over the horizons `from_s..=to_s`: one minus the ratio of the forecast's and smart
/// persistence's RMSE over all their pairs together (each horizon's mean squared error weighted by
/// its pairs): the pooled 5–15 min skill quoted for the independent scenes, from their scorer's
/// per-horizon table (`score.py` itself prints no pooled figure). NaN without pairs.
pub fn pooled_skill(scores: &[HorizonScore], from_s: u32, to_s: u32) -> f64 {
    let (mut f, mut p, mut n) = (0.0, 0.0, 0usize);
    for h in scores.iter().filter(|h| (from_s..=to_s).contains(&h.horizon_s) && h.n > 0) {
        f += h.rmse_wm2 * h.rmse_wm2 * h.n as f64;
        p += h.rmse_persistence_wm2 * h.rmse_persistence_wm2 * h.n as f64;
        n += h.n;
    }
    if n == 0 || p <= 0.0 { f64::NAN } else { 1.0 - (f / p).sqrt() }
}

/// Why an evaluation could not be made: a missing or malformed file of the sequence or the
/// replay, each naming the file.
#[derive(Debug, thiserror::Error)]
pub enum EvalError {
    /// The sequence's site or calibration file.
    #[error(transparent)]
    Config(#[from] crate::config::ConfigError),
    /// A table of the sequence or the replay.
    #[error(transparent)]
    Input(#[from] InputError),
    /// A frame of the sequence.
    #[error(transparent)]
    Frame(#[from] crate::intake::IntakeError),
    /// A truth mask.
    #[error("{file}: {source}")]
    Image {
        /// The mask file.
        file: std::path::PathBuf,
        /// What the decoder said.
        source: image::ImageError,
    },
    /// A frame time outside the solar position algorithm's range.
    #[error(transparent)]
    Sun(#[from] crate::sun::SunError),
}

/// Evaluate a replay (`replay_out`) of a synthetic sequence (`sequence`).
///
/// # Errors
/// Missing or malformed files.
pub fn evaluate(sequence: &Path, replay_out: &Path) -> Result<Evaluation, EvalError> {
    crate::output_set::check_manifest(replay_out)?;
    let truth = Truth::read(&sequence.join("truth").join("irradiance.csv"))?;
    let plant = score_forecasts(&replay_out.join("forecasts.csv"), &truth, crate::plant::PLANT_TARGET)?;
    let motion = score_motion(&replay_out.join("motion.csv"), &sequence.join("truth").join("layers.csv"))?;
    let segmentation = score_segmentation(sequence)?;
    let bands = score_bands(&replay_out.join("forecasts.csv"), &truth, crate::plant::PLANT_TARGET)?;
    let ramps = if replay_out.join("ramps.csv").is_file() { Some(score_ramps(sequence, replay_out, &truth, 300.0, 120.0, 0.5)?) } else { None };
    let yardstick_csv = sequence.join("truth").join("yardstick.csv");
    let yardstick = if yardstick_csv.is_file() { Some(score_forecasts(&yardstick_csv, &truth, crate::plant::PLANT_TARGET)?) } else { None };
    Ok(Evaluation { plant, bands, ramps, motion, segmentation, yardstick })
}

/// A score with `decimals` decimals, or "n/a" when it has no value (NaN or infinite: the skill at
/// horizon 0, where persistence is exact; CRPS without members).
pub fn fmt_score(v: f64, decimals: usize) -> String {
    if v.is_finite() { format!("{v:.decimals$}") } else { "n/a".to_string() }
}

/// Print an evaluation as a table.
pub fn print_evaluation(e: &Evaluation) {
    crate::say!("horizon  n     RMSE   MAE    MBE   nRMSE  RMSE(pers)  skill");
    for h in &e.plant {
        if h.horizon_s % 300 == 0 {
            crate::say!(
                "{:>4} min {:<5} {:>6.1} {:>6.1} {:>6.1} {:>6.3} {:>10.1} {:>6}",
                h.horizon_s / 60,
                h.n,
                h.rmse_wm2,
                h.mae_wm2,
                h.mbe_wm2,
                h.nrmse,
                h.rmse_persistence_wm2,
                fmt_score(h.skill, 3)
            );
        }
    }
    let pooled = pooled_skill(&e.plant, 300, 900);
    match &e.yardstick {
        Some(y) => {
            let yp = pooled_skill(y, 300, 900);
            let at = |m: u32| y.iter().find(|h| h.horizon_s == m * 60).map_or(f64::NAN, |h| h.skill);
            crate::say!(
                "pooled 5–15 min skill {} against the perfect-perception yardstick's {} (5 / 10 / 15 min {} / {} / {}): {} of it",
                fmt_score(pooled, 3),
                fmt_score(yp, 3),
                fmt_score(at(5), 2),
                fmt_score(at(10), 2),
                fmt_score(at(15), 2),
                fmt_score(pooled / yp, 2)
            );
        }
        None => crate::say!("pooled 5–15 min skill {} (no yardstick in this sequence)", fmt_score(pooled, 3)),
    }
    for b in &e.bands {
        if [300, 600, 900].contains(&b.horizon_s) {
            crate::say!("P10–P90 band at {:>2} min: covers {:.0} % of the truth, mean width {:.0} W/m², CRPS {:.1} W/m²", b.horizon_s / 60, 100.0 * b.coverage, b.mean_width_wm2, b.crps_wm2);
        }
    }
    if let Some(r) = &e.ramps {
        crate::say!(
            "ramps at {:.0} min lead (±{:.0} min, probability ≥ {:.1}): {} in the truth; hits {}, misses {}, false alarms {}: POD {:.2}, FAR {:.2}, CSI {:.2}",
            r.lead_s / 60.0, r.window_s / 60.0, r.min_probability, r.truth_ramps, r.hits, r.misses, r.false_alarms, r.pod, r.far, r.csi
        );
    }
    let m = &e.motion;
    crate::say!(
        "motion: {} frames, median speed error {:.2} m/s, median direction error {:.1}°{}",
        m.frames,
        m.speed_error_mps,
        m.direction_error_deg,
        m.second_layer_found_share.map(|s| format!(", second layer found in {:.0} % of frames", 100.0 * s)).unwrap_or_default()
    );
    let s = &e.segmentation;
    crate::say!(
        "segmentation: {} frames, {:.1} % correct (zenith < 70°, > 10° from the sun; worst frame {:.1} %), {:.1} % in the 5–15° ring, {:.1} % cloud/clear",
        s.frames,
        100.0 * s.accuracy,
        100.0 * s.worst_frame_accuracy,
        100.0 * s.circumsolar_accuracy,
        100.0 * s.binary_accuracy
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pooled_skill_weights_each_horizon_by_its_pairs() {
        let h = |s: u32, n: usize, f: f64, p: f64| HorizonScore { horizon_s: s, n, rmse_wm2: f, mae_wm2: 0.0, mbe_wm2: 0.0, mean_observed_wm2: 1.0, nrmse: 0.0, rmse_persistence_wm2: p, skill: skill(f, p) };
        // By hand: sqrt((3·100² + 1·200²) / (3·200² + 1·200²)) = sqrt(70000 / 160000) = 0.6614.
        let v = [h(60, 9, 1.0, 9.0), h(300, 3, 100.0, 200.0), h(900, 1, 200.0, 200.0)];
        assert!((pooled_skill(&v, 300, 900) - (1.0 - (70000f64 / 160000.0).sqrt())).abs() < 1e-12);
        assert!(pooled_skill(&v, 1000, 2000).is_nan());
    }

    #[test]
    fn metrics_by_hand() {
        // Errors +10, −20, +30, 0: RMSE = sqrt((100 + 400 + 900 + 0) / 4) = sqrt(350) = 18.708…,
        // MAE = 60 / 4 = 15, MBE = 20 / 4 = 5.
        let p = [(110.0, 100.0), (180.0, 200.0), (330.0, 300.0), (400.0, 400.0)];
        assert!((rmse(&p) - 350f64.sqrt()).abs() < 1e-12);
        assert_eq!(mae(&p), 15.0);
        assert_eq!(mbe(&p), 5.0);
        // Coimbra, Kleissl & Marquez 2013: s = 1 − RMSE_f / RMSE_ref; 1 − 60 / 80 = 0.25.
        assert_eq!(skill(60.0, 80.0), 0.25);
    }

    #[test]
    fn crps_by_hand() {
        // Members {0, 10}, observation 0: E|X − y| = 5, E|X − X′| = (0 + 10 + 10 + 0) / 4 = 5,
        // CRPS = 5 − 2.5 = 2.5. A single member reduces to the absolute error.
        assert_eq!(crps_ensemble(&[0.0, 10.0], 0.0), 2.5);
        assert_eq!(crps_ensemble(&[7.0], 3.0), 4.0);
    }
}
