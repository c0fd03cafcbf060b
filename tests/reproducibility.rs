//! Manifests, `hadal verify` and `hadal diff`, through the real binary.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

const SCENARIO: &str = "\
scenario repro \"a small exchange model\"
span 2 Ga to 0 Ga
report every 100 Myr
param k = 0.5 / 1 Gyr
table forcing = \"data/forcing.csv\" (Ga, 1/Gyr)
reservoir a = 1e21 kg
reservoir b = 1e20 kg
flux ab: a -> b = k * a
flux ba: b -> a = forcing(age) * b
output total = a + b
stage one from 2 Ga to 1 Ga
stage two from 1 Ga to 0 Ga
";

/// A project in a temporary directory (marked as a versioned project).
fn project() -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path();
    std::fs::create_dir_all(root.join(".git")).unwrap();
    std::fs::create_dir_all(root.join("scenarios/data")).unwrap();
    std::fs::write(root.join("scenarios/repro.hadal"), SCENARIO).unwrap();
    std::fs::write(
        root.join("scenarios/data/forcing.csv"),
        "age,rate\n0,0.2\n1,0.1\n2,0.3\n",
    )
    .unwrap();
    dir
}

fn hadal(root: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(root)
        .args(args)
        .env("NO_COLOR", "1")
        .env("HADAL_CACHE", root.join(".cache"))
        .output()
        .unwrap()
}

fn run(root: &Path, out: &str) -> PathBuf {
    let o = hadal(root, &["run", "scenarios/repro.hadal", "--out", out]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    root.join(out).join("manifest.json")
}

fn compared(manifest: &Path) -> serde_json::Value {
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(manifest).unwrap()).unwrap();
    v["compared"].clone()
}

#[test]
fn a_fresh_run_verifies_and_names_every_input() {
    let p = project();
    let m = run(p.path(), "outputs/repro");
    let c = compared(&m);
    let inputs: Vec<&str> = c["inputs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|i| i["path"].as_str().unwrap())
        .collect();
    assert_eq!(
        inputs,
        ["scenarios/data/forcing.csv", "scenarios/repro.hadal"]
    );
    let outputs: Vec<&str> = c["outputs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|i| i["path"].as_str().unwrap())
        .collect();
    assert_eq!(outputs, ["series.csv", "stages.csv", "events.csv"]);
    assert_eq!(c["stages"].as_array().unwrap().len(), 2);
    let o = hadal(p.path(), &["verify", "outputs/repro/manifest.json"]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(String::from_utf8_lossy(&o.stdout).contains("byte-identical"));
    // No absolute path and no timestamp in the compared part.
    let text = c.to_string();
    assert!(!text.contains(p.path().to_str().unwrap()));
}

#[test]
fn a_tampered_output_is_drift_with_its_column_and_age() {
    let p = project();
    run(p.path(), "outputs/repro");
    let series = p.path().join("outputs/repro/series.csv");
    let text = std::fs::read_to_string(&series).unwrap();
    // Change the `b` value on the row of age 1.5 Ga.
    let mut lines: Vec<String> = text.lines().map(str::to_owned).collect();
    let header: Vec<&str> = lines[0].split(',').collect();
    let col = header.iter().position(|h| h.starts_with("b [")).unwrap();
    let row = lines.iter().position(|l| l.starts_with("1.5,")).unwrap();
    let mut cells: Vec<String> = lines[row].split(',').map(str::to_owned).collect();
    let v: f64 = cells[col].parse().unwrap();
    cells[col] = (v * 1.01).to_string();
    lines[row] = cells.join(",");
    std::fs::write(&series, lines.join("\n") + "\n").unwrap();
    let o = hadal(p.path(), &["verify", "outputs/repro/manifest.json"]);
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("column `b [kg]` at age 1.5"), "{err}");
    assert!(err.contains("largest relative difference 9.9"), "{err}");
}

#[test]
fn a_tampered_input_is_reported_as_such() {
    let p = project();
    run(p.path(), "outputs/repro");
    std::fs::write(
        p.path().join("scenarios/data/forcing.csv"),
        "age,rate\n0,0.2\n1,0.1\n2,0.31\n",
    )
    .unwrap();
    // A differing input is a failed verification (exit 1, H0806); a
    // missing one means it could not be made (exit 2, H0805).
    let o = hadal(p.path(), &["verify", "outputs/repro/manifest.json"]);
    assert_eq!(o.status.code(), Some(1));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("H0806") && err.contains("input `scenarios/data/forcing.csv` differs"),
        "{err}"
    );
    std::fs::remove_file(p.path().join("scenarios/data/forcing.csv")).unwrap();
    let o = hadal(p.path(), &["verify", "outputs/repro/manifest.json"]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("H0805") && err.contains("is missing"), "{err}");
}

/// Perturb every `a` value of the published series by `rel` and record the
/// perturbed file in the manifest, as if it had been published that way.
fn publish_perturbed(root: &Path, rel: f64) {
    let dir = root.join("outputs/repro");
    let text = std::fs::read_to_string(dir.join("series.csv")).unwrap();
    let mut out = String::new();
    for (i, line) in text.lines().enumerate() {
        let mut cells: Vec<String> = line.split(',').map(str::to_owned).collect();
        if i > 0 {
            let v: f64 = cells[1].parse().unwrap();
            cells[1] = (v * (1.0 + rel)).to_string();
        }
        out.push_str(&cells.join(","));
        out.push('\n');
    }
    std::fs::write(dir.join("series.csv"), &out).unwrap();
    let mpath = dir.join("manifest.json");
    let mut m: serde_json::Value = serde_json::from_slice(&std::fs::read(&mpath).unwrap()).unwrap();
    for o in m["compared"]["outputs"].as_array_mut().unwrap() {
        if o["path"] == "series.csv" {
            o["blake3"] = blake3::hash(out.as_bytes()).to_hex().to_string().into();
            o["bytes"] = out.len().into();
        }
    }
    std::fs::write(&mpath, serde_json::to_vec_pretty(&m).unwrap()).unwrap();
}

#[test]
fn rtol_accepts_a_tiny_perturbation_and_rejects_a_large_one() {
    let p = project();
    run(p.path(), "outputs/repro");
    publish_perturbed(p.path(), 1e-13);
    let strict = hadal(p.path(), &["verify", "outputs/repro/manifest.json"]);
    assert_eq!(strict.status.code(), Some(1));
    let loose = hadal(
        p.path(),
        &["verify", "--rtol", "1e-10", "outputs/repro/manifest.json"],
    );
    assert_eq!(
        loose.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&loose.stderr)
    );
    let said = String::from_utf8_lossy(&loose.stdout);
    assert!(said.contains("within --rtol"), "{said}");
    let size: f64 = said
        .split("largest relative difference ")
        .nth(1)
        .and_then(|r| r.trim_end().trim_end_matches(')').parse().ok())
        .unwrap();
    assert!((0.9e-13..1.1e-13).contains(&size), "{said}");

    let p = project();
    run(p.path(), "outputs/repro");
    publish_perturbed(p.path(), 1e-6);
    let o = hadal(
        p.path(),
        &["verify", "--rtol", "1e-10", "outputs/repro/manifest.json"],
    );
    assert_eq!(o.status.code(), Some(1));
    assert!(String::from_utf8_lossy(&o.stderr).contains("beyond --rtol"));
}

