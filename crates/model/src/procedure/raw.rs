//! The procedure file as written: a serde mirror of the TOML, every value
//! kept as text with its position so validation can point at it.

use serde::Deserialize;
use toml::Spanned;

pub type Text = Spanned<String>;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawProcedure {
    pub title: Text,
    pub description: Option<Text>,
    pub envelope: Option<Spanned<RawEnvelope>>,
    pub sampling: Option<Spanned<RawSampling>>,
    pub offsets: Option<Spanned<RawOffsets>>,
    #[serde(default)]
    pub phase: Vec<Spanned<RawPhase>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawEnvelope {
    pub voltage_max: Option<Text>,
    pub voltage_min: Option<Text>,
    pub current_max: Option<Text>,
    pub temperature_max: Option<Text>,
    pub temperature_min: Option<Text>,
    pub charge_max: Option<Text>,
    pub step_time_max: Option<Text>,
    pub group_voltage_max: Option<Text>,
    pub group_voltage_min: Option<Text>,
    pub temperature_rise_max: Option<Text>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawSampling {
    pub every: Option<Text>,
    /// The finer interval used when a step nears its end.
    pub fine: Option<Text>,
    /// How near a voltage end counts as near, e.g. "3%".
    pub fine_within: Option<Text>,
}

/// Zero offsets read before the run with the outputs off.
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawOffsets {
    /// Warn when an instrument reads more than this with its output off.
    pub warn_above: Option<Text>,
    /// Subtract each instrument's zero reading from its current readings.
    pub correct: Option<Spanned<bool>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawPhase {
    pub name: Text,
    pub repeat: Option<Spanned<i64>>,
    #[serde(default)]
    pub step: Vec<Spanned<RawStep>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawStep {
    pub kind: Text,
    pub name: Option<Text>,
    /// Discharge only: `current` (default), `power` or `resistance`.
    pub mode: Option<Text>,
    pub current: Option<Text>,
    pub voltage: Option<Text>,
    pub power: Option<Text>,
    pub resistance: Option<Text>,
    pub levels: Option<Spanned<Vec<Spanned<RawLevel>>>>,
    #[serde(default)]
    pub ends: Vec<Text>,
    pub result: Option<Text>,
    /// This step's sampling interval (e.g. fast sampling in a pulse).
    pub every: Option<Text>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RawLevel {
    pub current: Text,
    pub duration: Text,
}
