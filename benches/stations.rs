//! Many stations at once in real time: 32 simulated stations, each
//! sampling at 1 Hz for 65 s on one thread (one task per station, as
//! `packbench run --bench` runs them), with the log written to disk.
//! Prints the CPU time the process used per wall second (over the whole
//! run and over the steady middle of it) and the samples taken more than
//! 100 ms behind their schedule. Asserts nothing.
//!
//! Run: cargo bench --bench stations   (STATIONS=32 SECONDS=65 to change)

use engine::control::StopHandle;
use packbench::session::emergency::Emergency;
use packbench::session::live::Board;
use packbench::session::request::JobBench;
use packbench::session::request::PackSource;
use packbench::session::request::RunRequest;
use packbench::session::request::Speed;
use packbench::session::request::StationJob;
use sim::SimConfig;
use std::time::Instant;

/// User + system CPU time of this process so far, s.
fn cpu_s() -> f64 {
    // SAFETY: getrusage fills the struct we pass.
    let mut u: libc::rusage = unsafe { std::mem::zeroed() };
    unsafe { libc::getrusage(libc::RUSAGE_SELF, &mut u) };
    let tv = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 * 1e-6;
    tv(u.ru_utime) + tv(u.ru_stime)
}

fn main() {
    let n: usize = std::env::var("STATIONS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(32);
    let seconds: f64 = std::env::var("SECONDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(65.0);
    let dir = tempfile::tempdir().expect("tempdir");
    let proc_path = dir.path().join("hold.toml");
    std::fs::write(
        &proc_path,
        format!(
            r#"title = "a light discharge, sampled at 1 Hz"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.8V/cell"
current_max = "1C"
temperature_max = "55degC"
[sampling]
every = "1s"
[[phase]]
name = "hold"
  [[phase.step]]
  kind = "discharge"
  current = "0.1C"
  ends = ["time > {seconds}s"]
"#
        ),
    )
    .expect("procedure");
    let jobs: Vec<StationJob> = (1..=n)
        .map(|k| {
            let id = format!("S{k:02}");
            let prepared = packbench::session::prepare::prepare(&RunRequest {
                procedure: proc_path.clone(),
                pack_id: id.clone(),
                pack: PackSource::Given(packbench::session::request::default_sim_pack()),
                results: dir.path().join("results"),
                options: Default::default(),
            })
            .expect("valid");
            StationJob {
                name: format!("bay-{k}"),
                board: Board::new(&format!("bay-{k}"), &id),
                prepared,
                bench: JobBench::Sim {
                    cfg: SimConfig {
                        seed: k as u64,
                        ..SimConfig::default()
                    },
                    speed: Speed::Factor(1.0),
                    station: None,
                },
            }
        })
        .collect();
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let local = tokio::task::LocalSet::new();
    let jobs = std::rc::Rc::new(jobs);
    let t0 = Instant::now();
    let c0 = cpu_s();
    let (reports, window) = local.block_on(&rt, async {
        // CPU over the steady middle: from 10 s to 10 s before the end.
        let probe = tokio::task::spawn_local(async move {
            tokio::time::sleep(std::time::Duration::from_secs(10)).await;
            let (a, ca) = (Instant::now(), cpu_s());
            tokio::time::sleep(std::time::Duration::from_secs_f64(seconds - 20.0)).await;
            (ca, cpu_s(), a.elapsed().as_secs_f64())
        });
        let mut tasks = Vec::new();
        for k in 0..jobs.len() {
            let jobs = std::rc::Rc::clone(&jobs);
            tasks.push(tokio::task::spawn_local(async move {
                packbench::session::run(jobs[k].session(
                    StopHandle::new(),
                    Emergency::default(),
                    true,
                    None,
                ))
                .await
            }));
        }
        let mut out = Vec::new();
        for t in tasks {
            out.push(t.await.expect("task").expect("run"));
        }
        (out, probe.await.expect("probe"))
    });
    let wall = t0.elapsed().as_secs_f64();
    let cpu = cpu_s() - c0;
    let samples: usize = reports.iter().map(|r| r.summary.samples).sum();
    let scheduled: u64 = reports
        .iter()
        .map(|r| r.outcome.timing.scheduled_samples)
        .sum();
    let late: u64 = reports.iter().map(|r| r.outcome.timing.late_samples).sum();
    let max_late = reports
        .iter()
        .map(|r| r.outcome.timing.max_late_s)
        .fold(0.0, f64::max);
    let completed = reports
        .iter()
        .filter(|r| r.summary.status == model::status::RunStatus::Completed)
        .count();
    let (ca, cb, w) = window;
    println!("{n} simulated stations in real time, 1 Hz, {seconds} s each, one thread");
    println!("  completed runs           {completed}/{n}");
    println!("  samples logged           {samples} ({scheduled} after a scheduled wait)");
    println!(
        "  CPU per wall second      {:.2} % of one core (steady middle, {:.0} s)",
        (cb - ca) / w * 100.0,
        w
    );
    println!(
        "  CPU per wall second      {:.2} % of one core (whole run incl. start and records, {:.1} s)",
        cpu / wall * 100.0,
        wall
    );
    println!("  late samples (>100 ms)   {late}");
    println!(
        "  latest sample            {:.1} ms behind schedule",
        max_late * 1e3
    );
    println!("targets: under 5 % of one core; zero late samples");
}
