//! A bench meter checked against a reference: the straight line
//! `reading = a·reference + b` fitted by least squares to points taken
//! across a range and polarity, with u(a), u(b) and their covariance, the
//! residuals kept as the linearity term, and the points judged against an
//! acceptance limit before (as found) and after (as left) the correction.
//! Common practice after `shared/reference/metrology.md` §3; the fit's
//! covariance is the ordinary least-squares one, σ²·(XᵀX)⁻¹, with σ² the
//! residual variance (n − 2 degrees of freedom), and the reference's own
//! standard uncertainty added to b and, relatively, to a.

use model::accuracy::Spec;
use serde::{Deserialize, Serialize};

/// One point: the reference's value and the bench's mean reading there.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Point {
    pub reference: f64,
    pub reading: f64,
    /// Standard deviation of the readings averaged, and their number.
    pub s: f64,
    pub n: usize,
}

/// The fitted line and its uncertainty.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Line {
    pub a: f64,
    pub b: f64,
    pub u_a: f64,
    pub u_b: f64,
    pub cov_ab: f64,
    /// The largest |residual| after the fit (the linearity term).
    pub residual_max: f64,
}

impl Line {
    /// A reading corrected: x = (reading − b)/a.
    pub fn correct(&self, reading: f64) -> f64 {
        (reading - self.b) / self.a
    }

    /// The standard uncertainty of a corrected value x (from u(a), u(b),
    /// their covariance and the linearity as a rectangle of half-width
    /// residual_max): x = (r − b)/a, ∂x/∂a = −x/a, ∂x/∂b = −1/a.
    pub fn u_at(&self, x: f64) -> f64 {
        let ca = -x / self.a;
        let cb = -1.0 / self.a;
        let var = ca * ca * self.u_a * self.u_a
            + cb * cb * self.u_b * self.u_b
            + 2.0 * ca * cb * self.cov_ab
            + (self.residual_max / self.a).powi(2) / 3.0;
        var.max(0.0).sqrt()
    }
}

/// What a run applies to its readings: x = (reading − b)/a per direction
/// of the current and for the voltage (readings in the pack's sign).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct Corrections {
    pub charge: Option<Line>,
    pub discharge: Option<Line>,
    pub voltage: Option<Line>,
}

impl Corrections {
    /// The current corrected by the line of its direction (none: as read).
    pub fn current(&self, i: f64) -> Option<f64> {
        let line = if i > 0.0 { self.charge } else { self.discharge };
        line.map(|l| l.correct(i))
    }
    pub fn voltage(&self, v: f64) -> f64 {
        self.voltage.map_or(v, |l| l.correct(v))
    }
}

/// Why a line cannot be fitted.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    #[error("{0} points: a line needs at least 2 at different reference values")]
    TooFewPoints(usize),
    #[error("the reference values are all the same: no gain can be fitted")]
    NoSpan,
}

/// Fit `reading = a·reference + b` (ordinary least squares). With two
/// points the residual variance is not known: the points' own scatter
/// (s/√n) stands in for it. `u_ref` is the reference's standard
/// uncertainty at each point (absolute).
pub fn fit(points: &[Point], u_ref: &dyn Fn(f64) -> f64) -> Result<Line, FitError> {
    let n = points.len();
    if n < 2 {
        return Err(FitError::TooFewPoints(n));
    }
    let nf = n as f64;
    let mx = points.iter().map(|p| p.reference).sum::<f64>() / nf;
    let my = points.iter().map(|p| p.reading).sum::<f64>() / nf;
    let sxx: f64 = points.iter().map(|p| (p.reference - mx).powi(2)).sum();
    if sxx <= 0.0 {
        return Err(FitError::NoSpan);
    }
    // (Σ(x − x̄)·y is Sxy: Σ(x − x̄) = 0.)
    let sxy: f64 = points.iter().map(|p| (p.reference - mx) * p.reading).sum();
    let a = sxy / sxx;
    let b = my - a * mx;
    let resid: Vec<f64> = points
        .iter()
        .map(|p| p.reading - (a * p.reference + b))
        .collect();
    let scatter = points
        .iter()
        .map(|p| p.s * p.s / p.n.max(1) as f64)
        .sum::<f64>()
        / nf;
    let sigma2 = if n > 2 {
        (resid.iter().map(|r| r * r).sum::<f64>() / (nf - 2.0)).max(scatter)
    } else {
        scatter
    };
    let sx2: f64 = points.iter().map(|p| p.reference * p.reference).sum();
    let var_a = sigma2 / sxx;
    let var_b = sigma2 * sx2 / (nf * sxx);
    let cov = -mx * sigma2 / sxx;
    // The reference's own uncertainty: an offset of the reference moves b,
    // a gain error of it moves a (taken at the largest point).
    // (Some point is off zero: the points span a range, sxx > 0.)
    let top = points.iter().map(|p| p.reference.abs()).fold(0.0, f64::max);
    let u0 = u_ref(0.0);
    let ug = ((u_ref(top).powi(2) - u0 * u0).max(0.0)).sqrt() / top;
    Ok(Line {
        a,
        b,
        u_a: (var_a + (a * ug).powi(2)).sqrt(),
        u_b: (var_b + u0 * u0).sqrt(),
        cov_ab: cov,
        residual_max: resid.iter().fold(0.0, |m, r| m.max(r.abs())),
    })
}

