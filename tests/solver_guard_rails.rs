//! Numerical faults in a scenario become diagnostics that name the stage, the
//! age and the definition, never a panic or a NaN in a CSV.

use std::path::Path;

use hadal::check::{check_text, CheckOptions};
use hadal::diagnostic::Problem;
use hadal::model::Model;

fn model_in(dir: &Path, text: &str) -> Model {
    let path = dir.join("s.hadal");
    std::fs::write(&path, text).unwrap();
    match check_text("s.hadal", &path, text, dir, &CheckOptions::default()) {
        Ok(c) => c.model,
        Err(e) => panic!("does not check: {e:?}"),
    }
}

fn solve_err(text: &str) -> (Problem, String) {
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(dir.path(), text);
    let problem = match hadal::pipeline::solve_all(&m) {
        Ok(run) => match hadal::report::series(&m, &run) {
            Ok(_) => panic!("expected a failure"),
            Err(p) => p,
        },
        Err(p) => p,
    };
    let span = problem.primary().expect("a label");
    let text = m.sources.slice(span).to_owned();
    (problem, text)
}

const HEAD: &str = "scenario faults\nspan 2 Ga to 0 Ga\nreport every 100 Myr\n";

#[test]
fn division_by_zero_at_some_age_names_the_flux_and_the_age() {
    // ln((age - 0.5 Ga) / 1 Gyr) is -infinity at 0.5 Ga and NaN after it.
    let (p, span) = solve_err(&format!(
        "{HEAD}reservoir a = 1e21 kg\nreservoir b = 1e20 kg\n\
         flux bad: a -> b = 1e9 kg/yr * ln((age - 1.5 Ga) / 1 Gyr + 1)\n\
         stage one from 2 Ga to 1 Ga\nstage two from 1 Ga to 0 Ga\n"
    ));
    assert_eq!(p.code, "H0601", "{}", p.message);
    assert!(p.message.contains("`bad`"), "{}", p.message);
    assert!(
        p.message.contains("stage `one`") || p.message.contains("stage `two`"),
        "{}",
        p.message
    );
    assert!(p.message.contains("Ga"), "{}", p.message);
    assert_eq!(span, "1e9 kg/yr * ln((age - 1.5 Ga) / 1 Gyr + 1)");
}

#[test]
fn a_reservoir_drained_below_zero_is_named() {
    let (p, span) = solve_err(&format!(
        "{HEAD}reservoir a = 1e20 kg\nreservoir b = 1e20 kg\n\
         flux drain: a -> b = 1e12 kg/yr\n\
         stage all from 2 Ga to 0 Ga\n"
    ));
    assert_eq!(p.code, "H0602", "{}", p.message);
    assert!(p.message.contains("`a`"), "{}", p.message);
    // 1e20 kg at 1e12 kg/yr lasts 100 Myr: empty near 1.9 Ga.
    assert!(p.message.contains("1.9"), "{}", p.message);
    assert_eq!(span, "a");
}

#[test]
fn a_rate_that_blows_up_is_reported() {
    // dT/dt = T^2 / (K yr): finite-time blow-up after 1/T0 years.
    let (p, _span) = solve_err(&format!(
        "{HEAD}state T = 1000 K, rate = T * T / 1 K / 1 Myr\n\
         stage all from 2 Ga to 0 Ga\n"
    ));
    assert!(
        matches!(p.code, "H0601" | "H0603"),
        "{}: {}",
        p.code,
        p.message
    );
    assert!(p.message.contains("stage `all`"), "{}", p.message);
}

#[test]
fn an_exhausted_step_budget_is_reported() {
    let (p, _span) = solve_err(&format!(
        "{HEAD}solver max_steps = 10\nsolver max_step = 1 Myr\nreservoir a = 1e21 kg\nreservoir b = 0 kg\n\
         flux f: a -> b = a / 1 Gyr\nstage all from 2 Ga to 0 Ga\n"
    ));
    assert_eq!(p.code, "H0604", "{}", p.message);
    assert!(p.message.contains("10 steps"), "{}", p.message);
}

