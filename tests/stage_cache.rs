//! The stage cache, end to end through the real binary: what an edit
//! recomputes, early cutoff, corruption, and processes sharing one cache.

use std::path::{Path, PathBuf};
use std::process::Command;

const SCENARIO: &str = "\
# A three-stage exchange model for cache tests.
scenario cache_demo \"cache behaviour\"
span 3 Ga to 0 Ga
report every 100 Myr

## Transfer rate from a to b.
param k = 0.5 / 1 Gyr
## Return rate, used only in the last stage.
param late_k = 0.1 / 1 Gyr

reservoir a = 1e21 kg
reservoir b = 1e20 kg
let half_b = b / 2
output total = a + b
output b_half = half_b

flux ab: a -> b = k * a

stage one from 3 Ga to 2 Ga
stage two from 2 Ga to 1 Ga
stage three from 1 Ga to 0 Ga {
  flux back: b -> a = late_k * b
}
";

struct Env {
    dir: tempfile::TempDir,
}

impl Env {
    fn new() -> Env {
        Env {
            dir: tempfile::tempdir().unwrap(),
        }
    }
    fn cache(&self) -> PathBuf {
        self.dir.path().join("cache")
    }
    fn write(&self, text: &str) -> PathBuf {
        let p = self.dir.path().join("s.hadal");
        std::fs::write(&p, text).unwrap();
        p
    }
    /// Run and return (per-stage statuses, series bytes, stderr).
    fn run(&self, file: &Path, out: &str, extra: &[&str]) -> (Vec<String>, Vec<u8>, String) {
        let out_dir = self.dir.path().join(out);
        let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
            .arg("run")
            .arg(file)
            .arg("--out")
            .arg(&out_dir)
            .arg("--json")
            .args(extra)
            .env("HADAL_CACHE", self.cache())
            .env("NO_COLOR", "1")
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&o.stderr).into_owned();
        assert!(o.status.success(), "run failed: {stderr}");
        let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        let statuses = v["stages"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s["status"].as_str().unwrap().to_owned())
            .collect();
        let series = std::fs::read(out_dir.join("series.csv")).unwrap();
        (statuses, series, stderr)
    }
}

fn all(word: &str) -> Vec<String> {
    vec![word.to_owned(); 3]
}

#[test]
fn unchanged_rerun_reuses_every_stage_byte_identically() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (s1, a, _) = env.run(&f, "o1", &[]);
    assert_eq!(s1, all("computed"));
    let (s2, b, _) = env.run(&f, "o2", &[]);
    assert_eq!(s2, all("reused"));
    assert_eq!(a, b);
}

#[test]
fn comments_whitespace_and_declaration_order_reuse_every_stage() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (_, a, _) = env.run(&f, "o1", &[]);
    // Comments, spacing, blank lines, and the order of non-column
    // declarations all change; the model does not.
    let edited = SCENARIO
        .replace("param k = 0.5 / 1 Gyr", "param   k=0.5/1 Gyr   # tweakable")
        .replace("flux ab: a -> b = k * a\n", "")
        .replace(
            "reservoir a = 1e21 kg",
            "flux ab : a->b = (k * a)\n\n\n# the reservoirs\nreservoir a = 1e21 kg",
        )
        .replace("let half_b = b / 2\n", "")
        .replace("stage one", "let half_b = b / 2\n\nstage one");
    assert_ne!(edited, SCENARIO);
    let f = env.write(&edited);
    let (s, b, _) = env.run(&f, "o2", &[]);
    assert_eq!(s, all("reused"));
    assert_eq!(a, b);
    // Swapping the two reservoir lines changes only the column order of the
    // CSV, never a stage.
    let swapped = SCENARIO.replace(
        "reservoir a = 1e21 kg\nreservoir b = 1e20 kg",
        "reservoir b = 1e20 kg\nreservoir a = 1e21 kg",
    );
    let f = env.write(&swapped);
    let (s, _, _) = env.run(&f, "o3", &[]);
    assert_eq!(s, all("reused"));
}