/// Each point against an acceptance limit (the instrument's stated
/// accuracy at the reference value): the largest error as a share of its
/// limit, and whether every point is within.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Conformity {
    /// The largest |error| over the points, in the quantity's unit.
    pub max_error: f64,
    /// The largest |error| / limit over the points with a limit (≤ 1 and
    /// no error where the limit is zero: within).
    pub worst_share: f64,
    pub within: bool,
}

pub fn conformity(points: &[Point], limit: &Spec, correct: Option<&Line>) -> Conformity {
    let mut max_error: f64 = 0.0;
    let mut worst: f64 = 0.0;
    // A limit of zero (a spec of reading only, at a reference of zero)
    // allows no error at all: an error there is out, with no share.
    let mut out_where_none_allowed = false;
    for p in points {
        let x = correct.map_or(p.reading, |l| l.correct(p.reading));
        let e = (x - p.reference).abs();
        max_error = max_error.max(e);
        let lim = limit.limit_at(p.reference);
        if lim > 0.0 {
            worst = worst.max(e / lim);
        } else if e > 0.0 {
            out_where_none_allowed = true;
        }
    }
    Conformity {
        max_error,
        worst_share: worst,
        within: worst <= 1.0 && !out_where_none_allowed,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A meter reading 0.5 % high with a +20 mA offset, read against an
    /// exact reference at 0, 1, 5 and 9 A with no noise: the fit gives the
    /// line back exactly, and the corrected readings are the reference's.
    #[test]
    fn a_line_is_recovered_from_exact_points() {
        let pts: Vec<Point> = [0.0, 1.0, 5.0, 9.0]
            .iter()
            .map(|&r| Point {
                reference: r,
                reading: 1.005 * r + 0.020,
                s: 0.0,
                n: 10,
            })
            .collect();
        let l = fit(&pts, &|_| 0.0).unwrap();
        assert!((l.a - 1.005).abs() < 1e-12 && (l.b - 0.020).abs() < 1e-12);
        assert!(l.residual_max < 1e-12 && l.u_a < 1e-12);
        assert!((l.correct(9.065) - 9.0).abs() < 1e-12);
        let spec = Spec {
            reading_pct: 0.1,
            range_pct: 0.0,
            offset: 0.005,
            resolution: 0.001,
            calibrated: false,
        };
        let found = conformity(&pts, &spec, None);
        assert!(!found.within, "0.5 % + 20 mA is outside ±(0.1 % + 5 mA)");
        let left = conformity(&pts, &spec, Some(&l));
        assert!(left.within && left.max_error < 1e-9);
    }

    /// The covariance of a least-squares line against numpy 2.4.6:
    /// `numpy.polyfit([0, 1, 2, 3], [0.1, 1.0, 2.1, 2.9], 1, cov=True)`
    /// gives a = 0.95, b = 0.1 and the covariance [[0.0015, −0.00225],
    /// [−0.00225, 0.00525]] (σ² = 0.015/2 dof).
    #[test]
    fn the_covariance_is_the_least_squares_one() {
        let pts: Vec<Point> = [(0.0, 0.1), (1.0, 1.0), (2.0, 2.1), (3.0, 2.9)]
            .iter()
            .map(|&(x, y)| Point {
                reference: x,
                reading: y,
                s: 0.0,
                n: 1,
            })
            .collect();
        let l = fit(&pts, &|_| 0.0).unwrap();
        assert!((l.a - 0.95).abs() < 1e-12);
        assert!((l.b - 0.1).abs() < 1e-12);
        assert!((l.u_a.powi(2) - 0.0015).abs() < 1e-12);
        assert!((l.u_b.powi(2) - 0.00525).abs() < 1e-12);
        assert!((l.cov_ab + 0.00225).abs() < 1e-12);
        assert_eq!(fit(&pts[..1], &|_| 0.0), Err(FitError::TooFewPoints(1)));
    }

    /// Two points, the residual variance unknown: the points' own scatter
    /// stands in (s = 1 mA of 10 readings each: σ² = 1e-7 A²); the
    /// reference's u (1 mA + 0.01 % of the value) adds 1 mA to b and
    /// √(2² − 1²) mA / 10 A to a, relatively. Worked by hand from the
    /// textbook forms: var(a) = σ²/Sxx, var(b) = σ²·Σx²/(n·Sxx),
    /// cov = −x̄·σ²/Sxx; and a corrected value's u by the chain rule.
    #[test]
    fn two_points_and_the_references_own_uncertainty() {
        let pts = [
            Point {
                reference: 0.0,
                reading: 0.02,
                s: 0.001,
                n: 10,
            },
            Point {
                reference: 10.0,
                reading: 10.07,
                s: 0.001,
                n: 10,
            },
        ];
        let u_ref = |x: f64| 0.001 + 0.0001 * x.abs();
        let l = fit(&pts, &u_ref).unwrap();
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-9 * b.abs().max(1e-15);
        assert!(near(l.a, 1.005) && near(l.b, 0.02), "{l:?}");
        let ug = 3e-6f64.sqrt() / 10.0;
        assert!(
            near(l.u_a, (1e-7 / 50.0 + (1.005 * ug).powi(2)).sqrt()),
            "{l:?}"
        );
        assert!(
            near(l.u_b, (1e-7f64 * 100.0 / 100.0 + 1e-6).sqrt()),
            "{l:?}"
        );
        assert!(near(l.cov_ab, -5.0 * 1e-7 / 50.0), "{l:?}");
        assert!(l.residual_max < 1e-12);
        let x = 5.0;
        let (ca, cb) = (-x / l.a, -1.0 / l.a);
        let want =
            (ca * ca * l.u_a * l.u_a + cb * cb * l.u_b * l.u_b + 2.0 * ca * cb * l.cov_ab).sqrt();
        assert!(near(l.u_at(x), want), "{} against {want}", l.u_at(x));
        // A linearity residual adds as a rectangle of its half-width.
        let bent = Line {
            residual_max: 0.003,
            ..l
        };
        let want = (want * want + (0.003 / l.a).powi(2) / 3.0).sqrt();
        assert!(near(bent.u_at(x), want));
        // Three points whose residuals are smaller than their scatter: the
        // scatter is the floor of σ².
        let three = [
            Point {
                reference: 0.0,
                reading: 0.0,
                s: 0.01,
                n: 1,
            },
            Point {
                reference: 1.0,
                reading: 1.0,
                s: 0.01,
                n: 1,
            },
            Point {
                reference: 2.0,
                reading: 2.0,
                s: 0.01,
                n: 1,
            },
        ];
        let l3 = fit(&three, &|_| 0.0).unwrap();
        assert!(near(l3.u_a, (1e-4f64 / 2.0).sqrt()), "{l3:?}");
        assert_eq!(fit(&[three[0], three[0]], &|_| 0.0), Err(FitError::NoSpan));
    }

    /// Each direction of the current takes its own line (a current of
    /// zero reads as a discharge's); the voltage is as read without a
    /// line. A point exactly at its limit is within.
    #[test]
    fn corrections_by_direction_and_the_limit_itself() {
        let up = Line {
            a: 1.01,
            b: 0.01,
            u_a: 0.0,
            u_b: 0.0,
            cov_ab: 0.0,
            residual_max: 0.0,
        };
        let down = Line {
            a: 0.99,
            b: -0.02,
            ..up
        };
        let c = Corrections {
            charge: Some(up),
            discharge: Some(down),
            voltage: None,
        };
        assert!((c.current(2.03).unwrap() - 2.0).abs() < 1e-12);
        assert!((c.current(-1.0).unwrap() - (-0.98 / 0.99)).abs() < 1e-12);
        assert!((c.current(0.0).unwrap() - 0.02 / 0.99).abs() < 1e-12);
        assert_eq!(c.voltage(3.7), 3.7);
        assert_eq!(Corrections::default().current(1.0), None);
        let v = Corrections {
            voltage: Some(Line {
                a: 1.0,
                b: 0.005,
                ..up
            }),
            ..c
        };
        assert!((v.voltage(3.705) - 3.7).abs() < 1e-12);
        let spec = Spec {
            reading_pct: 0.1,
            range_pct: 0.0,
            offset: 0.005,
            resolution: 0.001,
            calibrated: false,
        };
        // At 10 A the limit is 15 mA; an error of exactly that is within.
        let p = [Point {
            reference: 10.0,
            reading: 10.015,
            s: 0.0,
            n: 1,
        }];
        let k = conformity(&p, &spec, None);
        assert!((k.max_error - 0.015).abs() < 1e-12 && (k.worst_share - 1.0).abs() < 1e-9);
        let over = [Point {
            reference: 10.0,
            reading: 10.016,
            s: 0.0,
            n: 1,
        }];
        assert!(!conformity(&over, &spec, None).within);
    }

    /// A spec of reading only (0.1 %, no offset) allows no error at a
    /// reference of zero: 1 mA there is out of it, though the share over
    /// the points with a limit (5 mA of 10 mA at 10 A) is a half; with no
    /// error at zero the same points are within.
    #[test]
    fn an_error_where_the_spec_allows_none_is_out() {
        let spec = Spec {
            reading_pct: 0.1,
            range_pct: 0.0,
            offset: 0.0,
            resolution: 0.0,
            calibrated: false,
        };
        let pt = |reference: f64, reading: f64| Point {
            reference,
            reading,
            s: 0.0,
            n: 1,
        };
        let k = conformity(&[pt(0.0, 0.001), pt(10.0, 10.005)], &spec, None);
        assert!((k.worst_share - 0.5).abs() < 1e-9, "{k:?}");
        assert!((k.max_error - 0.005).abs() < 1e-12, "{k:?}");
        assert!(!k.within);
        let k = conformity(&[pt(0.0, 0.0), pt(10.0, 10.005)], &spec, None);
        assert!((k.worst_share - 0.5).abs() < 1e-9 && k.within, "{k:?}");
    }
}
