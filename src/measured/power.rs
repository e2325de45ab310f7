//! Plant power against the plant's meters: the forecast's AC power (`power_kw` of
//! `forecasts.csv`, its band `power_p10_kw`–`power_p90_kw`, the members' `plant_power_kw` of
//! `ensemble_plant.csv`) against the measured AC power.
//!
//! # Columns of the measurements CSV
//! * `power_plant_kw` — the plant's AC power from its meter \[kW\]. Without it, the sum of the block
//!   meters stands for it when every block has one (all valid at the time).
//! * `power_<block>_kw` — a block's AC power from its own meter \[kW\].
//!
//! # Which readings count
//! The limits are the meters' own ([`crate::meter`], shared with live mode): a reading outside
//! [`crate::meter::LOW_SHARE`] … [`crate::meter::HIGH_SHARE`] of its AC rating (the block's
//! `ac_capacity_kw`, or the plant's sum) is impossible for the meter: it is left out and counted
//! under `screened`. A reading is stuck when it ends a run of [`crate::qc::STUCK_RUN`] equal values,
//! unless it is at or above [`crate::meter::CLIP_SHARE`] of the AC rating (a clipping plant holds
//! its rating for a long time).
//! Forecast rows whose clear-sky GHI is under 50 W/m² are left out, as for GHI.
//!
//! # Smart persistence of power
//! The measured power's ratio to the clear-sky power at the issue time (the newest completed
//! reading), times the clear-sky power at the target: `P̂(t + h) = P(t) / P_clear(t) ·
//! P_clear(t + h)`, the power form of the clear-sky-index persistence of Coimbra, Kleissl & Marquez
//! (2013). The clear-sky power ([`clear_sky_power_kw`]) is the site's clear-sky irradiance
//! transposed to each block's plane (Hay–Davies) through the same power model as the forecast
//! (Faiman, PVWatts DC, PVWatts inverter with clipping), with the measured air temperature and
//! wind speed when the CSV has them.

use std::collections::{BTreeMap, HashMap};

use chrono::{DateTime, Utc};
use serde::Serialize;

use crate::config::Site;
use crate::io::Measurements;
use crate::plant::{PLANT_TARGET, Plant};

use super::{MIN_CLEAR_WM2, MeasuredHorizon, Pair, Pooled, horizon_scores, pooled};

/// The plant meter's column.
pub const PLANT_POWER_COLUMN: &str = crate::meter::PLANT_COLUMN;

/// A block meter's column.
pub fn block_power_column(block: &str) -> String {
    crate::meter::column_of(block)
}

/// Lowest and highest plausible meter reading, as shares of the AC rating.
pub const METER_RANGE_OF_RATING: (f64, f64) = (crate::meter::LOW_SHARE, crate::meter::HIGH_SHARE);

/// A reading within this share of the AC rating is not taken for stuck (clipping).
pub const CLIPPING_TOLERANCE: f64 = 1.0 - crate::meter::CLIP_SHARE;

/// Scores of plant or block power at one horizon.
#[derive(Debug, Clone, Serialize)]
pub struct PowerHorizon {
    /// Horizon \[s\].
    pub horizon_s: u32,
    /// Pairs scored.
    pub n: usize,
    /// RMSE \[kW\].
    pub rmse_kw: f64,
    /// MAE \[kW\].
    pub mae_kw: f64,
    /// MBE (forecast − measured) \[kW\].
    pub mbe_kw: f64,
    /// RMSE of smart persistence of power on the same pairs \[kW\].
    pub rmse_persistence_kw: f64,
    /// `1 − RMSE / RMSE_persistence` (NaN, "n/a", when persistence is exact).
    pub skill: f64,
    /// Mean CRPS of the plant ensemble's power (plant only; NaN without members) \[kW\].
    pub crps_kw: f64,
    /// Share of readings inside `power_p10_kw`–`power_p90_kw` (NaN without a band).
    pub coverage_p10_p90: f64,
}

