"""The step program: the convex program solved each control period, and the geometry that feeds it.

Each period the controller knows the field basis at the bodies' positions (velocity per unit of each
channel, or under each primitive), so the displacement over the next period is *linear* in the
decision rates ``r`` (channel values in linear mode, fractions of the period per primitive in
timeshare mode). Over a horizon of ``H`` periods, with ``p_0`` the measured positions,

    p_{h+1} = p_h + d_h + F_h r_h                          (fields frozen over a period)

and the step program is the quadratic program

    minimise   sum_h sum_i w_hi |p_{h+1,i} - ref_{h+1,i}(a)|^2            tracking
             - c a                                                          progress
             + sum_h sum_k e_k r_hk^2                                       effort (coil power ~ I^2)
             + sum_h sum_k s_k (r_hk - r_{h-1,k})^2                         smoothness
             + rho * (sum of slacks)                                        exact L1 penalty
    subject to lo_h <= r_h <= hi_h,  |r_h - r_{h-1}| <= slew,  [sum_k r_hk <= 1 in timeshare]
               C r_h <= c_h                                                 (e.g. RMS in timeshare)
               n_ij . (p_{h+1,i} - p_{h+1,j}) + s >= gap_ij                 linearised separation
               n_i . (p_{h+1,i} - w_i) + s >= gap_i                          keep-out half-plane
               |u . (p_{h+1,i} - p_{h,i})| <= delta_i + s,  u in 4 directions   trust region (octagon)

The references move with a common progress variable ``0 <= a <= 1``: ``ref(a) = base + a * dir`` with
``dir`` the step along each body's route (zero for bodies that hold). Tracking references advanced
by a fixed amount makes bodies compete when the shared fields cannot move them all that far (the
least-squares compromise then sacrifices some bodies); scaling every body's step by the same ``a``
instead finds the largest step all moving bodies can take *together* along their routes, and the
reward ``c a`` (small against the tracking term) makes the program take it.

In timeshare mode the primitives of a period play one after another, so a body can touch a wall
(or another body) in the middle of a period even when the period's end point is clear. For the
first period the keep-out and separation rows are therefore also imposed in their worst order:
every primitive that moves the body toward the wall (or the pair together) is assumed to play
first, ``n . (p_0 + d) + sum_k min(0, n . F_k) r_k >= gap`` - linear in the rates.

The separation constraint replaces ``|p_i - p_j| >= gap`` by its tangent half-plane at the
linearisation point; since ``|x| >= n . x`` for a unit ``n`` it is a convex *restriction*: a solution
of the program keeps the bodies apart. Keep-out, separation and trust region are soft with an
exact L1 penalty (Nocedal & Wright, Numerical Optimization, 2nd ed., section 17.2): when the hard
program is feasible and ``rho`` exceeds its largest multiplier the slacks are zero and the solution is
the hard one; otherwise the slacks say by how much (m) each constraint had to give.

:class:`StepProgram` builds the program once per problem shape and re-solves it with new data each
period. Two interchangeable back ends solve the same program:

* ``"cvxpy"``: a DPP problem of cvxpy Parameters (``program.problem.is_dpp()`` is True), solved with
  warm start by any installed QP solver (OSQP, Clarabel, ...). This is the readable reference.
* ``"osqp"`` (default): the same quadratic program assembled directly as sparse matrices with a fixed
  pattern and updated in place in an OSQP workspace; it skips cvxpy's per-solve reductions, which the
  benchmark (``tests/benchmarks/test_bench_control.py``) shows cost several times the solver's own time.

Units: the program is unit-agnostic; the controller passes positions in a length scale of its
choice and rates normalised by the channel span so that the data are of order one.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from ..errors import FieldplanError

__all__ = [
    "StepProgram",
    "csc_pattern",
    "StepData",
    "StepSolution",
    "polyline_arclength",
    "project_to_route",
    "point_at",
    "reference_points",
    "variation_length",
    "pair_slots",
]

_TRUST_DIRS = np.array([[1.0, 0.0], [0.0, 1.0], [np.sqrt(0.5), np.sqrt(0.5)], [np.sqrt(0.5), -np.sqrt(0.5)]])


# ------------------------------------------------------------------------------------------------
# Geometry helpers: routes as arclength-parametrised polylines.
# ------------------------------------------------------------------------------------------------
def polyline_arclength(route):
    """Cumulative arclength at each vertex of ``route`` (P, 2), shape (P,), same unit."""
    route = np.asarray(route, dtype=float)
    seg = np.linalg.norm(np.diff(route, axis=0), axis=1)
    return np.concatenate([[0.0], np.cumsum(seg)])


def project_to_route(route, cum, point, s_min=0.0, s_max=np.inf):
    """Arclength of the point of ``route`` nearest to ``point``, searched within ``[s_min, s_max]``.

    Restricting the window keeps the progress variable monotone along routes that pass close to
    themselves (a U-turn round an obstacle).

    Parameters
    ----------
    route : ndarray, shape (P, 2)
    cum : ndarray, shape (P,)
        From :func:`polyline_arclength`.
    point : array_like, shape (2,)
    s_min, s_max : float

    Returns
    -------
    s : float
        Arclength of the nearest point.
    dist : float
        Distance from ``point`` to it.
    """
    route = np.asarray(route, dtype=float)
    p = np.asarray(point, dtype=float)
    if len(route) == 1:
        return 0.0, float(np.linalg.norm(p - route[0]))
    a, b = route[:-1], route[1:]
    ab = b - a
    L = np.diff(cum)
    L2 = np.maximum(L * L, 1e-300)
    t = np.clip(np.einsum("kc,kc->k", p - a, ab) / L2, 0.0, 1.0)
    s = cum[:-1] + t * L
    lo, hi = float(s_min), float(min(s_max, cum[-1]))
    s = np.clip(s, lo, hi)
    q = point_at(route, cum, s)
    d = np.linalg.norm(q - p, axis=1)
    k = int(np.argmin(d))
    return float(s[k]), float(d[k])


def point_at(route, cum, s):
    """Points of ``route`` at arclengths ``s`` (clipped to the route), shape ``s.shape + (2,)``."""
    route = np.asarray(route, dtype=float)
    s = np.clip(np.asarray(s, dtype=float), 0.0, cum[-1])
    if len(route) == 1:
        return np.broadcast_to(route[0], s.shape + (2,)).copy()
    k = np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(route) - 2)
    L = np.maximum(cum[k + 1] - cum[k], 1e-300)
    t = ((s - cum[k]) / L)[..., None]
    return route[k] + t * (route[k + 1] - route[k])


def reference_points(route, cum, s, advance, horizon):
    """Reference points ``advance`` apart ahead of arclength ``s``, capped at the route's end.

    Returns
    -------
    ndarray, shape (horizon, 2)
        The reference for the end of each period of the horizon.
    """
    steps = s + advance * np.arange(1, horizon + 1)
    return point_at(route, cum, steps)


def variation_length(fields_here, fields_dx, fields_dy, eps, floor=0.0):
    """Length over which the fields change by their own size at each body, same unit as ``eps``.

    ``|f| / |grad f|`` with the norms taken over all fields at once (Frobenius): the scale on which
    a linear prediction made at the body stays good. The trust region of each period is a fraction
    of it.

    Parameters
    ----------
    fields_here, fields_dx, fields_dy : ndarray, shape (K, n, 2)
        Field basis at the bodies, and at the bodies shifted by ``eps`` along x and y.
    eps : float
        The shift.
    floor : float
        Lower bound of the result.

    Returns
    -------
    ndarray, shape (n,)
    """
    mag = np.sqrt(np.sum(fields_here**2, axis=(0, 2)))
    gx = (fields_dx - fields_here) / eps
    gy = (fields_dy - fields_here) / eps
    grad = np.sqrt(np.sum(gx**2 + gy**2, axis=(0, 2)))
    with np.errstate(divide="ignore", invalid="ignore"):
        ell = np.where(grad > 0, mag / grad, np.inf)
    return np.maximum(ell, floor)


def pair_slots(positions, radii, n_slots, reach):
    """The body pairs worth a separation constraint this period, nearest surfaces first.

    Parameters
    ----------
    positions : ndarray, shape (n, 2)
    radii : ndarray, shape (n,)
    n_slots : int
        How many pairs the program has room for.
    reach : ndarray, shape (n,)
        How far each body may move within the horizon; pairs whose surface gap exceeds the sum of
        their reaches cannot touch and are left out.

    Returns
    -------
    pairs : ndarray of int, shape (m, 2), m <= n_slots
        ``i < j``.
    dropped : int
        Pairs that could touch but found no slot.
    """
    n = len(positions)
    if n < 2 or n_slots == 0:
        return np.zeros((0, 2), dtype=int), 0
    iu, ju = np.triu_indices(n, 1)
    gap = np.linalg.norm(positions[iu] - positions[ju], axis=1) - radii[iu] - radii[ju]
    near = gap <= reach[iu] + reach[ju]
    idx = np.flatnonzero(near)
    idx = idx[np.argsort(gap[idx], kind="stable")]
    dropped = max(0, len(idx) - n_slots)
    idx = idx[:n_slots]
    return np.stack([iu[idx], ju[idx]], axis=1), dropped


# ------------------------------------------------------------------------------------------------
# The program.
# ------------------------------------------------------------------------------------------------
@dataclass
class StepData:
    """Numbers of one period's step program (any consistent units; order one is best).

    Attributes
    ----------
    positions : ndarray, shape (n, 2)
        Measured positions ``p_0``.
    fields : ndarray, shape (H, K, n, 2) or (K, n, 2)
        Displacement over one period per unit rate, for each horizon period (``F_h``).
    drift : ndarray, shape (H, n, 2) or (n, 2)
        Displacement over one period at zero rate (``d_h``).
    refs : ndarray, shape (H, n, 2)
        Reference point for the end of each period (at progress ``a = 0``: the base point).
    ref_dirs : ndarray, shape (H, n, 2), optional
        Reference step at full progress ``a = 1``; ``None`` fixes ``a = 0`` (fixed references).
    progress_reward : float
        ``c``, reward per unit of progress.
    worst_order_scale : float
        Timeshare: fraction of a primitive's displacement that can happen before the others (1 for
        one pass through the mix, 1/R when the mix is played in R rounds).
    track : ndarray, shape (H, n) or (n,)
        Tracking weight of each body, >= 0.
    lower, upper : ndarray, shape (H, K) or (K,)
        Rate bounds.
    previous : ndarray, shape (K,)
        Rates of the period before (smoothness and slew anchor).
    slew : ndarray, shape (K,), optional
        Largest change of rate per period (``inf``: none).
    effort, smooth : ndarray, shape (K,)
        Weights of ``r^2`` and ``(r_h - r_{h-1})^2``.
    rate_rows : ndarray, shape (m, K), optional
    rate_rhs : ndarray, shape (H, m) or (m,), optional
        ``rate_rows @ r_h <= rate_rhs[h]``.
    trust : ndarray, shape (H, n) or (n,)
        Largest displacement per period (octagon inradius).
    trust_centre : ndarray, shape (n, 2), optional
        Centre of the first period's trust region (default ``positions``): a body that has arrived
        may be kept within its arrival tolerance of its goal rather than near where it is.
    pairs : ndarray of int, shape (m, 2), m <= slots
        Pairs with a separation constraint.
    pair_normals : ndarray, shape (H, m, 2) or (m, 2)
        Unit vectors from body j to body i at the linearisation points.
    pair_gap : ndarray, shape (m,)
        Required centre distance.
    wall_points, wall_normals : ndarray, shape (H, n, 2) or (n, 2), optional
        Nearest wall point and inward unit normal per body (zero normal: no wall constraint).
    wall_gap : ndarray, shape (n,), optional
        Required distance of the centre from the wall (the radius).
    slack_weight : float
        ``rho``.
    timeshare : bool
        Add ``sum_k r_hk <= 1``.
    """

    positions: np.ndarray
    fields: np.ndarray
    drift: np.ndarray
    refs: np.ndarray
    track: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    previous: np.ndarray
    effort: np.ndarray
    smooth: np.ndarray
    trust: np.ndarray
    slew: np.ndarray | None = None
    rate_rows: np.ndarray | None = None
    rate_rhs: np.ndarray | None = None
    pairs: np.ndarray | None = None
    pair_normals: np.ndarray | None = None
    pair_gap: np.ndarray | None = None
    wall_points: np.ndarray | None = None
    wall_normals: np.ndarray | None = None
    wall_gap: np.ndarray | None = None
    slack_weight: float = 1e3
    ref_dirs: np.ndarray | None = None
    progress_reward: float = 0.0
    trust_centre: np.ndarray | None = None
    worst_order_scale: float = 1.0


@dataclass
class StepSolution:
    """Result of one solve of the step program.

    Attributes
    ----------
    rates : ndarray, shape (H, K)
    positions : ndarray, shape (H + 1, n, 2)
        Predicted positions at the period boundaries (first row: the measured positions).
    slack_pairs : ndarray, shape (H, slots)
    slack_walls, slack_trust : ndarray, shape (H, n)
    objective : float
    progress : float
        The common progress ``a`` chosen (0 with fixed references).
    status : str
        ``"optimal"``, ``"inaccurate"`` (usable, looser tolerance) or ``"failed"``.
    solve_time : float
        Wall time of the whole solve (data update, solver, read-out), s.
    solver_time : float
        The solver's own time, s.
    iterations : int
    """

    rates: np.ndarray
    positions: np.ndarray
    slack_pairs: np.ndarray
    slack_walls: np.ndarray
    slack_trust: np.ndarray
    objective: float
    progress: float
    status: str
    solve_time: float
    solver_time: float
    iterations: int = 0
    info: dict = field(default_factory=dict)

    @property
    def max_slack(self):
        """Largest slack of any soft constraint (0 when the hard program was satisfied)."""
        parts = [a.max() for a in (self.slack_pairs, self.slack_walls, self.slack_trust) if a.size]
        return float(max(parts)) if parts else 0.0


class StepProgram:
    """The convex step program, built once per problem shape and re-solved each period.

    Parameters
    ----------
    n_bodies : int
    n_fields : int
        K, the number of basis fields (channels or primitives).
    horizon : int
        H, periods looked ahead.
    n_slots : int, optional
        Room for separation constraints (default all pairs up to ``4 n``).
    n_rate_rows : int
        Rows of extra linear constraints on the rates per period.
    slew : bool
        Whether rate changes are limited between horizon periods.
    timeshare : bool
        Whether ``sum_k r_hk <= 1`` (rates are fractions of the period).
    backend : {"osqp", "cvxpy"}
    solver : str, optional
        cvxpy solver name for the ``"cvxpy"`` backend (default ``"OSQP"``).
    eps : float
        Solver tolerance (absolute and relative), in the program's units.

    Examples
    --------
    One body, two channels pushing along x and y, reference one unit ahead along x:

    >>> import numpy as np
    >>> prog = StepProgram(1, 2, horizon=1)
    >>> F = np.array([[[1.0, 0.0]], [[0.0, 1.0]]])            # (K, n, 2)
    >>> data = StepData(positions=np.zeros((1, 2)), fields=F, drift=np.zeros((1, 2)),
    ...                 refs=np.array([[[0.5, 0.0]]]), track=np.ones(1), lower=-np.ones(2),
    ...                 upper=np.ones(2), previous=np.zeros(2), effort=np.zeros(2),
    ...                 smooth=np.zeros(2), trust=np.full(1, 2.0))
    >>> sol = prog.solve(data)
    >>> np.round(sol.rates[0], 4).tolist()
    [0.5, 0.0]
    """

    def __init__(self, n_bodies, n_fields, horizon=1, *, n_slots=None, n_rate_rows=0, slew=False,
                 timeshare=False, backend="osqp", solver=None, eps=1e-5, max_iter=4000):
        self.n = int(n_bodies)
        self.K = int(n_fields)
        self.H = int(horizon)
        if self.n < 1 or self.K < 1 or self.H < 1:
            raise FieldplanError(f"StepProgram needs n_bodies, n_fields and horizon >= 1, got "
                                 f"({n_bodies}, {n_fields}, {horizon}).")
        all_pairs = self.n * (self.n - 1) // 2
        self.P = int(min(all_pairs, 4 * self.n) if n_slots is None else min(int(n_slots), all_pairs))
        self.m = int(n_rate_rows)
        self.slew = bool(slew)
        self.timeshare = bool(timeshare)
        if backend not in ("osqp", "cvxpy"):
            raise FieldplanError(f"StepProgram backend must be 'osqp' or 'cvxpy', got {backend!r}.")
        self.backend = backend
        self.solver = solver or "OSQP"
        self.eps = float(eps)
        self.max_iter = int(max_iter)
        self.n_solves = 0
        if backend == "osqp":
            self._build_osqp()
        else:
            self._build_cvxpy()

    @property
    def shape(self):
        """The problem shape this program was built for."""
        return (self.n, self.K, self.H, self.P, self.m, self.slew, self.timeshare)

    # -- data preparation shared by both back ends ---------------------------------------------------
    def _prepare(self, data):
        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m

        def per_h(a, shape):
            a = np.asarray(a, dtype=float)
            if a.shape == shape:
                return np.broadcast_to(a, (H,) + shape)
            if a.shape == (H,) + shape:
                return a
            raise FieldplanError(f"StepProgram: expected shape {shape} or {(H,) + shape}, got {a.shape}.")

        d = {}
        d["p0"] = np.asarray(data.positions, float).reshape(n, 2)
        d["F"] = per_h(data.fields, (K, n, 2))
        d["d"] = per_h(data.drift, (n, 2))
        d["ref"] = per_h(data.refs, (n, 2))
        if data.ref_dirs is not None:
            d["dir"] = per_h(data.ref_dirs, (n, 2))
            d["amax"] = 1.0
        else:
            d["dir"] = np.zeros((H, n, 2))
            d["amax"] = 0.0
        d["reward"] = float(data.progress_reward) if data.ref_dirs is not None else 0.0
        d["w"] = np.maximum(per_h(data.track, (n,)), 0.0)
        lo = per_h(data.lower, (K,)).copy()
        hi = per_h(data.upper, (K,)).copy()
        prev = np.asarray(data.previous, float).reshape(K)
        slew = np.full(K, np.inf) if data.slew is None else np.asarray(data.slew, float).reshape(K)
        # Slew from the last applied rates bounds the first period directly.
        lo0 = np.maximum(lo[0], prev - slew)
        hi0 = np.minimum(hi[0], prev + slew)
        clash = lo0 > hi0
        if clash.any():
            # Bounds moved away faster than the slew allows (e.g. an RMS budget shrank): stay as close
            # to the bound as the slew permits; the controller reports it.
            mid = np.clip(prev, lo[0], hi[0])
            lo0 = np.where(clash, np.clip(mid, prev - slew, prev + slew), lo0)
            hi0 = np.where(clash, lo0, hi0)
        lo[0], hi[0] = lo0, hi0
        d["lo"], d["hi"], d["prev"], d["slew_v"], d["clash"] = lo, hi, prev, slew, clash
        d["e"] = np.maximum(np.asarray(data.effort, float).reshape(K), 0.0)
        d["s"] = np.maximum(np.asarray(data.smooth, float).reshape(K), 0.0)
        d["delta"] = per_h(data.trust, (n,))
        d["centre"] = d["p0"] if data.trust_centre is None else np.asarray(data.trust_centre, float).reshape(n, 2)
        if m:
            d["C"] = np.asarray(data.rate_rows, float).reshape(m, K)
            d["c"] = per_h(data.rate_rhs, (m,))
        G = np.zeros((H, P, 2 * n))
        gap = np.full((H, P), -1.0)
        if data.pairs is not None and len(data.pairs) and P:
            pairs = np.asarray(data.pairs, dtype=int).reshape(-1, 2)
            k = len(pairs)
            if k > P:
                raise FieldplanError(f"StepProgram: {k} pairs given but only {P} slots were built.")
            nrm = per_h(data.pair_normals, (k, 2))
            rows = np.arange(k)
            for c in range(2):
                G[:, rows, 2 * pairs[:, 0] + c] = nrm[:, :, c]
                G[:, rows, 2 * pairs[:, 1] + c] = -nrm[:, :, c]
            gap[:, :k] = np.asarray(data.pair_gap, float).reshape(k)
        d["G"], d["gap"] = G, gap
        if data.wall_normals is not None:
            wn = per_h(data.wall_normals, (n, 2))
            wp = per_h(data.wall_points, (n, 2))
            wg = np.asarray(data.wall_gap, float).reshape(n)
            rhs = np.where(np.any(wn != 0, axis=2), np.einsum("hic,hic->hi", wn, wp) + wg[None], -1.0)
        else:
            wn = np.zeros((H, n, 2))
            rhs = np.full((H, n), -1.0)
        d["wn"], d["wrhs"] = wn, rhs
        if self.timeshare:
            F0 = d["F"][0]                                      # (K, n, 2)
            drift0 = d["d"][0]
            act = np.any(wn[0] != 0, axis=1)
            proj = np.einsum("knc,nc->nk", F0, wn[0])
            sc = float(data.worst_order_scale)
            d["CwR"] = np.where(act[:, None], np.minimum(proj, 0.0), 0.0) * sc
            d["rwR"] = np.where(act, rhs[0] - np.einsum("nc,nc->n", wn[0], d["p0"] + drift0), -1.0)
            CpR = np.zeros((P, K))
            rpR = np.full(P, -1.0)
            if data.pairs is not None and len(data.pairs) and P:
                pairs = np.asarray(data.pairs, dtype=int).reshape(-1, 2)
                k = len(pairs)
                nrm0 = per_h(data.pair_normals, (k, 2))[0]
                rel = F0[:, pairs[:, 0]] - F0[:, pairs[:, 1]]   # (K, k, 2)
                CpR[:k] = np.minimum(np.einsum("kpc,pc->pk", rel, nrm0), 0.0) * sc
                relp = (d["p0"] + drift0)[pairs[:, 0]] - (d["p0"] + drift0)[pairs[:, 1]]
                rpR[:k] = gap[0, :k] - np.einsum("pc,pc->p", nrm0, relp)
            d["CpR"], d["rpR"] = CpR, rpR
        d["rho"] = float(data.slack_weight)
        return d

    # -- OSQP back end -------------------------------------------------------------------------------
    def _build_osqp(self):
        import osqp

        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m
        nn = 2 * n
        r_off = 0
        p_off = r_off + H * K
        a_off = p_off + H * nn
        ss_off = a_off + 1
        sw_off = ss_off + H * P
        st_off = sw_off + H * n
        nz = st_off + H * n
        self._off = dict(r=r_off, p=p_off, a=a_off, ss=ss_off, sw=sw_off, st=st_off, nz=nz)

        def rix(h):
            return r_off + h * K + np.arange(K)

        def pix(h):
            return p_off + h * nn + np.arange(nn)

        # ---- objective pattern (upper triangle) ----
        prow, pcol, self._pblocks = [], [], {}

        def padd(name, rows, cols):
            self._pblocks[name] = (len(prow), len(rows))
            prow.extend(rows)
            pcol.extend(cols)

        padd("rr", np.arange(H * K), np.arange(H * K))
        if H > 1:
            a = np.concatenate([rix(h - 1) for h in range(1, H)])
            b = np.concatenate([rix(h) for h in range(1, H)])
            padd("rr_off", a, b)
        padd("pp", np.arange(p_off, p_off + H * nn), np.arange(p_off, p_off + H * nn))
        padd("pa", np.arange(p_off, p_off + H * nn), np.full(H * nn, a_off))
        padd("aa", [a_off], [a_off])
        Pm, self._pperm = csc_pattern(prow, pcol, (nz, nz))

        # ---- constraint pattern ----
        arow, acol, self._ablocks = [], [], {}
        row = [0]
        self._rows = {}

        def aadd(name, rows, cols):
            self._ablocks[name] = (len(arow), len(rows))
            arow.extend(rows)
            acol.extend(cols)

        def new_rows(name, count):
            self._rows[name] = (row[0], count)
            row[0] += count
            return row[0] - count

        # dynamics: p_{h+1} - p_h - F_h r_h = d_h (+ p0 at h = 0)
        r0 = new_rows("dyn", H * nn)
        for h in range(H):
            rows = r0 + h * nn + np.arange(nn)
            aadd(f"dyn_p{h}", rows, pix(h))
            if h:
                aadd(f"dyn_pm{h}", rows, pix(h - 1))
            rr, cc = np.meshgrid(rows, rix(h), indexing="ij")
            aadd(f"dyn_F{h}", rr.ravel(), cc.ravel())
        r0 = new_rows("bounds", H * K)
        aadd("bounds", r0 + np.arange(H * K), np.arange(H * K))
        r0 = new_rows("alpha", 1)
        aadd("alpha", [r0], [a_off])
        if self.slew and H > 1:
            r0 = new_rows("slew", (H - 1) * K)
            rows = r0 + np.arange((H - 1) * K)
            aadd("slew_a", rows, np.concatenate([rix(h) for h in range(1, H)]))
            aadd("slew_b", rows, np.concatenate([rix(h - 1) for h in range(1, H)]))
        if self.timeshare:
            r0 = new_rows("sum", H)
            aadd("sum", np.repeat(r0 + np.arange(H), K), np.arange(H * K))
        if m:
            r0 = new_rows("rate", H * m)
            for h in range(H):
                rr, cc = np.meshgrid(r0 + h * m + np.arange(m), rix(h), indexing="ij")
                aadd(f"rate{h}", rr.ravel(), cc.ravel())
        if P:
            r0 = new_rows("pairs", H * P)
            for h in range(H):
                rows = r0 + h * P + np.arange(P)
                rr, cc = np.meshgrid(rows, pix(h), indexing="ij")
                aadd(f"pairG{h}", rr.ravel(), cc.ravel())
                aadd(f"pairS{h}", rows, ss_off + h * P + np.arange(P))
        if self.timeshare:
            r0 = new_rows("wallR", n)
            rr, cc = np.meshgrid(r0 + np.arange(n), rix(0), indexing="ij")
            aadd("wallR", rr.ravel(), cc.ravel())
            aadd("wallRS", r0 + np.arange(n), sw_off + np.arange(n))
            if P:
                r0 = new_rows("pairR", P)
                rr, cc = np.meshgrid(r0 + np.arange(P), rix(0), indexing="ij")
                aadd("pairR", rr.ravel(), cc.ravel())
                aadd("pairRS", r0 + np.arange(P), ss_off + np.arange(P))
        r0 = new_rows("walls", H * n)
        for h in range(H):
            rows = r0 + h * n + np.arange(n)
            aadd(f"wallN{h}", np.repeat(rows, 2), pix(h))
            aadd(f"wallS{h}", rows, sw_off + h * n + np.arange(n))
        # trust: 4 directions x 2 sides per body and period
        r0 = new_rows("trust", H * n * 8)
        tvals = []
        for h in range(H):
            for side in (0, 1):
                for q in range(4):
                    rows = r0 + ((h * 2 + side) * 4 + q) * n + np.arange(n)
                    cols = pix(h).reshape(n, 2)
                    aadd(f"tr{h}_{side}_{q}", np.repeat(rows, 2), cols.ravel())
                    tvals.append(np.tile(_TRUST_DIRS[q], n))
                    if h:
                        aadd(f"trm{h}_{side}_{q}", np.repeat(rows, 2), pix(h - 1))
                        tvals.append(-np.tile(_TRUST_DIRS[q], n))
                    aadd(f"trS{h}_{side}_{q}", rows, st_off + h * n + np.arange(n))
                    tvals.append(np.full(n, -1.0 if side == 0 else 1.0))
        r0 = new_rows("slack", H * (P + 2 * n))
        aadd("slack", r0 + np.arange(H * (P + 2 * n)), np.arange(ss_off, nz))
        self.n_rows = row[0]
        self._ax = np.zeros(len(arow))
        # Fixed coefficients are written once.
        self._aset("bounds", 1.0)
        self._aset("alpha", 1.0)
        for h in range(H):
            self._aset(f"dyn_p{h}", 1.0)
            if h:
                self._aset(f"dyn_pm{h}", -1.0)
            self._aset(f"pairS{h}", 1.0) if P else None
            self._aset(f"wallS{h}", 1.0)
        if self.slew and H > 1:
            self._aset("slew_a", 1.0)
            self._aset("slew_b", -1.0)
        if self.timeshare:
            self._aset("sum", 1.0)
            self._aset("wallRS", 1.0)
            if P:
                self._aset("pairRS", 1.0)
        names = [k for k in self._ablocks if k.startswith("tr")]
        for name, vals in zip(names, tvals):
            self._aset(name, vals)
        self._aset("slack", 1.0)
        Am, self._aperm = csc_pattern(arow, acol, (self.n_rows, nz))
        self._pattern_A = Am
        self._pattern_P = Pm
        self._px = np.zeros(len(prow))
        self._osqp = osqp.OSQP()
        self._osqp_ready = False
        self._last_px = None

    def _aset(self, name, vals):
        s, c = self._ablocks[name]
        self._ax[s:s + c] = vals

    def _pset(self, name, vals):
        s, c = self._pblocks[name]
        self._px[s:s + c] = vals

    def _solve_osqp(self, d):
        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m
        nn = 2 * n
        off = self._off
        # objective
        sm_mult = np.ones((H, K))
        if H > 1:
            sm_mult[:-1] += 1.0
        self._pset("rr", (2 * (d["e"][None] + d["s"][None] * sm_mult)).ravel())
        if H > 1:
            self._pset("rr_off", np.tile(-2 * d["s"], H - 1))
        wcoord = np.repeat(d["w"], 2, axis=1)              # (H, 2n)
        self._pset("pp", (2 * wcoord).ravel())
        dirv = d["dir"].reshape(H, nn)
        refv = d["ref"].reshape(H, nn)
        self._pset("pa", (-2 * wcoord * dirv).ravel())
        self._pset("aa", [2 * np.sum(wcoord * dirv * dirv)])
        q = np.zeros(off["nz"])
        q[:K] = -2 * d["s"] * d["prev"]
        q[off["p"]:off["a"]] = (-2 * wcoord * refv).ravel()
        q[off["a"]] = 2 * np.sum(wcoord * refv * dirv) - d["reward"]
        q[off["ss"]:] = d["rho"]
        # constraints
        lo = np.empty(self.n_rows)
        up = np.empty(self.n_rows)
        p0 = d["p0"].ravel()
        s, c = self._rows["dyn"]
        beq = d["d"].reshape(H, nn).copy()
        beq[0] += p0
        lo[s:s + c] = up[s:s + c] = beq.ravel()
        for h in range(H):
            self._aset(f"dyn_F{h}", (-d["F"][h].reshape(K, nn).T).ravel())
        s, c = self._rows["bounds"]
        lo[s:s + c], up[s:s + c] = d["lo"].ravel(), d["hi"].ravel()
        s, c = self._rows["alpha"]
        lo[s], up[s] = 0.0, d["amax"]
        if "slew" in self._rows:
            s, c = self._rows["slew"]
            sl = np.tile(d["slew_v"], H - 1)
            lo[s:s + c], up[s:s + c] = -sl, sl
        if "sum" in self._rows:
            s, c = self._rows["sum"]
            lo[s:s + c], up[s:s + c] = -np.inf, 1.0
        if m:
            s, c = self._rows["rate"]
            for h in range(H):
                self._aset(f"rate{h}", d["C"].ravel())
            lo[s:s + c], up[s:s + c] = -np.inf, d["c"].ravel()
        if P:
            s, c = self._rows["pairs"]
            for h in range(H):
                self._aset(f"pairG{h}", d["G"][h].ravel())
            lo[s:s + c], up[s:s + c] = d["gap"].ravel(), np.inf
        if self.timeshare:
            s, c = self._rows["wallR"]
            self._aset("wallR", d["CwR"].ravel())
            lo[s:s + c], up[s:s + c] = d["rwR"], np.inf
            if P:
                s, c = self._rows["pairR"]
                self._aset("pairR", d["CpR"].ravel())
                lo[s:s + c], up[s:s + c] = d["rpR"], np.inf
        s, c = self._rows["walls"]
        for h in range(H):
            self._aset(f"wallN{h}", d["wn"][h].ravel())
        lo[s:s + c], up[s:s + c] = d["wrhs"].ravel(), np.inf
        s, c = self._rows["trust"]
        tl = np.empty((H, 2, 4, n))
        tu = np.empty((H, 2, 4, n))
        shift = d["centre"] @ _TRUST_DIRS.T                  # (n, 4): the h = 0 anchor is data
        for h in range(H):
            sh = shift.T if h == 0 else 0.0
            tl[h, 0], tu[h, 0] = -np.inf, d["delta"][h][None] + sh
            tl[h, 1], tu[h, 1] = -d["delta"][h][None] + sh, np.inf
        lo[s:s + c], up[s:s + c] = tl.ravel(), tu.ravel()
        s, c = self._rows["slack"]
        lo[s:s + c], up[s:s + c] = 0.0, np.inf

        Ax = self._ax[self._aperm]
        Px = self._px[self._pperm]
        t0 = time.perf_counter()
        if not self._osqp_ready:
            A = self._pattern_A.copy()
            A.data = Ax
            Pm = self._pattern_P.copy()
            Pm.data = Px
            self._osqp.setup(Pm, q, A, lo, up, verbose=False, eps_abs=self.eps, eps_rel=self.eps,
                             max_iter=self.max_iter, polishing=True, warm_starting=True,
                             polish_refine_iter=3)
            self._osqp_ready = True
            self._last_px = Px.copy()
        else:
            kw = dict(q=q, l=lo, u=up, Ax=Ax)
            if not np.array_equal(Px, self._last_px):
                kw["Px"] = Px
                self._last_px = Px.copy()
            self._osqp.update(**kw)
        res = self._osqp.solve(raise_error=False)
        t1 = time.perf_counter()
        status = res.info.status
        info = res.info
        if status == "solved":
            st = "optimal"
        elif status in ("solved inaccurate", "maximum iterations reached") and res.x is not None \
                and np.all(np.isfinite(res.x)) and info.prim_res < 1e-2:
            # The data are of order one, so a residual of 1e-2 is a usable (if rough) step.
            st = "inaccurate"
        else:
            st = "failed"
        z = res.x if (res.x is not None and np.all(np.isfinite(res.x))) else np.zeros(off["nz"])
        own = float(info.solve_time + info.update_time + info.polish_time + (info.setup_time if self.n_solves == 0 else 0.0))
        return z, st, float(info.obj_val), own, int(info.iter), t1 - t0

    # -- cvxpy back end ------------------------------------------------------------------------------
    def _build_cvxpy(self):
        import cvxpy as cp

        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m
        nn = 2 * n
        r = cp.Variable((H, K), name="rates")
        p = cp.Variable((H, nn), name="positions")
        st = cp.Variable((H, n), nonneg=True, name="slack_trust")
        alpha = cp.Variable(nonneg=True, name="progress")
        sw = cp.Variable((H, n), nonneg=True, name="slack_walls")
        prm = {
            "p0": cp.Parameter(nn, name="p0"),
            "centre": cp.Parameter(nn, name="trust_centre"),
            "d": cp.Parameter((H, nn), name="drift"),
            "ref": cp.Parameter((H, nn), name="ref"),
            "sqw": cp.Parameter((H, nn), nonneg=True, name="sqrt_track"),
            "sqwref": cp.Parameter((H, nn), name="sqrt_track_x_ref"),
            "sqwdir": cp.Parameter((H, nn), name="sqrt_track_x_dir"),
            "amax": cp.Parameter(nonneg=True, name="progress_max"),
            "reward": cp.Parameter(nonneg=True, name="progress_reward"),
            "lo": cp.Parameter((H, K), name="lower"),
            "hi": cp.Parameter((H, K), name="upper"),
            "prev": cp.Parameter(K, name="previous"),
            "sqe": cp.Parameter((H, K), nonneg=True, name="sqrt_effort"),
            "sqs": cp.Parameter((H, K), nonneg=True, name="sqrt_smooth"),
            "sqsprev": cp.Parameter(K, name="sqrt_smooth_x_previous"),
            "delta": cp.Parameter((H, n), name="trust"),
            "wnx": cp.Parameter((H, n), name="wall_nx"),
            "wny": cp.Parameter((H, n), name="wall_ny"),
            "wrhs": cp.Parameter((H, n), name="wall_rhs"),
            "rho": cp.Parameter(nonneg=True, name="rho"),
        }
        F = [cp.Parameter((nn, K), name=f"F{h}") for h in range(H)]
        cons = []
        prev_p = prm["p0"]
        for h in range(H):
            cons.append(p[h] == prev_p + prm["d"][h] + F[h] @ r[h])
            dp = p[h] - (prm["centre"] if h == 0 else prev_p)
            dx, dy = dp[0::2], dp[1::2]
            for ex in (dx, dy, np.sqrt(0.5) * (dx + dy), np.sqrt(0.5) * (dx - dy)):
                cons += [ex <= prm["delta"][h] + st[h], ex >= -prm["delta"][h] - st[h]]
            cons.append(cp.multiply(prm["wnx"][h], p[h, 0::2]) + cp.multiply(prm["wny"][h], p[h, 1::2])
                        + sw[h] >= prm["wrhs"][h])
            prev_p = p[h]
        cons += [r >= prm["lo"], r <= prm["hi"], alpha <= prm["amax"]]
        if self.slew and H > 1:
            prm["slew"] = cp.Parameter((H - 1, K), nonneg=True, name="slew")
            cons += [r[1:] - r[:-1] <= prm["slew"], r[1:] - r[:-1] >= -prm["slew"]]
        if self.timeshare:
            cons.append(cp.sum(r, axis=1) <= 1)
        if m:
            prm["C"] = cp.Parameter((m, K), name="rate_rows")
            prm["c"] = cp.Parameter((H, m), name="rate_rhs")
            for h in range(H):
                cons.append(prm["C"] @ r[h] <= prm["c"][h])
        slack_sum = cp.sum(st) + cp.sum(sw)
        Gs = []
        if P:
            ss = cp.Variable((H, P), nonneg=True, name="slack_pairs")
            prm["gap"] = cp.Parameter((H, P), name="pair_gap")
            for h in range(H):
                G = cp.Parameter((P, nn), name=f"G{h}")
                Gs.append(G)
                cons.append(G @ p[h] + ss[h] >= prm["gap"][h])
            slack_sum = slack_sum + cp.sum(ss)
        else:
            ss = None
        if self.timeshare:
            prm["CwR"] = cp.Parameter((n, K), name="wall_worst_order")
            prm["rwR"] = cp.Parameter(n, name="wall_worst_rhs")
            cons.append(prm["CwR"] @ r[0] + sw[0] >= prm["rwR"])
            if P:
                prm["CpR"] = cp.Parameter((P, K), name="pair_worst_order")
                prm["rpR"] = cp.Parameter(P, name="pair_worst_rhs")
                cons.append(prm["CpR"] @ r[0] + ss[0] >= prm["rpR"])
        # DPP forbids a parameter times an expression holding parameters, so the weighted
        # references enter as their own parameters (sqrt(w) * ref, sqrt(s) * previous).
        first = cp.multiply(prm["sqs"][0], r[0]) - prm["sqsprev"]
        smooth = cp.sum_squares(first)
        if H > 1:
            smooth = smooth + cp.sum_squares(cp.multiply(prm["sqs"][1:], r[1:] - r[:-1]))
        obj = (cp.sum_squares(cp.multiply(prm["sqw"], p) - prm["sqwref"] - prm["sqwdir"] * alpha)
               - prm["reward"] * alpha
               + cp.sum_squares(cp.multiply(prm["sqe"], r))
               + smooth
               + prm["rho"] * slack_sum)
        self.problem = cp.Problem(cp.Minimize(obj), cons)
        self._cv = dict(r=r, p=p, st=st, sw=sw, ss=ss, a=alpha, prm=prm, F=F, G=Gs)

    def _solve_cvxpy(self, d):
        import cvxpy as cp

        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m
        nn = 2 * n
        cv = self._cv
        prm = cv["prm"]
        prm["p0"].value = d["p0"].ravel()
        prm["centre"].value = d["centre"].ravel()
        prm["d"].value = d["d"].reshape(H, nn)
        prm["ref"].value = d["ref"].reshape(H, nn)
        prm["sqw"].value = np.sqrt(np.repeat(d["w"], 2, axis=1))
        prm["sqwref"].value = prm["sqw"].value * d["ref"].reshape(H, nn)
        prm["sqwdir"].value = prm["sqw"].value * d["dir"].reshape(H, nn)
        prm["amax"].value = d["amax"]
        prm["reward"].value = max(d["reward"], 0.0)
        prm["sqsprev"].value = np.sqrt(d["s"]) * d["prev"]
        prm["lo"].value = d["lo"]
        prm["hi"].value = d["hi"]
        prm["prev"].value = d["prev"]
        prm["sqe"].value = np.broadcast_to(np.sqrt(d["e"]), (H, K)).copy()
        prm["sqs"].value = np.broadcast_to(np.sqrt(d["s"]), (H, K)).copy()
        prm["delta"].value = np.asarray(d["delta"], float)
        prm["wnx"].value = d["wn"][:, :, 0]
        prm["wny"].value = d["wn"][:, :, 1]
        prm["wrhs"].value = d["wrhs"]
        prm["rho"].value = d["rho"]
        if "slew" in prm:
            sl = np.where(np.isfinite(d["slew_v"]), d["slew_v"], 1e9)
            prm["slew"].value = np.broadcast_to(sl, (H - 1, K)).copy()
        if m:
            prm["C"].value = d["C"]
            prm["c"].value = d["c"]
        if self.timeshare:
            prm["CwR"].value = d["CwR"]
            prm["rwR"].value = d["rwR"]
            if P:
                prm["CpR"].value = d["CpR"]
                prm["rpR"].value = d["rpR"]
        for h in range(H):
            cv["F"][h].value = d["F"][h].reshape(K, nn).T
        if P:
            prm["gap"].value = d["gap"]
            for h in range(H):
                cv["G"][h].value = d["G"][h]
        t0 = time.perf_counter()
        opts = {}
        if self.solver == "OSQP":
            opts = dict(eps_abs=self.eps, eps_rel=self.eps, max_iter=self.max_iter * 5)
        try:
            self.problem.solve(solver=self.solver, warm_start=True, **opts)
            status = self.problem.status
        except cp.SolverError:
            status = "solver_error"
        t1 = time.perf_counter()
        if status == cp.OPTIMAL:
            st = "optimal"
        elif status == cp.OPTIMAL_INACCURATE:
            st = "inaccurate"
        else:
            st = "failed"
        z = {}
        ok = cv["r"].value is not None
        z["r"] = cv["r"].value if ok else np.zeros((H, K))
        z["p"] = cv["p"].value if ok else np.repeat(d["p0"].ravel()[None], H, 0)
        z["st"] = cv["st"].value if ok else np.zeros((H, n))
        z["sw"] = cv["sw"].value if ok else np.zeros((H, n))
        z["ss"] = cv["ss"].value if (ok and P) else np.zeros((H, P))
        z["a"] = float(cv["a"].value) if ok else 0.0
        stats = self.problem.solver_stats
        own = float(stats.solve_time) if (stats is not None and stats.solve_time is not None) else t1 - t0
        iters = int(stats.num_iters) if (stats is not None and stats.num_iters is not None) else 0
        val = float(self.problem.value) if ok and self.problem.value is not None else np.nan
        return z, st, val, own, iters, t1 - t0

    # -- public --------------------------------------------------------------------------------------
    def solve(self, data):
        """Solve the program for one period's ``data`` (:class:`StepData`); returns :class:`StepSolution`."""
        t0 = time.perf_counter()
        d = self._prepare(data)
        n, K, H, P = self.n, self.K, self.H, self.P
        nn = 2 * n
        if self.backend == "osqp":
            z, st, val, own, iters, _ = self._solve_osqp(d)
            off = self._off
            rates = z[:H * K].reshape(H, K)
            pos = z[off["p"]:off["a"]].reshape(H, n, 2)
            alpha = float(z[off["a"]])
            ss = z[off["ss"]:off["sw"]].reshape(H, P)
            sw = z[off["sw"]:off["st"]].reshape(H, n)
            stt = z[off["st"]:].reshape(H, n)
            # The constant part of the tracking and smoothness terms, so both back ends report the same value.
            val += float(np.sum(np.repeat(d["w"], 2, axis=1) * d["ref"].reshape(H, nn) ** 2)
                         + np.sum(d["s"] * d["prev"] ** 2))
        else:
            z, st, val, own, iters, _ = self._solve_cvxpy(d)
            rates, pos = z["r"], z["p"].reshape(H, n, 2)
            alpha = z["a"]
            ss, sw, stt = z["ss"], z["sw"], z["st"]
        # Rates are clipped to their bounds: solver round-off must not reach the hardware.
        rates = np.clip(rates, d["lo"], d["hi"])
        positions = np.concatenate([d["p0"][None], pos], axis=0)
        self.n_solves += 1
        info = {"bound_clash": np.flatnonzero(d["clash"]).tolist()}
        return StepSolution(rates, positions, np.maximum(ss, 0), np.maximum(sw, 0), np.maximum(stt, 0),
                            val, float(np.clip(alpha, 0.0, 1.0)), st, time.perf_counter() - t0, own, iters, info)


def csc_pattern(rows, cols, shape):
    """CSC matrix with the given (row, col) pattern and the permutation from insertion order to CSC order.

    Every entry is stored, zeros included, so the pattern never changes between solves and the
    solver's symbolic factorisation is reused.
    """
    rows = np.asarray(rows, dtype=np.int64)
    cols = np.asarray(cols, dtype=np.int64)
    ids = np.arange(1, len(rows) + 1, dtype=float)
    M = sp.csc_matrix((ids, (rows, cols)), shape=shape)
    M.sort_indices()
    if M.nnz != len(rows):
        raise FieldplanError("internal: duplicate entries in the step program pattern.")
    perm = (M.data - 1).astype(np.int64)
    return M, perm
