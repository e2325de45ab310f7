//! Live mode's Modbus TCP measurement feed: pyranometers and the plant's power meters polled as
//! `[measurements_modbus]` in the site file describes ([`crate::config::ModbusFeedSection`]).
//!
//! * **Polling.** A thread of its own (a current-thread tokio runtime with the tokio-modbus TCP
//!   client) reads the register list every `poll_s`, one request per register, and decodes each
//!   value to its column's unit, W/m² or kW (`(raw × scale + offset)` in the register's `unit`). The engine never waits for the device: it takes what
//!   the thread has handed over ([`ModbusPoller::poll`] does not block).
//! * **Samples.** A sample that is not a finite number or lies outside the BSRN "physically
//!   possible" GHI limits at that moment, or for a meter outside its plausible range
//!   ([`crate::meter::plausible`]) — e.g. a sensor's error code such as 65535 — is left out of its
//!   period's mean and counted (`values_refused`), so one bad sample does not spoil a minute.
//! * **Averaging.** The samples of each `averaging_s` period (periods start at multiples of it
//!   since midnight UTC) are averaged into one row stamped at the period's start, as a logger's
//!   CSV row is. A column with fewer than half the period's expected samples is missing (NaN) in
//!   that row; a period without any value gives no row (a gap). The period that was running when
//!   the poller started is usually short of samples.
//! * **Screening.** The rows are screened as the CSV feed's pieces are
//!   ([`crate::io::Measurements::screen_site`]: BSRN limits, kW/m², the meters' range; the kW/m² check looks at the last
//!   [`UNIT_WINDOW_ROWS`] rows together, since rows come one at a time, and so refuses from the
//!   fifth daytime row in kW/m² on) and appended to the engine the same
//!   way, so the tuning (which skips stuck values and gaps) and the band calibration take them as
//!   they take the CSV feed's.
//! * **Outages.** A device that cannot be reached, drops the connection, answers with an
//!   exception or does not answer within `timeout_s` starts an outage: logged once with the
//!   device's address (and again when a full read succeeds), every failure counted, and the
//!   connection made again with a wait doubling from `poll_s` up to [`MAX_BACKOFF_S`] (reset by
//!   the first successful read). Without rows the feed grows old exactly as a stopped CSV feed
//!   does: see [`super::ops`] and [`super::health`] (health `no_measurements`, then the tuning goes back to the
//!   configured transmittances).

use std::collections::VecDeque;
use std::sync::mpsc::{Receiver, SyncSender, TrySendError, sync_channel};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use chrono::{DateTime, TimeZone, Utc};
use tokio_modbus::client::{Client, Context, Reader};

use crate::config::{ModbusFeedSection, RegisterKind, RegisterSpec, SiteFile};
use crate::io::{Measurements, fmt_time};
use crate::sun::Observer;

use super::ops::FeedPoll;

/// Longest wait between two connection attempts during an outage \[s\].
pub const MAX_BACKOFF_S: f64 = 60.0;
/// Rows and notes the poller thread may hold for the engine; beyond that new rows are dropped
/// and counted (the engine takes them every poll, so this is reached only when it is stuck).
pub const QUEUE_LEN: usize = 1024;
/// Rows the kW/m² check looks at together.
pub const UNIT_WINDOW_ROWS: usize = 10;

/// What the poller thread hands over.
enum Msg {
    Row(DateTime<Utc>, Vec<f64>),
    Note(String),
}

/// The poller's state and counters (kept with the other health figures in `ops`).
pub use super::ops::ModbusFeedStatus;

/// The running poller; dropping it stops the thread (at once, also in the middle of a request).
pub struct ModbusPoller {
    section: ModbusFeedSection,
    rx: Receiver<Msg>,
    stop: Option<tokio::sync::oneshot::Sender<()>>,
    status: Arc<Mutex<ModbusFeedStatus>>,
    thread: Option<std::thread::JoinHandle<()>>,
    /// The last rows as decoded, for the kW/m² check.
    recent: VecDeque<(DateTime<Utc>, Vec<f64>)>,
    /// Rows handed to the engine (after screening) so far.
    pub rows_read: usize,
    /// Batches of rows refused by screening (kW/m²).
    pub errors: usize,
}

