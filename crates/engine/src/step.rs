//! Per-step bookkeeping: counters, the peak and settling trackers, and the
//! end-condition check. Pure; the engine feeds it samples.

use super::event::EndKind;
use analysis::integrate::Integrator;
use model::procedure::{EndCondition, PlanStep, StepKind};
use model::sample::Sample;
use std::collections::VecDeque;

/// Window of the least-squares dV/dt fit for `dv/dt <` conditions, s.
pub const SETTLE_WINDOW_S: f64 = 300.0;
/// Window of the least-squares dT/dt fit for `dT/dt <` conditions, s: a
/// pack's temperature moves slowly and its sensor reads in tenths of a
/// kelvin, so the window is long (common practice).
pub const THERMAL_WINDOW_S: f64 = 1800.0;
/// Temperature points are kept at most this often for the dT/dt fit, s.
const THERMAL_EVERY_S: f64 = 10.0;
/// Hold-off before `peak_drop >` is armed, s (common practice for the
/// negative-delta-V end of a NiMH charge: 1 to 15 min).
pub const PEAK_DROP_HOLDOFF_S: f64 = 300.0;
/// Samples averaged for the peak-drop tracker (noise filter).
pub const PEAK_DROP_AVERAGE: usize = 5;
/// A charge step counts as holding its voltage (taper armed) at this
/// fraction of the voltage limit.
pub const TAPER_ARM_FRACTION: f64 = 0.98;

/// Least-squares |slope| of (t, y) points spanning a full window.
fn slope_over(points: &VecDeque<(f64, f64)>, window_s: f64) -> Option<f64> {
    let (first, last) = (points.front()?, points.back()?);
    if last.0 - first.0 < window_s * 0.999 || points.len() < 3 {
        return None;
    }
    let n = points.len() as f64;
    let mt = points.iter().map(|p| p.0).sum::<f64>() / n;
    let mv = points.iter().map(|p| p.1).sum::<f64>() / n;
    let (mut num, mut den) = (0.0, 0.0);
    for (t, v) in points {
        num += (t - mt) * (v - mv);
        den += (t - mt) * (t - mt);
    }
    (den > 0.0).then(|| (num / den).abs())
}

/// State of one running step.
#[derive(Debug, Clone)]
pub struct StepTracker {
    pub t0: f64,
    pub counters: Integrator,
    pub last: Option<Sample>,
    peak_avg: f64,
    recent: VecDeque<f64>,
    window: VecDeque<(f64, f64)>,
    thermal: VecDeque<(f64, f64)>,
    /// The capacity this run measured (its step with result =
    /// "capacity", to its cutoff), for "charge > N% of measured".
    pub measured_ah: Option<f64>,
}

impl StepTracker {
    pub fn new(t0: f64) -> StepTracker {
        StepTracker {
            t0,
            counters: Integrator::default(),
            last: None,
            peak_avg: f64::MIN,
            recent: VecDeque::new(),
            window: VecDeque::new(),
            thermal: VecDeque::new(),
            measured_ah: None,
        }
    }

    pub fn elapsed(&self) -> f64 {
        self.last.map(|s| s.t_s - self.t0).unwrap_or(0.0)
    }

    pub fn push(&mut self, s: &Sample) {
        self.counters.push(s.t_s, s.voltage_v, s.current_a);
        self.last = Some(*s);
        self.recent.push_back(s.voltage_v);
        if self.recent.len() > PEAK_DROP_AVERAGE {
            self.recent.pop_front();
        }
        if self.recent.len() == PEAK_DROP_AVERAGE {
            let avg = self.recent.iter().sum::<f64>() / PEAK_DROP_AVERAGE as f64;
            self.peak_avg = self.peak_avg.max(avg);
        }
        self.window.push_back((s.t_s, s.voltage_v));
        while self
            .window
            .front()
            .is_some_and(|(t, _)| s.t_s - t > SETTLE_WINDOW_S)
        {
            self.window.pop_front();
        }
        if let Some(temp) = s.temperature_c {
            if self
                .thermal
                .back()
                .is_none_or(|(t, _)| s.t_s - t >= THERMAL_EVERY_S)
            {
                self.thermal.push_back((s.t_s, temp));
                while self
                    .thermal
                    .front()
                    .is_some_and(|(t, _)| s.t_s - t > THERMAL_WINDOW_S)
                {
                    self.thermal.pop_front();
                }
            }
        }
    }

    fn moving_average(&self) -> Option<f64> {
        (self.recent.len() == PEAK_DROP_AVERAGE)
            .then(|| self.recent.iter().sum::<f64>() / PEAK_DROP_AVERAGE as f64)
    }

    /// Least-squares |dV/dt| over the settling window, once it is full.
    pub fn settle_rate(&self) -> Option<f64> {
        slope_over(&self.window, SETTLE_WINDOW_S)
    }

    /// Least-squares |dT/dt| over the thermal window, once it is full.
    pub fn thermal_rate(&self) -> Option<f64> {
        slope_over(&self.thermal, THERMAL_WINDOW_S)
    }

