//! Ensembles: many members of one scenario with parameters drawn from the
//! ensemble block, judged against the scenario's expectations.
//!
//! Determinism: member i's parameter values depend only on the seed, i and
//! the parameter's name (a blake3-derived stream per value), never on thread
//! count or shard split. Members run in parallel in fixed chunks whose
//! results are folded in member order; per-time quantiles go into mergeable
//! sketches (counts only), so any split of the members into shards merges to
//! exactly the bytes of an unsharded run. Memory is bounded by the number of
//! report times and variables, not by the number of members.
//!
//! Invariant: members are run through the same `solve` and `report` code as
//! a single run; this module never integrates by itself.

pub mod sketch;

use std::collections::BTreeSet;
use std::io::Write;
use std::path::{Path, PathBuf};

use rayon::prelude::*;

use crate::cache::Store;
use crate::diagnostic::Problem;
use crate::graph::{DepGraph, Node};
use crate::model::{DefId, DefKind, Dist, Expr, ExprKind, Model};
use crate::numeric::truncation::REJECTION_MIN_MASS;
use crate::pipeline::{Driver, Walk};
use crate::report::{self, fmt_num};
use crate::solve::{self, StageRun};
use sketch::Sketch;

/// Members when the scenario and the command line do not say.
pub const DEFAULT_MEMBERS: u64 = 1000;
const QUANTILES: [f64; 5] = [0.05, 0.25, 0.5, 0.75, 0.95];
const STATE_MAGIC: &[u8; 8] = b"HADALE1\n";

#[derive(Debug, Clone)]
pub struct Options {
    pub members: Option<u64>,
    pub seed: Option<u64>,
    /// (k, n): run the k-th of n shards (1-based).
    pub shard: (u64, u64),
    pub threads: Option<usize>,
    pub keep_series: bool,
    pub store: Option<Store>,
    /// Told `(members done, members to run)` after each chunk of members,
    /// on the calling thread; the library draws nothing itself.
    pub progress: Option<Progress>,
}

/// A progress callback for [`Options::progress`] (shared, so `Options`
/// stays `Clone`).
#[derive(Clone)]
pub struct Progress(pub std::sync::Arc<dyn Fn(u64, u64) + Send + Sync>);

impl std::fmt::Debug for Progress {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str("Progress(..)")
    }
}

// ---- random numbers --------------------------------------------------------

/// SplitMix64 (Steele, Lea & Flood 2014): small, fast, and good enough to
/// seed and to draw a handful of values per member (and for the random
/// arguments of unit tests elsewhere in the crate).
pub(crate) struct SplitMix(pub(crate) u64);

