"""Scenario files: the YAML schema, a loader that keeps line numbers, validation and object building.

A scenario file describes one task (workspace, medium, bodies, starts and goals, the actuator, the
hardware limits, planner and simulation settings, outputs) and optionally *variants* of it for a
comparison. :func:`load_scenario` reads it with PyYAML's safe loader only, remembers the line of every
key, checks every section against :data:`SCHEMA`, builds the objects, and raises one
:class:`~fieldplan.errors.ScenarioError` listing *every* problem found, each with file, line, key path,
what was expected and what was found. Unknown keys are errors with a "did you mean" suggestion.

Every physical value is an SI number or a string with a unit (``"150 um"``, ``"2 A"``, ``"20 degC"``),
converted by :func:`fieldplan.units.to_si`.
"""

from __future__ import annotations

import dataclasses
import difflib
import functools
import hashlib
import inspect
import math
import os
import re
import warnings
from dataclasses import dataclass, field

import numpy as np
import shapely
import yaml

from .errors import FieldplanError, ScenarioError, UnitError
from .units import to_si

__all__ = [
    "Scenario", "SimulationSettings", "OutputSettings", "SCHEMA",
    "load_scenario", "parse_scenario", "read_yaml", "dump_scenario", "scenario_to_dict",
    "schema_reference", "actuator_params", "PLANNER_UNITS",
]

_MISSING = object()


class _Bad:
    """Marker for a value that failed validation (its problem is already recorded)."""

    def __bool__(self):
        return False

    def __repr__(self):
        return "<invalid>"


BAD = _Bad()


class _NotImported:
    """Marker for an actuator whose module was not imported (``check_only``): its section is unchecked."""

    def __repr__(self):
        return "<actuator not imported>"


NOT_IMPORTED = _NotImported()


# ----------------------------------------------------------------------------------------------
# YAML with line numbers
# ----------------------------------------------------------------------------------------------

#: Resource limits on a scenario file, so that no file can make reading it use unbounded memory or
#: time (each is documented in the README; a file beyond one is refused with the line concerned).
MAX_FILE_CHARS = 16_000_000     # size of the file, characters
MAX_DEPTH = 64                  # nesting depth of lists and mappings (after alias expansion)
MAX_NODES = 500_000             # YAML values (scalars, lists, mappings), aliases expanded
MAX_ALIAS_NODES = 100_000       # values reached through aliases (``*name``), in total
MAX_BODIES = 1_000              # bodies in one scenario (sum of the counts)
MAX_OBSTACLES = 50_000          # obstacles in one workspace
MAX_OBSTACLE_VERTICES = 3_000_000   # polygon vertices of all obstacles (a circle is 129)
MAX_DPI = 1200                  # outputs.dpi
MAX_TRIALS = 100_000            # simulation.trials (every trial's trajectory is kept)

_PROGRESS_OBSTACLES = 2_000     # show a progress bar (on a terminal) from this many obstacles
_PROGRESS_VALUES = 50_000       # ... and from this many YAML values while reading
_MAX_REPEATED_WARNINGS = 10     # one warning each for this many, then one summary


class _TooBig(Exception):
    """A resource limit of the YAML reader was reached (line 1-based, message)."""

    def __init__(self, line, message):
        super().__init__(message)
        self.line, self.message = line, message


class _Bounds:
    """Nesting-depth and node-count bounds while composing (PyYAML composes recursively, so a deeply
    nested file would otherwise end in RecursionError)."""

    def _init_bounds(self, max_depth, max_nodes, bar=None):
        self._depth, self._nodes = 0, 0
        self._max_depth, self._max_nodes = max_depth, max_nodes
        self._bar = bar

    def compose_node(self, parent, index):
        self._depth += 1
        self._nodes += 1
        if self._bar is not None and self._nodes % 4096 == 0:
            self._bar.update(4096)
        try:
            if self._depth > self._max_depth:
                raise _TooBig(self.peek_event().start_mark.line + 1,
                              f"lists and mappings are nested more than {self._max_depth} deep "
                              "(fieldplan.scenario.MAX_DEPTH).")
            if self._nodes > self._max_nodes:
                raise _TooBig(self.peek_event().start_mark.line + 1,
                              f"the file holds more than {self._max_nodes} values (fieldplan.scenario.MAX_NODES).")
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1


class _BoundedLoader(_Bounds, yaml.SafeLoader):
    """PyYAML's pure-Python safe loader, bounded; its error messages are the clearest."""

    def __init__(self, text, max_depth, max_nodes):
        yaml.SafeLoader.__init__(self, text)
        self._init_bounds(max_depth, max_nodes)


try:
    from yaml._yaml import CParser as _CParser
except ImportError:  # PyYAML built without libyaml
    _CParser = None

if _CParser is not None:
    class _FastBoundedLoader(_Bounds, yaml.composer.Composer, _CParser, yaml.constructor.SafeConstructor,
                             yaml.resolver.Resolver):
        """libyaml's parser (several times faster on long obstacle lists) under the bounded Python composer."""

        def __init__(self, text, max_depth, max_nodes, bar=None):
            _CParser.__init__(self, text)
            yaml.composer.Composer.__init__(self)
            yaml.constructor.SafeConstructor.__init__(self)
            yaml.resolver.Resolver.__init__(self)
            self._init_bounds(max_depth, max_nodes, bar)


def _prescan(text, max_depth, max_nodes, max_alias):
    """Check the size limits on the parser's event stream, before any node is built.

    Returns the number of values (aliases expanded), or None for malformed YAML. Every
    collection's expanded size (values inside it, aliases counted at the size of their anchor)
    and height are tracked in one pass, so an alias bomb or a huge or deeply nested file is refused
    in about a second (libyaml parses; only counters are kept). Malformed YAML is left to the reader.
    """
    parser = _CParser(text)
    stack = []                 # per open collection: [size, height, anchor]
    anchors = {}               # anchor -> (size, height)
    nodes = alias = 0

    def close(size, height, anchor, mark, own):
        nonlocal nodes
        if anchor is not None:
            anchors[anchor] = (size, height)
        if stack:
            stack[-1][0] += size
            stack[-1][1] = max(stack[-1][1], height + 1)
            if len(stack) + height > max_depth:
                raise _TooBig(mark.line + 1, f"lists and mappings are nested more than {max_depth} deep once "
                                             "aliases are expanded (fieldplan.scenario.MAX_DEPTH).")
        nodes += own
        if nodes > max_nodes:
            raise _TooBig(mark.line + 1, f"the file expands to more than {max_nodes} values "
                                         "(fieldplan.scenario.MAX_NODES).")

    try:
        while True:
            ev = parser.get_event()
            if ev is None or isinstance(ev, yaml.StreamEndEvent):
                break
            if isinstance(ev, (yaml.SequenceStartEvent, yaml.MappingStartEvent)):
                if len(stack) >= max_depth:
                    raise _TooBig(ev.start_mark.line + 1, f"lists and mappings are nested more than {max_depth} "
                                                          "deep (fieldplan.scenario.MAX_DEPTH).")
                stack.append([1, 0, ev.anchor])
            elif isinstance(ev, (yaml.SequenceEndEvent, yaml.MappingEndEvent)):
                size, height, anchor = stack.pop()
                close(size, max(height, 1), anchor, ev.start_mark, 1)
            elif isinstance(ev, yaml.ScalarEvent):
                close(1, 0, ev.anchor, ev.start_mark, 1)
            elif isinstance(ev, yaml.AliasEvent):
                size, height = anchors.get(ev.anchor, (1, 0))
                alias += size
                if alias > max_alias:
                    raise _TooBig(ev.start_mark.line + 1, f"aliases (*name) expand to more than {max_alias} "
                                                          "values (fieldplan.scenario.MAX_ALIAS_NODES).")
                close(size, height, None, ev.start_mark, size)
    except yaml.YAMLError:
        return None            # the reader reports malformed YAML with its own message
    finally:
        parser.dispose()
    return nodes


def _merged_size(node, memo):
    """Number of key/value pairs a mapping has once its ``<<`` merge keys are expanded (memoised)."""
    key = id(node)
    if key in memo:
        return memo[key]
    memo[key] = 0                      # a merge cycle counts as nothing rather than recursing forever
    total = 0
    for kn, vn in node.value:
        if kn.tag == "tag:yaml.org,2002:merge":
            subs = vn.value if isinstance(vn, yaml.SequenceNode) else [vn]
            total += sum(_merged_size(m, memo) for m in subs if isinstance(m, yaml.MappingNode))
        else:
            total += 1
    memo[key] = total
    return total


# Tags of plain data; anything else (!!python/..., !!binary, timestamps) is refused.
_PLAIN_TAGS = {f"tag:yaml.org,2002:{t}" for t in ("str", "int", "float", "bool", "null", "seq", "map")}

# PyYAML follows YAML 1.1, where "1e-6" (no dot) is a string; users mean a number.
_EXP_FLOAT = re.compile(r"^[-+]?(\d+\.?\d*|\.\d+)[eE][-+]?\d+$")


@dataclass
class YamlDoc:
    """A parsed YAML document with the line (1-based) of every key and list item.

    Attributes
    ----------
    data : object
        Plain Python data (dicts, lists, scalars), as ``yaml.safe_load`` would give, except that
        mapping keys are always the key's text and ``1e-6`` style scalars are floats.
    lines : dict
        Path tuple (keys and list indices) -> line number.
    file : str
        Name used in messages.
    text : str
        The source text.
    """

    data: object
    lines: dict
    file: str
    text: str

    def line(self, path):
        """Line of ``path``, or of its nearest ancestor that has one."""
        path = tuple(path)
        while path:
            if path in self.lines:
                return self.lines[path]
            path = path[:-1]
        return self.lines.get((), 1)


def key_string(path):
    """``("bodies", 0, "radius")`` -> ``"bodies[0].radius"``."""
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            out += ("." if out else "") + str(p)
    return out


def _nearest_key(text, line):
    """The last ``key:`` at or above ``line`` (1-based) in raw text, for syntax-error messages."""
    lines = text.splitlines()
    for i in range(min(line, len(lines)) - 1, -1, -1):
        m = re.match(r"^\s*-?\s*([A-Za-z_][\w\-]*)\s*:", lines[i])
        if m:
            return m.group(1)
    return "(top level)"


