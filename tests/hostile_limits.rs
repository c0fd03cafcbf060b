//! Hostile command lines and files, through the real binary: every option
//! value, however huge, empty or strange, is a usage error (exit 2) or
//! works, never a panic (exit 101); a pipe, a device, a socket or a
//! directory where a file is expected is refused without waiting on it; a
//! cache entry that is a link to a device or much larger than its header
//! says is refused without being read; and a cache folder that is a file
//! is an I/O error.
//!
//! Every run has a time bound (the child is killed past it, and the test
//! fails) and its peak memory is read from the kernel (`wait4`).

#![cfg(unix)]

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// A small model with an ensemble block: a run takes milliseconds.
const SCENARIO: &str = "scenario hostile\n\
span 1 Ga to 0 Ga\nreport every 100 Myr\n\
param k = 1e11 kg/yr\n\
reservoir ocean = 1.4e21 kg\nreservoir mantle = 2e20 kg\n\
flux regassing: ocean -> mantle = k * ocean / 1.4e21 kg\n\
stage early from 1 Ga to 0.5 Ga\n\
stage late from 0.5 Ga to 0 Ga\n\
ensemble {\n  members = 4\n  seed = 3\n  vary k ~ uniform(5e10 kg/yr, 2e11 kg/yr)\n}\n";

/// Peak memory allowed for any run here; a bounded read of these small
/// files needs a few megabytes, an unbounded one gigabytes.
const MAX_RSS_KB: i64 = 200 * 1024;

struct Env {
    dir: tempfile::TempDir,
}

struct Ran {
    code: i32,
    stdout: String,
    stderr: String,
    peak_kb: i64,
}

impl Ran {
    /// Whether the output holds `words`, ignoring line breaks and the
    /// gutter of rendered diagnostics (long messages are wrapped).
    fn says(&self, words: &str) -> bool {
        let squeeze = |s: &str| -> String {
            s.chars()
                .filter(|c| !c.is_whitespace() && *c != '│')
                .collect()
        };
        let words = squeeze(words);
        squeeze(&self.stderr).contains(&words) || squeeze(&self.stdout).contains(&words)
    }
}

