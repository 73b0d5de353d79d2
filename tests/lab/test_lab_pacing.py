"""fieldplan.lab.pacing: the wall-clock timeline, loop latency and jitter, overruns, dry runs.

Timing is checked against an injected clock (a fake ``now``/``sleep`` pair), never against the
machine's wall clock: tests do not assert wall-clock time.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from fieldplan import Body, Segment, Workspace
from fieldplan.contract.testing import SourceArray
from fieldplan.lab.pacing import OverrunWarning, PacedLiveResult, RealTimeClock, dry_run, run_realtime
from fieldplan.planning import make_controller
from fieldplan.world.simulate import Simulator

BEAD = Body("bead", radius=5e-6, density=1050.0)
WS = Workspace((0, 0, 1e-3, 1e-3))
XS = (np.arange(4) + 0.5) / 4 * 1e-3
MODEL = SourceArray(np.array([(x, y) for x in XS for y in XS]), force=2e-12, core=0.0625e-3)
STARTS = np.array([[2e-4, 2e-4], [2e-4, 8e-4]])
GOALS = np.array([[8e-4, 3e-4], [6e-4, 7e-4]])


class FakeClock:
    """A monotonic clock that only moves when slept on (or pushed)."""

    def __init__(self):
        self.t = 100.0
        self.sleeps = []

    def now(self):
        return self.t

    def sleep(self, dt):
        self.sleeps.append(dt)
        self.t += dt


def test_clock_waits_until_due_and_flags_late_segments():
    fc = FakeClock()
    clock = RealTimeClock(speed=2.0, now=fc.now, sleep=fc.sleep)
    clock.start(10.0)
    clock.wait(11.0)                         # 1 s of schedule at double speed: 0.5 s of wall time
    assert fc.t == pytest.approx(100.5)
    assert clock.sent(Segment(11.0, 1.0, [0.0])) == pytest.approx(0.0)
    fc.t += 0.25                             # the program was busy: 0.5 s of schedule late
    with pytest.warns(OverrunWarning, match="500.0 ms late"):
        late = clock.sent(Segment(11.0, 1.0, [0.0]))
    assert late == pytest.approx(0.5) and clock.overruns[0][2] == pytest.approx(0.5)
    clock.wait(10.5)                          # in the past: no sleep
    assert fc.t == pytest.approx(100.75)
    with pytest.raises(ValueError, match="speed"):
        RealTimeClock(speed=0)


def test_run_realtime_measures_loop_latency_and_warns_on_overruns():
    """A camera that takes 0.3 s per frame: every period's first segment goes out 0.3 s after the frame."""
    fc = FakeClock()
    sim = Simulator(MODEL, [BEAD] * 2, WS, STARTS, rng=1)
    ctrl = make_controller(MODEL, [BEAD] * 2, WS, GOALS)

    def slow_camera():
        fc.t += 0.3
        return sim.observe()

    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        res = run_realtime(ctrl, slow_camera, sim.apply, now=fc.now, sleep=fc.sleep, tolerance=0.1)
    assert isinstance(res, PacedLiveResult) and res.success, res.message
    P = len(res.step_times)
    assert len(res.loop_latency) == P
    np.testing.assert_allclose(res.loop_latency, 0.3, atol=1e-9)
    # each period on the wall: the frame (0.3 s) + its segments held for their durations
    np.testing.assert_allclose(res.period_wall, res.period_nominal[: len(res.period_wall)] + 0.3, atol=1e-9)
    assert res.jitter == pytest.approx(0.0, abs=1e-9)
    assert res.overruns == list(range(P))
    assert sum(issubclass(w.category, OverrunWarning) for w in rec) == P
    assert "overrun" in res.notes[-1]


def test_dry_run_against_the_simulator_at_speed():
    ctrl = make_controller(MODEL, [BEAD] * 2, WS, GOALS)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OverrunWarning)
        res = dry_run(ctrl, MODEL, STARTS, speed=200.0, rng=2)
    assert res.success, res.message
    assert np.all(np.linalg.norm(res.true_final - ctrl.goals, axis=1) <= 1.5 * BEAD.radius)
    assert len(res.loop_latency) == len(res.step_times) and np.all(res.loop_latency >= 0)
    assert res.speed == 200.0 and np.isfinite(res.jitter)
