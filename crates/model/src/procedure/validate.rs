//! Raw procedure + pack spec → validated [`Plan`], in one conversion that
//! collects every problem with its file:line:column. Nothing here talks to
//! an instrument.

use super::plan::*;
use super::raw::*;
use crate::location::{toml_error, InputErrors, LocatedError, Location};
use crate::pack::PackSpec;
use crate::units::{self, UnitError};
use std::ops::Range;
use std::path::Path;
use toml::Spanned;

/// The most steps a procedure may expand to (phases × repeats × steps).
pub const MAX_STEPS: usize = 100_000;
/// The shortest sampling interval accepted.
pub const MIN_SAMPLE_S: f64 = 0.01;
/// A drain step's current limit when it gives none, A.
pub const DRAIN_LIMIT_DEFAULT_A: f64 = 0.1;
/// The end condition "charge > N% of measured" ends with this.
pub const MEASURED_SUFFIX: &str = "of measured";

/// A validated step before expansion: kind, ends, result tag, name.
type BuiltStep = (
    StepKind,
    Vec<EndCondition>,
    Option<ResultTag>,
    Option<String>,
);

struct Ctx<'a> {
    file: &'a Path,
    text: &'a str,
    errors: Vec<LocatedError>,
}

impl Ctx<'_> {
    fn err(&mut self, span: &Range<usize>, message: impl Into<String>) {
        self.errors.push(LocatedError {
            location: Location::of_span(self.file, self.text, span),
            message: message.into(),
        });
    }

    fn unit<T>(&mut self, t: &Text, f: impl Fn(&str) -> Result<T, UnitError>) -> Option<T> {
        match f(t.get_ref()) {
            Ok(v) => Some(v),
            Err(e) => {
                self.err(&t.span(), e.to_string());
                None
            }
        }
    }

    fn line(&self, span: &Range<usize>) -> usize {
        Location::of_span(self.file, self.text, span).line
    }
}

/// Parse and validate a procedure file's text for a given pack.
pub fn plan_from_text(file: &Path, text: &str, pack: &PackSpec) -> Result<Plan, InputErrors> {
    let raw: RawProcedure =
        toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
    let mut cx = Ctx {
        file,
        text,
        errors: Vec::new(),
    };
    let plan = build(&mut cx, &raw, pack);
    match plan {
        Some(p) if cx.errors.is_empty() => Ok(p),
        _ => {
            if cx.errors.is_empty() {
                cx.err(&(0..0), "the procedure is not valid");
            }
            Err(InputErrors(cx.errors))
        }
    }
}

fn positive(cx: &mut Ctx, t: &Text, x: f64, what: &str) -> Option<f64> {
    if x > 0.0 && x.is_finite() {
        Some(x)
    } else {
        cx.err(
            &t.span(),
            format!("{what} must be above zero, got '{}'", t.get_ref()),
        );
        None
    }
}

