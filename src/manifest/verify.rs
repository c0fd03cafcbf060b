//! Opening a manifest someone else wrote, for `hadal verify`.
//!
//! A manifest is untrusted input: it names the files to read and the
//! folder they are in. [`open`] reads it with a size limit, checks the form
//! of every path it names before any other file is opened, confines them to
//! the project root it records (which must hold the manifest), resolves
//! symbolic links before judging containment, and reads every recorded
//! input once, comparing its hash. The rerun then checks and solves from
//! those very bytes ([`Opened::check`]): the scenario that runs is the one
//! whose hash the manifest records, and no other file is read.
//!
//! Codes H0801 to H0808 are documented in docs/errors.md.

use std::path::{Path, PathBuf};

use super::{hash_bytes, Manifest};
use crate::check::{self, CheckError, CheckOptions, Checked, InputFiles};
use crate::diagnostic::Problem;

/// Largest manifest read. Real ones are a few kilobytes.
pub const MAX_MANIFEST_BYTES: u64 = 16 * 1024 * 1024;

/// Why a manifest was refused, which decides the exit code: an input whose
/// content differs from the recorded one is a failed verification (exit
/// 1); everything else means the check could not be made (exit 2).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RefusalKind {
    /// The manifest cannot be read, names unsafe paths, or an input is
    /// missing or unreadable.
    Unusable,
    /// Every input could be read, and some differ from the recorded ones.
    Differs,
}

#[derive(Debug)]
pub struct Refusal {
    pub kind: RefusalKind,
    pub problems: Vec<Problem>,
}

impl Refusal {
    fn unusable(problems: Vec<Problem>) -> Refusal {
        Refusal {
            kind: RefusalKind::Unusable,
            problems,
        }
    }
}

/// A manifest whose paths are confined and whose inputs all match.
#[derive(Debug)]
pub struct Opened {
    pub manifest: Manifest,
    /// The manifest's folder, canonical.
    pub dir: PathBuf,
    /// The project root, canonical.
    pub root: PathBuf,
    /// The scenario file, canonical.
    pub scenario: PathBuf,
    scenario_text: String,
    inputs: InputFiles,
}

/// A published output file beside the manifest.
#[derive(Debug)]
pub enum Published {
    Absent,
    /// Larger than the caller's limit: not read.
    TooLarge(u64),
    Bytes(Vec<u8>),
}

/// `s` with control characters escaped, so that a name or path taken from
/// a manifest cannot drive the terminal.
pub fn shown(s: &str) -> String {
    s.chars()
        .map(|c| {
            if c.is_control() {
                c.escape_default().to_string()
            } else {
                c.to_string()
            }
        })
        .collect()
}

fn unusable(manifest: &Path, why: &str) -> Problem {
    Problem::error(
        "H0801",
        format!(
            "cannot use the manifest {}: {why}",
            shown(&manifest.to_string_lossy())
        ),
    )
    .help(format!(
        "give the `manifest.json` that `hadal run` wrote: a regular file of at most {MAX_MANIFEST_BYTES} bytes"
    ))
}

/// Read at most `limit` bytes of a regular file through the one bounded
/// reader (`fsutil::open_regular`): pipes, devices and folders are refused
/// unread, and with `follow` false a symbolic link is refused too.
pub(crate) fn read_regular(
    path: &Path,
    limit: u64,
    follow: bool,
) -> Result<Vec<u8>, crate::fsutil::ReadError> {
    let (file, len) = crate::fsutil::open_regular(path, follow)?;
    crate::fsutil::read_to_limit(file, len, limit)
}

/// Why a manifest could not be read.
#[derive(Debug, Clone, PartialEq)]
pub enum ManifestError {
    /// Not a readable regular file within the size limit.
    Read(String),
    /// Not JSON of a hadal manifest.
    NotAManifest(String),
    /// A manifest of another format version.
    Format { found: String },
}

impl std::fmt::Display for ManifestError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ManifestError::Read(why) => f.write_str(why),
            ManifestError::NotAManifest(why) => write!(f, "not a hadal manifest: {why}"),
            ManifestError::Format { found } => write!(
                f,
                "manifest format `{}`, expected `{}`",
                shown(found),
                super::FORMAT
            ),
        }
    }
}

