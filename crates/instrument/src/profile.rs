//! Instrument profiles: a TOML file per instrument kind that maps each
//! logical operation to a command template and declares ranges, terminator
//! and timeouts. Two generic SCPI-1999 profiles are built in.

use crate::modbus_map;
use model::location::{toml_error, InputErrors, LocatedError, Location};
use model::units;
use serde::Deserialize;
use std::path::Path;

pub const GENERIC_SOURCE: &str = include_str!("../../../profiles/generic-scpi-source.toml");
pub const GENERIC_LOAD: &str = include_str!("../../../profiles/generic-scpi-load.toml");
pub const GENERIC_SOURCE_SINK: &str =
    include_str!("../../../profiles/generic-scpi-source-sink.toml");
pub const GENERIC_METER: &str = include_str!("../../../profiles/generic-scpi-meter.toml");
pub const GENERIC_SCANNER: &str = include_str!("../../../profiles/generic-scpi-scanner.toml");

/// The profile kind of a Modbus RTU instrument.
pub const MODBUS_RTU: &str = "modbus-rtu";

pub const GENERIC_MODBUS_SOURCE: &str =
    include_str!("../../../profiles/generic-modbus-source.toml");
pub const GENERIC_MODBUS_LOAD: &str = include_str!("../../../profiles/generic-modbus-load.toml");

/// The built-in profiles by name.
pub const BUILTIN: &[(&str, &str)] = &[
    ("generic-scpi-source", GENERIC_SOURCE),
    ("generic-scpi-load", GENERIC_LOAD),
    ("generic-scpi-source-sink", GENERIC_SOURCE_SINK),
    ("generic-scpi-meter", GENERIC_METER),
    ("generic-scpi-scanner", GENERIC_SCANNER),
    ("generic-modbus-source", GENERIC_MODBUS_SOURCE),
    ("generic-modbus-load", GENERIC_MODBUS_LOAD),
];

/// Which role an instrument can play.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ProfileRole {
    Source,
    Load,
    /// One bidirectional instrument that both charges and discharges.
    SourceSink,
    /// A voltmeter at the pack terminals, with a temperature input.
    Meter,
}

