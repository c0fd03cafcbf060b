//! Figures and the one-page report, drawn from the files of an output
//! directory alone (`series.csv`, `stages.csv`, `events.csv`,
//! `manifest.json` for a run; `quantiles.csv`, `members.csv`,
//! `summary.json` for an ensemble), so `hadal plot DIR` redraws a
//! published result without recomputing it. `hadal run` fills the same
//! [`RunData`] from the outputs it holds in memory
//! (`api::RunResult::figure_data`), so both draw the same bytes.
//!
//! Invariant: this module reads outputs (files, or their bytes in memory)
//! and writes SVG and HTML bytes; it never sees a scenario, a model or the solver, and it never
//! writes files itself (callers write with `fsutil::write_atomic`). The
//! same files give the same bytes: no timestamps, no random ids, no
//! platform math in placement.
//!
//! Every age figure runs from the oldest age on the left to the present on
//! the right, in Ga (Ma or ka for short spans), with units on both axes,
//! the stages as light labelled bands, and the legend below the plot so it
//! never covers data. See docs/figures.md.

pub mod age_plot;
mod canvas;
pub mod data;
pub mod ensemble;
pub mod html;
pub mod run;

use std::path::{Path, PathBuf};

pub use age_plot::{AgePlot, Mark, MarkShape};
pub use canvas::{series_style, LineStyle, Marker};
pub use data::RunData;
pub use ensemble::{ConstraintMark, EnsembleData};
pub use run::{InventoryUnit, RunOptions, OCEAN_MASS_KG, RUN_FIGURES};

/// Why figures or a report could not be made.
#[derive(Debug, Clone, PartialEq)]
pub enum FigureError {
    /// An output file could not be read (the message names it).
    Read(String),
    /// An output, a file or a run's series in memory, is not what a run or
    /// an ensemble writes: bad CSV, no age column, no finite values.
    Invalid(String),
    /// A directory holds neither a run nor an ensemble.
    NotAnOutputDir(PathBuf),
    /// The drawing backend failed.
    Draw(String),
}

impl FigureError {
    /// The same error, its message prefixed with where it was found.
    pub(crate) fn at(self, place: &str) -> FigureError {
        match self {
            FigureError::Read(m) => FigureError::Read(format!("{place}: {m}")),
            FigureError::Invalid(m) => FigureError::Invalid(format!("{place}: {m}")),
            FigureError::Draw(m) => FigureError::Draw(format!("{place}: {m}")),
            e @ FigureError::NotAnOutputDir(_) => e,
        }
    }
}

impl std::fmt::Display for FigureError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FigureError::Read(m) | FigureError::Invalid(m) | FigureError::Draw(m) => f.write_str(m),
            FigureError::NotAnOutputDir(dir) => write!(
                f,
                "{} holds neither a run (series.csv) nor an ensemble (quantiles.csv)",
                dir.display()
            ),
        }
    }
}

impl std::error::Error for FigureError {}

/// Figure files as (file name, SVG bytes).
pub type Files = Vec<(String, Vec<u8>)>;

/// The figures of a run directory, with inventories in ocean masses.
pub fn draw_run(dir: &Path) -> Result<Files, FigureError> {
    draw_run_with(dir, &RunOptions::default())
}

/// The figures of a run directory.
pub fn draw_run_with(dir: &Path, opts: &RunOptions) -> Result<Files, FigureError> {
    let data = RunData::load(dir)?;
    run::figures(&data, opts)
}

/// The figures of an ensemble directory (see [`ensemble`]).
pub fn draw_ensemble(dir: &Path) -> Result<Files, FigureError> {
    let data = EnsembleData::load(dir)?;
    ensemble::figures(&data)
}

/// What kind of output directory `dir` is.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DirKind {
    Run,
    Ensemble,
}

/// A directory with `quantiles.csv` is an ensemble's, one with
/// `series.csv` a run's.
pub fn dir_kind(dir: &Path) -> Option<DirKind> {
    if dir.join("quantiles.csv").is_file() {
        Some(DirKind::Ensemble)
    } else if dir.join("series.csv").is_file() {
        Some(DirKind::Run)
    } else {
        None
    }
}

/// The figures of a run or an ensemble directory, whichever it is.
pub fn draw_dir(dir: &Path, opts: &RunOptions) -> Result<Files, FigureError> {
    match dir_kind(dir) {
        Some(DirKind::Run) => draw_run_with(dir, opts),
        Some(DirKind::Ensemble) => draw_ensemble(dir),
        None => Err(FigureError::NotAnOutputDir(dir.to_owned())),
    }
}
