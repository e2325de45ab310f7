//! Unit tests of the segmentation and its clear-sky library.
use super::*;

/// A frame's reference without offset, glare measured or exposure.
fn plain_reference<'a>(r: &'a Reference, p: &'a SegmentParams) -> FrameReference<'a> {
    FrameReference { reference: r, params: p, offset: 0.0, glare_ring: [true; GLARE_RINGS], glare_extent_deg: 0.0, glare_zone_deg: p.glare_zone_deg as f32, exposure: None, ratio_scale: 1.0, inv_ratio_scale: 1.0, ratio_shift_measured: None, ratio_shift_ln: 0.0, clip_exposure: None }
}

fn geom(z: f32, g: f32) -> PixelGeom {
    PixelGeom { z_deg: z, gamma_deg: g }
}

/// A clear day whose sky clips in one bin: with `library_keeps_clipped` the bin is learnt from
/// the ratio as read, marked, written and read back with its mark, and its pixels are unknown;
/// without it the bin has no value and the parametric default judges it (common practice, no
/// source: a clipped channel bounds the ratio, it does not measure it).
#[test]
fn bins_where_the_clear_sky_clips_are_marked_and_not_judged() {
    let frame = || {
        // Bin (z 70°, γ 16°) clips in blue; bin (z 70°, γ 40°) does not.
        let clipped = (0..6).map(|_| ([230u8, 248, 255], geom(70.5, 16.5)));
        let open = (0..6).map(|_| ([150u8, 190, 220], geom(70.5, 40.5)));
        clipped.chain(open).collect::<Vec<_>>().into_iter()
    };
    let off = SegmentParams { library_keeps_clipped: false, ..SegmentParams::default() };
    let on = SegmentParams { library_keeps_clipped: true, judge_clipped_bins: false, ..SegmentParams::default() };
    let (lib_off, lib_on) = (Reference::from_clear_samples(&off, (0..4).map(|_| frame()), 3), Reference::from_clear_samples(&on, (0..4).map(|_| frame()), 3));
    let (clip_bin, open_bin) = (lib_index(70.5, 16.5), lib_index(70.5, 40.5));
    assert_eq!(lib_off.weight[clip_bin], 0.0);
    assert!(lib_on.weight[clip_bin] == 0.0 && lib_on.clipped[clip_bin] && (lib_on.clipped_read[clip_bin].0 - 230.0 / 255.0).abs() < 1e-4);
    assert!(!lib_on.clipped[open_bin] && (lib_on.lib[open_bin] - lib_off.lib[open_bin]).abs() < 1e-6);
    assert_eq!(lib_on.bright[clip_bin], 0.0, "no brightness from clipped pixels");
    let back = Reference::from_csv(&lib_on.to_csv()).unwrap();
    assert!(back.clipped[clip_bin] && !back.clipped[open_bin]);
    // Classified: unknown in the clipped bin whatever the pixel, judged elsewhere; with the
    // bins judged (pyranometers held) the same as a library without the setting.
    let mut back = back;
    let fr = plain_reference(&back, &on);
    assert_eq!(fr.classify([120, 150, 200], geom(70.5, 16.5)).1, Class::Unknown);
    assert_eq!(fr.classify([150, 190, 220], geom(70.5, 40.5)).1, Class::Clear);
    let fr_off = plain_reference(&lib_off, &off);
    let px = [230, 248, 255];
    assert_ne!(fr_off.classify(px, geom(70.5, 16.5)).1, Class::Unknown);
    back.clipped_marks_in_use = false;
    let fr_judged = plain_reference(&back, &on);
    assert_eq!(fr_judged.classify(px, geom(70.5, 16.5)).1, fr_off.classify(px, geom(70.5, 16.5)).1);
    assert!(Reference::from_csv("zenith_from_deg,gamma_from_deg,rb,weight,brightness,clear_sky_clips\n70,16,0.9,4,0,2\n").unwrap_err().contains("clear_sky_clips"));
}

