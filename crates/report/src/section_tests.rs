//! What each section of the reports shows for each kind of run: every
//! figure is the verdict's, and an absent one says why (never a zero).

use analysis::fade::grade::Policy;
use analysis::{CapacityResult, Recalibration};
use record::verdict::{judge, Inputs, Why};
use record::Summary;

/// A summary of a 10S 14 Ah li-ion pack with a capacity step of
/// `measured_ah` (or none), judged by the default policy.
fn case(
    measured_ah: Option<f64>,
    from_full: bool,
    on_cutoff: Option<bool>,
    rated: bool,
) -> Summary {
    let mut s: Summary = serde_json::from_value(serde_json::json!({
        "schema_version": 2,
        "status": "completed",
        "stop_reason": null,
        "pack_id": "FR-T01",
        "run_id": "20260601-090000Z-test",
        "procedure_title": "test",
        "pack": {"chemistry": "li-ion", "series": 10, "rated_capacity_ah": 14.0,
                 "rated_energy_wh": null, "rated_rate_c": null, "rated_resistance_mohm": null},
        "test_date": "2026-06-01",
        "cycle_count": null,
        "capacity": null,
        "resistance": null,
        "steps": [],
        "cycles": [],
        "warnings": [],
        "samples": 100,
        "duration_s": 3600.0
    }))
    .unwrap();
    s.capacity = measured_ah.map(|a| CapacityResult {
        step: 3,
        measured_ah: a,
        measured_wh: a * 36.0,
        rated_ah: rated.then_some(14.0),
        mean_current_a: 2.8,
        c_rate: rated.then_some(0.2),
        duration_s: a / 2.8 * 3600.0,
        end_voltage_v: Some(30.0),
        ended_on_cutoff: on_cutoff,
        corrected_ah: rated.then_some(a),
        corrections: Vec::new(),
        initial_temperature_c: None,
        ieee450_percent: None,
        from_full_charge: from_full,
        preceded_by: "the full charge of step 1".into(),
    });
    s.recalibration = match (measured_ah, from_full, on_cutoff) {
        (Some(a), true, Some(true)) if rated => Some(Recalibration {
            full_charge_capacity_ah: a,
            suggested_nominal_ah: a,
            measured_ah: a,
            energy_wh: a * 36.0,
            rate_c: 0.2,
            current_a: 2.8,
            end_voltage_v: Some(30.0),
            initial_temperature_c: None,
            ended_on_cutoff: true,
            conditions: "as measured".into(),
        }),
        _ => None,
    };
    if !rated {
        s.pack.rated_capacity_ah = None;
        s.needs_rating = vec!["state of health".into()];
    }
    let policy = Policy::default_policy();
    s.verdict = judge(&Inputs {
        status: s.status,
        chemistry: s.pack.chemistry,
        rated_ah: s.pack.rated_capacity_ah,
        rated_rate_c: Some(0.2),
        capacity: s.capacity.as_ref(),
        recalibration: s.recalibration.as_ref(),
        resistance: None,
        reference: None,
        steps: &[],
        cycles: &[],
        groups: None,
        policy: Some(&policy),
        accuracy: None,
        tare: None,
    })
    .0;
    s
}

fn line<'a>(text: &'a str, key: &str) -> &'a str {
    text.lines().find(|l| l.contains(key)).unwrap_or("")
}

fn row(s: &Summary, key: &str) -> String {
    crate::html::summary_rows(s)
        .into_iter()
        .find(|(k, _)| k == key)
        .map(|(_, v)| v)
        .unwrap_or_default()
}

#[test]
fn a_full_test_shows_every_figure_the_same_way() {
    let s = case(Some(12.6), true, Some(true), true);
    let t = crate::text::summary(&s);
    assert!(
        line(&t, "State of health:").ends_with("90.0 % of rated 14.000 Ah"),
        "{t}"
    );
    assert!(line(&t, "Grade:").contains("Grade:             A ("), "{t}");
    assert!(
        line(&t, "New nominal (BMS):").contains("12.600 Ah (as measured)"),
        "{t}"
    );
    assert_eq!(row(&s, "State of health"), "90.00 % of rated 14 Ah");
    assert!(row(&s, "Grade").starts_with("A — "));
    assert!(row(&s, "New nominal for the BMS").starts_with("12.600 Ah — "));
    let card = crate::html::run_report(&s, &crate::charts::ChartBuilder::new(&s).finish());
    assert!(card.contains("<dt>State of health</dt><dd>90.0 %</dd>"));
    assert!(card.contains("<div class=\"grade\">A</div>"));
}

