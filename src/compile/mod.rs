//! Phase 4, compile: a checked model and one stage to flat programs over
//! numbered registers.
//!
//! Invariant: the programs this module emits carry no names, no source text
//! and no hash maps; evaluating one allocates nothing. Names survive only in
//! side tables used to word diagnostics.

mod native;

use crate::builtins::{Func, Kernel, Lowering};
use crate::model::{Builtin, DefId, DefKind, Endpoint, Expr, ExprKind, Model};
use crate::numeric;
pub use crate::numeric::hyps;
use crate::span::Span;
use crate::syntax::BinOp;
use hyps::Hypsometry;

type Reg = u32;

/// One instruction: destination first.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Ins {
    Add(Reg, Reg, Reg),
    Sub(Reg, Reg, Reg),
    Mul(Reg, Reg, Reg),
    Div(Reg, Reg, Reg),
    Pow(Reg, Reg, Reg),
    Square(Reg, Reg),
    Other(BinOp, Reg, Reg, Reg),
    Neg(Reg, Reg),
    Not(Reg, Reg),
    Select(Reg, Reg, Reg, Reg),
    Exp(Reg, Reg),
    Abs(Reg, Reg),
    Min(Reg, Reg, Reg),
    Max(Reg, Reg, Reg),
    Clamp(Reg, Reg, Reg, Reg),
    /// A built-in function of numbers by its kernel (`builtins::Lowering::Call`),
    /// of one, two or three arguments.
    Call1(Reg, Reg, Kernel1),
    Call2(Reg, Reg, Reg, Kernel2),
    Call3(Reg, Reg, Reg, Reg, Kernel3),
    /// q * 2^(age / half_life)
    Decay(Reg, Reg, Reg),
    Interp(Reg, u32, Reg),
    SeaLevel(Reg, u32, Reg),
    /// Sea level with the water load compensated: volume scaled by
    /// (rho_m - rho_w) / rho_m.
    SeaLevelIsostatic(Reg, u32, Reg, Reg, Reg),
    LandFraction(Reg, u32, Reg),
    BasinVolume(Reg, u32, Reg),
    /// inventory / capacity
    Fill(Reg, Reg, Reg),
    /// max(0, inventory - capacity)
    Excess(Reg, Reg, Reg),
    // Fused pairs (see `fuse`): the same operations in the same order, one
    // dispatch instead of two.
    /// (a * b) * c
    Mul3(Reg, Reg, Reg, Reg),
    /// exp(a * b)
    ExpMul(Reg, Reg, Reg),
    /// a * (b - c)
    MulSub(Reg, Reg, Reg, Reg),
    /// (a - b) / c
    SubDiv(Reg, Reg, Reg, Reg),
    /// acc + q * 2^(age / half_life): a sum of decaying sources
    DecayAdd(Reg, Reg, Reg, Reg),
    /// c * exp(a * b)
    MulExpMul(Reg, Reg, Reg, Reg),
}

/// A kernel as an instruction carries it: two instructions with the same
/// function are the same instruction (so it is computed once); printed by
/// the built-in's name.
macro_rules! kernel_ref {
    ($name:ident, $f:ty) => {
        #[derive(Clone, Copy)]
        pub struct $name {
            pub f: $f,
            pub name: &'static str,
        }

        impl PartialEq for $name {
            fn eq(&self, other: &$name) -> bool {
                self.f as usize == other.f as usize
            }
        }

        impl Eq for $name {}

        impl std::hash::Hash for $name {
            fn hash<H: std::hash::Hasher>(&self, h: &mut H) {
                (self.f as usize).hash(h);
            }
        }

        impl std::fmt::Debug for $name {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str(self.name)
            }
        }
    };
}

kernel_ref!(Kernel1, fn(f64) -> f64);
kernel_ref!(Kernel2, fn(f64, f64) -> f64);
kernel_ref!(Kernel3, fn(f64, f64, f64) -> f64);

/// What a compiled value is, for diagnostics.
#[derive(Debug, Clone)]
pub struct Probe {
    pub reg: Reg,
    pub def: DefId,
    pub span: Span,
}

/// A compiled stage: the right-hand side of the ODE and observers.
#[derive(Debug, Clone)]
pub struct Program {
    /// Every register index and table index in `ins` is within `init` and
    /// the table lists (checked when the program is built), which is what
    /// lets `exec` skip bounds checks.
    ins: Vec<Ins>,
    /// Register file at start: state slots, clock, constants.
    init: Vec<f64>,
    /// Number of state components (reservoirs, then states).
    pub n_state: usize,
    /// Definition of each state component.
    pub state_defs: Vec<DefId>,
    /// Register of the current age and of the time since the span start.
    pub age_reg: Reg,
    pub time_reg: Reg,
    /// Active fluxes: (rate register, from component, to component).
    pub fluxes: Vec<(Reg, Option<usize>, Option<usize>)>,
    pub flux_probes: Vec<Probe>,
    /// State rates: (component, register).
    pub rates: Vec<(usize, Reg)>,
    pub rate_probes: Vec<Probe>,
    /// Registers of observed definitions (outputs, events, expectations).
    pub observed: Vec<(DefId, Reg)>,
    /// Registers of extra observed expressions, in the order asked.
    pub extra: Vec<Reg>,
    /// Instructions that depend on parameters but not on the state or the
    /// clock: run once when the registers are set up, not per evaluation.
    setup: Vec<Ins>,
    /// Parameters kept as registers (so one program serves many members).
    pub param_regs: Vec<(DefId, Reg)>,
    kernels: Kernels,
    /// Knots of age-indexed tables this program reads (breakpoints).
    pub age_knots: Vec<f64>,
    /// Native code for `ins`, when asked for (see [`Program::make_native`]).
    native: Option<NativeCode>,
}

