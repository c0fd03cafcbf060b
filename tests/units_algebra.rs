//! Unit algebra through the checker: every quantity is written in a scenario,
//! checked, and read back from the checked model with `eval_const`, in the
//! internal units (kg, m, Julian year, K; ages in years before present).
//!
//! Values checked against the outside world name their source beside the
//! assertion.

use std::path::Path;

use hadal::check::{check_text, eval_const, CheckError, CheckOptions, Checked};
use hadal::diagnostic::Problem;
use hadal::units::Dim;

fn check(text: &str) -> Result<Checked, Vec<Problem>> {
    match check_text(
        "units.hadal",
        Path::new("units.hadal"),
        text,
        Path::new("."),
        &CheckOptions::default(),
    ) {
        Ok(c) => Ok(c),
        Err(CheckError::Invalid { problems, .. }) => Err(problems),
        Err(CheckError::Io { message, .. }) => panic!("I/O error: {message}"),
    }
}

/// The value (internal units) and dimension of definition `name`.
fn value(text: &str, name: &str) -> (f64, Dim) {
    let checked = check(text).unwrap_or_else(|p| panic!("{text}\nfailed: {p:#?}"));
    let m = &checked.model;
    let id = m.find(name).unwrap_or_else(|| panic!("no `{name}`"));
    let v = eval_const(m, &m.defs[id].expr).unwrap_or_else(|| panic!("`{name}` not constant"));
    (v, m.defs[id].dim)
}

fn val(text: &str) -> f64 {
    value(&format!("const x = {text}\n"), "x").0
}

fn dim(text: &str) -> Dim {
    value(&format!("const x = {text}\n"), "x").1
}

/// The codes of the problems of `text`; empty when it checks clean.
fn codes(text: &str) -> Vec<&'static str> {
    match check(text) {
        Ok(_) => Vec::new(),
        Err(problems) => problems.iter().map(|p| p.code).collect(),
    }
}

fn close(a: f64, b: f64, rel: f64) -> bool {
    (a - b).abs() <= rel * a.abs().max(b.abs())
}

/// Seconds in a Julian year: 365.25 days of 86 400 s (IAU definition of the
/// Julian year, as used for the light-year; IAU Style Manual).
const JULIAN_YEAR_S: f64 = 365.25 * 86_400.0;

const ABSOLUTE_TEMP: Dim = Dim {
    point: true,
    ..Dim::TEMP
};

// ---- temperatures ----------------------------------------------------------

#[test]
fn celsius_alone_is_absolute_with_the_offset() {
    // 0 degC is 273.15 K: the definition of the Celsius scale, SI Brochure,
    // 9th edition (BIPM 2019), section 2.3.1.
    assert_eq!(val("0 degC"), 273.15);
    assert_eq!(val("1350 degC"), 1623.15);
    // A negative Celsius temperature is one number: -20 degC is 253.15 K,
    // an absolute temperature, not the negation of 293.15 K.
    assert_eq!(val("-273.15 degC"), 0.0);
    assert!(close(val("-20 degC"), 253.15, 1e-15));
    assert_eq!(dim("-20 degC"), ABSOLUTE_TEMP);
    assert!(close(val("-20 degC + 5 K"), 258.15, 1e-15));
    assert!(close(val("10 degC - -20 degC"), 30.0, 1e-12));
    assert_eq!(dim("10 degC - -20 degC"), Dim::TEMP);
    assert_eq!(dim("1350 degC"), ABSOLUTE_TEMP);
    // Kelvin has no offset and is a plain temperature.
    assert_eq!(val("1623.15 K"), 1623.15);
    assert_eq!(dim("1623.15 K"), Dim::TEMP);
}

