"""What a scenario file becomes: :class:`Scenario` with its :class:`SimulationSettings` and :class:`OutputSettings`.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from ..planning.settings import PlanSettings
from .schema import PLOT_NAMES

__all__ = ['SimulationSettings', 'OutputSettings', 'Scenario']

# ----------------------------------------------------------------------------------------------
# Settings objects
# ----------------------------------------------------------------------------------------------

@dataclass
class SimulationSettings:
    """How trials are simulated (see the ``simulation`` section)."""

    trials: int = 1
    seed: int = 0
    brownian: bool = True
    tracking_noise: float = 0.0
    latency: float = 0.0
    max_displacement: float | None = None
    dt_max: float | None = None
    contacts: bool = True
    record_interval: float | None = None
    required_success: float = 1.0

    def simulator_options(self):
        """Keyword arguments for :class:`fieldplan.Simulator` / :func:`fieldplan.rollout`."""
        out = {"contacts": self.contacts}
        for k in ("max_displacement", "dt_max", "record_interval"):
            if getattr(self, k) is not None:
                out[k] = getattr(self, k)
        return out


@dataclass
class OutputSettings:
    """What ``fieldplan run`` writes (see the ``outputs`` section)."""

    schedule: bool = True
    resample_rate: float | None = None
    trajectories: bool = True
    plots: tuple = PLOT_NAMES
    animation: bool = False
    animation_frames: int = 48
    field_backdrop: bool = True
    dpi: int = 120


@dataclass
class Scenario:
    """A validated scenario: the objects a run needs.

    Attributes
    ----------
    name : str
    workspace : Workspace
        With its medium.
    bodies : list of Body
        Expanded from the kinds, in file order.
    starts, goals : ndarray, shape (n, 2)
        m.
    assign_goals : bool
        Goals are unlabelled (the planner assigns them).
    actuator : Actuator
        Planning model.
    truth : Actuator or None
        Simulated truth; ``None`` means the planning model.
    limits : HardwareLimits
        Declared limits (at least the channels' own bounds).
    planner : dict
        PlanSettings keyword arguments (SI), plus nothing else.
    mode : {"open_loop", "closed_loop"}
    simulation : SimulationSettings
    outputs : OutputSettings
    variants : list of Scenario
        Comparison variants (each a full scenario).
    source : str or None
        File the scenario was read from.
    digest : str
        SHA-256 of the source text (or of the normalised YAML when built in code).
    config : dict
        The normalised SI form of the file (what :func:`dump_scenario` writes).
    input_files : list of str
        Other files the scenario reads (a calibrated actuator's file), resolved.
    """

    name: str
    workspace: object
    bodies: list
    starts: np.ndarray
    goals: np.ndarray
    actuator: object
    truth: object = None
    limits: object = None
    assign_goals: bool = False
    planner: dict = field(default_factory=dict)
    mode: str = "open_loop"
    simulation: SimulationSettings = field(default_factory=SimulationSettings)
    outputs: OutputSettings = field(default_factory=OutputSettings)
    variants: list = field(default_factory=list)
    description: str = ""
    source: str | None = None
    digest: str = ""
    config: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)
    input_files: list = field(default_factory=list)

    @property
    def medium(self):
        return self.workspace.medium

    @property
    def truth_actuator(self):
        """The actuator trials are simulated on."""
        return self.truth if self.truth is not None else self.actuator

    def plan_settings(self):
        """A :class:`fieldplan.planning.settings.PlanSettings` from the ``planner`` section and ``goals.unlabelled``."""
        return PlanSettings(**{**self.planner, "assign_goals": bool(self.assign_goals)})

    def replace(self, **changes):
        """A shallow copy with some attributes changed."""
        return dataclasses.replace(self, **changes)
