//! `hadal verify` on manifests written by someone else (issue 16), through
//! the real binary.
//!
//! A manifest names the files to read. Every path in it must be a plain
//! relative path (H0802) inside the project root it records, which must
//! hold the manifest (H0803), also after following symbolic links (H0804);
//! the scenario that runs must be one of the hash-checked inputs (H0807)
//! and runs from the bytes that were checked, reading no other file.
//! Anything else is refused before any file it names is opened.
//!
//! Each hostile case puts a file with a marker line outside the project and
//! asserts that neither the marker nor the file's hash shows up in what
//! hadal prints.

use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use serde_json::Value;

const SCENARIO: &str = "\
scenario repro \"a small exchange model\"
span 2 Ga to 0 Ga
report every 100 Myr
include \"lib/rates.hadal\"
table forcing = \"data/forcing.csv\" (Ga, 1/Gyr)
reservoir a = 1e21 kg
reservoir b = 1e20 kg
flux ab: a -> b = k * a
flux ba: b -> a = forcing(age) * b
output total = a + b
stage one from 2 Ga to 1 Ga
stage two from 1 Ga to 0 Ga
";
const RATES: &str = "param k = 0.5 / 1 Gyr\n";
const FORCING: &str = "age,rate\n0,0.2\n1,0.1\n2,0.3\n";

/// Printed by a diagnostic if an outside file were ever parsed.
const MARKER: &str = "OUTSIDE_MARKER_51c7";
/// A scenario outside the project: it checks up to a broken line holding
/// the marker, which a diagnostic would quote.
const EVIL: &str = "\
scenario evil
span 1 Ga to 0 Ga
report every 100 Myr
reservoir a = 1e21 kg
let OUTSIDE_MARKER_51c7 = = 3
stage all from 1 Ga to 0 Ga
";
const SECRET_CSV: &str = "age,OUTSIDE_MARKER_51c7\n0,1\n1,2\n";

/// `base/project` (a versioned project with one finished run in
/// `outputs/repro`) and `base/outside` (files a manifest must not reach).
struct Tree {
    _tmp: tempfile::TempDir,
    base: PathBuf,
    project: PathBuf,
}

impl Tree {
    fn manifest(&self) -> PathBuf {
        self.project.join("outputs/repro/manifest.json")
    }

    fn read_manifest(&self) -> Value {
        serde_json::from_slice(&std::fs::read(self.manifest()).unwrap()).unwrap()
    }

    fn write_manifest(&self, v: &Value) {
        std::fs::write(self.manifest(), serde_json::to_vec_pretty(v).unwrap()).unwrap();
    }

    /// Edit the manifest in place.
    fn edit(&self, f: impl FnOnce(&mut Value)) {
        let mut v = self.read_manifest();
        f(&mut v);
        self.write_manifest(&v);
    }

    fn verify(&self) -> Output {
        hadal(&self.project, &["verify", "outputs/repro/manifest.json"])
    }
}

fn tree() -> Tree {
    let tmp = tempfile::tempdir().unwrap();
    let base = std::fs::canonicalize(tmp.path()).unwrap();
    let project = base.join("project");
    std::fs::create_dir_all(project.join(".git")).unwrap();
    std::fs::create_dir_all(project.join("scenarios/data")).unwrap();
    std::fs::create_dir_all(project.join("scenarios/lib")).unwrap();
    std::fs::write(project.join("scenarios/repro.hadal"), SCENARIO).unwrap();
    std::fs::write(project.join("scenarios/lib/rates.hadal"), RATES).unwrap();
    std::fs::write(project.join("scenarios/data/forcing.csv"), FORCING).unwrap();
    std::fs::create_dir_all(base.join("outside")).unwrap();
    std::fs::write(base.join("outside/evil.hadal"), EVIL).unwrap();
    std::fs::write(base.join("outside/secret.csv"), SECRET_CSV).unwrap();
    let o = hadal(
        &project,
        &[
            "run",
            "scenarios/repro.hadal",
            "--out",
            "outputs/repro",
            "--no-plots",
        ],
    );
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    Tree {
        _tmp: tmp,
        base,
        project,
    }
}

