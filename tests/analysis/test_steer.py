"""Tests of fieldplan.analysis: positive spanning, worst-direction speed, maps, design helpers, symmetry.

Independent references used here:
* Positive spanning: a set positively spans R^D iff it is not contained in a closed half-space;
  the vertices of a simplex around zero and {+-e_i} are the textbook minimal and maximal
  positive bases (Davis, "Theory of positive linear dependence", Amer. J. Math. 76, 1954).
* Gordan's theorem / Stiemke's lemma (textbook linear-programming duality): 0 is interior to
  conv(P) iff P has full rank and a strictly positive convex combination of P equals 0.
  Implemented below as its own LP, not by calling fieldplan.
* Regular polygon geometry (textbook): a regular m-gon of circumradius R has inradius R cos(pi/m)
  = a / (2 tan(pi/m)) for side a. The zonotope of m generators of length s at angles pi k/m is a
  regular 2m-gon of side 2s.
* The counting rule (../shared/PHYSICS-NOTES.md, derived from rank): an affine actuator with K
  inputs moves at most K/2 planar bodies independently in one step.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from scipy.optimize import linprog

from fieldplan import Actuator, ActuatorError, Body, Channel, FieldBasis, Primitive, Workspace, water
from fieldplan.analysis import (
    basis_function,
    body_speeds,
    compare_designs,
    count_curve,
    mirror_check,
    obstructions,
    restrict,
    select_primitives,
    speed_map,
    steerability,
    steerable,
    subset,
    symmetry_report,
)
from fieldplan.contract.testing import SourceArray, check_actuator
from fieldplan.plots.steerability import plot_comparison, plot_count_curve, plot_speed_map

FULL = os.environ.get("FIELDPLAN_FULL") == "1"


# -- helpers ------------------------------------------------------------------------------------------
def ts_basis(fields, drift=None):
    """Time-shared basis with the given fields (K, n, 2) m/s."""
    F = np.asarray(fields, dtype=float)
    K, n, _ = F.shape
    d = np.zeros((n, 2)) if drift is None else np.asarray(drift, dtype=float).reshape(n, 2)
    prims = tuple(Primitive(f"p{k}", (float(k),)) for k in range(K))
    return FieldBasis("timeshare", F, d, (Channel("select", "1", 0, max(K, 1)),), prims)


def lin_basis(fields, lower=-1.0, upper=1.0, drift=None):
    """Linear basis with channel box [lower, upper] (scalars or arrays)."""
    F = np.asarray(fields, dtype=float)
    K, n, _ = F.shape
    lo = np.broadcast_to(lower, (K,))
    hi = np.broadcast_to(upper, (K,))
    d = np.zeros((n, 2)) if drift is None else np.asarray(drift, dtype=float).reshape(n, 2)
    chans = tuple(Channel(f"c{k}", "A", lo[k], hi[k]) for k in range(K))
    return FieldBasis("linear", F, d, chans)


def as_fields(vectors, n):
    """Rows of R^{2n} -> fields (K, n, 2)."""
    V = np.asarray(vectors, dtype=float)
    return V.reshape(len(V), n, 2)


def regular_simplex(D):
    """D+1 unit vectors in R^D, vertices of a regular simplex centred at zero."""
    E = np.eye(D + 1) - 1.0 / (D + 1)
    Q, _ = np.linalg.qr(E.T)            # orthonormal basis of the plane sum(x) = 0 (first D columns)
    V = E @ Q[:, :D]
    return V / np.linalg.norm(V, axis=1, keepdims=True)


def gordan_interior(points):
    """Independent test: 0 interior to conv(points) iff full rank and a strictly positive
    convex combination equals zero (Gordan / Stiemke, textbook LP duality)."""
    P = np.asarray(points, dtype=float)
    J, D = P.shape
    if np.linalg.matrix_rank(P) < D:
        return False
    # max s  s.t.  P^T lam = 0, sum lam = 1, lam_j >= s
    c = np.r_[np.zeros(J), -1.0]
    A_eq = np.vstack([np.c_[P.T, np.zeros(D)], np.r_[np.ones(J), 0.0]])
    b_eq = np.r_[np.zeros(D), 1.0]
    A_ub = np.c_[-np.eye(J), np.ones(J)]
    res = linprog(c, A_ub=A_ub, b_ub=np.zeros(J), A_eq=A_eq, b_eq=b_eq,
                  bounds=[(0, None)] * J + [(None, 1.0)], method="highs")
    return res.status == 0 and -res.fun > 1e-9


# -- positive spanning --------------------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2, 3])
def test_simplex_vertices_span_and_removing_one_does_not(n):
    """Davis 1954: the 2N+1 vertices of a simplex around zero are a minimal positive basis."""
    D = 2 * n
    V = regular_simplex(D) * 1e-5
    assert steerability(ts_basis(as_fields(V, n))).steerable
    assert steerable(ts_basis(as_fields(V, n)))
    for j in range(D + 1):
        reduced = np.delete(V, j, axis=0)
        r = steerability(ts_basis(as_fields(reduced, n)))
        assert not r.steerable
        assert r.speed == 0.0
        # The removed vertex's direction is the blocked one: the remaining D vectors are linearly
        # independent, so the blocked directions are one-sided.
        assert r.obstructions and not any(o.two_sided for o in r.obstructions)
        assert all(o.rate <= 1e-9 * 1e-5 for o in r.obstructions)


@pytest.mark.parametrize("n", [1, 2, 4])
def test_plus_minus_unit_vectors_span(n):
    """Davis 1954: {+-e_i} is a maximal positive basis; each is needed."""
    D = 2 * n
    E = np.eye(D) * 2e-6
    V = np.vstack([E, -E])
    r = steerability(ts_basis(as_fields(V, n)))
    assert r.steerable
    # Cross-polytope conv{+-e_i}: inradius 1/sqrt(D) times the vector length (textbook).
    assert r.speed == pytest.approx(2e-6 / math.sqrt(D), rel=1e-9)
    assert not steerable(ts_basis(as_fields(V[1:], n)))
    # Linear mode: fields e_i in the box [-1, 1] give the cube, inradius 1; box [0, 1] cannot reverse.
    assert steerability(lin_basis(as_fields(E, n))).speed == pytest.approx(2e-6, rel=1e-9)
    r = steerability(lin_basis(as_fields(E, n), lower=0.0))
    assert not r.steerable and len(r.obstructions) >= 1


def test_random_fields_agree_with_gordan():
    """Gordan's theorem (textbook) as an independent decision on random fields and drifts."""
    rng = np.random.default_rng(7)
    agree, kinds = 0, set()
    trials = 300 if FULL else 80
    for t in range(trials):
        n = int(rng.integers(1, 4))
        D = 2 * n
        K = int(rng.integers(D, 2 * D + 4))
        shift = rng.normal(size=D) * rng.uniform(0, 1.2)
        F = (rng.normal(size=(K, D)) + shift) * 1e-6
        drift = rng.normal(size=D) * 1e-6 * rng.choice([0.0, 0.3])
        P = np.vstack([drift, drift + F])
        want = gordan_interior(P / 1e-6)
        got = steerability(ts_basis(as_fields(F, n), drift=drift.reshape(n, 2)), method="none").steerable
        assert got == want, f"trial {t}: steerability says {got}, Gordan says {want}"
        assert steerable(ts_basis(as_fields(F, n), drift=drift.reshape(n, 2))) == want
        agree += 1
        kinds.add(want)
    assert kinds == {True, False}, "the random cases must include both outcomes"


