"""Steerability: which combined motions of all bodies a field basis makes available now, and how fast.

A :class:`~fieldplan.FieldBasis` defines the set ``V`` of average velocities (stacked over all
bodies, a subset of R^{2n}) reachable over one period:

* ``linear`` mode, channel box ``[lower, upper]``:
  ``V = {drift + sum_k u_k fields_k : lower <= u <= upper}``, a zonotope;
* ``timeshare`` mode, primitive ``k`` held for a fraction ``r_k`` of the period:
  ``V = {drift + sum_k r_k fields_k : r >= 0, sum r <= 1} = conv{drift, drift + fields_k}``,
  a polytope.

The bodies are *steerable now* when ``V`` contains a neighbourhood of zero velocity: every
direction of motion of all bodies together is available, with the others held still. The
*worst-direction speed* is the radius of the largest ball about zero inside ``V``, equal to
``min over unit c of h_V(c)``, where ``h_V(c) = max_{v in V} c . v`` is the support function
(closed form for both kinds of set). It is zero when the bodies are not steerable.

How it is computed (method and error, also stated in each result):

* Steerable or not: one linear program (HiGHS) that finds, for every coordinate axis ``+-e_j``
  of R^{2n}, the largest speed ``t_j`` with ``t_j e_j`` in ``V`` ("axis speeds": move one body
  along x or y while all others stay still). ``0`` is interior to ``V`` exactly when all
  ``t_j > 0``, since ``conv{+-t_j e_j}`` then contains a ball. Decided with a tolerance ``rtol``
  relative to the largest achievable speed.
* Exact speed for small problems: the minimum of ``h_V`` over all candidate facet normals —
  normals of every (2n-1)-subset of generators (zonotope) or of every 2n-subset of vertices
  (polytope), or the facets from Qhull (``scipy.spatial.ConvexHull``). The minimum over any
  superset of the facet normals is exact because ``h_V(c) >= r`` for every unit ``c``.
* Bounds for larger problems: an upper bound from a local search — the linearised problem
  ``min h_V(c) s.t. c0 . c = 1`` is an LP whose solution, normalised, never increases ``h_V``
  (a convex-concave iteration), run from many starts in one block LP per iteration — and the
  axis speeds themselves; a rigorous lower bound from the cross-polytope ``conv{+-t_j e_j}``
  (inradius ``(sum_j 1/min(t_+j, t_-j)^2)^(-1/2)``) and, for zonotopes, the inscribed ellipsoid
  of the channel box. The bracket is never wider than a factor ``sqrt(2n)``.
"""

from __future__ import annotations

import itertools
import math
import sys
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog, lsq_linear, minimize
from scipy.spatial import ConvexHull

from .actuator import Actuator, FieldBasis
from .body import Body
from .errors import ActuatorError
from .units import format_quantity

__all__ = [
    "Steerability",
    "Obstruction",
    "steerability",
    "steerable",
    "body_speeds",
    "obstructions",
    "restrict",
    "subset",
    "basis_function",
    "counting_limit",
    "SpeedMap",
    "speed_map",
    "CountCurve",
    "count_curve",
    "Selection",
    "select_primitives",
    "DesignComparison",
    "compare_designs",
    "SymmetryReport",
    "symmetry_report",
    "MirrorReport",
    "mirror_check",
]

#: Default relative tolerance: a speed below ``RTOL`` times the largest achievable speed counts as
#: zero. HiGHS works to a feasibility tolerance of 1e-7 on data normalised to order one, so
#: anything much smaller than 1e-6 would be decided by round-off.
RTOL = 1e-6

# Relative singular-value threshold of the numerical rank; fields computed by quadrature or
# from mode shapes are symmetric to ~1e-10 at best, so a smaller threshold would miss symmetry.
_RANK_RTOL = 1e-8

# Most candidate normals enumerated for an exact speed before switching to bounds.
MAX_CANDIDATES = 60_000


# -- the velocity set ---------------------------------------------------------------------------
class _VSet:
    """The achievable velocity set of one configuration, normalised so speeds are of order one.

    ``kind == "zonotope"``: ``V = center + gens.T @ [-1, 1]^K``;
    ``kind == "polytope"``: ``V = conv(points)``. Coordinates are divided by ``scale`` (m/s),
    an upper bound on the largest achievable speed (exact for polytopes).
    """

    def __init__(self, kind, scale, center=None, gens=None, points=None, origin=None, span=None):
        self.kind = kind
        self.scale = scale
        self.center = center
        self.gens = gens
        self.points = points
        self.origin = origin      # a point of V (normalised): drift, for the affine hull
        self.span = span          # (m, D) vectors spanning the directions V extends in

    @property
    def dim(self):
        return (self.center if self.kind == "zonotope" else self.points[0]).shape[0]

    @classmethod
    def from_basis(cls, basis):
        if not isinstance(basis, FieldBasis):
            raise ActuatorError(f"expected a fieldplan.FieldBasis, got {type(basis).__name__}.")
        if basis.n_bodies == 0:
            raise ActuatorError("the FieldBasis has no bodies (fields of shape (K, 0, 2)).")
        A = basis.matrix()
        d = basis.drift.reshape(-1)
        if not (np.all(np.isfinite(A)) and np.all(np.isfinite(d))):
            raise ActuatorError("the FieldBasis has non-finite fields or drift.")
        if basis.mode == "linear":
            lo, hi = basis.lower, basis.upper
            half = 0.5 * (hi - lo)
            center = d + A @ (0.5 * (hi + lo))
            gens = (A * half).T
            keep = np.linalg.norm(gens, axis=1) > 0
            gens = gens[keep]
            scale = float(np.linalg.norm(center) + np.linalg.norm(gens, axis=1).sum())
            s = scale if scale > 0 else 1.0
            return cls("zonotope", scale, center=center / s, gens=gens / s, origin=center / s, span=gens / s)
        pts = np.vstack([d[None, :], d[None, :] + A.T])
        scale = float(np.max(np.linalg.norm(pts, axis=1)))
        s = scale if scale > 0 else 1.0
        return cls("polytope", scale, points=pts / s, origin=pts[0] / s, span=A.T / s)

    def support(self, C):
        """``h_V`` at the rows of ``C`` (m, D), normalised units."""
        C = np.atleast_2d(C)
        if self.kind == "zonotope":
            return C @ self.center + np.abs(C @ self.gens.T).sum(axis=1)
        return (C @ self.points.T).max(axis=1)


# -- linear programs ----------------------------------------------------------------------------
def _block_diag(blocks):
    """CSR block-diagonal matrix from a dense stack ``blocks`` (m, r, c) (one construction, no loop)."""
    m, r, c = blocks.shape
    nz = np.nonzero(blocks)
    rows = nz[0] * r + nz[1]
    cols = nz[0] * c + nz[2]
    return sp.csr_matrix((blocks[nz], (rows, cols)), shape=(m * r, m * c))


def _axis_blocks(vs, dirs):
    """Equality blocks of ``t_j dirs[j] in V``: (A blocks (m, r, nv), b (r,), lb (nv,), ub (nv,))."""
    m, D = dirs.shape
    if vs.kind == "zonotope":
        G = vs.gens.T                                   # (D, K)
        K = G.shape[1]
        blocks = np.zeros((m, D, K + 1))
        blocks[:, :, :K] = G
        blocks[:, :, K] = -dirs
        return blocks, -vs.center, np.r_[-np.ones(K), -2.0], np.r_[np.ones(K), 2.0]
    P = vs.points.T                                     # (D, J)
    J = P.shape[1]
    blocks = np.zeros((m, D + 1, J + 1))
    blocks[:, :D, :J] = P
    blocks[:, D, :J] = 1.0
    blocks[:, :D, J] = -dirs
    return blocks, np.r_[np.zeros(D), 1.0], np.r_[np.zeros(J), -2.0], np.r_[np.full(J, np.inf), 2.0]


def _axis_lp(vs, dirs, normals=False):
    """Largest ``t_j`` with ``t_j dirs[j]`` in ``V`` for each row of ``dirs`` (m, D), normalised.

    One block LP (the blocks are independent, so maximising the sum maximises each); ``-inf``
    marks a direction whose line misses ``V``. If some line misses ``V`` the block LP is
    infeasible; a phase-one LP (least L1 slack per block) then finds which, and the block LP is
    re-solved on the others.
    """
    m = dirs.shape[0]
    blocks, b, lb, ub = _axis_blocks(vs, dirs)
    r, nv = blocks.shape[1:]
    cost = np.zeros(nv)
    cost[nv - 1] = -1.0
    res = linprog(np.tile(cost, m), A_eq=_block_diag(blocks), b_eq=np.tile(b, m),
                  bounds=np.c_[np.tile(lb, m), np.tile(ub, m)], method="highs")
    if res.status == 0:
        if normals:
            # The equality duals of block j are a normal of V at its boundary point t_j dirs[j]
            # (LP duality: t_j = min {h_V(c) : dirs[j] . c = 1}); good starts for the local search.
            y = res.eqlin.marginals.reshape(m, r)[:, :dirs.shape[1]]
            return res.x[nv - 1::nv].copy(), y
        return res.x[nv - 1::nv].copy()
    # Phase one: blocks [A, I, -I] with slack cost.
    eye = np.broadcast_to(np.eye(r), (m, r, r))
    ext = np.concatenate([blocks, eye, -eye], axis=2)
    c1 = np.r_[np.zeros(nv), np.ones(2 * r)]
    lb1, ub1 = np.r_[lb, np.zeros(2 * r)], np.r_[ub, np.full(2 * r, np.inf)]
    res = linprog(np.tile(c1, m), A_eq=_block_diag(ext), b_eq=np.tile(b, m),
                  bounds=np.c_[np.tile(lb1, m), np.tile(ub1, m)], method="highs")
    slack = res.x.reshape(m, -1)[:, nv:].sum(axis=1) if res.status == 0 else np.ones(m)
    out = np.full(m, -np.inf)
    ok = slack <= 1e-9
    if ok.any():
        k = int(ok.sum())
        res = linprog(np.tile(cost, k), A_eq=_block_diag(blocks[ok]), b_eq=np.tile(b, k),
                      bounds=np.c_[np.tile(lb, k), np.tile(ub, k)], method="highs")
        if res.status == 0:
            out[ok] = res.x[nv - 1::nv]
    return (out, None) if normals else out


