//! How a step ended: the machine-readable end kinds the engine records
//! and the analysis reads back.

use serde::{Deserialize, Serialize};

/// Why a step ended, machine-readable.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum EndKind {
    VoltageAbove,
    VoltageBelow,
    CurrentBelow,
    Time,
    Charge,
    Energy,
    TemperatureAbove,
    Settled,
    PeakDrop,
    /// The pack's temperature settled (`dT/dt <`).
    TemperatureSettled,
    /// A pulse step's levels are done.
    LevelsDone,
    /// The run stopped on a safety limit or instrument fault in this step.
    Aborted,
    /// The run was interrupted (Ctrl-C) in this step.
    Interrupted,
}