#[test]
fn a_nonfinite_output_never_reaches_the_csv() {
    let (p, span) = solve_err(&format!(
        "{HEAD}reservoir a = 1e21 kg\nreservoir b = 0 kg\n\
         flux f: a -> b = 1e11 kg/yr\n\
         output ratio = a / b\n\
         stage all from 2 Ga to 0 Ga\n"
    ));
    assert_eq!(p.code, "H0605", "{}", p.message);
    assert!(
        p.message.contains("`ratio`") && p.message.contains("2 Ga"),
        "{}",
        p.message
    );
    assert_eq!(span, "a / b");
}

#[test]
fn a_negative_capacity_in_a_fill_makes_a_diagnostic_not_a_panic() {
    // capacity goes negative as T falls below 1000 K; the transfer rate then
    // changes sign and drains the ocean below zero, or turns non-finite.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        &format!(
            "{HEAD}state T = 1500 K, rate = -1 K / 1 Myr\n\
             reservoir ocean = 1e21 kg\nreservoir mantle = 1e20 kg, capacity = 1e21 kg * (T - 1000 K) / 500 K\n\
             flux take: ocean -> mantle = 1e12 kg/yr * (1 - fill(mantle))\n\
             stage all from 2 Ga to 0 Ga\n"
        ),
    );
    let r =
        hadal::pipeline::solve_all(&m).and_then(|run| hadal::report::series(&m, &run).map(|_| ()));
    let p = r.expect_err("must fail");
    assert!(p.code.starts_with("H06"), "{}: {}", p.code, p.message);
}

/// The check's first error for a scenario.
fn check_err(text: &str) -> Problem {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("s.hadal");
    std::fs::write(&path, text).unwrap();
    match check_text("s.hadal", &path, text, dir.path(), &CheckOptions::default()) {
        Ok(_) => panic!("expected a check error"),
        Err(hadal::check::CheckError::Invalid { problems, .. }) => {
            problems.into_iter().next().unwrap()
        }
        Err(hadal::check::CheckError::Io { message, .. }) => panic!("I/O: {message}"),
    }
}

#[test]
fn a_non_finite_start_is_a_check_error_not_a_failed_first_step() {
    let p = check_err(&format!(
        "{HEAD}reservoir a = 1e308 kg * 10\nreservoir b = 0 kg\nflux f: a -> b = 1 kg/yr\nstage all from 2 Ga to 0 Ga\n"
    ));
    assert_eq!(
        (p.code, p.message.as_str()),
        ("H0303", "the initial value of reservoir `a` is infinite")
    );
    let p = check_err(&format!(
        "{HEAD}reservoir b = 1 kg\nstate T = 0 K / 0, rate = 0 K/yr\nstage all from 2 Ga to 0 Ga\n"
    ));
    assert_eq!(
        (p.code, p.message.as_str()),
        (
            "H0303",
            "the initial value of state variable `T` is not a number (NaN)"
        )
    );
    // A stage's `set` that overflows, too.
    let p = check_err(&format!(
        "{HEAD}param k = 1 kg/yr\nreservoir a = 1 kg\nreservoir b = 1 kg\nflux f: a -> b = k\n\
         stage one from 2 Ga to 1 Ga {{\n  set k = 1e308 kg/yr * 10\n}}\nstage two from 1 Ga to 0 Ga\n"
    ));
    assert_eq!(
        (p.code, p.message.as_str()),
        ("H0303", "the value of `k` in stage `one` is not finite")
    );
}

#[test]
fn the_square_root_of_a_negative_at_some_age_names_stage_age_and_expression() {
    let (p, span) = solve_err(&format!(
        "{HEAD}reservoir a = 1e21 kg\nreservoir b = 1e20 kg\n\
         flux leak: a -> b = 1e9 kg/yr * sqrt((age - 0.7 Ga) / 1 Gyr)\n\
         stage early from 2 Ga to 1 Ga\nstage late from 1 Ga to 0 Ga\n"
    ));
    assert_eq!(p.code, "H0601", "{}", p.message);
    assert!(
        p.message.contains("`leak`") && p.message.contains("stage `late`"),
        "{}",
        p.message
    );
    assert!(p.message.contains("0.7"), "{}", p.message);
    assert_eq!(span, "1e9 kg/yr * sqrt((age - 0.7 Ga) / 1 Gyr)");
}

