//! Fuzz target `sim_command`: the property is in `packbench::fuzz_checks::sim_command`,
//! which `cargo test` also runs on this target's seeds and regressions.
#![no_main]
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| packbench::fuzz_checks::sim_command(data));