def _local_search(vs, starts, max_iter=40, prune=1.5):
    """Local minima of ``h_V`` on the unit sphere from the rows of ``starts`` (s, D).

    Each iteration solves ``min h_V(c) s.t. c0 . c = 1`` for all starts in one block LP. Since
    ``|c| >= c0 . c = 1``, ``h_V(c/|c|) <= h_V(c) <= h_V(c0)``: the value never increases.
    Requires 0 interior to ``V`` (otherwise the LP may be unbounded; a box keeps it finite).
    """
    C = starts / np.linalg.norm(starts, axis=1, keepdims=True)
    h = vs.support(C)
    active = np.arange(len(C))
    D = C.shape[1]
    box = 1e4
    if vs.kind == "zonotope":
        G = vs.gens                                      # (K, D)
        K = G.shape[0]
        nv = D + K
        blk_ub = np.block([[G, -np.eye(K)], [-G, -np.eye(K)]])
        cost = np.r_[vs.center, np.ones(K)]
        lb = np.r_[np.full(D, -box), np.zeros(K)]
        ub = np.r_[np.full(D, box), np.full(K, np.inf)]
    else:
        P = vs.points                                    # (J, D)
        J = P.shape[0]
        nv = D + 1
        blk_ub = np.c_[P, -np.ones(J)]
        cost = np.r_[np.zeros(D), 1.0]
        lb = np.r_[np.full(D, -box), -np.inf]
        ub = np.r_[np.full(D, box), np.inf]
    for _ in range(max_iter):
        if active.size == 0:
            break
        s = active.size
        A_ub = _block_diag(np.broadcast_to(blk_ub, (s,) + blk_ub.shape))
        eq = np.zeros((s, 1, nv))
        eq[:, 0, :D] = C[active]
        res = linprog(np.tile(cost, s), A_ub=A_ub, b_ub=np.zeros(A_ub.shape[0]), A_eq=_block_diag(eq),
                      b_eq=np.ones(s), bounds=np.c_[np.tile(lb, s), np.tile(ub, s)], method="highs")
        if res.status != 0:
            break
        X = res.x.reshape(s, nv)[:, :D]
        nrm = np.linalg.norm(X, axis=1)
        ok = nrm > 0
        Cn = np.where(ok[:, None], X / np.where(ok, nrm, 1.0)[:, None], C[active])
        hn = vs.support(Cn)
        better = hn < h[active] - 1e-12 * np.maximum(np.abs(h[active]), 1e-300)
        C[active[better]] = Cn[better]
        h[active[better]] = hn[better]
        active = active[better]
        # Stop following starts far above the best value found: a local descent rarely halves.
        active = active[h[active] <= prune * h.min()]
    return h, C


def _distance_to_set(vs):
    """Distance from zero velocity to ``V``, normalised, and the nearest point of ``V``."""
    if vs.kind == "zonotope":
        if vs.gens.shape[0] == 0:
            return float(np.linalg.norm(vs.center)), vs.center
        res = lsq_linear(vs.gens.T, -vs.center, bounds=(-1.0, 1.0), method="bvls", tol=1e-14)
        p = vs.center + vs.gens.T @ res.x
        return float(np.linalg.norm(p)), p
    P = vs.points
    J = len(P)
    Q = P @ P.T
    x0 = np.full(J, 1.0 / J)
    res = minimize(lambda x: x @ Q @ x, x0, jac=lambda x: 2 * Q @ x, method="SLSQP",
                   bounds=[(0, None)] * J, constraints=[{"type": "eq", "fun": lambda x: x.sum() - 1.0,
                                                        "jac": lambda x: np.ones(J)}],
                   options={"ftol": 1e-16, "maxiter": 500})
    x = np.clip(res.x, 0, None)
    x /= x.sum()
    p = x @ P
    return float(np.linalg.norm(p)), p


# -- exact speeds ---------------------------------------------------------------------------------
def _null_vectors(M, rtol=1e-10):
    """Unit normals of batches of (D-1) vectors in R^D: ``M`` (B, D-1, D) -> (B, D), valid (B,).

    Solves ``M[:, :, :-1] x = -M[:, :, -1]`` (normal ``(x, 1)``), several times faster than an SVD
    per matrix; the few subsets whose leading block is ill-conditioned (or whose normal has no
    last component) are redone by SVD, which also flags rank-deficient subsets as invalid.
    """
    B, r, D = M.shape
    # A fixed rotation keeps axis-aligned data (e.g. fields e_i) away from exactly singular blocks.
    R = np.linalg.qr(np.random.default_rng(12345).normal(size=(D, D)))[0]
    M = M @ R
    c = np.empty((B, D))
    redo = np.ones(B, dtype=bool)
    with np.errstate(all="ignore"):
        try:
            x = np.linalg.solve(M[:, :, :-1], -M[:, :, -1:])[..., 0]
            c[:, :-1] = x
            c[:, -1] = 1.0
            c /= np.linalg.norm(c, axis=1, keepdims=True)
            scale = np.linalg.norm(M, axis=(1, 2))
            resid = np.linalg.norm(np.einsum("brd,bd->br", M, c), axis=1)
            redo = ~(np.isfinite(resid) & (resid <= 1e-12 * scale) & (np.abs(c[:, -1]) > 1e-6))
        except np.linalg.LinAlgError:
            pass
    valid = ~redo
    if redo.any():
        _, sv, Vt = np.linalg.svd(M[redo])
        c[redo] = Vt[:, -1, :]
        valid[redo] = sv[:, -1] > rtol * np.maximum(sv[:, 0], 1e-300)
    return c @ R.T, valid


def _n_candidates(vs):
    D = vs.dim
    if vs.kind == "zonotope":
        return math.comb(vs.gens.shape[0], D - 1)
    return math.comb(vs.points.shape[0], D)


def _exact_enumerate(vs, chunk=4096):
    """Exact worst-direction speed (normalised) by enumerating candidate facet normals."""
    D = vs.dim
    best, best_c = np.inf, None
    if vs.kind == "zonotope":
        items, size = vs.gens, D - 1
    else:
        items, size = vs.points, D
    combos = itertools.combinations(range(items.shape[0]), size)
    while True:
        idx = np.array(list(itertools.islice(combos, chunk)), dtype=int)
        if idx.size == 0:
            break
        if vs.kind == "zonotope":
            M = items[idx]                                # (B, D-1, D)
        else:
            M = items[idx[:, 1:]] - items[idx[:, :1]]     # affine hull through D points
        c, valid = _null_vectors(M)
        c = c[valid]
        if len(c) == 0:
            continue
        c = np.vstack([c, -c])
        h = vs.support(c)
        j = int(np.argmin(h))
        if h[j] < best:
            best, best_c = float(h[j]), c[j]
    return best, best_c


def _exact_qhull(vs):
    """Exact worst-direction speed (normalised) from Qhull's facets of the polytope."""
    hull = ConvexHull(vs.points)
    # Rows are [unit normal, offset] with normal . x + offset <= 0 inside: h(normal) = -offset.
    h = -hull.equations[:, -1]
    j = int(np.argmin(h))
    return float(h[j]), hull.equations[j, :-1].copy()


def _exact_plan(vs, max_candidates):
    """Which exact method fits the budget: 'enumerate', 'qhull' or None."""
    D = vs.dim
    if _n_candidates(vs) <= max_candidates:
        return "enumerate"
    if vs.kind == "polytope":
        J = vs.points.shape[0]
        if (D <= 6 and J <= 200) or (D <= 8 and J <= 80) or (D <= 10 and J <= 24):
            return "qhull"
    return None


# -- results ----------------------------------------------------------------------------------------
@dataclass
class Obstruction:
    """A direction of combined motion that no input produces.

    Attributes
    ----------
    direction : ndarray, shape (n, 2)
        Unit vector ``c`` in R^{2n} (per body, x and y components).
    two_sided : bool
        True: ``c . v`` is the same for every achievable velocity ``v`` (the fields span nothing
        along ``c``); False: ``c . v`` cannot exceed ``rate`` but can be decreased.
    rate : float
        m/s. Two-sided: the fixed value of ``c . v`` (non-zero means drift along ``c`` that no
        input cancels). One-sided: the largest achievable ``c . v`` (<= 0, up to ``rtol``).
    bodies : tuple of int
        Bodies ``c`` involves (non-negligible components).
    text : str
        Human-readable statement.
    """

    direction: np.ndarray
    two_sided: bool
    rate: float
    bodies: tuple
    text: str


