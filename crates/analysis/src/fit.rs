//! Straight-line least squares with the textbook intervals, for capacity
//! fade and resistance growth. Student-t quantiles come from `statrs`.
//!
//! Prediction interval for a new observation at x0 (any regression
//! textbook): ŷ0 ± t(1−α/2, n−2) · s · √(1 + 1/n + (x0 − x̄)² / Sxx), with
//! s² = Σ residual² / (n − 2).

use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, StudentsT};

/// A fitted line y = intercept + slope · x.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LinearFit {
    pub n: usize,
    pub slope: f64,
    pub intercept: f64,
    pub r_squared: f64,
    /// Residual standard deviation s.
    pub residual_sd: f64,
    pub slope_se: f64,
    pub x_mean: f64,
    pub sxx: f64,
}

/// Two-sided Student-t quantile for a confidence level (e.g. 0.95).
pub fn t_quantile(level: f64, df: f64) -> Option<f64> {
    let t = StudentsT::new(0.0, 1.0, df).ok()?;
    Some(t.inverse_cdf(0.5 + level / 2.0))
}

impl LinearFit {
    /// Fit by least squares. Needs at least three points and some spread in x.
    pub fn fit(x: &[f64], y: &[f64]) -> Option<LinearFit> {
        let n = x.len();
        if n < 3 || y.len() != n || x.iter().chain(y).any(|v| !v.is_finite()) {
            return None;
        }
        let nf = n as f64;
        let xm = x.iter().sum::<f64>() / nf;
        let ym = y.iter().sum::<f64>() / nf;
        let (mut sxx, mut sxy, mut syy) = (0.0, 0.0, 0.0);
        for (xi, yi) in x.iter().zip(y) {
            // (Σ(x − x̄)·y is Sxy: Σ(x − x̄) = 0.)
            sxx += (xi - xm).powi(2);
            sxy += (xi - xm) * yi;
            syy += (yi - ym).powi(2);
        }
        if sxx <= 0.0 {
            return None;
        }
        let slope = sxy / sxx;
        let intercept = ym - slope * xm;
        let sse: f64 = x
            .iter()
            .zip(y)
            .map(|(xi, yi)| {
                let r = yi - (intercept + slope * xi);
                r * r
            })
            .sum();
        let s = (sse / (nf - 2.0)).sqrt();
        Some(LinearFit {
            n,
            slope,
            intercept,
            r_squared: if syy > 0.0 { 1.0 - sse / syy } else { 1.0 },
            residual_sd: s,
            slope_se: s / sxx.sqrt(),
            x_mean: xm,
            sxx,
        })
    }

    pub fn predict(&self, x0: f64) -> f64 {
        self.intercept + self.slope * x0
    }

    /// Half-width of the prediction interval for a new observation at x0.
    pub fn prediction_half_width(&self, x0: f64, level: f64) -> Option<f64> {
        let t = t_quantile(level, self.n as f64 - 2.0)?;
        Some(self.half_width_at(x0, t))
    }

    /// The half-width with the Student-t quantile already found (it is the
    /// same everywhere along one fit's line).
    fn half_width_at(&self, x0: f64, t: f64) -> f64 {
        let nf = self.n as f64;
        t * self.residual_sd * (1.0 + 1.0 / nf + (x0 - self.x_mean).powi(2) / self.sxx).sqrt()
    }

    /// Prediction interval (low, high) at x0.
    pub fn prediction_interval(&self, x0: f64, level: f64) -> Option<(f64, f64)> {
        let h = self.prediction_half_width(x0, level)?;
        let y = self.predict(x0);
        Some((y - h, y + h))
    }

    /// Where the fitted line reaches y.
    pub fn solve_x(&self, y: f64) -> Option<f64> {
        (self.slope != 0.0).then(|| (y - self.intercept) / self.slope)
    }

