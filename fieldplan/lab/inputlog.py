"""The input log: which primitive or channel values were on from when, as the drivers write it.

Each row says "from this time on, this setting was on" (held until the next row)::

    # written by fieldplan.lab.drivers
    time [s],primitive,coil_1 [A],coil_2 [A],sent,wall_clock
    0.0,idle,0,0,"OUTP OFF",2026-12-02T03:00:00.000000+00:00
    0.5,pull_left,1.5,0,"CURR 1.5",2026-12-02T03:00:00.500000+00:00

``time`` (unit required) and at least one of ``primitive`` or a channel column (unit in brackets)
are required; ``sent``, ``reply``, ``wall_clock``, ``schedule_time`` and ``note`` are kept for
people and ignored by the join. A schedule CSV written by :meth:`fieldplan.Schedule.write_csv`
(``start [s], duration [s], <channels>, label``) is read as a log too: its ``label`` is the
primitive, and its end is where the log stops. The join (:meth:`InputLog.at`) gives each frame
time the row that was on then; frames before the first row or after the end are *unlogged*.
"""

from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass, field

import numpy as np

from ..calibration.tracking import channel_unit_si, column_unit_factor, parse_column_header
from ..errors import FieldplanError
from ..fileio import atomic_write

__all__ = ["InputLog", "InputLogError", "read_input_log", "LOG_NOTE_COLUMNS"]

#: Columns of a log that are for people (what was sent, the instrument's reply, the wall clock).
LOG_NOTE_COLUMNS = ("sent", "reply", "wall_clock", "schedule_time", "note")


class InputLogError(FieldplanError):
    """An input log is unusable (the message names file, line and column)."""


@dataclass
class InputLog:
    """Settings in force from ``times[j]`` until ``times[j + 1]`` (the last until ``end``).

    Attributes
    ----------
    times : ndarray, shape (J,)
        s, increasing.
    primitive : list of str or None
        Name per row; ``None`` when the log had no primitive column (names are then derived from
        the values by :mod:`fieldplan.calibration.tracking`).
    values : ndarray, shape (J, m)
        Channel values per row, SI.
    channels : tuple of (name, unit)
    end : float
        s, the log's end (``inf`` for a log of changes only).
    source : str or None
    """

    times: np.ndarray
    primitive: list | None
    values: np.ndarray
    channels: tuple = ()
    end: float = float("inf")
    source: str | None = None
    lines: np.ndarray = field(default=None)

    def at(self, t):
        """Row index in force at each time of ``t`` (s), -1 where the log says nothing."""
        t = np.asarray(t, dtype=float)
        j = np.searchsorted(self.times, t, side="right") - 1
        j[(t >= self.end) | (t < self.times[0])] = -1
        return j

    def shifted(self, offset):
        """The same log on a clock ``offset`` seconds later (video clock = log clock + offset)."""
        return InputLog(self.times + offset, self.primitive, self.values, self.channels, self.end + offset,
                        self.source, self.lines)


def read_input_log(path):
    """Read an input log (layout in the module docstring) or a schedule CSV as one.

    Raises
    ------
    InputLogError
        Missing columns or units, unreadable numbers, time not increasing (file and line named).
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise InputLogError(f"{path}: input log not found.")
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.reader(fh)
        raw = [(reader.line_num, r) for r in reader]
    rows = [(ln, r) for ln, r in raw if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#")]
    if len(rows) < 2:
        raise InputLogError(f"{path}: an input log needs a header and at least one row, e.g. "
                            "'time [s],primitive,coil_1 [A]'.")
    hline, head = rows[0]
    try:
        header = parse_column_header(head, path, hline)
    except FieldplanError as exc:
        raise InputLogError(str(exc)) from None
    names = [n for n, _ in header]
    unit = dict(header)
    schedule_form = "start" in names and "duration" in names
    tcol = "start" if schedule_form else "time"
    if tcol not in names:
        raise InputLogError(f"{path}:{hline}: no 'time [s]' column (or 'start [s]' and 'duration [s]' of a "
                            f"schedule); the header has {names}.")
    prim_col = "label" if schedule_form and "label" in names else ("primitive" if "primitive" in names else None)
    skip = {tcol, "duration", prim_col, *LOG_NOTE_COLUMNS}
    chans, factors = [], []
    for n, u in header:
        if n in skip:
            continue
        if u is None:
            raise InputLogError(f"{path}:{hline}: column {n!r} is read as a channel but has no unit; write "
                                f"'{n} [A]' (or '[1]' if dimensionless).")
        si, f = channel_unit_si(u, n, path)
        chans.append((n, si))
        factors.append(f)
    if prim_col is None and not chans:
        raise InputLogError(f"{path}:{hline}: the log must name the primitive or give channel values.")
    if not unit[tcol]:
        raise InputLogError(f"{path}:{hline}: column {tcol!r} needs a unit, e.g. '{tcol} [s]'.")
    tf = column_unit_factor(tcol, unit[tcol], "s", path)
    df = column_unit_factor("duration", unit["duration"], "s", path) if schedule_form else 1.0
    col = {n: j for j, n in enumerate(names)}
    times, prims, vals, lines, durs = [], [], [], [], []
    for ln, r in rows[1:]:
        if len(r) != len(names):
            raise InputLogError(f"{path}:{ln}: row has {len(r)} cells but the header has {len(names)}.")
        try:
            times.append(float(r[col[tcol]]) * tf)
            vals.append([float(r[col[n]]) * f for (n, _), f in zip(chans, factors)])
            if schedule_form:
                durs.append(float(r[col["duration"]]) * df)
        except ValueError as exc:
            raise InputLogError(f"{path}:{ln}: {exc}.") from None
        if prim_col is not None:
            name = r[col[prim_col]].strip()
            if not name:
                raise InputLogError(f"{path}:{ln}: empty {prim_col!r}.")
            prims.append(name)
        lines.append(ln)
    t = np.array(times)
    if not np.all(np.isfinite(t)) or np.any(np.diff(t) <= 0):
        j = int(np.flatnonzero(~np.isfinite(t) | np.r_[False, np.diff(t) <= 0])[0])
        raise InputLogError(f"{path}:{lines[j]}: log times must be finite and increase, got {t[j]:g} s after "
                            f"{t[j - 1] if j else float('nan'):g} s.")
    end = float(t[-1] + durs[-1]) if schedule_form else float("inf")
    return InputLog(t, prims if prim_col is not None else None, np.array(vals, dtype=float).reshape(len(t), -1),
                    tuple(chans), end, path, np.array(lines))


def log_text(channels, rows):
    """CSV text of a driver's log: ``rows`` of (time s, primitive, values, sent, reply, wall clock, schedule time)."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["time [s]", "primitive"] + [f"{c.name} [{c.unit}]" for c in channels]
               + ["sent", "reply", "wall_clock", "schedule_time [s]"])
    for t, prim, values, sent, reply, wall, st in rows:
        w.writerow([f"{t:.6f}", prim] + [repr(float(v)) for v in values] + [sent, reply, wall,
                                                                              "" if st is None else f"{st:.9g}"])
    return buf.getvalue()


def write_log(path, channels, rows):
    """Write a driver's log atomically (layout in the module docstring)."""
    atomic_write(path, log_text(channels, rows))
    return path
