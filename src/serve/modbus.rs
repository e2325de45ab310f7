//! The plant controller's interface: a read-only Modbus TCP server (tokio-modbus) that serves the
//! latest nowcast as registers.
//!
//! * **One map.** [`header_fields`] and [`target_fields`] are the register map: every field's
//!   address, type, scale, unit and meaning. The server encodes from these tables and
//!   [`markdown`] prints them (`nephocast registers --site S`), so the documentation cannot drift.
//! * **Read-only.** Input registers (function 4) and holding registers (function 3) read the same
//!   image; every other function, writes included, is answered with exception 1 (illegal
//!   function); a read outside the image with exception 2 (illegal data address).
//! * **Exposure.** Loopback by default; another address is refused unless explicitly allowed. At
//!   most `max_connections` connections at once: beyond that a new connection is closed at once;
//!   a connection on which nothing moves for `idle_timeout` is closed.
//! * **Freshness.** The engine publishes the registers' source ([`Feed::publish`]) as soon as a
//!   nowcast is computed, before logging and pictures; frame age and data-valid are computed at
//!   read time from the frame time and the clock. Data-valid is 1 only while a nowcast is present
//!   and its frame is at most `max_frame_age_s` old.
//!
//! Forecasts and alarms are advisory, not a protection system.

use std::fmt::Write as _;
use std::net::SocketAddr;
use std::sync::{Arc, RwLock};
use std::time::Instant;

use chrono::{DateTime, Utc};
use tokio_modbus::{ExceptionCode, Request, Response};

use crate::nowcast::Nowcast;
use crate::ramp::{AlarmState, Direction};

/// Version of the register map (register 0); raised when an address or a scale changes.
pub const MAP_VERSION: u16 = 1;
/// Address of the first target's area.
pub const TARGET_BASE: u16 = 100;
/// Registers per target area.
pub const TARGET_STRIDE: u16 = 32;
/// Forecast horizons served per target \[min\].
pub const HORIZONS_MIN: [u32; 4] = [1, 5, 10, 15];
/// Quantiles served per horizon.
pub const QUANTILES: [&str; 3] = ["p10", "p50", "p90"];
/// The value a signed 32-bit power register holds when the forecast has no value.
pub const POWER_MISSING: i32 = i32::MIN;
/// Most registers one read returns (the protocol's limit).
pub const MAX_READ_REGISTERS: u16 = 125;

/// How a field is stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// One register, unsigned.
    U16,
    /// One register, two's complement.
    I16,
    /// Two registers, unsigned, high word first.
    U32,
    /// Two registers, two's complement, high word first.
    I32,
}

impl Kind {
    /// Registers taken.
    pub fn words(self) -> u16 {
        match self {
            Kind::U16 | Kind::I16 => 1,
            Kind::U32 | Kind::I32 => 2,
        }
    }

    fn name(self) -> &'static str {
        match self {
            Kind::U16 => "u16",
            Kind::I16 => "i16",
            Kind::U32 => "u32 (high word first)",
            Kind::I32 => "i32 (high word first)",
        }
    }

    /// Encode a raw (already scaled) value, rounded and clamped to the type's range.
    fn encode(self, raw: f64, out: &mut [u16]) {
        let r = raw.round();
        match self {
            Kind::U16 => out[0] = r.clamp(0.0, u16::MAX as f64) as u16,
            Kind::I16 => out[0] = (r.clamp(i16::MIN as f64, i16::MAX as f64) as i16) as u16,
            Kind::U32 => {
                let v = r.clamp(0.0, u32::MAX as f64) as u32;
                out[0] = (v >> 16) as u16;
                out[1] = v as u16;
            }
            Kind::I32 => {
                // The lowest value is kept for "missing".
                let v = r.clamp(i32::MIN as f64 + 1.0, i32::MAX as f64) as i32 as u32;
                out[0] = (v >> 16) as u16;
                out[1] = v as u16;
            }
        }
    }
}

