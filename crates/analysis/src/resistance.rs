//! DC resistance from a current step: the two-level method of IEC 61960
//! (a lower current held, then a higher one; R = ΔU / ΔI between the ends
//! of the two levels). Levels are found in the samples themselves, so the
//! same code serves our pulse steps and any log with a current step.

use model::sample::Sample;
use serde::{Deserialize, Serialize};

/// One resistance reading.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ResistanceReading {
    pub step: u32,
    pub dcir_mohm: f64,
    pub method: String,
    /// Voltage and current at the end of the first and second level.
    pub u1_v: f64,
    pub i1_a: f64,
    pub u2_v: f64,
    pub i2_a: f64,
    /// Time of the two readings, s since the run started.
    pub t1_s: f64,
    pub t2_s: f64,
    /// State of charge at the reading, %, when the log holds a full charge
    /// before it.
    #[serde(default)]
    pub soc_pct: Option<f64>,
    #[serde(skip)]
    pub ah_since_full: Option<f64>,
}

/// How the two-level reading is made.
pub const TWO_LEVEL_METHOD: &str =
    "two-level, IEC 61960 scheme: (U1 - U2) / (I2 - I1) at the ends of the levels";

/// The IEC 61960 two-level formula in pack sign convention:
/// R = (U1 − U2) / (I1 − I2). For two discharge levels (negative currents)
/// this is the standard's (U1 − U2) / (|I2| − |I1|).
pub fn two_level_ohm(u1: f64, i1: f64, u2: f64, i2: f64) -> Option<f64> {
    let di = i1 - i2;
    (di.abs() > 1e-9).then(|| (u1 - u2) / di)
}

/// Split a step's samples into runs of (nearly) constant current: a new
/// level starts where the current moves by more than 2 % of the larger
/// magnitude plus 5 mA (common practice for level detection).
pub fn current_levels(samples: &[Sample]) -> Vec<&[Sample]> {
    let mut out = Vec::new();
    let mut start = 0;
    for k in 1..samples.len() {
        let (a, b) = (samples[k - 1].current_a, samples[k].current_a);
        if (a - b).abs() > 0.02 * a.abs().max(b.abs()) + 0.005 {
            out.push(&samples[start..k]);
            start = k;
        }
    }
    if start < samples.len() {
        out.push(&samples[start..]);
    }
    out
}

/// The two-level reading from a pulse step's first two current levels.
pub fn two_level_from_step(step: u32, samples: &[Sample]) -> Option<ResistanceReading> {
    let levels = current_levels(samples);
    let (a, b) = (levels.first()?, levels.get(1)?);
    let (e1, e2) = (a.last()?, b.last()?);
    let r = two_level_ohm(e1.voltage_v, e1.current_a, e2.voltage_v, e2.current_a)?;
    Some(ResistanceReading {
        step,
        dcir_mohm: r * 1000.0,
        method: TWO_LEVEL_METHOD.into(),
        u1_v: e1.voltage_v,
        i1_a: e1.current_a,
        u2_v: e2.voltage_v,
        i2_a: e2.current_a,
        t1_s: e1.t_s,
        t2_s: e2.t_s,
        soc_pct: None,
        ah_since_full: None,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fact_sheet_check_values() {
        // Standards fact sheet §1 [D], IEC 61960 scheme: Cn = 2.5 Ah,
        // I1 = 0.5 A, I2 = 2.5 A, U1 = 3.700 V, U2 = 3.620 V → 40 mΩ.
        let r = two_level_ohm(3.700, -0.5, 3.620, -2.5).unwrap();
        assert!((r - 0.040).abs() < 1e-12);
        // Sign guard from the same sheet: magnitudes or signed, R > 0.
        let r = two_level_ohm(3.700, 0.5, 3.620, 2.5).unwrap();
        assert!(
            (r + 0.040).abs() < 1e-12,
            "charge-sign inputs give the mirrored value"
        );
        // Forum pack example (fact sheet §1, [C-weak]): (14.8 − 13.7) / (85 − 5) = 13.75 mΩ.
        let r = two_level_ohm(14.8, -5.0, 13.7, -85.0).unwrap();
        assert!((r - 0.01375).abs() < 1e-12);
        assert!(two_level_ohm(3.7, -1.0, 3.6, -1.0).is_none());
    }

    #[test]
    fn levels_are_found_in_the_samples() {
        let mk = |t: f64, v: f64, i: f64| Sample {
            t_s: t,
            step: 3,
            cycle: 1,
            voltage_v: v,
            current_a: i,
            temperature_c: None,
        };
        let mut s = Vec::new();
        for k in 0..=10 {
            s.push(mk(k as f64, 3.70 - 0.0001 * k as f64, -0.5));
        }
        s.push(mk(10.0, 3.62, -2.5));
        s.push(mk(11.0, 3.619, -2.5));
        s.push(mk(11.0, 3.68, 0.0));
        let r = two_level_from_step(3, &s).unwrap();
        assert_eq!((r.t1_s, r.t2_s), (10.0, 11.0));
        assert!((r.dcir_mohm - (3.699 - 3.619) / 2.0 * 1000.0).abs() < 1e-9);
    }
}
