"""Planning: the controller that turns routes and the step program into segments, and open-loop plans.

:class:`Controller` is the receding-horizon controller. Each period it takes measured positions,
evaluates the actuator's field basis there, advances a reference point along each body's route,
solves the step program (:mod:`fieldplan.control`) and returns the first period's segments. It
watches every body's progress along its route and, when bodies stall (shared fields often have
local minima where no input improves every body at once), recovers by moving one stalled body while
the others hold where they are, then by a longer horizon, then by a different route, and reports
what it did in :attr:`Controller.stalls`. When the fields lack the rank to move all bodies in one
period (fewer independent inputs than twice the bodies, in linear mode), the recovery plays
Lie-bracket cycles: four periods ``u_a, u_b, -u_a, -u_b`` whose net motion is the bracket
``T^2 [f_a, f_b]`` of two fields, a direction no single period offers - slow (second order) but it
moves bodies the counting rule says cannot be moved independently.

:func:`plan` iterates the controller on the model (open loop) until every body is within tolerance
of its goal at the same time, or a time limit; the :class:`PlanResult` says which body did not
arrive and why. Bad input (a start or goal outside the free space, goals closer than two radii) is a
:class:`~fieldplan.errors.WorkspaceError` naming the body.

Examples
--------
>>> import numpy as np, fieldplan
>>> from fieldplan.testing import SourceArray
>>> act = SourceArray([[0, 0], [1e-3, 0], [1e-3, 1e-3], [0, 1e-3]], force=2e-12)
>>> ws = fieldplan.Workspace((0, 0, 1e-3, 1e-3))
>>> bead = fieldplan.Body("bead", radius=5e-6, density=1050.0)
>>> res = plan(act, [bead], ws, [[3e-4, 3e-4]], [[7e-4, 6e-4]])
>>> res.success, res.schedule.n_segments > 0
(True, True)
"""

from __future__ import annotations

import collections
import dataclasses
import time
from dataclasses import dataclass, field

import numpy as np

from .actuator import FieldBasis, Segment, _group_bodies
from .control import (StepData, StepProgram, pair_slots, point_at, polyline_arclength, project_to_route,
                      reference_points, variation_length)
from .errors import FieldplanError, WorkspaceError
from .routes import plan_routes, route_length

__all__ = ["PlanSettings", "Controller", "plan", "PlanResult", "capability_curve", "check_goals"]


@dataclass
class PlanSettings:
    """Settings of the controller and the planner (SI units; ``None`` picks a default).

    Parameters
    ----------
    period : float, optional
        Control period, s. Default: chosen from the speeds so the median body moves about one
        trust radius per period (rounded to the hardware time step, at least the minimum dwell).
    horizon : int
        Periods the step program looks ahead.
    tolerance : float, optional
        Arrival radius, m (default each body's radius).
    time_limit : float, optional
        Longest plan, s (default: five times the sum over bodies of route length / available speed,
        plus 50 periods: enough to move the bodies one after another).
    clearance : float, optional
        Extra distance kept from walls by routes and between bodies by the separation constraint, m
        (default half the largest radius).
    tracking_weight, effort_weight, smoothness_weight : float
        Objective weights (positions in trust radii, inputs in fractions of their span).
    slack_weight : float
        Exact-penalty weight of the soft constraints.
    progress_weight : float
        Reward of the common progress along the routes, relative to the tracking cost of a full
        step (small: the program takes the largest step all bodies can follow closely).
    trust_fraction : float
        Trust radius per period as a fraction of the fields' variation length ``|f| / |grad f|``.
    max_trust : float, optional
        Largest trust radius, m (default 1/20 of the workspace's larger side).
    route_resolution : float, optional
        Route grid cell, m (default :func:`fieldplan.routes.default_resolution`).
    field_aware_routes : bool
        Route edge cost = time at the actuator's available speed instead of length.
    assign_goals : bool
        Bodies of the same kind may swap goals (minimum total route cost).
    max_steps : int
        Most control periods of a plan.
    stall_window : int
        Periods over which progress is measured to detect a stall.
    stall_progress : float
        A body stalls when over the window it progresses less than this fraction of what the fields
        could do for it alone, or less than a third of what the step program planned for it.
    relinearise : bool
        With ``horizon > 1``, evaluate the fields at the predicted positions of later periods.
    backend : {"osqp", "cvxpy"}
        Step program back end (see :mod:`fieldplan.control`).
    solver : str, optional
        cvxpy solver name for the ``"cvxpy"`` back end.
    separation_slots : int, optional
        Room for pair constraints per period (default all pairs up to 4 n).
    timeshare_rounds : int
        In timeshare mode, play each period's primitive mix in this many shorter rounds (fewer when
        the hardware time step does not divide the period, one with a minimum dwell), so that a body
        strays less from the straight path between period ends.
    arrival_margin : float
        Once every body is within tolerance, the open-loop plan keeps steering (for at most
        ``settle_steps`` periods) until every body is within ``arrival_margin * tolerance``: a plan
        that stops exactly on the arrival radius would pass or fail its noisy trials by chance.
    settle_steps : int
        Most extra periods spent on that settling.
    """

    period: float | None = None
    horizon: int = 1
    tolerance: float | None = None
    time_limit: float | None = None
    clearance: float | None = None
    tracking_weight: float = 1.0
    effort_weight: float = 1e-3
    smoothness_weight: float = 1e-2
    slack_weight: float = 1e3
    progress_weight: float = 1.0
    trust_fraction: float = 0.2
    max_trust: float | None = None
    route_resolution: float | None = None
    field_aware_routes: bool = False
    assign_goals: bool = False
    max_steps: int = 3000
    stall_window: int = 8
    stall_progress: float = 0.05
    relinearise: bool = True
    backend: str = "osqp"
    solver: str | None = None
    separation_slots: int | None = None
    timeshare_rounds: int = 4
    arrival_margin: float = 0.5
    settle_steps: int = 30

    def __post_init__(self):
        def positive(key, allow_none=True):
            v = getattr(self, key)
            if v is None and allow_none:
                return
            if not (isinstance(v, (int, float, np.number)) and not isinstance(v, bool) and np.isfinite(v) and v > 0):
                raise FieldplanError(f"PlanSettings {key} must be a finite number > 0, got {v!r}.")

        for key in ("period", "tolerance", "time_limit", "max_trust", "route_resolution"):
            positive(key)
        for key in ("tracking_weight", "slack_weight", "progress_weight", "trust_fraction", "stall_progress"):
            positive(key, allow_none=False)
        for key in ("effort_weight", "smoothness_weight"):
            v = getattr(self, key)
            if not (np.isfinite(v) and v >= 0):
                raise FieldplanError(f"PlanSettings {key} must be a finite number >= 0, got {v!r}.")
        if self.clearance is not None and not (np.isfinite(self.clearance) and self.clearance >= 0):
            raise FieldplanError(f"PlanSettings clearance must be >= 0 m, got {self.clearance!r}.")
        for key in ("horizon", "max_steps", "stall_window", "timeshare_rounds"):
            v = getattr(self, key)
            if not (isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 1):
                raise FieldplanError(f"PlanSettings {key} must be an integer >= 1, got {v!r}.")
        if not (0 < self.arrival_margin <= 1):
            raise FieldplanError(f"PlanSettings arrival_margin must be in (0, 1], got {self.arrival_margin!r}.")
        if not (isinstance(self.settle_steps, (int, np.integer)) and self.settle_steps >= 0):
            raise FieldplanError(f"PlanSettings settle_steps must be an integer >= 0, got {self.settle_steps!r}.")
        if self.backend not in ("osqp", "cvxpy"):
            raise FieldplanError(f"PlanSettings backend must be 'osqp' or 'cvxpy', got {self.backend!r}.")

    @classmethod
    def from_dict(cls, d):
        """Settings from a mapping; unknown keys are errors (naming the key and the known ones)."""
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise FieldplanError(f"PlanSettings: unknown key(s) {unknown}; known keys are {sorted(known)}.")
        return cls(**dict(d))

    def to_dict(self):
        return dataclasses.asdict(self)


