//! Measurement analysis: pure functions over a sample stream and the step
//! records of a run. The same code computes the summary at the end of a
//! live run and when a log is analysed afterwards, so the two agree.
//!
//! Conventions: current positive into the pack; step charge and energy are
//! signed; cycle and capacity figures are magnitudes.

pub mod curves;
pub mod fit;
pub mod integrate;
pub mod resistance;

use crate::pack::PackSpec;
use crate::sample::Sample;
use integrate::Integrator;
use resistance::ResistanceReading;
use serde::{Deserialize, Serialize};

/// What the analysis needs to know about a step besides its samples.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StepInfo {
    pub step: u32,
    pub phase: String,
    pub cycle: u32,
    pub kind: String,
    pub name: Option<String>,
    pub result: Option<String>,
    pub end_kind: Option<String>,
    pub end_reason: Option<String>,
}

/// Figures of one step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct StepSummary {
    pub step: u32,
    pub phase: String,
    pub cycle: u32,
    pub kind: String,
    pub name: Option<String>,
    pub samples: usize,
    pub start_s: f64,
    pub duration_s: f64,
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
    pub end_kind: Option<String>,
    pub end_reason: Option<String>,
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
    pub rated_ah: f64,
    /// State of health: measured / rated × 100.
    pub soh_pct: f64,
    pub mean_current_a: f64,
    /// Mean discharge current as a C-rate of the rated capacity.
    pub c_rate: f64,
    pub duration_s: f64,
    pub end_voltage_v: Option<f64>,
    /// Did the step end on its voltage cutoff (as a capacity test must)?
    pub ended_on_cutoff: bool,
}

/// The pack's DC resistance from the steps tagged `dcir`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResistanceResult {
    /// The first reading's resistance, mΩ (the pack's figure).
    pub dcir_mohm: f64,
    pub method: String,
    pub readings: Vec<ResistanceReading>,
}

/// Everything the analysis finds in one run.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Analysis {
    pub capacity: Option<CapacityResult>,
    pub resistance: Option<ResistanceResult>,
    pub steps: Vec<StepSummary>,
    pub cycles: Vec<CycleSummary>,
    pub warnings: Vec<String>,
}

/// State of health, % of rated (fact sheet §6: SOH = C_measured / C_rated × 100).
pub fn soh_pct(measured_ah: f64, rated_ah: f64) -> f64 {
    measured_ah / rated_ah * 100.0
}

/// Summarise one step's samples.
pub fn summarize_step(info: &StepInfo, samples: &[Sample]) -> StepSummary {
    let mut g = Integrator::default();
    let mut vmin = f64::INFINITY;
    let mut vmax = f64::NEG_INFINITY;
    let mut tmax: Option<f64> = None;
    for s in samples {
        g.push(s.t_s, s.voltage_v, s.current_a);
        vmin = vmin.min(s.voltage_v);
        vmax = vmax.max(s.voltage_v);
        if let Some(t) = s.temperature_c {
            tmax = Some(tmax.map_or(t, |m: f64| m.max(t)));
        }
    }
    let start = samples.first().map(|s| s.t_s).unwrap_or(0.0);
    let end = samples.last().map(|s| s.t_s).unwrap_or(start);
    let duration = end - start;
    let mean_current = (duration > 0.0).then(|| g.ah * 3600.0 / duration);
    StepSummary {
        step: info.step,
        phase: info.phase.clone(),
        cycle: info.cycle,
        kind: info.kind.clone(),
        name: info.name.clone(),
        samples: samples.len(),
        start_s: start,
        duration_s: duration,
        charge_ah: g.ah,
        energy_wh: g.wh,
        charge_in_ah: g.ah_in,
        charge_out_ah: g.ah_out,
        energy_in_wh: g.wh_in,
        energy_out_wh: g.wh_out,
        start_voltage_v: samples.first().map(|s| s.voltage_v),
        end_voltage_v: samples.last().map(|s| s.voltage_v),
        min_voltage_v: vmin.is_finite().then_some(vmin),
        max_voltage_v: vmax.is_finite().then_some(vmax),
        mean_current_a: mean_current,
        max_temperature_c: tmax,
        end_kind: info.end_kind.clone(),
        end_reason: info.end_reason.clone(),
    }
}

