//! Leaving a bench to run: several stations at once with a fault on one,
//! Ctrl-C and a killed process on real processes, resume, finer sampling
//! near the cutoff against the simulation truth, zero offsets, standby
//! drain, the low-capacity alarm and the last-ditch switch-off.

use crate::util::*;
use engine::clock::{Clock, SimClock};
use engine::control::StopHandle;
use engine::event::Event;
use engine::state::RunState;
use model::pack::PackSpec;
use packbench::session::request::PackSource;
use packbench::session::request::Prepared;
use packbench::session::request::RunOptions;
use packbench::session::request::RunRequest;
use record::read::read_events;
use sim::{self, SimConfig};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// A rest, then a 1C capacity discharge to 3.0 V/cell.
fn discharge() -> String {
    rest_then_discharge(
        "rest, then a 1C capacity discharge",
        Some("2min"),
        1.0,
        1.2,
        60.0,
        "2h",
    )
}

fn run_dirs(results: &Path, pack: &str) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(results.join(pack))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_dir())
        .collect();
    v.sort();
    v
}

fn prepare(procedure: &Path, pack: PackSpec, results: &Path, options: RunOptions) -> Prepared {
    packbench::session::prepare::prepare(&RunRequest {
        procedure: procedure.to_path_buf(),
        pack_id: "P1".into(),
        pack: PackSource::Given(pack),
        results: results.to_path_buf(),
        options,
    })
    .unwrap()
}

fn rt() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap()
}

