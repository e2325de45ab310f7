//! `[measurements_modbus]`: pyranometers or a plant meter polled over Modbus TCP as live mode's
//! measurement feed. The section is read and validated in every build, so a site file means the
//! same everywhere; the poller itself is part of live mode (`serve::modbus_feed`, feature
//! `server`).

use serde::{Deserialize, Serialize};

use crate::settings::{Check, ConfigError};

/// Most registers in the section.
pub const MAX_MODBUS_REGISTERS: usize = 64;

/// `[measurements_modbus]`: the device and its register list.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModbusFeedSection {
    /// The device (or gateway) as `host:port`, e.g. `"192.168.1.20:502"`.
    pub address: String,
    /// Modbus unit (slave) id sent with every request.
    #[serde(default = "default_unit_id")]
    pub unit_id: u8,
    /// Time between two reads of the register list \[s\].
    #[serde(default = "default_poll_s")]
    pub poll_s: f64,
    /// Averaging period of one measurement row \[s\], whole seconds; periods start at multiples
    /// of it since midnight UTC and each row is stamped at its period's start.
    #[serde(default = "default_averaging_s")]
    pub averaging_s: f64,
    /// Connect and per-request timeout \[s\].
    #[serde(default = "default_timeout_s")]
    pub timeout_s: f64,
    /// What to read, one entry per measurement column.
    pub registers: Vec<RegisterSpec>,
}

fn default_unit_id() -> u8 {
    1
}
fn default_poll_s() -> f64 {
    5.0
}
fn default_averaging_s() -> f64 {
    60.0
}
fn default_timeout_s() -> f64 {
    2.0
}
fn default_scale() -> f64 {
    1.0
}

/// `[[measurements_modbus.registers]]`: one measurement column and where it is read.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RegisterSpec {
    /// The measurement column it fills: `ghi_<name>_wm2` of a `[[pyranometers]]` entry, or a
    /// plant meter's AC power, `power_plant_kw` or `power_<block>_kw` ([`crate::meter`]).
    pub column: String,
    /// Register address as sent on the wire, 0-based (register 30001 of a device manual's
    /// 1-based input-register numbering is address 0).
    pub address: u16,
    /// `"input"` (function 4, the default) or `"holding"` (function 3).
    #[serde(default)]
    pub kind: RegisterKind,
    /// `"u16"` (default), `"i16"`, `"u32"`, `"i32"` or `"f32"` (IEEE 754); 32-bit formats span two
    /// registers.
    #[serde(default)]
    pub format: RegisterFormat,
    /// For 32-bit formats: `"big"` (default: the first register holds the high word) or
    /// `"little"` (the first register holds the low word). Bytes within a register are always
    /// big-endian, as Modbus sends them.
    #[serde(default)]
    pub word_order: WordOrder,
    /// The value is `raw × scale + offset` in `unit`.
    #[serde(default = "default_scale")]
    pub scale: f64,
    /// See `scale` (in `unit`).
    #[serde(default)]
    pub offset: f64,
    /// The unit of `raw × scale + offset`: `"W/m2"` for irradiance (the default and only choice);
    /// `"W"`, `"kW"` (the default) or `"MW"` for power. The value is converted to the column's unit.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
}

/// What a register's column measures.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Quantity {
    /// Global horizontal irradiance \[W/m²\].
    Ghi,
    /// AC power \[kW\].
    Power,
}

impl Quantity {
    /// The quantity of a column name (`ghi_…_wm2` or `power_…_kw`).
    pub fn of(column: &str) -> Option<Quantity> {
        if column.starts_with("ghi_") && column.ends_with("_wm2") {
            Some(Quantity::Ghi)
        } else if column.starts_with("power_") && column.ends_with("_kw") {
            Some(Quantity::Power)
        } else {
            None
        }
    }

    /// The units a register may give for this quantity, each with its factor to the column's
    /// unit; the first is the default.
    pub fn units(self) -> &'static [(&'static str, f64)] {
        match self {
            Quantity::Ghi => &[("W/m2", 1.0)],
            Quantity::Power => &[("kW", 1.0), ("W", 0.001), ("MW", 1000.0)],
        }
    }
}

/// Which register table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum RegisterKind {
    /// Input registers (function 4).
    #[default]
    Input,
    /// Holding registers (function 3).
    Holding,
}

/// How the register words encode the raw value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum RegisterFormat {
    /// Unsigned 16 bit.
    #[default]
    U16,
    /// Signed 16 bit (two's complement).
    I16,
    /// Unsigned 32 bit, two registers.
    U32,
    /// Signed 32 bit, two registers.
    I32,
    /// IEEE 754 single precision, two registers.
    F32,
}

