//! Instrument profiles: a TOML file per instrument kind that maps each
//! logical operation to a command template and declares ranges, terminator
//! and timeouts. Two generic SCPI-1999 profiles are built in.

use crate::location::{toml_error, InputErrors, LocatedError, Location};
use crate::units;
use serde::Deserialize;
use std::path::Path;

pub const GENERIC_SOURCE: &str = include_str!("../../profiles/generic-scpi-source.toml");
pub const GENERIC_LOAD: &str = include_str!("../../profiles/generic-scpi-load.toml");

/// Which role an instrument can play.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ProfileRole {
    Source,
    Load,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Transport {
    #[serde(default = "default_term")]
    pub write_termination: String,
    #[serde(default = "default_timeout")]
    pub timeout_ms: u64,
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
    pub enable: String,
    pub disable: String,
    pub enabled_query: Option<String>,
    pub measure_voltage_current: Option<String>,
    pub measure_voltage: String,
    pub measure_current: String,
    pub measure_power: Option<String>,
    pub measure_temperature: Option<String>,
    pub error_query: Option<String>,
}

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ModeWords {
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
    name: String,
    role: ProfileRole,
    transport: Transport,
    session: SessionSetup,
    commands: Commands,
    mode_words: Option<ModeWords>,
    #[serde(default)]
    ranges: RawRanges,
}

/// Declared ranges in SI units.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Ranges {
    pub voltage_max_v: Option<f64>,
    pub current_max_a: Option<f64>,
    pub power_max_w: Option<f64>,
    pub resistance_max_ohm: Option<f64>,
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
}

impl Profile {
    /// Parse and validate a profile; errors carry file:line:column.
    pub fn from_toml(file: &Path, text: &str) -> Result<Profile, InputErrors> {
        let raw: RawProfile =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        let mut errors = Vec::new();
        let locate = |needle: &str| {
            let off = text.find(needle).unwrap_or(0);
            Location::at(file, text, off)
        };
        let mut range =
            |v: &Option<String>, key: &str, f: fn(&str) -> Option<f64>| -> Option<f64> {
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
        let ranges = Ranges {
            voltage_max_v: range(&raw.ranges.voltage_max, "voltage_max", |s| {
                units::voltage(s).ok().and_then(|v| match v {
                    units::VoltageSpec::Pack(v) => Some(v),
                    units::VoltageSpec::PerCell(_) => None,
                })
            }),
            current_max_a: range(&raw.ranges.current_max, "current_max", |s| {
                units::current(s).ok().and_then(|c| match c {
                    units::CurrentSpec::Amps(a) => Some(a),
                    units::CurrentSpec::CRate(_) => None,
                })
            }),
            power_max_w: range(&raw.ranges.power_max, "power_max", |s| {
                units::power(s).ok().and_then(|p| match p {
                    units::PowerSpec::Pack(w) => Some(w),
                    units::PowerSpec::PerCell(_) => None,
                })
            }),
            resistance_max_ohm: range(&raw.ranges.resistance_max, "resistance_max", |s| {
                units::resistance_ohm(s).ok()
            }),
        };
        let c = &raw.commands;
        let mut need = |ok: bool, what: &str| {
            if !ok {
                errors.push(LocatedError {
                    location: locate("[commands]"),
                    message: format!("a {:?} profile needs commands.{what}", raw.role)
                        .to_lowercase(),
                });
            }
        };
        match raw.role {
            ProfileRole::Source => {
                need(c.set_voltage.is_some(), "set_voltage");
                need(c.set_current.is_some(), "set_current");
            }
            ProfileRole::Load => {
                need(c.set_current.is_some(), "set_current");
                need(c.set_mode.is_some(), "set_mode");
                need(
                    raw.mode_words.is_some(),
                    "mode_words (a [mode_words] table)",
                );
            }
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
        if raw.transport.timeout_ms == 0 || raw.transport.timeout_ms > 600_000 {
            errors.push(LocatedError {
                location: locate("timeout_ms"),
                message: "transport.timeout_ms must be between 1 and 600000".into(),
            });
        }
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
        })
    }

    /// The built-in generic SCPI profiles.
    pub fn builtin(role: ProfileRole) -> Profile {
        let (name, text) = match role {
            ProfileRole::Source => ("<built-in>/generic-scpi-source.toml", GENERIC_SOURCE),
            ProfileRole::Load => ("<built-in>/generic-scpi-load.toml", GENERIC_LOAD),
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
        let mut v = vec![c.identify.clone(), c.enable.clone(), c.disable.clone()];
        v.push(c.measure_voltage.clone());
        v.push(c.measure_current.clone());
        for t in [
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
        }
        v.extend(self.session.init.iter().cloned());
        v.extend(self.session.safe_state.iter().cloned());
        v.into_iter().map(|t| t.replace("{value}", "1.5")).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::instrument::command::parse_message;

    #[test]
    fn builtin_profiles_speak_only_the_scpi_tree() {
        for role in [ProfileRole::Source, ProfileRole::Load] {
            let p = Profile::builtin(role);
            for t in p.templates() {
                for u in parse_message(&t) {
                    assert!(u.is_ok(), "{}: '{t}' does not parse: {u:?}", p.name);
                }
            }
        }
    }

    #[test]
    fn profile_errors_are_located() {
        let bad = GENERIC_SOURCE.replace("timeout_ms = 2000", "timeout_ms = 2000\nbaud = 9600");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(
            e.to_string()
                .starts_with("p.toml:9:1: unknown field `baud`"),
            "{e}"
        );
        let bad = GENERIC_SOURCE.replace("VOLT {value}", "VOLT 1");
        let e = Profile::from_toml(Path::new("p.toml"), &bad).unwrap_err();
        assert!(e.to_string().contains("{value}"), "{e}");
    }
}