impl From<MeasuredHorizon> for PowerHorizon {
    /// The same arithmetic as for GHI, on pairs in kW.
    fn from(h: MeasuredHorizon) -> Self {
        PowerHorizon {
            horizon_s: h.horizon_s,
            n: h.n,
            rmse_kw: h.rmse_wm2,
            mae_kw: h.mae_wm2,
            mbe_kw: h.mbe_wm2,
            rmse_persistence_kw: h.rmse_persistence_wm2,
            skill: h.skill,
            crps_kw: h.crps_wm2,
            coverage_p10_p90: h.coverage_p10_p90,
        }
    }
}

/// Pooled 5–15 min power scores of a sky type.
#[derive(Debug, Clone, Serialize)]
pub struct PooledPower {
    /// Pairs.
    pub n: usize,
    /// RMSE \[kW\].
    pub rmse_kw: f64,
    /// Smart persistence's RMSE \[kW\].
    pub rmse_persistence_kw: f64,
    /// Skill.
    pub skill: f64,
    /// MBE \[kW\].
    pub mbe_kw: f64,
}

impl From<Pooled> for PooledPower {
    fn from(p: Pooled) -> Self {
        PooledPower { n: p.n, rmse_kw: p.rmse_wm2, rmse_persistence_kw: p.rmse_persistence_wm2, skill: p.skill, mbe_kw: p.mbe_wm2 }
    }
}

/// Scores of the forecast's AC power against the plant's meters.
#[derive(Debug, Clone, Serialize)]
pub struct PowerEvaluation {
    /// What the plant's measured power is: `power_plant_kw` or the sum of the block meters; empty
    /// when neither is there (blocks only).
    pub plant_source: String,
    /// The plant's AC rating \[kW\] (the sum of the blocks').
    pub plant_ac_rating_kw: f64,
    /// Plant scores per horizon (empty without a plant reading).
    pub plant: Vec<PowerHorizon>,
    /// Scores per horizon of each block with its own meter.
    pub by_block: BTreeMap<String, Vec<PowerHorizon>>,
    /// Pooled 5–15 min plant scores per sky type.
    pub by_sky_type: BTreeMap<String, PooledPower>,
    /// Forecast rows left out, by reason.
    pub excluded: BTreeMap<String, usize>,
}

/// The AC rating of a block \[kW\]: its `ac_capacity_kw`, else its DC rating over the DC/AC ratio.
fn ac_rating_kw(site: &Site, b: &crate::plant::Block) -> f64 {
    b.ac_capacity_kw.unwrap_or(b.capacity_kw / site.file.power.dc_ac_ratio)
}

/// The power meters a measurements CSV holds.
#[derive(Debug)]
pub(crate) struct Meters {
    /// The plant meter's column, when there is one.
    plant_column: Option<usize>,
    /// Each metered block: name, column, AC rating \[kW\].
    blocks: Vec<(String, usize, f64)>,
    /// The plant's AC rating \[kW\].
    pub plant_ac_kw: f64,
    /// Whether every block has a meter (their sum then stands for a missing plant meter).
    all_blocks: bool,
    /// Readings flagged by the range check, by column and reason.
    pub screened: BTreeMap<String, usize>,
}

impl Meters {
    /// The meters of `m`, their readings screened against their ratings (flagged readings become
    /// missing and are counted in [`Meters::screened`]).
    pub fn find(site: &Site, plant: &Plant, m: &mut Measurements) -> Meters {
        let plant_ac_kw: f64 = plant.blocks.iter().map(|b| ac_rating_kw(site, b)).sum();
        let blocks: Vec<(String, usize, f64)> = plant.blocks.iter().filter_map(|b| Some((b.name.clone(), m.column(&block_power_column(&b.name))?, ac_rating_kw(site, b)))).collect();
        let mut meters = Meters { plant_column: m.column(PLANT_POWER_COLUMN), all_blocks: !plant.blocks.is_empty() && blocks.len() == plant.blocks.len(), blocks, plant_ac_kw, screened: BTreeMap::new() };
        let (lo, hi) = METER_RANGE_OF_RATING;
        let cols: Vec<(usize, f64)> = meters.plant_column.map(|c| (c, plant_ac_kw)).into_iter().chain(meters.blocks.iter().map(|b| (b.1, b.2))).collect();
        for (c, rating) in cols {
            let mut n = 0;
            for v in m.columns[c].iter_mut().filter(|v| v.is_finite() && !(**v >= lo * rating && **v <= hi * rating)) {
                *v = f64::NAN;
                n += 1;
            }
            if n > 0 {
                meters.screened.insert(format!("{} outside {:.0} … {:.0} % of the AC rating", m.names[c], lo * 100.0, hi * 100.0), n);
            }
        }
        meters
    }

