//! The quick grade: features of a short screening run, and a family
//! calibration that predicts a pack's capacity from them with a
//! prediction interval.
//!
//! # Features (each from the ordinary run record)
//! The screening procedure charges to full (with its constant-voltage
//! taper), rests, pulses (two levels, IEC 61960 scheme), discharges a
//! window of the curve (the step tagged `result = "window"`), rests and
//! pulses again. From it:
//!
//! - `taper_ah`: the charge accepted in the charge step after its current
//!   first fell below 95 % of the step's first current (the taper),
//!   Ah = ∫ I dt over that part (trapezoid).
//! - `relax_mv`: the voltage's fall over the rest after the charge, per
//!   cell: (V at the rest's first sample − V at its last) / cells, mV.
//! - `relax_tau_s`: the time from the rest's start until the voltage has
//!   made 1 − 1/e (63.2 %) of that fall, s (the time constant of a single
//!   exponential, read off the curve rather than fitted).
//! - `r_full_mohm`, `r_window_mohm`: the two-level resistance of the
//!   first and the last `dcir` step (near full, and after the window).
//! - `window_ah_per_v`: the charge of the window step over its voltage
//!   fall per cell, Ah/V: |Q| / ((V_start − V_end) / cells). For a pack
//!   whose open-circuit curve has the same shape, the state of charge
//!   moves by |Q| / C over the window, so this grows with the capacity C.
//! - `temperature_rise_c`: the highest temperature of the run less the
//!   first, K.
//!
//! # The model
//! Ordinary least squares of the measured capacity (Ah, from a full
//! capacity test of the same pack) on a few features with an intercept,
//! fitted with nalgebra. The 95 % prediction interval of a new pack is
//! the textbook one: ŷ ± t(0.975, n − p) · s · √(1 + x₀ᵀ(XᵀX)⁻¹x₀), with
//! s² the residual variance over n − p degrees of freedom (p: the
//! features and the intercept); statsmodels' `get_prediction(...).summary_frame()` gives the same
//! (`obs_ci_lower`, `obs_ci_upper`), checked against it on a fixture.
//! Leave-one-out cross-validation gives the calibration's error and the
//! share of packs inside their own interval.

use model::sample::Sample;
use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};
use statrs::distribution::{ContinuousCDF, StudentsT};

/// The features of one screening run (see the module's formulas).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct ScreenFeatures {
    pub taper_ah: Option<f64>,
    pub relax_mv: Option<f64>,
    pub relax_tau_s: Option<f64>,
    pub r_full_mohm: Option<f64>,
    pub r_window_mohm: Option<f64>,
    pub window_ah_per_v: Option<f64>,
    pub temperature_rise_c: Option<f64>,
}

/// Every feature's name, as `--features` and the records spell it.
pub const FEATURE_NAMES: [&str; 7] = [
    "taper_ah",
    "relax_mv",
    "relax_tau_s",
    "r_full_mohm",
    "r_window_mohm",
    "window_ah_per_v",
    "temperature_rise_c",
];

impl ScreenFeatures {
    /// A feature by name.
    pub fn get(&self, name: &str) -> Option<f64> {
        match name {
            "taper_ah" => self.taper_ah,
            "relax_mv" => self.relax_mv,
            "relax_tau_s" => self.relax_tau_s,
            "r_full_mohm" => self.r_full_mohm,
            "r_window_mohm" => self.r_window_mohm,
            "window_ah_per_v" => self.window_ah_per_v,
            "temperature_rise_c" => self.temperature_rise_c,
            _ => None,
        }
    }

    /// The named features in order, if every one is there.
    pub fn vector(&self, names: &[String]) -> Option<Vec<f64>> {
        names.iter().map(|n| self.get(n)).collect()
    }
}

/// What the feature extractor needs to know of each step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScreenStep {
    Charge,
    /// The first rest after the charge.
    Relaxation,
    Window,
    Other,
}

