//! The SCPI session: line framing over a byte stream, one reply read per
//! query with a timeout, resynchronisation after a timeout, and parsing of
//! response data (NR1/NR2/NR3 numbers with or without a unit, booleans,
//! error-queue entries). A numeric reply that does not parse is an error,
//! never a zero.

use super::link::Link;
use super::{ErrorKind, InstrumentError};
use futures::future::BoxFuture;
use std::io::Write;
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::io::{AsyncReadExt, AsyncWriteExt};

/// How often a lost link is tried again while it is being reopened.
pub const REOPEN_RETRY: std::time::Duration = std::time::Duration::from_millis(50);

/// Opens the link again after it was lost (a new TCP connection, the
/// serial device opened again), so a safe state can still be sent.
pub type Reopen = Arc<dyn Fn() -> BoxFuture<'static, Result<Link, InstrumentError>> + Send + Sync>;

/// A trace of the raw traffic of every session of a run, with timestamps
/// (seconds since the trace was opened): `>` sent, `<` received, `!` an
/// event of the session (timeout, resynchronisation, link reopened).
#[derive(Clone)]
pub struct Trace {
    start: Instant,
    out: std::sync::mpsc::Sender<String>,
}

impl Trace {
    /// A trace written by its own thread, a line at a time and flushed
    /// after each: a session never waits on the disk, and a killed run's
    /// trace ends with the last line it exchanged.
    pub fn new(mut out: Box<dyn Write + Send>) -> Trace {
        let (tx, rx) = std::sync::mpsc::channel::<String>();
        let spawned = std::thread::Builder::new()
            .name("trace".into())
            .spawn(move || {
                for line in rx {
                    // Tracing is for debugging: a failed trace write never
                    // stops a run.
                    let _ = out.write_all(line.as_bytes());
                    let _ = out.flush();
                }
            });
        // No thread: the lines sent go nowhere; the run is unaffected.
        drop(spawned);
        Trace {
            start: Instant::now(),
            out: tx,
        }
    }

    /// A trace file, created (or truncated).
    pub fn create(path: &std::path::Path) -> std::io::Result<Trace> {
        let f = std::fs::File::create(path)?;
        Ok(Trace::new(Box::new(std::io::BufWriter::new(f))))
    }

    fn line(&self, who: &str, dir: char, bytes: &[u8]) {
        let t = self.start.elapsed().as_secs_f64();
        let text: String = bytes.escape_ascii().to_string();
        let _ = self.out.send(format!("{t:.6} {who} {dir} {text}\n"));
    }
}

/// How a session frames and paces its messages.
#[derive(Debug, Clone)]
pub struct Framing {
    /// Appended to every program message.
    pub write_term: String,
    /// The byte that ends a response message (LF or CR); a CR before an
    /// LF is dropped.
    pub read_term: u8,
    /// Reply timeout.
    pub timeout: Duration,
    /// Least time between the end of one exchange and the next message.
    pub delay: Duration,
}

impl Framing {
    pub fn simple(write_term: &str, timeout: Duration) -> Framing {
        Framing {
            write_term: write_term.to_string(),
            read_term: b'\n',
            timeout,
            delay: Duration::ZERO,
        }
    }
}

/// Longest reply accepted before a terminator.
pub const MAX_REPLY: usize = 64 * 1024;

/// A text session with one instrument.
pub struct Session {
    name: String,
    link: Link,
    pending: Vec<u8>,
    out: Vec<u8>,
    framing: Framing,
    last_io: Option<Instant>,
    trace: Option<Trace>,
    reopen: Option<Reopen>,
    /// Count of lines written, for diagnostics and tests.
    pub lines_written: u64,
}

impl Session {
    pub fn new(name: &str, link: Link, write_term: &str, timeout: Duration) -> Session {
        Session::with_framing(name, link, Framing::simple(write_term, timeout))
    }

    pub fn with_framing(name: &str, link: Link, framing: Framing) -> Session {
        Session {
            name: name.to_string(),
            link,
            pending: Vec::new(),
            out: Vec::with_capacity(128),
            framing,
            last_io: None,
            trace: None,
            reopen: None,
            lines_written: 0,
        }
    }

    pub fn set_trace(&mut self, trace: Option<Trace>) {
        self.trace = trace;
    }

    pub fn set_reopen(&mut self, reopen: Option<Reopen>) {
        self.reopen = reopen;
    }

    pub fn timeout(&self) -> Duration {
        self.framing.timeout
    }

    fn note(&self, what: &str) {
        if let Some(t) = &self.trace {
            t.line(&self.name, '!', what.as_bytes());
        }
    }

