//! Thevenin equivalent circuits (a series resistance and one or two RC
//! pairs) fitted to a pulse and its relaxation by least squares.
//!
//! Model, pack sign convention (current positive into the pack):
//! V = OCV + I·R0 + v1 + v2, dv_i/dt = (I·R_i − v_i)/τ_i, C_i = τ_i/R_i
//! (PyBaMM's Thevenin model with its sign turned; fact sheet
//! characterization.md §2). Between two samples the current is the one
//! read at the first (the bench samples at a level's end, then changes
//! it), so each pair updates exactly: v_k = v_{k−1}·a + I_{k−1}·R_i·(1 − a),
//! a = e^(−Δt/τ_i).
//!
//! For fixed time constants the model is linear in R0, R_i and the settled
//! voltage, so those come from a linear least-squares solve (variable
//! projection) and only the time constants are searched: argmin's
//! Nelder–Mead on log τ from several starts, within bounds. Each
//! parameter's standard uncertainty comes from the Jacobian at the
//! optimum: cov = s²·(JᵀJ)⁻¹, s² = SSR/(n − p).

use argmin::core::{CostFunction, Executor, State};
use argmin::solver::neldermead::NelderMead;
use nalgebra::{DMatrix, DVector};
use serde::{Deserialize, Serialize};

/// One sample of the fit's window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Point {
    pub t_s: f64,
    pub voltage_v: f64,
    pub current_a: f64,
    /// Where this point's voltage counts: in the pulse window (the
    /// open-circuit voltage there is `ocv_v`), in the relaxation (the
    /// settled voltage is a fitted parameter), or not at all (its
    /// current still drives the pairs).
    pub role: Role,
    /// The open-circuit voltage before the pulse, V: the pulse window's
    /// open-circuit voltage is this plus a fitted slope times `q_ah`.
    pub ocv_v: f64,
    /// Charge into the pack since the pulse window began, Ah.
    pub q_ah: f64,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    Pulse,
    Relaxation,
    Drive,
}

/// Bounds of the searched time constants, s (our own choice: a tenth of a
/// second, the bench's fastest sampling, to a few hours).
pub const TAU_MIN_S: f64 = 0.1;
pub const TAU_MAX_S: f64 = 20_000.0;
/// The second pair's time constant is at least this multiple of the
/// first's (otherwise the two pairs are one).
pub const TAU_RATIO_MIN: f64 = 3.0;

/// A fitted circuit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct EcmFit {
    /// 1 or 2 RC pairs.
    pub order: u8,
    pub r0_ohm: f64,
    pub u_r0_ohm: f64,
    pub pairs: Vec<RcPair>,
    /// The settled voltage of the relaxation, V.
    pub settled_v: f64,
    /// The open-circuit voltage's slope against charge in the pulse
    /// window, V/Ah (fitted).
    pub ocv_slope_v_per_ah: f64,
    /// Root-mean-square residual over the points that count, V.
    pub rms_v: f64,
    pub points: usize,
    /// Starts of the search, and how many ended at the best cost (within
    /// 1 %).
    pub starts: usize,
    pub starts_agreeing: usize,
}

/// One RC pair with its standard uncertainties.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RcPair {
    pub r_ohm: f64,
    pub u_r_ohm: f64,
    pub tau_s: f64,
    pub u_tau_s: f64,
    pub c_f: f64,
    pub u_c_f: f64,
}

/// The unit responses of the pairs (R = 1 Ω) to the window's current.
fn responses(points: &[Point], taus: &[f64]) -> Vec<Vec<f64>> {
    taus.iter()
        .map(|&tau| {
            let mut u = 0.0;
            let mut out = Vec::with_capacity(points.len());
            let mut prev: Option<&Point> = None;
            for p in points {
                if let Some(q) = prev {
                    let a = (-(p.t_s - q.t_s).max(0.0) / tau).exp();
                    u = u * a + q.current_a * (1.0 - a);
                }
                out.push(u);
                prev = Some(p);
            }
            out
        })
        .collect()
}