impl std::error::Error for ManifestError {}

/// Read and parse a manifest, size-limited; only a regular file.
pub(crate) fn read_manifest(path: &Path) -> Result<Manifest, ManifestError> {
    let bytes = read_regular(path, MAX_MANIFEST_BYTES, true)
        .map_err(|e| ManifestError::Read(e.to_string()))?;
    let m: Manifest =
        serde_json::from_slice(&bytes).map_err(|e| ManifestError::NotAManifest(e.to_string()))?;
    if m.format != super::FORMAT {
        return Err(ManifestError::Format { found: m.format });
    }
    Ok(m)
}

/// What is wrong with the form of a path written in a manifest, if
/// anything: only relative paths of plain names separated by `/`, as
/// `hadal run` writes them. `bare` asks for a single file name.
pub fn path_form(p: &str, bare: bool) -> Option<&'static str> {
    if let Some(why) = basic_form(p) {
        return Some(why);
    }
    for part in p.split('/') {
        match part {
            "" => return Some("has an empty component (`//` or a trailing `/`)"),
            "." => return Some("has a `.` component"),
            ".." => return Some("has a `..` component"),
            _ => {}
        }
    }
    if bare && p.contains('/') {
        return Some("is not a plain file name");
    }
    // Whatever this platform makes of it, it must be plain names only.
    if !Path::new(p)
        .components()
        .all(|c| matches!(c, std::path::Component::Normal(_)))
    {
        return Some("is not a plain relative path on this system");
    }
    None
}

/// The checks of [`path_form`] that do not look at components.
fn basic_form(p: &str) -> Option<&'static str> {
    let b = p.as_bytes();
    if p.is_empty() {
        return Some("is empty");
    }
    if p.contains('\0') {
        return Some("contains a NUL byte");
    }
    if p.chars().any(char::is_control) {
        return Some("contains a control character");
    }
    if p.contains('\\') {
        return Some("contains a backslash (a Windows separator or prefix)");
    }
    if p.starts_with('/') {
        return Some("is absolute");
    }
    if b.len() >= 2 && b[0].is_ascii_alphabetic() && b[1] == b':' {
        return Some("starts with a drive prefix");
    }
    None
}

fn form_problem(manifest: &Path, pointer: &str, p: &str, why: &str) -> Problem {
    Problem::error(
        "H0802",
        format!(
            "{} at {pointer}: the path `{}` {why}",
            shown(&manifest.to_string_lossy()),
            shown(p)
        ),
    )
    .help("a manifest names its files by relative paths below its project root (outputs by their bare names beside it), as `hadal run` writes them; this one was edited or written by another program, so nothing it names was opened")
}

/// Check the form of every path in `m`, before anything is opened.
fn check_forms(path: &Path, m: &Manifest) -> Vec<Problem> {
    let mut out = Vec::new();
    let root = &m.run.project_root_from_manifest;
    if let Some(why) = basic_form(root) {
        out.push(form_problem(
            path,
            "/run/project_root_from_manifest",
            root,
            why,
        ));
    } else if root != "." && !root.split('/').all(|c| c == "..") {
        let mut p = form_problem(
            path,
            "/run/project_root_from_manifest",
            root,
            "is not `.` or a chain of `..`: the project root must hold the manifest",
        );
        p.code = "H0803";
        p.help = Some(root_help());
        out.push(p);
    }
    let scenario = &m.compared.scenario.path;
    if let Some(why) = path_form(scenario, false) {
        out.push(form_problem(path, "/compared/scenario/path", scenario, why));
    }
    for (i, input) in m.compared.inputs.iter().enumerate() {
        if let Some(why) = path_form(&input.path, false) {
            let ptr = format!("/compared/inputs/{i}/path");
            out.push(form_problem(path, &ptr, &input.path, why));
        }
    }
    for (i, output) in m.compared.outputs.iter().enumerate() {
        if let Some(why) = path_form(&output.path, true) {
            let ptr = format!("/compared/outputs/{i}/path");
            out.push(form_problem(path, &ptr, &output.path, why));
        }
    }
    out
}

