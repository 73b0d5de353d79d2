"""The scenario schema: the one description of every section and key (validation, "did you mean", the README reference).
"""

from __future__ import annotations

import dataclasses
import inspect
from dataclasses import dataclass

from ..plots.catalog import RUN_FIGURES

__all__ = ['MISSING', 'BAD', 'NOT_IMPORTED', 'Key', 'SHAPE_DOC', 'SCHEMA', 'VARIANT_SECTIONS', 'PLOT_NAMES',
           'PLANNER_UNITS', 'PLANNER_CHOICES', 'PLANNER_OPTIONAL_INTS', 'planner_fields', 'schema_reference']

MISSING = object()


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
                                    "constraints and budget (read by fieldplan.workflows.design; ignored by `run`)."),
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
        _k("*", "any", doc="Every other key is a field of `fieldplan.planning.plan.PlanSettings` (period, horizon, "
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
PLOT_NAMES = tuple(RUN_FIGURES)

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


def planner_fields():
    """PlanSettings field names and defaults (from fieldplan.plan if it imports)."""
    try:
        from ..planning.plan import PlanSettings  # noqa: PLC0415 - the planner is optional at load time
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