/// Where a field's value comes from.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Source {
    /// [`MAP_VERSION`].
    MapVersion,
    /// 1 while the data are valid.
    DataValid,
    /// Nowcasts published, wrapping.
    Heartbeat,
    /// Age of the nowcast's frame at read time \[s\].
    FrameAgeS,
    /// The nowcast's frame time \[Unix s\].
    FrameTimeUnixS,
    /// Alarm state code.
    AlarmCode,
    /// Probability of the ramp behind the alarm.
    RampProbability,
    /// Direction of that ramp.
    RampDirection,
    /// Its expected start from read time \[s\].
    RampStartInS,
    /// Its expected start \[Unix s\].
    RampStartUnixS,
    /// Its size \[% of AC capacity\].
    RampChangePct,
    /// Targets served.
    TargetCount,
    /// [`TARGET_BASE`].
    TargetBase,
    /// [`TARGET_STRIDE`].
    TargetStride,
    /// The target's index (0: plant).
    TargetIndex,
    /// Power quantile `q` (index in [`QUANTILES`]) at horizon `h` (index in [`HORIZONS_MIN`]) \[kW\].
    Power {
        /// Horizon index.
        h: usize,
        /// Quantile index.
        q: usize,
    },
}

/// One field of the register map.
#[derive(Debug, Clone, PartialEq)]
pub struct Field {
    /// Address (header) or offset within a target's area.
    pub offset: u16,
    /// Name.
    pub name: String,
    /// Storage.
    pub kind: Kind,
    /// Physical value = register value × scale.
    pub scale: f64,
    /// Unit of the physical value.
    pub unit: &'static str,
    /// Meaning, with its special values.
    pub meaning: String,
    /// Where the value comes from.
    pub source: Source,
}

