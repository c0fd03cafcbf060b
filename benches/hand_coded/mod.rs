//! The equations of `scenarios/hot_start.hadal`, written by hand in Rust.
//!
//! This is the "hand-written Rust" side of the benchmark comparison
//! "compiled scenario vs hand-written Rust": the same right-hand side as the
//! compiled program, integrated by the same integrator
//! (`hadal::solve::methods::integrate`) with the same `Control` settings that
//! `hadal::solve::solve_stage` builds. It is a plain module, included with
//! `#[path = "../benches/hand_coded/mod.rs"] mod hand_coded;` from the
//! benches and from `tests/hand_coded_agrees.rs`.
//!
//! Every number below must match the scenario (and
//! `scenarios/shared/mantle_minerals.hadal` and the prelude); each one is
//! converted to hadal's internal units (kg, m, yr, K; ages in years before
//! present) the way the checker converts a literal: `value * scale`.
//!
//! State layout, as in the compiled program (`hadal::compile::state_order`):
//! the reservoirs, then the states, each sorted by name (so that reordering
//! declarations changes nothing), then the ledger. [`NAMES`] lists the
//! layout, so a test can map components by name.
//!
//! | index | component |
//! |---|---|
//! | 0 | `ocean` (kg) |
//! | 1 | `transition_zone` (kg) |
//! | 2 | `upper_mantle` (kg) |
//! | 3 | `T_mantle` (K) |
//! | 4 | water delivered from outside (kg) |
//! | 5 | water lost to outside (kg) |
//!
//! The fluxes are added to the derivatives in the order the scenario defines
//! them (the compiled program's order), and the state's rate is written
//! last, so both compute every derivative with the same operations.
#![allow(dead_code)]

use hadal::model::Method;
use hadal::solve::methods::{self, Control, Dense, Observer, Stats, Stop, System};

pub const OCEAN: usize = 0;
pub const TRANSITION_ZONE: usize = 1;
pub const UPPER_MANTLE: usize = 2;
pub const T_MANTLE: usize = 3;
/// Ledger: water delivered from outside, water lost to outside.
pub const DELIVERED: usize = 4;
pub const LOST: usize = 5;
/// Names of the reservoir and state components, in layout order.
pub const NAMES: [&str; 4] = ["ocean", "transition_zone", "upper_mantle", "T_mantle"];

/// Number of reservoirs.
pub const N_RES: usize = 3;
/// Reservoirs and states (the components that enter the error norm).
pub const N_STATE: usize = 4;
/// With the two ledger components.
pub const DIM: usize = N_STATE + 2;

// ---- units, as hadal's unit table defines them ------------------------------

/// One second in years (Julian year of 365.25 days).
const S: f64 = 1.0 / 31_557_600.0;
/// One joule in kg m^2 yr^-2.
const JOULE: f64 = 1.0 / (S * S);
/// One watt in kg m^2 yr^-3.
const WATT: f64 = JOULE / S;
const TW: f64 = 1e12 * WATT;
const KM: f64 = 1e3;
const MYR: f64 = 1e6;
const GYR: f64 = 1e9;
const GA: f64 = 1e9;
const WT_PERCENT: f64 = 1e-2;
const PPM: f64 = 1e-6;
const DEG_C: f64 = 273.15;

// ---- the span and the stages -------------------------------------------------

/// Oldest age of the span (4.5 Ga), years before present.
pub const START_AGE: f64 = 4.5 * GA;
/// Stage boundaries (ages, years before present): early, middle, late.
pub const STAGE_AGES: [(f64, f64); 3] = [
    (4.5 * GA, 4.0 * GA),
    (4.0 * GA, 1.0 * GA),
    (1.0 * GA, 0.0 * GA),
];

