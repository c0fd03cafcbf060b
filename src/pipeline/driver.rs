//! The one stage driver. Every walk over a model's stages goes through
//! [`Driver::walk`]: a single run and its verification, an ensemble's
//! shared stages, and each ensemble member. The state and the events seen
//! so far are carried from stage to stage here and nowhere else, and the
//! stage cache is reached only from here, with one key derivation
//! ([`Driver::stage_key`] and [`Driver::series_key`], both through
//! [`super::hash_parts`]) and one policy: a damaged entry is the H0701
//! warning and its stage is solved again, a solved stage is stored, and a
//! write that fails is the H0702 warning (once per run). Warnings are
//! values; the caller shows them.

use std::ops::Range;
use std::rc::Rc;

use super::{
    corrupt_warning, get_rows, get_stage, hash_parts, key_hex, part_hashes, part_lines, put_stage,
    reason, trace_path, Parts, RunWide, StageReport, Status, Trace,
};
use crate::cache::{Key, Store};
use crate::diagnostic::Problem;
use crate::graph::{DepGraph, Node};
use crate::model::{DefId, Model};
use crate::solve::{self, Rows, Run, StagePrograms, StageRun, State};

/// The stages walked so far, and what they hand the next one: the state,
/// and the first age of each event (by index into `solve::event_defs`).
#[derive(Debug, Clone)]
pub struct Walk {
    pub state: State,
    pub events: Vec<Option<f64>>,
    pub stages: Vec<StageRun>,
}

impl Walk {
    /// Before the first stage: the model's initial state, no event seen.
    pub fn new(model: &Model) -> Walk {
        Walk {
            state: solve::initial_state(model),
            events: vec![None; solve::event_defs(model).len()],
            stages: Vec::new(),
        }
    }

    /// After `shared`, stages walked once for many runs (an ensemble's
    /// stages that no varied parameter reaches): their heads only, since
    /// their rows are read where they are, not copied for every run.
    /// `start` gives the state when nothing is shared; otherwise the walk
    /// goes on from the last shared stage's end.
    pub fn after(shared: &[StageRun], n_events: usize, start: impl FnOnce() -> State) -> Walk {
        let mut events = vec![None; n_events];
        for sr in shared {
            first_seen(&mut events, &sr.events);
        }
        Walk {
            state: shared.last().map_or_else(start, |sr| sr.end.clone()),
            events,
            stages: shared.iter().map(StageRun::without_rows).collect(),
        }
    }

    /// Which events have happened: the next stage does not look for them.
    fn done(&self) -> Vec<bool> {
        self.events.iter().map(Option::is_some).collect()
    }

    fn push(&mut self, r: StageRun) {
        first_seen(&mut self.events, &r.events);
        self.state = r.end.clone();
        self.stages.push(r);
    }

    pub fn into_run(self, event_defs: Vec<DefId>) -> Run {
        Run {
            stages: self.stages,
            event_defs,
            events: self.events,
        }
    }
}

/// Keep the first age of each event over the stages so far.
fn first_seen(events: &mut [Option<f64>], stage: &[Option<f64>]) {
    for (k, e) in stage.iter().enumerate() {
        if events[k].is_none() {
            events[k] = *e;
        }
    }
}

/// How a stage is integrated when the cache does not hold it.
#[derive(Clone, Copy)]
enum Integrate<'a> {
    /// Compile the stage's programs from the model.
    Compile,
    /// Programs compiled once for many runs (an ensemble's), with the
    /// parameters they keep as registers at these values.
    Programs {
        stages: &'a [Option<StagePrograms>],
        params: &'a [(DefId, f64)],
    },
}

impl Integrate<'_> {
    fn stage(
        self,
        model: &Model,
        s: usize,
        start: &State,
        done: &[bool],
    ) -> Result<StageRun, Problem> {
        match self {
            Integrate::Compile => solve::solve_stage(model, s, start, done),
            Integrate::Programs { stages, params } => {
                // The caller compiled every stage it walks with programs.
                let progs = stages[s].as_ref().expect("programs of every stage walked");
                solve::run_stage(model, s, progs, params, start, done)
            }
        }
    }
}

