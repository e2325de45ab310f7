//! Solar position, Earth–Sun distance, extraterrestrial irradiance and air mass.
//!
//! The position is the NREL Solar Position Algorithm as implemented by the `solar-positioning`
//! crate, checked in `tests/reference_sun.rs` against the SPA report's worked example and a
//! table made with pvlib's SPA.
//!
//! # References
//! * I. Reda, A. Andreas, *Solar Position Algorithm for Solar Radiation Applications*,
//!   NREL/TP-560-34302, 2004 (revised 2008).
//! * F. Kasten, A. T. Young, "Revised optical air mass tables and approximation formula",
//!   *Applied Optics* 28(22):4735–4738, 1989.
//! * J. W. Spencer, "Fourier series representation of the position of the sun", *Search* 2(5):172, 1971.

use chrono::{DateTime, Datelike, Duration, Utc};
use solar_positioning::{Horizon, Location, RefractionCorrection, SolarEvents, SolarPositions, delta_t};

/// Solar constant used with [`extraterrestrial_dni_wm2`] \[W m⁻²\] (the value pvlib uses with Spencer's
/// formula).
pub const SOLAR_CONSTANT_WM2: f64 = 1366.1;

/// An observer on the ground.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Observer {
    /// Latitude \[°\], north positive.
    pub latitude_deg: f64,
    /// Longitude \[°\], east positive.
    pub longitude_deg: f64,
    /// Height above sea level \[m\].
    pub elevation_m: f64,
    /// Mean air pressure \[hPa\] (for refraction).
    pub pressure_hpa: f64,
    /// Mean air temperature \[°C\] (for refraction).
    pub temperature_c: f64,
}

impl Observer {
    /// An observer with the standard-atmosphere pressure for its height and 12 °C.
    pub fn new(latitude_deg: f64, longitude_deg: f64, elevation_m: f64) -> Self {
        Self {
            latitude_deg,
            longitude_deg,
            elevation_m,
            pressure_hpa: altitude_to_pressure_pa(elevation_m) / 100.0,
            temperature_c: 12.0,
        }
    }
}

/// The sun seen from an observer at one time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SunPosition {
    /// Topocentric zenith angle without refraction \[rad\].
    pub zenith_rad: f64,
    /// Apparent (refracted) topocentric zenith angle \[rad\].
    pub apparent_zenith_rad: f64,
    /// Topocentric azimuth, clockwise from north \[rad\], in `[0, 2π)`.
    pub azimuth_rad: f64,
    /// Earth–Sun distance \[AU\].
    pub earth_sun_distance_au: f64,
}

impl SunPosition {
    /// Apparent elevation above the horizon \[rad\].
    pub fn elevation_rad(&self) -> f64 {
        std::f64::consts::FRAC_PI_2 - self.apparent_zenith_rad
    }

    /// Unit vector toward the sun (apparent position) in (east, north, up).
    pub fn direction_enu(&self) -> [f64; 3] {
        direction_enu(self.apparent_zenith_rad, self.azimuth_rad)
    }

    /// Extraterrestrial normal irradiance at this Earth–Sun distance \[W m⁻²\].
    pub fn dni_extra_wm2(&self) -> f64 {
        SOLAR_CONSTANT_WM2 / (self.earth_sun_distance_au * self.earth_sun_distance_au)
    }
}

/// Unit vector of a sky direction in (east, north, up).
pub fn direction_enu(zenith_rad: f64, azimuth_rad: f64) -> [f64; 3] {
    let (sz, cz) = zenith_rad.sin_cos();
    let (sa, ca) = azimuth_rad.sin_cos();
    [sz * sa, sz * ca, cz]
}

/// Zenith and azimuth \[rad\] of an (east, north, up) vector (need not be unit length).
pub fn zenith_azimuth_of(v: [f64; 3]) -> (f64, f64) {
    let n = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
    let zenith = (v[2] / n).clamp(-1.0, 1.0).acos();
    let mut az = v[0].atan2(v[1]);
    if az < 0.0 {
        az += std::f64::consts::TAU;
    }
    (zenith, az)
}

/// Errors from the solar position computation.
#[derive(Debug, thiserror::Error)]
pub enum SunError {
    /// The underlying algorithm refused the input (coordinates or date out of range).
    #[error("solar position: {0}")]
    Algorithm(String),
}

/// ΔT = TT − UT1 \[s\] estimated for a date (Espenak & Meeus polynomials, via `solar-positioning`).
pub fn delta_t_s(time: &DateTime<Utc>) -> f64 {
    delta_t::estimate_from_date_like(time).unwrap_or(69.0)
}