#[test]
fn four_stations_run_at_once_and_a_fault_stops_only_its_own() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Paced runs on one thread can sample a little late; the envelope
    // leaves room under the cutoff for that.
    write(
        d,
        "discharge.toml",
        &discharge().replace("2.80V/cell", "2.50V/cell"),
    );
    write(d, "full.toml", "[pack]\ninitial_soc = 1.0\n");
    // The third station's load stops answering 10 bench minutes in.
    write(
        d,
        "faulty.toml",
        "[pack]\ninitial_soc = 1.0\n[[faults.link]]\ninstrument = \"load\"\nkind = \"no-reply\"\nafter_s = 600\n",
    );
    let mut bench = String::new();
    for (k, cfg) in ["full", "full", "faulty", "full"].iter().enumerate() {
        bench.push_str(&format!(
            "[[station]]\nname = \"bay-{n}\"\npack = \"F0{n}\"\nsim_config = \"{cfg}.toml\"\n[station.source]\nlink = \"sim\"\nprofile = \"generic-scpi-source\"\n[station.load]\nlink = \"sim\"\nprofile = \"generic-scpi-load\"\n\n",
            n = k + 1
        ));
    }
    write(d, "bench.toml", &bench);
    let results = d.join("results");
    // Paced at 1000x so the four runs overlap in wall time.
    let out = Command::new(BIN)
        .args([
            "run",
            "discharge.toml",
            "--bench",
            "bench.toml",
            "--speed",
            "3000",
            "--quiet",
            "--chemistry",
            "li-ion",
            "--series",
            "10",
            "--rated",
            "14Ah",
        ])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .output()
        .unwrap();
    // Pack options are refused with several stations: each names its own.
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("each names its pack"));
    let t = Instant::now();
    let out = Command::new(BIN)
        .args([
            "run",
            "discharge.toml",
            "--bench",
            "bench.toml",
            "--speed",
            "1000",
            "--quiet",
            "--safe-stop-hold",
            "2s",
        ])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .output()
        .unwrap();
    let wall = t.elapsed().as_secs_f64();
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    eprintln!("{stdout}{stderr}");
    // One station aborted, and its silent load could not be confirmed off
    // in the hold: exit 4, "an output may still be on", said by name.
    assert_eq!(out.status.code(), Some(4), "one station's load may be on");
    assert!(
        stderr.contains("MAY STILL BE ON") && stderr.contains("load"),
        "{stderr}"
    );
    let lines: Vec<&str> = stdout.lines().collect();
    assert_eq!(lines.len(), 4, "one line per station");
    let mut windows = Vec::new();
    for n in 1..=4 {
        let pack = format!("F0{n}");
        let line = lines.iter().find(|l| l.contains(&pack)).unwrap();
        let runs = run_dirs(&results, &pack);
        assert_eq!(runs.len(), 1, "each station has its own results folder");
        let rdir = &runs[0];
        let manifest = json(&rdir.join("run.json"));
        let summary = json(&rdir.join("summary.json"));
        let events = read_events(&rdir.join("events.jsonl")).unwrap();
        let off = events
            .iter()
            .find_map(|e| match e {
                Event::OutputsOff {
                    source_off_confirmed,
                    load_off_confirmed,
                    ..
                } => Some((*source_off_confirmed, *load_off_confirmed)),
                _ => None,
            })
            .unwrap();
        windows.push((
            manifest["started_utc"].as_str().unwrap().to_string(),
            manifest["finished_utc"].as_str().unwrap().to_string(),
        ));
        if n == 3 {
            assert!(line.contains("aborted"), "{line}");
            assert_eq!(summary["status"], "aborted");
            assert!(
                summary["stop_reason"]
                    .as_str()
                    .unwrap()
                    .contains("instrument fault"),
                "{summary}"
            );
            // Outputs off: the source confirmed by read-back; the silent
            // load was sent its off state again and again for the hold,
            // and is named as possibly on (its reply path is dead).
            assert!(off.0, "source off confirmed");
            assert!(!off.1, "the silent load is not confirmed");
            assert_eq!(summary["outputs_may_be_on"].as_array().unwrap().len(), 1);
            continue;
        }
        assert!(line.contains("completed"), "{line}");
        assert!(off.0 && off.1, "both outputs confirmed off");
        // Correct figures: the measured capacity against the simulator's
        // own count of the charge through the terminals in that step.
        let measured = summary["capacity"]["measured_ah"].as_f64().unwrap();
        let step = summary["capacity"]["step"].as_u64().unwrap();
        let truth = manifest["simulation"]["steps"]
            .as_array()
            .unwrap()
            .iter()
            .find(|s| s["step"].as_u64() == Some(step))
            .unwrap()["charge_ah"]
            .as_f64()
            .unwrap()
            .abs();
        let err = (measured - truth) / truth;
        eprintln!(
            "bay-{n}: measured {measured:.4} Ah, truth {truth:.4} Ah ({:+.3} %)",
            err * 100.0
        );
        assert!(err.abs() < 0.003, "bay-{n}: {measured} vs {truth}");
    }
    // Concurrent: every run started before any finished.
    let first_end = windows.iter().map(|w| w.1.clone()).min().unwrap();
    let last_start = windows.iter().map(|w| w.0.clone()).max().unwrap();
    assert!(last_start < first_end, "{windows:?}");
    // One discharge is ~3400 bench s: ~3.4 s wall at 1000x.
    eprintln!("four stations in {wall:.2} s wall");
}

