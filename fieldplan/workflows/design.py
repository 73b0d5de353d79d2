"""Design search: choose an actuator's free parameters (and which k of its M fields to keep) for steerability.

A scenario file marks what may change in a ``design:`` section: actuator keys with ranges
(continuous ``[lo, hi]`` with units, or ``{integer: [lo, hi]}``), a subset to keep (``keep: {key:
tones, count: 16}`` -- "keep k of these M" tones, coils, patterns or frequencies), the objective
from :mod:`fieldplan.analysis`, hardware constraints and an evaluation budget. :func:`search` then

1. evaluates the starting design (the file as written; with ``keep``, its first k items);
2. searches the continuous and integer parameters with :func:`scipy.optimize.differential_evolution`
   (its population evaluated in parallel on the executor of :func:`fieldplan.compare.make_executor`),
   :func:`scipy.optimize.dual_annealing`, or plain random (Latin hypercube) sampling;
3. with ``keep``, searches the subset on the best design found: seeded by
   :func:`fieldplan.steer.select_primitives` where the kept items are the fields themselves (checked
   by rebuilding), else by evenly spaced items, then improved by single swaps within the budget.

Every candidate is scored on the *same* random configurations (common random numbers: one seed
for all, as :func:`fieldplan.steer.count_curve` draws them), so differences between candidates are
differences of design, not of luck. Objectives:

* ``steerable_fraction`` -- fraction of random configurations of ``count`` bodies steerable now,
  with its 95 % Wilson interval;
* ``largest_n`` -- the largest N in ``counts`` steerable in at least ``at_least`` of the
  configurations; ties broken by the fraction at the next N (score ``N + f(next N)``, which keeps
  the order of N since ``f(next N) < at_least <= 1``);
* ``worst_speed`` -- a statistic (mean, median, 10th percentile or minimum) of one body's
  worst-direction speed over the free space (:func:`fieldplan.steer.speed_map`), m/s.

The search result is never worse than the start: the start is candidate 0 and the best is the
maximum over every feasible candidate evaluated. Infeasible candidates (a constraint broken, or the
actuator cannot be built there) are kept in the table with the reason.
"""

from __future__ import annotations

import dataclasses
import difflib
import json
import math
import os
import re
import sys
import time
from dataclasses import dataclass, field

import numpy as np

from ..errors import FieldplanError, ScenarioError, UnitError
from ..fileio import atomic_write, check_output_folder, json_safe, output_folder
from ..units import format_quantity, si_scale, to_si

__all__ = ["DesignSpec", "FreeParameter", "KeepSpec", "Candidate", "DesignResult", "MAX_EVALUATIONS",
           "load_design", "parse_design", "search", "closed_loop_check", "write_design", "design_command",
           "plot_objective", "plot_speed_maps", "plot_count_curves", "plot_closed_loop", "OBJECTIVES"]

#: Largest evaluation budget of one search (each evaluation builds an actuator and scores it).
MAX_EVALUATIONS = 5_000
#: Largest number of random configurations per N, of N values, of bodies, and speed-map grid side.
MAX_TRIALS, MAX_COUNTS, MAX_BODIES, MAX_GRID = 2_000, 32, 64, 256
#: Largest total of steerability tests of one search (evaluations x configurations, or x grid cells).
MAX_WORK = 20_000_000
#: Largest number of free parameters and of items a ``keep`` list may hold.
MAX_FREE, MAX_ITEMS = 64, 2_000
#: Largest closed-loop trials per N of the final check.
MAX_CHECK_TRIALS = 200
OBJECTIVES = ("steerable_fraction", "largest_n", "worst_speed")
SEARCHES = ("evolution", "annealing", "random")
STATISTICS = ("mean", "median", "p10", "min")
# A range wider than this many orders of magnitude of its larger end (or spanning more than 1e6 of
# the start's scale) is almost certainly a unit slip ("90 m" for "90 mm"); refused.
_MAX_RANGE_DECADES = 6.0
# A length range wider than this many workspace spans is refused for the same reason.
_MAX_LENGTH_SPANS = 1e3
# Loss of an infeasible candidate: above any feasible loss (feasible scores are >= 0), plus the
# relative violation so the search is still pulled towards the feasible region.
_PENALTY = 1e3
# Units tried for a range given with units when the key's unit is not documented.
_UNIT_GUESSES = ("m", "Hz", "A", "V", "T", "s", "rad", "W", "ohm", "kg/m^3", "Pa")

_KEYS = {"objective", "count", "counts", "at_least", "trials", "grid", "statistic", "search", "evaluations",
         "seed", "free", "keep", "constraints", "final_check"}
_CONSTRAINTS = {"edge_margin", "min_spacing", "max_total_power", "max_current", "max_voltage"}


# -- key paths into the actuator section ---------------------------------------------------------------
_TOKEN = re.compile(r"\s*(?:(?P<name>[A-Za-z_][\w\-]*)|\[(?P<index>\d+|\*)\])\s*(?P<dot>\.)?")


def _parse_path(text):
    """``"coils[*].center[2]"`` -> ``("coils", "*", "center", 2)``; ValueError when malformed."""
    out, pos = [], 0
    text = str(text).strip()
    if not text:
        raise ValueError("empty key")
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if not m or m.end() == pos:
            raise ValueError(f"cannot read {text!r} at character {pos + 1}")
        if m.group("name") is not None:
            if out and not text[pos - 1:pos] == "." and pos != 0:
                raise ValueError(f"a name must follow a '.' in {text!r}")
            out.append(m.group("name"))
        else:
            idx = m.group("index")
            out.append("*" if idx == "*" else int(idx))
        pos = m.end()
    return tuple(out)


def _expand(data, path):
    """Concrete paths (no ``*``) of ``path`` in ``data``; KeyError naming the missing piece."""
    paths = [()]
    for p in path:
        nxt = []
        for q in paths:
            node = _get(data, q)
            if p == "*":
                if not isinstance(node, list):
                    raise KeyError(f"{_fmt_path(q) or 'the actuator'} is not a list, so [*] cannot apply")
                nxt.extend(q + (i,) for i in range(len(node)))
            elif isinstance(p, int):
                if not isinstance(node, list) or p >= len(node):
                    n = len(node) if isinstance(node, list) else 0
                    raise KeyError(f"{_fmt_path(q + (p,))} does not exist ({_fmt_path(q) or 'it'} has {n} items)")
                nxt.append(q + (p,))
            else:
                if not isinstance(node, dict) or p not in node:
                    keys = list(node) if isinstance(node, dict) else []
                    close = difflib.get_close_matches(p, keys, n=1, cutoff=0.6)
                    hint = f"; did you mean {close[0]!r}?" if close else (f"; keys there: {', '.join(keys)}" if keys else "")
                    raise KeyError(f"the actuator section has no key {_fmt_path(q + (p,))!r}{hint}")
                nxt.append(q + (p,))
        paths = nxt
    return paths


def _get(data, path):
    for p in path:
        data = data[p]
    return data


def _set(data, path, value):
    for p in path[:-1]:
        data = data[p]
    data[path[-1]] = value


def _fmt_path(path):
    out = ""
    for p in path:
        out += f"[{p}]" if isinstance(p, int) or p == "*" else ("." if out else "") + str(p)
    return out


def _copy(data):
    return json.loads(json.dumps(data))


# -- the design section --------------------------------------------------------------------------------
@dataclass
class FreeParameter:
    """One free actuator key.

    Attributes
    ----------
    key : str
        As written (``"supports[0][0]"``; ``[*]`` sets every item to the same value).
    path : tuple
    kind : {"continuous", "integer"}
    lower, upper : float
        SI (``unit``).
    unit : str
        SI unit ("" when dimensionless or unknown).
    start : float
        The value in the scenario as written (the first item's for ``[*]``).
    """

    key: str
    path: tuple
    kind: str
    lower: float
    upper: float
    unit: str
    start: float


@dataclass
class KeepSpec:
    """``keep: {key, count}``: keep ``count`` of the ``M`` items of a list-valued actuator key.

    Attributes
    ----------
    key : str
    path : tuple
    count : int
        k.
    items : list
        The M items (from the file, or the start actuator's primitives when the key is not a list).
    labels : list of str
        One short label per item (for tables).
    fields : bool
        True when the items are the fields of the basis one for one (checked by rebuilding), so a
        subset is scored by :func:`fieldplan.steer.subset` without rebuilding the actuator.
    """

    key: str
    path: tuple
    count: int
    items: list
    labels: list
    fields: bool = False


@dataclass
class DesignSpec:
    """The validated ``design:`` section (SI)."""

    objective: str = "largest_n"
    count: int = 2
    counts: tuple = (1, 2, 3, 4, 5, 6)
    at_least: float = 0.5
    trials: int = 24
    grid: tuple = (24, 24)
    statistic: str = "mean"
    search: str = "evolution"
    evaluations: int = 60
    seed: int = 0
    free: list = field(default_factory=list)
    keep: KeepSpec | None = None
    constraints: dict = field(default_factory=dict)
    final_check: dict = field(default_factory=lambda: {"counts": None, "trials": 3})
    source: str = "<design>"
    allow_modules: tuple = ()
    #: The file's own ``limits`` section (``all_channels`` applies to however many channels a candidate has).
    limits: object = None


