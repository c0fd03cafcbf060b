//! The implicit method on coupled models of the kind a new user writes:
//! mantle and core temperatures in kelvin beside water masses of 1e21 kg, a
//! viscosity that depends on temperature and water, parameterized convection
//! (heat loss growing as (T - Ts)^(1 + beta)), a state that starts at exactly
//! zero, and a capacity held by a 1-kyr overflow. Quorvane is an invented
//! planet; its numbers are demo values, not references. What is checked:
//! each method finishes within its step budget, and the methods agree with
//! each other at every report age.

use std::path::Path;

use hadal::check::{check_text, CheckOptions};
use hadal::model::Model;
use hadal::solve::Run;

fn model_in(dir: &Path, text: &str) -> Model {
    let path = dir.join("s.hadal");
    std::fs::write(&path, text).unwrap();
    match check_text("s.hadal", &path, text, dir, &CheckOptions::default()) {
        Ok(c) => c.model,
        Err(hadal::check::CheckError::Invalid { problems, .. }) => panic!(
            "scenario does not check: {:?}",
            problems.iter().map(|p| &p.message).collect::<Vec<_>>()
        ),
        Err(e) => panic!("{e:?}"),
    }
}

/// The Quorvane model with `method` and the extra lines `extra`.
fn quorvane(method: &str, extra: &str) -> String {
    format!(
        "scenario quorvane \"Quorvane: hot mantle and core, a wet mantle\"
span 4.5 Ga to 0 Ga
report every 100 Myr
solver method = {method}
solver rtol = 1e-8

const T_surface = 290 K
const T_ref = 1600 K
param q0 = 30 TW
param beta = 0.3
param activation = 3e4 K
param water_weakening = 0.7
const water_ref = 1e21 kg
const heat_capacity_mantle = 5e27 J/K
const heat_capacity_core = 1.5e27 J/K
param cmb_conductance = 8e9 W/K
param q_radio = 25 TW
param half_life = 2.5 Gyr

## Viscosity relative to a mantle at T_ref holding water_ref of water.
let viscosity = exp(activation * (1 / T_mantle - 1 / T_ref)) * (mantle_water / water_ref)^(-water_weakening)
let heat_loss = q0 * ((T_mantle - T_surface) / (T_ref - T_surface))^(1 + beta) * viscosity^(-beta)
let core_heat = cmb_conductance * (T_core - T_mantle)

state T_mantle = 2100 K, rate = (decay(q_radio, half_life) + core_heat - heat_loss) / heat_capacity_mantle
state T_core = 4200 K, rate = -core_heat / heat_capacity_core

reservoir ocean = 1.2e21 kg
param degassing_time = 3 Gyr
flux degassing: mantle_water -> ocean = mantle_water / degassing_time * exp((T_mantle - T_ref) / 400 K)
{extra}
stage all from 4.5 Ga to 0 Ga
"
    )
}

/// Without an overflow: crust grows from zero at the first step.
const OPEN_MANTLE: &str = "
reservoir mantle_water = 0.8e21 kg
flux regassing: ocean -> mantle_water = 1e12 kg/yr * exp(-(T_mantle - T_ref) / 300 K) * min(1, ocean / 1e20 kg)
## Crust thickness: none at the start.
state crust = 0 km, rate = 10 km / 1 Gyr * heat_loss / q0
";

/// Regassing pushes the mantle past a capacity that a 1-kyr overflow holds;
/// crust starts to grow (from exactly zero) once the mantle cools below
/// 2000 K, after the switch to the implicit method.
const CAPPED_MANTLE: &str = "
solver max_steps = 5000
reservoir mantle_water = 0.3e21 kg, capacity = 0.6e21 kg * exp(-(T_mantle - T_ref) / 500 K)
flux regassing: ocean -> mantle_water = 3e12 kg/yr * exp(-(T_mantle - T_ref) / 300 K) * min(1, ocean / 1e20 kg)
flux overflow: mantle_water -> ocean = excess(mantle_water) / 1 kyr
state crust = 0 km, rate = 10 km / 1 Gyr * max(0, (2000 K - T_mantle) / 100 K)
";

fn solve(text: &str) -> (Model, Run) {
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(dir.path(), text);
    let run =
        hadal::pipeline::solve_all(&m).unwrap_or_else(|p| panic!("{}: {}", p.code, p.message));
    (m, run)
}

/// The largest difference between two runs' report rows, each component
/// measured against the largest magnitude it takes in the run (a state that
/// starts at zero has no size of its own at the first row).
fn largest_difference(a: &Run, b: &Run) -> f64 {
    let rows = |r: &Run| -> Vec<(f64, Vec<f64>)> {
        r.stages
            .iter()
            .flat_map(|s| s.rows.iter().map(|(age, y)| (age, y.to_vec())))
            .collect()
    };
    let (ra, rb) = (rows(a), rows(b));
    assert_eq!(ra.len(), rb.len());
    assert_eq!(ra.len(), 46);
    let n = ra[0].1.len();
    let mut worst = 0.0f64;
    for i in 0..n {
        let size = ra.iter().map(|r| r.1[i].abs()).fold(0.0, f64::max);
        if size == 0.0 {
            // A ledger entry that stays zero in both runs.
            assert!(rb.iter().all(|r| r.1[i] == 0.0));
            continue;
        }
        for (x, y) in ra.iter().zip(&rb) {
            assert_eq!(x.0, y.0, "report ages");
            worst = worst.max((x.1[i] - y.1[i]).abs() / size);
        }
    }
    worst
}

