"""Tracking data: read a tracker's CSV, clean it, and turn it into velocity samples.

A tracking file lists, one row per body per video frame, where each tracked body was and which
input setting (primitive) was active. :func:`read_tracks` reads and checks it, splits tracks at
missing frames, primitive switches and jumps (a tracker swapping identities or losing a body),
drops single-frame outliers, and reports every such event as a :class:`TrackIssue` naming the
track, the time and the file line. :func:`velocity_samples` then differentiates each clean piece
(a *segment*) with a Savitzky-Golay filter and returns :class:`VelocitySamples`, the input of
:func:`fieldplan.calibration.calibrate.fit_field` and :func:`fieldplan.calibration.calibrate.fit_parameters`.

CSV layout (comment lines starting with ``#`` are skipped; units go in brackets in the header or
in the ``units`` argument; values are converted to SI with :func:`fieldplan.units.to_si`)::

    # invented example
    track,time [s],x [um],y [um],primitive,kind,coil_1 [A],coil_2 [A]
    b1,0.0,120.5,88.1,pull_left,bead-2um,1.5,0
    b1,0.1,120.1,88.0,pull_left,bead-2um,1.5,0

===============  ========================================================================
column           meaning
===============  ========================================================================
``track``        track identifier (any text); one track is one body
``time``         frame time, unit required (``s``, ``ms``, ...)
``x``, ``y``     position, length unit required (``um``, ``mm``, ``m``; camera pixels are refused)
``primitive``    name of the active input setting (optional if channel columns are given)
``kind``         body kind, matched against :attr:`fieldplan.Body.name` (optional)
any other        a channel value, with its unit in brackets (``[1]`` if dimensionless)
===============  ========================================================================

At least one of ``primitive`` or a channel column must be present. A row with an empty ``x`` or
``y`` is a frame in which the tracker lost that body (reported as ``missing``).
"""

from __future__ import annotations

import csv
import os
import re
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.signal import savgol_coeffs, savgol_filter

from ..errors import FieldplanError, UnitError
from ..fileio import atomic_open
from ..units import to_si, ureg
from ..world.physics import diffusion_coefficient

__all__ = [
    # the CSV header syntax and cleaning steps, shared with fieldplan.lab
    "parse_column_header", "channel_unit_si", "column_unit_factor", "setting_name", "read_primitive_values",
    "clean_tracks",
    "TrackingDataError",
    "TrackingWarning",
    "TrackIssue",
    "TrackingData",
    "VelocitySamples",
    "read_tracks",
    "write_tracks",
    "velocity_samples",
    "synthetic_tracks",
    "RESERVED_COLUMNS",
]

#: Column names with a fixed meaning; every other column is a channel.
RESERVED_COLUMNS = ("track", "time", "x", "y", "primitive", "kind")

# SI units a channel value is stored in, tried in order; a declared unit is converted to the first
# one of the same dimension (so "mA" -> "A", "kHz" -> "Hz", "mV" -> "V").
_SI_UNITS = ("A", "V", "Hz", "T", "m", "s", "W", "N", "Pa", "K", "rad", "dimensionless")

# A step counts as a jump when it deviates from the locally expected step by more than
# JUMP_FACTOR robust noise scales plus half the expected step. 8 scales of a Rayleigh-distributed
# deviation has a false-alarm probability of exp(-32) per step (common practice, no source).
JUMP_FACTOR = 8.0
# A time step longer than this multiple of the track's median frame interval is a gap.
GAP_FACTOR = 1.5
# Frame intervals inside a segment may vary by this fraction before the segment is reported as
# irregular (the Savitzky-Golay filter assumes uniform sampling).
IRREGULAR_TOL = 0.1


class TrackingDataError(FieldplanError):
    """A tracking file or tracking array is unusable.

    Attributes
    ----------
    path : str or None
        The file.
    line : int or None
        1-based line in the file.
    column : str or None
        The column concerned.
    track : str or None
        The track concerned.
    """

    def __init__(self, message, *, path=None, line=None, column=None, track=None):
        where = []
        if path is not None:
            where.append(str(path) + (f":{line}" if line is not None else ""))
        elif line is not None:
            where.append(f"line {line}")
        if column is not None:
            where.append(f"column {column!r}")
        if track is not None:
            where.append(f"track {track!r}")
        super().__init__((", ".join(where) + ": " if where else "") + message)
        self.path, self.line, self.column, self.track = path, line, column, track


class TrackingWarning(UserWarning):
    """Tracking data had gaps, jumps, outliers or too-short pieces (details in ``issues``)."""


@dataclass(frozen=True)
class TrackIssue:
    """One event found while cleaning tracking data.

    Attributes
    ----------
    kind : str
        ``"missing"`` (row without position), ``"gap"`` (frames missing in time), ``"jump"``
        (track split at an implausible step), ``"outlier"`` (one frame dropped), ``"irregular"``
        (uneven frame intervals), ``"short"`` (segment too short to differentiate, dropped),
        ``"sorted"`` (rows were out of time order and were sorted on request), ``"skipped"`` (an
        unreadable row skipped with ``skip_bad_rows``; ``time`` is NaN and ``track`` empty).
    track : str
    time : float
        s, time of the event (start of a gap, frame before a jump, the outlier's frame).
    line : int or None
        1-based line in the source file, when known.
    message : str
    """

    kind: str
    track: str
    time: float
    line: int | None
    message: str

    def __str__(self):
        where = f"line {self.line}, " if self.line is not None else ""
        if self.kind == "skipped":
            return f"skipped {where.rstrip(', ')}: {self.message}"
        return f"{self.kind}: {where}track {self.track!r} at t = {self.time:.6g} s: {self.message}"


