//! `hadal run`.

use std::path::{Path, PathBuf};
use std::time::Instant;

use super::{report, usage_error, EXIT_INVALID, EXIT_OK, EXIT_USAGE};
use crate::check::{self, CheckError, CheckOptions};
use crate::diagnostic::Problem;
use crate::model::Model;
use crate::report::{self as rep, fmt_num};
use crate::solve::{self, Run};

pub(crate) fn parse_sets(sets: &[String]) -> Result<Vec<(String, String)>, String> {
    sets.iter()
        .map(|s| match s.split_once('=') {
            Some((n, v)) if !n.trim().is_empty() && !v.trim().is_empty() => {
                Ok((n.trim().to_owned(), v.trim().to_owned()))
            }
            _ => Err(format!("`--set {s}` is not NAME=VALUE")),
        })
        .collect()
}

pub(crate) fn load(file: &Path, sets: &[String]) -> Result<check::Checked, i32> {
    let overrides = parse_sets(sets).map_err(usage_error)?;
    match check::check_file(file, &CheckOptions { overrides }) {
        Ok(c) => {
            report(&c.model.sources, &c.warnings);
            if c.model.is_library() {
                eprintln!(
                    "error: {} is a library file (no `scenario` line); run a scenario that includes it",
                    file.display()
                );
                return Err(EXIT_USAGE);
            }
            Ok(c)
        }
        Err(CheckError::Io { path, message }) => Err(usage_error(format!(
            "cannot read {}: {message}",
            path.display()
        ))),
        Err(CheckError::Invalid { sources, problems }) => {
            report(&sources, &problems);
            Err(EXIT_INVALID)
        }
    }
}

fn write_outputs(dir: &Path, files: &[(&str, Vec<u8>)]) -> Result<(), String> {
    std::fs::create_dir_all(dir).map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
    for (name, bytes) in files {
        let path = dir.join(name);
        crate::fsutil::write_atomic(&path, bytes)
            .map_err(|e| format!("cannot write {}: {e}", path.display()))?;
    }
    Ok(())
}

pub(crate) fn cmd_run(file: &Path, out: Option<&Path>, sets: &[String], json: bool) -> i32 {
    let clock = Instant::now();
    let checked = match load(file, sets) {
        Ok(c) => c,
        Err(code) => return code,
    };
    let model = &checked.model;
    let name = model.name.clone().unwrap_or_default();
    let run = match solve::solve(model) {
        Ok(r) => r,
        Err(p) => {
            report(&model.sources, &[p]);
            return EXIT_INVALID;
        }
    };
    let series = match rep::series(model, &run) {
        Ok(s) => s,
        Err(p) => {
            report(&model.sources, &[p]);
            return EXIT_INVALID;
        }
    };
    let dir = out
        .map(Path::to_owned)
        .unwrap_or_else(|| PathBuf::from("outputs").join(&name));
    let files = [
        ("series.csv", series.to_csv()),
        ("stages.csv", rep::stages_csv(model, &run)),
        ("events.csv", rep::events_csv(model, &run)),
    ];
    if let Err(e) = write_outputs(&dir, &files) {
        return usage_error(e);
    }
    let closure_problems = closure_problems(model, &run);
    let wall = clock.elapsed();
    if json {
        println!("{}", summary_json(model, &run, &series, &dir, wall));
    } else {
        print_summary(model, &run, &series, &dir, wall);
    }
    if !closure_problems.is_empty() {
        report(&model.sources, &closure_problems);
        return EXIT_INVALID;
    }
    EXIT_OK
}

fn closure_problems(model: &Model, run: &Run) -> Vec<Problem> {
    run.stages
        .iter()
        .filter(|sr| sr.closure_error > model.stages[sr.stage].solver.budget_tolerance)
        .map(|sr| {
            let st = &model.stages[sr.stage];
            Problem::error(
                "H0606",
                format!(
                    "the water budget of stage `{}` does not close: relative error {:.3e}, above {:.1e}",
                    st.name, sr.closure_error, st.solver.budget_tolerance
                ),
            )
            .label(st.span, "this stage")
            .help("tighten `solver rtol`, or raise `solver budget_tolerance` if the loss is understood")
        })
        .collect()
}

fn ocean_masses(model: &Model) -> f64 {
    model
        .find("ocean_mass")
        .and_then(|d| check::eval_const(model, &model.defs[d].expr))
        .unwrap_or(1.4e21)
}