fn root_help() -> String {
    "the project root is the manifest's folder or one above it, inside the versioned project (`.git`) that holds the manifest; keep the run's folder where `hadal run` wrote it".into()
}

/// The nearest folder at or above `dir` holding a `.git`.
fn versioned_project(dir: &Path) -> Option<&Path> {
    dir.ancestors()
        .find(|d| std::fs::symlink_metadata(d.join(".git")).is_ok())
}

/// Open the manifest at `path` for verification: see the module comment.
pub fn open(path: &Path) -> Result<Opened, Refusal> {
    let m = read_manifest(path)
        .map_err(|why| Refusal::unusable(vec![unusable(path, &why.to_string())]))?;
    let forms = check_forms(path, &m);
    if !forms.is_empty() {
        return Err(Refusal::unusable(forms));
    }
    let shown_manifest = shown(&path.to_string_lossy());
    // The manifest was just read, so it resolves.
    let real = std::fs::canonicalize(path)
        .map_err(|e| Refusal::unusable(vec![unusable(path, &check::io_words(&e))]))?;
    let dir = real.parent().unwrap_or(Path::new("/")).to_owned();
    let recorded = &m.run.project_root_from_manifest;
    let up = recorded.split('/').filter(|c| *c == "..").count();
    let root_problem = |why: String| {
        Refusal::unusable(vec![Problem::error(
            "H0803",
            format!(
                "{shown_manifest} at /run/project_root_from_manifest: the project root `{}` {why}",
                shown(recorded)
            ),
        )
        .help(root_help())])
    };
    let Some(root) = dir.ancestors().nth(up).map(Path::to_owned) else {
        return Err(root_problem(format!(
            "climbs {up} folders above the manifest's folder, past the top of the file system"
        )));
    };
    if let Some(project) = versioned_project(&dir) {
        if !root.starts_with(project) {
            return Err(root_problem(format!(
                "lies above {}, the versioned project that holds the manifest",
                project.display()
            )));
        }
    }

    let c = &m.compared;
    let Some(scenario_index) = c.inputs.iter().position(|i| i.path == c.scenario.path) else {
        return Err(Refusal::unusable(vec![Problem::error(
            "H0807",
            format!(
                "{shown_manifest} at /compared/scenario/path: the scenario `{}` is not one of the manifest's inputs",
                shown(&c.scenario.path)
            ),
        )
        .help("the file that runs must be one whose hash the manifest records; this manifest was edited, so nothing was run")]));
    };
    // Sizes as recorded, before reading: what is read is bounded by them.
    let mut total: u64 = 0;
    let mut limits = Vec::new();
    for (i, input) in c.inputs.iter().enumerate() {
        total = total.saturating_add(input.bytes);
        if input.bytes > check::MAX_FILE_BYTES {
            limits.push(Problem::error(
                "H0808",
                format!(
                    "{shown_manifest} at /compared/inputs/{i}/bytes: the input `{}` is recorded as {} bytes, more than the limit of {} bytes for one file",
                    shown(&input.path), input.bytes, check::MAX_FILE_BYTES
                ),
            ).help("no scenario that `hadal run` accepts has such an input; this manifest was edited"));
        }
    }
    if total > check::MAX_TOTAL_BYTES && limits.is_empty() {
        limits.push(Problem::error(
            "H0808",
            format!(
                "{shown_manifest} at /compared/inputs: the inputs are recorded as {total} bytes together, more than the limit of {} bytes read for one scenario",
                check::MAX_TOTAL_BYTES
            ),
        ).help("no scenario that `hadal run` accepts has such inputs; this manifest was edited"));
    }
    if !limits.is_empty() {
        return Err(Refusal::unusable(limits));
    }

    // Resolve every input (symbolic links included) inside the root,
    // then read each once.
    let mut missing = Vec::new();
    let mut differs = Vec::new();
    let mut inputs = InputFiles::default();
    let mut scenario: Option<(PathBuf, Vec<u8>)> = None;
    for (i, input) in c.inputs.iter().enumerate() {
        let what = if i == scenario_index {
            "the scenario"
        } else {
            "input"
        };
        let name = shown(&input.path);
        let joined = root.join(&input.path);
        let fail = |why: String| {
            Problem::error("H0805", format!("{shown_manifest}: {what} `{name}` {why}"))
                .help("restore the inputs the manifest names; results can only be verified from the same inputs")
        };
        let real = match std::fs::canonicalize(&joined) {
            Ok(r) => r,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                missing.push(fail(format!(
                    "is missing (expected at {})",
                    joined.display()
                )));
                continue;
            }
            Err(e) => {
                missing.push(fail(format!("cannot be resolved: {}", check::io_words(&e))));
                continue;
            }
        };
        if !real.starts_with(&root) {
            missing.push(
                Problem::error(
                    "H0804",
                    format!(
                        "{shown_manifest} at /compared/inputs/{i}/path: {what} `{name}` leads outside the project root {} (through a symbolic link)",
                        root.display()
                    ),
                )
                .help("verify reads only files inside the project root that holds the manifest; nothing outside it was opened"),
            );
            continue;
        }
        match std::fs::metadata(&real) {
            Ok(meta) if meta.is_file() && meta.len() != input.bytes => {
                differs.push(differ(
                    &shown_manifest,
                    what,
                    &name,
                    format!(
                        "differs from the one recorded: {} bytes instead of {}",
                        meta.len(),
                        input.bytes
                    ),
                ));
                continue;
            }
            _ => {}
        }
        // Bounded by the recorded size: a file that grew meanwhile is
        // refused, not read whole.
        let bytes = match read_regular(&real, input.bytes, false) {
            Ok(b) => b,
            Err(why) => {
                missing.push(fail(why.to_string()));
                continue;
            }
        };
        let h = hash_bytes(&bytes);
        if h != input.blake3 && !bom_view_matches(&bytes, &input.blake3) {
            differs.push(differ(
                &shown_manifest,
                what,
                &name,
                format!(
                    "differs from the one recorded: blake3 {} instead of {} ({} bytes instead of {})",
                    &h[..16],
                    shown(input.blake3.get(..16).unwrap_or(&input.blake3)),
                    bytes.len(),
                    input.bytes
                ),
            ));
            continue;
        }
        if i == scenario_index {
            scenario = Some((real.clone(), bytes.clone()));
        }
        inputs.insert(real, bytes);
    }
    if !missing.is_empty() || !differs.is_empty() {
        let kind = if missing.is_empty() {
            RefusalKind::Differs
        } else {
            RefusalKind::Unusable
        };
        missing.extend(differs);
        return Err(Refusal {
            kind,
            problems: missing,
        });
    }
    // The scenario is an input, and every input was read.
    let (scenario, bytes) = scenario.unwrap_or_default();
    let scenario_text = check::decode_source(bytes).map_err(|why| {
        Refusal::unusable(vec![Problem::error(
            "H0805",
            format!(
                "{shown_manifest}: the scenario `{}` {why}",
                shown(&c.scenario.path)
            ),
        )
        .help("a scenario is UTF-8 text")])
    })?;
    Ok(Opened {
        manifest: m,
        dir,
        root,
        scenario,
        scenario_text,
        inputs,
    })
}

