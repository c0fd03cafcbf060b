//! Execution: the shared stages once through the pipeline's driver, then
//! the members in chunks on a thread pool, folded in member order.

use rayon::prelude::*;

use super::design::{design, first_varying_stage, member_values, with_params};
use super::error::EnsembleError;
use super::sketch::{self, Sketch};
use super::write::{MemberRow, MemberSink};
use super::{EnsembleRun, EnsembleState, Options};
use crate::cache::Store;
use crate::diagnostic::Problem;
use crate::model::{DefId, Model};
use crate::pipeline::{Driver, Walk};
use crate::report;
use crate::solve::{self, StageRun};

/// The result of one member.
struct MemberResult {
    values: Vec<f64>,
    /// Series values, row-major (rows x columns, the age first), display
    /// units.
    series: Vec<f64>,
    series_csv: Option<Vec<u8>>,
    expectations: Vec<report::ExpectResult>,
    error: Option<String>,
    /// Its parameters could not be drawn: the run stops, as no member's
    /// row may hold a value that is not a number.
    draw_error: Option<EnsembleError>,
}

fn display_of(model: &Model, d: DefId) -> (String, crate::units::Unit) {
    report::shown_unit(model, d)
}

/// Compiled programs shared by every member.
struct Programs {
    stages: Vec<Option<solve::StagePrograms>>,
    event_defs: Vec<DefId>,
    report: report::ReportPrograms,
}

fn programs(model: &Model, first: usize) -> Programs {
    let varied: Vec<DefId> = model
        .ensemble
        .as_ref()
        .map(|e| e.vary.iter().map(|v| v.param).collect())
        .unwrap_or_default();
    Programs {
        stages: (0..model.stages.len())
            .map(|s| (s >= first).then(|| solve::stage_programs(model, s, &varied)))
            .collect(),
        event_defs: solve::event_defs(model),
        report: report::report_programs(model, &varied),
    }
}

/// Members from which native code is built for the programs. Every member
/// evaluates them thousands of times and native code (the same bits as the
/// interpreter) evaluates them about 1.5x faster, but building it has a
/// cost that grows with the programs: measured on 12-02, a few
/// milliseconds for the hot-start demo, which is ahead from 10 to 20
/// members on; about 1.2 s of CPU for a chain of 1,000 reservoirs
/// (`benches/scaling/generate.py 1000 4.5`), 12 % slower than the
/// interpreter at 20 members and level with it at 100 (11.2 s against
/// 11.4 s: there the sketches of its 2,000 series dominate).
const NATIVE_MIN_MEMBERS: u64 = 50;

impl Programs {
    /// Native code for every program, built in parallel on the pool the
    /// caller installs.
    fn make_native(&mut self) {
        rayon::join(
            || {
                self.stages.par_iter_mut().flatten().for_each(|sp| {
                    sp.rhs.make_native();
                    sp.events.make_native();
                })
            },
            || self.report.make_native(),
        );
    }
}

type MemberOutput = (Vec<f64>, Option<Vec<u8>>, Vec<report::ExpectResult>);

/// Solve one member; its series go into `series` (a buffer reused from
/// member to member, so that memory is not returned to the system and
/// faulted in again chunk after chunk).
fn solve_member(
    model: &Model,
    shared: &[StageRun],
    from_stage: usize,
    progs: &Programs,
    params: &[(DefId, f64)],
    keep_series: bool,
    mut series: Vec<f64>,
) -> Result<MemberOutput, Problem> {
    // Varied parameters may set the initial inventories.
    let mut walk = Walk::after(shared, progs.event_defs.len(), || {
        solve::initial_state(&with_params(model, params))
    });
    Driver::member(model, &progs.stages, params).walk(&mut walk, from_stage..model.stages.len())?;
    let run = walk.into_run(progs.event_defs.clone());
    report::series_values_of(
        model,
        shared.iter().chain(&run.stages[shared.len()..]),
        &progs.report,
        params,
        &mut series,
    )?;
    let csv = if keep_series {
        let columns = report::columns(model);
        let mut csv = report::header_csv(&columns);
        let bound = (series.len() / columns.len().max(1))
            .saturating_mul(report::csv_row_bound(columns.len()));
        csv.try_reserve_exact(bound)
            .map_err(|_| solve::out_of_memory("series", bound))?;
        report::rows_csv(series.chunks(columns.len().max(1)), &mut csv);
        Some(csv)
    } else {
        None
    };
    let exp = report::expectations_with(model, &run, &progs.report, params);
    Ok((series, csv, exp))
}

