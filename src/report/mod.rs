//! The self-contained HTML report of a replay: plots (inline SVG) and example pictures (inline PNG).

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

use base64::Engine as _;
use chrono::{DateTime, Utc};

use crate::io::parse_time;
use crate::measured::MeasuredEvaluation;

mod measured;
mod sky;
use measured::measured_section;
use crate::plant::PLANT_TARGET;
use crate::stats::{Score, StatsTable};
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

pub(crate) fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;")
}

/// A step of 1, 2 or 5 × 10^k that cuts `span` into about `target` intervals (at most about
/// 1.4 × `target`), as (1, 2 or 5; k).
fn step_parts(span: f64, target: usize) -> (f64, i32) {
    let raw = span.abs() / target.max(1) as f64;
    if !(raw.is_finite() && raw > 0.0) {
        return (1.0, 0);
    }
    let k = raw.log10().floor() as i32;
    let f = raw / 10f64.powi(k);
    if f <= 1.0 + 1e-9 { (1.0, k) } else if f <= 2.0 + 1e-9 { (2.0, k) } else if f <= 5.0 + 1e-9 { (5.0, k) } else { (1.0, k + 1) }
}

/// `n` × m × 10^k, divided by an exact power of ten when k < 0 so that 3 × 0.1 gives 0.3.
fn scaled(n: f64, k: i32) -> f64 {
    if k >= 0 { n * 10f64.powi(k) } else { n / 10f64.powi(-k) }
}

/// A step of 1, 2 or 5 × 10^k that cuts `span` into about `target` intervals.
pub fn nice_step(span: f64, target: usize) -> f64 {
    let (m, k) = step_parts(span, target);
    scaled(m, k)
}

/// Round ticks for the values `lo..=hi`: multiples of a [`nice_step`] (about `target` intervals),
/// from the largest multiple at or below `lo` to the smallest at or above `hi`.
pub fn nice_ticks(lo: f64, hi: f64, target: usize) -> Vec<f64> {
    let (lo, hi) = if hi > lo { (lo, hi) } else { (lo, lo + 1.0) };
    let (m, k) = step_parts(hi - lo, target);
    let step = scaled(m, k);
    let (a, b) = ((lo / step + 1e-9).floor() as i64, (hi / step - 1e-9).ceil() as i64);
    (a..=b).map(|i| scaled(i as f64 * m, k) + 0.0).collect()
}

/// Decimals that show every multiple of a 1-2-5 `step` exactly (0 for steps of 1 and more).
fn tick_decimals(step: f64) -> usize {
    if step >= 1.0 { 0 } else { (-step.log10() - 1e-9).ceil().max(0.0) as usize }
}

/// Clock-time ticks [minute of day] inside `lo..=hi`: steps of 1, 2, 5, 10, 15, 30 minutes or 1, 2,
/// 3, 6 hours, about `target` intervals.
fn time_ticks(lo: f64, hi: f64, target: usize) -> Vec<f64> {
    const STEPS: [f64; 10] = [1.0, 2.0, 5.0, 10.0, 15.0, 30.0, 60.0, 120.0, 180.0, 360.0];
    let raw = (hi - lo).max(1.0) / target.max(1) as f64;
    let step = STEPS.iter().copied().find(|s| *s >= raw).unwrap_or(360.0);
    let first = (lo / step - 1e-9).ceil() as i64;
    (first..).map(|k| k as f64 * step).take_while(|v| *v <= hi + 1e-9).collect()
}

/// Ticks of a numeric x axis inside `lo..=hi` (the lines keep their full width); when `whole`
/// (every x is a whole number: day numbers, horizons in minutes) no finer than 1.
fn inner_ticks(lo: f64, hi: f64, target: usize, whole: bool) -> Vec<f64> {
    if whole && nice_step(hi - lo, target) < 1.0 {
        return (lo.ceil() as i64..=hi.floor() as i64).map(|v| v as f64).collect();
    }
    nice_ticks(lo, hi, target).into_iter().filter(|v| *v >= lo - 1e-9 && *v <= hi + 1e-9).collect()
}

/// The smallest and largest x and y of the finite points of the series and bands.
fn extent(series: &[Series], bands: &[BandArea]) -> Option<(f64, f64, f64, f64)> {
    let mut e: Option<(f64, f64, f64, f64)> = None;
    let mut add = |x: f64, y: f64| {
        let v = e.get_or_insert((x, x, y, y));
        *v = (v.0.min(x), v.1.max(x), v.2.min(y), v.3.max(y));
    };
    for p in series.iter().flat_map(|s| &s.points).filter(|p| p.1.is_finite()) {
        add(p.0, p.1);
    }
    for p in bands.iter().flat_map(|b| &b.points).filter(|p| p.1.is_finite() && p.2.is_finite()) {
        add(p.0, p.1);
        add(p.0, p.2);
    }
    e
}