def check_goals(bodies, workspace, goals):
    """Raise :class:`WorkspaceError` naming the body if a goal is outside its free space or two goals
    are closer than the sum of the two radii.

    Returns
    -------
    ndarray, shape (n, 2)
        The goals as floats, m.
    """
    g = np.asarray(goals, dtype=float)
    n = len(bodies)
    if g.shape != (n, 2):
        raise WorkspaceError(f"goals must have shape ({n}, 2) - one (x, y) in m per body - got {g.shape}.")
    if not np.all(np.isfinite(g)):
        bad = np.flatnonzero(~np.all(np.isfinite(g), axis=1)).tolist()
        raise WorkspaceError(f"goal of body {bad[0]} ({bodies[bad[0]].name}) is not finite: {g[bad[0]].tolist()}.")
    for i, b in enumerate(bodies):
        if not workspace.contains(g[i:i + 1], b.radius)[0]:
            where = "inside an obstacle or a wall" if not workspace.contains(g[i:i + 1], 0.0)[0] else \
                "closer to a wall than its radius"
            raise WorkspaceError(
                f"goal of body {i} ({b.name}) at ({g[i, 0]:.6g}, {g[i, 1]:.6g}) m is {where}: its centre must be at "
                f"least its radius {b.radius:g} m from every wall and obstacle.")
    r = np.array([b.radius for b in bodies])
    if n > 1:
        d = np.linalg.norm(g[:, None] - g[None], axis=2)
        gap = d - (r[:, None] + r[None])
        np.fill_diagonal(gap, np.inf)
        i, j = np.unravel_index(np.argmin(gap), gap.shape)
        if gap[i, j] < 0:
            i, j = min(i, j), max(i, j)
            raise WorkspaceError(
                f"goals of body {i} ({bodies[i].name}) and body {j} ({bodies[j].name}) are {d[i, j]:.3g} m apart, "
                f"closer than their radii sum {r[i] + r[j]:.3g} m: both cannot be there at once.")
    return g


def _directional_speed(basis, directions, lower, upper):
    """Speed each body alone could reach along its own unit direction, m/s, shape (n,)."""
    proj = np.einsum("knc,nc->kn", basis.fields, directions)
    drift = np.einsum("nc,nc->n", basis.drift, directions)
    if basis.mode == "linear":
        return drift + np.sum(np.maximum(lower[:, None] * proj, upper[:, None] * proj), axis=0)
    return drift + np.maximum(0.0, (proj * (upper[:, None] > 0)).max(axis=0))


