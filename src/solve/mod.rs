//! Phase 5, solve: integrate a compiled model stage by stage.
//!
//! Invariant: the integrators see numbers and slots only; names appear only
//! when a failure is worded as a diagnostic, through the model's side tables.

pub mod linalg;
pub mod methods;

use std::time::{Duration, Instant};

use crate::cancel;
use crate::compile::{self, Program, Regs, Wants};
use crate::diagnostic::Problem;
use crate::model::{DefId, DefKind, Endpoint, Method, Model};
use methods::{Control, Dense, Failure, Observer, Stats, Stop, System};

/// Version of the numeric engine: bump whenever a change to compile or
/// solve can change any result bit, so cached stages are not reused.
/// 2: exp and pow from `numeric::elementary` instead of `libm`.
/// 3: fluxes summed in the order of their names, not of their declarations.
/// 4: per-component absolute scales (a state at zero measured in its unit,
/// scales growing to the largest size reached); Newton with weighted norms,
/// a convergence-rate test, a fresh f for the Jacobian and step halving.
pub const ENGINE_VERSION: u32 = 4;

/// The state carried between stages: every reservoir and state component,
/// then the ledger of water delivered from outside and lost to outside.
#[derive(Debug, Clone, PartialEq)]
pub struct State(pub Vec<f64>);

impl State {
    pub fn to_bytes(&self) -> Vec<u8> {
        self.0.iter().flat_map(|v| v.to_le_bytes()).collect()
    }
}

/// Report rows, flat: each row is its age, then the state at that age
/// (`width` values in all). One buffer rather than a vector per row: a
/// vector per row cost about 40 bytes of bookkeeping beside the row's own
/// values.
#[derive(Debug, Clone, PartialEq)]
pub struct Rows {
    /// At least 1.
    width: usize,
    data: Vec<f64>,
}

impl Default for Rows {
    fn default() -> Rows {
        Rows::new(1)
    }
}

impl Rows {
    /// No rows, each of `width` values (the age and the state).
    pub fn new(width: usize) -> Rows {
        Rows {
            width: width.max(1),
            data: Vec::new(),
        }
    }

    /// Room for `rows` rows, or the H0607 error when memory cannot hold
    /// them (an allocation failure is a diagnostic, never an abort).
    pub fn try_reserve(&mut self, rows: usize) -> Result<(), Problem> {
        let values = rows.saturating_mul(self.width);
        self.data
            .try_reserve_exact(values)
            .map_err(|_| out_of_memory("report rows", values.saturating_mul(8)))
    }

    pub fn push(&mut self, age: f64, y: &[f64]) {
        debug_assert_eq!(y.len() + 1, self.width);
        self.data.push(age);
        self.data.extend_from_slice(y);
    }

    /// Values per row: the age and the state.
    pub fn width(&self) -> usize {
        self.width
    }

    pub fn len(&self) -> usize {
        self.data.len() / self.width
    }

    pub fn is_empty(&self) -> bool {
        self.data.is_empty()
    }

    /// The rows as (age, state).
    pub fn iter(&self) -> impl Iterator<Item = (f64, &[f64])> {
        self.data.chunks_exact(self.width).map(|r| (r[0], &r[1..]))
    }

    /// Every value, row after row.
    pub fn values(&self) -> &[f64] {
        &self.data
    }

    /// Rows from values laid out as [`Rows::values`] gives them.
    pub fn from_values(width: usize, data: Vec<f64>) -> Option<Rows> {
        (width > 0 && data.len().is_multiple_of(width)).then_some(Rows { width, data })
    }
}

/// The H0607 error: `what` needed `bytes` more than memory could give.
pub fn out_of_memory(what: &str, bytes: usize) -> Problem {
    Problem::error(
        "H0607",
        format!(
            "not enough memory for the {what}: {} MiB could not be allocated",
            bytes.div_ceil(1 << 20)
        ),
    )
    .help("choose a coarser `report every`, or free memory for the run")
}

/// One segment of a stage (the stretch between two breakpoints, which the
/// integrator starts afresh): its ages and which methods took its steps.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Segment {
    pub from_age: f64,
    pub to_age: f64,
    pub explicit_steps: u64,
    pub implicit_steps: u64,
    /// The age at which `auto` switched to the implicit method, if it did.
    pub switch_age: Option<f64>,
}

