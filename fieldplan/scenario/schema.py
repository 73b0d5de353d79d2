"""The scenario schema: the one description of every section and key (validation, "did you mean", the README reference).

The sections that set a dataclass - ``bodies[]`` (:class:`~fieldplan.world.body.Body`), ``bodies[].shell``,
``limits`` (:class:`~fieldplan.contract.schedule.HardwareLimits`), ``limits.channels.<name>``
(:class:`~fieldplan.contract.schedule.ChannelLimit`), ``planner``
(:class:`~fieldplan.planning.settings.PlanSettings`), ``simulation``
(:class:`~fieldplan.scenario.model.SimulationSettings`) and ``outputs``
(:class:`~fieldplan.scenario.model.OutputSettings`) - take their keys from the fields' metadata
(:func:`~fieldplan.scenario.fields.field_keys`): a new field is written once, in its dataclass.
"""

from __future__ import annotations

from ..contract.schedule import ChannelLimit, HardwareLimits
from ..planning.settings import PlanSettings
from ..world.body import Body, Shell
from .fields import Key, field_keys
from .model import PLOT_NAMES, OutputSettings, SimulationSettings

__all__ = ['MISSING', 'BAD', 'NOT_IMPORTED', 'Key', 'SHAPE_DOC', 'SCHEMA', 'VARIANT_SECTIONS', 'PLOT_NAMES',
           'schema_reference']

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

def _k(name, kind, unit=None, default=None, doc="", required=False, choices=()):
    return Key(name, kind, unit, default, doc, required, tuple(choices))


SHAPE_DOC = ("one of `rectangle: [xmin, ymin, xmax, ymax]`, `rectangle: {center: [x, y], size: [w, h]}`, "
             "`circle: {center: [x, y], radius: r}` or `polygon: [[x, y], ...]` (lengths in m or with units)")

_BODY = field_keys(Body, rename={"name": "kind"}, skip=("extra",))
_LIMITS = field_keys(HardwareLimits)

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
    # Body fields; `kind` is Body.name. Body.extra is not read from files.
    "bodies[]": _BODY[:1] + [_k("count", "int", None, 1, "How many bodies of this kind (>= 1).")] + _BODY[1:],
    "bodies[].shell": field_keys(Shell),
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
    # HardwareLimits fields, with `all_channels` (the same limits for every channel) before `channels`.
    "limits": ([k for k in _LIMITS if k.name != "channels"]
               + [_k("all_channels", "section", None, None, "Limits applied to every channel (keys as "
                                                            "`limits.channels.<name>`).")]
               + [k for k in _LIMITS if k.name == "channels"]),
    "limits.channels.<name>": field_keys(ChannelLimit),
    # PlanSettings fields; PlanSettings.assign_goals is set by `goals.unlabelled`.
    "planner": [_k("mode", "choice", None, "open_loop", "open_loop: plan once, play the schedule in every trial; "
                                                        "closed_loop: re-plan from observed positions each period.",
                   choices=("open_loop", "closed_loop"))] + field_keys(PlanSettings, skip=("assign_goals",)),
    # SimulationSettings and OutputSettings fields (range checks: sections.read_simulation, read_outputs).
    "simulation": field_keys(SimulationSettings),
    "outputs": field_keys(OutputSettings),
    "variants[]": [
        _k("name", "str", required=True, doc="Label in the comparison table."),
        _k("<section>", "any", doc="Any of workspace, medium, bodies, starts, goals, actuator, truth, limits, "
                                   "planner: replaces that section of the base file."),
    ],
}

VARIANT_SECTIONS = ("workspace", "medium", "bodies", "starts", "goals", "actuator", "truth", "limits", "planner")


def schema_reference():
    """The key-by-key reference of the scenario format as Markdown (generated from :data:`SCHEMA`)."""
    lines = []
    for section, keys in SCHEMA.items():
        lines.append(f"### `{section or '(top level)'}`")
        lines.append("")
        lines.append("| key | type | unit | default | meaning |")
        lines.append("|---|---|---|---|---|")
        for k in keys:
            default = "**required**" if k.required else (k.default_text or ("" if k.default is None else f"`{k.default}`"))
            kind = k.kind if not k.choices else " \\| ".join(k.choices)
            doc = k.doc.replace("|", "\\|")          # a pipe in a meaning (|f| / |grad f|) would end the cell
            lines.append(f"| `{k.name}` | {kind} | {k.unit or ''} | {default} | {doc} |")
        lines.append("")
    return "\n".join(lines)