#[test]
fn a_discharge_not_from_full_shows_no_figure_and_says_why() {
    let s = case(Some(6.5), false, Some(true), true);
    let why = Why::NotFromFullCharge.words();
    let t = crate::text::summary(&s);
    assert_eq!(
        line(&t, "State of health:").trim(),
        format!("State of health:   not measured ({why})")
    );
    assert!(
        line(&t, "Grade:").ends_with(&format!("not graded ({why})")),
        "{t}"
    );
    assert!(line(&t, "New nominal (BMS):").ends_with(&format!("not measured ({why})")));
    assert!(line(&t, "Started from:").contains("NOT from a full charge"));
    assert_eq!(row(&s, "State of health"), format!("not measured ({why})"));
    assert_eq!(row(&s, "Grade"), format!("not graded ({why})"));
    let card = crate::html::run_report(&s, &crate::charts::ChartBuilder::new(&s).finish());
    assert!(card.contains("<div class=\"grade\">–</div>"));
    assert!(card.contains(&format!("not graded: {why}")));
    assert!(
        !t.contains("46.4 %") && !card.contains("46.4"),
        "no ratio is shown"
    );
}

#[test]
fn an_unknown_cutoff_gives_a_state_of_health_but_no_new_nominal() {
    let s = case(Some(12.6), true, None, true);
    let t = crate::text::summary(&s);
    assert!(line(&t, "Measured capacity:").ends_with("cutoff not known (state it with --cutoff)"));
    assert!(line(&t, "State of health:").contains("90.0 %"));
    assert!(line(&t, "New nominal (BMS):")
        .ends_with(&format!("not measured ({})", Why::CutoffUnknown.words())));
    assert_eq!(
        row(&s, "Ended on cutoff"),
        "not known (the log does not say; see --cutoff)"
    );
}

#[test]
fn an_unrated_log_shows_no_rating_and_no_zero() {
    let s = case(Some(12.6), true, Some(true), false);
    let t = crate::text::summary(&s);
    assert!(
        t.starts_with("Run 20260601-090000Z-test of pack FR-T01 (no pack spec given)"),
        "{t}"
    );
    assert!(
        line(&t, "Measured capacity:").contains("12.600 Ah")
            && !line(&t, "Measured capacity:").contains("C)")
    );
    assert!(line(&t, "State of health:")
        .ends_with(&format!("not measured ({})", Why::NoRating.words())));
    assert!(!t.contains("Capacity (corrected)"), "{t}");
    assert!(!t.contains(" 0.0 %") && !t.contains("0.000 Ah"), "{t}");
    let card = crate::html::run_report(&s, &crate::charts::ChartBuilder::new(&s).finish());
    assert!(card.contains("no rated capacity given"));
}

#[test]
fn a_run_without_a_capacity_step_says_so() {
    let s = case(None, true, None, true);
    let t = crate::text::summary(&s);
    assert!(t.contains("Measured capacity: none (no completed capacity step)"));
    assert!(line(&t, "Grade:").ends_with(&format!("not graded ({})", Why::NoCapacityStep.words())));
    assert_eq!(
        row(&s, "Measured capacity"),
        "none (no completed capacity step)"
    );
}

#[test]
fn an_implausible_capacity_is_not_a_state_of_health() {
    let s = case(Some(21.0), true, Some(true), true);
    let t = crate::text::summary(&s);
    assert!(line(&t, "State of health:")
        .ends_with(&format!("not measured ({})", Why::Implausible.words())));
    assert!(!t.contains("150.0 %"), "{t}");
    assert_eq!(s.verdict.grade_label(), None);
}

/// The terminal's step table lines up: every column of a row under its
/// header, whatever the kind's length.
#[test]
fn the_step_table_lines_up_under_its_header() {
    let mut s = case(Some(13.0), true, Some(true), true);
    let step = |n: u32, kind: &str, secs: f64| -> analysis::StepSummary {
        serde_json::from_value(serde_json::json!({
            "step": n, "phase": "p", "cycle": 1, "kind": kind, "name": null,
            "samples": 10, "start_s": 0.0, "duration_s": secs,
            "charge_ah": -1.5, "energy_wh": -55.0, "charge_in_ah": 0.0,
            "charge_out_ah": 1.5, "energy_in_wh": 0.0, "energy_out_wh": 55.0,
            "start_voltage_v": null, "end_voltage_v": null, "min_voltage_v": null,
            "max_voltage_v": null, "mean_current_a": null, "max_temperature_c": null,
            "end_kind": "time", "end_reason": "time > 30min00s", "measure": null
        }))
        .unwrap()
    };
    s.steps = vec![step(1, "discharge", 8347.0), step(2, "rest", 1800.0)];
    let text = crate::text::summary(&s);
    let header = line(&text, "duration");
    let rows: Vec<&str> = text
        .lines()
        .filter(|l| l.contains("time > 30min00s"))
        .collect();
    assert_eq!(rows.len(), 2, "{text}");
    let end_of = |l: &str, word: &str| l.find(word).map(|k| k + word.len());
    for (r, d) in rows.iter().zip(["2h19m07s", "30min00s"]) {
        assert_eq!(end_of(r, d), end_of(header, "duration"), "{header}\n{r}");
        assert_eq!(
            end_of(r, "-1.5000"),
            end_of(header, "charge Ah"),
            "{header}\n{r}"
        );
        assert_eq!(r.find("time >"), header.find("end"), "{header}\n{r}");
    }
    assert_eq!(rows[0].find("discharge"), header.find("kind"));
    assert_eq!(rows[1].find("rest"), header.find("kind"));
}
