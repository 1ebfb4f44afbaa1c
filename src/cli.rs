//! The command line: clap definitions, one function per subcommand, Ctrl-C,
//! exit codes. No TOML parsing and no SCPI here.
//!
//! Exit codes: 0 completed, 1 failure while running (I/O, instrument
//! connection), 2 bad input (arguments, procedure, pack spec, pack id),
//! 3 safety stop or instrument fault (run aborted), 5 interrupted (Ctrl-C).

use engine::control::StopHandle;
use analysis::fade::grade::Policy;
use analysis::fade::{fleet, trend};
use record::history;
use model::pack::{parse_rate, Chemistry, PackSpec};
use model::procedure;
use report;
use crate::run::{self, PackSource, RunError, RunOptions, RunRequest, Speed};
use model::simconfig::SimConfig;
use model::units;
use anyhow::{anyhow, Context};
use chrono::NaiveDate;
use clap::{Args, Parser, Subcommand};
use std::path::{Path, PathBuf};

pub const EXIT_OK: i32 = 0;
pub const EXIT_FAILURE: i32 = 1;
pub const EXIT_BAD_INPUT: i32 = 2;

#[derive(Debug, Parser)]
#[command(
    name = "packbench",
    version,
    about = "Battery capacity test bench controller"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run a procedure on a pack and record it under the results folder.
    Run(RunArgs),
    /// Go on with an interrupted run (Ctrl-C, killed process, power cut) from its record.
    Resume(ResumeArgs),
    /// Validate a procedure for a pack, print the plan, and simulate it (dry run).
    Check(CheckArgs),
    /// Write (again) the HTML report of a run folder.
    Report(ReportArgs),
    /// Capacity fade of one pack across its tests, with the end-of-life projection.
    Fade(FadeArgs),
    /// Rank every pack under a results folder.
    Fleet(FleetArgs),
    /// Run the fictional rental-fleet demo on the simulated bench.
    Demo(DemoArgs),
    /// Analyse a log: one of our run folders, or any bench's CSV.
    Analyze(crate::analyze_cmd::AnalyzeArgs),
    /// Peukert exponent from two capacity runs of a pack at different rates.
    Peukert(crate::analyze_cmd::PeukertArgs),
    /// List the serial ports of this machine.
    Ports,
    /// Check an instrument's link and profile: identify, error queue, voltage, current.
    Probe(crate::setup::ProbeArgs),
    /// The simulated bench as real endpoints.
    Sim(crate::setup::SimArgs),
}

#[derive(Debug, Args)]
pub struct ResumeArgs {
    /// The run folder (results/<pack>/<run>); without it, `--bench FILE`
    /// resumes every interrupted station of that bench.
    #[arg(required_unless_present = "bench")]
    pub run_dir: Option<PathBuf>,
    /// The bench file: the run's own when its recorded one has moved, or,
    /// without a run folder, the bench whose interrupted stations to resume.
    #[arg(long)]
    pub bench: Option<PathBuf>,
    /// Results folder, where a bench's stations' runs are found.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// Pace of a simulated bench (default: the run's own).
    #[arg(long)]
    pub speed: Option<String>,
    /// Grading policy (TOML); default: the built-in policy.
    #[arg(long)]
    pub policy: Option<PathBuf>,
    /// No live status; print only the final summary line.
    #[arg(long)]
    pub quiet: bool,
    /// Live status lines every so often when the output is not a terminal.
    #[arg(long, default_value = "60s")]
    pub status_every: String,
}

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// A run folder (results/<pack>/<run>).
    pub run_dir: PathBuf,
}

#[derive(Debug, Args)]
pub struct FadeArgs {
    /// Pack id.
    pub pack: String,
    /// Results folder.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// End of life, % of rated capacity.
    #[arg(long, default_value = "80%")]
    pub threshold: String,
    /// Earlier measurements: CSV with date,cycles,capacity_ah,resistance_mohm.
    #[arg(long)]
    pub history: Option<PathBuf>,
    /// Print JSON instead of text.
    #[arg(long)]
    pub json: bool,
    /// Where to write the HTML report (default results/<pack>/fade.html).
    #[arg(long)]
    pub html: Option<PathBuf>,
    /// The date to judge a projected end of life against (default today, UTC).
    #[arg(long)]
    pub today: Option<String>,
}

#[derive(Debug, Args)]
pub struct FleetArgs {
    /// Results folder.
    #[arg(default_value = "results")]
    pub results: PathBuf,
    /// End of life, % of rated capacity.
    #[arg(long, default_value = "80%")]
    pub threshold: String,
    /// A test is overdue after this long: days or weeks, e.g. 92d or 13w.
    #[arg(long, default_value = "92d")]
    pub interval: String,
    /// The date to judge overdue tests against (default: today, UTC).
    #[arg(long)]
    pub today: Option<String>,
    /// Print CSV instead of a table.
    #[arg(long, conflicts_with = "json")]
    pub csv: bool,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Also write the HTML fleet report here.
    #[arg(long)]
    pub html: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Folder for the demo's results and reports.
    #[arg(long, default_value = "demo")]
    pub out: PathBuf,
}

