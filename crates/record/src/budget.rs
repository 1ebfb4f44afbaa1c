//! The uncertainty of each figure of a verdict, from the accuracy the run
//! recorded (`run.json`'s `accuracy`), the zero tare of its preflight and
//! what the samples tell (each step's [`StepMeasure`]). The budgets'
//! arithmetic is `analysis::uncertainty`; this module picks its inputs
//! from the record.

use analysis::correct::{iec60896_lambda, linear_coefficient, IEC60896_REF_C, LINEAR_REF_C};
use analysis::uncertainty::{
    charge_terms, corrected_budget, energy_terms, ratio_budget, resistance_budget, Budget,
    CommonSign, CorrectionInputs, StepInputs, StepMeasure, Tare, Term,
};
use analysis::{CapacityResult, StepSummary};
use model::accuracy::BenchAccuracy;
use model::pack::Chemistry;
use model::procedure::StepType;
use serde::{Deserialize, Serialize};

/// Each figure's budget, or why there are none.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(default)]
pub struct Uncertainty {
    pub measured_ah: Option<Budget>,
    pub measured_wh: Option<Budget>,
    pub corrected_ah: Option<Budget>,
    pub soh_pct: Option<Budget>,
    pub coulombic_efficiency_pct: Option<Budget>,
    pub energy_efficiency_pct: Option<Budget>,
    pub resistance_mohm: Option<Budget>,
    /// Why no budget could be made (no stated accuracy in the record).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub absent: Option<String>,
    /// Where the accuracy figures came from.
    pub stated_by: Vec<String>,
    /// Some figures are a shipped profile's examples.
    pub examples: bool,
}

/// " ± 0.030" after a figure where space is short (a label, a tile, the
/// `--quiet` line): the reported 95 % interval's half-width to two
/// significant digits, or nothing without a budget.
pub fn pm_short(b: &Option<Budget>) -> String {
    b.as_ref()
        .map(|b| {
            let hw = b.half_width();
            let dec = analysis::uncertainty::decimals_for(hw);
            format!(" ± {hw:.dec$}")
        })
        .unwrap_or_default()
}

/// " ± 0.030 Ah (k = 2, 95 %)" after a figure, or nothing without a budget.
pub fn pm(b: &Option<Budget>) -> String {
    b.as_ref()
        .map(|b| format!(" {}", b.pm()))
        .unwrap_or_default()
}

impl Uncertainty {
    /// Where the accuracy came from and, for a budget, its dominant term,
    /// in one line (or why there are no budgets).
    pub fn basis_line(&self) -> String {
        match &self.absent {
            Some(w) => format!("not stated: {w}"),
            None => format!(
                "from the stated accuracy of {}{}",
                self.stated_by.join(", "),
                if self.examples {
                    " — EXAMPLE figures of a shipped profile: state your instruments' own"
                } else {
                    ""
                }
            ),
        }
    }
}

/// Readings averaged for each instrument's zero before a run (the
/// engine's preflight reads this many; a test in the engine keeps the two
/// equal).
pub const TARE_READINGS: usize = 10;

/// Why a record has no budgets.
pub const NO_ACCURACY: &str =
    "no instrument accuracy is stated in this record (an older run or a foreign log)";

/// The relative uncertainty of a temperature coefficient, as the half-width
/// of a rectangle: a standard's coefficient ±20 %, a common-practice one
/// ±50 % (common practice; stated in the budget's line).
const ALPHA_STANDARD_HALF: f64 = 0.2;
const ALPHA_COMMON_HALF: f64 = 0.5;
/// A Peukert exponent's half-width: the published lead-acid range 1.1–1.3
/// (standards fact sheet §5).
const PEUKERT_HALF: f64 = 0.1;

/// What the budgets are made from.
pub struct BudgetInputs<'a> {
    pub accuracy: Option<&'a BenchAccuracy>,
    /// The zero offsets were read before the run and subtracted.
    pub tare: Option<Tare>,
    pub chemistry: Chemistry,
    pub rated_ah: Option<f64>,
    pub rated_rate_c: Option<f64>,
    pub capacity: Option<&'a CapacityResult>,
    pub steps: &'a [StepSummary],
}

