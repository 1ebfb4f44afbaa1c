//! Grading policy: a TOML file the shop owns that defines grades by state
//! of health, resistance growth and coulombic efficiency. Each grade comes
//! with the reasons for it. The default policy is
//! `policies/default-grading.toml`.

use super::schedule::{parse_days, Rule, Schedule};
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
        "interval" => Rule::Interval,
        "ieee-450" => Rule::Ieee450,
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
        None if rule == Rule::Ieee450 => {
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
}

/// A grade with its reasons.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Grade {
    pub label: String,
    pub meaning: String,
    pub policy: String,
    pub reasons: Vec<String>,
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
        if !errors.is_empty() {
            return Err(InputErrors(errors));
        }
        Ok(Policy {
            name: raw.name,
            grades,
            schedule,
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
        for rule in &self.grades {
            let mut reasons = Vec::new();
            let mut fails = Vec::new();
            let mut check = |name: &str, value: Option<f64>, limit: Option<f64>, at_least: bool| {
                let Some(limit) = limit else { return };
                match value {
                    None => reasons.push(format!("{name} not measured (criterion skipped)")),
                    Some(v) => {
                        let ok = if at_least { v >= limit } else { v <= limit };
                        let op = match (at_least, ok) {
                            (true, true) => ">=",
                            (true, false) => "<",
                            (false, true) => "<=",
                            (false, false) => ">",
                        };
                        // Efficiencies sit close to their floors: two decimals so 99.96 %
                        // does not print as 100.0 %.
                        let d = if name == "coulombic efficiency" { 2 } else { 1 };
                        let line = format!("{name} {v:.d$} % {op} {limit} %");
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
                rule.soh_min.as_ref().and_then(|t| t.for_chemistry(c)),
                true,
            );
            check(
                "resistance growth",
                x.resistance_growth_pct,
                rule.resistance_growth_max
                    .as_ref()
                    .and_then(|t| t.for_chemistry(c)),
                false,
            );
            check(
                "coulombic efficiency",
                x.coulombic_efficiency_pct,
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
                };
            }
            why_not.push(format!("not {}: {}", rule.label, fails.join("; ")));
        }
        // Unreachable with a validated policy (the last grade has no criteria).
        Grade {
            label: "?".into(),
            meaning: String::new(),
            policy: self.name.clone(),
            reasons: why_not,
        }
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
}
