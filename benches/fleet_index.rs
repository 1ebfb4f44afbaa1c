//! The fleet from the results index against the folder walk, on a made-up
//! fleet of 10,000 packs × 20 tests (`FLEET_PACKS`, `FLEET_RUNS` to
//! change): the time to build the index from nothing, the time of `fleet`
//! from an index that is up to date (its refresh included), the time of the
//! walk over every folder, and whether the two rank alike.
//!
//! `cargo bench --bench fleet_index` (needs about 1 GB of disk for the
//! default size, in the system's temporary folder).

use analysis::fade::schedule::Schedule;
use std::process::Command;
use std::time::Instant;

fn env_or(k: &str, d: usize) -> usize {
    std::env::var(k)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(d)
}

fn main() {
    let packs = env_or("FLEET_PACKS", 10_000);
    let runs = env_or("FLEET_RUNS", 20);
    let dir = tempfile::tempdir().expect("a temporary folder");
    // One real summary to copy from: a simulated capacity check.
    let seed = dir.path().join("seed");
    let out = Command::new(env!("CARGO_BIN_EXE_packbench"))
        .args([
            "run",
            "procedures/capacity-check.toml",
            "--sim",
            "--pack",
            "FR-SEED",
            "--quiet",
            "--chemistry",
            "li-ion",
            "--series",
            "10",
            "--rated",
            "14Ah",
            "--results",
        ])
        .arg(&seed)
        .output()
        .expect("packbench runs");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let summary_path = std::fs::read_dir(seed.join("FR-SEED"))
        .expect("the seed run")
        .flatten()
        .map(|e| e.path().join(record::SUMMARY_JSON))
        .find(|p| p.is_file())
        .expect("a summary");
    let template = record::read::read_summary(&summary_path).expect("a summary");
    let results = dir.path().join("results");
    let t0 = Instant::now();
    packbench::cli::demo::synthetic_fleet(&results, packs, runs, &template).expect("generated");
    println!(
        "fleet index benchmark: {packs} packs x {runs} tests ({} run folders) generated in {:.1} s",
        packs * runs,
        t0.elapsed().as_secs_f64()
    );
    let today = chrono::NaiveDate::from_ymd_opt(2026, 1, 1).expect("a date");
    let schedule = Schedule::interval(92);
    let t0 = Instant::now();
    let (walk, _) = record::history::fleet(&results, today, &schedule, 80.0).expect("the walk");
    let walk_s = t0.elapsed().as_secs_f64();
    let t0 = Instant::now();
    let (_, built) = record::index::fleet(&results, today, &schedule, 80.0).expect("the index");
    let build_s = t0.elapsed().as_secs_f64();
    let mut best = f64::INFINITY;
    let mut from_index = None;
    for _ in 0..3 {
        let t0 = Instant::now();
        let (f, r) = record::index::fleet(&results, today, &schedule, 80.0).expect("the index");
        best = best.min(t0.elapsed().as_secs_f64());
        assert_eq!(r.runs_read, 0, "an up-to-date index reads no run again");
        from_index = Some(f);
    }
    let from_index = from_index.expect("three tries");
    // Where the time goes: the refresh by stamps, reading the histories,
    // and ranking (the fade fits).
    let t0 = Instant::now();
    let mut ix = record::index::Index::open(&results).expect("open");
    ix.refresh(&results).expect("refresh");
    let refresh_s = t0.elapsed().as_secs_f64();
    let t0 = Instant::now();
    let hs = ix.histories(&results).expect("histories");
    let read_s = t0.elapsed().as_secs_f64();
    let t0 = Instant::now();
    let _ = analysis::fade::fleet::rank(&hs, today, &schedule, 80.0);
    let rank_s = t0.elapsed().as_secs_f64();
    println!(
        "  of which: refresh {refresh_s:.3} s, histories from the index {read_s:.3} s, ranking {rank_s:.3} s"
    );
    let same = from_index == walk;
    println!("  folder walk (every summary.json read):     {walk_s:.2} s",);
    println!(
        "  index built from nothing ({} runs read):   {build_s:.2} s",
        built.runs_read
    );
    println!(
        "  fleet from the up-to-date index (best of 3, refresh by stamps included): {best:.3} s (target < 1 s)"
    );
    println!(
        "  same ranking and figures either way: {same} ({} packs ranked)",
        from_index.rows.len()
    );
    let size = std::fs::metadata(results.join(record::index::INDEX_SQLITE))
        .map(|m| m.len())
        .unwrap_or(0);
    println!("  index file: {:.1} MB", size as f64 / 1e6);
    if let Ok(url) = std::env::var("FLEET_PG") {
        central(&url, &results, &from_index, today, &schedule);
    }
}

/// With `FLEET_PG` (a server URL whose user may create databases): the
/// first sync of the whole fleet into a new central store, a second sync
/// (nothing to push), and the fleet from the store against the index's.
fn central(
    admin: &str,
    results: &std::path::Path,
    from_index: &analysis::fade::fleet::Fleet,
    today: chrono::NaiveDate,
    schedule: &Schedule,
) {
    let mut c = postgres::Client::connect(admin, postgres::NoTls).expect("the server");
    c.batch_execute("DROP DATABASE IF EXISTS pb_fleet_bench WITH (FORCE)")
        .expect("drop");
    c.batch_execute("CREATE DATABASE pb_fleet_bench")
        .expect("create");
    let url = format!(
        "{}/pb_fleet_bench",
        &admin[..admin.rfind('/').expect("a URL with a database")]
    );
    let sync = || {
        let t0 = Instant::now();
        let out = Command::new(env!("CARGO_BIN_EXE_packbench"))
            .args(["sync", "--to", &url, "--bench", "bench-a"])
            .arg(results)
            .output()
            .expect("packbench sync");
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        (
            t0.elapsed().as_secs_f64(),
            String::from_utf8_lossy(&out.stdout).trim().to_string(),
        )
    };
    let (first, said) = sync();
    println!("  central store, first sync of every run: {first:.2} s ({said})");
    let (second, _) = sync();
    println!("  central store, second sync (nothing to push): {second:.2} s");
    let t0 = Instant::now();
    let target = exchange::central::target(Some(&url)).expect("url");
    let mut store = exchange::central::Store::connect(&target).expect("connect");
    let f = exchange::central::fleet(&mut store, today, schedule, 80.0).expect("fleet");
    println!(
        "  fleet from the central store: {:.3} s; same ranking and figures as the index: {}",
        t0.elapsed().as_secs_f64(),
        &f == from_index
    );
}
