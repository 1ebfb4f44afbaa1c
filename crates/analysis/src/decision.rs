//! Decision rules: judging a measured figure against a limit when the
//! figure has an uncertainty (ILAC-G8:09/2019; ISO 14253-1:2017;
//! JCGM 106:2012). A grading policy names its rule; every grade boundary
//! is judged with it.
//!
//! For a lower limit L, a result y with standard uncertainty u and a guard
//! band w (ILAC-G8 4.2.3, non-binary): y ≥ L + w pass; L ≤ y < L + w
//! conditional pass; L − w ≤ y < L conditional fail; y < L − w fail. The
//! probability that the true value lies below L is Φ((L − y)/u) (a normal
//! distribution of the measurand; JCGM 106 7.3). An upper limit is the
//! mirror image.

use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, Normal};

/// The standard normal CDF Φ.
pub fn phi(z: f64) -> f64 {
    match Normal::new(0.0, 1.0) {
        Ok(n) => n.cdf(z),
        Err(_) => f64::NAN,
    }
}

/// Its inverse.
pub fn phi_inv(p: f64) -> f64 {
    match Normal::new(0.0, 1.0) {
        Ok(n) => n.inverse_cdf(p),
        Err(_) => f64::NAN,
    }
}

/// The conformance probability of a result y with standard uncertainty u
/// to a tolerance interval [lo, hi] (JCGM 106:2012 7.2, a normal PDF).
pub fn conformance_probability(y: f64, u: f64, lo: Option<f64>, hi: Option<f64>) -> f64 {
    let above_lo = lo.map_or(1.0, |l| 1.0 - phi((l - y) / u));
    let below_hi = hi.map_or(1.0, |h| phi((h - y) / u));
    (above_lo + below_hi - 1.0).clamp(0.0, 1.0)
}

/// How a policy judges a figure against a grade's limit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case", tag = "rule")]
pub enum Rule {
    /// Simple acceptance (ILAC-G8 4.2.1): the figure as measured against
    /// the limit; the false-accept risk at the limit is up to 50 %.
    Simple,
    /// A guard band w = m·U (ILAC-G8 4.2.2/4.2.3): w = U keeps the
    /// false-accept risk under 2.5 %, 0.83·U under 5 % (ISO 14253-1).
    GuardBand { multiple_of_u: f64 },
    /// A guard band from a specific risk of false accept α (JCGM 106):
    /// w = z(1−α)·u.
    SpecificRisk { max_false_accept: f64 },
}

impl Rule {
    /// The guard band for a result of standard uncertainty u, expanded
    /// with coverage factor k.
    pub fn guard_band(&self, u: f64, k: f64) -> f64 {
        match *self {
            Rule::Simple => 0.0,
            Rule::GuardBand { multiple_of_u } => multiple_of_u * k * u,
            Rule::SpecificRisk { max_false_accept } => phi_inv(1.0 - max_false_accept) * u,
        }
    }

    /// The rule in words, as the card and the report state it.
    pub fn words(&self) -> String {
        match *self {
            Rule::Simple => "simple acceptance (ILAC-G8:09/2019 4.2.1): each figure as measured against its limit; the risk of a false accept at a limit is up to 50 %".into(),
            Rule::GuardBand { multiple_of_u } => format!(
                "guard band w = {multiple_of_u}·U (ILAC-G8:09/2019 4.2.3): a grade is given where the figure clears its limit by w; the risk of a false accept at the limit is under {:.2} %",
                phi(-multiple_of_u * 2.0) * 100.0
            ),
            Rule::SpecificRisk { max_false_accept } => format!(
                "specific risk (JCGM 106:2012): a grade is given where the probability that the pack is below its limit is at most {:.1} % (w = {:.2}·u)",
                max_false_accept * 100.0,
                phi_inv(1.0 - max_false_accept)
            ),
        }
    }
}