fn differ(manifest: &str, what: &str, name: &str, why: String) -> Problem {
    Problem::error("H0806", format!("{manifest}: {what} `{name}` {why}")).help(
        "restore the inputs the manifest names; results can only be verified from the same inputs (nothing was run)",
    )
}

/// `hadal run` records the hash of a file's text as read, where a leading
/// byte-order mark is three spaces (`check::decode_source`); accept that
/// view of a file with such a mark too.
fn bom_view_matches(bytes: &[u8], recorded: &str) -> bool {
    if !bytes.starts_with(b"\xef\xbb\xbf") {
        return false;
    }
    let mut view = bytes.to_vec();
    view[..3].copy_from_slice(b"   ");
    hash_bytes(&view) == recorded
}

impl Opened {
    /// Check the scenario from the bytes that were hash-checked, reading
    /// includes and tables only from the recorded inputs, with the
    /// manifest's overrides.
    pub fn check(&self) -> Result<Checked, CheckError> {
        let overrides = self
            .manifest
            .compared
            .overrides
            .iter()
            .map(|o| (o.name.clone(), o.value.clone()))
            .collect();
        check::check_text_with_inputs(
            &self.manifest.compared.scenario.path,
            &self.scenario,
            &self.scenario_text,
            &self.root,
            &CheckOptions { overrides },
            &self.inputs,
        )
    }

