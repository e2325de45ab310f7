//! The self-contained HTML report of a replay: plots (inline SVG) and example pictures (inline PNG).

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

use base64::Engine as _;
use chrono::{DateTime, Utc};

use crate::io::parse_time;
use crate::verify::{Evaluation, Truth, read_rows};

/// One line of a chart.
pub struct Series {
    /// Legend label.
    pub label: String,
    /// Colour (CSS).
    pub colour: String,
    /// Points (x, y); NaN y breaks the line.
    pub points: Vec<(f64, f64)>,
    /// Dashed line.
    pub dashed: bool,
}

/// A shaded band between two curves.
pub struct BandArea {
    /// Legend label.
    pub label: String,
    /// Colour (CSS).
    pub colour: String,
    /// Points (x, low, high).
    pub points: Vec<(f64, f64, f64)>,
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;")
}

/// A line chart as an SVG string: axes with ticks, labels, legend.
///
/// One piece on purpose: the SVG is written top to bottom (frame, ticks, bands, lines, legend)
/// from one set of scales.
pub fn line_chart(title: &str, x_label: &str, y_label: &str, series: &[Series], bands: &[BandArea], x_is_time_min: bool) -> String {
    let (w, h, ml, mr, mt, mb) = (760.0, 300.0, 60.0, 20.0, 30.0, 45.0);
    let mut xs = vec![];
    let mut ys = vec![];
    for s in series {
        for p in &s.points {
            if p.1.is_finite() {
                xs.push(p.0);
                ys.push(p.1);
            }
        }
    }
    for b in bands {
        for p in &b.points {
            if p.1.is_finite() && p.2.is_finite() {
                xs.push(p.0);
                ys.push(p.1);
                ys.push(p.2);
            }
        }
    }
    let mut svg = format!("<svg xmlns='http://www.w3.org/2000/svg' width='{w}' height='{h}' font-family='sans-serif' font-size='11'>");
    let _ = write!(svg, "<text x='{}' y='18' font-size='13' font-weight='bold'>{}</text>", ml, esc(title));
    if xs.is_empty() {
        svg += "<text x='60' y='150'>no data</text></svg>";
        return svg;
    }
    let (x0, x1) = (xs.iter().cloned().fold(f64::MAX, f64::min), xs.iter().cloned().fold(f64::MIN, f64::max));
    let (mut y0, mut y1) = (ys.iter().cloned().fold(f64::MAX, f64::min), ys.iter().cloned().fold(f64::MIN, f64::max));
    if y0 > 0.0 && y0 < 0.3 * y1 {
        y0 = 0.0;
    }
    if (y1 - y0).abs() < 1e-9 {
        y1 = y0 + 1.0;
    }
    let pad = 0.05 * (y1 - y0);
    let nonneg = y0 >= 0.0;
    let (y0, y1) = (if nonneg { (y0 - pad).max(0.0) } else { y0 - pad }, y1 + pad);
    let decimals = if y1 - y0 < 2.0 { 2 } else if y1 - y0 < 20.0 { 1 } else { 0 };
    let x1 = if x1 > x0 { x1 } else { x0 + 1.0 };
    let sx = |x: f64| ml + (x - x0) / (x1 - x0) * (w - ml - mr);
    let sy = |y: f64| mt + (1.0 - (y - y0) / (y1 - y0)) * (h - mt - mb);
    // Axes and ticks.
    let _ = write!(svg, "<rect x='{ml}' y='{mt}' width='{}' height='{}' fill='none' stroke='#888'/>", w - ml - mr, h - mt - mb);
    for k in 0..=5 {
        let yv = y0 + (y1 - y0) * k as f64 / 5.0;
        let _ = write!(svg, "<line x1='{ml}' x2='{}' y1='{:.1}' y2='{:.1}' stroke='#eee'/><text x='{}' y='{:.1}' text-anchor='end'>{:.*}</text>", w - mr, sy(yv), sy(yv), ml - 4.0, sy(yv) + 4.0, decimals, yv);
        let xv = x0 + (x1 - x0) * k as f64 / 5.0;
        let lab = if x_is_time_min { format!("{:02}:{:02}", (xv / 60.0).floor() as i64 % 24, (xv % 60.0).floor() as i64) } else { format!("{xv:.0}") };
        let _ = write!(svg, "<text x='{:.1}' y='{}' text-anchor='middle'>{}</text>", sx(xv), h - mb + 14.0, lab);
    }
    let _ = write!(svg, "<text x='{}' y='{}' text-anchor='middle'>{}</text>", ml + (w - ml - mr) / 2.0, h - 8.0, esc(x_label));
    let _ = write!(svg, "<text x='14' y='{}' transform='rotate(-90 14 {})' text-anchor='middle'>{}</text>", mt + (h - mt - mb) / 2.0, mt + (h - mt - mb) / 2.0, esc(y_label));
    // Bands.
    for b in bands {
        let pts: Vec<&(f64, f64, f64)> = b.points.iter().filter(|p| p.1.is_finite() && p.2.is_finite()).collect();
        if pts.len() < 2 {
            continue;
        }
        let mut d = String::new();
        for (i, p) in pts.iter().enumerate() {
            let _ = write!(d, "{}{:.1},{:.1} ", if i == 0 { "M" } else { "L" }, sx(p.0), sy(p.2));
        }
        for p in pts.iter().rev() {
            let _ = write!(d, "L{:.1},{:.1} ", sx(p.0), sy(p.1));
        }
        let _ = write!(svg, "<path d='{d}Z' fill='{}' fill-opacity='0.25' stroke='none'/>", b.colour);
    }
    // Lines.
    for s in series {
        let mut d = String::new();
        let mut pen = false;
        for p in &s.points {
            if !p.1.is_finite() {
                pen = false;
                continue;
            }
            let _ = write!(d, "{}{:.1},{:.1} ", if pen { "L" } else { "M" }, sx(p.0), sy(p.1));
            pen = true;
        }
        let dash = if s.dashed { " stroke-dasharray='5,3'" } else { "" };
        let _ = write!(svg, "<path d='{d}' fill='none' stroke='{}' stroke-width='1.6'{dash}/>", s.colour);
    }
    // Legend.
    let mut lx = ml + 8.0;
    for (label, colour) in series.iter().map(|s| (&s.label, &s.colour)).chain(bands.iter().map(|b| (&b.label, &b.colour))) {
        let _ = write!(svg, "<rect x='{lx}' y='{}' width='12' height='4' fill='{colour}'/><text x='{}' y='{}'>{}</text>", mt + 8.0, lx + 16.0, mt + 13.0, esc(label));
        lx += 24.0 + 6.5 * label.chars().count() as f64;
    }
    svg + "</svg>"
}

