//! Run events and the sink trait. The engine pushes samples and events to
//! a sink; the run log, progress displays and test collectors are sinks.

pub use model::end::EndKind;
use model::groups::GroupSample;
use model::procedure::{ResultTag, StepType};
use model::sample::Sample;
use model::status::RunStatus;
use serde::{Deserialize, Serialize};

/// One line of `events.jsonl`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(tag = "event", rename_all = "snake_case")]
pub enum Event {
    RunStart {
        /// The record layout ([`crate::schema`]).
        #[serde(default = "crate::schema::unversioned")]
        schema_version: u32,
        t_s: f64,
        steps: u32,
    },
    StepStart {
        t_s: f64,
        step: u32,
        phase: String,
        repeat: u32,
        cycle: u32,
        kind: StepType,
        name: Option<String>,
        description: String,
        result: Option<ResultTag>,
    },
    StepEnd {
        t_s: f64,
        step: u32,
        end_kind: EndKind,
        end_reason: String,
    },
    /// An envelope limit was crossed.
    Breach {
        t_s: f64,
        step: u32,
        limit: String,
        /// Not a number (written as null) when the limit has no reading:
        /// a reading that was no number, groups that cannot be seen.
        #[serde(deserialize_with = "nan_if_null")]
        value: f64,
        threshold: f64,
        message: String,
    },
    InstrumentError {
        t_s: f64,
        step: u32,
        instrument: String,
        kind: String,
        message: String,
    },
    /// Outputs switched off at the end of the run, with read-back results.
    OutputsOff {
        t_s: f64,
        reason: String,
        source_off_confirmed: bool,
        load_off_confirmed: bool,
    },
    RunEnd {
        t_s: f64,
        status: RunStatus,
        reason: Option<String>,
    },
    /// Read before the first step, outputs off: the pack at rest and each
    /// instrument's current reading with nothing flowing (its zero offset,
    /// pack sign convention).
    Preflight {
        t_s: f64,
        voltage_v: f64,
        temperature_c: Option<f64>,
        source_zero_a: Option<f64>,
        load_zero_a: Option<f64>,
        /// The zero offsets are subtracted from the current readings.
        corrected: bool,
    },
    /// An instrument's current reading with its output off, read for one
    /// step (a drain step reads its own zero just before it starts).
    Zero {
        t_s: f64,
        step: u32,
        instrument: String,
        zero_a: f64,
        readings: u32,
    },
    /// An instrument's own protection programmed from the envelope before
    /// the first step (the backstop that acts if the controller is gone).
    Backstop {
        t_s: f64,
        instrument: String,
        /// e.g. "over-voltage protection", "under-voltage switch-off".
        protection: String,
        /// The level asked for (V or A).
        level: f64,
        unit: String,
        /// The level the instrument reads back, where it can.
        read_back: Option<f64>,
    },
    /// Something the operator should know that does not stop the run.
    Warning {
        t_s: f64,
        step: u32,
        message: String,
    },
    /// An alarm the run raises and goes on (e.g. low capacity).
    Alarm {
        t_s: f64,
        step: u32,
        kind: String,
        message: String,
    },
    /// A scanner channel judged faulty (open, stuck or loose), and how its
    /// group is read from now on.
    GroupChannel {
        t_s: f64,
        step: u32,
        channel: u32,
        issue: String,
        message: String,
    },
    /// The run goes on after an interruption (`packbench resume`).
    Resumed {
        t_s: f64,
        /// The step the run continues with.
        step: u32,
        /// Run time of the last sample before the interruption, s.
        last_sample_t_s: f64,
        /// Time between the interruption and the resume, s.
        gap_s: f64,
        /// How the step continues (the documented rule for its kind).
        rule: String,
    },
}

/// A number written by JSON as null (a NaN) reads back as NaN.
fn nan_if_null<'de, D: serde::Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    Ok(Option::<f64>::deserialize(d)?.unwrap_or(f64::NAN))
}

/// Where samples and events go. Errors stop the run safely.
pub trait Sink {
    fn sample(&mut self, s: &Sample) -> std::io::Result<()>;
    fn event(&mut self, e: &Event) -> std::io::Result<()>;
    /// A station that reads cell groups: their voltages and the extra
    /// temperature inputs, on the samples' grid.
    fn groups(&mut self, _g: &GroupSample) -> std::io::Result<()> {
        Ok(())
    }
}

/// A sink that keeps everything in memory (tests, dry runs).
#[derive(Debug, Default)]
pub struct Collect {
    pub samples: Vec<Sample>,
    pub events: Vec<Event>,
    pub groups: Vec<GroupSample>,
}

impl Sink for Collect {
    fn sample(&mut self, s: &Sample) -> std::io::Result<()> {
        self.samples.push(*s);
        Ok(())
    }
    fn event(&mut self, e: &Event) -> std::io::Result<()> {
        self.events.push(e.clone());
        Ok(())
    }
    fn groups(&mut self, g: &GroupSample) -> std::io::Result<()> {
        self.groups.push(g.clone());
        Ok(())
    }
}
