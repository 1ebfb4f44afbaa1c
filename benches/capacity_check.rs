//! Speed of the C/5 capacity check on the simulation clock: the whole run
//! (validation, SCPI traffic to the simulated instruments, the engine,
//! the CSV and event log on disk, the analysis and the summary), repeated
//! and timed. Prints figures; asserts nothing.
//!
//! Run: cargo bench --bench capacity_check

use engine::control::StopHandle;
use packbench::session::request::PackSource;
use packbench::session::request::RunRequest;
use packbench::session::request::Speed;
use sim::SimConfig;
use std::time::Instant;

fn main() {
    let rounds: usize = std::env::var("ROUNDS")
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(7);
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let mut walls = Vec::new();
    let mut bench_s = 0.0;
    let mut samples = 0;
    let mut lines = 0;
    for _ in 0..rounds {
        let dir = tempfile::tempdir().expect("tempdir");
        let req = RunRequest {
            procedure: "procedures/capacity-check.toml".into(),
            pack_id: "BENCH-1".into(),
            pack: PackSource::Given(packbench::session::request::default_sim_pack()),
            results: dir.path().to_path_buf(),
            options: Default::default(),
        };
        let t = Instant::now();
        let prepared = packbench::session::prepare::prepare(&req).expect("valid procedure");
        let r = rt
            .block_on(packbench::session::run(
                packbench::session::Session::sim(&prepared, &SimConfig::default(), Speed::Max)
                    .with_stop(StopHandle::new()),
            ))
            .expect("run");
        walls.push(t.elapsed().as_secs_f64());
        bench_s = r.outcome.duration_s;
        samples = r.summary.samples;
        lines = r.summary.steps.len();
        assert_eq!(r.summary.status, model::status::RunStatus::Completed);
    }
    walls.sort_by(|a, b| a.total_cmp(b));
    let median = walls[walls.len() / 2];
    let best = walls[0];
    println!("capacity check at C/5 on the simulated bench ({rounds} rounds, {lines} steps)");
    println!(
        "  bench time          {:.2} h ({samples} samples at 1 s)",
        bench_s / 3600.0
    );
    println!("  wall time  best     {:.3} s", best);
    println!("  wall time  median   {:.3} s", median);
    println!("  speed-up   median   {:.0}x real time", bench_s / median);
    println!(
        "  throughput median   {:.0} samples/s",
        samples as f64 / median
    );
    println!(
        "  target: at most 0.2 s wall median (>= 180000x)  -> {}",
        if median <= 0.2 { "met" } else { "NOT met" }
    );
}
