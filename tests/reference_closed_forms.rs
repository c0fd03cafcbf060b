//! The solver against closed-form solutions, each written as a scenario (the
//! closed-form part of the reference suite, formerly solver_closed_forms.rs).
//! Sources: textbook solutions of linear ODEs (two-box exchange, exponential
//! decay), the logistic equation (Verhulst), and Airy isostasy
//! (Turcotte & Schubert, Geodynamics, isostasy chapter).

use std::path::Path;

use hadal::check::{check_text, CheckOptions};
use hadal::model::Model;
use hadal::report::Series;

fn model_in(dir: &Path, text: &str) -> Model {
    let path = dir.join("s.hadal");
    std::fs::write(&path, text).unwrap();
    match check_text("s.hadal", &path, text, dir, &CheckOptions::default()) {
        Ok(c) => c.model,
        Err(hadal::check::CheckError::Invalid { problems, .. }) => {
            panic!(
                "scenario does not check: {:?}",
                problems.iter().map(|p| &p.message).collect::<Vec<_>>()
            )
        }
        Err(e) => panic!("{e:?}"),
    }
}

fn run(model: &Model) -> (hadal::solve::Run, Series) {
    let run = hadal::pipeline::solve_all(model).expect("solves");
    let series = hadal::report::series(model, &run).expect("series");
    (run, series)
}

fn col(s: &Series, name: &str) -> Vec<f64> {
    let c = s.column(name).unwrap_or_else(|| panic!("no column {name}"));
    s.rows.iter().map(|r| r[c]).collect()
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

#[test]
fn two_reservoir_linear_exchange_approaches_the_partition_ratio() {
    // dA/dt = -k1 A + k2 B; A(t) = A_eq + (A0 - A_eq) exp(-(k1 + k2) t),
    // A_eq = k2 (A0 + B0) / (k1 + k2).
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario exchange\nspan 4.5 Ga to 0 Ga\nreport every 100 Myr\nsolver rtol = 1e-12\n\
         param k1 = 0.8 / 1 Gyr\nparam k2 = 0.3 / 1 Gyr\n\
         reservoir a = 1e21 kg\nreservoir b = 2e20 kg\n\
         flux down: a -> b = k1 * a\nflux up: b -> a = k2 * b\n\
         stage all from 4.5 Ga to 0 Ga\n",
    );
    let (run, s) = run(&m);
    let (k1, k2, a0, b0) = (0.8e-9, 0.3e-9, 1e21, 2e20);
    let a_eq = k2 * (a0 + b0) / (k1 + k2);
    let ages = col(&s, "age");
    let a = col(&s, "a");
    let b = col(&s, "b");
    assert_eq!(ages.len(), 46);
    let mut worst: f64 = 0.0;
    for i in 0..ages.len() {
        let t = (4.5 - ages[i]) * 1e9;
        let exact = a_eq + (a0 - a_eq) * (-(k1 + k2) * t).exp();
        worst = worst.max(rel(a[i], exact));
        // The total is conserved to rounding.
        assert!(rel(a[i] + b[i], a0 + b0) < 1e-14, "total drifts at row {i}");
    }
    assert!(worst < 1e-10, "largest relative error {worst:e}");
    assert!(run.stages[0].closure_error < 1e-14);
}

#[test]
fn stiff_linear_exchange_under_the_implicit_method_follows_its_exponential() {
    // The same two-box solution as above under the implicit method, with a
    // 1.5-kyr time scale inside a 2 Myr stage and rows every 1 kyr: the
    // transient is resolved (third order at rtol 1e-10 takes steps of a few
    // years there), then the L-stable method strides over the equilibrium.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario stiff_exchange\nspan 2 Ma to 0 Ga\nreport every 1 kyr\n\
         solver method = implicit\nsolver rtol = 1e-10\n\
         param k1 = 1 / 2 kyr\nparam k2 = 1 / 6 kyr\n\
         reservoir a = 1e21 kg\nreservoir b = 2e20 kg\n\
         flux down: a -> b = k1 * a\nflux up: b -> a = k2 * b\n\
         stage all from 2 Ma to 0 Ga\n",
    );
    let (run, s) = run(&m);
    let (k1, k2, a0, b0) = (1.0 / 2e3, 1.0 / 6e3, 1e21, 2e20);
    let a_eq = k2 * (a0 + b0) / (k1 + k2);
    let ages = col(&s, "age");
    let a = col(&s, "a");
    let b = col(&s, "b");
    assert_eq!(ages.len(), 2001);
    let mut worst: f64 = 0.0;
    for i in 0..ages.len() {
        let t = (2e-3 - ages[i]) * 1e9;
        let exact = a_eq + (a0 - a_eq) * (-(k1 + k2) * t).exp();
        worst = worst.max(rel(a[i], exact));
        assert!(rel(a[i] + b[i], a0 + b0) < 1e-14, "total drifts at row {i}");
    }
    // rtol 1e-10 per step, rows between steps from the cubic Hermite
    // interpolant: 1.4e-10 when written.
    assert!(worst < 1e-8, "largest relative error {worst:e}");
    let st = &run.stages[0];
    assert_eq!(hadal::report::method_text(&m, &st.stats), "implicit");
    // About 2,300 steps, nearly all of them in the first 30 kyr.
    assert!(st.stats.accepted < 3_000, "{:?}", st.stats);
    assert!(st.closure_error < 1e-14);
}

