"""Benchmark of fieldplan.analysis against naive baselines measured in the same run.

Run: .venv/bin/pytest -q -s tests/benchmarks/test_bench_steer.py -o addopts=""

Table 1: steerability() for n = 5, 10, 20 bodies and K = 16 / 64 fields (linear box: Gaussian
fields; timeshare: +- pairs of Gaussian fields) against the naive estimate "support function by
one LP per random direction, minimum over many directions". The naive minimum is only an upper
bound on the worst-direction speed, and it cannot see a rank-deficient (flat) set at all.
Table 2: single-body map evaluation, vectorised exact body_speeds() against steerability() per point.
Median of repeats; times are not asserted, correctness is.
"""

from __future__ import annotations


import numpy as np
from scipy.optimize import linprog

from fieldplan import Channel, FieldBasis, Primitive
from fieldplan.analysis import body_speeds, restrict, steerability
from _timing import timed


def _median_time(fn):
    return timed(fn, REPEATS)

REPEATS = 3
NAIVE_DIRECTIONS = 200


def _lin(F):
    K = F.shape[0]
    return FieldBasis("linear", F, np.zeros(F.shape[1:]), tuple(Channel(f"c{k}", "A", -1, 1) for k in range(K)))


def _ts(F):
    K = F.shape[0]
    return FieldBasis("timeshare", F, np.zeros(F.shape[1:]), (Channel("sel", "1", 0, K),),
                      tuple(Primitive(f"p{k}", (k,)) for k in range(K)))


def naive_speed(basis, directions, rng):
    """Minimum over random unit directions of the support function, each by its own LP."""
    A = basis.matrix()
    D, K = A.shape
    d = basis.drift.reshape(-1)
    best = np.inf
    for _ in range(directions):
        c = rng.normal(size=D)
        c /= np.linalg.norm(c)
        if basis.mode == "linear":
            res = linprog(-(A.T @ c), bounds=[(-1, 1)] * K, method="highs")
        else:
            res = linprog(-(A.T @ c), A_ub=np.ones((1, K)), b_ub=[1.0], bounds=[(0, None)] * K, method="highs")
        best = min(best, c @ d - res.fun)
    return best




def test_bench_steerability_vs_naive_directions():
    rng = np.random.default_rng(0)
    rows = []
    for n in (5, 10, 20):
        for K in (16, 64):
            F = rng.normal(size=(K, n, 2)) * 1e-6
            half = rng.normal(size=(K // 2, n, 2)) * 1e-6
            for mode, b in (("linear", _lin(F)), ("timeshare", _ts(np.concatenate([half, -half])))):
                t_ours, r = _median_time(lambda: steerability(b))
                t_naive, v = _median_time(lambda: naive_speed(b, NAIVE_DIRECTIONS, np.random.default_rng(1)))
                lo, hi = r.speed_bounds
                # Correctness: the rigorous lower bound never exceeds any sampled support value,
                # and a rank-deficient set is never reported steerable.
                assert lo <= v * (1 + 1e-7) + 1e-18
                if r.rank < 2 * n:
                    assert not r.steerable
                rows.append((n, K, mode, t_ours, r, t_naive, v))
    print()
    print(f"steerability() vs naive ({NAIVE_DIRECTIONS} random-direction LPs), median of {REPEATS}; speeds in um/s")
    head = (f"{'n':>3} {'K':>3} {'mode':<9} | {'ours ms':>8} {'steer':>5} {'kind':<6} {'lower':>8} {'upper':>8} | "
            f"{'naive ms':>9} {'naive min':>9} {'x faster':>8}")
    print(head)
    print("-" * len(head))
    for n, K, mode, t_ours, r, t_naive, v in rows:
        lo, hi = r.speed_bounds
        kind = "exact" if r.exact else "bounds"
        print(f"{n:>3} {K:>3} {mode:<9} | {t_ours * 1e3:>8.1f} {str(r.steerable):>5} {kind:<6} {lo * 1e6:>8.4f} "
              f"{hi * 1e6:>8.4f} | {t_naive * 1e3:>9.1f} {v * 1e6:>9.4f} {t_naive / t_ours:>8.1f}")


def test_bench_body_speeds_vectorised_vs_per_point():
    rng = np.random.default_rng(2)
    print()
    print("single-body speed per grid point: body_speeds (vectorised) vs steerability() per point, "
          f"median of {REPEATS}")
    head = f"{'mode':<9} {'K':>3} {'points':>6} | {'vectorised us/pt':>16} | {'per point us/pt':>15} {'x faster':>8}"
    print(head)
    print("-" * len(head))
    for mode in ("linear", "timeshare"):
        for K in (8, 32):
            G = 2000
            F = rng.normal(size=(K, G, 2)) * 1e-6
            b = _lin(F) if mode == "linear" else _ts(F)
            t_vec, (speeds, _) = _median_time(lambda: body_speeds(b))
            m = 60
            t_pp, each = _median_time(lambda: [steerability(restrict(b, [i])).speed for i in range(m)])
            assert np.allclose(speeds[:m], each, rtol=1e-9, atol=1e-18)
            print(f"{mode:<9} {K:>3} {G:>6} | {t_vec / G * 1e6:>16.1f} | {t_pp / m * 1e6:>15.1f} "
                  f"{(t_pp / m) / (t_vec / G):>8.0f}")