    /// The published output `name` beside the manifest, read if it is at
    /// most `limit` bytes. It must be a regular file inside the manifest's
    /// folder (a symbolic link out of it is refused, H0804).
    pub fn published(&self, name: &str, limit: u64) -> Result<Published, Problem> {
        published(&self.dir, name, limit)
    }
}

/// As [`Opened::published`], for the folder `dir` (canonical) of a
/// manifest whose output names passed [`path_form`].
pub fn published(dir: &Path, name: &str, limit: u64) -> Result<Published, Problem> {
    let shown_name = shown(name);
    if let Some(why) = path_form(name, true) {
        return Err(
            Problem::error("H0802", format!("the output path `{shown_name}` {why}"))
                .help("outputs are named by their bare file names beside the manifest"),
        );
    }
    let joined = dir.join(name);
    let real = match std::fs::canonicalize(&joined) {
        Ok(r) => r,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Ok(Published::Absent),
        Err(e) => {
            return Err(Problem::error(
                "H0805",
                format!(
                    "the published `{shown_name}` cannot be resolved: {}",
                    check::io_words(&e)
                ),
            )
            .help("check the permissions of the run's folder"))
        }
    };
    if !real.starts_with(dir) {
        return Err(Problem::error(
            "H0804",
            format!(
                "the published `{shown_name}` leads outside the manifest's folder {} (through a symbolic link)",
                dir.display()
            ),
        )
        .help("published outputs are read only from the folder that holds the manifest; nothing outside it was opened"));
    }
    if let Ok(m) = std::fs::metadata(&real) {
        if m.is_file() && m.len() > limit {
            return Ok(Published::TooLarge(m.len()));
        }
    }
    read_regular(&real, limit, false)
        .map(Published::Bytes)
        .map_err(|why| {
            Problem::error("H0805", format!("the published `{shown_name}` {why}"))
                .help("published outputs are regular files beside the manifest")
        })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn path_forms() {
        for ok in ["scenarios/a.hadal", "a", "x/y/z.csv", "a..b/c"] {
            assert_eq!(path_form(ok, false), None, "{ok}");
        }
        for (bad, why) in [
            ("", "is empty"),
            ("/etc/passwd", "is absolute"),
            ("../x", "has a `..` component"),
            ("a/../../x", "has a `..` component"),
            ("./a", "has a `.` component"),
            ("a//b", "has an empty component (`//` or a trailing `/`)"),
            ("a/", "has an empty component (`//` or a trailing `/`)"),
            ("C:/x", "starts with a drive prefix"),
            ("c:x", "starts with a drive prefix"),
            (
                "\\\\server\\share\\x",
                "contains a backslash (a Windows separator or prefix)",
            ),
            ("a\0b", "contains a NUL byte"),
            ("a\u{1b}[2Jb", "contains a control character"),
        ] {
            assert_eq!(path_form(bad, false), Some(why), "{bad:?}");
        }
        assert_eq!(path_form("series.csv", true), None);
        assert_eq!(
            path_form("a/series.csv", true),
            Some("is not a plain file name")
        );
    }

    #[test]
    fn shown_escapes_control_characters() {
        assert_eq!(shown("a\u{1b}[31mb\n"), "a\\u{1b}[31mb\\n");
        assert_eq!(shown("plain ä"), "plain ä");
    }
}

// ---- comparing a rerun with the published outputs ------------------------

