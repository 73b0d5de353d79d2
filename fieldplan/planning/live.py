"""The live loop: tracker -> controller -> driver, with latency and dropped frames; closed-loop simulation.

:func:`run_live` drives a controller (:class:`fieldplan.planning.Controller`, the horizon planner) with two user callbacks: ``observe()``
returns the tracked positions (or ``None``, or rows of NaN for bodies the tracker lost) and
``apply(segment)`` plays one segment on the hardware. A known measurement latency is bridged by
predicting, on the model, the motion under the segments played since the frame was taken; a lost
body (or a dropped frame) is dead-reckoned the same way from its last estimate. :func:`closed_loop`
runs the same code with the rollout simulator (:class:`fieldplan.simulate.Simulator`, the *truth*
actuator, Brownian motion, tracking noise, latency) as the ``observe``/``apply`` pair, so simulated
and hardware runs share one code path.

Examples
--------
>>> import numpy as np, fieldplan
>>> from fieldplan.testing import SourceArray
>>> act = SourceArray([[0, 0], [1e-3, 0], [1e-3, 1e-3], [0, 1e-3]], force=2e-12)
>>> ws = fieldplan.Workspace((0, 0, 1e-3, 1e-3))
>>> bead = fieldplan.Body("bead", radius=5e-6, density=1050.0)
>>> res = closed_loop(act, act, [bead], ws, [[3e-4, 3e-4]], [[7e-4, 6e-4]], rng=1)
>>> res.success
True
"""

from __future__ import annotations

import collections
import time
from dataclasses import dataclass

import numpy as np

from ..contract.actuator import Segment
from ..contract.schedule import Schedule
from ..world.body import check_bodies, check_positions
from ..world.simulate import Simulator, check_placement, compute_metrics
from ..errors import FieldplanError, WorkspaceError
from ..result import Result
from . import make_controller

__all__ = ["run_live", "closed_loop", "LiveResult"]


@dataclass(kw_only=True)
class LiveResult(Result):
    """Outcome of a live (or closed-loop simulated) run.

    Attributes
    ----------
    success : bool
        :func:`run_live`: every body's estimate within tolerance of its goal at once.
        :func:`closed_loop`: the same for the *true* positions.
    status : int
        0 success, 1 duration reached, 2 controller gave up (fruitless stall recoveries),
        3 too many dropped frames in a row, 4 no route, 5 the applied schedule breaks a declared
        hardware limit (see ``violations``; never a success), 6 (:func:`closed_loop` only) two
        bodies touched in the simulated truth (never a success: plans must be collision-free).
    message : str
        Names every body that did not arrive and why.
    times : ndarray, shape (T,)
        s. :func:`run_live`: observation times; :func:`closed_loop`: the simulator's record.
    positions : ndarray, shape (T, n, 2)
        m. :func:`run_live`: the estimates the controller used; :func:`closed_loop`: true positions.
    schedule : Schedule
        Everything that was applied.
    step_times : list of float
        Controller wall time per period, s.
    stalls : list of str
    dropped : int
        Frames (or body rows) replaced by prediction.
    routes : list of ndarray
    goals : ndarray, shape (n, 2)
        After assignment, m.
    bodies_report : list of dict
    estimates : ndarray, shape (S, n, 2)
        The controller's position estimates, one per period, m.
    estimate_times : ndarray, shape (S,)
        s.
    events : list
        Contacts (closed loop).
    metrics : dict
        :func:`fieldplan.simulate.compute_metrics` of ``times``/``positions``.
    time_to_goal : float
        s (NaN if never).
    notes : list of str
    violations : list of str
        Hardware-limit violations of ``schedule`` (empty when it passes ``schedule.check(limits)``).
    """

    dropped: int = 0
    estimates: np.ndarray | None = None
    estimate_times: np.ndarray | None = None
    time_to_goal: float = float("nan")

    def __repr__(self):
        return (f"LiveResult(success={self.success}, status={self.status}, message={self.message!r}, "
                f"periods={len(self.step_times)}, dropped={self.dropped})")


