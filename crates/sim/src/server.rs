//! The simulated supply and load as SCPI endpoints: each takes program
//! messages as text, parses them with [`instrument::command`] (the
//! same vocabulary the drivers render from), executes them on the shared
//! bench and answers with IEEE 488.2 response data. Errors go to a SCPI
//! error queue with the standard numbers; `*ESR?` and `*STB?` follow the
//! standard bits.

use super::battery::LoadMode;
use super::bench::SimBench;
use super::bench::{Guard, Limit};
use super::config::{FaultKind, FaultTarget, LinkFault};
use super::lock::locked;
use instrument::command::{
    nr3, parse_bool, parse_message, parse_nrf, Cmd, NumericParam, Protect, Register, ScpiError,
    FUNCTION_WORDS, OPER_CC, OPER_CV, OPER_OUTPUT_ON,
};
use instrument::link::{LineResponder, Response};
use std::collections::VecDeque;
use std::io;
use std::sync::{Arc, Mutex};

/// Error-queue depth of the simulated instruments.
pub const QUEUE_DEPTH: usize = 20;

/// Which simulated instrument.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SimRole {
    /// A programmable DC supply (CC-CV).
    Source,
    /// A DC electronic load (CC, CP, CR).
    Load,
    /// One bidirectional instrument: `FUNC VOLT` sources (CC-CV, `CURR`
    /// is the current limit), `FUNC CURR|POW|RES` sinks; one `OUTPut`.
    SourceSink,
    /// A voltmeter with sense leads at the pack terminals and a
    /// temperature input.
    Meter,
}

/// A command that has no query form.
fn set_only(query: bool) -> Result<(), ScpiError> {
    if query {
        Err(ScpiError::UndefinedHeader)
    } else {
        Ok(())
    }
}

/// A query that has no command form.
fn query_only(query: bool) -> Result<(), ScpiError> {
    if query {
        Ok(())
    } else {
        Err(ScpiError::UndefinedHeader)
    }
}

impl SimRole {
    pub fn target(self) -> FaultTarget {
        match self {
            SimRole::Source => FaultTarget::Source,
            SimRole::Load => FaultTarget::Load,
            SimRole::SourceSink => FaultTarget::SourceSink,
            SimRole::Meter => FaultTarget::Meter,
        }
    }
}

/// The source-sink instrument's function.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum SinkFunction {
    Voltage,
    Sink(LoadMode),
}

/// A fault taking effect, for the server's state log.
#[derive(Debug, Clone, PartialEq)]
pub struct FaultFired {
    pub fault: LinkFault,
    pub bench_s: f64,
}

/// One SCPI-1999 status register: condition (live), event (latched by the
/// transition filters, cleared by reading and `*CLS`), enable mask.
#[derive(Debug, Clone, Copy, PartialEq)]
struct StatusRegister {
    condition: u16,
    event: u16,
    enable: u16,
    positive: u16,
    negative: u16,
}

impl StatusRegister {
    /// `STATus:PRESet` and power-on: enables off, every rising edge latched.
    const PRESET: StatusRegister = StatusRegister {
        condition: 0,
        event: 0,
        enable: 0,
        positive: 0x7fff,
        negative: 0,
    };

    fn update(&mut self, now: u16) {
        let rose = now & !self.condition;
        let fell = !now & self.condition;
        self.event |= (rose & self.positive) | (fell & self.negative);
        self.condition = now;
    }

    fn summary(&self) -> bool {
        self.event & self.enable != 0
    }
}

fn reg_index(r: Register) -> usize {
    match r {
        Register::Operation => 0,
        Register::Questionable => 1,
    }
}

/// One simulated instrument's SCPI state.
pub struct SimInstrument {
    bench: Arc<Mutex<SimBench>>,
    role: SimRole,
    errors: VecDeque<(i32, &'static str)>,
    esr: u8,
    ese: u8,
    sre: u8,
    function: SinkFunction,
    output: bool,
    /// The SCPI status registers: OPERation and QUEStionable.
    status: [StatusRegister; 2],
    /// Which of the bench's link faults have taken effect on this instrument.
    fired: Vec<bool>,
    /// Faults that took effect, in order (drained by the server's state log).
    pub fired_log: Vec<FaultFired>,
    /// A reference meter (the calibration's): it reads the truth, the
    /// pack's terminal voltage and current, with no error.
    pub reference: bool,
    /// The messages received, for tests that check what was sent.
    pub received: Arc<Mutex<Traffic>>,
    /// A meter's scan list and its last scan's readings.
    scan_list: Vec<u32>,
    last_scan: Option<String>,
}

impl SimInstrument {
    pub fn new(
        bench: Arc<Mutex<SimBench>>,
        role: SimRole,
        received: Arc<Mutex<Traffic>>,
    ) -> SimInstrument {
        SimInstrument {
            bench,
            role,
            errors: VecDeque::new(),
            esr: 0,
            ese: 0,
            sre: 0,
            function: SinkFunction::Voltage,
            output: false,
            status: [StatusRegister::PRESET; 2],
            fired: Vec::new(),
            fired_log: Vec::new(),
            received,
            scan_list: Vec::new(),
            last_scan: None,
            reference: false,
        }
    }

    pub fn role(&self) -> SimRole {
        self.role
    }

    /// Put the source-sink's function and output state onto the bench.
    fn apply_source_sink(&self, b: &mut SimBench) {
        let tripped = b.supply.guard.tripped | b.load.guard.tripped != 0;
        match (self.output && !tripped, self.function) {
            (false, _) => {
                b.supply.output_on = false;
                b.load.input_on = false;
            }
            (true, SinkFunction::Voltage) => {
                b.load.input_on = false;
                b.supply.output_on = true;
            }
            (true, SinkFunction::Sink(mode)) => {
                b.supply.output_on = false;
                b.load.mode = mode;
                b.load.input_on = true;
            }
        }
    }

    fn push_error(&mut self, e: ScpiError) {
        // ESR bits: 5 command, 4 execution, 3 device-dependent, 2 query.
        let bit = match e.code() {
            -199..=-100 => 5,
            -299..=-200 => 4,
            -399..=-300 => 3,
            _ => 2,
        };
        self.esr |= 1 << bit;
        if self.errors.len() >= QUEUE_DEPTH {
            // The newest entry is replaced by -350 when the queue is full.
            if let Some(last) = self.errors.back_mut() {
                *last = (
                    ScpiError::QueueOverflow.code(),
                    ScpiError::QueueOverflow.text(),
                );
            }
        } else {
            self.errors.push_back((e.code(), e.text()));
        }
    }

