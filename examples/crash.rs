//! Crash trials: kill `hadal run` with SIGKILL at random moments, against
//! one shared cache and one shared output directory, and check that
//! nothing it leaves behind is half-written or ever used.
//!
//!     cargo build --release && cargo run --release --example crash -- --trials 50
//!     tools/crash_test.sh            # the same, building first
//!
//! The scenario is the hot-start demo with a 100 kyr cadence (a 14 MB
//! series) and its middle stage split in thirty, so a run lasts long enough
//! (about half a second cold) to be killed while solving, while writing
//! cache entries, or while writing outputs. Each trial runs the base
//! scenario or one of ten variants (`--set delivery_efold=...`, which
//! changes the first stage and so every stage after it), mostly with the
//! shared cache, sometimes with `--no-cache`, and kills it after a random
//! delay between zero and the run's expected length (a cold run, or a warm
//! one once that variant has completed with the shared cache), so most
//! trials are killed mid-run. After every trial:
//!
//! - every cache entry verifies (`Store::verify`, as `hadal cache verify`);
//! - if the output directory has a `manifest.json`, it parses and every
//!   output it lists exists with exactly the hash and size it records;
//! - every output file present is byte-identical to that file of a clean
//!   run of one of the variants (complete, never a torn mix); figures too.
//!
//! After all trials: a run to completion leaves no temporary file in the
//! output directory (it removes those of killed runs); `hadal cache verify`
//! passes; `hadal cache gc` removes the cache's temporary files; the outputs
//! are byte-identical to a clean run with a fresh cache (the manifest's
//! `compared` part equal) and `hadal verify` accepts them.
//!
//! Then concurrency: eight processes at once on one fresh cache and one
//! output root (four variants, so they compute and store the same stages at
//! the same moment), and four at once into one directory; every output
//! equals the serial run of its variant. Then, when run as root, a full
//! disk (a 64 KiB and a 220 KiB tmpfs): a clear error, exit 2, and the
//! previous complete outputs left intact.
//!
//! Ensemble trials (`hadal ensemble`) are a separate section, off by
//! default: `--ensemble` runs them too (see `ensemble_trials`).
//!
//! Options: `--trials N` (100), `--seed S` (1), `--hadal PATH` (default
//! `target/release/hadal`), `--keep` (keep the work directory), `--ensemble`,
//! `--ensemble-trials N` (20). Exit status 0 when every check passed.

// Only its random number generator is used here.
#[path = "../tests/support/fuzzer.rs"]
mod fuzzer;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use fuzzer::Rng;

struct Options {
    trials: usize,
    seed: u64,
    hadal: PathBuf,
    keep: bool,
    ensemble: bool,
    ensemble_trials: usize,
}

/// Every check that failed, in words.
#[derive(Default)]
struct Findings(Vec<String>);

impl Findings {
    fn fail(&mut self, what: impl Into<String>) {
        let what = what.into();
        println!("  FAIL {what}");
        self.0.push(what);
    }
    fn check(&mut self, ok: bool, what: impl Into<String>) {
        if !ok {
            self.fail(what);
        }
    }
}

fn main() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
    let mut o = Options {
        trials: 100,
        seed: 1,
        hadal: root.join("target/release/hadal"),
        keep: false,
        ensemble: false,
        ensemble_trials: 20,
    };
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut value = || {
            args.next().unwrap_or_else(|| {
                eprintln!("crash: {a} needs a value");
                std::process::exit(2)
            })
        };
        match a.as_str() {
            "--trials" => o.trials = value().parse().unwrap_or(100),
            "--seed" => o.seed = value().parse().unwrap_or(1),
            "--hadal" => o.hadal = PathBuf::from(value()),
            "--keep" => o.keep = true,
            "--ensemble" => o.ensemble = true,
            "--ensemble-trials" => o.ensemble_trials = value().parse().unwrap_or(20),
            other => {
                eprintln!("crash: unknown argument `{other}`");
                std::process::exit(2);
            }
        }
    }
    if !o.hadal.is_file() {
        eprintln!(
            "crash: no hadal binary at {} (run `cargo build --release` first)",
            o.hadal.display()
        );
        std::process::exit(2);
    }
    // Children run in the project directory: use an absolute path.
    o.hadal = std::fs::canonicalize(&o.hadal).unwrap_or(o.hadal);
    let work = tempfile::Builder::new()
        .prefix("hadal-crash-")
        .tempdir()
        .expect("a work directory");
    let w = work.path().to_owned();
    println!("crash: work directory {}", w.display());
    let mut f = Findings::default();
    let project = make_project(&root, &w);
    let reference = run_trials(&o, &w, &project, &mut f);
    concurrent(&o, &w, &project, &reference, &mut f);
    disk_full(&o, &w, &project, &mut f);
    if o.ensemble {
        ensemble_trials(&o, &w, &project, &mut f);
    } else {
        println!("ensemble trials: off (enable with --ensemble)");
    }
    if f.0.is_empty() {
        println!("crash: all checks passed");
    } else {
        println!("crash: {} checks failed:", f.0.len());
        for x in &f.0 {
            println!("  - {x}");
        }
    }
    if o.keep || !f.0.is_empty() {
        let kept = work.keep();
        println!("crash: kept {}", kept.display());
    }
    std::process::exit(if f.0.is_empty() { 0 } else { 1 });
}