def _window(applied, t_from, t_to):
    """The parts of applied segments that fall within [t_from, t_to] (for latency compensation)."""
    out = []
    for sg in applied:
        a, b = max(sg.start, t_from), min(sg.start + sg.duration, t_to)
        if b > a:
            out.append(Segment(a, b - a, sg.values, sg.label))
    return out


def run_live(controller, observe, apply, *, duration=None, on_step=None, latency=0.0, max_dropped=10,
             t0=0.0, max_steps=None, settle=1):
    """Drive ``controller`` with a tracker and a driver until every body is at its goal.

    Parameters
    ----------
    controller : Controller
        Built on the planning model; prepared on the first usable observation if not already.
    observe : callable
        ``observe() -> ndarray (n, 2)`` in m, the positions as tracked *now* (reporting the state
        ``latency`` seconds ago). ``None`` is a dropped frame; a row of NaN is a lost body.
    apply : callable
        ``apply(segment)`` plays one :class:`~fieldplan.Segment` (blocking for its duration on
        hardware; advancing the simulator in simulation).
    duration : float, optional
        Longest run, s (default the controller's time limit).
    on_step : callable, optional
        ``on_step(t, estimate, segments)`` after each period (logging, plotting, a stop button:
        return True to stop).
    latency : float
        Known measurement delay, s; bridged by predicting on the model through the segments
        applied since the frame was taken.
    max_dropped : int
        Consecutive unusable frames tolerated (dead-reckoned meanwhile) before giving up.
    t0 : float
        s, time of the first segment.
    max_steps : int, optional
        Most controller steps (default the controller's ``step_cap``: ``max_steps``, or what its time
        limit needs).
    settle : int
        Consecutive observations with every body within tolerance needed to stop (more than one
        rejects a single lucky noisy frame).

    Returns
    -------
    LiveResult
    """
    if latency < 0 or not np.isfinite(latency):
        raise FieldplanError(f"run_live latency must be a finite number >= 0 s, got {latency!r}.")
    if not (isinstance(max_dropped, (int, np.integer)) and max_dropped >= 0):
        raise FieldplanError(f"run_live max_dropped must be an integer >= 0, got {max_dropped!r}.")
    n = controller.n
    t = float(t0)
    est = None
    last_segs = []
    applied = collections.deque()
    segments, step_times, est_hist, est_times = [], [], [], []
    dropped = 0
    in_a_row = 0
    status, head = 1, ""
    settled = 0
    # Bounded even while the tracker gives nothing: a run of unusable frames ends after max_dropped.
    hard_cap = 10_000_000
    for _ in range(hard_cap):
        obs = observe()
        rows_ok = np.zeros(n, dtype=bool)
        if obs is not None:
            obs = np.asarray(obs, dtype=float)
            if obs.shape != (n, 2):
                raise FieldplanError(f"observe() must return shape ({n}, 2) in m (or None), got {obs.shape}.")
            rows_ok = np.all(np.isfinite(obs), axis=1)
        else:
            obs = np.full((n, 2), np.nan)
        if rows_ok.all():
            in_a_row = 0
        else:
            dropped += int(n - rows_ok.sum()) if obs is not None else n
            in_a_row += 1
            if in_a_row > max_dropped:
                status, head = 3, f"the tracker gave no usable position for {in_a_row} periods in a row"
                break
        # Latency: the frame shows the state `latency` ago; play the model forward through what was
        # applied since.
        if rows_ok.any() and latency > 0 and applied:
            window = _window(applied, t - latency, t)
            if window:
                obs = np.where(rows_ok[:, None], controller.predict(np.where(rows_ok[:, None], obs, 0.0), window), obs)
        if est is None:
            if not rows_ok.all():
                # Nothing to dead-reckon from yet: hold the idle input one period and look again.
                if not controller.ready:
                    idle = Segment(t, controller.settings.period or 1.0, _idle_values(controller), "idle")
                else:
                    idle = Segment(t, controller.period, _idle_values(controller), "idle")
                apply(idle)
                segments.append(idle)
                applied.append(idle)
                t += idle.duration
                continue
            est = obs.copy()
        else:
            pred = controller.predict(est, last_segs) if last_segs else est
            est = np.where(rows_ok[:, None], obs, pred)
        if not controller.ready:
            controller.prepare(est, t)
            if any(r is not None for r in controller.route_reasons):
                status, head = 4, "no route for some bodies"
                break
            if controller.blocked:
                status, head = 4, "cannot plan"
                break
        est_hist.append(est.copy())
        est_times.append(t)
        if controller.arrived(est).all():
            settled += 1
            # Stopping on the first estimate inside the arrival radius would leave the true bodies
            # on its edge: keep steering toward the goals for a few periods (PlanSettings
            # arrival_margin, settle_steps), as plan() does.
            margin_ok = controller.arrived(est, controller.settings.arrival_margin).all()
            if settled >= settle and (margin_ok or settled > settle + controller.settings.settle_steps):
                status = 0
                break
        else:
            settled = 0
        limit = controller.time_limit if duration is None else float(duration)
        if t - t0 >= limit - 1e-9 * controller.period:
            head = f"duration {limit:.4g} s reached"
            break
        steps_cap = max_steps if max_steps is not None else controller.step_cap
        if len(step_times) >= steps_cap:
            head = f"step limit {steps_cap} reached"
            break
        if controller.gave_up is not None:
            status, head = 2, f"gave up: {controller.gave_up}"
            break
        tic = time.perf_counter()
        segs = controller.step(est, t)
        step_times.append(time.perf_counter() - tic)
        for sg in segs:
            apply(sg)
            applied.append(sg)
        while applied and applied[0].start + applied[0].duration < t - latency - controller.period:
            applied.popleft()
        segments += segs
        last_segs = segs
        t += sum(sg.duration for sg in segs)
        if on_step is not None and on_step(t, est, segs):
            head = "stopped by on_step"
            break
    channels = controller.channels if controller.ready else controller.actuator.channels
    schedule = Schedule.from_segments(channels, segments) if segments else Schedule.empty(channels)
    final = est if est is not None else np.full((n, 2), np.nan)
    reasons = controller.body_reasons(final) if controller.ready else ["no usable observation"] * n
    viol = [v[0] for v in schedule.violations(controller.limits)] if segments else []
    if status == 0:
        message = f"all {n} bodies reached their goals in {t - t0:.4g} s ({len(step_times)} periods, {dropped} dropped)"
    else:
        missed = [f"body {i} ({b.name}): {r}" for i, (b, r) in enumerate(zip(controller.bodies, reasons)) if r]
        message = "; ".join([head or "not all bodies arrived"] + missed)
    if viol:
        # What was played broke a declared limit: never a success, and the message says which.
        more = f" (and {len(viol) - 1} more)" if len(viol) > 1 else ""
        message = f"the applied schedule breaks a declared hardware limit: {viol[0]}{more}; " + message
        status = 5
    err = np.linalg.norm(final - controller.goals, axis=1)
    report = [{"index": i, "name": b.name, "reached": bool(err[i] <= controller.tolerance[i]),
               "final_error": float(err[i]), "reason": reasons[i]} for i, b in enumerate(controller.bodies)]
    times = np.asarray(est_times, dtype=float)
    positions = np.asarray(est_hist, dtype=float).reshape(-1, n, 2)
    return LiveResult(success=status == 0, status=status, message=message, times=times, positions=positions,
                      schedule=schedule, step_times=step_times, stalls=list(controller.stalls), dropped=dropped,
                      routes=list(getattr(controller, "routes", [])), goals=controller.goals.copy(),
                      bodies_report=report, estimates=positions.copy(), estimate_times=times.copy(),
                      notes=list(controller.notes), violations=viol)


