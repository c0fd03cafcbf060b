//! The library's front door: what a binding, a server or another front end
//! calls, exactly as the CLI does.
//!
//! [`load`] checks a scenario into a [`Scenario`]; [`Scenario::run`] runs
//! it (through the stage cache when given one) into a [`RunResult`], which
//! holds the output files' bytes, the series as numeric columns on demand,
//! events, expectations, stage records and the manifest; [`RunResult::write`]
//! puts them on disk as a separate step. Nothing here prints or exits:
//! problems come back as values (see [`LoadError`], [`RunError`],
//! [`WriteError`]).

use std::fmt;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use crate::cache::Store;
use crate::check::{self, CheckError, CheckOptions};
use crate::diagnostic::Problem;
use crate::ensemble::{self, EnsembleError, EnsembleRun};
use crate::figures::data::{Column, RunData};
use crate::figures::FigureError;
use crate::manifest::{self, Manifest};
use crate::model::Model;
use crate::pipeline::{self, Outcome};
use crate::report::{self, ExpectResult};
use crate::solve::Run;
use crate::span::Sources;

/// How to load a scenario.
#[derive(Debug, Clone, Default)]
pub struct LoadOptions {
    /// `NAME=VALUE` parameter overrides, as `--set` gives them.
    pub overrides: Vec<(String, String)>,
}

/// Why a scenario could not be loaded.
#[derive(Debug)]
pub enum LoadError {
    /// The scenario file could not be read (a usage or I/O problem).
    Io { path: PathBuf, message: String },
    /// The scenario has errors; `sources` are what they point into.
    Invalid {
        sources: Sources,
        problems: Vec<Problem>,
    },
    /// A library file (no `scenario` line): it is included, never run.
    /// Its check's warnings are kept to be shown.
    Library {
        path: PathBuf,
        sources: Sources,
        warnings: Vec<Problem>,
    },
}

impl fmt::Display for LoadError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            LoadError::Io { path, message } => {
                write!(f, "cannot read {}: {message}", path.display())
            }
            LoadError::Invalid { problems, .. } => {
                write!(f, "the scenario has {} problem(s)", problems.len())
            }
            LoadError::Library { path, .. } => write!(
                f,
                "{} is a library file (no `scenario` line); run a scenario that includes it",
                path.display()
            ),
        }
    }
}

impl std::error::Error for LoadError {}

impl From<CheckError> for LoadError {
    fn from(e: CheckError) -> LoadError {
        match e {
            CheckError::Io { path, message } => LoadError::Io { path, message },
            CheckError::Invalid { sources, problems } => LoadError::Invalid { sources, problems },
        }
    }
}

/// A checked scenario, ready to run.
#[derive(Debug)]
pub struct Scenario {
    checked: check::Checked,
    path: PathBuf,
    overrides: Vec<(String, String)>,
    /// Time spent loading; a run's wall time counts it, as `hadal run`'s
    /// always did.
    load_time: Duration,
}

/// Read, parse and check the scenario at `path` with its includes and
/// tables.
pub fn load(path: &Path, options: &LoadOptions) -> Result<Scenario, LoadError> {
    let clock = Instant::now();
    let checked = check::check_file(
        path,
        &CheckOptions {
            overrides: options.overrides.clone(),
        },
    )?;
    if checked.model.is_library() {
        return Err(LoadError::Library {
            path: path.to_owned(),
            sources: checked.model.sources,
            warnings: checked.warnings,
        });
    }
    Ok(Scenario {
        checked,
        path: path.to_owned(),
        overrides: options.overrides.clone(),
        load_time: clock.elapsed(),
    })
}

/// How to run a scenario.
#[derive(Debug, Clone, Copy, Default)]
pub struct RunOptions<'a> {
    /// The stage cache; `None` solves every stage.
    pub store: Option<&'a Store>,
}

/// Why a run produced no result.
#[derive(Debug)]
pub enum RunError {
    /// Stopped through [`crate::cancel`] (Ctrl-C in the CLI).
    Interrupted,
    /// The solve failed (H06xx); the problem points into the model's sources.
    Failed(Problem),
}

impl fmt::Display for RunError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            RunError::Interrupted => f.write_str("interrupted"),
            RunError::Failed(p) => write!(f, "{}: {}", p.code, p.message),
        }
    }
}

impl std::error::Error for RunError {}