@dataclass
class TrackingData:
    """Cleaned tracking data, SI units, one row per kept frame.

    Attributes
    ----------
    track : ndarray of str, shape (N,)
    time : ndarray, shape (N,)
        s.
    xy : ndarray, shape (N, 2)
        m.
    primitive : ndarray of str, shape (N,)
        Active primitive name per frame (derived from channel values if the file had none).
    kind : ndarray of object, shape (N,)
        Body kind per frame, ``None`` when the file had no ``kind`` column.
    segment : ndarray of int, shape (N,)
        Segment index: a run of frames of one track under one primitive with no gap or jump.
        Rows are sorted by segment, then time.
    line : ndarray of int, shape (N,)
        Source line of each row (0 when not read from a file).
    channels : tuple of (name, unit)
        Channel columns and their SI units, in file order (empty if the file had none).
    primitive_values : dict
        Primitive name -> tuple of channel values (SI, channel order); empty tuple if no channels.
    issues : list of TrackIssue
    source : str or None
        Path of the file read.
    """

    track: np.ndarray
    time: np.ndarray
    xy: np.ndarray
    primitive: np.ndarray
    kind: np.ndarray
    segment: np.ndarray
    line: np.ndarray
    channels: tuple = ()
    primitive_values: dict = field(default_factory=dict)
    issues: list = field(default_factory=list)
    source: str | None = None

    def __len__(self):
        return len(self.time)

    @property
    def tracks(self):
        """Track identifiers, in order of first appearance."""
        _, first = np.unique(self.track, return_index=True)
        return [str(self.track[i]) for i in np.sort(first)]

    @property
    def primitives(self):
        """Primitive names, in order of first appearance."""
        _, first = np.unique(self.primitive, return_index=True)
        return [str(self.primitive[i]) for i in np.sort(first)]

    @property
    def kinds(self):
        """Body kinds present (``[None]`` if the file had no kind column)."""
        out = []
        for k in self.kind:
            if k not in out:
                out.append(k)
        return out

    def segment_slices(self):
        """List of ``slice`` objects, one per segment (rows are grouped by segment)."""
        if len(self.segment) == 0:
            return []
        cut = np.flatnonzero(np.diff(self.segment)) + 1
        starts = np.r_[0, cut]
        stops = np.r_[cut, len(self.segment)]
        return [slice(int(a), int(b)) for a, b in zip(starts, stops)]

    def summary(self):
        """Counts of frames, tracks, segments and issues by kind (dict)."""
        counts = {}
        for i in self.issues:
            counts[i.kind] = counts.get(i.kind, 0) + 1
        return {"frames": len(self), "tracks": len(self.tracks), "segments": len(self.segment_slices()),
                "primitives": self.primitives, "issues": counts}


@dataclass
class VelocitySamples:
    """Velocity measured along tracks: where, how fast, under which primitive, for which body kind.

    Attributes
    ----------
    xy : ndarray, shape (N, 2)
        Smoothed position at the centre of each differentiation window, m.
    velocity : ndarray, shape (N, 2)
        m/s.
    sigma : ndarray, shape (N,)
        Estimated standard deviation of each velocity component from tracking noise, m/s.
    time : ndarray, shape (N,)
        s, window centre.
    track : ndarray of str, shape (N,)
    segment : ndarray of int, shape (N,)
        Segment of :class:`TrackingData` the sample came from (samples of one segment are
        neighbours in space; cross-validation holds out whole segments).
    primitive : ndarray of str, shape (N,)
    kind : ndarray of object, shape (N,)
    channels : tuple of (name, unit)
    primitive_values : dict
        Primitive name -> channel values (SI).
    position_noise : float
        Estimated tracking noise (standard deviation per coordinate), m.
    window, polyorder, stride : int
        Savitzky-Golay settings used (frames).
    issues : list of TrackIssue
        Those of the tracking data plus the segments dropped as too short.
    source : str or None
    """

    xy: np.ndarray
    velocity: np.ndarray
    sigma: np.ndarray
    time: np.ndarray
    track: np.ndarray
    segment: np.ndarray
    primitive: np.ndarray
    kind: np.ndarray
    channels: tuple = ()
    primitive_values: dict = field(default_factory=dict)
    position_noise: float = float("nan")
    window: int = 0
    polyorder: int = 0
    stride: int = 0
    issues: list = field(default_factory=list)
    source: str | None = None

    def __len__(self):
        return len(self.xy)

    def groups(self):
        """``[(kind, primitive, index array), ...]``, one entry per body kind and primitive."""
        out = []
        keys = {}
        for i, (k, p) in enumerate(zip(self.kind, self.primitive)):
            keys.setdefault((k, str(p)), []).append(i)
        for (k, p), idx in keys.items():
            out.append((k, p, np.asarray(idx, dtype=int)))
        return out

    def subset(self, index):
        """The samples at ``index`` (bool mask or integer array), same metadata."""
        idx = np.asarray(index)
        return VelocitySamples(
            self.xy[idx], self.velocity[idx], self.sigma[idx], self.time[idx], self.track[idx],
            self.segment[idx], self.primitive[idx], self.kind[idx], self.channels,
            dict(self.primitive_values), self.position_noise, self.window, self.polyorder,
            self.stride, list(self.issues), self.source,
        )


# ------------------------------------------------------------------------------------------------
# reading
# ------------------------------------------------------------------------------------------------
_HEADER = re.compile(r"^\s*([^\[\]]*?)\s*(?:\[\s*([^\[\]]*?)\s*\])?\s*$")