/// The outcome of one stage.
#[derive(Debug, Clone)]
pub struct StageRun {
    pub stage: usize,
    /// Report rows produced by this stage.
    pub rows: Rows,
    /// States at the ages of expectations that fall in this stage.
    pub probes: Vec<(f64, Vec<f64>)>,
    pub end: State,
    /// Steps, rejections, evaluations and which methods took the steps
    /// (`Stats::method_use`); the words for them are made where they are
    /// shown (`report::method_text`).
    pub stats: Stats,
    /// Per segment, in order, which methods took its steps.
    pub segments: Vec<Segment>,
    /// |total(end) - total(start)| / total(start) with the ledger included.
    pub closure_error: f64,
    /// First age at which each event (by index into `Run::event_defs`)
    /// became true within this stage, if it did.
    pub events: Vec<Option<f64>>,
    pub wall: Duration,
}

impl StageRun {
    /// A copy of everything but the report rows (which are most of its
    /// memory), for runs that share a stage without copying its rows.
    pub fn without_rows(&self) -> StageRun {
        StageRun {
            stage: self.stage,
            rows: Rows::new(self.rows.width()),
            probes: self.probes.clone(),
            end: self.end.clone(),
            stats: self.stats.clone(),
            segments: self.segments.clone(),
            closure_error: self.closure_error,
            events: self.events.clone(),
            wall: self.wall,
        }
    }
}

/// The whole run.
#[derive(Debug, Clone)]
pub struct Run {
    pub stages: Vec<StageRun>,
    pub event_defs: Vec<DefId>,
    /// First age of each event over the whole run.
    pub events: Vec<Option<f64>>,
}

/// The ages at which rows are reported: from the span start every cadence,
/// and the span end.
pub fn report_ages(model: &Model) -> Vec<f64> {
    let mut ages = Vec::new();
    let span = model.start_age - model.end_age;
    let n = (span / model.cadence).floor() as u64;
    for k in 0..=n {
        let a = model.start_age - k as f64 * model.cadence;
        if a < model.end_age + 1e-9 * model.cadence {
            break;
        }
        ages.push(a);
    }
    if ages
        .last()
        .is_none_or(|&a| a - model.end_age > 1e-9 * model.cadence)
    {
        ages.push(model.end_age);
    }
    ages
}

/// The ages at which expectations look at the state, oldest first.
pub fn probe_ages(model: &Model) -> Vec<f64> {
    use crate::model::ExpectCheck;
    let mut ages: Vec<f64> = model
        .expects
        .iter()
        .filter_map(|e| match e.check {
            ExpectCheck::Target { age, .. }
            | ExpectCheck::Range { age, .. }
            | ExpectCheck::Bound { age, .. } => Some(age),
            ExpectCheck::Event { .. } => None,
        })
        .filter(|&a| a <= model.start_age && a >= model.end_age)
        .collect();
    ages.sort_by(|a, b| b.total_cmp(a));
    ages.dedup();
    ages
}

/// Rows of stage `s`: ages in [end, start], excluding ones an earlier stage
/// produced (its end age).
pub fn stage_rows(model: &Model, s: usize, ages: &[f64]) -> Vec<f64> {
    let st = &model.stages[s];
    ages.iter()
        .copied()
        .filter(|&a| a <= st.start_age && a >= st.end_age && (s == 0 || a < st.start_age))
        .collect()
}

/// The initial state of the run (ledger at zero).
pub fn initial_state(model: &Model) -> State {
    let mut y = compile::initial_state(model);
    y.push(0.0);
    y.push(0.0);
    State(y)
}

/// A compiled stage program as an ODE system for the integrators.
pub struct Sys<'p> {
    prog: &'p Program,
    regs: Regs,
    start_age: f64,
}

impl<'p> Sys<'p> {
    pub fn new(model: &Model, prog: &'p Program) -> Sys<'p> {
        Sys::with_params(model, prog, &[])
    }

    pub fn with_params(model: &Model, prog: &'p Program, params: &[(DefId, f64)]) -> Sys<'p> {
        Sys {
            prog,
            regs: prog.regs_with(params),
            start_age: model.start_age,
        }
    }
}

impl System for Sys<'_> {
    fn dim(&self) -> usize {
        self.prog.n_state + 2
    }
    #[inline]
    fn rhs(&mut self, t: f64, y: &[f64], dy: &mut [f64]) -> bool {
        self.prog.rhs(&mut self.regs, t, self.start_age - t, y, dy);
        dy.iter().all(|v| v.is_finite())
    }
}

struct Obs<'a> {
    start_age: f64,
    rows: Vec<f64>,
    next_row: usize,
    out: Rows,
    probe_ages: Vec<f64>,
    next_probe: usize,
    probes: Vec<(f64, Vec<f64>)>,
    scratch: Vec<f64>,
    n_res: usize,
    /// Smallest value a reservoir may take before it counts as negative.
    floor: f64,
    negative: Option<(usize, f64, f64)>,
    events: Option<EventWatch<'a>>,
    /// Set when the integration stopped because a stop was requested.
    interrupted: bool,
}

