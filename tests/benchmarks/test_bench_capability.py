"""Benchmark: how many bodies each built-in actuator brings home - fieldplan against its two peers.

Run: ``make bench`` (or ``.venv/bin/pytest -q -s tests/benchmarks/test_bench_capability.py -o addopts=""``).

For each built-in actuator case and number of bodies N, seeded random tasks (starts and goals drawn
in the free space, 4 radii apart; for the electrode array, goals where each body alone can be
held, by :func:`fieldplan.steer.steerable`) run closed loop on the same simulator (Brownian motion,
tracking noise, contacts), with the same period and time limit, by:

- **fieldplan** - :func:`fieldplan.live.closed_loop` with the horizon planner, under the declared
  hardware limits (and, with ``FIELDPLAN_FULL=1``, again with no limits);
- **greedy** - the one-step primitive choice (:func:`peers.greedy_step`);
- **least squares** - per-period bounded least squares (:func:`peers.least_squares_step`).

Success = every body truly within tolerance at the end and no body-body contact on the way. Each
row prints ``successes/trials``, the 95 % Wilson interval of fieldplan's rate, the median time to
goal (simulated s) and median wall time per trial, beside the one-step counting bound and the
steerable fraction of random configurations (:func:`fieldplan.steer.count_curve`). The peers know no
RMS or slew limits; when a schedule they played breaks the declared limits the row says how often.

Default (reduced) size: 3 trials per N at a few N per case; ``FIELDPLAN_FULL=1``: 20 trials and
more N. Times are printed, never asserted; the checks are that a reported success really has every
true position inside tolerance and no contact.
"""

import collections
import os
import time

import numpy as np
import pytest
import shapely

from fieldplan.actuators.acoustic import Plate
from fieldplan.actuators.dielectric import ElectrodeArray
from fieldplan.actuators.electrostatics import pad_array
from fieldplan.actuators.magnetic import Coil, CoilArray
from fieldplan import Body, ChannelLimit, HardwareLimits, Shell, Workspace, air, circle, water
from fieldplan.planning.live import closed_loop
from fieldplan.planning import Controller, PlanSettings
from fieldplan.analysis import basis_function, count_curve, counting_limit, steerable, wilson_interval

from peers import PEERS, run_peer

FULL = os.environ.get("FIELDPLAN_FULL") == "1"
TRIALS = 20 if FULL else 3
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
                settings=PlanSettings(tolerance=100e-6, clearance=50e-6), tracking=5e-6, region=None,
                Ns=(1, 2, 3, 4, 6) if FULL else (2, 3, 4))


def soft_case():
    """Eight coils on a 6 mm ring under a 3 mm dish, soft (linear) magnetic beads of two sizes."""
    coils = [Coil((6e-3 * np.cos(a), 6e-3 * np.sin(a), -3e-3), (0, 0, 1), radius=3e-3, turns=300, length=4e-3,
                  current_limit=2.0) for a in np.linspace(0, 2 * np.pi, 8, endpoint=False)]
    arr = CoilArray(coils, 0.0, bead_models="linear")
    ws = Workspace(circle((0.0, 0.0), 3e-3), medium=water(294.15))
    kinds = [Body("bead-9um", radius=4.5e-6, density=1800.0, susceptibility=1.0),
             Body("bead-3um", radius=1.5e-6, density=1800.0, susceptibility=2.0)]
    limits = HardwareLimits({c.name: ChannelLimit(c.lower, c.upper, rms=1.5, rms_window=10.0) for c in arr.channels},
                            time_step=1e-3)
    return dict(name="coil array (8 coils, soft beads of two sizes)", actuator=arr, workspace=ws,
                bodies=lambda n: [kinds[i % 2] for i in range(n)], limits=limits,
                settings=PlanSettings(tolerance=40e-6, clearance=15e-6, time_limit=400.0), tracking=1e-6,
                region=shapely.Point(0, 0).buffer(2.2e-3), Ns=(1, 2, 3, 4) if FULL else (2, 3))


def _plate(n_tones, band):
    return Plate(0.2, 0.2, 1e-3, material="aluminium", edges="free", supports=[(23e-3, -17e-3)],
                 excitation="base", band=band, n_tones=n_tones, peak_displacement=30e-6)