class _Problems:
    def __init__(self, doc):
        self.doc, self.items = doc, []

    def err(self, path, message):
        # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
        from ..scenario import key_string  # noqa: PLC0415

        self.items.append((self.doc.file, self.doc.line(path), key_string(path), message))

    def raise_if_any(self):
        if self.items:
            raise ScenarioError(self.items)


def _whole(probs, path, v, lo, hi):
    if isinstance(v, float) and v.is_integer():
        v = int(v)
    if isinstance(v, bool) or not isinstance(v, int):
        probs.err(path, f"expected a whole number in [{lo}, {hi}], found {v!r}.")
        return None
    if not lo <= v <= hi:
        probs.err(path, f"must lie in [{lo}, {hi}], found {v}.")
        return None
    return v


def _unit_of(value, unit_hint):
    """SI value and unit of one range end: a number (SI, unit ``unit_hint``) or a unit string."""
    if isinstance(value, bool) or value is None:
        raise UnitError(f"expected a number or a quantity such as '5 mm', found {value!r}")
    if not isinstance(value, str):
        if not isinstance(value, (int, float)) or not math.isfinite(value):
            raise UnitError(f"expected a finite number, found {value!r}")
        return float(value), unit_hint or ""
    if unit_hint:
        return to_si(value, unit_hint), unit_hint
    for u in _UNIT_GUESSES:
        try:
            return to_si(value, u), u
        except UnitError:
            continue
    return to_si(value, "dimensionless"), ""


def _key_unit(cls, path):
    """The documented SI unit of a top-level actuator key, else None."""
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..scenario import actuator_params  # noqa: PLC0415

    try:
        info = actuator_params(cls)
    except Exception:  # noqa: BLE001 - undocumented plug-in: no hint
        return None
    unit = info.get(path[0], (None, None))[1]
    return None if unit in (None, "", "1", "dimensionless") else unit


def parse_design(doc, scenario, *, allow_modules=()):
    """Validate the ``design:`` section of a scenario document.

    Parameters
    ----------
    doc : fieldplan.scenario.YamlDoc
        The document (for line numbers), as :func:`fieldplan.scenario.read_yaml` returns it.
    scenario : Scenario
        The scenario built from the same document (its actuator is the start design).
    allow_modules : sequence of str

    Returns
    -------
    DesignSpec

    Raises
    ------
    ScenarioError
        Every problem, each naming file, line and key (``design.free.supports[0][0]``).
    """
    probs = _Problems(doc)
    data = doc.data if isinstance(doc.data, dict) else {}
    d = data.get("design")
    base = ("design",)
    if not isinstance(d, dict):
        probs.err(base, "expected a mapping with 'objective', 'free' and/or 'keep', found "
                        + ("nothing" if d is None else type(d).__name__) + ".")
        probs.raise_if_any()
    for k in d:
        if k not in _KEYS:
            close = difflib.get_close_matches(str(k), sorted(_KEYS), n=1, cutoff=0.6)
            probs.err(base + (k,), f"unknown key {k!r}." + (f" Did you mean {close[0]!r}?" if close else
                                                            f" Allowed keys: {', '.join(sorted(_KEYS))}."))
    spec = DesignSpec(source=doc.file, limits=_copy(data.get("limits")) if data.get("limits") is not None else None)
    obj = d.get("objective", spec.objective)
    if obj not in OBJECTIVES:
        close = difflib.get_close_matches(str(obj), OBJECTIVES, n=1)
        probs.err(base + ("objective",), f"expected one of {list(OBJECTIVES)}, found {obj!r}."
                  + (f" Did you mean {close[0]!r}?" if close else ""))
    else:
        spec.objective = obj
    if "count" in d:
        spec.count = _whole(probs, base + ("count",), d["count"], 1, MAX_BODIES) or spec.count
    if "counts" in d:
        c = d["counts"]
        if not isinstance(c, list) or not c or len(c) > MAX_COUNTS:
            probs.err(base + ("counts",), f"expected a list of 1 to {MAX_COUNTS} body counts, found {c!r}.")
        else:
            vals = [_whole(probs, base + ("counts", i), v, 1, MAX_BODIES) for i, v in enumerate(c)]
            if all(v is not None for v in vals):
                if len(set(vals)) != len(vals):
                    probs.err(base + ("counts",), f"counts repeat a value: {vals}.")
                spec.counts = tuple(sorted(set(vals)))
    if "at_least" in d:
        v = d["at_least"]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0 < v <= 1:
            probs.err(base + ("at_least",), f"expected a fraction in (0, 1], found {v!r}.")
        else:
            spec.at_least = float(v)
    if "trials" in d:
        spec.trials = _whole(probs, base + ("trials",), d["trials"], 1, MAX_TRIALS) or spec.trials
    if "grid" in d:
        g = d["grid"]
        g = [g, g] if isinstance(g, int) and not isinstance(g, bool) else g
        if not isinstance(g, list) or len(g) != 2:
            probs.err(base + ("grid",), f"expected a side or [ny, nx] of the speed-map grid, found {g!r}.")
        else:
            vals = [_whole(probs, base + ("grid", i), v, 2, MAX_GRID) for i, v in enumerate(g)]
            if all(v is not None for v in vals):
                spec.grid = tuple(vals)
    for key, choices in (("statistic", STATISTICS), ("search", SEARCHES)):
        if key in d:
            if d[key] not in choices:
                probs.err(base + (key,), f"expected one of {list(choices)}, found {d[key]!r}.")
            else:
                setattr(spec, key, d[key])
    if "evaluations" in d:
        spec.evaluations = _whole(probs, base + ("evaluations",), d["evaluations"], 2, MAX_EVALUATIONS) \
            or spec.evaluations
    if "seed" in d:
        v = _whole(probs, base + ("seed",), d["seed"], 0, 2**32 - 1)
        spec.seed = spec.seed if v is None else v
    acfg = scenario.config.get("actuator") or {}
    cls = type(scenario.actuator)
    x0, y0, x1, y1 = scenario.workspace.bounds
    span = max(x1 - x0, y1 - y0)
    free = d.get("free") or {}
    if not isinstance(free, dict):
        probs.err(base + ("free",), "expected a mapping of actuator key -> range, e.g. "
                                    "'supports[0][0]: [-80 mm, 80 mm]'.")
        free = {}
    if len(free) > MAX_FREE:
        probs.err(base + ("free",), f"at most {MAX_FREE} free parameters, found {len(free)}.")
        free = {}
    for key, rng_spec in free.items():
        p = _free_parameter(probs, base + ("free", key), key, rng_spec, acfg, cls, span)
        if p is not None:
            spec.free.append(p)
    if "keep" in d:
        spec.keep = _keep(probs, base + ("keep",), d["keep"], acfg, scenario)
    if not spec.free and spec.keep is None:
        probs.err(base, "nothing to search: give free parameters under 'free' and/or a subset under 'keep'.")
    if "constraints" in d:
        spec.constraints = _constraints(probs, base + ("constraints",), d["constraints"], acfg, scenario)
    if "final_check" in d:
        fc = d["final_check"]
        if not isinstance(fc, dict) or set(fc) - {"counts", "trials"}:
            probs.err(base + ("final_check",), f"expected a mapping with 'counts' and/or 'trials', found {fc!r}.")
        else:
            out = dict(spec.final_check)
            if "trials" in fc:
                out["trials"] = _whole(probs, base + ("final_check", "trials"), fc["trials"], 1, MAX_CHECK_TRIALS) or 3
            if "counts" in fc:
                c = fc["counts"]
                if not isinstance(c, list) or not c or len(c) > MAX_COUNTS:
                    probs.err(base + ("final_check", "counts"), f"expected a list of body counts, found {c!r}.")
                else:
                    vals = [_whole(probs, base + ("final_check", "counts", i), v, 1, MAX_BODIES)
                            for i, v in enumerate(c)]
                    out["counts"] = tuple(sorted({v for v in vals if v is not None}))
            spec.final_check = out
    if spec.objective == "steerable_fraction":
        spec.counts = (spec.count,)
    if spec.objective == "worst_speed":
        work, what = spec.evaluations * spec.grid[0] * spec.grid[1], "evaluations x grid cells"
    else:
        work, what = spec.evaluations * spec.trials * len(spec.counts), "evaluations x trials x counts"
    if work > MAX_WORK:
        probs.err(base + ("evaluations",), f"{what} = {work:,} exceeds {MAX_WORK:,} steerability tests "
                                           "(fieldplan.design.MAX_WORK); lower the budget, trials or grid.")
    probs.raise_if_any()
    return spec


