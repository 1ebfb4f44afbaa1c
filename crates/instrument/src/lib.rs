//! Instruments in physical units: a DC source (power supply) and a DC load
//! (electronic load), each an SCPI session driven by a profile. Errors have
//! a small kind the engine can act on. Knows nothing of plans or logs.
//!
//! Sign convention at this boundary: the source reports the current it
//! delivers (into the pack), the load the current it sinks (out of the
//! pack); [`Source::measure`] and [`Load::measure`] return pack current,
//! positive into the pack.

pub mod command;
pub mod link;
pub mod modbus;
pub mod modbus_map;
pub mod profile;
pub mod scpi;
pub mod transport;

use link::Link;
use profile::{Guarded, Profile, ProfileRole};
use scpi::{Reopen, Session, Trace};
use serde::Serialize;
use std::time::Duration;

/// What kind of failure, for the engine's decisions.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ErrorKind {
    /// No reply in time.
    Timeout,
    /// The link closed or failed.
    LinkLost,
    /// A reply that does not parse, or the wrong number of values.
    Protocol,
    /// The instrument reported an error in its queue, or a read-back differs.
    Reported,
    /// The instrument's own protection tripped (its status register says so).
    Protection,
}

/// An instrument failure.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{instrument}: {message}")]
pub struct InstrumentError {
    pub instrument: String,
    pub kind: ErrorKind,
    pub message: String,
}

/// How a load regulates.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum LoadSetting {
    Current(f64),
    Power(f64),
    Resistance(f64),
}

/// A reading from an instrument, in pack convention.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Reading {
    pub voltage_v: f64,
    pub current_a: f64,
}

fn render(template: &str, value: f64) -> String {
    let mut s = format!("{value:.6}");
    while s.ends_with('0') {
        s.pop();
    }
    if s.ends_with('.') {
        s.pop();
    }
    template.replace("{value}", &s)
}

/// What a session gets besides its link: a traffic trace and a way to
/// open the link again.
#[derive(Clone, Default)]
pub struct Attach {
    pub trace: Option<Trace>,
    pub reopen: Option<Reopen>,
}

/// One last switch-off on a link opened afresh (the running session may
/// be stuck): the profile's safe-state commands, not waited on.
pub async fn safe_state_on_new_link(
    name: &str,
    reopen: &Reopen,
    profile: &Profile,
) -> Result<(), InstrumentError> {
    let link = reopen().await?;
    let mut s = Session::with_framing(name, link, profile.framing());
    for c in &profile.session.safe_state {
        s.write(c).await?;
    }
    Ok(())
}

/// One SCPI instrument with its profile.
pub struct Instrument {
    session: Session,
    profile: Profile,
    idn: String,
}

impl Instrument {
    /// Open a session: identify, send the profile's init commands and
    /// clear the error queue. Outputs are then switched off.
    pub async fn connect(
        name: &str,
        link: Link,
        profile: Profile,
    ) -> Result<Instrument, InstrumentError> {
        Instrument::connect_with(name, link, profile, Attach::default()).await
    }

    /// [`Instrument::connect`] with a trace and a way to reopen the link.
    pub async fn connect_with(
        name: &str,
        link: Link,
        profile: Profile,
        attach: Attach,
    ) -> Result<Instrument, InstrumentError> {
        let mut session = Session::with_framing(name, link, profile.framing());
        session.set_trace(attach.trace);
        session.set_reopen(attach.reopen);
        let mut inst = Instrument {
            session,
            profile,
            idn: String::new(),
        };
        let id_cmd = inst.profile.commands.identify.clone();
        inst.idn = inst.session.query(&id_cmd).await?;
        for c in inst.profile.session.init.clone() {
            inst.session.write(&c).await?;
        }
        inst.drain_errors().await?;
        inst.make_safe().await?;
        Ok(inst)
    }

    pub fn idn(&self) -> &str {
        &self.idn
    }

    pub fn profile(&self) -> &Profile {
        &self.profile
    }

    pub fn lines_written(&self) -> u64 {
        self.session.lines_written
    }

