//! Instruments that speak Modbus RTU (Modbus Application Protocol V1.1b3,
//! Modbus over Serial Line V1.02) instead of SCPI: a profile kind that maps
//! each logical operation to a register, and a bridge that carries those
//! operations over the RTU link.
//!
//! The bridge sits below the session as a link: the session sends the
//! operation as one line of text (`set_current 1.5`, `measure_voltage?`),
//! the bridge makes the Modbus transaction (function 03/04 to read, 06/16
//! to write), scales the integer, and answers the query's value as a line.
//! So timeouts, resynchronisation, read-back, the safe state and the error
//! queue are the session's and the engine's, shared with SCPI instruments.
//! An exception reply goes to the bridge's error queue (read as the
//! profile's error query) and is an instrument error; a CRC error or a
//! timeout is tried again, up to the profile's retries.
//!
//! Framing and CRC-16 are tokio-modbus's RTU client (a well-kept crate);
//! the simulated slave in `sim` frames its replies itself, so the two
//! check each other.

use super::link::Link;
use super::modbus_map::{exception_text, Map, Register};
use std::collections::VecDeque;
use std::sync::Arc;
use std::time::Duration;
use tokio::io::{AsyncBufReadExt, AsyncWriteExt, BufReader};

/// A link that carries a session's operations over Modbus RTU.
pub fn bridge(link: Link, map: Arc<Map>) -> Link {
    let (near, far) = tokio::io::duplex(4096);
    tokio::spawn(run_bridge(far, link, map));
    Box::new(near)
}

/// Why a transaction failed.
enum Failed {
    /// The slave answered with an exception.
    Exception(u8),
    /// No valid reply in any try (timeout, CRC error, garbage).
    NoReply(String),
    /// The serial link itself failed.
    Lost,
}

struct Bridge {
    ctx: tokio_modbus::client::Context,
    map: Arc<Map>,
    errors: VecDeque<(i32, String)>,
}

impl Bridge {
    async fn transact(
        &mut self,
        name: &str,
        r: &Register,
        write: Option<Vec<u16>>,
    ) -> Result<Vec<u16>, Failed> {
        use tokio_modbus::client::{Reader, Writer};
        let line = &self.map.line;
        let timeout = Duration::from_millis(line.timeout_ms);
        let gap = Duration::from_millis(line.frame_gap_ms);
        let mut last = String::new();
        for _ in 0..=line.retries {
            tokio::time::sleep(gap).await;
            let call = async {
                match (&write, r.function) {
                    (Some(w), 6) => self
                        .ctx
                        .write_single_register(r.register, w[0])
                        .await
                        .map(|x| x.map(|()| Vec::new())),
                    (Some(w), _) => self
                        .ctx
                        .write_multiple_registers(r.register, w)
                        .await
                        .map(|x| x.map(|()| Vec::new())),
                    (None, 3) => {
                        self.ctx
                            .read_holding_registers(r.register, u16::from(r.words))
                            .await
                    }
                    (None, _) => {
                        self.ctx
                            .read_input_registers(r.register, u16::from(r.words))
                            .await
                    }
                }
            };
            match tokio::time::timeout(timeout, call).await {
                Ok(Ok(Ok(words))) => {
                    if write.is_none() && words.len() != usize::from(r.words) {
                        last = format!("{} words for {name}, expected {}", words.len(), r.words);
                        continue;
                    }
                    return Ok(words);
                }
                Ok(Ok(Err(code))) => return Err(Failed::Exception(u8::from(code))),
                Ok(Err(tokio_modbus::Error::Transport(_))) => {
                    // The serial link failed (a hang-up, a pulled adapter),
                    // or the framing gave up on a flood of garbage: the
                    // session opens the link, and a fresh framing, again.
                    return Err(Failed::Lost);
                }
                Ok(Err(e)) => last = e.to_string(),
                Err(_) => last = format!("no valid reply within {} ms", line.timeout_ms),
            }
        }
        Err(Failed::NoReply(format!(
            "{name}: {last} (tried {} times)",
            line.retries + 1
        )))
    }

