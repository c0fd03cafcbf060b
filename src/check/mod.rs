//! Phase 2, check: syntax trees of a scenario and its includes to a
//! [`Model`] with every name resolved and every dimension known.
//!
//! Invariant: this module never evaluates the model over time; it only reads
//! files (scenario, includes, tables) and reasons about names and units.

pub mod budget;
mod declare;
mod depth;
mod expr;
mod load;
mod tables;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::rc::Rc;

use crate::diagnostic::{nearest, Problem};
use crate::model::*;
use crate::span::{Sources, Span};
use crate::syntax::{self, Entry, EntryKind, StmtKind};
use crate::units::Dim;

pub use budget::{ReportSize, MEMORY_BUDGET};
pub use expr::eval_const;
pub use header::{MAX_MEMBERS, MAX_REPORT_ROWS};
use load::display_name;
pub use load::{decode_source, project_root, read_text, InputFiles, SourceError};
pub(crate) use load::{io_words, read_limited};
pub use tables::MAX_TABLE_ROWS;

/// Deepest chain of includes accepted.
pub const MAX_INCLUDE_DEPTH: usize = 16;
/// Largest table file read, bytes.
pub const MAX_FILE_BYTES: u64 = 16 * 1024 * 1024;
/// Largest scenario or included file read, bytes: the parser needs about a
/// hundred bytes of memory per byte of source, and a real scenario is tens
/// of kilobytes.
pub const MAX_SOURCE_BYTES: u64 = syntax::MAX_SOURCE_BYTES as u64;
/// Most bytes read for one scenario: the file, its includes and its tables
/// together (a file included or a table read many times counts each time).
pub const MAX_TOTAL_BYTES: u64 = 64 * 1024 * 1024;
/// Most errors reported for one scenario; checking stops collecting after
/// that many (the first ones are the ones to fix), so a huge broken file
/// costs neither minutes of suggestions nor pages of output.
pub const MAX_ERRORS: usize = 100;
/// Deepest nesting of an expression through the definitions it uses: a
/// `let` that uses a `let` that uses a `let` ... adds the depth of each
/// formula. Later phases walk definitions recursively; the limit keeps any
/// input from exhausting their stack.
pub const MAX_DEPTH: usize = 1000;

const PRELUDE: &str = include_str!("prelude.hadal");

/// Options that change the checked model without editing the file.
#[derive(Debug, Clone, Default)]
pub struct CheckOptions {
    /// `--set NAME=VALUE` overrides of parameters, value as written (`0.3`,
    /// `1500 K`).
    pub overrides: Vec<(String, String)>,
}

/// Why checking failed.
#[derive(Debug)]
pub enum CheckError {
    /// The root file could not be read (a usage or I/O problem, exit 2).
    Io { path: PathBuf, message: String },
    /// The scenario has errors (exit 1). Sources are included for rendering.
    Invalid {
        sources: Sources,
        problems: Vec<Problem>,
    },
}

/// A successful check: the model, and warnings worth showing.
#[derive(Debug)]
pub struct Checked {
    pub model: Model,
    pub warnings: Vec<Problem>,
}

/// Read, parse and check the scenario at `path` and everything it includes.
pub fn check_file(path: &Path, options: &CheckOptions) -> Result<Checked, CheckError> {
    let text = read_limited(path, MAX_SOURCE_BYTES).map_err(|e| CheckError::Io {
        path: path.to_owned(),
        message: e.to_string(),
    })?;
    let root_dir = project_root(path);
    let name = display_name(path);
    check_text(&name, path, &text, &root_dir, options)
}

/// Check `text` as if it were the file `path` under `root_dir` (the project
/// root: includes and tables may not reach outside it).
pub fn check_text(
    name: &str,
    path: &Path,
    text: &str,
    root_dir: &Path,
    options: &CheckOptions,
) -> Result<Checked, CheckError> {
    check_text_from(name, path, text, root_dir, options, None)
}

fn check_text_from(
    name: &str,
    path: &Path,
    text: &str,
    root_dir: &Path,
    options: &CheckOptions,
    inputs: Option<InputFiles>,
) -> Result<Checked, CheckError> {
    let mut c = Checker::new(root_dir);
    c.inputs = inputs;
    c.bytes_read = text.len() as u64;
    let prelude = c
        .sources
        .add("<prelude>".into(), PathBuf::new(), PRELUDE.to_owned());
    let root = c
        .sources
        .add(name.to_owned(), path.to_owned(), text.to_owned());
    c.load(prelude, Origin::Prelude, &mut Vec::new());
    let canonical = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_owned());
    c.load(root, Origin::Root, &mut vec![canonical]);
    let model = c.finish(options);
    let (errors, warnings): (Vec<Problem>, Vec<Problem>) =
        c.problems.into_iter().partition(|p| !p.warning);
    match model {
        Some(model) if errors.is_empty() => Ok(Checked { model, warnings }),
        _ => {
            let mut problems = errors;
            problems.extend(warnings);
            Err(CheckError::Invalid {
                sources: c.sources,
                problems,
            })
        }
    }
}

