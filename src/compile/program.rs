//! Compiled programs and their interpreter: registers, the right-hand side
//! of the ODE, fusion of instruction pairs, and native code for hot programs.

use super::*;

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
    pub(super) ins: Vec<Ins>,
    /// Register file at start: state slots, clock, constants.
    pub(super) init: Vec<f64>,
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
    pub(super) setup: Vec<Ins>,
    /// Parameters kept as registers (so one program serves many members).
    pub param_regs: Vec<(DefId, Reg)>,
    pub(super) kernels: Kernels,
    /// Knots of age-indexed tables this program reads (breakpoints).
    pub age_knots: Vec<f64>,
    /// Native code for `ins`, when asked for (see [`Program::make_native`]).
    pub(super) native: Option<NativeCode>,
}

/// Native code shared by the clones of a program.
#[derive(Clone)]
pub(super) struct NativeCode(pub(super) std::sync::Arc<native::Code>);

impl std::fmt::Debug for NativeCode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("NativeCode")
    }
}

/// Data that instructions read besides registers.
#[derive(Debug, Clone, Default)]
pub(super) struct Kernels {
    pub(super) tables: Vec<(Vec<f64>, Vec<f64>)>,
    pub(super) hyps: Vec<Hypsometry>,
    pub(super) age_reg: Reg,
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
    pub(super) fn load_inputs<'r>(
        &self,
        regs: &'r mut Regs,
        y: &[f64],
        t: f64,
        age: f64,
    ) -> &'r mut [f64] {
        let r = &mut regs.0;
        // Registers from another program would break `exec`'s invariant.
        assert_eq!(r.len(), self.init.len(), "registers of another program");
        r[..self.n_state].copy_from_slice(&y[..self.n_state]);
        r[self.age_reg as usize] = age;
        r[self.time_reg as usize] = t;
        r
    }

    pub(super) fn interpret(&self, r: &mut [f64]) {
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
    pub(super) fn fuse(&mut self) {
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
    pub(super) fn check_bounds(&self) {
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

/// # Safety
/// Every register index in `ins` must be below `r.len()` and every table
/// index within `p`'s tables (see `Program::check_bounds`).
#[inline(always)]
pub(super) unsafe fn exec(p: &Kernels, r: &mut [f64], ins: Ins) {
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
pub(super) unsafe fn decay(p: &Kernels, r: &[f64], q: Reg, h: Reg) -> f64 {
    let age = *r.get_unchecked(p.age_reg as usize);
    *r.get_unchecked(q as usize) * libm::exp2(age / *r.get_unchecked(h as usize))
}
