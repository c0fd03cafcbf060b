//! Running a checked scenario through the stage cache.
//!
//! A stage's fingerprint is a blake3 hash of exactly what can change its
//! result: the canonical text of every definition its solve reaches in the
//! dependency graph (with parameters at their effective value in that stage),
//! the data of the tables they read, the stage's span, report ages and solver
//! settings, the numeric-engine version, and the bytes of the state it starts
//! from. A stage whose fingerprint is in the store is reused; when a
//! recomputed stage ends in a bit-identical state, the next stage's
//! fingerprint is unchanged and it is reused (early cutoff). Derived outputs
//! are cached apart, keyed by their own definitions and the hash of the
//! solved rows, so editing an output formula reruns no solve.
//!
//! Invariant: this module decides what keys mean and encodes payloads; the
//! store only keeps bytes, and the solver never sees the cache.

pub mod driver;

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::rc::Rc;

use crate::cache::{key_hex, Key, Store};
use crate::compile;
use crate::diagnostic::Problem;
use crate::graph::{self, DepGraph, Node};
use crate::model::{DefKind, Model};
use crate::report;
use crate::solve::{self, methods::Stats, Rows, Run, StageRun, State, ENGINE_VERSION};
pub use driver::{solve_all, Driver, Walk};

/// Whether a stage was taken from the cache or computed, and why.
#[derive(Debug, Clone, PartialEq)]
pub enum Status {
    Reused,
    Computed,
}

impl Status {
    pub fn word(&self) -> &'static str {
        match self {
            Status::Reused => "reused",
            Status::Computed => "computed",
        }
    }
}

#[derive(Debug, Clone)]
pub struct StageReport {
    pub stage: usize,
    pub status: Status,
    /// Why it was computed ("" when reused).
    pub reason: String,
    pub fingerprint: String,
}

#[derive(Debug, Clone)]
pub struct Outcome {
    /// The solved stages. Their `rows` are left empty: the series holds
    /// them, and a rerun from the cache need not decode them.
    pub run: Run,
    pub stages: Vec<StageReport>,
    /// The series CSV bytes, and its row count.
    pub series_csv: Vec<u8>,
    pub rows: usize,
    pub series_reused: bool,
    pub warnings: Vec<Problem>,
}

/// Labelled parts of a fingerprint, sorted by label.
/// (Shared strings: the same definition texts recur in every stage.)
type Parts = BTreeMap<Rc<str>, Rc<str>>;

fn bits(v: f64) -> String {
    let mut out = Vec::with_capacity(16);
    crate::cache::push_hex_u64(&mut out, v.to_bits());
    String::from_utf8(out).unwrap_or_default()
}

fn hash_parts(kind: &str, parts: &Parts) -> Key {
    // One buffer, hashed at once: blake3 hashes whole chunks of a long input
    // side by side (SIMD), but a stream of small updates one block at a time,
    // several times slower. The bytes are the same either way.
    let len: usize = parts.iter().map(|(k, v)| 16 + k.len() + v.len()).sum();
    let mut buf = Vec::with_capacity(kind.len() + 8 + len);
    buf.extend_from_slice(kind.as_bytes());
    buf.extend_from_slice(&ENGINE_VERSION.to_le_bytes());
    for (k, v) in parts {
        buf.extend_from_slice(&(k.len() as u64).to_le_bytes());
        buf.extend_from_slice(k.as_bytes());
        buf.extend_from_slice(&(v.len() as u64).to_le_bytes());
        buf.extend_from_slice(v.as_bytes());
    }
    *blake3::hash(&buf).as_bytes()
}

/// Labels and canonical texts of graph nodes, each built once per run:
/// stages and series parts share most of their definitions.
#[derive(Default)]
struct Canon(std::collections::HashMap<Node, (Rc<str>, Rc<str>)>);

