//! The summary of a run, built in one place for every caller (the end of
//! a run, `resume`, `analyze`, `import`, the console): analysing a log after the fact: one of our run folders (steps from its
//! events, the same code path as the summary written at the end of the run,
//! so the figures are identical), or any bench's CSV (steps found from the
//! current when the log has no step column). Streams the log once.

use crate::error::ReadError;
use crate::event::Event;
use analysis::fade::grade::Policy;
use analysis::integrate::Interruption;
use analysis::pulse::is_jump;
use analysis::{AnalysisOptions, Analyzer, CurveData};
use model::bms::BmsReadings;
use model::pack::PackSpec;
use model::status::RunStatus;

use crate::import::{stream_log, LogFormat, ReadReport, Row};
use crate::read::{read_events, step_infos};
use crate::{PackSummary, Summary, EVENTS_JSONL, SAMPLES_CSV};
use chrono::NaiveDate;
use model::sample::Sample;
use std::path::Path;

/// Finds steps in a log without a step column: a new step where the
/// current changes class (rest, charge, discharge; with hysteresis) or
/// jumps between two samples (a pulse level); a constant-voltage taper,
/// whose current falls smoothly, stays one step.
#[derive(Debug, Clone)]
pub struct StepDetector {
    rest_a: f64,
    jump_a: f64,
    class: i8,
    prev_i: Option<f64>,
    step: u32,
}

impl StepDetector {
    /// Thresholds from the rated capacity: rest below C/100 (at least
    /// 5 mA), a jump above C/20 or 10 % of the level (common practice).
    pub fn new(rated_ah: f64) -> StepDetector {
        StepDetector {
            rest_a: (0.01 * rated_ah).max(0.005),
            jump_a: (0.05 * rated_ah).max(0.01),
            class: 2,
            prev_i: None,
            step: 0,
        }
    }

    /// The step number of a sample with current `i` (pack convention).
    pub fn step_of(&mut self, i: f64) -> u32 {
        let class = match self.class {
            // Hysteresis: leaving rest needs twice the rest threshold.
            0 if i.abs() <= 2.0 * self.rest_a => 0,
            _ if i.abs() <= self.rest_a => 0,
            _ if i > 0.0 => 1,
            _ => -1,
        };
        let jump = match self.prev_i {
            Some(p) if class != 0 => {
                (i - p).abs() > self.jump_a.max(0.1 * p.abs()) && is_jump(p, i, self.rest_a)
            }
            _ => false,
        };
        if class != self.class || jump {
            self.step += 1;
            self.class = class;
        }
        self.prev_i = Some(i);
        self.step
    }
}

/// How a summary's status and stop reason were found.
pub struct Outcome {
    pub status: RunStatus,
    pub reason: Option<String>,
}

