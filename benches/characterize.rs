//! Speed and memory of the pulse-power characterization: a 10-level log
//! (the DOE/INL layout: 10 s discharge at 1C, 40 s rest, 10 s charge at
//! 0.75C, C/3 for 10 % of the capacity, 1 h rest) made by a two-pair
//! Thevenin model here, read by `analysis::characterize` at three
//! sampling intervals outside the pulses (10 s, 1 s, 0.1 s: the same test,
//! logs 1×, ~9× and ~80× as long). The target: under 1 s for a 10-level
//! log, and the largest window held independent of the log's length.
//! Prints figures; asserts nothing.
//!
//! Run: cargo bench --bench characterize

use analysis::characterize::{Characterizer, Settings, SocBasis};

/// (t, v, i) rows of the synthetic test, the rests and the partial
/// discharges sampled every `slow` s, the pulses every 0.1 s.
fn log(slow: f64) -> Vec<(f64, f64, f64)> {
    let (q, r0, r1, t1, r2, t2) = (14.0, 0.045, 0.018, 30.0, 0.018, 600.0);
    let ocv = |soc: f64| 30.0 + 12.0 * soc;
    let mut rows = Vec::new();
    let (mut t, mut soc, mut v1, mut v2) = (0.0f64, 1.0f64, 0.0f64, 0.0f64);
    let mut i_prev = 0.0;
    let mut seg = |dur: f64, i: f64, dt: f64, rows: &mut Vec<(f64, f64, f64)>| {
        let n = (dur / dt).round() as usize;
        // The edge: the old current's last sample, then the new one's.
        rows.push((t, ocv(soc) + i * r0 + v1 + v2, i));
        for _ in 0..n {
            let (a1, a2) = ((-dt / t1).exp(), (-dt / t2).exp());
            v1 = v1 * a1 + i * r1 * (1.0 - a1);
            v2 = v2 * a2 + i * r2 * (1.0 - a2);
            soc += i * dt / 3600.0 / q;
            t += dt;
            rows.push((t, ocv(soc) + i * r0 + v1 + v2, i));
        }
        i_prev = i;
    };
    seg(3600.0, 0.0, slow, &mut rows);
    for _ in 0..10 {
        seg(10.0, -q, 0.1, &mut rows);
        seg(40.0, 0.0, 0.1, &mut rows);
        seg(10.0, 0.75 * q, 0.1, &mut rows);
        seg(1080.0, -q / 3.0, slow, &mut rows);
        seg(3600.0, 0.0, slow, &mut rows);
    }
    let _ = i_prev;
    rows
}

fn main() {
    println!("interval s   rows      levels   ms      peak window (samples)");
    for slow in [10.0, 1.0, 0.1] {
        let rows = log(slow);
        let t = std::time::Instant::now();
        let mut c = Characterizer::new(Settings {
            voltage_min_v: 30.0,
            voltage_max_v: 42.0,
            rest_current_a: 0.14,
            series: 10,
            rated_ah: 14.0,
        });
        for &(ts, v, i) in &rows {
            c.push(ts, v, i, None);
        }
        let peak = c.peak_window();
        let out = c.finish(
            SocBasis {
                capacity_ah: 14.0,
                source: "rated".into(),
            },
            None,
        );
        let ms = t.elapsed().as_secs_f64() * 1000.0;
        println!(
            "{slow:>10}   {:>8}  {:>6}   {ms:>6.1}  {peak}",
            rows.len(),
            out.levels.len()
        );
    }
}
