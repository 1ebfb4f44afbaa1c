//! Reading a log as a stream of rows: ours (`samples.csv`) or any bench's
//! CSV, with its columns named or recognised, its current sign and its
//! time unit. A row that does not parse is an error with file, line and
//! column, or with `skip_bad_rows` a counted skip. A last line without
//! its newline (a crash, a copy cut short) is left out and reported.
//!
//! The file is read in chunks of whole lines; the chunks are parsed on
//! every core at once ([`chunk`]) and handed to the caller in file order.
//! A fixed number of chunks is in flight, so memory does not grow with
//! the file; a line is at most [`MAX_LINE`] bytes (a binary file, or one
//! without line ends, is refused rather than read whole). Line ends may be
//! LF, CR LF, or CR alone.

mod chunk;
mod format;
#[cfg(test)]
mod reference;

use crate::error::ReadError;
use chunk::{trim, ChunkParser, Parsed};
use format::{resolve_columns, time_unit_of};
use std::collections::BTreeMap;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::sync::mpsc::{channel, Receiver, TryRecvError};
use std::sync::{Condvar, Mutex};

pub use chunk::number;
pub use format::{
    detect_delimiter, parse_delimiter, ColumnNames, CurrentSign, LogFormat, Row, TimeUnit,
};

/// Bytes read at a time: one chunk of lines.
const CHUNK: usize = 1 << 19;

/// Chunks read and not yet handed to the caller, at most.
const IN_FLIGHT: usize = 6;

/// The longest line read, in bytes.
pub const MAX_LINE: usize = 1 << 20;

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

/// Read a log row by row. `f` gets each row in pack convention, in file
/// order; times are as in the file (seconds), not shifted.
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
    let (headers, carry, cr_only, delim) = read_header(&mut file, fmt.delimiter, &io, &bad)?;
    let ours = headers.len() >= 5
        && headers
            .iter()
            .zip(super::CSV_COLUMNS.iter())
            .all(|(a, b)| a.trim() == *b);
    let mut cols = resolve_columns(&headers, fmt, ours, &bad)?;
    cols.delim = delim;
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
    let shared = Shared {
        source: Mutex::new(Source {
            file,
            carry,
            cr_only,
            ours,
            nheaders: headers.len(),
            delim,
            seq: 0,
            done: false,
            partial: false,
            in_flight: 0,
            stopped: false,
            spare_bytes: Vec::new(),
            spare_rows: Vec::new(),
        }),
        room: Condvar::new(),
    };
    // The calling thread parses too whenever it has no chunk to hand on,
    // so one worker per other core.
    let workers = std::thread::available_parallelism().map_or(1, |n| n.get().clamp(2, 4) - 1);
    let (results, inbox) = channel::<(u64, Result<Parsed, ReadError>)>();
    let outcome = std::thread::scope(|scope| {
        let (cols, bad, shared) = (&cols, &bad, &shared);
        let handles: Vec<_> = (0..workers)
            .map(|_| {
                let results = results.clone();
                scope.spawn(move || {
                    let mut parser = ChunkParser::new(cols, fmt, sign, bad);
                    while let Some((seq, data)) = shared.next_chunk(true, &io, bad) {
                        let parsed = data.map(|(d, rows)| shared.parsed(&mut parser, d, rows));
                        if results.send((seq, parsed)).is_err() {
                            break;
                        }
                    }
                })
            })
            .collect();
        drop(results);
        let mut parser = ChunkParser::new(cols, fmt, sign, bad);
        let mut parse_here = || {
            shared.next_chunk(false, &io, bad).map(|(seq, data)| {
                (
                    seq,
                    data.map(|(d, rows)| shared.parsed(&mut parser, d, rows)),
                )
            })
        };
        let mut deliver = |p: Parsed, base: u64| {
            let rows = deliver(p, base, fmt, &mut report, &mut f)?;
            shared.recycle_rows(rows);
            Ok(())
        };
        let result = in_order(&inbox, shared, &mut parse_here, &mut deliver);
        shared.stop();
        drop(inbox);
        let panicked = handles.into_iter().any(|h| h.join().is_err());
        (result, panicked)
    });
    match outcome {
        (Err(e), _) => Err(e),
        (Ok(()), true) => Err(bad(0, 0, "the log reader stopped unexpectedly".into())),
        (Ok(()), false) => {
            report.partial_last_line = shared.source.into_inner().is_ok_and(|s| s.partial);
            Ok(report)
        }
    }
}

