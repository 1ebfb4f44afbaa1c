//! One capacity test from request to record: validate everything first
//! ([`prepare`]: pack id, pack spec, procedure, instrument ranges — nothing
//! created, nothing sent), then connect, run the engine, and write the run
//! folder and its summary ([`execute`]).

use analysis;
use crate::benchfile::{Drivers, StationSpec};
use engine::clock::{Clock, PacedClock, SimClock};
use engine::control::StopHandle;
use model::status::RunState;
use engine::{Engine, RunOutcome, Station};
use analysis::fade::grade::Policy;
use instrument::link::{Link, SharedLink};
use instrument::profile::{Profile, ProfileRole};
use instrument::scpi::{Reopen, Trace};
use instrument::transport::{self, LinkSpec};
use instrument::{Attach, InstrumentError, Load, Meter, Source};
use model::location::{InputErrors, LocatedError, Location};
use model::pack::{check_pack_id, Chemistry, PackIdError, PackSpec};
use model::procedure::{self, DischargeMode, LoadedProcedure, StepKind};
use record::read::{self, ReadError};
use record::write::{create_run_folder, write_json, RunLogSink};
use record::{PackSummary, Summary, PACK_TOML, REPORT_HTML, RUN_JSON, SUMMARY_JSON};
use sim::{self, SimConfig};
use model::truth::GroundTruth;
use chrono::NaiveDate;
use record::manifest::{
    BenchRecord, InstrumentRecord, Manifest, ProcedureRecord, SimulationRecord, ToolInfo,
};
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Everything that can go wrong in a run request.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error(transparent)]
    Input(#[from] InputErrors),
    #[error(transparent)]
    PackId(#[from] PackIdError),
    #[error("{0}")]
    Pack(String),
    /// A file the user named (a procedure, a pack spec, a run folder's
    /// record) could not be read: bad input.
    #[error("{path}: {error}")]
    InputFile {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    /// (Said with its cause in one line; not chained again as a source.)
    #[error("instrument: {0}")]
    Instrument(InstrumentError),
    #[error(transparent)]
    Read(#[from] ReadError),
}

impl From<InstrumentError> for RunError {
    fn from(e: InstrumentError) -> Self {
        RunError::Instrument(e)
    }
}

impl RunError {
    /// Bad input (exit code 2) as opposed to a failure while running.
    pub fn is_input(&self) -> bool {
        matches!(
            self,
            RunError::Input(_)
                | RunError::PackId(_)
                | RunError::Pack(_)
                | RunError::InputFile { .. }
                | RunError::Read(_)
        )
    }
}

fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |source| RunError::Io {
        path: path.to_path_buf(),
        error: source,
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
}

impl Default for RunOptions {
    fn default() -> Self {
        RunOptions {
            test_date: chrono::Utc::now().date_naive(),
            cycle_count: None,
            policy: Policy::default_policy(),
            trace: false,
            alarm_below_pct: None,
        }
    }
}

/// What a caller attaches to a run besides its instruments.
#[derive(Clone, Default)]
pub struct Hooks {
    /// The live status board of the run's station.
    pub board: Option<crate::live::Board>,
    /// Where the station's instruments are registered for a last
    /// switch-off on fresh links (a second Ctrl-C).
    pub emergency: Option<Emergency>,
    /// The station's name in a bench file, and the file.
    pub station: Option<(String, PathBuf)>,
    /// Pace with the timer only (many stations on one thread).
    pub coarse_clock: bool,
}

/// Every running station's instruments, to switch off on fresh links
/// when the running sessions cannot be waited for (a second Ctrl-C).
#[derive(Clone, Default)]
pub struct Emergency(Arc<std::sync::Mutex<Vec<(String, Reopen, Profile)>>>);

impl Emergency {
    pub fn register(&self, name: String, reopen: Reopen, profile: Profile) {
        if let Ok(mut g) = self.0.lock() {
            g.push((name, reopen, profile));
        }
    }

    /// Send every registered instrument its safe state on a fresh link,
    /// all at once, each within `timeout`. Returns (instrument, sent).
    pub async fn all_off(&self, timeout: std::time::Duration) -> Vec<(String, bool)> {
        let list = match self.0.lock() {
            Ok(g) => g.clone(),
            Err(p) => p.into_inner().clone(),
        };
        let tries = list.iter().map(|(name, reopen, profile)| async move {
            let r = tokio::time::timeout(
                timeout,
                instrument::safe_state_on_new_link(name, reopen, profile),
            )
            .await;
            (name.clone(), matches!(r, Ok(Ok(()))))
        });
        futures::future::join_all(tries).await
    }
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

/// A file the user named could not be read.
pub fn input_file_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |error| RunError::InputFile {
        path: path.to_path_buf(),
        error,
    }
}

/// Read a pack spec file.
pub fn read_pack_file(path: &Path) -> Result<PackSpec, RunError> {
    let text = model::procedure::read_text(path).map_err(input_file_err(path))?;
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
            StepKind::Drain { current_limit_a } => {
                if over(*current_limit_a, sr.current_max_a) {
                    out(format!(
                        "drain current limit {current_limit_a:.3} A is beyond the source's range"
                    ));
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
        options: req.options.clone(),
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
    execute_sim_with(p, cfg, speed, stop, Hooks::default()).await
}

/// [`execute_sim`] with a live board and the emergency registry.
pub async fn execute_sim_with(
    p: &Prepared,
    cfg: &SimConfig,
    speed: Speed,
    stop: StopHandle,
    hooks: Hooks,
) -> Result<RunReport, RunError> {
    let (clock, links, speed_text) = new_sim_bench(p, cfg, speed, hooks.coarse_clock);
    let (sp, lp) = sim_profiles();
    let mut bl = sim_bench_links(cfg, links, &speed_text, sp, lp, speed);
    bl.0.hooks = hooks;
    execute(p, bl.0, clock, bl.1, stop, bl.2).await
}

/// The built-in source and load profiles for the in-memory links to the
/// simulated bench. The in-memory link answers at once or never: a short
/// timeout keeps fault tests quick without changing any behaviour.
pub fn sim_profiles() -> (Profile, Profile) {
    let mut sp = Profile::builtin(ProfileRole::Source);
    let mut lp = Profile::builtin(ProfileRole::Load);
    sp.transport.timeout_ms = SIM_TIMEOUT_MS;
    lp.transport.timeout_ms = SIM_TIMEOUT_MS;
    (sp, lp)
}

/// A new simulated bench for a prepared test: its clock, links and pace.
fn new_sim_bench(
    p: &Prepared,
    cfg: &SimConfig,
    speed: Speed,
    coarse: bool,
) -> (Arc<dyn Clock>, sim::SimLinks, String) {
    let clock: Arc<dyn Clock> = match speed {
        Speed::Max => SimClock::new(),
        Speed::Factor(f) if coarse => PacedClock::coarse(f),
        Speed::Factor(f) => PacedClock::new(f),
    };
    let links = sim::build(&p.pack, cfg, Arc::clone(&clock));
    let speed_text = match speed {
        Speed::Max => "max (simulation clock)".to_string(),
        Speed::Factor(f) => format!("{f}x real time"),
    };
    (clock, links, speed_text)
}

/// Run on the embedded simulated bench with a station's own profiles (a
/// bench-file station whose links are `sim`).
pub async fn execute_sim_station(
    p: &Prepared,
    cfg: &SimConfig,
    speed: Speed,
    stop: StopHandle,
    source_profile: Profile,
    load_profile: Profile,
    hooks: Hooks,
) -> Result<RunReport, RunError> {
    let (clock, links, speed_text) = new_sim_bench(p, cfg, speed, hooks.coarse_clock);
    let (mut bl, truth, sim) =
        sim_bench_links(cfg, links, &speed_text, source_profile, load_profile, speed);
    bl.hooks = hooks;
    execute(p, bl, clock, truth, stop, sim).await
}

/// A reopen function for an in-memory link to a simulated instrument.
fn sim_reopen(r: &Arc<std::sync::Mutex<dyn instrument::link::LineResponder>>) -> Reopen {
    let r = Arc::clone(r);
    Arc::new(move || {
        let link = sim::link_to(&r);
        Box::pin(async move { Ok(link) })
    })
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
    let (source_profile, load_profile) = sim_profiles();
    let speed = if clock.is_simulated() {
        Speed::Max
    } else {
        Speed::Factor(1.0)
    };
    let (bl, truth, sim) =
        sim_bench_links(cfg, links, speed_text, source_profile, load_profile, speed);
    execute(p, bl, clock, truth, stop, sim).await
}

/// The simulated bench's links, its truth and its record.
fn sim_bench_links(
    cfg: &SimConfig,
    links: sim::SimLinks,
    speed_text: &str,
    source_profile: Profile,
    load_profile: Profile,
    speed: Speed,
) -> (BenchLinks, Option<Arc<dyn GroundTruth>>, Option<SimRun>) {
    let handle = links.handle.clone();
    let truth: Arc<dyn GroundTruth> = Arc::new(handle.clone());
    let cap = handle.true_capacity_ah();
    (
        BenchLinks {
            source: BoundLink {
                link: links.source,
                profile: source_profile,
                text: "sim".into(),
                attach: Attach {
                    trace: None,
                    reopen: Some(sim_reopen(&links.source_responder)),
                },
            },
            load: BoundLink {
                link: links.load,
                profile: load_profile,
                text: "sim".into(),
                attach: Attach {
                    trace: None,
                    reopen: Some(sim_reopen(&links.load_responder)),
                },
            },
            meter: None,
            shared: false,
            kind: SIMULATED.into(),
            speed: speed_text.to_string(),
            hooks: Hooks::default(),
        },
        Some(truth),
        Some(SimRun {
            config: cfg.clone(),
            true_capacity_ah: cap,
            handle,
            speed_factor: match speed {
                Speed::Max => None,
                Speed::Factor(f) => Some(f),
            },
        }),
    )
}

/// The bench kind recorded for the embedded simulated bench.
pub const SIMULATED: &str = "simulated";
/// The simulated pack's kept state in a run folder.
pub const SIM_STATE_JSON: &str = "sim-pack.json";
/// The process running a run folder (removed when the run is recorded).
pub const RUN_LOCK: &str = "run.lock";

/// A run on the embedded simulated bench.
#[derive(Clone)]
pub struct SimRun {
    pub config: SimConfig,
    pub true_capacity_ah: f64,
    pub handle: sim::SimHandle,
    /// Bench seconds per wall second when paced.
    pub speed_factor: Option<f64>,
}

/// One instrument's open link, its profile and how to describe it.
pub struct BoundLink {
    pub link: Link,
    pub profile: Profile,
    pub text: String,
    pub attach: Attach,
}

/// The links of a station and how to describe them.
pub struct BenchLinks {
    pub source: BoundLink,
    pub load: BoundLink,
    pub meter: Option<BoundLink>,
    /// Source and load are one source-sink instrument on one link.
    pub shared: bool,
    pub kind: String,
    pub speed: String,
    pub hooks: Hooks,
}

fn reopen_for(role: &'static str, spec: &LinkSpec, profile: &Profile) -> Reopen {
    let spec = spec.clone();
    let timeout = std::time::Duration::from_millis(profile.transport.timeout_ms);
    Arc::new(move || {
        let spec = spec.clone();
        Box::pin(async move { transport::open(role, &spec, timeout).await })
    })
}

/// Open the links of a station (no message is sent yet).
pub async fn open_station(station: &StationSpec) -> Result<BenchLinks, RunError> {
    let timeout = |p: &Profile| std::time::Duration::from_millis(p.transport.timeout_ms);
    let meter = match &station.meter {
        Some(m) => Some(BoundLink {
            link: transport::open("meter", &m.link, timeout(&m.profile)).await?,
            profile: m.profile.clone(),
            text: m.link_text.clone(),
            attach: Attach {
                trace: None,
                reopen: Some(reopen_for("meter", &m.link, &m.profile)),
            },
        }),
        None => None,
    };
    match &station.drivers {
        Drivers::Pair { source, load } => {
            let s = transport::open("source", &source.link, timeout(&source.profile)).await?;
            let l = transport::open("load", &load.link, timeout(&load.profile)).await?;
            Ok(BenchLinks {
                source: BoundLink {
                    link: s,
                    profile: source.profile.clone(),
                    text: source.link_text.clone(),
                    attach: Attach {
                        trace: None,
                        reopen: Some(reopen_for("source", &source.link, &source.profile)),
                    },
                },
                load: BoundLink {
                    link: l,
                    profile: load.profile.clone(),
                    text: load.link_text.clone(),
                    attach: Attach {
                        trace: None,
                        reopen: Some(reopen_for("load", &load.link, &load.profile)),
                    },
                },
                meter,
                shared: false,
                kind: format!("station {}", station.name),
                speed: "real time".into(),
                hooks: Hooks::default(),
            })
        }
        Drivers::SourceSink(b) => {
            let raw = transport::open("source-sink", &b.link, timeout(&b.profile)).await?;
            let shared = SharedLink::new(raw);
            let inner = reopen_for("source-sink", &b.link, &b.profile);
            let slot = shared.clone();
            // Reopening puts the new link into the shared slot, so both
            // roles use it.
            let reopen: Reopen = Arc::new(move || {
                let inner = Arc::clone(&inner);
                let slot = slot.clone();
                Box::pin(async move {
                    let link = inner().await?;
                    if let Ok(mut g) = slot.0.lock() {
                        *g = link;
                    }
                    let l: Link = Box::new(slot);
                    Ok(l)
                })
            });
            let bound = |attach_reopen: Reopen| BoundLink {
                link: Box::new(shared.clone()),
                profile: b.profile.clone(),
                text: b.link_text.clone(),
                attach: Attach {
                    trace: None,
                    reopen: Some(attach_reopen),
                },
            };
            Ok(BenchLinks {
                source: bound(Arc::clone(&reopen)),
                load: bound(reopen),
                meter,
                shared: true,
                kind: format!("station {}", station.name),
                speed: "real time".into(),
                hooks: Hooks::default(),
            })
        }
    }
}

/// Connect, run, record. The run folder is created only here, after
/// [`prepare`] has passed.
pub async fn execute(
    p: &Prepared,
    links: BenchLinks,
    clock: Arc<dyn Clock>,
    truth: Option<Arc<dyn GroundTruth>>,
    stop: StopHandle,
    sim: Option<SimRun>,
) -> Result<RunReport, RunError> {
    let started = chrono::Utc::now();
    // Sorted by the day the test counts for, then the wall-clock start.
    let base_id = format!(
        "{}-{}Z-{}",
        p.options.test_date.format("%Y%m%d"),
        started.format("%H%M%S"),
        procedure_stem(&p.procedure.path)
    );

    if p.save_pack {
        std::fs::create_dir_all(&p.pack_dir).map_err(io_err(&p.pack_dir))?;
        let path = p.pack_dir.join(PACK_TOML);
        record::write::atomic_write(&path, p.pack.to_toml().as_bytes())
            .map_err(io_err(&path))?;
    }
    let (run_id, dir) = create_run_folder(&p.pack_dir, &base_id).map_err(io_err(&p.pack_dir))?;
    let manifest = Manifest {
        tool: ToolInfo {
            name: "packbench".into(),
            version: env!("CARGO_PKG_VERSION").into(),
        },
        run_id: run_id.clone(),
        pack_id: p.pack_id.clone(),
        started_utc: utc_now(),
        finished_utc: None,
        test_date: p.options.test_date.to_string(),
        cycle_count: p.options.cycle_count,
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
            speed_factor: match &sim {
                Some(s) => s.speed_factor,
                None if clock.is_simulated() => None,
                None => Some(1.0),
            },
            bench_file: links
                .hooks
                .station
                .as_ref()
                .map(|(_, f)| f.display().to_string()),
            station: links.hooks.station.as_ref().map(|(n, _)| n.clone()),
        },
        instruments: Vec::new(),
        simulation: sim.as_ref().map(|s| SimulationRecord {
            label: SIM_TRUTH_LABEL.into(),
            config: s.config.clone(),
            true_capacity_ah: s.true_capacity_ah,
            steps: Vec::new(),
        }),
        timing: None,
        alarm_below_pct: p.options.alarm_below_pct,
        resumes: Vec::new(),
    };
    let sink = RunLogSink::create(&dir).map_err(io_err(&dir))?;
    let rec = Recording {
        dir,
        run_id,
        manifest,
        resume: None,
    };
    drive(p, rec, links, clock, truth, stop, sim, sink).await
}

const SIM_TRUTH_LABEL: &str = "simulation truth: charge and energy the model integrated at the pack terminals (not a measurement)";

/// A run folder being written.
pub struct Recording {
    pub dir: PathBuf,
    pub run_id: String,
    pub manifest: Manifest,
    /// Where an interrupted run goes on.
    pub resume: Option<engine::ResumePoint>,
}

/// Write the lock naming this process.
fn write_lock(dir: &Path) -> Result<(), RunError> {
    let path = dir.join(RUN_LOCK);
    record::write::atomic_write(&path, format!("{}\n", std::process::id()).as_bytes())
        .map_err(io_err(&path))
}

/// Connect to a station, run (or go on with) the plan, record the result.
#[allow(clippy::too_many_arguments)]
pub async fn drive(
    p: &Prepared,
    rec: Recording,
    mut links: BenchLinks,
    clock: Arc<dyn Clock>,
    truth: Option<Arc<dyn GroundTruth>>,
    stop: StopHandle,
    sim: Option<SimRun>,
    mut sink: RunLogSink,
) -> Result<RunReport, RunError> {
    let Recording {
        dir,
        run_id,
        mut manifest,
        resume,
    } = rec;
    write_lock(&dir)?;
    if let Some(s) = &sim {
        // The simulated pack keeps its state beside the log: every 10
        // bench seconds when paced; every 10 bench minutes at full speed,
        // where a whole run takes a second and a file write costs as much
        // as a hundred samples.
        let every = if s.speed_factor.is_some() {
            10.0
        } else {
            600.0
        };
        s.handle.keep_state(dir.join(SIM_STATE_JSON), every);
    }
    if p.options.trace {
        let path = dir.join(TRACE_LOG);
        let trace = Trace::create(&path).map_err(io_err(&path))?;
        links.source.attach.trace = Some(trace.clone());
        links.load.attach.trace = Some(trace.clone());
        if let Some(m) = links.meter.as_mut() {
            m.attach.trace = Some(trace);
        }
    }
    if let Some(em) = &links.hooks.emergency {
        let who = links
            .hooks
            .station
            .as_ref()
            .map(|(n, _)| format!("{n} "))
            .unwrap_or_default();
        for (role, b) in [("source", Some(&links.source)), ("load", Some(&links.load))]
            .into_iter()
            .chain([("meter", links.meter.as_ref())])
        {
            if let (Some(b), true) = (b, role != "meter") {
                if let Some(r) = &b.attach.reopen {
                    em.register(format!("{who}{role}"), Arc::clone(r), b.profile.clone());
                }
            }
        }
    }
    let run_json = dir.join(RUN_JSON);
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    let mut records = Vec::new();
    let record = |role: &str, b: &BoundLink, idn: &str| InstrumentRecord {
        role: role.into(),
        link: b.text.clone(),
        profile: b.profile.name.clone(),
        idn: idn.to_string(),
    };
    let (src_rec, load_rec) = (
        record("source", &links.source, ""),
        record("load", &links.load, ""),
    );
    let board = links.hooks.board.clone();
    let connected = async {
        let source =
            Source::connect_with(links.source.link, links.source.profile, links.source.attach)
                .await?;
        let load = Load::connect_with(links.load.link, links.load.profile, links.load.attach).await;
        let load = match load {
            Ok(l) => l,
            Err(e) => {
                let mut source = source;
                let _ = source.0.make_safe().await;
                return Err(e);
            }
        };
        let meter = match links.meter {
            Some(m) => {
                let rec = record("meter", &m, "");
                match Meter::connect_with(m.link, m.profile, m.attach).await {
                    Ok(x) => Some((x, rec)),
                    Err(e) => {
                        let (mut source, mut load) = (source, load);
                        let _ = load.0.make_safe().await;
                        let _ = source.0.make_safe().await;
                        return Err(e);
                    }
                }
            }
            None => None,
        };
        Ok((source, load, meter))
    }
    .await;
    let (source, load, meter) = match connected {
        Ok(x) => x,
        Err(e) => {
            manifest.status = "aborted".into();
            manifest.stop_reason = Some(format!("could not connect: {e}"));
            manifest.finished_utc = Some(utc_now());
            write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
            let _ = std::fs::remove_file(dir.join(RUN_LOCK));
            if let Some(b) = &board {
                b.update(|l| {
                    l.state = "failed".into();
                    l.alarms.push(format!("could not connect: {e}"));
                });
            }
            return Err(RunError::Instrument(e));
        }
    };
    if manifest.instruments.is_empty() {
        records.push(InstrumentRecord {
            idn: source.0.idn().to_string(),
            ..src_rec
        });
        records.push(InstrumentRecord {
            idn: load.0.idn().to_string(),
            ..load_rec
        });
    }
    let meter = meter.map(|(m, rec)| {
        if manifest.instruments.is_empty() {
            records.push(InstrumentRecord {
                idn: m.0.idn().to_string(),
                ..rec
            });
        }
        m
    });
    if manifest.instruments.is_empty() {
        manifest.instruments = records;
    }
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    let mut station = Station {
        source,
        load,
        meter,
        shared_link: links.shared,
    };
    let alarm_ah = p
        .options
        .alarm_below_pct
        .map(|pct| pct / 100.0 * p.pack.rated_capacity_ah);
    let outcome = {
        let mut live;
        let sink_ref: &mut dyn record::event::Sink = match &board {
            Some(b) => {
                live = crate::live::LiveSink {
                    inner: &mut sink,
                    board: b.clone(),
                    est: crate::live::Estimator::new(&p.procedure.plan),
                };
                &mut live
            }
            None => &mut sink,
        };
        let mut engine = Engine::new(
            &p.procedure.plan,
            &mut station,
            clock,
            sink_ref,
            truth,
            stop,
        )
        .with_capacity_alarm(alarm_ah);
        if let Some(r) = resume {
            engine = engine.resume_from(r);
        }
        engine.run().await
    };
    sink.flush().map_err(io_err(&dir))?;
    drop(sink);
    // Reading the log back and writing the report takes a while on a long
    // run: off the thread the other stations sample on.
    let p = p.clone();
    tokio::task::spawn_blocking(move || finish_record(&p, &dir, &run_id, manifest, outcome, sim))
        .await
        .map_err(|e| RunError::Pack(format!("writing the record failed: {e}")))?
}

/// Write the summary, the report and the final manifest of a run whose
/// engine has stopped (or that was found stopped).
pub fn finish_record(
    p: &Prepared,
    dir: &Path,
    run_id: &str,
    mut manifest: Manifest,
    outcome: RunOutcome,
    sim: Option<SimRun>,
) -> Result<RunReport, RunError> {
    let run_json = dir.join(RUN_JSON);
    // The summary comes from the log on disk, through the same code as
    // `analyze` uses afterwards.
    let ctx = SummaryContext {
        pack: &p.pack,
        pack_id: &p.pack_id,
        run_id,
        title: &p.procedure.plan.title,
        test_date: p.options.test_date,
        cycle_count: p.options.cycle_count,
        policy: &p.options.policy,
    };
    let (summary, log) = summarize_run_dir(dir, &ctx, Some(&outcome))?;
    let summary_path = dir.join(SUMMARY_JSON);
    write_json(&summary_path, &summary).map_err(io_err(&summary_path))?;
    let report_path = dir.join(REPORT_HTML);
    let html = report::html::run_report(&summary, &log.samples);
    record::write::atomic_write(&report_path, html.as_bytes())
        .map_err(io_err(&report_path))?;
    manifest.status = outcome.status.name().into();
    manifest.stop_reason = outcome.reason.clone();
    manifest.finished_utc = Some(utc_now());
    manifest.timing = Some(outcome.timing);
    if let Some(s) = sim {
        let mut steps = manifest
            .simulation
            .take()
            .map(|r| r.steps)
            .unwrap_or_default();
        // A resumed step's truth adds to what the interrupted part counted.
        for t in &outcome.truth {
            match steps.iter_mut().find(|x| x.step == t.step) {
                Some(x) => {
                    x.charge_ah += t.charge_ah;
                    x.energy_wh += t.energy_wh;
                }
                None => steps.push(*t),
            }
        }
        manifest.simulation = Some(SimulationRecord {
            label: SIM_TRUTH_LABEL.into(),
            config: s.config,
            true_capacity_ah: s.true_capacity_ah,
            steps,
        });
    }
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    let _ = std::fs::remove_file(dir.join(RUN_LOCK));
    Ok(RunReport {
        run_dir: dir.to_path_buf(),
        summary,
        outcome,
    })
}

/// One station's run in a request: what to run, where, and its board.
pub struct StationJob {
    /// The station's name (the bench file's, or "sim").
    pub name: String,
    pub prepared: Prepared,
    /// The bench-file station; none for the default simulated bench.
    pub station: Option<(StationSpec, PathBuf)>,
    pub cfg: SimConfig,
    pub speed: Speed,
    pub board: crate::live::Board,
}

/// Run one station's job: the embedded simulated bench, or the station's
/// own links (opened only now, after everything validated).
pub async fn run_job(
    job: &StationJob,
    stop: StopHandle,
    emergency: Emergency,
    coarse_clock: bool,
) -> Result<RunReport, RunError> {
    let hooks = Hooks {
        board: Some(job.board.clone()),
        emergency: Some(emergency),
        station: job
            .station
            .as_ref()
            .map(|(s, f)| (s.name.clone(), f.clone())),
        coarse_clock,
    };
    let p = &job.prepared;
    let result = match &job.station {
        None => execute_sim_with(p, &job.cfg, job.speed, stop, hooks).await,
        Some((st, _)) if st.is_simulated() => {
            let (sp, lp) = st.profiles();
            execute_sim_station(p, &job.cfg, job.speed, stop, sp.clone(), lp.clone(), hooks).await
        }
        Some((st, _)) => {
            let factor = match job.speed {
                Speed::Max => 1.0,
                Speed::Factor(f) => f,
            };
            match open_station(st).await {
                Ok(mut links) => {
                    links.speed = if factor == 1.0 {
                        "real time".into()
                    } else {
                        format!("{factor}x real time")
                    };
                    links.hooks = hooks;
                    let clock: Arc<dyn Clock> = if coarse_clock {
                        PacedClock::coarse(factor)
                    } else {
                        PacedClock::new(factor)
                    };
                    execute(p, links, clock, None, stop, None).await
                }
                Err(e) => Err(e),
            }
        }
    };
    if let Err(e) = &result {
        job.board.update(|l| {
            if !l.is_final() {
                l.state = "failed".into();
                l.alarms.push(e.to_string());
            }
        });
    }
    result
}

/// Go on with an interrupted run on its bench (see [`crate::resume`]):
/// the simulated pack is put back in its kept state, left open-circuit for
/// the gap; a real station's links are opened again.
#[allow(clippy::too_many_arguments)]
pub async fn run_resumed_job(
    job: &StationJob,
    rec: Recording,
    sink: RunLogSink,
    stop: StopHandle,
    emergency: Emergency,
    kept: Option<sim::bench::PackState>,
    gap_s: f64,
) -> Result<RunReport, RunError> {
    let hooks = Hooks {
        board: Some(job.board.clone()),
        emergency: Some(emergency),
        station: job
            .station
            .as_ref()
            .map(|(s, f)| (s.name.clone(), f.clone())),
        coarse_clock: false,
    };
    let p = &job.prepared;
    let simulated = job.station.as_ref().is_none_or(|(s, _)| s.is_simulated());
    if simulated {
        let (clock, links, speed_text) = new_sim_bench(p, &job.cfg, job.speed, false);
        if let Some(k) = &kept {
            links.handle.restore(k, gap_s);
        }
        let (sp, lp) = match &job.station {
            Some((st, _)) => {
                let (a, b) = st.profiles();
                (a.clone(), b.clone())
            }
            None => sim_profiles(),
        };
        let (mut bl, truth, sim) = sim_bench_links(&job.cfg, links, &speed_text, sp, lp, job.speed);
        bl.hooks = hooks;
        return drive(p, rec, bl, clock, truth, stop, sim, sink).await;
    }
    let Some((st, _)) = &job.station else {
        return Err(RunError::Pack("no bench to resume on".into()));
    };
    let mut links = open_station(st).await?;
    links.hooks = hooks;
    let clock: Arc<dyn Clock> = PacedClock::new(1.0);
    drive(p, rec, links, clock, None, stop, None, sink).await
}

/// The raw-traffic trace of a run (`run --trace`).
pub const TRACE_LOG: &str = "trace.log";

/// What a summary needs besides the log.
#[derive(Debug, Clone, Copy)]
pub struct SummaryContext<'a> {
    pub pack: &'a PackSpec,
    pub pack_id: &'a str,
    pub run_id: &'a str,
    pub title: &'a str,
    pub test_date: NaiveDate,
    pub cycle_count: Option<f64>,
    pub policy: &'a Policy,
}

/// The resistance growth is measured against: the rated resistance when
/// the spec has one, else the first reading of an earlier completed run of
/// the pack, else (first reading ever) this run's own.
pub fn reference_resistance(pack_dir: &Path, ctx: &SummaryContext<'_>) -> Option<f64> {
    if let Some(r) = ctx.pack.rated_resistance_mohm {
        return Some(r);
    }
    let date = ctx.test_date.to_string();
    let runs = record::history::run_summaries(pack_dir).ok()?;
    runs.iter()
        .filter(|(_, s)| {
            s.status == "completed"
                && (s.test_date.as_str(), s.run_id.as_str()) < (date.as_str(), ctx.run_id)
        })
        .find_map(|(_, s)| s.resistance.as_ref().map(|r| r.dcir_mohm))
}

/// Build a run's summary from its folder (the log streamed through the
/// same code as `packbench analyze`); also returns the samples, read again
/// for the report's charts.
pub fn summarize_run_dir(
    dir: &Path,
    ctx: &SummaryContext<'_>,
    outcome: Option<&RunOutcome>,
) -> Result<(Summary, read::SampleLog), RunError> {
    let outcome = outcome.map(|o| crate::offline::Outcome {
        status: o.status.name().to_string(),
        reason: o.reason.clone(),
    });
    let summary =
        crate::offline::summarize_run(dir, ctx, outcome, analysis::AnalysisOptions::default())?;
    let log = read::read_samples(&dir.join(record::SAMPLES_CSV))?;
    Ok((summary, log))
}