/// The pack under test, given on the command line or as a file.
#[derive(Debug, Clone, Args)]
pub struct PackArgs {
    /// Chemistry: li-ion, lfp, lead-acid or nimh.
    #[arg(long)]
    pub chemistry: Option<String>,
    /// Cells in series.
    #[arg(long)]
    pub series: Option<u32>,
    /// Rated capacity, e.g. 14Ah or 2800mAh.
    #[arg(long)]
    pub rated: Option<String>,
    /// Rated energy, e.g. 504Wh.
    #[arg(long)]
    pub rated_energy: Option<String>,
    /// Rated discharge rate, e.g. 0.2C or 20h.
    #[arg(long)]
    pub rated_rate: Option<String>,
    /// The maker's DC resistance of the new pack, e.g. 60mohm.
    #[arg(long)]
    pub rated_resistance: Option<String>,
    /// A pack spec TOML file instead of the options above.
    #[arg(long, conflicts_with_all = ["chemistry", "series", "rated", "rated_energy", "rated_rate", "rated_resistance"])]
    pub pack_spec: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct RunArgs {
    /// Procedure file (TOML).
    pub procedure: PathBuf,
    /// Use the embedded simulated bench (the default without --bench).
    #[arg(long, conflicts_with = "bench")]
    pub sim: bool,
    /// Bench file (TOML) binding the station's instruments to links and profiles.
    #[arg(long)]
    pub bench: Option<PathBuf>,
    /// The station of the bench file to use (needed when it has several).
    #[arg(long, requires = "bench")]
    pub station: Option<String>,
    /// Write the raw instrument traffic with timestamps to trace.log in the run folder.
    #[arg(long)]
    pub trace: bool,
    /// Inject a link fault into the simulated bench: INSTRUMENT:KIND@TIME[:DELAY],
    /// KIND one of no-reply, garbage, slow, disconnect, error, wrong-read-back.
    #[arg(long)]
    pub fault: Vec<String>,
    /// Pack id: letters, digits, '-', '_', '.'; becomes the results folder.
    /// With a bench file of several stations, each station names its pack.
    #[arg(long)]
    pub pack: Option<String>,
    #[command(flatten)]
    pub pack_args: PackArgs,
    /// Results folder.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// Pace of the simulated bench: max, or bench seconds per second (1 = real
    /// time). With --bench the default is real time; a factor is only for a
    /// sped-up simulator served with `packbench sim serve --speed`.
    #[arg(long, default_value = "max")]
    pub speed: String,
    /// Simulated bench settings (pack condition, meter errors, faults), TOML.
    #[arg(long)]
    pub sim_config: Option<PathBuf>,
    /// Simulated instruments without measurement error.
    #[arg(long)]
    pub sim_ideal: bool,
    /// No live status; print only the final summary line (one per station).
    #[arg(long)]
    pub quiet: bool,
    /// Live status lines every so often when the output is not a terminal.
    #[arg(long, default_value = "60s")]
    pub status_every: String,
    /// Raise a low-capacity alarm (the run goes on) when the capacity step
    /// reaches its cutoff under this share of the rated capacity, e.g. 80%.
    #[arg(long)]
    pub alarm_below: Option<String>,
    /// The day the test counts for, YYYY-MM-DD (default: today, UTC).
    #[arg(long)]
    pub test_date: Option<String>,
    /// The pack's equivalent full cycles from its own counter, if known.
    #[arg(long)]
    pub cycle_count: Option<f64>,
    /// Grading policy (TOML); default: the built-in policy.
    #[arg(long)]
    pub policy: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct CheckArgs {
    /// Procedure file (TOML).
    pub procedure: PathBuf,
    /// Pack id whose saved spec to use (optional).
    #[arg(long)]
    pub pack: Option<String>,
    #[command(flatten)]
    pub pack_args: PackArgs,
    /// Results folder (for a saved pack spec).
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// Simulated pack for the dry run (TOML, as for run --sim-config).
    #[arg(long)]
    pub sim_config: Option<PathBuf>,
    /// Only validate; skip the dry run.
    #[arg(long)]
    pub no_dry_run: bool,
    /// Print the dry run as JSON (after the plan).
    #[arg(long)]
    pub json: bool,
}

/// Build a pack spec from the options, if any were given.
pub fn pack_from_args(a: &PackArgs) -> Result<Option<PackSpec>, RunError> {
    if let Some(path) = &a.pack_spec {
        return run::read_pack_file(path).map(Some);
    }
    if a.chemistry.is_none() && a.series.is_none() && a.rated.is_none() {
        if a.rated_energy.is_some() || a.rated_rate.is_some() || a.rated_resistance.is_some() {
            return Err(RunError::Pack(
                "--rated-energy, --rated-rate and --rated-resistance need --chemistry, --series and --rated".into(),
            ));
        }
        return Ok(None);
    }
    let missing: Vec<&str> = [
        ("--chemistry", a.chemistry.is_none()),
        ("--series", a.series.is_none()),
        ("--rated", a.rated.is_none()),
    ]
    .iter()
    .filter(|(_, m)| *m)
    .map(|(n, _)| *n)
    .collect();
    if !missing.is_empty() {
        return Err(RunError::Pack(format!(
            "a pack spec needs {}",
            missing.join(", ")
        )));
    }
    let chemistry: Chemistry = a
        .chemistry
        .as_deref()
        .unwrap_or_default()
        .parse()
        .map_err(RunError::Pack)?;
    let rated = units::capacity_ah(a.rated.as_deref().unwrap_or_default())
        .map_err(|e| RunError::Pack(format!("--rated: {e}")))?;
    let energy = a
        .rated_energy
        .as_deref()
        .map(units::energy_wh)
        .transpose()
        .map_err(|e| RunError::Pack(format!("--rated-energy: {e}")))?;
    let rate = a
        .rated_rate
        .as_deref()
        .map(parse_rate)
        .transpose()
        .map_err(|e| RunError::Pack(format!("--rated-rate: {e}")))?;
    let resistance = a
        .rated_resistance
        .as_deref()
        .map(units::resistance_ohm)
        .transpose()
        .map_err(|e| RunError::Pack(format!("--rated-resistance: {e}")))?
        .map(|r| r * 1000.0);
    let spec = PackSpec {
        rated_resistance_mohm: resistance,
        chemistry,
        series: a.series.unwrap_or(0),
        rated_capacity_ah: rated,
        rated_energy_wh: energy,
        rated_rate_c: rate,
    };
    spec.check().map_err(RunError::Pack)?;
    Ok(Some(spec))
}

/// The simulated bench's settings from `--sim-config`, `--sim-ideal` and
/// `--fault` options.
pub fn sim_config(
    path: Option<&std::path::Path>,
    ideal: bool,
    faults: &[String],
) -> Result<SimConfig, RunError> {
    let mut cfg = match path {
        Some(path) => {
            let text = model::procedure::read_text(path).map_err(|source| RunError::InputFile {
                path: path.to_path_buf(),
                error: source,
            })?;
            SimConfig::from_toml(path, &text)?
        }
        None => SimConfig::default(),
    };
    if ideal {
        cfg.ideal = true;
    }
    for f in faults {
        cfg.faults.link.push(f.parse().map_err(RunError::Pack)?);
    }
    Ok(cfg)
}

fn parse_speed(s: &str) -> Result<Speed, RunError> {
    if s.eq_ignore_ascii_case("max") {
        return Ok(Speed::Max);
    }
    match s.parse::<f64>() {
        Ok(f) if f.is_finite() && f > 0.0 && f <= 1e6 => Ok(Speed::Factor(f)),
        _ => Err(RunError::Pack(format!(
            "--speed '{s}': expected max or a number of bench seconds per second (1 = real time)"
        ))),
    }
}

fn report_error(e: &RunError) -> i32 {
    eprintln!("error: {e}");
    if e.is_input() {
        EXIT_BAD_INPUT
    } else {
        EXIT_FAILURE
    }
}

/// Exit code after a second Ctrl-C (the shell's convention for SIGINT).
pub const EXIT_SECOND_INTERRUPT: i32 = 130;

/// Everything `run` checks before it touches an instrument.
fn prepare_run(a: &RunArgs) -> Result<Vec<run::StationJob>, RunError> {
    let speed = parse_speed(&a.speed)?;
    let given = pack_from_args(&a.pack_args)?;
    let mut options = RunOptions::default();
    if let Some(d) = &a.test_date {
        options.test_date = parse_date(d)?;
    }
    if let Some(c) = a.cycle_count {
        if !(c.is_finite() && c >= 0.0) {
            return Err(RunError::Pack(format!(
                "--cycle-count {c}: expected a count of 0 or more"
            )));
        }
        options.cycle_count = Some(c);
    }
    if let Some(path) = &a.policy {
        let text = model::procedure::read_text(path).map_err(|source| RunError::InputFile {
            path: path.clone(),
            error: source,
        })?;
        options.policy = Policy::from_toml(path, &text)?;
    }
    if let Some(t) = &a.alarm_below {
        options.alarm_below_pct = Some(parse_threshold(t).map_err(|_| {
            RunError::Pack(format!(
                "--alarm-below '{t}': expected a percentage of the rated capacity, e.g. 80%"
            ))
        })?);
    }
    options.trace = a.trace;
    let cfg = sim_config(a.sim_config.as_deref(), a.sim_ideal, &a.fault)?;
    let Some(path) = &a.bench else {
        let pack_id = a
            .pack
            .clone()
            .ok_or_else(|| RunError::Pack("--pack is needed: the pack's id".into()))?;
        let req = RunRequest {
            procedure: a.procedure.clone(),
            pack_id: pack_id.clone(),
            pack: match given {
                Some(p) => PackSource::Given(p),
                None => PackSource::Saved {
                    allow_sim_default: true,
                },
            },
            results: a.results.clone(),
            options,
        };
        let prepared = run::prepare(&req)?;
        return Ok(vec![run::StationJob {
            name: "sim".into(),
            board: crate::live::Board::new("sim", &pack_id),
            prepared,
            station: None,
            cfg,
            speed,
        }]);
    };
    // A bench file: one station, or all of them at once. The bench file,
    // every station's pack, procedure and profiles are checked before any
    // link is opened.
    let bench = crate::benchfile::BenchFile::load(path)?;
    let stations: Vec<crate::benchfile::StationSpec> = match (&a.station, bench.stations.len()) {
        (Some(n), _) => vec![bench.station(Some(n)).map_err(RunError::Pack)?.clone()],
        (None, 1) => vec![bench.stations[0].clone()],
        (None, _) => bench.stations.clone(),
    };
    let several = stations.len() > 1;
    if several && (a.pack.is_some() || given.is_some()) {
        return Err(RunError::Pack(format!(
            "{} has {} stations: each names its pack (pack = \"...\", pack_spec = \"...\"); --pack and the pack options are for one station (--station NAME)",
            path.display(),
            stations.len()
        )));
    }
    let mut jobs = Vec::new();
    for st in stations {
        let pack_id = match (&a.pack, &st.pack_id) {
            (Some(p), _) => p.clone(),
            (None, Some(p)) => p.clone(),
            (None, None) => {
                return Err(RunError::Pack(format!(
                    "station '{}' names no pack: give --pack or pack = \"...\" in {}",
                    st.name,
                    path.display()
                )))
            }
        };
        let pack = match (&given, &st.pack_spec) {
            (Some(g), _) => PackSource::Given(g.clone()),
            (None, Some(f)) => PackSource::Given(run::read_pack_file(f)?),
            (None, None) => PackSource::Saved {
                allow_sim_default: st.is_simulated(),
            },
        };
        let mut opts = options.clone();
        opts.test_date = options.test_date;
        let req = RunRequest {
            procedure: st.procedure.clone().unwrap_or_else(|| a.procedure.clone()),
            pack_id: pack_id.clone(),
            pack,
            results: a.results.clone(),
            options: opts,
        };
        let prepared = run::prepare(&req)?;
        let (sp, lp) = st.profiles();
        run::check_ranges(&prepared.procedure, sp, lp)?;
        let station_cfg = match &st.sim_config {
            Some(f) => sim_config(Some(f), a.sim_ideal, &a.fault)?,
            None => cfg.clone(),
        };
        if !st.is_simulated() && (a.sim_config.is_some() || a.sim_ideal || !a.fault.is_empty()) {
            return Err(RunError::Pack(
                "--sim-config, --sim-ideal and --fault are for the embedded simulated bench (links \"sim\"), not for real instruments".into(),
            ));
        }
        let speed = match (speed, st.is_simulated()) {
            (Speed::Max, false) => Speed::Factor(1.0),
            (s, _) => s,
        };
        jobs.push(run::StationJob {
            name: st.name.clone(),
            board: crate::live::Board::new(&st.name, &pack_id),
            prepared,
            station: Some((st, path.clone())),
            cfg: station_cfg,
            speed,
        });
    }
    if several {
        let mut seen = std::collections::HashSet::new();
        for j in &jobs {
            if !seen.insert(j.prepared.pack_dir.clone()) {
                return Err(RunError::Pack(format!(
                    "pack '{}' is on two stations at once",
                    j.prepared.pack_id
                )));
            }
        }
    }
    Ok(jobs)
}

/// How the live status is shown: nothing when quiet, redrawn on a
/// terminal, else a line every `status_every`.
fn display_mode(quiet: bool, status_every: &str) -> Result<crate::live::DisplayMode, RunError> {
    use std::io::IsTerminal;
    if quiet {
        return Ok(crate::live::DisplayMode::Quiet);
    }
    if std::io::stderr().is_terminal() {
        return Ok(crate::live::DisplayMode::Terminal);
    }
    match units::duration(status_every) {
        Ok(s) if s >= 0.1 => Ok(crate::live::DisplayMode::Lines(s)),
        _ => Err(RunError::Pack(format!(
            "--status-every '{status_every}': expected a duration of 0.1 s or more, e.g. 60s"
        ))),
    }
}

/// `packbench run`: one station, or every station of a bench file at once
/// (one task each, each with its own results folder and envelope).
pub fn cmd_run(a: RunArgs) -> i32 {
    let (jobs, mode) =
        match prepare_run(&a).and_then(|j| Ok((j, display_mode(a.quiet, &a.status_every)?))) {
            Ok(x) => x,
            Err(e) => return report_error(&e),
        };
    for j in &jobs {
        if let (Some(n), false) = (&j.prepared.pack_note, a.quiet) {
            eprintln!("note: {}: {n}", j.name);
        }
        if j.speed != Speed::Max && j.station.as_ref().is_some_and(|(s, _)| !s.is_simulated()) {
            if let Speed::Factor(f) = j.speed {
                if f != 1.0 {
                    eprintln!("note: pacing the bench at {f}x real time: only meaningful against a sped-up simulator");
                }
            }
        }
    }
    let several = jobs.len() > 1;
    let jobs = std::rc::Rc::new(jobs);
    let boards = jobs.iter().map(|j| j.board.clone()).collect();
    let tasks: Vec<StationTask> = (0..jobs.len())
        .map(|k| {
            let jobs = std::rc::Rc::clone(&jobs);
            Box::new(move |stop, em| {
                Box::pin(async move { run::run_job(&jobs[k], stop, em, several).await })
                    as StationFuture
            }) as StationTask
        })
        .collect();
    let Some(results) = run_stations(boards, mode, tasks) else {
        return EXIT_FAILURE;
    };
    if !several {
        return match results.into_iter().next() {
            Some(Ok(r)) => {
                print_result(&r, a.quiet);
                r.exit_code()
            }
            Some(Err(e)) => report_error(&e),
            None => EXIT_FAILURE,
        };
    }
    let names: Vec<(String, String)> = jobs
        .iter()
        .map(|j| (j.name.clone(), j.prepared.pack_id.clone()))
        .collect();
    let (failed, aborted, interrupted) = station_end_lines(&names, &results);
    if interrupted {
        if let Some(b) = &a.bench {
            println!(
                "To go on with these stations: packbench resume --bench {} --results {}",
                shell_word(&b.display().to_string()),
                shell_word(&a.results.display().to_string())
            );
        }
    }
    several_exit(failed, aborted, interrupted)
}

/// One station's work, started on the shared thread with the stop handle
/// and the last-resort switch-off.
type StationFuture =
    std::pin::Pin<Box<dyn std::future::Future<Output = Result<run::RunReport, RunError>>>>;
type StationTask = Box<dyn FnOnce(StopHandle, run::Emergency) -> StationFuture>;

/// Run stations at once, one task each on one thread, with Ctrl-C handled
/// and their live boards shown; one result per task, in order. None when
/// the runtime cannot start (said).
fn run_stations(
    boards: Vec<crate::live::Board>,
    mode: crate::live::DisplayMode,
    tasks: Vec<StationTask>,
) -> Option<Vec<Result<run::RunReport, RunError>>> {
    let rt = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("error: cannot start the runtime: {e}");
            return None;
        }
    };
    let stop = StopHandle::new();
    let emergency = run::Emergency::default();
    let local = tokio::task::LocalSet::new();
    Some(local.block_on(&rt, async {
        spawn_interrupts(stop.clone(), emergency.clone());
        let shown = tokio::task::spawn_local(crate::live::display(boards.clone(), mode));
        let running: Vec<_> = tasks
            .into_iter()
            .map(|t| tokio::task::spawn_local(t(stop.clone(), emergency.clone())))
            .collect();
        let mut out = Vec::new();
        for (t, board) in running.into_iter().zip(&boards) {
            out.push(match t.await {
                Ok(r) => r,
                Err(e) => Err(RunError::Pack(format!("station task failed: {e}"))),
            });
            board.update(|l| {
                if !l.is_final() {
                    l.state = "failed".into();
                }
            });
        }
        let _ = shown.await;
        out
    }))
}

