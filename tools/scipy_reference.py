#!/usr/bin/env python3
"""Second-opinion trajectory of scenarios/hot_start.hadal from scipy.

The equations of the demo scenario are written out here by hand with numpy
and integrated with a general-purpose ODE library, scipy's
``solve_ivp(method="Radau", rtol=1e-10)``, stage by stage (the equations
change at the stage boundaries, so each stage is a fresh integration started
from the previous stage's end state). The trajectory, every 100 Myr, is
written to tests/data/hot_start_scipy.csv, which tests/reference_scipy.rs
compares with hadal's own solution.

This script does not read or run hadal: every parameter below was copied by
hand from scenarios/hot_start.hadal, scenarios/shared/mantle_minerals.hadal
and hadal's prelude (src/check/prelude.hadal).

The benchmarks' scripted peer, benches/peer/peer.py, imports this module
for its equations (``rhs``, ``stage_table`` and the constants), so this is
the one hand-written copy of the demo's equations in the repository.

Regenerate with:

    pip install scipy numpy && python3 tools/scipy_reference.py

(run from anywhere; the output path is relative to this file). Commit the
CSV together with any change to the scenario's equations or numbers.
"""

import math
import os
import sys

import numpy as np
import scipy
from scipy.integrate import solve_ivp

# --------------------------------------------------------------------------
# Parameters. THESE MUST MATCH scenarios/hot_start.hadal (and the files it
# includes). Units: kg, m, K, years; powers and energies in SI (W, J/K) and
# converted with SECONDS_PER_YEAR where the temperature rate is formed.
# --------------------------------------------------------------------------

SECONDS_PER_YEAR = 365.25 * 86400.0  # Julian year
DEG_C = 273.15

# span and stages: ages in years before present
START_AGE = 4.5e9
REGASSING_EFFICIENCY_REF = 0.35
# late stage: set regassing_efficiency_ref = late_regassing_efficiency
LATE_REGASSING_EFFICIENCY = 0.45


def stage_table(regassing_efficiency_ref=REGASSING_EFFICIENCY_REF):
    """The stages, with the regassing efficiency of the early and middle
    stages (a parameter study varies it; the late stage sets its own)."""
    return [
        # name, start age, end age, slab_water_column (kg/m^2),
        # regassing_efficiency_ref, early delivery flux active
        ("early", 4.5e9, 4.0e9, 3e5, regassing_efficiency_ref, True),  # set slab_water_column = 3e5 kg/m^2
        ("middle", 4.0e9, 1.0e9, 5e5, regassing_efficiency_ref, False),
        ("late", 1.0e9, 0.0, 5e5, LATE_REGASSING_EFFICIENCY, False),
    ]


STAGES = stage_table()

# planet
R_PLANET = 5800e3  # m
RHO_UM = 3400.0  # kg/m^3 (mantle_minerals.hadal)
RHO_TZ = 3800.0  # kg/m^3 (mantle_minerals.hadal)
# rock masses of the shells 30-410 km and 410-660 km (4.18879 is 4 pi / 3, as
# written in the scenario)
ROCK_MASS_UM = 4.18879 * ((R_PLANET - 30e3) ** 3 - (R_PLANET - 410e3) ** 3) * RHO_UM
ROCK_MASS_TZ = 4.18879 * ((R_PLANET - 410e3) ** 3 - (R_PLANET - 660e3) ** 3) * RHO_TZ

# thermal history
T_SURFACE = 280.0  # K
T_REF = 1350.0 + DEG_C  # K
# present radiogenic heating (W) and half-lives (yr, prelude values)
NUCLIDES = [
    (7.2e12, 4.468e9),  # U-238
    (0.32e12, 0.7038e9),  # U-235
    (7.6e12, 14.01e9),  # Th-232
    (2.5e12, 1.2505e9),  # K-40
]
Q0 = 24e12  # W, convective heat loss at T_REF
CONVECTION_BETA = 0.3
VISCOSITY_SENSITIVITY = 4e-3  # 1/K
HEAT_CAPACITY = 5.5e27  # J/K
T_MANTLE_0 = 1900.0  # K

