//! The scenario header, solver settings, stages and expectations.

use super::expr::Ty;
use super::Checker;
use crate::diagnostic::{nearest, Problem};
use crate::model::*;
use crate::numeric::truncation::MIN_TRUNCATED_MASS;
use crate::span::Span;
use crate::syntax::{self, EntryKind, StmtKind};
use crate::units::Dim;

pub(crate) struct Header {
    pub name: Option<String>,
    pub title: Option<String>,
    pub start_age: f64,
    pub end_age: f64,
    pub cadence: f64,
    pub solver: SolverSettings,
    /// The `report every` line, for diagnostics about the report's size.
    pub report_span: Option<Span>,
}

const SOLVER_KEYS: &[&str] = &[
    "rtol",
    "atol",
    "method",
    "max_step",
    "initial_step",
    "max_steps",
    "budget_tolerance",
];

/// Most report rows a run may ask for; more is almost surely a typo in the
/// cadence, and would allocate gigabytes.
pub const MAX_REPORT_ROWS: f64 = 1e7;

fn format_age(years: f64) -> String {
    format!("{} Ga", years / 1e9)
}

impl Checker {
    /// A constant of the wanted dimension, evaluated now.
    fn const_value(&mut self, e: &syntax::Expr, want: Dim, what: &str) -> Option<f64> {
        let (x, t) = self.check_expr(e);
        if t.ty == Ty::Error {
            return None;
        }
        if !self.expect_dim(&t, want, e.span, what) {
            return None;
        }
        if !t.constant {
            self.expect_constant(&t, e.span, what);
            return None;
        }
        let v = super::expr::eval_const_in(&self.defs, &self.tables, &x);
        if v.is_none_or(|v| !v.is_finite()) {
            self.error(
                Problem::error(
                    "H0303",
                    format!("{what} does not evaluate to a finite number"),
                )
                .label(e.span, "not finite")
                .help("look for a division by zero or a result too large for a number"),
            );
            return None;
        }
        v
    }

    /// A model view over what is checked so far, for constant folding.
    pub(crate) fn partial_model(&self) -> Model {
        Model {
            name: None,
            title: None,
            start_age: 0.0,
            end_age: 0.0,
            cadence: 0.0,
            solver: SolverSettings::default(),
            defs: self.defs.clone(),
            tables: self.tables.clone(),
            stages: Vec::new(),
            expects: Vec::new(),
            ensemble: None,
            sources: Default::default(),
        }
    }

    fn solver_setting(
        &mut self,
        key: &syntax::Ident,
        value: &syntax::Expr,
        s: &mut SolverSettings,
    ) {
        match key.text.as_str() {
            "method" => {
                let word = match &value.kind {
                    syntax::ExprKind::Name(id) => Some(id.text.as_str()),
                    _ => None,
                };
                s.method = match word.and_then(crate::solve::methods::lookup) {
                    Some(m) => m,
                    None => {
                        self.error(
                            Problem::error("H0411", "unknown solver method")
                                .label(value.span, "not a method")
                                .help(format!("choose {}", crate::solve::methods::choices())),
                        );
                        return;
                    }
                };
            }
            "rtol" | "atol" | "budget_tolerance" | "max_steps" => {
                let Some(v) = self.const_value(value, Dim::NONE, &format!("`{}`", key.text)) else {
                    return;
                };
                let ok = match key.text.as_str() {
                    "max_steps" => v >= 1.0 && v.fract() == 0.0 && v <= 1e12,
                    "rtol" => v > 0.0 && v < 1.0,
                    _ => v > 0.0,
                };
                if !ok {
                    let hint = if key.text == "max_steps" {
                        "a whole number of steps, at least 1"
                    } else {
                        "a positive number below 1, such as 1e-8"
                    };
                    self.error(
                        Problem::error("H0411", format!("`{}` is out of range", key.text))
                            .label(value.span, "not allowed")
                            .help(hint),
                    );
                    return;
                }
                match key.text.as_str() {
                    "rtol" => s.rtol = v,
                    "atol" => s.atol = v,
                    "budget_tolerance" => s.budget_tolerance = v,
                    _ => s.max_steps = v as u64,
                }
            }
            "max_step" | "initial_step" => {
                let Some(v) = self.const_value(value, Dim::TIME, &format!("`{}`", key.text)) else {
                    return;
                };
                if v <= 0.0 {
                    self.error(
                        Problem::error("H0411", format!("`{}` must be positive", key.text))
                            .label(value.span, "not positive")
                            .help("give a positive duration, e.g. `1 Myr`"),
                    );
                    return;
                }
                if key.text == "max_step" {
                    s.max_step = Some(v);
                } else {
                    s.initial_step = Some(v);
                }
            }
            other => {
                let mut p = Problem::error("H0207", format!("unknown solver setting `{other}`"))
                    .label(key.span, "not a setting");
                p = match nearest(other, SOLVER_KEYS.iter().copied()) {
                    Some(n) => p.help(format!("did you mean `{n}`?")),
                    None => p.help(format!("the settings are: {}", SOLVER_KEYS.join(", "))),
                };
                self.error(p);
            }
        }
    }

