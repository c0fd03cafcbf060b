//! The implicit method: the three-stage, third-order, L-stable SDIRK method
//! of Alexander (1977), stiffly accurate, with an embedded second-order
//! solution for the error estimate, filtered through the iteration matrix
//! (Hairer & Wanner, Solving ODEs II) so that stiff components do not
//! inflate it. Newton iterations use a finite-difference Jacobian, norms
//! weighted like the error norm, a convergence-rate test, a Jacobian
//! refresh when convergence is slow and step halving when it fails. The
//! interpolant is the cubic Hermite one through both ends of the step.

// Index loops mirror the formulas of the method; iterator chains would hide them.
#![allow(clippy::needless_range_loop)]

use super::{
    accepted_factor, err_norm, proposed_factor, Attempt, Control, Dense, Failure, Stats, Stepper,
    System,
};
use crate::solve::linalg::Lu;

/// Alexander's L-stable SDIRK3: gamma is the root of
/// x^3 - 3x^2 + 3x/2 - 1/6 = 0 in (1/6, 1/2).
const GAMMA: f64 = 0.435_866_521_508_458_97;

struct Tableau {
    c: [f64; 3],
    a: [[f64; 3]; 3],
    b: [f64; 3],
    /// b - b_hat of the embedded second-order solution.
    e: [f64; 3],
}

fn tableau() -> Tableau {
    let g = GAMMA;
    let c2 = (1.0 + g) / 2.0;
    let b1 = -(6.0 * g * g - 16.0 * g + 1.0) / 4.0;
    let b2 = (6.0 * g * g - 20.0 * g + 5.0) / 4.0;
    // Embedded order 2 with b_hat3 = 0: b_hat1 + b_hat2 = 1,
    // b_hat1 g + b_hat2 c2 = 1/2.
    let bh2 = (0.5 - g) / (c2 - g);
    let bh1 = 1.0 - bh2;
    Tableau {
        c: [g, c2, 1.0],
        a: [[g, 0.0, 0.0], [(1.0 - g) / 2.0, g, 0.0], [b1, b2, g]],
        b: [b1, b2, g],
        e: [b1 - bh1, b2 - bh2, g],
    }
}

/// Stage slopes, the Newton work arrays, the Jacobian and its factors.
pub struct Sdirk {
    tab: Tableau,
    k: [Vec<f64>; 3],
    y1: Vec<f64>,
    tmp: Vec<f64>,
    err: Vec<f64>,
    jac: Vec<f64>,
    lu: Lu,
    /// The step size `lu` was factored for.
    lu_h: f64,
    z: Vec<f64>,
    fz: Vec<f64>,
    delta: Vec<f64>,
    rhs_base: Vec<f64>,
    /// The last Newton iteration converged slowly: refresh the Jacobian.
    slow: bool,
    have_jac: bool,
    /// The Jacobian was taken at the start of the current step.
    jac_fresh: bool,
    last_rejected: bool,
}

enum StepOutcome {
    /// The error norm and the component that limits it.
    Accepted(f64, Option<usize>),
    /// The error norm and the component that limits it.
    Rejected(f64, Option<usize>),
    /// Newton did not converge; the component with the largest weighted
    /// increment, if any was computed.
    NewtonFailed(Option<usize>),
}

/// Most Newton iterations per stage equation.
const NEWTON_ITERS: usize = 8;

/// Newton stops when its estimated remaining error, in the weighted norm in
/// which the error tolerance is 1, is below this. The stopping rule
/// (increment times theta / (1 - theta)) is that of Hairer & Wanner, Solving
/// ODEs II, section IV.8; the bound max(10 eps / rtol, min(0.03, sqrt(rtol)))
/// is the default of their Radau IIA code: tighter for tighter rtol, where
/// the stage values must be more exact.
fn newton_tol(rtol: f64) -> f64 {
    (10.0 * f64::EPSILON / rtol).max(0.03f64.min(libm::sqrt(rtol)))
}

