//! Declaration: every definition's name (user names shadow the prelude),
//! `--set` overrides, and the clauses and endpoints of reservoirs and fluxes.

use super::*;

/// The expression whose depth counts when a definition is used: a value's
/// formula; a reservoir's capacity (inlined by `fill`, `capacity` and
/// `excess`). A reference to a reservoir or a state reads a register and
/// ends the walk.
/// H0415 for a `--set NAME=VALUE` that is not one expression on one line:
/// a line break would smuggle further statements past the option (they
/// were dropped, while the manifest recorded the whole text), and a
/// comment would be recorded in the manifest as part of the value. `file`
/// holds `param NAME = VALUE`, so spans are offsets into that text.
pub(super) fn override_shape(name: &str, value: &str, file: u32) -> Option<Problem> {
    let at = |start: usize, end: usize| Span {
        file,
        start: start as u32,
        end: end as u32,
    };
    let value_start = "param ".len() + name.len() + " = ".len();
    if let Some(i) = name.find(|c: char| c.is_control() && c != '\t') {
        let start = "param ".len();
        return Some(
            Problem::error("H0415", "a `--set` name must be one name on one line")
                .label(
                    at(start + i, start + name.len()),
                    "a line break or control character",
                )
                .help("give each parameter its own `--set NAME=VALUE`"),
        );
    }
    let (i, problem) = if let Some(i) = value.find(|c: char| c.is_control() && c != '\t') {
        (
            i,
            Problem::error(
                "H0415",
                format!("`--set {name}` must be one expression on one line"),
            )
            .help("give each parameter its own `--set NAME=VALUE`; other statements belong in the scenario file"),
        )
    } else if let Some(i) = value.find('#') {
        (
            i,
            Problem::error("H0415", format!("`--set {name}` cannot carry a comment")).help(
                "leave out the `# ...`: the value is recorded in the manifest exactly as given",
            ),
        )
    } else {
        return None;
    };
    let what = if value[i..].starts_with('#') {
        "a comment"
    } else {
        "a line break or control character"
    };
    Some(problem.label(at(value_start + i, value_start + value.len()), what))
}

pub(super) fn item_name(stmt: &syntax::Stmt) -> Option<(String, Span)> {
    let id = match &stmt.kind {
        StmtKind::Const { name, .. }
        | StmtKind::Param { name, .. }
        | StmtKind::Let { name, .. }
        | StmtKind::Output { name, .. }
        | StmtKind::Event { name, .. }
        | StmtKind::Table { name, .. }
        | StmtKind::Reservoir { name, .. }
        | StmtKind::State { name, .. }
        | StmtKind::Flux { name, .. } => name,
        _ => return None,
    };
    Some((id.text.clone(), id.span))
}

