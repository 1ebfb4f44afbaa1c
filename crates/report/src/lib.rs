//! Renderings of computed results for people. Presentation only: every
//! figure comes from the analysis or the fade module.

pub mod bms;
pub mod charts;
pub mod html;
pub mod markup;
pub mod svg;
pub mod tables;
pub mod text;

#[cfg(test)]
mod section_tests;
