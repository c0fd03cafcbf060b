//! Lowering: a checked model and one stage to a program (definitions in
//! dependency order, constants folded, built-ins through their table rows).

use super::*;

/// What to compile besides the right-hand side.
#[derive(Debug, Clone, Default)]
pub struct Wants {
    /// Compile the right-hand side (fluxes and rates).
    pub rhs: bool,
    /// Definitions whose values are observed.
    pub defs: Vec<DefId>,
    /// Extra expressions (e.g. expectation subjects).
    pub exprs: Vec<Expr>,
}

/// Parameter values of a stage: every parameter's base value with the
/// stage's `set` lines applied.
pub fn stage_params(model: &Model, stage: Option<usize>) -> Vec<Option<f64>> {
    let mut c = Compiler::new(model, vec![None; model.defs.len()]);
    let mut params = vec![None; model.defs.len()];
    for (id, d) in model.defs.iter().enumerate() {
        if matches!(d.kind, DefKind::Param) {
            params[id] = c.fold(&d.expr);
        }
    }
    if let Some(s) = stage {
        c.params = params.clone();
        for (id, e) in &model.stages[s].sets {
            params[*id] = c.fold(e);
        }
    }
    params
}

/// Compile `wants` for stage `stage` (its parameter overrides and fluxes).
pub fn compile(model: &Model, stage: Option<usize>, wants: &Wants) -> Program {
    compile_with(model, stage, wants, &[])
}

/// Like [`compile`], keeping the parameters in `symbolic` as registers
/// (unless the stage sets them), so that one program can run many members:
/// see [`Program::regs_with`].
pub fn compile_with(
    model: &Model,
    stage: Option<usize>,
    wants: &Wants,
    symbolic: &[DefId],
) -> Program {
    let params = stage_params(model, stage);
    let mut c = Compiler::new(model, params);
    let sets: Vec<DefId> = stage
        .map(|s| model.stages[s].sets.iter().map(|(p, _)| *p).collect())
        .unwrap_or_default();
    for &p in symbolic {
        if !sets.contains(&p) {
            c.symbolic[p] = true;
        }
    }
    c.build(stage, wants)
}

/// What a register holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Kind {
    /// Known when compiling.
    Const,
    /// Depends on parameters only.
    Setup,
    /// Depends on the state or the clock.
    Dynamic,
}

pub(super) struct Compiler<'m> {
    pub(super) model: &'m Model,
    pub(super) params: Vec<Option<f64>>,
    pub(super) init: Vec<f64>,
    pub(super) kind: Vec<Kind>,
    pub(super) ins: Vec<Ins>,
    pub(super) setup: Vec<Ins>,
    pub(super) symbolic: Vec<bool>,
    pub(super) param_regs: Vec<(DefId, Reg)>,
    pub(super) kernels: Kernels,
    pub(super) def_reg: Vec<Option<Reg>>,
    pub(super) cap_reg: Vec<Option<Reg>>,
    pub(super) const_regs: std::collections::HashMap<u64, Reg>,
    pub(super) state_index: Vec<Option<usize>>,
    pub(super) age_reg: Reg,
    pub(super) time_reg: Reg,
    pub(super) tables: Vec<usize>,
    pub(super) age_knots: Vec<f64>,
    pub(super) seen: std::collections::HashMap<Ins, Reg>,
    /// Fuse instruction pairs (off only in the test that checks fusion).
    pub(super) fuse: bool,
}

