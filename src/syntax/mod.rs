//! Phase 1, parse: text to syntax tree, and the canonical printer.
//!
//! Invariant: this module knows nothing of units, dimensions or physics.
//! Spans live here; meaning does not.

pub mod ast;
mod format;
mod parse;

pub use ast::*;
pub use format::{format_expr, format_file, format_stmt};
pub use parse::{parse, MAX_NESTING, MAX_OPERATORS, MAX_SOURCE_BYTES};
