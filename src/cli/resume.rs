//! `packbench resume`: go on with an interrupted run.

use crate::cli::args::display_mode;
use crate::cli::args::parse_speed;
use crate::cli::exit::report_error;
use crate::cli::exit::ExitCode;
use crate::cli::run::print_result;
use crate::cli::run::run_stations;
use crate::cli::run::station_end_lines;
use crate::cli::run::StationFuture;
use crate::cli::run::StationTask;
use crate::session::error::RunError;
use crate::session::request::Speed;
use analysis::fade::grade::Policy;
use clap::Args;
use std::path::{Path, PathBuf};

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

/// `packbench resume`.
pub fn cmd_resume(a: ResumeArgs) -> ExitCode {
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
            let text = model::procedure::read_text(path)
                .map_err(crate::session::error::input_file_err(path))?;
            Some(Policy::from_toml(path, &text)?)
        }
        None => None,
    };
    Ok((speed, policy))
}

/// Resume one run folder.
fn resume_one(a: &ResumeArgs, run_dir: &Path) -> ExitCode {
    let setup = resume_options(a).and_then(|(speed, policy)| {
        crate::session::resume::prepare(run_dir, a.bench.as_deref(), speed, policy)
    });
    let setup = match setup {
        Ok(s) => s,
        Err(e) => return report_error(&e),
    };
    // The station's instruments, held until the run ends.
    #[cfg(unix)]
    let _held = match &setup.station {
        Some((st, file)) => match crate::session::benchfile::lock_station(file, st) {
            Ok(l) => l,
            Err(e) => return report_error(&e),
        },
        None => Vec::new(),
    };
    let mode = match display_mode(a.quiet, &a.status_every) {
        Ok(m) => m,
        Err(e) => return report_error(&e),
    };
    if !a.quiet {
        match &setup.found {
            crate::session::resume::Found::GoOn(p) => eprintln!(
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
            crate::session::resume::Found::Recorded { status, .. } => eprintln!(
                "the run had ended ({status}) but its record was not finished: writing it"
            ),
        }
    }
    let _awake = crate::cli::run::stay_awake();
    let board = crate::session::live::Board::new("resume", &setup.prepared.pack_id);
    let task: StationTask = Box::new({
        let board = board.clone();
        move |stop, em| {
            Box::pin(crate::session::resume::execute(setup, board, stop, em)) as StationFuture
        }
    });
    let Some(result) =
        run_stations(vec![board], mode, vec![task]).and_then(|r| r.into_iter().next())
    else {
        return ExitCode::Failure;
    };
    match result {
        Ok(r) => {
            print_result(&r, a.quiet);
            ExitCode::of_report(&r)
        }
        Err(e) => report_error(&e),
    }
}

/// `resume --bench FILE`: every station of the bench whose pack's latest
/// run was interrupted (or its process died), all checked before any is
/// resumed, then run at once as `run` runs them.
fn resume_bench(a: &ResumeArgs) -> ExitCode {
    let setups = (|| -> Result<Vec<(String, crate::session::resume::ResumeSetup)>, RunError> {
        let Some(file) = &a.bench else {
            return Err(RunError::arguments("give a run folder or --bench FILE"));
        };
        let (speed, policy) = resume_options(a)?;
        let bench = crate::session::benchfile::BenchFile::load(file)?;
        let found = crate::session::resume::interrupted_runs(&bench, &a.results)?;
        if found.is_empty() {
            return Err(RunError::arguments(format!(
                "no interrupted run of {}'s stations under {}: nothing to resume",
                file.display(),
                a.results.display()
            )));
        }
        found
            .into_iter()
            .map(|(station, dir)| {
                crate::session::resume::prepare(&dir, Some(file), speed, policy.clone())
                    .map(|s| (station, s))
            })
            .collect()
    })();
    let setups = match setups {
        Ok(s) => s,
        Err(e) => return report_error(&e),
    };
    #[cfg(unix)]
    let mut _held = Vec::new();
    #[cfg(unix)]
    for (_, s) in &setups {
        if let Some((st, file)) = &s.station {
            match crate::session::benchfile::lock_station(file, st) {
                Ok(l) => _held.push(l),
                Err(e) => return report_error(&e),
            }
        }
    }
    let mode = match display_mode(a.quiet, &a.status_every) {
        Ok(m) => m,
        Err(e) => return report_error(&e),
    };
    for (name, s) in &setups {
        if !a.quiet {
            eprintln!("resuming {name}: {}", s.dir.display());
        }
    }
    let _awake = crate::cli::run::stay_awake();
    let names: Vec<(String, String)> = setups
        .iter()
        .map(|(n, s)| (n.clone(), s.prepared.pack_id.clone()))
        .collect();
    let boards: Vec<crate::session::live::Board> = names
        .iter()
        .map(|(n, p)| crate::session::live::Board::new(n, p))
        .collect();
    let tasks: Vec<StationTask> = setups
        .into_iter()
        .zip(boards.clone())
        .map(|((_, setup), board)| {
            Box::new(move |stop, em| {
                Box::pin(crate::session::resume::execute(setup, board, stop, em)) as StationFuture
            }) as StationTask
        })
        .collect();
    let Some(results) = run_stations(boards, mode, tasks) else {
        return ExitCode::Failure;
    };
    ExitCode::worst(station_end_lines(&names, &results))
}
