//! How a log is laid out: its columns (named or recognised from the
//! header), its current sign and its time unit, and the row it gives.

use crate::error::ReadError;

/// Which way current is positive in the log.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CurrentSign {
    ChargePositive,
    DischargePositive,
}

/// The unit of a numeric time column.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum TimeUnit {
    Seconds,
    Milliseconds,
    Minutes,
    Hours,
}

impl TimeUnit {
    fn symbol(self) -> &'static str {
        match self {
            TimeUnit::Seconds => "s",
            TimeUnit::Milliseconds => "ms",
            TimeUnit::Minutes => "min",
            TimeUnit::Hours => "h",
        }
    }

    pub(crate) fn factor(self) -> f64 {
        match self {
            TimeUnit::Seconds => 1.0,
            TimeUnit::Milliseconds => 0.001,
            TimeUnit::Minutes => 60.0,
            TimeUnit::Hours => 3600.0,
        }
    }
}

impl std::str::FromStr for TimeUnit {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        Ok(match s {
            "s" => TimeUnit::Seconds,
            "ms" => TimeUnit::Milliseconds,
            "min" => TimeUnit::Minutes,
            "h" => TimeUnit::Hours,
            _ => return Err(format!("time unit '{s}': expected s, ms, min or h")),
        })
    }
}

impl std::str::FromStr for CurrentSign {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        match s {
            "charge-positive" => Ok(CurrentSign::ChargePositive),
            "discharge-positive" => Ok(CurrentSign::DischargePositive),
            _ => Err(format!(
                "current sign '{s}': expected charge-positive or discharge-positive"
            )),
        }
    }
}

/// Column names given by the user (`time=...,voltage=...`).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ColumnNames {
    pub time: Option<String>,
    pub voltage: Option<String>,
    pub current: Option<String>,
    pub temperature: Option<String>,
    pub step: Option<String>,
}

impl std::str::FromStr for ColumnNames {
    type Err = String;
    /// `time=Time [s],voltage=U,current=I,temperature=T,step=Step`.
    fn from_str(s: &str) -> Result<Self, String> {
        let mut c = ColumnNames::default();
        for part in s.split(',') {
            let (k, v) = part.split_once('=').ok_or_else(|| {
                format!("--columns '{part}': expected ROLE=NAME, e.g. time=Time [s]")
            })?;
            let v = Some(v.trim().to_string());
            match k.trim() {
                "time" => c.time = v,
                "voltage" => c.voltage = v,
                "current" => c.current = v,
                "temperature" => c.temperature = v,
                "step" => c.step = v,
                other => {
                    return Err(format!(
                        "--columns: unknown role '{other}', expected time, voltage, current, temperature or step"
                    ))
                }
            }
        }
        Ok(c)
    }
}

/// How to read a log.
#[derive(Debug, Clone, PartialEq)]
pub struct LogFormat {
    pub columns: ColumnNames,
    pub sign: CurrentSign,
    pub time_unit: TimeUnit,
    pub skip_bad_rows: bool,
    /// The field delimiter (none: found from the header line).
    pub delimiter: Option<u8>,
}

impl Default for LogFormat {
    fn default() -> Self {
        LogFormat {
            columns: ColumnNames::default(),
            sign: CurrentSign::ChargePositive,
            time_unit: TimeUnit::Seconds,
            skip_bad_rows: false,
            delimiter: None,
        }
    }
}

/// One row in pack convention.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Row {
    pub t_s: f64,
    pub voltage_v: f64,
    pub current_a: f64,
    pub temperature_c: Option<f64>,
    pub step: Option<u32>,
    pub cycle: Option<u32>,
}

impl Row {
    /// The row as a sample of packbench's own log (a missing step or
    /// cycle is 0).
    pub fn sample(&self) -> model::sample::Sample {
        model::sample::Sample {
            t_s: self.t_s,
            step: self.step.unwrap_or(0),
            cycle: self.cycle.unwrap_or(0),
            voltage_v: self.voltage_v,
            current_a: self.current_a,
            temperature_c: self.temperature_c,
        }
    }
}

pub(crate) struct Cols {
    pub time: usize,
    pub voltage: usize,
    pub current: usize,
    pub temperature: Option<usize>,
    pub step: Option<usize>,
    pub cycle: Option<usize>,
    /// Fields on every line: as many as the header has.
    pub nfields: usize,
    /// The field delimiter.
    pub delim: u8,
}

/// A delimiter as given: comma, semicolon or tab (the word or the character).
pub fn parse_delimiter(s: &str) -> Result<u8, String> {
    if s == "\t" {
        return Ok(b'\t');
    }
    match s.trim().to_ascii_lowercase().as_str() {
        "comma" | "," => Ok(b','),
        "semicolon" | ";" => Ok(b';'),
        "tab" | "\\t" => Ok(b'\t'),
        other => Err(format!("'{other}': expected comma, semicolon or tab")),
    }
}

