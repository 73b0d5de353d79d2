"""Output folders: schedule CSV/JSON for hardware, trajectories CSV, summary JSON and plots.

:func:`write_outputs` checks the schedule against the declared limits *before* anything is written,
writes every file into a temporary folder beside the target and only then renames it into place, so
an error never leaves a partial output folder. An existing folder is replaced only with
``force=True``, and only if fieldplan wrote it (it holds the :data:`MARKER` file); the working
folder, its parents, the home folder and a folder holding an input of the run are never replaced
(:func:`~fieldplan.fileio.check_output_folder`). Every command writes its folder through
:func:`fieldplan.fileio.output_folder`.

Files (see the README for their layout):

``schedule.csv``
    One row per segment: ``start [s]``, ``duration [s]``, one ``<channel> [<unit>]`` column per
    channel, ``label`` (the primitive's name, ``mix`` or ``idle``).
``schedule.json``
    Channels with units and bounds, the segments, the limits checked, the scenario hash and the
    package version.
``schedule_resampled.csv``
    Optional: ``time [s]`` and the held channel values sampled at a fixed rate.
``trajectories.csv``
    Long format: ``run`` (``predicted`` or ``trial <k>``), ``time [s]``, ``body``, ``kind``,
    ``x [m]``, ``y [m]``.
``summary.json``
    Scenario, plan outcome, per-trial metrics, aggregate metrics and the exit code.
"""

from __future__ import annotations

import csv
import io
import json
import os

import numpy as np

from .. import __version__
from ..errors import FieldplanError
from ..fileio import (
    MARKER,
    OutputExistsError,
    OutputFolderError,
    atomic_write,
    check_output_folder,
    clean_stale_temps,
    json_safe,
    output_folder,
    written_by_fieldplan,
)
from ..plots.catalog import ANIMATION_FILE, RUN_FIGURES, write_run_figures

__all__ = ["OutputFolderError", "OutputExistsError", "MARKER", "check_output_folder", "output_folder",
           "clean_stale_temps", "written_by_fieldplan", "write_outputs", "summary_dict", "trajectory_rows",
           "write_trajectories", "read_trajectories", "write_resampled", "json_safe", "FILES"]

#: Names of the files an output folder may hold (the figures come from :data:`fieldplan.plots.catalog.RUN_FIGURES`).
FILES = {
    "schedule_csv": "schedule.csv",
    "schedule_json": "schedule.json",
    "resampled": "schedule_resampled.csv",
    "trajectories": "trajectories.csv",
    "summary": "summary.json",
    **{name: fig.file for name, fig in RUN_FIGURES.items()},
    "animation": ANIMATION_FILE,
}


def trajectory_rows(run):
    """Rows ``(run, time, body, kind, x, y)`` of the predicted path and every trial."""
    kinds = [b.name for b in run.scenario.bodies]
    parts = []
    if run.predicted_times is not None and len(run.predicted_times):
        parts.append(("predicted", run.predicted_times, run.predicted_positions))
    for k, t in enumerate(run.trials):
        parts.append((f"trial {k + 1}", t.times, t.positions))
    rows = []
    for label, times, pos in parts:
        times = np.asarray(times, dtype=float)
        pos = np.asarray(pos, dtype=float)
        for j, tj in enumerate(times):
            for i, kind in enumerate(kinds):
                rows.append((label, float(tj), i, kind, float(pos[j, i, 0]), float(pos[j, i, 1])))
    return rows


