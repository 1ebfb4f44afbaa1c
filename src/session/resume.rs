//! `packbench resume RUN_DIR`: go on with a run that was interrupted
//! (Ctrl-C, a killed process, a power cut), from its own record.
//!
//! The rules:
//! - Only a run that did not end on its own is resumed: `run.json` says
//!   `running` (the process died) or `interrupted` (Ctrl-C). A run stopped
//!   by a safety limit or an instrument fault is never resumed: find the
//!   cause and start a new run. A folder another live process is writing
//!   (its `run.lock`) is refused.
//! - Everything is checked before any instrument is spoken to: the manifest,
//!   the procedure text it holds (validated again for the pack), the pack
//!   spec, the log, and the bench.
//! - Steps that ended are not run again. The step that was running goes on
//!   by its kind ([`engine::resume_rule`]): a rest restarts its
//!   timer; a charge continues (same setpoints; constant current or taper,
//!   wherever the pack's voltage puts the supply), a discharge continues to
//!   its end condition, and both carry over their elapsed time and the
//!   charge and energy counted so far in the log; a pulse or a drain step
//!   starts again.
//! - Before the first step the outputs are confirmed off, the pack is read
//!   at rest and checked against the envelope, and the zero offsets are
//!   read again.
//! - The log goes on in the same files (a line cut by the interruption is
//!   dropped first). Run time goes on from the last sample plus the time
//!   the run was down (wall time × the pace of a simulated bench), so the
//!   gap shows; nothing is integrated across it. `summary.json` lists each
//!   resume with its gap and rule, and `run.json` keeps a record of it.
//! - What the log does not hold is lost: charge that flowed between the
//!   last sample on disk and the interruption is not counted (at most the
//!   last ten run seconds when a process is killed, the last second of wall
//!   time at a power cut). After a controller crash a real load may keep
//!   drawing until its own protection stops it: set the instruments' own
//!   limits (see the README).
//! - On the simulated bench the pack lives in the process that died, so it
//!   keeps its state in `sim-pack.json` beside the log (a real pack keeps
//!   its charge by itself); the resumed bench starts from that state, left
//!   open-circuit for the gap.

use crate::session::error::io_err;
use crate::session::error::InputError;
use crate::session::error::RunError;
use crate::session::links::SIMULATED;
use crate::session::request::JobBench;
use crate::session::request::Prepared;
use crate::session::request::RunOptions;
use crate::session::request::RunReport;
use crate::session::request::Speed;
use crate::session::request::StationJob;
use analysis::integrate::{spans_any, Integrator, Interruption};
use engine::{resume_continues, Carried, ResumePoint, RunOutcome, Timing};
use model::procedure::{self, LoadedProcedure};
use model::simconfig::SimConfig;
use model::status::RunState;
use model::status::RunStatus;
use record::event::{EndKind, Event};
use record::import::{stream_log, LogFormat};
use record::manifest::{Manifest, ResumeRecord};
use record::read::read_events;
use record::SIM_STATE_JSON;
use record::{EVENTS_JSONL, PACK_TOML, RUN_JSON, SAMPLES_CSV};
use std::path::{Path, PathBuf};

/// What a run folder says about where to go on.
#[derive(Debug, Clone, PartialEq)]
pub enum Found {
    /// Steps are left: go on here.
    GoOn(ResumePoint),
    /// The engine had finished (the process died writing the record): only
    /// the record is left to write.
    Recorded {
        status: RunStatus,
        reason: Option<String>,
    },
}

/// A checked resume, ready to run.
pub struct ResumeSetup {
    pub dir: PathBuf,
    pub manifest: Manifest,
    pub prepared: Prepared,
    pub found: Found,
    /// The simulated bench's settings and pace, when the run is simulated.
    pub sim: Option<(SimConfig, Speed)>,
    /// The bench file and station of a real bench.
    pub station: Option<(crate::session::benchfile::StationSpec, PathBuf)>,
    /// The run's lock, taken before anything else is checked.
    pub lock: record::write::RunLock,
}

fn bad(msg: String) -> RunError {
    RunError::Input(InputError::NotResumable(msg))
}

/// Read a run's `run.json`.
fn read_manifest(path: &Path) -> Result<Manifest, RunError> {
    record::read::read_manifest(path).map_err(|e| match e {
        record::read::ReadError::Io { path, error } => {
            crate::session::error::input_file_err(&path)(error)
        }
        record::read::ReadError::Bad {
            path,
            line,
            column,
            message,
        } => bad(format!(
            "{}:{line}:{column}: not a packbench run record: {message}",
            path.display()
        )),
        newer => newer.into(),
    })
}

