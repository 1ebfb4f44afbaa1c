//! One verdict per run: the figures a user acts on (the capacity that
//! counts, state of health, the corrected capacity, resistance and its
//! growth, the efficiencies of the capacity step's cycle, the grade, the
//! new nominal, whether the run counts for the pack's history), judged
//! once by [`judge`] when the summary is built and read by every screen
//! (terminal, reports, label, console, index, central store, fade, fleet,
//! exports). A figure that was not measured is [`Figure::Absent`] with its
//! reason ([`Why`]), never a zero.

use analysis::fade::grade::{Grade, GradeInputs, Policy};
use analysis::{CapacityResult, CycleSummary, Recalibration, ResistanceResult, StepSummary};
use model::pack::Chemistry;
use model::status::RunStatus;
use serde::{Deserialize, Serialize};

/// A state of health above this is not a measurement of a used pack but a
/// wrong rating or a wrong log (a new pack gives a few percent over its
/// rating at most: common practice), %.
pub const SOH_PLAUSIBLE_MAX_PCT: f64 = 120.0;

/// Why a figure is absent.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Why {
    /// The run has no capacity discharge (a screening, resistance or
    /// unfinished run).
    NoCapacityStep,
    /// The capacity discharge did not start from a full charge.
    NotFromFullCharge,
    /// The log does not show that the discharge ended on its cutoff.
    CutoffUnknown,
    /// The discharge ended on something else than its cutoff.
    EndedBeforeCutoff,
    /// Analysed without a rated capacity.
    NoRating,
    /// The run did not complete.
    RunNotComplete,
    /// No resistance was measured.
    NoResistance,
    /// No rated resistance or earlier reading to compare with.
    NoReference,
    /// No cycle with both a charge and a discharge.
    NoFullCycle,
    /// IEEE 450 needs a lead-acid discharge at its rated current to its
    /// cutoff with a temperature.
    NotAnIeee450Test,
    /// The figure is outside what a pack can give (a wrong rating or log).
    Implausible,
    /// A record older than verdicts that does not hold the input.
    NotRecorded,
    /// The figure's uncertainty is too large for the policy's grade bins.
    TooUncertain,
}

impl Why {
    /// The reason in words, as every screen prints it.
    pub fn words(self) -> &'static str {
        match self {
            Why::NoCapacityStep => "no capacity discharge in this run",
            Why::NotFromFullCharge => "the capacity discharge did not start from a full charge",
            Why::CutoffUnknown => "the log does not show the discharge ended on its cutoff",
            Why::EndedBeforeCutoff => "the discharge ended before its cutoff",
            Why::NoRating => "no rated capacity given",
            Why::RunNotComplete => "the run did not complete",
            Why::NoResistance => "no resistance measured",
            Why::NoReference => "no rated or earlier resistance to compare with",
            Why::NoFullCycle => "no cycle with both a charge and a discharge",
            Why::NotAnIeee450Test => "not a lead-acid discharge at its rated current to its cutoff",
            Why::Implausible => "implausible (check the rating and the log)",
            Why::NotRecorded => "not in this older record",
            Why::TooUncertain => "the uncertainty is too large for the policy's grade bins",
        }
    }
}

impl std::fmt::Display for Why {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.words())
    }
}

/// A figure, or why there is none.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Figure<T> {
    Value(T),
    Absent(Why),
}

impl<T> Figure<T> {
    pub fn value(&self) -> Option<&T> {
        match self {
            Figure::Value(v) => Some(v),
            Figure::Absent(_) => None,
        }
    }
    pub fn why(&self) -> Option<Why> {
        match self {
            Figure::Value(_) => None,
            Figure::Absent(w) => Some(*w),
        }
    }
    fn from_option(v: Option<T>, why: Why) -> Figure<T> {
        match v {
            Some(v) => Figure::Value(v),
            None => Figure::Absent(why),
        }
    }
}

impl Figure<f64> {
    /// The number, if there is one.
    pub fn get(&self) -> Option<f64> {
        self.value().copied()
    }
    /// The number with `decimals` and `unit`, or "not measured (why)".
    pub fn show(&self, decimals: usize, unit: &str) -> String {
        match self {
            Figure::Value(v) => format!("{v:.decimals$}{unit}"),
            Figure::Absent(w) => format!("not measured ({w})"),
        }
    }
}

impl Default for Figure<f64> {
    fn default() -> Self {
        Figure::Absent(Why::NotRecorded)
    }
}

impl Default for Figure<Grade> {
    fn default() -> Self {
        Figure::Absent(Why::NotRecorded)
    }
}

