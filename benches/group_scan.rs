//! Group-scan benchmark: a 13-group pack whose meter scans 16 channels
//! (13 group voltages and 3 temperature inputs) in one `READ?` every
//! second, every instrument on a pseudo-terminal that behaves like a
//! 115200-baud serial line (10 bits per byte). Prints
//! 1. the scan's time against the wire-time bound of its bytes;
//! 2. the p50/p99 deviation of each sample's start from its 1 s schedule
//!    over more than 60 s of a real-time run, from the trace's
//!    microsecond timestamps (target: p99 at most 20 ms).
//!
//! Run: `cargo bench --bench group_scan` (about 75 s).

use engine::clock::{Clock, PacedClock};
use model::pack::{Chemistry, PackSpec};
use packbench::session::benchfile::BenchFile;
use packbench::session::request::{PackSource, RunRequest};
use sim::serve::{self, Endpoint, ServeOptions};
use sim::server::SimRole;
use sim::SimConfig;
use std::sync::Arc;

const BAUD: u32 = 115_200;

fn pack() -> PackSpec {
    PackSpec {
        chemistry: Chemistry::LiIon,
        series: 13,
        rated_capacity_ah: 10.0,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    }
}

fn percentile(sorted: &[f64], p: f64) -> f64 {
    let i = ((sorted.len() - 1) as f64 * p).round() as usize;
    sorted[i]
}

const PROCEDURE: &str = r#"
title = "1 Hz group scan benchmark"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1C"
temperature_max = "55degC"
group_voltage_max = "4.25V/cell"
group_voltage_min = "2.7V/cell"
temperature_rise_max = "1K/min"
[sampling]
every = "1s"
[[phase]]
name = "sample"
  [[phase.step]]
  kind = "discharge"
  current = "0.2C"
  ends = ["time > 65s"]
"#;

fn main() {
    let clock: Arc<dyn Clock> = PacedClock::new(1.0);
    let mut cfg = SimConfig::default();
    cfg.pack.initial_soc = 0.9;
    cfg.groups.count = 13;
    cfg.groups.sensors = vec![1, 7, 13];
    let server = serve::serve(
        &pack(),
        &cfg,
        clock,
        &[
            (SimRole::Source, Endpoint::Pty { symlink: None }),
            (SimRole::Load, Endpoint::Pty { symlink: None }),
            (SimRole::Meter, Endpoint::Pty { symlink: None }),
        ],
        &ServeOptions {
            baud: Some(BAUD),
            modbus: false,
        },
        None,
    )
    .expect("serve on pseudo-terminals");
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let bench_text = serve::bench_file_text(&server.served, Some("500ms"), false)
        .replace("generic-scpi-meter", "generic-scpi-scanner")
        + "[station.groups]\nchannels = \"(@101:113)\"\n"
        + "[[station.groups.temperature]]\nchannel = 201\nname = \"group 1 surface\"\ngroup = 1\n"
        + "[[station.groups.temperature]]\nchannel = 207\nname = \"group 7 surface\"\ngroup = 7\n"
        + "[[station.groups.temperature]]\nchannel = 213\nname = \"group 13 surface\"\ngroup = 13\n";
    let dir = tempfile::tempdir().expect("temp dir");
    let bench = BenchFile::parse(&dir.path().join("bench.toml"), &bench_text).expect("bench");
    let proc_path = dir.path().join("one-hz.toml");
    std::fs::write(&proc_path, PROCEDURE).expect("write procedure");
    let prepared = packbench::session::prepare::prepare(&RunRequest {
        procedure: proc_path,
        pack_id: "BENCH".into(),
        pack: PackSource::Given(pack()),
        results: dir.path().join("results"),
        options: packbench::session::request::RunOptions {
            trace: true,
            ..Default::default()
        },
    })
    .expect("prepare");
    let report = rt.block_on(async {
        let links = packbench::session::links::open_station(&bench.stations[0])
            .await
            .expect("open links");
        let clock: Arc<dyn Clock> = PacedClock::new(1.0);
        packbench::session::run(packbench::session::Session::new(
            &prepared,
            packbench::session::Bench::Open { links, clock },
        ))
        .await
        .expect("run")
    });
    let trace = std::fs::read_to_string(report.run_dir.join(record::TRACE_LOG)).expect("trace");
    let lines: Vec<&str> = trace.lines().collect();
    let after_backstop = lines
        .iter()
        .rposition(|l| l.contains(":PROT"))
        .map_or(0, |i| i + 1);
    let t_of = |l: &str| l.split(' ').next().and_then(|t| t.parse::<f64>().ok());
    // Each sample starts with the load's reading; its scan is the meter's
    // READ? and the reply.
    // (A sample asks the load more than once: its first query counts.)
    let mut starts: Vec<f64> = Vec::new();
    for t in lines[after_backstop..]
        .iter()
        .filter(|l| l.contains(" load > MEAS"))
        .filter_map(|l| t_of(l))
    {
        if starts.last().is_none_or(|&p| t - p > 0.5) {
            starts.push(t);
        }
    }
    let mut scans = Vec::new();
    let mut bytes = 0usize;
    for w in lines[after_backstop..].windows(2) {
        if w[0].contains(" meter > READ?") && w[1].contains(" meter < ") {
            if let (Some(a), Some(b)) = (t_of(w[0]), t_of(w[1])) {
                scans.push(b - a);
                let reply = w[1].split(" meter < ").nth(1).unwrap_or("");
                bytes = "READ?\n".len() + reply.len() + 1;
            }
        }
    }
    scans.sort_by(f64::total_cmp);
    let bound = bytes as f64 * 10.0 / f64::from(BAUD);
    println!("group scan benchmark: 13 groups + 3 temperature inputs = 16 channels on one READ?, every instrument on a pseudo-terminal at {BAUD} baud (10 bits/byte)");
    if !scans.is_empty() {
        println!(
            "one scan ({bytes} bytes on the wire): median {:.2} ms, p99 {:.2} ms; wire-time bound {:.2} ms; ratio {:.2}x",
            percentile(&scans, 0.5) * 1e3,
            percentile(&scans, 0.99) * 1e3,
            bound * 1e3,
            percentile(&scans, 0.5) / bound
        );
    }
    let every = 1.0;
    if let Some(&t0) = starts.first() {
        let mut dev: Vec<f64> = starts
            .iter()
            .map(|t| {
                let k = ((t - t0) / every).round();
                (t - (t0 + k * every)).abs()
            })
            .collect();
        dev.sort_by(f64::total_cmp);
        println!(
            "1 Hz run ({}, {} samples over {:.0} s, from the trace): deviation of each sample's start from its schedule p50 {:.3} ms, p99 {:.3} ms, max {:.3} ms (target p99 <= 20 ms)",
            report.summary.status,
            dev.len(),
            starts.last().copied().unwrap_or(t0) - t0,
            percentile(&dev, 0.5) * 1e3,
            percentile(&dev, 0.99) * 1e3,
            dev.last().copied().unwrap_or(0.0) * 1e3
        );
    }
    let groups = record::read::read_groups(&report.run_dir)
        .expect("groups.csv")
        .map_or(0, |g| g.len());
    println!("group rows logged: {groups}");
}