fn component(m: &Model, name: &str) -> usize {
    hadal::compile::state_order(m)
        .iter()
        .position(|&id| m.defs[id].name == name)
        .unwrap_or_else(|| panic!("no component `{name}`"))
}

#[test]
fn implicit_integrates_kelvin_and_water_with_a_state_starting_at_zero() {
    // Before: the Newton norm gave `crust` (at exactly 0) no tolerance at
    // all, so the implicit method collapsed at the first step (H0603,
    // blamed on T_mantle) while the explicit one took 51 steps.
    let (_, implicit) = solve(&quorvane("implicit", OPEN_MANTLE));
    let (_, explicit) = solve(&quorvane("explicit", OPEN_MANTLE));
    let si = &implicit.stages[0].stats;
    assert_eq!(si.implicit_steps, si.accepted, "{si:?}");
    // About 600 steps: third order against fifth at rtol 1e-8.
    assert!(si.accepted + si.rejected < 2_000, "{si:?}");
    // Both are held to rtol 1e-8 per step; their report rows agree to
    // 1e-6 of each component's size (4e-9 when written).
    let d = largest_difference(&implicit, &explicit);
    assert!(d < 1e-6, "implicit and explicit differ by {d:e}");
}

#[test]
fn auto_switches_on_a_one_kyr_overflow_and_finishes_within_its_budget() {
    // Before: auto switched at once, then collapsed (H0603) at 4.48 Ga when
    // crust began to grow from exactly zero; explicit alone would need
    // millions of steps for the 1-kyr relaxation over 4.5 Gyr.
    let (m, auto) = solve(&quorvane("auto", CAPPED_MANTLE));
    let st = &auto.stages[0];
    let method = hadal::report::method_text(&m, &st.stats);
    assert!(
        method.starts_with("explicit, then implicit"),
        "method was {}",
        method
    );
    // No table knots: one segment, the whole stage, holding the same counts
    // and the switch as an age.
    let seg = hadal::solve::Segment {
        from_age: 4.5e9,
        to_age: 0.0,
        explicit_steps: st.stats.explicit_steps,
        implicit_steps: st.stats.implicit_steps,
        switch_age: st.stats.switched_at.map(|t| m.start_age - t),
    };
    assert_eq!(st.segments, [seg]);
    assert!(seg.explicit_steps > 0 && seg.implicit_steps > 0, "{seg:?}");
    // `solver max_steps = 5000`: finishing is staying within it.
    assert!(st.stats.accepted + st.stats.rejected <= 5_000);
    assert!(st.closure_error < 1e-12, "closure {}", st.closure_error);
    // The overflow is active: the mantle sits at its capacity at the end
    // (the capacity formula of CAPPED_MANTLE, at the final temperature).
    let end = &st.end.0;
    let t = end[component(&m, "T_mantle")];
    let capacity = 0.6e21 * (-(t - 1600.0) / 500.0).exp();
    let fill = end[component(&m, "mantle_water")] / capacity;
    assert!((fill - 1.0).abs() < 1e-4, "fill {fill}");
    assert!(end[component(&m, "crust")] > 10e3, "crust grew");
    // Implicit from the start reaches the same history.
    let (_, implicit) = solve(&quorvane("implicit", CAPPED_MANTLE));
    let d = largest_difference(&auto, &implicit);
    assert!(d < 1e-5, "auto and implicit differ by {d:e}");
}

#[test]
fn every_state_gets_an_absolute_scale_even_at_zero() {
    // A state at exactly zero is measured in the unit its start value is
    // written in (1 km = 1000 m), or 1 without a unit; a state elsewhere by
    // its start value; reservoirs and the ledger by the total water.
    let text = quorvane("implicit", OPEN_MANTLE)
        .replace("stage all", "state lift = 0, rate = 1 / 1 Gyr\nstage all");
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(dir.path(), &text);
    let start = hadal::solve::initial_state(&m);
    let ctl = hadal::solve::stage_control(&m, 0, &start);
    let at = |name: &str| ctl.scale[component(&m, name)];
    assert_eq!(at("crust"), 1000.0);
    assert_eq!(at("lift"), 1.0);
    assert_eq!(at("T_mantle"), 2100.0);
    assert_eq!(at("ocean"), 2.0e21);
    assert_eq!(at("mantle_water"), 2.0e21);
    let n = start.0.len();
    assert_eq!(ctl.scale[n - 2..], [2.0e21, 2.0e21]);
}

#[test]
fn the_unit_of_a_zero_start_enters_the_stage_fingerprint() {
    // `0 km` and `0 m` are the same start value in the same canonical text,
    // but different scales, so different results: the cache must not hand
    // one's stage to the other.
    let dir = tempfile::tempdir().unwrap();
    let key = |unit: &str| {
        let text = quorvane(
            "implicit",
            &OPEN_MANTLE.replace("0 km,", &format!("0 {unit},")),
        );
        let m = model_in(dir.path(), &text);
        let g = hadal::graph::DepGraph::build(&m);
        let start = hadal::solve::initial_state(&m);
        (
            hadal::pipeline::stage_key(&m, &g, 0, &start, &[]),
            hadal::solve::stage_control(&m, 0, &start).scale[component(&m, "crust")],
        )
    };
    let (km, km_scale) = key("km");
    let (m, m_scale) = key("m");
    assert_eq!((km_scale, m_scale), (1000.0, 1.0));
    assert_ne!(km, m);
    assert_eq!(km, key("km").0, "the key is a function of the text");
}