# -- worst-direction speed ------------------------------------------------------------------------------
@pytest.mark.parametrize("m", [3, 4, 5, 6, 8, 12])
def test_regular_polygon_inradius_timeshare(m):
    """Regular m-gon of circumradius R: inradius R cos(pi/m) (textbook)."""
    R = 3e-6
    ang = 2 * np.pi * np.arange(m) / m + 0.3
    F = R * np.stack([np.cos(ang), np.sin(ang)], axis=1)[:, None, :]
    r = steerability(ts_basis(F))
    assert r.exact
    assert r.speed == pytest.approx(R * math.cos(math.pi / m), rel=1e-9)
    s, _ = body_speeds(ts_basis(F))
    assert s[0] == pytest.approx(R * math.cos(math.pi / m), rel=1e-9)


@pytest.mark.parametrize("m", [2, 3, 5])
def test_regular_zonotope_inradius_linear(m):
    """m generators of length s at angles pi k/m in the box [-1, 1]: regular 2m-gon of side 2s,
    inradius s / tan(pi / (2m)) (textbook)."""
    s = 1e-6
    ang = np.pi * np.arange(m) / m + 0.1
    F = s * np.stack([np.cos(ang), np.sin(ang)], axis=1)[:, None, :]
    want = s / math.tan(math.pi / (2 * m))
    assert steerability(lin_basis(F)).speed == pytest.approx(want, rel=1e-9)
    assert body_speeds(lin_basis(F))[0][0] == pytest.approx(want, rel=1e-9)
    # Asymmetric box [0, 2]: same zonotope shifted by sum of generators.
    r = steerability(lin_basis(F, lower=0.0, upper=2.0, drift=-F.sum(axis=0)))
    assert r.speed == pytest.approx(want, rel=1e-9)


