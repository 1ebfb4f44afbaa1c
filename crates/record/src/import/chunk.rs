//! One chunk of whole lines parsed into rows: the numbers of a plain
//! line are read in the same pass that finds its commas (the fast path);
//! a line with anything else in it (a quote, blanks around a cell, an
//! exponent, a date, a missing cell) goes the general way, which gives
//! the same numbers and names the bad cell. Chunks are parsed on several
//! threads at once, so lines are counted within the chunk and the reader
//! adds the lines before it.

use super::format::{Cols, LogFormat, Row};
use crate::error::ReadError;

/// A cell's bytes without surrounding blanks.
pub(crate) fn trim(b: &[u8]) -> &[u8] {
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

/// The largest magnitude a log's voltage may have, V: beyond any pack a
/// bench tests (traction packs reach about 1000 V; bench supplies stop
/// near 1500 V). Common practice, rounded up.
pub const PLAUSIBLE_V: (f64, &str) = (2000.0, "voltage, V");
/// The largest time magnitude, s: 300 years, so a log timed by the
/// calendar (seconds since 1970, about 1.7e9) reads, and differences of
/// times stay finite.
pub const PLAUSIBLE_S: (f64, &str) = (1e10, "time, s");
/// The largest current magnitude, A: beyond any bench load or supply.
pub const PLAUSIBLE_A: (f64, &str) = (10_000.0, "current, A");
/// The largest temperature magnitude, degC: beyond any cell that is still
/// a cell.
pub const PLAUSIBLE_C: (f64, &str) = (300.0, "temperature, degC");

/// Whether a row's values are inside the plausibility bounds (the fast
/// path sends any other line the general way, which says what is wrong).
#[inline]
fn plausible(r: &Row) -> bool {
    r.t_s.abs() <= PLAUSIBLE_S.0
        && r.voltage_v.abs() <= PLAUSIBLE_V.0
        && r.current_a.abs() <= PLAUSIBLE_A.0
        && r.temperature_c.is_none_or(|t| t.abs() <= PLAUSIBLE_C.0)
}

#[inline]
pub(crate) fn parse_row<'r, G: Fn(usize) -> &'r [u8], B: Fn(u64, usize, String) -> ReadError>(
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
            .and_then(|t| super::format::parse_time(t, fmt.time_unit)),
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
    let within = |i: usize, x: f64, (bound, what): (f64, &str)| -> Result<f64, ReadError> {
        if x.abs() <= bound {
            Ok(x)
        } else {
            Err(bad(
                l,
                i + 1,
                format!(
                    "'{}' is beyond any plausible {what} (at most {bound} in magnitude)",
                    cell_text(i)
                ),
            ))
        }
    };
    let t_s = within(cols.time, t_s, PLAUSIBLE_S)?;
    let voltage_v = within(
        cols.voltage,
        num(cols.voltage, "a voltage (a finite number)")?,
        PLAUSIBLE_V,
    )?;
    // (+ 0.0 turns a negated zero into a plain one.)
    let current_a =
        sign * within(
            cols.current,
            num(cols.current, "a current (a finite number)")?,
            PLAUSIBLE_A,
        )? + 0.0;
    let temperature_c = match cols.temperature {
        Some(i) if !cell_bytes(i).is_empty() => Some(within(
            i,
            num(i, "a temperature (a finite number)")?,
            PLAUSIBLE_C,
        )?),
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

/// What a field of a line holds, for the fast path.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Role {
    Skip,
    Time,
    Voltage,
    Current,
    Temperature,
    Step,
    Cycle,
}

/// Rows parsed from one chunk of whole lines.
#[derive(Debug, Default)]
pub(crate) struct Parsed {
    pub rows: Vec<Row>,
    /// The lines that did not parse, in order: how many rows come before
    /// each, and its error, its line counted from 1 at the chunk's start.
    pub bad: Vec<(usize, ReadError)>,
    /// Line ends in the chunk.
    pub lines: u64,
}

/// Parses chunks of one log: the columns' roles, the format, and buffers
/// reused from line to line.
pub(crate) struct ChunkParser<'a, B> {
    cols: &'a Cols,
    fmt: &'a LogFormat,
    sign: f64,
    bad: &'a B,
    /// The role of each field up to the last one used; empty when two
    /// roles share a column (then every line goes the general way).
    roles: Vec<Role>,
    ncols: usize,
    nfields: usize,
    delim: u8,
    spans: Vec<(usize, usize)>,
    quoted: csv::ByteRecord,
}

impl<'a, B: Fn(u64, usize, String) -> ReadError> ChunkParser<'a, B> {
    pub(crate) fn new(cols: &'a Cols, fmt: &'a LogFormat, sign: f64, bad: &'a B) -> Self {
        let ncols = cols.count();
        let mut roles = vec![Role::Skip; ncols];
        let mut clash = false;
        let mut set = |i: Option<usize>, r: Role| {
            if let Some(i) = i {
                clash |= roles[i] != Role::Skip;
                roles[i] = r;
            }
        };
        set(Some(cols.time), Role::Time);
        set(Some(cols.voltage), Role::Voltage);
        set(Some(cols.current), Role::Current);
        set(cols.temperature, Role::Temperature);
        set(cols.step, Role::Step);
        set(cols.cycle, Role::Cycle);
        if clash {
            roles.clear();
        }
        ChunkParser {
            cols,
            fmt,
            sign,
            bad,
            roles,
            ncols,
            nfields: cols.nfields,
            delim: cols.delim,
            spans: Vec::with_capacity(ncols),
            quoted: csv::ByteRecord::new(),
        }
    }

    /// Parse a chunk that ends at a line end (or is empty).
    pub(crate) fn parse(&mut self, data: &[u8], mut rows: Vec<Row>) -> Parsed {
        rows.clear();
        rows.reserve(data.len() / 24);
        let mut out = Parsed {
            rows,
            ..Parsed::default()
        };
        let mut start = 0;
        while start < data.len() {
            if let Some((row, next)) = self.fast_row(data, start) {
                out.lines += 1;
                out.rows.push(row);
                start = next;
                continue;
            }
            let Some(end) = memchr::memchr(b'\n', &data[start..]).map(|e| start + e) else {
                break;
            };
            out.lines += 1;
            let b = if end > start && data[end - 1] == b'\r' {
                end - 1
            } else {
                end
            };
            let l = &data[start..b];
            start = end + 1;
            if !l.iter().all(u8::is_ascii_whitespace) {
                match self.general_row(l, out.lines) {
                    Ok(row) => out.rows.push(row),
                    Err(e) => out.bad.push((out.rows.len(), e)),
                }
            }
        }
        out
    }

    /// The plain line at `start`, read in one pass that also finds its
    /// end: its row and where the next line starts. `None` sends the line
    /// the general way. Gives the same doubles as [`parse_row`]: the same
    /// integer over the same exact power of ten.
    #[inline]
    fn fast_row(&self, data: &[u8], start: usize) -> Option<(Row, usize)> {
        if self.roles.is_empty() || self.delim != b',' {
            return None;
        }
        let b = &data[start..];
        // Each decimal as its signed integer and its power of ten, divided
        // all at once after the line (the four divisions go two by two).
        let mut num = [0.0f64; 4];
        let mut den = [1.0f64; 4];
        let mut has_temperature = false;
        let (mut step, mut cycle) = (None, None);
        let mut p = 0;
        let last = self.roles.len() - 1;
        for (k, role) in self.roles.iter().enumerate() {
            let rest = &b[p..];
            let used = match role {
                Role::Skip => {
                    let n = rest
                        .iter()
                        .position(|&c| matches!(c, b',' | b'\n' | b'\r' | b'"'))
                        .unwrap_or(rest.len());
                    if rest.get(n) == Some(&b'"') {
                        return None;
                    }
                    n
                }
                Role::Time => plain_decimal(rest, &mut num[0], &mut den[0])?,
                Role::Voltage => plain_decimal(rest, &mut num[1], &mut den[1])?,
                Role::Current => plain_decimal(rest, &mut num[2], &mut den[2])?,
                Role::Temperature => match rest.first() {
                    Some(b',' | b'\n' | b'\r') => 0,
                    _ => {
                        has_temperature = true;
                        plain_decimal(rest, &mut num[3], &mut den[3])?
                    }
                },
                Role::Step => plain_count(rest, &mut step)?,
                Role::Cycle => plain_count(rest, &mut cycle)?,
            };
            p += used;
            if k < last {
                if b.get(p) != Some(&b',') {
                    return None;
                }
                p += 1;
            }
        }
        // Fields after the last one used are not read, but counted: a
        // line with more or fewer fields than the header goes the general
        // way, which refuses it with its place.
        let (next, fields) = match b.get(p)? {
            b'\n' => (p + 1, self.roles.len()),
            b'\r' if b.get(p + 1) == Some(&b'\n') => (p + 2, self.roles.len()),
            b',' => {
                let end = p + memchr::memchr(b'\n', &b[p..])?;
                let rest = &b[p..end];
                if memchr::memchr(b'"', rest).is_some() {
                    return None;
                }
                (
                    end + 1,
                    self.roles.len() + memchr::memchr_iter(b',', rest).count(),
                )
            }
            _ => return None,
        };
        if fields != self.nfields {
            return None;
        }
        // (−m)/10^k is −(m/10^k) exactly: division rounds symmetrically.
        let x: [f64; 4] = std::array::from_fn(|k| num[k] / den[k]);
        let row = Row {
            t_s: x[0] * self.fmt.time_unit.factor(),
            voltage_v: x[1],
            // (+ 0.0 turns a negated zero into a plain one, as parse_row.)
            current_a: self.sign * x[2] + 0.0,
            temperature_c: has_temperature.then_some(x[3]),
            step,
            cycle,
        };
        if !plausible(&row) {
            return None;
        }
        Some((row, start + next))
    }

    /// Any other line: quoted (parsed whole by the csv reader), or split
    /// on commas, then each cell read by [`parse_row`].
    fn general_row(&mut self, l: &[u8], line: u64) -> Result<Row, ReadError> {
        let (cols, fmt, sign, bad) = (self.cols, self.fmt, self.sign, self.bad);
        let (nfields, delim) = (self.nfields, self.delim);
        let count_error = |found: usize, column: usize| {
            bad(
                line,
                column,
                format!(
                    "expected {nfields} fields as the header has, found {found}{}",
                    if found > nfields && delim == b',' {
                        " (a decimal comma in a number? give the log with decimal points, or --skip-bad-rows to leave such rows out)"
                    } else {
                        ""
                    }
                ),
            )
        };
        if memchr::memchr(b'"', l).is_some() {
            let mut r = csv::ReaderBuilder::new()
                .has_headers(false)
                .flexible(true)
                .delimiter(delim)
                .from_reader(l);
            return match r.read_byte_record(&mut self.quoted) {
                Ok(_) => {
                    let q = &self.quoted;
                    if q.len() != nfields {
                        return Err(count_error(q.len(), 1));
                    }
                    let get = |i: usize| q.get(i).unwrap_or(b"");
                    parse_row(&get, cols, fmt, sign, line, bad)
                }
                Err(e) => Err(bad(line, 1, e.to_string())),
            };
        }
        // A log split on semicolons or tabs may write its decimals with a
        // comma: read them as points.
        let owned;
        let l = if delim != b',' && memchr::memchr(b',', l).is_some() {
            owned = l
                .iter()
                .map(|&c| if c == b',' { b'.' } else { c })
                .collect::<Vec<u8>>();
            &owned[..]
        } else {
            l
        };
        let found = 1 + memchr::memchr_iter(delim, l).count();
        if found != nfields {
            // Where the first field too many starts, or the line's end.
            let column = if found > nfields {
                memchr::memchr_iter(delim, l)
                    .nth(nfields - 1)
                    .map_or(l.len() + 1, |p| p + 2)
            } else {
                l.len() + 1
            };
            return Err(count_error(found, column));
        }
        self.spans.clear();
        let mut a = 0;
        for c in memchr::memchr_iter(delim, l) {
            if self.spans.len() == self.ncols {
                break;
            }
            self.spans.push((a, c));
            a = c + 1;
        }
        if self.spans.len() < self.ncols {
            self.spans.push((a, l.len()));
        }
        let spans = &self.spans;
        let get = |i: usize| spans.get(i).map_or(&b""[..], |&(x, y)| &l[x..y]);
        parse_row(&get, cols, fmt, sign, line, bad)
    }
}

/// A plain decimal (`-12.345`, at most 15 digits) at the start of `b`
/// (the caller checks what ends it): its digits as a signed integer in `num`
/// and its power of ten in `den` (the value is `num / den`), with the
/// bytes it took.
#[inline(always)]
fn plain_decimal(b: &[u8], num: &mut f64, den: &mut f64) -> Option<usize> {
    let neg = b.first() == Some(&b'-');
    let start = usize::from(neg);
    let mut m = 0u64;
    let mut p = start + digit_run(b, start, &mut m);
    let mut nd = p - start;
    let mut frac = 0;
    if b.get(p) == Some(&b'.') {
        p += 1;
        frac = digit_run(b, p, &mut m);
        p += frac;
        nd += frac;
    }
    if nd == 0 || nd > 15 {
        return None;
    }
    // m < 10^15 < 2^53: exact as a double, as is the power of ten.
    let y = m as i64 as f64;
    *num = if neg { -y } else { y };
    *den = POW10[frac];
    Some(p)
}

/// The run of ASCII digits at `p` in `b`, appended to `m` (wrapping: a
/// caller refuses more than 15 digits); its length.
#[inline(always)]
fn digit_run(b: &[u8], mut p: usize, m: &mut u64) -> usize {
    let start = p;
    while let Some(&c) = b.get(p) {
        let d = c.wrapping_sub(b'0');
        if d > 9 {
            break;
        }
        *m = m.wrapping_mul(10).wrapping_add(u64::from(d));
        p += 1;
    }
    p - start
}

/// A plain count (at most 9 digits) at the start of `b` (the caller
/// checks what ends it).
#[inline(always)]
fn plain_count(b: &[u8], x: &mut Option<u32>) -> Option<usize> {
    let mut v = 0u32;
    let mut n = 0;
    while let Some(&c) = b.get(n) {
        let d = c.wrapping_sub(b'0');
        if d > 9 || n == 9 {
            break;
        }
        v = v * 10 + u32::from(d);
        n += 1;
    }
    if n == 0 || b.get(n).is_some_and(u8::is_ascii_digit) {
        return None;
    }
    *x = Some(v);
    Some(n)
}

#[cfg(test)]
mod tests {
    use super::*;

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

    fn three_columns() -> Cols {
        Cols {
            time: 0,
            voltage: 1,
            current: 2,
            temperature: None,
            step: None,
            cycle: None,
            nfields: 3,
            delim: b',',
        }
    }

    fn bad(line: u64, column: usize, message: String) -> ReadError {
        ReadError::Bad {
            path: std::path::PathBuf::from("t.csv"),
            line: line as usize,
            column,
            message,
        }
    }

    /// One chunk: plain, quoted, blank and CR LF lines, a short line and a
    /// long one; lines counted from the chunk's start, a bad line placed
    /// among the rows where it stood.
    #[test]
    fn a_chunk_gives_every_row_and_each_bad_line_in_place() {
        let cols = three_columns();
        let fmt = LogFormat::default();
        let mut p = ChunkParser::new(&cols, &fmt, 1.0, &bad);
        let data = b"1,3.7,0.5\r\n\n2,3.6,\"-1\"\n3,3.5,-1\n  \n4,3.4,-1,extra\n5,3.3\n6,3.2,-1\n";
        let out = p.parse(data, Vec::new());
        assert_eq!(out.lines, 8);
        let ok: Vec<(f64, f64, f64)> = out
            .rows
            .iter()
            .map(|r| (r.t_s, r.voltage_v, r.current_a))
            .collect();
        assert_eq!(
            ok,
            [
                (1.0, 3.7, 0.5),
                (2.0, 3.6, -1.0),
                (3.0, 3.5, -1.0),
                (6.0, 3.2, -1.0)
            ]
        );
        // A line with a field too many (a decimal comma shifts every
        // column after it) and a short line are errors at their own lines,
        // after three rows: the first at the field too many, the second at
        // the line's end.
        assert_eq!(out.bad.len(), 2);
        match &out.bad[0] {
            (
                3,
                ReadError::Bad {
                    line,
                    column,
                    message,
                    ..
                },
            ) => {
                assert_eq!((*line, *column), (6, 10));
                assert!(message.contains("expected 3 fields"), "{message}");
            }
            other => panic!("{other:?}"),
        }
        match &out.bad[1] {
            (3, ReadError::Bad { line, column, .. }) => assert_eq!((*line, *column), (7, 6)),
            other => panic!("{other:?}"),
        }
    }

    /// A column given two roles is read the general way, and gives what
    /// the general way gives.
    #[test]
    fn two_roles_on_one_column_take_the_general_way() {
        let cols = Cols {
            temperature: Some(1),
            ..three_columns()
        };
        let fmt = LogFormat::default();
        let mut p = ChunkParser::new(&cols, &fmt, 1.0, &bad);
        assert!(p.roles.is_empty());
        let out = p.parse(b"1,25.5,2\n", Vec::new());
        assert_eq!(out.rows[0].temperature_c, Some(25.5));
        assert_eq!(out.rows[0].voltage_v, 25.5);
    }

    fn general(p: &mut ChunkParser<'_, fn(u64, usize, String) -> ReadError>, l: &[u8]) -> String {
        format!("{:?}", p.general_row(l, 1).map(|r| format!("{r:?}")))
    }

    proptest::proptest! {
        #![proptest_config(proptest::prelude::ProptestConfig::with_cases(2000))]
        /// The fast path, wherever it takes a line, gives the very row the
        /// general way gives (bit for bit: Debug prints every digit).
        #[test]
        fn the_fast_path_agrees_with_the_general_way(
            cells in proptest::collection::vec(
                proptest::prop_oneof![
                    12 => "-?[0-9]{1,8}(\\.[0-9]{0,9})?",
                    1 => "[0-9]{1,20}",
                    6 => "[0-9]{1,3}",
                    1 => "",
                    1 => " 1.5",
                    1 => "2e3",
                    1 => "\\+4",
                    1 => "\"7\"",
                    1 => "x",
                ],
                0..8,
            ),
            sign in proptest::prop_oneof![proptest::strategy::Just(1.0), proptest::strategy::Just(-1.0)],
            unit in proptest::prop_oneof![
                proptest::strategy::Just(super::super::format::TimeUnit::Seconds),
                proptest::strategy::Just(super::super::format::TimeUnit::Milliseconds),
            ],
        ) {
            let cols = Cols { temperature: Some(4), step: Some(3), cycle: Some(5), nfields: 6, ..three_columns() };
            let fmt = LogFormat { time_unit: unit, ..LogFormat::default() };
            let bad_fn: fn(u64, usize, String) -> ReadError = bad;
            let mut p = ChunkParser::new(&cols, &fmt, sign, &bad_fn);
            let line = cells.join(",");
            // The next line follows (the fast path finds the line end
            // itself) and must not be taken.
            let data = format!("{line}\n12345678,9.87654321,0\n");
            if let Some((fast, next)) = p.fast_row(data.as_bytes(), 0) {
                proptest::prop_assert_eq!(next, line.len() + 1);
                let want = general(&mut p, line.as_bytes());
                proptest::prop_assert_eq!(format!("{:?}", Ok::<String, ()>(format!("{fast:?}"))), want, "{}", line);
            }
        }
    }

    /// The fast path takes the plain lines it is for (its reason to be:
    /// speed), with their values and where the next line starts, and sends
    /// the others the general way: a quoted cell, a field too many or too
    /// few, an implausible value, a line with no end yet.
    #[test]
    fn the_fast_path_takes_plain_lines() {
        let cols = Cols {
            temperature: Some(4),
            step: Some(3),
            cycle: Some(5),
            nfields: 7,
            ..three_columns()
        };
        let fmt = LogFormat::default();
        let bad_fn: fn(u64, usize, String) -> ReadError = bad;
        let p = ChunkParser::new(&cols, &fmt, -1.0, &bad_fn);
        let take = |line: &str| p.fast_row(line.as_bytes(), 0);
        let (r, next) = take("12.5,3.700,-1.25,7,25.5,2,bay 3\nrest").unwrap();
        assert_eq!(next, "12.5,3.700,-1.25,7,25.5,2,bay 3\n".len());
        assert_eq!((r.t_s, r.voltage_v, r.current_a), (12.5, 3.7, 1.25));
        assert_eq!(
            (r.temperature_c, r.step, r.cycle),
            (Some(25.5), Some(7), Some(2))
        );
        // CR LF, an empty temperature, a last field skipped.
        let (r, next) = take("1,3.6,0,12,,3,x\r\n").unwrap();
        assert_eq!(
            (next, r.temperature_c, r.step, r.current_a.to_bits()),
            (17, None, Some(12), 0f64.to_bits())
        );
        // Taken at an offset in a chunk.
        let data = b"junk\n2,3.5,1,1,20,1,y\n";
        let (r, next) = p.fast_row(data, 5).unwrap();
        assert_eq!((r.t_s, next), (2.0, data.len()));
        for line in [
            "1,3.6,0,1,20,1,\"q\"\n",
            "1,3.6,0,1,20,1\n",
            "1,3.6,0,1,20,1,x,y\n",
            "1,3000,0,1,20,1,x\n",
            "1,3.6,0,1,20,1,x",
            "1,3.6,0,1,20,1,x\r",
            "1;3.6;0;1;20;1;x\n",
            "1,3.6,0,1234567890,20,1,x\n",
        ] {
            assert!(take(line).is_none(), "{line:?}");
        }
    }
}