impl Canon {
    fn get(&mut self, model: &Model, n: Node) -> &(Rc<str>, Rc<str>) {
        self.0.entry(n).or_insert_with(|| {
            let label = format!("def {}", graph::node_name(model, n));
            (label.into(), graph::canonical_node(model, n).into())
        })
    }
}

/// The canonical parts of the nodes in `closure`, with parameters at their
/// effective values in `stage`.
fn closure_parts(
    model: &Model,
    closure: &std::collections::BTreeSet<Node>,
    params: &[Option<f64>],
    canon: &mut Canon,
    parts: &mut Parts,
) {
    for &n in closure {
        let (label, text) = canon.get(model, n);
        let text = match n {
            Node::Def(d) if matches!(model.defs[d].kind, DefKind::Param) => format!(
                "param {} = {}",
                model.defs[d].name,
                params[d].map_or("?".into(), bits)
            )
            .into(),
            _ => text.clone(),
        };
        parts.insert(label.clone(), text);
    }
}

/// What every stage's fingerprint reads from the model as a whole.
struct RunWide {
    report_ages: Vec<f64>,
    probe_ages: Vec<f64>,
    layout: Rc<str>,
    canon: Canon,
    params: Vec<Option<Rc<Vec<Option<f64>>>>>,
}

impl RunWide {
    fn new(model: &Model) -> RunWide {
        // A state's scale at zero (the unit of its start value) steers the
        // solve, but no canonical text holds it.
        let layout: Vec<String> = compile::state_order(model)
            .iter()
            .map(|&d| {
                let def = &model.defs[d];
                match def.kind {
                    DefKind::State { .. } => {
                        format!("{} at zero {}", def.name, bits(solve::zero_scale(def)))
                    }
                    _ => def.name.clone(),
                }
            })
            .collect();
        RunWide {
            report_ages: solve::report_ages(model),
            probe_ages: solve::probe_ages(model),
            layout: layout.join(",").into(),
            canon: Canon::default(),
            params: vec![None; model.stages.len()],
        }
    }

    /// Parameter values in effect in stage `s`.
    fn params(&mut self, model: &Model, s: usize) -> Rc<Vec<Option<f64>>> {
        self.params[s]
            .get_or_insert_with(|| Rc::new(compile::stage_params(model, Some(s))))
            .clone()
    }
}

/// Everything a stage's result depends on, except the start state.
pub fn stage_parts(model: &Model, g: &DepGraph, s: usize, events_done: &[bool]) -> Parts {
    stage_parts_with(model, g, s, events_done, &mut RunWide::new(model))
}

fn stage_parts_with(
    model: &Model,
    g: &DepGraph,
    s: usize,
    events_done: &[bool],
    wide: &mut RunWide,
) -> Parts {
    let st = &model.stages[s];
    let mut parts = Parts::new();
    let closure = g.stage_closure(model, s);
    let params = wide.params(model, s);
    closure_parts(model, &closure, &params, &mut wide.canon, &mut parts);
    parts.insert(
        "span".into(),
        format!("{} {}", bits(st.start_age), bits(st.end_age)).into(),
    );
    parts.insert(
        "report ages".into(),
        joined_bits(
            wide.report_ages
                .iter()
                .copied()
                .filter(|&a| a <= st.start_age && a >= st.end_age && (s == 0 || a < st.start_age)),
        )
        .into(),
    );
    parts.insert(
        "expectation ages".into(),
        joined_bits(solve::stage_rows(model, s, &wide.probe_ages).into_iter()).into(),
    );
    parts.insert("solver settings".into(), format!("{:?}", st.solver).into());
    parts.insert("span start".into(), bits(model.start_age).into());
    parts.insert("state layout".into(), wide.layout.clone());
    parts.insert(
        "events already seen".into(),
        format!("{events_done:?}").into(),
    );
    parts
}

