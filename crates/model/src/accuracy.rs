//! Instruments' stated accuracy: what a maker's manual gives for each
//! measured quantity on a range, ±(% of reading + % of range + an absolute
//! offset), with the resolution, the time base and a temperature sensor's
//! tolerance. Profiles declare it (`[accuracy]`), a bench file may
//! override it per instrument, and `run.json` records what a run's
//! figures were measured with ([`BenchAccuracy`]) so the uncertainty
//! budget of every result can be recomputed from the record.
//!
//! Limits with no stated confidence are read as the half-width of a
//! rectangular distribution (JCGM 100:2008 4.3.7, from memory): the
//! budget divides them by √3.

use serde::{Deserialize, Serialize};

/// One quantity's stated accuracy, in the quantity's SI unit (V or A).
#[derive(Debug, Clone, Copy, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Spec {
    /// ± % of reading (the gain term).
    pub reading_pct: f64,
    /// ± % of range (an offset term, made absolute with the range).
    pub range_pct: f64,
    /// ± absolute offset, V or A.
    pub offset: f64,
    /// The smallest step of a reading, V or A (0: not stated).
    pub resolution: f64,
    /// From a calibration: `reading_pct` and `offset` are then standard
    /// uncertainties of a normal distribution, not stated limits.
    #[serde(skip_serializing_if = "std::ops::Not::not")]
    pub calibrated: bool,
}

impl Spec {
    /// The same accuracy with its range term made absolute (`range`, V or
    /// A: the instrument's declared range, or none).
    pub fn resolved(&self, range: Option<f64>) -> Spec {
        Spec {
            reading_pct: self.reading_pct,
            range_pct: 0.0,
            offset: self.offset + self.range_pct / 100.0 * range.unwrap_or(0.0),
            resolution: self.resolution,
            calibrated: self.calibrated,
        }
    }
    /// The gain limit as a fraction (± a_g).
    pub fn gain_limit(&self) -> f64 {
        self.reading_pct.abs() / 100.0
    }
    /// The offset limit (± a_o), V or A, range term included.
    pub fn offset_limit(&self) -> f64 {
        self.offset.abs()
    }
    /// The whole limit at a reading `x`: a_g·|x| + a_o.
    pub fn limit_at(&self, x: f64) -> f64 {
        self.gain_limit() * x.abs() + self.offset_limit()
    }
    /// The gain's standard uncertainty (fraction): a stated limit over √3
    /// (rectangular), or a calibration's own u.
    pub fn gain_u(&self) -> f64 {
        if self.calibrated {
            self.gain_limit()
        } else {
            self.gain_limit() / 3f64.sqrt()
        }
    }
    /// The offset's standard uncertainty, likewise.
    pub fn offset_u(&self) -> f64 {
        if self.calibrated {
            self.offset_limit()
        } else {
            self.offset_limit() / 3f64.sqrt()
        }
    }
    /// Figures a reader can check: finite and not negative.
    pub fn check(&self, what: &str) -> Result<(), String> {
        for (name, v) in [
            ("reading_pct", self.reading_pct),
            ("range_pct", self.range_pct),
            ("offset", self.offset),
            ("resolution", self.resolution),
        ] {
            if !v.is_finite() || v < 0.0 {
                return Err(format!(
                    "{what}.{name} = {v}: expected a figure of zero or more"
                ));
            }
        }
        if self.reading_pct > 10.0 || self.range_pct > 10.0 {
            return Err(format!(
                "{what}: ±{} % of reading + {} % of range is not an instrument's accuracy (expected under 10 %)",
                self.reading_pct, self.range_pct
            ));
        }
        Ok(())
    }
}

/// What one instrument states of its own accuracy (a profile's
/// `[accuracy]` table, or a bench file's override).
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Declared {
    pub voltage: Option<Spec>,
    pub current: Option<Spec>,
    /// Time base, ± ppm.
    pub timebase_ppm: Option<f64>,
    /// A temperature input's tolerance, ± °C (sensor and input together).
    pub temperature_c: Option<f64>,
    /// The figures are examples to replace from the instrument's manual
    /// (the shipped generic profiles).
    pub example: bool,
}