@dataclass
class Steerability:
    """Steerability of one configuration (see the module docstring for definitions and methods).

    Attributes
    ----------
    steerable : bool
        The achievable velocity set contains a ball about zero velocity.
    speed : float
        m/s, worst-direction speed (radius of that ball; 0 when not steerable; ``nan`` when not
        computed). For ``exact=False`` this is the upper bound ``speed_bounds[1]``; on random
        cases with 2n <= 8, where the exact value is known, it matched in about 95 % of cases and
        was within 2.5 % otherwise (tests/test_steer.py, and a 75-case study during development).
    speed_bounds : tuple of float
        (lower, upper), m/s; lower is rigorous, upper is the best direction found.
    exact : bool
    method : str
        How ``speed`` was computed, and its error.
    worst_direction : ndarray, shape (n, 2)
        Unit direction in R^{2n} of the slowest combined motion (or a blocked direction).
    axis_speeds : ndarray, shape (n, 4)
        m/s, largest speed of body i along +x, -x, +y, -y with every other body held still;
        0 where impossible.
    rank : int
        Numerical rank of the 2n x K field matrix ``basis.matrix()``.
    condition : float
        ``sigma_max / sigma_2n`` of that matrix (inf when rank < 2n): how unevenly the inputs
        reach the directions of motion. Units follow the channels, so compare like with like.
    singular_values : ndarray
        Of the same matrix, m/s per unit weight rate.
    rest_distance : float
        m/s, distance from zero velocity to the achievable set: 0 when all bodies can be held
        still; otherwise drift that no input cancels.
    obstructions : list of Obstruction
        When not steerable: the blocked directions (see :func:`obstructions`).
    n_bodies, size : int
        n and K.
    mode : str
    """

    steerable: bool
    speed: float
    speed_bounds: tuple
    exact: bool
    method: str
    worst_direction: np.ndarray
    axis_speeds: np.ndarray
    rank: int
    condition: float
    singular_values: np.ndarray
    rest_distance: float
    obstructions: list
    n_bodies: int
    size: int
    mode: str
    message: str = ""

    @property
    def success(self):
        """Alias of :attr:`steerable` (result-object convention)."""
        return self.steerable

    def summary(self):
        """A short multi-line text report (speeds with SI prefixes, :func:`fieldplan.units.format_quantity`)."""
        lo, hi = self.speed_bounds
        lines = [
            f"{self.n_bodies} bodies, {self.size} {'channels' if self.mode == 'linear' else 'primitives'} "
            f"({self.mode}): {'steerable' if self.steerable else 'NOT steerable'} now",
            f"  rank {self.rank} of {2 * self.n_bodies} needed, condition {self.condition:.3g}",
            f"  worst-direction speed {format_quantity(self.speed, 'm/s', 4)} "
            f"(bounds {format_quantity(lo, 'm/s', 4)} .. {format_quantity(hi, 'm/s', 4)}; {self.method})",
        ]
        if self.rest_distance > 0:
            lines.append(f"  cannot hold still: uncancelled drift {format_quantity(self.rest_distance, 'm/s', 4)}")
        for ob in self.obstructions[:8]:
            lines.append("  - " + ob.text)
        if len(self.obstructions) > 8:
            lines.append(f"  ... and {len(self.obstructions) - 8} more blocked directions")
        return "\n".join(lines)

    def __str__(self):
        return self.summary()


# -- main entry points ------------------------------------------------------------------------------
def _axis_dirs(D):
    E = np.eye(D)
    return np.vstack([E, -E])


def _span_rank(span):
    """Numerical rank of the rows of ``span`` (m, D), relative to the largest singular value."""
    if span.size == 0:
        return 0
    sv = np.linalg.svd(span, compute_uv=False)
    return int(np.sum(sv > _RANK_RTOL * sv[0])) if sv[0] > 0 else 0


def _rank(basis):
    A = basis.matrix()
    D = A.shape[0]
    s = np.linalg.svd(A, compute_uv=False) if A.size else np.zeros(0)
    tol = _RANK_RTOL * (s[0] if s.size else 0.0)
    rank = int(np.sum(s > tol)) if s.size and s[0] > 0 else 0
    cond = float(s[0] / s[D - 1]) if rank >= D else np.inf
    return rank, cond, s


def steerable(basis, *, rtol=RTOL):
    """Whether the bodies can be steered in every direction now (one linear program).

    Parameters
    ----------
    basis : FieldBasis
    rtol : float
        Speeds below ``rtol`` times the largest achievable speed count as zero.

    Returns
    -------
    bool

    Examples
    --------
    >>> import numpy as np
    >>> from fieldplan import Channel, FieldBasis
    >>> ch = tuple(Channel(f"c{k}", "A", -1, 1) for k in range(2))
    >>> steerable(FieldBasis("linear", np.array([[[1e-6, 0]], [[0, 1e-6]]]), np.zeros((1, 2)), ch))
    True
    """
    vs = _VSet.from_basis(basis)
    D = vs.dim
    if vs.scale == 0 or _span_rank(vs.span) < D:
        return False
    t = _axis_lp(vs, _axis_dirs(D))
    return bool(np.min(t) > rtol)


