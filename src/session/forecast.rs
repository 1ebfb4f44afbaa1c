//! Dry run: the procedure played on the simulated pack at full speed, in
//! memory (nothing written, no instrument touched), to show what to expect
//! of each step — its duration, charge and end — and what may go wrong:
//! a charge whose time cap comes before it is full, a capacity step that
//! would end on its time cap instead of its cutoff, an envelope limit
//! within 2 % of a setpoint, a simulated safety stop.

use analysis::integrate::Integrator;
use analysis::FULL_START_TOLERANCE;
use engine::clock::{Clock, SimClock};
use engine::control::StopHandle;
use engine::{Engine, Station};
use instrument::{Load, Source};
use model::procedure::{DischargeMode, EndCondition, Plan, ResultTag, StepKind, StepType};
use model::sample::Sample;
use model::simconfig::SimConfig;
use model::status::RunStatus;
use model::units::HumanDuration;
use record::event::{EndKind, Event, Sink};
use serde::Serialize;
use std::fmt;
use std::sync::Arc;

/// An envelope limit this close to a setpoint is flagged (2 %).
pub const NEAR_LIMIT: f64 = 0.02;

/// What one step is expected to do.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct StepForecast {
    pub step: u32,
    pub kind: StepType,
    pub duration_s: f64,
    /// Net charge, Ah (positive into the pack).
    pub ah: f64,
    pub end_kind: Option<EndKind>,
    pub end_reason: String,
}

/// The whole dry run.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Forecast {
    pub steps: Vec<StepForecast>,
    pub total_s: f64,
    /// How the simulated run ended (completed, or aborted and why); none
    /// when it could not run ("not run" in JSON).
    #[serde(serialize_with = "status_or_not_run")]
    pub status: Option<RunStatus>,
    pub stop_reason: Option<String>,
    pub warnings: Vec<String>,
    /// The instruments' own protection the run programs before its first
    /// step (the backstop), from the envelope.
    pub backstop: Vec<BackstopLevel>,
}

/// One protection level the run programs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BackstopLevel {
    pub instrument: String,
    pub protection: String,
    pub level: f64,
    pub unit: String,
}

#[derive(Default)]
struct ForecastSink {
    backstop: Vec<BackstopLevel>,
    steps: Vec<StepForecast>,
    open: Option<(f64, Integrator)>,
    last_t: f64,
    status: Option<RunStatus>,
    reason: Option<String>,
}

fn status_or_not_run<S: serde::Serializer>(
    s: &Option<RunStatus>,
    ser: S,
) -> Result<S::Ok, S::Error> {
    ser.serialize_str(s.map_or("not run", |s| s.name()))
}

impl Sink for ForecastSink {
    fn sample(&mut self, s: &Sample) -> std::io::Result<()> {
        if let Some((_, g)) = self.open.as_mut() {
            g.push(s.t_s, s.voltage_v, s.current_a);
        }
        self.last_t = s.t_s;
        Ok(())
    }
    fn event(&mut self, e: &Event) -> std::io::Result<()> {
        match e {
            Event::StepStart {
                t_s, step, kind, ..
            } => {
                self.open = Some((*t_s, Integrator::default()));
                self.steps.push(StepForecast {
                    step: *step,
                    kind: *kind,
                    duration_s: 0.0,
                    ah: 0.0,
                    end_kind: None,
                    end_reason: "not reached".into(),
                });
            }
            Event::StepEnd {
                t_s,
                end_kind,
                end_reason,
                ..
            } => {
                if let (Some((t0, g)), Some(last)) = (self.open.take(), self.steps.last_mut()) {
                    last.duration_s = t_s - t0;
                    last.ah = g.ah;
                    last.end_kind = Some(*end_kind);
                    last.end_reason = end_reason.clone();
                }
            }
            Event::Backstop {
                instrument,
                protection,
                level,
                unit,
                ..
            } => self.backstop.push(BackstopLevel {
                instrument: instrument.clone(),
                protection: protection.clone(),
                level: *level,
                unit: unit.clone(),
            }),
            Event::RunEnd {
                t_s,
                status,
                reason,
            } => {
                self.last_t = self.last_t.max(*t_s);
                self.status = Some(*status);
                self.reason = reason.clone();
            }
            _ => {}
        }
        Ok(())
    }
}