def read_yaml(text, file="<scenario>", progress=False):
    """Parse YAML ``text`` with the safe loader, keeping the line of every key.

    Reading is bounded (:data:`MAX_DEPTH`, :data:`MAX_NODES`, :data:`MAX_ALIAS_NODES`): an alias
    bomb or a deeply nested file is refused with its line after a bounded amount of work.

    Parameters
    ----------
    text : str
        YAML source.
    file : str
        Name used in error messages.
    progress : bool
        Show a progress bar while a long file is read.

    Returns
    -------
    YamlDoc

    Raises
    ------
    ScenarioError
        Malformed YAML (with the line and the nearest key), more than one document, a duplicate
        key in a mapping, or a resource limit reached.

    Examples
    --------
    >>> doc = read_yaml("a:\\n  b: 5 um\\n  c: [1, 2]\\n")
    >>> doc.data, doc.line(("a", "c", 1))
    ({'a': {'b': '5 um', 'c': [1, 2]}}, 3)
    """
    max_depth, max_nodes, max_alias = MAX_DEPTH, MAX_NODES, MAX_ALIAS_NODES
    problems = []
    loader, node, early = None, _MISSING, None
    bar = None
    if _CParser is not None:
        try:
            total = _prescan(text, max_depth, max_nodes, max_alias)
        except _TooBig as exc:
            total, early = None, exc
        if progress and total and total >= _PROGRESS_VALUES:
            from tqdm.auto import tqdm  # noqa: PLC0415

            bar = tqdm(total=total, desc=f"reading {os.path.basename(file)}", unit=" values", leave=False)
        loader = _FastBoundedLoader(text, max_depth, max_nodes, bar)
        try:
            if early is None:
                node = loader.get_single_node()
        except yaml.YAMLError:
            # Re-read with the pure-Python parser: its messages and marks are the ones users see.
            loader.dispose()
            loader = None
        except _TooBig as exc:
            early = exc
        finally:
            if bar is not None:
                bar.close()
    if loader is None:
        loader = _BoundedLoader(text, max_depth, max_nodes)

    def too_big(line, message):
        return ScenarioError([(file, line, _nearest_key(text, line or 1),
                               f"{message} Scenario files are limited so that reading one cannot exhaust memory "
                               "or time; simplify the file (see the README's limits).")])

    try:
        try:
            if early is not None:
                raise early
            if node is _MISSING:
                node = loader.get_single_node()
        except _TooBig as exc:
            raise too_big(exc.line, exc.message) from None
        except RecursionError:
            raise too_big(None, "the file is nested too deeply to read.") from None
        except yaml.MarkedYAMLError as exc:
            # The context mark is where the broken construct began (an unclosed bracket, a key
            # missing its colon); the problem mark is where the parser noticed. Point at the first.
            mark = exc.context_mark or exc.problem_mark
            line = mark.line + 1 if mark is not None else None
            what = exc.problem or str(exc)
            ctx = f" ({exc.context})" if exc.context else ""
            noticed = ""
            if exc.problem_mark is not None and exc.context_mark is not None and \
                    exc.problem_mark.line != exc.context_mark.line:
                noticed = f", noticed on line {exc.problem_mark.line + 1}"
            raise ScenarioError([(file, line, _nearest_key(text, line or 1),
                                  f"malformed YAML: {what}{ctx}{noticed}. Check indentation, colons, quotes and "
                                  "brackets on this line or the one above.")]) from None
        except yaml.YAMLError as exc:
            raise ScenarioError([(file, None, "(document)", f"cannot read YAML: {exc}")]) from None
        lines = {}
        if node is None:
            return YamlDoc(None, {(): 1}, file, text)
        lines[()] = node.start_mark.line + 1
        seen = set()
        count = {"nodes": 0, "alias": 0}
        merge_memo = {}

        def walk(n, path, via_alias=False):
            # A node met a second time is an alias (*name) being expanded: bound the total work.
            via_alias = via_alias or id(n) in seen
            seen.add(id(n))
            count["nodes"] += 1
            if via_alias:
                count["alias"] += 1
                if count["alias"] > max_alias:
                    raise _TooBig(n.start_mark.line + 1, f"aliases (*name) expand to more than {max_alias} values "
                                                         "(fieldplan.scenario.MAX_ALIAS_NODES).")
            if count["nodes"] > max_nodes:
                raise _TooBig(n.start_mark.line + 1, f"the file expands to more than {max_nodes} values "
                                                     "(fieldplan.scenario.MAX_NODES).")
            if len(path) > max_depth:
                raise _TooBig(n.start_mark.line + 1, f"lists and mappings are nested more than {max_depth} deep "
                                                     "once aliases are expanded (fieldplan.scenario.MAX_DEPTH).")
            if n.tag not in _PLAIN_TAGS:
                problems.append((file, n.start_mark.line + 1, key_string(path) or "(top level)",
                                 f"YAML tag {n.tag!r} is not allowed: scenario files hold plain data only "
                                 "(numbers, text, lists, mappings)."))
                return None
            if isinstance(n, yaml.MappingNode):
                if any(kn.tag == "tag:yaml.org,2002:merge" for kn, _ in n.value) and \
                        _merged_size(n, merge_memo) > max_alias:
                    raise _TooBig(n.start_mark.line + 1, f"merge keys (<<) expand to more than {max_alias} entries "
                                                         "(fieldplan.scenario.MAX_ALIAS_NODES).")
                loader.flatten_mapping(n)
                out = {}
                for kn, vn in n.value:
                    if not isinstance(kn, yaml.ScalarNode):
                        problems.append((file, kn.start_mark.line + 1, key_string(path),
                                         "mapping keys must be plain names, not lists or mappings."))
                        continue
                    key = kn.value
                    kpath = path + (key,)
                    if key in out:
                        problems.append((file, kn.start_mark.line + 1, key_string(kpath),
                                         f"duplicate key {key!r} (first given on line {lines[kpath]}); "
                                         "give each key once."))
                        continue
                    lines[kpath] = kn.start_mark.line + 1
                    out[key] = walk(vn, kpath, via_alias)
                return out
            if isinstance(n, yaml.SequenceNode):
                out = []
                for i, vn in enumerate(n.value):
                    lines[path + (i,)] = vn.start_mark.line + 1
                    out.append(walk(vn, path + (i,), via_alias))
                return out
            value = loader.construct_object(n, deep=True)
            if isinstance(value, str) and not n.style and _EXP_FLOAT.match(value.strip()):
                value = float(value)
            return value

        try:
            data = walk(node, ())
        except _TooBig as exc:
            raise too_big(exc.line, exc.message) from None
    finally:
        loader.dispose()
    if problems:
        raise ScenarioError(problems)
    return YamlDoc(data, lines, file, text)


# ----------------------------------------------------------------------------------------------
# Schema: the one description of every key (validation, "did you mean" and the README reference)
# ----------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Key:
    """One key of a section: its type, SI unit, default and meaning."""

    name: str
    kind: str            # quantity | number | int | bool | str | choice | point | shape | list | section | map | any
    unit: str | None = None
    default: object = None
    doc: str = ""
    required: bool = False
    choices: tuple = ()


def _k(name, kind, unit=None, default=None, doc="", required=False, choices=()):
    return Key(name, kind, unit, default, doc, required, tuple(choices))


SHAPE_DOC = ("one of `rectangle: [xmin, ymin, xmax, ymax]`, `rectangle: {center: [x, y], size: [w, h]}`, "
             "`circle: {center: [x, y], radius: r}` or `polygon: [[x, y], ...]` (lengths in m or with units)")

#: Every section and key of a scenario file, in file order.
SCHEMA = {
    "": [
        _k("name", "str", doc="Label used in outputs and comparison tables (default: file name)."),
        _k("description", "str", doc="Free text."),
        _k("workspace", "section", required=True, doc="The plane region."),
        _k("medium", "section", doc="Fluid or gas (default water at 20 degC)."),
        _k("bodies", "list", required=True, doc="Kinds of steered bodies, each with a count."),
        _k("starts", "section", required=True, doc="Start positions, one per body, in body order."),
        _k("goals", "section", required=True, doc="Goal positions, one per body."),
        _k("actuator", "section", required=True, doc="The planning model."),
        _k("truth", "section", doc="Actuator the trials are simulated on (model mismatch); default: the "
                                   "planning model. Without `type` it copies `actuator` and overrides the "
                                   "parameters listed."),
        _k("limits", "section", doc="Hardware limits every exported schedule is checked against."),
        _k("planner", "section", doc="Planner settings."),
        _k("simulation", "section", doc="Trials: noise, seeds, success threshold."),
        _k("outputs", "section", doc="What `fieldplan run` writes."),
        _k("variants", "list", doc="For `fieldplan compare`: named variants, each replacing whole "
                                   "sections of this file (an `actuator` without `type` overrides only the "
                                   "parameters listed)."),
        _k("design", "section", doc="For `fieldplan design`: free actuator keys, subsets to keep, objective, "
                                    "constraints and budget (read by fieldplan.design; ignored by `run`)."),
    ],
    "workspace": [
        _k("boundary", "shape", "m", required=True, doc="Outer wall: " + SHAPE_DOC + "."),
        _k("obstacles", "list", "m", default=[], doc="Solid regions, each " + SHAPE_DOC + "."),
    ],
    "medium": [
        _k("preset", "choice", default="water", choices=("water", "air"),
           doc="Start from water (IAPWS-grade viscosity, Kell density) or dry air."),
        _k("temperature", "quantity", "K", 293.15, "Temperature (e.g. `20 degC`)."),
        _k("conductivity", "quantity", "S/m", None, "Electrical conductivity (water preset default 1 mS/m)."),
        _k("pressure", "quantity", "Pa", 101325.0, "Air preset only: pressure."),
        _k("viscosity", "quantity", "Pa*s", None, "Overrides the preset's dynamic viscosity."),
        _k("density", "quantity", "kg/m^3", None, "Overrides the preset's density."),
        _k("relative_permittivity", "number", None, None, "Overrides the preset's relative permittivity."),
        _k("submerged", "bool", None, None, "True for a liquid (plate drift reverses sign); preset default."),
    ],
    "bodies[]": [
        _k("kind", "str", required=True, doc="Name of this kind of body (used in outputs)."),
        _k("count", "int", None, 1, "How many bodies of this kind (>= 1)."),
        _k("radius", "quantity", "m", None, "Radius.", required=True),
        _k("density", "quantity", "kg/m^3", None, "Density.", required=True),
        _k("height", "quantity", "m", None, "Centre height above the floor (default radius + gap)."),
        _k("gap", "quantity", "m", None, "Gap between body and floor, if height is not given (default 100 nm)."),
        _k("moment", "vector3", "A*m^2", None, "Fixed magnetic moment [mx, my, mz]."),
        _k("susceptibility", "number", None, None, "Intrinsic volume susceptibility of a soft bead."),
        _k("saturation_magnetization", "quantity", "A/m", None, "Saturation magnetisation."),
        _k("permittivity", "number", None, None, "Relative permittivity of a homogeneous particle."),
        _k("conductivity", "quantity", "S/m", None, "Bulk conductivity."),
        _k("surface_conductance", "quantity", "S", None, "Surface conductance."),
        _k("shell", "section", None, None, "Single-shell cell model (see `bodies[].shell`)."),
        _k("drift_mobility", "number", None, None, "Plate-drift mobility (calibration parameter of the plate "
                                                   "actuator; units in actuators.acoustic)."),
    ],
    "bodies[].shell": [
        _k("thickness", "quantity", "m", None, "Membrane thickness.", required=True),
        _k("membrane_permittivity", "number", None, None, "Relative permittivity.", required=True),
        _k("membrane_conductivity", "quantity", "S/m", None, "Membrane conductivity.", required=True),
        _k("interior_permittivity", "number", None, None, "Relative permittivity.", required=True),
        _k("interior_conductivity", "quantity", "S/m", None, "Interior conductivity.", required=True),
    ],
    "starts": [
        _k("positions", "list", "m", None, "Explicit `[[x, y], ...]`, one per body in body order."),
        _k("random", "section", None, None, "Random placement (see `starts.random`)."),
    ],
    "starts.random": [
        _k("region", "shape", "m", None, "Where to draw from (default: the whole workspace): " + SHAPE_DOC + "."),
        _k("seed", "int", None, 0, "Seed of the draw (placements are fixed once the file is read)."),
        _k("separation", "quantity", "m", None, "Smallest centre distance (default 3 x largest radius)."),
    ],
    "goals": [
        _k("positions", "list", "m", None, "Explicit `[[x, y], ...]`, one per body."),
        _k("random", "section", None, None, "Random placement, keys as `starts.random`."),
        _k("unlabelled", "bool", None, False, "Goals form a set: the planner chooses which body takes which "
                                              "goal (bodies of one kind are interchangeable)."),
    ],
    "actuator": [
        _k("type", "str", required=True, doc="Registered name (`coil-array`, `plate`, `electrode-array`, "
                                             "`source-array`, ...) or `module:Class`."),
        _k("*", "any", doc="Every other key is a parameter of the actuator's constructor (or of its "
                           "`from_config`), numbers in SI or strings with units."),
    ],
    "limits": [
        _k("time_step", "quantity", "s", None, "Hardware time step: segments are quantised to it."),
        _k("min_dwell", "quantity", "s", None, "Shortest segment holding a non-idle value, every channel."),
        _k("all_channels", "section", None, None, "Limits applied to every channel (keys as "
                                                   "`limits.channels.<name>`)."),
        _k("channels", "map", None, None, "Per channel name: `{lower, upper, slew_rate, min_dwell, rms, "
                                          "rms_window}` in the channel's unit (slew in unit/s)."),
    ],
    "limits.channels.<name>": [
        _k("lower", "quantity", "<unit>", None, "Lowest value."),
        _k("upper", "quantity", "<unit>", None, "Highest value."),
        _k("slew_rate", "quantity", "<unit>/s", None, "Largest change per second."),
        _k("min_dwell", "quantity", "s", None, "Shortest non-idle segment."),
        _k("rms", "quantity", "<unit>", None, "Largest RMS over any `rms_window`."),
        _k("rms_window", "quantity", "s", None, "RMS window (default: the whole schedule)."),
    ],
    "planner": [
        _k("mode", "choice", None, "open_loop", "open_loop: plan once, play the schedule in every trial; "
                                                "closed_loop: re-plan from observed positions each period.",
           choices=("open_loop", "closed_loop")),
        _k("*", "any", doc="Every other key is a field of `fieldplan.plan.PlanSettings` (period, horizon, "
                           "tolerance, time_limit, clearance, route_resolution, field_aware_routes, "
                           "max_steps, ...)."),
    ],
    "simulation": [
        _k("trials", "int", None, 1, "Simulated executions (0: plan and export only)."),
        _k("seed", "int", None, 0, "Seed of trial k is seed + k (planner randomness uses seed)."),
        _k("brownian", "bool", None, True, "Thermal motion (Stokes-Einstein with the wall factor)."),
        _k("tracking_noise", "quantity", "m", 0.0, "Standard deviation of each observed coordinate."),
        _k("latency", "quantity", "s", 0.0, "Tracker delay (closed loop)."),
        _k("max_displacement", "quantity", "m", None, "Largest integration step displacement."),
        _k("dt_max", "quantity", "s", None, "Longest integration step."),
        _k("contacts", "bool", None, True, "Resolve body-body and body-wall contacts."),
        _k("record_interval", "quantity", "s", None, "Record trajectories at most this often."),
        _k("required_success", "number", None, 1.0, "Fraction of trials that must reach every goal for "
                                                     "exit code 0."),
    ],
    "outputs": [
        _k("schedule", "bool", None, True, "schedule.csv and schedule.json."),
        _k("resample_rate", "quantity", "Hz", None, "Also write schedule_resampled.csv sampled at this rate."),
        _k("trajectories", "bool", None, True, "trajectories.csv (predicted and every trial)."),
        _k("plots", "any", None, True, "true, false, or a list of `workspace`, `timeline`, `inputs`."),
        _k("animation", "bool", None, False, "animation.gif of the first trial."),
        _k("animation_frames", "int", None, 48, "Frames of the animation (evenly spaced in time)."),
        _k("field_backdrop", "bool", None, True, "Shade the workspace plot by the fastest available speed."),
        _k("dpi", "int", None, 120, "Resolution of the PNG plots."),
    ],
    "variants[]": [
        _k("name", "str", required=True, doc="Label in the comparison table."),
        _k("<section>", "any", doc="Any of workspace, medium, bodies, starts, goals, actuator, truth, limits, "
                                   "planner: replaces that section of the base file."),
    ],
}