fn step_inputs<'a>(
    s: &'a StepSummary,
    m: &'a StepMeasure,
    acc: &'a BenchAccuracy,
    tare: Option<Tare>,
    cutoff_v: Option<f64>,
) -> Option<StepInputs<'a>> {
    let discharge = s.kind == StepType::Discharge || s.charge_ah < 0.0;
    let current = analysis::uncertainty::current_spec(acc, discharge)?;
    let (q, e) = if discharge {
        (s.charge_out_ah, s.energy_out_wh)
    } else {
        (s.charge_in_ah, s.energy_in_wh)
    };
    Some(StepInputs {
        q_ah: q,
        e_wh: e,
        duration_s: s.duration_s,
        measure: m,
        current,
        voltage: acc.voltage.as_ref(),
        timebase_ppm: acc.timebase_ppm,
        tare,
        cutoff_v,
    })
}

/// Terms of several steps of one direction: a term common to every sample
/// (gain, offset, time base) is common to the steps too and adds linearly;
/// the others add in quadrature.
fn merge(steps: Vec<Vec<Term>>) -> Vec<Term> {
    let mut out: Vec<Term> = Vec::new();
    for terms in steps {
        for t in terms {
            match out.iter_mut().find(|o| o.name == t.name) {
                Some(o) if o.correlated => o.u += t.u,
                Some(o) => o.u = (o.u * o.u + t.u * t.u).sqrt(),
                None => out.push(t),
            }
        }
    }
    out
}

/// Every figure's budget.
pub fn budgets(x: &BudgetInputs<'_>) -> Uncertainty {
    let Some(acc) = x.accuracy else {
        return Uncertainty {
            absent: Some(NO_ACCURACY.into()),
            ..Uncertainty::default()
        };
    };
    let mut u = Uncertainty {
        stated_by: acc.stated_by.clone(),
        examples: acc.examples,
        ..Uncertainty::default()
    };
    if let Some(c) = x.capacity {
        let step = x.steps.iter().find(|s| s.step == c.step);
        let cutoff = if c.ended_on_cutoff == Some(true) {
            c.end_voltage_v
        } else {
            None
        };
        if let Some((s, m)) = step.and_then(|s| s.measure.as_ref().map(|m| (s, m))) {
            if let Some(si) = step_inputs(s, m, acc, x.tare, cutoff) {
                let q = Budget::of(c.measured_ah, "Ah", charge_terms(&si));
                u.measured_wh = Some(Budget::of(c.measured_wh, "Wh", energy_terms(&si)));
                if let (Some(corr), Some(rated)) = (c.corrected_ah, x.rated_ah) {
                    let ci = correction_inputs(c, x, acc);
                    let b = corrected_budget(&q, corr, &ci);
                    u.soh_pct = Some(b.scaled(100.0 / rated, "%"));
                    u.corrected_ah = Some(b);
                }
                u.measured_ah = Some(q);
            }
        }
    }
    u
}

fn correction_inputs(
    c: &CapacityResult,
    x: &BudgetInputs<'_>,
    acc: &BenchAccuracy,
) -> CorrectionInputs {
    let factor = match c.corrected_ah {
        Some(k) if c.measured_ah > 0.0 => k / c.measured_ah,
        _ => 1.0,
    };
    let temp_corrected = c
        .corrections
        .iter()
        .any(|k| k.kind == "temperature" && k.method != "none");
    let temperature = match (temp_corrected, c.initial_temperature_c) {
        (true, Some(theta)) if x.chemistry == Chemistry::LeadAcid => Some((
            iec60896_lambda(c.duration_s / 3600.0),
            theta,
            IEC60896_REF_C,
        )),
        (true, Some(theta)) => Some((linear_coefficient(x.chemistry), theta, LINEAR_REF_C)),
        _ => None,
    };
    let alpha_half = if x.chemistry == Chemistry::LeadAcid {
        ALPHA_STANDARD_HALF
    } else {
        ALPHA_COMMON_HALF
    };
    let rate = c
        .corrections
        .iter()
        .find(|k| k.kind == "rate" && k.factor != 1.0)
        .and_then(|k| {
            let i_rated = x.rated_rate_c? * x.rated_ah?;
            let ln_ratio = (c.mean_current_a / i_rated).ln();
            (ln_ratio.abs() > 1e-9).then(|| {
                let exponent = 1.0 + k.factor.ln() / ln_ratio;
                (ln_ratio, (exponent * 1000.0).round() / 1000.0, PEUKERT_HALF)
            })
        });
    CorrectionInputs {
        factor,
        temperature,
        alpha_rel_u: alpha_half / 3f64.sqrt(),
        temperature_tolerance_c: acc.temperature_c,
        rate,
    }
}