#[test]
fn radioactive_decay_state_and_decay_builtin_agree_with_exp() {
    // N(t) = N0 exp(-lambda t); and decay(q, t_half) = q 2^(age / t_half).
    // U-238 decay constant 1.55125e-10 per yr (Steiger & Jaeger 1977, EPSL 36).
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario decay\nspan 4.5 Ga to 0 Ga\nreport every 500 Myr\nsolver rtol = 1e-12\n\
         const lambda = 1.55125e-10 / 1 yr\n\
         state n = 1e20 kg, rate = -lambda * n\n\
         output heat_then = decay(1 TW, half_life_u238) in TW\n\
         stage all from 4.5 Ga to 0 Ga\n",
    );
    let (_, s) = run(&m);
    let ages = col(&s, "age");
    let n = col(&s, "n");
    let heat = col(&s, "heat_then");
    let half_life = 4.468e9;
    for i in 0..ages.len() {
        let t = (4.5 - ages[i]) * 1e9;
        let exact = 1e20 * (-1.55125e-10 * t).exp();
        assert!(rel(n[i], exact) < 1e-10, "row {i}: {} vs {exact}", n[i]);
        let h = 2f64.powf(ages[i] * 1e9 / half_life);
        assert!(rel(heat[i], h) < 1e-14, "row {i}: {} vs {h}", heat[i]);
    }
    // 4.5 Gyr ago U-238 produced 2^(4.5 / 4.468) = 2.01 times today's heat.
    assert!(rel(heat[0], 2.0099) < 1e-3);
}

#[test]
fn logistic_saturation_of_a_mantle_reservoir() {
    // dM/dt = r M (1 - M / K): M(t) = K / (1 + (K / M0 - 1) exp(-r t)).
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario logistic\nspan 3 Ga to 0 Ga\nreport every 50 Myr\nsolver rtol = 1e-12\nsolver atol = 1e-16\n\
         param r = 3 / 1 Gyr\n\
         reservoir ocean = 1e22 kg\nreservoir mantle = 1e19 kg, capacity = 2e21 kg\n\
         flux uptake: ocean -> mantle = r * mantle * (1 - fill(mantle))\n\
         stage all from 3 Ga to 0 Ga\n",
    );
    let (_, s) = run(&m);
    let ages = col(&s, "age");
    let mm = col(&s, "mantle");
    let (r, k, m0) = (3e-9, 2e21, 1e19);
    for i in 0..ages.len() {
        let t = (3.0 - ages[i]) * 1e9;
        let exact = k / (1.0 + (k / m0 - 1.0) * (-r * t).exp());
        assert!(rel(mm[i], exact) < 1e-9, "row {i}: {} vs {exact}", mm[i]);
    }
}

#[test]
fn stiff_overflow_uses_the_implicit_method_and_relaxes_to_capacity() {
    // M above a fixed capacity C relaxes as C + (M0 - C) exp(-t / tau), tau = 10 kyr,
    // inside a 1 Gyr stage: stiff for an explicit method.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario overflow\nspan 1 Ga to 0 Ga\nreport every 100 Myr\nsolver rtol = 1e-8\n\
         reservoir ocean = 1e21 kg\nreservoir tz = 3e21 kg, capacity = 2e21 kg\n\
         flux spill: tz -> ocean = excess(tz) / 10 kyr\n\
         flux slow: ocean -> tz = 1e11 kg/yr\n\
         stage all from 1 Ga to 0 Ga\n",
    );
    let (run, s) = run(&m);
    let tz = col(&s, "tz");
    // After the fast relaxation the slow inflow is returned at once:
    // tz sits at C + 1e11 kg/yr * 10 kyr.
    let expected = 2e21 + 1e11 * 1e4;
    assert!(
        rel(*tz.last().unwrap(), expected) < 1e-6,
        "{} vs {expected}",
        tz.last().unwrap()
    );
    let st = &run.stages[0];
    let method = hadal::report::method_text(&m, &st.stats);
    assert!(method.contains("implicit"), "method was {}", method);
    assert!(st.stats.accepted < 5_000, "{:?}", st.stats);
    assert!(st.closure_error < 1e-12);
}

