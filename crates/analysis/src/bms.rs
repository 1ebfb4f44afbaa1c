//! The battery management system against the measurement: how far its
//! learnt capacity and its state of charge were off, for the engineer
//! recalibrating it.
//!
//! The state of charge is known exactly at two anchors of a capacity test
//! (common practice): 100 % where the capacity discharge starts from a full
//! charge, 0 % where it reaches its cutoff. Between an anchor and another
//! moment the net charge counted by the bench moves it:
//!
//! ```text
//! SoC(run start) = 100 − 100 · Q(before the capacity step) / C
//! SoC(run end)   = 100 · Q(after the capacity step) / C
//! ```
//!
//! with Q the net charge (charge positive) of the steps before or after
//! the capacity step and C the measured capacity. Each error is the BMS's
//! figure less the measured one (percentage points for the state of
//! charge; % of the measured capacity for the capacity).

use super::{CapacityResult, Recalibration, StepSummary};
use model::bms::BmsReadings;
use serde::{Deserialize, Serialize};

/// The comparison, with the BMS's own figures.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BmsCheck {
    pub reported: BmsReadings,
    /// The measured capacity compared with, Ah.
    #[serde(default)]
    pub measured_capacity_ah: Option<f64>,
    /// (BMS full-charge capacity − measured) / measured × 100.
    #[serde(default)]
    pub capacity_error_pct: Option<f64>,
    /// The BMS's own state of health: full-charge / design capacity × 100.
    #[serde(default)]
    pub bms_soh_pct: Option<f64>,
    /// The measured state of charge at the run's start and end, %.
    #[serde(default)]
    pub soc_start_measured_pct: Option<f64>,
    #[serde(default)]
    pub soc_end_measured_pct: Option<f64>,
    /// BMS − measured, percentage points.
    #[serde(default)]
    pub soc_start_error_pp: Option<f64>,
    #[serde(default)]
    pub soc_end_error_pp: Option<f64>,
    /// The new nominal to program, Ah, and the conditions it holds for.
    #[serde(default)]
    pub suggested_nominal_ah: Option<f64>,
    #[serde(default)]
    pub conditions: Option<String>,
    /// Why a figure could not be compared.
    #[serde(default)]
    pub notes: Vec<String>,
}

