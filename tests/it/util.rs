//! What the integration tests share: the binary, pack specs, the table of
//! shipped procedures with their packs, file helpers, and waits on what a
//! test means (a file's text, a run folder, a sample time) instead of
//! fixed sleeps.

#![allow(dead_code)] // each helper is used by some modules, not by all

use model::pack::{Chemistry, PackSpec};
use packbench::session::{PackSource, Prepared, RunRequest};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::{Duration, Instant};

/// The `packbench` binary under test.
pub const BIN: &str = env!("CARGO_BIN_EXE_packbench");

/// Run `packbench` with these arguments in the package folder.
pub fn packbench(args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .output()
        .expect("run packbench")
}

/// Run `packbench` with these arguments in `dir`.
pub fn packbench_in(dir: &Path, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .current_dir(dir)
        .output()
        .expect("run packbench")
}

pub fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

/// Write `text` to `dir/name` and return the path.
pub fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

pub fn json(path: &Path) -> serde_json::Value {
    serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap()
}

/// A pack spec with no optional ratings.
pub fn spec(chemistry: Chemistry, series: u32, rated_capacity_ah: f64) -> PackSpec {
    PackSpec {
        chemistry,
        series,
        rated_capacity_ah,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    }
}

/// The 10-cell 14 Ah li-ion pack most shipped procedures are written for.
pub fn li_ion_14ah() -> PackSpec {
    spec(Chemistry::LiIon, 10, 14.0)
}

/// The simulated bench's default pack.
pub fn sim_pack() -> PackSpec {
    packbench::session::request::default_sim_pack()
}

/// Every shipped procedure, with the pack it is written for.
pub fn shipped() -> Vec<(&'static str, PackSpec)> {
    vec![
        ("procedures/capacity-check.toml", li_ion_14ah()),
        (
            "procedures/lfp-capacity-check.toml",
            spec(Chemistry::Lfp, 4, 100.0),
        ),
        (
            "procedures/lead-acid-c20.toml",
            spec(Chemistry::LeadAcid, 6, 100.0),
        ),
        (
            "procedures/nimh-capacity.toml",
            spec(Chemistry::Nimh, 6, 2.0),
        ),
        ("procedures/quarterly-check-li-ion.toml", li_ion_14ah()),
        (
            "procedures/quarterly-check-lfp.toml",
            spec(Chemistry::Lfp, 12, 15.0),
        ),
        ("procedures/dcir-soc-sweep-li-ion.toml", li_ion_14ah()),
        ("procedures/pulse-power-li-ion.toml", li_ion_14ah()),
        ("procedures/pulse-power-iso-li-ion.toml", li_ion_14ah()),
        ("procedures/screen-li-ion.toml", li_ion_14ah()),
        ("procedures/screen-lfp.toml", spec(Chemistry::Lfp, 12, 15.0)),
        // Read group by group on a station that scans them; on a pack read
        // at its terminals only, its group limits do not apply.
        (
            "procedures/group-check-li-ion.toml",
            spec(Chemistry::LiIon, 13, 10.0),
        ),
    ]
}

/// The lithium test envelope the hand-written procedures share (per cell,
/// so it fits any li-ion pack), with a current limit in C and a
/// temperature limit in °C.
pub fn li_ion_envelope(current_max_c: f64, temperature_max_c: f64) -> String {
    format!(
        "[envelope]\nvoltage_max = \"4.25V/cell\"\nvoltage_min = \"2.80V/cell\"\ncurrent_max = \"{current_max_c}C\"\ntemperature_max = \"{temperature_max_c}degC\"\n"
    )
}