/// Ages as comma-separated 16-digit hex bit patterns.
fn joined_bits(ages: impl Iterator<Item = f64>) -> String {
    let mut out = Vec::with_capacity(17 * ages.size_hint().0);
    for (k, a) in ages.enumerate() {
        if k > 0 {
            out.push(b',');
        }
        crate::cache::push_hex_u64(&mut out, a.to_bits());
    }
    String::from_utf8(out).unwrap_or_default()
}

// ---- payload encoding ----------------------------------------------------

struct W(Vec<u8>);
impl W {
    fn u64(&mut self, v: u64) {
        self.0.extend_from_slice(&v.to_le_bytes());
    }
    fn f64(&mut self, v: f64) {
        self.0.extend_from_slice(&v.to_le_bytes());
    }
    fn opt_f64(&mut self, v: Option<f64>) {
        match v {
            Some(x) => {
                self.u64(1);
                self.f64(x);
            }
            None => self.u64(0),
        }
    }
    /// Only the tests write text now (a head of layout 3).
    #[cfg(test)]
    fn str(&mut self, s: &str) {
        self.u64(s.len() as u64);
        self.0.extend_from_slice(s.as_bytes());
    }
}

struct R<'a>(&'a [u8]);
impl R<'_> {
    fn take(&mut self, n: usize) -> Option<&[u8]> {
        if self.0.len() < n {
            return None;
        }
        let (a, b) = self.0.split_at(n);
        self.0 = b;
        Some(a)
    }
    fn u64(&mut self) -> Option<u64> {
        Some(u64::from_le_bytes(self.take(8)?.try_into().ok()?))
    }
    fn f64(&mut self) -> Option<f64> {
        Some(f64::from_le_bytes(self.take(8)?.try_into().ok()?))
    }
    fn len(&mut self, limit: usize) -> Option<usize> {
        let n = self.u64()? as usize;
        (n <= limit).then_some(n)
    }
    fn opt_f64(&mut self) -> Option<Option<f64>> {
        match self.u64()? {
            0 => Some(None),
            1 => Some(Some(self.f64()?)),
            _ => None,
        }
    }
}

/// Version of the stage payloads. 3: the report rows in an entry of their
/// own (see [`rows_key`]), so a reused stage reads only its small head.
const PAYLOAD_VERSION: u64 = 3;

/// Version of a stage's head. 4: no method text (`report::method_text`
/// makes it from the statistics where it is shown), the methods of each
/// segment instead. A head of an earlier version is a miss: the stage is
/// solved again and its entry replaced.
const HEAD_VERSION: u64 = 4;

fn write_rows(w: &mut W, rows: &[(f64, Vec<f64>)]) {
    w.u64(rows.len() as u64);
    for (age, y) in rows {
        w.f64(*age);
        for v in y {
            w.f64(*v);
        }
    }
}

/// (age, state) pairs, as in `StageRun::probes`.
type Pairs = Vec<(f64, Vec<f64>)>;

fn read_rows(r: &mut R, n: usize, limit: usize) -> Option<Pairs> {
    let count = r.len(1 << 28)?;
    let mut rows = Vec::with_capacity(count.min(limit / 8));
    for _ in 0..count {
        let age = r.f64()?;
        let mut y = Vec::with_capacity(n);
        for _ in 0..n {
            y.push(r.f64()?);
        }
        rows.push((age, y));
    }
    Some(rows)
}

/// The key of a stage's report rows, stored apart from the rest of its
/// result (the head, under the stage key): an unchanged rerun needs the
/// head of every stage but the rows of none.
pub fn rows_key(stage_key: &Key) -> Key {
    let mut buf = b"hadal stage rows\n".to_vec();
    buf.extend_from_slice(stage_key);
    *blake3::hash(&buf).as_bytes()
}

