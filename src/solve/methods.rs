//! Time integration of one segment (between two breakpoints).
//!
//! Explicit: the Dormand–Prince 5(4) embedded Runge–Kutta pair (Dormand &
//! Prince 1980) with its 4th-order continuous extension (Hairer, Nørsett &
//! Wanner, Solving ODEs I) and the stiffness test of the same book.
//! Implicit: the three-stage, third-order, L-stable SDIRK method of
//! Alexander (1977), stiffly accurate, with an embedded second-order
//! solution for the error estimate, filtered through the iteration matrix
//! (Hairer & Wanner, Solving ODEs II) so that stiff components do not
//! inflate it. Newton iterations use a finite-difference Jacobian, norms
//! weighted like the error norm, a convergence-rate test, a Jacobian
//! refresh when convergence is slow and step halving when it fails.
//!
//! Both are written here rather than taken from a crate so that the order of
//! every floating-point operation is fixed and results are bit-identical on
//! every machine (see docs/ARCHITECTURE.md).

// Index loops mirror the formulas of the methods; iterator chains would hide them.
#![allow(clippy::needless_range_loop)]

use super::linalg::Lu;
use crate::model::Method;

/// The system being integrated.
pub trait System {
    fn dim(&self) -> usize;
    /// Derivatives at (t, y). Returns false when one is not finite.
    fn rhs(&mut self, t: f64, y: &[f64], dy: &mut [f64]) -> bool;
}

#[derive(Debug, Clone)]
pub struct Control {
    pub rtol: f64,
    /// Dimensionless absolute tolerance: component i's absolute tolerance
    /// is `atol * scale[i]`.
    pub atol: f64,
    /// Absolute scale per component. `integrate` raises it to the largest
    /// |y_i| of every accepted step, so a state that starts at zero gains an
    /// absolute tolerance as soon as it moves; pass the same `Control` to
    /// every segment of a stage so the scale carries over.
    pub scale: Vec<f64>,
    /// Components that enter the error norm.
    pub n_err: usize,
    pub max_step: f64,
    pub initial_step: Option<f64>,
    pub max_steps: u64,
    pub method: Method,
}

#[derive(Debug, Clone, Default, PartialEq)]
pub struct Stats {
    pub accepted: u64,
    pub rejected: u64,
    pub rhs_evals: u64,
    pub jacobians: u64,
    pub explicit_steps: u64,
    pub implicit_steps: u64,
    /// Time at which auto mode switched to the implicit method.
    pub switched_at: Option<f64>,
}