#[test]
fn adding_two_absolute_temperatures_is_an_error() {
    let base = "state T = 1350 degC, rate = -50 K/Gyr\n";
    assert_eq!(
        codes(&format!("{base}let hotter = T + 200 degC\n")),
        vec!["H0305"]
    );
    assert_eq!(codes("const x = 1350 degC + 200 degC\n"), vec!["H0305"]);
    // A difference in K is fine and keeps the sum absolute.
    assert!(codes(&format!("{base}let hotter = T + 200 K\n")).is_empty());
    let (v, d) = value("const T = 1350 degC\nconst hotter = T + 200 K\n", "hotter");
    assert_eq!(v, 1823.15);
    assert_eq!(d, ABSOLUTE_TEMP);
    let (v, d) = value("const T = 1350 degC\nconst cooler = T - 200 K\n", "cooler");
    assert!(close(v, 1423.15, 1e-15), "{v}");
    assert_eq!(d, ABSOLUTE_TEMP);
    // A difference plus an absolute temperature is absolute too.
    let (v, d) = value("const T = 1350 degC\nconst x = 200 K + T\n", "x");
    assert_eq!(v, 1823.15);
    assert_eq!(d, ABSOLUTE_TEMP);
}

#[test]
fn the_difference_of_two_absolute_temperatures_is_a_difference() {
    let text = "const T1 = 1400 degC\nconst T2 = 1350 degC\nconst dT = (T1 - T2)\n";
    let (v, d) = value(text, "dT");
    assert!(close(v, 50.0, 1e-12), "{v}");
    assert_eq!(d, Dim::TEMP);
    assert!(!d.point);
    // So it may be added to an absolute temperature again.
    let text = format!("{text}const T3 = T1 + dT\n");
    let (v, d) = value(&text, "T3");
    assert!(close(v, 1723.15, 1e-15), "{v}");
    assert_eq!(d, ABSOLUTE_TEMP);
    // And the offset cancels: 20 degC - 10 degC is 10 K, not 283.15 K.
    assert!(close(val("20 degC - 10 degC"), 10.0, 1e-12));
}

#[test]
fn celsius_in_a_compound_unit_has_no_offset() {
    assert_eq!(val("2e-3 1/degC"), 2e-3);
    assert_eq!(val("2e-3 degC^-1"), 2e-3);
    assert_eq!(dim("2e-3 1/degC"), Dim::new(0, 0, 0, -1));
    assert_eq!(dim("2e-3 1/degC"), dim("2e-3 1/K"));
    // W/degC is W/K: same number, same dimension.
    assert_eq!(val("3 W/degC"), val("3 W/K"));
    assert_eq!(dim("3 W/degC"), dim("3 W/K"));
    assert_eq!(dim("3 W/degC"), Dim::new(1, 2, -3, -1));
    // A heat capacity in J/degC.
    assert_eq!(val("5.5e27 J/degC"), val("5.5e27 J/K"));
    // A rate of change in degC per Myr is a difference per time.
    assert!(close(val("100 degC/Myr"), 1e-4, 1e-15));
    assert_eq!(dim("100 degC/Myr"), Dim::new(0, 0, -1, 1));
}

#[test]
fn exponential_capacity_law_of_a_temperature_difference() {
    // exp(-k * (T - T_ref)) with k per kelvin and T, T_ref in degC: the
    // argument is dimensionless and the offsets cancel.
    let text = "\
const k = 2.5e-3 1/K
const T_ref = 1350 degC
const T = 1550 degC
const factor = exp(-k * (T - T_ref))
";
    let (v, d) = value(text, "factor");
    assert!(close(v, (-0.5f64).exp(), 1e-12), "{v}");
    assert_eq!(d, Dim::NONE);
    // A bare temperature is not a pure number: one error, and no follow-on
    // complaint that exp(1623.15) overflows.
    assert_eq!(codes("const x = exp(1350 degC)\n"), vec!["H0303"]);
}

#[test]
fn temperature_shown_in_celsius_applies_the_offset() {
    let text = "state T = 1900 K, rate = -50 K/Gyr\noutput T_c = T in degC\n";
    let checked = check(text).unwrap();
    let m = &checked.model;
    let id = m.find("T_c").unwrap();
    let (written, unit) = m.defs[id].display_unit.clone().expect("a display unit");
    assert_eq!(written, "degC");
    assert!(close(unit.from_internal(1900.0), 1626.85, 1e-15));
    assert_eq!(unit.from_internal(273.15), 0.0);
}

// ---- ages and durations ----------------------------------------------------

