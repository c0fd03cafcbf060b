//! `hadal verify` and `hadal diff`.

use std::path::{Path, PathBuf};

use super::{report, EXIT_INVALID, EXIT_OK, EXIT_USAGE};
use crate::check::{self, CheckError, CheckOptions};
use crate::manifest::{self, diff_csv, hash_bytes, Manifest};
use crate::report as rep;

fn outputs_of(
    model: &crate::model::Model,
    outcome: &crate::pipeline::Outcome,
) -> Vec<(&'static str, Vec<u8>)> {
    let expectations = rep::expectations(model, &outcome.run);
    super::run::output_files(model, outcome, &expectations)
}

/// Verify one manifest; returns the exit code for it.
fn verify_one(path: &Path, rtol: Option<f64>) -> i32 {
    let m = match Manifest::read(path) {
        Ok(m) => m,
        Err(e) => {
            eprintln!("error: {}: {e}", path.display());
            return EXIT_USAGE;
        }
    };
    let name = &m.compared.scenario.name;
    let Some(root) = m.locate_root(path) else {
        eprintln!(
            "error: {}: cannot find the scenario `{}` of this manifest (looked from the recorded project root and every directory above the manifest)",
            path.display(),
            m.compared.scenario.path
        );
        return EXIT_USAGE;
    };
    // Inputs first: a reviewer must know whether they have the same files.
    let mut input_problems = Vec::new();
    for i in &m.compared.inputs {
        let p = root.join(&i.path);
        match std::fs::read(&p) {
            Err(_) => input_problems.push(format!(
                "input `{}` is missing (expected at {})",
                i.path,
                p.display()
            )),
            Ok(b) => {
                let h = hash_bytes(&b);
                if h != i.blake3 {
                    input_problems.push(format!(
                        "input `{}` differs from the one recorded: blake3 {} instead of {} ({} bytes instead of {})",
                        i.path,
                        &h[..16],
                        &i.blake3[..16],
                        b.len(),
                        i.bytes
                    ));
                }
            }
        }
    }
    if !input_problems.is_empty() {
        for p in &input_problems {
            eprintln!("error: {name}: {p}");
        }
        eprintln!("help: restore the inputs the manifest names; results can only be verified from the same inputs");
        return EXIT_USAGE;
    }
    let scenario = root.join(&m.compared.scenario.path);
    let overrides: Vec<(String, String)> = m
        .compared
        .overrides
        .iter()
        .map(|o| (o.name.clone(), o.value.clone()))
        .collect();
    let checked = match check::check_file(&scenario, &CheckOptions { overrides }) {
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
    let dir = path.parent().unwrap_or(Path::new("."));
    let mut drift = false;
    let mut tolerated: f64 = 0.0;
    for rec in &m.compared.outputs {
        let Some((_, bytes)) = fresh.iter().find(|(n, _)| *n == rec.path) else {
            eprintln!("drift: {name}: output `{}` is no longer produced", rec.path);
            drift = true;
            continue;
        };
        let published = std::fs::read(dir.join(&rec.path)).ok();
        let fresh_hash = hash_bytes(bytes);
        let pub_ok = published
            .as_ref()
            .is_none_or(|b| hash_bytes(b) == rec.blake3);
        if fresh_hash == rec.blake3 && pub_ok {
            continue;
        }
        // Compare the values against the published file when there is one.
        let reference = published.clone().unwrap_or_default();
        if published.is_none() {
            eprintln!("drift: {name}: `{}` differs from the manifest (blake3 {} instead of {}); the published file is not beside the manifest to compare values", rec.path, &fresh_hash[..16], &rec.blake3[..16]);
            drift = true;
            continue;
        }
        let d = diff_csv(&reference, bytes);
        if !pub_ok && fresh_hash == rec.blake3 {
            eprintln!("drift: {name}: the published `{}` does not match its manifest (it was edited after the run)", rec.path);
        }
        let within = rtol.is_some_and(|r| d.shape.is_empty() && d.max_rel() <= r) && pub_ok;
        if within {
            tolerated = tolerated.max(d.max_rel());
            continue;
        }
        drift = true;
        for s in &d.shape {
            eprintln!("drift: {name}: `{}`: {s}", rec.path);
        }
        if let Some((col, age, a, b)) = &d.first {
            eprintln!(
                "drift: {name}: `{}` first differs in column `{col}` at age {age}: published {a}, recomputed {b}; largest relative difference {:.3e}",
                rec.path,
                d.max_rel()
            );
        }
    }
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
        ca.scenario.name,
        pa.display(),
        cb.scenario.name,
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
                println!("input {}: only in A", i.path);
                differ = true;
            }
            Some(j) if j.blake3 != i.blake3 => {
                println!(
                    "input {}: differs ({} bytes against {})",
                    i.path, i.bytes, j.bytes
                );
                differ = true;
            }
            _ => {}
        }
    }
    for j in &cb.inputs {
        if !ca.inputs.iter().any(|i| i.path == j.path) {
            println!("input {}: only in B", j.path);
            differ = true;
        }
    }
    if ca.overrides != cb.overrides {
        let show = |o: &[manifest::Override]| {
            o.iter()
                .map(|x| format!("{}={}", x.name, x.value))
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
                println!("stage {}: only in A", s.name);
                differ = true;
            }
            Some(t) if t.fingerprint != s.fingerprint => {
                println!(
                    "stage {}: different inputs (fingerprint {} against {})",
                    s.name,
                    &s.fingerprint[..12],
                    &t.fingerprint[..12]
                );
                differ = true;
            }
            _ => {}
        }
    }
    for t in &cb.stages {
        if !ca.stages.iter().any(|s| s.name == t.name) {
            println!("stage {}: only in B", t.name);
            differ = true;
        }
    }
    let (da, db) = (
        pa.parent().unwrap_or(Path::new(".")),
        pb.parent().unwrap_or(Path::new(".")),
    );
    for o in &ca.outputs {
        // Bounded and only regular files: an output swapped for a pipe or
        // a huge file is an error, never a hang or gigabytes of memory. A
        // missing output is left to the manifests' hashes above.
        let read = |dir: &Path| {
            let p = dir.join(&o.path);
            crate::fsutil::read_bounded(&p, crate::fsutil::MAX_OUTPUT_BYTES).map_err(|e| {
                (
                    e.is_not_found(),
                    format!("cannot read {}: {e}", p.display()),
                )
            })
        };
        let (x, y) = match (read(da), read(db)) {
            (Ok(x), Ok(y)) => (x, y),
            (Err((false, e)), _) | (_, Err((false, e))) => return super::usage_error(e),
            _ => continue,
        };
        let d = diff_csv(&x, &y);
        if d.identical() {
            continue;
        }
        differ = true;
        println!("output {}:", o.path);
        for s in &d.shape {
            println!("  {s}");
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
                    c.name,
                    c.max_abs,
                    c.max_rel,
                    c.first_age
                        .as_deref()
                        .map(|a| format!("{a} Ga"))
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