/// A procedure: an optional rest of `rest`, then a capacity discharge at
/// `rate_c` to 3.0 V/cell, sampled every second, inside
/// [`li_ion_envelope`]. `rest` is a duration as a procedure writes it.
pub fn rest_then_discharge(
    title: &str,
    rest: Option<&str>,
    rate_c: f64,
    current_max_c: f64,
    temperature_max_c: f64,
    time_cap: &str,
) -> String {
    let mut s = format!(
        "title = \"{title}\"\n{}[sampling]\nevery = \"1s\"\n[[phase]]\nname = \"measure\"\n",
        li_ion_envelope(current_max_c, temperature_max_c)
    );
    if let Some(r) = rest {
        s += &format!("  [[phase.step]]\n  kind = \"rest\"\n  ends = [\"time > {r}\"]\n");
    }
    s += &format!(
        "  [[phase.step]]\n  kind = \"discharge\"\n  current = \"{rate_c}C\"\n  ends = [\"voltage < 3.0V/cell\", \"time > {time_cap}\"]\n  result = \"capacity\"\n"
    );
    s
}

/// Wait until the run a child process started under `pack_dir` is under
/// way: its folder exists and its events hold `needle`. Returns the run
/// folder.
pub fn wait_under_way(pack_dir: &Path, needle: &str, limit: Duration) -> PathBuf {
    let dir = wait_run_dir(pack_dir, limit)
        .unwrap_or_else(|| panic!("no run folder under {}", pack_dir.display()));
    assert!(
        wait_for(&dir.join("events.jsonl"), needle, limit),
        "{}: no '{needle}' event",
        dir.display()
    );
    dir
}

/// A prepared run of a procedure file on a given pack.
pub fn prepare_as(procedure: &Path, pack: PackSpec, results: &Path, pack_id: &str) -> Prepared {
    packbench::session::prepare::prepare(&RunRequest {
        procedure: procedure.to_path_buf(),
        pack_id: pack_id.into(),
        pack: PackSource::Given(pack),
        results: results.to_path_buf(),
        options: Default::default(),
    })
    .unwrap()
}

/// Poll `cond` until it holds or `limit` passes; true when it held.
pub fn wait_until(limit: Duration, mut cond: impl FnMut() -> bool) -> bool {
    let t = Instant::now();
    loop {
        if cond() {
            return true;
        }
        if t.elapsed() > limit {
            return false;
        }
        std::thread::sleep(Duration::from_millis(5));
    }
}

/// Wait until the file at `path` holds `needle`.
pub fn wait_for(path: &Path, needle: &str, limit: Duration) -> bool {
    wait_until(limit, || {
        std::fs::read_to_string(path).is_ok_and(|s| s.contains(needle))
    })
}

/// The run folder a child process creates under a pack folder, once it
/// exists.
pub fn wait_run_dir(pack_dir: &Path, limit: Duration) -> Option<PathBuf> {
    let mut found = None;
    wait_until(limit, || {
        found = std::fs::read_dir(pack_dir).ok().and_then(|it| {
            it.filter_map(|e| e.ok().map(|e| e.path()))
                .find(|p| p.is_dir())
        });
        found.is_some()
    });
    found
}

/// The run time of the last whole row of a `samples.csv`, s.
pub fn last_sample_t(samples_csv: &Path) -> Option<f64> {
    let text = std::fs::read_to_string(samples_csv).ok()?;
    let whole = &text[..text.rfind('\n')?];
    let last = whole.lines().last()?;
    last.split(',').next()?.parse().ok()
}

/// Wait until the run's log holds a sample at or after `t_s` run seconds.
pub fn wait_for_sample(samples_csv: &Path, t_s: f64, limit: Duration) -> bool {
    wait_until(limit, || {
        last_sample_t(samples_csv).is_some_and(|t| t >= t_s)
    })
}

/// The run time at which the first event holding `needle` happened, s.
pub fn event_t(events_jsonl: &Path, needle: &str) -> Option<f64> {
    let text = std::fs::read_to_string(events_jsonl).ok()?;
    let line = text.lines().find(|l| l.contains(needle))?;
    let v: serde_json::Value = serde_json::from_str(line).ok()?;
    v["t_s"].as_f64()
}

/// Send a signal to a child process.
#[cfg(unix)]
pub fn signal(child: &std::process::Child, sig: i32) {
    // SAFETY: kill(2) on our own child's pid.
    let r = unsafe { libc::kill(child.id() as i32, sig) };
    assert_eq!(r, 0);
}