impl<'m> Compiler<'m> {
    pub(super) fn new(model: &'m Model, params: Vec<Option<f64>>) -> Compiler<'m> {
        let order = state_order(model);
        let n = order.len();
        let mut state_index = vec![None; model.defs.len()];
        for (k, id) in order.iter().enumerate() {
            state_index[*id] = Some(k);
        }
        let init = vec![0.0; n + 2];
        let mut def_reg = vec![None; model.defs.len()];
        for (k, id) in order.iter().enumerate() {
            def_reg[*id] = Some(k as Reg);
        }
        let len = init.len();
        Compiler {
            model,
            params,
            kind: vec![Kind::Dynamic; len],
            init,
            ins: Vec::new(),
            setup: Vec::new(),
            symbolic: vec![false; model.defs.len()],
            param_regs: Vec::new(),
            kernels: Kernels {
                age_reg: n as Reg,
                ..Default::default()
            },
            def_reg,
            cap_reg: vec![None; model.defs.len()],
            const_regs: Default::default(),
            state_index,
            age_reg: n as Reg,
            time_reg: n as Reg + 1,
            tables: Vec::new(),
            age_knots: Vec::new(),
            seen: Default::default(),
            fuse: true,
        }
    }

    pub(super) fn state_order(&self) -> Vec<DefId> {
        state_order(self.model)
    }

    pub(super) fn build(&mut self, stage: Option<usize>, wants: &Wants) -> Program {
        let model = self.model;
        let mut fluxes = Vec::new();
        let mut flux_probes = Vec::new();
        let mut rates = Vec::new();
        let mut rate_probes = Vec::new();
        if wants.rhs {
            // Fluxes are summed in the order of their names, never of their
            // declarations: the stage fingerprint is blind to declaration order
            // (it hashes canonical texts by name), so the sum must be too.
            for id in by_name(model, |k| matches!(k, DefKind::Flux { .. })) {
                let d = &model.defs[id];
                if let DefKind::Flux {
                    from,
                    to,
                    stage: fs,
                } = d.kind
                {
                    if fs.is_some() && fs != stage {
                        continue;
                    }
                    let reg = self.def(id);
                    let ep = |e: Endpoint| match e {
                        Endpoint::Reservoir(r) => self.state_index[r],
                        Endpoint::Outside => None,
                    };
                    fluxes.push((reg, ep(from), ep(to)));
                    flux_probes.push(Probe {
                        reg,
                        def: id,
                        span: d.expr.span,
                    });
                }
            }
            for id in by_name(model, |k| matches!(k, DefKind::State { .. })) {
                let d = &model.defs[id];
                if let DefKind::State { rate } = &d.kind {
                    let reg = self.expr(rate);
                    let i = self.state_index[id].expect("states have components");
                    rates.push((i, reg));
                    rate_probes.push(Probe {
                        reg,
                        def: id,
                        span: rate.span,
                    });
                }
            }
        }
        let mut observed = Vec::new();
        for &d in &wants.defs {
            let reg = self.def(d);
            observed.push((d, reg));
        }
        let extra = wants.exprs.iter().map(|e| self.expr(e)).collect();
        let mut age_knots = std::mem::take(&mut self.age_knots);
        age_knots.sort_by(|a, b| b.total_cmp(a));
        age_knots.dedup();
        let program = Program {
            ins: std::mem::take(&mut self.ins),
            init: std::mem::take(&mut self.init),
            n_state: self.age_reg as usize,
            state_defs: self.state_order(),
            age_reg: self.age_reg,
            time_reg: self.time_reg,
            fluxes,
            flux_probes,
            rates,
            rate_probes,
            observed,
            extra,
            setup: std::mem::take(&mut self.setup),
            param_regs: std::mem::take(&mut self.param_regs),
            kernels: std::mem::take(&mut self.kernels),
            age_knots,
            native: None,
        };
        let mut program = program;
        if self.fuse {
            program.fuse();
        }
        program.check_bounds();
        program
    }

    pub(super) fn constant(&mut self, v: f64) -> Reg {
        let bits = v.to_bits();
        if let Some(&r) = self.const_regs.get(&bits) {
            return r;
        }
        let r = self.init.len() as Reg;
        self.init.push(v);
        self.kind.push(Kind::Const);
        self.const_regs.insert(bits, r);
        r
    }

    pub(super) fn temp(&mut self) -> Reg {
        let r = self.init.len() as Reg;
        self.init.push(0.0);
        self.kind.push(Kind::Dynamic);
        r
    }

    pub(super) fn konst(&self, r: Reg) -> Option<f64> {
        if self.kind[r as usize] == Kind::Const {
            Some(self.init[r as usize])
        } else {
            None
        }
    }

    pub(super) fn table(&mut self, t: usize) -> u32 {
        if let Some(i) = self.tables.iter().position(|&x| x == t) {
            return i as u32;
        }
        let tb = &self.model.tables[t];
        if tb.x_dim.is_age() {
            self.age_knots.extend(tb.xs.iter().copied());
        }
        self.tables.push(t);
        self.kernels.tables.push((tb.xs.clone(), tb.ys.clone()));
        self.kernels.hyps.push(Hypsometry::new(&tb.xs, &tb.ys));
        (self.tables.len() - 1) as u32
    }

    /// The register holding a definition's value.
    pub(super) fn def(&mut self, id: DefId) -> Reg {
        if let Some(r) = self.def_reg[id] {
            return r;
        }
        let d = &self.model.defs[id];
        let r = match d.kind {
            DefKind::Param if self.symbolic[id] => {
                // A register set per member; its default is the compiled value.
                let r = self.temp();
                self.init[r as usize] = self.params[id].unwrap_or(f64::NAN);
                self.kind[r as usize] = Kind::Setup;
                self.param_regs.push((id, r));
                r
            }
            DefKind::Param => match self.params[id] {
                Some(v) => self.constant(v),
                None => self.expr(&d.expr),
            },
            _ => self.expr(&d.expr),
        };
        self.def_reg[id] = Some(r);
        r
    }

    pub(super) fn capacity(&mut self, res: DefId) -> Reg {
        if let Some(r) = self.cap_reg[res] {
            return r;
        }
        let r = match &self.model.defs[res].kind {
            DefKind::Reservoir { capacity: Some(c) } => self.expr(c),
            _ => self.constant(f64::INFINITY),
        };
        self.cap_reg[res] = Some(r);
        r
    }

    /// Fold a constant expression with the current parameter values.
    pub(super) fn fold(&mut self, e: &Expr) -> Option<f64> {
        let r = self.expr(e);
        self.konst(r)
    }

    pub(super) fn emit(&mut self, make: impl Fn(Reg) -> Ins, args: &[Reg]) -> Reg {
        // The same operation on the same registers is computed once.
        let key = make(Reg::MAX);
        if let Some(&r) = self.seen.get(&key) {
            return r;
        }
        let dst = self.temp();
        let ins = make(dst);
        let kinds = args.iter().map(|&a| self.kind[a as usize]);
        let kind = kinds.fold(Kind::Const, |acc, k| match (acc, k) {
            (Kind::Dynamic, _) | (_, Kind::Dynamic) => Kind::Dynamic,
            (Kind::Setup, _) | (_, Kind::Setup) => Kind::Setup,
            _ => Kind::Const,
        });
        if kind == Kind::Const {
            // Every operand known now: evaluate once at compile time. Age and
            // time are never constant, so clock-dependent code stays.
            // SAFETY: the operands are existing registers and `dst` was just
            // allocated, all within `init`; table indices come from
            // `self.table`, within `self.kernels`.
            unsafe { exec(&self.kernels, &mut self.init, ins) };
            let v = self.init[dst as usize];
            // Drop the temporary and share the constant.
            self.init.pop();
            self.kind.pop();
            return self.constant(v);
        }
        self.kind[dst as usize] = kind;
        if kind == Kind::Setup {
            self.setup.push(ins);
            self.seen.insert(key, dst);
            return dst;
        }
        self.ins.push(ins);
        self.seen.insert(key, dst);
        dst
    }

    pub(super) fn expr(&mut self, e: &Expr) -> Reg {
        // Definitions compile on first use, so this recursion follows chains
        // of definitions (at most `check::MAX_DEPTH` deep in a checked model).
        crate::stack::guard(|| self.expr_inner(e))
    }

    pub(super) fn expr_inner(&mut self, e: &Expr) -> Reg {
        match &e.kind {
            ExprKind::Num(v) => self.constant(*v),
            ExprKind::Ref(d) => match self.model.defs[*d].kind {
                DefKind::Reservoir { .. } | DefKind::State { .. } => {
                    self.def_reg[*d].expect("state register")
                }
                _ => self.def(*d),
            },
            ExprKind::Age => self.age_reg,
            ExprKind::Time => self.time_reg,
            ExprKind::Neg(x) => {
                let a = self.expr(x);
                self.emit(|d| Ins::Neg(d, a), &[a])
            }
            ExprKind::Not(x) => {
                let a = self.expr(x);
                self.emit(|d| Ins::Not(d, a), &[a])
            }
            ExprKind::Binary(op, x, y) => {
                let a = self.expr(x);
                let b = self.expr(y);
                let op = *op;
                if op == BinOp::Pow && self.konst(b) == Some(2.0) {
                    return self.emit(|d| Ins::Square(d, a), &[a]);
                }
                self.emit(
                    |d| match op {
                        BinOp::Add => Ins::Add(d, a, b),
                        BinOp::Sub => Ins::Sub(d, a, b),
                        BinOp::Mul => Ins::Mul(d, a, b),
                        BinOp::Div => Ins::Div(d, a, b),
                        BinOp::Pow => Ins::Pow(d, a, b),
                        other => Ins::Other(other, d, a, b),
                    },
                    &[a, b],
                )
            }
            ExprKind::If(c, x, y) => {
                let c = self.expr(c);
                if let Some(cv) = self.konst(c) {
                    return if cv != 0.0 {
                        self.expr(x)
                    } else {
                        self.expr(y)
                    };
                }
                let a = self.expr(x);
                let b = self.expr(y);
                self.emit(|d| Ins::Select(d, c, a, b), &[c, a, b])
            }
            ExprKind::Call(f, args) => self.call(*f, args),
        }
    }

    pub(super) fn call(&mut self, f: Builtin, args: &[Expr]) -> Reg {
        let regs: Vec<Reg> = args.iter().map(|a| self.expr(a)).collect();
        let r = |i: usize| regs[i];
        match f {
            Builtin::Num(func) => self.num(func, &regs),
            Builtin::Decay => {
                let (q, h) = (r(0), r(1));
                let age = self.age_reg;
                self.emit(|d| Ins::Decay(d, q, h), &[q, h, age])
            }
            Builtin::Interp(t) => {
                let t = self.table(t);
                self.emit(|d| Ins::Interp(d, t, r(0)), &regs)
            }
            Builtin::SeaLevel(t) => {
                let t = self.table(t);
                self.emit(|d| Ins::SeaLevel(d, t, r(0)), &regs)
            }
            Builtin::SeaLevelIsostatic(t) => {
                let t = self.table(t);
                self.emit(|d| Ins::SeaLevelIsostatic(d, t, r(0), r(1), r(2)), &regs)
            }
            Builtin::LandFraction(t) => {
                let t = self.table(t);
                self.emit(|d| Ins::LandFraction(d, t, r(0)), &regs)
            }
            Builtin::BasinVolume(t) => {
                let t = self.table(t);
                self.emit(|d| Ins::BasinVolume(d, t, r(0)), &regs)
            }
            Builtin::Capacity(res) => self.capacity(res),
            Builtin::Fill(res) | Builtin::Excess(res) => {
                let m = self.def_reg[res].expect("reservoir register");
                let c = self.capacity(res);
                if matches!(f, Builtin::Fill(_)) {
                    self.emit(|d| Ins::Fill(d, m, c), &[m, c])
                } else {
                    self.emit(|d| Ins::Excess(d, m, c), &[m, c])
                }
            }
        }
    }
}

impl Compiler<'_> {
    /// A built-in function of numbers on the values in `regs`, by the
    /// table's lowering: its own instruction or the call of its kernel.
    /// Arguments past a fixed-arity kernel's count never reach here (the
    /// checker counts them).
    pub(super) fn num(&mut self, func: Func, regs: &[Reg]) -> Reg {
        let name = func.name();
        let num = func.num();
        let r = |i: usize| regs[i];
        match num.lowering {
            Lowering::Exp => self.emit(|d| Ins::Exp(d, r(0)), regs),
            Lowering::Abs => self.emit(|d| Ins::Abs(d, r(0)), regs),
            Lowering::Min => self.chain(regs, Ins::Min),
            Lowering::Max => self.chain(regs, Ins::Max),
            Lowering::Clamp => self.emit(|d| Ins::Clamp(d, r(0), r(1), r(2)), regs),
            Lowering::Call => match num.kernel {
                Kernel::F1(f) => {
                    let k = Kernel1 { f, name };
                    self.emit(|d| Ins::Call1(d, r(0), k), regs)
                }
                Kernel::F2(f) => {
                    let k = Kernel2 { f, name };
                    self.emit(|d| Ins::Call2(d, r(0), r(1), k), regs)
                }
                Kernel::F3(f) => {
                    let k = Kernel3 { f, name };
                    self.emit(|d| Ins::Call3(d, r(0), r(1), r(2), k), regs)
                }
                Kernel::Fold(f) => {
                    let k = Kernel2 { f, name };
                    self.chain(regs, |d, a, b| Ins::Call2(d, a, b, k))
                }
            },
        }
    }

