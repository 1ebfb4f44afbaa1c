//! The SCPI session: line framing over a byte stream, one reply read per
//! query with a timeout, resynchronisation after a timeout, and parsing of
//! response data (NR1/NR2/NR3 numbers with or without a unit, booleans,
//! error-queue entries). A numeric reply that does not parse is an error,
//! never a zero.

use super::link::Link;
use super::{ErrorKind, InstrumentError};
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

/// Longest reply accepted before a terminator.
pub const MAX_REPLY: usize = 64 * 1024;

/// A text session with one instrument.
pub struct Session {
    name: String,
    link: Link,
    pending: Vec<u8>,
    out: Vec<u8>,
    write_term: String,
    timeout: Duration,
    /// Count of lines written, for diagnostics and tests.
    pub lines_written: u64,
}

impl Session {
    pub fn new(name: &str, link: Link, write_term: &str, timeout: Duration) -> Session {
        Session {
            name: name.to_string(),
            link,
            pending: Vec::new(),
            out: Vec::with_capacity(128),
            write_term: write_term.to_string(),
            timeout,
            lines_written: 0,
        }
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
        // One buffer, one write: the message and its terminator leave together.
        self.out.clear();
        self.out.extend_from_slice(message.as_bytes());
        self.out.extend_from_slice(self.write_term.as_bytes());
        let r = tokio::time::timeout(self.timeout, self.link.write_all(&self.out)).await;
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

    /// Read one response message (up to LF; a CR before it is dropped).
    async fn read_line(&mut self) -> Result<String, InstrumentError> {
        let deadline = tokio::time::Instant::now() + self.timeout;
        loop {
            if let Some(pos) = self.pending.iter().position(|&b| b == b'\n') {
                let line: Vec<u8> = self.pending.drain(..=pos).collect();
                let text = String::from_utf8_lossy(&line[..line.len() - 1]);
                return Ok(text.trim_end_matches('\r').to_string());
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
                        format!("no reply within {} ms", self.timeout.as_millis()),
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

    /// After a timeout: drain stale input and check the instrument answers
    /// a `*OPC?` with `1` before going on.
    pub async fn resync(&mut self) -> Result<(), InstrumentError> {
        self.pending.clear();
        for _ in 0..3 {
            let r = self.query("*OPC?").await;
            if let Ok(s) = r {
                if s.trim() == "1" || s.trim() == "+1" {
                    return Ok(());
                }
            }
        }
        Err(self.err(
            ErrorKind::Protocol,
            "could not resynchronise with *OPC?".into(),
        ))
    }
}

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
