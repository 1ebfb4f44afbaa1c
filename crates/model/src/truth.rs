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
    /// For a pack built of groups: the charge each group would still give
    /// at the present current before its own voltage fell to `cutoff_v`
    /// (empty for a lumped pack, or when nothing is being drawn).
    fn groups_to_cutoff(&self, _cutoff_v: f64) -> Vec<f64> {
        Vec::new()
    }
    /// The model's own state and parameters now (a lumped simulated pack;
    /// none elsewhere).
    fn model_state(&self) -> Option<ModelState> {
        None
    }
}

/// A simulated pack's equivalent circuit as it stands at a moment: the
/// parameters it really runs with (its temperature and ageing applied),
/// whole pack. Simulation truth, for checking a characterization against
/// what the simulator is.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct ModelState {
    /// State of charge as a fraction of the model's true capacity.
    pub soc: f64,
    pub temperature_c: f64,
    /// Open-circuit voltage of the pack at that state of charge, V.
    pub ocv_v: f64,
    /// Series resistance, Ω.
    pub r0_ohm: f64,
    /// First RC pair: resistance, Ω, and time constant, s.
    pub r1_ohm: f64,
    pub tau1_s: f64,
    /// Second RC pair.
    pub r2_ohm: f64,
    pub tau2_s: f64,
    /// The RC pairs' voltages now, V (zero when relaxed).
    pub v1_v: f64,
    pub v2_v: f64,
}

/// Simulation truth for one step.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TruthStep {
    pub step: u32,
    pub charge_ah: f64,
    pub energy_wh: f64,
    /// A discharge of a pack built of groups: the charge each group gives
    /// from the step's start to its own cutoff (the one that ended the
    /// step reached it; the others are run on in the model), Ah.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub groups_to_cutoff_ah: Vec<f64>,
    /// The model's state and parameters as the step started (a lumped
    /// simulated pack).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub model_at_start: Option<ModelState>,
}
