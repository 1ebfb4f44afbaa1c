//! Run states and the one transition table the engine follows.

use serde::{Deserialize, Serialize};
use std::fmt;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum RunState {
    /// Validated, nothing sent yet.
    Ready,
    /// Steps executing.
    Running,
    /// Turning outputs off after the last step, a breach, a fault or a stop.
    Stopping,
    Completed,
    Aborted,
    Interrupted,
}

/// Why the engine moves.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Trigger {
    Start,
    LastStepDone,
    Breach,
    InstrumentFault,
    StopRequested,
    OutputsOff { finished: bool, interrupted: bool },
}

impl RunState {
    /// The transition table. `None` = not allowed.
    pub fn next(self, t: Trigger) -> Option<RunState> {
        use RunState::*;
        use Trigger::*;
        match (self, t) {
            (Ready, Start) => Some(Running),
            (Running, LastStepDone | Breach | InstrumentFault | StopRequested) => Some(Stopping),
            (Stopping, OutputsOff { finished: true, .. }) => Some(Completed),
            (
                Stopping,
                OutputsOff {
                    interrupted: true,
                    finished: false,
                },
            ) => Some(Interrupted),
            (Stopping, OutputsOff { .. }) => Some(Aborted),
            _ => None,
        }
    }

    pub fn is_final(self) -> bool {
        matches!(
            self,
            RunState::Completed | RunState::Aborted | RunState::Interrupted
        )
    }

    pub fn name(self) -> &'static str {
        match self {
            RunState::Ready => "ready",
            RunState::Running => "running",
            RunState::Stopping => "stopping",
            RunState::Completed => "completed",
            RunState::Aborted => "aborted",
            RunState::Interrupted => "interrupted",
        }
    }
}

/// A run's status as its records keep it (`run.json`, `summary.json`, the
/// run-end event): where the engine's state machine stopped, or
/// `imported` for a log from another bench.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RunStatus {
    /// Started and not (yet) recorded as ended: running now, or killed.
    Running,
    Completed,
    Aborted,
    Interrupted,
    /// A log from elsewhere, analysed afterwards.
    Imported,
}

impl RunStatus {
    pub fn name(&self) -> &'static str {
        match self {
            RunStatus::Running => "running",
            RunStatus::Completed => "completed",
            RunStatus::Aborted => "aborted",
            RunStatus::Interrupted => "interrupted",
            RunStatus::Imported => "imported",
        }
    }

    /// A run that can be resumed: never recorded as ended, or stopped by
    /// Ctrl-C.
    pub fn is_unfinished(&self) -> bool {
        matches!(self, RunStatus::Running | RunStatus::Interrupted)
    }

    /// Its figures count (grade, state of health, fade history).
    pub fn is_complete(&self) -> bool {
        matches!(self, RunStatus::Completed | RunStatus::Imported)
    }
}

impl RunStatus {
    pub const ALL: [RunStatus; 5] = [
        RunStatus::Running,
        RunStatus::Completed,
        RunStatus::Aborted,
        RunStatus::Interrupted,
        RunStatus::Imported,
    ];
}

impl std::str::FromStr for RunStatus {
    type Err = String;
    fn from_str(s: &str) -> Result<RunStatus, String> {
        RunStatus::ALL
            .into_iter()
            .find(|k| k.name() == s)
            .ok_or_else(|| format!("'{s}' is no run status"))
    }
}

impl From<RunState> for RunStatus {
    fn from(s: RunState) -> RunStatus {
        match s {
            RunState::Ready | RunState::Running | RunState::Stopping => RunStatus::Running,
            RunState::Completed => RunStatus::Completed,
            RunState::Aborted => RunStatus::Aborted,
            RunState::Interrupted => RunStatus::Interrupted,
        }
    }
}

impl fmt::Display for RunStatus {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.pad(self.name())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The recorded spellings (`run.json`, `summary.json`, events) are the
    /// names, both ways.
    #[test]
    fn run_status_names_are_the_recorded_spellings() {
        for s in RunStatus::ALL {
            let json = serde_json::to_string(&s).unwrap();
            assert_eq!(json, format!("\"{}\"", s.name()));
            assert_eq!(serde_json::from_str::<RunStatus>(&json).unwrap(), s);
            assert_eq!(s.name().parse::<RunStatus>(), Ok(s));
        }
        assert!(serde_json::from_str::<RunStatus>("\"done\"").is_err());
        assert_eq!(RunStatus::from(Stopping), RunStatus::Running);
        assert_eq!(RunStatus::from(Completed), RunStatus::Completed);
        assert!(RunStatus::Interrupted.is_unfinished() && !RunStatus::Aborted.is_unfinished());
        assert!(RunStatus::Imported.is_complete() && !RunStatus::Running.is_complete());
    }
    use RunState::*;
    use Trigger::*;

    #[test]
    fn every_path_ends_through_stopping() {
        // Every way into a final state passes through Stopping (outputs off).
        for t in [LastStepDone, Breach, InstrumentFault, StopRequested] {
            let s = Ready.next(Start).and_then(|s| s.next(t));
            assert_eq!(s, Some(Stopping), "{t:?}");
        }
        let off = |finished, interrupted| OutputsOff {
            finished,
            interrupted,
        };
        assert_eq!(Stopping.next(off(true, false)), Some(Completed));
        assert_eq!(Stopping.next(off(false, true)), Some(Interrupted));
        assert_eq!(Stopping.next(off(false, false)), Some(Aborted));
        // No shortcuts: a running run cannot become final without Stopping,
        // and final states do not move.
        for s in [Completed, Aborted, Interrupted] {
            assert!(s.is_final());
            for t in [Start, LastStepDone, Breach, StopRequested, off(true, false)] {
                assert_eq!(s.next(t), None);
            }
        }
        assert_eq!(Running.next(off(true, false)), None);
        assert_eq!(Ready.next(Breach), None);
    }
}