/// One end line per station (name, pack); whether any failed, aborted or
/// was interrupted.
fn station_end_lines(
    names: &[(String, String)],
    results: &[Result<run::RunReport, RunError>],
) -> (bool, bool, bool) {
    let (mut failed, mut aborted, mut interrupted) = (false, false, false);
    for ((name, pack), r) in names.iter().zip(results) {
        match r {
            Ok(r) => {
                match r.exit_code() {
                    0 => {}
                    5 => interrupted = true,
                    _ => aborted = true,
                }
                println!("{}", station_line(name, pack, r));
            }
            Err(e) => {
                failed = true;
                println!("{name:<12} {pack:<10} failed      {e}");
            }
        }
    }
    (failed, aborted, interrupted)
}

/// The exit code of several stations: 1 if any failed, else 3 if any
/// aborted, else 5 if any was interrupted.
fn several_exit(failed: bool, aborted: bool, interrupted: bool) -> i32 {
    if failed {
        EXIT_FAILURE
    } else if aborted {
        3
    } else if interrupted {
        5
    } else {
        EXIT_OK
    }
}

/// The figures a run ends with, on one line: the capacity measured, the
/// state of health (on the capacity at rated conditions) and the grade;
/// else why it stopped.
fn result_figures(s: &record::Summary) -> String {
    let mut parts = Vec::new();
    match &s.capacity {
        Some(c) => {
            parts.push(format!("{:.3}Ah", c.measured_ah));
            if c.from_full_charge {
                parts.push(format!("SOH {:.1}%", c.soh_pct));
            } else {
                parts.push("not from a full charge".into());
            }
        }
        None => {
            if let Some(r) = &s.stop_reason {
                parts.push(r.clone());
            }
        }
    }
    if let Some(g) = &s.grade {
        parts.push(format!("grade {}", g.label));
    }
    parts.join(" ")
}

