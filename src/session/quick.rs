//! The quick grade of a screening run: its features, the pack's family
//! calibration from the shop's own results, and the estimate with its
//! interval. An estimate never touches a run's measured figures: it is
//! written beside them as `quick-grade.json`, and fade and fleet read
//! only measured capacities.

use crate::session::error::{io_err, RunError};
use analysis::fade::grade::{GradeInputs, Policy};
use analysis::screen::{
    calibrate, Calibration, CalibrationError, FeatureTracker, Pair, Prediction, ScreenFeatures,
    ScreenStep,
};
use model::pack::PackSpec;
use model::procedure::plan::{ResultTag, StepType};
use model::status::RunStatus;
use record::import::{stream_log, LogFormat, Row};
use record::read::{read_events, read_summary, step_infos};
use record::{Summary, EVENTS_JSONL, PACK_TOML, SAMPLES_CSV, SUMMARY_JSON};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// The file the quick grade writes into the screening run's folder.
pub const QUICK_GRADE_JSON: &str = "quick-grade.json";

/// Features the model uses unless the shop picks others: the window's
/// charge per volt (it scales with the capacity) and the resistance near
/// full (it grows as the pack ages).
pub const DEFAULT_FEATURES: [&str; 2] = ["window_ah_per_v", "r_full_mohm"];

/// A screening run: a step tagged `result = "window"` and no capacity
/// step. Its features, or `None` for any other run.
pub fn screening_features(run: &Path, spec: &PackSpec) -> Result<Option<ScreenFeatures>, RunError> {
    let events = read_events(&run.join(EVENTS_JSONL))?;
    let infos = step_infos(&events);
    let has = |t: ResultTag| infos.iter().any(|i| i.result == Some(t));
    if !has(ResultTag::Window) || has(ResultTag::Capacity) {
        return Ok(None);
    }
    let summary = read_summary(&run.join(SUMMARY_JSON))?;
    let charge = infos
        .iter()
        .find(|i| i.kind == StepType::Charge)
        .map(|i| i.step);
    let relax = charge.and_then(|c| {
        infos
            .iter()
            .find(|i| i.step > c && i.kind == StepType::Rest)
            .map(|i| i.step)
    });
    let mut steps = Vec::new();
    for i in &infos {
        let kind = if Some(i.step) == charge {
            ScreenStep::Charge
        } else if Some(i.step) == relax {
            ScreenStep::Relaxation
        } else if i.result == Some(ResultTag::Window) {
            ScreenStep::Window
        } else {
            ScreenStep::Other
        };
        steps.push((i.step, kind));
    }
    let mut tracker = FeatureTracker::new(steps, spec.series);
    stream_log(&run.join(SAMPLES_CSV), &LogFormat::default(), |r: Row| {
        tracker.push(&r.sample())
    })?;
    let readings = summary
        .resistance
        .as_ref()
        .map(|r| r.readings.clone())
        .unwrap_or_default();
    let r_full = readings.first().map(|r| r.dcir_mohm);
    let r_window = (readings.len() > 1).then(|| readings[readings.len() - 1].dcir_mohm);
    Ok(Some(tracker.finish(r_full, r_window)))
}

/// A family: the pack spec it shares (chemistry, cells in series, rated
/// capacity, so the same build) and, when the shop names one, the prefix
/// of its pack ids.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Family {
    pub chemistry: model::pack::Chemistry,
    pub series: u32,
    pub rated_capacity_ah: f64,
    #[serde(default)]
    pub name: Option<String>,
}

impl Family {
    pub fn of(spec: &PackSpec, name: Option<String>) -> Family {
        Family {
            chemistry: spec.chemistry,
            series: spec.series,
            rated_capacity_ah: spec.rated_capacity_ah,
            name,
        }
    }

    fn holds(&self, pack_id: &str, spec: &PackSpec) -> bool {
        spec.chemistry == self.chemistry
            && spec.series == self.series
            && (spec.rated_capacity_ah - self.rated_capacity_ah).abs() < 1e-9
            && self.name.as_deref().is_none_or(|n| pack_id.starts_with(n))
    }
}

fn read_spec(pack_dir: &Path) -> Result<PackSpec, RunError> {
    let path = pack_dir.join(PACK_TOML);
    let text = model::procedure::read_text(&path).map_err(io_err(&path))?;
    Ok(PackSpec::from_toml(&path, &text)?)
}

/// The pack's latest measured capacity, as its run's verdict has it: a
/// completed run that counts for the pack's history (from a full charge)
/// and reached its cutoff.
fn measured_capacity(runs: &[(PathBuf, Summary)]) -> Option<f64> {
    runs.iter().rev().find_map(|(_, s)| {
        let v = &s.verdict;
        (s.status == RunStatus::Completed
            && v.counts_for_history
            && v.ended_on_cutoff == Some(true))
        .then(|| v.measured_ah.get())
        .flatten()
    })
}

