//! Charge and energy by the trapezoidal rule over samples, kept as running
//! sums so the engine (end conditions) and the analysis (summaries) use the
//! same arithmetic. Segments whose current changes sign are split at the
//! zero crossing so charge in and charge out are each exact for a linear
//! current between samples.

/// Where a resumed run's log was interrupted: the last sample written
/// before the run went down and the run time it went on at. Nothing is
/// integrated across it, whatever the rounding of the times in the log.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Interruption {
    /// Run time of the last sample (or event) before the interruption, s.
    pub last_before_s: f64,
    /// Run time the run went on at, s.
    pub resumed_at_s: f64,
}

impl Interruption {
    /// Whether the interval from a sample at `t0` to the next at `t1`
    /// spans this interruption. The dividing line is half-way between the
    /// last time before it and the time the run went on (both at least
    /// 10 ms apart, see `resume`), so times rounded to the millisecond in
    /// `samples.csv` fall on their own side of it.
    pub fn spans(&self, t0: f64, t1: f64) -> bool {
        let mid = 0.5 * (self.last_before_s + self.resumed_at_s.max(self.last_before_s));
        t0 < mid && mid <= t1
    }
}

/// Whether any of `breaks` lies between two successive samples.
pub fn spans_any(breaks: &[Interruption], t0: f64, t1: f64) -> bool {
    breaks.iter().any(|b| b.spans(t0, t1))
}

/// Running trapezoidal integrals of current (Ah) and power (Wh).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Integrator {
    last: Option<(f64, f64, f64)>,
    /// Net charge, Ah (positive into the pack).
    pub ah: f64,
    /// Net energy, Wh.
    pub wh: f64,
    /// Charge into the pack, Ah (≥ 0).
    pub ah_in: f64,
    /// Charge out of the pack, Ah (≥ 0).
    pub ah_out: f64,
    /// Energy into the pack, Wh (≥ 0).
    pub wh_in: f64,
    /// Energy out of the pack, Wh (≥ 0).
    pub wh_out: f64,
}

/// Split the trapezoid of a linear y from y0 to y1 over dt into its
/// positive and negative areas.
fn split(y0: f64, y1: f64, dt: f64) -> (f64, f64) {
    if y0 >= 0.0 && y1 >= 0.0 {
        ((y0 + y1) * 0.5 * dt, 0.0)
    } else if y0 <= 0.0 && y1 <= 0.0 {
        (0.0, (y0 + y1) * 0.5 * dt)
    } else {
        let span = y0 - y1;
        let a0 = y0 * y0 / span * 0.5 * dt;
        let a1 = y1 * y1 / span * 0.5 * dt;
        if y0 > 0.0 {
            (a0, -a1)
        } else {
            (-a1, a0)
        }
    }
}

impl Integrator {
    /// Forget the last sample, keeping the sums: the next sample starts a
    /// new segment and nothing is integrated across the break (a run
    /// resumed after an interruption, when no current was flowing).
    pub fn break_segment(&mut self) {
        self.last = None;
    }