type Chunk = (u64, Result<Parsed, ReadError>);

/// A chunk's bytes and a buffer for its rows.
type Work = (Vec<u8>, Vec<Row>);

/// Hand the parsed chunks on in file order, with the lines before each;
/// while the next one is not ready, parse one here. Stops at the first
/// error.
fn in_order(
    inbox: &Receiver<Chunk>,
    shared: &Shared,
    parse_here: &mut impl FnMut() -> Option<Chunk>,
    deliver: &mut impl FnMut(Parsed, u64) -> Result<(), ReadError>,
) -> Result<(), ReadError> {
    let mut waiting: BTreeMap<u64, Result<Parsed, ReadError>> = BTreeMap::new();
    let mut next = 0u64;
    // Lines before the chunk: the header is line 1.
    let mut base = 1u64;
    loop {
        while let Some(parsed) = waiting.remove(&next) {
            next += 1;
            shared.handed_on();
            let p = parsed.map_err(|e| at_line(e, base))?;
            let lines = p.lines;
            deliver(p, base)?;
            base += lines;
        }
        let (seq, parsed) = match inbox.try_recv() {
            Ok(c) => c,
            Err(TryRecvError::Empty) => match parse_here() {
                Some(c) => c,
                None => match inbox.recv() {
                    Ok(c) => c,
                    Err(_) => return Ok(()),
                },
            },
            Err(TryRecvError::Disconnected) => match parse_here() {
                Some(c) => c,
                None => return Ok(()),
            },
        };
        waiting.insert(seq, parsed);
    }
}

/// A chunk's rows to the caller, and its bad lines to the report (or as
/// the error that ends the reading).
fn deliver(
    p: Parsed,
    base: u64,
    fmt: &LogFormat,
    report: &mut ReadReport,
    f: &mut impl FnMut(Row),
) -> Result<Vec<Row>, ReadError> {
    let mut rows = p.rows;
    let mut bad = p.bad.into_iter().peekable();
    let mut skip = |e: ReadError| -> Result<(), ReadError> {
        let e = at_line(e, base);
        if !fmt.skip_bad_rows {
            return Err(e);
        }
        report.bad_rows_skipped += 1;
        if report.bad_rows.len() < 20 {
            let line = match &e {
                ReadError::Bad { line, .. } => *line as u64,
                _ => 0,
            };
            report.bad_rows.push((line, e.to_string()));
        }
        Ok(())
    };
    report.rows += rows.len() as u64;
    for (k, row) in rows.drain(..).enumerate() {
        while let Some((_, e)) = bad.next_if(|(at, _)| *at == k) {
            skip(e)?;
        }
        f(row);
    }
    for (_, e) in bad {
        skip(e)?;
    }
    Ok(rows)
}

/// An error whose line was counted from its chunk's start, counted from
/// the file's.
fn at_line(e: ReadError, base: u64) -> ReadError {
    match e {
        ReadError::Bad {
            path,
            line,
            column,
            message,
        } if line > 0 => ReadError::Bad {
            path,
            line: line + base as usize,
            column,
            message,
        },
        e => e,
    }
}

/// The file being read and how many of its chunks are in flight, shared
/// by the threads that parse.
struct Shared {
    source: Mutex<Source>,
    /// Signalled when a chunk is handed on (room for one more) or the
    /// reading stops.
    room: Condvar,
}

