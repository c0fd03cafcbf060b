//! The library API used as a front end uses it: load, run, write, and the
//! figures drawn from the result in memory.

use std::path::Path;

use hadal::api::{self, LoadError, LoadOptions, RunOptions};

fn run_demo(name: &str, dir: &Path) -> api::RunResult {
    let scenario = api::load(&Path::new("scenarios").join(name), &LoadOptions::default()).unwrap();
    let mut result = scenario.run(&RunOptions::default()).unwrap();
    result.write(dir).unwrap();
    result
}

#[test]
fn written_outputs_are_the_committed_outputs_byte_for_byte() {
    for (file, out) in [
        ("hot_start.hadal", "mirrowen_hot_start"),
        ("glacial_window.hadal", "caldrith_glacial_window"),
    ] {
        let t = tempfile::tempdir().unwrap();
        let result = run_demo(file, t.path());
        let committed = Path::new("outputs").join(out);
        for (name, bytes) in result.files() {
            let want = std::fs::read(committed.join(name)).unwrap();
            assert!(
                *bytes == want,
                "{out}/{name} differs from the committed file"
            );
            assert_eq!(std::fs::read(t.path().join(name)).unwrap(), want);
        }
        // The manifest's compared part is the committed one.
        let m = hadal::manifest::Manifest::read(&t.path().join("manifest.json")).unwrap();
        let c = hadal::manifest::Manifest::read(&committed.join("manifest.json")).unwrap();
        assert_eq!(
            serde_json::to_value(&m.compared).unwrap(),
            serde_json::to_value(&c.compared).unwrap()
        );
    }
}

#[test]
fn figures_from_memory_are_the_figures_from_the_written_files() {
    for file in ["hot_start.hadal", "glacial_window.hadal"] {
        let t = tempfile::tempdir().unwrap();
        let result = run_demo(file, t.path());
        let opts = hadal::figures::RunOptions::default();
        let from_memory = hadal::figures::run::figures(&result.figure_data().unwrap(), &opts);
        let from_files = hadal::figures::draw_run_with(t.path(), &opts);
        let (a, b) = (from_memory.unwrap(), from_files.unwrap());
        assert!(!a.is_empty(), "{file}: no figures");
        assert_eq!(
            a.iter().map(|f| &f.0).collect::<Vec<_>>(),
            b.iter().map(|f| &f.0).collect::<Vec<_>>()
        );
        for ((name, x), (_, y)) in a.iter().zip(&b) {
            assert!(x == y, "{file}: {name} differs between memory and files");
        }
        // The series columns are the file's.
        let series = result.series().unwrap();
        let read = hadal::figures::data::read_numeric_columns(&t.path().join("series.csv"))
            .unwrap()
            .unwrap();
        assert_eq!(series, read);
        // The bytes can be handed over once written.
        let mut result = result;
        let names: Vec<&str> = result.take_files().iter().map(|f| f.0).collect();
        assert_eq!(&names[..3], ["series.csv", "stages.csv", "events.csv"]);
        assert!(result.files().is_empty());
    }
}

#[test]
fn a_library_file_is_refused_with_its_warnings_kept() {
    let t = tempfile::tempdir().unwrap();
    let p = t.path().join("lib.hadal");
    std::fs::write(&p, "param k = 1 / 1 Gyr\n").unwrap();
    match api::load(&p, &LoadOptions::default()) {
        Err(e @ LoadError::Library { .. }) => {
            assert!(e.to_string().contains("is a library file"), "{e}")
        }
        other => panic!("expected a library refusal, got {other:?}"),
    }
    match api::load(&t.path().join("none.hadal"), &LoadOptions::default()) {
        Err(LoadError::Io { .. }) => {}
        other => panic!("expected an I/O error, got {other:?}"),
    }
}