impl Checker {
    pub(super) fn declare(&mut self) {
        // User names first, so they shadow the prelude.
        let mut order: Vec<usize> = (0..self.items.len())
            .filter(|&i| self.items[i].origin != Origin::Prelude)
            .collect();
        let prelude: Vec<usize> = (0..self.items.len())
            .filter(|&i| self.items[i].origin == Origin::Prelude)
            .collect();
        let mut spans: HashMap<String, Span> = HashMap::new();
        let mut accepted = Vec::new();
        for &i in &order {
            let Some((name, span)) = item_name(&self.items[i].stmt) else {
                continue;
            };
            if expr::is_reserved(&name) {
                self.error(
                    Problem::error("H0202", format!("`{name}` is a built-in name"))
                        .label(span, "reserved")
                        .help(
                            "choose another name; `age`, `time` and `outside` have fixed meanings",
                        ),
                );
                continue;
            }
            if let Some(first) = spans.get(&name) {
                self.error(
                    Problem::error("H0202", format!("`{name}` is defined twice"))
                        .label(span, "defined again here")
                        .label(*first, "first defined here")
                        .help("rename one of them, or delete the second"),
                );
                continue;
            }
            spans.insert(name.clone(), span);
            accepted.push(i);
        }
        let mut with_prelude: Vec<usize> = prelude
            .into_iter()
            .filter(|&i| {
                item_name(&self.items[i].stmt).is_some_and(|(n, _)| !spans.contains_key(&n))
            })
            .collect();
        with_prelude.extend(accepted);
        order = with_prelude;
        for i in order {
            let item = &self.items[i];
            let (name, span) = item_name(&item.stmt).expect("filtered above");
            let placeholder = Expr {
                kind: ExprKind::Num(0.0),
                span,
            };
            let kind = match &item.stmt.kind {
                StmtKind::Const { .. } => DefKind::Const,
                StmtKind::Param { .. } => DefKind::Param,
                StmtKind::Let { .. } => DefKind::Let,
                StmtKind::Output { .. } => DefKind::Output,
                StmtKind::Event { .. } => DefKind::Event,
                StmtKind::Table { .. } => DefKind::Table(usize::MAX),
                StmtKind::Reservoir { .. } => DefKind::Reservoir { capacity: None },
                StmtKind::State { .. } => DefKind::State {
                    rate: placeholder.clone(),
                },
                StmtKind::Flux { .. } => DefKind::Flux {
                    from: Endpoint::Outside,
                    to: Endpoint::Outside,
                    stage: item.stage,
                },
                _ => continue,
            };
            let syntax_expr = main_expr(&item.stmt).map(|_| Rc::clone(&item.stmt));
            let id = self.defs.len();
            self.symbols.insert(name.clone(), id);
            self.defs.push(Def {
                name,
                kind,
                dim: Dim::NONE,
                expr: placeholder,
                doc: item.doc.clone(),
                span,
                display_unit: None,
                prelude: item.origin == Origin::Prelude,
            });
            self.def_syntax.push(syntax_expr);
            self.slots.push(Slot::Todo);
            self.def_item.push(i);
        }
        // Tables are read now, so that calls can be checked against their units.
        for id in 0..self.defs.len() {
            let item = &self.items[self.def_item[id]];
            if let StmtKind::Table {
                path,
                x_unit,
                y_unit,
                ..
            } = &item.stmt.kind
            {
                let (path, x_unit, y_unit) = (path.clone(), x_unit.clone(), y_unit.clone());
                let t = self.load_table(id, &path, &x_unit, &y_unit);
                self.defs[id].kind = DefKind::Table(t);
                self.slots[id] = Slot::Done(expr::Typed::error());
            }
        }
    }