#[test]
fn a_last_stage_parameter_recomputes_only_the_last_stage() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    env.run(&f, "o1", &[]);
    let f = env.write(&SCENARIO.replace("late_k = 0.1", "late_k = 0.2"));
    let (s, _, _) = env.run(&f, "o2", &[]);
    assert_eq!(s, ["reused", "reused", "computed"]);
    // The same through --set, and the reason names the parameter.
    let f = env.write(SCENARIO);
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .args([
            "run",
            f.to_str().unwrap(),
            "--json",
            "--set",
            "late_k=0.3 / 1 Gyr",
            "--out",
        ])
        .arg(env.dir.path().join("o3"))
        .env("HADAL_CACHE", env.cache())
        .output()
        .unwrap();
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let st = v["stages"].as_array().unwrap();
    assert_eq!(st[0]["status"], "reused");
    assert_eq!(st[2]["status"], "computed");
    assert!(
        st[2]["reason"].as_str().unwrap().contains("late_k"),
        "{}",
        st[2]["reason"]
    );
}

#[test]
fn changing_a_derived_output_recomputes_no_stage() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (_, a, _) = env.run(&f, "o1", &[]);
    let f = env.write(&SCENARIO.replace("let half_b = b / 2", "let half_b = b / 4"));
    let (s, b, _) = env.run(&f, "o2", &[]);
    assert_eq!(s, all("reused"));
    assert_ne!(a, b, "the output column must change");
}

#[test]
fn early_cutoff_reuses_stages_after_a_bit_identical_end_state() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (_, a, _) = env.run(&f, "o1", &[]);
    // A solver setting that cannot change the result (a step budget far
    // above what the stage uses) changes stage two's fingerprint.
    let edited = SCENARIO.replace(
        "stage two from 2 Ga to 1 Ga\n",
        "stage two from 2 Ga to 1 Ga {\n  solver max_steps = 987654\n}\n",
    );
    let f = env.write(&edited);
    let (s, b, _) = env.run(&f, "o2", &[]);
    assert_eq!(s, ["reused", "computed", "reused"]);
    assert_eq!(a, b);
}

#[test]
fn cached_and_uncached_runs_are_byte_identical() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (_, a, _) = env.run(&f, "o1", &[]);
    let (_, b, _) = env.run(&f, "o2", &[]);
    let (s, c, _) = env.run(&f, "o3", &["--no-cache"]);
    assert_eq!(s, all("computed"));
    assert_eq!(a, b);
    assert_eq!(b, c);
    for name in ["stages.csv", "events.csv"] {
        let x = std::fs::read(env.dir.path().join("o1").join(name)).unwrap();
        let y = std::fs::read(env.dir.path().join("o3").join(name)).unwrap();
        assert_eq!(x, y, "{name}");
    }
}

#[test]
fn a_flipped_byte_is_detected_warned_about_and_recomputed() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (_, a, _) = env.run(&f, "o1", &[]);
    // Flip one byte in the middle of every entry.
    let mut flipped = 0;
    for d in std::fs::read_dir(env.cache().join("v2")).unwrap() {
        for e in std::fs::read_dir(d.unwrap().path()).unwrap() {
            let p = e.unwrap().path();
            let mut bytes = std::fs::read(&p).unwrap();
            let i = bytes.len() / 2;
            bytes[i] ^= 0x01;
            std::fs::write(&p, bytes).unwrap();
            flipped += 1;
        }
    }
    assert!(flipped >= 4, "three stages and a series");
    let verify = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .args(["cache", "verify"])
        .env("HADAL_CACHE", env.cache())
        .output()
        .unwrap();
    assert_eq!(verify.status.code(), Some(1));
    let (s, b, stderr) = env.run(&f, "o2", &[]);
    assert_eq!(s, all("computed"));
    assert!(
        stderr.contains("H0701") && stderr.contains("corrupt"),
        "{stderr}"
    );
    assert_eq!(a, b);
    let verify = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .args(["cache", "verify"])
        .env("HADAL_CACHE", env.cache())
        .output()
        .unwrap();
    assert_eq!(verify.status.code(), Some(0));
}