/// The y axis's round ticks: from 0 when asked (or when the data start near it), else from a round
/// value below the data, to a round value above; a flat line gets a unit of room.
fn y_ticks(y0: f64, y1: f64, from_zero: bool) -> Vec<f64> {
    let y0 = if (from_zero && y0 >= 0.0) || (y0 > 0.0 && y0 < 0.3 * y1) { 0.0 } else { y0 };
    let (y0, y1) = if (y1 - y0).abs() < 1e-9 {
        let pad = 0.5 * y0.abs().max(1.0);
        (if y0 >= 0.0 && y0 - pad < 0.0 { 0.0 } else { y0 - pad }, y0 + pad)
    } else {
        (y0, y1)
    };
    nice_ticks(y0, y1, 5)
}

/// The plot area of a chart and its scales.
struct Plot {
    w: f64,
    h: f64,
    ml: f64,
    mr: f64,
    mt: f64,
    mb: f64,
    x: (f64, f64),
    y: (f64, f64),
}

impl Plot {
    fn sx(&self, x: f64) -> f64 {
        self.ml + (x - self.x.0) / (self.x.1 - self.x.0) * (self.w - self.ml - self.mr)
    }
    fn sy(&self, y: f64) -> f64 {
        self.mt + (1.0 - (y - self.y.0) / (self.y.1 - self.y.0)) * (self.h - self.mt - self.mb)
    }
}

/// A line chart as an SVG string: axes with round ticks, labels, legend.
pub fn line_chart(title: &str, x_label: &str, y_label: &str, series: &[Series], bands: &[BandArea], x_is_time_min: bool) -> String {
    line_chart_with(title, x_label, y_label, series, bands, x_is_time_min, false)
}

/// [`line_chart`] with the choice of a y axis that starts at 0 (for quantities such as speeds
/// whose zero matters) whenever the data are not negative.
pub fn line_chart_with(title: &str, x_label: &str, y_label: &str, series: &[Series], bands: &[BandArea], x_is_time_min: bool, y_from_zero: bool) -> String {
    let mut svg = format!("<svg xmlns='http://www.w3.org/2000/svg' width='760' height='300' font-family='sans-serif' font-size='11'><text x='60' y='18' font-size='13' font-weight='bold'>{}</text>", esc(title));
    let Some((x0, x1, y0, y1)) = extent(series, bands) else {
        return svg + "<text x='60' y='150'>no data</text></svg>";
    };
    let yt = y_ticks(y0, y1, y_from_zero);
    let x1 = if x1 > x0 { x1 } else { x0 + 1.0 };
    let plot = Plot { w: 760.0, h: 300.0, ml: 60.0, mr: 20.0, mt: 30.0, mb: 45.0, x: (x0, x1), y: (yt[0], yt[yt.len() - 1]) };
    let whole = series.iter().flat_map(|s| &s.points).map(|p| p.0).chain(bands.iter().flat_map(|b| &b.points).map(|p| p.0)).all(|x| x.fract() == 0.0);
    let xt = if x_is_time_min { time_ticks(x0, x1, 6) } else { inner_ticks(x0, x1, 6, whole) };
    axes(&mut svg, &plot, &yt, &xt, x_is_time_min, x_label, y_label);
    draw_bands(&mut svg, &plot, bands);
    draw_lines(&mut svg, &plot, series);
    legend(&mut svg, &plot, series, bands);
    svg + "</svg>"
}

/// Frame, grid lines, tick labels and axis labels.
fn axes(svg: &mut String, p: &Plot, yt: &[f64], xt: &[f64], x_is_time_min: bool, x_label: &str, y_label: &str) {
    let (w, h, ml, mr, mt, mb) = (p.w, p.h, p.ml, p.mr, p.mt, p.mb);
    let _ = write!(svg, "<rect x='{ml}' y='{mt}' width='{}' height='{}' fill='none' stroke='#888'/>", w - ml - mr, h - mt - mb);
    let yd = tick_decimals(if yt.len() > 1 { yt[1] - yt[0] } else { 1.0 });
    for &yv in yt {
        let _ = write!(svg, "<line x1='{ml}' x2='{}' y1='{:.1}' y2='{:.1}' stroke='#eee'/><text x='{}' y='{:.1}' text-anchor='end'>{:.*}</text>", w - mr, p.sy(yv), p.sy(yv), ml - 4.0, p.sy(yv) + 4.0, yd, yv);
    }
    let xd = tick_decimals(if xt.len() > 1 { xt[1] - xt[0] } else { 1.0 });
    for &xv in xt {
        let lab = if x_is_time_min { format!("{:02}:{:02}", (xv / 60.0).floor() as i64 % 24, (xv.round() as i64).rem_euclid(60)) } else { format!("{xv:.xd$}") };
        let _ = write!(svg, "<text x='{:.1}' y='{}' text-anchor='middle'>{}</text>", p.sx(xv), h - mb + 14.0, lab);
    }
    let _ = write!(svg, "<text x='{}' y='{}' text-anchor='middle'>{}</text>", ml + (w - ml - mr) / 2.0, h - 8.0, esc(x_label));
    let _ = write!(svg, "<text x='14' y='{}' transform='rotate(-90 14 {})' text-anchor='middle'>{}</text>", mt + (h - mt - mb) / 2.0, mt + (h - mt - mb) / 2.0, esc(y_label));
}

