//! The validated plan: every value resolved against the pack, every step
//! with at least one end condition its setpoints can reach. Immutable.

use crate::pack::PackSpec;
use crate::units::HumanDuration;
use serde::{Deserialize, Serialize};
use std::fmt;

/// The safety envelope, checked on every sample of every step.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Envelope {
    pub voltage_max_v: f64,
    pub voltage_min_v: f64,
    pub current_max_a: f64,
    pub temperature_max_c: f64,
    pub temperature_min_c: Option<f64>,
    /// Charge into the pack within one step that stops the run.
    pub charge_max_ah: f64,
    /// Longest any single step may last.
    pub step_time_max_s: f64,
    /// Each cell group's limits, V (a group is one cell of the series
    /// count), checked where a station reads its groups.
    #[serde(default)]
    pub group_voltage_max_v: Option<f64>,
    #[serde(default)]
    pub group_voltage_min_v: Option<f64>,
    /// Fastest rise any temperature input may show, K/s (judged over a
    /// minute).
    #[serde(default)]
    pub temperature_rise_max_k_per_s: Option<f64>,
}

/// How a discharge step loads the pack. Values are magnitudes.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(tag = "mode", rename_all = "snake_case")]
pub enum DischargeMode {
    Current { current_a: f64 },
    Power { power_w: f64 },
    Resistance { resistance_ohm: f64 },
}

/// One level of a pulse step. Current is signed: positive charges the pack.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct PulseLevel {
    pub current_a: f64,
    pub duration_s: f64,
}

/// What a step does.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum StepKind {
    /// Constant current up to `voltage_v`, then constant voltage.
    Charge {
        current_a: f64,
        voltage_v: f64,
    },
    Discharge {
        load: DischargeMode,
    },
    Rest,
    Pulse {
        levels: Vec<PulseLevel>,
    },
    /// Standby drain: the source holds the pack at its own open-circuit
    /// voltage (read as the step starts) with a small current limit; what
    /// it then supplies is what the pack's own electronics draw.
    Drain {
        current_limit_a: f64,
    },
}

impl StepKind {
    pub fn name(&self) -> &'static str {
        self.step_type().name()
    }

    /// The kind without its setpoints.
    pub fn step_type(&self) -> StepType {
        match self {
            StepKind::Charge { .. } => StepType::Charge,
            StepKind::Discharge { .. } => StepType::Discharge,
            StepKind::Rest => StepType::Rest,
            StepKind::Pulse { .. } => StepType::Pulse,
            StepKind::Drain { .. } => StepType::Drain,
        }
    }
}

/// A step's kind without its setpoints, as records and logs name it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum StepType {
    Charge,
    Discharge,
    Rest,
    Pulse,
    Drain,
    /// A step whose kind its record does not say (its start event lost).
    Unknown,
}

impl StepType {
    pub fn name(&self) -> &'static str {
        match self {
            StepType::Charge => "charge",
            StepType::Discharge => "discharge",
            StepType::Rest => "rest",
            StepType::Pulse => "pulse",
            StepType::Drain => "drain",
            StepType::Unknown => "unknown",
        }
    }
}

impl std::str::FromStr for StepType {
    type Err = String;
    fn from_str(s: &str) -> Result<StepType, String> {
        [
            StepType::Charge,
            StepType::Discharge,
            StepType::Rest,
            StepType::Pulse,
            StepType::Drain,
            StepType::Unknown,
        ]
        .into_iter()
        .find(|k| k.name() == s)
        .ok_or_else(|| format!("'{s}' is no step kind"))
    }
}

impl fmt::Display for StepType {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.pad(self.name())
    }
}