def steerability(basis, *, method="auto", rtol=RTOL, starts=12, rng=0, max_candidates=MAX_CANDIDATES):
    """Rank, condition, steerability and worst-direction speed of one configuration.

    Parameters
    ----------
    basis : FieldBasis
        Fields at the bodies' current positions (``actuator.basis(bodies, medium, xy)``).
    method : {"auto", "exact", "bounds", "none"}
        How to compute the worst-direction speed: ``"exact"`` enumerates facet normals or calls
        Qhull (cost grows combinatorially with 2n); ``"bounds"`` gives the LP bracket;
        ``"auto"`` is exact when at most ``max_candidates`` candidate normals (or a small Qhull
        problem), else bounds; ``"none"`` only decides steerability (``speed`` is nan).
    rtol : float
        Speeds below ``rtol`` times the largest achievable speed count as zero.
    starts : int
        Starting directions of the local search (``"bounds"``).
    rng : int or numpy.random.Generator
        Seed of the random starting directions.
    max_candidates : int

    Returns
    -------
    Steerability

    Examples
    --------
    Three fields 120 degrees apart, time-shared, steer one body; their triangle's inradius is
    half the circumradius:

    >>> import numpy as np
    >>> from fieldplan import Channel, FieldBasis, Primitive
    >>> ang = 2 * np.pi * np.arange(3) / 3
    >>> f = 1e-5 * np.stack([np.cos(ang), np.sin(ang)], axis=1)[:, None, :]   # (3, 1, 2) m/s
    >>> prims = tuple(Primitive(f"p{k}", (k,)) for k in range(3))
    >>> b = FieldBasis("timeshare", f, np.zeros((1, 2)), (Channel("sel", "1", 0, 3),), prims)
    >>> r = steerability(b)
    >>> r.steerable, round(r.speed * 1e6, 6)
    (True, 5.0)
    """
    if method not in ("auto", "exact", "bounds", "none"):
        raise ActuatorError(f"steerability: method must be 'auto', 'exact', 'bounds' or 'none', got {method!r}.")
    if not (isinstance(rtol, (int, float)) and 0 < rtol < 1):
        raise ActuatorError(f"steerability: rtol must be a number in (0, 1), got {rtol!r}.")
    vs = _VSet.from_basis(basis)
    n, K, D = basis.n_bodies, basis.size, 2 * basis.n_bodies
    rank, cond, svals = _rank(basis)
    s = vs.scale
    span = vs.span
    span_rank = _span_rank(span) if s > 0 else 0
    # Axis speeds are informative even for a flat set (a body may still move alone along x), but
    # only axes inside the span of the fields can have a non-zero one.
    dirs = _axis_dirs(D)
    if s > 0 and span_rank == D:
        t, y = _axis_lp(vs, dirs, normals=True)
    else:
        t, y = np.zeros(2 * D), None
        if s > 0 and span_rank > 0:
            Q = np.linalg.svd(span, full_matrices=False)[2][:span_rank]
            inside = np.linalg.norm(dirs @ Q.T, axis=1) > 1 - 1e-9
            if inside.any():
                t[inside] = _axis_lp(vs, dirs[inside])
    t_clip = np.where(np.isfinite(t), np.maximum(t, 0.0), 0.0)
    axis = (t_clip * s).reshape(2, n, 2)                  # (sign, body, xy)
    axis_speeds = np.stack([axis[0, :, 0], axis[1, :, 0], axis[0, :, 1], axis[1, :, 1]], axis=1)
    is_steerable = bool(s > 0 and span_rank == D and np.min(t) > rtol)

    if not is_steerable:
        dist, p = _distance_to_set(vs) if s > 0 else (0.0, np.zeros(D))
        rest = dist * s if dist > rtol else 0.0
        obs = obstructions(basis, rtol=rtol, _vs=vs, _t=t if span_rank == D else None)
        if dist > rtol:
            worst = -p / np.linalg.norm(p)
        elif obs:
            worst = obs[0].direction.reshape(-1)
        else:
            worst = np.zeros(D)
        msg = f"not steerable: {len(obs)} blocked direction(s)" + (f"; first: {obs[0].text}" if obs else "")
        return Steerability(False, 0.0, (0.0, 0.0), True, "LP axis test: 0 not interior", worst.reshape(n, 2),
                            axis_speeds, rank, cond, svals, rest, obs, n, K, basis.mode, msg)

    if method == "none":
        return Steerability(True, np.nan, (np.nan, np.nan), False, "not computed (method='none')",
                            np.full((n, 2), np.nan), axis_speeds, rank, cond, svals, 0.0, [], n, K,
                            basis.mode, "steerable")

    plan = None
    if method in ("auto", "exact"):
        plan = _exact_plan(vs, max_candidates)
        if method == "exact" and plan is None:
            plan = "enumerate"
    if plan == "enumerate":
        r, c = _exact_enumerate(vs)
        how = (f"exact: minimum of the support function over all {_n_candidates(vs)} candidate facet normals "
               f"({'zonotope generator' if vs.kind == 'zonotope' else 'vertex'} subsets)")
        return Steerability(True, r * s, (float(r * s), float(r * s)), True, how, c.reshape(n, 2), axis_speeds, rank,
                            cond, svals, 0.0, [], n, K, basis.mode, "steerable")
    if plan == "qhull":
        r, c = _exact_qhull(vs)
        return Steerability(True, r * s, (float(r * s), float(r * s)), True,
                            "exact: nearest facet of the Qhull convex hull",
                            c.reshape(n, 2), axis_speeds, rank, cond, svals, 0.0, [], n, K, basis.mode,
                            "steerable")

    # Bounds.
    rng = np.random.default_rng(rng)
    m = np.minimum(t[:D], t[D:])                          # radial value along each axis (both signs)
    lower = 1.0 / np.sqrt(np.sum(1.0 / m**2))
    if vs.kind == "zonotope" and vs.gens.shape[0] >= D:
        sig = np.linalg.svd(vs.gens, compute_uv=False)[D - 1]
        lower = max(lower, sig - float(np.linalg.norm(vs.center)))
    cand = [_axis_dirs(D)]
    first = np.zeros((0, D))
    if y is not None:
        dots = np.einsum("ij,ij->i", y, _axis_dirs(D))
        good = np.abs(dots) > 1e-12 * np.linalg.norm(y, axis=1)
        normals = y[good] / dots[good, None]
        cand.append(normals)
        # The normal at the nearest axis boundary point has h = min t: always start there, so
        # the upper bound is never worse than the axis speeds.
        jbest = int(np.argmin(np.where(good, t, np.inf)))
        if good[jbest]:
            first = (y[jbest] / dots[jbest])[None, :]
    U = np.linalg.svd(span.T, full_matrices=False)[0]
    cand += [U[:, -min(D, 4):].T, -U[:, -min(D, 4):].T]
    o = vs.center if vs.kind == "zonotope" else vs.origin
    if np.linalg.norm(o) > 0:
        cand.append(-o[None, :])
    cand.append(rng.normal(size=(max(starts, 4), D)))
    cand = np.vstack(cand)
    cand = cand / np.linalg.norm(cand, axis=1, keepdims=True)
    # Start from the lowest-support candidates (a local search only ever goes down).
    st = np.vstack([first, cand[np.argsort(vs.support(cand))[:starts]]])
    h, C = _local_search(vs, st)
    j = int(np.argmin(h))
    upper, worst = float(h[j]), C[j]
    lower = min(lower, upper)
    how = (f"bounds: upper = LP local search from {len(C)} starts (facet normals at the axis points first); "
           f"lower = cross-polytope of "
           f"axis speeds{' and inscribed ellipsoid' if vs.kind == 'zonotope' else ''} (rigorous); "
           f"bracket ratio {upper / lower:.3g} (never above sqrt(2n) = {math.sqrt(D):.3g})")
    return Steerability(True, upper * s, (float(lower * s), float(upper * s)), False, how, worst.reshape(n, 2),
                        axis_speeds,
                        rank, cond, svals, 0.0, [], n, K, basis.mode, "steerable")


# -- obstructions -------------------------------------------------------------------------------
def _rref_rows(N, tol=1e-9):
    """Row-reduced echelon basis of the row space of ``N`` (m, D), rows scaled to unit norm.

    Echelon form makes each blocked direction involve as few bodies as possible.
    """
    R = np.array(N, dtype=float)
    m, D = R.shape
    row = 0
    for col in range(D):
        if row >= m:
            break
        piv = row + int(np.argmax(np.abs(R[row:, col])))
        if abs(R[piv, col]) <= tol:
            continue
        R[[row, piv]] = R[[piv, row]]
        R[row] /= R[row, col]
        for r in range(m):
            if r != row:
                R[r] -= R[r, col] * R[row]
        row += 1
    R = R[:row]
    R[np.abs(R) < tol] = 0.0
    return R / np.linalg.norm(R, axis=1, keepdims=True)


def _combo_text(c, labels):
    """'vx0 + vx1' style text for a direction in R^{2n}."""
    c = np.asarray(c).reshape(-1)
    big = np.abs(c).max()
    terms = []
    for j in np.flatnonzero(np.abs(c) > 1e-6 * big):
        a = c[j] / big
        name = f"v{'xy'[j % 2]}{labels[j // 2]}"
        mag = "" if abs(abs(a) - 1) < 1e-6 else f"{abs(a):.3g} "
        sign = "-" if a < 0 else "+"
        terms.append((sign, mag + name))
    text = ("-" if terms[0][0] == "-" else "") + terms[0][1]
    for sign, t in terms[1:]:
        text += f" {sign} {t}"
    return text, big


def _fmt_dir(v):
    v = np.round(v / np.linalg.norm(v), 3) + 0.0     # + 0.0 turns -0.0 into 0.0
    return f"({v[0]:g}, {v[1]:g})"


def _describe(c, two_sided, rate, labels):
    c = np.asarray(c).reshape(-1, 2)
    idx = np.flatnonzero(np.linalg.norm(c, axis=1) > 1e-6 * np.abs(c).max())
    combo, big = _combo_text(c, labels)
    bodies = tuple(labels[i] for i in idx)
    scaled_rate = rate / big
    if two_sided:
        if len(bodies) == 1:
            head = f"body {bodies[0]} cannot move along {_fmt_dir(c[idx[0]])}"
        else:
            head = f"bodies {', '.join(map(str, bodies))} cannot be moved independently"
        return bodies, f"{head}: {combo} = {format_quantity(scaled_rate, 'm/s')} for every input"
    if len(bodies) == 1:
        head = f"body {bodies[0]} cannot move towards {_fmt_dir(c[idx[0]])}"
    else:
        head = f"bodies {', '.join(map(str, bodies))}: one combined motion is one-way"
    return bodies, f"{head}: {combo} <= {format_quantity(scaled_rate, 'm/s')} for every input"


def obstructions(basis, *, rtol=RTOL, max_one_sided=4, labels=None, _vs=None, _t=None):
    """Directions of combined motion that no input produces.

    Two-sided obstructions are the directions orthogonal to every field (the left null space
    of the field matrix), given in row-echelon form so each involves as few bodies as possible:
    a body on a mirror line of a symmetric actuator shows ``body i cannot move along (1, 0)``;
    two bodies at mirror-image positions show ``vx0 + vx1 = 0`` and ``vy0 - vy1 = 0``. One-sided
    obstructions (time-shared fields that do not positively span) are found by LP from each
    coordinate axis along which no speed is available.

    Parameters
    ----------
    basis : FieldBasis
    rtol : float
    max_one_sided : int
        At most this many one-sided directions are reported.
    labels : sequence of int, optional
        Body labels used in texts and ``Obstruction.bodies`` (default 0 .. n-1), e.g. the
        original indices of a restricted basis.

    Returns
    -------
    list of Obstruction
        Empty when the bodies are steerable.
    """
    vs = _vs if _vs is not None else _VSet.from_basis(basis)
    n = basis.n_bodies
    D = 2 * n
    labels = list(range(n)) if labels is None else [int(v) for v in labels]
    if len(labels) != n:
        raise ActuatorError(f"obstructions: labels must have one entry per body ({n}), got {len(labels)}.")
    s = vs.scale if vs.scale > 0 else 1.0
    out = []
    span = vs.span
    if span.size and np.abs(span).max() > 0:
        _, sv, Vt = np.linalg.svd(span, full_matrices=True)
        r = int(np.sum(sv > _RANK_RTOL * sv[0]))
        N = Vt[r:]
    else:
        N = np.eye(D)
    if len(N):
        for c in _rref_rows(N):
            rate = float(c @ vs.origin) * s
            if abs(rate) <= rtol * s:
                rate = 0.0
            bodies, text = _describe(c, True, rate, labels)
            out.append(Obstruction(c.reshape(n, 2), True, rate, bodies, text))
    if vs.scale == 0:
        return out
    # One-sided directions inside the span of the fields: start from the coordinate axes (or,
    # for a flat set, an orthonormal basis of its span) along which no speed is available.
    if len(N):
        Q = np.linalg.svd(span, full_matrices=False)[2][:D - len(N)]
        if len(Q) == 0:
            return out
        dirs = np.vstack([Q, -Q])
        t = _axis_lp(vs, dirs)
    else:
        dirs = _axis_dirs(D)
        t = _axis_lp(vs, dirs) if _t is None else _t
    found = []
    for j in np.argsort(t):
        if len(found) >= max_one_sided or t[j] > rtol:
            break
        if any(f @ dirs[j] > 1e-9 for f in found):
            continue                                   # already explained: f blocks this axis
        c = _one_sided(vs, dirs[j], N)
        if c is None:
            continue
        hc = float(vs.support(c[None, :])[0])
        if hc > rtol:
            continue
        if any(abs(c @ f) > 1 - 1e-6 for f in found):
            continue
        found.append(c)
        bodies, text = _describe(c, False, hc * s, labels)
        out.append(Obstruction(c.reshape(n, 2), False, hc * s, bodies, text))
    return out


