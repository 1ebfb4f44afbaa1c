//! `packbench report`, `fade` and `fleet`: a pack's history and the fleet.

use crate::cli::args::interval_days;
use crate::cli::args::parse_date;
use crate::cli::args::parse_threshold;
use crate::cli::exit::ExitCode;
use crate::session::error::RunError;
use analysis::fade::{fleet, trend};
use anyhow::Context;
use clap::Args;
use record::history;
use std::path::{Path, PathBuf};

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// A run folder (results/<pack>/<run>).
    pub run_dir: PathBuf,
}

/// The command line's defaults, as its options spell them: the library's
/// [`analysis::fade::END_OF_LIFE_PCT`] and [`analysis::fade::INTERVAL_DAYS`]
/// (a test holds them equal).
pub const END_OF_LIFE: &str = "80%";
pub const INTERVAL: &str = "92d";

#[derive(Debug, Args)]
pub struct FadeArgs {
    /// Pack id.
    pub pack: String,
    /// Results folder.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
    /// End of life, % of rated capacity.
    #[arg(long, default_value = END_OF_LIFE)]
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
    #[arg(long, default_value = END_OF_LIFE)]
    pub threshold: String,
    /// A test is overdue after this long: days or weeks, e.g. 92d or 13w.
    #[arg(long, default_value = INTERVAL)]
    pub interval: String,
    /// The grading/fleet policy (TOML) whose [schedule] says when packs
    /// are due: the shop's interval, or the IEEE 450 rules for lead-acid.
    #[arg(long)]
    pub policy: Option<PathBuf>,
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
    /// Read every run folder instead of the results index
    /// (`results/index.sqlite`, brought up to the folders first).
    #[arg(long, conflicts_with = "db")]
    pub walk: bool,
    /// Rank the packs of every bench that syncs into this central store
    /// (a postgres:// URL; what it leaves out, or all of it with a bare
    /// --db, comes from the PG* environment variables).
    #[arg(long, num_args = 0..=1, default_missing_value = "")]
    pub db: Option<String>,
}

#[derive(Debug, Args)]
pub struct IndexArgs {
    /// Results folder.
    #[arg(default_value = "results")]
    pub results: PathBuf,
    /// Throw the index away and build it again from the folders.
    #[arg(long)]
    pub rebuild: bool,
}

/// A results folder that exists (bad input, exit 2, when it does not).
fn results_folder(results: &std::path::Path) -> Result<(), RunError> {
    if results.is_dir() {
        Ok(())
    } else {
        Err(RunError::arguments(format!(
            "{} is not a results folder (no such folder): nothing was created",
            results.display()
        )))
    }
}

/// `packbench index`: bring `results/index.sqlite` up to the run folders.
pub fn cmd_index(a: IndexArgs) -> anyhow::Result<ExitCode> {
    results_folder(&a.results)?;
    if a.rebuild {
        for suffix in ["", "-wal", "-shm"] {
            let p = a
                .results
                .join(format!("{}{suffix}", record::index::INDEX_SQLITE));
            if p.exists() {
                std::fs::remove_file(&p).with_context(|| format!("removing {}", p.display()))?;
            }
        }
    }
    let t0 = std::time::Instant::now();
    let mut ix = record::index::Index::open(&a.results)?;
    let r = ix.refresh(&a.results)?;
    say_skipped(&r.skipped);
    println!(
        "index {}: {} packs ({} read), {} runs read, {} runs and {} packs dropped, in {:.2} s",
        a.results.join(record::index::INDEX_SQLITE).display(),
        r.packs,
        r.packs_read,
        r.runs_read,
        r.runs_dropped,
        r.packs_dropped,
        t0.elapsed().as_secs_f64()
    );
    Ok(ExitCode::Ok)
}

/// Name each pack left out of a fleet or an index (its records could not
/// be read), on the error stream.
fn say_skipped(skipped: &[(String, String)]) {
    for (id, why) in skipped {
        eprintln!("warning: pack {id} left out: {why}");
    }
}