/// A condition that ends a step when reached. Thresholds are resolved to
/// SI units; current thresholds are magnitudes.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
#[serde(tag = "when", rename_all = "snake_case")]
pub enum EndCondition {
    VoltageAbove {
        voltage_v: f64,
    },
    VoltageBelow {
        voltage_v: f64,
    },
    /// |current| at or below the threshold (taper); on a charge step only
    /// counted once the supply is holding its voltage.
    CurrentBelow {
        current_a: f64,
    },
    Time {
        seconds: f64,
    },
    /// |charge| passed in the step.
    Charge {
        ah: f64,
    },
    /// |charge| passed in the step reaching a share of the capacity the
    /// run measured in its step with result = "capacity" (to its cutoff);
    /// `rated_ah` (the share of the rated capacity) stands in, and the
    /// record says so, while no such measurement is at hand.
    ChargeOfMeasured {
        fraction: f64,
        rated_ah: f64,
    },
    /// |energy| passed in the step.
    Energy {
        wh: f64,
    },
    TemperatureAbove {
        celsius: f64,
    },
    /// |dV/dt| over the settling window at or below the rate.
    Settled {
        volts_per_s: f64,
    },
    /// The voltage has fallen this far below the step's peak.
    PeakDrop {
        voltage_v: f64,
    },
    /// |dT/dt| over the thermal window at or below the rate: the pack has
    /// stopped warming or cooling (it is at the room's temperature).
    TemperatureSettled {
        kelvin_per_s: f64,
    },
}

impl fmt::Display for EndCondition {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            EndCondition::VoltageAbove { voltage_v } => write!(f, "voltage > {voltage_v:.3} V"),
            EndCondition::VoltageBelow { voltage_v } => write!(f, "voltage < {voltage_v:.3} V"),
            EndCondition::CurrentBelow { current_a } => write!(f, "current < {current_a:.3} A"),
            EndCondition::Time { seconds } => write!(f, "time > {}", HumanDuration(seconds)),
            EndCondition::Charge { ah } => write!(f, "charge > {ah:.3} Ah"),
            EndCondition::ChargeOfMeasured { fraction, .. } => {
                write!(f, "charge > {:.1}% of measured", fraction * 100.0)
            }
            EndCondition::Energy { wh } => write!(f, "energy > {wh:.2} Wh"),
            EndCondition::TemperatureAbove { celsius } => {
                write!(f, "temperature > {celsius:.1} degC")
            }
            EndCondition::Settled { volts_per_s } => {
                write!(f, "dv/dt < {:.3} mV/min", volts_per_s * 60_000.0)
            }
            EndCondition::PeakDrop { voltage_v } => {
                write!(f, "peak_drop > {:.1} mV", voltage_v * 1000.0)
            }
            EndCondition::TemperatureSettled { kelvin_per_s } => {
                write!(f, "dT/dt < {:.2} K/h", kelvin_per_s * 3600.0)
            }
        }
    }
}

/// What a tagged step's result stands for.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ResultTag {
    Capacity,
    /// A pulse step whose first two levels give the DC resistance.
    Dcir,
    /// A partial discharge over a window of the curve: the screening
    /// test's window features (`analysis::screen`).
    Window,
}

impl ResultTag {
    pub fn name(&self) -> &'static str {
        match self {
            ResultTag::Capacity => "capacity",
            ResultTag::Dcir => "dcir",
            ResultTag::Window => "window",
        }
    }
}

impl std::str::FromStr for ResultTag {
    type Err = String;
    fn from_str(s: &str) -> Result<ResultTag, String> {
        [ResultTag::Capacity, ResultTag::Dcir, ResultTag::Window]
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| format!("'{s}' is no result tag"))
    }
}

impl fmt::Display for ResultTag {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.pad(self.name())
    }
}

/// One concrete step of the plan.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PlanStep {
    /// 1-based position in the expanded plan (the `step` column of the log).
    pub index: u32,
    pub phase: String,
    /// 1-based repetition of the phase.
    pub repeat: u32,
    /// Charge/discharge cycle number: 0 before the first charge, then one
    /// more at each charge that follows a discharge.
    pub cycle: u32,
    pub name: Option<String>,
    #[serde(flatten)]
    pub kind: StepKind,
    pub ends: Vec<EndCondition>,
    pub result: Option<ResultTag>,
    /// The step's own sampling interval, s, when it sets one.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub sample_every_s: Option<f64>,
    /// Line of the step in the procedure file, for messages.
    pub line: usize,
}

