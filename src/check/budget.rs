//! The memory a run's report will take, estimated before any work starts,
//! so that a scenario the check accepts runs within [`MEMORY_BUDGET`].
//!
//! A run holds its report rows (the age and every state component, as
//! doubles, in one buffer) from the solve until its stage's series is
//! written, and the series as CSV text (at most 25 bytes a value) until
//! the files are written; per row it also keeps the report age and the
//! age's bits in the stage fingerprint. Its peak is the larger of the
//! solve's and the series' needs. An ensemble member holds no more, and
//! the ensemble keeps two quantile sketches per report age and column.
//! `tests/memory.rs` counts every allocation of runs and fails if one
//! needs more than this estimate (measured 12-05: 158 bytes a row against
//! an estimate of 168 for five state values and four columns, 1,159
//! against 1,208 with forty outputs more).

use crate::diagnostic::Problem;
use crate::model::{DefKind, Model};
use crate::span::Span;

/// The resident memory a run (or one ensemble) may need: 1 GiB.
pub const MEMORY_BUDGET: u64 = 1 << 30;

/// Bytes per report row besides its values while stages are solved: its
/// age in the list of report ages (kept by the run and by the stage) and
/// as 17 hex characters in the stage fingerprint (twice while hashed).
pub const SOLVE_BYTES_PER_ROW: u64 = 64;

/// Bytes per state value of a report row while stages are solved: the row
/// itself, and its copy encoded for the stage cache.
pub const SOLVE_BYTES_PER_STATE_VALUE: u64 = 16;

/// Bytes per report row besides its values while the series is written
/// (its report age).
pub const SERIES_BYTES_PER_ROW: u64 = 16;

/// Bytes per state value while the series is written (the rows are kept
/// until their stage's series is written).
pub const SERIES_BYTES_PER_STATE_VALUE: u64 = 8;

/// Bytes per series value: up to 25 bytes of CSV text (the shortest
/// round-trip form of a double and a separator); reserved whole, so that
/// the text never moves while it grows.
pub const SERIES_BYTES_PER_COLUMN_VALUE: u64 = 26;

/// Bytes per series value (after the age) of an ensemble: two quantile
/// sketches (`ensemble::sketch`) of about 90 bytes each and their bucket
/// counts, 4 bytes a bucket of 0.4 % width over the range of the value
/// across members: about 1,000 buckets, so that the estimate holds for
/// values that differ by a factor of up to about 50 between members at
/// every report age (`tests/memory.rs` measured about 2,800 bytes for a
/// factor of about 30 at the end of the span).
pub const SKETCH_BYTES_PER_VALUE: u64 = 8192;

/// The memory of an ensemble's members in flight (their series, rows and
/// the buffers they reuse): `ensemble::run` sizes its chunks of members to
/// stay within it, down to one member at a time (which the per-run
/// estimate covers).
pub const ENSEMBLE_IN_FLIGHT_BYTES: u64 = 128 << 20;

/// The size of a model's report.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReportSize {
    /// Report rows (at most; the last one may coincide with the span end).
    pub rows: u64,
    /// Series columns: the age, reservoirs, states and outputs.
    pub columns: u64,
    /// Values of a stored row: the age, reservoirs, states and the two
    /// ledger components.
    pub state_values: u64,
    /// Whether the model runs as an ensemble (which keeps sketches).
    pub ensemble: bool,
}

impl ReportSize {
    pub fn of(model: &Model) -> ReportSize {
        let span = model.start_age - model.end_age;
        let steps = (span / model.cadence).floor();
        // `report_ages`: every cadence from the start, and the end.
        let rows = if steps.is_finite() && steps >= 0.0 {
            (steps as u64).saturating_add(2)
        } else {
            u64::MAX
        };
        let count =
            |f: fn(&DefKind) -> bool| model.defs.iter().filter(|d| f(&d.kind)).count() as u64;
        let reservoirs = count(|k| matches!(k, DefKind::Reservoir { .. }));
        let states = count(|k| matches!(k, DefKind::State { .. }));
        let outputs = count(|k| matches!(k, DefKind::Output));
        ReportSize {
            rows,
            columns: 1 + reservoirs + states + outputs,
            state_values: 3 + reservoirs + states,
            ensemble: model.ensemble.is_some(),
        }
    }

    /// Estimated peak bytes of one run (or one ensemble member) and, for an
    /// ensemble, of its sketches; saturating.
    pub fn bytes(&self) -> u64 {
        let solve = SOLVE_BYTES_PER_ROW
            .saturating_add(SOLVE_BYTES_PER_STATE_VALUE.saturating_mul(self.state_values));
        let series = SERIES_BYTES_PER_ROW
            .saturating_add(SERIES_BYTES_PER_STATE_VALUE.saturating_mul(self.state_values))
            .saturating_add(SERIES_BYTES_PER_COLUMN_VALUE.saturating_mul(self.columns));
        let run = self.rows.saturating_mul(solve.max(series));
        if !self.ensemble {
            return run;
        }
        let sketches = self
            .rows
            .saturating_mul(SKETCH_BYTES_PER_VALUE.saturating_mul(self.columns - 1));
        sketches.saturating_add(run.max(ENSEMBLE_IN_FLIGHT_BYTES))
    }

    /// The most rows that fit in the budget with these columns.
    pub fn rows_in_budget(&self) -> u64 {
        let fits = |rows: u64| ReportSize { rows, ..*self }.bytes() <= MEMORY_BUDGET;
        // Bytes grow with rows (an ensemble's with an offset): bisect.
        let (mut lo, mut hi) = (0u64, self.rows.max(1));
        while fits(hi) && hi < u64::MAX / 2 {
            hi *= 2;
        }
        while hi - lo > 1 {
            let mid = lo + (hi - lo) / 2;
            if fits(mid) {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        lo
    }
}

fn mib(bytes: u64) -> u64 {
    bytes.div_ceil(1 << 20)
}

/// H0412 when the report would need more memory than the budget.
pub(crate) fn report_memory(model: &Model, report_span: Span) -> Option<Problem> {
    let (message, help) = over_budget(ReportSize::of(model))?;
    Some(
        Problem::error("H0412", message)
            .label(report_span, "cadence too fine for the span and the columns")
            .help(help),
    )
}

/// What `hadal ensemble` checks before its first member: the scenario's
/// report counted as an ensemble's, with quantile sketches, even when the
/// file has no `ensemble { }` block (its check then counted a single run).
/// The H0412 message and its help, if the estimate passes the budget.
pub fn ensemble_over_budget(model: &Model) -> Option<(String, String)> {
    over_budget(ReportSize {
        ensemble: true,
        ..ReportSize::of(model)
    })
}

fn over_budget(size: ReportSize) -> Option<(String, String)> {
    let bytes = size.bytes();
    if bytes <= MEMORY_BUDGET {
        return None;
    }
    let what = if size.ensemble {
        "per member and in the ensemble's quantile sketches"
    } else {
        "in memory"
    };
    Some((
        format!(
            "the report would have {} rows of {} values, about {} MiB {what}, more than the budget of {} MiB",
            size.rows,
            size.columns,
            mib(bytes),
            mib(MEMORY_BUDGET)
        ),
        format!(
            "choose a coarser `report every`: at most {} rows of {} values fit",
            size.rows_in_budget(),
            size.columns
        ),
    ))
}