VARIANT_SECTIONS = ("workspace", "medium", "bodies", "starts", "goals", "actuator", "truth", "limits", "planner")
PLOT_NAMES = ("workspace", "timeline", "inputs")

#: Units of the PlanSettings fields (the rest are plain numbers, integers or booleans).
PLANNER_UNITS = {"period": "s", "tolerance": "m", "time_limit": "s", "clearance": "m",
                 "route_resolution": "m", "table_resolution": "m", "max_trust": "m", "max_step": "m", "trust_region": "m", "goal_hold": "s",
                 "step_time_limit": "s", "separation": "m", "duration": "s", "max_time": "s"}

# Planner settings with a fixed set of values, and whole numbers that may be left to the planner.
PLANNER_CHOICES = {"method": ("horizon", "step"), "balance": ("time", "squared"), "backend": ("osqp", "cvxpy")}
PLANNER_OPTIONAL_INTS = ("horizon",)

# Fields of PlanSettings from the API note, used until fieldplan.plan exists.
_PLANNER_FALLBACK = {"period": None, "horizon": 1, "tolerance": None, "time_limit": None, "clearance": None,
                     "route_resolution": None, "field_aware_routes": False, "max_steps": None}


def _planner_fields():
    """PlanSettings field names and defaults (from fieldplan.plan if it imports)."""
    try:
        from .plan import PlanSettings  # noqa: PLC0415 - the planner is optional at load time
    except Exception:  # noqa: BLE001 - planner not there (yet) or broken: validate against the API note
        return dict(_PLANNER_FALLBACK), None
    if dataclasses.is_dataclass(PlanSettings):
        out = {}
        for f in dataclasses.fields(PlanSettings):
            if f.default is not dataclasses.MISSING:
                out[f.name] = f.default
            elif f.default_factory is not dataclasses.MISSING:  # type: ignore[misc]
                out[f.name] = f.default_factory()  # type: ignore[misc]
            else:
                out[f.name] = None
        return out, PlanSettings
    sig = inspect.signature(PlanSettings)
    return ({n: (p.default if p.default is not inspect.Parameter.empty else None)
             for n, p in sig.parameters.items() if p.kind is not p.VAR_KEYWORD}, PlanSettings)


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
        """A :class:`fieldplan.plan.PlanSettings` from the ``planner`` section and ``goals.unlabelled``."""
        from .plan import PlanSettings  # noqa: PLC0415

        kw = dict(self.planner)
        names, _ = _planner_fields()
        if "assign_goals" in names:
            kw["assign_goals"] = bool(self.assign_goals)
        return PlanSettings(**kw)

    def replace(self, **changes):
        """A shallow copy with some attributes changed."""
        return dataclasses.replace(self, **changes)


# ----------------------------------------------------------------------------------------------
# Validation context
# ----------------------------------------------------------------------------------------------

class _Ctx:
    """Collects problems while a document is read; every reader returns BAD on failure."""

    def __init__(self, doc, opts=None):
        self.doc = doc
        self.problems = []
        self.warnings = []
        # allow_modules, on_import, check_only (see load_scenario); input_files collects paths read
        self.opts = dict(opts or {})
        self.input_files = []

    def err(self, path, message, line=None):
        self.problems.append((self.doc.file, line if line is not None else self.doc.line(path),
                              key_string(path) or "(top level)", message))
        return BAD

    def warn(self, path, message):
        self.warnings.append(ScenarioError.format_problem(self.doc.file, self.doc.line(path),
                                                          key_string(path), message))


def _type_name(v):
    if v is None:
        return "nothing (null)"
    if isinstance(v, bool):
        return f"boolean {v}"
    if isinstance(v, dict):
        return "a mapping"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, str):
        return f"text {v!r}"
    return f"{type(v).__name__} {v!r}"


def _check_keys(ctx, path, mapping, schema_name, extra_allowed=()):
    """Report unknown keys (with a suggestion) and missing required keys; True if the mapping is usable."""
    keys = [k for k in SCHEMA[schema_name] if k.name not in ("*", "<section>")]
    allowed = [k.name for k in keys] + list(extra_allowed)
    if not isinstance(mapping, dict):
        ctx.err(path, f"expected a mapping with keys {allowed}, found {_type_name(mapping)}.")
        return False
    for key in mapping:
        if key not in allowed:
            close = difflib.get_close_matches(key, allowed, n=1, cutoff=0.6)
            hint = f" Did you mean {close[0]!r}?" if close else f" Allowed keys: {', '.join(allowed)}."
            ctx.err(path + (key,), f"unknown key {key!r}.{hint}")
    for k in keys:
        if k.required and k.name not in mapping:
            ctx.err(path, f"missing required key {k.name!r} ({k.doc.rstrip('.')}).")
    return True


@functools.lru_cache(maxsize=4096)
def _to_si_text(value, unit):
    # Parsing a unit string costs pint tens of microseconds; long obstacle lists repeat the same ones.
    return to_si(value, unit)


def _quantity(ctx, path, value, unit, *, positive=False, nonnegative=False):
    if value is None:
        return ctx.err(path, f"expected a quantity in {unit}, found nothing (null).")
    try:
        if isinstance(value, str):
            v = _to_si_text(value, unit)
        else:
            v = to_si(value, unit, name=str(path[-1]) if path else "value")
    except UnitError:
        try:
            to_si(value, unit, name=str(path[-1]) if path else "value")     # again, for the message with the key
        except UnitError as exc:
            return ctx.err(path, str(exc))
        raise
    if positive and not v > 0:
        return ctx.err(path, f"must be > 0 {unit}, found {value!r}.")
    if nonnegative and not v >= 0:
        return ctx.err(path, f"must be >= 0 {unit}, found {value!r}.")
    return v


def _number(ctx, path, value, *, positive=False, nonnegative=False, lo=None, hi=None):
    if isinstance(value, str):
        try:
            value = to_si(value, "dimensionless", name=str(path[-1]))
        except UnitError as exc:
            return ctx.err(path, str(exc))
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return ctx.err(path, f"expected a finite number, found {_type_name(value)}.")
    v = float(value)
    if positive and not v > 0:
        return ctx.err(path, f"must be > 0, found {value!r}.")
    if nonnegative and not v >= 0:
        return ctx.err(path, f"must be >= 0, found {value!r}.")
    if lo is not None and v < lo or hi is not None and v > hi:
        return ctx.err(path, f"must lie in [{lo}, {hi}], found {value!r}.")
    return v


def _int(ctx, path, value, *, minimum=None):
    if isinstance(value, bool) or not isinstance(value, int):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            return ctx.err(path, f"expected a whole number, found {_type_name(value)}.")
    if minimum is not None and value < minimum:
        return ctx.err(path, f"must be >= {minimum}, found {value}.")
    return value


def _bool(ctx, path, value):
    if not isinstance(value, bool):
        return ctx.err(path, f"expected true or false, found {_type_name(value)}.")
    return value


def _str(ctx, path, value):
    if not isinstance(value, str) or not value.strip():
        return ctx.err(path, f"expected a non-empty text, found {_type_name(value)}.")
    return value


