//! A pack's history: every completed run under `results/<pack>/` (aborted
//! and interrupted runs are listed but left out of fits), plus earlier
//! measurements from a plain CSV (`date,cycles,capacity_ah,resistance_mohm`)
//! so history from before packbench counts.
//!
//! Equivalent full cycles: the count recorded with a run (from the pack's
//! own counter or the operator) when there is one; otherwise the last known
//! count plus the discharge Ah packbench measured since, over the rated Ah.
//! A history line with an empty cycle cell has no count (NaN): it is left
//! out of the fit against cycles and kept in the fits against time.

use crate::{Summary, PACK_TOML, SUMMARY_JSON};
pub use analysis::fade::history::{HistoryPoint, LeftOut, PackHistory};
use chrono::NaiveDate;
use model::location::{LocatedError, Location};
use model::pack::PackSpec;
use std::path::{Path, PathBuf};

/// The file of earlier measurements a pack folder may hold.
pub const HISTORY_CSV: &str = "history.csv";

#[derive(Debug, thiserror::Error)]
pub enum HistoryError {
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error(transparent)]
    Bad(#[from] LocatedError),
    #[error("{0}")]
    Pack(String),
    /// A run's record that does not read (or is newer than this build).
    #[error(transparent)]
    Record(#[from] crate::error::ReadError),
}

fn io(path: &Path) -> impl FnOnce(std::io::Error) -> HistoryError + '_ {
    move |source| HistoryError::Io {
        path: path.to_path_buf(),
        error: source,
    }
}

/// Parse `YYYY-MM-DD` (a longer ISO timestamp is cut to its date).
pub fn parse_date(s: &str) -> Option<NaiveDate> {
    let s = s.trim();
    NaiveDate::parse_from_str(s.get(..10).unwrap_or(s), "%Y-%m-%d").ok()
}

/// Read earlier measurements: `date,cycles,capacity_ah,resistance_mohm`
/// (cycles and resistance may be empty).
pub fn read_history_csv(path: &Path, rated_ah: f64) -> Result<Vec<HistoryPoint>, HistoryError> {
    let text = model::procedure::read_text(path).map_err(io(path))?;
    parse_history_csv(path, &text, rated_ah)
}

/// [`read_history_csv`] of text already read (`path` names it in errors
/// and sources).
pub fn parse_history_csv(
    path: &Path,
    text: &str,
    rated_ah: f64,
) -> Result<Vec<HistoryPoint>, HistoryError> {
    let mut out = Vec::new();
    let bad = |line: usize, column: usize, message: String| {
        HistoryError::Bad(LocatedError {
            location: Location {
                file: path.to_path_buf(),
                line,
                column,
            },
            message,
        })
    };
    let mut lines = text.lines().enumerate();
    let header: Vec<String> = match lines.next() {
        Some((_, h)) => h.split(',').map(|c| c.trim().to_string()).collect(),
        None => return Ok(out),
    };
    let want = ["date", "cycles", "capacity_ah", "resistance_mohm"];
    for (i, w) in want.iter().enumerate().take(3) {
        if header.get(i).map(String::as_str) != Some(*w) {
            return Err(bad(
                1,
                1,
                format!(
                    "expected the header '{}' (resistance_mohm optional)",
                    want.join(",")
                ),
            ));
        }
    }
    for (n, line) in lines {
        let line_no = n + 1;
        if line.trim().is_empty() {
            continue;
        }
        let f: Vec<&str> = line.split(',').map(str::trim).collect();
        let col = |i: usize| f[..i].iter().map(|s| s.len() + 1).sum::<usize>() + 1;
        let date = parse_date(f[0])
            .ok_or_else(|| bad(line_no, 1, format!("'{}' is not a date (YYYY-MM-DD)", f[0])))?;
        let cycles = match f.get(1).copied().unwrap_or("") {
            "" => None,
            s => Some(
                s.parse::<f64>()
                    .ok()
                    .filter(|c| c.is_finite() && *c >= 0.0)
                    .ok_or_else(|| bad(line_no, col(1), format!("'{s}' is not a cycle count")))?,
            ),
        };
        let cap_s = f.get(2).copied().unwrap_or("");
        let capacity_ah = cap_s
            .parse::<f64>()
            .ok()
            .filter(|c| c.is_finite() && *c > 0.0)
            .ok_or_else(|| {
                bad(
                    line_no,
                    col(2),
                    format!("'{cap_s}' is not a capacity in Ah"),
                )
            })?;
        let resistance_mohm = match f.get(3).copied().unwrap_or("") {
            "" => None,
            s => Some(
                s.parse::<f64>()
                    .ok()
                    .filter(|r| r.is_finite() && *r > 0.0)
                    .ok_or_else(|| {
                        bad(
                            line_no,
                            col(3),
                            format!("'{s}' is not a resistance in mohm"),
                        )
                    })?,
            ),
        };
        out.push(HistoryPoint {
            date,
            cycles: cycles.unwrap_or(f64::NAN),
            cycles_given: cycles.is_some(),
            capacity_ah,
            soh_pct: capacity_ah / rated_ah * 100.0,
            resistance_mohm,
            resistance_growth_pct: None,
            ieee450_percent: None,
            coulombic_efficiency_pct: None,
            grade: None,
            source: format!("{} line {line_no}", path.display()),
            run_dir: None,
            groups: None,
            pulse_r50_mohm: None,

            soh_u95_pct: None,
            flags: Vec::new(),
        });
    }
    Ok(out)
}