impl Sdirk {
    /// Finite-difference Jacobian at (t, y), row-major: jac[r*n + c] = d f_r / d y_c.
    /// The increment of component c is sqrt(eps) * max(|y_c|, scale_c, |h f_c|):
    /// relative to the component's size, never below its tolerance scale (so
    /// a state at zero is still perturbed measurably), nor below what it moves
    /// in one step.
    ///
    /// The differences are taken from f evaluated here, not from the slope
    /// kept from the last step: after an implicit step that slope is f at the
    /// last Newton iterate, which differs from y by the iteration's residual,
    /// and a stiff rate turns that tiny offset into a large error of the
    /// Jacobian (and so into slow Newton convergence).
    fn jacobian<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        ctl: &Control,
        stats: &mut Stats,
    ) -> bool {
        let n = y.len();
        let w = self;
        stats.jacobians += 1;
        stats.rhs_evals += 1;
        if !sys.rhs(t, y, &mut w.tmp) {
            return false;
        }
        let f0 = &w.tmp;
        w.z.copy_from_slice(y);
        for c in 0..n {
            let size = y[c].abs().max(ctl.scale[c]).max((h * f0[c]).abs());
            let delta = libm::sqrt(f64::EPSILON) * size.max(1e-300);
            let keep = w.z[c];
            w.z[c] = keep + delta;
            let mut d = w.z[c] - keep;
            stats.rhs_evals += 1;
            if !sys.rhs(t, &w.z, &mut w.fz) {
                // A forward difference left the domain: try a backward one.
                w.z[c] = keep - delta;
                d = w.z[c] - keep;
                stats.rhs_evals += 1;
                if !sys.rhs(t, &w.z, &mut w.fz) {
                    return false;
                }
            }
            for r in 0..n {
                w.jac[r * n + c] = (w.fz[r] - f0[r]) / d;
            }
            w.z[c] = keep;
        }
        w.lu_h = f64::NAN;
        true
    }

    /// The three stage equations by Newton iteration, then the solution and
    /// its filtered error estimate.
    fn step<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        ctl: &Control,
        stats: &mut Stats,
    ) -> StepOutcome {
        let n = y.len();
        let w = self;
        let sd = &w.tab;
        if w.lu_h != h {
            if !w.lu.factor_shifted(&w.jac, h * GAMMA) {
                return StepOutcome::NewtonFailed(None);
            }
            w.lu_h = h;
        }
        let kappa = newton_tol(ctl.rtol);
        w.slow = false;
        for s in 0..3 {
            // Explicit part of the stage equation.
            for i in 0..n {
                let mut acc = 0.0;
                for j in 0..s {
                    acc += sd.a[s][j] * w.k[j][i];
                }
                w.rhs_base[i] = y[i] + h * acc;
            }
            // Predictor: the explicit part plus the previous stage's slope.
            for i in 0..n {
                let slope = if s == 0 { 0.0 } else { w.k[s - 1][i] };
                w.z[i] = w.rhs_base[i] + h * GAMMA * slope;
            }
            let mut converged = false;
            let mut prev_norm = f64::INFINITY;
            // Until a rate is measured, only an increment already below the
            // tolerance counts as converged: the new solution sums the stage
            // slopes, which multiply a stiff component's leftover Newton error
            // by h |lambda|, so a rate guessed from an earlier solve is not
            // enough.
            let mut eta = 1.0;
            for iter in 0..NEWTON_ITERS {
                stats.rhs_evals += 1;
                if !sys.rhs(t + sd.c[s] * h, &w.z, &mut w.fz) {
                    return StepOutcome::NewtonFailed(None);
                }
                for i in 0..n {
                    w.delta[i] = w.rhs_base[i] + h * GAMMA * w.fz[i] - w.z[i];
                }
                w.lu.solve(&mut w.delta);
                for i in 0..n {
                    w.z[i] += w.delta[i];
                }
                // Weighted like the error: a component at zero is measured
                // against the size of its new iterate, not against nothing.
                let (norm, limit) = err_norm(&w.delta, y, &w.z, ctl);
                if !norm.is_finite() {
                    return StepOutcome::NewtonFailed(limit);
                }
                if iter > 0 {
                    let theta = norm / prev_norm;
                    if theta >= 1.0 {
                        if norm <= kappa {
                            // Increments at rounding level have stopped shrinking.
                            converged = true;
                            break;
                        }
                        return StepOutcome::NewtonFailed(limit);
                    }
                    if theta > 0.5 {
                        w.slow = true;
                    }
                    eta = theta / (1.0 - theta);
                }
                if eta * norm <= kappa {
                    converged = true;
                    break;
                }
                prev_norm = norm;
                if iter + 1 == NEWTON_ITERS {
                    return StepOutcome::NewtonFailed(limit);
                }
            }
            if !converged {
                return StepOutcome::NewtonFailed(None);
            }
            stats.rhs_evals += 1;
            let (before, after) = w.k.split_at_mut(s);
            let _ = &before;
            if !sys.rhs(t + sd.c[s] * h, &w.z, &mut after[0]) {
                return StepOutcome::NewtonFailed(None);
            }
        }
        // New solution from the stage slopes (keeps linear invariants such as the
        // total water mass to rounding), and the filtered error estimate.
        for i in 0..n {
            w.y1[i] = y[i] + h * (sd.b[0] * w.k[0][i] + sd.b[1] * w.k[1][i] + sd.b[2] * w.k[2][i]);
            w.err[i] = h * (sd.e[0] * w.k[0][i] + sd.e[1] * w.k[1][i] + sd.e[2] * w.k[2][i]);
        }
        w.lu.solve(&mut w.err);
        if !w.y1.iter().all(|v| v.is_finite()) {
            return StepOutcome::NewtonFailed(None);
        }
        let (err, limit) = err_norm(&w.err, y, &w.y1, ctl);
        if err <= 1.0 {
            StepOutcome::Accepted(err, limit)
        } else {
            StepOutcome::Rejected(err, limit)
        }
    }
}