/// Native code shared by the clones of a program.
#[derive(Clone)]
struct NativeCode(std::sync::Arc<native::Code>);

impl std::fmt::Debug for NativeCode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("NativeCode")
    }
}

/// Data that instructions read besides registers.
#[derive(Debug, Clone, Default)]
struct Kernels {
    tables: Vec<(Vec<f64>, Vec<f64>)>,
    hyps: Vec<Hypsometry>,
    age_reg: Reg,
}

/// Mutable registers for one evaluator; allocated once per integration.
#[derive(Debug, Clone)]
pub struct Regs(pub Vec<f64>);

impl Program {
    /// Registers with every parameter at its compiled value.
    pub fn regs(&self) -> Regs {
        self.regs_with(&[])
    }

    /// Registers with the given parameters (those compiled as registers)
    /// set to new values, and the parameter-only instructions run.
    pub fn regs_with(&self, params: &[(DefId, f64)]) -> Regs {
        let mut r = self.init.clone();
        for &(d, v) in params {
            if let Some(&(_, reg)) = self.param_regs.iter().find(|(p, _)| *p == d) {
                r[reg as usize] = v;
            }
        }
        for ins in &self.setup {
            // SAFETY: `r` is a copy of `init`; `check_bounds` verified every
            // index in `setup` when the program was built.
            unsafe { exec(&self.kernels, &mut r, *ins) };
        }
        Regs(r)
    }

    /// Run the program for state `y` at time `t` (years since the span start)
    /// and age `age`.
    #[inline]
    pub fn eval(&self, regs: &mut Regs, y: &[f64], t: f64, age: f64) {
        let r = self.load_inputs(regs, y, t, age);
        if let Some(code) = &self.native {
            // SAFETY: `r` has `init.len()` registers (checked by
            // `load_inputs`); the code touches only registers and tables
            // that `check_bounds` verified, and `self.kernels` are the
            // kernels it was built for.
            unsafe { (code.0.func())(r.as_mut_ptr(), &self.kernels) };
            return;
        }
        self.interpret(r);
    }

    /// Evaluate with the interpreter even when native code exists (for the
    /// tests that compare the two).
    pub fn eval_interpreted(&self, regs: &mut Regs, y: &[f64], t: f64, age: f64) {
        let r = self.load_inputs(regs, y, t, age);
        self.interpret(r);
    }