/// Event conditions watched over a stage: their program, registers, the
/// value at the last accepted step, and the first age each became true.
struct EventWatch<'a> {
    prog: &'a Program,
    regs: Regs,
    prev: Vec<f64>,
    first: Vec<Option<f64>>,
}

/// One accepted step, for capturing states at given ages inside it.
struct Step<'a, 'd> {
    start_age: f64,
    t0: f64,
    t1: f64,
    y1: &'a [f64],
    dense: &'a Dense<'d>,
}

impl Step<'_, '_> {
    /// Hand `out` the state at each age of `ages[*next..]` that this step
    /// reaches: the step's end state exactly at its end, the interpolant
    /// inside it. `Err` when a stop was requested (looked at every
    /// [`cancel::ROWS_PER_CHECK`] rows: one step may span millions of rows).
    fn capture(
        &self,
        ages: &[f64],
        next: &mut usize,
        scratch: &mut [f64],
        mut out: impl FnMut(f64, &[f64]),
    ) -> Result<(), Stop> {
        while let Some(&age) = ages.get(*next) {
            let t = self.start_age - age;
            if t > self.t1 + 1e-9 * (self.t1 - self.t0).abs() {
                break;
            }
            if (t - self.t1).abs() <= 1e-12 * self.t1.abs().max(1.0) {
                out(age, self.y1);
            } else {
                self.dense.eval(t, scratch);
                out(age, scratch);
            }
            *next += 1;
            if (*next).is_multiple_of(cancel::ROWS_PER_CHECK) && cancel::requested() {
                return Err(Stop);
            }
        }
        Ok(())
    }
}

impl Observer for Obs<'_> {
    fn accepted(&mut self, t0: f64, t1: f64, y1: &[f64], dense: &Dense) -> Result<(), Stop> {
        if cancel::requested() {
            self.interrupted = true;
            return Err(Stop);
        }
        let step = Step {
            start_age: self.start_age,
            t0,
            t1,
            y1,
            dense,
        };
        let probes = &mut self.probes;
        let captured = step
            .capture(
                &self.probe_ages,
                &mut self.next_probe,
                &mut self.scratch,
                |age, y| probes.push((age, y.to_vec())),
            )
            .and_then(|()| {
                let out = &mut self.out;
                step.capture(
                    &self.rows,
                    &mut self.next_row,
                    &mut self.scratch,
                    |age, y| out.push(age, y),
                )
            });
        if captured.is_err() {
            self.interrupted = true;
            return Err(Stop);
        }
        if let Some(i) = y1[..self.n_res].iter().position(|&v| v < self.floor) {
            // Locate where it crossed zero on the interpolant.
            let scratch = &mut self.scratch;
            let hi = bisect(t0, t1, |mid| {
                dense.eval(mid, scratch);
                scratch[i] < 0.0
            });
            self.negative = Some((i, self.start_age - hi, y1[i]));
            return Err(Stop);
        }
        if let Some(EventWatch {
            prog,
            regs,
            prev,
            first,
        }) = &mut self.events
        {
            prog.eval(regs, y1, t1, self.start_age - t1);
            for (k, &(_, reg)) in prog.observed.iter().enumerate() {
                let now = regs.0[reg as usize];
                if first[k].is_none() && prev[k] == 0.0 && now != 0.0 {
                    // Locate the flip by bisection on the interpolant.
                    let (scratch, start_age) = (&mut self.scratch, self.start_age);
                    let hi = bisect(t0, t1, |mid| {
                        dense.eval(mid, scratch);
                        prog.eval(regs, scratch, mid, start_age - mid);
                        regs.0[reg as usize] != 0.0
                    });
                    first[k] = Some(self.start_age - hi);
                    prog.eval(regs, y1, t1, self.start_age - t1);
                }
                prev[k] = regs.0[reg as usize];
            }
        }
        Ok(())
    }
}