fn build_envelope(cx: &mut Ctx, raw: &RawProcedure, pack: &PackSpec) -> Option<Envelope> {
    let Some(env) = &raw.envelope else {
        cx.err(
            &(0..0),
            "the procedure has no [envelope]; expected voltage_max, voltage_min, current_max and temperature_max",
        );
        return None;
    };
    let span = env.span();
    let env = env.get_ref();
    let series = pack.series;
    let rated = pack.rated_capacity_ah;
    let need = |cx: &mut Ctx, v: &Option<Text>, key: &str, example: &str| -> Option<Text> {
        match v {
            Some(t) => Some(t.clone()),
            None => {
                cx.err(
                    &span,
                    format!("[envelope] is missing {key}; expected e.g. {key} = \"{example}\""),
                );
                None
            }
        }
    };
    let vmax_t = need(cx, &env.voltage_max, "voltage_max", "4.25V/cell");
    let vmin_t = need(cx, &env.voltage_min, "voltage_min", "2.5V/cell");
    let imax_t = need(cx, &env.current_max, "current_max", "1C");
    let tmax_t = need(cx, &env.temperature_max, "temperature_max", "55degC");
    let vmax = vmax_t
        .as_ref()
        .and_then(|t| cx.unit(t, units::voltage).map(|v| (t, v.resolve(series))))
        .and_then(|(t, v)| positive(cx, t, v, "voltage_max"));
    let vmin = vmin_t
        .as_ref()
        .and_then(|t| cx.unit(t, units::voltage).map(|v| (t, v.resolve(series))))
        .and_then(|(t, v)| positive(cx, t, v, "voltage_min"));
    let imax = imax_t
        .as_ref()
        .and_then(|t| cx.unit(t, units::current).map(|v| (t, v.resolve(rated))))
        .and_then(|(t, v)| positive(cx, t, v, "current_max"));
    let tmax = tmax_t
        .as_ref()
        .and_then(|t| cx.unit(t, units::temperature_limit_c));
    let tmin = env
        .temperature_min
        .as_ref()
        .and_then(|t| cx.unit(t, units::temperature_limit_c));
    let charge_max = match &env.charge_max {
        Some(t) => cx
            .unit(t, units::charge)
            .map(|c| c.resolve(rated))
            .and_then(|c| positive(cx, t, c, "charge_max")),
        None => Some(pack.chemistry.default_charge_cap() * rated),
    };
    let step_time_max = match &env.step_time_max {
        Some(t) => cx
            .unit(t, units::duration)
            .and_then(|s| positive(cx, t, s, "step_time_max")),
        None => Some(48.0 * 3600.0),
    };
    // A group is one cell of the series count: "4.25V/cell" is 4.25 V a
    // group, and a bare "4.25V" means the same.
    let group_v = |cx: &mut Ctx, t: &Option<Text>, key: &str| {
        t.as_ref()
            .and_then(|t| cx.unit(t, units::voltage).map(|v| (t, v.resolve(1))))
            .and_then(|(t, v)| positive(cx, t, v, key))
    };
    let gmax = group_v(cx, &env.group_voltage_max, "group_voltage_max");
    let gmin = group_v(cx, &env.group_voltage_min, "group_voltage_min");
    if let (Some(hi), Some(lo), Some(t)) = (gmax, gmin, &env.group_voltage_min) {
        if lo >= hi {
            cx.err(
                &t.span(),
                format!(
                    "group_voltage_min ({lo:.3} V) must be below group_voltage_max ({hi:.3} V)"
                ),
            );
        }
    }
    let rise = env
        .temperature_rise_max
        .as_ref()
        .and_then(|t| cx.unit(t, units::temperature_rate).map(|r| (t, r)))
        .and_then(|(t, r)| positive(cx, t, r, "temperature_rise_max"));
    if let (Some(hi), Some(t)) = (vmax, &vmax_t) {
        let ceiling = pack.chemistry.envelope_ceiling_v_per_cell() * f64::from(series);
        if hi > ceiling {
            cx.err(
                &t.span(),
                format!(
                    "voltage_max {hi:.3} V is beyond what a {} cell takes ({:.2} V/cell, {ceiling:.2} V for {series} in series)",
                    pack.chemistry,
                    pack.chemistry.envelope_ceiling_v_per_cell()
                ),
            );
        }
    }
    if let (Some(hi), Some(lo), Some(t)) = (vmax, vmin, &vmin_t) {
        if lo >= hi {
            cx.err(
                &t.span(),
                format!("voltage_min ({lo:.3} V) must be below voltage_max ({hi:.3} V)"),
            );
        }
    }
    if let (Some(hi), Some(lo), Some(t)) = (tmax, tmin, &env.temperature_min) {
        if lo >= hi {
            cx.err(
                &t.span(),
                format!("temperature_min ({lo} degC) must be below temperature_max ({hi} degC)"),
            );
        }
    }
    Some(Envelope {
        voltage_max_v: vmax?,
        voltage_min_v: vmin?,
        current_max_a: imax?,
        temperature_max_c: tmax?,
        temperature_min_c: tmin,
        charge_max_ah: charge_max?,
        step_time_max_s: step_time_max?,
        group_voltage_max_v: gmax,
        group_voltage_min_v: gmin,
        temperature_rise_max_k_per_s: rise,
    })
}

/// Parse one end condition, e.g. `voltage < 3.0V/cell`.
fn parse_end(cx: &mut Ctx, t: &Text, pack: &PackSpec) -> Option<EndCondition> {
    let s = t.get_ref().trim();
    let ops = ["<=", ">=", "<", ">"];
    let Some((pos, op)) = ops
        .iter()
        .filter_map(|op| s.find(op).map(|p| (p, *op)))
        .min_by_key(|(p, _)| *p)
    else {
        cx.err(
            &t.span(),
            format!("end condition '{s}' has no '<' or '>'; expected e.g. \"voltage < 3.0V/cell\" or \"time > 2h\""),
        );
        return None;
    };
    let what = s[..pos].trim().to_ascii_lowercase();
    let value = s[pos + op.len()..].trim();
    let below = op.starts_with('<');
    let series = pack.series;
    let rated = pack.rated_capacity_ah;
    let wrong_op = |cx: &mut Ctx, expected: &str| {
        cx.err(
            &t.span(),
            format!("end condition '{s}': {what} takes '{expected}', not '{op}'"),
        );
        None
    };
    let parsed = |cx: &mut Ctx, r: Result<f64, UnitError>| match r {
        Ok(v) if v.is_finite() => Some(v),
        Ok(_) => {
            cx.err(
                &t.span(),
                format!("end condition '{s}': value is not finite"),
            );
            None
        }
        Err(e) => {
            cx.err(&t.span(), format!("end condition '{s}': {e}"));
            None
        }
    };
    let cond = match what.as_str() {
        "voltage" => {
            let v = parsed(cx, units::voltage(value).map(|v| v.resolve(series)))?;
            if below {
                EndCondition::VoltageBelow { voltage_v: v }
            } else {
                EndCondition::VoltageAbove { voltage_v: v }
            }
        }
        "current" => {
            if !below {
                return wrong_op(cx, "<");
            }
            let a = parsed(cx, units::current(value).map(|c| c.resolve(rated).abs()))?;
            EndCondition::CurrentBelow { current_a: a }
        }
        "time" => {
            if below {
                return wrong_op(cx, ">");
            }
            EndCondition::Time {
                seconds: parsed(cx, units::duration(value))?,
            }
        }
        "charge" => {
            if below {
                return wrong_op(cx, ">");
            }
            if let Some(pct) = value.strip_suffix(MEASURED_SUFFIX) {
                // A share of the capacity this run measures (its step with
                // result = "capacity"), for the pulse characterization's
                // state-of-charge levels; checked against the plan later.
                let fraction = match units::charge(pct.trim()) {
                    Ok(units::ChargeSpec::PercentOfRated(p))
                        if p.is_finite() && p > 0.0 && p <= 100.0 =>
                    {
                        p / 100.0
                    }
                    _ => {
                        cx.err(
                            &t.span(),
                            format!("end condition '{s}': expected a percentage from 0 to 100 before 'of measured', e.g. 'charge > 10% of measured'"),
                        );
                        return None;
                    }
                };
                return Some(EndCondition::ChargeOfMeasured {
                    fraction,
                    rated_ah: rated * fraction,
                });
            }
            EndCondition::Charge {
                ah: parsed(cx, units::charge(value).map(|c| c.resolve(rated).abs()))?,
            }
        }
        "energy" => {
            if below {
                return wrong_op(cx, ">");
            }
            EndCondition::Energy {
                wh: parsed(cx, units::energy_wh(value).map(f64::abs))?,
            }
        }
        "temperature" => {
            if below {
                return wrong_op(cx, ">");
            }
            EndCondition::TemperatureAbove {
                celsius: parsed(cx, units::temperature_c(value))?,
            }
        }
        "dv/dt" | "dvdt" => {
            if !below {
                return wrong_op(cx, "<");
            }
            EndCondition::Settled {
                volts_per_s: parsed(
                    cx,
                    units::voltage_rate(value).map(|r| r.resolve(series).abs()),
                )?,
            }
        }
        // `dT/dt` (lowercased here).
        "dt/dt" => {
            if !below {
                return wrong_op(cx, "<");
            }
            EndCondition::TemperatureSettled {
                kelvin_per_s: parsed(cx, units::temperature_rate(value).map(f64::abs))?,
            }
        }
        "peak_drop" => {
            if below {
                return wrong_op(cx, ">");
            }
            EndCondition::PeakDrop {
                voltage_v: parsed(cx, units::voltage(value).map(|v| v.resolve(series).abs()))?,
            }
        }
        other => {
            cx.err(
                &t.span(),
                format!(
                    "unknown end condition '{other}'; expected one of voltage, current, time, charge, energy, temperature, dv/dt, dT/dt, peak_drop"
                ),
            );
            return None;
        }
    };
    Some(cond)
}