    pub fn name(&self) -> &str {
        self.session.name()
    }

    /// Read the error queue (when the profile polls it) and fail on any
    /// entry: an error the instrument raised by itself mid-step (an
    /// over-temperature, a protection trip) leaves its state unknown.
    pub async fn poll_errors(&mut self) -> Result<(), InstrumentError> {
        if !self.profile.session.poll_errors {
            return Ok(());
        }
        let errs = self.drain_errors().await?;
        match errs.first() {
            None => Ok(()),
            Some((code, text)) => Err(self.err(
                ErrorKind::Reported,
                format!("the instrument reported {code},\"{text}\""),
            )),
        }
    }

    async fn settle(&self) {
        let ms = self.profile.session.settle_ms;
        if ms > 0 {
            tokio::time::sleep(Duration::from_millis(ms)).await;
        }
    }

    fn err(&self, kind: ErrorKind, message: String) -> InstrumentError {
        InstrumentError {
            instrument: self.session.name().to_string(),
            kind,
            message,
        }
    }

    /// After a timeout: drop stale input and check the instrument answers
    /// `*OPC?` before the next query, so a late reply is never taken for
    /// the answer to another query.
    pub async fn resync(&mut self) -> Result<(), InstrumentError> {
        self.session.resync().await
    }

    /// Read the error queue until it is empty; return the entries found.
    pub async fn drain_errors(&mut self) -> Result<Vec<(i32, String)>, InstrumentError> {
        let Some(q) = self.profile.commands.error_query.clone() else {
            return Ok(Vec::new());
        };
        let mut found = Vec::new();
        for _ in 0..32 {
            let reply = self.session.query(&q).await?;
            let (code, text) =
                scpi::parse_error_entry(&reply).map_err(|m| self.err(ErrorKind::Protocol, m))?;
            if code == 0 {
                return Ok(found);
            }
            found.push((code, text));
        }
        Ok(found)
    }

    async fn checked_write(&mut self, message: &str) -> Result<(), InstrumentError> {
        self.session.write(message).await?;
        if self.profile.session.check_errors_after_set {
            let errs = self.drain_errors().await?;
            if let Some((code, text)) = errs.first() {
                return Err(self.err(
                    ErrorKind::Reported,
                    format!("'{message}' was refused: {code},\"{text}\""),
                ));
            }
        }
        Ok(())
    }

    async fn set_value(
        &mut self,
        set: Option<String>,
        get: Option<String>,
        value: f64,
        what: &str,
    ) -> Result<(), InstrumentError> {
        let Some(set) = set else {
            return Err(self.err(
                ErrorKind::Reported,
                format!("the profile has no command to set {what}"),
            ));
        };
        self.checked_write(&render(&set, value)).await?;
        self.settle().await;
        if let (true, Some(get)) = (self.profile.session.read_back, get) {
            let back = self.session.query_number(&get).await?;
            // Instruments round to their setting resolution: accept 0.5 %
            // or 2 mV/mA/mW, whichever is larger (common practice).
            let tol = (value.abs() * 0.005).max(0.002);
            if (back - value).abs() > tol {
                return Err(self.err(
                    ErrorKind::Reported,
                    format!("{what} set to {value} but reads back {back}"),
                ));
            }
        }
        Ok(())
    }

    /// Switch the output (source) or input (load) on, confirmed by read-back.
    pub async fn enable(&mut self) -> Result<(), InstrumentError> {
        let Some(c) = self.profile.commands.enable.clone() else {
            return Err(self.err(
                ErrorKind::Reported,
                "the profile has no enable command".into(),
            ));
        };
        self.checked_write(&c).await?;
        self.settle().await;
        if let Some(q) = self.profile.commands.enabled_query.clone() {
            if !self.session.query_bool(&q).await? {
                return Err(self.err(ErrorKind::Reported, "output did not switch on".into()));
            }
        }
        Ok(())
    }