    pub(crate) fn check_header(&mut self) -> Header {
        let mut h = Header {
            name: None,
            title: None,
            start_age: 0.0,
            end_age: 0.0,
            cadence: 0.0,
            solver: SolverSettings::default(),
            report_span: None,
        };
        let header = std::mem::take(&mut self.header);
        let mut seen: std::collections::HashMap<&'static str, Span> = Default::default();
        let mut scenario_span = None;
        let mut span_given = false;
        let mut report_given = false;
        for stmt in &header {
            let key: Option<&'static str> = match &stmt.kind {
                StmtKind::Scenario { .. } => Some("scenario"),
                StmtKind::Span { .. } => Some("span"),
                StmtKind::Report { .. } => Some("report"),
                _ => None,
            };
            if let Some(k) = key {
                if let Some(first) = seen.get(k) {
                    self.error(
                        Problem::error("H0409", format!("`{k}` is given twice"))
                            .label(stmt.span, "again here")
                            .label(*first, "first here")
                            .help("a scenario has one of each header line"),
                    );
                    continue;
                }
                seen.insert(k, stmt.span);
            }
            match &stmt.kind {
                StmtKind::Scenario { name, title } => {
                    h.name = Some(name.text.clone());
                    h.title = title.as_ref().map(|t| t.value.clone());
                    scenario_span = Some(stmt.span);
                }
                StmtKind::Span { from, to } => {
                    let a = self.const_value(from, Dim::AGE, "the start of the span");
                    let b = self.const_value(to, Dim::AGE, "the end of the span");
                    if let (Some(a), Some(b)) = (a, b) {
                        if a == b {
                            self.error(
                                Problem::error("H0417", "the span has no length")
                                    .label(stmt.span, format!("from {} to {}", format_age(a), format_age(b)))
                                    .help("a span runs from an older age to a younger one, e.g. `span 4.5 Ga to 0 Ga`"),
                            );
                        } else if a < b {
                            self.error(
                                Problem::error(
                                    "H0410",
                                    "the span must run from an older age to a younger one",
                                )
                                .label(
                                    stmt.span,
                                    format!("from {} to {}", format_age(a), format_age(b)),
                                )
                                .help("write the oldest age first, e.g. `span 4.5 Ga to 0 Ga`"),
                            );
                        } else {
                            h.start_age = a;
                            h.end_age = b;
                            span_given = true;
                        }
                    }
                }
                StmtKind::Report { every } => {
                    if let Some(c) = self.const_value(every, Dim::TIME, "the report cadence") {
                        if c <= 0.0 {
                            self.error(
                                Problem::error("H0411", "the report cadence must be positive")
                                    .label(every.span, "not positive")
                                    .help("give the time between report rows, e.g. `report every 10 Myr`"),
                            );
                        } else {
                            h.cadence = c;
                            report_given = true;
                        }
                    }
                }
                StmtKind::Solver { key, value } => {
                    let mut s = h.solver;
                    self.solver_setting(key, value, &mut s);
                    h.solver = s;
                }
                _ => {}
            }
        }
        // Expectations stay for later.
        self.header = header
            .into_iter()
            .filter(|s| matches!(s.kind, StmtKind::Expect { .. }))
            .collect();