#[test]
fn ctrl_c_stops_a_real_time_run_with_outputs_off_and_a_summary() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write(d, "discharge.toml", &discharge());
    let results = d.join("results");
    let mut child = Command::new(BIN)
        .args([
            "run",
            "discharge.toml",
            "--pack",
            "C1",
            "--speed",
            "1",
            "--quiet",
        ])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    // Wait until the run is under way (its first step has started).
    let rdir = wait_under_way(&results.join("C1"), "step_start", Duration::from_secs(10));
    let sent = Instant::now();
    signal(&child, libc::SIGINT);
    let status = child.wait().unwrap();
    let took = sent.elapsed();
    let mut err = String::new();
    std::io::Read::read_to_string(child.stderr.as_mut().unwrap(), &mut err).unwrap();
    eprintln!("{err}");
    assert_eq!(status.code(), Some(5), "interrupted");
    // Promptly: well before the rest's two minutes would have ended it.
    assert!(took < Duration::from_secs(30), "stopped in {took:?}");
    eprintln!("Ctrl-C to exit: {:.2} s", took.as_secs_f64());
    let manifest = json(&rdir.join("run.json"));
    assert_eq!(manifest["status"], "interrupted");
    let summary = json(&rdir.join("summary.json"));
    assert_eq!(summary["status"], "interrupted");
    let events = read_events(&rdir.join("events.jsonl")).unwrap();
    let off = events.iter().find_map(|e| match e {
        Event::OutputsOff {
            source_off_confirmed,
            load_off_confirmed,
            reason,
            ..
        } => Some((*source_off_confirmed, *load_off_confirmed, reason.clone())),
        _ => None,
    });
    let (s, l, reason) = off.expect("an outputs-off record");
    assert!(s && l, "both outputs confirmed off by read-back");
    assert!(reason.contains("interrupted"), "{reason}");
    assert!(!rdir.join("run.lock").exists(), "the lock is removed");

    // The run was stopped in its rest: resumed, the rest starts its
    // two minutes again and the discharge follows.
    let out = Command::new(BIN)
        .args(["resume", "--speed", "max", "--quiet"])
        .arg(&rdir)
        .output()
        .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let summary = json(&rdir.join("summary.json"));
    assert_eq!(summary["status"], "completed");
    let r = &summary["resumed"][0];
    assert_eq!(r["step"], 1);
    assert_eq!(r["rule"], "a rest restarts its timer");
    let events = read_events(&rdir.join("events.jsonl")).unwrap();
    let resumed_at = r["t_s"].as_f64().unwrap();
    let rest_end = events
        .iter()
        .rev()
        .find_map(|e| match e {
            Event::StepEnd { step: 1, t_s, .. } => Some(*t_s),
            _ => None,
        })
        .unwrap();
    assert!(
        (rest_end - resumed_at - 120.0).abs() < 1.5,
        "the rest ran its full two minutes after the resume ({resumed_at} -> {rest_end})"
    );
    assert!(summary["capacity"]["measured_ah"].as_f64().unwrap() > 5.0);
}

#[test]
fn a_run_killed_mid_discharge_resumes_to_within_1pct_of_an_uninterrupted_run() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write(d, "discharge.toml", &discharge());
    write(d, "full.toml", "[pack]\ninitial_soc = 1.0\n");
    // The same scenario, uninterrupted.
    let whole = d.join("whole");
    let out = Command::new(BIN)
        .args([
            "run",
            "discharge.toml",
            "--pack",
            "K1",
            "--sim-config",
            "full.toml",
            "--quiet",
        ])
        .arg("--results")
        .arg(&whole)
        .current_dir(d)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0));
    let reference = json(&run_dirs(&whole, "K1")[0].join("summary.json"))["capacity"]
        ["measured_ah"]
        .as_f64()
        .unwrap();
    // Paced at 400x, killed with SIGKILL well into the discharge.
    let results = d.join("results");
    let mut child = Command::new(BIN)
        .args([
            "run",
            "discharge.toml",
            "--pack",
            "K1",
            "--sim-config",
            "full.toml",
            "--speed",
            "400",
            "--quiet",
        ])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let rdir = wait_under_way(
        &results.join("K1"),
        "\"kind\":\"discharge\"",
        Duration::from_secs(20),
    );
    // Well into the discharge: 1200 bench seconds (3 s of wall time at 400x).
    let events = rdir.join("events.jsonl");
    let t0 = event_t(&events, "\"kind\":\"discharge\"").expect("the discharge's start");
    assert!(wait_for_sample(
        &rdir.join("samples.csv"),
        t0 + 1200.0,
        Duration::from_secs(30)
    ));
    signal(&child, libc::SIGKILL);
    child.wait().unwrap();
    let manifest = json(&rdir.join("run.json"));
    assert_eq!(
        manifest["status"], "running",
        "killed: nothing was finished"
    );
    assert!(!rdir.join("summary.json").exists());
    // Resume, at full speed for the rest of the discharge.
    let out = Command::new(BIN)
        .args(["resume", "--speed", "max", "--quiet"])
        .arg(&rdir)
        .output()
        .unwrap();
    eprintln!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(out.status.code(), Some(0));
    let summary = json(&rdir.join("summary.json"));
    assert_eq!(summary["status"], "completed");
    let resumed = summary["resumed"].as_array().unwrap();
    assert_eq!(resumed.len(), 1);
    assert_eq!(resumed[0]["step"], 2, "the discharge goes on");
    assert!(resumed[0]["gap_s"].as_f64().unwrap() > 0.0);
    assert!(resumed[0]["rule"].as_str().unwrap().contains("carry over"));
    let measured = summary["capacity"]["measured_ah"].as_f64().unwrap();
    let err = (measured - reference) / reference;
    eprintln!(
        "resumed {measured:.4} Ah vs uninterrupted {reference:.4} Ah ({:+.3} %)",
        err * 100.0
    );
    assert!(err.abs() < 0.01, "{measured} vs {reference}");
    // The step is one step of the summary, its two stretches summed with
    // nothing integrated across the gap.
    let steps = summary["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 2);
    assert_eq!(
        json(&rdir.join("run.json"))["resumes"]
            .as_array()
            .unwrap()
            .len(),
        1
    );
    // A completed run is not resumed again.
    let again = Command::new(BIN).arg("resume").arg(&rdir).output().unwrap();
    assert_eq!(again.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&again.stderr).contains("nothing to resume"));
}