    /// Replace parameter values by `--set` overrides, parsed as expressions
    /// of their own.
    pub(super) fn apply_overrides(&mut self, options: &CheckOptions) {
        for (name, value) in &options.overrides {
            let text = format!("param {name} = {value}\n");
            // Escaped, so that a line break in the option cannot break the
            // location line of a diagnostic.
            let shown: String = format!("--set {name}={value}")
                .chars()
                .flat_map(|c| {
                    let escaped: Vec<char> = if c.is_control() {
                        c.escape_debug().collect()
                    } else {
                        vec![c]
                    };
                    escaped
                })
                .collect();
            let file = self.sources.add(shown, PathBuf::new(), text.clone());
            if let Some(p) = override_shape(name, value, file) {
                self.error(p);
                continue;
            }
            let parsed = match syntax::parse(&text, file) {
                Ok(p) => p,
                Err(problems) => {
                    for p in problems {
                        self.error(p);
                    }
                    continue;
                }
            };
            let mut entries = parsed.entries.into_iter();
            let (Some(EntryKind::Stmt(stmt)), None) =
                (entries.next().map(|e| e.kind), entries.next())
            else {
                // Unreachable after `override_shape`: one line without a
                // comment parses to one statement or to errors.
                continue;
            };
            let stmt: Rc<syntax::Stmt> = Rc::new(*stmt);
            let StmtKind::Param { name: ident, value } = &stmt.kind else {
                continue;
            };
            match self.symbols.get(name).copied() {
                Some(id) if matches!(self.defs[id].kind, DefKind::Param) => {
                    // The override must be of the declared kind; otherwise
                    // every use of the parameter would report a mismatch in
                    // the file, far from the option that caused it.
                    let declared = self.def_type(id);
                    let declared_syntax = self.def_syntax[id].replace(Rc::clone(&stmt));
                    let declared_unit = self.defs[id].display_unit.take();
                    self.slots[id] = Slot::Todo;
                    let given = self.def_type(id);
                    if let (expr::Ty::Num(want), expr::Ty::Num(got)) = (declared.ty, given.ty) {
                        let time_kinds = want.same_base(Dim::TIME) && want.point != got.point;
                        if !want.same_base(got) || time_kinds {
                            self.error(
                                Problem::error(
                                    "H0303",
                                    format!(
                                        "`--set {name}` must be {}, as declared, found {}",
                                        want.words(),
                                        got.words()
                                    ),
                                )
                                .label(value.span, format!("this is {}", got.words()))
                                .label(self.defs[id].span, "declared here")
                                .help(expr::dim_hint(want, got)),
                            );
                            // Keep the declaration, so its uses check as written.
                            self.def_syntax[id] = declared_syntax;
                            self.defs[id].display_unit = declared_unit;
                            self.slots[id] = Slot::Todo;
                            self.def_type(id);
                        }
                    }
                }
                Some(id) => {
                    let word = self.defs[id].kind.word();
                    self.error(
                        Problem::error("H0209", format!("`{name}` is a {word}, not a parameter"))
                            .label(ident.span, "only parameters can be set")
                            .help("declare it with `param` to make it adjustable"),
                    );
                }
                None => {
                    let params: Vec<&str> = self
                        .defs
                        .iter()
                        .filter(|d| matches!(d.kind, DefKind::Param))
                        .map(|d| d.name.as_str())
                        .collect();
                    let mut p = Problem::error("H0201", format!("unknown parameter `{name}`"))
                        .label(ident.span, "no such parameter");
                    p = match nearest(name, params.iter().copied()) {
                        Some(s) => p.help(format!("did you mean `{s}`?")),
                        None => p.help(format!("the parameters are: {}", params.join(", "))),
                    };
                    self.error(p);
                }
            }
        }
    }

    /// Capacities, state rates and flux endpoints.
    pub(super) fn check_def_extras(&mut self) {
        for id in 0..self.defs.len() {
            let item_index = self.def_item[id];
            let stmt = Rc::clone(&self.items[item_index].stmt);
            match &stmt.kind {
                StmtKind::Reservoir { clauses, .. } => {
                    let mut capacity = None;
                    for c in clauses {
                        if c.key.text == "capacity" && capacity.is_none() {
                            self.stack.push(id);
                            let (e, t) = self.check_expr(&c.value);
                            self.stack.pop();
                            self.expect_dim(&t, Dim::MASS, c.value.span, "a capacity");
                            capacity = Some(e);
                        } else {
                            self.bad_clause(&c.key, "reservoir", "capacity");
                        }
                    }
                    self.defs[id].kind = DefKind::Reservoir { capacity };
                }
                StmtKind::State { clauses, name, .. } => {
                    let mut rate = None;
                    for c in clauses {
                        if c.key.text == "rate" && rate.is_none() {
                            self.stack.push(id);
                            let (e, t) = self.check_expr(&c.value);
                            self.stack.pop();
                            let want = self.defs[id]
                                .dim
                                .plain()
                                .per(Dim::TIME)
                                .unwrap_or(Dim::NONE);
                            let what = format!("the rate of `{}`", self.defs[id].name);
                            self.expect_dim(&t, want, c.value.span, &what);
                            rate = Some(e);
                        } else {
                            self.bad_clause(&c.key, "state", "rate");
                        }
                    }
                    match rate {
                        Some(r) => self.defs[id].kind = DefKind::State { rate: r },
                        None => self.error(
                            Problem::error("H0401", format!("state `{}` has no rate", name.text))
                                .label(name.span, "no `, rate = ...`")
                                .help("add `, rate = EXPR` (its dimension per time); a prescribed history is a `let` of `age`"),
                        ),
                    }
                }
                StmtKind::Flux { from, to, .. } => {
                    let a = self.endpoint(from);
                    let b = self.endpoint(to);
                    if let (Some(a), Some(b)) = (a, b) {
                        if a == b {
                            self.error(
                                Problem::error("H0405", "a flux must connect two different places")
                                    .label(to.span, "same as the source")
                                    .help("a flux moves water from one reservoir to another, or to or from `outside`"),
                            );
                        }
                        if let DefKind::Flux { from, to, .. } = &mut self.defs[id].kind {
                            *from = a;
                            *to = b;
                        }
                    }
                }
                StmtKind::Output { unit: Some(u), .. } => {
                    match crate::units::combine(
                        u.factors.iter().map(|f| (f.name.as_str(), f.power)),
                    ) {
                        Ok(unit) => {
                            let d = self.defs[id].dim;
                            if !unit.dim.same_base(d) {
                                self.error(
                                    Problem::error(
                                        "H0301",
                                        format!(
                                            "cannot show {} in `{}` ({})",
                                            d.words(),
                                            u.text,
                                            unit.dim.words()
                                        ),
                                    )
                                    .label(u.span, format!("a unit of {}", unit.dim.words()))
                                    .help(format!("use a unit of {}", d.words())),
                                );
                            } else {
                                self.defs[id].display_unit = Some((u.text.clone(), unit));
                            }
                        }
                        Err(e) => self.unit_error(u, e),
                    }
                }
                _ => {}
            }
        }
    }