impl ProfileRole {
    pub fn name(self) -> &'static str {
        match self {
            ProfileRole::Source => "source",
            ProfileRole::Load => "load",
            ProfileRole::SourceSink => "source-sink",
            ProfileRole::Meter => "meter",
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Transport {
    #[serde(default = "default_term")]
    pub write_termination: String,
    /// The character that ends a reply: "\n" (LF) or "\r" (CR).
    #[serde(default = "default_term")]
    pub read_termination: String,
    #[serde(default = "default_timeout")]
    pub timeout_ms: u64,
    /// Least pause between the end of one exchange and the next message, ms.
    #[serde(default)]
    pub delay_ms: u64,
}

fn default_term() -> String {
    "\n".into()
}
fn default_timeout() -> u64 {
    2000
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SessionSetup {
    #[serde(default)]
    pub init: Vec<String>,
    #[serde(default)]
    pub safe_state: Vec<String>,
    #[serde(default)]
    pub check_errors_after_set: bool,
    #[serde(default)]
    pub read_back: bool,
    /// Wait this long after a setting before the next exchange, ms.
    #[serde(default)]
    pub settle_ms: u64,
    /// Read the error queue about once a second while a step runs.
    #[serde(default = "default_true")]
    pub poll_errors: bool,
}

fn default_true() -> bool {
    true
}

/// Command templates; `{value}` and `{mode}` are filled in.
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Commands {
    pub identify: String,
    pub reset: Option<String>,
    pub clear: Option<String>,
    pub set_voltage: Option<String>,
    pub get_voltage: Option<String>,
    pub set_current: Option<String>,
    pub get_current: Option<String>,
    pub set_power: Option<String>,
    pub get_power: Option<String>,
    pub set_resistance: Option<String>,
    pub get_resistance: Option<String>,
    pub set_mode: Option<String>,
    pub get_mode: Option<String>,
    pub enable: Option<String>,
    pub disable: Option<String>,
    pub enabled_query: Option<String>,
    pub measure_voltage_current: Option<String>,
    pub measure_voltage: String,
    pub measure_current: Option<String>,
    pub measure_power: Option<String>,
    pub measure_temperature: Option<String>,
    pub error_query: Option<String>,
    /// A scanning meter (a multiplexer card or a DAQ): `{channels}` is
    /// filled with a SCPI channel list such as `(@101:113,201)`.
    /// Set up once: the voltage channels, the temperature channels, the
    /// scan list.
    #[serde(default)]
    pub configure_voltage_channels: Option<String>,
    #[serde(default)]
    pub configure_temperature_channels: Option<String>,
    #[serde(default)]
    pub scan_list: Option<String>,
    /// Scan the list and return every reading, comma-separated.
    #[serde(default)]
    pub scan_read: Option<String>,
    /// Or one query per channel, when there is no scan list.
    #[serde(default)]
    pub measure_channel_voltage: Option<String>,
    #[serde(default)]
    pub measure_channel_temperature: Option<String>,
}

/// The instrument's own protection, programmed from the safety envelope
/// before the first step so it still acts when the controller is gone
/// (a crash, a kill, a pulled cable). Every entry is optional: a profile
/// without one gets a warning in the run's events. A set template holds
/// `{value}` and arms what it sets (e.g. `VOLT:PROT {value};PROT:STAT ON`).
#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Protection {
    /// Over-voltage protection level (a supply), V.
    pub set_over_voltage: Option<String>,
    pub get_over_voltage: Option<String>,
    /// Over-current protection level, A.
    pub set_over_current: Option<String>,
    pub get_over_current: Option<String>,
    /// Under-voltage switch-off (a load), V.
    pub set_under_voltage: Option<String>,
    pub get_under_voltage: Option<String>,
    /// Voltage-on threshold (a load sinks nothing below it), V.
    pub set_voltage_on: Option<String>,
    pub get_voltage_on: Option<String>,
    /// Re-arm latched protection once its cause is gone.
    pub clear: Option<String>,
    /// A query answering the latched protection state as a register,
    /// e.g. `STAT:QUES:COND?`.
    pub tripped_query: Option<String>,
    /// Which bits of that register mean a trip, by name: e.g.
    /// `voltage = 0`, `current = 1` (SCPI-1999 QUEStionable bits).
    #[serde(default)]
    pub trip_bits: std::collections::BTreeMap<String, u8>,
}

impl Protection {
    /// What is wrong with the table, located in the profile's text.
    fn errors(&self, locate: &dyn Fn(&str) -> Location) -> Vec<LocatedError> {
        let mut errors = Vec::new();
        for (key, t) in [
            ("set_over_voltage", &self.set_over_voltage),
            ("set_over_current", &self.set_over_current),
            ("set_under_voltage", &self.set_under_voltage),
            ("set_voltage_on", &self.set_voltage_on),
        ] {
            if t.as_ref().is_some_and(|t| !t.contains("{value}")) {
                errors.push(LocatedError {
                    location: locate(key),
                    message: format!("protection.{key} must contain {{value}}"),
                });
            }
        }
        for (name, bit) in &self.trip_bits {
            if *bit > 15 {
                errors.push(LocatedError {
                    location: locate("trip_bits"),
                    message: format!(
                        "protection.trip_bits.{name} = {bit}: a status register bit is 0 to 15"
                    ),
                });
            }
        }
        if self.tripped_query.is_some() == self.trip_bits.is_empty() {
            errors.push(LocatedError {
                location: locate("[protection]"),
                message: "protection.tripped_query and protection.trip_bits go together".into(),
            });
        }
        errors
    }

    /// The set and read-back templates of one protection.
    pub fn templates(&self, p: Guarded) -> (Option<&String>, Option<&String>) {
        match p {
            Guarded::OverVoltage => (
                self.set_over_voltage.as_ref(),
                self.get_over_voltage.as_ref(),
            ),
            Guarded::OverCurrent => (
                self.set_over_current.as_ref(),
                self.get_over_current.as_ref(),
            ),
            Guarded::UnderVoltage => (
                self.set_under_voltage.as_ref(),
                self.get_under_voltage.as_ref(),
            ),
            Guarded::VoltageOn => (self.set_voltage_on.as_ref(), self.get_voltage_on.as_ref()),
        }
    }
}

/// A protection packbench programs.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Guarded {
    OverVoltage,
    OverCurrent,
    UnderVoltage,
    VoltageOn,
}

impl Guarded {
    pub fn name(self) -> &'static str {
        match self {
            Guarded::OverVoltage => "over-voltage protection",
            Guarded::OverCurrent => "over-current protection",
            Guarded::UnderVoltage => "under-voltage switch-off",
            Guarded::VoltageOn => "voltage-on threshold",
        }
    }
    pub fn key(self) -> &'static str {
        match self {
            Guarded::OverVoltage => "over_voltage",
            Guarded::OverCurrent => "over_current",
            Guarded::UnderVoltage => "under_voltage",
            Guarded::VoltageOn => "voltage_on",
        }
    }
    pub fn unit(self) -> &'static str {
        match self {
            Guarded::OverCurrent => "A",
            _ => "V",
        }
    }
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModeWords {
    /// The source function of a source-sink instrument (CC-CV charging).
    pub voltage: Option<String>,
    pub current: String,
    pub power: String,
    pub resistance: String,
}

