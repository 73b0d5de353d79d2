"""What every controller shares: inputs, hardware limits, the period, segments and the model.

:class:`ControllerBase` turns a field basis and :class:`~fieldplan.schedule.HardwareLimits` into the
program's input set (channel boxes scaled to their span, or primitives disabled by the limits),
chooses and rounds the control period, keeps the per-period RMS budgets of sliding windows, turns one
period's weights into hardware segments (time-share rounds on the hardware time step with error
diffusion, minimum dwell, RMS trimming), and predicts motion on the model for the live loop.
The controllers (:class:`fieldplan.planning.Controller`, the horizon planner, and the earlier
:class:`fieldplan.plan.StepController`) decide *which* weights to play.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..contract.actuator import FieldBasis, Segment
from ..world.body import group_bodies as _group_bodies
from .step import variation_length
from ..errors import WorkspaceError
from .settings import PlanSettings, check_goals

__all__ = ["ControllerBase", "directional_speed"]

#: Relative margin under each declared RMS limit that the controllers plan to.
RMS_MARGIN = 1e-3


class ControllerBase:
    """Shared set-up and output of the controllers (see the module docstring).

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
    """

    def __init__(self, actuator, bodies, workspace, goals, *, limits=None, settings=None):
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
        self.n = len(self.bodies)
        self.radii = np.array([b.radius for b in self.bodies])
        s = self.settings
        self.tolerance = np.full(self.n, s.tolerance) if s.tolerance else self.radii.copy()
        self.clearance = float(s.clearance) if s.clearance is not None else 0.5 * float(self.radii.max())
        self.ready = False
        self.stalls = []
        self.notes = []
        self.records = []
        self.gave_up = None
        self.blocked = None
        self._groups = _group_bodies(self.bodies)

    def _prepare_inputs(self, p):
        """Scales, input set, period, time-share rounds and limit budgets from positions ``p`` (m).

        Returns
        -------
        delta : ndarray, shape (n,)
            Trust radius of each body, m.
        speed : ndarray, shape (n,)
            Fastest speed each body could be pushed alone, m/s.
        """
        s = self.settings
        xmin, ymin, xmax, ymax = self.workspace.bounds
        self.span = max(xmax - xmin, ymax - ymin)
        self.origin = np.array([0.5 * (xmin + xmax), 0.5 * (ymin + ymax)])
        self.max_trust = float(s.max_trust) if s.max_trust else self.span / 20.0
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
            T = max(T, self._min_period())
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
        return delta, speed

    @property
    def step_cap(self):
        """Most controller steps of a plan: ``settings.max_steps``, or as many as the time limit needs
        (periods per step: ``replan_every``) plus the settling steps and a margin of ten."""
        s = self.settings
        if s.max_steps is not None:
            return int(s.max_steps)
        per = self.period * max(1, int(getattr(s, "replan_every", 1) or 1))
        return int(np.ceil(self.time_limit / per)) + int(s.settle_steps) + 10

    def _min_period(self):
        """Shortest automatic period, s (0 here; a controller may ask for more)."""
        return 0.0

    def _basis(self, xy_sets):
        """Field basis at several position sets of all bodies, in one vectorised call."""
        xy = np.concatenate(xy_sets, axis=0)
        return self.actuator.basis(self.bodies * len(xy_sets), self.medium, xy)

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
        # Slew is a rate: within a period the output ramps in hardware steps (see _segments), so a
        # period may change a channel by as much as the steps it holds allow.
        ts = lim.time_step
        dt = ts * max(1, int(np.floor(T / ts + 1e-9))) if ts else T
        self._slew_rate = np.full(K, np.inf)
        if self.mode == "linear":
            slew = np.full(K, np.inf)
            for k, c in enumerate(self.channels):
                cl = lim.get(c.name)
                if cl.slew_rate is not None:
                    slew[k] = cl.slew_rate * dt / self._scale[k]
                    self._slew_rate[k] = cl.slew_rate
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
            # Plan to 0.1 % under the limit: time-share slices rounded to hardware steps (with error
            # diffusion) and windows that straddle period edges can otherwise overshoot by ~1e-4.
            rms = float(cl.rms) * (1.0 - RMS_MARGIN)
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
                total = rms ** 2 * (W / T if g > 1 else 1.0)
            # With a slew limit a budget that shrinks faster than the input may ramp down cannot be
            # met, so such channels are held at their sustainable level instead.
            capped = self.mode == "linear" and self._slew is not None and np.isfinite(self._slew[j])
            self._rms.append((j, rms, g, total, capped))

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

    def _segments(self, rate, t):
        T = self.period
        lim = self.limits
        if self.mode == "linear":
            lo = np.array([c.lower for c in self.channels])
            hi = np.array([c.upper for c in self.channels])
            u = np.clip(rate * self._scale, lo, hi)
            ts = lim.time_step if lim is not None else None
            if getattr(self, "_slew", None) is None or not ts:
                return [Segment(t, T, u, "mix")]
            # Ramp from the value being played in hardware steps no larger than the slew rate allows,
            # then hold: the change per period is bounded (in the program) so the ramp fits.
            u0 = np.clip(np.asarray(self._prev, float) * self._scale, lo, hi)
            step = self._slew_rate * ts
            with np.errstate(invalid="ignore", divide="ignore"):
                need = np.where(np.isfinite(step), np.abs(u - u0) / step, 0.0)
            m = int(min(np.ceil(need.max(initial=0.0) - 1e-9), np.floor(T / ts + 1e-9)))
            if m <= 0:
                return [Segment(t, T, u, "mix")]
            segs = [Segment(t + (j - 1) * ts, ts, u0 + (u - u0) * (j / m), "ramp") for j in range(1, m + 1)]
            rest = T - m * ts
            if rest > 1e-9 * ts:
                segs.append(Segment(t + m * ts, rest, u, "mix"))
            return segs
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
            if ts or dwell:
                wr = self._quantise(wr, T / R, ts, dwell)
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

    def _quantise(self, wr, span, ts, dwell):
        """Hold times ``wr`` (K,) s of one round of ``span`` s, made playable, with error diffusion.

        The hardware plays whole time steps ``ts`` and holds a primitive at least ``dwell`` or not at
        all. What the quantisation takes from one round is given back in the next (error diffusion,
        the residual bounded by one quantum), so the mix played over time is the one planned. The
        dwell is part of the quantisation: a primitive asked for less than a dwell per period
        accumulates until half a dwell is owed, then plays one dwell. Cutting short holds without
        carrying them (as before) left every correction smaller than a dwell unplayed, period after
        period: on the 64-tone plate (40 ms dwell in 0.32 s periods) the last grains stalled just
        outside their arrival radius.
        """
        ts = float(ts or 0.0)
        dwell = float(dwell or 0.0)
        target = wr + self._q_res
        q = np.maximum(np.round(target / ts) * ts, 0.0) if ts else np.maximum(target, 0.0)
        if dwell:
            d = np.ceil(dwell / ts - 1e-9) * ts if ts else dwell       # the shortest playable hold
            short = q < d * (1 - 1e-9)
            q[short] = np.where(target[short] >= 0.5 * d, d, 0.0)
        else:
            d = ts
        while q.sum() > span * (1 + 1e-12):
            k = int(np.argmax(q))
            q[k] = q[k] - ts if ts and q[k] - ts >= d * (1 - 1e-9) else 0.0
        quantum = max(d, ts)
        self._q_res = np.clip(target - q, -quantum, quantum)
        return q

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
        # Stages are kept inside the workspace's bounds (a fast body by a wall once took an RK stage
        # past a field grid's window), and, as in the world, walls stop the bodies after each step.
        lo, hi = np.array(self.workspace.bounds[:2]), np.array(self.workspace.bounds[2:])
        box = lambda y: np.clip(y, lo, hi)                 # noqa: E731
        radii = np.array([b.radius for b in self.bodies])
        for sg in segments:
            u = np.asarray(sg.values, dtype=float)
            dt = sg.duration / substeps
            for _ in range(substeps):
                k1 = self._velocity(box(x), u)
                k2 = self._velocity(box(x + 0.5 * dt * k1), u)
                k3 = self._velocity(box(x + 0.5 * dt * k2), u)
                k4 = self._velocity(box(x + dt * k3), u)
                x = x + dt / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
                out = ~(self.workspace.contains(x, 0.0) & (self.workspace.clearance(x) >= radii))
                if out.any():
                    for r in np.unique(radii[out]):
                        sel = out & (radii == r)
                        x[sel] = self.workspace.project(x[sel], float(r))[0]
        return x

    def _velocity(self, xy, u):
        out = np.empty_like(xy)
        for body, idx in self._groups:
            out[idx] = self.actuator.velocity(body, self.medium, xy[idx], u)
        return out

    def arrived(self, positions, margin=1.0):
        """Whether each body is within ``margin`` times its tolerance of its goal, bool (n,)."""
        return np.linalg.norm(np.asarray(positions, float) - self.goals, axis=1) <= margin * self.tolerance


def directional_speed(basis, directions, lower, upper):
    """Speed each body alone could reach along its own unit direction, m/s, shape (n,)."""
    proj = np.einsum("knc,nc->kn", basis.fields, directions)
    drift = np.einsum("nc,nc->n", basis.drift, directions)
    if basis.mode == "linear":
        return drift + np.sum(np.maximum(lower[:, None] * proj, upper[:, None] * proj), axis=0)
    return drift + np.maximum(0.0, (proj * (upper[:, None] > 0)).max(axis=0))


def _speeds_8(basis, lower, upper):
    dirs = np.array([[1, 0], [1, 1], [0, 1], [-1, 1], [-1, 0], [-1, -1], [0, -1], [1, -1]], dtype=float)
    dirs /= np.linalg.norm(dirs, axis=1, keepdims=True)
    proj = np.einsum("knc,dc->knd", basis.fields, dirs)
    drift = basis.drift @ dirs.T
    if basis.mode == "linear":
        return drift + np.sum(np.maximum(lower[:, None, None] * proj, upper[:, None, None] * proj), axis=0)
    return drift + np.maximum(0.0, proj.max(axis=0))
