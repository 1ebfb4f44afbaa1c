//! Reading a run back: samples (a truncated last line, as a crash or power
//! cut leaves it, is dropped and reported), events, and the step records
//! the analysis needs.

use super::{EVENTS_JSONL, SAMPLES_CSV};
use crate::event::Event;
use analysis::StepInfo;
use model::sample::Sample;
use std::path::Path;

pub use crate::error::ReadError;

/// Samples and what was noticed while reading them.
#[derive(Debug, Default)]
pub struct SampleLog {
    pub samples: Vec<Sample>,
    /// A last line without its newline was dropped.
    pub dropped_partial_line: bool,
}

fn field(rec: &csv::StringRecord, i: usize) -> &str {
    rec.get(i).unwrap_or("").trim()
}

/// Read `samples.csv` written by packbench.
pub fn read_samples(path: &Path) -> Result<SampleLog, ReadError> {
    let bytes = std::fs::read(path).map_err(|source| ReadError::Io {
        path: path.to_path_buf(),
        error: source,
    })?;
    let mut log = SampleLog::default();
    // A crash can leave the last row without its newline: drop it.
    let mut end = bytes.len();
    if end > 0 && bytes[end - 1] != b'\n' {
        end = bytes[..end]
            .iter()
            .rposition(|&b| b == b'\n')
            .map(|p| p + 1)
            .unwrap_or(0);
        log.dropped_partial_line = true;
    }
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_reader(&bytes[..end]);
    let headers = rdr
        .headers()
        .map_err(|e| ReadError::Bad {
            path: path.to_path_buf(),
            line: 1,
            column: 1,
            message: e.to_string(),
        })?
        .clone();
    let col = |name: &str| headers.iter().position(|h| h.trim() == name);
    let need = ["t_s", "step", "cycle", "voltage_v", "current_a"];
    let mut idx = Vec::new();
    for n in need {
        match col(n) {
            Some(i) => idx.push(i),
            None => {
                return Err(ReadError::Bad {
                    path: path.to_path_buf(),
                    line: 1,
                    column: 1,
                    message: format!(
                        "missing column '{n}'; expected {}",
                        super::CSV_COLUMNS.join(",")
                    ),
                })
            }
        }
    }
    let temp = col("temperature_c");
    for rec in rdr.records() {
        let rec = rec.map_err(|e| ReadError::Bad {
            path: path.to_path_buf(),
            line: e.position().map(|p| p.line() as usize).unwrap_or(0),
            column: 1,
            message: e.to_string(),
        })?;
        let line = rec.position().map(|p| p.line() as usize).unwrap_or(0);
        let bad = |i: usize, what: &str| ReadError::Bad {
            path: path.to_path_buf(),
            line,
            column: i + 1,
            message: format!("'{}' is not {what}", field(&rec, i)),
        };
        let num = |i: usize| -> Result<f64, ReadError> {
            field(&rec, i)
                .parse::<f64>()
                .ok()
                .filter(|x| x.is_finite())
                .ok_or_else(|| bad(i, "a finite number"))
        };
        let int = |i: usize| -> Result<u32, ReadError> {
            field(&rec, i)
                .parse::<u32>()
                .map_err(|_| bad(i, "a whole number"))
        };
        let temperature_c = match temp {
            Some(i) if !field(&rec, i).is_empty() => Some(num(i)?),
            _ => None,
        };
        log.samples.push(Sample {
            t_s: num(idx[0])?,
            step: int(idx[1])?,
            cycle: int(idx[2])?,
            voltage_v: num(idx[3])?,
            current_a: num(idx[4])?,
            temperature_c,
        });
    }
    Ok(log)
}

/// Read `events.jsonl`; a truncated last line is dropped.
pub fn read_events(path: &Path) -> Result<Vec<Event>, ReadError> {
    let text = std::fs::read_to_string(path).map_err(|source| ReadError::Io {
        path: path.to_path_buf(),
        error: source,
    })?;
    let complete = match text.rfind('\n') {
        Some(p) => &text[..=p],
        None => "",
    };
    let mut out = Vec::new();
    for (n, line) in complete.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let e: Event = serde_json::from_str(line).map_err(|e| ReadError::Bad {
            path: path.to_path_buf(),
            line: n + 1,
            column: e.column(),
            message: e.to_string(),
        })?;
        if let Event::RunStart { schema_version, .. } = &e {
            crate::schema::check(path, *schema_version)?;
        }
        out.push(e);
    }
    Ok(out)
}

/// Step records from the events of a run.
pub fn step_infos(events: &[Event]) -> Vec<StepInfo> {
    let mut out: Vec<StepInfo> = Vec::new();
    for e in events {
        match e {
            Event::StepStart {
                step,
                phase,
                cycle,
                kind,
                name,
                result,
                ..
            } => out.push(StepInfo {
                step: *step,
                phase: phase.clone(),
                cycle: *cycle,
                kind: *kind,
                name: name.clone(),
                result: *result,
                end_kind: None,
                end_reason: None,
            }),
            Event::StepEnd {
                step,
                end_kind,
                end_reason,
                ..
            } => {
                if let Some(s) = out.iter_mut().rev().find(|s| s.step == *step) {
                    s.end_kind = Some(*end_kind);
                    s.end_reason = Some(end_reason.clone());
                }
            }
            _ => {}
        }
    }
    out
}