/// Compare the BMS's figures with a run's measurement.
pub fn compare(
    reported: &BmsReadings,
    steps: &[StepSummary],
    capacity: Option<&CapacityResult>,
    recalibration: Option<&Recalibration>,
) -> BmsCheck {
    let mut notes = Vec::new();
    // Only a discharge from a full charge to the cutoff measures the
    // capacity and anchors the state of charge at both ends.
    let anchored = capacity
        .filter(|c| c.from_full_charge && c.ended_on_cutoff == Some(true) && c.measured_ah > 0.0);
    if anchored.is_none() {
        notes.push(match capacity {
            None => "no capacity step in the run: nothing measured to compare the BMS with".into(),
            Some(c) if !c.from_full_charge => "the capacity step did not start from a full charge: the BMS's capacity and state of charge are not compared".into(),
            Some(_) => "the capacity step did not reach its cutoff: the BMS's capacity and state of charge are not compared".into(),
        });
    }
    let c_ah = anchored.map(|c| c.measured_ah);
    let capacity_error_pct = match (reported.full_charge_capacity_ah, c_ah) {
        (Some(f), Some(c)) => Some((f - c) / c * 100.0),
        _ => None,
    };
    let bms_soh_pct = match (
        reported.full_charge_capacity_ah,
        reported.design_capacity_ah,
    ) {
        (Some(f), Some(d)) if d > 0.0 => Some(f / d * 100.0),
        _ => None,
    };
    let (mut soc_start, mut soc_end) = (None, None);
    if let Some(cap) = anchored {
        if let Some(k) = steps.iter().position(|s| s.step == cap.step) {
            let before: f64 = steps[..k].iter().map(|s| s.charge_ah).sum::<f64>() + 0.0;
            // (+ 0.0: an empty sum of floats is a negative zero.)
            let after: f64 = steps[k + 1..].iter().map(|s| s.charge_ah).sum::<f64>() + 0.0;
            soc_start = Some(100.0 - 100.0 * before / cap.measured_ah);
            soc_end = Some(100.0 * after / cap.measured_ah);
        }
    }
    let err = |bms: Option<f64>, measured: Option<f64>| match (bms, measured) {
        (Some(b), Some(m)) => Some(b - m),
        _ => None,
    };
    BmsCheck {
        reported: reported.clone(),
        measured_capacity_ah: c_ah,
        capacity_error_pct,
        bms_soh_pct,
        soc_start_measured_pct: soc_start,
        soc_end_measured_pct: soc_end,
        soc_start_error_pp: err(reported.soc_start_pct, soc_start),
        soc_end_error_pp: err(reported.soc_end_pct, soc_end),
        suggested_nominal_ah: recalibration.map(|r| r.suggested_nominal_ah),
        conditions: recalibration.map(|r| r.conditions.clone()),
        notes,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::procedure::plan::StepType;

    fn step(step: u32, kind: StepType, charge_ah: f64) -> StepSummary {
        StepSummary {
            step,
            phase: String::new(),
            cycle: 1,
            kind,
            name: None,
            samples: 10,
            start_s: 0.0,
            duration_s: 3600.0,
            down_s: 0.0,
            charge_ah,
            energy_wh: charge_ah * 3.7,
            charge_in_ah: charge_ah.max(0.0),
            charge_out_ah: (-charge_ah).max(0.0),
            energy_in_wh: 0.0,
            energy_out_wh: 0.0,
            start_voltage_v: None,
            end_voltage_v: None,
            min_voltage_v: None,
            max_voltage_v: None,
            mean_current_a: None,
            max_temperature_c: None,
            end_kind: None,
            end_reason: None,
            measure: None,
        }
    }

    fn capacity(step: u32, measured_ah: f64) -> CapacityResult {
        CapacityResult {
            step,
            measured_ah,
            measured_wh: measured_ah * 3.6,
            rated_ah: Some(10.0),
            mean_current_a: -2.0,
            c_rate: Some(0.2),
            duration_s: measured_ah / 2.0 * 3600.0,
            end_voltage_v: Some(3.0),
            ended_on_cutoff: Some(true),
            corrected_ah: Some(measured_ah),
            corrections: Vec::new(),
            initial_temperature_c: None,
            ieee450_percent: None,
            from_full_charge: true,
            preceded_by: String::new(),
        }
    }

    /// A worked example, computed by hand for this test (not from any
    /// source): a pack at unknown charge is charged 3.8 Ah to full, rests,
    /// gives 9.5 Ah to its cutoff, rests, and takes 4.75 Ah back.
    ///   capacity error = (10.4 − 9.5) / 9.5 × 100 = +9.4737 %
    ///   BMS SoH = 10.4 / 11.0 × 100 = 94.545 %
    ///   SoC at the start = 100 − 100 × 3.8 / 9.5 = 60.0 %; BMS 62 → +2.0 pp
    ///   SoC at the end = 100 × 4.75 / 9.5 = 50.0 %; BMS 55 → +5.0 pp
    #[test]
    fn a_worked_example() {
        let steps = [
            step(1, StepType::Charge, 3.8),
            step(2, StepType::Rest, 0.0),
            step(3, StepType::Discharge, -9.5),
            step(4, StepType::Rest, 0.0),
            step(5, StepType::Charge, 4.75),
        ];
        let cap = capacity(3, 9.5);
        let bms = BmsReadings {
            full_charge_capacity_ah: Some(10.4),
            design_capacity_ah: Some(11.0),
            cycle_count: Some(312.0),
            soc_start_pct: Some(62.0),
            soc_end_pct: Some(55.0),
        };
        let c = compare(&bms, &steps, Some(&cap), None);
        let close = |a: Option<f64>, b: f64| (a.unwrap() - b).abs() < 1e-9;
        assert!(close(c.capacity_error_pct, 9.473_684_210_526_3), "{c:?}");
        assert!(close(c.bms_soh_pct, 94.545_454_545_454_5));
        assert!(close(c.soc_start_measured_pct, 60.0));
        assert!(close(c.soc_end_measured_pct, 50.0));
        assert!(close(c.soc_start_error_pp, 2.0));
        assert!(close(c.soc_end_error_pp, 5.0));
        assert!(c.notes.is_empty());
        // Not from a full charge: no anchors, said why; the BMS's own
        // state of health needs no measurement.
        let not_full = CapacityResult {
            from_full_charge: false,
            ..cap
        };
        let c = compare(&bms, &steps, Some(&not_full), None);
        assert!(c.capacity_error_pct.is_none() && c.soc_start_error_pp.is_none());
        assert!(c.notes[0].contains("full charge"));
        assert!(close(c.bms_soh_pct, 94.545_454_545_454_5));
    }

    /// Without an anchored capacity nothing is compared, and why is said;
    /// a design capacity of zero gives no BMS state of health; a
    /// recalibration's nominal and conditions are passed on.
    #[test]
    fn what_is_not_compared_says_why() {
        let steps = [
            step(1, StepType::Charge, 3.8),
            step(3, StepType::Discharge, -9.5),
        ];
        let bms = BmsReadings {
            full_charge_capacity_ah: Some(10.4),
            design_capacity_ah: Some(0.0),
            cycle_count: None,
            soc_start_pct: Some(62.0),
            soc_end_pct: None,
        };
        let none = compare(&bms, &steps, None, None);
        assert_eq!(
            none.notes,
            ["no capacity step in the run: nothing measured to compare the BMS with"]
        );
        assert_eq!(
            (
                none.capacity_error_pct,
                none.bms_soh_pct,
                none.soc_start_error_pp
            ),
            (None, None, None)
        );
        let mut half = capacity(3, 9.5);
        half.from_full_charge = false;
        assert!(compare(&bms, &steps, Some(&half), None).notes[0]
            .contains("did not start from a full charge"));
        let mut short = capacity(3, 9.5);
        short.ended_on_cutoff = Some(false);
        let c = compare(&bms, &steps, Some(&short), None);
        assert!(c.notes[0].contains("did not reach its cutoff"));
        assert_eq!(c.measured_capacity_ah, None);
        let r = Recalibration {
            full_charge_capacity_ah: 9.5,
            suggested_nominal_ah: 9.5,
            measured_ah: 9.5,
            energy_wh: 34.0,
            rate_c: 0.2,
            current_a: 2.0,
            end_voltage_v: Some(3.0),
            initial_temperature_c: None,
            ended_on_cutoff: true,
            conditions: "at 2 A".into(),
        };
        let c = compare(&bms, &steps, Some(&capacity(3, 9.5)), Some(&r));
        assert!(c.notes.is_empty());
        assert_eq!(c.bms_soh_pct, None);
        assert_eq!(c.soc_end_error_pp, None);
        assert_eq!(c.soc_end_measured_pct, Some(0.0));
        assert!((c.soc_start_error_pp.unwrap() - 2.0).abs() < 1e-9);
        assert_eq!(
            (c.suggested_nominal_ah, c.conditions.as_deref()),
            (Some(9.5), Some("at 2 A"))
        );
    }

    /// When the capacity step is the last, the state of charge at the end
    /// is nothing charged after it: 0 %, not −0 %.
    #[test]
    fn the_state_of_charge_after_a_last_capacity_step_is_a_plain_zero() {
        let steps = [
            step(1, StepType::Charge, 3.8),
            step(2, StepType::Rest, 0.0),
            step(3, StepType::Discharge, -9.5),
        ];
        let bms = BmsReadings {
            full_charge_capacity_ah: Some(10.4),
            design_capacity_ah: Some(11.0),
            cycle_count: None,
            soc_start_pct: Some(62.0),
            soc_end_pct: Some(1.0),
        };
        let c = compare(&bms, &steps, Some(&capacity(3, 9.5)), None);
        let end = c.soc_end_measured_pct.expect("anchored");
        assert!(end == 0.0 && end.is_sign_positive(), "{end}");
        assert!((c.soc_end_error_pp.unwrap() - 1.0).abs() < 1e-12);
    }
}