#[test]
fn ages_minus_ages_are_durations() {
    let (v, d) = value("const x = 4.5 Ga - 2.5 Ga\n", "x");
    assert_eq!(v, 2e9);
    assert_eq!(d, Dim::TIME);
    assert!(!d.point);
    // Equal to 2 Gyr, and comparable with it.
    assert_eq!(v, val("2 Gyr"));
    assert!(codes("event e = 4.5 Ga - age > 2 Gyr\n").is_empty());
    assert!(codes("event e = 4.5 Ga - 2.5 Ga == 2 Gyr\n").is_empty());
    // Ages and their units.
    assert_eq!(val("1 Ga"), 1e9);
    assert_eq!(val("3 Ma"), 3e6);
    assert_eq!(val("20 ka"), 2e4);
    assert_eq!(dim("1 Ga"), Dim::AGE);
    assert_eq!(dim("20 ka"), Dim::AGE);
}

#[test]
fn an_age_plus_a_duration_is_an_age_further_back() {
    let (v, d) = value("const x = 1 Ga + 100 Myr\n", "x");
    assert!(close(v, 1.1e9, 1e-15));
    assert_eq!(d, Dim::AGE);
    let (v, d) = value("const x = 100 Myr + 1 Ga\n", "x");
    assert!(close(v, 1.1e9, 1e-15));
    assert_eq!(d, Dim::AGE);
    let (v, d) = value("const x = 1 Ga - 100 Myr\n", "x");
    assert!(close(v, 0.9e9, 1e-15));
    assert_eq!(d, Dim::AGE);
}

#[test]
fn ages_and_durations_do_not_mix() {
    assert_eq!(codes("event e = age > 1 Gyr\n"), vec!["H0307"]);
    assert_eq!(codes("event e = time > 1 Ga\n"), vec!["H0307"]);
    assert_eq!(codes("let x = 1 Gyr - age\n"), vec!["H0307"]);
    assert_eq!(codes("const x = 2 Ga + 1 Ga\n"), vec!["H0305"]);
    assert_eq!(
        codes("let x = if age > 1 Ga then age else 1 Gyr\n"),
        vec!["H0301"]
    );
    assert_eq!(codes("let x = max(age, 1 Gyr)\n"), vec!["H0301"]);
    // A half-life is a duration, a span is made of ages.
    assert_eq!(codes("let q = decay(1 TW, 1.25 Ga)\n"), vec!["H0303"]);
    assert!(codes("let q = decay(1 TW, 1.25 Gyr)\n").is_empty());
    let scenario = |span: &str, every: &str| {
        format!("scenario s\nspan {span}\nreport every {every}\nstage all from 1 Ga to 0 Ga\n")
    };
    assert!(codes(&scenario("1 Ga to 0 Ga", "10 Myr")).is_empty());
    assert_eq!(
        codes(&scenario("1 Gyr to 0 Gyr", "10 Myr")),
        vec!["H0303", "H0303"]
    );
    assert_eq!(codes(&scenario("1 Ga to 0 Ga", "10 Ma")), vec!["H0303"]);
    // The clocks: `age` is an age, `time` a duration.
    assert!(codes("event e = age > 1 Ga and time > 1 Gyr\n").is_empty());
}

#[test]
fn scaling_an_age_makes_a_plain_quantity() {
    let (v, d) = value("const x = 4.5 Ga / 1 Ga\n", "x");
    assert_eq!(v, 4.5);
    assert_eq!(d, Dim::NONE);
    assert_eq!(dim("2 * 1 Ga"), Dim::TIME);
}

// ---- mass, length, volume ---------------------------------------------------

#[test]
fn mass_units() {
    assert_eq!(val("1 kg"), 1.0);
    assert_eq!(val("1 g"), 1e-3);
    // SI prefixes (SI Brochure, BIPM 2019, table 7): t = 1000 kg; Tg = 1e12 g;
    // Gt = 1e9 t.
    assert_eq!(val("1 t"), 1e3);
    assert_eq!(val("1 Tg"), 1e9);
    assert_eq!(val("1 Gt"), 1e12);
    assert_eq!(val("1 Mt"), 1e9);
    assert_eq!(val("1 Pg"), 1e12);
    assert_eq!(val("1 Tg"), val("1e12 g"));
    assert_eq!(val("1 Gt"), val("1e9 t"));
    for u in ["kg", "g", "t", "Tg", "Gt"] {
        assert_eq!(dim(&format!("1 {u}")), Dim::MASS, "{u}");
    }
}

