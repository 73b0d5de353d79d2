"""The horizon planner: cost-to-go maps, the horizon QP, sequential convex programming, recovery."""

import dataclasses

import numpy as np
import pytest

import fieldplan
from fieldplan import Actuator, Body, Channel, HardwareLimits, ChannelLimit, Workspace
from fieldplan.live import closed_loop
from fieldplan.plan import PlanSettings, plan
from fieldplan.planning import Controller, HorizonData, HorizonProgram, cost_to_go
from fieldplan.planning.fieldtable import FieldTable
from fieldplan.testing import SourceArray

BEAD = Body("bead", radius=5e-6, density=1050.0)
WS = Workspace((0, 0, 1e-3, 1e-3))


class UniformDrive(Actuator):
    """A uniform velocity field: v = speed * (u_x, u_y), inputs in the unit box (an analytic toy)."""

    tags = frozenset({"affine_in_input", "zero_idle"})

    def __init__(self, speed=1e-5):
        self.speed = speed

    @property
    def channels(self):
        return (Channel("ux", "1", -1.0, 1.0), Channel("uy", "1", -1.0, 1.0))

    def _velocity(self, body, medium, xy, u):
        return np.broadcast_to(self.speed * np.asarray(u)[None], xy.shape).copy()


# -- cost-to-go ------------------------------------------------------------------------------------------
def test_cost_to_go_of_a_uniform_field_is_distance_over_speed():
    # With inputs in a box, a uniform field moves a body at `speed` along each axis at once: the
    # least time to cover (dx, dy) is max(|dx|, |dy|) / speed (the Chebyshev distance), exactly,
    # and Dijkstra's algorithm on the 8-neighbour grid reproduces it at every cell (analytic).
    act = UniformDrive(2e-5)
    res = 1e-3 / 64
    ctg = cost_to_go(WS, act, BEAD, [res * 20.5, res * 30.5], resolution=res)
    X, Y = np.meshgrid(ctg.xs, ctg.ys)
    far = np.hypot(X - ctg.goal[0], Y - ctg.goal[1]) > ctg.near
    exact = np.maximum(np.abs(X - ctg.goal[0]), np.abs(Y - ctg.goal[1])) / act.speed
    ok = ctg.reachable & far
    np.testing.assert_allclose(ctg.values[ok], exact[ok], rtol=1e-9)


def test_cost_to_go_goes_round_an_obstacle_and_points_back_into_free_space():
    ws = Workspace((0, 0, 1e-3, 1e-3), obstacles=[fieldplan.rectangle(4.5e-4, 0, 5.5e-4, 8e-4)])
    act = UniformDrive(2e-5)
    ctg = cost_to_go(ws, act, BEAD, [8e-4, 2e-4], start=[2e-4, 2e-4])
    # Straight across would be 0.6 mm; round the wall's end (inflated by the 5 um radius) the least
    # time in the box-input metric (Chebyshev) is (0.605 + 0.11 + 0.605) mm / speed (analytic).
    J = ctg.value([[2e-4, 2e-4]])[0]
    assert J == pytest.approx(1.32e-3 / act.speed, rel=0.03)
    # The way round: the route passes above the wall.
    assert ctg.route is not None and ctg.route[:, 1].max() > 8e-4
    # The local quadratic's virtual goal lies up the wall's side, not through the wall.
    w, c = ctg.quadratic([[2e-4, 2e-4]])
    assert c[0, 1] > 2e-4 and w[0] > 0
    # Inside the obstacle the map grows away from the free space.
    _, g = ctg.value_and_gradient([[5e-4, 4e-4]])
    assert np.all(np.isfinite(g))


def _ring(m):
    a = np.linspace(0, 2 * np.pi, m, endpoint=False)
    return np.stack([np.cos(a), np.sin(a)], axis=1)


