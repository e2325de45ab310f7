//! The synthetic world against the engine's own geometry and the physics it claims.
use chrono::{DateTime, Utc};
use nephocast::camera::{Camera, Orientation, Projection};
use nephocast::clearsky::clear_sky;
use nephocast::synth::render::{PixelRays, TruthClass, render};
use nephocast::synth::world::{LayerSpec, World};
use nephocast::synth::{Scene, scene};

fn layer(cover: f64, tau: f64) -> LayerSpec {
    LayerSpec {
        base_height_m: 1500.0,
        wind_speed_mps: 0.0,
        wind_toward_deg: 0.0,
        cover_start: cover,
        cover_end: cover,
        tau_max: tau,
        wavelength_m: 1500.0,
        evolution_min: 1e9,
    }
}

fn world(specs: &[LayerSpec]) -> World {
    let s = Scene::new(scene("broken-cumulus-fast").unwrap(), 5).unwrap();
    World::new(specs, 5, s.world.observer, s.world.clear_model, s.start, 3000.0)
}

/// A round cloud placed at a known point of the cloud plane appears where the camera model
/// predicts (centroid within 0.5 px), for a tilted, rotated, off-centre camera of each model.
#[test]
fn cloud_appears_where_camera_predicts() {
    let mut w = world(&[layer(0.0, 0.0)]);
    let t: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
    let cam_pos = [0.0, 0.0, 3.0];
    let q = [700.0, -400.0]; // cloud-plane point (east, north) [m]
    w.layers[0].puffs.push((q, 40.0, 20.0));
    for proj in [Projection::Equidistant, Projection::Equisolid, Projection::Polynomial { k: [-0.02, 0.003, 0.0, 0.0] }] {
        let cam = Camera::new(
            400,
            400,
            203.7,
            195.2,
            124.0,
            proj,
            90f64.to_radians(),
            Orientation { yaw_rad: 1.1, pitch_rad: 0.035, roll_rad: -0.02 },
        );
        let rays = PixelRays::new(&cam);
        let inst = w.instant(&t);
        let r = render(&w, &inst, &cam, &rays, cam_pos, None, 1);
        let (mut sx, mut sy, mut n) = (0.0, 0.0, 0.0);
        for (x, y, p) in r.truth.enumerate_pixels() {
            if p.0[0] == TruthClass::Thick as u8 {
                sx += x as f64;
                sy += y as f64;
                n += 1.0;
            }
        }
        assert!(n > 10.0, "puff not seen");
        let d = [q[0] - cam_pos[0], q[1] - cam_pos[1], 1500.0 - cam_pos[2]];
        let (px, py) = cam.project_enu(d).unwrap();
        let err = ((sx / n - px).powi(2) + (sy / n - py).powi(2)).sqrt();
        eprintln!("{proj:?}: puff centroid {:.2},{:.2} predicted {px:.2},{py:.2}: {err:.3} px ({n} px)", sx / n, sy / n);
        assert!(err < 0.5, "{err} px");
    }
}

/// The puff's shadow falls where the sun's ray says: at q − h·tan z·(sin A, cos A).
#[test]
fn shadow_falls_along_the_sun_ray() {
    let mut w = world(&[layer(0.0, 0.0)]);
    let q = [300.0, 200.0];
    w.layers[0].puffs.push((q, 60.0, 25.0));
    let t: DateTime<Utc> = "2026-06-14T09:00:00Z".parse().unwrap();
    let inst = w.instant(&t);
    let (z, a) = (inst.sun.apparent_zenith_rad, inst.sun.azimuth_rad);
    let off = 1500.0 * z.tan();
    let p = [q[0] - off * a.sin(), q[1] - off * a.cos()];
    let shaded = w.irradiance_at(&inst, p);
    assert!(shaded.dni_wm2 < 1e-6 * inst.clear.dni_wm2.max(1.0), "centre of shadow: {shaded:?}");
    for (dx, dy) in [(90.0, 0.0), (-90.0, 0.0), (0.0, 90.0), (0.0, -90.0)] {
        let lit = w.irradiance_at(&inst, [p[0] + dx, p[1] + dy]);
        assert!((lit.dni_wm2 - inst.clear.dni_wm2).abs() < 1e-9, "outside the shadow at {dx},{dy}");
    }
}

/// Under a cloud-free sky the truth equals the clear-sky model exactly.
#[test]
fn cloud_free_truth_is_clear_sky() {
    let w = world(&[]);
    for h in 6..19 {
        let t: DateTime<Utc> = format!("2026-06-14T{h:02}:10:00Z").parse().unwrap();
        let inst = w.instant(&t);
        let c = clear_sky(&inst.sun, w.altitude_m, w.clear_model);
        let i = w.irradiance_at(&inst, [123.0, -45.0]);
        assert_eq!((i.dni_wm2, i.dhi_wm2), (c.dni_wm2, c.dhi_wm2));
        assert!((i.ghi_wm2 - c.ghi_wm2).abs() < 1e-9);
    }
}

/// Beer–Lambert through a uniform layer: DNI = DNI_clear · exp(−τ m), m = 1 / cos z.
#[test]
fn beam_through_uniform_layer_is_beer_lambert() {
    for tau in [0.1, 0.5, 2.0] {
        let w = world(&[layer(1.0, tau)]);
        let t: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        let inst = w.instant(&t);
        let i = w.irradiance_at(&inst, [0.0, 0.0]);
        let m = 1.0 / inst.sun.apparent_zenith_rad.cos();
        let want = inst.clear.dni_wm2 * (-tau * m).exp();
        assert!((i.dni_wm2 - want).abs() < 1e-9 * want, "τ {tau}: {} vs {want}", i.dni_wm2);
        // Diffuse rises with cover: a full layer that counts as cloud adds to the clear-sky diffuse.
        if tau > nephocast::synth::world::TAU_CLEAR_MAX {
            assert!(i.dhi_wm2 > inst.clear.dhi_wm2);
        }
    }
}

/// Every listed scene renders, and its frame cloud fraction is in a sensible range for its cover.
#[test]
fn every_scene_renders() {
    for mut spec in nephocast::synth::scenes() {
        spec.size_px = 128;
        let name = spec.name.clone();
        let cover = spec.layers.iter().map(|l| l.cover_start).fold(0.0, f64::max);
        let s = Scene::new(spec, 2).unwrap();
        let rays = PixelRays::new(&s.camera);
        let t = s.frame_times()[0];
        let r = s.render_frame(&rays, 0, &t);
        assert_eq!(r.rgb.dimensions(), (128, 128));
        if cover == 0.0 {
            assert!(r.cloud_fraction < 0.01, "{name}");
        } else {
            assert!(r.cloud_fraction > 0.02, "{name}: {}", r.cloud_fraction);
        }
    }
}
