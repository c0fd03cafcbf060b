//! Time integration of one segment (between two breakpoints): the
//! interface every method implements, the loop that drives a method over a
//! segment, and the registry of methods.
//!
//! A method is a [`Stepper`] in a file of its own: `dopri.rs` (explicit),
//! `sdirk.rs` (implicit) and `auto.rs` (explicit until the problem proves
//! stiff, then implicit; it holds one of each). The loop in [`integrate`]
//! owns what is common to all: the step budget, landing on the segment's
//! end, the smallest step, the observer, the tolerance scales. It is generic
//! over the method and the right-hand side, so each pair is compiled on its
//! own and no call in the loop goes through a vtable.
//!
//! Methods are written here rather than taken from a crate so that the order
//! of every floating-point operation is fixed and results are bit-identical
//! on every machine (see docs/ARCHITECTURE.md).

// Index loops mirror the formulas of the methods; iterator chains would hide them.
#![allow(clippy::needless_range_loop)]

mod auto;
mod dopri;
mod sdirk;

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

/// Which methods took the steps counted in a [`Stats`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum MethodUse {
    Explicit,
    Implicit,
    /// Explicit, then implicit from time `at` (the first switch of `auto`).
    Switched {
        at: f64,
    },
}

impl Stats {
    /// Which methods took the steps.
    pub fn method_use(&self) -> MethodUse {
        match (
            self.explicit_steps > 0,
            self.implicit_steps > 0,
            self.switched_at,
        ) {
            (true, true, Some(at)) => MethodUse::Switched { at },
            (_, true, _) => MethodUse::Implicit,
            _ => MethodUse::Explicit,
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

/// One integration method over one segment. A stepper is made fresh at the
/// start of every segment (`new`), so it keeps no state across breakpoints.
pub trait Stepper {
    /// A stepper for a system of `n` components.
    fn new(n: usize) -> Self
    where
        Self: Sized;
    /// Whether the next attempt steps implicitly (failure messages say so).
    fn implicit(&self) -> bool;
    /// Attempt one step of size `h` from (t, y), where `f0` is f(t, y).
    /// `Err` only for a failure the loop cannot recover from by a smaller
    /// step. On acceptance the stepper counts its own kind of step in
    /// `stats` (`explicit_steps`, `implicit_steps`); the loop counts
    /// attempts (`accepted`, `rejected`). Every floating-point operation in a
    /// fixed order, with `err_norm` for the error.
    #[allow(clippy::too_many_arguments)]
    fn attempt<S: System + ?Sized>(
        &mut self,
        sys: &mut S,
        t: f64,
        h: f64,
        y: &[f64],
        f0: &[f64],
        ctl: &Control,
        stats: &mut Stats,
    ) -> Result<Attempt, Failure>;
    /// The solution at the end of the last accepted step.
    fn y1(&self) -> &[f64];
    /// The derivative there (the next step's `f0`).
    fn f1(&self) -> &[f64];
    /// The interpolant over the last accepted step, which went from
    /// (t0, y0) with slope f0 over h.
    fn dense<'a>(&'a self, t0: f64, h: f64, y0: &'a [f64], f0: &'a [f64]) -> Dense<'a>;
}

/// The outcome of one attempted step.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Attempt {
    pub accepted: bool,
    /// The weighted error norm (1 is the tolerance); infinite when the
    /// attempt produced no estimate (a non-finite trial, Newton failing).
    pub err: f64,
    /// The component that limited the attempt, if one was measured.
    pub worst: Option<usize>,
    /// The next step size over this one: after an accepted step the loop
    /// caps the product at the largest step.
    pub factor: f64,
}

impl Attempt {
    /// An accepted step with its error norm and the next step's ratio.
    fn accepted(err: f64, worst: Option<usize>, factor: f64) -> Attempt {
        Attempt {
            accepted: true,
            err,
            worst,
            factor,
        }
    }

    /// A rejected attempt, to be retried with `factor` times the step.
    fn rejected(err: f64, worst: Option<usize>, factor: f64) -> Attempt {
        Attempt {
            accepted: false,
            err,
            worst,
            factor,
        }
    }
}

/// The step-size ratio the embedded methods' controller proposes from an
/// error norm: 0.9 err^exponent (the exponent is -1/(order + 1) of the
/// error estimate), kept within [0.2, max].
fn proposed_factor(err: f64, exponent: f64, max: f64) -> f64 {
    (0.9 * crate::numeric::pow(err, exponent)).clamp(0.2, max)
}

/// The ratio after an accepted step: `max` for an error of zero, and no
/// growth right after a rejection (the controller has just been wrong).
fn accepted_factor(err: f64, exponent: f64, max: f64, after_rejection: bool) -> f64 {
    let factor = if err == 0.0 {
        max
    } else {
        proposed_factor(err, exponent, max)
    };
    if after_rejection {
        factor.min(1.0)
    } else {
        factor
    }
}

/// A registered method: its word in `solver method = WORD` and the few
/// words the H0411 help gives it (empty for none).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MethodInfo {
    pub name: &'static str,
    pub about: &'static str,
}

