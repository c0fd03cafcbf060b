//! Figures and the one-page report, drawn from the files of an output
//! directory alone (`series.csv`, `stages.csv`, `events.csv`,
//! `manifest.json` for a run; `quantiles.csv`, `members.csv`,
//! `summary.json` for an ensemble), so `hadal plot DIR` redraws a
//! published result without recomputing it.
//!
//! Invariant: this module reads output files and writes SVG and HTML
//! bytes; it never sees a scenario, a model or the solver, and it never
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

use std::path::Path;

pub use age_plot::{AgePlot, Mark, MarkShape};
pub use canvas::{series_style, LineStyle, Marker};
pub use data::RunData;
pub use ensemble::{ConstraintMark, EnsembleData};
pub use run::{InventoryUnit, RunOptions, OCEAN_MASS_KG, RUN_FIGURES};

/// Figure files as (file name, SVG bytes).
pub type Files = Vec<(String, Vec<u8>)>;

/// The figures of a run directory, with inventories in ocean masses.
pub fn draw_run(dir: &Path) -> Result<Files, String> {
    draw_run_with(dir, &RunOptions::default())
}

/// The figures of a run directory.
pub fn draw_run_with(dir: &Path, opts: &RunOptions) -> Result<Files, String> {
    let data = RunData::load(dir)?;
    run::figures(&data, opts)
}

/// The figures of an ensemble directory (see [`ensemble`]).
pub fn draw_ensemble(dir: &Path) -> Result<Files, String> {
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
pub fn draw_dir(dir: &Path, opts: &RunOptions) -> Result<Files, String> {
    match dir_kind(dir) {
        Some(DirKind::Run) => draw_run_with(dir, opts),
        Some(DirKind::Ensemble) => draw_ensemble(dir),
        None => Err(format!(
            "{} holds neither a run (series.csv) nor an ensemble (quantiles.csv)",
            dir.display()
        )),
    }
}
