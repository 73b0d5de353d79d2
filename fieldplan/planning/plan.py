"""Open-loop plans, capability curves, and the earlier route-tracking step controller.

:func:`plan` iterates a controller on the model (open loop) until every body is within tolerance
of its goal at the same time, or a time limit; the :class:`PlanResult` says which body did not
arrive and why. The controller is the horizon planner (:class:`fieldplan.planning.Controller`:
receding-horizon sequential convex programming on each body's cost-to-go map) unless
``PlanSettings(method="step")`` asks for :class:`StepController`, the earlier controller kept for
comparison: it advances a reference point along each body's A* route, solves a one-period step
program (:mod:`fieldplan.control`) and recovers from stalls by moving subsets of bodies, looking
further ahead, re-routing and playing Lie-bracket cycles. Bad input (a start or goal outside the
free space, goals closer than two radii) is a :class:`~fieldplan.errors.WorkspaceError` naming the
body.

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
from dataclasses import dataclass

import numpy as np

from ..contract.actuator import Segment
from ..contract.schedule import Schedule
from ..world.body import check_bodies, check_positions
from ..world.simulate import Simulator, check_placement, compute_metrics
from .step import (StepData, StepProgram, pair_slots, point_at, polyline_arclength, project_to_route,
                      reference_points, variation_length)
from ..errors import WorkspaceError
from ..result import Result
from . import Controller, PlanSettings, check_goals, make_controller
from .base import ControllerBase, directional_speed
from .routes import plan_routes, route_length

__all__ = ["PlanSettings", "Controller", "StepController", "plan", "PlanResult", "check_goals"]


class StepController(ControllerBase):
    """The earlier route-tracking controller (``PlanSettings(method="step")``): positions in, one
    period of segments out.

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
    >>> ctrl = StepController(act, [bead], ws, [[2e-4, 2e-4]])
    >>> segs = ctrl.step([[5e-4, 5e-4]], 0.0)
    >>> round(sum(s.duration for s in segs) / ctrl.period, 9)
    1.0
    """

    def __init__(self, actuator, bodies, workspace, goals, *, routes=None, limits=None, settings=None):
        super().__init__(actuator, bodies, workspace, goals, limits=limits, settings=settings)
        if self.settings.horizon is None:
            # The step controller looks one period ahead unless told otherwise.
            self.settings = dataclasses.replace(self.settings, horizon=1)
        self._given_routes = routes
        self.route_plan = None
        self._graphs = {}

    # -- set-up ----------------------------------------------------------------------------------------
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
        delta, speed = self._prepare_inputs(p)
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
        self.time_limit = float(s.time_limit) if s.time_limit else float(5.0 * est + 50 * self.period)

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
        vdir = directional_speed(B0, dirs, self._lo * self._scale, self._hi * self._scale)
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


@dataclass(kw_only=True)
class PlanResult(Result):
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

    period: float = 0.0
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
    bodies = list(check_bodies(bodies))
    starts = check_positions(starts, "starts", n=len(bodies), error=WorkspaceError)
    goals = check_positions(goals, "goals", n=len(bodies), error=WorkspaceError)
    check_placement(bodies, workspace, starts, "start")
    ctrl = make_controller(actuator, bodies, workspace, goals, limits=limits, settings=settings)
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

        bar = tqdm(total=ctrl.step_cap, desc="plan", leave=False)
    if any(r is not None for r in ctrl.route_reasons):
        status = 3
        head = "no route for some bodies"
    elif ctrl.blocked:
        status = 3
        head = "cannot plan"
    else:
        settle_left = None
        for _ in range(ctrl.step_cap):
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
                head = f"step limit {ctrl.step_cap} reached"
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
    return PlanResult(success=success, status=status, message=message, schedule=schedule, routes=ctrl.routes,
                      times=times, positions=pos, bodies_report=report, step_times=step_times,
                      stalls=list(ctrl.stalls), period=T, goals=ctrl.goals.copy(), metrics=metrics, violations=viol,
                      notes=list(ctrl.notes), max_slack=max_slack)


def __getattr__(name):
    # capability_curve runs both plan() and closed_loop(), so it lives with the analyses
    # (fieldplan.analysis.capability); this keeps ``from fieldplan.plan import capability_curve`` working.
    if name == "capability_curve":
        # deferred import: import cycle: fieldplan.analysis.capability imports this module (analysis is the layer above)
        from ..analysis.capability import capability_curve  # noqa: PLC0415

        return capability_curve
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