    fn stb(&self) -> u8 {
        let mut s = 0u8;
        if !self.errors.is_empty() {
            s |= 1 << 2;
        }
        if self.status[1].summary() {
            s |= 1 << 3;
        }
        if self.esr & self.ese != 0 {
            s |= 1 << 5;
        }
        if self.status[0].summary() {
            s |= 1 << 7;
        }
        s
    }

    /// The latched trips of this instrument (QUEStionable bits).
    fn tripped(&self, b: &SimBench) -> u16 {
        match self.role {
            SimRole::Source => b.supply.guard.tripped,
            SimRole::Load => b.load.guard.tripped,
            SimRole::SourceSink => b.supply.guard.tripped | b.load.guard.tripped,
            SimRole::Meter => 0,
        }
    }

    /// Is this instrument's output (input) on now?
    fn output_on(&self, b: &SimBench) -> bool {
        match self.role {
            SimRole::Source => b.supply.output_on,
            SimRole::Load => b.load.input_on,
            SimRole::SourceSink => b.supply.output_on || b.load.input_on,
            SimRole::Meter => false,
        }
    }

    /// Bring the status registers' conditions up to the bench's state.
    fn update_status(&mut self, b: &mut SimBench) {
        let tripped = self.tripped(b);
        if tripped != 0 && self.output {
            // A trip switched the source-sink's output off: it stays off
            // after the trip is cleared until switched on again.
            self.output = false;
            self.apply_source_sink(b);
        }
        let mut oper = 0u16;
        if self.output_on(b) {
            oper |= OPER_OUTPUT_ON;
            let sourcing = b.supply.output_on && self.role != SimRole::Load;
            let cc = if sourcing {
                b.supply_in_cc()
            } else {
                b.load.mode == super::battery::LoadMode::Current
            };
            oper |= if cc { OPER_CC } else { OPER_CV };
        }
        self.status[0].update(oper);
        self.status[1].update(tripped);
    }

