//! Faults while writing a run's outputs, through the real binary: an
//! output directory that cannot be created or written is a clear error with
//! exit 2 and leaves nothing partial behind; temporary files of killed runs
//! are cleared by the next run and by `hadal cache gc`. (That a failed
//! write keeps the previous outputs is shown by `fsutil`'s unit tests and,
//! on a real full disk, by `tools/crash_test.sh`.)
//!
//! Tests run as root on CI machines, and permissions do not stop root, so
//! an unwritable directory is made with a path *under a regular file*
//! (`--out some_file/sub`), which fails for every user. A full disk needs a
//! small tmpfs and root; `tools/crash_test.sh` does that.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

const SCENARIO: &str = "scenario faults \"output faults\"\n\
span 1 Ga to 0 Ga\nreport every 100 Myr\n\
reservoir ocean = 1.4e21 kg\nreservoir mantle = 2e20 kg\n\
flux regassing: ocean -> mantle = 1e11 kg/yr * ocean / 1.4e21 kg\n\
stage all from 1 Ga to 0 Ga\n";

struct Env {
    dir: tempfile::TempDir,
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
    fn run(&self, args: &[&str]) -> Output {
        Command::new(env!("CARGO_BIN_EXE_hadal"))
            .current_dir(self.dir.path())
            .env("HADAL_CACHE", self.path("cache"))
            .env("NO_COLOR", "1")
            .args(args)
            .output()
            .expect("run hadal")
    }
}

fn names(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .map(|rd| {
            rd.flatten()
                .map(|e| e.file_name().to_string_lossy().into_owned())
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

#[test]
fn an_output_directory_under_a_regular_file_is_exit_2_and_writes_nothing() {
    let env = Env::new();
    std::fs::write(env.path("some_file"), b"not a directory").unwrap();
    let o = env.run(&["run", "s.hadal", "--no-plots", "--out", "some_file/sub"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    let err = stderr(&o);
    assert!(
        err.contains("error: cannot create some_file/sub") && err.contains("Not a directory"),
        "{err}"
    );
    // Nothing partial: the file is untouched, the project holds what it held.
    assert_eq!(
        std::fs::read(env.path("some_file")).unwrap(),
        b"not a directory"
    );
    let mut listing = names(env.dir.path());
    listing.retain(|n| n != "cache");
    assert_eq!(listing, vec!["s.hadal", "some_file"]);
}

#[test]
fn a_failed_write_leaves_no_temporary_files_and_no_manifest() {
    // A directory where `series.csv` should go: the rename fails.
    let env = Env::new();
    std::fs::create_dir_all(env.path("out/series.csv")).unwrap();
    let o = env.run(&["run", "s.hadal", "--no-plots", "--out", "out"]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("error: cannot write the outputs in out"),
        "{}",
        stderr(&o)
    );
    let left = names(&env.path("out"));
    assert!(left.iter().all(|n| !n.contains(".tmp-")), "{left:?}");
    // Without a manifest the directory does not claim to be a complete run.
    assert!(!left.contains(&"manifest.json".to_owned()), "{left:?}");
}

#[test]
fn temporary_files_of_killed_runs_are_cleared_by_the_next_run() {
    let env = Env::new();
    let o = env.run(&["run", "s.hadal", "--no-plots", "--out", "out"]);
    assert!(o.status.success(), "{}", stderr(&o));
    // What a run killed mid-write leaves: a temporary file of a process that
    // is gone, from this machine, and one of a process still running (this
    // test), which must be left alone.
    let mut child = Command::new("true").spawn().unwrap();
    let dead = child.id();
    child.wait().unwrap();
    let host = hadal::fsutil::temp_path(Path::new("x"));
    let host = hadal::fsutil::temp_owner(&host.file_name().unwrap().to_string_lossy())
        .unwrap()
        .0
        .to_owned();
    let dead_tmp = format!(".series.csv.tmp-{host}-{dead}-7");
    let live_tmp = format!(".series.csv.tmp-{host}-{}-7", std::process::id());
    std::fs::write(env.path("out").join(&dead_tmp), b"half a ser").unwrap();
    std::fs::write(env.path("out").join(&live_tmp), b"being written").unwrap();
    let o = env.run(&["run", "s.hadal", "--no-plots", "--out", "out"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let left = names(&env.path("out"));
    assert!(!left.contains(&dead_tmp), "{left:?}");
    assert!(left.contains(&live_tmp), "{left:?}");
    // The same for the cache, by `hadal cache gc`.
    let fan = env.path("cache/v2/ab");
    std::fs::create_dir_all(&fan).unwrap();
    std::fs::write(fan.join(format!(".abcd.tmp-{host}-{dead}-1")), b"half").unwrap();
    let o = env.run(&["cache", "verify"]);
    assert!(
        o.status.success(),
        "a temporary file is not a bad entry: {}",
        stderr(&o)
    );
    let o = env.run(&["cache", "gc", "--older-than", "3650d"]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(
        String::from_utf8_lossy(&o.stdout)
            .contains("removed 1 temporary files left by killed writers"),
        "{}",
        String::from_utf8_lossy(&o.stdout)
    );
    assert!(names(&fan).is_empty(), "{:?}", names(&fan));
}
