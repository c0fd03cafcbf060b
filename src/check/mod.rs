//! Phase 2, check: syntax trees of a scenario and its includes to a
//! [`Model`] with every name resolved and every dimension known.
//!
//! Invariant: this module never evaluates the model over time; it only reads
//! files (scenario, includes, tables) and reasons about names and units.

pub mod budget;
mod expr;
mod tables;

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::rc::Rc;

use crate::diagnostic::{nearest, Problem};
use crate::model::*;
use crate::span::{Sources, Span};
use crate::syntax::{self, Entry, EntryKind, StmtKind};
use crate::units::Dim;

pub use budget::{ReportSize, MEMORY_BUDGET};
pub use expr::eval_const;
pub use header::{MAX_MEMBERS, MAX_REPORT_ROWS};
pub use tables::MAX_TABLE_ROWS;

/// Deepest chain of includes accepted.
pub const MAX_INCLUDE_DEPTH: usize = 16;
/// Largest table file read, bytes.
pub const MAX_FILE_BYTES: u64 = 16 * 1024 * 1024;
/// Largest scenario or included file read, bytes: the parser needs about a
/// hundred bytes of memory per byte of source, and a real scenario is tens
/// of kilobytes.
pub const MAX_SOURCE_BYTES: u64 = syntax::MAX_SOURCE_BYTES as u64;
/// Most bytes read for one scenario: the file, its includes and its tables
/// together (a file included or a table read many times counts each time).
pub const MAX_TOTAL_BYTES: u64 = 64 * 1024 * 1024;
/// Most errors reported for one scenario; checking stops collecting after
/// that many (the first ones are the ones to fix), so a huge broken file
/// costs neither minutes of suggestions nor pages of output.
pub const MAX_ERRORS: usize = 100;
/// Deepest nesting of an expression through the definitions it uses: a
/// `let` that uses a `let` that uses a `let` ... adds the depth of each
/// formula. Later phases walk definitions recursively; the limit keeps any
/// input from exhausting their stack.
pub const MAX_DEPTH: usize = 1000;

const PRELUDE: &str = include_str!("prelude.hadal");

/// Options that change the checked model without editing the file.
#[derive(Debug, Clone, Default)]
pub struct CheckOptions {
    /// `--set NAME=VALUE` overrides of parameters, value as written (`0.3`,
    /// `1500 K`).
    pub overrides: Vec<(String, String)>,
}

/// Why checking failed.
#[derive(Debug)]
pub enum CheckError {
    /// The root file could not be read (a usage or I/O problem, exit 2).
    Io { path: PathBuf, message: String },
    /// The scenario has errors (exit 1). Sources are included for rendering.
    Invalid {
        sources: Sources,
        problems: Vec<Problem>,
    },
}

/// A successful check: the model, and warnings worth showing.
#[derive(Debug)]
pub struct Checked {
    pub model: Model,
    pub warnings: Vec<Problem>,
}

/// Read, parse and check the scenario at `path` and everything it includes.
pub fn check_file(path: &Path, options: &CheckOptions) -> Result<Checked, CheckError> {
    let text = read_limited(path, MAX_SOURCE_BYTES).map_err(|message| CheckError::Io {
        path: path.to_owned(),
        message,
    })?;
    let root_dir = project_root(path);
    let name = display_name(path);
    check_text(&name, path, &text, &root_dir, options)
}

/// Check `text` as if it were the file `path` under `root_dir` (the project
/// root: includes and tables may not reach outside it).
pub fn check_text(
    name: &str,
    path: &Path,
    text: &str,
    root_dir: &Path,
    options: &CheckOptions,
) -> Result<Checked, CheckError> {
    check_text_from(name, path, text, root_dir, options, None)
}

fn check_text_from(
    name: &str,
    path: &Path,
    text: &str,
    root_dir: &Path,
    options: &CheckOptions,
    inputs: Option<InputFiles>,
) -> Result<Checked, CheckError> {
    let mut c = Checker::new(root_dir);
    c.inputs = inputs;
    c.bytes_read = text.len() as u64;
    let prelude = c
        .sources
        .add("<prelude>".into(), PathBuf::new(), PRELUDE.to_owned());
    let root = c
        .sources
        .add(name.to_owned(), path.to_owned(), text.to_owned());
    c.load(prelude, Origin::Prelude, &mut Vec::new());
    let canonical = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_owned());
    c.load(root, Origin::Root, &mut vec![canonical]);
    let model = c.finish(options);
    let (errors, warnings): (Vec<Problem>, Vec<Problem>) =
        c.problems.into_iter().partition(|p| !p.warning);
    match model {
        Some(model) if errors.is_empty() => Ok(Checked { model, warnings }),
        _ => {
            let mut problems = errors;
            problems.extend(warnings);
            Err(CheckError::Invalid {
                sources: c.sources,
                problems,
            })
        }
    }
}

/// The project a scenario belongs to: the nearest directory above it that
/// holds a `.git` (a versioned project), else the scenario's own directory.
/// Includes and tables may not reach outside it, and manifests name files
/// relative to it.
pub fn project_root(scenario: &Path) -> PathBuf {
    let dir = match scenario.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let dir = std::fs::canonicalize(dir).unwrap_or_else(|_| dir.to_owned());
    let mut cur = Some(dir.as_path());
    while let Some(d) = cur {
        if d.join(".git").exists() {
            return d.to_owned();
        }
        cur = d.parent();
    }
    dir
}

fn display_name(path: &Path) -> String {
    path.to_string_lossy().replace('\\', "/")
}

/// Read a scenario file: size-limited, UTF-8, byte-order mark removed.
pub fn read_text(path: &Path) -> Result<String, String> {
    read_limited(path, MAX_SOURCE_BYTES)
}

/// Read a regular file of at most `limit` bytes as text (UTF-8, byte-order
/// mark blanked). Pipes, devices and sockets are refused unread: opening a
/// pipe with no writer would block forever (see
/// [`crate::fsutil::read_bounded`]).
pub(crate) fn read_limited(path: &Path, limit: u64) -> Result<String, String> {
    let bytes = crate::fsutil::read_bounded(path, limit).map_err(|e| e.to_string())?;
    decode_source(bytes)
}

/// The text hadal reads from a file's bytes: UTF-8, with a leading
/// byte-order mark replaced by three spaces. Shared by files read from disk
/// and files handed over in memory ([`InputFiles`]), so both give the same
/// text, hence the same model and fingerprints.
pub fn decode_source(bytes: Vec<u8>) -> Result<String, String> {
    let mut text = String::from_utf8(bytes).map_err(|e| {
        format!(
            "is not UTF-8 text (bad byte at offset {})",
            e.utf8_error().valid_up_to()
        )
    })?;
    if text.starts_with('\u{feff}') {
        // A byte-order mark; replace by a space so spans keep their offsets.
        text.replace_range(0..3, "   ");
    }
    Ok(text)
}