#[test]
fn lengths_areas_volumes() {
    assert_eq!(val("1 km"), 1e3);
    assert_eq!(val("5 cm"), 5e-2);
    assert_eq!(val("1 km^3"), 1e9);
    assert_eq!(dim("1 km^3"), Dim::VOLUME);
    assert_eq!(val("1 km^2"), 1e6);
    assert_eq!(dim("1 km^2"), Dim::AREA);
    // A quantity with a unit cubed by the `^` operator is the same volume.
    assert_eq!(val("(2 km)^3"), 8e9);
    assert_eq!(dim("(2 km)^3"), Dim::VOLUME);
    assert_eq!(val("sqrt(4 m^2)"), 2.0);
    assert_eq!(dim("sqrt(4 m^2)"), Dim::LENGTH);
    // 1.37e9 km^3 of water at 1027 kg/m^3 is 1.40699e21 kg.
    let (v, d) = value(
        "const V = 1.37e9 km^3\nconst rho = 1027 kg/m^3\nconst M = V * rho\n",
        "M",
    );
    assert!(close(v, 1.40699e21, 1e-12), "{v}");
    assert_eq!(d, Dim::MASS);
    assert_eq!(dim("1027 kg/m^3"), Dim::DENSITY);
}

// ---- time, energy, power -----------------------------------------------------

#[test]
fn durations_in_julian_years() {
    assert_eq!(val("1 yr"), 1.0);
    assert_eq!(val("1 kyr"), 1e3);
    assert_eq!(val("1 Myr"), 1e6);
    assert_eq!(val("1 Gyr"), 1e9);
    // The Julian year of 365.25 days (IAU).
    assert!(close(val("1 yr / 1 s"), JULIAN_YEAR_S, 1e-15));
    assert!(close(val("1 yr / 1 d"), 365.25, 1e-15));
    assert!(close(val("1 d / 1 s"), 86_400.0, 1e-15));
    assert_eq!(dim("1 yr / 1 s"), Dim::NONE);
}

#[test]
fn power_times_duration_is_energy() {
    // 1 TW for 1 Gyr: 1e12 W * 1e9 * 365.25 * 86400 s = 3.15576e28 J.
    let (v, d) = value("const e = 1 TW * 1 Gyr\n", "e");
    let (j, dj) = value("const j = 3.15576e28 J\n", "j");
    assert!(close(v, j, 1e-12), "{v} against {j}");
    assert_eq!(d, dj);
    assert_eq!(d, Dim::new(1, 2, -2, 0));
    assert!(close(
        val("1 TW * 1 Gyr / 1 J"),
        1e12 * 1e9 * JULIAN_YEAR_S,
        1e-12
    ));
    assert_eq!(dim("1 TW * 1 Gyr / 1 J"), Dim::NONE);
    // Energy over a duration is power again; a heat balance in K per time.
    assert!(close(val("3.15576e28 J / 1 Gyr / 1 TW"), 1.0, 1e-12));
    let (rate, d) = value(
        "const q = 20 TW\nconst C = 5.5e27 J/K\nconst dTdt = q / C\n",
        "dTdt",
    );
    assert_eq!(d, Dim::new(0, 0, -1, 1));
    // 20e12 W / 5.5e27 J/K = 3.636e-15 K/s, times a Julian year in s.
    assert!(close(rate, 20e12 / 5.5e27 * JULIAN_YEAR_S, 1e-12), "{rate}");
    // W per m^2 two ways.
    assert_eq!(val("80 mW/m^2"), val("80 mW.m^-2"));
    assert_eq!(dim("80 mW/m^2"), Dim::new(1, 0, -3, 0));
    // Standard gravity in m/s^2 (3rd CGPM, 1901), converted to m/yr^2.
    let (g, d) = value("const g = standard_gravity / (1 m/s^2)\n", "g");
    assert!(close(g, 9.80665, 1e-15), "{g}");
    assert_eq!(d, Dim::NONE);
}

#[test]
fn rates_convert_between_time_units() {
    assert_eq!(val("1 Gt/yr"), 1e12);
    assert_eq!(dim("1 Gt/yr"), Dim::MASS_RATE);
    assert_eq!(val("1e12 kg/Myr"), 1e6);
    assert!(close(val("1 kg/s"), JULIAN_YEAR_S, 1e-15));
    assert_eq!(val("5 cm/yr"), 0.05);
    assert_eq!(val("1e12 kg/yr * 10 Myr"), 1e19);
    assert_eq!(dim("1e12 kg/yr * 10 Myr"), Dim::MASS);
}