// ---- the project ------------------------------------------------------------

fn copy_tree(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap().flatten() {
        let p = e.path();
        if p.is_dir() {
            copy_tree(&p, &to.join(e.file_name()));
        } else {
            std::fs::copy(&p, to.join(e.file_name())).unwrap();
        }
    }
}

/// A project (with `.git`) holding the demo scenarios and `slow.hadal`.
fn make_project(root: &Path, w: &Path) -> PathBuf {
    let project = w.join("project");
    copy_tree(&root.join("scenarios"), &project);
    std::fs::create_dir_all(project.join(".git")).unwrap();
    let demo = std::fs::read_to_string(project.join("hot_start.hadal")).unwrap();
    let mut middle = String::new();
    for i in 0..30 {
        let a = 40 - i;
        middle.push_str(&format!(
            "stage m{i:02} from {} Ga to {} Ga\n",
            fmt_tenth(a),
            fmt_tenth(a - 1)
        ));
    }
    let slow = demo
        .replace("report every 10 Myr", "report every 100 kyr")
        .replace("stage middle from 4 Ga to 1 Ga\n", &middle);
    assert!(
        slow.contains("stage m29 from 1.1 Ga to 1 Ga"),
        "the demo changed shape"
    );
    std::fs::write(project.join("slow.hadal"), slow).unwrap();
    project
}

fn fmt_tenth(tenths: i32) -> String {
    if tenths % 10 == 0 {
        format!("{}", tenths / 10)
    } else {
        format!("{}.{}", tenths / 10, tenths % 10)
    }
}

/// `--set` arguments of variant `v` (0 is the scenario as written).
fn variant_sets(v: usize) -> Vec<String> {
    if v == 0 {
        Vec::new()
    } else {
        vec![format!("delivery_efold={} Myr", 40 + 2 * v)]
    }
}

const VARIANTS: usize = 11;

fn hadal_run(
    o: &Options,
    project: &Path,
    cache: &Path,
    out: &Path,
    sets: &[String],
    no_cache: bool,
) -> Command {
    let mut c = Command::new(&o.hadal);
    c.current_dir(project)
        .env("HADAL_CACHE", cache)
        .env("NO_COLOR", "1")
        .arg("run")
        .arg("slow.hadal")
        .arg("--out")
        .arg(out);
    for s in sets {
        c.arg("--set").arg(s);
    }
    if no_cache {
        c.arg("--no-cache");
    }
    c.stdout(Stdio::null()).stderr(Stdio::piped());
    c
}

/// Every regular file of a directory (not temporary ones), by name.
fn files_of(dir: &Path) -> BTreeMap<String, Vec<u8>> {
    let mut out = BTreeMap::new();
    if let Ok(rd) = std::fs::read_dir(dir) {
        for e in rd.flatten() {
            let name = e.file_name().to_string_lossy().into_owned();
            if e.path().is_file() && !is_temp(&name) {
                out.insert(name, std::fs::read(e.path()).unwrap_or_default());
            }
        }
    }
    out
}

/// A temporary file: `fsutil`'s `.NAME.tmp-HOST-PID-N`, or any other
/// hidden `.NAME.tmp-...` a writer may use.
fn is_temp(name: &str) -> bool {
    hadal::fsutil::temp_owner(name).is_some() || (name.starts_with('.') && name.contains(".tmp-"))
}

