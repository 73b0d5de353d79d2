"""Actuator parameters from the constructor: signature, numpydoc units, nested objects, file paths, registry names.
"""

from __future__ import annotations

import dataclasses
import difflib
import inspect
import os
import re

from ..contract.registry import available_actuators
from ..errors import FieldplanError
from ..units import ureg
from .readers import read_quantity, type_name
from .schema import BAD, MISSING

__all__ = ['read_si_params', 'actuator_params', 'param_info', 'read_param_value', 'is_path_param', 'resolve_path',
           'registry_name']

_LEADING_NUMBER = re.compile(r"^\s*[-+]?(\d|\.\d)")


def read_si_params(ctx, path, value, units=None):
    """Recursively convert unit strings in actuator parameters to SI floats."""
    if isinstance(value, dict):
        return {k: read_si_params(ctx, path + (k,), v, (units or {}).get(k) if isinstance(units, dict) else None)
                for k, v in value.items()}
    if isinstance(value, list):
        return [read_si_params(ctx, path + (i,), v, units if isinstance(units, str) else None)
                for i, v in enumerate(value)]
    if isinstance(value, str) and _LEADING_NUMBER.match(value):
        want = units if isinstance(units, str) else None
        if want is not None:
            return read_quantity(ctx, path, value, want)
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
    return {n: (d, u) for n, (d, u, _) in param_info(cls).items()}


def param_info(cls):
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
        default = p.default if p.default is not inspect.Parameter.empty else MISSING
        if default is None and dataclasses.is_dataclass(cls):
            f = {x.name: x for x in dataclasses.fields(cls)}.get(n)
            if f is not None and f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                default = MISSING
        out[n] = (default, units.get(n), types.get(n, ""))
    return out


def _doc_params(doc):
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


def read_param_value(ctx, path, value, cls, info):
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
        fields = param_info(nested)
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
    return read_si_params(ctx, path, value, unit)


def _pairs(ctx, path, value, klass):
    """``[{coil: {...}, current: 1 A}, ...]`` -> ``[(Coil(...), 1.0), ...]`` (an object and its number)."""
    fields = param_info(klass)
    out = []
    for i, item in enumerate(value):
        objs = [k for k, v in item.items() if isinstance(v, dict)]
        nums = [k for k, v in item.items() if not isinstance(v, dict)]
        if len(objs) != 1 or len(nums) != 1:
            out.append(ctx.err(path + (i,), f"expected {{{klass.__name__.lower()}: {{...}}, <value>: <number>}}, "
                                            f"found keys {sorted(item)}."))
            continue
        obj = _build_object(ctx, path + (i, objs[0]), klass, item[objs[0]], fields)
        num = read_si_params(ctx, path + (i, nums[0]), item[nums[0]])
        if isinstance(num, str) or isinstance(num, bool) or not isinstance(num, (int, float)):
            num = ctx.err(path + (i, nums[0]), f"expected a number, found {type_name(item[nums[0]])}.")
        out.append(BAD if obj is BAD or num is BAD else (obj, float(num)))
    return BAD if any(x is BAD for x in out) else out


def _build_object(ctx, path, cls, spec, fields):
    """``cls(**spec)`` with unit conversion, every problem reported at its key."""
    n0 = len(ctx.problems)
    missing = [n for n, (d, _, _) in fields.items() if d is MISSING and n not in spec]
    for n in missing:
        ctx.err(path, f"missing required parameter {n!r} of {cls.__name__}.")
    kw = {k: read_param_value(ctx, path + (k,), v, cls, fields.get(k)) for k, v in spec.items()}
    if len(ctx.problems) > n0:
        return BAD
    try:
        return cls(**kw)
    except Exception as exc:  # noqa: BLE001 - the nested class's own validation is the user's feedback
        msg = f"{exc}" if isinstance(exc, (FieldplanError, ValueError)) else f"{type(exc).__name__}: {exc}"
        key = next((k for k in sorted(spec, key=len, reverse=True) if re.search(rf"\b{re.escape(k)}\b", msg)), None)
        return ctx.err(path + ((key,) if key else ()), f"cannot build {cls.__name__}: {msg}")


def is_path_param(name, info):
    typ = (info[2] if info else "") or ""
    return (name in ("path", "file", "filename", "directory") or name.endswith(("_path", "_file", "_dir"))
            or "PathLike" in typ)


def resolve_path(scenario_file, value):
    """A relative path in a scenario: against the scenario file's folder if it exists there, else as given."""
    if os.path.isabs(value) or scenario_file is None or scenario_file.startswith("<"):
        return value
    cand = os.path.join(os.path.dirname(os.path.abspath(scenario_file)), value)
    return cand if os.path.exists(cand) or os.path.exists(cand + ".json") else value


def registry_name(cls):
    target = f"{cls.__module__}:{cls.__qualname__}"
    for name, value in available_actuators().items():
        if value == target:
            return name
    return target