fn lay_out(spec: Vec<(String, Kind, f64, &'static str, String, Source)>) -> Vec<Field> {
    let mut offset = 0;
    spec.into_iter()
        .map(|(name, kind, scale, unit, meaning, source)| {
            let f = Field { offset, name, kind, scale, unit, meaning, source };
            offset += kind.words();
            f
        })
        .collect()
}

/// The header fields, at fixed addresses from 0 (plant-wide values and the map's layout).
pub fn header_fields() -> Vec<Field> {
    let s = |x: &str| x.to_string();
    lay_out(vec![
        (s("map_version"), Kind::U16, 1.0, "", format!("register map version ({MAP_VERSION})"), Source::MapVersion),
        (s("data_valid"), Kind::U16, 1.0, "", s("1: the service's health has the data valid (ok, or no measurements), a nowcast is present and its frame is recent enough (see the server's maximum frame age); 0 otherwise (before the first nowcast, stale, camera down, night)"), Source::DataValid),
        (s("heartbeat"), Kind::U16, 1.0, "", s("nowcasts published since start; wraps from 65535 to 0"), Source::Heartbeat),
        (s("frame_age_s"), Kind::U32, 1.0, "s", s("age of the latest nowcast's frame, from the clock at read time; 4294967295 before the first nowcast"), Source::FrameAgeS),
        (s("frame_time_unix_s"), Kind::U32, 1.0, "s", s("the latest nowcast's frame time (Unix time, UTC); 0 before the first nowcast"), Source::FrameTimeUnixS),
        (s("alarm_code"), Kind::U16, 1.0, "", s("plant ramp alarm: 0 calm, 1 caution, 2 alert, 3 variable (advisory)"), Source::AlarmCode),
        (s("ramp_probability"), Kind::U16, 0.001, "1", s("probability of the ramp behind the alarm state (the alarm's basis); 0 when none (calm)"), Source::RampProbability),
        (s("ramp_direction"), Kind::I16, 1.0, "", s("that ramp: -1 down, 1 up, 0 none"), Source::RampDirection),
        (s("ramp_start_in_s"), Kind::I16, 1.0, "s", s("its expected start, from the clock at read time (negative once past); 0 when none"), Source::RampStartInS),
        (s("ramp_start_unix_s"), Kind::U32, 1.0, "s", s("its expected start (Unix time, UTC); 0 when none"), Source::RampStartUnixS),
        (s("ramp_change_pct"), Kind::I16, 0.1, "%", s("its size in % of the plant's AC capacity (signed); 0 when none"), Source::RampChangePct),
        (s("target_count"), Kind::U16, 1.0, "", s("target areas served (the plant, then each block)"), Source::TargetCount),
        (s("target_base"), Kind::U16, 1.0, "", format!("address of the first target area ({TARGET_BASE})"), Source::TargetBase),
        (s("target_stride"), Kind::U16, 1.0, "", format!("registers per target area ({TARGET_STRIDE})"), Source::TargetStride),
    ])
}

/// The fields of one target's area, at offsets from its start.
pub fn target_fields() -> Vec<Field> {
    let mut spec = vec![("target_index".to_string(), Kind::U16, 1.0, "", "0 for the plant, k for the k-th block of the site file".to_string(), Source::TargetIndex)];
    for (h, m) in HORIZONS_MIN.iter().enumerate() {
        for (q, name) in QUANTILES.iter().enumerate() {
            spec.push((
                format!("power_{name}_{m}min"),
                Kind::I32,
                0.001,
                "kW",
                format!("AC power {} at {m} min ahead (W as an integer); -2147483648 when not forecast", name.to_uppercase()),
                Source::Power { h, q },
            ));
        }
    }
    // Keep the target's index on a register of its own and the powers on even offsets.
    let mut f = lay_out(spec);
    for x in f.iter_mut().skip(1) {
        x.offset += 1;
    }
    f
}

/// The registers' source: what the latest nowcast says, per target.
#[derive(Debug, Clone)]
pub struct Snapshot {
    /// The frame time.
    pub frame_time: DateTime<Utc>,
    /// Nowcasts published so far (this one included).
    pub heartbeat: u64,
    /// Alarm state.
    pub alarm: AlarmState,
    /// The ramp behind the alarm state: (probability, direction, expected start, change in % of capacity).
    pub ramp: Option<(f64, Direction, DateTime<Utc>, f64)>,
    /// Per target (plant first), per horizon, P10/P50/P90 power \[kW\] (NaN: not forecast).
    pub power_kw: Vec<[[f64; 3]; 4]>,
    /// When the engine handed the nowcast over (the start of [`Feed::publish`]).
    pub published: Instant,
}

/// The shared source of the registers: the engine publishes, the server reads.
#[derive(Debug)]
pub struct Feed {
    targets: Vec<String>,
    latest: RwLock<Option<Arc<Snapshot>>>,
    /// The service's health judges the data valid ([`Feed::set_health_valid`]; false until first
    /// judged valid).
    health_valid: std::sync::atomic::AtomicBool,
}

impl Feed {
    /// A feed for these targets (the plant first, then the blocks in site order).
    pub fn new(targets: Vec<String>) -> Self {
        Self { targets, latest: RwLock::new(None), health_valid: std::sync::atomic::AtomicBool::new(false) }
    }

    /// Set by the service's health timer (and on each frame): whether its health state has the data
    /// valid (`ok` or `no_measurements`). The registers' data-valid flag needs it as well as a
    /// recent enough frame, so the controller interface agrees with the API, event stream and log.
    pub fn set_health_valid(&self, valid: bool) {
        self.health_valid.store(valid, std::sync::atomic::Ordering::SeqCst);
    }

    /// The targets served, in area order.
    pub fn targets(&self) -> &[String] {
        &self.targets
    }

    /// The latest snapshot.
    pub fn latest(&self) -> Option<Arc<Snapshot>> {
        self.latest.read().ok().and_then(|g| g.clone())
    }

    /// Publish a nowcast.
    pub fn publish(&self, nc: &Nowcast) {
        let published = Instant::now();
        let heartbeat = self.latest().map_or(0, |s| s.heartbeat) + 1;
        let power_kw = self
            .targets
            .iter()
            .map(|t| {
                let mut v = [[f64::NAN; 3]; 4];
                for (h, m) in HORIZONS_MIN.iter().enumerate() {
                    if let Some((_, r)) = nc.forecast.rows().find(|(name, r)| name == t && r.horizon_s == m * 60) {
                        v[h] = r.band.map_or([f64::NAN, r.power_kw, f64::NAN], |b| b.power_kw);
                    }
                }
                v
            })
            .collect();
        // The ramp behind the alarm state (its basis), so the ramp registers never contradict the
        // alarm code; none while the alarm is calm (or before motion is confirmed).
        let ramp = nc.alarm_basis.as_ref().map(|b| (b.ramp.probability, b.ramp.direction, b.start, b.ramp.change_pct));
        let s = Snapshot { frame_time: nc.time, heartbeat, alarm: nc.alarm, ramp, power_kw, published };
        if let Ok(mut g) = self.latest.write() {
            *g = Some(Arc::new(s));
        }
    }

    /// The register image at `now`, judged valid up to `max_frame_age_s`.
    pub fn image(&self, now: DateTime<Utc>, max_frame_age_s: f64) -> Vec<u16> {
        let snap = self.latest();
        let n = self.targets.len();
        let mut img = vec![0u16; TARGET_BASE as usize + TARGET_STRIDE as usize * n];
        let age_s = snap.as_ref().map(|s| (now - s.frame_time).num_milliseconds() as f64 / 1000.0);
        let value = |src: Source, target: usize| -> f64 {
            let s = snap.as_deref();
            let ramp = s.and_then(|s| s.ramp);
            match src {
                Source::MapVersion => MAP_VERSION as f64,
                Source::DataValid => f64::from(u8::from(data_valid(age_s, max_frame_age_s) && self.health_valid.load(std::sync::atomic::Ordering::SeqCst))),
                Source::Heartbeat => s.map_or(0, |s| s.heartbeat % 65536) as f64,
                Source::FrameAgeS => age_s.map_or(u32::MAX as f64, |a| a.max(0.0).floor()),
                Source::FrameTimeUnixS => s.map_or(0.0, |s| s.frame_time.timestamp() as f64),
                Source::AlarmCode => s.map_or(0.0, |s| alarm_code(s.alarm) as f64),
                Source::RampProbability => ramp.map_or(0.0, |r| r.0),
                Source::RampDirection => ramp.map_or(0.0, |r| if r.1 == Direction::Up { 1.0 } else { -1.0 }),
                Source::RampStartInS => ramp.map_or(0.0, |r| (r.2 - now).num_milliseconds() as f64 / 1000.0),
                Source::RampStartUnixS => ramp.map_or(0.0, |r| r.2.timestamp() as f64),
                Source::RampChangePct => ramp.map_or(0.0, |r| r.3),
                Source::TargetCount => n as f64,
                Source::TargetBase => TARGET_BASE as f64,
                Source::TargetStride => TARGET_STRIDE as f64,
                Source::TargetIndex => target as f64,
                Source::Power { h, q } => s.and_then(|s| s.power_kw.get(target)).map_or(f64::NAN, |p| p[h][q]),
            }
        };
        let put = |img: &mut [u16], at: usize, f: &Field, v: f64| {
            if f.source.is_power() && !v.is_finite() {
                Kind::I32.encode_missing(&mut img[at..at + 2]);
            } else if v.is_finite() {
                f.kind.encode(v / f.scale, &mut img[at..at + f.kind.words() as usize]);
            }
        };
        for f in header_fields() {
            put(&mut img, f.offset as usize, &f, value(f.source, 0));
        }
        let tf = target_fields();
        for k in 0..n {
            let base = TARGET_BASE as usize + TARGET_STRIDE as usize * k;
            for f in &tf {
                put(&mut img, base + f.offset as usize, f, value(f.source, k));
            }
        }
        img
    }
}

impl Source {
    fn is_power(&self) -> bool {
        matches!(self, Source::Power { .. })
    }
}

impl Kind {
    fn encode_missing(self, out: &mut [u16]) {
        let v = POWER_MISSING as u32;
        out[0] = (v >> 16) as u16;
        out[1] = v as u16;
    }
}

/// Data-valid: a nowcast is present and its frame is at most `max_frame_age_s` old (a frame
/// dated ahead of the clock counts as new).
pub fn data_valid(frame_age_s: Option<f64>, max_frame_age_s: f64) -> bool {
    frame_age_s.is_some_and(|a| a <= max_frame_age_s)
}

/// The alarm state's register code.
pub fn alarm_code(a: AlarmState) -> u16 {
    match a {
        AlarmState::Calm => 0,
        AlarmState::Caution => 1,
        AlarmState::Alert => 2,
        AlarmState::Variable => 3,
    }
}

/// The register map as markdown, for a site with these targets (the plant first, then the blocks).
pub fn markdown(targets: &[String]) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "# Modbus TCP registers\n");
    let _ = writeln!(s, "Generated by `nephocast registers --site SITE` from the register map in `src/serve/modbus.rs`; do not edit by hand.\n");
    let _ = writeln!(
        s,
        "Read-only. Input registers (function 4) and holding registers (function 3) hold the same image; writes and every other function are answered with exception 1 (illegal function), reads outside the image with exception 2 (illegal data address), reads of more than {MAX_READ_REGISTERS} registers with exception 3. Addresses are the zero-based addresses of the protocol; any unit identifier is answered. 32-bit values take two registers, high word first; signed values are two's complement. Physical value = register value × scale. Registers between fields read 0. Forecasts and alarms are advisory, not a protection system.\n"
    );
    let table = |s: &mut String, title: &str, first: &str, fields: &[Field]| {
        let _ = writeln!(s, "## {title}\n");
        let _ = writeln!(s, "| {first} | name | type | scale | unit | meaning |");
        let _ = writeln!(s, "|---|---|---|---|---|---|");
        for f in fields {
            let addr = if f.kind.words() == 2 { format!("{}–{}", f.offset, f.offset + 1) } else { f.offset.to_string() };
            let _ = writeln!(s, "| {addr} | `{}` | {} | {} | {} | {} |", f.name, f.kind.name(), f.scale, f.unit, f.meaning);
        }
        let _ = writeln!(s);
    };
    table(&mut s, "Header (plant-wide)", "address", &header_fields());
    table(&mut s, "Target area (one per target)", "offset", &target_fields());
    let _ = writeln!(s, "## Targets of this site\n");
    let _ = writeln!(s, "| index | target | first address | last address |");
    let _ = writeln!(s, "|---|---|---|---|");
    for (k, t) in targets.iter().enumerate() {
        let base = TARGET_BASE as usize + TARGET_STRIDE as usize * k;
        let _ = writeln!(s, "| {k} | {t} | {base} | {} |", base + TARGET_STRIDE as usize - 1);
    }
    s
}

