//! Settings of the simulated bench: the pack's condition, each meter's
//! error, and injected faults. Defaults describe a used pack on a decent
//! bench; `ideal = true` removes every measurement error. Readable from a
//! TOML file (`--sim-config`).

use crate::location::{toml_error, InputErrors};
use serde::{Deserialize, Serialize};
use std::path::Path;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct SimConfig {
    /// Seed of the measurement-noise generator (runs are repeatable).
    pub seed: u64,
    /// No measurement error at all.
    pub ideal: bool,
    pub pack: PackConfig,
    pub source: InstrumentMeters,
    pub load: InstrumentMeters,
    pub temperature: MeterConfig,
    /// A separate voltmeter with sense leads at the pack terminals (a
    /// bench-grade multimeter: ±0.01 % + 0.2 mV, 0.1 mV resolution).
    pub meter: MeterConfig,
    pub faults: Faults,
    /// The pack as groups in series, each with its own state (absent or
    /// `count = 0`: one lumped pack).
    pub groups: GroupsConfig,
}

/// A pack built of parallel groups in series, with a spread between them
/// and a scanning voltmeter on their channels (see
/// [`crate::groups::GroupChannels::sim_default`] for its channel numbers).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct GroupsConfig {
    /// Number of groups; must equal the pack's series count. 0: lumped.
    pub count: u32,
    pub wiring: crate::groups::Wiring,
    /// Standard deviation of the groups' capacity about the pack's, %.
    pub capacity_spread_pct: f64,
    /// Standard deviation of the groups' resistance, %.
    pub resistance_spread_pct: f64,
    /// Mean self-discharge, % of capacity a day, and its spread (sd).
    pub self_discharge_pct_per_day: f64,
    pub self_discharge_spread_pct_per_day: f64,
    /// Groups set by hand, over the drawn spread.
    pub set: Vec<GroupSet>,
    /// Groups that carry a surface sensor (channel 200 + group).
    pub sensors: Vec<u32>,
    /// Injected channel faults.
    pub faults: Vec<ChannelFault>,
    /// Scanner reading error (a DAQ's DC volts: ±0.02 % + 0.5 mV).
    pub scanner: MeterConfig,
}

impl Default for GroupsConfig {
    /// Plausible for a used pack (common practice, rounded): capacity
    /// within a few per cent, resistance within about ten, self-discharge
    /// a few hundredths of a per cent a day.
    fn default() -> Self {
        GroupsConfig {
            count: 0,
            wiring: crate::groups::Wiring::Direct,
            capacity_spread_pct: 1.5,
            resistance_spread_pct: 8.0,
            self_discharge_pct_per_day: 0.05,
            self_discharge_spread_pct_per_day: 0.02,
            set: Vec::new(),
            sensors: Vec::new(),
            faults: Vec::new(),
            scanner: MeterConfig {
                gain_error_pct: 0.02,
                offset: 0.0005,
                noise: 0.0003,
                resolution: 0.0001,
                stated: stated(0.05, 0.002, 0.0001),
            },
        }
    }
}

/// One group set by hand: its capacity and resistance as factors of the
/// pack's, its self-discharge.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GroupSet {
    pub group: u32,
    pub capacity: Option<f64>,
    pub resistance: Option<f64>,
    pub self_discharge_pct_per_day: Option<f64>,
}

