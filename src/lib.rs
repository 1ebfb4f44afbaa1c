//! packbench: a battery capacity test bench controller.
//!
//! It drives a programmable DC power supply and a DC electronic load over
//! SCPI text, runs scripted charge–rest–discharge procedures inside a
//! safety envelope, logs every sample and computes measured capacity,
//! energy, efficiencies and state of health. Without hardware it runs on
//! its simulated bench, which speaks the same text protocol.
//!
//! Map (see DEVELOPERS.md):
//!
//! | module | owns |
//! |---|---|
//! | [`units`] | quantities with units as written on a bench |
//! | [`pack`] | pack id and pack spec |
//! | [`procedure`] | procedure TOML, validation, the resolved plan |
//! | [`engine`] | the step loop, envelope, safe stop, events |
//! | [`instrument`] | SCPI session, command vocabulary, profiles, drivers, links |
//! | [`sim`] | battery model and simulated instruments |
//! | [`runlog`] | run folder, CSV and event log, JSON records |
//! | [`analysis`] | capacity, energy, efficiencies, state of health |
//! | [`report`] | renderings for people |
//! | [`run`] | one test from request to record |
//! | [`cli`] | the command line |

pub mod analyze_cmd;
pub mod benchfile;
pub mod cli;
pub mod demo;
pub mod dryrun;
pub mod live;
pub mod offline;
pub mod resume;
pub mod run;
pub mod setup;
