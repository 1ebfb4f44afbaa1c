//! The vocabulary of a capacity test: quantities with units as written on
//! a bench, locations in input files, the pack and its spec, samples,
//! procedures (parse, validate, plan), run states, how a step ended, the
//! simulated bench's configuration and its ground-truth counters.
//!
//! Pure data and parsing: no async runtime, no instruments, no files
//! beyond reading an input the caller names.

pub mod accuracy;
pub mod bms;
pub mod end;
pub mod groups;
pub mod location;
pub mod pack;
pub mod procedure;
pub mod sample;
pub mod simconfig;
pub mod status;
pub mod truth;
pub mod units;