/// A stage's result as two payloads: the head (row count, probes, end
/// state, statistics, events) and the report rows.
fn encode_stage(r: &StageRun) -> std::io::Result<(Vec<u8>, Vec<u8>)> {
    let n = r.end.0.len();
    // The same bytes as `write_rows` of (age, state) pairs.
    let mut rows = W(Vec::new());
    rows.0
        .try_reserve_exact(24 + r.rows.values().len() * 8)
        .map_err(|e| std::io::Error::new(std::io::ErrorKind::OutOfMemory, e))?;
    rows.u64(PAYLOAD_VERSION);
    rows.u64(n as u64);
    rows.u64(r.rows.len() as u64);
    for v in r.rows.values() {
        rows.f64(*v);
    }
    let mut w = W(Vec::new());
    w.u64(HEAD_VERSION);
    w.u64(n as u64);
    w.u64(r.rows.len() as u64);
    write_rows(&mut w, &r.probes);
    for v in &r.end.0 {
        w.f64(*v);
    }
    let s = &r.stats;
    for v in [
        s.accepted,
        s.rejected,
        s.rhs_evals,
        s.jacobians,
        s.explicit_steps,
        s.implicit_steps,
    ] {
        w.u64(v);
    }
    w.opt_f64(s.switched_at);
    w.u64(r.segments.len() as u64);
    for g in &r.segments {
        w.f64(g.from_age);
        w.f64(g.to_age);
        w.u64(g.explicit_steps);
        w.u64(g.implicit_steps);
        w.opt_f64(g.switch_age);
    }
    w.f64(r.closure_error);
    w.u64(r.events.len() as u64);
    for e in &r.events {
        match e {
            Some(a) => {
                w.u64(1);
                w.f64(*a);
            }
            None => w.u64(0),
        }
    }
    Ok((w.0, rows.0))
}

/// Store a stage result: its rows first, then its head, so that a head
/// found is (but for a power cut) a stage whose rows can be read.
fn put_stage(store: &Store, key: &Key, r: &StageRun) -> std::io::Result<()> {
    // Memory for the encoded rows may be refused: then the stage is not
    // cached (the H0702 warning), and the run goes on.
    let (head, rows) = encode_stage(r)?;
    store.put(&rows_key(key), &rows)?;
    store.put(key, &head)
}

/// A stored stage result: with `rows` false its head only (and its row
/// count). `Ok(None)` when absent; `Err` when damaged or not a result of a
/// stage of `n` components from this engine version (the caller
/// recomputes, and its write replaces the entry).
fn get_stage(
    store: &Store,
    key: &Key,
    stage: usize,
    n: usize,
    rows: bool,
) -> Result<Option<(StageRun, usize)>, crate::cache::Corrupt> {
    let Some(head) = store.get(key)? else {
        return Ok(None);
    };
    // A head of an earlier layout is verified bytes this engine no longer
    // reads: a miss, not damage.
    if let Some(v) = head.get(..8).and_then(|b| b.try_into().ok()) {
        if (1..HEAD_VERSION).contains(&u64::from_le_bytes(v)) {
            return Ok(None);
        }
    }
    let Some((mut r, count)) = decode_stage_head(stage, &head).filter(|(r, _)| r.end.0.len() == n)
    else {
        return Err(crate::cache::Corrupt {
            path: store.path(key),
            why: crate::cache::Damage::Payload("not a stage result of this engine version"),
        });
    };
    if rows {
        match get_rows(store, key, n, count)? {
            Some(v) => r.rows = v,
            None => return Ok(None),
        }
    }
    Ok(Some((r, count)))
}

/// The stored report rows of the stage under `key`, with `n` components
/// and `count` rows (from its head). `Ok(None)` when absent.
fn get_rows(
    store: &Store,
    key: &Key,
    n: usize,
    count: usize,
) -> Result<Option<Rows>, crate::cache::Corrupt> {
    let rkey = rows_key(key);
    let Some(bytes) = store.get(&rkey)? else {
        return Ok(None);
    };
    match decode_rows(&bytes, n, count) {
        Some(v) => Ok(Some(v)),
        None => Err(crate::cache::Corrupt {
            path: store.path(&rkey),
            why: crate::cache::Damage::Payload(
                "not the rows of a stage result of this engine version",
            ),
        }),
    }
}