/// The design row of point `k`: (I, u_1…, OCV slope, settled) and its
/// target.
fn row(pt: &Point, u: &[Vec<f64>], k: usize, out: &mut [f64]) -> f64 {
    let p = out.len();
    out.iter_mut().for_each(|x| *x = 0.0);
    out[0] = pt.current_a;
    for (j, uj) in u.iter().enumerate() {
        out[1 + j] = uj[k];
    }
    match pt.role {
        Role::Relaxation => {
            out[p - 1] = 1.0;
            pt.voltage_v
        }
        _ => {
            out[p - 2] = pt.q_ah;
            pt.voltage_v - pt.ocv_v
        }
    }
}

/// The linear solve for fixed time constants, by the normal equations
/// (a handful of columns): parameters (R0, R_i…, the open-circuit
/// voltage's slope against charge in the pulse window, settled voltage)
/// and the sum of squared residuals.
fn solve_linear(points: &[Point], taus: &[f64]) -> Option<(DVector<f64>, f64)> {
    let u = responses(points, taus);
    let p = 3 + taus.len();
    // The relaxation's voltages are taken about their last value, so the
    // normal equations do not lose the residual to cancellation.
    let v_ref = relaxation_reference(points);
    let mut xtx = DMatrix::<f64>::zeros(p, p);
    let mut xty = DVector::<f64>::zeros(p);
    let mut n = 0usize;
    let mut r = vec![0.0; p];
    for (k, pt) in points.iter().enumerate() {
        if pt.role == Role::Drive {
            continue;
        }
        let y = row(pt, &u, k, &mut r)
            - if pt.role == Role::Relaxation {
                v_ref
            } else {
                0.0
            };
        for a in 0..p {
            xty[a] += r[a] * y;
            for b in 0..p {
                xtx[(a, b)] += r[a] * r[b];
            }
        }
        n += 1;
    }
    if n <= p + taus.len() {
        return None;
    }
    let mut beta = xtx.cholesky()?.solve(&xty);
    beta[p - 1] += v_ref;
    let mut ssr = 0.0;
    for (k, pt) in points.iter().enumerate() {
        if pt.role == Role::Drive {
            continue;
        }
        let y = row(pt, &u, k, &mut r);
        let fit: f64 = r.iter().zip(beta.iter()).map(|(a, b)| a * b).sum();
        ssr += (y - fit) * (y - fit);
    }
    Some((beta, ssr))
}

/// The last relaxation voltage (0 when the window has none).
fn relaxation_reference(points: &[Point]) -> f64 {
    points
        .iter()
        .rev()
        .find(|p| p.role == Role::Relaxation)
        .map_or(0.0, |p| p.voltage_v)
}

/// The design matrix and residuals at given time constants and
/// parameters (for the Jacobian and the exact residual).
fn design(points: &[Point], taus: &[f64], beta: &DVector<f64>) -> (DMatrix<f64>, f64) {
    let u = responses(points, taus);
    let p = 3 + taus.len();
    let rows: Vec<usize> = (0..points.len())
        .filter(|&k| points[k].role != Role::Drive)
        .collect();
    let mut x = DMatrix::<f64>::zeros(rows.len(), p);
    let mut r = vec![0.0; p];
    let mut ssr = 0.0;
    for (i, &k) in rows.iter().enumerate() {
        let y = row(&points[k], &u, k, &mut r);
        let mut fit = 0.0;
        for a in 0..p {
            x[(i, a)] = r[a];
            fit += r[a] * beta[a];
        }
        ssr += (y - fit) * (y - fit);
    }
    (x, ssr)
}

struct Cost<'a> {
    points: &'a [Point],
    order: usize,
}