def _choice(ctx, path, value, choices):
    if value not in choices:
        close = difflib.get_close_matches(str(value), list(choices), n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        return ctx.err(path, f"expected one of {list(choices)}, found {_type_name(value)}.{hint}")
    return value


def _point(ctx, path, value, unit="m"):
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        return ctx.err(path, f"expected a point [x, y] in {unit}, found {_type_name(value)}.")
    x = _quantity(ctx, path + (0,), value[0], unit)
    y = _quantity(ctx, path + (1,), value[1], unit)
    if x is BAD or y is BAD:
        return BAD
    return np.array([x, y])


def _points(ctx, path, value, unit="m", minimum=1):
    if not isinstance(value, list) or len(value) < minimum:
        return ctx.err(path, f"expected a list of at least {minimum} points [[x, y], ...] in {unit}, "
                             f"found {_type_name(value)}.")
    pts = [_point(ctx, path + (i,), p, unit) for i, p in enumerate(value)]
    if any(p is BAD for p in pts):
        return BAD
    return np.array(pts)


def _read_keys(ctx, path, mapping, schema_name):
    """Read the typed keys of a flat section with defaults; returns a dict (BAD for failed keys)."""
    out = {}
    for k in SCHEMA[schema_name]:
        if k.name in ("*", "<section>") or k.kind in ("section", "list", "map", "shape"):
            continue
        if k.name not in mapping:
            out[k.name] = k.default
            continue
        v = mapping[k.name]
        p = path + (k.name,)
        if v is None and not k.required:
            out[k.name] = k.default
            continue
        if k.kind == "quantity":
            out[k.name] = _quantity(ctx, p, v, k.unit)
        elif k.kind == "number":
            out[k.name] = _number(ctx, p, v)
        elif k.kind == "int":
            out[k.name] = _int(ctx, p, v)
        elif k.kind == "bool":
            out[k.name] = _bool(ctx, p, v)
        elif k.kind == "str":
            out[k.name] = _str(ctx, p, v)
        elif k.kind == "choice":
            out[k.name] = _choice(ctx, p, v, k.choices)
        elif k.kind == "vector3":
            if not isinstance(v, list) or len(v) != 3:
                out[k.name] = ctx.err(p, f"expected three numbers [x, y, z] in {k.unit}, found {_type_name(v)}.")
            else:
                comps = [_quantity(ctx, p + (i,), c, k.unit) for i, c in enumerate(v)]
                out[k.name] = BAD if any(c is BAD for c in comps) else tuple(comps)
        else:
            out[k.name] = v
    return out


# ----------------------------------------------------------------------------------------------
# Sections
# ----------------------------------------------------------------------------------------------

def _shape_spec(ctx, path, value):
    """Validated parameters of a shape mapping, not yet a geometry.

    Returns ``("rectangle", (xmin, ymin, xmax, ymax))``, ``("circle", (cx, cy, r))`` or
    ``("polygon", points)`` in m, or BAD (the problem recorded).
    """
    kinds = ("rectangle", "circle", "polygon")
    if not isinstance(value, dict) or len(value) != 1:
        found = _type_name(value) if not isinstance(value, dict) else f"keys {list(value)}"
        return ctx.err(path, f"expected exactly one of {list(kinds)} (e.g. `rectangle: [0, 0, '2 mm', "
                             f"'1 mm']`), found {found}.")
    (kind, spec), = value.items()
    p = path + (kind,)
    if kind not in kinds:
        close = difflib.get_close_matches(kind, kinds, n=1)
        hint = f" Did you mean {close[0]!r}?" if close else f" Allowed: {', '.join(kinds)}."
        return ctx.err(p, f"unknown shape {kind!r}.{hint}")
    if kind == "rectangle":
        if isinstance(spec, dict):
            if set(spec) != {"center", "size"}:
                return ctx.err(p, f"rectangle mapping needs exactly keys 'center' and 'size', found "
                                  f"{sorted(spec)}.")
            c = _point(ctx, p + ("center",), spec["center"])
            sz = _point(ctx, p + ("size",), spec["size"])
            if c is BAD or sz is BAD:
                return BAD
            if not (sz[0] > 0 and sz[1] > 0):
                return ctx.err(p + ("size",), f"rectangle size must be > 0 m, found {spec['size']!r}.")
            return ("rectangle", (c[0] - sz[0] / 2, c[1] - sz[1] / 2, c[0] + sz[0] / 2, c[1] + sz[1] / 2))
        if not isinstance(spec, list) or len(spec) != 4:
            return ctx.err(p, f"expected [xmin, ymin, xmax, ymax] in m, found {_type_name(spec)}.")
        v = [_quantity(ctx, p + (i,), x, "m") for i, x in enumerate(spec)]
        if any(x is BAD for x in v):
            return BAD
        if not (v[2] > v[0] and v[3] > v[1]):
            return ctx.err(p, f"rectangle needs xmax > xmin and ymax > ymin, found {spec!r}.")
        return ("rectangle", tuple(v))
    if kind == "circle":
        if not isinstance(spec, dict) or set(spec) != {"center", "radius"}:
            found = sorted(spec) if isinstance(spec, dict) else _type_name(spec)
            return ctx.err(p, f"circle needs exactly keys 'center' and 'radius', found {found}.")
        c = _point(ctx, p + ("center",), spec["center"])
        r = _quantity(ctx, p + ("radius",), spec["radius"], "m", positive=True)
        if c is BAD or r is BAD:
            return BAD
        return ("circle", (c[0], c[1], r))
    pts = _points(ctx, p, spec, minimum=3)
    if pts is BAD:
        return BAD
    return ("polygon", pts)


def _build_shapes(ctx, paths, specs):
    """Shapely polygons of many shape specs (from :func:`_shape_spec`) at once; BAD where one fails.

    Rectangles and circles are made with one vectorised shapely call each, so a workspace with
    tens of thousands of obstacles is built in well under a second.
    """
    from .workspace import CIRCLE_RESOLUTION, polygon  # noqa: PLC0415

    out = np.empty(len(specs), dtype=object)
    kinds = np.array([k for k, _ in specs] if specs else [], dtype=object)
    for kind in ("rectangle", "circle"):
        idx = np.flatnonzero(kinds == kind)
        if len(idx) == 0:
            continue
        v = np.array([specs[i][1] for i in idx], dtype=float)
        if kind == "rectangle":
            out[idx] = shapely.box(v[:, 0], v[:, 1], v[:, 2], v[:, 3])
        else:
            out[idx] = shapely.buffer(shapely.points(v[:, :2]), v[:, 2], quad_segs=CIRCLE_RESOLUTION)
    for i in np.flatnonzero(kinds == "polygon"):
        try:
            out[i] = polygon(specs[i][1])
        except FieldplanError as exc:
            out[i] = ctx.err(paths[i] + ("polygon",), str(exc))
    return out


def _shape(ctx, path, value):
    """A shapely polygon from a shape mapping."""
    spec = _shape_spec(ctx, path, value)
    if spec is BAD:
        return BAD
    return _build_shapes(ctx, [path], [spec])[0]


def _workspace(ctx, ws, medium):
    from .workspace import Workspace  # noqa: PLC0415

    path = ("workspace",)
    if not _check_keys(ctx, path, ws, "workspace"):
        return BAD
    boundary = _shape(ctx, path + ("boundary",), ws["boundary"]) if "boundary" in ws else BAD
    obs = ws.get("obstacles") or []
    if not isinstance(obs, list):
        ctx.err(path + ("obstacles",), f"expected a list of shapes, found {_type_name(obs)}.")
        obs = []
    if len(obs) > MAX_OBSTACLES:
        return ctx.err(path + ("obstacles",), f"{len(obs)} obstacles given; at most {MAX_OBSTACLES} fit in one "
                                              "workspace (fieldplan.scenario.MAX_OBSTACLES). Merge small ones "
                                              "into larger polygons.")
    items = enumerate(obs)
    if ctx.opts.get("progress") and len(obs) >= _PROGRESS_OBSTACLES:
        from tqdm.auto import tqdm  # noqa: PLC0415

        items = tqdm(items, total=len(obs), desc="reading obstacles", unit="obstacle", leave=False)
    paths = [path + ("obstacles", i) for i in range(len(obs))]
    specs = [_shape_spec(ctx, paths[i], o) for i, o in items]
    if any(sp is BAD for sp in specs) or boundary is BAD or medium is BAD:
        return BAD
    from .workspace import CIRCLE_RESOLUTION  # noqa: PLC0415

    vertices = sum(5 if k == "rectangle" else 4 * CIRCLE_RESOLUTION + 1 if k == "circle" else len(v) + 1
                   for k, v in specs)
    if vertices > MAX_OBSTACLE_VERTICES:
        return ctx.err(path + ("obstacles",), f"the obstacles have {vertices} polygon vertices in all (a circle has "
                                              f"{4 * CIRCLE_RESOLUTION + 1}); at most {MAX_OBSTACLE_VERTICES} are "
                                              "allowed (fieldplan.scenario.MAX_OBSTACLE_VERTICES), so that the free "
                                              "space fits in memory. Use fewer or simpler obstacles.")
    obstacles = _build_shapes(ctx, paths, specs)
    if any(o is BAD for o in obstacles):
        return BAD
    if len(obstacles):
        outside = np.flatnonzero(~shapely.intersects(boundary, obstacles))
        for i in outside[:_MAX_REPEATED_WARNINGS]:
            ctx.warn(paths[i], "obstacle lies wholly outside the boundary.")
        if len(outside) > _MAX_REPEATED_WARNINGS:
            ctx.warn(path + ("obstacles",), f"{len(outside) - _MAX_REPEATED_WARNINGS} more obstacles lie wholly "
                                            "outside the boundary.")
    try:
        return Workspace(boundary, list(obstacles), medium)
    except FieldplanError as exc:
        return ctx.err(path + (("obstacles",) if len(obstacles) else ("boundary",)), str(exc))


def _medium(ctx, m):
    from .medium import air, water  # noqa: PLC0415

    path = ("medium",)
    if m is None:
        return water()
    if not _check_keys(ctx, path, m, "medium"):
        return BAD
    v = _read_keys(ctx, path, m, "medium")
    if any(x is BAD for x in v.values()):
        return BAD
    preset = v["preset"]
    try:
        if preset == "water":
            if "pressure" in m:
                ctx.err(path + ("pressure",), "pressure applies to the air preset only.")
                return BAD
            base = water(v["temperature"], 1e-3 if v["conductivity"] is None else v["conductivity"])
        else:
            base = air(v["temperature"], v["pressure"])
            if v["conductivity"] is not None:
                base = dataclasses.replace(base, conductivity=v["conductivity"])
        over = {k: v[k] for k in ("viscosity", "density", "relative_permittivity", "submerged") if v[k] is not None}
        return dataclasses.replace(base, **over) if over else base
    except FieldplanError as exc:
        key = "temperature" if "temperature" in str(exc) else next(iter(m), "preset")
        return ctx.err(path + (key,), str(exc))
    except TypeError as exc:  # pragma: no cover - defensive
        return ctx.err(path, str(exc))


def _bodies(ctx, kinds):
    from .body import Body, Shell  # noqa: PLC0415

    path = ("bodies",)
    if not isinstance(kinds, list) or not kinds:
        return ctx.err(path, "expected a list of body kinds, e.g. `- {kind: bead, count: 2, radius: 5 um, "
                             f"density: 1050 kg/m^3}}`, found {_type_name(kinds)}.")
    out = []
    ok = True
    names = {}
    for i, spec in enumerate(kinds):
        p = path + (i,)
        if not _check_keys(ctx, p, spec, "bodies[]"):
            ok = False
            continue
        if any(k.required and k.name not in spec for k in SCHEMA["bodies[]"]):
            ok = False
            continue
        v = _read_keys(ctx, p, spec, "bodies[]")
        if v["count"] is not BAD and v["count"] is not None and v["count"] < 1:
            v["count"] = ctx.err(p + ("count",), f"must be a whole number >= 1, found {spec['count']!r}.")
        elif isinstance(v["count"], int) and v["count"] > MAX_BODIES:
            v["count"] = ctx.err(p + ("count",), f"at most {MAX_BODIES} bodies fit in one scenario "
                                                 f"(fieldplan.scenario.MAX_BODIES), found {spec['count']!r}.")
        for key in ("radius", "density", "height", "gap", "saturation_magnetization"):
            if isinstance(v.get(key), float) and not v[key] > 0:
                v[key] = ctx.err(p + (key,), f"must be > 0, found {spec[key]!r}.")
        shell = None
        if spec.get("shell") is not None:
            sp = p + ("shell",)
            if _check_keys(ctx, sp, spec["shell"], "bodies[].shell"):
                sv = _read_keys(ctx, sp, spec["shell"], "bodies[].shell")
                if any(x is BAD or x is None for x in sv.values()):
                    shell = BAD
                else:
                    try:
                        shell = Shell(**sv)
                    except FieldplanError as exc:
                        shell = ctx.err(sp, str(exc))
            else:
                shell = BAD
        if any(x is BAD for x in v.values()) or shell is BAD:
            ok = False
            continue
        kw = {k: v[k] for k in ("radius", "density", "height", "gap", "moment", "susceptibility",
                                "saturation_magnetization", "permittivity", "conductivity",
                                "surface_conductance", "drift_mobility") if v[k] is not None}
        if v["kind"] in names:
            ctx.err(p + ("kind",), f"kind {v['kind']!r} is already used by bodies[{names[v['kind']]}]; "
                                   "give each kind once with a count.")
            ok = False
            continue
        names[v["kind"]] = i
        try:
            body = Body(v["kind"], shell=shell, **kw)
        except FieldplanError as exc:
            key = next((k for k in kw if k in str(exc)), "kind")
            ctx.err(p + (key,), str(exc))
            ok = False
            continue
        out.append((body, int(v["count"]), i))
    total = sum(c for _, c, _ in out)
    if ok and total > MAX_BODIES:
        return ctx.err(path, f"the counts add up to {total} bodies; at most {MAX_BODIES} fit in one scenario "
                             "(fieldplan.scenario.MAX_BODIES).")
    return out if ok else BAD


def _declared_count(kinds):
    """Sum of the ``count`` keys of a raw ``bodies`` list (default 1 each), or None if one is not a number."""
    if not isinstance(kinds, list):
        return None
    total = 0
    for spec in kinds:
        c = spec.get("count", 1) if isinstance(spec, dict) else None
        if isinstance(c, bool) or not isinstance(c, int):
            return None
        total += c
    return total


def _check_position_count(ctx, section, spec, n):
    """Report explicit positions whose number differs from ``n`` (without building any body)."""
    pts = spec if isinstance(spec, list) else spec.get("positions") if isinstance(spec, dict) else None
    if isinstance(pts, list) and len(pts) != n:
        path = (section,) if isinstance(spec, list) else (section, "positions")
        ctx.err(path, f"expected {n} positions (one per body, as the bodies' counts add up to), found {len(pts)}.")


def _placements(ctx, section, spec, bodies, workspace):
    """Start or goal positions (n, 2) from explicit lists or a seeded random draw."""
    path = (section,)
    n = len(bodies)
    if isinstance(spec, list):
        spec = {"positions": spec}
        shorthand = True
    else:
        shorthand = False
    if not _check_keys(ctx, path, spec, section):
        return BAD
    has_pos = spec.get("positions") is not None
    has_rand = spec.get("random") is not None
    if has_pos == has_rand:
        return ctx.err(path, "give exactly one of 'positions' (a list of [x, y]) or 'random' (a region and a "
                             f"seed), found {'both' if has_pos else 'neither'}.")
    if has_pos:
        pp = path if shorthand else path + ("positions",)
        pts = _points(ctx, pp, spec["positions"])
        if pts is BAD:
            return BAD
        if len(pts) != n:
            return ctx.err(pp, f"expected {n} positions (one per body: {_body_summary(bodies)}), found {len(pts)}.")
        if workspace is BAD:
            return pts
        ok = True
        for i, (b, xy) in enumerate(zip(bodies, pts)):
            if not workspace.contains(xy[None], b.radius)[0]:
                where = "inside an obstacle" if _in_obstacle(workspace, xy) else (
                    "outside the boundary" if not workspace.boundary.contains(_pt(xy)) else
                    "closer to a wall or obstacle than its radius")
                ctx.err(pp + (i,), f"{section[:-1]} of body {i} ({b.name}, radius {b.radius:.3g} m) at "
                                   f"({xy[0]:.6g}, {xy[1]:.6g}) m is {where}; move it into the free space.")
                ok = False
        ok = ok and _no_overlap(ctx, pp, pts, bodies, section)
        return pts if ok else BAD
    rp = path + ("random",)
    r = spec["random"]
    if not _check_keys(ctx, rp, r, "starts.random"):
        return BAD
    v = _read_keys(ctx, rp, r, "starts.random")
    region = _shape(ctx, rp + ("region",), r["region"]) if r.get("region") is not None else None
    if any(x is BAD for x in v.values()) or region is BAD or workspace is BAD:
        return BAD
    rmax = max(b.radius for b in bodies)
    sep = v["separation"] if v["separation"] is not None else 3.0 * rmax
    if sep < 2 * rmax:
        ctx.warn(rp + ("separation",), f"separation {sep:g} m is below twice the largest radius; bodies may "
                                       "be drawn overlapping and will be rejected.")
        sep = 2 * rmax
    rng = np.random.default_rng(v["seed"] + (0 if section == "starts" else 7919))
    try:
        return workspace.sample(n, rmax, rng, region=region, separation=sep)
    except FieldplanError as exc:
        return ctx.err(rp, f"{exc} Enlarge the region or reduce the separation.")


def _pt(xy):
    from shapely.geometry import Point  # noqa: PLC0415

    return Point(float(xy[0]), float(xy[1]))


def _in_obstacle(workspace, xy):
    return len(workspace.obstacle_index.query(_pt(xy), predicate="within")) > 0


def _no_overlap(ctx, path, pts, bodies, section):
    r = np.array([b.radius for b in bodies])
    ok = True
    for i in range(len(pts)):
        for j in range(i + 1, len(pts)):
            d = float(np.linalg.norm(pts[i] - pts[j]))
            if d < r[i] + r[j]:
                ctx.err(path + (j,), f"{section[:-1]} of body {j} overlaps body {i} (centres {d:.3g} m apart, "
                                     f"radii sum {r[i] + r[j]:.3g} m).")
                ok = False
    return ok


def _body_summary(bodies):
    counts = {}
    for b in bodies:
        counts[b.name] = counts.get(b.name, 0) + 1
    return ", ".join(f"{c} x {k}" for k, c in counts.items())


# -- actuator ------------------------------------------------------------------------------------

_LEADING_NUMBER = re.compile(r"^\s*[-+]?(\d|\.\d)")


def _si_params(ctx, path, value, units=None):
    """Recursively convert unit strings in actuator parameters to SI floats."""
    if isinstance(value, dict):
        return {k: _si_params(ctx, path + (k,), v, (units or {}).get(k) if isinstance(units, dict) else None)
                for k, v in value.items()}
    if isinstance(value, list):
        return [_si_params(ctx, path + (i,), v, units if isinstance(units, str) else None)
                for i, v in enumerate(value)]
    if isinstance(value, str) and _LEADING_NUMBER.match(value):
        from .units import ureg  # noqa: PLC0415

        want = units if isinstance(units, str) else None
        if want is not None:
            return _quantity(ctx, path, value, want)
        try:
            q = ureg().Quantity(value.strip().replace("µ", "u").replace("μ", "u"))
        except Exception:  # noqa: BLE001 - not a quantity: keep the text for the actuator to judge
            return value
        if hasattr(q, "to_base_units"):
            try:
                return float(q.to_base_units().magnitude)
            except Exception:  # noqa: BLE001
                return value
        return float(q)
    return value


_UNITISH = re.compile(r"^[A-Za-z°µ][A-Za-z0-9_/*^ .·\-]*$")
# Unit symbols a docstring may state a parameter's unit with (pint alone would also read "ymin" as
# yocto-minutes, so only pieces made of these symbols count as units).
_SI_SYMBOLS = {"m", "s", "A", "V", "Hz", "N", "T", "K", "W", "J", "Pa", "S", "F", "Ohm", "ohm", "kg", "C",
               "rad", "degC", "H", "Wb", "g", "mol", "L"}


def actuator_params(cls):
    """Constructor parameters of an actuator class (or of a nested object class).

    Returns
    -------
    dict
        ``{name: (default, unit or None)}``; ``default`` is a private marker for required
        parameters. The unit is read from the numpydoc ``Parameters`` section of the class
        docstring, as the comma-separated piece of the description that is a unit (``"Source
        positions, m."``); it is used to check the dimension of unit strings in a scenario.
    """
    return {n: (d, u) for n, (d, u, _) in _param_info(cls).items()}


def _param_info(cls):
    """``{name: (default, unit, numpydoc type text)}`` of a class's constructor."""
    target = cls.__init__ if isinstance(cls, type) else cls
    try:
        sig = inspect.signature(target)
    except (TypeError, ValueError):
        return {}
    doc = inspect.getdoc(cls) or ""
    units, types = _doc_params(doc)
    out = {}
    for n, p in sig.parameters.items():
        if n == "self" or p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
            continue
        default = p.default if p.default is not inspect.Parameter.empty else _MISSING
        if default is None and dataclasses.is_dataclass(cls):
            f = {x.name: x for x in dataclasses.fields(cls)}.get(n)
            if f is not None and f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                default = _MISSING
        out[n] = (default, units.get(n), types.get(n, ""))
    return out


def _doc_params(doc):
    from .units import ureg  # noqa: PLC0415

    units, types = {}, {}
    m = re.search(r"Parameters\n-+\n(.*?)(\n\S[^\n]*\n-+\n|\Z)", doc, re.S)
    if not m:
        return units, types
    block = m.group(1)
    entries = re.findall(r"^(\S[^\n:]*?)\s*:([^\n]*)\n((?:[ \t]+[^\n]*\n?)*)", block, re.M)
    for names, typ, desc in entries:
        first = " ".join(desc.split())
        first = re.split(r"(?<=[a-z0-9)])\.\s", first + " ")[0].strip().rstrip(".")
        first = re.sub(r"\([^()]*\)", " ", first)
        unit = None
        for piece in re.split(r"[,;]", first):
            piece = piece.strip()
            tokens = re.findall(r"[A-Za-z]+", piece)
            if not tokens or not _UNITISH.match(piece) or not all(t in _SI_SYMBOLS for t in tokens):
                continue
            try:
                u = ureg().Unit(piece.replace("^", "**"))
            except Exception:  # noqa: BLE001
                continue
            if u.dimensionless:
                continue
            unit = piece.replace("^", "**")
            break
        for name in names.split(","):
            name = name.strip()
            types[name] = typ.strip()
            if unit:
                units[name] = unit
    return units, types


def _nested_class(cls, typ):
    """The class named in a parameter's numpydoc type (``"sequence of Coil"``), from cls's module."""
    import importlib  # noqa: PLC0415

    try:
        mod = importlib.import_module(cls.__module__)
    except Exception:  # noqa: BLE001
        return None, None
    m = re.match(r"^(?:(sequence|list|tuple) of )?([A-Z]\w*)\b", typ)
    if not m:
        return None, None
    obj = getattr(mod, m.group(2), None)
    if not isinstance(obj, type):
        return None, None
    return obj, bool(m.group(1))


def _param_value(ctx, path, value, cls, info):
    """One constructor argument from scenario data: unit strings to SI, nested objects built."""
    _, unit, typ = info if info is not None else (None, None, "")
    pair = re.search(r"sequence of \((\w+), float\)", typ or "")
    if pair and isinstance(cls, type) and isinstance(value, list) and value and \
            all(isinstance(v, dict) and len(v) == 2 for v in value):
        klass, _ = _nested_class(cls, pair.group(1))
        if klass is not None:
            return _pairs(ctx, path, value, klass)
    nested, many = _nested_class(cls, typ) if isinstance(cls, type) else (None, None)
    if nested is not None:
        fields = _param_info(nested)
        if many and isinstance(value, list) and value and all(isinstance(v, dict) for v in value) \
                and all(set(v) <= set(fields) for v in value):
            items = [_build_object(ctx, path + (i,), nested, v, fields) for i, v in enumerate(value)]
            return BAD if any(x is BAD for x in items) else items
        if not many and isinstance(value, dict) and set(value) <= set(fields):
            return _build_object(ctx, path, nested, value, fields)
        if many and isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            # A list of mappings meant as nested objects but with unknown keys: say which.
            for i, v in enumerate(value):
                for k in v:
                    if k not in fields:
                        close = difflib.get_close_matches(k, list(fields), n=1, cutoff=0.6)
                        hint = f" Did you mean {close[0]!r}?" if close else ""
                        ctx.err(path + (i, k), f"{nested.__name__} has no parameter {k!r}.{hint} Its parameters: "
                                               f"{', '.join(fields)}.")
            return BAD
    return _si_params(ctx, path, value, unit)


def _pairs(ctx, path, value, klass):
    """``[{coil: {...}, current: 1 A}, ...]`` -> ``[(Coil(...), 1.0), ...]`` (an object and its number)."""
    fields = _param_info(klass)
    out = []
    for i, item in enumerate(value):
        objs = [k for k, v in item.items() if isinstance(v, dict)]
        nums = [k for k, v in item.items() if not isinstance(v, dict)]
        if len(objs) != 1 or len(nums) != 1:
            out.append(ctx.err(path + (i,), f"expected {{{klass.__name__.lower()}: {{...}}, <value>: <number>}}, "
                                            f"found keys {sorted(item)}."))
            continue
        obj = _build_object(ctx, path + (i, objs[0]), klass, item[objs[0]], fields)
        num = _si_params(ctx, path + (i, nums[0]), item[nums[0]])
        if isinstance(num, str) or isinstance(num, bool) or not isinstance(num, (int, float)):
            num = ctx.err(path + (i, nums[0]), f"expected a number, found {_type_name(item[nums[0]])}.")
        out.append(BAD if obj is BAD or num is BAD else (obj, float(num)))
    return BAD if any(x is BAD for x in out) else out


def _build_object(ctx, path, cls, spec, fields):
    """``cls(**spec)`` with unit conversion, every problem reported at its key."""
    n0 = len(ctx.problems)
    missing = [n for n, (d, _, _) in fields.items() if d is _MISSING and n not in spec]
    for n in missing:
        ctx.err(path, f"missing required parameter {n!r} of {cls.__name__}.")
    kw = {k: _param_value(ctx, path + (k,), v, cls, fields.get(k)) for k, v in spec.items()}
    if len(ctx.problems) > n0:
        return BAD
    try:
        return cls(**kw)
    except Exception as exc:  # noqa: BLE001 - the nested class's own validation is the user's feedback
        msg = f"{exc}" if isinstance(exc, (FieldplanError, ValueError)) else f"{type(exc).__name__}: {exc}"
        key = next((k for k in sorted(spec, key=len, reverse=True) if re.search(rf"\b{re.escape(k)}\b", msg)), None)
        return ctx.err(path + ((key,) if key else ()), f"cannot build {cls.__name__}: {msg}")


def _is_path_param(name, info):
    typ = (info[2] if info else "") or ""
    return (name in ("path", "file", "filename", "directory") or name.endswith(("_path", "_file", "_dir"))
            or "PathLike" in typ)


def _resolve_path(scenario_file, value):
    """A relative path in a scenario: against the scenario file's folder if it exists there, else as given."""
    if os.path.isabs(value) or scenario_file is None or scenario_file.startswith("<"):
        return value
    cand = os.path.join(os.path.dirname(os.path.abspath(scenario_file)), value)
    return cand if os.path.exists(cand) or os.path.exists(cand + ".json") else value


def _registry_name(cls):
    from .registry import available_actuators  # noqa: PLC0415

    target = f"{cls.__module__}:{cls.__qualname__}"
    for name, value in available_actuators().items():
        if value == target:
            return name
    return target


def _actuator(ctx, path, spec, base=None):
    """Build an actuator from its section; ``base`` is the parent section for inheritance."""
    from .actuator import Actuator  # noqa: PLC0415
    from .registry import available_actuators, is_registered_module, load_actuator_class  # noqa: PLC0415

    if not isinstance(spec, dict):
        return ctx.err(path, f"expected a mapping with 'type' and the actuator's parameters, found "
                             f"{_type_name(spec)}."), None
    if "type" not in spec:
        if base is None:
            return ctx.err(path, "missing required key 'type': a registered actuator "
                                 f"({', '.join(sorted(available_actuators()))}) or 'module:Class'."), None
        bspec, bpath = base
        merged = {k: (v, bpath + (k,)) for k, v in bspec.items()}
        merged.update({k: (v, path + (k,)) for k, v in spec.items()})
    else:
        merged = {k: (v, path + (k,)) for k, v in spec.items()}
    tname, tpath = merged.get("type", (None, path))
    if not isinstance(tname, str) or not tname:
        return ctx.err(tpath, f"expected an actuator name, found {_type_name(tname)}."), None
    if ctx.opts.get("check_only") and ":" in tname and tname not in available_actuators() and \
            not is_registered_module(tname.partition(":")[0]):
        # Checking a file must never run code from it: leave this section unchecked.
        ctx.warn(tpath, f"actuator {tname!r} is not a registered plug-in; its module is not imported while "
                        "checking, so its parameters, channels and limits are not checked.")
        return NOT_IMPORTED, {k: _si_params(_Ctx(ctx.doc), kp, v) for k, (v, kp) in merged.items()}
    try:
        cls = load_actuator_class(tname, allow_modules=tuple(ctx.opts.get("allow_modules") or ()),
                                  on_import=ctx.opts.get("on_import"))
    except FieldplanError as exc:
        return ctx.err(tpath, str(exc)), None
    params = {k: vp for k, vp in merged.items() if k != "type"}
    factory = getattr(cls, "from_config", None) if isinstance(cls, type) else None
    info = _param_info(cls) if isinstance(cls, type) or callable(cls) else {}
    if factory is None and info:
        allowed = list(info)
        for k, (_, kp) in params.items():
            if k not in allowed:
                close = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                ctx.err(kp, f"{tname} has no parameter {k!r}.{hint} Its parameters: {', '.join(allowed)}.")
        missing = [n for n, (d, _, _) in info.items() if d is _MISSING and n not in params]
        for n in missing:
            ctx.err(path, f"missing required parameter {n!r} of {tname}.")
        if missing or any(k not in allowed for k in params):
            return BAD, None
    n_before = len(ctx.problems)
    kw = {k: _param_value(ctx, kp, v, cls, info.get(k)) for k, (v, kp) in params.items()}
    if len(ctx.problems) > n_before:
        return BAD, None
    for k, v in kw.items():
        if _is_path_param(k, info.get(k)) and isinstance(v, str):
            kw[k] = _resolve_path(ctx.doc.file, v)
            ctx.input_files.append(kw[k])
    try:
        act = factory(kw) if factory is not None else cls(**kw)
    except Exception as exc:  # noqa: BLE001 - any failure of a plug-in's constructor is the user's input
        msg = f"{exc}" if isinstance(exc, (FieldplanError, ValueError)) else f"{type(exc).__name__}: {exc}"
        key = next((k for k in sorted(params, key=len, reverse=True) if re.search(rf"\b{re.escape(k)}\b", msg)), None)
        kp = params[key][1] if key else tpath
        return ctx.err(kp, f"cannot build actuator {tname!r}: {msg}"), None
    if not isinstance(act, Actuator):
        return ctx.err(tpath, f"{tname!r} did not produce a fieldplan.Actuator (got {type(act).__name__})."), None
    spec_out = {"type": tname}
    spec_out.update({k: _si_params(_Ctx(ctx.doc), kp, v) for k, (v, kp) in params.items()})
    return act, spec_out


# -- limits --------------------------------------------------------------------------------------

_LIMIT_KEYS = ("lower", "upper", "slew_rate", "min_dwell", "rms", "rms_window")


def _limits(ctx, spec, actuator):
    from .schedule import ChannelLimit, HardwareLimits  # noqa: PLC0415

    path = ("limits",)
    if actuator is BAD:
        return BAD
    chans = {c.name: c for c in actuator.channels}
    if spec is None:
        return HardwareLimits.from_channels(actuator.channels)
    if not _check_keys(ctx, path, spec, "limits"):
        return BAD
    top = _read_keys(ctx, path, spec, "limits")
    for k in ("time_step", "min_dwell"):
        if isinstance(top[k], float) and not top[k] > 0:
            top[k] = ctx.err(path + (k,), f"must be > 0 s, found {spec[k]!r}.")

    def one(p, d, unit):
        if not isinstance(d, dict):
            ctx.err(p, f"expected a mapping of {list(_LIMIT_KEYS)}, found {_type_name(d)}.")
            return BAD
        out = {}
        for k, v in d.items():
            if k not in _LIMIT_KEYS:
                close = difflib.get_close_matches(k, _LIMIT_KEYS, n=1, cutoff=0.6)
                hint = f" Did you mean {close[0]!r}?" if close else f" Allowed: {', '.join(_LIMIT_KEYS)}."
                out[k] = ctx.err(p + (k,), f"unknown limit {k!r}.{hint}")
                continue
            u = {"slew_rate": f"({unit})/s", "min_dwell": "s", "rms_window": "s"}.get(k, unit)
            if k in ("lower", "upper"):
                out[k] = _quantity(ctx, p + (k,), v, u)
            else:
                out[k] = _quantity(ctx, p + (k,), v, u, positive=True)
        if any(x is BAD for x in out.values()):
            return BAD
        if out.get("lower") is not None and out.get("upper") is not None and out["lower"] > out["upper"]:
            ctx.err(p + ("lower",), f"lower {d['lower']!r} exceeds upper {d['upper']!r}.")
            return BAD
        return out

    common = {}
    if spec.get("all_channels") is not None:
        units = {c.unit for c in actuator.channels}
        if len(units) > 1 and any(k in spec["all_channels"] for k in ("lower", "upper", "slew_rate", "rms")):
            ctx.err(path + ("all_channels",), f"channels have different units {sorted(units)}; give value "
                                              "limits per channel under 'channels'.")
            return BAD
        unit = next(iter(units))
        common = one(path + ("all_channels",), spec["all_channels"], unit)
    per = {}
    chspec = spec.get("channels") or {}
    if not isinstance(chspec, dict):
        ctx.err(path + ("channels",), f"expected a mapping channel name -> limits, found {_type_name(chspec)}.")
        return BAD
    for name, d in chspec.items():
        p = path + ("channels", name)
        if name not in chans:
            close = difflib.get_close_matches(name, list(chans), n=1, cutoff=0.6)
            hint = f" Did you mean {close[0]!r}?" if close else ""
            ctx.err(p, f"the actuator has no channel {name!r}.{hint} Its channels: {', '.join(chans)}.")
            continue
        per[name] = one(p, d, chans[name].unit)
    if common is BAD or any(v is BAD for v in per.values()) or any(v is BAD for v in top.values()):
        return BAD
    limits = {}
    for name, c in chans.items():
        d = {"lower": c.lower, "upper": c.upper}
        d.update({k: v for k, v in common.items() if v is not None})
        d.update({k: v for k, v in per.get(name, {}).items() if v is not None})
        lo, hi = max(d["lower"], c.lower), min(d["upper"], c.upper)
        if lo > hi:
            p = path + ("channels", name) if name in per else path + ("all_channels",)
            ctx.err(p, f"limits [{d['lower']:g}, {d['upper']:g}] {c.unit} do not overlap the bounds of channel "
                       f"{name!r}, [{c.lower:g}, {c.upper:g}] {c.unit}.")
            return BAD
        try:
            limits[name] = ChannelLimit(**d)
        except FieldplanError as exc:
            ctx.err(path + ("channels", name), str(exc))
            return BAD
    return HardwareLimits(limits, time_step=top["time_step"], min_dwell=top["min_dwell"])


def _planner(ctx, spec):
    path = ("planner",)
    if spec is None:
        return {}, "open_loop"
    if not isinstance(spec, dict):
        ctx.err(path, f"expected a mapping of planner settings, found {_type_name(spec)}.")
        return BAD, "open_loop"
    names, _ = _planner_fields()
    allowed = ["mode"] + [n for n in names if n != "assign_goals"]
    out = {}
    mode = "open_loop"
    for k, v in spec.items():
        p = path + (k,)
        if k == "mode":
            mode = _choice(ctx, p, v, ("open_loop", "closed_loop"))
            continue
        if k == "assign_goals":
            ctx.err(p, "set 'goals.unlabelled: true' instead (goals are then assigned by the planner).")
            continue
        if k not in allowed:
            close = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
            hint = f" Did you mean {close[0]!r}?" if close else f" Allowed keys: {', '.join(allowed)}."
            ctx.err(p, f"unknown planner setting {k!r}.{hint}")
            continue
        default = names[k]
        if v is None:
            out[k] = None
        elif k in PLANNER_UNITS:
            out[k] = _quantity(ctx, p, v, PLANNER_UNITS[k], positive=True)
        elif k in PLANNER_CHOICES:
            out[k] = _choice(ctx, p, v, PLANNER_CHOICES[k])
        elif k in PLANNER_OPTIONAL_INTS:
            out[k] = _int(ctx, p, v, minimum=1)
        elif isinstance(default, bool):
            out[k] = _bool(ctx, p, v)
        elif isinstance(default, int) and not isinstance(default, bool):
            out[k] = _int(ctx, p, v, minimum=1)
        elif isinstance(default, float):
            out[k] = _number(ctx, p, v)
        elif isinstance(default, str):
            out[k] = _str(ctx, p, v)
        else:
            out[k] = _si_params(ctx, p, v) if isinstance(v, (dict, list, str)) else v
    if any(v is BAD for v in out.values()) or mode is BAD:
        return BAD, "open_loop"
    return out, mode


def _simulation(ctx, spec):
    path = ("simulation",)
    if spec is None:
        return SimulationSettings()
    if not _check_keys(ctx, path, spec, "simulation"):
        return BAD
    v = _read_keys(ctx, path, spec, "simulation")
    checks = {"trials": lambda x: 0 <= x <= MAX_TRIALS, "seed": lambda x: x >= 0, "tracking_noise": lambda x: x >= 0,
              "latency": lambda x: x >= 0, "max_displacement": lambda x: x > 0, "dt_max": lambda x: x > 0,
              "record_interval": lambda x: x > 0, "required_success": lambda x: 0 <= x <= 1}
    rules = {"trials": f"from 0 to {MAX_TRIALS} (fieldplan.scenario.MAX_TRIALS)", "seed": ">= 0", "tracking_noise": ">= 0 m", "latency": ">= 0 s",
             "max_displacement": "> 0 m", "dt_max": "> 0 s", "record_interval": "> 0 s",
             "required_success": "between 0 and 1"}
    for k, ok in checks.items():
        if v[k] is not None and v[k] is not BAD and not ok(v[k]):
            v[k] = ctx.err(path + (k,), f"must be {rules[k]}, found {spec[k]!r}.")
    if any(x is BAD for x in v.values()):
        return BAD
    return SimulationSettings(**v)


def _outputs(ctx, spec):
    path = ("outputs",)
    if spec is None:
        return OutputSettings()
    if not _check_keys(ctx, path, spec, "outputs"):
        return BAD
    v = _read_keys(ctx, path, spec, "outputs")
    plots = spec.get("plots", True)
    if plots is True:
        v["plots"] = PLOT_NAMES
    elif plots is False or plots is None:
        v["plots"] = ()
    elif isinstance(plots, list):
        for i, p in enumerate(plots):
            _choice(ctx, path + ("plots", i), p, PLOT_NAMES)
        v["plots"] = tuple(p for p in plots if p in PLOT_NAMES)
    else:
        v["plots"] = ctx.err(path + ("plots",), f"expected true, false or a list of {list(PLOT_NAMES)}, found "
                                                f"{_type_name(plots)}.")
    if isinstance(v["resample_rate"], float) and not v["resample_rate"] > 0:
        v["resample_rate"] = ctx.err(path + ("resample_rate",), f"must be > 0 Hz, found {spec['resample_rate']!r}.")
    if isinstance(v["animation_frames"], int) and not 2 <= v["animation_frames"] <= 2000:
        v["animation_frames"] = ctx.err(path + ("animation_frames",), f"must be between 2 and 2000, found "
                                                                      f"{spec['animation_frames']!r}.")
    if isinstance(v["dpi"], int) and not 20 <= v["dpi"] <= MAX_DPI:
        v["dpi"] = ctx.err(path + ("dpi",), f"must be between 20 and {MAX_DPI}, found {spec['dpi']!r}.")
    if any(x is BAD for x in v.values()):
        return BAD
    return OutputSettings(**v)


# ----------------------------------------------------------------------------------------------
# Whole documents
# ----------------------------------------------------------------------------------------------

def _build(ctx, data, name):
    """Build one scenario from (merged) top-level data; returns Scenario or BAD.

    Warnings raised while the objects are built (an actuator's resolution warning, say) become
    scenario warnings naming the section.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = _build_sections(ctx, data, name)
    seen = set()
    for w in caught:
        text = f"{w.category.__name__}: {w.message}"
        if text in seen:
            continue
        seen.add(text)
        section = "actuator" if w.category is not RuntimeWarning or "actuator" in str(w.message).lower() else ""
        ctx.warn((section,) if section else (), text)
    return out


def _build_sections(ctx, data, name):
    medium = _medium(ctx, data.get("medium"))
    workspace = _workspace(ctx, data["workspace"], medium) if "workspace" in data else BAD
    kinds = _bodies(ctx, data["bodies"]) if "bodies" in data else BAD
    bodies = BAD
    if kinds is not BAD:
        bodies = [b for b, count, _ in kinds for _ in range(count)]
    elif "bodies" in data:
        n = _declared_count(data["bodies"])
        if n is not None and n >= 1:
            for section in ("starts", "goals"):
                if section in data:
                    _check_position_count(ctx, section, data[section], n)
    starts = goals = BAD
    if bodies is not BAD:
        starts = _placements(ctx, "starts", data["starts"], bodies, workspace) if "starts" in data else BAD
        goals = _placements(ctx, "goals", data["goals"], bodies, workspace) if "goals" in data else BAD
    unlabelled = False
    if isinstance(data.get("goals"), dict) and "unlabelled" in data["goals"]:
        unlabelled = _bool(ctx, ("goals", "unlabelled"), data["goals"]["unlabelled"])
    actuator, aspec = (BAD, None)
    if "actuator" in data:
        apath = data.get("__paths__", {}).get("actuator", ("actuator",))
        base = data.get("__base__", {}).get("actuator")
        actuator, aspec = _actuator(ctx, apath, data["actuator"], base)
    truth, tspec = None, None
    if data.get("truth") is not None and "actuator" in data:
        tpath = data.get("__paths__", {}).get("truth", ("truth",))
        apath = data.get("__paths__", {}).get("actuator", ("actuator",))
        base_spec = aspec if aspec is not None else data["actuator"]
        truth, tspec = _actuator(ctx, tpath, data["truth"], (base_spec, apath) if isinstance(base_spec, dict) else None)
        if all(a is not BAD and a is not NOT_IMPORTED for a in (truth, actuator)):
            if [c.name for c in truth.channels] != [c.name for c in actuator.channels]:
                ctx.err(tpath, f"the truth actuator's channels {[c.name for c in truth.channels]} differ from the "
                               f"planning actuator's {[c.name for c in actuator.channels]}; a schedule planned on "
                               "one cannot be played on the other.")
                truth = BAD
    unchecked = actuator is NOT_IMPORTED or truth is NOT_IMPORTED
    if unchecked:
        # Without the actuator its channels are unknown: limits and body checks wait for `run`.
        limits = None
        actuator = None if actuator is NOT_IMPORTED else actuator
        truth = None if truth is NOT_IMPORTED else truth
    else:
        limits = _limits(ctx, data.get("limits"), actuator)
    planner, mode = _planner(ctx, data.get("planner"))
    simulation = _simulation(ctx, data.get("simulation"))
    outputs = _outputs(ctx, data.get("outputs"))
    if actuator is not BAD and actuator is not None and kinds is not BAD and medium is not BAD:
        for body, _, i in kinds:
            for act, label in ((actuator, "actuator"), (truth, "truth")):
                if act is None or act is BAD:
                    continue
                try:
                    act.check_body(body, medium)
                except FieldplanError as exc:
                    ctx.err(("bodies", i), f"the {label} cannot move kind {body.name!r}: {exc}")
    if actuator is not BAD and actuator is not None and workspace is not BAD and getattr(actuator, "extent", None) and \
            starts is not BAD:
        x0, x1, y0, y1 = actuator.extent
        wx0, wy0, wx1, wy1 = workspace.bounds
        if wx0 < x0 - 1e-12 or wx1 > x1 + 1e-12 or wy0 < y0 - 1e-12 or wy1 > y1 + 1e-12:
            ctx.warn(("workspace", "boundary"), f"the workspace {workspace.bounds} m reaches beyond the "
                                                f"actuator's extent {actuator.extent} m, where its model is "
                                                "not meant to be used.")
    parts = (medium, workspace, kinds, starts, goals, actuator, truth, limits, planner, simulation, outputs,
             unlabelled)
    if any(p is BAD for p in parts):
        return BAD
    return Scenario(name=name, workspace=workspace, bodies=bodies, starts=np.asarray(starts, float),
                    goals=np.asarray(goals, float), actuator=actuator, truth=truth, limits=limits,
                    assign_goals=bool(unlabelled), planner=planner, mode=mode, simulation=simulation,
                    outputs=outputs, description=str(data.get("description") or ""),
                    config={"actuator": aspec, "truth": tspec,
                            **({"limits": data.get("limits")} if unchecked and data.get("limits") else {})})


def parse_scenario(doc, name=None, *, allow_modules=(), on_import=None, check_only=False, progress=False):
    """Validate a :class:`YamlDoc` and build its :class:`Scenario` (and variants).

    Keyword arguments as in :func:`load_scenario`.

    Raises
    ------
    ScenarioError
        Listing every problem found.
    """
    ctx = _Ctx(doc, {"allow_modules": tuple(allow_modules or ()), "on_import": on_import,
                     "check_only": bool(check_only), "progress": bool(progress)})
    data = doc.data
    if data is None:
        raise ScenarioError([(doc.file, 1, "(document)", "the file is empty; a scenario needs at least "
                                                           "workspace, bodies, starts, goals and actuator.")])
    if not isinstance(data, dict):
        raise ScenarioError([(doc.file, doc.line(()), "(document)",
                              f"a scenario is a mapping of sections, found {_type_name(data)}.")])
    _check_keys(ctx, (), data, "")
    if "name" in data:
        _str(ctx, ("name",), data["name"])
    label = data.get("name") if isinstance(data.get("name"), str) else (
        name or os.path.splitext(os.path.basename(doc.file))[0])
    top = {k: v for k, v in data.items() if k in {x.name for x in SCHEMA[""]}}
    sc = _build(ctx, top, label)
    variants = []
    vs = data.get("variants")
    if vs is not None:
        if not isinstance(vs, list) or not vs:
            ctx.err(("variants",), f"expected a non-empty list of variants, found {_type_name(vs)}.")
        else:
            seen = {}
            for i, v in enumerate(vs):
                vp = ("variants", i)
                if not isinstance(v, dict):
                    ctx.err(vp, f"expected a mapping with 'name' and sections to replace, found {_type_name(v)}.")
                    continue
                allowed = ["name", *VARIANT_SECTIONS]
                bad = False
                for k in v:
                    if k not in allowed:
                        close = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
                        hint = f" Did you mean {close[0]!r}?" if close else f" Allowed: {', '.join(allowed)}."
                        ctx.err(vp + (k,), f"a variant may not set {k!r}.{hint}")
                        bad = True
                if "name" not in v or _str(ctx, vp + ("name",), v.get("name")) is BAD:
                    if "name" not in v:
                        ctx.err(vp, "missing required key 'name'.")
                    continue
                if v["name"] in seen:
                    ctx.err(vp + ("name",), f"variant name {v['name']!r} is already used by variants[{seen[v['name']]}].")
                    continue
                seen[v["name"]] = i
                if bad:
                    continue
                vctx = _SubCtx(ctx, vp, v)
                merged = dict(top)
                merged.pop("variants", None)
                paths, base = {}, {}
                for k in VARIANT_SECTIONS:
                    if k in v:
                        merged[k] = v[k]
                        paths[k] = vp + (k,)
                        if k == "actuator" and isinstance(v[k], dict) and "type" not in v[k] and \
                                isinstance(top.get("actuator"), dict):
                            base["actuator"] = (top["actuator"], ("actuator",))
                merged["__paths__"] = paths
                merged["__base__"] = base
                sv = _build(vctx, merged, f"{label}/{v['name']}")
                if sv is not BAD:
                    variants.append(sv)
    if ctx.problems:
        raise ScenarioError(ctx.problems)
    sc.variants = variants
    sc.input_files = list(dict.fromkeys(ctx.input_files))
    sc.source = doc.file
    sc.digest = hashlib.sha256(doc.text.encode()).hexdigest()
    sc.warnings = ctx.warnings
    for v in variants:
        v.source, v.digest, v.input_files = doc.file, sc.digest, sc.input_files
        v.simulation, v.outputs = sc.simulation, sc.outputs
    return sc


class _SubCtx(_Ctx):
    """Context of a variant: section keys it replaces are reported at the variant's lines and paths."""

    def __init__(self, parent, vpath, variant):
        self.parent = parent
        self.doc = parent.doc
        self.opts = parent.opts
        self.input_files = parent.input_files
        self.vpath = vpath
        self.sections = set(variant)

    @property
    def problems(self):
        return self.parent.problems

    @property
    def warnings(self):
        return self.parent.warnings

    def _map(self, path):
        path = tuple(path)
        if path and path[0] in self.sections and path[:len(self.vpath)] != self.vpath:
            return self.vpath + path
        return path

    def err(self, path, message, line=None):
        p = self._map(path)
        self.parent.problems.append((self.doc.file, line if line is not None else self.doc.line(p),
                                     key_string(p) or "(top level)", message))
        return BAD

    def warn(self, path, message):
        p = self._map(path)
        self.parent.warnings.append(ScenarioError.format_problem(self.doc.file, self.doc.line(p),
                                                                 key_string(p), message))


def load_scenario(path_or_text, *, name=None, allow_modules=(), on_import=None, check_only=False,
                  progress=False):
    """Read, validate and build a scenario.

    Parameters
    ----------
    path_or_text : str or os.PathLike
        A scenario file, or YAML text (anything containing a newline is taken as text).
    name : str, optional
        Label when the file has no ``name``.
    allow_modules : sequence of str
        Modules an actuator ``type: module:Class`` may import although they are not registered
        plug-ins (importing runs their code); the user's configuration may allow more
        (:func:`fieldplan.registry.user_allowed_modules`).
    on_import : callable, optional
        ``on_import(module, file, reason)``, called before such a module is imported.
    check_only : bool
        Never import a module that is not a registered plug-in: such an actuator section (and the
        limits, which need its channels) is left unchecked with a warning, and the scenario's
        ``actuator`` is ``None``. What ``fieldplan validate`` uses.
    progress : bool
        Show a progress bar while a long obstacle list is read.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioError
        Every problem, each naming file, line and key path.

    Examples
    --------
    >>> sc = load_scenario('''
    ... workspace: {boundary: {rectangle: [0, 0, 1 mm, 1 mm]}}
    ... bodies: [{kind: bead, count: 2, radius: 5 um, density: 1050 kg/m^3}]
    ... starts: [[0.2 mm, 0.2 mm], [0.8 mm, 0.2 mm]]
    ... goals: [[0.2 mm, 0.8 mm], [0.8 mm, 0.8 mm]]
    ... actuator: {type: source-array, sources: [[0, 0], [1 mm, 0], [0, 1 mm], [1 mm, 1 mm]]}
    ... ''', name="doc")
    >>> len(sc.bodies), [c.name for c in sc.actuator.channels][:2]
    (2, ['source_1', 'source_2'])
    """
    if isinstance(path_or_text, str) and "\n" in path_or_text:
        text, file = path_or_text, name or "<scenario>"
    else:
        file = os.fspath(path_or_text)
        if os.path.exists(file) and not os.path.isfile(file):
            raise ScenarioError([(file, None, "(file)", "not a regular file (a folder, device or pipe cannot be a "
                                                        "scenario file).")])
        try:
            with open(file, encoding="utf-8") as fh:
                text = fh.read(MAX_FILE_CHARS + 1)
            if len(text) > MAX_FILE_CHARS:
                raise ScenarioError([(file, None, "(file)", f"the file is larger than {MAX_FILE_CHARS} characters "
                                                            "(fieldplan.scenario.MAX_FILE_CHARS); a scenario file "
                                                            "this large is refused.")])
        except FileNotFoundError:
            raise ScenarioError([(file, None, "(file)", "no such file.")]) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ScenarioError([(file, None, "(file)", f"cannot read the file ({exc}).")]) from None
    doc = read_yaml(text, file, progress=progress)
    return parse_scenario(doc, name=name, allow_modules=allow_modules, on_import=on_import, check_only=check_only,
                          progress=progress)


# ----------------------------------------------------------------------------------------------
# Object -> YAML
# ----------------------------------------------------------------------------------------------

def _plain(v):
    """numpy and tuples -> plain lists and floats for YAML."""
    if isinstance(v, np.ndarray):
        return _plain(v.tolist())
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, dict):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.bool_,)):
        return bool(v)
    if dataclasses.is_dataclass(v) and not isinstance(v, type):
        return {f.name: _plain(getattr(v, f.name)) for f in dataclasses.fields(v)}
    return v


