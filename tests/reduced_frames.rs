//! The engine on frames decoded at reduced scale: a site whose frames have four or more pixels per
//! map cell across gets them reduced at intake, steps them with the reduced camera, and sees about
//! the cloud the whole frames show.
use nephocast::config::{CalibrationFile, Site};
use nephocast::nowcast::{Frame, Nowcaster};
use nephocast::synth::render::PixelRays;
use nephocast::synth::{Scene, encode_jpeg, scene};

fn site_of(s: &Scene) -> Site {
    Site {
        file: s.site.clone(),
        path: "t/site.toml".into(),
        camera: s.camera.clone(),
        calibration: CalibrationFile::from_camera(&s.spec.camera.name, &s.camera),
        calibration_path: "t/calibration.toml".into(),
        obstruction: None,
        clear_reference: None,
        cbh_csv: None,
        second_camera: None,
    }
}

/// `map.decode_reduction` sets the intake's scale when it is 1, 2, 4 or 8 and leaves the automatic
/// choice (four or more pixels per cell across the frame) when 0; it is written to a site file only
/// when set (common practice, no source: a setting the operator gives wins over the default).
#[test]
fn configured_reduction_overrides_the_automatic_one() {
    if std::env::var_os("NEPHOCAST_FRAME_REDUCTION").is_some() {
        println!("skipped: NEPHOCAST_FRAME_REDUCTION overrides map.decode_reduction");
        return;
    }
    let mut spec = scene("broken-cumulus-fast").unwrap();
    spec.size_px = 1024;
    let mut s = Scene::new(spec, 5).unwrap();
    assert_eq!(s.site.map.cells, 256);
    for (configured, used) in [(0, 1), (1, 1), (2, 2), (4, 4), (8, 8)] {
        s.site.map.decode_reduction = configured;
        assert_eq!(Nowcaster::new(site_of(&s), None, None).intake_options().reduce, used, "map.decode_reduction = {configured}");
        let text = toml::to_string(&s.site).unwrap();
        assert_eq!(text.contains("decode_reduction"), configured != 0, "{configured}");
    }
}

#[test]
fn reduced_frames_step_like_whole_ones() {
    let mut spec = scene("broken-cumulus-fast").unwrap();
    spec.size_px = 256;
    spec.duration_min = 4.0;
    let mut s = Scene::new(spec, 5).unwrap();
    // 32 cells on a 256 px frame: eight pixels per cell, so the intake halves the frame.
    s.site.map.cells = 32;
    let site = site_of(&s);
    let mut reduced = Nowcaster::new(site.clone(), None, None);
    let mut whole = Nowcaster::new(site, None, None);
    assert_eq!(reduced.intake_options().reduce, 2);
    let rays = PixelRays::new(&s.camera);
    let (mut n, mut cf_diff) = (0usize, 0f64);
    for (i, t) in s.frame_times().iter().enumerate() {
        let jpeg = encode_jpeg(&s.render_frame(&rays, i, t).rgb, 90);
        let small = nephocast::intake::from_bytes(&jpeg, &reduced.intake_options()).unwrap();
        assert_eq!(small.dimensions(), (128, 128));
        let full = nephocast::intake::from_bytes(&jpeg, &nephocast::intake::IntakeOptions::expecting(256, 256)).unwrap();
        let a = reduced.step(&Frame { time: *t, image: small }).expect("reduced frame accepted");
        let b = whole.step(&Frame { time: *t, image: full }).expect("whole frame accepted");
        cf_diff += (a.cloud_fraction - b.cloud_fraction).abs();
        n += 1;
        // The overlay of a reduced frame uses the reduced geometry.
        let g = reduced.image_geometry_for(128);
        assert_eq!((g.width, g.height, g.z_deg.len()), (128, 128, 128 * 128));
    }
    let mean = cf_diff / n as f64;
    assert!(n >= 4 && mean < 0.05, "{n} frames, mean cloud fraction difference {mean:.3}");
}