/// What the walk of one stage left for the rest of a run.
pub struct Record {
    /// The stage key (its fingerprint).
    pub key: Key,
    pub report: StageReport,
    /// For a stage reused without reading its rows: their count, and where
    /// the stage started, to solve it again if the rows are gone.
    unread: Option<(usize, State, Vec<bool>)>,
}

/// The fingerprints, the store and the hint file of a cached walk.
struct Cache<'a> {
    graph: DepGraph,
    wide: RunWide,
    store: Option<&'a Store>,
    /// Read a reused stage's rows with its head: every member of an
    /// ensemble reads the shared stages' rows, while a single run reads
    /// them only to derive its series again.
    rows_with_head: bool,
    /// The hint file of the last run and this run's (single runs only: an
    /// ensemble walks only some stages, and would cut it short).
    trace: Option<(Trace, String)>,
    records: Vec<Record>,
}

/// Walks stages (see the module documentation).
pub struct Driver<'a> {
    model: &'a Model,
    integrate: Integrate<'a>,
    cache: Option<Cache<'a>>,
    warnings: Vec<Problem>,
    write_warned: bool,
}

impl<'a> Driver<'a> {
    fn with(model: &'a Model, integrate: Integrate<'a>, cache: Option<Cache<'a>>) -> Driver<'a> {
        Driver {
            model,
            integrate,
            cache,
            warnings: Vec::new(),
            write_warned: false,
        }
    }

    fn cache(model: &Model, store: Option<&'a Store>, rows_with_head: bool) -> Cache<'a> {
        Cache {
            graph: DepGraph::build(model),
            wide: RunWide::new(model),
            store,
            rows_with_head,
            trace: None,
            records: Vec::new(),
        }
    }

    /// A single run (`hadal run`; `hadal verify` without a store): every
    /// stage fingerprinted, looked up when there is a store, and a
    /// recomputation explained against the last run's hint file. A reused
    /// stage's rows are read only if its part of the series must be
    /// derived again ([`Driver::unread_rows`]).
    pub fn single_run(model: &'a Model, store: Option<&'a Store>) -> Driver<'a> {
        let mut cache = Driver::cache(model, store, false);
        cache.trace = store.map(|s| (Trace::read(&trace_path(s, model)), String::new()));
        Driver::with(model, Integrate::Compile, Some(cache))
    }

    /// An ensemble's shared stages: through the store when there is one,
    /// rows included.
    pub fn shared(model: &'a Model, store: Option<&'a Store>) -> Driver<'a> {
        let cache = store.map(|s| Driver::cache(model, Some(s), true));
        Driver::with(model, Integrate::Compile, cache)
    }

    /// Stages solved without a cache or fingerprints.
    pub fn uncached(model: &'a Model) -> Driver<'a> {
        Driver::with(model, Integrate::Compile, None)
    }

    /// An ensemble member: its stages with programs compiled once for
    /// every member (`stages[s]` for each stage it walks), no cache. It
    /// derives no key, so a member costs no hashing.
    pub fn member(
        model: &'a Model,
        stages: &'a [Option<StagePrograms>],
        params: &'a [(DefId, f64)],
    ) -> Driver<'a> {
        Driver::with(model, Integrate::Programs { stages, params }, None)
    }

    /// Walk `stages` in order from where `walk` is.
    pub fn walk(&mut self, walk: &mut Walk, stages: Range<usize>) -> Result<(), Problem> {
        for s in stages {
            crate::cancel::check()?;
            let done = walk.done();
            let r = if self.cache.is_some() {
                self.cached_stage(s, &walk.state, done)?
            } else {
                self.integrate.stage(self.model, s, &walk.state, &done)?
            };
            walk.push(r);
        }
        Ok(())
    }