impl ModbusPoller {
    /// Start polling the device of `section` (validated with `site`, whose position and plant
    /// give the per-sample limits).
    ///
    /// # Errors
    /// The poller's runtime or thread could not be made.
    pub fn start(section: &ModbusFeedSection, site: &SiteFile) -> std::io::Result<ModbusPoller> {
        let (tx, rx) = sync_channel(QUEUE_LEN);
        let (stop_tx, stop_rx) = tokio::sync::oneshot::channel();
        let status = Arc::new(Mutex::new(ModbusFeedStatus { address: section.address.clone(), unit_id: section.unit_id, ..Default::default() }));
        let rt = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
        let device = Device::new(section.clone(), Limits::of(section, site), tx, status.clone());
        let thread = std::thread::Builder::new().name("modbus-feed".into()).spawn(move || rt.block_on(device.run(stop_rx)))?;
        Ok(ModbusPoller { section: section.clone(), rx, stop: Some(stop_tx), status, thread: Some(thread), recent: VecDeque::new(), rows_read: 0, errors: 0 })
    }

    /// The state and counters now.
    pub fn status(&self) -> ModbusFeedStatus {
        self.status.lock().map(|s| s.clone()).unwrap_or_default()
    }

    /// The rows of the periods ended since the last poll, screened as the CSV feed's are, and the
    /// lines to log. Never waits.
    pub fn poll(&mut self, site: &crate::config::SiteFile) -> FeedPoll {
        let mut out = FeedPoll::default();
        let mut rows = vec![];
        while let Ok(msg) = self.rx.try_recv() {
            match msg {
                Msg::Note(n) => out.notes.push(n),
                Msg::Row(t, v) => rows.push((t, v)),
            }
        }
        if rows.is_empty() {
            return out;
        }
        let origin = std::path::PathBuf::from(format!("modbus {}", self.section.address));
        // The kW/m² check over the last rows together (one row alone never shows it).
        let mut probe = self.measurements(self.recent.iter().chain(rows.iter()));
        self.recent.extend(rows.iter().cloned());
        while self.recent.len() > UNIT_WINDOW_ROWS {
            self.recent.pop_front();
        }
        if let Err(e) = probe.screen_site(&origin, site) {
            self.errors += 1;
            let span = format!("{} to {}", fmt_time(&rows[0].0), fmt_time(&rows[rows.len() - 1].0));
            out.notes.push(format!("measurements: {e}; the {} row(s) from {span} are left out", rows.len()));
            return out;
        }
        let mut m = self.measurements(rows.iter());
        let missing_before: Vec<Vec<bool>> = m.columns.iter().map(|c| c.iter().map(|v| v.is_nan()).collect()).collect();
        match m.screen_site(&origin, site) {
            Ok(report) => {
                if report.flagged() > 0 {
                    // Rows are named by their time (they have no file line).
                    let flagged: Vec<String> = (0..m.times.len())
                        .filter(|i| m.columns.iter().zip(&missing_before).any(|(c, b)| c[*i].is_nan() && !b[*i]))
                        .take(20)
                        .map(|i| fmt_time(&m.times[i]))
                        .collect();
                    let parts: Vec<String> = report.counts().iter().map(|(k, n)| format!("{k} {n}")).collect();
                    out.notes.push(format!(
                        "measurements {}: {} values of {} rows flagged and left out: {} (rows {})",
                        origin.display(),
                        report.flagged(),
                        report.rows,
                        parts.join(", "),
                        flagged.join(", ")
                    ));
                }
                self.rows_read += m.times.len();
                out.pieces.push((m, report.counts()));
            }
            Err(e) => {
                self.errors += 1;
                out.notes.push(format!("measurements: {e}; these {} rows are left out", m.times.len()));
            }
        }
        out
    }

