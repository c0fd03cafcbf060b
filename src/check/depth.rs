//! Nesting depth: how deep evaluation of each definition would recurse,
//! checked against [`MAX_DEPTH`](super::MAX_DEPTH) before anything is compiled.

use super::*;

pub(super) fn body(d: &Def) -> Option<&Expr> {
    match &d.kind {
        DefKind::Reservoir { capacity } => capacity.as_ref(),
        DefKind::State { .. } | DefKind::Table(_) => None,
        _ => Some(&d.expr),
    }
}

pub(super) fn is_register(defs: &[Def], d: DefId) -> bool {
    matches!(
        defs[d].kind,
        DefKind::Reservoir { .. } | DefKind::State { .. } | DefKind::Table(_)
    )
}

/// Nesting depth of a checked expression, a reference counting as the
/// depth of what it refers to.
pub(super) fn expr_depth(defs: &[Def], e: &Expr, def_depth: &dyn Fn(DefId) -> usize) -> usize {
    let sub = |x: &Expr| expr_depth(defs, x, def_depth);
    1 + match &e.kind {
        ExprKind::Num(_) | ExprKind::Age | ExprKind::Time => 0,
        ExprKind::Ref(d) if is_register(defs, *d) => 0,
        ExprKind::Ref(d) => def_depth(*d),
        ExprKind::Neg(x) | ExprKind::Not(x) => sub(x),
        ExprKind::Binary(_, a, b) => sub(a).max(sub(b)),
        ExprKind::If(c, a, b) => sub(c).max(sub(a)).max(sub(b)),
        ExprKind::Call(f, args) => {
            let inner = match f {
                Builtin::Capacity(r) | Builtin::Fill(r) | Builtin::Excess(r) => def_depth(*r),
                _ => 0,
            };
            args.iter().map(sub).max().unwrap_or(0).max(inner)
        }
    }
}

/// Definitions whose expressions an expression pulls in when compiled.
pub(super) fn expr_refs(defs: &[Def], e: &Expr, out: &mut Vec<DefId>) {
    match &e.kind {
        ExprKind::Num(_) | ExprKind::Age | ExprKind::Time => {}
        ExprKind::Ref(d) => {
            if !is_register(defs, *d) {
                out.push(*d)
            }
        }
        ExprKind::Neg(x) | ExprKind::Not(x) => expr_refs(defs, x, out),
        ExprKind::Binary(_, a, b) => {
            expr_refs(defs, a, out);
            expr_refs(defs, b, out);
        }
        ExprKind::If(c, a, b) => {
            expr_refs(defs, c, out);
            expr_refs(defs, a, out);
            expr_refs(defs, b, out);
        }
        ExprKind::Call(f, args) => {
            if let Builtin::Capacity(r) | Builtin::Fill(r) | Builtin::Excess(r) = f {
                out.push(*r);
            }
            for a in args {
                expr_refs(defs, a, out);
            }
        }
    }
}

impl Checker {
    /// The checker itself reached [`MAX_DEPTH`] (following definitions it
    /// checks on first use): report it once, at the expression where it
    /// stopped and with the chain of definitions that led there.
    pub(crate) fn depth_problem(&mut self, span: Span) {
        if self.depth_reported {
            return;
        }
        self.depth_reported = true;
        let chain = self.chain_words(&self.stack.clone());
        self.error(
            Problem::error(
                "H0102",
                format!("expressions nest more than {MAX_DEPTH} deep through the definitions they use"),
            )
            .label(span, "too deep here")
            .help(format!(
                "the chain of definitions is {chain}; compute parts of it as constants, or shorten it"
            )),
        );
    }

    pub(super) fn chain_words(&self, ids: &[DefId]) -> String {
        let names: Vec<&str> = ids.iter().map(|&d| self.defs[d].name.as_str()).collect();
        if names.len() <= 8 {
            return names.join(" -> ");
        }
        format!(
            "{} -> ... ({} more) ... -> {}",
            names[..4].join(" -> "),
            names.len() - 8,
            names[names.len() - 4..].join(" -> ")
        )
    }

