//! Unit tests of the cloud base height state (moved out of `mod.rs` unchanged).
use super::shadow::r2_cost;
use super::*;
use crate::cloudmap::Grid;

/// A null test the fit passed (its readings follow the map's shadows).
fn passed_null() -> NullTest {
    NullTest { shifts: 9, cost: 0.5, cost_min: 0.9, within: 0.3, within_min: 0.9, judged: true, passed: true }
}

/// A frame without measurements or motion, on a map at `cbh_m` that is also the prior.
fn plain_frame<'a>(
    time: DateTime<Utc>,
    map: &'a crate::cloudmap::CloudMap,
    params: &'a crate::forecast::IrradianceParams,
    site: &crate::config::SiteFile,
    cbh_m: f64,
) -> CbhFrame<'a> {
    CbhFrame {
        time,
        map,
        params,
        map_cbh_m: cbh_m,
        prior_cbh_m: cbh_m,
        from_series: false,
        v_map_mps: None,
        v_other_mps: None,
        camera_m: [0.0, 0.0, 3.0],
        measurements: None,
        observer: site.site.observer(),
        altitude_m: 640.0,
        model: site.site.clear_sky(),
        tables: None,
    }
}

#[test]
fn combine_weighs_by_inverse_variance_in_log_height() {
    let a = CbhInput { cbh_m: 1000.0, rel_sigma: 0.3, age_s: 0.0, source: CbhSource::Configured };
    let b = CbhInput { cbh_m: 1600.0, rel_sigma: 0.05, age_s: 0.0, source: CbhSource::ShadowTiming };
    let c = combine(&[a, b]).unwrap();
    assert_eq!(c.source, CbhSource::ShadowTiming);
    // Weights 1/0.09 and 1/0.0025: the result is 36/37 of the way to 1600 in ln h.
    let want = ((1000f64.ln() + 36.0 * 1600f64.ln()) / 37.0).exp();
    assert!((c.cbh_m - want).abs() < 1e-6, "{} vs {want}", c.cbh_m);
    assert!((c.rel_sigma() - (1.0f64 / (1.0 / 0.09 + 1.0 / 0.0025)).sqrt()).abs() < 1e-12);
    // An hour-old shadow estimate weighs less than the prior.
    let old = combine(&[a, CbhInput { age_s: 3600.0, ..b }]).unwrap();
    assert_eq!(old.source, CbhSource::Configured);
    assert!(old.cbh_m < 1300.0);
    // The prior alone: itself with its sigma.
    let only = combine(&[a]).unwrap();
    assert_eq!(only.source, CbhSource::Configured);
    assert!((only.cbh_m - 1000.0).abs() < 1e-6 && (only.sigma_m - 300.0).abs() < 1e-6, "{only:?}");
    assert!(combine(&[CbhInput { cbh_m: f64::NAN, ..a }]).is_none());
}

/// A stereo estimate joins the combination as `stereo`, outweighs the configured prior while
/// fresh, and fades with age.
#[test]
fn stereo_estimates_are_combined() {
    use crate::cloudmap::{CloudMap, MapParams};
    let grid = Grid::new(&MapParams { cells: 32, ..Default::default() }, 2000.0);
    let map = CloudMap { grid, score: vec![0.0; 32 * 32], class: vec![1; 32 * 32], in_view: vec![true; 32 * 32], offset: 0.0, brightness: vec![], thin_depth: vec![] };
    let params = crate::forecast::IrradianceParams::default();
    let site = crate::synth::larkspur_site(2000.0, "cam");
    let t0: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
    let frame = |time| plain_frame(time, &map, &params, &site, 2000.0);
    let mut st = CbhState::new(&CloudSection { base_height_m: Some(2000.0), ..Default::default() });
    assert_eq!(st.update(&frame(t0)).source, CbhSource::Configured);
    let fit = crate::stereo::StereoFit { cbh_m: 1250.0, rel_sigma: 0.04, peak_ncc: 0.9, median_ncc: 0.1, overlap_cells: 5000, curve: vec![] };
    st.observe_stereo(t0, &fit);
    let fresh = st.update(&frame(t0));
    assert_eq!(fresh.source, CbhSource::Stereo);
    assert_eq!(fresh.source.name(), "stereo");
    assert!((fresh.cbh_m / 1250.0 - 1.0).abs() < 0.03, "{fresh:?}");
    assert!(fresh.rel_sigma() < 0.04, "{fresh:?}");
    // An hour later the prior dominates again.
    let old = st.update(&frame(t0 + chrono::Duration::seconds(3600)));
    assert_eq!(old.source, CbhSource::Configured);
}

