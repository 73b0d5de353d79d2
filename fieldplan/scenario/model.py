"""What a scenario file becomes: :class:`Scenario` with its :class:`SimulationSettings` and :class:`OutputSettings`.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from ..planning.settings import PlanSettings
from ..plots.catalog import RUN_FIGURES

#: Plots ``fieldplan run`` can write (the ``outputs.plots`` names).
PLOT_NAMES = tuple(RUN_FIGURES)

__all__ = ['SimulationSettings', 'OutputSettings', 'Scenario']

# ----------------------------------------------------------------------------------------------
# Settings objects
# ----------------------------------------------------------------------------------------------

@dataclass
class SimulationSettings:
    """How trials are simulated (see the ``simulation`` section).

    Each field's unit and meaning are in its metadata; the ``simulation`` rows of
    :data:`fieldplan.scenario.SCHEMA` are generated from them.
    """

    trials: int = field(default=1, metadata={"doc": "Simulated executions (0: plan and export only)."})
    seed: int = field(default=0, metadata={"doc": "Seed of trial k is seed + k (planner randomness uses seed)."})
    brownian: bool = field(default=True, metadata={"doc": "Thermal motion (Stokes-Einstein with the wall factor)."})
    tracking_noise: float = field(default=0.0, metadata={
        "doc": "Standard deviation of each observed coordinate.", "unit": "m"})
    latency: float = field(default=0.0, metadata={"doc": "Tracker delay (closed loop).", "unit": "s"})
    max_displacement: float | None = field(default=None, metadata={
        "doc": "Largest integration step displacement.", "unit": "m",
        "default_text": "a quarter of the smallest radius"})
    dt_max: float | None = field(default=None, metadata={
        "doc": "Longest integration step.", "unit": "s", "default_text": "no cap"})
    contacts: bool = field(default=True, metadata={"doc": "Resolve body-body and body-wall contacts."})
    record_interval: float | None = field(default=None, metadata={
        "doc": "Record trajectories at most this often.", "unit": "s", "default_text": "every integration step"})
    required_success: float = field(default=1.0, metadata={
        "doc": "Fraction of trials that must reach every goal for exit code 0."})

    def simulator_options(self):
        """Keyword arguments for :class:`fieldplan.Simulator` / :func:`fieldplan.rollout`."""
        out = {"contacts": self.contacts}
        for k in ("max_displacement", "dt_max", "record_interval"):
            if getattr(self, k) is not None:
                out[k] = getattr(self, k)
        return out


@dataclass
class OutputSettings:
    """What ``fieldplan run`` writes (see the ``outputs`` section; rows generated from the metadata)."""

    schedule: bool = field(default=True, metadata={"doc": "schedule.csv and schedule.json."})
    resample_rate: float | None = field(default=None, metadata={
        "doc": "Also write schedule_resampled.csv sampled at this rate.", "unit": "Hz",
        "default_text": "not written"})
    trajectories: bool = field(default=True, metadata={"doc": "trajectories.csv (predicted and every trial)."})
    plots: tuple = field(default=PLOT_NAMES, metadata={
        "doc": "true, false, or a list of " + ", ".join(f"`{p}`" for p in PLOT_NAMES) + ".", "kind": "any",
        "default_text": "`true` (every plot)"})
    animation: bool = field(default=False, metadata={"doc": "animation.gif of the first trial."})
    animation_frames: int = field(default=48, metadata={"doc": "Frames of the animation (evenly spaced in time)."})
    field_backdrop: bool = field(default=True, metadata={
        "doc": "Shade the workspace plot by the fastest available speed."})
    dpi: int = field(default=120, metadata={"doc": "Resolution of the PNG plots."})


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
