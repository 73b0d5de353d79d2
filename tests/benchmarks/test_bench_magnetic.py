"""Benchmark: field basis of an 8-coil array for 20 bodies, exact loop sums vs interpolated tables.

Run: .venv/bin/pytest -q -s tests/benchmarks/test_bench_magnetic.py -o addopts=""
Prints median time per basis() call (and the one-off table build) and the largest error of the
interpolated basis relative to the exact one, side by side. Asserts correctness only.
"""

import time

import numpy as np

from fieldplan.actuators.magnetic import Coil, CoilArray
from fieldplan import Body, water
from _timing import median_time


def eight_coils(tilt=0.0):
    """8 coils on a 20 mm ring under the floor (PHYSICS-NOTES.md ranges): 6 mm radius, 300 turns."""
    return [Coil((0.02 * np.cos(a), 0.02 * np.sin(a), -0.007 - 0.006 * tilt), (-tilt * np.cos(a), -tilt * np.sin(a), 1.0),
                 radius=0.006, turns=300, length=0.010, layers=6, current_limit=3.0)
            for a in np.linspace(0, 2 * np.pi, 8, endpoint=False)]




def test_bench_basis_exact_vs_grid():
    med = water()
    beads = {
        "fixed (linear basis)": ("fixed", Body("magnet-200um", radius=100e-6, density=7500.0, moment=(2e-8, 0, 0))),
        "soft (timeshare)": ("linear", Body("bead-5um", radius=2.5e-6, density=1800.0, susceptibility=1.0)),
    }
    rng = np.random.default_rng(0)
    xy = rng.uniform(-0.018, 0.018, (20, 2))
    rows = []
    for geometry, tilt in (("vertical axes (radial tables)", 0.0), ("tilted axes (plane grid)", 0.3)):
        coils = eight_coils(tilt)
        for label, (model, body) in beads.items():
            bodies = [body] * 20
            exact = CoilArray(coils, 0.0, bead_models=model, method="exact")
            grid = CoilArray(coils, 0.0, bead_models=model, method="grid")
            t0 = time.perf_counter()
            grid.grid_error(body.height)          # builds the tables once
            build = time.perf_counter() - t0
            te = median_time(lambda: exact.basis(bodies, med, xy), repeats=11)
            tg = median_time(lambda: grid.basis(bodies, med, xy))
            be = exact.basis(bodies, med, xy)
            bg = grid.basis(bodies, med, xy)
            scale = np.abs(be.fields).max(axis=(1, 2), keepdims=True)
            rel_max = float((np.abs(bg.fields - be.fields) / scale).max())
            speed = np.linalg.norm(be.fields, axis=2)
            per_point = np.linalg.norm(bg.fields - be.fields, axis=2)[speed > 0] / speed[speed > 0]
            rows.append((geometry, label, be.size, te * 1e3, tg * 1e3, build, rel_max, float(np.median(per_point)),
                         grid.grid_error(body.height)))
            assert rel_max < 10 * grid.grid_rtol
    print()
    print("basis() of an 8-coil array for 20 bodies; median of repeats; error of grid vs exact")
    head = (f"{'geometry':31s} {'bead':21s} {'K':>4s} {'exact ms':>9s} {'grid ms':>8s} {'speed-up':>8s} "
            f"{'build s':>8s} {'max rel err':>11s} {'median pt err':>13s}")
    print(head)
    print("-" * len(head))
    for g, lab, k, te, tg, build, emax, emed, _ in rows:
        print(f"{g:31s} {lab:21s} {k:4d} {te:9.3f} {tg:8.3f} {te / tg:8.1f} {build:8.3f} {emax:11.2e} {emed:13.2e}")
    print("max rel err: |grid - exact| / largest |field| of that input pattern; median pt err: per body and"
          " pattern, relative to that body's own speed. Grid tolerance grid_rtol = 1e-4 (default).")