/// Build a summary from an analysis and its context.
pub fn build_summary(
    a: analysis::Analysis,
    ctx: &SummaryContext<'_>,
    outcome: Outcome,
    samples: usize,
    duration_s: f64,
    pack_dir: Option<&Path>,
    measured_with: Option<(
        model::accuracy::BenchAccuracy,
        Option<analysis::uncertainty::Tare>,
    )>,
) -> Summary {
    let reference = match pack_dir {
        Some(d) => {
            reference_resistance(d, ctx.pack.rated_resistance_mohm, ctx.test_date, ctx.run_id)
        }
        None => ctx
            .pack
            .rated_resistance_mohm
            .map(|mohm| crate::verdict::Reference {
                mohm,
                source: "rated".into(),
            }),
    };
    let (verdict, judged) = crate::verdict::judge(&crate::verdict::Inputs {
        status: outcome.status,
        chemistry: ctx.pack.chemistry,
        rated_ah: Some(ctx.pack.rated_capacity_ah),
        rated_rate_c: Some(
            ctx.pack
                .rated_rate_c
                .unwrap_or_else(|| ctx.pack.chemistry.default_rated_rate_c()),
        ),
        capacity: a.capacity.as_ref(),
        recalibration: a.recalibration.as_ref(),
        resistance: a.resistance.as_ref(),
        reference,
        steps: &a.steps,
        cycles: &a.cycles,
        groups: a.groups.as_ref(),
        policy: Some(ctx.policy),
        accuracy: measured_with.as_ref().map(|m| &m.0),
        tare: measured_with.as_ref().and_then(|m| m.1),
    });
    let mut a = a;
    a.warnings.extend(judged);
    let bms = ctx.bms.filter(|b| !b.is_empty()).map(|b| {
        analysis::bms::compare(b, &a.steps, a.capacity.as_ref(), a.recalibration.as_ref())
    });
    Summary {
        schema_version: crate::schema::SCHEMA_VERSION,
        status: outcome.status,
        stop_reason: outcome.reason,
        pack_id: ctx.pack_id.to_string(),
        run_id: ctx.run_id.to_string(),
        procedure_title: ctx.title.to_string(),
        pack: PackSummary::from(ctx.pack),
        test_date: ctx.test_date,
        cycle_count: ctx.cycle_count,
        capacity: a.capacity,
        resistance: a.resistance,
        verdict,
        older_grade: None,
        steps: a.steps,
        cycles: a.cycles,
        warnings: a.warnings,
        outputs_may_be_on: Vec::new(),
        samples,
        duration_s,
        recalibration: a.recalibration,
        curves: a.curves,
        pulse_resistance: a.pulse,
        gaps: a.gaps,
        log: a.quality,
        standby_drain: a.standby_drain,
        preflight: None,
        resumed: Vec::new(),
        alarms: Vec::new(),
        bms,
        needs_rating: Vec::new(),
        groups: a.groups,
        characterization: a.characterization,
        accuracy: measured_with.map(|m| m.0),
        calibration: None,
    }
}

/// What the events add to a summary: the preflight readings, resumes,
/// alarms and warnings.
pub fn add_event_records(s: &mut Summary, events: &[Event]) {
    for e in events {
        match e {
            Event::Preflight {
                voltage_v,
                temperature_c,
                source_zero_a,
                load_zero_a,
                corrected,
                ..
            } => {
                // The first preflight is the run's; a resume's is newer.
                s.preflight = Some(crate::Preflight {
                    voltage_v: *voltage_v,
                    temperature_c: *temperature_c,
                    source_zero_ma: source_zero_a.map(|a| a * 1000.0),
                    load_zero_ma: load_zero_a.map(|a| a * 1000.0),
                    corrected: *corrected,
                })
            }
            Event::Resumed {
                t_s,
                step,
                last_sample_t_s,
                gap_s,
                rule,
            } => s.resumed.push(crate::ResumeNote {
                t_s: *t_s,
                step: *step,
                last_sample_t_s: *last_sample_t_s,
                gap_s: *gap_s,
                rule: rule.clone(),
            }),
            Event::Alarm { message, .. } => s.alarms.push(message.clone()),
            Event::Warning { message, .. } => s.warnings.push(message.clone()),
            Event::InstrumentError {
                instrument,
                kind,
                message,
                ..
            } if kind == "may_be_on" => {
                s.outputs_may_be_on.push(instrument.clone());
                s.warnings.push(format!("{instrument}: {message}"));
            }
            _ => {}
        }
    }
    if !s.resumed.is_empty() {
        let down: f64 = s.resumed.iter().map(|r| r.gap_s).sum();
        s.warnings.push(format!(
            "the run was resumed {} time(s) after an interruption ({:.0} s down in all); nothing is counted across an interruption",
            s.resumed.len(),
            down
        ));
    }
}

