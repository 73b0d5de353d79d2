"""Open-loop planning on the model: success, limits, stalls, bad input, goal assignment, capability."""

import numpy as np
import pytest

from fieldplan import Body, FieldplanError, Workspace, WorkspaceError, rectangle
from fieldplan.contract.schedule import ChannelLimit, HardwareLimits
from fieldplan.contract.testing import SourceArray
from fieldplan.planning.live import closed_loop
from fieldplan.planning.plan import Controller, PlanSettings, capability_curve, plan
from fieldplan.planning.routes import route_length

BEAD = Body("bead", radius=5e-6, density=1050.0)
WS = Workspace((0, 0, 1e-3, 1e-3))


def grid_sources(g, core_cells=0.25, affine=True, force=2e-12):
    """A g x g array of point sources over the 1 mm dish, softening length core_cells / g mm."""
    xs = (np.arange(g) + 0.5) / g * 1e-3
    src = np.array([(x, y) for x in xs for y in xs])
    return SourceArray(src, force=force, core=core_cells * 1e-3 / g, affine=affine)


ACT = grid_sources(4)
STARTS3 = np.array([[2e-4, 2e-4], [2e-4, 8e-4], [8e-4, 8e-4]])
GOALS3 = np.array([[8e-4, 2e-4], [7e-4, 5e-4], [3e-4, 6e-4]])


def _arrived(res, tol):
    err = np.linalg.norm(res.positions[-1] - res.goals, axis=1)
    return np.all(err <= tol)


def test_one_body_plan_is_a_consistent_schedule():
    res = plan(ACT, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]])
    assert res.success and res.status == 0
    assert _arrived(res, BEAD.radius)
    T = res.period
    # one segment per period in linear mode, back to back
    np.testing.assert_allclose(res.schedule.durations, T)
    np.testing.assert_allclose(np.diff(res.schedule.starts), T)
    assert res.schedule.duration == pytest.approx(T * len(res.step_times))
    assert len(res.routes) == 1 and route_length(res.routes[0]) == pytest.approx(5e-4, rel=1e-9)
    assert res.bodies_report[0]["reached"] and res.bodies_report[0]["reason"] is None


def test_several_bodies_reach_their_goals_without_contact():
    res = plan(ACT, [BEAD] * 3, WS, STARTS3, GOALS3)
    assert res.success, res.message
    assert res.metrics["contacts"] == 0 and res.metrics["wall_contacts"] == 0
    assert res.metrics["min_separation"] > 0
    assert res.max_slack < BEAD.radius


def test_obstacle_is_avoided_and_routes_stay_clear():
    ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4.5e-4, 0, 5.5e-4, 6e-4)])
    res = plan(ACT, [BEAD] * 3, ws, STARTS3, GOALS3)
    assert res.success, res.message
    assert res.metrics["wall_contacts"] == 0
    # every predicted position keeps the body out of the wall
    pos = res.positions.reshape(-1, 2)
    assert np.all(ws.contains(pos, BEAD.radius))


@pytest.mark.parametrize("limits", [
    HardwareLimits({f"source_{k + 1}": ChannelLimit(upper=0.8, slew_rate=0.6) for k in range(16)}),
    HardwareLimits({f"source_{k + 1}": ChannelLimit(rms=0.5) for k in range(16)}, min_dwell=0.5),
    HardwareLimits({f"source_{k + 1}": ChannelLimit(rms=0.7, rms_window=8.0) for k in range(16)}, time_step=0.05),
], ids=["bounds+slew", "rms+dwell", "windowed-rms+time-step"])
def test_schedule_respects_hardware_limits(limits):
    res = plan(ACT, [BEAD] * 3, WS, STARTS3, GOALS3, limits=limits)
    assert res.success, res.message
    assert res.violations == []
    res.schedule.check(limits)                     # raises LimitError on any violation


def test_period_follows_the_time_step_and_rms_window():
    lim = HardwareLimits({f"source_{k + 1}": ChannelLimit(rms=0.7, rms_window=8.0) for k in range(16)},
                         time_step=0.05)
    ctrl = Controller(ACT, [BEAD], WS, [[7e-4, 6e-4]], limits=lim)
    ctrl.prepare([[3e-4, 3e-4]])
    T = ctrl.period
    assert T / 0.05 == pytest.approx(round(T / 0.05), abs=1e-9)
    assert 8.0 / T == pytest.approx(round(8.0 / T), abs=1e-9)


def test_timeshare_mode_on_a_non_affine_actuator():
    act = grid_sources(4, affine=False)
    res = plan(act, [BEAD] * 2, WS, STARTS3[:2], GOALS3[:2])
    assert res.success, res.message
    T = res.period
    # the segments of each period add up to the period
    ends = res.schedule.starts + res.schedule.durations
    k = np.floor(res.schedule.starts / T + 1e-9)
    for j in np.unique(k):
        assert ends[k == j].max() - res.schedule.starts[k == j].min() == pytest.approx(T, rel=1e-9)
    assert res.metrics["contacts"] == 0 and res.metrics["wall_contacts"] == 0