def _shape_dict(g):
    import shapely  # noqa: PLC0415

    x0, y0, x1, y1 = g.bounds
    if shapely.equals(g, shapely.box(x0, y0, x1, y1)) and len(g.exterior.coords) == 5:
        return {"rectangle": [x0, y0, x1, y1]}
    pts = np.asarray(g.exterior.coords)[:-1]
    if len(pts) >= 16:
        # circle() makes a regular polygon whose vertices all lie on the circle: write it back as one.
        c = np.array([(x0 + x1) / 2, (y0 + y1) / 2])
        r = np.linalg.norm(pts - c, axis=1)
        if np.ptp(r) <= 1e-9 * r.max() and len(pts) % 4 == 0:
            # 12 significant digits drop the buffer's round-off, so object -> YAML -> object is stable.
            return {"circle": {"center": [float(f"{v:.12g}") for v in c], "radius": float(f"{r.max():.12g}")}}
    return {"polygon": [list(c) for c in list(g.exterior.coords)[:-1]]}


def _actuator_config(act):
    to_config = getattr(act, "to_config", None)
    if callable(to_config):
        d = dict(to_config())
        d.setdefault("type", _registry_name(type(act)))
        return _plain(d)
    d = {"type": _registry_name(type(act))}
    for n, (default, _) in actuator_params(type(act)).items():
        if not hasattr(act, n):
            raise FieldplanError(f"{type(act).__name__} does not store its parameter {n!r} as an attribute; "
                                 "give it a to_config() method to write it to a scenario.")
        v = getattr(act, n)
        if default is not _MISSING and _same(v, default):
            continue
        d[n] = _plain(v)
        if not _is_plain(d[n]):
            raise FieldplanError(f"{type(act).__name__} parameter {n!r} holds a {type(v).__name__}, which a scenario "
                                 "file cannot hold; give the actuator a to_config() method returning plain data.")
    return d


