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

pub mod analysis;
pub mod analyze_cmd;
pub mod benchfile;
pub mod cli;
pub mod clock;
pub mod demo;
pub mod dryrun;
pub mod engine;
pub mod fade;
pub mod instrument;
pub mod live;
pub mod location;
pub mod offline;
pub mod pack;
pub mod procedure;
pub mod report;
pub mod resume;
pub mod run;
pub mod runlog;
pub mod sample;
pub mod setup;
pub mod sim;
pub mod truth;
pub mod units;