#[derive(Debug, Clone, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawRanges {
    voltage_max: Option<String>,
    current_max: Option<String>,
    power_max: Option<String>,
    resistance_max: Option<String>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawProfile {
    /// "scpi" (the default) or "modbus-rtu".
    #[serde(default)]
    kind: Option<String>,
    name: String,
    role: ProfileRole,
    transport: Transport,
    session: SessionSetup,
    commands: Commands,
    mode_words: Option<ModeWords>,
    #[serde(default)]
    ranges: RawRanges,
    #[serde(default)]
    protection: Protection,
    /// The maker's stated accuracy of each reading (see
    /// [`model::accuracy`]).
    #[serde(default)]
    accuracy: Option<model::accuracy::Declared>,
}

/// Declared ranges in SI units.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Ranges {
    pub voltage_max_v: Option<f64>,
    pub current_max_a: Option<f64>,
    pub power_max_w: Option<f64>,
    pub resistance_max_ohm: Option<f64>,
}

/// A Modbus RTU profile as written.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawModbusProfile {
    name: String,
    role: ProfileRole,
    #[allow(dead_code)]
    kind: String,
    modbus: modbus_map::Line,
    registers: std::collections::BTreeMap<String, modbus_map::Register>,
    /// Mode → the word written to `set_mode`.
    mode_words: Option<std::collections::BTreeMap<String, u16>>,
    #[serde(default)]
    ranges: RawRanges,
    #[serde(default)]
    trip_bits: std::collections::BTreeMap<String, u8>,
    #[serde(default)]
    accuracy: Option<model::accuracy::Declared>,
}

/// A profile's `[accuracy]`: figures a reader can check, located.
fn check_accuracy(
    a: Option<&model::accuracy::Declared>,
    locate: &dyn Fn(&str) -> Location,
    errors: &mut Vec<LocatedError>,
) {
    if let Some(Err(message)) = a.map(|a| a.check("accuracy")) {
        errors.push(LocatedError {
            location: locate("[accuracy"),
            message,
        });
    }
}

/// Declared ranges in SI units; bad ones are errors, located.
fn parse_ranges(
    raw: &RawRanges,
    locate: &dyn Fn(&str) -> Location,
    errors: &mut Vec<LocatedError>,
) -> Ranges {
    let mut range = |v: &Option<String>, key: &str, f: fn(&str) -> Option<f64>| -> Option<f64> {
        let s = v.as_ref()?;
        match f(s) {
            Some(x) if x > 0.0 => Some(x),
            _ => {
                errors.push(LocatedError {
                    location: locate(key),
                    message: format!(
                        "ranges.{key} = '{s}' is not a positive value of the right unit"
                    ),
                });
                None
            }
        }
    };
    Ranges {
        voltage_max_v: range(&raw.voltage_max, "voltage_max", |s| {
            units::voltage(s).ok().and_then(|v| match v {
                units::VoltageSpec::Pack(v) => Some(v),
                units::VoltageSpec::PerCell(_) => None,
            })
        }),
        current_max_a: range(&raw.current_max, "current_max", |s| {
            units::current(s).ok().and_then(|c| match c {
                units::CurrentSpec::Amps(a) => Some(a),
                units::CurrentSpec::CRate(_) => None,
            })
        }),
        power_max_w: range(&raw.power_max, "power_max", |s| {
            units::power(s).ok().and_then(|p| match p {
                units::PowerSpec::Pack(w) => Some(w),
                units::PowerSpec::PerCell(_) => None,
            })
        }),
        resistance_max_ohm: range(&raw.resistance_max, "resistance_max", |s| {
            units::resistance_ohm(s).ok()
        }),
    }
}

