"""Reading each section of a scenario file: workspace, medium, bodies, placements, actuator, limits, planner, simulation, outputs.
"""

from __future__ import annotations

import dataclasses
import difflib
import re

import numpy as np
import shapely

from ..contract.actuator import Actuator
from ..contract.registry import available_actuators, is_registered_module, load_actuator_class
from ..contract.schedule import ChannelLimit, HardwareLimits
from ..errors import FieldplanError
from ..planning.settings import PlanSettings
from ..world.body import Body, Shell
from ..world.medium import air, water
from ..world.workspace import CIRCLE_RESOLUTION, Workspace, polygon
from . import yamldoc
from .model import OutputSettings, SimulationSettings
from .fields import CHANNEL_UNIT, channel_unit
from .params import is_path_param, param_info, read_param_value, read_si_params, resolve_path
from .readers import (
    Context,
    build,
    check_keys,
    read_choice,
    read_key,
    read_keys,
    read_point,
    read_points,
    read_quantity,
    type_name,
)
from .schema import BAD, MISSING, NOT_IMPORTED, PLOT_NAMES, SCHEMA

__all__ = ['read_workspace', 'read_medium', 'read_bodies', 'declared_count', 'check_position_count',
           'read_placements', 'read_actuator', 'read_limits', 'read_planner', 'read_simulation', 'read_outputs']

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
        found = type_name(value) if not isinstance(value, dict) else f"keys {list(value)}"
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
            c = read_point(ctx, p + ("center",), spec["center"])
            sz = read_point(ctx, p + ("size",), spec["size"])
            if c is BAD or sz is BAD:
                return BAD
            if not (sz[0] > 0 and sz[1] > 0):
                return ctx.err(p + ("size",), f"rectangle size must be > 0 m, found {spec['size']!r}.")
            return ("rectangle", (c[0] - sz[0] / 2, c[1] - sz[1] / 2, c[0] + sz[0] / 2, c[1] + sz[1] / 2))
        if not isinstance(spec, list) or len(spec) != 4:
            return ctx.err(p, f"expected [xmin, ymin, xmax, ymax] in m, found {type_name(spec)}.")
        v = [read_quantity(ctx, p + (i,), x, "m") for i, x in enumerate(spec)]
        if any(x is BAD for x in v):
            return BAD
        if not (v[2] > v[0] and v[3] > v[1]):
            return ctx.err(p, f"rectangle needs xmax > xmin and ymax > ymin, found {spec!r}.")
        return ("rectangle", tuple(v))
    if kind == "circle":
        if not isinstance(spec, dict) or set(spec) != {"center", "radius"}:
            found = sorted(spec) if isinstance(spec, dict) else type_name(spec)
            return ctx.err(p, f"circle needs exactly keys 'center' and 'radius', found {found}.")
        c = read_point(ctx, p + ("center",), spec["center"])
        r = read_quantity(ctx, p + ("radius",), spec["radius"], "m", positive=True)
        if c is BAD or r is BAD:
            return BAD
        return ("circle", (c[0], c[1], r))
    pts = read_points(ctx, p, spec, minimum=3)
    if pts is BAD:
        return BAD
    return ("polygon", pts)


def _build_shapes(ctx, paths, specs):
    """Shapely polygons of many shape specs (from :func:`_shape_spec`) at once; BAD where one fails.

    Rectangles and circles are made with one vectorised shapely call each, so a workspace with
    tens of thousands of obstacles is built in well under a second.
    """
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