/// Every calibration pair of a family in a results folder: each pack with
/// a screening run (its latest) and a full capacity test. `leave_out`: a
/// pack not to calibrate on (the one being graded).
pub fn family_pairs(
    results: &Path,
    family: &Family,
    features: &[String],
    leave_out: Option<&str>,
) -> Result<Vec<Pair>, RunError> {
    let mut pairs = Vec::new();
    let ids = record::history::pack_ids(results).map_err(|e| RunError::arguments(e.to_string()))?;
    for id in ids {
        if Some(id.as_str()) == leave_out {
            continue;
        }
        let dir = results.join(&id);
        let spec = read_spec(&dir)?;
        if !family.holds(&id, &spec) {
            continue;
        }
        let runs =
            record::history::run_summaries(&dir).map_err(|e| RunError::arguments(e.to_string()))?;
        let Some(capacity_ah) = measured_capacity(&runs) else {
            continue;
        };
        let mut x = None;
        for (run, s) in runs.iter().rev() {
            if s.status != RunStatus::Completed {
                continue;
            }
            if let Some(f) = screening_features(run, &spec)? {
                x = f.vector(features);
                break;
            }
        }
        if let Some(x) = x {
            pairs.push(Pair {
                pack_id: id,
                x,
                capacity_ah,
            });
        }
    }
    Ok(pairs)
}

/// The quick grade of one screening run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct QuickGrade {
    /// Always true: this is an estimate, not a measurement.
    pub estimate: bool,
    pub pack_id: String,
    pub run_id: String,
    pub family: Family,
    pub features: ScreenFeatures,
    pub calibration: Option<Calibration>,
    pub prediction: Option<Prediction>,
    /// State of health from the prediction and its interval, % of rated.
    pub soh_pct: Option<f64>,
    pub soh_lower_pct: Option<f64>,
    pub soh_upper_pct: Option<f64>,
    /// The shop's grade, only when the whole interval gives the same one.
    pub grade: Option<String>,
    /// What the shop should do, in words.
    pub verdict: String,
}

/// Grade a screening run from its family's calibration in `results`.
pub fn quick_grade(
    run: &Path,
    results: &Path,
    family_name: Option<String>,
    features: &[String],
    policy: &Policy,
) -> Result<QuickGrade, RunError> {
    let summary = read_summary(&run.join(SUMMARY_JSON))?;
    let pack_dir = run
        .parent()
        .ok_or_else(|| RunError::arguments(format!("{}: not a run folder", run.display())))?;
    let spec = read_spec(pack_dir)?;
    let f = screening_features(run, &spec)?.ok_or_else(|| {
        RunError::arguments(format!(
            "{}: not a screening run (it needs a step tagged result = \"window\", and no capacity step); see procedures/screen-*.toml",
            run.display()
        ))
    })?;
    let family = Family::of(&spec, family_name);
    let mut out = QuickGrade {
        estimate: true,
        pack_id: summary.pack_id.clone(),
        run_id: summary.run_id.clone(),
        family: family.clone(),
        features: f.clone(),
        calibration: None,
        prediction: None,
        soh_pct: None,
        soh_lower_pct: None,
        soh_upper_pct: None,
        grade: None,
        verdict: String::new(),
    };
    let Some(x0) = f.vector(features) else {
        out.verdict = format!(
            "no estimate: the run lacks a feature the model uses ({}); a full capacity test is needed",
            features.join(", ")
        );
        return Ok(out);
    };
    let pairs = family_pairs(results, &family, features, Some(&summary.pack_id))?;
    let cal = match calibrate(features, &pairs) {
        Ok(c) => c,
        Err(e @ (CalibrationError::TooFewPairs { .. } | CalibrationError::Singular)) => {
            out.verdict = format!("no estimate: {e}");
            return Ok(out);
        }
    };
    let p = cal.predict(&x0);
    let rated = spec.rated_capacity_ah;
    let soh = |ah: f64| ah / rated * 100.0;
    out.soh_pct = Some(soh(p.capacity_ah));
    out.soh_lower_pct = Some(soh(p.lower_ah));
    out.soh_upper_pct = Some(soh(p.upper_ah));
    let grade_at = |s: f64| {
        policy
            .grade(&GradeInputs::of_soh(spec.chemistry, s, None))
            .label
    };
    // The prediction through the policy's decision rule: the estimate with
    // u = half the 95 % interval's half-width over 2 (k = 2).
    let u = (soh(p.upper_ah) - soh(p.lower_ah)) / 4.0;
    let ruled = policy.grade(&GradeInputs::of_soh(
        spec.chemistry,
        soh(p.capacity_ah),
        Some(u),
    ));
    let rule_line = ruled
        .decision
        .as_ref()
        .map(|d| {
            format!(
                " Under the policy's rule ({}): grade {}{}. {}",
                d.rule,
                ruled.label,
                if d.conditional { ", conditional" } else { "" },
                d.line()
            )
        })
        .unwrap_or_default();
    let (lo, hi) = (grade_at(soh(p.lower_ah)), grade_at(soh(p.upper_ah)));
    out.verdict = if lo == hi && policy.refuses(spec.chemistry, Some(u)).is_none() {
        out.grade = Some(lo.clone());
        format!(
            "estimated grade {lo}: the whole 95 % interval ({:.1}–{:.1} % of rated) lies in it.{rule_line}",
            soh(p.lower_ah),
            soh(p.upper_ah)
        )
    } else {
        format!(
            "a full capacity test is needed: the 95 % interval ({:.1}–{:.1} % of rated) spans grades {hi} to {lo}{}.{rule_line}",
            soh(p.lower_ah),
            soh(p.upper_ah),
            if lo == hi { " or is too wide for the policy's bins" } else { "" }
        )
    };
    out.prediction = Some(p);
    out.calibration = Some(cal);
    Ok(out)
}