/// Files a check may read, as bytes already in memory, keyed by their
/// canonical path. `hadal verify` hands over the inputs a manifest records,
/// after checking their hashes, so the run reads exactly the bytes that were
/// checked and nothing else: an include or table that is not in the set is
/// an error (H0501, H0503), and no file is opened.
#[derive(Debug, Clone, Default)]
pub struct InputFiles {
    files: HashMap<PathBuf, std::sync::Arc<[u8]>>,
}

impl InputFiles {
    /// Add a file under its canonical path.
    pub fn insert(&mut self, canonical: PathBuf, bytes: Vec<u8>) {
        self.files.insert(canonical, bytes.into());
    }

    /// The text of the file at `path` (resolved as the checker resolves it).
    fn text(&self, path: &Path, limit: u64) -> Result<String, String> {
        let real = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_owned());
        let bytes = self
            .files
            .get(&real)
            .ok_or("is not one of the input files recorded in the manifest")?;
        if bytes.len() as u64 > limit {
            return Err(format!(
                "is {} bytes, more than the limit of {limit} bytes",
                bytes.len()
            ));
        }
        decode_source(bytes.to_vec())
    }
}

/// Check `text` as [`check_text`] does, reading includes and tables only
/// from `inputs`, never from disk.
pub fn check_text_with_inputs(
    name: &str,
    path: &Path,
    text: &str,
    root_dir: &Path,
    options: &CheckOptions,
    inputs: &InputFiles,
) -> Result<Checked, CheckError> {
    check_text_from(name, path, text, root_dir, options, Some(inputs.clone()))
}

