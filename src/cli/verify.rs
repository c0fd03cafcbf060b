//! `hadal verify` and `hadal diff`.

use std::path::{Path, PathBuf};

use super::{report, EXIT_INVALID, EXIT_OK, EXIT_USAGE};
use crate::check::CheckError;
use crate::manifest::verify::{self, shown as sh, Drift, Published, RefusalKind};
use crate::manifest::{self, diff_csv, Manifest};
use crate::report as rep;

fn outputs_of(
    model: &crate::model::Model,
    outcome: &crate::pipeline::Outcome,
) -> Vec<(&'static str, Vec<u8>)> {
    let expectations = rep::expectations(model, &outcome.run);
    crate::api::output_files(model, outcome, &expectations)
}

/// Render problems that have no place in a scenario (manifest problems).
fn report_plain(problems: &[crate::diagnostic::Problem]) {
    report(&crate::span::Sources::default(), problems);
}

/// Verify one manifest; returns the exit code for it.
fn verify_one(path: &Path, rtol: Option<f64>) -> i32 {
    // Everything the manifest names is confined and hash-checked here,
    // before anything runs (see `manifest::verify`).
    let opened = match verify::open(path) {
        Ok(o) => o,
        Err(refusal) => {
            report_plain(&refusal.problems);
            return match refusal.kind {
                RefusalKind::Differs => EXIT_INVALID,
                RefusalKind::Unusable => EXIT_USAGE,
            };
        }
    };
    let m = &opened.manifest;
    let name = &sh(&m.compared.scenario.name);
    let checked = match opened.check() {
        Ok(c) => c,
        Err(CheckError::Io { path, message }) => {
            eprintln!("error: cannot read {}: {message}", path.display());
            return EXIT_USAGE;
        }
        Err(CheckError::Invalid { sources, problems }) => {
            report(&sources, &problems);
            return EXIT_INVALID;
        }
    };
    let model = &checked.model;
    let outcome = match crate::pipeline::execute(model, None) {
        Ok(o) => o,
        Err(p) => {
            report(&model.sources, &[p]);
            return EXIT_INVALID;
        }
    };
    let fresh = outputs_of(model, &outcome);
    let comparison = match verify::compare(&opened, &fresh, rtol) {
        Ok(c) => c,
        Err(p) => {
            report_plain(&[p]);
            return EXIT_USAGE;
        }
    };
    for d in &comparison.drift {
        render_drift(name, d);
    }
    let (drift, tolerated) = (comparison.drifted, comparison.tolerated);
    if drift {
        eprintln!(
            "{name}: results drifted{}; if the change is intended, regenerate the outputs (see README) and review the diff",
            rtol.map(|r| format!(" beyond --rtol {r:e}")).unwrap_or_default()
        );
        return EXIT_INVALID;
    }
    if tolerated > 0.0 {
        println!(
            "ok {name}: outputs match within --rtol {:e} (largest relative difference {tolerated:.3e})",
            rtol.unwrap_or(0.0)
        );
    } else {
        println!(
            "ok {name}: every output is byte-identical to the manifest ({} files)",
            m.compared.outputs.len()
        );
    }
    EXIT_OK
}

/// One line on standard error for each way an output drifted.
fn render_drift(name: &str, d: &Drift) {
    match d {
        Drift::NotProduced { path } => {
            eprintln!("drift: {name}: output `{path}` is no longer produced")
        }
        Drift::PublishedTooLarge {
            path,
            bytes,
            recomputed,
        } => eprintln!(
            "drift: {name}: the published `{path}` is {bytes} bytes, far more than the {recomputed} bytes recomputed; not compared"
        ),
        Drift::NoPublished {
            path,
            recomputed_hash,
            recorded_hash,
        } => eprintln!(
            "drift: {name}: `{path}` differs from the manifest (blake3 {} instead of {}); the published file is not beside the manifest to compare values",
            &recomputed_hash[..16],
            sh(recorded_hash.get(..16).unwrap_or(recorded_hash))
        ),
        Drift::EditedAfterRun { path } => eprintln!(
            "drift: {name}: the published `{path}` does not match its manifest (it was edited after the run)"
        ),
        Drift::Shape { path, what } => eprintln!("drift: {name}: `{path}`: {}", sh(what)),
        Drift::Values {
            path,
            column,
            age,
            published,
            recomputed,
            max_rel,
        } => eprintln!(
            "drift: {name}: `{path}` first differs in column `{}` at age {}: published {}, recomputed {recomputed}; largest relative difference {max_rel:.3e}",
            sh(column),
            sh(age),
            sh(published)
        ),
    }
}

pub(crate) fn cmd_verify(manifests: &[PathBuf], rtol: Option<f64>) -> i32 {
    if let Some(r) = rtol {
        if !(r >= 0.0 && r.is_finite()) {
            return super::usage_error("--rtol takes a non-negative number, e.g. 1e-12");
        }
    }
    manifests
        .iter()
        .map(|m| verify_one(m, rtol))
        .max()
        .unwrap_or(EXIT_OK)
}

/// Largest output file `hadal diff` compares (it holds both tables).
const MAX_DIFF_BYTES: u64 = 256 * 1024 * 1024;

fn short(hash: &str) -> String {
    sh(hash.get(..12).unwrap_or(hash))
}