/// Solver settings of the scenario: `solver rtol = 1e-8`, the default atol
/// of 1e-10, `solver method = auto`, `solver max_step = 25 Myr` (2 Myr in
/// the early stage), the default budget of 1e6 steps.
pub const RTOL: f64 = 1e-8;
pub const ATOL: f64 = 1e-10;
pub const MAX_STEPS: u64 = 1_000_000;

/// The parameters that differ between stages.
#[derive(Debug, Clone, Copy)]
pub struct StageParams {
    /// `slab_water_column` (kg/m^2): 3e5 in the early stage (`set`), 5e5 after.
    pub slab_water_column: f64,
    /// `regassing_efficiency_ref`: 0.45 in the late stage (`set`), 0.35 before.
    pub regassing_efficiency_ref: f64,
    /// Whether the early `delivery: outside -> ocean` flux is active.
    pub delivery: bool,
    /// `solver max_step` of the stage (years).
    pub max_step: f64,
}

pub fn stage_params(stage: usize) -> StageParams {
    match stage {
        0 => StageParams {
            slab_water_column: 3e5,
            regassing_efficiency_ref: 0.35,
            delivery: true,
            max_step: 2.0 * MYR,
        },
        1 => StageParams {
            slab_water_column: 5e5,
            regassing_efficiency_ref: 0.35,
            delivery: false,
            max_step: 25.0 * MYR,
        },
        _ => StageParams {
            slab_water_column: 5e5,
            regassing_efficiency_ref: 0.45,
            delivery: false,
            max_step: 25.0 * MYR,
        },
    }
}

/// Constants and stage-independent parameters, in internal units.
#[derive(Debug, Clone)]
pub struct Constants {
    pub rock_mass_um: f64,
    pub rock_mass_tz: f64,
    pub t_surface: f64,
    pub t_ref: f64,
    /// `q * 2^(age / half_life)` terms: (present value, half-life).
    pub nuclides: [(f64, f64); 4],
    pub q0: f64,
    pub convection_exponent: f64,
    pub viscosity_sensitivity: f64,
    pub heat_capacity: f64,
    pub t_cap_ref: f64,
    pub cap_um_ref: f64,
    pub k_cap_um: f64,
    pub cap_tz_ref: f64,
    pub k_cap_tz: f64,
    pub rho_um: f64,
    pub t_solidus: f64,
    pub plate_speed_ref: f64,
    pub plate_speed_slope: f64,
    pub trench_length: f64,
    pub ridge_length: f64,
    pub regassing_slope: f64,
    pub hydration_ocean: f64,
    pub melting_depth_ref: f64,
    pub degassing_efficiency: f64,
    pub transfer_time: f64,
    pub overflow_time: f64,
    pub delivery_rate0: f64,
    pub delivery_efold: f64,
}

fn cube(x: f64) -> f64 {
    x * x * x
}

impl Constants {
    pub fn new() -> Constants {
        let r_planet = 5800.0 * KM;
        let rho_um = 3400.0;
        let rho_tz = 3800.0;
        Constants {
            rock_mass_um: 4.18879
                * (cube(r_planet - 30.0 * KM) - cube(r_planet - 410.0 * KM))
                * rho_um,
            rock_mass_tz: 4.18879
                * (cube(r_planet - 410.0 * KM) - cube(r_planet - 660.0 * KM))
                * rho_tz,
            t_surface: 280.0,
            t_ref: 1350.0 + DEG_C,
            nuclides: [
                (7.2 * TW, 4.468 * GYR),
                (0.32 * TW, 0.7038 * GYR),
                (7.6 * TW, 14.01 * GYR),
                (2.5 * TW, 1.2505 * GYR),
            ],
            q0: 24.0 * TW,
            convection_exponent: 1.0 + 0.3,
            viscosity_sensitivity: 4e-3,
            heat_capacity: 5.5e27 * JOULE,
            t_cap_ref: 1350.0 + DEG_C,
            cap_um_ref: 0.1 * WT_PERCENT,
            k_cap_um: 2.0e-3,
            cap_tz_ref: 0.9 * WT_PERCENT,
            k_cap_tz: 2.5e-3,
            rho_um,
            t_solidus: 1400.0,
            plate_speed_ref: 5.0 * 1e-2,
            plate_speed_slope: 4e-3,
            trench_length: 40000.0 * KM,
            ridge_length: 80000.0 * KM,
            regassing_slope: 6e-3,
            hydration_ocean: 2e20,
            melting_depth_ref: 60.0 * KM,
            degassing_efficiency: 0.8,
            transfer_time: 150.0 * MYR,
            overflow_time: 10.0 * 1e3,
            delivery_rate0: 1.5e12,
            delivery_efold: 50.0 * MYR,
        }
    }
}