/// The targets served for a site file: the plant, then its blocks in order.
pub fn targets_of(site: &crate::config::SiteFile) -> Vec<String> {
    std::iter::once(crate::plant::PLANT_TARGET.to_string()).chain(site.plant.blocks.iter().map(|b| b.name.clone())).collect()
}

/// How the Modbus server is run.
#[derive(Debug, Clone, PartialEq)]
pub struct ModbusOptions {
    /// Where to listen (port 0 picks a free one).
    pub bind: SocketAddr,
    /// Serve on a non-loopback address (a warning is given).
    pub allow_non_loopback: bool,
    /// Connections open at once; beyond that a new connection is closed.
    pub max_connections: usize,
    /// Data-valid only while the latest frame is at most this old \[s\].
    pub max_frame_age_s: f64,
    /// A connection on which no byte moves for this long is closed (default 60 s).
    pub idle_timeout: std::time::Duration,
}

/// The default Modbus address (the standard port needs privileges).
pub const DEFAULT_MODBUS_BIND: &str = "127.0.0.1:5020";

impl Default for ModbusOptions {
    fn default() -> Self {
        Self { bind: DEFAULT_MODBUS_BIND.parse().unwrap_or_else(|_| SocketAddr::from(([127, 0, 0, 1], 5020))), allow_non_loopback: false, max_connections: 16, max_frame_age_s: 120.0, idle_timeout: std::time::Duration::from_secs(60) }
    }
}