def test_shifted_polygon_with_drift():
    """V = d + polygon, polygon = {n_e . x <= a}: distance from 0 to facet e is a + n_e . d."""
    m, R = 6, 2e-6
    ang = 2 * np.pi * np.arange(m) / m
    F = R * np.stack([np.cos(ang), np.sin(ang)], axis=1)[:, None, :]
    d = np.array([[0.4e-6, -0.25e-6]])
    a = R * math.cos(math.pi / m)
    normals = np.stack([np.cos(ang + np.pi / m), np.sin(ang + np.pi / m)], axis=1)
    want = np.min(a + normals @ d[0])
    assert steerability(ts_basis(F, drift=d)).speed == pytest.approx(want, rel=1e-9)


@pytest.mark.parametrize("D", [4, 6, 10])
def test_known_inradii_in_higher_dimensions_by_bounds(D):
    """Regular simplex of circumradius 1 has inradius 1/D; cross-polytope 1/sqrt(D) (textbook).
    The LP bracket must contain the value and the local search reach it."""
    n = D // 2
    for V, want in ((regular_simplex(D), 1.0 / D), (np.vstack([np.eye(D), -np.eye(D)]), 1.0 / math.sqrt(D))):
        r = steerability(ts_basis(as_fields(V * 1e-6, n)), method="bounds")
        lo, hi = r.speed_bounds
        assert lo <= want * 1e-6 * (1 + 1e-9) and hi >= want * 1e-6 * (1 - 1e-9)
        assert hi == pytest.approx(want * 1e-6, rel=1e-7)
        assert hi / lo <= math.sqrt(D) * (1 + 1e-9)
        ex = steerability(ts_basis(as_fields(V * 1e-6, n)), method="exact")
        assert ex.speed == pytest.approx(want * 1e-6, rel=1e-9)


def test_bounds_bracket_exact_on_random_cases():
    """Lower bound rigorous, upper bound a real direction; the local search usually finds the facet."""
    rng = np.random.default_rng(3)
    hits = total = 0
    for _ in range(40):
        n = int(rng.integers(1, 4))
        K = int(rng.integers(2 * n + 1, 4 * n + 3))
        F = rng.normal(size=(K, n, 2)) * 1e-6
        d = rng.normal(size=(n, 2)) * 2e-7
        for b in (lin_basis(F, drift=d), ts_basis(F, drift=d)):
            ex = steerability(b, method="exact")
            if not ex.steerable:
                continue
            bd = steerability(b, method="bounds")
            lo, hi = bd.speed_bounds
            assert lo <= ex.speed * (1 + 1e-9) and hi >= ex.speed * (1 - 1e-9)
            # The upper bound is attained by its reported direction.
            c = bd.worst_direction.reshape(-1)
            assert np.linalg.norm(c) == pytest.approx(1.0)
            total += 1
            hits += hi <= ex.speed * (1 + 1e-7)
    assert total >= 30
    assert hits >= 0.8 * total, f"local search found the exact value in only {hits}/{total} cases"


def test_speed_is_the_inscribed_ball_sampled_check():
    """Every point of the ball of the reported radius is achievable (LP membership), and a point just
    outside along the worst direction is not."""
    rng = np.random.default_rng(11)
    F = rng.normal(size=(7, 2, 2)) * 1e-6
    b = lin_basis(F)
    r = steerability(b)
    A = b.matrix()
    for _ in range(20):
        v = rng.normal(size=4)
        v *= 0.999 * r.speed / np.linalg.norm(v)
        res = linprog(np.zeros(7), A_eq=A, b_eq=v, bounds=[(-1, 1)] * 7, method="highs")
        assert res.status == 0
    v = 1.01 * r.speed * r.worst_direction.reshape(-1)
    res = linprog(np.zeros(7), A_eq=A, b_eq=v, bounds=[(-1, 1)] * 7, method="highs")
    assert res.status == 2


