//! One row of the sample log, shared by the engine (which takes it), the
//! run log (which writes and reads it) and the analysis (which reads it).

use serde::{Deserialize, Serialize};

/// A sample: seconds since the run started, the plan step (1-based) and
/// cycle, pack voltage, pack current (positive into the pack) and the pack
/// temperature where a sensor is read.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Sample {
    pub t_s: f64,
    pub step: u32,
    pub cycle: u32,
    pub voltage_v: f64,
    pub current_a: f64,
    pub temperature_c: Option<f64>,
}
