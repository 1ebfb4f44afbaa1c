//! Run states and the one transition table the engine follows.

use serde::Serialize;

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

#[cfg(test)]
mod tests {
    use super::*;
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