/// Why a result could not be written.
#[derive(Debug)]
pub enum WriteError {
    /// The output directory could not be made.
    CreateDir { dir: PathBuf, message: String },
    /// The files could not be written; the directory is as it was.
    Write { dir: PathBuf, message: String },
}

impl fmt::Display for WriteError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            WriteError::CreateDir { dir, message } => {
                write!(f, "cannot create {}: {message}", dir.display())
            }
            WriteError::Write { dir, message } => {
                write!(
                    f,
                    "cannot write the outputs in {}: {message}",
                    dir.display()
                )
            }
        }
    }
}

impl std::error::Error for WriteError {}

impl Scenario {
    pub fn model(&self) -> &Model {
        &self.checked.model
    }

    /// Warnings of the check, worth showing before a run.
    pub fn warnings(&self) -> &[Problem] {
        &self.checked.warnings
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    pub fn overrides(&self) -> &[(String, String)] {
        &self.overrides
    }

    /// Run every stage (through the cache when `options.store` is given)
    /// and make every output in memory. Nothing is written.
    pub fn run(&self, options: &RunOptions) -> Result<RunResult, RunError> {
        let clock = Instant::now();
        let model = self.model();
        let mut outcome = match pipeline::execute(model, options.store) {
            Ok(o) => o,
            Err(_) if crate::cancel::requested() => return Err(RunError::Interrupted),
            Err(p) => return Err(RunError::Failed(p)),
        };
        let expectations = report::expectations(model, &outcome.run);
        // The series moves into the files rather than being copied: it is
        // most of a run's memory (see `check::ReportSize`).
        let series = std::mem::take(&mut outcome.series_csv);
        let mut files = output_files(model, &outcome, &expectations);
        files[0].1 = series;
        let wall = self.load_time + clock.elapsed();
        let root = check::project_root(&self.path);
        // Built as if written at the project root; `write` places it.
        let manifest = manifest::build(
            model,
            &self.path,
            &self.overrides,
            &outcome,
            &files,
            &root,
            wall.as_secs_f64() * 1e3,
        );
        let events = outcome
            .run
            .event_defs
            .iter()
            .zip(&outcome.run.events)
            .map(|(&d, &age)| (model.defs[d].name.clone(), age))
            .collect();
        let closure_problems = closure_problems(model, &outcome.run);
        Ok(RunResult {
            outcome,
            expectations,
            events,
            files,
            manifest,
            root,
            wall,
            closure_problems,
        })
    }

    /// Run the scenario as an ensemble: members go to `sink` in member
    /// order ([`ensemble::FileSink`] streams members.csv, [`ensemble::MemorySink`]
    /// keeps the numbers), progress to `options.progress`; the state comes
    /// back, and writing its summary files is a separate step
    /// ([`EnsembleRun::write`]).
    pub fn ensemble(
        &self,
        options: &ensemble::Options,
        sink: &mut dyn ensemble::MemberSink,
    ) -> Result<EnsembleRun, EnsembleError> {
        ensemble::run(self.model(), options, sink)
    }
}

/// A finished run, in memory.
#[derive(Debug)]
pub struct RunResult {
    /// Per stage: the solve's records (`outcome.run.stages`: method,
    /// statistics, end state, budget closure) and the cache's
    /// (`outcome.stages`: status, reason, fingerprint); row count and
    /// warnings. Its `series_csv` is empty: the series is in [`Self::files`].
    pub outcome: Outcome,
    pub expectations: Vec<ExpectResult>,
    /// Each event's name and the first age (yr) it happened, if it did.
    pub events: Vec<(String, Option<f64>)>,
    files: Vec<(&'static str, Vec<u8>)>,
    /// The manifest; its `run.project_root_from_manifest` is set by
    /// [`Self::write`] for the directory written.
    pub manifest: Manifest,
    root: PathBuf,
    /// Load and run time, shown in summaries and kept in the manifest.
    pub wall: Duration,
    /// H0606 for each stage whose water budget does not close beyond its
    /// tolerance: the outputs are still written, but the result is wrong.
    pub closure_problems: Vec<Problem>,
}

impl RunResult {
    /// The output files (name, bytes) in the order written, without the
    /// manifest.
    pub fn files(&self) -> &[(&'static str, Vec<u8>)] {
        &self.files
    }

    /// Hand over the output files (name, bytes), leaving none here: once
    /// written, the series is most of a run's memory, and a caller that
    /// still draws or reports frees it this way.
    pub fn take_files(&mut self) -> Vec<(&'static str, Vec<u8>)> {
        std::mem::take(&mut self.files)
    }

    /// The bytes of one output file.
    pub fn file(&self, name: &str) -> Option<&[u8]> {
        self.files
            .iter()
            .find(|(n, _)| *n == name)
            .map(|(_, b)| b.as_slice())
    }

    /// The series as numeric columns (name, unit, values in that unit),
    /// the age column first: decoded from the series bytes in memory, so
    /// they are exactly the numbers a reader of `series.csv` gets.
    pub fn series(&self) -> Result<Vec<Column>, FigureError> {
        crate::figures::data::decode_series(self.series_bytes())
    }

    fn series_bytes(&self) -> &[u8] {
        self.file("series.csv").unwrap_or_default()
    }

    /// What the figures need, from memory: the [`RunData`] that
    /// [`RunData::load`] reads from the written directory, with only the
    /// series columns a figure draws (the age and those of
    /// [`crate::figures::run::is_drawn`]), so the SVG bytes are the same
    /// either way while a large series is not decoded whole. Call it after
    /// [`Self::write`] for the manifest as written.
    pub fn figure_data(&self) -> Result<RunData, FigureError> {
        let table = |name: &str| {
            self.file(name)
                .map(|b| crate::figures::data::TextTable::parse(b).map_err(|e| e.at(name)))
                .transpose()
        };
        let columns = crate::figures::data::decode_series_columns(self.series_bytes(), |n, u| {
            n.eq_ignore_ascii_case("age") || crate::figures::run::is_drawn(n, u)
        })?;
        RunData::from_parts(
            columns,
            table("stages.csv")?,
            table("events.csv")?,
            serde_json::from_slice(&self.manifest.to_json()).ok(),
            "series.csv",
        )
    }

    /// Write the files and the manifest into `dir` as one unit (see
    /// [`crate::fsutil::write_group`]): on failure the directory is as it
    /// was (a directory made here is removed again), and the manifest,
    /// written last, marks a complete set. Temporary files of killed
    /// writers are cleared first.
    pub fn write(&mut self, dir: &Path) -> Result<(), WriteError> {
        let created = !dir.is_dir();
        std::fs::create_dir_all(dir).map_err(|e| WriteError::CreateDir {
            dir: dir.to_owned(),
            message: e.to_string(),
        })?;
        // The directory exists now, so the relative path is canonical.
        self.manifest.run.project_root_from_manifest = manifest::relative(&self.root, dir);
        let json = self.manifest.to_json();
        crate::fsutil::remove_stale_temps(dir);
        let mut group: Vec<(&str, &[u8])> =
            self.files.iter().map(|(n, b)| (*n, b.as_slice())).collect();
        group.push(("manifest.json", &json));
        crate::fsutil::write_group(dir, &group, "manifest.json").map_err(|e| {
            if created {
                let _ = std::fs::remove_dir(dir);
            }
            WriteError::Write {
                dir: dir.to_owned(),
                message: e.to_string(),
            }
        })
    }
}

/// The files a run writes beside its manifest (and that `verify`
/// recomputes), in order: the series, stages, events and, when the
/// scenario has expectations, their results.
pub fn output_files(
    model: &Model,
    outcome: &Outcome,
    expectations: &[ExpectResult],
) -> Vec<(&'static str, Vec<u8>)> {
    let mut files = vec![
        ("series.csv", outcome.series_csv.clone()),
        ("stages.csv", report::stages_csv(model, &outcome.run)),
        ("events.csv", report::events_csv(model, &outcome.run)),
    ];
    if !model.expects.is_empty() {
        files.push(("expectations.csv", report::expectations_csv(expectations)));
    }
    files
}

/// Recompute the outputs of a published run from the inputs its manifest
/// recorded and [`crate::manifest::verify::open`] checked, without the
/// cache, for [`crate::manifest::verify::compare`]. A solve that fails is
/// an `Invalid` error pointing into the recorded sources.
pub fn recompute(
    opened: &crate::manifest::verify::Opened,
) -> Result<Vec<(&'static str, Vec<u8>)>, CheckError> {
    let checked = opened.check()?;
    let model = &checked.model;
    let outcome = pipeline::execute(model, None).map_err(|p| CheckError::Invalid {
        sources: model.sources.clone(),
        problems: vec![p],
    })?;
    let expectations = report::expectations(model, &outcome.run);
    Ok(output_files(model, &outcome, &expectations))
}

/// H0606 for each stage whose water budget does not close.
pub fn closure_problems(model: &Model, run: &Run) -> Vec<Problem> {
    run.stages
        .iter()
        .filter(|sr| sr.closure_error > model.stages[sr.stage].solver.budget_tolerance)
        .map(|sr| {
            let st = &model.stages[sr.stage];
            Problem::error(
                "H0606",
                format!(
                    "the water budget of stage `{}` does not close: relative error {:.3e}, above {:.1e}",
                    st.name, sr.closure_error, st.solver.budget_tolerance
                ),
            )
            .label(st.span, "this stage")
            .help("tighten `solver rtol`, or raise `solver budget_tolerance` if the loss is understood")
        })
        .collect()
}

/// The water where a run ended.
#[derive(Debug, Clone, PartialEq)]
pub struct Inventories {
    /// The scenario's `ocean_mass` (kg), or one present ocean, 1.4e21 kg:
    /// the unit summaries show inventories in.
    pub ocean_mass: f64,
    /// Each reservoir's name and final inventory (kg), by name; NaN when
    /// no stage ran.
    pub reservoirs: Vec<(String, f64)>,
    /// Water delivered from `outside` and lost to it (kg): the two ledger
    /// components at the end of the state vector.
    pub delivered: f64,
    pub lost: f64,
    /// Whether any stage ran (otherwise the values are NaN).
    pub solved: bool,
}

/// The final inventories of `run`, read from the last stage's end state by
/// its layout (`compile::state_order`, then the two ledger components).
pub fn final_inventories(model: &Model, run: &Run) -> Inventories {
    let ocean_mass = model
        .find("ocean_mass")
        .and_then(|d| check::eval_const(model, &model.defs[d].expr))
        .unwrap_or(1.4e21);
    let last = run.stages.last().map(|l| &l.end.0);
    let order = crate::compile::state_order(model);
    let reservoirs = model
        .reservoirs()
        .map(|(id, d)| {
            let k = order.iter().position(|&o| o == id).unwrap_or(0);
            (d.name.clone(), last.map_or(f64::NAN, |y| y[k]))
        })
        .collect();
    let ledger = |back: usize| last.map_or(f64::NAN, |y| y[y.len() - back]);
    Inventories {
        ocean_mass,
        reservoirs,
        delivered: ledger(2),
        lost: ledger(1),
        solved: last.is_some(),
    }
}

/// What a parameter reaches, for `hadal params`.
#[derive(Debug, Clone, PartialEq)]
pub struct ParamInfo {
    pub name: String,
    /// The value in the unit it is shown in.
    pub value: f64,
    pub unit: String,
    /// The stages whose solve it reaches.
    pub stages: Vec<String>,
    /// Whether it reaches a reservoir's or state's initial value.
    pub initial_state: bool,
    /// The stages that `set` it.
    pub set_in: Vec<String>,
    pub doc: Option<String>,
}

/// Every parameter of `model` and what it influences, in the dependency
/// graph's order of parameters.
pub fn parameters(model: &Model) -> Vec<ParamInfo> {
    use crate::graph::{self, DepGraph, Node};
    use crate::model::DefKind;
    let g = DepGraph::build(model);
    let base = crate::compile::stage_params(model, None);
    graph::param_stages(model, &g)
        .into_iter()
        .map(|(id, stages)| {
            let d = &model.defs[id];
            let (unit, shown) = report::shown_unit(model, id);
            let initial_state = model
                .defs
                .iter()
                .enumerate()
                .filter(|(_, x)| {
                    matches!(x.kind, DefKind::Reservoir { .. } | DefKind::State { .. })
                })
                .any(|(r, _)| g.closure(&[Node::Initial(r)]).contains(&Node::Def(id)));
            ParamInfo {
                name: d.name.clone(),
                value: shown.from_internal(base[id].unwrap_or(f64::NAN)),
                unit,
                stages: stages
                    .iter()
                    .map(|&s| model.stages[s].name.clone())
                    .collect(),
                initial_state,
                set_in: model
                    .stages
                    .iter()
                    .filter(|s| s.sets.iter().any(|(p, _)| *p == id))
                    .map(|s| s.name.clone())
                    .collect(),
                doc: d.doc.clone(),
            }
        })
        .collect()
}