/// The resistance reference growth is measured against, and where it
/// came from.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Reference {
    pub mohm: f64,
    /// `rated` or `run <id>`.
    pub source: String,
}

/// The verdict of one run.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
pub struct Verdict {
    /// The step whose capacity counts (the capacity discharge).
    pub capacity_step: Option<u32>,
    pub measured_ah: Figure<f64>,
    pub measured_wh: Figure<f64>,
    /// Did the capacity step start from a full charge (absent: no step)?
    pub from_full_charge: Option<bool>,
    /// Did it end on its cutoff (absent: not known)?
    pub ended_on_cutoff: Option<bool>,
    /// Mean discharge current as a C-rate of the rating.
    pub test_rate_c: Figure<f64>,
    /// The rated rate the corrections aim at.
    pub rated_rate_c: Option<f64>,
    pub initial_temperature_c: Option<f64>,
    /// The capacity as far as it was corrected (see `conditions`).
    pub corrected_ah: Figure<f64>,
    /// What was done to the measured capacity, in words (only what was done).
    #[serde(default)]
    pub conditions: String,
    /// State of health: corrected / rated × 100.
    pub soh_pct: Figure<f64>,
    /// State of health on the measured capacity.
    pub soh_measured_pct: Figure<f64>,
    /// IEEE 450 percent capacity (lead-acid).
    pub ieee450_percent: Figure<f64>,
    pub resistance_mohm: Figure<f64>,
    pub resistance_reference: Option<Reference>,
    /// This run's resistance against the reference, %.
    pub resistance_growth_pct: Figure<f64>,
    /// The cycle the efficiencies are of: the capacity step's, else the
    /// last complete one.
    pub efficiency_cycle: Option<u32>,
    pub coulombic_efficiency_pct: Figure<f64>,
    pub energy_efficiency_pct: Figure<f64>,
    pub grade: Figure<Grade>,
    pub new_nominal_ah: Figure<f64>,
    /// Whether the run enters the pack's capacity history (fade, fleet).
    pub counts_for_history: bool,
    /// Why it does not.
    pub not_counted: Option<Why>,
    /// Changes the measurement cannot explain, set against the pack's
    /// history (an import's jump).
    #[serde(default)]
    pub flags: Vec<String>,
    /// Each figure's uncertainty budget (GUM), or why there are none.
    #[serde(default)]
    pub uncertainty: crate::budget::Uncertainty,
}

/// What a verdict is judged from.
pub struct Inputs<'a> {
    pub status: RunStatus,
    pub chemistry: Chemistry,
    /// The rating (absent: analysed without one).
    pub rated_ah: Option<f64>,
    pub rated_rate_c: Option<f64>,
    pub capacity: Option<&'a CapacityResult>,
    pub recalibration: Option<&'a Recalibration>,
    pub resistance: Option<&'a ResistanceResult>,
    pub reference: Option<Reference>,
    pub steps: &'a [StepSummary],
    pub cycles: &'a [CycleSummary],
    pub groups: Option<&'a analysis::groups::GroupsResult>,
    /// The grading policy (absent: no grade, e.g. no rating).
    pub policy: Option<&'a Policy>,
    /// The stated accuracy of the readings (absent: no budgets).
    pub accuracy: Option<&'a model::accuracy::BenchAccuracy>,
    /// The zero offsets were read before the run and subtracted.
    pub tare: Option<analysis::uncertainty::Tare>,
}

