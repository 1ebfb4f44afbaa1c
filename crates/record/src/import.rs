//! Reading a log as a stream of rows: ours (`samples.csv`) or any bench's
//! CSV, with its columns named or recognised, its current sign and its
//! time unit. One row at a time, one reused buffer: memory does not grow
//! with the file. A last line without its newline (a crash, a copy cut
//! short) is left out and reported; a row that does not parse is an error
//! with file, line and column, or with `skip_bad_rows` a counted skip.

use super::read::ReadError;
use std::io::Read;
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
    fn symbol(self) -> &'static str {
        match self {
            TimeUnit::Seconds => "s",
            TimeUnit::Milliseconds => "ms",
            TimeUnit::Minutes => "min",
            TimeUnit::Hours => "h",
        }
    }

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
fn parse_time(s: &str, unit: TimeUnit) -> Option<f64> {
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

/// Bytes read at a time.
const CHUNK: usize = 1 << 20;

/// A cell's bytes without surrounding blanks.
fn trim(b: &[u8]) -> &[u8] {
    match (b.first(), b.last()) {
        (Some(f), Some(l)) if !f.is_ascii_whitespace() && !l.is_ascii_whitespace() => b,
        _ => {
            let start = b
                .iter()
                .position(|c| !c.is_ascii_whitespace())
                .unwrap_or(b.len());
            let end = b
                .iter()
                .rposition(|c| !c.is_ascii_whitespace())
                .map_or(start, |e| e + 1);
            &b[start..end]
        }
    }
}

/// Powers of ten exactly representable as f64.
const POW10: [f64; 23] = [
    1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11, 1e12, 1e13, 1e14, 1e15, 1e16,
    1e17, 1e18, 1e19, 1e20, 1e21, 1e22,
];

/// A finite number from a cell's bytes. Plain decimals (`-12.345`, at
/// most 15 digits) take the exact fast path: an integer below 2^53 over an
/// exact power of ten is one correctly rounded division, so the result is
/// the same double a full parser gives (Clinger's fast path); anything
/// else (exponents, long mantissas) goes to a full parser.
pub fn number(b: &[u8]) -> Option<f64> {
    let (neg, digits) = match b.first() {
        Some(b'-') => (true, &b[1..]),
        Some(b'+') => (false, &b[1..]),
        _ => (false, b),
    };
    let mut m: u64 = 0;
    let mut frac = 0usize;
    let mut nd = 0usize;
    let mut dot = false;
    for &c in digits {
        match c {
            b'0'..=b'9' => {
                m = m * 10 + (c - b'0') as u64;
                nd += 1;
                if dot {
                    frac += 1;
                }
                if nd > 15 {
                    return full_number(b);
                }
            }
            b'.' if !dot => dot = true,
            _ => return full_number(b),
        }
    }
    if nd == 0 {
        return None;
    }
    let x = m as f64 / POW10[frac];
    Some(if neg { -x } else { x })
}

fn full_number(b: &[u8]) -> Option<f64> {
    match fast_float2::parse::<f64, _>(b) {
        Ok(x) if x.is_finite() => Some(x),
        _ => None,
    }
}

#[inline]
fn parse_row<'r, G: Fn(usize) -> &'r [u8], B: Fn(u64, usize, String) -> ReadError>(
    rec: &G,
    cols: &Cols,
    fmt: &LogFormat,
    sign: f64,
    l: u64,
    bad: &B,
) -> Result<Row, ReadError> {
    let cell_bytes = |i: usize| trim(rec(i));
    let cell_text = |i: usize| String::from_utf8_lossy(cell_bytes(i)).into_owned();
    let num = |i: usize, what: &str| -> Result<f64, ReadError> {
        number(cell_bytes(i))
            .ok_or_else(|| bad(l, i + 1, format!("'{}' is not {what}", cell_text(i))))
    };
    let t_b = cell_bytes(cols.time);
    let t_s = match number(t_b) {
        Some(x) => Some(x * fmt.time_unit.factor()),
        None => std::str::from_utf8(t_b)
            .ok()
            .and_then(|t| parse_time(t, fmt.time_unit)),
    }
    .ok_or_else(|| {
        bad(
            l,
            cols.time + 1,
            format!(
                "'{}' is not a time (a number, or a date and time)",
                cell_text(cols.time)
            ),
        )
    })?;
    let voltage_v = num(cols.voltage, "a voltage (a finite number)")?;
    // (+ 0.0 turns a negated zero into a plain one.)
    let current_a = sign * num(cols.current, "a current (a finite number)")? + 0.0;
    let temperature_c = match cols.temperature {
        Some(i) if !cell_bytes(i).is_empty() => Some(num(i, "a temperature (a finite number)")?),
        _ => None,
    };
    let int = |i: usize, what: &str| -> Result<u32, ReadError> {
        let b = cell_bytes(i);
        let plain = (!b.is_empty() && b.len() <= 9 && b.iter().all(u8::is_ascii_digit))
            .then(|| b.iter().fold(0u32, |a, d| a * 10 + (d - b'0') as u32));
        plain
            .or_else(|| {
                number(b)
                    .filter(|x| x.fract() == 0.0 && *x >= 0.0 && *x < 4e9)
                    .map(|x| x as u32)
            })
            .ok_or_else(|| bad(l, i + 1, format!("'{}' is not {what}", cell_text(i))))
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
}

/// Read a log row by row. `f` gets each row in pack convention; times are
/// as in the file (seconds), not shifted.
///
/// Two threads: this one finds lines and fields ([`LineSplitter`]), the
/// caller's parses the numbers and analyses, chunk by chunk (a bounded
/// channel: memory stays a few chunks).
pub fn stream_log(
    path: &Path,
    fmt: &LogFormat,
    mut f: impl FnMut(Row),
) -> Result<ReadReport, ReadError> {
    let io = |source: std::io::Error| ReadError::Io {
        path: path.to_path_buf(),
        error: source,
    };
    let bad = move |line: u64, column: usize, message: String| ReadError::Bad {
        path: PathBuf::from(path),
        line: line as usize,
        column,
        message,
    };
    let mut file = std::fs::File::open(path).map_err(io)?;
    let (headers, mut carry) = read_header(&mut file, &io, &bad)?;
    let ours = headers.len() >= 5
        && headers
            .iter()
            .zip(super::CSV_COLUMNS.iter())
            .all(|(a, b)| a.trim() == *b);
    let cols = resolve_columns(&headers, fmt, ours, &bad)?;
    let fmt = &time_unit_of(&headers[cols.time], cols.time, fmt, &bad)?;
    let mut report = ReadReport {
        ours,
        columns_used: cols.used(&headers),
        ..ReadReport::default()
    };
    let sign = match fmt.sign {
        CurrentSign::ChargePositive => 1.0,
        CurrentSign::DischargePositive => -1.0,
    };
    let ncols = cols.count();
    let (tx, rx) = std::sync::mpsc::sync_channel::<Batch>(2);
    let mut handle = |l: u64, r: Result<Row, ReadError>| -> Result<(), ReadError> {
        match r {
            Ok(row) => {
                report.rows += 1;
                f(row);
                Ok(())
            }
            Err(e) if fmt.skip_bad_rows => {
                report.bad_rows_skipped += 1;
                if report.bad_rows.len() < 20 {
                    report.bad_rows.push((l, e.to_string()));
                }
                Ok(())
            }
            Err(e) => Err(e),
        }
    };
    let nheaders = headers.len();
    let outcome = std::thread::scope(|scope| {
        let cols = &cols;
        let bad = &bad;
        let parser = scope.spawn(move || -> Result<bool, ReadError> {
            let mut splitter = LineSplitter::new(cols, fmt, sign, bad);
            let mut buf = vec![0u8; CHUNK];
            loop {
                let n = file.read(&mut buf).map_err(io)?;
                if n == 0 {
                    // A foreign log's last line without its newline is
                    // taken when it is whole: every column of the header.
                    // (packbench ends every line it writes, so in its own
                    // log such a line was cut by a crash and is left out.)
                    if !ours && last_line_is_whole(&carry, nheaders) {
                        carry.push(b'\n');
                    }
                } else {
                    carry.extend_from_slice(&buf[..n]);
                }
                if let Some(end) = carry.iter().rposition(|&b| b == b'\n').map(|p| p + 1) {
                    let rest = carry.split_off(end);
                    let data = std::mem::replace(&mut carry, rest);
                    if tx.send(splitter.split_chunk(data)).is_err() {
                        return Ok(false);
                    }
                }
                if n == 0 {
                    break;
                }
            }
            // A last line without its newline (a crash, a copy cut short)
            // is left out and reported.
            Ok(!carry.iter().all(|b| b.is_ascii_whitespace()))
        });
        let mut result = Ok(());
        for batch in rx {
            if let Err(e) = batch.for_each_row(ncols, cols, fmt, sign, bad, &mut handle) {
                result = Err(e);
                break;
            }
        }
        (result, parser.join())
    });
    match outcome {
        (Err(e), _) => Err(e),
        (Ok(()), Ok(Ok(partial))) => {
            report.partial_last_line = partial;
            Ok(report)
        }
        (Ok(()), Ok(Err(e))) => Err(e),
        (Ok(()), Err(_)) => Err(bad(0, 0, "the log reader stopped unexpectedly".into())),
    }
}

/// The header line, read on its own (it may be quoted), and what was read
/// after it.
fn read_header<B: Fn(u64, usize, String) -> ReadError>(
    file: &mut std::fs::File,
    io: &impl Fn(std::io::Error) -> ReadError,
    bad: &B,
) -> Result<(Vec<String>, Vec<u8>), ReadError> {
    let mut carry: Vec<u8> = Vec::with_capacity(CHUNK + 4096);
    let header_end = loop {
        if let Some(p) = carry.iter().position(|&b| b == b'\n') {
            break p;
        }
        let mut buf = [0u8; 4096];
        let n = file.read(&mut buf).map_err(io)?;
        if n == 0 {
            break carry.len();
        }
        carry.extend_from_slice(&buf[..n]);
        if carry.len() > 1 << 20 {
            return Err(bad(
                1,
                1,
                "no line end in the first megabyte: not a CSV log".into(),
            ));
        }
    };
    let headers: Vec<String> = {
        let mut r = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .from_reader(&carry[..header_end]);
        let mut rec = csv::StringRecord::new();
        match r.read_record(&mut rec) {
            Ok(true) => rec
                .iter()
                .map(|h| h.trim_start_matches('\u{feff}').to_string())
                .collect(),
            Ok(false) => return Err(bad(1, 1, "the log is empty: expected a header line".into())),
            Err(e) => return Err(bad(1, 1, e.to_string())),
        }
    };
    carry.drain(..(header_end + 1).min(carry.len()));
    Ok((headers, carry))
}

/// Which column holds what: named by the format, else guessed from the
/// header; time, voltage and current must be found.
fn resolve_columns<B: Fn(u64, usize, String) -> ReadError>(
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
    })
}