/// Where on [t0, t1] a condition that holds at t1 but not at t0 starts to
/// hold: bisection until the interval cannot shrink (at most 60 halvings),
/// returning its upper end, the first time known to satisfy `past(t)`.
fn bisect(t0: f64, t1: f64, mut past: impl FnMut(f64) -> bool) -> f64 {
    let (mut lo, mut hi) = (t0, t1);
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        if past(mid) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    hi
}

/// An age as messages and reports write it: Ga to four places, or Ma
/// below 10 Ma.
pub fn ga(age: f64) -> String {
    let g = age / 1e9;
    if g.abs() >= 0.01 || g == 0.0 {
        format!("{g:.4} Ga")
    } else {
        format!("{:.4} Ma", age / 1e6)
    }
}

/// Every event definition, by name.
pub fn event_defs(model: &Model) -> Vec<DefId> {
    compile::by_name(model, |k| matches!(k, DefKind::Event))
}

/// The relative closure error from inventories divided by the largest of
/// them, so that the sums cannot overflow.
fn scaled_closure(model: &Model, y0: &[f64], y1: &[f64]) -> f64 {
    let n_res = model.reservoirs().count();
    let n = y0.len();
    let parts = |y: &[f64]| {
        let mut v: Vec<f64> = y[..n_res].to_vec();
        v.push(y[n - 1]);
        v.push(-y[n - 2]);
        v
    };
    let (a, b) = (parts(y0), parts(y1));
    let m = a.iter().chain(&b).fold(0.0f64, |m, v| m.max(v.abs()));
    if m == 0.0 || !m.is_finite() {
        return f64::INFINITY;
    }
    let t0: f64 = a.iter().map(|v| v / m).sum();
    let t1: f64 = b.iter().map(|v| v / m).sum();
    if t0 == 0.0 {
        return f64::INFINITY;
    }
    (t1 - t0).abs() / t0.abs()
}

/// Total water: reservoirs plus what left minus what arrived.
fn water_total(model: &Model, y: &[f64]) -> f64 {
    let n_res = model.reservoirs().count();
    let n = y.len();
    y[..n_res].iter().sum::<f64>() + y[n - 1] - y[n - 2]
}

/// The integrator settings of stage `s` starting from `start`. Absolute
/// tolerances are `atol` times a scale per component: the total water at
/// the stage start for reservoirs and the ledger (so a reservoir that starts
/// empty is measured against the water it can receive); for a state, its
/// size at the stage start or, when that is exactly zero, the unit its
/// start value is written in (`state crust = 0 km`: 1 km; 1 in internal
/// units without one), so that it has an absolute tolerance from the first
/// step. The integrator then raises every scale to the largest size the
/// component reaches in the stage.
pub fn stage_control(model: &Model, s: usize, start: &State) -> Control {
    let st = &model.stages[s];
    let n = start.0.len();
    let n_state = n - 2;
    let n_res = model.reservoirs().count();
    let order = compile::state_order(model);
    let mass_scale = start.0[..n_res]
        .iter()
        .map(|v| v.abs())
        .sum::<f64>()
        .max(1.0);
    let scale = (0..n)
        .map(|i| {
            if i < n_res || i >= n_state {
                mass_scale
            } else if start.0[i] != 0.0 {
                start.0[i].abs()
            } else {
                zero_scale(&model.defs[order[i]])
            }
        })
        .collect();
    Control {
        rtol: st.solver.rtol,
        atol: st.solver.atol,
        scale,
        n_err: n_state,
        max_step: st.solver.max_step.unwrap_or(f64::INFINITY),
        initial_step: st.solver.initial_step,
        max_steps: st.solver.max_steps,
        method: st.solver.method,
    }
}

/// The size of a state that is exactly zero: the unit its start value is
/// written in, or 1 in internal units (kg, m, yr, K) without one. The unit
/// is not part of a definition's canonical text, so the stage fingerprint
/// (`pipeline`) records this value with the state layout.
pub fn zero_scale(def: &crate::model::Def) -> f64 {
    def.display_unit
        .as_ref()
        .map(|(_, u)| u.scale.abs())
        .filter(|s| s.is_finite() && *s > 0.0)
        .unwrap_or(1.0)
}