impl SplitMix {
    pub(crate) fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in (0, 1), never 0.
    pub(crate) fn unit(&mut self) -> f64 {
        ((self.next() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        // Box–Muller; one value per pair keeps streams simple.
        let (u, v) = (self.unit(), self.unit());
        libm::sqrt(-2.0 * libm::log(u)) * libm::cos(2.0 * std::f64::consts::PI * v)
    }
}

fn stream(seed: u64, member: u64, param: &str) -> SplitMix {
    let mut h = blake3::Hasher::new();
    h.update(b"hadal member draw");
    h.update(&seed.to_le_bytes());
    h.update(&member.to_le_bytes());
    h.update(param.as_bytes());
    let b = h.finalize();
    SplitMix(u64::from_le_bytes(
        b.as_bytes()[..8].try_into().expect("8 bytes"),
    ))
}

/// The design: members in total and the sizes of the grid/list axes.
pub fn design(model: &Model, members: Option<u64>) -> (u64, Vec<u64>) {
    let spec = model.ensemble.as_ref();
    let axes: Vec<u64> = spec
        .map(|e| e.vary.iter().filter_map(|v| v.dist.axis_len()).collect())
        .unwrap_or_default();
    // Checked: a product past 64 bits must not wrap to a small design. The
    // checker refuses designs past `MAX_MEMBERS` (H0413); a model built
    // another way gets a count that `run` refuses.
    let product = axes
        .iter()
        .try_fold(1u64, |p, &a| p.checked_mul(a))
        .unwrap_or(u64::MAX)
        .max(1);
    let n = members
        .or(spec.and_then(|e| e.members))
        .unwrap_or(if axes.is_empty() {
            DEFAULT_MEMBERS
        } else {
            product
        });
    (n, axes)
}

/// Parameter values of member `i`, in the order of the `vary` lines; an
/// error if a value cannot be drawn (the whole run is then refused).
pub fn member_values(model: &Model, seed: u64, i: u64) -> Result<Vec<f64>, String> {
    let Some(spec) = &model.ensemble else {
        return Ok(Vec::new());
    };
    let (_, axes) = design(model, None);
    let mut axis = 0usize;
    let mut stride = 1u64;
    let mut out = Vec::with_capacity(spec.vary.len());
    for v in &spec.vary {
        let name = &model.defs[v.param].name;
        let mut rng = stream(seed, i, name);
        let draw = |rng: &mut SplitMix| match &v.dist {
            Dist::Uniform(a, b) => a + (b - a) * rng.unit(),
            Dist::LogUniform(a, b) => {
                libm::exp(libm::log(*a) + (libm::log(*b) - libm::log(*a)) * rng.unit())
            }
            Dist::Normal { mean, sd } => mean + sd * rng.normal(),
            Dist::LogNormal { median, sd_ln } => median * libm::exp(sd_ln * rng.normal()),
            Dist::List(_) | Dist::Grid { .. } => f64::NAN,
        };
        let value = match &v.dist {
            Dist::List(values) => {
                let k = (i / stride) % axes[axis];
                stride = stride.saturating_mul(axes[axis]);
                axis += 1;
                values[k as usize]
            }
            Dist::Grid { lo, hi, n } => {
                let k = (i / stride) % axes[axis];
                stride = stride.saturating_mul(axes[axis]);
                axis += 1;
                lo + (hi - lo) * k as f64 / (*n - 1) as f64
            }
            _ if (v.min.is_some() || v.max.is_some())
                && v.dist.mass_between(v.min, v.max) < REJECTION_MIN_MASS =>
            {
                // A thin slice (the checker refused slices below
                // MIN_TRUNCATED_MASS): invert the distribution function
                // there, with one uniform number.
                let x = v
                    .dist
                    .truncated_at(v.min, v.max, rng.unit())
                    .unwrap_or(f64::NAN);
                // Rounding in the last step may land a hair outside.
                x.max(v.min.unwrap_or(x)).min(v.max.unwrap_or(x))
            }
            _ => {
                // Truncation by rejection: deterministic, as the stream is.
                let mut x = draw(&mut rng);
                let mut tries = 0;
                while v.min.is_some_and(|m| x < m) || v.max.is_some_and(|m| x > m) {
                    tries += 1;
                    if tries > 100_000 {
                        return Err(format!(
                            "`{name}`: its distribution almost never falls between min and max"
                        ));
                    }
                    x = draw(&mut rng);
                }
                x
            }
        };
        // The checker bounds every distribution's reach, so this is a
        // guard: a parameter that is not a number must not become a member.
        if !value.is_finite() {
            return Err(format!(
                "`{name}`: drew {value}, which is not a finite number"
            ));
        }
        out.push(value);
    }
    Ok(out)
}

/// The model with the given parameters fixed at `values` (internal units).
pub fn with_params(model: &Model, params: &[(DefId, f64)]) -> Model {
    let mut m = model.clone();
    for &(d, v) in params {
        let span = m.defs[d].expr.span;
        m.defs[d].expr = Expr {
            kind: ExprKind::Num(v),
            span,
        };
    }
    m
}

/// The first stage whose result can depend on a varied parameter; stages
/// before it are the same for every member and are solved once.
pub fn first_varying_stage(model: &Model) -> usize {
    let Some(spec) = &model.ensemble else {
        return model.stages.len();
    };
    let g = DepGraph::build(model);
    let varied: BTreeSet<DefId> = spec.vary.iter().map(|v| v.param).collect();
    let initial: Vec<Node> = model
        .defs
        .iter()
        .enumerate()
        .filter(|(_, d)| matches!(d.kind, DefKind::Reservoir { .. } | DefKind::State { .. }))
        .map(|(i, _)| Node::Initial(i))
        .collect();
    let init = g.closure(&initial);
    if varied.iter().any(|p| init.contains(&Node::Def(*p))) {
        return 0;
    }
    for s in 0..model.stages.len() {
        let closure = g.stage_closure(model, s);
        let sets: BTreeSet<DefId> = model.stages[s].sets.iter().map(|(p, _)| *p).collect();
        if varied
            .iter()
            .any(|p| closure.contains(&Node::Def(*p)) && !sets.contains(p))
        {
            return s;
        }
    }
    model.stages.len()
}

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
    draw_error: Option<String>,
}

/// Everything an ensemble (or a shard of one) accumulates; merging shard
/// states gives the state of the whole.
#[derive(Debug, Clone, PartialEq)]
pub struct EnsembleState {
    pub scenario: String,
    pub canonical_hash: String,
    pub seed: u64,
    pub total_members: u64,
    /// Members covered: [from, to).
    pub from: u64,
    pub to: u64,
    pub params: Vec<(String, String)>,
    pub constraints: Vec<String>,
    pub variables: Vec<(String, String)>,
    pub ages: Vec<f64>,
    pub accepted: u64,
    pub failed: u64,
    /// Per parameter: min/max over all and over accepted members.
    pub ranges: Vec<[f64; 4]>,
    /// Per constraint: members that pass.
    pub passes: Vec<u64>,
    /// Per constraint and parameter: elasticity at the nominal values.
    pub sensitivity: Vec<Vec<f64>>,
    /// (all, accepted) per age and variable, age-major.
    pub sketches: Vec<(Sketch, Sketch)>,
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

/// Run the members of one shard and return its state and the warnings of
/// the stage cache, writing `members.csv` (and the member series when
/// asked) into `dir`.
pub fn run(
    model: &Model,
    opts: &Options,
    dir: &Path,
) -> Result<(EnsembleState, Vec<Problem>), String> {
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
        return Err(format!("H0412 {message}\nhelp: {help}"));
    }
    let seed = opts.seed.unwrap_or(spec.seed);
    let (total, _) = design(model, opts.members);
    if total > crate::check::MAX_MEMBERS {
        return Err(format!(
            "{total} members is more than the limit of {}; split the study into shards",
            crate::check::MAX_MEMBERS
        ));
    }
    let (k, n) = opts.shard;
    if k == 0 || k > n {
        return Err(format!("shard {k}/{n} is not K/N with 1 <= K <= N"));
    }
    // In 128 bits: K and N may be any 64-bit numbers, and K * total would
    // overflow 64 bits. Both quotients are at most `total`.
    let bound = |k: u64| (u128::from(k) * u128::from(total) / u128::from(n)) as u64;
    let (from, to) = (bound(k - 1), bound(k));
    std::fs::create_dir_all(dir).map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
    // Temporary files of an earlier run that was killed.
    crate::fsutil::remove_stale_temps(dir);
    crate::fsutil::remove_stale_temps(&dir.join("series"));

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