def read_workspace(ctx, ws, medium):
    path = ("workspace",)
    if not check_keys(ctx, path, ws, "workspace"):
        return BAD
    boundary = _shape(ctx, path + ("boundary",), ws["boundary"]) if "boundary" in ws else BAD
    obs = ws.get("obstacles") or []
    if not isinstance(obs, list):
        ctx.err(path + ("obstacles",), f"expected a list of shapes, found {type_name(obs)}.")
        obs = []
    if len(obs) > yamldoc.MAX_OBSTACLES:
        return ctx.err(path + ("obstacles",), f"{len(obs)} obstacles given; at most {yamldoc.MAX_OBSTACLES} fit in one "
                                              "workspace (fieldplan.scenario.MAX_OBSTACLES). Merge small ones "
                                              "into larger polygons.")
    items = enumerate(obs)
    if ctx.opts.get("progress") and len(obs) >= yamldoc.PROGRESS_OBSTACLES:
        from tqdm.auto import tqdm  # noqa: PLC0415

        items = tqdm(items, total=len(obs), desc="reading obstacles", unit="obstacle", leave=False)
    paths = [path + ("obstacles", i) for i in range(len(obs))]
    specs = [_shape_spec(ctx, paths[i], o) for i, o in items]
    if any(sp is BAD for sp in specs) or boundary is BAD or medium is BAD:
        return BAD
    vertices = sum(5 if k == "rectangle" else 4 * CIRCLE_RESOLUTION + 1 if k == "circle" else len(v) + 1
                   for k, v in specs)
    if vertices > yamldoc.MAX_OBSTACLE_VERTICES:
        return ctx.err(path + ("obstacles",), f"the obstacles have {vertices} polygon vertices in all (a circle has "
                                              f"{4 * CIRCLE_RESOLUTION + 1}); at most {yamldoc.MAX_OBSTACLE_VERTICES} are "
                                              "allowed (fieldplan.scenario.MAX_OBSTACLE_VERTICES), so that the free "
                                              "space fits in memory. Use fewer or simpler obstacles.")
    obstacles = _build_shapes(ctx, paths, specs)
    if any(o is BAD for o in obstacles):
        return BAD
    if len(obstacles):
        outside = np.flatnonzero(~shapely.intersects(boundary, obstacles))
        for i in outside[:yamldoc.MAX_REPEATED_WARNINGS]:
            ctx.warn(paths[i], "obstacle lies wholly outside the boundary.")
        if len(outside) > yamldoc.MAX_REPEATED_WARNINGS:
            ctx.warn(path + ("obstacles",), f"{len(outside) - yamldoc.MAX_REPEATED_WARNINGS} more obstacles lie wholly "
                                            "outside the boundary.")
    try:
        return Workspace(boundary, list(obstacles), medium)
    except FieldplanError as exc:
        return ctx.err(path + (("obstacles",) if len(obstacles) else ("boundary",)), str(exc))


def read_medium(ctx, m):
    path = ("medium",)
    if m is None:
        return water()
    if not check_keys(ctx, path, m, "medium"):
        return BAD
    v = read_keys(ctx, path, m, "medium")
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


def read_bodies(ctx, kinds):
    path = ("bodies",)
    if not isinstance(kinds, list) or not kinds:
        return ctx.err(path, "expected a list of body kinds, e.g. `- {kind: bead, count: 2, radius: 5 um, "
                             f"density: 1050 kg/m^3}}`, found {type_name(kinds)}.")
    out = []
    ok = True
    names = {}
    for i, spec in enumerate(kinds):
        p = path + (i,)
        if not check_keys(ctx, p, spec, "bodies[]"):
            ok = False
            continue
        if any(k.required and k.name not in spec for k in SCHEMA["bodies[]"]):
            ok = False
            continue
        v = read_keys(ctx, p, spec, "bodies[]")
        if v["count"] is not BAD and v["count"] is not None and v["count"] < 1:
            v["count"] = ctx.err(p + ("count",), f"must be a whole number >= 1, found {spec['count']!r}.")
        elif isinstance(v["count"], int) and v["count"] > yamldoc.MAX_BODIES:
            v["count"] = ctx.err(p + ("count",), f"at most {yamldoc.MAX_BODIES} bodies fit in one scenario "
                                                 f"(fieldplan.scenario.MAX_BODIES), found {spec['count']!r}.")
        shell = None
        if spec.get("shell") is not None:
            sp = p + ("shell",)
            if check_keys(ctx, sp, spec["shell"], "bodies[].shell"):
                sv = read_keys(ctx, sp, spec["shell"], "bodies[].shell")
                shell = BAD if any(x is BAD or x is None for x in sv.values()) else \
                    build(ctx, sp, Shell, sv, {k: sp + (k,) for k in sv}, spec["shell"])
            else:
                shell = BAD
        if any(x is BAD for x in v.values()) or shell is BAD:
            ok = False
            continue
        # Every key that is a Body field (`kind` is Body.name); Body checks the values.
        keys = [k for k in SCHEMA["bodies[]"] if k.field is not None and v.get(k.name) is not None]
        kw = {k.field: v[k.name] for k in keys}
        if v["kind"] in names:
            ctx.err(p + ("kind",), f"kind {v['kind']!r} is already used by bodies[{names[v['kind']]}]; "
                                   "give each kind once with a count.")
            ok = False
            continue
        names[v["kind"]] = i
        body = build(ctx, p, Body, {**kw, "shell": shell}, {k.field: p + (k.name,) for k in keys},
                     {k.field: spec[k.name] for k in keys if k.name in spec})
        if body is BAD:
            ok = False
            continue
        out.append((body, int(v["count"]), i))
    total = sum(c for _, c, _ in out)
    if ok and total > yamldoc.MAX_BODIES:
        return ctx.err(path, f"the counts add up to {total} bodies; at most {yamldoc.MAX_BODIES} fit in one scenario "
                             "(fieldplan.scenario.MAX_BODIES).")
    return out if ok else BAD


