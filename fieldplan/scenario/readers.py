"""Reading values: the validation context that collects every problem with file, line and key, and the typed readers.
"""

from __future__ import annotations

import difflib
import functools
import math
import re

import numpy as np

from ..errors import FieldplanError, ScenarioError, UnitError
from ..units import to_si
from .schema import BAD, SCHEMA
from .yamldoc import key_string

__all__ = ['Context', 'type_name', 'check_keys', 'read_quantity', 'read_number', 'read_int', 'read_bool', 'read_str',
           'read_choice', 'read_point', 'read_points', 'read_key', 'read_keys', 'blame', 'build']

# ----------------------------------------------------------------------------------------------
# Validation context
# ----------------------------------------------------------------------------------------------

class Context:
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


def type_name(v):
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


def check_keys(ctx, path, mapping, schema_name, extra_allowed=()):
    """Report unknown keys (with a suggestion) and missing required keys; True if the mapping is usable."""
    keys = [k for k in SCHEMA[schema_name] if k.name not in ("*", "<section>")]
    allowed = [k.name for k in keys] + list(extra_allowed)
    if not isinstance(mapping, dict):
        ctx.err(path, f"expected a mapping with keys {allowed}, found {type_name(mapping)}.")
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


def read_quantity(ctx, path, value, unit, *, positive=False, nonnegative=False):
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


def read_number(ctx, path, value, *, positive=False, nonnegative=False, lo=None, hi=None):
    if isinstance(value, str):
        try:
            value = to_si(value, "dimensionless", name=str(path[-1]))
        except UnitError as exc:
            return ctx.err(path, str(exc))
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return ctx.err(path, f"expected a finite number, found {type_name(value)}.")
    v = float(value)
    if positive and not v > 0:
        return ctx.err(path, f"must be > 0, found {value!r}.")
    if nonnegative and not v >= 0:
        return ctx.err(path, f"must be >= 0, found {value!r}.")
    if lo is not None and v < lo or hi is not None and v > hi:
        return ctx.err(path, f"must lie in [{lo}, {hi}], found {value!r}.")
    return v


def read_int(ctx, path, value, *, minimum=None):
    if isinstance(value, bool) or not isinstance(value, int):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            return ctx.err(path, f"expected a whole number, found {type_name(value)}.")
    if minimum is not None and value < minimum:
        return ctx.err(path, f"must be >= {minimum}, found {value}.")
    return value


def read_bool(ctx, path, value):
    if not isinstance(value, bool):
        return ctx.err(path, f"expected true or false, found {type_name(value)}.")
    return value


def read_str(ctx, path, value):
    if not isinstance(value, str) or not value.strip():
        return ctx.err(path, f"expected a non-empty text, found {type_name(value)}.")
    return value


def read_choice(ctx, path, value, choices):
    if value not in choices:
        close = difflib.get_close_matches(str(value), list(choices), n=1)
        hint = f" Did you mean {close[0]!r}?" if close else ""
        return ctx.err(path, f"expected one of {list(choices)}, found {type_name(value)}.{hint}")
    return value


def read_point(ctx, path, value, unit="m"):
    if not isinstance(value, (list, tuple)) or len(value) != 2:
        return ctx.err(path, f"expected a point [x, y] in {unit}, found {type_name(value)}.")
    x = read_quantity(ctx, path + (0,), value[0], unit)
    y = read_quantity(ctx, path + (1,), value[1], unit)
    if x is BAD or y is BAD:
        return BAD
    return np.array([x, y])


def read_points(ctx, path, value, unit="m", minimum=1):
    if not isinstance(value, list) or len(value) < minimum:
        return ctx.err(path, f"expected a list of at least {minimum} points [[x, y], ...] in {unit}, "
                             f"found {type_name(value)}.")
    pts = [read_point(ctx, path + (i,), p, unit) for i, p in enumerate(value)]
    if any(p is BAD for p in pts):
        return BAD
    return np.array(pts)


def read_key(ctx, path, value, key, unit=None):
    """One value of a typed :class:`~fieldplan.scenario.fields.Key` (``unit`` overrides ``key.unit``).

    Checks the type (a quantity of the right dimension, a whole number, one of the choices, ...);
    the range of a value is the business of the object it builds.
    """
    unit = key.unit if unit is None else unit
    if key.kind == "quantity":
        return read_quantity(ctx, path, value, unit)
    if key.kind == "number":
        return read_number(ctx, path, value)
    if key.kind == "int":
        return read_int(ctx, path, value)
    if key.kind == "bool":
        return read_bool(ctx, path, value)
    if key.kind == "str":
        return read_str(ctx, path, value)
    if key.kind == "choice":
        return read_choice(ctx, path, value, key.choices)
    if key.kind == "vector3":
        if not isinstance(value, list) or len(value) != 3:
            return ctx.err(path, f"expected three numbers [x, y, z] in {unit}, found {type_name(value)}.")
        comps = [read_quantity(ctx, path + (i,), c, unit) for i, c in enumerate(value)]
        return BAD if any(c is BAD for c in comps) else tuple(comps)
    return value


def read_keys(ctx, path, mapping, schema_name):
    """Read the typed keys of a flat section with defaults; returns a dict (BAD for failed keys)."""
    out = {}
    for k in SCHEMA[schema_name]:
        if k.name in ("*", "<section>") or k.kind in ("section", "list", "map", "shape"):
            continue
        if k.name not in mapping:
            out[k.name] = k.default
            continue
        v = mapping[k.name]
        if v is None and not k.required:
            out[k.name] = k.default
            continue
        out[k.name] = read_key(ctx, path + (k.name,), v, k)
    return out


def blame(path, message, given):
    """The key path a dataclass's error message is about: the given key it names first, else ``path``.

    Parameters
    ----------
    path : tuple
        Key path of the section (used when the message names none of the keys).
    message : str
        The message of the error the dataclass raised (``"Body 'bead': radius must be ..."``).
    given : dict of str to tuple
        Field name -> key path of each value taken from the file.

    Examples
    --------
    >>> blame(("limits",), "ChannelLimit lower 1 exceeds upper 0.5.", {"upper": ("u",), "lower": ("l",)})
    ('l',)
    """
    # Quoted text is a value or a label (a body kind may be called 'radius'), not the key at fault.
    text = re.sub(r"'[^']*'", "''", message)
    hits = [(m.start(), name) for name in given
            for m in [re.search(rf"(?<![\w.]){re.escape(name)}(?![\w])", text)] if m]
    return given[min(hits)[1]] if hits else path


def build(ctx, path, cls, kwargs, given, written=None):
    """``cls(**kwargs)``; an error from its own checks is recorded at the key it names (BAD returned).

    The dataclasses check their values in ``__post_init__``; this turns such a check into a
    scenario problem with file, line and key (see :func:`blame`). ``written`` (field name -> the
    value as the file gives it) adds the text the user wrote, e.g. ``'-5 um'`` beside ``-5e-06``.
    """
    try:
        return cls(**kwargs)
    except FieldplanError as exc:
        where = blame(path, str(exc), given)
        field = next((f for f, p in given.items() if p == where), None)
        raw = (written or {}).get(field)
        note = f" (the file gives {raw!r})" if isinstance(raw, str) else ""
        return ctx.err(where, f"{str(exc).rstrip('.')}{note}.")
