//! Drive one station: create the run folder, connect, run the engine and
//! hand over to the record.

use crate::session::error::io_err;
use crate::session::error::Failure;
use crate::session::error::InputError;
use crate::session::error::RunError;
use crate::session::finish::finish_record_after;
use crate::session::links::BenchLinks;
use crate::session::links::BoundLink;
use crate::session::links::SimRun;
use crate::session::request::Prepared;
use crate::session::request::RunReport;
use engine::clock::Clock;
use engine::control::StopHandle;
use engine::{Engine, Station};
use instrument::scpi::Trace;
use instrument::{Load, Meter, Source};
use model::status::RunStatus;
use model::truth::GroundTruth;
use record::manifest::{utc_now, SIM_TRUTH_LABEL};
use record::manifest::{
    BenchRecord, InstrumentRecord, Manifest, ProcedureRecord, SimulationRecord, ToolInfo,
};
use record::write::{create_run_folder, write_json, RunLogSink};
use record::write::{LockError, RunLock};
use record::{PackSummary, PACK_TOML, RUN_JSON};
use record::{SIM_STATE_JSON, TRACE_LOG};
use std::path::{Path, PathBuf};
use std::sync::Arc;

pub fn procedure_stem(p: &Path) -> String {
    p.file_stem()
        .and_then(|s| s.to_str())
        .map(|s| {
            s.chars()
                .map(|c| {
                    if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                        c
                    } else {
                        '_'
                    }
                })
                .collect()
        })
        .unwrap_or_else(|| "run".into())
}

/// A station that reads groups: one group per cell of the pack's series
/// count, and a meter that can scan. Checked before anything is created
/// or any link spoken to.
pub fn check_groups(p: &Prepared, links: &BenchLinks) -> Result<(), RunError> {
    let Some(g) = &links.groups else {
        return Ok(());
    };
    if g.groups() != p.pack.series as usize {
        return Err(InputError::Arguments(format!(
            "the station reads {} cell groups, but pack {} has {} in series: one group per cell of the series count",
            g.groups(),
            p.pack_id,
            p.pack.series
        ))
        .into());
    }
    let scans = links.meter.as_ref().is_some_and(|m| {
        let c = &m.profile.commands;
        c.scan_read.is_some() || c.measure_channel_voltage.is_some()
    });
    if !scans {
        return Err(InputError::Arguments(
            "the station reads cell groups but its meter's profile cannot read channels (it needs scan_list and scan_read, or measure_channel_voltage)".into(),
        )
        .into());
    }
    Ok(())
}

