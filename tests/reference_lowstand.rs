//! A glacial window on the reference planet: ice grows for 100 kyr to the
//! mass of the last glacial lowstand, then melts. The sea-level built-ins
//! must give that lowstand back, without and with isostatic loading of the
//! basins.
//!
//! Sources:
//! - lowstand about 120 to 135 m below present: Fairbanks 1989, Nature
//!   (about 121 m); Lambeck et al. 2014, PNAS (about 134 m);
//! - mass per millimetre of global sea level: IPCC AR5 WG1, 362 Gt per mm;
//! - ocean area about 3.617e14 m^2: derived from Charette & Smith 2010,
//!   Oceanography 23(2) (volume 1.332e9 km^3 over mean depth 3682.2 m);
//! - isostatic factor (rho_m - rho_w) / rho_m, about 0.69 for 3300 and
//!   1030 kg/m^3: Turcotte & Schubert, Geodynamics (isostasy chapter).
//!
//! The basins have vertical walls (3.617e14 m^2 at every depth, as in the
//! compensated column of the isostasy argument), so the factor applies to
//! every change of volume and can be checked tightly.

#[path = "support/scenario.rs"]
mod scenario;

use scenario::{hypsometry_csv, ka, rel, sphere_area, Project};

const OCEAN_AREA: f64 = 3.617e14;

fn basins() -> String {
    hypsometry_csv(&[
        (-3682.2, 0.0),
        (-3682.199, OCEAN_AREA),
        (200.0, OCEAN_AREA),
        (6000.0, sphere_area(6371.0e3)),
    ])
}

const LOWSTAND: &str = "\
scenario reference_lowstand \"A glacial window on the reference planet\"
span 150 ka to 0 Ga
report every 1 kyr

## Fresh water, as in the 362 Gt per mm of IPCC AR5 WG1.
const water_density = 1000 kg/m^3
## Densities of the isostasy example of Turcotte & Schubert, Geodynamics.
const load_density = 1030 kg/m^3
const mantle_density = 3300 kg/m^3

table basins = \"basins.csv\" (m, m^2)

## The ocean of Charette & Smith 2010 (Oceanography 23(2)): 1.332e9 km^3.
const ocean_start = 1.332e9 km^3 * water_density

## Ice at the glacial maximum: the mass of a lowstand of 127.5 m (the middle
## of 120 to 135 m: Fairbanks 1989, Nature; Lambeck et al. 2014, PNAS) at
## 362 Gt per mm (IPCC AR5 WG1).
param lowstand = 127.5 m
const ice_peak = lowstand * 362 Gt/mm

reservoir ocean = ocean_start
reservoir ice = 0 kg

stage interglacial from 150 ka to 120 ka
stage glaciation from 120 ka to 20 ka {
  flux ice_growth: ocean -> ice = ice_peak / 100 kyr
}
stage deglaciation from 20 ka to 0 Ga {
  flux ice_melt: ice -> ocean = ice / 1 kyr
}

let level = sea_level(basins, ocean / water_density)
let level_start = sea_level(basins, ocean_start / water_density)
let loaded = sea_level_isostatic(basins, ocean / water_density, load_density, mantle_density)
let loaded_start = sea_level_isostatic(basins, ocean_start / water_density, load_density, mantle_density)

output ice_Gt = ice in Gt
output sea_change = level - level_start in m
output sea_change_loaded = loaded - loaded_start in m
output loaded_over_rigid = (loaded - loaded_start) / min(level - level_start, -1e-6 m)

event lowstand_reached = level - level_start < -120 m

# Fairbanks 1989, Nature (about 121 m); Lambeck et al. 2014, PNAS (about 134 m).
expect level - level_start at 20 ka in -135 m to -120 m
# Turcotte & Schubert, Geodynamics: about 0.69 of the rigid-basin change.
expect loaded_over_rigid at 20 ka in 0.68 to 0.70
expect ice at 20 ka = 4.6155e19 kg +- 1e12 kg
expect lowstand_reached before 20 ka
expect lowstand_reached after 40 ka
expect level - level_start at 0 Ga in -0.01 m to 0 m
";

#[test]
fn a_glacial_maximum_of_lowstand_mass_gives_the_lowstand() {
    let p = Project::new();
    p.write("basins.csv", &basins());
    p.write("lowstand.hadal", LOWSTAND);
    let r = p.run("lowstand.hadal");
    r.assert_expectations_pass(6);
    r.assert_budget_closes(1e-14);

    // Ice peaks at the end of the glaciation, at 127.5 m x 362 Gt/mm.
    let peak = r.at("ice_Gt", ka(20.0));
    assert!(rel(peak, 127.5e3 * 362.0) < 1e-12, "{peak} Gt");
    assert!(r.at("ice_Gt", ka(21.0)) < peak && r.at("ice_Gt", ka(19.0)) < peak);

    // Isostasy off. Fairbanks 1989, Nature (about 121 m) and Lambeck et al.
    // 2014, PNAS (about 134 m): 120 to 135 m below present. Measured 127.60 m:
    // the ice was sized at 362 Gt/mm (IPCC AR5 WG1) and the basins hold
    // 361.7 Gt/mm, so the fall is 127.5 m x 362 / 361.7.
    let fall = -r.at("sea_change", ka(20.0));
    assert!((120.0..=135.0).contains(&fall), "{fall} m");
    assert!(rel(fall, 127.5 * 362.0 / 361.7) < 1e-9, "{fall} m");

    // Isostasy on. Turcotte & Schubert, Geodynamics: the sea surface moves
    // relative to the land by (rho_m - rho_w) / rho_m of the rigid-basin
    // change, about 0.69 for 3300 and 1030 kg/m^3. Measured 87.8 m.
    let fall_loaded = -r.at("sea_change_loaded", ka(20.0));
    let factor: f64 = (3300.0 - 1030.0) / 3300.0;
    assert!((factor - 0.69).abs() < 0.005, "{factor}");
    assert!(
        rel(fall_loaded, factor * fall) < 1e-9,
        "{fall_loaded} m vs {}",
        factor * fall
    );

    // The window closes: after 20 kyr of melting (e-folding 1 kyr) the sea
    // is back within exp(-20) of the lowstand, and the lowstand was passed
    // on the way down (120 m reached at 120 ka - 120/127.6 x 100 kyr).
    let end = r.at("sea_change", 0.0);
    assert!(end.abs() < 127.6 * 3e-9, "{end} m");
    let lowstand_age = r.run.events[0].expect("lowstand reached");
    let expected_age = 120e3 - 120.0 / fall * 100e3;
    assert!(
        (lowstand_age - expected_age).abs() < 1.0,
        "{lowstand_age} yr"
    );
}