/// Check `text` as [`check_text`] does, reading includes and tables only
/// from `inputs`, never from disk.
pub fn check_text_with_inputs(
    name: &str,
    path: &Path,
    text: &str,
    root_dir: &Path,
    options: &CheckOptions,
    inputs: &InputFiles,
) -> Result<Checked, CheckError> {
    check_text_from(name, path, text, root_dir, options, Some(inputs.clone()))
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Origin {
    Prelude,
    Root,
    Included,
}

/// A definition statement waiting to be checked.
struct Item {
    /// Shared, so that later passes hold it without copying the tree.
    stmt: Rc<syntax::Stmt>,
    doc: Option<String>,
    origin: Origin,
    /// Index of the enclosing stage statement, for stage-local fluxes.
    stage: Option<usize>,
}

#[derive(Clone)]
enum Slot {
    Todo,
    InProgress,
    Done(expr::Typed),
}

pub(crate) struct Checker {
    pub(crate) sources: Sources,
    pub(crate) problems: Vec<Problem>,
    root_dir: PathBuf,
    items: Vec<Item>,
    header: Vec<syntax::Stmt>,
    stages: Vec<(syntax::Stmt, Vec<Entry>)>,
    ensembles: Vec<syntax::Stmt>,
    pub(crate) defs: Vec<Def>,
    pub(crate) tables: Vec<Table>,
    /// Name to definition; user definitions shadow the prelude.
    pub(crate) symbols: HashMap<String, DefId>,
    /// Syntax of each definition's main expression, by id.
    /// (The statement itself, shared with `items`: see [`main_expr`].)
    def_syntax: Vec<Option<Rc<syntax::Stmt>>>,
    slots: Vec<Slot>,
    /// Definitions being checked, innermost last (for cycle reports).
    pub(crate) stack: Vec<DefId>,
    /// Which definitions were declared with which item.
    def_item: Vec<usize>,
    /// Errors collected so far (at most [`MAX_ERRORS`] are kept).
    errors: usize,
    /// Every file included so far, with the include that first named it.
    included: HashMap<PathBuf, Span>,
    /// Bytes of scenario, include and table text read so far.
    bytes_read: u64,
    /// How deep `check_expr` is nested now, and whether passing
    /// [`MAX_DEPTH`] was reported.
    pub(crate) depth: usize,
    depth_reported: bool,
    /// Where includes and tables come from: the disk, or these files only.
    inputs: Option<InputFiles>,
}

impl Checker {
    fn new(root_dir: &Path) -> Checker {
        Checker {
            sources: Sources::default(),
            problems: Vec::new(),
            root_dir: std::fs::canonicalize(root_dir).unwrap_or_else(|_| root_dir.to_owned()),
            items: Vec::new(),
            header: Vec::new(),
            stages: Vec::new(),
            ensembles: Vec::new(),
            defs: Vec::new(),
            tables: Vec::new(),
            symbols: HashMap::new(),
            def_syntax: Vec::new(),
            slots: Vec::new(),
            stack: Vec::new(),
            def_item: Vec::new(),
            errors: 0,
            included: HashMap::new(),
            bytes_read: 0,
            depth: 0,
            depth_reported: false,
            inputs: None,
        }
    }

    pub(crate) fn error(&mut self, p: Problem) {
        if !p.warning {
            if self.errors >= MAX_ERRORS {
                return;
            }
            self.errors += 1;
        } else if self.problems.len() >= 2 * MAX_ERRORS {
            return;
        }
        self.problems.push(p);
    }

    /// True once [`MAX_ERRORS`] errors are collected: callers skip work that
    /// only improves a message no one will see (suggestions).
    pub(crate) fn error_limit_reached(&self) -> bool {
        self.errors >= MAX_ERRORS
    }

    /// Declare every definition, check every expression, assemble the model.
    fn finish(&mut self, options: &CheckOptions) -> Option<Model> {
        self.declare();
        self.apply_overrides(options);
        for id in 0..self.defs.len() {
            self.def_type(id);
        }
        self.check_finite_constants();
        self.check_def_extras();
        if self.errors == 0 {
            self.check_depths();
        }
        let header = self.check_header();
        let mut stages = self.check_stages(&header);
        let expects = self.check_expects(&header);
        let ensemble = self.check_ensemble();
        // Stage-local fluxes know their stage.
        for (id, def) in self.defs.iter_mut().enumerate() {
            if let DefKind::Flux { stage: Some(s), .. } = def.kind {
                if let Some(st) = stages.get_mut(s) {
                    st.fluxes.push(id);
                }
            }
        }
        for st in &mut stages {
            st.fluxes.sort_unstable();
        }
        let model = Model {
            name: header.name,
            title: header.title,
            start_age: header.start_age,
            end_age: header.end_age,
            cadence: header.cadence,
            solver: header.solver,
            defs: std::mem::take(&mut self.defs),
            tables: std::mem::take(&mut self.tables),
            stages,
            expects,
            ensemble,
            sources: self.sources.clone(),
        };
        // Only a model without errors has counts to estimate from.
        if self.errors == 0 {
            if let Some(span) = header.report_span {
                if let Some(p) = budget::report_memory(&model, span) {
                    self.error(p);
                }
            }
        }
        Some(model)
    }

    /// Type of a definition's value, checking its expression on first use.
    pub(crate) fn def_type(&mut self, id: DefId) -> expr::Typed {
        match self.slots[id].clone() {
            Slot::Done(t) => return t,
            Slot::InProgress => {
                self.report_cycle(id);
                return expr::Typed::error();
            }
            Slot::Todo => {}
        }
        if matches!(self.defs[id].kind, DefKind::Reservoir { .. }) {
            // A reservoir's value is its inventory: a mass, whatever the
            // initial expression says (checked separately).
            self.slots[id] = Slot::Done(expr::Typed::num(Dim::MASS, false));
        }
        let Some(stmt) = self.def_syntax[id].clone() else {
            return expr::Typed::error();
        };
        let Some(syn) = main_expr(&stmt) else {
            return expr::Typed::error();
        };
        if !matches!(self.slots[id], Slot::Done(_)) {
            self.slots[id] = Slot::InProgress;
        }
        self.stack.push(id);
        let (checked, typed) = self.check_expr(syn);
        self.stack.pop();
        let kind = self.defs[id].kind.clone();
        let result = match kind {
            DefKind::Reservoir { .. } => {
                self.expect_dim(
                    &typed,
                    Dim::MASS,
                    syn.span,
                    "the initial inventory of a reservoir",
                );
                self.expect_constant(&typed, syn.span, "the initial inventory");
                expr::Typed::num(Dim::MASS, false)
            }
            DefKind::State { .. } => {
                self.expect_constant(&typed, syn.span, "the initial value of a state");
                match typed.ty {
                    expr::Ty::Bool => {
                        self.error(
                            Problem::error("H0303", "a state variable must be a number")
                                .label(syn.span, "this is a condition")
                                .help("a condition is true or false; pick a number with `if C then A else B`"),
                        );
                        expr::Typed::error()
                    }
                    _ => expr::Typed {
                        constant: false,
                        ..typed
                    },
                }
            }
            DefKind::Const | DefKind::Param => {
                let what = format!(
                    "the value of {} `{}`",
                    self.defs[id].kind.word(),
                    self.defs[id].name
                );
                self.expect_constant(&typed, syn.span, &what);
                typed
            }
            DefKind::Flux { .. } => {
                if let expr::Ty::Num(d) = typed.ty {
                    if !d.same_base(Dim::MASS_RATE) {
                        self.error(
                            Problem::error(
                                "H0302",
                                format!("the rate of flux `{}` is not mass per time", self.defs[id].name),
                            )
                            .label(syn.span, format!("this is {}", d.words()))
                            .label(self.defs[id].span, "flux defined here")
                            .help("a flux moves water mass: give its rate in mass per time, e.g. `1e12 kg/yr` or `mass / 10 kyr`"),
                        );
                    }
                } else if typed.ty == expr::Ty::Bool {
                    self.expect_dim(&typed, Dim::MASS_RATE, syn.span, "a flux rate");
                }
                expr::Typed::num(Dim::MASS_RATE, false)
            }
            DefKind::Event => {
                if let expr::Ty::Num(d) = typed.ty {
                    self.error(
                        Problem::error("H0306", "an event needs a condition")
                            .label(syn.span, format!("this is a number ({})", d.words()))
                            .help("write a comparison, e.g. `land_fraction(hyps, volume) > 0`"),
                    );
                }
                typed
            }
            _ => typed,
        };
        if let expr::Ty::Num(d) = result.ty {
            self.defs[id].dim = d;
        }
        self.defs[id].expr = checked;
        if self.defs[id].display_unit.is_none() {
            if let syntax::ExprKind::Quantity { unit: Some(u), .. } = &syn.kind {
                if let Ok(unit) =
                    crate::units::combine(u.factors.iter().map(|f| (f.name.as_str(), f.power)))
                {
                    self.defs[id].display_unit = Some((u.text.clone(), unit));
                }
            }
        }
        self.slots[id] = Slot::Done(result);
        result
    }

    /// Constants and parameters are known now; one that is infinite or not
    /// a number (a division by zero, an overflow) is an error here rather
    /// than a failed run later.
    fn check_finite_constants(&mut self) {
        let model = self.partial_model();
        // One evaluator for all: each definition is folded once.
        let mut folder = expr::ConstEval::new(&model);
        for (id, def) in model.defs.iter().enumerate() {
            // Initial inventories and states too: the solver could only
            // report a non-finite start as a failed first step.
            let initial = matches!(def.kind, DefKind::Reservoir { .. } | DefKind::State { .. });
            if def.prelude || !(initial || matches!(def.kind, DefKind::Const | DefKind::Param)) {
                continue;
            }
            if matches!(self.slots[id], Slot::Done(t) if t.ty == expr::Ty::Error) {
                continue;
            }
            if let Some(v) = folder.eval(&def.expr) {
                if !v.is_finite() {
                    let what = if v.is_nan() {
                        "not a number (NaN)"
                    } else {
                        "infinite"
                    };
                    let of = if initial {
                        "the initial value of"
                    } else {
                        "the value of"
                    };
                    self.error(
                        Problem::error(
                            "H0303",
                            format!("{of} {} `{}` is {what}", def.kind.word(), def.name),
                        )
                        .label(def.expr.span, "not finite")
                        .help("look for a division by zero or a result too large for a number"),
                    );
                }
            }
        }
    }

    /// The H0406 problem for definitions that depend on each other in the
    /// order of `cycle`, with the names along it, the first again at the
    /// end (so `names[i + 1]` is what `cycle[i]` uses).
    pub(crate) fn cycle_problem(&self, cycle: &[DefId]) -> (Vec<String>, Problem) {
        let mut names: Vec<String> = cycle.iter().map(|&d| self.defs[d].name.clone()).collect();
        if let Some(first) = names.first().cloned() {
            names.push(first);
        }
        let p = Problem::error(
            "H0406",
            format!(
                "definitions depend on each other in a cycle: {}",
                names.join(" -> ")
            ),
        );
        (names, p)
    }

    fn report_cycle(&mut self, id: DefId) {
        let pos = self.stack.iter().position(|&d| d == id).unwrap_or(0);
        let cycle: Vec<DefId> = self.stack[pos..].to_vec();
        let (names, mut p) = self.cycle_problem(&cycle);
        for (i, &d) in cycle.iter().enumerate() {
            let next = &names[i + 1];
            p = p.label(
                self.defs[d].span,
                format!("`{}` uses `{next}`", self.defs[d].name),
            );
        }
        p = p.help(
            "break the cycle: one of these must be a state variable (with a rate) or a constant",
        );
        self.error(p);
    }

    pub(crate) fn expect_constant(&mut self, t: &expr::Typed, span: Span, what: &str) {
        if !t.constant && t.ty != expr::Ty::Error {
            self.error(
                Problem::error("H0407", format!("{what} must be known before the run"))
                    .label(span, "this changes during the run")
                    .help("use numbers, constants and parameters only; a value that changes needs `let` or `state`"),
            );
        }
    }

    pub(crate) fn expect_dim(
        &mut self,
        t: &expr::Typed,
        want: Dim,
        span: Span,
        what: &str,
    ) -> bool {
        match t.ty {
            expr::Ty::Error => false,
            expr::Ty::Bool => {
                self.error(
                    Problem::error(
                        "H0303",
                        format!("{what} must be {}, not a condition", want.words()),
                    )
                    .label(span, "this is a condition")
                    .help("a condition is true or false; pick a number with `if C then A else B`"),
                );
                false
            }
            expr::Ty::Num(d) => {
                // Ages and durations are different kinds of time: where one
                // is wanted, the other is an error.
                let ok = if want.same_base(Dim::TIME) {
                    d.same_base(want) && d.point == want.point
                } else {
                    d.same_base(want)
                };
                if !ok {
                    let mut p = Problem::error(
                        "H0303",
                        format!("{what} must be {}, found {}", want.words(), d.words()),
                    )
                    .label(span, format!("this is {}", d.words()));
                    p = p.help(expr::dim_hint(want, d));
                    self.error(p);
                }
                ok
            }
        }
    }
}

/// The expression that gives a definition statement its value (a
/// reservoir's or state's initial value, a flux's rate).
fn main_expr(stmt: &syntax::Stmt) -> Option<&syntax::Expr> {
    match &stmt.kind {
        StmtKind::Const { value, .. }
        | StmtKind::Param { value, .. }
        | StmtKind::Let { value, .. }
        | StmtKind::Output { value, .. } => Some(value),
        StmtKind::Event { condition, .. } => Some(condition),
        StmtKind::Reservoir { initial, .. } | StmtKind::State { initial, .. } => Some(initial),
        StmtKind::Flux { rate, .. } => Some(rate),
        _ => None,
    }
}

mod header;
