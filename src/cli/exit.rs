//! Exit codes, in one place.

use crate::session::error::RunError;

pub const EXIT_OK: i32 = 0;

pub const EXIT_FAILURE: i32 = 1;

pub const EXIT_BAD_INPUT: i32 = 2;

pub fn report_error(e: &RunError) -> i32 {
    eprintln!("error: {e}");
    if e.is_input() {
        EXIT_BAD_INPUT
    } else {
        EXIT_FAILURE
    }
}

/// Exit code after a second Ctrl-C (the shell's convention for SIGINT).
pub const EXIT_SECOND_INTERRUPT: i32 = 130;