/// The canonical folder of a manifest that was read.
fn canonical_dir(manifest: &Path) -> Result<PathBuf, String> {
    let real = std::fs::canonicalize(manifest)
        .map_err(|e| format!("{}: {}", manifest.display(), crate::check::io_words(&e)))?;
    Ok(real.parent().unwrap_or(Path::new("/")).to_owned())
}

fn manifest_path(p: &Path) -> PathBuf {
    if p.is_dir() {
        p.join("manifest.json")
    } else {
        p.to_owned()
    }
}

pub(crate) fn cmd_diff(a: &Path, b: &Path) -> i32 {
    let (pa, pb) = (manifest_path(a), manifest_path(b));
    let (ma, mb) = match (Manifest::read(&pa), Manifest::read(&pb)) {
        (Ok(x), Ok(y)) => (x, y),
        (Err(e), _) => return super::usage_error(format!("{}: {e}", pa.display())),
        (_, Err(e)) => return super::usage_error(format!("{}: {e}", pb.display())),
    };
    let mut differ = false;
    let (ca, cb) = (&ma.compared, &mb.compared);
    println!(
        "A: {} ({})\nB: {} ({})",
        sh(&ca.scenario.name),
        pa.display(),
        sh(&cb.scenario.name),
        pb.display()
    );
    if ca.scenario.canonical_hash != cb.scenario.canonical_hash {
        println!("model: the canonical models differ");
        differ = true;
    }
    // Inputs.
    for i in &ca.inputs {
        match cb.inputs.iter().find(|j| j.path == i.path) {
            None => {
                println!("input {}: only in A", sh(&i.path));
                differ = true;
            }
            Some(j) if j.blake3 != i.blake3 => {
                println!(
                    "input {}: differs ({} bytes against {})",
                    sh(&i.path),
                    i.bytes,
                    j.bytes
                );
                differ = true;
            }
            _ => {}
        }
    }
    for j in &cb.inputs {
        if !ca.inputs.iter().any(|i| i.path == j.path) {
            println!("input {}: only in B", sh(&j.path));
            differ = true;
        }
    }
    if ca.overrides != cb.overrides {
        let show = |o: &[manifest::Override]| {
            o.iter()
                .map(|x| format!("{}={}", sh(&x.name), sh(&x.value)))
                .collect::<Vec<_>>()
                .join(" ")
        };
        println!(
            "overrides: [{}] against [{}]",
            show(&ca.overrides),
            show(&cb.overrides)
        );
        differ = true;
    }
    for s in &ca.stages {
        match cb.stages.iter().find(|t| t.name == s.name) {
            None => {
                println!("stage {}: only in A", sh(&s.name));
                differ = true;
            }
            Some(t) if t.fingerprint != s.fingerprint => {
                println!(
                    "stage {}: different inputs (fingerprint {} against {})",
                    sh(&s.name),
                    short(&s.fingerprint),
                    short(&t.fingerprint)
                );
                differ = true;
            }
            _ => {}
        }
    }
    for t in &cb.stages {
        if !ca.stages.iter().any(|s| s.name == t.name) {
            println!("stage {}: only in B", sh(&t.name));
            differ = true;
        }
    }
    // Outputs are read only beside each manifest (`manifest::verify`).
    let (da, db) = match (canonical_dir(&pa), canonical_dir(&pb)) {
        (Ok(x), Ok(y)) => (x, y),
        (Err(e), _) | (_, Err(e)) => return super::usage_error(e),
    };
    for o in &ca.outputs {
        let read = |dir: &Path| verify::published(dir, &o.path, MAX_DIFF_BYTES);
        let (x, y) = match (read(&da), read(&db)) {
            (Ok(Published::Bytes(x)), Ok(Published::Bytes(y))) => (x, y),
            (Err(p), _) | (_, Err(p)) => {
                report_plain(&[p]);
                return EXIT_USAGE;
            }
            (Ok(Published::TooLarge(n)), _) | (_, Ok(Published::TooLarge(n))) => {
                println!(
                    "output {}: not compared ({n} bytes, more than the limit of {MAX_DIFF_BYTES})",
                    o.path
                );
                differ = true;
                continue;
            }
            _ => continue,
        };
        let d = diff_csv(&x, &y);
        if d.identical() {
            continue;
        }
        differ = true;
        println!("output {}:", o.path);
        for s in &d.shape {
            println!("  {}", sh(s));
        }
        if !d.columns.is_empty() {
            let w = d
                .columns
                .iter()
                .map(|c| c.name.len())
                .max()
                .unwrap_or(6)
                .max(6);
            println!(
                "  {:<w$}  {:>12}  {:>12}  {:>14}",
                "column", "max |A-B|", "max rel", "first differs"
            );
            for c in &d.columns {
                println!(
                    "  {:<w$}  {:>12.4e}  {:>12.4e}  {:>14}",
                    sh(&c.name),
                    c.max_abs,
                    c.max_rel,
                    c.first_age
                        .as_deref()
                        .map(|a| format!("{} Ga", sh(a)))
                        .unwrap_or_default()
                );
            }
        }
    }
    if differ {
        EXIT_INVALID
    } else {
        println!("no differences");
        EXIT_OK
    }
}
