//! A Modbus RTU instrument's register map (Modbus Application Protocol
//! V1.1b3, Modbus over Serial Line V1.02): the serial line's settings, the
//! register of each logical operation, integer scaling and word order, and
//! the exception codes. Pure data: the profile reads it from a file, the
//! bridge (`modbus`) and the simulated slave use it.

use model::location::{LocatedError, Location};
use serde::Deserialize;
use std::collections::BTreeMap;

/// How a 32-bit value is laid out over two registers.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum WordOrder {
    /// The high word at the lower address (the Modbus spec's big-endian
    /// register order).
    #[default]
    HighFirst,
    LowFirst,
}

/// One operation's register.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Register {
    /// 3 (read holding), 4 (read input), 6 (write single), 16 (write
    /// multiple).
    pub function: u8,
    /// The register address (0-based, as on the wire).
    pub register: u16,
    /// Physical value = integer / scale (e.g. 100 for centivolts).
    #[serde(default = "one")]
    pub scale: f64,
    /// 1 or 2 registers (16 or 32 bits).
    #[serde(default = "one_word")]
    pub words: u8,
    /// Two's complement.
    #[serde(default)]
    pub signed: bool,
    /// A fixed word to write (enable, disable, clear).
    pub value: Option<u16>,
}

fn one() -> f64 {
    1.0
}
fn one_word() -> u8 {
    1
}

/// The serial line's Modbus settings.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Line {
    /// The slave (unit) address, 1-247.
    pub slave: u8,
    /// One transaction's reply timeout, ms.
    #[serde(default = "default_timeout")]
    pub timeout_ms: u64,
    /// Transactions tried again after a timeout or a CRC error.
    #[serde(default = "default_retries")]
    pub retries: u32,
    #[serde(default)]
    pub word_order: WordOrder,
    /// Silence between frames, ms (Modbus over Serial Line: 3.5 characters,
    /// 1.75 ms fixed above 19200 baud).
    #[serde(default = "default_gap")]
    pub frame_gap_ms: u64,
}

fn default_timeout() -> u64 {
    200
}
fn default_retries() -> u32 {
    1
}
fn default_gap() -> u64 {
    2
}

/// A Modbus instrument's register map.
#[derive(Debug, Clone)]
pub struct Map {
    pub line: Line,
    /// Operation name → register.
    pub ops: BTreeMap<String, Register>,
}

/// The operations a Modbus profile can map, and whether each reads.
pub const OPERATIONS: &[(&str, bool)] = &[
    ("identify", true),
    ("set_voltage", false),
    ("get_voltage", true),
    ("set_current", false),
    ("get_current", true),
    ("set_power", false),
    ("get_power", true),
    ("set_resistance", false),
    ("get_resistance", true),
    ("set_mode", false),
    ("get_mode", true),
    ("enable", false),
    ("disable", false),
    ("enabled_query", true),
    ("measure_voltage", true),
    ("measure_current", true),
    ("measure_power", true),
    ("measure_temperature", true),
    ("set_over_voltage", false),
    ("get_over_voltage", true),
    ("set_over_current", false),
    ("get_over_current", true),
    ("set_under_voltage", false),
    ("get_under_voltage", true),
    ("set_voltage_on", false),
    ("get_voltage_on", true),
    ("clear", false),
    ("tripped_query", true),
];

/// Operations that write a fixed word.
const FIXED: &[&str] = &["enable", "disable", "clear"];

/// What is wrong with a Modbus profile's line, registers and trip bits,
/// located in its text.
pub fn check(
    line: &Line,
    registers: &BTreeMap<String, Register>,
    trip_bits: &BTreeMap<String, u8>,
    locate: &dyn Fn(&str) -> Location,
) -> Vec<LocatedError> {
    let mut errors = Vec::new();
    let mut bad = |at: &str, message: String| {
        errors.push(LocatedError {
            location: locate(at),
            message,
        })
    };
    if !(1..=247).contains(&line.slave) {
        bad(
            "slave",
            format!("modbus.slave = {}: a slave address is 1 to 247", line.slave),
        );
    }
    if line.timeout_ms == 0 || line.timeout_ms > 10_000 {
        bad(
            "timeout_ms",
            "modbus.timeout_ms must be between 1 and 10000".into(),
        );
    }
    if line.frame_gap_ms > 1000 {
        bad(
            "frame_gap_ms",
            "modbus.frame_gap_ms must be at most 1000".into(),
        );
    }
    if line.retries > 5 {
        bad("retries", "modbus.retries must be at most 5".into());
    }
    for (name, r) in registers {
        let Some((_, reads)) = OPERATIONS.iter().find(|(n, _)| n == name) else {
            let names: Vec<&str> = OPERATIONS.iter().map(|(n, _)| *n).collect();
            bad(
                &format!("{name} ="),
                format!(
                    "registers.{name}: not an operation (expected one of {})",
                    names.join(", ")
                ),
            );
            continue;
        };
        let at = format!("{name} =");
        let ok_fn = if *reads {
            matches!(r.function, 3 | 4)
        } else {
            matches!(r.function, 6 | 16)
        };
        if !ok_fn {
            bad(
                &at,
                format!(
                    "registers.{name}: function {} cannot {} (use {})",
                    r.function,
                    if *reads { "read" } else { "write" },
                    if *reads {
                        "3 or 4"
                    } else {
                        "6, or 16 for two words"
                    }
                ),
            );
        }
        if !matches!(r.words, 1 | 2) {
            bad(&at, format!("registers.{name}: words must be 1 or 2"));
        }
        if r.words == 2 && r.function == 6 {
            bad(
                &at,
                format!("registers.{name}: two words are written with function 16"),
            );
        }
        if !(r.scale.is_finite() && r.scale > 0.0) {
            bad(&at, format!("registers.{name}: scale must be above 0"));
        }
        if FIXED.contains(&name.as_str()) != r.value.is_some() {
            bad(
                &at,
                if r.value.is_some() {
                    format!("registers.{name}: only enable, disable and clear write a fixed value")
                } else {
                    format!("registers.{name}: needs the value it writes, e.g. value = 1")
                },
            );
        }
    }
    for (name, bit) in trip_bits {
        if *bit > 15 {
            bad(
                "trip_bits",
                format!("trip_bits.{name} = {bit}: a register bit is 0 to 15"),
            );
        }
    }
    if registers.contains_key("tripped_query") == trip_bits.is_empty() {
        bad(
            "name",
            "registers.tripped_query and [trip_bits] go together".into(),
        );
    }
    if !registers.contains_key("identify") {
        bad(
            "[registers]",
            "registers.identify is needed: a register read to check the slave answers".into(),
        );
    }
    errors
}

