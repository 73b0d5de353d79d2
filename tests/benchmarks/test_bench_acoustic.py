"""Benchmarks of the vibrating-plate actuator (printed, not asserted; correctness is asserted).

Run: .venv/bin/pytest -q -s tests/benchmarks/test_bench_acoustic.py -o addopts=""

Targets from the issue: 100 modes < 10 s, grid-set reload < 0.5 s, basis for 20 bodies x 64
tones <= 1 ms. Every figure is the median of repeats in this run, beside a baseline measured in
the same run.
"""

import time

import numpy as np

import fieldplan
from fieldplan.actuators.acoustic import Plate
from fieldplan.actuators.plate_modes import plate_modes
from fieldplan.contract.actuator import Actuator
from _timing import median_time

AL = dict(youngs_modulus=69e9, poisson_ratio=0.33, density=2700.0)
GRAIN = fieldplan.Body("sand", radius=2.5e-4, density=2600.0)
BALL = fieldplan.Body("steel-ball", radius=1e-3, density=7800.0, drift_mobility=10.0)




def header():
    print(f"  {'measured':<46} {'time':>11}   {'baseline (same run)':<40} {'time':>11}   {'base/ours':>9}")


def row(label, ours, base_label, base):
    ratio = base / ours if ours > 0 else float("inf")
    print(f"  {label:<46} {ours * 1e3:>8.2f} ms   {base_label:<40} {base * 1e3:>8.2f} ms   {ratio:>9.1f}")


def test_bench_modes():
    print("\nplate modes, 200 x 200 x 1 mm aluminium, 100 modes (Rayleigh-Ritz, converged to tol)")
    args = (0.2, 0.2, 1e-3, AL["youngs_modulus"], AL["poisson_ratio"], AL["density"])
    free = plate_modes(*args, "free", (), 100)
    t_free = median_time(lambda: plate_modes(*args, "free", (), 100), 3)
    t_exact = median_time(lambda: plate_modes(*args, "SSSS", (), 100), 3)
    header()
    row("free edges, to tol (degree %d)" % free.degree, t_free, "exact sine modes, all edges SS", t_exact)
    pin = plate_modes(*args, "free", [(0.0, 0.0)], 100)
    t_pin = median_time(lambda: plate_modes(*args, "free", [(0.0, 0.0)], 100), 3)
    t_one = median_time(lambda: plate_modes(*args, "free", [(0.0, 0.0)], 100, degree=pin.degree), 3)
    row("pinned at the centre, to tol (degree %d)" % pin.degree, t_pin, "one solve at that degree, known ahead", t_one)
    print(f"  estimated relative error: free {free.achieved:.1e}, pinned {pin.achieved:.1e}")
    assert free.converged and pin.converged
    np.testing.assert_allclose(free.lambda2[3], 13.2, rtol=2e-2)  # sanity (nu = 0.33 here)


def test_bench_grid_set_and_basis(tmp_path):
    print("\ncentre-pinned square plate on a shaker, band 100 Hz - 5 kHz, 64 tones")
    kw = dict(**AL, edges="free", supports=[(0.0, 0.0)], excitation="base", band=(100.0, 5000.0),
              n_tones=64)
    t0 = time.perf_counter()
    plate = Plate(0.2, 0.2, 1e-3, **kw, cache_dir=tmp_path).prepare()
    t_build = time.perf_counter() - t0
    grid = plate._state["grid"]
    print(f"  {plate.modes.n_modes} modes to {plate.modes.frequencies[-1]:.0f} Hz, grid {grid.nx} x {grid.ny} "
          f"nodes x {grid.n_freq} tones ({grid.data.nbytes / 1e6:.1f} MB)")

    def reload():
        Plate(0.2, 0.2, 1e-3, **kw, cache_dir=tmp_path).prepare()

    t_reload = median_time(reload, 5)
    xy = np.random.default_rng(0).uniform(-0.095, 0.095, (20, 2))
    direct = Plate(0.2, 0.2, 1e-3, **kw, cache_dir=tmp_path, use_grid=False).prepare()
    bodies = [GRAIN] * 10 + [BALL] * 10
    air = fieldplan.air()
    t_direct_eval = median_time(lambda: direct.basis(bodies, air, xy), 5)
    header()
    row("reload modes + grid set from the disk cache", t_reload, "cold build (modes + 64-tone grid set)", t_build)

    for _ in range(20):
        plate.basis(bodies, air, xy)
    t_basis = median_time(lambda: plate.basis(bodies, air, xy), 200)
    t_generic = median_time(lambda: Actuator.basis(plate, bodies, air, xy), 5)
    row("basis, 20 bodies x 64 tones (grid)", t_basis, "direct modal sum at the 20 points", t_direct_eval)
    row("basis, 20 bodies x 64 tones (grid)", t_basis, "generic Actuator.basis (per primitive)", t_generic)

    fg = plate.basis(bodies, air, xy).fields
    fd = direct.basis(bodies, air, xy).fields
    err = np.max(np.abs(fg - fd)) / np.max(np.abs(fd))
    print(f"  grid vs direct modal sum: max deviation {err:.1e} of the largest field")
    assert err < 1e-2
    speed = np.hypot(fg[..., 0], fg[..., 1])
    print(f"  drift speeds (default mobility): median {np.median(speed[speed > 0]) * 1e3:.2f} mm/s, "
          f"max {speed.max() * 1e3:.1f} mm/s")
