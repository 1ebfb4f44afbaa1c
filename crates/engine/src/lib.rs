//! Executes a [`Plan`] on a source and a load: the step loop, sampling,
//! end conditions, the safety envelope on every sample, and the safe stop
//! that ends every run (load input off, source output off, confirmed by
//! read-back). Speaks to instruments only through their physical-unit
//! methods; knows nothing of SCPI text, the simulator, CSV or reports.

pub mod clock;
pub mod control;
pub mod groups;
pub mod safety;
pub mod step;

/// Run states and their transitions.
pub use model::status as state;
pub use model::truth::TruthStep;
/// The events the engine emits are the run record's events.
pub use record::event;
pub use record::manifest::{Timing, LATE_S};

use crate::clock::Clock;
use analysis::integrate::Integrator;
use control::StopHandle;
use event::{EndKind, Event, Sink};
use futures::FutureExt;
use instrument::profile::Guarded;
use instrument::{
    ErrorKind, Instrument, InstrumentError, Load, LoadSetting, Meter, Reading, Source,
};
use model::procedure::{
    DischargeMode, EndCondition, FineSampling, Plan, PlanStep, ResultTag, StepKind,
};
use model::sample::Sample;
use model::truth::{GroundTruth, TruthCounters};
use serde::Serialize;
use state::{RunState, Trigger};
use std::panic::AssertUnwindSafe;
use std::sync::Arc;
use step::StepTracker;

/// The instruments of one station.
pub struct Station {
    pub source: Source,
    pub load: Load,
    /// A separate voltmeter at the pack terminals: when present, the pack
    /// voltage (and temperature, if it has an input) come from it.
    pub meter: Option<Meter>,
    /// Source and load are the two roles of one source-sink instrument on
    /// one link.
    pub shared_link: bool,
    /// The pack's cell groups and temperature inputs on the meter's
    /// channels (the meter must scan).
    pub groups: Option<model::groups::GroupChannels>,
}

impl Station {
    pub fn new(source: Source, load: Load) -> Station {
        Station {
            source,
            load,
            meter: None,
            shared_link: false,
            groups: None,
        }
    }
}

/// How often the instruments' error queues are read while a step runs,
/// run seconds.
pub const ERROR_POLL_S: f64 = 1.0;

/// How often the driving instrument's protection register is read, run
/// seconds. A trip has already switched that output off when it is read:
/// the poll tells the run why it stops, it does not make it safe; so it
/// need not cost a query every second.
pub const TRIP_POLL_S: f64 = 5.0;

/// When a step samples: a grid from the step's start at its interval,
/// finer near an end when asked, and exactly at a time limit, a pulse
/// level's end and the envelope's step time cap.
struct Schedule {
    every: f64,
    fine: Option<FineSampling>,
    time_limit: Option<f64>,
    cap_time: f64,
}

impl Schedule {
    fn of(st: &PlanStep, plan: &Plan, tracker: &StepTracker) -> Schedule {
        let every = st.sample_every_s.unwrap_or(plan.sample_every_s);
        Schedule {
            every,
            fine: plan.fine.filter(|f| f.every_s < every),
            time_limit: tracker.time_limit(st),
            cap_time: tracker.t0 + plan.envelope.step_time_max_s,
        }
    }

    /// The time of the next sample after `s` (taken at `s.t_s`).
    fn next(
        &self,
        st: &PlanStep,
        s: &Sample,
        prev: Option<&Sample>,
        t0: f64,
        level_end: Option<f64>,
    ) -> f64 {
        let (t, every) = (s.t_s, self.every);
        // Samples follow a grid from the step's start, so a paced clock
        // that wakes late does not stretch the interval (a late sample is
        // taken at once), and extra samples at pulse edges do not shift it.
        let k = ((t - t0) / every + 1e-9).floor() + 1.0;
        let mut next = t0 + k * every;
        if let Some(f) = self.fine {
            if near_end(st, s, prev, every, f.within_fraction) {
                next = next.min(t + f.every_s);
            }
        }
        if let Some(tl) = self.time_limit {
            if tl > t + 1e-9 {
                next = next.min(tl);
            }
        }
        if let Some(end) = level_end {
            next = next.min(end);
        }
        if self.cap_time > t + 1e-9 {
            next = next.min(self.cap_time + 1e-3);
        }
        next
    }
}

/// Which instrument drives the pack.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Active {
    None,
    Source,
    Load,
}

/// Retries of an idempotent measurement after a timeout.
pub const MEASURE_RETRIES: usize = 2;

/// How a run ended.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunOutcome {
    pub status: RunState,
    pub reason: Option<String>,
    pub source_off_confirmed: bool,
    pub load_off_confirmed: bool,
    /// Instruments whose switch-off failed for the whole hold
    /// ([`Engine::with_off_hold`]): their output may still be on and must
    /// be switched off by hand. Each with the last error.
    pub may_be_on: Vec<(String, String)>,
    pub truth: Vec<TruthStep>,
    pub duration_s: f64,
    pub timing: Timing,
    pub zero: ZeroOffsets,
}

/// Each instrument's current reading with its output off (pack sign).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize)]
pub struct ZeroOffsets {
    pub source_a: Option<f64>,
    pub load_a: Option<f64>,
}

/// Readings averaged for a zero offset before the run (the uncertainty
/// budget's tare term reads the same number: a test keeps them equal).
pub const ZERO_READINGS: usize = record::budget::TARE_READINGS;
/// Readings averaged for a drain step's own zero (its figure is a few mA).
pub const DRAIN_ZERO_READINGS: usize = 50;

/// How a step that was interrupted goes on when a run resumes.
#[derive(Debug, Clone, PartialEq)]
pub struct ResumePoint {
    /// Position in the plan's steps of the step the run continues with.
    pub position: usize,
    /// Run time to continue at, s (after the last logged sample and the gap).
    pub t_run_s: f64,
    /// Run time of the last sample before the interruption, s.
    pub last_sample_t_s: f64,
    pub gap_s: f64,
    /// What the interrupted step had done, when it goes on rather than
    /// starting again.
    pub carried: Option<Carried>,
}

/// Elapsed time and counted charge of an interrupted step that continues.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Carried {
    pub elapsed_s: f64,
    pub counters: Integrator,
}

/// The rule for each step kind when a run resumes inside the step.
pub fn resume_rule(kind: &StepKind) -> &'static str {
    match kind {
        StepKind::Rest => "a rest restarts its timer",
        StepKind::Charge { .. } => "a charge continues: same setpoints, the supply takes up constant current or its taper where the pack's voltage puts it; elapsed time and charge counted so far carry over (the dv/dt and peak-drop windows start afresh)",
        StepKind::Discharge { .. } => "a discharge continues to its end condition; elapsed time and charge and energy counted so far carry over",
        StepKind::Pulse { .. } => "a pulse starts again from its first level (a resistance reading needs a whole pulse)",
        StepKind::Drain { .. } => "a drain measurement starts again (its voltage is read afresh)",
    }
}

