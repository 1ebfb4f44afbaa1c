//! Properties of the arithmetic, over generated inputs (proptest).

use analysis::integrate::Integrator;
use engine::event::EndKind;
use model::pack::{Chemistry, PackSpec};
use model::procedure::validate::plan_from_text;
use model::procedure::StepKind;
use model::units::{self, CurrentSpec, VoltageSpec};
use proptest::prelude::*;
use sim::SimConfig;
use std::path::Path;

/// A log: strictly increasing times, voltages, signed currents.
fn log() -> impl Strategy<Value = Vec<(f64, f64, f64)>> {
    prop::collection::vec((0.001f64..100.0, 2.0f64..60.0, -50.0f64..50.0), 2..300).prop_map(
        |rows| {
            let mut t = 0.0;
            rows.into_iter()
                .map(|(dt, v, i)| {
                    t += dt;
                    (t, v, i)
                })
                .collect()
        },
    )
}

fn integrate(rows: &[(f64, f64, f64)]) -> Integrator {
    let mut g = Integrator::default();
    for &(t, v, i) in rows {
        g.push(t, v, i);
    }
    g
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * (1.0 + a.abs().max(b.abs()))
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(256))]

    /// Integrating a log split at any points (each piece starting at the
    /// sample the previous ended on) gives the same Ah and Wh, in and out,
    /// as integrating it whole.
    #[test]
    fn a_log_split_anywhere_integrates_to_the_same_figures(
        rows in log(),
        cuts in prop::collection::vec(any::<prop::sample::Index>(), 0..6),
    ) {
        let whole = integrate(&rows);
        let mut points: Vec<usize> = cuts.iter().map(|c| c.index(rows.len())).collect();
        points.push(0);
        points.push(rows.len() - 1);
        points.sort_unstable();
        points.dedup();
        let mut sum = Integrator::default();
        for w in points.windows(2) {
            let part = integrate(&rows[w[0]..=w[1]]);
            sum.ah += part.ah;
            sum.wh += part.wh;
            sum.ah_in += part.ah_in;
            sum.ah_out += part.ah_out;
            sum.wh_in += part.wh_in;
            sum.wh_out += part.wh_out;
        }
        for (a, b) in [
            (whole.ah, sum.ah),
            (whole.wh, sum.wh),
            (whole.ah_in, sum.ah_in),
            (whole.ah_out, sum.ah_out),
            (whole.wh_in, sum.wh_in),
            (whole.wh_out, sum.wh_out),
        ] {
            prop_assert!(close(a, b), "{a} vs {b}");
        }
    }

    /// Reversing the current's sign swaps the charge and discharge figures
    /// exactly (bit for bit) and negates the net figures.
    #[test]
    fn reversing_the_current_swaps_charge_and_discharge_exactly(rows in log()) {
        let g = integrate(&rows);
        let flipped: Vec<(f64, f64, f64)> = rows.iter().map(|&(t, v, i)| (t, v, -i)).collect();
        let r = integrate(&flipped);
        prop_assert_eq!(g.ah_in.to_bits(), r.ah_out.to_bits());
        prop_assert_eq!(g.ah_out.to_bits(), r.ah_in.to_bits());
        prop_assert_eq!(g.wh_in.to_bits(), r.wh_out.to_bits());
        prop_assert_eq!(g.wh_out.to_bits(), r.wh_in.to_bits());
        prop_assert!(close(g.ah, -r.ah) && close(g.wh, -r.wh));
    }

    /// Sampling a smooth model current at finer and finer intervals, the
    /// trapezoid converges on the model's own integral (error falling as
    /// the square of the interval).
    #[test]
    fn finer_sampling_converges_on_the_model_integral(
        a in -20.0f64..20.0,
        b in 0.1f64..10.0,
        period in 600.0f64..7200.0,
        span in 600.0f64..36_000.0,
    ) {
        let w = std::f64::consts::TAU / period;
        // I(t) = a + b sin(wt); its integral over [0, T], in Ah.
        let exact = (a * span + b / w * (1.0 - (w * span).cos())) / 3600.0;
        let err = |n: usize| {
            let mut g = Integrator::default();
            for k in 0..=n {
                let t = span * k as f64 / n as f64;
                g.push(t, 3.7, a + b * (w * t).sin());
            }
            (g.ah - exact).abs()
        };
        let (e1, e2, e3) = (err(200), err(400), err(6400));
        let scale = (b * span / 3600.0).max(1e-9);
        // Each halving of the interval cuts the error about four times
        // (at least three, allowing for rounding); the finest is tiny.
        prop_assert!(e2 <= e1 / 3.0 + 1e-12 * scale, "{e1} {e2}");
        prop_assert!(e3 <= 1e-5 * scale + 1e-12, "{e3} of {scale}");
    }

    /// C-rates and per-cell values round-trip through writing, reading and
    /// resolving against a pack.
    #[test]
    fn c_rates_and_per_cell_values_round_trip(
        c in 0.001f64..20.0,
        v in 0.5f64..5.0,
        rated in 0.1f64..1000.0,
        series in 1u32..200,
    ) {
        let spec = units::current(&format!("{c}C")).unwrap();
        prop_assert_eq!(spec, CurrentSpec::CRate(c));
        let amps = spec.resolve(rated);
        prop_assert!(close(amps / rated, c), "{amps} A of {rated} Ah");
        let back = units::current(&format!("{amps}A")).unwrap().resolve(rated);
        prop_assert_eq!(back.to_bits(), amps.to_bits());
        let per_cell = units::voltage(&format!("{v}V/cell")).unwrap();
        prop_assert_eq!(per_cell, VoltageSpec::PerCell(v));
        let pack_v = per_cell.resolve(series);
        prop_assert!(close(pack_v / f64::from(series), v));
        let mv = units::voltage(&format!("{}mV/cell", v * 1000.0)).unwrap().resolve(series);
        prop_assert!(close(mv, pack_v), "{mv} vs {pack_v}");
    }
}