/// What happens to a result inside a guard band.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum InBand {
    /// The lower grade, marked conditional.
    Conditional,
    /// The lower grade, marked "retest".
    Retest,
}

/// A policy's decision rule.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct DecisionRule {
    pub rule: Rule,
    pub in_band: InBand,
    /// Refuse to grade where U exceeds this share of the narrowest grade
    /// bin's half-width (metrology.md §2 rule 5: 0.25, a 4:1 ratio).
    pub max_u_to_bin: Option<f64>,
}

impl Default for DecisionRule {
    /// Simple acceptance: what a policy without a `[decision]` table
    /// means (as grading did before rules were stated).
    fn default() -> Self {
        DecisionRule {
            rule: Rule::Simple,
            in_band: InBand::Conditional,
            max_u_to_bin: None,
        }
    }
}

/// The outcome at one limit (ILAC-G8 4.2.3).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    Pass,
    ConditionalPass,
    ConditionalFail,
    Fail,
}

impl Outcome {
    pub fn words(self) -> &'static str {
        match self {
            Outcome::Pass => "pass",
            Outcome::ConditionalPass => "conditional pass",
            Outcome::ConditionalFail => "conditional fail",
            Outcome::Fail => "fail",
        }
    }
    /// Inside the guard band either side of the limit.
    pub fn in_band(self) -> bool {
        matches!(self, Outcome::ConditionalPass | Outcome::ConditionalFail)
    }
}

/// A figure judged against one limit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Judged {
    pub criterion: String,
    pub value: f64,
    pub limit: f64,
    /// The limit is a floor (state of health) or a ceiling (growth).
    pub at_least: bool,
    /// Standard uncertainty (absent: none known; judged as measured).
    pub u: Option<f64>,
    pub guard_band: f64,
    pub outcome: Outcome,
    /// The probability that the true value is on the wrong side of the
    /// limit (below a floor, above a ceiling), %.
    pub p_wrong_side_pct: Option<f64>,
}

