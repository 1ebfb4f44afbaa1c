//! Reading a log as a stream of rows: ours (`samples.csv`) or any bench's
//! CSV, with its columns named or recognised, its current sign and its
//! time unit. One row at a time, one reused buffer: memory does not grow
//! with the file. A last line without its newline (a crash, a copy cut
//! short) is left out and reported; a row that does not parse is an error
//! with file, line and column, or with `skip_bad_rows` a counted skip.

use super::read::ReadError;
use std::io::{Read, Seek, SeekFrom};
use std::path::{Path, PathBuf};

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
    fn factor(self) -> f64 {
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
}

impl Default for LogFormat {
    fn default() -> Self {
        LogFormat {
            columns: ColumnNames::default(),
            sign: CurrentSign::ChargePositive,
            time_unit: TimeUnit::Seconds,
            skip_bad_rows: false,
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

/// What reading the file found besides its rows.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ReadReport {
    pub rows: u64,
    pub partial_last_line: bool,
    pub bad_rows_skipped: u64,
    /// The first bad rows skipped: (line, message).
    pub bad_rows: Vec<(u64, String)>,
    /// The columns used, by header name.
    pub columns_used: Vec<(String, String)>,
    /// The log is packbench's own `samples.csv`.
    pub ours: bool,
}

struct Cols {
    time: usize,
    voltage: usize,
    current: usize,
    temperature: Option<usize>,
    step: Option<usize>,
    cycle: Option<usize>,
}

fn norm(h: &str) -> String {
    h.trim().to_ascii_lowercase()
}

/// Recognise a column from common header spellings.
fn guess(headers: &[String], role: &str) -> Option<usize> {
    let names: &[&str] = match role {
        "time" => &[
            "t_s", "time", "time_s", "time [s]", "time (s)", "time/s", "test_time", "test time",
            "elapsed", "elapsed_s", "seconds", "timestamp", "datetime", "date_time", "time [h]",
            "time_h", "time [ms]", "time_ms",
        ],
        "voltage" => &[
            "voltage_v", "voltage", "voltage [v]", "voltage (v)", "voltage/v", "v", "u", "u_v",
            "volts", "terminal voltage [v]", "pack voltage",
        ],
        "current" => &[
            "current_a", "current", "current [a]", "current (a)", "current/a", "i", "i_a", "amps",
            "pack current",
        ],
        "temperature" => &[
            "temperature_c", "temperature", "temperature [degc]", "temperature [c]",
            "temperature (c)", "temp", "temp_c", "t_c", "cell temperature",
        ],
        "step" => &["step", "step_index", "step index", "step number", "step_no"],
        "cycle" => &["cycle", "cycle_index", "cycle index", "cycle number"],
        _ => &[],
    };
    headers.iter().position(|h| names.contains(&norm(h).as_str()))
}

fn find(headers: &[String], name: &str) -> Option<usize> {
    headers
        .iter()
        .position(|h| h.trim() == name.trim())
        .or_else(|| headers.iter().position(|h| norm(h) == norm(name)))
}

fn ends_with_newline(path: &Path) -> std::io::Result<bool> {
    let mut f = std::fs::File::open(path)?;
    let len = f.metadata()?.len();
    if len == 0 {
        return Ok(true);
    }
    f.seek(SeekFrom::Start(len - 1))?;
    let mut b = [0u8; 1];
    f.read_exact(&mut b)?;
    Ok(b[0] == b'\n')
}

/// Parse a time cell: a number in the given unit, or a date and time
/// (RFC 3339, or `YYYY-MM-DD HH:MM:SS[.fff]`) as seconds since the epoch.
fn parse_time(s: &str, unit: TimeUnit) -> Option<f64> {
    if let Ok(x) = s.parse::<f64>() {
        return x.is_finite().then_some(x * unit.factor());
    }
    if let Ok(d) = chrono::DateTime::parse_from_rfc3339(s) {
        return Some(d.timestamp_micros() as f64 / 1e6);
    }
    for f in ["%Y-%m-%d %H:%M:%S%.f", "%Y-%m-%dT%H:%M:%S%.f", "%Y/%m/%d %H:%M:%S%.f"] {
        if let Ok(d) = chrono::NaiveDateTime::parse_from_str(s, f) {
            return Some(d.and_utc().timestamp_micros() as f64 / 1e6);
        }
    }
    None
}

/// Read a log row by row. `f` gets each row in pack convention; times are
/// as in the file (seconds), not shifted.
pub fn stream_log(
    path: &Path,
    fmt: &LogFormat,
    mut f: impl FnMut(Row),
) -> Result<ReadReport, ReadError> {
    let io = |source: std::io::Error| ReadError::Io {
        path: path.to_path_buf(),
        source,
    };
    let bad = |line: u64, column: usize, message: String| ReadError::Bad {
        path: PathBuf::from(path),
        line: line as usize,
        column,
        message,
    };
    let complete = ends_with_newline(path).map_err(io)?;
    let file = std::fs::File::open(path).map_err(io)?;
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .buffer_capacity(1 << 16)
        .from_reader(std::io::BufReader::with_capacity(1 << 16, file));
    let headers: Vec<String> = rdr
        .headers()
        .map_err(|e| bad(1, 1, e.to_string()))?
        .iter()
        .map(|h| h.trim_start_matches('\u{feff}').to_string())
        .collect();
    let ours = headers.len() >= 5
        && headers
            .iter()
            .zip(super::CSV_COLUMNS.iter())
            .all(|(a, b)| a.trim() == *b);
    let want = |role: &str, given: &Option<String>| -> Result<Option<usize>, ReadError> {
        match given {
            Some(name) => find(&headers, name).map(Some).ok_or_else(|| {
                bad(
                    1,
                    1,
                    format!(
                        "no column '{name}' for {role}; the header has: {}",
                        headers.join(", ")
                    ),
                )
            }),
            None => Ok(guess(&headers, role)),
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
    let cols = Cols {
        time: need("time", want("time", &fmt.columns.time)?)?,
        voltage: need("voltage", want("voltage", &fmt.columns.voltage)?)?,
        current: need("current", want("current", &fmt.columns.current)?)?,
        temperature: want("temperature", &fmt.columns.temperature)?,
        step: want("step", &fmt.columns.step)?,
        cycle: if ours { guess(&headers, "cycle") } else { None },
    };
    let mut report = ReadReport {
        ours,
        ..ReadReport::default()
    };
    for (role, c) in [
        ("time", Some(cols.time)),
        ("voltage", Some(cols.voltage)),
        ("current", Some(cols.current)),
        ("temperature", cols.temperature),
        ("step", cols.step),
    ] {
        if let Some(c) = c {
            report
                .columns_used
                .push((role.to_string(), headers[c].clone()));
        }
    }
    let sign = match fmt.sign {
        CurrentSign::ChargePositive => 1.0,
        CurrentSign::DischargePositive => -1.0,
    };
    let mut rec = csv::ByteRecord::new();
    let mut pending: Option<(u64, Result<Row, ReadError>)> = None;
    let mut line: u64 = 1;
    loop {
        let more = match rdr.read_byte_record(&mut rec) {
            Ok(m) => m,
            Err(e) => {
                let l = e.position().map(|p| p.line()).unwrap_or(line + 1);
                return Err(bad(l, 1, e.to_string()));
            }
        };
        // Each row is handed on only when the next one has been read, so
        // the last row can be told apart: without its newline it is left out.
        if !more && !complete && pending.take().is_some() {
            report.partial_last_line = true;
        }
        if let Some((l, r)) = pending.take() {
            match r {
                Ok(row) => {
                    report.rows += 1;
                    f(row);
                }
                Err(e) if fmt.skip_bad_rows => {
                    report.bad_rows_skipped += 1;
                    if report.bad_rows.len() < 20 {
                        report.bad_rows.push((l, e.to_string()));
                    }
                }
                Err(e) => return Err(e),
            }
        }
        if !more {
            break;
        }
        line = rec.position().map(|p| p.line()).unwrap_or(line + 1);
        let l = line;
        let cell = |i: usize| -> &str {
            rec.get(i)
                .and_then(|b| std::str::from_utf8(b).ok())
                .unwrap_or("")
                .trim()
        };
        let num = |i: usize, what: &str| -> Result<f64, ReadError> {
            let s = cell(i);
            s.parse::<f64>()
                .ok()
                .filter(|x| x.is_finite())
                .ok_or_else(|| bad(l, i + 1, format!("'{s}' is not {what}")))
        };
        let row = (|| -> Result<Row, ReadError> {
            let t_text = cell(cols.time);
            let t_s = parse_time(t_text, fmt.time_unit).ok_or_else(|| {
                bad(
                    l,
                    cols.time + 1,
                    format!("'{t_text}' is not a time (a number, or a date and time)"),
                )
            })?;
            let voltage_v = num(cols.voltage, "a voltage (a finite number)")?;
            // (+ 0.0 turns a negated zero into a plain one.)
            let current_a = sign * num(cols.current, "a current (a finite number)")? + 0.0;
            let temperature_c = match cols.temperature {
                Some(i) if !cell(i).is_empty() => Some(num(i, "a temperature (a finite number)")?),
                _ => None,
            };
            let int = |i: usize, what: &str| -> Result<u32, ReadError> {
                let s = cell(i);
                s.parse::<u32>()
                    .ok()
                    .or_else(|| {
                        s.parse::<f64>()
                            .ok()
                            .filter(|x| x.fract() == 0.0 && *x >= 0.0 && *x < 4e9)
                            .map(|x| x as u32)
                    })
                    .ok_or_else(|| bad(l, i + 1, format!("'{s}' is not {what}")))
            };
            let step = cols.step.map(|i| int(i, "a step number")).transpose()?;
            let cycle = cols.cycle.map(|i| int(i, "a cycle number")).transpose()?;
            Ok(Row {
                t_s,
                voltage_v,
                current_a,
                temperature_c,
                step,
                cycle,
            })
        })();
        pending = Some((l, row));
    }
    Ok(report)
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
    fn columns_parse() {
        let c: ColumnNames = "time=Time [s],voltage=U,current=I".parse().unwrap();
        assert_eq!(c.time.as_deref(), Some("Time [s]"));
        assert!("speed=3".parse::<ColumnNames>().is_err());
    }
}
