//! The checked model: every name resolved to a definition, every number in
//! internal units (kg, m, yr, K; ages in years before present) with a known
//! dimension. Produced by [`crate::check`], consumed by the graph, compile and
//! solve phases.
//!
//! Invariant: nothing here refers to syntax; spans are kept only so later
//! phases can point diagnostics at the source.

use std::fmt::Write;
use std::path::PathBuf;

use crate::builtins::{HypsRead, ReservoirRead};
use crate::span::{Sources, Span};
pub use crate::syntax::BinOp;
use crate::units::{Dim, Unit};

pub type DefId = usize;
pub type TableId = usize;

#[derive(Debug, Clone)]
pub struct Model {
    /// Scenario name; `None` for a library file (definitions only).
    pub name: Option<String>,
    pub title: Option<String>,
    /// Oldest age of the span, years before present.
    pub start_age: f64,
    /// Youngest age of the span, years before present.
    pub end_age: f64,
    /// Report cadence, years.
    pub cadence: f64,
    pub solver: SolverSettings,
    pub defs: Vec<Def>,
    pub tables: Vec<Table>,
    pub stages: Vec<Stage>,
    pub expects: Vec<Expect>,
    /// The ensemble block, if the scenario has one.
    pub ensemble: Option<EnsembleSpec>,
    pub sources: Sources,
}

/// Which parameters an ensemble varies, and how.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleSpec {
    /// Members to run; `None` means the size of the grid/list design (or
    /// 1000 when everything is random).
    pub members: Option<u64>,
    pub seed: u64,
    pub vary: Vec<Vary>,
    pub span: Span,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Vary {
    pub param: DefId,
    pub dist: Dist,
    /// Truncation bounds, internal units.
    pub min: Option<f64>,
    pub max: Option<f64>,
    pub span: Span,
}

/// A distribution of parameter values, in internal units.
#[derive(Debug, Clone, PartialEq)]
pub enum Dist {
    Uniform(f64, f64),
    LogUniform(f64, f64),
    Normal {
        mean: f64,
        sd: f64,
    },
    /// ln(x) is normal with mean ln(median) and standard deviation `sd_ln`.
    LogNormal {
        median: f64,
        sd_ln: f64,
    },
    /// Each value in turn (a design axis).
    List(Vec<f64>),
    /// `n` evenly spaced values from `lo` to `hi` inclusive (a design axis).
    Grid {
        lo: f64,
        hi: f64,
        n: u64,
    },
}

impl Dist {
    /// Number of points of a design axis; `None` for random distributions.
    pub fn axis_len(&self) -> Option<u64> {
        match self {
            Dist::List(v) => Some(v.len() as u64),
            Dist::Grid { n, .. } => Some(*n),
            _ => None,
        }
    }

    /// The fraction of a random distribution's mass between `min` and
    /// `max` (each optional), in 0..=1; 1 for a design axis, which
    /// `min`/`max` do not truncate.
    pub fn mass_between(&self, min: Option<f64>, max: Option<f64>) -> f64 {
        match self.standard_bounds(min, max) {
            Standard::Flat { a, b, x, y } => {
                if x >= y {
                    0.0
                } else {
                    ((y - x) / (b - a)).min(1.0)
                }
            }
            Standard::Normal { za, zb } => crate::numeric::truncation::normal_mass(za, zb),
            Standard::Axis => 1.0,
        }
    }

    /// The value at fraction `u` (in 0..1) of the part of a random
    /// distribution between `min` and `max`, by its inverse distribution
    /// function; `None` for a design axis.
    pub fn truncated_at(&self, min: Option<f64>, max: Option<f64>, u: f64) -> Option<f64> {
        let t = match self.standard_bounds(min, max) {
            Standard::Flat { x, y, .. } => x + (y - x) * u,
            Standard::Normal { za, zb } => crate::numeric::truncation::normal_between(za, zb, u),
            Standard::Axis => return None,
        };
        Some(match *self {
            Dist::Uniform(..) => t,
            Dist::LogUniform(..) => libm::exp(t),
            Dist::Normal { mean, sd } => mean + sd * t,
            Dist::LogNormal { median, sd_ln } => median * libm::exp(sd_ln * t),
            Dist::List(_) | Dist::Grid { .. } => return None,
        })
    }

