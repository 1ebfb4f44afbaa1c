//! The command line: clap definitions, one function per subcommand, Ctrl-C,
//! exit codes. No TOML parsing and no SCPI here.
//!
//! Exit codes: 0 completed, 1 failure while running (I/O, instrument
//! connection), 2 bad input (arguments, procedure, pack spec, pack id),
//! 3 safety stop or instrument fault (run aborted), 5 interrupted (Ctrl-C).

use crate::engine::control::StopHandle;
use crate::pack::{parse_rate, Chemistry, PackSpec};
use crate::procedure;
use crate::report;
use crate::run::{self, PackSource, RunError, RunRequest, Speed};
use crate::sim::SimConfig;
use crate::units;
use anyhow::{anyhow, Context};
use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

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
    /// Validate a procedure for a pack and print the resolved plan.
    Check(CheckArgs),
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
    /// A pack spec TOML file instead of the options above.
    #[arg(long, conflicts_with_all = ["chemistry", "series", "rated", "rated_energy", "rated_rate"])]
    pub pack_spec: Option<PathBuf>,
}

#[derive(Debug, Args)]
pub struct RunArgs {
    /// Procedure file (TOML).
    pub procedure: PathBuf,
    /// Use the simulated bench. It is also the default: this version has
    /// no bench files yet, so every run uses the simulated bench.
    #[arg(long)]
    pub sim: bool,
    /// Pack id: letters, digits, '-', '_', '.'; becomes the results folder.
    #[arg(long)]
    pub pack: String,
    #[command(flatten)]
    pub pack_args: PackArgs,
    /// Results folder.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// Pace of the simulated bench: max, or bench seconds per second (1 = real time).
    #[arg(long, default_value = "max")]
    pub speed: String,
    /// Simulated bench settings (pack condition, meter errors, faults), TOML.
    #[arg(long)]
    pub sim_config: Option<PathBuf>,
    /// Simulated instruments without measurement error.
    #[arg(long)]
    pub sim_ideal: bool,
    /// Print only the final summary line.
    #[arg(long)]
    pub quiet: bool,
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
}

/// Build a pack spec from the options, if any were given.
fn pack_from_args(a: &PackArgs) -> Result<Option<PackSpec>, RunError> {
    if let Some(path) = &a.pack_spec {
        return run::read_pack_file(path).map(Some);
    }
    if a.chemistry.is_none() && a.series.is_none() && a.rated.is_none() {
        if a.rated_energy.is_some() || a.rated_rate.is_some() {
            return Err(RunError::Pack(
                "--rated-energy and --rated-rate need --chemistry, --series and --rated".into(),
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
    let spec = PackSpec {
        chemistry,
        series: a.series.unwrap_or(0),
        rated_capacity_ah: rated,
        rated_energy_wh: energy,
        rated_rate_c: rate,
    };
    spec.check().map_err(RunError::Pack)?;
    Ok(Some(spec))
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

/// `packbench run`.
pub fn cmd_run(a: RunArgs) -> i32 {
    let prepared = (|| -> Result<_, RunError> {
        let speed = parse_speed(&a.speed)?;
        let given = pack_from_args(&a.pack_args)?;
        let req = RunRequest {
            procedure: a.procedure.clone(),
            pack_id: a.pack.clone(),
            pack: match given {
                Some(p) => PackSource::Given(p),
                None => PackSource::Saved {
                    allow_sim_default: true,
                },
            },
            results: a.results.clone(),
        };
        let mut cfg = match &a.sim_config {
            Some(path) => {
                let text = std::fs::read_to_string(path).map_err(|source| RunError::Io {
                    path: path.clone(),
                    source,
                })?;
                SimConfig::from_toml(path, &text)?
            }
            None => SimConfig::default(),
        };
        if a.sim_ideal {
            cfg.ideal = true;
        }
        Ok((run::prepare(&req)?, cfg, speed))
    })();
    let (prepared, cfg, speed) = match prepared {
        Ok(p) => p,
        Err(e) => return report_error(&e),
    };
    if let Some(n) = &prepared.pack_note {
        if !a.quiet {
            eprintln!("note: {n}");
        }
    }
    let rt = match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("error: cannot start the runtime: {e}");
            return EXIT_FAILURE;
        }
    };
    let stop = StopHandle::new();
    let result = rt.block_on(async {
        let s = stop.clone();
        tokio::spawn(async move {
            if tokio::signal::ctrl_c().await.is_ok() {
                eprintln!("\nCtrl-C: stopping safely (outputs off) ...");
                s.request_stop();
            }
        });
        run::execute_sim(&prepared, &cfg, speed, stop.clone()).await
    });
    match result {
        Ok(r) => {
            if a.quiet {
                println!(
                    "{} {} {}",
                    r.summary.status,
                    r.run_dir.display(),
                    r.summary
                        .capacity
                        .as_ref()
                        .map(|c| format!("{:.3}Ah", c.measured_ah))
                        .unwrap_or_default()
                );
            } else {
                print!("{}", report::text::summary(&r.summary));
                println!("  Results: {}", r.run_dir.display());
            }
            r.exit_code()
        }
        Err(e) => report_error(&e),
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
        &crate::instrument::profile::Profile::builtin(
            crate::instrument::profile::ProfileRole::Source,
        ),
        &crate::instrument::profile::Profile::builtin(
            crate::instrument::profile::ProfileRole::Load,
        ),
    )?;
    print!("{}", loaded.plan);
    println!(
        "OK: {} steps, sha256 {}",
        loaded.plan.steps.len(),
        &loaded.sha256[..16]
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
    match cli.command {
        Command::Run(a) => cmd_run(a),
        Command::Check(a) => match cmd_check(a).context("check failed") {
            Ok(code) => code,
            Err(e) => {
                let input = e.downcast_ref::<RunError>().is_some_and(RunError::is_input);
                eprintln!("error: {:#}", anyhow!(e));
                if input {
                    EXIT_BAD_INPUT
                } else {
                    EXIT_FAILURE
                }
            }
        },
    }
}
