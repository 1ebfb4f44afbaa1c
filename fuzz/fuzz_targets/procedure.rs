//! Procedure files: parse and validate any text against two packs; an
//! accepted plan must keep every setpoint inside its envelope.
#![no_main]
use libfuzzer_sys::fuzz_target;
use model::pack::{Chemistry, PackSpec};
use model::procedure::validate::plan_from_text;
use model::procedure::{DischargeMode, StepKind};
use std::path::Path;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    for (chemistry, series, rated) in [(Chemistry::LiIon, 10, 14.0), (Chemistry::LeadAcid, 6, 100.0)] {
        let pack = PackSpec {
            chemistry,
            series,
            rated_capacity_ah: rated,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        if let Ok(plan) = plan_from_text(Path::new("fuzz.toml"), text, &pack) {
            let env = &plan.envelope;
            assert!(env.voltage_min_v < env.voltage_max_v);
            for st in &plan.steps {
                assert!(!st.ends.is_empty() || matches!(st.kind, StepKind::Pulse { .. }));
                match &st.kind {
                    StepKind::Charge { current_a, voltage_v } => {
                        assert!(*current_a > 0.0 && *current_a <= env.current_max_a);
                        assert!(*voltage_v < env.voltage_max_v);
                    }
                    StepKind::Discharge { load: DischargeMode::Current { current_a } } => {
                        assert!(*current_a > 0.0 && *current_a <= env.current_max_a);
                    }
                    StepKind::Pulse { levels } => {
                        for l in levels {
                            assert!(l.current_a.abs() <= env.current_max_a);
                            assert!(l.duration_s > 0.0);
                        }
                    }
                    _ => {}
                }
            }
        }
    }
});