def test_longer_horizon_and_cvxpy_backend_plan_too():
    for settings in (PlanSettings(horizon=3), PlanSettings(method="step", horizon=3),
                     PlanSettings(method="step", backend="cvxpy")):
        res = plan(ACT, [BEAD] * 2, WS, STARTS3[:2], GOALS3[:2], settings=settings)
        assert res.success, (settings, res.message)


def test_stalls_are_detected_recovered_and_reported():
    """Six bodies on 16 fields with goals 250 um apart: bodies block each other's progress; the
    step controller reports each stall and what it did, and still brings everyone in."""
    rng = 5
    starts = WS.sample(6, 2e-5, rng, separation=2.5e-4)
    goals = WS.sample(6, 2e-5, rng + 100, separation=2.5e-4)
    res = plan(ACT, [BEAD] * 6, WS, starts, goals, settings=PlanSettings(method="step"))
    assert res.stalls, "expected this task to stall somewhere"
    assert all("stalled" in s for s in res.stalls)
    assert any(("moved bodies" in s) or ("looked" in s) or ("route" in s) for s in res.stalls)
    assert res.success, res.message


def test_more_bodies_than_the_counting_rule_via_bracket_cycles():
    """The step controller's explicit bracket cycles. K = 3 fields, 2 bodies: the basis has rank 3 < 2N = 4, so no single period can move both
    bodies independently (the counting rule: K inputs steer at most K/2 bodies in one step). Over
    several periods the Lie bracket of two fields, played as the cycle u_a, u_b, -u_a, -u_b, adds the
    missing direction (Murray, Li & Sastry 1994, ch. 7), and both bodies arrive."""
    ang = np.linspace(0, 2 * np.pi, 3, endpoint=False) + 0.3
    act = SourceArray(0.5e-3 + 0.35e-3 * np.c_[np.cos(ang), np.sin(ang)], force=2e-12, core=1e-4)
    starts = np.array([[3e-4, 4e-4], [6.5e-4, 6e-4]])
    goals = starts + [[8e-5, 4e-5], [-5e-5, 9e-5]]
    B = act.basis([BEAD] * 2, WS.medium, starts)
    assert np.linalg.matrix_rank(B.matrix()) == 3
    res = plan(act, [BEAD] * 2, WS, starts, goals, settings=PlanSettings(method="step", time_limit=6000.0))
    assert res.success, res.message
    assert any("Lie-bracket" in s for s in res.stalls)
    assert res.metrics["contacts"] == 0


def test_bracket_cycle_moves_as_predicted():
    """The cycle u_a, u_b, -u_a, -u_b (each T) moves a body by T^2 [f_a, f_b] + O(T^3), with
    [X, Y] = DY X - DX Y (Murray, Li & Sastry 1994, ch. 7): simulated against the finite-difference
    bracket, the error falls like T^3 (ratio ~8 when T halves)."""
    from fieldplan.world.simulate import Simulator

    ang = np.linspace(0, 2 * np.pi, 3, endpoint=False) + 0.3
    act = SourceArray(0.5e-3 + 0.35e-3 * np.c_[np.cos(ang), np.sin(ang)], force=2e-12, core=1e-4)
    p = np.array([[3e-4, 4e-4]])
    eps = 1e-8
    f = act.basis([BEAD], WS.medium, p).fields[:, 0]
    jx = (act.basis([BEAD], WS.medium, p + [eps, 0]).fields[:, 0] - f) / eps
    jy = (act.basis([BEAD], WS.medium, p + [0, eps]).fields[:, 0] - f) / eps
    a, b = 0, 1
    bracket = np.c_[jx[b], jy[b]] @ f[a] - np.c_[jx[a], jy[a]] @ f[b]
    errs = []
    for T in (8.0, 4.0):
        sim = Simulator(act, [BEAD], WS, p, brownian=False, max_displacement=1e-8)
        for k, sgn in ((a, 1), (b, 1), (a, -1), (b, -1)):
            u = np.zeros(3)
            u[k] = sgn
            sim.advance(u, T)
        errs.append(np.linalg.norm(sim.positions[0] - p[0] - T * T * bracket))
        assert np.linalg.norm(sim.positions[0] - p[0]) > 0.5 * T * T * np.linalg.norm(bracket)
    assert 5.0 < errs[0] / errs[1] < 11.0


def test_bad_input_names_the_body():
    ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4e-4, 4e-4, 6e-4, 6e-4)])
    bodies = [BEAD, Body("big", 2e-5, 1050.0)]
    starts = np.array([[1e-4, 1e-4], [9e-4, 9e-4]])
    with pytest.raises(WorkspaceError, match=r"goal of body 1 \(big\).*inside an obstacle"):
        plan(ACT, bodies, ws, starts, [[2e-4, 2e-4], [5e-4, 5e-4]])
    with pytest.raises(WorkspaceError, match=r"goals of body 0 \(bead\) and body 1 \(big\)"):
        plan(ACT, bodies, ws, starts, [[2e-4, 2e-4], [2.2e-4, 2e-4]])
    with pytest.raises(WorkspaceError, match=r"start of body 1 \(big\)"):
        plan(ACT, bodies, ws, [[1e-4, 1e-4], [5e-4, 5e-4]], [[2e-4, 2e-4], [8e-4, 8e-4]])
    with pytest.raises(WorkspaceError, match=r"goal of body 0 \(bead\).*closer to a wall"):
        plan(ACT, bodies, ws, starts, [[2e-6, 5e-4], [8e-4, 8e-4]])
    with pytest.raises(WorkspaceError, match="shape"):
        plan(ACT, bodies, ws, starts, [[2e-4, 2e-4]])