/// With `shadow_timing` unset the fits check the configured base: fits that agree with it
/// (within two sigmas with the 10 % floor) leave it alone, stray fits do not move it, three
/// disagreeing on the same side replace it from then on; `Some(true)` combines every fit and
/// `Some(false)` none.
#[test]
fn shadow_fits_check_the_configured_base_unless_asked_for() {
    use crate::cloudmap::CloudMap;
    assert_eq!(disagreement(1580.0, 0.05, 1500.0), 0, "5 % off with 5 % stated agrees");
    assert_eq!(disagreement(1580.0, 0.02, 800.0), 1);
    assert_eq!(disagreement(1580.0, 0.02, 2600.0), -1);
    assert_eq!(disagreement(1800.0, 0.01, 1500.0), 0, "within twice the floor");
    assert_eq!(disagreement(1900.0, 0.01, 1500.0), 1, "beyond twice the floor");
    assert_eq!(disagreement(f64::NAN, 0.02, 1500.0), 0);
    let site = crate::synth::larkspur_site(800.0, "cam");
    let t0: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
    let map = CloudMap {
        grid: Grid::new(&crate::cloudmap::MapParams { cells: 32, ..Default::default() }, 800.0),
        score: vec![0.0; 32 * 32],
        class: vec![1; 32 * 32],
        in_view: vec![true; 32 * 32],
        offset: 0.0,
        brightness: vec![],
        thin_depth: vec![],
    };
    let params = crate::forecast::IrradianceParams::default();
    let frame = |time| plain_frame(time, &map, &params, &site, 800.0);
    let fit = |cbh_m: f64| ShadowFit { cbh_m, rel_sigma: 0.03, events: 10, frames: 30, cost_min: 0.2, cost_median: 0.8, null: passed_null() };
    let run = |mode: Option<bool>, fits: &[f64]| {
        let mut st = CbhState::new(&CloudSection { base_height_m: Some(800.0), shadow_timing: mode, ..Default::default() });
        let mut t = t0;
        let mut out = vec![];
        for &h in fits {
            st.take_fit(t, fit(h), Some(800.0));
            out.push(st.update(&frame(t)));
            t += chrono::Duration::seconds(20);
        }
        out
    };
    // Agreeing fits: the configured base stands, with its own sigma.
    for e in run(None, &[820.0, 790.0, 830.0]) {
        assert_eq!(e.source, CbhSource::Configured);
        assert!((e.cbh_m - 800.0).abs() < 1e-6 && (e.rel_sigma() - CONFIGURED_REL_SIGMA).abs() < 1e-9, "{e:?}");
    }
    // Stray fits, two on one side, one on the other, agreement between: still the configured base.
    for e in run(None, &[1600.0, 1600.0, 810.0, 1600.0, 400.0, 1600.0]) {
        assert_eq!(e.source, CbhSource::Configured);
    }
    // Three in a row above it: the fits take over, and stay combined when one later agrees.
    let e = run(None, &[1600.0, 1620.0, 1580.0, 840.0]);
    assert_eq!(e[1].source, CbhSource::Configured);
    assert_eq!(e[2].source, CbhSource::ShadowTiming);
    assert!((e[2].cbh_m / 1580.0 - 1.0).abs() < 0.02, "{:?}", e[2]);
    assert_eq!(e[3].source, CbhSource::ShadowTiming);
    // Fits whose readings do not follow the map's shadows better than shifted in time are held
    // back: counted, never rejecting the base; a fit not yet judged (window too short) neither
    // counts nor breaks a run.
    let mut st = CbhState::new(&CloudSection { base_height_m: Some(800.0), ..Default::default() });
    let failed = NullTest { passed: false, ..passed_null() };
    let unjudged = NullTest { shifts: 8, judged: false, passed: false, ..passed_null() };
    let mut t = t0;
    for null in [failed.clone(), failed.clone(), failed.clone(), failed] {
        st.take_fit(t, ShadowFit { null, ..fit(1600.0) }, Some(800.0));
        assert_eq!(st.update(&frame(t)).source, CbhSource::Configured);
        t += chrono::Duration::seconds(20);
    }
    assert_eq!((st.prior_rejected(), st.fits_held_back()), (false, 4));
    for null in [passed_null(), unjudged.clone(), passed_null(), unjudged, passed_null()] {
        st.take_fit(t, ShadowFit { null, ..fit(1600.0) }, Some(800.0));
        t += chrono::Duration::seconds(20);
    }
    assert_eq!((st.prior_rejected(), st.fits_held_back()), (true, 4), "three passed fits, two unjudged between them");
    assert_eq!(st.update(&frame(t)).source, CbhSource::ShadowTiming);
    assert_eq!(st.fits_unjudged_disagreeing(), 0, "fits were judged in this run");
    // Readings too coarse for the check: no fit is ever judged, the base stays, and the
    // disagreeing fits are counted for the note.
    let mut st = CbhState::new(&CloudSection { base_height_m: Some(800.0), ..Default::default() });
    let coarse = NullTest { shifts: 2, judged: false, passed: false, ..passed_null() };
    for _ in 0..5 {
        st.take_fit(t, ShadowFit { null: coarse.clone(), ..fit(1600.0) }, Some(800.0));
        t += chrono::Duration::seconds(20);
    }
    assert_eq!((st.prior_rejected(), st.fits_held_back(), st.fits_unjudged_disagreeing()), (false, 0, 5));
    // Live mode says so only once they span the stretch the check needs (600 s here): before
    // that, readings may simply not have filled it yet.
    assert_eq!(st.base_left_unchecked(), None, "5 fits over 80 s");
    while st.base_left_unchecked().is_none() {
        st.take_fit(t, ShadowFit { null: coarse.clone(), ..fit(1600.0) }, Some(800.0));
        t += chrono::Duration::seconds(20);
    }
    assert_eq!(st.base_left_unchecked(), Some(600 / 20 + 1), "the fit 600 s after the first");
    st.take_fit(t, ShadowFit { null: passed_null(), ..fit(1600.0) }, Some(800.0));
    assert_eq!((st.fits_unjudged_disagreeing(), st.base_left_unchecked()), (0, None), "a judged fit: the check works");
    // Asked for: every fit combined; turned off: none.
    assert_eq!(run(Some(true), &[820.0])[0].source, CbhSource::ShadowTiming);
    assert_eq!(run(Some(false), &[1600.0, 1600.0])[1].source, CbhSource::Configured);
}

