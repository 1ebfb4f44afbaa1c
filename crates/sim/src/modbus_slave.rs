//! The simulated instruments as Modbus RTU slaves (Modbus over Serial Line
//! V1.02): request frames are found in the byte stream by their function
//! code's length and CRC-16, each register operation of the shipped
//! example profile is carried out as the same SCPI message the simulated
//! instrument already understands, and the reply is framed here, with the
//! link faults applied to the frame (silence, garbage, a late reply, a
//! dropped link, an exception, a wrong CRC).

use super::server::SimInstrument;
use instrument::link::Response;
use instrument::modbus_map::{Map, Register};
use instrument::profile::{Profile, ProfileRole};
use model::simconfig::{FaultKind, LinkFault};
use std::sync::Arc;
use std::time::Duration;

const CRC: crc::Crc<u16> = crc::Crc::<u16>::new(&crc::CRC_16_MODBUS);

/// The device code the `identify` register answers.
pub const DEVICE_CODE: u16 = 0x5042;

/// A frame with its CRC appended (low byte first, as on the wire).
pub fn framed(body: &[u8]) -> Vec<u8> {
    let mut f = body.to_vec();
    f.extend_from_slice(&CRC.checksum(body).to_le_bytes());
    f
}

/// Whether a fault of kind `k` is in effect; a silent line answers no
/// more than one with no reply path.
fn has(faults: &[LinkFault], k: FaultKind) -> bool {
    faults
        .iter()
        .any(|f| f.kind == k || (k == FaultKind::NoReply && f.kind == FaultKind::Silent))
}

/// What to send back for one request.
#[derive(Debug, Clone, PartialEq)]
pub enum Reply {
    /// Nothing (a request for another slave, or a dead reply path).
    Silence,
    Frame(Vec<u8>),
    Late(Vec<u8>, Duration),
    /// The link drops.
    Disconnect,
}

/// One complete request taken off the front of `buf`, if there is one:
/// `Ok(frame)` with a good CRC; bytes that start no valid frame are
/// dropped one at a time, as a receiver resynchronises.
pub fn take_request(buf: &mut Vec<u8>) -> Option<Vec<u8>> {
    loop {
        if buf.len() < 2 {
            return None;
        }
        let len = match buf[1] {
            3 | 4 | 6 => 8,
            16 => {
                if buf.len() < 7 {
                    return None;
                }
                9 + usize::from(buf[6])
            }
            // Unknown function: a frame of the common 8-byte shape, so it
            // gets its exception; garbage fails the CRC below.
            _ => 8,
        };
        if buf.len() < len {
            return None;
        }
        let (body, crc) = buf[..len].split_at(len - 2);
        if CRC.checksum(body).to_le_bytes() == [crc[0], crc[1]] {
            return Some(buf.drain(..len).collect());
        }
        buf.remove(0);
    }
}

/// A simulated instrument behind its Modbus register map.
pub struct Slave {
    map: Arc<Map>,
    scpi: Profile,
    /// (mode name, word written to set_mode).
    modes: Vec<(String, String)>,
}

impl Slave {
    /// The slave for a role, serving the shipped example map of that role.
    pub fn for_role(role: ProfileRole) -> Option<Slave> {
        let (mb, scpi) = match role {
            ProfileRole::Source => ("generic-modbus-source", ProfileRole::Source),
            ProfileRole::Load => ("generic-modbus-load", ProfileRole::Load),
            _ => return None,
        };
        let p = Profile::builtin_named(mb)?;
        let map = p.modbus.clone()?;
        let mut modes = Vec::new();
        if let Some(w) = &p.mode_words {
            modes.push(("current".to_string(), w.current.clone()));
            modes.push(("power".to_string(), w.power.clone()));
            modes.push(("resistance".to_string(), w.resistance.clone()));
        }
        Some(Slave {
            map,
            scpi: Profile::builtin(scpi),
            modes,
        })
    }

    pub fn address(&self) -> u8 {
        self.map.line.slave
    }

