"""The simple controllers a user would write instead of fieldplan's planner: the benchmark's peers.

Both run closed loop on the same :class:`fieldplan.simulate.Simulator` (truth actuator, Brownian
motion, tracking noise, contacts) as :func:`fieldplan.live.closed_loop`, with the same period, time
limit and success rule (every body truly within tolerance at the end, no body-body contact), and
stop the same way (every observed body within half its tolerance). Neither plans routes or knows
about hardware limits beyond the channel bounds; the schedule they played is checked against the
declared limits afterwards and the benchmark reports when it breaks them.

* :func:`greedy_step` - every period, play for the whole period the one primitive (for an affine
  actuator: one channel at one of its bounds) whose predicted displacement minimises the summed
  squared distance to the goals, or stay idle if none improves it. The classic one-step controller
  for tone-driven plates.
* :func:`least_squares_step` - every period, the inputs whose predicted one-period displacement
  best matches a capped step toward each goal, by bounded linear least squares
  (``scipy.optimize.lsq_linear``): channel values in their box (affine actuators) or seconds per
  primitive in [0, T], scaled to fit the period.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import lsq_linear

from fieldplan.actuator import Segment
from fieldplan.routes import available_speed
from fieldplan.schedule import Schedule
from fieldplan.simulate import Simulator, compute_metrics


def greedy_step(actuator, bodies, medium, p, goals, period, cache):
    """Segments of one period of the greedy one-step peer."""
    prims = cache.setdefault("prims", actuator.primitives())
    B = actuator.basis(bodies, medium, p)
    vals = np.array([pr.values for pr in prims])
    if B.mode == "linear":
        disp = period * (B.drift[None] + np.einsum("pk,kni->pni", vals, B.fields))
    else:
        disp = period * (B.drift[None] + B.fields)
    cost = np.sum((p[None] + disp - goals[None]) ** 2, axis=(1, 2))
    stay = np.sum((p + period * B.drift - goals) ** 2)
    k = int(np.argmin(cost))
    if cost[k] >= stay:
        return [Segment(0.0, period, actuator.idle_input(), "idle")]
    return [Segment(0.0, period, prims[k].values, prims[k].name)]


def least_squares_step(actuator, bodies, medium, p, goals, period, cache):
    """Segments of one period of the bounded-least-squares peer."""
    B = actuator.basis(bodies, medium, p)
    speed = available_speed(B).max(axis=1)
    step = goals - p
    dist = np.linalg.norm(step, axis=1, keepdims=True)
    cap = np.maximum(speed[:, None] * period, 1e-300)
    step = np.where(dist > cap, step * cap / np.maximum(dist, 1e-300), step)
    if B.mode == "linear":
        A = period * B.matrix()
        b = (step - period * B.drift).ravel()
        lo = np.array([c.lower for c in B.channels])
        hi = np.array([c.upper for c in B.channels])
        u = lsq_linear(A, b, bounds=(lo, hi)).x
        return B.to_segments(u, period)
    A = B.matrix()
    b = (step - period * B.drift).ravel()
    w = lsq_linear(A, b, bounds=(np.zeros(B.size), np.full(B.size, period))).x
    return B.to_segments(w, period)


PEERS = {"greedy": greedy_step, "least squares": least_squares_step}


def run_peer(step_fn, actuator, bodies, workspace, starts, goals, *, period, duration, tolerance, rng,
             tracking_noise, limits=None):
    """Closed loop of one peer; returns a dict ``success, time_to_goal, contacts, violations, message``."""
    bodies = list(bodies)
    goals = np.asarray(goals, float)
    rmin = float(min(b.radius for b in bodies))
    gen = np.random.default_rng(rng)
    sim_rng, _ = gen.spawn(2)
    sim = Simulator(actuator, bodies, workspace, starts, rng=sim_rng, brownian=True, tracking_noise=tracking_noise,
                    max_displacement=0.25 * rmin)
    tol = np.full(len(bodies), float(tolerance))
    cache, segments = {}, []
    t = sim.time
    while t < duration:
        obs = sim.observe()
        if np.all(np.linalg.norm(obs - goals, axis=1) <= 0.5 * tol):
            break
        for sg in step_fn(actuator, bodies, workspace.medium, obs, goals, period, cache):
            sg = Segment(t, sg.duration, sg.values, sg.label)
            sim.apply(sg)
            segments.append(sg)
            t += sg.duration
    times, pos = sim.history()
    chans = actuator.channels
    sched = Schedule.from_segments(chans, segments) if segments else Schedule.empty(chans)
    metrics = compute_metrics(times, pos, bodies, goals, tol, sched if segments else None, sim.events)
    contacts = sum(1 for e in sim.events if e.kind == "contact")
    viol = [v[0] for v in sched.violations(limits)] if (limits is not None and segments) else []
    ok = bool(metrics.get("all_reached", False)) and contacts == 0
    return {"success": ok, "time_to_goal": float(metrics.get("time_to_goal", np.nan)) if ok else np.nan,
            "contacts": contacts, "violations": viol,
            "message": "arrived" if ok else ("contact" if contacts else "not all arrived")}
