"""Capability curves: success rate and time-to-goal of seeded random tasks as the number of bodies grows."""

from __future__ import annotations

import numpy as np

from ..planning.live import closed_loop
from ..planning.plan import plan

__all__ = ["capability_curve"]


def capability_curve(actuator, bodies_factory, workspace, Ns, trials=20, rng=0, *, settings=None, truth=None,
                     separation=None, region=None):
    """Success rate and time-to-goal of seeded random tasks at increasing numbers of bodies.

    Parameters
    ----------
    actuator : Actuator
        Planning model.
    bodies_factory : callable
        ``bodies_factory(N) -> list of Body``.
    workspace : Workspace
    Ns : sequence of int
    trials : int
        Tasks per N (random starts and goals, fixed by ``rng``).
    rng : int or Generator
    settings : PlanSettings, optional
    truth : Actuator, optional
        If given, each task runs closed loop against it (:func:`fieldplan.planning.live.closed_loop`, with
        Brownian motion); otherwise open loop on the model (:func:`fieldplan.plan`).
    separation : float, optional
        Least centre distance between sampled starts (and between goals), m (default 4 radii).
    region : shapely geometry, optional
        Where starts and goals are drawn.

    Returns
    -------
    dict
        ``N -> {"success_rate", "time_to_goal" (median over successes, s; NaN if none), "trials",
        "messages"}``.
    """
    rng = np.random.default_rng(rng)
    out = {}
    for N in Ns:
        bodies = list(bodies_factory(int(N)))
        rmax = max(b.radius for b in bodies)
        sep = separation if separation is not None else 4 * rmax
        ok, ttg, msgs = 0, [], []
        for _ in range(trials):
            seed = int(rng.integers(2**31))
            starts = workspace.sample(N, rmax * 1.5, seed, region=region, separation=sep)
            goals = workspace.sample(N, rmax * 1.5, seed + 1, region=region, separation=sep)
            if truth is None:
                res = plan(actuator, bodies, workspace, starts, goals, settings=settings)
                t_goal = res.metrics.get("time_to_goal", np.nan)
            else:
                res = closed_loop(actuator, truth, bodies, workspace, starts, goals, settings=settings, rng=seed)
                t_goal = res.time_to_goal
            ok += bool(res.success)
            if res.success:
                ttg.append(t_goal)
            msgs.append(res.message)
        out[int(N)] = {"success_rate": ok / trials, "time_to_goal": float(np.median(ttg)) if ttg else float("nan"),
                       "trials": trials, "messages": msgs}
    return out
