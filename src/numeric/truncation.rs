//! Truncated distributions: how much of a distribution lies between two
//! bounds, and drawing from that part by its inverse distribution function.
//!
//! Normal tails are computed from `erfc` (libm, pure Rust) on the side
//! where they are small, so a tail of 1e-30 is not lost to cancellation
//! against 1.

/// Below this fraction of its mass left by `min`/`max`, a truncated
/// distribution is refused when the scenario is checked: it is almost surely
/// a mistake in the bounds, and draws from so thin a sliver say more about
/// rounding than about the distribution.
pub const MIN_TRUNCATED_MASS: f64 = 1e-12;

/// From this fraction of its mass on, a truncated draw rejects values
/// outside the bounds and draws again (one try in a hundred or more
/// succeeds, so 100,000 tries fail with probability below e^-1000); below
/// it, the draw inverts the distribution function instead, with one
/// uniform number.
pub const REJECTION_MIN_MASS: f64 = 1e-2;

/// Standardized values beyond this carry no mass a double can hold
/// (the upper tail at 39 is about 1e-333); bisection starts inside it.
const Z_LIMIT: f64 = 39.0;

/// Upper tail of the standard normal, P(Z > z).
fn upper(z: f64) -> f64 {
    0.5 * libm::erfc(z / std::f64::consts::SQRT_2)
}

/// Distribution function of the standard normal, P(Z <= z).
fn lower(z: f64) -> f64 {
    upper(-z)
}

/// Mass of the standard normal between `a` and `b` (either may be
/// infinite; 0 when `a >= b`).
pub fn normal_mass(a: f64, b: f64) -> f64 {
    if a.is_nan() || b.is_nan() || a >= b {
        return 0.0;
    }
    if a >= 0.0 {
        upper(a) - upper(b)
    } else if b <= 0.0 {
        lower(b) - lower(a)
    } else {
        1.0 - lower(a) - upper(b)
    }
}

/// The value of the standard normal truncated to `[a, b]` at fraction `u`
/// (in 0..1) of the truncated mass, by bisection: slower than a rational
/// approximation, but exact to the last representable step and
/// deterministic on every platform.
pub fn normal_between(a: f64, b: f64, u: f64) -> f64 {
    if b <= 0.0 {
        // The mirror image keeps the small tail on the side `upper` is
        // accurate on.
        return -normal_between(-b, -a, 1.0 - u);
    }
    let (mut lo, mut hi) = (a.max(-Z_LIMIT), b.min(Z_LIMIT));
    let mass = normal_mass(a, b);
    // The mass between `a` and z, as a function of z, rises from 0 to `mass`.
    let below = |z: f64| normal_mass(a, z);
    let target = u * mass;
    while lo < hi {
        let mid = lo + (hi - lo) / 2.0;
        if mid <= lo || mid >= hi {
            break;
        }
        if below(mid) < target {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    lo + (hi - lo) / 2.0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn masses_match_tabulated_normal_tails() {
        // P(Z > 1.96) = 0.0249979 and P(Z > 5) = 2.8665157e-7 (standard
        // normal tables, e.g. Abramowitz & Stegun 1964, table 26.1).
        assert!((normal_mass(1.96, f64::INFINITY) - 0.024_997_9).abs() < 1e-7);
        assert!((normal_mass(5.0, f64::INFINITY) / 2.866_515_7e-7 - 1.0).abs() < 1e-7);
        assert!((normal_mass(f64::NEG_INFINITY, -5.0) / 2.866_515_7e-7 - 1.0).abs() < 1e-7);
        assert!((normal_mass(-1.0, 1.0) - 0.682_689_49).abs() < 1e-8);
        // Forty standard deviations out nothing is left; a reversed or
        // empty interval has no mass.
        assert_eq!(normal_mass(40.0, f64::INFINITY), 0.0);
        assert_eq!(normal_mass(1.0, 1.0), 0.0);
        assert_eq!(normal_mass(2.0, 1.0), 0.0);
        // A far tail keeps its relative precision: P(Z > 10) = 7.6198530e-24.
        assert!((normal_mass(10.0, f64::INFINITY) / 7.619_853_0e-24 - 1.0).abs() < 1e-7);
    }

    #[test]
    fn inverse_draws_stay_inside_and_split_the_mass() {
        for &(a, b) in &[
            (6.0, f64::INFINITY),
            (f64::NEG_INFINITY, -6.0),
            (-0.5, 0.25),
            (30.0, 31.0),
            (-1e-9, 1e-9),
        ] {
            let mass = normal_mass(a, b);
            let mut last = f64::NEG_INFINITY;
            for k in 1..100 {
                let u = k as f64 / 100.0;
                let z = normal_between(a, b, u);
                assert!(z >= a && z <= b && z.is_finite(), "{z} outside [{a}, {b}]");
                assert!(z >= last, "not monotone at u = {u}");
                last = z;
                let got = normal_mass(a, z) / mass;
                assert!((got - u).abs() < 1e-6, "[{a}, {b}] at {u}: {got}");
            }
        }
        // The median of the tail beyond 0 is the 75 % point of the whole
        // normal, 0.6744898 (standard normal tables).
        assert!((normal_between(0.0, f64::INFINITY, 0.5) - 0.674_489_75).abs() < 1e-7);
    }
}
