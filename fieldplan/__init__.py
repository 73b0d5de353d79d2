"""fieldplan: steer several small bodies with a few shared field inputs.

Public surface (everything else may change):

Units and data
    to_si, Medium, water, air, Body, Shell, Workspace, rectangle, circle, polygon
Actuator contract
    Actuator, Channel, Primitive, FieldBasis, Segment, TAGS, load_actuator
Schedules and limits
    Schedule, HardwareLimits, ChannelLimit
Simulation
    Simulator, rollout, Rollout
Planning (loaded on first use)
    plan, PlanSettings, PlanResult, Controller, capability_curve, run_live, closed_loop, LiveResult
Scenarios (loaded on first use)
    load_scenario, run_scenario, write_outputs
Errors
    FieldplanError, UnitError, ActuatorError, WorkspaceError, LimitError, ScenarioError

Sub-packages, one per layer (each imports only from those listed before it)
    fieldplan.world        the physical world: Medium, Body, wall physics, Workspace, Simulator
    fieldplan.contract     actuators and hardware: Actuator, Channel, Schedule, HardwareLimits,
                           discovery (registry), check_actuator and SourceArray (testing)
    fieldplan.planning     the planner: Controller, cost-to-go, horizon program, routes, plan()
                           (open loop), run_live and closed_loop (the same controller in a loop)
    fieldplan.analysis     before any plan: steerability, speed maps, count curves, design
                           helpers, symmetry, capability curves
    fieldplan.calibration  tracking CSV, fitted fields, CalibratedActuator, grey-box fits
    fieldplan.plots        every figure, in one style
    fieldplan.scenario     the scenario file: reading, schema, validation, building, dumping
    fieldplan.workflows    what the commands do: run_scenario, compare, write_outputs, inspect, fit
    fieldplan.lab          the lab stack: video tracking, instruments, real-time pacing
Modules beside them: errors, units (pint), fileio (atomic files, output folders), result (the
result base), progress (progress bars), cli (the ``fieldplan`` command). The earlier flat module
paths (``fieldplan.steer``, ``fieldplan.plan``, ...) still import (:mod:`fieldplan.compat`).
"""

import importlib
import sys

from . import compat

from .contract.actuator import TAGS, Actuator, Channel, FieldBasis, Primitive, Segment
from .contract.registry import available_actuators, load_actuator
from .contract.schedule import ChannelLimit, HardwareLimits, Schedule
from .errors import ActuatorError, FieldplanError, LimitError, ScenarioError, UnitError, WorkspaceError
from .units import to_si
from .world.body import Body, Shell
from .world.medium import Medium, air, water
from .world.simulate import Rollout, Simulator, rollout
from .world.workspace import Workspace, circle, polygon, rectangle

__version__ = "0.1.0"

# The planner pulls in cvxpy/OSQP/networkx (about a second): load it on first use only.
_LAZY = {
    "plan": "planning.plan", "PlanSettings": "planning", "PlanResult": "planning.plan", "Controller": "planning",
    "capability_curve": "analysis.capability", "run_live": "planning.live", "closed_loop": "planning.live",
    "LiveResult": "planning.live", "Result": "result", "load_scenario": "scenario",
    "run_scenario": "workflows.compare", "write_outputs": "workflows.export",
}


def __getattr__(name):
    if name in _LAZY:
        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'fieldplan' has no attribute {name!r}")


compat.install(sys.modules[__name__], lazy=_LAZY)

__all__ = [
    "to_si", "Medium", "water", "air", "Body", "Shell", "Workspace", "rectangle", "circle", "polygon",
    "Actuator", "Channel", "Primitive", "FieldBasis", "Segment", "TAGS", "load_actuator",
    "available_actuators", "Schedule", "HardwareLimits", "ChannelLimit", "Simulator", "rollout", "Rollout",
    "plan", "PlanSettings", "PlanResult", "Controller", "capability_curve", "run_live", "closed_loop",
    "LiveResult", "Result", "load_scenario", "run_scenario", "write_outputs",
    "FieldplanError", "UnitError", "ActuatorError", "WorkspaceError", "LimitError", "ScenarioError",
]