        if let Some(sspan) = scenario_span {
            let label_span = Span {
                end: sspan.start + 8,
                ..sspan
            };
            if !span_given && !seen.contains_key("span") {
                self.error(
                    Problem::error("H0401", "the scenario has no span")
                        .label(label_span, "scenario declared here")
                        .help("add a line such as `span 4.5 Ga to 0 Ga`"),
                );
            }
            if !report_given && !seen.contains_key("report") {
                self.error(
                    Problem::error("H0401", "the scenario has no report cadence")
                        .label(label_span, "scenario declared here")
                        .help("add a line such as `report every 10 Myr`"),
                );
            }
            if self.stages.is_empty() {
                self.error(
                    Problem::error("H0401", "the scenario has no stages")
                        .label(label_span, "scenario declared here")
                        .help("add at least one stage covering the span, e.g. `stage whole from 4.5 Ga to 0 Ga`"),
                );
            }
            if span_given && report_given {
                let rows = (h.start_age - h.end_age) / h.cadence;
                if rows > MAX_REPORT_ROWS {
                    self.error(
                        Problem::error("H0412", format!("the report would have {rows:.0} rows"))
                            .label(*seen.get("report").unwrap_or(&sspan), "cadence too fine for the span")
                            .help(format!("at most {MAX_REPORT_ROWS:.0} rows are written; choose a coarser cadence")),
                    );
                }
            }
        } else {
            for (k, s) in &seen {
                if *k != "scenario" {
                    self.error(
                        Problem::error("H0401", format!("`{k}` without a `scenario` line"))
                            .label(*s, "header line in a file without `scenario`")
                            .help("start the file with `scenario NAME \"title\"`, or drop the header lines from a library file"),
                    );
                }
            }
            if let Some((stmt, _)) = self.stages.first() {
                let span = stmt.span;
                self.error(
                    Problem::error("H0401", "stages without a `scenario` line")
                        .label(span, "stage in a file without `scenario`")
                        .help("start the file with `scenario NAME \"title\"`"),
                );
            }
        }
        if span_given && !report_given {
            h.cadence = h.start_age - h.end_age;
        }
        h.report_span = seen.get("report").copied().or(scenario_span);
        h
    }

    pub(crate) fn check_stages(&mut self, h: &Header) -> Vec<Stage> {
        let stages = std::mem::take(&mut self.stages);
        let mut out: Vec<Stage> = Vec::new();
        // A backwards stage is reported once; its cover would only add noise.
        let mut backwards = false;
        let mut names: std::collections::HashMap<String, Span> = Default::default();
        for (stmt, body) in &stages {
            let StmtKind::Stage { name, from, to, .. } = &stmt.kind else {
                continue;
            };
            if let Some(first) = names.get(&name.text) {
                self.error(
                    Problem::error("H0202", format!("stage `{}` is defined twice", name.text))
                        .label(name.span, "defined again here")
                        .label(*first, "first defined here")
                        .help("give each stage its own name"),
                );
            }
            names.insert(name.text.clone(), name.span);
            let a = self.const_value(from, Dim::AGE, "the start of a stage");
            let b = self.const_value(to, Dim::AGE, "the end of a stage");
            let mut stage = Stage {
                name: name.text.clone(),
                start_age: a.unwrap_or(f64::NAN),
                end_age: b.unwrap_or(f64::NAN),
                sets: Vec::new(),
                fluxes: Vec::new(),
                solver: h.solver,
                span: stmt.span,
            };
            if let (Some(a), Some(b)) = (a, b) {
                if a == b {
                    backwards = true;
                    self.error(
                        Problem::error("H0417", format!("stage `{}` has no length", name.text))
                            .label(stmt.span, format!("from {} to {}", format_age(a), format_age(b)))
                            .help("a stage covers a stretch of time: end it at a younger age than it starts, or delete it"),
                    );
                } else if a < b {
                    backwards = true;
                    self.error(
                        Problem::error("H0410", format!("stage `{}` runs backwards", name.text))
                            .label(
                                stmt.span,
                                format!("from {} to {}", format_age(a), format_age(b)),
                            )
                            .help("a stage runs from its older age to its younger one"),
                    );
                }
            }
            for entry in body {
                let EntryKind::Stmt(s) = &entry.kind else {
                    continue;
                };
                match &s.kind {
                    StmtKind::Set { name: p, value } => self.stage_set(p, value, &mut stage),
                    StmtKind::Solver { key, value } => {
                        let mut settings = stage.solver;
                        self.solver_setting(key, value, &mut settings);
                        stage.solver = settings;
                    }
                    _ => {}
                }
            }
            out.push(stage);
        }
        if h.name.is_some() && h.start_age > h.end_age && !backwards {
            self.check_stage_cover(h, &out, &stages);
        }
        out
    }

    /// H0201 for a name that should be a parameter, with the nearest one.
    /// The parameter `name` refers to, for a stage's `set` or an ensemble's
    /// `vary`; reports H0201 when there is none and H0408 when the name is
    /// another kind of definition (`rule` says what only parameters may do).
    fn parameter(&mut self, name: &syntax::Ident, rule: &str, help: &str) -> Option<DefId> {
        let Some(&id) = self.symbols.get(&name.text) else {
            self.unknown_parameter(name);
            return None;
        };
        if !matches!(self.defs[id].kind, DefKind::Param) {
            let word = self.defs[id].kind.word();
            self.error(
                Problem::error("H0408", format!("`{}` is a {word}; {rule}", name.text))
                    .label(name.span, "not a parameter")
                    .label(self.defs[id].span, "defined here")
                    .help(help),
            );
            return None;
        }
        Some(id)
    }

    fn unknown_parameter(&mut self, name: &syntax::Ident) {
        let params: Vec<String> = self
            .defs
            .iter()
            .filter(|d| matches!(d.kind, DefKind::Param))
            .map(|d| d.name.clone())
            .collect();
        let mut p = Problem::error("H0201", format!("unknown parameter `{}`", name.text))
            .label(name.span, "no such parameter");
        if let Some(s) = nearest(&name.text, params.iter().map(String::as_str)) {
            p = p.help(format!("did you mean `{s}`?"));
        }
        self.error(p);
    }

    fn stage_set(&mut self, p: &syntax::Ident, value: &syntax::Expr, stage: &mut Stage) {
        let Some(id) = self.parameter(
            p,
            "a stage can set only parameters",
            "declare it with `param` to let stages override it",
        ) else {
            return;
        };
        let (x, t) = self.check_expr(value);
        let want = self.defs[id].dim;
        let what = format!("the value of `{}`", p.text);
        if self.expect_dim(&t, want, value.span, &what) {
            self.expect_constant(&t, value.span, &what);
            if t.constant {
                // As for constants: a value that overflows is an error here,
                // not a failed step in the stage.
                let v = super::expr::eval_const_in(&self.defs, &self.tables, &x);
                if v.is_some_and(|v| !v.is_finite()) {
                    self.error(
                        Problem::error(
                            "H0303",
                            format!("{what} in stage `{}` is not finite", stage.name),
                        )
                        .label(value.span, "not finite")
                        .help("look for a division by zero or a result too large for a number"),
                    );
                }
            }
        }
        if stage.sets.iter().any(|(d, _)| *d == id) {
            self.error(
                Problem::error("H0202", format!("`{}` is set twice in this stage", p.text))
                    .label(p.span, "set again here")
                    .help("keep one `set` line for each parameter in a stage"),
            );
            return;
        }
        stage.sets.push((id, x));
    }

    fn check_stage_cover(
        &mut self,
        h: &Header,
        stages: &[Stage],
        stmts: &[(syntax::Stmt, Vec<syntax::Entry>)],
    ) {
        let mut expected = h.start_age;
        for (i, st) in stages.iter().enumerate() {
            if st.start_age.is_nan() || st.end_age.is_nan() {
                return;
            }
            let span = stmts[i].0.span;
            if st.start_age > h.start_age || st.end_age < h.end_age {
                self.error(
                    Problem::error(
                        "H0404",
                        format!("stage `{}` reaches outside the span", st.name),
                    )
                    .label(
                        span,
                        format!(
                            "from {} to {}, but the span is {} to {}",
                            format_age(st.start_age),
                            format_age(st.end_age),
                            format_age(h.start_age),
                            format_age(h.end_age)
                        ),
                    )
                    .help("stages must lie within the span"),
                );
                return;
            }
            if st.start_age < expected {
                let (what, before) = if i == 0 {
                    ("starts after the span starts", "the span starts")
                } else {
                    ("leaves a gap", "the stage before it ends")
                };
                self.error(
                    Problem::error("H0402", format!("stage `{}` {what}", st.name))
                        .label(
                            span,
                            format!(
                                "starts at {}, but {before} at {}",
                                format_age(st.start_age),
                                format_age(expected)
                            ),
                        )
                        .help(format!(
                            "start it at {} so the stages are contiguous",
                            format_age(expected)
                        )),
                );
                return;
            }
            if st.start_age > expected {
                self.error(
                    Problem::error(
                        "H0403",
                        format!("stage `{}` overlaps the stage before it", st.name),
                    )
                    .label(
                        span,
                        format!(
                            "starts at {}, but the previous stage already reaches {}",
                            format_age(st.start_age),
                            format_age(expected)
                        ),
                    )
                    .help("list stages oldest first, each starting where the last one ends"),
                );
                return;
            }
            expected = st.end_age;
        }
        if expected > h.end_age {
            if let Some((stmt, _)) = stmts.last() {
                self.error(
                    Problem::error("H0402", "the stages stop before the span ends")
                        .label(
                            stmt.span,
                            format!(
                                "the last stage ends at {}, the span at {}",
                                format_age(expected),
                                format_age(h.end_age)
                            ),
                        )
                        .help("extend the last stage or add one that reaches the end of the span"),
                );
            }
        }
    }

    pub(crate) fn check_expects(&mut self, h: &Header) -> Vec<Expect> {
        let header = std::mem::take(&mut self.header);
        let mut out = Vec::new();
        // The span, when it is known; ages of expectations must lie in it.
        let span = (h.start_age > h.end_age).then_some((h.start_age, h.end_age));
        for stmt in header {
            let StmtKind::Expect { subject, check } = &stmt.kind else {
                continue;
            };
            // In canonical layout, so that reformatting the file does not
            // change the model.
            let text = syntax::format_stmt(&stmt);
            if let syntax::ExpectCheck::Event { before, age } = check {
                let event = match &subject.kind {
                    syntax::ExprKind::Name(id) => self
                        .symbols
                        .get(&id.text)
                        .copied()
                        .filter(|&d| matches!(self.defs[d].kind, DefKind::Event)),
                    _ => None,
                };
                let Some(event) = event else {
                    self.error(
                        Problem::error("H0206", "`before` and `after` need the name of an event")
                            .label(subject.span, "not an event")
                            .help("declare one with `event NAME = CONDITION`"),
                    );
                    continue;
                };
                let Some(a) = self.const_value(age, Dim::AGE, "the age of an expectation") else {
                    continue;
                };
                if !self.age_in_span(a, age.span, span) {
                    continue;
                }
                out.push(Expect {
                    subject: Expr {
                        kind: ExprKind::Ref(event),
                        span: subject.span,
                    },
                    check: ExpectCheck::Event {
                        event,
                        before: *before,
                        age: a,
                    },
                    span: stmt.span,
                    text,
                    display: crate::units::lookup("Ga").map(|u| ("Ga".to_owned(), u)),
                });
                continue;
            }
            let written_unit = |mut e: &syntax::Expr| {
                // See through a sign and parentheses: `-135 m`, `(2 K)`.
                while let syntax::ExprKind::Unary { operand: x, .. } | syntax::ExprKind::Paren(x) =
                    &e.kind
                {
                    e = x;
                }
                match &e.kind {
                    syntax::ExprKind::Quantity { unit: Some(u), .. } => {
                        crate::units::combine(u.factors.iter().map(|f| (f.name.as_str(), f.power)))
                            .ok()
                            .map(|unit| (u.text.clone(), unit))
                    }
                    _ => None,
                }
            };
            let display = match check {
                syntax::ExpectCheck::Target { value, .. } => written_unit(value),
                syntax::ExpectCheck::Range { low, .. } => written_unit(low),
                syntax::ExpectCheck::Bound { value, .. } => written_unit(value),
                syntax::ExpectCheck::Event { .. } => None,
            };
            let (subj, ts) = self.check_expr(subject);
            let Ty::Num(dim) = ts.ty else {
                if ts.ty == Ty::Bool {
                    self.error(
                        Problem::error("H0306", "an expectation needs a number to compare")
                            .label(subject.span, "this is a condition")
                            .help("expect a number, e.g. `expect ocean at 0 Ga > 1e21 kg`; for the first time a condition holds, declare an `event` and expect it `before` or `after` an age"),
                    );
                }
                continue;
            };
            // Values are of the subject's kind (an age for an age); an
            // uncertainty is a difference.
            let value_of = |c: &mut Checker, e: &syntax::Expr, want: Dim, what: &str| {
                let (x, t) = c.check_expr(e);
                if c.expect_dim(&t, want, e.span, what) {
                    c.expect_constant(&t, e.span, what);
                    Some(x)
                } else {
                    None
                }
            };
            // The age, checked against the span.
            let age_of = |c: &mut Checker, at: &syntax::Expr| {
                let a = c.const_value(at, Dim::AGE, "the age of an expectation")?;
                c.age_in_span(a, at.span, span).then_some(a)
            };
            let checked = match check {
                syntax::ExpectCheck::Target { at, value, sigma } => {
                    let a = age_of(self, at);
                    let v = value_of(self, value, dim, "the expected value");
                    let s = value_of(self, sigma, dim.plain(), "the uncertainty");
                    let v_ok = v.as_ref().is_some_and(|x| {
                        self.finite_expect_value(x, value.span, "the expected value")
                    });
                    let s_ok = s.as_ref().is_some_and(|x| {
                        self.finite_expect_value(x, sigma.span, "the uncertainty")
                            && self.positive_uncertainty(x, sigma.span)
                    });
                    match (a, v, s) {
                        (Some(age), Some(value), Some(sigma)) if v_ok && s_ok => {
                            Some(ExpectCheck::Target { age, value, sigma })
                        }
                        _ => None,
                    }
                }
                syntax::ExpectCheck::Range { at, low, high } => {
                    let a = age_of(self, at);
                    let l = value_of(self, low, dim, "the lower end");
                    let hi = value_of(self, high, dim, "the upper end");
                    let l_ok = l
                        .as_ref()
                        .is_some_and(|x| self.finite_expect_value(x, low.span, "the lower end"));
                    let h_ok = hi
                        .as_ref()
                        .is_some_and(|x| self.finite_expect_value(x, high.span, "the upper end"));
                    let ordered = match (&l, &hi) {
                        (Some(lx), Some(hx)) if l_ok && h_ok => {
                            self.ordered_range(lx, hx, low.span.join(high.span))
                        }
                        _ => false,
                    };
                    match (a, l, hi) {
                        (Some(age), Some(low), Some(high)) if ordered => {
                            Some(ExpectCheck::Range { age, low, high })
                        }
                        _ => None,
                    }
                }
                syntax::ExpectCheck::Bound { at, op, value } => {
                    let a = age_of(self, at);
                    let v = value_of(self, value, dim, "the bound")
                        .filter(|x| self.finite_expect_value(x, value.span, "the bound"));
                    match (a, v) {
                        (Some(age), Some(value)) => Some(ExpectCheck::Bound {
                            age,
                            op: *op,
                            value,
                        }),
                        _ => None,
                    }
                }
                syntax::ExpectCheck::Event { .. } => None,
            };
            if let Some(check) = checked {
                out.push(Expect {
                    subject: subj,
                    check,
                    span: stmt.span,
                    text,
                    display,
                });
            }
        }
        out
    }
}

