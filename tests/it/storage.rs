//! Safety that holds whatever the disk does: the engine hands its records
//! to a writer of their own, so a stalled or failing disk never delays
//! sampling, a limit check, the safe stop or another station; a writer
//! that stalls or fails is itself a reason for the safe stop.

use engine::clock::{Clock, PacedClock};
use engine::control::StopHandle;
use engine::state::RunState;
use engine::{Engine, Station};
use instrument::profile::{Profile, ProfileRole};
use instrument::{Load, Source};
use model::sample::Sample;
use packbench::session::request::{PackSource, Prepared, RunRequest};
use record::event::{Event, Sink};
use record::writer::{LogFiles, QueuedSink};
use sim::SimConfig;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

/// Files that take rows until run time `stall_at_s`, then block (a frozen
/// filesystem) until `release` is set; every row taken is kept.
#[derive(Clone)]
struct FreezingFiles {
    stall_at_s: f64,
    release: Arc<AtomicBool>,
    rows: Arc<Mutex<Vec<Sample>>>,
}

impl FreezingFiles {
    fn new(stall_at_s: f64) -> FreezingFiles {
        FreezingFiles {
            stall_at_s,
            release: Arc::new(AtomicBool::new(false)),
            rows: Arc::default(),
        }
    }
}

impl Sink for FreezingFiles {
    fn sample(&mut self, s: &Sample) -> std::io::Result<()> {
        while s.t_s >= self.stall_at_s && !self.release.load(Ordering::Relaxed) {
            std::thread::sleep(Duration::from_millis(5));
        }
        self.rows.lock().unwrap().push(*s);
        Ok(())
    }
    fn event(&mut self, _: &Event) -> std::io::Result<()> {
        Ok(())
    }
}

impl LogFiles for FreezingFiles {
    fn hand_off(&mut self) -> std::io::Result<()> {
        Ok(())
    }
    fn sync(&mut self) -> std::io::Result<()> {
        Ok(())
    }
}

/// Every sample's run time, as an engine hands it over.
#[derive(Default)]
struct Times(Vec<f64>);

impl Sink for Times {
    fn sample(&mut self, s: &Sample) -> std::io::Result<()> {
        self.0.push(s.t_s);
        Ok(())
    }
    fn event(&mut self, _: &Event) -> std::io::Result<()> {
        Ok(())
    }
}

fn prepare_text(dir: &std::path::Path, name: &str, text: &str) -> Prepared {
    let path = dir.join(name);
    std::fs::write(&path, text).unwrap();
    packbench::session::prepare::prepare(&RunRequest {
        procedure: path,
        pack_id: "STALL-1".into(),
        pack: PackSource::Given(small_pack()),
        results: dir.join("results"),
        options: Default::default(),
    })
    .unwrap()
}

/// A 4S 2 Ah li-ion pack (the link tests' pack).
fn small_pack() -> model::pack::PackSpec {
    model::pack::PackSpec {
        chemistry: model::pack::Chemistry::LiIon,
        series: 4,
        rated_capacity_ah: 2.0,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    }
}

const DISCHARGE: &str = r#"
title = "1C discharge to the cutoff (storage tests)"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1.2C"
temperature_max = "55degC"
step_time_max = "2h"
[sampling]
every = "1s"
[[phase]]
name = "measure"
  [[phase.step]]
  kind = "discharge"
  current = "1C"
  ends = ["voltage < 3.0V/cell", "time > 90min"]
"#;

const REST: &str = r#"
title = "A rest (storage tests)"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1.2C"
temperature_max = "55degC"
[sampling]
every = "1s"
[[phase]]
name = "wait"
  [[phase.step]]
  kind = "rest"
  ends = ["time > 400s"]
"#;

async fn station(
    p: &Prepared,
    cfg: &SimConfig,
    clock: &Arc<dyn Clock>,
) -> (Station, sim::SimHandle) {
    let links = sim::build(&p.pack, cfg, Arc::clone(clock));
    let h = links.handle.clone();
    let st = Station::new(
        Source::connect(links.source, Profile::builtin(ProfileRole::Source))
            .await
            .unwrap(),
        Load::connect(links.load, Profile::builtin(ProfileRole::Load))
            .await
            .unwrap(),
    );
    (st, h)
}