/// What a pack's history takes from one run's summary: its verdict's
/// figures the fade fit and the fleet read, small enough to keep in an
/// index.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RunFacts {
    pub run_id: String,
    pub test_date: String,
    pub status: model::status::RunStatus,
    pub stop_reason: Option<String>,
    pub cycle_count: Option<f64>,
    /// Of the capacity step, if there was one.
    pub capacity: Option<CapacityFacts>,
    /// The verdict's: does the run enter the capacity history?
    pub counts_for_history: bool,
    /// Why not, in words.
    pub not_counted: Option<String>,
    pub dcir_mohm: Option<f64>,
    /// The verdict's growth of this run's resistance, %.
    pub resistance_growth_pct: Option<f64>,
    /// The verdict's IEEE 450 percent capacity.
    #[serde(default)]
    pub ieee450_percent: Option<f64>,
    /// The verdict's coulombic efficiency (the capacity step's cycle), %.
    pub coulombic_efficiency_pct: Option<f64>,
    pub grade: Option<String>,
    /// Discharge Ah packbench measured in the run (the cycle count's
    /// throughput).
    pub discharged_ah: f64,
    /// A pack read group by group: how far its groups were apart (not kept
    /// by the results index: read from the summaries).
    #[serde(default)]
    pub groups: Option<analysis::fade::history::GroupSpread>,
    /// A pulse-power characterization's discharge-pulse resistance at
    /// 50 % state of charge, mΩ (not kept by the results index: read
    /// from the summaries).
    #[serde(default)]
    pub pulse_r50_mohm: Option<f64>,
    /// The verdict's state of health's expanded uncertainty (the reported
    /// 95 % interval's half-width), points.
    #[serde(default)]
    pub soh_u95_pct: Option<f64>,
    /// The grade was given inside a guard band (conditional or retest).
    #[serde(default)]
    pub grade_conditional: bool,
}

/// The capacity step's figures a history needs (the verdict's).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct CapacityFacts {
    pub measured_ah: f64,
    pub corrected_ah: Option<f64>,
    pub soh_pct: Option<f64>,
    pub from_full_charge: bool,
    pub preceded_by: String,
}

impl CapacityFacts {
    /// From the columns an index keeps of it (the measured figure, its
    /// start and what preceded it are there whenever a step was).
    pub fn from_columns(
        measured_ah: Option<f64>,
        corrected_ah: Option<f64>,
        soh_pct: Option<f64>,
        from_full_charge: Option<bool>,
        preceded_by: Option<String>,
    ) -> Option<CapacityFacts> {
        Some(CapacityFacts {
            measured_ah: measured_ah?,
            corrected_ah,
            soh_pct,
            from_full_charge: from_full_charge?,
            preceded_by: preceded_by?,
        })
    }
}

/// A pack's history from what an index keeps of it: its spec, the text of
/// its `history.csv` (named `csv_path` in errors) and its runs' facts.
pub fn from_index(
    pack_id: &str,
    spec: PackSpec,
    history_csv: Option<&str>,
    csv_path: &Path,
    runs: &[(PathBuf, RunFacts)],
) -> Result<PackHistory, HistoryError> {
    let points = match history_csv {
        Some(text) => parse_history_csv(csv_path, text, spec.rated_capacity_ah)?,
        None => Vec::new(),
    };
    Ok(assemble(pack_id, spec, points, runs))
}

