//! The perfect-perception yardstick of a synthetic scene: at every frame time, the true cloud field
//! and wind, advected frozen (no growth, decay or change of cover) to each horizon, and the plant's
//! irradiance under it ([`crate::synth::world::World::frozen_instant`]). It is the best a
//! camera-based forecast that assumes frozen advection can hope for, so a nowcast's skill is read
//! against it: a forecast reaching 0.8 of the yardstick's pooled 5–15 min skill over smart
//! persistence has lost little to perception (the robustness issue's target; common practice to
//! compare with an ideal forecast, no source).
//!
//! Written as `truth/yardstick.csv` with the columns of `forecasts.csv` that the scoring reads
//! (`issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2`, the plant only), so
//! [`crate::verify::score_forecasts`] scores it exactly as it scores a replay.

use std::path::Path;

use chrono::Duration;

use super::{Scene, SynthError};
use crate::io::{CsvTable, fmt_time};

/// Horizons of the yardstick \[s\]: every minute to 15 minutes, as the engine's default forecast.
pub const HORIZONS_S: [u32; 15] = [60, 120, 180, 240, 300, 360, 420, 480, 540, 600, 660, 720, 780, 840, 900];

/// One yardstick forecast: issue time, horizon \[s\] and the plant's mean GHI \[W m⁻²\].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FrozenForecast {
    /// Issue time (a frame time).
    pub issue: chrono::DateTime<chrono::Utc>,
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// The plant's mean GHI under the frozen-advected true sky \[W m⁻²\].
    pub ghi_wm2: f64,
}

/// The yardstick's forecasts at every frame time and each of [`HORIZONS_S`]: the plant's mean GHI
/// over the same sample points as the truth's `plant` target.
pub fn frozen_advection(scene: &Scene) -> Vec<FrozenForecast> {
    use rayon::prelude::*;
    let points: Vec<[f64; 2]> = scene.plant.blocks.iter().flat_map(|b| b.points_m.iter().copied()).collect();
    let issues = scene.frame_times();
    issues
        .par_iter()
        .flat_map_iter(|issue| {
            let points = &points;
            HORIZONS_S.iter().map(move |&h| {
                let valid = *issue + Duration::seconds(i64::from(h));
                let inst = scene.world.frozen_instant(issue, &valid);
                let sum: f64 = points.iter().map(|p| scene.world.irradiance_at(&inst, *p).ghi_wm2).sum();
                FrozenForecast { issue: *issue, horizon_s: h, ghi_wm2: if points.is_empty() { f64::NAN } else { sum / points.len() as f64 } }
            })
        })
        .collect()
}

/// The yardstick as CSV (see the module documentation).
pub fn yardstick_csv(forecasts: &[FrozenForecast]) -> Vec<u8> {
    let mut out = CsvTable::with_header_line("issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2");
    for f in forecasts {
        out.row([
            fmt_time(&f.issue),
            fmt_time(&(f.issue + Duration::seconds(i64::from(f.horizon_s)))),
            f.horizon_s.to_string(),
            crate::plant::PLANT_TARGET.to_string(),
            format!("{:.2}", f.ghi_wm2),
        ]);
    }
    out.into_bytes()
}

/// Write `truth/yardstick.csv` of a sequence written by [`super::write_sequence`] (atomically).
///
/// # Errors
/// The file could not be written.
pub fn write_yardstick(scene: &Scene, out: &Path) -> Result<(), SynthError> {
    super::put(out.join("truth").join("yardstick.csv"), &yardstick_csv(&frozen_advection(scene)))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The truth's plant-mean GHI of `scene` at `t` (the mean over the same points).
    fn plant_truth(scene: &Scene, t: &chrono::DateTime<chrono::Utc>) -> f64 {
        let points: Vec<[f64; 2]> = scene.plant.blocks.iter().flat_map(|b| b.points_m.iter().copied()).collect();
        let inst = scene.world.instant(t);
        points.iter().map(|p| scene.world.irradiance_at(&inst, *p).ghi_wm2).sum::<f64>() / points.len() as f64
    }

    /// A 2-minute `broken-cumulus-fast` (seed 5), its sky frozen (no evolution, constant cover)
    /// or as the scene has it.
    fn short_scene(frozen: bool) -> Scene {
        let mut spec = crate::synth::scene("broken-cumulus-fast").expect("scene");
        spec.duration_min = 2.0;
        if frozen {
            for l in &mut spec.layers {
                l.evolution_min = 1e9;
                l.cover_end = l.cover_start;
            }
        }
        Scene::new(spec, 5).expect("scene")
    }

    /// Frozen advection is exact for a field that does not evolve: with the evolution switched off
    /// and constant cover, the yardstick at every horizon equals the truth at its target time.
    /// With the scene's own evolution it differs (the yardstick is not the truth).
    #[test]
    fn frozen_advection_of_a_frozen_sky_is_the_truth() {
        let valid = |x: &FrozenForecast| x.issue + Duration::seconds(i64::from(x.horizon_s));
        let scene = short_scene(true);
        let f = frozen_advection(&scene);
        assert_eq!(f.len(), scene.frame_times().len() * HORIZONS_S.len());
        let worst = f.iter().step_by(7).map(|x| (x.ghi_wm2 - plant_truth(&scene, &valid(x))).abs()).fold(0.0, f64::max);
        assert!(worst < 1e-3, "frozen sky: yardstick differs from the truth by {worst} W/m²");
        // The scene's own evolving sky: the 15-minute yardstick is not the truth.
        let evolving = short_scene(false);
        let differ = frozen_advection(&evolving).iter().filter(|x| x.horizon_s == 900).any(|x| (x.ghi_wm2 - plant_truth(&evolving, &valid(x))).abs() > 1.0);
        assert!(differ, "an evolving sky's yardstick equals its truth");
    }

    #[test]
    fn csv_has_the_columns_the_scoring_reads() {
        let t = chrono::DateTime::parse_from_rfc3339("2026-06-21T10:00:00Z").expect("time").with_timezone(&chrono::Utc);
        let csv = String::from_utf8(yardstick_csv(&[FrozenForecast { issue: t, horizon_s: 300, ghi_wm2: 512.345 }])).expect("utf8");
        assert_eq!(csv, "issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2\n2026-06-21T10:00:00Z,2026-06-21T10:05:00Z,300,plant,512.35\n");
    }
}