/// The delimiter of a header line: the one of comma, semicolon and tab
/// that it holds most of (comma when none).
pub fn detect_delimiter(header: &[u8]) -> u8 {
    let count = |d: u8| header.iter().filter(|&&b| b == d).count();
    let mut best = (count(b','), b',');
    for d in [b';', b'\t'] {
        let n = count(d);
        if n > best.0 {
            best = (n, d);
        }
    }
    best.1
}

fn norm(h: &str) -> String {
    h.trim().to_ascii_lowercase()
}

/// Recognise a column from its header: a quantity's name with its SI unit
/// in one of the generic forms `name_unit`, `name [unit]` or `name/unit`
/// (ISO 80000-1 style), or the bare name; case is ignored. Anything else is
/// named with `--columns`.
fn guess(headers: &[String], role: &str) -> Option<usize> {
    let names: &[&str] = match role {
        "time" => &[
            "t_s",
            "time",
            "time_s",
            "time [s]",
            "time/s",
            "elapsed_s",
            "timestamp",
            "datetime",
            "time_ms",
            "time [ms]",
            "time/ms",
            "time_min",
            "time [min]",
            "time/min",
            "time_h",
            "time [h]",
            "time/h",
        ],
        "voltage" => &[
            "voltage_v",
            "voltage",
            "voltage [v]",
            "voltage/v",
            "u",
            "u_v",
            "u [v]",
            "u/v",
        ],
        "current" => &[
            "current_a",
            "current",
            "current [a]",
            "current/a",
            "i",
            "i_a",
            "i [a]",
            "i/a",
        ],
        "temperature" => &[
            "temperature_c",
            "temperature_degc",
            "temperature",
            "temperature [degc]",
            "temperature [°c]",
            "temperature/degc",
            "temperature/°c",
            "t_c",
        ],
        "step" => &["step"],
        "cycle" => &["cycle"],
        _ => &[],
    };
    headers
        .iter()
        .position(|h| names.contains(&norm(h).as_str()))
}

/// The unit a time header names after `_`, in brackets or after `/`
/// (`elapsed_min`, `Time [h]`, `time/ms`), if any.
fn header_time_unit(h: &str) -> Option<TimeUnit> {
    let n = norm(h);
    let unit = if let Some(inner) = n.strip_suffix(']') {
        inner.rsplit_once('[')?.1.trim()
    } else if let Some((_, u)) = n.rsplit_once('/') {
        u.trim()
    } else {
        n.rsplit_once('_')?.1
    };
    unit.parse().ok()
}

fn find(headers: &[String], name: &str) -> Option<usize> {
    headers
        .iter()
        .position(|h| h.trim() == name.trim())
        .or_else(|| headers.iter().position(|h| norm(h) == norm(name)))
}

/// Parse a time cell: a number in the given unit, or a date and time
/// (RFC 3339, or `YYYY-MM-DD HH:MM:SS[.fff]`) as seconds since the epoch.
pub(crate) fn parse_time(s: &str, unit: TimeUnit) -> Option<f64> {
    if let Ok(x) = s.parse::<f64>() {
        return x.is_finite().then_some(x * unit.factor());
    }
    if let Ok(d) = chrono::DateTime::parse_from_rfc3339(s) {
        return Some(d.timestamp_micros() as f64 / 1e6);
    }
    for f in [
        "%Y-%m-%d %H:%M:%S%.f",
        "%Y-%m-%dT%H:%M:%S%.f",
        "%Y/%m/%d %H:%M:%S%.f",
    ] {
        if let Ok(d) = chrono::NaiveDateTime::parse_from_str(s, f) {
            return Some(d.and_utc().timestamp_micros() as f64 / 1e6);
        }
    }
    None
}

/// Which column holds what: named by the format, else guessed from the
/// header; time, voltage and current must be found.
pub(crate) fn resolve_columns<B: Fn(u64, usize, String) -> ReadError>(
    headers: &[String],
    fmt: &LogFormat,
    ours: bool,
    bad: &B,
) -> Result<Cols, ReadError> {
    let want = |role: &str, given: &Option<String>| -> Result<Option<usize>, ReadError> {
        match given {
            Some(name) => find(headers, name).map(Some).ok_or_else(|| {
                bad(
                    1,
                    1,
                    format!(
                        "no column '{name}' for {role}; the header has: {}",
                        headers.join(", ")
                    ),
                )
            }),
            None => Ok(guess(headers, role)),
        }
    };
    let need = |role: &str, c: Option<usize>| -> Result<usize, ReadError> {
        c.ok_or_else(|| {
            bad(
                1,
                1,
                format!(
                    "cannot tell which column is the {role}: name it with --columns {role}=NAME (the header has: {})",
                    headers.join(", ")
                ),
            )
        })
    };
    Ok(Cols {
        time: need("time", want("time", &fmt.columns.time)?)?,
        voltage: need("voltage", want("voltage", &fmt.columns.voltage)?)?,
        current: need("current", want("current", &fmt.columns.current)?)?,
        temperature: want("temperature", &fmt.columns.temperature)?,
        step: want("step", &fmt.columns.step)?,
        cycle: if ours { guess(headers, "cycle") } else { None },
        nfields: headers.len(),
        delim: b',',
    })
}