    /// Open the link again after it was lost, trying again every
    /// [`REOPEN_RETRY`] until twice the reply timeout has passed: a device
    /// that comes back (a serial adapter enumerated again, a pseudo-terminal
    /// replaced) takes a moment to appear. Input pending on the old link is
    /// dropped.
    pub async fn reopen(&mut self) -> Result<(), InstrumentError> {
        let Some(r) = self.reopen.clone() else {
            return Err(self.err(
                ErrorKind::LinkLost,
                "link lost and it cannot be opened again".into(),
            ));
        };
        self.note("reopening the link");
        // Close the old link first: a serial port opened exclusively
        // cannot be opened again while it is still held (as a normal user
        // the open fails as busy).
        self.link = Box::new(tokio::io::empty());
        let deadline = tokio::time::Instant::now() + self.framing.timeout * 2;
        let mut last = None;
        loop {
            match tokio::time::timeout_at(deadline, r()).await {
                Ok(Ok(link)) => {
                    self.link = link;
                    self.pending.clear();
                    return Ok(());
                }
                Ok(Err(e)) => last = Some(e),
                Err(_) => break,
            }
            if tokio::time::Instant::now() + REOPEN_RETRY >= deadline {
                break;
            }
            tokio::time::sleep(REOPEN_RETRY).await;
        }
        Err(last.unwrap_or_else(|| {
            self.err(ErrorKind::LinkLost, "reopening the link timed out".into())
        }))
    }

    pub fn name(&self) -> &str {
        &self.name
    }

    fn err(&self, kind: ErrorKind, message: String) -> InstrumentError {
        InstrumentError {
            instrument: self.name.clone(),
            kind,
            message,
        }
    }

    /// Send one program message.
    pub async fn write(&mut self, message: &str) -> Result<(), InstrumentError> {
        if let Some(last) = self.last_io {
            let since = last.elapsed();
            if since < self.framing.delay {
                tokio::time::sleep(self.framing.delay - since).await;
            }
        }
        // One buffer, one write: the message and its terminator leave together.
        self.out.clear();
        self.out.extend_from_slice(message.as_bytes());
        self.out
            .extend_from_slice(self.framing.write_term.as_bytes());
        if let Some(t) = &self.trace {
            t.line(&self.name, '>', message.as_bytes());
        }
        let r = tokio::time::timeout(self.framing.timeout, async {
            self.link.write_all(&self.out).await?;
            self.link.flush().await
        })
        .await;
        self.last_io = Some(Instant::now());
        match r {
            Ok(Ok(())) => {
                self.lines_written += 1;
                Ok(())
            }
            Ok(Err(e)) => Err(self.err(ErrorKind::LinkLost, format!("write failed: {e}"))),
            Err(_) => Err(self.err(
                ErrorKind::Timeout,
                format!("write of '{message}' timed out"),
            )),
        }
    }

    /// Read one response message (up to the read terminator; a CR before
    /// an LF is dropped).
    async fn read_line(&mut self) -> Result<String, InstrumentError> {
        let r = self.read_line_within(self.framing.timeout).await;
        self.last_io = Some(Instant::now());
        r
    }

    async fn read_line_within(&mut self, within: Duration) -> Result<String, InstrumentError> {
        let deadline = tokio::time::Instant::now() + within;
        let term = self.framing.read_term;
        loop {
            if let Some(pos) = self.pending.iter().position(|&b| b == term) {
                let line: Vec<u8> = self.pending.drain(..=pos).collect();
                let body = &line[..line.len() - 1];
                if let Some(t) = &self.trace {
                    t.line(&self.name, '<', body);
                }
                let text = String::from_utf8_lossy(body);
                // A CR or LF left over from a two-character terminator
                // belongs to no reply.
                return Ok(text.trim_matches(['\r', '\n']).to_string());
            }
            if self.pending.len() > MAX_REPLY {
                self.pending.clear();
                return Err(self.err(
                    ErrorKind::Protocol,
                    format!("reply longer than {MAX_REPLY} bytes without a terminator"),
                ));
            }
            let mut buf = [0u8; 4096];
            match tokio::time::timeout_at(deadline, self.link.read(&mut buf)).await {
                Ok(Ok(0)) => return Err(self.err(ErrorKind::LinkLost, "link closed".into())),
                Ok(Ok(n)) => self.pending.extend_from_slice(&buf[..n]),
                Ok(Err(e)) => {
                    return Err(self.err(ErrorKind::LinkLost, format!("read failed: {e}")))
                }
                Err(_) => {
                    return Err(self.err(
                        ErrorKind::Timeout,
                        format!("no reply within {} ms", within.as_millis()),
                    ))
                }
            }
        }
    }

