"""Whole scenario files: parse, build every section, variants, and :func:`load_scenario`.
"""

from __future__ import annotations

import difflib
import hashlib
import os
import warnings

import numpy as np

from ..errors import FieldplanError, ScenarioError
from . import yamldoc
from .model import Scenario
from .readers import Context, check_keys, read_bool, read_str, type_name
from .schema import BAD, NOT_IMPORTED, SCHEMA, VARIANT_SECTIONS
from .sections import (
    check_position_count,
    declared_count,
    read_actuator,
    read_bodies,
    read_limits,
    read_medium,
    read_outputs,
    read_placements,
    read_planner,
    read_simulation,
    read_workspace,
)
from .yamldoc import key_string, read_yaml

__all__ = ['parse_scenario', 'SubContext', 'load_scenario']

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
    medium = read_medium(ctx, data.get("medium"))
    workspace = read_workspace(ctx, data["workspace"], medium) if "workspace" in data else BAD
    kinds = read_bodies(ctx, data["bodies"]) if "bodies" in data else BAD
    bodies = BAD
    if kinds is not BAD:
        bodies = [b for b, count, _ in kinds for _ in range(count)]
    elif "bodies" in data:
        n = declared_count(data["bodies"])
        if n is not None and n >= 1:
            for section in ("starts", "goals"):
                if section in data:
                    check_position_count(ctx, section, data[section], n)
    starts = goals = BAD
    if bodies is not BAD:
        starts = read_placements(ctx, "starts", data["starts"], bodies, workspace) if "starts" in data else BAD
        goals = read_placements(ctx, "goals", data["goals"], bodies, workspace) if "goals" in data else BAD
    unlabelled = False
    if isinstance(data.get("goals"), dict) and "unlabelled" in data["goals"]:
        unlabelled = read_bool(ctx, ("goals", "unlabelled"), data["goals"]["unlabelled"])
    actuator, aspec = (BAD, None)
    if "actuator" in data:
        apath = data.get("__paths__", {}).get("actuator", ("actuator",))
        base = data.get("__base__", {}).get("actuator")
        actuator, aspec = read_actuator(ctx, apath, data["actuator"], base)
    truth, tspec = None, None
    if data.get("truth") is not None and "actuator" in data:
        tpath = data.get("__paths__", {}).get("truth", ("truth",))
        apath = data.get("__paths__", {}).get("actuator", ("actuator",))
        base_spec = aspec if aspec is not None else data["actuator"]
        truth, tspec = read_actuator(ctx, tpath, data["truth"], (base_spec, apath) if isinstance(base_spec, dict) else None)
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
        limits = read_limits(ctx, data.get("limits"), actuator)
    planner, mode = read_planner(ctx, data.get("planner"))
    simulation = read_simulation(ctx, data.get("simulation"))
    outputs = read_outputs(ctx, data.get("outputs"))
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
    ctx = Context(doc, {"allow_modules": tuple(allow_modules or ()), "on_import": on_import,
                     "check_only": bool(check_only), "progress": bool(progress)})
    data = doc.data
    if data is None:
        raise ScenarioError([(doc.file, 1, "(document)", "the file is empty; a scenario needs at least "
                                                           "workspace, bodies, starts, goals and actuator.")])
    if not isinstance(data, dict):
        raise ScenarioError([(doc.file, doc.line(()), "(document)",
                              f"a scenario is a mapping of sections, found {type_name(data)}.")])
    check_keys(ctx, (), data, "")
    if "name" in data:
        read_str(ctx, ("name",), data["name"])
    label = data.get("name") if isinstance(data.get("name"), str) else (
        name or os.path.splitext(os.path.basename(doc.file))[0])
    top = {k: v for k, v in data.items() if k in {x.name for x in SCHEMA[""]}}
    sc = _build(ctx, top, label)
    variants = []
    vs = data.get("variants")
    if vs is not None:
        if not isinstance(vs, list) or not vs:
            ctx.err(("variants",), f"expected a non-empty list of variants, found {type_name(vs)}.")
        else:
            seen = {}
            for i, v in enumerate(vs):
                vp = ("variants", i)
                if not isinstance(v, dict):
                    ctx.err(vp, f"expected a mapping with 'name' and sections to replace, found {type_name(v)}.")
                    continue
                allowed = ["name", *VARIANT_SECTIONS]
                bad = False
                for k in v:
                    if k not in allowed:
                        close = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
                        hint = f" Did you mean {close[0]!r}?" if close else f" Allowed: {', '.join(allowed)}."
                        ctx.err(vp + (k,), f"a variant may not set {k!r}.{hint}")
                        bad = True
                if "name" not in v or read_str(ctx, vp + ("name",), v.get("name")) is BAD:
                    if "name" not in v:
                        ctx.err(vp, "missing required key 'name'.")
                    continue
                if v["name"] in seen:
                    ctx.err(vp + ("name",), f"variant name {v['name']!r} is already used by variants[{seen[v['name']]}].")
                    continue
                seen[v["name"]] = i
                if bad:
                    continue
                vctx = SubContext(ctx, vp, v)
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


class SubContext(Context):
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
        (:func:`fieldplan.contract.registry.user_allowed_modules`).
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
                text = fh.read(yamldoc.MAX_FILE_CHARS + 1)
            if len(text) > yamldoc.MAX_FILE_CHARS:
                raise ScenarioError([(file, None, "(file)", f"the file is larger than {yamldoc.MAX_FILE_CHARS} characters "
                                                            "(fieldplan.scenario.MAX_FILE_CHARS); a scenario file "
                                                            "this large is refused.")])
        except FileNotFoundError:
            raise ScenarioError([(file, None, "(file)", "no such file.")]) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ScenarioError([(file, None, "(file)", f"cannot read the file ({exc}).")]) from None
    doc = read_yaml(text, file, progress=progress)
    return parse_scenario(doc, name=name, allow_modules=allow_modules, on_import=on_import, check_only=check_only,
                          progress=progress)