def test_rank_condition_and_axis_speeds():
    """Diagonal fields: condition = largest over smallest scale; axis speeds = box reach."""
    s = np.array([1.0, 2.0, 4.0, 8.0]) * 1e-6
    F = as_fields(np.diag(s), 2)
    r = steerability(lin_basis(F))
    assert r.rank == 4 and r.condition == pytest.approx(8.0)
    assert np.allclose(r.axis_speeds, [[1e-6, 1e-6, 2e-6, 2e-6], [4e-6, 4e-6, 8e-6, 8e-6]], rtol=1e-7)
    r = steerability(lin_basis(F[:3]))
    assert r.rank == 3 and r.condition == np.inf and not r.steerable


def test_cannot_hold_still_reports_rest_distance():
    """Drift (1, 0) um/s against fields of 0.5 um/s along +-x, +-y: nearest point (0.5, 0)."""
    F = np.array([[[0.5, 0]], [[-0.5, 0]], [[0, 0.5]], [[0, -0.5]]]) * 1e-6
    r = steerability(ts_basis(F, drift=[[1e-6, 0]]))
    assert not r.steerable
    assert r.rest_distance == pytest.approx(0.5e-6, rel=1e-6)
    assert np.allclose(r.worst_direction, [[-1, 0]], atol=1e-6)
    assert "cannot hold still" in r.summary()


def test_body_speeds_match_per_body_analysis():
    rng = np.random.default_rng(5)
    F = rng.normal(size=(5, 30, 2)) * 1e-6
    d = rng.normal(size=(30, 2)) * 3e-7
    for b in (lin_basis(F, drift=d), ts_basis(F, drift=d)):
        sp_, _ = body_speeds(b)
        each = [steerability(restrict(b, [i])).speed for i in range(30)]
        assert np.allclose(sp_, each, rtol=1e-9, atol=1e-18)
        assert (sp_ == 0).any() or b.mode == "linear"


def test_method_none_and_bad_input():
    F = as_fields(np.vstack([np.eye(2), -np.eye(2)]) * 1e-6, 1)
    r = steerability(ts_basis(F), method="none")
    assert r.steerable and np.isnan(r.speed)
    with pytest.raises(ActuatorError, match="method"):
        steerability(ts_basis(F), method="fast")
    with pytest.raises(ActuatorError, match="rtol"):
        steerability(ts_basis(F), rtol=2.0)
    with pytest.raises(ActuatorError, match="FieldBasis"):
        steerability(np.zeros((4, 1, 2)))
    with pytest.raises(ActuatorError, match="restrict"):
        restrict(ts_basis(F), [3])
    with pytest.raises(ActuatorError, match="subset"):
        subset(ts_basis(F), [0, 0])


def test_subset_holds_dropped_channels_at_idle():
    """Linear subset: predicted displacement equals the full basis with dropped channels at idle."""
    rng = np.random.default_rng(2)
    F = rng.normal(size=(4, 2, 2)) * 1e-6
    b = lin_basis(F, lower=[0.5, -1, -1, 0.2], upper=[2.0, 1, 1, 1])
    sub = subset(b, [1, 2])
    u = np.array([0.3, -0.7])
    full_u = np.array([b.idle[0], 0.3, -0.7, b.idle[3]])
    assert np.allclose(sub.displacement(u, 2.0), b.displacement(full_u, 2.0))


# -- maps and the count curve ---------------------------------------------------------------------------
BEAD = Body("bead", 1e-6, 1050.0)


def ring_sources(K, radius=1e-3):
    ang = 2 * np.pi * np.arange(K) / K
    return radius * np.stack([np.cos(ang), np.sin(ang)], axis=1)