impl ModbusOptions {
    /// Check the options; returns the warnings to give.
    ///
    /// # Errors
    /// A non-loopback address without `allow_non_loopback`, no connections, or a bad age.
    pub fn check(&self) -> Result<Vec<String>, String> {
        if !(1..=4096).contains(&self.max_connections) {
            return Err(format!("--modbus-max-connections: expected 1 to 4096, got {}", self.max_connections));
        }
        if !(self.max_frame_age_s.is_finite() && self.max_frame_age_s > 0.0) {
            return Err(format!("--modbus-max-frame-age-s: expected a positive number of seconds, got {}", self.max_frame_age_s));
        }
        if !(1.0..=86_400.0).contains(&self.idle_timeout.as_secs_f64()) {
            return Err(format!("Modbus idle timeout: expected 1 to 86400 s, got {:?}", self.idle_timeout));
        }
        if self.bind.ip().is_loopback() {
            return Ok(vec![]);
        }
        if !self.allow_non_loopback {
            return Err(format!(
                "--modbus-bind {}: a non-loopback address is refused (Modbus TCP has no authentication); add --modbus-allow-non-loopback to serve it anyway",
                self.bind
            ));
        }
        Ok(vec![format!("Modbus on the non-loopback address {}: anyone who reaches it reads the forecasts and alarms (no authentication, clear text)", self.bind)])
    }
}