    /// The guards this instrument's protection commands act on: a
    /// source-sink's one output is guarded on both sides alike.
    fn guards<'b>(&self, b: &'b mut SimBench) -> Vec<&'b mut Guard> {
        match self.role {
            SimRole::Source => vec![&mut b.supply.guard],
            SimRole::Load => vec![&mut b.load.guard],
            SimRole::SourceSink => vec![&mut b.supply.guard, &mut b.load.guard],
            SimRole::Meter => Vec::new(),
        }
    }

    fn no_params(params: &[String]) -> Result<(), ScpiError> {
        if params.is_empty() {
            Ok(())
        } else {
            Err(ScpiError::ParameterNotAllowed)
        }
    }

    fn one_param(params: &[String]) -> Result<&str, ScpiError> {
        match params {
            [] => Err(ScpiError::MissingParameter),
            [p] => Ok(p.as_str()),
            _ => Err(ScpiError::ParameterNotAllowed),
        }
    }

    /// Set or query a numeric level with limits.
    fn level(
        query: bool,
        params: &[String],
        unit: &str,
        value: &mut f64,
        max: f64,
        default: f64,
    ) -> Result<Option<String>, ScpiError> {
        if query {
            return match params {
                [] => Ok(Some(nr3(*value))),
                [p] => match parse_nrf(p, unit)? {
                    NumericParam::Min => Ok(Some(nr3(0.0))),
                    NumericParam::Max => Ok(Some(nr3(max))),
                    NumericParam::Default => Ok(Some(nr3(default))),
                    NumericParam::Value(_) => Err(ScpiError::IllegalParameterValue),
                },
                _ => Err(ScpiError::ParameterNotAllowed),
            };
        }
        let x = match parse_nrf(Self::one_param(params)?, unit)? {
            NumericParam::Value(x) => x,
            NumericParam::Min => 0.0,
            NumericParam::Max => max,
            NumericParam::Default => default,
        };
        if !(0.0..=max).contains(&x) {
            return Err(ScpiError::DataOutOfRange);
        }
        *value = x;
        Ok(None)
    }

    /// Run one parsed command: one handler per command group.
    fn execute(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        // Anything but a reading may change what flows: a scan's cache of
        // the pack current and group voltages is dropped.
        if !matches!(
            cmd,
            Cmd::MeasureVoltage
                | Cmd::MeasureCurrent
                | Cmd::MeasurePower
                | Cmd::MeasureTemperature
                | Cmd::ReadScan
                | Cmd::FetchScan
                | Cmd::SystemError
        ) {
            b.scan_cache = None;
        }
        match cmd {
            Cmd::Idn
            | Cmd::Rst
            | Cmd::Cls
            | Cmd::Opc
            | Cmd::Wai
            | Cmd::Esr
            | Cmd::Ese
            | Cmd::Sre
            | Cmd::Stb
            | Cmd::Tst => self.common(b, cmd, query, params),
            Cmd::SystemError | Cmd::SystemErrorCount | Cmd::SystemVersion => {
                self.system(cmd, query, params)
            }
            Cmd::Voltage | Cmd::Current | Cmd::Power | Cmd::Resistance => {
                self.level_command(b, cmd, query, params)
            }
            Cmd::Function => self.function_command(b, query, params),
            Cmd::Output | Cmd::Input => self.switch(b, cmd, query, params),
            Cmd::MeasureVoltage
            | Cmd::MeasureCurrent
            | Cmd::MeasurePower
            | Cmd::MeasureTemperature => self.measure(b, cmd, query, params),
            Cmd::RouteScan | Cmd::Configure | Cmd::Initiate | Cmd::ReadScan | Cmd::FetchScan => {
                self.scan(b, cmd, query, params)
            }
            Cmd::ProtectionLevel(_)
            | Cmd::ProtectionState(_)
            | Cmd::ProtectionTripped(_)
            | Cmd::ProtectionClear
            | Cmd::VoltageOn => self.protection(b, cmd, query, params),
            Cmd::StatusCondition(_)
            | Cmd::StatusEvent(_)
            | Cmd::StatusEnable(_)
            | Cmd::StatusPositive(_)
            | Cmd::StatusNegative(_)
            | Cmd::StatusPreset => self.status_command(cmd, query, params),
        }
    }

    /// The protection subsystem: levels, arming, trip queries and clear.
    fn protection(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        let role = self.role;
        if role == SimRole::Meter {
            return Err(ScpiError::UndefinedHeader);
        }
        let which = match cmd {
            Cmd::ProtectionLevel(p) | Cmd::ProtectionState(p) | Cmd::ProtectionTripped(p) => p,
            _ => Protect::OverVoltage,
        };
        let (unit, max) = match which {
            Protect::OverVoltage | Protect::UnderVoltage => ("V", b.supply.voltage_max),
            Protect::OverCurrent => ("A", b.supply.current_max.max(b.load.current_max)),
            Protect::OverPower => ("W", b.supply_power_max()),
        };
        match cmd {
            Cmd::ProtectionLevel(p) => {
                let mut guards = self.guards(b);
                let Some(first) = guards.first_mut() else {
                    return Err(ScpiError::UndefinedHeader);
                };
                let mut level = limit_mut(first, p).level;
                let r = Self::level(query, params, unit, &mut level, max, max)?;
                if !query {
                    for g in guards {
                        let l = limit_mut(g, p);
                        l.level = level;
                        // Setting an under-voltage level arms it; 0 disarms.
                        if p == Protect::UnderVoltage {
                            l.armed = level > 0.0;
                        }
                    }
                }
                Ok(r)
            }
            Cmd::ProtectionState(p) => {
                let mut guards = self.guards(b);
                let Some(first) = guards.first_mut() else {
                    return Err(ScpiError::UndefinedHeader);
                };
                if query {
                    Self::no_params(params)?;
                    let on = limit_mut(first, p).armed;
                    return Ok(Some(if on { "1" } else { "0" }.into()));
                }
                let on = parse_bool(Self::one_param(params)?)?;
                for g in guards {
                    limit_mut(g, p).armed = on;
                }
                Ok(None)
            }
            Cmd::ProtectionTripped(p) => {
                query_only(query)?;
                Self::no_params(params)?;
                let t = self.tripped(b);
                let bit = match p {
                    Protect::OverVoltage | Protect::UnderVoltage => {
                        instrument::command::QUES_VOLTAGE
                    }
                    Protect::OverCurrent => instrument::command::QUES_CURRENT,
                    Protect::OverPower => instrument::command::QUES_POWER,
                };
                Ok(Some(if t & bit != 0 { "1" } else { "0" }.into()))
            }
            Cmd::ProtectionClear => {
                set_only(query)?;
                Self::no_params(params)?;
                // A trip clears only once its cause is gone.
                let v = b.pack.open_voltage();
                for g in self.guards(b) {
                    if g.tripped == 0 {
                        continue;
                    }
                    if g.check(v, 0.0).is_some() {
                        return Err(ScpiError::SettingsConflict);
                    }
                    g.tripped = 0;
                }
                Ok(None)
            }
            Cmd::VoltageOn => {
                if !matches!(role, SimRole::Load | SimRole::SourceSink) {
                    return Err(ScpiError::UndefinedHeader);
                }
                let max = b.load.voltage_max;
                Self::level(query, params, "V", &mut b.load.guard.voltage_on, max, 0.0)
            }
            _ => Err(ScpiError::UndefinedHeader),
        }
    }

    /// The STATus subsystem (SCPI-1999 register model).
    fn status_command(
        &mut self,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        let mask = |params: &[String]| -> Result<u16, ScpiError> {
            let p = Self::one_param(params)?;
            let v: f64 = p.trim().parse().map_err(|_| ScpiError::DataType)?;
            if !(0.0..=32767.0).contains(&v) {
                return Err(ScpiError::DataOutOfRange);
            }
            Ok(v.round() as u16)
        };
        match cmd {
            Cmd::StatusPreset => {
                set_only(query)?;
                Self::no_params(params)?;
                for r in &mut self.status {
                    let (c, e) = (r.condition, r.event);
                    *r = StatusRegister::PRESET;
                    r.condition = c;
                    r.event = e;
                }
                Ok(None)
            }
            Cmd::StatusCondition(r) => {
                query_only(query)?;
                Self::no_params(params)?;
                Ok(Some(self.status[reg_index(r)].condition.to_string()))
            }
            Cmd::StatusEvent(r) => {
                query_only(query)?;
                Self::no_params(params)?;
                let reg = &mut self.status[reg_index(r)];
                let v = reg.event;
                reg.event = 0;
                Ok(Some(v.to_string()))
            }
            Cmd::StatusEnable(r) | Cmd::StatusPositive(r) | Cmd::StatusNegative(r) => {
                let reg = &mut self.status[reg_index(r)];
                let field = match cmd {
                    Cmd::StatusEnable(_) => &mut reg.enable,
                    Cmd::StatusPositive(_) => &mut reg.positive,
                    _ => &mut reg.negative,
                };
                if query {
                    Self::no_params(params)?;
                    return Ok(Some(field.to_string()));
                }
                *field = mask(params)?;
                Ok(None)
            }
            _ => Err(ScpiError::UndefinedHeader),
        }
    }

    /// IEEE 488.2 common commands: identity, reset, status registers.
    fn common(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        match cmd {
            Cmd::Idn => {
                query_only(query)?;
                Self::no_params(params)?;
                let model = match self.role {
                    SimRole::Source => "simulated-source",
                    SimRole::Load => "simulated-load",
                    SimRole::SourceSink => "simulated-source-sink",
                    SimRole::Meter if self.reference => "simulated-reference-meter",
                    SimRole::Meter => "simulated-meter",
                };
                Ok(Some(format!(
                    "packbench-sim,{model},0,{}",
                    env!("CARGO_PKG_VERSION")
                )))
            }
            Cmd::Rst => {
                set_only(query)?;
                Self::no_params(params)?;
                self.reset(b);
                Ok(None)
            }
            Cmd::Cls => {
                set_only(query)?;
                Self::no_params(params)?;
                self.errors.clear();
                self.esr = 0;
                for r in &mut self.status {
                    r.event = 0;
                }
                Ok(None)
            }
            Cmd::Opc => {
                Self::no_params(params)?;
                if query {
                    Ok(Some("1".into()))
                } else {
                    self.esr |= 1;
                    Ok(None)
                }
            }
            Cmd::Wai => {
                set_only(query)?;
                Self::no_params(params)?;
                Ok(None)
            }
            Cmd::Esr => {
                query_only(query)?;
                Self::no_params(params)?;
                let v = self.esr;
                self.esr = 0;
                Ok(Some(v.to_string()))
            }
            Cmd::Ese | Cmd::Sre => {
                let reg = if cmd == Cmd::Ese {
                    &mut self.ese
                } else {
                    &mut self.sre
                };
                if query {
                    Self::no_params(params)?;
                    return Ok(Some(reg.to_string()));
                }
                let p = Self::one_param(params)?;
                let v: f64 = p.trim().parse().map_err(|_| ScpiError::DataType)?;
                if !(0.0..=255.0).contains(&v) {
                    return Err(ScpiError::DataOutOfRange);
                }
                *reg = v.round() as u8;
                Ok(None)
            }
            Cmd::Stb => {
                query_only(query)?;
                Ok(Some(self.stb().to_string()))
            }
            Cmd::Tst => {
                query_only(query)?;
                Ok(Some("0".into()))
            }
            _ => Err(ScpiError::UndefinedHeader),
        }
    }

    /// `*RST`: outputs off, setpoints to their reset values.
    fn reset(&mut self, b: &mut SimBench) {
        match self.role {
            SimRole::Source => {
                b.supply.output_on = false;
                b.supply.voltage_set = 0.0;
                b.supply.current_set = 0.0;
            }
            SimRole::Load => {
                b.load.input_on = false;
                b.load.mode = LoadMode::Current;
                b.load.current_set = 0.0;
                b.load.power_set = 0.0;
                b.load.resistance_set = b.load.resistance_max;
            }
            SimRole::SourceSink => {
                self.output = false;
                self.function = SinkFunction::Voltage;
                b.supply.voltage_set = 0.0;
                b.supply.current_set = 0.0;
                b.load.current_set = 0.0;
                b.load.power_set = 0.0;
                b.load.resistance_set = b.load.resistance_max;
                self.apply_source_sink(b);
            }
            SimRole::Meter => {}
        }
    }

    /// The SYSTem subsystem: the error queue and the SCPI version.
    fn system(
        &mut self,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        query_only(query)?;
        match cmd {
            Cmd::SystemError => {
                Self::no_params(params)?;
                Ok(Some(match self.errors.pop_front() {
                    Some((code, text)) => format!("{code},\"{text}\""),
                    None => "0,\"No error\"".into(),
                }))
            }
            Cmd::SystemErrorCount => Ok(Some(self.errors.len().to_string())),
            _ => Ok(Some("1999.0".into())),
        }
    }

    /// Setpoint levels: voltage, current, power, resistance.
    fn level_command(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        let role = self.role;
        match cmd {
            Cmd::Voltage => match role {
                SimRole::Source | SimRole::SourceSink => {
                    let max = b.supply.voltage_max;
                    Self::level(query, params, "V", &mut b.supply.voltage_set, max, 0.0)
                }
                // The load's constant-voltage setpoint (`FUNC VOLT`).
                SimRole::Load => {
                    let max = b.load.voltage_max;
                    Self::level(query, params, "V", &mut b.load.voltage_set, max, 0.0)
                }
                SimRole::Meter => Err(ScpiError::UndefinedHeader),
            },
            Cmd::Current => match (role, self.function) {
                (SimRole::Source, _) | (SimRole::SourceSink, SinkFunction::Voltage) => {
                    let max = b.supply.current_max;
                    Self::level(query, params, "A", &mut b.supply.current_set, max, 0.0)
                }
                (SimRole::Load, _) | (SimRole::SourceSink, _) => {
                    let max = b.load.current_max;
                    Self::level(query, params, "A", &mut b.load.current_set, max, 0.0)
                }
                _ => Err(ScpiError::UndefinedHeader),
            },
            Cmd::Power => match role {
                SimRole::Load | SimRole::SourceSink => {
                    let max = b.load.power_max;
                    Self::level(query, params, "W", &mut b.load.power_set, max, 0.0)
                }
                _ => Err(ScpiError::UndefinedHeader),
            },
            Cmd::Resistance => match role {
                SimRole::Load | SimRole::SourceSink => {
                    let max = b.load.resistance_max;
                    let r =
                        Self::level(query, params, "OHM", &mut b.load.resistance_set, max, max)?;
                    if b.load.resistance_set <= 0.0 {
                        b.load.resistance_set = max;
                        return Err(ScpiError::DataOutOfRange);
                    }
                    Ok(r)
                }
                _ => Err(ScpiError::UndefinedHeader),
            },
            _ => Err(ScpiError::UndefinedHeader),
        }
    }

    /// A load's (or source-sink's) FUNCtion: what it holds constant.
    fn function_command(
        &mut self,
        b: &mut SimBench,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        let role = self.role;
        if !matches!(role, SimRole::Load | SimRole::SourceSink) {
            return Err(ScpiError::UndefinedHeader);
        }
        if query {
            Self::no_params(params)?;
            let mode = match (role, self.function) {
                (SimRole::SourceSink, SinkFunction::Voltage) => return Ok(Some("VOLT".into())),
                (SimRole::SourceSink, SinkFunction::Sink(m)) => m,
                _ => b.load.mode,
            };
            let w = match mode {
                LoadMode::Current => "CURR",
                LoadMode::Power => "POW",
                LoadMode::Resistance => "RES",
                LoadMode::Voltage => "VOLT",
            };
            return Ok(Some(w.into()));
        }
        let p = Self::one_param(params)?.to_ascii_uppercase();
        let word = FUNCTION_WORDS
            .iter()
            .find(|(long, short)| p == long.to_ascii_uppercase() || p == *short)
            .map(|(_, s)| *s)
            .ok_or(ScpiError::IllegalParameterValue)?;
        if role == SimRole::SourceSink {
            self.function = match word {
                "VOLT" => SinkFunction::Voltage,
                "CURR" => SinkFunction::Sink(LoadMode::Current),
                "POW" => SinkFunction::Sink(LoadMode::Power),
                "RES" => SinkFunction::Sink(LoadMode::Resistance),
                _ => return Err(ScpiError::IllegalParameterValue),
            };
            self.apply_source_sink(b);
            return Ok(None);
        }
        let mode = match word {
            "VOLT" => LoadMode::Voltage,
            "CURR" => LoadMode::Current,
            "POW" => LoadMode::Power,
            "RES" => LoadMode::Resistance,
            _ => return Err(ScpiError::IllegalParameterValue),
        };
        b.load.mode = mode;
        Ok(None)
    }

    /// Output (source) and input (load) on and off.
    fn switch(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        let role = self.role;
        match cmd {
            Cmd::Output if role == SimRole::SourceSink => {
                if query {
                    Self::no_params(params)?;
                    return Ok(Some(if self.output { "1" } else { "0" }.into()));
                }
                let on = parse_bool(Self::one_param(params)?)?;
                if on && self.tripped(b) != 0 {
                    // A latched protection trip holds the output off.
                    return Err(ScpiError::SettingsConflict);
                }
                self.output = on;
                self.apply_source_sink(b);
                Ok(None)
            }
            Cmd::Output | Cmd::Input => {
                let tripped = self.tripped(b);
                let state = match (cmd, role) {
                    (Cmd::Output, SimRole::Source) => &mut b.supply.output_on,
                    (Cmd::Input, SimRole::Load) => &mut b.load.input_on,
                    _ => return Err(ScpiError::UndefinedHeader),
                };
                if query {
                    Self::no_params(params)?;
                    return Ok(Some(if *state { "1" } else { "0" }.into()));
                }
                let on = parse_bool(Self::one_param(params)?)?;
                if on && tripped != 0 {
                    return Err(ScpiError::SettingsConflict);
                }
                *state = on;
                if b.supply.output_on && b.load.input_on {
                    b.overlaps += 1;
                }
                Ok(None)
            }
            _ => Err(ScpiError::UndefinedHeader),
        }
    }

    /// MEASure queries.
    fn measure(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        let role = self.role;
        query_only(query)?;
        // A meter's MEASure with a channel list reads those channels.
        if role == SimRole::Meter && !params.is_empty() {
            let chs = channels_param(params.last().map(String::as_str).unwrap_or(""))?;
            return Ok(Some(Self::read_channels(b, &chs)?));
        }
        Self::no_params(params)?;
        if cmd == Cmd::MeasureTemperature {
            return Ok(Some(nr3(b.measure_temperature())));
        }
        let (v, i) = match role {
            SimRole::Source => b.measure_supply(),
            SimRole::Load => b.measure_load(),
            // Signed: positive while sourcing into the pack.
            SimRole::SourceSink => {
                if b.load.input_on {
                    let (v, i) = b.measure_load();
                    (v, -i)
                } else {
                    b.measure_supply()
                }
            }
            // The calibration's reference: the truth, signed as the pack
            // sees it (positive into the pack).
            SimRole::Meter if self.reference => (b.terminal_voltage(), b.pack_current()),
            SimRole::Meter => {
                if cmd != Cmd::MeasureVoltage {
                    return Err(ScpiError::UndefinedHeader);
                }
                (b.measure_meter(), 0.0)
            }
        };
        Ok(Some(nr3(match cmd {
            Cmd::MeasureVoltage => v,
            Cmd::MeasureCurrent => i,
            _ => v * i,
        })))
    }
}

