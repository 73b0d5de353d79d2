"""Benchmark: what the design search buys on each built-in actuator, beside plain random search.

Run: ``make bench`` (or ``.venv/bin/pytest -q -s tests/benchmarks/test_bench_design.py -o addopts=""``).

For each example design scenario (scenarios/design-coils.yaml, design-plate.yaml,
design-electrodes.yaml) the objective is set to ``largest_n`` (the largest N steerable now in at
least half of the random configurations, :func:`fieldplan.analysis.count_curve`; the coil case keeps
its 10th-percentile worst-direction speed, since fixed moments make every configuration of up to
K/2 bodies steerable whatever the mounting) and three designs are printed side by side, all scored
on the same configurations (common random numbers, one seed):

- **start** - the file as written (with ``keep``, its first k items; the coil case keeps all six coils
  and searches only the mounting);
- **fieldplan design** - :func:`fieldplan.workflows.design.search` (differential evolution over the free
  keys, then the kept subset seeded by ``select_primitives`` and improved by swaps);
- **random search** - the peer a user would write instead: the same number of evaluations of
  uniformly random free values and random k-subsets, best kept.

Each row gives the steerable N with the fraction at that N and its 95 % Wilson interval, and the
closed-loop success at the best design's N (:func:`fieldplan.analysis.capability.capability_curve`, the design as
both planning model and truth) over a few seeded tasks: 1 per design by default (the plate's closed loop takes minutes), 8 with
``FIELDPLAN_FULL=1`` (which also doubles the evaluation budget and the configurations). Times are
printed, never asserted; the check is that the search never ends below its start.
"""

import os
import time

import numpy as np
import pytest

from fieldplan.workflows.design import _Builder, _Cycle, _Evaluator, _Runner, closed_loop_check, load_design, search
from fieldplan.analysis import basis_function, count_curve, wilson_interval as _wilson

FULL = os.environ.get("FIELDPLAN_FULL") == "1"
ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
# file, N values, evaluation budget, largest N of the closed-loop check by default (a plate task with
# three grains, an electrode task with two bodies, run for minutes on two cores; FIELDPLAN_FULL=1
# checks at the best design's own N).
CASES = {
    "coils": ("design-coils.yaml", (1, 2, 3), 24, 3),
    "plate": ("design-plate.yaml", (1, 2, 3, 4), 16, 2),
    "electrodes": ("design-electrodes.yaml", (1, 2, 3), 20, 1),
}
TRIALS = 32 if FULL else 16
CHECK_TRIALS = 8 if FULL else 1


def random_peer(sc, spec, seed):
    """Uniform random free values and random k-subsets, as many as the search's budget, same scoring."""
    rng = np.random.default_rng(seed + 7)
    ev = _Evaluator(_Builder(sc, spec), spec, sc)
    runner = _Runner(ev, spec, None, False)
    x0 = tuple(p.start for p in spec.free)
    k0 = tuple(range(spec.keep.count)) if spec.keep is not None else None
    runner.run([x0], [k0], "start")
    xs, ks = [], []
    for _ in range(spec.evaluations - 1):
        xs.append(tuple(int(rng.integers(int(p.lower), int(p.upper) + 1)) if p.kind == "integer" else rng.uniform(p.lower, p.upper)
                        for p in spec.free))
        ks.append(tuple(sorted(rng.choice(len(spec.keep.items), spec.keep.count, replace=False)))
                  if spec.keep is not None else None)
    runner.run(xs, ks, "random")
    return runner.best(), runner


def steerable_n(sc, counts, seed):
    """Largest N steerable in >= half of the configurations (the same ones for every design), its fraction and interval."""
    fn = basis_function(sc.actuator, _Cycle(sc.bodies), sc.workspace.medium)
    c = count_curve(fn, sc.workspace, counts, trials=TRIALS, rng=seed, progress=False)
    n = c.max_steerable(0.5)
    i = int(np.flatnonzero(c.counts == n)[0]) if n in c.counts else 0
    return n, float(c.fraction[i]), float(c.low[i]), float(c.high[i])


def closed_loop_row(res, N, seed):
    check = closed_loop_check(res, counts=(N,), trials=CHECK_TRIALS, seed=seed)
    return {k: v[N] for k, v in check.items()}


@pytest.mark.parametrize("case", list(CASES))
def test_bench_design(case):
    fname, counts, budget, loop_cap = CASES[case]
    sc, spec = load_design(os.path.join(ROOT, "scenarios", fname))
    spec.trials = TRIALS
    if case == "coils":
        # Fixed moments are affine in the currents: every configuration of up to K/2 bodies is
        # steerable whatever the mounting, so N cannot separate designs. Keep all six coils, search
        # the mounting for the file's own objective (10th-percentile worst-direction speed).
        spec.keep = None
        spec.constraints.pop("max_total_power", None)       # the 30 W budget was set for four coils
    else:
        spec.objective, spec.counts, spec.at_least = "largest_n", counts, 0.5
    spec.evaluations = budget * (2 if FULL else 1)
    t0 = time.perf_counter()
    res = search(sc, spec, progress=False)
    t_search = time.perf_counter() - t0
    t0 = time.perf_counter()
    peer, peer_runner = random_peer(sc, spec, spec.seed)
    t_peer = time.perf_counter() - t0
    assert res.best.score >= res.start.score
    # The peer's best as a scenario, for its closed-loop row.
    peer_res = type(res)(spec, res.start, peer, peer_runner.candidates, res.start_scenario,
                         peer_runner.ev.builder.scenario(peer_runner.ev.builder.config(peer.x, peer.kept)))
    steer_n = {label: steerable_n(s, counts, spec.seed) for label, s in
               (("start", res.start_scenario), ("best", res.best_scenario), ("peer", peer_res.best_scenario))}
    N = max(steer_n["best"][0], 1) if FULL else min(max(steer_n["best"][0], 1), loop_cap)
    t0 = time.perf_counter()
    ours = closed_loop_row(res, N, spec.seed)
    theirs = closed_loop_row(peer_res, N, spec.seed)["best"]
    t_loop = time.perf_counter() - t0
    print(f"\n{sc.name}: largest N steerable in >= 50 % of {spec.trials} configurations per N (same for all), "
          f"{spec.evaluations} evaluations each; closed loop at N = {N}, {CHECK_TRIALS} seeded tasks per design")
    obj = "p10 speed [um/s]" if spec.objective == "worst_speed" else "score"
    print(f"{'design':<18} {'steerable now':<40} {obj:>16} {'closed loop':>12} {'95% interval':>14} "
          f"{'search wall [s]':>16}")
    rows = (("start", res.start, ours["start"], "", steer_n["start"]),
            ("fieldplan design", res.best, ours["best"], f"{t_search:.1f}", steer_n["best"]),
            ("random search", peer, theirs, f"{t_peer:.1f}", steer_n["peer"]))
    for label, cand, loop, wall, (n_now, f, flo, fhi) in rows:
        k, n = loop["successes"], loop["trials"]
        lo, hi = _wilson(np.array(k), np.array(n))
        now = f"N = {n_now} (fraction {f:.2f}, 95% [{flo:.2f}, {fhi:.2f}])"
        score = cand.score * 1e6 if spec.objective == "worst_speed" else cand.score
        print(f"{label:<18} {now:<40} {score:>16.4g} {f'{k}/{n}':>12} {f'[{float(lo):.2f}, {float(hi):.2f}]':>14} "
              f"{wall:>16}")
    print(f"  (closed-loop runs took {t_loop:.1f} s wall; best design: {res.describe(res.best)[:300]})")
