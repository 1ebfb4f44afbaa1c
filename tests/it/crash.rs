//! Crash tests on real processes: `packbench run` killed with SIGKILL at
//! 24 points — at random points of the log, just as a step starts, and while the
//! summary and report are being written — must leave a record that loses
//! nothing it had written: every row is one of an uninterrupted run's rows
//! in order (the simulated bench at full speed is deterministic), the CSV
//! reads, every sample up to the last event on disk is on disk, no JSON
//! record is half-written (they are written aside and renamed), and
//! `packbench analyze` and `packbench resume` accept what is left.

use crate::util::*;
use record::import::{stream_log, LogFormat};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const PROCEDURE: &str = r#"title = "crash test: discharge, rest, charge"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1.2C"
temperature_max = "60degC"
[sampling]
every = "1s"
[[phase]]
name = "cycle"
  [[phase.step]]
  kind = "discharge"
  current = "1C"
  ends = ["voltage < 3.0V/cell", "time > 2h"]
  result = "capacity"
  [[phase.step]]
  kind = "rest"
  ends = ["time > 5min"]
  [[phase.step]]
  kind = "charge"
  current = "0.5C"
  voltage = "4.2V/cell"
  ends = ["current < 0.05C", "time > 30min"]
  [[phase.step]]
  kind = "rest"
  ends = ["time > 5min"]
"#;

fn run_cmd(dir: &Path, results: &Path) -> Command {
    let mut c = Command::new(BIN);
    c.args([
        "run",
        "crash.toml",
        "--pack",
        "X1",
        "--sim-config",
        "full.toml",
        "--quiet",
    ])
    .arg("--results")
    .arg(results)
    .current_dir(dir)
    .stdout(Stdio::null())
    .stderr(Stdio::null());
    c
}

fn the_run_dir(results: &Path) -> Option<PathBuf> {
    std::fs::read_dir(results.join("X1"))
        .ok()?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.is_dir())
}

/// How to pick the moment of the kill.
#[derive(Debug, Clone, Copy)]
enum When {
    /// Once the log holds this many rows (a random point of the run).
    Rows(usize),
    /// Just after step `n` has started (its start event is on disk).
    StepStart(u32, Duration),
    /// Just after the run's end event: during the summary and report.
    RecordWrite(Duration),
}

/// Where a kill landed, from what the run folder shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Landed {
    /// Before the run folder existed.
    BeforeFolder,
    /// While the engine ran: no run-end event on disk.
    MidRun,
    /// After the run-end event, before the record was complete.
    MidRecord,
    /// After the run had completed.
    AfterCompletion,
}

/// A small deterministic generator for the kill points.
struct Lcg(u64);