def parse_column_header(cells, path, line):
    """(name, unit) of each header cell ``name [unit]`` of a tracking or log CSV (errors name ``path`` and ``line``)."""
    out = []
    for j, cell in enumerate(cells):
        m = _HEADER.match(cell)
        if not m or not m.group(1):
            raise TrackingDataError(
                f"header cell {j + 1} ({cell!r}) is not 'name' or 'name [unit]'.", path=path, line=line)
        out.append((m.group(1), m.group(2)))
    names = [n for n, _ in out]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise TrackingDataError(f"duplicate column(s) {dup} in the header.", path=path, line=line)
    return out


def channel_unit_si(unit, column, path):
    """(SI unit name, factor) for a channel column's declared unit."""
    if unit in ("", "1", "-"):
        return "1", 1.0
    reg = ureg()
    try:
        q = reg.Quantity(1.0, reg.Unit(unit.replace("µ", "u").replace("μ", "u")))
    except Exception as exc:  # pint raises several types for unknown units
        raise UnitError(f"{path}: channel column {column!r} has unit [{unit}] which cannot be read ({exc}).") \
            from None
    for si in _SI_UNITS:
        if q.dimensionality == reg.Unit(si).dimensionality:
            return ("1" if si == "dimensionless" else si), float(q.to(si).magnitude)
    base = q.to_base_units()
    return f"{base.units:~}", float(base.magnitude)


def column_unit_factor(name, unit, kind, path):
    """SI factor of a column's declared unit, checked to be a ``kind`` (length or time) unit."""
    try:
        pint_name = str(ureg().Unit(unit.strip().replace("µ", "u").replace("μ", "u")))
    except Exception:  # noqa: BLE001 - to_si below reports unreadable units
        pint_name = ""
    if "pixel" in pint_name or unit.strip().lower() in ("px", "pix", "pixel", "pixels"):
        # pint reads "px" as a CSS pixel (1/96 inch), which is never a camera pixel.
        raise UnitError(
            f"{path}: column {name!r} is in [{unit}]: camera pixels are not a length unit. Convert the "
            "positions with the camera's pixel size (e.g. x_um = x_px * 0.65) and declare a length unit.")
    return to_si(f"1 {unit}", kind, name=f"{path}: column {name!r} [{unit}]")


_BINARY_HINT = ("the file does not look like a CSV text file (a binary file, or text in another encoding: "
                "export the tracks as UTF-8 CSV)")


def _read_lines(path, skip, bad):
    """``[(line, cells)]`` of a CSV file, one record per physical line.

    A tracking file never needs a cell spanning lines, so reading line by line lets an unterminated
    quote or an undecodable byte be reported at its own line (or skipped, recording ``(line,
    reason)`` in ``bad``) instead of swallowing the rest of the file.
    """
    if not os.path.isfile(path):
        raise TrackingDataError("is not a regular file (a device or a pipe cannot be read as tracking data).",
                                path=path)
    with open(path, "rb") as fh:
        head = fh.read(65536)
        if b"\0" in head and not skip:     # refuse a binary file before reading all of it
            nul = head.find(b"\0")
            raise TrackingDataError(f"{_BINARY_HINT}; it holds NUL bytes.", path=path,
                                    line=head.count(b"\n", 0, nul) + 1)
        blob = head + fh.read()
    if blob.startswith(b"\xef\xbb\xbf"):
        blob = blob[3:]
    nul = blob.find(b"\0")
    if nul >= 0 and not skip:
        raise TrackingDataError(f"{_BINARY_HINT}; it holds NUL bytes.", path=path, line=blob.count(b"\n", 0, nul) + 1)
    try:
        texts = blob.decode("utf-8").split("\n")
    except UnicodeDecodeError as exc:
        if not skip:
            raise TrackingDataError(f"{_BINARY_HINT}; byte {blob[exc.start]:#04x} is not UTF-8.", path=path,
                                    line=blob.count(b"\n", 0, exc.start) + 1) from None
        texts = [b.decode("utf-8", errors="replace") for b in blob.split(b"\n")]
    out = []
    for ln, text in enumerate(texts, 1):
        text = text[:-1] if text.endswith("\r") else text
        if "\0" in text or "\ufffd" in text:
            bad.append((ln, "not UTF-8 text (binary data)"))
            continue
        try:
            cells = next(csv.reader([text], strict=True), [])
        except csv.Error as exc:
            reason = f"cannot be read as CSV ({exc}); a quoted cell must close on its own line"
            if not skip:
                raise TrackingDataError(reason + ".", path=path, line=ln) from None
            bad.append((ln, reason))
            continue
        out.append((ln, cells))
    return out