    /// A clause that is not the one `word` statements take, or is given twice.
    pub(super) fn bad_clause(&mut self, key: &syntax::Ident, word: &str, allowed: &str) {
        let p = if key.text == allowed {
            Problem::error("H0207", format!("`{allowed}` is given twice"))
                .label(key.span, "given again here")
                .help(format!("a {word} has one `{allowed}`; delete the other"))
        } else {
            let p = Problem::error("H0207", format!("a {word} takes no `{}`", key.text))
                .label(key.span, format!("not a clause of a {word}"));
            match nearest(&key.text, [allowed]) {
                Some(s) => p.help(format!("did you mean `{s}`?")),
                None => p.help(format!("a {word} takes only `, {allowed} = ...`")),
            }
        };
        self.error(p);
    }

    pub(super) fn endpoint(&mut self, ident: &syntax::Ident) -> Option<Endpoint> {
        if ident.text == "outside" {
            return Some(Endpoint::Outside);
        }
        match self.symbols.get(&ident.text).copied() {
            Some(id) if matches!(self.defs[id].kind, DefKind::Reservoir { .. }) => {
                Some(Endpoint::Reservoir(id))
            }
            Some(id) => {
                let word = self.defs[id].kind.word();
                self.error(
                    Problem::error(
                        "H0405",
                        format!("`{}` is a {word}, not a reservoir", ident.text),
                    )
                    .label(ident.span, "fluxes connect reservoirs")
                    .label(self.defs[id].span, "defined here")
                    .help("declare it with `reservoir`, or use `outside` for a source or sink"),
                );
                None
            }
            None => {
                let names: Vec<String> = self
                    .reservoirs_named()
                    .into_iter()
                    .chain(std::iter::once("outside".to_owned()))
                    .collect();
                let mut p = Problem::error("H0405", format!("unknown reservoir `{}`", ident.text))
                    .label(ident.span, "not declared");
                p = match nearest(&ident.text, names.iter().map(String::as_str)) {
                    Some(s) => p.help(format!("did you mean `{s}`?")),
                    None => p.help("declare it with `reservoir NAME = INITIAL`, or use `outside`"),
                };
                self.error(p);
                None
            }
        }
    }

    pub(super) fn reservoirs_named(&self) -> Vec<String> {
        self.defs
            .iter()
            .filter(|d| matches!(d.kind, DefKind::Reservoir { .. }))
            .map(|d| d.name.clone())
            .collect()
    }
}