/// Finding 1: with the results folder frozen 15 s into a 1C discharge,
/// sampling stopped and the software cutoff was missed. Now the files
/// freeze 15 s in (and stay frozen to the end) while the bound on the
/// writer's lag is longer than the run: the engine goes on sampling
/// through the freeze, and the software cutoff ends the discharge on
/// time. The lowest true pack voltage stays above the cutoff less one
/// sample's step (and so above `voltage_min`); another station on the
/// same thread keeps its schedule meanwhile.
#[tokio::test(flavor = "current_thread")]
async fn a_frozen_disk_does_not_delay_the_cutoff_or_another_station() {
    let dir = tempfile::tempdir().unwrap();
    let pa = prepare_text(dir.path(), "discharge.toml", DISCHARGE);
    let pb = prepare_text(dir.path(), "rest.toml", REST);
    // 200 bench seconds a wall second: the partly charged pack reaches
    // its cutoff in about 1000 bench seconds (5 s of wall time).
    let clock: Arc<dyn Clock> = PacedClock::new(200.0);
    let mut cfg = SimConfig::ideal();
    cfg.pack.initial_soc = 0.3;
    let (mut sa, ha) = station(&pa, &cfg, &clock).await;
    let (mut sb, _hb) = station(&pb, &SimConfig::ideal(), &clock).await;
    let files = FreezingFiles::new(15.0);
    let mut qa =
        QueuedSink::spawn_with(Box::new(files.clone()), true, Duration::from_secs(600)).unwrap();
    let mut tb = Times::default();
    let ea = Engine::new(
        &pa.procedure.plan,
        &mut sa,
        Arc::clone(&clock),
        &mut qa,
        None,
        StopHandle::new(),
    );
    let eb = Engine::new(
        &pb.procedure.plan,
        &mut sb,
        Arc::clone(&clock),
        &mut tb,
        None,
        StopHandle::new(),
    );
    let (oa, ob) = tokio::time::timeout(Duration::from_secs(60), async {
        tokio::join!(ea.run(), eb.run())
    })
    .await
    .expect("neither station waits on the frozen files");
    assert_eq!(oa.status, RunState::Completed, "{:?}", oa.reason);
    assert_eq!(ob.status, RunState::Completed, "{:?}", ob.reason);
    assert!(oa.source_off_confirmed && oa.load_off_confirmed);
    assert!(!ha.load_input_on());
    // The files took nothing after the freeze.
    assert!(files.rows.lock().unwrap().iter().all(|s| s.t_s < 15.0));
    // The cutoff acted on the engine's own samples: the true terminal
    // voltage under load never went below 3.0 V/cell less one second's
    // fall at 1C near empty (a few mV per cell, allowed 50 mV per cell
    // here) and never near voltage_min (2.80 V/cell).
    let (low, _) = ha.voltage_span().unwrap();
    assert!(low > 4.0 * (3.0 - 0.05), "lowest {low:.3} V");
    assert!(low > 4.0 * 2.80);
    assert!(
        oa.duration_s > 300.0,
        "the discharge ran on through the freeze"
    );
    // The other station sampled every second of run time throughout
    // (allowed one late wake of the shared thread: 3 s).
    let worst = tb.0.windows(2).map(|w| w[1] - w[0]).fold(0.0, f64::max);
    assert!(worst <= 3.0, "station B's longest gap {worst:.2} s");
    assert!(tb.0.len() >= 390, "{} samples", tb.0.len());
    // The writer is still blocked at the end: said, not waited for.
    let end = qa.finish(Duration::from_millis(200));
    assert!(end.stalled && end.rows_lost > 0, "{end:?}");
    files.release.store(true, Ordering::Relaxed);
}