# mantle minerals (mantle_minerals.hadal)
T_CAP_REF = 1350.0 + DEG_C  # K
CAP_UM_REF = 0.1e-2  # 0.1 wt%
K_CAP_UM = 2.0e-3  # 1/K
CAP_TZ_REF = 0.9e-2  # 0.9 wt%
K_CAP_TZ = 2.5e-3  # 1/K
T_SOLIDUS = 1400.0  # K

# reservoirs at the start
OCEAN_0 = 3.9e21  # kg
UPPER_MANTLE_0 = 30e-6 * ROCK_MASS_UM  # 30 ppm of the rock
TRANSITION_ZONE_0 = 0.09e-2 * ROCK_MASS_TZ  # 0.09 wt% of the rock

# plates, melting, exchange
PLATE_SPEED_REF = 0.05  # m/yr (5 cm/yr)
PLATE_SPEED_SLOPE = 4e-3  # 1/K
TRENCH_LENGTH = 40000e3  # m
RIDGE_LENGTH = 80000e3  # m
REGASSING_SLOPE = 6e-3  # 1/K
HYDRATION_OCEAN = 2e20  # kg
MELTING_DEPTH_REF = 60e3  # m
DEGASSING_EFFICIENCY = 0.8
TRANSFER_TIME = 150e6  # yr
OVERFLOW_TIME = 10e3  # yr
DELIVERY_RATE0 = 1.5e12  # kg/yr
DELIVERY_EFOLD = 50e6  # yr

# --------------------------------------------------------------------------
# Equations
# --------------------------------------------------------------------------

# state vector: ocean, upper_mantle, transition_zone (kg), T_mantle (K),
# water delivered from outside (kg)
OCEAN, UM, TZ, TEMP, DELIVERED = range(5)


def decay(q, half_life, age):
    """Value at `age` (years before present) of a quantity that is q today."""
    return q * 2.0 ** (age / half_life)


def rhs(t, y, slab_water_column, regassing_efficiency_ref, delivery, q0=Q0, transfer_time=TRANSFER_TIME):
    """Derivatives per year; t is years since the span start (4.5 Ga).

    q0 and transfer_time default to the scenario's values; a parameter study
    (benches/peer/peer.py) passes its members' values."""
    age = START_AGE - t
    ocean, um, tz, temp = y[OCEAN], y[UM], y[TZ], y[TEMP]

    radiogenic = sum(decay(q, h, age) for q, h in NUCLIDES)
    heat_loss = (
        q0
        * ((temp - T_SURFACE) / (T_REF - T_SURFACE)) ** (1.0 + CONVECTION_BETA)
        * math.exp(VISCOSITY_SENSITIVITY * (temp - T_REF))
    )
    d_temp = (radiogenic - heat_loss) / HEAT_CAPACITY * SECONDS_PER_YEAR  # K/yr

    cap_um = CAP_UM_REF * math.exp(-K_CAP_UM * (temp - T_CAP_REF)) * ROCK_MASS_UM
    cap_tz = CAP_TZ_REF * math.exp(-K_CAP_TZ * (temp - T_CAP_REF)) * ROCK_MASS_TZ
    fill_tz = tz / cap_tz
    excess_um = max(0.0, um - cap_um)
    excess_tz = max(0.0, tz - cap_tz)

    plate_speed = PLATE_SPEED_REF * math.exp(PLATE_SPEED_SLOPE * (temp - T_REF))
    regassing_efficiency = min(
        max(regassing_efficiency_ref * math.exp(-REGASSING_SLOPE * (temp - T_REF)), 0.0), 1.0
    )
    slab_hydration = min(1.0, ocean / HYDRATION_OCEAN)
    melting_depth = MELTING_DEPTH_REF * max(0.0, (temp - T_SOLIDUS) / (T_REF - T_SOLIDUS))
    melting_rate = RIDGE_LENGTH * plate_speed * melting_depth * RHO_UM

    regassing = TRENCH_LENGTH * plate_speed * slab_water_column * regassing_efficiency * slab_hydration
    degassing = DEGASSING_EFFICIENCY * melting_rate * um / ROCK_MASS_UM
    transfer = um / transfer_time * plate_speed / PLATE_SPEED_REF * max(0.0, 1.0 - fill_tz)
    tz_overflow = excess_tz / OVERFLOW_TIME
    um_overflow = excess_um / OVERFLOW_TIME
    deliv = DELIVERY_RATE0 * math.exp(-t / DELIVERY_EFOLD) if delivery else 0.0

    dy = np.zeros(5)
    dy[OCEAN] = -regassing + degassing + um_overflow + deliv
    dy[UM] = regassing - degassing - transfer + tz_overflow - um_overflow
    dy[TZ] = transfer - tz_overflow
    dy[TEMP] = d_temp
    dy[DELIVERED] = deliv
    return dy


