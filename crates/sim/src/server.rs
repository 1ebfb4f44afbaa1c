//! The simulated supply and load as SCPI endpoints: each takes program
//! messages as text, parses them with [`instrument::command`] (the
//! same vocabulary the drivers render from), executes them on the shared
//! bench and answers with IEEE 488.2 response data. Errors go to a SCPI
//! error queue with the standard numbers; `*ESR?` and `*STB?` follow the
//! standard bits.

use super::battery::LoadMode;
use super::bench::SimBench;
use super::config::{FaultKind, FaultTarget, LinkFault};
use instrument::command::{
    nr3, parse_bool, parse_message, parse_nrf, Cmd, NumericParam, ScpiError, FUNCTION_WORDS,
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
    /// Which of the bench's link faults have taken effect on this instrument.
    fired: Vec<bool>,
    /// Faults that took effect, in order (drained by the server's state log).
    pub fired_log: Vec<FaultFired>,
    /// Every message received, for tests that check what was sent.
    pub received: Arc<Mutex<Vec<String>>>,
}

impl SimInstrument {
    pub fn new(
        bench: Arc<Mutex<SimBench>>,
        role: SimRole,
        received: Arc<Mutex<Vec<String>>>,
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
            fired: Vec::new(),
            fired_log: Vec::new(),
            received,
        }
    }

    pub fn role(&self) -> SimRole {
        self.role
    }

    /// Put the source-sink's function and output state onto the bench.
    fn apply_source_sink(&self, b: &mut SimBench) {
        match (self.output, self.function) {
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
        if self.esr & self.ese != 0 {
            s |= 1 << 5;
        }
        s
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
                // Constant-voltage loading is not offered by the simulated load.
                _ => Err(ScpiError::UndefinedHeader),
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
                self.output = parse_bool(Self::one_param(params)?)?;
                self.apply_source_sink(b);
                Ok(None)
            }
            Cmd::Output | Cmd::Input => {
                let state = match (cmd, role) {
                    (Cmd::Output, SimRole::Source) => &mut b.supply.output_on,
                    (Cmd::Input, SimRole::Load) => &mut b.load.input_on,
                    _ => return Err(ScpiError::UndefinedHeader),
                };
                if query {
                    Self::no_params(params)?;
                    return Ok(Some(if *state { "1" } else { "0" }.into()));
                }
                *state = parse_bool(Self::one_param(params)?)?;
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

impl SimInstrument {
    /// The link faults on this instrument that are in effect at `now`,
    /// marking first firings.
    fn faults_now(&mut self, b: &SimBench, now: f64) -> Vec<LinkFault> {
        let target = self.role.target();
        if self.fired.len() != b.faults.link.len() {
            self.fired.resize(b.faults.link.len(), false);
        }
        let mut active = Vec::new();
        for (i, f) in b.faults.link.iter().enumerate() {
            if f.instrument != target || now < f.after_s {
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

/// Commands whose setting a wrong-read-back fault drops.
fn is_level(cmd: Cmd) -> bool {
    matches!(
        cmd,
        Cmd::Voltage | Cmd::Current | Cmd::Power | Cmd::Resistance
    )
}

impl LineResponder for SimInstrument {
    fn respond(&mut self, line: &str) -> Result<Response, io::Error> {
        if let Ok(mut r) = self.received.lock() {
            r.push(line.to_string());
        }
        let bench = Arc::clone(&self.bench);
        let mut b = match bench.lock() {
            Ok(g) => g,
            Err(p) => p.into_inner(),
        };
        b.advance();
        let now = b.now();
        let faults = self.faults_now(&b, now);
        let has = |k: FaultKind| faults.iter().find(|f| f.kind == k);
        if has(FaultKind::Disconnect).is_some() {
            return Err(io::Error::new(
                io::ErrorKind::ConnectionReset,
                "simulated disconnect",
            ));
        }
        if let Some(f) = has(FaultKind::Error) {
            let code = f.error_code;
            self.esr |= 1 << 3;
            if self.errors.len() < QUEUE_DEPTH {
                self.errors
                    .push_back((code, "Device-specific error; injected fault"));
            }
        }
        let drop_levels = has(FaultKind::WrongReadBack).is_some();
        let mut replies = Vec::new();
        for unit in parse_message(line) {
            match unit {
                Ok(u) => {
                    if drop_levels && !u.query && is_level(u.cmd) {
                        // Accepted, silently not applied.
                        continue;
                    }
                    match self.execute(&mut b, u.cmd, u.query, &u.params) {
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
        if replies.is_empty() || has(FaultKind::NoReply).is_some() {
            return Ok(Response::Nothing);
        }
        let reply = if has(FaultKind::Garbage).is_some() {
            "#@!garbled".to_string()
        } else {
            replies.join(";")
        };
        match has(FaultKind::Slow) {
            Some(f) => Ok(Response::Late(
                reply,
                std::time::Duration::from_millis(f.delay_ms),
            )),
            None => Ok(Response::Reply(reply)),
        }
    }
}

#[cfg(test)]
mod tests {
    use engine::clock::SimClock;
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
        assert!(ask(load, "VOLT 3").is_none());
        assert!(
            ask(load, "SYST:ERR?").unwrap().starts_with("-113"),
            "a load holds no voltage"
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
}