impl Env {
    fn new() -> Env {
        let dir = tempfile::tempdir().unwrap();
        std::fs::write(dir.path().join("s.hadal"), SCENARIO).unwrap();
        Env { dir }
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    fn run(&self, args: &[&str]) -> Ran {
        self.run_with(args, &self.path("cache"))
    }

    /// Run hadal with `args` and the cache at `cache`; fails the test if
    /// it runs past its time bound (it is then killed), ends by a signal,
    /// panics or uses more than [`MAX_RSS_KB`].
    fn run_with(&self, args: &[&str], cache: &Path) -> Ran {
        let out = self.path(".stdout");
        let err = self.path(".stderr");
        // Reaped by `wait_bounded` with `wait4`, which also gives its peak
        // memory; `Child::wait` would not.
        #[allow(clippy::zombie_processes)]
        let child = Command::new(env!("CARGO_BIN_EXE_hadal"))
            .current_dir(self.dir.path())
            .env("HADAL_CACHE", cache)
            .env("NO_COLOR", "1")
            .args(args)
            .stdin(Stdio::null())
            .stdout(std::fs::File::create(&out).unwrap())
            .stderr(std::fs::File::create(&err).unwrap())
            .spawn()
            .expect("run hadal");
        let (status, peak_kb) = wait_bounded(child.id(), Duration::from_secs(60), args);
        let ran = Ran {
            code: status,
            stdout: std::fs::read_to_string(&out).unwrap_or_default(),
            stderr: std::fs::read_to_string(&err).unwrap_or_default(),
            peak_kb,
        };
        assert_ne!(ran.code, 101, "{args:?} panicked:\n{}", ran.stderr);
        assert!(
            !ran.stderr.contains("panicked"),
            "{args:?} panicked:\n{}",
            ran.stderr
        );
        assert!(
            ran.peak_kb < MAX_RSS_KB,
            "{args:?} used {} kB at its peak",
            ran.peak_kb
        );
        ran
    }
}

/// Wait for process `pid` at most `bound`, killing it past that; returns
/// its exit code and peak resident memory in kB. Reaped with `wait4`,
/// which reports that child's own peak.
fn wait_bounded(pid: u32, bound: Duration, what: &[&str]) -> (i32, i64) {
    let pid = pid as libc::pid_t;
    let start = Instant::now();
    loop {
        let mut status = 0;
        // SAFETY: plain system call on our own child with valid pointers.
        let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
        let r = unsafe { libc::wait4(pid, &mut status, libc::WNOHANG, &mut usage) };
        assert!(r >= 0, "wait4 failed");
        if r == pid {
            assert!(
                libc::WIFEXITED(status),
                "{what:?} ended by signal {}",
                libc::WTERMSIG(status)
            );
            return (libc::WEXITSTATUS(status), usage.ru_maxrss);
        }
        if start.elapsed() > bound {
            // SAFETY: killing and reaping our own child.
            unsafe {
                libc::kill(pid, libc::SIGKILL);
                libc::waitpid(pid, &mut status, 0);
            }
            panic!("{what:?} ran past {bound:?} (a hang); killed");
        }
        std::thread::sleep(Duration::from_millis(10));
    }
}

fn mkfifo(path: &Path) {
    let ok = Command::new("mkfifo")
        .arg(path)
        .status()
        .expect("mkfifo")
        .success();
    assert!(ok, "mkfifo failed");
}

/// Every file of the cache's entry folders (`cache/v2/ab/...`).
fn entries(cache: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for d in std::fs::read_dir(cache.join("v2")).unwrap().flatten() {
        for f in std::fs::read_dir(d.path()).unwrap().flatten() {
            out.push(f.path());
        }
    }
    out.sort();
    assert!(!out.is_empty(), "the first run wrote no entries");
    out
}

#[test]
fn durations_and_sizes_of_cache_gc_are_checked() {
    let env = Env::new();
    for dur in [
        "18446744073709551615s",
        "18446744073709551616s",
        "99999999999999999999999w",
        "",
        " ",
        "-1s",
        "NaNs",
        "inf",
        "infs",
        "1e400s",
        "s",
        "..s",
        "３０d",
        "30 days",
        "30d\u{200b}",
    ] {
        // `--opt=VALUE`, so that a value starting with `-` is a value.
        let r = env.run(&["cache", "gc", &format!("--older-than={dur}")]);
        assert_eq!(r.code, 2, "--older-than {dur:?}: {}", r.stderr);
        assert!(r.says("write a duration"), "{dur:?}: {}", r.stderr);
    }
    for size in [
        "18446744073709551616",
        "99999999999G",
        "-1M",
        "",
        "NaN",
        "1e9",
        "５M",
    ] {
        let r = env.run(&["cache", "gc", &format!("--max-size={size}")]);
        assert_eq!(r.code, 2, "--max-size {size:?}: {}", r.stderr);
        assert!(r.says("write a size"), "{size:?}: {}", r.stderr);
    }
    // Zero, and the largest values that fit, work.
    for args in [
        ["--older-than", "0s"],
        ["--older-than", "18446744073709000000s"],
        ["--max-size", "0"],
        ["--max-size", "18446744073709549568"],
    ] {
        let r = env.run(&["cache", "gc", args[0], args[1]]);
        assert_eq!(r.code, 0, "{args:?}: {}", r.stderr);
    }
}

#[test]
fn counts_seeds_shards_and_threads_of_ensemble_are_checked() {
    let env = Env::new();
    let usage = |args: &[&str], words: &str| {
        let mut all = vec!["ensemble", "s.hadal", "--no-plots", "--out", "e"];
        all.extend_from_slice(args);
        let r = env.run(&all);
        assert_eq!(r.code, 2, "{args:?}: {}", r.stderr);
        assert!(r.says(words), "{args:?}: {}", r.stderr);
    };
    usage(&["--threads", "100000"], "more than the limit of 1024");
    usage(
        &["--threads", "18446744073709551615"],
        "more than the limit",
    );
    usage(&["--threads", "18446744073709551616"], "--threads");
    usage(&["--threads", "0"], "at least 1");
    usage(&["--threads=-1"], "--threads");
    usage(&["--threads", ""], "--threads");
    usage(
        &["--members", "18446744073709551615"],
        "more than the limit",
    );
    usage(
        &["--members", "10000001"],
        "more than the limit of 10000000",
    );
    usage(&["--members", "0"], "at least 1");
    usage(&["--members", "1e3"], "--members");
    usage(&["--members", "NaN"], "--members");
    usage(&["--seed=-1"], "--seed");
    usage(&["--seed", "18446744073709551616"], "--seed");
    usage(&["--seed", "inf"], "--seed");
    for shard in [
        "0/0",
        "1/0",
        "2/1",
        "",
        "/",
        "1/",
        "-1/2",
        "1/18446744073709551616",
        "١/٢",
        "1/2/3",
        "NaN/1",
    ] {
        usage(&[&format!("--shard={shard}")], "is not K/N");
    }
    // Values at the ends of their ranges work: the last of 2^64-1 shards
    // (its bounds need more than 64 bits to compute) and the largest seed.
    let r = env.run(&[
        "ensemble",
        "s.hadal",
        "--no-plots",
        "--no-cache",
        "--out",
        "last",
        "--shard",
        "18446744073709551615/18446744073709551615",
        "--seed",
        "18446744073709551615",
        "--threads",
        "1024",
    ]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(r.says("1 members of 4"), "{}", r.stdout);
}

#[test]
fn rtol_of_verify_is_checked() {
    let env = Env::new();
    for rtol in ["NaN", "inf", "-1", "1e999", "", "-0.5"] {
        let r = env.run(&["verify", "m.json", &format!("--rtol={rtol}")]);
        assert_eq!(r.code, 2, "--rtol {rtol:?}: {}", r.stderr);
        assert!(r.says("--rtol"), "{rtol:?}: {}", r.stderr);
    }
}

#[test]
fn a_grid_design_past_64_bits_is_refused_not_wrapped_to_one_member() {
    let env = Env::new();
    let grid = SCENARIO.replace(
        "  vary k ~ uniform(5e10 kg/yr, 2e11 kg/yr)\n",
        "  vary k ~ grid(5e10 kg/yr, 2e11 kg/yr, 1e6)\n  vary a ~ grid(0, 1, 1e6)\n  \
         vary b ~ grid(0, 1, 1e6)\n  vary c ~ grid(0, 1, 1e6)\n",
    );
    let grid = grid
        .replace("  members = 4\n", "")
        .replace("param k", "param a = 1\nparam b = 1\nparam c = 1\nparam k");
    std::fs::write(env.path("grid.hadal"), grid).unwrap();
    for args in [
        vec!["check", "grid.hadal"],
        vec!["ensemble", "grid.hadal", "--no-plots", "--out", "g"],
    ] {
        let r = env.run(&args);
        assert_eq!(r.code, 1, "{args:?}: {}{}", r.stdout, r.stderr);
        assert!(r.says("H0413"), "{}", r.stderr);
        assert!(
            r.says("more than 18446744073709551615 members"),
            "{}",
            r.stderr
        );
    }
    assert!(!env.path("g").exists(), "no member ran");
}

#[test]
fn a_pipe_device_socket_or_directory_as_the_scenario_is_refused_unread() {
    let env = Env::new();
    mkfifo(&env.path("pipe.hadal"));
    let _socket = std::os::unix::net::UnixListener::bind(env.path("sock.hadal")).unwrap();
    std::fs::create_dir(env.path("dir.hadal")).unwrap();
    for (file, words) in [
        ("pipe.hadal", "is not a regular file"),
        ("sock.hadal", "is not a regular file"),
        ("/dev/zero", "is not a regular file"),
        ("/dev/null", "is not a regular file"),
        ("dir.hadal", "is a directory"),
    ] {
        // `check` and `fmt` search a directory for scenarios.
        let listing: &[&[&str]] = if file == "dir.hadal" {
            &[]
        } else {
            &[&["check", file], &["fmt", file], &["fmt", "--check", file]]
        };
        for verb in listing.iter().copied().chain([
            &["graph", file][..],
            &["params", file],
            &["run", file, "--no-plots", "--out", "o"],
            &["ensemble", file, "--no-plots", "--out", "e"],
        ]) {
            let r = env.run(verb);
            assert_eq!(r.code, 2, "{verb:?}: {}", r.stderr);
            assert!(r.says(words), "{verb:?}: {}", r.stderr);
        }
    }
}

/// Run the scenario once (filling the cache), replace every entry by what
/// `plant` makes of it, and run again: the entries are refused (H0701,
/// with `why`), the run gives the same series, and nothing hangs or grows.
fn planted_entries_are_refused(plant: impl Fn(&Path), why: &str) {
    let env = Env::new();
    let first = env.run(&["run", "s.hadal", "--no-plots", "--out", "a"]);
    assert_eq!(first.code, 0, "{}", first.stderr);
    for e in entries(&env.path("cache")) {
        plant(&e);
    }
    let verify = env.run(&["cache", "verify"]);
    assert_eq!(verify.code, 1, "{}", verify.stderr);
    assert!(verify.says(why), "{}", verify.stderr);
    let again = env.run(&["run", "s.hadal", "--no-plots", "--out", "b"]);
    assert_eq!(again.code, 0, "{}", again.stderr);
    assert!(again.says("H0701"), "{}", again.stderr);
    assert!(again.says(why), "{}", again.stderr);
    assert_eq!(
        std::fs::read(env.path("a/series.csv")).unwrap(),
        std::fs::read(env.path("b/series.csv")).unwrap()
    );
    // The refused entries were replaced by good ones.
    let third = env.run(&["cache", "verify"]);
    assert_eq!(third.code, 0, "{}", third.stderr);
}

#[test]
fn a_cache_entry_that_is_a_pipe_is_refused_not_waited_on() {
    planted_entries_are_refused(
        |e| {
            std::fs::remove_file(e).unwrap();
            mkfifo(e);
        },
        "is not a regular file",
    );
}

#[test]
fn a_cache_entry_linked_to_an_endless_device_is_refused_unread() {
    planted_entries_are_refused(
        |e| {
            std::fs::remove_file(e).unwrap();
            std::os::unix::fs::symlink("/dev/zero", e).unwrap();
        },
        "is a symbolic link",
    );
}

#[test]
fn a_cache_entry_linked_to_a_good_entry_is_still_refused() {
    // A link could point anywhere (a device, another user's file): entries
    // are only ever regular files the store wrote.
    planted_entries_are_refused(
        |e| {
            let moved = e.with_file_name(".moved");
            let target = e
                .parent()
                .unwrap()
                .parent()
                .unwrap()
                .join(format!("kept-{}", e.file_name().unwrap().to_string_lossy()));
            std::fs::rename(e, &moved).unwrap();
            std::fs::rename(&moved, &target).unwrap();
            std::os::unix::fs::symlink(&target, e).unwrap();
        },
        "is a symbolic link",
    );
}

/// Make the entry at `e` longer by `extra` bytes, as a sparse file: no
/// disk is used, and a reader that reads it whole needs that much memory.
fn pad(e: &Path, extra: u64) {
    let f = std::fs::OpenOptions::new().write(true).open(e).unwrap();
    let len = f.metadata().unwrap().len();
    f.set_len(len + extra).unwrap();
}

#[test]
fn a_cache_entry_longer_than_its_header_says_is_refused_unread() {
    // Refused from its length alone: memory stays far below the padding.
    planted_entries_are_refused(|e| pad(e, 900 * 1024 * 1024), "truncated or padded");
}

#[test]
fn a_cache_entry_past_the_entry_limit_is_refused_unread() {
    planted_entries_are_refused(
        |e| pad(e, 3 * 1024 * 1024 * 1024),
        "more than the limit of 1073741824 bytes",
    );
}

#[test]
fn a_cache_folder_that_is_a_file_is_an_io_error() {
    let env = Env::new();
    std::fs::write(env.path("cachefile"), b"not a folder").unwrap();
    for cache in [env.path("cachefile"), env.path("cachefile/sub")] {
        for verb in [
            &["run", "s.hadal", "--no-plots", "--out", "o"][..],
            &["ensemble", "s.hadal", "--no-plots", "--out", "e"],
            &["cache", "stats"],
            &["cache", "verify"],
            &["cache", "gc", "--older-than", "1d"],
        ] {
            let r = env.run_with(verb, &cache);
            assert_eq!(r.code, 2, "{verb:?}: {}", r.stderr);
            assert!(r.says("is not a directory"), "{verb:?}: {}", r.stderr);
            assert!(!r.says("corrupt"), "{verb:?}: {}", r.stderr);
        }
    }
    // Without the cache the run works.
    let r = env.run_with(
        &["run", "s.hadal", "--no-plots", "--no-cache", "--out", "o"],
        &env.path("cachefile"),
    );
    assert_eq!(r.code, 0, "{}", r.stderr);
}

#[test]
fn outputs_read_back_that_are_pipes_are_refused_not_waited_on() {
    let env = Env::new();
    for out in ["a", "b"] {
        let r = env.run(&["run", "s.hadal", "--no-plots", "--out", out]);
        assert_eq!(r.code, 0, "{}", r.stderr);
    }
    std::fs::remove_file(env.path("b/series.csv")).unwrap();
    mkfifo(&env.path("b/series.csv"));
    let r = env.run(&["diff", "a", "b"]);
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.says("is not a regular file"), "{}", r.stderr);

    std::fs::remove_file(env.path("a/stages.csv")).unwrap();
    mkfifo(&env.path("a/stages.csv"));
    let r = env.run(&["plot", "a"]);
    assert_eq!(r.code, 1, "{}", r.stderr);
    assert!(r.says("is not a regular file"), "{}", r.stderr);
    // The manifest is optional for the report page: a pipe is skipped.
    std::fs::remove_file(env.path("a/stages.csv")).unwrap();
    std::fs::remove_file(env.path("a/manifest.json")).unwrap();
    mkfifo(&env.path("a/manifest.json"));
    let r = env.run(&["report", "a"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
}

#[test]
fn shards_whose_files_are_pipes_are_refused_not_waited_on() {
    let env = Env::new();
    for k in ["1/2", "2/2"] {
        let out = format!("s{}", &k[..1]);
        let r = env.run(&[
            "ensemble",
            "s.hadal",
            "--no-plots",
            "--shard",
            k,
            "--out",
            &out,
        ]);
        assert_eq!(r.code, 0, "{}", r.stderr);
    }
    let merged = env.run(&["merge", "s1", "s2", "--out", "m"]);
    assert_eq!(merged.code, 0, "{}", merged.stderr);
    for name in ["members.csv", "ensemble.state"] {
        let f = env.path(&format!("s2/{name}"));
        let keep = std::fs::read(&f).unwrap();
        std::fs::remove_file(&f).unwrap();
        mkfifo(&f);
        let r = env.run(&["merge", "s1", "s2", "--out", "m2"]);
        assert_eq!(r.code, 1, "{name}: {}", r.stderr);
        assert!(r.says("is not a regular file"), "{name}: {}", r.stderr);
        std::fs::remove_file(&f).unwrap();
        std::fs::write(&f, keep).unwrap();
    }
    // Merging streams members.csv: the same bytes as before.
    let again = env.run(&["merge", "s1", "s2", "--out", "m3"]);
    assert_eq!(again.code, 0, "{}", again.stderr);
    assert_eq!(
        std::fs::read(env.path("m/members.csv")).unwrap(),
        std::fs::read(env.path("m3/members.csv")).unwrap()
    );
}

#[test]
fn a_folder_with_links_to_itself_is_searched_once() {
    // `check DIR` searches DIR for scenarios; following the two links
    // would visit 2^depth folders.
    let env = Env::new();
    std::fs::create_dir(env.path("d")).unwrap();
    std::fs::copy(env.path("s.hadal"), env.path("d/s.hadal")).unwrap();
    std::os::unix::fs::symlink(".", env.path("d/again")).unwrap();
    std::os::unix::fs::symlink("..", env.path("d/up")).unwrap();
    std::os::unix::fs::symlink("s.hadal", env.path("d/linked.hadal")).unwrap();
    let r = env.run(&["check", "d"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let oks: Vec<&str> = r.stdout.lines().filter(|l| l.starts_with("ok ")).collect();
    assert_eq!(oks.len(), 2, "{}", r.stdout);
}