/// Create the run folder, then drive. The run folder is created only
/// here, after every check has passed.
pub async fn start(p: &Prepared, bench: Bound, stop: StopHandle) -> Result<RunReport, RunError> {
    let Bound {
        links,
        clock,
        truth,
        sim,
    } = bench;
    check_groups(p, &links)?;
    let started = p.options.started_at.unwrap_or_else(chrono::Utc::now);
    // Sorted by the day the test counts for, then the wall-clock start.
    let base_id = format!(
        "{}-{}Z-{}",
        p.options.test_date.format("%Y%m%d"),
        started.format("%H%M%S"),
        procedure_stem(&p.procedure.path)
    );

    // The folder and the pack's spec, synced: off the thread the stations
    // share, so one station's disk work never delays another's samples.
    let pack_dir = p.pack_dir.clone();
    let pack_toml = p.save_pack.then(|| p.pack.to_toml());
    // The station's current calibration, read with the folder's work.
    let station = calibration_station(&links);
    let (run_id, dir, sink, lock, calibration) = off_thread(move || {
        if let Some(text) = pack_toml {
            std::fs::create_dir_all(&pack_dir).map_err(io_err(&pack_dir))?;
            let path = pack_dir.join(PACK_TOML);
            record::write::atomic_write(&path, text.as_bytes()).map_err(io_err(&path))?;
        }
        let (run_id, dir) = create_run_folder(&pack_dir, &base_id).map_err(io_err(&pack_dir))?;
        let lock = take_lock(&dir)?;
        let sink = RunLogSink::create(&dir).map_err(io_err(&dir))?;
        let results = pack_dir.parent().unwrap_or(&pack_dir);
        let calibration = match station {
            Some(st) => record::calibration::current(results, &st)?,
            None => None,
        };
        Ok((run_id, dir, sink, lock, calibration))
    })
    .await?;
    let manifest = Manifest {
        schema_version: record::schema::SCHEMA_VERSION,
        tool: ToolInfo {
            name: "packbench".into(),
            version: env!("CARGO_PKG_VERSION").into(),
        },
        run_id: run_id.clone(),
        pack_id: p.pack_id.clone(),
        started_utc: started.to_rfc3339_opts(chrono::SecondsFormat::Millis, true),
        finished_utc: None,
        test_date: p.options.test_date.to_string(),
        cycle_count: p.options.cycle_count,
        bms: p.options.bms.clone(),
        status: RunStatus::Running,
        stop_reason: None,
        procedure: ProcedureRecord {
            path: p.procedure.path.display().to_string(),
            title: p.procedure.plan.title.clone(),
            sha256: p.procedure.sha256.clone(),
            text: p.procedure.text.clone(),
        },
        pack: PackSummary::from(&p.pack),
        bench: BenchRecord {
            kind: links.kind.clone(),
            speed: links.speed.clone(),
            speed_factor: match &sim {
                Some(s) => s.speed_factor,
                None if clock.is_simulated() => None,
                None => Some(1.0),
            },
            bench_file: links
                .hooks
                .station
                .as_ref()
                .map(|(_, f)| f.display().to_string()),
            station: links.hooks.station.as_ref().map(|(n, _)| n.clone()),
        },
        instruments: Vec::new(),
        simulation: sim.as_ref().map(|s| SimulationRecord {
            label: SIM_TRUTH_LABEL.into(),
            config: s.config.clone(),
            true_capacity_ah: s.true_capacity_ah,
            steps: Vec::new(),
        }),
        timing: None,
        alarm_below_pct: p.options.alarm_below_pct,
        resumes: Vec::new(),
        groups: links.groups.clone(),
        outputs_may_be_on: Vec::new(),
        record_incomplete: Vec::new(),
        failed_resumes: Vec::new(),
        accuracy: Some(station_accuracy(&links)),
        calibration: None,
    };
    let mut manifest = manifest;
    if let Some((path, rec)) = calibration {
        apply_calibration(p, &path, &rec, &mut manifest);
    }
    let rec = Recording {
        dir,
        run_id,
        manifest,
        resume: None,
        lock,
    };
    let bench = Bound {
        links,
        clock,
        truth,
        sim,
    };
    drive(p, rec, sink, bench, stop).await
}

/// The station's current calibration (`<results>/_calibration/<station>/`,
/// the simulated bench's station being `sim`): recorded in `run.json`,
/// applied to the readings by the engine, and its uncertainty used in the
/// budgets where it is better than the stated accuracy. An overdue one is
/// still applied, and said.
fn apply_calibration(
    p: &Prepared,
    path: &std::path::Path,
    rec: &record::calibration::CalibrationRecord,
    manifest: &mut Manifest,
) {
    let used = record::calibration::CalibrationUse::of(path, rec, p.options.test_date);
    if used.overdue {
        eprintln!(
            "warning: the calibration of station {} was due on {} (it is applied; calibrate the station again: packbench calibrate)",
            rec.station, rec.next_due
        );
    }
    if let Some(acc) = manifest.accuracy.as_mut() {
        record::calibration::apply_to_accuracy(acc, rec);
    }
    manifest.calibration = Some(used);
}

/// The name a station's calibrations are kept under: the bench file's
/// station, or `sim` for the simulated bench.
fn calibration_station(links: &BenchLinks) -> Option<String> {
    match &links.hooks.station {
        Some((name, _)) => Some(name.clone()),
        None if links.kind == crate::session::links::SIMULATED => Some("sim".to_string()),
        None => None,
    }
}

