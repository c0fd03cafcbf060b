//! The hostile corpus as a campaign: every case runs the real `hadal`
//! binary in a project of its own, with a time bound and its peak memory
//! measured (see `tests/support/hostile.rs` for the families of cases and
//! what passes).
//!
//!     cargo build --release
//!     cargo run --release --example hostile -- --count 1200 --jobs 2
//!
//! Options: `--count N` cases (default 1200), `--seed S` (default 1),
//! `--start I` first case index (replay one with `--start I --count 1`),
//! `--jobs J` cases at once (default 2), `--bin PATH` the binary (default
//! target/release/hadal), `--time-s S` the time bound of one command
//! (default 20), `--memory-mib M` the peak-memory bound (default 1024),
//! `--print` (describe the cases, run nothing), `--keep DIR` (leave each
//! case's project under DIR). Failing cases are described on stderr.
//! Exit status 0 when every case passed, 1 otherwise, 2 on bad arguments.

#[cfg(unix)]
#[path = "../tests/support/hostile.rs"]
mod hostile;

#[cfg(not(unix))]
fn main() {
    eprintln!("hostile: the corpus needs a unix system (FIFOs, symlinks, wait4)");
    std::process::exit(2);
}

#[cfg(unix)]
fn main() {
    use std::path::PathBuf;
    use std::sync::atomic::{AtomicU64, Ordering};
    use std::sync::Mutex;
    use std::time::{Duration, Instant};

    let mut count = 1200u64;
    let mut seed = 1u64;
    let mut start = 0u64;
    let mut jobs = 2usize;
    let mut bin = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target/release/hadal");
    let mut bounds = hostile::Bounds::default();
    let mut print = false;
    let mut keep: Option<PathBuf> = None;
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut value = || {
            args.next().unwrap_or_else(|| {
                eprintln!("hostile: {a} needs a value");
                std::process::exit(2)
            })
        };
        let number = |v: String| -> u64 {
            v.replace('_', "").parse().unwrap_or_else(|_| {
                eprintln!("hostile: expected a whole number, not `{v}`");
                std::process::exit(2)
            })
        };
        match a.as_str() {
            "--count" => count = number(value()),
            "--seed" => seed = number(value()),
            "--start" => start = number(value()),
            "--jobs" => jobs = number(value()).clamp(1, 64) as usize,
            "--bin" => bin = PathBuf::from(value()),
            "--time-s" => bounds.time = Duration::from_secs(number(value())),
            "--memory-mib" => bounds.memory_kib = number(value()) * 1024,
            "--print" => print = true,
            "--keep" => keep = Some(PathBuf::from(value())),
            other => {
                eprintln!("hostile: unknown option `{other}`");
                std::process::exit(2)
            }
        }
    }
    if print {
        for i in start..start + count {
            print!("{}", hostile::describe(&hostile::generate(seed, i)));
        }
        return;
    }
    if !bin.is_file() {
        eprintln!(
            "hostile: no binary at {} (run `cargo build --release` first, or pass --bin)",
            bin.display()
        );
        std::process::exit(2);
    }
    let work = tempfile::tempdir().expect("a temporary directory");
    let next = AtomicU64::new(start);
    let total = Mutex::new(hostile::Tally::default());
    let families = Mutex::new(std::collections::BTreeMap::<&str, u64>::new());
    let began = Instant::now();
    std::thread::scope(|scope| {
        for _ in 0..jobs {
            scope.spawn(|| {
                let mut tally = hostile::Tally::default();
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    if i >= start + count {
                        break;
                    }
                    let case = hostile::generate(seed, i);
                    let dir = match &keep {
                        Some(k) => k.join(format!("case-{seed}-{i}")),
                        None => work.path().join(format!("case-{i}")),
                    };
                    let _ = std::fs::remove_dir_all(&dir);
                    let outcome = hostile::run_case(&bin, &dir, &case, &bounds);
                    let verdict = hostile::judge(&outcome, &bounds);
                    tally.add(&outcome, &verdict);
                    *families.lock().unwrap().entry(case.family).or_default() += 1;
                    if let Some(why) = &verdict {
                        let mut err = std::io::stderr().lock();
                        hostile::record_failure(&mut err, &case, &outcome, why);
                    }
                    if keep.is_none() {
                        let _ = std::fs::remove_dir_all(&dir);
                    }
                }
                total.lock().unwrap().merge(&tally);
            });
        }
    });
    let t = total.into_inner().unwrap();
    let fams = families.into_inner().unwrap();
    println!(
        "hostile corpus: {} cases (seed {seed}, from {start}) in {:.1} s over {} families",
        t.cases,
        began.elapsed().as_secs_f64(),
        fams.len()
    );
    for (f, n) in &fams {
        println!("  {n:>5}  {f}");
    }
    println!(
        "exits 0/1/2: {}/{}/{}; panics {}, signals {}, over the time bound ({:?}) {}, over the memory bound ({} MiB) {}",
        t.by_code[0],
        t.by_code[1],
        t.by_code[2],
        t.panics,
        t.signals,
        bounds.time,
        t.timeouts,
        bounds.memory_kib / 1024,
        t.over_memory
    );
    println!(
        "largest peak memory {:.1} MiB, slowest command {:.2} s",
        t.peak_kib as f64 / 1024.0,
        t.slowest.as_secs_f64()
    );
    println!("{} passed, {} failed", t.cases - t.failed, t.failed);
    std::process::exit(if t.failed == 0 { 0 } else { 1 });
}