/// The same freeze with the writer's usual kind of bound (here 1 s of
/// wall time, 200 bench seconds): the station goes to the safe stop on
/// time, naming the stalled writer, with both outputs confirmed off.
#[tokio::test(flavor = "current_thread")]
async fn a_writer_that_stalls_past_its_bound_stops_the_run_safely() {
    let dir = tempfile::tempdir().unwrap();
    let p = prepare_text(dir.path(), "discharge.toml", DISCHARGE);
    let clock: Arc<dyn Clock> = PacedClock::new(200.0);
    let mut cfg = SimConfig::ideal();
    cfg.pack.initial_soc = 1.0;
    let (mut st, h) = station(&p, &cfg, &clock).await;
    let files = FreezingFiles::new(15.0);
    let mut q =
        QueuedSink::spawn_with(Box::new(files.clone()), true, Duration::from_secs(1)).unwrap();
    let e = Engine::new(
        &p.procedure.plan,
        &mut st,
        Arc::clone(&clock),
        &mut q,
        None,
        StopHandle::new(),
    );
    let out = tokio::time::timeout(Duration::from_secs(30), e.run())
        .await
        .expect("the engine does not wait on the writer");
    assert_eq!(out.status, RunState::Aborted);
    let reason = out.reason.clone().unwrap_or_default();
    assert!(reason.contains("written nothing"), "{reason}");
    // Found within the bound (1 s, 200 bench s) after the freeze at 15 s,
    // with one wall second of slack for a loaded machine.
    assert!(
        out.duration_s > 15.0 + 150.0 && out.duration_s < 15.0 + 200.0 * 2.0,
        "stopped at {:.0} s",
        out.duration_s
    );
    assert!(out.source_off_confirmed && out.load_off_confirmed);
    assert!(!h.load_input_on() && !h.source_output_on());
    files.release.store(true, Ordering::Relaxed);
    let end = q.finish(Duration::from_secs(5));
    assert!(end.describe().unwrap().contains("written nothing"));
}

/// Finding 9: a pack folder that is a symbolic link wrote the run outside
/// `results/`. Now the run is refused before anything is created, and
/// nothing appears where the link points.
#[cfg(unix)]
#[test]
fn a_pack_folder_that_is_a_link_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let outside = d.join("elsewhere");
    std::fs::create_dir_all(&outside).unwrap();
    std::fs::create_dir_all(d.join("results")).unwrap();
    std::os::unix::fs::symlink(&outside, d.join("results/LINKED")).unwrap();
    let proc = d.join("rest.toml");
    std::fs::write(&proc, REST).unwrap();
    let out = std::process::Command::new(crate::util::BIN)
        .arg("run")
        .arg(&proc)
        .args(["--sim", "--pack", "LINKED", "--quiet"])
        .args(["--chemistry", "li-ion", "--series", "4", "--rated", "2Ah"])
        .arg("--results")
        .arg(d.join("results"))
        .output()
        .unwrap();
    let err = crate::util::text(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("symbolic link"), "{err}");
    assert_eq!(std::fs::read_dir(&outside).unwrap().count(), 0);
}

/// A small tmpfs mounted on `at` (root only: CI runs as root); unmounted
/// when dropped.
#[cfg(target_os = "linux")]
struct SmallDisk(std::path::PathBuf);

#[cfg(target_os = "linux")]
impl SmallDisk {
    fn mount(at: &std::path::Path, size: &str) -> SmallDisk {
        std::fs::create_dir_all(at).unwrap();
        let out = std::process::Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(at)
            .output()
            .expect("mount(8)");
        assert!(
            out.status.success(),
            "this test mounts a small tmpfs and needs root (CI runs as root): {}",
            crate::util::text(&out.stderr)
        );
        SmallDisk(at.to_path_buf())
    }
}

#[cfg(target_os = "linux")]
impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = std::process::Command::new("umount").arg(&self.0).output();
    }
}