def write_trajectories(path, run):
    """Write ``trajectories.csv`` (see the module docstring)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["run", "time [s]", "body", "kind", "x [m]", "y [m]"])
    for label, t, i, kind, x, y in trajectory_rows(run):
        w.writerow([label, repr(t), i, kind, repr(x), repr(y)])
    atomic_write(path, buf.getvalue())
    return path


def read_trajectories(path):
    """Read ``trajectories.csv``: dict run label -> ``(times (T,), positions (T, n, 2))``."""
    with open(path, newline="") as fh:
        rows = list(csv.reader(fh))
    if not rows or rows[0][:2] != ["run", "time [s]"]:
        raise FieldplanError(f"{path}: not a fieldplan trajectories file.")
    out = {}
    for label, t, i, _kind, x, y in rows[1:]:
        out.setdefault(label, {}).setdefault(float(t), {})[int(i)] = (float(x), float(y))
    res = {}
    for label, by_t in out.items():
        times = np.array(sorted(by_t))
        n = max(len(v) for v in by_t.values())
        pos = np.array([[by_t[t][i] for i in range(n)] for t in times])
        res[label] = (times, pos)
    return res


def write_resampled(path, schedule, rate):
    """Write the schedule sampled at ``rate`` Hz: ``time [s]`` and one column per channel."""
    t, v = schedule.resample(rate)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["time [s]"] + [f"{c.name} [{c.unit}]" for c in schedule.channels])
    for tj, row in zip(t, v):
        w.writerow([repr(float(tj))] + [repr(float(x)) for x in row])
    atomic_write(path, buf.getvalue())
    return path


def summary_dict(run):
    """The summary of a run (what ``summary.json`` holds), JSON-safe."""
    sc = run.scenario
    sched = run.schedule
    d = {
        "format": "fieldplan-summary",
        "format_version": 1,
        "package_version": __version__,
        "scenario": {"name": sc.name, "source": sc.source, "hash": sc.digest, "mode": sc.mode},
        "bodies": [{"index": i, "kind": b.name, "radius": b.radius} for i, b in enumerate(sc.bodies)],
        "starts": sc.starts,
        "goals": run.goals,
        "tolerance": run.tolerance,
        "channels": [{"name": c.name, "unit": c.unit} for c in sched.channels] if sched is not None else [],
        "plan": {
            "source": run.plan_source,
            "success": run.plan_success,
            "status": run.plan_status,
            "message": run.plan_message,
            "planning_time": run.planning_time,
            "planning_time_per_step": run.time_per_step,
            "n_steps": len(run.step_times),
            "stalls": list(run.stalls),
            "bodies": run.bodies_report,
        },
        "schedule": None if sched is None else {
            "n_segments": sched.n_segments,
            "duration": sched.duration,
            "energy": dict(zip([c.name for c in sched.channels], sched.energy().tolist())),
            "limits_checked": sc.limits.to_dict() if sc.limits is not None else None,
        },
        "trials": [{"trial": k + 1, "seed": t.seed, "success": t.success, "message": t.message,
                    "metrics": t.metrics} for k, t in enumerate(run.trials)],
        "aggregate": run.aggregate(),
        "exit_code": run.exit_code,
        "message": run.message,
    }
    return json_safe(d)


def write_outputs(out_dir, run, *, force=False, outputs=None, inputs=None):
    """Write the output folder of a run, atomically.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder to create.
    run : fieldplan.workflows.compare.RunResult
        What to write.
    force : bool
        Replace an existing folder, which must be one fieldplan wrote (see :func:`check_output_folder`).
    outputs : OutputSettings, optional
        Default: the scenario's ``outputs`` section.
    inputs : sequence of str, optional
        Files the run read; default the scenario file. A folder holding one is never replaced.

    Returns
    -------
    dict
        File role -> path of every file written (paths inside ``out_dir``).

    Raises
    ------
    LimitError
        The schedule breaks a declared limit (message names channel, time and limit); nothing is
        written.
    OutputExistsError
        ``out_dir`` exists and ``force`` is false.
    OutputFolderError
        ``out_dir`` may not be replaced (see :func:`check_output_folder`) or cannot be written.
    """
    if inputs is None:
        src = run.scenario.source
        inputs = [src] if src and not str(src).startswith("<") else []
    sc = run.scenario
    outputs = outputs if outputs is not None else sc.outputs
    if run.schedule is not None:
        run.schedule.check(sc.limits)          # refuse before touching the disk
    out = os.path.abspath(os.fspath(out_dir))
    files = {}
    with output_folder(out, force, inputs=inputs, command="run") as tmp:
        extra = {"scenario_hash": sc.digest, "scenario_name": sc.name, "scenario_source": sc.source}
        if run.schedule is not None and outputs.schedule:
            files["schedule_csv"] = run.schedule.write_csv(os.path.join(tmp, FILES["schedule_csv"]), sc.limits)
            files["schedule_json"] = run.schedule.write_json(os.path.join(tmp, FILES["schedule_json"]),
                                                             limits=sc.limits, extra=extra)
            if outputs.resample_rate:
                files["resampled"] = write_resampled(os.path.join(tmp, FILES["resampled"]), run.schedule,
                                                     outputs.resample_rate)
        if outputs.trajectories:
            files["trajectories"] = write_trajectories(os.path.join(tmp, FILES["trajectories"]), run)
        summary = summary_dict(run)
        summary["files"] = sorted(FILES[k] for k in files)
        if outputs.plots or outputs.animation:
            files.update(write_run_figures(tmp, run, outputs))
            summary["files"] = sorted(FILES[k] for k in files)
        summary["files"] += [FILES["summary"], MARKER]
        files["summary"] = os.path.join(tmp, FILES["summary"])
        atomic_write(files["summary"], json.dumps(summary, indent=1, allow_nan=False))
    return {k: os.path.join(out, os.path.basename(v)) for k, v in files.items()}