def _idle_values(controller):
    return np.asarray(controller.actuator.idle_input(), dtype=float)


def closed_loop(model, truth, bodies, workspace, starts, goals, *, limits=None, settings=None, rng=None,
                brownian=True, tracking_noise=0.0, latency=0.0, drop_rate=0.0, duration=None, on_step=None,
                **simulator_options):
    """Closed-loop simulation: the controller on ``model`` steers the simulated ``truth``.

    Parameters
    ----------
    model : Actuator
        What the controller believes.
    truth : Actuator
        What moves the simulated bodies (the same object for a perfect model).
    bodies : sequence of Body
    workspace : Workspace
    starts, goals : array_like, shape (n, 2)
        m.
    limits : HardwareLimits, optional
    settings : PlanSettings or dict, optional
    rng : int or Generator, optional
        Seeds Brownian motion, tracking noise and dropped frames.
    brownian : bool
    tracking_noise : float
        s.d. of each tracked coordinate, m.
    latency : float
        Tracker delay, s (the simulator reports delayed positions; the loop compensates).
    drop_rate : float
        Probability that a frame is lost (returned as ``None``), for testing robustness.
    duration : float, optional
        s (default the controller's time limit).
    on_step : callable, optional
        See :func:`run_live`.
    **simulator_options
        Passed to :class:`fieldplan.simulate.Simulator` (``max_displacement``, ``contacts``, ...).

    Returns
    -------
    LiveResult
        ``times``/``positions`` are the *true* trajectory; ``success`` means every true position
        ended within tolerance.

    Raises
    ------
    WorkspaceError
        Bad starts or goals (naming the body).
    """
    bodies = list(check_bodies(bodies))
    starts = check_positions(starts, "starts", n=len(bodies), error=WorkspaceError)
    goals = check_positions(goals, "goals", n=len(bodies), error=WorkspaceError)
    check_placement(bodies, workspace, starts, "start")
    if not (0.0 <= drop_rate < 1.0):
        raise FieldplanError(f"closed_loop drop_rate must be in [0, 1), got {drop_rate!r}.")
    ctrl = make_controller(model, bodies, workspace, goals, limits=limits, settings=settings)
    gen = np.random.default_rng(rng)
    sim_rng, drop_rng = gen.spawn(2) if hasattr(gen, "spawn") else (gen, np.random.default_rng(gen.integers(2**31)))
    rmin = float(min(b.radius for b in bodies))
    opts = {"max_displacement": 0.25 * rmin}
    opts.update(simulator_options)
    sim = Simulator(truth, bodies, workspace, starts, rng=sim_rng, brownian=brownian, tracking_noise=tracking_noise,
                    latency=latency, **opts)

    def observe():
        if drop_rate and drop_rng.random() < drop_rate:
            return None
        return sim.observe()

    res = run_live(ctrl, observe, sim.apply, duration=duration, on_step=on_step, latency=latency, t0=sim.time)
    times, pos = sim.history()
    if times[-1] < sim.time:
        times = np.append(times, sim.time)
        pos = np.concatenate([pos, sim.positions[None]], axis=0)
    tol = ctrl.tolerance
    metrics = compute_metrics(times, pos, bodies, ctrl.goals, tol, res.schedule if res.schedule.n_segments else None,
                              sim.events)
    truth_ok = bool(metrics.get("all_reached", False))
    final_err = np.asarray(metrics["final_error"])
    for rep in res.bodies_report:
        i = rep["index"]
        rep["true_final_error"] = float(final_err[i])
        rep["reached"] = bool(final_err[i] <= tol[i])
    msg = res.message
    if res.success and not truth_ok:
        missed = [f"body {i} ({b.name}) is truly {final_err[i]:.3g} m from its goal"
                  for i, b in enumerate(bodies) if final_err[i] > tol[i]]
        msg = "the estimates arrived but " + "; ".join(missed)
    status = res.status if truth_ok or res.status != 0 else 1
    truth_ok = truth_ok and not res.violations
    touches = [e for e in sim.events if e.kind == "contact"]
    if touches:
        e = touches[0]
        i, j = e.bodies
        more = f" ({len(touches) - 1} more contact(s))" if len(touches) > 1 else ""
        msg = (f"bodies {i} ({bodies[i].name}) and {j} ({bodies[j].name}) touched at t = {e.time:.4g} s{more}; "
               + msg)
        if truth_ok:
            truth_ok, status = False, 6
    return LiveResult(success=truth_ok, status=0 if truth_ok else status, message=msg, times=times, positions=pos,
                      schedule=res.schedule, step_times=res.step_times, stalls=res.stalls, dropped=res.dropped,
                      routes=res.routes, goals=res.goals, bodies_report=res.bodies_report, estimates=res.estimates,
                      estimate_times=res.estimate_times, events=list(sim.events), metrics=metrics,
                      time_to_goal=float(metrics.get("time_to_goal", np.nan)), notes=res.notes,
                      violations=list(res.violations))