def _is_plain(v):
    if isinstance(v, dict):
        return all(isinstance(k, str) and _is_plain(x) for k, x in v.items())
    if isinstance(v, list):
        return all(_is_plain(x) for x in v)
    return v is None or isinstance(v, (str, bool, int, float))


def _same(a, b):
    try:
        return bool(np.all(np.asarray(a) == np.asarray(b))) and np.shape(a) == np.shape(b)
    except Exception:  # noqa: BLE001
        return False


def scenario_to_dict(sc):
    """The normalised SI form of a :class:`Scenario`, as plain data ready for YAML."""
    ws = sc.workspace
    med = sc.medium
    kinds = []
    for b in sc.bodies:
        if kinds and kinds[-1][0] == b:
            kinds[-1][1] += 1
        else:
            kinds.append([b, 1])
    bodies = []
    for b, count in kinds:
        d = {"kind": b.name, "count": count, "radius": b.radius, "density": b.density, "height": b.height}
        for k in ("moment", "susceptibility", "saturation_magnetization", "permittivity", "conductivity",
                  "surface_conductance", "drift_mobility"):
            if getattr(b, k) is not None:
                d[k] = _plain(getattr(b, k))
        if b.shell is not None:
            d["shell"] = dataclasses.asdict(b.shell)
        bodies.append(d)
    out = {
        "name": sc.name,
        "workspace": {"boundary": _shape_dict(ws.boundary), "obstacles": [_shape_dict(o) for o in ws.obstacles]},
        "medium": {"preset": "water" if med.submerged else "air", "temperature": med.temperature,
                   "viscosity": med.viscosity, "density": med.density,
                   "relative_permittivity": med.relative_permittivity, "conductivity": med.conductivity,
                   "submerged": med.submerged},
        "bodies": bodies,
        "starts": {"positions": _plain(sc.starts)},
        "goals": {"positions": _plain(sc.goals), "unlabelled": bool(sc.assign_goals)},
        "actuator": sc.config.get("actuator") or _actuator_config(sc.actuator),
    }
    if sc.description:
        out["description"] = sc.description
    if sc.truth is not None:
        out["truth"] = sc.config.get("truth") or _actuator_config(sc.truth)
    if sc.limits is not None:
        lim = sc.limits.to_dict()
        chans = {k: v for k, v in lim["channels"].items() if v}
        d = {k: lim[k] for k in ("time_step", "min_dwell") if lim.get(k) is not None}
        if chans:
            d["channels"] = chans
        out["limits"] = d
    elif sc.config.get("limits"):
        out["limits"] = _plain(sc.config["limits"])     # actuator not imported: limits as given, unchecked
    out["planner"] = dict(mode=sc.mode, **_plain(sc.planner))
    out["simulation"] = _plain(dataclasses.asdict(sc.simulation))
    o = dataclasses.asdict(sc.outputs)
    o["plots"] = list(o["plots"])
    out["outputs"] = {k: v for k, v in o.items() if v is not None}
    out["simulation"] = {k: v for k, v in out["simulation"].items() if v is not None}
    return out


def dump_scenario(sc):
    """YAML text of a :class:`Scenario` (SI numbers); :func:`load_scenario` reads it back.

    Variants are not written (each variant is a scenario of its own: dump them one by one).
    """
    return yaml.safe_dump(scenario_to_dict(sc), sort_keys=False, default_flow_style=None, width=100)


def schema_reference():
    """The key-by-key reference of the scenario format as Markdown (generated from :data:`SCHEMA`)."""
    lines = []
    for section, keys in SCHEMA.items():
        lines.append(f"### `{section or '(top level)'}`")
        lines.append("")
        lines.append("| key | type | unit | default | meaning |")
        lines.append("|---|---|---|---|---|")
        for k in keys:
            default = "**required**" if k.required else ("" if k.default is None else f"`{k.default}`")
            kind = k.kind if not k.choices else " \\| ".join(k.choices)
            lines.append(f"| `{k.name}` | {kind} | {k.unit or ''} | {default} | {k.doc} |")
        lines.append("")
    return "\n".join(lines)
