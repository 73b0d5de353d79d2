"""Wall-clock real time: play segments on time, measure latency and jitter, warn on overruns; dry runs.

:class:`RealTimeClock` keeps a timeline: segment ``j`` is due at ``anchor + (start_j - start_0) /
speed`` on the monotonic clock (``time.perf_counter``). :meth:`RealTimeClock.wait` sleeps until a
segment is due and :meth:`RealTimeClock.sent` records how late its command went out (the
*latency*, s) and warns (:class:`OverrunWarning`) when that exceeds the tolerance.

:func:`run_realtime` runs :func:`fieldplan.planning.live.run_live` in wall-clock time: each period starts
with ``observe()``; the period's segments are then held for their durations on the wall clock.
Between the frame and the first segment going out the hardware still holds the previous segment:
that *loop latency* (observe + controller step + send) is measured every period, as is the wall
length of every period and its jitter (standard deviation), and a period whose latency exceeds the
tolerance is an overrun (warned once per period, listed in the result). :func:`dry_run` does the
same with the rollout simulator as camera and hardware, at real speed (or ``speed`` times it).
"""

from __future__ import annotations

import dataclasses
import time
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..errors import FieldplanError
from ..planning.live import LiveResult, run_live
from ..world.simulate import Simulator

__all__ = ["OverrunWarning", "RealTimeClock", "PacedLiveResult", "run_realtime", "dry_run"]


class OverrunWarning(RuntimeWarning):
    """A segment went out later than the tolerance (the previous one was held that much longer)."""


class RealTimeClock:
    """Segment timeline on the monotonic clock.

    Parameters
    ----------
    speed : float
        1 plays in real time; 10 ten times faster (tests, rehearsals).
    tolerance : float, optional
        Lateness that counts as an overrun, s of schedule time (default 10 % of the segment's
        duration, at least 2 ms: common practice for the scheduling noise of a desktop OS).
    now, sleep : callable
        Clock and sleep (``time.perf_counter``, ``time.sleep``).
    """

    def __init__(self, *, speed=1.0, tolerance=None, now=time.perf_counter, sleep=time.sleep):
        if not (isinstance(speed, (int, float)) and np.isfinite(speed) and speed > 0):
            raise FieldplanError(f"speed must be a number > 0, got {speed!r}.")
        if tolerance is not None and not tolerance >= 0:
            raise FieldplanError(f"overrun tolerance must be >= 0 s, got {tolerance!r}.")
        self.speed = float(speed)
        self.tolerance = tolerance
        self.now, self._sleep = now, sleep
        self.anchor = None          # (wall time, schedule time) of the timeline's origin
        self.latency = []           # per segment, s of schedule time
        self.overruns = []          # (index, schedule time, lateness s)

    def start(self, t_schedule):
        """Anchor the timeline: schedule time ``t_schedule`` is now."""
        self.anchor = (self.now(), float(t_schedule))

    def due(self, t_schedule):
        """Wall time at which schedule time ``t_schedule`` is due."""
        if self.anchor is None:
            self.start(t_schedule)
        w0, s0 = self.anchor
        return w0 + (float(t_schedule) - s0) / self.speed

    def wait(self, t_schedule):
        """Sleep until schedule time ``t_schedule`` is due (returns at once if it is past)."""
        target = self.due(t_schedule)
        while True:
            left = target - self.now()
            if left <= 0:
                return
            self._sleep(min(left, 0.05))

    def sent(self, segment):
        """Record that ``segment`` just went out: its lateness, and a warning if it overran."""
        late = (self.now() - self.due(segment.start)) * self.speed
        self.latency.append(late)
        tol = self.tolerance if self.tolerance is not None else max(0.1 * segment.duration, 2e-3)
        if late > tol:
            self.overruns.append((len(self.latency) - 1, float(segment.start), float(late)))
            warnings.warn(f"segment at t = {segment.start:.4g} s went out {late * 1e3:.1f} ms late (tolerance "
                          f"{tol * 1e3:.1f} ms): the previous input was held that much longer.", OverrunWarning,
                          stacklevel=3)
        return late

    def jitter(self):
        """Standard deviation of the latency, s."""
        return float(np.std(self.latency)) if len(self.latency) > 1 else 0.0