def test_cost_to_go_is_continuous_across_the_goal_ring_and_its_gradient_is_exact():
    # Near the goal the map falls linearly along rays from the ring at `near`. A jump at the ring
    # would be a barrier the plan cannot cross (bodies once stalled on it, a few mm from their goals).
    act = SourceArray([[0, 0], [1e-3, 0], [1e-3, 1e-3], [0, 1e-3]], force=2e-12)
    ctg = cost_to_go(WS, act, BEAD, [4.7e-4, 5.2e-4])
    ang = np.linspace(0, 2 * np.pi, 13)[:-1]
    u = np.stack([np.cos(ang), np.sin(ang)], axis=1)
    inside = ctg.value(ctg.goal + (1 - 1e-7) * ctg.near * u)
    outside = ctg.value(ctg.goal + (1 + 1e-7) * ctg.near * u)
    np.testing.assert_allclose(inside, outside, rtol=1e-5)
    # Every ray rises from the goal, where the time is zero, to the ring (no dip to stall in).
    rs = np.linspace(0.0, 1.0, 41) * ctg.near
    along = np.array([ctg.value(ctg.goal + r * u) for r in rs])          # (radii, directions)
    assert np.all(np.diff(along, axis=0) > 0) and ctg.value([ctg.goal])[0] == 0.0
    # The gradient inside the ring is the derivative of the value (central differences).
    x = ctg.goal + 0.6 * ctg.near * u[[1, 4, 7]] + [[1e-7, -2e-7]]
    _, g = ctg.value_and_gradient(x)
    h = 1e-9
    fd = np.stack([(ctg.value(x + [h, 0]) - ctg.value(x - [h, 0])) / (2 * h),
                   (ctg.value(x + [0, h]) - ctg.value(x - [0, h])) / (2 * h)], axis=1)
    np.testing.assert_allclose(g, fd, rtol=1e-4)
    # Within a third of the goal region it is the straight-line time at one speed (isotropic), whose
    # square the horizon program models exactly; that speed is the ring's mean rate.
    r = 0.3 * ctg.near
    np.testing.assert_allclose(ctg.value(ctg.goal + r * u), r / ctg.goal_speed, rtol=1e-12)
    np.testing.assert_allclose(1.0 / ctg.goal_speed, np.min(ctg.value(ctg.goal + ctg.near * _ring(64))) / ctg.near,
                               rtol=1e-9)


def test_quadratic_model_matches_value_and_gradient():
    act = SourceArray([[0, 0], [1e-3, 0], [1e-3, 1e-3], [0, 1e-3]], force=2e-12)
    ctg = cost_to_go(WS, act, BEAD, [7e-4, 6e-4])
    x = np.array([[2.3e-4, 3.1e-4], [5.2e-4, 8.3e-4]])
    J, g = ctg.value_and_gradient(x)
    w, c = ctg.quadratic(x)
    # J^2 / 2 ~ w |x - c|^2 / 2: same value and gradient at x.
    np.testing.assert_allclose(0.5 * w * np.sum((x - c) ** 2, axis=1), 0.5 * J**2, rtol=1e-9)
    np.testing.assert_allclose(w[:, None] * (x - c), J[:, None] * g, rtol=1e-9)


def test_field_table_interpolates_the_basis():
    act = SourceArray([[0, 0], [1e-3, 0], [0, 1e-3]], force=2e-12, core=2e-4)
    tab = FieldTable(act, [BEAD, BEAD], WS.medium, WS.bounds, 1e-3 / 128)
    xy = np.array([[3.3e-4, 4.1e-4], [7.7e-4, 2.2e-4], [5e-4, 5e-4], [1e-4, 9e-4]])
    F, d = tab.fields(xy)
    B = act.basis([BEAD] * 4, WS.medium, xy)
    err = np.abs(F - B.fields).max() / np.abs(B.fields).max()
    assert err < 1e-2      # second order in the cell: (1/128)^2 of the field's curvature scale