/// Shaded bands (drawn under the lines).
fn draw_bands(svg: &mut String, p: &Plot, bands: &[BandArea]) {
    for b in bands {
        let pts: Vec<&(f64, f64, f64)> = b.points.iter().filter(|p| p.1.is_finite() && p.2.is_finite()).collect();
        if pts.len() < 2 {
            continue;
        }
        let mut d = String::new();
        for (i, q) in pts.iter().enumerate() {
            let _ = write!(d, "{}{:.1},{:.1} ", if i == 0 { "M" } else { "L" }, p.sx(q.0), p.sy(q.2));
        }
        for q in pts.iter().rev() {
            let _ = write!(d, "L{:.1},{:.1} ", p.sx(q.0), p.sy(q.1));
        }
        let _ = write!(svg, "<path d='{d}Z' fill='{}' fill-opacity='0.25' stroke='none'/>", b.colour);
    }
}

/// The series' lines; a non-finite y lifts the pen. A point with no finite neighbour (which a line
/// would not show) is drawn as a dot.
fn draw_lines(svg: &mut String, p: &Plot, series: &[Series]) {
    for s in series {
        let mut d = String::new();
        let mut dots = String::new();
        let mut pen = false;
        let finite = |i: usize| s.points.get(i).is_some_and(|q| q.1.is_finite());
        for (i, q) in s.points.iter().enumerate() {
            if !q.1.is_finite() {
                pen = false;
                continue;
            }
            let _ = write!(d, "{}{:.1},{:.1} ", if pen { "L" } else { "M" }, p.sx(q.0), p.sy(q.1));
            if !pen && !finite(i + 1) {
                let _ = write!(dots, "<circle cx='{:.1}' cy='{:.1}' r='2.5' fill='{}'/>", p.sx(q.0), p.sy(q.1), s.colour);
            }
            pen = true;
        }
        let dash = if s.dashed { " stroke-dasharray='5,3'" } else { "" };
        let _ = write!(svg, "<path d='{d}' fill='none' stroke='{}' stroke-width='1.6'{dash}/>{dots}", s.colour);
    }
}

/// One legend row along the top of the plot.
fn legend(svg: &mut String, p: &Plot, series: &[Series], bands: &[BandArea]) {
    let mut lx = p.ml + 8.0;
    for (label, colour) in series.iter().map(|s| (&s.label, &s.colour)).chain(bands.iter().map(|b| (&b.label, &b.colour))) {
        let _ = write!(svg, "<rect x='{lx}' y='{}' width='12' height='4' fill='{colour}'/><text x='{}' y='{}'>{}</text>", p.mt + 8.0, lx + 16.0, p.mt + 13.0, esc(label));
        lx += 24.0 + 6.5 * label.chars().count() as f64;
    }
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

/// The page's head, title and advisory notice (the body is left open).
fn page_start(title: &str) -> String {
    format!(
        "<!doctype html><html><head><meta charset='utf-8'><title>{t}</title><style>body{{font-family:sans-serif;max-width:800px;margin:20px auto;color:#222}}\
         .caution{{border:2px solid #c60;padding:8px;background:#fff4e5}}table{{border-collapse:collapse}}td,th{{border:1px solid #ccc;padding:3px 8px;text-align:right}}</style></head><body>\
         <h1>{t}</h1><p class='caution'><b>Advisory only.</b> These forecasts and ramp warnings are advisory; they are not a protection system. \
         Grid codes, local codes and licensed practice govern plant operation and the safety of people near electrical plant.</p>",
        t = esc(title)
    )
}

/// Write `report.html` for a replay in `out`; `truth` (a synthetic sequence's) gives what was
/// "measured". Returns the path.
///
/// # Errors
/// Unreadable replay outputs or a failed write.
pub fn write_report(out: &Path, truth: Option<&Truth>, eval: Option<&Evaluation>, title: &str) -> Result<std::path::PathBuf, ReportError> {
    write_report_with(out, truth, eval, None, title)
}

/// What a report shows of measurements: the scores of [`crate::measured::evaluate_measured`] and
/// the pyranometers' mean GHI ([`crate::measured::measured_mean_ghi`]).
pub struct MeasuredReport<'a> {
    /// The scores.
    pub evaluation: &'a MeasuredEvaluation,
    /// The pyranometers' mean GHI (time, W/m²).
    pub mean_ghi: &'a [(DateTime<Utc>, f64)],
}