/// Judge a run once. Returns the verdict and the warnings it adds.
pub fn judge(x: &Inputs<'_>) -> (Verdict, Vec<String>) {
    let mut warnings = Vec::new();
    let cap = x.capacity;
    let complete = x.status.is_complete();
    let measured_ah = Figure::from_option(cap.map(|c| c.measured_ah), Why::NoCapacityStep);
    let measured_wh = Figure::from_option(cap.map(|c| c.measured_wh), Why::NoCapacityStep);
    // Why the capacity is not the pack's (in order of what a user fixes first).
    let not_capacity = match cap {
        None => Some(Why::NoCapacityStep),
        Some(_) if !complete => Some(Why::RunNotComplete),
        Some(c) if !c.from_full_charge => Some(Why::NotFromFullCharge),
        Some(_) => None,
    };
    let rated = x.rated_ah.filter(|r| *r > 0.0);
    let corrected = match (cap, rated) {
        (None, _) => Figure::Absent(Why::NoCapacityStep),
        (Some(_), None) => Figure::Absent(Why::NoRating),
        (Some(c), Some(_)) => Figure::from_option(c.corrected_ah, Why::NoRating),
    };
    let soh_of = |ah: Option<f64>| -> Figure<f64> {
        if let Some(w) = not_capacity {
            return Figure::Absent(w);
        }
        match (ah, rated) {
            (Some(a), Some(r)) => {
                let soh = analysis::soh_pct(a, r);
                if soh.is_finite() && soh <= SOH_PLAUSIBLE_MAX_PCT {
                    Figure::Value(soh)
                } else {
                    Figure::Absent(Why::Implausible)
                }
            }
            _ => Figure::Absent(Why::NoRating),
        }
    };
    let soh = soh_of(corrected.get());
    let soh_measured = soh_of(cap.map(|c| c.measured_ah));
    if soh.why() == Some(Why::Implausible) {
        if let (Some(c), Some(r)) = (corrected.get(), rated) {
            warnings.push(format!(
                "the capacity {c:.3} Ah is {:.1} % of the rated {r:.3} Ah, more than a pack gives ({SOH_PLAUSIBLE_MAX_PCT} %): no state of health or grade is taken from it; check the rating and the log",
                c / r * 100.0
            ));
        }
    }
    let ieee450 = match cap.and_then(|c| c.ieee450_percent) {
        Some(p) if not_capacity.is_none() => Figure::Value(p),
        Some(_) => Figure::Absent(not_capacity.unwrap_or(Why::NoCapacityStep)),
        None => Figure::Absent(match cap {
            None => Why::NoCapacityStep,
            Some(_) => Why::NotAnIeee450Test,
        }),
    };
    let resistance = Figure::from_option(x.resistance.map(|r| r.dcir_mohm), Why::NoResistance);
    let growth = match (resistance.get(), &x.reference) {
        (None, _) => Figure::Absent(Why::NoResistance),
        (Some(_), None) => Figure::Absent(Why::NoReference),
        (Some(r), Some(r0)) if r0.mohm > 0.0 => Figure::Value((r / r0.mohm - 1.0) * 100.0),
        (Some(_), Some(_)) => Figure::Absent(Why::NoReference),
    };
    // The cycle of the capacity step (a full charge and the full
    // discharge); without a capacity step, the last complete cycle.
    let cycle = match cap {
        Some(c) => x.steps.iter().find(|s| s.step == c.step).map(|s| s.cycle),
        None => x
            .cycles
            .iter()
            .rev()
            .find(|c| c.coulombic_efficiency_pct.is_some())
            .map(|c| c.cycle),
    };
    let cyc = x.cycles.iter().find(|c| Some(c.cycle) == cycle);
    let ce = Figure::from_option(
        cyc.and_then(|c| c.coulombic_efficiency_pct),
        Why::NoFullCycle,
    );
    let ee = Figure::from_option(cyc.and_then(|c| c.energy_efficiency_pct), Why::NoFullCycle);
    let uncertainty = uncertainty_of(x, cyc, rated);
    let u_of = |b: &Option<analysis::uncertainty::Budget>| b.as_ref().map(|b| b.u);
    // Growth against a reference known exactly: u(R)/R0.
    let growth_u = match (&uncertainty.resistance_mohm, &x.reference) {
        (Some(b), Some(r0)) if r0.mohm > 0.0 => Some(b.u / r0.mohm * 100.0),
        _ => None,
    };
    let soh_u = soh.get().and(u_of(&uncertainty.soh_pct));
    // A grade stands on a state of health: a capacity that did not start
    // from a full charge grades nothing, nor does a run without one.
    let grade = match (soh.get(), x.policy) {
        (Some(_), Some(p)) if p.refuses(x.chemistry, soh_u).is_some() => {
            if let Some(w) = p.refuses(x.chemistry, soh_u) {
                warnings.push(w);
            }
            Figure::Absent(Why::TooUncertain)
        }
        (Some(s), Some(p)) => Figure::Value(p.grade(&GradeInputs {
            chemistry: x.chemistry,
            soh_pct: Some(s),
            resistance_growth_pct: growth.get(),
            coulombic_efficiency_pct: ce.get(),
            weakest_group: x.groups.and_then(|g| g.weakest),
            weakest_group_share_pct: x.groups.and_then(|g| g.weakest_share_pct),
            group_capacity_spread_pct: x.groups.and_then(|g| g.capacity_spread_pct),
            soh_u,
            resistance_growth_u: growth.get().and(growth_u),
            ce_u: ce.get().and(u_of(&uncertainty.coulombic_efficiency_pct)),
        })),
        (Some(_), None) => Figure::Absent(Why::NoRating),
        (None, _) => Figure::Absent(soh.why().unwrap_or(Why::NoCapacityStep)),
    };
    // A new nominal only from a full charge to a known cutoff.
    let new_nominal = if let Some(w) = soh.why() {
        Figure::Absent(w)
    } else {
        match (cap.and_then(|c| c.ended_on_cutoff), x.recalibration) {
            (Some(true), Some(r)) => Figure::Value(r.suggested_nominal_ah),
            (Some(false), _) => Figure::Absent(Why::EndedBeforeCutoff),
            (None, _) => Figure::Absent(Why::CutoffUnknown),
            (Some(true), None) => Figure::Absent(Why::NotFromFullCharge),
        }
    };
    let not_counted = soh.why();
    let v = Verdict {
        capacity_step: cap.map(|c| c.step),
        measured_ah,
        measured_wh,
        from_full_charge: cap.map(|c| c.from_full_charge),
        ended_on_cutoff: cap.and_then(|c| c.ended_on_cutoff),
        test_rate_c: match cap {
            None => Figure::Absent(Why::NoCapacityStep),
            Some(c) => Figure::from_option(c.c_rate.filter(|_| rated.is_some()), Why::NoRating),
        },
        rated_rate_c: rated.and(x.rated_rate_c),
        initial_temperature_c: cap.and_then(|c| c.initial_temperature_c),
        corrected_ah: corrected,
        conditions: cap.map(|c| c.conditions()).unwrap_or_default(),
        soh_pct: soh,
        soh_measured_pct: soh_measured,
        ieee450_percent: ieee450,
        resistance_mohm: resistance,
        resistance_reference: x.reference.clone(),
        resistance_growth_pct: growth,
        efficiency_cycle: cycle.filter(|_| cyc.is_some()),
        coulombic_efficiency_pct: ce,
        energy_efficiency_pct: ee,
        grade,
        new_nominal_ah: new_nominal,
        counts_for_history: not_counted.is_none(),
        not_counted,
        flags: Vec::new(),
        uncertainty,
    };
    (v, warnings)
}