/// Order of the two words of a 32-bit value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum WordOrder {
    /// High word first.
    #[default]
    Big,
    /// Low word first.
    Little,
}

impl RegisterFormat {
    /// Registers one value spans.
    pub fn words(self) -> u16 {
        match self {
            RegisterFormat::U16 | RegisterFormat::I16 => 1,
            _ => 2,
        }
    }
}

impl RegisterSpec {
    /// The factor from the register's unit to its column's (1 when either is unknown: the section
    /// is validated before use).
    pub fn unit_factor(&self) -> f64 {
        let Some(q) = Quantity::of(&self.column) else { return 1.0 };
        match &self.unit {
            None => 1.0,
            Some(u) => q.units().iter().find(|(name, _)| unit_matches(name, u)).map_or(1.0, |x| x.1),
        }
    }

    /// The value in the column's unit (W/m² or kW) from the register words read at
    /// [`RegisterSpec::address`] (as many as the format spans); NaN when too few words are given
    /// or a float is not finite.
    pub fn decode(&self, words: &[u16]) -> f64 {
        let n = usize::from(self.format.words());
        if words.len() < n {
            return f64::NAN;
        }
        let pair = || {
            let (hi, lo) = match self.word_order {
                WordOrder::Big => (words[0], words[1]),
                WordOrder::Little => (words[1], words[0]),
            };
            (u32::from(hi) << 16) | u32::from(lo)
        };
        let raw = match self.format {
            RegisterFormat::U16 => f64::from(words[0]),
            RegisterFormat::I16 => f64::from(words[0] as i16),
            RegisterFormat::U32 => f64::from(pair()),
            RegisterFormat::I32 => f64::from(pair() as i32),
            RegisterFormat::F32 => f64::from(f32::from_bits(pair())),
        };
        let v = (raw * self.scale + self.offset) * self.unit_factor();
        if v.is_finite() { v } else { f64::NAN }
    }
}

/// Whether a unit as written in the site file names `name` (`W/m²` for `W/m2`; case matters
/// only between `MW` and `mW`, which is not offered).
fn unit_matches(name: &str, written: &str) -> bool {
    let w = written.trim().replace('²', "2");
    w == name || (name != "MW" && w.eq_ignore_ascii_case(name)) || (name == "MW" && w == "MW")
}

/// Whether `address` has the form `host:port` with a port from 1 to 65535 (not resolved here).
fn host_port_ok(address: &str) -> bool {
    let Some((host, port)) = address.rsplit_once(':') else { return false };
    let host = host.strip_prefix('[').and_then(|h| h.strip_suffix(']')).unwrap_or(host);
    !host.is_empty() && !host.contains(char::is_whitespace) && port.parse::<u16>().is_ok_and(|p| p > 0)
}

