//! Measurement analysis: pure functions over a sample stream and the step
//! records of a run. The same code computes the summary at the end of a
//! live run and when a log is analysed afterwards, so the two agree.
//!
//! Conventions: current positive into the pack; step charge and energy are
//! signed; cycle and capacity figures are magnitudes.

pub mod bms;
pub mod calibration;
pub mod characterize;
pub mod correct;
pub mod curves;
pub mod decision;
pub mod ecm;
pub mod fade;
pub mod fit;
pub mod groups;
pub mod integrate;
pub mod pulse;
pub mod resistance;
pub mod screen;
pub mod stream;
pub mod uncertainty;

use correct::Correction;
use model::end::EndKind;
use model::pack::PackSpec;
use model::procedure::{ResultTag, StepType};
use model::sample::Sample;
use pulse::PulseReading;
use resistance::ResistanceReading;
use serde::{Deserialize, Serialize};
pub use stream::{AnalysisOptions, Analyzer};

/// A capacity step counts as starting full when less than this share of
/// the rated capacity was drawn since the end of the last full charge (a
/// rest's self-discharge, the meters' zero, a resistance pulse; common
/// practice).
pub const FULL_START_TOLERANCE: f64 = 0.02;

fn is_zero(x: &f64) -> bool {
    *x == 0.0
}

/// What the analysis needs to know about a step besides its samples.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StepInfo {
    pub step: u32,
    pub phase: String,
    pub cycle: u32,
    pub kind: StepType,
    pub name: Option<String>,
    pub result: Option<ResultTag>,
    pub end_kind: Option<EndKind>,
    pub end_reason: Option<String>,
}

/// Figures of one step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StepSummary {
    pub step: u32,
    pub phase: String,
    pub cycle: u32,
    pub kind: StepType,
    pub name: Option<String>,
    pub samples: usize,
    pub start_s: f64,
    /// The time the step ran (current could flow): its span in run time
    /// less any time the run was down inside it, s.
    pub duration_s: f64,
    /// Run time inside the step while the run was down (interrupted and
    /// resumed), s.
    #[serde(default, skip_serializing_if = "is_zero")]
    pub down_s: f64,
    /// Net charge, signed (positive into the pack).
    pub charge_ah: f64,
    /// Net energy, signed.
    pub energy_wh: f64,
    pub charge_in_ah: f64,
    pub charge_out_ah: f64,
    pub energy_in_wh: f64,
    pub energy_out_wh: f64,
    pub start_voltage_v: Option<f64>,
    pub end_voltage_v: Option<f64>,
    pub min_voltage_v: Option<f64>,
    pub max_voltage_v: Option<f64>,
    pub mean_current_a: Option<f64>,
    pub max_temperature_c: Option<f64>,
    pub end_kind: Option<EndKind>,
    pub end_reason: Option<String>,
    /// What the samples tell of the measurement: sampling, noise, the
    /// integration rule's error, the slope at the end (the uncertainty
    /// budget's data terms; absent in older records).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub measure: Option<uncertainty::StepMeasure>,
}

/// Figures of one charge/discharge cycle.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CycleSummary {
    pub cycle: u32,
    pub charge_ah: f64,
    pub discharge_ah: f64,
    pub charge_wh: f64,
    pub discharge_wh: f64,
    /// Discharge Ah / charge Ah of the same cycle, %; absent unless both ran.
    pub coulombic_efficiency_pct: Option<f64>,
    /// Discharge Wh / charge Wh of the same cycle, %.
    pub energy_efficiency_pct: Option<f64>,
}

/// The measured capacity, from the step tagged `capacity`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CapacityResult {
    pub step: u32,
    pub measured_ah: f64,
    pub measured_wh: f64,
    /// The rating the figure was read against (absent: analysed without one).
    pub rated_ah: Option<f64>,
    pub mean_current_a: f64,
    /// Mean discharge current as a C-rate of the rated capacity.
    pub c_rate: Option<f64>,
    pub duration_s: f64,
    pub end_voltage_v: Option<f64>,
    /// Did the step end on its voltage cutoff (as a capacity test must)?
    /// Absent: not known (a foreign log without a stated cutoff).
    pub ended_on_cutoff: Option<bool>,
    /// The capacity at rated conditions as far as it was corrected (each
    /// correction in `corrections`; absent without a rating).
    #[serde(default)]
    pub corrected_ah: Option<f64>,
    /// The corrections applied, each with its factor and why.
    #[serde(default)]
    pub corrections: Vec<Correction>,
    /// Temperature at the start of the discharge, °C.
    #[serde(default)]
    pub initial_temperature_c: Option<f64>,
    /// IEEE 450 time-adjusted percent capacity (lead-acid at its rated
    /// current, to its cutoff).
    #[serde(default)]
    pub ieee450_percent: Option<f64>,
    /// Did the step start from a full charge (the end of a charge on its
    /// taper or −ΔV, with only rests between)? Only then is the figure
    /// the pack's capacity.
    #[serde(default = "yes")]
    pub from_full_charge: bool,
    /// What preceded the step, in words.
    #[serde(default)]
    pub preceded_by: String,
}

