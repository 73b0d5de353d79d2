"""The horizon program: one sparse convex QP over H periods for all bodies at once.

Decision variables (program units: lengths in a length unit ``L``, inputs as normalised rates):

* ``w[h, k]``, h = 0..H-1: the weights of period ``h`` - channel values over their scale (linear
  mode) or the fraction of the period each primitive is held (timeshare mode);
* ``x[h, i]``, h = 1..H: the position of body ``i`` at the end of period ``h - 1``;
* slacks of the separation and wall constraints (exact penalties, reported).

Constraints: the dynamics linearised along the nominal trajectory ``xbar`` (weights ``wbar``),
``x[h+1] = x[h] + d[h] + F[h] w[h] + M[h] (x[h] - xbar[h])`` with ``M[h]`` the Jacobian of the
velocity field under ``wbar[h]`` (per body, 2 x 2: it carries the fields' variation in space, which
is what lets a sequence of periods move more bodies than one period can; the controller
re-linearises between iterations), the input set (box per period, the
time-share simplex, per-period mean-square rows for RMS budgets), slew between periods, a trust
region ``|x[h] - xbar[h]| <= delta`` around the nominal trajectory, linearised body-body separation
``n_ij . (x_i - x_j) >= gap - s`` for every pair at every period's end and midpoint, and linearised wall keep-out
``n_i . x_i >= rhs - s`` (also at each period's midpoint). Objective: ``sum omega |x - c|^2`` (the cost-to-go's local quadratics,
see :mod:`fieldplan.planning.costtogo`) + effort ``sum e w^2`` + smoothness
``sum s (w[h] - w[h-1])^2`` (with ``w[-1]`` the input being played) + ``rho * sum(slack)``.

The sparsity pattern depends only on ``(n, K, H, m, timeshare, slew)``, so the program is set up
once per shape and re-solved warm with OSQP (``osqp.OSQP.update``), which reuses the symbolic
factorisation. :meth:`HorizonProgram.to_cvxpy` states the same problem in cvxpy, as an
independent check of the hand-built matrices.

Examples
--------
>>> import numpy as np
>>> prog = HorizonProgram(n_bodies=1, n_fields=2, horizon=3)
>>> F = np.zeros((3, 2, 1, 2)); F[:, 0, 0, 0] = 1.0; F[:, 1, 0, 1] = 1.0
>>> data = HorizonData.unconstrained(F, p0=[[0.0, 0.0]], centre=[[[2.0, 1.0]]] * 3, trust=10.0)
>>> sol = prog.solve(data)
>>> sol.status, np.round(sol.x[-1, 0], 3).tolist()
('optimal', [2.0, 1.0])
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp

from .step import csc_pattern as _pattern      # one pattern builder for both programs (fixed sparsity, CSC order)
from ..errors import FieldplanError

__all__ = ["HorizonProgram", "HorizonData", "HorizonSolution"]


@dataclass
class HorizonData:
    """Numbers of one solve of the horizon program (program units; see the module docstring).

    Attributes
    ----------
    F : ndarray, shape (H, K, n, 2)
        Displacement over period ``h`` per unit weight, L.
    d : ndarray, shape (H, n, 2)
        Drift displacement over period ``h``, L.
    p0 : ndarray, shape (n, 2)
        Positions now, L.
    lower, upper : ndarray, shape (H, K)
        Weight bounds per period.
    previous : ndarray, shape (K,)
        The weights being played now (smoothness and slew anchor).
    slew : ndarray, shape (K,), optional
        Largest change of a weight from one period to the next.
    rate_rows : ndarray, shape (m, K), optional
        Per-period linear rows ``C w[h] <= rate_rhs[h]`` (timeshare mean-square budgets).
    rate_rhs : ndarray, shape (H, m), optional
    xbar : ndarray, shape (H, n, 2)
        Nominal trajectory at the end of each period (centre of the trust region), L.
    jac : ndarray, shape (H, n, 2, 2), optional
        ``M[h]``: derivative of body ``i``'s displacement over period ``h`` with respect to its own
        position at the period's start, under the nominal weights (dimensionless; ``M[0]`` is unused
        because ``x[0]`` is fixed). Default zero: fields frozen along the nominal trajectory.
    trust : ndarray, shape (H, n)
        Trust radius per period and body (infinity norm), L.
    omega : ndarray, shape (H, n)
        Weight of each body's squared distance to its virtual goal.
    centre : ndarray, shape (H, n, 2)
        Virtual goals, L.
    effort, smooth : ndarray, shape (K,)
        Input weights.
    pair_normal : ndarray, shape (H, P, 2)
        Unit normals ``n_ij`` per pair (all pairs i < j, in ``itertools.combinations`` order).
    pair_gap : ndarray, shape (H, P)
        Least ``n_ij . (x_i - x_j)``, L (``-inf``: pair inactive).
    wall_normal : ndarray, shape (H, n, 2)
    wall_rhs : ndarray, shape (H, n)
        Least ``n_i . x_i``, L (``-inf``: no wall near).
    slack_weight : float
        Exact-penalty weight ``rho`` per L of slack.
    timeshare : bool
        Add the simplex row ``sum_k w[h, k] <= 1``.
    """

    F: np.ndarray
    d: np.ndarray
    p0: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    previous: np.ndarray
    xbar: np.ndarray
    trust: np.ndarray
    omega: np.ndarray
    centre: np.ndarray
    effort: np.ndarray
    smooth: np.ndarray
    pair_normal: np.ndarray
    pair_gap: np.ndarray
    wall_normal: np.ndarray
    wall_rhs: np.ndarray
    slew: np.ndarray | None = None
    jac: np.ndarray | None = None
    rate_rows: np.ndarray | None = None
    rate_rhs: np.ndarray | None = None
    slack_weight: float = 1e3
    timeshare: bool = False

    @classmethod
    def unconstrained(cls, F, p0, centre, trust=1.0, omega=1.0, lower=-1.0, upper=1.0):
        """Data with only the dynamics, a box and a trust region (for tests and examples)."""
        F = np.asarray(F, dtype=float)
        H, K, n, _ = F.shape
        p0 = np.asarray(p0, dtype=float).reshape(n, 2)
        P = n * (n - 1) // 2
        return cls(F=F, d=np.zeros((H, n, 2)), p0=p0, lower=np.full((H, K), lower), upper=np.full((H, K), upper),
                   previous=np.zeros(K), xbar=np.repeat(p0[None], H, 0), trust=np.full((H, n), float(trust)),
                   omega=np.full((H, n), float(omega)), centre=np.asarray(centre, dtype=float).reshape(H, n, 2),
                   effort=np.full(K, 1e-6), smooth=np.zeros(K), pair_normal=np.zeros((H, P, 2)),
                   pair_gap=np.full((H, P), -np.inf), wall_normal=np.zeros((H, n, 2)),
                   wall_rhs=np.full((H, n), -np.inf))


@dataclass
class HorizonSolution:
    """One solve: ``status`` is ``"optimal"``, ``"inaccurate"`` (usable) or ``"failed"``.

    Attributes
    ----------
    w : ndarray, shape (H, K)
    x : ndarray, shape (H, n, 2)
        Predicted positions at the end of each period (linearised model), L.
    objective : float
    max_slack : float
        Largest separation or wall slack, L.
    solve_time : float
        Wall time of the update and solve, s.
    solver_time : float
        OSQP's own setup/update/solve/polish time, s.
    iterations : int
    """

    status: str
    w: np.ndarray
    x: np.ndarray
    objective: float
    max_slack: float
    solve_time: float
    solver_time: float
    iterations: int
    info: dict = field(default_factory=dict)


class _Blocks:
    """Named blocks of a sparse pattern, filled by value arrays in insertion order."""

    def __init__(self):
        self.rows, self.cols, self.index = [], [], {}

    def add(self, name, rows, cols):
        rows = np.asarray(rows, dtype=np.int64).ravel()
        cols = np.asarray(cols, dtype=np.int64).ravel()
        self.index[name] = (sum(len(r) for r in self.rows), len(rows))
        self.rows.append(rows)
        self.cols.append(cols)

    def finish(self, shape):
        rows = np.concatenate(self.rows) if self.rows else np.zeros(0, np.int64)
        cols = np.concatenate(self.cols) if self.cols else np.zeros(0, np.int64)
        self.values = np.zeros(len(rows))
        self.matrix, self.perm = _pattern(rows, cols, shape)

    def set(self, name, vals):
        s, c = self.index[name]
        self.values[s:s + c] = vals

    def data(self):
        return self.values[self.perm]


class HorizonProgram:
    """The horizon QP of one problem shape, set up once and re-solved warm.

    Parameters
    ----------
    n_bodies, n_fields, horizon : int
        ``n``, ``K``, ``H``.
    n_rate_rows : int
        ``m``, per-period linear input rows (timeshare RMS budgets).
    timeshare : bool
        Add the simplex row per period.
    slew : bool
        Add the slew rows.
    eps : float
        OSQP's absolute and relative tolerances.
    max_iter : int
        OSQP iteration cap per solve (a solve that hits it returns its iterate as ``"inaccurate"``
        when the residual is usable).
    """

    def __init__(self, n_bodies, n_fields, horizon, *, n_rate_rows=0, timeshare=False, slew=False, eps=1e-3,
                 max_iter=1000):
        for name, v in (("n_bodies", n_bodies), ("n_fields", n_fields), ("horizon", horizon)):
            if not (isinstance(v, (int, np.integer)) and v >= 1):
                raise FieldplanError(f"HorizonProgram {name} must be an integer >= 1, got {v!r}.")
        self.n, self.K, self.H, self.m = int(n_bodies), int(n_fields), int(horizon), int(n_rate_rows)
        self.timeshare, self.slew = bool(timeshare), bool(slew)
        self.eps, self.max_iter = float(eps), int(max_iter)
        self.pairs = np.array([(i, j) for i in range(self.n) for j in range(i + 1, self.n)], dtype=np.int64)
        self.pairs = self.pairs.reshape(-1, 2)
        self.P = len(self.pairs)
        self.n_solves = 0
        self._build()

    @property
    def shape(self):
        """(n, K, H, m, timeshare, slew): what fixes the sparsity pattern."""
        return (self.n, self.K, self.H, self.m, self.timeshare, self.slew)

    # -- pattern ---------------------------------------------------------------------------------------
    def _build(self):
        import osqp

        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m
        nn = 2 * n
        ow = 0
        ox = ow + H * K
        osp = ox + H * nn
        osw = osp + H * P
        nz = osw + H * n
        self._off = dict(w=ow, x=ox, sp=osp, sw=osw, nz=nz)
        wi = lambda h: ow + h * K + np.arange(K)          # noqa: E731 - index helpers
        xi = lambda h: ox + h * nn + np.arange(nn)        # noqa: E731  (h = 0..H-1 holds x[h + 1])
        # objective (upper triangle)
        Pb = _Blocks()
        Pb.add("ww", np.arange(H * K), np.arange(H * K))
        if H > 1:
            Pb.add("ww_off", np.arange(0, (H - 1) * K), np.arange(K, H * K))
        Pb.add("xx", np.arange(ox, osp), np.arange(ox, osp))
        Pb.finish((nz, nz))
        self._P = Pb
        # constraints
        Ab = _Blocks()
        rows = {}
        r = 0

        def new(name, count):
            nonlocal r
            rows[name] = (r, count)
            r += count
            return r - count

        r0 = new("dyn", H * nn)
        for h in range(H):
            rr = r0 + h * nn + np.arange(nn)
            Ab.add(f"dyn_x{h}", rr, xi(h))
            if h:
                # -(I + M[h]) on x[h]: a 2 x 2 block per body
                bi = np.arange(n)
                rows_b = (r0 + h * nn + 2 * bi[:, None, None] + np.arange(2)[None, :, None]) + 0 * np.arange(2)[None, None, :]
                cols_b = (xi(h - 1)[0] + 2 * bi[:, None, None] + np.arange(2)[None, None, :]) + 0 * np.arange(2)[None, :, None]
                Ab.add(f"dyn_xm{h}", rows_b, cols_b)
            R, C = np.meshgrid(rr, wi(h), indexing="ij")
            Ab.add(f"dyn_F{h}", R, C)
        r0 = new("wbox", H * K)
        Ab.add("wbox", r0 + np.arange(H * K), np.arange(H * K))
        if self.timeshare:
            r0 = new("sum", H)
            Ab.add("sum", np.repeat(r0 + np.arange(H), K), np.arange(H * K))
        if m:
            r0 = new("rate", H * m)
            for h in range(H):
                R, C = np.meshgrid(r0 + h * m + np.arange(m), wi(h), indexing="ij")
                Ab.add(f"rate{h}", R, C)
        if self.slew:
            r0 = new("slew", H * K)
            Ab.add("slew_a", r0 + np.arange(H * K), np.arange(H * K))
            if H > 1:
                Ab.add("slew_b", r0 + np.arange(K, H * K), np.arange(0, (H - 1) * K))
        r0 = new("trust", H * nn)
        Ab.add("trust", r0 + np.arange(H * nn), np.arange(ox, osp))
        if P:
            def pair_cols(stage):
                """Columns (x_i, y_i, x_j, y_j) of every pair at stored stage ``stage``, shape (P, 4)."""
                base = ox + stage * nn
                i, j = 2 * self.pairs[:, 0], 2 * self.pairs[:, 1]
                return np.stack([base + i, base + i + 1, base + j, base + j + 1], axis=1)

            r0 = new("pairs", H * P)
            for h in range(H):
                rr = r0 + h * P + np.arange(P)
                Ab.add(f"pairX{h}", np.repeat(rr, 4), pair_cols(h))
                Ab.add(f"pairS{h}", rr, osp + h * P + np.arange(P))
            # The same pairs halfway through each period (the midpoint of the straight move): bodies
            # that swap sides between two period ends would otherwise pass through each other.
            r0 = new("pairs_mid", H * P)
            for h in range(H):
                rr = r0 + h * P + np.arange(P)
                for j, stage in enumerate((h, h - 1)):
                    if stage >= 0:
                        Ab.add(f"pairM{h}_{j}", np.repeat(rr, 4), pair_cols(stage))
                Ab.add(f"pairMS{h}", rr, osp + h * P + np.arange(P))
        r0 = new("walls", H * n)
        for h in range(H):
            rr = r0 + h * n + np.arange(n)
            Ab.add(f"wallX{h}", np.repeat(rr, 2), xi(h))
            Ab.add(f"wallS{h}", rr, osw + h * n + np.arange(n))
        # ... and halfway through each period, so a straight move does not cut an obstacle's corner.
        r0 = new("walls_mid", H * n)
        for h in range(H):
            rr = r0 + h * n + np.arange(n)
            Ab.add(f"wallM{h}_0", np.repeat(rr, 2), xi(h))
            if h:
                Ab.add(f"wallM{h}_1", np.repeat(rr, 2), xi(h - 1))
            Ab.add(f"wallMS{h}", rr, osw + h * n + np.arange(n))
        r0 = new("slack", H * (P + n))
        Ab.add("slack", r0 + np.arange(H * (P + n)), np.arange(osp, nz))
        self.n_rows = r
        self._rows = rows
        Ab.finish((r, nz))
        self._A = Ab
        # fixed coefficients
        self._eye = np.tile(np.eye(2), (n, 1, 1)).ravel()
        for h in range(H):
            Ab.set(f"dyn_x{h}", 1.0)
            if h:
                Ab.set(f"dyn_xm{h}", -self._eye)
            if P:
                Ab.set(f"pairS{h}", 1.0)
                Ab.set(f"pairMS{h}", 1.0)
            Ab.set(f"wallS{h}", 1.0)
            Ab.set(f"wallMS{h}", 1.0)
        Ab.set("wbox", 1.0)
        if self.timeshare:
            Ab.set("sum", 1.0)
        if self.slew:
            Ab.set("slew_a", 1.0)
            if H > 1:
                Ab.set("slew_b", -1.0)
        Ab.set("trust", 1.0)
        Ab.set("slack", 1.0)
        self._solver = osqp.OSQP()
        self._ready = False
        self._last_Px = None
        self._last_z = None

    # -- solve -----------------------------------------------------------------------------------------
    def _check(self, d):
        n, K, H = self.n, self.K, self.H
        want = {"F": (H, K, n, 2), "d": (H, n, 2), "p0": (n, 2), "lower": (H, K), "upper": (H, K),
                "previous": (K,), "xbar": (H, n, 2), "trust": (H, n), "omega": (H, n), "centre": (H, n, 2),
                "effort": (K,), "smooth": (K,), "pair_normal": (H, self.P, 2), "pair_gap": (H, self.P),
                "wall_normal": (H, n, 2), "wall_rhs": (H, n)}
        for key, shape in want.items():
            v = np.asarray(getattr(d, key))
            if v.shape != shape:
                raise FieldplanError(f"HorizonData.{key} must have shape {shape}, got {v.shape}.")
        if bool(d.timeshare) != self.timeshare:
            raise FieldplanError("HorizonData.timeshare does not match the program.")
        if self.m and (d.rate_rows is None or np.shape(d.rate_rows) != (self.m, K)
                       or np.shape(d.rate_rhs) != (H, self.m)):
            raise FieldplanError(f"HorizonData.rate_rows must have shape ({self.m}, {K}) and rate_rhs ({H}, {self.m}).")
        if d.jac is not None and np.shape(d.jac) != (H, n, 2, 2):
            raise FieldplanError(f"HorizonData.jac must have shape {(H, n, 2, 2)}, got {np.shape(d.jac)}.")
        if self.slew and (d.slew is None or np.shape(d.slew) != (K,)):
            raise FieldplanError(f"HorizonData.slew must have shape ({K},).")

    def _vectors(self, d):
        """Objective and bounds, and the data-dependent constraint coefficients."""
        n, K, H, P, m = self.n, self.K, self.H, self.P, self.m
        nn = 2 * n
        off = self._off
        Pb, Ab = self._P, self._A
        e = np.asarray(d.effort, float)
        s = np.asarray(d.smooth, float)
        # smoothness s (w[h] - w[h-1])^2 for h = 0..H-1 (w[-1] = previous): every w[h] is in two
        # terms except the last.
        mult = np.full((H, 1), 2.0)
        mult[-1] = 1.0
        Pb.set("ww", (2.0 * (e[None] + s[None] * mult)).ravel())
        if H > 1:
            Pb.set("ww_off", np.tile(-2.0 * s, H - 1))
        om = np.repeat(np.asarray(d.omega, float), 2, axis=1)          # (H, 2n)
        Pb.set("xx", (2.0 * om).ravel())
        q = np.zeros(off["nz"])
        q[off["w"]:off["w"] + K] = -2.0 * s * np.asarray(d.previous, float)
        q[off["x"]:off["sp"]] = (-2.0 * om * np.asarray(d.centre, float).reshape(H, nn)).ravel()
        q[off["sp"]:] = float(d.slack_weight)
        lo = np.empty(self.n_rows)
        up = np.empty(self.n_rows)
        F = np.asarray(d.F, float)
        for h in range(H):
            Ab.set(f"dyn_F{h}", (-F[h].reshape(K, nn).T).ravel())
        s0, c = self._rows["dyn"]
        beq = np.asarray(d.d, float).reshape(H, nn).copy()
        beq[0] += np.asarray(d.p0, float).ravel()
        if d.jac is not None:
            M = np.asarray(d.jac, float)
            xb = np.asarray(d.xbar, float)
            for h in range(1, H):
                Ab.set(f"dyn_xm{h}", -(self._eye + M[h].ravel()))
                beq[h] -= np.einsum("nab,nb->na", M[h], xb[h - 1]).ravel()
        else:
            for h in range(1, H):
                Ab.set(f"dyn_xm{h}", -self._eye)
        lo[s0:s0 + c] = up[s0:s0 + c] = beq.ravel()
        s0, c = self._rows["wbox"]
        lo[s0:s0 + c], up[s0:s0 + c] = np.asarray(d.lower, float).ravel(), np.asarray(d.upper, float).ravel()
        if self.timeshare:
            s0, c = self._rows["sum"]
            lo[s0:s0 + c], up[s0:s0 + c] = -np.inf, 1.0
        if m:
            s0, c = self._rows["rate"]
            for h in range(H):
                Ab.set(f"rate{h}", np.asarray(d.rate_rows, float).ravel())
            lo[s0:s0 + c], up[s0:s0 + c] = -np.inf, np.asarray(d.rate_rhs, float).ravel()
        if self.slew:
            s0, c = self._rows["slew"]
            sl = np.tile(np.asarray(d.slew, float), H)
            base = np.zeros(H * K)
            base[:K] = np.asarray(d.previous, float)
            lo[s0:s0 + c], up[s0:s0 + c] = base - sl, base + sl
        s0, c = self._rows["trust"]
        xb = np.asarray(d.xbar, float).reshape(H, nn)
        tr = np.repeat(np.asarray(d.trust, float), 2, axis=1)
        lo[s0:s0 + c], up[s0:s0 + c] = (xb - tr).ravel(), (xb + tr).ravel()
        if P:
            s0, c = self._rows["pairs"]
            pn = np.asarray(d.pair_normal, float)
            for h in range(H):
                Ab.set(f"pairX{h}", np.concatenate([pn[h], -pn[h]], axis=1).ravel())
            lo[s0:s0 + c], up[s0:s0 + c] = np.asarray(d.pair_gap, float).ravel(), np.inf
            s0, c = self._rows["pairs_mid"]
            gap = np.asarray(d.pair_gap, float).copy()
            p0 = np.asarray(d.p0, float)
            for h in range(H):
                half = 0.5 * np.concatenate([pn[h], -pn[h]], axis=1).ravel()
                Ab.set(f"pairM{h}_0", half)
                if h:
                    Ab.set(f"pairM{h}_1", half)
            rel0 = p0[self.pairs[:, 0]] - p0[self.pairs[:, 1]]
            gap[0] = gap[0] - 0.5 * np.einsum("pc,pc->p", pn[0], rel0)
            lo[s0:s0 + c], up[s0:s0 + c] = gap.ravel(), np.inf
        s0, c = self._rows["walls"]
        wn = np.asarray(d.wall_normal, float)
        for h in range(H):
            Ab.set(f"wallX{h}", wn[h].ravel())
        lo[s0:s0 + c], up[s0:s0 + c] = np.asarray(d.wall_rhs, float).ravel(), np.inf
        s0, c = self._rows["walls_mid"]
        rhs = np.asarray(d.wall_rhs, float).copy()
        for h in range(H):
            Ab.set(f"wallM{h}_0", 0.5 * wn[h].ravel())
            if h:
                Ab.set(f"wallM{h}_1", 0.5 * wn[h].ravel())
        rhs[0] = rhs[0] - 0.5 * np.einsum("nc,nc->n", wn[0], np.asarray(d.p0, float))
        lo[s0:s0 + c], up[s0:s0 + c] = rhs.ravel(), np.inf
        s0, c = self._rows["slack"]
        lo[s0:s0 + c], up[s0:s0 + c] = 0.0, np.inf
        return q, lo, up

    def solve(self, data, warm=None):
        """Solve for ``data`` (a :class:`HorizonData`); ``warm`` is an optional primal start (nz,).

        Returns
        -------
        HorizonSolution
        """
        self._check(data)
        q, lo, up = self._vectors(data)
        Ax, Px = self._A.data(), self._P.data()
        tic = time.perf_counter()
        if not self._ready:
            A = self._A.matrix.copy()
            A.data = Ax
            Pm = self._P.matrix.copy()
            Pm.data = Px
            self._solver.setup(Pm, q, A, lo, up, verbose=False, eps_abs=self.eps, eps_rel=self.eps,
                               max_iter=self.max_iter, polishing=True, warm_starting=True, polish_refine_iter=3)
            self._ready = True
            self._last_Px = Px.copy()
        else:
            kw = dict(q=q, l=lo, u=up, Ax=Ax)
            if not np.array_equal(Px, self._last_Px):
                kw["Px"] = Px
                self._last_Px = Px.copy()
            self._solver.update(**kw)
        if warm is not None:
            self._solver.warm_start(x=np.asarray(warm, dtype=float))
        res = self._solver.solve(raise_error=False)
        wall = time.perf_counter() - tic
        info = res.info
        z = res.x
        ok = z is not None and np.all(np.isfinite(z))
        if info.status == "solved" and ok:
            status = "optimal"
        elif ok and info.status in ("solved inaccurate", "maximum iterations reached") and info.prim_res < 1e-2:
            status = "inaccurate"
        else:
            status = "failed"
        if not ok:
            z = np.zeros(self._off["nz"])
        own = float(info.solve_time + info.update_time + info.polish_time
                    + (info.setup_time if self.n_solves == 0 else 0.0))
        self.n_solves += 1
        off = self._off
        H, K, n = self.H, self.K, self.n
        w = z[off["w"]:off["x"]].reshape(H, K)
        x = z[off["x"]:off["sp"]].reshape(H, n, 2)
        slack = z[off["sp"]:]
        return HorizonSolution(status, w.copy(), x.copy(), float(info.obj_val), float(np.max(slack, initial=0.0)),
                               wall, own, int(info.iter), {"z": z.copy(), "osqp_status": info.status})

    def shifted(self, z, periods=1):
        """A primal start for a later solve: every block moved ``periods`` earlier, the last repeated."""
        z = np.asarray(z, dtype=float).copy()
        off = self._off
        H = self.H
        k = int(min(max(periods, 0), H - 1))
        if not k:
            return z
        for name, nxt, width in (("w", "x", self.K), ("x", "sp", 2 * self.n), ("sp", "sw", self.P),
                                 ("sw", None, self.n)):
            if not width:
                continue
            a = off[name]
            b = off[nxt] if nxt else off["nz"]
            blk = z[a:b].reshape(H, width)
            blk[:-k] = blk[k:].copy()
            blk[-k:] = blk[-k - 1]
            z[a:b] = blk.ravel()
        return z

    # -- the same problem in cvxpy (check) -----------------------------------------------------------
    def to_cvxpy(self, d):
        """The same QP stated with cvxpy, for an independent check of the hand-built matrices.

        Returns
        -------
        (cvxpy.Problem, w Variable (H, K), x Variable (H, 2n))
        """
        import cvxpy as cp

        self._check(d)
        n, K, H = self.n, self.K, self.H
        nn = 2 * n
        w = cp.Variable((H, K))
        x = cp.Variable((H, nn))
        sp_ = cp.Variable((H, max(self.P, 1)), nonneg=True)
        sw = cp.Variable((H, n), nonneg=True)
        F = np.asarray(d.F, float)
        cons = []
        prev_x = np.asarray(d.p0, float).ravel()
        obj = 0
        om = np.repeat(np.asarray(d.omega, float), 2, axis=1)
        cen = np.asarray(d.centre, float).reshape(H, nn)
        xb = np.asarray(d.xbar, float).reshape(H, nn)
        tr = np.repeat(np.asarray(d.trust, float), 2, axis=1)
        prev_w = np.asarray(d.previous, float)
        M = np.zeros((H, n, 2, 2)) if d.jac is None else np.asarray(d.jac, float)
        xbar = np.asarray(d.xbar, float)
        for h in range(H):
            Fh = F[h].reshape(K, nn).T
            xm = prev_x if h == 0 else x[h - 1]
            lin = 0.0
            if h:
                Mb = np.zeros((nn, nn))
                for i in range(n):
                    Mb[2 * i:2 * i + 2, 2 * i:2 * i + 2] = M[h, i]
                lin = Mb @ (x[h - 1] - xbar[h - 1].ravel())
            cons += [x[h] == xm + np.asarray(d.d, float)[h].ravel() + Fh @ w[h] + lin]
            cons += [w[h] >= np.asarray(d.lower, float)[h], w[h] <= np.asarray(d.upper, float)[h]]
            if self.timeshare:
                cons += [cp.sum(w[h]) <= 1.0]
            if self.m:
                cons += [np.asarray(d.rate_rows, float) @ w[h] <= np.asarray(d.rate_rhs, float)[h]]
            wm = prev_w if h == 0 else w[h - 1]
            if self.slew:
                cons += [cp.abs(w[h] - wm) <= np.asarray(d.slew, float)]
            cons += [cp.abs(x[h] - xb[h]) <= tr[h]]
            for p, (i, j) in enumerate(self.pairs):
                g = float(np.asarray(d.pair_gap)[h, p])
                if np.isfinite(g):
                    nv = np.asarray(d.pair_normal, float)[h, p]
                    cons += [nv @ (x[h, 2 * i:2 * i + 2] - x[h, 2 * j:2 * j + 2]) + sp_[h, p] >= g]
                    mid = 0.5 * (x[h] + xm)
                    cons += [nv @ (mid[2 * i:2 * i + 2] - mid[2 * j:2 * j + 2]) + sp_[h, p] >= g]
            for i in range(n):
                g = float(np.asarray(d.wall_rhs)[h, i])
                if np.isfinite(g):
                    nw = np.asarray(d.wall_normal, float)[h, i]
                    cons += [nw @ x[h, 2 * i:2 * i + 2] + sw[h, i] >= g]
                    cons += [nw @ (0.5 * (x[h] + xm))[2 * i:2 * i + 2] + sw[h, i] >= g]
            obj += cp.sum(cp.multiply(om[h], cp.square(x[h] - cen[h])))
            obj += cp.sum(cp.multiply(np.asarray(d.effort, float), cp.square(w[h])))
            obj += cp.sum(cp.multiply(np.asarray(d.smooth, float), cp.square(w[h] - wm)))
            prev_x = x[h]
        obj += float(d.slack_weight) * (cp.sum(sp_) + cp.sum(sw))
        return cp.Problem(cp.Minimize(obj), cons), w, x