/// The rule a resume at plan position `step` follows, as recorded.
pub fn resume_rule_at(step: Option<&PlanStep>, carried: bool) -> String {
    match step {
        Some(s) if carried || !resume_continues(&s.kind) => resume_rule(&s.kind).to_string(),
        Some(_) => "the step had not started: it starts from the beginning".to_string(),
        None => "no step left to run".to_string(),
    }
}

/// Whether a step kind goes on (true) or starts again (false) on resume.
pub fn resume_continues(kind: &StepKind) -> bool {
    matches!(kind, StepKind::Charge { .. } | StepKind::Discharge { .. })
}

enum Stop {
    Breach(String),
    Instrument(InstrumentError),
    Interrupted,
    Log(std::io::Error),
}

/// One run of a plan on a station.
pub struct Engine<'a> {
    plan: &'a Plan,
    station: &'a mut Station,
    clock: Arc<dyn Clock>,
    sink: &'a mut dyn Sink,
    truth: Option<Arc<dyn GroundTruth>>,
    stop: StopHandle,
    t_start: f64,
    active: Active,
    truth_steps: Vec<TruthStep>,
    truth_open: Option<TruthCounters>,
    truth_model: Option<model::truth::ModelState>,
    current_step: u32,
    step_open: bool,
    next_error_poll: f64,
    next_trip_poll: f64,
    timing: Timing,
    zero: ZeroOffsets,
    /// The station's calibration, applied to every reading (absent: the
    /// readings as the instruments give them, less their zero offsets).
    calibration: Option<analysis::calibration::Corrections>,
    alarm_capacity_ah: Option<f64>,
    resume: Option<ResumePoint>,
    /// The source's zero read just before the drain step now running.
    drain_zero: Option<f64>,
    /// The cell groups' reader, where the station reads groups.
    groups: Option<groups::GroupMonitor>,
    /// The last group scan.
    last_groups: Option<model::groups::GroupSample>,
    /// How long the safe stop keeps trying an output it cannot confirm off.
    off_hold: std::time::Duration,
    /// The clock's suspended seconds when the run started.
    slept0: f64,
    /// The capacity this run measured in its step with result =
    /// "capacity" (to its cutoff), Ah.
    measured_ah: Option<f64>,
    /// The pack's resistance over the last pulse level, Ω (ΔV/ΔI from the
    /// sample before its edge to its last sample), to hold the next
    /// pulse inside the voltage limits.
    pulse_r_ohm: Option<f64>,
    /// The latest sample of the run.
    last_sample: Option<Sample>,
}

/// A suspend of the computer longer than this (s) while a run is live is a
/// fault: run time stood still, so no limit, time cap or sample covered
/// the pack meanwhile, and the charge over the sleep is unknown. (The
/// boot-time and monotonic clocks also drift apart by a few milliseconds
/// a day with no suspend at all.)
pub const SUSPEND_MAX_S: f64 = 1.0;

/// How long the safe stop keeps switching off, and reading back, an
/// output it could not confirm off (wall clock), by default: a minute
/// covers a serial adapter re-enumerating, an instrument rebooting after
/// a brown-out, or a line that went silent and came back; past it the
/// operator is told which instrument may still be on.
pub const OFF_HOLD: std::time::Duration = std::time::Duration::from_secs(60);

/// The first pause between two tries of an unconfirmed switch-off; it
/// doubles up to [`OFF_RETRY_MAX`].
pub const OFF_RETRY_FIRST: std::time::Duration = std::time::Duration::from_millis(250);
pub const OFF_RETRY_MAX: std::time::Duration = std::time::Duration::from_secs(4);

