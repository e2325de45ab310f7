//! The multi-camera map ([`nephocast::multicam`]) against the truth, on a scene where the first
//! camera's sun region covers the cloud over the plant: `nuisance-broken` (broken cumulus at 1200 m;
//! the imperfect camera with sun bloom and smear, dirt, mast and skyline) at 08:30, when the sun
//! stands about 50° from the zenith in the east, so the cloud that shades the plant (around the
//! camera) lies in the camera's sun direction. A clean second camera (the single-layer scenes' lens)
//! stands 800 m east and 300 m north. Both cameras come from `calibrate` on their clear days
//! (`common/calibrated.rs`), never from the truth.
//!
//! The engine runs the frames twice with the true base configured, the second camera present
//! (`map_cells = false`, then `true`); each map cell within 70° of the first camera's zenith is
//! judged against the rendered world: cloud where the vertical optical depth along the first
//! camera's ray through the cell is at least the renderer's clear limit (0.4, `TAU_CLEAR_MAX` of
//! `synth::world`), clear below. A cell counts as right when its class (clear, or thin or thick
//! cloud) agrees; an unknown cell is not right. Figures for the sun region (within 20° of the sun
//! from the first camera) and all cells are printed; the sun region's share of right cells must
//! not fall with the second camera's cells, and the merge must take cells.
#[path = "common/calibrated.rs"]
mod calibrated;

use nephocast::nowcast::{Frame, Nowcaster};
use nephocast::synth::render::PixelRays;
use nephocast::synth::{CameraSpec, Scene, encode_jpeg, scene, write_sequence};

/// Image size \[px\] (the nuisance scenes' own).
const SIZE_PX: u32 = 512;
/// Second camera's position relative to the first (east, north, up) \[m\].
const OFFSET_M: [f64; 3] = [800.0, 300.0, 0.0];
/// The renderer's vertical optical depth below which the sky is clear.
const TAU_CLEAR_MAX: f64 = 0.4;

/// Right cells and cells judged, for the sun region and for all cells.
#[derive(Default, Debug)]
struct Tally {
    sun: [usize; 2],
    all: [usize; 2],
    known_sun: usize,
}

/// Judge each map cell within 70° of the camera's zenith against the world at `t`.
fn judge(sc: &Scene, t: &chrono::DateTime<chrono::Utc>, map: &nephocast::cloudmap::CloudMap, tally: &mut Tally) {
    let inst = sc.world.instant(t);
    let sun = inst.sun.direction_enu();
    let g = map.grid;
    for j in 0..g.n {
        for i in 0..g.n {
            let c = g.cell_centre_m(i, j);
            let norm = (c[0] * c[0] + c[1] * c[1] + g.height_m * g.height_m).sqrt();
            let dir = [c[0] / norm, c[1] / norm, g.height_m / norm];
            if dir[2] < 70f64.to_radians().cos() {
                continue;
            }
            let cloud = sc.world.tau_along(&inst, sc.cam_pos_m, dir) >= TAU_CLEAR_MAX;
            let class = map.class[j * g.n + i];
            let right = class != 0 && (class >= 2) == cloud;
            let near_sun = (dir[0] * sun[0] + dir[1] * sun[1] + dir[2] * sun[2]).clamp(-1.0, 1.0).acos().to_degrees() < 20.0;
            if near_sun {
                tally.sun[0] += usize::from(right);
                tally.sun[1] += 1;
                tally.known_sun += usize::from(class != 0);
            }
            tally.all[0] += usize::from(right);
            tally.all[1] += 1;
        }
    }
}

#[test]
fn second_camera_covers_the_first_cameras_sun_region() {
    let d = tempfile::tempdir().unwrap();
    let mut spec = scene("nuisance-broken").unwrap();
    spec.duration_min = 3.0;
    assert_eq!(spec.size_px, SIZE_PX);
    let cam_a = spec.camera.clone();
    let cam_b = CameraSpec { name: "second".into(), yaw_deg: 93.0, ..scene("broken-cumulus-fast").unwrap().camera };
    let sc = Scene::new(spec, 3).unwrap();
    write_sequence(&sc, d.path(), false).unwrap();
    let pos_b = [sc.cam_pos_m[0] + OFFSET_M[0], sc.cam_pos_m[1] + OFFSET_M[1], sc.cam_pos_m[2] + OFFSET_M[2]];
    let cal = d.path().join("calibration");
    calibrated::clear_day_of("nuisance-clear-day", &cam_a, SIZE_PX, None, 900.0).write(&cal, &cam_a.name);
    calibrated::clear_day(&cam_b, SIZE_PX, Some(pos_b), 900.0).write(&cal, "second");
    let true_b = cam_b.camera(SIZE_PX);
    let rays_b = PixelRays::new(&true_b);
    let times = sc.frame_times();
    let frames_b: Vec<image::RgbImage> = times
        .iter()
        .enumerate()
        .map(|(i, t)| image::load_from_memory(&encode_jpeg(&sc.render_frame_from(&true_b, pos_b, &rays_b, i, t).rgb, sc.spec.jpeg_quality)).unwrap().to_rgb8())
        .collect();
    let site = std::fs::read_to_string(d.path().join("site.toml")).unwrap();
    let mut results = vec![];
    for map_cells in [false, true] {
        let path = d.path().join(format!("site-{map_cells}.toml"));
        std::fs::write(&path, format!("{site}\n[second_camera]\ncalibration = \"calibration/second.toml\"\nposition_m = [{:.1}, {:.1}, {:.1}]\nmap_cells = {map_cells}\n", pos_b[0], pos_b[1], pos_b[2])).unwrap();
        let mut nc = Nowcaster::open(&path, None, None).unwrap();
        let mut tally = Tally::default();
        let mut taken = 0;
        for (i, t) in times.iter().enumerate() {
            let image = image::open(d.path().join("frames").join(nephocast::io::frame_name(t, "jpg"))).unwrap().to_rgb8();
            nc.offer_second_frame(*t, frames_b[i].clone());
            let n = nc.step(&Frame { time: *t, image }).unwrap();
            taken += nc.second_map_cells().map(|c| c.from_second).unwrap_or(0);
            judge(&sc, t, &n.map, &mut tally);
        }
        let share = |v: [usize; 2]| v[0] as f64 / v[1].max(1) as f64;
        eprintln!(
            "nuisance-broken, {} frames, {}: sun region (within 20° of the sun) {:.3} of {} cells right ({:.3} known); all cells within 70° {:.3} right; {} cells taken from the second camera per frame",
            times.len(),
            if map_cells { "two cameras' map" } else { "first camera's map" },
            share(tally.sun),
            tally.sun[1] / times.len(),
            tally.known_sun as f64 / tally.sun[1].max(1) as f64,
            share(tally.all),
            taken / times.len()
        );
        results.push((share(tally.sun), share(tally.all), taken));
    }
    let (one, two) = (&results[0], &results[1]);
    assert_eq!(one.2, 0, "map_cells = false took cells");
    assert!(two.2 > 0, "the two cameras' map took no cell from the second camera");
    assert!(two.0 >= one.0, "the sun region's right share fell from {:.3} to {:.3} with the second camera's cells", one.0, two.0);
}