/// Each figure's budget from the record's stated accuracy; a figure that
/// is absent has no budget.
fn uncertainty_of(
    x: &Inputs<'_>,
    cycle: Option<&analysis::CycleSummary>,
    rated: Option<f64>,
) -> crate::budget::Uncertainty {
    let mut u = crate::budget::budgets(&crate::budget::BudgetInputs {
        accuracy: x.accuracy,
        tare: x.tare,
        chemistry: x.chemistry,
        rated_ah: rated,
        rated_rate_c: x.rated_rate_c,
        capacity: x.capacity,
        steps: x.steps,
    });
    if let Some(acc) = x.accuracy {
        if let Some(c) = cycle.filter(|c| c.coulombic_efficiency_pct.is_some()) {
            crate::budget::efficiency_budgets(&mut u, acc, x.tare, c, x.steps);
        }
        if let Some(r) = x.resistance {
            crate::budget::resistance(&mut u, acc, r, x.steps);
        }
    }
    u
}

impl Verdict {
    /// The grade's label, if graded.
    pub fn grade_label(&self) -> Option<&str> {
        self.grade.value().map(|g| g.label.as_str())
    }

    /// One line for `--quiet` and logs: every figure from this verdict.
    pub fn line(&self) -> String {
        let u = &self.uncertainty;
        let with =
            |f: &Figure<f64>, b: &Option<analysis::uncertainty::Budget>, d: usize, unit: &str| {
                match (f.get(), b) {
                    (Some(_), Some(b)) => b.short(),
                    _ => f.show(d, unit),
                }
            };
        format!(
            "capacity {} (measured {}), SoH {}, grade {}",
            with(&self.corrected_ah, &u.corrected_ah, 3, " Ah"),
            with(&self.measured_ah, &u.measured_ah, 3, " Ah"),
            with(&self.soh_pct, &u.soh_pct, 1, " %"),
            match &self.grade {
                Figure::Value(g) => match &g.decision {
                    Some(d) if d.retest => format!("{} (retest)", g.label),
                    Some(d) if d.conditional => format!("{} (conditional)", g.label),
                    _ => g.label.clone(),
                },
                Figure::Absent(w) => format!("none ({w})"),
            }
        )
    }
}

