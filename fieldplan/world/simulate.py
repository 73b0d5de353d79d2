"""Rollout simulator: plays inputs on a *truth* actuator with Brownian motion, contacts and tracking noise.

Bodies are overdamped (velocity follows force at once), so the state is just the positions. Each
segment is integrated with classical fourth-order Runge-Kutta steps whose length is bounded so that
no step moves a body more than ``max_displacement``; Brownian increments (Stokes-Einstein with the
exact wall mobility of fieldplan.world.physics, the one the drift uses) are added after each
deterministic step (operator splitting); overlaps between bodies and with walls are then resolved
by projection and counted as contact events.
"""

from __future__ import annotations

import collections
from dataclasses import dataclass

import numpy as np

from ..errors import WorkspaceError
from ..result import Result
from .body import group_bodies
from .physics import diffusion_coefficient, inertial_relaxation_time

__all__ = ["Event", "Simulator", "Rollout", "rollout", "compute_metrics", "check_placement"]


@dataclass(frozen=True)
class Event:
    """A contact: ``kind`` is ``"contact"`` (two bodies) or ``"wall"`` (a body and a wall)."""

    time: float
    kind: str
    bodies: tuple


def check_placement(bodies, workspace, xy, what="start"):
    """Raise :class:`WorkspaceError` if a body lies outside the free space or overlaps another."""
    xy = np.asarray(xy, dtype=float)
    if xy.shape != (len(bodies), 2):
        raise WorkspaceError(f"{what} positions must have shape ({len(bodies)}, 2), got {xy.shape}.")
    for i, b in enumerate(bodies):
        if not workspace.contains(xy[i:i + 1], b.radius)[0]:
            raise WorkspaceError(
                f"{what} of body {i} ({b.name}) at ({xy[i, 0]:.6g}, {xy[i, 1]:.6g}) m is not in the free space: "
                f"its centre must be at least its radius {b.radius:g} m from every wall and obstacle.")
    r = np.array([b.radius for b in bodies])
    if len(bodies) > 1:
        d = np.linalg.norm(xy[:, None] - xy[None, :], axis=2)
        gap = d - (r[:, None] + r[None, :])
        np.fill_diagonal(gap, np.inf)
        i, j = np.unravel_index(np.argmin(gap), gap.shape)
        if gap[i, j] < 0:
            raise WorkspaceError(f"{what} positions of bodies {min(i, j)} and {max(i, j)} overlap "
                                 f"(centres {d[i, j]:.3g} m apart, radii sum {r[i] + r[j]:.3g} m).")


