//! Capacity fade across a pack's tests, grading, and the fleet view. Fits
//! come from [`crate::fit`]; this module gathers the history and
//! decides. It never talks to instruments.

/// The end of life where nothing else is said: 80 % of the rated
/// capacity (common practice for traction and stationary packs). Every
/// screen and command that does not take one from its user takes this.
pub const END_OF_LIFE_PCT: f64 = 80.0;

/// The shop's test interval where nothing else is said: a quarter, 92
/// days (our choice).
pub const INTERVAL_DAYS: i64 = 92;

/// The default schedule: every [`INTERVAL_DAYS`].
pub fn default_schedule() -> schedule::Schedule {
    schedule::Schedule::interval(INTERVAL_DAYS)
}

pub mod fleet;
pub mod grade;
pub mod history;
pub mod schedule;
pub mod trend;