/// The registry: one line per method. It gives the checker its list of
/// names (`METHODS`) and the loop its stepper (`dispatch`), so a new method
/// is its file plus a line here.
macro_rules! registry {
    ($($name:literal => $stepper:ty, $about:literal;)+) => {
        /// Every method `solver method = ...` accepts, in the order the
        /// help lists them.
        pub const METHODS: &[MethodInfo] = &[$(MethodInfo { name: $name, about: $about }),+];

        fn dispatch<S: System + ?Sized, O: Observer + ?Sized>(
            sys: &mut S,
            t0: f64,
            t1: f64,
            y: &mut [f64],
            ctl: &mut Control,
            obs: &mut O,
            stats: &mut Stats,
        ) -> Result<(), Failure> {
            match ctl.method.name() {
                $($name => drive::<$stepper, S, O>(sys, t0, t1, y, ctl, obs, stats),)+
                // `Method` values come only from `lookup` and `Method::AUTO`
                // (see `every_method_a_model_can_hold_is_registered`).
                other => unreachable!("method `{other}` is not registered"),
            }
        }
    };
}

registry! {
    "auto" => auto::Auto, "";
    "explicit" => dopri::Dopri, "adaptive Runge-Kutta";
    "implicit" => sdirk::Sdirk, "for stiff stages";
}

/// The method registered under `word`.
pub fn lookup(word: &str) -> Option<Method> {
    METHODS
        .iter()
        .find(|m| m.name == word)
        .map(|m| Method::registered(m.name))
}