/// Integrate stage `s` from state `start`. `events_done` says which events
/// already happened in earlier stages (they are not looked for again).
pub fn solve_stage(
    model: &Model,
    s: usize,
    start: &State,
    events_done: &[bool],
) -> Result<StageRun, Problem> {
    let progs = stage_programs(model, s, &[]);
    run_stage(model, s, &progs, &[], start, events_done)
}

/// The compiled programs of one stage: its right-hand side and its events.
#[derive(Debug, Clone)]
pub struct StagePrograms {
    pub rhs: Program,
    pub events: Program,
}

/// Compile stage `s`, keeping the parameters in `symbolic` as registers so
/// the same programs serve every member of an ensemble.
pub fn stage_programs(model: &Model, s: usize, symbolic: &[DefId]) -> StagePrograms {
    let rhs = compile::compile_with(
        model,
        Some(s),
        &Wants {
            rhs: true,
            ..Default::default()
        },
        symbolic,
    );
    let events = compile::compile_with(
        model,
        Some(s),
        &Wants {
            rhs: false,
            defs: event_defs(model),
            exprs: Vec::new(),
        },
        symbolic,
    );
    StagePrograms { rhs, events }
}

/// Integrate stage `s` with precompiled programs and the given parameter
/// values (for parameters compiled as registers).
pub fn run_stage(
    model: &Model,
    s: usize,
    progs: &StagePrograms,
    params: &[(DefId, f64)],
    start: &State,
    events_done: &[bool],
) -> Result<StageRun, Problem> {
    cancel::check()?;
    let clock = Instant::now();
    let st = &model.stages[s];
    let prog = &progs.rhs;
    let event_prog = &progs.events;
    let n = prog.n_state + 2;
    let n_res = model.reservoirs().count();
    let total0 = water_total(model, &start.0);
    let mass_scale = start.0[..n_res]
        .iter()
        .map(|v| v.abs())
        .sum::<f64>()
        .max(1.0);
    let span_t0 = model.start_age - st.start_age;
    let span_t1 = model.start_age - st.end_age;
    // One control for all segments: the states' scales grow across them.
    let mut ctl = stage_control(model, s, start);
    let mut y = start.0.clone();
    let ages = report_ages(model);
    let rows = stage_rows(model, s, &ages);
    drop(ages);
    // All of the stage's rows, allocated once: growing a buffer by
    // doubling would hold up to three times the rows while it moves.
    let mut out = Rows::new(n + 1);
    out.try_reserve(rows.len())?;
    let probe_ages = stage_rows(model, s, &probe_ages(model));
    // Events already true at the very start of the run count at the start.
    let mut first: Vec<Option<f64>> = vec![None; event_prog.observed.len()];
    let mut prev = vec![0.0; event_prog.observed.len()];
    let mut eregs = event_prog.regs_with(params);
    event_prog.eval(&mut eregs, &y, span_t0, st.start_age);
    for (k, &(_, reg)) in event_prog.observed.iter().enumerate() {
        prev[k] = eregs.0[reg as usize];
        if events_done.get(k).copied().unwrap_or(false) {
            prev[k] = 1.0;
        } else if s == 0 && prev[k] != 0.0 {
            first[k] = Some(st.start_age);
        }
    }
    let mut obs = Obs {
        start_age: model.start_age,
        rows,
        next_row: 0,
        out,
        probe_ages,
        next_probe: 0,
        probes: Vec::new(),
        scratch: vec![0.0; n],
        n_res,
        floor: -(st.solver.atol * mass_scale).max(1e-9 * mass_scale * st.solver.rtol),
        negative: None,
        events: Some(EventWatch {
            prog: event_prog,
            regs: eregs,
            prev,
            first,
        }),
        interrupted: false,
    };
    // The first row of the run is the initial state itself.
    if s == 0 && obs.rows.first() == Some(&st.start_age) {
        obs.out.push(st.start_age, &y);
        obs.next_row = 1;
    }
    if s == 0 && obs.probe_ages.first() == Some(&st.start_age) {
        obs.probes.push((st.start_age, y.clone()));
        obs.next_probe = 1;
    }
    // Breakpoints: knots of age tables inside the stage.
    let mut cuts: Vec<f64> = prog
        .age_knots
        .iter()
        .copied()
        .filter(|&a| a < st.start_age && a > st.end_age)
        .map(|a| model.start_age - a)
        .collect();
    cuts.sort_by(f64::total_cmp);
    cuts.push(span_t1);
    let mut sys = Sys::with_params(model, prog, params);
    let mut stats = Stats::default();
    let mut segments = Vec::with_capacity(cuts.len());
    let mut t = span_t0;
    for &cut in &cuts {
        if cut <= t {
            continue;
        }
        let mut seg = Stats::default();
        let r = methods::integrate(&mut sys, t, cut, &mut y, &mut ctl, &mut obs, &mut seg);
        stats.add(&seg);
        if let Err(f) = r {
            return Err(failure_problem(model, s, prog, &mut sys, f, &obs, &y));
        }
        segments.push(Segment {
            from_age: model.start_age - t,
            to_age: model.start_age - cut,
            explicit_steps: seg.explicit_steps,
            implicit_steps: seg.implicit_steps,
            switch_age: seg.switched_at.map(|at| model.start_age - at),
        });
        t = cut;
    }
    let total1 = water_total(model, &y);
    let mut closure_error = if total0.abs() > 0.0 {
        (total1 - total0).abs() / total0.abs()
    } else {
        (total1 - total0).abs()
    };
    if !closure_error.is_finite() && total0 != 0.0 {
        // Inventories near the largest number overflow when summed; the
        // same ratio from scaled inventories (only then, so that ordinary
        // runs keep their bits).
        closure_error = scaled_closure(model, &start.0, &y);
    }
    let events = obs.events.take().map(|e| e.first).unwrap_or_default();
    Ok(StageRun {
        stage: s,
        probes: obs.probes,
        rows: obs.out,
        end: State(y),
        stats,
        segments,
        closure_error,
        events,
        wall: clock.elapsed(),
    })
}

