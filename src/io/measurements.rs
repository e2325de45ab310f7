//! Measurements CSV files: reading, the averaging period, screening of the readings.

use std::path::Path;

use chrono::{DateTime, Utc};

use super::{InputError, fmt_time, parse_time};

/// Which instant of its averaging period a measurements row's `time_utc` names. Loggers differ:
/// many stamp a mean at the end of its interval, others at the start; a reading taken a period
/// late shifts every shadow the pyranometers see by a period (at 8 m/s and 1-minute means,
/// 480 m of cloud plane), and the cloud base fitted from shadow timing with it (README,
/// "Measurements").
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum TimeLabel {
    /// The start of the period (the engine's own convention).
    #[default]
    Start,
    /// The middle of the period.
    Centre,
    /// The end of the period.
    End,
}

impl TimeLabel {
    /// The name as the site file writes it.
    pub fn name(self) -> &'static str {
        match self {
            TimeLabel::Start => "start",
            TimeLabel::Centre => "centre",
            TimeLabel::End => "end",
        }
    }
}

/// `[measurements]` of the site file: how the measurements CSV's times are meant. The engine
/// works with times at the start of each averaging period; others are moved there on reading
/// ([`Measurements::label_at_start`]). The Modbus feed makes its own rows, stamped at the start.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MeasurementsSection {
    /// `"start"` (default), `"centre"` or `"end"` of each row's averaging period.
    pub time_label: TimeLabel,
}

impl MeasurementsSection {
    /// Whether it is the default (not written).
    pub fn is_default(&self) -> bool {
        *self == Self::default()
    }
}

/// A measurements CSV: a `time_utc` column and one column per sensor with its unit in the name
/// (e.g. `ghi_pyr1_wm2`); empty cells are missing values (NaN).
#[derive(Debug, Clone)]
pub struct Measurements {
    /// Times, strictly increasing.
    pub times: Vec<DateTime<Utc>>,
    /// Column names (without `time_utc`).
    pub names: Vec<String>,
    /// Values per column.
    pub columns: Vec<Vec<f64>>,
    /// Averaging period of each row \[s\] (from the time step), for centring.
    pub period_s: f64,
    /// The file line of each row (1-based, the header is line 1).
    pub lines: Vec<u64>,
}

/// Most data rows of a measurements or series CSV (about 9.5 years of 1-minute rows).
pub const MAX_CSV_ROWS: usize = 5_000_000;
/// Most value columns of a measurements CSV.
pub const MAX_CSV_COLUMNS: usize = 1_000;
/// Air temperature range \[°C\] of a `temp_air_c` column: a little beyond the recorded extremes
/// (−89.2 °C Vostok 1983, 56.7 °C Death Valley 1913; WMO archive, from memory).
pub const TEMP_AIR_RANGE_C: (f64, f64) = (-90.0, 70.0);
/// Wind speed range \[m/s\] of a `wind_speed_mps` column: beyond the recorded 113 m/s gust
/// (Barrow Island 1996; WMO archive, from memory).
pub const WIND_SPEED_RANGE_MPS: (f64, f64) = (0.0, 120.0);
/// A GHI column whose largest reading stays below this while the clear-sky model gives at least
/// [`KW_CHECK_CLEAR_WM2`] is taken to be in kW/m².
pub const KW_SUSPECT_MAX: f64 = 2.0;
/// Clear-sky GHI \[W/m²\] from which rows count for the kW/m² check.
pub const KW_CHECK_CLEAR_WM2: f64 = 300.0;

/// What [`Measurements::screen`] found in one column.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ColumnScreen {
    /// Column name.
    pub name: String,
    /// Empty (or `nan`) cells.
    pub missing: usize,
    /// Infinite values.
    pub not_finite: usize,
    /// Outside the BSRN "physically possible" limits (irradiance) or the column's range.
    pub impossible: usize,
    /// Inside the physically possible but outside the "extremely rare" limits (irradiance).
    pub rare: usize,
}

impl ColumnScreen {
    /// Values flagged and left out (missing cells are not counted).
    pub fn flagged(&self) -> usize {
        self.not_finite + self.impossible + self.rare
    }
}