/// [`write_report`], and with measurements: the pyranometers' mean GHI against the forecast at
/// 5, 10 and 15 minutes, the per-horizon, per-sky-type, per-block and ramp score tables, and the
/// rows left out and why.
///
/// # Errors
/// As [`write_report`].
pub fn write_report_with(out: &Path, truth: Option<&Truth>, eval: Option<&Evaluation>, measured: Option<&MeasuredReport<'_>>, title: &str) -> Result<std::path::PathBuf, ReportError> {
    let html = report_html(out, truth, eval, measured, title)?;
    let path = out.join("report.html");
    crate::io::write_atomic(&path, html.as_bytes())?;
    Ok(path)
}

/// The page [`write_report_with`] writes, as text (for a committed set, which takes it through
/// [`crate::output_set::update_file`]).
///
/// # Errors
/// As [`write_report`].
pub fn report_html(out: &Path, truth: Option<&Truth>, eval: Option<&Evaluation>, measured: Option<&MeasuredReport<'_>>, title: &str) -> Result<String, ReportError> {
    crate::output_set::check_manifest(out)?;
    let fc = read_rows(&out.join("forecasts.csv"))?;
    let rows: Vec<BTreeMap<String, String>> = fc.into_iter().map(|r| r.into_iter().collect()).collect();
    let mut html = page_start(title);
    if let Some(e) = eval {
        html += &scores_section(e);
    }
    if let Some(m) = measured {
        html += &measured_section(m.evaluation);
    }
    let line: Vec<(f64, f64)> = measured.map(|m| m.mean_ghi.iter().map(|(t, v)| (minute_of_day(t), *v)).collect()).unwrap_or_default();
    html += &forecast_section(&rows, truth, &line);
    html += &motion_section(out)?;
    html += &frames_section(out)?;
    html += &ramps_section(&rows, out);
    html += &pictures_section(out)?;
    html += "</body></html>";
    Ok(html)
}