    /// Whether the plant's power is measured (its meter, or every block's).
    pub fn has_plant(&self) -> bool {
        self.plant_column.is_some() || self.all_blocks
    }

    /// Whether any meter is there.
    pub fn any(&self) -> bool {
        self.plant_column.is_some() || !self.blocks.is_empty()
    }

    /// The columns (with their ratings) whose readings make a target's power: the plant meter, the
    /// block meters for the plant without one, or a block's own.
    fn columns(&self, target: &str) -> Vec<(usize, f64)> {
        if target == PLANT_TARGET {
            match self.plant_column {
                Some(c) => vec![(c, self.plant_ac_kw)],
                None if self.all_blocks => self.blocks.iter().map(|b| (b.1, b.2)).collect(),
                None => vec![],
            }
        } else {
            self.blocks.iter().filter(|b| b.0 == target).map(|b| (b.1, b.2)).collect()
        }
    }

    /// A target's measured power at `t` (the rows whose period holds `t`, summed over its
    /// columns), or why there is none.
    pub fn at(&self, m: &Measurements, target: &str, t: &DateTime<Utc>) -> Result<f64, &'static str> {
        let cols = self.columns(target);
        if cols.is_empty() {
            return Err("no meter");
        }
        let mut sum = 0.0;
        for (c, rating) in cols {
            let v = m.at(c, t);
            if !v.is_finite() {
                return Err("no valid power reading at the target time (missing or flagged)");
            }
            if m.stuck_at(c, t, crate::qc::STUCK_RUN) && (v - rating).abs() > CLIPPING_TOLERANCE * rating {
                return Err("power reading stuck at the target time");
            }
            sum += v;
        }
        Ok(sum)
    }

    /// A target's newest completed power reading at `t` (summed over its columns).
    fn completed_at(&self, m: &Measurements, target: &str, t: &DateTime<Utc>) -> Option<f64> {
        let cols = self.columns(target);
        let v: Vec<f64> = cols.iter().filter_map(|(c, _)| m.completed_at(*c, t).map(|x| x.0)).collect();
        (!cols.is_empty() && v.len() == cols.len()).then(|| v.iter().sum())
    }

    /// What the plant's measured power is.
    fn plant_source(&self) -> String {
        match (self.plant_column, self.all_blocks) {
            (Some(_), _) => format!("plant meter ({PLANT_POWER_COLUMN})"),
            (None, true) => "sum of the block meters".into(),
            (None, false) => String::new(),
        }
    }
}

/// Clear-sky AC power \[kW\] of the plant (`block` `None`) or one block at `t`: the clear-sky
/// irradiance of the site's model, transposed to each block's plane (Hay–Davies), through the
/// power model of `[power]` at the given air temperature and wind speed. 0 with the sun down or a
/// time outside the solar position algorithm's range.
pub fn clear_sky_power_kw(site: &Site, plant: &Plant, t: &DateTime<Utc>, block: Option<&str>, temp_air_c: f64, wind_mps: f64) -> f64 {
    let f = &site.file.site;
    let Ok(sun) = crate::sun::position(t, &f.observer()) else { return 0.0 };
    let irr = crate::clearsky::clear_sky(&sun, f.elevation_m, f.clear_sky());
    let (z, a) = (sun.apparent_zenith_rad, sun.azimuth_rad);
    let pw = &site.file.power;
    plant
        .blocks
        .iter()
        .filter(|b| block.is_none_or(|n| n == b.name))
        .map(|b| {
            let (tilt, saz) = crate::forecast::block_plane(&b.mount, z, a);
            let poa = crate::forecast::poa_hay_davies(tilt, saz, z, a, &irr, sun.dni_extra_wm2(), site.file.irradiance.albedo);
            crate::power::block_ac_kw(poa, b.capacity_kw, b.ac_capacity_kw, temp_air_c, wind_mps, pw)
        })
        .sum()
}