def _free_parameter(probs, ypath, key, spec, acfg, cls, span):
    try:
        path = _parse_path(key)
        concrete = _expand(acfg, path)
    except (ValueError, KeyError) as exc:
        probs.err(ypath, f"{str(exc).strip(chr(39))}. A free key is a path into the actuator section, e.g. "
                         "'supports[0][0]', 'coils[*].center[2]' or 'layout.pad_array.gap'.")
        return None
    if not concrete:
        probs.err(ypath, f"{key!r} matches no value (an empty list).")
        return None
    starts = [_get(acfg, q) for q in concrete]
    if any(isinstance(s, bool) or not isinstance(s, (int, float)) for s in starts):
        probs.err(ypath, f"{key!r} holds {starts[0]!r}, not a number; a free key must name a number "
                         "(index into lists, e.g. 'supports[0][1]').")
        return None
    kind, unit_hint, rng = "continuous", None, spec
    if isinstance(spec, dict):
        allowed = {"range", "integer", "unit"}
        bad = set(spec) - allowed
        if bad or ("range" in spec) == ("integer" in spec):
            probs.err(ypath, f"expected [lo, hi], {{range: [lo, hi], unit: m}} or {{integer: [lo, hi]}}, found {spec!r}.")
            return None
        kind = "integer" if "integer" in spec else "continuous"
        rng = spec.get("range", spec.get("integer"))
        unit_hint = spec.get("unit")
        if unit_hint is not None and not isinstance(unit_hint, str):
            probs.err(ypath + ("unit",), f"expected an SI unit name such as 'm', found {unit_hint!r}.")
            return None
    if not isinstance(rng, list) or len(rng) != 2:
        probs.err(ypath, f"expected a range [lo, hi] (numbers in SI, or quantities such as '5 mm'), found {rng!r}.")
        return None
    if kind == "integer":
        vals = [_whole(probs, ypath + (i,), v, -10**9, 10**9) for i, v in enumerate(rng)]
        if any(v is None for v in vals):
            return None
        lo, hi, unit = float(vals[0]), float(vals[1]), ""
        if any(float(s) != int(s) for s in starts):
            probs.err(ypath, f"{key!r} holds {starts[0]!r}, not a whole number; use a continuous range.")
            return None
    else:
        if unit_hint is None:
            unit_hint = _key_unit(cls, path) if len(path) == 1 else None
        try:
            lo, u0 = _unit_of(rng[0], unit_hint)
            hi, u1 = _unit_of(rng[1], unit_hint or (u0 if isinstance(rng[0], str) else None))
        except UnitError as exc:
            probs.err(ypath, f"cannot read the range: {exc}.")
            return None
        if u0 and u1 and u0 != u1:
            probs.err(ypath, f"the range ends have different units ({u0} and {u1}).")
            return None
        unit = u0 or u1
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        probs.err(ypath, f"the range must satisfy lo < hi, found [{rng[0]}, {rng[1]}].")
        return None
    s0 = float(starts[0])
    if kind == "continuous" and unit == "m" and span and hi - lo > _MAX_LENGTH_SPANS * span:
        probs.err(ypath, f"the range [{rng[0]}, {rng[1]}] is more than {_MAX_LENGTH_SPANS:g} times the workspace "
                         f"({format_quantity(span, 'm')} across): check the unit.")
        return None
    if kind == "continuous" and unit != "m" and s0 != 0 and hi - lo > 10 ** _MAX_RANGE_DECADES * abs(s0):
        probs.err(ypath, f"the range [{rng[0]}, {rng[1]}] is more than 1e{_MAX_RANGE_DECADES:g} times the start "
                         f"value {format_quantity(s0, unit)}: check the unit.")
        return None
    if kind == "integer" and hi - lo > 10_000:
        probs.err(ypath, f"an integer range wider than 10000 values is refused, found [{int(lo)}, {int(hi)}].")
        return None
    if not lo <= s0 <= hi:
        probs.err(ypath, f"the start value {format_quantity(s0, unit)} (in the actuator section) lies outside the "
                         f"range [{format_quantity(lo, unit)}, {format_quantity(hi, unit)}]; widen the range or "
                         "move the start inside it.")
        return None
    return FreeParameter(str(key), path, kind, lo, hi, unit, s0)


def _keep(probs, ypath, spec, acfg, scenario):
    if not isinstance(spec, dict) or set(spec) - {"key", "count"} or "key" not in spec or "count" not in spec:
        probs.err(ypath, f"expected {{key: <list-valued actuator key>, count: k}}, found {spec!r}.")
        return None
    key = spec["key"]
    try:
        path = _parse_path(key)
        if "*" in path:
            raise ValueError("[*] cannot be used in keep.key")
    except ValueError as exc:
        probs.err(ypath + ("key",), f"{exc}.")
        return None
    node, parent_ok = acfg, True
    for p in path[:-1]:
        try:
            node = node[p]
        except (KeyError, IndexError, TypeError):
            parent_ok = False
            break
    if not parent_ok or not isinstance(node, dict):
        probs.err(ypath + ("key",), f"the actuator section has no place for {key!r}.")
        return None
    act = scenario.actuator
    items = node.get(path[-1])
    if isinstance(items, list) and items:
        labels = [_label(x) for x in items]
    else:
        # Not listed in the file: the start actuator's primitives are the items (checked later by rebuilding).
        try:
            prims = act.primitives()
        except Exception:  # noqa: BLE001
            prims = []
        if not prims:
            probs.err(ypath + ("key",), f"{key!r} is not a list in the actuator section and the actuator has no "
                                        "primitives to take the items from; list the items explicitly.")
            return None
        items = [[float(v) for v in p.values] for p in prims]
        labels = [p.name for p in prims]
    M = len(items)
    if M > MAX_ITEMS:
        probs.err(ypath + ("key",), f"{key!r} holds {M} items; at most {MAX_ITEMS} are searched.")
        return None
    k = _whole(probs, ypath + ("count",), spec["count"], 1, max(M - 1, 1))
    if k is None:
        return None
    if M < 2:
        probs.err(ypath + ("key",), f"{key!r} holds {M} item; keeping a subset needs at least 2.")
        return None
    return KeepSpec(str(key), path, int(k), items, labels)


def _label(x):
    if isinstance(x, dict):
        return ",".join(f"{k}={_label(v)}" for k, v in list(x.items())[:2])
    if isinstance(x, list):
        return "(" + ", ".join(_label(v) for v in x[:3]) + (", ..." if len(x) > 3 else "") + ")"
    if isinstance(x, float):
        return f"{x:.6g}"
    return str(x)


def _constraints(probs, ypath, spec, acfg, scenario):
    if not isinstance(spec, dict):
        probs.err(ypath, f"expected a mapping of constraints ({', '.join(sorted(_CONSTRAINTS))}), found {spec!r}.")
        return {}
    out = {}
    for name, v in spec.items():
        p = ypath + (name,)
        if name not in _CONSTRAINTS:
            close = difflib.get_close_matches(str(name), sorted(_CONSTRAINTS), n=1, cutoff=0.6)
            probs.err(p, f"unknown constraint {name!r}." + (f" Did you mean {close[0]!r}?" if close else
                                                             f" Known: {', '.join(sorted(_CONSTRAINTS))}."))
            continue
        try:
            if name in ("edge_margin", "min_spacing"):
                amount_key = "margin" if name == "edge_margin" else "distance"
                if not isinstance(v, dict) or set(v) != {"points", amount_key}:
                    probs.err(p, f"expected {{points: <actuator key of points, e.g. 'supports[*]'>, {amount_key}: "
                                 f"<length>}}, found {v!r}.")
                    continue
                path = _parse_path(v["points"])
                _expand(acfg, path)
                amount = to_si(v[amount_key], "m", amount_key)
                if amount < 0 or (name == "min_spacing" and amount == 0):
                    probs.err(p + (amount_key,), f"must be {'> 0' if name == 'min_spacing' else '>= 0'} m, "
                                                 f"found {v[amount_key]!r}.")
                    continue
                if name == "edge_margin" and not getattr(scenario.actuator, "extent", None):
                    probs.err(p, "the actuator declares no extent (plate edges) to keep the points inside.")
                    continue
                out[name] = (path, amount)
            else:
                unit = {"max_total_power": "W", "max_current": "A", "max_voltage": "V"}[name]
                val = to_si(v, unit, name)
                if not val > 0:
                    probs.err(p, f"must be > 0 {unit}, found {v!r}.")
                    continue
                if name == "max_total_power":
                    pw = getattr(scenario.actuator, "power", None)
                    ub = np.array([max(abs(c.lower), abs(c.upper)) for c in scenario.actuator.channels])
                    if not callable(pw) or not np.all(np.isfinite(np.asarray(pw(ub), dtype=float))):
                        probs.err(p, "the actuator gives no dissipated power for its channels (a power(u) method "
                                     "with every coil's resistance, Ohm); give the coils a 'resistance'.")
                        continue
                out[name] = val
        except (ValueError, KeyError, UnitError) as exc:
            probs.err(p, str(exc).strip("'\"") + ".")
    return out


def load_design(path, *, allow_modules=()):
    """Read a scenario file with a ``design:`` section.

    Parameters
    ----------
    path : str or os.PathLike
        The scenario file, or YAML text (anything with a newline).
    allow_modules : sequence of str
        As in :func:`fieldplan.scenario.load_scenario`.

    Returns
    -------
    scenario : Scenario
        The start design.
    spec : DesignSpec

    Raises
    ------
    ScenarioError
        Naming file, line and key of every problem.
    """
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..scenario import load_scenario, read_yaml  # noqa: PLC0415

    sc = load_scenario(path, allow_modules=allow_modules)
    if isinstance(path, str) and "\n" in path:
        text, file = path, "<scenario>"
    else:
        file = os.fspath(path)
        with open(file, encoding="utf-8") as fh:
            text = fh.read()
    doc = read_yaml(text, file)
    if not isinstance(doc.data, dict) or "design" not in doc.data:
        raise ScenarioError([(file, 1, "design", "the file has no 'design:' section; add one naming the free "
                                                  "actuator keys (see the README, 'Design search').")])
    if sc.actuator is None:
        raise ScenarioError([(file, doc.line(("actuator",)), "actuator", "the actuator was not imported; pass "
                                                                          "--allow-module to search its design.")])
    spec = parse_design(doc, sc, allow_modules=allow_modules)
    spec.allow_modules = tuple(allow_modules)
    return sc, spec