/// A validated profile.
#[derive(Debug, Clone)]
pub struct Profile {
    pub name: String,
    pub role: ProfileRole,
    pub transport: Transport,
    pub session: SessionSetup,
    pub commands: Commands,
    pub mode_words: Option<ModeWords>,
    pub ranges: Ranges,
    pub protection: Protection,
    /// The maker's stated accuracy of the instrument's readings (the
    /// shipped generic profiles carry example figures).
    pub accuracy: model::accuracy::Declared,
    /// A Modbus RTU instrument's register map: the commands above are then
    /// the operations the Modbus bridge carries.
    pub modbus: Option<std::sync::Arc<modbus_map::Map>>,
}

impl Profile {
    /// Parse and validate a profile; errors carry file:line:column.
    pub fn from_toml(file: &Path, text: &str) -> Result<Profile, InputErrors> {
        let kind = toml::from_str::<toml::Table>(text)
            .ok()
            .and_then(|t| t.get("kind").and_then(|k| k.as_str()).map(str::to_string));
        if kind.as_deref() == Some(MODBUS_RTU) {
            return Profile::from_modbus(file, text);
        }
        let raw: RawProfile =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        let mut errors = Vec::new();
        if let Some(k) = raw.kind.as_deref().filter(|k| *k != "scpi") {
            let off = text.find("kind").unwrap_or(0);
            errors.push(LocatedError {
                location: Location::at(file, text, off),
                message: format!("kind = \"{k}\": expected \"scpi\" or \"{MODBUS_RTU}\""),
            });
        }
        let locate = |needle: &str| {
            let off = text.find(needle).unwrap_or(0);
            Location::at(file, text, off)
        };
        let ranges = parse_ranges(&raw.ranges, &locate, &mut errors);
        check_accuracy(raw.accuracy.as_ref(), &locate, &mut errors);
        let c = &raw.commands;
        let role_name = raw.role.name();
        let mut need = |ok: bool, what: &str| {
            if !ok {
                let at = if what.starts_with('[') {
                    "name"
                } else {
                    "[commands]"
                };
                errors.push(LocatedError {
                    location: locate(at),
                    message: format!("a {role_name} profile needs the operation {what}"),
                });
            }
        };
        let drives = raw.role != ProfileRole::Meter;
        if drives {
            need(c.enable.is_some(), "commands.enable");
            need(c.disable.is_some(), "commands.disable");
            need(
                c.measure_current.is_some() || c.measure_voltage_current.is_some(),
                "commands.measure_current",
            );
        }
        if matches!(raw.role, ProfileRole::Source | ProfileRole::SourceSink) {
            need(c.set_voltage.is_some(), "commands.set_voltage");
            need(c.set_current.is_some(), "commands.set_current");
        }
        if matches!(raw.role, ProfileRole::Load | ProfileRole::SourceSink) {
            need(c.set_current.is_some(), "commands.set_current");
            need(c.set_mode.is_some(), "commands.set_mode");
            need(raw.mode_words.is_some(), "[mode_words]");
        }
        if raw.role == ProfileRole::SourceSink {
            need(
                raw.mode_words.as_ref().is_some_and(|w| w.voltage.is_some()),
                "[mode_words] voltage (the source function)",
            );
        }
        if !matches!(raw.transport.read_termination.as_str(), "\n" | "\r") {
            errors.push(LocatedError {
                location: locate("read_termination"),
                message: "transport.read_termination must be \"\\n\" or \"\\r\"".into(),
            });
        }
        if raw.transport.write_termination.is_empty() {
            errors.push(LocatedError {
                location: locate("write_termination"),
                message: "transport.write_termination must not be empty".into(),
            });
        }
        for (key, t) in [
            ("configure_voltage_channels", &c.configure_voltage_channels),
            (
                "configure_temperature_channels",
                &c.configure_temperature_channels,
            ),
            ("scan_list", &c.scan_list),
            ("measure_channel_voltage", &c.measure_channel_voltage),
            (
                "measure_channel_temperature",
                &c.measure_channel_temperature,
            ),
        ] {
            if t.as_ref().is_some_and(|t| !t.contains("{channels}")) {
                errors.push(LocatedError {
                    location: locate(key),
                    message: format!("commands.{key} must contain {{channels}}"),
                });
            }
        }
        if c.scan_read.is_some() != c.scan_list.is_some() {
            errors.push(LocatedError {
                location: locate("[commands]"),
                message: "commands.scan_read and commands.scan_list go together (set the list, then read it)".into(),
            });
        }
        for (key, t) in [
            ("set_voltage", &c.set_voltage),
            ("set_current", &c.set_current),
            ("set_power", &c.set_power),
            ("set_resistance", &c.set_resistance),
        ] {
            if let Some(t) = t {
                if !t.contains("{value}") {
                    errors.push(LocatedError {
                        location: locate(key),
                        message: format!("commands.{key} must contain {{value}}"),
                    });
                }
            }
        }
        for (key, v, max) in [
            ("delay_ms", raw.transport.delay_ms, 10_000),
            ("settle_ms", raw.session.settle_ms, 60_000),
        ] {
            if v > max {
                errors.push(LocatedError {
                    location: locate(key),
                    message: format!("{key} must be at most {max}"),
                });
            }
        }
        if raw.transport.timeout_ms == 0 || raw.transport.timeout_ms > 600_000 {
            errors.push(LocatedError {
                location: locate("timeout_ms"),
                message: "transport.timeout_ms must be between 1 and 600000".into(),
            });
        }
        errors.extend(raw.protection.errors(&locate));
        if !errors.is_empty() {
            return Err(InputErrors(errors));
        }
        Ok(Profile {
            name: raw.name,
            role: raw.role,
            transport: raw.transport,
            session: raw.session,
            commands: raw.commands,
            mode_words: raw.mode_words,
            ranges,
            protection: raw.protection,
            accuracy: raw.accuracy.unwrap_or_default(),
            modbus: None,
        })
    }