    // members.csv is streamed to a temporary file and renamed at the end.
    let members_path = dir.join("members.csv");
    let tmp = crate::fsutil::temp_path(&members_path);
    let file =
        std::fs::File::create(&tmp).map_err(|e| format!("cannot write {}: {e}", tmp.display()))?;
    let mut out = std::io::BufWriter::new(file);
    let mut header = vec!["member".to_owned()];
    header.extend(params.iter().map(|(p, u)| format!("{p} [{u}]")));
    for c in 1..=constraints.len() {
        header.push(format!("misfit_{c}"));
        header.push(format!("pass_{c}"));
    }
    header.push("accepted".into());
    header.push("status".into());
    write_csv_row(&mut out, &header).map_err(|e| e.to_string())?;
    if opts.keep_series {
        std::fs::create_dir_all(dir.join("series")).map_err(|e| e.to_string())?;
    }
    let display: Vec<crate::units::Unit> = spec
        .vary
        .iter()
        .map(|v| display_of(model, v.param).1)
        .collect();

    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(opts.threads.unwrap_or(0))
        .build()
        .map_err(|e| e.to_string())?;
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
    // the flag) and nothing of theirs is written; members.csv, still under
    // its temporary name, is removed.
    let interrupted = |out: std::io::BufWriter<std::fs::File>| {
        drop(out);
        let _ = std::fs::remove_file(&tmp);
        crate::cancel::interrupted().message
    };
    while start < to {
        if crate::cancel::requested() {
            return Err(interrupted(out));
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
                        &spec,
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
            return Err(interrupted(out));
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
            drop(out);
            let _ = std::fs::remove_file(&tmp);
            return Err(format!("member {}: {e}", start + off as u64));
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
            let mut row = vec![i.to_string()];
            row.extend(
                r.values
                    .iter()
                    .zip(&display)
                    .map(|(v, u)| fmt_num(u.from_internal(*v))),
            );
            for e in &r.expectations {
                row.push(fmt_num(e.misfit));
                row.push(if e.pass { "yes" } else { "no" }.into());
            }
            if r.expectations.is_empty() {
                for _ in &constraints {
                    row.push(String::new());
                    row.push("no".into());
                }
            }
            let accepted = r.error.is_none() && r.expectations.iter().all(|e| e.pass);
            row.push(if accepted { "yes" } else { "no" }.into());
            row.push(r.error.clone().unwrap_or_else(|| "ok".into()));
            write_csv_row(&mut out, &row).map_err(|e| e.to_string())?;
            if let Some(csv) = &r.series_csv {
                let p = dir.join("series").join(format!("member_{i:07}.csv"));
                crate::fsutil::write_atomic(&p, csv)
                    .map_err(|e| format!("cannot write {}: {e}", p.display()))?;
            }
        }
        start = end;
        tell(start - from);
    }
    let file = out.into_inner().map_err(|e| e.to_string())?;
    file.sync_all().map_err(|e| e.to_string())?;
    std::fs::rename(&tmp, &members_path).map_err(|e| e.to_string())?;
    Ok((state, warnings))
}

fn write_csv_row(out: &mut impl Write, cells: &[String]) -> std::io::Result<()> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    w.write_record(cells)?;
    out.write_all(
        &w.into_inner()
            .map_err(|e| std::io::Error::other(e.to_string()))?,
    )
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
) -> Result<(Vec<StageRun>, Vec<Problem>), String> {
    let mut driver = Driver::shared(model, store);
    let mut walk = Walk::new(model);
    driver
        .walk(&mut walk, 0..first)
        .map_err(|p| format!("{}: {}", p.code, p.message))?;
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

// ---- outputs -----------------------------------------------------------------

impl EnsembleState {
    /// Combine shard states; they must come from the same scenario, seed and
    /// member count, and together cover every member exactly once.
    pub fn merge(mut parts: Vec<EnsembleState>) -> Result<EnsembleState, String> {
        parts.sort_by_key(|p| p.from);
        let mut it = parts.into_iter();
        let mut acc = it.next().ok_or("nothing to merge")?;
        for p in it {
            acc.absorb(&p)?;
        }
        acc.complete()?;
        Ok(acc)
    }

    /// Add the shard that follows this state's members.
    fn absorb(&mut self, p: &EnsembleState) -> Result<(), String> {
        let acc = self;
        if p.canonical_hash != acc.canonical_hash
            || p.seed != acc.seed
            || p.total_members != acc.total_members
        {
            return Err(format!(
                "shards of different ensembles: scenario {} seed {} members {} against scenario {} seed {} members {}",
                &acc.canonical_hash[..12], acc.seed, acc.total_members, &p.canonical_hash[..12], p.seed, p.total_members
            ));
        }
        if p.from != acc.to {
            return Err(format!(
                "members {} to {} are missing or covered twice",
                acc.to, p.from
            ));
        }
        acc.to = p.to;
        acc.accepted += p.accepted;
        acc.failed += p.failed;
        for (a, b) in acc.ranges.iter_mut().zip(&p.ranges) {
            a[0] = a[0].min(b[0]);
            a[1] = a[1].max(b[1]);
            a[2] = a[2].min(b[2]);
            a[3] = a[3].max(b[3]);
        }
        for (a, b) in acc.passes.iter_mut().zip(&p.passes) {
            *a += b;
        }
        for (a, b) in acc.sketches.iter_mut().zip(&p.sketches) {
            a.0.merge(&b.0);
            a.1.merge(&b.1);
        }
        Ok(())
    }

    /// `Err` unless the merged shards cover every member.
    fn complete(&self) -> Result<(), String> {
        let acc = self;
        if acc.from != 0 || acc.to != acc.total_members {
            return Err(format!(
                "the shards cover members {} to {} of {}",
                acc.from, acc.to, acc.total_members
            ));
        }
        Ok(())
    }

    pub fn members(&self) -> u64 {
        self.to - self.from
    }

    pub fn quantiles_csv(&self) -> Vec<u8> {
        let mut w = csv::WriterBuilder::new()
            .terminator(csv::Terminator::Any(b'\n'))
            .from_writer(Vec::new());
        let mut header = vec![
            "age [Ga]".to_owned(),
            "variable".to_owned(),
            "unit".to_owned(),
        ];
        for set in ["all", "accepted"] {
            for q in QUANTILES {
                header.push(format!("{set}_q{:02}", (q * 100.0).round() as u32));
            }
        }
        let _ = w.write_record(&header);
        let nv = self.variables.len();
        for (t, age) in self.ages.iter().enumerate() {
            for (j, (name, unit)) in self.variables.iter().enumerate() {
                let (all, acc) = &self.sketches[t * nv + j];
                let mut row = vec![fmt_num(age / 1e9), name.clone(), unit.clone()];
                for s in [all, acc] {
                    for q in QUANTILES {
                        row.push(s.quantile(q).map(fmt_num).unwrap_or_default());
                    }
                }
                let _ = w.write_record(&row);
            }
        }
        w.into_inner().unwrap_or_default()
    }

    pub fn summary_json(&self) -> Vec<u8> {
        let n = self.members();
        let num = |v: f64| {
            if v.is_finite() {
                serde_json::json!(v)
            } else {
                serde_json::Value::Null
            }
        };
        let params: Vec<serde_json::Value> = self
            .params
            .iter()
            .zip(&self.ranges)
            .map(|((name, unit), r)| {
                serde_json::json!({
                    "name": name,
                    "unit": unit,
                    "all": {"min": num(r[0]), "max": num(r[1])},
                    "accepted": {"min": num(r[2]), "max": num(r[3])},
                })
            })
            .collect();
        let constraints: Vec<serde_json::Value> = self
            .constraints
            .iter()
            .enumerate()
            .map(|(k, c)| {
                let sens: serde_json::Map<String, serde_json::Value> = self
                    .params
                    .iter()
                    .enumerate()
                    .map(|(j, (p, _))| {
                        (
                            p.clone(),
                            num(self
                                .sensitivity
                                .get(k)
                                .and_then(|r| r.get(j))
                                .copied()
                                .unwrap_or(f64::NAN)),
                        )
                    })
                    .collect();
                serde_json::json!({
                    "id": k + 1,
                    "expectation": c,
                    "pass_rate": if n > 0 { self.passes[k] as f64 / n as f64 } else { 0.0 },
                    "elasticity_at_nominal": sens,
                })
            })
            .collect();
        let v = serde_json::json!({
            "scenario": self.scenario,
            "canonical_hash": self.canonical_hash,
            "seed": self.seed,
            "members": n,
            "accepted": self.accepted,
            "failed": self.failed,
            "acceptance_rate": if n > 0 { self.accepted as f64 / n as f64 } else { 0.0 },
            "quantile_relative_accuracy": sketch::ALPHA,
            "parameters": params,
            "constraints": constraints,
            "sensitivity_method": "one at a time: elasticity d ln(value) / d ln(parameter) by a 1 % forward step at the nominal parameter values",
        });
        let mut b = serde_json::to_vec_pretty(&v).unwrap_or_default();
        b.push(b'\n');
        b
    }

    pub fn to_bytes(&self) -> Vec<u8> {
        let mut o = Vec::new();
        o.extend_from_slice(STATE_MAGIC);
        let meta = serde_json::json!({
            "scenario": self.scenario, "canonical_hash": self.canonical_hash, "seed": self.seed,
            "total_members": self.total_members, "from": self.from, "to": self.to,
            "params": self.params, "constraints": self.constraints, "variables": self.variables,
            "ages_bits": self.ages.iter().map(|a| a.to_bits()).collect::<Vec<_>>(),
            "accepted": self.accepted, "failed": self.failed,
            "ranges_bits": self.ranges.iter().map(|r| r.map(f64::to_bits)).collect::<Vec<_>>(),
            "passes": self.passes,
            "sensitivity_bits": self.sensitivity.iter().map(|r| r.iter().map(|v| v.to_bits()).collect::<Vec<_>>()).collect::<Vec<_>>(),
        });
        let m = serde_json::to_vec(&meta).unwrap_or_default();
        o.extend_from_slice(&(m.len() as u64).to_le_bytes());
        o.extend_from_slice(&m);
        for (a, b) in &self.sketches {
            a.write(&mut o);
            b.write(&mut o);
        }
        let h = blake3::hash(&o);
        o.extend_from_slice(h.as_bytes());
        o
    }

    pub fn from_bytes(b: &[u8]) -> Result<EnsembleState, String> {
        if b.len() < 48 || &b[..8] != STATE_MAGIC {
            return Err("not an ensemble state file".into());
        }
        let (body, hash) = b.split_at(b.len() - 32);
        if blake3::hash(body).as_bytes() != hash {
            return Err("the ensemble state file is damaged (checksum mismatch)".into());
        }
        let len = u64::from_le_bytes(body[8..16].try_into().map_err(|_| "short")?) as usize;
        let meta: serde_json::Value =
            serde_json::from_slice(body.get(16..16 + len).ok_or("short")?)
                .map_err(|e| e.to_string())?;
        let mut rest = &body[16 + len..];
        let get_u = |k: &str| meta[k].as_u64().ok_or(format!("missing {k}"));
        let strs = |k: &str| -> Vec<String> {
            meta[k]
                .as_array()
                .map(|a| {
                    a.iter()
                        .filter_map(|s| s.as_str().map(str::to_owned))
                        .collect()
                })
                .unwrap_or_default()
        };
        let pairs = |k: &str| -> Vec<(String, String)> {
            meta[k]
                .as_array()
                .map(|a| {
                    a.iter()
                        .filter_map(|p| {
                            Some((p[0].as_str()?.to_owned(), p[1].as_str()?.to_owned()))
                        })
                        .collect()
                })
                .unwrap_or_default()
        };
        let bits = |v: &serde_json::Value| f64::from_bits(v.as_u64().unwrap_or(0));
        let variables = pairs("variables");
        let ages: Vec<f64> = meta["ages_bits"]
            .as_array()
            .map(|a| a.iter().map(bits).collect())
            .unwrap_or_default();
        let mut sketches = Vec::with_capacity(ages.len() * variables.len());
        for _ in 0..ages.len() * variables.len() {
            let a = Sketch::read(&mut rest).ok_or("damaged sketch")?;
            let c = Sketch::read(&mut rest).ok_or("damaged sketch")?;
            sketches.push((a, c));
        }
        Ok(EnsembleState {
            scenario: meta["scenario"].as_str().unwrap_or("").to_owned(),
            canonical_hash: meta["canonical_hash"].as_str().unwrap_or("").to_owned(),
            seed: get_u("seed")?,
            total_members: get_u("total_members")?,
            from: get_u("from")?,
            to: get_u("to")?,
            params: pairs("params"),
            constraints: strs("constraints"),
            variables,
            ages,
            accepted: get_u("accepted")?,
            failed: get_u("failed")?,
            ranges: meta["ranges_bits"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .map(|r| [bits(&r[0]), bits(&r[1]), bits(&r[2]), bits(&r[3])])
                        .collect()
                })
                .unwrap_or_default(),
            passes: meta["passes"]
                .as_array()
                .map(|a| a.iter().filter_map(|v| v.as_u64()).collect())
                .unwrap_or_default(),
            sensitivity: meta["sensitivity_bits"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .map(|r| {
                            r.as_array()
                                .map(|x| x.iter().map(bits).collect())
                                .unwrap_or_default()
                        })
                        .collect()
                })
                .unwrap_or_default(),
            sketches,
        })
    }
}