/// Solar position by the NREL SPA with an estimated ΔT.
///
/// The same time and observer give the same position, so each thread keeps the positions it
/// computed last ([`POSITION_MEMO_SLOTS`] of them, by time): an engine step asks for the frame's
/// time and each horizon's target time, and with frames every 20 or 30 s and a 60-s forecast step
/// most of those were asked by a frame a minute earlier (SPA's series are about 1 % of a 1024²
/// replay's CPU). A position from the memo is the computed one bit for bit.
///
/// # Errors
/// When the latitude, longitude or date is outside what SPA supports.
pub fn position(time: &DateTime<Utc>, observer: &Observer) -> Result<SunPosition, SunError> {
    let key = memo_key(time, observer);
    let slot = ((key.0 as u64) ^ ((key.1 as u64) << 32)).wrapping_mul(0x9E37_79B9_7F4A_7C15) >> (64 - POSITION_MEMO_BITS);
    let slot = slot as usize;
    if let Some(p) = POSITION_MEMO.with(|m| m.borrow().get(slot).copied().flatten().filter(|(k, _)| *k == key).map(|(_, p)| p)) {
        return Ok(p);
    }
    let p = position_with_delta_t(time, observer, delta_t_s(time))?;
    POSITION_MEMO.with(|m| {
        let mut m = m.borrow_mut();
        if m.is_empty() {
            m.resize(POSITION_MEMO_SLOTS, None);
        }
        m[slot] = Some((key, p));
    });
    Ok(p)
}

/// Positions kept per thread by [`position`] (a power of two: slots by a hash of the time).
pub const POSITION_MEMO_SLOTS: usize = 1 << POSITION_MEMO_BITS;
const POSITION_MEMO_BITS: u32 = 8;

/// The time (whole seconds and nanoseconds) and the observer's fields bit for bit.
type MemoKey = (i64, u32, [u64; 5]);

fn memo_key(time: &DateTime<Utc>, o: &Observer) -> MemoKey {
    (time.timestamp(), time.timestamp_subsec_nanos(), [o.latitude_deg, o.longitude_deg, o.elevation_m, o.pressure_hpa, o.temperature_c].map(f64::to_bits))
}