    /// The state and the clock into the registers.
    fn load_inputs<'r>(&self, regs: &'r mut Regs, y: &[f64], t: f64, age: f64) -> &'r mut [f64] {
        let r = &mut regs.0;
        // Registers from another program would break `exec`'s invariant.
        assert_eq!(r.len(), self.init.len(), "registers of another program");
        r[..self.n_state].copy_from_slice(&y[..self.n_state]);
        r[self.age_reg as usize] = age;
        r[self.time_reg as usize] = t;
        r
    }

    fn interpret(&self, r: &mut [f64]) {
        debug_assert_eq!(r.len(), self.init.len());
        for ins in &self.ins {
            // SAFETY: `r` has `init.len()` registers (asserted by
            // `load_inputs`) and `check_bounds` verified every index in
            // `ins` when the program was built.
            unsafe { exec(&self.kernels, r, *ins) };
        }
    }

    /// Generate native code for the dynamic instructions, for a program
    /// that will be evaluated many times (building costs about as much as a
    /// few thousand interpreted evaluations). Results are the same bits as
    /// the interpreter's. Returns whether this machine got native code; if
    /// not, the program stays interpreted.
    ///
    /// The code takes every register that is neither state, clock,
    /// parameter nor written by an instruction as a constant: the layout
    /// fields (`n_state`, `age_reg`, `time_reg`, `param_regs`) must not
    /// change afterwards, as they must not for the interpreter either.
    pub fn make_native(&mut self) -> bool {
        if self.native.is_some() {
            return true;
        }
        // Registers that hold the same value in every evaluation: neither
        // state, clock nor parameter, and written by no instruction.
        let mut fixed = vec![true; self.init.len()];
        for f in fixed.iter_mut().take(self.n_state) {
            *f = false;
        }
        fixed[self.age_reg as usize] = false;
        fixed[self.time_reg as usize] = false;
        for &(_, r) in &self.param_regs {
            fixed[r as usize] = false;
        }
        for ins in self.ins.iter().chain(&self.setup) {
            fixed[dest(ins) as usize] = false;
        }
        self.native = native::build(&self.ins, &self.init, &fixed, self.kernels.age_reg)
            .map(|c| NativeCode(std::sync::Arc::new(c)));
        self.native.is_some()
    }

    /// Number of instructions (for tests and benchmarks).
    pub fn len(&self) -> usize {
        self.ins.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ins.is_empty()
    }

    /// Fuse pairs of instructions where the first one's result is used only
    /// by the second. Results are bit-identical: the fused forms perform the
    /// same IEEE operations in the same order.
    fn fuse(&mut self) {
        let n = self.init.len();
        let mut uses = vec![0u32; n];
        let mut count = |r: Reg| uses[r as usize] += 1;
        for ins in self.ins.iter().chain(&self.setup) {
            for r in operands(ins) {
                count(r);
            }
        }
        // Registers read from outside the instruction list count as uses.
        let outside = self
            .fluxes
            .iter()
            .map(|f| f.0)
            .chain(self.rates.iter().map(|r| r.1));
        let observed = self
            .observed
            .iter()
            .map(|o| o.1)
            .chain(self.extra.iter().copied());
        for r in outside
            .chain(observed)
            .chain(self.param_regs.iter().map(|p| p.1))
        {
            uses[r as usize] += 1;
        }
        // Where each register is written, among the dynamic instructions.
        let mut writer: Vec<Option<usize>> = vec![None; n];
        for (i, ins) in self.ins.iter().enumerate() {
            writer[dest(ins) as usize] = Some(i);
        }
        let mut dead = vec![false; self.ins.len()];
        for i in 0..self.ins.len() {
            let single = |r: Reg, dead: &[bool]| -> Option<Ins> {
                let w = writer[r as usize]?;
                (w < i && uses[r as usize] == 1 && !dead[w]).then(|| self.ins[w])
            };
            // (IEEE addition and multiplication are commutative, so an
            // operand may be taken from either side.)
            let fused = match self.ins[i] {
                Ins::Mul(d, x, y) => match (single(x, &dead), single(y, &dead)) {
                    (Some(Ins::Mul(_, a, b)), _) => Some((Ins::Mul3(d, a, b, y), x)),
                    (_, Some(Ins::Mul(_, a, b))) => Some((Ins::Mul3(d, a, b, x), y)),
                    (_, Some(Ins::Sub(_, a, b))) => Some((Ins::MulSub(d, x, a, b), y)),
                    (Some(Ins::Sub(_, a, b)), _) => Some((Ins::MulSub(d, y, a, b), x)),
                    (_, Some(Ins::ExpMul(_, a, b))) => Some((Ins::MulExpMul(d, x, a, b), y)),
                    (Some(Ins::ExpMul(_, a, b)), _) => Some((Ins::MulExpMul(d, y, a, b), x)),
                    _ => None,
                },
                Ins::Add(d, x, y) => match (single(x, &dead), single(y, &dead)) {
                    (_, Some(Ins::Decay(_, q, h))) => Some((Ins::DecayAdd(d, x, q, h), y)),
                    (Some(Ins::Decay(_, q, h)), _) => Some((Ins::DecayAdd(d, y, q, h), x)),
                    _ => None,
                },
                Ins::Exp(d, x) => match single(x, &dead) {
                    Some(Ins::Mul(_, a, b)) => Some((Ins::ExpMul(d, a, b), x)),
                    _ => None,
                },
                Ins::Div(d, x, y) => match single(x, &dead) {
                    Some(Ins::Sub(_, a, b)) => Some((Ins::SubDiv(d, a, b, y), x)),
                    _ => None,
                },
                _ => None,
            };
            if let Some((ins, gone)) = fused {
                let w = writer[gone as usize].expect("written above");
                dead[w] = true;
                self.ins[i] = ins;
            }
        }
        let mut k = 0;
        self.ins.retain(|_| {
            k += 1;
            !dead[k - 1]
        });
    }

    /// Verify every register and table index; called once per program.
    fn check_bounds(&self) {
        let n = self.init.len() as u32;
        let t = self.kernels.tables.len() as u32;
        assert_eq!(self.kernels.tables.len(), self.kernels.hyps.len());
        let ok = |regs: &[Reg], tables: &[u32]| {
            regs.iter().all(|&r| r < n) && tables.iter().all(|&x| x < t)
        };
        for ins in self.ins.iter().chain(&self.setup) {
            let sh = shape(ins);
            let fine = ok(&[sh.dest], sh.table.as_slice())
                && ok(sh.reads(), &[])
                && (!sh.age || ok(&[self.age_reg], &[]));
            assert!(fine, "compiler produced an out-of-range register: {ins:?}");
        }
        for r in self
            .fluxes
            .iter()
            .map(|f| f.0)
            .chain(self.rates.iter().map(|r| r.1))
        {
            assert!(r < n);
        }
    }

    /// Right-hand side: derivatives of every component of `y`, including the
    /// ledger of sources (index n_state) and sinks (n_state + 1).
    #[inline]
    pub fn rhs(&self, regs: &mut Regs, t: f64, age: f64, y: &[f64], dy: &mut [f64]) {
        self.eval(regs, y, t, age);
        let r = &regs.0;
        for d in dy.iter_mut() {
            *d = 0.0;
        }
        let (src, sink) = (self.n_state, self.n_state + 1);
        for &(reg, from, to) in &self.fluxes {
            let v = r[reg as usize];
            match from {
                Some(i) => dy[i] -= v,
                None => dy[src] += v,
            }
            match to {
                Some(i) => dy[i] += v,
                None => dy[sink] += v,
            }
        }
        for &(i, reg) in &self.rates {
            dy[i] = r[reg as usize];
        }
    }

    pub fn value(&self, regs: &Regs, reg: Reg) -> f64 {
        regs.0[reg as usize]
    }
}

