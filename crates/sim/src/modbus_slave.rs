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

/// The silent intervals of Modbus over Serial Line V1.02 §2.5.1.1 at a
/// baud rate: (t1.5, t3.5), the gap that breaks a frame and the one that
/// ends it. A character is 11 bits (start, 8 data, parity or a second
/// stop bit, stop); above 19200 baud the spec fixes 750 µs and 1.75 ms.
/// With no baud rate (a line of no fixed speed): the fixed values.
pub fn silences(baud: Option<u32>) -> (Duration, Duration) {
    match baud {
        Some(b) if b > 0 && b <= 19_200 => {
            let ch = 11.0 / f64::from(b);
            (
                Duration::from_secs_f64(1.5 * ch),
                Duration::from_secs_f64(3.5 * ch),
            )
        }
        _ => (Duration::from_micros(750), Duration::from_micros(1750)),
    }
}

/// A frame as the line delimited it, checked as a receiver checks it
/// (§2.5.1.1 and the CRC, §2.5.1.2): `None` for a frame to discard
/// without a reply (too short or too long, a gap of more than 1.5
/// characters inside it, a wrong CRC).
pub fn checked_frame(bytes: &[u8], broken: bool) -> Option<&[u8]> {
    if broken || !(4..=256).contains(&bytes.len()) {
        return None;
    }
    let (body, crc) = bytes.split_at(bytes.len() - 2);
    (CRC.checksum(body).to_le_bytes() == [crc[0], crc[1]]).then_some(bytes)
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

    /// Whether some operation of the map sits at this register with this
    /// width for this kind of function (read or write), whatever its
    /// fixed word.
    fn register_known(&self, function: u8, register: u16, count: u16) -> bool {
        self.map.ops.values().any(|r| {
            r.register == register
                && u16::from(r.words) == count
                && match function {
                    3 | 4 => r.function == function,
                    _ => matches!(r.function, 6 | 16),
                }
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
    /// A checked request frame (address, function, data, CRC) carried
    /// out. Modbus Application Protocol V1.1b3 §6 and §7: an unsupported
    /// function gets exception 01, an address the map has not 02, a bad
    /// quantity, byte count, length or value 03, a failure of the device
    /// 04. A broadcast (address 0) write is carried out with no reply; a
    /// broadcast read is not a request.
    pub fn handle(&self, inst: &mut SimInstrument, req: &[u8]) -> Reply {
        let addr = req[0];
        let broadcast = addr == 0;
        if !broadcast && addr != self.address() {
            return Reply::Silence;
        }
        let r = self.handle_for(inst, req);
        if broadcast {
            // Carried out above when it is a write; never answered.
            return Reply::Silence;
        }
        r
    }

    fn handle_for(&self, inst: &mut SimInstrument, req: &[u8]) -> Reply {
        let (addr, function) = (req[0], req[1]);
        let data = &req[2..req.len() - 2];
        let word = |i: usize| u16::from_be_bytes([data[i], data[i + 1]]);
        let exception = |code: u8| Reply::Frame(framed(&[addr, function | 0x80, code]));
        if !matches!(function, 3 | 4 | 6 | 16) {
            return exception(1);
        }
        if addr == 0 && matches!(function, 3 | 4) {
            return Reply::Silence;
        }
        // The request's own structure: its length and quantity (§6.3,
        // §6.4, §6.6, §6.12).
        let (register, count, written): (u16, u16, Vec<u16>) = match function {
            3 | 4 => {
                if data.len() != 4 {
                    return exception(3);
                }
                let n = word(2);
                if !(1..=125).contains(&n) {
                    return exception(3);
                }
                (word(0), n, Vec::new())
            }
            6 => {
                if data.len() != 4 {
                    return exception(3);
                }
                (word(0), 1, vec![word(2)])
            }
            _ => {
                if data.len() < 5 {
                    return exception(3);
                }
                let n = word(2);
                let bytes = usize::from(data[4]);
                if !(1..=123).contains(&n) || bytes != usize::from(n) * 2 || data.len() != 5 + bytes
                {
                    return exception(3);
                }
                (
                    word(0),
                    n,
                    (0..usize::from(n)).map(|k| word(5 + 2 * k)).collect(),
                )
            }
        };
        if !self.register_known(function, register, count) {
            return exception(2);
        }
        let Some((op, r)) = self.op_at(function, register, count, &written) else {
            // The register is there; the word written is not one it takes
            // (a fixed-word register given another word).
            return exception(3);
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
        // A frame as the line delimited it: whole and good, or discarded.
        assert_eq!(checked_frame(&f, false), Some(&f[..]));
        assert_eq!(checked_frame(&f, true), None, "a gap inside it");
        let mut bad = f.clone();
        bad[7] ^= 1;
        assert_eq!(checked_frame(&bad, false), None, "a wrong CRC");
        assert_eq!(checked_frame(&f[..5], false), None, "truncated");
        let mut junk_first = vec![0xff, 0x00];
        junk_first.extend_from_slice(&f);
        assert_eq!(checked_frame(&junk_first, false), None, "noise in front");
    }

    /// Modbus over Serial Line V1.02 §2.5.1.1: above 19200 baud the
    /// silences are fixed (750 µs, 1.75 ms); at 9600 baud a character of
    /// 11 bits lasts 1.146 ms, so 1.5 and 3.5 characters are 1.719 ms and
    /// 4.010 ms.
    #[test]
    fn the_silences_follow_the_baud_rate() {
        let (a, b) = silences(Some(115_200));
        assert_eq!((a.as_micros(), b.as_micros()), (750, 1750));
        let (a, b) = silences(Some(9600));
        assert!((a.as_secs_f64() - 1.71875e-3).abs() < 1e-7, "{a:?}");
        assert!((b.as_secs_f64() - 4.0104e-3).abs() < 1e-6, "{b:?}");
    }
}