#[test]
fn r2_cost_is_zero_for_a_perfect_positive_fit_and_one_for_a_negative() {
    let mut s = [0.0; 6];
    for i in 0..10 {
        let (x, y) = (i as f64 / 10.0, 0.2 + 0.7 * i as f64 / 10.0);
        s = [s[0] + 1.0, s[1] + x, s[2] + y, s[3] + x * x, s[4] + x * y, s[5] + y * y];
    }
    assert!(r2_cost(&s) < 1e-9);
    s[4] = -s[4];
    assert_eq!(r2_cost(&s), 1.0);
}

/// A textured map and readings made at a base 0.7 times the map's: the scan finds it, and the
/// readings follow the map's shadows better than shifted in time (the null test passes; 40
/// frames, so that the window is full); readings that never change (overcast) give no estimate.
#[test]
fn shadow_timing_recovers_the_factor_on_a_textured_map() {
    use crate::cloudmap::{CloudMap, MapParams};
    use crate::segment::Class;
    let map_cbh_m = 2000.0;
    let grid = Grid::new(&MapParams { cells: 256, ..Default::default() }, map_cbh_m);
    let n = grid.n;
    let textured = |salt: u64| {
        let hash = |i: usize, j: usize| crate::synth::noise::hash64((i as u64) * 7919 + (j as u64) * 104_729 + salt) % 100;
        let class: Vec<u8> = (0..n * n).map(|k| if hash(k % n / 3, k / n / 3) < 40 { Class::Thick as u8 } else { Class::Clear as u8 }).collect();
        CloudMap { grid, score: vec![0.0; n * n], class, in_view: vec![true; n * n], offset: 0.0, brightness: vec![], thin_depth: vec![] }
    };
    let map = textured(0);
    let p = crate::forecast::IrradianceParams::default();
    let tm = TransmittanceMap::new(&map, &p);
    let pos = [[-650.0, 420.0], [560.0, 380.0], [620.0, -480.0], [-700.0, -520.0], [-120.0, 60.0], [200.0, -260.0]];
    let (cam, v, z, a) = ([0.0, 0.0, 3.0], [8.0, 3.0], 0.6f64, 2.0f64);
    let truth_f = 0.7;
    let t0: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
    let mut st = ShadowTiming::new(ShadowParams::default(), pos.len());
    let mut flat = ShadowTiming::new(ShadowParams::default(), pos.len());
    // A 10-s reading per sensor, made from `tm` as the truth sees it (each frame sees those of
    // the last two minutes): the map moves at `v`, the cloud is at 0.7 × the map's height.
    let reading = |tm: &TransmittanceMap, s: usize, mid: DateTime<Utc>, t: DateTime<Utc>| {
        let lag = (t - mid).num_seconds() as f64;
        let inv_f = 1.0 / truth_f;
        let g = pos[s];
        let off = crate::forecast::sun_ray_plane_point([0.0, 0.0], map_cbh_m, [cam[0] * inv_f, cam[1] * inv_f, cam[2]], z, a);
        let (cx, cy) = grid.to_cell([g[0] * inv_f + off[0] + v[0] * lag, g[1] * inv_f + off[1] + v[1] * lag]);
        let x = tm.box_mean_with(cx, cy, 0.5, p.beams()).unwrap();
        Reading { sensor: s, mid, kstar: 0.2 + 0.8 * x, zenith_rad: z, azimuth_rad: a }
    };
    for frame in 0..40 {
        let t = t0 + chrono::Duration::seconds(20 * frame);
        let mids: Vec<DateTime<Utc>> = (5..120).step_by(10).map(|lag| t - chrono::Duration::seconds(lag)).collect();
        let rs: Vec<Reading> = mids.iter().flat_map(|m| (0..pos.len()).map(move |s| (s, *m))).map(|(s, m)| reading(&tm, s, m, t)).collect();
        st.observe(t, &tm, p.beams(), grid, map_cbh_m, cam, v, 40.0, &pos, &rs);
        let still: Vec<Reading> = rs.iter().map(|r| Reading { kstar: 0.3, ..*r }).collect();
        flat.observe(t, &tm, p.beams(), grid, map_cbh_m, cam, v, 40.0, &pos, &still);
    }
    let fit = st.estimate().unwrap();
    let want = truth_f * map_cbh_m;
    assert!((fit.cbh_m / want - 1.0).abs() < 0.05, "{} vs {want}", fit.cbh_m);
    assert!(fit.rel_sigma > 0.0 && fit.rel_sigma < 0.1, "{}", fit.rel_sigma);
    assert!(fit.null.judged && fit.follows_map(), "{:?} (cost {})", fit.null, fit.cost_min);
    assert_eq!(flat.estimate().unwrap_err(), NoFit::NoEvents);
}
