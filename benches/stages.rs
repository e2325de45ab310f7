//! Criterion benchmarks of the per-frame stages at 1024² on synthetic frames (broken cumulus).
//!
//! Run with `cargo bench --bench stages`. The command-line `nephocast bench` times the same stages
//! inside the engine, with JPEG decoding; these isolate each stage for profiling.

use criterion::{Criterion, criterion_group, criterion_main};
use nephocast::cloudmap::{CellPixels, CellSky, LutCache, build_map_from, build_map_with};
use nephocast::config::{CalibrationFile, Site};
use nephocast::motion::{MapFeatures, MotionParams, measure_with};
use nephocast::nowcast::{Frame, Nowcaster};
use nephocast::segment::Reference;
use nephocast::synth::render::PixelRays;
use nephocast::synth::{Scene, scene};

const FRAMES: usize = 12;

fn setup() -> (Scene, Site, Vec<Frame>) {
    let mut spec = scene("broken-cumulus-fast").expect("scene");
    spec.size_px = 1024;
    spec.duration_min = FRAMES as f64 * spec.frame_step_s / 60.0;
    let mut s = Scene::new(spec, 11).expect("scene builds");
    s.site.plant.point_spacing_m = 15.5; // about 1000 forecast points
    let rays = PixelRays::new(&s.camera);
    let frames: Vec<Frame> = s.frame_times().iter().enumerate().map(|(i, t)| Frame { time: *t, image: s.render_frame(&rays, i, t).rgb }).collect();
    let site = Site {
        file: s.site.clone(),
        path: "bench/site.toml".into(),
        camera: s.camera.clone(),
        calibration: CalibrationFile::from_camera(&s.spec.camera.name, &s.camera),
        calibration_path: "bench/calibration.toml".into(),
        obstruction: None,
        clear_reference: None,
        cbh_csv: None,
        second_camera: None,
    };
    (s, site, frames)
}

fn stages(c: &mut Criterion) {
    let (s, site, frames) = setup();
    // One core, as the speed aim is stated.
    let pool = rayon::ThreadPoolBuilder::new().num_threads(1).build().expect("pool");
    run(c, &pool, &s, &site, &frames);
}

fn run(c: &mut Criterion, pool: &rayon::ThreadPool, s: &Scene, site: &Site, frames: &[Frame]) {
    // Maps and the motion prior from a run through the engine.
    let mut nc = Nowcaster::new(site.clone(), None, None);
    let runs: Vec<_> = frames.iter().map(|f| nc.step(f).expect("frame accepted")).collect();
    let last = runs.last().expect("frames");
    let earlier = runs.iter().rev().find(|r| (last.time - r.time).num_seconds() as f64 >= MotionParams::default().baseline_s).unwrap_or(&runs[0]);
    let dt_s = (last.time - earlier.time).num_milliseconds() as f64 / 1000.0;

    let mut g = c.benchmark_group("1024px");
    g.sample_size(30);
    let mut luts = LutCache::default();
    let cbh = s.site.clouds.base_height_m.unwrap_or(1500.0) - s.site.camera.position_m[2];
    let lut = luts.get(&site.camera, None, &s.site.map, cbh);
    let sd = last.sun.direction_enu();
    let sun_dir = Some([sd[0] as f32, sd[1] as f32, sd[2] as f32]);
    let reference = Reference::default();
    // The engine reuses the cells' sun angles and default references while the sun moves < 0.1°.
    let sky = CellSky::new(&lut, sun_dir, &s.site.segment);
    g.bench_function("cell sun angles", |b| b.iter(|| pool.install(|| CellSky::new(&lut, sun_dir, &s.site.segment))));
    g.bench_function("segment+map", |b| b.iter(|| pool.install(|| build_map_with(&frames[FRAMES - 1].image, &lut, &sky, &s.site.segment, &reference))));
    // Its two parts: reading the cells' pixels (in the image's memory order), then classifying.
    g.bench_function("map pixels", |b| b.iter(|| CellPixels::gather(&frames[FRAMES - 1].image, &lut)));
    let pixels = CellPixels::gather(&frames[FRAMES - 1].image, &lut);
    g.bench_function("map classification", |b| b.iter(|| pool.install(|| build_map_from(&pixels, &lut, &sky, &s.site.segment, &reference))));
    let priors: Vec<_> = last.layers.iter().map(|l| l.motion).collect();
    // As in the engine: the earlier map's features were computed when it arrived; the new map's
    // are part of the stage.
    let earlier_features = MapFeatures::new(&earlier.map);
    g.bench_function("motion", |b| {
        b.iter(|| pool.install(|| measure_with((&earlier.map, &earlier_features), (&last.map, &MapFeatures::new(&last.map)), dt_s, &s.site.motion, &priors)))
    });
    // JPEG decoding of a frame as the cameras write them: by the general decoder (`image` crate),
    // by the intake (whole: the same decoder called directly, its buffer given back as replay
    // does), at 1/2 scale (the system libjpeg when built with it), and at 1/2 by the pure-Rust
    // fallback.
    let jpeg = nephocast::synth::encode_jpeg(&frames[FRAMES - 1].image, 85);
    let whole = nephocast::intake::IntakeOptions::default();
    g.bench_function("decode (general decoder)", |b| b.iter(|| nephocast::intake::decode_general(&jpeg, nephocast::intake::Format::Jpeg, &whole).expect("decodes")));
    g.bench_function("decode (intake)", |b| b.iter(|| nephocast::intake::recycle(nephocast::intake::from_bytes(&jpeg, &whole).expect("decodes"))));
    g.bench_function("decode 1/2 (intake)", |b| b.iter(|| nephocast::intake::from_bytes(&jpeg, &whole.reduced(2)).expect("decodes")));
    g.bench_function("decode 1/2 (pure Rust)", |b| b.iter(|| nephocast::intake::decode_jpeg_reduced_rust(&jpeg, 2, &whole).expect("decodes")));
    // A whole step (QC, map, motion, forecast, ensemble), on a fresh engine fed the earlier frames.
    g.bench_function("step (with ensemble)", |b| {
        b.iter_batched(
            || {
                let mut nc = Nowcaster::new(site.clone(), None, None);
                for f in &frames[..FRAMES - 1] {
                    let _ = nc.step(f);
                }
                nc
            },
            |mut nc| pool.install(|| nc.step(&frames[FRAMES - 1]).expect("frame accepted")),
            criterion::BatchSize::LargeInput,
        )
    });
    g.finish();
}

criterion_group!(benches, stages);
criterion_main!(benches);
