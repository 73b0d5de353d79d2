"""Output folders: schedule CSV/JSON for hardware, trajectories CSV, summary JSON and plots.

:func:`write_outputs` checks the schedule against the declared limits *before* anything is written,
writes every file into a temporary folder beside the target and only then renames it into place, so
an error never leaves a partial output folder. An existing folder is replaced only with
``force=True``, and only if fieldplan wrote it (it holds the :data:`MARKER` file); the working
folder, its parents, the home folder and a folder holding an input of the run are never replaced
(:func:`check_output_folder`). Every command writes its folder through :func:`output_folder`.

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

import contextlib
import csv
import io
import json
import math
import os
import re
import shutil
import socket
import tempfile
import time

import numpy as np

from .errors import FieldplanError
from .schedule import atomic_write, umask_mode

__all__ = ["OutputFolderError", "OutputExistsError", "MARKER", "check_output_folder", "output_folder",
           "clean_stale_temps", "written_by_fieldplan", "write_outputs", "summary_dict", "trajectory_rows",
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


#: Marker file fieldplan puts in every folder it writes; ``--force`` replaces only folders holding it.
MARKER = ".fieldplan-output"

#: A temporary folder of an earlier run (``.<out>.tmp-*``, ``.<out>.old-*``) is removed when its
#: writer is no longer running, or in any case after this many seconds.
STALE_AGE = 24 * 3600.0

# Names of the files an output folder of each command holds: a folder written by a fieldplan
# version without the marker is recognised by holding nothing else.
_KNOWN_OUTPUTS = re.compile(
    r"^(?:" + "|".join(re.escape(v) for v in FILES.values())
    + r"|comparison\.(?:md|csv|json|png)|inspect\.(?:md|json)|(?:fields|speed-map|count-curve)-[\w.\-]+\.png"
    + r"|\.tmp-\w+)$")


class OutputFolderError(FieldplanError):
    """The output folder cannot or may not be written (names the folder and the reason)."""


class OutputExistsError(OutputFolderError):
    """The output folder exists and ``force`` was not given (or the path is a file)."""


def _is_within(path, folder):
    """Whether real path ``path`` is ``folder`` or inside it (both real, absolute)."""
    return path == folder or path.startswith(folder.rstrip(os.sep) + os.sep)


def written_by_fieldplan(folder):
    """Whether ``folder`` is an output folder fieldplan wrote (holds :data:`MARKER`).

    A folder written before the marker existed counts too when it holds a fieldplan result file
    (``summary.json``, ``comparison.json``, ``inspect.json`` or a fit's ``<name>-report.json``) and
    nothing but files with the names fieldplan writes, so replacing it loses nothing of the user's.
    """
    if os.path.isfile(os.path.join(folder, MARKER)):
        return True
    try:
        entries = [e for e in os.scandir(folder)]
    except OSError:
        return False
    if not entries or not all(e.is_file(follow_symlinks=False) for e in entries):
        return False
    names = {e.name for e in entries}
    stems = [n[:-len("-report.json")] for n in names if n.endswith("-report.json")]
    fit = {f"{s}{ext}" for s in stems for ext in (".npz", ".json", "-report.json")}

    def known(n):
        return bool(_KNOWN_OUTPUTS.match(n)) or n in fit or any(
            re.match(rf"^{re.escape(s)}-(?:vectors|residuals|coverage)(?:-[\w.\-]+)?\.png$", n) for s in stems)

    return bool(names & {"summary.json", "comparison.json", "inspect.json"} or stems) and all(map(known, names))


def check_output_folder(out_dir, force=False, inputs=()):
    """Raise :class:`OutputFolderError` unless ``out_dir`` may be (re)written.

    Called by every command before any planning or fitting, so a long run does not end in a refusal.

    Parameters
    ----------
    out_dir : str or os.PathLike
        The output folder.
    force : bool
        Replace an existing folder, which must be one fieldplan wrote (:func:`written_by_fieldplan`).
    inputs : sequence of str
        Files the run reads (scenario, schedule, tracks): a folder holding any of them is never
        replaced.

    Raises
    ------
    OutputExistsError
        The folder exists and ``force`` is false, or the path is a file.
    OutputFolderError
        The folder is the working folder, one of its parents, the home folder, a folder holding an
        input of the run, a folder fieldplan did not write, or its parent cannot be written.
    """
    out = os.path.abspath(os.fspath(out_dir))
    real = os.path.realpath(out)
    if os.path.isfile(out):
        raise OutputExistsError(f"output path {out!r} is a file, not a folder; choose another --out.")
    cwd = os.path.realpath(os.getcwd())
    home = os.path.realpath(os.path.expanduser("~"))
    if os.path.exists(out):
        what = ("the working folder" if real == cwd else "a parent of the working folder" if _is_within(cwd, real)
                else "your home folder" if real == home else "a parent of your home folder" if _is_within(home, real)
                else None)
        if what is None:
            held = [p for p in inputs if p and _is_within(os.path.realpath(p), real)]
            if held:
                what = f"the folder holding {held[0]!r}, an input of this run"
        if what is not None:
            raise OutputFolderError(f"refusing to use {out!r} as the output folder: it is {what}, and an output "
                                    "folder is replaced as a whole. Choose a new folder, e.g. --out "
                                    f"{os.path.join(os.path.relpath(out) if real != cwd else '.', 'output')!r}.")
        if not force:
            raise OutputExistsError(f"output folder {out!r} already exists; pass --force to replace it or choose "
                                    "another --out.")
        if os.listdir(out) and not written_by_fieldplan(out):
            raise OutputFolderError(f"refusing to replace {out!r}: it was not written by fieldplan (no {MARKER} "
                                    "marker inside), and --force replaces only folders fieldplan wrote. Choose "
                                    "another --out, or move its files away yourself.")
    _check_writable(out)


def _check_writable(out):
    """Raise :class:`OutputFolderError` unless a temporary folder can be made beside ``out``."""
    parent = os.path.dirname(out)
    probe = parent
    while not os.path.exists(probe):
        up = os.path.dirname(probe)
        if up == probe:
            break
        probe = up
    if not os.path.isdir(probe):
        raise OutputFolderError(f"cannot create the output folder {out!r}: {probe!r} is a file, not a folder.")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise OutputFolderError(f"cannot write the output folder {out!r}: the folder {probe!r} is not writable.")
    if probe == parent:
        try:
            os.rmdir(tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.probe-", dir=parent))
        except OSError as exc:
            raise OutputFolderError(f"cannot write the output folder {out!r}: {exc.strerror or exc} "
                                    f"(in {parent!r}).") from None


def clean_stale_temps(out_dir, max_age=STALE_AGE):
    """Remove temporary folders that earlier, killed runs left beside ``out_dir``.

    Only hidden ``.<name>.tmp-*`` / ``.<name>.old-*`` folders holding :data:`MARKER` are touched,
    and only when the process that wrote them is gone (same host) or the marker is older than
    ``max_age`` seconds. A ``.old-*`` folder (a previous output set aside during a swap) is kept
    while ``out_dir`` itself is missing, since it is then the only copy.

    Returns
    -------
    list of str
        Paths removed.
    """
    out = os.path.abspath(os.fspath(out_dir))
    parent, base = os.path.dirname(out), os.path.basename(out)
    removed = []
    try:
        entries = list(os.scandir(parent))
    except OSError:
        return removed
    now = time.time()
    for e in entries:
        if not (e.name.startswith(f".{base}.tmp-") or e.name.startswith(f".{base}.old-")) or not e.is_dir():
            continue
        if e.name.startswith(f".{base}.old-") and not os.path.isdir(out):
            continue
        marker = os.path.join(e.path, MARKER)
        try:
            age = now - os.stat(marker).st_mtime
            with open(marker, encoding="utf-8") as fh:
                info = json.load(fh)
        except (OSError, ValueError):
            continue
        gone = info.get("host") == socket.gethostname() and not _alive(info.get("pid"))
        if gone or age > max_age:
            shutil.rmtree(e.path, ignore_errors=True)
            if not os.path.exists(e.path):
                removed.append(e.path)
    return removed


def _alive(pid):
    if not isinstance(pid, int) or pid <= 0:
        return False
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


def _new_temp(out, command):
    """A fresh temporary folder beside ``out`` with the marker inside, permissions as the umask gives."""
    parent = os.path.dirname(out)
    os.makedirs(parent, exist_ok=True)
    tmp = tempfile.mkdtemp(prefix=f".{os.path.basename(out)}.tmp-", dir=parent)
    os.chmod(tmp, umask_mode(0o777))
    from . import __version__  # noqa: PLC0415

    atomic_write(os.path.join(tmp, MARKER), json.dumps(
        {"written_by": "fieldplan", "version": __version__, "command": command, "pid": os.getpid(),
         "host": socket.gethostname(), "created": time.strftime("%Y-%m-%dT%H:%M:%S%z")}) + "\n")
    return tmp


@contextlib.contextmanager
def output_folder(out_dir, force=False, inputs=(), command="run"):
    """Write an output folder atomically: yields a temporary folder that replaces ``out_dir`` on success.

    The temporary folder sits beside ``out_dir`` (same file system, so the final rename is atomic),
    carries the :data:`MARKER` file and is removed if anything fails or the run is interrupted.
    An OS error while writing is reported naming ``out_dir``, not the temporary path.

    Examples
    --------
    >>> import tempfile, os
    >>> out = os.path.join(tempfile.mkdtemp(), "res")
    >>> with output_folder(out) as tmp:
    ...     atomic_write(os.path.join(tmp, "a.txt"), "hello")
    >>> sorted(os.listdir(out))
    ['.fieldplan-output', 'a.txt']
    """
    check_output_folder(out_dir, force, inputs)
    out = os.path.abspath(os.fspath(out_dir))
    try:
        tmp = _new_temp(out, command)
    except OSError as exc:
        raise OutputFolderError(f"cannot write the output folder {out!r}: {exc.strerror or exc}.") from None
    try:
        try:
            yield tmp
            _swap(tmp, out, force)
        except FieldplanError:
            raise
        except OSError as exc:
            raise OutputFolderError(f"cannot write the output folder {out!r}: {exc.strerror or exc}"
                                    + (f" ({os.path.basename(exc.filename)})" if exc.filename else "")
                                    + ". Nothing was written.") from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


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


def write_outputs(out_dir, run, *, force=False, outputs=None, inputs=None):
    """Write the output folder of a run, atomically.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Folder to create.
    run : fieldplan.compare.RunResult
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
            for p in _write_plots(tmp, run, outputs):
                role = next(k for k, v in FILES.items() if v == os.path.basename(p))
                files[role] = p
            summary["files"] = sorted(FILES[k] for k in files)
        summary["files"] += [FILES["summary"], MARKER]
        files["summary"] = os.path.join(tmp, FILES["summary"])
        atomic_write(files["summary"], json.dumps(summary, indent=1, allow_nan=False))
    return {k: os.path.join(out, os.path.basename(v)) for k, v in files.items()}


def _swap(tmp, out, force):
    """Move the finished temporary folder to ``out`` (replacing an old one only with ``force``)."""
    if os.path.exists(out):
        if not force:
            raise OutputExistsError(f"output folder {out!r} appeared while writing; not replaced.")
        if os.listdir(out) and not written_by_fieldplan(out):
            raise OutputFolderError(f"output folder {out!r} was changed while writing and is no longer one "
                                    "fieldplan wrote; not replaced.")
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