def declared_count(kinds):
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


def check_position_count(ctx, section, spec, n):
    """Report explicit positions whose number differs from ``n`` (without building any body)."""
    pts = spec if isinstance(spec, list) else spec.get("positions") if isinstance(spec, dict) else None
    if isinstance(pts, list) and len(pts) != n:
        path = (section,) if isinstance(spec, list) else (section, "positions")
        ctx.err(path, f"expected {n} positions (one per body, as the bodies' counts add up to), found {len(pts)}.")


def read_placements(ctx, section, spec, bodies, workspace):
    """Start or goal positions (n, 2) from explicit lists or a seeded random draw."""
    path = (section,)
    n = len(bodies)
    if isinstance(spec, list):
        spec = {"positions": spec}
        shorthand = True
    else:
        shorthand = False
    if not check_keys(ctx, path, spec, section):
        return BAD
    has_pos = spec.get("positions") is not None
    has_rand = spec.get("random") is not None
    if has_pos == has_rand:
        return ctx.err(path, "give exactly one of 'positions' (a list of [x, y]) or 'random' (a region and a "
                             f"seed), found {'both' if has_pos else 'neither'}.")
    if has_pos:
        pp = path if shorthand else path + ("positions",)
        pts = read_points(ctx, pp, spec["positions"])
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
    if not check_keys(ctx, rp, r, "starts.random"):
        return BAD
    v = read_keys(ctx, rp, r, "starts.random")
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


def read_actuator(ctx, path, spec, base=None):
    """Build an actuator from its section; ``base`` is the parent section for inheritance."""
    if not isinstance(spec, dict):
        return ctx.err(path, f"expected a mapping with 'type' and the actuator's parameters, found "
                             f"{type_name(spec)}."), None
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
        return ctx.err(tpath, f"expected an actuator name, found {type_name(tname)}."), None
    if ctx.opts.get("check_only") and ":" in tname and tname not in available_actuators() and \
            not is_registered_module(tname.partition(":")[0]):
        # Checking a file must never run code from it: leave this section unchecked.
        ctx.warn(tpath, f"actuator {tname!r} is not a registered plug-in; its module is not imported while "
                        "checking, so its parameters, channels and limits are not checked.")
        return NOT_IMPORTED, {k: read_si_params(Context(ctx.doc), kp, v) for k, (v, kp) in merged.items()}
    try:
        cls = load_actuator_class(tname, allow_modules=tuple(ctx.opts.get("allow_modules") or ()),
                                  on_import=ctx.opts.get("on_import"))
    except FieldplanError as exc:
        return ctx.err(tpath, str(exc)), None
    params = {k: vp for k, vp in merged.items() if k != "type"}
    factory = getattr(cls, "from_config", None) if isinstance(cls, type) else None
    info = param_info(cls) if isinstance(cls, type) or callable(cls) else {}
    if factory is None and info:
        allowed = list(info)
        for k, (_, kp) in params.items():
            if k not in allowed:
                close = difflib.get_close_matches(k, allowed, n=1, cutoff=0.6)
                hint = f" Did you mean {close[0]!r}?" if close else ""
                ctx.err(kp, f"{tname} has no parameter {k!r}.{hint} Its parameters: {', '.join(allowed)}.")
        missing = [n for n, (d, _, _) in info.items() if d is MISSING and n not in params]
        for n in missing:
            ctx.err(path, f"missing required parameter {n!r} of {tname}.")
        if missing or any(k not in allowed for k in params):
            return BAD, None
    n_before = len(ctx.problems)
    kw = {k: read_param_value(ctx, kp, v, cls, info.get(k)) for k, (v, kp) in params.items()}
    if len(ctx.problems) > n_before:
        return BAD, None
    for k, v in kw.items():
        if is_path_param(k, info.get(k)) and isinstance(v, str):
            kw[k] = resolve_path(ctx.doc.file, v)
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
    spec_out.update({k: read_si_params(Context(ctx.doc), kp, v) for k, (v, kp) in params.items()})
    return act, spec_out


