//! Native code for a compiled program, through Cranelift, for programs that
//! are evaluated millions of times (the stages of an ensemble's members).
//!
//! The native function performs exactly the IEEE operations of the
//! interpreter (`super::exec`) in the same order: additions,
//! multiplications and divisions inline, never fused into multiply-adds
//! (Cranelift fuses nothing it is not asked to); `select`, `not`, `min`,
//! `max`, `clamp` and `excess` inline by the interpreter's written rules;
//! and every transcendental, table or hypsometry function, and the
//! operators of `Ins::Other` (comparisons, logic), through the very Rust
//! function the interpreter calls (the built-ins' kernels of `Ins::Call1`
//! to `Call3` through one trampoline per arity). So a program gives the same bits
//! whichever way it runs; the tests compare the two on every instruction,
//! on edge values, on the demo scenarios' programs with their ensemble
//! parameters as registers, and in every fuzz case that solves.
//!
//! What changes is the cost: registers live in machine registers between
//! instructions, constants are immediates, and there is no dispatch. Code
//! is only generated on x86-64, where it is tested; elsewhere programs are
//! interpreted.
//!
//! Invariant: like the interpreter, the native code reads and writes only
//! the register file and the program's kernels, at indices that
//! `Program::check_bounds` verified.

use super::{Ins, Kernels, Reg};

/// The signature of a program's native code: the register file and the
/// program's kernels.
pub(super) type NativeFn = unsafe extern "C" fn(*mut f64, *const Kernels);

#[cfg(target_arch = "x86_64")]
mod gen {
    use super::*;
    use crate::numeric;
    use crate::syntax::BinOp;

    // The functions native code calls: the interpreter's own kernels behind the
    // C calling convention. None of them can panic.

    extern "C" fn pow(a: f64, b: f64) -> f64 {
        numeric::pow(a, b)
    }
    extern "C" fn exp(x: f64) -> f64 {
        numeric::exp(x)
    }
    extern "C" fn exp2(x: f64) -> f64 {
        libm::exp2(x)
    }
    // One trampoline per arity for the kernels of `Ins::Call1` to `Call3`:
    // the Rust function's address arrives as the first argument.

    /// # Safety
    /// `f` is the address of a `fn(f64) -> f64` (from a `Kernel1`).
    unsafe extern "C" fn call1(f: u64, x: f64) -> f64 {
        let f = std::mem::transmute::<usize, fn(f64) -> f64>(f as usize);
        f(x)
    }
    /// # Safety
    /// `f` is the address of a `fn(f64, f64) -> f64` (from a `Kernel2`).
    unsafe extern "C" fn call2(f: u64, a: f64, b: f64) -> f64 {
        let f = std::mem::transmute::<usize, fn(f64, f64) -> f64>(f as usize);
        f(a, b)
    }
    /// # Safety
    /// `f` is the address of a `fn(f64, f64, f64) -> f64` (from a
    /// `Kernel3`).
    unsafe extern "C" fn call3(f: u64, a: f64, b: f64, c: f64) -> f64 {
        let f = std::mem::transmute::<usize, fn(f64, f64, f64) -> f64>(f as usize);
        f(a, b, c)
    }
    /// The number that carries an operator into native code: an
    /// exhaustive match, so a new operator cannot be forgotten here.
    pub fn op_code(op: BinOp) -> u64 {
        match op {
            BinOp::Or => 0,
            BinOp::And => 1,
            BinOp::Eq => 2,
            BinOp::Ne => 3,
            BinOp::Lt => 4,
            BinOp::Le => 5,
            BinOp::Gt => 6,
            BinOp::Ge => 7,
            BinOp::Add => 8,
            BinOp::Sub => 9,
            BinOp::Mul => 10,
            BinOp::Div => 11,
            BinOp::Pow => 12,
        }
    }

    /// The operator of [`op_code`]'s number (`BinOp::ALL` is in the same
    /// order: unit-tested).
    extern "C" fn binary(op: u64, a: f64, b: f64) -> f64 {
        match BinOp::ALL.get(op as usize) {
            Some(&op) => numeric::binary(op, a, b),
            None => f64::NAN,
        }
    }