@dataclass
class PacedLiveResult(LiveResult):
    """:class:`fieldplan.planning.live.LiveResult` of a wall-clock run, with its timing.

    Attributes
    ----------
    loop_latency : ndarray (P,)
        Per period, wall time from the start of ``observe()`` to the first segment sent, s
        (multiplied by ``speed``: schedule seconds). The hardware held the previous input meanwhile.
    period_wall : ndarray (P,)
        Wall length of each period (observation to observation), s (times ``speed``).
    period_nominal : ndarray (P,)
        Sum of the period's segment durations, s.
    jitter : float
        Standard deviation of ``period_wall - period_nominal``, s.
    overruns : list of int
        Periods whose loop latency exceeded the tolerance.
    speed : float
    true_final : ndarray (n, 2) or None
        :func:`dry_run`: the simulated true positions at the end, m.
    """

    loop_latency: np.ndarray = field(default_factory=lambda: np.zeros(0))
    period_wall: np.ndarray = field(default_factory=lambda: np.zeros(0))
    period_nominal: np.ndarray = field(default_factory=lambda: np.zeros(0))
    jitter: float = 0.0
    overruns: list = field(default_factory=list)
    speed: float = 1.0
    true_final: np.ndarray | None = None

    def timing_summary(self):
        lat = self.loop_latency
        return (f"{len(lat)} periods; loop latency median {1e3 * float(np.median(lat)) if len(lat) else 0:.1f} ms, "
                f"max {1e3 * float(np.max(lat)) if len(lat) else 0:.1f} ms; period jitter {1e3 * self.jitter:.1f} ms; "
                f"{len(self.overruns)} overrun(s)")


def run_realtime(controller, observe, apply, *, speed=1.0, tolerance=None, now=time.perf_counter, sleep=time.sleep,
                 **run_live_options):
    """:func:`fieldplan.planning.live.run_live` in wall-clock time, with its latency, jitter and overruns measured.

    Parameters
    ----------
    controller, observe, apply
        As for :func:`fieldplan.planning.live.run_live`; ``apply`` sends and returns (a
        :mod:`fieldplan.lab.drivers` driver, or the simulator); this function holds each segment
        for its duration.
    speed : float
        1 = real time.
    tolerance : float, optional
        Loop latency that counts as an overrun, s (default 10 % of the controller's period).
    **run_live_options
        Passed to run_live (``duration``, ``latency``, ``on_step``, ...).

    Returns
    -------
    PacedLiveResult
    """
    clock = RealTimeClock(speed=speed, tolerance=0.0, now=now, sleep=sleep)
    obs_wall, first_send, nominal = [], [], []
    state = {"fresh": False, "t_end": None}

    def timed_observe():
        # Hold the last period's segments to their end before looking again.
        if state["t_end"] is not None:
            clock.wait(state["t_end"])
        obs_wall.append(now())
        nominal.append(0.0)
        state["fresh"] = True
        return observe()

    def timed_apply(segment):
        if state["fresh"]:
            # A new period: its first segment starts now; the timeline restarts here.
            first_send.append(now())
            clock.start(segment.start)
            state["fresh"] = False
        else:
            clock.wait(segment.start)
        apply(segment)
        nominal[-1] += segment.duration
        state["t_end"] = segment.start + segment.duration

    res = run_live(controller, timed_observe, timed_apply, **run_live_options)
    if state["t_end"] is not None:
        clock.wait(state["t_end"])          # hold the last period's segments to their end too
    periods = min(len(first_send), len(obs_wall))
    lat = (np.array(first_send[:periods]) - np.array(obs_wall[:periods])) * speed
    wall = np.diff(np.array(obs_wall)) * speed
    nom = np.array(nominal[: len(wall)])
    P = min(len(wall), periods)
    tol = tolerance if tolerance is not None else 0.1 * float(getattr(controller, "period", 0.0) or 1.0)
    over = [int(k) for k in np.flatnonzero(lat > tol)]
    for k in over:
        warnings.warn(f"period {k}: {lat[k] * 1e3:.1f} ms from the frame to the first segment sent (tolerance "
                      f"{tol * 1e3:.1f} ms); the previous input was held that much longer.", OverrunWarning,
                      stacklevel=2)
    jit = float(np.std(wall[:P] - nom[:P])) if P > 1 else 0.0
    base = {f.name: getattr(res, f.name) for f in dataclasses.fields(LiveResult)}
    out = PacedLiveResult(**base, loop_latency=lat, period_wall=wall, period_nominal=nom, jitter=jit, overruns=over,
                          speed=float(speed))
    out.notes = list(out.notes) + [out.timing_summary()]
    return out


def dry_run(controller, truth, starts, *, speed=1.0, rng=None, brownian=True, tracking_noise=0.0, **options):
    """Rehearse a live run: the rollout simulator as camera and hardware, paced on the wall clock.

    Parameters
    ----------
    controller : Controller
    truth : Actuator
        What moves the simulated bodies.
    starts : array_like (n, 2)
        m.
    speed : float
        1 = real speed.
    rng, brownian, tracking_noise
        See :class:`fieldplan.world.simulate.Simulator`.
    **options
        Passed to :func:`run_realtime`.

    Returns
    -------
    PacedLiveResult
    """
    sim = Simulator(truth, controller.bodies, controller.workspace, starts, rng=rng, brownian=brownian,
                    tracking_noise=tracking_noise)
    res = run_realtime(controller, sim.observe, sim.apply, speed=speed, **options)
    res.true_final = sim.positions.copy()
    return res
