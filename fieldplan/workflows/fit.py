"""The ``fit`` job: a tracking CSV in, a calibrated actuator, its report and its figures out."""

from __future__ import annotations

import json
import os
import warnings

from ..calibration.calibrate import CalibratedActuator, CalibrationError, fit_field
from ..calibration.tracking import read_tracks, velocity_samples
from ..fileio import atomic_write, plain, save_figure
from ..plots.calibration import plot_coverage, plot_residuals, plot_vectors

__all__ = ["calibrate_command"]


# ------------------------------------------------------------------------------------------------
# the whole job
# ------------------------------------------------------------------------------------------------
def calibrate_command(tracks_csv, out_dir, *, primitives=None, units=None, idle=None, name="actuator",
                      window=9, polyorder=2, stride=None, max_jump=None, sort=False, kernel="thin_plate_spline",
                      smoothing=None, folds=5, min_samples=20, max_samples=800, bandwidth=None, plots=True,
                      note=None, warn=True, rng=0, skip_bad_rows=False, report_dir=None):
    """Fit a calibrated actuator from a tracking CSV and write it with a report.

    Writes into ``out_dir`` (created if needed): ``<name>.npz`` + ``<name>.json`` (the actuator,
    load with :func:`load_calibrated`), ``<name>-report.json`` (the returned dict), and with
    ``plots`` ``<name>-vectors.png``, ``<name>-residuals.png``, ``<name>-coverage.png`` (one set
    per body kind, suffixed ``-<kind>`` when there are several).

    Parameters
    ----------
    tracks_csv : str or os.PathLike
        Tracking CSV (layout in :mod:`fieldplan.calibration.tracking`).
    out_dir : str or os.PathLike
    primitives : sequence of str, optional
        Fit only these primitives (default all in the file).
    units : dict, optional
        Units of columns without ``[unit]`` in the header.
    idle : str, optional
        Primitive that is the idle (all-off) input.
    name : str
        Stem of the output files.
    window, polyorder, stride, max_jump, sort
        See :func:`fieldplan.calibration.tracking.velocity_samples` and :func:`fieldplan.calibration.tracking.read_tracks`.
    kernel, smoothing, folds, min_samples, max_samples, bandwidth
        See :func:`fit_field`.
    plots : bool
    note : str, optional
        Text stored in the actuator's JSON.
    warn : bool
        Re-emit the data and calibration warnings (they are always listed in the report's
        ``warnings``; a command-line caller that prints those may pass False).
    rng : int
    skip_bad_rows : bool
        Skip unreadable rows of the tracking file and list them in the report's ``skipped_rows``
        (see :func:`fieldplan.calibration.tracking.read_tracks`).
    report_dir : str, optional
        Folder the report's paths name, default ``out_dir`` (the command line writes into a
        temporary folder that is renamed to ``report_dir`` once complete).

    Returns
    -------
    dict
        ``actuator`` (JSON path), ``arrays`` (NPZ path), ``report`` (report path), ``plots`` (dict
        of PNG paths), ``fields`` (per-field rows: samples, CV error, noise floor, speed, all SI),
        ``tracking`` (frame, track, segment and issue counts), ``issues`` (text of each data
        issue), ``warnings`` (text of each warning raised), ``skipped``, ``skipped_rows`` (text of
        each row skipped by ``skip_bad_rows``), ``channels``, ``primitives``, ``tags``.

    Raises
    ------
    TrackingDataError, UnitError, CalibrationError
        With a message naming the file, line, column, track or primitive at fault.
    """
    if not isinstance(name, str) or not name or os.sep in name or name.startswith("."):
        raise CalibrationError(f"name must be a plain file stem such as 'actuator', got {name!r}.")
    out_dir = os.fspath(out_dir)
    if os.path.exists(out_dir) and not os.path.isdir(out_dir):
        raise CalibrationError(f"out_dir {out_dir!r} exists and is not a directory.")
    caught = []
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        data = read_tracks(tracks_csv, units=units, max_jump=max_jump, sort=sort, skip_bad_rows=skip_bad_rows)
        samples = velocity_samples(data, window=window, polyorder=polyorder, stride=stride)
        fit = fit_field(samples, kernel=kernel, smoothing=smoothing, folds=folds, min_samples=min_samples,
                        max_samples=max_samples, bandwidth=bandwidth, primitives=primitives, rng=rng)
        act = CalibratedActuator(fit, idle_primitive=idle)
    for w in rec:
        caught.append(f"{w.category.__name__}: {w.message}")
        if warn:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    os.makedirs(out_dir, exist_ok=True)
    stem = os.path.join(out_dir, name)
    json_path, npz_path = act.save(stem, note=note)
    plot_paths = {}
    if plots:
        for kind in fit.kinds:
            suffix = "" if len(fit.kinds) == 1 else f"-{kind}"
            for what, fn in (("vectors", plot_vectors), ("residuals", plot_residuals), ("coverage", plot_coverage)):
                fig = fn(fit, kind=kind)
                p = f"{stem}-{what}{suffix}.png"
                save_figure(fig, p, dpi=110)
                plot_paths[f"{what}{suffix}"] = p
    report = {
        "actuator": json_path, "arrays": npz_path, "report": stem + "-report.json", "plots": plot_paths,
        "source": os.fspath(tracks_csv),
        "fields": fit.report(), "tracking": data.summary(), "samples": len(samples),
        "position_noise_m": samples.position_noise,
        "issues": [str(i) for i in samples.issues], "warnings": caught, "skipped": list(fit.skipped),
        "channels": [{"name": c.name, "unit": c.unit, "values": list(c.values)} for c in act.channels],
        "primitives": [{"name": p.name, "values": list(p.values)} for p in act.primitives()],
        "idle_primitive": act.idle_primitive, "tags": sorted(act.tags), "extent_m": list(act.extent),
        "skipped_rows": [f"line {i.line}: {i.message}" for i in data.issues if i.kind == "skipped"],
    }
    if report_dir is not None:
        # Name the files where they will be, not in the temporary folder they are written to.
        final = os.path.abspath(os.fspath(report_dir))

        def moved(p):
            return os.path.join(final, os.path.relpath(p, out_dir))

        report.update(actuator=moved(json_path), arrays=moved(npz_path), report=moved(stem + "-report.json"),
                      plots={k: moved(v) for k, v in plot_paths.items()})
    report_path = stem + "-report.json"
    atomic_write(report_path, json.dumps(plain(report), indent=2) + "\n")
    return report