impl Cost<'_> {
    fn taus(&self, p: &[f64]) -> Option<Vec<f64>> {
        let taus: Vec<f64> = p.iter().map(|l| l.exp()).collect();
        let inside = taus.iter().all(|&t| (TAU_MIN_S..=TAU_MAX_S).contains(&t))
            && (self.order < 2 || taus[1] >= TAU_RATIO_MIN * taus[0]);
        inside.then_some(taus)
    }
}

impl CostFunction for Cost<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, p: &Self::Param) -> Result<f64, argmin::core::Error> {
        // The logarithm of the residual: the search's tolerance is then
        // relative, whatever the data's scale or noise (a noise-free model
        // log leaves residuals of nanovolts).
        Ok(self
            .taus(p)
            .and_then(|t| solve_linear(self.points, &t))
            .map_or(f64::MAX, |(_, ssr)| (ssr + 1e-300).ln()))
    }
}

/// Starting time constants, s: a spread over the usual range of a pack's
/// fast and slow processes (our own choice).
fn starts(order: usize) -> Vec<Vec<f64>> {
    match order {
        1 => vec![vec![3.0], vec![15.0], vec![60.0], vec![300.0]],
        _ => vec![
            vec![3.0, 100.0],
            vec![10.0, 300.0],
            vec![30.0, 1000.0],
            vec![60.0, 3000.0],
            vec![15.0, 1500.0],
        ],
    }
}

