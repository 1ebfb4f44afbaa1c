//! `packbench run`: one test, or every station of a bench file at once.

use crate::cli::args::display_mode;
use crate::cli::args::pack_from_args;
use crate::cli::args::parse_date;
use crate::cli::args::parse_speed;
use crate::cli::args::parse_threshold;
use crate::cli::args::sim_config;
use crate::cli::args::PackArgs;
use crate::cli::args::{bms_from_args, BmsArgs};
use crate::cli::exit::report_error;
use crate::cli::exit::ExitCode;
use crate::session;
use crate::session::error::Failure;
use crate::session::error::RunError;
use crate::session::request::PackSource;
use crate::session::request::RunOptions;
use crate::session::request::RunRequest;
use analysis::fade::grade::Policy;
use clap::Args;
use engine::control::StopHandle;
use std::path::PathBuf;

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
    #[command(flatten)]
    pub bms_args: BmsArgs,
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
    /// How long the safe stop keeps switching off and reading back an
    /// output it cannot confirm off before it says the output may still
    /// be on (exit 4).
    #[arg(long, default_value = "60s")]
    pub safe_stop_hold: String,
}

/// `--safe-stop-hold`: a duration of at least one second.
pub fn parse_hold(text: &str) -> Result<f64, RunError> {
    match model::units::duration(text) {
        Ok(s) if s.is_finite() && (1.0..=86_400.0).contains(&s) => Ok(s),
        _ => Err(RunError::arguments(format!(
            "--safe-stop-hold '{text}': expected a duration from 1s to 24h, e.g. 60s"
        ))),
    }
}