impl Default for Constants {
    fn default() -> Self {
        Constants::new()
    }
}

/// The initial state of the run: ocean 3.9e21 kg, upper mantle at 30 ppm of
/// its rock, transition zone at 0.09 wt% of its rock, 1900 K, empty ledger.
pub fn initial_state() -> Vec<f64> {
    let c = Constants::new();
    let mut y = vec![0.0; DIM];
    y[OCEAN] = 3.9e21;
    y[UPPER_MANTLE] = 30.0 * PPM * c.rock_mass_um;
    y[TRANSITION_ZONE] = 0.09 * WT_PERCENT * c.rock_mass_tz;
    y[T_MANTLE] = 1900.0;
    y
}

/// The right-hand side of one stage.
#[derive(Debug, Clone)]
pub struct HandCoded {
    pub c: Constants,
    pub p: StageParams,
}

impl HandCoded {
    pub fn new(stage: usize) -> HandCoded {
        HandCoded {
            c: Constants::new(),
            p: stage_params(stage),
        }
    }
}

impl System for HandCoded {
    fn dim(&self) -> usize {
        DIM
    }

    #[inline]
    fn rhs(&mut self, t: f64, y: &[f64], dy: &mut [f64]) -> bool {
        let c = &self.c;
        let p = &self.p;
        let age = START_AGE - t;
        let (ocean, um, tz, temp) = (y[OCEAN], y[UPPER_MANTLE], y[TRANSITION_ZONE], y[T_MANTLE]);

        // Thermal history.
        let mut radiogenic = c.nuclides[0].0 * libm::exp2(age / c.nuclides[0].1);
        for &(q, half_life) in &c.nuclides[1..] {
            radiogenic += q * libm::exp2(age / half_life);
        }
        let heat_loss =
            c.q0 * hadal::numeric::pow(
                (temp - c.t_surface) / (c.t_ref - c.t_surface),
                c.convection_exponent,
            ) * hadal::numeric::exp(c.viscosity_sensitivity * (temp - c.t_ref));
        let d_temp = (radiogenic - heat_loss) / c.heat_capacity;

        // Capacities.
        let cap_um =
            c.cap_um_ref * hadal::numeric::exp(-c.k_cap_um * (temp - c.t_cap_ref)) * c.rock_mass_um;
        let cap_tz =
            c.cap_tz_ref * hadal::numeric::exp(-c.k_cap_tz * (temp - c.t_cap_ref)) * c.rock_mass_tz;

        // Plates and melting.
        let plate_speed =
            c.plate_speed_ref * hadal::numeric::exp(c.plate_speed_slope * (temp - c.t_ref));
        // clamp(x, 0, 1); the same value as the compiled `x.max(0).min(1)`.
        let regassing_efficiency = (p.regassing_efficiency_ref
            * hadal::numeric::exp(-c.regassing_slope * (temp - c.t_ref)))
        .clamp(0.0, 1.0);
        let slab_hydration = 1.0f64.min(ocean / c.hydration_ocean);
        let melting_depth =
            c.melting_depth_ref * 0.0f64.max((temp - c.t_solidus) / (c.t_ref - c.t_solidus));
        let melting_rate = c.ridge_length * plate_speed * melting_depth * c.rho_um;

        // Fluxes, in the order the scenario defines them.
        let regassing = c.trench_length
            * plate_speed
            * p.slab_water_column
            * regassing_efficiency
            * slab_hydration;
        let degassing = c.degassing_efficiency * melting_rate * um / c.rock_mass_um;
        let transfer =
            um / c.transfer_time * plate_speed / c.plate_speed_ref * 0.0f64.max(1.0 - tz / cap_tz);
        let tz_overflow = (tz - cap_tz).max(0.0) / c.overflow_time;
        let um_overflow = (um - cap_um).max(0.0) / c.overflow_time;

        for d in dy.iter_mut() {
            *d = 0.0;
        }
        let (o, u, z) = (OCEAN, UPPER_MANTLE, TRANSITION_ZONE);
        // regassing: ocean -> upper_mantle
        dy[o] -= regassing;
        dy[u] += regassing;
        // degassing: upper_mantle -> ocean
        dy[u] -= degassing;
        dy[o] += degassing;
        // transfer: upper_mantle -> transition_zone
        dy[u] -= transfer;
        dy[z] += transfer;
        // tz_overflow: transition_zone -> upper_mantle
        dy[z] -= tz_overflow;
        dy[u] += tz_overflow;
        // um_overflow: upper_mantle -> ocean
        dy[u] -= um_overflow;
        dy[o] += um_overflow;
        // delivery: outside -> ocean (early stage only)
        if p.delivery {
            let delivery = c.delivery_rate0 * hadal::numeric::exp(-t / c.delivery_efold);
            dy[DELIVERED] += delivery;
            dy[o] += delivery;
        }
        // The state's rate (the compiled program sets it after the fluxes).
        dy[T_MANTLE] = d_temp;
        dy.iter().all(|v| v.is_finite())
    }
}

