//! Curves of one step for plots and for incremental capacity: voltage
//! against the charge passed (streamed onto a fixed charge grid, so memory
//! does not grow with the step's length), dQ/dV by voltage binning and
//! dV/dQ by charge binning, Gaussian smoothing and peak finding, and the
//! open-circuit-voltage table from a slow charge and discharge.

use model::sample::Sample;
use serde::{Deserialize, Serialize};

/// (charge passed so far in Ah, voltage) along a step, charge as a
/// magnitude from the step's start (trapezoid, as everywhere else).
pub fn charge_curve(samples: &[Sample]) -> Vec<(f64, f64)> {
    let mut out = Vec::with_capacity(samples.len());
    let mut q = 0.0;
    let mut last: Option<&Sample> = None;
    for s in samples {
        if let Some(p) = last {
            q += ((p.current_a + s.current_a) * 0.5 * (s.t_s - p.t_s) / 3600.0).abs();
        }
        out.push((q, s.voltage_v));
        last = Some(s);
    }
    out
}

/// Incremental capacity dQ/dV (Ah/V) by voltage binning: the charge passed
/// while the voltage crosses each bin of width `bin_v`, over the bin
/// width. Bins are aligned to multiples of `bin_v`; a bin the curve did not
/// fully cross is left out. Binning rather than differentiating sample to
/// sample keeps noise from being amplified (Dubarry & Anseán 2022; fact
/// sheet §9). Returns (bin centre V, dQ/dV).
pub fn incremental_capacity(curve: &[(f64, f64)], bin_v: f64) -> Vec<(f64, f64)> {
    if curve.len() < 2 || bin_v <= 0.0 {
        return Vec::new();
    }
    // Charge at which the (monotone-ised) voltage first reaches each edge.
    let falling = curve[curve.len() - 1].1 < curve[0].1;
    let key = |v: f64| if falling { -v } else { v };
    let mut edges: Vec<(f64, f64)> = Vec::new(); // (edge voltage, charge)
    let mut best = key(curve[0].1);
    let mut next_edge = ((best / bin_v).floor() + 1.0) * bin_v;
    'walk: for w in curve.windows(2) {
        let (q0, v0) = (w[0].0, key(w[0].1));
        let (q1, v1) = (w[1].0, key(w[1].1));
        if v1 <= best {
            continue;
        }
        while v1 >= next_edge - 1e-12 {
            if edges.len() >= MAX_BINS {
                // Bounded by a fixed count, never by the values: a log
                // whose voltage leaps by kilovolts gives no more work.
                break 'walk;
            }
            // (v0 ≤ best < v1: the step rises.)
            let f = ((next_edge - v0) / (v1 - v0)).clamp(0.0, 1.0);
            edges.push((next_edge, q0 + f * (q1 - q0)));
            next_edge += bin_v;
        }
        best = v1;
    }
    edges
        .windows(2)
        .map(|e| {
            let centre = 0.5 * (e[0].0 + e[1].0);
            let dq = e[1].1 - e[0].1;
            (if falling { -centre } else { centre }, dq / bin_v)
        })
        .collect()
}

/// Voltage at fixed increments of the charge passed along a step, built
/// sample by sample (trapezoid charge, linear interpolation of voltage).
#[derive(Debug, Clone, PartialEq)]
pub struct ChargeGrid {
    pub step_ah: f64,
    q: f64,
    last: Option<(f64, f64, f64)>,
    next: f64,
    /// (charge passed, Ah; voltage, V), the first at 0 Ah.
    pub points: Vec<(f64, f64)>,
    max_points: usize,
    /// The end of the step (charge passed, last voltage).
    pub end: Option<(f64, f64)>,
}

impl ChargeGrid {
    pub fn new(step_ah: f64, max_points: usize) -> ChargeGrid {
        ChargeGrid {
            step_ah,
            q: 0.0,
            last: None,
            next: step_ah,
            points: Vec::new(),
            max_points,
            end: None,
        }
    }

    /// Start again for a new step, keeping the allocation.
    pub fn reset(&mut self) {
        self.q = 0.0;
        self.last = None;
        self.next = self.step_ah;
        self.points.clear();
        self.end = None;
    }

    /// Nothing is integrated from the last sample to the next (a run
    /// resumed after an interruption): the grid goes on from its count.
    pub fn break_segment(&mut self) {
        self.last = None;
    }