/// With `judge_clipped_bins` a marked bin's samples are judged by brightness against the clipped
/// clear sky (common practice, no source: a sample well below the level the clear sky clipped at
/// cannot be that clear sky): one that clips is clear in a frame whose exposure was measured, one
/// darker than `1 − dark_cloud_margin` of the saturation level at the frame's exposure is thick,
/// one in between is unknown; within the glare only the thick side applies.
#[test]
fn samples_in_clipped_bins_are_judged_by_brightness() {
    let p = SegmentParams::default();
    assert!(p.judge_clipped_bins && p.library_keeps_clipped);
    let mut r = Reference::default();
    let bin = lib_index(70.5, 30.5);
    r.clipped[bin] = true;
    r.clipped[lib_index(70.5, 10.5)] = true;
    let g = geom(70.5, 30.5);
    let fr = plain_reference(&r, &p);
    let bound = (1.0 - p.dark_cloud_margin as f32) * f32::from(p.saturation_level);
    let measured = FrameReference { exposure: Some(1.0), ..plain_reference(&r, &p) };
    assert_eq!(measured.classify([240, 250, 255], g).1, Class::Clear, "clips as the clear sky does");
    // Clipped in a frame whose exposure is unmeasured (overcast): it may be bright cloud.
    assert_eq!(fr.classify([240, 250, 255], g).1, Class::Unknown);
    let bright = FrameReference { exposure: Some(1.3), ..plain_reference(&r, &p) };
    assert_eq!(bright.classify([240, 250, 255], g).1, Class::Clear);
    assert_eq!(fr.classify([160, 167, 190], g).1, Class::Thick, "grey overcast well below the clipped level");
    let just_below = bound.floor() as u8 - 1;
    assert_eq!(fr.classify([just_below - 20, just_below - 10, just_below], g).1, Class::Thick);
    assert_eq!(fr.classify([bound.ceil() as u8 - 20, bound.ceil() as u8 - 10, bound.ceil() as u8 + 1], g).1, Class::Unknown, "bright, unclipped: either");
    // A frame measured darker than the clear day: the bound falls with it.
    let dim = FrameReference { exposure: Some(0.7), ..plain_reference(&r, &p) };
    assert_eq!(dim.classify([160, 167, 190], g).1, Class::Unknown);
    assert_eq!(dim.classify([100, 110, 130], g).1, Class::Thick);
    // Within the glare: a clipped sample is unknown.
    assert_eq!(measured.classify([240, 250, 255], geom(70.5, 10.5)).1, Class::Unknown);
    // Within the glare beyond the sun's disc a dark sample is thick, a clipped one unknown.
    assert_eq!(measured.classify([160, 167, 190], geom(70.5, 10.5)).1, Class::Thick);
    // The map's and the images' path (`classify_at`, plain sky) judges alike.
    let plain = |gamma: f32| SampleSky { plain: true, gamma_deg: gamma, bin: lib_index(70.5, gamma) as u16, default_rb: p.default_reference(70.5, gamma), thick_score: p.thick_at(70.5) };
    let at = |fr: &FrameReference, rgb: [u8; 3]| fr.classify_at(plain(30.5), 70.5, || rgb, || rgb).2;
    assert_eq!(at(&measured, [240, 250, 255]), Class::Clear as u8);
    assert_eq!(at(&fr, [240, 250, 255]), Class::Unknown as u8);
    assert_eq!(at(&fr, [160, 167, 190]), Class::Thick as u8);
    assert_eq!(at(&fr, [225, 232, 240]), Class::Unknown as u8);
    let unmarked = FrameReference { reference: &Reference::default(), ..measured };
    assert_ne!(at(&unmarked, [160, 167, 190]), Class::Thick as u8, "an unmarked bin is judged by its ratio");
    // Off: unknown.
    let off = SegmentParams { judge_clipped_bins: false, ..p };
    assert_eq!(plain_reference(&r, &off).classify([160, 167, 190], g).1, Class::Unknown);
    assert_eq!(plain_reference(&r, &off).classify([240, 250, 255], g).1, Class::Unknown);
}