/// The report rows of a stage with `n` state components and `count` rows.
fn decode_rows(bytes: &[u8], n: usize, count: usize) -> Option<Rows> {
    let mut r = R(bytes);
    if r.u64()? != PAYLOAD_VERSION || r.len(1 << 24)? != n || r.len(1 << 28)? != count {
        return None;
    }
    // The rest is exactly the rows' values.
    let values = count.checked_mul(n + 1)?;
    if r.0.len() != values.checked_mul(8)? {
        return None;
    }
    let mut data = Vec::new();
    data.try_reserve_exact(values).ok()?;
    data.extend(
        r.0.chunks_exact(8)
            .map(|b| f64::from_le_bytes([b[0], b[1], b[2], b[3], b[4], b[5], b[6], b[7]])),
    );
    Rows::from_values(n + 1, data)
}

/// The head of a stage result (`rows` left empty), and its number of rows.
fn decode_stage_head(stage: usize, bytes: &[u8]) -> Option<(StageRun, usize)> {
    let mut r = R(bytes);
    if r.u64()? != HEAD_VERSION {
        return None;
    }
    let n = r.len(1 << 24)?;
    let row_count = r.len(1 << 28)?;
    let rows = Rows::new(n + 1);
    let probes = read_rows(&mut r, n, bytes.len())?;
    let mut end = Vec::with_capacity(n);
    for _ in 0..n {
        end.push(r.f64()?);
    }
    let mut stats = Stats {
        accepted: r.u64()?,
        rejected: r.u64()?,
        rhs_evals: r.u64()?,
        jacobians: r.u64()?,
        explicit_steps: r.u64()?,
        implicit_steps: r.u64()?,
        switched_at: None,
    };
    stats.switched_at = r.opt_f64()?;
    let ns = r.len(1 << 20)?;
    let mut segments = Vec::new();
    segments.try_reserve_exact(ns).ok()?;
    for _ in 0..ns {
        segments.push(solve::Segment {
            from_age: r.f64()?,
            to_age: r.f64()?,
            explicit_steps: r.u64()?,
            implicit_steps: r.u64()?,
            switch_age: r.opt_f64()?,
        });
    }
    let closure_error = r.f64()?;
    let ne = r.len(1 << 20)?;
    let mut events = Vec::with_capacity(ne);
    for _ in 0..ne {
        events.push(if r.u64()? == 1 { Some(r.f64()?) } else { None });
    }
    if !r.0.is_empty() {
        return None;
    }
    Some((
        StageRun {
            stage,
            rows,
            probes,
            end: State(end),
            stats,
            segments,
            closure_error,
            events,
            wall: std::time::Duration::ZERO,
        },
        row_count,
    ))
}

// ---- why a stage was recomputed ------------------------------------------

/// Hashes of each part of each stage's fingerprint at the last run of a
/// scenario, kept beside the store to explain what changed. A hint only: it
/// never decides reuse. Text, a block per stage:
///
/// ```text
/// stage<TAB>NAME<TAB>FINGERPRINT
/// <TAB>LABEL<TAB>HASH        (one line per part of the fingerprint)
/// ```
///
/// Parts are a function of the fingerprint, so a rerun whose fingerprints
/// all match reads only the stage lines and leaves the file alone.
#[derive(Default)]
struct Trace {
    text: String,
}

impl Trace {
    fn read(path: &std::path::Path) -> Trace {
        Trace {
            // A hint only: anything but a small regular UTF-8 file is ignored.
            text: crate::fsutil::read_bounded(path, crate::fsutil::MAX_JSON_BYTES)
                .ok()
                .and_then(|b| String::from_utf8(b).ok())
                .unwrap_or_default(),
        }
    }

