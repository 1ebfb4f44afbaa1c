//! `packbench check`: validate a procedure against a pack and forecast it.

use crate::cli::args::pack_from_args;
use crate::cli::args::sim_config;
use crate::cli::args::PackArgs;
use crate::cli::exit::ExitCode;
use crate::session::error::RunError;
use crate::session::request::PackSource;
use clap::Args;
use model::procedure;
use std::path::PathBuf;

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

/// `packbench check`.
pub fn cmd_check(a: CheckArgs) -> anyhow::Result<ExitCode> {
    let given = pack_from_args(&a.pack_args)?;
    let (pack, note) = match (&a.pack, given) {
        (Some(id), g) => {
            let src = match g {
                Some(p) => PackSource::Given(p),
                None => PackSource::Saved {
                    allow_sim_default: true,
                },
            };
            let (p, _, note) = crate::session::prepare::resolve_pack(id, &src, &a.results)?;
            (p, note)
        }
        (None, Some(p)) => (p, None),
        (None, None) => (
            crate::session::request::default_sim_pack(),
            Some("no pack given: checking against the simulated bench's pack".to_string()),
        ),
    };
    if let Some(n) = note {
        eprintln!("note: {n}");
    }
    let loaded = procedure::load(&a.procedure, &pack).map_err(RunError::from)?;
    crate::session::prepare::check_ranges(
        &loaded,
        &instrument::profile::Profile::builtin(instrument::profile::ProfileRole::Source),
        &instrument::profile::Profile::builtin(instrument::profile::ProfileRole::Load),
    )?;
    print!("{}", loaded.plan);
    println!(
        "OK: {} steps, sha256 {}",
        loaded.plan.steps.len(),
        &loaded.sha256[..16]
    );
    if !a.no_dry_run {
        let cfg = sim_config(a.sim_config.as_deref(), false, &[])?;
        let f = crate::session::forecast::forecast(&loaded.plan, &cfg);
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
        for w in crate::session::forecast::plan_warnings(&loaded.plan) {
            println!("  warning: {w}");
        }
    }
    Ok(ExitCode::Ok)
}