impl<'a> Inputs<'a> {
    /// What a summary holds to judge it by: its rating, capacity,
    /// resistance, steps, cycles and groups.
    pub fn of_summary(
        s: &'a crate::Summary,
        reference: Option<Reference>,
        policy: Option<&'a Policy>,
    ) -> Inputs<'a> {
        Inputs {
            status: s.status,
            chemistry: s.pack.chemistry,
            rated_ah: s.pack.rated_capacity_ah,
            rated_rate_c: s.pack.rated_rate_c,
            capacity: s.capacity.as_ref(),
            recalibration: s.recalibration.as_ref(),
            resistance: s.resistance.as_ref(),
            reference,
            steps: &s.steps,
            cycles: &s.cycles,
            groups: s.groups.as_ref(),
            policy,
            accuracy: s.accuracy.as_ref(),
            tare: s.preflight.as_ref().filter(|p| p.corrected).map(|_| {
                analysis::uncertainty::Tare {
                    readings: crate::budget::TARE_READINGS,
                }
            }),
        }
    }
}

/// A summary older than verdicts: judged from the figures it holds, its
/// recorded grade kept (its policy is not known here).
pub fn judge_older(s: &mut crate::Summary) {
    let (mut v, _) = judge(&Inputs::of_summary(s, None, None));
    v.grade = match (s.older_grade.take(), v.soh_pct.why()) {
        (Some(g), None) => Figure::Value(g),
        (_, Some(w)) => Figure::Absent(w),
        (None, None) => Figure::Absent(Why::NotRecorded),
    };
    v.resistance_growth_pct = Figure::Absent(Why::NotRecorded);
    s.verdict = v;
}

/// Judge a summary again from the figures it holds (after they were
/// changed: a made-up fleet, an import set against its pack, a rating
/// taken away), keeping its resistance reference and flags.
pub fn rejudge(s: &mut crate::Summary, policy: Option<&Policy>) {
    let reference = s.verdict.resistance_reference.clone();
    let flags = std::mem::take(&mut s.verdict.flags);
    let (mut v, _) = judge(&Inputs::of_summary(s, reference, policy));
    v.flags = flags;
    s.verdict = v;
}

#[cfg(test)]
mod tests {
    use super::*;

    fn capacity(measured_ah: f64, from_full: bool, on_cutoff: Option<bool>) -> CapacityResult {
        CapacityResult {
            step: 3,
            measured_ah,
            measured_wh: measured_ah * 36.0,
            rated_ah: Some(14.0),
            mean_current_a: 2.8,
            c_rate: Some(0.2),
            duration_s: measured_ah / 2.8 * 3600.0,
            end_voltage_v: Some(30.0),
            ended_on_cutoff: on_cutoff,
            corrected_ah: Some(measured_ah),
            corrections: Vec::new(),
            initial_temperature_c: Some(25.0),
            ieee450_percent: None,
            from_full_charge: from_full,
            preceded_by: String::new(),
        }
    }

    fn recal(ah: f64) -> Recalibration {
        Recalibration {
            full_charge_capacity_ah: ah,
            suggested_nominal_ah: ah,
            measured_ah: ah,
            energy_wh: ah * 36.0,
            rate_c: 0.2,
            current_a: 2.8,
            end_voltage_v: Some(30.0),
            initial_temperature_c: Some(25.0),
            ended_on_cutoff: true,
            conditions: String::new(),
        }
    }

    fn judged(
        c: Option<&CapacityResult>,
        r: Option<&Recalibration>,
        rated: Option<f64>,
    ) -> Verdict {
        let policy = Policy::default_policy();
        judge(&Inputs {
            status: RunStatus::Completed,
            chemistry: Chemistry::LiIon,
            rated_ah: rated,
            rated_rate_c: Some(0.2),
            capacity: c,
            recalibration: r,
            resistance: None,
            reference: None,
            steps: &[],
            cycles: &[],
            groups: None,
            policy: Some(&policy),
            accuracy: None,
            tare: None,
        })
        .0
    }

    #[test]
    fn a_full_test_to_its_cutoff_has_every_figure() {
        let c = capacity(12.6, true, Some(true));
        let v = judged(Some(&c), Some(&recal(12.6)), Some(14.0));
        assert!((v.soh_pct.get().unwrap() - 90.0).abs() < 1e-9);
        assert_eq!(v.grade_label(), Some("A"));
        assert_eq!(v.new_nominal_ah.get(), Some(12.6));
        assert!(v.counts_for_history);
        // No resistance: absent with its reason, not a zero.
        assert_eq!(v.resistance_growth_pct, Figure::Absent(Why::NoResistance));
    }