    /// The SCPI message of an operation, with its value.
    fn scpi_of(&self, op: &str, value: Option<f64>) -> Option<String> {
        let c = &self.scpi.commands;
        let pr = &self.scpi.protection;
        let t = match op {
            "set_voltage" => c.set_voltage.clone(),
            "get_voltage" => c.get_voltage.clone(),
            "set_current" => c.set_current.clone(),
            "get_current" => c.get_current.clone(),
            "set_power" => c.set_power.clone(),
            "get_power" => c.get_power.clone(),
            "set_resistance" => c.set_resistance.clone(),
            "get_resistance" => c.get_resistance.clone(),
            "get_mode" => c.get_mode.clone(),
            "enable" => c.enable.clone(),
            "disable" => c.disable.clone(),
            "enabled_query" => c.enabled_query.clone(),
            "measure_voltage" => Some(c.measure_voltage.clone()),
            "measure_current" => c.measure_current.clone(),
            "measure_power" => c.measure_power.clone(),
            "measure_temperature" => c.measure_temperature.clone(),
            "set_over_voltage" => pr.set_over_voltage.clone(),
            "get_over_voltage" => pr.get_over_voltage.clone(),
            "set_over_current" => pr.set_over_current.clone(),
            "get_over_current" => pr.get_over_current.clone(),
            "set_under_voltage" => pr.set_under_voltage.clone(),
            "get_under_voltage" => pr.get_under_voltage.clone(),
            "set_voltage_on" => pr.set_voltage_on.clone(),
            "get_voltage_on" => pr.get_voltage_on.clone(),
            "clear" => pr.clear.clone(),
            "tripped_query" => pr.tripped_query.clone(),
            "set_mode" => {
                let word = format!("{}", value? as i64);
                let (name, _) = self.modes.iter().find(|(_, w)| *w == word)?;
                let words = self.scpi.mode_words.as_ref()?;
                let scpi_word = match name.as_str() {
                    "current" => &words.current,
                    "power" => &words.power,
                    _ => &words.resistance,
                };
                return Some(c.set_mode.as_ref()?.replace("{mode}", scpi_word));
            }
            _ => None,
        }?;
        Some(match value {
            Some(v) => t.replace("{value}", &format!("{v}")),
            None => t,
        })
    }

    /// The operation a request names: the one at its register whose
    /// function reads (03/04) or writes (06/16) as the request does.
    /// Several writes may share a register with fixed words (enable 1,
    /// disable 0): the one whose word was written.
    fn op_at(
        &self,
        function: u8,
        register: u16,
        count: u16,
        written: &[u16],
    ) -> Option<(&str, Register)> {
        self.map
            .ops
            .iter()
            .find(|(_, r)| {
                r.value.is_none_or(|v| written.is_empty() || written == [v])
                    && r.register == register
                    && u16::from(r.words) == count
                    && match function {
                        3 => r.function == 3,
                        4 => r.function == 4,
                        6 | 16 => matches!(r.function, 6 | 16),
                        _ => false,
                    }
            })
            .map(|(n, r)| (n.as_str(), *r))
    }

    /// Answer one request with a good CRC on the simulated instrument.
    pub fn handle(&self, inst: &mut SimInstrument, req: &[u8]) -> Reply {
        let (addr, function) = (req[0], req[1]);
        if addr != self.address() {
            return Reply::Silence;
        }
        let word = |i: usize| u16::from_be_bytes([req[i], req[i + 1]]);
        let exception = |code: u8| Reply::Frame(framed(&[addr, function | 0x80, code]));
        if !matches!(function, 3 | 4 | 6 | 16) {
            return exception(1);
        }
        let register = word(2);
        let (count, written): (u16, Vec<u16>) = match function {
            6 => (1, vec![word(4)]),
            16 => {
                let n = word(4);
                if usize::from(req[6]) != usize::from(n) * 2 {
                    return exception(3);
                }
                (n, (0..usize::from(n)).map(|k| word(7 + 2 * k)).collect())
            }
            _ => (word(4), Vec::new()),
        };
        let Some((op, r)) = self.op_at(function, register, count, &written) else {
            return exception(2);
        };
        let reads = matches!(function, 3 | 4);
        let value = if reads {
            None
        } else if let Some(fixed) = r.value {
            if written != [fixed] {
                return exception(3);
            }
            None
        } else {
            Some(self.map.decode(&r, &written))
        };
        if op == "identify" {
            let (resp, faults) = inst.respond_with("*OPC?");
            return self.frame_reply(addr, function, &[DEVICE_CODE], resp, &faults);
        }
        let Some(line) = self.scpi_of(op, value) else {
            return exception(3);
        };
        let (resp, faults) = inst.respond_with(&line);
        // An error the instrument raised (a refused value, an injected
        // fault) is the transaction's exception.
        let mut errors = Vec::new();
        loop {
            let e = inst.quiet("SYST:ERR?");
            let code: i32 = e
                .first()
                .and_then(|t| t.split(',').next())
                .and_then(|c| c.trim().parse().ok())
                .unwrap_or(0);
            if code == 0 || errors.len() > 20 {
                break;
            }
            errors.push(code);
        }
        if resp.is_err() {
            return Reply::Disconnect;
        }
        if has(&faults, FaultKind::NoReply) {
            return Reply::Silence;
        }
        if has(&faults, FaultKind::Error) {
            // The injected fault: the slave reports a device failure.
            return exception(4);
        }
        if let Some(&code) = errors.first() {
            let ex = if matches!(code, -224 | -222 | -221) {
                3
            } else {
                4
            };
            return exception(ex);
        }
        let words = if reads {
            let text = match &resp {
                Ok(Response::Reply(t)) | Ok(Response::Late(t, _)) => t.clone(),
                _ => String::new(),
            };
            // A garbled reply (the faults) reads 0: framed below as they say.
            let x: f64 = text.trim().parse().unwrap_or(0.0);
            let scaled = match op {
                "enabled_query" | "tripped_query" | "get_mode" => Register { scale: 1.0, ..r },
                _ => r,
            };
            let x = if op == "get_mode" {
                // The SCPI mode word back to its Modbus word.
                let words = self.scpi.mode_words.as_ref();
                let name = match words {
                    Some(w) if text.trim() == w.power => "power",
                    Some(w) if text.trim() == w.resistance => "resistance",
                    _ => "current",
                };
                self.modes
                    .iter()
                    .find(|(n, _)| n == name)
                    .and_then(|(_, w)| w.parse().ok())
                    .unwrap_or(0.0)
            } else {
                x
            };
            match self.map.encode(&scaled, x) {
                Ok(w) => w,
                Err(_) => return exception(4),
            }
        } else {
            Vec::new()
        };
        let echo = if reads {
            None
        } else {
            Some((register, if function == 6 { written[0] } else { count }))
        };
        self.frame_reply_with(addr, function, &words, echo, resp, &faults)
    }

