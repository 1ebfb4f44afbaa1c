//! Uncertainty budgets checked from outside: the simulated bench's truth
//! inside the reported 95 % interval (coverage), and the budget's
//! arithmetic against the `uncertainties` package and a numpy Monte Carlo
//! (`scripts/uncertainty_reference.py`).

use crate::util::*;
use analysis::uncertainty::{charge_terms, Budget, StepInputs, StepMeasure, Tare};
use engine::control::StopHandle;
use model::accuracy::Spec;
use rand::{Rng, SeedableRng};
use sim::SimConfig;

/// Runs of the coverage check (the issue asks for at least 40).
const COVERAGE_RUNS: u64 = 40;

/// Each simulated meter's gain and offset drawn uniformly within the
/// accuracy it states, and its noise generator seeded per run.
fn drawn_config(seed: u64) -> SimConfig {
    let mut rng = rand::rngs::SmallRng::seed_from_u64(0xC0FE + seed);
    let mut cfg = SimConfig {
        seed,
        ..SimConfig::default()
    };
    for m in [
        &mut cfg.source.voltage,
        &mut cfg.source.current,
        &mut cfg.load.voltage,
        &mut cfg.load.current,
    ] {
        let s = m.stated_spec();
        m.gain_error_pct = s.reading_pct * rng.random_range(-1.0..1.0);
        m.offset = s.offset * rng.random_range(-1.0..1.0);
    }
    cfg.temperature.offset = cfg.temperature.stated_spec().offset * rng.random_range(-1.0..1.0);
    assert!(cfg.check_meters().is_ok());
    cfg
}

/// Coverage on the simulated bench: over seeded runs whose meter errors
/// are drawn within the declared accuracy, the true capacity (the charge
/// that really flowed in the capacity step, the simulation truth) lies
/// inside the reported 95 % interval in 90–99 % of runs. Fewer would mean
/// the budget misses a term; more, that it is inflated. Also printed: the
/// RMS of (measured − true)/u, which is 1 for a budget that is right.
#[tokio::test]
async fn the_truth_lies_inside_the_reported_interval_in_about_95_percent_of_runs() {
    let dir = tempfile::tempdir().unwrap();
    let mut inside = 0;
    let mut z2 = 0.0;
    let mut dominant = std::collections::BTreeMap::<String, usize>::new();
    // A C/5 discharge to the cutoff from the simulated pack's half charge:
    // the capacity check's measuring step, a quarter of its run time.
    let proc = dir.path().join("coverage.toml");
    std::fs::write(
        &proc,
        rest_then_discharge("coverage", None, 0.2, 1.2, 60.0, "6h"),
    )
    .unwrap();
    for seed in 0..COVERAGE_RUNS {
        let results = dir.path().join(format!("r{seed}"));
        let p = prepare_as(&proc, sim_pack(), &results, "COVER-1");
        let (r, _) = run_sim(&p, &drawn_config(seed), StopHandle::new()).await;
        let v = &r.summary.verdict;
        let b = v
            .uncertainty
            .measured_ah
            .as_ref()
            .expect("a capacity run on the simulated bench has a budget");
        let step = v.capacity_step.unwrap();
        let truth = r
            .outcome
            .truth
            .iter()
            .find(|t| t.step == step)
            .unwrap()
            .charge_ah
            .abs();
        let err = b.value - truth;
        if err.abs() <= b.half_width() {
            inside += 1;
        }
        z2 += (err / b.u).powi(2);
        *dominant.entry(b.dominant.clone()).or_default() += 1;
    }
    let n = COVERAGE_RUNS as f64;
    let coverage = inside as f64 / n * 100.0;
    let rms_z = (z2 / n).sqrt();
    println!(
        "coverage: the true capacity inside the reported 95 % interval in {inside} of {COVERAGE_RUNS} runs ({coverage:.1} %); RMS of (measured − true)/u = {rms_z:.2}; dominant terms {dominant:?}"
    );
    assert!(
        (90.0..=99.0).contains(&coverage) || inside == COVERAGE_RUNS as usize && rms_z > 0.5,
        "coverage {coverage:.1} % is outside 90–99 % (RMS z {rms_z:.2})"
    );
    assert!(
        (0.5..=1.3).contains(&rms_z),
        "RMS of (measured − true)/u = {rms_z:.2}: the budget is {}",
        if rms_z < 0.5 {
            "inflated"
        } else {
            "missing a term"
        }
    );
}