/// Clear-sky power of the site's targets, with the measured weather where the CSV has it, cached.
pub(crate) struct ClearPower<'a> {
    site: &'a Site,
    plant: &'a Plant,
    m: &'a Measurements,
    cache: std::cell::RefCell<HashMap<(DateTime<Utc>, String), f64>>,
}

impl<'a> ClearPower<'a> {
    pub fn new(site: &'a Site, plant: &'a Plant, m: &'a Measurements) -> Self {
        ClearPower { site, plant, m, cache: Default::default() }
    }

    /// Clear-sky power of a target (`plant` or a block) at `t` \[kW\].
    pub fn at(&self, target: &str, t: &DateTime<Utc>) -> f64 {
        let key = (*t, target.to_string());
        if let Some(v) = self.cache.borrow().get(&key) {
            return *v;
        }
        let pw = &self.site.file.power;
        let weather = |name: &str, default: f64| self.m.column(name).map(|c| self.m.at(c, t)).filter(|v| v.is_finite()).unwrap_or(default);
        let (ta, ws) = (weather("temp_air_c", pw.default_temp_air_c), weather("wind_speed_mps", pw.default_wind_speed_mps));
        let v = clear_sky_power_kw(self.site, self.plant, t, (target != PLANT_TARGET).then_some(target), ta, ws);
        self.cache.borrow_mut().insert(key, v);
        v
    }
}

/// What the power scores need besides the forecast rows.
pub(crate) struct PowerInputs<'a> {
    pub meters: &'a Meters,
    pub m: &'a Measurements,
    pub clear: &'a ClearPower<'a>,
    /// Clear-sky GHI at each (target, issue) from the horizon-0 rows.
    pub clear_ghi_at_issue: &'a HashMap<(String, DateTime<Utc>), f64>,
    /// The plant ensemble's power per (issue, horizon).
    pub members: &'a super::Members,
    /// The sky type of each issue time.
    pub sky_of: &'a dyn Fn(DateTime<Utc>) -> &'static str,
}

/// Score the forecast's power rows against the meters.
pub(crate) fn evaluate_power(inp: &PowerInputs<'_>, rows: &[HashMap<String, String>]) -> PowerEvaluation {
    let mut excluded: BTreeMap<String, usize> = BTreeMap::new();
    let mut per: BTreeMap<String, BTreeMap<u32, Vec<Pair>>> = BTreeMap::new();
    let mut by_sky: BTreeMap<String, Vec<(f64, f64, f64)>> = BTreeMap::new();
    for r in rows {
        let Some((target, issue, h, p)) = power_pair(inp, r, &mut excluded) else { continue };
        if target == PLANT_TARGET && (300..=900).contains(&h) {
            by_sky.entry((inp.sky_of)(issue).to_string()).or_default().push((p.0, p.1, p.2));
        }
        per.entry(target).or_default().entry(h).or_default().push(p);
    }
    let plant = per.remove(PLANT_TARGET).map(horizon_scores).unwrap_or_default().into_iter().map(PowerHorizon::from).collect();
    PowerEvaluation {
        plant_source: inp.meters.plant_source(),
        plant_ac_rating_kw: inp.meters.plant_ac_kw,
        plant,
        by_block: per.into_iter().map(|(k, v)| (k, horizon_scores(v).into_iter().map(PowerHorizon::from).collect())).collect(),
        by_sky_type: by_sky.iter().map(|(k, v)| (k.clone(), pooled(v).into())).collect(),
        excluded,
    }
}