/// Can this condition end this kind of step, given its setpoints?
fn reachable(kind: &StepKind, c: &EndCondition, env: &Envelope, pack: &PackSpec) -> bool {
    use EndCondition as E;
    match (kind, c) {
        (_, E::Time { seconds }) => *seconds > 0.0,
        (StepKind::Rest, E::Settled { volts_per_s }) => *volts_per_s > 0.0,
        (StepKind::Rest, E::TemperatureSettled { kelvin_per_s }) => *kelvin_per_s > 0.0,
        (StepKind::Rest, _) => false,
        (StepKind::Drain { .. }, _) => false,
        (_, E::TemperatureAbove { .. }) => false,
        (StepKind::Pulse { .. }, _) => true,
        (_, E::Charge { ah }) => *ah > 0.0,
        (_, E::ChargeOfMeasured { fraction, .. }) => *fraction > 0.0,
        (_, E::Energy { wh }) => *wh > 0.0,
        (
            StepKind::Charge {
                voltage_v,
                current_a,
            },
            E::VoltageAbove { voltage_v: x },
        ) => *x < *voltage_v && *current_a > 0.0,
        (StepKind::Charge { current_a, .. }, E::CurrentBelow { current_a: x }) => {
            *x > 0.0 && *x < *current_a
        }
        // The voltage falls from its peak near full only in nickel cells;
        // a lithium or lead-acid charge held at its voltage limit never
        // shows a drop (common practice: −ΔV is a NiMH/NiCd end signal).
        (StepKind::Charge { .. }, E::PeakDrop { voltage_v }) => {
            *voltage_v > 0.0 && pack.chemistry == crate::pack::Chemistry::Nimh
        }
        (StepKind::Charge { .. }, E::Settled { .. } | E::TemperatureSettled { .. }) => false,
        (StepKind::Charge { .. }, E::VoltageBelow { .. }) => false,
        (StepKind::Discharge { .. }, E::VoltageBelow { voltage_v }) => {
            *voltage_v > env.voltage_min_v
        }
        (StepKind::Discharge { load }, E::CurrentBelow { current_a: x }) => match load {
            DischargeMode::Current { .. } => false,
            // Current falls with the voltage under constant resistance and
            // rises under constant power.
            DischargeMode::Resistance { resistance_ohm } => *x > env.voltage_min_v / resistance_ohm,
            DischargeMode::Power { .. } => false,
        },
        (StepKind::Discharge { .. }, _) => false,
    }
}

/// The setpoint keys each step kind takes (besides `kind`, `name`,
/// `ends`, `result` and `every`, which every kind takes). Any other
/// setpoint key on a step is an error, not silently ignored.
pub const STEP_KEYS: [(StepType, &[&str]); 5] = [
    (StepType::Charge, &["current", "voltage"]),
    (
        StepType::Discharge,
        &["mode", "current", "power", "resistance"],
    ),
    (StepType::Rest, &[]),
    (StepType::Pulse, &["levels"]),
    (StepType::Drain, &["current"]),
];

/// The setpoint keys a raw step holds, with their places.
fn setpoint_keys(st: &RawStep) -> Vec<(&'static str, std::ops::Range<usize>)> {
    let mut out = Vec::new();
    for (key, v) in [
        ("mode", &st.mode),
        ("current", &st.current),
        ("voltage", &st.voltage),
        ("power", &st.power),
        ("resistance", &st.resistance),
    ] {
        if let Some(t) = v {
            out.push((key, t.span()));
        }
    }
    if let Some(l) = &st.levels {
        out.push(("levels", l.span()));
    }
    out
}