/// Temporary files anywhere below `dir`.
fn temps_below(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_owned()];
    while let Some(d) = stack.pop() {
        if let Ok(rd) = std::fs::read_dir(&d) {
            for e in rd.flatten() {
                let p = e.path();
                if p.is_dir() {
                    stack.push(p);
                } else if is_temp(&e.file_name().to_string_lossy()) {
                    out.push(p);
                }
            }
        }
    }
    out
}

/// The `compared` part of a manifest, as JSON.
fn compared(manifest: &[u8]) -> Option<serde_json::Value> {
    let v: serde_json::Value = serde_json::from_slice(manifest).ok()?;
    v.get("compared").cloned()
}

/// A manifest that is present must parse and match every file it lists.
fn check_manifest(dir: &Path, f: &mut Findings, when: &str) {
    let path = dir.join("manifest.json");
    if !path.exists() {
        return;
    }
    let m = match hadal::manifest::Manifest::read(&path) {
        Ok(m) => m,
        Err(e) => return f.fail(format!("{when}: manifest.json does not parse: {e}")),
    };
    for o in &m.compared.outputs {
        match std::fs::read(dir.join(&o.path)) {
            Err(_) => f.fail(format!(
                "{when}: manifest lists `{}`, which is missing",
                o.path
            )),
            Ok(b) => f.check(
                b.len() as u64 == o.bytes && hadal::manifest::hash_bytes(&b) == o.blake3,
                format!("{when}: `{}` does not match the manifest", o.path),
            ),
        }
    }
}

fn check_cache(cache: &Path, f: &mut Findings, when: &str) -> u64 {
    let (n, bad) = hadal::cache::Store::new(cache).verify();
    for b in &bad {
        f.fail(format!(
            "{when}: corrupt cache entry {}: {}",
            b.path.display(),
            b.why
        ));
    }
    n
}

// ---- run trials ---------------------------------------------------------------

