//! Results leaving the bench: the central PostgreSQL store that several
//! benches sync into ([`central`]), and open export formats for other
//! tools ([`export`]). The run folders stay the record; both are copies.

pub mod central;
pub mod export;
