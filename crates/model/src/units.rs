//! Quantities as people write them on a bench: `4.2V`, `4.2V/cell`, `0.5C`,
//! `500mA`, `1h30m`, `2800mAh`, `50degC`, `25W`, `2ohm`, `80%`, `1mV/min`.
//!
//! Parsing is split in two: [`parse`] turns text into a [`Quantity`] of some
//! kind, and the typed helpers ([`Quantity::voltage`], …) check the kind a
//! field expects. Values that depend on the pack (per cell, C-rate, percent
//! of rated capacity) stay symbolic here and are resolved by the procedure
//! planner against a pack spec. No I/O.

use serde::{Deserialize, Serialize};
use std::fmt;

/// What went wrong with a quantity. The message says what was expected.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum UnitError {
    #[error("empty value; expected a number with a unit, e.g. {expected}")]
    Empty { expected: &'static str },
    #[error("'{text}' does not start with a number; expected e.g. {expected}")]
    NoNumber {
        text: String,
        expected: &'static str,
    },
    #[error("unknown unit '{unit}' in '{text}'; known units: {known}")]
    UnknownUnit {
        text: String,
        unit: String,
        known: &'static str,
    },
    #[error("'{text}' is {found}, but {expected} was expected")]
    WrongKind {
        text: String,
        found: &'static str,
        expected: &'static str,
    },
    #[error("'{text}' is not a finite number")]
    NotFinite { text: String },
    #[error("'{text}' is negative: {what} must be zero or more")]
    Negative { text: String, what: &'static str },
    #[error("'{text}' is beyond any plausible {what} ({range})")]
    Implausible {
        text: String,
        what: &'static str,
        range: &'static str,
    },
}

/// The temperatures any cell maker's operating range falls within
/// (common practice: datasheets span about −40 °C to 60–75 °C; nothing
/// is charged or discharged above 80 °C). A limit outside it is a typing
/// error that would switch the limit off.
pub const TEMPERATURE_PLAUSIBLE_C: (f64, f64) = (-40.0, 80.0);

/// A temperature limit of an envelope or a sensor: within
/// [`TEMPERATURE_PLAUSIBLE_C`].
pub fn temperature_limit_c(text: &str) -> Result<f64, UnitError> {
    let c = temperature_c(text)?;
    let (lo, hi) = TEMPERATURE_PLAUSIBLE_C;
    if !(lo..=hi).contains(&c) {
        return Err(UnitError::Implausible {
            text: text.trim().to_string(),
            what: "temperature limit",
            range: "-40 to 80 degC",
        });
    }
    Ok(c)
}

const KNOWN: &str = "V mV kV V/cell mV/cell A mA C s ms min h (and 1h30m) Ah mAh Wh kWh mWh \
W mW kW W/cell degC ohm mohm kohm % V/s mV/s mV/min mV/h mV/min/cell K/h K/min degC/h";

/// A parsed quantity. Pack-relative kinds keep their symbolic form.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", content = "value", rename_all = "snake_case")]
pub enum Quantity {
    /// Volts for the whole pack.
    Volts(f64),
    /// Volts per series cell.
    VoltsPerCell(f64),
    /// Amperes.
    Amps(f64),
    /// Multiple of the rated capacity per hour (C-rate).
    CRate(f64),
    /// Seconds.
    Seconds(f64),
    /// Ampere-hours.
    AmpHours(f64),
    /// Watt-hours.
    WattHours(f64),
    /// Watts for the whole pack.
    Watts(f64),
    /// Watts per series cell.
    WattsPerCell(f64),
    /// Degrees Celsius.
    Celsius(f64),
    /// Ohms.
    Ohms(f64),
    /// Percent (of rated capacity where a charge is meant).
    Percent(f64),
    /// Volts per second for the whole pack.
    VoltsPerSecond(f64),
    /// Volts per second per series cell.
    VoltsPerSecondPerCell(f64),
    /// Kelvin (a temperature difference) per second.
    KelvinPerSecond(f64),
}

impl Quantity {
    /// A short description of the kind, for error messages.
    pub fn kind_name(&self) -> &'static str {
        match self {
            Quantity::Volts(_) | Quantity::VoltsPerCell(_) => "a voltage",
            Quantity::Amps(_) | Quantity::CRate(_) => "a current",
            Quantity::Seconds(_) => "a duration",
            Quantity::AmpHours(_) => "a charge",
            Quantity::WattHours(_) => "an energy",
            Quantity::Watts(_) | Quantity::WattsPerCell(_) => "a power",
            Quantity::Celsius(_) => "a temperature",
            Quantity::Ohms(_) => "a resistance",
            Quantity::Percent(_) => "a percentage",
            Quantity::VoltsPerSecond(_) | Quantity::VoltsPerSecondPerCell(_) => "a voltage rate",
            Quantity::KelvinPerSecond(_) => "a temperature rate",
        }
    }

    /// The bare number, whatever the kind.
    pub fn number(&self) -> f64 {
        match *self {
            Quantity::Volts(x)
            | Quantity::VoltsPerCell(x)
            | Quantity::Amps(x)
            | Quantity::CRate(x)
            | Quantity::Seconds(x)
            | Quantity::AmpHours(x)
            | Quantity::WattHours(x)
            | Quantity::Watts(x)
            | Quantity::WattsPerCell(x)
            | Quantity::Celsius(x)
            | Quantity::Ohms(x)
            | Quantity::Percent(x)
            | Quantity::VoltsPerSecond(x)
            | Quantity::VoltsPerSecondPerCell(x)
            | Quantity::KelvinPerSecond(x) => x,
        }
    }
}