impl CapacityResult {
    /// What the corrections did, in words (only what was done).
    pub fn conditions(&self) -> String {
        let done: Vec<String> = self
            .corrections
            .iter()
            .filter(|c| c.method != "none")
            .map(|c| format!("{} ({}, ×{:.4})", c.kind, c.method, c.factor))
            .collect();
        let skipped: Vec<String> = self
            .corrections
            .iter()
            .filter(|c| c.method == "none")
            .map(|c| format!("not corrected for {}", c.kind))
            .collect();
        let mut out = if done.is_empty() {
            "as measured".to_string()
        } else {
            format!("corrected for {}", done.join(" and "))
        };
        for s in skipped {
            out.push_str("; ");
            out.push_str(&s);
        }
        out
    }
}

fn yes() -> bool {
    true
}

/// A gap in the log: an interval much longer than the typical one.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Gap {
    pub step: u32,
    pub from_s: f64,
    pub to_s: f64,
    pub duration_s: f64,
    pub typical_interval_s: f64,
    /// Charge integrated across the gap (straight line between the two
    /// samples either side), Ah; 0 across a step boundary.
    pub charge_across_ah: f64,
}

/// What reading the log found.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct LogQuality {
    pub rows: u64,
    pub duplicates_dropped: u64,
    pub out_of_order_dropped: u64,
    /// Rows with the same time as the row before but other values. Kept
    /// (an instant change, such as a current edge) where the log names its
    /// steps; left out where steps are found from the current.
    pub repeated_timestamps: u64,
    /// Of those, the rows left out.
    #[serde(default)]
    pub repeated_dropped: u64,
    pub gaps: u64,
    pub charge_in_gaps_ah: f64,
    /// A last line without its newline was left out.
    pub partial_last_line: bool,
}

/// A peak of dQ/dV (position in V) or dV/dQ (position in Ah).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PeakSummary {
    pub position: f64,
    pub position_per_cell: f64,
    pub height: f64,
    pub prominence: f64,
}

/// Incremental capacity of one step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct IcaSummary {
    pub step: u32,
    pub direction: String,
    pub rate_c: f64,
    pub bin_mv_per_cell: f64,
    pub smoothing_bins: f64,
    /// Main peaks (Ah/V), at most three, in voltage order.
    pub peaks: Vec<PeakSummary>,
}

/// Differential voltage of one step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct DvaSummary {
    pub step: u32,
    pub direction: String,
    pub bin_ah: f64,
    pub smoothing_bins: f64,
    /// Main peaks (V/Ah), at most three, in charge order.
    pub peaks: Vec<PeakSummary>,
}

/// One row of the open-circuit-voltage table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OcvPoint {
    pub soc_pct: f64,
    pub charge_v: f64,
    pub discharge_v: f64,
    pub ocv_v: f64,
    pub ocv_per_cell_v: f64,
}

/// Open-circuit voltage against state of charge, the average of a slow
/// charge from empty and the slow discharge from full.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct OcvTable {
    pub charge_step: u32,
    pub discharge_step: u32,
    pub charge_rate_c: f64,
    pub discharge_rate_c: f64,
    pub points: Vec<OcvPoint>,
}

/// Curves of the capacity test.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct CurvesSummary {
    pub ica: Vec<IcaSummary>,
    pub dva: Vec<DvaSummary>,
    pub ocv: Option<OcvTable>,
}

/// The curves themselves, for CSV export: (step, direction, x, y, smoothed y).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct CurveData {
    pub ica: Vec<(u32, String, f64, f64, f64)>,
    pub dva: Vec<(u32, String, f64, f64, f64)>,
    pub ocv: Vec<OcvPoint>,
}