/// The per-connection service: reads of the image, everything else refused.
struct Registers {
    feed: Arc<Feed>,
    max_frame_age_s: f64,
    _permit: tokio::sync::OwnedSemaphorePermit,
}

/// Answer one request from the image at `now`.
pub fn answer(feed: &Feed, max_frame_age_s: f64, req: &Request<'_>, now: DateTime<Utc>) -> Result<Response, ExceptionCode> {
    let (addr, count, holding) = match req {
        Request::ReadInputRegisters(a, c) => (*a, *c, false),
        Request::ReadHoldingRegisters(a, c) => (*a, *c, true),
        _ => return Err(ExceptionCode::IllegalFunction),
    };
    if count == 0 || count > MAX_READ_REGISTERS {
        return Err(ExceptionCode::IllegalDataValue);
    }
    let img = feed.image(now, max_frame_age_s);
    let (a, end) = (addr as usize, addr as usize + count as usize);
    if end > img.len() {
        return Err(ExceptionCode::IllegalDataAddress);
    }
    let words = img[a..end].to_vec();
    Ok(if holding { Response::ReadHoldingRegisters(words) } else { Response::ReadInputRegisters(words) })
}

impl tokio_modbus::server::Service for Registers {
    type Request = Request<'static>;
    type Response = Response;
    type Exception = ExceptionCode;
    type Future = std::future::Ready<Result<Response, ExceptionCode>>;

    fn call(&self, req: Self::Request) -> Self::Future {
        std::future::ready(answer(&self.feed, self.max_frame_age_s, &req, Utc::now()))
    }
}

