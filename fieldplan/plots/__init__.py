"""Every figure fieldplan draws; each function returns a matplotlib ``Figure`` (no pyplot state).

=====================================  ================================================================
:mod:`~fieldplan.plots.style`          the one style: axis labels with units, display factors, figure, save,
                                       walls and hardware outlines
:mod:`~fieldplan.plots.run`            a run: workspace with routes and trajectories, timeline, inputs,
                                       primitive fields, animation
:mod:`~fieldplan.plots.steerability`   the analyses: speed maps, count curves, design comparisons
:mod:`~fieldplan.plots.calibration`    fitted fields: vectors, residuals, coverage
:mod:`~fieldplan.plots.catalog`        the figures a run's output folder holds, in one table
=====================================  ================================================================

matplotlib is imported on first use of a figure function, not by ``import fieldplan.plots``.
"""

import importlib

_WHERE = {
    "axis_label": "style", "length_unit": "style", "speed_unit": "style", "figure": "style", "save": "style",
    "draw_workspace": "style", "draw_outlines": "style",
    "plot_workspace": "run", "plot_timeline": "run", "plot_inputs": "run", "plot_primitive_fields": "run",
    "animate": "run", "speed_backdrop": "run",
    "plot_speed_map": "steerability", "plot_count_curve": "steerability", "plot_comparison": "steerability",
    "plot_vectors": "calibration", "plot_residuals": "calibration", "plot_coverage": "calibration",
    "RUN_FIGURES": "catalog", "write_run_figures": "catalog",
}

__all__ = sorted(_WHERE)


def __getattr__(name):
    if name in _WHERE:
        value = getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_WHERE))
