//! Link benchmark: packbench against the simulated instruments served on
//! pseudo-terminals that behave like 115200-baud serial lines (10 bits per
//! byte, both directions). Prints
//! 1. the time one sample takes (all its queries) against the wire-time
//!    bound of the bytes exchanged (target: at most 1.5x the bound);
//! 2. the p50/p99 deviation of sample times from their schedule at a 10 Hz
//!    sampling interval over more than 60 s of a real-time run (target:
//!    p99 at most 5 ms).
//!
//! Run: `cargo bench --bench serial_link` (about 75 s).

use engine::clock::{Clock, PacedClock};
use instrument::profile::Profile;
use instrument::scpi::Session;
use instrument::transport::{self, LinkSpec};
use model::pack::{Chemistry, PackSpec};
use packbench::session::benchfile::BenchFile;
use packbench::session::request::PackSource;
use packbench::session::request::RunRequest;
use record::read::read_samples;
use sim::serve::{self, Endpoint, ServeOptions};
use sim::server::SimRole;
use sim::SimConfig;
use std::sync::Arc;
use std::time::{Duration, Instant};

const BAUD: u32 = 115_200;

fn pack() -> PackSpec {
    PackSpec {
        chemistry: Chemistry::LiIon,
        series: 4,
        rated_capacity_ah: 20.0,
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
title = "10 Hz sampling benchmark"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1C"
temperature_max = "55degC"
temperature_min = "0degC"
[sampling]
every = "0.1s"
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
    let server = serve::serve(
        &pack(),
        &cfg,
        clock,
        &[
            (SimRole::Source, Endpoint::Pty { symlink: None }),
            (SimRole::Load, Endpoint::Pty { symlink: None }),
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

    // 1. One sample's queries (those of a discharge step: the load's
    //    voltage and current, then the temperature), timed.
    let load_link: LinkSpec = server.served[1].link.parse().expect("link");
    let profile = Profile::builtin_named("generic-scpi-load").expect("profile");
    let vi = profile
        .commands
        .measure_voltage_current
        .clone()
        .expect("compound query");
    let temp = profile
        .commands
        .measure_temperature
        .clone()
        .expect("temperature query");
    let (per_sample, bytes) = rt.block_on(async {
        let link = transport::open("load", &load_link, Duration::from_secs(2))
            .await
            .expect("open pty");
        let mut s = Session::with_framing("load", link, profile.framing());
        let mut times = Vec::new();
        let mut bytes = 0usize;
        for i in 0..300 {
            let t = Instant::now();
            let a = s.query(&vi).await.expect("reply");
            let b = s.query(&temp).await.expect("reply");
            let dt = t.elapsed().as_secs_f64();
            if i >= 20 {
                times.push(dt);
            }
            bytes = vi.len() + 1 + a.len() + 1 + temp.len() + 1 + b.len() + 1;
        }
        times.sort_by(f64::total_cmp);
        (times, bytes)
    });
    let bound = bytes as f64 * 10.0 / BAUD as f64;
    let median = percentile(&per_sample, 0.5);
    println!("serial link benchmark: simulated instruments on pseudo-terminals at {BAUD} baud (10 bits/byte)");
    println!(
        "one sample ({} queries, {bytes} bytes): median {:.2} ms, p99 {:.2} ms; wire-time bound {:.2} ms; ratio {:.2}x (target <= 1.5x)",
        2,
        median * 1e3,
        percentile(&per_sample, 0.99) * 1e3,
        bound * 1e3,
        median / bound
    );

    // 2. A real-time run at 10 Hz through the engine.
    let dir = tempfile::tempdir().expect("temp dir");
    let proc_path = dir.path().join("ten-hz.toml");
    std::fs::write(&proc_path, PROCEDURE).expect("write procedure");
    let bench_text = serve::bench_file_text(&server.served, Some("500ms"), false);
    let bench = BenchFile::parse(&dir.path().join("bench.toml"), &bench_text).expect("bench");
    let prepared = packbench::session::prepare::prepare(&RunRequest {
        procedure: proc_path,
        pack_id: "BENCH".into(),
        pack: PackSource::Given(pack()),
        results: dir.path().join("results"),
        options: packbench::session::request::RunOptions {
            // The trace's microsecond timestamps time each sample's first
            // query; the log's time column has millisecond resolution.
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
    let log = read_samples(&report.run_dir.join("samples.csv")).expect("samples");
    let t0 = log.samples[0].t_s;
    let every = 0.1;
    let mut dev: Vec<f64> = log
        .samples
        .iter()
        .map(|s| {
            let k = ((s.t_s - t0) / every).round();
            (s.t_s - (t0 + k * every)).abs()
        })
        .collect();
    let span = log.samples.last().map(|s| s.t_s - t0).unwrap_or(0.0);
    dev.sort_by(f64::total_cmp);
    println!(
        "10 Hz run: {} samples over {:.1} s ({}): deviation from schedule (log, 1 ms resolution) p50 {:.2} ms, p99 {:.2} ms, max {:.2} ms",
        log.samples.len(),
        span,
        report.summary.status,
        percentile(&dev, 0.5) * 1e3,
        percentile(&dev, 0.99) * 1e3,
        dev.last().copied().unwrap_or(0.0) * 1e3
    );
    // The same from the trace: the time each sample's first query left.
    let trace = std::fs::read_to_string(report.run_dir.join(record::TRACE_LOG)).unwrap_or_default();
    // The samples' grid starts with the first step, after the preflight
    // has read the zeros and programmed the instruments' protection: the
    // queries before the last protection setting are not samples.
    let lines: Vec<&str> = trace.lines().collect();
    let after_backstop = lines
        .iter()
        .rposition(|l| l.contains(":PROT"))
        .map_or(0, |i| i + 1);
    let starts: Vec<f64> = lines[after_backstop..]
        .iter()
        .filter(|l| l.ends_with(&format!("load > {vi}")))
        .filter_map(|l| l.split(' ').next()?.parse().ok())
        .collect();
    if let Some(&t0) = starts.first() {
        let mut dev: Vec<f64> = starts
            .iter()
            .map(|t| {
                let k = ((t - t0) / every).round();
                (t - (t0 + k * every)).abs()
            })
            .collect();
        if std::env::var_os("SERIAL_BENCH_DEBUG").is_some() {
            let mut idx: Vec<usize> = (0..dev.len()).collect();
            idx.sort_by(|a, b| dev[*b].total_cmp(&dev[*a]));
            for i in idx.iter().take(12) {
                eprintln!("sample {i}: {:.3} ms late", dev[*i] * 1e3);
            }
        }
        dev.sort_by(f64::total_cmp);
        println!(
            "10 Hz run, from the trace ({} samples, microseconds): deviation from schedule p50 {:.3} ms, p99 {:.3} ms, max {:.3} ms (target p99 <= 5 ms)",
            dev.len(),
            percentile(&dev, 0.5) * 1e3,
            percentile(&dev, 0.99) * 1e3,
            dev.last().copied().unwrap_or(0.0) * 1e3
        );
    }
}