def test_count_curve_drops_at_half_the_inputs():
    """Counting rule (PHYSICS-NOTES.md, rank): K = 8 affine inputs steer N <= 4 bodies, never 5."""
    K = 8
    act = SourceArray(ring_sources(K))
    ws = Workspace((-0.8e-3, -0.8e-3, 0.8e-3, 0.8e-3), medium=water())
    fn = basis_function(act, BEAD, ws.medium)
    c = count_curve(fn, ws, range(1, K // 2 + 3), trials=30 if FULL else 12, rng=0, separation=50e-6)
    frac = dict(zip(c.counts.tolist(), c.fraction.tolist()))
    assert all(frac[n] >= 0.9 for n in range(1, K // 2 + 1)), frac
    assert frac[K // 2 + 1] == 0.0 and frac[K // 2 + 2] == 0.0
    assert c.max_steerable() == K // 2 and c.counting_limit == K / 2
    assert np.all(c.low <= c.fraction) and np.all(c.fraction <= c.high)


def test_count_curve_executor_matches_serial():
    act = SourceArray(ring_sources(6))
    ws = Workspace((-0.8e-3, -0.8e-3, 0.8e-3, 0.8e-3), medium=water())
    fn = basis_function(act, BEAD, ws.medium)
    a = count_curve(fn, ws, [2, 3, 4], trials=6, rng=4)
    with ThreadPoolExecutor(2) as ex:
        b = count_curve(fn, ws, [2, 3, 4], trials=6, rng=4, executor=ex)
    assert np.array_equal(a.fraction, b.fraction)
    with pytest.raises(ActuatorError, match="counts"):
        count_curve(fn, ws, [0, 1])


def test_speed_map_source_array():
    """Single body between four pulling sources: steerable in the middle (the four pull directions
    positively span), and map values equal the per-point analysis."""
    act = SourceArray(ring_sources(4))
    ws = Workspace((-0.5e-3, -0.5e-3, 0.5e-3, 0.5e-3), medium=water())
    fn = basis_function(act, BEAD, ws.medium)
    m = speed_map(fn, ws, shape=(9, 11))
    assert m.speed.shape == (9, 11) and m.free.all()
    assert np.all(m.speed[m.free] > 0)
    j, i = 4, 7
    r = steerability(fn(np.array([[m.xs[i], m.ys[j]]])))
    assert m.speed[j, i] == pytest.approx(r.speed, rel=1e-9)
    fig = plot_speed_map(m, workspace=ws)
    ax = fig.axes[0]
    assert ax.get_xlabel() in ("x [mm]", "x [µm]")   # the one label style (fieldplan.plots.axis_label)
    assert any("worst-direction speed" in a.get_ylabel() for a in fig.axes[1:])


# -- design helpers ------------------------------------------------------------------------------------
def test_selection_never_worse_than_random_subsets():
    """Greedy + swaps against independent random subsets of the same size, on the same measure."""
    rng = np.random.default_rng(21)
    K, npts = 14, 60
    for seed, budget in ((0, 4), (1, 6), (2, 9)):
        g = np.random.default_rng(seed)
        F = g.normal(size=(K, npts, 2)) * g.uniform(0.1, 2.0, size=(K, 1, 1)) * 1e-6
        d = g.normal(size=(npts, 2)) * 1e-7
        for b in (ts_basis(F, drift=d), lin_basis(F, drift=d)):
            sel = select_primitives(b, budget, rng=seed)
            assert len(set(sel.indices)) == budget
            # Recompute the measure independently of the selection code.
            own = body_speeds(subset(b, sel.indices))[0].mean()
            assert sel.score == pytest.approx(own, rel=1e-12)
            for _ in range(15):
                idx = rng.choice(K, size=budget, replace=False)
                assert own >= body_speeds(subset(b, idx))[0].mean() * (1 - 1e-12)
            assert sel.score >= sel.random_scores.max() * (1 - 1e-12)


def test_selection_joint_mode_and_names():
    g = np.random.default_rng(8)
    bases = [ts_basis(g.normal(size=(10, 2, 2)) * 1e-6) for _ in range(3)]
    sel = select_primitives(bases, 6, joint=True, n_random=6, rng=1)
    assert sel.names == [f"p{k}" for k in sel.indices]
    for _ in range(6):
        idx = g.choice(10, size=6, replace=False)
        rand = np.mean([steerability(subset(b, idx)).speed for b in bases])
        assert sel.score >= rand * (1 - 1e-9)
    with pytest.raises(ActuatorError, match="budget"):
        select_primitives(bases, 11)


# -- symmetry ------------------------------------------------------------------------------------------
class ModeField(Actuator):
    """Analytic test actuator with plate-like fields: channel k drives bodies along the gradient of
    Phi_k = cos(a_k (x - x0) / L) cos(b_k y / L + c_k). Each Phi_k is even in x - x0, so every field
    is mirror-symmetric about the line x = x0 (x-component odd, y-component even). ``x0`` plays the
    part of the drive point; ``affine=False`` squares the input (time-shared primitives)."""

    MODES = ((1.0, 1.3, 0.2), (2.1, 0.7, 1.1), (0.6, 2.4, 0.5), (1.7, 1.9, 2.0), (2.9, 0.4, 0.9), (0.3, 3.1, 1.6))

    def __init__(self, x0=0.0, L=1e-3, speed=1e-5, affine=True):
        self.x0, self.L, self.speed, self.affine = float(x0), float(L), float(speed), bool(affine)
        self.tags = frozenset({"affine_in_input", "zero_idle"} if affine else {"zero_idle"})
        self.extent = (-L, L, -L, L)
        self._channels = tuple(Channel(f"mode_{k}", "1", -1.0, 1.0) for k in range(len(self.MODES)))

    @property
    def channels(self):
        return self._channels

    def _velocity(self, body, medium, xy, u):
        s = (xy[:, 0] - self.x0) / self.L
        t = xy[:, 1] / self.L
        gain = u if self.affine else u * np.abs(u)
        v = np.zeros_like(xy)
        for g, (a, b, c) in zip(gain, self.MODES):
            v[:, 0] += g * (-a * np.sin(a * s) * np.cos(b * t + c))
            v[:, 1] += g * (-b * np.cos(a * s) * np.sin(b * t + c))
        return self.speed * v


def test_mode_field_passes_the_actuator_contract():
    check_actuator(ModeField(), [BEAD], water())
    check_actuator(ModeField(0.3e-3, affine=False), [BEAD], water())


@pytest.mark.parametrize("affine", [True, False])
def test_mirror_symmetric_fields_pair_not_separable_and_line_body_stuck(affine):
    """PHYSICS-NOTES.md (symmetry): with every field mirror-symmetric, bodies at mirror-image positions
    move as mirror images and a body on the mirror line stays on it; breaking the symmetry (moving
    the drive point off the line) makes both steerable."""
    sym = basis_function(ModeField(0.0, affine=affine), BEAD, water())
    rep = mirror_check(sym, [0.31e-3, 0.17e-3], [0.0, 0.0], [0.0, 1.0])
    assert not rep.pair_separable
    assert not rep.can_leave_line and rep.leave_speed <= 1e-6 * 1e-5
    assert not rep.line.steerable
    texts = [o.text for o in rep.pair.obstructions]
    assert any("vx0 + vx1" in t for t in texts) and any("vy0 - vy1" in t for t in texts), texts
    assert all(o.two_sided and o.bodies == (0, 1) for o in rep.pair.obstructions)
    assert [o.text.startswith("body 0 cannot move along (1, 0)") for o in rep.line.obstructions] == [True]

    off = basis_function(ModeField(0.23e-3, affine=affine), BEAD, water())
    rep = mirror_check(off, [0.31e-3, 0.17e-3], [0.0, 0.0], [0.0, 1.0])
    assert rep.pair_separable and rep.pair.speed > 0
    assert rep.can_leave_line and rep.line.steerable


def test_symmetry_report_and_dead_line_on_map():
    sym = basis_function(ModeField(0.0), BEAD, water())
    p = np.array([0.31e-3, 0.17e-3])
    rep = symmetry_report(sym(np.array([p, [-p[0], p[1]], [0.0, -0.2e-3]])))
    assert [i for i, _ in rep.stuck] == [2]
    assert [(i, j) for i, j, _ in rep.inseparable] == [(0, 1)]
    assert "cannot be separated" in rep.summary()
    off = basis_function(ModeField(0.23e-3), BEAD, water())
    rep = symmetry_report(off(np.array([p, [-p[0], p[1]], [0.0, -0.2e-3]])))
    assert rep.stuck == [] and rep.inseparable == []

    ws = Workspace((-0.5e-3, -0.5e-3, 0.5e-3, 0.5e-3), medium=water())
    m = speed_map(sym, ws, shape=(15, 15))             # odd nx: the middle column is x = 0
    mid = np.argmin(np.abs(m.xs))
    assert abs(m.xs[mid]) < 1e-15 and m.dead[:, mid].all()
    assert np.allclose(np.abs(m.direction[:, mid, 0]), 1.0)      # blocked direction is the normal
    m2 = speed_map(off, ws, shape=(15, 15))
    assert not m2.dead[:, mid].any()
    assert m2.dead_fraction < m.dead_fraction


def test_compare_designs_centre_vs_off_centre():
    ws = Workspace((-0.5e-3, -0.5e-3, 0.5e-3, 0.5e-3), medium=water())
    designs = {"centre": ModeField(0.0), "off-centre": ModeField(0.23e-3)}
    cmp = compare_designs(designs, BEAD, ws, counts=(1, 2, 3), trials=6, shape=(11, 11), rng=3)
    rows = {r["name"]: r for r in cmp.rows}
    assert rows["off-centre"]["dead_fraction"] < rows["centre"]["dead_fraction"]
    assert rows["off-centre"]["max_steerable"] >= rows["centre"]["max_steerable"]
    assert rows["centre"]["fractions"][3] <= 1.0 and rows["centre"]["size"] == 6
    assert "off-centre" in cmp.table()
    fig = plot_comparison(cmp)
    assert len(fig.axes) >= 3
    fig = plot_count_curve(cmp.curves)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "number of bodies N [1]"
    assert ax.get_legend() is not None


def test_obstructions_of_a_blocked_body_and_pair():
    """Hand-built: body 0 has no y field, bodies 1 and 2 always move together along x."""
    F = np.zeros((4, 3, 2))
    F[0, 0] = [1, 0]
    F[1, 1] = [1, 0]
    F[1, 2] = [1, 0]
    F[2, 1] = [0, 1]
    F[3, 2] = [0, 1]
    obs = obstructions(lin_basis(F * 1e-6))
    texts = sorted(o.text for o in obs)
    assert len(obs) == 2
    assert any(t.startswith("body 0 cannot move along (0, 1)") for t in texts)
    assert any("vx1 - vx2" in t and "cannot be moved independently" in t for t in texts)


def test_summaries_and_labels():
    act = SourceArray(ring_sources(6))
    ws = Workspace((-0.5e-3, -0.5e-3, 0.5e-3, 0.5e-3), medium=water())
    fn = basis_function(act, BEAD, ws.medium)
    m = speed_map(fn, ws, shape=(5, 5))
    assert "µm/s" in m.summary() and "dead 0.0 %" in m.summary()
    c = count_curve(fn, ws, [3, 4], trials=3, rng=1)
    assert "N=3: 1.00" in c.summary() and "N=4: 0.00" in c.summary()
    F = np.zeros((2, 3, 2))
    F[0, 2] = [1e-6, 0]
    F[1, 2] = [0, 1e-6]
    obs = obstructions(restrict(lin_basis(F), [0]), labels=[7])
    assert [o.bodies for o in obs] == [(7,), (7,)]
    assert sorted(o.text.split(": ")[1].split(" =")[0] for o in obs) == ["vx7", "vy7"]
    with pytest.raises(ActuatorError, match="labels"):
        obstructions(lin_basis(F), labels=[1])
    with pytest.raises(ActuatorError, match="bodies"):
        compare_designs({"a": act}, [BEAD, BEAD], ws)


def test_rank_limit_of_opposite_primitives():
    """Time-shared +-u primitives of 4 affine channels give 8 fields but only rank 4: at most N = 2."""
    act = SourceArray(ring_sources(4), affine=False)
    ws = Workspace((-0.5e-3, -0.5e-3, 0.5e-3, 0.5e-3), medium=water())
    c = count_curve(basis_function(act, BEAD, ws.medium), ws, [1, 2, 3], trials=4, rng=0)
    assert c.size == 8 and c.counting_limit == 3.5   # (M - 1)/2 for M = 8 time-shared primitives
    assert c.rank_limit == 2.0
    assert c.fraction[2] == 0.0 and "field rank / 2 = 2" in c.summary()