# --------------------------------------------------------------------------
# Integration
# --------------------------------------------------------------------------

RTOL = 1e-10
# absolute tolerances: far below rtol times each component's size (masses of
# 1e19 to 4e21 kg, temperatures near 1600 K), so rtol governs
ATOL = np.array([1.0, 1.0, 1.0, 1e-9, 1.0])
REPORT_EVERY = 100e6  # yr


def main():
    here = os.path.dirname(os.path.abspath(__file__))
    out = os.path.join(here, os.pardir, "tests", "data", "hot_start_scipy.csv")

    n_rows = int(round(START_AGE / REPORT_EVERY))
    # report ages in Ga: 4.5, 4.4, ..., 0.0
    report_ga = [(n_rows - k) / 10.0 for k in range(n_rows + 1)]
    rows = {}
    y = np.array([OCEAN_0, UPPER_MANTLE_0, TRANSITION_ZONE_0, T_MANTLE_0, 0.0])
    rows[report_ga[0]] = y.copy()
    for name, a0, a1, swc, eff_ref, delivery in STAGES:
        t0, t1 = START_AGE - a0, START_AGE - a1
        inside = [g for g in report_ga if a1 / 1e9 <= g < a0 / 1e9]
        t_eval = [min(max(START_AGE - g * 1e9, t0), t1) for g in inside]
        sol = solve_ivp(
            rhs,
            (t0, t1),
            y,
            method="Radau",
            rtol=RTOL,
            atol=ATOL,
            t_eval=t_eval,
            args=(swc, eff_ref, delivery),
        )
        if not sol.success:
            sys.exit(f"stage {name}: {sol.message}")
        for g, col in zip(inside, sol.y.T):
            rows[g] = col.copy()
        # the stage's end state starts the next stage
        y = sol.y[:, -1].copy() if t_eval and t_eval[-1] == t1 else None
        if y is None:
            sys.exit(f"stage {name}: no state at the stage end")
        print(
            f"stage {name:6s} {a0 / 1e9:.1f}-{a1 / 1e9:.1f} Ga: {sol.nfev} rhs evaluations, "
            f"ocean {y[OCEAN]:.6e} kg, T {y[TEMP]:.4f} K, delivered {y[DELIVERED]:.6e} kg"
        )

    os.makedirs(os.path.dirname(out), exist_ok=True)
    with open(out, "w", newline="\n") as f:
        f.write("age_Ga,ocean_kg,upper_mantle_kg,transition_zone_kg,T_mantle_K\n")
        for g in report_ga:
            v = rows[g]
            f.write(",".join(repr(float(x)) for x in (g, v[OCEAN], v[UM], v[TZ], v[TEMP])) + "\n")
    print(f"wrote {os.path.normpath(out)} ({len(report_ga)} rows; scipy {scipy.__version__}, numpy {np.__version__})")


if __name__ == "__main__":
    main()