/// The charge the log counts after the true voltage crossed the cutoff.
fn past_cutoff(text: &str) -> (f64, f64) {
    let dir = tempfile::tempdir().unwrap();
    let proc_path = write(dir.path(), "p.toml", text);
    let pack = packbench::session::request::default_sim_pack();
    let p = prepare(&proc_path, pack, dir.path(), RunOptions::default());
    let cfg = SimConfig {
        pack: sim::config::PackConfig {
            initial_soc: 1.0,
            ..Default::default()
        },
        ..SimConfig::ideal()
    };
    let clock = SimClock::new();
    let c: Arc<dyn Clock> = clock;
    let links = sim::build(&p.pack, &cfg, Arc::clone(&c));
    let handle = links.handle.clone();
    let cutoff = 30.0;
    handle.watch_below(cutoff);
    let r = rt()
        .block_on(packbench::session::run(
            packbench::session::Session::new(
                &p,
                packbench::session::Bench::SimLinks {
                    cfg: cfg.clone(),
                    clock: c,
                    links,
                    speed_text: "max".into(),
                },
            )
            .with_stop(StopHandle::new()),
        ))
        .unwrap();
    assert_eq!(r.outcome.status, RunState::Completed);
    let (t_cross, _) = handle.crossed().expect("the voltage crossed the cutoff");
    let log = record::read::read_samples(&r.run_dir.join("samples.csv")).unwrap();
    let step: Vec<_> = log.samples.iter().filter(|s| s.step == 1).collect();
    let last = step.last().unwrap();
    assert!(last.voltage_v <= cutoff, "the step ended on its cutoff");
    // Trapezoid of the logged current from the crossing to the step's end.
    let mut q = 0.0;
    for w in step.windows(2) {
        let (a, b) = (w[0], w[1]);
        if b.t_s <= t_cross {
            continue;
        }
        let from = a.t_s.max(t_cross);
        let f = (from - a.t_s) / (b.t_s - a.t_s);
        let ia = a.current_a + f * (b.current_a - a.current_a);
        q += (ia + b.current_a) * 0.5 * (b.t_s - from) / 3600.0;
    }
    (q.abs(), last.current_a.abs())
}

#[test]
fn fine_sampling_near_the_cutoff_bounds_the_charge_counted_past_it() {
    let base = r#"title = "1C to the cutoff"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1.2C"
temperature_max = "60degC"
[sampling]
every = "1s"
FINE
[[phase]]
name = "measure"
  [[phase.step]]
  kind = "discharge"
  current = "1C"
  ends = ["voltage < 3.0V/cell", "time > 2h"]
  result = "capacity"
"#;
    let (coarse_q, i) = past_cutoff(&base.replace("FINE", ""));
    let (fine_q, i2) = past_cutoff(&base.replace("FINE", "fine = \"0.1s\""));
    let bound = 0.1 * i2 / 3600.0;
    eprintln!(
        "charge counted past the cutoff: 1 s sampling {:.3} mAh (1 s x I = {:.3} mAh); 0.1 s near the end {:.3} mAh (bound 0.1 s x I = {:.3} mAh)",
        coarse_q * 1e3,
        i / 3.6,
        fine_q * 1e3,
        bound * 1e3
    );
    assert!(fine_q <= bound * 1.001, "{fine_q} > {bound}");
    assert!(coarse_q <= i / 3600.0 * 1.001);
    assert!(
        fine_q < coarse_q,
        "finer sampling catches the cutoff sooner"
    );
}