def read_tracks(path, *, units=None, max_jump=None, sort=False, warn=True, skip_bad_rows=False):
    """Read a tracking CSV, check it, and split it into clean segments.

    Parameters
    ----------
    path : str or os.PathLike
        The CSV file (layout in the module docstring).
    units : dict, optional
        Column name -> unit string, for columns whose header has no ``[unit]`` (e.g.
        ``{"x": "um", "y": "um", "time": "ms"}``). A unit given both ways must agree.
    max_jump : float or str, optional
        Largest plausible deviation of one frame's step from the steps around it, m (or a string
        such as ``"20 um"``). Default: estimated from the data (see ``JUMP_FACTOR``).
    sort : bool
        If False (default) rows of a track that go back in time are an error; if True they are
        sorted and the event is reported.
    warn : bool
        Emit one :class:`TrackingWarning` summarising the issues found.
    skip_bad_rows : bool
        Skip data rows that cannot be read (bad quoting or bytes, wrong number of cells, a
        non-number, an empty required cell) instead of raising at the first; each one skipped is
        reported as a ``"skipped"`` :class:`TrackIssue` naming its line. The header must be readable.

    Returns
    -------
    TrackingData

    Raises
    ------
    TrackingDataError
        Empty file, missing columns, unreadable numbers, time going backwards or repeating within
        a track, a track changing body kind, one primitive name used with different channel values.
    UnitError
        A missing or wrong-dimension unit.

    Examples
    --------
    >>> import tempfile, os
    >>> d = tempfile.mkdtemp()
    >>> p = os.path.join(d, "t.csv")
    >>> with open(p, "w") as f:
    ...     _ = f.write("track,time [s],x [um],y [um],primitive\\n")
    ...     _ = f.writelines(f"a,{0.1 * i:.1f},{2.0 * i},0,push\\n" for i in range(12))
    >>> data = read_tracks(p)
    >>> len(data), data.primitives, round(float(data.xy[-1, 0]) * 1e6, 3)
    (12, ['push'], 22.0)
    """
    path = os.fspath(path)
    units = dict(units or {})
    if not os.path.exists(path):
        raise TrackingDataError("file not found.", path=path)
    if os.path.isdir(path):
        raise TrackingDataError("is a folder, not a tracking CSV file.", path=path)
    bad = []    # (line, reason) of rows skipped with skip_bad_rows
    raw = _read_lines(path, skip_bad_rows, bad)
    rows = [(ln, r) for ln, r in raw if r and any(c.strip() for c in r) and not r[0].lstrip().startswith("#")]
    if bad and (not rows or bad[0][0] < rows[0][0]):
        raise TrackingDataError(f"{_BINARY_HINT}: line {bad[0][0]} {bad[0][1]}, before any header could be read.",
                                path=path, line=bad[0][0])
    if not rows:
        raise TrackingDataError(
            "the file is empty (no header and no data rows); expected a header such as "
            "'track,time [s],x [um],y [um],primitive'.", path=path)
    hline, hcells = rows[0]
    header = parse_column_header(hcells, path, hline)
    body = rows[1:]
    if not body and bad:
        raise TrackingDataError(f"every data row is unreadable (first: line {bad[0][0]}, {bad[0][1]}).",
                                path=path, line=bad[0][0])
    if not body:
        raise TrackingDataError("the file has a header but no data rows.", path=path, line=hline)
    names = [n for n, _ in header]
    for key in units:
        if key not in names:
            raise TrackingDataError(f"units given for column {key!r}, which is not in the header {names}.",
                                    path=path)
    missing = [c for c in ("track", "time", "x", "y") if c not in names]
    if missing:
        raise TrackingDataError(
            f"missing required column(s) {missing}; the header has {names}. Required: track, "
            "time [unit], x [unit], y [unit], and primitive or channel columns.", path=path, line=hline)
    declared = {}
    for n, u in header:
        if u is not None and n in units and units[n].strip() != u:
            raise TrackingDataError(f"unit of column {n!r} is [{u}] in the header but {units[n]!r} in units=.",
                                    path=path, line=hline)
        declared[n] = u if u is not None else units.get(n)
    for n in ("track", "primitive", "kind"):
        if n in names and declared[n] not in (None, ""):
            raise TrackingDataError(f"column {n!r} holds labels and takes no unit, got [{declared[n]}].",
                                    path=path, line=hline, column=n)
    for n, kind in (("time", "s"), ("x", "m"), ("y", "m")):
        if not declared[n]:
            example = "s" if kind == "s" else "um"
            raise UnitError(f"{path}:{hline}: column {n!r} has no unit; write it in the header as "
                            f"'{n} [{example}]' or pass units={{'{n}': ...}}.")
    tf = column_unit_factor("time", declared["time"], "s", path)
    xf = column_unit_factor("x", declared["x"], "m", path)
    yf = column_unit_factor("y", declared["y"], "m", path)
    chan_cols = [n for n in names if n not in RESERVED_COLUMNS]
    channels = []
    factors = []
    for n in chan_cols:
        if declared[n] is None:
            raise TrackingDataError(
                f"column {n!r} is not one of {list(RESERVED_COLUMNS)}, so it is read as a channel, but it has "
                f"no unit: write it as '{n} [A]' (or '[1]' if dimensionless), or remove the column.",
                path=path, line=hline, column=n)
        si, f = channel_unit_si(declared[n], n, path)
        channels.append((n, si))
        factors.append(f)
    if "primitive" not in names and not chan_cols:
        raise TrackingDataError(
            "no 'primitive' column and no channel columns: the file must say which input was active "
            "in each frame.", path=path, line=hline)

    col = {n: j for j, n in enumerate(names)}
    width = len(names)
    n_rows = len(body)
    lines = np.array([ln for ln, _ in body], dtype=int)
    cells = []
    for ln, r in body:
        if len(r) != width:
            reason = f"row has {len(r)} cells but the header has {width}"
            if not skip_bad_rows:
                raise TrackingDataError(reason + ".", path=path, line=ln)
            bad.append((ln, reason))
            r = [""] * width        # dropped below with the other bad rows
        cells.append([c.strip() for c in r])
    table = np.array(cells, dtype=object).reshape(n_rows, width)
    drop = np.zeros(n_rows, bool)
    drop[np.isin(lines, [ln for ln, _ in bad])] = True

    def fail(i, reason, name):
        """Raise for row i, or mark it to be skipped."""
        if not skip_bad_rows:
            raise TrackingDataError(reason, path=path, line=int(lines[i]), column=name)
        if not drop[i]:
            drop[i] = True
            bad.append((int(lines[i]), f"column {name!r}: {reason.rstrip('.')}"))

    def numbers(name, allow_empty):
        colv = table[:, col[name]]
        empty = (colv == "") | np.isin(np.char.lower(colv.astype(str)), ("nan", "na"))
        if not allow_empty:
            for i in np.flatnonzero(empty & ~drop):
                fail(i, "empty value.", name)
        out = np.full(n_rows, np.nan)
        ok = ~empty & ~drop
        try:
            out[ok] = colv[ok].astype(float)
        except ValueError:
            # Find the offending cells to name their lines.
            for i in np.flatnonzero(ok):
                try:
                    out[i] = float(colv[i])
                except ValueError:
                    fail(i, f"{colv[i]!r} is not a number.", name)
        for i in np.flatnonzero(ok & ~drop & ~np.isfinite(out)):
            fail(i, f"{colv[i]!r} is not finite.", name)
        return out

    track = table[:, col["track"]].astype(str)
    for i in np.flatnonzero((track == "") & ~drop):
        fail(i, "empty track id.", "track")
    time = numbers("time", False) * tf
    x = numbers("x", True) * xf
    y = numbers("y", True) * yf
    values = np.empty((n_rows, len(chan_cols)))
    for j, n in enumerate(chan_cols):
        values[:, j] = numbers(n, False) * factors[j]
    if "primitive" in names:
        prim = table[:, col["primitive"]].astype(str)
        for i in np.flatnonzero((prim == "") & ~drop):
            fail(i, "empty primitive name.", "primitive")
    else:
        prim = np.array([setting_name(channels, v) for v in values], dtype=object).astype(str)
    kind = table[:, col["kind"]].astype(object) if "kind" in names else np.full(n_rows, None, dtype=object)
    if "kind" in names:
        for i in np.flatnonzero((kind == "") & ~drop):
            fail(i, "empty body kind.", "kind")
    if drop.any():
        keep = ~drop
        if not keep.any():
            raise TrackingDataError(f"every data row is unreadable (first: line {bad[0][0]}, {bad[0][1]}).",
                                    path=path, line=bad[0][0])
        track, time, x, y, values, prim, kind, lines = (a[keep] for a in (track, time, x, y, values, prim, kind,
                                                                           lines))

    prim_values = read_primitive_values(prim, values, channels, lines, path)
    data = clean_tracks(track, time, np.column_stack([x, y]), prim, kind, lines, tuple(channels), prim_values,
                  path, max_jump=max_jump, sort=sort, warn=False)
    skipped = [TrackIssue("skipped", "", float("nan"), ln, reason)
               for ln, reason in sorted(bad)]
    data.issues = skipped + list(data.issues)
    if warn:
        _warn_issues(data)
    return data


