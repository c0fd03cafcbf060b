//! The scripted peer of the benchmarks (benches/peer/peer.py: the demo's
//! equations by hand, integrated with scipy's `solve_ivp`, LSODA and Radau)
//! solves the same problem as hadal: its final inventories agree with
//! hadal's within 1e-6 relative.
//!
//! CI may lack scipy, so the peer's final states are committed as data,
//! `benches/peer/final_inventories.json`. Regenerate them (after any change
//! to the demo's equations, numbers or solver settings) with:
//!
//!     pip install scipy numpy
//!     python3 benches/peer/peer.py --final-only > benches/peer/final_inventories.json
//!
//! The peer runs at the scenario's own settings (rtol 1e-8, absolute
//! tolerances scaled as hadal scales its default 1e-10, the scenario's step
//! limits), so the difference is the sum of two solutions' errors at rtol
//! 1e-8, not the peer's error alone: measured, Radau agrees with hadal to
//! about 1e-12 and LSODA to about 2e-7 (the small upper mantle; the other
//! components to 2e-8 or better). 1e-6 is the bound; a wrong
//! parameter, sign or stage boundary moves a final inventory by 1e-3 or
//! more.

use std::path::{Path, PathBuf};

use hadal::model::Model;
use serde_json::Value;

const REL_TOL: f64 = 1e-6;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).to_path_buf()
}

fn model() -> Model {
    let path = root().join("scenarios/hot_start.hadal");
    hadal::check::check_file(&path, &Default::default())
        .unwrap_or_else(|e| panic!("hot_start.hadal does not check: {e:?}"))
        .model
}

fn peer() -> Value {
    let path = root().join("benches/peer/final_inventories.json");
    let text = std::fs::read_to_string(&path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

fn number(v: &Value, what: &str) -> f64 {
    v.as_f64()
        .unwrap_or_else(|| panic!("{what} is not a number: {v}"))
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / a.abs().max(b.abs())
}

/// hadal's final state by component name, with the ledger's delivered
/// water as `delivered`.
fn hadal_final(m: &Model) -> Vec<(String, f64)> {
    let run = hadal::pipeline::solve_all(m).unwrap_or_else(|p| panic!("solve failed: {p:?}"));
    let end = &run.stages.last().expect("the demo has stages").end.0;
    let order = hadal::compile::state_order(m);
    let mut named: Vec<(String, f64)> = order
        .iter()
        .enumerate()
        .map(|(i, &id)| (m.defs[id].name.clone(), end[i]))
        .collect();
    // the ledger follows the states: delivered from outside, lost to outside
    named.push(("delivered".to_string(), end[order.len()]));
    named
}

/// The peer integrated the problem the scenario poses: same tolerances and
/// step limits, stage by stage. If the scenario's settings change, the
/// committed peer data is stale and must be regenerated.
#[test]
fn peer_used_the_scenarios_solver_settings() {
    let m = model();
    let p = peer();
    assert_eq!(p["scenario"], "scenarios/hot_start.hadal");
    let names: Vec<&str> = m.stages.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(names, ["early", "middle", "late"]);
    for st in &m.stages {
        assert_eq!(
            number(&p["rtol"], "rtol"),
            st.solver.rtol,
            "rtol of `{}`",
            st.name
        );
        assert_eq!(
            number(&p["atol"], "atol"),
            st.solver.atol,
            "atol of `{}`",
            st.name
        );
        let max_step = number(&p["max_step_yr"][&st.name], "max_step_yr");
        assert_eq!(
            Some(max_step),
            st.solver.max_step,
            "max_step of stage `{}` (years)",
            st.name
        );
    }
}

#[test]
fn peer_final_inventories_agree_with_hadal() {
    let m = model();
    let p = peer();
    let ours = hadal_final(&m);
    let finals = p["final"].as_object().expect("`final` is an object");
    let mut methods: Vec<&String> = finals.keys().collect();
    methods.sort();
    assert_eq!(methods, ["LSODA", "Radau"], "the peer's methods");
    for (method, theirs) in finals {
        let theirs = theirs.as_object().expect("a method's final state");
        assert_eq!(
            theirs.len(),
            ours.len(),
            "{method}: components {:?} against hadal's {:?}",
            theirs.keys().collect::<Vec<_>>(),
            ours.iter().map(|c| &c.0).collect::<Vec<_>>()
        );
        for (name, got) in &ours {
            let want = number(
                theirs
                    .get(name)
                    .unwrap_or_else(|| panic!("{method}: no component `{name}`")),
                name,
            );
            let r = rel(*got, want);
            eprintln!("{method:5} {name:16} hadal {got:.12e} peer {want:.12e} relative {r:.2e}");
            assert!(
                r <= REL_TOL,
                "{method}: final `{name}` hadal {got:e}, peer {want:e} (relative difference {r:e} > {REL_TOL:e})"
            );
        }
    }
}