    /// # Safety
    /// `k` points to the kernels of the program whose code calls this, and
    /// `t` is one of its table indices (both checked when it was built).
    unsafe extern "C" fn interp(k: *const Kernels, t: u64, x: f64) -> f64 {
        let k = &*k;
        let (xs, ys) = k.tables.get_unchecked(t as usize);
        numeric::interp(xs, ys, x)
    }
    /// # Safety
    /// As for [`interp`].
    unsafe extern "C" fn sea_level(k: *const Kernels, h: u64, v: f64) -> f64 {
        let k = &*k;
        k.hyps.get_unchecked(h as usize).sea_level(v)
    }
    /// # Safety
    /// As for [`interp`].
    unsafe extern "C" fn land_fraction(k: *const Kernels, h: u64, v: f64) -> f64 {
        let k = &*k;
        k.hyps.get_unchecked(h as usize).land_fraction(v)
    }
    /// # Safety
    /// As for [`interp`].
    unsafe extern "C" fn basin_volume(k: *const Kernels, h: u64, z: f64) -> f64 {
        let k = &*k;
        k.hyps.get_unchecked(h as usize).basin_volume(z)
    }

    use cranelift_codegen::ir::condcodes::FloatCC;
    use cranelift_codegen::ir::types::{F64, I64};
    use cranelift_codegen::ir::{AbiParam, InstBuilder, MemFlagsData, SigRef, Signature, Value};
    use cranelift_codegen::settings::{self, Configurable};
    use cranelift_frontend::{FunctionBuilder, FunctionBuilderContext};
    use cranelift_jit::{JITBuilder, JITModule};
    use cranelift_module::{default_libcall_names, Linkage, Module};

    /// Generated code and the module that owns its memory.
    pub struct Code {
        module: Option<JITModule>,
        func: NativeFn,
    }

    impl Code {
        pub fn func(&self) -> NativeFn {
            self.func
        }
    }

    // SAFETY: after `finalize_definitions` the module is never used again
    // except to free its memory when the last user is gone; the code itself
    // only reads and writes the memory its caller passes, so any number of
    // threads may run it at once.
    unsafe impl Send for Code {}
    unsafe impl Sync for Code {}

    impl Drop for Code {
        fn drop(&mut self) {
            if let Some(m) = self.module.take() {
                // SAFETY: `Code` is dropped when the last program holding it
                // is, so nothing can call `func` any more.
                unsafe { m.free_memory() };
            }
        }
    }

    /// Signatures of the called kernels, imported once per function.
    struct Sigs {
        f1: SigRef,
        f2: SigRef,
        /// (kernel address, x), (kernel address, a, b), (kernel address, a, b, c)
        c1: SigRef,
        c2: SigRef,
        c3: SigRef,
        /// (kernels, table index, x)
        k: SigRef,
        /// (operator, a, b)
        op: SigRef,
    }

    /// Programs longer than this stay interpreted: code generation time
    /// grows with the program, and a program this long is evaluated too
    /// few times in a run to repay it.
    const MAX_INSTRUCTIONS: usize = 100_000;

    /// Code for `ins` over registers whose start values are `init`;
    /// registers marked in `fixed` hold the same value in every evaluation
    /// and become immediates. `None` when Cranelift cannot build for this
    /// machine or the program is out of its range (the caller keeps
    /// interpreting).
    pub fn build(ins: &[Ins], init: &[f64], fixed: &[bool], age_reg: Reg) -> Option<Code> {
        // Register offsets are 32-bit displacements.
        if ins.len() > MAX_INSTRUCTIONS || init.len() > (i32::MAX / 8) as usize {
            return None;
        }
        let mut flags = settings::builder();
        flags.set("opt_level", "speed").ok()?;
        // The IR verifier checks this module's output; the tests run it.
        let verify = if cfg!(debug_assertions) {
            "true"
        } else {
            "false"
        };
        flags.set("enable_verifier", verify).ok()?;
        let isa = cranelift_native::builder()
            .ok()?
            .finish(settings::Flags::new(flags))
            .ok()?;
        let mut module = JITModule::new(JITBuilder::with_isa(isa, default_libcall_names()));
        match define(&mut module, ins, init, fixed, age_reg) {
            Some(func) => Some(Code {
                module: Some(module),
                func,
            }),
            None => {
                // SAFETY: nothing from this module was handed out.
                unsafe { module.free_memory() };
                None
            }
        }
    }