/// A channel-list parameter, `(@101:104,110)`.
fn channels_param(p: &str) -> Result<Vec<u32>, ScpiError> {
    if !p.trim().starts_with("(@") {
        return Err(ScpiError::DataType);
    }
    model::groups::parse_channel_list(p).map_err(|_| ScpiError::IllegalParameterValue)
}

impl SimInstrument {
    fn read_channels(b: &mut SimBench, chs: &[u32]) -> Result<String, ScpiError> {
        let mut out = Vec::with_capacity(chs.len());
        for &c in chs {
            match b.measure_channel(c) {
                Some(v) => out.push(nr3(v)),
                None => return Err(ScpiError::IllegalParameterValue),
            }
        }
        b.scans += 1;
        Ok(out.join(","))
    }

    /// A meter's scanning: the scan list, configuration, `READ?`,
    /// `INITiate` and `FETCh?`.
    fn scan(
        &mut self,
        b: &mut SimBench,
        cmd: Cmd,
        query: bool,
        params: &[String],
    ) -> Result<Option<String>, ScpiError> {
        if self.role != SimRole::Meter {
            return Err(ScpiError::UndefinedHeader);
        }
        match cmd {
            Cmd::RouteScan if query => Ok(Some(model::groups::channel_list(&self.scan_list))),
            Cmd::RouteScan => {
                let chs = channels_param(Self::one_param(params)?)?;
                if chs.iter().any(|&c| b.measure_channel(c).is_none()) {
                    return Err(ScpiError::IllegalParameterValue);
                }
                self.scan_list = chs;
                Ok(None)
            }
            Cmd::Configure => {
                set_only(query)?;
                let chs = channels_param(params.last().map(String::as_str).unwrap_or(""))?;
                if chs.iter().any(|&c| b.measure_channel(c).is_none()) {
                    return Err(ScpiError::IllegalParameterValue);
                }
                Ok(None)
            }
            Cmd::Initiate => {
                set_only(query)?;
                if self.scan_list.is_empty() {
                    return Err(ScpiError::SettingsConflict);
                }
                let list = self.scan_list.clone();
                self.last_scan = Some(Self::read_channels(b, &list)?);
                Ok(None)
            }
            Cmd::ReadScan => {
                query_only(query)?;
                if self.scan_list.is_empty() {
                    return Err(ScpiError::SettingsConflict);
                }
                let list = self.scan_list.clone();
                Ok(Some(Self::read_channels(b, &list)?))
            }
            _ => {
                query_only(query)?;
                self.last_scan
                    .clone()
                    .map(Some)
                    .ok_or(ScpiError::SettingsConflict)
            }
        }
    }