/// What the station's instruments state of their readings' accuracy.
pub fn station_accuracy(links: &BenchLinks) -> model::accuracy::BenchAccuracy {
    let of = |role: &str, b: &BoundLink| {
        (
            format!("{role}: {}", b.profile.name),
            b.profile.accuracy.clone(),
            b.profile.ranges.voltage_max_v,
            b.profile.ranges.current_max_a,
        )
    };
    let (sn, sd, sv, si) = of("source", &links.source);
    let (ln, ld, lv, li) = of("load", &links.load);
    let meter = links.meter.as_ref().map(|m| of("meter", m));
    let mut a = model::accuracy::BenchAccuracy::of_station(
        (&sn, &sd, sv, si),
        (&ln, &ld, lv, li),
        meter.as_ref().map(|(n, d, v, _)| (n.as_str(), d, *v)),
        links.shared,
    );
    if links.kind == crate::session::links::SIMULATED {
        a.stated_by = vec![
            "the simulated bench (the accuracy within which the simulator applies its meters' errors)"
                .into(),
        ];
    }
    a
}

/// A run folder being written.
pub struct Recording {
    pub dir: PathBuf,
    pub run_id: String,
    pub manifest: Manifest,
    /// Where an interrupted run goes on.
    pub resume: Option<engine::ResumePoint>,
    /// The run's lock, held by this process until the record is finished.
    pub lock: RunLock,
}

/// File work (creating, writing and syncing) on a blocking thread, not
/// on the one the stations share.
pub async fn off_thread<T: Send + 'static>(
    f: impl FnOnce() -> Result<T, RunError> + Send + 'static,
) -> Result<T, RunError> {
    tokio::task::spawn_blocking(f)
        .await
        .map_err(|e| RunError::from(Failure::RecordTask(e.to_string())))?
}

/// Write the run record atomically, synced, off the stations' thread.
async fn write_manifest(path: &Path, manifest: &Manifest) -> Result<(), RunError> {
    let (path, manifest) = (path.to_path_buf(), manifest.clone());
    off_thread(move || write_json(&path, &manifest).map_err(io_err(&path))).await
}

/// Take a run folder's lock: one process drives a run.
pub fn take_lock(dir: &Path) -> Result<RunLock, RunError> {
    RunLock::acquire(dir).map_err(|e| match e {
        LockError::Held { path, holder } => RunError::Input(InputError::NotResumable(format!(
            "{}: process {holder} is driving this run now ({}); stop it first",
            dir.display(),
            path.display()
        ))),
        LockError::Io { path, error } => io_err(&path)(error),
    })
}