/// Where an instruction writes, what it reads and which table: the one
/// description of operands that bounds checking, fusion and native code
/// rely on.
struct Shape {
    dest: Reg,
    regs: [Reg; 3],
    n: usize,
    table: Option<u32>,
    /// Reads the age register too.
    age: bool,
}

impl Shape {
    fn reads(&self) -> &[Reg] {
        &self.regs[..self.n]
    }
}

fn shape(ins: &Ins) -> Shape {
    let sh = |dest: Reg, reads: &[Reg], table: Option<u32>, age: bool| {
        let mut regs = [0; 3];
        regs[..reads.len()].copy_from_slice(reads);
        Shape {
            dest,
            regs,
            n: reads.len(),
            table,
            age,
        }
    };
    match *ins {
        Ins::Add(d, a, b)
        | Ins::Sub(d, a, b)
        | Ins::Mul(d, a, b)
        | Ins::Div(d, a, b)
        | Ins::Pow(d, a, b)
        | Ins::Other(_, d, a, b)
        | Ins::Min(d, a, b)
        | Ins::Max(d, a, b)
        | Ins::Fill(d, a, b)
        | Ins::Excess(d, a, b)
        | Ins::ExpMul(d, a, b)
        | Ins::Call2(d, a, b, _) => sh(d, &[a, b], None, false),
        Ins::Decay(d, a, b) => sh(d, &[a, b], None, true),
        Ins::Square(d, a)
        | Ins::Neg(d, a)
        | Ins::Not(d, a)
        | Ins::Exp(d, a)
        | Ins::Abs(d, a)
        | Ins::Call1(d, a, _) => sh(d, &[a], None, false),
        Ins::Select(d, c, a, b)
        | Ins::Clamp(d, c, a, b)
        | Ins::Call3(d, c, a, b, _)
        | Ins::Mul3(d, c, a, b)
        | Ins::MulSub(d, c, a, b)
        | Ins::SubDiv(d, c, a, b)
        | Ins::MulExpMul(d, c, a, b) => sh(d, &[c, a, b], None, false),
        Ins::DecayAdd(d, c, a, b) => sh(d, &[c, a, b], None, true),
        Ins::Interp(d, t, x)
        | Ins::SeaLevel(d, t, x)
        | Ins::LandFraction(d, t, x)
        | Ins::BasinVolume(d, t, x) => sh(d, &[x], Some(t), false),
        Ins::SeaLevelIsostatic(d, t, v, a, b) => sh(d, &[v, a, b], Some(t), false),
    }
}

/// The registers an instruction reads.
fn operands(ins: &Ins) -> Vec<Reg> {
    shape(ins).reads().to_vec()
}

/// The register an instruction writes.
fn dest(ins: &Ins) -> Reg {
    shape(ins).dest
}

/// # Safety
/// Every register index in `ins` must be below `r.len()` and every table
/// index within `p`'s tables (see `Program::check_bounds`).
#[inline(always)]
unsafe fn exec(p: &Kernels, r: &mut [f64], ins: Ins) {
    macro_rules! g {
        ($x:expr) => {
            *r.get_unchecked_mut($x as usize)
        };
    }
    match ins {
        Ins::Add(d, a, b) => g!(d) = g!(a) + g!(b),
        Ins::Sub(d, a, b) => g!(d) = g!(a) - g!(b),
        Ins::Mul(d, a, b) => g!(d) = g!(a) * g!(b),
        Ins::Div(d, a, b) => g!(d) = g!(a) / g!(b),
        Ins::Pow(d, a, b) => g!(d) = numeric::pow(g!(a), g!(b)),
        Ins::Square(d, a) => g!(d) = g!(a) * g!(a),
        Ins::Other(op, d, a, b) => g!(d) = numeric::binary(op, g!(a), g!(b)),
        Ins::Neg(d, a) => g!(d) = -g!(a),
        Ins::Not(d, a) => g!(d) = if g!(a) == 0.0 { 1.0 } else { 0.0 },
        Ins::Select(d, c, a, b) => g!(d) = if g!(c) != 0.0 { g!(a) } else { g!(b) },
        Ins::Exp(d, a) => g!(d) = numeric::exp(g!(a)),
        Ins::Abs(d, a) => g!(d) = numeric::abs(g!(a)),
        Ins::Min(d, a, b) => g!(d) = numeric::min(g!(a), g!(b)),
        Ins::Max(d, a, b) => g!(d) = numeric::max(g!(a), g!(b)),
        Ins::Clamp(d, x, lo, hi) => g!(d) = numeric::clamp(g!(x), g!(lo), g!(hi)),
        Ins::Call1(d, a, k) => g!(d) = (k.f)(g!(a)),
        Ins::Call2(d, a, b, k) => g!(d) = (k.f)(g!(a), g!(b)),
        Ins::Call3(d, a, b, c, k) => g!(d) = (k.f)(g!(a), g!(b), g!(c)),
        Ins::Decay(d, q, h) => g!(d) = decay(p, r, q, h),
        Ins::Interp(d, t, x) => {
            let (xs, ys) = p.tables.get_unchecked(t as usize);
            g!(d) = numeric::interp(xs, ys, g!(x));
        }
        Ins::SeaLevel(d, h, v) => g!(d) = p.hyps.get_unchecked(h as usize).sea_level(g!(v)),
        Ins::SeaLevelIsostatic(d, h, v, rw, rm) => {
            g!(d) = p
                .hyps
                .get_unchecked(h as usize)
                .sea_level_isostatic(g!(v), g!(rw), g!(rm));
        }
        Ins::LandFraction(d, h, v) => g!(d) = p.hyps.get_unchecked(h as usize).land_fraction(g!(v)),
        Ins::BasinVolume(d, h, z) => g!(d) = p.hyps.get_unchecked(h as usize).basin_volume(g!(z)),
        Ins::Fill(d, m, c) => g!(d) = g!(m) / g!(c),
        Ins::Excess(d, m, c) => g!(d) = numeric::max(g!(m) - g!(c), 0.0),
        Ins::Mul3(d, a, b, c) => g!(d) = (g!(a) * g!(b)) * g!(c),
        Ins::ExpMul(d, a, b) => g!(d) = numeric::exp(g!(a) * g!(b)),
        Ins::MulSub(d, a, b, c) => g!(d) = g!(a) * (g!(b) - g!(c)),
        Ins::SubDiv(d, a, b, c) => g!(d) = (g!(a) - g!(b)) / g!(c),
        Ins::DecayAdd(d, acc, q, h) => g!(d) = g!(acc) + decay(p, r, q, h),
        Ins::MulExpMul(d, c, a, b) => g!(d) = g!(c) * numeric::exp(g!(a) * g!(b)),
    }
}