fn hadal(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(dir)
        .args(args)
        .env("NO_COLOR", "1")
        .env("HADAL_CACHE", dir.join(".cache"))
        .output()
        .unwrap()
}

/// Run hadal, killing it if it has not finished within `limit`.
fn hadal_within(dir: &Path, args: &[&str], limit: Duration) -> Option<Output> {
    let mut child = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(dir)
        .args(args)
        .env("NO_COLOR", "1")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    while start.elapsed() < limit {
        if child.try_wait().unwrap().is_some() {
            return Some(child.wait_with_output().unwrap());
        }
        std::thread::sleep(Duration::from_millis(20));
    }
    let _ = child.kill();
    let _ = child.wait();
    None
}

fn blake3_hex(b: &[u8]) -> String {
    blake3::hash(b).to_hex().to_string()
}

/// Everything printed, with the diagnostics' wrapped lines joined (miette
/// wraps at 100 columns) and runs of spaces folded.
fn text(o: &Output) -> String {
    let raw = format!(
        "{}{}",
        String::from_utf8_lossy(&o.stdout),
        String::from_utf8_lossy(&o.stderr)
    );
    let words: Vec<&str> = raw
        .lines()
        .map(|l| l.trim_start_matches([' ', '│']))
        .flat_map(|l| l.split(' '))
        .filter(|w| !w.is_empty())
        .collect();
    words.join(" ")
}

/// Nothing of the outside files reached the output: not their lines, not
/// their hashes.
fn nothing_leaked(o: &Output) {
    let all = text(o) + &String::from_utf8_lossy(&o.stderr);
    assert!(!all.contains(MARKER), "an outside line was printed:\n{all}");
    for secret in [EVIL, SECRET_CSV] {
        let h = blake3_hex(secret.as_bytes());
        assert!(
            !all.contains(&h[..16]),
            "the hash of an outside file was printed:\n{all}"
        );
    }
}

/// Point the manifest's scenario (and its input entry) at `path`, with
/// the hash of `content`, as an attacker who wrote that file would.
fn swap_scenario(v: &mut Value, path: &str, content: &str) {
    let old = v["compared"]["scenario"]["path"]
        .as_str()
        .unwrap()
        .to_owned();
    v["compared"]["scenario"]["path"] = path.into();
    for i in v["compared"]["inputs"].as_array_mut().unwrap() {
        if i["path"] == old.as_str() {
            i["path"] = path.into();
            i["blake3"] = blake3_hex(content.as_bytes()).into();
            i["bytes"] = content.len().into();
        }
    }
}

fn refused(o: &Output, code: &str, exit: i32) -> String {
    let all = text(o);
    assert_eq!(o.status.code(), Some(exit), "{all}");
    assert!(all.contains(code), "expected {code}:\n{all}");
    assert!(all.contains("help:"), "{all}");
    assert!(!all.contains("ok repro"), "{all}");
    nothing_leaked(o);
    all
}

#[test]
fn the_run_as_written_verifies() {
    let t = tree();
    let o = t.verify();
    assert_eq!(o.status.code(), Some(0), "{}", text(&o));
    assert!(text(&o).contains("ok repro"));
}

#[test]
fn an_absolute_scenario_path_is_refused_before_anything_is_opened() {
    let t = tree();
    let evil = t.base.join("outside/evil.hadal");
    t.edit(|v| swap_scenario(v, evil.to_str().unwrap(), EVIL));
    let all = refused(&t.verify(), "H0802", 2);
    assert!(all.contains("at /compared/scenario/path"), "{all}");
    assert!(all.contains("is absolute"), "{all}");
}