/// The scores against the truth: a table every 5 minutes of horizon, motion, segmentation, ramps,
/// and RMSE by horizon.
fn scores_section(e: &Evaluation) -> String {
    let mut html = String::new();
    html += "<h2>Scores (plant-mean GHI against the truth)</h2><table><tr><th>horizon</th><th>RMSE W/m²</th><th>MAE</th><th>MBE</th><th>persistence RMSE</th><th>skill</th><th>P10–P90 coverage</th></tr>";
    for h in &e.plant {
        if h.horizon_s % 300 == 0 {
            let cov = e.bands.iter().find(|b| b.horizon_s == h.horizon_s).map(|b| format!("{:.0} %", 100.0 * b.coverage)).unwrap_or_default();
            let _ = write!(html, "<tr><td>{} min</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{cov}</td></tr>", h.horizon_s / 60, h.rmse_wm2, h.mae_wm2, h.mbe_wm2, h.rmse_persistence_wm2, crate::verify::fmt_score(h.skill, 3));
        }
    }
    html += "</table>";
    let _ = write!(html, "<p>Motion: median speed error {:.2} m/s, direction error {:.1}°. Segmentation: {:.1} % correct (zenith &lt; 70°, &gt; 10° from the sun).</p>", e.motion.speed_error_mps, e.motion.direction_error_deg, 100.0 * e.segmentation.accuracy);
    if let Some(r) = &e.ramps {
        let _ = write!(html, "<p>Ramps at {:.0} min lead (±{:.0} min, probability ≥ {:.1}): POD {:.2}, FAR {:.2}, CSI {:.2}.</p>", r.lead_s / 60.0, r.window_s / 60.0, r.min_probability, r.pod, r.far, r.csi);
    }
    // RMSE versus horizon.
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
fn forecast_section(rows: &[BTreeMap<String, String>], truth: Option<&Truth>, measured: &[(f64, f64)]) -> String {
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
        // The measured line over the forecast's span of target times.
        let (lo, hi) = s[0].points.iter().fold((f64::INFINITY, f64::NEG_INFINITY), |a, p| (a.0.min(p.0), a.1.max(p.0)));
        let m: Vec<(f64, f64)> = measured.iter().copied().filter(|p| p.0 >= lo && p.0 <= hi).collect();
        if !m.is_empty() {
            s.push(Series { label: "pyranometers, measured mean".into(), colour: "#b03a2e".into(), points: m, dashed: false });
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
    html += &line_chart_with("Speed", "time [UTC]", "speed [m/s]", &sp, &[], true, true);
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

/// One day of a batch aggregate, as the aggregate's report shows it.
pub struct ReportDay<'a> {
    /// The day's name.
    pub name: &'a str,
    /// Frames found.
    pub frames: usize,
    /// Frames the engine used.
    pub frames_used: usize,
    /// What it was scored against: `truth`, `measurements` or `none`.
    pub reference: &'a str,
    /// The day's sums (its `stats.csv`).
    pub stats: &'a StatsTable,
    /// The sky type most of its issue times had (`none` without any).
    pub sky_type: &'a str,
}

/// The share of observations a P10–P90 band should hold.
const NOMINAL_COVERAGE: f64 = 0.8;

/// The horizons of the per-day panel and of the block table [s], with their colours.
const DAY_HORIZONS: [(u32, &str); 3] = [(300, "#1f6fd1"), (600, "#16a085"), (900, "#c0392b")];

/// A score with `decimals`, or `n/a` when it does not apply.
pub(crate) fn fmt_opt(v: Option<f64>, decimals: usize) -> String {
    crate::verify::fmt_score(v.unwrap_or(f64::NAN), decimals)
}

/// The plant's scores of a table, by horizon \[s\].
fn plant_scores(t: &StatsTable) -> BTreeMap<u32, Score> {
    t.scores().into_iter().filter(|s| s.target == PLANT_TARGET).map(|s| (s.horizon_s, s)).collect()
}

/// The self-contained HTML report of a batch aggregate or a merge, made only from the summed
/// statistics `total` and each day's own sums (`days`, in day order): the plant's scores per
/// horizon (RMSE of the forecast and of smart persistence, skill, CRPS, P10–P90 coverage), the
/// plant's skill and RMSE per day, and the blocks' scores. Nothing in it depends on how the days
/// were run, so a single run's aggregate and a merge of its shards give the same bytes.
pub fn aggregate_report(title: &str, total: &StatsTable, sky: &crate::stats::SkyStats, days: &[ReportDay<'_>]) -> String {
    let plant = plant_scores(total);
    let mut html = page_start(title);
    let mut refs: Vec<&str> = days.iter().map(|d| d.reference).collect();
    refs.sort_unstable();
    refs.dedup();
    let (found, used) = days.iter().fold((0, 0), |a, d| (a.0 + d.frames, a.1 + d.frames_used));
    let span = match (days.first(), days.last()) {
        (Some(a), Some(b)) if days.len() > 1 => format!("{} days ({} … {})", days.len(), esc(a.name), esc(b.name)),
        (Some(a), _) => format!("1 day ({})", esc(a.name)),
        _ => "No days".to_string(),
    };
    let _ = write!(
        html,
        "<p>{span}, {found} frames ({used} used by the engine), scored against: {}. Every figure below comes from the days' summed statistics \
         (<code>stats.csv</code>: sums per target and horizon, days added in day order), so one run and its shards merged give the same report.</p>",
        if refs.is_empty() { "nothing".to_string() } else { esc(&refs.join(", ")) }
    );
    html += &aggregate_horizon_section(&plant);
    html += &aggregate_day_section(days);
    html += &sky::aggregate_sky_section(sky, days);
    html += &aggregate_block_section(total);
    html += "</body></html>";
    html
}

/// The plant's scores per horizon: a table every 5 minutes and the charts.
fn aggregate_horizon_section(plant: &BTreeMap<u32, Score>) -> String {
    let mut html = String::from("<h2>Plant-mean GHI by horizon, all days</h2>");
    if plant.is_empty() {
        html += "<p>No scored pairs for the plant: the days had no truth and no measurements with the plant's pyranometers.</p>";
        return html;
    }
    html += "<table><tr><th>horizon</th><th>pairs</th><th>RMSE W/m²</th><th>MAE</th><th>MBE</th><th>persistence RMSE</th><th>skill</th><th>CRPS W/m²</th><th>P10–P90 coverage</th><th>mean band width W/m²</th></tr>";
    for s in plant.values().filter(|s| s.horizon_s % 300 == 0) {
        let cov = s.coverage_p10_p90.map_or_else(|| "n/a".to_string(), |c| format!("{:.0} %", 100.0 * c));
        let _ = write!(
            html,
            "<tr><td>{} min</td><td>{}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{:.1}</td><td>{}</td><td>{}</td><td>{cov}</td><td>{}</td></tr>",
            s.horizon_s / 60, s.n, s.rmse_wm2, s.mae_wm2, s.mbe_wm2, s.rmse_persistence_wm2, fmt_opt(s.skill, 3), fmt_opt(s.crps_wm2, 1), fmt_opt(s.mean_band_width_wm2, 0)
        );
    }
    html += "</table><p>Skill is 1 − RMSE / RMSE of smart persistence; it is n/a at horizon 0, where persistence is the observation itself.</p>";
    let x = |s: &Score| s.horizon_s as f64 / 60.0;
    let line = |label: &str, colour: &str, points: Vec<(f64, f64)>, dashed: bool| Series { label: label.into(), colour: colour.into(), points, dashed };
    let rmse = plant.values().map(|s| (x(s), s.rmse_wm2)).collect();
    let pers = plant.values().map(|s| (x(s), s.rmse_persistence_wm2)).collect();
    html += &line_chart_with("RMSE by horizon", "horizon [min]", "RMSE [W/m²]", &[line("forecast", "#1f6fd1", rmse, false), line("smart persistence", "#999", pers, true)], &[], false, true);
    let skilled: Vec<&Score> = plant.values().filter(|s| s.horizon_s > 0).collect();
    let skill = skilled.iter().map(|s| (x(s), s.skill.unwrap_or(f64::NAN))).collect();
    let zero = skilled.iter().map(|s| (x(s), 0.0)).collect();
    html += &line_chart("Skill against smart persistence by horizon", "horizon [min]", "skill", &[line("forecast", "#1f6fd1", skill, false), line("persistence (0)", "#999", zero, true)], &[], false);
    if plant.values().any(|s| s.crps_wm2.is_some()) {
        let crps = plant.values().map(|s| (x(s), s.crps_wm2.unwrap_or(f64::NAN))).collect();
        html += &line_chart_with("CRPS of the ensemble by horizon", "horizon [min]", "CRPS [W/m²]", &[line("CRPS", "#8e44ad", crps, false)], &[], false, true);
    } else {
        html += "<p>CRPS: n/a (no ensemble members were scored).</p>";
    }
    if plant.values().any(|s| s.coverage_p10_p90.is_some()) {
        let cov = plant.values().map(|s| (x(s), s.coverage_p10_p90.map_or(f64::NAN, |c| 100.0 * c))).collect();
        let nominal = plant.values().map(|s| (x(s), 100.0 * NOMINAL_COVERAGE)).collect();
        html += &line_chart_with("P10–P90 coverage by horizon", "horizon [min]", "observations inside the band [%]", &[line("coverage", "#16a085", cov, false), line("nominal 80 %", "#999", nominal, true)], &[], false, true);
    } else {
        html += "<p>P10–P90 coverage: n/a (no bands were scored).</p>";
    }
    html
}

/// The plant's skill and RMSE at 5, 10 and 15 minutes per day (x: the day's number in the table),
/// and the table of days.
fn aggregate_day_section(days: &[ReportDay<'_>]) -> String {
    let mut html = String::from("<h2>Per day</h2>");
    let scores: Vec<BTreeMap<u32, Score>> = days.iter().map(|d| plant_scores(d.stats)).collect();
    let per_day = |f: &dyn Fn(&Score) -> Option<f64>| -> Vec<Series> {
        DAY_HORIZONS
            .iter()
            .map(|&(h, colour)| Series {
                label: format!("{} min", h / 60),
                colour: colour.into(),
                points: scores.iter().enumerate().map(|(i, s)| ((i + 1) as f64, s.get(&h).and_then(f).unwrap_or(f64::NAN))).collect(),
                dashed: false,
            })
            .collect()
    };
    if days.len() >= 2 {
        html += &line_chart("Skill per day (plant)", "day (number in the table below)", "skill", &per_day(&|s| s.skill), &[], false);
        html += &line_chart_with("RMSE per day (plant)", "day (number in the table below)", "RMSE [W/m²]", &per_day(&|s| Some(s.rmse_wm2)), &[], false, true);
    } else {
        html += "<p>One day: its scores are those above.</p>";
    }
    html += "<table><tr><th>#</th><th>day</th><th>frames (used)</th><th>scored against</th><th>pairs at 5 min</th><th>RMSE 5 min</th><th>skill 5 min</th><th>10 min</th><th>15 min</th><th>sky type</th></tr>";
    for (i, (d, s)) in days.iter().zip(&scores).enumerate() {
        let at = |h: u32| s.get(&h);
        let skill = |h: u32| fmt_opt(at(h).and_then(|x| x.skill), 3);
        let _ = write!(
            html,
            "<tr><td>{}</td><td style='text-align:left'>{}</td><td>{} ({})</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
            i + 1, esc(d.name), d.frames, d.frames_used, esc(d.reference), at(300).map_or(0, |x| x.n), fmt_opt(at(300).map(|x| x.rmse_wm2), 1), skill(300), skill(600), skill(900), esc(d.sky_type)
        );
    }
    html += "</table>";
    html
}

/// Each block's RMSE and skill at 5, 10 and 15 minutes, all days.
fn aggregate_block_section(total: &StatsTable) -> String {
    let mut blocks: BTreeMap<String, BTreeMap<u32, Score>> = BTreeMap::new();
    for s in total.scores().into_iter().filter(|s| s.target != PLANT_TARGET) {
        blocks.entry(s.target.clone()).or_default().insert(s.horizon_s, s);
    }
    if blocks.is_empty() {
        return String::new();
    }
    let mut html = String::from("<h2>Blocks, all days</h2><table><tr><th>block</th><th>pairs at 5 min</th><th>RMSE 5 min</th><th>10 min</th><th>15 min</th><th>skill 5 min</th><th>10 min</th><th>15 min</th></tr>");
    for (name, s) in &blocks {
        let _ = write!(html, "<tr><td style='text-align:left'>{}</td><td>{}</td>", esc(name), s.get(&300).map_or(0, |x| x.n));
        for (h, _) in DAY_HORIZONS {
            let _ = write!(html, "<td>{}</td>", fmt_opt(s.get(&h).map(|x| x.rmse_wm2), 1));
        }
        for (h, _) in DAY_HORIZONS {
            let _ = write!(html, "<td>{}</td>", fmt_opt(s.get(&h).and_then(|x| x.skill), 3));
        }
        html += "</tr>";
    }
    html += "</table>";
    html
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round() {
        assert_eq!(nice_step(17.3, 5), 5.0);
        assert_eq!(nice_step(730.0, 5), 200.0);
        assert_eq!(nice_step(0.9, 5), 0.2);
        assert_eq!(nice_ticks(3.2, 17.3, 5), vec![0.0, 5.0, 10.0, 15.0, 20.0]);
        assert_eq!(nice_ticks(212.0, 941.0, 5), vec![200.0, 400.0, 600.0, 800.0, 1000.0]);
        assert_eq!(nice_ticks(-31.0, 12.0, 5), vec![-40.0, -30.0, -20.0, -10.0, 0.0, 10.0, 20.0]);
        assert_eq!(nice_ticks(0.0, 0.7, 5), vec![0.0, 0.2, 0.4, 0.6, 0.8]);
        assert_eq!(tick_decimals(0.2), 1);
        assert_eq!(tick_decimals(0.1), 1);
        assert_eq!(tick_decimals(0.05), 2);
        assert_eq!(tick_decimals(5.0), 0);
        assert_eq!(time_ticks(8.0 * 60.0 + 3.0, 9.0 * 60.0 + 58.0, 6), vec![510.0, 540.0, 570.0]);
        assert_eq!(inner_ticks(0.0, 20.0, 6, true), vec![0.0, 5.0, 10.0, 15.0, 20.0]);
        // Three days are numbered 1, 2, 3, not 1.0, 1.5 …; other values keep the finer steps.
        assert_eq!(inner_ticks(1.0, 3.0, 6, true), vec![1.0, 2.0, 3.0]);
        assert_eq!(inner_ticks(1.0, 3.0, 6, false), vec![1.0, 1.5, 2.0, 2.5, 3.0]);
    }

    #[test]
    fn speed_axis_starts_at_zero_and_ends_round_above_the_data() {
        // Speeds of 7.3–9.6 m/s: the axis runs 0–10 in steps of 2.
        assert_eq!(y_ticks(7.3, 9.6, true), vec![0.0, 2.0, 4.0, 6.0, 8.0, 10.0]);
        // Without the choice a narrow band far from 0 keeps its own range.
        assert_eq!(y_ticks(7.3, 9.6, false), vec![7.0, 7.5, 8.0, 8.5, 9.0, 9.5, 10.0]);
        // A constant speed of 0 still gets an axis.
        assert_eq!(y_ticks(0.0, 0.0, true), vec![0.0, 0.1, 0.2, 0.3, 0.4, 0.5]);
    }

    /// Sums of `n` pairs at each horizon of `0..=max_min` minutes, errors growing with the horizon
    /// (persistence's faster), with ensemble and band counts when `ensemble`.
    fn sums_table(target: &str, max_min: u32, scale: f64, ensemble: bool) -> StatsTable {
        let mut t = StatsTable::default();
        for m in 0..=max_min {
            let (n, e, p) = (10u64, scale * (5.0 + m as f64), if m == 0 { 0.0 } else { scale * (8.0 + 3.0 * m as f64) });
            let band = if ensemble { (10, 8, 2000.0, 10, 30.0 * scale) } else { (0, 0, 0.0, 0, 0.0) };
            let s = crate::stats::Sums {
                n,
                sum_err: e,
                sum_sq_err: n as f64 * e * e,
                sum_abs_err: n as f64 * e,
                sum_obs: 5000.0,
                pers_sum_err: p,
                pers_sum_sq_err: n as f64 * p * p,
                pers_sum_abs_err: n as f64 * p,
                crps_n: band.3,
                crps_sum: band.4,
                band_n: band.0,
                band_inside: band.1,
                band_width_sum: band.2,
            };
            t.rows.insert((target.to_string(), m * 60), s);
        }
        t
    }

    fn svgs(html: &str) -> Vec<&str> {
        html.split("<svg ").skip(1).map(|s| &s[..s.find("</svg>").expect("an svg element is closed")]).collect()
    }

    #[test]
    fn aggregate_report_has_its_charts_and_no_nan() {
        let days: Vec<StatsTable> = (0..3).map(|i| {
            let mut t = sums_table(PLANT_TARGET, 20, 1.0 + i as f64, true);
            t.add(&sums_table("north & <east>", 20, 2.0, true));
            t
        }).collect();
        let total = StatsTable::sum(&days);
        let names = ["2026-06-01", "2026-06-02", "2026-06-03"];
        let rd: Vec<ReportDay<'_>> = days.iter().zip(names).map(|(t, n)| ReportDay { name: n, frames: 90, frames_used: 88, reference: "truth", stats: t, sky_type: "clear" }).collect();
        let html = aggregate_report("agg", &total, &Default::default(), &rd);
        assert!(!html.contains("NaN") && !html.contains("inf"), "{html}");
        let charts = svgs(&html);
        let titles = ["RMSE by horizon", "Skill against smart persistence by horizon", "CRPS of the ensemble by horizon", "P10–P90 coverage by horizon", "Skill per day (plant)", "RMSE per day (plant)"];
        assert_eq!(charts.len(), titles.len());
        for (svg, title) in charts.iter().zip(titles) {
            assert!(svg.contains(&format!(">{title}</text>")), "{title}: {svg}");
            assert!(svg.contains("<path d='M"), "{title} has no line");
        }
        // Horizon-0 skill is n/a in the table; the skill chart starts at 1 minute.
        let row0 = &html[html.find("<tr><td>0 min</td>").unwrap()..];
        let cells: Vec<&str> = row0[..row0.find("</tr>").unwrap()].split("<td>").skip(1).map(|c| c.trim_end_matches("</td>")).collect();
        assert_eq!((cells[1], cells[6]), ("30", "n/a"), "{cells:?}");
        // The per-day panel's x axis counts days.
        for lab in [">1<", ">2<", ">3<", "day (number in the table below)", ">5 min<", ">15 min<"] {
            assert!(charts[4].contains(lab), "{lab}: {}", charts[4]);
        }
        assert!(html.contains("north &amp; &lt;east&gt;") && !html.contains("<east>"));
        assert!(html.contains("3 days (2026-06-01 … 2026-06-03), 270 frames (264 used by the engine)"), "{html}");
    }

    #[test]
    fn aggregate_report_of_one_day_without_ensemble_or_scores() {
        let t = sums_table(PLANT_TARGET, 15, 1.0, false);
        let html = aggregate_report("one", &t, &Default::default(), &[ReportDay { name: "d", frames: 5, frames_used: 5, reference: "measurements", stats: &t, sky_type: "variable" }]);
        assert_eq!(svgs(&html).len(), 2, "RMSE and skill by horizon only");
        assert!(html.contains("CRPS: n/a") && html.contains("coverage: n/a") && html.contains("One day"));
        assert!(!html.contains("NaN"));
        let empty = StatsTable::default();
        let html = aggregate_report("none", &empty, &Default::default(), &[ReportDay { name: "d", frames: 5, frames_used: 0, reference: "none", stats: &empty, sky_type: "none" }]);
        assert!(html.contains("No scored pairs") && svgs(&html).is_empty());
    }

    #[test]
    fn a_point_between_gaps_is_a_dot() {
        let s = Series { label: "x".into(), colour: "#123".into(), points: vec![(0.0, 1.0), (1.0, f64::NAN), (2.0, 2.0), (3.0, 3.0), (4.0, f64::NAN), (5.0, 1.5)], dashed: false };
        let svg = line_chart("t", "x", "y", &[s], &[], false);
        assert_eq!(svg.matches("<circle").count(), 2, "{svg}");
    }

    #[test]
    fn chart_labels_are_the_round_ticks() {
        let s = Series { label: "speed".into(), colour: "#000".into(), points: vec![(480.0, 7.3), (500.0, 9.6), (530.0, 8.1)], dashed: false };
        let svg = line_chart_with("Speed", "time", "m/s", &[s], &[], true, true);
        for lab in [">0<", ">2<", ">4<", ">6<", ">8<", ">10<", ">08:00<", ">08:10<", ">08:50<"] {
            assert!(svg.contains(lab), "{lab} missing: {svg}");
        }
        assert!(!svg.contains("NaN"));
    }
}