/// Analyse a run: per step, per cycle, measured capacity and state of health.
/// `samples` must be in time order; steps are matched by their number.
pub fn analyze(samples: &[Sample], steps: &[StepInfo], pack: &PackSpec) -> Analysis {
    let mut warnings = Vec::new();
    let mut summaries = Vec::new();
    // Samples of one step are contiguous in a log written by the engine.
    let mut start = 0;
    let mut by_step: Vec<(u32, &[Sample])> = Vec::new();
    while start < samples.len() {
        let step = samples[start].step;
        let end = samples[start..]
            .iter()
            .position(|s| s.step != step)
            .map(|p| start + p)
            .unwrap_or(samples.len());
        by_step.push((step, &samples[start..end]));
        start = end;
    }
    let mut readings: Vec<ResistanceReading> = Vec::new();
    for info in steps {
        let parts: Vec<&[Sample]> = by_step
            .iter()
            .filter(|(n, _)| *n == info.step)
            .map(|(_, s)| *s)
            .collect();
        if parts.len() > 1 {
            warnings.push(format!(
                "step {} appears in {} separate stretches of the log; they are summed",
                info.step,
                parts.len()
            ));
        }
        let joined: Vec<Sample> = parts.concat();
        summaries.push(summarize_step(info, &joined));
        if info.result.as_deref() == Some("dcir") {
            let complete = !matches!(
                info.end_kind.as_deref(),
                None | Some("aborted") | Some("interrupted")
            );
            match resistance::two_level_from_step(info.step, &joined) {
                Some(r) if complete => readings.push(r),
                _ => warnings.push(format!(
                    "the resistance step {} gave no reading (unfinished, or fewer than two current levels)",
                    info.step
                )),
            }
        }
    }
    let resistance = readings.first().map(|r| ResistanceResult {
        dcir_mohm: r.dcir_mohm,
        method: r.method.clone(),
        readings: readings.clone(),
    });
    // Cycles: charge and discharge steps; pulse steps count both ways.
    let mut cycles: Vec<CycleSummary> = Vec::new();
    for s in &summaries {
        if !matches!(s.kind.as_str(), "charge" | "discharge") {
            continue;
        }
        let c = match cycles.iter_mut().find(|c| c.cycle == s.cycle) {
            Some(c) => c,
            None => {
                cycles.push(CycleSummary {
                    cycle: s.cycle,
                    charge_ah: 0.0,
                    discharge_ah: 0.0,
                    charge_wh: 0.0,
                    discharge_wh: 0.0,
                    coulombic_efficiency_pct: None,
                    energy_efficiency_pct: None,
                });
                let n = cycles.len() - 1;
                &mut cycles[n]
            }
        };
        c.charge_ah += s.charge_in_ah;
        c.discharge_ah += s.charge_out_ah;
        c.charge_wh += s.energy_in_wh;
        c.discharge_wh += s.energy_out_wh;
    }
    for c in &mut cycles {
        if c.charge_ah > 0.0 && c.discharge_ah > 0.0 {
            let ce = c.discharge_ah / c.charge_ah * 100.0;
            c.coulombic_efficiency_pct = Some(ce);
            c.energy_efficiency_pct =
                (c.charge_wh > 0.0).then(|| c.discharge_wh / c.charge_wh * 100.0);
            if ce > 100.0 {
                // Fact sheet §8: CE above 100 % points at a current-sensor
                // offset or an incomplete discharge before the charge.
                warnings.push(format!(
                    "cycle {}: coulombic efficiency {ce:.2} % is above 100 % (current offset, or the pack was not empty before the charge)",
                    c.cycle
                ));
            }
        }
    }
    let capacity = steps
        .iter()
        .rev()
        .find(|s| s.result.as_deref() == Some("capacity"))
        .and_then(|info| {
            let s = summaries.iter().find(|x| x.step == info.step)?;
            let complete = !matches!(info.end_kind.as_deref(), None | Some("aborted") | Some("interrupted"));
            if !complete {
                warnings.push(format!(
                    "the capacity step {} did not finish; no capacity is reported",
                    info.step
                ));
                return None;
            }
            let ended_on_cutoff = info.end_kind.as_deref() == Some("voltage_below");
            if !ended_on_cutoff {
                warnings.push(format!(
                    "the capacity step {} ended on '{}', not on its cutoff voltage: the capacity is a lower bound",
                    info.step,
                    info.end_reason.clone().unwrap_or_default()
                ));
            }
            let mean = if s.duration_s > 0.0 { s.charge_out_ah * 3600.0 / s.duration_s } else { 0.0 };
            Some(CapacityResult {
                step: s.step,
                measured_ah: s.charge_out_ah,
                measured_wh: s.energy_out_wh,
                rated_ah: pack.rated_capacity_ah,
                soh_pct: soh_pct(s.charge_out_ah, pack.rated_capacity_ah),
                mean_current_a: mean,
                c_rate: mean / pack.rated_capacity_ah,
                duration_s: s.duration_s,
                end_voltage_v: s.end_voltage_v,
                ended_on_cutoff,
            })
        });
    Analysis {
        capacity,
        resistance,
        steps: summaries,
        cycles,
        warnings,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::pack::Chemistry;

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
            kind: "discharge".into(),
            name: None,
            result: Some("capacity".into()),
            end_kind: Some("voltage_below".into()),
            end_reason: None,
        };
        let a = analyze(&samples, &[info], &pack);
        let c = a.capacity.unwrap();
        assert!((c.measured_ah - 1.0).abs() < 1e-9, "{}", c.measured_ah);
        assert!((c.duration_s - 3000.0).abs() < 1e-9);
        assert!((c.c_rate - 1.2).abs() < 1e-9);
    }

    #[test]
    fn efficiencies_from_the_same_cycle() {
        // Fact sheet §8 check value [D]: 2.000 Ah in, 1.990 Ah out → CE 99.50 %;
        // 7.60 Wh in, 7.16 Wh out → EE 94.2 %.
        let pack = PackSpec {
            chemistry: Chemistry::LiIon,
            series: 1,
            rated_capacity_ah: 2.0,
            rated_energy_wh: None,
            rated_rate_c: None,
            rated_resistance_mohm: None,
        };
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
            kind: kind.into(),
            name: None,
            result: None,
            end_kind: Some("time".into()),
            end_reason: None,
        };
        let a = analyze(&samples, &[info(1, "charge"), info(2, "discharge")], &pack);
        let c = &a.cycles[0];
        assert!((c.coulombic_efficiency_pct.unwrap() - 99.5).abs() < 1e-9);
        assert!((c.energy_efficiency_pct.unwrap() - 94.21).abs() < 0.01);
        assert!(a.capacity.is_none());
    }
}