#[test]
fn a_scenario_path_climbing_out_with_dotdot_is_refused() {
    let t = tree();
    t.edit(|v| swap_scenario(v, "../outside/evil.hadal", EVIL));
    let all = refused(&t.verify(), "H0802", 2);
    assert!(all.contains("has a `..` component"), "{all}");
    assert!(all.contains("at /compared/inputs/"), "{all}");
}

#[cfg(unix)]
#[test]
fn a_scenario_reached_through_a_symlink_out_of_the_project_is_refused() {
    let t = tree();
    std::os::unix::fs::symlink(
        t.base.join("outside/evil.hadal"),
        t.project.join("scenarios/link.hadal"),
    )
    .unwrap();
    t.edit(|v| swap_scenario(v, "scenarios/link.hadal", EVIL));
    let all = refused(&t.verify(), "H0804", 2);
    assert!(all.contains("leads outside the project root"), "{all}");
}

#[test]
fn an_input_outside_the_root_is_refused_without_reporting_its_size_or_hash() {
    let t = tree();
    t.edit(|v| {
        v["compared"]["inputs"]
            .as_array_mut()
            .unwrap()
            .push(serde_json::json!({
                "path": "../outside/secret.csv",
                "blake3": "0".repeat(64),
                "bytes": 1,
            }));
    });
    let o = t.verify();
    let all = refused(&o, "H0802", 2);
    assert!(
        !all.contains(&format!("{} bytes", SECRET_CSV.len())),
        "{all}"
    );
}

#[cfg(unix)]
#[test]
fn an_input_that_is_a_symlink_out_of_the_project_is_refused() {
    let t = tree();
    std::os::unix::fs::symlink(
        t.base.join("outside/secret.csv"),
        t.project.join("scenarios/data/leak.csv"),
    )
    .unwrap();
    t.edit(|v| {
        v["compared"]["inputs"]
            .as_array_mut()
            .unwrap()
            .push(serde_json::json!({
                "path": "scenarios/data/leak.csv",
                "blake3": "0".repeat(64),
                "bytes": 1,
            }));
    });
    refused(&t.verify(), "H0804", 2);
}

#[test]
fn a_project_root_that_does_not_hold_the_manifest_is_refused() {
    // Absolute: the root would be wherever the manifest says.
    let t = tree();
    let outside = t.base.join("outside");
    t.edit(|v| {
        v["run"]["project_root_from_manifest"] = outside.to_str().unwrap().into();
        swap_scenario(v, "evil.hadal", EVIL);
    });
    let all = refused(&t.verify(), "H0802", 2);
    assert!(all.contains("at /run/project_root_from_manifest"), "{all}");

    // Down and sideways: not a folder above the manifest.
    let t = tree();
    t.edit(|v| {
        v["run"]["project_root_from_manifest"] = "../../../outside".into();
        swap_scenario(v, "evil.hadal", EVIL);
    });
    let all = refused(&t.verify(), "H0803", 2);
    assert!(all.contains("is not `.` or a chain of `..`"), "{all}");

    // Above the versioned project that holds the manifest: the reviewer's
    // other folders would be inside such a root.
    let t = tree();
    t.edit(|v| {
        v["run"]["project_root_from_manifest"] = "../../..".into();
        swap_scenario(v, "outside/evil.hadal", EVIL);
    });
    let all = refused(&t.verify(), "H0803", 2);
    assert!(all.contains("lies above"), "{all}");
}