/// Gathers the sample-based features (taper, relaxation, window,
/// temperature) as the run's log streams; the resistances come from the
/// summary's two-level readings.
#[derive(Debug, Clone)]
pub struct FeatureTracker {
    cells: f64,
    kind_of: Vec<(u32, ScreenStep)>,
    prev: Option<Sample>,
    // Taper.
    charge_first_i: Option<f64>,
    in_taper: bool,
    taper_ah: f64,
    saw_taper: bool,
    // Relaxation: (t, V) of its samples, thinned to at most a few
    // thousand (a rest at 1 s for an hour is 3600).
    relax: Vec<(f64, f64)>,
    // Window.
    window_first_v: Option<f64>,
    window_last_v: Option<f64>,
    window_ah: f64,
    // Temperature.
    t_first: Option<f64>,
    t_max: Option<f64>,
}

/// Most relaxation samples kept.
const MAX_RELAX: usize = 20_000;

impl FeatureTracker {
    /// `steps`: each step number and what it is to the screening; `cells`:
    /// cells in series.
    pub fn new(steps: Vec<(u32, ScreenStep)>, cells: u32) -> FeatureTracker {
        FeatureTracker {
            cells: f64::from(cells.max(1)),
            kind_of: steps,
            prev: None,
            charge_first_i: None,
            in_taper: false,
            taper_ah: 0.0,
            saw_taper: false,
            relax: Vec::new(),
            window_first_v: None,
            window_last_v: None,
            window_ah: 0.0,
            t_first: None,
            t_max: None,
        }
    }

    fn kind(&self, step: u32) -> ScreenStep {
        self.kind_of
            .iter()
            .find(|(k, _)| *k == step)
            .map_or(ScreenStep::Other, |(_, s)| *s)
    }

    pub fn push(&mut self, s: &Sample) {
        if let Some(t) = s.temperature_c {
            self.t_first.get_or_insert(t);
            self.t_max = Some(self.t_max.map_or(t, |m| m.max(t)));
        }
        let same_step = self.prev.filter(|p| p.step == s.step);
        match self.kind(s.step) {
            ScreenStep::Charge => {
                let first = *self.charge_first_i.get_or_insert(s.current_a);
                if !self.in_taper && first > 0.0 && s.current_a < 0.95 * first {
                    self.in_taper = true;
                    self.saw_taper = true;
                }
                if let (true, Some(p)) = (self.in_taper, same_step) {
                    self.taper_ah += (p.current_a + s.current_a) * 0.5 * (s.t_s - p.t_s) / 3600.0;
                }
            }
            ScreenStep::Relaxation => {
                if self.relax.len() < MAX_RELAX {
                    self.relax.push((s.t_s, s.voltage_v));
                }
            }
            ScreenStep::Window => {
                self.window_first_v.get_or_insert(s.voltage_v);
                self.window_last_v = Some(s.voltage_v);
                if let Some(p) = same_step {
                    self.window_ah += (p.current_a + s.current_a) * 0.5 * (s.t_s - p.t_s) / 3600.0;
                }
            }
            ScreenStep::Other => {}
        }
        self.prev = Some(*s);
    }

    /// The features from the samples, with the two resistances given
    /// (the first and the last two-level reading of the run, mΩ).
    pub fn finish(self, r_full_mohm: Option<f64>, r_window_mohm: Option<f64>) -> ScreenFeatures {
        let (relax_mv, relax_tau_s) = relaxation(&self.relax, self.cells);
        let window_ah_per_v = match (self.window_first_v, self.window_last_v) {
            (Some(a), Some(b)) if a > b => Some(self.window_ah.abs() / ((a - b) / self.cells)),
            _ => None,
        };
        ScreenFeatures {
            taper_ah: self.saw_taper.then_some(self.taper_ah),
            relax_mv,
            relax_tau_s,
            r_full_mohm,
            r_window_mohm,
            window_ah_per_v,
            temperature_rise_c: match (self.t_first, self.t_max) {
                (Some(a), Some(b)) => Some(b - a),
                _ => None,
            },
        }
    }
}