/// Report every setpoint key the step's kind does not take.
fn check_keys(cx: &mut Ctx, st: &RawStep, kind: StepType) {
    let allowed = STEP_KEYS
        .iter()
        .find(|(k, _)| *k == kind)
        .map_or(&[][..], |(_, keys)| *keys);
    for (key, span) in setpoint_keys(st) {
        if !allowed.contains(&key) {
            cx.err(&span, format!("a {} step takes no '{key}'", kind.name()));
        }
    }
}

/// A current setpoint: a positive magnitude inside the envelope.
fn current_setpoint(cx: &mut Ctx, t: &Text, env: &Envelope, rated_ah: f64) -> Option<f64> {
    let a = cx.unit(t, units::current)?.resolve(rated_ah);
    if !(a > 0.0 && a.is_finite()) {
        cx.err(
            &t.span(),
            format!(
                "current must be a positive magnitude (the step kind sets the direction), got '{}'",
                t.get_ref()
            ),
        );
        return None;
    }
    if a > env.current_max_a {
        cx.err(
            &t.span(),
            format!(
                "current {a:.3} A is outside the envelope (current_max {:.3} A)",
                env.current_max_a
            ),
        );
        return None;
    }
    Some(a)
}

fn build_charge(
    cx: &mut Ctx,
    raw: &Spanned<RawStep>,
    env: &Envelope,
    pack: &PackSpec,
) -> Option<StepKind> {
    let (span, st) = (raw.span(), raw.get_ref());
    let current = match &st.current {
        Some(t) => current_setpoint(cx, t, env, pack.rated_capacity_ah),
        None => {
            cx.err(
                &span,
                "a charge step needs a current, e.g. current = \"0.5C\"",
            );
            None
        }
    };
    let voltage = match &st.voltage {
        Some(t) => cx
            .unit(t, units::voltage)
            .map(|v| (t, v.resolve(pack.series))),
        None => {
            cx.err(
                &span,
                "a charge step needs a voltage limit, e.g. voltage = \"4.2V/cell\"",
            );
            None
        }
    };
    let voltage = voltage.and_then(|(t, v)| {
        if v >= env.voltage_max_v {
            cx.err(
                &t.span(),
                format!(
                    "charge voltage {v:.3} V is outside the envelope (must be below voltage_max {:.3} V)",
                    env.voltage_max_v
                ),
            );
            None
        } else if v <= env.voltage_min_v {
            cx.err(
                &t.span(),
                format!(
                    "charge voltage {v:.3} V is below the envelope's voltage_min {:.3} V",
                    env.voltage_min_v
                ),
            );
            None
        } else {
            Some(v)
        }
    });
    Some(StepKind::Charge {
        current_a: current?,
        voltage_v: voltage?,
    })
}

/// The setpoint keys of each discharge mode: a mode's step takes no other
/// mode's setpoint.
const DISCHARGE_MODE_KEYS: [(&str, &str); 3] = [
    ("current", "current"),
    ("power", "power"),
    ("resistance", "resistance"),
];

fn build_discharge(
    cx: &mut Ctx,
    raw: &Spanned<RawStep>,
    env: &Envelope,
    pack: &PackSpec,
) -> Option<StepKind> {
    let (span, st) = (raw.span(), raw.get_ref());
    let mode = st
        .mode
        .as_ref()
        .map(|m| m.get_ref().trim().to_ascii_lowercase())
        .unwrap_or_else(|| "current".into());
    if DISCHARGE_MODE_KEYS.iter().any(|(m, _)| *m == mode) {
        for (m, key) in DISCHARGE_MODE_KEYS {
            let v = match key {
                "current" => &st.current,
                "power" => &st.power,
                _ => &st.resistance,
            };
            if let (Some(t), true) = (v, m != mode) {
                cx.err(&t.span(), format!("a discharge step takes no '{key}'"));
            }
        }
    }
    let load = match mode.as_str() {
        "current" => match &st.current {
            Some(t) => current_setpoint(cx, t, env, pack.rated_capacity_ah)
                .map(|a| DischargeMode::Current { current_a: a }),
            None => {
                cx.err(
                    &span,
                    "a constant-current discharge needs a current, e.g. current = \"0.2C\"",
                );
                None
            }
        },
        "power" => match &st.power {
            Some(t) => discharge_power(cx, t, env, pack.series),
            None => {
                cx.err(&span, "a constant-power discharge needs power = \"...W\"");
                None
            }
        },
        "resistance" => match &st.resistance {
            Some(t) => discharge_resistance(cx, t, env),
            None => {
                cx.err(
                    &span,
                    "a constant-resistance discharge needs resistance = \"...ohm\"",
                );
                None
            }
        },
        other => {
            if let Some(m) = &st.mode {
                cx.err(
                    &m.span(),
                    format!(
                        "unknown discharge mode '{other}'; expected current, power or resistance"
                    ),
                );
            }
            None
        }
    };
    Some(StepKind::Discharge { load: load? })
}

/// A constant-power load: at the lowest allowed voltage its current is
/// highest, and that must be inside the envelope.
fn discharge_power(cx: &mut Ctx, t: &Text, env: &Envelope, series: u32) -> Option<DischargeMode> {
    let p = cx.unit(t, units::power).map(|p| p.resolve(series))?;
    let p = positive(cx, t, p, "power")?;
    let worst = p / env.voltage_min_v;
    if worst > env.current_max_a {
        cx.err(
            &t.span(),
            format!(
                "power {p:.2} W draws {worst:.3} A at voltage_min, outside the envelope (current_max {:.3} A)",
                env.current_max_a
            ),
        );
        return None;
    }
    Some(DischargeMode::Power { power_w: p })
}