def setting_name(channels, v):
    """The name of an unnamed channel setting: ``"coil_x=1 A,coil_y=-0.5 A"`` (``"idle"`` when all are zero)."""
    parts = [f"{n}={val:g}{'' if u == '1' else ' ' + u}" for (n, u), val in zip(channels, v) if val != 0]
    return ",".join(parts) if parts else "idle"


def read_primitive_values(prim, values, channels, lines, path):
    """Channel values of each named primitive, checked to be the same on every row that names it."""
    out = {}
    if not channels:
        return {str(p): () for p in dict.fromkeys(str(q) for q in prim)}
    for p in dict.fromkeys(str(q) for q in prim):
        idx = np.flatnonzero(prim == p)
        v = values[idx]
        ref = v[0]
        scale = np.maximum(np.abs(ref), 1e-300)
        off = np.flatnonzero(np.any(np.abs(v - ref) > 1e-9 * scale, axis=1))
        if len(off):
            i = idx[off[0]]
            raise TrackingDataError(
                f"primitive {p!r} has channel values {dict(zip([c for c, _ in channels], ref.tolist()))} "
                f"at line {lines[idx[0]]} but {dict(zip([c for c, _ in channels], values[i].tolist()))} here; "
                "one primitive name must mean one setting of all channels.",
                path=path, line=int(lines[i]), column="primitive")
        out[str(p)] = tuple(float(a) for a in ref)
    return out


