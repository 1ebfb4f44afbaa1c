//! Uncertainty budgets per the GUM (JCGM 100:2008): each result's terms,
//! their combination, the expanded uncertainty, the dominant term, and a
//! Monte Carlo interval (JCGM 101:2008) where a rectangular term
//! dominates and a coverage factor of 2 would overstate the 95 % interval.
//!
//! The measurement model of a capacity, after `shared/reference/metrology.md`
//! §1 (its formulas are derived there and checked against the
//! `uncertainties` package and a numpy Monte Carlo by
//! `scripts/uncertainty_reference.py`):
//!
//! ```text
//! Q_m ≈ (1 + g + ε)·Q + o·T + Σ w_k n_k + Σ w_k q_k + e_V/|dV/dQ|_end + ΔQ_rule + ΔQ_end
//! ```
//!
//! An error common to every sample (gain g, offset o, time base ε, a
//! rounding that repeats when the noise is below one step) adds linearly
//! over the samples; independent noise adds in quadrature. Terms are
//! combined in quadrature (they are independent of each other; a term that
//! is correlated across the two steps of an efficiency is built as one
//! term there).

use model::accuracy::{BenchAccuracy, Spec};
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, StandardNormal};
use serde::{Deserialize, Serialize};

/// The coverage factor of the expanded uncertainty (about 95 % for a
/// normal distribution; JCGM 100:2008 6.3.3).
pub const K: f64 = 2.0;
/// The coverage probability reported, %.
pub const COVERAGE_PCT: f64 = 95.0;
/// A rectangular term dominates when it holds more than this share of the
/// combined variance: then a normal coverage factor overstates and the
/// Monte Carlo interval is given (JCGM 101:2008 validates the GUM's;
/// common practice for the threshold).
pub const RECTANGULAR_DOMINATES: f64 = 0.5;
/// Trials of the Monte Carlo interval given with every budget whose
/// rectangular term dominates (JCGM 101 7.2 asks for enough trials that
/// the interval's ends are stable to the reported digit, two significant
/// digits here: 10⁵ trials put the 2.5 % point within about 0.5 % of u).
pub const MC_TRIALS: usize = 100_000;

/// How a term's error is distributed.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Shape {
    /// Uniform within ±√3·u (a stated limit, a resolution, a crossing
    /// somewhere in an interval).
    Rectangular,
    /// Normal with standard deviation u (noise averaged over many samples,
    /// a fit's or a calibration's standard uncertainty).
    Normal,
}

/// One term of a budget: the standard uncertainty it gives the result, in
/// the result's unit.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Term {
    pub name: String,
    pub u: f64,
    pub shape: Shape,
    /// Common to every sample (adds linearly over the run) or not.
    pub correlated: bool,
    /// How it was found, in words.
    pub basis: String,
}

/// A result's uncertainty budget.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Budget {
    pub value: f64,
    pub unit: String,
    pub terms: Vec<Term>,
    /// Combined standard uncertainty.
    pub u: f64,
    pub k: f64,
    /// U = k·u.
    pub expanded: f64,
    /// The term with the largest share, by name.
    pub dominant: String,
    /// Its share of the combined variance (0..1).
    pub dominant_share: f64,
    /// Where a rectangular term dominates: the 95 % interval's half-width
    /// from a Monte Carlo of the same terms (JCGM 101), narrower than k·u.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mc_half_width: Option<f64>,
}

impl Budget {
    /// Combine terms (zero and non-finite terms are left out).
    pub fn of(value: f64, unit: &str, terms: Vec<Term>) -> Budget {
        let terms: Vec<Term> = terms
            .into_iter()
            .filter(|t| t.u.is_finite() && t.u > 0.0)
            .collect();
        let var: f64 = terms.iter().map(|t| t.u * t.u).sum();
        let u = var.sqrt();
        let (dominant, share, shape) = terms
            .iter()
            .max_by(|a, b| a.u.total_cmp(&b.u))
            .map(|t| {
                (
                    t.name.clone(),
                    if var > 0.0 { t.u * t.u / var } else { 0.0 },
                    t.shape,
                )
            })
            .unwrap_or_else(|| (String::new(), 0.0, Shape::Normal));
        let mut b = Budget {
            value,
            unit: unit.to_string(),
            terms,
            u,
            k: K,
            expanded: K * u,
            dominant,
            dominant_share: share,
            mc_half_width: None,
        };
        if shape == Shape::Rectangular && share > RECTANGULAR_DOMINATES {
            let mc = monte_carlo(&b, MC_TRIALS, 0x5eed);
            b.mc_half_width = Some(0.5 * (mc.hi - mc.lo));
        }
        b
    }

    /// The half-width of the reported 95 % interval: the Monte Carlo's
    /// where a rectangular term dominates, else k·u.
    pub fn half_width(&self) -> f64 {
        self.mc_half_width.unwrap_or(self.expanded)
    }

    /// The same budget scaled by a factor (a result that is another times a
    /// constant: a state of health from a capacity over its rating).
    pub fn scaled(&self, factor: f64, unit: &str) -> Budget {
        let mut terms = self.terms.clone();
        for t in &mut terms {
            t.u *= factor.abs();
        }
        Budget::of(self.value * factor, unit, terms)
    }

    /// "12.99 Ah ± 0.03 Ah (k = 2, 95 %)": the uncertainty to two
    /// significant digits and the value to the same place (JCGM 100:2008
    /// 7.2.6).
    pub fn show(&self) -> String {
        let hw = self.half_width();
        let dec = decimals_for(hw);
        let unit = &self.unit;
        let sp = if unit.is_empty() { "" } else { " " };
        let how = match self.mc_half_width {
            Some(_) => "95 %, Monte Carlo".to_string(),
            None => format!("k = {}, {} %", self.k, COVERAGE_PCT),
        };
        format!(
            "{:.dec$}{sp}{unit} ± {:.dec$}{sp}{unit} ({how})",
            self.value, hw
        )
    }

    /// "± 0.030 Ah (k = 2, 95 %)": what follows a figure already printed.
    pub fn pm(&self) -> String {
        let hw = self.half_width();
        let dec = decimals_for(hw);
        let sp = if self.unit.is_empty() { "" } else { " " };
        let how = match self.mc_half_width {
            Some(_) => "95 %, Monte Carlo".to_string(),
            None => format!("k = {}, {} %", self.k, COVERAGE_PCT),
        };
        format!("± {hw:.dec$}{sp}{} ({how})", self.unit)
    }

    /// The short form for tiles and labels: "12.99 ± 0.03 Ah".
    pub fn short(&self) -> String {
        let hw = self.half_width();
        let dec = decimals_for(hw);
        let sp = if self.unit.is_empty() { "" } else { " " };
        format!("{:.dec$} ± {:.dec$}{sp}{}", self.value, hw, self.unit)
    }

    /// Why the interval is what it is, in one line (the dominant term, and
    /// where a rectangular term rules, what k = 2 would have said).
    pub fn note(&self) -> String {
        let mut s = format!(
            "dominant term: {} ({:.0} % of the variance)",
            self.dominant,
            self.dominant_share * 100.0
        );
        if let Some(hw) = self.mc_half_width {
            let dec = decimals_for(hw) + 1;
            s.push_str(&format!(
                "; it is rectangular, so k = 2 (± {:.dec$}) overstates the 95 % interval: the Monte Carlo interval (JCGM 101:2008) ± {:.dec$} is given",
                self.expanded, hw
            ));
        }
        s
    }
}

/// Decimals that show `x` to two significant digits (at least 0, at most 6).
pub fn decimals_for(x: f64) -> usize {
    if !(x.is_finite() && x > 0.0) {
        return 3;
    }
    let mag = x.log10().floor() as i32;
    (1 - mag).clamp(0, 6) as usize
}

/// A Monte Carlo of a budget's terms (JCGM 101:2008): the result's
/// estimate, standard deviation and its probabilistically symmetric 95 %
/// interval.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct MonteCarlo {
    pub trials: usize,
    pub mean: f64,
    pub sd: f64,
    pub lo: f64,
    pub hi: f64,
}