/// One station's end line.
fn station_line(name: &str, pack_id: &str, r: &run::RunReport) -> String {
    format!(
        "{:<12} {:<10} {:<11} {} {}",
        name,
        pack_id,
        r.summary.status,
        result_figures(&r.summary),
        r.run_dir.display()
    )
}

/// Ctrl-C: the first stops every station safely (outputs off, confirmed,
/// runs marked interrupted, summaries written); a second one sends the
/// safe state once more on fresh links and quits at once.
fn spawn_interrupts(stop: StopHandle, em: run::Emergency) {
    tokio::task::spawn_local(async move {
        if tokio::signal::ctrl_c().await.is_err() {
            return;
        }
        eprintln!("\nCtrl-C: stopping safely (outputs off, confirmed) ... press Ctrl-C again to quit at once");
        stop.request_stop();
        if tokio::signal::ctrl_c().await.is_ok() {
            eprintln!("\nsecond Ctrl-C: one more switch-off on fresh links, then quitting");
            for (who, sent) in em.all_off(std::time::Duration::from_millis(1500)).await {
                eprintln!(
                    "  {who}: {}",
                    if sent {
                        "off sent"
                    } else {
                        "NOT REACHED: switch it off by hand"
                    }
                );
            }
            std::process::exit(EXIT_SECOND_INTERRUPT);
        }
    });
}