class Controller:
    """Receding-horizon controller: positions in, one period of segments out.

    Parameters
    ----------
    actuator : Actuator
        The planning model.
    bodies : sequence of Body, length n
    workspace : Workspace
    goals : array_like, shape (n, 2)
        m.
    routes : sequence of array_like (P_i, 2), optional
        m; default routes by :func:`fieldplan.routes.plan_routes` from the first positions seen.
    limits : HardwareLimits, optional
    settings : PlanSettings, optional

    Attributes
    ----------
    period : float
        s (set by :meth:`prepare`).
    routes : list of ndarray
    stalls : list of str
        Every stall detected and what was done about it.
    notes : list of str
        Other decisions worth knowing (disabled primitives, limit clashes, solver trouble).
    records : list of dict
        Per step: time, status, solve times, largest slack, active bodies.

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

    def __init__(self, actuator, bodies, workspace, goals, *, routes=None, limits=None, settings=None):
        self.actuator = actuator
        self.bodies = list(bodies)
        if not self.bodies:
            raise WorkspaceError("Controller needs at least one body.")
        self.workspace = workspace
        self.medium = workspace.medium
        self.settings = settings if settings is not None else PlanSettings()
        if isinstance(self.settings, dict):
            self.settings = PlanSettings.from_dict(self.settings)
        self.limits = limits
        self.goals = check_goals(self.bodies, workspace, goals)
        self._given_routes = routes
        self.n = len(self.bodies)
        self.radii = np.array([b.radius for b in self.bodies])
        s = self.settings
        self.tolerance = np.full(self.n, s.tolerance) if s.tolerance else self.radii.copy()
        self.clearance = float(s.clearance) if s.clearance is not None else 0.5 * float(self.radii.max())
        self.ready = False
        self.stalls = []
        self.notes = []
        self.records = []
        self.route_plan = None
        self.gave_up = None
        self._groups = _group_bodies(self.bodies)
        self._graphs = {}

    # -- set-up ----------------------------------------------------------------------------------------
    def _basis(self, xy_sets):
        """Field basis at several position sets of all bodies, in one vectorised call."""
        xy = np.concatenate(xy_sets, axis=0)
        return self.actuator.basis(self.bodies * len(xy_sets), self.medium, xy)

    def prepare(self, positions, t=0.0):
        """Routes, period, scales and the step program, from the first positions (m)."""
        p = self._check_positions(positions)
        s = self.settings
        ws = self.workspace
        xmin, ymin, xmax, ymax = ws.bounds
        self.span = max(xmax - xmin, ymax - ymin)
        self.origin = np.array([0.5 * (xmin + xmax), 0.5 * (ymin + ymax)])
        self.max_trust = float(s.max_trust) if s.max_trust else self.span / 20.0
        # -- routes
        self.route_reasons = [None] * self.n
        if self._given_routes is not None:
            routes = [np.asarray(r, dtype=float).reshape(-1, 2) for r in self._given_routes]
            if len(routes) != self.n:
                raise WorkspaceError(f"Controller: {len(routes)} routes given for {self.n} bodies.")
            for i, r in enumerate(routes):
                if np.linalg.norm(r[0] - p[i]) > 1e-12 * self.span:
                    r = np.vstack([p[i], r])
                if np.linalg.norm(r[-1] - self.goals[i]) > 1e-12 * self.span:
                    r = np.vstack([r, self.goals[i]])
                routes[i] = r
        else:
            rp = plan_routes(ws, self.bodies, p, self.goals, clearance=self.clearance,
                             resolution=s.route_resolution, actuator=self.actuator,
                             field_aware=s.field_aware_routes, assign=s.assign_goals, graphs=self._graphs)
            self.route_plan = rp
            self.goals = rp.goals.copy()
            self.notes += rp.notes
            routes = []
            for i, r in enumerate(rp.routes):
                if r is None:
                    self.route_reasons[i] = rp.reasons[i]
                    routes.append(np.array([p[i]]))      # hold in place: there is nowhere to go
                else:
                    routes.append(r)
        self.routes = routes
        self._cum = [polyline_arclength(r) for r in routes]
        self._s = np.zeros(self.n)
        self._s_best = np.zeros(self.n)
        # -- basis, speeds and the period
        B = self.actuator.basis(self.bodies, self.medium, p)
        self.mode = B.mode
        self.channels = B.channels
        self.K = B.size
        self._setup_inputs(B)
        delta, speed = self._trust_and_speed(p, B)
        self.initial_speed = speed
        if s.period:
            T = float(s.period)
        else:
            ok = speed > 0
            T = float(np.median(delta[ok] / speed[ok])) if ok.any() else 1.0
        T = self._round_period(T)
        self.period = T
        self.length_unit = float(np.median(delta))
        self._rounds = 1
        if self.mode == "timeshare":
            lim = self.limits
            R = int(s.timeshare_rounds)
            ts = lim.time_step if lim is not None else None
            dwell = lim is not None and (lim.min_dwell or any(lim.get(c.name).min_dwell for c in self.channels))
            # Rounds must stay whole numbers of hardware steps, and fine enough (10 steps or more)
            # that rounding each slice to the step does not swamp the mix.
            while R > 1 and (dwell or (ts and (abs(T / R / ts - np.round(T / R / ts)) > 1e-9 or T / R < 10 * ts))):
                R -= 1
            self._rounds = R
        self._q_res = np.zeros(self.K)
        # -- limits that depend on the period
        self._setup_limits()
        self.blocked = None
        if np.all(self._hi <= self._lo):
            self.blocked = ("no input is left to plan with: every primitive breaks the declared hardware limits "
                            "(see notes)" if self.mode == "timeshare" else
                            "no input is left to plan with: the declared limits pin every channel")
        self._prev = self._idle_rate.copy()
        self._programs = {}
        self._H = s.horizon
        self._pred = None
        self._hist_rem = collections.deque(maxlen=s.stall_window + 1)
        self._hist_plan = collections.deque(maxlen=s.stall_window + 1)
        self._planned = np.zeros(self.n)
        self._hist_adv = collections.deque(maxlen=s.stall_window + 1)
        self._phase = None
        self._cycle = []
        self._rank = self.K
        self._cool = 0
        self._stall_count = np.zeros(self.n, dtype=int)
        self._turns = np.zeros(self.n, dtype=int)
        self._best_total = np.inf
        self._fruitless = 0
        self._step = 0
        self._t0 = float(t)
        self.ready = True
        lengths = np.array([route_length(r) for r in routes])
        self.route_lengths = lengths
        v = np.where(speed > 0, speed, np.nan)
        with np.errstate(invalid="ignore"):
            est = np.nansum(lengths / v) if np.any(np.isfinite(v)) else np.inf
        self.time_limit = float(s.time_limit) if s.time_limit else float(5.0 * est + 50 * T)

    def _check_positions(self, positions):
        p = np.asarray(positions, dtype=float)
        if p.shape != (self.n, 2):
            raise WorkspaceError(f"positions must have shape ({self.n}, 2) in m, got {p.shape}.")
        if not np.all(np.isfinite(p)):
            bad = np.flatnonzero(~np.all(np.isfinite(p), axis=1)).tolist()
            raise WorkspaceError(f"positions of bodies {bad} are not finite; run_live fills dropped rows by prediction.")
        return p

    def _setup_inputs(self, B):
        chans = self.channels
        lim = self.limits
        if B.mode == "linear":
            if lim is not None:
                lo, hi = lim.bounds(chans)
            else:
                lo = np.array([c.lower for c in chans])
                hi = np.array([c.upper for c in chans])
            scale = np.maximum(np.maximum(np.abs(lo), np.abs(hi)), 1e-300)
            self._scale = scale
            self._lo, self._hi = lo / scale, hi / scale
            self._idle_rate = np.clip(np.asarray(B.idle, float) / scale, self._lo, self._hi)
        else:
            self._scale = np.ones(self.K)
            self._lo = np.zeros(self.K)
            self._hi = np.ones(self.K)
            self._idle_rate = np.zeros(self.K)
            self._prims = np.array([pr.values for pr in B.primitives])     # (K, m)
            self._idle_values = np.asarray(B.idle, float)
            if lim is not None:
                clo, chi = lim.bounds(chans)
                bad = np.any((self._prims < clo - 1e-12 * np.abs(clo)) | (self._prims > chi + 1e-12 * np.abs(chi)), axis=1)
                for k in np.flatnonzero(bad):
                    self._hi[k] = 0.0
                    self.notes.append(f"primitive {B.primitives[k].name!r} exceeds the declared channel limits: disabled")

    def _round_period(self, T):
        lim = self.limits
        if lim is None:
            return float(T)
        dwell = [lim.min_dwell or 0.0] + [lim.get(c.name).min_dwell or 0.0 for c in self.channels]
        T = max(T, max(dwell))
        windows = [lim.get(c.name).rms_window for c in self.channels
                   if lim.get(c.name).rms is not None and lim.get(c.name).rms_window]
        ts = lim.time_step
        if windows and self.settings.period is None:
            # A window that is a whole number of periods makes the per-period RMS budget exact; with
            # a hardware step the period must also be a whole number of steps.
            W = min(windows)
            if self.mode == "timeshare":
                # Primitives play at full value within a period, so the mix only averages out over
                # windows several periods long: keep four periods or more per window.
                T = max(min(T, W / 4.0), max(dwell))
            if W >= T:
                m0 = int(np.ceil(W / T))
                for m in range(m0, m0 + 50):
                    cand = W / m
                    if not ts or abs(cand / ts - np.round(cand / ts)) < 1e-9:
                        T = cand
                        break
        if ts:
            T = max(ts, np.round(T / ts) * ts)
        return float(T)

    def _setup_limits(self):
        lim = self.limits
        K, T = self.K, self.period
        self._slew = None
        self._rms = []          # (channel index, rms, group size or None for whole schedule)
        self._sq_hist = []      # per-period mean squares, rows of (m,)
        if lim is None:
            return
        dt = lim.time_step or T
        if self.mode == "linear":
            slew = np.full(K, np.inf)
            for k, c in enumerate(self.channels):
                cl = lim.get(c.name)
                if cl.slew_rate is not None:
                    slew[k] = cl.slew_rate * dt / self._scale[k]
            self._slew = slew if np.isfinite(slew).any() else None
        else:
            for j, c in enumerate(self.channels):
                cl = lim.get(c.name)
                if cl.slew_rate is None:
                    continue
                allowed = cl.slew_rate * (lim.time_step or (lim.min_dwell or 0.0))
                jump = np.abs(self._prims[:, j] - self._idle_values[j])
                for k in np.flatnonzero((jump > allowed * (1 + 1e-9)) & (self._hi > 0)):
                    self._hi[k] = 0.0
                    self.notes.append(f"primitive {k} steps channel {c.name!r} by {jump[k]:g} {c.unit} from idle, more "
                                      f"than its slew limit allows in one hardware step: disabled")
        for j, c in enumerate(self.channels):
            cl = lim.get(c.name)
            if cl.rms is None:
                continue
            W = cl.rms_window
            # Trailing-window budget, checked every period over the last g periods (this one
            # included): sum of per-period mean squares <= total. In linear mode the input is
            # constant over a period, so the windowed integral is piecewise linear in the window's
            # start and peaks with one end on a period edge; such a window lies within
            # g = ceil(W / T) periods, and T * (their sum) <= rms^2 W bounds every sliding window
            # (exact when W is a multiple of T, which the automatic period arranges). A window
            # shorter than a period then needs only q <= rms^2. In timeshare mode the values change
            # within a period, so a window may catch the loud parts of both end periods: it touches
            # at most ceil(W / T) + 1 periods, and the same integral bound over those is sufficient.
            if W is None:
                g, total = None, None
            else:
                g = max(1, int(np.ceil(W / T - 1e-9)))
                if self.mode == "timeshare":
                    g += 1
                total = float(cl.rms) ** 2 * (W / T if g > 1 else 1.0)
            # With a slew limit a budget that shrinks faster than the input may ramp down cannot be
            # met, so such channels are held at their sustainable level instead.
            capped = self.mode == "linear" and self._slew is not None and np.isfinite(self._slew[j])
            self._rms.append((j, float(cl.rms), g, total, capped))

    def _rms_bounds(self):
        """Per-period bounds from the RMS budgets: (lo0, hi0, rows, rhs0, rhs_later) in program units."""
        lo0, hi0 = self._lo.copy(), self._hi.copy()
        lo1, hi1 = self._lo.copy(), self._hi.copy()
        rows, rhs0, rhs1 = [], [], []
        hist = np.asarray(self._sq_hist) if self._sq_hist else np.zeros((0, len(self.channels)))
        budgets = []
        self._budgets = budgets         # this period's mean-square budget per RMS channel, unit^2
        for j, rms, g, total, capped in self._rms:
            # The whole schedule so far must stay within the limit too (a plan shorter than the
            # window is judged on its whole length).
            budget = rms**2 * (len(hist) + 1) - hist[:, j].sum()
            if g is not None:
                used = hist[-(g - 1):, j].sum() if g > 1 and len(hist) else 0.0
                budget = min(budget, total - used)
            if capped:
                budget = rms**2
            budget = max(budget, 0.0)
            budgets.append((j, budget))
            if self.mode == "linear":
                b = np.sqrt(budget) / self._scale[j]
                lo0[j], hi0[j] = max(lo0[j], -b), min(hi0[j], b)
                b1 = rms / self._scale[j]
                lo1[j], hi1[j] = max(lo1[j], -b1), min(hi1[j], b1)
            else:
                idle2 = self._idle_values[j] ** 2
                rows.append(self._prims[:, j] ** 2 - idle2)
                rhs0.append(budget - idle2)
                rhs1.append(rms**2 - idle2)
        if self.mode == "linear":
            # A budget below the idle value's own square cannot be met by any rate: keep the box non-empty.
            for arr_lo, arr_hi in ((lo0, hi0), (lo1, hi1)):
                clash = arr_lo > arr_hi
                arr_lo[clash] = arr_hi[clash] = np.clip(0.0, self._lo[clash], self._hi[clash])
        return lo0, hi0, lo1, hi1, (np.array(rows) if rows else None), np.array(rhs0), np.array(rhs1)

    def _program(self, H):
        m = sum(1 for _ in self._rms) if self.mode == "timeshare" else 0
        key = (H, m)
        if key not in self._programs:
            s = self.settings
            self._programs[key] = StepProgram(
                self.n, self.K, H, n_slots=s.separation_slots, n_rate_rows=m,
                slew=self._slew is not None, timeshare=self.mode == "timeshare", backend=s.backend,
                solver=s.solver, eps=1e-4 if s.backend == "osqp" else 1e-5)
        return self._programs[key]

    def _trust_and_speed(self, p, B=None, eps=None):
        eps = eps if eps is not None else 1e-3 * self.span
        Bs = self._basis([p, p + [eps, 0.0], p + [0.0, eps]])
        n = self.n
        f = Bs.fields
        scale = self._scale[:, None, None]
        ell = variation_length(f[:, :n] * scale, f[:, n:2 * n] * scale, f[:, 2 * n:] * scale, eps)
        floor = 0.5 * float(self.tolerance.min())
        delta = np.clip(self.settings.trust_fraction * ell, floor, self.max_trust)
        B0 = B if B is not None else self._slice_basis(Bs, 0)
        best = np.max(_speeds_8(B0, self._lo * self._scale, self._hi * self._scale), axis=1)
        return delta, best

    @staticmethod
    def _slice_basis(B, j, n=None):
        n = n or B.fields.shape[1] // 3
        return dataclasses.replace(B, fields=B.fields[:, j * n:(j + 1) * n], drift=B.drift[j * n:(j + 1) * n])

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
        n, K, T, L = self.n, self.K, self.period, self.length_unit
        H = self._H
        # -- fields at the bodies (and shifted, for the trust region), and along the prediction
        eps = 1e-3 * self.span
        sets = [p, p + [eps, 0.0], p + [0.0, eps]]
        H_want = max(s.horizon, self._H)
        ahead_pts = []
        if self._pred is not None and len(self._pred) > 2:
            # Predicted start of each later period, from the last solution shifted by one period.
            ahead_pts = list(self._pred[2:])
        if H_want > 1 and s.relinearise and ahead_pts:
            while len(ahead_pts) < H_want - 1:
                ahead_pts.append(ahead_pts[-1])
            ahead_pts = ahead_pts[:H_want - 1]
            sets += ahead_pts
        else:
            ahead_pts = []
        Bs = self._basis(sets)
        fields = Bs.fields.reshape(self.K, len(sets), n, 2)
        drift = Bs.drift.reshape(len(sets), n, 2)
        scale = self._scale[:, None, None]
        ell = variation_length(fields[:, 0] * scale, fields[:, 1] * scale, fields[:, 2] * scale, eps)
        delta = np.clip(s.trust_fraction * ell, 0.5 * float(self.tolerance.min()), self.max_trust)
        B0 = dataclasses.replace(Bs, fields=fields[:, 0], drift=drift[0])
        # -- progress along routes
        rem = np.empty(n)
        dist = np.empty(n)
        for i in range(n):
            cum = self._cum[i]
            lo_s = self._s[i] - 2 * delta[i]
            hi_s = self._s[i] + 4 * delta[i] + self.tolerance[i]
            si, di = project_to_route(self.routes[i], cum, p[i], lo_s, hi_s)
            if di > 3 * delta[i]:
                si, di = project_to_route(self.routes[i], cum, p[i])
            self._s[i], dist[i] = si, di
            rem[i] = cum[-1] - si + di
        err = np.linalg.norm(p - self.goals, axis=1)
        arrived = err <= self.tolerance
        # -- how far to advance each reference: a trust radius, or what the fields can do this period
        # Pure pursuit: aim at the route point a trust radius plus the cross-track error ahead, so a
        # body off its route heads back obliquely instead of straight sideways (which the fields
        # may not allow, e.g. across a trap line).
        ahead = np.array([point_at(self.routes[i], self._cum[i], self._s[i] + delta[i] + dist[i]) for i in range(n)])
        dirs = ahead - p
        nd = np.linalg.norm(dirs, axis=1, keepdims=True)
        dirs = np.where(nd > 0, dirs / np.maximum(nd, 1e-300), 0.0)
        vdir = _directional_speed(B0, dirs, self._lo * self._scale, self._hi * self._scale)
        adv = np.clip(vdir * T, 0.25 * self.tolerance, delta)
        # -- stalls
        self._B0 = B0
        weights, holds, H = self._stall_logic(p, rem, adv, arrived, t, self._planned)
        # References: base point + progress a * step along the route (a chosen by the program);
        # bodies that wait, and bodies that have arrived, hold a fixed point.
        # The base point is where the body is and the step aims at the route point ahead (pure
        # pursuit: sideways offsets are corrected by the aim, never demanded against the fields); a
        # body that has once come close to its goal keeps the goal itself as base, so what the final
        # approach gained is not lost to the others' fields.
        self._s_best = np.maximum(self._s_best, self._s)
        targets = np.empty((H, n, 2))
        base = np.repeat(p[None], H, axis=0)
        for i in range(n):
            targets[:, i] = reference_points(self.routes[i], self._cum[i], self._s[i] + dist[i], adv[i], H)
            if self._s_best[i] >= self._cum[i][-1] - 3 * self.tolerance[i]:
                base[:, i] = self.goals[i]
                targets[:, i] = self.goals[i]
        for i in np.flatnonzero(arrived):
            base[:, i] = self.goals[i]
            targets[:, i] = self.goals[i]
        for i, hp in holds.items():
            base[:, i] = hp
            targets[:, i] = hp
        steps = targets - base
        # Bodies that wait or have arrived may be nudged by the movers' fields only a little per
        # period (their tracking pulls them back): the trust region says how little.
        delta_eff = delta.copy()
        centre = p.copy()
        waiting = np.zeros(n, dtype=bool)
        waiting[list(holds)] = True
        waiting &= ~arrived
        delta_eff[waiting] = np.minimum(delta[waiting], self.HOLD_RADIUS * self.tolerance[waiting])
        # A body that has arrived may move anywhere inside its arrival disc (the trust region is
        # centred on its goal), so the movers get more freedom; it drifts back under light tracking.
        centre[arrived] = self.goals[arrived]
        delta_eff[arrived] = self.KEEP_IN * self.tolerance[arrived]
        weights = weights.copy()
        weights[arrived] *= self.ARRIVED_WEIGHT
        # The reward grows with the step length, not its square, so the final approach keeps its drive.
        reward = s.progress_weight * float(np.sum(weights[None, :] * np.linalg.norm(steps, axis=2))) / L
        # -- a Lie-bracket cycle instead of the program (recovery when the fields lack rank)
        if self._cycle or (self._phase is not None and self._phase["kind"] == "bracket"):
            segs = self._bracket_step(p, t, fields, drift, eps, adv, arrived, holds, weights)
            if segs is not None:
                self._prev = np.asarray(segs[0].values) / self._scale
                self._record_rms(segs)
                self._pred = None
                self._planned = np.zeros(n)
                self._step += 1
                self.records.append({
                    "time": float(t), "status": "bracket", "solve_time": 0.0, "solver_time": 0.0,
                    "step_time": time.perf_counter() - tic, "max_slack": 0.0, "slack_pairs": 0.0,
                    "slack_walls": 0.0, "remaining": rem.copy(), "horizon": 0, "progress": 0.0, "phase": "bracket"})
                return segs
        # -- program data in program units: lengths in L, rates as fractions of the channel span
        prog = self._program(H)
        # Period h uses the fields at the predicted start of period h (frozen if not relinearising).
        idx = [0] + [3 + min(h - 1, len(sets) - 4) if len(sets) > 3 else 0 for h in range(1, H)]
        Fh = np.moveaxis(fields[:, idx], 1, 0) * (T / L) * scale[None]       # (H, K, n, 2)
        dh = drift[idx] * (T / L)
        lin = np.asarray([p] + [sets[i] for i in idx[1:]]) if len(sets) > 3 else np.repeat(p[None], H, axis=0)
        reach = delta * H
        pairs, dropped = pair_slots(p, self.radii, prog.P, reach + self.clearance)
        if dropped:
            self.notes.append(f"t = {t:.4g} s: {dropped} body pairs within reach got no separation slot "
                              "(raise separation_slots)")
        if len(pairs):
            diff = lin[:, pairs[:, 0]] - lin[:, pairs[:, 1]]
            nrm = diff / np.maximum(np.linalg.norm(diff, axis=2, keepdims=True), 1e-300)
            pgap = (self.radii[pairs[:, 0]] + self.radii[pairs[:, 1]] + self.clearance) / L
        else:
            nrm, pgap = None, None
        wpts, wnrm = self.workspace.nearest_wall(p)
        near = self.workspace.clearance(p) <= self.radii + reach + self.clearance
        wnrm = np.where(near[:, None], wnrm, 0.0)
        lo0, hi0, lo1, hi1, rows, rhs0, rhs1 = self._rms_bounds()
        lower = np.vstack([lo0] + [lo1] * (H - 1))
        upper = np.vstack([hi0] + [hi1] * (H - 1))
        data = StepData(
            positions=(p - self.origin) / L, fields=Fh, drift=dh,
            refs=(base - self.origin) / L, ref_dirs=steps / L, progress_reward=reward,
            track=np.broadcast_to(weights, (H, n)),
            lower=lower, upper=upper, previous=self._prev,
            effort=np.full(K, s.effort_weight), smooth=np.full(K, s.smoothness_weight),
            trust=delta_eff / L, trust_centre=(centre - self.origin) / L, slew=self._slew,
            rate_rows=rows, rate_rhs=(np.vstack([rhs0] + [rhs1] * (H - 1)) if rows is not None else None),
            pairs=pairs, pair_normals=nrm, pair_gap=pgap,
            wall_points=(wpts - self.origin) / L, wall_normals=wnrm, wall_gap=(self.radii + np.maximum(0.5 * self.clearance, 0.02 * self.radii)) / L,
            slack_weight=s.slack_weight, worst_order_scale=1.0 / self._rounds)
        sol = prog.solve(data)
        status = sol.status
        if status == "failed":
            rate = self._idle_rate.copy()
            self.notes.append(f"t = {t:.4g} s: step program failed to solve; held the idle input for one period")
        else:
            rate = sol.rates[0]
        if sol.info.get("bound_clash"):
            self.notes.append(f"t = {t:.4g} s: RMS budget and slew limit clash on channels "
                              f"{[self.channels[k].name for k in sol.info['bound_clash']]}; slewed as far as allowed")
        segs = self._fit_rms(rate, t)
        # Planned progress: the predicted displacement along each body's route step (the progress
        # variable itself overstates it when the tracking cannot follow).
        stepn = np.linalg.norm(steps[0], axis=1)
        unit = np.where(stepn[:, None] > 0, steps[0] / np.maximum(stepn[:, None], 1e-300), 0.0)
        moved = sol.positions[1] * L - sol.positions[0] * L
        self._planned = np.maximum(np.einsum("ic,ic->i", moved, unit), 0.0) if status != "failed" else np.zeros(n)
        self._prev = rate.copy()
        self._record_rms(segs)
        self._pred = sol.positions * L + self.origin
        self._step += 1
        self.records.append({
            "time": float(t), "status": status, "solve_time": sol.solve_time, "solver_time": sol.solver_time,
            "step_time": time.perf_counter() - tic, "max_slack": sol.max_slack * L,
            "slack_pairs": float(sol.slack_pairs.max(initial=0.0) * L),
            "slack_walls": float(sol.slack_walls.max(initial=0.0) * L),
            "remaining": rem.copy(), "horizon": H, "progress": sol.progress, "phase": None if self._phase is None else self._phase["kind"],
        })
        return segs

    # -- stall detection and recovery ---------------------------------------------------------------
    def _stall_logic(self, p, rem, adv, arrived, t, planned):
        s = self.settings
        n = self.n
        W = s.stall_window
        self._hist_rem.append(rem.copy())
        self._hist_adv.append(adv.copy())
        self._hist_plan.append(np.asarray(planned, float).copy())
        weights = np.full(n, s.tracking_weight)
        holds = {}
        H = s.horizon
        ph = self._phase
        total = float(np.sum(rem * ~arrived))
        if total < self._best_total * 0.98:
            self._best_total = total
            self._fruitless = 0
        if ph is not None and ph["kind"] == "subset" and self._step >= ph["until"] \
                and self._step < ph["start"] + 6 * W and len(self._hist_rem) > W // 2:
            # Movers still getting closer: let them finish before the others move again.
            gain = self._hist_rem[-1 - W // 2][ph["bodies"]] - rem[ph["bodies"]]
            if np.any(gain > 0.25 * np.sum(np.asarray(self._hist_adv)[-W // 2:, ph["bodies"]], axis=0)):
                ph["until"] = self._step + W // 2
        if ph is not None and ph["kind"] == "bracket" and self._step >= ph["until"] and not self._cycle \
                and ph.get("extended", 0) < 8 and total < ph["total"] * 0.95:
            # Second-order cycles are slow but steady: keep going while they pay.
            ph["until"] = self._step + 4 * W
            ph["total"] = total
            ph["extended"] = ph.get("extended", 0) + 1
        if ph is not None:
            done = (self._step >= ph["until"] and not self._cycle) or arrived[ph["bodies"]].all()
            if done:
                gained = (ph.get("total0", total) - total) / max(ph.get("total0", total), 1e-300)
                self._last_phase = (ph["kind"], gained)
                self._phase = None
                self._cool = W // 2
                self._hist_rem.clear()
                self._hist_adv.clear()
                self._hist_plan.clear()
                ph = None
        if ph is None and self._cool > 0:
            self._cool -= 1
        if ph is None and self._cool == 0 and len(self._hist_rem) == W + 1:
            progress = self._hist_rem[0] - self._hist_rem[-1]
            expected = np.sum(np.asarray(self._hist_adv)[:-1], axis=0)
            planned_sum = np.sum(np.asarray(self._hist_plan)[1:], axis=0)
            routed = np.array([r is None for r in self.route_reasons])
            # Slow but steady (the shared fields can only do so much for all at once) is not a stall;
            # doing much less than planned, or next to nothing, is.
            threshold = np.maximum(planned_sum / 3.0, s.stall_progress * expected)
            stalled = np.flatnonzero(~arrived & (progress < threshold) & routed)
            if len(stalled):
                self._fruitless += 1
                moving = np.flatnonzero(~arrived & routed)
                ph = self._recover(stalled, moving, p, rem, progress, expected, t)
                if ph is not None:
                    ph["total0"] = ph["total"] = total
        if ph is not None:
            for i, w in ph.get("weights", {}).items():
                weights[i] = w * s.tracking_weight
            for i, hp in ph.get("hold", {}).items():
                if not arrived[i]:
                    holds[i] = hp
            H = ph.get("horizon", H)
        if self.gave_up is None and self._fruitless >= 6 + 2 * n:
            self.gave_up = (f"no body got closer to its goal over {self._fruitless} stall recoveries "
                            "(subset moves, bracket cycles, longer horizon, new routes)")
        self._H = H
        return weights, holds, H

    #: Tracking weight of a body that waits (relative): low enough that the movers get the fields,
    #: high enough that the waiting body is not pushed far from where it waits.
    HOLD_WEIGHT = 0.3
    #: Largest displacement per period of a body that waits or has arrived, in tolerances.
    HOLD_RADIUS = 0.5
    #: Half-width of the box (an octagon) an arrived body is kept in around its goal, in tolerances.
    KEEP_IN = 0.6
    #: Tracking weight of an arrived body toward the centre of its goal (relative).
    ARRIVED_WEIGHT = 0.2

    def _joint_step(self, movers, D, B0):
        """Largest common fraction of the steps ``D`` that ``movers`` can take while the others hold.

        Least-squares estimate: the minimum-norm rates for the holding motion and for the full
        step, then the largest fraction that keeps their sum inside the rate box.
        """
        n, T, L = self.n, self.period, self.length_unit
        F = (B0.fields * self._scale[:, None, None]).reshape(self.K, -1).T * T       # (2n, K)
        d = B0.drift.reshape(-1) * T
        tgt = np.zeros((n, 2))
        tgt[movers] = D[movers]
        if self.mode == "timeshare":
            # Time fractions are non-negative and share the period: non-negative least squares.
            from scipy.optimize import nnls

            use = self._hi > 0
            if not use.any():
                return 0.0
            x, _ = nnls(F[:, use], tgt.reshape(-1) - d)
            a = float(min(1.0, 1.0 / max(x.sum(), 1e-300)))
            res = np.linalg.norm(F[:, use] @ (a * x) + d - a * tgt.reshape(-1))
            return a * max(0.0, 1.0 - res / max(a * np.linalg.norm(tgt), 1e-300))
        pinv = np.linalg.pinv(F, rcond=1e-6)
        r0 = pinv @ (-d)
        r1 = pinv @ tgt.reshape(-1)
        lo, hi = self._lo, self._hi
        if np.any(r0 < lo - 1e-9) or np.any(r0 > hi + 1e-9):
            return 0.0
        with np.errstate(divide="ignore", invalid="ignore"):
            up = np.where(r1 > 0, (hi - r0) / r1, np.where(r1 < 0, (lo - r0) / r1, np.inf))
        a = float(np.clip(np.min(up), 0.0, 1.0))
        # The linear fit itself may be inexact (fewer inputs than coordinates): discount by the residual.
        res = np.linalg.norm(F @ (r0 + a * r1) + d - a * tgt.reshape(-1))
        return a * max(0.0, 1.0 - res / max(a * np.linalg.norm(tgt), 1e-300))

    def _choose_movers(self, candidates, p, adv):
        """The subset of ``candidates`` whose joint step covers the most route per period (greedy)."""
        B0 = self._B0
        D = np.zeros((self.n, 2))
        for i in candidates:
            q = point_at(self.routes[i], self._cum[i], self._s[i] + adv[i])
            D[i] = q - p[i]

        def score(ms):
            return self._joint_step(list(ms), D, B0) * float(np.sum(adv[list(ms)])) if ms else 0.0

        current = list(candidates)
        best = score(current)
        while len(current) > 1:
            trials = [(score([j for j in current if j != i]), i) for i in current]
            sc, drop = max(trials)
            if sc <= best * 1.05:
                break
            best = sc
            current = [j for j in current if j != drop]
        singles = [(score([i]), i) for i in candidates]
        sc1, i1 = max(singles)
        if sc1 > best * 1.05:
            return [i1], sc1
        return current, best

    def _recover(self, stalled, moving, p, rem, progress, expected, t):
        s = self.settings
        W = s.stall_window
        order = sorted(stalled, key=lambda i: (self._stall_count[i], -rem[i]))
        b = int(order[0])
        level = self._stall_count[b] % 4
        for i in stalled:
            self._stall_count[i] += 1
        names = ", ".join(f"{i} ({self.bodies[i].name})" for i in stalled)
        pct = ", ".join(f"{100 * max(progress[i], 0) / max(expected[i], 1e-300):.0f} %" for i in stalled)
        head = f"t = {t:.4g} s: body {names} stalled (progress {pct} of expected over {W} periods)"
        adv = self._hist_adv[-1]
        if level == 0 and len(moving) > 1:
            movers, _ = self._choose_movers([int(i) for i in moving], p, adv)
            if len(movers) < len(moving):
                waiting = [int(i) for i in range(self.n) if i not in movers]
                self._phase = {"kind": "subset", "bodies": movers, "until": self._step + 3 * W, "start": self._step,
                               "hold": {i: p[i].copy() for i in waiting},
                               "weights": {i: self.HOLD_WEIGHT for i in moving if i not in movers}}
                self.stalls.append(f"{head}; moved bodies {movers} for up to {3 * W} periods while bodies "
                                   f"{[i for i in waiting if i in moving]} waited where they were")
                return self._phase
            level = 1
        last_kind, last_gain = getattr(self, "_last_phase", (None, 0.0))
        if last_kind == "bracket" and last_gain > 0.1:
            level = 1                                          # it paid last time: again
        if level == 1 and self._can_bracket(moving):
            self._phase = {"kind": "bracket", "bodies": [int(i) for i in moving], "until": self._step + 8 * W,
                           "start": self._step}
            self._cycle = []
            self.stalls.append(f"{head}; the fields have rank {self._rank} < {2 * self.n} = 2 x bodies: "
                               f"played Lie-bracket cycles (four periods each) for up to {8 * W} periods")
            return self._phase
        if level <= 2:
            H = min(max(2 * s.horizon, s.horizon + 2), 8)
            self._phase = {"kind": "horizon", "bodies": [int(i) for i in stalled], "until": self._step + 2 * W,
                           "horizon": H}
            self.stalls.append(f"{head}; looked {H} periods ahead instead of {s.horizon} for {2 * W} periods")
        else:
            self._reroute(b, p, t, head)
            self._phase = {"kind": "reroute", "bodies": [b], "until": self._step + W}
        return self._phase

    def _can_bracket(self, moving):
        """Brackets help when the fields cannot span the moving bodies' motions in one period."""
        if self.mode != "linear" or self._slew is not None or self._rms:
            return False
        # Bodies that have arrived must stay: they count as much as the moving ones.
        F = self._B0.fields.reshape(self.K, -1).T
        self._rank = int(np.linalg.matrix_rank(F, tol=1e-6 * max(np.abs(F).max(), 1e-300)))
        return self._rank < 2 * self.n and self.K >= 2

    def _bracket_step(self, p, t, fields, drift, eps, adv, arrived, holds, weights):
        """One period of a Lie-bracket cycle: four periods of u_a, u_b, -u_a, -u_b at amplitude s.

        For an affine actuator with fields f_k the cycle moves every body by
        ``T^2 s^2 [f_a, f_b] + O(T^3)`` with the Lie bracket ``[f_a, f_b] = Df_b f_a - Df_a f_b``
        (the commutator of the two flows; e.g. Murray, Li & Sastry, A Mathematical Introduction to
        Robotic Manipulation, 1994, ch. 7): a direction no single period can produce. The pair and the
        signed amplitude are chosen each cycle by weighted least squares on the desired motion.
        """
        T = self.period
        if self._cycle:
            vals = self._cycle.pop(0)
            return [Segment(t, T, vals, "bracket")]
        n, K = self.n, self.K
        sc = self._scale[:, None, None]
        f = fields[:, 0] * sc                                   # (K, n, 2) m/s at full scale
        Jx = (fields[:, 1] - fields[:, 0]) * sc / eps           # d f / dx
        Jy = (fields[:, 2] - fields[:, 0]) * sc / eps
        # (J_b f_a)[b, a, i] = Jx_b * f_a,x + Jy_b * f_a,y
        JF = Jx[:, None] * f[None, :, :, :1] + Jy[:, None] * f[None, :, :, 1:]
        G = JF - np.swapaxes(JF, 0, 1)                          # [f_a, f_b] at [b, a]? see below
        # G[b, a] = J_b f_a - J_a f_b = [f_a, f_b]
        want = np.zeros((n, 2))
        w = weights.copy()
        for i in range(n):
            if arrived[i]:
                want[i] = self.goals[i] - p[i]
            elif i in holds:
                want[i] = holds[i] - p[i]
                w[i] = self.HOLD_WEIGHT
            else:
                q = point_at(self.routes[i], self._cum[i], self._s[i] + 4 * adv[i])
                want[i] = q - p[i]
        want -= 4 * T * drift[0]
        wv = np.repeat(w, 2)
        Dv = want.ravel()
        smax = np.minimum(self._hi, -self._lo)
        ia, ib = np.triu_indices(K, 1)
        C = T * T * G[ib, ia].reshape(len(ia), -1)              # cycle displacement per unit s^2
        lim = np.minimum(smax[ia], smax[ib]) ** 2
        num = C @ (wv * Dv)
        den = np.maximum((C * C) @ wv, 1e-300)
        beta = np.clip(num / den, -lim, lim)
        gain = 2 * beta * num - beta**2 * den
        base = float(np.sum(wv * Dv * Dv))
        # Brackets are small (second order), so judge them by direction, not size: the weighted
        # cosine between the cycle's motion and the wanted motion.
        cosine = np.abs(num) / np.maximum(np.sqrt(den * base), 1e-300)
        order = np.argsort(-gain)[:12]
        for j in order:
            if gain[j] <= 0 or cosine[j] < 0.2 or lim[j] <= 0:
                return None
            a, b = int(ia[j]), int(ib[j])
            sgn = 1.0 if beta[j] >= 0 else -1.0
            amp = np.sqrt(abs(beta[j]))
            if sgn < 0:
                a, b = b, a                                    # reversed order flips the bracket
            legs = []
            for k, sign in ((a, 1.0), (b, 1.0), (a, -1.0), (b, -1.0)):
                r = np.zeros(K)
                r[k] = sign * amp
                legs.append(r)
            # first-order excursions of the legs must stay clear of walls and of each other
            x = p.copy()
            ok = True
            for r in legs:
                x = x + T * (drift[0] + np.tensordot(r, f, axes=1))
                if not self._in_free(x) or not self._apart(x):
                    ok = False
                    break
            if not ok:
                continue
            vals = [np.clip(r * self._scale, [c.lower for c in self.channels], [c.upper for c in self.channels])
                    for r in legs]
            self._cycle = vals[1:]
            return [Segment(t, T, vals[0], "bracket")]
        return None

    def _in_free(self, x):
        for rad in np.unique(self.radii):
            idx = self.radii == rad
            if not np.all(self.workspace.contains(x[idx], float(rad) * 1.02)):
                return False
        return True

    def _apart(self, x):
        if self.n < 2:
            return True
        d = np.linalg.norm(x[:, None] - x[None], axis=2)
        need = self.radii[:, None] + self.radii[None] + 0.5 * self.clearance
        np.fill_diagonal(d, np.inf)
        return bool(np.all(d >= need))

    def _reroute(self, b, p, t, head):
        s = self.settings
        try:
            # A new route from where the body is, field-aware (time cost) so it seeks where the
            # fields can push it; other bodies' current positions are avoided like goals.
            rp = plan_routes(self.workspace, [self.bodies[b]] + [self.bodies[j] for j in range(self.n) if j != b],
                             np.vstack([p[b], np.delete(p, b, axis=0)]),
                             np.vstack([self.goals[b], np.delete(p, b, axis=0)]),
                             clearance=self.clearance, resolution=s.route_resolution, actuator=self.actuator,
                             field_aware=True, assign=False, graphs=self._graphs)
            r = rp.routes[0]
        except Exception as exc:       # noqa: BLE001 - a failed re-route must not stop the controller
            r = None
            self.notes.append(f"t = {t:.4g} s: re-routing body {b} failed ({exc})")
        if r is None:
            self.stalls.append(f"{head}; no alternative route for body {b}: kept its route")
            return
        self.routes[b] = r
        self._cum[b] = polyline_arclength(r)
        self._s[b] = 0.0
        self._s_best[b] = 0.0
        self.stalls.append(f"{head}; gave body {b} a new field-aware route ({route_length(r):.3g} m)")

    # -- output ------------------------------------------------------------------------------------------
    def _segments(self, rate, t):
        T = self.period
        lim = self.limits
        if self.mode == "linear":
            u = rate * self._scale
            lo = np.array([c.lower for c in self.channels])
            hi = np.array([c.upper for c in self.channels])
            return [Segment(t, T, np.clip(u, lo, hi), "mix")]
        w = np.clip(rate, 0.0, 1.0) * T
        ts = lim.time_step if lim is not None else None
        dwell = 0.0
        if lim is not None:
            dwell = max([lim.min_dwell or 0.0] + [lim.get(c.name).min_dwell or 0.0 for c in self.channels])
        B = FieldBasis("timeshare", np.zeros((self.K, 1, 2)), np.zeros((1, 2)), self.channels,
                       primitives=tuple(self._prim_objs()), idle=self._idle_values)
        R = self._rounds
        segs = []
        for j in range(R):
            # The same mix played in R shorter rounds: excursions within a period shrink R-fold.
            wr = w / R
            if ts:
                # Error diffusion: what rounding to the hardware step takes from one round is given
                # back in the next, so the mix played over time is the one planned.
                target = wr + self._q_res
                wr = np.maximum(np.round(target / ts) * ts, 0.0)
                while wr.sum() > T / R * (1 + 1e-12):
                    k = int(np.argmax(wr))
                    wr[k] -= ts
                self._q_res = np.clip(target - wr, -ts, ts)
            if dwell:
                wr[wr < dwell * (1 - 1e-9)] = 0.0
            segs += B.to_segments(wr, T / R, start=t + j * T / R, min_duration=0.0)
        if ts:
            # Keep segment boundaries on the hardware grid (to_segments drops sub-step round-off).
            fixed, tt = [], t
            for sg in segs:
                d = float(np.round(sg.duration / ts) * ts)
                if d <= 0:
                    continue
                fixed.append(Segment(tt, d, sg.values, sg.label))
                tt += d
            segs = fixed
        return segs

    def _mean_squares(self, segs):
        """Mean square of each channel over one period of ``segs``, unit^2, shape (m,)."""
        sq = np.zeros(len(self.channels))
        for sg in segs:
            sq += np.asarray(sg.values, dtype=float) ** 2 * sg.duration
        return sq / self.period

    def _fit_rms(self, rate, t):
        """Segments of ``rate`` that keep this period within every RMS budget.

        The step program meets the budgets only to solver tolerance, and in timeshare mode rounding
        the slices to the hardware step (with error diffusion) may play a little more of a loud
        primitive than planned; either could push a sliding window over its limit. Here the played
        mean squares are checked against the budgets and, where one is exceeded, the loudest
        contributing primitive is shortened (timeshare) or the channel scaled back (linear) until
        it fits.
        """
        q_res = self._q_res.copy()
        segs = self._segments(rate, t)
        if not self._rms:
            return segs
        budgets = getattr(self, "_budgets", [])
        rate = np.array(rate, dtype=float)
        ts = self.limits.time_step if self.limits is not None else None
        for _ in range(4 * self.K + 20):
            q = self._mean_squares(segs)
            over = [(j, q[j] - b) for j, b in budgets if q[j] > b * (1 + 1e-12) + 1e-300]
            if not over:
                return segs
            j, excess = max(over, key=lambda e: e[1] / max(q[e[0]], 1e-300))
            if self.mode == "linear":
                # Round-off only (the rates are clipped to the budget's box): scale the channel back.
                b = dict(budgets)[j]
                u = rate[j] * self._scale[j]
                rate[j] = np.sign(u) * np.sqrt(b) / self._scale[j] * (1 - 1e-12)
            else:
                coef = self._prims[:, j] ** 2 - self._idle_values[j] ** 2
                cand = np.flatnonzero((coef > 0) & (rate > 0))
                if not len(cand):
                    break
                k = cand[np.argmax(coef[cand])]
                cut = excess / coef[k]
                if ts:
                    cut = max(cut, ts / self.period)
                rate[k] = max(rate[k] - cut * (1 + 1e-9), 0.0)
            self._q_res = q_res.copy()
            segs = self._segments(rate, t)
        self.notes.append(f"t = {t:.4g} s: could not fit the period's input within the RMS budget of channel "
                          f"{self.channels[over[0][0]].name!r}")
        return segs

    def _prim_objs(self):
        if not hasattr(self, "_prim_cache"):
            self._prim_cache = tuple(self.actuator.primitives())
        return self._prim_cache

    def _record_rms(self, segs):
        if not self._rms:
            return
        self._sq_hist.append(self._mean_squares(segs))

    def predict(self, positions, segments, substeps=4):
        """Positions after ``segments`` on the model (classical RK4, no noise), m, shape (n, 2).

        Used by the live loop to bridge measurement latency and dropped frames.
        """
        x = np.array(positions, dtype=float)
        for sg in segments:
            u = np.asarray(sg.values, dtype=float)
            dt = sg.duration / substeps
            for _ in range(substeps):
                k1 = self._velocity(x, u)
                k2 = self._velocity(x + 0.5 * dt * k1, u)
                k3 = self._velocity(x + 0.5 * dt * k2, u)
                k4 = self._velocity(x + dt * k3, u)
                x = x + dt / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
        return x

    def _velocity(self, xy, u):
        out = np.empty_like(xy)
        for body, idx in self._groups:
            out[idx] = self.actuator.velocity(body, self.medium, xy[idx], u)
        return out

    def arrived(self, positions, margin=1.0):
        """Whether each body is within ``margin`` times its tolerance of its goal, bool (n,)."""
        return np.linalg.norm(np.asarray(positions, float) - self.goals, axis=1) <= margin * self.tolerance

    def body_reasons(self, positions):
        """Why each body that has not arrived has not, list of str or None."""
        p = np.asarray(positions, float)
        err = np.linalg.norm(p - self.goals, axis=1)
        out = []
        stalled_bodies = set()
        for txt in self.stalls:
            for i in range(self.n):
                if f"body {i} (" in txt.split(" stalled")[0] or f", {i} (" in txt.split(" stalled")[0]:
                    stalled_bodies.add(i)
        for i in range(self.n):
            if err[i] <= self.tolerance[i]:
                out.append(None)
            elif self.route_reasons[i] is not None:
                out.append(f"no route: {self.route_reasons[i]}")
            elif getattr(self, "blocked", None):
                out.append(self.blocked)
            elif i in stalled_bodies:
                why = ("without pushing the others away" if self.n > 1
                       else "(no input moves it toward its goal here: a trap or dead zone of the field)")
                out.append(f"stalled {err[i]:.3g} m from its goal: the shared fields could not move it there "
                           f"{why} (recoveries tried: {self._stall_count[i]})")
            elif self.initial_speed[i] <= 0:
                out.append("the actuator cannot push it where it starts (available speed 0)")
            else:
                out.append(f"still {err[i]:.3g} m from its goal when the plan stopped")
        return out