fn print_summary(
    model: &Model,
    run: &Run,
    series: &rep::Series,
    dir: &Path,
    wall: std::time::Duration,
) {
    let name = model.name.as_deref().unwrap_or("");
    println!(
        "{name}: {} Ga to {} Ga, {} stages, {} report rows",
        fmt_num(model.start_age / 1e9),
        fmt_num(model.end_age / 1e9),
        run.stages.len(),
        series.rows.len()
    );
    let width = model
        .stages
        .iter()
        .map(|s| s.name.len())
        .max()
        .unwrap_or(5)
        .max(5);
    println!(
        "  {:<width$}  {:>15}  {:<34}  {:>8}  {:>8}  {:>10}  {:>9}",
        "stage", "span [Ga]", "method", "steps", "rejected", "closure", "wall"
    );
    for sr in &run.stages {
        let st = &model.stages[sr.stage];
        println!(
            "  {:<width$}  {:>15}  {:<34}  {:>8}  {:>8}  {:>10.2e}  {:>6.1} ms",
            st.name,
            format!(
                "{} - {}",
                fmt_num(st.start_age / 1e9),
                fmt_num(st.end_age / 1e9)
            ),
            sr.method,
            sr.stats.accepted,
            sr.stats.rejected,
            sr.closure_error,
            sr.wall.as_secs_f64() * 1e3
        );
    }
    let om = ocean_masses(model);
    if let Some(last) = run.stages.last() {
        println!("final inventories (ocean masses of {om:.3e} kg):");
        for (k, (id, d)) in model.reservoirs().enumerate() {
            let _ = id;
            println!("  {:<24} {:>10.4}", d.name, last.end.0[k] / om);
        }
        let n = last.end.0.len();
        if last.end.0[n - 2] != 0.0 || last.end.0[n - 1] != 0.0 {
            println!(
                "  delivered from outside {:>10.4}, lost to outside {:>10.4}",
                last.end.0[n - 2] / om,
                last.end.0[n - 1] / om
            );
        }
    }
    let worst = run
        .stages
        .iter()
        .map(|s| s.closure_error)
        .fold(0.0, f64::max);
    println!("water budget: largest relative closure error {worst:.2e}");
    for (k, &d) in run.event_defs.iter().enumerate() {
        match run.events[k] {
            Some(a) => println!(
                "event {}: first at {} Ga",
                model.defs[d].name,
                fmt_num(a / 1e9)
            ),
            None => println!("event {}: never", model.defs[d].name),
        }
    }
    println!(
        "wrote {} (series.csv, stages.csv, events.csv) in {:.1} ms",
        dir.display(),
        wall.as_secs_f64() * 1e3
    );
}

fn summary_json(
    model: &Model,
    run: &Run,
    series: &rep::Series,
    dir: &Path,
    wall: std::time::Duration,
) -> String {
    let stages: Vec<serde_json::Value> = run
        .stages
        .iter()
        .map(|sr| {
            let st = &model.stages[sr.stage];
            serde_json::json!({
                "name": st.name,
                "from_ga": st.start_age / 1e9,
                "to_ga": st.end_age / 1e9,
                "method": sr.method,
                "accepted_steps": sr.stats.accepted,
                "rejected_steps": sr.stats.rejected,
                "rhs_evaluations": sr.stats.rhs_evals,
                "closure_error": sr.closure_error,
                "wall_ms": sr.wall.as_secs_f64() * 1e3,
            })
        })
        .collect();
    let om = ocean_masses(model);
    let last = run.stages.last();
    let finals: serde_json::Map<String, serde_json::Value> = model
        .reservoirs()
        .enumerate()
        .map(|(k, (_, d))| {
            let kg = last.map_or(f64::NAN, |l| l.end.0[k]);
            (
                d.name.clone(),
                serde_json::json!({"kg": kg, "ocean_masses": kg / om}),
            )
        })
        .collect();
    let events: serde_json::Map<String, serde_json::Value> = run
        .event_defs
        .iter()
        .enumerate()
        .map(|(k, &d)| {
            (
                model.defs[d].name.clone(),
                serde_json::json!(run.events[k].map(|a| a / 1e9)),
            )
        })
        .collect();
    let v = serde_json::json!({
        "scenario": model.name,
        "output_dir": dir.to_string_lossy(),
        "rows": series.rows.len(),
        "stages": stages,
        "final": finals,
        "events_first_age_ga": events,
        "wall_ms": wall.as_secs_f64() * 1e3,
    });
    serde_json::to_string_pretty(&v).unwrap_or_default()
}