/// Standard deviations a normal draw can reach: Box–Muller from 53-bit
/// uniforms gives at most sqrt(-2 ln 2^-54), about 8.65.
const REACH: f64 = 9.0;

impl Checker {
    /// H0416 unless `age` lies in the span (edges included); true when it
    /// does, or when the span is unknown (its own error is reported).
    fn age_in_span(&mut self, age: f64, at: Span, span: Option<(f64, f64)>) -> bool {
        let Some((start, end)) = span else {
            return true;
        };
        if age <= start && age >= end {
            return true;
        }
        self.error(
            Problem::error("H0416", "the age of an expectation lies outside the span")
                .label(
                    at,
                    format!(
                        "{}, but the span is {} to {}",
                        format_age(age),
                        format_age(start),
                        format_age(end)
                    ),
                )
                .help(format!(
                    "the run has no state at that age; expect at an age from {} to {}",
                    format_age(start),
                    format_age(end)
                )),
        );
        false
    }

    /// The nominal value of a checked, constant expectation expression;
    /// `None` when it cannot be folded (an earlier error).
    fn expect_value_now(&self, x: &Expr) -> Option<f64> {
        super::expr::eval_const_in(&self.defs, &self.tables, x)
    }

    /// H0303 when a value of an expectation is not a finite number (a
    /// division by zero, an overflow): the comparison would be NaN.
    fn finite_expect_value(&mut self, x: &Expr, at: Span, what: &str) -> bool {
        match self.expect_value_now(x) {
            Some(v) if !v.is_finite() => {
                self.error(
                    Problem::error(
                        "H0303",
                        format!("{what} does not evaluate to a finite number"),
                    )
                    .label(at, "not finite")
                    .help("look for a division by zero or a result too large for a number"),
                );
                false
            }
            _ => true,
        }
    }