fn failure_problem(
    model: &Model,
    s: usize,
    prog: &Program,
    sys: &mut Sys,
    f: Failure,
    obs: &Obs,
    y: &[f64],
) -> Problem {
    let stage = &model.stages[s].name;
    if obs.interrupted {
        return cancel::interrupted();
    }
    if let Some((i, age, v)) = obs.negative {
        let def = &model.defs[prog.state_defs[i]];
        return Problem::error(
            "H0602",
            format!("reservoir `{}` went below zero ({v:.3e} kg) at {} in stage `{stage}`", def.name, ga(age)),
        )
        .label(def.span, "this reservoir ran dry")
        .help("an outgoing flux does not stop when the reservoir is empty; scale it by the inventory (e.g. `k * R`) or by `fill(R)`");
    }
    // A non-finite rate near where the integration stopped, probing a little
    // ahead when the step size collapsed before reaching it.
    let culprit = match f {
        Failure::NonFinite { t } => nonfinite_culprit(sys, t, y).map(|c| (t, c)),
        Failure::StepCollapse { t, h, .. } => [0.0, 1.0, 4.0, 16.0, 64.0]
            .iter()
            .find_map(|k| nonfinite_culprit(sys, t + k * h, y).map(|c| (t + k * h, c))),
        Failure::Budget { .. } => None,
    };
    if let Some((t, (probe_def, span, value))) = culprit {
        let d = &model.defs[probe_def];
        return Problem::error(
            "H0601",
            format!(
                "the {} `{}` is {} at {} in stage `{stage}`",
                if matches!(d.kind, DefKind::Flux { .. }) {
                    "rate of flux"
                } else {
                    "rate of state"
                },
                d.name,
                if value.is_nan() {
                    "not a number (NaN)"
                } else {
                    "infinite"
                },
                ga(model.start_age - t)
            ),
        )
        .label(span, "evaluates to a non-finite number here")
        .help("look for a division by zero, the logarithm or square root of a negative value, or an overflowing exponential");
    }
    match f {
        Failure::NonFinite { t } => Problem::error(
            "H0601",
            format!("the solution stopped being finite at {} in stage `{stage}`", ga(model.start_age - t)),
        )
        .label(model.stages[s].span, "in this stage")
        .help("a rate grows without bound; check exponents and divisions in the fluxes"),
        Failure::StepCollapse {
            t,
            h,
            worst,
            implicit,
        } => {
            // Name the term whose error limited the last attempt; without
            // one (a non-finite trial), the stiffest state; with no state of
            // its own (only the ledger), the stage.
            let limiting = worst.and_then(|i| limiting_term(model, prog, sys, t, y, i));
            let (span, text, limited_by) = match limiting {
                Some(l) => (l.span, l.label, format!("; the error in `{}` limits the step", l.component)),
                None => match stiffest(model, prog, sys, t, y) {
                    Some((name, span)) => (span, format!("the fastest-changing term: `{name}`"), String::new()),
                    None => (model.stages[s].span, "in this stage".to_owned(), String::new()),
                },
            };
            let help = if implicit {
                // Advising the implicit method to a stage that uses it helps no one.
                "the stage already steps implicitly: bound a rate that grows without limit, smooth a term that jumps or bends sharply (`min`, `max`, `clamp`, `excess`; e.g. with `smoothstep`), or loosen `solver rtol`"
            } else {
                "if this term relaxes quickly, set `solver method = implicit` in the stage; if it jumps, smooth it (e.g. `smoothstep`)"
            };
            Problem::error(
                "H0603",
                format!(
                    "the step size collapsed to {h:.3e} yr at {} in stage `{stage}`{limited_by}",
                    ga(model.start_age - t)
                ),
            )
            .label(span, text)
            .help(help)
        }
        Failure::Budget { t, implicit } => Problem::error(
            "H0604",
            format!(
                "stage `{stage}` used its budget of {} steps by {}",
                model.stages[s].solver.max_steps,
                ga(model.start_age - t)
            ),
        )
        .label(model.stages[s].span, "this stage")
        .help(if implicit {
            "raise `solver max_steps` or loosen `solver rtol`; the stage already steps implicitly, so look for a term that changes abruptly and smooth it"
        } else {
            "raise `solver max_steps`, loosen `solver rtol`, or use `solver method = implicit` for stiff stages"
        }),
    }
}