#[test]
fn eight_processes_sharing_a_cache_match_a_serial_run() {
    let env = Env::new();
    // Four variants that share their first stages, each run by two processes.
    let variants: Vec<String> = (0..4)
        .map(|i| SCENARIO.replace("late_k = 0.1", &format!("late_k = 0.{}", i + 1)))
        .collect();
    let files: Vec<PathBuf> = variants
        .iter()
        .enumerate()
        .map(|(i, t)| {
            let p = env.dir.path().join(format!("v{i}.hadal"));
            std::fs::write(&p, t).unwrap();
            p
        })
        .collect();
    // Serial reference, without the cache.
    let serial: Vec<Vec<u8>> = files
        .iter()
        .enumerate()
        .map(|(i, f)| env.run(f, &format!("serial{i}"), &["--no-cache"]).1)
        .collect();
    let children: Vec<(usize, std::process::Child)> = (0..8)
        .map(|k| {
            let i = k % 4;
            let child = Command::new(env!("CARGO_BIN_EXE_hadal"))
                .arg("run")
                .arg(&files[i])
                .arg("--out")
                .arg(env.dir.path().join(format!("par{k}")))
                .env("HADAL_CACHE", env.cache())
                .stdout(std::process::Stdio::null())
                .spawn()
                .unwrap();
            (i, child)
        })
        .collect();
    for (k, (i, mut c)) in children.into_iter().enumerate() {
        assert!(c.wait().unwrap().success());
        let got = std::fs::read(env.dir.path().join(format!("par{k}")).join("series.csv")).unwrap();
        assert_eq!(got, serial[i], "process {k}");
    }
    let verify = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .args(["cache", "verify"])
        .env("HADAL_CACHE", env.cache())
        .output()
        .unwrap();
    assert_eq!(verify.status.code(), Some(0));
}

#[test]
fn params_lists_values_units_and_influenced_stages() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .args(["params", f.to_str().unwrap(), "--json"])
        .output()
        .unwrap();
    assert!(o.status.success());
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let find = |n: &str| {
        v.as_array()
            .unwrap()
            .iter()
            .find(|p| p["name"] == n)
            .unwrap()
            .clone()
    };
    let late = find("late_k");
    assert_eq!(late["stages"], serde_json::json!(["three"]));
    assert_eq!(late["doc"], "Return rate, used only in the last stage.");
    let k = find("k");
    assert_eq!(k["stages"], serde_json::json!(["one", "two", "three"]));
    // 0.5 per Gyr is 5e-10 per year, the internal unit.
    assert!(
        (k["value"].as_f64().unwrap() - 5e-10).abs() < 1e-24,
        "{}",
        k["value"]
    );
}

/// A stage's report rows are an entry apart from the rest of its result:
/// an unchanged rerun does not read them, and rows that are lost (a power
/// cut between writes) are solved again, to the same bits, when a part of
/// the series must be derived.
#[test]
fn stage_rows_are_read_only_to_derive_the_series_and_lost_rows_are_solved_again() {
    use hadal::cache::Store;
    let env = Env::new();
    let model = |text: &str| {
        hadal::check::check_file(&env.write(text), &Default::default())
            .unwrap_or_else(|_| panic!("checks"))
            .model
    };
    let store = Store::new(env.cache());
    let first = hadal::pipeline::execute(&model(SCENARIO), Some(&store)).unwrap();
    let mut removed = 0;
    for st in &first.stages {
        let key: [u8; 32] = (0..32)
            .map(|i| u8::from_str_radix(&st.fingerprint[2 * i..2 * i + 2], 16).unwrap())
            .collect::<Vec<u8>>()
            .try_into()
            .unwrap();
        std::fs::remove_file(store.path(&hadal::pipeline::rows_key(&key))).unwrap();
        removed += 1;
    }
    assert_eq!(removed, 3);
    let again = hadal::pipeline::execute(&model(SCENARIO), Some(&store)).unwrap();
    assert!(again.stages.iter().all(|s| s.status.word() == "reused"));
    assert!(again.series_reused);
    assert_eq!(again.series_csv, first.series_csv);
    assert!(again.warnings.is_empty());
    // A new derived output: every part of the series is derived again, from
    // rows that must be solved again.
    let edited = SCENARIO.replace("let half_b = b / 2", "let half_b = b / 4");
    let derived = hadal::pipeline::execute(&model(&edited), Some(&store)).unwrap();
    let fresh = hadal::pipeline::execute(&model(&edited), None).unwrap();
    assert!(!derived.series_reused);
    assert_eq!(derived.series_csv, fresh.series_csv);
    assert_ne!(derived.series_csv, first.series_csv);
    assert!(derived.warnings.is_empty());
}

