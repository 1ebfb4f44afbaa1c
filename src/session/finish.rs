//! Recording a stopped run: summary, report and final manifest.

use crate::session::error::io_err;
use crate::session::error::RunError;
use crate::session::links::SimRun;
use crate::session::request::Prepared;
use crate::session::request::RunReport;
use crate::session::summary::SummaryContext;
use engine::RunOutcome;
use record::manifest::utc_now;
use record::manifest::SIM_TRUTH_LABEL;
use record::manifest::{Manifest, SimulationRecord};
use record::write::write_json;
use record::RUN_LOCK;
use record::{Summary, REPORT_HTML, RUN_JSON, SUMMARY_JSON};
use std::path::Path;

/// Write the summary, the report and the final manifest of a run whose
/// engine has stopped (or that was found stopped).
pub fn finish_record(
    p: &Prepared,
    dir: &Path,
    run_id: &str,
    mut manifest: Manifest,
    outcome: RunOutcome,
    sim: Option<SimRun>,
) -> Result<RunReport, RunError> {
    let run_json = dir.join(RUN_JSON);
    // The summary comes from the log on disk, through the same code as
    // `analyze` uses afterwards.
    let ctx = SummaryContext {
        pack: &p.pack,
        pack_id: &p.pack_id,
        run_id,
        title: &p.procedure.plan.title,
        test_date: p.options.test_date,
        cycle_count: p.options.cycle_count,
        bms: p.options.bms.as_ref(),
        policy: &p.options.policy,
    };
    let summary = summarize_run_dir(dir, &ctx, Some(&outcome))?;
    let summary_path = dir.join(SUMMARY_JSON);
    write_json(&summary_path, &summary).map_err(io_err(&summary_path))?;
    let report_path = dir.join(REPORT_HTML);
    let charts = report::charts::from_log(&summary, &dir.join(record::SAMPLES_CSV))?;
    let html = report::html::run_report(&summary, &charts);
    record::write::atomic_write(&report_path, html.as_bytes()).map_err(io_err(&report_path))?;
    manifest.status = outcome.status.into();
    manifest.stop_reason = outcome.reason.clone();
    manifest.finished_utc = Some(utc_now());
    manifest.timing = Some(outcome.timing);
    if let Some(s) = sim {
        let mut steps = manifest
            .simulation
            .take()
            .map(|r| r.steps)
            .unwrap_or_default();
        // A resumed step's truth adds to what the interrupted part counted.
        for t in &outcome.truth {
            match steps.iter_mut().find(|x| x.step == t.step) {
                Some(x) => {
                    // Each group's charge to cutoff counts from the step's
                    // start: the interrupted part's charge is added in.
                    let before = x.charge_ah;
                    x.charge_ah += t.charge_ah;
                    x.energy_wh += t.energy_wh;
                    if !t.groups_to_cutoff_ah.is_empty() {
                        x.groups_to_cutoff_ah =
                            t.groups_to_cutoff_ah.iter().map(|g| g - before).collect();
                    }
                }
                None => steps.push(t.clone()),
            }
        }
        manifest.simulation = Some(SimulationRecord {
            label: SIM_TRUTH_LABEL.into(),
            config: s.config,
            true_capacity_ah: s.true_capacity_ah,
            steps,
        });
    }
    write_json(&run_json, &manifest).map_err(io_err(&run_json))?;
    let _ = std::fs::remove_file(dir.join(RUN_LOCK));
    index_pack(&p.pack_dir, &p.pack_id);
    Ok(RunReport {
        run_dir: dir.to_path_buf(),
        summary,
        outcome,
    })
}

/// Bring the results index up to this pack's folder. Best effort: the run
/// folder is the record, and `fleet` and `index` bring the index up to the
/// folders whenever they read it.
pub fn index_pack(pack_dir: &Path, pack_id: &str) {
    let Some(results) = pack_dir.parent() else {
        return;
    };
    if let Ok(mut ix) = record::index::Index::open(results) {
        let _ = ix.refresh_pack(results, pack_id);
    }
}

/// Build a run's summary from its folder (the log streamed through the
/// same code as `packbench analyze`).
pub fn summarize_run_dir(
    dir: &Path,
    ctx: &SummaryContext<'_>,
    outcome: Option<&RunOutcome>,
) -> Result<Summary, RunError> {
    let outcome = outcome.map(|o| crate::session::summary::Outcome {
        status: o.status.into(),
        reason: o.reason.clone(),
    });
    crate::session::summary::summarize_run(dir, ctx, outcome, analysis::AnalysisOptions::default())
}