/// A charge voltage this close under `voltage_max` is flagged (1 %): a
/// supply holds its set voltage to a fraction of that, so the usual
/// 50 mV/cell margin of a 4.20 V/cell charge under 4.25 V/cell passes
/// (common practice).
pub const NEAR_CHARGE_VOLTAGE: f64 = 0.01;

/// What a procedure's text alone says may go wrong: limits too close to a
/// setpoint, a capacity step that does not follow a full charge.
pub fn plan_warnings(plan: &Plan) -> Vec<String> {
    let mut out = near_limits(plan);
    out.extend(capacity_start_warnings(plan));
    out
}

/// Capacity steps that do not follow a full charge: the nearest step
/// before them, rests and short resistance pulses aside (together under
/// [`FULL_START_TOLERANCE`] of the rated charge), must be a charge that
/// ends on its taper current or its −ΔV.
pub fn capacity_start_warnings(plan: &Plan) -> Vec<String> {
    let mut out = Vec::new();
    let allowance = FULL_START_TOLERANCE * plan.pack.rated_capacity_ah;
    for (k, st) in plan.steps.iter().enumerate() {
        if st.result != Some(ResultTag::Capacity) {
            continue;
        }
        let mut pulsed_ah = 0.0;
        let before = plan.steps[..k].iter().rev().find(|p| match &p.kind {
            StepKind::Rest => false,
            StepKind::Pulse { levels } => {
                pulsed_ah += levels
                    .iter()
                    .map(|l| l.current_a.abs() * l.duration_s / 3600.0)
                    .sum::<f64>();
                pulsed_ah > allowance
            }
            _ => true,
        });
        let full = before.is_some_and(|p| {
            matches!(p.kind, StepKind::Charge { .. })
                && p.ends.iter().any(|c| {
                    matches!(
                        c,
                        EndCondition::CurrentBelow { .. } | EndCondition::PeakDrop { .. }
                    )
                })
        });
        if !full {
            let what = match before {
                None => "it is the first step that moves charge".to_string(),
                Some(p) => format!("the step before it is step {} ({})", p.index, p.kind.name()),
            };
            out.push(format!(
                "step {}: the capacity step does not follow a full charge ({what}): its figure would be what the pack gives from where it is, and no state of health, grade or new nominal is taken from it; put a charge that ends on its taper current (or -dV) before it",
                st.index
            ));
        }
    }
    out
}

/// Envelope limits within [`NEAR_LIMIT`] of a setpoint or end threshold
/// ([`NEAR_CHARGE_VOLTAGE`] for a charge voltage).
pub fn near_limits(plan: &Plan) -> Vec<String> {
    let env = &plan.envelope;
    let mut out = Vec::new();
    let near = |set: f64, limit: f64| set > 0.0 && ((limit - set) / set).abs() < NEAR_LIMIT;
    for st in &plan.steps {
        let mut currents = Vec::new();
        match &st.kind {
            StepKind::Charge {
                current_a,
                voltage_v,
            } => {
                currents.push(*current_a);
                if *voltage_v > 0.0
                    && ((env.voltage_max_v - voltage_v) / voltage_v).abs() < NEAR_CHARGE_VOLTAGE
                {
                    out.push(format!(
                        "step {}: charge voltage {:.3} V is within 1 % of voltage_max {:.3} V: noise or a small overshoot trips the envelope",
                        st.index, voltage_v, env.voltage_max_v
                    ));
                }
            }
            StepKind::Discharge {
                load: DischargeMode::Current { current_a },
            } => currents.push(*current_a),
            StepKind::Pulse { levels } => currents.extend(levels.iter().map(|l| l.current_a.abs())),
            _ => {}
        }
        for i in currents {
            if near(i, env.current_max_a) {
                out.push(format!(
                    "step {}: current {:.3} A is within 2 % of current_max {:.3} A",
                    st.index, i, env.current_max_a
                ));
            }
        }
        for c in &st.ends {
            match *c {
                EndCondition::VoltageBelow { voltage_v } if near(voltage_v, env.voltage_min_v) => {
                    out.push(format!(
                        "step {}: cutoff {:.3} V is within 2 % of voltage_min {:.3} V: the envelope may trip before the step ends",
                        st.index, voltage_v, env.voltage_min_v
                    ))
                }
                EndCondition::VoltageAbove { voltage_v } if near(voltage_v, env.voltage_max_v) => {
                    out.push(format!(
                        "step {}: end voltage {:.3} V is within 2 % of voltage_max {:.3} V",
                        st.index, voltage_v, env.voltage_max_v
                    ))
                }
                EndCondition::TemperatureAbove { celsius }
                    if near(celsius, env.temperature_max_c) =>
                {
                    out.push(format!(
                        "step {}: end temperature {celsius} degC is within 2 % of temperature_max {} degC",
                        st.index, env.temperature_max_c
                    ))
                }
                EndCondition::Time { seconds } if near(seconds, env.step_time_max_s) => {
                    out.push(format!(
                        "step {}: time limit {} is within 2 % of step_time_max {}",
                        st.index,
                        HumanDuration(seconds),
                        HumanDuration(env.step_time_max_s)
                    ))
                }
                _ => {}
            }
        }
    }
    out
}