pub(crate) fn io_words(e: &std::io::Error) -> String {
    crate::fsutil::io_words(e)
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Origin {
    Prelude,
    Root,
    Included,
}

/// A definition statement waiting to be checked.
struct Item {
    /// Shared, so that later passes hold it without copying the tree.
    stmt: Rc<syntax::Stmt>,
    doc: Option<String>,
    origin: Origin,
    /// Index of the enclosing stage statement, for stage-local fluxes.
    stage: Option<usize>,
}

#[derive(Clone)]
enum Slot {
    Todo,
    InProgress,
    Done(expr::Typed),
}

pub(crate) struct Checker {
    pub(crate) sources: Sources,
    pub(crate) problems: Vec<Problem>,
    root_dir: PathBuf,
    items: Vec<Item>,
    header: Vec<syntax::Stmt>,
    stages: Vec<(syntax::Stmt, Vec<Entry>)>,
    ensembles: Vec<syntax::Stmt>,
    pub(crate) defs: Vec<Def>,
    pub(crate) tables: Vec<Table>,
    /// Name to definition; user definitions shadow the prelude.
    pub(crate) symbols: HashMap<String, DefId>,
    /// Syntax of each definition's main expression, by id.
    /// (The statement itself, shared with `items`: see [`main_expr`].)
    def_syntax: Vec<Option<Rc<syntax::Stmt>>>,
    slots: Vec<Slot>,
    /// Definitions being checked, innermost last (for cycle reports).
    pub(crate) stack: Vec<DefId>,
    /// Which definitions were declared with which item.
    def_item: Vec<usize>,
    /// Errors collected so far (at most [`MAX_ERRORS`] are kept).
    errors: usize,
    /// Every file included so far, with the include that first named it.
    included: HashMap<PathBuf, Span>,
    /// Bytes of scenario, include and table text read so far.
    bytes_read: u64,
    /// How deep `check_expr` is nested now, and whether passing
    /// [`MAX_DEPTH`] was reported.
    pub(crate) depth: usize,
    depth_reported: bool,
    /// Where includes and tables come from: the disk, or these files only.
    inputs: Option<InputFiles>,
}

impl Checker {
    fn new(root_dir: &Path) -> Checker {
        Checker {
            sources: Sources::default(),
            problems: Vec::new(),
            root_dir: std::fs::canonicalize(root_dir).unwrap_or_else(|_| root_dir.to_owned()),
            items: Vec::new(),
            header: Vec::new(),
            stages: Vec::new(),
            ensembles: Vec::new(),
            defs: Vec::new(),
            tables: Vec::new(),
            symbols: HashMap::new(),
            def_syntax: Vec::new(),
            slots: Vec::new(),
            stack: Vec::new(),
            def_item: Vec::new(),
            errors: 0,
            included: HashMap::new(),
            bytes_read: 0,
            depth: 0,
            depth_reported: false,
            inputs: None,
        }
    }

    /// The checker itself reached [`MAX_DEPTH`] (following definitions it
    /// checks on first use): report it once, at the expression where it
    /// stopped and with the chain of definitions that led there.
    pub(crate) fn depth_problem(&mut self, span: Span) {
        if self.depth_reported {
            return;
        }
        self.depth_reported = true;
        let chain = self.chain_words(&self.stack.clone());
        self.error(
            Problem::error(
                "H0102",
                format!("expressions nest more than {MAX_DEPTH} deep through the definitions they use"),
            )
            .label(span, "too deep here")
            .help(format!(
                "the chain of definitions is {chain}; compute parts of it as constants, or shorten it"
            )),
        );
    }

    fn chain_words(&self, ids: &[DefId]) -> String {
        let names: Vec<&str> = ids.iter().map(|&d| self.defs[d].name.as_str()).collect();
        if names.len() <= 8 {
            return names.join(" -> ");
        }
        format!(
            "{} -> ... ({} more) ... -> {}",
            names[..4].join(" -> "),
            names.len() - 8,
            names[names.len() - 4..].join(" -> ")
        )
    }

    /// How deep every definition nests through the definitions it uses:
    /// compiling, folding and printing walk definitions recursively, and
    /// the order in which the checker visited them does not bound that.
    /// A definition deeper than [`MAX_DEPTH`] is an error (reported for the
    /// shallowest such definition of a chain only). Also finds cycles
    /// through capacities (`fill`, `capacity`, `excess` of a reservoir
    /// whose capacity uses them), which checking on first use cannot see.
    fn check_depths(&mut self) {
        let n = self.defs.len();
        #[derive(Clone, Copy, PartialEq)]
        enum Mark {
            New,
            Open,
            Done(usize),
        }
        let mut mark = vec![Mark::New; n];
        let depth_of = |mark: &[Mark], d: DefId| match mark[d] {
            Mark::Done(x) => x,
            _ => 0,
        };
        // Iterative depth-first search: the definition graph may be
        // arbitrarily deep, this walk keeps its own stack. An entry
        // `(d, true)` on the stack is an open definition on the current path.
        let mut order = Vec::with_capacity(n);
        let mut cycle: Option<Vec<DefId>> = None;
        for root in 0..n {
            if mark[root] != Mark::New {
                continue;
            }
            let mut stack: Vec<(DefId, bool)> = vec![(root, false)];
            while let Some((d, expanded)) = stack.pop() {
                if expanded {
                    let x = body(&self.defs[d])
                        .map_or(1, |e| expr_depth(&self.defs, e, &|r| depth_of(&mark, r)));
                    mark[d] = Mark::Done(x);
                    order.push(d);
                    continue;
                }
                if mark[d] != Mark::New {
                    continue;
                }
                mark[d] = Mark::Open;
                stack.push((d, true));
                let mut refs = Vec::new();
                if let Some(e) = body(&self.defs[d]) {
                    expr_refs(&self.defs, e, &mut refs);
                }
                for r in refs {
                    match mark[r] {
                        Mark::New if body(&self.defs[r]).is_some() => stack.push((r, false)),
                        Mark::Open if cycle.is_none() => {
                            let path: Vec<DefId> =
                                stack.iter().filter(|e| e.1).map(|e| e.0).collect();
                            let from = path.iter().position(|&p| p == r).unwrap_or(0);
                            cycle = Some(path[from..].to_vec());
                        }
                        _ => {}
                    }
                }
            }
        }
        if let Some(cycle) = cycle {
            let mut names: Vec<String> = cycle.iter().map(|&d| self.defs[d].name.clone()).collect();
            names.push(names[0].clone());
            let mut p = Problem::error(
                "H0406",
                format!(
                    "definitions depend on each other in a cycle: {}",
                    names.join(" -> ")
                ),
            );
            for (i, &d) in cycle.iter().enumerate() {
                let span = body(&self.defs[d]).map_or(self.defs[d].span, |e| e.span);
                let what = match self.defs[d].kind {
                    DefKind::Reservoir { .. } => {
                        format!("the capacity of `{}` uses `{}`", names[i], names[i + 1])
                    }
                    _ => format!("`{}` uses `{}`", names[i], names[i + 1]),
                };
                p = p.label(span, what);
            }
            self.error(p.help(
                "a capacity may not depend on itself: `fill`, `capacity` and `excess` of a reservoir need its capacity first",
            ));
            return;
        }
        for d in order {
            let x = depth_of(&mark, d);
            if x <= MAX_DEPTH {
                continue;
            }
            // Report where the chain first passes the limit: a definition
            // whose own parts are all within it.
            let mut refs = Vec::new();
            if let Some(e) = body(&self.defs[d]) {
                expr_refs(&self.defs, e, &mut refs);
            }
            if refs.iter().any(|&r| depth_of(&mark, r) > MAX_DEPTH) {
                continue;
            }
            let mut chain = vec![d];
            let mut cur = d;
            while chain.len() < 10_000 {
                let mut next = Vec::new();
                if let Some(e) = body(&self.defs[cur]) {
                    expr_refs(&self.defs, e, &mut next);
                }
                match next.into_iter().max_by_key(|&r| depth_of(&mark, r)) {
                    Some(r) if depth_of(&mark, r) > 1 && !chain.contains(&r) => {
                        chain.push(r);
                        cur = r;
                    }
                    _ => break,
                }
            }
            let words = self.chain_words(&chain);
            let span = body(&self.defs[d]).map_or(self.defs[d].span, |e| e.span);
            self.error(
                Problem::error(
                    "H0102",
                    format!(
                        "`{}` nests {x} deep through the definitions it uses; at most {MAX_DEPTH} are allowed",
                        self.defs[d].name
                    ),
                )
                .label(span, "too deep")
                .help(format!(
                    "the chain of definitions is {words}; compute parts of it as constants, or shorten it"
                )),
            );
        }
    }

    pub(crate) fn error(&mut self, p: Problem) {
        if !p.warning {
            if self.errors >= MAX_ERRORS {
                return;
            }
            self.errors += 1;
        } else if self.problems.len() >= 2 * MAX_ERRORS {
            return;
        }
        self.problems.push(p);
    }

    /// True once [`MAX_ERRORS`] errors are collected: callers skip work that
    /// only improves a message no one will see (suggestions).
    pub(crate) fn error_limit_reached(&self) -> bool {
        self.errors >= MAX_ERRORS
    }

    /// Count `len` more bytes read for this scenario; `Err` with the reason
    /// when that would pass [`MAX_TOTAL_BYTES`].
    pub(crate) fn take_bytes(&mut self, len: usize) -> Result<(), String> {
        let total = self.bytes_read.saturating_add(len as u64);
        if total > MAX_TOTAL_BYTES {
            return Err(format!(
                "the scenario with its includes and tables would pass {MAX_TOTAL_BYTES} bytes read"
            ));
        }
        self.bytes_read = total;
        Ok(())
    }

    /// Read an included file or a table, from the disk or from the
    /// in-memory inputs.
    pub(crate) fn read_input(&self, path: &Path, limit: u64) -> Result<String, String> {
        match &self.inputs {
            Some(inputs) => inputs.text(path, limit),
            None => read_limited(path, limit),
        }
    }

    /// Resolve a path written in `file` (relative to that file's directory)
    /// and make sure it stays inside the project root.
    pub(crate) fn resolve_path(&mut self, file: u32, written: &str, span: Span) -> Option<PathBuf> {
        let base = self
            .sources
            .get(file)
            .path
            .parent()
            .map(Path::to_owned)
            .unwrap_or_default();
        let candidate = Path::new(written);
        if candidate.is_absolute() {
            self.error(
                Problem::error("H0505", format!("the path `{written}` is absolute"))
                    .label(span, "absolute path")
                    .help("write paths relative to the scenario file, inside its project"),
            );
            return None;
        }
        let joined = base.join(candidate);
        // Resolve `..` and symlinks when the file exists, to see where it
        // really points; otherwise resolve lexically.
        let real = std::fs::canonicalize(&joined).ok().or_else(|| {
            let mut out = std::fs::canonicalize(&base).ok()?;
            for part in candidate.components() {
                match part {
                    std::path::Component::ParentDir => {
                        out.pop();
                    }
                    std::path::Component::Normal(p) => out.push(p),
                    _ => {}
                }
            }
            Some(out)
        });
        if let Some(real) = &real {
            if !real.starts_with(&self.root_dir) {
                self.error(
                    Problem::error(
                        "H0505",
                        format!("the path `{written}` leads outside the project"),
                    )
                    .label(span, "outside the project root")
                    .help(format!(
                        "scenarios may read only files below {}; copy the file into the project",
                        self.root_dir.display()
                    )),
                );
                return None;
            }
        }
        Some(joined)
    }

    /// Parse a file and sort its statements into header, stages and
    /// definitions; includes are followed where they stand.
    fn load(&mut self, file: u32, origin: Origin, chain: &mut Vec<PathBuf>) {
        let text = self.sources.get(file).text.clone();
        let parsed = match syntax::parse(&text, file) {
            Ok(f) => f,
            Err(problems) => {
                for p in problems {
                    self.error(p);
                }
                return;
            }
        };
        let mut doc: Vec<String> = Vec::new();
        for entry in parsed.entries {
            let stmt = match entry.kind {
                EntryKind::Comment(c) => {
                    if let Some(d) = c.strip_prefix("##") {
                        doc.push(d.trim().to_owned());
                    } else {
                        doc.clear();
                    }
                    continue;
                }
                EntryKind::Stmt(s) => *s,
            };
            let doc_text = if doc.is_empty() {
                None
            } else {
                Some(doc.join(" "))
            };
            doc.clear();
            match &stmt.kind {
                StmtKind::Include { path } => {
                    let (path_text, span) = (path.value.clone(), path.span);
                    self.include(file, &path_text, span, chain);
                }
                StmtKind::Scenario { .. }
                | StmtKind::Span { .. }
                | StmtKind::Report { .. }
                | StmtKind::Solver { .. }
                | StmtKind::Expect { .. }
                | StmtKind::Stage { .. }
                | StmtKind::Ensemble { .. }
                    if origin != Origin::Root =>
                {
                    self.error(
                        Problem::error(
                            "H0208",
                            "an included file may hold only definitions",
                        )
                        .label(stmt.span, "not a definition")
                        .help("move header lines, stages and expectations into the scenario file itself"),
                    );
                }
                StmtKind::Scenario { .. }
                | StmtKind::Span { .. }
                | StmtKind::Report { .. }
                | StmtKind::Solver { .. }
                | StmtKind::Expect { .. } => self.header.push(stmt),
                StmtKind::Stage { body, .. } => {
                    let stage_index = self.stages.len();
                    let mut rest = Vec::new();
                    if let Some(body) = body {
                        for e in &body.entries {
                            if let EntryKind::Stmt(s) = &e.kind {
                                if let StmtKind::Flux { .. } = s.kind {
                                    self.items.push(Item {
                                        stmt: Rc::new((**s).clone()),
                                        doc: None,
                                        origin,
                                        stage: Some(stage_index),
                                    });
                                    continue;
                                }
                            }
                            rest.push(e.clone());
                        }
                    }
                    self.stages.push((stmt, rest));
                }
                StmtKind::Ensemble { .. } => self.ensembles.push(stmt),
                StmtKind::Vary { .. } | StmtKind::Option { .. } => {
                    // The grammar admits these only inside an ensemble block.
                    self.error(
                        Problem::error("H0208", "this line belongs inside an `ensemble { }` block")
                            .label(stmt.span, "outside the ensemble"),
                    );
                }
                StmtKind::Set { .. } => {
                    // The grammar admits `set` only inside stage bodies.
                    self.error(
                        Problem::error("H0208", "`set` belongs inside a stage")
                            .label(stmt.span, "outside any stage"),
                    );
                }
                _ => self.items.push(Item {
                    stmt: Rc::new(stmt),
                    doc: doc_text,
                    origin,
                    stage: None,
                }),
            }
        }
    }

    fn include(&mut self, from: u32, written: &str, span: Span, chain: &mut Vec<PathBuf>) {
        let Some(path) = self.resolve_path(from, written, span) else {
            return;
        };
        let canonical = std::fs::canonicalize(&path).unwrap_or_else(|_| path.clone());
        if let Some(pos) = chain.iter().position(|p| *p == canonical) {
            let cycle: Vec<String> = chain[pos..]
                .iter()
                .chain(std::iter::once(&canonical))
                .map(|p| {
                    p.file_name()
                        .map(|n| n.to_string_lossy().into_owned())
                        .unwrap_or_default()
                })
                .collect();
            self.error(
                Problem::error("H0502", format!("include cycle: {}", cycle.join(" -> ")))
                    .label(span, "this include closes the cycle")
                    .help("move the shared definitions into a file that includes nothing of the others"),
            );
            return;
        }
        if let Some(&first) = self.included.get(&canonical) {
            // Its names would all be defined twice; say so once, and do not
            // read (and parse) the file again.
            self.error(
                Problem::error("H0502", format!("`{written}` is included twice"))
                    .label(span, "included again here")
                    .label(first, "first included here")
                    .help("include each file once; its definitions are then visible everywhere"),
            );
            return;
        }
        self.included.insert(canonical.clone(), span);
        if chain.len() > MAX_INCLUDE_DEPTH {
            self.error(
                Problem::error(
                    "H0506",
                    format!("includes nested more than {MAX_INCLUDE_DEPTH} deep"),
                )
                .label(span, "too deep")
                .help("flatten the chain of includes"),
            );
            return;
        }
        let text = match self
            .read_input(&path, MAX_SOURCE_BYTES)
            .and_then(|t| self.take_bytes(t.len()).map(|_| t))
        {
            Ok(t) => t,
            Err(why) => {
                self.error(
                    Problem::error(
                        "H0501",
                        format!("cannot read included file `{written}`: {why}"),
                    )
                    .label(span, "included here")
                    .help("paths are relative to the file that includes them"),
                );
                return;
            }
        };
        let base_name = self.sources.get(from).name.clone();
        let name = Path::new(&base_name)
            .parent()
            .map(|p| display_name(&p.join(written)))
            .unwrap_or_else(|| written.to_owned());
        let id = self.sources.add(name, path, text);
        chain.push(canonical);
        self.load(id, Origin::Included, chain);
        chain.pop();
    }

    /// Declare every definition, check every expression, assemble the model.
    fn finish(&mut self, options: &CheckOptions) -> Option<Model> {
        self.declare();
        self.apply_overrides(options);
        for id in 0..self.defs.len() {
            self.def_type(id);
        }
        self.check_finite_constants();
        self.check_def_extras();
        if self.errors == 0 {
            self.check_depths();
        }
        let header = self.check_header();
        let mut stages = self.check_stages(&header);
        let expects = self.check_expects(&header);
        let ensemble = self.check_ensemble();
        // Stage-local fluxes know their stage.
        for (id, def) in self.defs.iter_mut().enumerate() {
            if let DefKind::Flux { stage: Some(s), .. } = def.kind {
                if let Some(st) = stages.get_mut(s) {
                    st.fluxes.push(id);
                }
            }
        }
        for st in &mut stages {
            st.fluxes.sort_unstable();
        }
        let model = Model {
            name: header.name,
            title: header.title,
            start_age: header.start_age,
            end_age: header.end_age,
            cadence: header.cadence,
            solver: header.solver,
            defs: std::mem::take(&mut self.defs),
            tables: std::mem::take(&mut self.tables),
            stages,
            expects,
            ensemble,
            sources: self.sources.clone(),
        };
        // Only a model without errors has counts to estimate from.
        if self.errors == 0 {
            if let Some(span) = header.report_span {
                if let Some(p) = budget::report_memory(&model, span) {
                    self.error(p);
                }
            }
        }
        Some(model)
    }

    fn declare(&mut self) {
        // User names first, so they shadow the prelude.
        let mut order: Vec<usize> = (0..self.items.len())
            .filter(|&i| self.items[i].origin != Origin::Prelude)
            .collect();
        let prelude: Vec<usize> = (0..self.items.len())
            .filter(|&i| self.items[i].origin == Origin::Prelude)
            .collect();
        let mut spans: HashMap<String, Span> = HashMap::new();
        let mut accepted = Vec::new();
        for &i in &order {
            let Some((name, span)) = item_name(&self.items[i].stmt) else {
                continue;
            };
            if expr::is_reserved(&name) {
                self.error(
                    Problem::error("H0202", format!("`{name}` is a built-in name"))
                        .label(span, "reserved")
                        .help(
                            "choose another name; `age`, `time` and `outside` have fixed meanings",
                        ),
                );
                continue;
            }
            if let Some(first) = spans.get(&name) {
                self.error(
                    Problem::error("H0202", format!("`{name}` is defined twice"))
                        .label(span, "defined again here")
                        .label(*first, "first defined here")
                        .help("rename one of them, or delete the second"),
                );
                continue;
            }
            spans.insert(name.clone(), span);
            accepted.push(i);
        }
        let mut with_prelude: Vec<usize> = prelude
            .into_iter()
            .filter(|&i| {
                item_name(&self.items[i].stmt).is_some_and(|(n, _)| !spans.contains_key(&n))
            })
            .collect();
        with_prelude.extend(accepted);
        order = with_prelude;
        for i in order {
            let item = &self.items[i];
            let (name, span) = item_name(&item.stmt).expect("filtered above");
            let placeholder = Expr {
                kind: ExprKind::Num(0.0),
                span,
            };
            let kind = match &item.stmt.kind {
                StmtKind::Const { .. } => DefKind::Const,
                StmtKind::Param { .. } => DefKind::Param,
                StmtKind::Let { .. } => DefKind::Let,
                StmtKind::Output { .. } => DefKind::Output,
                StmtKind::Event { .. } => DefKind::Event,
                StmtKind::Table { .. } => DefKind::Table(usize::MAX),
                StmtKind::Reservoir { .. } => DefKind::Reservoir { capacity: None },
                StmtKind::State { .. } => DefKind::State {
                    rate: placeholder.clone(),
                },
                StmtKind::Flux { .. } => DefKind::Flux {
                    from: Endpoint::Outside,
                    to: Endpoint::Outside,
                    stage: item.stage,
                },
                _ => continue,
            };
            let syntax_expr = main_expr(&item.stmt).map(|_| Rc::clone(&item.stmt));
            let id = self.defs.len();
            self.symbols.insert(name.clone(), id);
            self.defs.push(Def {
                name,
                kind,
                dim: Dim::NONE,
                expr: placeholder,
                doc: item.doc.clone(),
                span,
                display_unit: None,
                prelude: item.origin == Origin::Prelude,
            });
            self.def_syntax.push(syntax_expr);
            self.slots.push(Slot::Todo);
            self.def_item.push(i);
        }
        // Tables are read now, so that calls can be checked against their units.
        for id in 0..self.defs.len() {
            let item = &self.items[self.def_item[id]];
            if let StmtKind::Table {
                path,
                x_unit,
                y_unit,
                ..
            } = &item.stmt.kind
            {
                let (path, x_unit, y_unit) = (path.clone(), x_unit.clone(), y_unit.clone());
                let t = self.load_table(id, &path, &x_unit, &y_unit);
                self.defs[id].kind = DefKind::Table(t);
                self.slots[id] = Slot::Done(expr::Typed::error());
            }
        }
    }

    /// Replace parameter values by `--set` overrides, parsed as expressions
    /// of their own.
    fn apply_overrides(&mut self, options: &CheckOptions) {
        for (name, value) in &options.overrides {
            let text = format!("param {name} = {value}\n");
            // Escaped, so that a line break in the option cannot break the
            // location line of a diagnostic.
            let shown: String = format!("--set {name}={value}")
                .chars()
                .flat_map(|c| {
                    let escaped: Vec<char> = if c.is_control() {
                        c.escape_debug().collect()
                    } else {
                        vec![c]
                    };
                    escaped
                })
                .collect();
            let file = self.sources.add(shown, PathBuf::new(), text.clone());
            if let Some(p) = override_shape(name, value, file) {
                self.error(p);
                continue;
            }
            let parsed = match syntax::parse(&text, file) {
                Ok(p) => p,
                Err(problems) => {
                    for p in problems {
                        self.error(p);
                    }
                    continue;
                }
            };
            let mut entries = parsed.entries.into_iter();
            let (Some(EntryKind::Stmt(stmt)), None) =
                (entries.next().map(|e| e.kind), entries.next())
            else {
                // Unreachable after `override_shape`: one line without a
                // comment parses to one statement or to errors.
                continue;
            };
            let stmt: Rc<syntax::Stmt> = Rc::new(*stmt);
            let StmtKind::Param { name: ident, value } = &stmt.kind else {
                continue;
            };
            match self.symbols.get(name).copied() {
                Some(id) if matches!(self.defs[id].kind, DefKind::Param) => {
                    // The override must be of the declared kind; otherwise
                    // every use of the parameter would report a mismatch in
                    // the file, far from the option that caused it.
                    let declared = self.def_type(id);
                    let declared_syntax = self.def_syntax[id].replace(Rc::clone(&stmt));
                    let declared_unit = self.defs[id].display_unit.take();
                    self.slots[id] = Slot::Todo;
                    let given = self.def_type(id);
                    if let (expr::Ty::Num(want), expr::Ty::Num(got)) = (declared.ty, given.ty) {
                        let time_kinds = want.same_base(Dim::TIME) && want.point != got.point;
                        if !want.same_base(got) || time_kinds {
                            self.error(
                                Problem::error(
                                    "H0303",
                                    format!(
                                        "`--set {name}` must be {}, as declared, found {}",
                                        want.words(),
                                        got.words()
                                    ),
                                )
                                .label(value.span, format!("this is {}", got.words()))
                                .label(self.defs[id].span, "declared here")
                                .help(expr::dim_hint(want, got)),
                            );
                            // Keep the declaration, so its uses check as written.
                            self.def_syntax[id] = declared_syntax;
                            self.defs[id].display_unit = declared_unit;
                            self.slots[id] = Slot::Todo;
                            self.def_type(id);
                        }
                    }
                }
                Some(id) => {
                    let word = self.defs[id].kind.word();
                    self.error(
                        Problem::error("H0209", format!("`{name}` is a {word}, not a parameter"))
                            .label(ident.span, "only parameters can be set")
                            .help("declare it with `param` to make it adjustable"),
                    );
                }
                None => {
                    let params: Vec<&str> = self
                        .defs
                        .iter()
                        .filter(|d| matches!(d.kind, DefKind::Param))
                        .map(|d| d.name.as_str())
                        .collect();
                    let mut p = Problem::error("H0201", format!("unknown parameter `{name}`"))
                        .label(ident.span, "no such parameter");
                    p = match nearest(name, params.iter().copied()) {
                        Some(s) => p.help(format!("did you mean `{s}`?")),
                        None => p.help(format!("the parameters are: {}", params.join(", "))),
                    };
                    self.error(p);
                }
            }
        }
    }

    /// Type of a definition's value, checking its expression on first use.
    pub(crate) fn def_type(&mut self, id: DefId) -> expr::Typed {
        match self.slots[id].clone() {
            Slot::Done(t) => return t,
            Slot::InProgress => {
                self.report_cycle(id);
                return expr::Typed::error();
            }
            Slot::Todo => {}
        }
        if matches!(self.defs[id].kind, DefKind::Reservoir { .. }) {
            // A reservoir's value is its inventory: a mass, whatever the
            // initial expression says (checked separately).
            self.slots[id] = Slot::Done(expr::Typed::num(Dim::MASS, false));
        }
        let Some(stmt) = self.def_syntax[id].clone() else {
            return expr::Typed::error();
        };
        let Some(syn) = main_expr(&stmt) else {
            return expr::Typed::error();
        };
        if !matches!(self.slots[id], Slot::Done(_)) {
            self.slots[id] = Slot::InProgress;
        }
        self.stack.push(id);
        let (checked, typed) = self.check_expr(syn);
        self.stack.pop();
        let kind = self.defs[id].kind.clone();
        let result = match kind {
            DefKind::Reservoir { .. } => {
                self.expect_dim(
                    &typed,
                    Dim::MASS,
                    syn.span,
                    "the initial inventory of a reservoir",
                );
                self.expect_constant(&typed, syn.span, "the initial inventory");
                expr::Typed::num(Dim::MASS, false)
            }
            DefKind::State { .. } => {
                self.expect_constant(&typed, syn.span, "the initial value of a state");
                match typed.ty {
                    expr::Ty::Bool => {
                        self.error(
                            Problem::error("H0303", "a state variable must be a number")
                                .label(syn.span, "this is a condition")
                                .help("a condition is true or false; pick a number with `if C then A else B`"),
                        );
                        expr::Typed::error()
                    }
                    _ => expr::Typed {
                        constant: false,
                        ..typed
                    },
                }
            }
            DefKind::Const | DefKind::Param => {
                let what = format!(
                    "the value of {} `{}`",
                    self.defs[id].kind.word(),
                    self.defs[id].name
                );
                self.expect_constant(&typed, syn.span, &what);
                typed
            }
            DefKind::Flux { .. } => {
                if let expr::Ty::Num(d) = typed.ty {
                    if !d.same_base(Dim::MASS_RATE) {
                        self.error(
                            Problem::error(
                                "H0302",
                                format!("the rate of flux `{}` is not mass per time", self.defs[id].name),
                            )
                            .label(syn.span, format!("this is {}", d.words()))
                            .label(self.defs[id].span, "flux defined here")
                            .help("a flux moves water mass: give its rate in mass per time, e.g. `1e12 kg/yr` or `mass / 10 kyr`"),
                        );
                    }
                } else if typed.ty == expr::Ty::Bool {
                    self.expect_dim(&typed, Dim::MASS_RATE, syn.span, "a flux rate");
                }
                expr::Typed::num(Dim::MASS_RATE, false)
            }
            DefKind::Event => {
                if let expr::Ty::Num(d) = typed.ty {
                    self.error(
                        Problem::error("H0306", "an event needs a condition")
                            .label(syn.span, format!("this is a number ({})", d.words()))
                            .help("write a comparison, e.g. `land_fraction(hyps, volume) > 0`"),
                    );
                }
                typed
            }
            _ => typed,
        };
        if let expr::Ty::Num(d) = result.ty {
            self.defs[id].dim = d;
        }
        self.defs[id].expr = checked;
        if self.defs[id].display_unit.is_none() {
            if let syntax::ExprKind::Quantity { unit: Some(u), .. } = &syn.kind {
                if let Ok(unit) =
                    crate::units::combine(u.factors.iter().map(|f| (f.name.as_str(), f.power)))
                {
                    self.defs[id].display_unit = Some((u.text.clone(), unit));
                }
            }
        }
        self.slots[id] = Slot::Done(result);
        result
    }

    /// Constants and parameters are known now; one that is infinite or not
    /// a number (a division by zero, an overflow) is an error here rather
    /// than a failed run later.
    fn check_finite_constants(&mut self) {
        let model = self.partial_model();
        // One evaluator for all: each definition is folded once.
        let mut folder = expr::ConstEval::new(&model);
        for (id, def) in model.defs.iter().enumerate() {
            // Initial inventories and states too: the solver could only
            // report a non-finite start as a failed first step.
            let initial = matches!(def.kind, DefKind::Reservoir { .. } | DefKind::State { .. });
            if def.prelude || !(initial || matches!(def.kind, DefKind::Const | DefKind::Param)) {
                continue;
            }
            if matches!(self.slots[id], Slot::Done(t) if t.ty == expr::Ty::Error) {
                continue;
            }
            if let Some(v) = folder.eval(&def.expr) {
                if !v.is_finite() {
                    let what = if v.is_nan() {
                        "not a number (NaN)"
                    } else {
                        "infinite"
                    };
                    let of = if initial {
                        "the initial value of"
                    } else {
                        "the value of"
                    };
                    self.error(
                        Problem::error(
                            "H0303",
                            format!("{of} {} `{}` is {what}", def.kind.word(), def.name),
                        )
                        .label(def.expr.span, "not finite")
                        .help("look for a division by zero or a result too large for a number"),
                    );
                }
            }
        }
    }

    fn report_cycle(&mut self, id: DefId) {
        let pos = self.stack.iter().position(|&d| d == id).unwrap_or(0);
        let cycle: Vec<DefId> = self.stack[pos..].to_vec();
        let mut names: Vec<String> = cycle.iter().map(|&d| self.defs[d].name.clone()).collect();
        names.push(self.defs[id].name.clone());
        let mut p = Problem::error(
            "H0406",
            format!(
                "definitions depend on each other in a cycle: {}",
                names.join(" -> ")
            ),
        );
        for (i, &d) in cycle.iter().enumerate() {
            let next = &names[i + 1];
            p = p.label(
                self.defs[d].span,
                format!("`{}` uses `{next}`", self.defs[d].name),
            );
        }
        p = p.help(
            "break the cycle: one of these must be a state variable (with a rate) or a constant",
        );
        self.error(p);
    }

    pub(crate) fn expect_constant(&mut self, t: &expr::Typed, span: Span, what: &str) {
        if !t.constant && t.ty != expr::Ty::Error {
            self.error(
                Problem::error("H0407", format!("{what} must be known before the run"))
                    .label(span, "this changes during the run")
                    .help("use numbers, constants and parameters only; a value that changes needs `let` or `state`"),
            );
        }
    }

    pub(crate) fn expect_dim(
        &mut self,
        t: &expr::Typed,
        want: Dim,
        span: Span,
        what: &str,
    ) -> bool {
        match t.ty {
            expr::Ty::Error => false,
            expr::Ty::Bool => {
                self.error(
                    Problem::error(
                        "H0303",
                        format!("{what} must be {}, not a condition", want.words()),
                    )
                    .label(span, "this is a condition")
                    .help("a condition is true or false; pick a number with `if C then A else B`"),
                );
                false
            }
            expr::Ty::Num(d) => {
                // Ages and durations are different kinds of time: where one
                // is wanted, the other is an error.
                let ok = if want.same_base(Dim::TIME) {
                    d.same_base(want) && d.point == want.point
                } else {
                    d.same_base(want)
                };
                if !ok {
                    let mut p = Problem::error(
                        "H0303",
                        format!("{what} must be {}, found {}", want.words(), d.words()),
                    )
                    .label(span, format!("this is {}", d.words()));
                    p = p.help(expr::dim_hint(want, d));
                    self.error(p);
                }
                ok
            }
        }
    }

    /// Capacities, state rates and flux endpoints.
    fn check_def_extras(&mut self) {
        for id in 0..self.defs.len() {
            let item_index = self.def_item[id];
            let stmt = Rc::clone(&self.items[item_index].stmt);
            match &stmt.kind {
                StmtKind::Reservoir { clauses, .. } => {
                    let mut capacity = None;
                    for c in clauses {
                        if c.key.text == "capacity" && capacity.is_none() {
                            self.stack.push(id);
                            let (e, t) = self.check_expr(&c.value);
                            self.stack.pop();
                            self.expect_dim(&t, Dim::MASS, c.value.span, "a capacity");
                            capacity = Some(e);
                        } else {
                            self.bad_clause(&c.key, "reservoir", "capacity");
                        }
                    }
                    self.defs[id].kind = DefKind::Reservoir { capacity };
                }
                StmtKind::State { clauses, name, .. } => {
                    let mut rate = None;
                    for c in clauses {
                        if c.key.text == "rate" && rate.is_none() {
                            self.stack.push(id);
                            let (e, t) = self.check_expr(&c.value);
                            self.stack.pop();
                            let want = self.defs[id]
                                .dim
                                .plain()
                                .per(Dim::TIME)
                                .unwrap_or(Dim::NONE);
                            let what = format!("the rate of `{}`", self.defs[id].name);
                            self.expect_dim(&t, want, c.value.span, &what);
                            rate = Some(e);
                        } else {
                            self.bad_clause(&c.key, "state", "rate");
                        }
                    }
                    match rate {
                        Some(r) => self.defs[id].kind = DefKind::State { rate: r },
                        None => self.error(
                            Problem::error("H0401", format!("state `{}` has no rate", name.text))
                                .label(name.span, "no `, rate = ...`")
                                .help("add `, rate = EXPR` (its dimension per time); a prescribed history is a `let` of `age`"),
                        ),
                    }
                }
                StmtKind::Flux { from, to, .. } => {
                    let a = self.endpoint(from);
                    let b = self.endpoint(to);
                    if let (Some(a), Some(b)) = (a, b) {
                        if a == b {
                            self.error(
                                Problem::error("H0405", "a flux must connect two different places")
                                    .label(to.span, "same as the source")
                                    .help("a flux moves water from one reservoir to another, or to or from `outside`"),
                            );
                        }
                        if let DefKind::Flux { from, to, .. } = &mut self.defs[id].kind {
                            *from = a;
                            *to = b;
                        }
                    }
                }
                StmtKind::Output { unit: Some(u), .. } => {
                    match crate::units::combine(
                        u.factors.iter().map(|f| (f.name.as_str(), f.power)),
                    ) {
                        Ok(unit) => {
                            let d = self.defs[id].dim;
                            if !unit.dim.same_base(d) {
                                self.error(
                                    Problem::error(
                                        "H0301",
                                        format!(
                                            "cannot show {} in `{}` ({})",
                                            d.words(),
                                            u.text,
                                            unit.dim.words()
                                        ),
                                    )
                                    .label(u.span, format!("a unit of {}", unit.dim.words()))
                                    .help(format!("use a unit of {}", d.words())),
                                );
                            } else {
                                self.defs[id].display_unit = Some((u.text.clone(), unit));
                            }
                        }
                        Err(e) => self.unit_error(u, e),
                    }
                }
                _ => {}
            }
        }
    }

    /// A clause that is not the one `word` statements take, or is given twice.
    fn bad_clause(&mut self, key: &syntax::Ident, word: &str, allowed: &str) {
        let p = if key.text == allowed {
            Problem::error("H0207", format!("`{allowed}` is given twice"))
                .label(key.span, "given again here")
                .help(format!("a {word} has one `{allowed}`; delete the other"))
        } else {
            let p = Problem::error("H0207", format!("a {word} takes no `{}`", key.text))
                .label(key.span, format!("not a clause of a {word}"));
            match nearest(&key.text, [allowed]) {
                Some(s) => p.help(format!("did you mean `{s}`?")),
                None => p.help(format!("a {word} takes only `, {allowed} = ...`")),
            }
        };
        self.error(p);
    }

    fn endpoint(&mut self, ident: &syntax::Ident) -> Option<Endpoint> {
        if ident.text == "outside" {
            return Some(Endpoint::Outside);
        }
        match self.symbols.get(&ident.text).copied() {
            Some(id) if matches!(self.defs[id].kind, DefKind::Reservoir { .. }) => {
                Some(Endpoint::Reservoir(id))
            }
            Some(id) => {
                let word = self.defs[id].kind.word();
                self.error(
                    Problem::error(
                        "H0405",
                        format!("`{}` is a {word}, not a reservoir", ident.text),
                    )
                    .label(ident.span, "fluxes connect reservoirs")
                    .label(self.defs[id].span, "defined here")
                    .help("declare it with `reservoir`, or use `outside` for a source or sink"),
                );
                None
            }
            None => {
                let names: Vec<String> = self
                    .reservoirs_named()
                    .into_iter()
                    .chain(std::iter::once("outside".to_owned()))
                    .collect();
                let mut p = Problem::error("H0405", format!("unknown reservoir `{}`", ident.text))
                    .label(ident.span, "not declared");
                p = match nearest(&ident.text, names.iter().map(String::as_str)) {
                    Some(s) => p.help(format!("did you mean `{s}`?")),
                    None => p.help("declare it with `reservoir NAME = INITIAL`, or use `outside`"),
                };
                self.error(p);
                None
            }
        }
    }

    fn reservoirs_named(&self) -> Vec<String> {
        self.defs
            .iter()
            .filter(|d| matches!(d.kind, DefKind::Reservoir { .. }))
            .map(|d| d.name.clone())
            .collect()
    }
}

/// The expression whose depth counts when a definition is used: a value's
/// formula; a reservoir's capacity (inlined by `fill`, `capacity` and
/// `excess`). A reference to a reservoir or a state reads a register and
/// ends the walk.
/// H0415 for a `--set NAME=VALUE` that is not one expression on one line:
/// a line break would smuggle further statements past the option (they
/// were dropped, while the manifest recorded the whole text), and a
/// comment would be recorded in the manifest as part of the value. `file`
/// holds `param NAME = VALUE`, so spans are offsets into that text.
fn override_shape(name: &str, value: &str, file: u32) -> Option<Problem> {
    let at = |start: usize, end: usize| Span {
        file,
        start: start as u32,
        end: end as u32,
    };
    let value_start = "param ".len() + name.len() + " = ".len();
    if let Some(i) = name.find(|c: char| c.is_control() && c != '\t') {
        let start = "param ".len();
        return Some(
            Problem::error("H0415", "a `--set` name must be one name on one line")
                .label(
                    at(start + i, start + name.len()),
                    "a line break or control character",
                )
                .help("give each parameter its own `--set NAME=VALUE`"),
        );
    }
    let (i, problem) = if let Some(i) = value.find(|c: char| c.is_control() && c != '\t') {
        (
            i,
            Problem::error(
                "H0415",
                format!("`--set {name}` must be one expression on one line"),
            )
            .help("give each parameter its own `--set NAME=VALUE`; other statements belong in the scenario file"),
        )
    } else if let Some(i) = value.find('#') {
        (
            i,
            Problem::error("H0415", format!("`--set {name}` cannot carry a comment")).help(
                "leave out the `# ...`: the value is recorded in the manifest exactly as given",
            ),
        )
    } else {
        return None;
    };
    let what = if value[i..].starts_with('#') {
        "a comment"
    } else {
        "a line break or control character"
    };
    Some(problem.label(at(value_start + i, value_start + value.len()), what))
}

fn body(d: &Def) -> Option<&Expr> {
    match &d.kind {
        DefKind::Reservoir { capacity } => capacity.as_ref(),
        DefKind::State { .. } | DefKind::Table(_) => None,
        _ => Some(&d.expr),
    }
}

fn is_register(defs: &[Def], d: DefId) -> bool {
    matches!(
        defs[d].kind,
        DefKind::Reservoir { .. } | DefKind::State { .. } | DefKind::Table(_)
    )
}

/// Nesting depth of a checked expression, a reference counting as the
/// depth of what it refers to.
fn expr_depth(defs: &[Def], e: &Expr, def_depth: &dyn Fn(DefId) -> usize) -> usize {
    let sub = |x: &Expr| expr_depth(defs, x, def_depth);
    1 + match &e.kind {
        ExprKind::Num(_) | ExprKind::Age | ExprKind::Time => 0,
        ExprKind::Ref(d) if is_register(defs, *d) => 0,
        ExprKind::Ref(d) => def_depth(*d),
        ExprKind::Neg(x) | ExprKind::Not(x) => sub(x),
        ExprKind::Binary(_, a, b) => sub(a).max(sub(b)),
        ExprKind::If(c, a, b) => sub(c).max(sub(a)).max(sub(b)),
        ExprKind::Call(f, args) => {
            let inner = match f {
                Builtin::Capacity(r) | Builtin::Fill(r) | Builtin::Excess(r) => def_depth(*r),
                _ => 0,
            };
            args.iter().map(sub).max().unwrap_or(0).max(inner)
        }
    }
}

/// Definitions whose expressions an expression pulls in when compiled.
fn expr_refs(defs: &[Def], e: &Expr, out: &mut Vec<DefId>) {
    match &e.kind {
        ExprKind::Num(_) | ExprKind::Age | ExprKind::Time => {}
        ExprKind::Ref(d) => {
            if !is_register(defs, *d) {
                out.push(*d)
            }
        }
        ExprKind::Neg(x) | ExprKind::Not(x) => expr_refs(defs, x, out),
        ExprKind::Binary(_, a, b) => {
            expr_refs(defs, a, out);
            expr_refs(defs, b, out);
        }
        ExprKind::If(c, a, b) => {
            expr_refs(defs, c, out);
            expr_refs(defs, a, out);
            expr_refs(defs, b, out);
        }
        ExprKind::Call(f, args) => {
            if let Builtin::Capacity(r) | Builtin::Fill(r) | Builtin::Excess(r) = f {
                out.push(*r);
            }
            for a in args {
                expr_refs(defs, a, out);
            }
        }
    }
}

/// The expression that gives a definition statement its value (a
/// reservoir's or state's initial value, a flux's rate).
fn main_expr(stmt: &syntax::Stmt) -> Option<&syntax::Expr> {
    match &stmt.kind {
        StmtKind::Const { value, .. }
        | StmtKind::Param { value, .. }
        | StmtKind::Let { value, .. }
        | StmtKind::Output { value, .. } => Some(value),
        StmtKind::Event { condition, .. } => Some(condition),
        StmtKind::Reservoir { initial, .. } | StmtKind::State { initial, .. } => Some(initial),
        StmtKind::Flux { rate, .. } => Some(rate),
        _ => None,
    }
}

fn item_name(stmt: &syntax::Stmt) -> Option<(String, Span)> {
    let id = match &stmt.kind {
        StmtKind::Const { name, .. }
        | StmtKind::Param { name, .. }
        | StmtKind::Let { name, .. }
        | StmtKind::Output { name, .. }
        | StmtKind::Event { name, .. }
        | StmtKind::Table { name, .. }
        | StmtKind::Reservoir { name, .. }
        | StmtKind::State { name, .. }
        | StmtKind::Flux { name, .. } => name,
        _ => return None,
    };
    Some((id.text.clone(), id.span))
}

mod header;
