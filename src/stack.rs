//! Stack room for the recursive walks over expressions and definitions.
//!
//! The checker, the constant folder and the compiler recurse through
//! expressions and, on first use, through the definitions they name. The
//! checker bounds that depth (`check::MAX_DEPTH`), but a bounded depth can
//! still need more stack than a thread has (a test thread or a worker has
//! 2 MiB; unoptimized frames are large). Each recursive step passes through
//! [`guard`], which continues on a fresh heap-allocated segment when the
//! current stack runs low, so the depth limit, not the caller's thread,
//! decides what is accepted.

/// Room left below which a new segment is started, and its size.
const RED_ZONE: usize = 256 * 1024;
const SEGMENT: usize = 8 * 1024 * 1024;

/// Run `f`, on a new stack segment if the current one is nearly full.
#[inline]
pub(crate) fn guard<R>(f: impl FnOnce() -> R) -> R {
    stacker::maybe_grow(RED_ZONE, SEGMENT, f)
}