impl ModbusFeedSection {
    /// Check every field; `pyranometers` are the names of the site's `[[pyranometers]]`, `meters`
    /// the plant meter columns the site can have ([`crate::meter::capacities_kw`]).
    pub(crate) fn validate(&self, c: &Check<'_>, pyranometers: &[String], meters: &[String]) -> Result<(), ConfigError> {
        const S: &str = "measurements_modbus";
        if !host_port_ok(&self.address) {
            return Err(c.invalid(&format!("{S}.address"), "host:port, e.g. \"192.168.1.20:502\"", format!("{:?}", self.address)));
        }
        c.range(&format!("{S}.averaging_s"), self.averaging_s, 1.0, 3600.0)?;
        if self.averaging_s.fract() != 0.0 {
            return Err(c.invalid(&format!("{S}.averaging_s"), "whole seconds", self.averaging_s.to_string()));
        }
        c.range(&format!("{S}.poll_s"), self.poll_s, 0.05, self.averaging_s)?;
        c.range(&format!("{S}.timeout_s"), self.timeout_s, 0.05, 60.0)?;
        if self.registers.is_empty() || self.registers.len() > MAX_MODBUS_REGISTERS {
            return Err(c.invalid(&format!("{S}.registers"), format!("1 to {MAX_MODBUS_REGISTERS} registers"), self.registers.len().to_string()));
        }
        let columns: Vec<String> = pyranometers.iter().map(|p| format!("ghi_{p}_wm2")).chain(meters.iter().cloned()).collect();
        for (i, r) in self.registers.iter().enumerate() {
            let f = |name: &str| format!("{S}.registers[{i}].{name}");
            if !columns.contains(&r.column) {
                let pyr = if pyranometers.is_empty() { "ghi_<name>_wm2 of a [[pyranometers]] entry (the site names none)".to_string() } else { format!("one of {}", columns[..pyranometers.len()].join(", ")) };
                return Err(c.invalid(&f("column"), format!("{pyr}; or a plant meter: {}", meters.join(", ")), format!("{:?}", r.column)));
            }
            if self.registers[..i].iter().any(|o| o.column == r.column) {
                return Err(c.invalid(&f("column"), "a column not filled by an earlier register", format!("{:?}", r.column)));
            }
            if let (Some(u), Some(q)) = (&r.unit, Quantity::of(&r.column))
                && !q.units().iter().any(|(name, _)| unit_matches(name, u))
            {
                let names: Vec<String> = q.units().iter().map(|x| format!("{:?}", x.0)).collect();
                return Err(c.invalid(&f("unit"), format!("for {} one of {}", r.column, names.join(", ")), format!("{u:?}")));
            }
            if u32::from(r.address) + u32::from(r.format.words()) > 65_536 {
                return Err(c.invalid(&f("address"), "a 0-based address whose value ends by register 65535", r.address.to_string()));
            }
            c.range(&f("scale"), r.scale, -1e6, 1e6)?;
            if r.scale == 0.0 {
                return Err(c.invalid(&f("scale"), "a non-zero number", "0"));
            }
            c.range(&f("offset"), r.offset, -1e6, 1e6)?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(format: RegisterFormat, word_order: WordOrder, scale: f64, offset: f64) -> RegisterSpec {
        RegisterSpec { column: "ghi_a_wm2".into(), address: 0, kind: RegisterKind::Input, format, word_order, scale, offset, unit: None }
    }

    #[test]
    fn decodes_formats_word_orders_scale_and_offset() {
        use RegisterFormat::*;
        use WordOrder::*;
        // 0x0384 = 900.
        assert_eq!(spec(U16, Big, 1.0, 0.0).decode(&[0x0384]), 900.0);
        // 0xFFF6 as i16 = -10; × 0.5 + 3 = -2.
        assert_eq!(spec(I16, Big, 0.5, 3.0).decode(&[0xFFF6]), -2.0);
        assert_eq!(spec(U16, Big, 0.5, 3.0).decode(&[0xFFF6]), 65526.0 * 0.5 + 3.0);
        // 0x0001_86A0 = 100000; × 0.01 = 1000.
        assert_eq!(spec(U32, Big, 0.01, 0.0).decode(&[0x0001, 0x86A0]), 1000.0);
        assert_eq!(spec(U32, Little, 0.01, 0.0).decode(&[0x86A0, 0x0001]), 1000.0);
        // 0xFFFF_FF9C as i32 = -100.
        assert_eq!(spec(I32, Big, 1.0, 0.0).decode(&[0xFFFF, 0xFF9C]), -100.0);
        assert_eq!(spec(I32, Little, 1.0, 0.0).decode(&[0xFF9C, 0xFFFF]), -100.0);
        // 812.5 = 0x444B_2000 (sign 0, exponent 136, mantissa 0x4B2000).
        assert_eq!(spec(F32, Big, 1.0, 0.0).decode(&[0x444B, 0x2000]), 812.5);
        assert_eq!(spec(F32, Little, 2.0, -25.0).decode(&[0x2000, 0x444B]), 1600.0);
        // A NaN float, too few words.
        assert!(spec(F32, Big, 1.0, 0.0).decode(&[0x7FC0, 0x0000]).is_nan());
        assert!(spec(U32, Big, 1.0, 0.0).decode(&[0x0001]).is_nan());
    }

    #[test]
    fn power_registers_convert_their_unit_to_kw() {
        let mut r = spec(RegisterFormat::U16, WordOrder::Big, 1.0, 0.0);
        r.column = "power_plant_kw".into();
        assert_eq!(r.decode(&[1234]), 1234.0, "kW by default");
        r.unit = Some("W".into());
        r.scale = 100.0;
        assert_eq!(r.decode(&[1234]), 123.4, "hundreds of W");
        r.unit = Some("MW".into());
        r.scale = 0.01;
        assert!((r.decode(&[1234]) - 12_340.0).abs() < 1e-9, "hundredths of MW");
        assert_eq!(Quantity::of("ghi_a_wm2"), Some(Quantity::Ghi));
        assert_eq!(Quantity::of("power_east_kw"), Some(Quantity::Power));
        assert_eq!(Quantity::of("temp_air_c"), None);
        assert!(unit_matches("W/m2", "W/m²") && unit_matches("kW", "kw") && !unit_matches("MW", "mw"));
    }

    #[test]
    fn host_port_forms() {
        for ok in ["127.0.0.1:502", "meter.local:1502", "[::1]:502"] {
            assert!(host_port_ok(ok), "{ok}");
        }
        for bad in ["127.0.0.1", ":502", "host:0", "host:70000", "a b:502", ""] {
            assert!(!host_port_ok(bad), "{bad}");
        }
    }
}
