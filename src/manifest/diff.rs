//! How two runs differ, from their manifests and the outputs beside them
//! (`hadal diff`): the model, inputs, overrides, stage fingerprints, and
//! each output's values column by column. Outputs are read only beside
//! each manifest, through [`super::verify::published`].

use std::path::{Path, PathBuf};

use super::verify::{self, ManifestError, Published};
use super::{diff_csv, CsvDiff, Manifest, Override};
use crate::diagnostic::Problem;

/// Largest output file compared (both tables are held at once).
pub const MAX_DIFF_BYTES: u64 = 256 * 1024 * 1024;

/// One difference, in the order found. Names, paths and hashes are as the
/// manifests hold them (show them through [`verify::shown`]).
#[derive(Debug, Clone, PartialEq)]
pub enum Difference {
    /// The canonical models differ.
    Model,
    InputOnlyIn {
        path: String,
        side: Side,
    },
    InputDiffers {
        path: String,
        bytes_a: u64,
        bytes_b: u64,
    },
    Overrides {
        a: Vec<Override>,
        b: Vec<Override>,
    },
    StageOnlyIn {
        name: String,
        side: Side,
    },
    StageInputs {
        name: String,
        fingerprint_a: String,
        fingerprint_b: String,
    },
    /// An output too large to compare.
    OutputTooLarge {
        path: String,
        bytes: u64,
    },
    /// An output whose tables differ.
    Output {
        path: String,
        diff: CsvDiff,
    },
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Side {
    A,
    B,
}

/// The comparison of two runs.
#[derive(Debug)]
pub struct RunDiff {
    pub a: Manifest,
    pub b: Manifest,
    /// The manifests' paths as given.
    pub paths: (PathBuf, PathBuf),
    pub differences: Vec<Difference>,
    /// An output that could not be read ended the comparison here (the
    /// differences before it stand).
    pub unreadable: Option<Problem>,
}

/// Why two runs could not be compared at all.
#[derive(Debug)]
pub enum DiffError {
    /// A manifest could not be read.
    Manifest { path: PathBuf, error: ManifestError },
    /// A manifest's folder could not be resolved.
    Folder { path: PathBuf, message: String },
}

impl std::fmt::Display for DiffError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            DiffError::Manifest { path, error } => write!(f, "{}: {error}", path.display()),
            DiffError::Folder { path, message } => write!(f, "{}: {message}", path.display()),
        }
    }
}

impl std::error::Error for DiffError {}

/// `p`, or `p/manifest.json` when `p` is a folder.
pub fn manifest_path(p: &Path) -> PathBuf {
    if p.is_dir() {
        p.join("manifest.json")
    } else {
        p.to_owned()
    }
}

/// The canonical folder of a manifest that was read.
fn canonical_dir(manifest: &Path) -> Result<PathBuf, DiffError> {
    let real = std::fs::canonicalize(manifest).map_err(|e| DiffError::Folder {
        path: manifest.to_owned(),
        message: crate::check::io_words(&e),
    })?;
    Ok(real.parent().unwrap_or(Path::new("/")).to_owned())
}

/// An entry of one manifest's list matched by key against the other's.
enum Match<'a, T> {
    Only(&'a T, Side),
    Both(&'a T, &'a T),
}

/// The entries of `a` in order, each with its namesake in `b` or alone,
/// then the entries only `b` has, in `b`'s order.
fn match_by<'a, T, K: PartialEq + ?Sized>(
    a: &'a [T],
    b: &'a [T],
    key: impl Fn(&T) -> &K,
) -> Vec<Match<'a, T>> {
    let mut out: Vec<Match<'a, T>> = a
        .iter()
        .map(|x| match b.iter().find(|y| key(y) == key(x)) {
            Some(y) => Match::Both(x, y),
            None => Match::Only(x, Side::A),
        })
        .collect();
    out.extend(
        b.iter()
            .filter(|y| !a.iter().any(|x| key(x) == key(y)))
            .map(|y| Match::Only(y, Side::B)),
    );
    out
}

/// Compare the runs of two manifests (or run folders).
pub fn diff(a: &Path, b: &Path) -> Result<RunDiff, DiffError> {
    let (pa, pb) = (manifest_path(a), manifest_path(b));
    let read = |p: &Path| {
        Manifest::read(p).map_err(|error| DiffError::Manifest {
            path: p.to_owned(),
            error,
        })
    };
    let ma = read(&pa)?;
    let mb = read(&pb)?;
    let mut out = Vec::new();
    let (ca, cb) = (&ma.compared, &mb.compared);
    if ca.scenario.canonical_hash != cb.scenario.canonical_hash {
        out.push(Difference::Model);
    }
    for m in match_by(&ca.inputs, &cb.inputs, |i| &i.path) {
        match m {
            Match::Only(i, side) => out.push(Difference::InputOnlyIn {
                path: i.path.clone(),
                side,
            }),
            Match::Both(i, j) if j.blake3 != i.blake3 => out.push(Difference::InputDiffers {
                path: i.path.clone(),
                bytes_a: i.bytes,
                bytes_b: j.bytes,
            }),
            Match::Both(..) => {}
        }
    }
    if ca.overrides != cb.overrides {
        out.push(Difference::Overrides {
            a: ca.overrides.clone(),
            b: cb.overrides.clone(),
        });
    }
    for m in match_by(&ca.stages, &cb.stages, |s| &s.name) {
        match m {
            Match::Only(s, side) => out.push(Difference::StageOnlyIn {
                name: s.name.clone(),
                side,
            }),
            Match::Both(s, t) if t.fingerprint != s.fingerprint => {
                out.push(Difference::StageInputs {
                    name: s.name.clone(),
                    fingerprint_a: s.fingerprint.clone(),
                    fingerprint_b: t.fingerprint.clone(),
                })
            }
            Match::Both(..) => {}
        }
    }
    let (da, db) = (canonical_dir(&pa)?, canonical_dir(&pb)?);
    let mut unreadable = None;
    for o in &ca.outputs {
        let read = |dir: &Path| verify::published(dir, &o.path, MAX_DIFF_BYTES);
        let (x, y) = match (read(&da), read(&db)) {
            (Ok(Published::Bytes(x)), Ok(Published::Bytes(y))) => (x, y),
            (Err(p), _) | (_, Err(p)) => {
                unreadable = Some(p);
                break;
            }
            (Ok(Published::TooLarge(n)), _) | (_, Ok(Published::TooLarge(n))) => {
                out.push(Difference::OutputTooLarge {
                    path: o.path.clone(),
                    bytes: n,
                });
                continue;
            }
            _ => continue,
        };
        let d = diff_csv(&x, &y);
        if !d.identical() {
            out.push(Difference::Output {
                path: o.path.clone(),
                diff: d,
            });
        }
    }
    Ok(RunDiff {
        a: ma,
        b: mb,
        paths: (pa, pb),
        differences: out,
        unreadable,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn entries_pair_by_key_in_the_order_of_a_then_b() {
        let a = ["x", "y", "z"];
        let b = ["w", "z", "x", "v"];
        let seen: Vec<String> = match_by(&a, &b, |s| *s)
            .into_iter()
            .map(|m| match m {
                Match::Only(s, side) => format!("{s} only in {side:?}"),
                Match::Both(s, t) => format!("{s}={t}"),
            })
            .collect();
        assert_eq!(
            seen,
            ["x=x", "y only in A", "z=z", "w only in B", "v only in B"]
        );
    }
}