    #[test]
    fn each_absence_has_its_reason() {
        let v = judged(Some(&capacity(6.5, false, Some(true))), None, Some(14.0));
        assert_eq!(v.soh_pct, Figure::Absent(Why::NotFromFullCharge));
        assert_eq!(v.grade.why(), Some(Why::NotFromFullCharge));
        assert_eq!(v.new_nominal_ah.why(), Some(Why::NotFromFullCharge));
        assert!(!v.counts_for_history);
        // A state of health, but no new nominal from an unknown cutoff.
        let v = judged(Some(&capacity(12.6, true, None)), None, Some(14.0));
        assert!(v.soh_pct.get().is_some());
        assert_eq!(v.new_nominal_ah, Figure::Absent(Why::CutoffUnknown));
        let v = judged(Some(&capacity(12.6, true, Some(false))), None, Some(14.0));
        assert_eq!(v.new_nominal_ah, Figure::Absent(Why::EndedBeforeCutoff));
        // No rating.
        let v = judged(Some(&capacity(12.6, true, Some(true))), None, None);
        assert_eq!(v.soh_pct, Figure::Absent(Why::NoRating));
        assert_eq!(v.corrected_ah, Figure::Absent(Why::NoRating));
        // Implausible: 150 % of the rating.
        let v = judged(Some(&capacity(21.0, true, Some(true))), None, Some(14.0));
        assert_eq!(v.soh_pct, Figure::Absent(Why::Implausible));
        assert!(v.grade.value().is_none());
        // No capacity step.
        let v = judged(None, None, Some(14.0));
        assert_eq!(v.measured_ah, Figure::Absent(Why::NoCapacityStep));
        assert_eq!(v.soh_pct, Figure::Absent(Why::NoCapacityStep));
    }

    #[test]
    fn growth_is_against_the_named_reference() {
        let policy = Policy::default_policy();
        let c = capacity(12.6, true, Some(true));
        let r = ResistanceResult {
            dcir_mohm: 60.0,
            method: "two-level".into(),
            why: String::new(),
            readings: Vec::new(),
        };
        let (v, _) = judge(&Inputs {
            status: RunStatus::Completed,
            chemistry: Chemistry::LiIon,
            rated_ah: Some(14.0),
            rated_rate_c: Some(0.2),
            capacity: Some(&c),
            recalibration: None,
            resistance: Some(&r),
            reference: Some(Reference {
                mohm: 40.0,
                source: "run A".into(),
            }),
            steps: &[],
            cycles: &[],
            groups: None,
            policy: Some(&policy),
            accuracy: None,
            tare: None,
        });
        assert!((v.resistance_growth_pct.get().unwrap() - 50.0).abs() < 1e-9);
        // 50 % growth: not grade A (≤ 25 %) although the SoH is 90 %.
        assert_eq!(v.grade_label(), Some("B"));
        let j = serde_json::to_value(&v).unwrap();
        assert_eq!(j["resistance_growth_pct"]["value"], 50.0);
        assert_eq!(j["ieee450_percent"]["absent"], "not_an_ieee450_test");
    }