struct Source {
    file: std::fs::File,
    /// What was read after the last line end.
    carry: Vec<u8>,
    /// The log ends its lines with CR alone: read each CR as a line end.
    cr_only: bool,
    ours: bool,
    nheaders: usize,
    delim: u8,
    seq: u64,
    done: bool,
    /// A last line without its newline was left out.
    partial: bool,
    /// Chunks read and not yet handed on.
    in_flight: usize,
    /// The caller stopped reading (an error, or the end).
    stopped: bool,
    /// Buffers handed back, to be filled again (no new pages per chunk).
    spare_bytes: Vec<Vec<u8>>,
    spare_rows: Vec<Vec<Row>>,
}

impl Shared {
    /// The next chunk and its number, or the error reading it; `None` at
    /// the end of the file, when the reading stopped, or (unless `wait`)
    /// when [`IN_FLIGHT`] chunks are already out.
    fn next_chunk(
        &self,
        wait: bool,
        io: &impl Fn(std::io::Error) -> ReadError,
        bad: &impl Fn(u64, usize, String) -> ReadError,
    ) -> Option<(u64, Result<Work, ReadError>)> {
        let mut s = self.source.lock().ok()?;
        while wait && s.in_flight >= IN_FLIGHT && !s.stopped && !s.done {
            s = self.room.wait(s).ok()?;
        }
        if s.done || s.stopped || s.in_flight >= IN_FLIGHT {
            return None;
        }
        let data = match s.read_lines(io, bad) {
            Ok(Some(d)) => Ok((d, s.spare_rows.pop().unwrap_or_default())),
            Ok(None) => {
                self.room.notify_all();
                return None;
            }
            Err(e) => {
                s.done = true;
                self.room.notify_all();
                Err(e)
            }
        };
        let seq = s.seq;
        s.seq += 1;
        s.in_flight += 1;
        Some((seq, data))
    }

    /// Parse a chunk, and keep its bytes' buffer for another.
    fn parsed<B: Fn(u64, usize, String) -> ReadError>(
        &self,
        parser: &mut ChunkParser<'_, B>,
        data: Vec<u8>,
        rows: Vec<Row>,
    ) -> Parsed {
        let parsed = parser.parse(&data, rows);
        if let Ok(mut s) = self.source.lock() {
            s.spare_bytes.push(data);
        }
        parsed
    }

    /// Keep a delivered chunk's (emptied) rows for another.
    fn recycle_rows(&self, rows: Vec<Row>) {
        if let Ok(mut s) = self.source.lock() {
            s.spare_rows.push(rows);
        }
    }

    /// One chunk handed on: room for another.
    fn handed_on(&self) {
        if let Ok(mut s) = self.source.lock() {
            s.in_flight = s.in_flight.saturating_sub(1);
        }
        self.room.notify_one();
    }

    /// The caller reads no more: the workers stop.
    fn stop(&self) {
        if let Ok(mut s) = self.source.lock() {
            s.stopped = true;
        }
        self.room.notify_all();
    }
}

impl Source {
    /// Read on until at least one line end: the whole lines read, the
    /// rest carried. `None` at the end.
    fn read_lines(
        &mut self,
        io: &impl Fn(std::io::Error) -> ReadError,
        bad: &impl Fn(u64, usize, String) -> ReadError,
    ) -> Result<Option<Vec<u8>>, ReadError> {
        loop {
            let mut buf = self.spare_bytes.pop().unwrap_or_default();
            buf.clear();
            buf.extend_from_slice(&self.carry);
            self.carry.clear();
            let old = buf.len();
            buf.resize(old + CHUNK, 0);
            let n = match self.file.read(&mut buf[old..]) {
                Ok(n) => n,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => 0,
                Err(e) => return Err(io(e)),
            };
            buf.truncate(old + n);
            if n == 0 {
                // Whole lines still carried (a small file is read whole
                // with its header) go first; the tail after them next.
                if let Some(p) = memchr::memrchr(b'\n', &buf) {
                    self.carry.extend_from_slice(&buf[p + 1..]);
                    buf.truncate(p + 1);
                    return Ok(Some(buf));
                }
                self.done = true;
                // A foreign log's last line without its newline is taken
                // when it is whole: every column of the header. (packbench
                // ends every line it writes, so in its own log such a line
                // was cut by a crash and is left out.)
                if !self.ours && last_line_is_whole(&buf, self.nheaders, self.delim) {
                    buf.push(b'\n');
                    return Ok(Some(buf));
                }
                self.partial = !buf.iter().all(u8::is_ascii_whitespace);
                return Ok(None);
            }
            if self.cr_only {
                for b in &mut buf[old..] {
                    if *b == b'\r' {
                        *b = b'\n';
                    }
                }
            }
            // (What the header's reading carried may hold line ends.)
            match memchr::memrchr(b'\n', &buf) {
                Some(p) => {
                    self.carry.extend_from_slice(&buf[p + 1..]);
                    buf.truncate(p + 1);
                    return Ok(Some(buf));
                }
                None if buf.len() > MAX_LINE => {
                    self.done = true;
                    return Err(bad(
                        1,
                        1,
                        format!(
                            "no line end within {MAX_LINE} bytes: a line this long is not a log row (is it a binary file?)"
                        ),
                    ));
                }
                None => {
                    self.carry = buf;
                }
            }
        }
    }
}