# -- building and scoring candidates ---------------------------------------------------------------------
class _Cycle:
    """Picklable ``n -> list of Body``: the scenario's bodies repeated in file order."""

    def __init__(self, bodies):
        self.bodies = list(bodies)

    def __call__(self, n):
        return [self.bodies[i % len(self.bodies)] for i in range(int(n))]


class _SubsetBasis:
    """Picklable ``xy -> FieldBasis`` keeping only some fields of another basis function."""

    def __init__(self, fn, indices):
        self.fn, self.indices = fn, list(indices)

    @property
    def radius(self):
        return self.fn.radius

    def __call__(self, xy):
        # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
        from ..analysis import subset  # noqa: PLC0415

        return subset(self.fn(xy), self.indices)


class _Builder:
    """Candidate scenarios from the start scenario's normalised form (picklable, plain data)."""

    def __init__(self, scenario, spec):
        # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
        from ..scenario import scenario_to_dict  # noqa: PLC0415

        self.base = _copy(scenario_to_dict(scenario))
        # The normalised limits list every channel of the start design with its bounds then; a
        # candidate with other channels or bounds takes the file's own section instead.
        self.base.pop("limits", None)
        if spec.limits is not None:
            self.base["limits"] = _copy(spec.limits)
        self.file = str(scenario.source or "<scenario>")
        self.free = list(spec.free)
        self.keep = spec.keep
        self.allow_modules = tuple(spec.allow_modules)

    def config(self, x, kept=None, full_list=False):
        """The actuator section of candidate ``x`` (SI), keeping items ``kept`` (all if ``full_list``)."""
        acfg = _copy(self.base["actuator"])
        if self.keep is not None:
            _set(acfg, self.keep.path, _copy(self.keep.items))
        # Free keys index the items as listed in the file ("coils[0]" is the file's first coil, kept or not).
        for p, v in zip(self.free, x):
            val = int(round(v)) if p.kind == "integer" else float(v)
            for q in _expand(acfg, p.path):
                _set(acfg, q, val)
        if self.keep is not None and not (full_list or kept is None):
            items = _get(acfg, self.keep.path)
            _set(acfg, self.keep.path, [items[i] for i in kept])
        return acfg

    def scenario(self, acfg):
        # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
        from ..scenario import YamlDoc, parse_scenario  # noqa: PLC0415

        d = dict(self.base)
        d["actuator"] = acfg
        return parse_scenario(YamlDoc(d, {}, f"{self.file} (design candidate)", ""),
                              allow_modules=self.allow_modules)


def _violations(constraints, acfg, act):
    """List of (relative amount, message) of every broken constraint."""
    out = []
    for name, val in constraints.items():
        if name == "edge_margin":
            path, margin = val
            x0, x1, y0, y1 = act.extent
            for q in _expand(acfg, path):
                px, py = (float(c) for c in _get(acfg, q)[:2])
                over = max(x0 + margin - px, px - (x1 - margin), y0 + margin - py, py - (y1 - margin))
                if over > 1e-12:
                    out.append((over / max(x1 - x0, y1 - y0),
                                f"{_fmt_path(q)} at ({format_quantity(px, 'm')}, {format_quantity(py, 'm')}) is closer "
                                f"than {format_quantity(margin, 'm')} to the edge"))
        elif name == "min_spacing":
            path, dist = val
            pts = np.array([[float(c) for c in _get(acfg, q)] for q in _expand(acfg, path)], dtype=float)
            for i in range(len(pts)):
                for j in range(i + 1, len(pts)):
                    gap = float(np.linalg.norm(pts[i] - pts[j]))
                    if gap < dist:
                        out.append(((dist - gap) / dist, f"points {i} and {j} of {_fmt_path(path)} are "
                                                         f"{format_quantity(gap, 'm')} apart (< {format_quantity(dist, 'm')})"))
        elif name == "max_total_power":
            ub = np.array([max(abs(c.lower), abs(c.upper)) for c in act.channels])
            total = float(np.nansum(np.asarray(act.power(ub), dtype=float)))
            if total > val:
                out.append(((total - val) / val, f"total power at full current {format_quantity(total, 'W')} > "
                                                 f"{format_quantity(val, 'W')}"))
        else:
            unit = "A" if name == "max_current" else "V"
            for c in act.channels:
                top = max(abs(c.lower), abs(c.upper))
                if c.unit == unit and top > val * (1 + 1e-12):
                    out.append(((top - val) / val, f"channel {c.name} reaches {format_quantity(top, unit)} > "
                                                   f"{format_quantity(val, unit)}"))
    return out


def _statistic(speeds, name):
    if speeds.size == 0:
        return 0.0
    if name == "mean":
        return float(np.mean(speeds))
    if name == "median":
        return float(np.median(speeds))
    if name == "p10":
        return float(np.percentile(speeds, 10))
    return float(np.min(speeds))


class _Evaluator:
    """Scores one candidate ``(x, kept)``; picklable, so it runs in worker processes."""

    def __init__(self, builder, spec, scenario):
        self.builder = builder
        self.objective, self.counts, self.at_least = spec.objective, tuple(spec.counts), spec.at_least
        self.trials, self.grid, self.statistic, self.seed = spec.trials, spec.grid, spec.statistic, spec.seed
        self.constraints = spec.constraints
        self.workspace = scenario.workspace
        self.bodies = _Cycle(scenario.bodies)
        self.fast_keep = spec.keep is not None and spec.keep.fields
        self._cache = (None, None)

    def actuator(self, x, kept):
        acfg = self.builder.config(x, kept, full_list=self.fast_keep)
        key = json.dumps(acfg, sort_keys=True)
        if self._cache[0] == key:
            return acfg, self._cache[1]
        sc = self.builder.scenario(acfg)
        self._cache = (key, sc.actuator)
        return acfg, sc.actuator

    def basis_functions(self, act, kept):
        # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
        from ..analysis import basis_function  # noqa: PLC0415

        fn = basis_function(act, self.bodies, self.workspace.medium)
        one = basis_function(act, self.bodies(1)[0], self.workspace.medium)
        if self.fast_keep and kept is not None:
            fn, one = _SubsetBasis(fn, kept), _SubsetBasis(one, kept)
        return fn, one

    def __call__(self, task):
        # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
        from ..analysis import count_curve, speed_map  # noqa: PLC0415

        x, kept = task
        rec = {"feasible": False, "score": -math.inf, "loss": _PENALTY * 10, "message": ""}
        try:
            acfg, act = self.actuator(x, kept)
        except (FieldplanError, ValueError) as exc:
            rec["message"] = "cannot build: " + " ".join(str(exc).split())[:300]
            return rec
        if self.fast_keep and kept is not None:
            # Scored with every item built in, but the design is the subset: constrain that one.
            acfg = self.builder.config(x, kept)
            needs_act = any(k in self.constraints for k in ("edge_margin", "max_total_power", "max_current",
                                                            "max_voltage"))
            try:
                cact = self.builder.scenario(acfg).actuator if needs_act else act
            except (FieldplanError, ValueError) as exc:
                rec["message"] = "cannot build: " + " ".join(str(exc).split())[:300]
                return rec
        else:
            cact = act
        bad = _violations(self.constraints, acfg, cact)
        if bad:
            rec["loss"] = _PENALTY + sum(b[0] for b in bad)
            rec["message"] = "; ".join(b[1] for b in bad)[:300]
            return rec
        fn, one = self.basis_functions(act, kept)
        try:
            if self.objective == "worst_speed":
                m = speed_map(one, self.workspace, shape=self.grid)
                vals = np.nan_to_num(m.speed[m.free])
                score = _statistic(vals, self.statistic)
                rec.update(speed=score, dead_fraction=m.dead_fraction)
            else:
                c = count_curve(fn, self.workspace, self.counts, trials=self.trials, rng=self.seed, progress=False)
                frac = {int(n): float(f) for n, f in zip(c.counts, c.fraction)}
                rec["fractions"] = frac
                if self.objective == "steerable_fraction":
                    score = frac[self.counts[0]]
                    i = 0
                else:
                    n_star = c.max_steerable(self.at_least)
                    nxt = [n for n in c.counts if n > n_star]
                    score = n_star + (frac[int(nxt[0])] if nxt else 0.0)
                    i = int(np.flatnonzero(c.counts == n_star)[0]) if n_star in c.counts else 0
                    rec["largest_n"] = n_star
                rec.update(fraction=float(c.fraction[i]), low=float(c.low[i]), high=float(c.high[i]),
                           at_n=int(c.counts[i]), size=int(c.size), mode=c.mode)
        except (FieldplanError, ValueError) as exc:
            rec["message"] = "cannot score: " + " ".join(str(exc).split())[:300]
            return rec
        rec.update(feasible=True, score=float(score))
        return rec


