"""Analyses of what an actuator can do, before any plan: steerability, speed maps, counts, designs, symmetry.

=======================================  ================================================================
:mod:`~fieldplan.analysis.steerability`  LP tests of a field basis: steerable now, worst-direction speed,
                                         obstructions, per-body speeds; :func:`basis_function`
:mod:`~fieldplan.analysis.maps`          :func:`speed_map`: one body's worst-direction speed over the workspace
:mod:`~fieldplan.analysis.counts`        :func:`counting_limit` and :func:`count_curve`: how many bodies
:mod:`~fieldplan.analysis.selection`     :func:`select_primitives` and :func:`compare_designs`
:mod:`~fieldplan.analysis.symmetry`      :func:`symmetry_report` and :func:`mirror_check`
:mod:`~fieldplan.analysis.capability`    :func:`capability_curve`: planned success at growing body counts
=======================================  ================================================================

Figures of these analyses are in :mod:`fieldplan.plots.steerability`. ``fieldplan.analysis`` is the
earlier name of this package and still imports.
"""

from .counts import CountCurve, count_curve, counting_limit, counting_rule, wilson_interval
from .maps import SpeedMap, speed_map
from .selection import DesignComparison, Selection, compare_designs, select_primitives
from .steerability import (
    RTOL,
    Obstruction,
    Steerability,
    basis_function,
    body_speeds,
    obstructions,
    restrict,
    steerability,
    steerable,
    subset,
)
from .symmetry import MirrorReport, SymmetryReport, mirror_check, symmetry_report

__all__ = ["Steerability", "Obstruction", "steerability", "steerable", "body_speeds", "obstructions", "restrict",
           "subset", "basis_function", "counting_limit", "counting_rule", "wilson_interval", "SpeedMap",
           "speed_map", "CountCurve", "count_curve", "Selection", "select_primitives", "DesignComparison",
           "compare_designs", "SymmetryReport", "symmetry_report", "MirrorReport", "mirror_check",
           "capability_curve", "RTOL"]


def __getattr__(name):
    # capability_curve imports the planner (cvxpy, OSQP: about a second); the other analyses do not.
    if name == "capability_curve":
        # deferred import: start-up time of the CLI: inspect and plots use the other analyses, not the planner
        from .capability import capability_curve  # noqa: PLC0415

        return capability_curve
    if name == "_wilson":   # the earlier private name, still used by older benchmark scripts
        return wilson_interval
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
