//! `packbench import LOG --pack ID --date YYYY-MM-DD`: a test from another
//! bench joins a pack's history. The log is analysed as `analyze` does
//! (the same column mapping, pack spec and messy-log handling) and kept as
//! a run folder marked imported: `summary.json` (status `imported`), the
//! log itself as `source.csv`, and `import.json` with the source file's
//! SHA-256, so the same file is never imported twice. Its capacity and
//! resistance then count in `fade` and `fleet` like our own runs'.

use crate::cli::analyze::AnalyzeArgs;
use crate::cli::args::pack_from_args;
use crate::cli::exit::ExitCode;
use crate::session::error::RunError;
use crate::session::request::PackSource;
use anyhow::Context;
use clap::Args;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};
use std::io::Read;
use std::path::{Path, PathBuf};

/// The import record beside the summary.
pub const IMPORT_JSON: &str = "import.json";
/// The imported log, as it was.
pub const SOURCE_CSV: &str = "source.csv";

#[derive(Debug, Args)]
pub struct ImportArgs {
    #[command(flatten)]
    pub log: AnalyzeArgs,
    /// Equivalent full cycles of the pack at the test (its own counter).
    #[arg(long)]
    pub cycles: Option<f64>,
    /// Results folder.
    #[arg(long, default_value = "results")]
    pub results: PathBuf,
}

/// Where an imported run came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ImportRecord {
    #[serde(default = "record::schema::unversioned")]
    pub schema_version: u32,
    /// The file as given on the command line.
    pub source: String,
    pub sha256: String,
    pub bytes: u64,
    pub imported_utc: String,
}

/// SHA-256 of a file, streamed.
pub fn file_sha256(path: &Path) -> std::io::Result<(String, u64)> {
    let mut f = std::fs::File::open(path)?;
    let mut h = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    let mut n = 0u64;
    loop {
        let k = f.read(&mut buf)?;
        if k == 0 {
            break;
        }
        h.update(&buf[..k]);
        n += k as u64;
    }
    Ok((hex::encode(h.finalize()), n))
}

/// The run of this pack the same file was imported as, if any.
fn imported_before(pack_dir: &Path, sha256: &str) -> Option<String> {
    let entries = std::fs::read_dir(pack_dir).ok()?;
    for e in entries.flatten() {
        let path = e.path().join(IMPORT_JSON);
        let Ok(text) = std::fs::read_to_string(&path) else {
            continue;
        };
        if let Ok(r) = serde_json::from_str::<ImportRecord>(&text) {
            if r.sha256 == sha256 {
                return Some(e.file_name().to_string_lossy().into_owned());
            }
        }
    }
    None
}