def _speeds_8(basis, lower, upper):
    dirs = np.array([[1, 0], [1, 1], [0, 1], [-1, 1], [-1, 0], [-1, -1], [0, -1], [1, -1]], dtype=float)
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    proj = np.einsum("knc,dc->knd", basis.fields, dirs)
    drift = basis.drift @ dirs.T
    if basis.mode == "linear":
        return drift + np.sum(np.maximum(lower[:, None, None] * proj, upper[:, None, None] * proj), axis=0)
    return drift + np.maximum(0.0, proj.max(axis=0))


@dataclass
class PlanResult:
    """Outcome of :func:`plan`.

    Attributes
    ----------
    success : bool
        Every body within tolerance of its goal at the same time.
    status : int
        0 success, 1 time or step limit, 2 gave up after fruitless stall recoveries, 3 no route,
        4 the schedule breaks a declared hardware limit (see ``violations``; never a success).
    message : str
        Names every body that did not arrive and why.
    schedule : Schedule
    routes : list of ndarray (P_i, 2)
        m.
    times : ndarray, shape (T,)
        s.
    positions : ndarray, shape (T, n, 2)
        Predicted (model) positions, m.
    bodies_report : list of dict
        ``name, index, reached, final_error (m), reason, route_length (m)`` per body.
    step_times : list of float
        Wall time of each controller step, s.
    stalls : list of str
    period : float
        s.
    goals : ndarray, shape (n, 2)
        After assignment, m.
    metrics : dict
        :func:`fieldplan.simulate.compute_metrics` of the predicted trajectory.
    violations : list of str
        Hardware-limit violations of the schedule (empty when it passes ``schedule.check(limits)``).
    notes : list of str
    max_slack : float
        Largest soft-constraint slack of any step, m.
    """

    success: bool
    status: int
    message: str
    schedule: object
    routes: list
    times: np.ndarray
    positions: np.ndarray
    bodies_report: list
    step_times: list
    stalls: list
    period: float = 0.0
    goals: np.ndarray | None = None
    metrics: dict = field(default_factory=dict)
    violations: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    max_slack: float = 0.0

    def __repr__(self):
        return (f"PlanResult(success={self.success}, status={self.status}, message={self.message!r}, "
                f"segments={self.schedule.n_segments}, duration={self.schedule.duration:.4g} s)")