/// Run the members of one shard: they go to `sink`, in member order, and
/// the state and the warnings of the shared stages are returned. On an
/// error or a stop the sink is told to drop what it holds.
pub fn run(
    model: &Model,
    opts: &Options,
    sink: &mut dyn MemberSink,
) -> Result<EnsembleRun, EnsembleError> {
    let spec = model
        .ensemble
        .clone()
        .unwrap_or(crate::model::EnsembleSpec {
            members: None,
            seed: 0,
            vary: Vec::new(),
            span: Default::default(),
        });
    if let Some((message, help)) = crate::check::budget::ensemble_over_budget(model) {
        return Err(EnsembleError::OverBudget { message, help });
    }
    let seed = opts.seed.unwrap_or(spec.seed);
    let (total, _) = design(model, opts.members);
    if total > crate::check::MAX_MEMBERS {
        return Err(EnsembleError::TooManyMembers {
            members: total,
            limit: crate::check::MAX_MEMBERS,
        });
    }
    let (k, n) = opts.shard;
    if k == 0 || k > n {
        return Err(EnsembleError::BadShard { k, n });
    }
    // In 128 bits: K and N may be any 64-bit numbers, and K * total would
    // overflow 64 bits. Both quotients are at most `total`.
    let bound = |k: u64| (u128::from(k) * u128::from(total) / u128::from(n)) as u64;
    let (from, to) = (bound(k - 1), bound(k));
    let result = run_members(model, opts, &spec, seed, total, (from, to), sink);
    if result.is_err() {
        sink.abandon();
    }
    result
}

