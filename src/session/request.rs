//! A session request as the command line or a test states it, and what a
//! session reports back.

use crate::session::benchfile::StationSpec;
use crate::session::emergency::Emergency;
use analysis::fade::grade::Policy;
use chrono::NaiveDate;
use engine::RunOutcome;
use model::pack::{Chemistry, PackSpec};
use model::procedure::LoadedProcedure;
use record::Summary;
use sim::{self, SimConfig};
use std::path::PathBuf;

/// The pack the simulated bench has when none is given: a 36 V e-bike
/// pack of the demo's fictional rental fleet (10S li-ion, 14 Ah).
pub fn default_sim_pack() -> PackSpec {
    PackSpec {
        chemistry: Chemistry::LiIon,
        series: 10,
        rated_capacity_ah: 14.0,
        rated_energy_wh: Some(504.0),
        rated_rate_c: Some(0.2),
        rated_resistance_mohm: None,
    }
}

/// Where the pack spec comes from.
#[derive(Debug, Clone)]
pub enum PackSource {
    /// Given on the command line or read from a spec file.
    Given(PackSpec),
    /// Whatever `results/<pack>/pack.toml` holds, else (on the simulated
    /// bench only) the simulator's default pack.
    Saved { allow_sim_default: bool },
}

/// A run request as the CLI or a test states it.
#[derive(Debug, Clone)]
pub struct RunRequest {
    pub procedure: PathBuf,
    pub pack_id: String,
    pub pack: PackSource,
    pub results: PathBuf,
    pub options: RunOptions,
}

/// What a test records besides its measurements.
#[derive(Debug, Clone, PartialEq)]
pub struct RunOptions {
    /// The day the test counts for (default: today, UTC).
    pub test_date: NaiveDate,
    /// The pack's equivalent full cycles from its own counter, if known.
    pub cycle_count: Option<f64>,
    /// The shop's grading policy.
    pub policy: Policy,
    /// Write the raw instrument traffic to `trace.log` in the run folder.
    pub trace: bool,
    /// Raise a low-capacity alarm (the run goes on) when the capacity step
    /// reaches its cutoff under this % of the rated capacity.
    pub alarm_below_pct: Option<f64>,
    /// What the pack's BMS reported, compared with the measurement.
    pub bms: Option<model::bms::BmsReadings>,
    /// How long the safe stop keeps trying an output it cannot confirm
    /// off, s (wall clock).
    pub safe_stop_hold_s: f64,
    /// The start to record in place of the wall clock's (a scenario's
    /// simulated runs: their records carry the scenario's dates); the
    /// finish is then that start plus the run's own time.
    pub started_at: Option<chrono::DateTime<chrono::Utc>>,
}

impl Default for RunOptions {
    fn default() -> Self {
        RunOptions {
            test_date: chrono::Utc::now().date_naive(),
            cycle_count: None,
            policy: Policy::default_policy(),
            trace: false,
            alarm_below_pct: None,
            bms: None,
            safe_stop_hold_s: engine::OFF_HOLD.as_secs_f64(),
            started_at: None,
        }
    }
}

/// What a caller attaches to a run besides its instruments.
#[derive(Clone, Default)]
pub struct Hooks {
    /// The live status board of the run's station.
    pub board: Option<crate::session::live::Board>,
    /// Where the station's instruments are registered for a last
    /// switch-off on fresh links (a second Ctrl-C).
    pub emergency: Option<Emergency>,
    /// The station's name in a bench file, and the file.
    pub station: Option<(String, PathBuf)>,
    /// Pace with the timer only (many stations on one thread).
    pub coarse_clock: bool,
}

/// A request that has passed every check.
#[derive(Debug, Clone)]
pub struct Prepared {
    pub procedure: LoadedProcedure,
    pub pack_id: String,
    pub pack: PackSpec,
    pub pack_dir: PathBuf,
    /// Write `pack.toml` (first test of this pack).
    pub save_pack: bool,
    /// A note for the operator about where the spec came from.
    pub pack_note: Option<String>,
    pub options: RunOptions,
}

/// How fast the simulated bench runs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Speed {
    /// As fast as the machine goes (simulation clock).
    Max,
    /// Paced: this many bench seconds per wall second (1 = real time).
    Factor(f64),
}

/// The result of a run.
#[derive(Debug, Clone)]
pub struct RunReport {
    pub run_dir: PathBuf,
    pub summary: Summary,
    pub outcome: RunOutcome,
    /// What of the record could not be written (a full disk), said to
    /// the operator; empty when the record is whole.
    pub unwritten: Vec<String>,
}

/// One station's run in a request: what to run, where, and its board.
pub struct StationJob {
    /// The station's name (the bench file's, or "sim").
    pub name: String,
    pub prepared: Prepared,
    pub bench: JobBench,
    pub board: crate::session::live::Board,
}

/// Where a job runs. A real station carries no simulator settings and is
/// paced by the wall clock (the type allows nothing else). (Made once per
/// run: the variants' sizes do not matter.)
#[derive(Debug, Clone)]
#[allow(clippy::large_enum_variant)]
pub enum JobBench {
    /// The embedded simulated bench: its settings and pace, and the bench
    /// file's station when its links are `sim`.
    Sim {
        cfg: SimConfig,
        speed: Speed,
        station: Option<(StationSpec, PathBuf)>,
    },
    /// A bench file's station of real instruments; `pace` is bench seconds
    /// per wall second (1, or a sped-up simulator served elsewhere).
    Station {
        spec: StationSpec,
        file: PathBuf,
        pace: f64,
    },
}

impl JobBench {
    /// The bench file's station, simulated or not.
    pub fn station(&self) -> Option<(&StationSpec, &PathBuf)> {
        match self {
            JobBench::Sim { station, .. } => station.as_ref().map(|(s, f)| (s, f)),
            JobBench::Station { spec, file, .. } => Some((spec, file)),
        }
    }

    /// Paced (not the simulation clock at full speed).
    pub fn paced(&self) -> bool {
        match self {
            JobBench::Sim { speed, .. } => *speed != Speed::Max,
            JobBench::Station { .. } => true,
        }
    }

    /// A bench file's station: real instruments get the wall clock's
    /// pace (`speed`'s factor, real time by default); `sim` links get the
    /// embedded simulator with `cfg` at `speed`.
    pub fn of_station(spec: StationSpec, file: PathBuf, cfg: SimConfig, speed: Speed) -> JobBench {
        if spec.is_simulated() {
            JobBench::Sim {
                cfg,
                speed,
                station: Some((spec, file)),
            }
        } else {
            JobBench::Station {
                spec,
                file,
                pace: match speed {
                    Speed::Factor(f) => f,
                    Speed::Max => 1.0,
                },
            }
        }
    }
}
