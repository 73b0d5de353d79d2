"""The step program against closed forms and independent solvers, and its constraints."""

import numpy as np
import pytest
from scipy.optimize import linprog, lsq_linear

from fieldplan.planning.step import (
    StepData,
    StepProgram,
    pair_slots,
    point_at,
    polyline_arclength,
    project_to_route,
    reference_points,
    variation_length,
)


def _data(rng, n, K, H=1, *, bounds=1.0, effort=0.0, smooth=0.0, trust=50.0, pairs=False, walls=False,
          timeshare=False, slew=None):
    F = rng.normal(size=(H, K, n, 2)) * 0.4
    p0 = rng.uniform(-3, 3, (n, 2))
    d = StepData(positions=p0, fields=F, drift=rng.normal(size=(n, 2)) * 0.05,
                 refs=p0[None] + rng.normal(size=(H, n, 2)) * 0.5, track=np.ones(n),
                 lower=np.zeros(K) if timeshare else -bounds * np.ones(K), upper=bounds * np.ones(K),
                 previous=np.zeros(K) if timeshare else rng.uniform(-0.3, 0.3, K),
                 effort=np.full(K, effort), smooth=np.full(K, smooth), trust=np.full(n, trust),
                 slew=None if slew is None else np.full(K, slew), slack_weight=1e3)
    if pairs and n > 1:
        pr = np.array([(i, j) for i in range(n) for j in range(i + 1, n)])
        nrm = p0[pr[:, 0]] - p0[pr[:, 1]]
        d.pairs, d.pair_normals = pr, nrm / np.linalg.norm(nrm, axis=1, keepdims=True)
        d.pair_gap = np.full(len(pr), 0.4)
    if walls:
        d.wall_points = p0 - [0.0, 0.6]
        d.wall_normals = np.tile([0.0, 1.0], (n, 1))
        d.wall_gap = np.full(n, 0.5)
    return d


def test_cvxpy_program_is_dpp():
    """Compile once, solve many: the cvxpy form is disciplined parametrized programming."""
    for kw in ({}, {"slew": True}, {"timeshare": True, "n_rate_rows": 2}):
        prog = StepProgram(3, 5, 2, backend="cvxpy", **kw)
        assert prog.problem.is_dpp()
        assert prog.problem.is_dcp(dpp=True)