    pub fn push(&mut self, t: f64, v: f64, i: f64) {
        match self.last {
            None if !self.points.is_empty() => {}
            None => self.points.push((0.0, v)),
            Some((t0, v0, i0)) => {
                let dq = ((i0 + i) * 0.5 * (t - t0) / 3600.0).abs();
                if dq > 0.0 {
                    let q1 = self.q + dq;
                    while self.next <= q1 && self.points.len() < self.max_points {
                        let f = (self.next - self.q) / dq;
                        self.points.push((self.next, v0 + f * (v - v0)));
                        self.next += self.step_ah;
                    }
                    self.q = q1;
                }
            }
        }
        self.last = Some((t, v, i));
        self.end = Some((self.q, v));
    }

    /// The curve: grid points and the end point.
    pub fn curve(&self) -> Vec<(f64, f64)> {
        let mut c = self.points.clone();
        if let Some((q, v)) = self.end {
            if c.last().is_none_or(|p| q > p.0 + 1e-12) {
                c.push((q, v));
            }
        }
        c
    }

    /// Voltage at charge `q` (linear between grid points).
    pub fn voltage_at(&self, q: f64) -> Option<f64> {
        voltage_on(&self.curve(), q)
    }
}

/// Voltage at charge `q` on a curve of (charge, voltage) points in charge
/// order (linear between points).
fn voltage_on(c: &[(f64, f64)], q: f64) -> Option<f64> {
    if c.is_empty() || q < 0.0 || q > c[c.len() - 1].0 + 1e-12 {
        return None;
    }
    let k = c.partition_point(|p| p.0 < q);
    if k == 0 {
        return Some(c[0].1);
    }
    if k >= c.len() {
        return Some(c[c.len() - 1].1);
    }
    // (a.0 < q ≤ b.0: the interval has a width.)
    let (a, b) = (c[k - 1], c[k]);
    let f = (q - a.0) / (b.0 - a.0);
    Some(a.1 + f * (b.1 - a.1))
}

/// dV/dQ (V/Ah, magnitude) by charge binning of width `bin_ah` on a
/// voltage–charge curve: (bin centre Ah, |ΔV|/ΔQ).
///
/// At most [`MAX_BINS`] bins: the work is bounded by a fixed count,
/// never by the values (a log whose time leaps by years makes one huge
/// charge, not a billion bins).
pub fn differential_voltage(grid: &ChargeGrid, bin_ah: f64) -> Vec<(f64, f64)> {
    let c = grid.curve();
    let Some(&(qmax, _)) = c.last() else {
        return Vec::new();
    };
    if bin_ah.partial_cmp(&0.0) != Some(std::cmp::Ordering::Greater) || !qmax.is_finite() {
        return Vec::new();
    }
    let mut out = Vec::new();
    let mut k = 0usize;
    while out.len() < MAX_BINS {
        let q = k as f64 * bin_ah;
        if q + bin_ah > qmax + 1e-12 {
            break;
        }
        if let (Some(a), Some(b)) = (voltage_on(&c, q), voltage_on(&c, q + bin_ah)) {
            out.push((q + bin_ah * 0.5, (b - a).abs() / bin_ah));
        }
        k += 1;
    }
    out
}

/// The most bins a differential curve has (a grid holds
/// [`GRID_MAX_POINTS`] points; bins finer than its points add nothing).
pub const MAX_BINS: usize = 10_000;

/// Gaussian smoothing of equally spaced values, as
/// `scipy.ndimage.gaussian_filter1d(y, sigma, mode="nearest", truncate=4.0)`.
pub fn gaussian_smooth(y: &[f64], sigma: f64) -> Vec<f64> {
    if sigma <= 0.0 || y.is_empty() {
        return y.to_vec();
    }
    let r = (4.0 * sigma + 0.5) as i64;
    let w: Vec<f64> = (-r..=r)
        .map(|k| (-0.5 * (k as f64 / sigma).powi(2)).exp())
        .collect();
    let total: f64 = w.iter().sum();
    let n = y.len() as i64;
    (0..n)
        .map(|i| {
            let mut acc = 0.0;
            for (j, wk) in w.iter().enumerate() {
                let idx = (i + j as i64 - r).clamp(0, n - 1) as usize;
                acc += wk * y[idx];
            }
            acc / total
        })
        .collect()
}

/// A peak of a curve.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Peak {
    pub index: usize,
    pub height: f64,
    /// As `scipy.signal.peak_prominences` defines it.
    pub prominence: f64,
}