/// One generated step: a kind with its setpoints, and end conditions
/// drawn mostly from those that suit it and sometimes from any kind's (many
/// of which cannot end that step).
fn step() -> impl Strategy<Value = String> {
    let kinds: Vec<(&'static str, Vec<&'static str>)> = vec![
        (
            "  kind = \"charge\"\n  current = \"0.5C\"\n  voltage = \"4.2V/cell\"",
            vec![
                "current < 0.05C",
                "voltage > 4.1V/cell",
                "charge > 10%",
                "energy > 20Wh",
                "time > 20min",
            ],
        ),
        (
            "  kind = \"charge\"\n  current = \"0.2C\"\n  voltage = \"4.0V/cell\"",
            vec![
                "current < 0.05C",
                "voltage > 3.9V/cell",
                "charge > 5%",
                "time > 20min",
            ],
        ),
        (
            "  kind = \"discharge\"\n  current = \"0.5C\"",
            vec![
                "voltage < 3.0V/cell",
                "voltage < 3.6V/cell",
                "charge > 10%",
                "energy > 20Wh",
                "time > 20min",
            ],
        ),
        (
            "  kind = \"discharge\"\n  mode = \"power\"\n  power = \"100W\"",
            vec!["voltage < 3.2V/cell", "energy > 20Wh", "time > 20min"],
        ),
        (
            "  kind = \"discharge\"\n  mode = \"resistance\"\n  resistance = \"10ohm\"",
            vec![
                "voltage < 3.5V/cell",
                "current < 3.5A",
                "charge > 2%",
                "time > 20min",
            ],
        ),
        ("  kind = \"rest\"", vec!["time > 20min", "dv/dt < 1mV/min"]),
        ("  kind = \"drain\"", vec!["time > 20min"]),
    ];
    let any_end = vec![
        "voltage < 3.0V/cell",
        "voltage > 4.1V/cell",
        "current < 0.05C",
        "time > 20min",
        "charge > 10%",
        "dv/dt < 1mV/min",
        "peak_drop > 10mV/cell",
        "temperature > 40degC",
    ];
    (
        prop::sample::select(kinds),
        prop::collection::vec(
            (
                any::<prop::sample::Index>(),
                prop::bool::weighted(0.2),
                prop::sample::select(any_end),
            ),
            0..3,
        ),
    )
        .prop_map(|((k, own), picks)| {
            let ends: Vec<String> = picks
                .iter()
                .map(|(i, stray, other)| {
                    let e = if *stray {
                        *other
                    } else {
                        own[i.index(own.len())]
                    };
                    format!("\"{e}\"")
                })
                .collect();
            format!("  [[phase.step]]\n{k}\n  ends = [{}]\n", ends.join(", "))
        })
}