/// q * 2^(age / half_life), of registers `q` and `h`.
///
/// # Safety
/// As for [`exec`]: `q`, `h` and the age register are below `r.len()`.
#[inline(always)]
unsafe fn decay(p: &Kernels, r: &[f64], q: Reg, h: Reg) -> f64 {
    let age = *r.get_unchecked(p.age_reg as usize);
    *r.get_unchecked(q as usize) * libm::exp2(age / *r.get_unchecked(h as usize))
}

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
enum Kind {
    /// Known when compiling.
    Const,
    /// Depends on parameters only.
    Setup,
    /// Depends on the state or the clock.
    Dynamic,
}

struct Compiler<'m> {
    model: &'m Model,
    params: Vec<Option<f64>>,
    init: Vec<f64>,
    kind: Vec<Kind>,
    ins: Vec<Ins>,
    setup: Vec<Ins>,
    symbolic: Vec<bool>,
    param_regs: Vec<(DefId, Reg)>,
    kernels: Kernels,
    def_reg: Vec<Option<Reg>>,
    cap_reg: Vec<Option<Reg>>,
    const_regs: std::collections::HashMap<u64, Reg>,
    state_index: Vec<Option<usize>>,
    age_reg: Reg,
    time_reg: Reg,
    tables: Vec<usize>,
    age_knots: Vec<f64>,
    seen: std::collections::HashMap<Ins, Reg>,
    /// Fuse instruction pairs (off only in the test that checks fusion).
    fuse: bool,
}