#[test]
fn malformed_paths_are_located_errors() {
    for (pointer, bad, why) in [
        ("/compared/scenario/path", "", "is empty"),
        (
            "/compared/scenario/path",
            "scenarios\u{0}/repro.hadal",
            "contains a NUL byte",
        ),
        (
            "/compared/scenario/path",
            "C:/Windows/repro.hadal",
            "starts with a drive prefix",
        ),
        (
            "/compared/scenario/path",
            "\\\\server\\share\\repro.hadal",
            "contains a backslash",
        ),
        (
            "/compared/outputs/0/path",
            "../../../outside/secret.csv",
            "has a `..` component",
        ),
        (
            "/compared/outputs/0/path",
            "sub/series.csv",
            "is not a plain file name",
        ),
        ("/run/project_root_from_manifest", "", "is empty"),
    ] {
        let t = tree();
        t.edit(|v| {
            let mut parts = pointer.split('/').skip(1).peekable();
            let mut at = &mut *v;
            while let Some(p) = parts.next() {
                if parts.peek().is_none() {
                    match p.parse::<usize>() {
                        Ok(i) => at[i] = bad.into(),
                        Err(_) => at[p] = bad.into(),
                    }
                    break;
                }
                at = match p.parse::<usize>() {
                    Ok(i) => &mut at[i],
                    Err(_) => &mut at[p],
                };
            }
        });
        let all = refused(&t.verify(), "H0802", 2);
        assert!(all.contains(&format!("at {pointer}")), "{pointer}: {all}");
        assert!(all.contains(why), "{pointer} {bad:?}: {all}");
    }
}

#[test]
fn a_scenario_whose_hash_does_not_match_runs_nothing() {
    let t = tree();
    // Same size, other content: only the hash can tell.
    std::fs::write(
        t.project.join("scenarios/repro.hadal"),
        SCENARIO.replace("output total = a + b", "output total = a +b "),
    )
    .unwrap();
    let o = t.verify();
    let all = refused(&o, "H0806", 1);
    assert!(
        all.contains("the scenario `scenarios/repro.hadal` differs from the one recorded"),
        "{all}"
    );
    assert!(all.contains("nothing was run"), "{all}");
    assert!(!all.contains("drift"), "{all}");
}

#[test]
fn a_scenario_that_is_not_a_recorded_input_does_not_run() {
    // Every input checks out, and the manifest names another scenario (one
    // with the same results, so that only the check can catch it).
    let t = tree();
    std::fs::write(
        t.project.join("scenarios/other.hadal"),
        format!("# not the recorded file\n{SCENARIO}"),
    )
    .unwrap();
    t.edit(|v| v["compared"]["scenario"]["path"] = "scenarios/other.hadal".into());
    let all = refused(&t.verify(), "H0807", 2);
    assert!(all.contains("is not one of the manifest's inputs"), "{all}");
}

#[test]
fn the_run_reads_only_recorded_inputs() {
    // A manifest that leaves out the include: the rerun must not read the
    // file from disk unchecked.
    let t = tree();
    t.edit(|v| {
        v["compared"]["inputs"]
            .as_array_mut()
            .unwrap()
            .retain(|i| i["path"] != "scenarios/lib/rates.hadal");
    });
    let o = t.verify();
    let all = text(&o);
    assert_eq!(o.status.code(), Some(1), "{all}");
    assert!(all.contains("H0501"), "{all}");
    assert!(
        all.contains("is not one of the input files recorded in the manifest"),
        "{all}"
    );
}

#[cfg(unix)]
#[test]
fn a_published_output_linked_out_of_the_run_folder_is_not_read() {
    let t = tree();
    let series = t.project.join("outputs/repro/series.csv");
    std::fs::remove_file(&series).unwrap();
    std::os::unix::fs::symlink(t.base.join("outside/secret.csv"), &series).unwrap();
    let all = refused(&t.verify(), "H0804", 2);
    assert!(all.contains("leads outside the manifest's folder"), "{all}");
    // `hadal diff` reads published outputs too.
    let o = hadal(
        &t.project,
        &["diff", "outputs/repro", "outputs/repro/manifest.json"],
    );
    refused(&o, "H0804", 2);
}

#[test]
fn a_huge_manifest_is_refused_from_its_size() {
    let t = tree();
    let f = std::fs::File::create(t.manifest()).unwrap();
    // Sparse: no disk is used, and reading it whole would take 64 MiB.
    f.set_len(64 << 20).unwrap();
    let all = refused(&t.verify(), "H0801", 2);
    assert!(
        all.contains("more than the limit of 16777216 bytes"),
        "{all}"
    );
}

