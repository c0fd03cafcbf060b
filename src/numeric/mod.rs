//! Numeric kernels shared by the constant folder and the compiled evaluator.
//! Transcendental functions are pure Rust (`elementary` for `exp` and
//! `pow`, `libm` for the rest), so results are the same bits on every
//! platform.

pub mod elementary;
pub mod hyps;
mod tables;
pub mod truncation;

pub use elementary::exp;

use crate::syntax::BinOp;

/// Apply a binary operator; comparisons and logic give 1.0 or 0.0.
#[inline]
pub fn binary(op: BinOp, a: f64, b: f64) -> f64 {
    let truth = |c: bool| if c { 1.0 } else { 0.0 };
    match op {
        BinOp::Add => a + b,
        BinOp::Sub => a - b,
        BinOp::Mul => a * b,
        BinOp::Div => a / b,
        BinOp::Pow => pow(a, b),
        BinOp::Eq => truth(a == b),
        BinOp::Ne => truth(a != b),
        BinOp::Lt => truth(a < b),
        BinOp::Le => truth(a <= b),
        BinOp::Gt => truth(a > b),
        BinOp::Ge => truth(a >= b),
        BinOp::And => truth(a != 0.0 && b != 0.0),
        BinOp::Or => truth(a != 0.0 || b != 0.0),
    }
}

/// The larger of `a` and `b` by one rule on every platform (the standard
/// library's `f64::max` leaves the sign of a zero result to the machine):
/// a NaN operand gives the other operand, and of two equal operands (such
/// as +0 and -0) the first is returned. Compiled programs, interpreted or
/// native, use this.
#[inline]
pub fn max(a: f64, b: f64) -> f64 {
    if a.is_nan() || b > a {
        b
    } else {
        a
    }
}

/// The smaller of `a` and `b`, by the rule of [`max`].
#[inline]
pub fn min(a: f64, b: f64) -> f64 {
    if a.is_nan() || b < a {
        b
    } else {
        a
    }
}

/// `a^b`, exact by repeated multiplication for small integer exponents.
#[inline]
pub fn pow(a: f64, b: f64) -> f64 {
    if b == 2.0 {
        a * a
    } else if b == 1.0 {
        a
    } else if b == 3.0 {
        a * a * a
    } else {
        elementary::pow(a, b)
    }
}

/// The natural logarithm.
/// The circular and hyperbolic functions and their inverses, in pure Rust
/// (`libm`) so that every platform computes the same bits.
#[inline]
pub fn sin(x: f64) -> f64 {
    libm::sin(x)
}

#[inline]
pub fn cos(x: f64) -> f64 {
    libm::cos(x)
}

#[inline]
pub fn tan(x: f64) -> f64 {
    libm::tan(x)
}

#[inline]
pub fn asin(x: f64) -> f64 {
    libm::asin(x)
}

#[inline]
pub fn acos(x: f64) -> f64 {
    libm::acos(x)
}

#[inline]
pub fn atan(x: f64) -> f64 {
    libm::atan(x)
}

#[inline]
pub fn tanh(x: f64) -> f64 {
    libm::tanh(x)
}

#[inline]
pub fn floor(x: f64) -> f64 {
    libm::floor(x)
}

#[inline]
pub fn ceil(x: f64) -> f64 {
    libm::ceil(x)
}

/// -1, 0 or 1 by the sign of `x`; 0 for both zeros, NaN for NaN (unlike
/// `f64::signum`, which gives 1 for +0).
#[inline]
pub fn sign(x: f64) -> f64 {
    if x > 0.0 {
        1.0
    } else if x < 0.0 {
        -1.0
    } else if x == 0.0 {
        0.0
    } else {
        f64::NAN
    }
}

#[inline]
pub fn ln(x: f64) -> f64 {
    libm::log(x)
}

#[inline]
pub fn log10(x: f64) -> f64 {
    libm::log10(x)
}

#[inline]
pub fn sqrt(x: f64) -> f64 {
    libm::sqrt(x)
}

#[inline]
pub fn abs(x: f64) -> f64 {
    x.abs()
}

/// `x` limited to `[lo, hi]`: `min(max(x, lo), hi)` by the rules of
/// [`max`] and [`min`] (so a NaN `x` gives `lo`, and `lo > hi` gives `hi`).
#[inline]
pub fn clamp(x: f64, lo: f64, hi: f64) -> f64 {
    min(max(x, lo), hi)
}

/// 0 below `e0`, 1 above `e1`, the cubic Hermite step between.
#[inline]
pub fn smoothstep(x: f64, e0: f64, e1: f64) -> f64 {
    if e1 == e0 {
        return if x < e0 { 0.0 } else { 1.0 };
    }
    let t = ((x - e0) / (e1 - e0)).clamp(0.0, 1.0);
    t * t * (3.0 - 2.0 * t)
}

/// Linear interpolation in strictly increasing knots `xs`, held constant
/// beyond the ends.
#[inline]
pub fn interp(xs: &[f64], ys: &[f64], x: f64) -> f64 {
    let n = xs.len();
    if n == 0 || x.is_nan() {
        // (A NaN would find no knot below it.)
        return f64::NAN;
    }
    if x <= xs[0] {
        return ys[0];
    }
    if x >= xs[n - 1] {
        return ys[n - 1];
    }
    // First knot greater than x.
    let i = xs.partition_point(|&k| k <= x);
    let (x0, x1, y0, y1) = (xs[i - 1], xs[i], ys[i - 1], ys[i]);
    y0 + (y1 - y0) * (x - x0) / (x1 - x0)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn interp_inside_and_beyond_the_ends() {
        let xs = [0.0, 1.0, 3.0];
        let ys = [10.0, 20.0, 0.0];
        assert_eq!(interp(&xs, &ys, -1.0), 10.0);
        assert_eq!(interp(&xs, &ys, 0.5), 15.0);
        assert_eq!(interp(&xs, &ys, 1.0), 20.0);
        assert_eq!(interp(&xs, &ys, 2.0), 10.0);
        assert_eq!(interp(&xs, &ys, 9.0), 0.0);
        assert!(interp(&xs, &ys, f64::NAN).is_nan());
    }

    #[test]
    fn clamp_inside_outside_and_at_the_edges() {
        assert_eq!(clamp(0.5, 0.0, 1.0), 0.5);
        assert_eq!(clamp(-2.0, 0.0, 1.0), 0.0);
        assert_eq!(clamp(7.0, 0.0, 1.0), 1.0);
        // As its comment says: a NaN gives the lower edge, crossed edges
        // the upper one.
        assert_eq!(clamp(f64::NAN, 0.25, 1.0), 0.25);
        assert_eq!(clamp(0.5, 2.0, 1.0), 1.0);
    }

    #[test]
    fn smoothstep_ends_and_middle() {
        assert_eq!(smoothstep(-1.0, 0.0, 2.0), 0.0);
        assert_eq!(smoothstep(1.0, 0.0, 2.0), 0.5);
        assert_eq!(smoothstep(3.0, 0.0, 2.0), 1.0);
    }
}