def _one_sided(vs, b, N):
    """A unit ``c`` with ``c . b >= 1/|..|``, orthogonal to ``N``, minimising ``h_V(c)`` (LP)."""
    D = b.shape[0]
    if vs.kind == "zonotope":
        G = vs.gens
        K = G.shape[0]
        cost = np.r_[vs.center, np.ones(K)]
        A_ub = np.block([[G, -np.eye(K)], [-G, -np.eye(K)]]) if K else np.zeros((0, D))
        b_ub = np.zeros(2 * K)
        nv = D + K
        lb = np.r_[-np.ones(D), np.zeros(K)]
        ub = np.r_[np.ones(D), np.full(K, np.inf)]
    else:
        P = vs.points
        J = P.shape[0]
        cost = np.r_[np.zeros(D), 1.0]
        A_ub = np.c_[P, -np.ones(J)]
        b_ub = np.zeros(J)
        nv = D + 1
        lb = np.r_[-np.ones(D), -np.inf]
        ub = np.r_[np.ones(D), np.inf]
    A_eq = np.r_[b, np.zeros(nv - D)][None, :]
    b_eq = [1.0]
    if len(N):
        A_eq = np.vstack([A_eq, np.c_[N, np.zeros((len(N), nv - D))]])
        b_eq = np.r_[1.0, np.zeros(len(N))]
    res = linprog(cost, A_ub=A_ub, b_ub=b_ub, A_eq=A_eq, b_eq=b_eq, bounds=np.c_[lb, ub], method="highs")
    if res.status != 0:
        return None
    c = res.x[:D]
    nc = np.linalg.norm(c)
    return c / nc if nc > 0 else None


# -- per-body (vectorised) --------------------------------------------------------------------------
def body_speeds(basis, *, rtol=RTOL, chunk=None):
    """Exact worst-direction speed of each body as if it were alone (vectorised over bodies).

    Each body is a 2-D problem: the minimum of its support function over the normals of its
    generators (linear) or of the edges between its vertex velocities (timeshare). Used for
    maps, where every grid point is one "body".

    Parameters
    ----------
    basis : FieldBasis
    rtol : float

    Returns
    -------
    speeds : ndarray, shape (n,)
        m/s, 0 where the body alone is not steerable.
    directions : ndarray, shape (n, 2)
        Unit direction of the slowest motion of each body (a blocked direction where speed is 0).

    Examples
    --------
    >>> import numpy as np
    >>> from fieldplan import Channel, FieldBasis
    >>> ch = tuple(Channel(f"c{k}", "A", -1, 1) for k in range(2))
    >>> f = np.array([[[1e-6, 0], [1e-6, 0]], [[0, 2e-6], [0, 0]]])   # body 1 has no y field
    >>> speeds, dirs = body_speeds(FieldBasis("linear", f, np.zeros((2, 2)), ch))
    >>> np.round(speeds * 1e6, 6).tolist()
    [1.0, 0.0]
    """
    if not isinstance(basis, FieldBasis):
        raise ActuatorError(f"body_speeds: expected a FieldBasis, got {type(basis).__name__}.")
    F = basis.fields                                      # (K, n, 2)
    d = basis.drift                                       # (n, 2)
    if basis.mode == "linear":
        lo, hi = basis.lower, basis.upper
        gens = F * (0.5 * (hi - lo))[:, None, None]
        center = d + np.tensordot(0.5 * (hi + lo), F, axes=1)
        return _zonotope_speeds_2d(gens, center, rtol, chunk)
    pts = np.concatenate([d[None], d[None] + F], axis=0)  # (J, n, 2)
    return _polytope_speeds_2d(pts, rtol, chunk)


def _perp_unit(v):
    """Unit perpendiculars of the 2-vectors ``v`` (..., 2); zero where ``v`` is zero."""
    p = np.stack([-v[..., 1], v[..., 0]], axis=-1)
    nrm = np.linalg.norm(p, axis=-1, keepdims=True)
    return np.where(nrm > 0, p / np.where(nrm > 0, nrm, 1.0), 0.0), nrm[..., 0]