    /// H0418 for a `+-` width that is zero or negative: the misfit divides
    /// by it, and a sign on an uncertainty means nothing.
    fn positive_uncertainty(&mut self, x: &Expr, at: Span) -> bool {
        match self.expect_value_now(x) {
            Some(v) if v <= 0.0 => {
                let what = if v == 0.0 { "zero" } else { "negative" };
                self.error(
                    Problem::error(
                        "H0418",
                        format!("the uncertainty after `+-` is {what}"),
                    )
                    .label(at, "must be positive")
                    .help("give the one-standard-deviation width of the target, e.g. `+- 30 K`; for a hard limit write a range `in LOW to HIGH` or a bound `< X`"),
                );
                false
            }
            _ => true,
        }
    }

    /// H0418 for a range `in LOW to HIGH` whose low end is not below its
    /// high end: no value (or only one exact value) could pass.
    fn ordered_range(&mut self, low: &Expr, high: &Expr, at: Span) -> bool {
        match (self.expect_value_now(low), self.expect_value_now(high)) {
            (Some(l), Some(h)) if l >= h => {
                let what = if l == h {
                    "has no width"
                } else {
                    "runs backwards"
                };
                self.error(
                    Problem::error("H0418", format!("the range of an expectation {what}"))
                        .label(at, "the low end must be below the high end")
                        .help(if l == h {
                            "a range needs room; for a target with an uncertainty write `= X +- WIDTH`"
                        } else {
                            "write the lower end first: `in LOW to HIGH`"
                        }),
                );
                false
            }
            _ => true,
        }
    }
}