/// One way a recomputed output departs from what a manifest records, in
/// the order found. Paths, columns, ages and values are as the manifest
/// and files hold them (show them through [`shown`]).
#[derive(Debug, Clone, PartialEq)]
pub enum Drift {
    /// The manifest lists an output the rerun no longer makes.
    NotProduced { path: String },
    /// The published file is far larger than the recomputed one; not read.
    PublishedTooLarge {
        path: String,
        bytes: u64,
        recomputed: usize,
    },
    /// The recomputed file's hash differs and there is no published file
    /// to compare values with.
    NoPublished {
        path: String,
        recomputed_hash: String,
        recorded_hash: String,
    },
    /// The published file does not match its manifest, while the rerun does.
    EditedAfterRun { path: String },
    /// The tables differ in shape (columns, rows).
    Shape { path: String, what: String },
    /// The first differing cell, and the largest relative difference.
    Values {
        path: String,
        column: String,
        age: String,
        published: String,
        recomputed: String,
        max_rel: f64,
    },
}

/// How a rerun's outputs compare with a manifest's.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Comparison {
    pub drift: Vec<Drift>,
    /// Whether the result drifted (beyond `rtol` when one was given);
    /// [`Drift::EditedAfterRun`] alone does not decide it.
    pub drifted: bool,
    /// The largest relative difference accepted under `rtol` (0 when every
    /// output is byte-identical).
    pub tolerated: f64,
}

/// Compare recomputed outputs (name, bytes) with the outputs `opened`
/// records and publishes beside it; values within `rtol` (relative) are
/// accepted when the shapes agree and the published file is the one
/// recorded. An unreadable published file is an error (exit 2).
pub fn compare(
    opened: &Opened,
    fresh: &[(&str, Vec<u8>)],
    rtol: Option<f64>,
) -> Result<Comparison, Problem> {
    let mut out = Comparison::default();
    for rec in &opened.manifest.compared.outputs {
        let path = rec.path.clone();
        let Some((_, bytes)) = fresh.iter().find(|(n, _)| *n == rec.path) else {
            out.drift.push(Drift::NotProduced { path });
            out.drifted = true;
            continue;
        };
        // A published file is compared with the recomputed one, so twice
        // its size (plus room for longer numbers) bounds what is read.
        let limit = (bytes.len() as u64).saturating_mul(2) + (1 << 20);
        let published = match opened.published(&rec.path, limit)? {
            Published::Bytes(b) => Some(b),
            Published::Absent => None,
            Published::TooLarge(n) => {
                out.drift.push(Drift::PublishedTooLarge {
                    path,
                    bytes: n,
                    recomputed: bytes.len(),
                });
                out.drifted = true;
                continue;
            }
        };
        let fresh_hash = hash_bytes(bytes);
        let pub_ok = published
            .as_ref()
            .is_none_or(|b| hash_bytes(b) == rec.blake3);
        if fresh_hash == rec.blake3 && pub_ok {
            continue;
        }
        // Compare the values against the published file when there is one.
        let Some(reference) = published else {
            out.drift.push(Drift::NoPublished {
                path,
                recomputed_hash: fresh_hash,
                recorded_hash: rec.blake3.clone(),
            });
            out.drifted = true;
            continue;
        };
        let d = super::diff_csv(&reference, bytes);
        if !pub_ok && fresh_hash == rec.blake3 {
            out.drift.push(Drift::EditedAfterRun { path: path.clone() });
        }
        let within = rtol.is_some_and(|r| d.shape.is_empty() && d.max_rel() <= r) && pub_ok;
        if within {
            out.tolerated = out.tolerated.max(d.max_rel());
            continue;
        }
        out.drifted = true;
        for s in &d.shape {
            out.drift.push(Drift::Shape {
                path: path.clone(),
                what: s.clone(),
            });
        }
        if let Some((column, age, a, b)) = &d.first {
            out.drift.push(Drift::Values {
                path: path.clone(),
                column: column.clone(),
                age: age.clone(),
                published: a.clone(),
                recomputed: b.clone(),
                max_rel: d.max_rel(),
            });
        }
    }
    Ok(out)
}