/// Local maxima (plateaus take their middle sample) with their
/// prominence, as `scipy.signal.find_peaks` finds them; those with a
/// prominence of at least `min_prominence` are kept.
pub fn find_peaks(y: &[f64], min_prominence: f64) -> Vec<Peak> {
    let n = y.len();
    let mut out = Vec::new();
    let mut i = 1;
    while i + 1 < n {
        if y[i - 1] < y[i] {
            let mut ahead = i + 1;
            while ahead < n - 1 && y[ahead] == y[i] {
                ahead += 1;
            }
            if y[ahead] < y[i] {
                let mid = (i + ahead - 1) / 2;
                // Prominence: down to the higher of the two lowest points
                // reached before a higher sample (or the end) on each side.
                let mut left_min = y[mid];
                let mut k = mid;
                while k > 0 {
                    k -= 1;
                    if y[k] > y[mid] {
                        break;
                    }
                    left_min = left_min.min(y[k]);
                }
                let mut right_min = y[mid];
                let mut k = mid;
                while k + 1 < n {
                    k += 1;
                    if y[k] > y[mid] {
                        break;
                    }
                    right_min = right_min.min(y[k]);
                }
                let prominence = y[mid] - left_min.max(right_min);
                if prominence >= min_prominence {
                    out.push(Peak {
                        index: mid,
                        height: y[mid],
                        prominence,
                    });
                }
                i = ahead;
            }
        }
        i += 1;
    }
    out
}

/// The grid a step's samples make (0.1 % of the rated capacity per
/// point, as the streaming analysis builds it).
pub fn grid_of(samples: &[Sample], rated_ah: f64) -> ChargeGrid {
    let mut g = ChargeGrid::new(GRID_FRACTION * rated_ah, GRID_MAX_POINTS);
    for s in samples {
        g.push(s.t_s, s.voltage_v, s.current_a);
    }
    g
}

/// Charge grid resolution: a fraction of the rated capacity, and the most
/// points a grid holds (three times the rated capacity).
pub const GRID_FRACTION: f64 = 0.001;
pub const GRID_MAX_POINTS: usize = 3001;

/// A differential curve: bins (x, y), the smoothed y, and its main peaks
/// (at most three by height, in x order, each at least 5 % of the highest
/// smoothed value in prominence).
#[derive(Debug, Clone, PartialEq)]
pub struct Differential {
    pub points: Vec<(f64, f64)>,
    pub smoothed: Vec<f64>,
    pub peaks: Vec<Peak>,
}

fn differential(points: Vec<(f64, f64)>, sigma: f64) -> Differential {
    let ys: Vec<f64> = points.iter().map(|p| p.1).collect();
    let smoothed = gaussian_smooth(&ys, sigma);
    let top = smoothed.iter().cloned().fold(0.0, f64::max);
    let mut peaks = find_peaks(&smoothed, 0.05 * top);
    peaks.sort_by(|a, b| b.height.total_cmp(&a.height));
    peaks.truncate(3);
    peaks.sort_by_key(|p| p.index);
    Differential {
        points,
        smoothed,
        peaks,
    }
}

/// dQ/dV of a step's grid: voltage bins of `bin_v`, smoothed with `sigma` bins.
pub fn ica(grid: &ChargeGrid, bin_v: f64, sigma: f64) -> Differential {
    differential(incremental_capacity(&grid.curve(), bin_v), sigma)
}