/// `packbench resume`.
pub fn cmd_resume(a: ResumeArgs) -> i32 {
    match &a.run_dir {
        Some(dir) => resume_one(&a, dir),
        None => resume_bench(&a),
    }
}

/// The pace and grading policy a resume was given.
fn resume_options(a: &ResumeArgs) -> Result<(Option<Speed>, Option<Policy>), RunError> {
    let speed = a.speed.as_deref().map(parse_speed).transpose()?;
    let policy = match &a.policy {
        Some(path) => {
            let text = model::procedure::read_text(path).map_err(run::input_file_err(path))?;
            Some(Policy::from_toml(path, &text)?)
        }
        None => None,
    };
    Ok((speed, policy))
}

/// Resume one run folder.
fn resume_one(a: &ResumeArgs, run_dir: &Path) -> i32 {
    let setup = resume_options(a).and_then(|(speed, policy)| {
        crate::resume::prepare(run_dir, a.bench.as_deref(), speed, policy)
    });
    let setup = match setup {
        Ok(s) => s,
        Err(e) => return report_error(&e),
    };
    let mode = match display_mode(a.quiet, &a.status_every) {
        Ok(m) => m,
        Err(e) => return report_error(&e),
    };
    if !a.quiet {
        match &setup.found {
            crate::resume::Found::GoOn(p) => eprintln!(
                "resuming {} at step {} (last sample at {:.1} s, down {:.0} s)",
                run_dir.display(),
                setup
                    .prepared
                    .procedure
                    .plan
                    .steps
                    .get(p.position)
                    .map(|s| s.index)
                    .unwrap_or(0),
                p.last_sample_t_s,
                p.gap_s
            ),
            crate::resume::Found::Recorded { status, .. } => eprintln!(
                "the run had ended ({status}) but its record was not finished: writing it"
            ),
        }
    }
    let board = crate::live::Board::new("resume", &setup.prepared.pack_id);
    let task: StationTask = Box::new({
        let board = board.clone();
        move |stop, em| Box::pin(crate::resume::execute(setup, board, stop, em)) as StationFuture
    });
    let Some(result) =
        run_stations(vec![board], mode, vec![task]).and_then(|r| r.into_iter().next())
    else {
        return EXIT_FAILURE;
    };
    match result {
        Ok(r) => {
            print_result(&r, a.quiet);
            r.exit_code()
        }
        Err(e) => report_error(&e),
    }
}

