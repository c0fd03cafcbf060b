//! The command-line layer: argument parsing, rendering diagnostics, exit
//! codes. Everything it does goes through the library's public API.
//!
//! Exit codes: 0 success; 1 the scenario or the result is wrong (errors,
//! drift, `fmt --check` would change a file); 2 usage or I/O problem; 130
//! `run` or `ensemble` stopped by Ctrl-C (SIGINT).

use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};

use clap::{Parser, Subcommand};

use crate::check::{self, CheckError, CheckOptions};
use crate::diagnostic::Problem;
use crate::span::Sources;

mod ensemble;
mod plot;
mod run;
mod verify;

pub const EXIT_OK: i32 = 0;
pub const EXIT_INVALID: i32 = 1;
pub const EXIT_USAGE: i32 = 2;
/// Stopped by SIGINT: 128 + the signal's number, as shells report it.
pub const EXIT_INTERRUPTED: i32 = 130;

/// Let Ctrl-C stop long work cleanly: the handler only sets the library's
/// flag ([`crate::cancel`]), which the solver, the pipeline and ensembles
/// look at. A second Ctrl-C ends the process at once.
fn catch_interrupts() {
    #[cfg(unix)]
    {
        use signal_hook::consts::SIGINT;
        let flag = crate::cancel::flag();
        // Registered first, so it runs only on a second signal: the flag is
        // still false during the first one.
        let _ = signal_hook::flag::register_conditional_shutdown(
            SIGINT,
            EXIT_INTERRUPTED,
            std::sync::Arc::clone(flag),
        );
        let _ = signal_hook::flag::register(SIGINT, std::sync::Arc::clone(flag));
    }
}

/// The one line and the exit code of work stopped by Ctrl-C.
fn interrupted() -> i32 {
    eprintln!("interrupted");
    EXIT_INTERRUPTED
}

#[derive(Parser, Debug)]
#[command(
    name = "hadal",
    version,
    about = "Box models of a planet's deep water cycle: check, format and run scenario files",
    long_about = None,
    after_help = "Exit codes: 0 success, 1 the scenario or result is wrong, 2 usage or I/O problem, 130 stopped by Ctrl-C.\nSee docs/language.md for the scenario language and docs/errors.md for every diagnostic."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Check scenario files (and their includes) for names, structure and units
    Check {
        /// Scenario files or directories (directories are searched for .hadal files)
        #[arg(required = true)]
        files: Vec<PathBuf>,
        /// Report problems as JSON on stdout
        #[arg(long)]
        json: bool,
    },
    /// Rewrite scenario files in the canonical layout, keeping comments
    Fmt {
        #[arg(required = true)]
        files: Vec<PathBuf>,
        /// Change nothing; exit 1 if any file is not in canonical layout
        #[arg(long)]
        check: bool,
    },
    /// Print the dependency graph of a scenario's definitions as DOT
    Graph { file: PathBuf },
    /// Integrate a scenario over its span and write its history
    Run {
        file: PathBuf,
        /// Output directory [default: outputs/<scenario name>]
        #[arg(long)]
        out: Option<PathBuf>,
        /// Override a parameter, e.g. --set regas_efficiency=0.4 or --set 'T0=1600 K'
        #[arg(long = "set", value_name = "NAME=VALUE")]
        sets: Vec<String>,
        /// Print a machine-readable summary on stdout instead of the human one
        #[arg(long)]
        json: bool,
        /// Neither read nor write the stage cache
        #[arg(long)]
        no_cache: bool,
        /// Do not draw the figures (inventories.svg, temperature.svg, sea_level.svg)
        #[arg(long)]
        no_plots: bool,
    },
    /// Redraw the figures of a run or ensemble directory from its files
    Plot {
        dir: PathBuf,
        /// Draw inventories in kg instead of ocean masses
        #[arg(long)]
        kg: bool,
    },
    /// Write DIR/report.html: one self-contained page with figures, tables and hashes
    Report { dir: PathBuf },
    /// List every parameter with its value, units and the stages it influences
    Params {
        file: PathBuf,
        #[arg(long = "set", value_name = "NAME=VALUE")]
        sets: Vec<String>,
        #[arg(long)]
        json: bool,
    },
    /// Run many members with parameters drawn from the scenario's ensemble block
    Ensemble {
        file: PathBuf,
        /// Number of members [default: the block's `members`, or 1000]
        #[arg(long)]
        members: Option<u64>,
        /// Random seed [default: the block's `seed`]
        #[arg(long)]
        seed: Option<u64>,
        /// Run only shard K of N (1-based), e.g. --shard 3/8
        #[arg(long, value_name = "K/N")]
        shard: Option<String>,
        /// Output directory [default: outputs/<scenario>_ensemble]
        #[arg(long)]
        out: Option<PathBuf>,
        /// Worker threads [default: all cores]
        #[arg(long)]
        threads: Option<usize>,
        /// Also write every member's series under DIR/series/
        #[arg(long)]
        keep_series: bool,
        /// Neither read nor write the stage cache
        #[arg(long)]
        no_cache: bool,
        /// Do not draw the figures
        #[arg(long)]
        no_plots: bool,
    },
    /// Combine shard outputs into what an unsharded ensemble writes
    Merge {
        #[arg(required = true)]
        dirs: Vec<PathBuf>,
        /// Output directory [default: the shards' name without _shard_K_of_N]
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// Rerun published runs from scratch and check every output against their manifests
    Verify {
        #[arg(required = true)]
        manifests: Vec<PathBuf>,
        /// Accept numeric differences up to this relative size (and say how large they were)
        #[arg(long, value_name = "X")]
        rtol: Option<f64>,
    },
    /// Compare two runs (output directories or manifests)
    Diff { a: PathBuf, b: PathBuf },
    /// Inspect and maintain the stage cache (HADAL_CACHE, default .hadal-cache)
    Cache {
        #[command(subcommand)]
        action: CacheAction,
    },
}