/// The term to blame for a collapsed step.
struct Limiting {
    /// The state component whose error limited the step.
    component: String,
    span: crate::span::Span,
    label: String,
}

/// The term behind component `i`'s error: for a state, its rate; for a
/// reservoir, the flux in or out of it with the shortest time scale at
/// (t, y): the larger of |dF/dR| (how strongly it pulls the reservoir, which
/// is what makes a relaxation stiff) and |dF/dt| / S (how fast it changes
/// along the solution, S being the sum of the reservoir's flux magnitudes).
fn limiting_term(
    model: &Model,
    prog: &Program,
    sys: &mut Sys,
    t: f64,
    y: &[f64],
    i: usize,
) -> Option<Limiting> {
    let id = *prog.state_defs.get(i)?;
    let def = &model.defs[id];
    if let DefKind::State { .. } = def.kind {
        let probe = prog.rate_probes.iter().find(|p| p.def == id)?;
        return Some(Limiting {
            component: def.name.clone(),
            span: probe.span,
            label: format!("the rate of `{}` limits the step", def.name),
        });
    }
    let touches = |e: &Endpoint| matches!(e, Endpoint::Reservoir(r) if *r == id);
    let candidates: Vec<&compile::Probe> = prog
        .flux_probes
        .iter()
        .filter(|p| {
            matches!(&model.defs[p.def].kind, DefKind::Flux { from, to, .. } if touches(from) || touches(to))
        })
        .collect();
    let values = |sys: &mut Sys, t: f64, z: &[f64]| -> Vec<f64> {
        prog.eval(&mut sys.regs, z, t, sys.start_age - t);
        candidates
            .iter()
            .map(|p| prog.value(&sys.regs, p.reg))
            .collect()
    };
    let f0 = values(sys, t, y);
    let total: f64 = f0.iter().map(|v| v.abs()).sum();
    // Along the reservoir: an increment of sqrt(eps) of its size (of 1 kg
    // when it is empty, so that the difference is not rounding noise).
    let mut z = y.to_vec();
    let dr = 1.5e-8 * y[i].abs().max(1.0);
    z[i] += dr;
    let f_r = values(sys, t, &z);
    // Along the solution: the time in which no component moves more than
    // sqrt(eps) of its size (or of one internal unit, when it is zero).
    let mut dy = vec![0.0; y.len()];
    let moving = sys.rhs(t, y, &mut dy);
    let tau = (0..prog.n_state)
        .filter(|&j| dy[j] != 0.0)
        .map(|j| 1.5e-8 * y[j].abs().max(1.0) / dy[j].abs())
        .fold(f64::INFINITY, f64::min);
    let f_t = if moving && tau.is_finite() && tau > 0.0 {
        for j in 0..y.len() {
            z[j] = y[j] + tau * dy[j];
        }
        Some(values(sys, t + tau, &z))
    } else {
        None
    };
    let mut best: Option<(f64, usize)> = None;
    for k in 0..candidates.len() {
        let pull = ((f_r[k] - f0[k]) / dr).abs();
        let change = f_t.as_ref().map_or(0.0, |f| {
            ((f[k] - f0[k]) / tau).abs() / total.max(f64::MIN_POSITIVE)
        });
        let score = pull.max(change);
        // A NaN score wins; of equal ones, the first.
        if best.is_none_or(|(b, _)| score.is_nan() || score > b) {
            best = Some((score, k));
        }
    }
    Some(match best {
        Some((_, k)) => Limiting {
            component: def.name.clone(),
            span: candidates[k].span,
            label: format!(
                "the fastest flux of `{}`: `{}`",
                def.name, model.defs[candidates[k].def].name
            ),
        },
        // No active flux touches it: name the reservoir itself.
        None => Limiting {
            component: def.name.clone(),
            span: def.span,
            label: format!("`{}` limits the step", def.name),
        },
    })
}