/// The trials; returns the clean outputs of every variant.
fn run_trials(
    o: &Options,
    w: &Path,
    project: &Path,
    f: &mut Findings,
) -> Vec<BTreeMap<String, Vec<u8>>> {
    // Clean runs of every variant, each with a fresh cache: the reference
    // bytes, and how long a cold run takes.
    let mut reference: Vec<BTreeMap<String, Vec<u8>>> = Vec::new();
    let mut colds = Vec::new();
    for v in 0..VARIANTS {
        let out = w.join(format!("clean/{v}"));
        let cache = w.join(format!("clean-cache/{v}"));
        let t = Instant::now();
        let r = hadal_run(o, project, &cache, &out, &variant_sets(v), false)
            .output()
            .expect("run hadal");
        colds.push(t.elapsed());
        if !r.status.success() {
            f.fail(format!(
                "clean run of variant {v} failed: {}",
                String::from_utf8_lossy(&r.stderr)
            ));
            return reference;
        }
        reference.push(files_of(&out));
    }
    // The median: a busy machine makes single timings noisy.
    colds.sort();
    let cold = colds[colds.len() / 2];
    println!(
        "run trials: {} trials, cold run {:.0} ms, {} variants",
        o.trials,
        cold.as_secs_f64() * 1e3,
        VARIANTS
    );
    // A run whose stages are all cached is quicker: the fastest of three.
    let mut warm = Duration::MAX;
    let mut r = None;
    for _ in 0..3 {
        let t = Instant::now();
        let out = hadal_run(
            o,
            project,
            &w.join("clean-cache/0"),
            &w.join("warm"),
            &[],
            false,
        )
        .output()
        .expect("run hadal");
        warm = warm.min(t.elapsed());
        r = Some(out);
    }
    let r = r.expect("three runs");
    f.check(r.status.success(), "a warm run failed");
    println!("  warm run {:.0} ms", warm.as_secs_f64() * 1e3);
    let cache = w.join("cache");
    let out = w.join("out");
    let mut rng = Rng::new(o.seed);
    // Variants that have completed once with the shared cache: their runs
    // are warm from then on, and are killed within a warm run's time.
    let mut cached = [false; VARIANTS];
    let (mut killed, mut finished, mut temps_seen) = (0, 0, 0);
    for trial in 0..o.trials {
        let v = rng.below(VARIANTS);
        let no_cache = rng.one_in(10);
        let expected = if cached[v] && !no_cache { warm } else { cold };
        let delay = expected.mul_f64(rng.below(1000) as f64 / 1000.0);
        let mut child = hadal_run(o, project, &cache, &out, &variant_sets(v), no_cache)
            .spawn()
            .expect("spawn hadal");
        std::thread::sleep(delay);
        let done_before = matches!(child.try_wait(), Ok(Some(_)));
        // `Child::kill` sends SIGKILL on Unix: no handler, no cleanup.
        let _ = child.kill();
        let status = child.wait().expect("wait for hadal");
        if done_before {
            finished += 1;
            cached[v] |= !no_cache;
            if !status.success() {
                f.fail(format!("trial {trial}: an unkilled run failed ({status})"));
            }
        } else {
            killed += 1;
        }
        let when = format!(
            "trial {trial} (variant {v}, killed after {} ms)",
            delay.as_millis()
        );
        check_cache(&cache, f, &when);
        check_manifest(&out, f, &when);
        for (name, bytes) in files_of(&out) {
            // A manifest also records facts of its run (wall time, cache
            // use); compare the part that must be the same.
            let complete = if name == "manifest.json" {
                let c = compared(&bytes);
                c.is_some()
                    && reference
                        .iter()
                        .any(|r| r.get(&name).and_then(|b| compared(b)) == c)
            } else {
                reference.iter().any(|r| r.get(&name) == Some(&bytes))
            };
            f.check(
                complete,
                format!("{when}: `{name}` is not a complete output of any variant"),
            );
        }
        temps_seen += temps_below(&out).len();
    }
    println!(
        "  {killed} killed while running, {finished} finished first; {temps_seen} temporary files left by killed runs were seen"
    );

    // A run to completion cleans up after the killed ones and reproduces a
    // clean run byte for byte.
    let r = hadal_run(o, project, &cache, &out, &[], false)
        .output()
        .expect("run hadal");
    f.check(r.status.success(), "the final run failed");
    let left = temps_below(&out);
    f.check(
        left.is_empty(),
        format!("temporary files left in the output directory after a full run: {left:?}"),
    );
    let entries = check_cache(&cache, f, "after the trials");
    let verify = Command::new(&o.hadal)
        .env("HADAL_CACHE", &cache)
        .args(["cache", "verify"])
        .output()
        .expect("hadal cache verify");
    f.check(
        verify.status.success(),
        "`hadal cache verify` failed after the trials",
    );
    let cache_temps = temps_below(&cache).len();
    let gc = Command::new(&o.hadal)
        .env("HADAL_CACHE", &cache)
        .args(["cache", "gc", "--older-than", "3650d"])
        .output()
        .expect("hadal cache gc");
    f.check(gc.status.success(), "`hadal cache gc` failed");
    let after_gc = temps_below(&cache);
    f.check(
        after_gc.is_empty(),
        format!("`hadal cache gc` left temporary files: {after_gc:?}"),
    );
    println!(
        "  cache: {entries} entries verify; {cache_temps} temporary files from killed writers, {} after `hadal cache gc`",
        after_gc.len()
    );
    let got = files_of(&out);
    let want = &reference[0];
    let names = |m: &BTreeMap<String, Vec<u8>>| m.keys().cloned().collect::<Vec<_>>();
    f.check(
        names(&got) == names(want),
        format!(
            "final outputs {:?} differ from a clean run's {:?}",
            names(&got),
            names(want)
        ),
    );
    for (name, bytes) in want {
        if name == "manifest.json" {
            let same = got.get(name).and_then(|b| compared(b)) == compared(bytes);
            f.check(
                same,
                "the manifest's compared part differs from a clean run's",
            );
        } else {
            f.check(
                got.get(name) == Some(bytes),
                format!("final `{name}` differs from a clean run's"),
            );
        }
    }
    let verified = Command::new(&o.hadal)
        .env("HADAL_CACHE", w.join("verify-cache"))
        .arg("verify")
        .arg(out.join("manifest.json"))
        .output()
        .expect("hadal verify");
    f.check(
        verified.status.success(),
        format!(
            "`hadal verify` rejects the final outputs: {}",
            String::from_utf8_lossy(&verified.stderr)
        ),
    );
    println!("  final run: outputs identical to a clean run, `hadal verify` accepts them");
    reference
}

/// Outputs equal to a clean run's (the manifest's compared part).
fn same_outputs(got: &BTreeMap<String, Vec<u8>>, want: &BTreeMap<String, Vec<u8>>) -> bool {
    got.len() == want.len()
        && want.iter().all(|(name, bytes)| {
            if name == "manifest.json" {
                got.get(name).and_then(|b| compared(b)) == compared(bytes)
            } else {
                got.get(name) == Some(bytes)
            }
        })
}

// ---- concurrency ------------------------------------------------------------------

