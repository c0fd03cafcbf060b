//! The instruction set: what each instruction reads and writes (`Shape`,
//! the one description that bounds checks, fusion and native code use).

use super::*;

pub(super) type Reg = u32;

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

/// Where an instruction writes, what it reads and which table: the one
/// description of operands that bounds checking, fusion and native code
/// rely on.
pub(super) struct Shape {
    pub(super) dest: Reg,
    pub(super) regs: [Reg; 3],
    pub(super) n: usize,
    pub(super) table: Option<u32>,
    /// Reads the age register too.
    pub(super) age: bool,
}

impl Shape {
    pub(super) fn reads(&self) -> &[Reg] {
        &self.regs[..self.n]
    }
}

pub(super) fn shape(ins: &Ins) -> Shape {
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
pub(super) fn operands(ins: &Ins) -> Vec<Reg> {
    shape(ins).reads().to_vec()
}

/// The register an instruction writes.
pub(super) fn dest(ins: &Ins) -> Reg {
    shape(ins).dest
}
