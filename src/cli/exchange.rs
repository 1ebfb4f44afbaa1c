//! `packbench export` (open formats for other tools) and `packbench sync`
//! (push results to the central PostgreSQL store).

use crate::cli::exit::ExitCode;
use crate::session::error::RunError;
use anyhow::Context;
use clap::Args;
use exchange::central;
use exchange::export::{self, Format};
use std::path::{Path, PathBuf};

#[derive(Debug, Args)]
pub struct ExportArgs {
    /// A run folder or a pack folder (results/<pack>[/<run>]), or a pack
    /// id or `<pack>/<run>` under --results.
    pub target: String,
    /// csv (the record's tables), parquet (the same, with the run's
    /// metadata in each file), or bdf (the Battery Data Format, CSV and
    /// Parquet, with a metadata file beside them).
    #[arg(long, default_value = "parquet")]
    pub format: String,
    /// Where to write (default: export/ in the current folder).
    #[arg(long, default_value = "export")]
    pub out: PathBuf,
    /// Results folder, for a pack id or `<pack>/<run>`.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
}

#[derive(Debug, Args)]
pub struct SyncArgs {
    /// The central store: a postgres:// URL or key=value connection
    /// string; what it leaves out (all of it, without --to) comes from
    /// PGHOST, PGPORT, PGUSER, PGPASSWORD, PGDATABASE, PGSSLMODE,
    /// PGSSLROOTCERT, as for the usual PostgreSQL clients.
    #[arg(long)]
    pub to: Option<String>,
    /// Results folder.
    #[arg(default_value = "results")]
    pub results: PathBuf,
    /// The name this bench's rows carry (default: this machine's host name).
    #[arg(long)]
    pub bench: Option<String>,
    /// Push every sample too (the samples table), not only the figures,
    /// steps, cycles and events.
    #[arg(long)]
    pub samples: bool,
}

/// The folder an export target names: a path that exists, else a pack id
/// (or `<pack>/<run>`) under the results folder, checked as the CLI checks
/// pack ids everywhere (no escaping the results folder).
fn resolve(target: &str, results: &Path) -> Result<PathBuf, RunError> {
    let as_path = Path::new(target);
    if as_path.is_dir() {
        return Ok(as_path.to_path_buf());
    }
    let mut parts = target.splitn(2, '/');
    let pack = parts.next().unwrap_or("");
    model::pack::check_pack_id(pack)
        .map_err(|e| RunError::arguments(format!("{target}: not a folder, and {e}")))?;
    let mut dir = results.join(pack);
    if let Some(run) = parts.next() {
        model::pack::check_pack_id(run).map_err(|_| {
            RunError::arguments(format!(
                "{target}: '{run}' is not a run folder name (letters, digits, '-', '_', '.')"
            ))
        })?;
        dir = dir.join(run);
    }
    if !dir.is_dir() {
        return Err(RunError::arguments(format!(
            "{target}: no folder {}",
            dir.display()
        )));
    }
    Ok(dir)
}

pub fn cmd_export(a: ExportArgs) -> anyhow::Result<ExitCode> {
    let format: Format = a
        .format
        .parse()
        .map_err(|e: String| RunError::arguments(format!("--format: {e}")))?;
    let dir = resolve(&a.target, &a.results)?;
    let runs = export::runs_of(&dir).map_err(|e| RunError::arguments(e.to_string()))?;
    if runs.is_empty() {
        return Err(RunError::arguments(format!(
            "{}: no run recorded by packbench to export",
            dir.display()
        ))
        .into());
    }
    for run in &runs {
        let files = export::export_run(run, &a.out, format)
            .with_context(|| format!("exporting {}", run.display()))?;
        for f in files {
            println!("{}", f.display());
        }
    }
    Ok(ExitCode::Ok)
}

fn host_name() -> String {
    std::fs::read_to_string("/etc/hostname")
        .ok()
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .or_else(|| std::env::var("HOSTNAME").ok())
        .unwrap_or_else(|| "bench".into())
}

pub fn cmd_sync(a: SyncArgs) -> anyhow::Result<ExitCode> {
    if !a.results.is_dir() {
        return Err(RunError::arguments(format!(
            "{} is not a results folder",
            a.results.display()
        ))
        .into());
    }
    let target =
        central::target(a.to.as_deref()).map_err(|e| RunError::arguments(e.to_string()))?;
    let t0 = std::time::Instant::now();
    let mut store = central::Store::connect(&target)?;
    let opts = central::SyncOptions {
        bench: a.bench.clone().unwrap_or_else(host_name),
        samples: a.samples,
    };
    let s = central::sync(&mut store, &a.results, &opts)?;
    println!(
        "sync {} -> {}: {} packs; {} runs pushed, {} replaced (changed since), {} already there, {} in progress left for later; {} samples; in {:.2} s",
        a.results.display(),
        store.target,
        s.packs,
        s.runs_pushed,
        s.runs_replaced,
        s.runs_already_there,
        s.runs_in_progress,
        s.samples_pushed,
        t0.elapsed().as_secs_f64()
    );
    Ok(ExitCode::Ok)
}

/// The fleet of every bench syncing into a central store.
pub fn fleet_from_db(
    url: &str,
    today: chrono::NaiveDate,
    schedule: &analysis::fade::schedule::Schedule,
    threshold: f64,
) -> anyhow::Result<(
    analysis::fade::fleet::Fleet,
    Vec<analysis::fade::history::PackHistory>,
)> {
    let url = Some(url).filter(|u| !u.is_empty());
    let target = central::target(url).map_err(|e| RunError::arguments(e.to_string()))?;
    let mut store = central::Store::connect(&target)?;
    let hs = central::histories(&mut store)?;
    let f = analysis::fade::fleet::rank(&hs, today, schedule, threshold);
    Ok((f, hs))
}