impl Declared {
    /// Every figure a reader can check.
    pub fn check(&self, what: &str) -> Result<(), String> {
        if let Some(v) = &self.voltage {
            v.check(&format!("{what}.voltage"))?;
        }
        if let Some(c) = &self.current {
            c.check(&format!("{what}.current"))?;
        }
        for (name, v) in [
            ("timebase_ppm", self.timebase_ppm),
            ("temperature_c", self.temperature_c),
        ] {
            if let Some(v) = v {
                if !v.is_finite() || v < 0.0 {
                    return Err(format!(
                        "{what}.{name} = {v}: expected a figure of zero or more"
                    ));
                }
            }
        }
        Ok(())
    }

    /// This declaration with `over`'s figures in place of its own where
    /// `over` states them (a bench file's override of a profile).
    pub fn overridden_by(&self, over: &Declared) -> Declared {
        Declared {
            voltage: over.voltage.or(self.voltage),
            current: over.current.or(self.current),
            timebase_ppm: over.timebase_ppm.or(self.timebase_ppm),
            temperature_c: over.temperature_c.or(self.temperature_c),
            example: if over.voltage.is_some() || over.current.is_some() {
                over.example
            } else {
                self.example
            },
        }
    }
}

/// What a run's figures were measured with: each quantity's accuracy
/// (range terms made absolute) and where it was stated. Recorded in
/// `run.json`.
#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(default)]
pub struct BenchAccuracy {
    /// The pack voltage as logged (the meter's when the station has one).
    pub voltage: Option<Spec>,
    /// The current while charging (the source's reading).
    pub charge_current: Option<Spec>,
    /// The current while discharging (the load's reading).
    pub discharge_current: Option<Spec>,
    /// Charge and discharge currents are read by the same instrument (a
    /// source-sink): a gain error common to both cancels in an efficiency.
    pub same_current_meter: bool,
    /// The voltage is read by the same instrument both ways (a meter, a
    /// source-sink): its gain cancels in an energy efficiency.
    pub same_voltage_meter: bool,
    pub timebase_ppm: Option<f64>,
    pub temperature_c: Option<f64>,
    /// Where each figure came from, in words (a profile, a bench file's
    /// override, the simulated bench, a calibration).
    pub stated_by: Vec<String>,
    /// Some figures are a shipped profile's examples, not the
    /// instrument's own.
    pub examples: bool,
}