/// The relaxation's fall per cell (mV) and the time to 1 − 1/e of it (s).
fn relaxation(pts: &[(f64, f64)], cells: f64) -> (Option<f64>, Option<f64>) {
    let (Some(&(t0, v0)), Some(&(_, v1))) = (pts.first(), pts.last()) else {
        return (None, None);
    };
    let fall = v0 - v1;
    if pts.len() < 3 || fall.abs() < 1e-9 {
        return (Some(fall / cells * 1000.0), None);
    }
    let target = (1.0 - (-1.0f64).exp()) * fall;
    let tau = pts
        .iter()
        .find(|(_, v)| (v0 - v) / fall >= target / fall)
        .map(|(t, _)| t - t0);
    (Some(fall / cells * 1000.0), tau)
}

/// One calibration pair: a pack's screening features and the capacity a
/// full test measured.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Pair {
    pub pack_id: String,
    pub x: Vec<f64>,
    pub capacity_ah: f64,
}

/// A fitted family model.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    pub features: Vec<String>,
    /// Intercept first, then one coefficient per feature.
    pub coefficients: Vec<f64>,
    pub pairs: usize,
    /// Residual standard deviation, Ah (n − p degrees of freedom).
    pub residual_sd_ah: f64,
    /// Leave-one-out: root-mean-square error, Ah, and the share of packs
    /// whose capacity fell inside the interval fitted without them.
    pub loo_rmse_ah: f64,
    pub loo_coverage: f64,
    /// (XᵀX)⁻¹, row by row, for the intervals.
    xtx_inv: Vec<f64>,
}

/// A prediction with its 95 % interval, Ah.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Prediction {
    pub capacity_ah: f64,
    pub lower_ah: f64,
    pub upper_ah: f64,
}

/// The fewest pairs a family needs: three parameters (two features and
/// the intercept) leave 7 degrees of freedom at 10 pairs, where the
/// t-quantile (2.36) is within 21 % of the normal one (1.96), so the
/// interval is not inflated by the small sample alone; and leave-one-out
/// then judges the model on at least 10 packs.
pub const MIN_PAIRS: usize = 10;

/// Why a family cannot be calibrated.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum CalibrationError {
    #[error("the family has {have} calibration pair(s) (a screening run and a full capacity test of the same pack); it needs {need}: {more} more full test(s)")]
    TooFewPairs {
        have: usize,
        need: usize,
        more: usize,
    },
    #[error("the calibration's features do not determine the capacity (they are constant or collinear across the family)")]
    Singular,
}

fn design(rows: &[Vec<f64>]) -> DMatrix<f64> {
    let p = rows.first().map_or(0, Vec::len) + 1;
    DMatrix::from_fn(
        rows.len(),
        p,
        |i, j| if j == 0 { 1.0 } else { rows[i][j - 1] },
    )
}

/// The OLS fit without cross-validation: (coefficients, s, (XᵀX)⁻¹).
fn ols(pairs: &[Pair]) -> Result<(DVector<f64>, f64, DMatrix<f64>), CalibrationError> {
    let x = design(&pairs.iter().map(|p| p.x.clone()).collect::<Vec<_>>());
    let y = DVector::from_iterator(pairs.len(), pairs.iter().map(|p| p.capacity_ah));
    let (n, p) = x.shape();
    if n <= p {
        return Err(CalibrationError::Singular);
    }
    let xtx_inv = (x.transpose() * &x)
        .try_inverse()
        .ok_or(CalibrationError::Singular)?;
    let beta = &xtx_inv * x.transpose() * &y;
    let resid = &y - &x * &beta;
    let s = (resid.norm_squared() / (n - p) as f64).sqrt();
    if !s.is_finite() || beta.iter().any(|b| !b.is_finite()) {
        return Err(CalibrationError::Singular);
    }
    Ok((beta, s, xtx_inv))
}