def clean_tracks(track, time, xy, prim, kind, lines, channels, prim_values, path, *, max_jump=None, sort=False,
           warn=True):
    """Order rows by track and time, drop missing positions, split at gaps, switches and jumps."""
    issues = []
    src = path
    if max_jump is not None:
        max_jump = to_si(max_jump, "m", name="max_jump")
        if not max_jump > 0:
            raise TrackingDataError(f"max_jump must be > 0 m, got {max_jump}.")
    order_tracks = list(dict.fromkeys(track.tolist()))
    keep_rows = []
    seg_of = []
    seg = 0
    pooled_dev = []
    runs = []   # (row indices, dt) per gap- and switch-free run, before jump detection
    for tid in order_tracks:
        idx = np.flatnonzero(track == tid)          # file order
        kinds = set(kind[idx].tolist())
        if len(kinds) > 1:
            raise TrackingDataError(f"changes body kind ({sorted(map(str, kinds))}); one track is one body.",
                                    path=src, track=tid, line=int(lines[idx[0]]))
        t = time[idx]
        dt = np.diff(t)
        back = np.flatnonzero(dt <= 0)
        if len(back):
            if not sort:
                i0, i1 = idx[back[0]], idx[back[0] + 1]
                what = "repeats" if dt[back[0]] == 0 else "goes back"
                raise TrackingDataError(
                    f"time {what}: {t[back[0]]:.6g} s at line {lines[i0]} then {t[back[0] + 1]:.6g} s; "
                    "time must increase within a track (pass sort=True to sort rows by time instead).",
                    path=src, line=int(lines[i1]), column="time", track=tid)
            idx = idx[np.argsort(t, kind="stable")]
            t = time[idx]
            if np.any(np.diff(t) == 0):
                j = np.flatnonzero(np.diff(t) == 0)[0]
                raise TrackingDataError(f"two frames at the same time {t[j]:.6g} s.", path=src,
                                        line=int(lines[idx[j + 1]]), column="time", track=tid)
            issues.append(TrackIssue("sorted", tid, float(t[0]), int(lines[idx[0]]),
                                     "rows were not in time order and were sorted"))
        lost = ~np.all(np.isfinite(xy[idx]), axis=1)
        for i in idx[lost]:
            issues.append(TrackIssue("missing", tid, float(time[i]), int(lines[i]), "no position in this frame"))
        idx = idx[~lost]
        if len(idx) == 0:
            continue
        t = time[idx]
        dt = np.diff(t)
        frame = float(np.median(dt)) if len(dt) else 0.0
        cut = np.zeros(len(idx), dtype=bool)           # cut[i]: a new run starts at row i
        if len(dt):
            gap = np.flatnonzero(dt > GAP_FACTOR * frame)
            for g in gap:
                n_miss = int(round(dt[g] / frame)) - 1
                issues.append(TrackIssue(
                    "gap", tid, float(t[g]), int(lines[idx[g]]),
                    f"{dt[g]:.6g} s to the next frame (about {n_miss} frame(s) missing); track split"))
            cut[gap + 1] = True
            switch = np.flatnonzero(prim[idx][1:] != prim[idx][:-1])
            cut[switch + 1] = True
        starts = np.r_[0, np.flatnonzero(cut[1:]) + 1]
        stops = np.r_[starts[1:], len(idx)]
        for a, b in zip(starts, stops):
            r = idx[a:b]
            runs.append((tid, r))
            if len(r) >= 5:
                dev, _ = _step_deviation(xy[r])
                pooled_dev.append(dev)
    if pooled_dev and max_jump is None:
        allv = np.concatenate(pooled_dev)
        # Median of a Rayleigh variable is 1.1774 times the per-component scale.
        noise_scale = float(np.median(allv)) / 1.1774 if len(allv) else 0.0
    else:
        noise_scale = 0.0
    for tid, r in runs:
        pieces = [r]
        if len(r) >= 5:
            pieces = _split_jumps(tid, r, time, xy, lines, noise_scale, max_jump, issues)
        for p in pieces:
            if len(p) == 0:
                continue
            keep_rows.append(p)
            seg_of.append(np.full(len(p), seg))
            dtp = np.diff(time[p])
            if len(dtp) > 1 and np.max(np.abs(dtp - dtp.mean())) > IRREGULAR_TOL * dtp.mean():
                issues.append(TrackIssue(
                    "irregular", tid, float(time[p[0]]), int(lines[p[0]]),
                    f"frame intervals vary from {dtp.min():.4g} to {dtp.max():.4g} s within a segment; "
                    "the derivative assumes their mean"))
            seg += 1
    rows = np.concatenate(keep_rows) if keep_rows else np.zeros(0, dtype=int)
    segment = np.concatenate(seg_of) if seg_of else np.zeros(0, dtype=int)
    if len(rows) == 0:
        raise TrackingDataError("no frame with a position is left after removing missing positions.", path=src)
    data = TrackingData(track[rows].astype(str), time[rows], xy[rows], prim[rows].astype(str),
                        kind[rows], segment, lines[rows], channels, prim_values, issues, src)
    if warn:
        _warn_issues(data)
    return data


def _warn_issues(data):
    """One TrackingWarning summarising the issues of ``data`` (a requested sort alone is not one)."""
    if any(i.kind != "sorted" for i in data.issues):
        counts = data.summary()["issues"]
        text = ", ".join(f"{v} {k}" for k, v in counts.items())
        first = next(i for i in data.issues if i.kind != "sorted")
        warnings.warn(f"{data.source or 'tracking data'}: {text} (first: {first}); see TrackingData.issues.",
                      TrackingWarning, stacklevel=4)


def _step_deviation(p):
    """Deviation of each step from the median of the (up to) four steps around it.

    Returns (|deviation| (L-1,), expected step (L-1, 2)).
    """
    steps = np.diff(p, axis=0)
    L = len(steps)
    pad = np.full((L + 4, 2), np.nan)
    pad[2:-2] = steps
    win = np.lib.stride_tricks.sliding_window_view(pad, 5, axis=0)   # (L, 2, 5)
    neigh = win[:, :, [0, 1, 3, 4]]
    pred = np.nanmedian(neigh, axis=2)
    dev = np.linalg.norm(steps - pred, axis=1)
    return dev, pred


def _split_jumps(tid, r, time, xy, lines, noise_scale, max_jump, issues):
    p = xy[r]
    dev, pred = _step_deviation(p)
    if max_jump is not None:
        limit = np.full(len(dev), max_jump)
    else:
        # Relative floor: a jump must also be large against the step itself, so that smooth but
        # fast changes of speed in noise-free data are never cut.
        limit = JUMP_FACTOR * noise_scale + 0.5 * np.linalg.norm(pred, axis=1) + 1e-15
    bad = dev > limit
    drop = np.zeros(len(r), dtype=bool)
    split_after = np.zeros(len(r), dtype=bool)
    steps = np.diff(p, axis=0)
    k = 0
    while k < len(bad):
        if not bad[k]:
            k += 1
            continue
        if k + 1 < len(bad) and bad[k + 1]:
            # Two deviating steps that cancel: the frame between them is an outlier.
            net = steps[k] + steps[k + 1] - (pred[k] + pred[k + 1])
            if np.linalg.norm(net) <= max(limit[k], limit[k + 1]):
                i = k + 1
                drop[i] = True
                # Split around the hole too: the derivative filter needs evenly spaced frames.
                split_after[k] = True
                issues.append(TrackIssue(
                    "outlier", tid, float(time[r[i]]), int(lines[r[i]]),
                    f"frame {np.linalg.norm(steps[k]) * 1e6:.3g} um off the track and back; dropped, "
                    "track split"))
                k += 2
                continue
        split_after[k] = True
        issues.append(TrackIssue(
            "jump", tid, float(time[r[k]]), int(lines[r[k + 1]]),
            f"step of {np.linalg.norm(steps[k]) * 1e6:.3g} um to the next frame where about "
            f"{np.linalg.norm(pred[k]) * 1e6:.3g} um was expected; track split"))
        k += 1
    pieces = []
    start = 0
    for i in np.flatnonzero(split_after):
        pieces.append(r[start:i + 1][~drop[start:i + 1]])
        start = i + 1
    pieces.append(r[start:][~drop[start:]])
    return pieces