impl<'a> Engine<'a> {
    pub fn new(
        plan: &'a Plan,
        station: &'a mut Station,
        clock: Arc<dyn Clock>,
        sink: &'a mut dyn Sink,
        truth: Option<Arc<dyn GroundTruth>>,
        stop: StopHandle,
    ) -> Engine<'a> {
        let t_start = clock.now();
        let group_monitor = station.groups.clone().map(groups::GroupMonitor::new);
        Engine {
            plan,
            station,
            clock,
            sink,
            truth,
            stop,
            t_start,
            active: Active::None,
            truth_steps: Vec::new(),
            truth_open: None,
            truth_model: None,
            current_step: 0,
            step_open: false,
            next_error_poll: ERROR_POLL_S,
            next_trip_poll: TRIP_POLL_S,
            timing: Timing::default(),
            zero: ZeroOffsets::default(),
            calibration: None,
            alarm_capacity_ah: None,
            resume: None,
            drain_zero: None,
            groups: group_monitor,
            last_groups: None,
            off_hold: OFF_HOLD,
            slept0: 0.0,
            measured_ah: None,
            pulse_r_ohm: None,
            last_sample: None,
        }
        .with_sleep_mark()
    }

    fn with_sleep_mark(mut self) -> Self {
        self.slept0 = self.clock.slept_s();
        self
    }

    /// A suspend of the computer since the run started is a fault.
    fn check_awake(&mut self) -> Result<(), Stop> {
        let slept = self.clock.slept_s() - self.slept0;
        if slept <= SUSPEND_MAX_S {
            return Ok(());
        }
        let m = format!(
            "the computer was suspended for {slept:.1} s while the run was live: no limit was checked and the charge over the sleep is unknown"
        );
        let _ = self.sink.event(&Event::InstrumentError {
            t_s: self.t(),
            step: self.current_step,
            instrument: "computer".into(),
            kind: "suspended".into(),
            message: m.clone(),
        });
        Err(Stop::Breach(m))
    }

    /// Apply a calibration's corrections to every reading: each current by
    /// the line of its direction (in place of the zero offset, which the
    /// line's own offset holds), the voltage by its line.
    pub fn with_calibration(mut self, c: Option<analysis::calibration::Corrections>) -> Self {
        self.calibration = c;
        self
    }

    /// A reading as logged: calibrated where the station has a
    /// calibration, else less the instrument's zero offset.
    fn logged(&self, r: &Reading, step: &PlanStep) -> (f64, f64) {
        let tared = r.current_a - self.zero_of(step);
        match &self.calibration {
            Some(c) => {
                let i =
                    if self.active == Active::None || matches!(step.kind, StepKind::Drain { .. }) {
                        tared
                    } else {
                        c.current(r.current_a).unwrap_or(tared)
                    };
                (c.voltage(r.voltage_v), i)
            }
            None => (r.voltage_v, tared),
        }
    }

    /// Keep trying an unconfirmed switch-off this long (wall clock).
    pub fn with_off_hold(mut self, hold: std::time::Duration) -> Self {
        self.off_hold = hold;
        self
    }

    /// Raise an alarm (an event, the run goes on) when the capacity step
    /// reaches its cutoff having given less than this, Ah.
    pub fn with_capacity_alarm(mut self, ah: Option<f64>) -> Self {
        self.alarm_capacity_ah = ah;
        self
    }

    /// Continue an interrupted run instead of starting at the first step.
    pub fn resume_from(mut self, point: ResumePoint) -> Self {
        self.t_start = self.clock.now() - point.t_run_s;
        self.next_error_poll = point.t_run_s + ERROR_POLL_S;
        self.next_trip_poll = point.t_run_s + TRIP_POLL_S;
        self.resume = Some(point);
        self
    }

    fn t(&self) -> f64 {
        self.clock.now() - self.t_start
    }

    /// Wait until run time `t`, or less if a stop is asked for.
    async fn wait_until(&mut self, t: f64) {
        let at = self.t_start + t;
        if self.clock.is_simulated() {
            // Simulated time jumps: there is nothing to wait through.
            self.clock.sleep_until(at).await;
            return;
        }
        let stop = self.stop.clone();
        tokio::select! {
            _ = self.clock.sleep_until(at) => {}
            _ = stop.wait() => {}
        }
    }

    /// Before the first step, outputs off: read the pack at rest and each
    /// instrument's zero; a pack outside the envelope is not driven.
    async fn preflight(&mut self) -> Result<(), Stop> {
        self.clear_latched_trips().await?;
        if let (Some(chs), Some(m)) = (&self.station.groups, self.station.meter.as_mut()) {
            let temps: Vec<u32> = chs.temperatures.iter().map(|t| t.channel).collect();
            if let Err(e) = m.setup_scan(&chs.voltage, &temps).await {
                self.record_instrument_error(&e, None)?;
                return Err(Stop::Instrument(e));
            }
        }
        let (reading, temp) = self.measure().await?;
        let st = &mut *self.station;
        let mut zero = ZeroOffsets::default();
        let avg = |v: &[f64]| v.iter().sum::<f64>() / v.len().max(1) as f64;
        let mut src = Vec::new();
        let mut ld = Vec::new();
        for _ in 0..ZERO_READINGS {
            src.push(
                st.source
                    .measure()
                    .await
                    .map_err(Stop::Instrument)?
                    .current_a,
            );
            if !st.shared_link {
                ld.push(st.load.measure().await.map_err(Stop::Instrument)?.current_a);
            }
        }
        zero.source_a = Some(avg(&src));
        zero.load_a = if st.shared_link {
            zero.source_a
        } else {
            Some(avg(&ld))
        };
        self.zero = zero;
        let policy = self.plan.offsets;
        let t = self.t();
        self.emit(Event::Preflight {
            t_s: t,
            voltage_v: reading.voltage_v,
            temperature_c: temp,
            source_zero_a: zero.source_a,
            load_zero_a: zero.load_a,
            corrected: policy.correct,
        })?;
        for (name, z) in [("source", zero.source_a), ("load", zero.load_a)] {
            if let Some(z) = z {
                if z.abs() > policy.warn_above_a {
                    self.emit(Event::Warning {
                        t_s: t,
                        step: 0,
                        message: format!(
                            "the {name} reads {:.1} mA with its output off (above {:.1} mA){}",
                            z * 1000.0,
                            policy.warn_above_a * 1000.0,
                            if policy.correct {
                                "; subtracted from its readings"
                            } else {
                                "; not corrected (set [offsets] correct = true to subtract it)"
                            }
                        ),
                    })?;
                }
            }
        }
        let s = Sample {
            t_s: t,
            step: 0,
            cycle: 0,
            voltage_v: reading.voltage_v,
            current_a: 0.0,
            temperature_c: temp,
        };
        if let Some(b) = safety::check(&s, &safety::StepSoFar::default(), &self.plan.envelope) {
            self.emit(Event::Breach {
                t_s: t,
                step: 0,
                limit: b.limit.into(),
                value: b.value,
                threshold: b.threshold,
                message: format!("before the first step: {}", b.message),
            })?;
            return Err(Stop::Breach(format!(
                "safety limit {} before the first step: {}",
                b.limit, b.message
            )));
        }
        self.program_backstop().await
    }

    /// The source's (`load = false`) or the load's instrument.
    fn instrument(&mut self, load: bool) -> &mut Instrument {
        if load {
            &mut self.station.load.0
        } else {
            &mut self.station.source.0
        }
    }

    /// The instruments to ask about trips: one for a source-sink.
    fn guarded_roles(&self) -> &'static [bool] {
        if self.station.shared_link {
            &[false]
        } else {
            &[false, true]
        }
    }

    /// A protection trip latched before this run (the instrument switched
    /// itself off while the controller was gone) is reported and cleared;
    /// one that cannot be cleared stops the run before it starts.
    async fn clear_latched_trips(&mut self) -> Result<(), Stop> {
        for &load in self.guarded_roles() {
            let inst = self.instrument(load);
            let trips = inst.trips().await.map_err(Stop::Instrument)?;
            if trips.is_empty() {
                continue;
            }
            let name = inst.name().to_string();
            let cleared = inst.clear_protection().await;
            let t = self.t();
            self.emit(Event::Warning {
                t_s: t,
                step: 0,
                message: format!(
                    "the {name} had switched itself off on its own protection before this run ({}): {}",
                    trips.join(", "),
                    match &cleared {
                        Ok(true) => "cleared",
                        Ok(false) => "its profile has no command to clear it",
                        Err(_) => "it refuses to clear",
                    }
                ),
            })?;
            match cleared {
                Ok(true) => {}
                Ok(false) => {
                    return Err(Stop::Instrument(InstrumentError {
                        instrument: name,
                        kind: ErrorKind::Protection,
                        message: format!(
                            "its protection is latched ({}) and the profile cannot clear it: clear it at the instrument",
                            trips.join(", ")
                        ),
                    }))
                }
                Err(e) => return Err(Stop::Instrument(e)),
            }
        }
        Ok(())
    }

    /// Program each instrument's own protection from the envelope, read it
    /// back and record it; warn of what a profile cannot program.
    async fn program_backstop(&mut self) -> Result<(), Stop> {
        let b = safety::backstop(&self.plan.envelope);
        let shared = self.station.shared_link;
        let source_ops = [
            (Guarded::OverVoltage, b.over_voltage_v),
            (Guarded::OverCurrent, b.over_current_a),
        ];
        let load_ops = [
            (Guarded::UnderVoltage, b.under_voltage_v),
            (Guarded::VoltageOn, b.voltage_on_v),
            (Guarded::OverCurrent, b.over_current_a),
        ];
        for (load, ops) in [(false, &source_ops[..]), (true, &load_ops[..])] {
            let mut missing = Vec::new();
            for &(p, level) in ops {
                // One over-current protection guards a source-sink's output.
                if shared && load && p == Guarded::OverCurrent {
                    continue;
                }
                let inst = self.instrument(load);
                if !inst.has_protection(p) {
                    missing.push(p.name());
                    continue;
                }
                let name = inst.name().to_string();
                let level = inst.within_range(p, level);
                let back = inst.set_protection(p, level).await;
                let back = match back {
                    Ok(x) => x,
                    Err(e) => {
                        self.record_instrument_error(&e, None)?;
                        return Err(Stop::Instrument(e));
                    }
                };
                let t = self.t();
                self.emit(Event::Backstop {
                    t_s: t,
                    instrument: name,
                    protection: p.name().into(),
                    level,
                    unit: p.unit().into(),
                    read_back: back,
                })?;
            }
            // The voltage-on threshold is a convenience, not a backstop.
            missing.retain(|m| *m != Guarded::VoltageOn.name());
            if !missing.is_empty() {
                let name = self.instrument(load).name().to_string();
                let t = self.t();
                self.emit(Event::Warning {
                    t_s: t,
                    step: 0,
                    message: format!(
                        "the {name}'s profile cannot program its {}: if the controller stops (a crash, a kill, a pulled cable) the {name} goes on {} until its own fixed limits stop it; set them at the instrument by hand",
                        missing.join(" or "),
                        if load { "sinking" } else { "sourcing" }
                    ),
                })?;
            }
        }
        Ok(())
    }

    /// The zero offset to subtract from a reading of the active instrument.
    fn zero_of(&self, step: &PlanStep) -> f64 {
        let correct = self.plan.offsets.correct || matches!(step.kind, StepKind::Drain { .. });
        if !correct {
            return 0.0;
        }
        if let (StepKind::Drain { .. }, Some(z)) = (&step.kind, self.drain_zero) {
            return z;
        }
        match self.active {
            Active::Source => self.zero.source_a.unwrap_or(0.0),
            Active::Load => self.zero.load_a.unwrap_or(0.0),
            Active::None => 0.0,
        }
    }

    /// Run every step, then stop safely whatever happened.
    pub async fn run(mut self) -> RunOutcome {
        let mut state = RunState::Ready;
        match &self.resume {
            None => {
                let _ = self.sink.event(&Event::RunStart {
                    schema_version: record::schema::SCHEMA_VERSION,
                    t_s: 0.0,
                    steps: self.plan.steps.len() as u32,
                });
            }
            Some(r) => {
                let step = self.plan.steps.get(r.position);
                let _ = self.sink.event(&Event::Resumed {
                    t_s: r.t_run_s,
                    step: step.map(|s| s.index).unwrap_or(0),
                    last_sample_t_s: r.last_sample_t_s,
                    gap_s: r.gap_s,
                    rule: resume_rule_at(step, r.carried.is_some()),
                });
            }
        }
        state = state.next(Trigger::Start).unwrap_or(state);
        let result = AssertUnwindSafe(self.run_steps()).catch_unwind().await;
        let (trigger, reason, interrupted) = match result {
            Ok(Ok(())) => (Trigger::LastStepDone, None, false),
            Ok(Err(Stop::Breach(m))) => (Trigger::Breach, Some(m), false),
            Ok(Err(Stop::Instrument(e))) => (
                Trigger::InstrumentFault,
                Some(format!("instrument fault: {e}")),
                false,
            ),
            Ok(Err(Stop::Log(e))) => (
                Trigger::InstrumentFault,
                Some(format!("cannot write the log: {e}")),
                false,
            ),
            Ok(Err(Stop::Interrupted)) => (
                Trigger::StopRequested,
                Some("interrupted by the operator".into()),
                true,
            ),
            Err(panic) => {
                let msg = panic
                    .downcast_ref::<&str>()
                    .map(|s| s.to_string())
                    .or_else(|| panic.downcast_ref::<String>().cloned())
                    .unwrap_or_else(|| "unknown".into());
                (
                    Trigger::InstrumentFault,
                    Some(format!("internal error: {msg}")),
                    false,
                )
            }
        };
        state = state.next(trigger).unwrap_or(RunState::Stopping);
        if let (Some(r), true) = (&reason, self.step_open) {
            let kind = if interrupted {
                EndKind::Interrupted
            } else {
                EndKind::Aborted
            };
            self.close_truth_step(self.current_step);
            self.step_open = false;
            let _ = self.sink.event(&Event::StepEnd {
                t_s: self.t(),
                step: self.current_step,
                end_kind: kind,
                end_reason: r.clone(),
            });
        }
        let (src_ok, load_ok, may_be_on) = self.outputs_off().await;
        for (who, e) in &may_be_on {
            let _ = self.sink.event(&Event::InstrumentError {
                t_s: self.t(),
                step: self.current_step,
                instrument: who.clone(),
                kind: "may_be_on".into(),
                message: format!(
                    "not confirmed off after {:.0} s of tries ({e}): its output may still be on; switch it off by hand",
                    self.off_hold.as_secs_f64()
                ),
            });
        }
        let _ = self.sink.event(&Event::OutputsOff {
            t_s: self.t(),
            reason: reason
                .clone()
                .unwrap_or_else(|| "procedure complete".into()),
            source_off_confirmed: src_ok,
            load_off_confirmed: load_ok,
        });
        let mut reason = reason;
        let finished = reason.is_none() && src_ok && load_ok;
        if reason.is_none() && !finished {
            reason = Some("outputs could not be confirmed off at the end".into());
        }
        state = state
            .next(Trigger::OutputsOff {
                finished,
                interrupted,
            })
            .unwrap_or(RunState::Aborted);
        let _ = self.sink.event(&Event::RunEnd {
            t_s: self.t(),
            status: state.into(),
            reason: reason.clone(),
        });
        RunOutcome {
            status: state,
            reason,
            source_off_confirmed: src_ok,
            load_off_confirmed: load_ok,
            may_be_on,
            truth: std::mem::take(&mut self.truth_steps),
            duration_s: self.t(),
            timing: self.timing,
            zero: self.zero,
        }
    }

    /// Every instrument to its safe state, each confirmed by read-back
    /// where possible. Separate links are handled at the same time, so a
    /// silent instrument does not delay the other's switch-off; one
    /// source-sink link is handled in turn, load role first. An
    /// instrument whose switch-off fails (no answer, a lost link, an
    /// output that stays on) is tried again with a growing pause for the
    /// whole hold: one that answers again mid-stop ends off, confirmed.
    /// Returns (source confirmed, load confirmed, instruments that may
    /// still be on).
    async fn outputs_off(&mut self) -> (bool, bool, Vec<(String, String)>) {
        let hold = self.off_hold;
        let st = &mut *self.station;
        let until = tokio::time::Instant::now() + hold;
        let (load, src) = if st.shared_link {
            let l = off_held(&mut st.load.0, until).await;
            let s = off_held(&mut st.source.0, until).await;
            (l, s)
        } else {
            tokio::join!(
                off_held(&mut st.load.0, until),
                off_held(&mut st.source.0, until)
            )
        };
        self.active = Active::None;
        let mut may_be_on = Vec::new();
        for (role, r) in [("source", &src), ("load", &load)] {
            if let Err(e) = r {
                let who = if e.instrument.is_empty() {
                    role.to_string()
                } else {
                    e.instrument.clone()
                };
                may_be_on.push((who, e.message.clone()));
            }
        }
        (matches!(src, Ok(true)), matches!(load, Ok(true)), may_be_on)
    }

    /// Read the error queues about once a second, and the driving
    /// instrument's protection register every few seconds: an error an
    /// instrument raises by itself (a protection trip, over-temperature)
    /// stops the run.
    async fn poll_errors(&mut self, t: f64) -> Result<(), Stop> {
        if t < self.next_error_poll {
            return Ok(());
        }
        self.next_error_poll = t + ERROR_POLL_S;
        let st = &mut *self.station;
        let mut r = st.source.0.poll_errors().await;
        if r.is_ok() && !st.shared_link {
            r = st.load.0.poll_errors().await;
        }
        if r.is_ok() {
            if let Some(m) = st.meter.as_mut() {
                r = m.0.poll_errors().await;
            }
        }
        // Only a driving instrument's protection can trip (one whose output
        // is off has nothing to protect): its register is read, not both.
        if r.is_ok() && t >= self.next_trip_poll {
            self.next_trip_poll = t + TRIP_POLL_S;
            r = match self.active {
                Active::Source => st.source.0.check_trips().await,
                Active::Load if st.shared_link => st.source.0.check_trips().await,
                Active::Load => st.load.0.check_trips().await,
                Active::None => Ok(()),
            };
        }
        match r {
            Ok(()) => Ok(()),
            Err(e) => {
                self.record_instrument_error(&e, None)?;
                Err(Stop::Instrument(e))
            }
        }
    }

    /// Record an instrument error in the events; `kind` defaults to the
    /// error's own kind.
    fn record_instrument_error(
        &mut self,
        e: &InstrumentError,
        kind: Option<&str>,
    ) -> Result<(), Stop> {
        let step = self.current_step;
        self.emit(Event::InstrumentError {
            t_s: self.t(),
            step,
            instrument: e.instrument.clone(),
            kind: kind
                .map(str::to_string)
                .unwrap_or_else(|| format!("{:?}", e.kind).to_lowercase()),
            message: e.message.clone(),
        })
    }

    fn emit(&mut self, e: Event) -> Result<(), Stop> {
        self.sink.event(&e).map_err(Stop::Log)
    }

    async fn switch_off_active(&mut self) -> Result<(), Stop> {
        match self.active {
            Active::Source => self
                .station
                .source
                .0
                .disable()
                .await
                .map_err(Stop::Instrument)?,
            Active::Load => self
                .station
                .load
                .0
                .disable()
                .await
                .map_err(Stop::Instrument)?,
            Active::None => {}
        }
        self.active = Active::None;
        Ok(())
    }

    /// Apply a drive: the old instrument off before the new one on. A
    /// change of level on the instrument already driving is made in place.
    async fn drive(&mut self, want: Active, setting: Drive) -> Result<(), Stop> {
        if self.active != want {
            self.switch_off_active().await?;
        }
        match (want, setting) {
            (
                Active::Source,
                Drive::Charge {
                    voltage_v,
                    current_a,
                },
            ) => {
                self.station
                    .source
                    .program(voltage_v, current_a)
                    .await
                    .map_err(Stop::Instrument)?;
                if self.active != Active::Source {
                    self.station
                        .source
                        .0
                        .enable()
                        .await
                        .map_err(Stop::Instrument)?;
                }
            }
            (Active::Load, Drive::Load(s)) => {
                self.station
                    .load
                    .program(s)
                    .await
                    .map_err(Stop::Instrument)?;
                if self.active != Active::Load {
                    self.station
                        .load
                        .0
                        .enable()
                        .await
                        .map_err(Stop::Instrument)?;
                }
            }
            _ => {}
        }
        self.active = want;
        Ok(())
    }

    async fn measure_once(&mut self) -> Result<(Reading, Option<f64>), InstrumentError> {
        let mut reading = match self.active {
            Active::Source => self.station.source.measure().await?,
            Active::Load => self.station.load.measure().await?,
            // Both outputs are off: the pack current is zero by
            // construction; the voltage comes from the meter, or else the
            // load's input.
            Active::None if self.station.meter.is_some() => Reading {
                voltage_v: f64::NAN,
                current_a: 0.0,
            },
            Active::None => Reading {
                voltage_v: self.station.load.0.measure_voltage().await?,
                current_a: 0.0,
            },
        };
        if let Some(m) = self.station.meter.as_mut() {
            // Sense leads at the pack terminals: no lead drop.
            reading.voltage_v = m.0.measure_voltage().await?;
            if let Some(t) = m.0.measure_temperature().await? {
                return Ok((reading, Some(t)));
            }
        }
        let temp = match self.station.load.0.measure_temperature().await? {
            Some(t) => Some(t),
            None => self.station.source.0.measure_temperature().await?,
        };
        Ok((reading, temp))
    }

    async fn measure(&mut self) -> Result<(Reading, Option<f64>), Stop> {
        let mut tries = 0;
        loop {
            match self.measure_once().await {
                Ok(r) => return Ok(r),
                Err(e)
                    if matches!(e.kind, ErrorKind::Timeout | ErrorKind::Protocol)
                        && tries < MEASURE_RETRIES =>
                {
                    tries += 1;
                    let kind = if e.kind == ErrorKind::Timeout {
                        "timeout_retry"
                    } else {
                        "protocol_retry"
                    };
                    self.record_instrument_error(&e, Some(kind))?;
                    // Measurements are idempotent: retry once the session
                    // is back in step. An instrument that cannot even
                    // resynchronise is not retried further.
                    let st = &mut *self.station;
                    let inst = match e.instrument.as_str() {
                        "source" => &mut st.source.0,
                        "meter" if st.meter.is_some() => match st.meter.as_mut() {
                            Some(m) => &mut m.0,
                            None => &mut st.load.0,
                        },
                        _ => &mut st.load.0,
                    };
                    if let Err(r) = inst.resync().await {
                        self.record_instrument_error(&r, None)?;
                        return Err(Stop::Instrument(e));
                    }
                }
                Err(e) => {
                    self.record_instrument_error(&e, None)?;
                    return Err(Stop::Instrument(e));
                }
            }
        }
    }

    fn close_truth_step(&mut self, step: u32) {
        if let (Some(t), Some(start)) = (&self.truth, self.truth_open.take()) {
            let now = t.counters();
            let charge_ah = now.charge_ah - start.charge_ah;
            // A discharge of a pack read by groups: each group's charge to
            // its own cutoff, while the load still draws.
            let groups_to_cutoff_ah = match (self.group_cutoff(step), &self.groups) {
                (Some(cut), Some(_)) => t
                    .groups_to_cutoff(cut)
                    .into_iter()
                    .map(|r| -charge_ah + r)
                    .collect(),
                _ => Vec::new(),
            };
            self.truth_steps.push(TruthStep {
                step,
                charge_ah,
                energy_wh: now.energy_wh - start.energy_wh,
                groups_to_cutoff_ah,
                model_at_start: self.truth_model.take(),
            });
        }
    }

    /// A discharge step's per-group cutoff, V: its `voltage <` end over
    /// the number of groups (one group is one cell of the series count).
    fn group_cutoff(&self, step: u32) -> Option<f64> {
        let n = self.groups.as_ref()?.channels.groups();
        let st = self.plan.steps.iter().find(|s| s.index == step)?;
        if !matches!(st.kind, StepKind::Discharge { .. }) {
            return None;
        }
        st.ends.iter().find_map(|c| match *c {
            EndCondition::VoltageBelow { voltage_v } => Some(voltage_v / n as f64),
            _ => None,
        })
    }

    /// A step's end on its groups: a discharge ends when the first group
    /// reaches the per-cell cutoff (every group, not the average); a charge
    /// when any group rises past the step's per-cell voltage.
    fn group_end(&self, st: &PlanStep) -> Option<(EndKind, String)> {
        let g = self.last_groups.as_ref()?;
        let n = g.voltage_v.len() as f64;
        if n == 0.0 || g.step != st.index {
            return None;
        }
        let on = |k: u32| match g.inferred {
            Some(i) if i == k => " (read from the pack voltage less the others)",
            _ => "",
        };
        match &st.kind {
            StepKind::Discharge { .. } => st.ends.iter().find_map(|c| match *c {
                EndCondition::VoltageBelow { voltage_v } => {
                    let cut = voltage_v / n;
                    groups::first_below(g, cut).map(|(k, v)| {
                        (
                            EndKind::GroupVoltageBelow,
                            format!(
                                "group {k} reached {v:.3} V{}, the cutoff of {cut:.3} V/cell",
                                on(k)
                            ),
                        )
                    })
                }
                _ => None,
            }),
            StepKind::Charge { voltage_v, .. } => {
                let level = voltage_v / n + groups::GROUP_CHARGE_MARGIN_V;
                groups::first_above(g, level).map(|(k, v)| {
                    (
                        EndKind::GroupVoltageAbove,
                        model::groups::group_full_reason(
                            k,
                            v,
                            voltage_v / n,
                            g.inferred == Some(k),
                        ),
                    )
                })
            }
            _ => None,
        }
    }

    /// Scan the groups and temperature inputs with the sample just taken:
    /// the group log, faulty channels' events, and the per-group limits.
    async fn scan_groups(&mut self, s: &Sample) -> Result<(), Stop> {
        let (Some(mon), Some(meter)) = (self.groups.as_ref(), self.station.meter.as_mut()) else {
            return Ok(());
        };
        let raw = match meter
            .scan(&mon.channels.voltage, &mon.temperature_channels)
            .await
        {
            Ok(r) => r,
            Err(e) => {
                self.record_instrument_error(&e, None)?;
                return Err(Stop::Instrument(e));
            }
        };
        let Some(mon) = self.groups.as_mut() else {
            return Ok(());
        };
        let out = mon.interpret(s.t_s, s.step, s.cycle, s.voltage_v, &raw);
        let breach = match &out.unobservable {
            Some(why) => Some(groups::GroupBreach {
                limit: "group_voltages",
                value: f64::NAN,
                threshold: 0.0,
                message: why.clone(),
            }),
            None => groups::check(
                &out.sample,
                &mon.rises(),
                &mon.channels,
                &self.plan.envelope,
            ),
        };
        self.sink.groups(&out.sample).map_err(Stop::Log)?;
        for n in &out.notices {
            self.emit(Event::GroupChannel {
                t_s: s.t_s,
                step: s.step,
                channel: n.channel,
                issue: n.issue.name().into(),
                message: n.message.clone(),
            })?;
        }
        self.last_groups = Some(out.sample);
        if let Some(b) = breach {
            self.emit(Event::Breach {
                t_s: s.t_s,
                step: s.step,
                limit: b.limit.into(),
                value: b.value,
                threshold: b.threshold,
                message: b.message.clone(),
            })?;
            return Err(Stop::Breach(format!(
                "safety limit {}: {}",
                b.limit, b.message
            )));
        }
        Ok(())
    }

    fn end_step(
        &mut self,
        t_s: f64,
        step: u32,
        end_kind: EndKind,
        end_reason: String,
    ) -> Result<(), Stop> {
        self.close_truth_step(step);
        self.step_open = false;
        self.emit(Event::StepEnd {
            t_s,
            step,
            end_kind,
            end_reason,
        })
    }

    /// A step with result = "capacity" that ended on its cutoff measured
    /// the capacity later steps take their shares of.
    fn note_measured(&mut self, st: &PlanStep, kind: EndKind, tracker: &StepTracker) {
        if st.result == Some(ResultTag::Capacity) && kind.is_cutoff() {
            self.measured_ah = Some(tracker.counters.ah.abs());
        }
    }

    /// A share of the measured capacity with no measurement at hand (the
    /// capacity step did not end on its cutoff, or the run resumed after
    /// it) falls back on the rated capacity, and the record says so.
    fn warn_unmeasured(&mut self, st: &PlanStep, t0: f64) -> Result<(), Stop> {
        if self.measured_ah.is_some() {
            return Ok(());
        }
        for c in &st.ends {
            if let EndCondition::ChargeOfMeasured { fraction, rated_ah } = *c {
                self.emit(Event::Warning {
                    t_s: t0,
                    step: st.index,
                    message: format!(
                        "no measured capacity in this run (its capacity step did not end on its cutoff, or the run resumed after it): {:.1} % of the rated capacity, {rated_ah:.3} Ah, is taken instead",
                        fraction * 100.0
                    ),
                })?;
            }
        }
        Ok(())
    }

    /// The pack's resistance over the pulse level that just ended: from
    /// the sample before its edge to its last sample.
    fn note_pulse_resistance(&mut self, before: Option<Sample>, end: &Sample) {
        let Some(b) = before else { return };
        let di = end.current_a - b.current_a;
        if di.abs() < 0.01 * self.plan.envelope.current_max_a {
            return;
        }
        let r = (end.voltage_v - b.voltage_v) / di;
        if r.is_finite() && r > 0.0 {
            self.pulse_r_ohm = Some(r);
        }
    }

    /// A pulse level's current, reduced where the last level's resistance
    /// says it would take the pack past its voltage limit (the pulse
    /// method allows a reduced pulse; the record says so): a discharge
    /// level is held above 1 % over the envelope's minimum, a charge
    /// level under the 99 % its supply is set to, with a margin of
    /// [`PULSE_R_MARGIN`] on the resistance.
    fn held_level(
        &mut self,
        st: &PlanStep,
        level: usize,
        current: f64,
        v_now: f64,
    ) -> Result<f64, Stop> {
        let Some(r) = self.pulse_r_ohm else {
            return Ok(current);
        };
        let env = &self.plan.envelope;
        let room = if current < 0.0 {
            v_now - env.voltage_min_v * 1.01
        } else if current > 0.0 {
            env.voltage_max_v * 0.99 - v_now
        } else {
            return Ok(current);
        };
        let allowed = (room / (r * PULSE_R_MARGIN)).max(0.0);
        if current.abs() <= allowed {
            return Ok(current);
        }
        let held = allowed.copysign(current);
        let limit = if current < 0.0 { "minimum" } else { "maximum" };
        self.emit(Event::Warning {
            t_s: self.t(),
            step: st.index,
            message: format!(
                "pulse level {} reduced from {current:.3} A to {held:.3} A to stay inside the {limit} voltage (the last pulse's resistance {:.1} mΩ, margin {PULSE_R_MARGIN})",
                level + 1,
                r * 1000.0
            ),
        })?;
        Ok(held)
    }

    async fn run_steps(&mut self) -> Result<(), Stop> {
        let plan = self.plan;
        self.preflight().await?;
        let (from, mut carried) = match &self.resume {
            Some(r) => (r.position, r.carried),
            None => (0, None),
        };
        for st in plan.steps.iter().skip(from) {
            self.run_step(st, carried.take()).await?;
        }
        self.switch_off_active().await?;
        Ok(())
    }

    async fn run_step(&mut self, st: &PlanStep, carried: Option<Carried>) -> Result<(), Stop> {
        self.current_step = st.index;
        self.step_open = true;
        let t0 = self.t();
        if carried.is_none() {
            self.step_start_event(st, t0)?;
        }
        self.run_step_body(st, carried, t0).await
    }

    fn step_start_event(&mut self, st: &PlanStep, t0: f64) -> Result<(), Stop> {
        self.emit(Event::StepStart {
            t_s: t0,
            step: st.index,
            phase: st.phase.clone(),
            repeat: st.repeat,
            cycle: st.cycle,
            kind: st.kind.step_type(),
            name: st.name.clone(),
            description: st.kind.to_string(),
            result: st.result,
        })
    }

    /// One step: set it up, then sample until an end condition, a limit,
    /// a fault or a stop.
    async fn run_step_body(
        &mut self,
        st: &PlanStep,
        carried: Option<Carried>,
        t0: f64,
    ) -> Result<(), Stop> {
        let edge_before = self.last_sample;
        let (levels, mut tracker) = self.step_setup(st, carried, t0).await?;
        let mut level = 0usize;
        // The sample before the present pulse level's edge.
        let mut edge = edge_before;
        let schedule = Schedule::of(st, self.plan, &tracker);
        let mut scheduled: Option<f64> = None;
        let mut prev: Option<Sample> = None;
        loop {
            let s = self.take_sample(st, &mut tracker, scheduled.take()).await?;
            // The sample's own time: the end, a level's edge and the
            // schedule are judged at the moment it was taken.
            let t = s.t_s;
            if let Some((kind, cond)) = tracker.end_reached(st) {
                self.capacity_alarm(st, kind, &tracker, t)?;
                self.note_measured(st, kind, &tracker);
                return self.end_step(t, st.index, kind, cond.to_string());
            }
            if let Some((kind, why)) = self.group_end(st) {
                self.capacity_alarm(st, kind, &tracker, t)?;
                self.note_measured(st, kind, &tracker);
                return self.end_step(t, st.index, kind, why);
            }
            if !levels.is_empty() && t >= levels[level].0 - 1e-9 {
                self.note_pulse_resistance(edge, &s);
                edge = Some(s);
                level += 1;
                if level == levels.len() {
                    return self.end_step(
                        t,
                        st.index,
                        EndKind::LevelsDone,
                        "pulse levels done".into(),
                    );
                }
                let current = self.held_level(st, level, levels[level].1, s.voltage_v)?;
                if current == 0.0 {
                    self.switch_off_active().await?;
                } else {
                    let d = level_drive(current, self.plan.envelope.voltage_max_v);
                    self.drive(level_active(current), d).await?;
                }
                // Sample again at once: the edge is what a pulse is for.
                continue;
            }
            if self.stop.stop_requested() {
                return Err(Stop::Interrupted);
            }
            let next = schedule.next(
                st,
                &s,
                prev.as_ref(),
                tracker.t0,
                levels.get(level).map(|l| l.0),
            );
            prev = Some(s);
            scheduled = Some(next);
            self.wait_until(next).await;
            if self.stop.stop_requested() {
                return Err(Stop::Interrupted);
            }
        }
    }

    /// Drive the step's setpoints (a pulse's first level) and start its
    /// tracker; a resumed step goes on from the log's elapsed time and
    /// counts. Returns a pulse's levels as (end time, drive).
    async fn step_setup(
        &mut self,
        st: &PlanStep,
        carried: Option<Carried>,
        t0: f64,
    ) -> Result<(Vec<(f64, f64)>, StepTracker), Stop> {
        let mut levels: Vec<(f64, f64)> = Vec::new();
        let (want, drive) = match &st.kind {
            StepKind::Charge {
                current_a,
                voltage_v,
            } => (
                Active::Source,
                Drive::Charge {
                    voltage_v: *voltage_v,
                    current_a: *current_a,
                },
            ),
            StepKind::Discharge { load } => (
                Active::Load,
                Drive::Load(match *load {
                    DischargeMode::Current { current_a } => LoadSetting::Current(current_a),
                    DischargeMode::Power { power_w } => LoadSetting::Power(power_w),
                    DischargeMode::Resistance { resistance_ohm } => {
                        LoadSetting::Resistance(resistance_ohm)
                    }
                }),
            ),
            StepKind::Rest => (Active::None, Drive::Off),
            StepKind::Drain { current_limit_a } => self.drain_setup(st, *current_limit_a).await?,
            StepKind::Pulse { levels: ls } => {
                let mut end = t0;
                for l in ls {
                    end += l.duration_s;
                    levels.push((end, l.current_a));
                }
                let v_now = self.last_sample.map(|s| s.voltage_v);
                let current = match v_now {
                    Some(v) => self.held_level(st, 0, levels[0].1, v)?,
                    None => levels[0].1,
                };
                let vmax = self.plan.envelope.voltage_max_v;
                (level_active(current), level_drive(current, vmax))
            }
        };
        if want == Active::None {
            self.switch_off_active().await?;
        } else {
            self.drive(want, drive).await?;
        }
        self.truth_open = self.truth.as_ref().map(|t| t.counters());
        self.truth_model = self.truth.as_ref().and_then(|t| t.model_state());
        let mut tracker = StepTracker::new(self.t());
        tracker.measured_ah = self.measured_ah;
        self.warn_unmeasured(st, t0)?;
        if let Some(c) = carried {
            // Elapsed time and counts go on from the log; nothing is
            // integrated across the interruption.
            tracker.t0 = self.t() - c.elapsed_s;
            tracker.counters = c.counters;
            tracker.counters.break_segment();
        }
        Ok((levels, tracker))
    }

    /// A drain step's drive: hold the pack at its own voltage, read with
    /// outputs off, after reading the source's own zero afresh.
    async fn drain_setup(
        &mut self,
        st: &PlanStep,
        current_limit_a: f64,
    ) -> Result<(Active, Drive), Stop> {
        // Hold the pack at its own voltage, read with outputs off,
        // after reading the source's own zero afresh.
        self.switch_off_active().await?;
        let mut z = 0.0;
        for _ in 0..DRAIN_ZERO_READINGS {
            z += self
                .station
                .source
                .measure()
                .await
                .map_err(Stop::Instrument)?
                .current_a;
        }
        let z = z / DRAIN_ZERO_READINGS as f64;
        self.drain_zero = Some(z);
        self.emit(Event::Zero {
            t_s: self.t(),
            step: st.index,
            instrument: "source".into(),
            zero_a: z,
            readings: DRAIN_ZERO_READINGS as u32,
        })?;
        let (r, _) = self.measure().await?;
        Ok((
            Active::Source,
            Drive::Charge {
                voltage_v: r.voltage_v,
                current_a: current_limit_a,
            },
        ))
    }

    /// Take one sample: its lateness, the reading, the log, the error
    /// queues and the envelope.
    async fn take_sample(
        &mut self,
        st: &PlanStep,
        tracker: &mut StepTracker,
        scheduled: Option<f64>,
    ) -> Result<Sample, Stop> {
        self.check_awake()?;
        let t = self.t();
        if let Some(due) = scheduled {
            let late = t - due;
            self.timing.scheduled_samples += 1;
            if late > LATE_S {
                self.timing.late_samples += 1;
            }
            self.timing.max_late_s = self.timing.max_late_s.max(late);
        }
        let (reading, temp) = self.measure().await?;
        let (voltage_v, current_a) = self.logged(&reading, st);
        let s = Sample {
            t_s: t,
            step: st.index,
            cycle: st.cycle,
            voltage_v,
            current_a,
            temperature_c: temp,
        };
        self.sink.sample(&s).map_err(Stop::Log)?;
        tracker.push(&s);
        self.last_sample = Some(s);
        self.scan_groups(&s).await?;
        self.poll_errors(t).await?;
        let so_far = safety::StepSoFar {
            elapsed_s: tracker.elapsed(),
            charge_in_ah: tracker.counters.ah_in,
        };
        if let Some(b) = safety::check(&s, &so_far, &self.plan.envelope) {
            self.emit(Event::Breach {
                t_s: t,
                step: st.index,
                limit: b.limit.into(),
                value: b.value,
                threshold: b.threshold,
                message: b.message.clone(),
            })?;
            return Err(Stop::Breach(format!(
                "safety limit {}: {}",
                b.limit, b.message
            )));
        }
        Ok(s)
    }

    /// The low-capacity alarm: the capacity step reached its cutoff with
    /// less than the threshold. An event; the run goes on.
    fn capacity_alarm(
        &mut self,
        st: &PlanStep,
        kind: EndKind,
        tracker: &StepTracker,
        t: f64,
    ) -> Result<(), Stop> {
        let (Some(limit), Some(model::procedure::ResultTag::Capacity)) =
            (self.alarm_capacity_ah, st.result)
        else {
            return Ok(());
        };
        let got = tracker.counters.ah_out;
        if kind.is_cutoff() && got < limit {
            self.emit(Event::Alarm {
                t_s: t,
                step: st.index,
                kind: "low_capacity".into(),
                message: format!(
                    "low capacity: {got:.3} Ah to the cutoff, under the alarm threshold {limit:.3} Ah"
                ),
            })?;
        }
        Ok(())
    }
}