/// The run folders to resume for a bench: for each station that names its
/// pack, that pack's latest run when it was run on this station and did
/// not end on its own (`running` or `interrupted`). Reads records only.
pub fn interrupted_runs(
    bench: &crate::session::benchfile::BenchFile,
    results: &Path,
) -> Result<Vec<(String, PathBuf)>, RunError> {
    let mut out = Vec::new();
    for st in &bench.stations {
        let Some(pack) = &st.pack_id else { continue };
        let pack_dir = results.join(pack);
        let Ok(entries) = std::fs::read_dir(&pack_dir) else {
            continue;
        };
        let mut runs: Vec<PathBuf> = entries
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.join(RUN_JSON).is_file())
            .collect();
        // Run ids begin with their UTC start time: the last is the latest.
        runs.sort();
        let Some(last) = runs.pop() else { continue };
        let m = read_manifest(&last.join(RUN_JSON))?;
        let here = m.bench.station.as_deref() == Some(st.name.as_str());
        if here && m.status.is_unfinished() {
            out.push((st.name.clone(), last));
        }
    }
    Ok(out)
}

/// Check a run folder and work out where it goes on. Talks to nothing.
pub fn prepare(
    dir: &Path,
    bench_override: Option<&Path>,
    speed_override: Option<Speed>,
    policy: Option<analysis::fade::grade::Policy>,
) -> Result<ResumeSetup, RunError> {
    let run_json = dir.join(RUN_JSON);
    let manifest = read_manifest(&run_json)?;
    match manifest.status {
        RunStatus::Running | RunStatus::Interrupted => {}
        RunStatus::Completed => {
            return Err(bad(format!(
                "{}: the run completed; nothing to resume",
                dir.display()
            )))
        }
        other => {
            return Err(bad(format!(
                "{}: the run ended '{other}' ({}): a run stopped by a safety limit or a fault is not resumed; find the cause and start a new run",
                dir.display(),
                manifest.stop_reason.as_deref().unwrap_or("no reason recorded")
            )))
        }
    }
    // One process drives a run: the lock is held from here to the end of
    // the record (a lock file left by a dead process does not hold).
    let lock = crate::session::drive::take_lock(dir)?;
    // The pack: its saved spec, else the one the manifest recorded.
    let pack_dir = dir
        .parent()
        .ok_or_else(|| bad(format!("{}: not inside a pack folder", dir.display())))?
        .to_path_buf();
    let saved = pack_dir.join(PACK_TOML);
    let pack = if saved.exists() {
        crate::session::prepare::read_pack_file(&saved)?
    } else {
        let p = &manifest.pack;
        let Some(rated) = p.rated_capacity_ah else {
            return Err(RunError::arguments(format!(
                "{}: the run's pack has no rated capacity",
                dir.join(record::RUN_JSON).display()
            )));
        };
        model::pack::PackSpec {
            chemistry: p.chemistry,
            series: p.series,
            rated_capacity_ah: rated,
            rated_energy_wh: p.rated_energy_wh,
            rated_rate_c: p.rated_rate_c,
            rated_resistance_mohm: p.rated_resistance_mohm,
        }
    };
    let proc_path = PathBuf::from(&manifest.procedure.path);
    let plan = procedure::validate::plan_from_text(&proc_path, &manifest.procedure.text, &pack)?;
    let sha = procedure::sha256_hex(manifest.procedure.text.as_bytes());
    if sha != manifest.procedure.sha256 {
        return Err(bad(format!(
            "{}: the procedure text does not match its recorded hash; the record was altered",
            run_json.display()
        )));
    }
    let test_date = chrono::NaiveDate::parse_from_str(&manifest.test_date, "%Y-%m-%d")
        .map_err(|_| bad(format!("{}: bad test_date", run_json.display())))?;
    let prepared = Prepared {
        procedure: LoadedProcedure {
            path: proc_path,
            text: manifest.procedure.text.clone(),
            sha256: sha,
            plan,
        },
        pack_id: manifest.pack_id.clone(),
        pack,
        pack_dir,
        save_pack: false,
        pack_note: None,
        options: RunOptions {
            test_date,
            cycle_count: manifest.cycle_count,
            policy: policy.unwrap_or_else(analysis::fade::grade::Policy::default_policy),
            trace: false,
            alarm_below_pct: manifest.alarm_below_pct,
            bms: manifest.bms.clone(),
            safe_stop_hold_s: engine::OFF_HOLD.as_secs_f64(),
            started_at: None,
        },
    };
    let found = find_point(dir, &prepared, manifest.bench.speed_factor)?;
    // The bench: the simulated one with its recorded settings and pace,
    // or the recorded station of a bench file.
    let sim_bench = || {
        let cfg = manifest
            .simulation
            .as_ref()
            .map(|s| s.config.clone())
            .unwrap_or_default();
        let speed = speed_override.unwrap_or(match manifest.bench.speed_factor {
            Some(f) => Speed::Factor(f),
            None => Speed::Max,
        });
        (cfg, speed)
    };
    let (sim, station) = if manifest.bench.kind == SIMULATED {
        (Some(sim_bench()), None)
    } else {
        let file = match (bench_override, &manifest.bench.bench_file) {
            (Some(f), _) => f.to_path_buf(),
            (None, Some(f)) => PathBuf::from(f),
            (None, None) => {
                return Err(bad(format!(
                    "{}: the run's bench file is not recorded; give --bench FILE",
                    dir.display()
                )))
            }
        };
        let bench = crate::session::benchfile::BenchFile::load(&file)?;
        let st = bench
            .station(manifest.bench.station.as_deref())
            .map_err(bad)?
            .clone();
        let (sp, lp) = st.profiles();
        crate::session::prepare::check_ranges(&prepared.procedure, sp, lp)?;
        if st.is_simulated() {
            (Some(sim_bench()), Some((st, file)))
        } else {
            (None, Some((st, file)))
        }
    };
    Ok(ResumeSetup {
        dir: dir.to_path_buf(),
        manifest,
        prepared,
        found,
        sim,
        station,
        lock,
    })
}