/// A constant-resistance load: at the highest allowed voltage its current
/// is highest, and that must be inside the envelope.
fn discharge_resistance(cx: &mut Ctx, t: &Text, env: &Envelope) -> Option<DischargeMode> {
    let r = cx.unit(t, units::resistance_ohm)?;
    let r = positive(cx, t, r, "resistance")?;
    let worst = env.voltage_max_v / r;
    if worst > env.current_max_a {
        cx.err(
            &t.span(),
            format!(
                "resistance {r:.4} ohm draws {worst:.3} A at voltage_max, outside the envelope (current_max {:.3} A)",
                env.current_max_a
            ),
        );
        return None;
    }
    Some(DischargeMode::Resistance { resistance_ohm: r })
}

/// The source's current limit while it holds the voltage: small, so a
/// wrong voltage cannot push much charge either way.
fn build_drain(cx: &mut Ctx, st: &RawStep, env: &Envelope, pack: &PackSpec) -> Option<StepKind> {
    let limit = match &st.current {
        Some(t) => current_setpoint(cx, t, env, pack.rated_capacity_ah)?,
        None => DRAIN_LIMIT_DEFAULT_A.min(env.current_max_a),
    };
    Some(StepKind::Drain {
        current_limit_a: limit,
    })
}

fn build_pulse(
    cx: &mut Ctx,
    raw: &Spanned<RawStep>,
    env: &Envelope,
    pack: &PackSpec,
) -> Option<StepKind> {
    let (span, st) = (raw.span(), raw.get_ref());
    let Some(levels) = &st.levels else {
        cx.err(
            &span,
            "a pulse step needs levels, e.g. levels = [{ current = \"-0.2C\", duration = \"10s\" }]",
        );
        return None;
    };
    if levels.get_ref().is_empty() {
        cx.err(&levels.span(), "a pulse step needs at least one level");
    }
    let mut out = Vec::new();
    for l in levels.get_ref() {
        let lv = l.get_ref();
        let a = cx
            .unit(&lv.current, units::current)
            .map(|c| c.resolve(pack.rated_capacity_ah));
        let d = cx
            .unit(&lv.duration, units::duration)
            .and_then(|d| positive(cx, &lv.duration, d, "duration"));
        if let Some(a) = a {
            if a.abs() > env.current_max_a {
                cx.err(
                    &lv.current.span(),
                    format!(
                        "pulse current {a:.3} A is outside the envelope (current_max {:.3} A)",
                        env.current_max_a
                    ),
                );
                continue;
            }
        }
        if let (Some(a), Some(d)) = (a, d) {
            out.push(PulseLevel {
                current_a: a,
                duration_s: d,
            });
        }
    }
    Some(StepKind::Pulse { levels: out })
}

/// A step's end conditions; thresholds beyond the envelope would never be
/// met before a trip and are errors.
fn step_ends(cx: &mut Ctx, st: &RawStep, env: &Envelope, pack: &PackSpec) -> Vec<EndCondition> {
    let mut ends = Vec::new();
    for t in &st.ends {
        let Some(c) = parse_end(cx, t, pack) else {
            continue;
        };
        match c {
            EndCondition::VoltageBelow { voltage_v } if voltage_v <= env.voltage_min_v => cx.err(
                &t.span(),
                format!(
                    "cutoff {voltage_v:.3} V is outside the envelope (must be above voltage_min {:.3} V)",
                    env.voltage_min_v
                ),
            ),
            EndCondition::VoltageAbove { voltage_v } if voltage_v >= env.voltage_max_v => cx.err(
                &t.span(),
                format!(
                    "end voltage {voltage_v:.3} V is outside the envelope (must be below voltage_max {:.3} V)",
                    env.voltage_max_v
                ),
            ),
            EndCondition::TemperatureAbove { celsius } if celsius >= env.temperature_max_c => cx.err(
                &t.span(),
                format!(
                    "end temperature {celsius} degC is at or above the envelope's temperature_max {} degC",
                    env.temperature_max_c
                ),
            ),
            _ => ends.push(c),
        }
    }
    ends
}

/// A step's result tag, on a step that can give it.
fn result_tag(cx: &mut Ctx, st: &RawStep, kind: &StepKind) -> Option<ResultTag> {
    let t = st.result.as_ref()?;
    match t.get_ref().trim() {
        "capacity" => {
            if !matches!(kind, StepKind::Discharge { .. }) {
                cx.err(
                    &t.span(),
                    "result = \"capacity\" belongs on a discharge step",
                );
            }
            Some(ResultTag::Capacity)
        }
        "dcir" => {
            let ok = matches!(kind, StepKind::Pulse { levels } if levels.len() >= 2
                && (levels[0].current_a - levels[1].current_a).abs() > 0.0);
            if !ok {
                cx.err(
                    &t.span(),
                    "result = \"dcir\" belongs on a pulse step whose first two levels differ in current",
                );
            }
            Some(ResultTag::Dcir)
        }
        "window" => {
            if !matches!(kind, StepKind::Discharge { .. }) {
                cx.err(&t.span(), "result = \"window\" belongs on a discharge step");
            }
            Some(ResultTag::Window)
        }
        other => {
            cx.err(
                &t.span(),
                format!(
                    "unknown result tag '{other}'; expected \"capacity\", \"dcir\" or \"window\""
                ),
            );
            None
        }
    }
}