fn interval(
    beta: &DVector<f64>,
    s: f64,
    xtx_inv: &DMatrix<f64>,
    dof: usize,
    x0: &[f64],
) -> Prediction {
    let mut v = Vec::with_capacity(x0.len() + 1);
    v.push(1.0);
    v.extend_from_slice(x0);
    let x0 = DVector::from_vec(v);
    let y = beta.dot(&x0);
    let lever = (x0.transpose() * xtx_inv * &x0)[(0, 0)];
    let t = StudentsT::new(0.0, 1.0, dof as f64)
        .map(|d| d.inverse_cdf(0.975))
        .unwrap_or(f64::NAN);
    let half = t * s * (1.0 + lever).sqrt();
    Prediction {
        capacity_ah: y,
        lower_ah: y - half,
        upper_ah: y + half,
    }
}

/// Fit a family's model on its pairs, with leave-one-out cross-validation.
pub fn calibrate(features: &[String], pairs: &[Pair]) -> Result<Calibration, CalibrationError> {
    if pairs.len() < MIN_PAIRS {
        return Err(CalibrationError::TooFewPairs {
            have: pairs.len(),
            need: MIN_PAIRS,
            more: MIN_PAIRS - pairs.len(),
        });
    }
    let (beta, s, xtx_inv) = ols(pairs)?;
    let p = beta.len();
    let (mut sq, mut inside) = (0.0, 0usize);
    for k in 0..pairs.len() {
        let rest: Vec<Pair> = pairs
            .iter()
            .enumerate()
            .filter(|(i, _)| *i != k)
            .map(|(_, q)| q.clone())
            .collect();
        let (b, s_k, inv) = ols(&rest)?;
        let pr = interval(&b, s_k, &inv, rest.len() - p, &pairs[k].x);
        let y = pairs[k].capacity_ah;
        sq += (pr.capacity_ah - y).powi(2);
        inside += usize::from(pr.lower_ah <= y && y <= pr.upper_ah);
    }
    Ok(Calibration {
        features: features.to_vec(),
        coefficients: beta.iter().copied().collect(),
        pairs: pairs.len(),
        residual_sd_ah: s,
        loo_rmse_ah: (sq / pairs.len() as f64).sqrt(),
        loo_coverage: inside as f64 / pairs.len() as f64,
        xtx_inv: xtx_inv.iter().copied().collect(),
    })
}