# -- results ---------------------------------------------------------------------------------------------
@dataclass
class Candidate:
    """One evaluated design.

    Attributes
    ----------
    index : int
        Order of evaluation (0 is the start).
    phase : str
        ``start``, ``continuous``, ``seed`` (the select_primitives or evenly spread subset), ``swap``.
    x : tuple of float
        Free parameter values, SI, in ``spec.free`` order.
    kept : tuple of int or None
        Indices of the kept items.
    score : float
        Objective (``-inf`` when infeasible).
    feasible : bool
    message : str
        Why a candidate is infeasible.
    metrics : dict
        ``fraction``, ``low``, ``high`` (95 % Wilson interval), ``at_n``, ``fractions`` (N -> fraction),
        ``largest_n``, ``speed``...
    """

    index: int
    phase: str
    x: tuple
    kept: tuple | None
    score: float
    feasible: bool
    message: str
    metrics: dict


@dataclass
class DesignResult:
    """Outcome of :func:`search`.

    Attributes
    ----------
    spec : DesignSpec
    start, best : Candidate
    candidates : list of Candidate
    start_scenario, best_scenario : Scenario
        Ready to plan (``best_scenario`` is what ``fieldplan design`` writes as ``best.yaml``).
    references : dict
        Context scores on the same configurations: ``all_items`` (every one of the M items kept) and
        ``select_primitives`` (the greedy subset alone), when ``keep`` is given.
    success : bool
        The best is feasible (always, unless the start itself is infeasible and nothing else was).
    message : str
    elapsed : float
        s of wall time.
    """

    spec: DesignSpec
    start: Candidate
    best: Candidate
    candidates: list
    start_scenario: object
    best_scenario: object
    references: dict = field(default_factory=dict)
    success: bool = True
    message: str = ""
    elapsed: float = 0.0

    @property
    def improved(self):
        """The best scores strictly above the start."""
        return self.best.score > self.start.score

    def describe(self, cand):
        """One line: objective value with its Wilson interval and the parameter values."""
        spec = self.spec
        m = cand.metrics
        if not cand.feasible:
            return f"infeasible ({cand.message})"
        if spec.objective == "worst_speed":
            head = f"{spec.statistic} worst-direction speed {format_quantity(cand.score, 'm/s', 4)}"
        elif spec.objective == "steerable_fraction":
            head = (f"steerable fraction at N = {m['at_n']}: {m['fraction']:.2f} "
                    f"(95 % Wilson {m['low']:.2f}-{m['high']:.2f}, {spec.trials} configurations)")
        else:
            head = (f"largest N steerable in >= {spec.at_least:.0%}: {m['largest_n']} (fraction {m['fraction']:.2f}, "
                    f"95 % Wilson {m['low']:.2f}-{m['high']:.2f}; score {cand.score:.3f})")
        parts = [f"{p.key} = {format_quantity(v, p.unit, 4) if p.kind == 'continuous' else int(round(v))}"
                 for p, v in zip(spec.free, cand.x)]
        if spec.keep is not None and cand.kept is not None:
            parts.append(f"{spec.keep.key}: keep {len(cand.kept)} of {len(spec.keep.items)} "
                         f"[{', '.join(spec.keep.labels[i] for i in cand.kept[:8])}{', ...' if len(cand.kept) > 8 else ''}]")
        return head + ("; " + "; ".join(parts) if parts else "")

    def summary(self):
        """A few lines: budget used, start, best, references."""
        lines = [f"design search ({self.spec.search}, {len(self.candidates)} evaluations of at most "
                 f"{self.spec.evaluations}, {sum(c.feasible for c in self.candidates)} feasible, "
                 f"{self.elapsed:.1f} s)",
                 "  start: " + self.describe(self.start),
                 "  best:  " + self.describe(self.best)]
        for k, v in self.references.items():
            lines.append(f"  reference ({k.replace('_', ' ')}): " + self.describe(v))
        return "\n".join(lines)

    def table_csv(self):
        """The evaluated candidates as CSV text, SI units in the headers."""
        spec = self.spec
        counts = list(spec.counts) if spec.objective != "worst_speed" else []
        head = ["index", "phase", "feasible", f"score [{'m/s' if spec.objective == 'worst_speed' else '1'}]"]
        if spec.objective == "largest_n":
            head.append("largest_n [1]")
        if counts:
            head += ["fraction [1]", "wilson_low [1]", "wilson_high [1]"] + [f"fraction_N{n} [1]" for n in counts]
        else:
            head.append("dead_fraction [1]")
        head += [f"{p.key} [{p.unit or '1'}]" for p in spec.free]
        if spec.keep is not None:
            head.append(f"kept {spec.keep.key} [index]")
        head.append("message")
        rows = [",".join(_csv(h) for h in head)]
        for c in self.candidates:
            m = c.metrics
            r = [c.index, c.phase, int(c.feasible), c.score if c.feasible else ""]
            if spec.objective == "largest_n":
                r.append(m.get("largest_n", ""))
            if counts:
                r += [m.get("fraction", ""), m.get("low", ""), m.get("high", "")]
                r += [m.get("fractions", {}).get(n, "") for n in counts]
            else:
                r.append(m.get("dead_fraction", ""))
            r += [int(round(v)) if p.kind == "integer" else v for p, v in zip(spec.free, c.x)]
            if spec.keep is not None:
                r.append(" ".join(str(i) for i in c.kept) if c.kept is not None else "")
            r.append(c.message)
            rows.append(",".join(_csv(v) for v in r))
        return "\n".join(rows) + "\n"

    def to_dict(self):
        """Plain data for ``design.json``."""
        def cand(c):
            return {"index": c.index, "phase": c.phase, "feasible": c.feasible, "score": c.score if c.feasible else None,
                    "values": {p.key: (int(round(v)) if p.kind == "integer" else v) for p, v in zip(self.spec.free, c.x)},
                    "kept": (None if c.kept is None else [self.spec.keep.labels[i] for i in c.kept]),
                    "metrics": c.metrics, "text": self.describe(c)}
        spec = dataclasses.asdict(self.spec)
        spec.pop("keep", None)
        if self.spec.keep is not None:
            spec["keep"] = {"key": self.spec.keep.key, "count": self.spec.keep.count, "of": len(self.spec.keep.items),
                            "items_are_fields": self.spec.keep.fields}
        spec["free"] = [{"key": p.key, "kind": p.kind, "range": [p.lower, p.upper], "unit": p.unit, "start": p.start}
                        for p in self.spec.free]
        spec["constraints"] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.spec.constraints.items()}
        spec["constraints"] = {k: ([_fmt_path(v[0]), v[1]] if isinstance(v, list) else v)
                               for k, v in spec["constraints"].items()}
        return {"spec": spec, "start": cand(self.start), "best": cand(self.best), "improved": self.improved,
                "references": {k: cand(v) for k, v in self.references.items()},
                "evaluations": len(self.candidates), "elapsed_s": self.elapsed, "message": self.message}


def _csv(v):
    if isinstance(v, float):
        return "" if not math.isfinite(v) else repr(v)
    s = str(v)
    return '"' + s.replace('"', '""') + '"' if any(ch in s for ch in ',"\n') else s


# -- the search ------------------------------------------------------------------------------------------
class _BudgetSpent(Exception):
    pass


class _Runner:
    """Evaluates batches on the executor, records every candidate, enforces the budget."""

    def __init__(self, evaluator, spec, executor, progress):
        self.ev, self.spec, self.ex = evaluator, spec, executor
        self.candidates = []
        self.memo = {}
        self.ref = None
        self.bar = None
        show = sys.stderr.isatty() if progress is None else bool(progress)
        if show:
            from tqdm import tqdm  # noqa: PLC0415

            self.bar = tqdm(total=spec.evaluations, desc="design candidates", leave=False)

    def left(self):
        return self.spec.evaluations - len(self.candidates)

    def _clean(self, x):
        return tuple(float(np.clip(round(v) if p.kind == "integer" else v, p.lower, p.upper))
                     for p, v in zip(self.spec.free, x))

    def run(self, xs, kept_list, phase, stop_at=None):
        """Evaluate up to the budget (or ``stop_at`` candidates in all); returns the Candidates asked for
        that are in the table (fewer than asked when the budget ends)."""
        asked = [(self._clean(x), None if k is None else tuple(sorted(int(i) for i in k)))
                 for x, k in zip(xs, kept_list)]
        # A design evaluated before (DE's first member is the start) is answered from the table, free.
        new, seen = [], set()
        for t in asked:
            if t not in self.memo and t not in seen:
                new.append(t)
                seen.add(t)
        room = self.left() if stop_at is None else min(self.left(), stop_at - len(self.candidates))
        new = new[:max(room, 0)]
        if self.ex is None or len(new) <= 1:
            recs = [self.ev(t) for t in new]
        else:
            recs = list(self.ex.map(self.ev, new))
        for (x, k), r in zip(new, recs):
            metrics = {kk: v for kk, v in r.items() if kk not in ("feasible", "score", "loss", "message")}
            c = Candidate(len(self.candidates), phase, x, k, r["score"], r["feasible"], r["message"], metrics)
            c.loss = self.loss(r)
            self.candidates.append(c)
            self.memo[(x, k)] = c
        if self.bar is not None:
            self.bar.update(len(new))
        return [self.memo[t] for t in asked if t in self.memo]

    def loss(self, rec):
        if not rec["feasible"]:
            return rec["loss"]
        ref = self.ref if self.ref else 1.0
        return -rec["score"] / ref

    def best(self):
        feas = [c for c in self.candidates if c.feasible]
        if not feas:
            return self.candidates[0]
        # Highest score; among equals the earliest (the start wins ties, so "best" never means "moved for nothing").
        return max(feas, key=lambda c: (c.score, -c.index))

    def close(self):
        if self.bar is not None:
            self.bar.close()