    /// The link faults on this instrument that are in effect at `now`,
    /// marking first firings.
    fn faults_now(&mut self, b: &SimBench, now: f64) -> Vec<LinkFault> {
        let target = self.role.target();
        if self.fired.len() != b.faults.link.len() {
            self.fired.resize(b.faults.link.len(), false);
        }
        let mut active = Vec::new();
        for (i, f) in b.faults.link.iter().enumerate() {
            if f.instrument != target || now < f.after_s || f.until_s.is_some_and(|u| now >= u) {
                continue;
            }
            let once = matches!(f.kind, FaultKind::Disconnect | FaultKind::Error);
            if !self.fired[i] {
                self.fired[i] = true;
                self.fired_log.push(FaultFired {
                    fault: f.clone(),
                    bench_s: now,
                });
                active.push(f.clone());
            } else if !once {
                active.push(f.clone());
            }
        }
        active
    }
}

/// What an instrument received: how many messages, and the last
/// [`TRAFFIC_KEPT`] of them. (Every message was kept before: about 236
/// bytes a sample, 700 MB on a 200-cycle run.)
#[derive(Debug, Default)]
pub struct Traffic {
    pub count: usize,
    pub last: VecDeque<String>,
    /// Keep every message (a test that checks all that was sent).
    pub keep_all: bool,
}