    /// A Modbus RTU profile: the register map, and commands that name the
    /// operations for the bridge.
    fn from_modbus(file: &Path, text: &str) -> Result<Profile, InputErrors> {
        let raw: RawModbusProfile =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        let locate = |needle: &str| {
            let off = text.find(needle).unwrap_or(0);
            Location::at(file, text, off)
        };
        let mut errors = modbus_map::check(&raw.modbus, &raw.registers, &raw.trip_bits, &locate);
        if !errors.is_empty() {
            return Err(InputErrors(errors));
        }
        let map = modbus_map::Map {
            line: raw.modbus.clone(),
            ops: raw.registers.clone(),
        };
        let ranges = parse_ranges(&raw.ranges, &locate, &mut errors);
        let has = |op: &str| map.ops.contains_key(op);
        let set = |op: &str| has(op).then(|| format!("{op} {{value}}"));
        let get = |op: &str| has(op).then(|| format!("{op}?"));
        let commands = Commands {
            identify: "identify?".into(),
            reset: None,
            clear: Some("*CLS".into()),
            set_voltage: set("set_voltage"),
            get_voltage: get("get_voltage"),
            set_current: set("set_current"),
            get_current: get("get_current"),
            set_power: set("set_power"),
            get_power: get("get_power"),
            set_resistance: set("set_resistance"),
            get_resistance: get("get_resistance"),
            set_mode: has("set_mode").then(|| "set_mode {mode}".to_string()),
            get_mode: get("get_mode"),
            enable: has("enable").then(|| "enable".to_string()),
            disable: has("disable").then(|| "disable".to_string()),
            enabled_query: get("enabled_query"),
            measure_voltage_current: None,
            measure_voltage: "measure_voltage?".into(),
            measure_current: get("measure_current"),
            measure_power: get("measure_power"),
            measure_temperature: get("measure_temperature"),
            error_query: Some("error?".into()),
            ..Commands::default()
        };
        let mode_words = raw.mode_words.as_ref().map(|w| {
            let word = |k: &str| w.get(k).map(|v| v.to_string()).unwrap_or_default();
            ModeWords {
                voltage: w.get("voltage").map(|v| v.to_string()),
                current: word("current"),
                power: word("power"),
                resistance: word("resistance"),
            }
        });
        let protection = Protection {
            set_over_voltage: set("set_over_voltage"),
            get_over_voltage: get("get_over_voltage"),
            set_over_current: set("set_over_current"),
            get_over_current: get("get_over_current"),
            set_under_voltage: set("set_under_voltage"),
            get_under_voltage: get("get_under_voltage"),
            set_voltage_on: set("set_voltage_on"),
            get_voltage_on: get("get_voltage_on"),
            clear: has("clear").then(|| "clear".to_string()),
            tripped_query: get("tripped_query"),
            trip_bits: raw.trip_bits.clone(),
        };
        let role_name = raw.role.name();
        let mut need = |ok: bool, what: &str| {
            if !ok {
                errors.push(LocatedError {
                    location: locate("[registers]"),
                    message: format!("a {role_name} profile needs the register registers.{what}"),
                });
            }
        };
        need(has("measure_voltage"), "measure_voltage");
        if raw.role != ProfileRole::Meter {
            for op in ["enable", "disable", "measure_current"] {
                need(has(op), op);
            }
        }
        if matches!(raw.role, ProfileRole::Source | ProfileRole::SourceSink) {
            need(has("set_voltage"), "set_voltage");
            need(has("set_current"), "set_current");
        }
        if matches!(raw.role, ProfileRole::Load | ProfileRole::SourceSink) {
            need(has("set_current"), "set_current");
            need(has("set_mode"), "set_mode");
            let words = raw.mode_words.as_ref();
            for m in ["current", "power", "resistance"] {
                if !words.is_some_and(|w| w.contains_key(m)) {
                    errors.push(LocatedError {
                        location: locate("name"),
                        message: format!("a {role_name} profile needs mode_words.{m}"),
                    });
                }
            }
        }
        if !errors.is_empty() {
            return Err(InputErrors(errors));
        }
        let read_back = ["get_voltage", "get_current"].iter().any(|o| has(o));
        Ok(Profile {
            name: raw.name,
            role: raw.role,
            transport: Transport {
                write_termination: "\n".into(),
                read_termination: "\n".into(),
                timeout_ms: map.session_timeout_ms(),
                delay_ms: 0,
            },
            session: SessionSetup {
                init: Vec::new(),
                safe_state: vec!["disable".into()],
                check_errors_after_set: true,
                read_back,
                settle_ms: 0,
                poll_errors: true,
            },
            commands,
            mode_words,
            ranges,
            protection,
            accuracy: raw.accuracy.clone().unwrap_or_default(),
            modbus: Some(std::sync::Arc::new(map)),
        })
    }

