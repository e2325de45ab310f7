//! Frame quality control: decide whether a frame can be used, and say why not.

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::nowcast::Rejection;
use crate::settings::{ConfigError, check_range};

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
    /// Frames whose time is further ahead of the system clock than this are rejected
    /// (`ahead_of_clock`) \[s\]; default 120 (camera and host both NTP-synchronised, a few seconds
    /// apart at most, plus the frame's exposure and transfer). 0 to 315 360 000 (ten years: a
    /// synthetic scene dated ahead of the host's clock can be replayed with a large value).
    pub max_ahead_of_clock_s: f64,
    /// Frames whose sky reads redder than this on average (mean red over mean blue of the sky
    /// pixels) are not daylight (`not_daylight`); default 1.05. A daytime sky, clear or overcast,
    /// reads bluish or grey: the largest measured was 0.93 (every SWIMSEG patch, WSISEG frame,
    /// independent and project synthetic scene). A night sky that a camera brightens by a long
    /// exposure reads orange under city light: 1.10–1.46 over the SWINSEG night patches
    /// (`tests/real_patches.rs`). A backstop for a frame stamped with a daytime time by mistake
    /// (the sun's elevation judges the time itself); only a sky dimmer than
    /// [`NIGHT_MAX_MEAN_LEVEL`] is refused so. 0.5 to 100 (100: off in practice).
    pub max_sky_red_blue: f64,
}

impl Default for QcParams {
    fn default() -> Self {
        Self { min_sun_elevation_deg: 5.0, min_mean_level: 20.0, max_mean_level: 235.0, max_saturated_fraction: 0.25, max_ahead_of_clock_s: 120.0, max_sky_red_blue: 1.05 }
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
        check_range(file, "qc.max_saturated_fraction", self.max_saturated_fraction, 0.0, 1.0)?;
        check_range(file, "qc.max_ahead_of_clock_s", self.max_ahead_of_clock_s, 0.0, 315_360_000.0)?;
        check_range(file, "qc.max_sky_red_blue", self.max_sky_red_blue, 0.5, 100.0)
    }
}

/// The frame QC's verdict on a frame's time: the sun's position then, or
/// [`Rejection::SunTooLow`] when its apparent elevation is below `min_sun_elevation_deg`.
///
/// # Errors
/// [`Rejection::SunTooLow`], or [`Rejection::Unreadable`] when the sun's position cannot be
/// computed for the time.
pub fn judge_sun(time: &chrono::DateTime<chrono::Utc>, observer: &crate::sun::Observer, min_sun_elevation_deg: f64) -> Result<crate::sun::SunPosition, Rejection> {
    let sun = crate::sun::position(time, observer).map_err(|e| Rejection::Unreadable(e.to_string()))?;
    let elev = sun.elevation_rad().to_degrees();
    if elev < min_sun_elevation_deg {
        return Err(Rejection::SunTooLow(elev));
    }
    Ok(sun)
}

/// A frame's sky pixels as the frame QC reads them.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SkyLevels {
    /// Mean of the three channels over the pixels (0–255); 0 without pixels.
    pub mean_level: f64,
    /// Share of the pixels saturated in every channel (all ≥ 250).
    pub saturated_share: f64,
    /// Mean red over mean blue (blue's mean held at least 1/255 of a level); 1 without pixels.
    pub red_blue: f64,
    /// How many pixels were read.
    pub samples: usize,
}

impl SkyLevels {
    /// Read a frame's sky pixels.
    pub fn measure(pixels: impl IntoIterator<Item = [u8; 3]>) -> SkyLevels {
        let (mut sum, mut red, mut blue, mut sat, mut n) = (0u64, 0u64, 0u64, 0usize, 0usize);
        for [r, g, b] in pixels {
            sum += u64::from(r) + u64::from(g) + u64::from(b);
            red += u64::from(r);
            blue += u64::from(b);
            sat += usize::from(r >= 250 && g >= 250 && b >= 250);
            n += 1;
        }
        if n == 0 {
            return SkyLevels { red_blue: 1.0, ..SkyLevels::default() };
        }
        let nf = n as f64;
        SkyLevels { mean_level: sum as f64 / 3.0 / nf, saturated_share: sat as f64 / nf, red_blue: red as f64 / (blue as f64).max(nf / 255.0), samples: n }
    }
}