    fn push(&mut self, code: i32, text: String) {
        if self.errors.len() < 20 {
            self.errors.push_back((code, text));
        }
    }

    /// One line from the session; `Ok(Some(reply))` for a query.
    async fn line(&mut self, text: &str) -> Result<Option<String>, ()> {
        let text = text.trim();
        match text {
            "*OPC?" => {
                // Resynchronising: answer only if the slave does.
                let Some(r) = self.map.ops.get("identify").copied() else {
                    return Ok(Some("1".into()));
                };
                return match self.transact("identify", &r, None).await {
                    Ok(_) => Ok(Some("1".into())),
                    Err(Failed::Lost) => Err(()),
                    Err(_) => Ok(None),
                };
            }
            "*CLS" => {
                self.errors.clear();
                return Ok(None);
            }
            "error?" => {
                return Ok(Some(match self.errors.pop_front() {
                    Some((c, t)) => format!("{c},\"{}\"", t.replace('"', "'")),
                    None => "0,\"No error\"".into(),
                }))
            }
            _ => {}
        }
        let (op, value) = match text.split_once(' ') {
            Some((op, v)) => (op, Some(v.trim())),
            None => (text, None),
        };
        let query = op.ends_with('?');
        let name = op.trim_end_matches('?');
        let Some(r) = self.map.ops.get(name).copied() else {
            self.push(-113, format!("Undefined header; no register for '{name}'"));
            return Ok(query.then(|| "unsupported".to_string()));
        };
        let write = if query {
            None
        } else {
            let words = match (r.value, value) {
                (Some(fixed), _) => Ok(vec![fixed]),
                (None, Some(v)) => v
                    .parse::<f64>()
                    .map_err(|_| format!("'{v}' is not a number"))
                    .and_then(|x| self.map.encode(&r, x)),
                (None, None) => Err("no value given".into()),
            };
            match words {
                Ok(w) => Some(w),
                Err(m) => {
                    self.push(-222, format!("Data out of range; {name}: {m}"));
                    return Ok(None);
                }
            }
        };
        let slave = self.map.line.slave;
        match self.transact(name, &r, write).await {
            Ok(words) if query => Ok(Some(match name {
                "identify" => format!(
                    "packbench-modbus,slave {slave},0,{}",
                    words.first().copied().unwrap_or(0)
                ),
                "enabled_query" | "tripped_query" | "get_mode" => {
                    format!("{}", self.map.decode(&Register { scale: 1.0, ..r }, &words))
                }
                _ => format!("{}", self.map.decode(&r, &words)),
            })),
            Ok(_) => Ok(None),
            Err(Failed::Exception(code)) => {
                let t = format!(
                    "Modbus exception {code:#04x} ({}) from slave {slave}: {name} at register {:#06x}",
                    exception_text(code),
                    r.register
                );
                self.push(i32::from(code), t.clone());
                Ok(query.then(|| format!("exception {code:#04x}")))
            }
            Err(Failed::NoReply(m)) => {
                if !query {
                    self.push(
                        -300,
                        format!("Device-specific error; no reply from slave {slave}: {m}"),
                    );
                }
                Ok(query.then(|| "no-reply".to_string()))
            }
            Err(Failed::Lost) => Err(()),
        }
    }
}

/// Serve the session's lines until it goes away or the serial link fails
/// (then the session sees its link closed and opens it again).
async fn run_bridge(far: tokio::io::DuplexStream, link: Link, map: Arc<Map>) {
    let slave = tokio_modbus::Slave(map.line.slave);
    let ctx = tokio_modbus::client::rtu::attach_slave(link, slave);
    let mut b = Bridge {
        ctx,
        map,
        errors: VecDeque::new(),
    };
    let (read, mut write) = tokio::io::split(far);
    let mut lines = BufReader::new(read).lines();
    while let Ok(Some(line)) = lines.next_line().await {
        match b.line(&line).await {
            Ok(Some(reply)) => {
                if write
                    .write_all(format!("{reply}\n").as_bytes())
                    .await
                    .is_err()
                {
                    return;
                }
            }
            Ok(None) => {}
            Err(()) => return,
        }
    }
}