/// A step none of whose end conditions its setpoints can reach would only
/// stop on the envelope's step time cap: an error, with what it can end on.
fn check_can_end(
    cx: &mut Ctx,
    span: &std::ops::Range<usize>,
    kind: &StepKind,
    ends: &[EndCondition],
    env: &Envelope,
    pack: &PackSpec,
) {
    let can_end = matches!(kind, StepKind::Pulse { .. })
        || ends.iter().any(|c| reachable(kind, c, env, pack));
    if can_end {
        return;
    }
    let hint = match kind {
        StepKind::Charge { .. } => "a charge step can end on current < (taper below its current), voltage > (below its voltage limit), charge >, energy >, peak_drop > (NiMH only) or time >",
        StepKind::Discharge { .. } => "a discharge step can end on voltage < (above voltage_min), charge >, energy > or time >",
        StepKind::Rest => "a rest can end on time >, dv/dt < or dT/dt <",
        StepKind::Drain { .. } => "a drain step ends on time > (it measures over a set time)",
        StepKind::Pulse { .. } => "",
    };
    cx.err(
        span,
        format!(
            "this {} step cannot end: none of its end conditions can be reached with its setpoints; {hint}",
            kind.name()
        ),
    );
}

/// Build one step: its kind (one builder per kind), its ends, its result
/// tag, and whether it can end at all.
fn build_step(
    cx: &mut Ctx,
    raw: &Spanned<RawStep>,
    env: &Envelope,
    pack: &PackSpec,
) -> Option<BuiltStep> {
    let st = raw.get_ref();
    let errors_before = cx.errors.len();
    let kind_name = st.kind.get_ref().trim().to_ascii_lowercase();
    let Ok(step_type) = kind_name.parse::<StepType>() else {
        cx.err(
            &st.kind.span(),
            format!(
                "unknown step kind '{kind_name}'; expected charge, discharge, rest, pulse or drain"
            ),
        );
        return None;
    };
    check_keys(cx, st, step_type);
    let kind = match step_type {
        StepType::Charge => build_charge(cx, raw, env, pack),
        StepType::Discharge => build_discharge(cx, raw, env, pack),
        StepType::Rest => Some(StepKind::Rest),
        StepType::Drain => build_drain(cx, st, env, pack),
        StepType::Pulse => build_pulse(cx, raw, env, pack),
        StepType::Unknown => {
            cx.err(
                &st.kind.span(),
                "unknown step kind 'unknown'; expected charge, discharge, rest, pulse or drain",
            );
            None
        }
    }?;
    let ends = step_ends(cx, st, env, pack);
    let result = result_tag(cx, st, &kind);
    if cx.errors.len() == errors_before {
        check_can_end(cx, &raw.span(), &kind, &ends, env, pack);
    }
    let name = st.name.as_ref().map(|n| n.get_ref().clone());
    Some((kind, ends, result, name))
}

/// A sampling interval, between [`MIN_SAMPLE_S`] and an hour.
fn sample_interval(cx: &mut Ctx, t: &Text) -> Option<f64> {
    cx.unit(t, units::duration).and_then(|v| {
        if (MIN_SAMPLE_S..=3600.0).contains(&v) {
            Some(v)
        } else {
            cx.err(
                &t.span(),
                format!(
                    "sampling interval must be between {MIN_SAMPLE_S} s and 1 h, got '{}'",
                    t.get_ref()
                ),
            );
            None
        }
    })
}

