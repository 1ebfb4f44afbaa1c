//! Settings of the simulated bench: the pack's condition, each meter's
//! error, and injected faults. Defaults describe a used pack on a decent
//! bench; `ideal = true` removes every measurement error. Readable from a
//! TOML file (`--sim-config`).

use crate::location::{toml_error, InputErrors};
use serde::{Deserialize, Serialize};
use std::path::Path;

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct SimConfig {
    /// Seed of the measurement-noise generator (runs are repeatable).
    pub seed: u64,
    /// No measurement error at all.
    pub ideal: bool,
    pub pack: PackConfig,
    pub source: InstrumentMeters,
    pub load: InstrumentMeters,
    pub temperature: MeterConfig,
    pub faults: Faults,
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct PackConfig {
    /// True capacity as a fraction of rated.
    pub capacity_factor: f64,
    /// Resistance multiplier against a new pack.
    pub resistance_factor: f64,
    /// State of charge when the bench is switched on (0..1).
    pub initial_soc: f64,
    pub ambient_c: f64,
}

impl Default for PackConfig {
    fn default() -> Self {
        PackConfig {
            capacity_factor: 0.93,
            resistance_factor: 1.25,
            initial_soc: 0.5,
            ambient_c: 25.0,
        }
    }
}

/// Error model of one reading: y = x·(1 + gain_error) + offset + noise,
/// rounded to the resolution.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct MeterConfig {
    pub gain_error_pct: f64,
    pub offset: f64,
    pub noise: f64,
    pub resolution: f64,
}

impl Default for MeterConfig {
    fn default() -> Self {
        MeterConfig {
            gain_error_pct: 0.0,
            offset: 0.0,
            noise: 0.0,
            resolution: 0.0,
        }
    }
}

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct InstrumentMeters {
    pub voltage: MeterConfig,
    pub current: MeterConfig,
}

impl Default for InstrumentMeters {
    /// A bench-grade instrument: ±0.05 % + 2 mV on voltage with 1 mV
    /// resolution, −0.1 % + 2 mA on current with 1 mA resolution (typical
    /// figures of the trade, rounded).
    fn default() -> Self {
        InstrumentMeters {
            voltage: MeterConfig {
                gain_error_pct: 0.05,
                offset: 0.002,
                noise: 0.001,
                resolution: 0.001,
            },
            current: MeterConfig {
                gain_error_pct: -0.1,
                offset: 0.002,
                noise: 0.002,
                resolution: 0.001,
            },
        }
    }
}

#[derive(Debug, Clone, PartialEq, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Faults {
    /// The supply regulates its voltage this far off its setpoint, %.
    pub source_voltage_error_pct: f64,
    /// Extra heat inside the pack (an internal fault), W, from a time on.
    pub heat_w: f64,
    pub heat_after_s: Option<f64>,
    /// The source stops answering from this time on, s.
    pub source_silent_after_s: Option<f64>,
    /// The load stops answering from this time on, s.
    pub load_silent_after_s: Option<f64>,
    /// The load's link drops at this time, s.
    pub load_disconnect_after_s: Option<f64>,
    /// The load answers measurement queries with garbage from this time on, s.
    pub load_garbage_after_s: Option<f64>,
}

impl Default for SimConfig {
    fn default() -> Self {
        SimConfig {
            seed: 1,
            ideal: false,
            pack: PackConfig::default(),
            source: InstrumentMeters::default(),
            load: InstrumentMeters::default(),
            temperature: MeterConfig {
                gain_error_pct: 0.0,
                offset: 0.2,
                noise: 0.05,
                resolution: 0.1,
            },
            faults: Faults::default(),
        }
    }
}

impl SimConfig {
    pub fn from_toml(file: &Path, text: &str) -> Result<SimConfig, InputErrors> {
        let cfg: SimConfig =
            toml::from_str(text).map_err(|e| InputErrors(vec![toml_error(file, text, &e)]))?;
        Ok(cfg)
    }

    /// An ideal bench: no measurement error.
    pub fn ideal() -> SimConfig {
        SimConfig {
            ideal: true,
            ..SimConfig::default()
        }
    }
}