def write_tracks(path, data, *, length_unit="um", time_unit="s", comment=None):
    """Write tracking data as a CSV that :func:`read_tracks` reads back.

    Parameters
    ----------
    path : str or os.PathLike
    data : TrackingData
    length_unit, time_unit : str
        Units of the ``x``/``y`` and ``time`` columns.
    comment : str, optional
        Text written as ``#`` comment lines before the header (e.g. "invented data").

    Notes
    -----
    The file is written to a temporary name beside ``path`` and then renamed, so a reader never
    sees half a file. Channel values are written in their SI units.
    """
    path = os.fspath(path)
    lf = to_si(f"1 {length_unit}", "m", name="length_unit")
    tf = to_si(f"1 {time_unit}", "s", name="time_unit")
    chans = list(data.channels)
    with atomic_open(path, "w") as fh:
        for ln in (comment or "").splitlines():
            fh.write(f"# {ln}\n")
        w = csv.writer(fh)
        has_kind = any(k is not None for k in data.kind)
        head = ["track", f"time [{time_unit}]", f"x [{length_unit}]", f"y [{length_unit}]", "primitive"]
        if has_kind:
            head.append("kind")
        head += [f"{n} [{u}]" for n, u in chans]
        w.writerow(head)
        for i in range(len(data)):
            row = [data.track[i], f"{data.time[i] / tf:.9g}"]
            row += ["" if not np.isfinite(v) else f"{v / lf:.9g}" for v in data.xy[i]]
            row.append(data.primitive[i])
            if has_kind:
                row.append(data.kind[i])
            row += [f"{v:.9g}" for v in data.primitive_values.get(str(data.primitive[i]), ())]
            w.writerow(row)


# ------------------------------------------------------------------------------------------------
# differentiation
# ------------------------------------------------------------------------------------------------
def velocity_samples(data, *, window=9, polyorder=2, stride=None, warn=True):
    """Velocity samples by Savitzky-Golay differentiation of each segment.

    Each segment (one track under one primitive, no gap or jump) is smoothed and differentiated
    with ``scipy.signal.savgol_filter(..., deriv=1)``; one sample is taken at the centre of
    every ``stride``-th window that lies wholly inside the segment, so no sample uses the filter's
    edge extrapolation.

    Parameters
    ----------
    data : TrackingData
    window : int
        Filter length, frames (odd, > polyorder). Longer windows average more noise but blur
        fast changes of velocity along the path.
    polyorder : int
        Degree of the local polynomial (2 keeps the derivative unbiased under constant
        acceleration).
    stride : int, optional
        Frames between sample centres. Default ``window``: windows do not overlap, so the samples'
        noise is independent, which the cross-validation and the confidence intervals of
        :func:`fieldplan.calibration.calibrate.fit_parameters` assume.
    warn : bool
        Warn (:class:`TrackingWarning`) about segments dropped as too short.

    Returns
    -------
    VelocitySamples

    Raises
    ------
    TrackingDataError
        Bad filter settings, or no segment long enough for one sample.

    Notes
    -----
    A segment shorter than ``window`` gives one sample from the longest odd window that fits, if
    that window has at least ``polyorder + 2`` frames; shorter segments are dropped and reported as ``short``.
    ``sigma`` is the velocity noise expected from the tracking noise alone, estimated from the
    residuals of the smoothing fit (pooled over all segments) and the filter's coefficients.
    """
    if not isinstance(data, TrackingData):
        raise TrackingDataError(f"velocity_samples expects TrackingData (from read_tracks), got {type(data).__name__}.")
    window, polyorder = int(window), int(polyorder)
    if window < 3 or window % 2 == 0 or polyorder < 1 or polyorder >= window:
        raise TrackingDataError(
            f"Savitzky-Golay settings: window must be odd and >= 3 and 1 <= polyorder < window; "
            f"got window={window}, polyorder={polyorder}.")
    stride = window if stride is None else int(stride)
    if stride < 1:
        raise TrackingDataError(f"stride must be >= 1 frame, got {stride}.")
    issues = list(data.issues)
    # A shortened window must still smooth: odd, and at least two frames more than the degree.
    min_frames = polyorder + 2 + (polyorder % 2 == 1)
    picks = []           # row indices of the sample centres, per segment
    resid2, dof = 0.0, 0.0
    xy_s, v_s, w_used = [], [], []
    for sl in data.segment_slices():
        L = sl.stop - sl.start
        w = window if L >= window else (L if L % 2 else L - 1)
        if w < min_frames:
            i = sl.start
            issues.append(TrackIssue(
                "short", str(data.track[i]), float(data.time[i]), int(data.line[i]) or None,
                f"segment of {L} frame(s) under {str(data.primitive[i])!r} is too short for a derivative "
                f"(the Savitzky-Golay window must be odd and >= {min_frames} frames; {L} frame(s) allow {w}); dropped"))
            continue
        t = data.time[sl]
        dt = float(np.mean(np.diff(t)))
        p = data.xy[sl]
        smooth = savgol_filter(p, w, polyorder, deriv=0, axis=0, mode="interp")
        vel = savgol_filter(p, w, polyorder, deriv=1, delta=dt, axis=0, mode="interp")
        h = w // 2
        centres = np.arange(h, L - h, stride)
        picks.append(sl.start + centres)
        xy_s.append(smooth[centres])
        v_s.append(vel[centres])
        w_used.append(np.full(len(centres), w))
        # Interior residuals of a least-squares smoother: E[r^2] = sigma^2 (1 - c0), c0 the
        # filter's centre coefficient (the hat matrix diagonal).
        inner = slice(h, L - h)
        c0 = savgol_coeffs(w, polyorder, deriv=0)[h]
        r = (p - smooth)[inner]
        if len(r):
            resid2 += float(np.sum(r * r))
            dof += 2 * len(r) * (1.0 - c0)
    if not picks:
        raise TrackingDataError(
            f"no segment has enough frames for a velocity sample (window {window}, polyorder {polyorder}); "
            f"{len(data.segment_slices())} segment(s), the longest has "
            f"{max((s.stop - s.start for s in data.segment_slices()), default=0)} frame(s).",
            path=data.source)
    rows = np.concatenate(picks)
    wv = np.concatenate(w_used)
    noise = float(np.sqrt(resid2 / dof)) if dof > 0 else float("nan")
    # frame interval per sample: the mean of its segment's intervals
    seg_dt = {}
    for sl in data.segment_slices():
        if sl.stop - sl.start > 1:
            seg_dt[int(data.segment[sl.start])] = float(np.mean(np.diff(data.time[sl])))
    dt_rows = np.array([seg_dt.get(int(s), np.nan) for s in data.segment[rows]])
    gain = {w: float(np.linalg.norm(savgol_coeffs(w, polyorder, deriv=1))) for w in np.unique(wv)}
    sigma = noise * np.array([gain[w] for w in wv]) / dt_rows
    dropped = [i for i in issues[len(data.issues):] if i.kind == "short"]
    if warn and dropped:
        warnings.warn(f"{data.source or 'tracking data'}: {len(dropped)} segment(s) too short to differentiate "
                      f"were dropped (first: {dropped[0]}).", TrackingWarning, stacklevel=2)
    return VelocitySamples(
        np.vstack(xy_s), np.vstack(v_s), sigma, data.time[rows], data.track[rows], data.segment[rows],
        data.primitive[rows], data.kind[rows], data.channels, dict(data.primitive_values), noise,
        window, polyorder, stride, issues, data.source,
    )


