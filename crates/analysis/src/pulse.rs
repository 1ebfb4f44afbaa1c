//! The general pulse method of DC resistance: at every current edge of a
//! log (a pulse step's levels, or any step change), ΔV/ΔI between the last
//! sample before the edge and the voltage a chosen time after it (for
//! example 0.1 s, 1 s, 10 s, 18 s), while the current holds its new level.
//! Streamed: a few numbers of state, whatever the log's length.
//!
//! R(t) = (V(t_e + t) − V_before) / (I(t_e + t) − I_before), pack sign
//! convention (positive into the pack), so a discharge pulse (V falls, I
//! goes negative) and a charge pulse both give a positive resistance
//! (the dual-pulse definition R = ΔV/ΔI, standards fact sheet §1).

use serde::{Deserialize, Serialize};

/// The usual delays after the edge, s.
pub const DEFAULT_DELAYS_S: [f64; 4] = [0.1, 1.0, 10.0, 18.0];

/// Most readings kept from one log.
pub const MAX_READINGS: usize = 1000;

/// The resistance a given time after an edge.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PulseValue {
    pub delay_s: f64,
    pub voltage_v: f64,
    pub current_a: f64,
    pub resistance_mohm: f64,
}

/// One current edge and its readings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PulseReading {
    /// Step of the samples after the edge.
    pub step: u32,
    /// Time of the last sample before the edge, s.
    pub t_edge_s: f64,
    pub voltage_before_v: f64,
    pub current_before_a: f64,
    pub current_after_a: f64,
    /// State of charge at the edge, %, when the log holds a full charge
    /// before it (coulomb count from the end of that charge).
    pub soc_pct: Option<f64>,
    #[serde(skip)]
    pub ah_since_full: Option<f64>,
    /// Only the delays the sampling resolves (a sample within 5 % of the
    /// delay, or two samples of the new level bracketing it no further
    /// apart than half the delay).
    pub values: Vec<PulseValue>,
}

#[derive(Debug, Clone)]
struct Open {
    reading: PulseReading,
    level: f64,
    prev: (f64, f64, f64),
    next: usize,
}

/// Take the readings this sample resolves: a sample at the delay (up to
/// 5 % of it late), or two samples of the new level around it no further
/// apart than half the delay (linear interpolation).
fn take(o: &mut Open, delays: &[f64], t: f64, v: f64, i: f64) {
    let (pt, pv, pi) = o.prev;
    let t_e = o.reading.t_edge_s;
    while o.next < delays.len() {
        let d = delays[o.next];
        let target = t_e + d;
        if t < target - 1e-6 {
            break;
        }
        let hit = t - target <= (0.05 * d).max(0.001);
        let bracket = pt > t_e && pt <= target && t - pt <= 0.5 * d;
        let value = if hit {
            Some((v, i))
        } else if bracket {
            let f = if t > pt {
                (target - pt) / (t - pt)
            } else {
                1.0
            };
            Some((pv + f * (v - pv), pi + f * (i - pi)))
        } else {
            None
        };
        if let Some((vv, ii)) = value {
            let di = ii - o.reading.current_before_a;
            if di.abs() > 1e-9 {
                o.reading.values.push(PulseValue {
                    delay_s: d,
                    voltage_v: vv,
                    current_a: ii,
                    resistance_mohm: (vv - o.reading.voltage_before_v) / di * 1000.0,
                });
            }
        }
        o.next += 1;
    }
    o.prev = (t, v, i);
}

/// Finds edges and takes the readings, sample by sample.
#[derive(Debug, Clone)]
pub struct PulseTracker {
    delays: Vec<f64>,
    /// Smallest current change that counts as an edge, A.
    min_edge_a: f64,
    /// Smallest change recorded as a reading, A.
    min_reading_a: f64,
    prev: Option<(f64, f64, f64)>,
    open: Option<Open>,
    pub readings: Vec<PulseReading>,
    pub dropped: usize,
}

/// Is `b` a different current level from `a`? 2 % of the larger
/// magnitude plus a floor (common practice for level detection).
pub fn is_jump(a: f64, b: f64, floor_a: f64) -> bool {
    (a - b).abs() > 0.02 * a.abs().max(b.abs()) + floor_a
}

impl PulseTracker {
    /// `rated_ah` sets the thresholds: an edge is a jump above 1 % of the
    /// rated capacity per hour (C/100, at least 5 mA); a reading is kept
    /// for jumps of at least C/10.
    pub fn new(delays: &[f64], rated_ah: f64) -> PulseTracker {
        PulseTracker {
            delays: delays.to_vec(),
            min_edge_a: (0.01 * rated_ah).max(0.005),
            min_reading_a: 0.1 * rated_ah,
            prev: None,
            open: None,
            readings: Vec::new(),
            dropped: 0,
        }
    }