    /// The fingerprint and the part lines of stage `name`.
    fn block(&self, name: &str) -> Option<(&str, &str)> {
        let mut rest = self.text.as_str();
        while let Some(i) = rest.find("stage\t") {
            rest = &rest[i + "stage\t".len()..];
            let line_end = rest.find('\n').unwrap_or(rest.len());
            let (head, tail) = rest.split_at(line_end);
            let tail = tail.strip_prefix('\n').unwrap_or(tail);
            let parts_end = tail.find("stage\t").unwrap_or(tail.len());
            if let Some((n, fp)) = head.split_once('\t') {
                if n == name {
                    return Some((fp, &tail[..parts_end]));
                }
            }
            rest = tail;
        }
        None
    }

    fn parts(&self, name: &str) -> Option<BTreeMap<String, String>> {
        let (_, lines) = self.block(name)?;
        Some(
            lines
                .lines()
                .filter_map(|l| l.strip_prefix('\t')?.split_once('\t'))
                .map(|(k, v)| (k.to_owned(), v.to_owned()))
                .collect(),
        )
    }
}

fn part_lines(hashes: &BTreeMap<String, String>) -> String {
    let mut out = String::new();
    for (k, v) in hashes {
        out.push('\t');
        out.push_str(k);
        out.push('\t');
        out.push_str(v);
        out.push('\n');
    }
    out
}

fn trace_path(store: &Store, model: &Model) -> PathBuf {
    let name = model.name.clone().unwrap_or_default();
    let safe: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect();
    store.root().join("traces").join(format!("{safe}.txt"))
}

fn part_hashes(parts: &Parts) -> BTreeMap<String, String> {
    parts
        .iter()
        .map(|(k, v)| {
            (
                k.to_string(),
                blake3::hash(v.as_bytes()).to_hex()[..16].to_string(),
            )
        })
        .collect()
}

fn reason(previous: Option<&BTreeMap<String, String>>, now: &BTreeMap<String, String>) -> String {
    let Some(prev) = previous else {
        return "not in the cache".into();
    };
    let mut changed: Vec<String> = Vec::new();
    for (k, v) in now {
        match prev.get(k) {
            Some(p) if p == v => {}
            Some(_) => changed.push(k.clone()),
            None => changed.push(format!("{k} (new)")),
        }
    }
    for k in prev.keys() {
        if !now.contains_key(k) {
            changed.push(format!("{k} (removed)"));
        }
    }
    let defs: Vec<String> = changed
        .iter()
        .filter_map(|c| c.strip_prefix("def ").map(str::to_owned))
        .collect();
    let other: Vec<&String> = changed.iter().filter(|c| !c.starts_with("def ")).collect();
    let mut words = Vec::new();
    if !defs.is_empty() {
        words.push(format!("changed: {}", defs.join(", ")));
    }
    for o in other {
        words.push(if o == "start state" {
            "the incoming state changed".to_owned()
        } else {
            format!("{o} changed")
        });
    }
    if words.is_empty() {
        "not in the cache".into()
    } else {
        words.join("; ")
    }
}

/// A stage's fingerprint parts and its key: everything its result depends
/// on, the start state included. The one derivation of a stage key.
fn stage_fingerprint(
    model: &Model,
    g: &DepGraph,
    s: usize,
    state: &State,
    events_done: &[bool],
    wide: &mut RunWide,
) -> (Parts, Key) {
    let mut parts = stage_parts_with(model, g, s, events_done, wide);
    parts.insert(
        "start state".into(),
        blake3::hash(&state.to_bytes()).to_hex().as_str().into(),
    );
    let key = hash_parts("hadal stage", &parts);
    (parts, key)
}

/// The cache key of stage `s` starting from `state`.
pub fn stage_key(
    model: &Model,
    g: &DepGraph,
    s: usize,
    state: &State,
    events_done: &[bool],
) -> Key {
    stage_fingerprint(model, g, s, state, events_done, &mut RunWide::new(model)).1
}