/// `resume --bench FILE`: every station of the bench whose pack's latest
/// run was interrupted (or its process died), all checked before any is
/// resumed, then run at once as `run` runs them.
fn resume_bench(a: &ResumeArgs) -> i32 {
    let setups = (|| -> Result<Vec<(String, crate::resume::ResumeSetup)>, RunError> {
        let Some(file) = &a.bench else {
            return Err(RunError::Pack("give a run folder or --bench FILE".into()));
        };
        let (speed, policy) = resume_options(a)?;
        let bench = crate::benchfile::BenchFile::load(file)?;
        let found = crate::resume::interrupted_runs(&bench, &a.results)?;
        if found.is_empty() {
            return Err(RunError::Pack(format!(
                "no interrupted run of {}'s stations under {}: nothing to resume",
                file.display(),
                a.results.display()
            )));
        }
        found
            .into_iter()
            .map(|(station, dir)| {
                crate::resume::prepare(&dir, Some(file), speed, policy.clone())
                    .map(|s| (station, s))
            })
            .collect()
    })();
    let setups = match setups {
        Ok(s) => s,
        Err(e) => return report_error(&e),
    };
    let mode = match display_mode(a.quiet, &a.status_every) {
        Ok(m) => m,
        Err(e) => return report_error(&e),
    };
    for (name, s) in &setups {
        if !a.quiet {
            eprintln!("resuming {name}: {}", s.dir.display());
        }
    }
    let names: Vec<(String, String)> = setups
        .iter()
        .map(|(n, s)| (n.clone(), s.prepared.pack_id.clone()))
        .collect();
    let boards: Vec<crate::live::Board> = names
        .iter()
        .map(|(n, p)| crate::live::Board::new(n, p))
        .collect();
    let tasks: Vec<StationTask> = setups
        .into_iter()
        .zip(boards.clone())
        .map(|((_, setup), board)| {
            Box::new(move |stop, em| {
                Box::pin(crate::resume::execute(setup, board, stop, em)) as StationFuture
            }) as StationTask
        })
        .collect();
    let Some(results) = run_stations(boards, mode, tasks) else {
        return EXIT_FAILURE;
    };
    let (failed, aborted, interrupted) = station_end_lines(&names, &results);
    several_exit(failed, aborted, interrupted)
}

