//! Valid inputs that the bad-input corpus and the fuzz loops mutate, and how to run each parser.
#![allow(dead_code)]

use std::path::Path;

use nephocast::config::{CalibrationFile, SiteFile, parse_toml};
use nephocast::io::{Measurements, Series};

/// A valid site file (its calibration `cam.toml` beside it).
pub const SITE: &str = r#"[site]
name = "corpus"
latitude_deg = 45.0
longitude_deg = 7.0
elevation_m = 300.0
pressure_hpa = 980.0
temperature_c = 15.0
linke_turbidity = 3.0

[camera]
calibration = "cam.toml"
position_m = [0.0, 0.0, 3.0]

[clouds]
base_height_m = 1500.0

[plant]
point_spacing_m = 25.0

[[plant.blocks]]
name = "a"
polygon_m = [[0.0, 0.0], [400.0, 0.0], [400.0, 300.0], [0.0, 300.0]]
capacity_kw = 5000.0
ac_capacity_kw = 4000.0
mount = "fixed"
tilt_deg = 25.0
azimuth_deg = 180.0

[[plant.blocks]]
name = "b"
polygon_m = [[-300.0, -300.0], [-100.0, -300.0], [-100.0, -100.0]]
capacity_kw = 3000.0
mount = "single-axis"
axis_azimuth_deg = 0.0
max_angle_deg = 60.0

[forecast]
horizon_min = 20
step_s = 60

[map]
cells = 256
max_zenith_deg = 84.0
height_bucket_m = 50.0
decode_reduction = 0

[irradiance]
ensemble_members = 20

[[pyranometers]]
name = "a"
position_m = [200.0, 150.0]
"#;

/// A valid calibration file with a fit record.
pub const CALIBRATION: &str = r#"[camera]
name = "cam"
width_px = 512
height_px = 512
model = "equidistant"
f_px_per_rad = 158.0
cx_px = 258.4
cy_px = 252.1
max_field_angle_deg = 90.0
yaw_deg = 23.0
pitch_deg = 1.2
roll_deg = -0.8

[fit]
fitted_utc = "2026-06-15T00:00:00Z"
span_start_utc = "2026-06-14T05:00:00Z"
span_end_utc = "2026-06-14T18:00:00Z"
detections = 60
rms_deg = 0.05
max_deg = 0.2
rms_px = 0.15
max_px = 0.6
detections_zenith_deg = [22.0, 80.0]
detections_azimuth_span_deg = 200.0

[fit.std_errors]
cx_px = 0.1
cy_px = 0.1
f_px_per_rad = 0.2
yaw_deg = 0.01
pitch_deg = 0.01
roll_deg = 0.01
"#;

/// A valid measurements CSV: 1-minute GHI of one pyranometer (around 600 W/m², plausible at the
/// site of [`SITE`] near noon of 14 June), air temperature and wind; 120 rows from 10:00 UTC.
pub fn measurements() -> String {
    let mut s = String::from("time_utc,ghi_a_wm2,temp_air_c,wind_speed_mps\n");
    for k in 0..120 {
        s += &format!("2026-06-14T{:02}:{:02}:00Z,{:.1},21.5,3.0\n", 10 + k / 60, k % 60, 600.0 + (k % 7) as f64 * 11.0);
    }
    s
}

/// A valid cloud base height series: 30 rows every 2 minutes from 10:00 UTC.
pub fn series() -> String {
    let mut s = String::from("time_utc,cbh_m\n");
    for k in 0..30 {
        s += &format!("2026-06-14T{:02}:{:02}:00Z,{}\n", 10 + (2 * k) / 60, (2 * k) % 60, 1200 + 10 * k);
    }
    s
}

/// Parse and validate a site file's text; `Err` is the message as the user sees it.
pub fn site(text: &str) -> Result<SiteFile, anyhow::Error> {
    let p = Path::new("site.toml");
    let s: SiteFile = parse_toml(text, p)?;
    s.validate(p)?;
    Ok(s)
}

/// Parse and validate a calibration file's text (camera and fit record).
pub fn calibration(text: &str) -> Result<CalibrationFile, anyhow::Error> {
    let p = Path::new("cam.toml");
    let c: CalibrationFile = parse_toml(text, p)?;
    c.validate(p)?;
    Ok(c)
}

/// Read and screen a measurements CSV at the site of [`SITE`]; the counts of flagged values.
pub fn measurements_file(path: &Path) -> Result<std::collections::BTreeMap<String, usize>, anyhow::Error> {
    let s: SiteFile = parse_toml(SITE, Path::new("site.toml"))?;
    let mut m = Measurements::read_csv(path)?;
    let r = m.screen(path, &s.site.observer(), s.site.clear_sky(), s.site.elevation_m)?;
    Ok(r.counts())
}

/// Read a cloud base height series.
pub fn series_file(path: &Path) -> Result<Series, anyhow::Error> {
    Ok(Series::read_cbh_csv(path)?)
}