/// Eight processes at once on one fresh cache and one output root, four
/// variants between them (so they compute and store the same stages at the
/// same time); then four at once into the very same directory. Every
/// output must equal the serial clean run of its variant.
fn concurrent(
    o: &Options,
    w: &Path,
    project: &Path,
    reference: &[BTreeMap<String, Vec<u8>>],
    f: &mut Findings,
) {
    if reference.len() < VARIANTS {
        return;
    }
    let cache = w.join("concurrent-cache");
    let root = w.join("concurrent");
    let spawn = |v: usize, out: &Path| {
        hadal_run(o, project, &cache, out, &variant_sets(v), false)
            .spawn()
            .expect("spawn hadal")
    };
    let children: Vec<_> = (0..8)
        .map(|k| (k % 4, spawn(k % 4, &root.join(format!("p{k}")))))
        .collect();
    for (k, (v, child)) in children.into_iter().enumerate() {
        let r = child.wait_with_output().expect("wait for hadal");
        f.check(
            r.status.success(),
            format!(
                "concurrent run {k} failed: {}",
                String::from_utf8_lossy(&r.stderr)
            ),
        );
        f.check(
            same_outputs(&files_of(&root.join(format!("p{k}"))), &reference[v]),
            format!("concurrent run {k} (variant {v}) differs from its serial run"),
        );
    }
    let same = root.join("same");
    let children: Vec<_> = (0..4).map(|_| spawn(0, &same)).collect();
    for child in children {
        let r = child.wait_with_output().expect("wait for hadal");
        f.check(
            r.status.success(),
            format!(
                "a run sharing its output directory failed: {}",
                String::from_utf8_lossy(&r.stderr)
            ),
        );
    }
    f.check(
        same_outputs(&files_of(&same), &reference[0]),
        "four runs into one directory left outputs that differ from a serial run",
    );
    f.check(
        temps_below(&root).is_empty(),
        "concurrent runs left temporary files",
    );
    check_cache(&cache, f, "after the concurrent runs");
    println!("concurrency: 8 processes on one cache (4 variants) and 4 into one directory: outputs identical to serial runs");
}

// ---- disk full ----------------------------------------------------------------

fn is_root() -> bool {
    Command::new("id")
        .arg("-u")
        .output()
        .is_ok_and(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
}

/// A tmpfs of `size` at `dir`, if mounting is allowed here.
fn mount_tmpfs(dir: &Path, size: &str) -> bool {
    std::fs::create_dir_all(dir).unwrap();
    Command::new("mount")
        .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
        .arg(dir)
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success())
}

fn unmount(dir: &Path) {
    let _ = Command::new("umount").arg(dir).status();
}

fn disk_full(o: &Options, w: &Path, project: &Path, f: &mut Findings) {
    if !is_root() {
        println!("disk full: skipped (needs root to mount a small tmpfs)");
        return;
    }
    // 1. Nothing fits: a clear error, exit 2, nothing left behind.
    let tiny = w.join("tiny");
    if !mount_tmpfs(&tiny, "64k") {
        println!("disk full: skipped (mounting a tmpfs is not allowed here)");
        return;
    }
    let out = tiny.join("out");
    let r = Command::new(&o.hadal)
        .current_dir(project)
        .env("HADAL_CACHE", w.join("full-cache"))
        .args(["run", "hot_start.hadal", "--no-plots", "--out"])
        .arg(&out)
        .output()
        .expect("run hadal");
    let err = String::from_utf8_lossy(&r.stderr).into_owned();
    f.check(
        r.status.code() == Some(2),
        format!("disk full: exit {:?}, not 2", r.status.code()),
    );
    f.check(
        err.contains("cannot write the outputs") && err.contains("No space left on device"),
        format!("disk full: unclear error: {err}"),
    );
    f.check(
        !out.exists(),
        "disk full: the output directory the run created was left behind",
    );
    f.check(
        temps_below(&tiny).is_empty(),
        "disk full: temporary files were left behind",
    );
    unmount(&tiny);
    println!("disk full (64 KiB): exit 2, `{}`", err.trim());

    // 2. Room for one set of outputs but not a second: a failed run leaves
    // the previous complete outputs exactly as they were.
    let small = w.join("small");
    if !mount_tmpfs(&small, "220k") {
        return;
    }
    let out = small.join("out");
    let first = Command::new(&o.hadal)
        .current_dir(project)
        .env("HADAL_CACHE", w.join("full-cache"))
        .args(["run", "hot_start.hadal", "--no-plots", "--out"])
        .arg(&out)
        .output()
        .expect("run hadal");
    f.check(
        first.status.success(),
        "disk full: the first run did not fit in 220 KiB",
    );
    let before = files_of(&out);
    let second = Command::new(&o.hadal)
        .current_dir(project)
        .env("HADAL_CACHE", w.join("full-cache"))
        .args([
            "run",
            "hot_start.hadal",
            "--no-plots",
            "--set",
            "delivery_efold=60 Myr",
            "--out",
        ])
        .arg(&out)
        .output()
        .expect("run hadal");
    f.check(
        second.status.code() == Some(2),
        format!(
            "disk full: second run exit {:?}, not 2",
            second.status.code()
        ),
    );
    f.check(
        files_of(&out) == before,
        "disk full: a failed run changed the previous outputs",
    );
    check_manifest(&out, f, "disk full");
    f.check(
        temps_below(&small).is_empty(),
        "disk full: temporary files were left behind",
    );
    unmount(&small);
    println!("disk full (220 KiB): exit 2, previous outputs intact and matching their manifest");
}