#[test]
fn the_library_compares_a_rerun_with_a_published_manifest() {
    use hadal::manifest::verify::{self, Drift};
    let opened = verify::open(Path::new("outputs/mirrowen_hot_start/manifest.json")).unwrap();
    let t = tempfile::tempdir().unwrap();
    let result = run_demo("hot_start.hadal", t.path());
    let fresh: Vec<(&str, Vec<u8>)> = result.files().to_vec();
    let same = verify::compare(&opened, &fresh, None).unwrap();
    assert_eq!(same, verify::Comparison::default());

    // One number of the series nudged: drift, unless within a tolerance.
    let mut nudged = fresh.clone();
    let text = String::from_utf8(nudged[0].1.clone()).unwrap();
    let line = text.lines().nth(2).unwrap();
    let cell = line.split(',').nth(1).unwrap();
    let bumped = (cell.parse::<f64>().unwrap() * (1.0 + 1e-9)).to_string();
    let changed = line.replacen(cell, &bumped, 1);
    nudged[0].1 = text.replacen(line, &changed, 1).into_bytes();
    let drifted = verify::compare(&opened, &nudged, None).unwrap();
    assert!(drifted.drifted);
    assert!(
        matches!(&drifted.drift[..], [Drift::Values { path, recomputed, .. }] if path == "series.csv" && *recomputed == bumped),
        "{:?}",
        drifted.drift
    );
    let within = verify::compare(&opened, &nudged, Some(1e-6)).unwrap();
    assert!(!within.drifted && within.drift.is_empty());
    assert!(within.tolerated > 0.0 && within.tolerated <= 1e-6);

    // An output no longer made.
    let fewer = &fresh[1..];
    let missing = verify::compare(&opened, fewer, None).unwrap();
    assert_eq!(
        missing.drift,
        vec![Drift::NotProduced {
            path: "series.csv".into()
        }]
    );
}

#[test]
fn the_library_diffs_two_runs_and_finds_nothing_between_a_run_and_itself() {
    use hadal::manifest::diff::{self, Difference};
    let same = diff::diff(
        Path::new("outputs/mirrowen_hot_start"),
        Path::new("outputs/mirrowen_hot_start/manifest.json"),
    )
    .unwrap();
    assert!(same.differences.is_empty() && same.unreadable.is_none());

    let t = tempfile::tempdir().unwrap();
    let scenario = api::load(
        Path::new("scenarios/hot_start.hadal"),
        &LoadOptions {
            overrides: vec![("q0".into(), "30 TW".into())],
        },
    )
    .unwrap();
    scenario
        .run(&RunOptions::default())
        .unwrap()
        .write(t.path())
        .unwrap();
    let d = diff::diff(Path::new("outputs/mirrowen_hot_start"), t.path()).unwrap();
    assert!(
        matches!(&d.differences[0], Difference::Model),
        "{:?}",
        d.differences
    );
    assert!(d
        .differences
        .iter()
        .any(|x| matches!(x, Difference::Overrides { a, b } if a.is_empty() && b[0].name == "q0")));
    assert!(d
        .differences
        .iter()
        .any(|x| matches!(x, Difference::Output { path, .. } if path == "series.csv")));
    assert!(matches!(
        diff::diff(
            Path::new("outputs/mirrowen_hot_start"),
            &t.path().join("none")
        ),
        Err(diff::DiffError::Manifest { .. })
    ));
}

#[test]
fn parameters_and_final_inventories_come_from_the_library() {
    let scenario = api::load(
        Path::new("scenarios/hot_start.hadal"),
        &LoadOptions::default(),
    )
    .unwrap();
    let model = scenario.model();
    let params = api::parameters(model);
    let late = params
        .iter()
        .find(|p| p.name == "late_regassing_efficiency")
        .unwrap();
    assert_eq!(late.stages, vec!["late".to_string()]);
    let set = params
        .iter()
        .find(|p| p.name == "slab_water_column")
        .unwrap();
    assert_eq!(set.set_in, vec!["early".to_string()]);
    assert_eq!((set.value, set.unit.as_str()), (500000.0, "kg m-2"));

    let result = scenario.run(&RunOptions::default()).unwrap();
    let inv = api::final_inventories(model, &result.outcome.run);
    assert!(inv.solved);
    assert_eq!(
        inv.reservoirs
            .iter()
            .map(|r| r.0.as_str())
            .collect::<Vec<_>>(),
        ["ocean", "transition_zone", "upper_mantle"]
    );
    // The ledger closes the budget: what is in the reservoirs is what
    // started there plus what came from outside, less what left.
    let start: f64 = hadal::solve::initial_state(model).0[..3].iter().sum();
    let end: f64 = inv.reservoirs.iter().map(|r| r.1).sum();
    assert!(inv.delivered > 0.0 && inv.lost == 0.0);
    assert!(((end - start - inv.delivered + inv.lost) / start).abs() < 1e-12);
}
