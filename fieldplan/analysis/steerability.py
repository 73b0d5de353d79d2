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
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.optimize import linprog, lsq_linear, minimize
from scipy.spatial import ConvexHull

from ..contract.actuator import Actuator, FieldBasis
from ..errors import ActuatorError
from ..units import format_quantity
from ..world.body import Body

__all__ = ['Steerability', 'Obstruction', 'steerability', 'steerable', 'body_speeds', 'obstructions', 'restrict', 'subset', 'basis_function']

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
class VelocitySet:
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
        was within 2.5 % otherwise (tests/analysis/test_steer.py, and a 75-case study during development).
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
def axis_directions(D):
    E = np.eye(D)
    return np.vstack([E, -E])


def _span_rank(span):
    """Numerical rank of the rows of ``span`` (m, D), relative to the largest singular value."""
    if span.size == 0:
        return 0
    sv = np.linalg.svd(span, compute_uv=False)
    return int(np.sum(sv > _RANK_RTOL * sv[0])) if sv[0] > 0 else 0


def basis_rank(basis):
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
    vs = VelocitySet.from_basis(basis)
    D = vs.dim
    if vs.scale == 0 or _span_rank(vs.span) < D:
        return False
    t = _axis_lp(vs, axis_directions(D))
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
    vs = VelocitySet.from_basis(basis)
    n, K, D = basis.n_bodies, basis.size, 2 * basis.n_bodies
    rank, cond, svals = basis_rank(basis)
    s = vs.scale
    span = vs.span
    span_rank = _span_rank(span) if s > 0 else 0
    # Axis speeds are informative even for a flat set (a body may still move alone along x), but
    # only axes inside the span of the fields can have a non-zero one.
    dirs = axis_directions(D)
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
    cand = [axis_directions(D)]
    first = np.zeros((0, D))
    if y is not None:
        dots = np.einsum("ij,ij->i", y, axis_directions(D))
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
    vs = _vs if _vs is not None else VelocitySet.from_basis(basis)
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
        dirs = axis_directions(D)
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
