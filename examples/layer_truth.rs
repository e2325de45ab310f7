//! Each layer's share of a synthetic scene's plant irradiance (a diagnostic): the plant-mean DNI of
//! the true sky, of the sky with only the lowest layer and of the sky with only the others, at
//! every frame (and 20 minutes on), as CSV on standard output. A layer is left out by setting its
//! cover to zero, so the other layers' fields are the same as in the scene.
//!
//! ```sh
//! cargo run --release --example layer_truth -- nuisance-two-layer 3 30 > LT.csv
//! python3 tools/two_layer_diagnosis.py --sequence S --replay O --layer-truth LT.csv
//! ```

use nephocast::synth::world::World;
use nephocast::synth::{Scene, scene};

fn plant_dni(world: &World, times: &[chrono::DateTime<chrono::Utc>], points: &[[f64; 2]]) -> Vec<f64> {
    world.irradiance_series(times, points).iter().map(|row| row.iter().map(|v| v.dni_wm2).sum::<f64>() / row.len().max(1) as f64).collect()
}

fn main() {
    let mut args = std::env::args().skip(1);
    let name = args.next().unwrap_or_else(|| "nuisance-two-layer".into());
    let seed: u64 = args.next().and_then(|s| s.parse().ok()).unwrap_or(3);
    let minutes: f64 = args.next().and_then(|s| s.parse().ok()).unwrap_or(30.0);
    let Some(mut spec) = scene(&name) else {
        eprintln!("no scene named {name:?}");
        std::process::exit(2);
    };
    spec.duration_min = minutes;
    let s = match Scene::new(spec, seed) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("{e}");
            std::process::exit(2);
        }
    };
    let steps = s.frame_times().len() + (20.0 * 60.0 / s.spec.frame_step_s).ceil() as usize;
    let times = World::times(s.start, s.spec.frame_step_s, steps);
    let points: Vec<[f64; 2]> = s.plant.blocks.iter().flat_map(|b| b.points_m.iter().copied()).collect();
    let only = |keep_lowest: bool| {
        let mut w = s.world.clone();
        for (i, l) in w.layers.iter_mut().enumerate() {
            if (i == 0) != keep_lowest {
                l.spec.cover_start = 0.0;
                l.spec.cover_end = 0.0;
            }
        }
        w
    };
    let all = plant_dni(&s.world, &times, &points);
    let low = plant_dni(&only(true), &times, &points);
    let high = plant_dni(&only(false), &times, &points);
    let clear: Vec<f64> = times.iter().map(|t| s.world.instant(t).clear.dni_wm2).collect();
    println!("time_utc,dni_clear_wm2,dni_wm2,dni_lowest_only_wm2,dni_others_only_wm2");
    for (i, t) in times.iter().enumerate() {
        println!("{},{:.2},{:.2},{:.2},{:.2}", t.format("%Y-%m-%dT%H:%M:%SZ"), clear[i], all[i], low[i], high[i]);
    }
}
