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

/// " ± 0.030 Ah (k = 2, 95 %)" after a figure, or nothing without a budget
/// (every screen prints the verdict's own budget).
pub use record::budget::pm;

#[cfg(test)]
mod render_tests;
