"""Scenario objects back to plain data and YAML (object -> YAML -> object round-trips).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import yaml

from ..errors import FieldplanError
from ..fileio import plain
from .params import actuator_params, registry_name
from .schema import MISSING, SCHEMA

__all__ = ['scenario_to_dict', 'dump_scenario']

# ----------------------------------------------------------------------------------------------
# Object -> YAML
# ----------------------------------------------------------------------------------------------

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
        d.setdefault("type", registry_name(type(act)))
        return plain(d)
    d = {"type": registry_name(type(act))}
    for n, (default, _) in actuator_params(type(act)).items():
        if not hasattr(act, n):
            raise FieldplanError(f"{type(act).__name__} does not store its parameter {n!r} as an attribute; "
                                 "give it a to_config() method to write it to a scenario.")
        v = getattr(act, n)
        if default is not MISSING and _same(v, default):
            continue
        d[n] = plain(v)
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
        d = {"kind": b.name, "count": count}
        for k in SCHEMA["bodies[]"]:
            # gap is written as the height it gives (a Body always has one); kind is written above
            if k.field in (None, "name", "gap") or getattr(b, k.field) is None:
                continue
            v = getattr(b, k.field)
            d[k.name] = dataclasses.asdict(v) if k.kind == "section" else plain(v)
        bodies.append(d)
    out = {
        "name": sc.name,
        "workspace": {"boundary": _shape_dict(ws.boundary), "obstacles": [_shape_dict(o) for o in ws.obstacles]},
        "medium": {"preset": "water" if med.submerged else "air", "temperature": med.temperature,
                   "viscosity": med.viscosity, "density": med.density,
                   "relative_permittivity": med.relative_permittivity, "conductivity": med.conductivity,
                   "submerged": med.submerged},
        "bodies": bodies,
        "starts": {"positions": plain(sc.starts)},
        "goals": {"positions": plain(sc.goals), "unlabelled": bool(sc.assign_goals)},
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
        out["limits"] = plain(sc.config["limits"])     # actuator not imported: limits as given, unchecked
    out["planner"] = dict(mode=sc.mode, **plain(sc.planner))
    out["simulation"] = plain(dataclasses.asdict(sc.simulation))
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