/// A voltage, absolute or per cell.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum VoltageSpec {
    Pack(f64),
    PerCell(f64),
}

impl VoltageSpec {
    pub fn resolve(&self, series: u32) -> f64 {
        match *self {
            VoltageSpec::Pack(v) => v,
            VoltageSpec::PerCell(v) => v * f64::from(series),
        }
    }
}

/// A current, absolute or as a C-rate.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum CurrentSpec {
    Amps(f64),
    CRate(f64),
}

impl CurrentSpec {
    pub fn resolve(&self, rated_ah: f64) -> f64 {
        match *self {
            CurrentSpec::Amps(a) => a,
            CurrentSpec::CRate(c) => c * rated_ah,
        }
    }
}

/// A charge, absolute or as a percentage of the rated capacity.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum ChargeSpec {
    AmpHours(f64),
    PercentOfRated(f64),
}

impl ChargeSpec {
    pub fn resolve(&self, rated_ah: f64) -> f64 {
        match *self {
            ChargeSpec::AmpHours(a) => a,
            ChargeSpec::PercentOfRated(p) => p / 100.0 * rated_ah,
        }
    }
}

/// A power, absolute or per cell.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum PowerSpec {
    Pack(f64),
    PerCell(f64),
}

impl PowerSpec {
    pub fn resolve(&self, series: u32) -> f64 {
        match *self {
            PowerSpec::Pack(w) => w,
            PowerSpec::PerCell(w) => w * f64::from(series),
        }
    }
}

/// A voltage rate (for settling), absolute or per cell, in V/s.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub enum RateSpec {
    Pack(f64),
    PerCell(f64),
}

impl RateSpec {
    pub fn resolve(&self, series: u32) -> f64 {
        match *self {
            RateSpec::Pack(v) => v,
            RateSpec::PerCell(v) => v * f64::from(series),
        }
    }
}