impl PlanStep {
    /// The step's kind and setpoints in words, the charge's by how it
    /// ends: a charge that ends on its −ΔV (and not on a taper current)
    /// is held at constant current, its voltage only a ceiling.
    pub fn kind_text(&self) -> String {
        let taper = self
            .ends
            .iter()
            .any(|c| matches!(c, EndCondition::CurrentBelow { .. }));
        let peak = self
            .ends
            .iter()
            .any(|c| matches!(c, EndCondition::PeakDrop { .. }));
        match self.kind {
            StepKind::Charge {
                current_a,
                voltage_v,
            } if peak && !taper => format!(
                "charge {current_a:.3} A, {voltage_v:.3} V ceiling (constant current to its −ΔV)"
            ),
            _ => self.kind.to_string(),
        }
    }

    /// A step that ended on its time cap while it had another end
    /// condition: what that means for what follows, as a warning. Said of
    /// a forecast (`expected`) or of a run. (Of a run's capacity step the
    /// analysis says it with the capacity: none here.)
    pub fn time_cap_warning(&self, duration_s: f64, expected: bool) -> Option<String> {
        let has_other_end = self
            .ends
            .iter()
            .any(|c| !matches!(c, EndCondition::Time { .. }));
        if !has_other_end {
            return None;
        }
        let (n, d) = (self.index, crate::units::HumanDuration(duration_s.round()));
        let capacity = self.result == Some(ResultTag::Capacity);
        Some(match (&self.kind, expected) {
            (StepKind::Charge { .. }, true) => format!(
                "step {n}: the charge is expected to stop on its time cap ({d}) before it is full: the cap is shorter than the expected charge"
            ),
            (StepKind::Charge { .. }, false) => format!(
                "step {n}: the charge stopped on its time cap ({d}) before it was full: what follows did not start from a full pack (a longer cap, or a pack charged before the test)"
            ),
            (_, true) if capacity => format!(
                "step {n}: the capacity step is expected to end on its time cap ({d}) instead of its cutoff: the capacity would be understated"
            ),
            (_, false) if capacity => return None,
            (_, true) => format!(
                "step {n}: expected to end on its time cap ({d}) rather than its other end condition"
            ),
            (_, false) => format!(
                "step {n}: ended on its time cap ({d}) rather than its other end condition"
            ),
        })
    }

    /// The duration a pulse step's levels add up to.
    pub fn pulse_duration_s(&self) -> Option<f64> {
        match &self.kind {
            StepKind::Pulse { levels } => Some(levels.iter().map(|l| l.duration_s).sum()),
            _ => None,
        }
    }
}

/// Finer sampling near a step's end.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FineSampling {
    /// The finer interval, s.
    pub every_s: f64,
    /// A voltage end is near within this fraction of its threshold.
    pub within_fraction: f64,
}

/// Default nearness of a voltage end for fine sampling (3 %).
pub const FINE_WITHIN_DEFAULT: f64 = 0.03;
/// Default zero-offset warning threshold, A (10 mA; common practice for a
/// bench load's zero on a 10 A range, about 0.1 % of full scale).
pub const OFFSET_WARN_DEFAULT_A: f64 = 0.010;

/// What to do with the instruments' zero offsets, read before the run.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct OffsetPolicy {
    /// Warn above this magnitude, A.
    pub warn_above_a: f64,
    /// Subtract each instrument's zero reading from its current readings.
    pub correct: bool,
}

impl Default for OffsetPolicy {
    fn default() -> Self {
        OffsetPolicy {
            warn_above_a: OFFSET_WARN_DEFAULT_A,
            correct: false,
        }
    }
}

