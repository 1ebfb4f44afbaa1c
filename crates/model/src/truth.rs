//! Ground truth from a simulated bench: the charge and energy that really
//! flowed through the pack's terminals, integrated by the simulator itself.
//! The engine records it per step (labelled as simulation truth) so tests
//! and users can compare the measured figures with it. Real benches have
//! none.

use serde::{Deserialize, Serialize};

/// Cumulative counters since the bench started; signed, positive into the pack.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct TruthCounters {
    pub charge_ah: f64,
    pub energy_wh: f64,
}

/// Something that knows the true counters at the present time.
pub trait GroundTruth: Send + Sync {
    fn counters(&self) -> TruthCounters;
}

/// Simulation truth for one step.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TruthStep {
    pub step: u32,
    pub charge_ah: f64,
    pub energy_wh: f64,
}
