//! The command line: the argument types of each command and one file per
//! command. Exit codes live in [`exit`]. No TOML parsing and no SCPI here.

pub mod analyze;
pub mod args;
pub mod calibrate;
pub mod characterize;
pub mod check;
pub mod demo;
pub mod exchange;
pub mod exit;
pub mod fade;
pub mod import;
pub mod quick;
pub mod resume;
pub mod run;
pub mod serve;
pub mod setup;

use crate::cli::check::cmd_check;
use crate::cli::check::CheckArgs;
use crate::cli::demo::cmd_demo;
use crate::cli::demo::DemoArgs;
use crate::cli::exit::ExitCode;
use crate::cli::fade::cmd_fade;
use crate::cli::fade::cmd_fleet;
use crate::cli::fade::cmd_report;
use crate::cli::fade::FadeArgs;
use crate::cli::fade::FleetArgs;
use crate::cli::fade::ReportArgs;
use crate::cli::resume::cmd_resume;
use crate::cli::resume::ResumeArgs;
use crate::cli::run::cmd_run;
use crate::cli::run::RunArgs;
use crate::session::error::RunError;
use anyhow::{anyhow, Context};
use clap::{Parser, Subcommand};
use record::history;

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
    Analyze(crate::cli::analyze::AnalyzeArgs),
    /// Bring a test from another bench into a pack's history (analysed as
    /// `analyze` does, kept as a run marked imported; a file once only).
    Import(crate::cli::import::ImportArgs),
    /// Bring the results index (results/index.sqlite) up to the run folders.
    Index(crate::cli::fade::IndexArgs),
    /// Push every run not yet there to a central PostgreSQL store (many benches, one fleet).
    Sync(crate::cli::exchange::SyncArgs),
    /// Write a run's or a pack's records as CSV, Parquet or the Battery Data Format.
    Export(crate::cli::exchange::ExportArgs),
    /// The shop's screen: run the bays and read the results in a browser.
    Serve(crate::cli::serve::ServeArgs),
    /// Pulse-power levels of a log as OCV, equivalent-circuit and power
    /// tables (CSV, JSON, C header).
    Characterize(crate::cli::characterize::CharacterizeArgs),
    /// Check the bench's current and voltage readings against a reference
    /// meter and keep the calibration record runs apply.
    Calibrate(crate::cli::calibrate::CalibrateArgs),
    /// Peukert exponent from two capacity runs of a pack at different rates.
    Peukert(crate::cli::analyze::PeukertArgs),
    /// Estimate a pack's capacity from a screening run and its family's calibration.
    GradeQuick(crate::cli::quick::QuickArgs),
    /// List the serial ports of this machine.
    Ports,
    /// Check an instrument's link and profile: identify, error queue, voltage, current.
    Probe(crate::cli::setup::ProbeArgs),
    /// The simulated bench as real endpoints.
    Sim(crate::cli::setup::SimArgs),
}

/// Parse arguments, dispatch, return the exit code.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() {
                ExitCode::BadInput
            } else {
                ExitCode::Ok
            }
            .code();
        }
    };
    let result = match cli.command {
        Command::Run(a) => return cmd_run(a).code(),
        Command::Resume(a) => return cmd_resume(a).code(),
        Command::Check(a) => cmd_check(a).context("check failed"),
        Command::Report(a) => cmd_report(a).context("report failed"),
        Command::Fade(a) => cmd_fade(a).context("fade analysis failed"),
        Command::Fleet(a) => cmd_fleet(a).context("fleet view failed"),
        Command::Demo(a) => cmd_demo(a).context("demo failed"),
        Command::Analyze(a) => crate::cli::analyze::cmd_analyze(a).context("analysis failed"),
        Command::Import(a) => crate::cli::import::cmd_import(a).context("import failed"),
        Command::Index(a) => crate::cli::fade::cmd_index(a).context("index failed"),
        Command::Sync(a) => crate::cli::exchange::cmd_sync(a).context("sync failed"),
        Command::Export(a) => crate::cli::exchange::cmd_export(a).context("export failed"),
        Command::Serve(a) => crate::cli::serve::cmd_serve(a).context("console failed"),
        Command::Characterize(a) => {
            crate::cli::characterize::cmd_characterize(a).context("characterization failed")
        }
        Command::Calibrate(a) => {
            crate::cli::calibrate::cmd_calibrate(a).context("calibration failed")
        }
        Command::Peukert(a) => crate::cli::analyze::cmd_peukert(a).context("peukert failed"),
        Command::GradeQuick(a) => crate::cli::quick::cmd_quick(a).context("quick grade failed"),
        Command::Ports => crate::cli::setup::cmd_ports().context("listing ports failed"),
        Command::Probe(a) => crate::cli::setup::cmd_probe(a).context("probe failed"),
        Command::Sim(a) => crate::cli::setup::cmd_sim(a).context("sim failed"),
    };
    match result {
        Ok(code) => code.code(),
        Err(e) => {
            // A pack, run folder, log or history file that is missing or
            // malformed is bad input, whatever the command.
            let input = e.downcast_ref::<RunError>().is_some_and(RunError::is_input)
                || e.downcast_ref::<history::HistoryError>().is_some()
                || matches!(
                    e.downcast_ref::<record::index::IndexError>(),
                    Some(
                        record::index::IndexError::History(_)
                            | record::index::IndexError::Newer { .. }
                    )
                )
                || e.downcast_ref::<record::read::ReadError>().is_some()
                || matches!(
                    e.downcast_ref::<::exchange::central::CentralError>(),
                    Some(
                        ::exchange::central::CentralError::History(_)
                            | ::exchange::central::CentralError::Read(_)
                            | ::exchange::central::CentralError::Config(_)
                    )
                )
                || e.downcast_ref::<::exchange::export::ExportError>()
                    .is_some();
            eprintln!("error: {:#}", anyhow!(e));
            if input {
                ExitCode::BadInput.code()
            } else {
                ExitCode::Failure.code()
            }
        }
    }
}
