"""The contract suite passes on good actuators and fails, clearly, on broken ones."""

import numpy as np
import pytest

from fieldplan import Actuator, ActuatorError, Body, Channel, water
from fieldplan.contract.testing import (CHECKS, ContractError, SourceArray, actuator_checks, check_actuator,
                                        contract_failures)

BEADS = [Body("small", 1e-6, 1050.0), Body("large", 3e-6, 1050.0)]
W = water()


def test_source_array_passes_in_both_modes():
    src = [[0, 0], [1e-3, 0], [0, 1e-3], [1e-3, 1e-3]]
    check_actuator(SourceArray(src), BEADS, W)
    check_actuator(SourceArray(src, affine=False), BEADS, W)


class Good(Actuator):
    tags = frozenset({"affine_in_input"})
    extent = (0.0, 1e-3, 0.0, 1e-3)

    @property
    def channels(self):
        return (Channel("a", "V", -1, 1), Channel("b", "V", -1, 1))

    def _velocity(self, body, medium, xy, u):
        return np.column_stack([u[0] * xy[:, 1], u[1] * xy[:, 0]]) * 1e-3


class WrongShape(Good):
    def _velocity(self, body, medium, xy, u):
        return super()._velocity(body, medium, xy, u)[:, :1]


class MakesNaN(Good):
    def _velocity(self, body, medium, xy, u):
        v = super()._velocity(body, medium, xy, u)
        v[xy[:, 0] > 5e-4] = np.nan
        return v


class NotVectorised(Good):
    def _velocity(self, body, medium, xy, u):
        # uses only the first point: wrong for every other point of a batch
        return np.repeat(super()._velocity(body, medium, xy[:1], u), len(xy), axis=0)


class FalseTag(Good):
    def _velocity(self, body, medium, xy, u):
        return super()._velocity(body, medium, xy, u * np.abs(u))


class ZeroIdleLie(Good):
    tags = frozenset({"affine_in_input", "zero_idle"})

    def _velocity(self, body, medium, xy, u):
        return super()._velocity(body, medium, xy, u) + 1e-6


class SwallowsBadInput(Good):
    def velocity(self, body, medium, xy, u):   # bypasses the base-class validation
        return self._velocity(body, medium, np.atleast_2d(np.asarray(xy, float))[:, :2], np.resize(np.asarray(u, float), 2))


class Unpicklable(Good):
    def __init__(self):
        self.f = lambda x: x


def test_good_actuator_passes():
    check_actuator(Good(), BEADS, W)


@pytest.mark.parametrize("cls, check", [
    (WrongShape, "returned shape"),
    (MakesNaN, r"\[shape_finite\].*not finite"),
    (NotVectorised, r"\[vectorised\]"),
    (FalseTag, r"\[affine_in_input\]"),
    (ZeroIdleLie, r"\[zero_idle\]"),
    (SwallowsBadInput, r"\[bad_input\]"),
    (Unpicklable, r"\[pickle\]"),
])
def test_broken_actuators_fail_with_a_clear_message(cls, check):
    with pytest.raises((AssertionError, ActuatorError), match=check):
        check_actuator(cls(), BEADS, W)


class TwoFaults(Good):
    """Not vectorised and not picklable: both must be reported, not only the first."""

    def __init__(self):
        self.f = lambda x: x

    def _velocity(self, body, medium, xy, u):
        return np.repeat(super()._velocity(body, medium, xy[:1], u), len(xy), axis=0)


def test_every_failed_check_is_listed():
    failures = contract_failures(TwoFaults(), BEADS, W)
    assert [c for c, _ in failures] == ["vectorised", "basis", "pickle"]   # basis also sees the batching bug
    with pytest.raises(ContractError) as info:
        check_actuator(TwoFaults(), BEADS, W)
    msg = str(info.value)
    assert "fails 3 contract checks" in msg
    assert "check_actuator[vectorised] TwoFaults:" in msg and "check_actuator[pickle] TwoFaults:" in msg
    assert info.value.failures == failures


def test_bad_channels_stop_the_suite_with_one_reason():
    class NoChannels(Good):
        @property
        def channels(self):
            return ()

    failures = contract_failures(NoChannels(), BEADS, W)
    assert failures[0][0] == "channels" and failures[-1][0] == "skipped"


def test_a_crashing_check_is_reported_not_raised():
    class Crashes(Good):
        def basis(self, bodies, medium, xy):
            raise RuntimeError("boom")

    assert ("basis", "raised RuntimeError: boom") in contract_failures(Crashes(), BEADS, W)


@pytest.mark.parametrize("name, check", actuator_checks(SourceArray([[0, 0], [1e-3, 0], [0, 1e-3]], affine=False),
                                                        BEADS, W))
def test_each_named_check_on_its_own(name, check):
    # The pattern a plug-in author copies: one test per contract check (scikit-learn's parametrize_with_checks).
    assert name in CHECKS
    check()


def test_velocity_validates_input():
    act = Good()
    with pytest.raises(ActuatorError, match="outside its bounds"):
        act.velocity(BEADS[0], W, [[0, 0]], [2.0, 0.0])
    with pytest.raises(ActuatorError, match=r"shape \(2,\)"):
        act.velocity(BEADS[0], W, [[0, 0]], [1.0])
    with pytest.raises(ActuatorError, match=r"shape \(n, 2\)"):
        act.velocity(BEADS[0], W, np.zeros((2, 3)), [0.0, 0.0])


def test_timeshare_basis_segments_cover_the_period():
    act = SourceArray([[0, 0], [1e-3, 0]], affine=False)
    basis = act.basis(BEADS, W, [[2e-4, 2e-4], [6e-4, 3e-4]])
    assert basis.mode == "timeshare" and basis.size == 4
    segs = basis.to_segments([0.2, 0.0, 0.1, 0.05], 1.0, start=3.0)
    assert segs[0].start == 3.0 and segs[0].label == "source_1-"   # primitives: each channel at -bound, +bound
    assert sum(s.duration for s in segs) == pytest.approx(1.0)
    assert segs[-1].label == "idle"