/// `packbench import`.
pub fn cmd_import(mut a: ImportArgs) -> anyhow::Result<ExitCode> {
    let Some(pack_id) = a.log.pack.clone() else {
        return Err(RunError::arguments(
            "--pack ID is needed: the pack whose history the test joins",
        )
        .into());
    };
    let Some(date) = a.log.test_date.clone() else {
        return Err(
            RunError::arguments("--date YYYY-MM-DD is needed: the day the test was made").into(),
        );
    };
    if let Some(c) = a.cycles {
        if !(c.is_finite() && c >= 0.0) {
            return Err(RunError::arguments(format!(
                "--cycles {c}: expected a count of 0 or more"
            ))
            .into());
        }
    }
    // The rating the fade fit needs: given now, or the pack's saved spec.
    let given = pack_from_args(&a.log.pack_args)?;
    let source = match given {
        Some(p) => PackSource::Given(p),
        None => PackSource::Saved {
            allow_sim_default: false,
        },
    };
    let (pack, save, _) = crate::session::prepare::resolve_pack(&pack_id, &source, &a.results)?;
    let pack_dir = a.results.join(&pack_id);
    if !save {
        a.log.pack_args.pack_spec = Some(pack_dir.join(record::PACK_TOML));
        a.log.pack_args.chemistry = None;
        a.log.pack_args.series = None;
        a.log.pack_args.rated = None;
    }
    let log_path = a.log.log.clone();
    let (sha256, bytes) =
        file_sha256(&log_path).map_err(crate::session::error::input_file_err(&log_path))?;
    if let Some(run) = imported_before(&pack_dir, &sha256) {
        return Err(RunError::arguments(format!(
            "{} was imported already, as {pack_id}/{run} (sha256 {})",
            log_path.display(),
            &sha256[..16]
        ))
        .into());
    }
    let (mut summary, _) = crate::cli::analyze::analyze(&a.log)?;
    // Everything checked: now the folder.
    std::fs::create_dir_all(&pack_dir)
        .with_context(|| format!("creating {}", pack_dir.display()))?;
    if save {
        let path = pack_dir.join(record::PACK_TOML);
        record::write::atomic_write(&path, pack.to_toml().as_bytes())
            .with_context(|| format!("writing {}", path.display()))?;
    }
    let stem = log_path
        .file_stem()
        .and_then(|s| s.to_str())
        .map(|s| {
            s.chars()
                .map(|c| {
                    if c.is_ascii_alphanumeric() || c == '-' {
                        c
                    } else {
                        '-'
                    }
                })
                .collect::<String>()
        })
        .unwrap_or_else(|| "log".into());
    let base = format!("{}-imported-{stem}", date.replace('-', ""));
    let (run_id, dir) = record::write::create_run_folder(&pack_dir, &base)
        .with_context(|| format!("creating a run folder in {}", pack_dir.display()))?;
    summary.run_id = run_id.clone();
    summary.cycle_count = a.cycles;
    // Judged as a run of this pack: its resistance against the pack's
    // reference.
    summary.verdict.resistance_reference = record::summarize::reference_resistance(
        &pack_dir,
        pack.rated_resistance_mohm,
        summary.test_date,
        &run_id,
    );
    let policy = crate::cli::analyze::policy_of(&a.log)?;
    record::verdict::rejudge(&mut summary, Some(&policy));
    let copy = dir.join(SOURCE_CSV);
    std::fs::copy(&log_path, &copy)
        .with_context(|| format!("copying the log to {}", copy.display()))?;
    let record = ImportRecord {
        schema_version: record::schema::SCHEMA_VERSION,
        source: log_path.display().to_string(),
        sha256: sha256.clone(),
        bytes,
        imported_utc: chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true),
    };
    let import_path = dir.join(IMPORT_JSON);
    record::write::write_json(&import_path, &record)
        .with_context(|| format!("writing {}", import_path.display()))?;
    // The summary last: a folder without one is not in the history.
    let summary_path = dir.join(record::SUMMARY_JSON);
    record::write::write_json(&summary_path, &summary)
        .with_context(|| format!("writing {}", summary_path.display()))?;
    // Set against the pack's history: a rise the measurement cannot explain
    // is flagged here, in fade and in fleet (and kept in the verdict).
    let history = record::history::load(&a.results, &pack_id, None).ok();
    let source = format!("run {run_id}");
    let mut previous = None;
    if let Some(h) = &history {
        if let Some(k) = h.points.iter().position(|p| p.source == source) {
            summary.verdict.flags = h.points[k].flags.clone();
            previous = h.points[..k]
                .iter()
                .rev()
                .find(|p| p.flags.is_empty())
                .cloned();
            if !summary.verdict.flags.is_empty() {
                record::write::write_json(&summary_path, &summary)
                    .with_context(|| format!("writing {}", summary_path.display()))?;
            }
        }
    }
    crate::session::finish::index_pack(&pack_dir, &pack_id);
    println!(
        "imported {} as {} (sha256 {})",
        log_path.display(),
        dir.display(),
        &sha256[..16]
    );
    println!("  {}", summary.verdict.line());
    if !summary.verdict.counts_for_history {
        println!(
            "  not in the pack's capacity history: {}",
            summary
                .verdict
                .not_counted
                .map(|w| w.words())
                .unwrap_or("no capacity")
        );
    }
    if let (Some(p), Some(now)) = (previous, summary.verdict.soh_pct.get()) {
        println!(
            "  against the previous test ({}, {}): {:.1} % -> {now:.1} % ({:+.1} points)",
            p.date,
            p.source,
            p.soh_pct,
            now - p.soh_pct
        );
    }
    for f in &summary.verdict.flags {
        println!("  FLAG: {f}");
    }
    Ok(ExitCode::Ok)
}
