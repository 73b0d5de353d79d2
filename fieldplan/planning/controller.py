"""The horizon planner: receding-horizon sequential convex programming on cost-to-go maps.

Each control period :class:`Controller` decides the whole input sequence of the next ``H``
periods for all bodies at once, and plays the first period:

1. **Nominal trajectories.** Candidate input sequences (the previous plan shifted by one period,
   the idle input, and after a stall the recovery guesses of :mod:`fieldplan.planning.recovery`)
   are rolled out on the model's field basis from the measured positions, all candidates in one
   vectorised basis call per period; the one of lowest *true cost* is the nominal.
2. **Sequential convex programming.** Along the nominal trajectory the fields are frozen, each
   body's squared time-to-go (its :class:`~fieldplan.planning.costtogo.CostToGo` map) becomes a
   local quadratic, separation and wall constraints are linearised, and the horizon QP
   (:class:`~fieldplan.planning.program.HorizonProgram`) is solved warm inside a trust region. The
   solution is rolled out on the model and accepted only if its true cost is no higher; otherwise
   the trust region shrinks. A bounded number of iterations per period keeps it anytime: the best
   plan found so far is played.
3. **Output.** The first period's weights become hardware segments (:class:`ControllerBase`:
   time-share rounds, hardware steps, slew ramps, RMS trimming).

The true cost of a trajectory ``x[1..H]`` and weights ``w[0..H-1]`` is
``sum_h sum_i (J_i(x[h, i]) / T)^2 / 2`` (``J_i`` the time-to-go of body ``i``, ``T`` the period)
+ effort and smoothness of the weights + ``slack_weight`` times the separation and wall
deficits in length units. Bodies far from home weigh more (their time-to-go is squared), so the
shared fields serve whoever is behind while the others wait near where they are; nothing imposes a
common pace.

Examples
--------
>>> import fieldplan
>>> from fieldplan.testing import SourceArray
>>> act = SourceArray([[0, 0], [1e-3, 0], [0, 1e-3]], force=2e-12)
>>> ws = fieldplan.Workspace((0, 0, 1e-3, 1e-3))
>>> bead = fieldplan.Body("bead", radius=5e-6, density=1050.0)
>>> ctrl = Controller(act, [bead], ws, [[2e-4, 2e-4]])
>>> segs = ctrl.step([[5e-4, 5e-4]], 0.0)
>>> round(sum(s.duration for s in segs) / ctrl.period, 9)
1.0
"""

from __future__ import annotations

import collections
import time

import numpy as np

from ..errors import WorkspaceError
from ..units import format_quantity
from .routes import default_resolution, occupancy_graph, route_length
from .base import ControllerBase
from .costtogo import cost_to_go, speed_table
from .fieldtable import FieldTable
from .program import HorizonData, HorizonProgram
from . import recovery

__all__ = ["Controller"]

#: Radius of the cost's dead zone around each goal, as a fraction of the arrival radius.
DEAD_ZONE = 0.3
#: Hardware slots (time steps, or minimum dwells) an automatic time-share period holds at least.
MIX_SLOTS = 8
#: Radius of each body's goal region in arrival radii: within a third of it the time-to-go is the
#: straight-line distance over one speed, so the final approach is an exact quadratic
#: (:class:`~fieldplan.planning.costtogo.CostToGo`).
GOAL_REGION = 3.0
#: Working separation of two bodies, as a fraction of the fields' variation length: closer than
#: this, the shared fields move both nearly alike and they can hardly be parted again (measured on
#: the 64-tone plate: two grains held 3.8 mm apart, at half a variation length, their goals 40 mm
#: apart in opposite directions, stayed together from 57 s to the 300 s limit). It is kept as a soft
#: constraint; never more than 0.8 times their goals' distance, nor less than contact plus
#: clearance, and only where both have that much room from the walls (near a wall, parting them
#: would press one into it). One variation length, not half: 64-tone plate N = 6, 7/9 against 5/9 on
#: the same nine tasks; 24-tone plate N = 3, 2/3 against 1/3; coils N = 3 3/3 either way (benchmark
#: seeds, small samples).
SPREAD = 1.0
#: Largest route grid (cells), so a very fine route_resolution is an error, not hours and gigabytes.
MAX_GRID_CELLS = 1_000_000