/// What goes wrong with a scanner channel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ChannelFaultKind {
    /// The sense lead is off: the channel reads overload (+9.9E37).
    Open,
    /// The channel repeats the value it read when the fault began.
    Stuck,
    /// A loose sense lead: every other scan the channel reads low by a
    /// few hundred millivolts.
    Loose,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChannelFault {
    pub channel: u32,
    pub kind: ChannelFaultKind,
    /// Bench time the fault starts, s.
    #[serde(default)]
    pub after_s: f64,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct PackConfig {
    /// True capacity as a fraction of rated.
    pub capacity_factor: f64,
    /// Resistance multiplier against a new pack.
    pub resistance_factor: f64,
    /// State of charge when the bench is switched on (0..1).
    pub initial_soc: f64,
    pub ambient_c: f64,
    /// Current the pack's own electronics draw all the time, A.
    pub standby_drain_a: f64,
}

impl Default for PackConfig {
    fn default() -> Self {
        PackConfig {
            capacity_factor: 0.93,
            resistance_factor: 1.25,
            initial_soc: 0.5,
            ambient_c: 25.0,
            standby_drain_a: 0.0,
        }
    }
}

/// Error model of one reading: y = x·(1 + gain_error) + offset + noise,
/// rounded to the resolution.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MeterConfig {
    pub gain_error_pct: f64,
    pub offset: f64,
    pub noise: f64,
    pub resolution: f64,
    /// The accuracy this simulated meter states (what its profile declares
    /// and the uncertainty budget reads). The applied gain and offset must
    /// lie within it; absent: the applied errors' own size.
    pub stated: Option<crate::accuracy::Spec>,
}

impl MeterConfig {
    /// The accuracy this meter states: its `stated` figures, else the
    /// applied errors' size (and its resolution).
    pub fn stated_spec(&self) -> crate::accuracy::Spec {
        self.stated.unwrap_or(crate::accuracy::Spec {
            reading_pct: self.gain_error_pct.abs(),
            range_pct: 0.0,
            offset: self.offset.abs(),
            resolution: self.resolution,
            calibrated: false,
        })
    }

    /// The applied errors lie within the stated accuracy.
    fn check(&self, what: &str) -> Result<(), String> {
        let s = self.stated_spec();
        s.check(&format!("{what}.stated"))?;
        let eps = 1e-12;
        if self.gain_error_pct.abs() > s.reading_pct + eps || self.offset.abs() > s.offset + eps {
            return Err(format!(
                "{what}: the applied error ({} % of reading, offset {}) is outside the accuracy it states (±{} %, ±{}): a simulated meter applies errors within what it declares",
                self.gain_error_pct, self.offset, s.reading_pct, s.offset
            ));
        }
        Ok(())
    }
}

/// Stated accuracy of a simulated meter (the figures its budget reads).
fn stated(reading_pct: f64, offset: f64, resolution: f64) -> Option<crate::accuracy::Spec> {
    Some(crate::accuracy::Spec {
        reading_pct,
        range_pct: 0.0,
        offset,
        resolution,
        calibrated: false,
    })
}

impl Default for MeterConfig {
    fn default() -> Self {
        MeterConfig {
            gain_error_pct: 0.0,
            offset: 0.0,
            noise: 0.0,
            resolution: 0.0,
            stated: None,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct InstrumentMeters {
    pub voltage: MeterConfig,
    pub current: MeterConfig,
}

impl Default for InstrumentMeters {
    /// A bench-grade instrument: ±0.05 % + 2 mV on voltage with 1 mV
    /// resolution, −0.1 % + 2 mA on current with 1 mA resolution (typical
    /// figures of the trade, rounded).
    fn default() -> Self {
        InstrumentMeters {
            voltage: MeterConfig {
                gain_error_pct: 0.05,
                offset: 0.002,
                noise: 0.001,
                resolution: 0.001,
                stated: stated(0.1, 0.005, 0.001),
            },
            current: MeterConfig {
                gain_error_pct: -0.1,
                offset: 0.002,
                noise: 0.002,
                resolution: 0.001,
                stated: stated(0.2, 0.005, 0.001),
            },
        }
    }
}

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Faults {
    /// The supply regulates its voltage this far off its setpoint, %.
    pub source_voltage_error_pct: f64,
    /// Extra heat inside the pack (an internal fault), W, from a time on.
    pub heat_w: f64,
    pub heat_after_s: Option<f64>,
    /// Link and protocol faults, each on one instrument from a time on.
    pub link: Vec<LinkFault>,
    /// Reading faults: from a time on, every reading of a quantity (on
    /// every instrument) is off by an amount — a failing sense lead,
    /// shunt or sensor.
    pub reading: Vec<ReadingFault>,
}

/// What a reading fault shifts.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Quantity {
    Voltage,
    Current,
    Temperature,
}

/// One reading fault.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ReadingFault {
    pub quantity: Quantity,
    /// Added to the reading (V, A or degC; current as the instrument
    /// reports it, a magnitude).
    pub offset: f64,
    /// Bench time the fault starts, s.
    pub after_s: f64,
}

/// Which simulated instrument a fault hits.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FaultTarget {
    Source,
    Load,
    SourceSink,
    Meter,
}

