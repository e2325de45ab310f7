//! A nowcast as records, the one output vocabulary of replay and live mode: the rows of
//! `forecasts.csv` and `motion.csv`, and the JSON the live API serves and stores in its history.
//! A column added here appears in both modes.

use crate::io::{CsvTable, fmt_time};
use crate::nowcast::Nowcast;

/// Header of `forecasts.csv`.
pub const FORECAST_HEADER: &str = "issue_time_utc,target_time_utc,horizon_s,block,ghi_wm2,dni_wm2,dhi_wm2,poa_wm2,ghi_clear_wm2,fallback_share,fallback,power_kw,ghi_p10_wm2,ghi_p50_wm2,ghi_p90_wm2,power_p10_kw,power_p50_kw,power_p90_kw\n";

/// Append a nowcast's forecast rows (numbers written by [`CsvTable::field_fixed`]: the text of
/// `format!("{x:.2}")` without a `String` per field).
pub fn forecast_rows(nc: &Nowcast, out: &mut CsvTable) {
    let issue = fmt_time(&nc.time);
    // Rows of one horizon share their target time: formatted once per horizon.
    let mut target: Option<(chrono::DateTime<chrono::Utc>, String)> = None;
    for (name, r) in nc.forecast.rows() {
        if target.as_ref().is_none_or(|(t, _)| *t != r.time) {
            target = Some((r.time, fmt_time(&r.time)));
        }
        let b = r.band.as_ref();
        out.field(&issue);
        out.field(target.as_ref().map(|t| t.1.as_str()).unwrap_or_default());
        out.field(r.horizon_s.to_string());
        out.field(name);
        for v in [r.irradiance.ghi_wm2, r.irradiance.dni_wm2, r.irradiance.dhi_wm2, r.poa_wm2, r.ghi_clear_wm2] {
            out.field_fixed(v, 2);
        }
        out.field_fixed(r.fallback_share, 3);
        out.field(if r.fallback_share > 0.0 { "1" } else { "0" });
        out.field_fixed(r.power_kw, 2);
        match b {
            Some(b) => {
                for v in [b.ghi_wm2[0], b.ghi_wm2[1], b.ghi_wm2[2], b.power_kw[0], b.power_kw[1], b.power_kw[2]] {
                    out.field_fixed(v, 2);
                }
            }
            None => {
                for _ in 0..6 {
                    out.field("");
                }
            }
        }
        out.end_row();
    }
}

/// Header of `motion.csv`.
pub const MOTION_HEADER: &str = "time_utc,dt_s,blocks_tried,blocks_used,global_east_mps,global_north_mps,layers,layer1_east_mps,layer1_north_mps,layer1_blocks,layer2_east_mps,layer2_north_mps,layer2_blocks,east_mps,north_mps,sigma_mps,speed_mps,toward_deg,second_east_mps,second_north_mps,second_sigma_mps,blocks_static,locked_at_zero,cbh_m,cbh_sigma_m,cbh_source,layer2_cbh_m,layer2_cbh_sigma_m,layer2_cbh_source,map_plane_m\n";

/// Append a nowcast's motion row.
pub fn motion_row(nc: &Nowcast, out: &mut CsvTable) {
    let f = |v: Option<f64>| v.map(|x| format!("{x:.3}")).unwrap_or_default();
    let m = nc.measurement.as_ref();
    let l = |i: usize| m.and_then(|m| m.layers.get(i));
    let mut row = vec![
        fmt_time(&nc.time),
        f(nc.dt_s),
        m.map(|m| m.blocks_tried).unwrap_or(0).to_string(),
        m.map(|m| m.vectors.len()).unwrap_or(0).to_string(),
        f(m.and_then(|m| m.global_mps).map(|g| g[0])),
        f(m.and_then(|m| m.global_mps).map(|g| g[1])),
        m.map(|m| m.layers.len()).unwrap_or(0).to_string(),
    ];
    for i in 0..2 {
        row.extend([f(l(i).map(|x| x.v_mps[0])), f(l(i).map(|x| x.v_mps[1])), l(i).map(|x| x.blocks.to_string()).unwrap_or_default()]);
    }
    let mo = nc.motion;
    let second = nc.layers.get(1).map(|l| l.motion);
    row.extend([
        f(mo.map(|m| m.v_mps[0])),
        f(mo.map(|m| m.v_mps[1])),
        f(mo.map(|m| m.sigma_mps)),
        f(mo.map(|m| m.v_mps[0].hypot(m.v_mps[1]))),
        f(mo.map(|m| m.v_mps[0].atan2(m.v_mps[1]).to_degrees().rem_euclid(360.0))),
        f(second.map(|m| m.v_mps[0])),
        f(second.map(|m| m.v_mps[1])),
        f(second.map(|m| m.sigma_mps)),
        m.map(|m| m.blocks_static).unwrap_or(0).to_string(),
        m.map(|m| m.locked_at_zero as u8).unwrap_or(0).to_string(),
        // The cloud base height the forecast used, its one-sigma uncertainty and source (crate::cbh).
        format!("{:.0}", nc.cbh.cbh_m),
        format!("{:.0}", nc.cbh.sigma_m),
        nc.cbh.source.name().to_string(),
        // With two layers advected, the second layer's base, uncertainty and source.
        nc.cbh_upper.map(|c| format!("{:.0}", c.cbh_m)).unwrap_or_default(),
        nc.cbh_upper.map(|c| format!("{:.0}", c.sigma_m)).unwrap_or_default(),
        nc.cbh_upper.map(|c| c.source.name().to_string()).unwrap_or_default(),
        // The height of the map's plane (the configured base, the series, or the estimate it followed).
        format!("{:.0}", nc.cbh_m),
    ]);
    out.row(row);
}