#[test]
fn polynomial_arc_cosine_matches_the_library_one() {
    // Abramowitz & Stegun 4.4.46 promise 2e-8 rad; f32 rounding allows a few 1e-7.
    let worst = (-1000..=1000).map(|i| i as f32 / 1000.0).map(|x| (acos_approx(x) - x.acos()).abs()).fold(0f32, f32::max);
    assert!(worst < 1e-6, "worst error {worst} rad");
}

#[test]
fn blue_is_clear_white_is_thick_grey_blue_is_thin() {
    let p = SegmentParams::default();
    let r = Reference::default();
    let fr = plain_reference(&r, &p);
    assert_eq!(fr.classify([70, 110, 200], geom(30.0, 90.0)).1, Class::Clear);
    assert_eq!(fr.classify([230, 232, 240], geom(30.0, 90.0)).1, Class::Thick);
    assert_eq!(fr.classify([160, 175, 210], geom(30.0, 90.0)).1, Class::Thin);
}

#[test]
fn whitish_circumsolar_sky_is_not_cloud() {
    // R/B 0.80 is cloud far from the sun but clear sky 5° from it (default reference there: 0.81).
    let p = SegmentParams::default();
    let r = Reference::default();
    let fr = plain_reference(&r, &p);
    assert_eq!(fr.classify([199, 219, 248], geom(40.0, 5.0)).1, Class::Clear);
    assert_ne!(fr.classify([199, 219, 248], geom(40.0, 100.0)).1, Class::Clear);
}

#[test]
fn saturated_sun_is_unknown_and_beyond_zenith_limit_too() {
    let p = SegmentParams::default();
    let r = Reference::default();
    let fr = plain_reference(&r, &p);
    assert_eq!(fr.classify([255, 255, 255], geom(30.0, 1.0)).1, Class::Unknown);
    assert_eq!(fr.classify([70, 110, 200], geom(91.0, 90.0)).1, Class::Unknown);
}

#[test]
fn clipped_patch_near_the_sun_is_cloud_but_a_clipped_ring_is_glare() {
    // 8° from the sun, a white clipped pixel: thick cloud when most of its 1° ring is unclipped
    // clear sky (a bright cloud lit from behind), unknown when the whole ring is clipped (glare).
    let p = SegmentParams::default();
    let r = Reference::default();
    let white = [255u8, 255, 255];
    let ring = |clipped_share: f64| {
        (0..100).map(move |i| {
            let rgb = if (i as f64) < clipped_share * 100.0 { white } else { [150u8, 190, 240] };
            (rgb, geom(40.0, 8.5))
        })
    };
    let patchy = r.for_frame(&p, ring(0.3));
    assert_eq!(patchy.classify(white, geom(40.0, 8.5)).1, Class::Thick);
    let glare = r.for_frame(&p, ring(1.0));
    assert_eq!(glare.classify(white, geom(40.0, 8.5)).1, Class::Unknown);
    // A ring with too few samples to judge: glare, as before.
    let sparse = r.for_frame(&p, ring(0.3).take(5));
    assert_eq!(sparse.classify(white, geom(40.0, 8.5)).1, Class::Unknown);
    // Beyond the glare zone the ring test does not apply.
    assert_eq!(glare.classify(white, geom(40.0, 30.0)).1, Class::Thick);
}

#[test]
fn thick_threshold_falls_toward_the_horizon() {
    let p = SegmentParams { thick_horizon_drop: 0.2, ..Default::default() };
    assert!((p.thick_at(0.0) - p.thick_score as f32).abs() < 1e-6);
    assert!((p.thick_at(90.0) - (p.thick_score - 0.2) as f32).abs() < 1e-6);
    // (60/90)⁴ = 0.1975: a score of 0.84 is thick at 60° (threshold 0.835), thin at the zenith.
    let r = Reference::default();
    let fr = plain_reference(&r, &p);
    let reference_rb = p.default_reference(60.0, 90.0);
    let rb = reference_rb + 0.84 * (p.cloud_rb as f32 - reference_rb);
    let rgb = [(rb * 200.0).round() as u8, 200, 200];
    assert_eq!(fr.classify(rgb, geom(60.0, 90.0)).1, Class::Thick);
    let reference_rb0 = p.default_reference(0.0, 90.0);
    let rb0 = reference_rb0 + 0.84 * (p.cloud_rb as f32 - reference_rb0);
    assert_eq!(fr.classify([(rb0 * 200.0).round() as u8, 200, 200], geom(0.0, 90.0)).1, Class::Thin);
}

