//! What reading a record can fail with.

use std::path::PathBuf;

#[derive(Debug, thiserror::Error)]
pub enum ReadError {
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error("{path}:{line}:{column}: {message}")]
    Bad {
        path: PathBuf,
        line: usize,
        column: usize,
        message: String,
    },
    /// A record written by a newer packbench than this one.
    #[error("{path}: written by a newer packbench (record version {found}; this one reads up to version {supported}): update packbench to read it")]
    Newer {
        path: PathBuf,
        found: u32,
        supported: u32,
    },
}