/// How many of the last messages [`Traffic`] keeps.
pub const TRAFFIC_KEPT: usize = 64;

impl Traffic {
    fn push(&mut self, line: &str) {
        self.count += 1;
        if self.last.len() == TRAFFIC_KEPT && !self.keep_all {
            self.last.pop_front();
        }
        self.last.push_back(line.to_string());
    }
}

/// One protection of a guard.
fn limit_mut(g: &mut Guard, p: Protect) -> &mut Limit {
    match p {
        Protect::OverVoltage => &mut g.over_voltage,
        Protect::OverCurrent => &mut g.over_current,
        Protect::OverPower => &mut g.over_power,
        Protect::UnderVoltage => &mut g.under_voltage,
    }
}

/// Commands whose setting a wrong-read-back fault drops.
fn is_level(cmd: Cmd) -> bool {
    matches!(
        cmd,
        Cmd::Voltage | Cmd::Current | Cmd::Power | Cmd::Resistance
    )
}

impl SimInstrument {
    /// Run a message's units on the bench; the replies, in order.
    fn run_units(&mut self, b: &mut SimBench, line: &str, drop_levels: bool) -> Vec<String> {
        let mut replies = Vec::new();
        for unit in parse_message(line) {
            match unit {
                Ok(u) => {
                    if drop_levels && !u.query && is_level(u.cmd) {
                        // Accepted, silently not applied.
                        continue;
                    }
                    match self.execute(b, u.cmd, u.query, &u.params) {
                        Ok(Some(r)) => replies.push(r),
                        Ok(None) => {}
                        Err(e) => {
                            self.push_error(e);
                            if e.is_command_error() {
                                break;
                            }
                        }
                    }
                }
                Err(e) => {
                    self.push_error(e);
                    if e.is_command_error() {
                        break;
                    }
                }
            }
        }
        replies
    }

    /// One message, with the link faults in effect applied; also returns
    /// those faults (a Modbus front end frames its reply by them).
    pub fn respond_with(&mut self, line: &str) -> (Result<Response, io::Error>, Vec<LinkFault>) {
        if let Ok(mut r) = self.received.lock() {
            r.push(line);
        }
        let bench = Arc::clone(&self.bench);
        let mut b = locked(&bench);
        b.advance();
        self.update_status(&mut b);
        let now = b.now();
        let faults = self.faults_now(&b, now);
        let kinds = faults.clone();
        let has = |k: FaultKind| faults.iter().find(|f| f.kind == k);
        if has(FaultKind::Disconnect).is_some() {
            return (
                Err(io::Error::new(
                    io::ErrorKind::ConnectionReset,
                    "simulated disconnect",
                )),
                kinds,
            );
        }
        if let Some(f) = has(FaultKind::Error) {
            let code = f.error_code;
            self.esr |= 1 << 3;
            if self.errors.len() < QUEUE_DEPTH {
                self.errors
                    .push_back((code, "Device-specific error; injected fault"));
            }
        }
        if has(FaultKind::Silent).is_some() {
            // A dead line: the message never arrived.
            return (Ok(Response::Nothing), kinds);
        }
        let drop_levels = has(FaultKind::WrongReadBack).is_some();
        let replies = self.run_units(&mut b, line, drop_levels);
        self.update_status(&mut b);
        if replies.is_empty() || has(FaultKind::NoReply).is_some() {
            return (Ok(Response::Nothing), kinds);
        }
        let garbled = has(FaultKind::Garbage).is_some() || has(FaultKind::BadCrc).is_some();
        let reply = if garbled {
            "#@!garbled".to_string()
        } else {
            replies.join(";")
        };
        let r = match has(FaultKind::Slow) {
            Some(f) => Response::Late(reply, std::time::Duration::from_millis(f.delay_ms)),
            None => Response::Reply(reply),
        };
        (Ok(r), kinds)
    }

    /// A message run with no link fault, answered in full (the Modbus front
    /// end's own reads of the error queue and of values).
    pub fn quiet(&mut self, line: &str) -> Vec<String> {
        let bench = Arc::clone(&self.bench);
        let mut b = locked(&bench);
        b.advance();
        self.update_status(&mut b);
        let r = self.run_units(&mut b, line, false);
        self.update_status(&mut b);
        r
    }
}

impl LineResponder for SimInstrument {
    fn respond(&mut self, line: &str) -> Result<Response, io::Error> {
        self.respond_with(line).0
    }
}

#[cfg(test)]
mod tests {
    use engine::clock::SimClock;
    use instrument::command::{OPER_CC, OPER_OUTPUT_ON};
    use instrument::link::{LineResponder, Response};
    use model::pack::{Chemistry, PackSpec};
    use model::simconfig::SimConfig;
    use std::sync::{Arc, Mutex};

    fn ask(r: &Arc<Mutex<dyn LineResponder>>, line: &str) -> Option<String> {
        match r.lock().unwrap().respond(line).unwrap() {
            Response::Reply(s) | Response::Late(s, _) => Some(s),
            Response::Nothing => None,
        }
    }