    /// `op` folded over `regs` from the left, as `Kernel::apply` folds.
    pub(super) fn chain(&mut self, regs: &[Reg], op: impl Fn(Reg, Reg, Reg) -> Ins) -> Reg {
        let mut acc = regs[0];
        for &b in &regs[1..] {
            let a = acc;
            acc = self.emit(|d| op(d, a, b), &[a, b]);
        }
        acc
    }
}

/// Definitions of one kind, ordered by name (see [`Model::ids_by_name`]).
pub fn by_name(model: &Model, kind: impl Fn(&DefKind) -> bool) -> Vec<DefId> {
    model.ids_by_name(kind)
}

/// The layout of the state vector: reservoirs by name, then states by name
/// (the two ledger components follow in the solver).
pub fn state_order(model: &Model) -> Vec<DefId> {
    let mut order = by_name(model, |k| matches!(k, DefKind::Reservoir { .. }));
    order.extend(by_name(model, |k| matches!(k, DefKind::State { .. })));
    order
}

/// Initial state: every reservoir's initial inventory and every state's
/// initial value, with the first stage's parameters.
pub fn initial_state(model: &Model) -> Vec<f64> {
    let stage = if model.stages.is_empty() {
        None
    } else {
        Some(0)
    };
    let params = stage_params(model, stage);
    let mut c = Compiler::new(model, params);
    let order = c.state_order();
    order
        .iter()
        .map(|&id| c.fold(&model.defs[id].expr).unwrap_or(f64::NAN))
        .collect()
}