/// What [`Measurements::screen`] found, per column.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ScreenReport {
    /// Rows.
    pub rows: usize,
    /// Per column.
    pub columns: Vec<ColumnScreen>,
    /// Rows with at least one flagged value, with their file lines (first 20).
    pub first_flagged_lines: Vec<u64>,
}

impl ScreenReport {
    /// Values flagged in all.
    pub fn flagged(&self) -> usize {
        self.columns.iter().map(ColumnScreen::flagged).sum()
    }

    /// Counts by `"<column> <reason>"`, non-zero only.
    pub fn counts(&self) -> std::collections::BTreeMap<String, usize> {
        let mut m = std::collections::BTreeMap::new();
        for c in &self.columns {
            for (what, n) in [("not finite", c.not_finite), ("physically impossible", c.impossible), ("extremely rare", c.rare)] {
                if n > 0 {
                    m.insert(format!("{} {what}", c.name), n);
                }
            }
        }
        m
    }
}

impl std::fmt::Display for ScreenReport {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let parts: Vec<String> = self.counts().iter().map(|(k, n)| format!("{k} {n}")).collect();
        write!(f, "{} values of {} rows flagged and left out", self.flagged(), self.rows)?;
        if !parts.is_empty() {
            let lines: Vec<String> = self.first_flagged_lines.iter().map(u64::to_string).collect();
            write!(f, ": {} (lines {}{})", parts.join(", "), lines.join(", "), if self.first_flagged_lines.len() >= 20 { ", …" } else { "" })?;
        }
        Ok(())
    }
}

/// Whether a measurements column holds irradiance in W/m² (`ghi`, `dni`, `dhi`, or
/// `<ghi|dni|dhi>_<name>_wm2`), and which component.
fn irradiance_kind(name: &str) -> Option<&'static str> {
    for k in ["ghi", "dni", "dhi"] {
        if name == k || (name.starts_with(&format!("{k}_")) && name.ends_with("_wm2")) {
            return Some(k);
        }
    }
    None
}

impl Measurements {
    /// Read a measurements CSV.
    ///
    /// # Errors
    /// Malformed rows, unparsable numbers, duplicated or unordered times — with the line number.
    pub fn read_csv(path: &Path) -> Result<Measurements, InputError> {
        let rdr = csv::ReaderBuilder::new()
            .comment(Some(b'#'))
            .from_path(path)
            .map_err(|e| InputError::Other { file: path.into(), message: e.to_string() })?;
        Self::from_csv_reader(path, rdr, 0)
    }

    /// Read measurements from CSV text (a header line, then rows) that came from `path`, whose
    /// first row follows `lines_before` data lines of that file (for the line numbers in errors
    /// and [`Measurements::lines`]). Live mode reads a growing file this way, a piece at a time.
    ///
    /// # Errors
    /// As [`Measurements::read_csv`].
    pub fn read_csv_text(path: &Path, text: &[u8], lines_before: u64) -> Result<Measurements, InputError> {
        let rdr = csv::ReaderBuilder::new().comment(Some(b'#')).from_reader(text);
        Self::from_csv_reader(path, rdr, lines_before)
    }

