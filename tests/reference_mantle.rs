//! Water storage in the mantle against published values: a capacity law
//! calibrated to measured wadsleyite capacities, and the size of the
//! transition zone of the reference planet, both computed by a scenario.
//!
//! Sources:
//! - wadsleyite capacity near 410 km: 1 to 1.5 wt% at 1200 C, 0.75 to 1 wt%
//!   at 1400 C: Bolfan-Casanova et al. 2023, European Journal of
//!   Mineralogy 35;
//! - capacity loss of roughly 20 to 50 % for about +200 K: common practice
//!   rule of thumb (consistent with the row above);
//! - transition zone (410 to 660 km): a shell of about 1.07e20 m^3 at about
//!   3.8 t/m^3, about 7 % of the planet's mass: derived from the preliminary
//!   reference model of Dziewonski & Anderson 1981;
//! - planet mass 5.972e24 kg: IAU 2015 nominal values with CODATA G; mean
//!   radius 6371.0 km: IUGG mean radius;
//! - solubility of water in the high-pressure olivine polymorphs about 1 to
//!   3 wt%: Ohtani 2005, Elements 1(1);
//! - one ocean mass 1.4e21 kg (the prelude's `ocean_mass`): common practice,
//!   no single source.

#[path = "support/scenario.rs"]
mod scenario;

use scenario::{rel, Project};

const MANTLE: &str = "\
scenario reference_mantle \"Transition-zone water storage of the reference planet\"
span 1 Ga to 0 Ga
report every 100 Myr
solver rtol = 1e-12

const pi = 3.141592653589793
## IUGG mean radius; IAU 2015 nominal mass with CODATA G.
const radius = 6371.0 km
const planet_mass = 5.972e24 kg

## The transition zone, 410 to 660 km deep, at the mean density of the
## reference model (Dziewonski & Anderson 1981): about 3.8 t/m^3.
const tz_volume = 4 / 3 * pi * ((radius - 410 km)^3 - (radius - 660 km)^3)
const tz_density = 3.8 t/m^3
const tz_mass = tz_volume * tz_density

## Wadsleyite capacity at the middle of the published ranges
## (Bolfan-Casanova et al. 2023, European Journal of Mineralogy 35):
## 1 to 1.5 wt% at 1200 C, 0.75 to 1 wt% at 1400 C.
param cap_1200 = 1.25 wt%
param cap_1400 = 0.875 wt%

## An exponential fall with temperature through both points.
const k_cap = ln(cap_1200 / cap_1400) / (1400 degC - 1200 degC)
let cap_fraction = cap_1200 * exp(-k_cap * (T_mantle - 1200 degC))

## The transition zone heats by 200 K over the history.
state T_mantle = 1200 degC, rate = 200 K / 1 Gyr

reservoir transition_zone = 1e21 kg, capacity = cap_fraction * tz_mass

output T_celsius = T_mantle in degC
output cap_wt = cap_fraction in wt%
output capacity_loss = 1 - capacity(transition_zone) / (cap_1200 * tz_mass) in %
output loss_from_1350 = 1 - exp(-k_cap * 200 K) in %
output tz_fill = fill(transition_zone) in %
output tz_volume_out = tz_volume in m^3
output tz_mass_fraction = tz_mass / planet_mass in %
output oceans_at_1_wt = 1 wt% * tz_mass / ocean_mass
output oceans_at_2_wt = 2 wt% * tz_mass / ocean_mass

stage all from 1 Ga to 0 Ga

# Bolfan-Casanova et al. 2023, European Journal of Mineralogy 35.
expect cap_fraction at 1 Ga in 1 wt% to 1.5 wt%
expect cap_fraction at 0 Ga in 0.75 wt% to 1 wt%
# Common practice rule of thumb: roughly 20 to 50 % less for +200 K.
expect capacity_loss at 0 Ga in 20 % to 50 %
# Derived from Dziewonski & Anderson 1981: about 1.07e20 m^3, about 7 %.
expect tz_volume at 0 Ga in 1.06e20 m^3 to 1.08e20 m^3
expect tz_mass / planet_mass at 0 Ga in 6.5 % to 7.5 %
# 1 to 2 wt% (Ohtani 2005, Elements 1(1)) holds several ocean masses.
expect oceans_at_1_wt at 0 Ga > 2
expect oceans_at_2_wt at 0 Ga > 4
";