/// An ensemble's shared stages go through the same stage driver as a
/// single run: the same key, so a run's entry serves the ensemble, and the
/// same policy, so a damaged entry gives the same H0701 warning (it was
/// dropped without a word before) and is solved and stored again.
#[test]
fn a_damaged_shared_stage_warns_under_ensemble_as_under_run() {
    let env = Env::new();
    // `late_k` acts only in the last stage: stages one and two are shared.
    let f = env.write(&format!(
        "{SCENARIO}ensemble {{\n  members = 4\n  seed = 1\n  vary late_k ~ uniform(0.05 / 1 Gyr, 0.2 / 1 Gyr)\n}}\n"
    ));
    let fingerprint = |out: &str| -> String {
        let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
            .arg("run")
            .arg(&f)
            .arg("--out")
            .arg(env.dir.path().join(out))
            .arg("--json")
            .env("HADAL_CACHE", env.cache())
            .output()
            .unwrap();
        let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        v["stages"][0]["fingerprint"].as_str().unwrap().to_owned()
    };
    let fp = fingerprint("o1");
    let entry = env.cache().join("v2").join(&fp[..2]).join(&fp);
    assert!(entry.is_file(), "{}", entry.display());
    let damage = || {
        let mut bytes = std::fs::read(&entry).unwrap();
        let i = bytes.len() / 2;
        bytes[i] ^= 0x01;
        std::fs::write(&entry, bytes).unwrap();
    };
    // The rendered H0701 warning, from its first line to its help line.
    let warning = |stderr: &str| -> String {
        let lines: Vec<&str> = stderr.lines().collect();
        let from = lines.iter().position(|l| l.contains("H0701"));
        let from = from.unwrap_or_else(|| panic!("no H0701 in: {stderr}"));
        let to = from
            + lines[from..]
                .iter()
                .position(|l| l.contains("help:"))
                .unwrap();
        lines[from..=to].join("\n")
    };

    damage();
    let (s, _, run_stderr) = env.run(&f, "o2", &[]);
    assert_eq!(s, vec!["computed", "reused", "reused"]);
    let under_run = warning(&run_stderr);
    // miette wraps long lines: compare the words without the layout.
    let plain: String = under_run
        .chars()
        .filter(|c| !c.is_whitespace() && *c != '│')
        .collect();
    assert!(
        plain.contains(&format!(
            "cacheentry{}forstage`one`iscorrupt",
            entry.display()
        )),
        "{under_run}"
    );

    damage();
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .arg("ensemble")
        .arg(&f)
        .arg("--out")
        .arg(env.dir.path().join("ens"))
        .env("HADAL_CACHE", env.cache())
        .env("NO_COLOR", "1")
        .output()
        .unwrap();
    let ens_stderr = String::from_utf8_lossy(&o.stderr).into_owned();
    assert!(o.status.success(), "{ens_stderr}");
    assert_eq!(warning(&ens_stderr), under_run);
    assert_eq!(ens_stderr.matches("H0701").count(), 1, "{ens_stderr}");

    // The ensemble stored the stage again under the run's key: the cache
    // verifies, and a run reuses every stage.
    let verify = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .args(["cache", "verify"])
        .env("HADAL_CACHE", env.cache())
        .output()
        .unwrap();
    assert_eq!(verify.status.code(), Some(0));
    let (s, _, stderr) = env.run(&f, "o3", &[]);
    assert_eq!(s, all("reused"));
    assert!(!stderr.contains("H07"), "{stderr}");
}

/// A cache that cannot be written costs the reuse, not the run, and says
/// so once: every write of a run goes to the same folder.
#[test]
fn an_unwritable_cache_is_one_warning_per_run() {
    let env = Env::new();
    let f = env.write(SCENARIO);
    let (_, a, _) = env.run(&f, "o1", &["--no-cache"]);
    // The store's layout folder is a file: no entry can be read or written.
    std::fs::create_dir_all(env.cache()).unwrap();
    std::fs::write(env.cache().join("v2"), b"").unwrap();
    let (s, b, stderr) = env.run(&f, "o2", &[]);
    assert_eq!(s, all("computed"));
    assert_eq!(a, b);
    assert_eq!(stderr.matches("H0702").count(), 1, "{stderr}");
    let plain: String = stderr.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(plain.contains("help: check the cache folder"), "{stderr}");
}