impl RunFacts {
    pub fn of(s: &Summary) -> RunFacts {
        let v = &s.verdict;
        RunFacts {
            run_id: s.run_id.clone(),
            test_date: s.test_date.to_string(),
            status: s.status,
            stop_reason: s.stop_reason.clone(),
            cycle_count: s.cycle_count,
            capacity: s.capacity.as_ref().map(|c| CapacityFacts {
                measured_ah: c.measured_ah,
                corrected_ah: v.corrected_ah.get(),
                soh_pct: v.soh_pct.get(),
                from_full_charge: c.from_full_charge,
                preceded_by: c.preceded_by.clone(),
            }),
            counts_for_history: v.counts_for_history,
            not_counted: v.not_counted.map(|w| w.words().to_string()),
            dcir_mohm: v.resistance_mohm.get(),
            resistance_growth_pct: v.resistance_growth_pct.get(),
            ieee450_percent: v.ieee450_percent.get(),
            coulombic_efficiency_pct: v.coulombic_efficiency_pct.get(),
            grade: v.grade_label().map(str::to_string),
            discharged_ah: s.steps.iter().map(|st| st.charge_out_ah).sum(),
            groups: s
                .groups
                .as_ref()
                .map(analysis::fade::history::GroupSpread::of),
            pulse_r50_mohm: s
                .characterization
                .as_ref()
                .and_then(|c| c.discharge_resistance_at(50.0)),
            soh_u95_pct: v
                .soh_pct
                .get()
                .and(v.uncertainty.soh_pct.as_ref())
                .map(|b| b.half_width()),
            grade_conditional: v
                .grade
                .value()
                .and_then(|g| g.decision.as_ref())
                .is_some_and(|d| d.conditional),
        }
    }
}

/// Load the summaries of every run of a pack, in date order.
pub fn run_summaries(pack_dir: &Path) -> Result<Vec<(PathBuf, Summary)>, HistoryError> {
    let mut out = Vec::new();
    let entries = std::fs::read_dir(pack_dir).map_err(io(pack_dir))?;
    for e in entries {
        let e = e.map_err(io(pack_dir))?;
        let path = e.path().join(SUMMARY_JSON);
        if !path.is_file() {
            continue;
        }
        out.push((e.path(), crate::read::read_summary(&path)?));
    }
    out.sort_by(|a, b| {
        (a.1.test_date, a.1.run_id.as_str()).cmp(&(b.1.test_date, b.1.run_id.as_str()))
    });
    Ok(out)
}

/// Gather a pack's history from its results folder and optional extra CSV.
pub fn load(
    results: &Path,
    pack_id: &str,
    extra_csv: Option<&Path>,
) -> Result<PackHistory, HistoryError> {
    model::pack::check_pack_id(pack_id).map_err(|e| HistoryError::Pack(e.to_string()))?;
    let pack_dir = results.join(pack_id);
    let spec_path = pack_dir.join(PACK_TOML);
    let spec_text = model::procedure::read_text(&spec_path).map_err(io(&spec_path))?;
    let spec = PackSpec::from_toml(&spec_path, &spec_text)
        .map_err(|e| HistoryError::Pack(e.to_string()))?;
    let mut points = Vec::new();
    let csv_path = pack_dir.join(HISTORY_CSV);
    if csv_path.is_file() {
        points.extend(read_history_csv(&csv_path, spec.rated_capacity_ah)?);
    }
    if let Some(p) = extra_csv {
        points.extend(read_history_csv(p, spec.rated_capacity_ah)?);
    }
    let runs: Vec<(PathBuf, RunFacts)> = run_summaries(&pack_dir)?
        .iter()
        .map(|(d, s)| (d.clone(), RunFacts::of(s)))
        .collect();
    Ok(assemble(pack_id, spec, points, &runs))
}

