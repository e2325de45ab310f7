//! The plant's power meters among the measurements: `power_plant_kw`, the plant meter's AC power
//! (at the point of connection), and `power_<block>_kw`, a block's own meter, both in kW. Replay's
//! evaluation (`evaluate --measurements`) and live mode (CSV or Modbus TCP feed) read them through
//! this module alone:
//!
//! * **Range** ([`screen`], called by [`crate::io::Measurements::screen_site`]): a reading below
//!   [`LOW_SHARE`] or above [`HIGH_SHARE`] of the column's AC capacity (the block's
//!   `ac_capacity_kw`, or its `capacity_kw / dc_ac_ratio`; the plant's is their sum) is
//!   physically impossible, left out and counted as such.
//! * **Stuck values**: a reading that ends a run of [`crate::qc::STUCK_RUN`] equal readings above
//!   [`STUCK_MIN_KW`] is not used — except at or above [`CLIP_SHARE`] of the capacity, where equal
//!   readings are the inverters clipping, not a frozen meter.
//! * **Gaps**: a row without a valid reading gives no measured power; nothing is filled in.
//! * **Plant power** ([`plant_power_at_row`]): the plant meter's reading; without one, the sum of
//!   the block meters when every block has a valid reading in that row (a partial sum would read
//!   as a ramp).

use chrono::{DateTime, Utc};

use crate::config::SiteFile;
use crate::io::{Measurements, ScreenReport};

/// The plant meter's column.
pub const PLANT_COLUMN: &str = "power_plant_kw";
/// Lowest plausible reading as a share of the AC capacity: at night a plant draws a little for
/// its transformers and trackers (common practice, no source).
pub const LOW_SHARE: f64 = -0.05;
/// Highest plausible reading as a share of the AC capacity: inverters clip at their rating; the
/// margin allows for the meter's class and a short overload (common practice, no source).
pub const HIGH_SHARE: f64 = 1.10;
/// From this share of the AC capacity equal readings are clipping, not a stuck meter.
pub const CLIP_SHARE: f64 = 0.98;
/// Below this a run of equal readings is the plant at rest (night), not a stuck meter \[kW\].
pub const STUCK_MIN_KW: f64 = 5.0;

/// The column of a target's meter (`plant` or a block's name).
pub fn column_of(target: &str) -> String {
    format!("power_{target}_kw")
}

/// Each meter column the site can have, with its AC capacity \[kW\]: the plant first, then the
/// blocks in the site file's order.
pub fn capacities_kw(site: &SiteFile) -> Vec<(String, f64)> {
    let blocks: Vec<(String, f64)> = site.plant.blocks.iter().map(|b| (column_of(&b.name), b.ac_capacity_kw.unwrap_or(b.capacity_kw / site.power.dc_ac_ratio))).collect();
    let plant: f64 = blocks.iter().map(|b| b.1).sum();
    std::iter::once((PLANT_COLUMN.to_string(), plant)).chain(blocks).collect()
}

/// The AC capacity of a meter column of the site, `None` when the site has no such target.
pub fn capacity_of(site: &SiteFile, column: &str) -> Option<f64> {
    capacities_kw(site).into_iter().find(|c| c.0 == column).map(|c| c.1)
}

/// Whether one reading \[kW\] of a meter of capacity `capacity_kw` is physically possible.
pub fn plausible(v: f64, capacity_kw: f64) -> bool {
    v.is_finite() && v >= LOW_SHARE * capacity_kw && v <= HIGH_SHARE * capacity_kw
}

/// Leave out (NaN) and count the meter readings outside the plausible range, as
/// [`crate::io::Measurements::screen`] does for irradiance; columns of targets the site does not
/// have are left as they are.
pub fn screen(m: &mut Measurements, site: &SiteFile, report: &mut ScreenReport) {
    let mut flagged_rows = vec![];
    for (column, cap) in capacities_kw(site) {
        let Some(c) = m.column(&column) else { continue };
        for (i, v) in m.columns[c].iter_mut().enumerate() {
            if v.is_finite() && !plausible(*v, cap) {
                *v = f64::NAN;
                flagged_rows.push(i);
                if let Some(cs) = report.columns.iter_mut().find(|s| s.name == column) {
                    cs.impossible += 1;
                }
            }
        }
    }
    if !flagged_rows.is_empty() {
        let mut lines: Vec<u64> = report.first_flagged_lines.clone();
        lines.extend(flagged_rows.iter().map(|i| m.lines.get(*i).copied().unwrap_or(0)));
        lines.sort_unstable();
        lines.dedup();
        lines.truncate(20);
        report.first_flagged_lines = lines;
    }
}

/// The meter columns present in some measurements, each with its AC capacity.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MeterColumns {
    /// The plant meter's column index and capacity.
    pub plant: Option<(usize, f64)>,
    /// Each block's meter column index and capacity, in the site file's block order (`None`
    /// where the block has none).
    pub blocks: Vec<Option<(usize, f64)>>,
}