/// A time header that names its unit (`time_min`, `time [h]`) is read in
/// it: the default `--time-unit s` gives way, another unit clashes.
pub(crate) fn time_unit_of<B: Fn(u64, usize, String) -> ReadError>(
    header: &str,
    column: usize,
    fmt: &LogFormat,
    bad: &B,
) -> Result<LogFormat, ReadError> {
    match header_time_unit(header) {
        Some(u) if u != fmt.time_unit && fmt.time_unit != TimeUnit::Seconds => Err(bad(
            1,
            column + 1,
            format!(
                "the time column '{header}' is in {}, but --time-unit says {}",
                u.symbol(),
                fmt.time_unit.symbol()
            ),
        )),
        Some(u) => Ok(LogFormat {
            time_unit: u,
            ..fmt.clone()
        }),
        None => Ok(fmt.clone()),
    }
}

impl Cols {
    /// The roles found and their header names, for the report.
    pub(crate) fn used(&self, headers: &[String]) -> Vec<(String, String)> {
        [
            ("time", Some(self.time)),
            ("voltage", Some(self.voltage)),
            ("current", Some(self.current)),
            ("temperature", self.temperature),
            ("step", self.step),
        ]
        .into_iter()
        .filter_map(|(role, c)| c.map(|c| (role.to_string(), headers[c].clone())))
        .collect()
    }

    /// Fields worth splitting off a line: up to the last one used.
    pub(crate) fn count(&self) -> usize {
        [
            Some(self.time),
            Some(self.voltage),
            Some(self.current),
            self.temperature,
            self.step,
            self.cycle,
        ]
        .iter()
        .flatten()
        .max()
        .map_or(1, |m| m + 1)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn times_in_every_form() {
        assert_eq!(parse_time("12.5", TimeUnit::Seconds), Some(12.5));
        assert_eq!(parse_time("1500", TimeUnit::Milliseconds), Some(1.5));
        assert_eq!(parse_time("0.5", TimeUnit::Hours), Some(1800.0));
        let a = parse_time("2026-03-01T10:00:00Z", TimeUnit::Seconds).unwrap();
        let b = parse_time("2026-03-01 10:00:01.5", TimeUnit::Seconds).unwrap();
        assert!((b - a - 1.5).abs() < 1e-6);
        assert_eq!(parse_time("soon", TimeUnit::Seconds), None);
        assert_eq!(parse_time("NaN", TimeUnit::Seconds), None);
    }

    #[test]
    fn a_time_header_names_its_unit() {
        assert_eq!(header_time_unit("elapsed_min"), Some(TimeUnit::Minutes));
        assert_eq!(header_time_unit("Time [h]"), Some(TimeUnit::Hours));
        assert_eq!(header_time_unit("time/ms"), Some(TimeUnit::Milliseconds));
        assert_eq!(header_time_unit("t_s"), Some(TimeUnit::Seconds));
        assert_eq!(header_time_unit("timestamp"), None);
        assert_eq!(header_time_unit("date_time"), None);
    }

    #[test]
    fn generic_headers_are_recognised_and_others_are_not() {
        let h = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        let si = h(&[
            "Time [s]",
            "Voltage [V]",
            "Current [A]",
            "Temperature [degC]",
        ]);
        assert_eq!(guess(&si, "time"), Some(0));
        assert_eq!(guess(&si, "voltage"), Some(1));
        assert_eq!(guess(&si, "current"), Some(2));
        assert_eq!(guess(&si, "temperature"), Some(3));
        // A layout of its own is named with --columns.
        let own = h(&["elapsed_min", "pack_volts", "amps_out"]);
        assert_eq!(guess(&own, "voltage"), None);
        assert_eq!(guess(&own, "current"), None);
    }

    #[test]
    fn columns_parse() {
        let c: ColumnNames = "time=Time [s],voltage=U,current=I".parse().unwrap();
        assert_eq!(c.time.as_deref(), Some("Time [s]"));
        assert!("speed=3".parse::<ColumnNames>().is_err());
    }
}