/// Draw each term from its distribution, sum, sort and read the 2.5 % and
/// 97.5 % points (JCGM 101:2008 7.7).
pub fn monte_carlo(b: &Budget, trials: usize, seed: u64) -> MonteCarlo {
    let trials = trials.max(100);
    let mut rng = SmallRng::seed_from_u64(seed);
    let mut ys = Vec::with_capacity(trials);
    for _ in 0..trials {
        let mut y = b.value;
        for t in &b.terms {
            y += match t.shape {
                Shape::Rectangular => t.u * 3f64.sqrt() * rng.random_range(-1.0..1.0),
                Shape::Normal => {
                    let z: f64 = StandardNormal.sample(&mut rng);
                    t.u * z
                }
            };
        }
        ys.push(y);
    }
    let n = ys.len() as f64;
    let mean = ys.iter().sum::<f64>() / n;
    let sd = (ys.iter().map(|y| (y - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
    // The two quantiles by selection (linear time), not a full sort.
    let mut at = |p: f64| {
        let k = ((p * n) as usize).min(ys.len() - 1);
        *ys.select_nth_unstable_by(k, f64::total_cmp).1
    };
    let lo = at(0.025);
    let hi = at(0.975);
    MonteCarlo {
        trials,
        mean,
        sd,
        lo,
        hi,
    }
}

fn rect(name: &str, half_width: f64, correlated: bool, basis: String) -> Term {
    Term {
        name: name.into(),
        u: half_width.abs() / 3f64.sqrt(),
        shape: Shape::Rectangular,
        correlated,
        basis,
    }
}

fn normal(name: &str, u: f64, correlated: bool, basis: String) -> Term {
    Term {
        name: name.into(),
        u: u.abs(),
        shape: Shape::Normal,
        correlated,
        basis,
    }
}

/// What a step's samples tell of its measurement: the figures the budget
/// reads from the data (sampling, noise, the integration rule's error, the
/// slope at the end).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
pub struct StepMeasure {
    /// Σ Δt² over the sample intervals, s² (the noise term's weight).
    pub sum_dt2_s2: f64,
    /// The last sample interval, s (where the end fell).
    pub last_dt_s: f64,
    /// ∫ V dt over the step, V·s (the current offset's sensitivity on energy).
    pub v_dt_vs: f64,
    /// Current noise on the step's plateau (Type A, from successive
    /// differences: s = √(Σd²/2n)), A.
    pub noise_a: Option<f64>,
    /// Voltage noise, likewise, V.
    pub noise_v: Option<f64>,
    /// The integration rule's error bound from the data: |Q_h − Q_2h|/3
    /// (the trapezoid at every sample against every other sample;
    /// Richardson), Ah.
    pub integration_ah: f64,
    /// The same for the energy, Wh.
    pub integration_wh: f64,
    /// |I| at the last sample, A.
    pub end_current_a: f64,
    /// |dV/dQ| over the last 2 % of the step's charge, V/Ah.
    pub dv_dq_v_per_ah: Option<f64>,
}

/// Samples kept for the slope at the end of a step.
const END_RING: usize = 512;

/// Builds a [`StepMeasure`] as the samples stream (memory bounded: a ring
/// of the last few hundred samples).
#[derive(Debug, Clone, Default)]
pub struct MeasureAcc {
    n: usize,
    last: Option<(f64, f64, f64)>,
    m: StepMeasure,
    /// Fine integrals (Ah, Wh) at every sample and at the last even one.
    q: f64,
    e: f64,
    q_at_even: f64,
    e_at_even: f64,
    /// Coarse integrals over every other sample.
    q2: f64,
    e2: f64,
    even: Option<(f64, f64, f64)>,
    di2: f64,
    dv2: f64,
    dn: usize,
    ring: std::collections::VecDeque<(f64, f64)>,
}

impl MeasureAcc {
    pub fn push(&mut self, t: f64, v: f64, i: f64) {
        if let Some((t0, v0, i0)) = self.last {
            let dt = t - t0;
            if dt > 0.0 {
                self.m.sum_dt2_s2 += dt * dt;
                self.m.last_dt_s = dt;
                self.m.v_dt_vs += 0.5 * (v0 + v) * dt;
                self.q += 0.5 * (i0 + i) * dt / 3600.0;
                self.e += 0.5 * (i0 * v0 + i * v) * dt / 3600.0;
                let d = i - i0;
                // A plateau: the step's current did not jump (1 % of it,
                // or 20 mA at low current; common practice).
                if d.abs() <= (0.01 * i.abs()).max(0.02) {
                    self.di2 += d * d;
                    self.dv2 += (v - v0) * (v - v0);
                    self.dn += 1;
                }
            }
        }
        if self.n.is_multiple_of(2) {
            if let Some((t0, v0, i0)) = self.even {
                let dt = t - t0;
                self.q2 += 0.5 * (i0 + i) * dt / 3600.0;
                self.e2 += 0.5 * (i0 * v0 + i * v) * dt / 3600.0;
            }
            self.even = Some((t, v, i));
            self.q_at_even = self.q;
            self.e_at_even = self.e;
        }
        if self.ring.len() == END_RING {
            self.ring.pop_front();
        }
        self.ring.push_back((self.q, v));
        self.last = Some((t, v, i));
        self.n += 1;
    }

    /// Forget the last sample (a resumed run: nothing across the break).
    pub fn break_segment(&mut self) {
        self.last = None;
        self.even = None;
    }

    /// Add a later stretch of the same step (a step split by a resume).
    pub fn merge(&mut self, o: &MeasureAcc) {
        self.m.sum_dt2_s2 += o.m.sum_dt2_s2;
        self.m.v_dt_vs += o.m.v_dt_vs;
        if o.n > 1 {
            self.m.last_dt_s = o.m.last_dt_s;
        }
        self.q_at_even = self.q + o.q_at_even;
        self.e_at_even = self.e + o.e_at_even;
        self.q += o.q;
        self.e += o.e;
        self.q2 += o.q2;
        self.e2 += o.e2;
        self.di2 += o.di2;
        self.dv2 += o.dv2;
        self.dn += o.dn;
        if !o.ring.is_empty() {
            self.ring.clone_from(&o.ring);
        }
        self.last = o.last.or(self.last);
        self.n += o.n;
    }

    pub fn finish(&self) -> StepMeasure {
        let mut m = self.m;
        if self.dn >= 10 {
            m.noise_a = Some((self.di2 / (2.0 * self.dn as f64)).sqrt());
            m.noise_v = Some((self.dv2 / (2.0 * self.dn as f64)).sqrt());
        }
        m.integration_ah = (self.q_at_even - self.q2).abs() / 3.0;
        m.integration_wh = (self.e_at_even - self.e2).abs() / 3.0;
        m.end_current_a = self.last.map(|l| l.2.abs()).unwrap_or(0.0);
        m.dv_dq_v_per_ah = end_slope(&self.ring, self.q);
        m
    }
}

/// |dV/dQ| by least squares over the samples in the last 2 % of the
/// step's charge (at least 5 samples).
fn end_slope(ring: &std::collections::VecDeque<(f64, f64)>, q_total: f64) -> Option<f64> {
    let q_end = ring.back()?.0;
    let window = 0.02 * q_total.abs();
    let mut pts: Vec<(f64, f64)> = ring
        .iter()
        .rev()
        .take_while(|(q, _)| (q_end - q).abs() <= window)
        .copied()
        .collect();
    if pts.len() < 5 {
        pts = ring.iter().rev().take(5).copied().collect();
    }
    if pts.len() < 3 {
        return None;
    }
    let n = pts.len() as f64;
    let mq = pts.iter().map(|p| p.0).sum::<f64>() / n;
    let sqq: f64 = pts.iter().map(|p| (p.0 - mq).powi(2)).sum();
    // (Σ(q − q̄)·v is Sqv: Σ(q − q̄) = 0. No spread of charge: 0/0, none.)
    let sqv: f64 = pts.iter().map(|p| (p.0 - mq) * p.1).sum();
    Some((sqv / sqq).abs()).filter(|s| s.is_finite())
}

/// The current's offset after the run's zero tare: the tare's own
/// standard uncertainty (the mean of `readings` zero readings with noise
/// s and resolution δ), or, without a tare, the stated offset limit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Tare {
    /// Readings averaged for each instrument's zero.
    pub readings: usize,
}

/// The inputs of a charge or energy budget of one step.
#[derive(Debug, Clone, Copy)]
pub struct StepInputs<'a> {
    /// |Q|, Ah, and |E|, Wh, as measured.
    pub q_ah: f64,
    pub e_wh: f64,
    pub duration_s: f64,
    pub measure: &'a StepMeasure,
    pub current: &'a Spec,
    pub voltage: Option<&'a Spec>,
    pub timebase_ppm: Option<f64>,
    /// Whether the zero offsets were read before the run and subtracted.
    pub tare: Option<Tare>,
    /// The step ended on a voltage cutoff at this voltage (the end
    /// detection and the cutoff's accuracy count).
    pub cutoff_v: Option<f64>,
}

/// A gain term: a stated limit (rectangular) or a calibration's u (normal).
fn gain_term(name: &str, value: f64, spec: &Spec, common: &str) -> Term {
    if spec.calibrated {
        normal(
            name,
            value * spec.gain_u(),
            true,
            format!(
                "u = {:.4} % of reading from the station's calibration, {common}",
                spec.reading_pct
            ),
        )
    } else {
        rect(
            name,
            value * spec.gain_limit(),
            true,
            format!("±{} % of reading, {common}", spec.reading_pct),
        )
    }
}

/// The current-offset term's standard uncertainty, A, and how it was found.
fn offset_u(x: &StepInputs<'_>) -> (f64, Shape, String) {
    if x.current.calibrated {
        return (
            x.current.offset_u(),
            Shape::Normal,
            format!(
                "the station's calibration (its offset and linearity): u = {:.3} mA",
                x.current.offset_u() * 1e3
            ),
        );
    }
    match x.tare {
        Some(t) => {
            let s = x.measure.noise_a.unwrap_or(0.0);
            let d = x.current.resolution;
            let n = t.readings.max(1) as f64;
            let u = (s * s / n + d * d / 12.0).sqrt();
            (
                u,
                Shape::Normal,
                format!(
                    "the zero read before the run and subtracted: mean of {} readings, noise {:.2} mA, resolution {:.2} mA → u = {:.3} mA",
                    t.readings,
                    s * 1e3,
                    d * 1e3,
                    u * 1e3
                ),
            )
        }
        None => (
            x.current.offset_u(),
            Shape::Rectangular,
            format!(
                "no zero tare: the stated offset ±{:.2} mA, rectangular",
                x.current.offset_limit() * 1e3
            ),
        ),
    }
}

/// The terms of a step's charge, Ah (metrology.md §1.2).
pub fn charge_terms(x: &StepInputs<'_>) -> Vec<Term> {
    let m = x.measure;
    let t = x.duration_s;
    let mut out = vec![gain_term(
        "current gain",
        x.q_ah,
        x.current,
        "the same on every sample",
    )];
    let (uo, shape, basis) = offset_u(x);
    out.push(Term {
        name: "current offset".into(),
        u: uo * t / 3600.0,
        shape,
        correlated: true,
        basis,
    });
    let d = x.current.resolution;
    let s = m.noise_a.unwrap_or(0.0);
    if d > 0.0 {
        if s < d {
            out.push(rect(
                "resolution",
                0.5 * d * t / 3600.0,
                true,
                format!(
                    "{:.3} mA steps, noise below one step: the same rounding on every sample",
                    d * 1e3
                ),
            ));
        } else {
            out.push(normal(
                "resolution",
                d / 12f64.sqrt() * m.sum_dt2_s2.sqrt() / 3600.0,
                false,
                format!(
                    "{:.3} mA steps dithered by the noise: independent from sample to sample",
                    d * 1e3
                ),
            ));
        }
    }
    if let Some(s) = m.noise_a {
        out.push(normal(
            "noise (Type A)",
            s * m.sum_dt2_s2.sqrt() / 3600.0,
            false,
            format!(
                "s = {:.3} mA from successive differences on the plateau",
                s * 1e3
            ),
        ));
    }
    if let Some(ppm) = x.timebase_ppm {
        out.push(rect(
            "time base",
            x.q_ah * ppm * 1e-6,
            true,
            format!("±{ppm} ppm"),
        ));
    }
    out.push(rect(
        "integration rule",
        m.integration_ah,
        false,
        "trapezoid against every other sample, |Q_h − Q_2h|/3".into(),
    ));
    if let Some(v) = x.cutoff_v {
        out.push(rect(
            "end detection",
            0.5 * m.end_current_a * m.last_dt_s / 3600.0,
            false,
            format!(
                "the cutoff crossed somewhere in the last {:.2} s interval at {:.3} A",
                m.last_dt_s, m.end_current_a
            ),
        ));
        if let (Some(vs), Some(slope)) = (x.voltage, m.dv_dq_v_per_ah) {
            if slope > 0.0 {
                out.push(rect(
                    "cutoff voltage",
                    vs.limit_at(v) / slope,
                    false,
                    format!(
                        "±{:.1} mV at {:.3} V through |dV/dQ| = {:.3} V/Ah at the end",
                        vs.limit_at(v) * 1e3,
                        v,
                        slope
                    ),
                ));
            }
        }
    }
    out
}

/// The terms of a step's energy, Wh: the current's terms carried at the
/// mean voltage, the voltage's own gain and offset, and the ends.
pub fn energy_terms(x: &StepInputs<'_>) -> Vec<Term> {
    let m = x.measure;
    let t = x.duration_s;
    let vbar = if t > 0.0 {
        m.v_dt_vs / t
    } else if x.q_ah > 0.0 {
        x.e_wh / x.q_ah
    } else {
        0.0
    };
    let mut out = Vec::new();
    out.push(gain_term(
        "current gain",
        x.e_wh,
        x.current,
        "on every sample",
    ));
    if let Some(v) = x.voltage {
        out.push(rect(
            "voltage gain",
            x.e_wh * v.gain_limit(),
            true,
            format!("±{} % of reading", v.reading_pct),
        ));
        out.push(rect(
            "voltage offset",
            x.q_ah * v.offset_limit(),
            true,
            format!("±{:.2} mV over the charge", v.offset_limit() * 1e3),
        ));
    }
    let (uo, shape, basis) = offset_u(x);
    out.push(Term {
        name: "current offset".into(),
        u: uo * m.v_dt_vs / 3600.0,
        shape,
        correlated: true,
        basis,
    });
    if let Some(s) = m.noise_a {
        out.push(normal(
            "noise (Type A)",
            s * vbar * m.sum_dt2_s2.sqrt() / 3600.0,
            false,
            format!("s = {:.3} mA at the mean voltage {vbar:.3} V", s * 1e3),
        ));
    }
    if let Some(ppm) = x.timebase_ppm {
        out.push(rect(
            "time base",
            x.e_wh * ppm * 1e-6,
            true,
            format!("±{ppm} ppm"),
        ));
    }
    out.push(rect(
        "integration rule",
        m.integration_wh,
        false,
        "trapezoid against every other sample, |E_h − E_2h|/3".into(),
    ));
    if let Some(v) = x.cutoff_v {
        let end_ah = 0.5 * m.end_current_a * m.last_dt_s / 3600.0;
        out.push(rect(
            "end detection",
            end_ah * v,
            false,
            format!("the last {:.2} s interval at {v:.3} V", m.last_dt_s),
        ));
        if let (Some(vs), Some(slope)) = (x.voltage, m.dv_dq_v_per_ah) {
            if slope > 0.0 {
                out.push(rect(
                    "cutoff voltage",
                    vs.limit_at(v) / slope * v,
                    false,
                    format!("through |dV/dQ| = {slope:.3} V/Ah at {v:.3} V"),
                ));
            }
        }
    }
    out
}

/// A ratio's budget (an efficiency, %) from its two steps' terms: terms
/// named alike and correlated between the steps (`common`) act on the
/// numerator and denominator at once and are taken with their signs; the
/// rest add in quadrature. `num` and `den` are the two figures.
pub fn ratio_budget(
    num: f64,
    num_terms: &[Term],
    den: f64,
    den_terms: &[Term],
    common: &[(&str, CommonSign)],
) -> Budget {
    let value = num / den * 100.0;
    let mut terms = Vec::new();
    for t in num_terms {
        if common.iter().any(|(n, _)| *n == t.name) {
            continue;
        }
        let mut t = t.clone();
        t.u = t.u / num * value;
        t.name = format!("{} (discharge)", t.name);
        terms.push(t);
    }
    for t in den_terms {
        match common.iter().find(|(n, _)| *n == t.name) {
            Some((name, sign)) => {
                let Some(tn) = num_terms.iter().find(|x| x.name == *name) else {
                    continue;
                };
                let rel_n = tn.u / num;
                let rel_d = t.u / den;
                let u = match sign {
                    // A gain: the same relative error on both; cancels.
                    CommonSign::Same => (rel_n - rel_d).abs() * value,
                    // An offset: raises one, lowers the other.
                    CommonSign::Opposite => (rel_n + rel_d) * value,
                };
                let mut t = t.clone();
                t.u = u;
                t.basis = format!(
                    "{}; one instrument both ways: {}",
                    t.basis,
                    match sign {
                        CommonSign::Same => "cancels to first order",
                        CommonSign::Opposite => "adds linearly (one reads high, the other low)",
                    }
                );
                terms.push(t);
            }
            None => {
                let mut t = t.clone();
                t.u = t.u / den * value;
                t.name = format!("{} (charge)", t.name);
                terms.push(t);
            }
        }
    }
    Budget::of(value, "%", terms)
}

/// How a term common to both steps of a ratio moves them.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CommonSign {
    Same,
    Opposite,
}