    /// Where the lower and the upper prediction band first reach `y`,
    /// searching forward from `from` up to `to`. For a falling line the
    /// lower band gets there first (early bound), the upper band last
    /// (late bound); a band that never gets there within the range gives
    /// `None` (the data do not bound the crossing).
    pub fn band_crossings(
        &self,
        y: f64,
        level: f64,
        from: f64,
        to: f64,
    ) -> (Option<f64>, Option<f64>) {
        // The quantile once: the scan below evaluates the bands thousands
        // of times, and the inverse CDF is the costly part.
        let Some(t) = t_quantile(level, self.n as f64 - 2.0) else {
            return (None, None);
        };
        let lo = |x: f64| Some(self.predict(x) - self.half_width_at(x, t));
        let hi = |x: f64| Some(self.predict(x) + self.half_width_at(x, t));
        let falling = self.slope < 0.0;
        // For a falling line we look for band(x) <= y; for a rising one band(x) >= y.
        let reached = |v: f64| if falling { v <= y } else { v >= y };
        let first = |band: &dyn Fn(f64) -> Option<f64>| -> Option<f64> {
            let steps = 2000;
            let mut prev = from;
            if reached(band(from)?) {
                return Some(from);
            }
            for k in 1..=steps {
                let x = from + (to - from) * k as f64 / steps as f64;
                if reached(band(x)?) {
                    // Refine by bisection between prev and x.
                    let (mut a, mut b) = (prev, x);
                    for _ in 0..60 {
                        let m = 0.5 * (a + b);
                        if reached(band(m)?) {
                            b = m;
                        } else {
                            a = m;
                        }
                    }
                    return Some(b);
                }
                prev = x;
            }
            None
        };
        if falling {
            (first(&lo), first(&hi))
        } else {
            (first(&hi), first(&lo))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn exact_line_is_recovered() {
        let x = [0.0, 1.0, 2.0, 3.0];
        let y = [1.0, 3.0, 5.0, 7.0];
        let f = LinearFit::fit(&x, &y).unwrap();
        assert!((f.slope - 2.0).abs() < 1e-12 && (f.intercept - 1.0).abs() < 1e-12);
        assert!((f.r_squared - 1.0).abs() < 1e-12);
        assert_eq!(f.solve_x(9.0), Some(4.0));
        assert!(LinearFit::fit(&[1.0, 1.0, 1.0], &[1.0, 2.0, 3.0]).is_none());
        assert!(LinearFit::fit(&[1.0, 2.0], &[1.0, 2.0]).is_none());
    }

    #[test]
    fn t_quantiles() {
        // Student-t table values (any statistics table): t(0.975, 1) = 12.706,
        // t(0.975, 10) = 2.228, t(0.975, 30) = 2.042.
        assert!((t_quantile(0.95, 1.0).unwrap() - 12.706).abs() < 1e-3);
        assert!((t_quantile(0.95, 10.0).unwrap() - 2.228).abs() < 1e-3);
        assert!((t_quantile(0.95, 30.0).unwrap() - 2.042).abs() < 1e-3);
    }

    #[test]
    fn linear_eol_check_value() {
        // Standards fact sheet §6 [D]: C(n) = C0·(1 − a·n), a = 0.02 %/cycle
        // → 80 % at n = 1000 cycles.
        let n: Vec<f64> = (0..10).map(|k| k as f64 * 100.0).collect();
        let soh: Vec<f64> = n.iter().map(|c| 100.0 * (1.0 - 0.0002 * c)).collect();
        let f = LinearFit::fit(&n, &soh).unwrap();
        assert!((f.solve_x(80.0).unwrap() - 1000.0).abs() < 1e-6);
    }

    /// A noisy fade against SciPy 1.17.1 (`scipy.stats.linregress`, the
    /// residual SD and the prediction band from `scipy.stats.t.ppf`, the
    /// band's crossings of 80 % by `scipy.optimize.brentq`), run on these
    /// seven points: slope −0.01825 %/cycle, intercept 99.975 %, r² =
    /// 0.998474304, s = 0.168819430, se(slope) = 3.19038735e-4; at 1000
    /// cycles 81.725 ± 0.738103659 (95 %); the line reaches 80 % at
    /// 1094.52 cycles, its lower band at 1052.2254, its upper at 1140.0311.
    #[test]
    fn a_noisy_fade_agrees_with_scipy() {
        let x = [0.0, 100.0, 200.0, 300.0, 400.0, 500.0, 600.0];
        let y = [100.0, 98.1, 96.5, 94.2, 92.8, 90.9, 89.0];
        let f = LinearFit::fit(&x, &y).unwrap();
        let near = |a: f64, b: f64, tol: f64| (a - b).abs() <= tol * b.abs().max(1e-12);
        assert_eq!(f.n, 7);
        assert!(near(f.slope, -0.01825, 1e-12), "{}", f.slope);
        assert!(near(f.intercept, 99.975, 1e-12), "{}", f.intercept);
        assert!(
            near(f.r_squared, 0.998_474_304_068_522_4, 1e-10),
            "{}",
            f.r_squared
        );
        assert!(
            near(f.residual_sd, 0.168_819_430_161_343_5, 1e-10),
            "{}",
            f.residual_sd
        );
        assert!(
            near(f.slope_se, 3.190_387_347_732_510_4e-4, 1e-10),
            "{}",
            f.slope_se
        );
        assert!(near(f.x_mean, 300.0, 1e-15) && near(f.sxx, 280_000.0, 1e-12));
        assert!(near(f.predict(1000.0), 81.725, 1e-12));
        let hw = f.prediction_half_width(1000.0, 0.95).unwrap();
        assert!(near(hw, 0.738_103_658_825_260_2, 1e-8), "{hw}");
        let (lo, hi) = f.prediction_interval(1000.0, 0.95).unwrap();
        assert!(near(lo, 81.725 - hw, 1e-12) && near(hi, 81.725 + hw, 1e-12));
        assert!(near(
            f.solve_x(80.0).unwrap(),
            1_094.520_547_945_205_6,
            1e-12
        ));
        let (early, late) = f.band_crossings(80.0, 0.95, 600.0, 5000.0);
        assert!(
            near(early.unwrap(), 1_052.225_416_622_141, 1e-8),
            "{early:?}"
        );
        assert!(near(late.unwrap(), 1_140.031_093_970_452, 1e-8), "{late:?}");
        // Searched where the band never gets there: no bound.
        assert_eq!(f.band_crossings(80.0, 0.95, 600.0, 1000.0), (None, None));
        // Already there at the start: the start.
        assert_eq!(f.band_crossings(99.0, 0.95, 600.0, 5000.0).0, Some(600.0));
        // A rising line (resistance growth) crosses upward, the upper band
        // first.
        let g = LinearFit::fit(&x, &y.map(|v| 200.0 - v)).unwrap();
        let (early, late) = g.band_crossings(120.0, 0.95, 600.0, 5000.0);
        assert!(
            near(early.unwrap(), 1_052.225_416_622_141, 1e-8),
            "{early:?}"
        );
        assert!(near(late.unwrap(), 1_140.031_093_970_452, 1e-8), "{late:?}");
        // A flat line never reaches another level; with no residual it
        // fits exactly (r² = 1 where y does not vary).
        let flat = LinearFit::fit(&[0.0, 1.0, 2.0], &[5.0, 5.0, 5.0]).unwrap();
        assert_eq!(flat.solve_x(4.0), None);
        assert_eq!(flat.r_squared, 1.0);
        // Lengths that differ, or a number that is not finite: no fit.
        assert!(LinearFit::fit(&[0.0, 1.0, 2.0], &[1.0, 2.0]).is_none());
        assert!(LinearFit::fit(&[0.0, 1.0, f64::NAN], &[1.0, 2.0, 3.0]).is_none());
        assert!(LinearFit::fit(&[0.0, 1.0, 2.0], &[1.0, f64::INFINITY, 3.0]).is_none());
    }
}
