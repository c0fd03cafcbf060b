//! A process-wide request to stop long work (Ctrl-C).
//!
//! The library never installs a signal handler: the command line does, and
//! its handler only sets [`flag`]. The solver looks at it at the start of
//! every stage, after every accepted step and every few thousand report
//! rows, the report every few thousand rows, and an ensemble before every
//! stage of a member and every chunk of members; each turns a request into
//! an [`interrupted`] error, so whatever was already written (cache
//! entries, complete output files) stays valid and nothing half-written is
//! renamed into place.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, OnceLock};

/// The diagnostic code of an interrupted run.
pub const CODE: &str = "H0608";

/// How many report rows are produced or formatted between two looks at the
/// flag: cheap next to the rows themselves, and well under a millisecond.
pub const ROWS_PER_CHECK: usize = 4096;

/// The process-wide flag (shared, so a signal handler can hold it).
pub fn flag() -> &'static Arc<AtomicBool> {
    static FLAG: OnceLock<Arc<AtomicBool>> = OnceLock::new();
    FLAG.get_or_init(|| Arc::new(AtomicBool::new(false)))
}

/// Whether a stop was requested.
#[inline]
pub fn requested() -> bool {
    flag().load(Ordering::Relaxed)
}

/// Ask every running solve, report and ensemble of this process to stop.
pub fn request() {
    flag().store(true, Ordering::Relaxed);
}

/// The error of work stopped on request.
pub fn interrupted() -> crate::diagnostic::Problem {
    crate::diagnostic::Problem::error(CODE, "interrupted").help(
        "nothing half-written was kept; run the command again to finish (cached stages are reused)",
    )
}

/// `Err(interrupted())` once a stop was requested.
pub fn check() -> Result<(), crate::diagnostic::Problem> {
    if requested() {
        Err(interrupted())
    } else {
        Ok(())
    }
}