/// The capacity at rated conditions: the measured budget times the
/// correction factor, plus the temperature reading's and the coefficient's
/// terms (metrology.md §1.2, "Temperature").
pub struct CorrectionInputs {
    /// corrected / measured.
    pub factor: f64,
    /// The temperature correction's coefficient α (per K), the reading θ
    /// and the reference θ_ref, where a temperature correction was made.
    pub temperature: Option<(f64, f64, f64)>,
    /// u(α)/α: the coefficient's own relative uncertainty.
    pub alpha_rel_u: f64,
    /// The temperature input's tolerance, ± °C.
    pub temperature_tolerance_c: Option<f64>,
    /// The rate correction: ln(I_test / I_rated), the exponent k and its
    /// half-width, where one was made.
    pub rate: Option<(f64, f64, f64)>,
}

pub fn corrected_budget(measured: &Budget, corrected: f64, c: &CorrectionInputs) -> Budget {
    let mut terms: Vec<Term> = measured
        .terms
        .iter()
        .map(|t| Term {
            u: t.u * c.factor,
            ..t.clone()
        })
        .collect();
    if let Some((alpha, theta, theta_ref)) = c.temperature {
        // C = C_m / (1 + α(θ − θ_ref)): ∂C/∂θ = −C·α/(1 + αΔ),
        // ∂C/∂α = −C·Δ/(1 + αΔ).
        let d = theta - theta_ref;
        let den = 1.0 + alpha * d;
        if let Some(tol) = c.temperature_tolerance_c {
            terms.push(rect(
                "temperature reading",
                corrected * alpha / den * tol,
                false,
                format!("±{tol} °C through the coefficient {alpha}/K"),
            ));
        }
        terms.push(rect(
            "temperature coefficient",
            corrected * d.abs() / den * alpha * c.alpha_rel_u * 3f64.sqrt(),
            false,
            format!(
                "α = {alpha}/K known to ±{:.0} %, {:.1} K from the reference",
                c.alpha_rel_u * 3f64.sqrt() * 100.0,
                d
            ),
        ));
    }
    if let Some((ln_ratio, k, k_half)) = c.rate {
        terms.push(rect(
            "Peukert exponent",
            corrected * ln_ratio.abs() * k_half,
            false,
            format!(
                "k = {k} ± {k_half}, test current {:.1} % off the rated",
                (ln_ratio.exp() - 1.0) * 100.0
            ),
        ));
    }
    Budget::of(corrected, &measured.unit, terms)
}