class Simulator:
    """Simulated truth: the default ``observe``/``apply`` pair of the live loop.

    Parameters
    ----------
    actuator : Actuator
        The truth model (may differ from the planner's model).
    bodies : sequence of Body
    workspace : Workspace
    positions : array_like, shape (n, 2)
        Start positions, m.
    rng : int or numpy.random.Generator, optional
        Seed of Brownian and tracking noise.
    brownian : bool
        Add thermal motion (Stokes-Einstein, with the exact wall mobility of the drag).
    tracking_noise : float
        Standard deviation of each observed coordinate, m.
    latency : float
        Observations report positions as they were this many seconds ago, s.
    max_displacement : float, optional
        Largest deterministic displacement per integration step, m (default a quarter of the
        smallest radius).
    dt_max : float, optional
        Longest integration step, s.
    contacts : bool
        Resolve overlaps (bodies cannot interpenetrate each other or walls).
    record_interval : float, optional
        Record positions at most this often, s (default: every step).
    """

    def __init__(self, actuator, bodies, workspace, positions, *, rng=None, brownian=True,
                 tracking_noise=0.0, latency=0.0, max_displacement=None, dt_max=None, contacts=True,
                 record_interval=None, t0=0.0):
        self.actuator = actuator
        self.bodies = list(bodies)
        self.workspace = workspace
        self.medium = workspace.medium
        self.rng = np.random.default_rng(rng)
        self.brownian = bool(brownian)
        self.tracking_noise = float(tracking_noise)
        self.latency = float(latency)
        self.radii = np.array([b.radius for b in self.bodies])
        self.max_displacement = float(max_displacement) if max_displacement else 0.25 * float(self.radii.min())
        self.dt_max = dt_max
        self.contacts = bool(contacts)
        self.record_interval = record_interval
        xy = np.array(positions, dtype=float)
        check_placement(self.bodies, workspace, xy)
        self.positions = xy
        self.time = float(t0)
        self.events = []
        self._groups = group_bodies(self.bodies)
        self._diff = np.array([diffusion_coefficient(b, self.medium) for b in self.bodies])
        self._in_contact = set()
        self._on_wall = set()
        self._times = [self.time]
        self._hist = [xy.copy()]
        self._recent = collections.deque([(self.time, xy.copy())], maxlen=100000)
        self.n_steps = 0
        self.tau = max(inertial_relaxation_time(b, self.medium) for b in self.bodies)

    # -- dynamics ---------------------------------------------------------------------------------
    def _velocity(self, xy, u):
        out = np.empty_like(xy)
        for body, idx in self._groups:
            out[idx] = self.actuator.velocity(body, self.medium, xy[idx], u)
        return out

    def advance(self, values, duration):
        """Hold channel ``values`` for ``duration`` seconds."""
        u = np.asarray(values, dtype=float)
        remaining = float(duration)
        # Brownian steps no larger than half a radius keep contact resolution meaningful.
        dt_brown = (0.5 * self.radii.min()) ** 2 / (2 * self._diff.max()) if self.brownian else np.inf
        while remaining > 1e-15 * max(1.0, duration):
            x = self.positions
            k1 = self._velocity(x, u)
            vmax = float(np.max(np.linalg.norm(k1, axis=1)))
            dt = min(remaining, self.max_displacement / vmax if vmax > 0 else np.inf, dt_brown)
            if self.dt_max:
                dt = min(dt, self.dt_max)
            k2 = self._velocity(x + 0.5 * dt * k1, u)
            k3 = self._velocity(x + 0.5 * dt * k2, u)
            k4 = self._velocity(x + dt * k3, u)
            x = x + dt / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
            if self.brownian:
                x = x + self.rng.standard_normal(x.shape) * np.sqrt(2.0 * self._diff * dt)[:, None]
            self.time += dt
            remaining -= dt
            if self.contacts:
                x = self._resolve(x)
            self.positions = x
            self.n_steps += 1
            self._record()

    def apply(self, segment):
        """Play one :class:`~fieldplan.Segment`."""
        self.advance(segment.values, segment.duration)

    def play(self, schedule):
        """Play every segment of a schedule."""
        for seg in schedule.segments:
            self.apply(seg)

    def _record(self):
        self._recent.append((self.time, self.positions.copy()))
        if self.record_interval is None or self.time - self._times[-1] >= self.record_interval * (1 - 1e-9):
            self._times.append(self.time)
            self._hist.append(self.positions.copy())

    def _resolve(self, x):
        n = len(x)
        r = self.radii
        if n > 1:
            for _ in range(8):
                d = x[:, None, :] - x[None, :, :]
                dist = np.linalg.norm(d, axis=2)
                overlap = (r[:, None] + r[None, :]) - dist
                np.fill_diagonal(overlap, -np.inf)
                ii, jj = np.nonzero(np.triu(overlap > 0, 1))
                if not len(ii):
                    break
                for i, j in zip(ii, jj):
                    key = (int(i), int(j))
                    if key not in self._in_contact:
                        self._in_contact.add(key)
                        self.events.append(Event(self.time, "contact", key))
                    dv = d[i, j] if dist[i, j] > 0 else self.rng.standard_normal(2)
                    nvec = dv / np.linalg.norm(dv)
                    push = 0.5 * (overlap[i, j] + 1e-9 * r[i])
                    x[i] += push * nvec
                    x[j] -= push * nvec
            # pairs that separated end their contact
            if self._in_contact:
                dist = np.linalg.norm(x[:, None, :] - x[None, :, :], axis=2)
                self._in_contact = {(i, j) for (i, j) in self._in_contact
                                    if dist[i, j] < (r[i] + r[j]) * (1 + 1e-6)}
        for rad in np.unique(r):
            idx = np.flatnonzero(r == rad)
            inside = self.workspace.contains(x[idx], rad)
            for i in idx[~inside]:
                x[i:i + 1], _ = self.workspace.project(x[i:i + 1], rad)
                if i not in self._on_wall:
                    self._on_wall.add(int(i))
                    self.events.append(Event(self.time, "wall", (int(i),)))
            if self._on_wall:
                for i in idx[inside]:
                    if i in self._on_wall and self.workspace.clearance(x[i:i + 1])[0] > rad * (1 + 1e-3):
                        self._on_wall.discard(i)
        return x

    # -- measurement --------------------------------------------------------------------------------
    def true_positions(self, t=None):
        """True positions now, or at past time ``t`` (linear interpolation of recent steps), m."""
        if t is None or t >= self.time:
            return self.positions.copy()
        times = np.array([a for a, _ in self._recent])
        j = int(np.searchsorted(times, t))
        if j <= 0:
            return self._recent[0][1].copy()
        (ta, xa), (tb, xb) = self._recent[j - 1], self._recent[j]
        f = (t - ta) / (tb - ta) if tb > ta else 1.0
        return xa + f * (xb - xa)

    def observe(self):
        """What a tracker would report now: delayed by ``latency``, with Gaussian noise, m."""
        xy = self.true_positions(self.time - self.latency if self.latency else None)
        if self.tracking_noise:
            xy = xy + self.rng.normal(0.0, self.tracking_noise, xy.shape)
        return xy

    def history(self):
        """Recorded ``times (T,)`` s and true ``positions (T, n, 2)`` m, always ending with the current state."""
        times, hist = list(self._times), list(self._hist)
        if times[-1] < self.time:
            times.append(self.time)
            hist.append(self.positions.copy())
        return np.asarray(times), np.asarray(hist)