#[test]
fn a_huge_published_output_is_not_read() {
    let t = tree();
    let f = std::fs::File::create(t.project.join("outputs/repro/series.csv")).unwrap();
    f.set_len(64 << 20).unwrap();
    let o = t.verify();
    let all = text(&o);
    assert_eq!(o.status.code(), Some(1), "{all}");
    assert!(
        all.contains("the published `series.csv` is 67108864 bytes, far more than"),
        "{all}"
    );
}

#[cfg(unix)]
#[test]
fn a_fifo_as_manifest_is_refused_without_hanging() {
    let t = tree();
    let fifo = t.project.join("outputs/repro/manifest.json");
    std::fs::remove_file(&fifo).unwrap();
    let made = Command::new("mkfifo").arg(&fifo).status().unwrap();
    assert!(made.success());
    let o = hadal_within(
        &t.project,
        &["verify", "outputs/repro/manifest.json"],
        Duration::from_secs(20),
    )
    .expect("verify of a FIFO hung");
    let all = refused(&o, "H0801", 2);
    assert!(all.contains("not a regular file"), "{all}");

    // An input that is a FIFO inside the project: refused, not opened.
    let t = tree();
    let pipe = t.project.join("scenarios/data/pipe.csv");
    assert!(Command::new("mkfifo")
        .arg(&pipe)
        .status()
        .unwrap()
        .success());
    t.edit(|v| {
        v["compared"]["inputs"]
            .as_array_mut()
            .unwrap()
            .push(serde_json::json!({
                "path": "scenarios/data/pipe.csv",
                "blake3": "0".repeat(64),
                "bytes": 10,
            }));
    });
    let o = hadal_within(
        &t.project,
        &["verify", "outputs/repro/manifest.json"],
        Duration::from_secs(20),
    )
    .expect("verify of a FIFO input hung");
    let all = refused(&o, "H0805", 2);
    assert!(all.contains("is not a regular file"), "{all}");
}

#[cfg(unix)]
#[test]
fn a_device_as_manifest_is_refused_without_reading_it() {
    let t = tree();
    let o = hadal_within(
        &t.project,
        &["verify", "/dev/zero"],
        Duration::from_secs(20),
    )
    .expect("verify of /dev/zero did not finish");
    let all = refused(&o, "H0801", 2);
    assert!(all.contains("not a regular file"), "{all}");
}

#[test]
fn a_scenario_with_a_byte_order_mark_verifies() {
    // `hadal run` records the text as read (the mark as three spaces).
    let t = tree();
    std::fs::write(
        t.project.join("scenarios/repro.hadal"),
        format!("\u{feff}{SCENARIO}"),
    )
    .unwrap();
    let o = hadal(
        &t.project,
        &[
            "run",
            "scenarios/repro.hadal",
            "--out",
            "outputs/repro",
            "--no-plots",
        ],
    );
    assert!(o.status.success(), "{}", text(&o));
    let o = t.verify();
    assert_eq!(o.status.code(), Some(0), "{}", text(&o));
}

#[test]
fn names_and_hashes_from_a_manifest_never_panic_or_drive_the_terminal() {
    let t = tree();
    t.edit(|v| {
        v["compared"]["scenario"]["name"] = "repro\u{1b}[2J".into();
        // Too short to cut a prefix from.
        v["compared"]["outputs"][0]["blake3"] = "x".into();
        v["compared"]["stages"][0]["fingerprint"] = "é".into();
    });
    std::fs::remove_file(t.project.join("outputs/repro/series.csv")).unwrap();
    let o = t.verify();
    let all = text(&o);
    assert_eq!(o.status.code(), Some(1), "{all}");
    assert!(!all.contains('\u{1b}'), "{all:?}");
    assert!(all.contains("repro\\u{1b}[2J"), "{all}");
    let o = hadal(
        &t.project,
        &[
            "diff",
            "outputs/repro/manifest.json",
            "outputs/repro/manifest.json",
        ],
    );
    let all = text(&o);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{all}");
    assert!(!all.contains('\u{1b}'), "{all:?}");
    let mut v = t.read_manifest();
    v["compared"]["stages"][0]["fingerprint"] = "é".repeat(3).into();
    std::fs::create_dir_all(t.project.join("outputs/other")).unwrap();
    std::fs::write(
        t.project.join("outputs/other/manifest.json"),
        serde_json::to_vec(&v).unwrap(),
    )
    .unwrap();
    let o = hadal(&t.project, &["diff", "outputs/repro", "outputs/other"]);
    assert_eq!(o.status.code(), Some(1), "{}", text(&o));
}