/// A time header that names its unit (`time_min`, `time [h]`) is read in
/// it: the default `--time-unit s` gives way, another unit clashes.
fn time_unit_of<B: Fn(u64, usize, String) -> ReadError>(
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
    fn used(&self, headers: &[String]) -> Vec<(String, String)> {
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
    fn count(&self) -> usize {
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

/// The log reader's line splitter: one pass over a chunk of whole lines
/// (a SIMD search for commas, line ends and quotes), the field spans of
/// each plain line, blank lines skipped, CR LF taken as a line end. A line
/// with a quote is parsed whole by the csv reader; every third plain line
/// is parsed here, to share the work with the analysing thread.
struct LineSplitter<'a, B> {
    cols: &'a Cols,
    fmt: &'a LogFormat,
    sign: f64,
    bad: &'a B,
    ncols: usize,
    /// The file line of the last line split (the header is line 1).
    line: u64,
    quoted: csv::ByteRecord,
}

impl<'a, B: Fn(u64, usize, String) -> ReadError> LineSplitter<'a, B> {
    fn new(cols: &'a Cols, fmt: &'a LogFormat, sign: f64, bad: &'a B) -> Self {
        LineSplitter {
            cols,
            fmt,
            sign,
            bad,
            ncols: cols.count(),
            line: 1,
            quoted: csv::ByteRecord::new(),
        }
    }

    /// Split a chunk that ends at a line end.
    fn split_chunk(&mut self, data: Vec<u8>) -> Batch {
        let ncols = self.ncols;
        let mut batch = Batch {
            items: Vec::with_capacity(data.len() / 32),
            spans: Vec::with_capacity(data.len() / 64 * ncols),
            data: Vec::new(),
        };
        let mut line_start = 0usize;
        let mut field_start = 0usize;
        let mut base = 0usize;
        let mut quoted_line = false;
        for pos in memchr::memchr3_iter(b',', b'\n', b'"', &data) {
            match data[pos] {
                b',' => {
                    if !quoted_line && batch.spans.len() - base < ncols {
                        batch.spans.push((field_start as u32, pos as u32));
                    }
                    field_start = pos + 1;
                }
                b'"' => quoted_line = true,
                _ => {
                    self.line += 1;
                    let (a, mut b) = (line_start, pos);
                    if b > a && data[b - 1] == b'\r' {
                        b -= 1;
                    }
                    line_start = pos + 1;
                    field_start = pos + 1;
                    self.end_line(&mut batch, &data, base, (a, b), quoted_line);
                    base = batch.spans.len();
                    quoted_line = false;
                }
            }
        }
        batch.data = data;
        batch
    }

    /// Close the line `a..b` whose fields from `base` on are in the batch.
    #[inline(always)]
    fn end_line(
        &mut self,
        batch: &mut Batch,
        data: &[u8],
        base: usize,
        (a, b): (usize, usize),
        quoted_line: bool,
    ) {
        let (ncols, line) = (self.ncols, self.line);
        let l = &data[a..b];
        let blank = l.is_empty()
            || (l[0].is_ascii_whitespace() && l.iter().all(|c| c.is_ascii_whitespace()));
        if blank {
            batch.spans.truncate(base);
        } else if quoted_line {
            batch.spans.truncate(base);
            let mut r = csv::ReaderBuilder::new()
                .has_headers(false)
                .flexible(true)
                .from_reader(l);
            let row = match r.read_byte_record(&mut self.quoted) {
                Ok(_) => {
                    let q = &self.quoted;
                    let get = |i: usize| q.get(i).unwrap_or(b"");
                    parse_row(&get, self.cols, self.fmt, self.sign, line, self.bad)
                }
                Err(e) => Err((self.bad)(line, 1, e.to_string())),
            };
            batch.items.push(Item::Parsed(line, Box::new(row)));
        } else {
            let last_start = if batch.spans.len() > base {
                batch.spans[batch.spans.len() - 1].1 as usize + 1
            } else {
                a
            };
            if batch.spans.len() - base < ncols {
                batch.spans.push((last_start as u32, b as u32));
            }
            while batch.spans.len() - base < ncols {
                batch.spans.push((b as u32, b as u32));
            }
            if line % 3 == 0 {
                let spans = &batch.spans[base..];
                let get = |i: usize| {
                    spans
                        .get(i)
                        .map_or(&b""[..], |&(x, y)| &data[x as usize..y as usize])
                };
                let row = parse_row(&get, self.cols, self.fmt, self.sign, line, self.bad);
                batch.spans.truncate(base);
                batch.items.push(match row {
                    Ok(r) => Item::Row(line, r),
                    Err(e) => Item::Parsed(line, Box::new(Err(e))),
                });
            } else {
                batch.items.push(Item::Line(line));
            }
        }
    }
}

impl Batch {
    /// Hand each of the batch's rows to `f`, in order, parsed where the
    /// splitter left them; stops at `f`'s first error.
    fn for_each_row<B: Fn(u64, usize, String) -> ReadError>(
        self,
        ncols: usize,
        cols: &Cols,
        fmt: &LogFormat,
        sign: f64,
        bad: &B,
        f: &mut impl FnMut(u64, Result<Row, ReadError>) -> Result<(), ReadError>,
    ) -> Result<(), ReadError> {
        let mut k = 0;
        for item in self.items {
            match item {
                Item::Line(l) => {
                    let spans = &self.spans[k..k + ncols];
                    k += ncols;
                    let data = &self.data;
                    let get = |i: usize| {
                        spans
                            .get(i)
                            .map_or(&b""[..], |&(a, b)| &data[a as usize..b as usize])
                    };
                    f(l, parse_row(&get, cols, fmt, sign, l, bad))?
                }
                Item::Parsed(l, row) => f(l, *row)?,
                Item::Row(l, row) => f(l, Ok(row))?,
            }
        }
        Ok(())
    }
}

/// Whether what is left after the last newline is a whole row: not blank,
/// with as many fields as the header.
fn last_line_is_whole(rest: &[u8], nheaders: usize) -> bool {
    let line = rest.strip_suffix(b"\r").unwrap_or(rest);
    if line.iter().all(|b| b.is_ascii_whitespace()) {
        return false;
    }
    let mut r = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(line);
    let mut rec = csv::ByteRecord::new();
    matches!(r.read_byte_record(&mut rec), Ok(true))
        && rec.len() == nheaders
        && rec.iter().all(|f| !trim(f).is_empty())
}

/// Lines of one chunk, their field spans, for the analysing thread.
struct Batch {
    data: Vec<u8>,
    /// `ncols` spans per split line, in order.
    spans: Vec<(u32, u32)>,
    items: Vec<Item>,
}

enum Item {
    /// A line split on commas (its spans are the next `ncols`).
    Line(u64),
    /// A quoted line, parsed whole, or a line that did not parse.
    Parsed(u64, Box<Result<Row, ReadError>>),
    /// A line parsed by the reading thread.
    Row(u64, Row),
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The line splitter on its own: plain, quoted, blank and CR LF lines,
    /// a short line and a long one, line numbers counted from the header.
    #[test]
    fn the_line_splitter_finds_every_line_and_field() {
        let cols = Cols {
            time: 0,
            voltage: 1,
            current: 2,
            temperature: None,
            step: None,
            cycle: None,
        };
        let fmt = LogFormat::default();
        let bad = |line: u64, column: usize, message: String| ReadError::Bad {
            path: PathBuf::from("t.csv"),
            line: line as usize,
            column,
            message,
        };
        let mut s = LineSplitter::new(&cols, &fmt, 1.0, &bad);
        assert_eq!(s.ncols, 3);
        let data = b"1,3.7,0.5\r\n\n2,3.6,\"-1\"\n3,3.5,-1\n  \n4,3.4,-1,extra\n5,3.3\n".to_vec();
        let collect = |batch: Batch| {
            let mut rows: Vec<(u64, Result<Row, ReadError>)> = Vec::new();
            batch
                .for_each_row(3, &cols, &fmt, 1.0, &bad, &mut |l, r| {
                    rows.push((l, r));
                    Ok(())
                })
                .unwrap();
            rows
        };
        let rows = collect(s.split_chunk(data));
        let lines: Vec<u64> = rows.iter().map(|(l, _)| *l).collect();
        assert_eq!(lines, [2, 4, 5, 7, 8], "blank lines 3 and 6 left out");
        let ok: Vec<(f64, f64, f64)> = rows
            .iter()
            .filter_map(|(_, r)| r.as_ref().ok())
            .map(|r| (r.t_s, r.voltage_v, r.current_a))
            .collect();
        assert_eq!(
            ok,
            [
                (1.0, 3.7, 0.5),
                (2.0, 3.6, -1.0),
                (3.0, 3.5, -1.0),
                (4.0, 3.4, -1.0)
            ]
        );
        // The short line is an error at its own line, not a shifted row.
        match &rows[4].1 {
            Err(ReadError::Bad { line, .. }) => assert_eq!(*line, 8),
            other => panic!("{other:?}"),
        }
        // The next chunk goes on counting.
        let more: Vec<u64> = collect(s.split_chunk(b"6,3.2,-1\n".to_vec()))
            .into_iter()
            .map(|(l, _)| l)
            .collect();
        assert_eq!(more, [9]);
    }

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
    fn the_fast_number_path_gives_the_same_doubles_as_a_full_parser() {
        let mut state: u64 = 99;
        for _ in 0..200_000 {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let x = (state >> 11) as f64 / (1u64 << 53) as f64 * 2000.0 - 1000.0;
            for d in [0usize, 1, 3, 4, 6, 9, 12] {
                let text = format!("{x:.d$}");
                let want: f64 = text.parse().unwrap();
                assert_eq!(
                    number(text.as_bytes()).map(f64::to_bits),
                    Some(want.to_bits()),
                    "{text}"
                );
            }
        }
        for t in [
            "1e3",
            "-2.5E-01",
            "+7",
            "0.1234567890123456789",
            "123456789012345678",
        ] {
            assert_eq!(number(t.as_bytes()), Some(t.parse::<f64>().unwrap()), "{t}");
        }
        for t in ["", "-", ".", "1.2.3", "12V", "nan", "inf", "1e400"] {
            assert_eq!(number(t.as_bytes()), None, "{t}");
        }
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
