//! The explicit method: the Dormand–Prince 5(4) embedded Runge–Kutta pair
//! (Dormand & Prince 1980) with its 4th-order continuous extension (Hairer,
//! Nørsett & Wanner, Solving ODEs I).

// Index loops mirror the formulas of the method; iterator chains would hide them.
#![allow(clippy::needless_range_loop)]

use super::{
    accepted_factor, err_norm, proposed_factor, Attempt, Control, Dense, Failure, Stats, Stepper,
    System,
};

// Dormand–Prince 5(4) coefficients.
const C2: f64 = 1.0 / 5.0;
const C3: f64 = 3.0 / 10.0;
const C4: f64 = 4.0 / 5.0;
const C5: f64 = 8.0 / 9.0;
const A21: f64 = 1.0 / 5.0;
const A31: f64 = 3.0 / 40.0;
const A32: f64 = 9.0 / 40.0;
const A41: f64 = 44.0 / 45.0;
const A42: f64 = -56.0 / 15.0;
const A43: f64 = 32.0 / 9.0;
const A51: f64 = 19372.0 / 6561.0;
const A52: f64 = -25360.0 / 2187.0;
const A53: f64 = 64448.0 / 6561.0;
const A54: f64 = -212.0 / 729.0;
const A61: f64 = 9017.0 / 3168.0;
const A62: f64 = -355.0 / 33.0;
const A63: f64 = 46732.0 / 5247.0;
const A64: f64 = 49.0 / 176.0;
const A65: f64 = -5103.0 / 18656.0;
const A71: f64 = 35.0 / 384.0;
const A73: f64 = 500.0 / 1113.0;
const A74: f64 = 125.0 / 192.0;
const A75: f64 = -2187.0 / 6784.0;
const A76: f64 = 11.0 / 84.0;
const E1: f64 = 71.0 / 57600.0;
const E3: f64 = -71.0 / 16695.0;
const E4: f64 = 71.0 / 1920.0;
const E5: f64 = -17253.0 / 339200.0;
const E6: f64 = 22.0 / 525.0;
const E7: f64 = -1.0 / 40.0;
const D1: f64 = -12715105075.0 / 11282082432.0;
const D3: f64 = 87487479700.0 / 32700410799.0;
const D4: f64 = -10690763975.0 / 1880347072.0;
const D5: f64 = 701980252875.0 / 199316789632.0;
const D6: f64 = -1453857185.0 / 822651844.0;
const D7: f64 = 69997945.0 / 29380423.0;

/// Stage slopes, the trial solution and the interpolant of the last step.
pub struct Dopri {
    k: [Vec<f64>; 7],
    y1: Vec<f64>,
    /// The sixth stage's point, for the stiffness test.
    ysti: Vec<f64>,
    tmp: Vec<f64>,
    err: Vec<f64>,
    rc: [Vec<f64>; 5],
    last_rejected: bool,
}

impl Dopri {
    /// h |lambda| estimated from the last two stages of the last accepted
    /// step (Hairer, Nørsett & Wanner, Solving ODEs I, section II.10): the
    /// `auto` method's stiffness test.
    pub(super) fn stiffness(&self, h: f64, n_err: usize) -> Option<f64> {
        let mut num = 0.0;
        let mut den = 0.0;
        for i in 0..n_err {
            let a = self.k[6][i] - self.k[5][i];
            let b = self.y1[i] - self.ysti[i];
            num += a * a;
            den += b * b;
        }
        (den > 0.0).then(|| h * libm::sqrt(num / den))
    }