class Controller(ControllerBase):
    """Receding-horizon controller: positions in, one period of segments out (the horizon planner).

    Parameters
    ----------
    actuator : Actuator
        The planning model.
    bodies : sequence of Body, length n
    workspace : Workspace
    goals : array_like, shape (n, 2)
        m.
    limits : HardwareLimits, optional
    settings : PlanSettings or dict, optional

    Attributes
    ----------
    period : float
        s (set by :meth:`prepare`).
    horizon : int
        Periods planned ahead.
    maps : list of CostToGo
        Each body's time-to-goal map.
    routes : list of ndarray (P_i, 2)
        Fastest path of each body on its map from where it started, m (for plots and reports).
    stalls : list of str
        Every stall detected and what was done about it.
    notes : list of str
    records : list of dict
        Per period: time, status, solve times, accepted iterations, true cost, largest slack.
    """

    def __init__(self, actuator, bodies, workspace, goals, *, limits=None, settings=None):
        super().__init__(actuator, bodies, workspace, goals, limits=limits, settings=settings)
        self.maps = None
        self.routes = []
        self.route_reasons = [None] * self.n
        self._graphs = {}

    # -- set-up ----------------------------------------------------------------------------------------
    def _min_period(self):
        """In timeshare mode a period must hold enough hardware slots to play a mix.

        The program plans a continuous mix of primitives per period; the hardware plays whole time
        steps of at least the minimum dwell. With fewer than :data:`MIX_SLOTS` slots per period the
        mix played is mostly rounding error (measured on the 64-tone plate, 20 ms steps, 40 ms dwell:
        six grains arrived with 0.32 s periods, not with 0.08 s).
        """
        lim = self.limits
        if self.mode != "timeshare" or lim is None:
            return 0.0
        dwell = max([lim.min_dwell or 0.0] + [lim.get(c.name).min_dwell or 0.0 for c in self.channels])
        slot = max(dwell, lim.time_step or 0.0)
        return MIX_SLOTS * slot

    def _map_inputs(self, body, res):
        """The route graph and speed table of one body kind, cached."""
        key = (body, res)
        if key not in self._graphs:
            g = occupancy_graph(self.workspace, body.radius, res, clearance=self.clearance)
            self._graphs[key] = (g, speed_table(g, self.actuator, body, self.medium))
        return self._graphs[key]

    def _build_maps(self, p):
        s = self.settings
        res = float(s.route_resolution) if s.route_resolution else default_resolution(self.workspace)
        xmin, ymin, xmax, ymax = self.workspace.bounds
        cells = ((xmax - xmin) / res) * ((ymax - ymin) / res)
        if cells > MAX_GRID_CELLS:
            raise WorkspaceError(
                f"route_resolution {format_quantity(res, 'm')} makes a grid of {cells:.3g} cells over the workspace, "
                f"more than the {MAX_GRID_CELLS:.0e} the planner allows (memory and time): use a coarser resolution, "
                f"at least {format_quantity(np.sqrt((xmax - xmin) * (ymax - ymin) / MAX_GRID_CELLS), 'm')}.")
        if s.assign_goals and self.n > 1:
            self._assign(p, res)
        maps = []
        for i, b in enumerate(self.bodies):
            g, table = self._map_inputs(b, res)
            if not table[0]:
                raise WorkspaceError(f"body {i} ({b.name}) has no free space on the {format_quantity(res, 'm')} "
                                     "route grid.")
            maps.append(cost_to_go(self.workspace, self.actuator, b, self.goals[i], start=p[i], resolution=res,
                                   clearance=self.clearance, graph=g, speeds=table,
                                   near=GOAL_REGION * self.tolerance[i]))
        return maps

    def _assign(self, p, res):
        """Bodies of one kind swap goals to minimise the summed squared time-to-go."""
        from scipy.optimize import linear_sum_assignment

        kinds = collections.defaultdict(list)
        for i, b in enumerate(self.bodies):
            kinds[b].append(i)
        goals = self.goals.copy()
        for b, idx in kinds.items():
            if len(idx) < 2:
                continue
            g, table = self._map_inputs(b, res)
            C = np.empty((len(idx), len(idx)))
            for c, j in enumerate(idx):
                m = cost_to_go(self.workspace, self.actuator, b, self.goals[j], resolution=res,
                               clearance=self.clearance, graph=g, speeds=table)
                C[:, c] = m.value(p[idx]) ** 2
            rows, cols = linear_sum_assignment(C)
            for r, c in zip(rows, cols):
                goals[idx[r]] = self.goals[idx[c]]
        if not np.array_equal(goals, self.goals):
            self.notes.append("goals assigned among bodies of the same kind (least summed squared time-to-go)")
        self.goals = goals

    def prepare(self, positions, t=0.0):
        """Cost-to-go maps, period, horizon and the program, from the first positions (m)."""
        p = self._check_positions(positions)
        s = self.settings
        delta, speed = self._prepare_inputs(p)
        self.initial_speed = speed
        self.maps = self._build_maps(p)
        self._table = None
        if s.field_table:
            res = float(s.route_resolution) if s.route_resolution else default_resolution(self.workspace)
            tres = float(s.table_resolution) if s.table_resolution else 0.5 * res
            self._table = FieldTable(self.actuator, self.bodies, self.medium, self.workspace.bounds, tres)
        self.routes = [m.route if m.route is not None else np.array([p[i]]) for i, m in enumerate(self.maps)]
        self.route_lengths = np.array([route_length(r) for r in self.routes])
        J0 = np.array([m.value(p[i:i + 1])[0] for i, m in enumerate(self.maps)])
        for i, m in enumerate(self.maps):
            if m.route is None:
                self.route_reasons[i] = (f"its start is cut off from its goal in the free space of a body of radius "
                                         f"{format_quantity(self.bodies[i].radius, 'm')} (walls and obstacles, "
                                         f"clearance {format_quantity(self.clearance, 'm')})")
        self.initial_time_to_go = J0
        if self.n > 1:
            i, j = np.triu_indices(self.n, 1)
            contact = self.radii[i] + self.radii[j] + self.clearance
            ell = self.length_unit / s.trust_fraction          # the median variation length, m
            gd = np.linalg.norm(self.goals[i] - self.goals[j], axis=1)
            self._contact = contact
            self._sep = np.maximum(contact, np.minimum(SPREAD * ell, 0.8 * gd))
        else:
            self._contact = self._sep = np.zeros(0)
        # A dead zone around each goal (a third of the arrival radius, well inside the margin a plan
        # settles to): a body there costs nothing, so the shared fields may jostle it a little while
        # they bring the last ones in - without it the last body's pull is balanced by the others'.
        self._dead = np.array([DEAD_ZONE * self.tolerance[i] / m.goal_speed for i, m in enumerate(self.maps)])
        T = self.period
        self.horizon = int(s.horizon) if s.horizon else int(np.clip(round(2.0 / s.trust_fraction), 8, 30))
        H = self.horizon
        m_rows = len(self._rms) if self.mode == "timeshare" else 0
        self.program = HorizonProgram(self.n, self.K, H, n_rate_rows=m_rows, timeshare=self.mode == "timeshare",
                                      slew=self._slew is not None)
        self._prev = self._idle_rate.copy()
        self._W = np.tile(self._idle_rate, (H, 1))         # the nominal plan for the next step
        self._warm = None
        self._t0 = float(t)
        self._step = 0
        self._hist = collections.deque(maxlen=max(2 * s.stall_window, 4))
        self._stall_until = -1
        self._stall_count = np.zeros(self.n, dtype=int)
        self._rng = np.random.default_rng(0)
        finite = J0[np.isfinite(J0)]
        if s.time_limit:
            self.time_limit = float(s.time_limit)
        else:
            # Bodies alone would need J0; sharing the fields they take turns and go slower. Ten times
            # the slowest or four times their sum, whichever is longer, plus settling: generous,
            # so that the limit ends only runs that have truly stopped progressing.
            est = max(10.0 * float(finite.max(initial=0.0)), 4.0 * float(finite.sum()))
            self.time_limit = float(est + (50 + s.settle_steps) * T)
        self.ready = True

    # -- the model along a horizon ---------------------------------------------------------------------
    def _disp_fields(self, xy, gradient=False):
        """Per-period displacement fields at positions ``xy`` (C, n, 2), m per unit rate.

        Returns ``F`` (C, K, n, 2) and ``d`` (C, n, 2); with ``gradient`` also their derivatives
        with respect to each body's own position, ``dF`` (C, K, n, 2, 2) and ``dd`` (C, n, 2, 2)
        (``[..., c, j]`` = d component c / d x_j).
        """
        C = xy.shape[0]
        flat = xy.reshape(-1, 2)
        if self._table is not None:
            out = self._table.fields(flat, gradient=gradient)
        else:
            B = self.actuator.basis(self.bodies * C, self.medium, flat)
            out = (B.fields, B.drift)
            if gradient:
                # Forward differences of the exact model, a thousandth of the trust radius.
                eps = 1e-3 * self.length_unit
                parts = [self.actuator.basis(self.bodies * C, self.medium, flat + step)
                         for step in ([eps, 0.0], [0.0, eps])]
                dF = np.stack([(q.fields - B.fields) / eps for q in parts], axis=-1)
                dd = np.stack([(q.drift - B.drift) / eps for q in parts], axis=-1)
                out = out + (dF, dd)
        T = self.period
        sc = self._scale[None, :, None, None] * T
        F = out[0].reshape(self.K, C, self.n, 2).transpose(1, 0, 2, 3) * sc
        d = out[1].reshape(C, self.n, 2) * T
        if not gradient:
            return F, d
        dF = out[2].reshape(self.K, C, self.n, 2, 2).transpose(1, 0, 2, 3, 4) * sc[..., None]
        dd = out[3].reshape(C, self.n, 2, 2) * T
        return F, d, dF, dd

    def _rollout(self, p, Ws):
        """Model trajectories of candidate sequences ``Ws`` (C, H, K) from ``p``.

        Returns
        -------
        X : ndarray, shape (C, H + 1, n, 2)
            m, ``X[:, 0] = p``.
        F : ndarray, shape (C, H, K, n, 2)
        d : ndarray, shape (C, H, n, 2)
        M : ndarray, shape (C, H, n, 2, 2)
            Jacobian of each body's displacement over period ``h`` with respect to its position at
            the period's start, under the candidate's weights.
        pushed : ndarray, shape (C,)
            How far the walls had to push bodies back, summed, m (a wall stops a body in the model
            as in the world, so this is the only trace a push into a wall leaves: the true cost
            charges it like a constraint deficit).
        """
        C, H, K = Ws.shape
        n = self.n
        X = np.empty((C, H + 1, n, 2))
        F = np.empty((C, H, K, n, 2))
        d = np.empty((C, H, n, 2))
        M = np.empty((C, H, n, 2, 2))
        X[:, 0] = p
        pushed = np.zeros(C)
        rad = np.tile(self.radii, C)
        for h in range(H):
            Fh, dh, dFh, ddh = self._disp_fields(X[:, h], gradient=True)
            F[:, h], d[:, h] = Fh, dh
            M[:, h] = ddh + np.einsum("ck,cknij->cnij", Ws[:, h], dFh)
            nxt = X[:, h] + dh + np.einsum("ck,ckni->cni", Ws[:, h], Fh)
            # Walls stop bodies in the model as in the world (the program keeps them off anyway).
            flat = nxt.reshape(-1, 2)
            inside = self.workspace.contains(flat, 0.0) & (self.workspace.clearance(flat) >= rad)
            if not inside.all():
                flat = flat.copy()
                for r in np.unique(rad[~inside]):
                    sel = (~inside) & (rad == r)
                    flat[sel] = self.workspace.project(flat[sel], float(r))[0]
                pushed += np.linalg.norm(flat.reshape(C, n, 2) - nxt, axis=2).sum(axis=1)
                nxt = flat.reshape(C, n, 2)
            X[:, h + 1] = nxt
        return X, F, d, M, pushed

    def _time_to_go(self, X):
        """Time to goal of every body at positions ``X`` (..., n, 2), s: value and gradient."""
        shp = X.shape[:-2]
        flat = X.reshape(-1, self.n, 2)
        val = np.empty(flat.shape[:2])
        grad = np.empty(flat.shape)
        for i, m in enumerate(self.maps):
            val[:, i], grad[:, i] = m.value_and_gradient(flat[:, i])
        return val.reshape(shp + (self.n,)), grad.reshape(shp + (self.n, 2))

    def _pair_need(self, flat, clr=None):
        """Separation each pair must keep at positions ``flat`` (C, n, 2) m, shape (C, P) m.

        The working separation where both bodies have that much room from the walls; near a wall
        only contact plus clearance (parting them there would press one into the wall).
        """
        if clr is None:
            clr = self.workspace.clearance(flat.reshape(-1, 2)).reshape(flat.shape[:2])
        i, j = np.triu_indices(self.n, 1)
        room = clr - self.radii[None]
        roomy = np.minimum(room[:, i], room[:, j]) > self._sep[None]
        return np.where(roomy, self._sep[None], self._contact[None])

    def _deficits(self, X, walls=True):
        """Separation (and wall) deficits of positions ``X`` (..., n, 2), m: (..., ) summed."""
        shp = X.shape[:-2]
        flat = X.reshape(-1, self.n, 2)
        total = np.zeros(flat.shape[0])
        clr = self.workspace.clearance(flat.reshape(-1, 2)).reshape(flat.shape[:2])
        if self.n > 1:
            i, j = np.triu_indices(self.n, 1)
            dist = np.linalg.norm(flat[:, i] - flat[:, j], axis=2)
            total += np.maximum(self._pair_need(flat, clr) - dist, 0.0).sum(axis=1)
        if walls:
            total += np.maximum(self.radii[None] - clr, 0.0).sum(axis=1)
        return total.reshape(shp)

    def _body_cost(self, J):
        """Each body's cost of time-to-go ``J`` (..., n) s: ``max(J - dead, 0)^2 / 2``, s^2."""
        return 0.5 * np.maximum(J - self._dead, 0.0) ** 2

    def _body_slope(self, J):
        """Derivative of :meth:`_body_cost` with respect to ``J``, s."""
        return np.maximum(J - self._dead, 0.0)

    def _merit(self, X, Ws, pushed=0.0):
        """True cost of candidates: trajectories ``X`` (C, H + 1, n, 2) m, weights ``Ws`` (C, H, K),
        wall pushes ``pushed`` (C,) m from :meth:`_rollout`."""
        s = self.settings
        T, L = self.period, self.length_unit
        J, _ = self._time_to_go(X[:, 1:])
        cost = np.sum(self._body_cost(J) / T**2 * self._stage[None, :, None] * self._body_w[None, None], axis=(1, 2))
        prev = np.concatenate([np.broadcast_to(self._prev, (Ws.shape[0], 1, self.K)), Ws[:, :-1]], axis=1)
        cost += s.effort_weight * np.sum(Ws**2, axis=(1, 2)) + s.smoothness_weight * np.sum((Ws - prev) ** 2, axis=(1, 2))
        mid = 0.5 * (X[:, 1:] + X[:, :-1])
        cost += self._rho * (np.sum(self._deficits(X[:, 1:]), axis=1) + np.sum(self._deficits(mid), axis=1)
                             + pushed) / L
        return cost

    @property
    def _stage(self):
        # The end of the horizon counts: it stands for everything after it, and judging a plan by
        # where it leaves the bodies lets it make detours (a Lie-bracket cycle goes out and back)
        # that pay off only at the end. A light weight on the periods before keeps them sensible.
        g = np.full(self.horizon, 0.1)
        g[-1] = 1.0
        return g

    # -- input set -------------------------------------------------------------------------------------
    def _bounds(self):
        lo0, hi0, lo1, hi1, rows, rhs0, rhs1 = self._rms_bounds()
        H = self.horizon
        lower = np.vstack([lo0] + [lo1] * (H - 1))
        upper = np.vstack([hi0] + [hi1] * (H - 1))
        rhs = np.vstack([rhs0] + [rhs1] * (H - 1)) if rows is not None else None
        return lower, upper, rows, rhs

    def _project(self, W, lower, upper, rows, rhs):
        """Nearby feasible weights (C, H, K): the box, slew, the time-share simplex and budget rows."""
        W = np.clip(W, lower[None], upper[None])
        if self._slew is not None:
            prev = np.broadcast_to(self._prev, W[:, 0].shape)
            for h in range(W.shape[1]):
                W[:, h] = np.clip(W[:, h], prev - self._slew, prev + self._slew)
                W[:, h] = np.clip(W[:, h], lower[h], upper[h])
                prev = W[:, h]
        if self.mode == "timeshare":
            tot = W.sum(axis=2, keepdims=True)
            W = np.where(tot > 1.0, W / np.maximum(tot, 1e-300), W)
            if rows is not None:
                for _ in range(3):
                    use = np.einsum("mk,chk->chm", rows, W)
                    over = use - rhs[None]
                    if not (over > 1e-12).any():
                        break
                    pos = np.maximum(rows, 0.0)
                    loud = np.einsum("mk,chk->chm", pos, W)
                    f = np.where(over > 0, np.clip(1.0 - over / np.maximum(loud, 1e-300), 0.0, 1.0), 1.0).min(axis=2)
                    W = W * np.where((pos.sum(axis=0) > 0)[None, None], f[..., None], 1.0)
        return W

    # -- the period ------------------------------------------------------------------------------------
    def step(self, positions, t):
        """Segments covering one period from ``t``, for bodies measured at ``positions`` (n, 2) m.

        Returns
        -------
        list of Segment
        """
        tic = time.perf_counter()
        p = self._check_positions(positions)
        if not self.ready:
            self.prepare(p, t)
        s = self.settings
        H, L = self.horizon, self.length_unit
        lower, upper, rows, rhs = self._bounds()
        delta0, _ = self._trust_and_speed(p)
        J_raw, G_now = self._time_to_go(p[None])
        J_now = np.maximum(J_raw[0] - self._dead, 0.0)
        # Balance "time": each body's squared time-to-go is weighed by 1 / (its own time-to-go now),
        # so the cost's gradient is every body's time-to-go in seconds alike: the plan lowers the
        # *sum* of the times, and a body near its goal sits in a steep quadratic that holds it there.
        if s.balance == "time":
            self._body_w = self.period / np.maximum(J_now, self.period)
        else:
            self._body_w = np.ones(self.n)
        # An exact penalty must outweigh what a body gains by cutting a corner, i.e. the cost's
        # gradient (per length unit): slack_weight / 100 times the largest one now, so 10 times at
        # the default. The QP sees the cost divided by that gradient (order one), which OSQP
        # converges on far faster than on weights spanning five decades; acceptance compares the
        # unscaled true costs.
        grad = float(np.max(self._body_w * self._body_slope(J_raw[0]) * np.linalg.norm(G_now[0], axis=1))) \
            * L / self.period**2
        grad = max(grad, 1e-12)
        self._rho = s.slack_weight / 100.0 * grad
        self._qp_scale = 1.0 / grad
        # -- nominal: the best of the candidate sequences, judged by the true cost
        cands = [self._W, np.tile(self._idle_rate, (H, 1))]
        names = ["shifted", "idle"]
        stalled = self._stalled(p)
        if stalled:
            for name, W in recovery.candidates(self, p, lower, upper, self._rng):
                cands.append(W)
                names.append(name)
        Ws = self._project(np.asarray(cands, dtype=float), lower, upper, rows, rhs)
        X, F, d, M, pushed = self._rollout(p, Ws)
        cost = self._merit(X, Ws, pushed)
        b = int(np.argmin(cost))
        Wb, Xb, Fb, db, Mb, cb = Ws[b], X[b], F[b], d[b], M[b], float(cost[b])
        if stalled and names[b] != "shifted":
            self.stalls.append(f"t = {format_quantity(t, 's', 4)}: progress stalled; restarted the plan from the "
                               f"{names[b]} guess")
        # -- sequential convex programming
        delta = np.repeat(delta0[None], H, axis=0)          # (H, n) m
        accepted, solves, solve_time, solver_time, status, slack = 0, 0, 0.0, 0.0, "none", 0.0
        warm = self._warm if names[b] == "shifted" else None
        for _ in range(int(s.iterations)):
            data = self._data(p, Wb, Xb, Fb, db, Mb, delta, lower, upper, rows, rhs)
            sol = self.program.solve(data, warm=warm)
            warm = None
            solves += 1
            solve_time += sol.solve_time
            solver_time += sol.solver_time
            status = sol.status
            if sol.status == "failed":
                delta *= 0.5
                continue
            Wn = self._project(sol.w[None], lower, upper, rows, rhs)
            Xn, Fn, dn, Mn, pn = self._rollout(p, Wn)
            cn = float(self._merit(Xn, Wn, pn)[0])
            if cn <= cb:
                gain = cb - cn
                Wb, Xb, Fb, db, Mb, cb = Wn[0], Xn[0], Fn[0], dn[0], Mn[0], cn
                slack = sol.max_slack * L
                accepted += 1
                self._warm = self.program.shifted(sol.info["z"], min(int(s.replan_every), H))
                if gain <= 1e-5 * max(abs(cb), 1e-300):
                    break           # converged: the plan of the last period still stands
            else:
                delta *= 0.5
                if cb - cn > -1e-5 * abs(cb):
                    break           # within round-off of the nominal: nothing left to gain here
        # Play the first `replan_every` periods of the plan; the rest, shifted, seeds the next one.
        r = min(int(s.replan_every), H)
        segs = []
        for j in range(r):
            if j:
                self._rms_bounds()              # this period's RMS budgets, after the last one played
            rate = Wb[j].copy()
            played = self._fit_rms(rate, t + j * self.period)
            segs += played
            self._prev = rate
            self._record_rms(played)
        self.plan_weights = Wb                   # the plan this period chose, (H, K) program units
        self._W = np.vstack([Wb[r:], np.repeat(Wb[-1:], r, axis=0)])
        self._pred = Xb
        self._step += 1
        J, _ = self._time_to_go(p[None])
        self._hist.append(float(np.sum(np.maximum(J[0] - self._dead, 0.0)) if s.balance == "time"
                                else np.sum(self._body_cost(J[0]))))
        self.records.append({
            "time": float(t), "status": status, "solve_time": solve_time, "solver_time": solver_time,
            "step_time": time.perf_counter() - tic, "max_slack": slack, "accepted": accepted, "solves": solves,
            "cost": cb, "time_to_go": J[0].copy(), "horizon": H, "nominal": names[b]})
        return segs

    def _data(self, p, W, X, F, d, M, delta, lower, upper, rows, rhs):
        """Horizon QP data along the nominal trajectory ``X`` (H + 1, n, 2) m."""
        s = self.settings
        n, H, T, L = self.n, self.horizon, self.period, self.length_unit
        o = self.origin
        Xs = X[1:]                                           # (H, n, 2)
        wgt = np.empty((H, n))
        cen = np.empty((H, n, 2))
        for i, m in enumerate(self.maps):
            wgt[:, i], cen[:, i] = m.quadratic(Xs[:, i], offset=self._dead[i])
        sc = self._qp_scale
        omega = sc * 0.5 * self._stage[:, None] * self._body_w[None] * wgt * (L / T) ** 2
        # separation: every pair, active where it could come within reach this iteration
        P = self.program.P
        pn = np.zeros((H, P, 2))
        pg = np.full((H, P), -np.inf)
        if P:
            i, j = self.program.pairs[:, 0], self.program.pairs[:, 1]
            diff = Xs[:, i] - Xs[:, j]
            dist = np.linalg.norm(diff, axis=2)
            pn = diff / np.maximum(dist, 1e-300)[..., None]
            need = self._pair_need(Xs)
            reach = 2.0 * np.sqrt(2.0) * (delta[:, i] + delta[:, j])
            active = dist < need + reach
            pg = np.where(active, need / L, -np.inf)
        # walls: the nearest wall of each body at each period, active where within reach
        flat = Xs.reshape(-1, 2)
        wpts, wnrm = self.workspace.nearest_wall(flat)
        margin = np.maximum(0.5 * self.clearance, 0.02 * self.radii)
        need_w = np.tile(self.radii + margin, H)
        clr = self.workspace.clearance(flat)
        active = clr < need_w + 2.0 * np.sqrt(2.0) * delta.ravel()
        wrhs = np.where(active, (np.einsum("pc,pc->p", wnrm, wpts - o) + need_w) / L, -np.inf)
        return HorizonData(
            F=F / L, d=d / L, p0=(p - o) / L, lower=lower, upper=upper, previous=self._prev,
            xbar=(Xs - o) / L, trust=delta / L, omega=omega, centre=(cen - o) / L,
            effort=np.full(self.K, sc * s.effort_weight), smooth=np.full(self.K, sc * s.smoothness_weight),
            pair_normal=pn, pair_gap=pg, wall_normal=wnrm.reshape(H, n, 2), wall_rhs=wrhs.reshape(H, n),
            slew=self._slew, jac=M, rate_rows=rows, rate_rhs=rhs, slack_weight=sc * self._rho,
            timeshare=self.mode == "timeshare")

    def _stalled(self, p):
        """Whether the summed squared time-to-go has not fallen by 2 % over the stall window."""
        W = self.settings.stall_window
        if len(self._hist) < W or self._step < self._stall_until:
            return False
        if self.arrived(p).all():
            return False
        old = self._hist[-W]
        if self._hist[-1] > 0.98 * old:
            self._stall_until = self._step + W
            far = np.flatnonzero(~self.arrived(p))
            self._stall_count[far] += 1
            return True
        return False

    # -- reports ---------------------------------------------------------------------------------------
    def body_reasons(self, positions):
        """Why each body that has not arrived has not, list of str or None."""
        p = np.asarray(positions, float)
        err = np.linalg.norm(p - self.goals, axis=1)
        J, _ = self._time_to_go(p[None]) if self.maps is not None and np.all(np.isfinite(p)) else (None, None)
        out = []
        for i in range(self.n):
            if err[i] <= self.tolerance[i]:
                out.append(None)
            elif self.route_reasons[i] is not None:
                out.append(f"no route: {self.route_reasons[i]}")
            elif self.blocked:
                out.append(self.blocked)
            elif self.initial_speed is not None and self.initial_speed[i] <= 0:
                out.append("the actuator cannot push it where it starts (available speed 0)")
            else:
                ttg = (f"; alone it would need about {format_quantity(J[0, i], 's')} more"
                       if J is not None else "")
                st = (f"; progress stalled {self._stall_count[i]} time(s) (the shared fields could not move it "
                      "without pushing the others away)") if self._stall_count[i] else ""
                out.append(f"still {format_quantity(err[i], 'm')} from its goal when the plan stopped{ttg}{st}")
        return out