impl FaultTarget {
    pub fn name(self) -> &'static str {
        match self {
            FaultTarget::Source => "source",
            FaultTarget::Load => "load",
            FaultTarget::SourceSink => "source-sink",
            FaultTarget::Meter => "meter",
        }
    }
}

/// The kinds of link fault the simulated instruments can show.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum FaultKind {
    /// From the fault on, queries get no answer (a dead reply path);
    /// commands still take effect.
    NoReply,
    /// From the fault on, every reply is garbled.
    Garbage,
    /// From the fault on, every reply comes `delay_ms` late.
    Slow,
    /// At the fault the link drops once; a new connection is accepted.
    Disconnect,
    /// At the fault one error is pushed into the error queue.
    Error,
    /// From the fault on, level settings are accepted without error but
    /// do not take (the read-back shows the old value).
    WrongReadBack,
    /// From the fault on, every Modbus reply carries a wrong CRC (on an
    /// SCPI link, a garbled reply).
    BadCrc,
    /// From the fault on, the line is dead both ways: messages are
    /// neither carried out nor answered (a pulled cable, a hung
    /// interface). With an end, the line comes back then.
    Silent,
}

impl FaultKind {
    pub const ALL: [FaultKind; 8] = [
        FaultKind::NoReply,
        FaultKind::Garbage,
        FaultKind::Slow,
        FaultKind::Disconnect,
        FaultKind::Error,
        FaultKind::WrongReadBack,
        FaultKind::BadCrc,
        FaultKind::Silent,
    ];
    pub fn name(self) -> &'static str {
        match self {
            FaultKind::NoReply => "no-reply",
            FaultKind::Garbage => "garbage",
            FaultKind::Slow => "slow",
            FaultKind::Disconnect => "disconnect",
            FaultKind::Error => "error",
            FaultKind::WrongReadBack => "wrong-read-back",
            FaultKind::BadCrc => "bad-crc",
            FaultKind::Silent => "silent",
        }
    }
}

/// One injected link fault.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LinkFault {
    pub instrument: FaultTarget,
    pub kind: FaultKind,
    /// Bench time the fault starts, s.
    pub after_s: f64,
    /// Bench time the fault ends, s (none: it lasts).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub until_s: Option<f64>,
    /// Reply delay of a `slow` fault, ms.
    #[serde(default = "default_delay_ms")]
    pub delay_ms: u64,
    /// Error code pushed by an `error` fault (default −300, device-specific error).
    #[serde(default = "default_error_code")]
    pub error_code: i32,
}

fn default_delay_ms() -> u64 {
    1500
}
fn default_error_code() -> i32 {
    -300
}

