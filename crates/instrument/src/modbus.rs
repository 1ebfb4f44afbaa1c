//! Instruments that speak Modbus RTU (Modbus Application Protocol V1.1b3,
//! Modbus over Serial Line V1.02) instead of SCPI: a profile kind that maps
//! each logical operation to a register, and a bridge that carries those
//! operations over the RTU link.
//!
//! The bridge sits below the session as a link: the session sends the
//! operation as one line of text (`set_current 1.5`, `measure_voltage?`),
//! the bridge makes the Modbus transaction (function 03/04 to read, 06/16
//! to write), scales the integer, and answers the query's value as a line.
//! So timeouts, resynchronisation, read-back, the safe state and the error
//! queue are the session's and the engine's, shared with SCPI instruments.
//! An exception reply goes to the bridge's error queue (read as the
//! profile's error query) and is an instrument error; a CRC error or a
//! timeout is tried again, up to the profile's retries.
//!
//! Framing and CRC-16 are tokio-modbus's RTU client (a well-kept crate);
//! the simulated slave in `sim` frames its replies itself, so the two
//! check each other.

use super::link::Link;
use model::location::{toml_error, InputErrors, LocatedError, Location};
use serde::Deserialize;
use std::collections::{BTreeMap, VecDeque};
use std::path::Path;
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};

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

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct RawModbusProfile {
    pub name: String,
    pub role: super::profile::ProfileRole,
    #[allow(dead_code)]
    pub kind: String,
    pub modbus: Line,
    pub registers: BTreeMap<String, Register>,
    /// Mode → the word written to `set_mode`.
    pub mode_words: Option<BTreeMap<String, u16>>,
    #[serde(default)]
    pub ranges: super::profile::RawRanges,
    #[serde(default)]
    pub trip_bits: BTreeMap<String, u8>,
}