    /// All seven stages; false when a derivative or the solution is not finite.
    fn stages<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        f0: &[f64],
        stats: &mut Stats,
    ) -> bool {
        let n = y.len();
        let w = self;
        w.k[0].copy_from_slice(f0);
        let mut ok = true;
        macro_rules! stage {
            ($ki:expr, $c:expr, $($a:expr => $kj:expr),+) => {{
                for i in 0..n {
                    w.tmp[i] = y[i] + h * (0.0 $(+ $a * w.k[$kj][i])+);
                }
                stats.rhs_evals += 1;
                let (before, after) = w.k.split_at_mut($ki);
                let _ = &before;
                ok &= sys.rhs(t + $c * h, &w.tmp, &mut after[0]);
            }};
        }
        stage!(1, C2, A21 => 0);
        stage!(2, C3, A31 => 0, A32 => 1);
        stage!(3, C4, A41 => 0, A42 => 1, A43 => 2);
        stage!(4, C5, A51 => 0, A52 => 1, A53 => 2, A54 => 3);
        for i in 0..n {
            w.ysti[i] = y[i]
                + h * (A61 * w.k[0][i]
                    + A62 * w.k[1][i]
                    + A63 * w.k[2][i]
                    + A64 * w.k[3][i]
                    + A65 * w.k[4][i]);
        }
        stats.rhs_evals += 1;
        ok &= sys.rhs(t + h, &w.ysti, &mut w.k[5]);
        for i in 0..n {
            w.y1[i] = y[i]
                + h * (A71 * w.k[0][i]
                    + A73 * w.k[2][i]
                    + A74 * w.k[3][i]
                    + A75 * w.k[4][i]
                    + A76 * w.k[5][i]);
        }
        stats.rhs_evals += 1;
        ok &= sys.rhs(t + h, &w.y1, &mut w.k[6]);
        for i in 0..n {
            w.err[i] = h
                * (E1 * w.k[0][i]
                    + E3 * w.k[2][i]
                    + E4 * w.k[3][i]
                    + E5 * w.k[4][i]
                    + E6 * w.k[5][i]
                    + E7 * w.k[6][i]);
        }
        ok && w.y1.iter().all(|v| v.is_finite())
    }
}

impl Stepper for Dopri {
    fn new(n: usize) -> Dopri {
        let v = || vec![0.0; n];
        Dopri {
            k: [v(), v(), v(), v(), v(), v(), v()],
            y1: v(),
            ysti: v(),
            tmp: v(),
            err: v(),
            rc: [v(), v(), v(), v(), v()],
            last_rejected: false,
        }
    }

    fn implicit(&self) -> bool {
        false
    }

    fn attempt<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        f0: &[f64],
        ctl: &Control,
        stats: &mut Stats,
    ) -> Result<Attempt, Failure> {
        let ok = self.stages(sys, t, h, y, f0, stats);
        let (err, worst) = if ok {
            err_norm(&self.err, y, &self.y1, ctl)
        } else {
            (f64::INFINITY, None)
        };
        if err > 1.0 {
            self.last_rejected = true;
            let factor = if err.is_finite() {
                proposed_factor(err, -0.2, 1.0)
            } else {
                0.25
            };
            return Ok(Attempt::rejected(err, worst, factor));
        }
        stats.explicit_steps += 1;
        let w = self;
        for i in 0..y.len() {
            let ydiff = w.y1[i] - y[i];
            let bspl = h * w.k[0][i] - ydiff;
            w.rc[0][i] = y[i];
            w.rc[1][i] = ydiff;
            w.rc[2][i] = bspl;
            w.rc[3][i] = ydiff - h * w.k[6][i] - bspl;
            w.rc[4][i] = h
                * (D1 * w.k[0][i]
                    + D3 * w.k[2][i]
                    + D4 * w.k[3][i]
                    + D5 * w.k[4][i]
                    + D6 * w.k[5][i]
                    + D7 * w.k[6][i]);
        }
        let factor = accepted_factor(err, -0.2, 10.0, w.last_rejected);
        w.last_rejected = false;
        Ok(Attempt::accepted(err, worst, factor))
    }

    fn y1(&self) -> &[f64] {
        &self.y1
    }

    fn f1(&self) -> &[f64] {
        // FSAL: the last stage is the slope at the new point.
        &self.k[6]
    }

    fn dense<'a>(&'a self, t0: f64, h: f64, _y0: &'a [f64], _f0: &'a [f64]) -> Dense<'a> {
        Dense::Dopri {
            t0,
            h,
            rc: &self.rc,
        }
    }
}