    /// Set the reply timeout from a bench file: for a Modbus instrument,
    /// one transaction's, with the session waiting for every try.
    pub fn set_timeout_ms(&mut self, ms: u64) {
        match self.modbus.as_mut() {
            Some(m) => {
                let m = std::sync::Arc::make_mut(m);
                m.line.timeout_ms = ms;
                self.transport.timeout_ms = m.session_timeout_ms();
            }
            None => self.transport.timeout_ms = ms,
        }
    }

    /// The framing of this profile's sessions.
    pub fn framing(&self) -> crate::scpi::Framing {
        crate::scpi::Framing {
            write_term: self.transport.write_termination.clone(),
            read_term: self
                .transport
                .read_termination
                .bytes()
                .last()
                .unwrap_or(b'\n'),
            timeout: std::time::Duration::from_millis(self.transport.timeout_ms),
            delay: std::time::Duration::from_millis(self.transport.delay_ms),
        }
    }

    /// A built-in profile by name, if there is one.
    pub fn builtin_named(name: &str) -> Option<Profile> {
        let text = BUILTIN.iter().find(|(n, _)| *n == name)?.1;
        let file = format!("<built-in>/{name}.toml");
        match Profile::from_toml(Path::new(&file), text) {
            Ok(p) => Some(p),
            Err(e) => panic!("built-in profile is invalid: {e}"),
        }
    }