    /// Send a query and read exactly one reply.
    pub async fn query(&mut self, message: &str) -> Result<String, InstrumentError> {
        self.write(message).await?;
        match self.read_line().await {
            Ok(line) => Ok(line),
            Err(e) if e.kind == ErrorKind::Timeout => {
                // Drop whatever partial reply arrived so a late answer is
                // never taken for the next query's.
                self.pending.clear();
                self.note(&format!("timeout on '{message}'"));
                Err(e)
            }
            Err(e) => Err(e),
        }
    }

    /// Query and parse a number.
    pub async fn query_number(&mut self, message: &str) -> Result<f64, InstrumentError> {
        let reply = self.query(message).await?;
        parse_number(&reply)
            .map_err(|m| self.err(ErrorKind::Protocol, format!("'{message}' -> {m}")))
    }

    /// Query and parse several `;`-separated numbers (a compound query).
    pub async fn query_numbers(
        &mut self,
        message: &str,
        expect: usize,
    ) -> Result<Vec<f64>, InstrumentError> {
        let reply = self.query(message).await?;
        let parts: Vec<&str> = reply.split(';').collect();
        if parts.len() != expect {
            return Err(self.err(
                ErrorKind::Protocol,
                format!(
                    "'{message}' -> '{reply}': expected {expect} values, got {}",
                    parts.len()
                ),
            ));
        }
        parts
            .iter()
            .map(|p| {
                parse_number(p)
                    .map_err(|m| self.err(ErrorKind::Protocol, format!("'{message}' -> {m}")))
            })
            .collect()
    }

    /// Query and parse a boolean (`0`/`1`, or `ON`/`OFF` on some firmware).
    pub async fn query_bool(&mut self, message: &str) -> Result<bool, InstrumentError> {
        let reply = self.query(message).await?;
        parse_bool_reply(&reply)
            .map_err(|m| self.err(ErrorKind::Protocol, format!("'{message}' -> {m}")))
    }

    /// Read and drop input until the link has been quiet for `quiet`
    /// (bounded by the reply timeout).
    async fn drain_input(&mut self, quiet: Duration) -> Result<(), InstrumentError> {
        self.pending.clear();
        let limit = tokio::time::Instant::now() + self.framing.timeout;
        let mut buf = [0u8; 1024];
        loop {
            let until = (tokio::time::Instant::now() + quiet).min(limit);
            match tokio::time::timeout_at(until, self.link.read(&mut buf)).await {
                Err(_) => return Ok(()),
                Ok(Ok(0)) => return Err(self.err(ErrorKind::LinkLost, "link closed".into())),
                Ok(Ok(n)) => {
                    if let Some(t) = &self.trace {
                        t.line(&self.name, '<', &buf[..n]);
                    }
                    if tokio::time::Instant::now() >= limit {
                        return Ok(());
                    }
                }
                Ok(Err(e)) => {
                    return Err(self.err(ErrorKind::LinkLost, format!("read failed: {e}")))
                }
            }
        }
    }

    /// After a timeout or a reply that did not parse: drop stale input,
    /// then send `*OPC?` and wait for its `1`, skipping any late reply
    /// that arrives first; then make sure nothing else is pending, so a
    /// late reply is never taken for the answer to the next query.
    pub async fn resync(&mut self) -> Result<(), InstrumentError> {
        self.note("resynchronising");
        let quiet =
            (self.framing.timeout / 10).clamp(Duration::from_millis(5), Duration::from_millis(100));
        self.drain_input(quiet).await?;
        self.write("*OPC?").await?;
        let deadline = Instant::now() + self.framing.timeout;
        loop {
            let left = deadline.saturating_duration_since(Instant::now());
            if left.is_zero() {
                break;
            }
            match self.read_line_within(left).await {
                Ok(s) if matches!(s.trim(), "1" | "+1") => {
                    self.drain_input(quiet).await?;
                    self.last_io = Some(Instant::now());
                    return Ok(());
                }
                Ok(_) => continue,
                Err(e) if e.kind == ErrorKind::LinkLost => return Err(e),
                Err(_) => break,
            }
        }
        self.pending.clear();
        Err(self.err(
            ErrorKind::Protocol,
            "could not resynchronise: no '1' in reply to *OPC?".into(),
        ))
    }
}

/// Units a numeric reply may carry (SCPI-1999 unit mnemonics, no prefix).
const BASE_UNITS: [&str; 6] = ["V", "A", "W", "OHM", "CEL", "S"];

/// SCPI's overload marker (9.9E37) and not-a-number marker (9.91E37).
const OVERLOAD: f64 = 9.9e37;