    /// One message per command group, each through its own handler.
    #[test]
    fn each_command_group_answers() {
        let pack = PackSpec {
            chemistry: Chemistry::LiIon,
            series: 4,
            rated_capacity_ah: 2.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let links = crate::build(&pack, &SimConfig::ideal(), SimClock::new());
        let (src, load) = (&links.source_responder, &links.load_responder);
        // Common commands.
        assert!(ask(src, "*IDN?").unwrap().contains("simulated-source"));
        assert_eq!(ask(src, "*OPC?").as_deref(), Some("1"));
        // The SYSTem subsystem and the error a bad header leaves.
        assert_eq!(ask(src, "SYST:VERS?").as_deref(), Some("1999.0"));
        ask(src, "NOPE");
        assert!(ask(src, "SYST:ERR?").unwrap().starts_with("-113"));
        // Levels, read back.
        ask(src, "VOLT 16.4");
        assert_eq!(ask(src, "VOLT?").unwrap().parse::<f64>().unwrap(), 16.4);
        let meter = crate::server::SimInstrument::new(
            Arc::clone(&links.handle.bench),
            crate::server::SimRole::Meter,
            Arc::new(Mutex::new(crate::server::Traffic::default())),
        );
        let meter: Arc<Mutex<dyn LineResponder>> = Arc::new(Mutex::new(meter));
        assert!(ask(&meter, "VOLT 3").is_none());
        assert!(
            ask(&meter, "SYST:ERR?").unwrap().starts_with("-113"),
            "a meter holds no voltage"
        );
        // FUNCtion on the load only.
        ask(load, "FUNC RES");
        assert_eq!(ask(load, "FUNC?").as_deref(), Some("RES"));
        ask(src, "FUNC RES");
        assert!(ask(src, "SYST:ERR?").unwrap().starts_with("-113"));
        // Output and input switches.
        ask(src, "OUTP ON");
        assert_eq!(ask(src, "OUTP?").as_deref(), Some("1"));
        ask(src, "*RST");
        assert_eq!(
            ask(src, "OUTP?").as_deref(),
            Some("0"),
            "*RST switches it off"
        );
        // Measurements: the pack's voltage, a 4-cell li-ion pack's range.
        let v: f64 = ask(load, "MEAS:VOLT?").unwrap().parse().unwrap();
        assert!((10.0..17.0).contains(&v), "{v}");
        assert!(ask(load, "MEAS:TEMP?").unwrap().parse::<f64>().is_ok());
    }

    fn four_cell() -> PackSpec {
        PackSpec {
            chemistry: Chemistry::LiIon,
            series: 4,
            rated_capacity_ah: 2.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        }
    }

    fn num(r: &Arc<Mutex<dyn LineResponder>>, line: &str) -> f64 {
        ask(r, line)
            .unwrap_or_else(|| panic!("{line}: no reply"))
            .parse()
            .unwrap()
    }

    /// SCPI-1999 table of standard errors: `VOLT` with no value is -109,
    /// and each class sets its IEEE 488.2 ESR bit (command error = bit 5).
    #[test]
    fn a_missing_parameter_is_error_109() {
        let links = crate::build(&four_cell(), &SimConfig::ideal(), SimClock::new());
        let src = &links.source_responder;
        for line in ["VOLT", "CURR:PROT", "STAT:QUES:ENAB", "VOLT:PROT:STAT"] {
            assert!(ask(src, line).is_none());
            assert_eq!(
                ask(src, "SYST:ERR?").as_deref(),
                Some("-109,\"Missing parameter\""),
                "{line}"
            );
        }
        assert_eq!(num(src, "*ESR?") as u8 & (1 << 5), 1 << 5);
    }

    /// A load's under-voltage switch-off acts on the pack by itself: the
    /// input goes off, the trip latches in QUEStionable bit 0 (SCPI-1999:
    /// VOLTage) and its event reaches status byte bit 3 through the enable
    /// mask; the input cannot come on again until the trip is cleared, and
    /// the clear is refused while the cause is still there.
    #[test]
    fn an_under_voltage_trip_switches_the_load_off_and_latches() {
        let clock = SimClock::new();
        let links = crate::build(&four_cell(), &SimConfig::ideal(), clock.clone());
        let load = &links.load_responder;
        let v0 = num(load, "MEAS:VOLT?");
        ask(load, "STAT:QUES:ENAB 1");
        ask(load, "FUNC CURR;CURR 10");
        ask(load, "VOLT:PROT:UND 13.2");
        assert_eq!(num(load, "VOLT:PROT:UND?"), 13.2);
        ask(load, "INP ON");
        assert_eq!(ask(load, "INP?").as_deref(), Some("1"));
        assert_eq!(
            num(load, "STAT:OPER:COND?") as u16 & OPER_OUTPUT_ON,
            OPER_OUTPUT_ON
        );
        // 5C for long enough to reach the switch-off.
        let mut t = 0.0;
        while ask(load, "INP?").as_deref() == Some("1") {
            t += 5.0;
            assert!(t < 3600.0, "no trip in an hour");
            clock.set(t);
        }
        let trip = links.handle.bench.lock().unwrap().trips.clone();
        assert_eq!(trip.len(), 1, "{trip:?}");
        assert_eq!(trip[0].what, "under-voltage");
        assert!(
            trip[0].pack_voltage_v < 13.2 && trip[0].pack_voltage_v > 12.5,
            "{trip:?}"
        );
        assert!(v0 > 13.2);
        assert_eq!(num(load, "STAT:QUES:COND?"), 1.0);
        assert_eq!(num(load, "VOLT:PROT:UND:TRIP?"), 1.0);
        assert_eq!(num(load, "*STB?") as u8 & (1 << 3), 1 << 3, "QUES summary");
        assert_eq!(num(load, "STAT:QUES?"), 1.0, "the event latched");
        assert_eq!(num(load, "STAT:QUES?"), 0.0, "reading clears the event");
        // Held off while tripped.
        ask(load, "INP ON");
        assert!(ask(load, "SYST:ERR?").unwrap().starts_with("-221"));
        assert_eq!(ask(load, "INP?").as_deref(), Some("0"));
        // The pack relaxes above the level at rest: then the clear works.
        let mut cleared = false;
        for _ in 0..60 {
            t += 60.0;
            clock.set(t);
            ask(load, "INP:PROT:CLE");
            if ask(load, "SYST:ERR?").as_deref() == Some("0,\"No error\"") {
                cleared = true;
                break;
            }
        }
        // A pack taken to 3.3 V/cell under 5C relaxes above 3.3 V/cell.
        assert!(cleared, "the clear stays refused at rest");
        assert_eq!(num(load, "STAT:QUES:COND?"), 0.0);
        ask(load, "INP ON");
        assert_eq!(ask(load, "INP?").as_deref(), Some("1"));
    }

    /// A supply's over-voltage protection: a setpoint error takes the
    /// output above the level; the trip switches it off.
    #[test]
    fn over_voltage_protection_trips_the_supply() {
        let clock = SimClock::new();
        let mut cfg = SimConfig::ideal();
        cfg.faults.source_voltage_error_pct = 5.0;
        let links = crate::build(&four_cell(), &cfg, clock.clone());
        let src = &links.source_responder;
        ask(src, "VOLT 16.8;CURR 1");
        ask(src, "VOLT:PROT 17.2;:VOLT:PROT:STAT ON");
        assert_eq!(num(src, "VOLT:PROT?"), 17.2);
        assert_eq!(num(src, "VOLT:PROT:STAT?"), 1.0);
        ask(src, "OUTP ON");
        let mut t = 0.0;
        while ask(src, "OUTP?").as_deref() == Some("1") {
            t += 10.0;
            assert!(t < 20_000.0, "no trip");
            clock.set(t);
        }
        let trips = links.handle.bench.lock().unwrap().trips.clone();
        assert_eq!(trips[0].what, "over-voltage");
        assert!(trips[0].pack_voltage_v <= 17.3, "{trips:?}");
        assert_eq!(num(src, "VOLT:PROT:TRIP?"), 1.0);
        assert_eq!(num(src, "CURR:PROT:TRIP?"), 0.0);
    }

    /// An over-current protection armed below the setpoint trips at once.
    #[test]
    fn over_current_protection_trips_the_load() {
        let clock = SimClock::new();
        let links = crate::build(&four_cell(), &SimConfig::ideal(), clock.clone());
        let load = &links.load_responder;
        ask(load, "CURR 3;CURR:PROT 2;PROT:STAT ON;:INP ON");
        assert_eq!(ask(load, "SYST:ERR?").as_deref(), Some("0,\"No error\""));
        clock.set(2.0);
        assert_eq!(ask(load, "INP?").as_deref(), Some("0"));
        assert_eq!(num(load, "STAT:QUES:COND?") as u16, 1 << 1, "CURRent bit");
        ask(load, "OUTP:PROT:CLE");
        assert_eq!(ask(load, "SYST:ERR?").as_deref(), Some("0,\"No error\""));
    }

    /// The load's constant-voltage mode sinks what holds the pack at the
    /// setpoint, and nothing from a pack already below it; the voltage-on
    /// threshold keeps it from sinking at all below that voltage.
    #[test]
    fn the_load_holds_a_constant_voltage() {
        let clock = SimClock::new();
        let links = crate::build(&four_cell(), &SimConfig::ideal(), clock.clone());
        let load = &links.load_responder;
        let v0 = num(load, "MEAS:VOLT?");
        ask(load, &format!("FUNC VOLT;VOLT {:.3};:INP ON", v0 - 0.2));
        assert_eq!(ask(load, "FUNC?").as_deref(), Some("VOLT"));
        let v = num(load, "MEAS:VOLT?");
        let i = num(load, "MEAS:CURR?");
        assert!(i > 0.1, "sinks {i}");
        assert!((v - (v0 - 0.2)).abs() < 0.05, "{v} against {}", v0 - 0.2);
        ask(load, &format!("VOLT {:.3}", v0 + 1.0));
        assert_eq!(num(load, "MEAS:CURR?"), 0.0);
        ask(load, &format!("FUNC CURR;CURR 1;VOLT:ON {:.3}", v0 + 0.5));
        assert_eq!(num(load, "MEAS:CURR?"), 0.0, "below the voltage-on level");
        ask(load, "VOLT:ON 0");
        assert!((num(load, "MEAS:CURR?") - 1.0).abs() < 1e-9);
    }

    /// STATus:PRESet restores the transition filters and clears the
    /// enables; a negative-transition filter latches a falling edge.
    #[test]
    fn status_registers_follow_the_scpi_model() {
        let links = crate::build(&four_cell(), &SimConfig::ideal(), SimClock::new());
        let src = &links.source_responder;
        assert_eq!(num(src, "STAT:OPER:PTR?"), 32767.0);
        assert_eq!(num(src, "STAT:OPER:NTR?"), 0.0);
        ask(src, "STAT:OPER:NTR 1024;ENAB 1024");
        assert_eq!(num(src, "STAT:OPER:ENAB?"), 1024.0);
        ask(src, "VOLT 16;CURR 0.5;:OUTP ON");
        assert_eq!(
            num(src, "STAT:OPER:COND?") as u16 & OPER_OUTPUT_ON,
            OPER_OUTPUT_ON
        );
        assert_eq!(num(src, "STAT:OPER:COND?") as u16 & OPER_CC, OPER_CC);
        ask(src, "OUTP OFF");
        // Both edges latched: the rise by PTR, the fall by NTR.
        assert_eq!(
            num(src, "STAT:OPER?") as u16 & OPER_OUTPUT_ON,
            OPER_OUTPUT_ON
        );
        assert_eq!(num(src, "*STB?") as u8 & (1 << 7), 0, "read event cleared");
        ask(src, "STAT:PRES");
        assert_eq!(num(src, "STAT:OPER:ENAB?"), 0.0);
        assert_eq!(num(src, "STAT:OPER:NTR?"), 0.0);
        ask(src, "STAT:QUES:ENAB 99999");
        assert!(ask(src, "SYST:ERR?").unwrap().starts_with("-222"));
    }

    /// The kept pack state is written off the stations' thread, through a
    /// synced temporary file, a rename and a synced folder (POSIX fsync:
    /// the folder entry is durable only once the folder is synced).
    #[test]
    fn the_kept_pack_state_is_written_and_synced_by_its_own_thread() {
        let d = tempfile::tempdir().unwrap();
        let path = d.path().join("sim-pack.json");
        let clock = SimClock::new();
        let links = crate::build(&four_cell(), &SimConfig::ideal(), clock.clone());
        let bench = Arc::clone(&links.handle.bench);
        bench.lock().unwrap().keep_state(path.clone(), 10.0);
        let read = || -> f64 {
            let text = std::fs::read_to_string(&path).unwrap();
            serde_json::from_str::<crate::bench::PackState>(&text)
                .unwrap()
                .t_s
        };
        assert_eq!(read(), 0.0, "the first state is there at once");
        let syncs = record::write::dir_syncs();
        let mine = record::write::dir_syncs_on_this_thread();
        clock.set(25.0);
        bench.lock().unwrap().advance();
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(5);
        while read() < 25.0 {
            assert!(std::time::Instant::now() < deadline, "never written");
            std::thread::sleep(std::time::Duration::from_millis(5));
        }
        assert_eq!(
            record::write::dir_syncs_on_this_thread(),
            mine,
            "written by the writer thread, not this one"
        );
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(5);
        while record::write::dir_syncs() <= syncs {
            assert!(std::time::Instant::now() < deadline, "folder never synced");
            std::thread::sleep(std::time::Duration::from_millis(5));
        }
        assert!(!d.path().join("sim-pack.json.tmp").exists());
    }
}