#[test]
fn library_overrides_default_once_learned() {
    let p = SegmentParams::default();
    let mut r = Reference::default();
    let sample = (0..50).map(|_| ([150u8, 170, 200], geom(31.0, 91.0)));
    r.learn(&p, sample);
    let fr = plain_reference(&r, &p);
    assert!((fr.at(geom(31.0, 91.0)) - 0.75).abs() < 1e-6);
    assert_eq!(fr.classify([150, 170, 200], geom(31.0, 91.0)).1, Class::Clear);
}

/// A sky of `n` samples over a library of ratios 0.45–0.85: a share `clear` of clear sky read with
/// the colour balance scaled by `scale`, the rest cloud (ratio 0.95 × `scale`) or, with `veil`,
/// clear sky reddened by a veil (more where the sky is bluer).
fn shift_samples(n: usize, clear: f32, scale: f32, veil: bool) -> Vec<(f32, f32)> {
    (0..n)
        .map(|i| {
            let lib = 0.45 + 0.4 * ((i * 7919) % n) as f32 / n as f32;
            let noise = 0.01 * (((i * 104_729) % 11) as f32 - 5.0) / 5.0;
            let rb = if veil {
                (lib + 0.5 * (0.95 - lib)) * scale
            } else if (i as f32) < clear * n as f32 {
                lib * scale
            } else {
                0.95 * scale
            };
            ((rb / lib).ln() + noise, lib.ln())
        })
        .collect()
}

#[test]
fn a_colour_balance_shift_is_found_in_the_clear_sky() {
    // Common practice, no source: a white-balance change scales every clear ratio alike.
    for scale in [0.86f32, 1.0, 1.16] {
        for clear in [0.3f32, 0.6, 1.0] {
            let e = library::clear_ratio_shift(&shift_samples(4000, clear, scale, false)).expect("clear sky shows");
            assert!((e - scale.ln()).abs() < 0.01, "scale {scale} clear {clear}: {e} against {}", scale.ln());
        }
    }
    // Overcast (5 % clear), a veil over the whole sky, or too few samples: none.
    assert_eq!(library::clear_ratio_shift(&shift_samples(4000, 0.05, 1.16, false)), None);
    assert_eq!(library::clear_ratio_shift(&shift_samples(4000, 0.0, 1.0, true)), None);
    assert_eq!(library::clear_ratio_shift(&shift_samples(200, 1.0, 1.16, false)), None);
}

#[test]
fn the_followed_shift_reads_ratios_in_the_library_s_colour_balance() {
    let p = SegmentParams::default();
    let mut r = Reference::default();
    let bin = lib_index(31.0, 61.0);
    r.lib[bin] = 0.75;
    r.weight[bin] = 10.0;
    // Samples of clear sky in that bin, 16 % redder than the library (warmer white balance), and a
    // cloud's.
    let clear = [174u8, 190, 200];
    let sky = move || std::iter::repeat_n((clear, geom(31.0, 61.0)), 1200);
    let cloud = [215u8, 212, 200];
    // Without following, that clear sky reads as thin cloud.
    let off = SegmentParams { follow_colour_balance: false, ..p.clone() };
    let fr = r.for_frame(&off, sky());
    assert_eq!(fr.ratio_scale, 1.0);
    assert_eq!(fr.classify(clear, geom(31.0, 61.0)).1, Class::Thin);
    // Followed over frames, it reads clear and cloud stays cloud.
    for _ in 0..12 {
        let fr = r.for_frame(&p, sky());
        let (ln, measured) = (fr.ratio_shift_ln, fr.ratio_shift_measured.is_some());
        r.keep_ratio_shift(ln, measured);
    }
    assert!((r.ratio_scale() - 1.16).abs() < 0.02, "{}", r.ratio_scale());
    assert_eq!(r.ratio_shift_frames, 12);
    let fr = r.for_frame(&p, sky());
    assert_eq!(fr.classify(clear, geom(31.0, 61.0)).1, Class::Clear);
    assert_eq!(fr.classify(cloud, geom(31.0, 61.0)).1, Class::Thick);
    // The library learns in its own colour balance: a clear frame leaves it where it was.
    r.learn(&p, sky());
    assert!((r.lib[bin] - 0.75).abs() < 0.01, "{}", r.lib[bin]);
    // Within the dead band the library is read as learnt.
    r.ratio_shift_ln = 0.02;
    assert_eq!(r.ratio_scale(), 1.0);
}