#[test]
fn stage_overrides_and_stage_fluxes_apply_only_in_their_stage() {
    // A constant flux of 1e12 kg/yr, doubled in the second stage by `set`, and
    // a source from outside that exists only in the first stage.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario stages\nspan 2 Ga to 0 Ga\nreport every 1 Gyr\n\
         param f = 1e12 kg/yr\n\
         reservoir a = 1e22 kg\nreservoir b = 0 kg\n\
         flux move: a -> b = f\n\
         stage one from 2 Ga to 1 Ga {\n  flux rain: outside -> a = 5e11 kg/yr\n}\n\
         stage two from 1 Ga to 0 Ga {\n  set f = 2e12 kg/yr\n}\n",
    );
    let (run, s) = run(&m);
    let b = col(&s, "b");
    let a = col(&s, "a");
    assert!(rel(b[1], 1e21) < 1e-12, "{}", b[1]);
    assert!(rel(b[2], 3e21) < 1e-12, "{}", b[2]);
    assert!(rel(a[2], 1e22 - 3e21 + 5e20) < 1e-12, "{}", a[2]);
    // The ledger records the delivery; the budget closes.
    let end = &run.stages[1].end.0;
    assert!(rel(end[end.len() - 2], 5e20) < 1e-12);
    assert!(run.stages.iter().all(|s| s.closure_error < 1e-14));
}

#[test]
fn hypsometry_builtins_through_a_scenario() {
    // Flat-bottomed basins: 3e14 m^2 from -4000 m to 0 m (vertical walls),
    // land rising to 5.1e14 m^2 at +1000 m. A volume V stands at V / A - 4000 m;
    // with isostasy the rise relative to land is scaled by (rho_m - rho_w) / rho_m
    // (Turcotte & Schubert, Geodynamics).
    let dir = tempfile::tempdir().unwrap();
    std::fs::write(
        dir.path().join("h.csv"),
        "elevation,area\n-4000,0\n-3999.999,3e14\n0,3e14\n1000,5.1e14\n",
    )
    .unwrap();
    let m = model_in(
        dir.path(),
        "scenario hyps\nspan 1 Ga to 0 Ga\nreport every 1 Gyr\n\
         table h = \"h.csv\" (m, m^2)\n\
         reservoir ocean = 6e17 kg\n\
         output z = sea_level(h, ocean / 1000 kg/m^3) in m\n\
         output z_iso = sea_level_isostatic(h, ocean / 1000 kg/m^3, 1000 kg/m^3, 3300 kg/m^3) in m\n\
         output land = land_fraction(h, ocean / 1000 kg/m^3)\n\
         output v = basin_volume(h, -2000 m) in km^3\n\
         stage all from 1 Ga to 0 Ga\n",
    );
    let (_, s) = run(&m);
    let z = col(&s, "z")[0];
    let z_iso = col(&s, "z_iso")[0];
    let land = col(&s, "land")[0];
    let v = col(&s, "v")[0];
    // 6e17 kg / 1000 kg/m^3 = 6e14 m^3 over 3e14 m^2 = 2 m of water above -4000 m.
    assert!((z - (-3998.0)).abs() < 1e-3, "{z}");
    let depth_iso = 2.0 * (3300.0 - 1000.0) / 3300.0;
    assert!((z_iso - (-4000.0 + depth_iso)).abs() < 1e-3, "{z_iso}");
    assert!((land - (1.0 - 3e14 / 5.1e14)).abs() < 1e-9, "{land}");
    // 2000 m of a 3e14 m^2 basin is 6e17 m^3 = 6e8 km^3.
    assert!(rel(v, 6e8) < 1e-6, "{v}");
}