#[test]
fn zero_offsets_are_found_warned_and_corrected_when_asked() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let with = |correct: bool| {
        discharge().replace(
            "[sampling]",
            &format!("[offsets]\nwarn_above = \"10mA\"\ncorrect = {correct}\n[sampling]"),
        )
    };
    // A 20 mA zero offset on the load's current reading; otherwise ideal.
    let mut cfg = SimConfig::ideal();
    cfg.ideal = false;
    cfg.pack.initial_soc = 1.0;
    cfg.source = sim::config::InstrumentMeters {
        voltage: Default::default(),
        current: Default::default(),
    };
    cfg.load = sim::config::InstrumentMeters {
        voltage: Default::default(),
        current: sim::config::MeterConfig {
            offset: 0.020,
            ..Default::default()
        },
    };
    cfg.temperature = Default::default();
    cfg.meter = Default::default();
    let mut measured = Vec::new();
    let mut truth_ah = 0.0;
    for correct in [false, true] {
        let path = write(d, &format!("p{correct}.toml"), &with(correct));
        let results = d.join(format!("r{correct}"));
        let p = prepare(
            &path,
            packbench::session::request::default_sim_pack(),
            &results,
            RunOptions::default(),
        );
        let r = rt()
            .block_on(packbench::session::run(
                packbench::session::Session::sim(&p, &cfg, packbench::session::request::Speed::Max)
                    .with_stop(StopHandle::new()),
            ))
            .unwrap();
        let pf = r.summary.preflight.clone().expect("preflight record");
        // Pack sign: the load reads 20 mA of discharge with nothing flowing.
        let z = pf.load_zero_ma.unwrap();
        assert!((z + 20.0).abs() < 0.5, "load zero {z} mA");
        assert!(pf.source_zero_ma.unwrap().abs() < 0.5);
        assert_eq!(pf.corrected, correct);
        assert!(
            r.summary
                .warnings
                .iter()
                .any(|w| w.contains("the load reads -20.0 mA")),
            "{:?}",
            r.summary.warnings
        );
        let c = r.summary.capacity.clone().unwrap();
        measured.push(c.measured_ah);
        let m = json(&r.run_dir.join("run.json"));
        truth_ah = m["simulation"]["steps"]
            .as_array()
            .unwrap()
            .iter()
            .find(|s| s["step"].as_u64() == Some(c.step as u64))
            .unwrap()["charge_ah"]
            .as_f64()
            .unwrap()
            .abs();
    }
    let (raw, fixed) = (measured[0], measured[1]);
    eprintln!("truth {truth_ah:.5} Ah; uncorrected {raw:.5} Ah; corrected {fixed:.5} Ah");
    // Uncorrected, the offset adds 20 mA x the discharge time (about
    // 0.018 Ah in 55 min); corrected, it is gone.
    assert!(raw - truth_ah > 0.015, "{raw} vs {truth_ah}");
    assert!((fixed - truth_ah).abs() < 0.002, "{fixed} vs {truth_ah}");
}