// ---- ensemble trials ------------------------------------------------------------

/// The same kills against `hadal ensemble` (shared cache, shared output
/// directory): afterwards the cache verifies, every file present is a
/// complete one of a clean ensemble run, and a run to completion
/// reproduces the clean run byte for byte (the manifest's run facts
/// aside). Enabled with `--ensemble`.
fn ensemble_trials(o: &Options, w: &Path, project: &Path, f: &mut Findings) {
    let members = "64";
    let ensemble = |cache: &Path, out: &Path| {
        let mut c = Command::new(&o.hadal);
        c.current_dir(project)
            .env("HADAL_CACHE", cache)
            .args([
                "ensemble",
                "hot_start.hadal",
                "--members",
                members,
                "--threads",
                "2",
                "--out",
            ])
            .arg(out)
            .stdout(Stdio::null())
            .stderr(Stdio::piped());
        c
    };
    let clean = w.join("ens-clean");
    let t = Instant::now();
    let r = ensemble(&w.join("ens-clean-cache"), &clean)
        .output()
        .expect("run hadal");
    let cold = t.elapsed();
    if !r.status.success() {
        return f.fail(format!(
            "clean ensemble run failed: {}",
            String::from_utf8_lossy(&r.stderr)
        ));
    }
    let reference = files_of(&clean);
    println!(
        "ensemble trials: {} trials, cold run {:.0} ms",
        o.ensemble_trials,
        cold.as_secs_f64() * 1e3
    );
    let cache = w.join("ens-cache");
    let out = w.join("ens-out");
    let mut rng = Rng::new(o.seed ^ 0xE5);
    for trial in 0..o.ensemble_trials {
        let delay = cold.mul_f64(1.3 * rng.below(1000) as f64 / 1000.0);
        let mut child = ensemble(&cache, &out).spawn().expect("spawn hadal");
        std::thread::sleep(delay);
        let _ = child.kill();
        let _ = child.wait();
        let when = format!(
            "ensemble trial {trial} (killed after {} ms)",
            delay.as_millis()
        );
        check_cache(&cache, f, &when);
        for (name, bytes) in files_of(&out) {
            if name == "manifest.json" {
                f.check(
                    compared(&bytes).is_some(),
                    format!("{when}: manifest.json does not parse"),
                );
                continue;
            }
            f.check(
                reference.get(&name) == Some(&bytes),
                format!("{when}: `{name}` is not a complete output of the clean run"),
            );
        }
    }
    let seen = temps_below(&out).len();
    let r = ensemble(&cache, &out).output().expect("run hadal");
    f.check(r.status.success(), "the final ensemble run failed");
    let left = temps_below(&out);
    f.check(
        left.is_empty(),
        format!("{} temporary files left in the ensemble output after a full run ({seen} before it): {left:?}", left.len()),
    );
    let got = files_of(&out);
    for (name, bytes) in &reference {
        if name == "manifest.json" {
            f.check(
                got.get(name).and_then(|b| compared(b)) == compared(bytes),
                "ensemble: the manifest's compared part differs from a clean run's",
            );
        } else {
            f.check(
                got.get(name) == Some(bytes),
                format!("ensemble: final `{name}` differs from a clean run's"),
            );
        }
    }
    check_cache(&cache, f, "after the ensemble trials");
    println!("  final ensemble run identical to a clean one");
}
