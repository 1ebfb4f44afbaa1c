//! `packbench grade-quick RUN`: the capacity of a pack estimated from a
//! screening run and its family's calibration, with its interval.

use crate::cli::exit::ExitCode;
use crate::session::quick::{quick_grade, DEFAULT_FEATURES, QUICK_GRADE_JSON};
use analysis::fade::grade::Policy;
use analysis::screen::FEATURE_NAMES;
use anyhow::Context;
use clap::Args;
use std::io::Write;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct QuickArgs {
    /// The screening run's folder (results/<pack>/<run>).
    pub run: PathBuf,
    /// The results folder holding the family's packs (default: the one the run is in).
    #[arg(long)]
    pub results: Option<PathBuf>,
    /// The family's name: only packs whose id starts with it calibrate.
    #[arg(long)]
    pub family: Option<String>,
    /// The features the model uses (default: window_ah_per_v,r_full_mohm).
    #[arg(long, value_delimiter = ',')]
    pub features: Option<Vec<String>>,
    /// Grading policy (TOML); default: the built-in policy.
    #[arg(long)]
    pub policy: Option<PathBuf>,
    /// Print the estimate as JSON (the shape of quick-grade.json).
    #[arg(long)]
    pub json: bool,
}

/// `packbench grade-quick`: exit 0 with an estimate; 2 without one (too
/// few calibration pairs in the family, or a feature the run does not
/// have: the input cannot give an estimate) and on any other bad input;
/// 1 on a failure while running (the file system).
pub fn cmd_quick(a: QuickArgs) -> anyhow::Result<ExitCode> {
    let features: Vec<String> = match &a.features {
        Some(f) => f.iter().map(|s| s.trim().to_string()).collect(),
        None => DEFAULT_FEATURES.iter().map(|s| s.to_string()).collect(),
    };
    for f in &features {
        if !FEATURE_NAMES.contains(&f.as_str()) {
            return Err(crate::session::error::RunError::arguments(format!(
                "--features: unknown feature '{f}'; expected some of {}",
                FEATURE_NAMES.join(", ")
            ))
            .into());
        }
    }
    let results = match &a.results {
        Some(r) => r.clone(),
        None => a
            .run
            .parent()
            .and_then(|p| p.parent())
            .map(PathBuf::from)
            .context("the run folder has no results folder above it; give --results")?,
    };
    let policy = match &a.policy {
        Some(p) => {
            let text = model::procedure::read_text(p)
                .with_context(|| format!("cannot read {}", p.display()))?;
            Policy::from_toml(p, &text)?
        }
        None => Policy::default_policy(),
    };
    let q = quick_grade(&a.run, &results, a.family.clone(), &features, &policy)?;
    let path = a.run.join(QUICK_GRADE_JSON);
    record::write::atomic_write(&path, serde_json::to_string_pretty(&q)?.as_bytes())
        .with_context(|| format!("writing {}", path.display()))?;
    let mut out = std::io::stdout().lock();
    if a.json {
        serde_json::to_writer_pretty(&mut out, &q)?;
        writeln!(out)?;
    } else {
        writeln!(
            out,
            "Quick grade of pack {} (run {}): ESTIMATE, not a measurement",
            q.pack_id, q.run_id
        )?;
        if let (Some(p), Some(c)) = (&q.prediction, &q.calibration) {
            writeln!(
                out,
                "  capacity {:.3} Ah (95 % interval {:.3}–{:.3} Ah), state of health {:.1} % ({:.1}–{:.1} %)",
                p.capacity_ah,
                p.lower_ah,
                p.upper_ah,
                q.soh_pct.unwrap_or_default(),
                q.soh_lower_pct.unwrap_or_default(),
                q.soh_upper_pct.unwrap_or_default()
            )?;
            writeln!(
                out,
                "  calibration: {} packs of the family ({}), features {}; leave-one-out error {:.3} Ah, {:.0} % inside their interval",
                c.pairs,
                family_text(&q.family),
                c.features.join(", "),
                c.loo_rmse_ah,
                c.loo_coverage * 100.0
            )?;
        }
        writeln!(out, "  {}", q.verdict)?;
        writeln!(out, "  written: {}", path.display())?;
    }
    // No estimate: what was given cannot make one (written and said above).
    Ok(if q.prediction.is_some() {
        ExitCode::Ok
    } else {
        ExitCode::BadInput
    })
}

fn family_text(f: &crate::session::quick::Family) -> String {
    let mut s = format!("{} {}S {} Ah", f.chemistry, f.series, f.rated_capacity_ah);
    if let Some(n) = &f.name {
        s.push_str(&format!(", ids starting '{n}'"));
    }
    s
}