impl BenchAccuracy {
    /// The station's accuracy from its instruments' declarations: the
    /// source reads the charge current, the load the discharge current
    /// (one instrument for both when `shared`); the voltage from the meter
    /// when there is one, else from the load (the less accurate of source
    /// and load when they differ, as each reads one direction).
    pub fn of_station(
        source: (&str, &Declared, Option<f64>, Option<f64>),
        load: (&str, &Declared, Option<f64>, Option<f64>),
        meter: Option<(&str, &Declared, Option<f64>)>,
        shared: bool,
    ) -> BenchAccuracy {
        let (sname, sdecl, s_vrange, s_irange) = source;
        let (lname, ldecl, l_vrange, l_irange) = load;
        let mut stated_by = Vec::new();
        let mut examples = false;
        let mut note = |name: &str, d: &Declared| {
            examples |= d.example;
            stated_by.push(format!(
                "{name}{}",
                if d.example {
                    " (example figures: replace them from the instrument's manual)"
                } else {
                    ""
                }
            ));
        };
        note(sname, sdecl);
        if !shared {
            note(lname, ldecl);
        }
        let meter_v = meter.and_then(|(name, d, range)| {
            d.voltage.map(|v| {
                note(name, d);
                v.resolved(range)
            })
        });
        let sv = sdecl.voltage.map(|v| v.resolved(s_vrange));
        let lv = ldecl.voltage.map(|v| v.resolved(l_vrange));
        let worse = |a: Option<Spec>, b: Option<Spec>| match (a, b) {
            (Some(a), Some(b)) => Some(Spec {
                reading_pct: a.reading_pct.max(b.reading_pct),
                range_pct: 0.0,
                offset: a.offset.max(b.offset),
                resolution: a.resolution.max(b.resolution),
                calibrated: false,
            }),
            (a, b) => a.or(b),
        };
        let voltage = meter_v.or_else(|| if shared { sv } else { worse(sv, lv) });
        let timebase = meter
            .and_then(|(_, d, _)| d.timebase_ppm)
            .or(sdecl.timebase_ppm)
            .or(ldecl.timebase_ppm);
        let temperature = meter
            .and_then(|(_, d, _)| d.temperature_c)
            .or(ldecl.temperature_c)
            .or(sdecl.temperature_c);
        BenchAccuracy {
            voltage,
            charge_current: sdecl.current.map(|c| c.resolved(s_irange)),
            discharge_current: if shared {
                sdecl.current.map(|c| c.resolved(s_irange))
            } else {
                ldecl.current.map(|c| c.resolved(l_irange))
            },
            same_current_meter: shared,
            same_voltage_meter: shared || meter_v.is_some(),
            timebase_ppm: timebase,
            temperature_c: temperature,
            stated_by,
            examples,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_range_term_is_made_absolute() {
        let s = Spec {
            reading_pct: 0.1,
            range_pct: 0.05,
            offset: 0.002,
            resolution: 0.001,
            calibrated: false,
        };
        let r = s.resolved(Some(60.0));
        // 0.05 % of 60 A = 30 mA, plus 2 mA.
        assert!((r.offset_limit() - 0.032).abs() < 1e-12);
        assert!((r.limit_at(-2.0) - (0.002 + 0.032)).abs() < 1e-12);
        assert!(s.check("x").is_ok());
        let bad = Spec {
            reading_pct: -0.1,
            ..s
        };
        assert!(bad
            .check("current")
            .unwrap_err()
            .contains("current.reading_pct"));
    }

    #[test]
    fn a_station_takes_each_direction_from_its_instrument() {
        let src = Declared {
            current: Some(Spec {
                reading_pct: 0.2,
                ..Spec::default()
            }),
            voltage: Some(Spec {
                reading_pct: 0.05,
                ..Spec::default()
            }),
            ..Declared::default()
        };
        let load = Declared {
            current: Some(Spec {
                reading_pct: 0.1,
                ..Spec::default()
            }),
            voltage: Some(Spec {
                reading_pct: 0.08,
                ..Spec::default()
            }),
            example: true,
            ..Declared::default()
        };
        let a = BenchAccuracy::of_station(
            ("source", &src, None, None),
            ("load", &load, None, None),
            None,
            false,
        );
        assert_eq!(a.charge_current.map(|c| c.reading_pct), Some(0.2));
        assert_eq!(a.discharge_current.map(|c| c.reading_pct), Some(0.1));
        // No meter: the worse of the two voltmeters.
        assert_eq!(a.voltage.map(|c| c.reading_pct), Some(0.08));
        assert!(!a.same_current_meter && !a.same_voltage_meter && a.examples);
    }

    /// A simulated meter applies errors within what it states; one
    /// outside is refused.
    #[test]
    fn a_simulated_meter_applies_errors_within_its_stated_accuracy() {
        let mut cfg = crate::simconfig::SimConfig::default();
        assert!(cfg.check_meters().is_ok());
        let [_, load, _] = cfg.declared();
        assert_eq!(load.current.map(|c| c.reading_pct), Some(0.2));
        cfg.load.current.gain_error_pct = 0.3;
        let e = cfg.check_meters().unwrap_err();
        assert!(e.contains("load.current") && e.contains("outside"), "{e}");
    }
}
