"""Playing a saved schedule on an instrument, on the wall clock, leaving it idle however it ends.

:func:`play` checks the whole schedule against the declared limits first (nothing is sent on a
violation), then sends each segment when it is due (:class:`~fieldplan.lab.pacing.RealTimeClock`)
through a driver (:mod:`fieldplan.lab.drivers`), which checks every segment again before sending.
The driver is used as a context manager, so the instrument returns to the idle input at the end,
on ``KeyboardInterrupt`` and on any error. :func:`load_for_play` reads a schedule file with the
limits it was checked against; :func:`limits_text` is what the confirmation prompt shows.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field

import numpy as np

from ..contract.schedule import HardwareLimits, Schedule
from ..errors import FieldplanError
from .pacing import RealTimeClock

__all__ = ["PlayReport", "play", "load_for_play", "limits_text"]


@dataclass
class PlayReport:
    """What a :func:`play` did.

    Attributes
    ----------
    completed : bool
        Every segment was sent.
    interrupted : bool
        Stopped by ``KeyboardInterrupt`` (the instrument was put at idle).
    segments_sent : int
    latency : ndarray
        Per segment sent, how late it went out, s.
    jitter : float
        s, standard deviation of ``latency``.
    overruns : list of (index, time s, lateness s)
    message : str
    log : str or None
        The driver's log file.
    signal : int or None
        The signal that stopped it, when a handler turned one into a ``KeyboardInterrupt`` with a
        ``signum`` (the ``fieldplan`` command does so for SIGTERM and SIGHUP).
    """

    completed: bool
    interrupted: bool
    segments_sent: int
    latency: np.ndarray = field(default_factory=lambda: np.zeros(0))
    jitter: float = 0.0
    overruns: list = field(default_factory=list)
    message: str = ""
    log: str | None = None
    signal: int | None = None


def play(schedule, driver, *, limits=None, clock=None, on_segment=None):
    """Play ``schedule`` on ``driver`` in wall-clock time; idle at the end, on interrupt and on error.

    Parameters
    ----------
    schedule : Schedule
    driver : fieldplan.lab.drivers.Driver
        Built on the schedule's channels (and the same limits).
    limits : HardwareLimits, optional
        Checked on the whole schedule before anything is sent (default the driver's).
    clock : RealTimeClock, optional
        Default real time.
    on_segment : callable, optional
        ``on_segment(index, segment)`` after each segment is sent (progress, a stop button).

    Returns
    -------
    PlayReport
        ``interrupted=True`` after a ``KeyboardInterrupt`` (which is not re-raised: the instrument
        is idle and the report says how far it got).

    Raises
    ------
    LimitError
        The schedule (before anything is sent) or a segment (then the instrument is idled) breaks
        a declared limit.
    DriverError
        The instrument refused or did not acknowledge a command (the instrument is idled).
    """
    if not isinstance(schedule, Schedule):
        raise FieldplanError(f"play expects a Schedule, got {type(schedule).__name__}.")
    if [c.name for c in schedule.channels] != [c.name for c in driver.channels]:
        raise FieldplanError(f"the schedule's channels {[c.name for c in schedule.channels]} are not the driver's "
                             f"{[c.name for c in driver.channels]}.")
    limits = limits if limits is not None else driver.limits
    schedule.check(limits)
    clock = clock or RealTimeClock()
    sent = 0
    interrupted = False
    signum = None
    driver.guard.horizon = schedule.duration
    with driver:
        try:
            segs = schedule.segments
            if segs:
                clock.start(segs[0].start)
            for j, seg in enumerate(segs):
                clock.wait(seg.start)
                driver(seg)
                clock.sent(seg)
                sent += 1
                if on_segment is not None:
                    on_segment(j, seg)
            if segs:
                clock.wait(schedule.end)       # hold the last segment to its end, then idle
        except KeyboardInterrupt as exc:
            interrupted = True
            signum = getattr(exc, "signum", None)
    n = schedule.n_segments
    msg = (f"interrupted after {sent} of {n} segment(s); the instrument was set to the idle input" if interrupted
           else f"played {sent} segment(s), {schedule.duration:.4g} s; the instrument is at the idle input")
    return PlayReport(sent == n and not interrupted, interrupted, sent, np.asarray(clock.latency), clock.jitter(),
                      list(clock.overruns), msg, driver.log_path, signum)


def load_for_play(path, *, limits=None, channels=None):
    """A schedule and the limits to play it under.

    Parameters
    ----------
    path : str
        ``schedule.json`` (channels with bounds and the limits it was checked against) or
        ``schedule.csv`` (then ``channels`` are needed for its bounds, e.g. from the scenario).
    limits : HardwareLimits or str, optional
        Overrides the file's; a path to a JSON or YAML file with ``time_step``, ``min_dwell`` and
        ``channels: {name: {lower, upper, slew_rate, min_dwell, rms, rms_window}}``.
    channels : sequence of Channel, optional

    Returns
    -------
    (Schedule, HardwareLimits)
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise FieldplanError(f"{path}: no such schedule file.")
    file_limits = None
    if path.lower().endswith(".json"):
        sched = Schedule.read_json(path)
        with open(path, encoding="utf-8") as fh:
            d = json.load(fh)
        if d.get("limits_checked"):
            file_limits = HardwareLimits.from_dict(d["limits_checked"])
    else:
        if channels is None:
            raise FieldplanError(f"{path}: a CSV schedule carries no channel bounds; play the schedule.json beside "
                                 "it, or give the scenario (--scenario) whose actuator declares the channels.")
        sched = Schedule.read_csv(path, channels)
    if isinstance(limits, (str, os.PathLike)):
        limits = _read_limits(os.fspath(limits))
    lim = limits if limits is not None else file_limits
    if lim is None:
        lim = HardwareLimits.from_channels(sched.channels)
    return sched, lim


def _read_limits(path):
    import yaml  # noqa: PLC0415

    if not os.path.exists(path):
        raise FieldplanError(f"{path}: limits file not found.")
    with open(path, encoding="utf-8") as fh:
        d = yaml.safe_load(fh)
    if not isinstance(d, dict):
        raise FieldplanError(f"{path}: limits must be a mapping with 'channels' (and 'time_step', 'min_dwell').")
    unknown = sorted(set(d) - {"channels", "time_step", "min_dwell"})
    if unknown:
        raise FieldplanError(f"{path}: unknown key(s) {unknown}; limits have channels, time_step, min_dwell.")
    try:
        return HardwareLimits.from_dict(d)
    except TypeError as exc:
        raise FieldplanError(f"{path}: {exc}; a channel limit has lower, upper, slew_rate, min_dwell, rms, "
                             "rms_window.") from None


def limits_text(schedule, limits):
    """Lines describing the schedule and every limit it will be held to (the confirmation prompt)."""
    lines = [f"schedule: {schedule.n_segments} segment(s), {schedule.duration:.4g} s, channels "
             + ", ".join(f"{c.name} [{c.unit}]" for c in schedule.channels)]
    if limits.time_step or limits.min_dwell:
        lines.append(f"  time step {limits.time_step or '-'} s, minimum dwell {limits.min_dwell or '-'} s")
    lo_hi = limits.bounds(schedule.channels)
    for k, c in enumerate(schedule.channels):
        lim = limits.get(c.name)
        vals = schedule.values[:, k] if schedule.n_segments else np.zeros(1)
        extra = []
        if lim.slew_rate:
            extra.append(f"slew <= {lim.slew_rate:g} {c.unit}/s")
        if lim.rms:
            extra.append(f"RMS <= {lim.rms:g} {c.unit}" + (f" over {lim.rms_window:g} s" if lim.rms_window else ""))
        if lim.min_dwell:
            extra.append(f"dwell >= {lim.min_dwell:g} s")
        lines.append(f"  {c.name}: allowed [{lo_hi[0][k]:g}, {lo_hi[1][k]:g}] {c.unit}, idle {c.idle:g} {c.unit}; "
                     f"schedule uses [{vals.min():g}, {vals.max():g}] {c.unit}"
                     + ("; " + ", ".join(extra) if extra else ""))
    return lines
