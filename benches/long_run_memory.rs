//! Peak resident memory of `packbench run --sim` (the built-in simulated
//! bench on the simulation clock) against the run's length: 1C charge to
//! 4.2 V/cell with a C/10 taper, 1C discharge to 3.0 V/cell, sampled every
//! 10 s, repeated 25, 50 and 100 times. The target: flat (independent of
//! the run's length) and under 64 MB at 100 cycles. Prints figures;
//! asserts nothing.
//!
//! Run: cargo bench --bench long_run_memory   (Unix: wait4's rusage)
//! CYCLES="10 20" cargo bench --bench long_run_memory   for other lengths
//! EVERY=1s cargo bench --bench long_run_memory         another sampling interval

#[cfg(unix)]
fn main() {
    let cycles: Vec<u32> = std::env::var("CYCLES")
        .ok()
        .map(|s| {
            s.split_whitespace()
                .filter_map(|c| c.parse().ok())
                .collect()
        })
        .unwrap_or_else(|| vec![25, 50, 100]);
    let bin = env!("CARGO_BIN_EXE_packbench");
    let dir = tempfile::tempdir().expect("tempdir");
    println!("cycles  samples     wall s   peak RSS MB   bytes/sample over the first");
    let mut first: Option<(usize, f64)> = None;
    for n in cycles {
        let proc = dir.path().join(format!("cycles-{n}.toml"));
        let every = std::env::var("EVERY").unwrap_or_else(|_| "10s".into());
        std::fs::write(&proc, procedure(n, &every)).expect("procedure");
        let results = dir.path().join(format!("r{n}"));
        let t = std::time::Instant::now();
        // Waited for by wait4 below, which also gives its peak memory.
        #[allow(clippy::zombie_processes)]
        let child = std::process::Command::new(bin)
            .arg("run")
            .arg(&proc)
            .args(["--sim", "--pack", "MEM-1", "--quiet"])
            .args(["--chemistry", "li-ion", "--series", "4", "--rated", "2Ah"])
            .arg("--results")
            .arg(&results)
            .stdout(std::process::Stdio::null())
            .spawn()
            .expect("packbench");
        let (code, max_rss_kb) = wait_rusage(child.id() as i32);
        let wall = t.elapsed().as_secs_f64();
        let samples = std::fs::read_dir(results.join("MEM-1"))
            .ok()
            .and_then(|mut d| d.find_map(|e| e.ok().map(|e| e.path())))
            .and_then(|run| std::fs::read_to_string(run.join("samples.csv")).ok())
            .map(|t| t.lines().count().saturating_sub(1))
            .unwrap_or(0);
        let mb = max_rss_kb as f64 / 1024.0;
        let growth = match first {
            Some((s0, m0)) if samples > s0 => {
                format!("{:.1}", (mb - m0) * 1024.0 * 1024.0 / (samples - s0) as f64)
            }
            _ => "-".into(),
        };
        if first.is_none() {
            first = Some((samples, mb));
        }
        println!("{n:>6}  {samples:>8}  {wall:>8.1}   {mb:>10.1}   {growth:>10}   (exit {code})");
    }
}

#[cfg(unix)]
fn wait_rusage(pid: i32) -> (i32, i64) {
    let mut status = 0;
    // SAFETY: wait4 writes into the two locals we own.
    let mut ru: libc::rusage = unsafe { std::mem::zeroed() };
    let r = unsafe { libc::wait4(pid, &mut status, 0, &mut ru) };
    if r < 0 {
        return (-1, 0);
    }
    let code = if libc::WIFEXITED(status) {
        libc::WEXITSTATUS(status)
    } else {
        -1
    };
    (code, ru.ru_maxrss)
}

#[cfg(unix)]
fn procedure(cycles: u32, every: &str) -> String {
    format!(
        r#"title = "Memory against run length ({cycles} cycles)"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.80V/cell"
current_max = "1.2C"
temperature_max = "55degC"
[sampling]
every = "{every}"
[[phase]]
name = "cycle"
repeat = {cycles}
  [[phase.step]]
  kind = "charge"
  current = "1C"
  voltage = "4.2V/cell"
  ends = ["current < 0.1C", "time > 3h"]
  [[phase.step]]
  kind = "discharge"
  current = "1C"
  ends = ["voltage < 3.0V/cell", "time > 2h"]
"#
    )
}

#[cfg(not(unix))]
fn main() {
    println!("long_run_memory: Unix only (wait4's rusage)");
}
