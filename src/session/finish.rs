//! Recording a stopped run: summary, report and final manifest.

use crate::session::error::{Failure, RunError};
use crate::session::links::SimRun;
use crate::session::request::Prepared;
use crate::session::request::RunReport;
use engine::RunOutcome;
use model::status::RunState;
use record::manifest::utc_now;
use record::manifest::SIM_TRUTH_LABEL;
use record::manifest::{Manifest, SimulationRecord};
use record::summarize::SummaryContext;
use record::write::write_json;
use record::writer::WriterEnd;
use record::RUN_LOCK;
use record::{Summary, REPORT_HTML, RUN_JSON, SUMMARY_JSON};
use std::path::Path;

/// Write the summary, the report and the final manifest of a run whose
/// engine has stopped (or that was found stopped).
pub fn finish_record(
    p: &Prepared,
    dir: &Path,
    run_id: &str,
    manifest: Manifest,
    outcome: RunOutcome,
    sim: Option<SimRun>,
) -> Result<RunReport, RunError> {
    finish_record_after(p, dir, run_id, manifest, outcome, sim, Ending::default())
}

/// How the record's writing ended, and the run's lock to release.
#[derive(Default)]
pub struct Ending {
    pub writer: WriterEnd,
    pub lock: Option<record::write::RunLock>,
}

/// One line on the outputs' state at the end of a run: what the operator
/// must know first.
pub fn outputs_line(o: &RunOutcome) -> String {
    if o.may_be_on.is_empty() {
        let said = |ok: bool| {
            if ok {
                "confirmed"
            } else {
                "sent, not confirmed"
            }
        };
        return format!(
            "outputs off (source {}, load {})",
            said(o.source_off_confirmed),
            said(o.load_off_confirmed)
        );
    }
    let who: Vec<String> = o
        .may_be_on
        .iter()
        .map(|(w, e)| format!("{w} ({e})"))
        .collect();
    format!(
        "OUTPUT MAY STILL BE ON: {}: switch it off by hand now",
        who.join("; ")
    )
}

/// As [`finish_record`], after the record's writer has ended: whatever
/// fails (a full disk), the final status is written where space allows,
/// the lock is released, and what could not be written is said.
pub fn finish_record_after(
    p: &Prepared,
    dir: &Path,
    run_id: &str,
    mut manifest: Manifest,
    mut outcome: RunOutcome,
    sim: Option<SimRun>,
    end: Ending,
) -> Result<RunReport, RunError> {
    let Ending { writer, lock } = end;
    let run_json = dir.join(RUN_JSON);
    let mut unwritten: Vec<String> = writer.describe().into_iter().collect();
    if !writer.complete() && outcome.status == RunState::Completed {
        // The log is not whole: the run cannot count as completed.
        outcome.status = RunState::Aborted;
        outcome.reason = writer.failure.clone();
    }
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
    let summary = summarize_run_dir(dir, &ctx, Some(&outcome));
    if let Ok(summary) = &summary {
        let summary_path = dir.join(SUMMARY_JSON);
        if let Err(e) = write_json(&summary_path, summary) {
            unwritten.push(format!("{SUMMARY_JSON}: {e}"));
        }
        let report_path = dir.join(REPORT_HTML);
        let html = report::charts::from_log(summary, &dir.join(record::SAMPLES_CSV))
            .map(|charts| report::html::run_report(summary, &charts));
        match html {
            Ok(html) => {
                if let Err(e) = record::write::atomic_write(&report_path, html.as_bytes()) {
                    unwritten.push(format!("{REPORT_HTML}: {e}"));
                }
            }
            Err(e) => unwritten.push(format!("{REPORT_HTML}: {e}")),
        }
    }
    manifest.status = outcome.status.into();
    manifest.stop_reason = outcome.reason.clone();
    manifest.finished_utc = Some(match (p.options.started_at, &summary) {
        (Some(t0), Ok(s)) => (t0 + chrono::Duration::milliseconds((s.duration_s * 1000.0) as i64))
            .to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        _ => utc_now(),
    });
    manifest.timing = Some(outcome.timing);
    manifest.outputs_may_be_on = outcome.may_be_on.iter().map(|(w, _)| w.clone()).collect();
    if let Some(s) = sim {
        manifest.simulation = Some(merge_truth(manifest.simulation.take(), &outcome, s));
    }
    manifest.record_incomplete = unwritten.clone();
    if let Err(e) = write_json(&run_json, &manifest) {
        // A full disk: the atomic write needs room for a second copy.
        // Written in place instead (the old record is no more use than a
        // torn new one: its status says running).
        let direct = serde_json::to_vec_pretty(&manifest)
            .map_err(std::io::Error::other)
            .and_then(|b| std::fs::write(&run_json, b));
        if let Err(e2) = direct {
            unwritten.push(format!("{RUN_JSON}: {e}; in place: {e2}"));
        }
    }
    let _ = std::fs::remove_file(dir.join(record::RESERVE));
    match lock {
        Some(l) => l.release(),
        None => {
            let _ = std::fs::remove_file(dir.join(RUN_LOCK));
        }
    }
    let summary = match summary {
        Ok(s) => s,
        Err(e) => {
            return Err(RunError::from(Failure::RecordIncomplete {
                message: format!(
                    "{}; {}: {e}{}",
                    outputs_line(&outcome),
                    outcome.reason.clone().unwrap_or_default(),
                    if unwritten.is_empty() {
                        String::new()
                    } else {
                        format!("; not written: {}", unwritten.join("; "))
                    }
                ),
                may_be_on: !outcome.may_be_on.is_empty(),
            }))
        }
    };
    index_pack(&p.pack_dir, &p.pack_id);
    Ok(RunReport {
        run_dir: dir.to_path_buf(),
        summary,
        outcome,
        unwritten,
    })
}

/// The simulation truth of a run: a resumed step's truth adds to what
/// the interrupted part counted.
fn merge_truth(
    before: Option<SimulationRecord>,
    outcome: &RunOutcome,
    s: SimRun,
) -> SimulationRecord {
    let mut steps = before.map(|r| r.steps).unwrap_or_default();
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
    SimulationRecord {
        label: SIM_TRUTH_LABEL.into(),
        config: s.config,
        true_capacity_ah: s.true_capacity_ah,
        steps,
    }
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
    let outcome = outcome.map(|o| record::summarize::Outcome {
        status: o.status.into(),
        reason: o.reason.clone(),
    });
    Ok(record::summarize::summarize_run(
        dir,
        ctx,
        outcome,
        analysis::AnalysisOptions::default(),
    )?)
}