/// A resistance from two current levels, R = ΔV/ΔI, mΩ: gains of both
/// meters (the offsets cancel in the differences), their resolution and
/// noise on each difference, and the scatter of repeated readings.
pub fn resistance_budget(
    r_mohm: f64,
    dv_v: f64,
    di_a: f64,
    voltage: &Spec,
    current: &Spec,
    noise: (Option<f64>, Option<f64>),
    readings: &[f64],
) -> Budget {
    let mut terms = vec![
        rect(
            "voltage gain",
            r_mohm * voltage.gain_limit(),
            true,
            format!("±{} % of reading", voltage.reading_pct),
        ),
        rect(
            "current gain",
            r_mohm * current.gain_limit(),
            true,
            format!("±{} % of reading", current.reading_pct),
        ),
    ];
    let (dv, di) = (dv_v.abs(), di_a.abs());
    if dv > 0.0 && di > 0.0 {
        let (nv, ni) = noise;
        let sv = (voltage.resolution.powi(2) / 6.0 + 2.0 * nv.unwrap_or(0.0).powi(2)).sqrt();
        let si = (current.resolution.powi(2) / 6.0 + 2.0 * ni.unwrap_or(0.0).powi(2)).sqrt();
        terms.push(normal(
            "voltage difference",
            r_mohm * sv / dv,
            false,
            format!(
                "resolution and noise of two readings over ΔV = {:.1} mV",
                dv * 1e3
            ),
        ));
        terms.push(normal(
            "current difference",
            r_mohm * si / di,
            false,
            format!("resolution and noise of two readings over ΔI = {di:.3} A"),
        ));
    }
    if readings.len() >= 3 {
        let n = readings.len() as f64;
        let mean = readings.iter().sum::<f64>() / n;
        let s = (readings.iter().map(|r| (r - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        terms.push(normal(
            "repeatability (Type A)",
            s / n.sqrt(),
            false,
            format!("s = {s:.3} mΩ over {} readings", readings.len()),
        ));
    }
    Budget::of(r_mohm, "mΩ", terms)
}

/// The accuracy a step's current was read with: the discharge or charge
/// meter's.
pub fn current_spec(acc: &BenchAccuracy, discharge: bool) -> Option<&Spec> {
    if discharge {
        acc.discharge_current.as_ref()
    } else {
        acc.charge_current.as_ref()
    }
}

/// Draw an error within ±limit (uniformly) for a seeded simulation of a
/// meter "within its stated accuracy".
pub fn draw_within(rng: &mut impl Rng, limit: f64) -> f64 {
    limit * rng.random_range(-1.0..1.0)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// metrology.md §1.3 worked example (derived there with numpy and
    /// re-checked with the uncertainties, GTC and metrolopy packages):
    /// 2.5 Ah at 0.5 A for 5 h, Δt = 1 s, current ±(0.05 % rdg + 0.02 % of
    /// 5 A), δ = 0.1 mA, σ = 0.5 mA, clock ±50 ppm, voltmeter ±(0.02 % +
    /// 0.5 mV) at 3.0 V, |dV/dQ| = 6 V/Ah, stop within the last 1 s.
    fn worked() -> (StepMeasure, Spec, Spec) {
        let m = StepMeasure {
            sum_dt2_s2: 18_000.0,
            last_dt_s: 1.0,
            v_dt_vs: 0.0,
            noise_a: Some(0.0005),
            noise_v: None,
            integration_ah: 0.0,
            integration_wh: 0.0,
            end_current_a: 0.5,
            dv_dq_v_per_ah: Some(6.0),
        };
        let i = Spec {
            reading_pct: 0.05,
            range_pct: 0.02,
            offset: 0.0,
            resolution: 0.0001,
            calibrated: false,
        }
        .resolved(Some(5.0));
        let v = Spec {
            reading_pct: 0.02,
            range_pct: 0.0,
            offset: 0.0005,
            resolution: 0.0,
            calibrated: false,
        };
        (m, i, v)
    }

    #[test]
    fn the_worked_example_of_the_metrology_sheet() {
        let (m, i, v) = worked();
        let x = StepInputs {
            q_ah: 2.5,
            e_wh: 0.0,
            duration_s: 18_000.0,
            measure: &m,
            current: &i,
            voltage: Some(&v),
            timebase_ppm: Some(50.0),
            tare: None,
            cutoff_v: Some(3.0),
        };
        let b = Budget::of(2.5, "Ah", charge_terms(&x));
        let mah = |name: &str| {
            b.terms
                .iter()
                .find(|t| t.name == name)
                .map(|t| t.u * 1000.0)
                .unwrap()
        };
        // metrology.md §1.3 table, mAh.
        assert!((mah("current gain") - 0.722).abs() < 0.001);
        assert!((mah("current offset") - 2.887).abs() < 0.001);
        assert!((mah("noise (Type A)") - 0.019).abs() < 0.0005);
        assert!((mah("time base") - 0.072).abs() < 0.001);
        assert!((mah("end detection") - 0.040).abs() < 0.001);
        assert!((mah("cutoff voltage") - 0.106).abs() < 0.001);
        // The noise (0.5 mA) is above the 0.1 mA step: dithered, 0.0011 mAh.
        assert!((mah("resolution") - 0.0011).abs() < 0.0001);
        // Combined 2.982 mAh less the correlated-resolution line the table
        // lists as the alternative (0.144 mAh): √(2.982² − 0.144²) = 2.9785.
        assert!((b.u * 1000.0 - 2.9785).abs() < 0.002, "{}", b.u * 1000.0);
        assert_eq!(b.dominant, "current offset");
        // The offset is rectangular and holds 94 % of the variance: the
        // Monte Carlo's 95 % half-width is 5.13 mAh, not k·u = 5.96
        // (metrology.md §1.3, numpy and metrolopy agree).
        let hw = b.mc_half_width.unwrap() * 1000.0;
        assert!((hw - 5.13).abs() < 0.04, "{hw}");
        assert!(b.show().contains("Monte Carlo"), "{}", b.show());
    }

    #[test]
    fn a_tare_replaces_the_stated_offset_with_its_own() {
        let (m, i, v) = worked();
        let x = StepInputs {
            q_ah: 2.5,
            e_wh: 0.0,
            duration_s: 18_000.0,
            measure: &m,
            current: &i,
            voltage: Some(&v),
            timebase_ppm: Some(50.0),
            tare: Some(Tare { readings: 100 }),
            cutoff_v: Some(3.0),
        };
        let b = Budget::of(2.5, "Ah", charge_terms(&x));
        // u(tare) = √(0.5²/100 + 0.1²/12) mA = 0.0577 mA over 5 h = 0.289 mAh.
        let off = b.terms.iter().find(|t| t.name == "current offset").unwrap();
        assert!((off.u * 1000.0 - 0.0577 * 5.0).abs() < 0.001, "{}", off.u);
        // Now the gain leads, and the budget is near normal.
        assert_eq!(b.dominant, "current gain");
        assert!(b.u * 1000.0 < 0.85);
    }

    #[test]
    fn an_efficiency_cancels_a_common_gain_and_adds_a_common_offset() {
        let g = |u: f64| Term {
            name: "current gain".into(),
            u,
            shape: Shape::Rectangular,
            correlated: true,
            basis: String::new(),
        };
        let o = |u: f64| Term {
            name: "current offset".into(),
            u,
            shape: Shape::Rectangular,
            correlated: true,
            basis: String::new(),
        };
        // 10 Ah out of 10.1 Ah in; gain 0.1 % of each; offset 5 mAh on each.
        let num = [g(0.010), o(0.005)];
        let den = [g(0.0101), o(0.005)];
        let common = [
            ("current gain", CommonSign::Same),
            ("current offset", CommonSign::Opposite),
        ];
        let b = ratio_budget(10.0, &num, 10.1, &den, &common);
        let ce = 10.0 / 10.1 * 100.0;
        assert!((b.value - ce).abs() < 1e-12);
        let gain = b.terms.iter().find(|t| t.name == "current gain");
        assert!(gain.is_none_or(|t| t.u < 1e-12), "a common gain cancels");
        let off = b.terms.iter().find(|t| t.name == "current offset").unwrap();
        assert!((off.u - (0.0005 + 0.005 / 10.1) * ce).abs() < 1e-9);
        // Two instruments: nothing common, both gains count.
        let b2 = ratio_budget(10.0, &num, 10.1, &den, &[]);
        assert_eq!(b2.terms.len(), 4);
        assert!(b2.u > b.terms.iter().map(|t| t.u).fold(0.0, f64::max));
    }

    #[test]
    fn the_end_slope_and_noise_come_from_the_samples() {
        // 2 A discharge for 1000 s at 1 s, V falling linearly 1 V/Ah;
        // alternating ±1 mA on the current.
        let mut a = MeasureAcc::default();
        for k in 0..=1000 {
            let t = k as f64;
            let q = -2.0 * t / 3600.0;
            let i = -2.0 + if k % 2 == 0 { 0.001 } else { -0.001 };
            a.push(t, 3.6 + q, i);
        }
        let m = a.finish();
        assert!((m.dv_dq_v_per_ah.unwrap() - 1.0).abs() < 0.01);
        // Successive differences of ±1 mA are 2 mA: s = 2/√2 = 1.414 mA.
        assert!((m.noise_a.unwrap() - 0.002 / 2f64.sqrt()).abs() < 1e-6);
        assert!((m.sum_dt2_s2 - 1000.0).abs() < 1e-9);
        assert_eq!(m.last_dt_s, 1.0);
        assert!((m.end_current_a - 2.001).abs() < 1e-12 || (m.end_current_a - 1.999).abs() < 1e-12);
        // Alternating noise is seen by the rule check too (every other
        // sample reads +1 mA): 1 mA × 1000 s / 3 = 0.093 mAh.
        assert!((m.integration_ah * 1e3 - 1.0 / 3.6 / 3.0).abs() < 0.002);
        // A linear current integrates exactly either way; a quadratic one
        // has the trapezoid's error, −(T/12)·Δt²·I'' per step size
        // (metrology.md §1.2), which Richardson's |Q_h − Q_2h|/3 finds.
        let mut lin = MeasureAcc::default();
        let mut quad = MeasureAcc::default();
        for k in 0..=1000 {
            let t = k as f64 * 10.0;
            lin.push(t, 3.6, -2.0 + 1e-4 * t);
            quad.push(t, 3.6, -2.0 + 1e-8 * t * t);
        }
        assert!(lin.finish().integration_ah < 1e-12);
        // Trapezoid error at h = 10 s: (T/12)·h²·I'' = 10000/12·100·2e-8 A·s.
        let expect = 10_000.0 / 12.0 * 100.0 * 2e-8 / 3600.0;
        let got = quad.finish().integration_ah;
        assert!((got - expect).abs() < 0.01 * expect, "{got} {expect}");
    }

    #[test]
    fn uncertainties_are_shown_to_two_digits() {
        let b = Budget::of(
            12.98765,
            "Ah",
            vec![normal("x", 0.0151, false, String::new())],
        );
        assert_eq!(b.show(), "12.988 Ah ± 0.030 Ah (k = 2, 95 %)");
        assert_eq!(b.short(), "12.988 ± 0.030 Ah");
        let s = b.scaled(100.0 / 14.0, "%");
        assert_eq!(s.short(), "92.77 ± 0.22 %");
    }

    /// A step's data terms worked by hand: eleven samples a second apart,
    /// V = 3.0 + 0.1·t, I = −2 + 0.001·(−1)^k. Σ Δt² = 10 s²; ∫V dt = 35
    /// V·s; the successive differences ±2 mA give s = √(10·(2 mA)²/(2·10))
    /// = 1.414 mA; the trapezoid at every sample gives −20/3600 Ah, at
    /// every other −19.99/3600 Ah, so the rule's error is 0.01/3600/3 Ah;
    /// the end current 1.999 A; the last five samples fall 0.1 V per
    /// 2/3600 Ah: |dV/dQ| = 180 V/Ah.
    #[test]
    fn a_steps_data_terms_are_worked_by_hand() {
        let mut acc = MeasureAcc::default();
        for k in 0..=10 {
            let t = f64::from(k);
            let i = -2.0 + 0.001 * if k % 2 == 0 { 1.0 } else { -1.0 };
            acc.push(t, 3.0 + 0.1 * t, i);
        }
        let m = acc.finish();
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-9 * b.abs().max(1e-12);
        assert!(near(m.sum_dt2_s2, 10.0), "{m:?}");
        assert!(near(m.last_dt_s, 1.0));
        assert!(near(m.v_dt_vs, 35.0));
        assert!(near(m.noise_a.unwrap(), 2e-6f64.sqrt()), "{:?}", m.noise_a);
        assert!(near(m.noise_v.unwrap(), (0.1f64 / 20.0).sqrt()));
        assert!(
            near(m.integration_ah, 0.01 / 3600.0 / 3.0),
            "{}",
            m.integration_ah
        );
        assert!(near(m.end_current_a, 1.999));
        assert!(
            near(m.dv_dq_v_per_ah.unwrap(), 180.0),
            "{:?}",
            m.dv_dq_v_per_ah
        );
        // Fewer than ten plateau differences: no noise figure.
        let mut few = MeasureAcc::default();
        for k in 0..10 {
            few.push(f64::from(k), 3.0, -2.0);
        }
        assert_eq!(few.finish().noise_a, None);
        // A jump (over 1 % of the current, or 20 mA) is not noise.
        let mut jump = MeasureAcc::default();
        for k in 0..=20 {
            jump.push(f64::from(k), 3.0, if k < 10 { -2.0 } else { -3.0 });
        }
        assert_eq!(jump.finish().noise_a, Some(0.0));
        // A step split by a resume: the stretches merged are the whole.
        let (mut a, mut b) = (MeasureAcc::default(), MeasureAcc::default());
        for k in 0..=10 {
            let t = f64::from(k);
            let x = (
                t,
                3.0 + 0.1 * t,
                -2.0 + 0.001 * if k % 2 == 0 { 1.0 } else { -1.0 },
            );
            if k <= 4 {
                a.push(x.0, x.1, x.2)
            } else {
                b.push(x.0, x.1, x.2)
            }
        }
        a.merge(&b);
        let mm = a.finish();
        // The interval across the split (t = 4 → 5) is in neither.
        assert!(near(mm.sum_dt2_s2, 9.0), "{mm:?}");
        assert!(near(mm.v_dt_vs, 35.0 - (3.4 + 3.5) / 2.0));
        assert!(near(mm.end_current_a, 1.999));
        assert!(near(mm.last_dt_s, 1.0));
    }

    /// The charge terms of a 2 A, 5 h step with a stated accuracy of
    /// ±0.1 % of reading, ±5 mA offset and 1 mA resolution, worked from
    /// metrology.md §1.2's forms: gain 10 Ah × 0.001/√3; offset (no tare)
    /// 5 mA/√3 × 5 h; resolution with noise below one step: rectangular
    /// 0.5 mA × 5 h; with the tare, the offset is the mean of 10 zero
    /// readings: √(s²/10 + δ²/12) × 5 h.
    #[test]
    fn the_charge_terms_are_their_forms() {
        let m = StepMeasure {
            sum_dt2_s2: 18_000.0,
            last_dt_s: 1.0,
            v_dt_vs: 3.6 * 18_000.0,
            noise_a: Some(0.0004),
            noise_v: None,
            integration_ah: 1e-6,
            integration_wh: 0.0,
            end_current_a: 2.0,
            dv_dq_v_per_ah: Some(4.0),
        };
        let spec = Spec {
            reading_pct: 0.1,
            range_pct: 0.0,
            offset: 0.005,
            resolution: 0.001,
            calibrated: false,
        };
        let x = StepInputs {
            q_ah: 10.0,
            e_wh: 36.0,
            duration_s: 18_000.0,
            measure: &m,
            current: &spec,
            voltage: Some(&spec),
            timebase_ppm: Some(100.0),
            tare: None,
            cutoff_v: Some(3.0),
        };
        let terms = charge_terms(&x);
        let u = |name: &str| {
            terms
                .iter()
                .find(|t| t.name == name)
                .map(|t| (t.u, t.shape, t.correlated))
        };
        let r3 = 3f64.sqrt();
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-15);
        let g = u("current gain").unwrap();
        assert!(near(g.0, 10.0 * 0.001 / r3) && g.1 == Shape::Rectangular && g.2);
        let o = u("current offset").unwrap();
        assert!(
            near(o.0, 0.005 / r3 * 5.0) && o.1 == Shape::Rectangular,
            "{o:?}"
        );
        let r = u("resolution").unwrap();
        assert!(near(r.0, 0.5 * 0.001 * 5.0 / r3) && r.2, "{r:?}");
        let n = u("noise (Type A)").unwrap();
        assert!(
            near(n.0, 0.0004 * 18_000f64.sqrt() / 3600.0) && !n.2,
            "{n:?}"
        );
        assert!(near(u("time base").unwrap().0, 10.0 * 100e-6 / r3));
        assert!(near(u("integration rule").unwrap().0, 1e-6 / r3));
        assert!(near(
            u("end detection").unwrap().0,
            0.5 * 2.0 * 1.0 / 3600.0 / r3
        ));
        // The cutoff: the voltmeter's limit at 3.0 V (0.1 % + 5 mV = 8 mV)
        // through 4 V/Ah.
        assert!(near(u("cutoff voltage").unwrap().0, 0.008 / 4.0 / r3));
        // With the zero tared: the tare's own u, normal.
        let tared = StepInputs {
            tare: Some(Tare { readings: 10 }),
            ..x
        };
        let t = charge_terms(&tared);
        let o = t.iter().find(|t| t.name == "current offset").unwrap();
        let want = (0.0004f64.powi(2) / 10.0 + 0.001f64.powi(2) / 12.0).sqrt() * 5.0;
        assert!(near(o.u, want) && o.shape == Shape::Normal, "{o:?}");
        // Noise above one step: the resolution dithers (independent).
        let coarse = Spec {
            resolution: 0.0002,
            ..spec
        };
        let d = charge_terms(&StepInputs {
            current: &coarse,
            ..x
        });
        let r = d.iter().find(|t| t.name == "resolution").unwrap();
        assert!(
            near(r.u, 0.0002 / 12f64.sqrt() * 18_000f64.sqrt() / 3600.0) && !r.correlated,
            "{r:?}"
        );
        // No cutoff: no end terms; no time base: none.
        let plain = charge_terms(&StepInputs {
            cutoff_v: None,
            timebase_ppm: None,
            ..x
        });
        assert!(plain
            .iter()
            .all(|t| !["end detection", "cutoff voltage", "time base"].contains(&t.name.as_str())));
    }

    /// A budget's sums and its printing: u = √Σu², U = 2u, the dominant
    /// term's share; scaled by a factor; two significant digits.
    #[test]
    fn a_budget_combines_scales_and_prints() {
        let t = |name: &str, u: f64| normal(name, u, false, String::new());
        let b = Budget::of(
            12.3456,
            "Ah",
            vec![
                t("a", 0.03),
                t("b", 0.04),
                t("zero", 0.0),
                t("nan", f64::NAN),
            ],
        );
        assert_eq!(b.terms.len(), 2);
        assert!((b.u - 0.05).abs() < 1e-15 && (b.expanded - 0.1).abs() < 1e-15);
        assert_eq!(b.dominant, "b");
        assert!((b.dominant_share - 0.64).abs() < 1e-12);
        assert_eq!(b.mc_half_width, None);
        assert_eq!(b.half_width(), b.expanded);
        assert_eq!(b.show(), "12.35 Ah ± 0.10 Ah (k = 2, 95 %)");
        assert_eq!(b.pm(), "± 0.10 Ah (k = 2, 95 %)");
        assert_eq!(b.short(), "12.35 ± 0.10 Ah");
        assert_eq!(b.note(), "dominant term: b (64 % of the variance)");
        let s = b.scaled(100.0 / 14.0, "%");
        assert!((s.value - 12.3456 * 100.0 / 14.0).abs() < 1e-12);
        assert!((s.u - 0.05 * 100.0 / 14.0).abs() < 1e-12);
        assert_eq!(s.unit, "%");
        assert_eq!(
            Budget::of(1.0, "", vec![t("a", 0.01)]).short(),
            "1.000 ± 0.020"
        );
        for (x, d) in [
            (0.12, 2),
            (0.012, 3),
            (1.2, 1),
            (12.0, 0),
            (1234.0, 0),
            (1e-9, 6),
            (0.0, 3),
            (f64::NAN, 3),
        ] {
            assert_eq!(decimals_for(x), d, "{x}");
        }
        // A rectangular term that dominates: the Monte Carlo's interval,
        // √3·u·0.95 for a lone rectangle (its 95 % points).
        let r = Budget::of(10.0, "Ah", vec![rect("offset", 0.1, true, String::new())]);
        let hw = r.mc_half_width.unwrap();
        assert!((hw - 0.095).abs() < 0.001, "{hw}");
        assert!(r.show().contains("(95 %, Monte Carlo)"), "{}", r.show());
        // One more decimal in the note than in the figure.
        assert!(
            r.note().contains("k = 2 (± 0.1155) overstates")
                && r.note().contains("± 0.0950 is given"),
            "{}",
            r.note()
        );
        let mc = monte_carlo(&r, 100_000, 7);
        assert!(
            (mc.mean - 10.0).abs() < 0.001 && (mc.sd - 0.1 / 3f64.sqrt()).abs() < 0.001,
            "{mc:?}"
        );
    }

    /// The energy, ratio, corrected-capacity and resistance budgets worked
    /// from their forms (metrology.md §1.2): each term's u against the
    /// textbook expression with the same inputs.
    #[test]
    fn the_other_budgets_are_their_forms() {
        let r3 = 3f64.sqrt();
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-15);
        let m = StepMeasure {
            sum_dt2_s2: 18_000.0,
            last_dt_s: 2.0,
            v_dt_vs: 3.5 * 18_000.0,
            noise_a: Some(0.0004),
            noise_v: None,
            integration_ah: 0.0,
            integration_wh: 2e-6,
            end_current_a: 2.0,
            dv_dq_v_per_ah: Some(4.0),
        };
        let i = Spec {
            reading_pct: 0.1,
            range_pct: 0.0,
            offset: 0.005,
            resolution: 0.001,
            calibrated: false,
        };
        let v = Spec {
            reading_pct: 0.05,
            range_pct: 0.0,
            offset: 0.002,
            resolution: 0.0,
            calibrated: false,
        };
        let x = StepInputs {
            q_ah: 10.0,
            e_wh: 35.0,
            duration_s: 18_000.0,
            measure: &m,
            current: &i,
            voltage: Some(&v),
            timebase_ppm: Some(100.0),
            tare: None,
            cutoff_v: Some(3.0),
        };
        let t = energy_terms(&x);
        let u = |name: &str| t.iter().find(|t| t.name == name).map(|t| t.u).unwrap();
        assert!(near(u("current gain"), 35.0 * 0.001 / r3));
        assert!(near(u("voltage gain"), 35.0 * 0.0005 / r3));
        assert!(near(u("voltage offset"), 10.0 * 0.002 / r3));
        assert!(near(
            u("current offset"),
            0.005 / r3 * 3.5 * 18_000.0 / 3600.0
        ));
        assert!(near(
            u("noise (Type A)"),
            0.0004 * 3.5 * 18_000f64.sqrt() / 3600.0
        ));
        assert!(near(u("time base"), 35.0 * 100e-6 / r3));
        assert!(near(u("integration rule"), 2e-6 / r3));
        assert!(near(
            u("end detection"),
            0.5 * 2.0 * 2.0 / 3600.0 * 3.0 / r3
        ));
        assert!(near(
            u("cutoff voltage"),
            (0.0005 * 3.0 + 0.002) / 4.0 * 3.0 / r3
        ));
        // Without a duration the mean voltage is E/Q.
        let m0 = StepMeasure { v_dt_vs: 0.0, ..m };
        let t0 = energy_terms(&StepInputs {
            duration_s: 0.0,
            measure: &m0,
            ..x
        });
        let n0 = t0.iter().find(|t| t.name == "noise (Type A)").unwrap();
        assert!(near(n0.u, 0.0004 * 3.5 * 18_000f64.sqrt() / 3600.0));
        // With a duration the mean voltage is the time-weighted one
        // (3.6 V here), not E/Q (3.5 V).
        let m36 = StepMeasure {
            v_dt_vs: 3.6 * 18_000.0,
            ..m
        };
        let t36 = energy_terms(&StepInputs { measure: &m36, ..x });
        let o36 = t36.iter().find(|t| t.name == "current offset").unwrap();
        assert!(near(o36.u, 0.005 / r3 * 3.6 * 18_000.0 / 3600.0));
    }

    #[test]
    fn a_ratios_budget_cancels_and_adds_what_is_common() {
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-15);
        let term = |name: &str, u: f64| normal(name, u, true, String::new());
        // A ratio: 9 over 10 → 90 %. A gain common to both (0.1 % each)
        // cancels; an offset common to both adds; the rest add in
        // quadrature, each relative to its own figure.
        let num = [
            term("gain", 0.009),
            term("offset", 0.002),
            term("noise", 0.003),
        ];
        let den = [
            term("gain", 0.010),
            term("offset", 0.002),
            term("noise", 0.004),
        ];
        let b = ratio_budget(
            9.0,
            &num,
            10.0,
            &den,
            &[("gain", CommonSign::Same), ("offset", CommonSign::Opposite)],
        );
        assert!(near(b.value, 90.0));
        let get = |name: &str| b.terms.iter().find(|t| t.name == name).map(|t| t.u);
        assert_eq!(get("gain"), None, "cancelled exactly (0.1 % on both)");
        assert!(near(
            get("offset").unwrap(),
            (0.002 / 9.0 + 0.002 / 10.0) * 90.0
        ));
        assert!(near(get("noise (discharge)").unwrap(), 0.003 / 9.0 * 90.0));
        assert!(near(get("noise (charge)").unwrap(), 0.004 / 10.0 * 90.0));
        assert!(b
            .terms
            .iter()
            .find(|t| t.name == "offset")
            .unwrap()
            .basis
            .contains("adds linearly"));
    }

    #[test]
    fn the_corrected_capacitys_budget_adds_the_corrections_terms() {
        let r3 = 3f64.sqrt();
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-15);
        let term = |name: &str, u: f64| normal(name, u, true, String::new());
        // The corrected capacity: C = Cm/(1 + αΔ) with α = 0.003/K, θ =
        // 35 °C, θ_ref = 25 °C; the reading ±1 °C, α known to ±50 % (u =
        // 0.5/√3 relative); a rate correction ln(2), k ± 0.1.
        let measured = Budget::of(10.0, "Ah", vec![term("gain", 0.01)]);
        let c = 10.0 / 1.03;
        let cb = corrected_budget(
            &measured,
            c,
            &CorrectionInputs {
                factor: 1.0 / 1.03,
                temperature: Some((0.003, 35.0, 25.0)),
                alpha_rel_u: 0.5 / r3,
                temperature_tolerance_c: Some(1.0),
                rate: Some((2f64.ln(), 1.2, 0.1)),
            },
        );
        let get = |name: &str| {
            cb.terms
                .iter()
                .find(|t| t.name == name)
                .map(|t| t.u)
                .unwrap()
        };
        assert!(near(get("gain"), 0.01 / 1.03));
        assert!(near(
            get("temperature reading"),
            c * 0.003 / 1.03 * 1.0 / r3
        ));
        assert!(near(
            get("temperature coefficient"),
            c * 10.0 / 1.03 * 0.003 * 0.5 / r3
        ));
        assert!(near(get("Peukert exponent"), c * 2f64.ln() * 0.1 / r3));
        assert!(near(cb.value, c));
        // A reading known to ±2 °C: twice the term.
        let cb2 = corrected_budget(
            &measured,
            c,
            &CorrectionInputs {
                factor: 1.0 / 1.03,
                temperature: Some((0.003, 35.0, 25.0)),
                alpha_rel_u: 0.5 / r3,
                temperature_tolerance_c: Some(2.0),
                rate: None,
            },
        );
        let reading = cb2.terms.iter().find(|t| t.name == "temperature reading");
        assert!(near(reading.unwrap().u, c * 0.003 / 1.03 * 2.0 / r3));
    }

    /// Trapezoid sums over every `step`-th sample, from the samples
    /// themselves: (Ah, Wh).
    fn trapezoid(x: &[(f64, f64, f64)], step: usize) -> (f64, f64) {
        let pts: Vec<_> = x.iter().step_by(step).collect();
        pts.windows(2).fold((0.0, 0.0), |(q, e), w| {
            let dt = (w[1].0 - w[0].0) / 3600.0;
            (
                q + 0.5 * (w[0].2 + w[1].2) * dt,
                e + 0.5 * (w[0].1 * w[0].2 + w[1].1 * w[1].2) * dt,
            )
        })
    }

    /// The integration rule's check in charge and energy (Richardson:
    /// |Q_h − Q_2h|/3 with Q_2h over every other sample), nothing across a
    /// break, and two stretches merged: each stretch counts its own
    /// samples, and the whole is their sum. Expectations from the samples
    /// with plain loops.
    #[test]
    fn the_rule_check_breaks_and_merges_are_the_samples() {
        let sample = |k: u32, t: f64| {
            let sign = if k.is_multiple_of(2) { 1.0 } else { -1.0 };
            (t, 3.0 + 0.001 * t * t, -2.0 + 0.001 * sign + 0.002 * t)
        };
        // Stretch A: 11 samples 2 s apart; B: 10 samples 3 s apart.
        let a: Vec<_> = (0..=10).map(|k| sample(k, 2.0 * f64::from(k))).collect();
        let b: Vec<_> = (0..10)
            .map(|j| sample(11 + j, 23.0 + 3.0 * f64::from(j)))
            .collect();
        let near = |x: f64, y: f64| (x - y).abs() <= 1e-12 * y.abs().max(1e-12);
        // One stretch.
        let mut one = MeasureAcc::default();
        a.iter().for_each(|&(t, v, i)| one.push(t, v, i));
        let m = one.finish();
        let ((qh, eh), (q2h, e2h)) = (trapezoid(&a, 1), trapezoid(&a, 2));
        assert!(near(m.integration_ah, (qh - q2h).abs() / 3.0), "{m:?}");
        assert!(near(m.integration_wh, (eh - e2h).abs() / 3.0), "{m:?}");
        assert!(m.integration_wh > 0.0);
        // A break between A and B: the 20 → 23 s interval is in nothing.
        let mut broken = MeasureAcc::default();
        a.iter().for_each(|&(t, v, i)| broken.push(t, v, i));
        broken.break_segment();
        b.iter().for_each(|&(t, v, i)| broken.push(t, v, i));
        let mb = broken.finish();
        assert!(near(mb.sum_dt2_s2, 10.0 * 4.0 + 9.0 * 9.0), "{mb:?}");
        // Merged: B's own every-other samples are its first, third, …
        // ninth; its fine sum is taken at its ninth (its last even one).
        let (mut ma, mut mbb) = (MeasureAcc::default(), MeasureAcc::default());
        a.iter().for_each(|&(t, v, i)| ma.push(t, v, i));
        b.iter().for_each(|&(t, v, i)| mbb.push(t, v, i));
        ma.merge(&mbb);
        let mm = ma.finish();
        let (qb, eb) = trapezoid(&b[..9], 1);
        let (qb2, eb2) = trapezoid(&b[..9], 2);
        assert!(
            near(mm.integration_ah, ((qh + qb) - (q2h + qb2)).abs() / 3.0),
            "{mm:?}"
        );
        assert!(
            near(mm.integration_wh, ((eh + eb) - (e2h + eb2)).abs() / 3.0),
            "{mm:?}"
        );
        assert_eq!(mm.last_dt_s, 3.0);
        assert!(near(mm.sum_dt2_s2, mb.sum_dt2_s2));
        // A stretch of one sample has no interval: the last one stands.
        let mut lone = MeasureAcc::default();
        lone.push(60.0, 3.1, -2.0);
        ma.merge(&lone);
        assert_eq!(ma.finish().last_dt_s, 3.0);
        // The noise: every difference is a plateau (≤ 1 % of 2 A): the
        // voltage's successive differences within each stretch.
        let dv2: f64 = [&a, &b]
            .iter()
            .flat_map(|x| x.windows(2).map(|w| (w[1].1 - w[0].1).powi(2)))
            .sum();
        assert!(
            near(mm.noise_v.unwrap(), (dv2 / (2.0 * 19.0)).sqrt()),
            "{mm:?}"
        );
        // And the current's: every successive difference is within the
        // plateau's 1 % (a 2 mA alternation on a 2 mA/s ramp).
        let di2: f64 = [&a, &b]
            .iter()
            .flat_map(|x| x.windows(2).map(|w| (w[1].2 - w[0].2).powi(2)))
            .sum();
        assert!(
            near(mm.noise_a.unwrap(), (di2 / (2.0 * 19.0)).sqrt()),
            "{mm:?}"
        );
    }

    /// |dV/dQ| at a step's end: the least-squares slope over the samples
    /// in its last 2 % of charge. On V = 3 + q + 5q² (q the charge, Ah,
    /// negative out) sampled evenly, a line fitted to a window has the
    /// curve's slope at the window's middle: 1 + 10·q_mid. With 1010
    /// intervals, 2 % is 20.2 intervals: the last 21 samples, middle 10
    /// intervals from the end. Two samples give no slope.
    #[test]
    fn the_end_slope_is_fitted_over_the_last_two_percent() {
        let dq = -2.0 / 3600.0;
        let mut acc = MeasureAcc::default();
        for k in 0..=1010 {
            let q = dq * f64::from(k);
            acc.push(f64::from(k), 3.0 + q + 5.0 * q * q, -2.0);
        }
        let got = acc.finish().dv_dq_v_per_ah.unwrap();
        let want = (1.0 + 10.0 * dq * 1000.0).abs();
        assert!((got - want).abs() < 1e-9, "{got} against {want}");
        let mut two = MeasureAcc::default();
        two.push(0.0, 3.0, -2.0);
        two.push(1.0, 2.9, -2.0);
        assert_eq!(two.finish().dv_dq_v_per_ah, None);
    }

    /// A meter's simulated error within ±limit: uniform, every draw inside
    /// the limit, spread over it (standard deviation limit/√3), not all at
    /// one value.
    #[test]
    fn errors_are_drawn_uniformly_within_the_limit() {
        let mut rng = SmallRng::seed_from_u64(7);
        let xs: Vec<f64> = (0..20_000).map(|_| draw_within(&mut rng, 0.5)).collect();
        assert!(xs.iter().all(|x| x.abs() <= 0.5));
        let n = xs.len() as f64;
        let mean = xs.iter().sum::<f64>() / n;
        let sd = (xs.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        // Sampling error of the mean: (0.5/√3)/√20000 = 0.002.
        assert!(mean.abs() < 0.01, "{mean}");
        assert!((sd / (0.5 / 3f64.sqrt()) - 1.0).abs() < 0.02, "{sd}");
    }

    #[test]
    fn a_resistances_budget_is_its_form() {
        let r3 = 3f64.sqrt();
        let near = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-15);
        // A resistance of 40 mΩ from ΔV = 80 mV over ΔI = 2 A: the gains,
        // each difference's resolution and noise, three repeated readings.
        let rv = Spec {
            reading_pct: 0.05,
            range_pct: 0.0,
            offset: 0.001,
            resolution: 0.0001,
            calibrated: false,
        };
        let ri = Spec {
            reading_pct: 0.1,
            range_pct: 0.0,
            offset: 0.005,
            resolution: 0.001,
            calibrated: false,
        };
        let rb = resistance_budget(
            40.0,
            -0.08,
            -2.0,
            &rv,
            &ri,
            (Some(0.0002), Some(0.001)),
            &[39.0, 40.0, 41.0],
        );
        let get = |name: &str| {
            rb.terms
                .iter()
                .find(|t| t.name == name)
                .map(|t| t.u)
                .unwrap()
        };
        assert!(near(get("voltage gain"), 40.0 * 0.0005 / r3));
        assert!(near(get("current gain"), 40.0 * 0.001 / r3));
        assert!(near(
            get("voltage difference"),
            40.0 * (1e-8f64 / 6.0 + 2.0 * 4e-8).sqrt() / 0.08
        ));
        assert!(near(
            get("current difference"),
            40.0 * (1e-6f64 / 6.0 + 2.0 * 1e-6).sqrt() / 2.0
        ));
        assert!(near(get("repeatability (Type A)"), 1.0 / 3f64.sqrt()));
        assert_eq!(
            resistance_budget(40.0, 0.0, 2.0, &rv, &ri, (None, None), &[])
                .terms
                .len(),
            2
        );
    }
}