fn minute_of_day(t: &DateTime<Utc>) -> f64 {
    use chrono::Timelike;
    t.hour() as f64 * 60.0 + t.minute() as f64 + t.second() as f64 / 60.0
}

/// Why a report could not be written.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// A replay table is missing or malformed.
    #[error(transparent)]
    Input(#[from] crate::io::InputError),
    /// A picture or the page could not be read or written.
    #[error(transparent)]
    Io(#[from] std::io::Error),
}

/// Write `report.html` for a replay in `out`; `truth` (a synthetic sequence's) gives what was
/// "measured". Returns the path.
///
/// # Errors
/// Unreadable replay outputs or a failed write.
pub fn write_report(out: &Path, truth: Option<&Truth>, eval: Option<&Evaluation>, title: &str) -> Result<std::path::PathBuf, ReportError> {
    crate::output_set::check_manifest(out)?;
    let fc = read_rows(&out.join("forecasts.csv"))?;
    let rows: Vec<BTreeMap<String, String>> = fc.into_iter().map(|r| r.into_iter().collect()).collect();
    let mut html = String::new();
    let _ = write!(
        html,
        "<!doctype html><html><head><meta charset='utf-8'><title>{t}</title><style>body{{font-family:sans-serif;max-width:800px;margin:20px auto;color:#222}}\
         .caution{{border:2px solid #c60;padding:8px;background:#fff4e5}}table{{border-collapse:collapse}}td,th{{border:1px solid #ccc;padding:3px 8px;text-align:right}}</style></head><body>\
         <h1>{t}</h1><p class='caution'><b>Advisory only.</b> These forecasts and ramp warnings are advisory; they are not a protection system. \
         Grid codes, local codes and licensed practice govern plant operation and the safety of people near electrical plant.</p>",
        t = esc(title)
    );
    if let Some(e) = eval {
        html += &scores_section(e);
    }
    html += &forecast_section(&rows, truth);
    html += &motion_section(out)?;
    html += &frames_section(out)?;
    html += &ramps_section(&rows, out);
    html += &pictures_section(out)?;
    html += "</body></html>";
    let path = out.join("report.html");
    crate::io::write_atomic(&path, html.as_bytes())?;
    Ok(path)
}

/// The scores against the truth: a table every 5 minutes of horizon, motion, segmentation, ramps,
/// and RMSE by horizon.
fn scores_section(e: &Evaluation) -> String {
    let mut html = String::new();
    html += "<h2>Scores (plant-mean GHI against the truth)</h2><table><tr><th>horizon</th><th>RMSE W/m²</th><th>MAE</th><th>MBE</th><th>persistence RMSE</th><th>skill</th><th>P10–P90 coverage</th></tr>";
    for h in &e.plant {
        if h.horizon_s % 300 == 0 {
            let cov = e.bands.iter().find(|b| b.horizon_s == h.horizon_s).map(|b| format!("{:.0} %", 100.0 * b.coverage)).unwrap_or_default();
            let _ = write!(html, "<tr><td>{} min</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.3}</td><td>{cov}</td></tr>", h.horizon_s / 60, h.rmse_wm2, h.mae_wm2, h.mbe_wm2, h.rmse_persistence_wm2, h.skill);
        }
    }
    html += "</table>";
    let _ = write!(html, "<p>Motion: median speed error {:.2} m/s, direction error {:.1}°. Segmentation: {:.1} % correct (zenith &lt; 70°, &gt; 10° from the sun).</p>", e.motion.speed_error_mps, e.motion.direction_error_deg, 100.0 * e.segmentation.accuracy);
    if let Some(r) = &e.ramps {
        let _ = write!(html, "<p>Ramps at {:.0} min lead (±{:.0} min, probability ≥ {:.1}): POD {:.2}, FAR {:.2}, CSI {:.2}.</p>", r.lead_s / 60.0, r.window_s / 60.0, r.min_probability, r.pod, r.far, r.csi);
    }
    // Skill versus horizon.
    let f: Vec<(f64, f64)> = e.plant.iter().map(|h| (h.horizon_s as f64 / 60.0, h.rmse_wm2)).collect();
    let p: Vec<(f64, f64)> = e.plant.iter().map(|h| (h.horizon_s as f64 / 60.0, h.rmse_persistence_wm2)).collect();
    html += &line_chart("RMSE by horizon", "horizon [min]", "RMSE [W/m²]", &[
        Series { label: "forecast".into(), colour: "#1f6fd1".into(), points: f, dashed: false },
        Series { label: "smart persistence".into(), colour: "#999".into(), points: p, dashed: true },
    ], &[], false);
    html
}

/// The plant-mean GHI forecast 5, 10 and 15 minutes ahead with its band, against the truth when
/// there is one.
fn forecast_section(rows: &[BTreeMap<String, String>], truth: Option<&Truth>) -> String {
    let mut html = String::new();
    let num = |r: &BTreeMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    html += "<h2>Forecast against what happened (plant-mean GHI)</h2>";
    for lead in [300u32, 600, 900] {
        let mut f = vec![];
        let mut band = vec![];
        let mut obs = vec![];
        for r in rows.iter().filter(|r| r.get("block").map(String::as_str) == Some(crate::plant::PLANT_TARGET) && num(r, "horizon_s") as u32 == lead) {
            let Ok(t) = parse_time("t", &r["target_time_utc"]) else { continue };
            let x = minute_of_day(&t);
            f.push((x, num(r, "ghi_wm2")));
            band.push((x, num(r, "ghi_p10_wm2"), num(r, "ghi_p90_wm2")));
            if let Some((g, _)) = truth.and_then(|tr| tr.at(&t, crate::plant::PLANT_TARGET)) {
                obs.push((x, g));
            }
        }
        let mut s = vec![Series { label: format!("forecast {} min ahead", lead / 60), colour: "#1f6fd1".into(), points: f, dashed: false }];
        if !obs.is_empty() {
            s.push(Series { label: "truth".into(), colour: "#222".into(), points: obs, dashed: false });
        }
        html += &line_chart(&format!("{} minutes ahead", lead / 60), "target time [UTC]", "GHI [W/m²]", &s, &[BandArea { label: "P10–P90".into(), colour: "#1f6fd1".into(), points: band }], true);
    }
    html
}

/// Filtered cloud speed and direction of each tracked layer.
fn motion_section(out: &Path) -> Result<String, ReportError> {
    let mut html = String::new();
    // Motion and cloud fraction.
    let mo = read_rows(&out.join("motion.csv"))?;
    let (mut speed, mut dir, mut speed2, mut dir2) = (vec![], vec![], vec![], vec![]);
    let val = |r: &std::collections::HashMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    for r in &mo {
        let Ok(t) = parse_time("t", &r["time_utc"]) else { continue };
        let x = minute_of_day(&t);
        speed.push((x, val(r, "speed_mps")));
        dir.push((x, val(r, "toward_deg")));
        // The second tracked layer, when there is one.
        let (e, n) = (val(r, "second_east_mps"), val(r, "second_north_mps"));
        if e.is_finite() && n.is_finite() {
            speed2.push((x, e.hypot(n)));
            dir2.push((x, e.atan2(n).to_degrees().rem_euclid(360.0)));
        }
    }
    html += "<h2>Cloud motion</h2>";
    let mut sp = vec![Series { label: "filtered speed (first layer)".into(), colour: "#c0392b".into(), points: speed, dashed: false }];
    let mut dr = vec![Series { label: "direction (first layer)".into(), colour: "#8e44ad".into(), points: dir, dashed: false }];
    if !speed2.is_empty() {
        sp.push(Series { label: "second layer".into(), colour: "#e67e22".into(), points: speed2, dashed: true });
        dr.push(Series { label: "second layer".into(), colour: "#e67e22".into(), points: dir2, dashed: true });
    }
    html += &line_chart("Speed", "time [UTC]", "speed [m/s]", &sp, &[], true);
    html += &line_chart("Direction (toward, clockwise from north)", "time [UTC]", "direction [°]", &dr, &[], true);
    Ok(html)
}

/// Cloud fraction per frame, and the band-width scales of the online calibration when they moved.
fn frames_section(out: &Path) -> Result<String, ReportError> {
    let mut html = String::new();
    let fr = read_rows(&out.join("frames.csv"))?;
    let cf: Vec<(f64, f64)> = fr
        .iter()
        .filter_map(|r| Some((minute_of_day(&parse_time("t", &r["time_utc"]).ok()?), r["cloud_fraction"].parse::<f64>().ok()?)))
        .collect();
    html += &line_chart("Cloud fraction (zenith < 70°)", "time [UTC]", "cloud fraction", &[Series { label: "cloud fraction".into(), colour: "#555".into(), points: cf, dashed: false }], &[], true);
    // The bands' online calibration (only when the replay had pyranometers to verify against).
    let scale = |k: &str| -> Vec<(f64, f64)> {
        fr.iter().filter_map(|r| Some((minute_of_day(&parse_time("t", &r["time_utc"]).ok()?), r.get(k)?.parse::<f64>().ok()?))).collect()
    };
    let scales: Vec<Series> = [("band_scale_5min", "5 min", "#1f6fd1"), ("band_scale_10min", "10 min", "#16a085"), ("band_scale_15min", "15 min", "#c0392b")]
        .into_iter()
        .map(|(k, label, colour)| Series { label: label.into(), colour: colour.into(), points: scale(k), dashed: false })
        .filter(|s| s.points.iter().any(|p| (p.1 - 1.0).abs() > 1e-9))
        .collect();
    if !scales.is_empty() {
        html += "<p>The P10–P90 bands are widened or narrowed per horizon until they hold 80 % of what the pyranometers measure (1 = the ensemble's own spread).</p>";
        html += &line_chart("Band width scale from the online calibration", "time [UTC]", "scale", &scales, &[], true);
    }
    Ok(html)
}

/// The plant power forecast 5 minutes ahead and the alarm changes.
fn ramps_section(rows: &[BTreeMap<String, String>], out: &Path) -> String {
    let mut html = String::new();
    let num = |r: &BTreeMap<String, String>, k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    // Ramp timeline.
    let p5: Vec<(f64, f64)> = rows
        .iter()
        .filter(|r| r.get("block").map(String::as_str) == Some(crate::plant::PLANT_TARGET) && num(r, "horizon_s") as u32 == 300)
        .filter_map(|r| Some((minute_of_day(&parse_time("t", &r["target_time_utc"]).ok()?), num(r, "power_kw") / 1000.0)))
        .collect();
    html += "<h2>Ramps and alarms</h2>";
    html += &line_chart("Plant AC power forecast 5 minutes ahead", "target time [UTC]", "power [MW]", &[Series { label: "forecast".into(), colour: "#16a085".into(), points: p5, dashed: false }], &[], true);
    if let Ok(al) = read_rows(&out.join("alarms.csv")) {
        html += "<table><tr><th>time</th><th>from</th><th>to</th><th>probability</th><th>why</th></tr>";
        for r in al.iter().take(50) {
            let _ = write!(html, "<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td style='text-align:left'>{}</td></tr>", esc(&r["time_utc"]), esc(&r["from"]), esc(&r["to"]), esc(&r["probability"]), esc(&r["reason"]));
        }
        html += "</table>";
    }
    html
}

/// Three overlay pictures, inline.
fn pictures_section(out: &Path) -> Result<String, ReportError> {
    let mut html = String::new();
    // Example pictures.
    let mut pics: Vec<_> = std::fs::read_dir(out.join("overlays")).map(|d| d.flatten().map(|e| e.path()).collect()).unwrap_or_default();
    pics.sort();
    if !pics.is_empty() {
        html += "<h2>Example frames: cloud classes (thin amber, thick violet) and the shadow map over the plant</h2>";
        for p in pics.iter().step_by((pics.len() / 3).max(1)).take(3) {
            let b = std::fs::read(p)?;
            let _ = write!(html, "<p>{}<br><img style='max-width:100%' src='data:image/png;base64,{}'></p>", esc(&p.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default()), base64::engine::general_purpose::STANDARD.encode(b));
        }
    }
    Ok(html)
}