/// A validated, pack-resolved procedure.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Plan {
    pub title: String,
    pub pack: PackSpec,
    pub envelope: Envelope,
    pub sample_every_s: f64,
    /// Finer sampling near step ends, when the procedure asks for it.
    pub fine: Option<FineSampling>,
    pub offsets: OffsetPolicy,
    pub steps: Vec<PlanStep>,
}

impl Plan {
    /// The step tagged as the capacity measurement, if any.
    pub fn capacity_step(&self) -> Option<&PlanStep> {
        self.steps
            .iter()
            .rev()
            .find(|s| s.result == Some(ResultTag::Capacity))
    }
}

impl fmt::Display for StepKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            StepKind::Charge {
                current_a,
                voltage_v,
            } => write!(f, "charge {current_a:.3} A to {voltage_v:.3} V (CC-CV)"),
            StepKind::Discharge { load } => match load {
                DischargeMode::Current { current_a } => {
                    write!(f, "discharge {current_a:.3} A (constant current)")
                }
                DischargeMode::Power { power_w } => {
                    write!(f, "discharge {power_w:.2} W (constant power)")
                }
                DischargeMode::Resistance { resistance_ohm } => {
                    write!(f, "discharge {resistance_ohm:.4} ohm (constant resistance)")
                }
            },
            StepKind::Rest => write!(f, "rest"),
            StepKind::Drain { current_limit_a } => write!(
                f,
                "standby drain (hold the open-circuit voltage, limit {:.0} mA)",
                current_limit_a * 1000.0
            ),
            StepKind::Pulse { levels } => {
                write!(f, "pulse")?;
                for l in levels {
                    write!(
                        f,
                        " [{:+.3} A for {}]",
                        l.current_a,
                        HumanDuration(l.duration_s)
                    )?;
                }
                Ok(())
            }
        }
    }
}