/// Split `"4.2V/cell"` into `(4.2, "V/cell")`.
fn split_number(text: &str) -> Option<(f64, &str)> {
    let bytes = text.as_bytes();
    let mut end = 0;
    let mut seen_digit = false;
    let mut seen_e = false;
    while end < bytes.len() {
        let c = bytes[end];
        let ok = match c {
            b'0'..=b'9' => {
                seen_digit = true;
                true
            }
            b'+' | b'-' => end == 0 || matches!(bytes[end - 1], b'e' | b'E') && seen_e,
            b'.' => true,
            // An exponent only when followed by a digit or sign (so "1e3" parses
            // but the unit letters never get swallowed).
            b'e' | b'E' if seen_digit && !seen_e => {
                let next = bytes.get(end + 1).copied();
                let next_ok = matches!(next, Some(b'0'..=b'9'))
                    || (matches!(next, Some(b'+' | b'-'))
                        && matches!(bytes.get(end + 2), Some(b'0'..=b'9')));
                if next_ok {
                    seen_e = true;
                }
                next_ok
            }
            _ => false,
        };
        if !ok {
            break;
        }
        end += 1;
    }
    if !seen_digit {
        return None;
    }
    let value: f64 = text[..end].parse().ok()?;
    Some((value, text[end..].trim_start()))
}

fn unit_value(x: f64, unit: &str) -> Option<Quantity> {
    use Quantity::*;
    // Units are case-sensitive where case carries meaning (mV vs MV is not a
    // bench unit; m = milli). `degC`, `ohm` accept a few common spellings.
    Some(match unit {
        "V" => Volts(x),
        "mV" => Volts(x / 1000.0),
        "kV" => Volts(x * 1000.0),
        "V/cell" => VoltsPerCell(x),
        "mV/cell" => VoltsPerCell(x / 1000.0),
        "A" => Amps(x),
        "mA" => Amps(x / 1000.0),
        "C" => CRate(x),
        "s" | "sec" => Seconds(x),
        "ms" => Seconds(x / 1000.0),
        "min" | "m" => Seconds(x * 60.0),
        "h" | "hr" => Seconds(x * 3600.0),
        "d" | "day" | "days" => Seconds(x * 86400.0),
        "Ah" => AmpHours(x),
        "mAh" => AmpHours(x / 1000.0),
        "Wh" => WattHours(x),
        "mWh" => WattHours(x / 1000.0),
        "kWh" => WattHours(x * 1000.0),
        "W" => Watts(x),
        "mW" => Watts(x / 1000.0),
        "kW" => Watts(x * 1000.0),
        "W/cell" => WattsPerCell(x),
        "degC" | "°C" | "C°" => Celsius(x),
        "ohm" | "Ohm" | "Ω" => Ohms(x),
        "mohm" | "mOhm" | "mΩ" => Ohms(x / 1000.0),
        "kohm" | "kOhm" | "kΩ" => Ohms(x * 1000.0),
        "%" => Percent(x),
        "V/s" => VoltsPerSecond(x),
        "mV/s" => VoltsPerSecond(x / 1000.0),
        "mV/min" => VoltsPerSecond(x / 1000.0 / 60.0),
        "mV/h" => VoltsPerSecond(x / 1000.0 / 3600.0),
        "mV/s/cell" => VoltsPerSecondPerCell(x / 1000.0),
        "mV/min/cell" => VoltsPerSecondPerCell(x / 1000.0 / 60.0),
        "mV/h/cell" => VoltsPerSecondPerCell(x / 1000.0 / 3600.0),
        "K/s" | "degC/s" => KelvinPerSecond(x),
        "K/min" | "degC/min" => KelvinPerSecond(x / 60.0),
        "K/h" | "degC/h" => KelvinPerSecond(x / 3600.0),
        _ => return None,
    })
}

