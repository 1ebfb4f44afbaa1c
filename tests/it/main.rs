//! The integration tests: one binary, one shared [`util`] module.
//!
//! Modules that spawn `packbench` and signal it, or serve the simulated
//! bench on a pseudo-terminal, are Unix-only.

mod util;

mod analysis_reference;
mod analyze;
#[cfg(unix)]
mod browser;
mod characterize;
mod cli;
mod console;
#[cfg(unix)]
mod crash;
mod engine_sim;
mod envelope_matrix;
mod exchange;
mod fade;
#[cfg(unix)]
mod figures;
mod fuzz_seeds;
mod groups;
mod hostile;
mod index;
mod layers;
#[cfg(unix)]
mod links;
#[cfg(unix)]
mod locks;
mod procedures;
mod properties;
mod quick;
#[cfg(unix)]
mod serial_user;
mod sim_scpi;
mod storage;
#[cfg(unix)]
mod unattended;
mod uncertainty;
mod verdict;