/// Any procedure that validates expands to a plan whose every step has a
/// reachable end: each step, played alone on the simulated pack from a
/// state it can act on (a charge from nearly empty, a discharge from full,
/// a rest or drain from half) inside a wide envelope, ends on one of its
/// own end conditions — never on the envelope's step time cap.
#[test]
fn every_step_of_a_valid_plan_reaches_an_end() {
    use proptest::test_runner::{Config, TestRunner};
    let mut runner = TestRunner::new(Config::with_cases(128));
    let valid = std::cell::Cell::new(0usize);
    let refused = std::cell::Cell::new(0usize);
    let strategy = (prop::collection::vec(step(), 1..4), 1u32..3);
    let result = runner.run(&strategy, |(steps, repeat)| {
        let text = format!(
            "title = \"generated\"\n[envelope]\nvoltage_max = \"4.25V/cell\"\nvoltage_min = \"2.8V/cell\"\ncurrent_max = \"1C\"\ntemperature_max = \"60degC\"\n[sampling]\nevery = \"10s\"\n[[phase]]\nname = \"g\"\nrepeat = {repeat}\n{}",
            steps.concat()
        );
        let pack = PackSpec {
            chemistry: Chemistry::LiIon,
            series: 10,
            rated_capacity_ah: 14.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let Ok(plan) = plan_from_text(Path::new("g.toml"), &text, &pack) else {
            refused.set(refused.get() + 1);
            return Ok(());
        };
        valid.set(valid.get() + 1);
        prop_assert_eq!(plan.steps.len(), steps.len() * repeat as usize);
        for s in &plan.steps {
            let pulse = matches!(s.kind, StepKind::Pulse { .. });
            prop_assert!(!s.ends.is_empty() || pulse, "step {} has no end", s.index);
        }
        for st in &plan.steps {
            let mut alone = plan.clone();
            alone.envelope.voltage_min_v = 2.0 * 10.0;
            alone.envelope.voltage_max_v = 4.4 * 10.0;
            alone.envelope.charge_max_ah = 1e6;
            alone.steps = vec![model::procedure::PlanStep { index: 1, ..st.clone() }];
            let mut cfg = SimConfig::default();
            cfg.pack.initial_soc = match st.kind {
                StepKind::Charge { .. } => 0.1,
                StepKind::Discharge { .. } => 1.0,
                _ => 0.5,
            };
            let f = packbench::session::forecast::forecast(&alone, &cfg);
            let end = f.steps.first().and_then(|s| s.end_kind);
            prop_assert!(
                !matches!(end, None | Some(EndKind::Aborted) | Some(EndKind::Interrupted)),
                "step {} ended {:?} ({:?})\n{}", st.index, end, f.stop_reason, text
            );
        }
        Ok(())
    });
    eprintln!(
        "{} generated procedures validated and ran to their ends; {} were refused",
        valid.get(),
        refused.get()
    );
    if let Err(e) = result {
        panic!("{e}");
    }
    assert!(
        valid.get() >= 20,
        "too few generated procedures validated: {}",
        valid.get()
    );
}