    /// The first end condition reached, if any.
    pub fn end_reached(&self, step: &PlanStep) -> Option<(EndKind, EndCondition)> {
        let s = self.last?;
        let el = self.elapsed();
        for c in &step.ends {
            let hit = match *c {
                EndCondition::VoltageAbove { voltage_v } => s.voltage_v >= voltage_v,
                EndCondition::VoltageBelow { voltage_v } => s.voltage_v <= voltage_v,
                EndCondition::CurrentBelow { current_a } => {
                    let armed = match step.kind {
                        StepKind::Charge { voltage_v, .. } => {
                            s.voltage_v >= TAPER_ARM_FRACTION * voltage_v
                        }
                        _ => true,
                    };
                    armed && s.current_a.abs() <= current_a
                }
                EndCondition::Time { seconds } => el >= seconds - 1e-6,
                EndCondition::Charge { ah } => self.counters.ah.abs() >= ah,
                EndCondition::ChargeOfMeasured { fraction, rated_ah } => {
                    self.counters.ah.abs() >= self.measured_ah.map_or(rated_ah, |m| m * fraction)
                }
                EndCondition::Energy { wh } => self.counters.wh.abs() >= wh,
                EndCondition::TemperatureAbove { celsius } => {
                    s.temperature_c.is_some_and(|t| t >= celsius)
                }
                EndCondition::Settled { volts_per_s } => {
                    self.settle_rate().is_some_and(|r| r <= volts_per_s)
                }
                EndCondition::TemperatureSettled { kelvin_per_s } => {
                    self.thermal_rate().is_some_and(|r| r <= kelvin_per_s)
                }
                EndCondition::PeakDrop { voltage_v } => {
                    el >= PEAK_DROP_HOLDOFF_S
                        && self
                            .moving_average()
                            .is_some_and(|a| self.peak_avg - a >= voltage_v)
                }
            };
            if hit {
                let kind = match c {
                    EndCondition::VoltageAbove { .. } => EndKind::VoltageAbove,
                    EndCondition::VoltageBelow { .. } => EndKind::VoltageBelow,
                    EndCondition::CurrentBelow { .. } => EndKind::CurrentBelow,
                    EndCondition::Time { .. } => EndKind::Time,
                    EndCondition::Charge { .. } | EndCondition::ChargeOfMeasured { .. } => {
                        EndKind::Charge
                    }
                    EndCondition::Energy { .. } => EndKind::Energy,
                    EndCondition::TemperatureAbove { .. } => EndKind::TemperatureAbove,
                    EndCondition::Settled { .. } => EndKind::Settled,
                    EndCondition::PeakDrop { .. } => EndKind::PeakDrop,
                    EndCondition::TemperatureSettled { .. } => EndKind::TemperatureSettled,
                };
                return Some((kind, *c));
            }
        }
        None
    }

    /// Time conditions in run time, for scheduling a sample exactly there.
    pub fn time_limit(&self, step: &PlanStep) -> Option<f64> {
        step.ends
            .iter()
            .filter_map(|c| match c {
                EndCondition::Time { seconds } => Some(self.t0 + seconds),
                _ => None,
            })
            .reduce(f64::min)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use model::procedure::{PlanStep, StepKind};

    fn step(kind: StepKind, ends: Vec<EndCondition>) -> PlanStep {
        PlanStep {
            index: 1,
            phase: "p".into(),
            repeat: 1,
            cycle: 1,
            name: None,
            kind,
            ends,
            result: None,
            sample_every_s: None,
            line: 1,
        }
    }

    fn sample(t: f64, v: f64, i: f64) -> Sample {
        Sample {
            t_s: t,
            step: 1,
            cycle: 1,
            voltage_v: v,
            current_a: i,
            temperature_c: None,
        }
    }

    #[test]
    fn taper_waits_for_the_voltage_limit() {
        let st = step(
            StepKind::Charge {
                current_a: 7.0,
                voltage_v: 42.0,
            },
            vec![EndCondition::CurrentBelow { current_a: 0.7 }],
        );
        let mut tr = StepTracker::new(0.0);
        // Current still ramping at the start, voltage far from the limit.
        tr.push(&sample(0.0, 38.0, 0.1));
        assert_eq!(tr.end_reached(&st), None);
        tr.push(&sample(1.0, 42.0, 0.69));
        assert_eq!(
            tr.end_reached(&st).map(|e| e.0),
            Some(EndKind::CurrentBelow)
        );
    }

    #[test]
    fn settling_uses_a_fitted_slope() {
        let st = step(
            StepKind::Rest,
            vec![EndCondition::Settled {
                volts_per_s: 1e-3 / 60.0,
            }],
        );
        let mut tr = StepTracker::new(0.0);
        // Relaxing at 2 mV/min: not settled.
        for k in 0..=300 {
            tr.push(&sample(k as f64, 40.0 + 2e-3 / 60.0 * k as f64, 0.0));
        }
        assert_eq!(tr.end_reached(&st), None);
        // Then flat: settled once the window is flat enough.
        let v_end = 40.0 + 2e-3 / 60.0 * 300.0;
        let mut ended = None;
        for k in 301..=700 {
            tr.push(&sample(k as f64, v_end, 0.0));
            if tr.end_reached(&st).is_some() {
                ended = Some(k);
                break;
            }
        }
        assert!(ended.is_some_and(|k| k > 350 && k < 600), "{ended:?}");
    }

    #[test]
    fn peak_drop_after_holdoff() {
        let st = step(
            StepKind::Charge {
                current_a: 1.0,
                voltage_v: 9.6,
            },
            vec![EndCondition::PeakDrop { voltage_v: 0.03 }],
        );
        let mut tr = StepTracker::new(0.0);
        let mut ended = None;
        for k in 0..2000 {
            let t = k as f64;
            // Rises to 8.9 V at 1000 s, then falls 1 mV/s.
            let v = if t < 1000.0 {
                8.0 + 0.0009 * t
            } else {
                8.9 - 0.001 * (t - 1000.0)
            };
            tr.push(&sample(t, v, 1.0));
            if tr.end_reached(&st).is_some() {
                ended = Some(k);
                break;
            }
        }
        // The 5-sample average lags 2 s: about 32 s after the peak.
        assert!(
            ended.is_some_and(|k| (1030..=1036).contains(&k)),
            "{ended:?}"
        );
    }
}