# -- limits --------------------------------------------------------------------------------------

#: Per ChannelLimit field: (is a scenario's value ``new`` looser than the declared ``old``, how to say so).
#: A scenario may tighten what the actuator declares (:meth:`Actuator.hardware_limits`), never loosen it.
LOOSER_THAN_DECLARED = {
    "lower": (lambda new, old: new < old, "looser than"),
    "upper": (lambda new, old: new > old, "looser than"),
    "slew_rate": (lambda new, old: new > old, "looser than"),
    "min_dwell": (lambda new, old: new < old, "looser than"),
    "rms": (lambda new, old: new > old, "looser than"),
    "rms_window": (lambda new, old: new > old, "looser than"),
    # A coarser step is played exactly only if it is a whole number of the hardware's steps.
    "resolution": (lambda new, old: abs(new / old - round(new / old)) > 1e-9 * new / old or new < old,
                   "not a whole multiple of"),
}


def read_limits(ctx, spec, actuator):
    path = ("limits",)
    if actuator is BAD:
        return BAD
    chans = {c.name: c for c in actuator.channels}
    if spec is None:
        return actuator.hardware_limits()
    if not check_keys(ctx, path, spec, "limits"):
        return BAD
    top = read_keys(ctx, path, spec, "limits")
    top_keys = [k for k in SCHEMA["limits"] if k.field is not None and k.name in top]
    if not any(x is BAD for x in top.values()):
        # HardwareLimits checks its own values; checked now, a problem is listed with the channels' ones.
        given = {k.field: top[k.name] for k in top_keys if top[k.name] is not None}
        if build(ctx, path, HardwareLimits, given, {k.field: path + (k.name,) for k in top_keys},
                 {k.field: spec.get(k.name) for k in top_keys}) is BAD:
            top = {k: BAD for k in top}
    keys = {k.name: k for k in SCHEMA["limits.channels.<name>"]}

    def one(p, d, unit):
        if not isinstance(d, dict):
            ctx.err(p, f"expected a mapping of {list(keys)}, found {type_name(d)}.")
            return BAD
        out = {}
        for k, v in d.items():
            if k not in keys:
                close = difflib.get_close_matches(k, list(keys), n=1, cutoff=0.6)
                hint = f" Did you mean {close[0]!r}?" if close else f" Allowed: {', '.join(keys)}."
                out[k] = ctx.err(p + (k,), f"unknown limit {k!r}.{hint}")
                continue
            out[k] = read_key(ctx, p + (k,), v, keys[k], channel_unit(keys[k].unit, unit))
        if any(x is BAD for x in out.values()):
            return BAD
        # ChannelLimit checks the values (> 0, lower <= upper) at the key its message names.
        given = {keys[k].field: x for k, x in out.items() if x is not None}
        if build(ctx, p, ChannelLimit, given, {keys[k].field: p + (k,) for k in out},
                 {keys[k].field: d[k] for k in out}) is BAD:
            return BAD
        return out

    common = {}
    if spec.get("all_channels") is not None:
        units = {c.unit for c in actuator.channels}
        in_channel_unit = [n for n, k in keys.items() if CHANNEL_UNIT in (k.unit or "")]
        if len(units) > 1 and any(k in spec["all_channels"] for k in in_channel_unit):
            ctx.err(path + ("all_channels",), f"channels have different units {sorted(units)}; give value "
                                              "limits per channel under 'channels'.")
            return BAD
        unit = next(iter(units))
        common = one(path + ("all_channels",), spec["all_channels"], unit)
    per = {}
    chspec = spec.get("channels") or {}
    if not isinstance(chspec, dict):
        ctx.err(path + ("channels",), f"expected a mapping channel name -> limits, found {type_name(chspec)}.")
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
    declared = actuator.hardware_limits()
    limits = {}
    for name, c in chans.items():
        base = declared.get(name)
        d = {"lower": c.lower if base.lower is None else max(base.lower, c.lower),
             "upper": c.upper if base.upper is None else min(base.upper, c.upper)}
        d.update({f.name: getattr(base, f.name) for f in dataclasses.fields(ChannelLimit)
                  if f.name not in d and getattr(base, f.name) is not None})
        given = {k: v for k, v in common.items() if v is not None}
        given.update({k: v for k, v in per.get(name, {}).items() if v is not None})
        where = {k: path + (("channels", name) if k in per.get(name, {}) else ("all_channels",)) + (k,) for k in given}
        # Bounds the hardware declares inside the channel's own range are limits; the channel range
        # itself is enforced by the actuator, so a scenario bound beyond it is harmless.
        strict = {k: v for k, v in d.items() if k not in ("lower", "upper")}
        if base.lower is not None and base.lower > c.lower:
            strict["lower"] = base.lower
        if base.upper is not None and base.upper < c.upper:
            strict["upper"] = base.upper
        if not _tightens(ctx, name, c.unit, strict, given, where, type(actuator).__name__):
            return BAD
        d.update(given)
        lo, hi = max(d["lower"], c.lower), min(d["upper"], c.upper)
        if lo > hi:
            p = path + ("channels", name) if name in per else path + ("all_channels",)
            ctx.err(p, f"limits [{d['lower']:g}, {d['upper']:g}] {c.unit} do not overlap the bounds of channel "
                       f"{name!r}, [{c.lower:g}, {c.upper:g}] {c.unit}.")
            return BAD
        limits[name] = build(ctx, path + ("channels", name), ChannelLimit, d, where)
        if limits[name] is BAD:
            return BAD
    return HardwareLimits(limits, **{k.field: top[k.name] if top[k.name] is not None else getattr(declared, k.field)
                                     for k in top_keys})