/// Run every stage through the stage driver, reusing cached ones where the
/// fingerprint matches, then derive the series.
pub fn execute(model: &Model, store: Option<&Store>) -> Result<Outcome, Problem> {
    let mut driver = Driver::single_run(model, store);
    let mut walk = Walk::new(model);
    driver.walk(&mut walk, 0..model.stages.len())?;
    let reports: Vec<StageReport> = driver.records().iter().map(|r| r.report.clone()).collect();
    let mut run = walk.into_run(solve::event_defs(model));

    // Derived outputs, per stage: keyed by their own definitions and the
    // stage's fingerprint. An edit of one stage re-derives only that
    // stage's part of the series.
    let columns = report::columns(model);
    let targets: Vec<Node> = columns
        .iter()
        .filter_map(|c| c.def)
        .map(Node::Def)
        .collect();
    let closure = driver
        .graph()
        .expect("a single run fingerprints every stage")
        .closure(&targets);
    let cols: Vec<String> = columns
        .iter()
        .map(|c| format!("{} [{}]", c.name, c.unit))
        .collect();
    let cols: Rc<str> = cols.join(",").into();
    let mut series_csv = report::header_csv(&columns);
    // The whole series at most, reserved at once: grown by doubling it
    // would hold up to three times its size while it moves.
    let bound = driver
        .report_rows()
        .saturating_mul(report::csv_row_bound(columns.len()));
    series_csv
        .try_reserve_exact(bound)
        .map_err(|_| solve::out_of_memory("series", bound))?;
    let mut series_reused = true;
    let mut rows = 0;
    for (s, sr) in run.stages.iter_mut().enumerate() {
        let key = driver
            .series_key(s, &closure, &cols)
            .expect("a single run fingerprints every stage");
        let what = format!("the series of stage `{}`", model.stages[s].name);
        if driver.get_derived(&key, &mut series_csv, &what) {
            rows += driver.unread_count(s).unwrap_or(sr.rows.len());
        } else {
            if let Some(r) = driver.unread_rows(s)? {
                sr.rows = r;
            }
            series_reused = false;
            rows += sr.rows.len();
            let from = series_csv.len();
            report::append_stage_series_csv(model, &columns, sr, &mut series_csv)?;
            driver.put_derived(&key, &series_csv[from..]);
        }
        // The series holds the rows from here on.
        sr.rows = Rows::new(sr.rows.width());
    }
    Ok(Outcome {
        run,
        stages: reports,
        series_csv,
        rows,
        series_reused,
        warnings: driver.finish(),
    })
}