/// Fit a circuit of `order` (1 or 2) pairs to the window.
pub fn fit(points: &[Point], order: usize) -> Option<EcmFit> {
    let order = order.clamp(1, 2);
    let cost = Cost { points, order };
    let mut results: Vec<(f64, Vec<f64>)> = Vec::new();
    for s in starts(order) {
        let x0: Vec<f64> = s.iter().map(|t| t.ln()).collect();
        // The simplex: the start and one point per dimension, 0.7 in log
        // (a factor of two) away.
        let mut simplex = vec![x0.clone()];
        for d in 0..order {
            let mut v = x0.clone();
            v[d] += 0.7;
            simplex.push(v);
        }
        let solver = NelderMead::new(simplex).with_sd_tolerance(1e-10).ok()?;
        let res = Executor::new(Cost { points, order }, solver)
            .configure(|st| st.max_iters(1000))
            .run()
            .ok()?;
        let st = res.state();
        if let Some(best) = st.get_best_param() {
            results.push((st.get_best_cost(), best.clone()));
        }
    }
    let (best_cost, best) = results
        .iter()
        .filter(|(c, _)| c.is_finite() && *c < f64::MAX)
        .min_by(|a, b| a.0.total_cmp(&b.0))?
        .clone();
    // (Costs are log residuals: within 1 % of the best residual.)
    let agreeing = results
        .iter()
        .filter(|(c, _)| *c <= best_cost + 0.01f64.ln_1p())
        .count();
    let taus = cost.taus(&best)?;
    let (beta, _) = solve_linear(points, &taus)?;
    let (x, ssr) = design(points, &taus, &beta);
    let n = x.nrows();
    let p = x.ncols() + order;
    let dof = n.checked_sub(p).filter(|&d| d > 0)?;
    let s2 = ssr / dof as f64;
    // Jacobian: the linear columns, then ∂V/∂τ_i = R_i·∂u_i/∂τ_i by a
    // central difference of the response.
    let mut j = DMatrix::<f64>::zeros(n, p);
    j.view_mut((0, 0), (n, x.ncols())).copy_from(&x);
    let rows: Vec<usize> = (0..points.len())
        .filter(|&k| points[k].role != Role::Drive)
        .collect();
    for i in 0..order {
        let h = taus[i] * 1e-4;
        let mut up = taus.clone();
        up[i] += h;
        let mut dn = taus.clone();
        dn[i] -= h;
        let ru = &responses(points, &up)[i];
        let rd = &responses(points, &dn)[i];
        for (r, &k) in rows.iter().enumerate() {
            j[(r, x.ncols() + i)] = beta[1 + i] * (ru[k] - rd[k]) / (2.0 * h);
        }
    }
    let cov = (j.transpose() * &j).try_inverse()? * s2;
    let u = |a: usize| cov[(a, a)].max(0.0).sqrt();
    let pairs = (0..order)
        .map(|i| {
            let (r, tau) = (beta[1 + i], taus[i]);
            let (ir, it) = (1 + i, x.ncols() + i);
            let c = tau / r;
            // C = τ/R: relative variances add, less their covariance.
            let rel = cov[(it, it)] / (tau * tau) + cov[(ir, ir)] / (r * r)
                - 2.0 * cov[(it, ir)] / (tau * r);
            RcPair {
                r_ohm: r,
                u_r_ohm: u(ir),
                tau_s: tau,
                u_tau_s: u(it),
                c_f: c,
                u_c_f: c.abs() * rel.max(0.0).sqrt(),
            }
        })
        .collect();
    Some(EcmFit {
        order: order as u8,
        r0_ohm: beta[0],
        u_r0_ohm: u(0),
        pairs,
        settled_v: beta[x.ncols() - 1],
        ocv_slope_v_per_ah: beta[x.ncols() - 2],
        rms_v: (ssr / n as f64).sqrt(),
        points: n,
        starts: results.len(),
        starts_agreeing: agreeing,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A window made by the model itself (exact update), with a known
    /// OCV: the fit must return its parameters.
    fn window(r0: f64, pairs: &[(f64, f64)], ocv: f64) -> Vec<Point> {
        window_sampled(r0, pairs, ocv, 0.1, 1.0)
    }

    /// The same window sampled every `dt_pulse` s through the pulses and
    /// every `dt_rest` s through the relaxation.
    fn window_sampled(
        r0: f64,
        pairs: &[(f64, f64)],
        ocv: f64,
        dt_pulse: f64,
        dt_rest: f64,
    ) -> Vec<Point> {
        let mut pts = Vec::new();
        let mut v = vec![0.0; pairs.len()];
        let mut t = 0.0;
        let mut i_prev = 0.0;
        // The open-circuit voltage rises 0.1 V per Ah in the pulse window.
        let slope = 0.1;
        let mut q = 0.0;
        let push = |t: f64, i: f64, q: f64, role: Role, v: &[f64], pts: &mut Vec<Point>| {
            let open = if role == Role::Pulse {
                ocv + slope * q
            } else {
                ocv - 0.05
            };
            pts.push(Point {
                t_s: t,
                voltage_v: open + i * r0 + v.iter().sum::<f64>(),
                current_a: i,
                role,
                ocv_v: ocv,
                q_ah: q,
            });
        };
        // 10 s at −10 A, 40 s rest, 10 s at +7.5 A, sampled at 0.1 s;
        // 360 s at −3 A (not counted), then 3600 s of rest at 1 s.
        let plan: [(f64, f64, f64, Role); 5] = [
            (10.0, -10.0, dt_pulse, Role::Pulse),
            (40.0, 0.0, dt_pulse, Role::Pulse),
            (10.0, 7.5, dt_pulse, Role::Pulse),
            (360.0, -3.0, 10.0, Role::Drive),
            (3600.0, 0.0, dt_rest, Role::Relaxation),
        ];
        push(t, 0.0, q, Role::Pulse, &v, &mut pts);
        for (dur, i, dt, role) in plan {
            let n = (dur / dt).round() as usize;
            for k in 0..n {
                // The level changes just after the sample at its edge.
                let cur = if k == 0 { i_prev } else { i };
                for (j, &(r, tau)) in pairs.iter().enumerate() {
                    let a: f64 = (-dt / tau).exp();
                    v[j] = v[j] * a + cur * r * (1.0 - a);
                }
                t += dt;
                q += cur * dt / 3600.0;
                // First sample of a level: just after its edge.
                push(t, i, q, role, &v, &mut pts);
                let _ = k;
            }
            i_prev = i;
        }
        pts
    }

    #[test]
    fn recovers_a_second_order_circuit_it_made() {
        let pts = window(0.020, &[(0.008, 30.0), (0.006, 600.0)], 14.8);
        let f = fit(&pts, 2).expect("fit");
        assert!((f.r0_ohm - 0.020).abs() < 0.020 * 1e-3, "{f:?}");
        assert!((f.pairs[0].r_ohm - 0.008).abs() < 0.008 * 1e-3, "{f:?}");
        assert!((f.pairs[0].tau_s - 30.0).abs() < 30.0 * 1e-3, "{f:?}");
        assert!((f.pairs[1].r_ohm - 0.006).abs() < 0.006 * 1e-3, "{f:?}");
        assert!((f.pairs[1].tau_s - 600.0).abs() < 600.0 * 1e-3, "{f:?}");
        assert!((f.settled_v - 14.75).abs() < 1e-6);
        assert!((f.ocv_slope_v_per_ah - 0.1).abs() < 1e-4, "{f:?}");
        assert!(f.rms_v < 1e-6);
    }

    #[test]
    fn recovers_a_first_order_circuit_and_its_capacitance() {
        let pts = window(0.030, &[(0.012, 20.0)], 12.0);
        let f = fit(&pts, 1).expect("fit");
        assert!((f.r0_ohm - 0.030).abs() < 0.030 * 1e-3);
        assert!((f.pairs[0].tau_s - 20.0).abs() < 20.0 * 1e-3);
        assert!((f.pairs[0].c_f - 20.0 / 0.012).abs() < (20.0 / 0.012) * 1e-3);
    }

    #[test]
    fn a_first_order_fit_of_a_second_order_window_leaves_a_residual() {
        let pts = window(0.020, &[(0.008, 30.0), (0.006, 600.0)], 14.8);
        let f1 = fit(&pts, 1).expect("fit");
        let f2 = fit(&pts, 2).expect("fit");
        assert!(
            f1.rms_v > 100.0 * f2.rms_v.max(1e-9),
            "{} {}",
            f1.rms_v,
            f2.rms_v
        );
    }

    #[test]
    fn a_window_with_no_counted_points_has_no_fit() {
        let pts: Vec<Point> = window(0.02, &[(0.01, 30.0)], 12.0)
            .into_iter()
            .map(|p| Point {
                role: Role::Drive,
                ..p
            })
            .collect();
        assert!(fit(&pts, 1).is_none());
    }

    /// With ±1 mV alternating on every counted point (noise no smooth
    /// response can follow), the residual's RMS is that 1 mV: the sum
    /// of squares over the points counted, not the sum itself.
    #[test]
    fn the_residual_rms_is_per_point() {
        let mut k = 0;
        let pts: Vec<Point> = window(0.020, &[(0.008, 30.0), (0.006, 600.0)], 14.8)
            .into_iter()
            .map(|p| {
                if p.role == Role::Drive {
                    return p;
                }
                k += 1;
                let e = if k % 2 == 0 { 1e-3 } else { -1e-3 };
                Point {
                    voltage_v: p.voltage_v + e,
                    ..p
                }
            })
            .collect();
        let f = fit(&pts, 2).expect("fit");
        assert_eq!(f.points, k);
        assert!((f.rms_v / 1e-3 - 1.0).abs() < 0.01, "{}", f.rms_v);
        // The figures barely move and now carry an uncertainty.
        assert!((f.r0_ohm / 0.020 - 1.0).abs() < 0.01, "{f:?}");
        assert!(
            f.u_r0_ohm > 0.0 && f.pairs.iter().all(|p| p.u_c_f > 0.0),
            "{f:?}"
        );
    }

    /// The standard deviation of a sample (n − 1).
    fn sd(xs: &[f64]) -> f64 {
        let n = xs.len() as f64;
        let m = xs.iter().sum::<f64>() / n;
        (xs.iter().map(|x| (x - m) * (x - m)).sum::<f64>() / (n - 1.0)).sqrt()
    }

    /// Each figure's stated standard uncertainty against the spread of
    /// the figure itself over many fits of the same circuit with fresh
    /// noise (a Monte Carlo, GUM Supplement 1's way of checking a
    /// linearised uncertainty; fact sheet metrology.md): the uncertainty
    /// `fit` states from one window must be the standard deviation the
    /// figure shows from window to window. `trials` windows of Gaussian
    /// noise `sigma_v` on every counted point; returns, per figure (R0,
    /// then R, τ, C of each pair), (spread, mean stated uncertainty,
    /// mean, truth).
    fn monte_carlo(
        pairs: &[(f64, f64)],
        sigma_v: f64,
        trials: usize,
        seed: u64,
    ) -> Vec<(&'static str, f64, f64, f64, f64)> {
        use rand::{rngs::SmallRng, SeedableRng};
        use rand_distr::{Distribution, Normal};
        let r0 = 0.020;
        let clean = window_sampled(r0, pairs, 14.8, 1.0, 10.0);
        let noise = Normal::new(0.0, sigma_v).expect("normal");
        let mut rng = SmallRng::seed_from_u64(seed);
        let mut figures: Vec<Vec<(f64, f64)>> = vec![Vec::new(); 1 + 3 * pairs.len()];
        for _ in 0..trials {
            let pts: Vec<Point> = clean
                .iter()
                .map(|p| Point {
                    voltage_v: p.voltage_v
                        + if p.role == Role::Drive {
                            0.0
                        } else {
                            noise.sample(&mut rng)
                        },
                    ..*p
                })
                .collect();
            let f = fit(&pts, pairs.len()).expect("fit");
            figures[0].push((f.r0_ohm, f.u_r0_ohm));
            for (i, p) in f.pairs.iter().enumerate() {
                figures[1 + 3 * i].push((p.r_ohm, p.u_r_ohm));
                figures[2 + 3 * i].push((p.tau_s, p.u_tau_s));
                figures[3 + 3 * i].push((p.c_f, p.u_c_f));
            }
        }
        let mut truth = vec![("R0", r0)];
        for &(r, tau) in pairs {
            truth.extend([("R", r), ("tau", tau), ("C", tau / r)]);
        }
        figures
            .iter()
            .zip(truth)
            .map(|(xs, (name, t))| {
                let values: Vec<f64> = xs.iter().map(|x| x.0).collect();
                let n = xs.len() as f64;
                (
                    name,
                    sd(&values),
                    xs.iter().map(|x| x.1).sum::<f64>() / n,
                    values.iter().sum::<f64>() / n,
                    t,
                )
            })
            .collect()
    }

    /// Stated and observed spread agree within what `trials` samples can
    /// tell (the standard deviation of a sample of n normal values has a
    /// relative standard error of 1/√(2(n − 1)): 10 % at 50, so ±35 % is
    /// 3.5 of them), and each mean is the truth within 4 standard errors
    /// of the mean (a linearised fit of small noise is nearly unbiased).
    fn assert_stated_is_observed(rows: &[(&str, f64, f64, f64, f64)], trials: usize) {
        for &(name, spread, stated, mean, truth) in rows {
            let ratio = stated / spread;
            assert!(
                (0.65..=1.35).contains(&ratio),
                "{name}: stated {stated:.4e}, observed {spread:.4e} (ratio {ratio:.3})"
            );
            let se = spread / (trials as f64).sqrt();
            assert!(
                (mean - truth).abs() < 4.0 * se,
                "{name}: mean {mean} vs truth {truth} (standard error {se:.3e})"
            );
        }
    }

    #[test]
    fn a_first_order_fits_stated_uncertainties_are_its_spread_over_noisy_windows() {
        let trials = 50;
        let rows = monte_carlo(&[(0.012, 20.0)], 2e-3, trials, 11);
        assert_stated_is_observed(&rows, trials);
    }

    #[test]
    fn a_second_order_fits_stated_uncertainties_are_its_spread_over_noisy_windows() {
        let trials = 50;
        let rows = monte_carlo(&[(0.008, 30.0), (0.006, 600.0)], 2e-3, trials, 12);
        assert_stated_is_observed(&rows, trials);
    }

    /// The search stays in its bounds: a second pair at least three times
    /// slower than the first (fitting a one-pair window with two, where
    /// the best would merge them), and time constants between 0.1 s and
    /// 20,000 s (a pair of 0.02 s or 50,000 s is fitted at the bound).
    /// Every start of a noise-free window ends at its best (within 1 %).
    #[test]
    fn the_time_constants_stay_within_their_bounds() {
        let f = fit(&window(0.030, &[(0.012, 20.0)], 12.0), 2).expect("fit");
        let (t1, t2) = (f.pairs[0].tau_s, f.pairs[1].tau_s);
        assert!(t2 >= TAU_RATIO_MIN * t1 * (1.0 - 1e-9), "{t1} {t2}");
        assert_eq!(f.starts, 5);
        let f = fit(&window(0.030, &[(0.012, 0.02)], 12.0), 1).expect("fit");
        assert!(f.pairs[0].tau_s >= TAU_MIN_S * (1.0 - 1e-9), "{f:?}");
        assert!(f.pairs[0].tau_s < 0.2, "{f:?}");
        let f = fit(&window(0.030, &[(0.012, 50_000.0)], 12.0), 1).expect("fit");
        assert!(f.pairs[0].tau_s <= TAU_MAX_S * (1.0 + 1e-9), "{f:?}");
        assert!(f.pairs[0].tau_s > 10_000.0, "{f:?}");
        // With noise (2 mV), the starts that converge end at the same
        // residual, the best among them.
        for (pairs, n) in [
            (vec![(0.008, 30.0), (0.006, 600.0)], 5),
            (vec![(0.012, 20.0)], 4),
        ] {
            let mut k = 0u32;
            let pts: Vec<Point> = window_sampled(0.020, &pairs, 14.8, 1.0, 10.0)
                .into_iter()
                .map(|p| {
                    k += 1;
                    Point {
                        voltage_v: p.voltage_v + 2e-3 * f64::from(k % 7) / 3.0 - 2e-3,
                        ..p
                    }
                })
                .collect();
            let f = fit(&pts, pairs.len()).expect("fit");
            assert_eq!((f.starts, f.starts_agreeing), (n, n));
        }
    }

    /// The least window a fit takes: more counted points than the
    /// parameters (the linear ones and the time constants) plus the time
    /// constants: 8 counted points for two pairs (7 parameters) give a
    /// fit of the noise-free circuit, 7 give none.
    #[test]
    fn the_least_window_for_a_second_order_fit() {
        let all = window(0.020, &[(0.008, 30.0), (0.006, 600.0)], 14.8);
        let pulse: Vec<usize> = (0..all.len())
            .filter(|&k| all[k].role == Role::Pulse)
            .collect();
        let relax: Vec<usize> = (0..all.len())
            .filter(|&k| all[k].role == Role::Relaxation)
            .collect();
        let pick = |keep: &[usize]| -> Vec<Point> {
            all.iter()
                .enumerate()
                .map(|(k, p)| Point {
                    role: if keep.contains(&k) {
                        p.role
                    } else {
                        Role::Drive
                    },
                    ..*p
                })
                .collect()
        };
        let (np, nr) = (pulse.len(), relax.len());
        let eight = [
            pulse[1],
            pulse[50],
            pulse[100],
            pulse[300],
            pulse[np - 1],
            relax[0],
            relax[nr / 4],
            relax[nr - 1],
        ];
        let f = fit(&pick(&eight), 2).expect("a fit of 8 points");
        assert_eq!(f.points, 8);
        assert!((f.r0_ohm / 0.020 - 1.0).abs() < 1e-3, "{f:?}");
        assert!(fit(&pick(&eight[..7]), 2).is_none());
    }
}