/// Write the summary files of a (merged or unsharded) state into `dir`.
pub fn write_outputs(state: &EnsembleState, dir: &Path) -> Result<Vec<PathBuf>, String> {
    let files = [
        ("quantiles.csv", state.quantiles_csv()),
        ("summary.json", state.summary_json()),
        ("ensemble.state", state.to_bytes()),
    ];
    let mut out = Vec::new();
    for (name, bytes) in files {
        let p = dir.join(name);
        crate::fsutil::write_atomic(&p, &bytes)
            .map_err(|e| format!("cannot write {}: {e}", p.display()))?;
        out.push(p);
    }
    Ok(out)
}

/// Write the shards' `members.csv` files, in member order, as one file at
/// `to` (the header once), streaming: memory does not depend on their size.
fn concat_members(dirs: &[PathBuf], to: &Path) -> Result<(), String> {
    use std::io::{BufRead, BufReader, Read};
    let tmp = crate::fsutil::temp_path(to);
    let result = (|| {
        let mut dst = std::io::BufWriter::new(
            std::fs::File::create(&tmp)
                .map_err(|e| format!("cannot write {}: {e}", to.display()))?,
        );
        for (i, d) in dirs.iter().enumerate() {
            let path = d.join("members.csv");
            let (file, _) = crate::fsutil::open_regular(&path, true)
                .map_err(|e| format!("{}: {e}", path.display()))?;
            let mut src = BufReader::new(file);
            if i > 0 {
                // Skip the header line, reading at most a header's worth.
                let mut header = Vec::new();
                (&mut src)
                    .take(crate::fsutil::MAX_JSON_BYTES)
                    .read_until(b'\n', &mut header)
                    .map_err(|e| format!("{}: {e}", path.display()))?;
            }
            std::io::copy(&mut src, &mut dst).map_err(|e| format!("{}: {e}", path.display()))?;
        }
        let f = dst
            .into_inner()
            .map_err(|e| format!("cannot write {}: {e}", to.display()))?;
        f.sync_all()
            .and_then(|()| std::fs::rename(&tmp, to))
            .map_err(|e| format!("cannot write {}: {e}", to.display()))
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// Merge shard directories into `out`: members.csv concatenated in member
/// order and the summaries recomputed from the merged state.
pub fn merge_dirs(dirs: &[PathBuf], out: &Path) -> Result<EnsembleState, String> {
    let read_state = |d: &Path| -> Result<EnsembleState, String> {
        let path = d.join("ensemble.state");
        let b = crate::fsutil::read_bounded(&path, crate::fsutil::MAX_OUTPUT_BYTES)
            .map_err(|e| format!("{}: {e}", path.display()))?;
        EnsembleState::from_bytes(&b).map_err(|e| format!("{}: {e}", d.display()))
    };
    // Shards are read one at a time, twice (first for their order), so
    // that merging holds one shard's sketches beside the sum rather than
    // every shard's at once.
    let mut order = Vec::with_capacity(dirs.len());
    for d in dirs {
        order.push((read_state(d)?.from, d.clone()));
    }
    order.sort_by_key(|(from, _)| *from);
    let mut merged: Option<EnsembleState> = None;
    for (_, d) in &order {
        let s = read_state(d)?;
        match &mut merged {
            None => merged = Some(s),
            Some(acc) => acc.absorb(&s)?,
        }
    }
    let merged = merged.ok_or("nothing to merge")?;
    merged.complete()?;
    std::fs::create_dir_all(out).map_err(|e| format!("cannot create {}: {e}", out.display()))?;
    crate::fsutil::remove_stale_temps(out);
    crate::fsutil::remove_stale_temps(&out.join("series"));
    let shards: Vec<PathBuf> = order.iter().map(|(_, d)| d.clone()).collect();
    concat_members(&shards, &out.join("members.csv"))?;
    for dir in dirs {
        let series = dir.join("series");
        if series.is_dir() {
            std::fs::create_dir_all(out.join("series")).map_err(|e| e.to_string())?;
            for e in std::fs::read_dir(&series)
                .map_err(|e| e.to_string())?
                .flatten()
            {
                crate::fsutil::copy_atomic(&e.path(), &out.join("series").join(e.file_name()))?;
            }
        }
    }
    write_outputs(&merged, out)?;
    Ok(merged)
}
