//! Procedure parsing and validation: every problem is reported with its
//! file, line and column and what was expected, before anything runs.

use crate::util::*;
use model::pack::{Chemistry, PackSpec};
use model::procedure::validate::plan_from_text;
use model::procedure::{EndCondition, StepKind};
use std::path::Path;

const GOOD: &str = r#"title = "t"

[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.5V/cell"
current_max = "1C"
temperature_max = "55degC"

[[phase]]
name = "charge"
repeat = 2
  [[phase.step]]
  kind = "charge"
  current = "0.5C"
  voltage = "4.2V/cell"
  ends = ["current < 0.05C", "time > 5h"]

  [[phase.step]]
  kind = "discharge"
  current = "0.2C"
  ends = ["voltage < 3.0V/cell"]
  result = "capacity"
"#;

fn errors(text: &str) -> String {
    match plan_from_text(Path::new("p.toml"), text, &li_ion_14ah()) {
        Ok(_) => panic!("accepted:\n{text}"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn a_good_procedure_resolves_against_the_pack() {
    let plan = plan_from_text(Path::new("p.toml"), GOOD, &li_ion_14ah()).unwrap();
    assert_eq!(plan.steps.len(), 4, "two repeats of two steps");
    assert!((plan.envelope.voltage_max_v - 42.5).abs() < 1e-9);
    assert!((plan.envelope.current_max_a - 14.0).abs() < 1e-9);
    // Defaults the procedure left out: charge cap 1.3 x rated for lithium, 48 h step cap.
    assert!((plan.envelope.charge_max_ah - 18.2).abs() < 1e-9);
    assert_eq!(plan.envelope.step_time_max_s, 48.0 * 3600.0);
    match &plan.steps[0].kind {
        StepKind::Charge {
            current_a,
            voltage_v,
        } => {
            assert!((current_a - 7.0).abs() < 1e-9);
            assert!((voltage_v - 42.0).abs() < 1e-9);
        }
        k => panic!("{k:?}"),
    }
    // The taper end is written as a C-rate of the 14 Ah pack: 0.05C = 0.7 A.
    match plan.steps[0].ends[0] {
        EndCondition::CurrentBelow { current_a } => {
            assert!((current_a - 0.05 * 14.0).abs() < 1e-12, "{current_a}")
        }
        ref e => panic!("a taper end first: {e:?}"),
    }
    // Cycles: a charge after a discharge starts a new one.
    let cycles: Vec<u32> = plan.steps.iter().map(|s| s.cycle).collect();
    assert_eq!(cycles, vec![1, 1, 2, 2]);
    assert_eq!(plan.steps[0].line, 12, "the [[phase.step]] header");
}

#[test]
fn a_misspelt_key_is_located() {
    let e = errors(&GOOD.replace("current_max =", "curent_max ="));
    assert!(e.starts_with("p.toml:6:1:"), "{e}");
    assert!(e.contains("curent_max"), "{e}");
}

#[test]
fn a_bad_unit_is_located_and_explained() {
    let e = errors(&GOOD.replace("\"0.2C\"", "\"0.2Q\""));
    assert!(e.starts_with("p.toml:20:13:"), "{e}");
    assert!(e.contains("unknown unit 'Q'"), "{e}");
    let e = errors(&GOOD.replace("\"4.2V/cell\"", "\"4.2A\""));
    assert!(e.starts_with("p.toml:15:13:"), "{e}");
    assert!(e.contains("a current") && e.contains("a voltage"), "{e}");
}

#[test]
fn a_step_that_cannot_end_is_refused() {
    // The only end is a voltage the CV limit never reaches.
    let e = errors(&GOOD.replace(
        "ends = [\"current < 0.05C\", \"time > 5h\"]",
        "ends = [\"voltage > 4.22V/cell\"]",
    ));
    assert!(
        e.contains("p.toml:12:3:") && e.contains("cannot end"),
        "{e}"
    );
    // A constant-current discharge whose only end is a taper.
    let e = errors(&GOOD.replace(
        "ends = [\"voltage < 3.0V/cell\"]",
        "ends = [\"current < 0.1C\"]",
    ));
    assert!(e.contains("cannot end"), "{e}");
    // A rest with no end at all.
    let e = errors(&GOOD.replace(
        "  [[phase.step]]\n  kind = \"discharge\"",
        "  [[phase.step]]\n  kind = \"rest\"\n  [[phase.step]]\n  kind = \"discharge\"",
    ));
    assert!(e.contains("rest step cannot end"), "{e}");
}

#[test]
fn setpoints_outside_the_envelope_are_refused() {
    let e = errors(&GOOD.replace("\"0.5C\"", "\"1.5C\""));
    assert!(
        e.starts_with("p.toml:14:13:") && e.contains("outside the envelope"),
        "{e}"
    );
    let e = errors(&GOOD.replace("voltage = \"4.2V/cell\"", "voltage = \"4.3V/cell\""));
    assert!(
        e.starts_with("p.toml:15:13:") && e.contains("voltage_max"),
        "{e}"
    );
    let e = errors(&GOOD.replace("\"voltage < 3.0V/cell\"", "\"voltage < 2.4V/cell\""));
    assert!(
        e.starts_with("p.toml:21:11:") && e.contains("voltage_min"),
        "{e}"
    );
    // Negative, NaN and absurd values.
    let e = errors(&GOOD.replace("\"0.2C\"", "\"-5A\""));
    assert!(e.contains("positive magnitude"), "{e}");
    let e = errors(&GOOD.replace("\"0.2C\"", "\"nanA\""));
    assert!(e.contains("p.toml:20:13"), "{e}");
    let e = errors(&GOOD.replace("voltage = \"4.2V/cell\"", "voltage = \"1000000V\""));
    assert!(e.contains("outside the envelope"), "{e}");
}

#[test]
fn a_charge_step_needs_a_voltage_limit() {
    let e = errors(&GOOD.replace("  voltage = \"4.2V/cell\"\n", ""));
    assert!(
        e.starts_with("p.toml:12:3:") && e.contains("needs a voltage limit"),
        "{e}"
    );
}

#[test]
fn an_envelope_missing_limits_is_refused() {
    let e = errors(&GOOD.replace("temperature_max = \"55degC\"\n", ""));
    assert!(e.contains("missing temperature_max"), "{e}");
    assert!(e.starts_with("p.toml:3:1:"), "{e}");
    let no_env = GOOD.replace("[envelope]\nvoltage_max = \"4.25V/cell\"\nvoltage_min = \"2.5V/cell\"\ncurrent_max = \"1C\"\ntemperature_max = \"55degC\"\n", "");
    let e = errors(&no_env);
    assert!(e.contains("no [envelope]"), "{e}");
}

#[test]
fn end_condition_grammar() {
    let e = errors(&GOOD.replace("\"time > 5h\"", "\"time < 5h\""));
    assert!(e.contains("time takes '>'"), "{e}");
    let e = errors(&GOOD.replace("\"time > 5h\"", "\"tme > 5h\""));
    assert!(e.contains("unknown end condition 'tme'"), "{e}");
    let e = errors(&GOOD.replace("\"time > 5h\"", "\"time 5h\""));
    assert!(e.contains("no '<' or '>'"), "{e}");
    let ok = GOOD.replace(
        "\"time > 5h\"",
        "\"time > 5h\", \"charge > 110%\", \"energy > 600Wh\", \"peak_drop > 5mV/cell\", \"temperature > 45degC\"",
    );
    let plan = plan_from_text(Path::new("p.toml"), &ok, &li_ion_14ah()).unwrap();
    assert_eq!(plan.steps[0].ends.len(), 6);
    assert!(plan.steps[0]
        .ends
        .contains(&EndCondition::PeakDrop { voltage_v: 0.05 }));
}

#[test]
fn several_errors_are_reported_together() {
    let bad = GOOD
        .replace("\"0.5C\"", "\"0.5X\"")
        .replace("\"0.2C\"", "\"9C\"");
    let e = errors(&bad);
    assert_eq!(e.lines().count(), 2, "{e}");
}

#[test]
fn pulse_steps_and_discharge_modes() {
    let text = GOOD.replace(
        "  [[phase.step]]\n  kind = \"discharge\"",
        "  [[phase.step]]\n  kind = \"pulse\"\n  levels = [{ current = \"-0.2C\", duration = \"10s\" }, { current = \"-1C\", duration = \"1s\" }, { current = \"0.5C\", duration = \"10s\" }]\n\n  [[phase.step]]\n  kind = \"discharge\"\n  mode = \"power\"\n  power = \"100W\"\n  ends = [\"voltage < 3.2V/cell\"]\n\n  [[phase.step]]\n  kind = \"discharge\"",
    );
    let plan = plan_from_text(Path::new("p.toml"), &text, &li_ion_14ah()).unwrap();
    assert_eq!(plan.steps.len(), 8);
    assert_eq!(plan.steps[1].pulse_duration_s(), Some(21.0));
    // Constant power beyond the envelope at voltage_min is refused.
    let e = errors(&text.replace("\"100W\"", "\"1000W\""));
    assert!(e.contains("draws"), "{e}");
}

#[test]
fn every_shipped_procedure_validates() {
    for entry in std::fs::read_dir("procedures").unwrap() {
        let path = entry.unwrap().path();
        let text = std::fs::read_to_string(&path).unwrap();
        let chemistry = match path.file_name().unwrap().to_str().unwrap() {
            n if n.starts_with("lfp") => Chemistry::Lfp,
            n if n.starts_with("lead") => Chemistry::LeadAcid,
            n if n.starts_with("nimh") => Chemistry::Nimh,
            _ => Chemistry::LiIon,
        };
        let p = PackSpec {
            chemistry,
            ..li_ion_14ah()
        };
        let plan = plan_from_text(&path, &text, &p).unwrap_or_else(|e| panic!("{e}"));
        // Every procedure measures something: a capacity or resistance.
        let dcir = plan
            .steps
            .iter()
            .filter(|s| s.result.map(|r| r.name()) == Some("dcir"))
            .count();
        assert!(
            plan.capacity_step().is_some() || dcir > 0,
            "{}: measures nothing",
            path.display()
        );
    }
}

#[test]
fn a_step_may_set_its_own_sampling_interval() {
    let pack = packbench::session::request::default_sim_pack();
    let p = model::procedure::load(
        std::path::Path::new("procedures/dcir-soc-sweep-li-ion.toml"),
        &pack,
    )
    .unwrap();
    let fast: Vec<f64> = p
        .plan
        .steps
        .iter()
        .filter_map(|s| s.sample_every_s)
        .collect();
    assert_eq!(fast, vec![0.1, 0.1, 0.1]);
    let dir = tempfile::tempdir().unwrap();
    let bad = std::fs::read_to_string("procedures/dcir-soc-sweep-li-ion.toml")
        .unwrap()
        .replacen("every = \"0.1s\"", "every = \"0.001s\"", 1);
    let path = dir.path().join("bad.toml");
    std::fs::write(&path, &bad).unwrap();
    let e = model::procedure::load(&path, &pack)
        .unwrap_err()
        .to_string();
    let line = bad.lines().position(|l| l.contains("0.001s")).unwrap() + 1;
    assert!(e.contains(&format!("bad.toml:{line}:")), "{e}");
    assert!(e.contains("sampling interval must be between"), "{e}");
}

#[test]
fn a_peak_drop_end_can_end_only_a_nickel_charge() {
    // Found by the property test: a lithium charge held at its voltage
    // limit never drops from its peak, so a step with only that end would
    // run into the envelope's step time cap.
    let text = r#"title = "t"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.5V/cell"
current_max = "1C"
temperature_max = "55degC"
[[phase]]
name = "c"
  [[phase.step]]
  kind = "charge"
  current = "0.5C"
  voltage = "4.2V/cell"
  ends = ["peak_drop > 10mV/cell"]
"#;
    let e = errors(text);
    assert!(e.contains("cannot end") && e.contains("NiMH only"), "{e}");
    let nimh = PackSpec {
        chemistry: Chemistry::Nimh,
        series: 6,
        rated_capacity_ah: 2.0,
        rated_energy_wh: None,
        rated_rate_c: None,
        rated_resistance_mohm: None,
    };
    let t = text
        .replace("4.25V/cell", "1.9V/cell")
        .replace("2.5V/cell", "0.9V/cell")
        .replace("4.2V/cell", "1.8V/cell");
    assert!(plan_from_text(Path::new("p.toml"), &t, &nimh).is_ok());
}