    fn from_csv_reader<R: std::io::Read>(path: &Path, mut rdr: csv::Reader<R>, lines_before: u64) -> Result<Measurements, InputError> {
        let headers = rdr.headers().map_err(|e| InputError::Other { file: path.into(), message: e.to_string() })?.clone();
        let ti = headers.iter().position(|h| h == "time_utc").ok_or_else(|| InputError::Csv {
            file: path.into(),
            line: 1,
            message: "expected a column named time_utc".into(),
        })?;
        let names: Vec<String> = headers.iter().enumerate().filter(|(i, _)| *i != ti).map(|(_, h)| h.to_string()).collect();
        if names.len() > MAX_CSV_COLUMNS {
            return Err(InputError::Csv { file: path.into(), line: 1, message: format!("expected at most {MAX_CSV_COLUMNS} value columns, got {}", names.len()) });
        }
        let mut m = Measurements { times: vec![], names: names.clone(), columns: vec![vec![]; names.len()], period_s: 60.0, lines: vec![] };
        for rec in rdr.records() {
            let rec = rec.map_err(|e| InputError::Csv {
                file: path.into(),
                line: e.position().map(|p| p.line() + lines_before).unwrap_or(0),
                message: e.to_string(),
            })?;
            let line = rec.position().map(|p| p.line() + lines_before).unwrap_or(0);
            let bad = |msg: String| InputError::Csv { file: path.into(), line, message: msg };
            if m.times.len() >= MAX_CSV_ROWS {
                return Err(bad(format!("expected at most {MAX_CSV_ROWS} rows")));
            }
            let t = parse_time("time_utc", rec.get(ti).unwrap_or("")).map_err(bad)?;
            if let Some(last) = m.times.last()
                && t <= *last {
                    return Err(bad(format!("time_utc {} is not after the previous row: duplicated or out of order", fmt_time(&t))));
                }
            m.times.push(t);
            m.lines.push(line);
            let mut k = 0;
            for (i, v) in rec.iter().enumerate() {
                if i == ti {
                    continue;
                }
                let v = v.trim();
                let x = if v.is_empty() || v.eq_ignore_ascii_case("nan") {
                    f64::NAN
                } else {
                    v.parse::<f64>().map_err(|_| bad(format!("{}: expected a number or an empty cell, got {v:?}", m.names[k])))?
                };
                if k < m.columns.len() {
                    m.columns[k].push(x);
                }
                k += 1;
            }
            if k != m.names.len() {
                return Err(bad(format!("expected {} values, got {k}", m.names.len())));
            }
        }
        if m.times.len() >= 2 {
            let mut steps: Vec<i64> = m.times.windows(2).map(|w| (w[1] - w[0]).num_seconds()).collect();
            steps.sort_unstable();
            m.period_s = steps[steps.len() / 2] as f64;
        }
        Ok(m)
    }

    /// Screen the values for plausibility and units before they are used: per row, values that are
    /// infinite, outside the BSRN "physically possible" or "extremely rare" limits (irradiance
    /// columns, at the sun's position of the row; C. N. Long, E. G. Dutton, *BSRN Global Network
    /// recommended QC tests*, V2.0, see [`crate::qc`]) or outside [`TEMP_AIR_RANGE_C`] /
    /// [`WIND_SPEED_RANGE_MPS`] become missing (NaN), so nothing learns from them, and are
    /// counted in the report. A GHI column that looks like kW/m² is refused.
    ///
    /// # Errors
    /// A GHI column whose daytime readings stay below [`KW_SUSPECT_MAX`] while the clear-sky
    /// model gives at least [`KW_CHECK_CLEAR_WM2`]; naming the file and column.
    pub fn screen(&mut self, file: &Path, observer: &crate::sun::Observer, model: crate::clearsky::ClearSkyModel, altitude_m: f64) -> Result<ScreenReport, InputError> {
        // Sun position and clear-sky GHI per row, only when an irradiance column needs them.
        let any_irr = self.names.iter().any(|n| irradiance_kind(n).is_some());
        let suns: Vec<Option<(f64, f64, f64)>> = if any_irr {
            self.times
                .iter()
                .map(|t| crate::sun::position(t, observer).ok().map(|sp| (sp.zenith_rad, sp.earth_sun_distance_au, crate::clearsky::clear_sky(&sp, altitude_m, model).ghi_wm2)))
                .collect()
        } else {
            vec![]
        };
        // Units first, on the raw values.
        self.check_ghi_units(file, &suns)?;
        let mut report = ScreenReport { rows: self.times.len(), ..Default::default() };
        let mut flagged_rows = vec![false; self.times.len()];
        for (c, name) in self.names.iter().enumerate() {
            let kind = irradiance_kind(name);
            let range = match name.as_str() {
                "temp_air_c" => Some(TEMP_AIR_RANGE_C),
                "wind_speed_mps" => Some(WIND_SPEED_RANGE_MPS),
                _ => None,
            };
            let mut cs = ColumnScreen { name: name.clone(), ..Default::default() };
            for (i, v) in self.columns[c].iter_mut().enumerate() {
                if v.is_nan() {
                    cs.missing += 1;
                    continue;
                }
                let flag = if !v.is_finite() {
                    cs.not_finite += 1;
                    true
                } else if let Some(k) = kind {
                    // At night the limits at the horizon apply (GHI, DHI up to 100 and 50 W/m²).
                    let (z, au) = suns[i].map(|s| (s.0.min(std::f64::consts::FRAC_PI_2), s.1)).unwrap_or((std::f64::consts::FRAC_PI_2, 1.0));
                    let l = crate::qc::bsrn_limits(z, au);
                    let (phys, rare) = match k {
                        "ghi" => (l.ghi_physical, l.ghi_rare),
                        "dni" => (l.dni_physical, l.dni_rare),
                        _ => (l.dhi_physical, l.dhi_rare),
                    };
                    if !(*v > -4.0 && *v < phys) {
                        cs.impossible += 1;
                        true
                    } else if !(*v > -2.0 && *v < rare) {
                        cs.rare += 1;
                        true
                    } else {
                        false
                    }
                } else if let Some((lo, hi)) = range {
                    let out = !(*v >= lo && *v <= hi);
                    cs.impossible += usize::from(out);
                    out
                } else {
                    false
                };
                if flag {
                    *v = f64::NAN;
                    flagged_rows[i] = true;
                }
            }
            report.columns.push(cs);
        }
        report.first_flagged_lines = flagged_rows.iter().enumerate().filter(|(_, f)| **f).map(|(i, _)| self.lines.get(i).copied().unwrap_or(0)).take(20).collect();
        Ok(report)
    }