    /// Stage `s` from the store, or solved and stored.
    fn cached_stage(
        &mut self,
        s: usize,
        start: &State,
        done: Vec<bool>,
    ) -> Result<StageRun, Problem> {
        let model = self.model;
        let Some(cache) = self.cache.as_mut() else {
            return self.integrate.stage(model, s, start, &done);
        };
        let (parts, key) =
            super::stage_fingerprint(model, &cache.graph, s, start, &done, &mut cache.wide);
        let name = model.stages[s].name.as_str();
        let fingerprint = key_hex(&key);
        // The same fingerprint has the same parts: hash them only when new.
        let hashes = cache
            .trace
            .as_ref()
            .map(|(previous, _)| match previous.block(name) {
                Some((fp, lines)) if fp == fingerprint => Err(lines.to_owned()),
                _ => Ok(part_hashes(&parts)),
            });
        let n = start.0.len();
        let mut found = None;
        if let Some(store) = cache.store {
            match get_stage(store, &key, s, n, false) {
                Ok(f) => found = f,
                Err(c) => self
                    .warnings
                    .push(corrupt_warning(&c, &format!("stage `{name}`"))),
            }
            if cache.rows_with_head {
                if let Some((r, count)) = &mut found {
                    match read_rows(store, &key, n, *count, name, &mut self.warnings) {
                        Some(rows) => r.rows = rows,
                        None => found = None,
                    }
                }
            }
        }
        let (run, status, why, unread) = match found {
            Some((r, count)) => {
                let unread = (!cache.rows_with_head).then(|| (count, start.clone(), done));
                (r, Status::Reused, String::new(), unread)
            }
            None => {
                let r = self.integrate.stage(model, s, start, &done)?;
                let why = match (cache.store, &hashes, &cache.trace) {
                    (None, ..) => "the cache is off".to_owned(),
                    (Some(_), Some(Ok(now)), Some((previous, _))) => {
                        reason(previous.parts(name).as_ref(), now)
                    }
                    _ => "not in the cache".to_owned(),
                };
                if let Some(store) = cache.store {
                    if let Err(e) = put_stage(store, &key, &r) {
                        write_failed(&mut self.warnings, &mut self.write_warned, store, &e);
                    }
                }
                (r, Status::Computed, why, None)
            }
        };
        if let (Some((_, text)), Some(h)) = (&mut cache.trace, &hashes) {
            text.push_str(&format!("stage\t{name}\t{fingerprint}\n"));
            match h {
                Ok(h) => text.push_str(&part_lines(h)),
                Err(lines) => text.push_str(lines),
            }
        }
        cache.records.push(Record {
            key,
            report: StageReport {
                stage: s,
                status,
                reason: why,
                fingerprint,
            },
            unread,
        });
        Ok(run)
    }

    /// What the walk left for each stage, in the order walked (only for
    /// a cached walk).
    pub fn records(&self) -> &[Record] {
        self.cache.as_ref().map_or(&[], |c| &c.records)
    }

    /// The dependency graph of a walk with fingerprints.
    pub fn graph(&self) -> Option<&DepGraph> {
        self.cache.as_ref().map(|c| &c.graph)
    }

    /// The number of report rows of the whole run (0 without fingerprints).
    pub fn report_rows(&self) -> usize {
        self.cache.as_ref().map_or(0, |c| c.wide.report_ages.len())
    }

    /// The row count of stage `s` if the walk reused it without reading
    /// its rows.
    pub fn unread_count(&self, s: usize) -> Option<usize> {
        let c = self.cache.as_ref()?;
        let rec = c.records.iter().find(|r| r.report.stage == s)?;
        rec.unread.as_ref().map(|u| u.0)
    }