impl Map {
    /// The whole time the session waits for one operation: every try's
    /// timeout and gap, and a margin.
    pub fn session_timeout_ms(&self) -> u64 {
        (self.line.timeout_ms + self.line.frame_gap_ms) * u64::from(self.line.retries + 1) + 100
    }

    /// Integer words for a value, or why it does not fit.
    pub fn encode(&self, r: &Register, value: f64) -> Result<Vec<u16>, String> {
        let x = (value * r.scale).round();
        let (lo, hi) = match (r.words, r.signed) {
            (1, false) => (0.0, 65_535.0),
            (1, true) => (-32_768.0, 32_767.0),
            (_, false) => (0.0, 4_294_967_295.0),
            (_, true) => (-2_147_483_648.0, 2_147_483_647.0),
        };
        if !(lo..=hi).contains(&x) {
            return Err(format!(
                "{value} does not fit the register ({lo}..{hi} after scale {})",
                r.scale
            ));
        }
        let bits = x as i64 as u32;
        Ok(if r.words == 1 {
            vec![bits as u16]
        } else {
            let (high, low) = ((bits >> 16) as u16, bits as u16);
            match self.line.word_order {
                WordOrder::HighFirst => vec![high, low],
                WordOrder::LowFirst => vec![low, high],
            }
        })
    }

    /// The physical value of a register's words.
    pub fn decode(&self, r: &Register, words: &[u16]) -> f64 {
        let raw: i64 = match (words, r.signed) {
            ([w], false) => i64::from(*w),
            ([w], true) => i64::from(*w as i16),
            ([a, b, ..], signed) => {
                let (high, low) = match self.line.word_order {
                    WordOrder::HighFirst => (*a, *b),
                    WordOrder::LowFirst => (*b, *a),
                };
                let v = (u32::from(high) << 16) | u32::from(low);
                if signed {
                    i64::from(v as i32)
                } else {
                    i64::from(v)
                }
            }
            ([], _) => 0,
        };
        raw as f64 / r.scale
    }
}

/// What the Modbus exception codes mean (Modbus Application Protocol
/// V1.1b3, section 7).
pub fn exception_text(code: u8) -> &'static str {
    match code {
        1 => "illegal function",
        2 => "illegal data address",
        3 => "illegal data value",
        4 => "slave device failure",
        5 => "acknowledge",
        6 => "slave device busy",
        8 => "memory parity error",
        10 => "gateway path unavailable",
        11 => "gateway target device failed to respond",
        _ => "unknown exception",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn map(order: WordOrder) -> Map {
        Map {
            line: Line {
                slave: 1,
                timeout_ms: 200,
                retries: 1,
                word_order: order,
                frame_gap_ms: 2,
            },
            ops: BTreeMap::new(),
        }
    }

    fn reg(words: u8, signed: bool, scale: f64) -> Register {
        Register {
            function: 3,
            register: 0,
            scale,
            words,
            signed,
            value: None,
        }
    }

    /// Scaling and word order round-trip; values that do not fit are refused.
    #[test]
    fn values_scale_and_split_into_words() {
        let m = map(WordOrder::HighFirst);
        let r = reg(2, false, 1000.0);
        // 70.000 V in millivolts is 70000 = 0x0001_1170.
        assert_eq!(m.encode(&r, 70.0).unwrap(), vec![0x0001, 0x1170]);
        assert_eq!(m.decode(&r, &[0x0001, 0x1170]), 70.0);
        let lf = map(WordOrder::LowFirst);
        assert_eq!(lf.encode(&r, 70.0).unwrap(), vec![0x1170, 0x0001]);
        assert_eq!(lf.decode(&r, &[0x1170, 0x0001]), 70.0);
        // Signed: -1.5 A in mA is 0xFFFF_FA24 as two's complement.
        let s = reg(2, true, 1000.0);
        assert_eq!(m.encode(&s, -1.5).unwrap(), vec![0xFFFF, 0xFA24]);
        assert_eq!(m.decode(&s, &[0xFFFF, 0xFA24]), -1.5);
        let c = reg(1, false, 100.0);
        assert_eq!(m.encode(&c, 12.34).unwrap(), vec![1234]);
        assert!(m.encode(&c, 700.0).is_err(), "70000 cV is over 65535");
        assert!(m.encode(&c, -1.0).is_err());
        assert_eq!(m.decode(&reg(1, true, 10.0), &[0xFF9C]), -10.0);
    }
}
