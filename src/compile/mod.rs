//! Phase 4, compile: a checked model and one stage to flat programs over
//! numbered registers.
//!
//! Invariant: the programs this module emits carry no names, no source text
//! and no hash maps; evaluating one allocates nothing. Names survive only in
//! side tables used to word diagnostics.

mod ins;
mod lower;
mod native;
mod program;

use crate::builtins::{Func, Kernel, Lowering};
use crate::model::{Builtin, DefId, DefKind, Endpoint, Expr, ExprKind, Model};
use crate::numeric;
pub use crate::numeric::hyps;
use crate::span::Span;
use crate::syntax::BinOp;
use hyps::Hypsometry;

pub use ins::*;
pub use lower::*;
pub use program::*;

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