#[test]
fn the_dead_band_ramps_in_and_one_shot_readings_take_the_frame_s_shift() {
    let mut r = Reference::default();
    // Within the band: as learnt; twice the band and beyond: the whole shift; a ramp between, with
    // no step where it starts (own choice, documented at `ratio_scale_of`).
    for (s, want) in [(0.0f32, 1.0f32), (0.029, 1.0), (0.03, 1.0), (0.045, (0.0225f32).exp()), (0.06, (0.06f32).exp()), (0.149, (0.149f32).exp()), (-0.149, (-0.149f32).exp()), (0.5, (0.3f32).exp())] {
        r.ratio_shift_ln = s;
        assert!((r.ratio_scale() - want).abs() < 1e-5, "shift {s}: {} against {want}", r.ratio_scale());
    }
    r.ratio_shift_ln = 0.0301;
    assert!(r.ratio_scale() - 1.0 < 1e-3, "no step past the band: {}", r.ratio_scale());
    // A reference not followed over frames (a second camera, `segment`, `verify`) reads each frame's
    // own shift whole; the engine's blends it into its running mean.
    let p = SegmentParams::default();
    let bin = lib_index(31.0, 61.0);
    for follows in [false, true] {
        let mut r = Reference { follows_frames: follows, ..Reference::default() };
        r.lib[bin] = 0.75;
        r.weight[bin] = 10.0;
        let fr = r.for_frame(&p, std::iter::repeat_n(([174u8, 190, 200], geom(31.0, 61.0)), 1200));
        let e = fr.ratio_shift_measured.expect("a clear frame");
        let want = if follows { 0.3 * e } else { e };
        assert!((fr.ratio_shift_ln - want).abs() < 1e-6, "follows {follows}: {} against {want}", fr.ratio_shift_ln);
    }
}

#[test]
fn the_exposure_is_a_geometric_mean_over_the_frames_that_measured_it() {
    let mut r = Reference::default();
    assert_eq!(r.mean_exposure(), None);
    for e in [Some(0.8), None, Some(1.25), Some(0.0), Some(-1.0)] {
        r.keep_exposure(e);
    }
    let (m, n) = r.mean_exposure().unwrap();
    assert_eq!(n, 2);
    assert!((m - 1.0).abs() < 1e-6, "{m}");
}

