//! The run record on disk:
//!
//! ```text
//! results/<pack-id>/pack.toml
//! results/<pack-id>/<run-id>/run.json       manifest (rewritten at the end)
//! results/<pack-id>/<run-id>/samples.csv    one row per sample, flushed every second
//! results/<pack-id>/<run-id>/events.jsonl   step starts/ends, breaches, faults
//! results/<pack-id>/<run-id>/summary.json   computed figures and status
//! ```
//!
//! JSON records are written to a temporary name and renamed, so a crash
//! never leaves one half-written. No statistics here.

pub mod budget;
pub mod calibration;
pub mod error;
pub mod event;
pub mod history;
pub mod import;
pub mod index;
pub mod manifest;
pub mod read;
pub mod schema;
pub mod summarize;
pub mod verdict;
pub mod write;
pub mod writer;

use analysis::pulse::PulseReading;
use analysis::{
    CapacityResult, CurvesSummary, CycleSummary, Gap, LogQuality, Recalibration, ResistanceResult,
    StepSummary,
};
use model::pack::{Chemistry, PackSpec};
use model::status::RunStatus;
use serde::{Deserialize, Serialize};

pub const SAMPLES_CSV: &str = "samples.csv";
pub const EVENTS_JSONL: &str = "events.jsonl";
/// The cell groups' voltages and the extra temperature inputs, on the
/// samples' grid (a station that reads groups).
pub const GROUPS_CSV: &str = "groups.csv";
pub const RUN_JSON: &str = "run.json";
pub const SUMMARY_JSON: &str = "summary.json";
pub const PACK_TOML: &str = "pack.toml";
pub const REPORT_HTML: &str = "report.html";
/// The simulated pack's kept state in a run folder.
pub const SIM_STATE_JSON: &str = "sim-pack.json";
/// The process running a run folder (removed when the run is recorded).
pub const RUN_LOCK: &str = "run.lock";
/// Space set aside while a run is live, freed for its final records when
/// the disk fills ([`write::RESERVE_BYTES`]).
pub const RESERVE: &str = ".reserve";
/// A pack's own Peukert exponent, measured by `packbench peukert --save`.
pub const PEUKERT_TOML: &str = "peukert.toml";
/// The raw-traffic trace of a run (`run --trace`).
pub const TRACE_LOG: &str = "trace.log";

/// The columns of `samples.csv`, in order.
pub const CSV_COLUMNS: [&str; 6] = [
    "t_s",
    "step",
    "cycle",
    "voltage_v",
    "current_a",
    "temperature_c",
];

/// `summary.json`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Summary {
    /// The record layout ([`schema`]).
    #[serde(default = "schema::unversioned")]
    pub schema_version: u32,
    /// `completed`, `aborted` or `interrupted`.
    pub status: RunStatus,
    pub stop_reason: Option<String>,
    pub pack_id: String,
    pub run_id: String,
    pub procedure_title: String,
    pub pack: PackSummary,
    /// The day the test counts for (UTC date, `YYYY-MM-DD` on disk).
    pub test_date: chrono::NaiveDate,
    /// The pack's equivalent full cycles at the test, when known from
    /// outside packbench (the pack's own counter or the operator).
    pub cycle_count: Option<f64>,
    pub capacity: Option<CapacityResult>,
    pub resistance: Option<ResistanceResult>,
    /// The verdict: every figure a user acts on, judged once
    /// ([`verdict::judge`]); older records get one on reading.
    #[serde(default)]
    pub verdict: verdict::Verdict,
    /// The grade of a record older than verdicts (read into its verdict).
    #[serde(default, rename = "grade", skip_serializing)]
    pub older_grade: Option<analysis::fade::grade::Grade>,
    pub steps: Vec<StepSummary>,
    pub cycles: Vec<CycleSummary>,
    pub warnings: Vec<String>,
    /// Instruments the safe stop could not confirm off (from the events'
    /// `may_be_on` instrument errors): their outputs may still be on.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub outputs_may_be_on: Vec<String>,
    pub samples: usize,
    pub duration_s: f64,
    /// The measured capacity as a new nominal for a battery management
    /// system, with the conditions it holds for.
    #[serde(default)]
    pub recalibration: Option<Recalibration>,
    /// Incremental capacity and differential voltage peaks, and the
    /// open-circuit-voltage table.
    #[serde(default)]
    pub curves: Option<CurvesSummary>,
    /// The pulse method (ΔV/ΔI at set times after each current edge).
    #[serde(default)]
    pub pulse_resistance: Vec<PulseReading>,
    /// Gaps in the log, each flagged.
    #[serde(default)]
    pub gaps: Vec<Gap>,
    /// What reading the log found (duplicates, out-of-order rows, gaps).
    #[serde(default)]
    pub log: LogQuality,
    /// The pack's standby drain, when the procedure measured it.
    #[serde(default)]
    pub standby_drain: Option<analysis::DrainResult>,
    /// The pack at rest and the instruments' zero offsets before the first step.
    #[serde(default)]
    pub preflight: Option<Preflight>,
    /// Each time the run was resumed after an interruption.
    #[serde(default)]
    pub resumed: Vec<ResumeNote>,
    /// Alarms raised during the run (the run went on).
    #[serde(default)]
    pub alarms: Vec<String>,
    /// The battery management system's figures against the measurement,
    /// when they were given.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bms: Option<analysis::bms::BmsCheck>,
    /// Pulse-power levels and their equivalent circuits, where the log
    /// holds a pulse-power characterization.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub characterization: Option<analysis::characterize::Characterization>,
    /// The stated accuracy the run's readings were taken with (from
    /// `run.json`; absent for a foreign log and older records).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub accuracy: Option<model::accuracy::BenchAccuracy>,
    /// The station's calibration the run applied (from `run.json`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub calibration: Option<calibration::CalibrationUse>,
    /// What was not worked out because the log came without a pack spec
    /// (no rated capacity): empty when the spec was given.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub needs_rating: Vec<String>,
    /// A pack read group by group: each group's figures and the weakest.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub groups: Option<analysis::groups::GroupsResult>,
}

/// What was read before the first step, outputs off.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Preflight {
    pub voltage_v: f64,
    pub temperature_c: Option<f64>,
    /// Source current reading with its output off, mA (pack sign).
    pub source_zero_ma: Option<f64>,
    /// Load current reading with its input off, mA (pack sign).
    pub load_zero_ma: Option<f64>,
    /// The zero offsets were subtracted from the current readings.
    pub corrected: bool,
}

/// A resume after an interruption.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResumeNote {
    /// Run time the run went on at, s.
    pub t_s: f64,
    pub step: u32,
    /// Run time of the last sample before the interruption, s.
    pub last_sample_t_s: f64,
    /// How long the run was down, s.
    pub gap_s: f64,
    pub rule: String,
}

/// The pack spec as it appears in JSON records.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PackSummary {
    pub chemistry: Chemistry,
    pub series: u32,
    /// Absent: a foreign log analysed without a rating (never a zero).
    pub rated_capacity_ah: Option<f64>,
    pub rated_energy_wh: Option<f64>,
    pub rated_rate_c: Option<f64>,
    pub rated_resistance_mohm: Option<f64>,
}

impl From<&PackSpec> for PackSummary {
    fn from(p: &PackSpec) -> Self {
        PackSummary {
            chemistry: p.chemistry,
            series: p.series,
            rated_capacity_ah: Some(p.rated_capacity_ah),
            rated_energy_wh: p.rated_energy_wh,
            rated_rate_c: p.rated_rate_c,
            rated_resistance_mohm: p.rated_resistance_mohm,
        }
    }
}
