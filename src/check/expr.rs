//! Names and dimensions of expressions.

use super::Checker;
use crate::builtins::{self, Dims, Form, HypsRead, ReservoirRead};
use crate::diagnostic::{nearest, Problem};
use crate::model::{Builtin, DefId, DefKind, Expr, ExprKind, Model};
use crate::numeric::hyps::Hypsometry;
use crate::span::Span;
use crate::syntax::{self, BinOp, UnOp, UnitText};
use crate::units::{self, Dim, UnitError};

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ty {
    Num(Dim),
    Bool,
    /// Already reported; suppresses follow-on errors.
    Error,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Typed {
    pub ty: Ty,
    /// Depends only on numbers, constants and parameters.
    pub constant: bool,
}

impl Typed {
    pub fn num(dim: Dim, constant: bool) -> Typed {
        Typed {
            ty: Ty::Num(dim),
            constant,
        }
    }
    pub fn error() -> Typed {
        Typed {
            ty: Ty::Error,
            constant: true,
        }
    }
}

/// Names with a fixed meaning that no definition may take.
pub fn is_reserved(name: &str) -> bool {
    matches!(name, "age" | "time" | "outside") || builtins::lookup(name).is_some()
}

/// A hint for a dimension mismatch.
pub fn dim_hint(want: Dim, found: Dim) -> String {
    if want.is_age() && found.same_base(Dim::TIME) {
        return "ages are written in Ga, Ma or ka (points before present); Gyr, Myr, kyr and yr are durations".into();
    }
    if want.same_base(Dim::TIME) && !want.point && found.is_age() {
        return "a duration is written in Gyr, Myr, kyr or yr; Ga, Ma and ka are ages".into();
    }
    // found = want * time: one time too many.
    if found.per(want).is_some_and(|f| f.same_base(Dim::TIME)) {
        return "divide by a time, e.g. `/ 1 Myr`, to make a rate".into();
    }
    // want = found * time: a rate where an amount belongs.
    if want.per(found).is_some_and(|f| f.same_base(Dim::TIME)) {
        return "multiply a rate by a time, e.g. `* 1 Myr`, to make an amount".into();
    }
    format!(
        "expected {}; check the units of the numbers and names involved",
        want.words()
    )
}

impl Checker {
    pub(crate) fn unit_error(&mut self, u: &UnitText, e: UnitError) {
        match e {
            UnitError::Unknown(i, name) => {
                let span = u.factors.get(i).map_or(u.span, |f| f.span);
                let mut p = Problem::error("H0203", format!("unknown unit `{name}`"))
                    .label(span, "not a unit");
                if self.symbols.contains_key(&name) {
                    p = p.help(format!(
                        "`{name}` is a definition, not a unit: write a product with `*`, e.g. `2 * {name}`"
                    ));
                } else if let Some(s) = units::suggest(&name) {
                    p = p.help(format!("did you mean `{s}`?"));
                } else {
                    p = p.help("see the list of units in docs/language.md");
                }
                self.error(p);
            }
            UnitError::Overflow => self.error(
                Problem::error(
                    "H0203",
                    format!("the unit `{}` has too large a power", u.text),
                )
                .label(u.span, "power too large"),
            ),
        }
    }

    fn names_in_scope(&self) -> Vec<&str> {
        if self.error_limit_reached() {
            // The problem will not be kept; a suggestion would cost a pass
            // over every name for nothing.
            return Vec::new();
        }
        let mut v: Vec<&str> = self.symbols.keys().map(String::as_str).collect();
        v.extend(["age", "time"]);
        v.sort_unstable();
        v
    }

    /// Resolve names and compute the dimension of an expression, counting
    /// how deep the checker is nested (through the definitions it checks on
    /// first use) so that no input exhausts the stack.
    pub(crate) fn check_expr(&mut self, e: &syntax::Expr) -> (Expr, Typed) {
        if self.depth >= super::MAX_DEPTH {
            self.depth_problem(e.span);
            let placeholder = Expr {
                kind: ExprKind::Num(0.0),
                span: e.span,
            };
            return (placeholder, Typed::error());
        }
        self.depth += 1;
        let result = crate::stack::guard(|| self.check_expr_inner(e));
        self.depth -= 1;
        result
    }

    fn check_expr_inner(&mut self, e: &syntax::Expr) -> (Expr, Typed) {
        let span = e.span;
        let mk = |kind| Expr { kind, span };
        match &e.kind {
            syntax::ExprKind::Quantity { value, unit, text } => {
                if !value.is_finite() {
                    self.error(
                        Problem::error("H0303", format!("the number `{text}` is too large"))
                            .label(span, "beyond the range of a 64-bit float"),
                    );
                    return (mk(ExprKind::Num(0.0)), Typed::error());
                }
                match unit {
                    None => (mk(ExprKind::Num(*value)), Typed::num(Dim::NONE, true)),
                    Some(u) => {
                        match units::combine(u.factors.iter().map(|f| (f.name.as_str(), f.power))) {
                            Ok(unit) => (
                                mk(ExprKind::Num(unit.to_internal(*value))),
                                Typed::num(unit.dim, true),
                            ),
                            Err(err) => {
                                self.unit_error(u, err);
                                (mk(ExprKind::Num(0.0)), Typed::error())
                            }
                        }
                    }
                }
            }
            syntax::ExprKind::Name(id) => self.check_name(id),
            syntax::ExprKind::Paren(inner) => self.check_expr(inner),
            syntax::ExprKind::Unary { op, operand } => {
                // `-20 degC` is minus twenty degrees Celsius (253.15 K), not
                // the negation of 293.15 K: a negative literal in a unit with
                // an offset is converted as one number.
                if let (
                    UnOp::Neg,
                    syntax::ExprKind::Quantity {
                        value,
                        unit: Some(u),
                        ..
                    },
                ) = (op, &operand.kind)
                {
                    if let Ok(unit) =
                        units::combine(u.factors.iter().map(|f| (f.name.as_str(), f.power)))
                    {
                        if unit.offset != 0.0 && value.is_finite() {
                            return (
                                mk(ExprKind::Num(unit.to_internal(-*value))),
                                Typed::num(unit.dim, true),
                            );
                        }
                    }
                }
                let (x, t) = self.check_expr(operand);
                match op {
                    UnOp::Neg => {
                        let ty = match t.ty {
                            Ty::Num(d) => Ty::Num(d.plain()),
                            Ty::Bool => {
                                self.error(
                                    Problem::error("H0306", "cannot negate a condition")
                                        .label(operand.span, "this is a condition")
                                        .help("use `not` for conditions"),
                                );
                                Ty::Error
                            }
                            Ty::Error => Ty::Error,
                        };
                        (mk(ExprKind::Neg(Box::new(x))), Typed { ty, ..t })
                    }
                    UnOp::Not => {
                        let ty = self.want_bool(t, operand.span, "`not`");
                        (mk(ExprKind::Not(Box::new(x))), Typed { ty, ..t })
                    }
                }
            }
            syntax::ExprKind::Binary { op, lhs, rhs } => {
                let (a, ta) = self.check_expr(lhs);
                let (b, tb) = self.check_expr(rhs);
                let constant = ta.constant && tb.constant;
                let ty = self.binary_type(*op, lhs, rhs, ta.ty, tb.ty, &b);
                (
                    mk(ExprKind::Binary(*op, Box::new(a), Box::new(b))),
                    Typed { ty, constant },
                )
            }
            syntax::ExprKind::If {
                cond,
                then,
                otherwise,
            } => {
                let (c, tc) = self.check_expr(cond);
                self.want_bool(tc, cond.span, "`if`");
                let (a, ta) = self.check_expr(then);
                let (b, tb) = self.check_expr(otherwise);
                let ty = match (ta.ty, tb.ty) {
                    (Ty::Error, _) | (_, Ty::Error) => Ty::Error,
                    (Ty::Bool, Ty::Bool) => Ty::Bool,
                    (Ty::Num(x), Ty::Num(y)) if x.same_base(y) => {
                        if x.same_base(Dim::TIME) && x.point != y.point {
                            self.mismatch(then, otherwise, x, y, "the two branches of `if` differ");
                            Ty::Error
                        } else {
                            Ty::Num(Dim {
                                point: x.point && y.point,
                                ..x
                            })
                        }
                    }
                    (Ty::Num(x), Ty::Num(y)) => {
                        self.mismatch(then, otherwise, x, y, "the two branches of `if` differ");
                        Ty::Error
                    }
                    _ => {
                        self.error(
                            Problem::error(
                                "H0306",
                                "one branch of `if` is a condition and the other a number",
                            )
                            .label(then.span, "then")
                            .label(otherwise.span, "else")
                            .help("both branches must be numbers of one dimension, or both conditions"),
                        );
                        Ty::Error
                    }
                };
                let constant = tc.constant && ta.constant && tb.constant;
                (
                    mk(ExprKind::If(Box::new(c), Box::new(a), Box::new(b))),
                    Typed { ty, constant },
                )
            }
            syntax::ExprKind::Call { func, args } => self.check_call(func, args, span),
        }
    }

    fn check_name(&mut self, id: &syntax::Ident) -> (Expr, Typed) {
        let span = id.span;
        match id.text.as_str() {
            "age" => {
                return (
                    Expr {
                        kind: ExprKind::Age,
                        span,
                    },
                    Typed::num(Dim::AGE, false),
                )
            }
            "time" => {
                return (
                    Expr {
                        kind: ExprKind::Time,
                        span,
                    },
                    Typed::num(Dim::TIME, false),
                )
            }
            _ => {}
        }
        let Some(def) = self.symbols.get(&id.text).copied() else {
            let mut p = Problem::error("H0201", format!("unknown name `{}`", id.text))
                .label(span, "not defined");
            if builtins::lookup(&id.text).is_some() {
                p = p.help(format!(
                    "`{}` is a function: call it, e.g. `{}(x)`",
                    id.text, id.text
                ));
            } else if id.text == "outside" {
                p = p.help("`outside` may only stand at either end of a flux");
            } else if let Some(s) = nearest(&id.text, self.names_in_scope()) {
                p = p.help(format!("did you mean `{s}`?"));
            } else {
                p = p.help("define it with `const`, `param`, `let`, `reservoir` or `state`");
            }
            self.error(p);
            return (
                Expr {
                    kind: ExprKind::Num(0.0),
                    span,
                },
                Typed::error(),
            );
        };
        let kind = self.defs[def].kind.clone();
        let typed = match kind {
            DefKind::Table(_) => {
                self.error(
                    Problem::error("H0206", format!("`{}` is a table", id.text))
                        .label(span, "a table, not a value")
                        .help(format!("look a value up by calling it: `{}(x)`", id.text)),
                );
                Typed::error()
            }
            DefKind::Flux { .. } => {
                self.error(
                    Problem::error("H0206", format!("`{}` is a flux", id.text))
                        .label(span, "fluxes cannot be read in expressions")
                        .help("define the rate with `let` and use that name in both places"),
                );
                Typed::error()
            }
            DefKind::Event => {
                self.error(
                    Problem::error("H0206", format!("`{}` is an event", id.text))
                        .label(span, "an event is reported, not read")
                        .help("use the event's condition in a `let` if you need it as a value"),
                );
                Typed::error()
            }
            DefKind::Reservoir { .. } => Typed::num(Dim::MASS, false),
            DefKind::State { .. } => {
                let t = self.def_type(def);
                Typed {
                    constant: false,
                    ..t
                }
            }
            DefKind::Output => {
                let t = self.def_type(def);
                Typed {
                    constant: false,
                    ..t
                }
            }
            DefKind::Const | DefKind::Param | DefKind::Let => self.def_type(def),
        };
        (
            Expr {
                kind: ExprKind::Ref(def),
                span,
            },
            typed,
        )
    }

    fn want_bool(&mut self, t: Typed, span: Span, what: &str) -> Ty {
        match t.ty {
            Ty::Bool => Ty::Bool,
            Ty::Error => Ty::Error,
            Ty::Num(d) => {
                self.error(
                    Problem::error("H0306", format!("{what} needs a condition"))
                        .label(span, format!("this is a number ({})", d.words()))
                        .help("write a comparison such as `x > 0 kg`"),
                );
                Ty::Error
            }
        }
    }

    fn mismatch(&mut self, a: &syntax::Expr, b: &syntax::Expr, da: Dim, db: Dim, msg: &str) {
        let mut p = Problem::error(
            "H0301",
            format!("{msg}: {} against {}", da.words(), db.words()),
        )
        .label(a.span, da.words())
        .label(b.span, db.words());
        p = p.help(if da.same_base(Dim::TIME) && da.point != db.point {
            "ages (Ga, Ma, ka) are points before present; durations (Gyr, Myr, kyr, yr) are lengths of time".to_owned()
        } else {
            "both sides must have the same dimension; check the units".to_owned()
        });
        self.error(p);
    }

    fn binary_type(
        &mut self,
        op: BinOp,
        lhs: &syntax::Expr,
        rhs: &syntax::Expr,
        a: Ty,
        b: Ty,
        rhs_checked: &Expr,
    ) -> Ty {
        if a == Ty::Error || b == Ty::Error {
            return if op.is_comparison() || matches!(op, BinOp::And | BinOp::Or) {
                Ty::Bool
            } else {
                Ty::Error
            };
        }
        match op {
            BinOp::And | BinOp::Or => {
                let word = if op == BinOp::And { "`and`" } else { "`or`" };
                let x = self.want_bool(
                    Typed {
                        ty: a,
                        constant: true,
                    },
                    lhs.span,
                    word,
                );
                let y = self.want_bool(
                    Typed {
                        ty: b,
                        constant: true,
                    },
                    rhs.span,
                    word,
                );
                if x == Ty::Error || y == Ty::Error {
                    Ty::Error
                } else {
                    Ty::Bool
                }
            }
            _ => {
                let (Ty::Num(da), Ty::Num(db)) = (a, b) else {
                    self.error(
                        Problem::error(
                            "H0306",
                            format!("`{}` needs numbers, not conditions", op.symbol()),
                        )
                        .label(
                            if a == Ty::Bool { lhs.span } else { rhs.span },
                            "a condition",
                        )
                        .help("wrap a condition in `if C then 1 else 0` to use it as a number"),
                    );
                    return Ty::Error;
                };
                self.numeric_binary(op, lhs, rhs, da, db, rhs_checked)
            }
        }
    }

    fn numeric_binary(
        &mut self,
        op: BinOp,
        lhs: &syntax::Expr,
        rhs: &syntax::Expr,
        da: Dim,
        db: Dim,
        rhs_checked: &Expr,
    ) -> Ty {
        match op {
            BinOp::Add | BinOp::Sub => {
                if !da.same_base(db) {
                    let verb = if op == BinOp::Add { "add" } else { "subtract" };
                    self.mismatch(lhs, rhs, da, db, &format!("cannot {verb} these"));
                    return Ty::Error;
                }
                let is_time = da.same_base(Dim::TIME);
                match (op, da.point, db.point) {
                    (BinOp::Add, true, true) => {
                        let what = if is_time {
                            "two ages"
                        } else {
                            "two absolute temperatures"
                        };
                        let help = if is_time {
                            "an age plus a duration is an age: write the second one in Gyr, Myr or kyr"
                        } else {
                            "a temperature difference is written in K: `200 degC` is 473.15 K; for +200 degrees write `200 K`"
                        };
                        self.error(
                            Problem::error("H0305", format!("cannot add {what}"))
                                .label(lhs.span, da.words())
                                .label(rhs.span, db.words())
                                .help(help),
                        );
                        Ty::Error
                    }
                    (BinOp::Sub, true, true) => Ty::Num(da.plain()),
                    (_, true, false) => Ty::Num(da),
                    (BinOp::Add, false, true) => Ty::Num(db),
                    (BinOp::Sub, false, true) if is_time => {
                        self.error(
                            Problem::error("H0307", "cannot subtract an age from a duration")
                                .label(rhs.span, "an age")
                                .help("subtract two ages to get a duration, e.g. `4.5 Ga - age`"),
                        );
                        Ty::Error
                    }
                    _ => Ty::Num(da.plain()),
                }
            }
            BinOp::Mul => match da.times(db) {
                Some(d) => Ty::Num(d),
                None => self.overflow(lhs.span.join(rhs.span)),
            },
            BinOp::Div => match da.per(db) {
                Some(d) => Ty::Num(d),
                None => self.overflow(lhs.span.join(rhs.span)),
            },
            BinOp::Pow => {
                if !db.is_dimensionless() {
                    self.error(
                        Problem::error("H0304", "an exponent must be dimensionless")
                            .label(rhs.span, format!("this is {}", db.words()))
                            .help("divide by a reference value to make it a pure number"),
                    );
                    return Ty::Error;
                }
                if da.is_dimensionless() {
                    return Ty::Num(Dim::NONE);
                }
                match integer_literal(rhs_checked) {
                    Some(n) => match da.plain().powi(n) {
                        Some(d) => Ty::Num(d),
                        None => self.overflow(lhs.span.join(rhs.span)),
                    },
                    None => {
                        self.error(
                            Problem::error(
                                "H0304",
                                format!(
                                    "cannot raise {} to a non-integer or variable power",
                                    da.words()
                                ),
                            )
                            .label(lhs.span, da.words())
                            .label(rhs.span, "not an integer number")
                            .help(
                                "normalize the base first, e.g. `((T - T_s) / (T_ref - T_s))^1.3`",
                            ),
                        );
                        Ty::Error
                    }
                }
            }
            _ => {
                // Comparisons.
                if !da.same_base(db) {
                    self.mismatch(lhs, rhs, da, db, "cannot compare these");
                    return Ty::Bool;
                }
                if da.same_base(Dim::TIME) && da.point != db.point {
                    self.error(
                        Problem::error("H0307", "cannot compare an age with a duration")
                            .label(lhs.span, da.words())
                            .label(rhs.span, db.words())
                            .help("ages are written in Ga, Ma or ka; durations in Gyr, Myr, kyr or yr"),
                    );
                }
                Ty::Bool
            }
        }
    }

    fn overflow(&mut self, span: Span) -> Ty {
        self.error(
            Problem::error(
                "H0304",
                "the dimension of this expression has too large a power",
            )
            .label(span, "here")
            .help(
                "no physical quantity has such powers; check the powers and repeated products here",
            ),
        );
        Ty::Error
    }

    fn check_call(
        &mut self,
        func: &syntax::Ident,
        args: &[syntax::Expr],
        span: Span,
    ) -> (Expr, Typed) {
        let name = func.text.as_str();
        let fail = |c: &mut Checker| {
            let _ = c;
            (
                Expr {
                    kind: ExprKind::Num(0.0),
                    span,
                },
                Typed::error(),
            )
        };
        // A table called as a function.
        if let Some(&def) = self.symbols.get(name) {
            if let DefKind::Table(t) = self.defs[def].kind {
                if !self.arity(func, args, 1, 1) {
                    return fail(self);
                }
                let (x, tx) = self.check_expr(&args[0]);
                let xd = self.tables.get(t).map(|t| (t.x_dim, t.y_dim));
                let Some((x_dim, y_dim)) = xd else {
                    return fail(self);
                };
                let what = format!("the argument of table `{name}`");
                self.expect_dim(&tx, x_dim, args[0].span, &what);
                return (
                    Expr {
                        kind: ExprKind::Call(Builtin::Interp(t), vec![x]),
                        span,
                    },
                    Typed::num(y_dim, tx.constant),
                );
            }
            if builtins::lookup(name).is_none() {
                let word = self.defs[def].kind.word();
                self.error(
                    Problem::error("H0204", format!("`{name}` is a {word}, not a function"))
                        .label(func.span, "cannot be called")
                        .help("only built-in functions and tables can be called"),
                );
                return fail(self);
            }
        }
        let Some(spec) = builtins::lookup(name) else {
            let mut candidates: Vec<&str> = builtins::names().collect();
            let tables: Vec<String> = self
                .defs
                .iter()
                .filter(|d| matches!(d.kind, DefKind::Table(_)))
                .map(|d| d.name.clone())
                .collect();
            candidates.extend(tables.iter().map(String::as_str));
            let mut p = Problem::error("H0204", format!("unknown function `{name}`"))
                .label(func.span, "not a built-in function or table");
            p = match nearest(name, candidates.iter().copied()) {
                Some(s) => p.help(format!("did you mean `{s}`?")),
                None => p.help(format!(
                    "the built-in functions are: {}",
                    builtins::names().collect::<Vec<_>>().join(", ")
                )),
            };
            self.error(p);
            // Check the arguments anyway, for their own errors.
            for a in args {
                self.check_expr(a);
            }
            return fail(self);
        };
        let (lo, hi) = spec.arity().range();
        if !self.arity(func, args, lo, hi) {
            return fail(self);
        }
        match &spec.form {
            Form::Num(num) => {
                let f = Builtin::Num(builtins::Func::new(spec, num));
                let typed = match num.dims {
                    Dims::Dimensionless => self.dimensionless_args(name, args),
                    Dims::Root | Dims::Magnitude => self.root_or_magnitude(name, num.dims, args),
                    Dims::Alike | Dims::AlikeToNumber => self.alike_args(name, num.dims, args),
                };
                match typed {
                    Some((xs, t)) => self.call(f, xs, span, t),
                    None => fail(self),
                }
            }
            Form::Decay => {
                let (q, tq) = self.check_expr(&args[0]);
                let (h, th) = self.check_expr(&args[1]);
                self.expect_dim(&th, Dim::TIME, args[1].span, "a half-life");
                let ty = match tq.ty {
                    Ty::Num(d) => Ty::Num(d.plain()),
                    Ty::Bool => {
                        self.condition_argument(name, args[0].span);
                        Ty::Error
                    }
                    Ty::Error => Ty::Error,
                };
                self.call(
                    Builtin::Decay,
                    vec![q, h],
                    span,
                    Typed {
                        ty,
                        constant: false,
                    },
                )
            }
            &Form::Reservoir(read) => {
                let Some(r) = self.reservoir_arg(name, &args[0]) else {
                    return fail(self);
                };
                let f = match read {
                    ReservoirRead::Capacity => Builtin::Capacity(r),
                    ReservoirRead::Fill => Builtin::Fill(r),
                    ReservoirRead::Excess => Builtin::Excess(r),
                };
                self.call(f, vec![], span, Typed::num(read.result(), false))
            }
            &Form::Hypsometry(read) => {
                let Some(t) = self.hypsometry_arg(name, &args[0]) else {
                    return fail(self);
                };
                let (x, tx) = self.check_expr(&args[1]);
                let mut xs = vec![x];
                let mut constant = tx.constant;
                let f = match read {
                    HypsRead::SeaLevel => Builtin::SeaLevel(t),
                    HypsRead::LandFraction => Builtin::LandFraction(t),
                    HypsRead::BasinVolume => Builtin::BasinVolume(t),
                    HypsRead::SeaLevelIsostatic => Builtin::SeaLevelIsostatic(t),
                };
                let want = read.argument();
                let what = if want == Dim::VOLUME {
                    "the water volume"
                } else {
                    "the elevation"
                };
                self.expect_dim(&tx, want, args[1].span, what);
                for a in &args[2..] {
                    let (x, t) = self.check_expr(a);
                    self.expect_dim(&t, Dim::DENSITY, a.span, "a density");
                    constant &= t.constant;
                    xs.push(x);
                }
                self.call(f, xs, span, Typed::num(read.result(), constant))
            }
        }
    }

    /// The argument of `exp`, `ln` and the like: dimensionless, as is the
    /// result.
    fn dimensionless_args(
        &mut self,
        name: &str,
        args: &[syntax::Expr],
    ) -> Option<(Vec<Expr>, Typed)> {
        let (x, t) = self.check_expr(&args[0]);
        if !self.expect_dim(
            &t,
            Dim::NONE,
            args[0].span,
            &format!("the argument of `{name}`"),
        ) {
            return None;
        }
        Some((vec![x], Typed::num(Dim::NONE, t.constant)))
    }

    /// The argument of `sqrt` (whose powers are halved) or `abs` (whose
    /// dimension is kept, as a difference).
    fn root_or_magnitude(
        &mut self,
        name: &str,
        dims: Dims,
        args: &[syntax::Expr],
    ) -> Option<(Vec<Expr>, Typed)> {
        let (x, t) = self.check_expr(&args[0]);
        let ty = match t.ty {
            Ty::Num(d) if dims == Dims::Magnitude => Ty::Num(d.plain()),
            Ty::Num(d) => match d.sqrt() {
                Some(r) => Ty::Num(r),
                None => {
                    self.error(
                        Problem::error(
                            "H0304",
                            format!("cannot take the square root of {}", d.words()),
                        )
                        .label(args[0].span, d.words())
                        .help("the square root needs even powers of every unit, e.g. an area"),
                    );
                    Ty::Error
                }
            },
            Ty::Bool => {
                self.condition_argument(name, args[0].span);
                Ty::Error
            }
            Ty::Error => Ty::Error,
        };
        Some((
            vec![x],
            Typed {
                ty,
                constant: t.constant,
            },
        ))
    }

    /// Arguments of one dimension (`min`, `clamp`, `smoothstep`): the
    /// result has it, or is dimensionless for [`Dims::AlikeToNumber`].
    fn alike_args(
        &mut self,
        name: &str,
        dims: Dims,
        args: &[syntax::Expr],
    ) -> Option<(Vec<Expr>, Typed)> {
        let mut xs = Vec::new();
        let mut found: Vec<(Dim, Span)> = Vec::new();
        let mut constant = true;
        let mut bad = false;
        for a in args {
            let (x, t) = self.check_expr(a);
            constant &= t.constant;
            match t.ty {
                Ty::Num(d) => found.push((d, a.span)),
                Ty::Bool => {
                    self.error(
                        Problem::error("H0306", format!("`{name}` needs numbers, not conditions"))
                            .label(a.span, "a condition"),
                    );
                    bad = true;
                }
                Ty::Error => bad = true,
            }
            xs.push(x);
        }
        if bad {
            return None;
        }
        let (d0, s0) = found[0];
        for &(d, s) in &found[1..] {
            let kinds_differ = d0.same_base(Dim::TIME) && d.point != d0.point;
            if !d.same_base(d0) || kinds_differ {
                let mut p = Problem::error(
                    "H0301",
                    format!(
                        "the arguments of `{name}` differ: {} against {}",
                        d0.words(),
                        d.words()
                    ),
                )
                .label(s0, d0.words())
                .label(s, d.words());
                p = p.help(if kinds_differ {
                    "ages (Ga, Ma, ka) are points before present; durations (Gyr, Myr, kyr, yr) are lengths of time: do not mix them"
                } else {
                    "all arguments must have the same dimension"
                });
                self.error(p);
                return None;
            }
        }
        let all_point = found.iter().all(|(d, _)| d.point);
        let result = match dims {
            Dims::AlikeToNumber => Dim::NONE,
            Dims::Alike | Dims::Dimensionless | Dims::Root | Dims::Magnitude => Dim {
                point: all_point,
                ..d0
            },
        };
        Some((xs, Typed::num(result, constant)))
    }

    fn condition_argument(&mut self, func: &str, span: Span) {
        self.error(
            Problem::error("H0306", format!("`{func}` needs a number, not a condition"))
                .label(span, "a condition")
                .help("wrap a condition in `if C then 1 else 0` to use it as a number"),
        );
    }

    fn call(&mut self, f: Builtin, args: Vec<Expr>, span: Span, t: Typed) -> (Expr, Typed) {
        (
            Expr {
                kind: ExprKind::Call(f, args),
                span,
            },
            t,
        )
    }

    fn arity(&mut self, func: &syntax::Ident, args: &[syntax::Expr], lo: usize, hi: usize) -> bool {
        if args.len() >= lo && args.len() <= hi {
            return true;
        }
        let want = if lo == hi {
            format!("{lo}")
        } else if hi == usize::MAX {
            format!("at least {lo}")
        } else {
            format!("{lo} to {hi}")
        };
        let plural = if want == "1" { "" } else { "s" };
        self.error(
            Problem::error(
                "H0205",
                format!(
                    "`{}` takes {want} argument{plural}, found {}",
                    func.text,
                    args.len()
                ),
            )
            .label(func.span, "called here")
            .help("see the list of built-in functions in docs/language.md"),
        );
        false
    }

    fn reservoir_arg(&mut self, func: &str, arg: &syntax::Expr) -> Option<usize> {
        if let syntax::ExprKind::Name(id) = &arg.kind {
            if let Some(&def) = self.symbols.get(&id.text) {
                if let DefKind::Reservoir { .. } = self.defs[def].kind {
                    // Whether it has a capacity is known once all reservoirs
                    // are read; look at the statement.
                    let item = &self.items[self.def_item[def]];
                    let has_cap = matches!(&item.stmt.kind, syntax::StmtKind::Reservoir { clauses, .. } if clauses.iter().any(|c| c.key.text == "capacity"));
                    if !has_cap {
                        self.error(
                            Problem::error(
                                "H0206",
                                format!("reservoir `{}` has no capacity", id.text),
                            )
                            .label(arg.span, "no capacity declared")
                            .label(self.defs[def].span, "declared here")
                            .help(format!(
                                "add `, capacity = EXPR` to `{}` to use `{func}`",
                                id.text
                            )),
                        );
                        return None;
                    }
                    return Some(def);
                }
            }
        }
        let mut p = Problem::error("H0206", format!("`{func}` needs the name of a reservoir"))
            .label(arg.span, "not a reservoir name")
            .help(format!(
                "write the name of a reservoir that has a capacity, e.g. `{func}(mantle)`"
            ));
        if let syntax::ExprKind::Name(id) = &arg.kind {
            if !self.symbols.contains_key(&id.text) {
                let names = self.reservoirs_named();
                if let Some(s) = nearest(&id.text, names.iter().map(String::as_str)) {
                    p = p.help(format!("did you mean `{s}`?"));
                }
            }
        }
        self.error(p);
        None
    }

    fn hypsometry_arg(&mut self, func: &str, arg: &syntax::Expr) -> Option<usize> {
        if let syntax::ExprKind::Name(id) = &arg.kind {
            if let Some(&def) = self.symbols.get(&id.text) {
                if let DefKind::Table(t) = self.defs[def].kind {
                    let table = self.tables.get(t)?;
                    if table.x_dim.same_base(Dim::LENGTH) && table.y_dim.same_base(Dim::AREA) {
                        return Some(t);
                    }
                    self.error(
                        Problem::error(
                            "H0206",
                            format!("`{func}` needs a hypsometry table: elevation (length) to area"),
                        )
                        .label(arg.span, format!(
                            "this table maps {} to {}",
                            table.x_dim.words(),
                            table.y_dim.words()
                        ))
                        .help("declare it as `table NAME = \"file.csv\" (m, m^2)`: elevation and the area lying below it"),
                    );
                    return None;
                }
            }
        }
        self.error(
            Problem::error(
                "H0206",
                format!("`{func}` needs the name of a hypsometry table"),
            )
            .label(arg.span, "not a table name")
            .help("declare one with `table NAME = \"file.csv\" (m, m^2)`"),
        );
        None
    }
}

/// An integer written literally (possibly negated), for unit powers.
fn integer_literal(e: &Expr) -> Option<i32> {
    match &e.kind {
        ExprKind::Num(v) if v.fract() == 0.0 && v.abs() <= 64.0 => Some(*v as i32),
        ExprKind::Neg(inner) => integer_literal(inner).map(|n| -n),
        _ => None,
    }
}

/// Evaluate an expression that the checker found constant. `None` when it
/// is not constant after all or reads something unavailable.
pub fn eval_const(model: &Model, e: &Expr) -> Option<f64> {
    ConstEval::new(model).eval(e)
}

/// The same over definitions and tables checked so far (no model needed).
pub(crate) fn eval_const_in(
    defs: &[crate::model::Def],
    tables: &[crate::model::Table],
    e: &Expr,
) -> Option<f64> {
    ConstEval::over(defs, tables).eval(e)
}

/// Constant folding that evaluates every definition once: a chain of
/// constants that each use the one before twice would otherwise cost two to
/// the power of its length.
pub(crate) struct ConstEval<'m> {
    defs: &'m [crate::model::Def],
    tables: &'m [crate::model::Table],
    /// Per definition: not yet seen, being evaluated, or its value.
    memo: Vec<Memo>,
    /// Set when the depth limit cut an evaluation short; such results are
    /// not memoized, since a shallower start might reach further.
    cut: bool,
}