fn run_members(
    model: &Model,
    opts: &Options,
    spec: &crate::model::EnsembleSpec,
    seed: u64,
    total: u64,
    (from, to): (u64, u64),
    sink: &mut dyn MemberSink,
) -> Result<EnsembleRun, EnsembleError> {
    let params: Vec<(String, String)> = spec
        .vary
        .iter()
        .map(|v| {
            (
                model.defs[v.param].name.clone(),
                display_of(model, v.param).0,
            )
        })
        .collect();
    let constraints: Vec<String> = model.expects.iter().map(|e| e.text.clone()).collect();
    let mut header = vec!["member".to_owned()];
    header.extend(params.iter().map(|(p, u)| format!("{p} [{u}]")));
    for c in 1..=constraints.len() {
        header.push(format!("misfit_{c}"));
        header.push(format!("pass_{c}"));
    }
    header.push("accepted".into());
    header.push("status".into());
    sink.begin(&header, constraints.len(), opts.keep_series)?;

    // Stages before the first varying one are shared by every member.
    let first = first_varying_stage(model);
    let (shared, warnings) = solve_shared(model, first, opts.store.as_ref())?;
    let mut progs = programs(model, first);

    let columns = report::columns(model);
    let variables: Vec<(String, String)> = columns[1..]
        .iter()
        .map(|c| (c.name.clone(), c.unit.clone()))
        .collect();
    let ages = solve::report_ages(model);
    let mut state = EnsembleState {
        scenario: model.name.clone().unwrap_or_default(),
        canonical_hash: crate::manifest::canonical_hash(model),
        seed,
        total_members: total,
        from,
        to,
        params: params.clone(),
        constraints: constraints.clone(),
        variables: variables.clone(),
        ages: ages.clone(),
        accepted: 0,
        failed: 0,
        ranges: vec![
            [
                f64::INFINITY,
                f64::NEG_INFINITY,
                f64::INFINITY,
                f64::NEG_INFINITY
            ];
            params.len()
        ],
        passes: vec![0; constraints.len()],
        sensitivity: sensitivity(model, &shared, first, &progs),
        sketches: vec![(Sketch::default(), Sketch::default()); ages.len() * variables.len()],
    };

    let display: Vec<crate::units::Unit> = spec
        .vary
        .iter()
        .map(|v| display_of(model, v.param).1)
        .collect();

    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.threads.unwrap_or(0))
        .build()
        .map_err(|e| EnsembleError::Threads(e.to_string()))?;
    if to - from >= NATIVE_MIN_MEMBERS {
        pool.install(|| progs.make_native());
    }
    let tell = |done: u64| {
        if let Some(p) = &opts.progress {
            (p.0)(done, to - from);
        }
    };
    tell(0);
    // Members run in chunks, in two parallel phases: solve the chunk's
    // members, then add their series to the sketches, each thread taking a
    // block of report times (so no two threads touch one sketch, and each
    // sketch takes the whole chunk's values while its counts are in cache).
    // Counts do not depend on the order of addition, so neither the thread
    // count nor the split changes a byte. A chunk's series are bounded to
    // about 64 MiB.
    let threads = pool.current_num_threads().max(1) as u64;
    let nv = state.variables.len();
    // A member's series as doubles, and as CSV text (at most 25 bytes a
    // value) when it is kept; and its report rows (the age and every state
    // component) while its series is made.
    let per_value = if opts.keep_series { 8 + 25 } else { 8 };
    let row_values = solve::initial_state(model).0.len() + 1;
    let member_bytes = (ages.len() * ((nv + 1) * per_value + row_values * 8)).max(1) as u64;
    // Fewer members at once than threads when members are large: the
    // members in flight stay within the check's allowance for them.
    let in_flight = (crate::check::budget::ENSEMBLE_IN_FLIGHT_BYTES / member_bytes).max(1);
    let chunk = ((64 << 20) / member_bytes)
        .clamp(threads, 256 * threads)
        .min(in_flight);
    let times_per_block = ages.len().div_ceil(4 * threads as usize).max(1);
    let mut spare: Vec<Vec<f64>> = Vec::new();
    let mut start = from;
    // On a stop request, the members in flight end (their solves look at
    // the flag) and nothing of theirs is written; the sink drops what it
    // holds (members.csv, still under its temporary name, is removed).
    let interrupted = || EnsembleError::Interrupted(crate::cancel::interrupted());
    while start < to {
        if crate::cancel::requested() {
            return Err(interrupted());
        }
        let end = (start + chunk).min(to);
        let buffers: Vec<Vec<f64>> = (start..end)
            .map(|_| spare.pop().unwrap_or_default())
            .collect();
        let mut results: Vec<MemberResult> = pool.install(|| {
            buffers
                .into_par_iter()
                .enumerate()
                .map(|(off, buffer)| {
                    let i = start + off as u64;
                    run_member(
                        model,
                        spec,
                        seed,
                        i,
                        &shared,
                        first,
                        &progs,
                        opts.keep_series,
                        buffer,
                    )
                })
                .collect()
        });
        if crate::cancel::requested() {
            return Err(interrupted());
        }
        if nv > 0 {
            pool.install(|| {
                state
                    .sketches
                    .par_chunks_mut(nv * times_per_block)
                    .enumerate()
                    .for_each(|(b, block)| {
                        fold_series(block, b * times_per_block, nv, &results);
                    });
            });
        }
        spare.extend(results.iter_mut().map(|r| std::mem::take(&mut r.series)));
        if let Some((off, e)) = results
            .iter()
            .enumerate()
            .find_map(|(off, r)| r.draw_error.as_ref().map(|e| (off, e)))
        {
            return Err(e.clone().within(format!("member {}", start + off as u64)));
        }
        for (off, r) in results.into_iter().enumerate() {
            let i = start + off as u64;
            let shown: Vec<f64> = r
                .values
                .iter()
                .zip(&display)
                .map(|(v, u)| u.from_internal(*v))
                .collect();
            fold_member(&mut state, &r, &shown);
            let accepted = r.error.is_none() && r.expectations.iter().all(|e| e.pass);
            sink.member(&MemberRow {
                member: i,
                values: &shown,
                expectations: &r.expectations,
                accepted,
                error: r.error.as_deref(),
                series_csv: r.series_csv.as_deref(),
            })?;
        }
        start = end;
        tell(start - from);
    }
    sink.finish()?;
    Ok(EnsembleRun { state, warnings })
}

#[allow(clippy::too_many_arguments)]
fn run_member(
    model: &Model,
    spec: &crate::model::EnsembleSpec,
    seed: u64,
    i: u64,
    shared: &[StageRun],
    first: usize,
    progs: &Programs,
    keep: bool,
    series: Vec<f64>,
) -> MemberResult {
    let values = match member_values(model, seed, i) {
        Ok(v) => v,
        Err(e) => {
            return MemberResult {
                values: Vec::new(),
                series: Vec::new(),
                series_csv: None,
                expectations: Vec::new(),
                error: None,
                draw_error: Some(e),
            }
        }
    };
    let pairs: Vec<(DefId, f64)> = spec
        .vary
        .iter()
        .map(|v| v.param)
        .zip(values.iter().copied())
        .collect();
    match solve_member(model, shared, first, progs, &pairs, keep, series) {
        Ok((series, csv, expectations)) => MemberResult {
            values,
            series,
            series_csv: csv,
            expectations,
            error: None,
            draw_error: None,
        },
        Err(p) => MemberResult {
            values,
            series: Vec::new(),
            series_csv: None,
            expectations: Vec::new(),
            error: Some(format!("{}: {}", p.code, p.message)),
            draw_error: None,
        },
    }
}