fn corrupt_warning(c: &crate::cache::Corrupt, what: &str) -> Problem {
    Problem::warning(
        "H0701",
        format!(
            "cache entry {} for {what} is corrupt ({}); it was discarded and recomputed",
            c.path.display(),
            c.why
        ),
    )
    .help("nothing corrupt is ever used; run `hadal cache verify` to check the rest of the cache")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stage_payload_roundtrips_bit_for_bit() {
        let mut rows = Rows::new(4);
        rows.push(4.5e9, &[1.0, f64::MIN_POSITIVE, -0.0]);
        rows.push(4.4e9, &[2.0, 3.5e21, 1e-300]);
        let r = StageRun {
            stage: 2,
            rows,
            probes: vec![(4.45e9, vec![0.5, 1.5, 2.5])],
            end: State(vec![0.1, 0.2, 0.3]),
            stats: Stats {
                accepted: 7,
                rejected: 1,
                rhs_evals: 50,
                jacobians: 2,
                explicit_steps: 5,
                implicit_steps: 2,
                switched_at: Some(1.25e8),
            },
            segments: vec![
                solve::Segment {
                    from_age: 4.5e9,
                    to_age: 4.4e9,
                    explicit_steps: 5,
                    implicit_steps: 2,
                    switch_age: Some(4.375e9),
                },
                solve::Segment {
                    from_age: 4.4e9,
                    to_age: 4.3e9,
                    explicit_steps: 0,
                    implicit_steps: 0,
                    switch_age: None,
                },
            ],
            closure_error: 3e-16,
            events: vec![None, Some(2.5e9)],
            wall: std::time::Duration::ZERO,
        };
        // A whole stage result from its two payloads.
        let decode_stage = |stage: usize, head: &[u8], rows: &[u8]| {
            let (mut r, count) = decode_stage_head(stage, head)?;
            r.rows = decode_rows(rows, r.end.0.len(), count)?;
            Some(r)
        };
        let (head, rows) = encode_stage(&r).unwrap();
        let d = decode_stage(2, &head, &rows).unwrap();
        assert_eq!(encode_stage(&d).unwrap(), (head.clone(), rows.clone()));
        assert_eq!(
            d.rows.iter().next().unwrap().1[2].to_bits(),
            (-0.0f64).to_bits()
        );
        // The rows payload keeps its layout: count, then age and state per row.
        let mut pairs = W(Vec::new());
        pairs.u64(PAYLOAD_VERSION);
        pairs.u64(3);
        write_rows(
            &mut pairs,
            &[
                (4.5e9, vec![1.0, f64::MIN_POSITIVE, -0.0]),
                (4.4e9, vec![2.0, 3.5e21, 1e-300]),
            ],
        );
        assert_eq!(rows, pairs.0);
        assert_eq!(d.stats, r.stats);
        assert_eq!(d.segments, r.segments);
        // Truncated payloads are refused, not misread.
        assert!(decode_stage(2, &head[..head.len() - 1], &rows).is_none());
        assert!(decode_stage(2, &head, &rows[..rows.len() - 1]).is_none());
        // Rows of another stage result (another count) are refused too.
        let mut fewer = r.clone();
        fewer.rows = Rows::new(4);
        fewer.rows.push(4.5e9, &[1.0, f64::MIN_POSITIVE, -0.0]);
        assert!(decode_stage(2, &head, &encode_stage(&fewer).unwrap().1).is_none());
    }

    #[test]
    fn a_head_of_layout_3_is_a_miss_not_damage() {
        // Layout 3 held the method text after the statistics and no segments.
        let mut old = W(Vec::new());
        old.u64(3);
        old.u64(2);
        old.u64(0);
        write_rows(&mut old, &[]);
        for v in [0.1, 0.2] {
            old.f64(v);
        }
        for v in [7, 1, 50, 2, 5, 2] {
            old.u64(v);
        }
        old.u64(1);
        old.f64(1.25e8);
        old.str("explicit, then implicit from 4.3750 Ga");
        old.f64(3e-16);
        old.u64(0);
        assert!(decode_stage_head(0, &old.0).is_none());
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let key = [7u8; 32];
        store.put(&key, &old.0).unwrap();
        assert!(matches!(get_stage(&store, &key, 0, 2, false), Ok(None)));
        // A head of this layout under the same key is read; one of a layout
        // this engine never wrote is damage.
        let mut rows = W(Vec::new());
        rows.u64(PAYLOAD_VERSION);
        rows.u64(2);
        rows.u64(0);
        store.put(&rows_key(&key), &rows.0).unwrap();
        let r = StageRun {
            stage: 0,
            rows: Rows::new(3),
            probes: Vec::new(),
            end: State(vec![0.1, 0.2]),
            stats: Stats::default(),
            segments: Vec::new(),
            closure_error: 0.0,
            events: Vec::new(),
            wall: std::time::Duration::ZERO,
        };
        let (head, _) = encode_stage(&r).unwrap();
        store.put(&key, &head).unwrap();
        let (back, _) = get_stage(&store, &key, 0, 2, true).unwrap().unwrap();
        assert_eq!(back.end.0, vec![0.1, 0.2]);
        let mut future = head.clone();
        future[..8].copy_from_slice(&(HEAD_VERSION + 1).to_le_bytes());
        store.put(&key, &future).unwrap();
        assert!(get_stage(&store, &key, 0, 2, false).is_err());
    }
}