# -- the horizon QP ------------------------------------------------------------------------------------------
def _random_data(rng, n=3, K=4, H=4, timeshare=False, slew=False, m=0):
    F = rng.normal(size=(H, K, n, 2)) * 0.3
    p0 = rng.uniform(-1, 1, size=(n, 2)) * 2
    P = n * (n - 1) // 2
    xbar = np.repeat(p0[None], H, 0)
    lo = np.zeros((H, K)) if timeshare else -np.ones((H, K))
    d = HorizonData(
        F=F, d=rng.normal(size=(H, n, 2)) * 0.05, p0=p0, lower=lo, upper=np.ones((H, K)),
        previous=np.zeros(K), xbar=xbar, trust=np.full((H, n), 0.8), omega=rng.uniform(0.5, 2, (H, n)),
        centre=rng.uniform(-2, 2, (H, n, 2)), effort=np.full(K, 1e-2), smooth=np.full(K, 5e-2),
        pair_normal=np.tile(np.array([1.0, 0.0]), (H, P, 1)), pair_gap=np.full((H, P), -0.5),
        wall_normal=np.tile(np.array([0.0, 1.0]), (H, n, 1)), wall_rhs=np.full((H, n), -1.5),
        slew=np.full(K, 0.4) if slew else None, jac=rng.normal(size=(H, n, 2, 2)) * 0.1, rate_rows=rng.uniform(0, 1, (m, K)) if m else None,
        rate_rhs=np.full((H, m), 0.5) if m else None, slack_weight=10.0, timeshare=timeshare)
    return d


@pytest.mark.parametrize("timeshare,slew,m", [(False, False, 0), (False, True, 0), (True, False, 2)])
def test_horizon_qp_matches_cvxpy(timeshare, slew, m):
    # The hand-built sparse matrices against the same problem stated in cvxpy (independent solver).
    rng = np.random.default_rng(3)
    d = _random_data(rng, timeshare=timeshare, slew=slew, m=m)
    prog = HorizonProgram(3, 4, 4, n_rate_rows=m, timeshare=timeshare, slew=slew, eps=1e-7, max_iter=20000)
    sol = prog.solve(d)
    assert sol.status == "optimal"
    prob, w, x = prog.to_cvxpy(d)
    prob.solve()
    # Same optimum: objective (up to the constant sum omega |c|^2 the QP leaves out) and decisions.
    const = float(np.sum(np.repeat(d.omega, 2, axis=1) * d.centre.reshape(4, 6) ** 2))
    assert sol.objective + const == pytest.approx(prob.value, rel=1e-4, abs=1e-5)
    np.testing.assert_allclose(sol.x.reshape(4, 6), x.value, atol=2e-3)


def test_horizon_qp_rejects_wrong_shapes():
    prog = HorizonProgram(2, 3, 5)
    d = HorizonData.unconstrained(np.zeros((4, 3, 2, 2)), p0=np.zeros((2, 2)), centre=np.zeros((4, 2, 2)))
    with pytest.raises(ValueError, match="shape"):
        prog.solve(d)


# -- the controller ----------------------------------------------------------------------------------------
ACT4 = SourceArray([[0, 0], [1e-3, 0], [1e-3, 1e-3], [0, 1e-3]], force=2e-12)


def test_accepted_iterations_never_raise_the_true_cost():
    # Independently of the controller's own bookkeeping: the plan it keeps costs no more, on a fresh
    # roll-out, than the starting sequences it began the period from.
    starts = np.array([[3e-4, 3e-4], [6e-4, 2e-4]])
    ctrl = Controller(ACT4, [BEAD] * 2, WS, [[7e-4, 6e-4], [2e-4, 7e-4]])
    p = starts
    for _ in range(6):
        prev_W = ctrl._W.copy() if ctrl.ready else None
        prev_played = ctrl._prev.copy() if ctrl.ready else None
        segs = ctrl.step(p, 0.0 if not ctrl.records else ctrl.records[-1]["time"] + ctrl.period)
        lower, upper, rows, rhs = ctrl._bounds()
        H = ctrl.horizon
        starts_W = [np.tile(ctrl._idle_rate, (H, 1))]
        if prev_W is not None:
            starts_W.append(prev_W)             # the previous plan, already shifted by the controller
        played_now = ctrl._prev.copy()
        ctrl._prev = prev_played if prev_played is not None else ctrl._idle_rate.copy()
        Ws = ctrl._project(np.asarray(starts_W), lower, upper, rows, rhs)
        X, _, _, _, pushed = ctrl._rollout(p, Ws)
        start_cost = ctrl._merit(X, Ws, pushed)
        Xk, _, _, _, pk = ctrl._rollout(p, ctrl.plan_weights[None])
        kept = ctrl._merit(Xk, ctrl.plan_weights[None], pk)[0]
        ctrl._prev = played_now
        assert kept <= start_cost.min() * (1 + 1e-12)
        p = ctrl.predict(p, segs)