fn build(cx: &mut Ctx, raw: &RawProcedure, pack: &PackSpec) -> Option<Plan> {
    if let Err(m) = pack.check() {
        cx.err(&(0..0), format!("pack spec: {m}"));
        return None;
    }
    let env = build_envelope(cx, raw, pack);
    let every = match raw
        .sampling
        .as_ref()
        .and_then(|s| s.get_ref().every.as_ref())
    {
        Some(t) => sample_interval(cx, t),
        None => Some(1.0),
    };
    let fine = build_fine(cx, raw, every);
    let offsets = build_offsets(cx, raw);
    if raw.phase.is_empty() {
        cx.err(
            &(0..0),
            "the procedure has no [[phase]]; expected at least one phase with steps",
        );
    }
    let env = env?;
    // Validate each written step once, then expand repeats.
    let mut expanded_count: usize = 0;
    let mut written = Vec::new();
    let mut seen_capacity = false;
    for ph in &raw.phase {
        let p = ph.get_ref();
        let repeat = match &p.repeat {
            None => 1,
            Some(r) => match u32::try_from(*r.get_ref()) {
                Ok(n) if (1..=10_000).contains(&n) => n,
                _ => {
                    cx.err(
                        &r.span(),
                        format!("repeat must be between 1 and 10000, got {}", r.get_ref()),
                    );
                    1
                }
            },
        };
        if p.step.is_empty() {
            cx.err(
                &ph.span(),
                format!("phase '{}' has no steps", p.name.get_ref()),
            );
        }
        expanded_count =
            expanded_count.saturating_add(p.step.len().saturating_mul(repeat as usize));
        if expanded_count > MAX_STEPS {
            cx.err(
                &ph.span(),
                format!("the procedure expands to more than {MAX_STEPS} steps"),
            );
            return None;
        }
        let mut steps = Vec::new();
        for s in &p.step {
            let line = cx.line(&s.span());
            let own_every = s
                .get_ref()
                .every
                .as_ref()
                .and_then(|t| sample_interval(cx, t));
            if let Some(b) = build_step(cx, s, &env, pack) {
                let of_measured =
                    b.1.iter()
                        .any(|c| matches!(c, EndCondition::ChargeOfMeasured { .. }));
                if of_measured && !seen_capacity {
                    cx.err(
                        &s.span(),
                        "'charge > N% of measured' needs an earlier step with result = \"capacity\" (a discharge to the cutoff that measures the capacity)",
                    );
                }
                seen_capacity |= b.2 == Some(ResultTag::Capacity);
                steps.push((b, line, own_every));
            }
        }
        written.push((p.name.get_ref().clone(), repeat, steps));
    }
    let every = every?;
    if !cx.errors.is_empty() {
        return None;
    }
    let mut steps = Vec::new();
    let mut cycle = 0u32;
    let mut last_direction: Option<bool> = None; // true = charge
    for (phase, repeat, ws) in written {
        for r in 1..=repeat {
            for ((kind, ends, result, name), line, own_every) in &ws {
                let dir = match kind {
                    StepKind::Charge { .. } => Some(true),
                    StepKind::Discharge { .. } => Some(false),
                    _ => None,
                };
                if dir == Some(true) && last_direction != Some(true) {
                    cycle += 1;
                }
                if dir.is_some() {
                    last_direction = dir;
                }
                steps.push(PlanStep {
                    index: steps.len() as u32 + 1,
                    phase: phase.clone(),
                    repeat: r,
                    cycle,
                    name: name.clone(),
                    kind: kind.clone(),
                    ends: ends.clone(),
                    result: *result,
                    sample_every_s: *own_every,
                    line: *line,
                });
            }
        }
    }
    Some(Plan {
        title: raw.title.get_ref().clone(),
        pack: pack.clone(),
        envelope: env,
        sample_every_s: every,
        fine,
        offsets,
        steps,
    })
}

/// `[sampling] fine` and `fine_within`.
fn build_fine(cx: &mut Ctx, raw: &RawProcedure, every: Option<f64>) -> Option<FineSampling> {
    let s = raw.sampling.as_ref()?.get_ref();
    let Some(t) = &s.fine else {
        if let Some(w) = &s.fine_within {
            cx.err(
                &w.span(),
                "fine_within needs fine = \"...\" (the finer interval)",
            );
        }
        return None;
    };
    let fine = sample_interval(cx, t)?;
    if every.is_some_and(|e| fine >= e) {
        cx.err(
            &t.span(),
            format!(
                "the fine interval must be shorter than the base interval ({} s), got '{}'",
                every.unwrap_or(0.0),
                t.get_ref()
            ),
        );
        return None;
    }
    let within = match &s.fine_within {
        None => FINE_WITHIN_DEFAULT,
        Some(w) => match units::parse(w.get_ref()) {
            Ok(units::Quantity::Percent(p)) if p > 0.0 && p <= 50.0 => p / 100.0,
            _ => {
                cx.err(
                    &w.span(),
                    format!(
                        "fine_within must be a percentage between 0 and 50 %, got '{}'",
                        w.get_ref()
                    ),
                );
                return None;
            }
        },
    };
    Some(FineSampling {
        every_s: fine,
        within_fraction: within,
    })
}