/// Play a plan on the simulated pack and forecast it (outside any async
/// runtime; see [`forecast_async`] inside one).
pub fn forecast(plan: &Plan, cfg: &SimConfig) -> Forecast {
    match tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
    {
        Ok(rt) => rt.block_on(forecast_async(plan, cfg)),
        Err(e) => Forecast {
            steps: Vec::new(),
            total_s: 0.0,
            status: None,
            stop_reason: Some(e.to_string()),
            warnings: vec![format!("the dry run could not start: {e}")],
            backstop: Vec::new(),
        },
    }
}

/// [`forecast`] inside an async runtime. The simulated instruments read
/// without error: the forecast is of the pack, not of a bench's meters.
pub async fn forecast_async(plan: &Plan, cfg: &SimConfig) -> Forecast {
    let cfg = &SimConfig {
        ideal: true,
        ..cfg.clone()
    };
    let clock = SimClock::new();
    let dyn_clock: Arc<dyn Clock> = clock.clone();
    let links = sim::build(&plan.pack, cfg, Arc::clone(&dyn_clock));
    let mut sink = ForecastSink::default();
    let mut warnings = Vec::new();
    let ran = async {
        let (sp, lp) = crate::session::links::sim_profiles();
        let source = Source::connect(links.source, sp).await?;
        let load = Load::connect(links.load, lp).await?;
        let mut station = Station::new(source, load);
        Engine::new(
            plan,
            &mut station,
            dyn_clock,
            &mut sink,
            None,
            StopHandle::new(),
        )
        .run()
        .await;
        Ok::<(), instrument::InstrumentError>(())
    }
    .await;
    if let Err(e) = ran {
        warnings.push(format!("the dry run could not start: {e}"));
    }
    if sink.status != Some(RunStatus::Completed) {
        warnings.push(format!(
            "the simulated run does not complete: {}",
            sink.reason
                .clone()
                .unwrap_or_else(|| sink.status.map_or("not run", |s| s.name()).to_string())
        ));
    }
    for s in &sink.steps {
        let Some(st) = plan.steps.iter().find(|p| p.index == s.step) else {
            continue;
        };
        if s.end_kind == Some(EndKind::Time) {
            warnings.extend(st.time_cap_warning(s.duration_s, true));
        }
    }
    warnings.extend(plan_warnings(plan));
    Forecast {
        total_s: sink
            .last_t
            .max(sink.steps.iter().map(|s| s.duration_s).sum::<f64>()),
        steps: sink.steps,
        status: sink.status,
        stop_reason: sink.reason,
        warnings,
        backstop: sink.backstop,
    }
}