/// Samples and step records of a run folder.
pub fn read_run(dir: &Path) -> Result<(SampleLog, Vec<Event>), ReadError> {
    let samples = read_samples(&dir.join(SAMPLES_CSV))?;
    let events = read_events(&dir.join(EVENTS_JSONL))?;
    Ok((samples, events))
}

/// `run.json`, checked for its version.
pub fn read_manifest(path: &Path) -> Result<crate::manifest::Manifest, ReadError> {
    crate::schema::read_json(path)
}

/// `summary.json`, checked for its version.
pub fn read_summary(path: &Path) -> Result<crate::Summary, ReadError> {
    let mut s: crate::Summary = crate::schema::read_json(path)?;
    if s.schema_version < crate::schema::VERDICT_SINCE {
        crate::verdict::judge_older(&mut s);
    }
    Ok(s)
}

/// Read `groups.csv`, if the run has one: each scan's group voltages and
/// temperature inputs. A truncated last line is dropped.
pub fn read_groups(dir: &Path) -> Result<Option<Vec<model::groups::GroupSample>>, ReadError> {
    let path = dir.join(crate::GROUPS_CSV);
    let bytes = match std::fs::read(&path) {
        Ok(b) => b,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(error) => return Err(ReadError::Io { path, error }),
    };
    let end = bytes
        .iter()
        .rposition(|&b| b == b'\n')
        .map(|p| p + 1)
        .unwrap_or(0);
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_reader(&bytes[..end]);
    let bad = |line: usize, column: usize, message: String| ReadError::Bad {
        path: path.clone(),
        line,
        column,
        message,
    };
    let headers = rdr.headers().map_err(|e| bad(1, 1, e.to_string()))?.clone();
    let groups = headers.iter().filter(|h| h.starts_with("group_")).count();
    let temps = headers
        .iter()
        .filter(|h| h.starts_with("temperature_"))
        .count();
    if headers.len() != 4 + groups + temps {
        return Err(bad(
            1,
            1,
            "expected t_s, step, cycle, group_N_v…, temperature_N_c…, inferred_group".into(),
        ));
    }
    let mut out = Vec::new();
    for (i, rec) in rdr.records().enumerate() {
        let line = i + 2;
        let rec = rec.map_err(|e| bad(line, 1, e.to_string()))?;
        if rec.len() != headers.len() {
            return Err(bad(
                line,
                1,
                format!("{} fields, expected {}", rec.len(), headers.len()),
            ));
        }
        let num = |k: usize| -> Result<f64, ReadError> {
            field(&rec, k).parse::<f64>().map_err(|_| {
                bad(
                    line,
                    k + 1,
                    format!("'{}': expected a number", field(&rec, k)),
                )
            })
        };
        let int = |k: usize| -> Result<u32, ReadError> {
            field(&rec, k).parse::<u32>().map_err(|_| {
                bad(
                    line,
                    k + 1,
                    format!("'{}': expected a whole number", field(&rec, k)),
                )
            })
        };
        let voltage_v = (0..groups)
            .map(|k| num(3 + k))
            .collect::<Result<Vec<_>, _>>()?;
        let temperature_c = (0..temps)
            .map(|k| {
                let c = 3 + groups + k;
                if field(&rec, c).is_empty() {
                    Ok(None)
                } else {
                    num(c).map(Some)
                }
            })
            .collect::<Result<Vec<_>, _>>()?;
        let last = headers.len() - 1;
        out.push(model::groups::GroupSample {
            t_s: num(0)?,
            step: int(1)?,
            cycle: int(2)?,
            voltage_v,
            temperature_c,
            inferred: if field(&rec, last).is_empty() {
                None
            } else {
                Some(int(last)?)
            },
        });
    }
    Ok(Some(out))
}

/// A pack's own Peukert exponent (`peukert.toml`), if it has one: a file
/// that does not read is an error with its place, not a silent default.
pub fn read_peukert(pack_dir: &Path) -> Result<Option<f64>, ReadError> {
    let path = pack_dir.join(crate::PEUKERT_TOML);
    let text = match std::fs::read_to_string(&path) {
        Ok(t) => t,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(error) => return Err(ReadError::Io { path, error }),
    };
    #[derive(serde::Deserialize)]
    struct File {
        exponent: f64,
    }
    let f: File = toml::from_str(&text).map_err(|e| {
        let loc = model::location::Location::of_span(&path, &text, &e.span().unwrap_or(0..0));
        ReadError::Bad {
            path: path.clone(),
            line: loc.line,
            column: loc.column,
            message: e.message().to_string(),
        }
    })?;
    if !(f.exponent.is_finite() && (1.0..=2.0).contains(&f.exponent)) {
        return Err(ReadError::Bad {
            path,
            line: 1,
            column: 1,
            message: format!("exponent {}: expected 1.0 to 2.0", f.exponent),
        });
    }
    Ok(Some(f.exponent))
}