/// Summary of a nowcast for the API.
pub fn nowcast_json(nc: &Nowcast) -> serde_json::Value {
    let rows: Vec<serde_json::Value> = nc
        .forecast
        .rows()
        .map(|(name, r)| {
            let b = r.band.as_ref();
            serde_json::json!({
                "block": name, "horizon_s": r.horizon_s, "target_time_utc": fmt_time(&r.time),
                "ghi_wm2": r.irradiance.ghi_wm2, "dni_wm2": r.irradiance.dni_wm2, "dhi_wm2": r.irradiance.dhi_wm2,
                "poa_wm2": r.poa_wm2, "power_kw": r.power_kw, "fallback_share": r.fallback_share,
                "ghi_p10_wm2": b.map(|b| b.ghi_wm2[0]), "ghi_p50_wm2": b.map(|b| b.ghi_wm2[1]), "ghi_p90_wm2": b.map(|b| b.ghi_wm2[2]),
                "power_p10_kw": b.map(|b| b.power_kw[0]), "power_p50_kw": b.map(|b| b.power_kw[1]), "power_p90_kw": b.map(|b| b.power_kw[2]),
            })
        })
        .collect();
    serde_json::json!({
        "issue_time_utc": fmt_time(&nc.time),
        "cloud_fraction": nc.cloud_fraction,
        // The cloud base height used, its one-sigma uncertainty and source (crate::cbh).
        "cbh_m": nc.cbh.cbh_m,
        "cbh_sigma_m": nc.cbh.sigma_m,
        "cbh_source": nc.cbh.source.name(),
        // The height of the cloud map's plane.
        "map_plane_m": nc.cbh_m,
        "sun_elevation_deg": nc.sun.elevation_rad().to_degrees(),
        "motion": nc.motion.map(|m| serde_json::json!({"east_mps": m.v_mps[0], "north_mps": m.v_mps[1], "sigma_mps": m.sigma_mps,
            "speed_mps": m.v_mps[0].hypot(m.v_mps[1]), "toward_deg": m.v_mps[0].atan2(m.v_mps[1]).to_degrees().rem_euclid(360.0)})),
        // Every tracked layer the forecast advected, the most opaque first, with the base height
        // the forecast used for it, its uncertainty and source.
        "layers": nc.layers.iter().enumerate().map(|(i, l)| {
            let c = if i == 0 { Some(nc.cbh) } else { nc.cbh_upper.filter(|_| i == 1) };
            serde_json::json!({"east_mps": l.motion.v_mps[0], "north_mps": l.motion.v_mps[1], "sigma_mps": l.motion.sigma_mps,
            "speed_mps": l.motion.v_mps[0].hypot(l.motion.v_mps[1]), "toward_deg": l.motion.v_mps[0].atan2(l.motion.v_mps[1]).to_degrees().rem_euclid(360.0),
            "thick_share": l.thick_share, "cbh_m": c.map(|c| c.cbh_m), "cbh_sigma_m": c.map(|c| c.sigma_m), "cbh_source": c.map(|c| c.source.name())})
        }).collect::<Vec<_>>(),
        "alarm": nc.alarm.name(),
        "alarm_reason": nc.alarm_reason,
        "alarm_basis": nc.alarm_basis,
        "ramps": nc.ramps,
        "forecast": rows,
        // The forecast mean GHI at the pyranometers, per horizon (empty without pyranometers): what
        // the measured pyranometers are compared with.
        "pyranometers_forecast": nc.forecast.plant.iter().zip(&nc.forecast.probes_ghi_wm2)
            .map(|(r, g)| serde_json::json!({"horizon_s": r.horizon_s, "target_time_utc": fmt_time(&r.time), "ghi_wm2": g}))
            .collect::<Vec<_>>(),
        "advisory": "Forecasts and alarms are advisory, not a protection system.",
    })
}