/// Parse and check a Modbus profile's text; errors are located.
pub(crate) fn parse(file: &Path, text: &str) -> Result<(RawModbusProfile, Map), InputErrors> {
    let raw: RawModbusProfile =
        toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
    let locate = |needle: &str| {
        let off = text.find(needle).unwrap_or(0);
        Location::at(file, text, off)
    };
    let mut errors = Vec::new();
    let mut bad = |at: &str, message: String| {
        errors.push(LocatedError {
            location: locate(at),
            message,
        })
    };
    if !(1..=247).contains(&raw.modbus.slave) {
        bad(
            "slave",
            format!(
                "modbus.slave = {}: a slave address is 1 to 247",
                raw.modbus.slave
            ),
        );
    }
    if raw.modbus.timeout_ms == 0 || raw.modbus.timeout_ms > 10_000 {
        bad(
            "timeout_ms",
            "modbus.timeout_ms must be between 1 and 10000".into(),
        );
    }
    if raw.modbus.retries > 5 {
        bad("retries", "modbus.retries must be at most 5".into());
    }
    for (name, r) in &raw.registers {
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
    for (name, bit) in &raw.trip_bits {
        if *bit > 15 {
            bad(
                "trip_bits",
                format!("trip_bits.{name} = {bit}: a register bit is 0 to 15"),
            );
        }
    }
    if raw.registers.contains_key("tripped_query") == raw.trip_bits.is_empty() {
        bad(
            "name",
            "registers.tripped_query and [trip_bits] go together".into(),
        );
    }
    if !raw.registers.contains_key("identify") {
        bad(
            "[registers]",
            "registers.identify is needed: a register read to check the slave answers".into(),
        );
    }
    if !errors.is_empty() {
        return Err(InputErrors(errors));
    }
    let map = Map {
        line: raw.modbus.clone(),
        ops: raw.registers.clone(),
    };
    Ok((raw, map))
}

impl Map {
    /// The whole time the session waits for one operation: every try's
    /// timeout and gap, and a margin.
    pub fn session_timeout_ms(&self) -> u64 {
        (self.line.timeout_ms + self.line.frame_gap_ms) * u64::from(self.line.retries + 1) + 200
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

/// A link that carries a session's operations over Modbus RTU.
pub fn bridge(link: Link, map: Arc<Map>) -> Link {
    let (near, far) = tokio::io::duplex(4096);
    tokio::spawn(run_bridge(far, link, map));
    Box::new(near)
}

/// Why a transaction failed.
enum Failed {
    /// The slave answered with an exception.
    Exception(u8),
    /// No valid reply in any try (timeout, CRC error, garbage).
    NoReply(String),
    /// The serial link itself failed.
    Lost,
}

struct Bridge {
    ctx: tokio_modbus::client::Context,
    map: Arc<Map>,
    errors: VecDeque<(i32, String)>,
}

impl Bridge {
    async fn transact(
        &mut self,
        name: &str,
        r: &Register,
        write: Option<Vec<u16>>,
    ) -> Result<Vec<u16>, Failed> {
        use tokio_modbus::client::{Reader, Writer};
        let line = &self.map.line;
        let timeout = Duration::from_millis(line.timeout_ms);
        let gap = Duration::from_millis(line.frame_gap_ms);
        let mut last = String::new();
        for _ in 0..=line.retries {
            tokio::time::sleep(gap).await;
            let call = async {
                match (&write, r.function) {
                    (Some(w), 6) => self
                        .ctx
                        .write_single_register(r.register, w[0])
                        .await
                        .map(|x| x.map(|()| Vec::new())),
                    (Some(w), _) => self
                        .ctx
                        .write_multiple_registers(r.register, w)
                        .await
                        .map(|x| x.map(|()| Vec::new())),
                    (None, 3) => {
                        self.ctx
                            .read_holding_registers(r.register, u16::from(r.words))
                            .await
                    }
                    (None, _) => {
                        self.ctx
                            .read_input_registers(r.register, u16::from(r.words))
                            .await
                    }
                }
            };
            match tokio::time::timeout(timeout, call).await {
                Ok(Ok(Ok(words))) => {
                    if write.is_none() && words.len() != usize::from(r.words) {
                        last = format!("{} words for {name}, expected {}", words.len(), r.words);
                        continue;
                    }
                    return Ok(words);
                }
                Ok(Ok(Err(code))) => return Err(Failed::Exception(u8::from(code))),
                Ok(Err(tokio_modbus::Error::Transport(_))) => {
                    // The serial link failed (a hang-up, a pulled adapter),
                    // or the framing gave up on a flood of garbage: the
                    // session opens the link, and a fresh framing, again.
                    return Err(Failed::Lost);
                }
                Ok(Err(e)) => last = e.to_string(),
                Err(_) => last = format!("no valid reply within {} ms", line.timeout_ms),
            }
        }
        Err(Failed::NoReply(format!(
            "{name}: {last} (tried {} times)",
            line.retries + 1
        )))
    }

    fn push(&mut self, code: i32, text: String) {
        if self.errors.len() < 20 {
            self.errors.push_back((code, text));
        }
    }

    /// One line from the session; `Ok(Some(reply))` for a query.
    async fn line(&mut self, text: &str) -> Result<Option<String>, ()> {
        let text = text.trim();
        match text {
            "*OPC?" => {
                // Resynchronising: answer only if the slave does.
                let Some(r) = self.map.ops.get("identify").copied() else {
                    return Ok(Some("1".into()));
                };
                return match self.transact("identify", &r, None).await {
                    Ok(_) => Ok(Some("1".into())),
                    Err(Failed::Lost) => Err(()),
                    Err(_) => Ok(None),
                };
            }
            "*CLS" => {
                self.errors.clear();
                return Ok(None);
            }
            "error?" => {
                return Ok(Some(match self.errors.pop_front() {
                    Some((c, t)) => format!("{c},\"{}\"", t.replace('"', "'")),
                    None => "0,\"No error\"".into(),
                }))
            }
            _ => {}
        }
        let (op, value) = match text.split_once(' ') {
            Some((op, v)) => (op, Some(v.trim())),
            None => (text, None),
        };
        let query = op.ends_with('?');
        let name = op.trim_end_matches('?');
        let Some(r) = self.map.ops.get(name).copied() else {
            self.push(-113, format!("Undefined header; no register for '{name}'"));
            return Ok(query.then(|| "unsupported".to_string()));
        };
        let write = if query {
            None
        } else {
            let words = match (r.value, value) {
                (Some(fixed), _) => Ok(vec![fixed]),
                (None, Some(v)) => v
                    .parse::<f64>()
                    .map_err(|_| format!("'{v}' is not a number"))
                    .and_then(|x| self.map.encode(&r, x)),
                (None, None) => Err("no value given".into()),
            };
            match words {
                Ok(w) => Some(w),
                Err(m) => {
                    self.push(-222, format!("Data out of range; {name}: {m}"));
                    return Ok(None);
                }
            }
        };
        let slave = self.map.line.slave;
        match self.transact(name, &r, write).await {
            Ok(words) if query => Ok(Some(match name {
                "identify" => format!(
                    "packbench-modbus,slave {slave},0,{}",
                    words.first().copied().unwrap_or(0)
                ),
                "enabled_query" | "tripped_query" | "get_mode" => {
                    format!("{}", self.map.decode(&Register { scale: 1.0, ..r }, &words))
                }
                _ => format!("{}", self.map.decode(&r, &words)),
            })),
            Ok(_) => Ok(None),
            Err(Failed::Exception(code)) => {
                let t = format!(
                    "Modbus exception {code:#04x} ({}) from slave {slave}: {name} at register {:#06x}",
                    exception_text(code),
                    r.register
                );
                self.push(i32::from(code), t.clone());
                Ok(query.then(|| format!("exception {code:#04x}")))
            }
            Err(Failed::NoReply(m)) => {
                if !query {
                    self.push(
                        -300,
                        format!("Device-specific error; no reply from slave {slave}: {m}"),
                    );
                }
                Ok(query.then(|| "no-reply".to_string()))
            }
            Err(Failed::Lost) => Err(()),
        }
    }
}

/// Serve the session's lines until it goes away or the serial link fails
/// (then the session sees its link closed and opens it again).
async fn run_bridge(far: tokio::io::DuplexStream, link: Link, map: Arc<Map>) {
    let slave = tokio_modbus::Slave(map.line.slave);
    let ctx = tokio_modbus::client::rtu::attach_slave(link, slave);
    let mut b = Bridge {
        ctx,
        map,
        errors: VecDeque::new(),
    };
    let (read, mut write) = tokio::io::split(far);
    let mut lines = BufReader::new(read).lines();
    while let Ok(Some(line)) = lines.next_line().await {
        match b.line(&line).await {
            Ok(Some(reply)) => {
                if write
                    .write_all(format!("{reply}\n").as_bytes())
                    .await
                    .is_err()
                {
                    return;
                }
            }
            Ok(None) => {}
            Err(()) => return,
        }
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