def _lhs(n, free, seed):
    from scipy.stats import qmc  # noqa: PLC0415

    u = qmc.LatinHypercube(d=len(free), rng=np.random.default_rng(seed)).random(n)
    lo = np.array([p.lower for p in free])
    hi = np.array([p.upper for p in free])
    x = lo + u * (hi - lo)
    for j, p in enumerate(free):
        if p.kind == "integer":
            x[:, j] = np.round(x[:, j])
    return x


def _continuous(runner, spec, budget, kept, x0):
    """Search the free parameters with ``budget`` evaluations (start already evaluated)."""
    from scipy.optimize import differential_evolution, dual_annealing  # noqa: PLC0415

    free = spec.free
    bounds = [(p.lower, p.upper) for p in free]
    stop_at = len(runner.candidates) + budget
    if budget <= 0:
        return
    if spec.search == "random" or budget < 10:
        xs = _lhs(budget, free, spec.seed + 1)
        runner.run(list(xs), [kept] * len(xs), "continuous")
        return
    if spec.search == "evolution":
        d = len(free)
        pop = int(np.clip(10 * d, 5, max(5, budget // 3)))
        maxiter = max(budget // pop - 1, 0)
        init = _lhs(pop, free, spec.seed + 1)
        init[0] = x0
        integrality = [p.kind == "integer" for p in free]

        def mapper(func, xs):
            # DE's own objective (func) is bypassed: every member goes through the runner's table.
            xs = list(xs)
            runner.run(xs, [kept] * len(xs), "continuous", stop_at=stop_at)
            out = []
            for x in xs:
                c = runner.memo.get((runner._clean(x), kept))
                out.append(c.loss if c is not None else _PENALTY * 10)   # past the budget: never selected
            return out

        if maxiter == 0:
            runner.run(list(init), [kept] * len(init), "continuous")
            return
        res = differential_evolution(lambda x: 0.0, bounds, init=init, maxiter=maxiter, polish=False, tol=0.0,
                                     atol=0.0, updating="deferred", workers=mapper,
                                     rng=np.random.default_rng(spec.seed),
                                     integrality=integrality if any(integrality) else None, mutation=(0.5, 1.0),
                                     recombination=0.7)
        # The generations rarely use the budget exactly: spend the rest near DE's best member.
        room = stop_at - len(runner.candidates)
        if room > 0:
            lo, hi = np.array([p.lower for p in free]), np.array([p.upper for p in free])
            rng = np.random.default_rng(spec.seed + 2)
            xs = np.clip(res.x + rng.normal(size=(room, d)) * 0.05 * (hi - lo), lo, hi)
            runner.run(list(xs), [kept] * room, "continuous", stop_at=stop_at)
        return

    def f(x):
        got = runner.run([x], [kept], "continuous", stop_at=stop_at)
        if not got:
            raise _BudgetSpent
        return got[0].loss

    try:
        dual_annealing(f, bounds, x0=np.asarray(x0, float), maxfun=budget, no_local_search=True,
                       rng=np.random.default_rng(spec.seed), maxiter=budget)
    except _BudgetSpent:
        pass


def _keep_fields_check(builder, evaluator, x, keep, scenario):
    """True when keep's items are the basis fields one for one (rebuild with a subset == subset of the basis)."""
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..analysis import basis_function, subset  # noqa: PLC0415

    M = len(keep.items)
    try:
        full = builder.scenario(builder.config(x, None, full_list=True)).actuator
        pick = [0, M - 1] if M > 2 else [0]
        part = builder.scenario(builder.config(x, pick)).actuator
    except (FieldplanError, ValueError):
        return False
    body = scenario.bodies[0]
    ws = scenario.workspace
    xy = ws.sample(3, body.radius, np.random.default_rng(12345))
    bf = basis_function(full, body, ws.medium)(xy)
    if bf.size != M:
        return False
    bs = subset(bf, pick)
    bp = basis_function(part, body, ws.medium)(xy)
    if bp.size != bs.size or bp.mode != bs.mode:
        return False
    scale = max(float(np.max(np.abs(bf.fields))), 1e-300)
    # Interpolated field tables (coil grids, plate grids) depend on the hardware's extent, so a
    # rebuilt subset matches to the tables' accuracy (~1e-4 of the largest field), not to round-off.
    tol = 1e-3 * scale
    return bool(np.allclose(bp.fields, bs.fields, rtol=0, atol=tol) and np.allclose(bp.drift, bs.drift, rtol=0, atol=tol))


def _materialised_ok(builder, x, scenario, keep):
    """When the items were taken from the primitives: the rebuilt actuator has the same primitives."""
    try:
        act = builder.scenario(builder.config(x, None, full_list=True)).actuator
        prims = act.primitives()
    except (FieldplanError, ValueError, TypeError):
        return False
    return len(prims) == len(keep.items) and all(
        np.allclose(np.asarray(p.values, float), np.asarray(v, float), rtol=1e-9) for p, v in zip(prims, keep.items))


def _subset_seed(evaluator, x, keep, scenario, spec):
    """select_primitives' choice on the design ``x`` (single bodies over the free space)."""
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..analysis import select_primitives  # noqa: PLC0415

    _, act = evaluator.actuator(x, None)
    _, one = evaluator.basis_functions(act, None)
    ws = scenario.workspace
    ny, nx = (min(spec.grid[0], 16), min(spec.grid[1], 16))
    x0, y0, x1, y1 = ws.bounds
    X, Y = np.meshgrid(x0 + (np.arange(nx) + 0.5) * (x1 - x0) / nx, y0 + (np.arange(ny) + 0.5) * (y1 - y0) / ny)
    xy = np.c_[X.ravel(), Y.ravel()]
    xy = xy[ws.contains(xy, one.radius)]
    sel = select_primitives(one(xy), keep.count, swaps=False, n_random=0, rng=spec.seed)
    return tuple(sorted(sel.indices))


def _subsets(runner, spec, x, start_kept, budget, seed_kept, rng):
    """Single-swap improvement of the kept subset from the better of the start and seed subsets."""
    keep = spec.keep
    M, k = len(keep.items), keep.count
    stop_at = len(runner.candidates) + budget
    evaluated = {c.kept: c for c in runner.candidates if c.x == runner._clean(x) and c.kept is not None}
    if seed_kept is not None and seed_kept not in evaluated and len(runner.candidates) < stop_at:
        c = runner.run([x], [seed_kept], "seed")[0]
        evaluated[c.kept] = c
    pool = [c for c in evaluated.values() if c.feasible]
    if not pool:
        return
    cur = max(pool, key=lambda c: (c.score, -c.index))
    improved = True
    while improved and len(runner.candidates) < stop_at:
        improved = False
        for pos in rng.permutation(k):
            outside = [j for j in range(M) if j not in cur.kept]
            trials = []
            for j in rng.permutation(outside):
                t = list(cur.kept)
                t[pos] = int(j)
                t = tuple(sorted(t))
                if t not in evaluated:
                    trials.append(t)
            room = stop_at - len(runner.candidates)
            if room <= 0:
                return
            batch = trials[:room]
            got = runner.run([x] * len(batch), batch, "swap", stop_at=stop_at)
            for c in got:
                evaluated[c.kept] = c
            better = [c for c in got if c.feasible and c.score > cur.score]
            if better:
                cur = max(better, key=lambda c: (c.score, -c.index))
                improved = True


def search(scenario, spec, *, executor=None, progress=None):
    """Search the design space a ``design:`` section declares.

    Parameters
    ----------
    scenario : Scenario
        The start design (from :func:`load_design`).
    spec : DesignSpec
    executor : concurrent.futures.Executor, optional
        Evaluates candidates in parallel (:func:`fieldplan.compare.make_executor`); default in this process.
    progress : bool, optional
        tqdm bar; default on when stderr is a terminal.

    Returns
    -------
    DesignResult

    Examples
    --------
    >>> import numpy as np
    >>> from fieldplan.workflows.design import load_design, search
    >>> sc, spec = load_design('''
    ... workspace: {boundary: {rectangle: [-1 mm, -1 mm, 1 mm, 1 mm]}}
    ... bodies: [{kind: bead, count: 1, radius: 5 um, density: 1050 kg/m^3}]
    ... starts: [[0, 0]]
    ... goals: [[0.5 mm, 0]]
    ... actuator: {type: source-array, sources: [[-2 mm, 0], [2 mm, 0], [0, -2 mm], [0, 2 mm]]}
    ... design: {objective: worst_speed, grid: 8, evaluations: 6, search: random,
    ...          free: {"sources[3][0]": [-2 mm, 2 mm]}}
    ... ''')
    >>> res = search(sc, spec, progress=False)
    >>> len(res.candidates), res.best.score >= res.start.score
    (6, True)
    """
    t0 = time.perf_counter()
    builder = _Builder(scenario, spec)
    x0 = tuple(p.start for p in spec.free)
    keep = spec.keep
    if keep is not None:
        taken_from_primitives = not isinstance(_get_or_none(builder.base["actuator"], keep.path), list)
        if taken_from_primitives and not _materialised_ok(builder, x0, scenario, keep):
            raise ScenarioError([(spec.source, None, "design.keep.key",
                                  f"{keep.key!r} is not listed in the actuator section, and listing the "
                                  "actuator's primitives under it does not rebuild the same primitives; list the "
                                  f"items of {keep.key!r} in the file.")])
        keep.fields = _keep_fields_check(builder, None, x0, keep, scenario)
    evaluator = _Evaluator(builder, spec, scenario)
    runner = _Runner(evaluator, spec, executor, progress)
    try:
        start_kept = tuple(range(keep.count)) if keep is not None else None
        start = runner.run([x0], [start_kept], "start")[0]
        if not start.feasible:
            raise ScenarioError([(spec.source, None, "design", f"the start design is infeasible: {start.message}. "
                                                               "Fix the actuator section or the constraints.")])
        runner.ref = abs(start.score) if start.score != 0 else (1e-6 if spec.objective == "worst_speed" else 1.0)
        if spec.free:
            budget = runner.left() if keep is None else max(runner.left() * 2 // 3, 0)
            _continuous(runner, spec, budget, start_kept, x0)
        best = runner.best()
        references = {}
        if keep is not None and runner.left() > 0:
            seed_kept = None
            if keep.fields:
                try:
                    seed_kept = _subset_seed(evaluator, best.x, keep, scenario, spec)
                except (FieldplanError, ValueError):
                    seed_kept = None
            else:
                seed_kept = tuple(sorted({int(round(v)) for v in np.linspace(0, len(keep.items) - 1, keep.count)}))
                if len(seed_kept) != keep.count:
                    seed_kept = None
            _subsets(runner, spec, best.x, start_kept, runner.left(), seed_kept, np.random.default_rng(spec.seed))
            seeds = [c for c in runner.candidates if c.phase == "seed"]
            if seeds:
                references["select_primitives" if keep.fields else "evenly_spread"] = seeds[0]
            full = evaluator((runner._clean(best.x), tuple(range(len(keep.items))))) if keep.fields else None
            if full is not None and full["feasible"]:
                metrics = {kk: v for kk, v in full.items() if kk not in ("feasible", "score", "loss", "message")}
                references["all_items"] = Candidate(-1, "reference", runner._clean(best.x),
                                                    tuple(range(len(keep.items))), full["score"], True, "", metrics)
        best = runner.best()
    finally:
        runner.close()
    start_sc = builder.scenario(builder.config(start.x, start.kept))
    best_sc = builder.scenario(builder.config(best.x, best.kept))
    best_sc.name = f"{scenario.name}-best"
    best_sc.description = (f"Best design found by fieldplan design from {scenario.source or scenario.name}: "
                           f"{spec.objective} {best.score:.6g} (start {start.score:.6g}).")
    msg = ("improved on the start" if best.score > start.score else
           "no candidate scored above the start; the start is returned")
    return DesignResult(spec, start, best, runner.candidates, start_sc, best_sc, references, bool(best.feasible), msg,
                        time.perf_counter() - t0)


def _get_or_none(data, path):
    try:
        return _get(data, path)
    except (KeyError, IndexError, TypeError):
        return None


# -- final check: closed loop --------------------------------------------------------------------------------
def closed_loop_check(result, *, counts=None, trials=None, seed=None):
    """Closed-loop success vs N for the start and the best design, on the same seeded tasks.

    Runs :func:`fieldplan.plan.capability_curve` with each design as both planning model and truth
    (closed loop with Brownian motion), the scenario's planner settings and bodies.

    Parameters
    ----------
    result : DesignResult
    counts : sequence of int, optional
        Default ``spec.final_check["counts"]``, else the N values of the objective up to the best's
        largest steerable N + 1.
    trials : int, optional
        Tasks per N (default ``spec.final_check["trials"]``).
    seed : int, optional
        Default ``spec.seed``.

    Returns
    -------
    dict
        ``{"start": {N: {...}}, "best": {N: {...}}}``, each entry as capability_curve gives it plus
        ``successes``, ``low`` and ``high`` (95 % Wilson interval).
    """
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..analysis.capability import capability_curve  # noqa: PLC0415
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..analysis.counts import wilson_interval as _wilson  # noqa: PLC0415

    spec = result.spec
    trials = int(trials or spec.final_check.get("trials") or 3)
    if not 1 <= trials <= MAX_CHECK_TRIALS:
        raise FieldplanError(f"closed_loop_check: trials must be in [1, {MAX_CHECK_TRIALS}], got {trials}.")
    if counts is None:
        counts = spec.final_check.get("counts")
    if counts is None:
        top = result.best.metrics.get("largest_n") or result.best.metrics.get("at_n") or len(result.start_scenario.bodies)
        counts = tuple(n for n in range(1, int(top) + 2))
    seed = spec.seed if seed is None else seed
    out = {}
    for label, sc in (("start", result.start_scenario), ("best", result.best_scenario)):
        cur = capability_curve(sc.actuator, _Cycle(sc.bodies), sc.workspace, list(counts), trials=trials, rng=seed,
                               settings=sc.plan_settings(), truth=sc.actuator)
        for n, r in cur.items():
            k = int(round(r["success_rate"] * r["trials"]))
            lo, hi = _wilson(np.array(k), np.array(r["trials"]))
            r.update(successes=k, low=float(lo), high=float(hi))
        out[label] = cur
    return out


# -- plots ---------------------------------------------------------------------------------------------------
def _objective_label(spec):
    if spec.objective == "worst_speed":
        return f"{spec.statistic} worst-direction speed", "m/s"
    if spec.objective == "steerable_fraction":
        return f"steerable fraction at N = {spec.count}", "1"
    # Short enough to fit beside one panel; the title and the README spell out the score.
    return f"largest N (≥ {spec.at_least:.0%}) + fraction at N+1", "1"


def plot_objective(result):
    """Objective of every feasible candidate against each free parameter (and against evaluation order).

    Colour = evaluation index (colour bar); the start is a black square, the best a red star.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure  # noqa: PLC0415

    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..plots import axis_label  # noqa: PLC0415

    spec = result.spec
    panels = list(spec.free) + [None]
    n = len(panels)
    cols = min(n, 3)
    rows = int(math.ceil(n / cols))
    fig = Figure(figsize=(4.6 * cols, 3.8 * rows), layout="constrained")
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    name, unit = _objective_label(spec)
    feas = [c for c in result.candidates if c.feasible]
    scores = np.array([c.score for c in feas])
    sm, sname = si_scale(float(np.max(np.abs(scores))) if scores.size and np.max(np.abs(scores)) > 0 else 1.0, unit) \
        if unit != "1" else (1.0, "1")
    idx = np.array([c.index for c in feas])
    bad = [c for c in result.candidates if not c.feasible]
    sc_img = None
    for ax, p in zip(axes, panels):
        if p is None:
            xs = idx
            ax.set_xlabel(axis_label("evaluation", ""))
            xf = 1.0
            xb = [c.index for c in bad]
        else:
            j = spec.free.index(p)
            xf, xunit = si_scale(max(abs(p.lower), abs(p.upper)), p.unit) if p.unit else (1.0, "1")
            xs = np.array([c.x[j] for c in feas]) * xf
            ax.set_xlabel(axis_label(p.key, xunit))
            xb = [c.x[j] * xf for c in bad]
        sc_img = ax.scatter(xs, scores * sm, c=idx, cmap="viridis", s=18, label="feasible candidates")
        if xb:
            ymin = float(np.min(scores * sm)) if scores.size else 0.0
            ax.scatter(xb, [ymin] * len(xb), marker="x", color="0.5", s=14, label="infeasible (drawn at the lowest score)")
        for cand, mk, col, lab in ((result.start, "s", "k", "start"), (result.best, "*", "red", "best")):
            xv = cand.index if p is None else cand.x[spec.free.index(p)] * xf
            ax.scatter([xv], [cand.score * sm], marker=mk, s=110 if mk == "*" else 60, facecolor="none" if mk == "s" else col,
                       edgecolor=col, linewidths=1.5, label=lab, zorder=3)
        ax.set_ylabel(axis_label(name, sname))
        ax.grid(alpha=0.3)
    for ax in axes[n:]:
        ax.set_visible(False)
    axes[0].legend(fontsize=7, loc="best")
    if sc_img is not None:
        fig.colorbar(sc_img, ax=axes[:n].tolist(), label=axis_label("evaluation index", ""))
    fig.suptitle(f"design search: {spec.search}, {len(result.candidates)} evaluations, "
                 f"{spec.trials} configurations per N (common to all candidates)")
    return fig


def _maps(result, shape):
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..analysis import basis_function, speed_map  # noqa: PLC0415

    out = {}
    for label, sc, cand in (("start", result.start_scenario, result.start), ("best", result.best_scenario, result.best)):
        fn = basis_function(sc.actuator, sc.bodies[0], sc.workspace.medium)
        out[label] = speed_map(fn, sc.workspace, shape=shape)
    return out


def plot_speed_maps(result, shape=None):
    """Single-body worst-direction speed over the workspace: start and best side by side (each with its own colour bar: the speeds may differ by orders of magnitude).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure  # noqa: PLC0415

    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..plots.steerability import plot_speed_map  # noqa: PLC0415

    shape = shape or result.spec.grid
    maps = _maps(result, shape)
    fig = Figure(figsize=(11.5, 4.8), layout="constrained")
    axes = fig.subplots(1, 2)
    for ax, (label, m) in zip(axes, maps.items()):
        sc = result.start_scenario if label == "start" else result.best_scenario
        plot_speed_map(m, workspace=sc.workspace, ax=ax, actuator=sc.actuator,
                       title=f"{label}: mean {format_quantity(m.mean_speed, 'm/s', 3)}, dead {100 * m.dead_fraction:.0f} %")
    return fig


def plot_count_curves(result, counts=None, trials=None):
    """Steerable fraction vs N of the start and the best design (95 % Wilson bars), same configurations.

    Returns
    -------
    matplotlib.figure.Figure
    """
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..analysis import basis_function, count_curve  # noqa: PLC0415
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..plots.steerability import plot_count_curve  # noqa: PLC0415

    spec = result.spec
    counts = counts or (spec.counts if spec.objective != "steerable_fraction" else
                        tuple(range(1, max(spec.count + 2, 3))))
    curves = {}
    for label, sc in (("start", result.start_scenario), ("best", result.best_scenario)):
        fn = basis_function(sc.actuator, _Cycle(sc.bodies), sc.workspace.medium)
        curves[label] = count_curve(fn, sc.workspace, counts, trials=trials or spec.trials, rng=spec.seed,
                                    progress=False)
    return plot_count_curve(curves, title="steerable fraction, start vs best design")


def plot_closed_loop(check):
    """Closed-loop success rate vs N, start and best side by side (95 % Wilson bars).

    Parameters
    ----------
    check : dict
        From :func:`closed_loop_check`.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.figure import Figure  # noqa: PLC0415
    from matplotlib.ticker import MaxNLocator  # noqa: PLC0415

    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..plots import axis_label  # noqa: PLC0415

    fig = Figure(figsize=(6.0, 4.0), layout="constrained")
    ax = fig.add_subplot()
    for i, (label, cur) in enumerate(check.items()):
        ns = np.array(sorted(cur))
        rate = np.array([cur[n]["success_rate"] for n in ns])
        lo = np.array([cur[n]["low"] for n in ns])
        hi = np.array([cur[n]["high"] for n in ns])
        trials = cur[ns[0]]["trials"]
        ax.errorbar(ns + 0.08 * (i - 0.5), rate, yerr=np.vstack([rate - lo, hi - rate]), marker="o", capsize=3,
                    color=f"C{i}", label=f"{label} design ({trials} closed-loop tasks per N)")
    ax.errorbar([], [], yerr=[], color="0.3", capsize=3, ls="none", label="bars: 95 % Wilson interval")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_ylim(-0.05, 1.05)
    ax.grid(alpha=0.3)
    ax.set_xlabel(axis_label("number of bodies N", "1"))
    ax.set_ylabel(axis_label("closed-loop success rate", "1"))
    ax.legend(fontsize=8)
    ax.set_title("final check: closed-loop capability, start vs best")
    return fig


# -- output folder and the command -------------------------------------------------------------------------
def write_design(out_dir, result, *, force=False, check=None, inputs=(), dpi=120):
    """Write ``best.yaml``, ``candidates.csv``, ``design.json`` and the plots, atomically.

    Parameters
    ----------
    out_dir : str or os.PathLike
    result : DesignResult
    force : bool
        Replace an existing folder fieldplan wrote (never another folder; see
        :func:`fieldplan.export.check_output_folder`).
    check : dict, optional
        From :func:`closed_loop_check`: adds ``closed_loop.png`` and the numbers to ``design.json``.
    inputs : sequence of str
        Files read (a folder holding one is never replaced).

    Returns
    -------
    dict
        Role -> path of every file written.
    """
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..plots import save  # noqa: PLC0415
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from ..scenario import dump_scenario  # noqa: PLC0415

    out = os.path.abspath(os.fspath(out_dir))
    # Build everything before touching the disk: a failure leaves no half-written folder.
    header = "".join(f"# {line}\n" for line in (
        f"Best design from `fieldplan design {result.spec.source}` ({len(result.candidates)} evaluations).",
        "start: " + result.describe(result.start), "best:  " + result.describe(result.best),
        "Run it with: fieldplan run best.yaml --out <folder>"))
    best_text = header + dump_scenario(result.best_scenario)
    summary = result.to_dict()
    if check is not None:
        summary["closed_loop"] = {lab: {str(n): {k: v for k, v in r.items() if k != "messages"} for n, r in cur.items()}
                                  for lab, cur in check.items()}
    figs = {"objective.png": plot_objective(result), "speed_maps.png": plot_speed_maps(result),
            "count_curves.png": plot_count_curves(result)}
    if check is not None:
        figs["closed_loop.png"] = plot_closed_loop(check)
    files = {}
    with output_folder(out, force, inputs=inputs, command="design") as tmp:
        atomic_write(os.path.join(tmp, "best.yaml"), best_text)
        atomic_write(os.path.join(tmp, "candidates.csv"), result.table_csv())
        atomic_write(os.path.join(tmp, "design.json"), json.dumps(json_safe(summary), indent=1, allow_nan=False))
        files.update(best=os.path.join(out, "best.yaml"), candidates=os.path.join(out, "candidates.csv"),
                     summary=os.path.join(out, "design.json"))
        for name, fig in figs.items():
            save(fig, os.path.join(tmp, name), dpi=dpi)
            files[name[:-4]] = os.path.join(out, name)
    return files


def add_command(add):
    """Add ``fieldplan design`` to the CLI (``add`` is the CLI's sub-command factory)."""
    d = add("design", "search a scenario's free actuator parameters (design: section) for steerability",
            """
            Search the parameters the scenario's `design:` section marks as free (ranges with units,
            integers, "keep k of these M" subsets) for the objective it names (steerable fraction at a
            target N, largest N steerable, worst-direction speed), under its hardware constraints and
            evaluation budget, every candidate scored on the same random configurations. Writes
            best.yaml (a ready scenario for `fieldplan run`), candidates.csv, design.json and plots
            (objective.png, speed_maps.png, count_curves.png; closed_loop.png with --closed-loop).
            """,
            """
            fieldplan design scenarios/design-plate.yaml --out plate-design
            fieldplan design my-coils.yaml --workers 2 --closed-loop --out coils-design --force
            """)
    d.add_argument("scenario", help="scenario YAML file with a design: section")
    d.add_argument("--out", "-o", required=True, help="output folder")
    d.add_argument("--force", action="store_true", help="replace the output folder if fieldplan wrote it")
    d.add_argument("--allow-module", action="append", default=[], metavar="MODULE",
                   help="import this module for a `type: module:Class` actuator (runs its code)")
    d.add_argument("--workers", type=int, default=None,
                   help="local worker processes evaluating candidates (default: CPU count; 1: this process)")
    d.add_argument("--scheduler", default=None, metavar="ADDRESS", help="dask.distributed scheduler address")
    d.add_argument("--closed-loop", action="store_true",
                   help="final check: closed-loop success vs N of start and best (slow; design.final_check sets "
                        "counts and trials)")
    d.add_argument("--quiet", "-q", action="store_true", help="print errors only")
    return d


def design_command(args):
    """``fieldplan design FILE --out DIR``: load, check the output folder, search, (check), write. Exit code."""
    # deferred import: start-up time of the CLI: fieldplan.cli imports this module to build its parser
    from .compare import make_executor  # noqa: PLC0415

    if args.workers is not None and args.workers < 0:
        raise FieldplanError(f"--workers must be >= 0, got {args.workers}.")
    sc, spec = load_design(args.scenario, allow_modules=tuple(args.allow_module))
    inputs = [os.path.abspath(args.scenario)] + list(sc.input_files)
    check_output_folder(args.out, args.force, inputs)       # refuse before the long part
    say = (lambda *a: None) if args.quiet else (lambda text: print(text, flush=True))
    say(f"design search of {sc.name}: {spec.objective}, {len(spec.free)} free parameter(s)"
        + (f", keep {spec.keep.count} of {len(spec.keep.items)} {spec.keep.key}" if spec.keep else "")
        + f", at most {spec.evaluations} evaluations ...")
    workers = args.workers if args.workers is not None else (os.cpu_count() or 1)
    with make_executor(args.scheduler, workers) as ex:
        res = search(sc, spec, executor=ex, progress=None if not args.quiet else False)
    say(res.summary())
    check = None
    if args.closed_loop:
        say("final check: closed-loop capability of start and best ...")
        check = closed_loop_check(res)
        for lab, cur in check.items():
            say(f"  {lab}: " + ", ".join(f"N={n}: {r['successes']}/{r['trials']} ({r['low']:.2f}-{r['high']:.2f})"
                                         for n, r in cur.items()))
    files = write_design(args.out, res, force=args.force, check=check, inputs=inputs)
    say(f"wrote {os.path.abspath(args.out)}: " + ", ".join(sorted(os.path.basename(p) for p in files.values())))
    return 0