/// A frame exposed brighter than the library's clear day (`exposure_past_clipping`): where the
/// learned clear sky's blue clips at the frame's exposure, a sample whose blue clips is judged
/// against the clear sky's ratio as it then reads (`min(R, 255) / 255`), not the unclipped
/// library's; where the clear sky would not clip, a clipped sample is judged as read; the
/// clear-day clipped bins' dark test compares with the clipped level times the exposure, past 255.
/// (Common practice, no source: a clipped channel bounds the ratio, it does not measure it.)
#[test]
fn a_brighter_exposure_is_judged_past_the_clipping() {
    let p = SegmentParams::default();
    assert!(p.exposure_past_clipping);
    // A whitish bin near the horizon (R/B 0.76, blue 240) and a deep blue one (R/B 0.60, blue 150).
    let (white, deep) = (geom(78.5, 60.5), geom(30.5, 60.5));
    let frame = || vec![([182u8, 210, 240], white); 6].into_iter().chain(vec![([90u8, 120, 150], deep); 6]);
    let r = Reference::from_clear_samples(&p, (0..4).map(|_| frame()), 3);
    let bin = lib_index(white.z_deg, white.gamma_deg);
    assert!((r.lib[bin] - 182.0 / 240.0).abs() < 1e-3 && (r.bright[bin] - 240.0).abs() < 1e-3);
    // The same clear sky at exposure 1.2: red 218, blue 288 clipped to 255, read R/B 0.855.
    let clear_bright = [218u8, 252, 255];
    let before = plain_reference(&r, &p);
    let after = FrameReference { clip_exposure: Some(1.2), ..plain_reference(&r, &p) };
    assert_ne!(before.classify_at(sample(&p, white), white.z_deg, || clear_bright, || clear_bright).2, Class::Clear as u8, "read against the unclipped library it is cloud");
    assert_eq!(after.classify_at(sample(&p, white), white.z_deg, || clear_bright, || clear_bright).2, Class::Clear as u8);
    // White cloud there clips in every channel: whiter than that clear sky reads.
    assert_eq!(after.classify_at(sample(&p, white), white.z_deg, || [255, 255, 255], || [255, 255, 255]).2, Class::Thick as u8);
    // Where the clear sky itself reads near-white at that exposure (R/B 0.80: red 230, read
    // 0.90), too little contrast is left to judge: unknown.
    let mut rw = r.clone();
    rw.lib[bin] = 0.8;
    let whiter = FrameReference { clip_exposure: Some(1.2), ..plain_reference(&rw, &p) };
    assert_eq!(whiter.classify_at(sample(&p, white), white.z_deg, || [230, 252, 255], || [230, 252, 255]).2, Class::Unknown as u8);
    // Where the clear sky would not clip (deep blue at 1.2: 180), a clipped blue is brighter than
    // clear sky and its ratio is judged as read: a white cloud.
    let cloud = [250u8, 252, 255];
    assert_eq!(after.classify_at(sample(&p, deep), deep.z_deg, || cloud, || cloud).2, Class::Thick as u8);
    // A clear-day clipped bin at exposure 1.2: the clear sky there is at least 1.2 × 250 = 300, so
    // an unclipped sample reading 230 is well below it (thick); held at 255 it was undecided.
    let mut rc = Reference::default();
    rc.clipped[lib_index(70.5, 30.5)] = true;
    let g = geom(70.5, 30.5);
    let measured = FrameReference { exposure: Some(1.2), ..plain_reference(&rc, &p) };
    assert_eq!(measured.classify([200, 215, 230], g).1, Class::Thick);
    let off = SegmentParams { exposure_past_clipping: false, ..p.clone() };
    assert_eq!(FrameReference { exposure: Some(1.2), ..plain_reference(&rc, &off) }.classify([200, 215, 230], g).1, Class::Unknown);
    // Grey cloud whose blue the brighter exposure clips, in a bin where the clear day read R/B 0.9
    // under a clipped blue (red 230, at 1.2: 275): its red 234 is 15 % below that, thick; the
    // clear sky itself clips red too (clear), as without the setting.
    rc.clipped_read[lib_index(70.5, 30.5)] = (0.9, 4.0);
    let measured = FrameReference { exposure: Some(1.2), ..plain_reference(&rc, &p) };
    assert_eq!(measured.classify([234, 240, 253], g).1, Class::Thick);
    assert_eq!(measured.classify([252, 254, 255], g).1, Class::Clear);
    assert_eq!(FrameReference { exposure: Some(1.2), ..plain_reference(&rc, &off) }.classify([234, 240, 253], g).1, Class::Clear);
    // At the clear day's exposure a red read at the clear sky's is clear.
    let same = FrameReference { exposure: Some(1.0), ..plain_reference(&rc, &p) };
    assert_eq!(same.classify([230, 242, 255], g).1, Class::Clear);
    // Only a frame exposed brighter than the clear day, and only a clipped blue with a readable
    // red: at the clear day's exposure a red below the clear sky's is clear as before; a sample
    // whose red clips too, or whose green alone clips, reads as the clipped clear sky (clear).
    let at_one = FrameReference { exposure: Some(1.0), ..plain_reference(&rc, &p) };
    assert_eq!(at_one.classify([180, 240, 255], g).1, Class::Clear);
    let brighter = FrameReference { exposure: Some(1.3), ..plain_reference(&rc, &p) };
    assert_eq!(brighter.classify([255, 255, 255], g).1, Class::Clear);
    assert_eq!(brighter.classify([252, 250, 255], g).1, Class::Clear);
    assert_eq!(brighter.classify([200, 252, 240], g).1, Class::Clear, "green alone clipped: as the clipped clear sky");
    assert_eq!(brighter.classify([190, 210, 228], g).1, Class::Thick, "unclipped: the dark test (228 < 0.88 × 325)");
    assert_eq!(brighter.classify([238, 245, 249], g).1, Class::Thick, "249 is 23 % below the 325 the clear sky would be");
    // The clear sky's ratio as read in the frame's colour balance: a frame whose ratios read 1.1 ×
    // the library's, at exposure 1.4, clips the clear sky's red too (0.758 × 1.1 × 336 = 280), so
    // it reads 255 / 255, which is 1 / 1.1 in the library's balance; without the scale 0.999.
    let scaled = FrameReference { ratio_scale: 1.1, inv_ratio_scale: 1.0 / 1.1, clip_exposure: Some(1.4), ..plain_reference(&r, &p) };
    assert!((scaled.clipped_blue_reference(bin).unwrap() - 1.0 / 1.1).abs() < 1e-4);
    let unscaled = FrameReference { clip_exposure: Some(1.4), ..plain_reference(&r, &p) };
    assert!((unscaled.clipped_blue_reference(bin).unwrap() - 0.9992).abs() < 1e-3);
    // With the red unclipped the scale cancels: 182 × 1.2 / 255 whatever the balance.
    let scaled12 = FrameReference { clip_exposure: Some(1.2), ..scaled };
    assert!((scaled12.clipped_blue_reference(bin).unwrap() - 182.0 * 1.2 / 255.0).abs() < 1e-4);
    // Where the clear sky's blue stays below the saturation level there is no clipped reference.
    assert_eq!(FrameReference { clip_exposure: Some(1.02), ..plain_reference(&r, &p) }.clipped_blue_reference(bin), None);
    // A reddish bin (R/B 1.25, brightness 240 its red): its blue 192 × 1.2 = 230 does not clip.
    let mut rr = r.clone();
    rr.lib[bin] = 1.25;
    assert_eq!(FrameReference { clip_exposure: Some(1.2), ..plain_reference(&rr, &p) }.clipped_blue_reference(bin), None);
    // The public per-pixel path agrees with the map's (`classify_at`) on a clipped blue.
    let px = geom(white.z_deg, white.gamma_deg);
    assert_eq!(after.classify(clear_bright, px).1 as u8, after.classify_at(sample(&p, white), white.z_deg, || clear_bright, || clear_bright).2);
    // The frame's reference takes the frame's own exposure, else the frames' mean, only with the setting.
    let mut rm = r.clone();
    rm.keep_exposure(Some(1.2));
    let fr = rm.for_frame_with(&p, std::iter::empty());
    assert_eq!(fr.clip_exposure, Some(1.2));
    // A frame that measures its own exposure (its deep blue sky 1.1 × the library's) takes that.
    let own: Vec<([u8; 3], PixelGeom, f32)> = (0..150).map(|_| ([99u8, 132, 165], deep, p.default_reference(deep.z_deg, deep.gamma_deg))).collect();
    let fr = rm.for_frame_with(&p, own.into_iter());
    assert!(fr.exposure.is_some_and(|e| (e - 1.1).abs() < 0.01), "{:?}", fr.exposure);
    assert_eq!(fr.clip_exposure, fr.exposure);
    assert_eq!(rm.for_frame_with(&off, std::iter::empty()).clip_exposure, None);
}