#[derive(Subcommand, Debug)]
enum CacheAction {
    /// Number of entries, total size, oldest and newest use
    Stats,
    /// Check every entry; exit 1 if any is corrupt
    Verify,
    /// Remove entries unused for a while, or the least recently used beyond a size
    Gc {
        /// e.g. 30d, 12h
        #[arg(long, value_name = "DUR")]
        older_than: Option<String>,
        /// e.g. 500M, 2G
        #[arg(long, value_name = "SIZE")]
        max_size: Option<String>,
    },
}

pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { EXIT_USAGE } else { EXIT_OK };
            let _ = e.print();
            return code;
        }
    };
    match cli.command {
        Command::Check { files, json } => cmd_check(&files, json),
        Command::Fmt { files, check } => cmd_fmt(&files, check),
        Command::Graph { file } => cmd_graph(&file),
        Command::Run {
            file,
            out,
            sets,
            json,
            no_cache,
            no_plots,
        } => {
            catch_interrupts();
            run::cmd_run(&file, out.as_deref(), &sets, json, !no_cache, !no_plots)
        }
        Command::Plot { dir, kg } => plot::cmd_plot(&dir, kg),
        Command::Report { dir } => plot::cmd_report(&dir),
        Command::Params { file, sets, json } => run::cmd_params(&file, &sets, json),
        Command::Ensemble {
            file,
            members,
            seed,
            shard,
            out,
            threads,
            keep_series,
            no_cache,
            no_plots,
        } => {
            catch_interrupts();
            ensemble::cmd_ensemble(
                &file,
                members,
                seed,
                shard.as_deref(),
                out.as_deref(),
                threads,
                keep_series,
                !no_cache,
                !no_plots,
            )
        }
        Command::Merge { dirs, out } => ensemble::cmd_merge(&dirs, out.as_deref()),
        Command::Verify { manifests, rtol } => verify::cmd_verify(&manifests, rtol),
        Command::Diff { a, b } => verify::cmd_diff(&a, &b),
        Command::Cache { action } => match action {
            CacheAction::Stats => run::cmd_cache_stats(),
            CacheAction::Verify => run::cmd_cache_verify(),
            CacheAction::Gc {
                older_than,
                max_size,
            } => run::cmd_cache_gc(older_than.as_deref(), max_size.as_deref()),
        },
    }
}

/// Expand directories into the `.hadal` files below them, sorted.
fn expand(paths: &[PathBuf]) -> Result<Vec<PathBuf>, String> {
    let mut out = Vec::new();
    for p in paths {
        if p.is_dir() {
            let mut found = Vec::new();
            walk(p, &mut found).map_err(|e| format!("{}: {e}", p.display()))?;
            found.sort();
            out.extend(found);
        } else {
            out.push(p.clone());
        }
    }
    Ok(out)
}

fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> std::io::Result<()> {
    for entry in std::fs::read_dir(dir)? {
        let entry = entry?;
        let path = entry.path();
        // Links to folders are not followed: two links to `.` would make
        // the walk exponential, never ending. (A link to a file is kept.)
        if entry.file_type()?.is_dir() {
            walk(&path, out)?;
        } else if path.extension().is_some_and(|e| e == "hadal") {
            out.push(path);
        }
    }
    Ok(())
}

fn color_wanted() -> bool {
    std::env::var_os("NO_COLOR").is_none_or(|v| v.is_empty()) && std::io::stderr().is_terminal()
}

/// Render problems to stderr, graphically with colour only on a terminal.
pub fn report(sources: &Sources, problems: &[Problem]) {
    let theme = if color_wanted() {
        miette::GraphicalTheme::unicode()
    } else {
        miette::GraphicalTheme::unicode_nocolor()
    };
    let handler = miette::GraphicalReportHandler::new_themed(theme).with_width(100);
    let mut stderr = std::io::stderr().lock();
    for p in problems {
        let rendered = p.render(sources);
        let mut out = String::new();
        if handler.render_report(&mut out, &rendered).is_err() {
            out = format!("{}: {}\n", p.code, p.message);
        }
        let _ = writeln!(stderr, "{out}");
    }
}

fn problems_json(sources: &Sources, problems: &[Problem]) -> Vec<serde_json::Value> {
    problems
        .iter()
        .map(|p| {
            let loc = p.location(sources);
            serde_json::json!({
                "code": p.code,
                "severity": if p.warning { "warning" } else { "error" },
                "message": p.message,
                "file": loc.as_ref().map(|l| l.0.clone()),
                "line": loc.as_ref().map(|l| l.1),
                "column": loc.as_ref().map(|l| l.2),
                "labels": p.labels.iter().map(|l| serde_json::json!({
                    "text": l.text,
                    "file": sources.get(l.span.file).name,
                    "start": l.span.start,
                    "end": l.span.end,
                })).collect::<Vec<_>>(),
                "help": p.help,
            })
        })
        .collect()
}

pub(crate) fn usage_error(msg: impl std::fmt::Display) -> i32 {
    eprintln!("error: {msg}");
    EXIT_USAGE
}

/// Most worker threads `--threads` may ask for. A fixed number, not a
/// multiple of this machine's cores, so that a command line valid on one
/// machine is valid on every other; results never depend on the thread
/// count, and more threads than cores only cost memory (a stack each) and
/// start-up time, so a value past this is a typing mistake.
pub const MAX_THREADS: usize = 1024;

/// The stage cache when `use_cache` (none with `--no-cache`), or exit 2
/// when its folder is a file.
pub(crate) fn optional_store(use_cache: bool) -> Result<Option<crate::cache::Store>, i32> {
    if use_cache {
        open_store().map(Some)
    } else {
        Ok(None)
    }
}

/// The stage cache (`HADAL_CACHE`), or exit 2 when its folder is a file.
pub(crate) fn open_store() -> Result<crate::cache::Store, i32> {
    let store = crate::cache::Store::new(crate::cache::Store::default_location());
    match store.check_root() {
        Ok(()) => Ok(store),
        Err(e) => Err(usage_error(format!(
            "{e}; set HADAL_CACHE to a directory, or run with --no-cache"
        ))),
    }
}