/// Finding 4: with the disk full mid-run the outputs went off, but the
/// events had no `outputs_off`, `run.json` stayed `running`, `run.lock`
/// stayed behind and the message did not say whether the outputs were
/// off. Now the space set aside at the start takes the final records:
/// `outputs_off` and `run_end` are in the events, `run.json` says
/// aborted and what could not be written, the lock is gone, and the
/// operator is told the outputs are off.
#[cfg(target_os = "linux")]
#[test]
fn a_disk_that_fills_mid_run_still_ends_the_record_with_outputs_off() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let results = d.join("results");
    // The reserve (256 KiB), the run record and about 50 KiB for the log:
    // a 1C discharge sampled every second from full (about 140 KiB of
    // rows) fills it part way.
    let _disk = SmallDisk::mount(&results, "320k");
    let proc = d.join("discharge.toml");
    std::fs::write(&proc, DISCHARGE).unwrap();
    let cfg = d.join("full.toml");
    std::fs::write(&cfg, "[pack]\ninitial_soc = 1.0\n").unwrap();
    let out = std::process::Command::new(crate::util::BIN)
        .arg("run")
        .arg(&proc)
        .args(["--sim", "--pack", "FULL-1", "--quiet"])
        .args(["--chemistry", "li-ion", "--series", "4", "--rated", "2Ah"])
        .arg("--sim-config")
        .arg(&cfg)
        .arg("--results")
        .arg(&results)
        .output()
        .unwrap();
    let err = crate::util::text(&out.stderr);
    let pack = results.join("FULL-1");
    let run = std::fs::read_dir(&pack)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.is_dir())
        .expect("a run folder");
    assert_eq!(out.status.code(), Some(3), "{err}");
    assert!(
        err.contains("outputs off (source confirmed, load confirmed)"),
        "{err}"
    );
    assert!(err.contains("No space left"), "{err}");
    let events = std::fs::read_to_string(run.join("events.jsonl")).unwrap();
    assert!(events.contains("\"event\":\"outputs_off\""), "{events}");
    assert!(events.contains("\"event\":\"run_end\""));
    let m = crate::util::json(&run.join("run.json"));
    assert_eq!(m["status"], "aborted", "{m}");
    assert!(
        m["stop_reason"].as_str().unwrap().contains("No space left"),
        "{m}"
    );
    assert!(
        !m["record_incomplete"].as_array().unwrap().is_empty(),
        "{m}"
    );
    assert!(!run.join("run.lock").exists());
    assert!(!run.join(".reserve").exists());
    // Some of the discharge was logged before the disk filled.
    let rows = std::fs::read_to_string(run.join("samples.csv"))
        .unwrap()
        .lines()
        .count();
    assert!(rows > 100, "{rows} rows");
}

/// A paced clock whose computer "sleeps" for `slept` seconds once run
/// time reaches `at` (the boot-time clock ran on; the run's did not).
struct SleepyClock {
    inner: Arc<PacedClock>,
    at: f64,
    slept: f64,
}

impl Clock for SleepyClock {
    fn now(&self) -> f64 {
        self.inner.now()
    }
    fn sleep_until(&self, t: f64) -> futures::future::BoxFuture<'_, ()> {
        self.inner.sleep_until(t)
    }
    fn is_simulated(&self) -> bool {
        false
    }
    fn slept_s(&self) -> f64 {
        if self.inner.now() >= self.at {
            self.slept
        } else {
            0.0
        }
    }
}

