//! Unit tests of the site file's loading and validation (moved from `config/mod.rs` unchanged).

use super::*;

const SITE: &str = r#"
[site]
name = "t"
latitude_deg = 45.0
longitude_deg = 7.0
elevation_m = 300.0
[camera]
calibration = "cam.toml"
[clouds]
base_height_m = 1500.0
"#;

#[test]
fn good_site_parses() {
    let s: SiteFile = parse_toml(SITE, Path::new("site.toml")).unwrap();
    s.validate(Path::new("site.toml")).unwrap();
    assert_eq!(s.forecast.horizon_min, 20);
}

#[test]
fn out_of_range_latitude_names_field() {
    let t = SITE.replace("latitude_deg = 45.0", "latitude_deg = 123.0");
    let s: SiteFile = parse_toml(&t, Path::new("site.toml")).unwrap();
    let e = s.validate(Path::new("site.toml")).unwrap_err().to_string();
    assert_eq!(e, "site.toml: field site.latitude_deg: expected a number from -90 to 90, got 123");
}

#[test]
fn wrong_type_names_field_and_line() {
    let t = SITE.replace("elevation_m = 300.0", "elevation_m = \"high\"");
    let e = parse_toml::<SiteFile>(&t, Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.starts_with("site.toml: field site.elevation_m:"), "{e}");
    assert!(e.contains("line 6"), "{e}");
}

/// `[second_camera]`: optional; refused too close to the first camera, out of range or with
/// an unknown key.
#[test]
fn second_camera_section() {
    let parse = |extra: &str| parse_toml::<SiteFile>(&format!("{SITE}[second_camera]\n{extra}"), Path::new("site.toml"));
    let ok = parse("calibration = \"cam2.toml\"\nposition_m = [800.0, 300.0, 3.0]\nframes = \"frames2\"").unwrap();
    ok.validate(Path::new("site.toml")).unwrap();
    let sc = ok.second_camera.as_ref().unwrap();
    assert_eq!((sc.every_s, sc.frames.as_deref(), sc.map_cells), (60.0, Some(Path::new("frames2")), true));
    let off = parse("calibration = \"cam2.toml\"\nposition_m = [800.0, 300.0, 3.0]\nmap_cells = false").unwrap();
    assert!(!off.second_camera.unwrap().map_cells);
    let close = parse("calibration = \"cam2.toml\"\nposition_m = [20.0, 10.0, 3.0]").unwrap();
    let e = close.validate(Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.contains("second_camera.position_m") && e.contains("22.4 m"), "{e}");
    let far = parse("calibration = \"cam2.toml\"\nposition_m = [80000.0, 0.0, 3.0]").unwrap();
    assert!(far.validate(Path::new("site.toml")).unwrap_err().to_string().contains("second_camera.position_m[0]"));
    let e = parse("calibration = \"cam2.toml\"\nposition_m = [800.0, 0.0, 3.0]\nbaseline = 3").unwrap_err().to_string();
    assert!(e.contains("baseline"), "{e}");
    let none: SiteFile = parse_toml(SITE, Path::new("site.toml")).unwrap();
    assert!(none.second_camera.is_none());
    assert!(!toml::to_string(&none).unwrap().contains("second_camera"));
}

#[test]
fn unknown_field_is_refused() {
    let t = SITE.replace("[clouds]", "[clouds]\nbase_hieght_m = 3");
    let e = parse_toml::<SiteFile>(&t, Path::new("site.toml")).unwrap_err().to_string();
    assert!(e.contains("base_hieght_m"), "{e}");
}

#[test]
fn time_zones_parse_as_offsets_or_names() {
    let off = |z: &str| parse_time_zone(z).map(|t| t.fixed_offset_min);
    assert_eq!(off("UTC"), Ok(Some(0)));
    assert_eq!(off("+02:00"), Ok(Some(120)));
    assert_eq!(off("-0530"), Ok(Some(-330)));
    assert_eq!(off("UTC+2"), Ok(Some(120)));
    assert_eq!(off("GMT-03:30"), Ok(Some(-210)));
    for bad in ["+15:00", "+02:60", "+2:3:4", "", "../etc/passwd", "Europe//Madrid", "/Europe/Madrid", "Europe/Madrid Spain", "+"] {
        assert!(parse_time_zone(bad).is_err(), "{bad:?} accepted");
    }
    if Path::new(ZONEINFO_DIR).join("Europe/Madrid").is_file() {
        assert_eq!(off("Europe/Madrid"), Ok(None));
        assert!(parse_time_zone("Europe/Madird").unwrap_err().contains("not in"));
    }
    // In a site file: named in the error.
    let f: SiteFile = toml::from_str(&SITE.replace("elevation_m = 300.0", "elevation_m = 300.0\ntimezone = \"+25:00\"")).unwrap();
    let e = f.validate(Path::new("s.toml")).unwrap_err().to_string();
    assert!(e.contains("site.timezone") && e.contains("s.toml"), "{e}");
    let f: SiteFile = toml::from_str(SITE).unwrap();
    assert_eq!(f.site.time_zone().name, "UTC");
}

#[test]
fn polygon_area() {
    assert_eq!(polygon_area_m2(&[[0.0, 0.0], [10.0, 0.0], [10.0, 5.0], [0.0, 5.0]]), 50.0);
}
