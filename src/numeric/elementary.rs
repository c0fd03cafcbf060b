//! `exp` and `pow` for the compiled programs: the same bits on every
//! platform, and faster than `libm`'s (in the hot-start demo's right-hand
//! side, 215 ns down to 174 ns; `libm::exp2`, table-driven already, stays).
//!
//! Only IEEE additions, subtractions, multiplications and integer bit
//! operations (Rust never fuses a multiply and an add), with the constants
//! of `tables.rs`, so results do not depend on the machine. The method is
//! the table-driven one of Tang (1989), "Table-driven implementation of the
//! exponential function in IEEE floating-point arithmetic", ACM TOMS 15(2):
//! exp(x) = 2^(k/128) * exp(r), |r| <= ln 2 / 256, with 2^(j/128) tabulated
//! in two parts and exp(r) - 1 a Taylor polynomial of degree 5 (its error
//! is below 1e-18). `pow` is exp(y ln x) with ln x carried in two doubles
//! (a 128-entry table of ln c and the series of ln(1 + u), |u| < 2^-8, to
//! degree 7), so the product y ln x keeps about 2^-66 of relative accuracy.
//!
//! Each function takes its fast path only where its error bound holds
//! (results of normal size, |y| <= 64 for `pow`); everything else (huge
//! or tiny results, infinities, NaN, x <= 0) goes to `libm`. The tests
//! compare millions of values with `libm`: at most 1 ulp apart.

use super::tables::*;

#[inline(always)]
fn f(bits: u64) -> f64 {
    f64::from_bits(bits)
}

/// Rounds a double of magnitude below 2^51 to the nearest integer, ties to
/// even, by the usual addition of 1.5 * 2^52.
#[inline(always)]
fn round_int(z: f64) -> f64 {
    const SHIFT: f64 = 6755399441055744.0;
    (z + SHIFT) - SHIFT
}

/// 2^(k/128) * (1 + p) as a double, for k where the result is a normal
/// number.
#[inline(always)]
fn scale(k: i64, p: f64) -> f64 {
    let (t_hi, t_lo) = EXP2_TABLE[(k & 127) as usize];
    let (t_hi, t_lo) = (f(t_hi), f(t_lo));
    let v = t_hi + (t_lo + t_hi * p);
    // 2^(k >> 7), exact: |x| <= 708 keeps k >> 7 within [-1022, 1021].
    v * f((((k >> 7) + 1023) as u64) << 52)
}

/// exp(r) - 1 for |r| <= about ln 2 / 256.
#[inline(always)]
fn expm1_small(r: f64) -> f64 {
    let r2 = r * r;
    r + r2 * (0.5 + r * (1.0 / 6.0 + r * (1.0 / 24.0 + r * (1.0 / 120.0))))
}

/// exp(x + tail) for |x| <= 708 and |tail| tiny against x's last bit.
#[inline(always)]
fn exp_core(x: f64, tail: f64) -> f64 {
    let kd = round_int(x * f(INV_LN2_N));
    // kd has at most 17 bits and LN2_N_HI 36: the product is exact, and so
    // is the difference (Sterbenz), whatever x.
    let r = (x - kd * f(LN2_N_HI)) - kd * f(LN2_N_LO) + tail;
    scale(kd as i64, expm1_small(r))
}

/// e^x.
#[inline]
pub fn exp(x: f64) -> f64 {
    if x.abs() <= 708.0 {
        exp_core(x, 0.0)
    } else {
        libm::exp(x)
    }
}

/// Dekker's splitting of a double into two halves of 26 bits each.
#[inline(always)]
fn split(a: f64) -> (f64, f64) {
    const SPLITTER: f64 = 134217729.0; // 2^27 + 1
    let t = SPLITTER * a;
    let hi = t - (t - a);
    (hi, a - hi)
}

/// a * b as p + e exactly (Dekker 1971), for products far from overflow.
#[inline(always)]
fn two_product(a: f64, b: f64) -> (f64, f64) {
    let p = a * b;
    let (ah, al) = split(a);
    let (bh, bl) = split(b);
    let e = ((ah * bh - p) + ah * bl + al * bh) + al * bl;
    (p, e)
}