    /// The built-in generic SCPI profile of a role.
    pub fn builtin(role: ProfileRole) -> Profile {
        let (name, text) = match role {
            ProfileRole::Source => ("<built-in>/generic-scpi-source.toml", GENERIC_SOURCE),
            ProfileRole::Load => ("<built-in>/generic-scpi-load.toml", GENERIC_LOAD),
            ProfileRole::SourceSink => (
                "<built-in>/generic-scpi-source-sink.toml",
                GENERIC_SOURCE_SINK,
            ),
            ProfileRole::Meter => ("<built-in>/generic-scpi-meter.toml", GENERIC_METER),
        };
        match Profile::from_toml(Path::new(name), text) {
            Ok(p) => p,
            // The built-in files are checked by a unit test; reaching this
            // is a build defect, not user input.
            Err(e) => panic!("built-in profile is invalid: {e}"),
        }
    }

    /// Every command template, for checking them against the SCPI tree.
    pub fn templates(&self) -> Vec<String> {
        let c = &self.commands;
        let mut v = vec![c.identify.clone(), c.measure_voltage.clone()];
        for t in [
            &c.enable,
            &c.disable,
            &c.measure_current,
            &c.reset,
            &c.clear,
            &c.set_voltage,
            &c.get_voltage,
            &c.set_current,
            &c.get_current,
            &c.set_power,
            &c.get_power,
            &c.set_resistance,
            &c.get_resistance,
            &c.get_mode,
            &c.enabled_query,
            &c.measure_voltage_current,
            &c.measure_power,
            &c.measure_temperature,
            &c.error_query,
            &c.configure_voltage_channels,
            &c.configure_temperature_channels,
            &c.scan_list,
            &c.scan_read,
            &c.measure_channel_voltage,
            &c.measure_channel_temperature,
            &self.protection.set_over_voltage,
            &self.protection.get_over_voltage,
            &self.protection.set_over_current,
            &self.protection.get_over_current,
            &self.protection.set_under_voltage,
            &self.protection.get_under_voltage,
            &self.protection.set_voltage_on,
            &self.protection.get_voltage_on,
            &self.protection.clear,
            &self.protection.tripped_query,
        ]
        .into_iter()
        .flatten()
        {
            v.push(t.clone());
        }
        if let (Some(m), Some(words)) = (&c.set_mode, &self.mode_words) {
            for w in [&words.current, &words.power, &words.resistance] {
                v.push(m.replace("{mode}", w));
            }
            if let Some(w) = &words.voltage {
                v.push(m.replace("{mode}", w));
            }
        }
        v.extend(self.session.init.iter().cloned());
        v.extend(self.session.safe_state.iter().cloned());
        v.into_iter().map(|t| t.replace("{value}", "1.5")).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::command::parse_message;

    #[test]
    fn builtin_profiles_speak_only_the_scpi_tree() {
        for role in [
            ProfileRole::Source,
            ProfileRole::Load,
            ProfileRole::SourceSink,
            ProfileRole::Meter,
        ] {
            let p = Profile::builtin(role);
            assert_eq!(p.role, role);
            for t in p.templates() {
                for u in parse_message(&t) {
                    assert!(u.is_ok(), "{}: '{t}' does not parse: {u:?}", p.name);
                }
            }
        }
        // The scanner's templates, with a channel list filled in.
        let p =
            Profile::from_toml(Path::new("generic-scpi-scanner.toml"), GENERIC_SCANNER).unwrap();
        assert_eq!(p.role, ProfileRole::Meter);
        let t = p.templates();
        assert!(t.len() >= 6, "{t:?}");
        for t in t {
            let t = t.replace("{channels}", "(@101:113,201)");
            for u in parse_message(&t) {
                assert!(u.is_ok(), "{}: '{t}' does not parse: {u:?}", p.name);
            }
        }
    }

    #[test]
    fn profile_errors_are_located() {
        let bad = GENERIC_SOURCE.replace("timeout_ms = 2000", "timeout_ms = 2000\nbaud = 9600");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(
            e.to_string()
                .starts_with("p.toml:10:1: unknown field `baud`"),
            "{e}"
        );
        let bad = GENERIC_SOURCE.replace("VOLT {value}", "VOLT 1");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(e.to_string().contains("{value}"), "{e}");
        // An unknown operation.
        let bad = GENERIC_LOAD.replace("get_mode = ", "read_mode = ");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(
            e.to_string()
                .starts_with("p.toml:25:1: unknown field `read_mode`"),
            "{e}"
        );
        // A missing required operation, located at the [commands] table.
        let bad = GENERIC_LOAD.replace("set_mode = \"FUNC {mode}\"\n", "");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(
            e.to_string()
                .starts_with("p.toml:20:1: a load profile needs the operation commands.set_mode"),
            "{e}"
        );
        let bad = GENERIC_SOURCE_SINK.replace("voltage = \"VOLT\"\n", "");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(e.to_string().contains("the source function"), "{e}");
        // The protection table: templates, bits, and the query with its bits.
        let bad = GENERIC_SOURCE.replace("VOLT:PROT {value};", "VOLT:PROT 17;");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(
            e.to_string()
                .contains("protection.set_over_voltage must contain {value}"),
            "{e}"
        );
        let bad = GENERIC_LOAD.replace("power = 3", "power = 16");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(e.to_string().contains("0 to 15"), "{e}");
        let bad = GENERIC_LOAD.replace("tripped_query = \"STAT:QUES:COND?\"\n", "");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(e.to_string().contains("go together"), "{e}");
    }

    /// The shipped Modbus profiles parse into operations for the bridge;
    /// their mistakes are located and say what was expected.
    #[test]
    fn modbus_profiles_map_operations_to_registers() {
        let p = Profile::builtin_named("generic-modbus-load").unwrap();
        let map = p.modbus.as_ref().unwrap();
        assert_eq!(map.line.slave, 2);
        assert_eq!(map.ops["set_resistance"].words, 2);
        assert_eq!(
            p.commands.set_current.as_deref(),
            Some("set_current {value}")
        );
        assert_eq!(p.session.safe_state, vec!["disable".to_string()]);
        assert_eq!(p.mode_words.as_ref().unwrap().power, "2");
        assert!(p.protection.set_under_voltage.is_some());
        assert_eq!(p.transport.timeout_ms, map.session_timeout_ms());
        let mut q = p.clone();
        q.set_timeout_ms(300);
        assert_eq!(q.modbus.as_ref().unwrap().line.timeout_ms, 300);
        assert_eq!(q.transport.timeout_ms, (300 + 2) + 100);
        let src = Profile::builtin_named("generic-modbus-source").unwrap();
        assert_eq!(src.role, ProfileRole::Source);
        let at = |bad: &str| {
            Profile::from_toml(Path::new("m.toml"), bad)
                .unwrap_err()
                .to_string()
        };
        let e = at(&GENERIC_MODBUS_LOAD.replace(
            "set_current = { function = 6,",
            "set_current = { function = 4,",
        ));
        assert!(
            e.starts_with("m.toml:19:1: registers.set_current: function 4 cannot write"),
            "{e}"
        );
        let e =
            at(&GENERIC_MODBUS_LOAD
                .replace("register = 0x0005, value = 1 }", "register = 0x0005 }"));
        assert!(
            e.contains("registers.enable: needs the value it writes"),
            "{e}"
        );
        let e = at(&GENERIC_MODBUS_LOAD.replace("get_mode =", "read_mode ="));
        assert!(e.contains("registers.read_mode: not an operation"), "{e}");
        let e = at(&GENERIC_MODBUS_LOAD.replace("frame_gap_ms = 2", "frame_gap_ms = 100000"));
        assert!(e.contains("frame_gap_ms must be at most 1000"), "{e}");
        let e = at(&GENERIC_MODBUS_LOAD.replace("slave = 2", "slave = 0"));
        assert!(e.contains("1 to 247"), "{e}");
        let e = at(&GENERIC_MODBUS_LOAD
            .replace("words = 2 }\nget_resistance", "words = 3 }\nget_resistance"));
        assert!(e.contains("words must be 1 or 2"), "{e}");
        let e =
            at(&GENERIC_SOURCE.replace("role = \"source\"", "role = \"source\"\nkind = \"can\""));
        assert!(e.contains("expected \"scpi\" or \"modbus-rtu\""), "{e}");
    }
}