    /// [`Measurements::screen`] with the site's position and clear-sky model, then the plant
    /// meters' range ([`crate::meter::screen`]): the one screening replay, evaluation and live
    /// mode's feeds all apply.
    ///
    /// # Errors
    /// As [`Measurements::screen`].
    pub fn screen_site(&mut self, file: &Path, site: &crate::config::SiteFile) -> Result<ScreenReport, InputError> {
        let f = &site.site;
        let mut report = self.screen(file, &f.observer(), f.clear_sky(), f.elevation_m)?;
        crate::meter::screen(self, site, &mut report);
        Ok(report)
    }

    /// Refuse a GHI column that looks like kW/m²: at least five daytime readings (clear-sky GHI at
    /// least [`KW_CHECK_CLEAR_WM2`]) all below [`KW_SUSPECT_MAX`]. `suns` holds each row's sun
    /// zenith, Earth–Sun distance and clear-sky GHI ([`Measurements::screen`]).
    fn check_ghi_units(&self, file: &Path, suns: &[Option<(f64, f64, f64)>]) -> Result<(), InputError> {
        for (c, name) in self.names.iter().enumerate() {
            if irradiance_kind(name) != Some("ghi") {
                continue;
            }
            let (mut day_rows, mut max_v, mut max_clear) = (0usize, f64::NEG_INFINITY, 0.0f64);
            for (i, v) in self.columns[c].iter().enumerate() {
                if let Some((_, _, clear)) = suns[i]
                    && clear >= KW_CHECK_CLEAR_WM2
                    && v.is_finite()
                {
                    day_rows += 1;
                    max_v = max_v.max(*v);
                    max_clear = max_clear.max(clear);
                }
            }
            if day_rows >= 5 && max_v < KW_SUSPECT_MAX && max_v > 0.0 {
                return Err(InputError::Other {
                    file: file.into(),
                    message: format!(
                        "column {name}: the largest of {day_rows} daytime readings is {max_v} while the clear-sky model gives up to {max_clear:.0} W/m² at those times: the column looks like kW/m²; expected W/m² (multiply by 1000)"
                    ),
                });
            }
        }
        Ok(())
    }