def _zonotope_speeds_2d(gens, center, rtol, chunk):
    K, n, _ = gens.shape
    scale = np.linalg.norm(center, axis=1) + np.linalg.norm(gens, axis=2).sum(axis=0)      # (n,)
    speeds = np.zeros(n)
    dirs = np.zeros((n, 2))
    if K == 0:
        return speeds, dirs
    chunk = chunk or max(1, int(4e6 // max(4 * K * K, 1)))
    for a in range(0, n, chunk):
        g = gens[:, a:a + chunk]                          # (K, b, 2)
        c0 = center[a:a + chunk]
        pc, nrm = _perp_unit(g)
        cand = np.concatenate([pc, -pc], axis=0)          # (2K, b, 2)
        valid = np.concatenate([nrm, nrm], axis=0) > 0
        h = np.einsum("cbd,bd->cb", cand, c0) + np.abs(np.einsum("cbd,kbd->ckb", cand, g)).sum(axis=1)
        speeds[a:a + chunk], dirs[a:a + chunk] = _smallest_support(cand, h, valid, scale[a:a + chunk], rtol)
    return speeds, dirs


def _smallest_support(cand, h, valid, scale, rtol):
    """Per body, the smallest support value over candidate facet normals (the inradius) and its normal."""
    h = np.where(valid, h, np.inf)
    j = np.argmin(h, axis=0)
    hb = h[j, np.arange(h.shape[1])]
    ok = np.isfinite(hb) & (hb > rtol * scale) & (scale > 0)
    return np.where(ok, hb, 0.0), cand[j, np.arange(h.shape[1])]


def _polytope_speeds_2d(pts, rtol, chunk):
    J, n, _ = pts.shape
    scale = np.linalg.norm(pts, axis=2).max(axis=0)
    ia, ib = np.triu_indices(J, k=1)
    speeds = np.zeros(n)
    dirs = np.zeros((n, 2))
    if len(ia) == 0:
        return speeds, dirs
    chunk = chunk or max(1, int(4e6 // max(2 * len(ia) * J, 1)))
    for a in range(0, n, chunk):
        p = pts[:, a:a + chunk]                           # (J, b, 2)
        pc, nrm = _perp_unit(p[ib] - p[ia])               # (P, b, 2)
        cand = np.concatenate([pc, -pc], axis=0)
        valid = np.concatenate([nrm, nrm], axis=0) > 0
        h = np.einsum("cbd,jbd->cjb", cand, p).max(axis=1)
        speeds[a:a + chunk], dirs[a:a + chunk] = _smallest_support(cand, h, valid, scale[a:a + chunk], rtol)
    return speeds, dirs


# -- basis helpers ---------------------------------------------------------------------------------
def restrict(basis, bodies):
    """The basis seen by a subset of bodies (indices), same inputs."""
    idx = np.asarray(bodies, dtype=int).reshape(-1)
    if idx.size == 0 or idx.min() < 0 or idx.max() >= basis.n_bodies:
        raise ActuatorError(f"restrict: body indices must be in [0, {basis.n_bodies}), got {idx.tolist()}.")
    return FieldBasis(basis.mode, basis.fields[:, idx], basis.drift[idx], basis.channels, basis.primitives,
                      basis.idle, dict(basis.meta))


def subset(basis, indices):
    """The basis using only the fields ``indices`` (primitives, or channels in linear mode).

    In linear mode the dropped channels are held at their idle value (``basis.idle``), whose
    contribution joins the drift.
    """
    idx = np.asarray(indices, dtype=int).reshape(-1)
    K = basis.size
    if idx.size and (idx.min() < 0 or idx.max() >= K or len(set(idx.tolist())) != idx.size):
        raise ActuatorError(f"subset: indices must be distinct and in [0, {K}), got {idx.tolist()}.")
    if basis.mode == "timeshare":
        return FieldBasis("timeshare", basis.fields[idx], basis.drift, basis.channels,
                          tuple(basis.primitives[k] for k in idx), basis.idle, dict(basis.meta))
    drop = np.setdiff1d(np.arange(K), idx)
    idle = np.asarray(basis.idle, dtype=float)
    drift = basis.drift + np.tensordot(idle[drop], basis.fields[drop], axes=1) if drop.size else basis.drift
    return FieldBasis("linear", basis.fields[idx], drift, tuple(basis.channels[k] for k in idx), (),
                      idle[idx], dict(basis.meta))


class basis_function:
    """Picklable callable ``xy (n, 2) -> FieldBasis`` for an actuator and its bodies.

    Parameters
    ----------
    actuator : Actuator
    bodies : Body, sequence of Body, or callable
        One Body (used for every position), a list (length must match the positions), or
        ``bodies(n) -> list of Body``.
    medium : Medium
    """

    def __init__(self, actuator, bodies, medium):
        if not isinstance(actuator, Actuator):
            raise ActuatorError("basis_function: actuator must be a fieldplan.Actuator, got "
                                f"{type(actuator).__name__}.")
        self.actuator = actuator
        self.bodies = bodies
        self.medium = medium

    def bodies_for(self, n):
        """The list of ``n`` bodies for ``n`` positions."""
        b = self.bodies
        if isinstance(b, Body):
            return [b] * n
        if callable(b):
            out = list(b(n))
        else:
            out = list(b)
        if len(out) != n:
            raise ActuatorError(f"basis_function: {len(out)} bodies given for {n} positions.")
        return out

    @property
    def radius(self):
        """Largest body radius, m (for free-space sampling)."""
        b = self.bodies
        if isinstance(b, Body):
            return float(b.radius)
        return float(max(x.radius for x in (b(1) if callable(b) else b)))

    def __call__(self, xy):
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        return self.actuator.basis(self.bodies_for(len(xy)), self.medium, xy)


def _progress(it, total, progress, desc):
    show = sys.stderr.isatty() if progress is None else bool(progress)
    if not show:
        return it
    from tqdm import tqdm
    return tqdm(it, total=total, desc=desc, leave=False)


# -- maps ------------------------------------------------------------------------------------------
@dataclass
class SpeedMap:
    """Worst-direction speed of a single body over a grid of the workspace.

    Attributes
    ----------
    xs, ys : ndarray
        Cell-centre coordinates, m.
    speed : ndarray, shape (ny, nx)
        m/s; nan outside the free space.
    direction : ndarray, shape (ny, nx, 2)
        Unit slowest (or blocked) direction.
    free : ndarray of bool, shape (ny, nx)
    dead : ndarray of bool, shape (ny, nx)
        Free cells where the body cannot move in some direction (speed 0).
    """

    xs: np.ndarray
    ys: np.ndarray
    speed: np.ndarray
    direction: np.ndarray
    free: np.ndarray
    dead: np.ndarray

    @property
    def dead_fraction(self):
        """Fraction of free cells that are dead."""
        return float(self.dead.sum() / max(self.free.sum(), 1))

    @property
    def mean_speed(self):
        """m/s, mean over free cells (dead cells count as 0)."""
        return float(np.nanmean(np.where(self.free, self.speed, np.nan))) if self.free.any() else 0.0

    def summary(self):
        """One line: mean and lowest speed over the free space, dead fraction."""
        vals = self.speed[self.free]
        low = float(vals.min()) if vals.size else 0.0
        return (f"single body over {int(self.free.sum())} free cells: mean worst-direction speed "
                f"{format_quantity(self.mean_speed, 'm/s', 4)}, lowest {format_quantity(low, 'm/s', 4)}, "
                f"dead {100 * self.dead_fraction:.1f} %")


def speed_map(basis_at, workspace, *, shape=(48, 48), radius=None, rtol=RTOL):
    """Worst-direction speed of one body over the workspace (dead zones where it is 0).

    Parameters
    ----------
    basis_at : callable
        ``basis_at(xy (G, 2)) -> FieldBasis`` for G independent bodies of one kind at those
        positions (see :class:`basis_function`); called once with every free grid point.
    workspace : Workspace
    shape : tuple (ny, nx)
        Grid size over the workspace bounds.
    radius : float, optional
        Body radius, m, for the free space; default ``basis_at.radius`` if defined, else 0.
    rtol : float

    Returns
    -------
    SpeedMap
    """
    ny, nx = (int(shape[0]), int(shape[1]))
    if ny < 1 or nx < 1:
        raise ActuatorError(f"speed_map: shape must be two positive integers, got {shape!r}.")
    if radius is None:
        radius = float(getattr(basis_at, "radius", 0.0))
    xmin, ymin, xmax, ymax = workspace.bounds
    xs = xmin + (np.arange(nx) + 0.5) * (xmax - xmin) / nx
    ys = ymin + (np.arange(ny) + 0.5) * (ymax - ymin) / ny
    X, Y = np.meshgrid(xs, ys)
    xy = np.c_[X.ravel(), Y.ravel()]
    free = workspace.contains(xy, radius)
    speed = np.full(len(xy), np.nan)
    direction = np.zeros((len(xy), 2))
    if free.any():
        b = basis_at(xy[free])
        sp_, dr = body_speeds(b, rtol=rtol)
        speed[free] = sp_
        direction[free] = dr
    free = free.reshape(ny, nx)
    speed = speed.reshape(ny, nx)
    dead = free & (np.nan_to_num(speed) <= 0)
    return SpeedMap(xs, ys, speed, direction.reshape(ny, nx, 2), free, dead)


# -- how many bodies -------------------------------------------------------------------------------
def counting_limit(basis_or_mode, size=None):
    """The one-step counting limit: most bodies a field basis can steer independently in one period.

    * ``linear`` mode, K channels: ``K / 2``. The 2N stacked velocity components are an affine
      image of K inputs, so they cover a neighbourhood of zero only if ``K >= 2N`` (rank).
    * ``timeshare`` mode, M primitives: ``(M - 1) / 2``. The average velocities reachable are the
      cone of the M primitive fields about the idle point, and a set of vectors positively spans
      R^{2N} only if it has at least 2N + 1 members (Davis, "Theory of positive linear dependence",
      Amer. J. Math. 76, 1954), so ``M >= 2N + 1``.

    Both are upper bounds; fewer directions may be available (see ``CountCurve.rank_limit``), and
    more bodies can still be steered over several periods. This function is the single definition
    used by :func:`count_curve`, ``fieldplan inspect`` and the benchmarks.

    Parameters
    ----------
    basis_or_mode : FieldBasis or {"linear", "timeshare"}
    size : int, optional
        K or M; required with a mode string, taken from the basis otherwise.

    Returns
    -------
    float
        Bodies (a half-integer when K or M - 1 is odd).

    Examples
    --------
    >>> counting_limit("linear", 6), counting_limit("timeshare", 63)
    (3.0, 31.0)
    """
    if isinstance(basis_or_mode, FieldBasis):
        mode, size = basis_or_mode.mode, basis_or_mode.size if size is None else size
    else:
        mode = basis_or_mode
    if size is None or int(size) != size or size < 0:
        raise ActuatorError(f"counting_limit: size must be a whole number of fields >= 0, got {size!r}.")
    if mode == "linear":
        return float(size) / 2.0
    if mode == "timeshare":
        return max(float(size) - 1.0, 0.0) / 2.0
    raise ActuatorError(f"counting_limit: mode must be 'linear' or 'timeshare', got {mode!r}.")


def counting_rule(mode):
    """The counting rule as text for labels: ``"K/2"`` (linear) or ``"(M - 1)/2"`` (timeshare)."""
    return "K/2" if mode == "linear" else "(M - 1)/2"


@dataclass
class CountCurve:
    """Fraction of random configurations of N bodies that are steerable, per N.

    Attributes
    ----------
    counts : ndarray of int
    fraction : ndarray
    low, high : ndarray
        95 % Wilson score interval of each fraction.
    trials : int
    size : int
        K, number of fields.
    mode : str
    counting_limit : float
        :func:`counting_limit`: K/2 for K channels (linear), (M - 1)/2 for M primitives (timeshare);
        no basis steers more bodies than this in one step.
    rank_limit : float
        Half the largest rank of the 2N x K field matrix seen in any trial, when that rank fell
        short of 2N at the largest N tried (the fields then span fewer directions than K
        suggests, e.g. a time-shared pair of opposite primitives adds one, not two); else nan.
    """

    counts: np.ndarray
    fraction: np.ndarray
    low: np.ndarray
    high: np.ndarray
    trials: int
    size: int
    mode: str
    counting_limit: float
    rank_limit: float = np.nan

    def max_steerable(self, threshold=0.5):
        """Largest N whose fraction is at least ``threshold`` (0 if none)."""
        ok = self.counts[self.fraction >= threshold]
        return int(ok.max()) if ok.size else 0

    def summary(self):
        """One line: fractions per N and the largest N steerable in at least half the trials."""
        parts = ", ".join(f"N={n}: {f:.2f}" for n, f in zip(self.counts, self.fraction))
        return (f"steerable fraction ({self.trials} random configurations each, "
                f"{'K' if self.mode == 'linear' else 'M'} = {self.size} {self.mode}): "
                f"{parts}; up to N = {self.max_steerable()} in at least half "
                f"(counting limit {counting_rule(self.mode)} = {self.counting_limit:g}"
                + (f", field rank / 2 = {self.rank_limit:g})" if self.rank_limit < self.counting_limit else ")"))


def _wilson(k, n, z=1.959963984540054):
    p = k / n
    den = 1 + z * z / n
    mid = (p + z * z / (2 * n)) / den
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    # The exact ends at k = 0 and k = n, where round-off would leave them a hair off.
    return np.where(k == 0, 0.0, np.clip(mid - half, 0, 1)), np.where(k == n, 1.0, np.clip(mid + half, 0, 1))


def _curve_trial(basis_at, workspace, n, radius, separation, seed, rtol):
    xy = workspace.sample(n, radius, np.random.default_rng(seed), separation=separation)
    b = basis_at(xy)
    return steerable(b, rtol=rtol), b.size, b.mode, _rank(b)[0]


def count_curve(basis_at, workspace, counts, *, trials=40, rng=0, radius=None, separation=None,
                rtol=RTOL, executor=None, progress=None):
    """The "how many bodies can this actuator steer" curve.

    For each N in ``counts``, draws ``trials`` random configurations of N bodies in the free
    space (``workspace.sample``) and records the fraction that is steerable now.

    Parameters
    ----------
    basis_at : callable
        ``xy (N, 2) -> FieldBasis`` (see :class:`basis_function`).
    workspace : Workspace
    counts : sequence of int
    trials : int
    rng : int or numpy.random.Generator
        Seeds every trial (reproducible, also under an executor).
    radius : float, optional
        m; default ``basis_at.radius`` if defined, else 0.
    separation : float, optional
        Minimum centre distance, m; default two radii.
    executor : concurrent.futures.Executor, optional
        Runs the trials (``basis_at`` must then be picklable for process pools).
    progress : bool, optional
        tqdm bar; default on when stderr is a terminal.

    Returns
    -------
    CountCurve
    """
    counts = np.asarray([int(c) for c in counts])
    if counts.size == 0 or counts.min() < 1:
        raise ActuatorError(f"count_curve: counts must be positive integers, got {counts.tolist()}.")
    if int(trials) < 1:
        raise ActuatorError(f"count_curve: trials must be >= 1, got {trials}.")
    if radius is None:
        radius = float(getattr(basis_at, "radius", 0.0))
    if separation is None:
        separation = 2.0 * radius
    seeds = np.random.default_rng(rng).integers(0, 2**63 - 1, size=(len(counts), int(trials)))
    jobs = [(i, int(n), int(seeds[i, t])) for i, n in enumerate(counts) for t in range(int(trials))]
    if executor is None:
        results = (_curve_trial(basis_at, workspace, n, radius, separation, s, rtol) for _, n, s in jobs)
    else:
        futs = [executor.submit(_curve_trial, basis_at, workspace, n, radius, separation, s, rtol) for _, n, s in jobs]
        results = (f.result() for f in futs)
    ok = np.zeros(len(counts))
    size, mode, max_rank = 0, "", 0
    for (i, _, _), (good, size, mode, rank) in zip(jobs, _progress(results, len(jobs), progress, "steerable fraction")):
        ok[i] += good
        max_rank = max(max_rank, rank)
    frac = ok / trials
    low, high = _wilson(ok, trials)
    rank_limit = max_rank / 2.0 if max_rank < 2 * counts.max() else np.nan
    return CountCurve(counts, frac, low, high, int(trials), int(size), mode, counting_limit(mode, size), rank_limit)


# -- design: choose primitives -----------------------------------------------------------------------
@dataclass
class Selection:
    """A chosen subset of fields and how it scores.

    Attributes
    ----------
    indices : list of int
        Chosen fields (primitive or channel indices), in order of choice.
    names : list of str
    score : float
        m/s, mean worst-direction speed over the sample configurations.
    history : list of float
        Score after each greedy addition.
    random_scores : ndarray
        Scores of random subsets of the same size (for context).
    full_score : float
        m/s, score with every field.
    """

    indices: list
    names: list
    score: float
    history: list
    random_scores: np.ndarray
    full_score: float


class _Scorer:
    """Scores field subsets on sample configurations: (mean speed, coverage) to compare lexicographically.

    ``coverage`` (mean over configurations and a fixed direction set of ``min(h, 0)``,
    normalised) breaks the ties of subsets too small to steer anything, so greedy first picks
    fields that open up the blocked directions.
    """

    def __init__(self, bases, joint, rtol, rng):
        self.bases = list(bases)
        self.joint = joint
        self.rtol = rtol
        self.mode = self.bases[0].mode
        self.K = self.bases[0].size
        for b in self.bases:
            if b.size != self.K or b.mode != self.mode:
                raise ActuatorError("select_primitives: every basis must have the same mode and number of fields.")
        if not joint:
            self.big = FieldBasis(self.mode, np.concatenate([b.fields for b in self.bases], axis=1),
                                  np.concatenate([b.drift for b in self.bases], axis=0), self.bases[0].channels,
                                  self.bases[0].primitives, self.bases[0].idle)
            ang = np.linspace(0, 2 * np.pi, 16, endpoint=False)
            self.dirs = [np.stack([np.cos(ang), np.sin(ang)], axis=1)]
            self.scales = np.maximum(self._body_scales(self.big), 1e-300)
        else:
            self.dirs = []
            self.scales = []
            for b in self.bases:
                D = 2 * b.n_bodies
                g = rng.normal(size=(16, D))
                self.dirs.append(np.vstack([_axis_dirs(D), g / np.linalg.norm(g, axis=1, keepdims=True)]))
                self.scales.append(max(_VSet.from_basis(b).scale, 1e-300))

    @staticmethod
    def _body_scales(b):
        F, d = b.fields, b.drift
        if b.mode == "linear":
            half = 0.5 * (b.upper - b.lower)
            center = d + np.tensordot(0.5 * (b.upper + b.lower), F, axes=1)
            return np.linalg.norm(center, axis=1) + (np.linalg.norm(F, axis=2) * np.abs(half)[:, None]).sum(0)
        return np.linalg.norm(np.concatenate([d[None], d[None] + F]), axis=2).max(axis=0)

    def __call__(self, idx):
        idx = list(idx)
        if not self.joint:
            b = subset(self.big, idx)
            speeds, _ = body_speeds(b, rtol=self.rtol)
            cov = self._coverage_bodies(b)
            return float(speeds.mean()), cov
        spd, cov = [], []
        for b, dirs, sc in zip(self.bases, self.dirs, self.scales):
            sb = subset(b, idx)
            r = steerability(sb, method="auto", rtol=self.rtol)
            spd.append(r.speed if np.isfinite(r.speed) else r.speed_bounds[1])
            vs = _VSet.from_basis(sb)
            h = vs.support(dirs) * vs.scale / sc
            cov.append(float(np.minimum(h, 0).mean()))
        return float(np.mean(spd)), float(np.mean(cov))

    def _coverage_bodies(self, b):
        F, d = b.fields, b.drift                          # (k, n, 2), (n, 2)
        C = self.dirs[0]                                  # (m, 2)
        if b.mode == "linear":
            half = 0.5 * (b.upper - b.lower)
            center = d + np.tensordot(0.5 * (b.upper + b.lower), F, axes=1)
            h = C @ center.T + np.abs(np.einsum("md,knd->mkn", C, F * half[:, None, None])).sum(axis=1)
        else:
            pts = np.concatenate([d[None], d[None] + F])
            h = np.einsum("md,jnd->mjn", C, pts).max(axis=1)
        return float((np.minimum(h, 0) / self.scales[None, :]).mean())


def _field_names(basis):
    if basis.mode == "timeshare":
        return [p.name for p in basis.primitives]
    return [c.name for c in basis.channels]


def select_primitives(bases, budget, *, joint=False, swaps=True, n_random=20, rng=0, rtol=RTOL):
    """Choose ``budget`` fields (primitives, or channels in linear mode) that keep steerability best.

    Greedy forward selection on the mean worst-direction speed over sample configurations
    (ties, e.g. before anything is steerable, broken by how much of the blocked directions a
    subset opens up), followed by single swaps while they improve the score.

    Parameters
    ----------
    bases : FieldBasis or sequence of FieldBasis
        Sample configurations (same fields, e.g. one basis per random configuration).
    budget : int
        Number of fields to keep, ``1 <= budget <= K``.
    joint : bool
        False (default): score every body of every basis alone (exact, vectorised; a basis of
        many grid points scores a whole workspace). True: score each basis as one configuration
        of all its bodies with :func:`steerability` (slower).
    swaps : bool
        Improve the greedy result by 1-swaps.
    n_random : int
        Random subsets of the same size scored for comparison (``Selection.random_scores``).
    rng : int or numpy.random.Generator
    rtol : float

    Returns
    -------
    Selection
    """
    if isinstance(bases, FieldBasis):
        bases = [bases]
    bases = list(bases)
    if not bases or not all(isinstance(b, FieldBasis) for b in bases):
        raise ActuatorError("select_primitives: bases must be a FieldBasis or a non-empty list of them.")
    K = bases[0].size
    if not (isinstance(budget, (int, np.integer)) and 1 <= budget <= K):
        raise ActuatorError(f"select_primitives: budget must be an integer in [1, {K}], got {budget!r}.")
    rng = np.random.default_rng(rng)
    score = _Scorer(bases, joint, rtol, rng)
    chosen, history = [], []
    best = None
    for _ in range(int(budget)):
        best, best_k = None, None
        for k in range(K):
            if k in chosen:
                continue
            sc = score(chosen + [k])
            if best is None or sc > best:
                best, best_k = sc, k
        chosen.append(best_k)
        history.append(best[0])
    if swaps and budget < K:
        improved = True
        passes = 0
        while improved and passes < 3:
            improved = False
            passes += 1
            for pos in range(len(chosen)):
                for k in range(K):
                    if k in chosen:
                        continue
                    trial = chosen.copy()
                    trial[pos] = k
                    sc = score(trial)
                    if sc > best:
                        best, chosen, improved = sc, trial, True
    rand = np.array([score(rng.choice(K, size=budget, replace=False))[0] for _ in range(int(n_random))])
    names = _field_names(bases[0])
    return Selection([int(k) for k in chosen], [names[k] for k in chosen], float(best[0]), history, rand,
                     score(range(K))[0])


# -- design: compare variants -------------------------------------------------------------------------
@dataclass
class DesignComparison:
    """Steerability measures of several actuator designs on one workspace.

    Attributes
    ----------
    rows : list of dict
        Per design: ``name``, ``size`` (K), ``mode``, ``mean_speed`` (m/s, single body, over the
        free space), ``dead_fraction``, ``max_steerable`` (largest N steerable in at least half
        the trials), ``fractions`` (dict N -> fraction).
    maps : dict of str -> SpeedMap
    curves : dict of str -> CountCurve
    """

    rows: list
    maps: dict
    curves: dict

    def table(self):
        """Plain-text table, speeds in µm/s."""
        counts = sorted({n for r in self.rows for n in r["fractions"]})
        head = f"{'design':<20} {'K':>4} {'mode':<9} {'mean µm/s':>10} {'dead %':>7} {'N max':>5}  " + \
            " ".join(f"N={n:<3}" for n in counts)
        lines = [head, "-" * len(head)]
        for r in self.rows:
            lines.append(f"{r['name']:<20} {r['size']:>4} {r['mode']:<9} {r['mean_speed'] * 1e6:>10.4g} "
                         f"{100 * r['dead_fraction']:>7.1f} {r['max_steerable']:>5}  " +
                         " ".join(f"{r['fractions'].get(n, float('nan')):<5.2f}" for n in counts))
        return "\n".join(lines)


def compare_designs(designs, bodies, workspace, *, counts=(1, 2, 3, 4), trials=20, shape=(32, 32), rng=0,
                    rtol=RTOL, executor=None, progress=None):
    """Compare actuator variants (coil placements, drive points, electrode layouts) by steerability.

    Parameters
    ----------
    designs : dict of str -> Actuator
    bodies : Body or callable
        The steered body (replicated), or ``bodies(n) -> list of Body``.
    workspace : Workspace
        Its medium is used.
    counts : sequence of int
        N values of the count curve.
    trials : int
    shape : tuple
        Grid of the single-body map.
    rng : int
        Every design sees the same random configurations.
    rtol : float
    executor, progress
        As in :func:`count_curve`.

    Returns
    -------
    DesignComparison
    """
    if not isinstance(designs, dict) or not designs:
        raise ActuatorError("compare_designs: designs must be a non-empty dict of name -> Actuator.")
    if not (isinstance(bodies, Body) or callable(bodies)):
        raise ActuatorError("compare_designs: bodies must be a Body or a callable n -> list of Body "
                            f"(the count curve needs any number of bodies), got {type(bodies).__name__}.")
    rows, maps, curves = [], {}, {}
    for name, act in designs.items():
        fn = basis_function(act, bodies, workspace.medium)
        one = basis_function(act, fn.bodies_for(1)[0], workspace.medium)
        m = speed_map(one, workspace, shape=shape, rtol=rtol)
        c = count_curve(fn, workspace, counts, trials=trials, rng=rng, rtol=rtol, executor=executor,
                        progress=progress)
        maps[name], curves[name] = m, c
        rows.append(dict(name=str(name), size=c.size, mode=c.mode, mean_speed=m.mean_speed,
                         dead_fraction=m.dead_fraction, max_steerable=c.max_steerable(),
                         fractions={int(n): float(f) for n, f in zip(c.counts, c.fraction)}))
    return DesignComparison(rows, maps, curves)


# -- symmetry ----------------------------------------------------------------------------------------
@dataclass
class SymmetryReport:
    """Bodies that are stuck alone and pairs that cannot be separated.

    Attributes
    ----------
    stuck : list of (int, Obstruction)
        Bodies that alone cannot move in some direction (e.g. on a dead line), with the direction.
    inseparable : list of (int, int, list of Obstruction)
        Pairs each steerable alone but not together (e.g. at mirror-image positions).
    """

    stuck: list
    inseparable: list

    def summary(self):
        lines = []
        for i, ob in self.stuck:
            lines.append(f"body {i} stuck: {ob.text}")
        for i, j, obs in self.inseparable:
            lines.append(f"bodies {i} and {j} cannot be separated: " + "; ".join(o.text for o in obs))
        return "\n".join(lines) if lines else "no stuck bodies and no inseparable pairs"


def symmetry_report(basis, *, rtol=RTOL):
    """Find stuck bodies and inseparable pairs in one configuration.

    Parameters
    ----------
    basis : FieldBasis
    rtol : float

    Returns
    -------
    SymmetryReport
        Obstruction texts use the bodies' indices in ``basis``.
    """
    speeds, _ = body_speeds(basis, rtol=rtol)
    stuck, ok = [], []
    for i in range(basis.n_bodies):
        if speeds[i] > 0:
            ok.append(i)
            continue
        obs = obstructions(restrict(basis, [i]), rtol=rtol, labels=[i])
        stuck.extend((i, o) for o in obs)
    pairs = []
    for a, b in itertools.combinations(ok, 2):
        sub = restrict(basis, [a, b])
        if not steerable(sub, rtol=rtol):
            pairs.append((a, b, obstructions(sub, rtol=rtol, labels=[a, b])))
    return SymmetryReport(stuck, pairs)


@dataclass
class MirrorReport:
    """Result of :func:`mirror_check`.

    Attributes
    ----------
    pair_separable : bool
        Two bodies at ``point`` and its mirror image are steerable together.
    pair : Steerability
    can_leave_line : bool
        A body at the foot of ``point`` on the line can move off it (either side).
    leave_speed : float
        m/s, largest speed normal to the line available to that body.
    line : Steerability
        Of the body on the line.
    positions : ndarray, shape (3, 2)
        m: ``point``, its mirror image, the foot point on the line.
    """

    pair_separable: bool
    pair: Steerability
    can_leave_line: bool
    leave_speed: float
    line: Steerability
    positions: np.ndarray

    def summary(self):
        return (f"mirror pair {'separable' if self.pair_separable else 'NOT separable'}; body on the line "
                f"{'can' if self.can_leave_line else 'CANNOT'} leave it "
                f"(normal speed {format_quantity(self.leave_speed, 'm/s', 4)})"
                + ("".join("\n  - " + o.text for o in self.pair.obstructions)))


def mirror_check(basis_at, point, line_point, line_direction, *, rtol=RTOL):
    """Test the two consequences of a mirror symmetry of the fields at one place.

    If every field is symmetric under reflection in a line, bodies at mirror-image positions
    move as mirror images (not separable), and a body on the line stays on it. This evaluates
    both: a pair at ``point`` and its reflection, and one body at the foot of ``point`` on the
    line.

    Parameters
    ----------
    basis_at : callable
        ``xy (n, 2) -> FieldBasis`` (see :class:`basis_function`).
    point : array_like, shape (2,)
        m, a position off the line.
    line_point : array_like, shape (2,)
        m, a point of the mirror line.
    line_direction : array_like, shape (2,)
        Direction of the line (any length).
    rtol : float

    Returns
    -------
    MirrorReport
    """
    p = np.asarray(point, dtype=float).reshape(2)
    q = np.asarray(line_point, dtype=float).reshape(2)
    u = np.asarray(line_direction, dtype=float).reshape(2)
    if not np.linalg.norm(u) > 0:
        raise ActuatorError(f"mirror_check: line_direction must be non-zero, got {u.tolist()}.")
    u = u / np.linalg.norm(u)
    foot = q + ((p - q) @ u) * u
    mirror = 2 * foot - p
    if np.linalg.norm(p - foot) <= 1e-12 * max(np.linalg.norm(p), 1e-300):
        raise ActuatorError("mirror_check: point lies on the mirror line; give a point off the line.")
    pair = steerability(basis_at(np.array([p, mirror])), rtol=rtol)
    lb = basis_at(foot[None, :])
    line = steerability(lb, rtol=rtol)
    vs = _VSet.from_basis(lb)
    nrm = np.array([-u[1], u[0]])
    leave = float(np.max(vs.support(np.array([nrm, -nrm])))) * vs.scale
    can_leave = bool(vs.scale > 0 and leave > rtol * vs.scale)
    return MirrorReport(pair.steerable, pair, can_leave, max(leave, 0.0), line, np.array([p, mirror, foot]))
