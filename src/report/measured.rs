//! The report's sections of scores against measurements: GHI against the pyranometers, power
//! against the meters, sky types, ramps, and what was left out.

use std::fmt::Write as _;

use super::esc;
use crate::measured::MeasuredEvaluation;

/// The scores against measurements: per horizon, per sky type, per block, ramps, and what was
/// left out and why.
pub(super) fn measured_section(e: &MeasuredEvaluation) -> String {
    use crate::verify::fmt_score;
    let mut html = String::new();
    html += "<h2 id='measured-scores'>Scores against the pyranometers (plant-mean GHI against their mean)</h2>";
    if e.plant.is_empty() {
        html += "<p>The measurements hold no pyranometer of the site.</p>";
    }
    html += "<table id='measured-horizons'><tr><th>horizon</th><th>n</th><th>RMSE W/m²</th><th>MAE</th><th>MBE</th><th>persistence RMSE</th><th>skill</th><th>CRPS</th><th>P10–P90 coverage</th></tr>";
    for h in &e.plant {
        let _ = write!(
            html,
            "<tr><td>{} min</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            h.horizon_s / 60,
            h.n,
            h.rmse_wm2,
            h.mae_wm2,
            h.mbe_wm2,
            h.rmse_persistence_wm2,
            fmt_score(h.skill, 3),
            fmt_score(h.crps_wm2, 1),
            fmt_score(h.coverage_p10_p90, 2)
        );
    }
    html += "</table>";
    let _ = write!(
        html,
        "<h3>By sky type (pooled 5–15 min)</h3><p>Each issue time is classed from the measured clear-sky index kc of the {} from 10 minutes before it to 20 after: clear (mean ≥ 0.8, σΔkc ≤ 0.03), overcast (mean ≤ 0.5, σΔkc ≤ 0.03), variable otherwise; unknown with fewer than 10 readings (σΔkc: Hoff &amp; Perez 2010).</p>",
        esc(e.sky_index.describe())
    );
    html += "<table id='measured-sky-types'><tr><th>sky type</th><th>issue times</th><th>n</th><th>RMSE W/m²</th><th>persistence RMSE</th><th>skill</th><th>MBE</th></tr>";
    for (k, p) in &e.by_sky_type {
        let _ = write!(html, "<tr><td>{}</td><td>{}</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{:.1}</td></tr>", esc(k), e.issues_by_sky_type.get(k).copied().unwrap_or(0), p.n, p.rmse_wm2, p.rmse_persistence_wm2, fmt_score(p.skill, 3), p.mbe_wm2);
    }
    html += "</table>";
    if !e.by_block.is_empty() {
        html += "<h3>By block (its own pyranometers, pooled 5–15 min)</h3><table id='measured-blocks'><tr><th>block</th><th>n</th><th>RMSE W/m²</th><th>persistence RMSE</th><th>skill</th><th>MBE</th></tr>";
        for (k, p) in &e.by_block {
            let _ = write!(html, "<tr><td>{}</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{:.1}</td></tr>", esc(k), p.n, p.rmse_wm2, p.rmse_persistence_wm2, fmt_score(p.skill, 3), p.mbe_wm2);
        }
        html += "</table>";
    }
    if let Some(p) = &e.power {
        html += &power_section(p);
    }
    if !e.ramps.is_empty() {
        let _ = write!(
            html,
            "<h3>Ramps</h3><p id='measured-ramp-quantity'>Found in the {} on both sides: {}.</p>",
            esc(e.ramp_quantity.describe()),
            esc(&crate::measured::ramps::describe_definition(&e.ramp_definition, e.ramp_quantity))
        );
        html += "<table id='measured-ramps'><tr><th>lead</th><th>issue times</th><th>not scored</th><th>hits</th><th>misses</th><th>false alarms</th><th>POD</th><th>FAR</th><th>CSI</th></tr>";
        for r in &e.ramps {
            let _ = write!(
                html,
                "<tr><td>{} min</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                r.lead_min,
                r.issues_scored,
                r.issues_not_scored,
                r.hits,
                r.misses,
                r.false_alarms,
                fmt_score(r.pod, 2),
                fmt_score(r.far, 2),
                fmt_score(r.csi, 2)
            );
        }
        html += "</table>";
    }
    html += "<h3>Left out</h3><table id='measured-excluded'><tr><th style='text-align:left'>forecast rows left out, why</th><th>rows</th></tr>";
    if e.excluded.is_empty() {
        html += "<tr><td style='text-align:left'>none</td><td>0</td></tr>";
    }
    for (k, n) in &e.excluded {
        let _ = write!(html, "<tr><td style='text-align:left'>{}</td><td>{n}</td></tr>", esc(k));
    }
    html += "</table><table id='measured-screened'><tr><th style='text-align:left'>measurements flagged by the screening, column and why</th><th>values</th></tr>";
    if e.screened.is_empty() {
        html += "<tr><td style='text-align:left'>none</td><td>0</td></tr>";
    }
    for (k, n) in &e.screened {
        let _ = write!(html, "<tr><td style='text-align:left'>{}</td><td>{n}</td></tr>", esc(k));
    }
    html += "</table>";
    html
}