    fn close(&mut self) {
        if let Some(o) = self.open.take() {
            if !o.reading.values.is_empty() {
                if self.readings.len() < MAX_READINGS {
                    self.readings.push(o.reading);
                } else {
                    self.dropped += 1;
                }
            }
        }
    }

    /// Add a sample. `ah_since_full`: charge taken out since the last full
    /// charge, if known.
    /// No edge is read across a break in the log (a resumed run).
    pub fn break_segment(&mut self) {
        self.close();
        self.prev = None;
    }

    pub fn push(&mut self, t: f64, v: f64, i: f64, step: u32, ah_since_full: Option<f64>) {
        if let Some(o) = self.open.as_mut() {
            if is_jump(o.level, i, self.min_edge_a) {
                self.close();
            } else {
                take(o, &self.delays, t, v, i);
            }
        }
        if self.open.is_none() {
            if let Some((pt, pv, pi)) = self.prev {
                if is_jump(pi, i, self.min_edge_a) && (i - pi).abs() >= self.min_reading_a {
                    let mut o = Open {
                        reading: PulseReading {
                            step,
                            t_edge_s: pt,
                            voltage_before_v: pv,
                            current_before_a: pi,
                            current_after_a: i,
                            soc_pct: None,
                            ah_since_full,
                            values: Vec::new(),
                        },
                        level: i,
                        prev: (pt, pv, pi),
                        next: 0,
                    };
                    take(&mut o, &self.delays, t, v, i);
                    self.open = Some(o);
                }
            }
        }
        self.prev = Some((t, v, i));
    }