/// dV/dQ of a step's grid: charge bins of `bin_ah`, smoothed with `sigma` bins.
pub fn dva(grid: &ChargeGrid, bin_ah: f64, sigma: f64) -> Differential {
    differential(differential_voltage(grid, bin_ah), sigma)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn linear_plateau_gives_a_flat_incremental_capacity() {
        // Fact sheet §9 check value [D]: V(Q) = 3.30 V + 0.05 V·(Q/1 Ah) over
        // 0–2 Ah has dQ/dV = 20 Ah/V; 5 mV bins must give 20 in every bin.
        let curve: Vec<(f64, f64)> = (0..=2000)
            .map(|k| {
                let q = k as f64 / 1000.0;
                (q, 3.30 + 0.05 * q)
            })
            .collect();
        let ica = incremental_capacity(&curve, 0.005);
        assert!(ica.len() >= 18, "{}", ica.len());
        for (v, d) in &ica {
            assert!((d - 20.0).abs() < 1e-6, "bin {v}: {d}");
        }
        // Falling voltage (a discharge) gives the same magnitude.
        let down: Vec<(f64, f64)> = curve.iter().map(|(q, v)| (*q, 3.40 - (v - 3.30))).collect();
        let ica = incremental_capacity(&down, 0.005);
        assert!(ica.iter().all(|(_, d)| (d - 20.0).abs() < 1e-6));
    }

    #[test]
    fn two_plateaus_give_two_levels() {
        // Piecewise-linear: 1 Ah over 0.1 V, then 1 Ah over 0.01 V... here
        // slope 0.1 V/Ah then 0.02 V/Ah → 10 and 50 Ah/V.
        let mut curve = Vec::new();
        for k in 0..=1000 {
            let q = k as f64 / 1000.0;
            curve.push((q, 3.0 + 0.1 * q));
        }
        for k in 1..=1000 {
            let q = 1.0 + k as f64 / 1000.0;
            curve.push((q, 3.1 + 0.02 * (q - 1.0)));
        }
        let ica = incremental_capacity(&curve, 0.002);
        let low: Vec<f64> = ica
            .iter()
            .filter(|(v, _)| *v < 3.095)
            .map(|p| p.1)
            .collect();
        let high: Vec<f64> = ica
            .iter()
            .filter(|(v, _)| *v > 3.102)
            .map(|p| p.1)
            .collect();
        assert!(low.iter().all(|d| (d - 10.0).abs() < 1e-6));
        assert!(high.iter().all(|d| (d - 50.0).abs() < 1e-6));
    }

    #[test]
    fn the_charge_grid_follows_the_curve() {
        // 1 A for 3600 s with V = 3.0 + 0.1·Q: the grid at 0.01 Ah holds
        // V exactly (linear), and ends at 1 Ah.
        let mut g = ChargeGrid::new(0.01, 10_000);
        for k in 0..=3600 {
            let q = k as f64 / 3600.0;
            g.push(k as f64, 3.0 + 0.1 * q, -1.0);
        }
        let c = g.curve();
        assert_eq!(c.len(), 101, "{}", c.len());
        for (q, v) in &c {
            assert!((v - (3.0 + 0.1 * q)).abs() < 1e-9);
        }
        assert!((g.voltage_at(0.505).unwrap() - 3.0505).abs() < 1e-9);
        let dva = differential_voltage(&g, 0.05);
        assert_eq!(dva.len(), 20);
        assert!(dva.iter().all(|(_, d)| (d - 0.1).abs() < 1e-9));
    }

    /// Against SciPy 1.17.1 on one vector with a plateau, a shoulder and
    /// a peak at the end's edge: `gaussian_filter1d(y, 1.5,
    /// mode="nearest", truncate=4.0)` to 1e-12, and `find_peaks(y)` with
    /// `peak_prominences`: peaks at 2, 6 (a plateau's middle), 10, 12, 15
    /// with prominences 1, 5, 0.5, 6, 0.5.
    #[test]
    fn smoothing_and_peaks_agree_with_scipy() {
        let y = [
            0.0, 1.0, 3.0, 2.0, 2.0, 5.0, 5.0, 5.0, 1.0, 0.0, 4.0, 3.5, 6.0, 2.0, 0.5, 1.0, 0.0,
        ];
        let want = [
            0.633_761_642_185_928_5,
            1.239_111_988_077_967_7,
            1.878_666_662_346_694_3,
            2.471_800_154_718_262_6,
            3.121_350_988_706_755,
            3.741_982_064_866_258_3,
            3.917_852_818_684_52,
            3.421_605_564_797_823,
            2.686_028_710_743_195_3,
            2.446_195_428_691_008_4,
            2.874_725_373_446_835_4,
            3.384_395_558_975_365_6,
            3.308_321_075_779_186_8,
            2.553_704_431_394_731_2,
            1.584_390_812_064_284_4,
            0.837_800_153_786_956_8,
            0.389_166_797_650_146_3,
        ];
        let got = gaussian_smooth(&y, 1.5);
        for (k, (g, w)) in got.iter().zip(want).enumerate() {
            assert!((g - w).abs() < 1e-12, "{k}: {g} against {w}");
        }
        assert_eq!(gaussian_smooth(&y, 0.0), y.to_vec());
        let p = find_peaks(&y, 0.0);
        assert_eq!(
            p.iter().map(|p| p.index).collect::<Vec<_>>(),
            [2, 6, 10, 12, 15]
        );
        assert_eq!(
            p.iter().map(|p| p.prominence).collect::<Vec<_>>(),
            [1.0, 5.0, 0.5, 6.0, 0.5]
        );
        assert_eq!(p[3].height, 6.0);
        // A prominence floor keeps the big ones.
        assert_eq!(
            find_peaks(&y, 1.0)
                .iter()
                .map(|p| p.index)
                .collect::<Vec<_>>(),
            [2, 6, 12]
        );
    }

    /// A grid by hand: 1 A for 36 s (10 mAh) at a voltage rising 0.1 V a
    /// second, on a 2.5 mAh grid: points every 9 s (3.0, 3.9, 4.8, 5.7,
    /// 6.6 V at 0 … 10 mAh), then dV/dQ is 0.1 V per 1/3600 Ah = 360 V/Ah
    /// in every bin, and dQ/dV over 0.5 V bins is 1/360 Ah/V.
    #[test]
    fn a_grid_and_its_differentials_by_hand() {
        let mut g = ChargeGrid::new(0.0025, 100);
        for k in 0..=36 {
            g.push(f64::from(k), 3.0 + 0.1 * f64::from(k), 1.0);
        }
        let c = g.curve();
        let qs: Vec<f64> = c.iter().map(|p| (p.0 * 1e6).round() / 1e6).collect();
        assert_eq!(qs, [0.0, 0.0025, 0.005, 0.0075, 0.01]);
        for (p, v) in c.iter().zip([3.0, 3.9, 4.8, 5.7, 6.6]) {
            assert!((p.1 - v).abs() < 1e-9, "{c:?}");
        }
        assert!((g.voltage_at(0.00125).unwrap() - 3.45).abs() < 1e-9);
        assert_eq!(g.voltage_at(0.02), None);
        assert_eq!(g.voltage_at(-0.001), None);
        let d = differential_voltage(&g, 0.0025);
        assert_eq!(d.len(), 4);
        for (x, y) in &d {
            assert!((y - 360.0).abs() < 1e-6, "{d:?}");
            assert!(x > &0.0);
        }
        assert!((d[0].0 - 0.00125).abs() < 1e-12);
        // Edges at whole half volts the curve crosses after its start: 3.5
        // … 6.5 V, six bins.
        let ic = incremental_capacity(&c, 0.5);
        assert_eq!(ic.len(), 6, "{ic:?}");
        for (v, dq) in &ic {
            assert!((dq - 1.0 / 360.0).abs() < 1e-9, "{ic:?}");
            assert!(
                (v * 4.0).fract().abs() < 1e-9,
                "bin centres at quarter volts: {v}"
            );
        }
        // A falling curve gives its bins in falling voltage, positive dQ/dV.
        let fall: Vec<(f64, f64)> = c.iter().map(|&(q, v)| (q, 9.6 - v)).collect();
        // (From 6.6 down: edges 6.5 … 3.0 V, the last reached at the end.)
        let id = incremental_capacity(&fall, 0.5);
        assert_eq!(id.len(), 7, "{id:?}");
        assert!(
            id.windows(2).all(|w| w[1].0 < w[0].0) && id.iter().all(|p| p.1 > 0.0),
            "{id:?}"
        );
        // The grid stops at its most points; a reset starts again.
        let mut small = ChargeGrid::new(0.0025, 3);
        for k in 0..=36 {
            small.push(f64::from(k), 3.0, 1.0);
        }
        assert_eq!(small.points.len(), 3);
        assert_eq!(
            small.curve().last().map(|p| (p.0 * 1e6).round()),
            Some(10_000.0)
        );
        small.reset();
        assert!(small.points.is_empty() && small.end.is_none());
        // A break: nothing counted across it.
        let mut b = ChargeGrid::new(0.0025, 100);
        b.push(0.0, 3.0, 1.0);
        b.push(9.0, 3.0, 1.0);
        b.break_segment();
        b.push(100.0, 3.0, 1.0);
        b.push(109.0, 3.0, 1.0);
        assert!((b.end.unwrap().0 - 0.005).abs() < 1e-12);
        assert!(charge_curve(&[]).is_empty());
        assert!(incremental_capacity(&c, 0.0).is_empty());
        assert!(differential_voltage(&g, 0.0).is_empty());
    }

    /// The charge curve by hand: 2 A then 4 A a second apart, as
    /// magnitudes from the step's start (trapezoid): 0, 3/3600, 7/3600 Ah.
    #[test]
    fn a_charge_curve_by_hand() {
        let s = |t: f64, v: f64, i: f64| Sample {
            t_s: t,
            step: 1,
            cycle: 0,
            voltage_v: v,
            current_a: i,
            temperature_c: None,
        };
        let c = charge_curve(&[s(0.0, 4.0, -2.0), s(1.0, 3.9, -4.0), s(2.0, 3.8, -4.0)]);
        assert_eq!(c.len(), 3);
        assert!(
            (c[1].0 - 3.0 / 3600.0).abs() < 1e-15 && (c[2].0 - 7.0 / 3600.0).abs() < 1e-15,
            "{c:?}"
        );
        assert_eq!(c[2].1, 3.8);
    }

    /// Nothing to bin: one point, or a bin of no width or less.
    #[test]
    fn no_incremental_capacity_from_one_point_or_no_bin() {
        assert!(incremental_capacity(&[(0.0, 3.7)], 0.01).is_empty());
        let line = [(0.0, 3.6), (1.0, 3.8), (2.0, 4.0)];
        assert!(incremental_capacity(&line, 0.0).is_empty());
        assert!(incremental_capacity(&line, -0.01).is_empty());
        assert!(!incremental_capacity(&line, 0.01).is_empty());
    }

    /// A rise to a plateau at the end is no peak (as
    /// `scipy.signal.find_peaks([0, 1, 2, 2, 2])` finds none); a plateau
    /// inside is one, at its middle sample.
    #[test]
    fn a_plateau_at_the_end_is_no_peak() {
        assert!(find_peaks(&[0.0, 1.0, 2.0, 2.0, 2.0], 0.0).is_empty());
        let p = find_peaks(&[0.0, 1.0, 2.0, 2.0, 2.0, 1.0], 0.0);
        assert_eq!(p.len(), 1);
        assert_eq!(p[0].index, 3);
    }

    /// A step's grid has a point every 0.1 % of the rated capacity: a
    /// 10 Ah pack discharged 1 Ah at 1 A (sampled each second) has points
    /// every 10 mAh, 101 of them, and the end.
    #[test]
    fn a_steps_grid_has_a_point_every_tenth_of_a_percent_of_rated() {
        let samples: Vec<Sample> = (0..=3600)
            .map(|k| Sample {
                t_s: f64::from(k),
                step: 1,
                cycle: 0,
                voltage_v: 4.0 - 1e-4 * f64::from(k),
                current_a: -1.0,
                temperature_c: None,
            })
            .collect();
        let g = grid_of(&samples, 10.0);
        let c = g.curve();
        assert_eq!(c.len(), 101, "{:?}", &c[..3]);
        for (k, &(q, v)) in c.iter().enumerate() {
            let q_want = 0.01 * k as f64;
            assert!((q - q_want).abs() < 1e-9, "{k}: {q}");
            // 1 Ah an hour: the voltage at q is that of second 3600·q.
            assert!(
                (v - (4.0 - 1e-4 * 3600.0 * q_want)).abs() < 1e-9,
                "{k}: {v}"
            );
        }
    }

    /// After a break (a resumed run) the grid goes on from its count: no
    /// second point at zero charge, and the charge across the break is not
    /// counted.
    #[test]
    fn a_grid_goes_on_from_its_count_after_a_break() {
        let mut g = ChargeGrid::new(0.1, 100);
        for k in 0..=360 {
            g.push(f64::from(k), 4.0 - 0.001 * f64::from(k), 1.0);
        }
        g.break_segment();
        for k in 1000..=1360 {
            g.push(f64::from(k), 3.6 - 0.001 * f64::from(k - 1000), 1.0);
        }
        let c = g.curve();
        let zeros = c.iter().filter(|p| p.0 == 0.0).count();
        assert_eq!(zeros, 1, "{c:?}");
        // 0.1 Ah before, 0.1 Ah after: points at 0, 0.1 and 0.2 Ah.
        assert_eq!(c.len(), 3, "{c:?}");
        assert!(
            (c[2].0 - 0.2).abs() < 1e-12 && (c[2].1 - 3.24).abs() < 1e-9,
            "{c:?}"
        );
    }

    /// dV/dQ has at most its bound of bins, however fine the bins asked.
    #[test]
    fn dv_dq_bins_are_bounded() {
        let mut g = ChargeGrid::new(1e-4, GRID_MAX_POINTS);
        for k in 0..=3600 {
            g.push(f64::from(k), 4.0 - 1e-4 * f64::from(k), 1.0);
        }
        assert_eq!(differential_voltage(&g, 1e-5).len(), MAX_BINS);
    }
}
