//! The hand-coded Rust version of `scenarios/hot_start.hadal` (the baseline
//! of the benchmark "compiled scenario vs hand-written Rust") integrates the
//! same equations as the compiled scenario.
//!
//! Both run the same integrator with the same settings, so only differences
//! in the order of floating-point operations could separate them; the final
//! states must agree to 1e-9 relative, and the right-hand sides to near
//! machine precision.

#[path = "../benches/hand_coded/mod.rs"]
mod hand_coded;

use std::path::Path;

use hadal::compile::{self, Wants};
use hadal::model::Model;
use hand_coded::{HandCoded, DELIVERED, DIM, LOST, NAMES, STAGE_AGES, START_AGE, T_MANTLE};

use hadal::solve::methods::System;

fn model() -> Model {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/hot_start.hadal");
    hadal::check::check_file(&path, &Default::default())
        .unwrap_or_else(|e| panic!("hot_start.hadal does not check: {e:?}"))
        .model
}

/// For each hand-coded component, its index in the compiled state vector
/// (found by name; the ledger follows the states in both).
fn layout(m: &Model) -> Vec<usize> {
    let order = compile::state_order(m);
    let names: Vec<&str> = order.iter().map(|&id| m.defs[id].name.as_str()).collect();
    assert_eq!(names.len(), NAMES.len(), "compiled components: {names:?}");
    let mut map: Vec<usize> = NAMES
        .iter()
        .map(|n| {
            names
                .iter()
                .position(|c| c == n)
                .unwrap_or_else(|| panic!("no component `{n}` in {names:?}"))
        })
        .collect();
    map.extend([names.len(), names.len() + 1]);
    map
}

fn rel(a: f64, b: f64) -> f64 {
    if a == b {
        0.0
    } else {
        (a - b).abs() / a.abs().max(b.abs())
    }
}

/// The hand-coded state vector is laid out as the compiled one (reservoirs,
/// then states, each by name), so both integrations sum their error norms in
/// the same order.
#[test]
fn hand_coded_layout_is_the_compiled_programs() {
    let m = model();
    assert_eq!(
        layout(&m),
        (0..DIM).collect::<Vec<_>>(),
        "update NAMES and the indices in benches/hand_coded/mod.rs"
    );
}

#[test]
fn hand_coded_initial_state_is_the_scenarios() {
    let m = model();
    let map = layout(&m);
    let compiled = hadal::solve::initial_state(&m).0;
    let hand = hand_coded::initial_state();
    assert_eq!(compiled.len(), DIM);
    for i in 0..DIM {
        let c = compiled[map[i]];
        assert!(
            rel(c, hand[i]) <= 1e-15,
            "component {i}: compiled {c} vs hand-coded {}",
            hand[i]
        );
    }
}