/// Connect to a station, run (or go on with) the plan, record the result.
pub async fn drive(
    p: &Prepared,
    rec: Recording,
    sink: RunLogSink,
    bench: Bound,
    stop: StopHandle,
) -> Result<RunReport, RunError> {
    let Bound {
        mut links,
        clock,
        truth,
        sim,
    } = bench;
    let Recording {
        dir,
        run_id,
        mut manifest,
        resume,
        lock,
    } = rec;
    attach(p, &dir, &mut links)?;
    let run_json = dir.join(RUN_JSON);
    {
        let (dir, run_json, manifest) = (dir.clone(), run_json.clone(), manifest.clone());
        let keep = sim.as_ref().map(|s| (s.handle.clone(), s.speed_factor));
        off_thread(move || {
            if let Some((handle, speed_factor)) = keep {
                // The simulated pack keeps its state beside the log: every
                // 10 bench seconds when paced; every 10 bench minutes at
                // full speed, where a whole run takes a second.
                let every = if speed_factor.is_some() { 10.0 } else { 600.0 };
                handle.keep_state(dir.join(SIM_STATE_JSON), every);
            }
            write_json(&run_json, &manifest).map_err(io_err(&run_json))
        })
        .await?;
    }
    let board = links.hooks.board.clone();
    // The dry run behind the tile's time to end: only for a run someone
    // watches at its pace (a real bench, or a paced simulator).
    let paced_run = match &sim {
        Some(s) => s.speed_factor.is_some(),
        None => !clock.is_simulated(),
    };
    let forecast = (board.is_some() && paced_run).then(|| {
        let cfg = sim.as_ref().map(|s| s.config.clone()).unwrap_or_default();
        let cell = crate::session::live::ForecastCell::default();
        let fill = cell.clone();
        let plan = p.procedure.plan.clone();
        // A thread of its own: the dry run never delays a sample. (Without
        // the thread the cell stays empty.)
        let _ = std::thread::Builder::new()
            .name("forecast".into())
            .spawn(move || {
                let f = crate::session::forecast::forecast(&plan, &cfg);
                fill.set(
                    f.steps
                        .iter()
                        .map(|s| crate::session::live::Expected {
                            step: s.step,
                            duration_s: s.duration_s,
                            ah: s.ah,
                        })
                        .collect(),
                );
            });
        cell
    });
    let shared_link = links.shared;
    let groups = links.groups.clone();
    if manifest.groups.is_none() {
        manifest.groups = groups.clone();
    }
    let mut station = match connect(links).await {
        Ok((station, records)) => {
            if manifest.instruments.is_empty() {
                manifest.instruments = records;
            }
            station
        }
        Err(e) => {
            let failed = NotConnected {
                run_json: &run_json,
                resume: resume.as_ref(),
                board: board.as_ref(),
            };
            failed.record(manifest, sink, lock, &e).await?;
            return Err(e.into());
        }
    };
    station.shared_link = shared_link;
    station.groups = groups;
    write_manifest(&run_json, &manifest).await?;
    let alarm_ah = p
        .options
        .alarm_below_pct
        .map(|pct| pct / 100.0 * p.pack.rated_capacity_ah);
    // The record's own writer: the engine never waits on the disk.
    let paced = !clock.is_simulated();
    let files: Box<dyn record::writer::LogFiles> = Box::new(sink);
    let mut queued = record::writer::QueuedSink::spawn(files, paced).map_err(io_err(&dir))?;
    let outcome = {
        let mut live;
        let sink_ref: &mut dyn record::event::Sink = match &board {
            Some(b) => {
                live = crate::session::live::LiveSink {
                    inner: &mut queued,
                    board: b.clone(),
                    est: crate::session::live::Estimator::new(&p.procedure.plan)
                        .with_forecast(forecast)
                        .resuming(resume.as_ref()),
                };
                &mut live
            }
            None => &mut queued,
        };
        let mut engine = Engine::new(
            &p.procedure.plan,
            &mut station,
            clock,
            sink_ref,
            truth,
            stop,
        )
        .with_capacity_alarm(alarm_ah)
        .with_calibration(manifest.calibration.as_ref().map(|c| c.corrections));
        if let Some(r) = resume {
            engine = engine.resume_from(r);
        }
        engine = engine.with_off_hold(std::time::Duration::from_secs_f64(
            p.options.safe_stop_hold_s,
        ));
        engine.run().await
    };
    // The writer's last rows and sync, reading the log back and writing
    // the report take a while on a long run: off the thread the other
    // stations sample on.
    let writer = off_thread(move || Ok(queued.finish(WRITER_WAIT))).await?;
    if writer.stalled {
        // The disk does not answer: anything more written would wait on
        // it too. The outputs' state is what the operator needs now.
        return Err(RunError::from(Failure::RecordIncomplete {
            message: format!(
                "{}; {}",
                crate::session::finish::outputs_line(&outcome),
                writer.describe().unwrap_or_default()
            ),
            may_be_on: !outcome.may_be_on.is_empty(),
        }));
    }
    let p = p.clone();
    off_thread(move || {
        finish_record_after(
            &p,
            &dir,
            &run_id,
            manifest,
            outcome,
            sim,
            crate::session::finish::Ending {
                writer,
                lock: Some(lock),
            },
        )
    })
    .await
}

/// How long the end of a run waits for the record's writer to write and
/// sync what it holds: a healthy disk takes well under a second; past
/// this the disk has stalled ([`record::writer::LAG_MAX`]).
pub const WRITER_WAIT: std::time::Duration = record::writer::LAG_MAX;

/// A run whose bench could not be reached.
struct NotConnected<'a> {
    run_json: &'a Path,
    resume: Option<&'a engine::ResumePoint>,
    board: Option<&'a crate::session::live::Board>,
}