/// The least time between the last sample before an interruption and the
/// run time it goes on at, s.
const MIN_GAP_S: f64 = 0.01;

/// Where the run goes on, from its events and samples.
pub fn find_point(dir: &Path, p: &Prepared, speed_factor: Option<f64>) -> Result<Found, RunError> {
    let events = read_events(&dir.join(EVENTS_JSONL))?;
    let plan = &p.procedure.plan;
    let mut current: Option<u32> = None;
    let mut ended_ok: Vec<u32> = Vec::new();
    let mut last_event_t = 0.0f64;
    let mut breaks = Vec::new();
    let mut run_end: Option<(RunStatus, Option<String>)> = None;
    for e in &events {
        match e {
            Event::StepStart { step, t_s, .. } => {
                current = Some(*step);
                last_event_t = last_event_t.max(*t_s);
                run_end = None;
            }
            Event::Resumed {
                step,
                t_s,
                last_sample_t_s,
                ..
            } => {
                current = Some(*step);
                breaks.push(Interruption {
                    last_before_s: *last_sample_t_s,
                    resumed_at_s: *t_s,
                });
                last_event_t = last_event_t.max(*t_s);
                run_end = None;
            }
            Event::StepEnd {
                step, end_kind, t_s, ..
            } => {
                last_event_t = last_event_t.max(*t_s);
                if !matches!(end_kind, EndKind::Aborted | EndKind::Interrupted) {
                    ended_ok.push(*step);
                }
            }
            Event::Breach { message, .. } => {
                return Err(bad(format!(
                    "{}: the run hit a safety limit ({message}); it is not resumed: find the cause and start a new run",
                    dir.display()
                )))
            }
            Event::RunEnd { status, reason, t_s } => {
                last_event_t = last_event_t.max(*t_s);
                run_end = Some((*status, reason.clone()));
            }
            _ => {}
        }
    }
    if let Some((status, reason)) = run_end {
        if status != RunStatus::Interrupted {
            return Ok(Found::Recorded { status, reason });
        }
    }
    // The interrupted step's samples: elapsed time and counts, nothing
    // integrated across an earlier resume.
    let mut last_t: Option<f64> = None;
    let mut counters = Integrator::default();
    let mut seg_first: Option<f64> = None;
    let mut elapsed = 0.0;
    let mut prev_t: Option<f64> = None;
    stream_log(&dir.join(SAMPLES_CSV), &LogFormat::default(), |r| {
        last_t = Some(last_t.map_or(r.t_s, |l: f64| l.max(r.t_s)));
        if r.step != current || current.is_none() {
            return;
        }
        let broke = prev_t.is_some_and(|pt| spans_any(&breaks, pt, r.t_s));
        if broke {
            if let (Some(f), Some(pt)) = (seg_first, prev_t) {
                elapsed += pt - f;
            }
            seg_first = None;
            counters.break_segment();
        }
        if seg_first.is_none() {
            seg_first = Some(r.t_s);
        }
        counters.push(r.t_s, r.voltage_v, r.current_a);
        prev_t = Some(r.t_s);
    })?;
    if let (Some(f), Some(pt)) = (seg_first, prev_t) {
        elapsed += pt - f;
    }
    let last_sample_t = last_t.unwrap_or(last_event_t).max(last_event_t);
    // How long the run was down: since the log was last written.
    let modified = [SAMPLES_CSV, EVENTS_JSONL]
        .iter()
        .filter_map(|n| std::fs::metadata(dir.join(n)).ok()?.modified().ok())
        .max();
    let wall_gap = modified
        .and_then(|m| std::time::SystemTime::now().duration_since(m).ok())
        .map(|d| d.as_secs_f64())
        .unwrap_or(0.0);
    let gap_s = wall_gap * speed_factor.unwrap_or(1.0);
    // At least 10 ms apart, so the last sample before and the first after
    // stay on their own sides of the interruption in a log written to the
    // millisecond (`Interruption::spans`).
    let gap_s = gap_s.max(MIN_GAP_S);
    let t_run_s = last_sample_t + gap_s;
    let (position, carried) = match current {
        None => (0, None),
        Some(k) if ended_ok.contains(&k) => (k as usize, None),
        Some(k) => {
            let pos = (k as usize).saturating_sub(1);
            let st = plan.steps.get(pos).ok_or_else(|| {
                bad(format!(
                    "{}: the log names step {k}, but the procedure has {} steps",
                    dir.display(),
                    plan.steps.len()
                ))
            })?;
            let carried = (resume_continues(&st.kind) && prev_t.is_some()).then_some(Carried {
                elapsed_s: elapsed,
                counters,
            });
            (pos, carried)
        }
    };
    Ok(Found::GoOn(ResumePoint {
        position,
        t_run_s,
        last_sample_t_s: last_sample_t,
        gap_s,
        carried,
    }))
}