/// The budget of fixed inputs worked out again with the `uncertainties`
/// package (first-order GUM) and a numpy Monte Carlo (JCGM 101), by
/// `scripts/uncertainty_reference.py`. Two cases: the worked example of
/// `shared/reference/metrology.md` §1.3 with no tare (a rectangular offset
/// dominates: the Monte Carlo interval is narrower than k = 2's), and the
/// same with a noisy tare of 10 readings (a normal term dominates: the
/// Monte Carlo agrees with 1.96·u).
#[test]
#[ignore = "needs python3 with numpy and uncertainties (scripts/requirements-readback.txt); run with -- --ignored"]
fn the_budget_agrees_with_the_uncertainties_package_and_a_numpy_monte_carlo() {
    let current = Spec {
        reading_pct: 0.05,
        range_pct: 0.02,
        offset: 0.0,
        resolution: 0.0001,
        calibrated: false,
    }
    .resolved(Some(5.0));
    let voltage = Spec {
        reading_pct: 0.02,
        range_pct: 0.0,
        offset: 0.0005,
        resolution: 0.0,
        calibrated: false,
    };
    let mut cases = Vec::new();
    for (name, noise_a, tare) in [
        ("worked example, no tare", 0.0005, None),
        ("noisy, tared", 0.005, Some(Tare { readings: 10 })),
    ] {
        let m = StepMeasure {
            sum_dt2_s2: 18_000.0,
            last_dt_s: 1.0,
            v_dt_vs: 3.6 * 18_000.0,
            noise_a: Some(noise_a),
            noise_v: None,
            integration_ah: 2e-6,
            integration_wh: 0.0,
            end_current_a: 0.5,
            dv_dq_v_per_ah: Some(6.0),
        };
        let x = StepInputs {
            q_ah: 2.5,
            e_wh: 9.0,
            duration_s: 18_000.0,
            measure: &m,
            current: &current,
            voltage: Some(&voltage),
            timebase_ppm: Some(50.0),
            tare,
            cutoff_v: Some(3.0),
        };
        let b = Budget::of(2.5, "Ah", charge_terms(&x));
        cases.push(serde_json::json!({
            "name": name,
            "q_ah": 2.5,
            "duration_s": 18_000.0,
            "sum_dt2_s2": m.sum_dt2_s2,
            "noise_a": noise_a,
            "current_reading_pct": current.reading_pct,
            "current_offset": current.offset,
            "current_resolution": current.resolution,
            "tare_readings": tare.map(|t| t.readings).unwrap_or(0),
            "timebase_ppm": 50.0,
            "integration_ah": m.integration_ah,
            "end_current_a": m.end_current_a,
            "last_dt_s": m.last_dt_s,
            "cutoff_v": 3.0,
            "voltage_reading_pct": voltage.reading_pct,
            "voltage_offset": voltage.offset,
            "dv_dq_v_per_ah": 6.0,
            "packbench_u": b.u,
            "packbench_half_width": b.half_width(),
        }));
    }
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("budget_cases.json");
    std::fs::write(&path, serde_json::to_string_pretty(&cases).unwrap()).unwrap();
    let py = std::process::Command::new("python3")
        .args(["scripts/uncertainty_reference.py", path.to_str().unwrap()])
        .output()
        .expect("python3 (with numpy and uncertainties) is needed for the outside check");
    let out = format!(
        "{}{}",
        String::from_utf8_lossy(&py.stdout),
        String::from_utf8_lossy(&py.stderr)
    );
    println!("{out}");
    assert!(
        py.status.success(),
        "the budget disagrees with the outside check (python3 with numpy 2.4.6 and uncertainties 3.2.3: pip install -r scripts/requirements-readback.txt)\n{out}"
    );
}

fn capacity_error(
    results: &std::path::Path,
    sim_config: &std::path::Path,
) -> (f64, f64, serde_json::Value) {
    let out = packbench(&[
        "run",
        "procedures/capacity-check.toml",
        "--sim",
        "--sim-config",
        sim_config.to_str().unwrap(),
        "--pack",
        "CAL-1",
        "--results",
        results.to_str().unwrap(),
        "--quiet",
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let run = std::fs::read_dir(results.join("CAL-1"))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.is_dir())
        .unwrap();
    let s: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(run.join("summary.json")).unwrap()).unwrap();
    let m: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(run.join("run.json")).unwrap()).unwrap();
    let step = s["verdict"]["capacity_step"].as_u64().unwrap();
    let truth = m["simulation"]["steps"]
        .as_array()
        .unwrap()
        .iter()
        .find(|t| t["step"].as_u64() == Some(step))
        .unwrap()["charge_ah"]
        .as_f64()
        .unwrap()
        .abs();
    let measured = s["capacity"]["measured_ah"].as_f64().unwrap();
    let u = s["verdict"]["uncertainty"]["measured_ah"]["u"]
        .as_f64()
        .unwrap();
    (measured - truth, u, m)
}