thread_local! {
    static POSITION_MEMO: std::cell::RefCell<Vec<Option<(MemoKey, SunPosition)>>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// Solar position by the NREL SPA with a given ΔT \[s\].
///
/// Refraction follows SPA eq. 42 with atmospheric refraction at sunrise 0.5667°, applied while the
/// sun is above −0.8334° (its upper limb on the horizon).
///
/// # Errors
/// When the latitude, longitude, pressure, temperature or date is outside what SPA supports.
pub fn position_with_delta_t(
    time: &DateTime<Utc>,
    observer: &Observer,
    delta_t_s: f64,
) -> Result<SunPosition, SunError> {
    let err = |e: solar_positioning::Error| SunError::Algorithm(e.to_string());
    let loc = Location { latitude: observer.latitude_deg, longitude: observer.longitude_deg };
    let prepared = SolarPositions::new().for_time(time, delta_t_s).map_err(err)?;
    let refr = RefractionCorrection::new(observer.pressure_hpa, observer.temperature_c).map_err(err)?;
    let geo = prepared.at(loc, observer.elevation_m, None).map_err(err)?;
    let app = prepared.at(loc, observer.elevation_m, Some(refr)).map_err(err)?;
    Ok(SunPosition {
        zenith_rad: geo.zenith_angle().to_radians(),
        apparent_zenith_rad: app.zenith_angle().to_radians(),
        azimuth_rad: geo.azimuth().to_radians(),
        earth_sun_distance_au: prepared.earth_radius_vector().unwrap_or(1.0),
    })
}

/// Sunrise and sunset (upper limb on the horizon, with standard refraction) of the UTC day that
/// contains `time`; `None` for polar day or night.
pub fn sunrise_sunset(
    time: &DateTime<Utc>,
    observer: &Observer,
) -> Option<(DateTime<Utc>, DateTime<Utc>)> {
    let start = time.date_naive().and_hms_opt(0, 0, 0)?.and_utc() - Duration::hours(12);
    let end = start + Duration::hours(36);
    let loc = Location { latitude: observer.latitude_deg, longitude: observer.longitude_deg };
    let dt = delta_t_s(time);
    let ev = SolarEvents::new();
    // Search from local midnight (approximated by longitude) for the next rise, then the next set.
    let local_midnight =
        start + Duration::hours(12) - Duration::seconds((observer.longitude_deg / 15.0 * 3600.0) as i64);
    let rise = ev.next_rise(&local_midnight, &end, loc, dt, Horizon::SunriseSunset).ok()??;
    let set = ev.next_set(&rise, &(rise + Duration::hours(24)), loc, dt, Horizon::SunriseSunset).ok()??;
    Some((rise, set))
}

/// Extraterrestrial normal irradiance by Spencer's (1971) Fourier series of the Earth–Sun distance
/// for a day of the year \[W m⁻²\].
pub fn extraterrestrial_dni_wm2(day_of_year: u32) -> f64 {
    let b = std::f64::consts::TAU * (day_of_year as f64 - 1.0) / 365.0;
    let rover_r0_sqrd = 1.00011
        + 0.034221 * b.cos()
        + 0.00128 * b.sin()
        + 0.000719 * (2.0 * b).cos()
        + 0.000077 * (2.0 * b).sin();
    SOLAR_CONSTANT_WM2 * rover_r0_sqrd
}

/// [`extraterrestrial_dni_wm2`] for the day of a time.
pub fn extraterrestrial_dni_at(time: &DateTime<Utc>) -> f64 {
    extraterrestrial_dni_wm2(time.ordinal())
}

/// Relative optical air mass by Kasten & Young (1989) for an apparent zenith \[rad\];
/// `None` at or below the horizon.
///
/// `m = 1 / (cos z + 0.50572 (96.07995° − z)^−1.6364)`, z in degrees.
pub fn relative_airmass(apparent_zenith_rad: f64) -> Option<f64> {
    let z_deg = apparent_zenith_rad.to_degrees();
    if !(0.0..90.0).contains(&z_deg) {
        return None;
    }
    Some(1.0 / (apparent_zenith_rad.cos() + 0.50572 * (96.07995 - z_deg).powf(-1.6364)))
}

/// Absolute air mass: relative air mass scaled by station pressure over 101 325 Pa.
pub fn absolute_airmass(relative: f64, pressure_pa: f64) -> f64 {
    relative * pressure_pa / 101_325.0
}

/// Standard-atmosphere pressure at a height \[Pa\] (the formula pvlib's `alt2pres` uses).
pub fn altitude_to_pressure_pa(altitude_m: f64) -> f64 {
    100.0 * ((44_331.514 - altitude_m) / 11_880.516).powf(1.0 / 0.190_263_2)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The memo of [`position`] gives the computed position bit for bit, for the observer asked
    /// (two observers at one time, and more times than it has slots, asked twice over).
    #[test]
    fn remembered_positions_are_the_computed_ones() {
        let a = Observer::new(46.8, 6.9, 490.0);
        let b = Observer { temperature_c: 30.0, ..a };
        let t0 = DateTime::parse_from_rfc3339("2026-06-14T08:30:00Z").unwrap().with_timezone(&Utc);
        for round in 0..2 {
            for i in 0..(POSITION_MEMO_SLOTS as i64 + 40) {
                let t = t0 + Duration::milliseconds(i * 20_000 + (i % 3) * 7);
                for o in [a, b] {
                    let direct = position_with_delta_t(&t, &o, delta_t_s(&t)).unwrap();
                    let p = position(&t, &o).unwrap();
                    assert_eq!(p, direct, "round {round}, time {t}");
                    assert_eq!(p.apparent_zenith_rad.to_bits(), direct.apparent_zenith_rad.to_bits());
                }
            }
        }
        assert_ne!(position(&t0, &a).unwrap().apparent_zenith_rad, position(&t0, &b).unwrap().apparent_zenith_rad);
    }

    #[test]
    fn direction_round_trip() {
        for &(z, a) in &[(0.3, 0.1), (1.2, 3.0), (0.01, 6.0), (1.5, 4.7)] {
            let (z2, a2) = zenith_azimuth_of(direction_enu(z, a));
            assert!((z - z2).abs() < 1e-12 && (a - a2).abs() < 1e-12);
        }
    }

    #[test]
    fn airmass_at_zenith_is_one_and_undefined_below_horizon() {
        // Kasten & Young 1989: m(0) = 0.99971... (formula value).
        assert!((relative_airmass(0.0).unwrap() - 0.999_712).abs() < 1e-5);
        assert!(relative_airmass(91f64.to_radians()).is_none());
    }

    #[test]
    fn sunrise_before_sunset_mid_latitude() {
        let t: DateTime<Utc> = "2026-06-21T12:00:00Z".parse().unwrap();
        let obs = Observer::new(46.8, 6.9, 490.0);
        let (r, s) = sunrise_sunset(&t, &obs).unwrap();
        assert!(r < s);
        let day_h = (s - r).num_minutes() as f64 / 60.0;
        // Near 15.9 h at 47° N at the June solstice (common practice, no source).
        assert!((15.5..16.3).contains(&day_h), "day length {day_h}");
    }

    #[test]
    fn polar_night_has_no_sunrise() {
        let t: DateTime<Utc> = "2026-12-21T12:00:00Z".parse().unwrap();
        assert!(sunrise_sunset(&t, &Observer::new(85.0, 0.0, 0.0)).is_none());
    }
}