/// A capacity discharge that started far from the pack's temperature at
/// rest before the run: the pack had not cooled (or warmed) to the room,
/// and a temperature correction from that start misleads.
pub fn warn_if_not_cooled(s: &mut Summary, events: &[Event]) {
    let Some(c) = &s.capacity else { return };
    // The run's own reading before its first step (a resume reads the
    // pack again, warm from where it stopped).
    let before = events.iter().find_map(|e| match e {
        Event::Preflight { temperature_c, .. } => Some(*temperature_c),
        _ => None,
    });
    let (Some(start), Some(Some(before))) = (c.initial_temperature_c, before) else {
        return;
    };
    let off = start - before;
    if off.abs() > analysis::correct::COOLED_WITHIN_K {
        s.warnings.push(format!(
            "the capacity discharge started at {start:.1} °C, {off:+.1} K from the pack's {before:.1} °C at rest before the run (taken as the room's): it had not settled to the room's temperature after its charge, so the temperature correction from its start is unreliable; rest it until its temperature settles (dT/dt <) before the discharge"
        ));
    }
}

/// Feed a log's rows to the analyzer, counting samples and span.
pub struct Feed {
    n: usize,
    first: Option<f64>,
    last: f64,
}

impl Feed {
    fn new() -> Feed {
        Feed {
            n: 0,
            first: None,
            last: 0.0,
        }
    }
    fn note(&mut self, t: f64) {
        self.n += 1;
        if self.first.is_none() {
            self.first = Some(t);
        }
        self.last = t;
    }
    fn duration(&self) -> f64 {
        self.first.map(|f| self.last - f).unwrap_or(0.0)
    }
}

pub fn note_partial_line(a: &mut analysis::Analysis, partial: bool, what: &str) {
    if partial {
        a.warnings.push(format!(
            "the last line of {what} was incomplete and was left out"
        ));
        a.quality.partial_last_line = true;
    }
}

/// Summarise one of our run folders from its log and events.
pub fn summarize_run(
    dir: &Path,
    ctx: &SummaryContext<'_>,
    outcome: Option<Outcome>,
    opts: AnalysisOptions,
) -> Result<Summary, ReadError> {
    summarize_run_with_curves(dir, ctx, outcome, opts).map(|x| x.0)
}