/// `calibrate` on the simulated bench recovers a load current error of
/// +0.5 % of reading and +20 mA (the load reports a magnitude, so in the
/// pack's sign the line is reading = 1.005·I − 0.020) within its stated
/// uncertainty (k = 2), and a run after the calibration is closer to the
/// truth than one before it, with a smaller interval that still holds it.
#[test]
fn calibrate_recovers_an_injected_gain_and_offset_and_runs_apply_it() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = dir.path().join("bench-errors.toml");
    std::fs::write(
        &cfg,
        "[load.current]\ngain_error_pct = 0.5\noffset = 0.020\nnoise = 0.002\nresolution = 0.001\nstated = { reading_pct = 0.6, offset = 0.025, resolution = 0.001 }\n",
    )
    .unwrap();
    let before = dir.path().join("before");
    let (err0, u0, m0) = capacity_error(&before, &cfg);
    assert!(m0.get("calibration").is_none());
    let after = dir.path().join("after");
    let out = packbench(&[
        "calibrate",
        "--sim",
        "--sim-config",
        cfg.to_str().unwrap(),
        "--results",
        after.to_str().unwrap(),
        "--certificate",
        "REF-0001 (fictional lab)",
    ]);
    let said = text(&out.stdout);
    println!("{said}");
    assert_eq!(out.status.code(), Some(0), "{said}{}", text(&out.stderr));
    let file = std::fs::read_dir(after.join("_calibration/sim"))
        .unwrap()
        .next()
        .unwrap()
        .unwrap()
        .path();
    let rec: record::calibration::CalibrationRecord =
        serde_json::from_str(&std::fs::read_to_string(&file).unwrap()).unwrap();
    let ch = rec.channel(record::calibration::DISCHARGE).unwrap();
    let l = ch.line;
    println!(
        "recovered a = {:.6} ± {:.6} (injected 1.005), b = {:+.5} ± {:.5} A (injected −0.020)",
        l.a,
        2.0 * l.u_a,
        l.b,
        2.0 * l.u_b
    );
    assert!(
        (l.a - 1.005).abs() <= 2.0 * l.u_a,
        "a = {} ± {}",
        l.a,
        l.u_a
    );
    assert!(
        (l.b + 0.020).abs() <= 2.0 * l.u_b,
        "b = {} ± {}",
        l.b,
        l.u_b
    );
    assert!(ch.as_found.worst_share > 0.5 && ch.as_left.within);
    assert_eq!(
        rec.reference.certificate.as_deref(),
        Some("REF-0001 (fictional lab)")
    );
    let (err1, u1, m1) = capacity_error(&after, &cfg);
    assert_eq!(m1["calibration"]["id"], rec.id.as_str());
    println!(
        "capacity error against the truth: {:+.1} mAh (u {:.1}) before, {:+.1} mAh (u {:.1}) after the calibration",
        err0 * 1e3,
        u0 * 1e3,
        err1 * 1e3,
        u1 * 1e3
    );
    assert!(err1.abs() < err0.abs() / 10.0, "{err1} against {err0}");
    assert!(u1 < u0 && err1.abs() <= 2.0 * u1);
    // Each budget of the run validated by a fresh Monte Carlo (JCGM 101 §8).
    let run = std::fs::read_dir(after.join("CAL-1"))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.is_dir())
        .unwrap();
    let out = packbench(&["analyze", run.to_str().unwrap(), "--monte-carlo", "50000"]);
    let said = text(&out.stdout);
    assert_eq!(out.status.code(), Some(0), "{}", text(&out.stderr));
    let mc: Vec<&str> = said
        .lines()
        .filter(|l| l.trim_start().starts_with("measured capacity:"))
        .collect();
    assert!(mc.len() == 1 && mc[0].contains("validated"), "{said}");
    // fade prints each test's state of health with its U.
    let out = packbench(&["fade", "CAL-1", "--results", after.to_str().unwrap()]);
    assert!(
        text(&out.stdout).contains("± U (95 %)"),
        "{}",
        text(&out.stdout)
    );
    // An overdue calibration is still applied, and said.
    let mut old = rec.clone();
    old.next_due = "2020-01-01".parse().unwrap();
    std::fs::write(&file, serde_json::to_string_pretty(&old).unwrap()).unwrap();
    for e in std::fs::read_dir(after.join("CAL-1")).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            std::fs::remove_dir_all(p).unwrap();
        }
    }
    let (err2, _, m2) = capacity_error(&after, &cfg);
    assert_eq!(m2["calibration"]["overdue"], true);
    assert!(err2.abs() < err0.abs() / 10.0);
    let run = std::fs::read_dir(after.join("CAL-1"))
        .unwrap()
        .filter_map(|e| e.ok().map(|e| e.path()))
        .find(|p| p.is_dir())
        .unwrap();
    let s = std::fs::read_to_string(run.join("summary.json")).unwrap();
    assert!(s.contains("was due on 2020-01-01"), "no overdue warning");
}