def test_unreachable_goal_is_a_result_not_an_exception():
    # The gap (15 um) lets the medium through but not a 10 um radius bead.
    ws = Workspace((0, 0, 1e-3, 1e-3), [rectangle(4.9e-4, 0, 5.1e-4, 4.9e-4),
                                        rectangle(4.9e-4, 5.05e-4, 5.1e-4, 1e-3)])
    big = Body("big", 1e-5, 1050.0)
    res = plan(ACT, [big, BEAD], ws, [[2e-4, 5e-4], [2e-4, 2e-4]], [[8e-4, 5e-4], [3e-4, 3e-4]])
    assert not res.success and res.status == 3
    assert "body 0 (big): no route" in res.message
    assert res.bodies_report[0]["reason"].startswith("no route")


def test_unlabelled_goals_are_assigned():
    starts = np.array([[2e-4, 5e-4], [8e-4, 5e-4]])
    goals = np.array([[7.5e-4, 5e-4], [2.5e-4, 5e-4]])          # crossed: assignment uncrosses them
    res = plan(ACT, [BEAD] * 2, WS, starts, goals, settings=PlanSettings(assign_goals=True))
    assert res.success, res.message
    np.testing.assert_allclose(res.goals, goals[::-1])
    assert sum(route_length(r) for r in res.routes) == pytest.approx(1e-4, rel=1e-6)


def test_settings_are_validated():
    with pytest.raises(FieldplanError, match="unknown key"):
        PlanSettings.from_dict({"horizn": 2})
    with pytest.raises(FieldplanError, match="period"):
        PlanSettings(period=-1.0)
    with pytest.raises(FieldplanError, match="horizon"):
        PlanSettings(horizon=0)
    assert PlanSettings.from_dict(PlanSettings(horizon=2).to_dict()).horizon == 2


def test_capability_curve_counts_successes():
    out = capability_curve(ACT, lambda n: [BEAD] * n, WS, [1, 2], trials=2, rng=3)
    assert set(out) == {1, 2}
    assert out[1]["success_rate"] == 1.0 and out[1]["time_to_goal"] > 0
    assert 0.0 <= out[2]["success_rate"] <= 1.0 and len(out[2]["messages"]) == 2


@pytest.mark.parametrize("affine", [True, False], ids=["linear", "timeshare"])
@pytest.mark.parametrize("window_periods,fixed_period", [(2.5, False), (1.7, True), (0.6, True)],
                         ids=["auto-period", "window-not-a-multiple", "window-shorter-than-period"])
def test_sliding_window_rms_limit_is_never_broken(affine, window_periods, fixed_period):
    """A tight RMS limit over a sliding window (any start time, as Schedule.violations checks it)
    holds for open-loop plans and closed-loop runs alike, also when the window is not a whole
    number of periods or is shorter than one (timeshare mode plays primitives at full value, so a
    short window sees the loud slices). Coil heating goes with the mean of I^2 over the thermal
    time constant (common practice, no source)."""
    act = grid_sources(3, affine=affine)
    start, goal = [[3e-4, 3e-4]], [[7e-4, 6e-4]]
    T0 = plan(act, [BEAD], WS, start, goal).period
    lim = HardwareLimits({c.name: ChannelLimit(rms=0.5, rms_window=window_periods * T0) for c in act.channels},
                         time_step=0.01)
    settings = PlanSettings(period=T0 if fixed_period else None)
    free = plan(act, [BEAD], WS, start, goal, settings=settings)
    assert free.schedule.rms(window_periods * T0).max() > 0.5        # the limit binds
    res = plan(act, [BEAD], WS, start, goal, limits=lim, settings=settings)
    assert res.success, res.message
    assert res.schedule.violations(lim) == [] and res.violations == []
    live = closed_loop(act, act, [BEAD], WS, start, goal, limits=lim, settings=settings, rng=0)
    assert live.success, live.message
    assert live.schedule.violations(lim) == [] and live.violations == []


def test_a_limit_breaking_schedule_is_never_a_success(monkeypatch):
    """The final guard: with the controller's RMS budgets switched off, the plan reaches its goal
    but breaks the declared limit, and plan() says so instead of returning a success."""
    lim = HardwareLimits({f"source_{k + 1}": ChannelLimit(rms=0.3, rms_window=5.0) for k in range(16)})
    original = Controller._setup_limits

    def without_rms(self):
        original(self)
        self._rms = []

    monkeypatch.setattr(Controller, "_setup_limits", without_rms)
    res = plan(ACT, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]], limits=lim)
    assert not res.success and res.status == 4
    assert res.violations and "RMS" in res.violations[0]
    assert "breaks a declared hardware limit" in res.message