/// Finding 14: run time uses the monotonic clock, which stops during a
/// suspend, so time limits did not advance and the charge over the sleep
/// was integrated as one interval. A suspend is now a fault: the next
/// sample finds it and the run ends in the safe stop with that reason.
#[tokio::test(flavor = "current_thread")]
async fn a_suspended_computer_ends_the_run_in_the_safe_stop() {
    let dir = tempfile::tempdir().unwrap();
    let p = prepare_text(dir.path(), "discharge.toml", DISCHARGE);
    let clock: Arc<dyn Clock> = Arc::new(SleepyClock {
        inner: PacedClock::new(200.0),
        at: 100.0,
        slept: 30.0,
    });
    let mut cfg = SimConfig::ideal();
    cfg.pack.initial_soc = 1.0;
    let (mut st, h) = station(&p, &cfg, &clock).await;
    let mut sink = record::event::Collect::default();
    let out = Engine::new(
        &p.procedure.plan,
        &mut st,
        Arc::clone(&clock),
        &mut sink,
        None,
        StopHandle::new(),
    )
    .run()
    .await;
    assert_eq!(out.status, RunState::Aborted);
    let reason = out.reason.clone().unwrap_or_default();
    assert!(reason.contains("suspended for 30.0 s"), "{reason}");
    // Found at the first sample after the sleep (1 s apart).
    assert!(
        out.duration_s >= 98.0 && out.duration_s < 103.0,
        "{}",
        out.duration_s
    );
    assert!(out.source_off_confirmed && out.load_off_confirmed);
    assert!(!h.load_input_on());
    assert!(sink.events.iter().any(|e| matches!(e,
        Event::InstrumentError { kind, .. } if kind == "suspended")));
}

/// How late rows reach the file at a sampling interval: the spread of
/// (wall time a row first shows in `samples.csv` − its run time) over a
/// paced run at real time, s. The smallest of these is the run's own
/// start; the spread is each row's lag behind the earliest.
#[cfg(unix)]
fn flush_lag(every: &str, rest: &str) -> (usize, f64) {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let proc = d.join("rest.toml");
    std::fs::write(
        &proc,
        REST.replace("every = \"1s\"", &format!("every = \"{every}\""))
            .replace("time > 400s", &format!("time > {rest}")),
    )
    .unwrap();
    let results = d.join("results");
    let mut child = std::process::Command::new(crate::util::BIN)
        .arg("run")
        .arg(&proc)
        .args(["--sim", "--speed", "1", "--pack", "F1", "--quiet"])
        .args(["--chemistry", "li-ion", "--series", "4", "--rated", "2Ah"])
        .arg("--results")
        .arg(&results)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let t0 = std::time::Instant::now();
    let mut seen: Vec<(f64, f64)> = Vec::new();
    while child.try_wait().unwrap().is_none() {
        let now = t0.elapsed().as_secs_f64();
        if let Some(run) = std::fs::read_dir(results.join("F1"))
            .ok()
            .and_then(|mut r| r.find_map(|e| e.ok().map(|e| e.path()).filter(|p| p.is_dir())))
        {
            if let Ok(text) = std::fs::read_to_string(run.join("samples.csv")) {
                // Whole lines only (a row may be half handed over).
                let whole = &text[..text.rfind('\n').map_or(0, |k| k + 1)];
                for l in whole.lines().skip(1 + seen.len()) {
                    if let Some(t) = l.split(',').next().and_then(|t| t.parse::<f64>().ok()) {
                        seen.push((t, now));
                    }
                }
            }
        }
        std::thread::sleep(Duration::from_millis(10));
    }
    let offsets: Vec<f64> = seen.iter().map(|(t, w)| w - t).collect();
    let lo = offsets.iter().cloned().fold(f64::INFINITY, f64::min);
    let hi = offsets.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    (seen.len(), hi - lo)
}

/// Finding 11: at 1 Hz rows reached the operating system every 2 s, not
/// every second (the `elapsed >= 1 s` test was missed every other sample),
/// and a SIGKILL lost 2 s. Now each row is handed over as soon as the
/// writer's queue is empty: at 1 Hz and at 10 Hz every row shows in the
/// file well within a second of the earliest (allowed 0.5 s: the 10 ms
/// polling here and a loaded machine).
#[cfg(unix)]
#[test]
fn rows_reach_the_file_within_a_second_at_1_hz_and_10_hz() {
    for (every, rest, min_rows) in [("1s", "6s", 5), ("100ms", "4s", 30)] {
        let (rows, lag) = flush_lag(every, rest);
        eprintln!("every {every}: {rows} rows, worst lag behind the earliest {lag:.3} s");
        assert!(rows >= min_rows, "every {every}: {rows} rows");
        assert!(lag < 0.5, "every {every}: a row showed {lag:.3} s late");
    }
}