/// `packbench report`.
pub fn cmd_report(a: ReportArgs) -> anyhow::Result<ExitCode> {
    let summary_path = a.run_dir.join(record::SUMMARY_JSON);
    let summary = record::read::read_summary(&summary_path)?;
    let charts = report::charts::from_log(&summary, &a.run_dir.join(record::SAMPLES_CSV))?;
    let out = a.run_dir.join(record::REPORT_HTML);
    record::write::atomic_write(&out, report::html::run_report(&summary, &charts).as_bytes())
        .with_context(|| format!("writing {}", out.display()))?;
    print!("{}", report::text::summary(&summary));
    println!("  Report: {}", out.display());
    Ok(ExitCode::Ok)
}

/// `packbench fade`.
pub fn cmd_fade(a: FadeArgs) -> anyhow::Result<ExitCode> {
    let threshold = parse_threshold(&a.threshold)?;
    // Nothing is created for a folder that is not there.
    results_folder(&a.results)?;
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
    // Links to the runs' reports: beside it in the pack's folder, else by
    // the folder's full path.
    let links = report::html::Links::Files(folder_from(&out, &a.results.join(&a.pack)));
    let html = report::html::pack_report(&h, &fa, &history::capacity_curves(&h), &links);
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
    Ok(ExitCode::Ok)
}

/// `packbench fleet`.
pub fn cmd_fleet(a: FleetArgs) -> anyhow::Result<ExitCode> {
    let threshold = parse_threshold(&a.threshold)?;
    if a.db.is_none() {
        // The index is not made in a folder that is not there.
        results_folder(&a.results)?;
    }
    let interval = interval_days(&a.interval).ok_or_else(|| {
        RunError::arguments(format!(
            "--interval '{}': expected a duration of at least a day, in days or weeks, e.g. 92d or 13w",
            a.interval
        ))
    })?;
    let today = match &a.today {
        Some(d) => parse_date(d)?,
        None => chrono::Utc::now().date_naive(),
    };
    let schedule = match &a.policy {
        Some(p) => {
            let text =
                model::procedure::read_text(p).map_err(crate::session::error::input_file_err(p))?;
            analysis::fade::grade::Policy::from_toml(p, &text)
                .map_err(RunError::from)?
                .schedule
        }
        None => None,
    }
    .unwrap_or_else(|| analysis::fade::schedule::Schedule::interval(interval));
    let mut from_db = None;
    let f = if let Some(url) = &a.db {
        let (f, hs) = crate::cli::exchange::fleet_from_db(url, today, &schedule, threshold)?;
        from_db = Some(hs);
        f
    } else if a.walk {
        let (f, skipped) = history::fleet(&a.results, today, &schedule, threshold)?;
        say_skipped(&skipped);
        f
    } else {
        let (f, r) = record::index::fleet(&a.results, today, &schedule, threshold)?;
        say_skipped(&r.skipped);
        f
    };
    if let Some(path) = &a.html {
        let hs = match from_db {
            Some(hs) => hs,
            None => {
                let mut hs = Vec::new();
                for r in &f.rows {
                    hs.push(history::load(&a.results, &r.pack_id, None)?);
                }
                hs
            }
        };
        let links = report::html::Links::Files(folder_from(path, &a.results));
        std::fs::write(
            path,
            report::html::fleet_report(&f, &hs, "Battery fleet", &links),
        )
        .with_context(|| format!("writing {}", path.display()))?;
    }
    if a.json {
        println!("{}", serde_json::to_string_pretty(&f)?);
    } else if a.csv {
        print!("{}", fleet::to_csv(&f)?);
    } else {
        print!("{}", report::text::fleet(&f));
    }
    Ok(ExitCode::Ok)
}

/// The path a report written at `page` takes to `folder` in its links:
/// "" when it is in that folder, else the folder's full path (with a
/// trailing '/').
fn folder_from(page: &Path, folder: &Path) -> String {
    let canon = |p: &Path| p.canonicalize().unwrap_or_else(|_| p.to_path_buf());
    let folder = canon(folder);
    match page.parent().map(canon) {
        Some(dir) if dir == folder => String::new(),
        _ => format!("{}/", folder.display()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The options' defaults are the library's, the one place they are
    /// set.
    #[test]
    fn the_defaults_are_the_librarys() {
        let eol = crate::cli::args::parse_threshold(END_OF_LIFE).unwrap();
        assert_eq!(eol, analysis::fade::END_OF_LIFE_PCT);
        assert_eq!(
            crate::cli::args::interval_days(INTERVAL),
            Some(analysis::fade::INTERVAL_DAYS)
        );
    }
}