    fn frame_reply(
        &self,
        addr: u8,
        function: u8,
        words: &[u16],
        resp: Result<Response, std::io::Error>,
        faults: &[LinkFault],
    ) -> Reply {
        if resp.is_err() {
            return Reply::Disconnect;
        }
        if has(faults, FaultKind::NoReply) {
            return Reply::Silence;
        }
        self.frame_reply_with(addr, function, words, None, resp, faults)
    }

    /// The reply frame for a read (`words`) or a write (`echo` of its
    /// address and value or count), with the faults applied.
    fn frame_reply_with(
        &self,
        addr: u8,
        function: u8,
        words: &[u16],
        echo: Option<(u16, u16)>,
        resp: Result<Response, std::io::Error>,
        faults: &[LinkFault],
    ) -> Reply {
        let mut body = vec![addr, function];
        match echo {
            Some((a, v)) => {
                body.extend_from_slice(&a.to_be_bytes());
                body.extend_from_slice(&v.to_be_bytes());
            }
            None => {
                body.push((words.len() * 2) as u8);
                for w in words {
                    body.extend_from_slice(&w.to_be_bytes());
                }
            }
        }
        let mut frame = framed(&body);
        if has(faults, FaultKind::BadCrc) {
            let n = frame.len();
            frame[n - 1] ^= 0x5a;
        } else if has(faults, FaultKind::Garbage) {
            frame = b"#@!garbled\n".to_vec();
        }
        let _ = resp;
        // A write has no SCPI reply to be late: the fault's delay applies
        // to its frame all the same.
        match faults.iter().find(|f| f.kind == FaultKind::Slow) {
            Some(f) => Reply::Late(frame, Duration::from_millis(f.delay_ms)),
            None => Reply::Frame(frame),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// CRC-16/MODBUS: the check value of the CRC catalogue (the CRC of the
    /// ASCII digits "123456789" is 0x4B37), and a read request whose CRC
    /// the Modbus over Serial Line guide (V1.02, 6.2.2) lays out low byte
    /// first on the wire.
    #[test]
    fn frames_carry_the_modbus_crc() {
        assert_eq!(CRC.checksum(b"123456789"), 0x4B37);
        let f = framed(&[0x01, 0x03, 0x00, 0x00, 0x00, 0x01]);
        let crc = CRC.checksum(&f[..6]);
        assert_eq!(&f[6..], &crc.to_le_bytes());
        // Found in a stream after junk, and a bad CRC is skipped over.
        let mut bad = f.clone();
        bad[7] ^= 1;
        let mut buf = vec![0xff, 0x00];
        buf.extend_from_slice(&bad);
        buf.extend_from_slice(&f);
        assert_eq!(take_request(&mut buf), Some(f.clone()));
        assert!(buf.is_empty());
        let mut part = f[..5].to_vec();
        assert_eq!(take_request(&mut part), None, "incomplete");
    }
}
