//! The ensemble's errors. Their words are the ones the command line has
//! always printed, so a caller that shows `Display` shows the same text.

use std::fmt;

use crate::diagnostic::Problem;

#[derive(Debug, Clone)]
pub enum EnsembleError {
    /// H0412: the members in flight and the sketches would not fit the
    /// memory budget.
    OverBudget { message: String, help: String },
    /// More members than the limit of one run.
    TooManyMembers { members: u64, limit: u64 },
    /// A shard `(k, n)` outside 1 <= k <= n.
    BadShard { k: u64, n: u64 },
    /// A truncated distribution whose draws almost never fall inside.
    RarelyInRange { param: String },
    /// A drawn value that is not a finite number.
    NotFinite { param: String, value: f64 },
    /// A stage shared by every member failed.
    SharedStage(Problem),
    /// A stop was requested; nothing half-written was kept.
    Interrupted(Problem),
    /// The worker threads could not be started.
    Threads(String),
    /// Reading or writing a file (the context names the file).
    Io { context: String, message: String },
    /// An ensemble.state file is not one, or is damaged.
    StateFile(String),
    /// Shards of different ensembles.
    DifferentEnsembles { ours: String, theirs: String },
    /// Members between two shards missing or covered twice.
    Gap { to: u64, from: u64 },
    /// The merged shards do not cover every member.
    Incomplete { from: u64, to: u64, total: u64 },
    /// No shard was given.
    NothingToMerge,
    /// An error about one member or one shard directory.
    In {
        context: String,
        error: Box<EnsembleError>,
    },
}

impl EnsembleError {
    pub(crate) fn io(context: impl Into<String>, message: impl fmt::Display) -> Self {
        EnsembleError::Io {
            context: context.into(),
            message: message.to_string(),
        }
    }

    pub(crate) fn within(self, context: impl Into<String>) -> Self {
        EnsembleError::In {
            context: context.into(),
            error: Box::new(self),
        }
    }
}

impl fmt::Display for EnsembleError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            EnsembleError::OverBudget { message, help } => {
                write!(f, "H0412 {message}\nhelp: {help}")
            }
            EnsembleError::TooManyMembers { members, limit } => write!(
                f,
                "{members} members is more than the limit of {limit}; split the study into shards"
            ),
            EnsembleError::BadShard { k, n } => {
                write!(f, "shard {k}/{n} is not K/N with 1 <= K <= N")
            }
            EnsembleError::RarelyInRange { param } => write!(
                f,
                "`{param}`: its distribution almost never falls between min and max"
            ),
            EnsembleError::NotFinite { param, value } => {
                write!(f, "`{param}`: drew {value}, which is not a finite number")
            }
            EnsembleError::SharedStage(p) => write!(f, "{}: {}", p.code, p.message),
            EnsembleError::Interrupted(p) => f.write_str(&p.message),
            EnsembleError::Threads(m) => f.write_str(m),
            EnsembleError::Io { context, message } if context.is_empty() => f.write_str(message),
            EnsembleError::Io { context, message } => write!(f, "{context}: {message}"),
            EnsembleError::StateFile(m) => f.write_str(m),
            EnsembleError::DifferentEnsembles { ours, theirs } => {
                write!(f, "shards of different ensembles: {ours} against {theirs}")
            }
            EnsembleError::Gap { to, from } => {
                write!(f, "members {to} to {from} are missing or covered twice")
            }
            EnsembleError::Incomplete { from, to, total } => {
                write!(f, "the shards cover members {from} to {to} of {total}")
            }
            EnsembleError::NothingToMerge => f.write_str("nothing to merge"),
            EnsembleError::In { context, error } => write!(f, "{context}: {error}"),
        }
    }
}

impl std::error::Error for EnsembleError {}