/// [`summarize_run`] and the curves for CSV export.
pub fn summarize_run_with_curves(
    dir: &Path,
    ctx: &SummaryContext<'_>,
    outcome: Option<Outcome>,
    opts: AnalysisOptions,
) -> Result<(Summary, CurveData), ReadError> {
    let events = read_events(&dir.join(EVENTS_JSONL))?;
    let infos = step_infos(&events);
    // The pack's own Peukert exponent, kept with it, unless one was given.
    // A file that does not read is said and not used: the run's record is
    // written whatever it holds.
    let mut opts = opts;
    let mut peukert_warning = None;
    if opts.correction.peukert_k.is_none() {
        match crate::read::read_peukert(dir.parent().unwrap_or(dir)) {
            Ok(Some(k)) => {
                opts.correction.peukert_k = Some(k);
                opts.correction.peukert_source = analysis::correct::PeukertSource::MeasuredForPack;
            }
            Ok(None) => {}
            Err(e) => {
                peukert_warning = Some(format!("{e}: the pack's Peukert exponent was not used"))
            }
        }
    }
    let mut an = Analyzer::new(ctx.pack, &infos, opts);
    an.set_breaks(
        events
            .iter()
            .filter_map(|e| match e {
                Event::Resumed {
                    t_s,
                    last_sample_t_s,
                    ..
                } => Some(Interruption {
                    last_before_s: *last_sample_t_s,
                    resumed_at_s: *t_s,
                }),
                _ => None,
            })
            .collect(),
    );
    let mut feed = Feed::new();
    // A pack read group by group: its channels, and the pack's current
    // for each group scan.
    let manifest = crate::read::read_manifest(&dir.join(crate::RUN_JSON)).ok();
    let accuracy = manifest.as_ref().and_then(|m| m.accuracy.clone());
    let calibration = manifest.as_ref().and_then(|m| m.calibration.clone());
    // The plan the run followed (its text is in the manifest): which of
    // its steps that ended on their time cap had another way to end.
    let plan = manifest.as_ref().and_then(|m| {
        model::procedure::validate::plan_from_text(
            std::path::Path::new(&m.procedure.path),
            &m.procedure.text,
            ctx.pack,
        )
        .ok()
    });
    let channels = manifest.and_then(|m| m.groups);
    let mut pack_points: Vec<analysis::groups::PackPoint> = Vec::new();
    let rep = stream_log(&dir.join(SAMPLES_CSV), &LogFormat::default(), |r: Row| {
        feed.note(r.t_s);
        let s = r.sample();
        if channels.is_some() {
            pack_points.push(analysis::groups::PackPoint {
                t_s: s.t_s,
                step: s.step,
                current_a: s.current_a,
            });
        }
        an.push(&s);
    })?;
    let mut a = an.finish();
    a.warnings.extend(peukert_warning);
    note_partial_line(&mut a, rep.partial_last_line, "samples.csv");
    if let Some(ch) = &channels {
        if let Some(rows) = crate::read::read_groups(dir)? {
            a.groups = Some(analysis::groups::analyze(&analysis::groups::GroupInputs {
                channels: ch,
                pack: &pack_points,
                groups: &rows,
                steps: &a.steps,
                capacity_step: a.capacity.as_ref().map(|c| c.step),
            }));
        }
    }
    let outcome = outcome.unwrap_or_else(|| {
        events
            .iter()
            .rev()
            .find_map(|e| match e {
                Event::RunEnd { status, reason, .. } => Some(Outcome {
                    status: *status,
                    reason: reason.clone(),
                }),
                _ => None,
            })
            .unwrap_or(Outcome {
                status: RunStatus::Interrupted,
                reason: Some("the run has no end record (killed or power cut)".into()),
            })
    });
    let pack_dir = dir.parent().unwrap_or(dir);
    let curves = std::mem::take(&mut a.curve_data);
    // Judged once, with the readings' stated accuracy and the preflight's
    // tare: every figure gets its budget and the grade its decision rule.
    let tare = events.iter().find_map(|e| match e {
        Event::Preflight { corrected, .. } => Some(*corrected),
        _ => None,
    });
    let measured_with = accuracy.map(|a| {
        (
            a,
            tare.filter(|c| *c).map(|_| analysis::uncertainty::Tare {
                readings: crate::budget::TARE_READINGS,
            }),
        )
    });
    let mut s = build_summary(
        a,
        ctx,
        outcome,
        feed.n,
        feed.duration(),
        Some(pack_dir),
        measured_with,
    );
    add_event_records(&mut s, &events);
    if let Some(plan) = &plan {
        for st in s
            .steps
            .iter()
            .filter(|st| st.end_kind == Some(model::end::EndKind::Time))
        {
            if let Some(p) = plan.steps.iter().find(|p| p.index == st.step) {
                s.warnings.extend(p.time_cap_warning(st.duration_s, false));
            }
        }
    }
    if let Some(c) = &calibration {
        if c.overdue {
            s.warnings.push(format!(
                "the station's calibration {} was due on {}: it was applied, but the bench is out of its calibration interval",
                c.id, c.next_due
            ));
        }
    }
    s.calibration = calibration;
    warn_if_not_cooled(&mut s, &events);
    Ok((s, curves))
}

/// What an imported log is and how to read it.
pub struct ForeignLog<'a> {
    pub path: &'a Path,
    pub format: LogFormat,
    pub pack: &'a PackSpec,
    pub pack_id: &'a str,
    pub test_date: chrono::NaiveDate,
    pub policy: &'a Policy,
    pub bms: Option<&'a BmsReadings>,
}