fn cmd_check(files: &[PathBuf], json: bool) -> i32 {
    let files = match expand(files) {
        Ok(f) => f,
        Err(e) => return usage_error(e),
    };
    let mut worst = EXIT_OK;
    let mut results = Vec::new();
    for file in &files {
        match check::check_file(file, &CheckOptions::default()) {
            Ok(checked) => {
                let m = &checked.model;
                let summary = summarize(m);
                if json {
                    results.push(serde_json::json!({
                        "file": file.to_string_lossy(),
                        "ok": true,
                        "summary": summary,
                        "problems": problems_json(&m.sources, &checked.warnings),
                    }));
                } else {
                    report(&m.sources, &checked.warnings);
                    println!("ok {}: {summary}", file.display());
                }
            }
            Err(CheckError::Io { path, message }) => {
                worst = worst.max(EXIT_USAGE);
                if json {
                    results.push(serde_json::json!({
                        "file": path.to_string_lossy(), "ok": false, "io_error": message,
                    }));
                } else {
                    eprintln!("error: cannot read {}: {message}", path.display());
                }
            }
            Err(CheckError::Invalid { sources, problems }) => {
                worst = worst.max(EXIT_INVALID);
                let n = problems.iter().filter(|p| !p.warning).count();
                if json {
                    results.push(serde_json::json!({
                        "file": file.to_string_lossy(),
                        "ok": false,
                        "problems": problems_json(&sources, &problems),
                    }));
                } else {
                    report(&sources, &problems);
                    let s = if n == 1 { "" } else { "s" };
                    eprintln!("{}: {n} error{s}", file.display());
                }
            }
        }
    }
    if json {
        println!(
            "{}",
            serde_json::to_string_pretty(&results).unwrap_or_default()
        );
    }
    worst
}

fn summarize(m: &crate::model::Model) -> String {
    use crate::model::DefKind;
    let count =
        |f: fn(&DefKind) -> bool| m.defs.iter().filter(|d| !d.prelude && f(&d.kind)).count();
    let plural = |n: usize, w: &str| format!("{n} {w}{}", if n == 1 { "" } else { "s" });
    let reservoirs = count(|k| matches!(k, DefKind::Reservoir { .. }));
    let states = count(|k| matches!(k, DefKind::State { .. }));
    let fluxes = count(|k| matches!(k, DefKind::Flux { .. }));
    let params = count(|k| matches!(k, DefKind::Param));
    if m.is_library() {
        let defs = m.defs.iter().filter(|d| !d.prelude).count();
        return format!("library, {}", plural(defs, "definition"));
    }
    format!(
        "{}, {}, {}, {}, {}",
        plural(reservoirs, "reservoir"),
        plural(states, "state"),
        plural(fluxes, "flux"),
        plural(params, "parameter"),
        plural(m.stages.len(), "stage")
    )
    .replace("fluxs", "fluxes")
}

fn cmd_fmt(files: &[PathBuf], check_only: bool) -> i32 {
    let files = match expand(files) {
        Ok(f) => f,
        Err(e) => return usage_error(e),
    };
    let mut worst = EXIT_OK;
    for file in &files {
        let text = match check::read_text(file) {
            Ok(t) => t,
            Err(msg) => {
                eprintln!("error: cannot read {}: {msg}", file.display());
                worst = worst.max(EXIT_USAGE);
                continue;
            }
        };
        let mut sources = Sources::default();
        let id = sources.add(
            file.to_string_lossy().into_owned(),
            file.clone(),
            text.clone(),
        );
        let formatted = match crate::syntax::parse(&text, id) {
            Ok(tree) => crate::syntax::format_file(&tree),
            Err(problems) => {
                report(&sources, &problems);
                eprintln!("{}: not formatted (syntax errors)", file.display());
                worst = worst.max(EXIT_INVALID);
                continue;
            }
        };
        if formatted == text {
            continue;
        }
        if check_only {
            let line = first_difference(&text, &formatted);
            println!(
                "would reformat {} (first change at line {line})",
                file.display()
            );
            worst = worst.max(EXIT_INVALID);
        } else if let Err(e) = crate::fsutil::write_atomic(file, formatted.as_bytes()) {
            eprintln!("error: cannot write {}: {e}", file.display());
            worst = worst.max(EXIT_USAGE);
        } else {
            println!("formatted {}", file.display());
        }
    }
    worst
}

fn first_difference(a: &str, b: &str) -> usize {
    a.lines()
        .zip(b.lines())
        .position(|(x, y)| x != y)
        .unwrap_or_else(|| a.lines().count().min(b.lines().count()))
        + 1
}

fn cmd_graph(file: &Path) -> i32 {
    match check::check_file(file, &CheckOptions::default()) {
        Ok(checked) => {
            let g = crate::graph::DepGraph::build(&checked.model);
            print!("{}", g.to_dot(&checked.model));
            EXIT_OK
        }
        Err(CheckError::Io { path, message }) => {
            usage_error(format!("cannot read {}: {message}", path.display()))
        }
        Err(CheckError::Invalid { sources, problems }) => {
            report(&sources, &problems);
            EXIT_INVALID
        }
    }
}
