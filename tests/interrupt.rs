//! Ctrl-C (SIGINT) stops `hadal run` and `hadal ensemble` promptly, with
//! exit code 130 and one line, leaving no half-written file in the output
//! directory or the cache, and a cache whose entries are valid and reused.

#![cfg(unix)]

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

const HADAL: &str = env!("CARGO_BIN_EXE_hadal");

/// A short first stage (cached within a few hundred milliseconds), then a
/// long one: steps of at most 1 kyr over 4.49 Gyr take minutes.
fn long_run(end: &str) -> String {
    format!(
        "scenario long \"a long run\"\nspan 4.5 Ga to {end}\nreport every 1 Myr\n\
         param tau = 3 Gyr\n\
         reservoir a = 1e21 kg\nreservoir b = 1e20 kg\nflux f: a -> b = a / tau\n\
         ensemble {{\n  members = 10000\n  vary tau ~ uniform(2 Gyr, 4 Gyr)\n}}\n\
         stage one from 4.5 Ga to 4.499 Ga\n\
         stage two from 4.499 Ga to {end} {{\n  solver max_step = 1 kyr\n  solver max_steps = 1e9\n}}\n"
    )
}

fn project() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join(".git")).unwrap();
    dir
}

fn hadal(dir: &Path, args: &[&str]) -> Command {
    let mut c = Command::new(HADAL);
    c.args(args)
        .current_dir(dir)
        .env("HADAL_CACHE", dir.join("cache"))
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    c
}

/// Every file under `dir` (none if it does not exist).
fn files_under(dir: &Path) -> Vec<std::path::PathBuf> {
    let mut out = Vec::new();
    let Ok(entries) = std::fs::read_dir(dir) else {
        return out;
    };
    for e in entries.flatten() {
        let p = e.path();
        if p.is_dir() {
            out.extend(files_under(&p));
        } else {
            out.push(p);
        }
    }
    out
}

fn is_temp(p: &Path) -> bool {
    p.file_name()
        .is_some_and(|n| n.to_string_lossy().contains(".tmp-"))
}

/// Send SIGINT once `ready` holds (and at least 300 ms have passed), then
/// wait at most 2 s for the process to end; its exit code and stderr.
fn interrupt(mut child: Child, ready: impl Fn() -> bool) -> (i32, String) {
    let start = Instant::now();
    while start.elapsed() < Duration::from_millis(300)
        || (!ready() && start.elapsed() < Duration::from_secs(60))
    {
        assert!(
            child.try_wait().unwrap().is_none(),
            "the process ended before it was interrupted"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
    // SAFETY: a plain signal to our own child process.
    let rc = unsafe { libc::kill(child.id() as libc::pid_t, libc::SIGINT) };
    assert_eq!(rc, 0);
    let sent = Instant::now();
    let status = loop {
        if let Some(s) = child.try_wait().unwrap() {
            break s;
        }
        if sent.elapsed() > Duration::from_secs(2) {
            let _ = child.kill();
            panic!("still running 2 s after SIGINT");
        }
        std::thread::sleep(Duration::from_millis(10));
    };
    let out = child.wait_with_output().unwrap();
    (
        status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

fn assert_clean(dir: &Path) {
    let cache = files_under(&dir.join("cache"));
    assert!(
        !cache.iter().any(|p| is_temp(p)),
        "temporary files in the cache: {cache:?}"
    );
    let out = hadal(dir, &["cache", "verify"]).output().unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

#[test]
fn ctrl_c_stops_a_run_and_the_cache_stays_usable() {
    let dir = project();
    std::fs::write(dir.path().join("long.hadal"), long_run("0 Ga")).unwrap();
    let child = hadal(
        dir.path(),
        &["run", "long.hadal", "--out", "out", "--no-plots"],
    )
    .spawn()
    .unwrap();
    // Wait until the first stage is in the cache, so that a rerun can
    // reuse it.
    let cache = dir.path().join("cache");
    let (code, stderr) = interrupt(child, || !files_under(&cache).is_empty());
    assert_eq!(code, 130, "{stderr}");
    assert_eq!(
        stderr.trim_end().lines().last(),
        Some("interrupted"),
        "{stderr}"
    );
    // Nothing of the outputs was written, not even under a temporary name.
    assert!(files_under(&dir.path().join("out")).is_empty());
    assert_clean(dir.path());
    // The same first stage, and a short second one: the first is reused.
    std::fs::write(dir.path().join("short.hadal"), long_run("4.49 Ga")).unwrap();
    let out = hadal(
        dir.path(),
        &["run", "short.hadal", "--out", "out", "--no-plots", "--json"],
    )
    .output()
    .unwrap();
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let summary: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    let stages = summary["stages"].as_array().unwrap();
    assert_eq!(stages[0]["status"], "reused", "{summary}");
    assert_eq!(stages[1]["status"], "computed", "{summary}");
    let written = files_under(&dir.path().join("out"));
    assert!(written.iter().any(|p| p.ends_with("manifest.json")));
    assert!(!written.iter().any(|p| is_temp(p)), "{written:?}");
}

#[test]
fn ctrl_c_stops_an_ensemble_after_its_members_in_flight() {
    let dir = project();
    std::fs::write(dir.path().join("long.hadal"), long_run("0 Ga")).unwrap();
    let child = hadal(
        dir.path(),
        &[
            "ensemble",
            "long.hadal",
            "--out",
            "ens",
            "--threads",
            "2",
            "--no-plots",
        ],
    )
    .spawn()
    .unwrap();
    let (code, stderr) = interrupt(child, || true);
    assert_eq!(code, 130, "{stderr}");
    assert_eq!(
        stderr.trim_end().lines().last(),
        Some("interrupted"),
        "{stderr}"
    );
    // No members.csv, complete or temporary: the ensemble did not finish.
    let written = files_under(&dir.path().join("ens"));
    assert!(written.is_empty(), "{written:?}");
    assert_clean(dir.path());
}

/// The library's side, in this process (the other tests here run the
/// binary, so the process-wide flag stays theirs to ignore): once a stop
/// is requested, solving and running return H0608 and write nothing.
#[test]
fn a_requested_stop_is_the_interrupted_error() {
    let dir = project();
    let path = dir.path().join("long.hadal");
    let text = long_run("4.49 Ga");
    std::fs::write(&path, &text).unwrap();
    let model = hadal::check::check_text(
        "long.hadal",
        &path,
        &text,
        dir.path(),
        &hadal::check::CheckOptions::default(),
    )
    .unwrap()
    .model;
    hadal::cancel::request();
    let p = hadal::pipeline::solve_all(&model).unwrap_err();
    assert_eq!((p.code, p.message.as_str()), ("H0608", "interrupted"));
    let store = hadal::cache::Store::new(dir.path().join("cache"));
    let p = hadal::pipeline::execute(&model, Some(&store)).unwrap_err();
    assert_eq!(p.code, "H0608");
    assert!(files_under(&dir.path().join("cache")).is_empty());
}
