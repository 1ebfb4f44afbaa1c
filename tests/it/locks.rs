//! One run, one process; one instrument, one process: the run's lock is
//! an OS lock held for the run's life, a station is its instruments (not
//! the file or results folder that names them), and a resume that cannot
//! reach the bench leaves the run resumable.

use crate::util::*;
use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

const PACK: [&str; 6] = ["--chemistry", "li-ion", "--series", "4", "--rated", "2Ah"];

fn discharge(d: &Path) -> PathBuf {
    write(
        d,
        "discharge.toml",
        &rest_then_discharge(
            "rest, then a 1C discharge",
            Some("1min"),
            1.0,
            1.2,
            60.0,
            "2h",
        ),
    )
}

/// A paced simulated run of pack `pack`, killed with SIGKILL well into its
/// discharge: an interrupted run to resume. Returns its folder.
fn killed_run(d: &Path, results: &Path, pack: &str) -> PathBuf {
    let proc = discharge(d);
    write(d, "full.toml", "[pack]\ninitial_soc = 1.0\n");
    let mut child = Command::new(BIN)
        .arg("run")
        .arg(&proc)
        .args([
            "--pack",
            pack,
            "--sim-config",
            "full.toml",
            "--speed",
            "400",
            "--quiet",
        ])
        .args(PACK)
        .arg("--results")
        .arg(results)
        .current_dir(d)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let rdir = wait_under_way(
        &results.join(pack),
        "\"kind\":\"discharge\"",
        Duration::from_secs(20),
    );
    let t0 = event_t(&rdir.join("events.jsonl"), "\"kind\":\"discharge\"").unwrap();
    assert!(wait_for_sample(
        &rdir.join("samples.csv"),
        t0 + 300.0,
        Duration::from_secs(20)
    ));
    signal(&child, libc::SIGKILL);
    child.wait().unwrap();
    rdir
}

fn resume(d: &Path, run: &Path) -> Child {
    Command::new(BIN)
        .arg("resume")
        .arg(run)
        .arg("--quiet")
        .current_dir(d)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

/// Finding 5: two resumes of one run both drove it (a check-then-write
/// lock), with two `resumed` events and rows out of order. Now exactly one
/// drives it and the other is refused, naming the process that holds it.
#[test]
fn two_resumes_of_one_run_at_once_drive_it_once() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let results = d.join("results");
    let run = killed_run(d, &results, "L1");
    // A lock file left by the killed process does not hold.
    assert!(run.join("run.lock").exists());
    let a = resume(d, &run);
    let b = resume(d, &run);
    let (oa, ob) = (a.wait_with_output().unwrap(), b.wait_with_output().unwrap());
    let codes = [oa.status.code(), ob.status.code()];
    let errs = [text(&oa.stderr), text(&ob.stderr)];
    let refused: Vec<usize> = (0..2).filter(|&k| codes[k] == Some(2)).collect();
    assert_eq!(refused.len(), 1, "exactly one refused: {codes:?} {errs:?}");
    let k = refused[0];
    assert!(errs[k].contains("is driving this run now"), "{}", errs[k]);
    assert_eq!(codes[1 - k], Some(0), "{}", errs[1 - k]);
    let events = std::fs::read_to_string(run.join("events.jsonl")).unwrap();
    assert_eq!(events.matches("\"event\":\"resumed\"").count(), 1);
    // Rows in time order.
    let log = record::read::read_samples(&run.join("samples.csv")).unwrap();
    assert!(log.samples.windows(2).all(|w| w[1].t_s >= w[0].t_s));
    assert!(!run.join("run.lock").exists(), "released at the end");
}