    /// Switch off, confirmed by read-back where the profile allows.
    pub async fn disable(&mut self) -> Result<(), InstrumentError> {
        let Some(c) = self.profile.commands.disable.clone() else {
            return Ok(());
        };
        self.session.write(&c).await?;
        if let Some(q) = self.profile.commands.enabled_query.clone() {
            if self.session.query_bool(&q).await? {
                return Err(self.err(ErrorKind::Reported, "output did not switch off".into()));
            }
        }
        Ok(())
    }

    /// Send the safe-state commands (output/input off) without waiting for
    /// anything. A lost link is opened again once to send them.
    pub async fn send_safe_state(&mut self) -> Result<(), InstrumentError> {
        let cmds = self.profile.session.safe_state.clone();
        let mut reopened = false;
        loop {
            let mut failed = None;
            for c in &cmds {
                if let Err(e) = self.session.write(c).await {
                    failed = Some(e);
                    break;
                }
            }
            match failed {
                None => return Ok(()),
                Some(e) if e.kind == ErrorKind::LinkLost && !reopened => {
                    reopened = true;
                    self.session.reopen().await?;
                }
                Some(e) => return Err(e),
            }
        }
    }

    /// The safe state: the profile's safe-state commands (output/input
    /// off), confirmed by read-back. A lost link is opened again once; a
    /// timeout is not waited out twice. Returns whether the off state was
    /// confirmed (`Ok(false)`: sent, but this instrument cannot confirm).
    pub async fn make_safe(&mut self) -> Result<bool, InstrumentError> {
        if self.profile.session.safe_state.is_empty() {
            return Ok(false);
        }
        let mut last: Option<InstrumentError> = None;
        for _ in 0..2 {
            if let Err(e) = self.send_safe_state().await {
                last = Some(e);
                break;
            }
            let Some(q) = self.profile.commands.enabled_query.clone() else {
                return Ok(false);
            };
            match self.session.query_bool(&q).await {
                Ok(false) => return Ok(true),
                Ok(true) => last = Some(self.err(ErrorKind::Reported, "output stays on".into())),
                Err(e) if e.kind == ErrorKind::LinkLost => {
                    last = Some(e);
                    if self.session.reopen().await.is_err() {
                        break;
                    }
                }
                Err(e) => {
                    let timeout = e.kind == ErrorKind::Timeout;
                    last = Some(e);
                    if timeout || self.session.resync().await.is_err() {
                        // Sent twice at most; a silent instrument is not
                        // waited for again.
                        let _ = self.send_safe_state().await;
                        break;
                    }
                }
            }
        }
        Err(last.unwrap_or_else(|| self.err(ErrorKind::Reported, "output stays on".into())))
    }

    /// Voltage and current as the instrument reports them (magnitudes).
    /// Called once per sample: borrows the templates, clones nothing.
    async fn measure_raw(&mut self) -> Result<(f64, f64), InstrumentError> {
        let c = &self.profile.commands;
        if let Some(both) = &c.measure_voltage_current {
            let v = self.session.query_numbers(both, 2).await?;
            Ok((v[0], v[1]))
        } else {
            let v = self.session.query_number(&c.measure_voltage).await?;
            let Some(mc) = &c.measure_current else {
                return Err(self.err(
                    ErrorKind::Reported,
                    "the profile has no command to measure current".into(),
                ));
            };
            let i = self.session.query_number(mc).await?;
            Ok((v, i))
        }
    }

    /// Does the profile program this protection?
    pub fn has_protection(&self, p: Guarded) -> bool {
        self.profile.protection.templates(p).0.is_some()
    }

    /// A protection level within the profile's declared range: past its
    /// range the instrument cannot go anyway.
    pub fn within_range(&self, p: Guarded, level: f64) -> f64 {
        let r = &self.profile.ranges;
        let max = match p {
            Guarded::OverCurrent => r.current_max_a,
            _ => r.voltage_max_v,
        };
        max.map_or(level, |m| level.min(m))
    }