/// `[offsets] warn_above` and `correct`.
fn build_offsets(cx: &mut Ctx, raw: &RawProcedure) -> OffsetPolicy {
    let mut p = OffsetPolicy::default();
    let Some(o) = &raw.offsets else { return p };
    let o = o.get_ref();
    if let Some(t) = &o.warn_above {
        match units::current(t.get_ref()) {
            Ok(units::CurrentSpec::Amps(a)) if a > 0.0 && a.is_finite() => p.warn_above_a = a,
            Ok(_) => cx.err(
                &t.span(),
                format!(
                    "warn_above must be a current above zero in A or mA, got '{}'",
                    t.get_ref()
                ),
            ),
            Err(e) => cx.err(&t.span(), e.to_string()),
        }
    }
    if let Some(c) = &o.correct {
        p.correct = *c.get_ref();
    }
    p
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pack::Chemistry;

    fn pack() -> PackSpec {
        PackSpec {
            chemistry: Chemistry::LiIon,
            series: 4,
            rated_capacity_ah: 2.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        }
    }

    fn one_step(step: &str) -> Result<Plan, InputErrors> {
        let text = format!(
            "title = \"t\"\n[envelope]\nvoltage_max = \"4.25V/cell\"\nvoltage_min = \"2.8V/cell\"\ncurrent_max = \"1C\"\ntemperature_max = \"55degC\"\n[[phase]]\nname = \"p\"\n  [[phase.step]]\n{step}\n"
        );
        plan_from_text(Path::new("t.toml"), &text, &pack())
    }

    /// The group limits: per cell (a group is one cell of the series
    /// count), a rise in K/min, each checked where it is written.
    #[test]
    fn group_limits_are_per_cell_and_located() {
        let with = |extra: &str| {
            let text = format!(
                "title = \"t\"\n[envelope]\nvoltage_max = \"4.25V/cell\"\nvoltage_min = \"2.8V/cell\"\ncurrent_max = \"1C\"\ntemperature_max = \"55degC\"\n{extra}\n[[phase]]\nname = \"p\"\n  [[phase.step]]\n  kind = \"rest\"\n  ends = [\"time > 1h\"]\n"
            );
            plan_from_text(Path::new("t.toml"), &text, &pack())
        };
        let p = with("group_voltage_max = \"4.25V/cell\"\ngroup_voltage_min = \"2.7V\"\ntemperature_rise_max = \"1K/min\"")
            .unwrap();
        assert_eq!(p.envelope.group_voltage_max_v, Some(4.25));
        assert_eq!(p.envelope.group_voltage_min_v, Some(2.7));
        let r = p.envelope.temperature_rise_max_k_per_s.unwrap();
        assert!((r - 1.0 / 60.0).abs() < 1e-12, "{r}");
        let e = with("group_voltage_max = \"3.0V/cell\"\ngroup_voltage_min = \"3.1V/cell\"")
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("t.toml:8:21:"), "{e}");
        assert!(e.contains("must be below group_voltage_max"), "{e}");
        let e = with("temperature_rise_max = \"1V\"")
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("t.toml:7:24:"), "{e}");
        assert!(
            p.envelope.voltage_max_v > 4.25,
            "pack limits are the series count's"
        );
    }

    /// Every setpoint key a kind does not take is an error at its place;
    /// the keys it takes build the step.
    #[test]
    fn each_kind_takes_only_its_own_setpoints() {
        for (kind, keys) in STEP_KEYS {
            for key in ["mode", "current", "voltage", "power", "resistance"] {
                if keys.contains(&key) {
                    continue;
                }
                let e = one_step(&format!(
                    "kind = \"{}\"\n{key} = \"1\"\nends = [\"time > 1min\"]",
                    kind.name()
                ))
                .unwrap_err()
                .to_string();
                assert!(
                    e.contains(&format!("a {} step takes no '{key}'", kind.name())),
                    "{kind:?} {key}: {e}"
                );
                assert!(
                    e.contains(&format!(
                        "t.toml:11:{}: a {} step takes no",
                        key.len() + 4,
                        kind.name()
                    )),
                    "located on the key: {e}"
                );
            }
        }
        // A power discharge takes no current; a current one no power.
        let e = one_step("kind = \"discharge\"\nmode = \"power\"\npower = \"5W\"\ncurrent = \"1A\"\nends = [\"voltage < 3.0V/cell\"]")
            .unwrap_err()
            .to_string();
        assert!(e.contains("a discharge step takes no 'current'"), "{e}");
        let ok = one_step("kind = \"discharge\"\nmode = \"power\"\npower = \"5W\"\nends = [\"voltage < 3.0V/cell\"]").unwrap();
        assert_eq!(
            ok.steps[0].kind,
            StepKind::Discharge {
                load: DischargeMode::Power { power_w: 5.0 }
            }
        );
        let e = one_step("kind = \"float\"\nends = [\"time > 1min\"]")
            .unwrap_err()
            .to_string();
        assert!(e.contains("unknown step kind 'float'"), "{e}");
    }

    /// "charge > N% of measured": a share of the run's measured capacity,
    /// only after a step that measures it, and only a percentage of 0–100.
    #[test]
    fn a_share_of_the_measured_capacity_needs_a_capacity_step_before_it() {
        let head = "title = \"t\"\n[envelope]\nvoltage_max = \"4.25V/cell\"\nvoltage_min = \"2.8V/cell\"\ncurrent_max = \"1C\"\ntemperature_max = \"55degC\"\n";
        let capacity = "[[phase]]\nname = \"c\"\n  [[phase.step]]\n  kind = \"discharge\"\n  current = \"0.2C\"\n  ends = [\"voltage < 3.0V/cell\"]\n  result = \"capacity\"\n";
        let share = |end: &str| {
            format!("[[phase]]\nname = \"s\"\n  [[phase.step]]\n  kind = \"discharge\"\n  current = \"0.2C\"\n  ends = [\"{end}\", \"voltage < 3.0V/cell\"]\n")
        };
        // After a capacity step: resolved, with the rated share standing in.
        let text = format!("{head}{capacity}{}", share("charge > 10% of measured"));
        let plan = plan_from_text(Path::new("t.toml"), &text, &pack()).unwrap();
        let want = pack().rated_capacity_ah * 0.1;
        assert!(plan.steps[1].ends.iter().any(|c| matches!(*c,
            EndCondition::ChargeOfMeasured { fraction, rated_ah }
                if (fraction - 0.1).abs() < 1e-12 && (rated_ah - want).abs() < 1e-9)));
        assert_eq!(
            plan.steps[1].ends[0].to_string(),
            "charge > 10.0% of measured"
        );
        // Before one: refused at the step's line.
        let text = format!("{head}{}{capacity}", share("charge > 10% of measured"));
        let e = plan_from_text(Path::new("t.toml"), &text, &pack())
            .unwrap_err()
            .to_string();
        assert!(e.contains("t.toml:9:3:"), "{e}");
        assert!(
            e.contains("needs an earlier step with result = \"capacity\""),
            "{e}"
        );
        // Not a percentage, or over 100 %.
        for bad in ["charge > 2Ah of measured", "charge > 150% of measured"] {
            let text = format!("{head}{capacity}{}", share(bad));
            let e = plan_from_text(Path::new("t.toml"), &text, &pack())
                .unwrap_err()
                .to_string();
            assert!(
                e.contains("expected a percentage from 0 to 100"),
                "{bad}: {e}"
            );
        }
    }
}
