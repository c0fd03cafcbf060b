//! `hadal run`.

use std::path::{Path, PathBuf};

use super::{report, usage_error, EXIT_INVALID, EXIT_OK};
use crate::api::{self, LoadError, LoadOptions, RunError, Scenario};
use crate::model::Model;
use crate::pipeline::{self, Outcome};
use crate::report::{self as rep, fmt_num};
use crate::span::Sources;

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

pub(crate) fn load(file: &Path, sets: &[String]) -> Result<Scenario, i32> {
    let overrides = parse_sets(sets).map_err(usage_error)?;
    match api::load(file, &LoadOptions { overrides }) {
        Ok(s) => {
            report(&s.model().sources, s.warnings());
            Ok(s)
        }
        Err(LoadError::Invalid { sources, problems }) => {
            report(&sources, &problems);
            Err(EXIT_INVALID)
        }
        Err(LoadError::Library {
            path,
            sources,
            warnings,
        }) => {
            report(&sources, &warnings);
            Err(usage_error(LoadError::Library {
                path,
                sources: Sources::default(),
                warnings: Vec::new(),
            }))
        }
        Err(e @ LoadError::Io { .. }) => Err(usage_error(e)),
    }
}

pub(crate) fn cmd_run(
    file: &Path,
    out: Option<&Path>,
    sets: &[String],
    json: bool,
    use_cache: bool,
    plots: bool,
) -> i32 {
    let scenario = match load(file, sets) {
        Ok(s) => s,
        Err(code) => return code,
    };
    let model = scenario.model();
    let name = model.name.clone().unwrap_or_default();
    let store = match super::optional_store(use_cache) {
        Ok(s) => s,
        Err(code) => return code,
    };
    let mut result = match scenario.run(&api::RunOptions {
        store: store.as_ref(),
    }) {
        Ok(r) => r,
        Err(RunError::Interrupted) => return super::interrupted(),
        Err(RunError::Failed(p)) => {
            report(&model.sources, &[p]);
            return EXIT_INVALID;
        }
    };
    report(&model.sources, &result.outcome.warnings);
    let dir = out
        .map(Path::to_owned)
        .unwrap_or_else(|| PathBuf::from("outputs").join(&name));
    if crate::cancel::requested() {
        return super::interrupted();
    }
    if let Err(e) = result.write(&dir) {
        return usage_error(e);
    }
    // Figures are drawn from the result in memory, from the same numbers
    // as `hadal plot DIR` reads back (so it redraws the same bytes); they
    // are not listed in the manifest.
    if plots && !crate::cancel::requested() {
        if let Err(e) = write_run_figures(&mut result, &dir) {
            eprintln!("warning: figures not drawn: {e}");
        }
    }
    let wall = result.wall;
    if json {
        println!(
            "{}",
            summary_json(model, &result.outcome, &result.expectations, &dir, wall)
        );
    } else {
        print_summary(model, &result.outcome, &result.expectations, &dir, wall);
    }
    if !result.closure_problems.is_empty() {
        report(&model.sources, &result.closure_problems);
        return EXIT_INVALID;
    }
    EXIT_OK
}

/// The figures of a written run, from its result in memory; the output
/// bytes are freed before drawing, so the figures add only the columns
/// they draw to the run's memory.
fn write_run_figures(result: &mut api::RunResult, dir: &Path) -> Result<(), String> {
    let data = result.figure_data().map_err(|e| e.to_string())?;
    drop(result.take_files());
    let files = crate::figures::run::figures(&data, &crate::figures::RunOptions::default())
        .map_err(|e| e.to_string())?;
    drop(data);
    super::plot::write_files(dir, &files).map(drop)
}