impl Lcg {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

#[test]
fn sigkill_at_24_points_loses_nothing_and_leaves_a_usable_record() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("crash.toml"), PROCEDURE).unwrap();
    std::fs::write(d.join("full.toml"), "[pack]\ninitial_soc = 1.0\n").unwrap();
    // The uninterrupted run.
    let t = Instant::now();
    let reference = d.join("reference");
    let mut child = run_cmd(d, &reference).spawn().unwrap();
    // How long the record takes after the run-end event: the window the
    // record-write kills aim at.
    let mut ended_at = None;
    let status = loop {
        if ended_at.is_none()
            && the_run_dir(&reference)
                .and_then(|r| std::fs::read_to_string(r.join("events.jsonl")).ok())
                .is_some_and(|s| s.contains("\"event\":\"run_end\""))
        {
            ended_at = Some(Instant::now());
        }
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        std::hint::spin_loop();
    };
    assert!(status.success());
    let wall = t.elapsed();
    let record_wall = ended_at.map_or(Duration::ZERO, |e| e.elapsed());
    let ref_dir = the_run_dir(&reference).unwrap();
    let ref_rows: Vec<String> = std::fs::read_to_string(ref_dir.join("samples.csv"))
        .unwrap()
        .lines()
        .map(str::to_string)
        .collect();
    eprintln!(
        "uninterrupted: {} rows in {:.2} s, the record in {:.1} ms of it",
        ref_rows.len() - 1,
        wall.as_secs_f64(),
        record_wall.as_secs_f64() * 1e3
    );

    let mut rng = Lcg(0x5eed_1234);
    let mut points = Vec::new();
    for _ in 0..12 {
        points.push(When::Rows(
            (rng.next() * 0.95 * ref_rows.len() as f64) as usize,
        ));
    }
    // Steps 1 to 3: the last step (a 5-minute rest, 2 ms of wall time
    // at this speed) ends the run, so a kill a few ms after its start
    // may land after the run's end and test the record instead.
    for k in 0..6 {
        points.push(When::StepStart(
            1 + k % 3,
            Duration::from_micros((rng.next() * 3000.0) as u64),
        ));
    }
    for _ in 0..6 {
        points.push(When::RecordWrite(record_wall.mul_f64(rng.next() * 0.6)));
    }
    let mut outcomes = Vec::new();
    let mut landed = Vec::new();
    for (n, aimed) in points.iter().enumerate() {
        // A kill aimed into the record that came too late (the record is a
        // few ms, and slower or faster under load) is tried again sooner.
        let mut when = *aimed;
        for attempt in 0.. {
            let when = &mut when;
            let results = d.join(format!("killed-{n}-{attempt}"));
            let mut child = run_cmd(d, &results).spawn().unwrap();
            let started = Instant::now();
            match *when {
                When::Rows(n) => loop {
                    let rows = the_run_dir(&results)
                        .and_then(|r| std::fs::read(r.join("samples.csv")).ok())
                        .map_or(0, |b| b.iter().filter(|c| **c == b'\n').count());
                    if rows >= n || child.try_wait().unwrap().is_some() {
                        break;
                    }
                    assert!(started.elapsed() < Duration::from_secs(60));
                    std::hint::spin_loop();
                },
                When::StepStart(_, extra) | When::RecordWrite(extra) => {
                    let needle = match *when {
                        When::StepStart(..) => "\"event\":\"step_start\",\"t_s\"".to_string(),
                        _ => "\"event\":\"run_end\"".to_string(),
                    };
                    let want = match *when {
                        When::StepStart(s, _) => s as usize,
                        _ => 1,
                    };
                    loop {
                        let seen = the_run_dir(&results)
                            .and_then(|r| std::fs::read_to_string(r.join("events.jsonl")).ok())
                            .map(|s| s.matches(&needle).count())
                            .unwrap_or(0);
                        if seen >= want || child.try_wait().unwrap().is_some() {
                            break;
                        }
                        assert!(started.elapsed() < Duration::from_secs(60));
                        std::hint::spin_loop();
                    }
                    let t = Instant::now();
                    while t.elapsed() < extra {
                        std::hint::spin_loop();
                    }
                }
            }
            // SAFETY: kill(2) on our own child.
            unsafe { libc::kill(child.id() as i32, libc::SIGKILL) };
            child.wait().unwrap();
            let Some(rdir) = the_run_dir(&results) else {
                outcomes.push(format!(
                    "{n:>2} {when:?}: killed before the run folder existed"
                ));
                landed.push(Landed::BeforeFolder);
                break;
            };
            let (line, at) = check(n, when, &rdir, &ref_rows);
            if let (When::RecordWrite(extra), Landed::AfterCompletion, 0..3) = (*when, at, attempt)
            {
                *when = When::RecordWrite(extra / 4);
                continue;
            }
            outcomes.push(line);
            landed.push(at);
            break;
        }
    }
    eprintln!("{}", outcomes.join("\n"));
    // The kills must test what they are for: most land while the engine
    // runs (12 at random points of the log, 6 at step starts) and
    // enough while the record is written (6 aimed inside the first 60 %
    // of the time the uninterrupted run's record took).
    let count = |l: Landed| landed.iter().filter(|x| **x == l).count();
    let (mid_run, mid_record) = (count(Landed::MidRun), count(Landed::MidRecord));
    eprintln!(
        "landed: {mid_run} mid-run, {mid_record} mid-record, {} before the folder, {} after completion",
        count(Landed::BeforeFolder),
        count(Landed::AfterCompletion)
    );
    assert!(mid_run >= 14, "only {mid_run} kills landed mid-run");
    assert!(mid_record >= 3, "only {mid_record} kills landed mid-record");
    // Every kill aimed at a step start landed while the engine ran.
    for (w, l) in points.iter().zip(&landed) {
        if let When::StepStart(..) = w {
            assert_eq!(*l, Landed::MidRun, "{w:?}");
        }
    }
}