impl NotConnected<'_> {
    /// Record it: a new run is aborted; a resume leaves the run as it was,
    /// resumable, with the failed attempt recorded. The lock is released.
    async fn record(
        &self,
        mut manifest: Manifest,
        mut sink: RunLogSink,
        lock: RunLock,
        e: &instrument::InstrumentError,
    ) -> Result<(), RunError> {
        if let Some(r) = self.resume {
            manifest.status = RunStatus::Interrupted;
            manifest.resumes.pop();
            manifest
                .failed_resumes
                .push(record::manifest::FailedResume {
                    at_utc: utc_now(),
                    reason: format!("could not connect: {e}"),
                });
            let _ = record::event::Sink::event(
                &mut sink,
                &record::event::Event::Warning {
                    t_s: r.last_sample_t_s,
                    step: 0,
                    message: format!("a resume could not connect: {e}; the run stays resumable"),
                },
            );
            let _ = off_thread(move || sink.flush().map_err(io_err(Path::new("")))).await;
        } else {
            manifest.status = RunStatus::Aborted;
            manifest.stop_reason = Some(format!("could not connect: {e}"));
            manifest.finished_utc = Some(utc_now());
        }
        write_manifest(self.run_json, &manifest).await?;
        let _ = off_thread(move || {
            lock.release();
            Ok(())
        })
        .await;
        if let Some(b) = self.board {
            b.update(|l| {
                l.state = crate::session::live::BoardState::Failed;
                l.alarms.push(format!("could not connect: {e}"));
            });
        }
        Ok(())
    }
}

/// Before connecting: the raw-traffic trace and the instruments
/// registered for the last-resort switch-off.
fn attach(p: &Prepared, dir: &Path, links: &mut BenchLinks) -> Result<(), RunError> {
    if p.options.trace {
        let path = dir.join(TRACE_LOG);
        let trace = Trace::create(&path).map_err(io_err(&path))?;
        links.source.attach.trace = Some(trace.clone());
        links.load.attach.trace = Some(trace.clone());
        if let Some(m) = links.meter.as_mut() {
            m.attach.trace = Some(trace);
        }
    }
    if let Some(em) = &links.hooks.emergency {
        let who = links
            .hooks
            .station
            .as_ref()
            .map(|(n, _)| format!("{n} "))
            .unwrap_or_default();
        // The meter drives nothing: only the source and the load.
        for (role, b) in [("source", &links.source), ("load", &links.load)] {
            if let Some(r) = &b.attach.reopen {
                let serial = match b.text.parse::<instrument::transport::LinkSpec>() {
                    Ok(instrument::transport::LinkSpec::Serial(s)) => Some(s.path),
                    _ => None,
                };
                em.register(
                    format!("{who}{role}"),
                    Arc::clone(r),
                    b.profile.clone(),
                    serial,
                );
            }
        }
    }
    Ok(())
}

/// Connect every instrument of a station (identify, reset to safe); if one
/// fails, those already connected are made safe again. Returns the station
/// and the instruments' records for `run.json`.
async fn connect(
    links: BenchLinks,
) -> Result<(Station, Vec<InstrumentRecord>), instrument::InstrumentError> {
    let record = |role: &str, b: &BoundLink, idn: &str| InstrumentRecord {
        role: role.into(),
        link: b.text.clone(),
        profile: b.profile.name.clone(),
        idn: idn.to_string(),
    };
    let mut records = vec![
        record("source", &links.source, ""),
        record("load", &links.load, ""),
    ];
    let mut source =
        Source::connect_with(links.source.link, links.source.profile, links.source.attach).await?;
    let mut load =
        match Load::connect_with(links.load.link, links.load.profile, links.load.attach).await {
            Ok(l) => l,
            Err(e) => {
                let _ = source.0.make_safe().await;
                return Err(e);
            }
        };
    let meter = match links.meter {
        Some(m) => {
            records.push(record("meter", &m, ""));
            match Meter::connect_with(m.link, m.profile, m.attach).await {
                Ok(x) => Some(x),
                Err(e) => {
                    let _ = load.0.make_safe().await;
                    let _ = source.0.make_safe().await;
                    return Err(e);
                }
            }
        }
        None => None,
    };
    records[0].idn = source.0.idn().to_string();
    records[1].idn = load.0.idn().to_string();
    if let (Some(m), Some(r)) = (&meter, records.get_mut(2)) {
        r.idn = m.0.idn().to_string();
    }
    Ok((
        Station {
            source,
            load,
            meter,
            shared_link: false,
            groups: None,
        },
        records,
    ))
}

/// A station's links with its clock, and on the simulated bench its truth
/// and record: everything [`drive`] needs besides the plan.
pub struct Bound {
    pub links: BenchLinks,
    pub clock: Arc<dyn Clock>,
    pub truth: Option<Arc<dyn GroundTruth>>,
    pub sim: Option<SimRun>,
}