/// Judge `value` against a floor (`at_least`) or a ceiling.
pub fn judge(
    rule: &Rule,
    criterion: &str,
    value: f64,
    u: Option<f64>,
    k: f64,
    limit: f64,
    at_least: bool,
) -> Judged {
    let w = u.map_or(0.0, |u| rule.guard_band(u, k));
    // Distance on the good side of the limit.
    let d = if at_least {
        value - limit
    } else {
        limit - value
    };
    let outcome = if d >= w && (d > 0.0 || w == 0.0) {
        Outcome::Pass
    } else if d >= 0.0 {
        Outcome::ConditionalPass
    } else if d >= -w {
        Outcome::ConditionalFail
    } else {
        Outcome::Fail
    };
    // With a guard band of zero the two conditional outcomes cannot occur.
    let outcome = match (outcome, w == 0.0) {
        (Outcome::ConditionalPass, true) => Outcome::Pass,
        (Outcome::ConditionalFail, true) => Outcome::Fail,
        (o, _) => o,
    };
    Judged {
        criterion: criterion.to_string(),
        value,
        limit,
        at_least,
        u,
        guard_band: w,
        outcome,
        p_wrong_side_pct: u.filter(|u| *u > 0.0).map(|u| phi(-d / u) * 100.0),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// JCGM 106:2012 example 7.4 (inputs quoted at metrologyrules.com,
    /// metrology.md §2): y = 13.6, u = 1.8, limits 12.5 and 16.3 →
    /// p_c = Φ(1.5) − Φ(−0.611) = 0.6626.
    #[test]
    fn jcgm_106_example_7_4() {
        let p = conformance_probability(13.6, 1.8, Some(12.5), Some(16.3));
        assert!((p - 0.6626).abs() < 5e-4, "{p}");
    }

    /// ILAC-G8:09/2019 guard-band table (as reproduced in metrology.md §2):
    /// w = U → false accept below 2.5 %; 1.5U → below 0.16 %; 3U → below
    /// 1 ppm; 0.83U → below 5 % (ISO 14253-1); 0 → up to 50 %.
    #[test]
    fn ilac_g8_guard_band_table() {
        let u = 0.25;
        let l = 80.0;
        for (m, max_pct) in [(1.0, 2.5), (1.5, 0.16), (3.0, 1e-4), (0.83, 5.0)] {
            let rule = Rule::GuardBand { multiple_of_u: m };
            let w = rule.guard_band(u, 2.0);
            // A result just at the acceptance limit L + w.
            let j = judge(&rule, "state of health", l + w, Some(u), 2.0, l, true);
            assert_eq!(j.outcome, Outcome::Pass);
            let p = j.p_wrong_side_pct.unwrap();
            assert!(p < max_pct, "w = {m}U: {p} %");
            // And not far below it: the table's bound is the tight one.
            assert!(p > max_pct / 20.0 || m >= 3.0, "w = {m}U: {p} %");
        }
        let simple = judge(&Rule::Simple, "x", l, Some(u), 2.0, l, true);
        assert_eq!(simple.outcome, Outcome::Pass);
        assert!((simple.p_wrong_side_pct.unwrap() - 50.0).abs() < 1e-9);
    }

    /// metrology.md §2 check values, L = 80 %, U = 0.5 % (u = 0.25):
    /// y = 80.2 → 21.2 %; 80.5 → 2.28 %; 81.0 → 0.003 %; 79.8 → 78.8 %.
    #[test]
    fn probabilities_below_a_floor() {
        let rule = Rule::GuardBand { multiple_of_u: 1.0 };
        for (y, p, outcome) in [
            (80.2, 21.19, Outcome::ConditionalPass),
            (80.5, 2.275, Outcome::Pass),
            (81.0, 0.00317, Outcome::Pass),
            (79.8, 78.81, Outcome::ConditionalFail),
            (79.4, 99.18, Outcome::Fail),
        ] {
            let j = judge(&rule, "soh", y, Some(0.25), 2.0, 80.0, true);
            assert_eq!(j.outcome, outcome, "{y}");
            let got = j.p_wrong_side_pct.unwrap();
            assert!((got - p).abs() < 0.01 * p.max(0.1), "{y}: {got}");
        }
        // A ceiling mirrors it: growth 24.8 % against ≤ 25 %, U = 0.5.
        let j = judge(&rule, "growth", 24.8, Some(0.25), 2.0, 25.0, false);
        assert_eq!(j.outcome, Outcome::ConditionalPass);
        assert!((j.p_wrong_side_pct.unwrap() - 21.19).abs() < 0.05);
    }

    #[test]
    fn a_specific_risk_sets_its_band_from_the_normal_quantile() {
        let r = Rule::SpecificRisk {
            max_false_accept: 0.05,
        };
        // z(0.95) = 1.645: 0.82·U, the ISO 14253-1 figure.
        assert!((r.guard_band(1.0, 2.0) - 1.6449).abs() < 1e-3);
        assert!((phi(1.5) - 0.93319).abs() < 1e-5);
    }

    /// The outcomes at the edges of a guard band w = U = 0.5 about a
    /// floor of 80 (ILAC-G8 4.2.3 as written in the module's head): 80.5
    /// passes, 80.49 and 80 are conditional passes, 79.99 and 79.5
    /// conditional fails, 79.49 fails; a ceiling mirrors them. Without a
    /// band (no uncertainty, or simple acceptance) the limit itself
    /// passes and just under it fails.
    #[test]
    fn outcomes_at_the_edges_of_the_band() {
        let r = Rule::GuardBand { multiple_of_u: 1.0 };
        for (y, want) in [
            (80.5, Outcome::Pass),
            (80.49, Outcome::ConditionalPass),
            (80.0, Outcome::ConditionalPass),
            (79.99, Outcome::ConditionalFail),
            (79.5, Outcome::ConditionalFail),
            (79.49, Outcome::Fail),
        ] {
            let j = judge(&r, "soh", y, Some(0.25), 2.0, 80.0, true);
            assert_eq!(j.outcome, want, "floor, {y}");
            assert!((j.guard_band - 0.5).abs() < 1e-12);
            // The ceiling at 80 sees 160 − y the same way.
            let c = judge(&r, "growth", 160.0 - y, Some(0.25), 2.0, 80.0, false);
            assert_eq!(c.outcome, want, "ceiling, {}", 160.0 - y);
        }
        for u in [None, Some(0.25)] {
            let rule = if u.is_none() { r } else { Rule::Simple };
            let at = judge(&rule, "soh", 80.0, u, 2.0, 80.0, true);
            assert_eq!((at.outcome, at.guard_band), (Outcome::Pass, 0.0));
            assert_eq!(
                judge(&rule, "soh", 79.999, u, 2.0, 80.0, true).outcome,
                Outcome::Fail
            );
        }
        assert_eq!(
            judge(&r, "soh", 80.0, None, 2.0, 80.0, true).p_wrong_side_pct,
            None
        );
        assert_eq!(
            judge(&r, "soh", 80.0, Some(0.0), 2.0, 80.0, true).p_wrong_side_pct,
            None
        );
        let j = judge(&r, "state of health", 81.0, Some(0.25), 2.0, 80.0, true);
        assert_eq!(
            (j.criterion.as_str(), j.value, j.limit, j.at_least, j.u),
            ("state of health", 81.0, 80.0, true, Some(0.25))
        );
        assert!(Outcome::ConditionalPass.in_band() && Outcome::ConditionalFail.in_band());
        assert!(!Outcome::Pass.in_band() && !Outcome::Fail.in_band());
        assert_eq!(
            [
                Outcome::Pass,
                Outcome::ConditionalPass,
                Outcome::ConditionalFail,
                Outcome::Fail
            ]
            .map(Outcome::words),
            ["pass", "conditional pass", "conditional fail", "fail"]
        );
    }

    /// The guard band of each rule, worked: m·k·u; z(1 − α)·u with
    /// z(0.975) = 1.95996 (any normal table); none for simple acceptance.
    /// The conformance probability with one limit, or none.
    #[test]
    fn guard_bands_and_one_sided_conformance() {
        assert_eq!(Rule::Simple.guard_band(0.3, 2.0), 0.0);
        assert!((Rule::GuardBand { multiple_of_u: 1.5 }.guard_band(0.3, 2.0) - 0.9).abs() < 1e-12);
        let sr = Rule::SpecificRisk {
            max_false_accept: 0.025,
        };
        assert!((sr.guard_band(0.5, 2.0) - 0.979_982).abs() < 1e-5);
        assert!((phi_inv(0.975) - 1.959_964).abs() < 1e-6);
        // Floor only: Φ((y − L)/u); ceiling only: Φ((H − y)/u).
        assert!((conformance_probability(81.0, 0.5, Some(80.0), None) - phi(2.0)).abs() < 1e-12);
        assert!((conformance_probability(81.0, 0.5, None, Some(82.0)) - phi(2.0)).abs() < 1e-12);
        assert_eq!(conformance_probability(81.0, 0.5, None, None), 1.0);
        // Far outside both sides: clamped at 0.
        assert_eq!(
            conformance_probability(0.0, 0.1, Some(80.0), Some(1.0)),
            0.0
        );
        // The words state the rule's own numbers.
        assert!(Rule::GuardBand { multiple_of_u: 1.0 }
            .words()
            .contains("under 2.28 %"));
        assert!(sr.words().contains("at most 2.5 %") && sr.words().contains("w = 1.96·u"));
        assert!(Rule::Simple.words().contains("up to 50 %"));
        assert_eq!(DecisionRule::default().rule, Rule::Simple);
        assert_eq!(DecisionRule::default().in_band, InBand::Conditional);
        assert_eq!(DecisionRule::default().max_u_to_bin, None);
    }
}