    /// Define, compile and finalize the program's function in `module`.
    fn define(
        module: &mut JITModule,
        ins: &[Ins],
        init: &[f64],
        fixed: &[bool],
        age_reg: Reg,
    ) -> Option<NativeFn> {
        if module.target_config().pointer_type() != I64 {
            return None;
        }
        let call_conv = module.isa().default_call_conv();
        let sig = |params: &[cranelift_codegen::ir::Type]| {
            let mut s = Signature::new(call_conv);
            s.params.extend(params.iter().map(|&t| AbiParam::new(t)));
            s.returns.push(AbiParam::new(F64));
            s
        };
        let mut main = Signature::new(call_conv);
        main.params.push(AbiParam::new(I64));
        main.params.push(AbiParam::new(I64));
        let id = module
            .declare_function("program", Linkage::Local, &main)
            .ok()?;
        let frontend = module.target_config();
        let mut ctx = module.make_context();
        ctx.func.signature = main;
        let mut fctx = FunctionBuilderContext::new();
        {
            let mut b = FunctionBuilder::new(&mut ctx.func, &mut fctx);
            let block = b.create_block();
            b.append_block_params_for_function_params(block);
            b.switch_to_block(block);
            let regs = b.block_params(block)[0];
            let kernels = b.block_params(block)[1];
            let sigs = Sigs {
                f1: b.import_signature(sig(&[F64])),
                f2: b.import_signature(sig(&[F64, F64])),
                c1: b.import_signature(sig(&[I64, F64])),
                c2: b.import_signature(sig(&[I64, F64, F64])),
                c3: b.import_signature(sig(&[I64, F64, F64, F64])),
                k: b.import_signature(sig(&[I64, I64, F64])),
                op: b.import_signature(sig(&[I64, F64, F64])),
            };
            let mut e = Emitter {
                b,
                regs,
                kernels,
                sigs,
                vals: vec![None; init.len()],
                init,
                fixed,
                age_reg,
            };
            for &i in ins {
                e.ins(i);
            }
            e.b.ins().return_(&[]);
            e.b.seal_all_blocks();
            e.b.finalize(frontend);
        }
        module.define_function(id, &mut ctx).ok()?;
        module.clear_context(&mut ctx);
        module.finalize_definitions().ok()?;
        let code = module.get_finalized_function(id);
        // SAFETY: the function was declared with the signature of
        // `NativeFn` (two pointer-sized arguments, no result) in the
        // platform's C calling convention.
        Some(unsafe { std::mem::transmute::<*const u8, NativeFn>(code) })
    }

    /// `numeric::max`: the other operand for a NaN, the first of two equal
    /// ones.
    fn max(b: &mut FunctionBuilder, x: Value, y: Value) -> Value {
        let nan = b.ins().fcmp(FloatCC::Unordered, x, x);
        let gt = b.ins().fcmp(FloatCC::GreaterThan, y, x);
        let c = b.ins().bor(nan, gt);
        b.ins().select(c, y, x)
    }

    /// `numeric::min`, by the rule of [`max`].
    fn min(b: &mut FunctionBuilder, x: Value, y: Value) -> Value {
        let nan = b.ins().fcmp(FloatCC::Unordered, x, x);
        let lt = b.ins().fcmp(FloatCC::LessThan, y, x);
        let c = b.ins().bor(nan, lt);
        b.ins().select(c, y, x)
    }

    struct Emitter<'a, 'f> {
        b: FunctionBuilder<'f>,
        regs: Value,
        kernels: Value,
        sigs: Sigs,
        /// The current value of each register, once read or written.
        vals: Vec<Option<Value>>,
        init: &'a [f64],
        fixed: &'a [bool],
        age_reg: Reg,
    }

    impl<'f> Emitter<'_, 'f> {
        fn get(&mut self, r: Reg) -> Value {
            let i = r as usize;
            if let Some(v) = self.vals[i] {
                return v;
            }
            let v = if self.fixed[i] {
                self.b.ins().f64const(self.init[i])
            } else {
                self.b
                    .ins()
                    .load(F64, MemFlagsData::trusted(), self.regs, 8 * i as i32)
            };
            self.vals[i] = Some(v);
            v
        }

        fn set(&mut self, r: Reg, v: Value) {
            let i = r as usize;
            self.b
                .ins()
                .store(MemFlagsData::trusted(), v, self.regs, 8 * i as i32);
            self.vals[i] = Some(v);
        }

        fn call(&mut self, f: usize, sig: SigRef, args: &[Value]) -> Value {
            let callee = self.b.ins().iconst(I64, f as i64);
            let call = self.b.ins().call_indirect(sig, callee, args);
            self.b.inst_results(call)[0]
        }

