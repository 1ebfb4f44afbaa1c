//! Exit codes, in one place.
//!
//! 0 completed, 1 failure while running (I/O, instrument connection, a
//! station's task), 2 bad input (arguments, procedure, pack spec, pack id,
//! a run folder that cannot be resumed), 3 safety stop or instrument fault
//! (run aborted, outputs off), 4 an output may still be on (the safe stop
//! could not confirm an instrument off for its whole hold: switch it off
//! by hand), 5 interrupted (Ctrl-C), 130 a second Ctrl-C (the shell's
//! convention for SIGINT).

use crate::session::error::RunError;
use crate::session::request::RunReport;
use model::status::RunState;

/// How `packbench` ends.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ExitCode {
    Ok,
    Failure,
    BadInput,
    Aborted,
    /// An instrument's output may still be on.
    MayBeOn,
    Interrupted,
    SecondInterrupt,
}

impl ExitCode {
    pub fn code(self) -> i32 {
        match self {
            ExitCode::Ok => 0,
            ExitCode::Failure => 1,
            ExitCode::BadInput => 2,
            ExitCode::Aborted => 3,
            ExitCode::MayBeOn => 4,
            ExitCode::Interrupted => 5,
            ExitCode::SecondInterrupt => 130,
        }
    }

    /// A run that ended: completed, interrupted, or aborted.
    pub fn of_run(state: RunState) -> ExitCode {
        match state {
            RunState::Completed => ExitCode::Ok,
            RunState::Interrupted => ExitCode::Interrupted,
            _ => ExitCode::Aborted,
        }
    }

    pub fn of_report(r: &RunReport) -> ExitCode {
        if !r.outcome.may_be_on.is_empty() {
            return ExitCode::MayBeOn;
        }
        ExitCode::of_run(r.outcome.status)
    }

    /// A session's error: bad input or a failure while running.
    pub fn of_error(e: &RunError) -> ExitCode {
        if e.outputs_may_be_on() {
            ExitCode::MayBeOn
        } else if e.is_input() {
            ExitCode::BadInput
        } else {
            ExitCode::Failure
        }
    }

    /// Several stations: a failure first, then an abort, then an
    /// interruption.
    pub fn worst(codes: impl IntoIterator<Item = ExitCode>) -> ExitCode {
        let rank = |c: ExitCode| match c {
            ExitCode::Ok => 0,
            ExitCode::Interrupted => 1,
            ExitCode::Aborted => 2,
            ExitCode::BadInput => 3,
            ExitCode::Failure => 4,
            ExitCode::MayBeOn => 5,
            ExitCode::SecondInterrupt => 6,
        };
        codes
            .into_iter()
            .max_by_key(|c| rank(*c))
            .unwrap_or(ExitCode::Ok)
    }
}

/// Say a session's error once and return its exit code.
pub fn report_error(e: &RunError) -> ExitCode {
    eprintln!("error: {e}");
    ExitCode::of_error(e)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_codes_are_the_documented_ones() {
        let codes: Vec<i32> = [
            ExitCode::Ok,
            ExitCode::Failure,
            ExitCode::BadInput,
            ExitCode::Aborted,
            ExitCode::Interrupted,
            ExitCode::SecondInterrupt,
        ]
        .map(ExitCode::code)
        .to_vec();
        assert_eq!(codes, [0, 1, 2, 3, 5, 130]);
        assert_eq!(ExitCode::of_run(RunState::Aborted), ExitCode::Aborted);
        assert_eq!(
            ExitCode::worst([ExitCode::Interrupted, ExitCode::Ok, ExitCode::Aborted]),
            ExitCode::Aborted
        );
        assert_eq!(
            ExitCode::worst([ExitCode::Aborted, ExitCode::Failure]),
            ExitCode::Failure
        );
        assert_eq!(ExitCode::worst([]), ExitCode::Ok);
    }
}