    fn inputs<'a>(
        c: Option<&'a CapacityResult>,
        cycles: &'a [CycleSummary],
        steps: &'a [StepSummary],
        policy: &'a Policy,
    ) -> Inputs<'a> {
        Inputs {
            status: RunStatus::Completed,
            chemistry: Chemistry::LiIon,
            rated_ah: Some(14.0),
            rated_rate_c: Some(0.2),
            capacity: c,
            recalibration: None,
            resistance: None,
            reference: None,
            steps,
            cycles,
            groups: None,
            policy: Some(policy),
            accuracy: None,
            tare: None,
        }
    }

    fn cycle(n: u32, ce: Option<f64>) -> CycleSummary {
        CycleSummary {
            cycle: n,
            charge_ah: 13.0,
            discharge_ah: 12.6,
            charge_wh: 480.0,
            discharge_wh: 450.0,
            coulombic_efficiency_pct: ce,
            energy_efficiency_pct: ce.map(|c| c - 5.0),
        }
    }

    fn step(n: u32, cycle: u32) -> StepSummary {
        serde_json::from_value(serde_json::json!({
            "step": n, "phase": "p", "cycle": cycle, "kind": "discharge", "name": null,
            "samples": 10, "start_s": 0.0, "duration_s": 10.0, "charge_ah": -1.0,
            "energy_wh": -3.6, "charge_in_ah": 0.0, "charge_out_ah": 1.0,
            "energy_in_wh": 0.0, "energy_out_wh": 3.6, "start_voltage_v": 4.0,
            "end_voltage_v": 3.0, "min_voltage_v": 3.0, "max_voltage_v": 4.0,
            "mean_current_a": -1.0, "max_temperature_c": null, "end_kind": "voltage_below",
            "end_reason": null
        }))
        .unwrap()
    }

    /// The efficiencies are the capacity step's own cycle's; without a
    /// capacity step, the last cycle that has them; none: why.
    #[test]
    fn efficiencies_come_from_the_capacity_steps_cycle() {
        let policy = Policy::default_policy();
        let c = capacity(12.6, true, Some(true));
        let cycles = [cycle(1, Some(97.0)), cycle(2, Some(96.0)), cycle(3, None)];
        let steps = [step(3, 1)];
        let (v, _) = judge(&inputs(Some(&c), &cycles, &steps, &policy));
        assert_eq!(v.efficiency_cycle, Some(1));
        assert_eq!(v.coulombic_efficiency_pct.get(), Some(97.0));
        assert_eq!(v.energy_efficiency_pct.get(), Some(92.0));
        let (v, _) = judge(&inputs(None, &cycles, &steps, &policy));
        assert_eq!(v.efficiency_cycle, Some(2));
        assert_eq!(v.coulombic_efficiency_pct.get(), Some(96.0));
        let (v, _) = judge(&inputs(None, &cycles[2..], &steps, &policy));
        assert_eq!(v.efficiency_cycle, None);
        assert_eq!(v.coulombic_efficiency_pct, Figure::Absent(Why::NoFullCycle));
        assert_eq!(v.energy_efficiency_pct, Figure::Absent(Why::NoFullCycle));
    }

    /// A run that did not complete, a rating of zero, a growth reference
    /// of zero and an implausible capacity's warning; the test rate needs
    /// the rating; the line for --quiet.
    #[test]
    fn the_rest_of_the_verdicts_rules() {
        let policy = Policy::default_policy();
        let c = capacity(12.6, true, Some(true));
        let mut x = inputs(Some(&c), &[], &[], &policy);
        x.status = RunStatus::Interrupted;
        let (v, _) = judge(&x);
        assert_eq!(v.soh_pct, Figure::Absent(Why::RunNotComplete));
        assert_eq!(v.measured_ah.get(), Some(12.6), "the figure is kept");
        x.status = RunStatus::Completed;
        x.rated_ah = Some(0.0);
        let (v, _) = judge(&x);
        assert_eq!(v.soh_pct, Figure::Absent(Why::NoRating));
        assert_eq!(v.test_rate_c, Figure::Absent(Why::NoRating));
        assert_eq!(v.rated_rate_c, None);
        x.rated_ah = Some(14.0);
        let (v, w) = judge(&x);
        assert_eq!(v.test_rate_c.get(), Some(0.2));
        assert_eq!(v.rated_rate_c, Some(0.2));
        assert!(w.is_empty());
        assert_eq!(v.capacity_step, Some(3));
        assert_eq!(v.from_full_charge, Some(true));
        assert_eq!(v.initial_temperature_c, Some(25.0));
        assert_eq!(
            v.line(),
            "capacity 12.600 Ah (measured 12.600 Ah), SoH 90.0 %, grade A"
        );
        // 120 % of the rating is the most a pack gives; over it, said.
        let at = capacity(16.8, true, Some(true));
        let (v, w) = judge(&inputs(Some(&at), &[], &[], &policy));
        assert!(
            (v.soh_pct.get().unwrap() - 120.0).abs() < 1e-9,
            "{:?}",
            v.soh_pct
        );
        assert!(w.is_empty());
        let over = capacity(16.9, true, Some(true));
        let (v, w) = judge(&inputs(Some(&over), &[], &[], &policy));
        assert_eq!(v.soh_pct, Figure::Absent(Why::Implausible));
        assert!(
            w[0].contains("16.900 Ah is 120.7 % of the rated 14.000 Ah"),
            "{w:?}"
        );
        assert_eq!(v.line(), "capacity 16.900 Ah (measured 16.900 Ah), SoH not measured (implausible (check the rating and the log)), grade none (implausible (check the rating and the log))");
        // A reference of zero gives no growth.
        let r = ResistanceResult {
            dcir_mohm: 60.0,
            method: String::new(),
            why: String::new(),
            readings: Vec::new(),
        };
        let mut x = inputs(Some(&c), &[], &[], &policy);
        x.resistance = Some(&r);
        x.reference = Some(Reference {
            mohm: 0.0,
            source: "rated".into(),
        });
        assert_eq!(
            judge(&x).0.resistance_growth_pct,
            Figure::Absent(Why::NoReference)
        );
        x.reference = None;
        assert_eq!(
            judge(&x).0.resistance_growth_pct,
            Figure::Absent(Why::NoReference)
        );
        assert_eq!(judge(&x).0.resistance_mohm.get(), Some(60.0));
        // An IEEE 450 figure from a full test; from one that did not start
        // full, absent with that reason.
        let mut la = capacity(12.6, true, Some(true));
        la.ieee450_percent = Some(93.0);
        assert_eq!(
            judge(&inputs(Some(&la), &[], &[], &policy))
                .0
                .ieee450_percent
                .get(),
            Some(93.0)
        );
        la.from_full_charge = false;
        assert_eq!(
            judge(&inputs(Some(&la), &[], &[], &policy))
                .0
                .ieee450_percent,
            Figure::Absent(Why::NotFromFullCharge)
        );
        // Figures printed, or why not.
        assert_eq!(Figure::Value(12.3456).show(2, " Ah"), "12.35 Ah");
        assert_eq!(
            Figure::<f64>::Absent(Why::NoRating).show(2, " Ah"),
            "not measured (no rated capacity given)"
        );
        assert_eq!(Figure::<f64>::default(), Figure::Absent(Why::NotRecorded));
    }

    /// With the bench's accuracy stated, the resistance has a budget and
    /// its growth's u is u(R)/R0 × 100 (the reference taken as exact): for
    /// a reading of 60 mΩ against 40 mΩ, the growth is 50 % ± that.
    #[test]
    fn growths_uncertainty_is_the_resistances_over_the_reference() {
        let policy = Policy::default_policy();
        let spec = |pct: f64| model::accuracy::Spec {
            reading_pct: pct,
            range_pct: 0.0,
            offset: 0.001,
            resolution: 0.0001,
            calibrated: false,
        };
        let acc = model::accuracy::BenchAccuracy {
            voltage: Some(spec(0.05)),
            charge_current: Some(spec(0.1)),
            discharge_current: Some(spec(0.1)),
            same_current_meter: false,
            same_voltage_meter: false,
            timebase_ppm: None,
            temperature_c: None,
            stated_by: Vec::new(),
            examples: false,
        };
        let reading = analysis::resistance::ResistanceReading {
            step: 4,
            dcir_mohm: 60.0,
            method: "two-level".into(),
            u1_v: 3.70,
            i1_a: -1.0,
            u2_v: 3.58,
            i2_a: -3.0,
            t1_s: 10.0,
            t2_s: 11.0,
            soc_pct: Some(50.0),
            ah_since_full: None,
        };
        let r = ResistanceResult {
            dcir_mohm: 60.0,
            method: "two-level".into(),
            why: String::new(),
            readings: vec![reading],
        };
        let c = capacity(12.6, true, Some(true));
        let mut x = inputs(Some(&c), &[], &[], &policy);
        x.accuracy = Some(&acc);
        x.resistance = Some(&r);
        x.reference = Some(Reference {
            mohm: 40.0,
            source: "run A".into(),
        });
        let (v, _) = judge(&x);
        let ur = v
            .uncertainty
            .resistance_mohm
            .as_ref()
            .expect("a resistance budget")
            .u;
        assert!(ur > 0.0);
        assert!((v.resistance_growth_pct.get().unwrap() - 50.0).abs() < 1e-9);
        // The growth's u reaches the grade: 50 % sits on grade B's 50 %
        // ceiling, inside its guard band w = U = 2·u(R)/R0·100 points: B
        // is missed there, and the grade given is conditional.
        let d = v.grade.value().unwrap().decision.clone().unwrap();
        let w = 2.0 * ur / 40.0 * 100.0;
        assert!(d.conditional, "{d:?}");
        assert!(
            d.in_band[0].contains(&format!("resistance growth 50.0 % <= 50 % (conditional pass: within the guard band of {w:.1} points)")),
            "{d:?}"
        );
        let g = GradeInputs {
            chemistry: Chemistry::LiIon,
            soh_pct: v.soh_pct.get(),
            resistance_growth_pct: Some(25.2),
            coulombic_efficiency_pct: None,
            weakest_group: None,
            weakest_group_share_pct: None,
            group_capacity_spread_pct: None,
            soh_u: None,
            resistance_growth_u: Some(ur / 40.0 * 100.0),
            ce_u: None,
        };
        // 25.2 % against the 25 % ceiling with U = 2·u(R)/R0·100 over 0.2:
        // inside the band, the lower grade, conditional.
        assert!(2.0 * ur / 40.0 * 100.0 > 0.2, "{ur}");
        let graded = policy.grade(&g);
        assert!(graded.decision.unwrap().conditional);
        // A reference of zero: no growth and no u for it.
        x.reference = Some(Reference {
            mohm: 0.0,
            source: "rated".into(),
        });
        let (v, _) = judge(&x);
        assert_eq!(v.resistance_growth_pct, Figure::Absent(Why::NoReference));
    }
}