/// Everything `run` checks before it touches an instrument.
pub fn prepare_run(a: &RunArgs) -> Result<Vec<crate::session::request::StationJob>, RunError> {
    let speed = parse_speed(&a.speed)?;
    let given = pack_from_args(&a.pack_args)?;
    let mut options = RunOptions::default();
    if let Some(d) = &a.test_date {
        options.test_date = parse_date(d)?;
    }
    if let Some(c) = a.cycle_count {
        if !(c.is_finite() && c >= 0.0) {
            return Err(RunError::arguments(format!(
                "--cycle-count {c}: expected a count of 0 or more"
            )));
        }
        options.cycle_count = Some(c);
    }
    options.bms = bms_from_args(&a.bms_args)?;
    if let Some(path) = &a.policy {
        let text = model::procedure::read_text(path)
            .map_err(crate::session::error::input_file_err(path))?;
        options.policy = Policy::from_toml(path, &text)?;
    }
    if let Some(t) = &a.alarm_below {
        options.alarm_below_pct = Some(parse_threshold(t).map_err(|_| {
            RunError::arguments(format!(
                "--alarm-below '{t}': expected a percentage of the rated capacity, e.g. 80%"
            ))
        })?);
    }
    options.trace = a.trace;
    options.safe_stop_hold_s = parse_hold(&a.safe_stop_hold)?;
    let cfg = sim_config(a.sim_config.as_deref(), a.sim_ideal, &a.fault)?;
    let Some(path) = &a.bench else {
        let pack_id = a
            .pack
            .clone()
            .ok_or_else(|| RunError::arguments("--pack is needed: the pack's id"))?;
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
        let bench = crate::session::request::JobBench::Sim {
            cfg,
            speed,
            station: None,
        };
        return Ok(vec![crate::session::stations::job("sim", &req, bench)?]);
    };
    // A bench file: one station, or all of them at once. The bench file,
    // every station's pack, procedure and profiles are checked before any
    // link is opened.
    let bench = crate::session::benchfile::BenchFile::load(path)?;
    let stations: Vec<crate::session::benchfile::StationSpec> =
        match (&a.station, bench.stations.len()) {
            (Some(n), _) => vec![bench.station(Some(n)).map_err(RunError::arguments)?.clone()],
            (None, 1) => vec![bench.stations[0].clone()],
            (None, _) => bench.stations.clone(),
        };
    let several = stations.len() > 1;
    if several && (a.pack.is_some() || given.is_some()) {
        return Err(RunError::arguments(format!(
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
                return Err(RunError::arguments(format!(
                    "station '{}' names no pack: give --pack or pack = \"...\" in {}",
                    st.name,
                    path.display()
                )))
            }
        };
        let pack = match (&given, &st.pack_spec) {
            (Some(g), _) => PackSource::Given(g.clone()),
            (None, Some(f)) => PackSource::Given(crate::session::prepare::read_pack_file(f)?),
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
        let station_cfg = match &st.sim_config {
            Some(f) => sim_config(Some(f), a.sim_ideal, &a.fault)?,
            None => cfg.clone(),
        };
        if !st.is_simulated() && (a.sim_config.is_some() || a.sim_ideal || !a.fault.is_empty()) {
            return Err(RunError::arguments("--sim-config, --sim-ideal and --fault are for the embedded simulated bench (links \"sim\"), not for real instruments"));
        }
        let name = st.name.clone();
        let bench =
            crate::session::request::JobBench::of_station(st, path.clone(), station_cfg, speed);
        jobs.push(crate::session::stations::job(&name, &req, bench)?);
    }
    if several {
        let mut seen = std::collections::HashSet::new();
        for j in &jobs {
            if !seen.insert(j.prepared.pack_dir.clone()) {
                return Err(RunError::arguments(format!(
                    "pack '{}' is on two stations at once",
                    j.prepared.pack_id
                )));
            }
        }
    }
    Ok(jobs)
}

/// `packbench run`: one station, or every station of a bench file at once
/// (one task each, each with its own results folder and envelope).
pub fn cmd_run(a: RunArgs) -> ExitCode {
    let (jobs, mode) =
        match prepare_run(&a).and_then(|j| Ok((j, display_mode(a.quiet, &a.status_every)?))) {
            Ok(x) => x,
            Err(e) => return report_error(&e),
        };
    for j in &jobs {
        if let (Some(n), false) = (&j.prepared.pack_note, a.quiet) {
            eprintln!("note: {}: {n}", j.name);
        }
        if let crate::session::request::JobBench::Station { pace, .. } = j.bench {
            if pace != 1.0 {
                eprintln!("note: pacing the bench at {pace}x real time: only meaningful against a sped-up simulator");
            }
        }
    }
    // One process per station: held until this run ends.
    #[cfg(unix)]
    let mut _held = Vec::new();
    #[cfg(unix)]
    for j in &jobs {
        if let Some((st, file)) = j.bench.station() {
            match crate::session::benchfile::lock_station(file, st) {
                Ok(l) => _held.push(l),
                Err(e) => return report_error(&e),
            }
        }
    }
    // A paced run on a live bench: the computer must not sleep.
    let paced = jobs
        .iter()
        .any(|j| j.bench.paced() || j.bench.station().is_some());
    let _awake = paced.then(stay_awake);
    let several = jobs.len() > 1;
    let jobs = std::rc::Rc::new(jobs);
    let boards = jobs.iter().map(|j| j.board.clone()).collect();
    let tasks: Vec<StationTask> = (0..jobs.len())
        .map(|k| {
            let jobs = std::rc::Rc::clone(&jobs);
            Box::new(move |stop, em| {
                Box::pin(
                    async move { session::run(jobs[k].session(stop, em, several, None)).await },
                ) as StationFuture
            }) as StationTask
        })
        .collect();
    let Some(results) = run_stations(boards, mode, tasks) else {
        return ExitCode::Failure;
    };
    if !several {
        return match results.into_iter().next() {
            Some(Ok(r)) => {
                print_result(&r, a.quiet);
                ExitCode::of_report(&r)
            }
            Some(Err(e)) => report_error(&e),
            None => ExitCode::Failure,
        };
    }
    let names: Vec<(String, String)> = jobs
        .iter()
        .map(|j| (j.name.clone(), j.prepared.pack_id.clone()))
        .collect();
    let codes = station_end_lines(&names, &results);
    if codes.contains(&ExitCode::Interrupted) {
        if let Some(b) = &a.bench {
            println!(
                "To go on with these stations: packbench resume --bench {} --results {}",
                shell_word(&b.display().to_string()),
                shell_word(&a.results.display().to_string())
            );
        }
    }
    ExitCode::worst(codes)
}

/// One station's work, started on the shared thread with the stop handle
/// and the last-resort switch-off.
pub type StationFuture = std::pin::Pin<
    Box<dyn std::future::Future<Output = Result<crate::session::request::RunReport, RunError>>>,
>;

pub type StationTask =
    Box<dyn FnOnce(StopHandle, crate::session::emergency::Emergency) -> StationFuture>;

/// Run stations at once, one task each on one thread, with Ctrl-C handled
/// and their live boards shown; one result per task, in order. None when
/// the runtime cannot start (said).
pub fn run_stations(
    boards: Vec<crate::session::live::Board>,
    mode: crate::session::live::DisplayMode,
    tasks: Vec<StationTask>,
) -> Option<Vec<Result<crate::session::request::RunReport, RunError>>> {
    let stop = StopHandle::new();
    let emergency = crate::session::emergency::Emergency::default();
    let ran = crate::session::stations::block_on_local(async {
        spawn_interrupts(stop.clone(), emergency.clone());
        let shown = tokio::task::spawn_local(crate::session::live::display(boards.clone(), mode));
        let running: Vec<_> = tasks
            .into_iter()
            .map(|t| tokio::task::spawn_local(t(stop.clone(), emergency.clone())))
            .collect();
        let mut out = Vec::new();
        for (t, board) in running.into_iter().zip(&boards) {
            out.push(match t.await {
                Ok(r) => r,
                Err(e) => Err(Failure::StationTask(e.to_string()).into()),
            });
            board.update(|l| {
                if !l.is_final() {
                    l.state = crate::session::live::BoardState::Failed;
                }
            });
        }
        let _ = shown.await;
        out
    });
    match ran {
        Ok(out) => Some(out),
        Err(e) => {
            eprintln!("error: {e}");
            None
        }
    }
}

/// One end line per station (name, pack); each station's exit code (a
/// station that failed to run is a failure).
pub fn station_end_lines(
    names: &[(String, String)],
    results: &[Result<crate::session::request::RunReport, RunError>],
) -> Vec<ExitCode> {
    let mut codes = Vec::new();
    for ((name, pack), r) in names.iter().zip(results) {
        match r {
            Ok(r) => {
                codes.push(ExitCode::of_report(r));
                println!("{}", station_line(name, pack, r));
                say_outputs_and_record(r);
            }
            Err(e) => {
                codes.push(ExitCode::of_error(e));
                println!("{name:<12} {pack:<10} failed      {e}");
            }
        }
    }
    codes
}

/// The figures a run ends with, on one line: the capacity measured, the
/// state of health (on the capacity at rated conditions) and the grade;
/// else why it stopped.
pub fn result_figures(s: &record::Summary) -> String {
    // Every figure from the verdict: the capacity the state of health is
    // computed from (corrected), then SoH and grade.
    let v = &s.verdict;
    let mut parts = Vec::new();
    match (v.corrected_ah.get(), v.measured_ah.get()) {
        (Some(c), _) => parts.push(format!(
            "{c:.3}{}Ah",
            record::budget::pm_short(&v.uncertainty.corrected_ah)
        )),
        (None, Some(m)) => parts.push(format!(
            "{m:.3}{}Ah measured",
            record::budget::pm_short(&v.uncertainty.measured_ah)
        )),
        (None, None) => {
            if let Some(r) = &s.stop_reason {
                parts.push(r.clone());
            }
        }
    }
    if s.capacity.is_some() {
        match v.soh_pct.get() {
            Some(p) => parts.push(format!(
                "SOH {p:.1}%{}",
                record::budget::pm_short(&v.uncertainty.soh_pct)
            )),
            None => parts.push(format!(
                "no SOH ({})",
                v.soh_pct.why().map(|w| w.words()).unwrap_or_default()
            )),
        }
    }
    if let Some(g) = v.grade.value() {
        let how = match &g.decision {
            Some(d) if d.retest => " (retest)",
            Some(d) if d.conditional => " (conditional)",
            _ => "",
        };
        parts.push(format!("grade {}{how}", g.label));
    }
    parts.join(" ")
}

/// One station's end line.
pub fn station_line(name: &str, pack_id: &str, r: &crate::session::request::RunReport) -> String {
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
pub fn spawn_interrupts(stop: StopHandle, em: crate::session::emergency::Emergency) {
    tokio::task::spawn_local(async move {
        if tokio::signal::ctrl_c().await.is_err() {
            return;
        }
        eprintln!("\nCtrl-C: stopping safely (outputs off, confirmed) ... press Ctrl-C again to quit at once");
        stop.request_stop();
        if tokio::signal::ctrl_c().await.is_ok() {
            last_switch_off(&em).await;
        }
    });
}

/// The second Ctrl-C: the safe state once more on fresh links to every
/// registered instrument, each said, then quit at once.
pub async fn last_switch_off(em: &crate::session::emergency::Emergency) -> ! {
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
    std::process::exit(ExitCode::SecondInterrupt.code());
}

pub fn print_result(r: &crate::session::request::RunReport, quiet: bool) {
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
    say_outputs_and_record(r);
    if ExitCode::of_report(r) == ExitCode::Interrupted {
        println!(
            "To go on with this run: packbench resume {}",
            shell_word(&r.run_dir.display().to_string())
        );
    }
}

/// Ask the OS not to suspend while this process runs a test; say so when
/// it cannot be asked.
pub fn stay_awake() -> crate::session::awake::StayAwake {
    let (g, note) = crate::session::awake::StayAwake::ask("a battery test is running");
    if let Some(n) = note {
        eprintln!("note: {n}");
    }
    g
}

/// What the operator must act on, on the error stream whatever `--quiet`
/// says: an output that may still be on, and a record that is not whole.
pub fn say_outputs_and_record(r: &crate::session::request::RunReport) {
    if !r.outcome.may_be_on.is_empty() {
        eprintln!(
            "DANGER: {}",
            crate::session::finish::outputs_line(&r.outcome)
        );
    } else if r.outcome.status != model::status::RunState::Completed {
        eprintln!("{}", crate::session::finish::outputs_line(&r.outcome));
    }
    for u in &r.unwritten {
        eprintln!("the record is not whole: {u}");
    }
}

/// A path as one shell word (quoted when it holds anything but plain
/// characters), so the printed command can be pasted as it is.
pub fn shell_word(s: &str) -> String {
    if !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./:+@%=,".contains(c))
    {
        s.to_string()
    } else {
        format!("'{}'", s.replace('\'', "'\\''"))
    }
}