/// One forecast row's power pair (target, issue, horizon, pair), or `None` (counted by reason
/// when the target has a meter).
fn power_pair(inp: &PowerInputs<'_>, r: &HashMap<String, String>, excluded: &mut BTreeMap<String, usize>) -> Option<(String, DateTime<Utc>, u32, Pair)> {
    let num = |k: &str| r.get(k).and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN);
    let time = |k: &str| r.get(k).and_then(|v| v.parse::<DateTime<Utc>>().ok());
    let (Some(issue), Some(target), Some(block)) = (time("issue_time_utc"), time("target_time_utc"), r.get("block")) else { return None };
    let h = num("horizon_s");
    if h.is_nan() || h <= 0.0 || inp.meters.columns(block).is_empty() {
        return None;
    }
    let mut why = |reason: &str| *excluded.entry(reason.into()).or_default() += 1;
    let clear_ghi = num("ghi_clear_wm2");
    if clear_ghi.is_nan() || clear_ghi < MIN_CLEAR_WM2 {
        why("sun low (clear-sky GHI < 50 W/m²)");
        return None;
    }
    let obs = match inp.meters.at(inp.m, block, &target) {
        Ok(v) => v,
        Err(reason) => {
            why(reason);
            return None;
        }
    };
    let clear_issue = inp.clear.at(block, &issue);
    let ghi_issue_ok = inp.clear_ghi_at_issue.get(&(block.clone(), issue)).is_some_and(|c| *c >= MIN_CLEAR_WM2);
    let Some(newest) = inp.meters.completed_at(inp.m, block, &issue).filter(|_| ghi_issue_ok && clear_issue > 0.0) else {
        why("no power reading for smart persistence at the issue time");
        return None;
    };
    let persistence = newest / clear_issue * inp.clear.at(block, &target);
    let h = h as u32;
    let crps = if block == PLANT_TARGET { inp.members.get(&(issue, h)).map(|v| crate::verify::crps_ensemble(v, obs)).unwrap_or(f64::NAN) } else { f64::NAN };
    let (lo, hi) = (num("power_p10_kw"), num("power_p90_kw"));
    let inside = if lo.is_finite() && hi.is_finite() { f64::from(u8::from(obs >= lo && obs <= hi)) } else { f64::NAN };
    Some((block.clone(), issue, h, (num("power_kw"), obs, persistence, crps, inside)))
}

/// The plant's measured power at `t` (NaN without a valid reading): for the ramps and sky types.
pub(crate) fn measured_plant_at(meters: &Meters, m: &Measurements, t: DateTime<Utc>) -> f64 {
    meters.at(m, PLANT_TARGET, &t).unwrap_or(f64::NAN)
}

/// The power columns a measurements file may hold for the site (for the error that names what
/// is expected).
pub(crate) fn expected_columns(plant: &Plant) -> String {
    let mut v = vec![PLANT_POWER_COLUMN.to_string()];
    v.extend(plant.blocks.iter().map(|b| block_power_column(&b.name)));
    v.join(", ")
}

/// Print the power scores as tables.
pub fn print_power(e: &PowerEvaluation) {
    use crate::verify::fmt_score;
    let rows = |hs: &[PowerHorizon], every: bool| {
        crate::say!("horizon      n    RMSE     MAE     MBE  RMSE(pers)  skill    CRPS  P10–P90");
        for h in hs.iter().filter(|h| every || h.horizon_s % 300 == 0) {
            crate::say!(
                "{:>5} min {:>5} {:>7.1} {:>7.1} {:>7.1} {:>11.1} {:>6} {:>7} {:>7}",
                h.horizon_s / 60,
                h.n,
                h.rmse_kw,
                h.mae_kw,
                h.mbe_kw,
                h.rmse_persistence_kw,
                fmt_score(h.skill, 2),
                fmt_score(h.crps_kw, 1),
                fmt_score(h.coverage_p10_p90, 2)
            );
        }
    };
    if !e.plant.is_empty() {
        crate::say!("plant AC power [kW] against the {} (AC rating {:.0} kW)", e.plant_source, e.plant_ac_rating_kw);
        rows(&e.plant, true);
        for (k, p) in &e.by_sky_type {
            crate::say!("  {k:<9} n {:>5}, RMSE {:.1} kW vs persistence {:.1}, skill {}, MBE {:.1} (pooled 5–15 min)", p.n, p.rmse_kw, p.rmse_persistence_kw, fmt_score(p.skill, 2), p.mbe_kw);
        }
    }
    for (b, hs) in &e.by_block {
        crate::say!("block {b}: AC power [kW] against its meter");
        rows(hs, false);
    }
    let excl: Vec<String> = e.excluded.iter().map(|(k, n)| format!("{k}: {n}")).collect();
    crate::say!("power rows left out: {}", if excl.is_empty() { "none".to_string() } else { excl.join("; ") });
}
