//! `hadal verify` and `hadal diff`.

use std::path::{Path, PathBuf};

use super::{report, EXIT_INVALID, EXIT_OK, EXIT_USAGE};
use crate::check::CheckError;
use crate::manifest::verify::{self, shown as sh, Drift, RefusalKind};
use crate::manifest::{
    self,
    diff::{Difference, Side},
};

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
    let fresh = match crate::api::recompute(&opened) {
        Ok(f) => f,
        Err(CheckError::Io { path, message }) => {
            eprintln!("error: cannot read {}: {message}", path.display());
            return EXIT_USAGE;
        }
        Err(CheckError::Invalid { sources, problems }) => {
            report(&sources, &problems);
            return EXIT_INVALID;
        }
    };
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

fn short(hash: &str) -> String {
    sh(hash.get(..12).unwrap_or(hash))
}

pub(crate) fn cmd_diff(a: &Path, b: &Path) -> i32 {
    let d = match manifest::diff::diff(a, b) {
        Ok(d) => d,
        Err(e) => return super::usage_error(e),
    };
    let (pa, pb) = &d.paths;
    println!(
        "A: {} ({})\nB: {} ({})",
        sh(&d.a.compared.scenario.name),
        pa.display(),
        sh(&d.b.compared.scenario.name),
        pb.display()
    );
    for x in &d.differences {
        render_difference(x);
    }
    if let Some(p) = &d.unreadable {
        report_plain(std::slice::from_ref(p));
        return EXIT_USAGE;
    }
    if d.differences.is_empty() {
        println!("no differences");
        EXIT_OK
    } else {
        EXIT_INVALID
    }
}

fn render_difference(x: &Difference) {
    let side = |s: &Side| match s {
        Side::A => "A",
        Side::B => "B",
    };
    match x {
        Difference::Model => println!("model: the canonical models differ"),
        Difference::InputOnlyIn { path, side: s } => {
            println!("input {}: only in {}", sh(path), side(s))
        }
        Difference::InputDiffers {
            path,
            bytes_a,
            bytes_b,
        } => println!(
            "input {}: differs ({bytes_a} bytes against {bytes_b})",
            sh(path)
        ),
        Difference::Overrides { a, b } => {
            let show = |o: &[manifest::Override]| {
                o.iter()
                    .map(|x| format!("{}={}", sh(&x.name), sh(&x.value)))
                    .collect::<Vec<_>>()
                    .join(" ")
            };
            println!("overrides: [{}] against [{}]", show(a), show(b));
        }
        Difference::StageOnlyIn { name, side: s } => {
            println!("stage {}: only in {}", sh(name), side(s))
        }
        Difference::StageInputs {
            name,
            fingerprint_a,
            fingerprint_b,
        } => println!(
            "stage {}: different inputs (fingerprint {} against {})",
            sh(name),
            short(fingerprint_a),
            short(fingerprint_b)
        ),
        Difference::OutputTooLarge { path, bytes } => println!(
            "output {path}: not compared ({bytes} bytes, more than the limit of {})",
            manifest::diff::MAX_DIFF_BYTES
        ),
        Difference::Output { path, diff: d } => {
            println!("output {path}:");
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
    }
}