/// A reddish sky is refused as not daylight only below this mean level (0–255): the SWINSEG night
/// patches a long exposure brightens read 62–98, while a bright warm sky by day (a camera's warm
/// white balance under overcast, dust or smoke) is far brighter and is kept (own choice from those
/// figures; the independent breaking overcast with its warm white-balance probe, R ×1.08 and
/// B ×0.93, reads mean red/blue up to 1.06).
pub const NIGHT_MAX_MEAN_LEVEL: f64 = 120.0;

/// The frame QC's verdict on a frame's sky pixels, in this order: under-exposed (mean level below
/// `min_mean_level`), not daylight (mean red over mean blue above `max_sky_red_blue` at a mean level below
/// [`NIGHT_MAX_MEAN_LEVEL`]), over-exposed
/// (mean level above `max_mean_level` or saturated share above `max_saturated_fraction`).
///
/// # Errors
/// [`Rejection::UnderExposed`], [`Rejection::NotDaylight`] or [`Rejection::OverExposed`].
pub fn judge_sky(levels: &SkyLevels, qc: &QcParams) -> Result<(), Rejection> {
    if levels.mean_level < qc.min_mean_level {
        return Err(Rejection::UnderExposed(levels.mean_level));
    }
    if levels.red_blue > qc.max_sky_red_blue && levels.mean_level < NIGHT_MAX_MEAN_LEVEL {
        return Err(Rejection::NotDaylight { red_blue: levels.red_blue, limit: qc.max_sky_red_blue });
    }
    if levels.mean_level > qc.max_mean_level || levels.saturated_share > qc.max_saturated_fraction {
        return Err(Rejection::OverExposed(levels.mean_level, levels.saturated_share));
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Measurement quality control (BSRN tests).
//
// C. N. Long, Y. Shi, "An automated quality assessment and control algorithm for surface radiation
// measurements", *The Open Atmospheric Science Journal* 2:23–37, 2008; C. N. Long, E. G. Dutton,
// *BSRN Global Network recommended QC tests*, V2.0. With μ0 = cos(zenith) and
// Sa = 1366.1 W/m² / R² (R the Earth–Sun distance in AU):
// * physically possible: −4 < GHI < 1.5 Sa μ0^1.2 + 100; −4 < DHI < 0.95 Sa μ0^1.2 + 50;
//   −4 < DNI < Sa;
// * extremely rare: −2 < GHI < 1.2 Sa μ0^1.2 + 50; −2 < DHI < 0.75 Sa μ0^1.2 + 30;
//   −2 < DNI < 0.95 Sa μ0^0.2 + 10;
// * closure: |GHI / (DNI μ0 + DHI) − 1| ≤ 8 % for zenith < 75° and ≤ 15 % for 75–93°, when the
//   sum exceeds 50 W/m².
// Rows are judged while the sun is up (zenith < 90°); night rows carry no flags. Also flagged: a
// missing value, a value stuck for 10 or more samples above 5 W/m² (common practice, no source), and
// a row after a time gap longer than 1.5 times the usual step.

/// GHI outside the physically possible range.
pub const FLAG_GHI_PHYSICAL: u16 = 1;
/// Any component outside its physically possible range.
pub const FLAGS_PHYSICAL: u16 = FLAG_GHI_PHYSICAL | FLAG_DNI_PHYSICAL | FLAG_DHI_PHYSICAL;
/// GHI outside the extremely rare range.
pub const FLAG_GHI_RARE: u16 = 2;
/// DNI outside the physically possible range.
pub const FLAG_DNI_PHYSICAL: u16 = 4;
/// DNI outside the extremely rare range.
pub const FLAG_DNI_RARE: u16 = 8;
/// DHI outside the physically possible range.
pub const FLAG_DHI_PHYSICAL: u16 = 16;
/// DHI outside the extremely rare range.
pub const FLAG_DHI_RARE: u16 = 32;
/// The three components do not close.
pub const FLAG_CLOSURE: u16 = 64;
/// A value is missing.
pub const FLAG_MISSING: u16 = 128;
/// A value is stuck.
pub const FLAG_STUCK: u16 = 256;

/// Equal readings in a row (above 5 W/m², sun up) that count as stuck (common practice, no source).
pub const STUCK_RUN: usize = 10;
/// A time gap precedes the row.
pub const FLAG_GAP: u16 = 512;

/// Upper limits of the BSRN tests at a zenith angle \[W m⁻²\].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BsrnLimits {
    /// GHI, physically possible.
    pub ghi_physical: f64,
    /// GHI, extremely rare.
    pub ghi_rare: f64,
    /// DHI, physically possible.
    pub dhi_physical: f64,
    /// DHI, extremely rare.
    pub dhi_rare: f64,
    /// DNI, physically possible.
    pub dni_physical: f64,
    /// DNI, extremely rare.
    pub dni_rare: f64,
}

/// The BSRN upper limits for a zenith \[rad\] and Earth–Sun distance \[AU\].
pub fn bsrn_limits(zenith_rad: f64, earth_sun_au: f64) -> BsrnLimits {
    let sa = crate::sun::SOLAR_CONSTANT_WM2 / (earth_sun_au * earth_sun_au);
    let mu = zenith_rad.cos().max(0.0);
    let m12 = mu.powf(1.2);
    BsrnLimits {
        ghi_physical: 1.5 * sa * m12 + 100.0,
        ghi_rare: 1.2 * sa * m12 + 50.0,
        dhi_physical: 0.95 * sa * m12 + 50.0,
        dhi_rare: 0.75 * sa * m12 + 30.0,
        dni_physical: sa,
        dni_rare: 0.95 * sa * mu.powf(0.2) + 10.0,
    }
}

/// Flags of one row of GHI, DNI, DHI (NaN = missing) at a zenith and Earth–Sun distance.
pub fn bsrn_flags(ghi: f64, dni: f64, dhi: f64, zenith_rad: f64, earth_sun_au: f64) -> u16 {
    bsrn_flags_partial(ghi, Some(dni), Some(dhi), zenith_rad, earth_sun_au)
}

/// [`bsrn_flags`] when DNI and DHI may not be measured at all (`None`: not judged).
pub fn bsrn_flags_partial(ghi: f64, dni: Option<f64>, dhi: Option<f64>, zenith_rad: f64, earth_sun_au: f64) -> u16 {
    if zenith_rad >= std::f64::consts::FRAC_PI_2 {
        return 0;
    }
    let l = bsrn_limits(zenith_rad, earth_sun_au);
    let mut f = 0;
    let mut test = |v: f64, phys: f64, rare: f64, fp: u16, fr: u16| {
        if v.is_nan() {
            f |= FLAG_MISSING;
        } else {
            if !(v > -4.0 && v < phys) {
                f |= fp;
            }
            if !(v > -2.0 && v < rare) {
                f |= fr;
            }
        }
    };
    test(ghi, l.ghi_physical, l.ghi_rare, FLAG_GHI_PHYSICAL, FLAG_GHI_RARE);
    if let Some(dni) = dni {
        test(dni, l.dni_physical, l.dni_rare, FLAG_DNI_PHYSICAL, FLAG_DNI_RARE);
    }
    if let Some(dhi) = dhi {
        test(dhi, l.dhi_physical, l.dhi_rare, FLAG_DHI_PHYSICAL, FLAG_DHI_RARE);
    }
    let mu = zenith_rad.cos();
    let sum = dni.unwrap_or(f64::NAN) * mu + dhi.unwrap_or(f64::NAN);
    if ghi.is_finite() && sum.is_finite() && sum > 50.0 {
        let z = zenith_rad.to_degrees();
        let lim = if z < 75.0 { 0.08 } else { 0.15 };
        if (ghi / sum - 1.0).abs() > lim {
            f |= FLAG_CLOSURE;
        }
    }
    f
}

/// Quality control of a series: per row the BSRN flags, stuck values and gaps.
pub fn qc_series(
    times: &[chrono::DateTime<chrono::Utc>],
    ghi: &[f64],
    dni: &[f64],
    dhi: &[f64],
    observer: &crate::sun::Observer,
) -> Vec<u16> {
    qc_series_partial(times, ghi, Some(dni), Some(dhi), observer)
}

/// [`qc_series`] when DNI and DHI may not be measured (a plant's pyranometers give GHI only).
pub fn qc_series_partial(
    times: &[chrono::DateTime<chrono::Utc>],
    ghi: &[f64],
    dni: Option<&[f64]>,
    dhi: Option<&[f64]>,
    observer: &crate::sun::Observer,
) -> Vec<u16> {
    let n = times.len();
    let mut flags = vec![0u16; n];
    let mut day = vec![false; n];
    for i in 0..n {
        if let Ok(sp) = crate::sun::position(&times[i], observer) {
            day[i] = sp.zenith_rad < std::f64::consts::FRAC_PI_2;
            flags[i] = bsrn_flags_partial(ghi[i], dni.map(|d| d[i]), dhi.map(|d| d[i]), sp.zenith_rad, sp.earth_sun_distance_au);
        }
    }
    // Gaps.
    if n >= 2 {
        let mut steps: Vec<i64> = times.windows(2).map(|w| (w[1] - w[0]).num_seconds()).collect();
        steps.sort_unstable();
        let usual = steps[steps.len() / 2].max(1);
        for i in 1..n {
            if ((times[i] - times[i - 1]).num_seconds() as f64) > 1.5 * usual as f64 {
                flags[i] |= FLAG_GAP;
            }
        }
    }
    // Stuck values.
    for series in [Some(ghi), dni, dhi].into_iter().flatten() {
        let mut start = 0;
        for i in 1..=n {
            let same = i < n && series[i] == series[start] && series[i].is_finite();
            if !same {
                if i - start >= STUCK_RUN && series[start] > 5.0 && day[start] {
                    for f in flags.iter_mut().take(i).skip(start) {
                        *f |= FLAG_STUCK;
                    }
                }
                start = i;
            }
        }
    }
    flags
}

/// Every flag bit of [`qc_series`] with its name, in bit order.
pub const FLAG_NAMES: [(u16, &str); 10] = [
    (FLAG_GHI_PHYSICAL, "ghi_physically_impossible"),
    (FLAG_GHI_RARE, "ghi_extremely_rare"),
    (FLAG_DNI_PHYSICAL, "dni_physically_impossible"),
    (FLAG_DNI_RARE, "dni_extremely_rare"),
    (FLAG_DHI_PHYSICAL, "dhi_physically_impossible"),
    (FLAG_DHI_RARE, "dhi_extremely_rare"),
    (FLAG_CLOSURE, "closure"),
    (FLAG_MISSING, "missing"),
    (FLAG_STUCK, "stuck"),
    (FLAG_GAP, "gap"),
];

/// How many rows carry each flag (flags that no row carries are left out), by name.
pub fn flag_counts(flags: &[u16]) -> Vec<(&'static str, usize)> {
    FLAG_NAMES.iter().map(|(b, n)| (*n, flags.iter().filter(|x| **x & b != 0).count())).filter(|(_, c)| *c > 0).collect()
}

#[cfg(test)]
mod frame_tests {
    use super::*;

    #[test]
    fn sky_levels_by_hand() {
        let l = SkyLevels::measure([[100, 110, 200], [50, 60, 100], [255, 255, 255]]);
        assert_eq!(l.samples, 3);
        assert!((l.mean_level - (410.0 + 210.0 + 765.0) / 9.0).abs() < 1e-9);
        assert!((l.saturated_share - 1.0 / 3.0).abs() < 1e-12);
        assert!((l.red_blue - 405.0 / 555.0).abs() < 1e-12);
        let none = SkyLevels::measure(std::iter::empty());
        assert_eq!((none.samples, none.mean_level, none.red_blue), (0, 0.0, 1.0));
        // A black blue channel does not divide by zero.
        assert!(SkyLevels::measure([[200, 80, 0]]).red_blue.is_finite());
    }

    #[test]
    fn a_reddish_sky_is_not_daylight() {
        let qc = QcParams::default();
        // Grey overcast and blue sky pass; an orange night sky (city light, long exposure) does not.
        assert_eq!(judge_sky(&SkyLevels::measure([[150, 155, 160]; 4]), &qc), Ok(()));
        assert_eq!(judge_sky(&SkyLevels::measure([[60, 110, 190]; 4]), &qc), Ok(()));
        let night = judge_sky(&SkyLevels::measure([[110, 92, 80]; 4]), &qc).unwrap_err();
        assert_eq!(night.code(), "not_daylight");
        assert!(night.to_string().contains("not daylight"), "{night}");
        // A warm sky as bright as day (overcast through a warm white balance, dust) is daylight.
        assert_eq!(judge_sky(&SkyLevels::measure([[190, 175, 165]; 4]), &qc), Ok(()));
        // Dark comes first: a black frame is under-exposed, whatever its colour.
        assert_eq!(judge_sky(&SkyLevels::measure([[12, 5, 3]; 4]), &qc).unwrap_err().code(), "under_exposed");
        // The limit is configurable and 100 turns the test off.
        let off = QcParams { max_sky_red_blue: 100.0, ..qc.clone() };
        assert_eq!(judge_sky(&SkyLevels::measure([[110, 92, 80]; 4]), &off), Ok(()));
        assert_eq!(judge_sky(&SkyLevels::measure([[250, 250, 250]; 4]), &qc).unwrap_err().code(), "over_exposed");
    }

    #[test]
    fn the_sun_below_the_limit_is_refused_by_time() {
        let site = crate::sun::Observer::new(1.34, 103.68, 0.0);
        let noon = chrono::DateTime::parse_from_rfc3339("2016-01-10T12:20:00+08:00").unwrap().to_utc();
        let night = chrono::DateTime::parse_from_rfc3339("2016-01-10T01:20:00+08:00").unwrap().to_utc();
        assert!(judge_sun(&noon, &site, 5.0).is_ok());
        match judge_sun(&night, &site, 5.0) {
            Err(Rejection::SunTooLow(e)) => assert!(e < -30.0, "{e}"),
            other => panic!("{other:?}"),
        }
    }
}

#[cfg(test)]
mod measurement_tests {
    use super::*;

    #[test]
    fn flag_counts_name_each_bit_that_occurs() {
        let f = [FLAG_GHI_PHYSICAL, FLAG_GHI_PHYSICAL | FLAG_GHI_RARE, 0, FLAG_GAP];
        assert_eq!(flag_counts(&f), vec![("ghi_physically_impossible", 2), ("ghi_extremely_rare", 1), ("gap", 1)]);
    }

    #[test]
    fn limits_by_hand_at_a_few_zeniths() {
        // Long & Shi 2008 formulas with Sa = 1366.1 W/m² (R = 1 AU).
        let l = bsrn_limits(0.0, 1.0);
        assert!((l.ghi_physical - (1.5 * 1366.1 + 100.0)).abs() < 1e-9);
        assert!((l.dni_rare - (0.95 * 1366.1 + 10.0)).abs() < 1e-9);
        // Zenith 60°: μ0 = 0.5, μ0^1.2 = 0.435275…, GHI rare limit = 1.2·1366.1·0.435275 + 50 = 763.56.
        let l = bsrn_limits(60f64.to_radians(), 1.0);
        assert!((l.ghi_rare - (1.2 * 1366.1 * 0.5f64.powf(1.2) + 50.0)).abs() < 1e-9);
        assert!((l.ghi_rare - 763.56).abs() < 0.01);
        // Zenith 85°: DHI physically possible = 0.95·1366.1·cos(85°)^1.2 + 50.
        let l = bsrn_limits(85f64.to_radians(), 1.0);
        assert!((l.dhi_physical - (0.95 * 1366.1 * 85f64.to_radians().cos().powf(1.2) + 50.0)).abs() < 1e-9);
    }

    #[test]
    fn flags_by_hand() {
        let z = 30f64.to_radians();
        // A consistent row: GHI = DNI cos z + DHI.
        let (dni, dhi) = (800.0, 100.0);
        let ghi = dni * z.cos() + dhi;
        assert_eq!(bsrn_flags(ghi, dni, dhi, z, 1.0), 0);
        assert_ne!(bsrn_flags(2500.0, dni, dhi, z, 1.0) & FLAG_GHI_PHYSICAL, 0);
        assert_ne!(bsrn_flags(ghi * 1.2, dni, dhi, z, 1.0) & FLAG_CLOSURE, 0);
        assert_ne!(bsrn_flags(ghi, f64::NAN, dhi, z, 1.0) & FLAG_MISSING, 0);
        assert_eq!(bsrn_flags(-50.0, 0.0, 0.0, 100f64.to_radians(), 1.0), 0, "night rows are not judged");
    }
}