/// Add one member; `shown` are its parameter values in display units.
fn fold_member(st: &mut EnsembleState, r: &MemberResult, shown: &[f64]) {
    if r.error.is_some() {
        st.failed += 1;
        return;
    }
    let accepted = r.expectations.iter().all(|e| e.pass);
    if accepted {
        st.accepted += 1;
    }
    for (k, v) in shown.iter().enumerate() {
        let rg = &mut st.ranges[k];
        rg[0] = rg[0].min(*v);
        rg[1] = rg[1].max(*v);
        if accepted {
            rg[2] = rg[2].min(*v);
            rg[3] = rg[3].max(*v);
        }
    }
    for (k, e) in r.expectations.iter().enumerate() {
        if e.pass {
            st.passes[k] += 1;
        }
    }
}

/// Add members' series to `sketches`, the (all members, accepted members)
/// sketches of report times `t0..`, `nv` variables per time, one time at a
/// time. Counts do not depend on the order of addition.
fn fold_series(sketches: &mut [(Sketch, Sketch)], t0: usize, nv: usize, members: &[MemberResult]) {
    let accepted: Vec<bool> = members
        .iter()
        .map(|r| r.error.is_none() && r.expectations.iter().all(|e| e.pass))
        .collect();
    let stride = nv + 1;
    for (dt, at_t) in sketches.chunks_mut(nv).enumerate() {
        let t = t0 + dt;
        for (r, &acc) in members.iter().zip(&accepted) {
            let Some(row) = r.series.get(t * stride + 1..(t + 1) * stride) else {
                continue;
            };
            for (s, v) in at_t.iter_mut().zip(row) {
                let b = sketch::Bucket::of(*v);
                s.0.add_bucket(b);
                if acc {
                    s.1.add_bucket(b);
                }
            }
        }
    }
}

/// The stages before `first`, which every member shares: through the
/// stage driver and its cache, like a single run's (a damaged entry gives
/// the same warning), rows included. Their keys are derived once here, not
/// per member.
fn solve_shared(
    model: &Model,
    first: usize,
    store: Option<&Store>,
) -> Result<(Vec<StageRun>, Vec<Problem>), EnsembleError> {
    let mut driver = Driver::shared(model, store);
    let mut walk = Walk::new(model);
    driver
        .walk(&mut walk, 0..first)
        .map_err(EnsembleError::SharedStage)?;
    Ok((walk.stages, driver.finish()))
}

/// One-at-a-time elasticities d ln(constraint value) / d ln(parameter) at
/// the nominal parameter values, by a forward difference of 1 %.
fn sensitivity(
    model: &Model,
    shared: &[StageRun],
    first: usize,
    progs: &Programs,
) -> Vec<Vec<f64>> {
    let Some(spec) = &model.ensemble else {
        return Vec::new();
    };
    let nominal = solve_member(model, shared, first, progs, &[], false, Vec::new())
        .ok()
        .map(|r| r.2);
    let base = crate::compile::stage_params(model, None);
    let mut out = vec![vec![f64::NAN; spec.vary.len()]; model.expects.len()];
    let Some(nominal) = nominal else {
        return out;
    };
    for (j, v) in spec.vary.iter().enumerate() {
        let p0 = base[v.param].unwrap_or(f64::NAN);
        if !p0.is_finite() || p0 == 0.0 {
            continue;
        }
        let p1 = p0 * 1.01;
        // Every varied parameter acts from `first` on, so the shared stages hold.
        let Ok(r) = solve_member(
            model,
            shared,
            first,
            progs,
            &[(v.param, p1)],
            false,
            Vec::new(),
        ) else {
            continue;
        };
        for (k, (a, b)) in nominal.iter().zip(&r.2).enumerate() {
            let (y0, y1) = (a.value, b.value);
            if y0.is_finite() && y1.is_finite() && y0 != 0.0 {
                out[k][j] = ((y1 - y0) / y0) / ((p1 - p0) / p0);
            }
        }
    }
    out
}