/// For engineers recalibrating a battery management system or fuel gauge.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Recalibration {
    /// The measured full-charge capacity at rated conditions, Ah.
    pub full_charge_capacity_ah: f64,
    /// Suggested as the new nominal (rounded to 1 mAh).
    pub suggested_nominal_ah: f64,
    pub measured_ah: f64,
    pub energy_wh: f64,
    pub rate_c: f64,
    pub current_a: f64,
    pub end_voltage_v: Option<f64>,
    pub initial_temperature_c: Option<f64>,
    pub ended_on_cutoff: bool,
    /// The test conditions the figure holds for.
    pub conditions: String,
}

/// The pack's DC resistance: from the steps tagged `dcir`, else (a
/// foreign log) from two-level patterns found in the log, else from the
/// pulse method at a single edge.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResistanceResult {
    /// The pack's figure, mΩ: the reading nearest half charge.
    pub dcir_mohm: f64,
    pub method: String,
    /// Why this method gave the figure.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub why: String,
    pub readings: Vec<ResistanceReading>,
}

/// Everything the analysis finds in one run.
#[derive(Debug, Clone, PartialEq)]
pub struct Analysis {
    pub capacity: Option<CapacityResult>,
    pub resistance: Option<ResistanceResult>,
    pub steps: Vec<StepSummary>,
    pub cycles: Vec<CycleSummary>,
    pub warnings: Vec<String>,
    /// The pulse method at every current edge of the log.
    pub pulse: Vec<PulseReading>,
    pub curves: Option<CurvesSummary>,
    pub curve_data: CurveData,
    pub recalibration: Option<Recalibration>,
    pub gaps: Vec<Gap>,
    pub quality: LogQuality,
    pub standby_drain: Option<DrainResult>,
    /// A pack read group by group (filled in by the caller, which has the
    /// group log).
    pub groups: Option<groups::GroupsResult>,
    /// Pulse-power levels (hybrid pulse power characterization), where
    /// the log holds any.
    pub characterization: Option<characterize::Characterization>,
}

/// A standby-drain measurement: what the source supplied to hold the pack
/// at its own voltage, averaged over the second half of the step (the first
/// half lets the pack's relaxation die away).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct DrainResult {
    pub step: u32,
    /// Mean drain, mA.
    pub current_ma: f64,
    /// The same as a share of the capacity per month (30.44 days), %.
    pub pct_per_month: f64,
    /// The capacity the share is of: measured in this run, else rated, Ah.
    pub capacity_ref_ah: f64,
    /// The averaging window, s.
    pub window_s: f64,
    pub samples: usize,
}

/// Hours in an average month (365.25 / 12 days).
pub const HOURS_PER_MONTH: f64 = 730.5;

/// A drain in mA as % of a capacity lost per month.
pub fn drain_pct_per_month(current_ma: f64, capacity_ah: f64) -> f64 {
    current_ma / 1000.0 * HOURS_PER_MONTH / capacity_ah * 100.0
}

/// Mean current over the second half of a series of (t, I) points, by the
/// trapezoid (None under two points in the window).
pub fn second_half_mean(points: &[(f64, f64)]) -> Option<(f64, f64, usize)> {
    let (first, last) = (points.first()?, points.last()?);
    let mid = 0.5 * (first.0 + last.0);
    let w: Vec<&(f64, f64)> = points.iter().filter(|p| p.0 >= mid).collect();
    if w.len() < 2 {
        return None;
    }
    let mut q = 0.0;
    for pair in w.windows(2) {
        q += (pair[0].1 + pair[1].1) * 0.5 * (pair[1].0 - pair[0].0);
    }
    let span = w[w.len() - 1].0 - w[0].0;
    (span > 0.0).then(|| (q / span, span, w.len()))
}

/// State of health, % of rated (fact sheet §6: SOH = C_measured / C_rated × 100).
pub fn soh_pct(measured_ah: f64, rated_ah: f64) -> f64 {
    measured_ah / rated_ah * 100.0
}

/// Analyse a run held in memory: per step, per cycle, capacity (measured
/// and at rated conditions), state of health, resistance, curves. The same
/// streaming code as every other path ([`Analyzer`]).
pub fn analyze(samples: &[Sample], steps: &[StepInfo], pack: &PackSpec) -> Analysis {
    analyze_with(samples, steps, pack, AnalysisOptions::default())
}

