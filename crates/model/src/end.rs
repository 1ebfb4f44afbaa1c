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
    /// A discharge ended when a cell group reached the per-cell cutoff
    /// (the pack's cutoff, read group by group).
    GroupVoltageBelow,
    /// A charge ended when a cell group reached the per-cell charge
    /// voltage: the pack is full as far as its highest group allows.
    GroupVoltageAbove,
}

impl EndKind {
    pub const ALL: [EndKind; 15] = [
        EndKind::VoltageAbove,
        EndKind::VoltageBelow,
        EndKind::CurrentBelow,
        EndKind::Time,
        EndKind::Charge,
        EndKind::Energy,
        EndKind::TemperatureAbove,
        EndKind::Settled,
        EndKind::PeakDrop,
        EndKind::TemperatureSettled,
        EndKind::LevelsDone,
        EndKind::Aborted,
        EndKind::Interrupted,
        EndKind::GroupVoltageBelow,
        EndKind::GroupVoltageAbove,
    ];

    /// The name records use (the serde spelling).
    pub fn name(&self) -> &'static str {
        match self {
            EndKind::VoltageAbove => "voltage_above",
            EndKind::VoltageBelow => "voltage_below",
            EndKind::CurrentBelow => "current_below",
            EndKind::Time => "time",
            EndKind::Charge => "charge",
            EndKind::Energy => "energy",
            EndKind::TemperatureAbove => "temperature_above",
            EndKind::Settled => "settled",
            EndKind::PeakDrop => "peak_drop",
            EndKind::TemperatureSettled => "temperature_settled",
            EndKind::LevelsDone => "levels_done",
            EndKind::Aborted => "aborted",
            EndKind::Interrupted => "interrupted",
            EndKind::GroupVoltageBelow => "group_voltage_below",
            EndKind::GroupVoltageAbove => "group_voltage_above",
        }
    }

    /// A discharge that ended on its cutoff: the pack's, or a group's.
    pub fn is_cutoff(&self) -> bool {
        matches!(self, EndKind::VoltageBelow | EndKind::GroupVoltageBelow)
    }

    /// The run stopped in this step (a safety stop, a fault, Ctrl-C).
    pub fn is_stop(&self) -> bool {
        matches!(self, EndKind::Aborted | EndKind::Interrupted)
    }
}

impl std::str::FromStr for EndKind {
    type Err = String;
    fn from_str(s: &str) -> Result<EndKind, String> {
        EndKind::ALL
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| format!("'{s}' is no end kind"))
    }
}

impl std::fmt::Display for EndKind {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.pad(self.name())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The names are the serde spellings on disk.
    #[test]
    fn names_are_the_recorded_spellings() {
        for k in EndKind::ALL {
            let json = serde_json::to_string(&k).unwrap();
            assert_eq!(json, format!("\"{}\"", k.name()));
            assert_eq!(serde_json::from_str::<EndKind>(&json).unwrap(), k);
            assert_eq!(k.name().parse::<EndKind>(), Ok(k));
        }
        assert!("voltage".parse::<EndKind>().is_err());
    }
}