#[test]
fn a_run_elsewhere_has_the_same_compared_manifest() {
    let p = project();
    let q = project();
    let a = run(p.path(), "outputs/repro");
    let b = run(q.path(), "somewhere/else/entirely");
    assert_eq!(compared(&a), compared(&b));
    // And a cached rerun records the same compared part too.
    let c = run(p.path(), "outputs/again");
    assert_eq!(compared(&a), compared(&c));
    let v: serde_json::Value = serde_json::from_slice(&std::fs::read(&c).unwrap()).unwrap();
    assert_eq!(
        v["run"]["stage_status"],
        serde_json::json!(["reused", "reused"])
    );
}

#[test]
fn diff_names_the_changed_input_stage_and_columns() {
    let p = project();
    run(p.path(), "outputs/base");
    std::fs::write(
        p.path().join("scenarios/repro.hadal"),
        SCENARIO.replace(
            "stage two from 1 Ga to 0 Ga",
            "stage two from 1 Ga to 0 Ga {\n  set k = 0.6 / 1 Gyr\n}",
        ),
    )
    .unwrap();
    run(p.path(), "outputs/changed");
    let o = hadal(p.path(), &["diff", "outputs/base", "outputs/changed"]);
    assert_eq!(o.status.code(), Some(1));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(
        out.contains("input scenarios/repro.hadal: differs"),
        "{out}"
    );
    assert!(out.contains("stage two: different inputs"), "{out}");
    assert!(!out.contains("stage one"), "{out}");
    // Stage two starts at 1 Ga; the first row after it is 0.9 Ga.
    assert!(out.contains("a [kg]") && out.contains("0.9 Ga"), "{out}");
    let same = hadal(
        p.path(),
        &["diff", "outputs/changed", "outputs/changed/manifest.json"],
    );
    assert_eq!(same.status.code(), Some(0));
}