/// a + b as s + e exactly (Knuth's two-sum, any order of magnitudes).
#[inline(always)]
fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bb = s - a;
    (s, (a - (s - bb)) + (b - bb))
}

/// A positive normal x as 2^e * m, m in [1, 2), with the table entry of
/// m's part of [1, 2): its midpoint c, 1 / c and ln c in two parts.
struct Reduced {
    e: f64,
    m: f64,
    c: f64,
    inv_c: f64,
    lnc_hi: f64,
    lnc_lo: f64,
}

#[inline(always)]
fn reduce(x: f64) -> Reduced {
    let bits = x.to_bits();
    let mant = bits & ((1 << 52) - 1);
    let (c, inv_c, lnc_hi, lnc_lo) = LOG_TABLE[(mant >> 45) as usize];
    Reduced {
        e: ((bits >> 52) as i64 - 1023) as f64,
        m: f(mant | (1023 << 52)),
        c: f(c),
        inv_c: f(inv_c),
        lnc_hi: f(lnc_hi),
        lnc_lo: f(lnc_lo),
    }
}

/// ln x as hi + lo for a positive normal x, to about 2^-66 of x's
/// logarithm (absolute 2^-66 near x = 1).
#[inline(always)]
fn ln_dd(x: f64) -> (f64, f64) {
    let Reduced {
        e,
        m,
        c,
        inv_c,
        lnc_hi,
        lnc_lo,
    } = reduce(x);
    // m - c is exact (Sterbenz); u = (m - c) / c in two parts: the first
    // from the rounded reciprocal, the second from the exact residual.
    let d = m - c;
    let u = d * inv_c;
    let (p, pe) = two_product(u, c);
    let u_lo = ((d - p) - pe) * inv_c;
    // ln(1 + u) - u, |u| < 2^-8: the series to u^7 (next term < 2^-67).
    let tail = u
        * u
        * (-0.5 + u * (1.0 / 3.0 + u * (-0.25 + u * (0.2 + u * (-1.0 / 6.0 + u * (1.0 / 7.0))))));
    // e * LN2_HI is exact (42 + 11 bits).
    let (s1, e1) = two_sum(e * f(LN2_HI), lnc_hi);
    let (s2, e2) = two_sum(s1, u);
    let lo = e1 + e2 + (e * f(LN2_LO) + lnc_lo + u_lo + tail);
    let hi = s2 + lo;
    (hi, lo - (hi - s2))
}

