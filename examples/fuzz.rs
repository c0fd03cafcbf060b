//! A fuzz campaign over hadal's input surfaces (parser, checker with
//! includes and tables, formatter, diagnostics rendering, solver), on stable
//! Rust. The mutation code is shared with `tests/fuzz_smoke.rs`; see
//! `tests/support/fuzzer.rs` for what each case checks.
//!
//!     cargo run --release --example fuzz -- --count 20000 --seed 1
//!     nice -n 19 cargo run --release --example fuzz -- --count 1000000 --jobs 2 --save /tmp/fuzz-fail
//!
//! Options: `--count N` cases (default 10000), `--seed S` (default 1),
//! `--start I` first case index (replay one case with `--start I --count 1`),
//! `--jobs J` worker threads (default 1), `--hang-ms MS` (default 2000),
//! `--no-solve`, `--print` (show the inputs, run nothing), `--write DIR`
//! (write each input as a project `DIR/case-SEED-I/`, run nothing), `--save DIR` where failing cases are written (default
//! `fuzz-failures`). Exit status 0 when every case passed, 1 otherwise, 2 on
//! bad arguments.
//!
//! A stack overflow aborts the process (it cannot be caught); the abort
//! message names the thread, `fuzz case I`, so replay that index.

#[path = "../tests/support/fuzzer.rs"]
mod fuzzer;

use std::path::PathBuf;
use std::time::Duration;

fn main() {
    let mut settings = fuzzer::Settings {
        count: 10_000,
        save_dir: Some(PathBuf::from("fuzz-failures")),
        ..Default::default()
    };
    let mut jobs = 1usize;
    let mut print = false;
    let mut write: Option<PathBuf> = None;
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut value = |name: &str| -> String {
            args.next().unwrap_or_else(|| {
                eprintln!("fuzz: {name} needs a value");
                std::process::exit(2)
            })
        };
        let number = |name: &str, v: String| -> u64 {
            v.replace('_', "").parse().unwrap_or_else(|_| {
                eprintln!("fuzz: {name} needs a whole number, not `{v}`");
                std::process::exit(2)
            })
        };
        match a.as_str() {
            "--count" => settings.count = number("--count", value("--count")),
            "--seed" => settings.seed = number("--seed", value("--seed")),
            "--start" => settings.start = number("--start", value("--start")),
            "--jobs" => jobs = number("--jobs", value("--jobs")) as usize,
            "--hang-ms" => {
                settings.hang_after = Duration::from_millis(number("--hang-ms", value("--hang-ms")))
            }
            "--save" => settings.save_dir = Some(PathBuf::from(value("--save"))),
            "--no-solve" => settings.solve = false,
            "--print" => print = true,
            "--write" => write = Some(PathBuf::from(value("--write"))),
            "-h" | "--help" => {
                println!("usage: fuzz [--count N] [--seed S] [--start I] [--jobs J] [--hang-ms MS] [--no-solve] [--save DIR]");
                return;
            }
            other => {
                eprintln!("fuzz: unknown argument `{other}` (see --help)");
                std::process::exit(2);
            }
        }
    }
    if print || write.is_some() {
        // Show or write out the inputs instead of running them.
        let corpus = fuzzer::Corpus::load();
        for i in settings.start..settings.start + settings.count {
            let case = fuzzer::make_case(&corpus, settings.seed, i);
            if let Some(dir) = &write {
                let d = dir.join(format!("case-{}-{i}", settings.seed));
                if let Err(e) = case.save(&d) {
                    eprintln!("fuzz: cannot write {}: {e}", d.display());
                    std::process::exit(2);
                }
            } else {
                println!("==== case {i}\n{}", String::from_utf8_lossy(&case.scenario));
            }
        }
        return;
    }
    println!(
        "fuzz: seed {}, cases {}..{}, {jobs} job(s), hang limit {} ms + {} ms per MB of input, solve {}",
        settings.seed,
        settings.start,
        settings.start + settings.count,
        settings.hang_after.as_millis(),
        settings.hang_per_mb.as_millis(),
        if settings.solve { "on" } else { "off" }
    );
    let report = fuzzer::run_parallel(&settings, jobs, |k, r| {
        println!("  [job {k}] {}", r.summary());
    });
    println!("fuzz: {}", report.summary());
    for f in &report.failures {
        let saved = f
            .saved
            .as_ref()
            .map(|p| format!(" (saved in {})", p.display()))
            .unwrap_or_default();
        println!(
            "FAIL case {}: {}{saved}\n  replay: cargo run --release --example fuzz -- --seed {} --start {} --count 1",
            f.index, f.what, settings.seed, f.index
        );
    }
    std::process::exit(if report.failures.is_empty() { 0 } else { 1 });
}
