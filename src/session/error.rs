//! What can stop a session: bad input (exit 2) or a failure while running (exit 1).

use instrument::InstrumentError;
use model::location::InputErrors;
use model::pack::PackIdError;
use record::read::ReadError;
use std::path::{Path, PathBuf};

/// Everything that can go wrong in a run request.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error(transparent)]
    Input(#[from] InputErrors),
    #[error(transparent)]
    PackId(#[from] PackIdError),
    #[error("{0}")]
    Pack(String),
    /// A file the user named (a procedure, a pack spec, a run folder's
    /// record) could not be read: bad input.
    #[error("{path}: {error}")]
    InputFile {
        path: PathBuf,
        error: std::io::Error,
    },
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    /// (Said with its cause in one line; not chained again as a source.)
    #[error("instrument: {0}")]
    Instrument(InstrumentError),
    #[error(transparent)]
    Read(#[from] ReadError),
}

impl From<InstrumentError> for RunError {
    fn from(e: InstrumentError) -> Self {
        RunError::Instrument(e)
    }
}

impl RunError {
    /// Bad input (exit code 2) as opposed to a failure while running.
    pub fn is_input(&self) -> bool {
        matches!(
            self,
            RunError::Input(_)
                | RunError::PackId(_)
                | RunError::Pack(_)
                | RunError::InputFile { .. }
                | RunError::Read(_)
        )
    }
}

pub fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |source| RunError::Io {
        path: path.to_path_buf(),
        error: source,
    }
}

/// A file the user named could not be read.
pub fn input_file_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |error| RunError::InputFile {
        path: path.to_path_buf(),
        error,
    }
}