/// Whether a step is near one of its ends: a voltage end within the given
/// fraction of its threshold or, at the present rate of change, less than
/// three base intervals away; a charge or energy end less than three base
/// intervals away at the present current.
/// An instrument's safe state, tried again with a growing pause until it
/// is confirmed, the profile says it cannot confirm (`Ok(false)`), or
/// `until` passes (the last error).
async fn off_held(
    inst: &mut Instrument,
    until: tokio::time::Instant,
) -> Result<bool, InstrumentError> {
    let mut pause = OFF_RETRY_FIRST;
    loop {
        let r = inst.make_safe().await;
        if r.is_ok() || tokio::time::Instant::now() + pause > until {
            return r;
        }
        tokio::time::sleep(pause).await;
        pause = (pause * 2).min(OFF_RETRY_MAX);
    }
}

pub fn near_end(st: &PlanStep, s: &Sample, prev: Option<&Sample>, every: f64, within: f64) -> bool {
    let horizon = 3.0 * every;
    let rate = prev
        .filter(|p| s.t_s > p.t_s && p.step == s.step)
        .map(|p| (s.voltage_v - p.voltage_v) / (s.t_s - p.t_s));
    st.ends.iter().any(|c| match *c {
        EndCondition::VoltageBelow { voltage_v } => {
            s.voltage_v <= voltage_v * (1.0 + within)
                || rate.is_some_and(|r| r < 0.0 && (s.voltage_v - voltage_v) / -r < horizon)
        }
        EndCondition::VoltageAbove { voltage_v } => {
            s.voltage_v >= voltage_v * (1.0 - within)
                || rate.is_some_and(|r| r > 0.0 && (voltage_v - s.voltage_v) / r < horizon)
        }
        _ => false,
    })
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Drive {
    Off,
    Charge { voltage_v: f64, current_a: f64 },
    Load(LoadSetting),
}

fn level_active(current: f64) -> Active {
    if current > 0.0 {
        Active::Source
    } else if current < 0.0 {
        Active::Load
    } else {
        Active::None
    }
}

/// The margin on the last pulse's resistance when a pulse level is held
/// inside the voltage limits (a pulse at a lower state of charge meets a
/// higher resistance; our own choice).
pub const PULSE_R_MARGIN: f64 = 1.25;

/// A charge pulse is limited to 1 % under the envelope's maximum voltage.
fn level_drive(current: f64, voltage_max: f64) -> Drive {
    if current > 0.0 {
        Drive::Charge {
            voltage_v: voltage_max * 0.99,
            current_a: current,
        }
    } else if current < 0.0 {
        Drive::Load(LoadSetting::Current(-current))
    } else {
        Drive::Off
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rest_step(ends: Vec<EndCondition>) -> PlanStep {
        PlanStep {
            index: 1,
            phase: "p".into(),
            repeat: 1,
            cycle: 0,
            name: None,
            kind: StepKind::Rest,
            ends,
            result: None,
            sample_every_s: None,
            line: 1,
        }
    }

    fn at(t_s: f64) -> Sample {
        Sample {
            t_s,
            step: 1,
            cycle: 0,
            voltage_v: 3.7,
            current_a: 0.0,
            temperature_c: None,
        }
    }

    /// The next sample: on the grid from the step's start (a late one does
    /// not shift it), and exactly at a time limit, a level's end and the
    /// step time cap.
    #[test]
    fn samples_keep_their_grid_and_meet_each_limit() {
        let st = rest_step(vec![EndCondition::Time { seconds: 25.0 }]);
        let s = Schedule {
            every: 10.0,
            fine: None,
            time_limit: Some(125.0),
            cap_time: 1000.0,
        };
        assert_eq!(s.next(&st, &at(100.0), None, 100.0, None), 110.0);
        // Taken 3 s late: the next one is still on the grid.
        assert_eq!(s.next(&st, &at(113.0), None, 100.0, None), 120.0);
        // The time limit comes before the grid.
        assert_eq!(s.next(&st, &at(120.0), None, 100.0, None), 125.0);
        // A pulse level ends before the grid.
        assert_eq!(s.next(&st, &at(100.0), None, 100.0, Some(104.0)), 104.0);
        // The step time cap, just past it so the cap trips.
        let capped = Schedule {
            cap_time: 105.0,
            time_limit: None,
            ..s
        };
        assert!((capped.next(&st, &at(100.0), None, 100.0, None) - 105.001).abs() < 1e-12);
    }
}
