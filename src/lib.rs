//! packbench: a battery capacity test bench controller.
//!
//! It drives a programmable DC power supply and a DC electronic load over
//! SCPI text, runs scripted charge–rest–discharge procedures inside a
//! safety envelope, logs every sample and computes measured capacity,
//! energy, efficiencies and state of health. Without hardware it runs on
//! its simulated bench, which speaks the same text protocol.
//!
//! This crate is the program on top of the workspace's layers (see
//! DEVELOPERS.md): [`session`] takes one test from request to record,
//! [`console`] is the web console over several bays, and [`cli`] is the
//! command line. The layers below are their own crates:
//! `model`, `instrument`, `analysis`, `record`, `engine`, `sim`, `report`.

pub mod cli;
pub mod console;
pub mod fuzz_checks;
pub mod session;