#[derive(Clone, Copy)]
enum Memo {
    Todo,
    Busy,
    Done(Option<f64>),
}

/// Deepest recursion of constant folding; definitions nest at most
/// [`super::MAX_DEPTH`] deep in a model that checks.
const EVAL_DEPTH: usize = super::MAX_DEPTH + 64;

impl<'m> ConstEval<'m> {
    pub(crate) fn new(model: &'m Model) -> ConstEval<'m> {
        ConstEval::over(&model.defs, &model.tables)
    }

    pub(crate) fn over(
        defs: &'m [crate::model::Def],
        tables: &'m [crate::model::Table],
    ) -> ConstEval<'m> {
        ConstEval {
            defs,
            tables,
            memo: vec![Memo::Todo; defs.len()],
            cut: false,
        }
    }

    pub(crate) fn eval(&mut self, e: &Expr) -> Option<f64> {
        self.eval_depth(e, 0)
    }

    fn def(&mut self, d: DefId, depth: usize) -> Option<f64> {
        let defs = self.defs;
        if !matches!(defs[d].kind, DefKind::Const | DefKind::Param | DefKind::Let) {
            return None;
        }
        match self.memo[d] {
            Memo::Done(v) => return v,
            // A cycle (already reported by the checker).
            Memo::Busy => return None,
            Memo::Todo => {}
        }
        self.memo[d] = Memo::Busy;
        let outer_cut = std::mem::replace(&mut self.cut, false);
        let v = self.eval_depth(&defs[d].expr, depth + 1);
        self.memo[d] = if self.cut { Memo::Todo } else { Memo::Done(v) };
        self.cut |= outer_cut;
        v
    }