    /// Move the times to the start of their averaging periods (`period_s`, the median step), as
    /// the engine reads them, from the convention `label` names. `period_hint_s` stands for the
    /// period when the rows alone cannot tell it (fewer than two: a live feed's single new row).
    pub fn label_at_start(&mut self, label: TimeLabel, period_hint_s: Option<f64>) {
        if self.times.len() < 2
            && let Some(p) = period_hint_s
        {
            self.period_s = p;
        }
        let back_s = match label {
            TimeLabel::Start => return,
            TimeLabel::Centre => self.period_s / 2.0,
            TimeLabel::End => self.period_s,
        };
        let back = chrono::Duration::milliseconds((back_s * 1000.0).round() as i64);
        for t in &mut self.times {
            *t -= back;
        }
    }

    /// Column index by name.
    pub fn column(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| n == name)
    }

    /// Whether the row covering `t` ends a run of `run` equal readings in a column above 5 (the
    /// stuck-value test of [`crate::qc`], looking back only, so it works in live mode too).
    pub fn stuck_at(&self, col: usize, t: &DateTime<Utc>, run: usize) -> bool {
        let i = self.times.partition_point(|x| x <= t);
        if i < run.max(1) {
            return false;
        }
        let v = &self.columns[col][i - run..i];
        v[0] > 5.0 && v.iter().all(|x| *x == v[0])
    }

    /// The newest reading of a column whose averaging period had ended by `t` (a live system has
    /// nothing newer), with the middle of that period; `None` when there is none within two
    /// periods of `t`.
    pub fn completed_at(&self, col: usize, t: &DateTime<Utc>) -> Option<(f64, DateTime<Utc>)> {
        let period = chrono::Duration::milliseconds((self.period_s.max(1.0) * 1000.0) as i64);
        // Rows whose period ended by t: start + period <= t.
        let i = self.times.partition_point(|x| *x + period <= *t);
        if i == 0 {
            return None;
        }
        let start = self.times[i - 1];
        if *t - start > period * 3 {
            return None;
        }
        let v = self.columns[col][i - 1];
        v.is_finite().then(|| (v, start + period / 2))
    }

    /// Value of a column at a time: the row whose averaging period (starting at its time stamp)
    /// contains `t`; NaN when none does.
    pub fn at(&self, col: usize, t: &DateTime<Utc>) -> f64 {
        let i = self.times.partition_point(|x| x <= t);
        if i == 0 {
            return f64::NAN;
        }
        let start = self.times[i - 1];
        if (*t - start).num_milliseconds() as f64 / 1000.0 < self.period_s {
            self.columns[col][i - 1]
        } else {
            f64::NAN
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rows(text: &str) -> Measurements {
        Measurements::read_csv_text(Path::new("m.csv"), text.as_bytes(), 0).unwrap()
    }

    /// End and centre labels move the times back by a period and half a period (the median step),
    /// so that a reading's period is the same whichever way it was stamped; a single row takes the
    /// hint's period.
    #[test]
    fn labels_move_times_to_the_start_of_their_period() {
        let text = "time_utc,ghi_a_wm2\n2026-06-14T08:31:00Z,500\n2026-06-14T08:32:00Z,510\n2026-06-14T08:33:00Z,520\n";
        let start = rows(text);
        let mut end = rows(text);
        end.label_at_start(TimeLabel::End, None);
        assert_eq!(end.times[0], start.times[0] - chrono::Duration::seconds(60));
        let mut centre = rows(text);
        centre.label_at_start(TimeLabel::Centre, None);
        assert_eq!(centre.times[2], start.times[2] - chrono::Duration::seconds(30));
        let mut same = rows(text);
        same.label_at_start(TimeLabel::Start, None);
        assert_eq!(same.times, start.times);
        // A reading stamped at the end of 08:30–08:31 is the one completed by 08:31.
        let t = start.times[0];
        assert_eq!(end.completed_at(0, &t).map(|x| x.0), Some(500.0));
        assert_eq!(start.completed_at(0, &t), None);
        let mut one = rows("time_utc,ghi_a_wm2\n2026-06-14T08:31:10Z,500\n");
        one.label_at_start(TimeLabel::End, Some(10.0));
        assert_eq!((one.period_s, one.times[0]), (10.0, start.times[0]));
    }
}