impl MeterColumns {
    /// Find the site's meter columns in `m`.
    pub fn find(site: &SiteFile, m: &Measurements) -> MeterColumns {
        let caps = capacities_kw(site);
        let at = |(name, cap): &(String, f64)| m.column(name).map(|c| (c, *cap));
        MeterColumns { plant: at(&caps[0]), blocks: caps[1..].iter().map(at).collect() }
    }

    /// Whether the plant's power can be measured at all (a plant meter, or one on every block).
    pub fn has_plant_power(&self) -> bool {
        self.plant.is_some() || (!self.blocks.is_empty() && self.blocks.iter().all(Option::is_some))
    }

    /// Whether any meter column is present.
    pub fn any(&self) -> bool {
        self.plant.is_some() || self.blocks.iter().any(Option::is_some)
    }
}

/// The reading of column `col` (capacity `cap_kw`) in row `i` if it is usable: finite, not the
/// end of a stuck run (see the module documentation).
pub fn reading(m: &Measurements, (col, cap_kw): (usize, f64), i: usize) -> Option<f64> {
    let v = *m.columns.get(col)?.get(i)?;
    if !v.is_finite() {
        return None;
    }
    let run = crate::qc::STUCK_RUN;
    if i + 1 >= run && v > STUCK_MIN_KW && v < CLIP_SHARE * cap_kw && m.columns[col][i + 1 - run..=i].iter().all(|x| *x == v) {
        return None;
    }
    Some(v)
}

/// The measured plant power in row `i` \[kW\] (see the module documentation); `None` in a gap.
pub fn plant_power_at_row(m: &Measurements, cols: &MeterColumns, i: usize) -> Option<f64> {
    if let Some(p) = cols.plant {
        return reading(m, p, i);
    }
    if !cols.has_plant_power() {
        return None;
    }
    cols.blocks.iter().map(|b| b.and_then(|b| reading(m, b, i))).sum()
}

/// The measured plant power at `t`: the row whose averaging period contains it.
pub fn plant_power_at(m: &Measurements, cols: &MeterColumns, t: &DateTime<Utc>) -> Option<f64> {
    let i = m.times.partition_point(|x| x <= t).checked_sub(1)?;
    let within = (*t - m.times[i]).num_milliseconds() as f64 / 1000.0 < m.period_s;
    within.then(|| plant_power_at_row(m, cols, i)).flatten()
}

/// The measured plant power of the newest row whose averaging period had ended by `t` (a live
/// system has nothing newer), when that row began at most three periods before `t`: plain
/// persistence's value at an issue time.
pub fn plant_power_completed_at(m: &Measurements, cols: &MeterColumns, t: &DateTime<Utc>) -> Option<f64> {
    let period = chrono::Duration::milliseconds((m.period_s.max(1.0) * 1000.0) as i64);
    let i = m.times.partition_point(|x| *x + period <= *t).checked_sub(1)?;
    (*t - m.times[i] <= period * 3).then(|| plant_power_at_row(m, cols, i)).flatten()
}

/// The measured plant power of every row whose averaging period began at or after `since`,
/// stamped at the middle of its period; rows without a usable value are left out (what live mode
/// shows against the forecast).
pub fn plant_power_since(m: &Measurements, cols: &MeterColumns, since: DateTime<Utc>) -> Vec<(DateTime<Utc>, f64)> {
    let half = chrono::Duration::milliseconds((m.period_s.max(1.0) * 500.0) as i64);
    let from = m.times.partition_point(|t| *t < since);
    (from..m.times.len()).filter_map(|i| plant_power_at_row(m, cols, i).map(|p| (m.times[i] + half, p))).collect()
}