impl Stats {
    pub fn add(&mut self, o: &Stats) {
        self.accepted += o.accepted;
        self.rejected += o.rejected;
        self.rhs_evals += o.rhs_evals;
        self.jacobians += o.jacobians;
        self.explicit_steps += o.explicit_steps;
        self.implicit_steps += o.implicit_steps;
        if self.switched_at.is_none() {
            self.switched_at = o.switched_at;
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub enum Failure {
    /// A derivative was NaN or infinite at the accepted state at time t.
    NonFinite { t: f64 },
    /// The step size fell below what the time axis can resolve. `worst`
    /// is the component that limited the last attempt (largest weighted
    /// error or Newton increment), if one was measured; `implicit` says
    /// which method was stepping.
    StepCollapse {
        t: f64,
        h: f64,
        worst: Option<usize>,
        implicit: bool,
    },
    /// More steps than `max_steps`; `implicit` says which method was stepping.
    Budget { t: f64, implicit: bool },
}

/// An interpolant over the last accepted step.
pub enum Dense<'a> {
    Dopri {
        t0: f64,
        h: f64,
        rc: &'a [Vec<f64>; 5],
    },
    Hermite {
        t0: f64,
        h: f64,
        y0: &'a [f64],
        y1: &'a [f64],
        f0: &'a [f64],
        f1: &'a [f64],
    },
}

impl Dense<'_> {
    pub fn eval(&self, t: f64, out: &mut [f64]) {
        match self {
            Dense::Dopri { t0, h, rc } => {
                let s = (t - t0) / h;
                let s1 = 1.0 - s;
                for i in 0..out.len() {
                    out[i] = rc[0][i]
                        + s * (rc[1][i] + s1 * (rc[2][i] + s * (rc[3][i] + s1 * rc[4][i])));
                }
            }
            Dense::Hermite {
                t0,
                h,
                y0,
                y1,
                f0,
                f1,
            } => {
                let s = (t - t0) / h;
                let h00 = (1.0 + 2.0 * s) * (1.0 - s) * (1.0 - s);
                let h10 = s * (1.0 - s) * (1.0 - s);
                let h01 = s * s * (3.0 - 2.0 * s);
                let h11 = s * s * (s - 1.0);
                for i in 0..out.len() {
                    out[i] = h00 * y0[i] + h10 * h * f0[i] + h01 * y1[i] + h11 * h * f1[i];
                }
            }
        }
    }
}

/// An observer's request to stop the integration.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stop;

/// Called after every accepted step with the step's interpolant; the caller
/// emits report rows and locates events. An `Err` stops the integration.
pub trait Observer {
    fn accepted(&mut self, t0: f64, t1: f64, y1: &[f64], dense: &Dense) -> Result<(), Stop>;
}

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

/// Alexander's L-stable SDIRK3: gamma is the root of
/// x^3 - 3x^2 + 3x/2 - 1/6 = 0 in (1/6, 1/2).
const GAMMA: f64 = 0.435_866_521_508_458_97;

struct Sdirk {
    c: [f64; 3],
    a: [[f64; 3]; 3],
    b: [f64; 3],
    /// b - b_hat of the embedded second-order solution.
    e: [f64; 3],
}

fn sdirk() -> Sdirk {
    let g = GAMMA;
    let c2 = (1.0 + g) / 2.0;
    let b1 = -(6.0 * g * g - 16.0 * g + 1.0) / 4.0;
    let b2 = (6.0 * g * g - 20.0 * g + 5.0) / 4.0;
    // Embedded order 2 with b_hat3 = 0: b_hat1 + b_hat2 = 1,
    // b_hat1 g + b_hat2 c2 = 1/2.
    let bh2 = (0.5 - g) / (c2 - g);
    let bh1 = 1.0 - bh2;
    Sdirk {
        c: [g, c2, 1.0],
        a: [[g, 0.0, 0.0], [(1.0 - g) / 2.0, g, 0.0], [b1, b2, g]],
        b: [b1, b2, g],
        e: [b1 - bh1, b2 - bh2, g],
    }
}

/// Weighted RMS norm of `e`: component i is measured against
/// `atol * scale_i + rtol * max(|a_i|, |b_i|)`. Also returns the component
/// with the largest weighted value (the one that limits the step).
fn err_norm(e: &[f64], a: &[f64], b: &[f64], ctl: &Control) -> (f64, Option<usize>) {
    let mut s = 0.0;
    let mut worst = (0.0, None);
    let n = ctl.n_err;
    for i in 0..n {
        let sc = ctl.atol * ctl.scale[i] + ctl.rtol * a[i].abs().max(b[i].abs());
        let r = e[i] / sc;
        // A NaN ratio is the worst.
        if r.is_nan() || r.abs() > worst.0 {
            worst = (r.abs(), Some(i));
        }
        s += r * r;
    }
    (libm::sqrt(s / n.max(1) as f64), worst.1)
}

/// Raise each component's scale to the size it has reached.
fn grow_scale(ctl: &mut Control, y: &[f64]) {
    for (s, v) in ctl.scale.iter_mut().zip(y) {
        if v.abs() > *s {
            *s = v.abs();
        }
    }
}

/// Integrate from t0 to t1 (t1 > t0), advancing `y` in place.
pub fn integrate(
    sys: &mut dyn System,
    t0: f64,
    t1: f64,
    y: &mut [f64],
    ctl: &mut Control,
    obs: &mut dyn Observer,
    stats: &mut Stats,
) -> Result<(), Failure> {
    let n = sys.dim();
    let mut w = Work::new(n);
    let span = t1 - t0;
    let mut t = t0;
    let mut f0 = vec![0.0; n];
    stats.rhs_evals += 1;
    if !sys.rhs(t, y, &mut f0) {
        return Err(Failure::NonFinite { t });
    }
    let hmax = ctl.max_step.min(span);
    let mut h = match ctl.initial_step {
        Some(h) => h.min(hmax),
        None => initial_step(y, &f0, ctl, hmax),
    };
    let mut implicit = ctl.method == Method::Implicit;
    let mut stiff_count = 0u32;
    let mut nonstiff_count = 0u32;
    let mut jac_fresh = false;
    let mut have_jac = false;
    let mut last_rejected = false;
    // The component that limited the last measured attempt.
    let mut worst: Option<usize> = None;
    let min_h = |t: f64| 64.0 * f64::EPSILON * t.abs().max(span);
    let sd = sdirk();
    loop {
        if stats.accepted + stats.rejected >= ctl.max_steps {
            return Err(Failure::Budget { t, implicit });
        }
        let mut last = false;
        if t + h >= t1 - 1e-12 * span || t + 1.01 * h >= t1 {
            h = t1 - t;
            last = true;
        }
        if h < min_h(t) {
            return Err(Failure::StepCollapse {
                t,
                h,
                worst,
                implicit,
            });
        }
        if !implicit {
            // ---- Dormand–Prince step ----
            let ok = dopri_step(sys, t, h, y, &f0, &mut w, stats);
            let (err, limit) = if ok {
                err_norm(&w.err, y, &w.y1, ctl)
            } else {
                (f64::INFINITY, None)
            };
            // Steps can also shrink while every one is accepted (a rate
            // that grows without bound), so every attempt counts; a trial
            // that overflowed names no component and keeps the last one.
            worst = limit.or(worst);
            if err <= 1.0 {
                stats.accepted += 1;
                stats.explicit_steps += 1;
                // Stiffness test: h * |lambda| estimated from the last two stages.
                if ctl.method == Method::Auto {
                    let mut num = 0.0;
                    let mut den = 0.0;
                    for i in 0..ctl.n_err {
                        let a = w.k[6][i] - w.k[5][i];
                        let b = w.y1[i] - w.ysti[i];
                        num += a * a;
                        den += b * b;
                    }
                    if den > 0.0 && h * libm::sqrt(num / den) > 3.25 {
                        nonstiff_count = 0;
                        stiff_count += 1;
                        if stiff_count >= 15 {
                            implicit = true;
                            stats.switched_at.get_or_insert(t + h);
                        }
                    } else {
                        nonstiff_count += 1;
                        if nonstiff_count >= 6 {
                            stiff_count = 0;
                        }
                    }
                }
                for i in 0..n {
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
                let tn = if last { t1 } else { t + h };
                {
                    let dense = Dense::Dopri {
                        t0: t,
                        h,
                        rc: &w.rc,
                    };
                    obs.accepted(t, tn, &w.y1, &dense)
                        .map_err(|_| Failure::NonFinite { t: tn })?;
                }
                y.copy_from_slice(&w.y1);
                f0.copy_from_slice(&w.k[6]);
                grow_scale(ctl, y);
                t = tn;
                if last {
                    return Ok(());
                }
                let fac = if err == 0.0 {
                    10.0
                } else {
                    (0.9 * crate::numeric::pow(err, -0.2)).clamp(0.2, 10.0)
                };
                let fac = if last_rejected { fac.min(1.0) } else { fac };
                last_rejected = false;
                h = (h * fac).min(hmax);
            } else {
                stats.rejected += 1;
                last_rejected = true;
                let fac = if err.is_finite() {
                    (0.9 * crate::numeric::pow(err, -0.2)).clamp(0.2, 1.0)
                } else {
                    0.25
                };
                h *= fac;
            }
        } else {
            // ---- SDIRK step ----
            if !have_jac || (last_rejected && !jac_fresh) {
                if !jacobian(sys, t, h, y, &mut w, ctl, stats) {
                    return Err(Failure::NonFinite { t });
                }
                have_jac = true;
                jac_fresh = true;
            }
            let outcome = sdirk_step(sys, t, h, y, &mut w, ctl, &sd, stats);
            match outcome {
                StepOutcome::Accepted(err, limit) => {
                    worst = limit.or(worst);
                    stats.accepted += 1;
                    stats.implicit_steps += 1;
                    let tn = if last { t1 } else { t + h };
                    // f at the new point is the last stage derivative
                    // (stiffly accurate); keep it for the interpolant.
                    {
                        let dense = Dense::Hermite {
                            t0: t,
                            h,
                            y0: y,
                            y1: &w.y1,
                            f0: &f0,
                            f1: &w.k[2],
                        };
                        obs.accepted(t, tn, &w.y1, &dense)
                            .map_err(|_| Failure::NonFinite { t: tn })?;
                    }
                    y.copy_from_slice(&w.y1);
                    f0.copy_from_slice(&w.k[2]);
                    grow_scale(ctl, y);
                    t = tn;
                    if last {
                        return Ok(());
                    }
                    jac_fresh = false;
                    // Refresh the Jacobian every few steps, and at once
                    // when Newton converged slowly with the current one.
                    if stats.implicit_steps.is_multiple_of(8) || w.slow {
                        have_jac = false;
                    }
                    let fac = if err == 0.0 {
                        5.0
                    } else {
                        (0.9 * crate::numeric::pow(err, -1.0 / 3.0)).clamp(0.2, 5.0)
                    };
                    let fac = if last_rejected { fac.min(1.0) } else { fac };
                    last_rejected = false;
                    h = (h * fac).min(hmax);
                }
                StepOutcome::Rejected(err, limit) => {
                    stats.rejected += 1;
                    last_rejected = true;
                    worst = limit.or(worst);
                    h *= (0.9 * crate::numeric::pow(err, -1.0 / 3.0)).clamp(0.2, 1.0);
                }
                StepOutcome::NewtonFailed(limit) => {
                    stats.rejected += 1;
                    last_rejected = true;
                    worst = limit.or(worst);
                    // With a Jacobian from an earlier point, first retry
                    // the same step with a fresh one (taken at the loop's
                    // top); with a fresh one, halve the step.
                    if jac_fresh {
                        h *= 0.5;
                    }
                }
            }
        }
    }
}

struct Work {
    k: [Vec<f64>; 7],
    y1: Vec<f64>,
    ysti: Vec<f64>,
    tmp: Vec<f64>,
    err: Vec<f64>,
    rc: [Vec<f64>; 5],
    jac: Vec<f64>,
    lu: Lu,
    lu_h: f64,
    z: Vec<f64>,
    fz: Vec<f64>,
    delta: Vec<f64>,
    rhs_base: Vec<f64>,
    /// The last Newton iteration converged slowly: refresh the Jacobian.
    slow: bool,
}

impl Work {
    fn new(n: usize) -> Work {
        let v = || vec![0.0; n];
        Work {
            k: [v(), v(), v(), v(), v(), v(), v()],
            y1: v(),
            ysti: v(),
            tmp: v(),
            err: v(),
            rc: [v(), v(), v(), v(), v()],
            jac: vec![0.0; n * n],
            lu: Lu::new(n),
            lu_h: f64::NAN,
            z: v(),
            fz: v(),
            delta: v(),
            rhs_base: v(),
            slow: false,
        }
    }
}

fn initial_step(y: &[f64], f: &[f64], ctl: &Control, hmax: f64) -> f64 {
    let mut dn = 0.0;
    let mut fnorm = 0.0;
    for i in 0..ctl.n_err {
        let sc = ctl.atol * ctl.scale[i] + ctl.rtol * y[i].abs();
        let a = y[i] / sc;
        dn += a * a;
        let b = f[i] / sc;
        fnorm += b * b;
    }
    let h = if dn < 1e-10 || fnorm < 1e-10 {
        1e-6 * hmax
    } else {
        0.01 * libm::sqrt(dn / fnorm)
    };
    h.min(hmax).max(1e-9 * hmax)
}

fn dopri_step(
    sys: &mut dyn System,
    t: f64,
    h: f64,
    y: &[f64],
    f0: &[f64],
    w: &mut Work,
    stats: &mut Stats,
) -> bool {
    let n = y.len();
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
fn jacobian(
    sys: &mut dyn System,
    t: f64,
    h: f64,
    y: &[f64],
    w: &mut Work,
    ctl: &Control,
    stats: &mut Stats,
) -> bool {
    let n = y.len();
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
        let d = w.z[c] - keep;
        stats.rhs_evals += 1;
        if !sys.rhs(t, &w.z, &mut w.fz) {
            w.z[c] = keep - delta;
            let d2 = w.z[c] - keep;
            stats.rhs_evals += 1;
            if !sys.rhs(t, &w.z, &mut w.fz) {
                return false;
            }
            for r in 0..n {
                w.jac[r * n + c] = (w.fz[r] - f0[r]) / d2;
            }
            w.z[c] = keep;
            continue;
        }
        for r in 0..n {
            w.jac[r * n + c] = (w.fz[r] - f0[r]) / d;
        }
        w.z[c] = keep;
    }
    w.lu_h = f64::NAN;
    true
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

#[allow(clippy::too_many_arguments)]
fn sdirk_step(
    sys: &mut dyn System,
    t: f64,
    h: f64,
    y: &[f64],
    w: &mut Work,
    ctl: &Control,
    sd: &Sdirk,
    stats: &mut Stats,
) -> StepOutcome {
    let n = y.len();
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

#[cfg(test)]
mod tests {
    use super::*;

    struct Decay(f64);
    impl System for Decay {
        fn dim(&self) -> usize {
            1
        }
        fn rhs(&mut self, _t: f64, y: &[f64], dy: &mut [f64]) -> bool {
            dy[0] = -self.0 * y[0];
            true
        }
    }

    struct Rows(Vec<(f64, f64)>, Vec<f64>);
    impl Observer for Rows {
        fn accepted(&mut self, _t0: f64, t1: f64, _y1: &[f64], dense: &Dense) -> Result<(), Stop> {
            let mut out = [0.0];
            while let Some(&t) = self.1.first() {
                if t > t1 {
                    break;
                }
                dense.eval(t, &mut out);
                self.0.push((t, out[0]));
                self.1.remove(0);
            }
            Ok(())
        }
    }

    fn ctl(method: Method) -> Control {
        Control {
            rtol: 1e-10,
            atol: 1e-14,
            scale: vec![1.0],
            n_err: 1,
            max_step: f64::INFINITY,
            initial_step: None,
            max_steps: 100_000,
            method,
        }
    }

    #[test]
    fn both_methods_match_exponential_decay_with_dense_output() {
        for m in [Method::Explicit, Method::Implicit] {
            let mut y = [1.0];
            let mut stats = Stats::default();
            let mut rows = Rows(Vec::new(), (1..=10).map(|k| k as f64 * 0.5).collect());
            integrate(
                &mut Decay(0.7),
                0.0,
                5.0,
                &mut y,
                &mut ctl(m),
                &mut rows,
                &mut stats,
            )
            .unwrap();
            let exact = (-0.7f64 * 5.0).exp();
            assert!((y[0] - exact).abs() < 1e-8, "{m:?}: {} vs {exact}", y[0]);
            assert_eq!(rows.0.len(), 10);
            for (t, v) in rows.0 {
                let e = (-0.7 * t).exp();
                assert!((v - e).abs() < 1e-7, "{m:?} at {t}: {v} vs {e}");
            }
        }
    }

    #[test]
    fn a_component_that_starts_at_zero_gains_the_scale_it_reaches() {
        // (c, s) = (cos t, -sin t): s starts at zero and swings to 1.
        struct Circle;
        impl System for Circle {
            fn dim(&self) -> usize {
                2
            }
            fn rhs(&mut self, _t: f64, y: &[f64], dy: &mut [f64]) -> bool {
                dy[0] = y[1];
                dy[1] = -y[0];
                true
            }
        }
        for m in [Method::Explicit, Method::Implicit] {
            let mut c = ctl(m);
            c.rtol = 1e-8;
            c.scale = vec![1.0, 1e-300];
            c.n_err = 2;
            let mut y = [1.0, 0.0];
            let mut stats = Stats::default();
            let mut rows = Rows(Vec::new(), Vec::new());
            integrate(&mut Circle, 0.0, 2.0, &mut y, &mut c, &mut rows, &mut stats).unwrap();
            // The largest |sin| on [0, 2] is 1, at pi / 2; the scale follows
            // the ends of accepted steps, which come near it.
            assert!(
                c.scale[1] > 0.99 && c.scale[1] <= 1.0,
                "{m:?}: {:?}",
                c.scale
            );
            assert_eq!(c.scale[0], 1.0, "{m:?}");
        }
    }

    #[test]
    fn implicit_method_takes_few_steps_on_a_stiff_relaxation() {
        // y' = -1e6 (y - cos t): explicit needs ~1e6 steps, L-stable few.
        struct Stiff;
        impl System for Stiff {
            fn dim(&self) -> usize {
                1
            }
            fn rhs(&mut self, t: f64, y: &[f64], dy: &mut [f64]) -> bool {
                dy[0] = -1e6 * (y[0] - t.cos());
                true
            }
        }
        let mut y = [1.0];
        let mut stats = Stats::default();
        let mut c = ctl(Method::Auto);
        c.rtol = 1e-6;
        c.atol = 1e-9;
        let mut rows = Rows(Vec::new(), Vec::new());
        integrate(&mut Stiff, 0.0, 10.0, &mut y, &mut c, &mut rows, &mut stats).unwrap();
        assert!(stats.switched_at.is_some(), "auto mode should switch");
        assert!(stats.accepted < 5000, "{stats:?}");
        assert!((y[0] - 10f64.cos()).abs() < 1e-5, "{}", y[0]);
    }
}
