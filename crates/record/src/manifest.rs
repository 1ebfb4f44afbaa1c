//! `run.json`: the manifest of a run (what ran, on which bench, with which
//! instruments, how it went) and the schedule record the engine keeps.

use crate::PackSummary;
use model::simconfig::SimConfig;
use model::status::RunStatus;
use model::truth::TruthStep;
use serde::{Deserialize, Serialize};

/// `run.json`.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Manifest {
    /// The record layout ([`crate::schema`]).
    #[serde(default = "crate::schema::unversioned")]
    pub schema_version: u32,
    pub tool: ToolInfo,
    pub run_id: String,
    pub pack_id: String,
    pub started_utc: String,
    pub finished_utc: Option<String>,
    pub test_date: String,
    pub cycle_count: Option<f64>,
    pub status: RunStatus,
    pub stop_reason: Option<String>,
    pub procedure: ProcedureRecord,
    pub pack: PackSummary,
    pub bench: BenchRecord,
    pub instruments: Vec<InstrumentRecord>,
    pub simulation: Option<SimulationRecord>,
    /// How well samples kept their schedule.
    #[serde(default)]
    pub timing: Option<Timing>,
    /// Low-capacity alarm threshold, % of rated, if set.
    #[serde(default)]
    pub alarm_below_pct: Option<f64>,
    /// Each resume of the run after an interruption.
    #[serde(default)]
    pub resumes: Vec<ResumeRecord>,
    /// What the pack's battery management system reported, when given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bms: Option<model::bms::BmsReadings>,
    /// The cell groups and temperature inputs read on the meter's
    /// channels (their names and places), where the station reads them.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub groups: Option<model::groups::GroupChannels>,
    /// Instruments the safe stop could not confirm off: their outputs may
    /// still have been on when the run ended.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub outputs_may_be_on: Vec<String>,
    /// What of the record could not be written (a full or failing disk).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub record_incomplete: Vec<String>,
    /// Attempts to resume the run that failed before it went on (the run
    /// stays resumable).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub failed_resumes: Vec<FailedResume>,
    /// The stated accuracy the run's readings were taken with (absent in
    /// older records and where no instrument states one): the uncertainty
    /// budgets are computed from it.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub accuracy: Option<model::accuracy::BenchAccuracy>,
    /// The station's calibration the run applied to its readings.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub calibration: Option<crate::calibration::CalibrationUse>,
}

/// A resume that could not reach the bench.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct FailedResume {
    pub at_utc: String,
    pub reason: String,
}

/// One resume, as `run.json` keeps it.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ResumeRecord {
    pub at_utc: String,
    pub step: u32,
    pub t_s: f64,
    pub gap_s: f64,
    pub rule: String,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ToolInfo {
    pub name: String,
    pub version: String,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct ProcedureRecord {
    pub path: String,
    pub title: String,
    pub sha256: String,
    pub text: String,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct BenchRecord {
    pub kind: String,
    pub speed: String,
    /// Bench seconds per wall second when paced; none at full speed.
    #[serde(default)]
    pub speed_factor: Option<f64>,
    /// The bench file and station, for a real bench.
    #[serde(default)]
    pub bench_file: Option<String>,
    #[serde(default)]
    pub station: Option<String>,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct InstrumentRecord {
    pub role: String,
    pub link: String,
    pub profile: String,
    pub idn: String,
}

/// Simulation truth: what the model says really flowed.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct SimulationRecord {
    pub label: String,
    pub config: SimConfig,
    pub true_capacity_ah: f64,
    pub steps: Vec<TruthStep>,
}

/// How well samples kept their schedule.
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct Timing {
    /// Samples taken after a wait.
    pub scheduled_samples: u64,
    /// Of those, taken more than [`LATE_S`] after their time.
    pub late_samples: u64,
    /// The latest sample, s behind its time.
    pub max_late_s: f64,
}

/// A sample is late when taken this long after its time, s.
pub const LATE_S: f64 = 0.1;

pub const SIM_TRUTH_LABEL: &str = "simulation truth: charge and energy the model integrated at the pack terminals (not a measurement)";

/// A time stamp as the manifest writes it: UTC, RFC 3339, milliseconds.
pub fn utc_now() -> String {
    chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}