    /// `min` and `max` on the scale where the distribution is a plain
    /// uniform or a standard normal (logarithms for the log forms; a bound
    /// at or below zero is no bound there).
    fn standard_bounds(&self, min: Option<f64>, max: Option<f64>) -> Standard {
        let lo = min.unwrap_or(f64::NEG_INFINITY);
        let hi = max.unwrap_or(f64::INFINITY);
        let ln = |x: f64| {
            if x > 0.0 {
                libm::log(x)
            } else {
                f64::NEG_INFINITY
            }
        };
        match *self {
            Dist::Uniform(a, b) => Standard::Flat {
                a,
                b,
                x: a.max(lo),
                y: b.min(hi),
            },
            Dist::LogUniform(a, b) => {
                let (a, b) = (libm::log(a), libm::log(b));
                Standard::Flat {
                    a,
                    b,
                    x: a.max(ln(lo)),
                    y: b.min(ln(hi)),
                }
            }
            Dist::Normal { mean, sd } => Standard::Normal {
                za: (lo - mean) / sd,
                zb: (hi - mean) / sd,
            },
            Dist::LogNormal { median, sd_ln } => {
                let m = libm::log(median);
                Standard::Normal {
                    za: (ln(lo) - m) / sd_ln,
                    zb: (ln(hi) - m) / sd_ln,
                }
            }
            Dist::List(_) | Dist::Grid { .. } => Standard::Axis,
        }
    }
}

/// A truncated distribution on its standard scale (see
/// [`Dist::standard_bounds`]).
enum Standard {
    /// Uniform on `a..b`, truncated to `x..y`.
    Flat { a: f64, b: f64, x: f64, y: f64 },
    /// The standard normal truncated to `za..zb`.
    Normal { za: f64, zb: f64 },
    /// A design axis: not truncated.
    Axis,
}

#[derive(Debug, Clone)]
pub struct Def {
    pub name: String,
    pub kind: DefKind,
    /// Dimension of the value (for a flux: mass per time).
    pub dim: Dim,
    /// The defining expression: value, initial inventory, rate of a flux, or
    /// condition of an event.
    pub expr: Expr,
    pub doc: Option<String>,
    /// Span of the defining statement's name.
    pub span: Span,
    /// Unit chosen for display: the `in UNIT` of an output, or the unit of a
    /// literal that is the whole definition.
    pub display_unit: Option<(String, Unit)>,
    /// Defined in the built-in prelude.
    pub prelude: bool,
}

#[derive(Debug, Clone)]
pub enum DefKind {
    Const,
    Param,
    Let,
    Output,
    Event,
    Table(TableId),
    Reservoir {
        capacity: Option<Expr>,
    },
    State {
        rate: Expr,
    },
    Flux {
        from: Endpoint,
        to: Endpoint,
        /// A flux declared inside a stage is active only there.
        stage: Option<usize>,
    },
}

