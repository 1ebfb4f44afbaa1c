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

/// How to pick the moment of the kill: always by a state of the run (rows
/// in its log, a record file half-way through its write), never by a time.
#[derive(Debug, Clone, Copy)]
enum When {
    /// Once the log holds this many rows (a random point of the run).
    Rows(usize),
    /// Once the log holds this many rows of step `n` (just after it
    /// started).
    StepStart(u32, usize),
    /// Stopped by the record's crash-test hook (`record::write::HALT_VAR`)
    /// at this write of a record file (`name#n`), its temporary file whole
    /// and not yet renamed: while the summary and report are written.
    RecordWrite(&'static str),
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
    let status = run_cmd(d, &reference).status().unwrap();
    assert!(status.success());
    let wall = t.elapsed();
    let ref_dir = the_run_dir(&reference).unwrap();
    let ref_rows: Vec<String> = std::fs::read_to_string(ref_dir.join("samples.csv"))
        .unwrap()
        .lines()
        .map(str::to_string)
        .collect();
    eprintln!(
        "uninterrupted: {} rows in {:.2} s",
        ref_rows.len() - 1,
        wall.as_secs_f64(),
    );
    // The log's line (header = 0) of each step's first row.
    let first_row = |step: u32| {
        ref_rows
            .iter()
            .position(|r| r.split(',').nth(1) == Some(step.to_string().as_str()))
            .unwrap_or_else(|| panic!("no row of step {step}"))
    };

    let mut rng = Lcg(0x5eed_1234);
    let mut points = Vec::new();
    for _ in 0..15 {
        points.push(When::Rows(
            (rng.next() * 0.95 * ref_rows.len() as f64) as usize,
        ));
    }
    // Steps 1 to 3, one to five rows in (the last step, a 5-minute rest,
    // takes about 2 ms at this speed: a kill aimed there would race the
    // run's end).
    for k in 0..6 {
        points.push(When::StepStart(1 + k % 3, 1 + (rng.next() * 5.0) as usize));
    }
    // The record after the run's end: summary.json, then report.html, then
    // run.json's third write (the first two are at the run's start), each
    // stopped before its rename.
    for f in ["summary.json#1", "report.html#1", "run.json#3"] {
        points.push(When::RecordWrite(f));
    }
    let mut outcomes = Vec::new();
    let mut landed = Vec::new();
    for (n, when) in points.iter().enumerate() {
        let results = d.join(format!("killed-{n}"));
        let mut cmd = run_cmd(d, &results);
        if let When::RecordWrite(f) = when {
            cmd.env(record::write::HALT_VAR, f);
        }
        let mut child = cmd.spawn().unwrap();
        let rows_at_least = |n: usize| {
            the_run_dir(&results)
                .and_then(|r| std::fs::read(r.join("samples.csv")).ok())
                .map_or(0, |b| b.iter().filter(|c| **c == b'\n').count())
                >= n
        };
        // Polled every millisecond for the state (the run writes a few
        // rows a millisecond at this speed).
        let started = Instant::now();
        let mut ended = false;
        while !(match *when {
            When::Rows(n) => rows_at_least(n),
            When::StepStart(s, k) => rows_at_least(first_row(s) + k),
            When::RecordWrite(_) => stopped(child.id()),
        }) {
            ended = child.try_wait().unwrap().is_some();
            if ended {
                break;
            }
            assert!(
                started.elapsed() < Duration::from_secs(60),
                "kill {n} ({when:?}): the run never got there"
            );
            std::thread::sleep(Duration::from_millis(1));
        }
        assert!(!ended, "kill {n} ({when:?}): the run ended before the kill");
        // SAFETY: kill(2) on our own child.
        unsafe { libc::kill(child.id() as i32, libc::SIGKILL) };
        child.wait().unwrap();
        let Some(rdir) = the_run_dir(&results) else {
            outcomes.push(format!(
                "{n:>2} {when:?}: killed before the run folder existed"
            ));
            landed.push(Landed::BeforeFolder);
            continue;
        };
        let (line, at) = check(n, when, &rdir, &ref_rows);
        outcomes.push(line);
        landed.push(at);
    }
    eprintln!("{}", outcomes.join("\n"));
    // The kills test what they are for: every one aimed into the run
    // (15 at random rows, 6 just after a step's start) landed while the
    // engine ran, every one stopped in a record write landed there.
    for (n, (w, l)) in points.iter().zip(&landed).enumerate() {
        let want = match w {
            When::Rows(_) | When::StepStart(..) => Landed::MidRun,
            When::RecordWrite(_) => Landed::MidRecord,
        };
        assert_eq!(*l, want, "kill {n} ({w:?})");
    }
}

/// Whether a process is stopped (SIGSTOP): the state field of
/// `/proc/<pid>/stat` is `T`.
fn stopped(pid: u32) -> bool {
    std::fs::read_to_string(format!("/proc/{pid}/stat")).is_ok_and(|s| {
        s.rsplit_once(')')
            .and_then(|(_, rest)| rest.split_whitespace().next())
            == Some("T")
    })
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