    /// Program one protection level; returns the level read back, where
    /// the profile can read it. A refusal or a read-back off by more than
    /// the setting tolerance is an error: the backstop is not what the
    /// envelope asks for.
    pub async fn set_protection(
        &mut self,
        p: Guarded,
        value: f64,
    ) -> Result<Option<f64>, InstrumentError> {
        let (set, get) = self.profile.protection.templates(p);
        let (Some(set), get) = (set.cloned(), get.cloned()) else {
            return Err(self.err(
                ErrorKind::Reported,
                format!("the profile has no command to set the {}", p.name()),
            ));
        };
        self.checked_write(&render(&set, value)).await?;
        self.settle().await;
        let Some(get) = get else { return Ok(None) };
        let back = self.session.query_number(&get).await?;
        let tol = (value.abs() * 0.005).max(0.002);
        if (back - value).abs() > tol {
            return Err(self.err(
                ErrorKind::Reported,
                format!(
                    "{} set to {value} {} but reads back {back}",
                    p.name(),
                    p.unit()
                ),
            ));
        }
        Ok(Some(back))
    }

    /// The protections that have tripped and are latched, by the names
    /// the profile gives their status bits; empty when none has, or when
    /// the profile cannot tell.
    pub async fn trips(&mut self) -> Result<Vec<String>, InstrumentError> {
        let Some(q) = self.profile.protection.tripped_query.clone() else {
            return Ok(Vec::new());
        };
        let reg = self.session.query_number(&q).await?;
        if !(0.0..=65535.0).contains(&reg) {
            return Err(self.err(
                ErrorKind::Protocol,
                format!("'{q}' answered {reg}, not a status register"),
            ));
        }
        let reg = reg.round() as u32;
        Ok(self
            .profile
            .protection
            .trip_bits
            .iter()
            .filter(|(_, bit)| reg & (1 << **bit) != 0)
            .map(|(name, bit)| format!("{name} (status bit {bit})"))
            .collect())
    }

    /// Fail when a protection has tripped: the instrument switched itself
    /// off and the step cannot go on.
    pub async fn check_trips(&mut self) -> Result<(), InstrumentError> {
        let t = self.trips().await?;
        if t.is_empty() {
            return Ok(());
        }
        Err(self.err(
            ErrorKind::Protection,
            format!(
                "its own protection tripped and switched it off: {}",
                t.join(", ")
            ),
        ))
    }

    /// Re-arm latched protection; `Ok(false)` when the profile has no
    /// command for it.
    pub async fn clear_protection(&mut self) -> Result<bool, InstrumentError> {
        let Some(c) = self.profile.protection.clear.clone() else {
            return Ok(false);
        };
        self.checked_write(&c).await?;
        Ok(true)
    }

    /// Voltage only.
    pub async fn measure_voltage(&mut self) -> Result<f64, InstrumentError> {
        self.session
            .query_number(&self.profile.commands.measure_voltage)
            .await
    }

    /// Current only (a reference meter's current input or shunt), in the
    /// sign the instrument reports.
    pub async fn measure_current(&mut self) -> Result<f64, InstrumentError> {
        let Some(c) = self.profile.commands.measure_current.clone() else {
            return Err(self.err(
                ErrorKind::Reported,
                "the profile has no command to measure current (commands.measure_current)".into(),
            ));
        };
        self.session.query_number(&c).await
    }

    /// Temperature from the instrument's sensor input, if it has one.
    pub async fn measure_temperature(&mut self) -> Result<Option<f64>, InstrumentError> {
        match &self.profile.commands.measure_temperature {
            Some(c) => Ok(Some(self.session.query_number(c).await?)),
            None => Ok(None),
        }
    }
}

/// A programmable DC supply charging the pack.
pub struct Source(pub Instrument);

impl Source {
    pub async fn connect(link: Link, profile: Profile) -> Result<Source, InstrumentError> {
        Source::connect_with(link, profile, Attach::default()).await
    }

    pub async fn connect_with(
        link: Link,
        profile: Profile,
        attach: Attach,
    ) -> Result<Source, InstrumentError> {
        if !matches!(profile.role, ProfileRole::Source | ProfileRole::SourceSink) {
            return Err(InstrumentError {
                instrument: "source".into(),
                kind: ErrorKind::Reported,
                message: format!("profile '{}' is not a source profile", profile.name),
            });
        }
        Ok(Source(
            Instrument::connect_with("source", link, profile, attach).await?,
        ))
    }