/// A plain sample's sky entries at `g` (as the map's cells carry them).
fn sample(p: &SegmentParams, g: PixelGeom) -> SampleSky {
    SampleSky { plain: true, gamma_deg: g.gamma_deg, bin: lib_index(g.z_deg, g.gamma_deg) as u16, default_rb: p.default_reference(g.z_deg, g.gamma_deg), thick_score: p.thick_at(g.z_deg) }
}

/// A frame whose far field is hazy (its clear sky well above the default, as on a camera with haze
/// toward the horizon) and outnumbers the near sky, as a map's cells do: too little of the whole
/// sample sits near the default, so the offset is measured over the near sky
/// (`cloud_fraction_zenith_deg`), where a fifth of the sky is clear sky 0.03 above the default;
/// with no clear near sky either, the offset stays 0.
#[test]
fn the_offset_is_measured_over_the_near_sky_when_the_far_field_shows_none() {
    let p = SegmentParams::default();
    let r = Reference::default();
    let g_near = geom(40.0, 60.0);
    let g_far = geom(80.0, 60.0);
    let rgb_at = |rb: f32| [(rb * 200.0).round() as u8, 190u8, 200u8];
    let clear_near = rgb_at(p.default_reference(40.0, 60.0) + 0.03);
    let cloud = [215u8, 212, 200];
    let hazy_far = rgb_at(p.default_reference(80.0, 60.0) + 0.15);
    let frame = |near_clear: usize| {
        let near = (0..100).map(move |i| (if i < near_clear { clear_near } else { cloud }, g_near));
        near.chain((0..1000).map(move |_| (hazy_far, g_far))).collect::<Vec<_>>().into_iter()
    };
    let fr = r.for_frame(&p, frame(20));
    assert!((fr.offset - 0.03).abs() < 0.006, "offset {}", fr.offset);
    assert_eq!(fr.classify(clear_near, g_near).1, Class::Clear);
    assert_eq!(r.for_frame(&p, frame(5)).offset, 0.0);
}