@pytest.mark.parametrize("backend", ["osqp", "cvxpy"])
def test_one_step_reaches_the_reference_on_an_affine_field(backend):
    """K = 2n independent fields: the exact input is F^-1 (ref - p0 - d) (numpy.linalg.lstsq as the
    reference); with no effort term the program reaches the reference in one period."""
    rng = np.random.default_rng(1)
    n, K = 3, 6
    d = _data(rng, n, K, bounds=100.0)
    M = d.fields[0].reshape(K, -1).T
    exact = np.linalg.lstsq(M, (d.refs[0] - d.positions - d.drift).ravel(), rcond=None)[0]
    assert np.max(np.abs(exact)) < 100.0          # inside the box: the box is not active
    sol = StepProgram(n, K, 1, backend=backend, eps=1e-9).solve(d)
    assert sol.status == "optimal"
    np.testing.assert_allclose(sol.rates[0], exact, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(sol.positions[1], d.refs[0], atol=1e-6)


def test_effort_weight_gives_the_ridge_solution():
    """More fields than coordinates: tracking + effort e |r|^2 has the closed-form ridge solution
    (F^T F + e I)^-1 F^T b (normal equations)."""
    rng = np.random.default_rng(2)
    n, K, e = 2, 7, 0.05
    d = _data(rng, n, K, bounds=100.0, effort=e)
    M = d.fields[0].reshape(K, -1).T
    b = (d.refs[0] - d.positions - d.drift).ravel()
    ridge = np.linalg.solve(M.T @ M + e * np.eye(K), M.T @ b)
    sol = StepProgram(n, K, 1, eps=1e-9).solve(d)
    np.testing.assert_allclose(sol.rates[0], ridge, rtol=1e-5, atol=1e-7)


def test_box_constrained_optimum_matches_scipy_lsq_linear():
    """Tracking + effort + smoothness with active input bounds is a bounded linear least-squares
    problem: scipy.optimize.lsq_linear (trust-region reflective, independent of cvxpy/OSQP)."""
    rng = np.random.default_rng(4)
    for trial in range(6):
        n, K = int(rng.integers(1, 5)), int(rng.integers(2, 12))
        d = _data(rng, n, K, bounds=0.3, effort=0.02, smooth=0.1)
        d.refs = d.positions[None] + rng.normal(size=(1, n, 2)) * 2.0      # far: bounds bind
        M = d.fields[0].reshape(K, -1).T
        A = np.vstack([M, np.sqrt(0.02) * np.eye(K), np.sqrt(0.1) * np.eye(K)])
        b = np.concatenate([(d.refs[0] - d.positions - d.drift).ravel(), np.zeros(K), np.sqrt(0.1) * d.previous])
        ref = lsq_linear(A, b, bounds=(-0.3, 0.3), tol=1e-12, lsmr_tol="auto").x
        sol = StepProgram(n, K, 1, eps=1e-9).solve(d)
        assert np.any(np.isclose(np.abs(ref), 0.3)), "test meant to have active bounds"
        np.testing.assert_allclose(sol.rates[0], ref, atol=2e-5)


def test_random_instances_agree_across_solvers():
    """Full program (horizon 3, slew, separation, walls, progress variable): the direct OSQP back end
    against cvxpy + Clarabel (an interior-point method), optimum and solution to tolerance."""
    rng = np.random.default_rng(5)
    for trial in range(4):
        n, K, H = int(rng.integers(2, 5)), int(rng.integers(3, 9)), 3
        d = _data(rng, n, K, H, effort=1e-2, smooth=1e-2, trust=0.8, pairs=True, walls=True, slew=0.4)
        d.ref_dirs = d.refs - d.positions[None]
        d.refs = np.repeat(d.positions[None], H, axis=0)
        d.progress_reward = 0.5
        a = StepProgram(n, K, H, slew=True, eps=1e-8).solve(d)
        b = StepProgram(n, K, H, slew=True, backend="cvxpy", solver="CLARABEL").solve(d)
        assert a.status == b.status == "optimal"
        assert a.objective == pytest.approx(b.objective, rel=1e-5, abs=1e-7)
        np.testing.assert_allclose(a.rates, b.rates, atol=1e-4)
        assert a.progress == pytest.approx(b.progress, abs=1e-4)


def test_l1_variant_matches_linprog():
    """With a zero-tracking, linear objective (progress reward only) the program is a linear
    program; scipy.optimize.linprog (HiGHS) solves the same LP written out by hand:
    max a  s.t.  F r = a D (one body, displacement equals the scaled step), |r| <= 1, a <= 1."""
    rng = np.random.default_rng(6)
    for trial in range(5):
        K = int(rng.integers(2, 6))
        F = rng.normal(size=(1, K, 1, 2))
        D = rng.normal(size=(1, 1, 2)) * 3.0
        p0 = np.zeros((1, 2))
        d = StepData(positions=p0, fields=F, drift=np.zeros((1, 2)), refs=np.zeros((1, 1, 2)), ref_dirs=D,
                     progress_reward=1.0, track=np.full(1, 1e4), lower=-np.ones(K), upper=np.ones(K),
                     previous=np.zeros(K), effort=np.zeros(K), smooth=np.zeros(K), trust=np.full(1, 100.0))
        sol = StepProgram(1, K, 1, eps=1e-9, backend="cvxpy", solver="CLARABEL").solve(d)
        M = F[0].reshape(K, 2).T
        # variables [r (K), a]: minimise -a, M r - a D = 0, -1 <= r <= 1, 0 <= a <= 1
        A_eq = np.hstack([M, -D.reshape(2, 1)])
        lp = linprog(np.r_[np.zeros(K), -1.0], A_eq=A_eq, b_eq=np.zeros(2),
                     bounds=[(-1, 1)] * K + [(0, 1)], method="highs")
        # A large tracking weight makes the equality nearly hard; the residual costs ~1/weight.
        assert sol.progress == pytest.approx(lp.x[-1], abs=2e-3)


def test_constraints_hold_in_the_solution():
    rng = np.random.default_rng(7)
    n, K = 4, 8
    d = _data(rng, n, K, effort=1e-3, trust=0.3, pairs=True, walls=True, slew=0.2)
    # pull everyone toward the middle so that separation binds
    d.refs = np.repeat(np.mean(d.positions, axis=0)[None, None], n, axis=1)
    prog = StepProgram(n, K, 1, eps=1e-8)
    sol = prog.solve(d)
    tol = 1e-5
    r = sol.rates[0]
    assert np.all(r >= -1 - tol) and np.all(r <= 1 + tol)
    assert np.all(np.abs(r - d.previous) <= 0.2 + tol)
    p1 = sol.positions[1]
    if sol.slack_pairs.max() < tol:
        lin = np.einsum("pc,pc->p", d.pair_normals, p1[d.pairs[:, 0]] - p1[d.pairs[:, 1]])
        assert np.all(lin >= d.pair_gap - tol)
        # the linearised constraint is a restriction: the true distance is at least as large
        assert np.all(np.linalg.norm(p1[d.pairs[:, 0]] - p1[d.pairs[:, 1]], axis=1) >= d.pair_gap - tol)
    if sol.slack_walls.max() < tol:
        assert np.all(np.einsum("ic,ic->i", d.wall_normals, p1 - d.wall_points) >= d.wall_gap - tol)
    if sol.slack_trust.max() < tol:
        assert np.all(np.abs(p1 - d.positions) <= 0.3 + tol)
    # the prediction is the linear model
    np.testing.assert_allclose(p1, d.positions + d.drift + np.tensordot(r, d.fields[0], axes=1), atol=1e-6)


def test_infeasible_constraints_are_soft_and_reported():
    """Two bodies drifting onto each other faster than any input can stop them: the program still
    solves and reports how far the separation had to give (the slack)."""
    p0 = np.array([[0.0, 0.0], [1.0, 0.0]])
    F = np.zeros((1, 1, 2, 2))
    F[0, 0] = [[0.01, 0.0], [-0.01, 0.0]]        # tiny input authority
    drift = np.array([[0.4, 0.0], [-0.4, 0.0]])
    d = StepData(positions=p0, fields=F, drift=drift, refs=p0[None], track=np.ones(2), lower=-np.ones(1),
                 upper=np.ones(1), previous=np.zeros(1), effort=np.zeros(1), smooth=np.zeros(1),
                 trust=np.full(2, 5.0), pairs=np.array([[1, 0]]), pair_normals=np.array([[1.0, 0.0]]),
                 pair_gap=np.array([0.8]))
    for backend in ("osqp", "cvxpy"):
        sol = StepProgram(2, 1, 1, backend=backend, eps=1e-8).solve(d)
        assert sol.status == "optimal"
        # best: full input pushing them apart, gap = 1 - 0.8 + 0.02 = 0.22, so slack = 0.58
        assert sol.rates[0, 0] == pytest.approx(-1.0, abs=1e-5)
        assert sol.slack_pairs.max() == pytest.approx(0.58, abs=1e-4)
        assert sol.max_slack == pytest.approx(0.58, abs=1e-4)


def test_timeshare_weights_are_fractions_of_the_period():
    rng = np.random.default_rng(8)
    n, K = 3, 10
    d = _data(rng, n, K, timeshare=True, pairs=True, walls=True, trust=2.0)
    d.refs = d.positions[None] + rng.normal(size=(1, n, 2)) * 3
    for backend in ("osqp", "cvxpy"):
        sol = StepProgram(n, K, 1, timeshare=True, backend=backend, eps=1e-8).solve(d)
        assert np.all(sol.rates >= -1e-7) and sol.rates.sum() <= 1 + 1e-6
    # worst-order keep-out: any ordering of the primitives keeps every body off the wall
    r = sol.rates[0]
    F0 = d.fields[0]
    toward = np.minimum(np.einsum("knc,nc->nk", F0, d.wall_normals), 0.0) @ r
    clear = np.einsum("nc,nc->n", d.wall_normals, d.positions + d.drift - d.wall_points)
    assert np.all((clear + toward >= d.wall_gap - 1e-5) | (sol.slack_walls[0] > 1e-6))


def test_route_geometry_helpers_by_hand():
    route = np.array([[0.0, 0.0], [3.0, 0.0], [3.0, 4.0]])
    cum = polyline_arclength(route)
    np.testing.assert_allclose(cum, [0, 3, 7])
    np.testing.assert_allclose(point_at(route, cum, np.array([1.5, 5.0, 99.0])), [[1.5, 0], [3, 2], [3, 4]])
    s, dist = project_to_route(route, cum, [2.0, 1.0])
    assert (s, dist) == pytest.approx((2.0, 1.0))
    s, dist = project_to_route(route, cum, [2.0, 1.0], s_min=4.0)         # window forces the 2nd leg
    assert s == pytest.approx(4.0) and dist == pytest.approx(np.hypot(1.0, 0.0))
    np.testing.assert_allclose(reference_points(route, cum, 2.0, 2.0, 3), [[3, 1], [3, 3], [3, 4]])


def test_variation_length_of_a_linear_field():
    """f(x) = a + b x along x (one field, one body): |f| / |grad f| = |a + b x| / |b| (hand computed)."""
    a, b, x, eps = 3.0, 0.5, 2.0, 1e-4
    here = np.array([[[a + b * x, 0.0]]])
    dx = np.array([[[a + b * (x + eps), 0.0]]])
    dy = here.copy()
    assert variation_length(here, dx, dy, eps)[0] == pytest.approx((a + b * x) / b, rel=1e-9)


def test_pair_slots_keep_the_nearest_pairs():
    xy = np.array([[0.0, 0.0], [1.0, 0.0], [5.0, 0.0], [5.5, 0.0]])
    pairs, dropped = pair_slots(xy, np.full(4, 0.1), 1, np.full(4, 10.0))
    assert pairs.tolist() == [[2, 3]] and dropped == 5
    pairs, dropped = pair_slots(xy, np.full(4, 0.1), 6, np.full(4, 0.5))
    assert sorted(map(tuple, pairs.tolist())) == [(0, 1), (2, 3)] and dropped == 0