impl fmt::Display for Plan {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let p = &self.pack;
        writeln!(f, "Procedure: {}", self.title)?;
        writeln!(
            f,
            "Pack: {} {}S, rated {:.3} Ah ({:.1} Wh)",
            p.chemistry,
            p.series,
            p.rated_capacity_ah,
            p.rated_energy_or_nominal()
        )?;
        let e = &self.envelope;
        writeln!(
            f,
            "Envelope: {:.3}..{:.3} V, |I| <= {:.3} A, T <= {:.1} degC{}, charge <= {:.3} Ah per step, step <= {}",
            e.voltage_min_v,
            e.voltage_max_v,
            e.current_max_a,
            e.temperature_max_c,
            e.temperature_min_c
                .map(|t| format!(" and >= {t:.1} degC"))
                .unwrap_or_default(),
            e.charge_max_ah,
            HumanDuration(e.step_time_max_s)
        )?;
        if e.group_voltage_min_v.is_some()
            || e.group_voltage_max_v.is_some()
            || e.temperature_rise_max_k_per_s.is_some()
        {
            let v = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{v:.3}"));
            writeln!(
                f,
                "Cell groups (where a station reads them): each group {}..{} V{}",
                v(e.group_voltage_min_v),
                v(e.group_voltage_max_v),
                e.temperature_rise_max_k_per_s
                    .map(|r| format!(
                        ", every temperature input rising <= {:.2} degC/min",
                        r * 60.0
                    ))
                    .unwrap_or_default()
            )?;
        }
        write!(f, "Sampling: every {} s", self.sample_every_s)?;
        if let Some(fine) = self.fine {
            write!(
                f,
                ", every {} s near a step's end (voltage within {} %)",
                fine.every_s,
                fine.within_fraction * 100.0
            )?;
        }
        writeln!(f)?;
        writeln!(
            f,
            "Zero offsets: warn above {:.1} mA{}",
            self.offsets.warn_above_a * 1000.0,
            if self.offsets.correct {
                ", subtracted from the current readings"
            } else {
                ""
            }
        )?;
        for s in &self.steps {
            write!(
                f,
                "  {:>3}. [{}{} | cycle {}] {}",
                s.index,
                s.phase,
                if s.repeat > 1 {
                    format!(" #{}", s.repeat)
                } else {
                    String::new()
                },
                s.cycle,
                s.kind_text()
            )?;
            if !s.ends.is_empty() {
                let ends: Vec<String> = s.ends.iter().map(|c| c.to_string()).collect();
                write!(f, "; ends: {}", ends.join(" or "))?;
            }
            if let Some(e) = s.sample_every_s {
                write!(f, "; sampled every {e} s")?;
            }
            if let Some(r) = s.result {
                write!(f, "  <- {} result", r.name())?;
            }
            writeln!(f)?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A −ΔV charge is said as one (constant current, the voltage a
    /// ceiling); a charge to a taper is CC-CV.
    #[test]
    fn a_charge_is_described_by_how_it_ends() {
        use crate::pack::{Chemistry, PackSpec};
        let pack = PackSpec {
            chemistry: Chemistry::Nimh,
            series: 10,
            rated_capacity_ah: 4.5,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
        let text = |ends: &str| {
            format!(
                "title = \"t\"\n[envelope]\nvoltage_max = \"1.65V/cell\"\nvoltage_min = \"0.9V/cell\"\ncurrent_max = \"1C\"\ntemperature_max = \"50degC\"\n[[phase]]\nname = \"p\"\n  [[phase.step]]\n  kind = \"charge\"\n  current = \"0.5C\"\n  voltage = \"1.6V/cell\"\n  ends = [{ends}]\n"
            )
        };
        let plan = |ends: &str| {
            crate::procedure::validate::plan_from_text(
                std::path::Path::new("t.toml"),
                &text(ends),
                &pack,
            )
            .unwrap()
        };
        let p = plan("\"peak_drop > 10mV/cell\", \"time > 3h\"");
        assert_eq!(
            p.steps[0].kind_text(),
            "charge 2.250 A, 16.000 V ceiling (constant current to its −ΔV)"
        );
        assert!(p.to_string().contains("(constant current to its −ΔV)"));
        assert!(!p.to_string().contains("CC-CV"));
        let p = plan("\"current < 0.05C\", \"time > 3h\"");
        assert_eq!(p.steps[0].kind_text(), "charge 2.250 A to 16.000 V (CC-CV)");
    }

    /// Step kinds, end kinds and statuses take a table's column width
    /// (the terminal's step tables line up).
    #[test]
    fn names_pad_to_a_column() {
        assert_eq!(format!("[{:<10}]", StepType::Rest), "[rest      ]");
        assert_eq!(format!("[{:<10}]", StepType::Discharge), "[discharge ]");
        assert_eq!(format!("[{:>6}]", ResultTag::Capacity), "[capacity]");
        assert_eq!(
            format!("[{:<14}]", crate::end::EndKind::Time),
            format!("[{:<14}]", crate::end::EndKind::Time.name())
        );
        assert_eq!(
            format!("[{:<12}]", crate::status::RunStatus::Completed),
            "[completed   ]"
        );
        assert_eq!(format!("[{:<8}]", crate::pack::Chemistry::Lfp).len(), 10);
    }

    /// Step kinds and result tags keep their spellings on disk.
    #[test]
    fn step_types_and_tags_keep_their_spellings() {
        for (k, name) in [
            (StepType::Charge, "charge"),
            (StepType::Discharge, "discharge"),
            (StepType::Rest, "rest"),
            (StepType::Pulse, "pulse"),
            (StepType::Drain, "drain"),
            (StepType::Unknown, "unknown"),
        ] {
            assert_eq!(serde_json::to_string(&k).unwrap(), format!("\"{name}\""));
            assert_eq!(name.parse::<StepType>(), Ok(k));
        }
        assert_eq!(StepKind::Rest.step_type(), StepType::Rest);
        assert_eq!(serde_json::to_string(&ResultTag::Dcir).unwrap(), "\"dcir\"");
        assert_eq!("capacity".parse::<ResultTag>(), Ok(ResultTag::Capacity));
        assert!("soh".parse::<ResultTag>().is_err());
    }
}