#[test]
fn expectations_that_cannot_be_evaluated_fail_without_a_nan_in_any_csv() {
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        &format!(
            "{HEAD}reservoir a = 1e21 kg\nreservoir b = 0 kg\nlet r = ln(b / a)\n\
             event never = a < 0 kg\nstage all from 2 Ga to 0 Ga\n\
             expect r at 1 Ga > 0\nexpect a / b at 0 Ga in 0 to 1\nexpect b / b at 0 Ga = 1 +- 0.1\n\
             expect never before 1 Ga\n"
        ),
    );
    let outcome = hadal::pipeline::execute(&m, None).expect("the run itself succeeds");
    let results = hadal::report::expectations(&m, &outcome.run);
    assert_eq!(results.len(), 4);
    assert!(results.iter().all(|r| !r.pass), "none of them can pass");
    let csvs = [
        outcome.series_csv.clone(),
        hadal::report::stages_csv(&m, &outcome.run),
        hadal::report::events_csv(&m, &outcome.run),
        hadal::report::expectations_csv(&results),
    ];
    for bytes in &csvs {
        let text = String::from_utf8(bytes.clone()).unwrap();
        assert!(!text.to_lowercase().contains("nan"), "{text}");
    }
}

#[test]
fn an_expectation_with_no_uncertainty_fails_without_a_nan() {
    // The checker refuses a written `+-` width of zero (H0418), but an
    // ensemble member may still draw one for a parameter it varies: set
    // the parameters to zero after checking, as a member does. The misfit
    // of an exact hit would be 0 / 0.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        &format!(
            "{HEAD}param w0 = 1 kg\nparam w1 = 1 kg\nreservoir a = 1e21 kg\n\
             stage all from 2 Ga to 0 Ga\n\
             expect a at 0 Ga = 1e21 kg +- w0\nexpect a at 1 Ga = 2e21 kg +- w1\n"
        ),
    );
    let id = |name: &str| m.defs.iter().position(|d| d.name == name).unwrap();
    let m = hadal::ensemble::with_params(&m, &[(id("w0"), 0.0), (id("w1"), 0.0)]);
    let outcome = hadal::pipeline::execute(&m, None).expect("runs");
    let results = hadal::report::expectations(&m, &outcome.run);
    assert_eq!(results.len(), 2);
    assert!(results.iter().all(|r| !r.pass && r.misfit == f64::INFINITY));
    let csv = String::from_utf8(hadal::report::expectations_csv(&results)).unwrap();
    assert!(!csv.contains("NaN"), "{csv}");
}

#[test]
fn a_stage_without_any_state_that_cannot_step_names_the_stage() {
    // No reservoir and no state: the step collapse has no term to blame.
    let (p, span) = solve_err(&format!(
        "{HEAD}stage all from 2 Ga to 0 Ga {{\n  solver max_step = 1e-150 yr\n}}\n"
    ));
    assert_eq!(p.code, "H0603", "{}", p.message);
    assert!(p.message.contains("stage `all`"), "{}", p.message);
    assert!(span.starts_with("stage all from 2 Ga to 0 Ga"), "{span}");
}

#[test]
fn inventories_near_the_largest_number_close_their_budget_without_overflow() {
    // The sum of the inventories overflows although each is finite.
    let dir = tempfile::tempdir().unwrap();
    let m = model_in(
        dir.path(),
        &format!(
            "{HEAD}reservoir a = 1.7976931348623157e308 kg\nreservoir b = 1.7e308 kg\n\
             flux f: a -> b = 1e290 kg/yr\nstage all from 2 Ga to 0 Ga\n"
        ),
    );
    let run = hadal::pipeline::solve_all(&m).expect("solves");
    let closure = run.stages[0].closure_error;
    assert!(closure.is_finite() && closure < 1e-12, "{closure}");
    let csv = String::from_utf8(hadal::report::stages_csv(&m, &run)).unwrap();
    assert!(!csv.contains("inf") && !csv.contains("NaN"), "{csv}");
}