        fn call1(&mut self, f: extern "C" fn(f64) -> f64, x: Value) -> Value {
            let s = self.sigs.f1;
            self.call(f as *const () as usize, s, &[x])
        }

        fn table(
            &mut self,
            f: unsafe extern "C" fn(*const Kernels, u64, f64) -> f64,
            t: u32,
            x: Value,
        ) -> Value {
            let idx = self.b.ins().iconst(I64, i64::from(t));
            let (s, k) = (self.sigs.k, self.kernels);
            self.call(f as *const () as usize, s, &[k, idx, x])
        }

        /// `op` on the values of registers `a` and `b`.
        fn on2(
            &mut self,
            a: Reg,
            b: Reg,
            op: impl FnOnce(&mut FunctionBuilder<'f>, Value, Value) -> Value,
        ) -> Value {
            let (a, b) = (self.get(a), self.get(b));
            op(&mut self.b, a, b)
        }

        /// `op` on the value of register `a`.
        fn on1(
            &mut self,
            a: Reg,
            op: impl FnOnce(&mut FunctionBuilder<'f>, Value) -> Value,
        ) -> Value {
            let a = self.get(a);
            op(&mut self.b, a)
        }

        /// The kernel at `address` on the values of registers `args`,
        /// through `trampoline` (of signature `sig`, for their count).
        fn call_kernel(
            &mut self,
            trampoline: usize,
            sig: SigRef,
            address: usize,
            args: &[Reg],
        ) -> Value {
            let mut vals = vec![self.b.ins().iconst(I64, address as i64)];
            for &a in args {
                vals.push(self.get(a));
            }
            self.call(trampoline, sig, &vals)
        }

        fn decay(&mut self, q: Reg, h: Reg) -> Value {
            let age = self.get(self.age_reg);
            let h = self.get(h);
            let x = self.b.ins().fdiv(age, h);
            let p = self.call1(exp2, x);
            let q = self.get(q);
            self.b.ins().fmul(q, p)
        }

        fn ins(&mut self, ins: Ins) {
            let (d, v) = match ins {
                Ins::Add(d, a, b) => (d, self.on2(a, b, |f, x, y| f.ins().fadd(x, y))),
                Ins::Sub(d, a, b) => (d, self.on2(a, b, |f, x, y| f.ins().fsub(x, y))),
                Ins::Mul(d, a, b) => (d, self.on2(a, b, |f, x, y| f.ins().fmul(x, y))),
                Ins::Div(d, a, b) | Ins::Fill(d, a, b) => {
                    (d, self.on2(a, b, |f, x, y| f.ins().fdiv(x, y)))
                }
                Ins::Pow(d, a, b) => {
                    let (a, b) = (self.get(a), self.get(b));
                    let s = self.sigs.f2;
                    (d, self.call(pow as *const () as usize, s, &[a, b]))
                }
                Ins::Square(d, a) => (d, self.on1(a, |f, x| f.ins().fmul(x, x))),
                Ins::Other(op, d, a, b) => {
                    let op = self.b.ins().iconst(I64, op_code(op) as i64);
                    let (a, b) = (self.get(a), self.get(b));
                    let s = self.sigs.op;
                    (d, self.call(binary as *const () as usize, s, &[op, a, b]))
                }
                Ins::Neg(d, a) => (d, self.on1(a, |f, x| f.ins().fneg(x))),
                Ins::Not(d, a) => {
                    let a = self.get(a);
                    let zero = self.b.ins().f64const(0.0);
                    let is_zero = self.b.ins().fcmp(FloatCC::Equal, a, zero);
                    let one = self.b.ins().f64const(1.0);
                    (d, self.b.ins().select(is_zero, one, zero))
                }
                Ins::Select(d, c, a, b) => {
                    let c = self.get(c);
                    let zero = self.b.ins().f64const(0.0);
                    let truth = self.b.ins().fcmp(FloatCC::NotEqual, c, zero);
                    let (a, b) = (self.get(a), self.get(b));
                    (d, self.b.ins().select(truth, a, b))
                }
                Ins::Exp(d, a) => {
                    let a = self.get(a);
                    (d, self.call1(exp, a))
                }
                Ins::Abs(d, a) => (d, self.on1(a, |f, x| f.ins().fabs(x))),
                Ins::Min(d, a, b) => (d, self.on2(a, b, min)),
                Ins::Max(d, a, b) => (d, self.on2(a, b, max)),
                Ins::Clamp(d, x, lo, hi) => {
                    let (x, lo, hi) = (self.get(x), self.get(lo), self.get(hi));
                    let m = max(&mut self.b, x, lo);
                    (d, min(&mut self.b, m, hi))
                }
                Ins::Call1(d, a, k) => {
                    let (t, s) = (call1 as *const () as usize, self.sigs.c1);
                    (d, self.call_kernel(t, s, k.f as usize, &[a]))
                }
                Ins::Call2(d, a, b, k) => {
                    let (t, s) = (call2 as *const () as usize, self.sigs.c2);
                    (d, self.call_kernel(t, s, k.f as usize, &[a, b]))
                }
                Ins::Call3(d, a, b, c, k) => {
                    let (t, s) = (call3 as *const () as usize, self.sigs.c3);
                    (d, self.call_kernel(t, s, k.f as usize, &[a, b, c]))
                }
                Ins::Decay(d, q, h) => (d, self.decay(q, h)),
                Ins::Interp(d, t, x) => {
                    let x = self.get(x);
                    (d, self.table(interp, t, x))
                }
                Ins::SeaLevel(d, h, v) => {
                    let v = self.get(v);
                    (d, self.table(sea_level, h, v))
                }
                Ins::SeaLevelIsostatic(d, h, v, rw, rm) => {
                    let (rm, rw) = (self.get(rm), self.get(rw));
                    let diff = self.b.ins().fsub(rm, rw);
                    let f = self.b.ins().fdiv(diff, rm);
                    let v = self.get(v);
                    let scaled = self.b.ins().fmul(v, f);
                    (d, self.table(sea_level, h, scaled))
                }
                Ins::LandFraction(d, h, v) => {
                    let v = self.get(v);
                    (d, self.table(land_fraction, h, v))
                }
                Ins::BasinVolume(d, h, z) => {
                    let z = self.get(z);
                    (d, self.table(basin_volume, h, z))
                }
                Ins::Excess(d, m, c) => {
                    let (m, c) = (self.get(m), self.get(c));
                    let diff = self.b.ins().fsub(m, c);
                    let zero = self.b.ins().f64const(0.0);
                    (d, max(&mut self.b, diff, zero))
                }
                Ins::Mul3(d, a, b, c) => {
                    let (a, b) = (self.get(a), self.get(b));
                    let ab = self.b.ins().fmul(a, b);
                    let c = self.get(c);
                    (d, self.b.ins().fmul(ab, c))
                }
                Ins::ExpMul(d, a, b) => {
                    let (a, b) = (self.get(a), self.get(b));
                    let x = self.b.ins().fmul(a, b);
                    (d, self.call1(exp, x))
                }
                Ins::MulSub(d, a, b, c) => {
                    let (b, c) = (self.get(b), self.get(c));
                    let diff = self.b.ins().fsub(b, c);
                    let a = self.get(a);
                    (d, self.b.ins().fmul(a, diff))
                }
                Ins::SubDiv(d, a, b, c) => {
                    let (a, b) = (self.get(a), self.get(b));
                    let diff = self.b.ins().fsub(a, b);
                    let c = self.get(c);
                    (d, self.b.ins().fdiv(diff, c))
                }
                Ins::DecayAdd(d, acc, q, h) => {
                    let acc = self.get(acc);
                    let dec = self.decay(q, h);
                    (d, self.b.ins().fadd(acc, dec))
                }
                Ins::MulExpMul(d, c, a, b) => {
                    let (a, b) = (self.get(a), self.get(b));
                    let x = self.b.ins().fmul(a, b);
                    let e = self.call1(exp, x);
                    let c = self.get(c);
                    (d, self.b.ins().fmul(c, e))
                }
            };
            self.set(d, v);
        }
    }
}

#[cfg(all(test, target_arch = "x86_64"))]
pub(super) use gen::op_code;
#[cfg(target_arch = "x86_64")]
pub(super) use gen::{build, Code};

/// Where no native code is generated there is none to hold.
#[cfg(not(target_arch = "x86_64"))]
pub(super) enum Code {}

#[cfg(not(target_arch = "x86_64"))]
impl Code {
    pub fn func(&self) -> NativeFn {
        match *self {}
    }
}

#[cfg(not(target_arch = "x86_64"))]
pub(super) fn build(_: &[Ins], _: &[f64], _: &[bool], _: Reg) -> Option<Code> {
    None
}