/// Relative difference of `a` from `b`.
pub fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}

#[test]
fn the_procedure_builder_writes_what_validates() {
    let text = rest_then_discharge("t", Some("2min"), 1.0, 1.2, 60.0, "2h");
    let plan =
        model::procedure::validate::plan_from_text(Path::new("t.toml"), &text, &li_ion_14ah())
            .unwrap();
    assert_eq!(plan.steps.len(), 2);
    assert_eq!(plan.title, "t");
    let one = rest_then_discharge("t", None, 0.2, 1.2, 60.0, "6h");
    let plan =
        model::procedure::validate::plan_from_text(Path::new("t.toml"), &one, &li_ion_14ah())
            .unwrap();
    assert_eq!(plan.steps.len(), 1);
}

/// Run a prepared plan on the embedded simulated bench at full speed;
/// the report and the bench's handle (its truth, its outputs).
pub async fn run_sim(
    p: &Prepared,
    cfg: &sim::SimConfig,
    stop: engine::control::StopHandle,
) -> (packbench::session::request::RunReport, sim::SimHandle) {
    let c: std::sync::Arc<dyn engine::clock::Clock> = engine::clock::SimClock::new();
    let links = sim::build(&p.pack, cfg, std::sync::Arc::clone(&c));
    let handle = links.handle.clone();
    let report = packbench::session::run(
        packbench::session::Session::new(
            p,
            packbench::session::Bench::SimLinks {
                cfg: cfg.clone(),
                clock: c,
                links,
                speed_text: "max".into(),
            },
        )
        .with_stop(stop),
    )
    .await
    .unwrap();
    (report, handle)
}

/// The run folders of a pack that hold a summary, in name (so date) order.
pub fn run_dirs(pack_dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(pack_dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.join("summary.json").is_file())
        .collect();
    v.sort();
    v
}

/// A step's charge and energy worked out in the test, not by the code
/// under test: `samples.csv` read as plain text (its columns by their
/// header names) and the trapezoid rule applied to the rows of `step`,
/// (Ah, Wh), signed as the log is (discharge negative). The textbook rule:
/// ∫ i dt ≈ Σ (i₀ + i₁)/2 · (t₁ − t₀).
pub fn hand_integral(samples_csv: &Path, step: u32) -> (f64, f64) {
    let text = std::fs::read_to_string(samples_csv).unwrap();
    let mut lines = text.lines();
    let head: Vec<&str> = lines.next().unwrap().split(',').collect();
    let col = |name: &str| {
        head.iter()
            .position(|h| *h == name)
            .unwrap_or_else(|| panic!("no column {name} in {head:?}"))
    };
    let (ct, cs, cv, ci) = (col("t_s"), col("step"), col("voltage_v"), col("current_a"));
    let rows: Vec<(f64, f64, f64)> = lines
        .map(|l| l.split(',').collect::<Vec<_>>())
        .filter(|f| f[cs] == step.to_string())
        .map(|f| {
            (
                f[ct].parse().unwrap(),
                f[cv].parse().unwrap(),
                f[ci].parse().unwrap(),
            )
        })
        .collect();
    assert!(rows.len() > 1, "step {step} has {} rows", rows.len());
    let (mut ah, mut wh) = (0.0, 0.0);
    for w in rows.windows(2) {
        let ((t0, v0, i0), (t1, v1, i1)) = (w[0], w[1]);
        let dt_h = (t1 - t0) / 3600.0;
        ah += 0.5 * (i0 + i1) * dt_h;
        wh += 0.5 * (v0 * i0 + v1 * i1) * dt_h;
    }
    (ah, wh)
}

/// The charge that really flowed in a step of a simulated run, |Ah|, from
/// its `run.json` (the simulator's truth, not the bench's measurement).
pub fn step_truth_ah(run_json: &serde_json::Value, step: &serde_json::Value) -> f64 {
    run_json["simulation"]["steps"]
        .as_array()
        .unwrap()
        .iter()
        .find(|t| &t["step"] == step)
        .unwrap()["charge_ah"]
        .as_f64()
        .unwrap()
        .abs()
}
