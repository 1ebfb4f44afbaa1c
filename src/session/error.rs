//! What can stop a session, in two kinds: bad input ([`InputError`], exit
//! 2: nothing was touched) and a failure while running ([`Failure`], exit
//! 1: a file could not be written, an instrument could not be reached, a
//! station's task died).

use instrument::InstrumentError;
use model::location::InputErrors;
use model::pack::PackIdError;
use record::read::ReadError;
use std::path::{Path, PathBuf};

/// The request cannot run as given.
#[derive(Debug, thiserror::Error)]
pub enum InputError {
    /// Errors located in an input file (file:line:column).
    #[error(transparent)]
    Located(#[from] InputErrors),
    #[error(transparent)]
    PackId(#[from] PackIdError),
    /// Arguments that do not fit together, or a value the command line
    /// gave that is out of its range.
    #[error("{0}")]
    Arguments(String),
    /// A file the user named (a procedure, a pack spec, a run folder's
    /// record) could not be read.
    #[error("{path}: {error}")]
    File {
        path: PathBuf,
        error: std::io::Error,
    },
    /// A run folder that cannot be resumed (finished, stopped by a safety
    /// limit, locked by a live process, its record incomplete).
    #[error("{0}")]
    NotResumable(String),
    /// A run folder's record that does not read.
    #[error(transparent)]
    Record(#[from] ReadError),
    /// A refusal of one field of what starts a run (the form's field, the
    /// command line's option).
    #[error(transparent)]
    Field(#[from] crate::session::fields::FieldError),
}

/// Something failed while the session ran.
#[derive(Debug, thiserror::Error)]
pub enum Failure {
    #[error("{path}: {error}")]
    Io {
        path: PathBuf,
        error: std::io::Error,
    },
    /// (Said with its cause in one line; not chained again as a source.)
    #[error("instrument: {0}")]
    Instrument(InstrumentError),
    /// The worker writing the summary and report died.
    #[error("writing the record failed: {0}")]
    RecordTask(String),
    /// The run stopped but its record could not be completed (a stalled
    /// disk); the message says what state the outputs were left in.
    #[error("the record could not be completed: {message}")]
    RecordIncomplete { message: String, may_be_on: bool },
    /// A station's task panicked or was cancelled; its outputs were made
    /// safe by the engine's own guard.
    #[error("station task failed: {0}")]
    StationTask(String),
    /// The async runtime could not start.
    #[error("cannot start the runtime: {0}")]
    Runtime(std::io::Error),
    /// A calibration could not be completed (the outputs were switched off).
    #[error("calibration: {0}")]
    Calibration(String),
}

/// Everything that can go wrong in a session.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error(transparent)]
    Input(#[from] InputError),
    #[error(transparent)]
    Failed(#[from] Failure),
}

impl From<InputErrors> for RunError {
    fn from(e: InputErrors) -> Self {
        RunError::Input(e.into())
    }
}

impl From<PackIdError> for RunError {
    fn from(e: PackIdError) -> Self {
        RunError::Input(e.into())
    }
}

impl From<crate::session::fields::FieldError> for RunError {
    fn from(e: crate::session::fields::FieldError) -> Self {
        RunError::Input(e.into())
    }
}

impl From<ReadError> for RunError {
    fn from(e: ReadError) -> Self {
        RunError::Input(e.into())
    }
}

impl From<InstrumentError> for RunError {
    fn from(e: InstrumentError) -> Self {
        RunError::Failed(Failure::Instrument(e))
    }
}

impl RunError {
    /// Bad input (exit code 2) as opposed to a failure while running.
    pub fn is_input(&self) -> bool {
        matches!(self, RunError::Input(_))
    }

    /// A failure after which an instrument's output may still be on.
    pub fn outputs_may_be_on(&self) -> bool {
        matches!(
            self,
            RunError::Failed(Failure::RecordIncomplete {
                may_be_on: true,
                ..
            })
        )
    }

    /// Arguments or values that cannot work together.
    pub fn arguments(msg: impl Into<String>) -> RunError {
        RunError::Input(InputError::Arguments(msg.into()))
    }
}

/// A file could not be written or read while running.
pub fn io_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |error| {
        RunError::Failed(Failure::Io {
            path: path.to_path_buf(),
            error,
        })
    }
}

/// A file the user named could not be read.
pub fn input_file_err(path: &Path) -> impl FnOnce(std::io::Error) -> RunError + '_ {
    move |error| {
        RunError::Input(InputError::File {
            path: path.to_path_buf(),
            error,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Bad input and failures while running are told apart by kind, never
    /// by a message.
    #[test]
    fn input_and_failures_are_told_apart() {
        assert!(RunError::arguments("--pack is needed").is_input());
        assert!(
            input_file_err(Path::new("p.toml"))(std::io::ErrorKind::NotFound.into()).is_input()
        );
        assert!(!io_err(Path::new("run.json"))(std::io::ErrorKind::Other.into()).is_input());
        assert!(!RunError::from(Failure::StationTask("panicked".into())).is_input());
        assert!(!RunError::from(Failure::RecordTask("panicked".into())).is_input());
    }
}