    /// End of the log: keep the last edge's readings.
    pub fn finish(mut self) -> (Vec<PulseReading>, usize) {
        self.close();
        (self.readings, self.dropped)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A pack with R0 = 20 mΩ and one RC branch (10 mΩ, τ = 5 s) at 3.7 V
    /// open circuit, pulsed from rest to −5 A: V(t) = 3.7 − 5·(0.020 +
    /// 0.010·(1 − e^(−t/5))). ΔV/ΔI at t is R0 + R1·(1 − e^(−t/τ)) — the
    /// textbook Thevenin response, computed independently here.
    #[test]
    fn readings_follow_a_first_order_response() {
        let mut p = PulseTracker::new(&DEFAULT_DELAYS_S, 5.0);
        let r = |t: f64| 0.020 + 0.010 * (1.0 - (-t / 5.0).exp());
        let mut t = 0.0;
        while t < 30.0 {
            p.push(t, 3.7, 0.0, 1, Some(0.0));
            t += 1.0;
        }
        let t_e = t - 1.0;
        // Sampled every 0.1 s during the pulse.
        for k in 1..=250 {
            let dt = k as f64 * 0.1;
            p.push(t_e + dt, 3.7 - 5.0 * r(dt), -5.0, 2, Some(0.0));
        }
        p.push(t_e + 25.1, 3.69, 0.0, 3, None);
        let (readings, _) = p.finish();
        assert_eq!(readings.len(), 2, "the pulse and the return to rest");
        let first = &readings[0];
        assert_eq!(first.values.len(), 4);
        for v in &first.values {
            let want = r(v.delay_s) * 1000.0;
            assert!(
                (v.resistance_mohm - want).abs() < 1e-6,
                "{} s: {} vs {want}",
                v.delay_s,
                v.resistance_mohm
            );
        }
    }

    #[test]
    fn delays_the_sampling_cannot_resolve_are_left_out() {
        // 1 s sampling: no 0.1 s reading; 1 s and 10 s are exact samples.
        let mut p = PulseTracker::new(&DEFAULT_DELAYS_S, 5.0);
        for k in 0..10 {
            p.push(k as f64, 3.7, 0.0, 1, None);
        }
        for k in 10..40 {
            p.push(k as f64, 3.6, -5.0, 2, None);
        }
        let (r, _) = p.finish();
        let delays: Vec<f64> = r[0].values.iter().map(|v| v.delay_s).collect();
        assert_eq!(delays, vec![1.0, 10.0, 18.0]);
        assert!(r[0]
            .values
            .iter()
            .all(|v| (v.resistance_mohm - 20.0).abs() < 1e-9));
    }

    /// Irregular samples after an edge at t = 10 s (3.7 V, at rest), the
    /// voltage and current straight lines after it (V = 3.6 − 0.01·(t −
    /// 10), I = −2 − 0.001·(t − 10)), so an interpolated value is the
    /// line's own: 0.1 s is not resolved (the next sample is 0.2 s late
    /// and 0.25 s from the one before); 1 s is bracketed by 10.9 and
    /// 11.2 s (interpolated); 10 s is hit 0.4 s late (within 5 %, the
    /// sample's own values); 18 s is bracketed by 27 and 29.5 s.
    #[test]
    fn irregular_samples_are_taken_or_interpolated_as_worked_here() {
        let v = |t: f64| 3.6 - 0.01 * (t - 10.0);
        let i = |t: f64| -2.0 - 0.001 * (t - 10.0);
        let mut p = PulseTracker::new(&DEFAULT_DELAYS_S, 10.0);
        for k in 0..=10 {
            p.push(f64::from(k), 3.7, 0.0, 1, Some(1.5));
        }
        for t in [10.05, 10.3, 10.9, 11.2, 20.4, 27.0, 29.5, 31.0] {
            p.push(t, v(t), i(t), 2, Some(1.6));
        }
        let (r, dropped) = p.finish();
        assert_eq!((r.len(), dropped), (1, 0));
        let e = &r[0];
        assert_eq!(
            (e.t_edge_s, e.voltage_before_v, e.current_before_a),
            (10.0, 3.7, 0.0)
        );
        // The charge count is the one given with the first sample after it.
        assert_eq!(
            (e.current_after_a, e.step, e.ah_since_full),
            (i(10.05), 2, Some(1.6))
        );
        let got: Vec<(f64, f64)> = e
            .values
            .iter()
            .map(|x| (x.delay_s, x.resistance_mohm))
            .collect();
        let want = |t: f64| (v(t) - 3.7) / i(t) * 1000.0;
        let expect = [(1.0, want(11.0)), (10.0, want(20.4)), (18.0, want(28.0))];
        assert_eq!(got.len(), 3, "{got:?}");
        for ((d, g), (wd, w)) in got.iter().zip(expect) {
            assert_eq!(*d, wd);
            assert!((g - w).abs() < 1e-9, "{d} s: {g} against {w}");
        }
        // The 10 s value is the sample's own, not the line at 20 s.
        assert_eq!(e.values[1].voltage_v, v(20.4));
        assert_eq!(e.values[1].current_a, i(20.4));
    }

    /// An edge is a jump over C/100 (at least 5 mA); a reading is kept
    /// for a jump of at least C/10: on a 10 Ah pack, 0.9 A is no reading,
    /// 1.0 A is one; a second edge within the level's 2 % is no edge.
    #[test]
    fn edges_and_readings_need_their_sizes() {
        let run = |to: f64| {
            let mut p = PulseTracker::new(&[1.0], 10.0);
            for k in 0..5 {
                p.push(f64::from(k), 3.7, 0.0, 1, None);
            }
            for k in 5..10 {
                p.push(f64::from(k), 3.6, to, 1, None);
            }
            p.finish().0
        };
        assert!(run(-0.9).is_empty());
        assert_eq!(run(-1.0).len(), 1);
        assert!(is_jump(1.0, 1.03, 0.005) && !is_jump(1.0, 1.02, 0.005));
        assert!(!is_jump(0.0, 0.005, 0.005) && is_jump(0.0, 0.0052, 0.005));
        // A break closes the edge: no reading across it.
        let mut p = PulseTracker::new(&[1.0], 10.0);
        p.push(0.0, 3.7, 0.0, 1, None);
        p.break_segment();
        p.push(1.0, 3.6, -2.0, 1, None);
        p.push(2.0, 3.6, -2.0, 1, None);
        assert!(p.finish().0.is_empty());
    }

    /// An edge from one current to another (not from rest): ΔV/ΔI against
    /// the current before it; and past the readings kept, the rest are
    /// counted, not listed.
    #[test]
    fn an_edge_between_two_currents_and_the_readings_cap() {
        let mut p = PulseTracker::new(&[1.0], 10.0);
        for k in 0..5 {
            p.push(f64::from(k), 3.6, -1.0, 1, None);
        }
        for k in 5..10 {
            p.push(f64::from(k), 3.56, -3.0, 1, None);
        }
        let (r, _) = p.finish();
        // (3.56 − 3.6) / (−3 − (−1)) = 20 mΩ.
        assert!(
            (r[0].values[0].resistance_mohm - 20.0).abs() < 1e-9,
            "{r:?}"
        );
        let mut p = PulseTracker::new(&[1.0], 10.0);
        let n = MAX_READINGS + 7;
        for k in 0..(4 * n) {
            let i = if (k / 2) % 2 == 0 { 0.0 } else { -2.0 };
            p.push(k as f64, 3.6 + 0.01 * i, i, 1, None);
        }
        let (r, dropped) = p.finish();
        assert_eq!(r.len(), MAX_READINGS);
        assert_eq!(
            r.len() + dropped,
            2 * n - 1,
            "every edge but the first from nothing"
        );
    }
}
