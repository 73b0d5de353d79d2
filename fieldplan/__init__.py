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

Modules with their own public surface
    fieldplan.planning   Controller (the horizon planner), cost_to_go, HorizonProgram, PlanSettings
    fieldplan.plan       plan, PlanResult, capability_curve, StepController (the earlier controller)
    fieldplan.live       run_live, closed_loop (the same controller against a tracker and driver)
    fieldplan.routes     occupancy graph, A* routes, goal assignment
    fieldplan.steer      steerability, speed_map, count_curve, select_primitives, compare_designs,
                         mirror_check, symmetry_report (plots in fieldplan.steer_plots)
    fieldplan.tracking   read_tracks, velocity_samples (tracking CSV; TrackingDataError)
    fieldplan.calibrate  fit_field, CalibratedActuator, load_calibrated, fit_parameters,
                         calibrate_command (CalibrationError)
    fieldplan.scenario   load_scenario and the scenario schema; fieldplan.cli is the command
    fieldplan.testing    check_actuator (the contract suite), SourceArray
"""

from .actuator import TAGS, Actuator, Channel, FieldBasis, Primitive, Segment
from .body import Body, Shell
from .errors import (ActuatorError, FieldplanError, LimitError, ScenarioError, UnitError,
                     WorkspaceError)
from .medium import Medium, air, water
from .registry import available_actuators, load_actuator
from .schedule import ChannelLimit, HardwareLimits, Schedule
from .simulate import Rollout, Simulator, rollout
from .units import to_si
from .workspace import Workspace, circle, polygon, rectangle

__version__ = "0.1.0"

# The planner pulls in cvxpy/OSQP/networkx (about a second): load it on first use only.
_LAZY = {
    "plan": "plan", "PlanSettings": "planning", "PlanResult": "plan", "Controller": "planning",
    "capability_curve": "plan", "run_live": "live", "closed_loop": "live", "LiveResult": "live",
    "load_scenario": "scenario", "run_scenario": "compare", "write_outputs": "export",
}


def __getattr__(name):
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'fieldplan' has no attribute {name!r}")

__all__ = [
    "to_si", "Medium", "water", "air", "Body", "Shell", "Workspace", "rectangle", "circle", "polygon",
    "Actuator", "Channel", "Primitive", "FieldBasis", "Segment", "TAGS", "load_actuator",
    "available_actuators", "Schedule", "HardwareLimits", "ChannelLimit", "Simulator", "rollout", "Rollout",
    "plan", "PlanSettings", "PlanResult", "Controller", "capability_curve", "run_live", "closed_loop",
    "LiveResult", "load_scenario", "run_scenario", "write_outputs",
    "FieldplanError", "UnitError", "ActuatorError", "WorkspaceError", "LimitError", "ScenarioError",
]
