"""The one result base: what a plan, a live run and a rollout all report.

:class:`Result` holds the fields every outcome of moving bodies shares (scipy's ``OptimizeResult``
is the model: ``success``, ``status``, ``message`` plus the data). :class:`~fieldplan.planning.plan.PlanResult`,
:class:`~fieldplan.planning.live.LiveResult` and :class:`~fieldplan.world.simulate.Rollout` extend it, so code that
reads an outcome (comparison tables, exports, plots) reads the same names from each.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["Result"]


@dataclass(kw_only=True)
class Result:
    """Outcome of moving bodies: a plan, a live or closed-loop run, or a rollout.

    Attributes
    ----------
    success : bool
        Every body within tolerance of its goal (a plan: predicted; a rollout or closed loop: true).
    status : int
        0 success; other codes are listed by each subclass.
    message : str
        Names every body that did not arrive and why.
    times : ndarray, shape (T,)
        s.
    positions : ndarray, shape (T, n, 2)
        m.
    schedule : Schedule or None
        The inputs planned or played.
    goals : ndarray, shape (n, 2), or None
        After assignment (unlabelled goals), m.
    metrics : dict
        :func:`fieldplan.world.simulate.compute_metrics` of ``times``/``positions``.
    events : list
        Contacts with bodies and walls (simulated runs).
    routes : list of ndarray (P_i, 2)
        m (planned runs).
    bodies_report : list of dict
        ``name, index, reached, final_error (m), reason`` per body.
    step_times : list of float
        Controller wall time per period, s.
    stalls : list of str
    notes : list of str
    violations : list of str
        Hardware-limit violations of ``schedule`` (empty when it passes ``schedule.check(limits)``).
    """

    success: bool = False
    status: int = 0
    message: str = ""
    times: np.ndarray | None = None
    positions: np.ndarray | None = None
    schedule: object = None
    goals: np.ndarray | None = None
    metrics: dict = field(default_factory=dict)
    events: list = field(default_factory=list)
    routes: list = field(default_factory=list)
    bodies_report: list = field(default_factory=list)
    step_times: list = field(default_factory=list)
    stalls: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    violations: list = field(default_factory=list)