/// Parse a numeric response: NR1, NR2 or NR3, an optional leading `+`,
/// an optional unit after it (`12.000V`).
pub fn parse_number(reply: &str) -> Result<f64, String> {
    let t = reply.trim();
    let end = t
        .find(|c: char| !(c.is_ascii_digit() || matches!(c, '+' | '-' | '.' | 'e' | 'E')))
        .unwrap_or(t.len());
    let (num, unit) = t.split_at(end);
    // "1E" with a unit starting at E is not a number.
    let num = num.trim_end_matches(['e', 'E']);
    let x: f64 = num
        .parse()
        .map_err(|_| format!("reply '{t}' is not a number"))?;
    let unit = unit.trim();
    if !unit.is_empty() && !unit.chars().all(|c| c.is_ascii_alphabetic()) {
        return Err(format!("reply '{t}' has trailing data after the number"));
    }
    // A unit after the number is taken only when it is a base unit; a
    // prefixed one (mV, kA) would be read a thousand times off.
    if !unit.is_empty() && !BASE_UNITS.iter().any(|u| unit.eq_ignore_ascii_case(u)) {
        return Err(format!(
            "reply '{t}' carries the unit '{unit}'; only a plain number or a base unit ({}) is taken",
            BASE_UNITS.join(", ")
        ));
    }
    if !x.is_finite() {
        return Err(format!("reply '{t}' is not a finite number"));
    }
    if x.abs() >= OVERLOAD * 0.999 {
        return Err(format!(
            "reply '{t}' is the SCPI overload/not-a-number marker (reading out of range)"
        ));
    }
    Ok(x)
}

/// A scanned channel's reading: as [`parse_number`], but SCPI's
/// overload / not-a-number marker (an open or overloaded input) is
/// returned as infinity for the caller to judge, not refused.
pub fn parse_channel_reading(reply: &str) -> Result<f64, String> {
    match parse_number(reply) {
        Ok(x) => Ok(x),
        Err(e) => match reply.trim().parse::<f64>() {
            Ok(x) if x.abs() >= OVERLOAD * 0.999 => Ok(f64::INFINITY),
            _ => Err(e),
        },
    }
}

/// Parse a boolean response.
pub fn parse_bool_reply(reply: &str) -> Result<bool, String> {
    match reply.trim().to_ascii_uppercase().as_str() {
        "1" | "+1" | "ON" => Ok(true),
        "0" | "+0" | "OFF" => Ok(false),
        other => Err(format!("reply '{other}' is not a boolean (0/1)")),
    }
}

/// Parse an error-queue entry: `-113,"Undefined header"`, `+0,"No error"`,
/// or a bare code.
pub fn parse_error_entry(reply: &str) -> Result<(i32, String), String> {
    let t = reply.trim();
    let (code, text) = match t.find(',') {
        Some(i) => (&t[..i], t[i + 1..].trim().trim_matches('"').to_string()),
        None => (t, String::new()),
    };
    let code: i32 = code
        .trim()
        .trim_start_matches('+')
        .parse()
        .map_err(|_| format!("error-queue reply '{t}' has no numeric code"))?;
    Ok((code, text))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_in_every_response_format() {
        assert_eq!(parse_number("12").unwrap(), 12.0);
        assert_eq!(parse_number("+12.500").unwrap(), 12.5);
        assert_eq!(parse_number("+1.24981E+01").unwrap(), 12.4981);
        assert_eq!(parse_number("2.5E-01").unwrap(), 0.25);
        assert_eq!(parse_number("12.000V").unwrap(), 12.0);
        assert_eq!(parse_number(" -0.5 A ").unwrap(), -0.5);
        assert!(parse_number("").is_err());
        assert!(parse_number("OFF").is_err());
        assert!(parse_number("9.9E37").is_err());
        assert!(parse_number("9.91E37").is_err());
        assert!(parse_number("NaN").is_err());
        assert!(parse_number("1.0;2.0").is_err());
    }

    #[test]
    fn booleans_and_error_entries() {
        assert!(parse_bool_reply("1").unwrap());
        assert!(!parse_bool_reply("OFF").unwrap());
        assert!(parse_bool_reply("2").is_err());
        assert_eq!(
            parse_error_entry("-113,\"Undefined header\"").unwrap(),
            (-113, "Undefined header".to_string())
        );
        assert_eq!(parse_error_entry("+0,\"No error\"").unwrap().0, 0);
        assert_eq!(parse_error_entry("0").unwrap().0, 0);
        assert!(parse_error_entry("oops").is_err());
    }
}