def plate_case():
    """scenarios/plate.yaml: 200 mm free aluminium plate, off-centre post, 24 tones; tasks in the central
    120 mm square, capped at 300 s."""
    ws = Workspace((-0.09, -0.09, 0.09, 0.09), medium=air(295.15))
    grain = Body("sand-1mm", radius=0.5e-3, density=2600.0)
    return dict(name="plate (24 tones, sand in air)", actuator=_plate(24, (150.0, 1500.0)), workspace=ws,
                bodies=lambda n: [grain] * n, limits=HardwareLimits(time_step=0.02, min_dwell=0.04),
                settings=PlanSettings(tolerance=3e-3, clearance=1e-3, time_limit=300.0), tracking=20e-6,
                region=shapely.box(-0.06, -0.06, 0.06, 0.06), Ns=(1, 2, 3, 4) if FULL else (2, 3))


def plate64_case():
    """The same plate with 64 tones from 150 Hz to 3 kHz: a one-step limit near N = 6."""
    case = plate_case()
    case.update(name="plate (64 tones 150-3000 Hz, sand in air)", actuator=_plate(64, (150.0, 3000.0)),
                Ns=(4, 6, 8, 12) if FULL else (6, 8))
    return case


def electrode_case():
    """scenarios/electrodes.yaml chip (3 x 3 pads, 3 frequencies); bodies alternate polystyrene bead
    (negative DEP) and cell (positive DEP), the bead first; goals where each body alone can be held."""
    arr = ElectrodeArray(pad_array(3, 3, 80e-6, 20e-6), [1e5, 1e6, 1e7], voltage_limit=1.5, grid_points=128,
                         margin=20e-6)
    ws = Workspace((-140e-6, -140e-6, 140e-6, 140e-6), medium=water(295.15, conductivity=10e-3))
    bead = Body("bead-10um", radius=5e-6, density=1050.0, permittivity=2.55, conductivity=0.0,
                surface_conductance=1e-9)
    cell = Body("cell-10um", radius=5e-6, density=1070.0,
                shell=Shell(thickness=8e-9, membrane_permittivity=6.0, membrane_conductivity=1e-7,
                            interior_permittivity=60.0, interior_conductivity=0.5))
    return dict(name="electrode array (3x3 pads, bead/cell alternating)", actuator=arr, workspace=ws,
                bodies=lambda n: [(bead, cell)[i % 2] for i in range(n)], limits=HardwareLimits(time_step=10e-3),
                settings=PlanSettings(tolerance=8e-6, clearance=3e-6), tracking=0.5e-6, region=None,
                Ns=(2, 4) if FULL else (2,), holdable_goals=True)


def counting_bound(case):
    """One-step counting-rule bound on N from the field basis at one point."""
    ws = case["workspace"]
    body = case["bodies"](1)
    xy = ws.sample(1, body[0].radius, 0)
    b = case["actuator"].basis(body, ws.medium, xy)
    return b.mode, b.size, counting_limit(b)   # the one definition (fieldplan.steer)


def draw_task(case, N, seed):
    """Seeded starts and goals (goals where each body alone is steerable, if the case asks)."""
    ws, act = case["workspace"], case["actuator"]
    bodies = case["bodies"](N)
    rmax = max(b.radius for b in bodies)
    starts = ws.sample(N, 1.5 * rmax, seed, region=case["region"], separation=4 * rmax)
    for k in range(200):
        goals = ws.sample(N, 1.5 * rmax, seed + 1 + 7919 * k, region=case["region"], separation=4 * rmax)
        if not case.get("holdable_goals"):
            break
        if all(steerable(act.basis([b], ws.medium, goals[i:i + 1])) for i, b in enumerate(bodies)):
            break
    return bodies, starts, goals


def _reason(message):
    head = message.split(";")[0]
    for key in ("duration", "no route", "cannot plan", "step limit", "the estimates arrived", "touched"):
        if key in head:
            return key
    return head[:30]


def _trace(case, N, label, run):
    """One line per trial as it ends (long runs show their progress)."""
    ok, ttg, wall, why, broke = run
    print(f"  [{case['name'][:24]}] N={N} {label}: {'ok' if ok else 'fail'} t_goal={ttg:.4g} s wall={wall:.3g} s"
          f"{'' if ok else ' (' + str(why) + ')'}", flush=True)


