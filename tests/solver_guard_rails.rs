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
    let problem = match hadal::solve::solve(&m) {
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
    let r = hadal::solve::solve(&m).and_then(|run| hadal::report::series(&m, &run).map(|_| ()));
    let p = r.expect_err("must fail");
    assert!(p.code.starts_with("H06"), "{}: {}", p.code, p.message);
}