fn solved() -> scenario::Ran {
    let p = Project::new();
    p.write("mantle.hadal", MANTLE);
    p.run("mantle.hadal")
}

#[test]
fn capacity_law_calibrated_to_wadsleyite_loses_20_to_50_percent_for_200_k() {
    let r = solved();
    r.assert_expectations_pass(7);
    // The state heats from 1200 C to 1400 C exactly.
    assert!((r.at("T_celsius", 1.0) - 1200.0).abs() < 1e-9);
    assert!((r.at("T_celsius", 0.0) - 1400.0).abs() < 1e-9);
    // Bolfan-Casanova et al. 2023, European Journal of Mineralogy 35:
    // 1 to 1.5 wt% at 1200 C; measured 1.25 wt%.
    let at_1200 = r.at("cap_wt", 1.0);
    assert!((1.0..=1.5).contains(&at_1200), "{at_1200} wt%");
    // Bolfan-Casanova et al. 2023: 0.75 to 1 wt% at 1400 C; measured
    // 0.875 wt%, the calibration point, to the solver's rtol.
    let at_1400 = r.at("cap_wt", 0.0);
    assert!((0.75..=1.0).contains(&at_1400), "{at_1400} wt%");
    assert!(rel(at_1400, 0.875) < 1e-9, "{at_1400} wt%");
    // Common practice rule of thumb: roughly 20 to 50 % for about +200 K.
    // Measured 30 %, through the reservoir's capacity() as it heats.
    let loss = r.at("capacity_loss", 0.0);
    assert!((20.0..=50.0).contains(&loss), "{loss} %");
    assert!(rel(loss, 30.0) < 1e-8, "{loss} %");
    // An exponential law loses the same fraction for +200 K from any start
    // (here from 1350 C): the rule of thumb holds for the whole range.
    let from_1350 = r.at("loss_from_1350", 0.0);
    assert!((from_1350 - 30.0).abs() < 1e-9, "{from_1350} %");
    // Between the samples, the capacity falls monotonically as it heats.
    let caps: Vec<f64> = (0..=10)
        .map(|k| r.at("cap_wt", 1.0 - 0.1 * k as f64))
        .collect();
    assert!(caps.windows(2).all(|w| w[1] < w[0]), "{caps:?}");
}

#[test]
fn the_transition_zone_is_about_7_percent_of_the_planet_and_holds_several_oceans() {
    let r = solved();
    r.assert_expectations_pass(7);
    let pi = std::f64::consts::PI;
    let (top, bottom) = (6371.0e3_f64 - 410e3, 6371.0e3_f64 - 660e3);
    let volume = 4.0 / 3.0 * pi * (top.powi(3) - bottom.powi(3));
    // Derived from Dziewonski & Anderson 1981 (reference model): a shell of
    // about 1.07e20 m^3. Measured 1.0702e20 m^3; "about" to the written
    // digit: 1 %.
    let v = r.at("tz_volume_out", 0.0);
    assert!(rel(v, volume) < 1e-12, "{v:e} vs {volume:e}");
    assert!(rel(v, 1.07e20) < 0.01, "{v:e}");
    // Derived from Dziewonski & Anderson 1981 with the IAU 2015 mass
    // 5.972e24 kg and the IUGG radius: about 7 %. Measured 6.81 %.
    let frac = r.at("tz_mass_fraction", 0.0);
    assert!(
        rel(frac, 100.0 * volume * 3800.0 / 5.972e24) < 1e-12,
        "{frac} %"
    );
    assert!((6.5..=7.5).contains(&frac), "{frac} %");
    // 1 to 2 wt% (Ohtani 2005, Elements 1(1), within its 1 to 3 wt% for the
    // high-pressure olivine polymorphs) in that shell, in ocean masses of
    // 1.4e21 kg (common practice, no single source): measured 2.9 and 5.8.
    let one = r.at("oceans_at_1_wt", 0.0);
    let two = r.at("oceans_at_2_wt", 0.0);
    assert!(rel(one, 0.01 * volume * 3800.0 / 1.4e21) < 1e-12, "{one}");
    assert!(rel(two, 2.0 * one) < 1e-14, "{two}");
    assert!(one > 2.0 && two < 10.0, "{one} {two}");
}
