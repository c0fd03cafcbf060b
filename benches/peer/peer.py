#!/usr/bin/env python3
"""The scripted peer: scenarios/hot_start.hadal done the usual way, by hand
with scipy, timed in-process.

This is what a careful modeler without hadal would write: the demo's
equations by hand (they are imported from tools/scipy_reference.py, the one
hand-written copy of them in the repository, so the peer and the reference
cannot drift apart), integrated stage by stage with scipy's
``solve_ivp`` using the same settings the scenario asks of hadal:

- rtol 1e-8 (``solver rtol = 1e-8``);
- absolute tolerances as hadal builds them from its default ``atol = 1e-10``:
  1e-10 of the total water at the stage start for the water reservoirs and
  the delivery ledger, 1e-10 of the starting temperature for T_mantle;
- the scenario's step limits (``max_step`` 2 Myr in the early stage,
  25 Myr elsewhere), and a fresh integration at every stage boundary;
- both of the stiff-capable methods a modeler would reach for: LSODA (which
  switches between Adams and BDF by itself, as hadal's ``method = auto``
  does) and Radau (implicit Runge-Kutta).

The right-hand side is the scalar function of the reference (plain floats
and ``math``): with five components, a numpy-array form costs more per call
than it saves, and scipy's documentation says as much of ``vectorized=True``
for small systems; ``--check-vectorized`` measures it on this machine (Radau
with a numpy right-hand side that takes a whole block of columns for the
finite-difference Jacobian) and prints both medians.

It prints one JSON object on stdout:

- ``full_solve_s``: median wall time of one full solve of the demo (three
  stages, the state every 10 Myr as hadal's ``report every 10 Myr``), per
  method, over ``--repeats`` runs after one warm-up run; imports, parsing of
  arguments and JSON output are outside the timed region
  (``time.perf_counter`` around the solve only);
- ``per_member_s``: a parameter study like the demo's ``ensemble`` block
  (q0 ~ normal(24 TW, 3 TW) truncated at 15 TW by redrawing,
  regassing_efficiency_ref ~ uniform(0.2, 0.5) in the early and middle
  stages, transfer_time ~ log_uniform(80 Myr, 300 Myr)) over ``--members``
  members (at least 100), each solved to its final state; ``mean`` is the
  total time over the member count (what 10,000 members would cost, divided
  by 10,000), ``median`` the median member;
- ``final``: the final state of the nominal run per method.

``--once CSV`` is the rerun as a modeler sees it: one full solve in a fresh
process, its series written to a CSV file (benches/compare.sh times the
whole process, interpreter start and imports included).

``--final-only`` skips the timing and prints the final states only; its
output is committed as benches/peer/final_inventories.json, which
tests/peer_agrees.rs compares with hadal's solution. Regenerate with:

    pip install scipy numpy
    python3 benches/peer/peer.py --final-only > benches/peer/final_inventories.json

Run from anywhere (the reference module is found relative to this file).
"""

import argparse
import json
import math
import os
import platform
import statistics
import sys
import time

import numpy as np
import scipy
from scipy.integrate import solve_ivp

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), os.pardir, os.pardir, "tools"))
import scipy_reference as ref  # noqa: E402  (the demo's equations, by hand)

# ---- the scenario's solver settings -----------------------------------------

RTOL = 1e-8  # solver rtol = 1e-8
ATOL = 1e-10  # hadal's default solver atol, scaled by each component's size
MAX_STEP = {"early": 2e6, "middle": 25e6, "late": 25e6}  # years
CADENCE = 10e6  # report every 10 Myr
METHODS = ("LSODA", "Radau")

# ---- the demo's ensemble block (SI units as in the reference) -------------

TW = 1e12  # W
MYR = 1e6  # yr
Q0_MEAN, Q0_SD, Q0_MIN = 24 * TW, 3 * TW, 15 * TW
EFF_LO, EFF_HI = 0.2, 0.5
TRANSFER_LO, TRANSFER_HI = 80 * MYR, 300 * MYR
SEED = 11