    /// Add a sample (time s, voltage V, current A).
    pub fn push(&mut self, t: f64, v: f64, i: f64) {
        let p = v * i;
        if let Some((t0, i0, p0)) = self.last {
            let dt = (t - t0) / 3600.0;
            if dt > 0.0 {
                let (qi, qo) = split(i0, i, dt);
                let (ei, eo) = split(p0, p, dt);
                self.ah_in += qi;
                self.ah_out -= qo;
                self.wh_in += ei;
                self.wh_out -= eo;
                self.ah += qi + qo;
                self.wh += ei + eo;
            }
        }
        self.last = Some((t, i, p));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn constant_current_is_i_times_t() {
        // Common practice: at constant current, C = I·t. 0.5 A for 5 h = 2.5 Ah.
        let mut g = Integrator::default();
        for k in 0..=18_000 {
            g.push(k as f64, 3.6, -0.5);
        }
        assert!((g.ah + 2.5).abs() < 1e-9);
        assert!((g.ah_out - 2.5).abs() < 1e-9);
        assert_eq!(g.ah_in, 0.0);
        assert!((g.wh + 9.0).abs() < 1e-9);
    }

    #[test]
    fn sign_change_splits_exactly() {
        // Linear current from +1 A to -1 A over 2 h: 0.5 Ah in, 0.5 Ah out.
        let mut g = Integrator::default();
        g.push(0.0, 1.0, 1.0);
        g.push(7200.0, 1.0, -1.0);
        assert!((g.ah_in - 0.5).abs() < 1e-12);
        assert!((g.ah_out - 0.5).abs() < 1e-12);
        assert!(g.ah.abs() < 1e-12);
    }

    #[test]
    fn linear_voltage_energy_is_exact() {
        // Fact sheet check value: 4.1 → 3.1 V linearly at 0.5 A for 5 h
        // gives 9.0 Wh (trapezoid exact for linear V).
        let mut g = Integrator::default();
        let n = 300;
        for k in 0..=n {
            let f = k as f64 / n as f64;
            g.push(f * 18_000.0, 4.1 - f, -0.5);
        }
        assert!((g.wh_out - 9.0).abs() < 1e-9, "{}", g.wh_out);
    }

    #[test]
    fn an_uneven_sign_change_splits_at_its_zero_crossing() {
        // Worked by hand: a linear current from +3 A to −1 A over 1 h
        // crosses zero at 3/4 h; the triangles are 3 × 0.75 / 2 = 1.125 Ah
        // in and 1 × 0.25 / 2 = 0.125 Ah out. The other way round
        // (−1 → +3 A) swaps them. Power at 2 V: twice each.
        for (i0, i1, q_in, q_out) in [(3.0, -1.0, 1.125, 0.125), (-1.0, 3.0, 1.125, 0.125)] {
            let mut g = Integrator::default();
            g.push(0.0, 2.0, i0);
            g.push(3600.0, 2.0, i1);
            assert!((g.ah_in - q_in).abs() < 1e-12, "{g:?}");
            assert!((g.ah_out - q_out).abs() < 1e-12, "{g:?}");
            assert!((g.ah - (q_in - q_out)).abs() < 1e-12, "{g:?}");
            assert!((g.wh_in - 2.0 * q_in).abs() < 1e-12, "{g:?}");
            assert!((g.wh_out - 2.0 * q_out).abs() < 1e-12, "{g:?}");
        }
    }

    #[test]
    fn an_interruption_divides_half_way_and_a_break_integrates_nothing() {
        // Last sample before at 10 s, resumed at 20 s: the line is at 15 s.
        let b = Interruption {
            last_before_s: 10.0,
            resumed_at_s: 20.0,
        };
        assert!(b.spans(10.0, 20.0));
        assert!(
            b.spans(14.999, 15.0),
            "an interval ending on the line spans it"
        );
        assert!(!b.spans(15.0, 16.0), "one starting on it does not");
        assert!(!b.spans(9.0, 10.0));
        assert!(!b.spans(20.0, 21.0));
        assert!(spans_any(&[b], 12.0, 18.0));
        assert!(!spans_any(&[b], 16.0, 18.0));
        // A resumption time before the last sample (a clock step back)
        // puts the line at the last sample.
        let back = Interruption {
            last_before_s: 10.0,
            resumed_at_s: 5.0,
        };
        assert!(back.spans(9.0, 10.0) && !back.spans(10.0, 11.0));
        // Across a break nothing is integrated; the sums are kept.
        let mut g = Integrator::default();
        g.push(0.0, 3.0, -2.0);
        g.push(3600.0, 3.0, -2.0);
        g.break_segment();
        g.push(7200.0, 3.0, -2.0);
        assert!((g.ah + 2.0).abs() < 1e-12, "{g:?}");
        g.push(10_800.0, 3.0, -2.0);
        assert!((g.ah + 4.0).abs() < 1e-12, "{g:?}");
        assert!((g.wh_out - 12.0).abs() < 1e-12, "{g:?}");
    }
}