// ---- fractions ------------------------------------------------------------------

#[test]
fn fractions_are_plain_factors() {
    assert_eq!(val("1 wt%"), 1e-2);
    assert!(close(val("0.09 wt%"), 0.09e-2, 1e-15));
    assert!(close(val("30 ppm"), 30e-6, 1e-15));
    assert_eq!(val("25 %"), 0.25);
    assert_eq!(val("5 ppb"), 5e-9);
    for u in ["wt%", "ppm", "%", "ppb"] {
        assert_eq!(dim(&format!("1 {u}")), Dim::NONE, "{u}");
    }
    // 30 ppm of 1e24 kg of rock is 3e19 kg of water.
    let (v, d) = value(
        "const rock = 1e24 kg\nconst water = 30 ppm * rock\n",
        "water",
    );
    assert!(close(v, 3e19, 1e-15));
    assert_eq!(d, Dim::MASS);
    assert!(codes("event e = 0.3 > 25 %\n").is_empty());
}

// ---- mismatches -------------------------------------------------------------------

#[test]
fn mismatches_name_both_dimensions() {
    let p = check("const x = 1 kg + 1 m\n").unwrap_err();
    assert_eq!(p[0].code, "H0301");
    assert_eq!(p[0].message, "cannot add these: mass against length");
    let p = check("reservoir ocean = 1e21 kg\nflux f: ocean -> outside = ocean\n").unwrap_err();
    assert_eq!(p[0].code, "H0302");
    assert_eq!(p[0].labels[0].text, "this is mass");
    let p = check("reservoir ocean = 1e21 kg\nlet r = ocean / 1 Myr + ocean\n").unwrap_err();
    assert_eq!(p[0].message, "cannot add these: mass per time against mass");
    let p = check("state T = 1600 K, rate = 3 K\n").unwrap_err();
    assert_eq!(
        p[0].message,
        "the rate of `T` must be temperature per time, found temperature"
    );
    assert_eq!(
        p[0].help.as_deref(),
        Some("divide by a time, e.g. `/ 1 Myr`, to make a rate")
    );
    let p = check("reservoir r = 1e12 kg/yr\n").unwrap_err();
    assert_eq!(
        p[0].help.as_deref(),
        Some("multiply a rate by a time, e.g. `* 1 Myr`, to make an amount")
    );
    assert_eq!(codes("const x = 2 ^ (1 K)\n"), vec!["H0304"]);
    assert_eq!(
        codes("state T = 1 K, rate = 0 K/yr\nlet y = T^1.3\n"),
        vec!["H0304"]
    );
    assert!(codes("state T = 1 K, rate = 0 K/yr\nlet y = T^2\n").is_empty());
    assert_eq!(dim("(3 K)^-2"), Dim::new(0, 0, 0, -2));
    assert_eq!(codes("const x = sqrt(8 m^3)\n"), vec!["H0304"]);
    assert_eq!(codes("const x = 3 fortnights\n"), vec!["H0203"]);
}

#[test]
fn the_prelude_holds_pi_and_the_gravitational_constant() {
    // CODATA 2018 (Tiesinga et al. 2021, Reviews of Modern Physics 93):
    // G = 6.67430e-11 m^3 kg^-1 s^-2. Expressed back in SI it must read the
    // published digits; `pi` is the double nearest the circle constant.
    let g = val("gravitational_constant / (1 m^3/kg/s^2)");
    assert!(close(g, 6.67430e-11, 1e-15), "{g:e}");
    assert_eq!(val("pi"), std::f64::consts::PI);
    assert_eq!(
        dim("gravitational_constant * 1 kg * 1 s^2 / 1 m^3"),
        Dim::NONE
    );
    // Periodic functions of constants fold at check time.
    assert!(close(val("sin(pi / 6)"), 0.5, 1e-15));
    assert!(close(val("cos(pi / 3)"), 0.5, 1e-15));
    assert_eq!(
        val("floor(2.7)") + val("ceil(2.2)") + val("sign(-3 kg)"),
        4.0
    );
}