#[test]
fn a_published_output_cannot_drive_the_terminal_either() {
    let t = tree();
    let series = t.project.join("outputs/repro/series.csv");
    std::fs::write(&series, "age [Ga],\u{1b}[2Ja [kg]\n2,\u{1b}]0;x\u{7}\n").unwrap();
    for args in [
        &["verify", "outputs/repro/manifest.json"][..],
        &["diff", "outputs/repro", "outputs/repro"][..],
    ] {
        let o = hadal(&t.project, args);
        let all = text(&o);
        assert!(!all.contains('\u{1b}') && !all.contains('\u{7}'), "{all:?}");
    }
    let o = t.verify();
    assert_eq!(o.status.code(), Some(1));
    assert!(text(&o).contains("\\u{1b}[2Ja [kg]"), "{}", text(&o));
}

#[test]
fn the_committed_outputs_still_verify() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut manifests: Vec<String> = std::fs::read_dir(root.join("outputs"))
        .unwrap()
        .map(|e| e.unwrap().path().join("manifest.json"))
        .filter(|m| m.is_file())
        .map(|m| m.strip_prefix(root).unwrap().to_string_lossy().into_owned())
        .collect();
    manifests.sort();
    assert!(manifests.len() >= 2, "{manifests:?}");
    let mut args = vec!["verify"];
    args.extend(manifests.iter().map(String::as_str));
    let o = hadal(root, &args);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o));
}

#[test]
fn recorded_sizes_beyond_any_scenario_are_refused_before_reading() {
    let t = tree();
    t.edit(|v| v["compared"]["inputs"][0]["bytes"] = (17u64 << 20).into());
    let all = refused(&t.verify(), "H0808", 2);
    assert!(all.contains("at /compared/inputs/0/bytes"), "{all}");
    let t = tree();
    t.edit(|v| {
        for i in v["compared"]["inputs"].as_array_mut().unwrap() {
            i["bytes"] = (15u64 << 20).into();
        }
        let copy = v["compared"]["inputs"][0].clone();
        for _ in 0..3 {
            v["compared"]["inputs"]
                .as_array_mut()
                .unwrap()
                .push(copy.clone());
        }
    });
    let all = refused(&t.verify(), "H0808", 2);
    assert!(all.contains("bytes together"), "{all}");
}

/// Every code of `manifest::verify` is documented and exercised here.
#[test]
fn every_verify_code_is_documented_and_tested() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let src = std::fs::read_to_string(root.join("src/manifest/verify.rs")).unwrap();
    let docs = std::fs::read_to_string(root.join("docs/errors.md")).unwrap();
    let tests = [
        std::fs::read_to_string(root.join("tests/verify_untrusted.rs")).unwrap(),
        std::fs::read_to_string(root.join("tests/reproducibility.rs")).unwrap(),
    ]
    .concat();
    let mut codes: Vec<&str> = src
        .match_indices("\"H08")
        .map(|(i, _)| &src[i + 1..i + 6])
        .collect();
    codes.sort_unstable();
    codes.dedup();
    assert_eq!(codes.len(), 8, "{codes:?}");
    for c in codes {
        assert!(
            docs.contains(&format!("### {c}")),
            "{c} not in docs/errors.md"
        );
        assert!(tests.contains(&format!("\"{c}\"")), "{c} has no test");
    }
}
