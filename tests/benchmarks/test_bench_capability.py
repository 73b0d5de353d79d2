"""Benchmark: capability curve of every built-in actuator - success rate and time to goal against N.

Run: .venv/bin/pytest -q -s tests/benchmarks/test_bench_capability.py -o addopts=""

For each built-in actuator (coil array with fixed-moment spheres, vibrating plate with sand grains in
air, electrode array with a polystyrene bead / cell mix) and increasing numbers of bodies N, seeded random tasks
(starts and goals drawn in the free space, 4 radii apart) are run closed loop
(:func:`fieldplan.live.closed_loop`: Brownian motion, tracking noise, declared hardware limits).
One table per actuator: success rate (every body truly within tolerance and no body-body contact on
the way), median time to goal over the successes (simulated s), median
wall time per trial, the commonest failure kinds, and the baselines measured in the same run:

- the one-step counting-rule bound on N: K/2 for an affine actuator with K inputs (linear mode),
  (M - 1)/2 for M time-shared primitives (convex weights: M - 1 free directions);
- the steerable fraction of random configurations from :func:`fieldplan.steer.count_curve`.

Default (reduced) size: 4 trials per N, N in {1, 2, 3}; ``FIELDPLAN_FULL=1``: 20 trials, N in
{1, 2, 3, 4, 6}. Times are printed, never asserted; the correctness checks are that a reported
success has every true position inside tolerance, no contact and a finite time to goal.
"""

import collections
import os
import time

import numpy as np
import shapely

from actuators.acoustic import Plate
from actuators.dielectric import ElectrodeArray
from actuators.electrostatics import pad_array
from actuators.magnetic import Coil, CoilArray
from fieldplan import Body, ChannelLimit, HardwareLimits, Shell, Workspace, air, circle, water
from fieldplan.live import closed_loop
from fieldplan.plan import PlanSettings
from fieldplan.steer import basis_function, count_curve, counting_limit

FULL = os.environ.get("FIELDPLAN_FULL") == "1"
TRIALS = 20 if FULL else 4
NS = (1, 2, 3, 4, 6) if FULL else (1, 2, 3)
COUNT_TRIALS = 40 if FULL else 20


def coil_case():
    """scenarios/coils.yaml without the divider: six coils on an 8 mm ring, spheres of alternating moment."""
    coils = [Coil((8e-3 * np.cos(a), 8e-3 * np.sin(a), -5e-3), (0, 0, 1), radius=6e-3, turns=200, length=4e-3,
                  current_limit=2.0) for a in np.linspace(0, 2 * np.pi, 6, endpoint=False)]
    arr = CoilArray(coils, 0.0, bead_models="fixed")
    ws = Workspace(circle((0.0, 0.0), 5e-3), medium=water(294.15))
    kinds = [Body("sphere-up", radius=100e-6, density=1400.0, moment=(0, 0, 2e-9)),
             Body("sphere-down", radius=100e-6, density=1400.0, moment=(0, 0, -2e-9))]
    limits = HardwareLimits({c.name: ChannelLimit(c.lower, c.upper, slew_rate=200.0, rms=1.5) for c in arr.channels},
                            time_step=1e-3)
    return dict(name="coil array (6 coils, fixed moments)", actuator=arr, workspace=ws,
                bodies=lambda n: [kinds[i % 2] for i in range(n)], limits=limits,
                settings=PlanSettings(tolerance=100e-6, clearance=50e-6), tracking=5e-6, region=None)


def plate_case():
    """scenarios/plate.yaml: 200 mm free aluminium plate, off-centre post, 24 tones; tasks drawn in the
    central 120 mm square and capped at 300 s (the reduced run would otherwise take many minutes)."""
    plate = Plate(0.2, 0.2, 1e-3, material="aluminium", edges="free", supports=[(23e-3, -17e-3)],
                  excitation="base", band=(150.0, 1500.0), n_tones=24, peak_displacement=30e-6)
    ws = Workspace((-0.09, -0.09, 0.09, 0.09), medium=air(295.15))
    grain = Body("sand-1mm", radius=0.5e-3, density=2600.0)
    return dict(name="plate (24 tones, sand in air)", actuator=plate, workspace=ws, bodies=lambda n: [grain] * n,
                limits=HardwareLimits(time_step=0.02, min_dwell=0.04),
                settings=PlanSettings(tolerance=3e-3, clearance=1e-3, time_limit=300.0), tracking=20e-6,
                region=shapely.box(-0.06, -0.06, 0.06, 0.06))


