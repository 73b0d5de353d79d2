"""Planner settings and the goal check shared by every controller.

Examples
--------
>>> PlanSettings(horizon=12).method
'horizon'
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from ..errors import FieldplanError, WorkspaceError

__all__ = ["PlanSettings", "check_goals"]


@dataclass
class PlanSettings:
    """Settings of the controller and the planner (SI units; ``None`` picks a default).

    Parameters
    ----------
    period : float, optional
        Control period, s. Default: chosen from the speeds so the median body moves about one
        trust radius per period (rounded to the hardware time step, at least the minimum dwell; in
        timeshare mode at least 8 hardware slots, so that a mix of primitives can be played).
    method : {"horizon", "step"}
        ``"horizon"`` (default): the horizon planner of :class:`fieldplan.planning.Controller` -
        sequential convex programming over ``horizon`` periods for all bodies at once, with each
        body's cost-to-go map as the objective. ``"step"``: the earlier route-tracking step
        controller (:class:`fieldplan.plan.StepController`), kept for comparison.
    horizon : int, optional
        Periods the program looks ahead. Default (horizon method): from the fields' variation
        length and the bodies' speeds: ``2 / trust_fraction`` periods (each moves a body about one
        trust radius, a ``trust_fraction`` of the variation length), so about two variation lengths
        of travel, between 8 and 30 periods; the step method defaults to 1.
    iterations : int
        Sequential convex programming iterations per period (horizon method): each solves the QP
        linearised along the current nominal trajectory, re-evaluates the true cost on the model,
        and is accepted only if that cost did not increase (else the trust region shrinks).
    balance : {"time", "squared"}
        Horizon method: how the bodies' times-to-go are traded. ``"time"``: the plan lowers their
        sum (each body's squared time-to-go is weighed by its time-to-go when the period starts),
        so bodies near home are held while the far ones come in. ``"squared"``: the sum of squares,
        which lets the bodies furthest behind push the others away.
    replan_every : int
        Horizon method: periods of each plan played before planning again from new measurements
        (1: every period). More saves computing when periods are short against the time a plan
        takes, at the cost of reacting later to noise and model error.
    field_table : bool
        Horizon method: roll candidate sequences out on the field basis tabulated on a grid and
        interpolated (:class:`fieldplan.planning.fieldtable.FieldTable`), much faster than the
        exact model for coil and electrode fields; the simulator always uses the exact model.
    table_resolution : float, optional
        Cell of that grid, m (default half the route grid cell).
    tolerance : float, optional
        Arrival radius, m (default each body's radius). The horizon cost has a dead zone of 0.3 times
        this around each goal.
    time_limit : float, optional
        Longest plan, s (default, horizon method: ten times the slowest body's time-to-go or four
        times the sum of them, whichever is longer, plus ``50 + settle_steps`` periods: enough to
        move the bodies one after another).
    clearance : float, optional
        Extra distance kept from walls by routes and between bodies by the separation constraint, m
        (default half the largest radius).
    tracking_weight, effort_weight, smoothness_weight : float
        Objective weights (positions in trust radii, inputs in fractions of their span).
    slack_weight : float
        Exact-penalty weight of the soft constraints.
    progress_weight : float
        Step method: Reward of the common progress along the routes, relative to the tracking cost of a full
        step (small: the program takes the largest step all bodies can follow closely).
    trust_fraction : float
        Trust radius per period as a fraction of the fields' variation length ``|f| / |grad f|``.
    max_trust : float, optional
        Largest trust radius, m (default 1/20 of the workspace's larger side).
    route_resolution : float, optional
        Route and cost-to-go grid cell, m (default :func:`fieldplan.routes.default_resolution`:
        1/64 of the workspace's larger side).
    field_aware_routes : bool
        Step method: Route edge cost = time at the actuator's available speed instead of length.
    assign_goals : bool
        Bodies of the same kind may swap goals (minimum total route cost).
    max_steps : int, optional
        Most controller steps of a plan (default: as many as the time limit needs, plus settling).
    stall_window : int
        Periods over which progress is measured to detect a stall (horizon method: the summed cost of
        the times-to-go, as ``balance`` weighs them, falls by less than 2 % over them).
    stall_progress : float
        Step method: A body stalls when over the window it progresses less than this fraction of what the fields
        could do for it alone, or less than a third of what the step program planned for it.
    relinearise : bool
        Step method: With ``horizon > 1``, evaluate the fields at the predicted positions of later periods.
    backend : {"osqp", "cvxpy"}
        Step method: Step program back end (see :mod:`fieldplan.control`).
    solver : str, optional
        cvxpy solver name for the ``"cvxpy"`` back end.
    separation_slots : int, optional
        Step method: Room for pair constraints per period (default all pairs up to 4 n).
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

    # Each field's unit, one-line meaning, allowed values and, where a None default is computed, what
    # it becomes (metadata) are what scenario files, `fieldplan schema` and the README's settings table
    # read (fieldplan.scenario.fields); the docstring above holds the long description, and
    # tests/planning/test_settings.py fails when the two disagree on a name, unit or choice.
    period: float | None = field(default=None, metadata={
        "unit": "s", "default_text": "from the speeds",
        "doc": "Control period; the automatic one lets the median body move about one trust radius, and in "
               "timeshare mode holds at least 8 hardware slots (time steps or minimum dwells) for a mix to be played."})
    method: str = field(default="horizon", metadata={
        "choices": ("horizon", "step"),
        "doc": "horizon: sequential convex programming over the horizon for all bodies at once; step: the "
               "earlier route-tracking step controller."})
    horizon: int | None = field(default=None, metadata={
        "default_text": "2 / trust_fraction, within 8 to 30 (step method: 1)",
        "doc": "Periods the program looks ahead."})
    iterations: int = field(default=3, metadata={
        "doc": "Sequential convex programming iterations (QP solves) per period (horizon method)."})
    replan_every: int = field(default=1, metadata={
        "doc": "Periods of each plan played before planning again from new measurements (horizon method)."})
    balance: str = field(default="squared", metadata={
        "choices": ("time", "squared"),
        "doc": "How the bodies' times-to-go are traded: their sum (time: bodies near home are held) or the sum "
               "of their squares (squared: whoever is furthest behind is served first)."})
    field_table: bool = field(default=True, metadata={
        "doc": "Roll candidate sequences out on the field basis tabulated on a grid (horizon method; the "
               "simulator always uses the exact model)."})
    table_resolution: float | None = field(default=None, metadata={
        "unit": "m", "default_text": "half the route grid cell", "doc": "Cell of the field_table grid."})
    tolerance: float | None = field(default=None, metadata={
        "unit": "m", "default_text": "each body's radius",
        "doc": "Arrival radius (the horizon cost has a dead zone of 0.3 times this around each goal)."})
    time_limit: float | None = field(default=None, metadata={
        "unit": "s", "doc": "Longest plan.",
        "default_text": "10 times the slowest time-to-go or 4 times their sum, plus 50 + settle_steps periods"})
    clearance: float | None = field(default=None, metadata={
        "unit": "m", "default_text": "half the largest radius",
        "doc": "Extra distance kept from walls and between bodies."})
    tracking_weight: float = field(default=1.0, metadata={
        "doc": "Objective weight of tracking (positions in trust radii)."})
    effort_weight: float = field(default=1e-3, metadata={
        "doc": "Objective weight of input effort (inputs in fractions of their span)."})
    smoothness_weight: float = field(default=1e-2, metadata={
        "doc": "Objective weight of input changes (in fractions of the channel span)."})
    slack_weight: float = field(default=1e3, metadata={
        "doc": "Exact-penalty weight of the soft constraints."})
    progress_weight: float = field(default=1.0, metadata={
        "doc": "Step method: reward of the common progress along the routes."})
    trust_fraction: float = field(default=0.2, metadata={
        "doc": "Trust radius per period as a fraction of the fields' variation length |f| / |grad f|."})
    max_trust: float | None = field(default=None, metadata={
        "unit": "m", "default_text": "1/20 of the workspace's larger side", "doc": "Largest trust radius."})
    route_resolution: float | None = field(default=None, metadata={
        "unit": "m", "default_text": "1/64 of the workspace's larger side",
        "doc": "Route and cost-to-go grid cell (a grid of more than 10^6 cells is an error)."})
    field_aware_routes: bool = field(default=False, metadata={
        "doc": "Step method: route edge cost is the time at the available speed instead of the length."})
    assign_goals: bool = field(default=False, metadata={
        "doc": "Bodies of the same kind may swap goals (in a scenario file: goals.unlabelled)."})
    max_steps: int | None = field(default=None, metadata={
        "default_text": "what the time limit needs, plus settling",
        "doc": "Most controller steps of a plan (a safety cap; the time limit normally ends a plan)."})
    stall_window: int = field(default=8, metadata={
        "doc": "Periods over which progress is measured to detect a stall (horizon method: the summed "
               "time-to-go cost falls by less than 2 % over them)."})
    stall_progress: float = field(default=0.05, metadata={
        "doc": "Step method: fraction of the possible progress below which a body stalls."})
    relinearise: bool = field(default=True, metadata={
        "doc": "Step method: with horizon > 1, evaluate the fields at the predicted positions of later periods."})
    backend: str = field(default="osqp", metadata={
        "choices": ("osqp", "cvxpy"), "doc": "Step method: step program back end."})
    solver: str | None = field(default=None, metadata={
        "default_text": "OSQP", "doc": "cvxpy solver name for the cvxpy back end."})
    separation_slots: int | None = field(default=None, metadata={
        "default_text": "all pairs, up to 4 n",
        "doc": "Step method: room for pair constraints per period."})
    timeshare_rounds: int = field(default=4, metadata={
        "doc": "Timeshare mode: play each period's primitive mix in this many shorter rounds."})
    arrival_margin: float = field(default=0.5, metadata={
        "doc": "Open loop: keep steering until every body is within this fraction of its tolerance."})
    settle_steps: int = field(default=30, metadata={
        "doc": "Most extra periods spent settling to within arrival_margin of the tolerance."})

    def __post_init__(self):
        # Text settings take the values their metadata lists (the list the scenario reader and the
        # reference show); the values are quoted in the message, so it names only the field at fault.
        for f in dataclasses.fields(self):
            choices = f.metadata.get("choices")
            v = getattr(self, f.name)
            if choices and not (isinstance(v, str) and v in choices):
                raise FieldplanError(f"PlanSettings {f.name} must be {_one_of(choices)}, got {v!r}.")

        def positive(key, allow_none=True):
            v = getattr(self, key)
            if v is None and allow_none:
                return
            if not (isinstance(v, (int, float, np.number)) and not isinstance(v, bool) and np.isfinite(v) and v > 0):
                raise FieldplanError(f"PlanSettings {key} must be a finite number > 0, got {v!r}.")

        for key in ("period", "tolerance", "time_limit", "max_trust", "route_resolution", "table_resolution"):
            positive(key)
        for key in ("tracking_weight", "slack_weight", "progress_weight", "trust_fraction", "stall_progress"):
            positive(key, allow_none=False)
        for key in ("effort_weight", "smoothness_weight"):
            v = getattr(self, key)
            if not (np.isfinite(v) and v >= 0):
                raise FieldplanError(f"PlanSettings {key} must be a finite number >= 0, got {v!r}.")
        if self.clearance is not None and not (np.isfinite(self.clearance) and self.clearance >= 0):
            raise FieldplanError(f"PlanSettings clearance must be >= 0 m, got {self.clearance!r}.")
        if self.horizon is not None and not (isinstance(self.horizon, (int, np.integer))
                                             and not isinstance(self.horizon, bool) and self.horizon >= 1):
            raise FieldplanError(f"PlanSettings horizon must be an integer >= 1 (or None for automatic), "
                                 f"got {self.horizon!r}.")
        if self.max_steps is not None and not (isinstance(self.max_steps, (int, np.integer))
                                               and not isinstance(self.max_steps, bool) and self.max_steps >= 1):
            raise FieldplanError(f"PlanSettings max_steps must be an integer >= 1 (or None), got {self.max_steps!r}.")
        for key in ("iterations", "replan_every", "stall_window", "timeshare_rounds"):
            v = getattr(self, key)
            if not (isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 1):
                raise FieldplanError(f"PlanSettings {key} must be an integer >= 1, got {v!r}.")
        if not (0 < self.arrival_margin <= 1):
            raise FieldplanError(f"PlanSettings arrival_margin must be in (0, 1], got {self.arrival_margin!r}.")
        if not (isinstance(self.settle_steps, (int, np.integer)) and self.settle_steps >= 0):
            raise FieldplanError(f"PlanSettings settle_steps must be an integer >= 0, got {self.settle_steps!r}.")

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


def _one_of(choices):
    """``'a' or 'b'``, ``one of 'a', 'b' or 'c'``: the allowed values of a setting, quoted.

    Examples
    --------
    >>> _one_of(("time", "squared")), _one_of(("a", "b", "c"))
    ("'time' or 'squared'", "one of 'a', 'b' or 'c'")
    """
    quoted = [repr(c) for c in choices]
    if len(quoted) == 1:
        return quoted[0]
    listed = f"{', '.join(quoted[:-1])} or {quoted[-1]}"
    return listed if len(quoted) == 2 else f"one of {listed}"


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
