"""The figures a run's output folder may hold, in one table.

Adding a figure to the output folder means one entry in :data:`RUN_FIGURES` (its name in the
scenario's ``outputs.plots``, its file name, and a function ``draw(run, outputs) -> Figure or None``);
the scenario schema, the export's file list and the writer all read this table. This module
imports no matplotlib, so the scenario schema can read the names cheaply.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Callable

__all__ = ["RunFigure", "RUN_FIGURES", "ANIMATION_FILE", "write_run_figures"]


@dataclass(frozen=True)
class RunFigure:
    """One figure of a run: ``draw(run, outputs)`` returns a Figure, or None when there is nothing to draw."""

    file: str
    draw: Callable
    doc: str = ""


def _workspace(run, outputs):
    # deferred import: start-up time of the CLI: scenario loading reads this table, matplotlib only to draw
    from .run import plot_workspace  # noqa: PLC0415

    sc = run.scenario
    trajs = [(f"trial {k + 1}", t.positions) for k, t in enumerate(run.trials[:5])]
    return plot_workspace(sc.workspace, sc.bodies, sc.starts, run.goals, routes=run.routes, trajectories=trajs,
                          predicted=run.predicted_positions, actuator=sc.actuator if outputs.field_backdrop else None,
                          tolerance=run.tolerance, title=sc.name)


def _first_path(run):
    first = run.trials[0] if run.trials else None
    if first is not None:
        return first.times, first.positions
    if run.predicted_times is not None:
        return run.predicted_times, run.predicted_positions
    return None


def _timeline(run, outputs):
    # deferred import: start-up time of the CLI: scenario loading reads this table, matplotlib only to draw
    from .run import plot_timeline  # noqa: PLC0415

    path = _first_path(run)
    if path is None:
        return None
    predicted = (run.predicted_times, run.predicted_positions) if run.predicted_times is not None else None
    return plot_timeline(path[0], path[1], run.goals, run.scenario.bodies, tolerance=run.tolerance,
                         predicted=predicted, extent=run.scenario.workspace.bounds)


def _inputs(run, outputs):
    # deferred import: start-up time of the CLI: scenario loading reads this table, matplotlib only to draw
    from .run import plot_inputs  # noqa: PLC0415

    if run.schedule is None or not run.schedule.n_segments:
        return None
    return plot_inputs(run.schedule, limits=run.scenario.limits)


#: name in ``outputs.plots`` -> the figure (file name and how to draw it), in the order they are written.
RUN_FIGURES = {
    "workspace": RunFigure("workspace.png", _workspace, "workspace, routes, trajectories, field backdrop"),
    "timeline": RunFigure("timeline.png", _timeline, "distance to goal of each body over time"),
    "inputs": RunFigure("inputs.png", _inputs, "channel values over time with their limits"),
}

#: File of the optional animation (``outputs.animation``).
ANIMATION_FILE = "animation.gif"


def write_run_figures(folder, run, outputs):
    """Draw and save the figures ``outputs.plots`` names (and the animation if asked) into ``folder``.

    Returns
    -------
    dict
        name (a key of :data:`RUN_FIGURES`, or ``"animation"``) -> path written.
    """
    # deferred import: start-up time of the CLI: scenario loading reads this table, matplotlib only to draw
    from .run import animate  # noqa: PLC0415
    # deferred import: start-up time of the CLI: scenario loading reads this table, matplotlib only to draw
    from .style import save  # noqa: PLC0415

    written = {}
    for name, spec in RUN_FIGURES.items():
        if name in outputs.plots:
            fig = spec.draw(run, outputs)
            if fig is not None:
                written[name] = save(fig, os.path.join(folder, spec.file), dpi=outputs.dpi)
    path = _first_path(run)
    if outputs.animation and path is not None:
        sc = run.scenario
        written["animation"] = animate(os.path.join(folder, ANIMATION_FILE), sc.workspace, sc.bodies, path[0],
                                       path[1], run.goals, frames=outputs.animation_frames)
    return written
