//! What a pack's battery management system reported about itself, typed
//! in by the operator (or read where a station can): the figures an
//! engineer recalibrating the BMS compares with the measurement.

use serde::{Deserialize, Serialize};

/// The BMS's own figures; each optional.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct BmsReadings {
    /// The full-charge capacity the BMS has learnt, Ah.
    #[serde(default)]
    pub full_charge_capacity_ah: Option<f64>,
    /// The design (nominal) capacity the BMS holds, Ah.
    #[serde(default)]
    pub design_capacity_ah: Option<f64>,
    /// The BMS's cycle count.
    #[serde(default)]
    pub cycle_count: Option<f64>,
    /// The state of charge the BMS showed when the test started, %.
    #[serde(default)]
    pub soc_start_pct: Option<f64>,
    /// The state of charge the BMS showed when the test ended, %.
    #[serde(default)]
    pub soc_end_pct: Option<f64>,
}

impl BmsReadings {
    /// Nothing given.
    pub fn is_empty(&self) -> bool {
        *self == BmsReadings::default()
    }

    /// Each figure in its range: capacities above zero (at most 100 kAh),
    /// a cycle count from 0 to a million, states of charge 0–100 %.
    pub fn check(&self) -> Result<(), String> {
        let finite = |x: f64| x.is_finite();
        for (name, v, lo, hi) in [
            (
                "BMS full-charge capacity",
                self.full_charge_capacity_ah,
                0.0,
                1e5,
            ),
            ("BMS design capacity", self.design_capacity_ah, 0.0, 1e5),
        ] {
            if let Some(x) = v {
                if !(finite(x) && x > lo && x <= hi) {
                    return Err(format!(
                        "{name} {x} Ah: expected above 0 and at most {hi} Ah"
                    ));
                }
            }
        }
        if let Some(c) = self.cycle_count {
            if !(finite(c) && (0.0..=1e6).contains(&c)) {
                return Err(format!("BMS cycle count {c}: expected 0 to 1000000"));
            }
        }
        for (name, v) in [
            ("BMS state of charge at the start", self.soc_start_pct),
            ("BMS state of charge at the end", self.soc_end_pct),
        ] {
            if let Some(x) = v {
                if !(finite(x) && (0.0..=100.0).contains(&x)) {
                    return Err(format!("{name} {x} %: expected 0 to 100 %"));
                }
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn out_of_range_figures_are_refused_with_their_name() {
        assert!(BmsReadings::default().check().is_ok());
        assert!(BmsReadings::default().is_empty());
        let bad = [
            BmsReadings {
                full_charge_capacity_ah: Some(0.0),
                ..Default::default()
            },
            BmsReadings {
                design_capacity_ah: Some(f64::NAN),
                ..Default::default()
            },
            BmsReadings {
                cycle_count: Some(-1.0),
                ..Default::default()
            },
            BmsReadings {
                soc_start_pct: Some(101.0),
                ..Default::default()
            },
            BmsReadings {
                soc_end_pct: Some(-0.5),
                ..Default::default()
            },
        ];
        for b in bad {
            assert!(b.check().is_err(), "{b:?}");
        }
        let e = BmsReadings {
            soc_end_pct: Some(120.0),
            ..Default::default()
        }
        .check()
        .unwrap_err();
        assert!(e.contains("at the end"), "{e}");
    }
}