    fn eval_depth(&mut self, e: &Expr, depth: usize) -> Option<f64> {
        if depth > EVAL_DEPTH {
            self.cut = true;
            return None;
        }
        crate::stack::guard(|| self.eval_node(e, depth))
    }

    fn eval_node(&mut self, e: &Expr, depth: usize) -> Option<f64> {
        let mut ev = |x: &Expr| self.eval_depth(x, depth + 1);
        Some(match &e.kind {
            ExprKind::Num(v) => *v,
            ExprKind::Ref(d) => return self.def(*d, depth),
            ExprKind::Age | ExprKind::Time => return None,
            ExprKind::Neg(x) => -ev(x)?,
            ExprKind::Not(x) => bool_num(ev(x)? == 0.0),
            ExprKind::Binary(op, a, b) => {
                let a = ev(a)?;
                crate::numeric::binary(*op, a, ev(b)?)
            }
            ExprKind::If(c, a, b) => {
                if ev(c)? != 0.0 {
                    ev(a)?
                } else {
                    ev(b)?
                }
            }
            ExprKind::Call(f, args) => {
                let vals: Option<Vec<f64>> = args.iter().map(&mut ev).collect();
                let v = vals?;
                let tables = self.tables;
                match f {
                    // The kernel compiled programs compute (tested in
                    // `compile`'s tests for every row).
                    Builtin::Num(func) => func.num().kernel.apply(&v),
                    // A table that failed to load (already reported) has no
                    // value, rather than a NaN that would be reported again.
                    Builtin::Interp(t) if tables[*t].xs.is_empty() => return None,
                    Builtin::Interp(t) => {
                        crate::numeric::interp(&tables[*t].xs, &tables[*t].ys, v[0])
                    }
                    // Read the clock or the state: never constant.
                    Builtin::Decay
                    | Builtin::Capacity(_)
                    | Builtin::Fill(_)
                    | Builtin::Excess(_) => return None,
                    // As compiled programs compute them (`compile::exec`).
                    Builtin::SeaLevel(t) => hypsometry(&tables[*t])?.sea_level(v[0]),
                    Builtin::SeaLevelIsostatic(t) => {
                        hypsometry(&tables[*t])?.sea_level_isostatic(v[0], v[1], v[2])
                    }
                    Builtin::LandFraction(t) => hypsometry(&tables[*t])?.land_fraction(v[0]),
                    Builtin::BasinVolume(t) => hypsometry(&tables[*t])?.basin_volume(v[0]),
                }
            }
        })
    }
}

/// The hypsometry of a table, for folding; `None` for a table that failed
/// to load (already reported), as for a table lookup.
fn hypsometry(t: &crate::model::Table) -> Option<Hypsometry> {
    if t.xs.is_empty() {
        return None;
    }
    Some(Hypsometry::new(&t.xs, &t.ys))
}

fn bool_num(b: bool) -> f64 {
    if b {
        1.0
    } else {
        0.0
    }
}