COMPONENTS = ("ocean", "upper_mantle", "transition_zone", "T_mantle", "delivered")
INDEX = {
    "ocean": ref.OCEAN,
    "upper_mantle": ref.UM,
    "transition_zone": ref.TZ,
    "T_mantle": ref.TEMP,
    "delivered": ref.DELIVERED,
}
UNITS = {"ocean": "kg", "upper_mantle": "kg", "transition_zone": "kg", "T_mantle": "K", "delivered": "kg"}


def initial_state():
    return np.array([ref.OCEAN_0, ref.UPPER_MANTLE_0, ref.TRANSITION_ZONE_0, ref.T_MANTLE_0, 0.0])


def stage_atol(y):
    """hadal's absolute tolerances at a stage start (solve::stage_control)."""
    mass = max(abs(y[ref.OCEAN]) + abs(y[ref.UM]) + abs(y[ref.TZ]), 1.0)
    atol = np.full(5, ATOL * mass)
    atol[ref.TEMP] = ATOL * abs(y[ref.TEMP])
    return atol


def report_times(t0, t1, first):
    """Times (years since 4.5 Ga) of the report rows inside one stage: every
    CADENCE from the span start, the stage end included, the stage start only
    for the first stage (hadal's rows)."""
    k0 = math.ceil(t0 / CADENCE - 1e-9)
    times = [k * CADENCE for k in range(k0, int(math.floor(t1 / CADENCE + 1e-9)) + 1)]
    times = [min(max(t, t0), t1) for t in times if first or t > t0]
    if not times or times[-1] < t1:
        times.append(t1)
    return times


def solve(method, q0=ref.Q0, regassing_efficiency_ref=ref.REGASSING_EFFICIENCY_REF,
          transfer_time=ref.TRANSFER_TIME, series=True, rhs=ref.rhs, vectorized=False):
    """Integrate the demo stage by stage; returns (final state, rows, rhs
    evaluations). With series=False only the final state is kept."""
    y = initial_state()
    rows = []
    nfev = 0
    for i, (name, a0, a1, swc, eff, delivery) in enumerate(ref.stage_table(regassing_efficiency_ref)):
        t0, t1 = ref.START_AGE - a0, ref.START_AGE - a1
        sol = solve_ivp(
            rhs,
            (t0, t1),
            y,
            method=method,
            rtol=RTOL,
            atol=stage_atol(y),
            max_step=MAX_STEP[name],
            t_eval=report_times(t0, t1, i == 0) if series else None,
            args=(swc, eff, delivery, q0, transfer_time),
            vectorized=vectorized,
        )
        if not sol.success or sol.t[-1] != t1:
            raise RuntimeError(f"{method}, stage {name}: {sol.message}")
        nfev += sol.nfev
        if series:
            rows.append(sol.y)
        y = sol.y[:, -1].copy()
    return y, (np.hstack(rows) if series else None), nfev