/// Parse a compound duration such as `1h30m`, `2h 15min 10s`.
fn parse_compound_duration(text: &str) -> Option<f64> {
    let mut rest = text.trim();
    let mut total = 0.0;
    let mut parts = 0;
    while !rest.is_empty() {
        let (x, after) = split_number(rest)?;
        let unit_end = after
            .find(|c: char| !c.is_ascii_alphabetic())
            .unwrap_or(after.len());
        let unit = &after[..unit_end];
        match unit_value(x, unit)? {
            Quantity::Seconds(s) => total += s,
            _ => return None,
        }
        parts += 1;
        rest = after[unit_end..].trim_start();
    }
    (parts >= 2).then_some(total)
}

/// Parse any quantity. `expected` is a hint for error messages.
pub fn parse_with_hint(text: &str, expected: &'static str) -> Result<Quantity, UnitError> {
    let t = text.trim();
    if t.is_empty() {
        return Err(UnitError::Empty { expected });
    }
    let Some((x, unit)) = split_number(t) else {
        return Err(UnitError::NoNumber {
            text: t.to_string(),
            expected,
        });
    };
    if !x.is_finite() {
        return Err(UnitError::NotFinite {
            text: t.to_string(),
        });
    }
    if let Some(q) = unit_value(x, unit) {
        return Ok(q);
    }
    if let Some(s) = parse_compound_duration(t) {
        return Ok(Quantity::Seconds(s));
    }
    Err(UnitError::UnknownUnit {
        text: t.to_string(),
        unit: unit.to_string(),
        known: KNOWN,
    })
}

/// Parse any quantity.
pub fn parse(text: &str) -> Result<Quantity, UnitError> {
    parse_with_hint(text, "4.2V, 0.5C, 30min")
}

fn wrong(text: &str, q: &Quantity, expected: &'static str) -> UnitError {
    UnitError::WrongKind {
        text: text.trim().to_string(),
        found: q.kind_name(),
        expected,
    }
}

