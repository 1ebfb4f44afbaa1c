//! Big-log benchmark: a 10-million-row log (about 16 weeks of 1 Hz samples,
//! many steps) analysed by `packbench analyze`, side by side with two
//! scripts computing only the per-step Ah and Wh: pandas + numpy
//! (scripts/analyze_reference.py) and polars, a lazy CSV scan grouped by
//! step (scripts/analyze_reference_polars.py). Each is run three times in
//! turn; the best wall time of each is compared. Prints wall times, the
//! ratios, and peak memory (maximum resident set size of each process),
//! and checks the per-step figures agree.
//!
//! Targets: packbench at least 8x faster than pandas and 2.5x faster than
//! polars, peak memory at most 64 MB.
//!
//! Then the report of a 3.6-million-row run (`packbench report`, its
//! charts gathered as the log streams): its time and peak memory, which
//! must not grow with the log (target: at most 64 MB).
//! Run: `cargo bench --bench analyze_big` (needs python3 with pandas,
//! numpy and polars for the comparison: `pip install pandas numpy
//! polars`; the file is written under target/).

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Instant;

const ROWS: u64 = 10_000_000;
const BIN: &str = env!("CARGO_BIN_EXE_packbench");

/// Write the log: repeated cycles of a CC-CV-like charge, a rest, a
/// discharge with a pulse in it, and a rest, on a 10S 50 Ah pack.
fn generate(path: &Path) -> std::io::Result<u64> {
    let f = std::fs::File::create(path)?;
    let mut w = std::io::BufWriter::with_capacity(1 << 20, f);
    writeln!(w, "t_s,step,cycle,voltage_v,current_a,temperature_c")?;
    let mut step: u64 = 0;
    let mut t: u64 = 0;
    let mut cycle = 0u64;
    let mut rng: u64 = 1;
    let mut noise = || {
        rng = rng
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((rng >> 40) as f64 / (1u64 << 24) as f64 - 0.5) * 0.004
    };
    let phases: [(&str, u64); 5] = [
        ("charge", 5400),
        ("rest", 1200),
        ("discharge", 2400),
        ("pulse", 30),
        ("discharge2", 2400),
    ];
    'outer: loop {
        cycle += 1;
        for (kind, len) in phases.iter().chain(std::iter::once(&("rest", 1200))) {
            step += 1;
            for k in 0..*len {
                if t >= ROWS {
                    break 'outer;
                }
                let x = k as f64 / *len as f64;
                let (v, i) = match *kind {
                    "charge" => (
                        36.0 + 5.5 * x,
                        if x < 0.6 {
                            25.0
                        } else {
                            25.0 * (1.0 - x) / 0.4 + 0.5
                        },
                    ),
                    "rest" => (38.0 - 0.2 * x, 0.0),
                    "discharge" => (40.0 - 2.0 * x, -25.0),
                    "pulse" => (37.0, if k < 10 { -10.0 } else { -50.0 }),
                    _ => (38.0 - 3.5 * x, -25.0),
                };
                writeln!(
                    w,
                    "{t}.000,{step},{cycle},{:.4},{:.4},25.0",
                    v + noise(),
                    i + noise()
                )?;
                t += 1;
            }
        }
    }
    w.flush()?;
    Ok(step)
}

/// Run a command, return (wall seconds, peak RSS in MB, stdout).
fn measure(cmd: &mut Command) -> std::io::Result<(f64, f64, String, bool)> {
    let start = Instant::now();
    let child = cmd.stdout(Stdio::piped()).stderr(Stdio::piped()).spawn()?;
    let pid = child.id() as libc::pid_t;
    let mut out = String::new();
    let mut stdout = child.stdout.expect("stdout");
    let reader = std::thread::spawn(move || {
        let mut s = String::new();
        std::io::Read::read_to_string(&mut stdout, &mut s).map(|_| s)
    });
    let mut status = 0;
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    // wait4 gives this child's own resource usage, peak RSS included.
    let r = unsafe { libc::wait4(pid, &mut status, 0, &mut usage) };
    let secs = start.elapsed().as_secs_f64();
    if r < 0 {
        return Err(std::io::Error::last_os_error());
    }
    if let Ok(Ok(s)) = reader.join() {
        out = s;
    }
    let ok = libc::WIFEXITED(status) && libc::WEXITSTATUS(status) == 0;
    Ok((secs, usage.ru_maxrss as f64 / 1024.0, out, ok))
}