/// The map's one-pass [`FrameReference::plain_and_learned_all`] equals the per-sample
/// [`FrameReference::plain_and_learned`] on a whole sky: learned and unlearned bins, the glare zone
/// around the sun, samples outside the plain sky and samples the camera does not see.
#[test]
fn plain_and_learned_over_a_sky_equals_the_per_sample_test() {
    let p = SegmentParams::default();
    let mut r = Reference::default();
    // Learn the bins of zenith 20–39°, sun angle 0–117° (some inside the glare zone below, so that
    // the glare test decides samples), leave the rest unlearned.
    r.learn(&p, (0..24_000).map(|k| ([150u8, 170, 200], geom(20.0 + (k % 20) as f32, ((k / 20) % 40) as f32 * 3.0))));
    let mut fr = plain_reference(&r, &p);
    // A glare zone wider than the plain sky's own limit, as a bloomed frame's measured extent is.
    fr.glare_zone_deg = 40.0;
    let (mut z, mut dir) = (vec![], vec![]);
    for zi in 0..46 {
        for ai in 0..72 {
            let (zr, ar) = ((zi as f32 * 2.0).to_radians(), (ai as f32 * 5.0).to_radians());
            z.push(zi as f32 * 2.0);
            dir.push([zr.sin() * ar.sin(), zr.sin() * ar.cos(), zr.cos()]);
        }
    }
    let sun = Some([0.5f32.sin(), 0.0, 0.5f32.cos()]);
    let seen = |i: usize| !i.is_multiple_of(17);
    let sky = SkyGeometry::from_directions(&z, &dir, seen, sun, &p);
    let all = fr.plain_and_learned_all(&sky, z.len());
    let per: Vec<bool> = (0..z.len()).map(|k| fr.plain_and_learned(&sky, k)).collect();
    assert_eq!(all, per);
    let (n_true, n_false) = (all.iter().filter(|b| **b).count(), all.iter().filter(|b| !**b).count());
    assert!(n_true >= 20 && n_false >= 20, "the sky must exercise both outcomes: {n_true} / {n_false}");
    let in_glare = (0..z.len()).filter(|&k| sky.plain[k] && r.weight[sky.bin[k] as usize] > 0.5 && sky.gamma_deg[k] < 40.0).count();
    assert!(in_glare > 0, "no plain learned sample inside the glare zone: the glare test is not exercised");
}
