//! hadal: a scenario language, solver and stage cache for box models of a
//! planet's deep water cycle.
//!
//! The pipeline, one module per phase (see docs/ARCHITECTURE.md):
//! [`syntax`] (parse) → [`check`] (names, units) → [`model`] (the checked
//! model) → [`graph`] (dependencies) → later phases.
//!
//! A front end (the CLI, a binding, a server) starts at [`api`]: load and
//! check a scenario, run it into a result in memory, write it as a
//! separate step. The library never prints and never exits.

pub mod api;
pub mod builtins;
pub mod cache;
pub mod cancel;
pub mod check;
pub mod cli;
pub mod compile;
pub mod diagnostic;
pub mod ensemble;
pub mod figures;
pub mod fsutil;
pub mod graph;
pub mod manifest;
pub mod model;
pub mod numeric;
pub mod pipeline;
pub mod report;
pub mod solve;
pub mod span;
mod stack;
pub mod syntax;
pub mod units;