fn main() -> std::io::Result<()> {
    let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR"));
    let path = dir.join("big-log.csv");
    let t = Instant::now();
    let steps = generate(&path)?;
    let size = std::fs::metadata(&path)?.len() as f64 / 1e6;
    println!(
        "generated {ROWS} rows, {steps} steps, {size:.0} MB in {:.1} s: {}",
        t.elapsed().as_secs_f64(),
        path.display()
    );
    let pb_cmd = || {
        let mut c = Command::new(BIN);
        c.arg("analyze").arg(&path).args([
            "--chemistry",
            "li-ion",
            "--series",
            "10",
            "--rated",
            "50Ah",
            "--json",
        ]);
        c
    };
    let scripts = Path::new(env!("CARGO_MANIFEST_DIR")).join("scripts");
    let py_cmd = |name: &str| {
        let mut c = Command::new("python3");
        c.arg(scripts.join(name)).arg(&path);
        c
    };
    // (best seconds, its peak MB, output) of each, runs interleaved.
    let mut best: [Option<(f64, f64, String)>; 3] = [None, None, None];
    for _ in 0..3 {
        let runs = [
            measure(&mut pb_cmd()),
            measure(&mut py_cmd("analyze_reference.py")),
            measure(&mut py_cmd("analyze_reference_polars.py")),
        ];
        for (slot, r) in best.iter_mut().zip(runs) {
            if let Ok((s, mb, out, true)) = r {
                if slot.as_ref().is_none_or(|b| s < b.0) {
                    *slot = Some((s, mb, out));
                }
            }
        }
    }
    let [Some((pb_s, pb_mb, pb_out)), pandas, polars] = best else {
        println!("packbench analyze failed");
        return Ok(());
    };
    println!("packbench analyze : {pb_s:7.2} s, peak memory {pb_mb:6.1} MB (target <= 64 MB)");
    for (name, r, target) in [("pandas + numpy", &pandas, 8.0), ("polars", &polars, 2.5)] {
        match r {
            Some((s, mb, out)) => {
                println!("{name:<18}: {s:7.2} s, peak memory {mb:6.1} MB");
                println!(
                    "speed ratio       : {:.1}x faster than {name} (target >= {target}x)",
                    s / pb_s
                );
                compare(&pb_out, out, name);
            }
            None => println!("{name}: the script failed (pip install pandas numpy polars)"),
        }
    }
    report_of_a_long_run(&dir, &path, &pb_out)?;
    Ok(())
}

/// A run folder whose log is the first 3.6 million rows of the big log
/// (packbench's own columns), its summary from `analyze`, and the time
/// and peak memory of `packbench report` on it.
fn report_of_a_long_run(dir: &Path, big: &Path, _: &str) -> std::io::Result<()> {
    use std::io::BufRead;
    const REPORT_ROWS: usize = 3_600_000;
    let run = dir.join("long-run");
    std::fs::create_dir_all(&run)?;
    let samples = run.join("samples.csv");
    {
        let r = std::io::BufReader::new(std::fs::File::open(big)?);
        let mut w = std::io::BufWriter::new(std::fs::File::create(&samples)?);
        for line in r.lines().take(REPORT_ROWS + 1) {
            writeln!(w, "{}", line?)?;
        }
        w.flush()?;
    }
    let (_, _, summary, ok) = measure(Command::new(BIN).arg("analyze").arg(&samples).args([
        "--chemistry",
        "li-ion",
        "--series",
        "10",
        "--rated",
        "50Ah",
        "--json",
    ]))?;
    if !ok {
        println!("report: analyze of the long run failed");
        return Ok(());
    }
    std::fs::write(run.join("summary.json"), summary)?;
    let (s, mb, _, ok) = measure(Command::new(BIN).arg("report").arg(&run))?;
    let html = std::fs::metadata(run.join("report.html")).map_or(0, |m| m.len());
    println!(
        "report of a {REPORT_ROWS}-row run: {s:.2} s, peak memory {mb:.1} MB (target <= 64 MB), {} kB of HTML{}",
        html / 1000,
        if ok { "" } else { " (FAILED)" }
    );
    Ok(())
}

/// The per-step Ah and Wh of packbench against a script's.
fn compare(pb_out: &str, py_out: &str, name: &str) {
    let pb: serde_json::Value = serde_json::from_str(pb_out).unwrap_or_default();
    let py: serde_json::Value = serde_json::from_str(py_out).unwrap_or_default();
    let mut worst: f64 = 0.0;
    let mut n = 0;
    if let (Some(a), Some(b)) = (pb["steps"].as_array(), py["steps"].as_array()) {
        for (x, y) in a.iter().zip(b) {
            let ah = x["charge_ah"].as_f64().unwrap_or(f64::NAN);
            let wh = x["energy_wh"].as_f64().unwrap_or(f64::NAN);
            let (yah, ywh) = (y[1].as_f64().unwrap_or(0.0), y[2].as_f64().unwrap_or(0.0));
            worst = worst.max((ah - yah).abs()).max((wh - ywh).abs() / 40.0);
            n += 1;
        }
    }
    println!(
        "per-step Ah and Wh against {name}: {n} steps compared, largest difference {worst:.2e} Ah"
    );
}