def _message(bodies, reasons, head):
    missed = [f"body {i} ({bodies[i].name}): {r}" for i, r in enumerate(reasons) if r is not None]
    return head if not missed else head + "; " + "; ".join(missed)


def plan(actuator, bodies, workspace, starts, goals, *, limits=None, settings=None, rng=None, progress=False):
    """Open-loop plan on the model: iterate the controller until every body is at its goal.

    Parameters
    ----------
    actuator : Actuator
        The planning model.
    bodies : sequence of Body, length n
    workspace : Workspace
    starts, goals : array_like, shape (n, 2)
        m.
    limits : HardwareLimits, optional
    settings : PlanSettings or dict, optional
    rng : int or Generator, optional
        Unused by the deterministic model roll-out; accepted so plan and closed loop share a signature.
    progress : bool
        Show a tqdm bar (terminal use).

    Returns
    -------
    PlanResult

    Raises
    ------
    WorkspaceError
        A start or goal outside its body's free space, overlapping starts, goals closer than two radii.
    """
    from .schedule import Schedule
    from .simulate import Simulator, check_placement, compute_metrics

    bodies = list(bodies)
    starts = np.asarray(starts, dtype=float)
    check_placement(bodies, workspace, starts, "start")
    ctrl = Controller(actuator, bodies, workspace, goals, limits=limits, settings=settings)
    ctrl.prepare(starts)
    T = ctrl.period
    rmin = float(ctrl.radii.min())
    sim = Simulator(actuator, bodies, workspace, starts, brownian=False, contacts=True,
                    max_displacement=max(0.25 * rmin, 0.05 * ctrl.length_unit), record_interval=T / 4)
    segments = []
    step_times = []
    status = 1
    head = ""
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=ctrl.settings.max_steps, desc="plan", leave=False)
    if any(r is not None for r in ctrl.route_reasons):
        status = 3
        head = "no route for some bodies"
    elif ctrl.blocked:
        status = 3
        head = "cannot plan"
    else:
        settle_left = None
        for _ in range(ctrl.settings.max_steps):
            pos = sim.positions
            if ctrl.arrived(pos).all():
                if settle_left is None:
                    settle_left = int(ctrl.settings.settle_steps)
                if settle_left <= 0 or ctrl.arrived(pos, ctrl.settings.arrival_margin).all():
                    status = 0
                    break
                settle_left -= 1
            if sim.time >= ctrl.time_limit - 1e-9 * T:
                if ctrl.arrived(pos).all():
                    status = 0
                else:
                    head = f"time limit {ctrl.time_limit:.4g} s reached"
                break
            if ctrl.gave_up is not None:
                status = 2
                head = f"gave up: {ctrl.gave_up}"
                break
            tic = time.perf_counter()
            segs = ctrl.step(pos, sim.time)
            step_times.append(time.perf_counter() - tic)
            for sg in segs:
                sim.apply(sg)
            segments += segs
            if bar is not None:
                bar.update(1)
        else:
            if ctrl.arrived(sim.positions).all():
                status = 0
            else:
                head = f"step limit {ctrl.settings.max_steps} reached"
    if bar is not None:
        bar.close()
    schedule = Schedule.from_segments(ctrl.channels, segments) if segments else Schedule.empty(ctrl.channels)
    times, pos = sim.history()
    if times[-1] < sim.time:
        # The record is thinned to a quarter period; the final state belongs in it.
        times = np.append(times, sim.time)
        pos = np.concatenate([pos, sim.positions[None]], axis=0)
    metrics = compute_metrics(times, pos, bodies, ctrl.goals, ctrl.tolerance, schedule if segments else None,
                              sim.events)
    final = sim.positions
    reasons = ctrl.body_reasons(final)
    success = status == 0
    if success:
        message = f"all {len(bodies)} bodies reached their goals in {sim.time:.4g} s ({len(step_times)} periods)"
    else:
        message = _message(bodies, reasons, head or "not all bodies arrived")
    err = np.linalg.norm(final - ctrl.goals, axis=1)
    report = [{"index": i, "name": b.name, "reached": bool(err[i] <= ctrl.tolerance[i]), "final_error": float(err[i]),
               "reason": reasons[i], "route_length": float(ctrl.route_lengths[i])} for i, b in enumerate(bodies)]
    viol = [v[0] for v in schedule.violations(limits)] if (limits is not None and segments) else []
    if viol:
        # Last line of defence: a schedule the hardware must refuse is never reported as a success.
        success = False
        status = 4
        more = f" (and {len(viol) - 1} more)" if len(viol) > 1 else ""
        message = f"the schedule breaks a declared hardware limit: {viol[0]}{more}; " + message
        report = [dict(r, reason=r["reason"] or "the schedule breaks a declared hardware limit") for r in report]
    max_slack = max([r["max_slack"] for r in ctrl.records], default=0.0)
    return PlanResult(success, status, message, schedule, ctrl.routes, times, pos, report, step_times,
                      list(ctrl.stalls), T, ctrl.goals.copy(), metrics, viol, list(ctrl.notes), max_slack)