/// Finding 5: three runs of a new pack id at once; two failed on the
/// pack's spec (a shared temporary name). Now all three run.
#[test]
fn three_runs_of_a_new_pack_at_once_all_run() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let proc = discharge(d);
    let spawn = || {
        Command::new(BIN)
            .arg("run")
            .arg(&proc)
            .args(["--sim", "--pack", "NEW-1", "--quiet"])
            .args(PACK)
            .arg("--results")
            .arg(d.join("results"))
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap()
    };
    let kids: Vec<Child> = (0..3).map(|_| spawn()).collect();
    for k in kids {
        let o = k.wait_with_output().unwrap();
        assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    }
    let runs = std::fs::read_dir(d.join("results/NEW-1"))
        .unwrap()
        .filter(|e| e.as_ref().unwrap().path().is_dir())
        .count();
    assert_eq!(runs, 3);
    // No temporary file left behind.
    let left: Vec<String> = std::fs::read_dir(d.join("results/NEW-1"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".tmp"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
}

/// `sim serve` on loopback TCP; killed when dropped.
struct Served {
    child: Child,
    bench: PathBuf,
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn serve_tcp(d: &Path) -> Served {
    let bench = d.join("bench.toml");
    write(d, "sim.toml", "seed = 3\n[pack]\ninitial_soc = 1.0\n");
    let mut child = Command::new(BIN)
        .args(["sim", "serve", "--speed", "400", "--tcp", "127.0.0.1:0"])
        .args(PACK)
        .arg("--sim-config")
        .arg(d.join("sim.toml"))
        .arg("--bench-out")
        .arg(&bench)
        .args(["--bench-timeout", "300ms"])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    loop {
        match lines.next() {
            Some(Ok(l)) if l.starts_with("ready") => break,
            Some(Ok(_)) => continue,
            _ => panic!("sim serve ended before it was ready"),
        }
    }
    Served { child, bench }
}

/// Finding 6: another results folder, or a copy of the bench file under
/// another name, drove the same instruments. The instruments are locked by
/// their address: both are refused while a run holds them.
#[test]
fn a_copy_of_the_bench_file_or_another_results_folder_cannot_reach_held_instruments() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let s = serve_tcp(d);
    let proc = discharge(d);
    let copy = d.join("copy-of-bench.toml");
    std::fs::copy(&s.bench, &copy).unwrap();
    let mut first = Command::new(BIN)
        .arg("run")
        .arg(&proc)
        .args(["--pack", "H1", "--quiet", "--speed", "400"])
        .args(PACK)
        .arg("--bench")
        .arg(&s.bench)
        .arg("--results")
        .arg(d.join("results-a"))
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    wait_under_way(
        &d.join("results-a/H1"),
        "\"kind\":\"rest\"",
        Duration::from_secs(20),
    );
    for (bench, results) in [
        (&s.bench, "results-b"),
        (&copy, "results-a"),
        (&copy, "results-c"),
    ] {
        let out = Command::new(BIN)
            .arg("run")
            .arg(&proc)
            .args(["--pack", "H2", "--quiet", "--speed", "400"])
            .args(PACK)
            .arg("--bench")
            .arg(bench)
            .arg("--results")
            .arg(d.join(results))
            .output()
            .unwrap();
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{err}");
        assert!(err.contains("driven by another packbench process"), "{err}");
        assert!(
            err.contains("tcp:127.0.0.1:"),
            "names the instrument: {err}"
        );
        assert!(!d.join(results).join("H2").exists(), "nothing started");
    }
    signal(&first, libc::SIGINT);
    first.wait().unwrap();
}

/// Finding 7: a resume against a port that accepts but never answers
/// turned the run `aborted`, and every later resume was refused. Now the
/// failed attempt is recorded and the run stays resumable.
#[test]
fn a_resume_that_cannot_connect_leaves_the_run_resumable() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let s = serve_tcp(d);
    let proc = discharge(d);
    let results = d.join("results");
    let mut child = Command::new(BIN)
        .arg("run")
        .arg(&proc)
        .args(["--pack", "R1", "--quiet", "--speed", "400"])
        .args(PACK)
        .arg("--bench")
        .arg(&s.bench)
        .arg("--results")
        .arg(&results)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let run = wait_under_way(
        &results.join("R1"),
        "\"kind\":\"discharge\"",
        Duration::from_secs(20),
    );
    signal(&child, libc::SIGKILL);
    child.wait().unwrap();
    drop(s);
    // The bench's instruments now sit behind a port that accepts and
    // never answers.
    let silent = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    let port = silent.local_addr().unwrap().port();
    let held = std::sync::Arc::new(std::sync::Mutex::new(Vec::new()));
    {
        let held = held.clone();
        std::thread::spawn(move || {
            for c in silent.incoming().flatten() {
                held.lock().unwrap().push(c);
            }
        });
    }
    let bench = d.join("bench.toml");
    let text_before = std::fs::read_to_string(&bench).unwrap();
    let re_port = text_before
        .split("tcp:127.0.0.1:")
        .skip(1)
        .map(|r| {
            r.chars()
                .take_while(|c| c.is_ascii_digit())
                .collect::<String>()
        })
        .collect::<Vec<_>>();
    let mut t = text_before.clone();
    for p in re_port {
        t = t.replace(
            &format!("tcp:127.0.0.1:{p}"),
            &format!("tcp:127.0.0.1:{port}"),
        );
    }
    std::fs::write(&bench, t).unwrap();
    for attempt in 1..=2 {
        let out = Command::new(BIN)
            .arg("resume")
            .arg(&run)
            .arg("--quiet")
            .output()
            .unwrap();
        let err = text(&out.stderr);
        assert_eq!(out.status.code(), Some(1), "attempt {attempt}: {err}");
        assert!(!err.contains("is not resumed"), "attempt {attempt}: {err}");
        let m = json(&run.join("run.json"));
        assert_eq!(m["status"], "interrupted", "attempt {attempt}: {m}");
        assert_eq!(m["failed_resumes"].as_array().unwrap().len(), attempt);
        assert!(m["resumes"].as_array().unwrap().is_empty());
        assert!(!run.join("run.lock").exists());
    }
    let events = std::fs::read_to_string(run.join("events.jsonl")).unwrap();
    assert_eq!(events.matches("a resume could not connect").count(), 2);
}