/// Analyse any bench's CSV log.
pub fn summarize_foreign(
    log: &ForeignLog<'_>,
    mut opts: AnalysisOptions,
) -> Result<(Summary, ReadReport, CurveData), ReadError> {
    opts.imported = true;
    opts.detect_capacity = true;
    let mut an = Analyzer::new(log.pack, &[], opts);
    let mut det = StepDetector::new(log.pack.rated_capacity_ah);
    let mut feed = Feed::new();
    let mut prev: Option<Row> = None;
    let rep = stream_log(log.path, &log.format, |r: Row| {
        // A row at the time of the row before with other values: counted
        // and left out, before it can start a step of no duration.
        if r.step.is_none() && prev.is_some_and(|p| p.t_s == r.t_s && p != r) {
            an.skip_repeated_time(&Sample {
                t_s: r.t_s,
                step: 0,
                cycle: 0,
                voltage_v: r.voltage_v,
                current_a: r.current_a,
                temperature_c: r.temperature_c,
            });
            return;
        }
        prev = Some(r);
        let step = match r.step {
            Some(s) => s,
            None => det.step_of(r.current_a),
        };
        feed.note(r.t_s);
        an.push(&Sample {
            t_s: r.t_s,
            step,
            cycle: 0,
            voltage_v: r.voltage_v,
            current_a: r.current_a,
            temperature_c: r.temperature_c,
        });
    })?;
    let mut a = an.finish();
    note_partial_line(&mut a, rep.partial_last_line, "the log");
    if rep.bad_rows_skipped > 0 {
        a.warnings.push(format!(
            "{} row(s) that did not parse were left out (--skip-bad-rows); each is named below",
            rep.bad_rows_skipped
        ));
        // Each named (the message carries file:line:column).
        for (_, m) in &rep.bad_rows {
            a.warnings.push(format!("left out: {m}"));
        }
        if rep.bad_rows_skipped > rep.bad_rows.len() as u64 {
            a.warnings.push(format!(
                "… and {} more row(s) left out",
                rep.bad_rows_skipped - rep.bad_rows.len() as u64
            ));
        }
    }
    let name = log
        .path
        .file_name()
        .and_then(|n| n.to_str())
        .unwrap_or("log")
        .to_string();
    let title = format!("imported log {name}");
    let ctx = SummaryContext {
        pack: log.pack,
        pack_id: log.pack_id,
        run_id: &name,
        title: &title,
        test_date: log.test_date,
        cycle_count: None,
        policy: log.policy,
        bms: log.bms,
    };
    let curves = std::mem::take(&mut a.curve_data);
    let s = build_summary(
        a,
        &ctx,
        Outcome {
            status: RunStatus::Imported,
            reason: None,
        },
        feed.n,
        feed.duration(),
        None,
        None,
    );
    Ok((s, rep, curves))
}

/// A stand-in pack spec for a foreign log analysed without one. Ah, Wh,
/// efficiencies, resistance and curves need no rating, but the analysis
/// scales its thresholds to one (rest under C/100, a new step at a jump
/// over C/20, the charge grid's resolution): the largest charge the log
/// moves in one direction stands in for it, read in a first pass. One
/// cell in series, so "per cell" figures are the pack's.
pub fn provisional_spec(path: &Path, format: &LogFormat) -> Result<PackSpec, ReadError> {
    let (mut run_ah, mut best_ah, mut sign) = (0.0f64, 0.0f64, 0.0f64);
    let mut prev: Option<Row> = None;
    stream_log(path, format, |r: Row| {
        if let Some(p) = prev {
            let dt = r.t_s - p.t_s;
            if dt > 0.0 {
                let q = (p.current_a + r.current_a) * 0.5 * dt / 3600.0;
                let s = r.current_a.signum();
                if r.current_a != 0.0 && s != sign {
                    run_ah = 0.0;
                    sign = s;
                }
                run_ah += q.abs();
                best_ah = best_ah.max(run_ah);
            }
        }
        prev = Some(r);
    })?;
    Ok(PackSpec {
        chemistry: model::pack::Chemistry::LiIon,
        series: 1,
        rated_capacity_ah: best_ah.max(0.001),
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    })
}