    /// The rows of stage `s` if the walk reused it without reading them
    /// (`None` otherwise): from the store or, if they are gone or damaged,
    /// from solving the stage again, which gives the same bits, and storing
    /// it again.
    pub fn unread_rows(&mut self, s: usize) -> Result<Option<Rows>, Problem> {
        let model = self.model;
        let integrate = self.integrate;
        let Some(cache) = self.cache.as_mut() else {
            return Ok(None);
        };
        let Some(rec) = cache.records.iter().find(|r| r.report.stage == s) else {
            return Ok(None);
        };
        let Some((count, start, done)) = &rec.unread else {
            return Ok(None);
        };
        let name = model.stages[s].name.as_str();
        let n = start.0.len();
        if let Some(store) = cache.store {
            if let Some(rows) = read_rows(store, &rec.key, n, *count, name, &mut self.warnings) {
                return Ok(Some(rows));
            }
        }
        let again = integrate.stage(model, s, start, done)?;
        if let Some(store) = cache.store {
            if let Err(e) = put_stage(store, &rec.key, &again) {
                write_failed(&mut self.warnings, &mut self.write_warned, store, &e);
            }
        }
        Ok(Some(again.rows))
    }

    /// The key of stage `s`'s part of the series: the closure of the
    /// output columns with parameters at that stage's values, the column
    /// headers, and the stage's fingerprint (the engine is deterministic,
    /// so the fingerprint stands for the solved rows). `None` for a walk
    /// without fingerprints or a stage it did not walk.
    pub fn series_key(
        &mut self,
        s: usize,
        closure: &std::collections::BTreeSet<Node>,
        columns: &Rc<str>,
    ) -> Option<Key> {
        let model = self.model;
        let cache = self.cache.as_mut()?;
        let stage = cache.records.iter().find(|r| r.report.stage == s)?.key;
        let mut parts = Parts::new();
        let params = cache.wide.params(model, s);
        super::closure_parts(model, closure, &params, &mut cache.wide.canon, &mut parts);
        parts.insert("columns".into(), columns.clone());
        parts.insert("stage".into(), key_hex(&stage).into());
        Some(hash_parts("hadal series rows", &parts))
    }

    /// A derived entry (a part of the series) appended to `out`: `false`
    /// when the store does not hold it (or there is none).
    pub fn get_derived(&mut self, key: &Key, out: &mut Vec<u8>, what: &str) -> bool {
        let Some(store) = self.store() else {
            return false;
        };
        match store.get_into(key, out) {
            Ok(found) => found,
            Err(c) => {
                self.warnings.push(corrupt_warning(&c, what));
                false
            }
        }
    }

    /// Store a derived entry.
    pub fn put_derived(&mut self, key: &Key, bytes: &[u8]) {
        if let Some(store) = self.store() {
            if let Err(e) = store.put(key, bytes) {
                write_failed(&mut self.warnings, &mut self.write_warned, store, &e);
            }
        }
    }

    fn store(&self) -> Option<&'a Store> {
        self.cache.as_ref().and_then(|c| c.store)
    }

    /// The warnings of the walk so far, and the hint file written when it
    /// changed; the driver is done.
    pub fn finish(self) -> Vec<Problem> {
        if let Some(Cache {
            store: Some(store),
            trace: Some((previous, text)),
            ..
        }) = &self.cache
        {
            // A hint file: rewritten only when it changed.
            if *text != previous.text {
                let path = trace_path(store, self.model);
                if let Some(dir) = path.parent() {
                    let _ = std::fs::create_dir_all(dir);
                }
                let _ = crate::fsutil::write_atomic_unsynced(&path, text.as_bytes());
            }
        }
        self.warnings
    }
}

/// The stored rows of the stage under `key`; `None` (with the H0701
/// warning if they are damaged) when they cannot be used.
fn read_rows(
    store: &Store,
    key: &Key,
    n: usize,
    count: usize,
    name: &str,
    warnings: &mut Vec<Problem>,
) -> Option<Rows> {
    match get_rows(store, key, n, count) {
        Ok(rows) => rows,
        Err(c) => {
            warnings.push(corrupt_warning(&c, &format!("the rows of stage `{name}`")));
            None
        }
    }
}