/// Everything a killed run's folder must satisfy; returns a line for the
/// log and where the kill landed.
fn check(n: usize, when: &When, rdir: &Path, ref_rows: &[String]) -> (String, Landed) {
    let text = std::fs::read(rdir.join("samples.csv")).unwrap_or_default();
    let text = String::from_utf8(text).expect("the log is UTF-8");
    let complete = match text.rfind('\n') {
        Some(p) => &text[..=p],
        None => "",
    };
    let rows: Vec<&str> = complete.lines().collect();
    // Every complete row is the uninterrupted run's row, in order.
    for (k, r) in rows.iter().enumerate() {
        assert_eq!(*r, ref_rows[k], "kill {n} ({when:?}): row {k} differs");
    }
    // The CSV reads (a cut last line is dropped and flagged).
    let mut read = 0usize;
    let mut last_t = f64::NEG_INFINITY;
    if !rows.is_empty() {
        let rep = stream_log(&rdir.join("samples.csv"), &LogFormat::default(), |r| {
            read += 1;
            last_t = r.t_s;
        })
        .unwrap_or_else(|e| panic!("kill {n}: the log does not read: {e}"));
        assert_eq!(read, rows.len() - 1, "kill {n}");
        assert_eq!(
            rep.partial_last_line,
            complete.len() < text.len(),
            "kill {n}"
        );
    }
    // Samples are written before each event: every sample up to the last
    // event on disk is on disk.
    let events = std::fs::read_to_string(rdir.join("events.jsonl")).unwrap_or_default();
    let last_event_t = events
        .lines()
        .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
        .filter_map(|v| v["t_s"].as_f64())
        .fold(f64::NEG_INFINITY, f64::max);
    if last_event_t.is_finite() {
        let due = ref_rows[1..]
            .iter()
            .filter(|r| {
                r.split(',')
                    .next()
                    .and_then(|t| t.parse::<f64>().ok())
                    .is_some_and(|t| t <= last_event_t - 1e-9)
            })
            .count();
        assert!(
            read >= due,
            "kill {n}: {read} rows on disk, {due} written before the last event"
        );
    }
    // No JSON record is half-written.
    for name in ["run.json", "summary.json", "sim-pack.json"] {
        let p = rdir.join(name);
        if let Ok(s) = std::fs::read_to_string(&p) {
            serde_json::from_str::<serde_json::Value>(&s)
                .unwrap_or_else(|e| panic!("kill {n}: {name} is half-written: {e}"));
        }
    }
    let ended = events.contains("\"event\":\"run_end\"");
    let status = std::fs::read_to_string(rdir.join("run.json"))
        .ok()
        .and_then(|s| serde_json::from_str::<serde_json::Value>(&s).ok())
        .and_then(|v| v["status"].as_str().map(str::to_string))
        .unwrap_or_else(|| "none".into());
    // `analyze` accepts what is left (a log with rows).
    if read > 0 {
        let out = Command::new(BIN)
            .args(["analyze", "--json"])
            .arg(rdir)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "kill {n}: analyze: {}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
    // `resume` finishes a run that had not finished; a finished one is
    // refused as such.
    let out = Command::new(BIN)
        .args(["resume", "--speed", "max", "--quiet"])
        .arg(rdir)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    let resumed = match status.as_str() {
        "running" | "interrupted" => {
            assert!(
                out.status.success(),
                "kill {n} ({when:?}): resume: {stderr}"
            );
            let s: serde_json::Value =
                serde_json::from_str(&std::fs::read_to_string(rdir.join("summary.json")).unwrap())
                    .unwrap();
            assert_eq!(s["status"], "completed", "kill {n}");
            assert!(
                s["capacity"]["measured_ah"]
                    .as_f64()
                    .is_some_and(|c| c > 10.0),
                "kill {n}: {s}"
            );
            // The resumed run's verdict, on every surface (the matrix's
            // "resumed" case).
            // (A kill after the last step's end finishes the record with
            // nothing to run again, so not every one has a resume note.)
            let typed = record::read::read_summary(&rdir.join("summary.json")).unwrap();
            crate::verdict::every_surface_agrees("resumed", &typed, None, Some(rdir));
            "resumed to completion"
        }
        "completed" => {
            assert_eq!(out.status.code(), Some(2), "kill {n}: {stderr}");
            assert!(stderr.contains("nothing to resume"));
            "had completed"
        }
        other => panic!("kill {n}: status {other}"),
    };
    let at = match (ended, status.as_str()) {
        (_, "completed") => Landed::AfterCompletion,
        (true, _) => Landed::MidRecord,
        (false, _) => Landed::MidRun,
    };
    (
        format!(
            "{n:>2} {when:?}: {read} rows, last event at {last_event_t:.0} s, status {status}, {resumed}, {at:?}"
        ),
        at,
    )
}