#[test]
fn every_demo_scenario_runs_and_closes_its_budget() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    let mut count = 0;
    for entry in std::fs::read_dir(&root).unwrap() {
        let path = entry.unwrap().path();
        if path.extension().is_none_or(|e| e != "hadal") {
            continue;
        }
        let m = hadal::check::check_file(&path, &CheckOptions::default())
            .unwrap_or_else(|e| panic!("{}: {e:?}", path.display()))
            .model;
        let (run, s) = run(&m);
        assert!(!s.rows.is_empty());
        for st in &run.stages {
            assert!(
                st.closure_error < 1e-9,
                "{}: stage {} closure {}",
                path.display(),
                st.stage,
                st.closure_error
            );
        }
        count += 1;
    }
    assert!(count >= 2, "expected the demo scenarios");
}

#[test]
fn periodic_forcing_drives_a_reservoir_along_its_integral() {
    // dA/dt = F sin(2 pi (t0 - age) / P) with t = t0 - age the time since the
    // start gives A(t) = A0 + F P / (2 pi) (1 - cos(2 pi t / P)): the
    // textbook integral of a sine. The forcing is written analytically,
    // with the prelude's `pi`; the periodic outputs are checked against
    // libm at every report age, and `floor`, `ceil` and `sign` against
    // their definitions.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        "scenario periodic\nspan 3 Ma to 0 Ga\nreport every 10 kyr\nsolver rtol = 1e-11\nsolver atol = 1e-15\n\
         param period = 100 kyr\nparam amplitude = 1e12 kg/yr\n\
         reservoir sink = 1e21 kg\nreservoir a = 1e20 kg\n\
         let phase = 2 * pi * (3 Ma - age) / period\n\
         flux forced: sink -> a = amplitude * sin(phase)\n\
         output s = sin(phase)\noutput c = cos(phase)\noutput th = tanh(phase / 10)\n\
         output cycles = floor(phase / (2 * pi))\noutput cycles_up = ceil(phase / (2 * pi))\n\
         output rising = sign(cos(phase))\noutput back = atan(tan(phase / 8))\n\
         stage all from 3 Ma to 0 Ga\n",
    );
    let (_, s) = run(&m);
    let ages = col(&s, "age");
    assert_eq!(ages.len(), 301);
    let (a0, f, p) = (1e20, 1e12, 1e5);
    let two_pi = 2.0 * std::f64::consts::PI;
    let mut worst: f64 = 0.0;
    for (i, &age_ga) in ages.iter().enumerate() {
        let t = (3e-3 - age_ga) * 1e9;
        let phase = two_pi * t / p;
        let exact = a0 + f * p / two_pi * (1.0 - libm::cos(phase));
        worst = worst.max(rel(col(&s, "a")[i], exact));
        let close = |name: &str, want: f64| {
            let got = col(&s, name)[i];
            assert!(
                (got - want).abs() < 1e-9,
                "{name} at row {i}: {got} against {want}"
            );
        };
        close("s", libm::sin(phase));
        close("c", libm::cos(phase));
        close("th", libm::tanh(phase / 10.0));
        // atan(tan(x)) jumps by pi where tan has its poles.
        if libm::cos(phase / 8.0).abs() > 1e-6 {
            close("back", libm::atan(libm::tan(phase / 8.0)));
        }
        // Whole cycles: the phase is a multiple of 2 pi at whole 100-kyr
        // steps, where rounding may fall on either side; test between them.
        if i % 10 != 0 {
            close("cycles", (t / p).floor());
            close("cycles_up", (t / p).ceil());
        }
        let cos = libm::cos(phase);
        if cos.abs() > 1e-6 {
            close("rising", cos.signum());
        }
    }
    // The reservoir's swing is F P / pi = 3.2e16 kg on 1e20 kg; after 30
    // cycles at rtol 1e-11 the global error measured 9.4e-11 of the
    // inventory (3e-7 of the swing). The bound leaves a factor of ten.
    assert!(worst < 1e-9, "largest relative error {worst:e}");
}

#[test]
fn periodic_functions_take_only_numbers() {
    // A phase with units is a dimension error (H0301), never a silent
    // radian of seconds.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.hadal");
    let text = "scenario bad\nspan 1 Ma to 0 Ga\nreport every 100 kyr\n\
                reservoir a = 1 kg\noutput s = sin(age)\nstage all from 1 Ma to 0 Ga\n";
    std::fs::write(&path, text).unwrap();
    match check_text("s.hadal", &path, text, dir.path(), &CheckOptions::default()) {
        Err(hadal::check::CheckError::Invalid { problems, .. }) => {
            assert!(
                problems.iter().any(|p| p.code.starts_with("H03")),
                "{problems:?}"
            );
        }
        other => panic!("sin(age) must not check: {:?}", other.map(|_| ())),
    }
}