impl Calibration {
    /// The capacity of a pack with features `x0`, with its 95 % interval.
    pub fn predict(&self, x0: &[f64]) -> Prediction {
        let p = self.coefficients.len();
        let beta = DVector::from_vec(self.coefficients.clone());
        let inv = DMatrix::from_column_slice(p, p, &self.xtx_inv);
        interval(&beta, self.residual_sd_ah, &inv, self.pairs - p, x0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pairs(xs: &[(f64, f64)]) -> Vec<Pair> {
        xs.iter()
            .enumerate()
            .map(|(k, &(x, y))| Pair {
                pack_id: format!("P{k}"),
                x: vec![x],
                capacity_ah: y,
            })
            .collect()
    }

    /// A line through points with known scatter: the fit recovers it; a
    /// family of too few pairs is refused with how many more it needs.
    #[test]
    fn a_line_is_recovered_and_too_few_pairs_refused() {
        let pts: Vec<(f64, f64)> = (0..12)
            .map(|k| {
                let x = k as f64;
                (x, 2.0 + 0.5 * x + if k % 2 == 0 { 0.01 } else { -0.01 })
            })
            .collect();
        let c = calibrate(&["x".into()], &pairs(&pts)).unwrap();
        assert!((c.coefficients[1] - 0.5).abs() < 0.01, "{c:?}");
        assert!((c.coefficients[0] - 2.0).abs() < 0.05);
        let p = c.predict(&[5.5]);
        assert!((p.capacity_ah - 4.75).abs() < 0.02);
        assert!(p.lower_ah < p.capacity_ah && p.capacity_ah < p.upper_ah);
        match calibrate(&["x".into()], &pairs(&pts[..7])) {
            Err(CalibrationError::TooFewPairs {
                have: 7, more: 3, ..
            }) => {}
            other => panic!("{other:?}"),
        }
        // A constant feature determines nothing.
        let flat: Vec<(f64, f64)> = (0..12).map(|k| (1.0, k as f64)).collect();
        assert_eq!(
            calibrate(&["x".into()], &pairs(&flat)),
            Err(CalibrationError::Singular)
        );
    }

    /// The relaxation's fall and its time to 63.2 %: on an exact
    /// exponential with τ = 120 s, sampled every second, τ is read to the
    /// sample.
    #[test]
    fn relaxation_time_constant_of_an_exponential() {
        let pts: Vec<(f64, f64)> = (0..=1800)
            .map(|k| {
                let t = k as f64;
                (t, 41.5 - 0.3 * (1.0 - (-t / 120.0).exp()))
            })
            .collect();
        let (mv, tau) = relaxation(&pts, 10.0);
        let fall = 0.3 * (1.0 - (-1800.0f64 / 120.0).exp());
        assert!((mv.unwrap() - fall / 10.0 * 1000.0).abs() < 1e-9);
        assert!((tau.unwrap() - 120.0).abs() <= 1.0, "{tau:?}");
    }

    /// Outside check: statsmodels' OLS and its 95 % prediction interval
    /// (`get_prediction(...).summary_frame()`: mean, obs_ci_lower,
    /// obs_ci_upper) on a committed fixture of calibration pairs, from
    /// scripts/quick_grade_reference.py: the same to 6 significant figures.
    #[test]
    fn the_fit_and_its_interval_match_statsmodels() {
        let csv = include_str!("../../../tests/fixtures/quick_grade_pairs.csv");
        let want: serde_json::Value = serde_json::from_str(include_str!(
            "../../../tests/fixtures/quick_grade_expected.json"
        ))
        .unwrap();
        let pairs: Vec<Pair> = csv
            .lines()
            .skip(1)
            .map(|l| {
                let c: Vec<&str> = l.split(',').collect();
                Pair {
                    pack_id: c[0].into(),
                    x: vec![c[1].parse().unwrap(), c[2].parse().unwrap()],
                    capacity_ah: c[3].parse().unwrap(),
                }
            })
            .collect();
        let names = vec!["window_ah_per_v".to_string(), "r_full_mohm".to_string()];
        let c = calibrate(&names, &pairs).unwrap();
        let same = |a: f64, b: f64, what: &str| {
            assert!(
                (a - b).abs() <= 5e-7 * b.abs(),
                "{what}: {a} vs statsmodels {b}"
            );
        };
        for (k, b) in want["coefficients"].as_array().unwrap().iter().enumerate() {
            same(c.coefficients[k], b.as_f64().unwrap(), "coefficient");
        }
        same(
            c.residual_sd_ah,
            want["residual_sd"].as_f64().unwrap(),
            "residual sd",
        );
        let x0: Vec<f64> = want["x0"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect();
        let p = c.predict(&x0);
        same(p.capacity_ah, want["mean"].as_f64().unwrap(), "prediction");
        same(p.lower_ah, want["obs_ci_lower"].as_f64().unwrap(), "lower");
        same(p.upper_ah, want["obs_ci_upper"].as_f64().unwrap(), "upper");
    }

    /// The features of a screening run worked by hand (two cells): a
    /// charge at 2 A for 10 s, then a taper falling 0.2 A a second to
    /// 0.2 A — the taper begins below 1.9 A (95 %), and from the last
    /// sample above it the trapezoid holds (2.0 + 0.2)/2 × 9 s = 9.9 A·s;
    /// a rest relaxing as 8.2 + 0.2·e^(−t/30) V (a fall of 0.2·(1 −
    /// e^(−10)) V, 100 mV per cell; 63.2 % of it first reached at 30 s);
    /// a window at 1 A for 360 s from 8.0 to 7.6 V: 0.1 Ah over 0.2 V per
    /// cell = 0.5 Ah/V; temperatures from 25 to 31 °C.
    #[test]
    fn a_screening_runs_features_are_worked_by_hand() {
        let steps = vec![
            (1, ScreenStep::Charge),
            (2, ScreenStep::Relaxation),
            (3, ScreenStep::Window),
            (4, ScreenStep::Other),
        ];
        let mut f = FeatureTracker::new(steps, 2);
        let mut push = |t: f64, step: u32, v: f64, i: f64, c: f64| {
            f.push(&Sample {
                t_s: t,
                step,
                cycle: 0,
                voltage_v: v,
                current_a: i,
                temperature_c: Some(c),
            })
        };
        for k in 0..=19 {
            let i = if k <= 10 {
                2.0
            } else {
                2.0 - 0.2 * f64::from(k - 10)
            };
            push(f64::from(k), 1, 8.4, i, 25.0 + 0.1 * f64::from(k));
        }
        for k in 0..=300 {
            let t = f64::from(k);
            push(100.0 + t, 2, 8.2 + 0.2 * (-t / 30.0).exp(), 0.0, 31.0);
        }
        for k in 0..=360 {
            let t = f64::from(k);
            push(500.0 + t, 3, 8.0 - 0.4 * t / 360.0, -1.0, 28.0);
        }
        push(900.0, 4, 7.0, -5.0, 40.0 - 15.0);
        let x = f.finish(Some(40.0), Some(44.0));
        let near = |a: Option<f64>, b: f64| a.is_some_and(|a| (a - b).abs() <= 1e-9 * b.abs());
        assert!(near(x.taper_ah, 9.9 / 3600.0), "{:?}", x.taper_ah);
        assert!(
            near(x.relax_mv, 0.2 * (1.0 - (-10.0f64).exp()) / 2.0 * 1000.0),
            "{:?}",
            x.relax_mv
        );
        assert_eq!(x.relax_tau_s, Some(30.0));
        assert!(near(x.window_ah_per_v, 0.5), "{:?}", x.window_ah_per_v);
        assert!(
            near(x.temperature_rise_c, 6.0),
            "{:?}",
            x.temperature_rise_c
        );
        assert_eq!((x.r_full_mohm, x.r_window_mohm), (Some(40.0), Some(44.0)));
        // By name, and as a vector in a calibration's order.
        assert_eq!(x.get("r_window_mohm"), Some(44.0));
        assert_eq!(x.get("volume"), None);
        let names: Vec<String> = FEATURE_NAMES.iter().map(|s| s.to_string()).collect();
        let v = x.vector(&names).unwrap();
        assert_eq!(v.len(), 7);
        assert_eq!(v[3], 40.0);
        assert_eq!(x.vector(&["taper_ah".into(), "none".into()]), None);
        // No taper, a rising window, no temperature: those features absent.
        let mut g = FeatureTracker::new(vec![(1, ScreenStep::Charge), (3, ScreenStep::Window)], 1);
        for k in 0..5 {
            g.push(&Sample {
                t_s: f64::from(k),
                step: 1,
                cycle: 0,
                voltage_v: 4.1,
                current_a: 2.0,
                temperature_c: None,
            });
        }
        for k in 5..9 {
            g.push(&Sample {
                t_s: f64::from(k),
                step: 3,
                cycle: 0,
                voltage_v: 3.9 + 0.01 * f64::from(k),
                current_a: -1.0,
                temperature_c: None,
            });
        }
        let y = g.finish(None, None);
        assert_eq!(
            (
                y.taper_ah,
                y.window_ah_per_v,
                y.temperature_rise_c,
                y.relax_mv
            ),
            (None, None, None, None)
        );
        // A flat rest: a fall of 0 and no time constant.
        assert_eq!(
            relaxation(&[(0.0, 4.0), (1.0, 4.0), (2.0, 4.0)], 1.0),
            (Some(0.0), None)
        );
    }

    /// Leave-one-out on an exact line: every pack predicted exactly (RMSE
    /// 0 up to rounding) and inside its interval; one pack far off the
    /// line is the one the cross-validation misses.
    #[test]
    fn leave_one_out_finds_the_pack_off_the_line() {
        let mut pts: Vec<(f64, f64)> = (0..12)
            .map(|k| {
                (
                    f64::from(k),
                    2.0 + 0.5 * f64::from(k) + if k % 3 == 0 { 0.02 } else { -0.01 },
                )
            })
            .collect();
        let c = calibrate(&["x".into()], &pairs(&pts)).unwrap();
        assert_eq!(c.pairs, 12);
        assert_eq!(c.features, ["x"]);
        assert!(c.loo_rmse_ah < 0.03, "{c:?}");
        assert_eq!(c.loo_coverage, 1.0);
        pts[6].1 += 2.0;
        let c = calibrate(&["x".into()], &pairs(&pts)).unwrap();
        assert!(
            c.loo_coverage < 1.0 && c.loo_coverage >= 10.0 / 12.0,
            "{c:?}"
        );
        assert!(c.loo_rmse_ah > 0.5, "{c:?}");
        // The interval widens away from the family's middle.
        let mid = c.predict(&[5.5]);
        let far = c.predict(&[30.0]);
        assert!(far.upper_ah - far.lower_ah > mid.upper_ah - mid.lower_ah);
        assert!(((mid.upper_ah + mid.lower_ah) / 2.0 - mid.capacity_ah).abs() < 1e-12);
    }

    /// A relaxation of two samples has its fall per cell, in mV, and no
    /// time constant (three samples are the least); one with no fall has
    /// a fall of zero and none either.
    #[test]
    fn a_short_or_flat_relaxation_gives_its_fall_and_no_time() {
        let (fall, tau) = relaxation(&[(0.0, 14.0), (60.0, 14.4)], 4.0);
        assert!((fall.unwrap() + 100.0).abs() < 1e-9, "{fall:?}");
        assert_eq!(tau, None);
        let (fall, tau) = relaxation(&[(0.0, 14.0), (30.0, 14.0), (60.0, 14.0)], 4.0);
        assert_eq!((fall, tau), (Some(0.0), None));
        assert_eq!(relaxation(&[], 4.0), (None, None));
    }

    /// The taper begins below 95 % of the charge's first current, not at
    /// it: 2.0 A, ten seconds at exactly 1.9 A, then 1.8 A; the taper's
    /// charge is counted from the last 1.9 A sample on (by trapezoids).
    #[test]
    fn the_taper_begins_below_ninety_five_percent_of_the_first_current() {
        let mut f = FeatureTracker::new(vec![(1, ScreenStep::Charge)], 4);
        for k in 0..=30 {
            let i = match k {
                0..=9 => 2.0,
                10..=19 => 1.9,
                _ => 1.8,
            };
            f.push(&Sample {
                t_s: f64::from(k),
                step: 1,
                cycle: 0,
                voltage_v: 14.0,
                current_a: i,
                temperature_c: None,
            });
        }
        let taper = f.finish(None, None).taper_ah.expect("a taper");
        let want = (0.5 * (1.9 + 1.8) + 10.0 * 1.8) / 3600.0;
        assert!((taper - want).abs() < 1e-12, "{taper} against {want}");
    }
}