    /// How deep every definition nests through the definitions it uses:
    /// compiling, folding and printing walk definitions recursively, and
    /// the order in which the checker visited them does not bound that.
    /// A definition deeper than [`MAX_DEPTH`] is an error (reported for the
    /// shallowest such definition of a chain only). Also finds cycles
    /// through capacities (`fill`, `capacity`, `excess` of a reservoir
    /// whose capacity uses them), which checking on first use cannot see.
    pub(super) fn check_depths(&mut self) {
        let n = self.defs.len();
        #[derive(Clone, Copy, PartialEq)]
        enum Mark {
            New,
            Open,
            Done(usize),
        }
        let mut mark = vec![Mark::New; n];
        let depth_of = |mark: &[Mark], d: DefId| match mark[d] {
            Mark::Done(x) => x,
            _ => 0,
        };
        // Iterative depth-first search: the definition graph may be
        // arbitrarily deep, this walk keeps its own stack. An entry
        // `(d, true)` on the stack is an open definition on the current path.
        let mut order = Vec::with_capacity(n);
        let mut cycle: Option<Vec<DefId>> = None;
        for root in 0..n {
            if mark[root] != Mark::New {
                continue;
            }
            let mut stack: Vec<(DefId, bool)> = vec![(root, false)];
            while let Some((d, expanded)) = stack.pop() {
                if expanded {
                    let x = body(&self.defs[d])
                        .map_or(1, |e| expr_depth(&self.defs, e, &|r| depth_of(&mark, r)));
                    mark[d] = Mark::Done(x);
                    order.push(d);
                    continue;
                }
                if mark[d] != Mark::New {
                    continue;
                }
                mark[d] = Mark::Open;
                stack.push((d, true));
                let mut refs = Vec::new();
                if let Some(e) = body(&self.defs[d]) {
                    expr_refs(&self.defs, e, &mut refs);
                }
                for r in refs {
                    match mark[r] {
                        Mark::New if body(&self.defs[r]).is_some() => stack.push((r, false)),
                        Mark::Open if cycle.is_none() => {
                            let path: Vec<DefId> =
                                stack.iter().filter(|e| e.1).map(|e| e.0).collect();
                            let from = path.iter().position(|&p| p == r).unwrap_or(0);
                            cycle = Some(path[from..].to_vec());
                        }
                        _ => {}
                    }
                }
            }
        }
        if let Some(cycle) = cycle {
            let (names, mut p) = self.cycle_problem(&cycle);
            for (i, &d) in cycle.iter().enumerate() {
                let span = body(&self.defs[d]).map_or(self.defs[d].span, |e| e.span);
                let what = match self.defs[d].kind {
                    DefKind::Reservoir { .. } => {
                        format!("the capacity of `{}` uses `{}`", names[i], names[i + 1])
                    }
                    _ => format!("`{}` uses `{}`", names[i], names[i + 1]),
                };
                p = p.label(span, what);
            }
            self.error(p.help(
                "a capacity may not depend on itself: `fill`, `capacity` and `excess` of a reservoir need its capacity first",
            ));
            return;
        }
        for d in order {
            let x = depth_of(&mark, d);
            if x <= MAX_DEPTH {
                continue;
            }
            // Report where the chain first passes the limit: a definition
            // whose own parts are all within it.
            let mut refs = Vec::new();
            if let Some(e) = body(&self.defs[d]) {
                expr_refs(&self.defs, e, &mut refs);
            }
            if refs.iter().any(|&r| depth_of(&mark, r) > MAX_DEPTH) {
                continue;
            }
            let mut chain = vec![d];
            let mut cur = d;
            while chain.len() < 10_000 {
                let mut next = Vec::new();
                if let Some(e) = body(&self.defs[cur]) {
                    expr_refs(&self.defs, e, &mut next);
                }
                match next.into_iter().max_by_key(|&r| depth_of(&mark, r)) {
                    Some(r) if depth_of(&mark, r) > 1 && !chain.contains(&r) => {
                        chain.push(r);
                        cur = r;
                    }
                    _ => break,
                }
            }
            let words = self.chain_words(&chain);
            let span = body(&self.defs[d]).map_or(self.defs[d].span, |e| e.span);
            self.error(
                Problem::error(
                    "H0102",
                    format!(
                        "`{}` nests {x} deep through the definitions it uses; at most {MAX_DEPTH} are allowed",
                        self.defs[d].name
                    ),
                )
                .label(span, "too deep")
                .help(format!(
                    "the chain of definitions is {words}; compute parts of it as constants, or shorten it"
                )),
            );
        }
    }
}