/// Each block meter's newest usable reading: the block's name, the middle of that row's averaging
/// period and the reading \[kW\] (blocks without a meter, or without a usable reading, left out).
pub fn block_power_latest(m: &Measurements, cols: &MeterColumns, site: &SiteFile) -> Vec<(String, DateTime<Utc>, f64)> {
    let half = chrono::Duration::milliseconds((m.period_s.max(1.0) * 500.0) as i64);
    site.plant
        .blocks
        .iter()
        .zip(&cols.blocks)
        .filter_map(|(b, c)| {
            let c = (*c)?;
            (0..m.times.len()).rev().find_map(|i| reading(m, c, i).map(|v| (b.name.clone(), m.times[i] + half, v)))
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn site() -> SiteFile {
        crate::config::Site::load(&std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap().file
    }

    fn table(names: &[&str], rows: &[&[f64]]) -> Measurements {
        let t0: DateTime<Utc> = "2026-06-14T10:00:00Z".parse().unwrap();
        Measurements {
            times: (0..rows.len()).map(|k| t0 + chrono::Duration::minutes(k as i64)).collect(),
            names: names.iter().map(|s| s.to_string()).collect(),
            columns: (0..names.len()).map(|c| rows.iter().map(|r| r[c]).collect()).collect(),
            period_s: 60.0,
            lines: (2..rows.len() as u64 + 2).collect(),
        }
    }

    #[test]
    fn capacities_follow_the_blocks_ac_ratings() {
        // The demo plant: four blocks of 5000 kW AC each.
        let caps = capacities_kw(&site());
        assert_eq!(caps[0], ("power_plant_kw".to_string(), 20_000.0));
        assert_eq!(caps[1], ("power_north-fixed_kw".to_string(), 5000.0));
        assert_eq!(caps.len(), 5);
        assert_eq!(capacity_of(&site(), "power_nowhere_kw"), None);
    }

    #[test]
    fn out_of_range_readings_are_left_out_and_counted() {
        let s = site();
        let mut m = table(&["power_plant_kw", "power_west-fixed_kw"], &[&[12_000.0, 3000.0], &[-2000.0, 5600.0], &[22_500.0, -100.0], &[65_535.0, 5400.0]]);
        let mut report = ScreenReport { rows: 4, columns: m.names.iter().map(|n| crate::io::ColumnScreen { name: n.clone(), ..Default::default() }).collect(), first_flagged_lines: vec![] };
        screen(&mut m, &s, &mut report);
        // Plant 20 MW: −1000 to 22000 kW; the block 5 MW: −250 to 5500 kW.
        assert_eq!(m.columns[0][0], 12_000.0);
        assert!(m.columns[0][1].is_nan() && m.columns[0][3].is_nan());
        assert!(m.columns[0][2].is_nan(), "22.5 MW from a 20 MW plant");
        assert_eq!((m.columns[1][0], m.columns[1][2], m.columns[1][3]), (3000.0, -100.0, 5400.0));
        assert!(m.columns[1][1].is_nan());
        assert_eq!(report.counts().get("power_plant_kw physically impossible"), Some(&3));
        assert_eq!(report.counts().get("power_west-fixed_kw physically impossible"), Some(&1));
        assert_eq!(report.first_flagged_lines, vec![3, 4, 5]);
    }

    #[test]
    fn stuck_runs_are_refused_except_when_clipping_and_gaps_stay_gaps() {
        let s = site();
        let run = crate::qc::STUCK_RUN;
        // A frozen meter at 8000 kW, then the plant clipping at its 20000 kW rating, then a gap.
        let mut rows: Vec<Vec<f64>> = (0..run).map(|_| vec![8000.0]).collect();
        rows.extend((0..run).map(|_| vec![20_000.0]));
        rows.push(vec![f64::NAN]);
        let refs: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
        let m = table(&["power_plant_kw"], &refs);
        let cols = MeterColumns::find(&s, &m);
        assert!(cols.has_plant_power());
        assert_eq!(plant_power_at_row(&m, &cols, run - 2), Some(8000.0), "nine equal so far");
        assert_eq!(plant_power_at_row(&m, &cols, run - 1), None, "the tenth equal reading");
        assert_eq!(plant_power_at_row(&m, &cols, 2 * run - 1), Some(20_000.0), "clipping is not stuck");
        assert_eq!(plant_power_at_row(&m, &cols, 2 * run), None, "a gap");
        let t = m.times[3] + chrono::Duration::seconds(30);
        assert_eq!(plant_power_at(&m, &cols, &t), Some(8000.0));
        // At 10:03:30 the newest completed row is 10:02's; four periods on, none is recent enough.
        assert_eq!(plant_power_completed_at(&m, &cols, &t), Some(8000.0));
        let late = *m.times.last().unwrap() + chrono::Duration::minutes(5);
        assert_eq!(plant_power_completed_at(&m, &cols, &late), None);
        assert_eq!(plant_power_since(&m, &cols, m.times[run]).len(), run, "the clipping rows; the gap left out");
    }

    #[test]
    fn block_meters_sum_only_when_every_block_reads() {
        let s = site();
        let names = ["power_north-fixed_kw", "power_east-tracker_kw", "power_south-tracker_kw", "power_west-fixed_kw"];
        let m = table(&names, &[&[1000.0, 2000.0, 3000.0, 4000.0], &[1000.0, f64::NAN, 3000.0, 4000.0]]);
        let cols = MeterColumns::find(&s, &m);
        assert_eq!(plant_power_at_row(&m, &cols, 0), Some(10_000.0));
        assert_eq!(plant_power_at_row(&m, &cols, 1), None, "a partial sum would read as a ramp");
        let latest = block_power_latest(&m, &cols, &s);
        assert_eq!(latest.iter().map(|x| (x.0.as_str(), x.2)).collect::<Vec<_>>(), vec![("north-fixed", 1000.0), ("east-tracker", 2000.0), ("south-tracker", 3000.0), ("west-fixed", 4000.0)]);
        assert_eq!(latest[1].1, m.times[0] + chrono::Duration::seconds(30), "east-tracker's newest usable reading is the first row's");
        let three = table(&names[..3], &[&[1000.0, 2000.0, 3000.0]]);
        let cols = MeterColumns::find(&s, &three);
        assert!(cols.any() && !cols.has_plant_power());
        assert_eq!(plant_power_at_row(&three, &cols, 0), None);
        assert_eq!(block_power_latest(&three, &cols, &s).len(), 3);
    }
}