/// Resume a checked run: restore the simulated pack if any, open the bench,
/// go on, record.
pub async fn execute(
    setup: ResumeSetup,
    board: crate::session::live::Board,
    stop: engine::control::StopHandle,
    emergency: crate::session::emergency::Emergency,
) -> Result<RunReport, RunError> {
    let ResumeSetup {
        dir,
        mut manifest,
        prepared,
        found,
        sim,
        station,
        lock,
    } = setup;
    let run_id = manifest.run_id.clone();
    let point = match found {
        Found::Recorded { status, reason } => {
            // Only the record is missing.
            let outcome = RunOutcome {
                status: match status {
                    RunStatus::Completed => RunState::Completed,
                    RunStatus::Interrupted => RunState::Interrupted,
                    _ => RunState::Aborted,
                },
                reason,
                source_off_confirmed: false,
                load_off_confirmed: false,
                may_be_on: Vec::new(),
                truth: Vec::new(),
                duration_s: 0.0,
                timing: Timing::default(),
                zero: Default::default(),
            };
            return crate::session::finish::finish_record_after(
                &prepared,
                &dir,
                &run_id,
                manifest,
                outcome,
                None,
                crate::session::finish::Ending {
                    writer: Default::default(),
                    lock: Some(lock),
                },
            );
        }
        Found::GoOn(p) => p,
    };
    let rule = engine::resume_rule_at(
        prepared.procedure.plan.steps.get(point.position),
        point.carried.is_some(),
    );
    manifest.resumes.push(ResumeRecord {
        at_utc: chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        step: prepared
            .procedure
            .plan
            .steps
            .get(point.position)
            .map(|s| s.index)
            .unwrap_or(0),
        t_s: point.t_run_s,
        gap_s: point.gap_s,
        rule,
    });
    manifest.status = RunStatus::Running;
    manifest.finished_utc = None;
    manifest.stop_reason = None;
    let job = StationJob {
        name: station
            .as_ref()
            .map(|(s, _)| s.name.clone())
            .unwrap_or_else(|| "sim".into()),
        prepared,
        bench: match (station, sim) {
            (Some((spec, file)), sim) => JobBench::of_station(
                spec,
                file,
                sim.as_ref().map(|(c, _)| c.clone()).unwrap_or_default(),
                sim.as_ref().map(|(_, s)| *s).unwrap_or(Speed::Factor(1.0)),
            ),
            (None, sim) => JobBench::Sim {
                cfg: sim.as_ref().map(|(c, _)| c.clone()).unwrap_or_default(),
                speed: sim.as_ref().map(|(_, s)| *s).unwrap_or(Speed::Factor(1.0)),
                station: None,
            },
        },
        board,
    };
    let rec = crate::session::drive::Recording {
        dir: dir.clone(),
        run_id,
        manifest,
        resume: Some(point.clone()),
        lock,
    };
    let sink = record::write::RunLogSink::append(&dir).map_err(io_err(&dir))?;
    // The simulated pack's kept state: none yet is fine; one newer than
    // this build is refused by name.
    let kept = match record::schema::read_json::<sim::bench::PackState>(&dir.join(SIM_STATE_JSON)) {
        Ok(k) => Some(k),
        Err(e @ record::read::ReadError::Newer { .. }) => return Err(e.into()),
        Err(_) => None,
    };
    let resumed = crate::session::Resumed {
        rec,
        sink,
        kept,
        gap_s: point.gap_s,
    };
    crate::session::run(job.session(stop, emergency, false, Some(resumed))).await
}
