//! Loading: reading the scenario, its includes and tables (bounded,
//! regular files only, inside the project root), and the files a rerun
//! hands over in memory.

use super::*;

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

pub(super) fn display_name(path: &Path) -> String {
    path.to_string_lossy().replace('\\', "/")
}

/// Why a scenario, an include or a table could not be taken as text. Its
/// words complete a sentence naming the file ("cannot read table `t`: ...").
#[derive(Debug)]
pub enum SourceError {
    /// Not a readable regular file, or larger than the limit.
    Read(crate::fsutil::ReadError),
    /// Bytes that are not UTF-8, the first bad one at `offset`.
    NotUtf8 { offset: usize },
    /// Under `hadal verify`: a file the manifest does not record.
    NotRecorded,
    /// Handed over in memory, but longer than the limit.
    TooLarge { len: u64, limit: u64 },
    /// The scenario with everything it reads would pass [`MAX_TOTAL_BYTES`].
    OverTotal,
}

impl std::fmt::Display for SourceError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            SourceError::Read(e) => write!(f, "{e}"),
            SourceError::NotUtf8 { offset } => {
                write!(f, "is not UTF-8 text (bad byte at offset {offset})")
            }
            SourceError::NotRecorded => {
                f.write_str("is not one of the input files recorded in the manifest")
            }
            SourceError::TooLarge { len, limit } => {
                write!(f, "is {len} bytes, more than the limit of {limit} bytes")
            }
            SourceError::OverTotal => write!(
                f,
                "the scenario with its includes and tables would pass {MAX_TOTAL_BYTES} bytes read"
            ),
        }
    }
}

/// Read a scenario file: size-limited, UTF-8, byte-order mark removed.
pub fn read_text(path: &Path) -> Result<String, SourceError> {
    read_limited(path, MAX_SOURCE_BYTES)
}

/// Read a regular file of at most `limit` bytes as text (UTF-8, byte-order
/// mark blanked). Pipes, devices and sockets are refused unread: opening a
/// pipe with no writer would block forever (see
/// [`crate::fsutil::read_bounded`]).
pub(crate) fn read_limited(path: &Path, limit: u64) -> Result<String, SourceError> {
    let bytes = crate::fsutil::read_bounded(path, limit).map_err(SourceError::Read)?;
    decode_source(bytes)
}

/// The text hadal reads from a file's bytes: UTF-8, with a leading
/// byte-order mark replaced by three spaces. Shared by files read from disk
/// and files handed over in memory ([`InputFiles`]), so both give the same
/// text, hence the same model and fingerprints.
pub fn decode_source(bytes: Vec<u8>) -> Result<String, SourceError> {
    let mut text = String::from_utf8(bytes).map_err(|e| SourceError::NotUtf8 {
        offset: e.utf8_error().valid_up_to(),
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
    fn text(&self, path: &Path, limit: u64) -> Result<String, SourceError> {
        let real = std::fs::canonicalize(path).unwrap_or_else(|_| path.to_owned());
        let bytes = self.files.get(&real).ok_or(SourceError::NotRecorded)?;
        if bytes.len() as u64 > limit {
            return Err(SourceError::TooLarge {
                len: bytes.len() as u64,
                limit,
            });
        }
        decode_source(bytes.to_vec())
    }
}

pub(crate) fn io_words(e: &std::io::Error) -> String {
    crate::fsutil::io_words(e)
}

impl Checker {
    /// Count `len` more bytes read for this scenario; `Err` with the reason
    /// when that would pass [`MAX_TOTAL_BYTES`].
    pub(crate) fn take_bytes(&mut self, len: usize) -> Result<(), SourceError> {
        let total = self.bytes_read.saturating_add(len as u64);
        if total > MAX_TOTAL_BYTES {
            return Err(SourceError::OverTotal);
        }
        self.bytes_read = total;
        Ok(())
    }

    /// Read an included file or a table, from the disk or from the
    /// in-memory inputs.
    pub(crate) fn read_input(&self, path: &Path, limit: u64) -> Result<String, SourceError> {
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
    pub(super) fn load(&mut self, file: u32, origin: Origin, chain: &mut Vec<PathBuf>) {
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

    pub(super) fn include(
        &mut self,
        from: u32,
        written: &str,
        span: Span,
        chain: &mut Vec<PathBuf>,
    ) {
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
}
