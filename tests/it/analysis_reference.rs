//! Outside checks of the analysis arithmetic.

use analysis::{analyze, StepInfo};
use model::pack::{Chemistry, PackSpec};
use record::read::read_samples;
use std::path::Path;

fn info(step: u32, kind: &str) -> StepInfo {
    StepInfo {
        step,
        phase: "fixture".into(),
        cycle: 1,
        kind: kind.parse().unwrap(),
        name: None,
        result: None,
        end_kind: Some(model::end::EndKind::Time),
        end_reason: None,
    }
}

/// Per-step Ah and Wh against numpy's trapezoidal rule
/// (numpy.trapezoid; values computed by scripts/trapezoid_reference.py on
/// the committed fixture tests/fixtures/trapezoid_log.csv).
#[test]
fn step_integrals_match_numpy_trapezoid() {
    let log = read_samples(Path::new("tests/fixtures/trapezoid_log.csv")).unwrap();
    let expected: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string("tests/fixtures/trapezoid_expected.json").unwrap(),
    )
    .unwrap();
    let pack = PackSpec {
        chemistry: Chemistry::LiIon,
        series: 10,
        rated_capacity_ah: 14.0,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    };
    let infos = vec![
        info(1, "charge"),
        info(2, "rest"),
        info(3, "discharge"),
        info(4, "pulse"),
    ];
    let a = analyze(&log.samples, &infos, &pack);
    let steps = expected["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 4);
    for e in steps {
        let n = e["step"].as_u64().unwrap() as u32;
        let s = a.steps.iter().find(|s| s.step == n).unwrap();
        for (got, key) in [
            (s.charge_ah, "charge_ah"),
            (s.energy_wh, "energy_wh"),
            (s.duration_s, "duration_s"),
        ] {
            let want = e[key].as_f64().unwrap();
            assert!(
                (got - want).abs() <= 1e-9 * want.abs().max(1.0),
                "step {n} {key}: packbench {got} vs numpy {want}"
            );
        }
        // The split into charge in and out adds back up to the net value.
        assert!((s.charge_in_ah - s.charge_out_ah - s.charge_ah).abs() < 1e-12);
    }
    // The pulse step (4) changes sign: both directions are counted.
    let pulse = a.steps.iter().find(|s| s.step == 4).unwrap();
    assert!(pulse.charge_in_ah > 0.0 && pulse.charge_out_ah > 0.0);
}

/// IEC 61960-3 style check values from the standards fact sheet (§2, [D]):
/// a 2.5 Ah cell delivering 0.5 A for 5.1 h gives 2.55 Ah = 102 % of rated.
#[test]
fn rated_capacity_check_value() {
    let pack = PackSpec {
        chemistry: Chemistry::LiIon,
        series: 1,
        rated_capacity_ah: 2.5,
        rated_energy_wh: None,
        rated_rate_c: Some(0.2),
        rated_resistance_mohm: None,
    };
    let samples: Vec<_> = (0..=18_360)
        .map(|k| model::sample::Sample {
            t_s: k as f64,
            step: 1,
            cycle: 1,
            voltage_v: 3.7,
            current_a: -0.5,
            temperature_c: None,
        })
        .collect();
    let mut i = info(1, "discharge");
    i.result = Some(model::procedure::ResultTag::Capacity);
    i.end_kind = Some(model::end::EndKind::VoltageBelow);
    let a = analyze(&samples, &[i], &pack);
    let c = a.capacity.unwrap();
    assert!((c.measured_ah - 2.55).abs() < 1e-9);
    // State of health is the verdict's (computed once there); the same
    // formula, measured / rated × 100.
    assert!((analysis::soh_pct(c.corrected_ah.unwrap(), 2.5) - 102.0).abs() < 1e-9);
    assert!((c.c_rate.unwrap() - 0.2).abs() < 1e-9);
}