impl fmt::Display for Forecast {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        // (The header in the rows' own widths: the columns line up.)
        writeln!(
            f,
            "  {:>4}  {:<10}  {:>12}  {:>10}  ends on",
            "step", "kind", "expected", "charge Ah"
        )?;
        for s in &self.steps {
            writeln!(
                f,
                "  {:>4}  {:<10}  {:>12}  {:>10.3}  {}",
                s.step,
                s.kind,
                HumanDuration(s.duration_s.round()).to_string(),
                s.ah,
                s.end_reason
            )?;
        }
        writeln!(
            f,
            "  Total expected time: {}",
            HumanDuration(self.total_s.round())
        )?;
        if !self.backstop.is_empty() {
            writeln!(
                f,
                "  Instruments' own protection, set before the first step:"
            )?;
            for b in &self.backstop {
                writeln!(
                    f,
                    "    {:<7} {:<26} {:.3} {}",
                    b.instrument, b.protection, b.level, b.unit
                )?;
            }
        }
        for w in &self.warnings {
            writeln!(f, "  warning: {w}")?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::pack::{Chemistry, PackSpec};
    use model::procedure::validate::plan_from_text;
    use std::path::Path;

    fn pack() -> PackSpec {
        PackSpec {
            chemistry: Chemistry::LiIon,
            series: 10,
            rated_capacity_ah: 14.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        }
    }

    #[test]
    fn a_short_time_cap_and_a_near_limit_are_flagged() {
        // A C/5 capacity discharge capped at 2 h cannot reach its cutoff
        // (it needs about 5 h); the charge voltage sits 0.7 % under
        // voltage_max.
        let text = r#"
title = "t"
[envelope]
voltage_max = "4.23V/cell"
voltage_min = "2.8V/cell"
current_max = "1C"
temperature_max = "55degC"
[[phase]]
name = "p"
  [[phase.step]]
  kind = "charge"
  current = "0.5C"
  voltage = "4.2V/cell"
  ends = ["current < 0.05C", "time > 30min"]
  [[phase.step]]
  kind = "discharge"
  current = "0.2C"
  ends = ["voltage < 3.0V/cell", "time > 2h"]
  result = "capacity"
"#;
        let plan = plan_from_text(Path::new("t.toml"), text, &pack()).expect("plan");
        let f = forecast(&plan, &SimConfig::default());
        assert_eq!(f.steps.len(), 2);
        assert_eq!(f.steps[0].end_kind, Some(EndKind::Time));
        assert_eq!(f.steps[1].end_kind, Some(EndKind::Time));
        let all = f.warnings.join("\n");
        assert!(
            all.contains("step 1: the charge is expected to stop on its time cap"),
            "{all}"
        );
        assert!(
            all.contains("step 2: the capacity step is expected to end on its time cap"),
            "{all}"
        );
        assert!(all.contains("within 1 % of voltage_max"), "{all}");
        assert!((f.total_s - 2.5 * 3600.0).abs() < 10.0, "{}", f.total_s);
    }

    #[test]
    fn a_capacity_step_must_follow_a_full_charge() {
        let head = r#"
title = "t"
[envelope]
voltage_max = "4.25V/cell"
voltage_min = "2.8V/cell"
current_max = "1C"
temperature_max = "55degC"
[[phase]]
name = "p"
"#;
        let charge = |ends: &str| {
            format!(
                "  [[phase.step]]\n  kind = \"charge\"\n  current = \"0.5C\"\n  voltage = \"4.2V/cell\"\n  ends = [{ends}]\n"
            )
        };
        let rest = "  [[phase.step]]\n  kind = \"rest\"\n  ends = [\"time > 1h\"]\n";
        let cap = "  [[phase.step]]\n  kind = \"discharge\"\n  current = \"0.2C\"\n  ends = [\"voltage < 3.0V/cell\"]\n  result = \"capacity\"\n";
        let warn = |body: String| {
            let plan = plan_from_text(Path::new("t.toml"), &format!("{head}{body}"), &pack())
                .expect("plan");
            capacity_start_warnings(&plan)
        };
        // A full charge (taper end), a rest, then the capacity step: clean.
        let ok = warn(format!(
            "{}{rest}{cap}",
            charge("\"current < 0.05C\", \"time > 5h\"")
        ));
        assert!(ok.is_empty(), "{ok:?}");
        // Straight into the capacity step: flagged.
        let first = warn(cap.to_string());
        assert_eq!(first.len(), 1);
        assert!(first[0].contains("step 1: the capacity step does not follow a full charge"));
        // A charge that stops on its charge count is no full charge.
        let part = warn(format!("{}{rest}{cap}", charge("\"charge > 7Ah\"")));
        assert_eq!(part.len(), 1, "{part:?}");
        assert!(part[0].contains("step 3") && part[0].contains("step 1 (charge)"));
    }
}