def test_anytime_fallback_after_a_failed_solve(monkeypatch):
    ctrl = Controller(ACT4, [BEAD], WS, [[7e-4, 6e-4]])
    ctrl.prepare([[3e-4, 3e-4]])
    real = ctrl.program.solve

    def broken(data, warm=None):
        sol = real(data, warm)
        return dataclasses.replace(sol, status="failed")

    monkeypatch.setattr(ctrl.program, "solve", broken)
    segs = ctrl.step([[3e-4, 3e-4]], 0.0)
    assert sum(s.duration for s in segs) == pytest.approx(ctrl.period)
    assert ctrl.records[-1]["status"] == "failed" and ctrl.records[-1]["accepted"] == 0
    for sg in segs:
        ACT4.check_input(sg.values)


def test_plan_respects_declared_limits_and_succeeds():
    lim = HardwareLimits({c.name: ChannelLimit(rms=0.6, slew_rate=0.05) for c in ACT4.channels}, time_step=0.5)
    res = plan(ACT4, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]], limits=lim)
    assert res.success, res.message
    assert res.violations == []
    res.schedule.check(lim)


def test_horizon_beats_one_step_with_two_bodies_and_three_fields():
    """K = 3 fields, 2 bodies: the basis has rank 3 < 2N = 4, so no single period moves both bodies
    independently (the counting rule); over several periods the fields' variation in space adds the
    missing direction (the Lie bracket; Murray, Li & Sastry 1994, ch. 7). The horizon plan, linearised
    with the fields' Jacobian along its trajectory, finds such motion; the same planner looking one
    period ahead cannot."""
    ang = np.linspace(0, 2 * np.pi, 3, endpoint=False) + 0.3
    act = SourceArray(0.5e-3 + 0.35e-3 * np.c_[np.cos(ang), np.sin(ang)], force=2e-12, core=1e-4)
    starts = np.array([[3e-4, 4e-4], [6.5e-4, 6e-4]])
    goals = starts + [[8e-5, 4e-5], [-5e-5, 9e-5]]
    assert np.linalg.matrix_rank(act.basis([BEAD] * 2, WS.medium, starts).matrix()) == 3
    long = plan(act, [BEAD] * 2, WS, starts, goals, settings=PlanSettings(time_limit=1500.0))
    short = plan(act, [BEAD] * 2, WS, starts, goals, settings=PlanSettings(time_limit=1500.0, horizon=1))
    err_long = max(r["final_error"] for r in long.bodies_report)
    err_short = max(r["final_error"] for r in short.bodies_report)
    start_err = float(np.max(np.linalg.norm(goals - starts, axis=1)))
    assert err_long < 0.25 * err_short and err_long < 0.25 * start_err
    assert long.metrics["contacts"] == 0


def test_closed_loop_uses_the_horizon_planner_by_default():
    res = closed_loop(ACT4, ACT4, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]], rng=1)
    assert res.success, res.message


def test_step_method_is_still_available():
    res = plan(ACT4, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]], settings=PlanSettings(method="step"))
    assert res.success


def test_settings_reject_an_unknown_method():
    with pytest.raises(ValueError, match="method"):
        PlanSettings(method="fastest")


def test_scenario_planner_keys_are_checked_with_file_and_line(tmp_path):
    from fieldplan.errors import ScenarioError
    from fieldplan.scenario import load_scenario

    text = open("scenarios/demo.yaml").read().replace("  tolerance: 15 um ", "  method: horizn\n  horizon: lots\n"
                                                      "  tolerance: 15 um ")
    path = tmp_path / "typo.yaml"
    path.write_text(text)
    with pytest.raises(ScenarioError) as exc:
        load_scenario(str(path))
    msg = str(exc.value)
    assert "typo.yaml" in msg and "planner.method" in msg and "horizon" in msg and "planner.horizon" in msg
    good = tmp_path / "good.yaml"
    good.write_text(open("scenarios/demo.yaml").read().replace(
        "  tolerance: 15 um ", "  method: step\n  horizon: 4\n  table_resolution: 5 um\n  tolerance: 15 um "))
    sc = load_scenario(str(good))
    st = sc.plan_settings()
    assert sc.planner["method"] == "step" and sc.planner["horizon"] == 4
    assert sc.planner["table_resolution"] == pytest.approx(5e-6)
    assert st.method == "step" and st.horizon == 4