impl<'m> Compiler<'m> {
    fn new(model: &'m Model, params: Vec<Option<f64>>) -> Compiler<'m> {
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

    fn state_order(&self) -> Vec<DefId> {
        state_order(self.model)
    }

    fn build(&mut self, stage: Option<usize>, wants: &Wants) -> Program {
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

    fn constant(&mut self, v: f64) -> Reg {
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

    fn temp(&mut self) -> Reg {
        let r = self.init.len() as Reg;
        self.init.push(0.0);
        self.kind.push(Kind::Dynamic);
        r
    }

    fn konst(&self, r: Reg) -> Option<f64> {
        if self.kind[r as usize] == Kind::Const {
            Some(self.init[r as usize])
        } else {
            None
        }
    }

    fn table(&mut self, t: usize) -> u32 {
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
    fn def(&mut self, id: DefId) -> Reg {
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

    fn capacity(&mut self, res: DefId) -> Reg {
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
    fn fold(&mut self, e: &Expr) -> Option<f64> {
        let r = self.expr(e);
        self.konst(r)
    }

    fn emit(&mut self, make: impl Fn(Reg) -> Ins, args: &[Reg]) -> Reg {
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

    fn expr(&mut self, e: &Expr) -> Reg {
        // Definitions compile on first use, so this recursion follows chains
        // of definitions (at most `check::MAX_DEPTH` deep in a checked model).
        crate::stack::guard(|| self.expr_inner(e))
    }

    fn expr_inner(&mut self, e: &Expr) -> Reg {
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

    fn call(&mut self, f: Builtin, args: &[Expr]) -> Reg {
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
    fn num(&mut self, func: Func, regs: &[Reg]) -> Reg {
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
    fn chain(&mut self, regs: &[Reg], op: impl Fn(Reg, Reg, Reg) -> Ins) -> Reg {
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

#[cfg(test)]
mod tests {
    use super::*;

    /// Native code for `p`; on x86-64 there must be some.
    fn made_native(p: &mut Program) -> bool {
        let native = p.make_native();
        assert!(
            native || !cfg!(target_arch = "x86_64"),
            "x86-64 gets native code"
        );
        native
    }

    /// `p` native and interpreted, both from registers `regs`, at `n`
    /// random ages of stage `s` and states around `y0`: the same bits.
    #[allow(clippy::too_many_arguments)]
    fn agree_at_random_states(
        p: &Program,
        regs: Regs,
        model: &Model,
        s: usize,
        y0: &[f64],
        rng: &mut crate::ensemble::SplitMix,
        n: usize,
        what: &str,
    ) {
        let (mut rn, mut ri) = (regs.clone(), regs);
        let st = &model.stages[s];
        for _ in 0..n {
            let f = rng.unit();
            let age = st.start_age + f * (st.end_age - st.start_age);
            let y: Vec<f64> = y0.iter().map(|v| v * 2.0 * rng.unit()).collect();
            let t = model.start_age - age;
            p.eval(&mut rn, &y, t, age);
            p.eval_interpreted(&mut ri, &y, t, age);
            assert_eq!(bits(&rn), bits(&ri), "{what} age {age}");
        }
    }

    /// The demo scenarios, what to compile of them (everything), and their
    /// initial states.
    fn demos() -> Vec<(&'static str, Model, Wants, Vec<f64>)> {
        let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR"));
        ["hot_start", "glacial_window"]
            .into_iter()
            .map(|demo| {
                let path = root.join(format!("scenarios/{demo}.hadal"));
                let model = crate::check::check_file(&path, &Default::default())
                    .unwrap_or_else(|_| panic!("{demo} checks"))
                    .model;
                let wants = Wants {
                    rhs: true,
                    defs: (0..model.defs.len()).collect(),
                    exprs: Vec::new(),
                };
                let y0 = crate::solve::initial_state(&model).0;
                (demo, model, wants, y0)
            })
            .collect()
    }

    /// Fused instructions give the very bits of the pairs they replace.
    #[test]
    fn fused_programs_compute_the_same_bits_as_unfused_ones() {
        let mut kinds = std::collections::BTreeSet::new();
        for (demo, model, wants, y0) in demos() {
            for s in 0..model.stages.len() {
                let fused = compile(&model, Some(s), &wants);
                let mut c = Compiler::new(&model, stage_params(&model, Some(s)));
                c.fuse = false;
                let plain = c.build(Some(s), &wants);
                assert!(
                    fused.len() < plain.len(),
                    "{demo} stage {s}: something fuses"
                );
                for ins in &fused.ins {
                    kinds.insert(
                        format!("{ins:?}")
                            .split('(')
                            .next()
                            .unwrap_or("")
                            .to_owned(),
                    );
                }
                let (mut rf, mut rp) = (fused.regs(), plain.regs());
                let mut dy_f = vec![0.0; y0.len() + 2];
                let mut dy_p = dy_f.clone();
                let st = &model.stages[s];
                for k in 0..50 {
                    let f = f64::from(k) / 49.0;
                    let age = st.start_age + f * (st.end_age - st.start_age);
                    let y: Vec<f64> = y0.iter().map(|v| v * (0.5 + f)).collect();
                    let t = model.start_age - age;
                    fused.rhs(&mut rf, t, age, &y, &mut dy_f);
                    plain.rhs(&mut rp, t, age, &y, &mut dy_p);
                    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(&dy_f), bits(&dy_p), "{demo} stage {s} age {age}");
                    for (def, reg) in &fused.observed {
                        let other = plain
                            .observed
                            .iter()
                            .find(|(d, _)| d == def)
                            .expect("same defs");
                        let (a, b) = (fused.value(&rf, *reg), plain.value(&rp, other.1));
                        assert_eq!(a.to_bits(), b.to_bits(), "{demo} def {def}");
                    }
                }
            }
        }
        for k in [
            "Mul3",
            "MulSub",
            "SubDiv",
            "ExpMul",
            "DecayAdd",
            "MulExpMul",
        ] {
            assert!(kinds.contains(k), "no {k} in the demos: {kinds:?}");
        }
    }

    /// Bits of every register, with every NaN as one value: which NaN an
    /// operation on two NaNs returns depends on the order a compiler put
    /// its operands in (IEEE 754 leaves it open), and no NaN ever reaches
    /// an output (the solver and the writers refuse them).
    fn bits(r: &Regs) -> Vec<u64> {
        r.0.iter()
            .map(|x| if x.is_nan() { u64::MAX } else { x.to_bits() })
            .collect()
    }

    /// The call instruction of every kernel the table compiles as a call,
    /// on operands `a`, `b`, `c` (as many as its arity takes).
    fn call_ins(d: Reg, a: Reg, b: Reg, c: Reg) -> Vec<Ins> {
        use crate::builtins::{Form, BUILTINS};
        BUILTINS
            .iter()
            .filter_map(|s| match &s.form {
                Form::Num(n) if n.lowering == Lowering::Call => Some((s.name, n.kernel)),
                _ => None,
            })
            .map(|(name, k)| match k {
                Kernel::F1(f) => Ins::Call1(d, a, Kernel1 { f, name }),
                Kernel::F2(f) | Kernel::Fold(f) => Ins::Call2(d, a, b, Kernel2 { f, name }),
                Kernel::F3(f) => Ins::Call3(d, a, b, c, Kernel3 { f, name }),
            })
            .collect()
    }

    /// A program of every instruction, over three state registers, the
    /// clock and constants (some of them edge values, which native code
    /// embeds as immediates): native code and interpreter give the same
    /// bits for inputs that include NaN, both zeros, infinities and
    /// subnormals.
    #[test]
    fn native_code_computes_the_interpreters_bits_for_every_instruction() {
        let consts = [
            1.5,
            -0.0,
            0.0,
            f64::NAN,
            f64::INFINITY,
            2.0,
            1e-310,
            0.7,
            -3.25,
            4.468e9,
        ];
        // Registers: 0..3 state, 3 age, 4 time, 5.. constants, then results.
        let (n_state, age, time) = (3u32, 3u32, 4u32);
        let c0 = 5u32;
        let mut init = vec![0.0; c0 as usize];
        init.extend(consts);
        let inputs: Vec<Reg> = (0..c0 + consts.len() as u32).collect();
        let mut ins = Vec::new();
        let mut next = init.len() as Reg;
        fn push(make: &dyn Fn(Reg) -> Ins, ins: &mut Vec<Ins>, next: &mut Reg) {
            ins.push(make(*next));
            *next += 1;
        }
        // Every instruction on several operand pairs, inputs and results.
        for (k, &a) in inputs.iter().enumerate() {
            let b = inputs[(k * 7 + 3) % inputs.len()];
            let c = inputs[(k * 5 + 1) % inputs.len()];
            let all: Vec<Box<dyn Fn(Reg) -> Ins>> = vec![
                Box::new(move |d| Ins::Add(d, a, b)),
                Box::new(move |d| Ins::Sub(d, a, b)),
                Box::new(move |d| Ins::Mul(d, a, b)),
                Box::new(move |d| Ins::Div(d, a, b)),
                Box::new(move |d| Ins::Pow(d, a, b)),
                Box::new(move |d| Ins::Square(d, a)),
                Box::new(move |d| Ins::Neg(d, a)),
                Box::new(move |d| Ins::Not(d, a)),
                Box::new(move |d| Ins::Select(d, a, b, c)),
                Box::new(move |d| Ins::Exp(d, a)),
                Box::new(move |d| Ins::Abs(d, a)),
                Box::new(move |d| Ins::Min(d, a, b)),
                Box::new(move |d| Ins::Max(d, a, b)),
                Box::new(move |d| Ins::Min(d, b, a)),
                Box::new(move |d| Ins::Max(d, b, a)),
                Box::new(move |d| Ins::Clamp(d, a, b, c)),
                Box::new(move |d| Ins::Decay(d, a, b)),
                Box::new(move |d| Ins::Interp(d, 0, a)),
                Box::new(move |d| Ins::SeaLevel(d, 0, a)),
                Box::new(move |d| Ins::SeaLevelIsostatic(d, 0, a, b, c)),
                Box::new(move |d| Ins::LandFraction(d, 0, a)),
                Box::new(move |d| Ins::BasinVolume(d, 0, a)),
                Box::new(move |d| Ins::Fill(d, a, b)),
                Box::new(move |d| Ins::Excess(d, a, b)),
                Box::new(move |d| Ins::Mul3(d, a, b, c)),
                Box::new(move |d| Ins::ExpMul(d, a, b)),
                Box::new(move |d| Ins::MulSub(d, a, b, c)),
                Box::new(move |d| Ins::SubDiv(d, a, b, c)),
                Box::new(move |d| Ins::DecayAdd(d, c, a, b)),
                Box::new(move |d| Ins::MulExpMul(d, c, a, b)),
            ];
            for make in &all {
                push(make.as_ref(), &mut ins, &mut next);
            }
            for op in BinOp::ALL {
                push(&move |d| Ins::Other(op, d, a, b), &mut ins, &mut next);
            }
            // Every kernel the table calls, at its arity.
            for i in 0..call_ins(0, 0, 0, 0).len() {
                push(&move |d| call_ins(d, a, b, c)[i], &mut ins, &mut next);
            }
        }
        // Results as operands too: chains through earlier results.
        let first_result = init.len() as Reg;
        let results = next - first_result;
        for k in 0..results {
            let a = first_result + k;
            let b = first_result + (k * 13 + 5) % results;
            push(&move |d| Ins::Mul(d, a, b), &mut ins, &mut next);
            push(&move |d| Ins::Max(d, b, a), &mut ins, &mut next);
        }
        init.resize(next as usize, 0.0);
        let hyps = Hypsometry::new(&[-5000.0, 0.0, 3000.0], &[0.0, 3e14, 5e14]);
        let mut p = Program {
            ins,
            init,
            n_state: n_state as usize,
            state_defs: vec![0; n_state as usize],
            age_reg: age,
            time_reg: time,
            fluxes: Vec::new(),
            flux_probes: Vec::new(),
            rates: Vec::new(),
            rate_probes: Vec::new(),
            observed: Vec::new(),
            extra: Vec::new(),
            setup: Vec::new(),
            param_regs: Vec::new(),
            kernels: Kernels {
                tables: vec![(vec![-1.0, 0.0, 2.0], vec![3.0, -1.0, 0.5])],
                hyps: vec![hyps],
                age_reg: age,
            },
            age_knots: Vec::new(),
            native: None,
        };
        p.check_bounds();
        if !made_native(&mut p) {
            return;
        }
        let edges = [
            0.0,
            -0.0,
            1.0,
            -1.0,
            f64::NAN,
            -f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            5e-324,
            f64::MIN_POSITIVE,
            f64::MAX,
            1e21,
            1873.5,
            2.5e9,
        ];
        let mut rng = crate::ensemble::SplitMix(5);
        let (mut rn, mut ri) = (p.regs(), p.regs());
        for trial in 0..4000 {
            let mut pick = |k: usize| {
                if trial % 3 == 0 {
                    edges[(rng.next() as usize + k) % edges.len()]
                } else {
                    (rng.unit() - 0.3) * libm::exp2((rng.unit() - 0.5) * 80.0)
                }
            };
            let y = [pick(0), pick(1), pick(2)];
            let (t, a) = (pick(3), pick(4));
            p.eval(&mut rn, &y, t, a);
            p.eval_interpreted(&mut ri, &y, t, a);
            let (bn, bi) = (bits(&rn), bits(&ri));
            if let Some(k) = (0..bn.len()).find(|&k| bn[k] != bi[k]) {
                let writer = p.ins.iter().find(|i| dest(i) as usize == k);
                panic!(
                    "register {k} ({writer:?}): native {} interpreted {}, state {y:?}, time {t}, age {a}",
                    rn.0[k], ri.0[k]
                );
            }
        }
    }

    /// The demos' programs, native and interpreted, on states around their
    /// starting ones: the same bits in every register.
    #[test]
    fn native_code_computes_the_interpreters_bits_for_the_demos() {
        for (demo, model, wants, y0) in demos() {
            let mut rng = crate::ensemble::SplitMix(9);
            for s in 0..model.stages.len() {
                let mut p = compile(&model, Some(s), &wants);
                if !made_native(&mut p) {
                    return;
                }
                let what = format!("{demo} stage {s}");
                agree_at_random_states(&p, p.regs(), &model, s, &y0, &mut rng, 500, &what);
            }
        }
    }

    /// What ensembles run: the demos' stage and output programs with
    /// parameters as registers (the ensemble's own, and one whose uses
    /// include parameter-only setup instructions), at several sets of
    /// parameter values.
    #[test]
    fn native_code_computes_the_interpreters_bits_with_parameters_as_registers() {
        let mut setups = 0;
        for (demo, model, _, y0) in demos() {
            let mut varied: Vec<DefId> = model
                .ensemble
                .as_ref()
                .map(|e| e.vary.iter().map(|v| v.param).collect())
                .unwrap_or_default();
            // `1 + convection_beta` and friends depend on parameters only.
            varied.extend(
                model
                    .defs
                    .iter()
                    .enumerate()
                    .filter(|(_, d)| matches!(d.kind, DefKind::Param) && d.name.contains("beta"))
                    .map(|(i, _)| i),
            );
            let outputs: Vec<DefId> = crate::report::columns(&model)
                .iter()
                .filter_map(|c| c.def)
                .collect();
            let mut rng = crate::ensemble::SplitMix(23);
            for s in 0..model.stages.len() {
                let base = stage_params(&model, Some(s));
                let sp = crate::solve::stage_programs(&model, s, &varied);
                let out = compile_with(
                    &model,
                    Some(s),
                    &Wants {
                        rhs: false,
                        defs: outputs.clone(),
                        exprs: Vec::new(),
                    },
                    &varied,
                );
                for mut p in [sp.rhs, sp.events, out] {
                    setups += p.setup.len();
                    if !made_native(&mut p) {
                        return;
                    }
                    for member in 0..20 {
                        let params: Vec<(DefId, f64)> = varied
                            .iter()
                            .map(|&d| (d, base[d].unwrap_or(1.0) * (0.7 + 0.6 * rng.unit())))
                            .collect();
                        let regs = p.regs_with(&params);
                        let what = format!("{demo} stage {s} member {member}");
                        agree_at_random_states(&p, regs, &model, s, &y0, &mut rng, 20, &what);
                    }
                }
            }
        }
        assert!(setups > 0, "some parameter-only instructions");
    }

    #[cfg(target_arch = "x86_64")]
    #[test]
    fn operators_reach_native_code_by_their_place_in_all() {
        for (k, &op) in BinOp::ALL.iter().enumerate() {
            assert_eq!(native::op_code(op), k as u64, "{op:?}");
        }
    }

    #[test]
    fn max_and_min_follow_one_rule_for_nan_and_zeros() {
        use crate::numeric::{max, min};
        assert_eq!(max(1.0, 2.0), 2.0);
        assert_eq!(min(1.0, 2.0), 1.0);
        assert_eq!(max(f64::NAN, 2.0), 2.0);
        assert_eq!(max(2.0, f64::NAN), 2.0);
        assert_eq!(min(f64::NAN, 2.0), 2.0);
        assert!(max(f64::NAN, f64::NAN).is_nan());
        // Of two equal operands, the first.
        assert!(max(-0.0, 0.0).is_sign_negative());
        assert!(max(0.0, -0.0).is_sign_positive());
        assert!(min(-0.0, 0.0).is_sign_negative());
        assert!(min(0.0, -0.0).is_sign_positive());
    }
}