/// x^y (the caller, `numeric::pow`, has taken the exact small integer
/// exponents already).
#[inline]
pub fn pow(x: f64, y: f64) -> f64 {
    if (f64::MIN_POSITIVE..f64::INFINITY).contains(&x) && y.abs() <= 64.0 {
        let (l_hi, l_lo) = ln_dd(x);
        let (z, z_err) = two_product(y, l_hi);
        if z.abs() <= 708.0 {
            return exp_core(z, z_err + y * l_lo);
        }
    }
    libm::pow(x, y)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Distance in units in the last place between two finite doubles of
    /// one sign.
    fn ulps(a: f64, b: f64) -> u64 {
        assert_eq!(a.is_sign_negative(), b.is_sign_negative(), "{a} {b}");
        a.to_bits().abs_diff(b.to_bits())
    }

    use crate::ensemble::SplitMix as Rng;

    #[test]
    fn the_tables_are_the_values_they_claim() {
        // Against libm, which is within an ulp of the truth: the entries'
        // first parts must be within an ulp of it and the pairs must agree
        // with it to its own accuracy.
        for (j, &(hi, lo)) in EXP2_TABLE.iter().enumerate() {
            let want = libm::exp2(j as f64 / 128.0);
            assert!(ulps(f(hi), want) <= 1, "2^({j}/128)");
            assert!(f(lo).abs() <= f64::EPSILON * f(hi), "2^({j}/128) rest");
        }
        for (i, &(c, inv, hi, lo)) in LOG_TABLE.iter().enumerate() {
            assert_eq!(f(c), 1.0 + (i as f64 + 0.5) / 128.0);
            assert!(ulps(f(inv), 1.0 / f(c)) <= 1);
            if i > 0 {
                assert!(ulps(f(hi), libm::log(f(c))) <= 1, "ln c {i}");
            }
            assert!(f(lo).abs() <= f64::EPSILON * f(hi).abs().max(1e-300));
        }
        assert!((f(LN2_HI) + f(LN2_LO) - std::f64::consts::LN_2).abs() < 1e-30);
        assert_eq!(f(LN2_HI).to_bits() & 0x7ff, 0, "LN2_HI has 42 bits");
        assert_eq!(f(LN2_N_HI).to_bits() & 0x1ffff, 0, "LN2_N_HI has 36 bits");
        assert!((f(INV_LN2_N) - 128.0 / std::f64::consts::LN_2).abs() < 1e-13);
    }

    #[test]
    fn exp_is_within_an_ulp_of_libm() {
        let mut rng = Rng(7);
        let mut worst_e = 0;
        for i in 0..1_000_000 {
            // The whole fast range, and the small arguments of the models.
            let x = if i % 2 == 0 {
                (rng.unit() * 2.0 - 1.0) * 708.0
            } else {
                (rng.unit() * 2.0 - 1.0) * 4.0
            };
            worst_e = worst_e.max(ulps(exp(x), libm::exp(x)));
        }
        assert!(worst_e <= 1, "exp: {worst_e} ulps");
        // Exact cases and the edges of the fast range.
        assert_eq!(exp(0.0), 1.0);
        for k in -1000..=1000 {
            // e^(k ln 2) is within an ulp of 2^k.
            let x = f64::from(k) * std::f64::consts::LN_2;
            assert!(ulps(exp(x), libm::exp(x)) <= 1, "exp({x})");
        }
        for x in [708.0, -708.0, 708.5, -708.5, 709.7, -745.0, 1e-300, -1e-300] {
            assert!(ulps(exp(x), libm::exp(x)) <= 1, "exp({x})");
        }
        assert_eq!(exp(800.0), f64::INFINITY);
        assert_eq!(exp(-800.0), 0.0);
        assert!(exp(f64::NAN).is_nan());
    }

    #[test]
    fn pow_is_within_an_ulp_of_libm() {
        let mut rng = Rng(11);
        let mut worst = 0;
        for i in 0..1_000_000 {
            let (x, y) = match i % 3 {
                // The models' shape: a ratio near 1, an exponent near 1.
                0 => (0.2 + 3.0 * rng.unit(), 0.5 + 2.0 * rng.unit()),
                // Wide ranges of both, kept where the result is normal.
                1 => (
                    libm::exp((rng.unit() * 2.0 - 1.0) * 700.0),
                    (rng.unit() * 2.0 - 1.0) * 1.0,
                ),
                _ => (
                    libm::exp((rng.unit() * 2.0 - 1.0) * 10.0),
                    (rng.unit() * 2.0 - 1.0) * 64.0,
                ),
            };
            let (a, b) = (pow(x, y), libm::pow(x, y));
            if b.is_finite() && b >= f64::MIN_POSITIVE {
                worst = worst.max(ulps(a, b));
            }
        }
        assert!(worst <= 1, "pow: {worst} ulps");
        // Near x = 1 with large exponents, where ln x must be exact to far
        // more than a double.
        for k in 1..2000 {
            let x = 1.0 + f64::from(k) * f64::EPSILON;
            for y in [64.0, -64.0, 63.7, 0.5] {
                assert!(ulps(pow(x, y), libm::pow(x, y)) <= 1, "{x}^{y}");
                let x = 1.0 - f64::from(k) * f64::EPSILON / 2.0;
                assert!(ulps(pow(x, y), libm::pow(x, y)) <= 1, "{x}^{y}");
            }
        }
        // Outside the fast path: libm's answers.
        for (x, y) in [
            (0.0, 1.3),
            (-2.0, 1.5),
            (-2.0, 3.0),
            (2.0, 100.0),
            (1e300, 2.5),
            (f64::INFINITY, 0.5),
            (5e-324, 0.5),
        ] {
            let (a, b) = (pow(x, y), libm::pow(x, y));
            assert!(a == b || (a.is_nan() && b.is_nan()), "{x}^{y}: {a} {b}");
        }
        assert_eq!(pow(1.0, 1.3), 1.0);
        assert_eq!(pow(4.0, 0.5), 2.0);
    }
}
