//! hadal's solution of the demo scenario against a second opinion from a
//! general-purpose ODE library.
//!
//! Source of the reference: scipy's `solve_ivp` with the Radau method at
//! rtol 1e-10 (the numerical reference listed in docs/sources.md), run
//! once by the committed script `tools/scipy_reference.py` on the
//! equations of `scenarios/hot_start.hadal` written out by hand, stage by
//! stage. Its output is committed as `tests/data/hot_start_scipy.csv`
//! (every 100 Myr).
//! Regenerate with `pip install scipy numpy && python3 tools/scipy_reference.py`.

use std::path::{Path, PathBuf};

/// Allowed relative difference, for inventories and temperature alike.
///
/// The reference is accurate to about 2e-11 relative (rerunning the script's
/// equations at rtol 1e-12, or with an explicit 8th-order method at rtol
/// 1e-13, moves no value by more than that), so the difference measures
/// hadal's own error. The scenario runs hadal at rtol 1e-8 with an absolute
/// tolerance of 1e-10 of the total water (about 4e11 kg), and the report rows
/// between steps come from the 4th-order dense output. The small upper
/// mantle (1e19 kg) is governed by that absolute tolerance: it differs by up
/// to about 2e-8 relative (1.6e-8 measured, at 3.9 Ga), the other columns by
/// less than 1e-9 (ocean and T_mantle about 1e-11). 1e-7 leaves a margin of
/// a few times the largest measured difference, and is still far below any
/// modelling error (a wrong parameter or sign shows up at 1e-3 or more).
const REL_TOL: f64 = 1e-7;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).to_path_buf()
}

/// The committed reference: (age in Ga, [ocean, upper_mantle,
/// transition_zone, T_mantle]).
fn reference() -> Vec<(f64, [f64; 4])> {
    let path = root().join("tests/data/hot_start_scipy.csv");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    let mut lines = text.lines();
    assert_eq!(
        lines.next(),
        Some("age_Ga,ocean_kg,upper_mantle_kg,transition_zone_kg,T_mantle_K"),
        "header of {}",
        path.display()
    );
    lines
        .filter(|l| !l.trim().is_empty())
        .map(|l| {
            let v: Vec<f64> = l
                .split(',')
                .map(|x| {
                    x.parse()
                        .unwrap_or_else(|e| panic!("bad number {x:?} in {l:?}: {e}"))
                })
                .collect();
            assert_eq!(v.len(), 5, "row {l:?}");
            (v[0], [v[1], v[2], v[3], v[4]])
        })
        .collect()
}

#[test]
fn hot_start_matches_scipy_radau_reference() {
    let reference = reference();
    // 4.5 Ga to 0 Ga every 100 Myr.
    assert_eq!(reference.len(), 46);
    assert_eq!(reference.first().map(|r| r.0), Some(4.5));
    assert_eq!(reference.last().map(|r| r.0), Some(0.0));

    let path = root().join("scenarios/hot_start.hadal");
    let model = hadal::check::check_file(&path, &Default::default())
        .unwrap_or_else(|e| panic!("hot_start.hadal does not check: {e:?}"))
        .model;
    let run = hadal::pipeline::solve_all(&model).unwrap_or_else(|p| panic!("solve failed: {p:?}"));
    let series =
        hadal::report::series(&model, &run).unwrap_or_else(|p| panic!("report failed: {p:?}"));

    let names = ["ocean", "upper_mantle", "transition_zone", "T_mantle"];
    let units = ["kg", "kg", "kg", "K"];
    let age_col = series.column("age").expect("age column");
    assert_eq!(series.columns[age_col].unit, "Ga");
    let cols: Vec<usize> = names
        .iter()
        .zip(units)
        .map(|(n, u)| {
            let c = series
                .column(n)
                .unwrap_or_else(|| panic!("no column `{n}`"));
            assert_eq!(series.columns[c].unit, u, "unit of `{n}`");
            c
        })
        .collect();

    let mut worst = [(0.0f64, f64::NAN); 4];
    for (age, want) in &reference {
        let row = series
            .rows
            .iter()
            .find(|r| (r[age_col] - age).abs() < 1e-9)
            .unwrap_or_else(|| panic!("hadal reports no row at {age} Ga"));
        for k in 0..4 {
            let got = row[cols[k]];
            let rel = (got - want[k]).abs() / want[k].abs();
            if rel > worst[k].0 {
                worst[k] = (rel, *age);
            }
            assert!(
                rel <= REL_TOL,
                "`{}` at {age} Ga: hadal {got:e}, scipy Radau {:e} (relative difference {rel:e} > {REL_TOL:e})",
                names[k],
                want[k]
            );
        }
    }
    for k in 0..4 {
        eprintln!(
            "{:16} largest relative difference {:.3e} at {} Ga",
            names[k], worst[k].0, worst[k].1
        );
    }
}