/// Most ensemble members one run may ask for.
pub const MAX_MEMBERS: u64 = 10_000_000;

const DISTRIBUTIONS: &[&str] = &[
    "uniform",
    "log_uniform",
    "normal",
    "log_normal",
    "list",
    "grid",
];

impl Checker {
    pub(crate) fn check_ensemble(&mut self) -> Option<EnsembleSpec> {
        let blocks = std::mem::take(&mut self.ensembles);
        let (first, rest) = blocks.split_first()?;
        for extra in rest {
            self.error(
                Problem::error("H0409", "a scenario has one ensemble block")
                    .label(extra.span, "a second ensemble")
                    .label(first.span, "the first one")
                    .help("merge the two blocks into one"),
            );
        }
        let StmtKind::Ensemble { body } = &first.kind else {
            return None;
        };
        let mut spec = EnsembleSpec {
            members: None,
            seed: 0,
            vary: Vec::new(),
            span: first.span,
        };
        for entry in &body.entries {
            let EntryKind::Stmt(stmt) = &entry.kind else {
                continue;
            };
            match &stmt.kind {
                StmtKind::Option { key, value } => match key.text.as_str() {
                    "members" | "seed" => {
                        let what = format!("`{}`", key.text);
                        let Some(v) = self.const_value(value, Dim::NONE, &what) else {
                            continue;
                        };
                        let limit = if key.text == "members" {
                            MAX_MEMBERS as f64
                        } else {
                            u64::MAX as f64
                        };
                        let low = if key.text == "members" { 1.0 } else { 0.0 };
                        if v.fract() != 0.0 || v < low || v > limit {
                            let code = if key.text == "members" && v > limit {
                                "H0413"
                            } else {
                                "H0411"
                            };
                            self.error(
                                Problem::error(code, format!("{what} must be a whole number from {low} to {limit:.0}"))
                                    .label(value.span, "not allowed")
                                    .help(if key.text == "members" {
                                        "split very large studies into shards (`hadal ensemble --shard K/N`)"
                                    } else {
                                        "any whole number; the same seed gives the same members"
                                    }),
                            );
                            continue;
                        }
                        if key.text == "members" {
                            spec.members = Some(v as u64);
                        } else {
                            spec.seed = v as u64;
                        }
                    }
                    other => {
                        let mut p =
                            Problem::error("H0207", format!("unknown ensemble setting `{other}`"))
                                .label(key.span, "not a setting");
                        p = match nearest(other, ["members", "seed"]) {
                            Some(n) => p.help(format!("did you mean `{n}`?")),
                            None => p.help(
                                "an ensemble takes `members = N`, `seed = S` and `vary` lines",
                            ),
                        };
                        self.error(p);
                    }
                },
                StmtKind::Vary {
                    name,
                    dist,
                    clauses,
                } => {
                    if let Some(v) = self.check_vary(name, dist, clauses, stmt.span) {
                        if spec.vary.iter().any(|x| x.param == v.param) {
                            self.error(
                                Problem::error("H0202", format!("`{}` is varied twice", name.text))
                                    .label(name.span, "again here")
                                    .help("give each parameter one distribution"),
                            );
                        } else {
                            spec.vary.push(v);
                        }
                    }
                }
                _ => {}
            }
        }
        self.check_design_size(&spec);
        Some(spec)
    }