/// A running Modbus server.
pub struct ModbusServer {
    /// Where it listens.
    pub addr: SocketAddr,
    shutdown: Option<tokio::sync::oneshot::Sender<()>>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl ModbusServer {
    /// Stop it and wait.
    pub fn stop(mut self) {
        self.halt();
    }

    fn halt(&mut self) {
        if let Some(s) = self.shutdown.take() {
            let _ = s.send(());
        }
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

impl Drop for ModbusServer {
    fn drop(&mut self) {
        self.halt();
    }
}

/// Bind and start the server in a thread of its own.
///
/// # Errors
/// Refused options ([`ModbusOptions::check`]) or an address that cannot be bound.
pub fn start(opts: &ModbusOptions, feed: Arc<Feed>) -> Result<(ModbusServer, Vec<String>), super::ServeError> {
    let warnings = opts.check().map_err(super::ServeError::ModbusOptions)?;
    let std_listener = super::net::listen(opts.bind).map_err(|error| super::ServeError::ModbusBind { addr: opts.bind, error })?;
    std_listener.set_nonblocking(true)?;
    let addr = std_listener.local_addr()?;
    let (tx, rx) = tokio::sync::oneshot::channel::<()>();
    let slots = Arc::new(tokio::sync::Semaphore::new(opts.max_connections));
    let (max_age, idle) = (opts.max_frame_age_s, opts.idle_timeout);
    let thread = std::thread::spawn(move || {
        let Ok(rt) = tokio::runtime::Builder::new_current_thread().enable_all().build() else { return };
        rt.block_on(async move {
            let Ok(listener) = tokio::net::TcpListener::from_std(std_listener) else { return };
            let server = tokio_modbus::server::tcp::Server::new(listener);
            let on_connected = |stream: tokio::net::TcpStream, _peer: SocketAddr| {
                // At the cap the connection is closed at once (dropped).
                let conn = slots.clone().try_acquire_owned().ok().map(|permit| {
                    let _ = stream.set_nodelay(true);
                    (Registers { feed: feed.clone(), max_frame_age_s: max_age, _permit: permit }, super::net::IdleIo::new(stream, idle))
                });
                std::future::ready(Ok(conn))
            };
            let _ = server.serve_until(&on_connected, |_err| {}, async move { let _ = rx.await; }).await;
        });
        rt.shutdown_timeout(std::time::Duration::from_secs(1));
    });
    Ok((ModbusServer { addr, shutdown: Some(tx), thread: Some(thread) }, warnings))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fields_do_not_overlap_and_fit_their_areas() {
        for (fields, limit) in [(header_fields(), TARGET_BASE), (target_fields(), TARGET_STRIDE)] {
            let mut used = vec![false; limit as usize];
            for f in &fields {
                for w in f.offset..f.offset + f.kind.words() {
                    assert!(w < limit, "{} beyond its area", f.name);
                    assert!(!used[w as usize], "{} overlaps", f.name);
                    used[w as usize] = true;
                }
            }
        }
    }

    #[test]
    fn empty_feed_reads_invalid_and_refuses_writes_and_wild_reads() {
        let feed = Feed::new(vec!["plant".into(), "a".into()]);
        let now = Utc::now();
        let Ok(Response::ReadInputRegisters(w)) = answer(&feed, 120.0, &Request::ReadInputRegisters(0, 8), now) else { panic!() };
        assert_eq!(w[0], MAP_VERSION);
        assert_eq!(w[1], 0, "data-valid before the first nowcast");
        assert_eq!((w[3], w[4]), (u16::MAX, u16::MAX), "frame age unknown");
        let Ok(Response::ReadHoldingRegisters(p)) = answer(&feed, 120.0, &Request::ReadHoldingRegisters(TARGET_BASE + TARGET_STRIDE, 4), now) else { panic!() };
        assert_eq!(p, vec![1, 0, 0x8000, 0], "block 1's index, a spare register, then a missing power");
        assert_eq!(answer(&feed, 120.0, &Request::WriteSingleRegister(0, 1), now), Err(ExceptionCode::IllegalFunction));
        assert_eq!(answer(&feed, 120.0, &Request::WriteMultipleRegisters(0, vec![1, 2].into()), now), Err(ExceptionCode::IllegalFunction));
        assert_eq!(answer(&feed, 120.0, &Request::WriteSingleCoil(0, true), now), Err(ExceptionCode::IllegalFunction));
        assert_eq!(answer(&feed, 120.0, &Request::ReadInputRegisters(TARGET_BASE + 2 * TARGET_STRIDE - 1, 2), now), Err(ExceptionCode::IllegalDataAddress));
        assert_eq!(answer(&feed, 120.0, &Request::ReadInputRegisters(0, 126), now), Err(ExceptionCode::IllegalDataValue));
    }

    #[test]
    fn encoding_rounds_clamps_and_orders_words() {
        let mut w = [0u16; 2];
        Kind::I32.encode(-2.6, &mut w);
        assert_eq!(w, [0xFFFF, 0xFFFD]);
        Kind::U32.encode(70_000.0, &mut w);
        assert_eq!(w, [1, 4464]);
        Kind::I32.encode(-1e12, &mut w);
        assert_ne!(w, [0x8000, 0], "the missing value is never a clamped one");
        let mut one = [0u16; 1];
        Kind::I16.encode(-40_000.0, &mut one);
        assert_eq!(one[0] as i16, i16::MIN);
        assert!(!data_valid(None, 120.0));
        assert!(data_valid(Some(119.0), 120.0));
        assert!(!data_valid(Some(121.0), 120.0));
    }

    #[test]
    fn non_loopback_needs_an_explicit_allowance() {
        let mut o = ModbusOptions { bind: "0.0.0.0:5020".parse().unwrap(), ..Default::default() };
        assert!(o.check().unwrap_err().contains("--modbus-allow-non-loopback"));
        o.allow_non_loopback = true;
        assert_eq!(o.check().unwrap().len(), 1);
        assert!(ModbusOptions::default().check().unwrap().is_empty());
        assert!(ModbusOptions { max_connections: 0, ..Default::default() }.check().is_err());
    }
}