fn print_result(r: &run::RunReport, quiet: bool) {
    if quiet {
        println!(
            "{} {} {}",
            r.summary.status,
            r.run_dir.display(),
            result_figures(&r.summary)
        );
    } else {
        print!("{}", report::text::summary(&r.summary));
        println!("  Results: {}", r.run_dir.display());
    }
    if r.exit_code() == 5 {
        println!(
            "To go on with this run: packbench resume {}",
            shell_word(&r.run_dir.display().to_string())
        );
    }
}

/// A path as one shell word (quoted when it holds anything but plain
/// characters), so the printed command can be pasted as it is.
fn shell_word(s: &str) -> String {
    if !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./:+@%=,".contains(c))
    {
        s.to_string()
    } else {
        format!("'{}'", s.replace('\'', "'\\''"))
    }
}

/// `packbench check`.
pub fn cmd_check(a: CheckArgs) -> anyhow::Result<i32> {
    let given = pack_from_args(&a.pack_args)?;
    let (pack, note) = match (&a.pack, given) {
        (Some(id), g) => {
            let src = match g {
                Some(p) => PackSource::Given(p),
                None => PackSource::Saved {
                    allow_sim_default: true,
                },
            };
            let (p, _, note) = run::resolve_pack(id, &src, &a.results)?;
            (p, note)
        }
        (None, Some(p)) => (p, None),
        (None, None) => (
            run::default_sim_pack(),
            Some("no pack given: checking against the simulated bench's pack".to_string()),
        ),
    };
    if let Some(n) = note {
        eprintln!("note: {n}");
    }
    let loaded = procedure::load(&a.procedure, &pack).map_err(RunError::from)?;
    run::check_ranges(
        &loaded,
        &instrument::profile::Profile::builtin(
            instrument::profile::ProfileRole::Source,
        ),
        &instrument::profile::Profile::builtin(
            instrument::profile::ProfileRole::Load,
        ),
    )?;
    print!("{}", loaded.plan);
    println!(
        "OK: {} steps, sha256 {}",
        loaded.plan.steps.len(),
        &loaded.sha256[..16]
    );
    if !a.no_dry_run {
        let cfg = sim_config(a.sim_config.as_deref(), false, &[])?;
        let f = crate::dryrun::forecast(&loaded.plan, &cfg);
        if a.json {
            println!("{}", serde_json::to_string_pretty(&f)?);
        } else {
            println!(
                "Dry run on the simulated pack ({:.0} % of rated capacity, {:.2}x new resistance, starting at {:.0} % charge, {} degC; --sim-config to change):",
                cfg.pack.capacity_factor * 100.0,
                cfg.pack.resistance_factor,
                cfg.pack.initial_soc * 100.0,
                cfg.pack.ambient_c
            );
            print!("{f}");
        }
    } else {
        for w in crate::dryrun::plan_warnings(&loaded.plan) {
            println!("  warning: {w}");
        }
    }
    Ok(EXIT_OK)
}

fn parse_date(s: &str) -> Result<NaiveDate, RunError> {
    NaiveDate::parse_from_str(s.trim(), "%Y-%m-%d")
        .map_err(|_| RunError::Pack(format!("'{s}' is not a date; expected YYYY-MM-DD")))
}

fn parse_threshold(s: &str) -> Result<f64, RunError> {
    match units::parse(s) {
        Ok(units::Quantity::Percent(p)) if p > 0.0 && p < 100.0 => Ok(p),
        _ => Err(RunError::Pack(format!(
            "threshold '{s}': expected a percentage such as 80%"
        ))),
    }
}

/// `packbench report`.
pub fn cmd_report(a: ReportArgs) -> anyhow::Result<i32> {
    let summary_path = a.run_dir.join(record::SUMMARY_JSON);
    let text = std::fs::read_to_string(&summary_path)
        .with_context(|| format!("reading {}", summary_path.display()))?;
    let summary: record::Summary = serde_json::from_str(&text)
        .with_context(|| format!("{} is not a packbench summary", summary_path.display()))?;
    let log = record::read::read_samples(&a.run_dir.join(record::SAMPLES_CSV))?;
    let out = a.run_dir.join(record::REPORT_HTML);
    record::write::atomic_write(
        &out,
        report::html::run_report(&summary, &log.samples).as_bytes(),
    )
    .with_context(|| format!("writing {}", out.display()))?;
    print!("{}", report::text::summary(&summary));
    println!("  Report: {}", out.display());
    Ok(EXIT_OK)
}

/// `packbench fade`.
pub fn cmd_fade(a: FadeArgs) -> anyhow::Result<i32> {
    let threshold = parse_threshold(&a.threshold)?;
    let h = history::load(&a.results, &a.pack, a.history.as_deref())?;
    let mut fa = trend::analyze(&h, threshold);
    fa.flag_against(match &a.today {
        Some(d) => parse_date(d)?,
        None => chrono::Utc::now().date_naive(),
    });
    let out = a
        .html
        .clone()
        .unwrap_or_else(|| a.results.join(&a.pack).join("fade.html"));
    let html = report::html::pack_report(&h, &fa, &history::capacity_curves(&h));
    std::fs::write(&out, html).with_context(|| format!("writing {}", out.display()))?;
    if a.json {
        #[derive(serde::Serialize)]
        struct FadeJson<'a> {
            history: &'a history::PackHistory,
            fade: &'a trend::FadeAnalysis,
        }
        println!(
            "{}",
            serde_json::to_string_pretty(&FadeJson {
                history: &h,
                fade: &fa
            })?
        );
    } else {
        print!("{}", report::text::fade(&h, &fa));
        println!("  Report: {}", out.display());
    }
    Ok(EXIT_OK)
}