/// The efficiencies of one cycle: coulombic and energy, from its charge
/// and discharge steps. One instrument both ways: its gain cancels and its
/// offset adds (metrology.md §1.2, after Smith, Burns and Dahn 2010).
pub fn efficiency_budgets(
    u: &mut Uncertainty,
    acc: &BenchAccuracy,
    tare: Option<Tare>,
    cycle: &analysis::CycleSummary,
    steps: &[StepSummary],
) {
    let mut q = (Vec::new(), Vec::new());
    let mut e = (Vec::new(), Vec::new());
    for s in steps.iter().filter(|s| s.cycle == cycle.cycle) {
        let Some(m) = s.measure.as_ref() else {
            continue;
        };
        let dis = match s.kind {
            StepType::Discharge => true,
            StepType::Charge => false,
            _ => continue,
        };
        let cutoff = if dis && s.end_kind.is_some_and(|k| k.is_cutoff()) {
            s.end_voltage_v
        } else {
            None
        };
        if let Some(si) = step_inputs(s, m, acc, tare, cutoff) {
            let (qq, ee) = if dis {
                (&mut q.0, &mut e.0)
            } else {
                (&mut q.1, &mut e.1)
            };
            qq.push(charge_terms(&si));
            ee.push(energy_terms(&si));
        }
    }
    if q.0.is_empty() || q.1.is_empty() || cycle.charge_ah <= 0.0 || cycle.charge_wh <= 0.0 {
        return;
    }
    let mut common = vec![("time base", CommonSign::Same)];
    if acc.same_current_meter {
        common.push(("current gain", CommonSign::Same));
        common.push(("current offset", CommonSign::Opposite));
    }
    u.coulombic_efficiency_pct = Some(ratio_budget(
        cycle.discharge_ah,
        &merge(q.0),
        cycle.charge_ah,
        &merge(q.1),
        &common,
    ));
    if acc.same_voltage_meter {
        common.push(("voltage gain", CommonSign::Same));
    }
    u.energy_efficiency_pct = Some(ratio_budget(
        cycle.discharge_wh,
        &merge(e.0),
        cycle.charge_wh,
        &merge(e.1),
        &common,
    ));
}

/// The resistance figure's budget: the reading the figure is, its two
/// levels' differences, and the scatter of the run's readings.
pub fn resistance(
    u: &mut Uncertainty,
    acc: &BenchAccuracy,
    r: &analysis::ResistanceResult,
    steps: &[StepSummary],
) {
    let Some(reading) = r.readings.iter().min_by(|a, b| {
        (a.dcir_mohm - r.dcir_mohm)
            .abs()
            .total_cmp(&(b.dcir_mohm - r.dcir_mohm).abs())
    }) else {
        return;
    };
    let (Some(v), Some(i)) = (acc.voltage.as_ref(), acc.discharge_current.as_ref()) else {
        return;
    };
    let m = steps
        .iter()
        .find(|s| s.step == reading.step)
        .and_then(|s| s.measure.as_ref());
    let values: Vec<f64> = r.readings.iter().map(|x| x.dcir_mohm).collect();
    // The figure is one reading; the scatter of several says how well one
    // reading repeats (s, not s/√n).
    let mut b = resistance_budget(
        r.dcir_mohm,
        reading.u2_v - reading.u1_v,
        reading.i2_a - reading.i1_a,
        v,
        i,
        (m.and_then(|m| m.noise_v), m.and_then(|m| m.noise_a)),
        &[],
    );
    if values.len() >= 3 {
        let n = values.len() as f64;
        let mean = values.iter().sum::<f64>() / n;
        let s = (values.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        // Readings at different states of charge differ for a reason:
        // their scatter is an upper bound of the repeatability, kept only
        // when the readings were taken at one state (common practice).
        if reading.soc_pct.is_none() {
            let mut terms = b.terms.clone();
            terms.push(Term {
                name: "repeatability (Type A)".into(),
                u: s,
                shape: analysis::uncertainty::Shape::Normal,
                correlated: false,
                basis: format!("s = {s:.3} mΩ over {} readings", values.len()),
            });
            b = Budget::of(r.dcir_mohm, "mΩ", terms);
        }
    }
    u.resistance_mohm = Some(b);
}
