//! One capacity test from request to record: validate everything first
//! ([`prepare`]: pack id, pack spec, procedure, instrument ranges — nothing
//! created, nothing sent), then connect, run the engine, and write the run
//! folder and its summary ([`execute`]).

use crate::analysis;
use crate::clock::{Clock, PacedClock, SimClock};
use crate::engine::control::StopHandle;
use crate::engine::state::RunState;
use crate::engine::{Engine, RunOutcome, Station, TruthStep};
use crate::instrument::link::Link;
use crate::instrument::profile::{Profile, ProfileRole};
use crate::instrument::{InstrumentError, Load, Source};
use crate::location::{InputErrors, LocatedError, Location};
use crate::pack::{check_pack_id, Chemistry, PackIdError, PackSpec};
use crate::procedure::{self, DischargeMode, LoadedProcedure, StepKind};
use crate::runlog::read::{self, ReadError};
use crate::runlog::write::{create_run_folder, write_json, RunLogSink};
use crate::runlog::{PackSummary, Summary, PACK_TOML, RUN_JSON, SUMMARY_JSON};
use crate::sim::{self, SimConfig};
use crate::truth::GroundTruth;
use serde::Serialize;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Everything that can go wrong in a run request.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error("{0}")]
    Input(#[from] InputErrors),
    #[error("{0}")]
    PackId(#[from] PackIdError),
    #[error("{0}")]
    Pack(String),
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("instrument: {0}")]
    Instrument(#[from] InstrumentError),
    #[error("{0}")]
    Read(#[from] ReadError),
}

impl RunError {
    /// Bad input (exit code 2) as opposed to a failure while running.
    pub fn is_input(&self) -> bool {
        matches!(
            self,
            RunError::Input(_) | RunError::PackId(_) | RunError::Pack(_)
        )
    }
}

fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |source| RunError::Io {
        path: path.to_path_buf(),
        source,
    }
}

/// The pack the simulated bench has when none is given: a 36 V e-bike
/// pack of the demo's fictional rental fleet (10S li-ion, 14 Ah).
pub fn default_sim_pack() -> PackSpec {
    PackSpec {
        chemistry: Chemistry::LiIon,
        series: 10,
        rated_capacity_ah: 14.0,
        rated_energy_wh: Some(504.0),
        rated_rate_c: Some(0.2),
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
}

/// Read a pack spec file.
pub fn read_pack_file(path: &Path) -> Result<PackSpec, RunError> {
    let text = std::fs::read_to_string(path).map_err(io_err(path))?;
    Ok(PackSpec::from_toml(path, &text)?)
}

/// Decide the pack spec: the one given, or the one saved on the pack's
/// first test. A given spec that differs from the saved one is refused.
pub fn resolve_pack(
    pack_id: &str,
    source: &PackSource,
    results: &Path,
) -> Result<(PackSpec, bool, Option<String>), RunError> {
    check_pack_id(pack_id)?;
    let saved_path = results.join(pack_id).join(PACK_TOML);
    let saved = if saved_path.exists() {
        Some(read_pack_file(&saved_path)?)
    } else {
        None
    };
    match (source, saved) {
        (PackSource::Given(g), Some(s)) if *g != s => Err(RunError::Pack(format!(
            "pack '{pack_id}' was first tested as {} {}S {} Ah ({}); give the same spec, leave it out to reuse it, or use a new pack id",
            s.chemistry,
            s.series,
            s.rated_capacity_ah,
            saved_path.display()
        ))),
        (PackSource::Given(g), saved) => Ok((g.clone(), saved.is_none(), None)),
        (PackSource::Saved { .. }, Some(s)) => Ok((s, false, Some(format!("pack spec from {}", saved_path.display())))),
        (PackSource::Saved { allow_sim_default: true }, None) => {
            let p = default_sim_pack();
            Ok((
                p.clone(),
                true,
                Some(format!(
                    "no pack spec given: using the simulated bench's pack ({} {}S, rated {} Ah)",
                    p.chemistry, p.series, p.rated_capacity_ah
                )),
            ))
        }
        (PackSource::Saved { allow_sim_default: false }, None) => Err(RunError::Pack(format!(
            "no pack spec for '{pack_id}': give --chemistry, --series and --rated, or --pack-spec FILE"
        ))),
    }
}

/// Check the plan's setpoints against the instruments' declared ranges.
pub fn check_ranges(p: &LoadedProcedure, source: &Profile, load: &Profile) -> Result<(), RunError> {
    let mut errors = Vec::new();
    for st in &p.plan.steps {
        let at = Location {
            file: p.path.clone(),
            line: st.line,
            column: 1,
        };
        let mut out = |what: String| {
            errors.push(LocatedError {
                location: at.clone(),
                message: what,
            })
        };
        let (sr, lr) = (source.ranges, load.ranges);
        let over = |v: f64, max: Option<f64>| max.is_some_and(|m| v > m);
        match &st.kind {
            StepKind::Charge {
                current_a,
                voltage_v,
            } => {
                if over(*voltage_v, sr.voltage_max_v) {
                    out(format!(
                        "charge voltage {voltage_v:.3} V is beyond the source's range ({} V)",
                        sr.voltage_max_v.unwrap_or(0.0)
                    ));
                }
                if over(*current_a, sr.current_max_a) {
                    out(format!(
                        "charge current {current_a:.3} A is beyond the source's range ({} A)",
                        sr.current_max_a.unwrap_or(0.0)
                    ));
                }
            }
            StepKind::Discharge { load: m } => match *m {
                DischargeMode::Current { current_a } if over(current_a, lr.current_max_a) => {
                    out(format!(
                        "discharge current {current_a:.3} A is beyond the load's range ({} A)",
                        lr.current_max_a.unwrap_or(0.0)
                    ))
                }
                DischargeMode::Power { power_w } if over(power_w, lr.power_max_w) => out(format!(
                    "discharge power {power_w:.2} W is beyond the load's range ({} W)",
                    lr.power_max_w.unwrap_or(0.0)
                )),
                DischargeMode::Resistance { resistance_ohm }
                    if over(resistance_ohm, lr.resistance_max_ohm) =>
                {
                    out(format!(
                    "discharge resistance {resistance_ohm} ohm is beyond the load's range ({} ohm)",
                    lr.resistance_max_ohm.unwrap_or(0.0)
                ))
                }
                _ => {}
            },
            StepKind::Pulse { levels } => {
                for l in levels {
                    let r = if l.current_a > 0.0 {
                        sr.current_max_a
                    } else {
                        lr.current_max_a
                    };
                    if over(l.current_a.abs(), r) {
                        out(format!(
                            "pulse current {:.3} A is beyond the instrument's range",
                            l.current_a
                        ));
                    }
                }
            }
            StepKind::Rest => {}
        }
    }
    let vmax = p.plan.envelope.voltage_max_v;
    for (name, r) in [
        ("source", source.ranges.voltage_max_v),
        ("load", load.ranges.voltage_max_v),
    ] {
        if let Some(m) = r {
            if vmax > m {
                errors.push(LocatedError {
                    location: Location { file: p.path.clone(), line: 1, column: 1 },
                    message: format!("the envelope's voltage_max {vmax:.2} V is beyond the {name}'s range ({m} V)"),
                });
            }
        }
    }
    if errors.is_empty() {
        Ok(())
    } else {
        Err(RunError::Input(InputErrors(errors)))
    }
}

/// Validate a request completely. Creates nothing and talks to nothing.
pub fn prepare(req: &RunRequest) -> Result<Prepared, RunError> {
    let (pack, save_pack, pack_note) = resolve_pack(&req.pack_id, &req.pack, &req.results)?;
    let procedure = procedure::load(&req.procedure, &pack)?;
    check_ranges(
        &procedure,
        &Profile::builtin(ProfileRole::Source),
        &Profile::builtin(ProfileRole::Load),
    )?;
    Ok(Prepared {
        procedure,
        pack_id: req.pack_id.clone(),
        pack_dir: req.results.join(&req.pack_id),
        pack,
        save_pack,
        pack_note,
    })
}

/// How fast the simulated bench runs.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Speed {
    /// As fast as the machine goes (simulation clock).
    Max,
    /// Paced: this many bench seconds per wall second (1 = real time).
    Factor(f64),
}

/// `run.json`.
#[derive(Debug, Clone, Serialize)]
pub struct Manifest {
    pub tool: ToolInfo,
    pub run_id: String,
    pub pack_id: String,
    pub started_utc: String,
    pub finished_utc: Option<String>,
    pub status: String,
    pub stop_reason: Option<String>,
    pub procedure: ProcedureRecord,
    pub pack: PackSummary,
    pub bench: BenchRecord,
    pub instruments: Vec<InstrumentRecord>,
    pub simulation: Option<SimulationRecord>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ToolInfo {
    pub name: &'static str,
    pub version: &'static str,
}

#[derive(Debug, Clone, Serialize)]
pub struct ProcedureRecord {
    pub path: String,
    pub title: String,
    pub sha256: String,
    pub text: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct BenchRecord {
    pub kind: String,
    pub speed: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct InstrumentRecord {
    pub role: String,
    pub link: String,
    pub profile: String,
    pub idn: String,
}

/// Simulation truth: what the model says really flowed.
#[derive(Debug, Clone, Serialize)]
pub struct SimulationRecord {
    pub label: &'static str,
    pub config: SimConfig,
    pub true_capacity_ah: f64,
    pub steps: Vec<TruthStep>,
}

/// The result of a run.
#[derive(Debug, Clone)]
pub struct RunReport {
    pub run_dir: PathBuf,
    pub summary: Summary,
    pub outcome: RunOutcome,
}

impl RunReport {
    /// Exit code: 0 completed, 3 aborted (safety stop or fault), 5 interrupted.
    pub fn exit_code(&self) -> i32 {
        match self.outcome.status {
            RunState::Completed => 0,
            RunState::Interrupted => 5,
            _ => 3,
        }
    }
}

fn utc_now() -> String {
    chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}

fn procedure_stem(p: &Path) -> String {
    p.file_stem()
        .and_then(|s| s.to_str())
        .map(|s| {
            s.chars()
                .map(|c| {
                    if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                        c
                    } else {
                        '_'
                    }
                })
                .collect()
        })
        .unwrap_or_else(|| "run".into())
}

/// Reply timeout on the in-memory link to the simulated bench, ms.
pub const SIM_TIMEOUT_MS: u64 = 200;

/// Run a prepared test on a new simulated bench.
pub async fn execute_sim(
    p: &Prepared,
    cfg: &SimConfig,
    speed: Speed,
    stop: StopHandle,
) -> Result<RunReport, RunError> {
    let clock: Arc<dyn Clock> = match speed {
        Speed::Max => SimClock::new(),
        Speed::Factor(f) => PacedClock::new(f),
    };
    let links = sim::build(&p.pack, cfg, Arc::clone(&clock));
    let speed_text = match speed {
        Speed::Max => "max (simulation clock)".to_string(),
        Speed::Factor(f) => format!("{f}x real time"),
    };
    execute_sim_links(p, cfg, clock, links, &speed_text, stop).await
}

/// Run a prepared test on a given simulated bench (tests keep its handle
/// to look at the instruments afterwards).
pub async fn execute_sim_links(
    p: &Prepared,
    cfg: &SimConfig,
    clock: Arc<dyn Clock>,
    links: sim::SimLinks,
    speed_text: &str,
    stop: StopHandle,
) -> Result<RunReport, RunError> {
    let handle = links.handle.clone();
    let truth: Arc<dyn GroundTruth> = Arc::new(handle.clone());
    // The in-memory link answers at once or never: a short timeout keeps
    // fault tests quick without changing any behaviour.
    let mut source_profile = Profile::builtin(ProfileRole::Source);
    let mut load_profile = Profile::builtin(ProfileRole::Load);
    source_profile.transport.timeout_ms = SIM_TIMEOUT_MS;
    load_profile.transport.timeout_ms = SIM_TIMEOUT_MS;
    execute(
        p,
        BenchLinks {
            source: links.source,
            load: links.load,
            source_profile,
            load_profile,
            source_link: "sim".into(),
            load_link: "sim".into(),
            kind: "simulated".into(),
            speed: speed_text.to_string(),
        },
        clock,
        Some(truth),
        stop,
        Some((cfg.clone(), handle.true_capacity_ah())),
    )
    .await
}

/// The links of a station and how to describe them.
pub struct BenchLinks {
    pub source: Link,
    pub load: Link,
    pub source_profile: Profile,
    pub load_profile: Profile,
    pub source_link: String,
    pub load_link: String,
    pub kind: String,
    pub speed: String,
}

/// Connect, run, record. The run folder is created only here, after
/// [`prepare`] has passed.
pub async fn execute(
    p: &Prepared,
    links: BenchLinks,
    clock: Arc<dyn Clock>,
    truth: Option<Arc<dyn GroundTruth>>,
    stop: StopHandle,
    sim: Option<(SimConfig, f64)>,
) -> Result<RunReport, RunError> {
    let started = chrono::Utc::now();
    let base_id = format!(
        "{}-{}",
        started.format("%Y%m%dT%H%M%SZ"),
        procedure_stem(&p.procedure.path)
    );
    if p.save_pack {
        std::fs::create_dir_all(&p.pack_dir).map_err(io_err(&p.pack_dir))?;
        let path = p.pack_dir.join(PACK_TOML);
        crate::runlog::write::atomic_write(&path, p.pack.to_toml().as_bytes())
            .map_err(io_err(&path))?;
    }
    let (run_id, dir) = create_run_folder(&p.pack_dir, &base_id).map_err(io_err(&p.pack_dir))?;
    let source_profile = links.source_profile.clone();
    let load_profile = links.load_profile.clone();
    let mut manifest = Manifest {
        tool: ToolInfo {
            name: "packbench",
            version: env!("CARGO_PKG_VERSION"),
        },
        run_id: run_id.clone(),
        pack_id: p.pack_id.clone(),
        started_utc: utc_now(),
        finished_utc: None,
        status: "running".into(),
        stop_reason: None,
        procedure: ProcedureRecord {
            path: p.procedure.path.display().to_string(),
            title: p.procedure.plan.title.clone(),
            sha256: p.procedure.sha256.clone(),
            text: p.procedure.text.clone(),
        },
        pack: PackSummary::from(&p.pack),
        bench: BenchRecord {
            kind: links.kind.clone(),
            speed: links.speed.clone(),
        },
        instruments: Vec::new(),
        simulation: None,
    };
    let run_json = dir.join(RUN_JSON);
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    let mut sink = RunLogSink::create(&dir).map_err(io_err(&dir))?;
    let source = Source::connect(links.source, source_profile.clone()).await;
    let load = Load::connect(links.load, load_profile.clone()).await;
    let (source, load) = match (source, load) {
        (Ok(s), Ok(l)) => (s, l),
        (Err(e), _) | (_, Err(e)) => {
            manifest.status = "aborted".into();
            manifest.stop_reason = Some(format!("could not connect: {e}"));
            manifest.finished_utc = Some(utc_now());
            write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
            return Err(RunError::Instrument(e));
        }
    };
    manifest.instruments = vec![
        InstrumentRecord {
            role: "source".into(),
            link: links.source_link,
            profile: source_profile.name.clone(),
            idn: source.0.idn().to_string(),
        },
        InstrumentRecord {
            role: "load".into(),
            link: links.load_link,
            profile: load_profile.name.clone(),
            idn: load.0.idn().to_string(),
        },
    ];
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    let mut station = Station { source, load };
    let outcome = Engine::new(
        &p.procedure.plan,
        &mut station,
        clock,
        &mut sink,
        truth,
        stop,
    )
    .run()
    .await;
    sink.flush().map_err(io_err(&dir))?;
    drop(sink);
    // The summary comes from the log on disk, through the same code as
    // `analyze` uses afterwards.
    let summary = summarize_run_dir(
        &dir,
        &p.pack,
        &p.pack_id,
        &run_id,
        &p.procedure.plan.title,
        Some(&outcome),
    )?;
    let summary_path = dir.join(SUMMARY_JSON);
    write_json(&summary_path, &summary).map_err(io_err(&summary_path))?;
    manifest.status = outcome.status.name().into();
    manifest.stop_reason = outcome.reason.clone();
    manifest.finished_utc = Some(utc_now());
    manifest.simulation = sim.map(|(config, cap)| SimulationRecord {
        label: "simulation truth: charge and energy the model integrated at the pack terminals (not a measurement)",
        config,
        true_capacity_ah: cap,
        steps: outcome.truth.clone(),
    });
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    Ok(RunReport {
        run_dir: dir,
        summary,
        outcome,
    })
}

/// Build a run's summary from its folder.
pub fn summarize_run_dir(
    dir: &Path,
    pack: &PackSpec,
    pack_id: &str,
    run_id: &str,
    title: &str,
    outcome: Option<&RunOutcome>,
) -> Result<Summary, RunError> {
    let (log, events) = read::read_run(dir)?;
    let infos = read::step_infos(&events);
    let mut a = analysis::analyze(&log.samples, &infos, pack);
    if log.dropped_partial_line {
        a.warnings
            .push("the last line of samples.csv was incomplete and was left out".into());
    }
    let (status, reason) = match outcome {
        Some(o) => (o.status.name().to_string(), o.reason.clone()),
        None => events
            .iter()
            .rev()
            .find_map(|e| match e {
                crate::engine::event::Event::RunEnd { status, reason, .. } => {
                    Some((status.clone(), reason.clone()))
                }
                _ => None,
            })
            .unwrap_or_else(|| {
                (
                    "interrupted".into(),
                    Some("the run has no end record (killed or power cut)".into()),
                )
            }),
    };
    let duration = match (log.samples.first(), log.samples.last()) {
        (Some(a), Some(b)) => b.t_s - a.t_s,
        _ => 0.0,
    };
    Ok(Summary {
        status,
        stop_reason: reason,
        pack_id: pack_id.to_string(),
        run_id: run_id.to_string(),
        procedure_title: title.to_string(),
        pack: PackSummary::from(pack),
        capacity: a.capacity,
        steps: a.steps,
        cycles: a.cycles,
        warnings: a.warnings,
        samples: log.samples.len(),
        duration_s: duration,
    })
}