def rhs_vectorized(t, y, slab_water_column, regassing_efficiency_ref, delivery, q0, transfer_time):
    """The reference's equations applied to a block of states at once (y of
    shape (5, k)), for Radau's finite-difference Jacobian with
    vectorized=True. Only used by --check-vectorized, which also checks it
    against ref.rhs column by column before timing it."""
    age = ref.START_AGE - t
    ocean, um, tz, temp = y[ref.OCEAN], y[ref.UM], y[ref.TZ], y[ref.TEMP]
    radiogenic = sum(ref.decay(q, h, age) for q, h in ref.NUCLIDES)
    heat_loss = (
        q0
        * ((temp - ref.T_SURFACE) / (ref.T_REF - ref.T_SURFACE)) ** (1.0 + ref.CONVECTION_BETA)
        * np.exp(ref.VISCOSITY_SENSITIVITY * (temp - ref.T_REF))
    )
    d_temp = (radiogenic - heat_loss) / ref.HEAT_CAPACITY * ref.SECONDS_PER_YEAR
    cap_um = ref.CAP_UM_REF * np.exp(-ref.K_CAP_UM * (temp - ref.T_CAP_REF)) * ref.ROCK_MASS_UM
    cap_tz = ref.CAP_TZ_REF * np.exp(-ref.K_CAP_TZ * (temp - ref.T_CAP_REF)) * ref.ROCK_MASS_TZ
    plate_speed = ref.PLATE_SPEED_REF * np.exp(ref.PLATE_SPEED_SLOPE * (temp - ref.T_REF))
    eff = np.clip(regassing_efficiency_ref * np.exp(-ref.REGASSING_SLOPE * (temp - ref.T_REF)), 0.0, 1.0)
    hydration = np.minimum(1.0, ocean / ref.HYDRATION_OCEAN)
    melting_depth = ref.MELTING_DEPTH_REF * np.maximum(0.0, (temp - ref.T_SOLIDUS) / (ref.T_REF - ref.T_SOLIDUS))
    melting_rate = ref.RIDGE_LENGTH * plate_speed * melting_depth * ref.RHO_UM
    regassing = ref.TRENCH_LENGTH * plate_speed * slab_water_column * eff * hydration
    degassing = ref.DEGASSING_EFFICIENCY * melting_rate * um / ref.ROCK_MASS_UM
    transfer = um / transfer_time * plate_speed / ref.PLATE_SPEED_REF * np.maximum(0.0, 1.0 - tz / cap_tz)
    tz_overflow = np.maximum(0.0, tz - cap_tz) / ref.OVERFLOW_TIME
    um_overflow = np.maximum(0.0, um - cap_um) / ref.OVERFLOW_TIME
    deliv = ref.DELIVERY_RATE0 * math.exp(-t / ref.DELIVERY_EFOLD) if delivery else 0.0
    dy = np.empty_like(y, dtype=float)
    dy[ref.OCEAN] = -regassing + degassing + um_overflow + deliv
    dy[ref.UM] = regassing - degassing - transfer + tz_overflow - um_overflow
    dy[ref.TZ] = transfer - tz_overflow
    dy[ref.TEMP] = d_temp
    dy[ref.DELIVERED] = deliv
    return dy


def timed(f, repeats):
    """Wall seconds of f() over `repeats` runs after one warm-up run."""
    f()
    samples = []
    for _ in range(repeats):
        t = time.perf_counter()
        f()
        samples.append(time.perf_counter() - t)
    return samples


def draw_members(n, seed):
    """Member parameters like the demo's ensemble block (numpy's generator;
    the draws are not hadal's, only their distributions are)."""
    rng = np.random.default_rng(seed)
    members = []
    for _ in range(n):
        q0 = rng.normal(Q0_MEAN, Q0_SD)
        while q0 < Q0_MIN:
            q0 = rng.normal(Q0_MEAN, Q0_SD)
        eff = rng.uniform(EFF_LO, EFF_HI)
        transfer = math.exp(rng.uniform(math.log(TRANSFER_LO), math.log(TRANSFER_HI)))
        members.append((q0, eff, transfer))
    return members


def final_dict(y):
    return {c: float(y[INDEX[c]]) for c in COMPONENTS}