/// What needs a rated capacity and was left out of a summary made
/// without a pack spec.
pub const NEEDS_RATING: [&str; 6] = [
    "state of health",
    "C-rate",
    "rate and temperature corrections",
    "grade",
    "new nominal capacity",
    "the pack's chemistry and cells in series",
];

/// Clear what a stand-in spec ([`provisional_spec`]) would have made up,
/// and say so.
pub fn mark_unrated(s: &mut Summary) {
    s.recalibration = None;
    if let Some(c) = s.capacity.as_mut() {
        c.rated_ah = None;
        c.c_rate = None;
        c.corrected_ah = None;
        c.corrections.clear();
        c.ieee450_percent = None;
    }
    s.pack.rated_capacity_ah = None;
    s.verdict.resistance_reference = None;
    crate::verdict::rejudge(s, None);
    s.warnings
        .retain(|w| !w.contains("no state of health, grade or new nominal"));
    s.needs_rating = NEEDS_RATING.iter().map(|x| x.to_string()).collect();
}

/// What a summary needs besides the log.
#[derive(Debug, Clone, Copy)]
pub struct SummaryContext<'a> {
    pub pack: &'a PackSpec,
    pub pack_id: &'a str,
    pub run_id: &'a str,
    pub title: &'a str,
    pub test_date: NaiveDate,
    pub cycle_count: Option<f64>,
    pub policy: &'a Policy,
    /// What the pack's BMS reported, to compare with the measurement.
    pub bms: Option<&'a BmsReadings>,
}

/// The resistance growth is measured against: the rated resistance when
/// the spec has one, else the first reading of an earlier completed run of
/// the pack (named), else none (this run's is the pack's first).
pub fn reference_resistance(
    pack_dir: &Path,
    rated_mohm: Option<f64>,
    test_date: NaiveDate,
    run_id: &str,
) -> Option<crate::verdict::Reference> {
    if let Some(mohm) = rated_mohm {
        return Some(crate::verdict::Reference {
            mohm,
            source: "rated".into(),
        });
    }
    let runs = crate::history::run_summaries(pack_dir).ok()?;
    runs.iter()
        .filter(|(_, s)| {
            s.status.is_complete() && (s.test_date, s.run_id.as_str()) < (test_date, run_id)
        })
        .find_map(|(_, s)| {
            s.resistance.as_ref().map(|r| crate::verdict::Reference {
                mohm: r.dcir_mohm,
                source: format!("run {}", s.run_id),
            })
        })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn steps_are_found_from_the_current() {
        let mut d = StepDetector::new(10.0);
        let mut steps = Vec::new();
        // rest, CC charge 5 A tapering smoothly to 0.3 A, rest, 2 A
        // discharge, a 10 A pulse, back to 2 A, rest.
        for _ in 0..5 {
            steps.push(d.step_of(0.001));
        }
        for k in 0..50 {
            let i = if k < 20 {
                5.0
            } else {
                5.0 * (0.94f64).powi(k - 20)
            };
            steps.push(d.step_of(i.max(0.3)));
        }
        for _ in 0..5 {
            steps.push(d.step_of(-0.002));
        }
        for _ in 0..10 {
            steps.push(d.step_of(-2.0));
        }
        for _ in 0..3 {
            steps.push(d.step_of(-10.0));
        }
        for _ in 0..10 {
            steps.push(d.step_of(-2.0));
        }
        steps.push(d.step_of(0.0));
        let mut distinct = steps.clone();
        distinct.dedup();
        assert_eq!(distinct, vec![1, 2, 3, 4, 5, 6, 7]);
        assert_eq!(steps[5], 2);
        assert_eq!(steps[54], 2, "the taper stays in the charge step");
    }
}