/// The header line, read on its own (it may be quoted), what was read
/// after it, and whether the log ends its lines with CR alone.
fn read_header<B: Fn(u64, usize, String) -> ReadError>(
    file: &mut std::fs::File,
    given: Option<u8>,
    io: &impl Fn(std::io::Error) -> ReadError,
    bad: &B,
) -> Result<(Vec<String>, Vec<u8>, bool, u8), ReadError> {
    let mut carry: Vec<u8> = Vec::with_capacity(CHUNK + 4096);
    let mut eof = false;
    let (header_end, cr_only) = loop {
        // The first line end: LF, CR LF, or a CR alone (known once the
        // byte after it is read).
        match memchr::memchr2(b'\n', b'\r', &carry) {
            Some(p) if carry[p] == b'\n' => break (p, false),
            Some(p) if p + 1 < carry.len() || eof => {
                if carry.get(p + 1) == Some(&b'\n') {
                    break (p + 1, false);
                }
                break (p, true);
            }
            None if eof => break (carry.len(), false),
            _ => {}
        }
        let mut buf = [0u8; 4096];
        let n = file.read(&mut buf).map_err(io)?;
        eof = n == 0;
        carry.extend_from_slice(&buf[..n]);
        if carry.len() > MAX_LINE {
            return Err(bad(
                1,
                1,
                "no line end in the first megabyte: not a CSV log".into(),
            ));
        }
    };
    if cr_only {
        for b in &mut carry {
            if *b == b'\r' {
                *b = b'\n';
            }
        }
    }
    let delim = given.unwrap_or_else(|| format::detect_delimiter(&carry[..header_end]));
    let headers: Vec<String> = {
        let mut r = csv::ReaderBuilder::new()
            .has_headers(false)
            .flexible(true)
            .delimiter(delim)
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
    Ok((headers, carry, cr_only, delim))
}

/// Whether what is left after the last newline is a whole row: not blank,
/// with as many fields as the header.
fn last_line_is_whole(rest: &[u8], nheaders: usize, delim: u8) -> bool {
    let line = rest.strip_suffix(b"\r").unwrap_or(rest);
    if line.iter().all(|b| b.is_ascii_whitespace()) {
        return false;
    }
    let mut r = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .delimiter(delim)
        .from_reader(line);
    let mut rec = csv::ByteRecord::new();
    matches!(r.read_byte_record(&mut rec), Ok(true))
        && rec.len() == nheaders
        && rec.iter().all(|f| !trim(f).is_empty())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(name: &str, bytes: &[u8]) -> (tempfile::TempDir, PathBuf) {
        let dir = tempfile::tempdir().unwrap();
        let p = dir.path().join(name);
        std::fs::write(&p, bytes).unwrap();
        (dir, p)
    }

    fn times(p: &Path, fmt: &LogFormat) -> Result<(Vec<f64>, ReadReport), ReadError> {
        let mut t = Vec::new();
        let rep = stream_log(p, fmt, |r| t.push(r.t_s))?;
        Ok((t, rep))
    }

    /// Many chunks parsed on several threads come back in file order, and
    /// a bad line deep in the file is named at its own line.
    #[test]
    fn rows_come_in_file_order_and_a_bad_line_is_named_across_chunks() {
        let n = 200_000usize;
        let mut text = String::from("t_s,voltage_v,current_a\n");
        for k in 0..n {
            if k == 150_000 {
                text.push_str("150000,3.6,oops\n");
            } else {
                text.push_str(&format!("{k},3.{},-1.5\n", k % 10));
            }
        }
        assert!(text.len() > 4 * CHUNK, "spans several chunks");
        let (_d, p) = write("big.csv", text.as_bytes());
        let fmt = LogFormat {
            skip_bad_rows: true,
            ..LogFormat::default()
        };
        let (t, rep) = times(&p, &fmt).unwrap();
        assert_eq!(t.len(), n - 1);
        assert!(t.windows(2).all(|w| w[1] > w[0]), "in order");
        assert_eq!(rep.bad_rows_skipped, 1);
        // The header is line 1, so row k is on line k + 2.
        assert_eq!(rep.bad_rows[0].0, 150_002);
        match times(&p, &LogFormat::default()) {
            Err(ReadError::Bad { line, column, .. }) => assert_eq!((line, column), (150_002, 3)),
            other => panic!("{other:?}"),
        }
    }

    /// A small log, read whole with its header, gives every whole line;
    /// packbench's own log leaves its cut last line out and says so, and
    /// a foreign log's last line is taken only when whole.
    #[test]
    fn a_small_log_gives_every_whole_line() {
        let mut ours = super::super::CSV_COLUMNS.join(",") + "\n";
        for k in 0..21 {
            ours.push_str(&format!("{k}.000,1,1,3.7000,-1.0000,25.0\n"));
        }
        let (_d, p) = write("samples.csv", format!("{ours}21.000,1,1,3.69").as_bytes());
        let (t, rep) = times(&p, &LogFormat::default()).unwrap();
        assert_eq!(t.len(), 21);
        assert!(rep.partial_last_line);
        let (_d, p) = write("samples.csv", ours.as_bytes());
        let (t, rep) = times(&p, &LogFormat::default()).unwrap();
        assert_eq!(t.len(), 21);
        assert!(!rep.partial_last_line);
        let foreign = "t_s,voltage_v,current_a\n0,3.7,-1\n1,3.6,-1\n2,3.5";
        let (_d, p) = write("other.csv", foreign.as_bytes());
        let (t, rep) = times(&p, &LogFormat::default()).unwrap();
        assert_eq!(t, [0.0, 1.0]);
        assert!(rep.partial_last_line);
        let (_d, p) = write("other.csv", format!("{foreign},-1").as_bytes());
        let (t, _) = times(&p, &LogFormat::default()).unwrap();
        assert_eq!(t, [0.0, 1.0, 2.0]);
    }

    /// A log whose lines end in CR alone (an old spreadsheet's export)
    /// is read line by line, not as one line.
    #[test]
    fn carriage_return_line_ends_are_read() {
        let (_d, p) = write(
            "cr.csv",
            b"t_s,voltage_v,current_a\r0,3.7,-1\r1,3.6,-1\r2,3.5,-1\r",
        );
        let (t, rep) = times(&p, &LogFormat::default()).unwrap();
        assert_eq!(t, [0.0, 1.0, 2.0]);
        assert!(!rep.partial_last_line);
    }

    /// A file with no line end for more than MAX_LINE bytes (a binary
    /// file) is refused, and memory does not grow with it.
    #[test]
    fn a_line_without_end_is_refused_not_read_whole() {
        let mut bytes = b"t_s,voltage_v,current_a\n0,3.7,-1\n".to_vec();
        bytes.extend(std::iter::repeat_n(b'7', 3 * MAX_LINE));
        let (_d, p) = write("bin.csv", &bytes);
        match times(&p, &LogFormat::default()) {
            Err(ReadError::Bad { line, message, .. }) => {
                assert_eq!(line, 3);
                assert!(message.contains("no line end"), "{message}");
            }
            other => panic!("{other:?}"),
        }
    }
}