    /// The grid and list axes multiply into the design's member count; it
    /// is computed with checked arithmetic (a product past 64 bits must not
    /// wrap to a small number) and held to [`MAX_MEMBERS`] like `members`.
    fn check_design_size(&mut self, spec: &EnsembleSpec) {
        // `None` once the product passes 64 bits.
        let mut product = Some(1u64);
        let mut crossed = None;
        for v in &spec.vary {
            let Some(len) = v.dist.axis_len() else {
                continue;
            };
            product = product.and_then(|p| p.checked_mul(len));
            if crossed.is_none() && product.is_none_or(|p| p > MAX_MEMBERS) {
                crossed = Some(v.span);
            }
        }
        let Some(span) = crossed else {
            return;
        };
        let size = product.map_or_else(|| format!("more than {}", u64::MAX), |p| p.to_string());
        self.error(
            Problem::error(
                "H0413",
                format!(
                    "the grid and list axes make a design of {size} members; at most {MAX_MEMBERS} are allowed"
                ),
            )
            .label(span, "the design passes the limit here")
            .help("use fewer points per axis, or draw the parameters at random (`uniform`, `normal`, ...)"),
        );
    }

    fn check_vary(
        &mut self,
        name: &syntax::Ident,
        dist: &syntax::Expr,
        clauses: &[syntax::Clause],
        span: Span,
    ) -> Option<Vary> {
        let param = self.parameter(
            name,
            "an ensemble varies parameters",
            "declare it with `param` to vary it",
        )?;
        let dim = self.defs[param].dim;
        let syntax::ExprKind::Call { func, args } = &dist.kind else {
            self.error(
                Problem::error(
                    "H0204",
                    "a distribution is written as a call, e.g. `uniform(0.1, 0.5)`",
                )
                .label(dist.span, "not a distribution")
                .help(format!(
                    "the distributions are: {}",
                    DISTRIBUTIONS.join(", ")
                )),
            );
            return None;
        };
        let mut vals = Vec::new();
        let n_args = args.len();
        let want = match func.text.as_str() {
            "uniform" | "log_uniform" | "normal" | "log_normal" => Some(2),
            "grid" => Some(3),
            "list" => None,
            other => {
                let mut p = Problem::error("H0204", format!("unknown distribution `{other}`"))
                    .label(func.span, "not a distribution");
                p = match nearest(other, DISTRIBUTIONS.iter().copied()) {
                    Some(n) => p.help(format!("did you mean `{n}`?")),
                    None => p.help(format!(
                        "the distributions are: {}",
                        DISTRIBUTIONS.join(", ")
                    )),
                };
                self.error(p);
                return None;
            }
        };
        if want.is_some_and(|w| w != n_args) || (want.is_none() && n_args == 0) {
            self.error(
                Problem::error(
                    "H0205",
                    format!(
                        "`{}` takes {} arguments, found {n_args}",
                        func.text,
                        want.map_or("one or more".to_owned(), |w| w.to_string())
                    ),
                )
                .label(func.span, "called here")
                .help("see the ensemble section of docs/language.md"),
            );
            return None;
        }
        for (i, a) in args.iter().enumerate() {
            let arg_dim = match (func.text.as_str(), i) {
                ("log_normal", 1) | ("grid", 2) => Dim::NONE,
                _ => dim,
            };
            let what = format!("argument {} of `{}`", i + 1, func.text);
            vals.push(self.const_value(a, arg_dim, &what)?);
        }
        let bad = |c: &mut Checker, msg: &str| {
            c.error(
                Problem::error("H0411", format!("`{}`: {msg}", func.text))
                    .label(dist.span, "not a usable distribution")
                    .help("see the ensemble section of docs/language.md"),
            );
        };
        let d = match func.text.as_str() {
            "uniform" | "log_uniform" => {
                if vals[0] >= vals[1] {
                    bad(self, "the lower end must be below the upper end");
                    return None;
                }
                if func.text == "log_uniform" && vals[0] <= 0.0 {
                    bad(self, "both ends must be positive");
                    return None;
                }
                if func.text == "uniform" && !(vals[1] - vals[0]).is_finite() {
                    bad(self, "the range is too wide for a number");
                    return None;
                }
                if func.text == "uniform" {
                    Dist::Uniform(vals[0], vals[1])
                } else {
                    Dist::LogUniform(vals[0], vals[1])
                }
            }
            "normal" => {
                if vals[1] <= 0.0 {
                    bad(self, "the standard deviation must be positive");
                    return None;
                }
                if !(vals[0].abs() + REACH * vals[1]).is_finite() {
                    bad(self, "its draws would be too large for a number");
                    return None;
                }
                Dist::Normal {
                    mean: vals[0],
                    sd: vals[1],
                }
            }
            "log_normal" => {
                if vals[0] <= 0.0 || vals[1] <= 0.0 {
                    bad(
                        self,
                        "the median and the standard deviation of ln must be positive",
                    );
                    return None;
                }
                if !(vals[0] * libm::exp(REACH * vals[1])).is_finite() {
                    bad(self, "its draws would be too large for a number");
                    return None;
                }
                Dist::LogNormal {
                    median: vals[0],
                    sd_ln: vals[1],
                }
            }
            "grid" => {
                let n = vals[2];
                if n.fract() != 0.0 || !(2.0..=1e6).contains(&n) || vals[0] >= vals[1] {
                    bad(self, "write `grid(low, high, n)` with low below high and n a whole number from 2");
                    return None;
                }
                if !(vals[1] - vals[0]).is_finite() {
                    bad(self, "the range is too wide for a number");
                    return None;
                }
                Dist::Grid {
                    lo: vals[0],
                    hi: vals[1],
                    n: n as u64,
                }
            }
            _ => Dist::List(vals),
        };
        let mut min = None;
        let mut max = None;
        for c in clauses {
            let slot = match c.key.text.as_str() {
                "min" => &mut min,
                "max" => &mut max,
                _ => {
                    self.error(
                        Problem::error("H0207", format!("unexpected `{}` here", c.key.text))
                            .label(c.key.span, "not allowed here")
                            .help("a `vary` line takes `min = X` and `max = Y` to truncate its distribution"),
                    );
                    continue;
                }
            };
            if d.axis_len().is_some() {
                // A design axis runs through all its points; a bound on it
                // would be ignored.
                self.error(
                    Problem::error(
                        "H0207",
                        format!("`{}` does not apply to `{}`", c.key.text, func.text),
                    )
                    .label(c.key.span, "not allowed here")
                    .help("a design axis runs through every one of its points; narrow the list, or the ends of the grid, instead"),
                );
                continue;
            }
            let what = format!("`{}`", c.key.text);
            let v = self.const_value(&c.value, dim, &what);
            *slot = v;
        }
        if let (Some(a), Some(b)) = (min, max) {
            if a >= b {
                self.error(
                    Problem::error("H0411", "`min` must be below `max`")
                        .label(span, "empty range")
                        .help("swap the two bounds"),
                );
                return None;
            }
        }
        if min.is_some() || max.is_some() {
            let mass = d.mass_between(min, max);
            if mass.is_nan() || mass < MIN_TRUNCATED_MASS {
                let kept = if mass > 0.0 {
                    format!("only {mass:.1e} of")
                } else {
                    "none of".to_owned()
                };
                self.error(
                    Problem::error(
                        "H0414",
                        format!(
                            "`min` and `max` leave {kept} the distribution of `{}`",
                            name.text
                        ),
                    )
                    .label(span, "no member could be drawn from this")
                    .help(format!(
                        "the bounds must keep at least {MIN_TRUNCATED_MASS:.0e} of the distribution; compare them with its center and spread"
                    )),
                );
                return None;
            }
        }
        Some(Vary {
            param,
            dist: d,
            min,
            max,
            span,
        })
    }
}