def _tightens(ctx, channel, unit, declared, given, where, actuator_name):
    """Whether every limit in ``given`` is at least as strict as the actuator's declared one (errors recorded).

    A scenario may tighten what the hardware declares (:meth:`Actuator.hardware_limits`), never
    loosen it (:data:`LOOSER_THAN_DECLARED`): a larger upper bound, slew rate or RMS current, a
    smaller lower bound or minimum dwell, a longer RMS window, or a resolution that is not a whole
    multiple of the declared one is refused, naming the key and the declared value.
    """
    keys = {k.name: k for k in SCHEMA["limits.channels.<name>"]}
    ok = True
    for key, new in given.items():
        old = declared.get(key)
        if key == "rms_window" and declared.get("rms") is None:
            continue        # no declared RMS limit: any window is the scenario's own
        looser, phrase = LOOSER_THAN_DECLARED[key]
        if old is not None and looser(new, old):
            u = (keys[key].unit or "").replace(CHANNEL_UNIT, unit)
            ctx.err(where[key], f"{new:g} {u} for channel {channel!r} is {phrase} the {old:g} {u} that "
                                f"{actuator_name} declares (hardware_limits()); a scenario may tighten a declared "
                                "limit, not loosen it.")
            ok = False
    return ok


def read_planner(ctx, spec):
    """The ``planner`` section: ``({PlanSettings field: value}, mode)``, checked by :class:`PlanSettings`."""
    path = ("planner",)
    if spec is None:
        return {}, "open_loop"
    if not isinstance(spec, dict):
        ctx.err(path, f"expected a mapping of planner settings, found {type_name(spec)}.")
        return BAD, "open_loop"
    keys = {k.name: k for k in SCHEMA["planner"]}
    out, where, written = {}, {}, {}
    mode = "open_loop"
    for k, v in spec.items():
        p = path + (k,)
        if k == "mode":
            mode = read_choice(ctx, p, v, keys["mode"].choices)
            continue
        if k == "assign_goals":
            ctx.err(p, "set 'goals.unlabelled: true' instead (goals are then assigned by the planner).")
            continue
        if k not in keys:
            close = difflib.get_close_matches(k, list(keys), n=1, cutoff=0.6)
            hint = f" Did you mean {close[0]!r}?" if close else f" Allowed keys: {', '.join(keys)}."
            ctx.err(p, f"unknown planner setting {k!r}.{hint}")
            continue
        key = keys[k]
        where[key.field], written[key.field] = p, v
        if v is None:
            # null asks for the default, which only a setting computed when it is None can hold
            out[key.field] = None if key.default is None else ctx.err(
                p, f"expected a value, found nothing (null); leave {k!r} out for its default {key.default!r}.")
        else:
            out[key.field] = read_key(ctx, p, v, key)
    if any(v is BAD for v in out.values()) or mode is BAD:
        return BAD, "open_loop"
    # PlanSettings checks the values (> 0, whole numbers >= 1, ...); its message names the key.
    if build(ctx, path, PlanSettings, out, where, written) is BAD:
        return BAD, "open_loop"
    return out, mode