def electrode_case():
    """scenarios/electrodes.yaml chip (3 x 3 pads, 3 frequencies); bodies alternate polystyrene bead
    (negative DEP) and cell (positive DEP), the bead first. Random goals often ask a bead to climb the
    field (off a pad centre), which the DEP physics does not allow: expect low rates."""
    arr = ElectrodeArray(pad_array(3, 3, 80e-6, 20e-6), [1e5, 1e6, 1e7], voltage_limit=1.5, grid_points=128,
                         margin=20e-6)
    ws = Workspace((-140e-6, -140e-6, 140e-6, 140e-6), medium=water(295.15, conductivity=10e-3))
    bead = Body("bead-10um", radius=5e-6, density=1050.0, permittivity=2.55, conductivity=0.0,
                surface_conductance=1e-9)
    cell = Body("cell-10um", radius=5e-6, density=1070.0,
                shell=Shell(thickness=8e-9, membrane_permittivity=6.0, membrane_conductivity=1e-7,
                            interior_permittivity=60.0, interior_conductivity=0.5))
    return dict(name="electrode array (3x3 pads, bead/cell alternating)", actuator=arr, workspace=ws,
                bodies=lambda n: [(bead, cell)[i % 2] for i in range(n)],
                limits=HardwareLimits(time_step=10e-3), settings=PlanSettings(tolerance=8e-6, clearance=3e-6),
                tracking=0.5e-6, region=None)


def counting_bound(case):
    """One-step counting-rule bound on N from the field basis at one point."""
    ws = case["workspace"]
    body = case["bodies"](1)
    xy = ws.sample(1, body[0].radius, 0)
    b = case["actuator"].basis(body, ws.medium, xy)
    return b.mode, b.size, counting_limit(b)   # the one definition (fieldplan.steer)


def _reason(message):
    """The head of a failure message, without numbers (for counting failures by kind)."""
    head = message.split(";")[0]
    for key in ("duration", "gave up", "no route", "cannot plan", "step limit", "the estimates arrived"):
        if head.startswith(key):
            return key
    return head[:30]


def run_case(case, seed=0):
    """Closed-loop trials per N; returns rows (N, success rate, median time to goal, median wall time,
    steerable fraction)."""
    ws, act = case["workspace"], case["actuator"]
    fracs = count_curve(basis_function(act, case["bodies"], ws.medium), ws, NS, trials=COUNT_TRIALS, rng=seed,
                        progress=False).fraction
    rng = np.random.default_rng(seed)
    rows = []
    for N, frac in zip(NS, fracs):
        bodies = case["bodies"](N)
        rmax = max(b.radius for b in bodies)
        ok, ttg, wall, why = 0, [], [], collections.Counter()
        for _ in range(TRIALS):
            s = int(rng.integers(2**31))
            starts = ws.sample(N, 1.5 * rmax, s, region=case["region"], separation=4 * rmax)
            goals = ws.sample(N, 1.5 * rmax, s + 1, region=case["region"], separation=4 * rmax)
            tic = time.perf_counter()
            res = closed_loop(act, act, bodies, ws, starts, goals, limits=case["limits"], settings=case["settings"],
                              rng=s, brownian=True, tracking_noise=case["tracking"])
            wall.append(time.perf_counter() - tic)
            if res.success:
                # Correctness of what is counted as a success (times are never asserted).
                assert res.metrics["all_reached"] and np.isfinite(res.time_to_goal), res.message
            if res.success and res.metrics["contacts"] == 0:
                ok += 1
                ttg.append(res.time_to_goal)
            elif res.success:
                # Arrived, but two bodies touched on the way: not a success by this benchmark's rule.
                why["arrived with contact"] += 1
            else:
                why[_reason(res.message)] += 1
        top = ", ".join(f"{k} x{v}" for k, v in why.most_common(2))
        rows.append((N, ok / TRIALS, float(np.median(ttg)) if ttg else float("nan"), float(np.median(wall)),
                     float(frac), top))
    return rows


def print_table(name, mode, size, bound, rows):
    what = "K" if mode == "linear" else "M"
    rule = "K/2" if mode == "linear" else "(M-1)/2"
    print(f"\n{name}: {mode} mode, {what} = {size}, counting-rule bound {rule} = {bound:g} bodies; "
          f"{TRIALS} closed-loop trials per N, steerable fraction over {COUNT_TRIALS} configurations; "
          "success = all truly within tolerance and no contact")
    print(f"{'N':>3} {'success':>8} {'t_goal med [s]':>15} {'wall/trial [s]':>15} {'N<=bound':>9} {'steerable':>10}"
          "  failures")
    for N, rate, ttg, wall, frac, why in rows:
        print(f"{N:>3} {rate:>8.2f} {ttg:>15.4g} {wall:>15.3g} {('yes' if N <= bound else 'no'):>9} {frac:>10.2f}"
              f"  {why or '-'}")


def _bench(case_fn):
    case = case_fn()
    mode, size, bound = counting_bound(case)
    rows = run_case(case)
    print_table(case["name"], mode, size, bound, rows)
    for _, rate, _, _, frac, _ in rows:
        assert 0.0 <= rate <= 1.0 and 0.0 <= frac <= 1.0
    return rows


def test_bench_capability_coil_array():
    rows = _bench(coil_case)
    assert rows, 'no rows measured'


def test_bench_capability_plate():
    rows = _bench(plate_case)
    assert rows, 'no rows measured'


def test_bench_capability_electrode_array():
    rows = _bench(electrode_case)
    assert rows, 'no rows measured'