#[test]
fn the_drain_step_measures_a_5_ma_standby_drain_within_10pct() {
    let dir = tempfile::tempdir().unwrap();
    let text = r#"title = "standby drain"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1C"
temperature_max = "55degC"
[[phase]]
name = "drain"
  [[phase.step]]
  kind = "rest"
  ends = ["time > 2h"]
  [[phase.step]]
  kind = "drain"
  current = "100mA"
  ends = ["time > 4h"]
"#;
    let path = write(dir.path(), "drain.toml", text);
    let p = prepare(
        &path,
        packbench::session::request::default_sim_pack(),
        dir.path(),
        RunOptions::default(),
    );
    assert_eq!(p.procedure.plan.steps[1].kind.name(), "drain");
    // The default bench's meters (2 mA zero offset and noise on the
    // source's current), a pack whose electronics draw 5 mA.
    let mut cfg = SimConfig::default();
    cfg.pack.standby_drain_a = 0.005;
    cfg.pack.initial_soc = 0.6;
    let r = rt()
        .block_on(packbench::session::run(
            packbench::session::Session::sim(&p, &cfg, packbench::session::request::Speed::Max)
                .with_stop(StopHandle::new()),
        ))
        .unwrap();
    assert_eq!(r.outcome.status, RunState::Completed);
    let dr = r.summary.standby_drain.clone().expect("a drain figure");
    eprintln!(
        "standby drain {:.3} mA, {:.3} %/month of {:.2} Ah (window {:.0} s)",
        dr.current_ma, dr.pct_per_month, dr.capacity_ref_ah, dr.window_s
    );
    assert!((dr.current_ma - 5.0).abs() < 0.5, "{} mA", dr.current_ma);
    // 5 mA x 730.5 h = 3.65 Ah a month: 26 % of the rated 14 Ah. Worked
    // here, not by the code under test: a month is 365.25 d / 12 = 730.5 h
    // (the Julian year, common practice).
    let expected = dr.current_ma / 1000.0 * (365.25 * 24.0 / 12.0) / 14.0 * 100.0;
    assert!(
        (dr.pct_per_month - expected).abs() < 1e-9,
        "{} against {expected}",
        dr.pct_per_month
    );
    assert!((dr.pct_per_month - 26.1).abs() < 3.0);
}

#[test]
fn the_low_capacity_alarm_is_raised_and_the_run_goes_on() {
    let dir = tempfile::tempdir().unwrap();
    let path = write(dir.path(), "d.toml", &discharge());
    // The simulated pack holds 93 % of rated: an alarm below 95 % rings,
    // one below 90 % does not.
    for (pct, rings) in [(95.0, true), (90.0, false)] {
        let opts = RunOptions {
            alarm_below_pct: Some(pct),
            ..RunOptions::default()
        };
        let results = dir.path().join(format!("r{pct}"));
        let p = prepare(
            &path,
            packbench::session::request::default_sim_pack(),
            &results,
            opts,
        );
        let mut cfg = SimConfig::default();
        cfg.pack.initial_soc = 1.0;
        let r = rt()
            .block_on(packbench::session::run(
                packbench::session::Session::sim(&p, &cfg, packbench::session::request::Speed::Max)
                    .with_stop(StopHandle::new()),
            ))
            .unwrap();
        assert_eq!(r.outcome.status, RunState::Completed, "the run goes on");
        let events = read_events(&r.run_dir.join("events.jsonl")).unwrap();
        let alarms = events
            .iter()
            .filter(|e| matches!(e, Event::Alarm { kind, .. } if kind == "low_capacity"))
            .count();
        assert_eq!(alarms, usize::from(rings), "alarm below {pct} %");
        assert_eq!(r.summary.alarms.len(), usize::from(rings));
    }
}

#[test]
fn a_second_ctrl_c_switches_every_instrument_off_on_fresh_links() {
    rt().block_on(async {
        let cfg = SimConfig::ideal();
        let clock: Arc<dyn Clock> = SimClock::new();
        let links = sim::build(
            &packbench::session::request::default_sim_pack(),
            &cfg,
            clock,
        );
        let handle = links.handle.clone();
        // Turn the load on through its running link.
        let mut load = instrument::Load::connect(
            links.load,
            instrument::profile::Profile::builtin(instrument::profile::ProfileRole::Load),
        )
        .await
        .unwrap();
        load.program(instrument::LoadSetting::Current(1.0))
            .await
            .unwrap();
        load.0.enable().await.unwrap();
        assert!(handle.load_input_on());
        let em = packbench::session::emergency::Emergency::default();
        let reopen = |r: &Arc<std::sync::Mutex<dyn instrument::link::LineResponder>>| {
            let r = Arc::clone(r);
            let f: instrument::scpi::Reopen = Arc::new(move || {
                let link = sim::link_to(&r);
                Box::pin(async move { Ok(link) })
            });
            f
        };
        use instrument::profile::{Profile, ProfileRole};
        em.register(
            "bay-1 source".into(),
            reopen(&links.source_responder),
            Profile::builtin(ProfileRole::Source),
            None,
        );
        em.register(
            "bay-1 load".into(),
            reopen(&links.load_responder),
            Profile::builtin(ProfileRole::Load),
            None,
        );
        let sent = em.all_off(Duration::from_millis(500)).await;
        assert_eq!(sent.len(), 2);
        assert!(sent.iter().all(|(_, ok)| *ok), "{sent:?}");
        assert!(!handle.load_input_on(), "the load is off");
        assert!(!handle.source_output_on());
    });
}

