//! Grading policy: a TOML file the shop owns that defines grades by state
//! of health, resistance growth and coulombic efficiency. Each grade comes
//! with the reasons for it. The default policy is
//! `policies/default-grading.toml`.

use super::schedule::{parse_days, Rule as ScheduleRule, Schedule};
use crate::decision::{self, DecisionRule, InBand, Judged, Outcome, Rule};
use chrono::NaiveDate;
use model::location::{toml_error, InputErrors, LocatedError, Location};
use model::pack::Chemistry;
use model::units;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::Path;
use toml::Spanned;

pub const DEFAULT_POLICY: &str = include_str!("../../../../policies/default-grading.toml");

/// A threshold as written: a string, or a table of strings by chemistry.
type RawValue = Spanned<toml::Value>;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawGrade {
    label: String,
    meaning: Option<String>,
    soh_min: Option<RawValue>,
    resistance_growth_max: Option<RawValue>,
    coulombic_efficiency_min: Option<RawValue>,
    /// The weakest cell group's charge to the cutoff as a share of the
    /// groups' mean (packs read group by group).
    weakest_group_share_min: Option<RawValue>,
    /// (highest − lowest) group charge to the cutoff over the mean.
    group_capacity_spread_max: Option<RawValue>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawPolicy {
    name: String,
    #[serde(default)]
    grade: Vec<Spanned<RawGrade>>,
    /// When packs are due for their next test (the fleet view).
    schedule: Option<Spanned<RawSchedule>>,
    /// How a figure with an uncertainty is judged against a limit.
    decision: Option<Spanned<RawDecision>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawDecision {
    /// "simple", "guard-band" or "specific-risk".
    rule: Spanned<String>,
    /// The guard band as a multiple of U (guard-band).
    guard_band: Option<Spanned<f64>>,
    /// The largest accepted probability that a pack is below a limit
    /// (specific-risk), e.g. "2.5%".
    max_false_accept: Option<Spanned<String>>,
    /// "conditional" or "retest".
    in_guard_band: Option<Spanned<String>>,
    /// Refuse to grade where U exceeds this share of the narrowest grade
    /// bin's half-width.
    max_u_to_bin: Option<Spanned<f64>>,
}

fn decision(
    raw: &RawDecision,
    file: &Path,
    text: &str,
    errors: &mut Vec<LocatedError>,
) -> DecisionRule {
    let mut bad = |span: std::ops::Range<usize>, message: String| {
        errors.push(LocatedError {
            location: Location::of_span(file, text, &span),
            message,
        })
    };
    let rule = match raw.rule.get_ref().as_str() {
        "simple" => Rule::Simple,
        "guard-band" => match &raw.guard_band {
            Some(m) if m.get_ref().is_finite() && *m.get_ref() > 0.0 && *m.get_ref() <= 5.0 => {
                Rule::GuardBand {
                    multiple_of_u: *m.get_ref(),
                }
            }
            Some(m) => {
                bad(
                    m.span(),
                    format!("decision.guard_band = {}: expected a multiple of U above 0 and at most 5 (1 keeps the false-accept risk under 2.5 %)", m.get_ref()),
                );
                Rule::Simple
            }
            None => {
                bad(
                    raw.rule.span(),
                    "decision.rule = \"guard-band\" needs guard_band, the band as a multiple of U (e.g. 1.0)".into(),
                );
                Rule::Simple
            }
        },
        "specific-risk" => match raw
            .max_false_accept
            .as_ref()
            .map(|v| (v, units::parse(v.get_ref())))
        {
            Some((_, Ok(units::Quantity::Percent(p)))) if p > 0.0 && p < 50.0 => {
                Rule::SpecificRisk {
                    max_false_accept: p / 100.0,
                }
            }
            Some((v, _)) => {
                bad(
                    v.span(),
                    format!("decision.max_false_accept = \"{}\": expected a percentage above 0 and under 50, e.g. \"2.5%\"", v.get_ref()),
                );
                Rule::Simple
            }
            None => {
                bad(
                    raw.rule.span(),
                    "decision.rule = \"specific-risk\" needs max_false_accept, e.g. \"2.5%\""
                        .into(),
                );
                Rule::Simple
            }
        },
        other => {
            bad(
                raw.rule.span(),
                format!("decision.rule = \"{other}\": expected \"simple\", \"guard-band\" or \"specific-risk\""),
            );
            Rule::Simple
        }
    };
    let in_band = match raw
        .in_guard_band
        .as_ref()
        .map(|v| (v, v.get_ref().as_str()))
    {
        None | Some((_, "conditional")) => InBand::Conditional,
        Some((_, "retest")) => InBand::Retest,
        Some((v, other)) => {
            bad(
                v.span(),
                format!(
                    "decision.in_guard_band = \"{other}\": expected \"conditional\" or \"retest\""
                ),
            );
            InBand::Conditional
        }
    };
    let max_u_to_bin = match &raw.max_u_to_bin {
        Some(r) if r.get_ref().is_finite() && *r.get_ref() > 0.0 && *r.get_ref() <= 1.0 => {
            Some(*r.get_ref())
        }
        Some(r) => {
            bad(
                r.span(),
                format!("decision.max_u_to_bin = {}: expected a ratio above 0 and at most 1 (0.25: U at most a quarter of the bin's half-width)", r.get_ref()),
            );
            None
        }
        None => None,
    };
    DecisionRule {
        rule,
        in_band,
        max_u_to_bin,
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSchedule {
    /// "interval" or "ieee-450".
    rule: Spanned<String>,
    /// The shop's interval, e.g. "92d" or "13w".
    interval: Option<Spanned<String>>,
    /// Expected service life for IEEE 450, e.g. "20y".
    service_life: Option<Spanned<String>>,
    /// Pack id → the date it went into service.
    #[serde(default)]
    in_service: BTreeMap<String, Spanned<toml::value::Datetime>>,
}

/// The default interval of the fleet view, days.
pub const DEFAULT_INTERVAL_DAYS: i64 = 92;

fn schedule(
    raw: &Spanned<RawSchedule>,
    file: &Path,
    text: &str,
    errors: &mut Vec<LocatedError>,
) -> Option<Schedule> {
    let r = raw.get_ref();
    let at = |span: &std::ops::Range<usize>| Location::of_span(file, text, span);
    let mut bad = |span: &std::ops::Range<usize>, message: String| {
        errors.push(LocatedError {
            location: at(span),
            message,
        })
    };
    let rule = match r.rule.get_ref().as_str() {
        "interval" => ScheduleRule::Interval,
        "ieee-450" => ScheduleRule::Ieee450,
        other => {
            bad(
                &r.rule.span(),
                format!("schedule.rule = \"{other}\": expected \"interval\" or \"ieee-450\""),
            );
            return None;
        }
    };
    let days = |v: &Spanned<String>,
                what: &str,
                bad: &mut dyn FnMut(&std::ops::Range<usize>, String)| {
        let d = parse_days(v.get_ref());
        if d.is_none() {
            bad(
                &v.span(),
                format!(
                    "schedule.{what} = \"{}\": expected a duration in days, weeks or years, e.g. 92d, 13w or 20y",
                    v.get_ref()
                ),
            );
        }
        d
    };
    let interval_days = match &r.interval {
        Some(v) => days(v, "interval", &mut bad)?,
        None => DEFAULT_INTERVAL_DAYS,
    };
    let service_life_days = match &r.service_life {
        Some(v) => Some(days(v, "service_life", &mut bad)?),
        None if rule == ScheduleRule::Ieee450 => {
            bad(
                &raw.span(),
                "schedule.rule = \"ieee-450\" needs service_life, the expected service life (e.g. 20y)".into(),
            );
            return None;
        }
        None => None,
    };
    let mut in_service = BTreeMap::new();
    for (id, date) in &r.in_service {
        match date.get_ref().date.and_then(|d| {
            NaiveDate::from_ymd_opt(i32::from(d.year), u32::from(d.month), u32::from(d.day))
        }) {
            Some(d) if date.get_ref().time.is_none() => {
                in_service.insert(id.clone(), d);
            }
            _ => bad(
                &date.span(),
                format!("schedule.in_service.{id}: expected a date such as 2021-04-01"),
            ),
        }
    }
    Some(Schedule {
        rule,
        interval_days,
        service_life_days,
        in_service,
    })
}

/// A percentage threshold, the same for all or per chemistry.
#[derive(Debug, Clone, PartialEq)]
pub enum Threshold {
    All(f64),
    ByChemistry(BTreeMap<Chemistry, f64>),
}

impl Threshold {
    fn for_chemistry(&self, c: Chemistry) -> Option<f64> {
        match self {
            Threshold::All(v) => Some(*v),
            Threshold::ByChemistry(m) => m.get(&c).copied(),
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct GradeRule {
    pub label: String,
    pub meaning: String,
    pub soh_min: Option<Threshold>,
    pub resistance_growth_max: Option<Threshold>,
    pub ce_min: Option<Threshold>,
    pub weakest_group_share_min: Option<Threshold>,
    pub group_capacity_spread_max: Option<Threshold>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Policy {
    pub name: String,
    pub grades: Vec<GradeRule>,
    /// When packs are due for a test, if the policy says.
    pub schedule: Option<Schedule>,
    /// How figures with an uncertainty are judged against the grades'
    /// limits (simple acceptance when the policy does not say).
    pub decision: DecisionRule,
}

/// What a pack is graded on.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct GradeInputs {
    pub chemistry: Chemistry,
    pub soh_pct: Option<f64>,
    /// Resistance growth against the reference, %.
    pub resistance_growth_pct: Option<f64>,
    pub coulombic_efficiency_pct: Option<f64>,
    /// A pack read group by group: its weakest group, that group's share
    /// of the mean and the groups' spread, %.
    pub weakest_group: Option<u32>,
    pub weakest_group_share_pct: Option<f64>,
    pub group_capacity_spread_pct: Option<f64>,
    /// Standard uncertainties of the state of health, the resistance
    /// growth and the coulombic efficiency (absent: judged as measured).
    pub soh_u: Option<f64>,
    pub resistance_growth_u: Option<f64>,
    pub ce_u: Option<f64>,
}

impl GradeInputs {
    /// A state of health alone (every other figure absent).
    pub fn of_soh(chemistry: Chemistry, soh_pct: f64, soh_u: Option<f64>) -> GradeInputs {
        GradeInputs {
            chemistry,
            soh_pct: Some(soh_pct),
            resistance_growth_pct: None,
            coulombic_efficiency_pct: None,
            weakest_group: None,
            weakest_group_share_pct: None,
            group_capacity_spread_pct: None,
            soh_u,
            resistance_growth_u: None,
            ce_u: None,
        }
    }
}

/// A grade with its reasons.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Grade {
    pub label: String,
    pub meaning: String,
    pub policy: String,
    pub reasons: Vec<String>,
    /// The decision rule the grade was given under and what it found
    /// (absent in older records).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decision: Option<GradeDecision>,
}

/// How a grade was decided: the rule, whether the grade is conditional
/// (a figure inside a guard band took the lower grade), and the state of
/// health at its nearest boundary.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct GradeDecision {
    /// The rule in words.
    pub rule: String,
    pub conditional: bool,
    /// The policy asks for a retest where a figure is in a guard band.
    pub retest: bool,
    /// The figures inside a guard band, and at which grade's limit.
    pub in_band: Vec<String>,
    /// The state of health at the nearest grade boundary, with the
    /// probability that the pack is below it.
    pub nearest: Option<Judged>,
}

impl GradeDecision {
    /// One line for the card and the terminal.
    pub fn line(&self) -> String {
        let mut s = String::new();
        if self.conditional {
            s.push_str(if self.retest {
                "RETEST: "
            } else {
                "conditional: "
            });
            s.push_str(&self.in_band.join("; "));
            s.push_str(". ");
        }
        if let Some(n) = &self.nearest {
            if let Some(p) = n.p_wrong_side_pct {
                s.push_str(&format!(
                    "probability that the state of health is below the {} % boundary: {}",
                    n.limit,
                    show_probability(p)
                ));
            }
        }
        s
    }
}

/// A probability in percent as a reader wants it: "< 0.01 %" when tiny.
pub fn show_probability(p_pct: f64) -> String {
    if p_pct < 0.01 {
        "< 0.01 %".into()
    } else if p_pct > 99.99 {
        "> 99.99 %".into()
    } else if !(1.0..=99.0).contains(&p_pct) {
        format!("{p_pct:.2} %")
    } else {
        format!("{p_pct:.1} %")
    }
}

fn percent(
    v: &str,
    span: &std::ops::Range<usize>,
    file: &Path,
    text: &str,
) -> Result<f64, LocatedError> {
    match units::parse(v) {
        Ok(units::Quantity::Percent(p)) if p.is_finite() => Ok(p),
        _ => Err(LocatedError {
            location: Location::of_span(file, text, span),
            message: format!("'{v}' is not a percentage such as \"90%\""),
        }),
    }
}

fn threshold(
    v: &RawValue,
    file: &Path,
    text: &str,
    errors: &mut Vec<LocatedError>,
) -> Option<Threshold> {
    let span = v.span();
    match v.get_ref() {
        toml::Value::String(s) => percent(s, &span, file, text)
            .map(Threshold::All)
            .map_err(|e| errors.push(e))
            .ok(),
        toml::Value::Table(m) => {
            let mut out = BTreeMap::new();
            for (k, val) in m {
                let parsed = match val {
                    toml::Value::String(s) => percent(s, &span, file, text),
                    other => Err(LocatedError {
                        location: Location::of_span(file, text, &span),
                        message: format!("'{other}' is not a percentage such as \"90%\""),
                    }),
                };
                match (k.parse::<Chemistry>(), parsed) {
                    (Ok(c), Ok(p)) => {
                        out.insert(c, p);
                    }
                    (Err(msg), _) => errors.push(LocatedError {
                        location: Location::of_span(file, text, &span),
                        message: msg,
                    }),
                    (_, Err(e)) => errors.push(e),
                }
            }
            Some(Threshold::ByChemistry(out))
        }
        other => {
            errors.push(LocatedError {
                location: Location::of_span(file, text, &span),
                message: format!("'{other}' is not a percentage (\"90%\") or a table by chemistry"),
            });
            None
        }
    }
}

impl Policy {
    pub fn from_toml(file: &Path, text: &str) -> Result<Policy, InputErrors> {
        let raw: RawPolicy =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        let mut errors = Vec::new();
        let mut grades = Vec::new();
        for g in &raw.grade {
            let r = g.get_ref();
            grades.push(GradeRule {
                label: r.label.clone(),
                meaning: r.meaning.clone().unwrap_or_default(),
                soh_min: r
                    .soh_min
                    .as_ref()
                    .and_then(|v| threshold(v, file, text, &mut errors)),
                resistance_growth_max: r
                    .resistance_growth_max
                    .as_ref()
                    .and_then(|v| threshold(v, file, text, &mut errors)),
                ce_min: r
                    .coulombic_efficiency_min
                    .as_ref()
                    .and_then(|v| threshold(v, file, text, &mut errors)),
                weakest_group_share_min: r
                    .weakest_group_share_min
                    .as_ref()
                    .and_then(|v| threshold(v, file, text, &mut errors)),
                group_capacity_spread_max: r
                    .group_capacity_spread_max
                    .as_ref()
                    .and_then(|v| threshold(v, file, text, &mut errors)),
            });
        }
        if grades.is_empty() {
            errors.push(LocatedError {
                location: Location::at(file, text, 0),
                message: "the policy defines no [[grade]]".into(),
            });
        } else if let (Some(last), Some(raw_last)) = (grades.last(), raw.grade.last()) {
            if last.soh_min.is_some()
                || last.resistance_growth_max.is_some()
                || last.ce_min.is_some()
                || last.weakest_group_share_min.is_some()
                || last.group_capacity_spread_max.is_some()
            {
                errors.push(LocatedError {
                    location: Location::of_span(file, text, &raw_last.span()),
                    message: format!(
                        "the last grade ('{}') must have no criteria, so every pack gets a grade",
                        last.label
                    ),
                });
            }
        }
        let schedule = raw
            .schedule
            .as_ref()
            .and_then(|s| schedule(s, file, text, &mut errors));
        let decision = raw
            .decision
            .as_ref()
            .map(|d| decision(d.get_ref(), file, text, &mut errors))
            .unwrap_or_default();
        if !errors.is_empty() {
            return Err(InputErrors(errors));
        }
        Ok(Policy {
            name: raw.name,
            grades,
            schedule,
            decision,
        })
    }

    pub fn default_policy() -> Policy {
        match Policy::from_toml(Path::new("<built-in>/default-grading.toml"), DEFAULT_POLICY) {
            Ok(p) => p,
            // Checked by a unit test; not user input.
            Err(e) => panic!("built-in grading policy is invalid: {e}"),
        }
    }

    /// Grade a pack: the first grade whose every measured criterion holds.
    pub fn grade(&self, x: &GradeInputs) -> Grade {
        let mut why_not = Vec::new();
        // Figures a higher grade missed only inside a guard band.
        let mut in_band: Vec<String> = Vec::new();
        let rule_of = self.decision.rule;
        for rule in &self.grades {
            let mut reasons = Vec::new();
            let mut fails = Vec::new();
            let mut band = Vec::new();
            let mut check = |name: &str,
                             value: Option<f64>,
                             u: Option<f64>,
                             limit: Option<f64>,
                             at_least: bool| {
                let Some(limit) = limit else { return };
                match value {
                    None => reasons.push(format!("{name} not measured (criterion skipped)")),
                    Some(v) => {
                        let j = decision::judge(&rule_of, name, v, u, 2.0, limit, at_least);
                        let ok = j.outcome == Outcome::Pass;
                        let op = match (at_least, v >= limit, v <= limit) {
                            (true, true, _) => ">=",
                            (true, false, _) => "<",
                            (false, _, true) => "<=",
                            (false, _, false) => ">",
                        };
                        // Efficiencies sit close to their floors: two decimals so 99.96 %
                        // does not print as 100.0 %.
                        let d = if name == "coulombic efficiency" { 2 } else { 1 };
                        let mut line = format!("{name} {v:.d$} % {op} {limit} %");
                        if j.outcome.in_band() {
                            line.push_str(&format!(
                                " ({}: within the guard band of {:.d$} points)",
                                j.outcome.words(),
                                j.guard_band
                            ));
                            band.push(line.clone());
                        }
                        if ok {
                            reasons.push(line)
                        } else {
                            fails.push(line)
                        }
                    }
                }
            };
            let c = x.chemistry;
            check(
                "state of health",
                x.soh_pct,
                x.soh_u,
                rule.soh_min.as_ref().and_then(|t| t.for_chemistry(c)),
                true,
            );
            check(
                "resistance growth",
                x.resistance_growth_pct,
                x.resistance_growth_u,
                rule.resistance_growth_max
                    .as_ref()
                    .and_then(|t| t.for_chemistry(c)),
                false,
            );
            check(
                "coulombic efficiency",
                x.coulombic_efficiency_pct,
                x.ce_u,
                rule.ce_min.as_ref().and_then(|t| t.for_chemistry(c)),
                true,
            );
            // The group criteria apply to a pack read group by group; a
            // pack read at its terminals only is not noted for them.
            if let Some(g) = x.weakest_group {
                if let (Some(v), Some(lim)) = (
                    x.weakest_group_share_pct,
                    rule.weakest_group_share_min
                        .as_ref()
                        .and_then(|t| t.for_chemistry(c)),
                ) {
                    if v >= lim {
                        reasons.push(format!(
                            "weakest group (group {g}) delivers {v:.1} % of the mean >= {lim} %"
                        ));
                    } else {
                        fails.push(format!(
                            "group {g} delivers {v:.1} % of the mean < {lim} %: replace or rebalance it"
                        ));
                    }
                }
                if let (Some(v), Some(lim)) = (
                    x.group_capacity_spread_pct,
                    rule.group_capacity_spread_max
                        .as_ref()
                        .and_then(|t| t.for_chemistry(c)),
                ) {
                    let line = format!("group capacity spread {v:.1} %");
                    if v <= lim {
                        reasons.push(format!("{line} <= {lim} %"));
                    } else {
                        fails.push(format!("{line} > {lim} % (weakest: group {g})"));
                    }
                }
            }
            if fails.is_empty() {
                let mut all = why_not;
                all.extend(reasons);
                if all.is_empty() {
                    all.push("no criteria for this grade".into());
                }
                return Grade {
                    label: rule.label.clone(),
                    meaning: rule.meaning.clone(),
                    policy: self.name.clone(),
                    reasons: all,
                    decision: Some(self.decided(x, in_band)),
                };
            }
            // A grade missed only inside guard bands: the grade given is
            // conditional (ILAC-G8 4.2.3; the policy says conditional or
            // retest).
            if band.len() == fails.len() {
                in_band.extend(band.into_iter().map(|b| format!("not {}: {b}", rule.label)));
            }
            why_not.push(format!("not {}: {}", rule.label, fails.join("; ")));
        }
        // Unreachable with a validated policy (the last grade has no criteria).
        Grade {
            label: "?".into(),
            meaning: String::new(),
            policy: self.name.clone(),
            reasons: why_not,
            decision: None,
        }
    }

    /// The rule, whether the grade is conditional, and the state of
    /// health at its nearest boundary.
    fn decided(&self, x: &GradeInputs, in_band: Vec<String>) -> GradeDecision {
        let nearest = x.soh_pct.and_then(|v| {
            self.soh_limits(x.chemistry)
                .into_iter()
                .min_by(|a, b| (a - v).abs().total_cmp(&(b - v).abs()))
                .map(|l| {
                    decision::judge(
                        &self.decision.rule,
                        "state of health",
                        v,
                        x.soh_u,
                        2.0,
                        l,
                        true,
                    )
                })
        });
        GradeDecision {
            rule: self.decision.rule.words(),
            conditional: !in_band.is_empty(),
            retest: !in_band.is_empty() && self.decision.in_band == InBand::Retest,
            in_band,
            nearest,
        }
    }

    /// The state-of-health floors of the grades for a chemistry.
    pub fn soh_limits(&self, c: Chemistry) -> Vec<f64> {
        self.grades
            .iter()
            .filter_map(|g| g.soh_min.as_ref().and_then(|t| t.for_chemistry(c)))
            .collect()
    }

    /// Refuse to grade where the state of health's expanded uncertainty
    /// (k = 2) exceeds the policy's share of the narrowest state-of-health
    /// bin's half-width (metrology.md §2 rule 5). Returns why.
    pub fn refuses(&self, c: Chemistry, soh_u: Option<f64>) -> Option<String> {
        let ratio = self.decision.max_u_to_bin?;
        let u = soh_u?;
        let mut limits = self.soh_limits(c);
        limits.sort_by(f64::total_cmp);
        let half = limits
            .windows(2)
            .map(|w| 0.5 * (w[1] - w[0]))
            .filter(|h| *h > 0.0)
            .min_by(f64::total_cmp)?;
        let big = 2.0 * u;
        (big > ratio * half).then(|| {
            format!(
                "the state of health's uncertainty U = {big:.2} points is more than {ratio} of the narrowest grade bin's half-width ({half:.1} points): not graded; improve the bench's accuracy (tare, calibrate) or test again"
            )
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_policy_is_valid_and_ordered() {
        let p = Policy::default_policy();
        let labels: Vec<&str> = p.grades.iter().map(|g| g.label.as_str()).collect();
        assert_eq!(labels, ["A", "B", "C", "D"]);
        // Ordered: each grade asks at least as much as the next, for every
        // chemistry (a higher floor of state of health and efficiency, a
        // lower ceiling of resistance growth), and the state of health's
        // floors strictly fall so no grade is unreachable.
        for c in [
            Chemistry::LiIon,
            Chemistry::Lfp,
            Chemistry::LeadAcid,
            Chemistry::Nimh,
        ] {
            let soh = p.soh_limits(c);
            assert_eq!(soh, [90.0, 80.0, 70.0], "{c}");
            let at = |f: &dyn Fn(&GradeRule) -> Option<&Threshold>| -> Vec<Option<f64>> {
                p.grades
                    .iter()
                    .map(|g| f(g).and_then(|t| t.for_chemistry(c)))
                    .collect()
            };
            let growth = at(&|g| g.resistance_growth_max.as_ref());
            let ce = at(&|g| g.ce_min.as_ref());
            for w in growth.windows(2) {
                if let (Some(a), Some(b)) = (w[0], w[1]) {
                    assert!(a < b, "{c}: growth ceilings {growth:?}");
                }
            }
            for w in ce.windows(2) {
                if let (Some(a), Some(b)) = (w[0], w[1]) {
                    assert!(a > b, "{c}: efficiency floors {ce:?}");
                }
            }
        }
        // The last grade takes every pack; the rule is stated.
        let last = p.grades.last().unwrap();
        assert!(last.soh_min.is_none() && last.resistance_growth_max.is_none());
        assert_ne!(p.decision.rule, Rule::Simple);
    }

    #[test]
    fn a_policy_must_end_in_a_catch_all() {
        let text = "name = \"x\"\n[[grade]]\nlabel = \"A\"\nsoh_min = \"90%\"\n";
        let e = Policy::from_toml(Path::new("g.toml"), text).unwrap_err();
        assert!(
            e.to_string().contains("g.toml:2:1") && e.to_string().contains("no criteria"),
            "{e}"
        );
        let text =
            "name = \"x\"\n[[grade]]\nlabel = \"A\"\nsoh_min = \"90\"\n[[grade]]\nlabel = \"B\"\n";
        let e = Policy::from_toml(Path::new("g.toml"), text).unwrap_err();
        assert!(e.to_string().starts_with("g.toml:4:11"), "{e}");
    }

    /// The default policy's rule is a guard band w = U: a state of health
    /// just above a floor takes the lower grade, conditional, with the
    /// probability that the pack is below the floor (ILAC-G8:09/2019 4.2.3;
    /// Φ from statrs).
    #[test]
    fn a_figure_inside_the_guard_band_takes_the_lower_grade_conditionally() {
        let p = Policy::default_policy();
        assert!(matches!(
            p.decision.rule,
            crate::decision::Rule::GuardBand { multiple_of_u } if multiple_of_u == 1.0
        ));
        // 90.2 % with u = 0.25 (U = 0.5): inside A's band.
        let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, 90.2, Some(0.25)));
        assert_eq!(g.label, "B");
        let d = g.decision.unwrap();
        assert!(d.conditional && !d.retest, "{d:?}");
        let n = d.nearest.unwrap();
        assert_eq!(n.limit, 90.0);
        // Φ((90 − 90.2)/0.25) = Φ(−0.8) = 21.19 %.
        assert!((n.p_wrong_side_pct.unwrap() - 21.19).abs() < 0.01);
        // Clear of the band: A, not conditional.
        let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, 90.6, Some(0.25)));
        assert_eq!(g.label, "A");
        assert!(!g.decision.unwrap().conditional);
        // As measured (no uncertainty): A at 90.2.
        let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, 90.2, None));
        assert_eq!(g.label, "A");
        // The nearest boundary is the nearest floor, wherever the SoH is.
        for (soh, limit) in [(70.3, 70.0), (79.0, 80.0), (84.0, 80.0), (99.0, 90.0)] {
            let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, soh, Some(0.25)));
            assert_eq!(g.decision.unwrap().nearest.unwrap().limit, limit, "{soh}");
        }
        // Refused where U = 2 points > 0.25 × the 5-point half-bin.
        assert!(p.refuses(Chemistry::LiIon, Some(1.0)).is_some());
        assert!(p.refuses(Chemistry::LiIon, Some(0.5)).is_none());
    }

    #[test]
    fn a_decision_table_is_checked_with_its_place() {
        let text = "name = \"x\"\n[decision]\nrule = \"guard-band\"\nguard_band = 9.0\n[[grade]]\nlabel = \"A\"\n";
        let e = Policy::from_toml(Path::new("g.toml"), text).unwrap_err();
        assert!(e.to_string().starts_with("g.toml:4:"), "{e}");
        let text = "name = \"x\"\n[decision]\nrule = \"specific-risk\"\nmax_false_accept = \"5%\"\nin_guard_band = \"retest\"\n[[grade]]\nlabel = \"A\"\nsoh_min = \"80%\"\n[[grade]]\nlabel = \"B\"\n";
        let p = Policy::from_toml(Path::new("g.toml"), text).unwrap();
        let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, 80.3, Some(0.25)));
        // w = 1.645·0.25 = 0.41 > 0.3: B, retest.
        assert_eq!(g.label, "B");
        assert!(g.decision.unwrap().retest);
    }

    /// A policy with every criterion, each judged at its limit (simple
    /// acceptance: a figure at a floor or ceiling passes), a chemistry's
    /// own value taking precedence, a figure not measured skipped with a
    /// note, and the reasons of the grades above written out.
    #[test]
    fn every_criterion_at_its_limit_and_the_reasons_given() {
        let text = r#"name = "shop"
[[grade]]
label = "A"
meaning = "resell"
soh_min = { li-ion = "90%", lfp = "90%", lead-acid = "85%" }
resistance_growth_max = "25%"
coulombic_efficiency_min = "99.5%"
weakest_group_share_min = "95%"
group_capacity_spread_max = "5%"
[[grade]]
label = "B"
soh_min = "80%"
[[grade]]
label = "C"
"#;
        let p = Policy::from_toml(Path::new("shop.toml"), text).unwrap();
        assert_eq!(p.decision.rule, Rule::Simple);
        let full = |soh, growth, ce, share, spread| GradeInputs {
            chemistry: Chemistry::LiIon,
            soh_pct: Some(soh),
            resistance_growth_pct: Some(growth),
            coulombic_efficiency_pct: Some(ce),
            weakest_group: Some(3),
            weakest_group_share_pct: Some(share),
            group_capacity_spread_pct: Some(spread),
            soh_u: None,
            resistance_growth_u: None,
            ce_u: None,
        };
        // Every figure exactly at its limit: A, each reason with its sign.
        let g = p.grade(&full(90.0, 25.0, 99.5, 95.0, 5.0));
        assert_eq!(
            (g.label.as_str(), g.meaning.as_str(), g.policy.as_str()),
            ("A", "resell", "shop")
        );
        assert_eq!(
            g.reasons,
            [
                "state of health 90.0 % >= 90 %",
                "resistance growth 25.0 % <= 25 %",
                "coulombic efficiency 99.50 % >= 99.5 %",
                "weakest group (group 3) delivers 95.0 % of the mean >= 95 %",
                "group capacity spread 5.0 % <= 5 %",
            ]
        );
        // Each one just past its limit: B, with why not A.
        for (x, why) in [
            (
                full(89.9, 25.0, 99.5, 95.0, 5.0),
                "state of health 89.9 % < 90 %",
            ),
            (
                full(90.0, 25.1, 99.5, 95.0, 5.0),
                "resistance growth 25.1 % > 25 %",
            ),
            (
                full(90.0, 25.0, 99.49, 95.0, 5.0),
                "coulombic efficiency 99.49 % < 99.5 %",
            ),
            (
                full(90.0, 25.0, 99.5, 94.9, 5.0),
                "group 3 delivers 94.9 % of the mean < 95 %: replace or rebalance it",
            ),
            (
                full(90.0, 25.0, 99.5, 95.0, 5.1),
                "group capacity spread 5.1 % > 5 % (weakest: group 3)",
            ),
        ] {
            let g = p.grade(&x);
            assert_eq!(g.label, "B", "{why}");
            assert_eq!(g.reasons[0], format!("not A: {why}"));
        }
        // Below every floor: the catch-all, with both reasons above it.
        let g = p.grade(&full(70.0, 30.0, 99.0, 90.0, 9.0));
        assert_eq!(g.label, "C");
        assert!(
            g.reasons[1].starts_with("not B: state of health 70.0 % < 80 %"),
            "{:?}",
            g.reasons
        );
        assert_eq!(g.reasons.len(), 2);
        // The chemistry's own floor: lead-acid at 86 % is A; a chemistry
        // the table does not name is not judged on it.
        let mut la = full(86.0, 0.0, 99.9, 99.0, 1.0);
        la.chemistry = Chemistry::LeadAcid;
        assert_eq!(p.grade(&la).label, "A");
        la.chemistry = Chemistry::Nimh;
        let g = p.grade(&la);
        assert_eq!(g.label, "A");
        assert!(
            !g.reasons.iter().any(|r| r.contains("state of health")),
            "{:?}",
            g.reasons
        );
        // Not measured: skipped and said; a pack read at its terminals is
        // not judged on groups.
        let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, 95.0, None));
        assert_eq!(g.label, "A");
        assert!(
            g.reasons
                .contains(&"resistance growth not measured (criterion skipped)".to_string()),
            "{:?}",
            g.reasons
        );
        assert!(
            !g.reasons.iter().any(|r| r.contains("group")),
            "{:?}",
            g.reasons
        );
        let g = p.grade(&GradeInputs::of_soh(Chemistry::LiIon, 70.0, None));
        assert_eq!(
            g.reasons.last().unwrap(),
            "not B: state of health 70.0 % < 80 %"
        );
    }

    /// The refusal's arithmetic: floors 90/80/70 give half-bins of 5
    /// points; with max_u_to_bin 0.25 a state of health is graded while
    /// U = 2u ≤ 1.25 points.
    #[test]
    fn the_refusal_compares_u_with_the_narrowest_half_bin() {
        let p = Policy::default_policy();
        assert_eq!(p.decision.max_u_to_bin, Some(0.25));
        assert!(
            p.refuses(Chemistry::LiIon, Some(0.625)).is_none(),
            "U = 1.25: at the limit"
        );
        let why = p.refuses(Chemistry::LiIon, Some(0.63)).unwrap();
        assert!(
            why.contains("U = 1.26 points") && why.contains("(5.0 points)"),
            "{why}"
        );
        assert!(p.refuses(Chemistry::LiIon, None).is_none());
        // Floors 90 / 86 / 70: the narrowest half-bin is 2 points.
        let text = "name = \"x\"\n[decision]\nrule = \"simple\"\nmax_u_to_bin = 0.5\n[[grade]]\nlabel = \"A\"\nsoh_min = \"90%\"\n[[grade]]\nlabel = \"B\"\nsoh_min = \"86%\"\n[[grade]]\nlabel = \"C\"\nsoh_min = \"70%\"\n[[grade]]\nlabel = \"D\"\n";
        let q = Policy::from_toml(Path::new("x.toml"), text).unwrap();
        assert!(
            q.refuses(Chemistry::LiIon, Some(0.5)).is_none(),
            "U = 1 = 0.5 × 2"
        );
        assert!(q.refuses(Chemistry::LiIon, Some(0.51)).is_some());
        // Probabilities as a reader wants them.
        assert_eq!(show_probability(0.005), "< 0.01 %");
        assert_eq!(show_probability(99.995), "> 99.99 %");
        assert_eq!(show_probability(0.5), "0.50 %");
        assert_eq!(show_probability(99.5), "99.50 %");
        assert_eq!(show_probability(21.19), "21.2 %");
        assert_eq!(show_probability(1.0), "1.0 %");
    }

    /// Each mistake a shop can make in its policy, named at its place with
    /// what was expected; the good forms of the same tables accepted.
    #[test]
    fn each_policy_mistake_is_named_at_its_place() {
        let tail = "[[grade]]\nlabel = \"A\"\nsoh_min = \"90%\"\n[[grade]]\nlabel = \"B\"\n";
        let cases: &[(&str, &str, &str)] = &[
            ("soh_min = \"ninety\"\n", "g.toml:3:11", "not a percentage"),
            ("soh_min = \"inf%\"\n", "g.toml:3:11", "percentage"),
            ("soh_min = 90\n", "g.toml:3:11", "or a table by chemistry"),
            (
                "soh_min = { li-ion = 90 }\n",
                "g.toml:3:11",
                "is not a percentage",
            ),
            (
                "soh_min = { sodium = \"90%\" }\n",
                "g.toml:3:11",
                "unknown chemistry 'sodium'",
            ),
            (
                "resistance_growth_max = \"25\"\n",
                "g.toml:3:25",
                "percentage",
            ),
            (
                "coulombic_efficiency_min = \"x\"\n",
                "g.toml:3:28",
                "percentage",
            ),
            (
                "weakest_group_share_min = \"x\"\n",
                "g.toml:3:27",
                "percentage",
            ),
            (
                "group_capacity_spread_max = \"x\"\n",
                "g.toml:3:29",
                "percentage",
            ),
        ];
        for (line, at, what) in cases {
            let text = format!("name = \"x\"\n[[grade]]\n{line}label = \"Z\"\n{tail}");
            let e = Policy::from_toml(Path::new("g.toml"), &text)
                .unwrap_err()
                .to_string();
            assert!(e.starts_with(at) && e.contains(what), "{line}: {e}");
        }
        // The last grade must take every pack, whatever its criterion.
        for c in [
            "resistance_growth_max",
            "coulombic_efficiency_min",
            "weakest_group_share_min",
            "group_capacity_spread_max",
        ] {
            let text = format!(
                "name = \"x\"\n[[grade]]\nlabel = \"A\"\n[[grade]]\nlabel = \"B\"\n{c} = \"5%\"\n"
            );
            let e = Policy::from_toml(Path::new("g.toml"), &text)
                .unwrap_err()
                .to_string();
            assert!(
                e.contains("the last grade ('B') must have no criteria"),
                "{c}: {e}"
            );
        }
        let e = Policy::from_toml(Path::new("g.toml"), "name = \"x\"\n")
            .unwrap_err()
            .to_string();
        assert!(e.contains("no [[grade]]"), "{e}");
        // The decision and schedule tables.
        let with = |table: &str| format!("name = \"x\"\n{table}{tail}");
        for (table, what) in [
            ("[decision]\nrule = \"vote\"\n", "expected \"simple\""),
            ("[decision]\nrule = \"guard-band\"\n", "needs guard_band"),
            ("[decision]\nrule = \"guard-band\"\nguard_band = 0.0\n", "above 0 and at most 5"),
            ("[decision]\nrule = \"specific-risk\"\n", "max_false_accept"),
            ("[decision]\nrule = \"specific-risk\"\nmax_false_accept = \"60%\"\n", "under 50"),
            ("[decision]\nrule = \"specific-risk\"\nmax_false_accept = \"0%\"\n", "above 0"),
            ("[decision]\nrule = \"simple\"\nin_guard_band = \"maybe\"\n", "\"conditional\" or \"retest\""),
            ("[decision]\nrule = \"simple\"\nmax_u_to_bin = 1.5\n", "at most 1"),
            ("[decision]\nrule = \"simple\"\nmax_u_to_bin = 0.0\n", "above 0"),
            ("[schedule]\nrule = \"monthly\"\n", "\"interval\" or \"ieee-450\""),
            ("[schedule]\nrule = \"interval\"\ninterval = \"soon\"\n", "schedule.interval = \"soon\""),
            ("[schedule]\nrule = \"ieee-450\"\n", "needs service_life"),
            ("[schedule]\nrule = \"ieee-450\"\nservice_life = \"long\"\n", "schedule.service_life"),
            ("[schedule]\nrule = \"interval\"\n[schedule.in_service]\nP1 = 2021-04-01T10:00:00\n", "schedule.in_service.P1"),
        ] {
            let e = Policy::from_toml(Path::new("g.toml"), &with(table)).unwrap_err().to_string();
            assert!(e.contains(what), "{table}: {e}");
        }
        // The good forms.
        let p = Policy::from_toml(Path::new("g.toml"), &with("[decision]\nrule = \"guard-band\"\nguard_band = 5.0\nin_guard_band = \"retest\"\nmax_u_to_bin = 1.0\n[schedule]\nrule = \"ieee-450\"\nservice_life = \"20y\"\n[schedule.in_service]\nP1 = 2021-04-01\n")).unwrap();
        assert_eq!(p.decision.rule, Rule::GuardBand { multiple_of_u: 5.0 });
        assert_eq!(p.decision.in_band, InBand::Retest);
        assert_eq!(p.decision.max_u_to_bin, Some(1.0));
        let s = p.schedule.unwrap();
        assert_eq!(s.interval_days, DEFAULT_INTERVAL_DAYS);
        assert!(s.service_life_days.is_some());
        assert_eq!(s.in_service.get("P1"), Some(&"2021-04-01".parse().unwrap()));
        let p = Policy::from_toml(
            Path::new("g.toml"),
            &with("[decision]\nrule = \"specific-risk\"\nmax_false_accept = \"2.5%\"\n"),
        )
        .unwrap();
        assert_eq!(
            p.decision.rule,
            Rule::SpecificRisk {
                max_false_accept: 0.025
            }
        );
    }
}