def run_case(case, seed=0):
    """Rows per N: {N, frac, runs: {controller: [(success, time_to_goal, wall, why, broke_limits)]}}."""
    ws, act = case["workspace"], case["actuator"]
    fracs = count_curve(basis_function(act, case["bodies"], ws.medium), ws, case["Ns"], trials=COUNT_TRIALS, rng=seed,
                        progress=False).fraction
    rng = np.random.default_rng(seed)
    rows = []
    for N, frac in zip(case["Ns"], fracs):
        runs = collections.defaultdict(list)
        for _ in range(TRIALS):
            s = int(rng.integers(2**31))
            bodies, starts, goals = draw_task(case, N, s)
            # Period and time limit as fieldplan's controller picks them; the peers get the same.
            ctrl = Controller(act, bodies, ws, goals, limits=case["limits"], settings=case["settings"])
            ctrl.prepare(starts)
            period, duration = ctrl.period, ctrl.time_limit
            variants = [("fieldplan", case["limits"])] + ([("fieldplan, no limits", None)] if FULL else [])
            for label, limits in variants:
                tic = time.perf_counter()
                res = closed_loop(act, act, bodies, ws, starts, goals, limits=limits, settings=case["settings"],
                                  rng=s, brownian=True, tracking_noise=case["tracking"], duration=duration)
                wall = time.perf_counter() - tic
                ok = res.success and res.metrics["contacts"] == 0
                if res.success:
                    # What is counted as a success must be one (times are never asserted).
                    assert res.metrics["all_reached"] and np.isfinite(res.time_to_goal), res.message
                runs[label].append((ok, res.time_to_goal if ok else np.nan, wall, None if ok else _reason(res.message),
                                    False))
                _trace(case, N, label, runs[label][-1])
            for label, fn in PEERS.items():
                tic = time.perf_counter()
                out = run_peer(fn, act, bodies, ws, starts, goals, period=period, duration=duration,
                               tolerance=case["settings"].tolerance, rng=s, tracking_noise=case["tracking"],
                               limits=case["limits"])
                runs[label].append((out["success"], out["time_to_goal"], time.perf_counter() - tic,
                                    None if out["success"] else out["message"], bool(out["violations"])))
                _trace(case, N, label, runs[label][-1])
        rows.append({"N": N, "frac": float(frac), "runs": runs})
    return rows


def print_table(case, mode, size, bound, rows):
    what = "K" if mode == "linear" else "M"
    rule = "K/2" if mode == "linear" else "(M-1)/2"
    print(f"\n{case['name']}: {mode} mode, {what} = {size}, one-step counting bound {rule} = {bound:g} bodies; "
          f"{TRIALS} closed-loop trials per N and controller on the same tasks, seeds and simulator; steerable "
          f"fraction over {COUNT_TRIALS} random configurations; success = all truly within tolerance, no contact")
    print(f"{'N':>3} {'steerable':>9}  {'controller':<21} {'success':>8} {'95% interval':>13} {'t_goal med [s]':>15} "
          f"{'wall/trial [s]':>15}  failures / notes")
    for row in rows:
        for label, runs in row["runs"].items():
            k = sum(r[0] for r in runs)
            n = len(runs)
            lo, hi = wilson_interval(k, n)
            ttg = [r[1] for r in runs if r[0]]
            why = collections.Counter(r[3] for r in runs if r[3])
            broke = sum(r[4] for r in runs)
            notes = ", ".join(f"{w} x{c}" for w, c in why.most_common(2))
            if broke:
                notes += (", " if notes else "") + f"broke declared limits x{broke}"
            print(f"{row['N']:>3} {row['frac']:>9.2f}  {label:<21} {f'{k}/{n}':>8} {f'[{lo:.2f}, {hi:.2f}]':>13} "
                  f"{(np.median(ttg) if ttg else float('nan')):>15.4g} {np.median([r[2] for r in runs]):>15.3g}  "
                  f"{notes or '-'}")


def _bench(case_fn):
    case = case_fn()
    mode, size, bound = counting_bound(case)
    rows = run_case(case)
    print_table(case, mode, size, bound, rows)
    for row in rows:
        assert 0.0 <= row["frac"] <= 1.0
        for runs in row["runs"].values():
            assert len(runs) == TRIALS
    return rows


@pytest.mark.parametrize("case_fn", [coil_case, soft_case, plate_case, plate64_case, electrode_case],
                         ids=["coils", "soft-beads", "plate24", "plate64", "electrodes"])
def test_bench_capability(case_fn):
    rows = _bench(case_fn)
    assert rows, "no rows measured"


def test_wilson_interval_is_the_textbook_one():
    # Wilson (1927) score interval; 3 of 4 at 95 %: [0.301, 0.954] (recomputed from the closed form).
    lo, hi = wilson_interval(3, 4)
    assert abs(lo - 0.3006) < 1e-3 and abs(hi - 0.9544) < 1e-3