    /// Program a CC-CV charge: voltage limit and current limit (output off).
    pub async fn program(&mut self, voltage_v: f64, current_a: f64) -> Result<(), InstrumentError> {
        let c = self.0.profile.commands.clone();
        if let (Some(set_mode), Some(Some(w))) = (
            &c.set_mode,
            self.0
                .profile
                .mode_words
                .as_ref()
                .map(|w| w.voltage.clone()),
        ) {
            self.0
                .checked_write(&set_mode.replace("{mode}", &w))
                .await?;
        }
        self.0
            .set_value(c.set_voltage, c.get_voltage, voltage_v, "voltage")
            .await?;
        self.0
            .set_value(c.set_current, c.get_current, current_a, "current")
            .await
    }

    /// Pack voltage and pack current (positive: into the pack).
    pub async fn measure(&mut self) -> Result<Reading, InstrumentError> {
        let (v, i) = self.0.measure_raw().await?;
        Ok(Reading {
            voltage_v: v,
            current_a: i,
        })
    }
}

/// A DC electronic load discharging the pack.
pub struct Load(pub Instrument);

impl Load {
    pub async fn connect(link: Link, profile: Profile) -> Result<Load, InstrumentError> {
        Load::connect_with(link, profile, Attach::default()).await
    }

    pub async fn connect_with(
        link: Link,
        profile: Profile,
        attach: Attach,
    ) -> Result<Load, InstrumentError> {
        if !matches!(profile.role, ProfileRole::Load | ProfileRole::SourceSink) {
            return Err(InstrumentError {
                instrument: "load".into(),
                kind: ErrorKind::Reported,
                message: format!("profile '{}' is not a load profile", profile.name),
            });
        }
        Ok(Load(
            Instrument::connect_with("load", link, profile, attach).await?,
        ))
    }

    /// Program the load's mode and setpoint (input off).
    pub async fn program(&mut self, setting: LoadSetting) -> Result<(), InstrumentError> {
        let c = self.0.profile.commands.clone();
        let words = self.0.profile.mode_words.clone();
        if let (Some(set_mode), Some(words)) = (&c.set_mode, &words) {
            let w = match setting {
                LoadSetting::Current(_) => &words.current,
                LoadSetting::Power(_) => &words.power,
                LoadSetting::Resistance(_) => &words.resistance,
            };
            self.0.checked_write(&set_mode.replace("{mode}", w)).await?;
        }
        match setting {
            LoadSetting::Current(a) => {
                self.0
                    .set_value(c.set_current, c.get_current, a, "current")
                    .await
            }
            LoadSetting::Power(w) => self.0.set_value(c.set_power, c.get_power, w, "power").await,
            LoadSetting::Resistance(r) => {
                self.0
                    .set_value(c.set_resistance, c.get_resistance, r, "resistance")
                    .await
            }
        }
    }

    /// Pack voltage and pack current (negative: out of the pack). A
    /// source-sink instrument reports signed current already.
    pub async fn measure(&mut self) -> Result<Reading, InstrumentError> {
        let (v, i) = self.0.measure_raw().await?;
        let signed = self.0.profile.role == ProfileRole::SourceSink;
        Ok(Reading {
            voltage_v: v,
            current_a: if signed { i } else { -i },
        })
    }
}

/// A separate voltmeter with sense leads at the pack terminals, and a
/// temperature input.
pub struct Meter(pub Instrument);

impl Meter {
    pub async fn connect_with(
        link: Link,
        profile: Profile,
        attach: Attach,
    ) -> Result<Meter, InstrumentError> {
        if profile.role != ProfileRole::Meter {
            return Err(InstrumentError {
                instrument: "meter".into(),
                kind: ErrorKind::Reported,
                message: format!("profile '{}' is not a meter profile", profile.name),
            });
        }
        Ok(Meter(
            Instrument::connect_with("meter", link, profile, attach).await?,
        ))
    }

