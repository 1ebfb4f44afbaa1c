//! Curves of one step for plots and for incremental capacity: voltage
//! against the charge passed, and dQ/dV by voltage binning.

use crate::sample::Sample;

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
    for w in curve.windows(2) {
        let (q0, v0) = (w[0].0, key(w[0].1));
        let (q1, v1) = (w[1].0, key(w[1].1));
        if v1 <= best {
            continue;
        }
        while v1 >= next_edge - 1e-12 {
            let f = if v1 > v0 {
                ((next_edge - v0) / (v1 - v0)).clamp(0.0, 1.0)
            } else {
                1.0
            };
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
}
