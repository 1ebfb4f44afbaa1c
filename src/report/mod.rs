//! Renderings of computed results for people. Presentation only: every
//! figure comes from the analysis.

pub mod text;