impl std::str::FromStr for LinkFault {
    type Err = String;
    /// `INSTRUMENT:KIND@TIME[..END][:DELAY]`, e.g. `load:no-reply@600s`,
    /// `source:slow@10s:800ms`, `load:error@5s`, `load:silent@600s..610s`.
    fn from_str(s: &str) -> Result<LinkFault, String> {
        let expected = "expected INSTRUMENT:KIND@TIME[..END][:DELAY], e.g. load:no-reply@600s, load:silent@600s..610s or source:slow@10s:800ms";
        let (who, rest) = s
            .split_once(':')
            .ok_or_else(|| format!("fault '{s}': {expected}"))?;
        let instrument = match who {
            "source" => FaultTarget::Source,
            "load" => FaultTarget::Load,
            "source-sink" => FaultTarget::SourceSink,
            "meter" => FaultTarget::Meter,
            other => {
                return Err(format!(
                    "fault '{s}': unknown instrument '{other}', expected source, load, source-sink or meter"
                ))
            }
        };
        let (kind, when) = rest
            .split_once('@')
            .ok_or_else(|| format!("fault '{s}': {expected}"))?;
        let kind = FaultKind::ALL
            .into_iter()
            .find(|k| k.name() == kind)
            .ok_or_else(|| {
                let names: Vec<&str> = FaultKind::ALL.iter().map(|k| k.name()).collect();
                format!(
                    "fault '{s}': unknown kind '{kind}', expected one of {}",
                    names.join(", ")
                )
            })?;
        let (time, delay) = match when.split_once(':') {
            Some((t, d)) => (t, Some(d)),
            None => (when, None),
        };
        let (time, until) = match time.split_once("..") {
            Some((a, b)) => (a, Some(b)),
            None => (time, None),
        };
        let after_s = crate::units::duration(time).map_err(|e| format!("fault '{s}': {e}"))?;
        let until_s = until
            .map(|u| crate::units::duration(u).map_err(|e| format!("fault '{s}': {e}")))
            .transpose()?;
        if until_s.is_some_and(|u| u <= after_s) {
            return Err(format!("fault '{s}': its end must come after its start"));
        }
        let mut f = LinkFault {
            instrument,
            kind,
            after_s,
            until_s,
            delay_ms: default_delay_ms(),
            error_code: default_error_code(),
        };
        if let Some(d) = delay {
            if kind != FaultKind::Slow {
                return Err(format!("fault '{s}': only a slow fault takes a delay"));
            }
            let secs = crate::units::duration(d).map_err(|e| format!("fault '{s}': {e}"))?;
            f.delay_ms = (secs * 1000.0).round() as u64;
        }
        Ok(f)
    }
}

impl Default for SimConfig {
    fn default() -> Self {
        SimConfig {
            seed: 1,
            ideal: false,
            pack: PackConfig::default(),
            source: InstrumentMeters::default(),
            load: InstrumentMeters::default(),
            temperature: MeterConfig {
                gain_error_pct: 0.0,
                offset: 0.2,
                noise: 0.05,
                resolution: 0.1,
                stated: stated(0.0, 1.0, 0.1),
            },
            meter: MeterConfig {
                gain_error_pct: 0.01,
                offset: 0.0002,
                noise: 0.0002,
                resolution: 0.0001,
                stated: stated(0.02, 0.0005, 0.0001),
            },
            faults: Faults::default(),
            groups: GroupsConfig::default(),
        }
    }
}

impl SimConfig {
    pub fn from_toml(file: &Path, text: &str) -> Result<SimConfig, InputErrors> {
        let cfg: SimConfig =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        if let Err(message) = cfg.check_meters() {
            return Err(InputErrors(vec![crate::location::LocatedError {
                location: crate::location::Location::at(file, text, 0),
                message,
            }]));
        }
        Ok(cfg)
    }

    /// Every simulated meter applies errors within the accuracy it states.
    pub fn check_meters(&self) -> Result<(), String> {
        for (what, m) in [
            ("source.voltage", &self.source.voltage),
            ("source.current", &self.source.current),
            ("load.voltage", &self.load.voltage),
            ("load.current", &self.load.current),
            ("meter", &self.meter),
            ("groups.scanner", &self.groups.scanner),
        ] {
            m.check(what)?;
        }
        Ok(())
    }

    /// The accuracy each simulated instrument declares (its profile's
    /// `[accuracy]` on the simulated bench): source, load, and the
    /// separate voltmeter with the temperature input.
    pub fn declared(&self) -> [crate::accuracy::Declared; 3] {
        let inst = |m: &InstrumentMeters| crate::accuracy::Declared {
            voltage: Some(m.voltage.stated_spec()),
            current: Some(m.current.stated_spec()),
            timebase_ppm: None,
            temperature_c: Some(self.temperature.stated_spec().offset),
            example: false,
        };
        [
            inst(&self.source),
            inst(&self.load),
            crate::accuracy::Declared {
                voltage: Some(self.meter.stated_spec()),
                current: None,
                timebase_ppm: None,
                temperature_c: Some(self.temperature.stated_spec().offset),
                example: false,
            },
        ]
    }

    /// An ideal bench: no measurement error.
    pub fn ideal() -> SimConfig {
        SimConfig {
            ideal: true,
            ..SimConfig::default()
        }
    }
}