    /// Can this meter read channels (a scan list, or one query each)?
    pub fn can_scan(&self) -> bool {
        let c = &self.0.profile.commands;
        c.scan_read.is_some() || c.measure_channel_voltage.is_some()
    }

    /// Set a scanning meter up for the groups' voltage channels and the
    /// temperature inputs: configure each kind, then the scan list
    /// (voltages first). A meter that reads channel by channel needs
    /// nothing.
    pub async fn setup_scan(
        &mut self,
        volts: &[u32],
        temps: &[u32],
    ) -> Result<(), InstrumentError> {
        let c = self.0.profile.commands.clone();
        let fill = |t: &str, chs: &[u32]| t.replace("{channels}", &channel_list(chs));
        if let (Some(t), false) = (&c.configure_voltage_channels, volts.is_empty()) {
            self.0.checked_write(&fill(t, volts)).await?;
        }
        if let (Some(t), false) = (&c.configure_temperature_channels, temps.is_empty()) {
            self.0.checked_write(&fill(t, temps)).await?;
        }
        if let Some(t) = &c.scan_list {
            let all: Vec<u32> = volts.iter().chain(temps).copied().collect();
            self.0.checked_write(&fill(t, &all)).await?;
        }
        Ok(())
    }

    /// Read every channel: the voltages, then the temperatures, in the
    /// order given. An overloaded or open input reads as the instrument
    /// reports it (SCPI's +9.9E37); the caller judges it.
    pub async fn scan(
        &mut self,
        volts: &[u32],
        temps: &[u32],
    ) -> Result<Vec<f64>, InstrumentError> {
        let c = &self.0.profile.commands;
        let want = volts.len() + temps.len();
        if let Some(q) = c.scan_read.clone() {
            let reply = self.0.session.query(&q).await?;
            let parts: Vec<&str> = reply.split(',').collect();
            if parts.len() != want {
                return Err(self.0.err(
                    ErrorKind::Protocol,
                    format!(
                        "'{q}' -> {} readings, expected {want} (the scan list)",
                        parts.len()
                    ),
                ));
            }
            return parts
                .iter()
                .map(|p| {
                    scpi::parse_channel_reading(p)
                        .map_err(|m| self.0.err(ErrorKind::Protocol, format!("'{q}' -> {m}")))
                })
                .collect();
        }
        let (Some(tv), tt) = (
            c.measure_channel_voltage.clone(),
            c.measure_channel_temperature.clone(),
        ) else {
            return Err(self.0.err(
                ErrorKind::Reported,
                "the meter's profile has no scan_read or measure_channel_voltage".into(),
            ));
        };
        let mut out = Vec::with_capacity(want);
        for &ch in volts {
            let q = tv.replace("{channels}", &channel_list(&[ch]));
            let reply = self.0.session.query(&q).await?;
            out.push(
                scpi::parse_channel_reading(&reply)
                    .map_err(|m| self.0.err(ErrorKind::Protocol, format!("'{q}' -> {m}")))?,
            );
        }
        for &ch in temps {
            let Some(t) = &tt else {
                return Err(self.0.err(
                    ErrorKind::Reported,
                    "the meter's profile has no measure_channel_temperature".into(),
                ));
            };
            let q = t.replace("{channels}", &channel_list(&[ch]));
            let reply = self.0.session.query(&q).await?;
            out.push(
                scpi::parse_channel_reading(&reply)
                    .map_err(|m| self.0.err(ErrorKind::Protocol, format!("'{q}' -> {m}")))?,
            );
        }
        Ok(out)
    }
}

/// A SCPI channel list (`(@101:113,201)`).
pub fn channel_list(chs: &[u32]) -> String {
    model::groups::channel_list(chs)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_render_without_float_noise() {
        assert_eq!(render("VOLT {value}", 42.0), "VOLT 42");
        assert_eq!(render("CURR {value}", 2.8000000000000003), "CURR 2.8");
        assert_eq!(render("CURR {value}", 0.0005), "CURR 0.0005");
    }
}