def capability_curve(actuator, bodies_factory, workspace, Ns, trials=20, rng=0, *, settings=None, truth=None,
                     separation=None, region=None):
    """Success rate and time-to-goal of seeded random tasks at increasing numbers of bodies.

    Parameters
    ----------
    actuator : Actuator
        Planning model.
    bodies_factory : callable
        ``bodies_factory(N) -> list of Body``.
    workspace : Workspace
    Ns : sequence of int
    trials : int
        Tasks per N (random starts and goals, fixed by ``rng``).
    rng : int or Generator
    settings : PlanSettings, optional
    truth : Actuator, optional
        If given, each task runs closed loop against it (:func:`fieldplan.live.closed_loop`, with
        Brownian motion); otherwise open loop on the model (:func:`plan`).
    separation : float, optional
        Least centre distance between sampled starts (and between goals), m (default 4 radii).
    region : shapely geometry, optional
        Where starts and goals are drawn.

    Returns
    -------
    dict
        ``N -> {"success_rate", "time_to_goal" (median over successes, s; NaN if none), "trials",
        "messages"}``.
    """
    rng = np.random.default_rng(rng)
    out = {}
    for N in Ns:
        bodies = list(bodies_factory(int(N)))
        rmax = max(b.radius for b in bodies)
        sep = separation if separation is not None else 4 * rmax
        ok, ttg, msgs = 0, [], []
        for _ in range(trials):
            seed = int(rng.integers(2**31))
            starts = workspace.sample(N, rmax * 1.5, seed, region=region, separation=sep)
            goals = workspace.sample(N, rmax * 1.5, seed + 1, region=region, separation=sep)
            if truth is None:
                res = plan(actuator, bodies, workspace, starts, goals, settings=settings)
                t_goal = res.metrics.get("time_to_goal", np.nan)
            else:
                from .live import closed_loop

                res = closed_loop(actuator, truth, bodies, workspace, starts, goals, settings=settings, rng=seed)
                t_goal = res.time_to_goal
            ok += bool(res.success)
            if res.success:
                ttg.append(t_goal)
            msgs.append(res.message)
        out[int(N)] = {"success_rate": ok / trials, "time_to_goal": float(np.median(ttg)) if ttg else float("nan"),
                       "trials": trials, "messages": msgs}
    return out