/// Typed parsers used by the procedure and pack parsers.
pub fn voltage(text: &str) -> Result<VoltageSpec, UnitError> {
    const E: &str = "a voltage (V, mV or V/cell)";
    match parse_with_hint(text, "4.2V/cell or 42V")? {
        Quantity::Volts(v) => Ok(VoltageSpec::Pack(v)),
        Quantity::VoltsPerCell(v) => Ok(VoltageSpec::PerCell(v)),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn current(text: &str) -> Result<CurrentSpec, UnitError> {
    const E: &str = "a current (A, mA or a C-rate such as 0.5C)";
    match parse_with_hint(text, "0.5C or 2A")? {
        Quantity::Amps(a) => Ok(CurrentSpec::Amps(a)),
        Quantity::CRate(c) => Ok(CurrentSpec::CRate(c)),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn duration(text: &str) -> Result<f64, UnitError> {
    const E: &str = "a duration (s, min, h, or 1h30m)";
    match parse_with_hint(text, "30min or 1h30m")? {
        Quantity::Seconds(s) if s < 0.0 => Err(UnitError::Negative {
            text: text.trim().to_string(),
            what: "a duration",
        }),
        Quantity::Seconds(s) => Ok(s),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn charge(text: &str) -> Result<ChargeSpec, UnitError> {
    const E: &str = "a charge (Ah, mAh, or % of rated capacity)";
    match parse_with_hint(text, "14Ah or 110%")? {
        Quantity::AmpHours(a) => Ok(ChargeSpec::AmpHours(a)),
        Quantity::Percent(p) => Ok(ChargeSpec::PercentOfRated(p)),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn capacity_ah(text: &str) -> Result<f64, UnitError> {
    const E: &str = "a capacity (Ah or mAh)";
    match parse_with_hint(text, "14Ah or 2800mAh")? {
        Quantity::AmpHours(a) => Ok(a),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn energy_wh(text: &str) -> Result<f64, UnitError> {
    const E: &str = "an energy (Wh, kWh or mWh)";
    match parse_with_hint(text, "500Wh")? {
        Quantity::WattHours(w) => Ok(w),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn power(text: &str) -> Result<PowerSpec, UnitError> {
    const E: &str = "a power (W, mW, kW or W/cell)";
    match parse_with_hint(text, "25W")? {
        Quantity::Watts(w) => Ok(PowerSpec::Pack(w)),
        Quantity::WattsPerCell(w) => Ok(PowerSpec::PerCell(w)),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn temperature_c(text: &str) -> Result<f64, UnitError> {
    const E: &str = "a temperature (degC)";
    match parse_with_hint(text, "50degC")? {
        Quantity::Celsius(c) => Ok(c),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn resistance_ohm(text: &str) -> Result<f64, UnitError> {
    const E: &str = "a resistance (ohm, mohm or kohm)";
    match parse_with_hint(text, "2ohm")? {
        Quantity::Ohms(r) => Ok(r),
        q => Err(wrong(text, &q, E)),
    }
}

pub fn voltage_rate(text: &str) -> Result<RateSpec, UnitError> {
    const E: &str = "a voltage rate (V/s, mV/s, mV/min, mV/h, optionally /cell)";
    match parse_with_hint(text, "1mV/min")? {
        Quantity::VoltsPerSecond(r) => Ok(RateSpec::Pack(r)),
        Quantity::VoltsPerSecondPerCell(r) => Ok(RateSpec::PerCell(r)),
        q => Err(wrong(text, &q, E)),
    }
}

/// A rate of temperature change, K/s (`0.5K/h`, `0.5degC/h`, `0.1K/min`).
pub fn temperature_rate(text: &str) -> Result<f64, UnitError> {
    const E: &str = "a temperature rate (K/h, K/min, K/s or degC/h)";
    match parse_with_hint(text, "0.5K/h")? {
        Quantity::KelvinPerSecond(r) => Ok(r),
        q => Err(wrong(text, &q, E)),
    }
}

/// Print a duration as `2h05m30s`, `12min`, `45s`.
pub struct HumanDuration(pub f64);

impl fmt::Display for HumanDuration {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let total = self.0.max(0.0).round() as u64;
        let (h, m, s) = (total / 3600, (total % 3600) / 60, total % 60);
        // (Padded as a string is: a table's column width applies.)
        let text = if h > 0 {
            format!("{h}h{m:02}m{s:02}s")
        } else if m > 0 {
            format!("{m}min{s:02}s")
        } else {
            format!("{s}s")
        };
        f.pad(&text)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A duration takes a table's column width like any string.
    #[test]
    fn durations_pad_to_a_column() {
        assert_eq!(format!("[{:>10}]", HumanDuration(8347.0)), "[  2h19m07s]");
        assert_eq!(format!("[{:<9}]", HumanDuration(1800.0)), "[30min00s ]");
        assert_eq!(format!("[{:>4}]", HumanDuration(5.0)), "[  5s]");
    }

    fn close(a: f64, b: f64) -> bool {
        (a - b).abs() < 1e-9 * (1.0 + b.abs())
    }

    #[test]
    fn bench_spellings_parse_to_si() {
        assert_eq!(parse("4.2V").unwrap(), Quantity::Volts(4.2));
        assert_eq!(parse("4.2V/cell").unwrap(), Quantity::VoltsPerCell(4.2));
        assert_eq!(parse("0.5C").unwrap(), Quantity::CRate(0.5));
        assert_eq!(parse("2A").unwrap(), Quantity::Amps(2.0));
        assert!(close(parse("500mA").unwrap().number(), 0.5));
        assert_eq!(parse("30min").unwrap(), Quantity::Seconds(1800.0));
        assert_eq!(parse("1h30m").unwrap(), Quantity::Seconds(5400.0));
        assert_eq!(parse("2h 15min 10s").unwrap(), Quantity::Seconds(8110.0));
        assert_eq!(parse("14Ah").unwrap(), Quantity::AmpHours(14.0));
        assert!(close(parse("2800mAh").unwrap().number(), 2.8));
        assert_eq!(parse("50degC").unwrap(), Quantity::Celsius(50.0));
        assert_eq!(parse("-10degC").unwrap(), Quantity::Celsius(-10.0));
        assert_eq!(parse("25W").unwrap(), Quantity::Watts(25.0));
        assert_eq!(parse("2ohm").unwrap(), Quantity::Ohms(2.0));
        assert!(close(parse("40mohm").unwrap().number(), 0.04));
        assert_eq!(parse("110%").unwrap(), Quantity::Percent(110.0));
        assert!(close(parse("1mV/min").unwrap().number(), 1e-3 / 60.0));
        assert_eq!(parse("1e-3A").unwrap(), Quantity::Amps(1e-3));
        assert_eq!(parse(" 3.0 V ").unwrap(), Quantity::Volts(3.0));
    }

    #[test]
    fn unknown_unit_is_named() {
        let e = parse("4.2Vx").unwrap_err();
        match e {
            UnitError::UnknownUnit { unit, .. } => assert_eq!(unit, "Vx"),
            other => panic!("unexpected {other:?}"),
        }
        assert!(matches!(parse("volts"), Err(UnitError::NoNumber { .. })));
        assert!(matches!(parse(""), Err(UnitError::Empty { .. })));
    }

    #[test]
    fn wrong_kind_says_what_was_expected() {
        let e = voltage("2A").unwrap_err();
        let msg = e.to_string();
        assert!(msg.contains("a current"), "{msg}");
        assert!(msg.contains("a voltage"), "{msg}");
        assert!(current("4.2V").is_err());
        assert!(duration("14Ah").is_err());
        assert!(capacity_ah("14Wh").is_err());
    }

    #[test]
    fn pack_relative_values_resolve() {
        // Common practice: per-cell voltages scale with the series count,
        // C-rates with the rated capacity.
        assert!(close(voltage("4.2V/cell").unwrap().resolve(10), 42.0));
        assert!(close(current("0.2C").unwrap().resolve(14.0), 2.8));
        assert!(close(charge("130%").unwrap().resolve(10.0), 13.0));
        assert!(close(power("2W/cell").unwrap().resolve(6), 12.0));
    }

    #[test]
    fn human_durations() {
        assert_eq!(HumanDuration(5400.0).to_string(), "1h30m00s");
        assert_eq!(HumanDuration(61.0).to_string(), "1min01s");
        assert_eq!(HumanDuration(9.4).to_string(), "9s");
    }

    /// Every unit the parser knows, 2.5 of it, against its SI value worked
    /// here from the SI prefixes (milli = 1e-3, kilo = 1e3) and the
    /// minute and hour (60 s, 3600 s): the kind and the number.
    #[test]
    fn every_known_unit_converts_by_its_prefix() {
        use Quantity::*;
        let x = 2.5;
        let table: &[(&str, Quantity)] = &[
            ("V", Volts(x)),
            ("mV", Volts(x * 1e-3)),
            ("kV", Volts(x * 1e3)),
            ("V/cell", VoltsPerCell(x)),
            ("mV/cell", VoltsPerCell(x * 1e-3)),
            ("A", Amps(x)),
            ("mA", Amps(x * 1e-3)),
            ("C", CRate(x)),
            ("s", Seconds(x)),
            ("sec", Seconds(x)),
            ("ms", Seconds(x * 1e-3)),
            ("min", Seconds(x * 60.0)),
            ("m", Seconds(x * 60.0)),
            ("h", Seconds(x * 3600.0)),
            ("hr", Seconds(x * 3600.0)),
            ("d", Seconds(x * 86_400.0)),
            ("days", Seconds(x * 86_400.0)),
            ("Ah", AmpHours(x)),
            ("mAh", AmpHours(x * 1e-3)),
            ("Wh", WattHours(x)),
            ("mWh", WattHours(x * 1e-3)),
            ("kWh", WattHours(x * 1e3)),
            ("W", Watts(x)),
            ("mW", Watts(x * 1e-3)),
            ("kW", Watts(x * 1e3)),
            ("W/cell", WattsPerCell(x)),
            ("degC", Celsius(x)),
            ("°C", Celsius(x)),
            ("ohm", Ohms(x)),
            ("Ω", Ohms(x)),
            ("mohm", Ohms(x * 1e-3)),
            ("mΩ", Ohms(x * 1e-3)),
            ("kohm", Ohms(x * 1e3)),
            ("%", Percent(x)),
            ("V/s", VoltsPerSecond(x)),
            ("mV/s", VoltsPerSecond(x * 1e-3)),
            ("mV/min", VoltsPerSecond(x * 1e-3 / 60.0)),
            ("mV/h", VoltsPerSecond(x * 1e-3 / 3600.0)),
            ("mV/s/cell", VoltsPerSecondPerCell(x * 1e-3)),
            ("mV/min/cell", VoltsPerSecondPerCell(x * 1e-3 / 60.0)),
            ("mV/h/cell", VoltsPerSecondPerCell(x * 1e-3 / 3600.0)),
            ("K/s", KelvinPerSecond(x)),
            ("K/min", KelvinPerSecond(x / 60.0)),
            ("degC/h", KelvinPerSecond(x / 3600.0)),
            ("K/h", KelvinPerSecond(x / 3600.0)),
        ];
        for (unit, want) in table {
            let got = parse(&format!("{x}{unit}")).unwrap();
            assert_eq!(
                std::mem::discriminant(&got),
                std::mem::discriminant(want),
                "{unit}: {got:?}"
            );
            assert!(
                close(got.number(), want.number()),
                "{unit}: {got:?} against {want:?}"
            );
        }
    }

    /// Numbers with exponents and signs end where the unit starts; an
    /// exponent needs a digit after it, so an `e` of a unit is not eaten.
    #[test]
    fn numbers_end_where_the_unit_starts() {
        assert_eq!(parse("2.5e3mA").unwrap(), Quantity::Amps(2.5));
        assert_eq!(parse("-1E+2V").unwrap(), Quantity::Volts(-100.0));
        assert_eq!(parse("+4V").unwrap(), Quantity::Volts(4.0));
        assert_eq!(parse("1e-1s").unwrap(), Quantity::Seconds(0.1));
        assert!(matches!(parse("3e"), Err(UnitError::UnknownUnit { unit, .. }) if unit == "e"));
        assert!(matches!(parse("3e+"), Err(UnitError::UnknownUnit { unit, .. }) if unit == "e+"));
        // A sign inside the number is not part of it.
        assert!(matches!(parse("3-4V"), Err(UnitError::UnknownUnit { unit, .. }) if unit == "-4V"));
        assert!(matches!(parse("."), Err(UnitError::NoNumber { .. })));
        assert!(matches!(parse("1e999V"), Err(UnitError::NotFinite { .. })));
        // Compound durations need two parts or more, all durations.
        assert_eq!(parse("1h 1m 1s").unwrap(), Quantity::Seconds(3661.0));
        assert_eq!(parse("1d2h").unwrap(), Quantity::Seconds(93_600.0));
        assert!(parse("1h2V").is_err());
        assert!(parse("1h2").is_err());
    }

    /// Every typed parser takes its own kinds, resolves them against the
    /// pack, and refuses another kind naming both.
    #[test]
    fn typed_parsers_take_their_kinds_and_name_the_others() {
        assert_eq!(voltage("42V").unwrap().resolve(3), 42.0);
        assert_eq!(voltage("3.5V/cell").unwrap().resolve(4), 14.0);
        assert_eq!(current("3A").unwrap().resolve(10.0), 3.0);
        assert_eq!(current("0.5C").unwrap().resolve(10.0), 5.0);
        assert_eq!(charge("2Ah").unwrap().resolve(10.0), 2.0);
        assert_eq!(charge("25%").unwrap().resolve(8.0), 2.0);
        assert_eq!(power("30W").unwrap().resolve(7), 30.0);
        assert_eq!(voltage_rate("2V/s").unwrap().resolve(5), 2.0);
        assert_eq!(voltage_rate("2mV/s/cell").unwrap().resolve(5), 0.01);
        assert_eq!(capacity_ah("1500mAh").unwrap(), 1.5);
        assert_eq!(energy_wh("2kWh").unwrap(), 2000.0);
        assert_eq!(temperature_c("45degC").unwrap(), 45.0);
        assert_eq!(resistance_ohm("25mohm").unwrap(), 0.025);
        assert_eq!(temperature_rate("36K/h").unwrap(), 0.01);
        assert_eq!(duration("90s").unwrap(), 90.0);
        assert!(matches!(duration("-5s"), Err(UnitError::Negative { .. })));
        assert_eq!(temperature_limit_c("80degC").unwrap(), 80.0);
        assert_eq!(temperature_limit_c("-40degC").unwrap(), -40.0);
        assert!(matches!(
            temperature_limit_c("81degC"),
            Err(UnitError::Implausible { .. })
        ));
        assert!(matches!(
            temperature_limit_c("-41degC"),
            Err(UnitError::Implausible { .. })
        ));
        let kinds: &[(&str, &str)] = &[
            ("1V", "a voltage"),
            ("1A", "a current"),
            ("1s", "a duration"),
            ("1Ah", "a charge"),
            ("1Wh", "an energy"),
            ("1W", "a power"),
            ("1degC", "a temperature"),
            ("1ohm", "a resistance"),
            ("1%", "a percentage"),
            ("1V/s", "a voltage rate"),
            ("1K/h", "a temperature rate"),
        ];
        type Check = fn(&str) -> Option<String>;
        let parsers: &[(&str, Check)] = &[
            ("a voltage", |t| voltage(t).err().map(|e| e.to_string())),
            ("a current", |t| current(t).err().map(|e| e.to_string())),
            ("a duration", |t| duration(t).err().map(|e| e.to_string())),
            ("a charge", |t| charge(t).err().map(|e| e.to_string())),
            ("an energy", |t| energy_wh(t).err().map(|e| e.to_string())),
            ("a power", |t| power(t).err().map(|e| e.to_string())),
            ("a temperature", |t| {
                temperature_c(t).err().map(|e| e.to_string())
            }),
            ("a resistance", |t| {
                resistance_ohm(t).err().map(|e| e.to_string())
            }),
            ("a voltage rate", |t| {
                voltage_rate(t).err().map(|e| e.to_string())
            }),
            ("a temperature rate", |t| {
                temperature_rate(t).err().map(|e| e.to_string())
            }),
        ];
        for (text, kind) in kinds {
            for (expects, check) in parsers {
                // A percentage is a charge (of rated capacity).
                let takes = kind == expects || (*kind == "a percentage" && *expects == "a charge");
                match check(text) {
                    None => assert!(takes, "{expects} took {text}"),
                    Some(msg) => {
                        assert!(!takes, "{expects} refused {text}: {msg}");
                        assert!(msg.contains(kind), "{msg}");
                        assert!(msg.contains(expects), "{msg}");
                    }
                }
            }
        }
    }

    #[test]
    fn durations_print_in_hours_minutes_and_seconds() {
        assert_eq!(HumanDuration(3600.0).to_string(), "1h00m00s");
        assert_eq!(HumanDuration(3599.6).to_string(), "1h00m00s");
        assert_eq!(HumanDuration(7322.0).to_string(), "2h02m02s");
        assert_eq!(HumanDuration(60.0).to_string(), "1min00s");
        assert_eq!(HumanDuration(59.0).to_string(), "59s");
        assert_eq!(HumanDuration(-5.0).to_string(), "0s");
    }
}