    /// Rows as a measurements table with the register list's columns; `lines` hold 0 (no file).
    fn measurements<'a>(&self, rows: impl Iterator<Item = &'a (DateTime<Utc>, Vec<f64>)>) -> Measurements {
        let names: Vec<String> = self.section.registers.iter().map(|r| r.column.clone()).collect();
        let mut m = Measurements { times: vec![], names: names.clone(), columns: vec![vec![]; names.len()], period_s: self.section.averaging_s, lines: vec![] };
        for (t, v) in rows {
            m.times.push(*t);
            m.lines.push(0);
            for (c, x) in m.columns.iter_mut().zip(v.iter().chain(std::iter::repeat(&f64::NAN))) {
                c.push(*x);
            }
        }
        m
    }
}

impl Drop for ModbusPoller {
    fn drop(&mut self) {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// Read the register list once (for `live --check`): each column with its value in the column's
/// unit, W/m² or kW (NaN where the value is not a finite number).
///
/// # Errors
/// The device could not be reached or a request failed, naming the address and register.
pub fn probe(section: &ModbusFeedSection) -> Result<Vec<(String, f64)>, String> {
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(|e| format!("cannot start a runtime: {e}"))?;
    rt.block_on(async {
        let timeout = Duration::from_secs_f64(section.timeout_s);
        let mut ctx = open(section, timeout).await?;
        let mut out = vec![];
        for r in &section.registers {
            let words = read(&mut ctx, r, timeout).await.map_err(|f| f.message())?;
            out.push((r.column.clone(), r.decode(&words)));
        }
        let _ = tokio::time::timeout(Duration::from_secs(1), ctx.disconnect()).await;
        Ok(out)
    })
}

/// One averaging period's sums.
#[derive(Debug, Clone, PartialEq)]
pub struct Averager {
    period_ms: i64,
    expected: usize,
    start_ms: Option<i64>,
    sums: Vec<f64>,
    counts: Vec<usize>,
}

impl Averager {
    /// For `columns` values sampled every `poll_s` over periods of `averaging_s`.
    pub fn new(columns: usize, poll_s: f64, averaging_s: f64) -> Averager {
        let expected = ((averaging_s / poll_s).floor() as usize).max(1);
        Averager { period_ms: ((averaging_s * 1000.0).round() as i64).max(1), expected, start_ms: None, sums: vec![0.0; columns], counts: vec![0; columns] }
    }

    fn period_of(&self, t: DateTime<Utc>) -> i64 {
        t.timestamp_millis().div_euclid(self.period_ms) * self.period_ms
    }

    /// The row of the current period if it has ended by `now`, stamped at the period's start.
    /// A column with fewer than half the expected samples is NaN; a row with no value at all is
    /// not given.
    pub fn close_until(&mut self, now: DateTime<Utc>) -> Option<(DateTime<Utc>, Vec<f64>)> {
        let start = self.start_ms?;
        if start >= self.period_of(now) {
            return None;
        }
        let need = self.expected.div_ceil(2).max(1);
        let row: Vec<f64> = self.sums.iter().zip(&self.counts).map(|(s, n)| if *n >= need { s / *n as f64 } else { f64::NAN }).collect();
        self.clear();
        let t = Utc.timestamp_millis_opt(start).single()?;
        row.iter().any(|v| v.is_finite()).then_some((t, row))
    }

    /// Add one sample (NaN: missing) taken at `now`, after [`Averager::close_until`]. A sample
    /// from another period than the one being summed (the clock stepped back) drops the partial
    /// sums.
    pub fn add(&mut self, now: DateTime<Utc>, values: &[f64]) {
        let p = self.period_of(now);
        if self.start_ms.is_some_and(|s| s != p) {
            self.clear();
        }
        self.start_ms = Some(p);
        for ((s, n), v) in self.sums.iter_mut().zip(self.counts.iter_mut()).zip(values) {
            if v.is_finite() {
                *s += v;
                *n += 1;
            }
        }
    }

    fn clear(&mut self) {
        self.start_ms = None;
        self.sums.iter_mut().for_each(|s| *s = 0.0);
        self.counts.iter_mut().for_each(|n| *n = 0);
    }
}

/// How each register's samples are judged: the site's position (GHI against the sun) and each
/// meter column's AC capacity.
#[derive(Debug, Clone)]
struct Limits {
    observer: Observer,
    /// Per register: the meter's AC capacity \[kW\] for a power column, `None` for irradiance.
    capacity_kw: Vec<Option<f64>>,
}

impl Limits {
    fn of(section: &ModbusFeedSection, site: &SiteFile) -> Limits {
        Limits { observer: site.site.observer(), capacity_kw: section.registers.iter().map(|r| crate::meter::capacity_of(site, &r.column)).collect() }
    }

    /// Whether register `i`'s sample `v` is plausible with the sun at `zenith_rad`, `au` away.
    fn plausible(&self, i: usize, v: f64, zenith_rad: f64, au: f64) -> bool {
        match self.capacity_kw.get(i).copied().flatten() {
            Some(cap) => crate::meter::plausible(v, cap),
            None => sample_plausible(v, zenith_rad, au),
        }
    }
}

/// Whether one GHI sample is inside the BSRN "physically possible" limits with the sun at
/// `zenith_rad` (at night, the horizon's limits) and the Earth `au` from it.
pub fn sample_plausible(v: f64, zenith_rad: f64, au: f64) -> bool {
    let l = crate::qc::bsrn_limits(zenith_rad.min(std::f64::consts::FRAC_PI_2), au);
    v.is_finite() && v > -4.0 && v < l.ghi_physical
}

/// Why a request failed.
enum Fault {
    /// The connection is unusable (closed, timed out, refused, garbled).
    Link(String),
    /// The device answered with an exception, or with the wrong number of registers.
    Exception(String),
}

impl Fault {
    fn message(self) -> String {
        match self {
            Fault::Link(m) | Fault::Exception(m) => m,
        }
    }
}

/// Connect to the device of `section` within `timeout` (name look-up included).
async fn open(section: &ModbusFeedSection, timeout: Duration) -> Result<Context, String> {
    let connect = async {
        let addr = tokio::net::lookup_host(section.address.as_str()).await.map_err(|e| e.to_string())?.next().ok_or_else(|| "the name gives no address".to_string())?;
        tokio_modbus::client::tcp::connect_slave(addr, tokio_modbus::Slave(section.unit_id)).await.map_err(|e| e.to_string())
    };
    match tokio::time::timeout(timeout, connect).await {
        Ok(Ok(ctx)) => Ok(ctx),
        Ok(Err(e)) => Err(format!("{} (unit {}): cannot connect: {e}", section.address, section.unit_id)),
        Err(_) => Err(format!("{} (unit {}): cannot connect: no connection within {} s", section.address, section.unit_id, timeout.as_secs_f64())),
    }
}

/// Read the words of one register entry.
async fn read(ctx: &mut Context, r: &RegisterSpec, timeout: Duration) -> Result<Vec<u16>, Fault> {
    let n = r.format.words();
    let (table, answer) = match r.kind {
        RegisterKind::Input => ("input", tokio::time::timeout(timeout, ctx.read_input_registers(r.address, n)).await),
        RegisterKind::Holding => ("holding", tokio::time::timeout(timeout, ctx.read_holding_registers(r.address, n)).await),
    };
    let at = format!("{table} register {} ({})", r.address, r.column);
    match answer {
        Err(_) => Err(Fault::Link(format!("{at}: no answer within {} s", timeout.as_secs_f64()))),
        Ok(Err(e)) => Err(Fault::Link(format!("{at}: {e}"))),
        Ok(Ok(Err(code))) => Err(Fault::Exception(format!("{at}: exception {code}"))),
        Ok(Ok(Ok(words))) if words.len() == usize::from(n) => Ok(words),
        Ok(Ok(Ok(words))) => Err(Fault::Exception(format!("{at}: {} words for the {n} asked", words.len()))),
    }
}

/// The poller thread's state.
struct Device {
    s: ModbusFeedSection,
    limits: Limits,
    tx: SyncSender<Msg>,
    status: Arc<Mutex<ModbusFeedStatus>>,
    ctx: Option<Context>,
    retry_at: Instant,
    backoff_s: f64,
    outage: bool,
}

impl Device {
    fn new(s: ModbusFeedSection, limits: Limits, tx: SyncSender<Msg>, status: Arc<Mutex<ModbusFeedStatus>>) -> Device {
        let backoff_s = s.poll_s;
        Device { s, limits, tx, status, ctx: None, retry_at: Instant::now(), backoff_s, outage: false }
    }

    fn timeout(&self) -> Duration {
        Duration::from_secs_f64(self.s.timeout_s)
    }

    fn update(&self, f: impl FnOnce(&mut ModbusFeedStatus)) {
        if let Ok(mut s) = self.status.lock() {
            f(&mut s);
        }
    }

    fn note(&self, n: String) {
        let _ = self.tx.try_send(Msg::Note(n));
    }

    fn hand_over(&self, t: DateTime<Utc>, row: Vec<f64>) {
        match self.tx.try_send(Msg::Row(t, row)) {
            Ok(()) => self.update(|s| s.rows_made += 1),
            Err(TrySendError::Full(_)) => self.update(|s| s.rows_dropped += 1),
            Err(TrySendError::Disconnected(_)) => {}
        }
    }

    async fn run(mut self, mut stop: tokio::sync::oneshot::Receiver<()>) {
        let mut avg = Averager::new(self.s.registers.len(), self.s.poll_s, self.s.averaging_s);
        let mut tick = tokio::time::interval(Duration::from_secs_f64(self.s.poll_s));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
        loop {
            tokio::select! {
                _ = &mut stop => break,
                _ = tick.tick() => {}
            }
            let now = Utc::now();
            if let Some((t, row)) = avg.close_until(now) {
                self.hand_over(t, row);
            }
            let values = tokio::select! {
                _ = &mut stop => break,
                v = self.sample(now) => v,
            };
            avg.add(now, &values);
        }
        if let Some(mut c) = self.ctx.take() {
            let _ = tokio::time::timeout(Duration::from_secs(1), c.disconnect()).await;
        }
    }

    /// Read every register once (connecting first when the backoff allows): values in W/m², NaN
    /// where there is none or it was refused.
    async fn sample(&mut self, now: DateTime<Utc>) -> Vec<f64> {
        let mut values = vec![f64::NAN; self.s.registers.len()];
        if self.ctx.is_none() && !self.connect().await {
            return values;
        }
        let (zenith, au) = crate::sun::position(&now, &self.limits.observer).map(|p| (p.zenith_rad, p.earth_sun_distance_au)).unwrap_or((std::f64::consts::FRAC_PI_2, 1.0));
        let timeout = self.timeout();
        let registers = self.s.registers.clone();
        let (mut fault, mut refused, mut any_ok) = (None, 0, false);
        for (i, r) in registers.iter().enumerate() {
            let Some(ctx) = self.ctx.as_mut() else { break };
            match read(ctx, r, timeout).await {
                Ok(words) => {
                    any_ok = true;
                    let v = r.decode(&words);
                    if self.limits.plausible(i, v, zenith, au) {
                        values[i] = v;
                    } else {
                        refused += 1;
                    }
                }
                Err(Fault::Link(e)) => {
                    // The connection is unusable (a late answer would be taken for the next one).
                    self.ctx = None;
                    fault = Some(e);
                    break;
                }
                Err(Fault::Exception(e)) => fault = Some(e),
            }
        }
        self.update(|s| {
            s.values_refused += refused;
            s.connected = self.ctx.is_some();
        });
        if any_ok {
            self.backoff_s = self.s.poll_s;
        }
        match fault {
            None => self.healthy(),
            Some(e) => {
                let at = format!("{} (unit {}): {e}", self.s.address, self.s.unit_id);
                if self.ctx.is_none() {
                    // A device that takes connections but never answers waits longer each time too.
                    self.retry_at = Instant::now() + Duration::from_secs_f64(self.backoff_s);
                    if !any_ok {
                        self.backoff_s = (self.backoff_s * 2.0).min(MAX_BACKOFF_S);
                    }
                }
                self.fault(at);
            }
        }
        values
    }

    /// Connect when the backoff allows; whether a connection is open.
    async fn connect(&mut self) -> bool {
        if Instant::now() < self.retry_at {
            return false;
        }
        match open(&self.s, self.timeout()).await {
            Ok(ctx) => {
                self.ctx = Some(ctx);
                self.update(|s| s.connected = true);
                true
            }
            Err(e) => {
                self.retry_at = Instant::now() + Duration::from_secs_f64(self.backoff_s);
                self.backoff_s = (self.backoff_s * 2.0).min(MAX_BACKOFF_S);
                self.fault(e);
                false
            }
        }
    }

    /// Count a failure; the first of an outage is logged.
    fn fault(&mut self, why: String) {
        let first = !self.outage;
        self.outage = true;
        let stamped = format!("{}: {why}", fmt_time(&Utc::now()));
        self.update(|s| {
            s.errors += 1;
            s.outages += u64::from(first);
            s.in_outage = true;
            s.last_error = Some(stamped);
        });
        if first {
            self.note(format!("measurements modbus {why}; outage begins (failures are counted; a lost connection is made again with waits doubling up to {MAX_BACKOFF_S:.0} s)"));
        }
    }

    /// A full read: an outage ends.
    fn healthy(&mut self) {
        self.update(|s| {
            s.reads_ok += 1;
            s.in_outage = false;
        });
        if self.outage {
            self.outage = false;
            self.note(format!("measurements modbus {} (unit {}): every register read again, outage over", self.s.address, self.s.unit_id));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn at(ms: i64) -> DateTime<Utc> {
        Utc.timestamp_millis_opt(ms).single().unwrap_or_default()
    }

    #[test]
    fn averages_per_period_and_needs_half_the_samples() {
        // 1-s poll, 10-s periods: 5 samples needed.
        let mut a = Averager::new(2, 1.0, 10.0);
        let base = 1_700_000_000_000; // a multiple of 10 s
        for k in 0..10 {
            assert!(a.close_until(at(base + k * 1000)).is_none());
            let second = if k < 4 { 7.0 } else { f64::NAN };
            a.add(at(base + k * 1000), &[f64::from(k as i32), second]);
        }
        let (t, row) = a.close_until(at(base + 10_000)).expect("a row");
        assert_eq!(t, at(base));
        assert_eq!(row[0], 4.5);
        assert!(row[1].is_nan(), "4 of 10 samples give no value");
        // A period with no value at all gives no row.
        a.add(at(base + 10_000), &[f64::NAN, f64::NAN]);
        assert!(a.close_until(at(base + 20_000)).is_none());
        // Exactly half is enough; a skipped period closes the one before it, stamped at its start.
        for k in 0..5 {
            a.add(at(base + 30_000 + k * 1000), &[100.0 + f64::from(k as i32), 5.0]);
        }
        let (t, row) = a.close_until(at(base + 55_000)).expect("a row");
        assert_eq!((t, row), (at(base + 30_000), vec![102.0, 5.0]));
        assert!(a.close_until(at(base + 65_000)).is_none(), "nothing was summed since");
    }

    #[test]
    fn clock_step_back_drops_the_partial_period() {
        let mut a = Averager::new(1, 1.0, 10.0);
        let base = 1_700_000_000_000;
        for k in 0..6 {
            a.add(at(base + k * 1000), &[50.0]);
        }
        // The clock steps back 20 s: the 6 samples are not mixed into the earlier period.
        assert!(a.close_until(at(base - 15_000)).is_none());
        for k in 0..5 {
            a.add(at(base - 15_000 + k * 1000), &[10.0]);
        }
        let (t, row) = a.close_until(at(base)).expect("a row");
        assert_eq!((t, row), (at(base - 20_000), vec![10.0]));
    }

    #[test]
    fn periods_start_at_multiples_since_midnight() {
        let mut a = Averager::new(1, 5.0, 60.0);
        let t0: DateTime<Utc> = "2026-06-14T10:00:37Z".parse().unwrap();
        for k in 0..12 {
            a.add(t0 + chrono::Duration::seconds(k), &[200.0]);
        }
        let (t, _) = a.close_until("2026-06-14T10:01:02Z".parse().unwrap()).expect("a row");
        assert_eq!(fmt_time(&t), "2026-06-14T10:00:00Z");
    }

    /// A poller without a thread, fed through its channel.
    fn poller(columns: &[&str]) -> (ModbusPoller, SyncSender<Msg>) {
        let (tx, rx) = sync_channel(QUEUE_LEN);
        let registers = columns
            .iter()
            .enumerate()
            .map(|(i, c)| RegisterSpec { column: (*c).into(), address: i as u16, kind: RegisterKind::Input, format: Default::default(), word_order: Default::default(), scale: 1.0, offset: 0.0, unit: None })
            .collect();
        let section = ModbusFeedSection { address: "127.0.0.1:5502".into(), unit_id: 1, poll_s: 5.0, averaging_s: 60.0, timeout_s: 2.0, registers };
        let p = ModbusPoller { section, rx, stop: None, status: Default::default(), thread: None, recent: VecDeque::new(), rows_read: 0, errors: 0 };
        (p, tx)
    }

    #[test]
    fn poll_screens_rows_as_the_csv_feed_and_refuses_kw_over_several_polls() {
        let site = crate::config::Site::load(&std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/site.toml")).unwrap().file;
        let (mut p, tx) = poller(&["ghi_north-fixed_wm2", "ghi_east-tracker_wm2"]);
        let minute = |m: i64| "2026-06-14T10:00:00Z".parse::<DateTime<Utc>>().unwrap() + chrono::Duration::minutes(m);
        assert!(p.poll(&site).pieces.is_empty(), "nothing yet");
        // kW/m², one row per poll as the device gives them: refused once 5 daytime rows are seen.
        let mut refused = 0;
        for m in 0..6 {
            tx.try_send(Msg::Row(minute(m), vec![0.8, 0.75])).unwrap();
            let r = p.poll(&site);
            if r.pieces.is_empty() {
                refused += 1;
                assert!(r.notes[0].contains("kW/m²") && r.notes[0].contains("modbus 127.0.0.1:5502"), "{:?}", r.notes);
            }
        }
        assert_eq!((refused, p.errors), (2, 2), "the 5th and 6th rows");
        // W/m²: taken; an extremely rare value is flagged and the note names its row by time.
        tx.try_send(Msg::Note("a note".into())).unwrap();
        tx.try_send(Msg::Row(minute(6), vec![810.0, f64::NAN])).unwrap();
        tx.try_send(Msg::Row(minute(7), vec![1600.0, 700.0])).unwrap();
        let r = p.poll(&site);
        assert_eq!(r.pieces.len(), 1);
        let (m, counts) = &r.pieces[0];
        assert_eq!(m.times, vec![minute(6), minute(7)]);
        assert_eq!(m.period_s, 60.0);
        assert_eq!(m.columns[0][0], 810.0);
        assert!(m.columns[0][1].is_nan() && m.columns[1][0].is_nan() && m.columns[1][1] == 700.0);
        assert_eq!(counts.get("ghi_north-fixed_wm2 extremely rare"), Some(&1), "{counts:?}");
        assert_eq!(r.notes[0], "a note");
        assert!(r.notes[1].contains("rows 2026-06-14T10:07:00Z"), "{:?}", r.notes);
        assert_eq!(p.rows_read, 6, "4 kW rows before the check could tell, then 2");
    }

    #[test]
    fn samples_outside_the_physical_limits_or_not_finite_are_refused() {
        let noon = 0.3_f64; // zenith ≈ 17°
        let night = 1.9_f64;
        assert!(sample_plausible(850.0, noon, 1.0));
        assert!(sample_plausible(-3.0, night, 1.0));
        // A u16 sensor's error code read as W/m², a NaN float, an infinity.
        for bad in [65_535.0, f64::NAN, f64::INFINITY, -10.0] {
            assert!(!sample_plausible(bad, noon, 1.0), "{bad}");
        }
        // At night the horizon's limit (100 W/m²) applies.
        assert!(!sample_plausible(150.0, night, 1.0));
        // Decoded values flow through: a NaN float decodes to NaN and is refused, never panics.
        let r = RegisterSpec { column: "ghi_a_wm2".into(), address: 0, kind: RegisterKind::Input, format: crate::config::RegisterFormat::F32, word_order: crate::config::WordOrder::Big, scale: 1.0, offset: 0.0, unit: None };
        for words in [[0x7FC0, 0], [0x7F80, 0], [0xFF80, 0], [0xFFFF, 0xFFFF]] {
            assert!(!sample_plausible(r.decode(&words), noon, 1.0), "{words:?}");
        }
    }
}