@dataclass(kw_only=True)
class Rollout(Result):
    """One simulated execution of a schedule (:class:`fieldplan.result.Result`).

    ``positions`` are the true positions, m; ``events`` the contacts (:class:`Event`); ``success``
    means every body ended within tolerance of its goal (False when no goals were given), and
    ``status`` is then 0 (1 otherwise); ``schedule`` is the schedule played and ``goals`` the goals
    it was measured against.
    """


def compute_metrics(times, positions, bodies, goals=None, tolerance=None, schedule=None, events=()):
    """Metrics of a trajectory.

    Parameters
    ----------
    times : ndarray, shape (T,)
        s.
    positions : ndarray, shape (T, n, 2)
        m.
    bodies : sequence of Body
    goals : ndarray, shape (n, 2), optional
        m.
    tolerance : float or ndarray (n,), optional
        Arrival radius, m (default: each body's radius).
    schedule : Schedule, optional
        For input energy.
    events : sequence of Event

    Returns
    -------
    dict
        ``final_error`` (m, per body), ``reached`` (bool per body), ``all_reached``,
        ``time_to_goal`` (s: first recorded time with every body within tolerance; NaN if never),
        ``duration`` (s), ``path_length`` (m per body; with Brownian motion this grows as the
        recording gets finer), ``min_separation`` (m: smallest surface-to-surface gap between two
        bodies; negative would be an overlap), ``contacts`` and ``wall_contacts`` (counts),
        ``input_energy`` (per channel name, unit^2 s).
    """
    positions = np.asarray(positions, dtype=float)
    times = np.asarray(times, dtype=float)
    r = np.array([b.radius for b in bodies])
    out = {"duration": float(times[-1] - times[0]) if len(times) else 0.0}
    steps = np.linalg.norm(np.diff(positions, axis=0), axis=2)
    out["path_length"] = steps.sum(axis=0).tolist()
    n = positions.shape[1]
    if n > 1:
        d = np.linalg.norm(positions[:, :, None, :] - positions[:, None, :, :], axis=3)
        gap = d - (r[:, None] + r[None, :])[None]
        iu = np.triu_indices(n, 1)
        out["min_separation"] = float(np.min(gap[:, iu[0], iu[1]]))
    else:
        out["min_separation"] = float("inf")
    out["contacts"] = sum(1 for e in events if e.kind == "contact")
    out["wall_contacts"] = sum(1 for e in events if e.kind == "wall")
    if goals is not None:
        g = np.asarray(goals, dtype=float)
        tol = np.broadcast_to(np.asarray(r if tolerance is None else tolerance, dtype=float), (n,))
        err = np.linalg.norm(positions - g[None], axis=2)
        out["final_error"] = err[-1].tolist()
        out["reached"] = (err[-1] <= tol).tolist()
        out["all_reached"] = bool(np.all(err[-1] <= tol))
        inside = np.all(err <= tol[None], axis=1)
        out["time_to_goal"] = float(times[np.argmax(inside)] - times[0]) if inside.any() else float("nan")
    if schedule is not None:
        out["input_energy"] = dict(zip([c.name for c in schedule.channels], schedule.energy().tolist()))
    return out