# ------------------------------------------------------------------------------------------------
# synthetic data (tests and demos; the result is invented data)
# ------------------------------------------------------------------------------------------------
def synthetic_tracks(actuator, body, medium, starts, program, *, frame_interval=0.1, noise=0.0,
                     brownian=False, substeps=4, kind=None, rng=None):
    """Invent the tracking data a camera would record of bodies moved by ``actuator``.

    Bodies start at ``starts`` and are driven by ``program``, a list of
    ``(primitive name, channel values, duration)``; positions are integrated with a midpoint
    rule (``substeps`` per frame), optionally with Brownian motion (Stokes-Einstein, wall-
    corrected) and Gaussian tracking noise. The output is invented data for tests and demos.

    Parameters
    ----------
    actuator : Actuator
    body : Body
    medium : Medium
    starts : array_like, shape (n, 2)
        m.
    program : sequence of (str, array_like (m,), float)
        Primitive name, channel values, duration in s.
    frame_interval : float
        s between frames.
    noise : float
        Standard deviation of the tracking noise per coordinate, m.
    brownian : bool
    substeps : int
    kind : str, optional
        Body kind written in the data (default ``body.name``).
    rng : int or numpy.random.Generator

    Returns
    -------
    TrackingData
        Already split into segments (one per body and program entry).
    """
    rng = np.random.default_rng(rng)
    pos = np.array(starts, dtype=float).reshape(-1, 2)
    n = len(pos)
    D = diffusion_coefficient(body, medium) if brownian else 0.0
    h = frame_interval / substeps
    rec_t, rec_xy, rec_id, rec_p = [], [], [], []
    t = 0.0
    prim_values = {}
    for name, u, duration in program:
        u = np.asarray(u, dtype=float)
        prim_values[str(name)] = tuple(float(v) for v in u)
        frames = max(int(round(duration / frame_interval)), 1)
        for _ in range(frames):
            rec_t.append(np.full(n, t))
            rec_xy.append(pos + noise * rng.standard_normal((n, 2)))
            rec_id.append(np.arange(n))
            rec_p.append(np.full(n, str(name), dtype=object))
            for _ in range(substeps):
                mid = pos + 0.5 * h * actuator.velocity(body, medium, pos, u)
                pos = pos + h * actuator.velocity(body, medium, mid, u)
                if D > 0:
                    pos = pos + np.sqrt(2 * D * h) * rng.standard_normal((n, 2))
            t += frame_interval
    tt = np.concatenate(rec_t)
    xy = np.vstack(rec_xy)
    ids = np.concatenate(rec_id)
    pr = np.concatenate(rec_p).astype(str)
    order = np.lexsort((tt, ids))
    chans = tuple((c.name, c.unit) for c in actuator.channels)
    kinds = np.full(len(tt), kind if kind is not None else body.name, dtype=object)
    return clean_tracks(np.array([f"b{i}" for i in ids[order]]), tt[order], xy[order], pr[order], kinds[order],
                  np.zeros(len(tt), dtype=int), chans, prim_values, None, warn=False)