impl Stepper for Sdirk {
    fn new(n: usize) -> Sdirk {
        let v = || vec![0.0; n];
        Sdirk {
            tab: tableau(),
            k: [v(), v(), v()],
            y1: v(),
            tmp: v(),
            err: v(),
            jac: vec![0.0; n * n],
            lu: Lu::new(n),
            lu_h: f64::NAN,
            z: v(),
            fz: v(),
            delta: v(),
            rhs_base: v(),
            slow: false,
            have_jac: false,
            jac_fresh: false,
            last_rejected: false,
        }
    }

    fn implicit(&self) -> bool {
        true
    }

    fn attempt<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        _f0: &[f64],
        ctl: &Control,
        stats: &mut Stats,
    ) -> Result<Attempt, Failure> {
        if !self.have_jac || (self.last_rejected && !self.jac_fresh) {
            if !self.jacobian(sys, t, h, y, ctl, stats) {
                return Err(Failure::NonFinite { t });
            }
            self.have_jac = true;
            self.jac_fresh = true;
        }
        match self.step(sys, t, h, y, ctl, stats) {
            StepOutcome::Accepted(err, worst) => {
                stats.implicit_steps += 1;
                self.jac_fresh = false;
                // Refresh the Jacobian every few steps, and at once
                // when Newton converged slowly with the current one.
                if stats.implicit_steps.is_multiple_of(8) || self.slow {
                    self.have_jac = false;
                }
                let factor = accepted_factor(err, -1.0 / 3.0, 5.0, self.last_rejected);
                self.last_rejected = false;
                Ok(Attempt::accepted(err, worst, factor))
            }
            StepOutcome::Rejected(err, worst) => {
                self.last_rejected = true;
                Ok(Attempt::rejected(
                    err,
                    worst,
                    proposed_factor(err, -1.0 / 3.0, 1.0),
                ))
            }
            StepOutcome::NewtonFailed(worst) => {
                self.last_rejected = true;
                // With a Jacobian from an earlier point, first retry the
                // same step with a fresh one (taken at the next attempt's
                // start); with a fresh one, halve the step.
                let factor = if self.jac_fresh { 0.5 } else { 1.0 };
                Ok(Attempt::rejected(f64::INFINITY, worst, factor))
            }
        }
    }

    fn y1(&self) -> &[f64] {
        &self.y1
    }

    fn f1(&self) -> &[f64] {
        // Stiffly accurate: the last stage's slope is f at the new point.
        &self.k[2]
    }

    fn dense<'a>(&'a self, t0: f64, h: f64, y0: &'a [f64], f0: &'a [f64]) -> Dense<'a> {
        Dense::Hermite {
            t0,
            h,
            y0,
            y1: &self.y1,
            f0,
            f1: &self.k[2],
        }
    }
}