/// The right-hand sides agree at states spread over the history, in every
/// stage, including states with a layer over its capacity (so the overflow
/// fluxes are active) and a near-dry ocean (partial slab hydration).
#[test]
fn hand_coded_rhs_matches_the_compiled_program() {
    let m = model();
    let map = layout(&m);
    // (ocean, upper mantle, transition zone, T_mantle, delivered).
    let state = |ocean: f64, um: f64, tz: f64, temp: f64, delivered: f64| {
        let mut y = vec![0.0; DIM];
        y[hand_coded::OCEAN] = ocean;
        y[hand_coded::UPPER_MANTLE] = um;
        y[hand_coded::TRANSITION_ZONE] = tz;
        y[T_MANTLE] = temp;
        y[DELIVERED] = delivered;
        y
    };
    let probes: Vec<Vec<f64>> = vec![
        hand_coded::initial_state(),
        state(3.0e21, 4.0e19, 9.0e20, 1700.0, 7.5e19),
        // Both mantle layers above capacity at this temperature.
        state(2.5e21, 2.0e21, 5.0e21, 1600.0, 7.5e19),
        // A near-dry ocean and a mantle below the solidus.
        state(1.0e20, 1.0e19, 1.0e20, 1390.0, 0.0),
    ];
    let mut compared = 0;
    for (s, &(from, to)) in STAGE_AGES.iter().enumerate() {
        assert_eq!(m.stages[s].start_age, from, "stage {s} start");
        assert_eq!(m.stages[s].end_age, to, "stage {s} end");
        let prog = compile::compile(
            &m,
            Some(s),
            &Wants {
                rhs: true,
                ..Default::default()
            },
        );
        assert_eq!(prog.n_state + 2, DIM);
        let mut regs = prog.regs();
        let mut hand = HandCoded::new(s);
        for y in &probes {
            for frac in [0.0, 0.37, 1.0] {
                let t = (START_AGE - from) + frac * (from - to);
                let mut yc = vec![0.0; DIM];
                for i in 0..DIM {
                    yc[map[i]] = y[i];
                }
                let mut dcc = vec![f64::NAN; DIM];
                let mut dh = vec![f64::NAN; DIM];
                prog.rhs(&mut regs, t, START_AGE - t, &yc, &mut dcc);
                let dc: Vec<f64> = (0..DIM).map(|i| dcc[map[i]]).collect();
                assert!(hand.rhs(t, y, &mut dh), "non-finite hand-coded rhs");
                for i in 0..DIM {
                    // Relative to the largest flux of the same kind, so that
                    // a component that nearly cancels is not over-weighted.
                    let scale = if i == T_MANTLE {
                        dc[i].abs().max(dh[i].abs())
                    } else {
                        (0..DIM)
                            .filter(|&k| k != T_MANTLE)
                            .fold(0.0f64, |a, k| a.max(dc[k].abs()))
                    };
                    let d = (dc[i] - dh[i]).abs();
                    assert!(
                        d <= 1e-13 * scale,
                        "stage {s}, t = {t}, y = {y:?}, component {i}: compiled {} vs hand-coded {}",
                        dc[i],
                        dh[i]
                    );
                }
                compared += 1;
            }
        }
    }
    assert_eq!(compared, 3 * 4 * 3);
}

#[test]
fn hand_coded_final_state_agrees_with_the_compiled_scenario() {
    let m = model();
    let run = hadal::pipeline::solve_all(&m).unwrap_or_else(|p| panic!("solve failed: {p:?}"));
    let map = layout(&m);
    let end = &run.stages.last().expect("three stages").end.0;
    let compiled: Vec<f64> = (0..DIM).map(|i| end[map[i]]).collect();
    let (hand, stats) = hand_coded::run_hand_coded_with_stats();
    assert_eq!(
        hand,
        hand_coded::run_hand_coded(),
        "the hand-coded run is deterministic"
    );
    assert_eq!(compiled.len(), DIM);
    let mut worst = 0.0f64;
    for i in 0..DIM {
        // The ledger's "lost to outside" is exactly zero in both (no sink).
        let r = rel(compiled[i], hand[i]);
        worst = worst.max(r);
        assert!(
            r <= 1e-9,
            "component {i}: compiled {} vs hand-coded {} (relative {r:e})",
            compiled[i],
            hand[i]
        );
    }
    assert_eq!(hand[LOST], 0.0);
    // Delivered from outside: 1.5e12 kg/yr * 50 Myr * (1 - e^-10), the
    // closed form of the early source (derived from the scenario's numbers).
    let delivered = 1.5e12 * 50e6 * (1.0 - (-10.0f64).exp());
    assert!(
        rel(hand[DELIVERED], delivered) < 1e-7,
        "delivered {} vs {delivered}",
        hand[DELIVERED]
    );
    // Same equations, same method: the integrator takes the same steps.
    for (s, (h, c)) in stats.iter().zip(&run.stages).enumerate() {
        assert_eq!(
            (h.accepted, h.rejected, h.implicit_steps),
            (c.stats.accepted, c.stats.rejected, c.stats.implicit_steps),
            "stage {s}: hand-coded {h:?} vs compiled {:?}",
            c.stats
        );
    }
    eprintln!("largest relative difference of the final states: {worst:e}");
}
