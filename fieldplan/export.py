"""Output folders: schedule CSV/JSON for hardware, trajectories CSV, summary JSON and plots.

:func:`write_outputs` checks the schedule against the declared limits *before* anything is written,
writes every file into a temporary folder beside the target and only then renames it into place, so
an error never leaves a partial output folder, and an existing folder is replaced only with
``force=True``.

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
import math
import os
import shutil
import tempfile

import numpy as np

from .errors import FieldplanError
from .schedule import atomic_write

__all__ = ["OutputExistsError", "check_output_folder", "write_outputs", "summary_dict", "trajectory_rows",
           "write_trajectories", "read_trajectories", "write_resampled", "json_safe", "FILES"]

#: Names of the files an output folder may hold.
FILES = {
    "schedule_csv": "schedule.csv",
    "schedule_json": "schedule.json",
    "resampled": "schedule_resampled.csv",
    "trajectories": "trajectories.csv",
    "summary": "summary.json",
    "workspace": "workspace.png",
    "timeline": "timeline.png",
    "inputs": "inputs.png",
    "animation": "animation.gif",
}


class OutputExistsError(FieldplanError):
    """The output folder exists and ``force`` was not given (or the path is a file)."""


def check_output_folder(out_dir, force=False):
    """Raise :class:`OutputExistsError` unless ``out_dir`` may be (re)written.

    Called by the command before planning, so a long run does not end in a refusal.
    """
    out = os.fspath(out_dir)
    if os.path.isfile(out):
        raise OutputExistsError(f"output path {out!r} is a file, not a folder; choose another --out.")
    if os.path.exists(out) and not force:
        raise OutputExistsError(f"output folder {out!r} already exists; pass --force to replace it or choose "
                                "another --out.")


def json_safe(v):
    """Plain JSON data: numpy to Python, NaN and infinities to ``None``."""
    if isinstance(v, dict):
        return {str(k): json_safe(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [json_safe(x) for x in v]
    if isinstance(v, np.ndarray):
        return json_safe(v.tolist())
    if isinstance(v, (np.bool_, bool)):
        return bool(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        f = float(v)
        return f if math.isfinite(f) else None
    return v


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
    from . import __version__  # noqa: PLC0415

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


def _write_plots(folder, run, outputs):
    from . import plots  # noqa: PLC0415 - matplotlib is slow to import; only when plots are asked for

    written = []
    sc = run.scenario
    first = run.trials[0] if run.trials else None
    if "workspace" in outputs.plots:
        trajs = [(f"trial {k + 1}", t.positions) for k, t in enumerate(run.trials[:5])]
        fig = plots.plot_workspace(sc.workspace, sc.bodies, sc.starts, run.goals, routes=run.routes,
                                   trajectories=trajs, predicted=run.predicted_positions,
                                   actuator=sc.actuator if outputs.field_backdrop else None,
                                   tolerance=run.tolerance, title=sc.name)
        written.append(plots.save(fig, os.path.join(folder, FILES["workspace"]), dpi=outputs.dpi))
    if "timeline" in outputs.plots and (first is not None or run.predicted_times is not None):
        times, pos = (first.times, first.positions) if first is not None else (run.predicted_times,
                                                                               run.predicted_positions)
        fig = plots.plot_timeline(times, pos, run.goals, sc.bodies, tolerance=run.tolerance,
                                  predicted=(run.predicted_times, run.predicted_positions)
                                  if run.predicted_times is not None else None,
                                  extent=sc.workspace.bounds)
        written.append(plots.save(fig, os.path.join(folder, FILES["timeline"]), dpi=outputs.dpi))
    if "inputs" in outputs.plots and run.schedule is not None and run.schedule.n_segments:
        fig = plots.plot_inputs(run.schedule, limits=sc.limits)
        written.append(plots.save(fig, os.path.join(folder, FILES["inputs"]), dpi=outputs.dpi))
    if outputs.animation and (first is not None or run.predicted_times is not None):
        times, pos = (first.times, first.positions) if first is not None else (run.predicted_times,
                                                                               run.predicted_positions)
        plots.animate(os.path.join(folder, FILES["animation"]), sc.workspace, sc.bodies, times, pos, run.goals,
                      frames=outputs.animation_frames)
        written.append(os.path.join(folder, FILES["animation"]))
    return written


def write_outputs(out_dir, run, *, force=False, outputs=None):
    """Write the output folder of a run, atomically.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder to create.
    run : fieldplan.compare.RunResult
        What to write.
    force : bool
        Replace an existing folder.
    outputs : OutputSettings, optional
        Default: the scenario's ``outputs`` section.

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
    """
    sc = run.scenario
    outputs = outputs if outputs is not None else sc.outputs
    if run.schedule is not None:
        run.schedule.check(sc.limits)          # refuse before touching the disk
    check_output_folder(out_dir, force)
    out = os.path.abspath(os.fspath(out_dir))
    parent = os.path.dirname(out)
    os.makedirs(parent, exist_ok=True)
    tmp = tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.tmp-", dir=parent)
    files = {}
    try:
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
            for p in _write_plots(tmp, run, outputs):
                role = next(k for k, v in FILES.items() if v == os.path.basename(p))
                files[role] = p
            summary["files"] = sorted(FILES[k] for k in files)
        summary["files"].append(FILES["summary"])
        files["summary"] = os.path.join(tmp, FILES["summary"])
        atomic_write(files["summary"], json.dumps(summary, indent=1, allow_nan=False))
        _swap(tmp, out, force)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return {k: os.path.join(out, os.path.basename(v)) for k, v in files.items()}


def _swap(tmp, out, force):
    """Move the finished temporary folder to ``out`` (replacing an old one only with ``force``)."""
    if os.path.exists(out):
        if not force:
            raise OutputExistsError(f"output folder {out!r} appeared while writing; not replaced.")
        old = tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.old-", dir=os.path.dirname(out))
        os.rmdir(old)
        os.replace(out, old)
        try:
            os.replace(tmp, out)
        except BaseException:
            os.replace(old, out)
            raise
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, out)