#[test]
fn ctrl_c_stops_every_station_of_a_bench_and_a_live_run_is_not_resumed() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    write(d, "discharge.toml", &discharge());
    let mut bench = String::new();
    for n in 1..=3 {
        bench.push_str(&format!(
            "[[station]]\nname = \"bay-{n}\"\npack = \"G0{n}\"\n[station.source]\nlink = \"sim\"\nprofile = \"generic-scpi-source\"\n[station.load]\nlink = \"sim\"\nprofile = \"generic-scpi-load\"\n\n"
        ));
    }
    write(d, "bench.toml", &bench);
    let results = d.join("results");
    let mut child = Command::new(BIN)
        .args([
            "run",
            "discharge.toml",
            "--bench",
            "bench.toml",
            "--speed",
            "1",
            "--quiet",
        ])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let dirs: Vec<PathBuf> = (1..=3)
        .map(|n| {
            wait_under_way(
                &results.join(format!("G0{n}")),
                "step_start",
                Duration::from_secs(10),
            )
        })
        .collect();
    // While it runs, the folder is locked: resume refuses it.
    let out = Command::new(BIN)
        .arg("resume")
        .arg(&dirs[0])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&out.stderr).contains("is driving this run now"),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    signal(&child, libc::SIGINT);
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(5));
    let mut stdout = String::new();
    std::io::Read::read_to_string(child.stdout.as_mut().unwrap(), &mut stdout).unwrap();
    assert_eq!(
        stdout.lines().filter(|l| l.contains("interrupted")).count(),
        3,
        "{stdout}"
    );
    for r in &dirs {
        assert_eq!(json(&r.join("run.json"))["status"], "interrupted");
        assert_eq!(json(&r.join("summary.json"))["status"], "interrupted");
        let events = read_events(&r.join("events.jsonl")).unwrap();
        assert!(events.iter().any(|e| matches!(
            e,
            Event::OutputsOff {
                source_off_confirmed: true,
                load_off_confirmed: true,
                ..
            }
        )));
    }
    // The exact command to go on is printed, and it resumes every
    // interrupted station of the bench at once.
    let wanted = format!(
        "packbench resume --bench bench.toml --results {}",
        results.display()
    );
    let said = stdout
        .lines()
        .find(|l| l.contains("packbench resume"))
        .unwrap_or_else(|| panic!("no resume command in:\n{stdout}"));
    assert!(said.ends_with(&wanted), "{said}");
    let out = Command::new(BIN)
        .args([
            "resume",
            "--bench",
            "bench.toml",
            "--speed",
            "max",
            "--quiet",
        ])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert_eq!(
        out.status.code(),
        Some(0),
        "{text}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        text.lines().filter(|l| l.contains("completed")).count(),
        3,
        "{text}"
    );
    for r in &dirs {
        assert_eq!(json(&r.join("run.json"))["status"], "completed");
        assert_eq!(
            json(&r.join("summary.json"))["resumed"]
                .as_array()
                .unwrap()
                .len(),
            1
        );
    }
    // Nothing left to resume: said, as bad input.
    let again = Command::new(BIN)
        .args(["resume", "--bench", "bench.toml"])
        .arg("--results")
        .arg(&results)
        .current_dir(d)
        .output()
        .unwrap();
    assert_eq!(again.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&again.stderr).contains("nothing to resume"));
}