/// An observer that only lets the integration run.
struct Quiet;

impl Observer for Quiet {
    fn accepted(&mut self, _t0: f64, _t1: f64, _y1: &[f64], _dense: &Dense) -> Result<(), Stop> {
        Ok(())
    }
}

/// The `Control` that `hadal::solve::solve_stage` builds for a stage starting
/// from `start`: atol scaled by the total water for the reservoirs and the
/// ledger, by the start value for the state.
pub fn control(stage: usize, start: &[f64]) -> Control {
    let mass_scale = start[..N_RES].iter().map(|v| v.abs()).sum::<f64>().max(1.0);
    let scale = (0..DIM)
        .map(|i| {
            if !(N_RES..N_STATE).contains(&i) {
                mass_scale
            } else {
                start[i].abs().max(1e-300)
            }
        })
        .collect();
    Control {
        rtol: RTOL,
        atol: ATOL,
        scale,
        n_err: N_STATE,
        max_step: stage_params(stage).max_step,
        initial_step: None,
        max_steps: MAX_STEPS,
        method: Method::AUTO,
    }
}

/// Integrate all three stages; the final state and each stage's statistics.
pub fn run_hand_coded_with_stats() -> (Vec<f64>, Vec<Stats>) {
    let mut y = initial_state();
    let mut all = Vec::new();
    for (s, &(from, to)) in STAGE_AGES.iter().enumerate() {
        let mut ctl = control(s, &y);
        let mut sys = HandCoded::new(s);
        let mut stats = Stats::default();
        methods::integrate(
            &mut sys,
            START_AGE - from,
            START_AGE - to,
            &mut y,
            &mut ctl,
            &mut Quiet,
            &mut stats,
        )
        .unwrap_or_else(|f| panic!("hand-coded stage {s} failed: {f:?}"));
        all.push(stats);
    }
    (y, all)
}

/// Integrate all three stages and return the final state.
pub fn run_hand_coded() -> Vec<f64> {
    run_hand_coded_with_stats().0
}