def settings():
    return {
        "scenario": "scenarios/hot_start.hadal",
        "rtol": RTOL,
        "atol": ATOL,
        "atol_scaled_by": "the total water at each stage start (reservoirs, ledger), the starting T_mantle",
        "max_step_yr": MAX_STEP,
        "units": UNITS,
        "python": platform.python_version(),
        "scipy": scipy.__version__,
        "numpy": np.__version__,
    }


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--final-only", action="store_true", help="print the final states only, no timing")
    ap.add_argument("--repeats", type=int, default=7, help="timed full solves per method (default 7)")
    ap.add_argument("--members", type=int, default=100, help="ensemble members per method (at least 100)")
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--methods", default=",".join(METHODS), help="comma-separated, of LSODA and Radau")
    ap.add_argument("--check-vectorized", action="store_true",
                    help="time Radau with a vectorized numpy right-hand side against the scalar one")
    ap.add_argument("--once", metavar="CSV",
                    help="one full solve with the first of --methods, its series written to CSV, no timing: "
                         "the whole-process rerun a modeler waits for (benches/compare.sh times it)")
    args = ap.parse_args()
    methods = [m.strip() for m in args.methods.split(",") if m.strip()]
    for m in methods:
        if m not in METHODS:
            ap.error(f"unknown method {m!r}")

    if args.once:
        _, rows, _ = solve(methods[0])
        with open(args.once, "w", newline="\n") as f:
            f.write("age_Ga," + ",".join(f"{c}_{UNITS[c]}" for c in COMPONENTS) + "\n")
            times = np.concatenate([report_times(ref.START_AGE - a0, ref.START_AGE - a1, i == 0)
                                    for i, (_, a0, a1, *_rest) in enumerate(ref.STAGES)])
            for t, col in zip(times, rows.T):
                f.write(",".join(repr(float(v)) for v in
                                 [(ref.START_AGE - t) / 1e9] + [col[INDEX[c]] for c in COMPONENTS]) + "\n")
        return

    out = settings()
    if args.final_only:
        out["regenerate"] = "python3 benches/peer/peer.py --final-only > benches/peer/final_inventories.json"
        out["final"] = {m: final_dict(solve(m, series=False)[0]) for m in methods}
        json.dump(out, sys.stdout, indent=2, sort_keys=True)
        sys.stdout.write("\n")
        return

    if args.check_vectorized:
        # the vectorized form must be the same function before it is timed
        y = initial_state()
        block = np.column_stack([y * (1 + 1e-3 * k) for k in range(6)])
        args_ = (3e5, 0.35, True, ref.Q0, ref.TRANSFER_TIME)
        want = np.column_stack([ref.rhs(1e8, block[:, k], *args_) for k in range(6)])
        got = rhs_vectorized(1e8, block, *args_)
        assert np.allclose(got, want, rtol=1e-13, atol=0.0), (got, want)
        scalar = timed(lambda: solve("Radau"), args.repeats)
        vector = timed(lambda: solve("Radau", rhs=rhs_vectorized, vectorized=True), args.repeats)
        json.dump({"Radau_scalar_rhs_s": statistics.median(scalar),
                   "Radau_vectorized_rhs_s": statistics.median(vector)}, sys.stdout, indent=2)
        sys.stdout.write("\n")
        return

    if args.members < 100:
        ap.error("--members must be at least 100")
    members = draw_members(args.members, args.seed)
    out["repeats"] = args.repeats
    out["members"] = args.members
    out["seed"] = args.seed
    out["full_solve_s"] = {}
    out["per_member_s"] = {}
    out["rhs_evaluations"] = {}
    out["final"] = {}
    for m in methods:
        y, rows, nfev = solve(m)
        out["final"][m] = final_dict(y)
        out["rhs_evaluations"][m] = nfev
        out["report_rows"] = int(rows.shape[1])
        samples = timed(lambda: solve(m), args.repeats)
        out["full_solve_s"][m] = {"median": statistics.median(samples), "samples": samples}
        per = []
        for q0, eff, transfer in members:
            t = time.perf_counter()
            solve(m, q0=q0, regassing_efficiency_ref=eff, transfer_time=transfer, series=False)
            per.append(time.perf_counter() - t)
        out["per_member_s"][m] = {"mean": sum(per) / len(per), "median": statistics.median(per),
                                  "total": sum(per)}
    json.dump(out, sys.stdout, indent=2, sort_keys=True)
    sys.stdout.write("\n")


if __name__ == "__main__":
    main()