/// Every stage of `model`, solved without the cache.
pub fn solve_all(model: &Model) -> Result<Run, Problem> {
    let mut walk = Walk::new(model);
    Driver::uncached(model).walk(&mut walk, 0..model.stages.len())?;
    Ok(walk.into_run(solve::event_defs(model)))
}

/// The H0702 warning, once per walk: every write goes to the same folder.
fn write_failed(warnings: &mut Vec<Problem>, warned: &mut bool, store: &Store, e: &std::io::Error) {
    if !*warned {
        *warned = true;
        warnings.push(Problem::warning(
            "H0702",
            format!(
                "could not write to the cache at {}: {e}",
                store.root().display()
            ),
        )
        .help("check the cache folder (`HADAL_CACHE`, default `.hadal-cache`) and the free space, or run with `--no-cache`"));
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::path::Path;

    const TEXT: &str = "\
scenario walks \"three stages, an event\"
span 3 Ga to 0 Ga
report every 250 Myr
param k = 0.5 / 1 Gyr
reservoir a = 1e21 kg
reservoir b = 1e20 kg
flux ab: a -> b = k * a
stage one from 3 Ga to 2 Ga
stage two from 2 Ga to 1 Ga
stage three from 1 Ga to 0 Ga {
  flux back: b -> a = 0.1 / 1 Gyr * b
}
event half = b > a
";

    /// Per stage: the bits of its rows, its end state and its events.
    type Bits = Vec<(Vec<u64>, Vec<u64>, Vec<Option<u64>>)>;

    fn bits(run: &Run) -> Bits {
        run.stages
            .iter()
            .map(|r| {
                (
                    r.rows.values().iter().map(|v| v.to_bits()).collect(),
                    r.end.0.iter().map(|v| v.to_bits()).collect(),
                    r.events.iter().map(|e| e.map(f64::to_bits)).collect(),
                )
            })
            .collect()
    }

    /// The walks of a single run, of `pipeline::solve_all` and of an ensemble
    /// member (programs compiled once, resumed after shared stages) give
    /// the same bits, stage by stage, and see each event once.
    #[test]
    fn every_kind_of_walk_gives_the_same_stages() {
        let dir = Path::new(".");
        let model = crate::check::check_text(
            "s.hadal",
            &dir.join("s.hadal"),
            TEXT,
            dir,
            &Default::default(),
        )
        .unwrap_or_else(|_| panic!("checks"))
        .model;
        let n = model.stages.len();
        let alone = solve_all(&model).unwrap();
        assert_eq!(alone.stages.len(), n);
        let half = alone.events[0].expect("b passes a");
        assert_eq!(
            alone
                .stages
                .iter()
                .filter(|r| r.events[0].is_some())
                .count(),
            1
        );
        assert!(half < 3e9 && half > 0.0);

        let mut driver = Driver::single_run(&model, None);
        let mut walk = Walk::new(&model);
        driver.walk(&mut walk, 0..n).unwrap();
        assert!(driver
            .records()
            .iter()
            .all(|r| r.report.reason == "the cache is off"));
        let single = walk.into_run(solve::event_defs(&model));
        assert_eq!(bits(&single), bits(&alone));
        assert_eq!(single.events, alone.events);

        // A member after one shared stage, with every later stage compiled
        // once (no parameter kept as a register).
        let programs: Vec<Option<StagePrograms>> = (0..n)
            .map(|s| (s >= 1).then(|| solve::stage_programs(&model, s, &[])))
            .collect();
        let mut walk = Walk::after(&alone.stages[..1], alone.events.len(), || {
            unreachable!("a stage is shared")
        });
        Driver::member(&model, &programs, &[])
            .walk(&mut walk, 1..n)
            .unwrap();
        let member = walk.into_run(solve::event_defs(&model));
        // The shared stage comes without its rows; the member's own match.
        assert!(member.stages[0].rows.is_empty());
        assert_eq!(bits(&member)[1..], bits(&alone)[1..]);
        assert_eq!(member.events, alone.events);
    }
}