/// [`analyze`] with settings.
pub fn analyze_with(
    samples: &[Sample],
    steps: &[StepInfo],
    pack: &PackSpec,
    opts: AnalysisOptions,
) -> Analysis {
    let mut a = Analyzer::new(pack, steps, opts);
    for s in samples {
        a.push(s);
    }
    a.finish()
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::pack::Chemistry;

    #[test]
    fn trade_arithmetic() {
        // Common practice: a 10 Ah pack that has taken 1 Ah is at 10 %.
        assert!((soh_pct(1.0, 10.0) - 10.0).abs() < 1e-12);
        // Fact sheet §6 check value: 1.72 Ah of 2.00 Ah rated = 86.0 %.
        assert!((soh_pct(1.72, 2.0) - 86.0).abs() < 1e-9);
        // Common practice: a 1000 mAh pack drained at 1.2 A empties in 50 min.
        let pack = PackSpec {
            chemistry: Chemistry::Nimh,
            series: 1,
            rated_capacity_ah: 1.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let samples: Vec<Sample> = (0..=3000)
            .map(|k| Sample {
                t_s: k as f64,
                step: 1,
                cycle: 0,
                voltage_v: 1.2,
                current_a: -1.2,
                temperature_c: None,
            })
            .collect();
        let info = StepInfo {
            step: 1,
            phase: "p".into(),
            cycle: 0,
            kind: StepType::Discharge,
            name: None,
            result: Some(ResultTag::Capacity),
            end_kind: Some(EndKind::VoltageBelow),
            end_reason: None,
        };
        let a = analyze(&samples, &[info], &pack);
        let c = a.capacity.unwrap();
        assert!((c.measured_ah - 1.0).abs() < 1e-9, "{}", c.measured_ah);
        assert!((c.duration_s - 3000.0).abs() < 1e-9);
        assert!((c.c_rate.unwrap() - 1.2).abs() < 1e-9);
    }

    #[test]
    fn efficiencies_from_the_same_cycle() {
        // Fact sheet §8 check value [D]: 2.000 Ah in, 1.990 Ah out → CE 99.50 %;
        // 7.60 Wh in, 7.16 Wh out → EE 94.2 %.
        let pack = pack_2ah();
        let mut samples = Vec::new();
        // Charge: 1 A for 7200 s at 3.8 V = 2 Ah, 7.6 Wh.
        for k in 0..=7200 {
            samples.push(Sample {
                t_s: k as f64,
                step: 1,
                cycle: 1,
                voltage_v: 3.8,
                current_a: 1.0,
                temperature_c: None,
            });
        }
        // Discharge: 0.995 A for 7200 s at 7.16/1.99 V.
        let v = 7.16 / 1.99;
        for k in 0..=7200 {
            samples.push(Sample {
                t_s: 8000.0 + k as f64,
                step: 2,
                cycle: 1,
                voltage_v: v,
                current_a: -0.995,
                temperature_c: None,
            });
        }
        let info = |step, kind: &str| StepInfo {
            step,
            phase: "p".into(),
            cycle: 1,
            kind: kind.parse().unwrap(),
            name: None,
            result: None,
            end_kind: Some(EndKind::Time),
            end_reason: None,
        };
        // Without a discharge to the cutoff first, the charge topped up a
        // pack of unknown state: no efficiency.
        let a = analyze(&samples, &[info(1, "charge"), info(2, "discharge")], &pack);
        assert_eq!(a.cycles[0].coulombic_efficiency_pct, None);
        assert!(a
            .warnings
            .iter()
            .any(|w| w.contains("did not start from empty")));
        let (mut all, empty) = emptied();
        all.extend(samples);
        let a = analyze(
            &all,
            &[empty, info(1, "charge"), info(2, "discharge")],
            &pack,
        );
        let c = a.cycles.iter().find(|c| c.cycle == 1).unwrap();
        assert!((c.coulombic_efficiency_pct.unwrap() - 99.5).abs() < 1e-9);
        assert!((c.energy_efficiency_pct.unwrap() - 94.21).abs() < 0.01);
        assert!(a.capacity.is_none());
    }

    /// A discharge to the cutoff before the first cycle (cycle 0, ending
    /// at t = -1000 s): the charge after it starts from empty.
    fn emptied() -> (Vec<Sample>, StepInfo) {
        let samples = (0..=1000)
            .map(|k| Sample {
                t_s: -2000.0 + k as f64,
                step: 0,
                cycle: 0,
                voltage_v: 3.0,
                current_a: -0.1,
                temperature_c: None,
            })
            .collect();
        let info = StepInfo {
            step: 0,
            phase: "empty".into(),
            cycle: 0,
            kind: StepType::Discharge,
            name: None,
            result: None,
            end_kind: Some(EndKind::VoltageBelow),
            end_reason: None,
        };
        (samples, info)
    }

    fn pack_2ah() -> PackSpec {
        PackSpec {
            chemistry: Chemistry::LiIon,
            series: 1,
            rated_capacity_ah: 2.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        }
    }

    fn info(step: u32, kind: &str, end: &str, result: Option<&str>) -> StepInfo {
        StepInfo {
            step,
            phase: "p".into(),
            cycle: 1,
            kind: kind.parse().unwrap(),
            name: None,
            result: result.map(|r| r.parse().unwrap()),
            end_kind: Some(end.parse().unwrap()),
            end_reason: None,
        }
    }

    fn flat(step: u32, from: f64, to: f64, v: f64, i: f64) -> Vec<Sample> {
        (0..=((to - from) as usize))
            .map(|k| Sample {
                t_s: from + k as f64,
                step,
                cycle: 1,
                voltage_v: v,
                current_a: i,
                temperature_c: None,
            })
            .collect()
    }

    #[test]
    fn a_cycle_whose_discharge_did_not_finish_has_no_efficiency() {
        // A full charge (2 Ah), then a discharge interrupted after 0.93 Ah:
        // 46.6 % would be no efficiency at all (issue: an interrupted
        // run's summary reported it).
        let (mut samples, empty) = emptied();
        samples.extend(flat(1, 0.0, 7200.0, 3.8, 1.0));
        samples.extend(flat(2, 8000.0, 11348.0, 3.6, -1.0));
        let infos = [
            empty.clone(),
            info(1, "charge", "current_below", None),
            info(2, "discharge", "interrupted", Some("capacity")),
        ];
        let a = analyze(&samples, &infos, &pack_2ah());
        let c1 = |a: &Analysis| a.cycles.iter().find(|c| c.cycle == 1).cloned().unwrap();
        assert_eq!(a.cycles.len(), 2);
        assert_eq!(c1(&a).coulombic_efficiency_pct, None);
        assert_eq!(c1(&a).energy_efficiency_pct, None);
        // The same cycle finished: its efficiency is there.
        let done = [
            empty,
            info(1, "charge", "current_below", None),
            info(2, "discharge", "voltage_below", Some("capacity")),
        ];
        let a = analyze(&samples, &done, &pack_2ah());
        let ce = c1(&a).coulombic_efficiency_pct.unwrap();
        assert!((ce - 0.93 / 2.0 * 100.0).abs() < 0.1, "{ce}");
    }

    #[test]
    fn nothing_is_counted_across_an_interruption_whatever_the_rounding() {
        // A 1 A discharge, down from t = 100 s to t = 160 s. The first
        // sample after the resume is written to the millisecond and falls
        // 0.4 ms before the resume time kept in the events (issue: then
        // the 60 s outage was integrated as a gap, +16.7 mAh).
        // (The log starts at 1000 s: the step's span is from its own
        // first sample.)
        let mut samples = flat(1, 1000.0, 1100.0, 3.6, -1.0);
        let resumed_at = 1160.0004;
        samples.extend(flat(1, 1160.0, 1200.0, 3.6, -1.0));
        let pack = pack_2ah();
        let mut a = Analyzer::new(
            &pack,
            &[info(1, "discharge", "voltage_below", Some("capacity"))],
            AnalysisOptions::default(),
        );
        a.set_breaks(vec![integrate::Interruption {
            last_before_s: 1100.0,
            resumed_at_s: resumed_at,
        }]);
        for s in &samples {
            a.push(s);
        }
        let r = a.finish();
        let c = r.capacity.unwrap();
        // 100 s + 40 s at 1 A, nothing for the 60 s down.
        assert!(
            (c.measured_ah - 140.0 / 3600.0).abs() < 1e-12,
            "{}",
            c.measured_ah
        );
        assert_eq!(r.quality.gaps, 0);
        // The mean current is over the 140 s current flowed.
        assert!(
            (c.mean_current_a - 1.0).abs() < 1e-12,
            "{}",
            c.mean_current_a
        );
        assert!((c.duration_s - 140.0).abs() < 1e-9);
        assert!((r.steps[0].down_s - 60.0).abs() < 1e-9);
        // The step's own mean current: over its 140 s active too.
        let mean = r.steps[0].mean_current_a.expect("a mean current");
        assert!((mean + 1.0).abs() < 1e-9, "{mean}");
    }

    /// A standby drain worked by hand: 2 mA for a 730.5 h month is 1.461
    /// Ah, 14.61 % of 10 Ah. The second half's mean: points 0 … 10 s, the
    /// current 1 mA then 3 mA from 5 s (the half-way line): the trapezoid
    /// over 5 … 10 s with 3 mA throughout gives 3 mA; a ramp from 6 s
    /// gives its own mean.
    #[test]
    fn a_drain_and_its_second_half_by_hand() {
        assert!((drain_pct_per_month(2.0, 10.0) - 14.61).abs() < 1e-12);
        let step: Vec<(f64, f64)> = (0..=10)
            .map(|k| (f64::from(k), if k < 5 { 0.001 } else { 0.003 }))
            .collect();
        let (mean, span, n) = second_half_mean(&step).unwrap();
        assert!(
            (mean - 0.003).abs() < 1e-15 && span == 5.0 && n == 6,
            "{mean} {span} {n}"
        );
        // A ramp 0 … 10 mA over 0 … 10 s: over 5 … 10 s the mean is 7.5 mA.
        let ramp: Vec<(f64, f64)> = (0..=10)
            .map(|k| (f64::from(k), 0.001 * f64::from(k)))
            .collect();
        assert!((second_half_mean(&ramp).unwrap().0 - 0.0075).abs() < 1e-15);
        assert_eq!(second_half_mean(&[(0.0, 1.0)]), None);
        assert_eq!(second_half_mean(&[]), None);
        assert_eq!(second_half_mean(&[(0.0, 1.0), (0.0, 2.0)]), None, "no span");
    }

    /// The conditions in words: what was corrected (with its factor) and
    /// what was not.
    #[test]
    fn a_capacitys_conditions_say_what_was_done() {
        let corr = |kind: &str, method: &str, factor: f64| Correction {
            kind: kind.into(),
            method: method.into(),
            factor,
            why: String::new(),
        };
        let mut c = CapacityResult {
            step: 1,
            measured_ah: 1.0,
            measured_wh: 3.6,
            rated_ah: None,
            mean_current_a: 1.0,
            c_rate: None,
            duration_s: 3600.0,
            end_voltage_v: None,
            ended_on_cutoff: None,
            corrected_ah: None,
            corrections: Vec::new(),
            initial_temperature_c: None,
            ieee450_percent: None,
            from_full_charge: true,
            preceded_by: String::new(),
        };
        assert_eq!(c.conditions(), "as measured");
        c.corrections = vec![
            corr(
                "temperature",
                "linear coefficient (common practice)",
                0.97087,
            ),
            corr("rate", "none", 1.0),
        ];
        assert_eq!(
            c.conditions(),
            "corrected for temperature (linear coefficient (common practice), ×0.9709); not corrected for rate"
        );
        c.corrections.push(corr("rate", "Peukert", 1.02));
        assert!(
            c.conditions().contains(" and rate (Peukert, ×1.0200)"),
            "{}",
            c.conditions()
        );
    }

    /// A slow capacity step's curves carry the bins they were made with,
    /// in the units they are reported in: dQ/dV bins of 5 mV per cell
    /// (0.005 V, the default), dV/dQ bins of 1 % of rated (10 mAh of
    /// 1 Ah), each smoothed over 2 bins.
    #[test]
    fn a_capacity_steps_curves_say_their_bins() {
        let pack = PackSpec {
            rated_capacity_ah: 1.0,
            ..pack_2ah()
        };
        // C/5 for 5 h, 4.10 V falling to 3.00 V.
        let samples: Vec<Sample> = (0..=1800)
            .map(|k| Sample {
                t_s: 10.0 * f64::from(k),
                step: 1,
                cycle: 1,
                voltage_v: 4.1 - 1.1 * f64::from(k) / 1800.0,
                current_a: -0.2,
                temperature_c: None,
            })
            .collect();
        let a = analyze(
            &samples,
            &[info(1, "discharge", "voltage_below", Some("capacity"))],
            &pack,
        );
        let c = a.curves.expect("curves of a C/5 step");
        assert_eq!(c.ica.len(), 1, "{c:?}");
        assert!((c.ica[0].bin_mv_per_cell - 5.0).abs() < 1e-12, "{c:?}");
        assert_eq!(c.ica[0].smoothing_bins, 2.0);
        assert!((c.ica[0].rate_c - 0.2).abs() < 1e-9, "{c:?}");
        assert_eq!(c.dva.len(), 1, "{c:?}");
        assert!((c.dva[0].bin_ah - 0.01).abs() < 1e-12, "{c:?}");
        assert_eq!(c.dva[0].smoothing_bins, 2.0);
    }

    /// A resistance step's two levels give a reading only when the step
    /// finished: 1 A then 5 A out, 3.70 V then 3.62 V at their ends, is
    /// ΔV/ΔI = 0.08 V / 4 A = 20 mΩ; the same step aborted gives none,
    /// and says so.
    #[test]
    fn a_resistance_step_reads_only_when_it_finished() {
        let pack = pack_2ah();
        let mut samples = flat(1, 0.0, 10.0, 3.70, -1.0);
        samples.extend(flat(1, 11.0, 20.0, 3.62, -5.0));
        for (end, reads) in [("time", true), ("aborted", false)] {
            let a = analyze(&samples, &[info(1, "pulse", end, Some("dcir"))], &pack);
            let r = a.resistance.as_ref().map(|r| r.dcir_mohm);
            if reads {
                let r = r.expect("a reading");
                assert!((r - 20.0).abs() < 1e-9, "{r}");
            } else {
                assert_eq!(r, None);
                assert!(
                    a.warnings.iter().any(|w| w.contains("gave no reading")),
                    "{:?}",
                    a.warnings
                );
            }
        }
    }

    /// A step's record given while the log is read is added once, in the
    /// order first given; a record given again completes it in place.
    #[test]
    fn step_records_given_while_reading_are_each_summarised_once() {
        let pack = pack_2ah();
        let mut a = Analyzer::new(
            &pack,
            &[info(1, "charge", "time", None)],
            AnalysisOptions::default(),
        );
        a.set_info(info(2, "discharge", "time", None));
        a.set_info(info(1, "charge", "current_below", None));
        let mut samples = flat(1, 0.0, 60.0, 3.9, 1.0);
        samples.extend(flat(2, 61.0, 120.0, 3.7, -1.0));
        for s in &samples {
            a.push(s);
        }
        let r = a.finish();
        let steps: Vec<u32> = r.steps.iter().map(|s| s.step).collect();
        assert_eq!(steps, [1, 2]);
        assert_eq!(r.steps[0].end_kind, Some(EndKind::CurrentBelow));
    }

    /// The pulse levels' state of charge counts against a capacity this
    /// log measured only from a full charge to the cutoff: a discharge to
    /// the cutoff from a pack of unknown charge leaves the rated 2 Ah.
    #[test]
    fn the_state_of_charge_basis_needs_a_capacity_from_full() {
        let pack = pack_2ah();
        // The discharge, an hour's rest, a 10 s pulse at 1C, a rest.
        let mut samples = flat(1, 0.0, 3600.0, 3.6, -1.0);
        samples.extend(flat(2, 3601.0, 7200.0, 3.65, 0.0));
        samples.extend(flat(3, 7201.0, 7210.0, 3.55, -2.0));
        samples.extend(flat(4, 7211.0, 7800.0, 3.64, 0.0));
        let a = analyze(
            &samples,
            &[
                info(1, "discharge", "voltage_below", Some("capacity")),
                info(2, "rest", "time", None),
                info(3, "pulse", "time", None),
                info(4, "rest", "time", None),
            ],
            &pack,
        );
        let c = a.capacity.as_ref().expect("a capacity");
        assert!(
            !c.from_full_charge && c.ended_on_cutoff == Some(true),
            "{c:?}"
        );
        let basis = &a.characterization.as_ref().expect("read").basis;
        assert!(basis.source.starts_with("rated"), "{basis:?}");
        assert_eq!(basis.capacity_ah, 2.0);
    }
}