fn print_summary(
    model: &Model,
    outcome: &Outcome,
    expectations: &[rep::ExpectResult],
    dir: &Path,
    wall: std::time::Duration,
) {
    let run = &outcome.run;
    let name = model.name.as_deref().unwrap_or("");
    println!(
        "{name}: {} Ga to {} Ga, {} stage{}, {} report rows",
        fmt_num(model.start_age / 1e9),
        fmt_num(model.end_age / 1e9),
        run.stages.len(),
        if run.stages.len() == 1 { "" } else { "s" },
        outcome.rows
    );
    let width = model
        .stages
        .iter()
        .map(|s| s.name.len())
        .max()
        .unwrap_or(5)
        .max(5);
    let mwidth = run
        .stages
        .iter()
        .map(|s| rep::method_text(model, &s.stats).len())
        .max()
        .unwrap_or(6)
        .max(6);
    println!(
        "  {:<width$}  {:>13}  {:<8}  {:<mwidth$}  {:>7}  {:>8}  {:>9}  {:>9}",
        "stage", "span [Ga]", "status", "method", "steps", "rejected", "closure", "wall"
    );
    for (sr, rp) in run.stages.iter().zip(&outcome.stages) {
        let st = &model.stages[sr.stage];
        println!(
            "  {:<width$}  {:>13}  {:<8}  {:<mwidth$}  {:>7}  {:>8}  {:>9.2e}  {:>6.1} ms",
            st.name,
            format!(
                "{} - {}",
                fmt_num(st.start_age / 1e9),
                fmt_num(st.end_age / 1e9)
            ),
            rp.status.word(),
            rep::method_text(model, &sr.stats),
            sr.stats.accepted,
            sr.stats.rejected,
            sr.closure_error,
            sr.wall.as_secs_f64() * 1e3
        );
    }
    for (rp, st) in outcome.stages.iter().zip(&model.stages) {
        if rp.status == pipeline::Status::Computed && rp.reason != "the cache is off" {
            println!("  {} computed: {}", st.name, rp.reason);
        }
    }
    let inv = api::final_inventories(model, run);
    let om = inv.ocean_mass;
    if inv.solved {
        println!("final inventories (ocean masses of {om:.3e} kg):");
        for (name, kg) in &inv.reservoirs {
            println!("  {:<24} {:>10.4}", name, kg / om);
        }
        if inv.delivered != 0.0 || inv.lost != 0.0 {
            println!(
                "  delivered from outside {:>10.4}, lost to outside {:>10.4}",
                inv.delivered / om,
                inv.lost / om
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
    if !expectations.is_empty() {
        let passed = expectations.iter().filter(|e| e.pass).count();
        println!("expectations: {passed} of {} pass", expectations.len());
        for e in expectations.iter().filter(|e| !e.pass) {
            println!("  fails: {} (misfit {})", e.text, rep::human_num(e.misfit));
        }
    }
    println!(
        "wrote {} in {:.1} ms",
        dir.display(),
        wall.as_secs_f64() * 1e3
    );
}

fn summary_json(
    model: &Model,
    outcome: &Outcome,
    expectations: &[rep::ExpectResult],
    dir: &Path,
    wall: std::time::Duration,
) -> String {
    let run = &outcome.run;
    let stages: Vec<serde_json::Value> = run
        .stages
        .iter()
        .zip(&outcome.stages)
        .map(|(sr, rp)| {
            let st = &model.stages[sr.stage];
            serde_json::json!({
                "name": st.name,
                "from_ga": st.start_age / 1e9,
                "to_ga": st.end_age / 1e9,
                "status": rp.status.word(),
                "reason": rp.reason,
                "fingerprint": rp.fingerprint,
                "method": rep::method_text(model, &sr.stats),
                "accepted_steps": sr.stats.accepted,
                "rejected_steps": sr.stats.rejected,
                "rhs_evaluations": sr.stats.rhs_evals,
                "closure_error": sr.closure_error,
                "wall_ms": sr.wall.as_secs_f64() * 1e3,
            })
        })
        .collect();
    let inv = api::final_inventories(model, run);
    let om = inv.ocean_mass;
    let finals: serde_json::Map<String, serde_json::Value> = inv
        .reservoirs
        .iter()
        .map(|(name, kg)| {
            (
                name.clone(),
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
        "rows": outcome.rows,
        "series_reused": outcome.series_reused,
        "stages": stages,
        "final": finals,
        "events_first_age_ga": events,
        "expectations": expectations.iter().map(|e| serde_json::json!({
            "expectation": e.text,
            "value": if e.value.is_finite() { serde_json::json!(e.value) } else { serde_json::Value::Null },
            "misfit": if e.misfit.is_finite() { serde_json::json!(e.misfit) } else { serde_json::Value::Null },
            "pass": e.pass,
        })).collect::<Vec<_>>(),
        "wall_ms": wall.as_secs_f64() * 1e3,
    });
    serde_json::to_string_pretty(&v).unwrap_or_default()
}

pub(crate) fn cmd_params(file: &Path, sets: &[String], json: bool) -> i32 {
    let scenario = match load(file, sets) {
        Ok(s) => s,
        Err(code) => return code,
    };
    let list = api::parameters(scenario.model());
    if json {
        let v: Vec<serde_json::Value> = list
            .iter()
            .map(|p| {
                serde_json::json!({"name": p.name, "value": p.value, "unit": p.unit, "stages": p.stages, "initial_state": p.initial_state, "set_in": p.set_in, "doc": p.doc})
            })
            .collect();
        println!("{}", serde_json::to_string_pretty(&v).unwrap_or_default());
        return EXIT_OK;
    }
    let w = list.iter().map(|p| p.name.len()).max().unwrap_or(4).max(9);
    println!(
        "{:<w$}  {:>14}  {:<10}  influences",
        "parameter", "value", "unit"
    );
    for p in &list {
        let (n, u, ov) = (&p.name, &p.unit, &p.set_in);
        let mut infl = p.stages.join(", ");
        if p.initial_state {
            infl = if infl.is_empty() {
                "initial state".into()
            } else {
                format!("initial state, {infl}")
            };
        }
        if infl.is_empty() {
            infl = "nothing (unused)".into();
        }
        if !ov.is_empty() {
            infl.push_str(&format!(" (set in {})", ov.join(", ")));
        }
        println!("{n:<w$}  {:>14}  {u:<10}  {infl}", rep::human_num(p.value));
    }
    EXIT_OK
}

fn fmt_time(t: Option<std::time::SystemTime>) -> String {
    t.and_then(|t| t.elapsed().ok())
        .map(|d| {
            let s = d.as_secs();
            if s < 120 {
                format!("{s} s ago")
            } else if s < 7200 {
                format!("{} min ago", s / 60)
            } else if s < 172_800 {
                format!("{} h ago", s / 3600)
            } else {
                format!("{} days ago", s / 86400)
            }
        })
        .unwrap_or_else(|| "-".into())
}

pub(crate) fn cmd_cache_stats() -> i32 {
    let store = match super::open_store() {
        Ok(s) => s,
        Err(code) => return code,
    };
    let s = store.stats();
    println!("cache {}", store.root().display());
    println!("  entries  {}", s.entries);
    println!(
        "  size     {:.1} MiB ({} bytes)",
        s.bytes as f64 / 1048576.0,
        s.bytes
    );
    println!("  oldest   {}", fmt_time(s.oldest));
    println!("  newest   {}", fmt_time(s.newest));
    EXIT_OK
}

pub(crate) fn cmd_cache_verify() -> i32 {
    let store = match super::open_store() {
        Ok(s) => s,
        Err(code) => return code,
    };
    let (n, bad) = store.verify();
    for b in &bad {
        eprintln!("corrupt: {}: {}", b.path.display(), b.why);
    }
    println!(
        "checked {n} entries in {}: {} corrupt",
        store.root().display(),
        bad.len()
    );
    if bad.is_empty() {
        EXIT_OK
    } else {
        EXIT_INVALID
    }
}

pub(crate) fn cmd_cache_gc(older: Option<&str>, max: Option<&str>) -> i32 {
    let older = match older.map(|s| (s, crate::cache::parse_duration(s))) {
        Some((s, None)) => {
            return usage_error(format!(
                "`--older-than {s}`: write a duration such as 30d, 12h or 90m (at most {} s)",
                u64::MAX
            ))
        }
        Some((_, d)) => d,
        None => None,
    };
    let max = match max.map(|s| (s, crate::cache::parse_size(s))) {
        Some((s, None)) => {
            return usage_error(format!(
                "`--max-size {s}`: write a size such as 500M or 2G (less than 2^64 bytes)"
            ))
        }
        Some((_, m)) => m,
        None => None,
    };
    if older.is_none() && max.is_none() {
        return usage_error("say what to remove: --older-than DUR or --max-size SIZE");
    }
    let store = match super::open_store() {
        Ok(s) => s,
        Err(code) => return code,
    };
    let temps = store.remove_stale_temps();
    if temps > 0 {
        println!("removed {temps} temporary files left by killed writers");
    }
    let (removed, freed) = store.gc(older, max);
    println!(
        "removed {removed} entries ({:.1} MiB) from {}",
        freed as f64 / 1048576.0,
        store.root().display()
    );
    EXIT_OK
}