/// A pack's history from its spec, its earlier measurements and its runs'
/// facts in date order: the one place the folder walk and the index meet.
pub fn assemble(
    pack_id: &str,
    spec: PackSpec,
    points: Vec<HistoryPoint>,
    runs: &[(PathBuf, RunFacts)],
) -> PackHistory {
    let mut left_out = Vec::new();
    // Runs in date order, with throughput counted across all of them
    // (aborted runs moved charge too).
    let mut run_points = Vec::new();
    for (dir, s) in runs {
        let Some(date) = parse_date(&s.test_date) else {
            // A date that does not read is not 1970: the run is left out
            // of the fit, and named.
            left_out.push(LeftOut {
                run_id: s.run_id.clone(),
                status: s.status,
                reason: format!("its test date '{}' is not a date", s.test_date),
            });
            continue;
        };
        // The verdict says whether the run counts: our completed runs and
        // tests imported from other benches alike.
        let usable =
            s.counts_for_history && s.capacity.as_ref().is_some_and(|c| c.soh_pct.is_some());
        if !usable {
            left_out.push(LeftOut {
                run_id: s.run_id.clone(),
                status: s.status,
                reason: match (&s.stop_reason, &s.not_counted, &s.capacity) {
                    (Some(r), _, _) => r.clone(),
                    (None, Some(w), Some(c)) if !c.from_full_charge => {
                        format!("{w} ({})", c.preceded_by)
                    }
                    (None, Some(w), _) => w.clone(),
                    _ => "no capacity measured".into(),
                },
            });
        }
        run_points.push((date, s, dir.clone(), usable));
    }
    // Count cycles: merge all dated events and walk them in order.
    let mut known_cycles: Option<f64> = None;
    let mut counted_since = 0.0;
    let mut merged: Vec<HistoryPoint> = Vec::new();
    let mut csv_points = points;
    csv_points.sort_by_key(|p| p.date);
    let mut csv_iter = csv_points.into_iter().peekable();
    for (date, s, dir, usable) in run_points {
        // A history line's empty cycle cell stays unknown (NaN): packbench
        // measured nothing there to count from.
        while let Some(p) = csv_iter.next_if(|p| p.date <= date) {
            if p.cycles_given {
                known_cycles = Some(p.cycles);
                counted_since = 0.0;
            }
            merged.push(p);
        }
        let cycles = match s.cycle_count {
            Some(c) => {
                known_cycles = Some(c);
                counted_since = 0.0;
                c
            }
            None => known_cycles.unwrap_or(0.0) + counted_since,
        };
        if usable {
            if let Some((c, soh)) = s.capacity.as_ref().and_then(|c| Some((c, c.soh_pct?))) {
                merged.push(HistoryPoint {
                    date,
                    cycles,
                    cycles_given: s.cycle_count.is_some(),
                    capacity_ah: c.corrected_ah.unwrap_or(c.measured_ah),
                    soh_pct: soh,
                    resistance_mohm: s.dcir_mohm,
                    resistance_growth_pct: s.resistance_growth_pct,
                    ieee450_percent: s.ieee450_percent,
                    coulombic_efficiency_pct: s.coulombic_efficiency_pct,
                    grade: s.grade.clone(),
                    source: format!("run {}", s.run_id),
                    run_dir: Some(dir.clone()),
                    groups: s.groups.clone(),
                    pulse_r50_mohm: s.pulse_r50_mohm,

                    soh_u95_pct: s.soh_u95_pct,
                    flags: Vec::new(),
                });
            }
        }
        counted_since += s.discharged_ah / spec.rated_capacity_ah;
    }
    merged.extend(csv_iter);
    analysis::fade::history::flag_jumps(&mut merged);
    PackHistory {
        pack_id: pack_id.to_string(),
        spec,
        points: merged,
        left_out,
    }
}

/// Pack ids with a `pack.toml` under a results folder.
pub fn pack_ids(results: &Path) -> Result<Vec<String>, HistoryError> {
    let mut ids = Vec::new();
    for e in std::fs::read_dir(results).map_err(io(results))? {
        let e = e.map_err(io(results))?;
        if e.path().join(PACK_TOML).is_file() {
            if let Some(n) = e.file_name().to_str() {
                ids.push(n.to_string());
            }
        }
    }
    ids.sort();
    Ok(ids)
}

/// Each run's capacity-step curve, for the overlay plot.
pub fn capacity_curves(h: &PackHistory) -> Vec<(String, Vec<(f64, f64)>)> {
    let mut out = Vec::new();
    for p in &h.points {
        let Some(dir) = &p.run_dir else { continue };
        let Ok(s) = crate::read::read_summary(&dir.join(crate::SUMMARY_JSON)) else {
            continue;
        };
        let Some(cap) = s.capacity else { continue };
        let Ok(log) = crate::read::read_samples(&dir.join(crate::SAMPLES_CSV)) else {
            continue;
        };
        let step: Vec<_> = log
            .samples
            .into_iter()
            .filter(|x| x.step == cap.step)
            .collect();
        out.push((
            format!("{} ({:.0} cyc)", p.date, p.cycles),
            analysis::curves::charge_curve(&step),
        ));
    }
    out
}

/// Build the fleet view of every pack under a results folder. A pack
/// whose records cannot be read is left out and named (pack id, why);
/// the rest are read on.
pub fn fleet(
    results: &Path,
    today: NaiveDate,
    schedule: &analysis::fade::schedule::Schedule,
    threshold_pct: f64,
) -> Result<(analysis::fade::fleet::Fleet, Vec<(String, String)>), HistoryError> {
    let mut histories = Vec::new();
    let mut skipped = Vec::new();
    for id in pack_ids(results)? {
        match load(results, &id, None) {
            Ok(h) => histories.push(h),
            Err(e) => skipped.push((id, e.to_string())),
        }
    }
    Ok((
        analysis::fade::fleet::rank(&histories, today, schedule, threshold_pct),
        skipped,
    ))
}