fn nonfinite_culprit(sys: &mut Sys, t: f64, y: &[f64]) -> Option<(DefId, crate::span::Span, f64)> {
    let prog = sys.prog;
    prog.eval(&mut sys.regs, y, t, sys.start_age - t);
    for p in prog.flux_probes.iter().chain(&prog.rate_probes) {
        let v = prog.value(&sys.regs, p.reg);
        if !v.is_finite() {
            return Some((p.def, p.span, v));
        }
    }
    None
}

/// The state component whose own derivative is most sensitive to it
/// (`None` when there is no state component).
fn stiffest(
    model: &Model,
    prog: &Program,
    sys: &mut Sys,
    t: f64,
    y: &[f64],
) -> Option<(String, crate::span::Span)> {
    let n = y.len();
    let mut f0 = vec![0.0; n];
    let mut f1 = vec![0.0; n];
    let mut z = y.to_vec();
    sys.rhs(t, y, &mut f0);
    let mut best = (0.0, 0usize);
    for i in 0..prog.n_state {
        let d = 1e-7 * y[i].abs().max(1e-30);
        z[i] = y[i] + d;
        sys.rhs(t, &z, &mut f1);
        z[i] = y[i];
        let j = ((f1[i] - f0[i]) / d).abs();
        if j > best.0 {
            best = (j, i);
        }
    }
    let def = &model.defs[*prog.state_defs.get(best.1)?];
    Some((def.name.clone(), def.span))
}

/// A stage's method setting as written in `solver method = WORD`.
pub fn method_word(m: Method) -> &'static str {
    m.name()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bisection_ends_at_the_first_time_known_past_the_crossing() {
        let hi = bisect(0.0, 1.0, |t| t >= 0.3);
        assert!((0.3..0.3 + 1e-15).contains(&hi), "{hi}");
        // Nothing to halve: the upper end as given.
        assert_eq!(bisect(2.0, 2.0, |_| true), 2.0);
        let mut calls = 0;
        let end = bisect(0.0, 1.0, |_| {
            calls += 1;
            false
        });
        assert_eq!(end, 1.0);
        assert!((1..=60).contains(&calls), "{calls}");
    }

    #[test]
    fn rows_that_cannot_be_allocated_are_a_diagnostic() {
        // More values than an address space holds: the allocator refuses,
        // and the refusal is H0607, not an abort.
        let mut rows = Rows::new(6);
        let p = rows.try_reserve(usize::MAX / 4).unwrap_err();
        assert_eq!(p.code, "H0607");
        assert!(
            p.message
                .starts_with("not enough memory for the report rows"),
            "{}",
            p.message
        );
        assert!(p.help.as_deref().unwrap().contains("report every"));
        // What can be allocated is, and rows read back as pushed.
        rows.try_reserve(2).unwrap();
        rows.push(4.5e9, &[1.0, 2.0, 3.0, 4.0, 5.0]);
        rows.push(4.4e9, &[-0.0, 2.5, 3.5, 4.5, 5.5]);
        let back: Vec<(f64, Vec<f64>)> = rows.iter().map(|(a, y)| (a, y.to_vec())).collect();
        assert_eq!(back[1], (4.4e9, vec![-0.0, 2.5, 3.5, 4.5, 5.5]));
        assert_eq!((rows.len(), rows.width()), (2, 6));
        assert!(Rows::from_values(6, vec![0.0; 7]).is_none());
        assert!(Rows::from_values(0, Vec::new()).is_none());
        assert_eq!(Rows::default().len(), 0);
    }
}
