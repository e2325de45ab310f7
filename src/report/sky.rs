//! The aggregate report's sky-type section: the plant's scores per sky type of the issue time,
//! from the days' summed sky statistics ([`crate::stats::SkyStats`]).

use std::fmt::Write as _;

use super::{ReportDay, esc, fmt_opt};
use crate::stats::{SkyStats, score_of};

/// Issue times, days (by the type most of their issue times had) and the plant's pooled 5–15 min
/// scores per sky type, with the skill at 5, 10 and 15 minutes.
pub(super) fn aggregate_sky_section(sky: &SkyStats, days: &[ReportDay<'_>]) -> String {
    let mut html = String::from(
        "<h2 id='sky-types'>By sky type</h2><p>Each issue time is classed from the plant's clear-sky index kc (GHI over clear-sky GHI, of the truth or \
         the pyranometers' mean; the plant meter's power over the clear-sky power without pyranometers) from 10 minutes before it to 20 after: \
         clear (mean kc ≥ 0.8, σΔkc ≤ 0.03), overcast (mean ≤ 0.5, σΔkc ≤ 0.03), variable otherwise, unknown with under 10 values \
         (σΔkc, the standard deviation of the 1-minute changes of kc: Hoff &amp; Perez 2010). A day counts under the type most of its issue times had. \
         Scores pool the horizons 5–15 min from the summed sums (<code>sky_stats.csv</code>).</p>",
    );
    let pooled = sky.pooled();
    if pooled.is_empty() && sky.issues.is_empty() {
        html += "<p>No issue time was classed.</p>";
        return html;
    }
    html += "<table id='sky-type-table'><tr><th>sky type</th><th>days</th><th>issue times</th><th>pairs 5–15 min</th><th>RMSE W/m²</th><th>persistence RMSE</th><th>skill</th><th>skill 5 min</th><th>10 min</th><th>15 min</th><th>CRPS</th><th>P10–P90 coverage</th></tr>";
    let mut kinds: Vec<&str> = sky.issues.keys().map(String::as_str).chain(pooled.iter().map(|p| p.0.as_str())).collect();
    kinds.sort_unstable();
    kinds.dedup();
    for k in kinds {
        let ndays = days.iter().filter(|d| d.sky_type == k).count();
        let p = pooled.iter().find(|p| p.0 == k).map(|p| &p.2);
        let at = |h: u32| sky.table.rows.get(&(k.to_string(), h)).map(|s| score_of(k, h, s)).and_then(|s| s.skill);
        let _ = write!(
            html,
            "<tr><td style='text-align:left'>{}</td><td>{ndays}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            esc(k),
            sky.issues.get(k).copied().unwrap_or(0),
            p.map_or(0, |s| s.n),
            fmt_opt(p.map(|s| s.rmse_wm2), 1),
            fmt_opt(p.map(|s| s.rmse_persistence_wm2), 1),
            fmt_opt(p.and_then(|s| s.skill), 3),
            fmt_opt(at(300), 3),
            fmt_opt(at(600), 3),
            fmt_opt(at(900), 3),
            fmt_opt(p.and_then(|s| s.crps_wm2), 1),
            fmt_opt(p.and_then(|s| s.coverage_p10_p90), 2),
        );
    }
    html += "</table>";
    html
}