#[test]
fn not_a_number_into_a_table_or_a_hypsometry_is_a_diagnostic_not_a_panic() {
    // b / b is 0 / 0 at the start, where b is empty: the lookups used to
    // index below their first knot and panic.
    for lookup in ["ramp(b / b * 1 K)", "basin_volume(hyps, b / b * 1 m)"] {
        for output in [
            format!("output v = {lookup}"),
            format!("output z = sea_level(hyps, {lookup})"),
            format!("output land = land_fraction(hyps, {lookup})"),
        ] {
            let dir = tempfile::tempdir().unwrap();
            std::fs::write(dir.path().join("ramp.csv"), "x,y\n0,0\n10,1\n").unwrap();
            std::fs::write(
                dir.path().join("hyps.csv"),
                "z,a\n-1000,0\n0,1e14\n1000,2e14\n",
            )
            .unwrap();
            let text = format!(
                "{HEAD}table ramp = \"ramp.csv\" (K, m^3)\ntable hyps = \"hyps.csv\" (m, m^2)\n\
                 reservoir a = 1e21 kg\nreservoir b = 0 kg\nflux f: a -> b = 1e11 kg/yr\n\
                 {output}\nstage all from 2 Ga to 0 Ga\n"
            );
            let m = model_in(dir.path(), &text);
            let run = hadal::pipeline::solve_all(&m).expect("the state is finite");
            let p = hadal::report::series(&m, &run).expect_err("a NaN output");
            assert_eq!(p.code, "H0605", "{output}: {}", p.message);
            assert!(p.message.contains("not a number"), "{}", p.message);
        }
    }
}

#[test]
fn a_collapse_under_the_implicit_method_names_the_limiting_rate_and_does_not_advise_implicit() {
    // T blows up after 1 kyr (dT/dt = T^2 / (K Myr) from 1000 K); S is a
    // quiet, stiffer-looking relaxation beside it.
    for method in ["implicit", "explicit"] {
        let (p, span) = solve_err(&format!(
            "{HEAD}solver method = {method}\nreservoir ocean = 1e21 kg\n\
             state S = 5 K, rate = -(S - 5 K) / 1 kyr\n\
             state T = 1000 K, rate = T * T / 1 K / 1 Myr\n\
             stage all from 2 Ga to 0 Ga\n"
        ));
        assert_eq!(p.code, "H0603", "{method}: {}", p.message);
        assert!(
            p.message.contains("the error in `T` limits the step"),
            "{method}: {}",
            p.message
        );
        assert_eq!(span, "T * T / 1 K / 1 Myr", "{method}");
        let help = p.help.as_deref().unwrap_or("");
        if method == "implicit" {
            assert!(!help.contains("method = implicit"), "{help}");
            assert!(help.contains("already steps implicitly"), "{help}");
        } else {
            assert!(help.contains("solver method = implicit"), "{help}");
        }
    }
}

#[test]
fn a_collapse_in_a_reservoir_names_the_flux_that_limits_it() {
    // `pool` is fed by a flux growing as pool^2 (infinite after 1 Myr) and
    // drained by a slow linear leak: the runaway flux is to blame.
    for method in ["implicit", "explicit"] {
        let (p, span) = solve_err(&format!(
            "{HEAD}solver method = {method}\nreservoir ocean = 1.2e21 kg\nreservoir pool = 1e18 kg\n\
             flux leak: pool -> ocean = pool / 1 Gyr\n\
             flux runaway: outside -> pool = pool * pool / 1e18 kg / 1 Myr\n\
             stage all from 2 Ga to 0 Ga\n"
        ));
        assert_eq!(p.code, "H0603", "{method}: {}", p.message);
        assert!(
            p.message.contains("the error in `pool` limits the step"),
            "{method}: {}",
            p.message
        );
        assert_eq!(span, "pool * pool / 1e18 kg / 1 Myr", "{method}");
    }
}
