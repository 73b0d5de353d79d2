"""Scenario files: the YAML schema, a loader that keeps line numbers, validation and object building.

A scenario file describes one task (workspace, medium, bodies, starts and goals, the actuator, the
hardware limits, planner and simulation settings, outputs) and optionally *variants* of it for a
comparison. :func:`load_scenario` reads it with PyYAML's safe loader only, remembers the line of every
key, checks every section against :data:`SCHEMA`, builds the objects, and raises one
:class:`~fieldplan.errors.ScenarioError` listing *every* problem found, each with file, line, key path,
what was expected and what was found. Unknown keys are errors with a "did you mean" suggestion.

Every physical value is an SI number or a string with a unit (``"150 um"``, ``"2 A"``, ``"20 degC"``),
converted by :func:`fieldplan.units.to_si`.

================================  ====================================================================
:mod:`~fieldplan.scenario.yamldoc`   YAML with line numbers, read safely and within resource limits
:mod:`~fieldplan.scenario.schema`    :data:`SCHEMA`: every section and key (validation, "did you mean", README)
:mod:`~fieldplan.scenario.fields`    :class:`Key`, and the keys of a dataclass from its fields' metadata
:mod:`~fieldplan.scenario.model`     :class:`Scenario`, :class:`SimulationSettings`, :class:`OutputSettings`
:mod:`~fieldplan.scenario.readers`   the validation context and the typed value readers
:mod:`~fieldplan.scenario.params`    actuator parameters from constructor signatures and numpydoc units
:mod:`~fieldplan.scenario.sections`  one reader per section (workspace, bodies, actuator, limits, ...)
:mod:`~fieldplan.scenario.load`      whole files and variants: :func:`load_scenario`, :func:`parse_scenario`
:mod:`~fieldplan.scenario.dump`      objects back to YAML: :func:`dump_scenario`, :func:`scenario_to_dict`
================================  ====================================================================
"""

from .dump import dump_scenario, scenario_to_dict
from .load import load_scenario, parse_scenario
from .model import OutputSettings, Scenario, SimulationSettings
from .params import actuator_params
from .fields import field_keys
from .schema import PLOT_NAMES, SCHEMA, VARIANT_SECTIONS, Key, schema_reference
from .yamldoc import (MAX_ALIAS_NODES, MAX_BODIES, MAX_DEPTH, MAX_DPI, MAX_FILE_CHARS, MAX_NODES, MAX_OBSTACLE_VERTICES,
                      MAX_OBSTACLES, MAX_TRIALS, YamlDoc, key_string, read_yaml)

__all__ = [
    "Scenario", "SimulationSettings", "OutputSettings", "SCHEMA", "Key", "VARIANT_SECTIONS", "PLOT_NAMES",
    "load_scenario", "parse_scenario", "read_yaml", "YamlDoc", "key_string", "dump_scenario", "scenario_to_dict",
    "schema_reference", "actuator_params", "field_keys",
    "MAX_FILE_CHARS", "MAX_DEPTH", "MAX_NODES", "MAX_ALIAS_NODES", "MAX_BODIES", "MAX_OBSTACLES",
    "MAX_OBSTACLE_VERTICES", "MAX_DPI", "MAX_TRIALS",
]