def read_simulation(ctx, spec):
    path = ("simulation",)
    if spec is None:
        return SimulationSettings()
    if not check_keys(ctx, path, spec, "simulation"):
        return BAD
    v = read_keys(ctx, path, spec, "simulation")
    checks = {"trials": lambda x: 0 <= x <= yamldoc.MAX_TRIALS, "seed": lambda x: x >= 0, "tracking_noise": lambda x: x >= 0,
              "latency": lambda x: x >= 0, "max_displacement": lambda x: x > 0, "dt_max": lambda x: x > 0,
              "record_interval": lambda x: x > 0, "required_success": lambda x: 0 <= x <= 1}
    rules = {"trials": f"from 0 to {yamldoc.MAX_TRIALS} (fieldplan.scenario.MAX_TRIALS)", "seed": ">= 0", "tracking_noise": ">= 0 m", "latency": ">= 0 s",
             "max_displacement": "> 0 m", "dt_max": "> 0 s", "record_interval": "> 0 s",
             "required_success": "between 0 and 1"}
    for k, ok in checks.items():
        if v[k] is not None and v[k] is not BAD and not ok(v[k]):
            v[k] = ctx.err(path + (k,), f"must be {rules[k]}, found {spec[k]!r}.")
    if any(x is BAD for x in v.values()):
        return BAD
    return SimulationSettings(**v)


def read_outputs(ctx, spec):
    path = ("outputs",)
    if spec is None:
        return OutputSettings()
    if not check_keys(ctx, path, spec, "outputs"):
        return BAD
    v = read_keys(ctx, path, spec, "outputs")
    plots = spec.get("plots", True)
    if plots is True:
        v["plots"] = PLOT_NAMES
    elif plots is False or plots is None:
        v["plots"] = ()
    elif isinstance(plots, list):
        for i, p in enumerate(plots):
            read_choice(ctx, path + ("plots", i), p, PLOT_NAMES)
        v["plots"] = tuple(p for p in plots if p in PLOT_NAMES)
    else:
        v["plots"] = ctx.err(path + ("plots",), f"expected true, false or a list of {list(PLOT_NAMES)}, found "
                                                f"{type_name(plots)}.")
    if isinstance(v["resample_rate"], float) and not v["resample_rate"] > 0:
        v["resample_rate"] = ctx.err(path + ("resample_rate",), f"must be > 0 Hz, found {spec['resample_rate']!r}.")
    if isinstance(v["animation_frames"], int) and not 2 <= v["animation_frames"] <= 2000:
        v["animation_frames"] = ctx.err(path + ("animation_frames",), f"must be between 2 and 2000, found "
                                                                      f"{spec['animation_frames']!r}.")
    if isinstance(v["dpi"], int) and not 20 <= v["dpi"] <= yamldoc.MAX_DPI:
        v["dpi"] = ctx.err(path + ("dpi",), f"must be between 20 and {yamldoc.MAX_DPI}, found {spec['dpi']!r}.")
    if any(x is BAD for x in v.values()):
        return BAD
    return OutputSettings(**v)