def test_a_route_grid_too_fine_is_a_clear_error():
    ctrl = Controller(ACT4, [BEAD], WS, [[7e-4, 6e-4]], settings=PlanSettings(route_resolution=1e-7))
    with pytest.raises(ValueError, match="route_resolution .* coarser"):
        ctrl.prepare([[3e-4, 3e-4]])


def test_slew_is_a_rate_ramps_within_a_period():
    # A slew limit bounds how fast a channel changes, not how much per control period: with 0.1 s
    # hardware steps a full swing of 2 units at 0.25 /s takes 8 s, well inside one period, so the
    # limited plan is about as fast as the free one - and every step of its ramps keeps the rate.
    free = plan(ACT4, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]],
                limits=HardwareLimits(time_step=0.1))
    lim = HardwareLimits({c.name: ChannelLimit(slew_rate=0.25) for c in ACT4.channels}, time_step=0.1)
    slow = plan(ACT4, [BEAD], WS, [[3e-4, 3e-4]], [[7e-4, 6e-4]], limits=lim)
    assert free.success and slow.success, slow.message
    assert slow.schedule.duration <= 1.3 * free.schedule.duration
    slow.schedule.check(lim)
    assert "ramp" in set(slow.schedule.labels)
    dv = np.abs(np.diff(np.asarray(slow.schedule.values), axis=0))
    assert dv.max() <= 0.25 * 0.1 * (1 + 1e-9)


class ToneDrive(UniformDrive):
    """The uniform drive played as time-shared primitives (each channel at a bound), like a tone set."""

    tags = frozenset({"zero_idle"})


def test_time_share_error_diffusion_plays_mixes_shorter_than_a_dwell():
    # Holds shorter than the minimum dwell cannot be played; error diffusion must carry them over
    # periods (not drop them), so that small corrections - the last millimetres of a plan - happen.
    lim = HardwareLimits(time_step=0.02, min_dwell=0.04)
    ctrl = Controller(ToneDrive(2e-5), [BEAD], WS, [[6e-4, 5e-4]], limits=lim, settings=PlanSettings(period=0.32))
    ctrl.prepare([[5e-4, 5e-4]])
    assert ctrl.mode == "timeshare" and ctrl.period == pytest.approx(0.32)
    ask = np.zeros(ctrl.K)
    ask[0] = 0.03                                   # 3 % of each period: 9.6 ms, under a 40 ms dwell
    played = np.zeros(ctrl.K)
    periods = 100
    for k in range(periods):
        for sg in ctrl._segments(ask, k * ctrl.period):
            d = sg.duration
            if sg.label != "idle":
                # every hold is a whole number of hardware steps and at least the dwell
                assert d >= 0.04 - 1e-9 and abs(d / 0.02 - round(d / 0.02)) < 1e-6
                played[[p.name for p in ctrl._prim_objs()].index(sg.label)] += d
    np.testing.assert_allclose(played / (periods * ctrl.period), ask, atol=0.04 / (periods * ctrl.period) + 1e-12)


def test_prediction_stops_at_the_walls_as_the_world_does():
    # The live loop bridges latency with the model's prediction; a body driven into a wall stays in
    # the workspace (and no field is evaluated outside it).
    from fieldplan.contract.actuator import Segment
    ctrl = Controller(UniformDrive(2e-5), [BEAD], WS, [[6e-4, 5e-4]])
    ctrl.prepare([[5e-4, 5e-4]])
    x = ctrl.predict([[9.9e-4, 5e-4]], [Segment(0.0, 10.0, np.array([1.0, 0.0]), "push")])
    assert WS.contains(x, BEAD.radius * (1 - 1e-6)).all() and x[0, 0] > 9e-4