impl DefKind {
    pub fn word(&self) -> &'static str {
        match self {
            DefKind::Const => "constant",
            DefKind::Param => "parameter",
            DefKind::Let => "derived quantity",
            DefKind::Output => "output",
            DefKind::Event => "event",
            DefKind::Table(_) => "table",
            DefKind::Reservoir { .. } => "reservoir",
            DefKind::State { .. } => "state variable",
            DefKind::Flux { .. } => "flux",
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Endpoint {
    Reservoir(DefId),
    Outside,
}

#[derive(Debug, Clone)]
pub struct Table {
    pub name: String,
    /// Path as written, relative to the including file.
    pub display_path: String,
    pub path: PathBuf,
    pub x_dim: Dim,
    pub y_dim: Dim,
    /// Knots in internal units, strictly increasing in x.
    pub xs: Vec<f64>,
    pub ys: Vec<f64>,
    /// blake3 of the file's bytes.
    pub hash: String,
}

#[derive(Debug, Clone)]
pub struct Stage {
    pub name: String,
    pub start_age: f64,
    pub end_age: f64,
    /// Parameter overrides: (parameter, constant value expression).
    pub sets: Vec<(DefId, Expr)>,
    /// Fluxes declared in this stage.
    pub fluxes: Vec<DefId>,
    /// The run's settings with this stage's own on top.
    pub solver: SolverSettings,
    pub span: Span,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    Auto,
    Explicit,
    Implicit,
}

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SolverSettings {
    pub rtol: f64,
    pub atol: f64,
    pub method: Method,
    /// Largest step, years; `None` is no limit beyond the stage length.
    pub max_step: Option<f64>,
    pub initial_step: Option<f64>,
    pub max_steps: u64,
    pub budget_tolerance: f64,
}

impl Default for SolverSettings {
    fn default() -> Self {
        SolverSettings {
            rtol: 1e-8,
            atol: 1e-10,
            method: Method::Auto,
            max_step: None,
            initial_step: None,
            max_steps: 1_000_000,
            budget_tolerance: 1e-9,
        }
    }
}

#[derive(Debug, Clone)]
pub struct Expect {
    pub subject: Expr,
    pub check: ExpectCheck,
    pub span: Span,
    /// The statement as written, for reports.
    pub text: String,
    /// Unit for showing the subject's value: that of the target, bound or
    /// range as written (internal units when none is written; Ga for events).
    pub display: Option<(String, Unit)>,
}

#[derive(Debug, Clone)]
pub enum ExpectCheck {
    Target {
        age: f64,
        value: Expr,
        sigma: Expr,
    },
    Range {
        age: f64,
        low: Expr,
        high: Expr,
    },
    Bound {
        age: f64,
        op: crate::syntax::CmpOp,
        value: Expr,
    },
    Event {
        event: DefId,
        before: bool,
        age: f64,
    },
}

/// A checked expression node.
#[derive(Debug, Clone, PartialEq)]
pub struct Expr {
    pub kind: ExprKind,
    pub span: Span,
}

#[derive(Debug, Clone, PartialEq)]
pub enum ExprKind {
    /// A number in internal units (booleans are 0 and 1).
    Num(f64),
    Ref(DefId),
    Age,
    Time,
    Neg(Box<Expr>),
    Not(Box<Expr>),
    Binary(BinOp, Box<Expr>, Box<Expr>),
    If(Box<Expr>, Box<Expr>, Box<Expr>),
    Call(Builtin, Vec<Expr>),
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Builtin {
    /// A function of numbers: a row of `builtins::BUILTINS`, which holds its
    /// name, dimension rule, kernel and compilation.
    Num(crate::builtins::Func),
    Decay,
    Capacity(DefId),
    Fill(DefId),
    Excess(DefId),
    Interp(TableId),
    SeaLevel(TableId),
    SeaLevelIsostatic(TableId),
    LandFraction(TableId),
    BasinVolume(TableId),
}

impl Expr {
    /// Every definition this expression refers to directly, including the
    /// reservoirs behind `capacity`/`fill`/`excess` and the tables it reads.
    pub fn refs(&self, out: &mut Vec<Ref>) {
        match &self.kind {
            ExprKind::Num(_) | ExprKind::Age | ExprKind::Time => {}
            ExprKind::Ref(d) => out.push(Ref::Def(*d)),
            ExprKind::Neg(e) | ExprKind::Not(e) => e.refs(out),
            ExprKind::Binary(_, a, b) => {
                a.refs(out);
                b.refs(out);
            }
            ExprKind::If(c, a, b) => {
                c.refs(out);
                a.refs(out);
                b.refs(out);
            }
            ExprKind::Call(f, args) => {
                match f {
                    Builtin::Capacity(r) | Builtin::Fill(r) | Builtin::Excess(r) => {
                        out.push(Ref::Capacity(*r));
                        if !matches!(f, Builtin::Capacity(_)) {
                            out.push(Ref::Def(*r));
                        }
                    }
                    Builtin::Interp(t)
                    | Builtin::SeaLevel(t)
                    | Builtin::SeaLevelIsostatic(t)
                    | Builtin::LandFraction(t)
                    | Builtin::BasinVolume(t) => out.push(Ref::Table(*t)),
                    Builtin::Num(_) | Builtin::Decay => {}
                }
                for a in args {
                    a.refs(out);
                }
            }
        }
    }

    /// Whether the expression reads the clock (age or time).
    pub fn reads_clock(&self) -> bool {
        match &self.kind {
            ExprKind::Age | ExprKind::Time => true,
            ExprKind::Num(_) | ExprKind::Ref(_) => false,
            ExprKind::Neg(e) | ExprKind::Not(e) => e.reads_clock(),
            ExprKind::Binary(_, a, b) => a.reads_clock() || b.reads_clock(),
            ExprKind::If(c, a, b) => c.reads_clock() || a.reads_clock() || b.reads_clock(),
            ExprKind::Call(f, args) => {
                matches!(f, Builtin::Decay) || args.iter().any(|a| a.reads_clock())
            }
        }
    }
}

/// What an expression depends on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Ref {
    Def(DefId),
    /// The capacity expression of a reservoir.
    Capacity(DefId),
    Table(TableId),
}

impl Model {
    pub fn is_library(&self) -> bool {
        self.name.is_none()
    }

    pub fn find(&self, name: &str) -> Option<DefId> {
        self.defs.iter().position(|d| d.name == name)
    }

    /// Reservoirs in the order of their names (the state vector's order).
    pub fn reservoirs(&self) -> impl Iterator<Item = (DefId, &Def)> {
        self.by_name(|k| matches!(k, DefKind::Reservoir { .. }))
    }

    /// States in the order of their names.
    pub fn states(&self) -> impl Iterator<Item = (DefId, &Def)> {
        self.by_name(|k| matches!(k, DefKind::State { .. }))
    }

    fn by_name(&self, kind: impl Fn(&DefKind) -> bool) -> impl Iterator<Item = (DefId, &Def)> {
        self.ids_by_name(kind)
            .into_iter()
            .map(move |i| (i, &self.defs[i]))
    }

    /// Definitions of one kind in the order of their names. Everything a run
    /// sums, lays out or writes follows this order, never the order of
    /// declaration, so reordering a file changes no bit of any result (and
    /// the stage cache, blind to declaration order, relies on that).
    pub fn ids_by_name(&self, kind: impl Fn(&DefKind) -> bool) -> Vec<DefId> {
        let mut ids: Vec<DefId> = (0..self.defs.len())
            .filter(|&i| kind(&self.defs[i].kind))
            .collect();
        ids.sort_by(|&a, &b| self.defs[a].name.cmp(&self.defs[b].name));
        ids
    }

    /// A formatting-independent text of an expression: numbers in internal
    /// units with shortest round-trip digits, names resolved, no redundant
    /// parentheses. Two spellings of the same model print the same.
    pub fn canonical_expr(&self, expr: &Expr) -> String {
        let mut out = String::new();
        self.write_canonical(&mut out, expr);
        out
    }

    fn write_canonical(&self, out: &mut String, expr: &Expr) {
        match &expr.kind {
            ExprKind::Num(v) => {
                let mut buf = ryu::Buffer::new();
                out.push_str(buf.format(*v));
            }
            ExprKind::Ref(d) => out.push_str(&self.defs[*d].name),
            ExprKind::Age => out.push_str("age"),
            ExprKind::Time => out.push_str("time"),
            ExprKind::Neg(e) => {
                out.push_str("(neg ");
                self.write_canonical(out, e);
                out.push(')');
            }
            ExprKind::Not(e) => {
                out.push_str("(not ");
                self.write_canonical(out, e);
                out.push(')');
            }
            ExprKind::Binary(op, a, b) => {
                let _ = write!(out, "({} ", op.symbol());
                self.write_canonical(out, a);
                out.push(' ');
                self.write_canonical(out, b);
                out.push(')');
            }
            ExprKind::If(c, a, b) => {
                out.push_str("(if ");
                self.write_canonical(out, c);
                out.push(' ');
                self.write_canonical(out, a);
                out.push(' ');
                self.write_canonical(out, b);
                out.push(')');
            }
            ExprKind::Call(f, args) => {
                out.push('(');
                out.push_str(&self.builtin_name(*f));
                for a in args {
                    out.push(' ');
                    self.write_canonical(out, a);
                }
                out.push(')');
            }
        }
    }

    pub fn builtin_name(&self, f: Builtin) -> String {
        match f {
            Builtin::Num(f) => f.name().into(),
            Builtin::Decay => crate::builtins::DECAY.into(),
            Builtin::Capacity(r) => self.read_name(ReservoirRead::Capacity, r),
            Builtin::Fill(r) => self.read_name(ReservoirRead::Fill, r),
            Builtin::Excess(r) => self.read_name(ReservoirRead::Excess, r),
            Builtin::Interp(t) => format!("table {}", self.tables[t].name),
            Builtin::SeaLevel(t) => self.hyps_name(HypsRead::SeaLevel, t),
            Builtin::SeaLevelIsostatic(t) => self.hyps_name(HypsRead::SeaLevelIsostatic, t),
            Builtin::LandFraction(t) => self.hyps_name(HypsRead::LandFraction, t),
            Builtin::BasinVolume(t) => self.hyps_name(HypsRead::BasinVolume, t),
        }
    }

    fn read_name(&self, read: ReservoirRead, r: DefId) -> String {
        format!("{} {}", read.name(), self.defs[r].name)
    }

    fn hyps_name(&self, read: HypsRead, t: TableId) -> String {
        format!("{} {}", read.name(), self.tables[t].name)
    }

    /// The canonical text of one definition: kind, name, dimension and every
    /// expression it carries. Comments, layout and declaration order do not
    /// enter it.
    pub fn canonical_def(&self, id: DefId) -> String {
        let d = &self.defs[id];
        let mut out = String::with_capacity(128);
        out.push_str(d.kind.word());
        out.push(' ');
        out.push_str(&d.name);
        out.push_str(" [");
        d.dim.push_debug(&mut out);
        out.push_str("] = ");
        out.push_str(&self.canonical_expr(&d.expr));
        match &d.kind {
            DefKind::Reservoir { capacity: Some(c) } => {
                out.push_str(" capacity ");
                out.push_str(&self.canonical_expr(c));
            }
            DefKind::State { rate } => {
                out.push_str(" rate ");
                out.push_str(&self.canonical_expr(rate));
            }
            DefKind::Flux { from, to, stage } => {
                let ep = |e: &Endpoint| match e {
                    Endpoint::Outside => "outside".to_owned(),
                    Endpoint::Reservoir(r) => self.defs[*r].name.clone(),
                };
                let _ = write!(out, " from {} to {}", ep(from), ep(to));
                if let Some(s) = stage {
                    let _ = write!(out, " in stage {}", self.stages[*s].name);
                }
            }
            DefKind::Table(t) => {
                let _ = write!(out, " table {}", self.tables[*t].hash);
            }
            _ => {}
        }
        out
    }
}