def rollout(schedule, actuator, bodies, workspace, starts, goals=None, *, tolerance=None, rng=None,
            brownian=True, **simulator_options):
    """Play ``schedule`` open loop on ``actuator`` (the truth) from ``starts``.

    Parameters
    ----------
    schedule : Schedule
    actuator : Actuator
        Truth model.
    bodies : sequence of Body
    workspace : Workspace
    starts : array_like, shape (n, 2)
        m.
    goals : array_like, shape (n, 2), optional
        m; enables arrival metrics.
    tolerance : float, optional
        Arrival radius, m (default each body's radius).
    rng : int or Generator, optional
    brownian : bool
    **simulator_options
        Passed to :class:`Simulator` (``max_displacement``, ``dt_max``, ``contacts``, ...).

    Returns
    -------
    Rollout

    Examples
    --------
    >>> import fieldplan
    >>> from fieldplan.contract.testing import SourceArray
    >>> from fieldplan.contract.schedule import Schedule
    >>> act = SourceArray([[0, 0], [1e-3, 0]], force=1e-12)
    >>> ws = fieldplan.Workspace((0, 0, 1e-3, 1e-3))
    >>> bead = fieldplan.Body("bead", radius=5e-6, density=1050.0)
    >>> sched = Schedule.from_segments(act.channels, [fieldplan.Segment(0, 10.0, [0.0, 1.0])])
    >>> r = rollout(sched, act, [bead], ws, [[5e-4, 5e-4]], rng=1)
    >>> bool(r.positions[-1, 0, 0] > 5e-4)   # pulled toward the source at x = 1 mm
    True
    """
    sim = Simulator(actuator, bodies, workspace, starts, rng=rng, brownian=brownian,
                    t0=schedule.start, **simulator_options)
    sim.play(schedule)
    times, pos = sim.history()
    metrics = compute_metrics(times, pos, bodies, goals, tolerance, schedule, sim.events)
    if goals is None:
        return Rollout(success=False, status=1, message="no goals given", times=times, positions=pos,
                       schedule=schedule, events=sim.events, metrics=metrics)
    missed = [f"body {i} ({b.name}) ended {metrics['final_error'][i]:.3g} m from its goal"
              for i, b in enumerate(bodies) if not metrics["reached"][i]]
    msg = "all bodies reached their goals" if not missed else "; ".join(missed)
    return Rollout(success=not missed, status=1 if missed else 0, message=msg, times=times, positions=pos,
                   schedule=schedule, goals=np.asarray(goals, dtype=float), events=sim.events, metrics=metrics)