/// A test interval in whole days: `92d`, `13w` (weeks), or any duration of
/// at least a day (`2160h`).
fn interval_days(text: &str) -> Option<i64> {
    let t = text.trim();
    let weeks = ["weeks", "week", "wk", "w"]
        .iter()
        .find_map(|u| t.strip_suffix(u))
        .and_then(|n| n.trim().parse::<f64>().ok());
    let seconds = match weeks {
        Some(w) => w * 7.0 * 86_400.0,
        None => match units::parse(t) {
            Ok(units::Quantity::Seconds(s)) => s,
            _ => return None,
        },
    };
    (seconds.is_finite() && seconds >= 86_400.0).then(|| (seconds / 86_400.0).round() as i64)
}

/// `packbench fleet`.
pub fn cmd_fleet(a: FleetArgs) -> anyhow::Result<i32> {
    let threshold = parse_threshold(&a.threshold)?;
    let interval = interval_days(&a.interval).ok_or_else(|| {
        RunError::Pack(format!(
            "--interval '{}': expected a duration of at least a day, in days or weeks, e.g. 92d or 13w",
            a.interval
        ))
    })?;
    let today = match &a.today {
        Some(d) => parse_date(d)?,
        None => chrono::Utc::now().date_naive(),
    };
    let f = history::fleet(&a.results, today, interval, threshold)?;
    if let Some(path) = &a.html {
        let mut hs = Vec::new();
        for r in &f.rows {
            hs.push(history::load(&a.results, &r.pack_id, None)?);
        }
        std::fs::write(path, report::html::fleet_report(&f, &hs, "Battery fleet"))
            .with_context(|| format!("writing {}", path.display()))?;
    }
    if a.json {
        println!("{}", serde_json::to_string_pretty(&f)?);
    } else if a.csv {
        print!("{}", fleet::to_csv(&f)?);
    } else {
        print!("{}", report::text::fleet(&f));
    }
    Ok(EXIT_OK)
}

/// `packbench demo`.
pub fn cmd_demo(a: DemoArgs) -> anyhow::Result<i32> {
    let t = std::time::Instant::now();
    let d = crate::demo::run_demo(&a.out)?;
    print!("{}", report::text::fleet(&d.fleet));
    println!(
        "\nDemo: {} tests of {} packs on the simulated bench in {:.1} s.",
        d.runs,
        d.pack_reports.len(),
        t.elapsed().as_secs_f64()
    );
    println!("Open the fleet report:   {}", d.fleet_report.display());
    println!(
        "Pack fade reports:       {}",
        d.results.join("<pack>/fade.html").display()
    );
    println!(
        "Run reports and grades:  {}",
        d.results.join("<pack>/<run>/report.html").display()
    );
    Ok(EXIT_OK)
}

/// Parse arguments, dispatch, return the exit code.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() {
                EXIT_BAD_INPUT
            } else {
                EXIT_OK
            };
        }
    };
    let result = match cli.command {
        Command::Run(a) => return cmd_run(a),
        Command::Resume(a) => return cmd_resume(a),
        Command::Check(a) => cmd_check(a).context("check failed"),
        Command::Report(a) => cmd_report(a).context("report failed"),
        Command::Fade(a) => cmd_fade(a).context("fade analysis failed"),
        Command::Fleet(a) => cmd_fleet(a).context("fleet view failed"),
        Command::Demo(a) => cmd_demo(a).context("demo failed"),
        Command::Analyze(a) => crate::analyze_cmd::cmd_analyze(a).context("analysis failed"),
        Command::Peukert(a) => crate::analyze_cmd::cmd_peukert(a).context("peukert failed"),
        Command::Ports => crate::setup::cmd_ports().context("listing ports failed"),
        Command::Probe(a) => crate::setup::cmd_probe(a).context("probe failed"),
        Command::Sim(a) => crate::setup::cmd_sim(a).context("sim failed"),
    };
    match result {
        Ok(code) => code,
        Err(e) => {
            // A pack, run folder, log or history file that is missing or
            // malformed is bad input, whatever the command.
            let input = e.downcast_ref::<RunError>().is_some_and(RunError::is_input)
                || e.downcast_ref::<history::HistoryError>().is_some()
                || e.downcast_ref::<record::read::ReadError>().is_some();
            eprintln!("error: {:#}", anyhow!(e));
            if input {
                EXIT_BAD_INPUT
            } else {
                EXIT_FAILURE
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn test_intervals_in_days_or_weeks() {
        assert_eq!(interval_days("92d"), Some(92));
        assert_eq!(interval_days("13w"), Some(91));
        assert_eq!(interval_days("13 weeks"), Some(91));
        assert_eq!(interval_days("2160h"), Some(90));
        assert_eq!(interval_days("12h"), None);
        assert_eq!(interval_days("13W"), None, "watts are no interval");
        assert_eq!(interval_days("soon"), None);
    }
}
