//! Ensembles: many members of one scenario with parameters drawn from the
//! ensemble block, judged against the scenario's expectations.
//!
//! Determinism: member i's parameter values depend only on the seed, i and
//! the parameter's name (a blake3-derived stream per value), never on thread
//! count or shard split. Members run in parallel in fixed chunks whose
//! results are folded in member order; per-time quantiles go into mergeable
//! sketches (counts only), so any split of the members into shards merges to
//! exactly the bytes of an unsharded run. Memory is bounded by the number of
//! report times and variables, not by the number of members: members go to
//! a `MemberSink` the caller chooses, and the file sink streams them.
//!
//! Files: `design.rs` (member counts and values), `run.rs` (execution),
//! `write.rs` (sinks and the summary files), `merge.rs` (shards),
//! `sketch.rs` (quantile sketches), `error.rs` (`EnsembleError`).
//!
//! Invariant: members are run through the same `solve` and `report` code as
//! a single run; this module never integrates by itself.

mod design;
mod error;
mod merge;
mod run;
pub mod sketch;
mod write;

pub use design::{
    design, first_varying_stage, member_values, with_params, SplitMix, DEFAULT_MEMBERS,
};
pub use error::EnsembleError;
pub use merge::merge_dirs;
pub use run::run;
pub use write::{write_outputs, FileSink, MemberRow, MemberSink, MemorySink};

use crate::cache::Store;
use crate::diagnostic::Problem;
use sketch::Sketch;

#[derive(Debug, Clone)]
pub struct Options {
    pub members: Option<u64>,
    pub seed: Option<u64>,
    /// (k, n): run the k-th of n shards (1-based).
    pub shard: (u64, u64),
    pub threads: Option<usize>,
    pub keep_series: bool,
    pub store: Option<Store>,
    /// Told `(members done, members to run)` after each chunk of members,
    /// on the calling thread; the library draws nothing itself.
    pub progress: Option<Progress>,
}

/// A progress callback for [`Options::progress`] (shared, so `Options`
/// stays `Clone`).
#[derive(Clone)]
pub struct Progress(pub std::sync::Arc<dyn Fn(u64, u64) + Send + Sync>);

impl std::fmt::Debug for Progress {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Progress(..)")
    }
}

/// Everything an ensemble (or a shard of one) accumulates; merging shard
/// states gives the state of the whole.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleState {
    pub scenario: String,
    pub canonical_hash: String,
    pub seed: u64,
    pub total_members: u64,
    /// Members covered: [from, to).
    pub from: u64,
    pub to: u64,
    pub params: Vec<(String, String)>,
    pub constraints: Vec<String>,
    pub variables: Vec<(String, String)>,
    pub ages: Vec<f64>,
    pub accepted: u64,
    pub failed: u64,
    /// Per parameter: min/max over all and over accepted members.
    pub ranges: Vec<[f64; 4]>,
    /// Per constraint: members that pass.
    pub passes: Vec<u64>,
    /// Per constraint and parameter: elasticity at the nominal values.
    pub sensitivity: Vec<Vec<f64>>,
    /// (all, accepted) per age and variable, age-major.
    pub sketches: Vec<(Sketch, Sketch)>,
}

impl EnsembleState {
    pub fn members(&self) -> u64 {
        self.to - self.from
    }
}

/// What [`run`] returns: the state of the members it ran (the members
/// themselves went to the caller's [`MemberSink`]) and the warnings of the
/// shared stages (a damaged cache entry, as in a single run).
#[derive(Debug, Clone)]
pub struct EnsembleRun {
    pub state: EnsembleState,
    pub warnings: Vec<Problem>,
}

impl EnsembleRun {
    /// Write quantiles.csv, summary.json and ensemble.state into `dir` (a
    /// separate step: [`FileSink`] wrote members.csv as the members ran).
    pub fn write(&self, dir: &std::path::Path) -> Result<Vec<std::path::PathBuf>, EnsembleError> {
        write_outputs(&self.state, dir)
    }
}