/// The registered methods as the H0411 help lists them:
/// "`a`, `b` (about b) or `c`".
pub fn choices() -> String {
    let items: Vec<String> = METHODS
        .iter()
        .map(|m| {
            if m.about.is_empty() {
                format!("`{}`", m.name)
            } else {
                format!("`{}` ({})", m.name, m.about)
            }
        })
        .collect();
    match items.split_last() {
        Some((last, rest)) if !rest.is_empty() => format!("{} or {last}", rest.join(", ")),
        Some((last, _)) => last.clone(),
        None => String::new(),
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

/// Integrate from t0 to t1 (t1 > t0) with `ctl.method`, advancing `y` in place.
pub fn integrate<S: System + ?Sized, O: Observer + ?Sized>(
    sys: &mut S,
    t0: f64,
    t1: f64,
    y: &mut [f64],
    ctl: &mut Control,
    obs: &mut O,
    stats: &mut Stats,
) -> Result<(), Failure> {
    dispatch(sys, t0, t1, y, ctl, obs, stats)
}

/// The loop of one segment, common to every method.
fn drive<M: Stepper, S: System + ?Sized, O: Observer + ?Sized>(
    sys: &mut S,
    t0: f64,
    t1: f64,
    y: &mut [f64],
    ctl: &mut Control,
    obs: &mut O,
    stats: &mut Stats,
) -> Result<(), Failure> {
    let n = sys.dim();
    let mut stepper = M::new(n);
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
    // The component that limited the last measured attempt. Steps can
    // also shrink while every one is accepted (a rate that grows without
    // bound), so every attempt counts; one that measured nothing keeps it.
    let mut worst: Option<usize> = None;
    let min_h = |t: f64| 64.0 * f64::EPSILON * t.abs().max(span);
    loop {
        if stats.accepted + stats.rejected >= ctl.max_steps {
            return Err(Failure::Budget {
                t,
                implicit: stepper.implicit(),
            });
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
                implicit: stepper.implicit(),
            });
        }
        let a = stepper.attempt(sys, t, h, y, &f0, ctl, stats)?;
        worst = a.worst.or(worst);
        if !a.accepted {
            stats.rejected += 1;
            h *= a.factor;
            continue;
        }
        stats.accepted += 1;
        let tn = if last { t1 } else { t + h };
        {
            let dense = stepper.dense(t, h, y, &f0);
            obs.accepted(t, tn, stepper.y1(), &dense)
                .map_err(|_| Failure::NonFinite { t: tn })?;
        }
        y.copy_from_slice(stepper.y1());
        f0.copy_from_slice(stepper.f1());
        grow_scale(ctl, y);
        t = tn;
        if last {
            return Ok(());
        }
        h = (h * a.factor).min(hmax);
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_controller_grows_to_its_limit_at_zero_error_but_not_after_a_rejection() {
        assert_eq!(accepted_factor(0.0, -0.2, 10.0, false), 10.0);
        assert_eq!(accepted_factor(0.0, -1.0 / 3.0, 5.0, true), 1.0);
        assert_eq!(accepted_factor(1e-30, -0.2, 5.0, false), 5.0);
        assert_eq!(accepted_factor(0.01, -0.2, 10.0, true), 1.0);
        assert_eq!(proposed_factor(1e9, -0.2, 1.0), 0.2);
        // The same operations in the same order as the formula.
        let f = accepted_factor(0.5, -0.2, 10.0, false);
        assert_eq!(
            f.to_bits(),
            (0.9 * crate::numeric::pow(0.5, -0.2)).to_bits()
        );
        let r = Attempt::rejected(2.0, Some(1), proposed_factor(2.0, -0.2, 1.0));
        assert!(!r.accepted && r.factor < 1.0 && r.worst == Some(1));
        assert!(Attempt::accepted(0.5, None, f).accepted);
    }

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
    fn every_method_a_model_can_hold_is_registered() {
        // `dispatch` relies on it: a `Method` comes from `lookup` or is the default.
        for m in METHODS {
            assert_eq!(lookup(m.name).map(Method::name), Some(m.name));
        }
        assert_eq!(lookup(Method::AUTO.name()), Some(Method::AUTO));
        assert_eq!(lookup("fastest"), None);
        assert_eq!(lookup("Auto"), None);
    }

    #[test]
    fn methods_print_as_the_stage_fingerprint_has_always_held_them() {
        // The stage fingerprint (and so the cache keys and the committed
        // manifests) holds `format!("{:?}")` of the solver settings.
        let words: Vec<String> = METHODS
            .iter()
            .map(|m| format!("{:?}", lookup(m.name).unwrap()))
            .collect();
        assert_eq!(words, ["Auto", "Explicit", "Implicit"]);
        assert!(format!("{:?}", crate::model::SolverSettings::default()).contains("method: Auto,"));
    }

    #[test]
    fn the_help_lists_the_registered_methods() {
        assert_eq!(
            choices(),
            "`auto`, `explicit` (adaptive Runge-Kutta) or `implicit` (for stiff stages)"
        );
    }

    #[test]
    fn each_method_counts_its_own_steps_and_auto_records_its_switch() {
        // y' = -1e4 y over 1: stiff for the explicit method within a few
        // steps, so `auto` switches; the forced methods never do.
        let mut c = ctl(Method::AUTO);
        c.rtol = 1e-6;
        for (word, explicit, implicit, switched) in [
            ("explicit", true, false, false),
            ("implicit", false, true, false),
            ("auto", true, true, true),
        ] {
            let mut c = c.clone();
            c.method = lookup(word).unwrap();
            let mut y = [1.0];
            let mut stats = Stats::default();
            let mut rows = Rows(Vec::new(), Vec::new());
            integrate(
                &mut Decay(1e4),
                0.0,
                1.0,
                &mut y,
                &mut c,
                &mut rows,
                &mut stats,
            )
            .unwrap();
            assert_eq!(
                (stats.explicit_steps > 0, stats.implicit_steps > 0),
                (explicit, implicit),
                "{word}: {stats:?}"
            );
            assert_eq!(stats.explicit_steps + stats.implicit_steps, stats.accepted);
            assert_eq!(stats.switched_at.is_some(), switched, "{word}: {stats:?}");
            let expect = match (word, stats.switched_at) {
                ("explicit", _) => MethodUse::Explicit,
                ("implicit", _) => MethodUse::Implicit,
                (_, at) => MethodUse::Switched { at: at.unwrap() },
            };
            assert_eq!(stats.method_use(), expect);
        }
    }

    #[test]
    fn both_methods_match_exponential_decay_with_dense_output() {
        for m in [lookup("explicit").unwrap(), lookup("implicit").unwrap()] {
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
        for m in [lookup("explicit").unwrap(), lookup("implicit").unwrap()] {
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
        let mut c = ctl(Method::AUTO);
        c.rtol = 1e-6;
        c.atol = 1e-9;
        let mut rows = Rows(Vec::new(), Vec::new());
        integrate(&mut Stiff, 0.0, 10.0, &mut y, &mut c, &mut rows, &mut stats).unwrap();
        assert!(stats.switched_at.is_some(), "auto mode should switch");
        assert!(stats.accepted < 5000, "{stats:?}");
        assert!((y[0] - 10f64.cos()).abs() < 1e-5, "{}", y[0]);
    }
}