/// The forecast's AC power against the plant's meters: per horizon for the plant, at 5, 10 and 15
/// minutes per metered block, and pooled per sky type.
fn power_section(p: &crate::measured::power::PowerEvaluation) -> String {
    use crate::verify::fmt_score;
    let mut html = String::new();
    let rows = |html: &mut String, id: &str, name: &str, hs: &[crate::measured::power::PowerHorizon], every: bool| {
        let _ = write!(html, "<table id='{id}'><tr><th>{name}</th><th>horizon</th><th>n</th><th>RMSE kW</th><th>MAE</th><th>MBE</th><th>persistence RMSE</th><th>skill</th><th>CRPS</th><th>P10–P90 coverage</th></tr>");
        for h in hs.iter().filter(|h| every || [300, 600, 900].contains(&h.horizon_s)) {
            let _ = write!(
                html,
                "<tr><td>{}</td><td>{} min</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                esc(name), h.horizon_s / 60, h.n, h.rmse_kw, h.mae_kw, h.mbe_kw, h.rmse_persistence_kw, fmt_score(h.skill, 3), fmt_score(h.crps_kw, 1), fmt_score(h.coverage_p10_p90, 2)
            );
        }
        *html += "</table>";
    };
    let _ = write!(html, "<h2 id='measured-power'>Plant AC power against the meters</h2><p>Measured plant power: {}; AC rating {:.0} kW. Smart persistence of power: the measured power over the clear-sky power at the issue time, times the clear-sky power at the target.</p>", if p.plant_source.is_empty() { "none".to_string() } else { esc(&p.plant_source) }, p.plant_ac_rating_kw);
    if !p.plant.is_empty() {
        rows(&mut html, "measured-power-horizons", "plant", &p.plant, true);
        html += "<table id='measured-power-sky-types'><tr><th>sky type</th><th>n</th><th>RMSE kW</th><th>persistence RMSE</th><th>skill</th><th>MBE</th></tr>";
        for (k, s) in &p.by_sky_type {
            let _ = write!(html, "<tr><td>{}</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{:.1}</td></tr>", esc(k), s.n, s.rmse_kw, s.rmse_persistence_kw, fmt_score(s.skill, 3), s.mbe_kw);
        }
        html += "</table>";
    }
    for (b, hs) in &p.by_block {
        rows(&mut html, &format!("measured-power-block-{}", esc(b)), b, hs, false);
    }
    html += "<table id='measured-power-excluded'><tr><th style='text-align:left'>power rows left out, why</th><th>rows</th></tr>";
    for (k, n) in &p.excluded {
        let _ = write!(html, "<tr><td style='text-align:left'>{}</td><td>{n}</td></tr>", esc(k));
    }
    html += "</table>";
    html
}

