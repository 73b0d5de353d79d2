"""fieldplan.result.Result: one base for what a plan, a live run and a rollout report."""

import dataclasses

import numpy as np

import fieldplan
from fieldplan.contract.testing import SourceArray
from fieldplan.planning.live import LiveResult
from fieldplan.planning.plan import PlanResult
from fieldplan.result import Result
from fieldplan.world.simulate import Rollout

SHARED = {"success", "status", "message", "times", "positions", "schedule", "goals", "metrics", "events", "routes",
          "bodies_report", "step_times", "stalls", "notes", "violations"}


def test_every_result_has_the_shared_fields():
    assert {f.name for f in dataclasses.fields(Result)} == SHARED
    for cls in (PlanResult, LiveResult, Rollout):
        assert issubclass(cls, Result)
        assert SHARED <= {f.name for f in dataclasses.fields(cls)}, cls


def test_a_rollout_reports_status_schedule_and_goals():
    act = SourceArray([[0.0, 0.0], [1e-3, 0.0]], force=5e-12)
    bead = fieldplan.Body("bead", radius=2e-6, density=1050.0)
    ws = fieldplan.Workspace((-1e-3, -1e-3, 2e-3, 1e-3))
    sched = fieldplan.Schedule(act.channels, [0.0], [2.0], [[1.0, 0.0]])
    goal = np.array([[1e-9, 0.0]])      # unreachable in 2 s: the bead is pulled, not placed
    r = fieldplan.rollout(sched, act, [bead], ws, [[5e-4, 0.0]], goal, rng=0, brownian=False)
    assert r.schedule is sched and np.allclose(r.goals, goal)
    assert r.status == (0 if r.success else 1)
    assert r.positions.shape[1:] == (1, 2) and len(r.times) == len(r.positions)
    r0 = fieldplan.rollout(sched, act, [bead], ws, [[5e-4, 0.0]], None, rng=0, brownian=False)
    assert (r0.success, r0.status, r0.message) == (False, 1, "no goals given")
