//! The exit codes of `rondo`, in one place, and the mapping from an error to its code: 0
//! every point converged; 3 finished but some point failed, was capped or cancelled; 4
//! interrupted by a signal; 2 bad input; 1 other errors.
//!
//! Owns the codes and how an error is told to the user; knows nothing of the commands.

use crate::spec;

/// Exit code: every point converged.
pub const EXIT_OK: u8 = 0;
/// Exit code: an error that is not the input's fault.
pub const EXIT_ERROR: u8 = 1;
/// Exit code: bad input (campaign file, arguments, workspace mismatch).
pub const EXIT_BAD_INPUT: u8 = 2;
/// Exit code: finished, but some point failed, hit its iteration cap or was cancelled.
pub const EXIT_INCOMPLETE: u8 = 3;
/// Exit code: stopped by SIGINT/SIGTERM/SIGHUP; `rondo run` again continues.
pub const EXIT_INTERRUPTED: u8 = 4;

/// An error caused by the user's input (exit code 2); defined with the campaign model so
/// that the engine can raise it without knowing the command line.
pub use crate::spec::BadInput;

/// The exit code of a command line clap refused (or answered, for `--help`, `--version`).
pub fn of_parse_error(e: &clap::Error) -> u8 {
    if e.use_stderr() {
        EXIT_BAD_INPUT
    } else {
        EXIT_OK
    }
}

/// Tell the user about an error that ended a command (on stderr) and give its exit code:
/// the campaign file's errors as they are (each with its line), bad input as exit code 2,
/// anything else as 1.
pub fn report_error(e: &anyhow::Error) -> u8 {
    if let Some(s) = e.downcast_ref::<spec::SpecErrors>() {
        eprint!("{s}");
        return EXIT_BAD_INPUT;
    }
    eprintln!("rondo: {e:#}");
    if e.downcast_ref::<BadInput>().is_some() {
        EXIT_BAD_INPUT
    } else {
        EXIT_ERROR
    }
}
