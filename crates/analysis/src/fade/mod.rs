//! Capacity fade across a pack's tests, grading, and the fleet view. Fits
//! come from [`crate::fit`]; this module gathers the history and
//! decides. It never talks to instruments.

pub mod fleet;
pub mod grade;
pub mod history;
pub mod schedule;
pub mod trend;
