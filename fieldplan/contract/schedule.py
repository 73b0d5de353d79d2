"""Schedules: timed segments of channel values, checked against hardware limits, exported for drivers.

A :class:`Schedule` holds arrays inside (``starts``, ``durations``, ``values``) and hands out
:class:`~fieldplan.Segment` objects outside. :meth:`Schedule.check` refuses any violation of
:class:`HardwareLimits`; the CSV and JSON writers are atomic (temporary file, then rename), so a
failed export never leaves a half-written file a driver could play.

Limits are compared with a tolerance of :data:`LIMIT_RTOL` relative to the limit (see
:func:`within_limit`), so a schedule planned exactly at a limit passes despite float round-off,
and any real excess is refused. Exported values are quantised to each channel's resolution
(:meth:`Schedule.quantise_values`): the files hold the decimal values a driver plays (``13.35``,
not ``13.350000000000001``), and what is checked is what is written.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from dataclasses import asdict, dataclass, field

import numpy as np

from ..errors import FieldplanError, LimitError
from ..fileio import atomic_write
from ..units import format_quantity
from .actuator import Channel, Segment

__all__ = ["ChannelLimit", "HardwareLimits", "Schedule", "atomic_write", "LIMIT_RTOL", "within_limit",
           "DEFAULT_RESOLUTION_DIGITS"]

#: Tolerance relative to a limit: a value, RMS or change meets a limit ``L`` when it exceeds it by
#: at most ``LIMIT_RTOL * |L|``. Float round-off of a schedule planned exactly at its limit is a
#: few 1e-16 (the README's RMS example: 0.5000000000000004 A against 0.5 A); one part per billion
#: is far below any hardware's own accuracy, so nothing a driver could notice passes.
LIMIT_RTOL = 1e-9
_RTOL = LIMIT_RTOL

#: Default channel resolution when a :class:`ChannelLimit` declares none: the channel's span
#: (``upper - lower``) divided by ``10**DEFAULT_RESOLUTION_DIGITS`` and rounded down to a power of
#: ten (2 A span -> 1e-9 A). Finer than any driver's DAC, so it changes no behaviour; it removes
#: float noise from exported values.
DEFAULT_RESOLUTION_DIGITS = 9


def within_limit(value, limit, lower=False):
    """Whether ``value`` meets ``limit`` with the documented tolerance :data:`LIMIT_RTOL`.

    Parameters
    ----------
    value : float or array_like
        Channel unit (a value, an RMS, a change per step).
    limit : float
        The declared limit, same unit.
    lower : bool
        ``limit`` is a lower bound (``value >= limit``) instead of an upper one.

    Returns
    -------
    bool or ndarray of bool

    Examples
    --------
    >>> within_limit(0.5000000000000004, 0.5), within_limit(0.5000001, 0.5)
    (True, False)
    """
    slack = LIMIT_RTOL * abs(limit)
    v = np.asarray(value, dtype=float)
    out = v >= limit - slack if lower else v <= limit + slack
    return bool(out) if out.ndim == 0 else out


def _decimals(step):
    """Decimal places that write every multiple of ``step`` exactly (at most 15)."""
    for d in range(16):
        if abs(round(step, d) - step) <= 1e-9 * step:
            return d
    return 15


def default_resolution(channel):
    """Resolution used for ``channel`` when none is declared, channel unit (see :data:`DEFAULT_RESOLUTION_DIGITS`)."""
    span = float(channel.upper - channel.lower)
    if not span > 0:
        span = max(abs(channel.lower), abs(channel.upper), 1.0)
    return 10.0 ** (math.floor(math.log10(span)) - DEFAULT_RESOLUTION_DIGITS)


@dataclass(frozen=True)
class ChannelLimit:
    """Hardware limits of one channel (``None`` means not limited).

    Parameters
    ----------
    lower, upper : float, optional
        Value bounds, channel unit.
    slew_rate : float, optional
        Largest change per second, channel unit / s. Between consecutive segments the change must
        satisfy ``|dv| <= slew_rate * dt`` with ``dt`` the hardware time step if declared, else the
        duration of the later segment (the driver ramps over at most that time).
    min_dwell : float, optional
        Shortest segment the hardware can hold a non-idle value, s.
    rms : float, optional
        Largest root-mean-square value over any window of ``rms_window`` seconds, channel unit
        (coil heating goes with mean I^2; an amplifier's thermal rating with mean V^2).
    rms_window : float, optional
        s; default: the whole schedule.
    resolution : float, optional
        Smallest step of value the hardware outputs, channel unit (a DAC's least significant
        bit, e.g. 3 A / 2**15). Exported values are multiples of it. Default
        (:func:`default_resolution`): the span over 1e9, rounded down to a power of ten.

    Notes
    -----
    Every limit is met within :data:`LIMIT_RTOL` relative to it (see :func:`within_limit`).
    """

    # Unit and one-line meaning per field (metadata), "<unit>" being the channel's unit: what scenario
    # files (`limits.channels.<name>`) and their reference read (fieldplan.scenario.fields).
    lower: float | None = field(default=None, metadata={"unit": "<unit>", "doc": "Lowest value."})
    upper: float | None = field(default=None, metadata={"unit": "<unit>", "doc": "Highest value."})
    slew_rate: float | None = field(default=None, metadata={"unit": "<unit>/s", "doc": "Largest change per second."})
    min_dwell: float | None = field(default=None, metadata={"unit": "s", "doc": "Shortest non-idle segment."})
    rms: float | None = field(default=None, metadata={"unit": "<unit>", "doc": "Largest RMS over any `rms_window`."})
    rms_window: float | None = field(default=None, metadata={
        "unit": "s", "doc": "RMS window (default: the whole schedule)."})
    resolution: float | None = field(default=None, metadata={
        "unit": "<unit>", "doc": "Smallest step of value the hardware outputs (default: the span / 1e9, rounded "
                                 "down to a power of ten); exported values are multiples of it."})

    def __post_init__(self):
        for key in ("slew_rate", "min_dwell", "rms", "rms_window", "resolution"):
            v = getattr(self, key)
            if v is not None and not (np.isfinite(v) and v > 0):
                raise FieldplanError(f"ChannelLimit {key} must be > 0, got {v!r}.")
        if self.lower is not None and self.upper is not None and self.lower > self.upper:
            raise FieldplanError(f"ChannelLimit lower {self.lower} exceeds upper {self.upper}.")


@dataclass
class HardwareLimits:
    """Declared limits of the hardware a schedule will be played on.

    Parameters
    ----------
    channels : dict of str to ChannelLimit
        Per channel name; channels not listed are limited only by their own bounds.
    time_step : float, optional
        Hardware time step, s: segment starts and durations are multiples of it.
    min_dwell : float, optional
        Default minimum dwell for every channel, s.
    """

    # Unit, one-line meaning and kind per field (metadata): what scenario files (`limits:`) read.
    channels: dict = field(default_factory=dict, metadata={
        "kind": "map", "doc": "Per channel name: its limits (the keys of `limits.channels.<name>`), in the "
                              "channel's unit."})
    time_step: float | None = field(default=None, metadata={
        "unit": "s", "doc": "Hardware time step: segments are quantised to it."})
    min_dwell: float | None = field(default=None, metadata={
        "unit": "s", "doc": "Shortest segment holding a non-idle value, every channel."})

    def __post_init__(self):
        for name, lim in self.channels.items():
            if not isinstance(lim, ChannelLimit):
                raise FieldplanError(f"HardwareLimits: limit of channel {name!r} must be a ChannelLimit.")
        for key in ("time_step", "min_dwell"):
            v = getattr(self, key)
            if v is not None and not (np.isfinite(v) and v > 0):
                raise FieldplanError(f"HardwareLimits {key} must be > 0 s, got {v!r}.")

    @classmethod
    def from_channels(cls, channels, **kwargs):
        """Limits equal to the channels' own bounds."""
        return cls({c.name: ChannelLimit(c.lower, c.upper) for c in channels}, **kwargs)

    def get(self, name):
        """The :class:`ChannelLimit` of channel ``name`` (empty if not declared)."""
        return self.channels.get(name, ChannelLimit())

    def bounds(self, channels):
        """Bounds of each channel intersected with the declared limits, as two arrays (m,)."""
        lo = np.array([c.lower for c in channels], dtype=float)
        hi = np.array([c.upper for c in channels], dtype=float)
        for k, c in enumerate(channels):
            lim = self.get(c.name)
            if lim.lower is not None:
                lo[k] = max(lo[k], lim.lower)
            if lim.upper is not None:
                hi[k] = min(hi[k], lim.upper)
            if lo[k] > hi[k]:
                raise LimitError(
                    f"channel {c.name!r}: declared limits [{lim.lower}, {lim.upper}] do not overlap the "
                    f"actuator's bounds [{c.lower}, {c.upper}] {c.unit}.", channel=c.name, limit="bounds")
        return lo, hi

    def to_dict(self):
        return {
            "time_step": self.time_step,
            "min_dwell": self.min_dwell,
            "channels": {k: {kk: vv for kk, vv in asdict(v).items() if vv is not None}
                         for k, v in self.channels.items()},
        }

    @classmethod
    def from_dict(cls, d):
        return cls({k: ChannelLimit(**v) for k, v in (d.get("channels") or {}).items()},
                   time_step=d.get("time_step"), min_dwell=d.get("min_dwell"))


def _channel_to_dict(c):
    d = {"name": c.name, "unit": c.unit, "lower": c.lower, "upper": c.upper, "idle": c.idle}
    if c.values:
        d["values"] = list(c.values)
    return d


def _channel_from_dict(d):
    return Channel(d["name"], d["unit"], d["lower"], d["upper"], d.get("idle", 0.0), tuple(d.get("values", ())))


def _frozen(a):
    """``a`` made read-only (it must be a private copy: a view would share writable memory)."""
    a.setflags(write=False)
    return a


def _same(a, b):
    """Whether float arrays ``a`` and ``b`` are identical, the sign of zero included (it is written)."""
    return a.shape == b.shape and np.array_equal(a, b) and np.array_equal(np.signbit(a), np.signbit(b))


def _limits_key(limits):
    """A hashable key equal for equal limits values.

    :class:`HardwareLimits` holds a dict and is not frozen, so it has no hash, and one object may be
    changed between two checks; the key is its canonical JSON text (with the type, in case a
    subclass reads its fields differently), taken at each call.
    """
    return type(limits).__qualname__, json.dumps(limits.to_dict(), sort_keys=True, default=repr)


_HEADER = re.compile(r"^\s*(?P<name>[^\[\]]+?)\s*\[(?P<unit>[^\]]*)\]\s*$")


class Schedule:
    """A timed list of segments for a set of channels.

    Parameters
    ----------
    channels : sequence of Channel
    starts, durations : array_like, shape (S,)
        s. Segments must be contiguous: ``starts[j+1] == starts[j] + durations[j]``.
    values : array_like, shape (S, m)
        Channel values, channel units.
    labels : sequence of str, optional
        Name of the primitive or "mix"/"idle" per segment.
    meta : dict, optional
        Free-form metadata carried into the JSON export.

    Notes
    -----
    A schedule does not change once built: ``starts``, ``durations`` and ``values`` are private,
    read-only copies of what was passed (writing into them raises ``ValueError``), ``channels``
    and ``labels`` are tuples, and none of these attributes can be reassigned. That is what lets
    :meth:`violations` remember its result per limits value: the schedule is checked on its way
    from planner to driver several times (planner, run, export, each writer, the player), and a
    repeated check costs a dictionary look-up and cannot disagree with the first. ``meta`` stays
    a plain (copied) dict: it is not checked against limits.

    Examples
    --------
    >>> from fieldplan import Channel, Segment
    >>> ch = (Channel("coil_1", "A", -2, 2),)
    >>> s = Schedule.from_segments(ch, [Segment(0, 0.5, [1.0]), Segment(0.5, 0.25, [-1.0])])
    >>> s.duration, s.n_segments
    (0.75, 2)
    """

    #: Distinct limits values whose violations one schedule remembers (least recently used dropped).
    #: On the way from plan to driver a schedule meets one or two limits values (the scenario's,
    #: the player's); a few more leave room without letting the memo grow.
    _MEMO_SIZE = 4

    def __init__(self, channels, starts, durations, values, labels=None, meta=None):
        self._channels = tuple(channels)
        # np.array copies: the caller's arrays stay the caller's, and ours cannot change under a
        # remembered check (see _frozen).
        self._starts = _frozen(np.array(starts, dtype=float).reshape(-1))
        self._durations = _frozen(np.array(durations, dtype=float).reshape(-1))
        m = len(self.channels)
        self._values = _frozen(np.array(values, dtype=float).reshape(len(self.starts), m))
        if len(self.durations) != len(self.starts):
            raise FieldplanError("Schedule: starts and durations differ in length.")
        if np.any(self.durations < 0) or not np.all(np.isfinite(self.durations)):
            raise FieldplanError("Schedule: durations must be finite and >= 0 s.")
        if not np.all(np.isfinite(self.values)):
            raise FieldplanError("Schedule: values must be finite.")
        if len(self.starts) > 1:
            gap = self.starts[1:] - (self.starts[:-1] + self.durations[:-1])
            if np.max(np.abs(gap)) > 1e-9 * max(1.0, self.starts[-1]):
                j = int(np.argmax(np.abs(gap)))
                raise FieldplanError(f"Schedule: segment {j + 1} starts at {self.starts[j + 1]} s, "
                                     f"not where segment {j} ends ({self.starts[j] + self.durations[j]} s).")
        self._labels = tuple(labels) if labels is not None else ("",) * len(self.starts)
        if len(self._labels) != len(self.starts):
            # zip() in the writers would silently drop the segments past the last label.
            raise FieldplanError(f"Schedule: {len(self._labels)} labels for {len(self.starts)} segments; "
                                 "give one label per segment (or none).")
        self.meta = dict(meta or {})
        # limits key -> tuple of violations, most recently used last (see violations()).
        self._memo = {}

    def __reduce__(self):
        # Rebuilt through __init__, so a copy sent to a worker process is read-only too (numpy
        # does not keep the flag through pickling); the memo is not sent, it is rebuilt on demand.
        return (type(self), (self._channels, self._starts, self._durations, self._values, self._labels,
                             self.meta))

    @property
    def channels(self):
        """tuple of Channel: the channels, in column order of :attr:`values`."""
        return self._channels

    @property
    def starts(self):
        """ndarray, shape (S,), s: segment starts (read-only)."""
        return self._starts

    @property
    def durations(self):
        """ndarray, shape (S,), s: segment durations (read-only)."""
        return self._durations

    @property
    def values(self):
        """ndarray, shape (S, m), channel units: value of each channel per segment (read-only)."""
        return self._values

    @property
    def labels(self):
        """tuple of str, shape (S,): name of the primitive or "mix"/"idle" per segment."""
        return self._labels

    # -- construction ---------------------------------------------------------------------------
    def with_meta(self, **items):
        """A copy whose :attr:`meta` also holds ``items``; ``self`` and its meta are left as they are.

        Examples
        --------
        >>> from fieldplan.contract.actuator import Channel
        >>> s = Schedule([Channel("I1", "A", -1.0, 1.0)], [0.0], [1.0], [[0.5]], meta={"a": 1})
        >>> s.with_meta(origin="trial 1").meta, s.meta
        ({'a': 1, 'origin': 'trial 1'}, {'a': 1})
        """
        return Schedule(self._channels, self._starts, self._durations, self._values, self._labels,
                        {**self.meta, **items})

    @classmethod
    def empty(cls, channels):
        return cls(channels, [], [], np.zeros((0, len(channels))))

    @classmethod
    def from_segments(cls, channels, segments, meta=None):
        """Build from a list of :class:`Segment` (their starts are re-laid end to end from the first)."""
        segments = list(segments)
        if not segments:
            return cls.empty(channels)
        d = np.array([s.duration for s in segments], dtype=float)
        t0 = float(segments[0].start)
        starts = t0 + np.concatenate([[0.0], np.cumsum(d)[:-1]])
        vals = np.array([s.values for s in segments], dtype=float)
        return cls(channels, starts, d, vals, [s.label for s in segments], meta)

    def concat(self, other):
        """This schedule followed by ``other`` (re-timed to start where this one ends)."""
        if tuple(c.name for c in other.channels) != tuple(c.name for c in self.channels):
            raise FieldplanError("Schedule.concat: channels differ.")
        t_end = self.end
        starts = np.concatenate([self.starts, t_end + (other.starts - (other.starts[0] if len(other.starts) else 0))])
        return Schedule(self.channels, starts, np.concatenate([self.durations, other.durations]),
                        np.vstack([self.values, other.values]), self.labels + other.labels, self.meta)

    # -- queries ------------------------------------------------------------------------------
    @property
    def n_segments(self):
        return len(self.starts)

    @property
    def start(self):
        return float(self.starts[0]) if len(self.starts) else 0.0

    @property
    def end(self):
        return float(self.starts[-1] + self.durations[-1]) if len(self.starts) else 0.0

    @property
    def duration(self):
        """Total duration, s."""
        return float(np.sum(self.durations))

    @property
    def segments(self):
        return [Segment(float(t), float(d), v, lab)
                for t, d, v, lab in zip(self.starts, self.durations, self.values, self.labels)]

    def __len__(self):
        return self.n_segments

    def __eq__(self, other):
        return (isinstance(other, Schedule)
                and tuple(self.channels) == tuple(other.channels)
                and np.array_equal(self.starts, other.starts)
                and np.array_equal(self.durations, other.durations)
                and np.array_equal(self.values, other.values))

    def value_at(self, t):
        """Channel values held at time ``t`` (s); idle values outside the schedule."""
        if not len(self.starts) or t < self.starts[0] or t >= self.end:
            return np.array([c.idle for c in self.channels])
        j = int(np.searchsorted(self.starts, t, side="right") - 1)
        return self.values[j].copy()

    def resample(self, rate):
        """Sample the held values at ``rate`` Hz from the start: returns ``(t (N,), values (N, m))``."""
        if not rate > 0:
            raise FieldplanError(f"resample rate must be > 0 Hz, got {rate}.")
        n = max(int(math.floor(self.duration * rate + 1e-9)), 1)
        t = self.start + np.arange(n) / rate
        idx = np.clip(np.searchsorted(self.starts, t, side="right") - 1, 0, max(self.n_segments - 1, 0))
        return t, self.values[idx] if self.n_segments else np.zeros((n, len(self.channels)))

    def energy(self):
        """Integral of value^2 over time per channel, unit^2 s (e.g. A^2 s; times R gives joules)."""
        return np.sum(self.values**2 * self.durations[:, None], axis=0)

    def rms(self, window=None):
        """Largest RMS over any window of ``window`` s per channel (whole schedule if ``None``)."""
        if not self.n_segments:
            return np.zeros(len(self.channels))
        if window is None or window >= self.duration:
            return np.sqrt(self.energy() / max(self.duration, 1e-300))
        edges = np.concatenate([self.starts, [self.end]])
        cum = np.concatenate([np.zeros((1, len(self.channels))),
                              np.cumsum(self.values**2 * self.durations[:, None], axis=0)])
        # The windowed integral is piecewise linear in the window start: its maximum lies where the
        # window's start or end meets a segment edge.
        cand = np.concatenate([edges, edges - window])
        cand = np.clip(cand, self.start, self.end - window)

        def integral(t):
            out = np.empty((len(t), len(self.channels)))
            for k in range(len(self.channels)):
                out[:, k] = np.interp(t, edges, cum[:, k])
            return out

        best = np.max(integral(cand + window) - integral(cand), axis=0)
        return np.sqrt(np.maximum(best, 0.0) / window)

    # -- limits ---------------------------------------------------------------------------------
    def violations(self, limits):
        """Every violation of ``limits`` as a list of ``(message, channel, time, limit)``.

        Each limit is met within :data:`LIMIT_RTOL` relative to it (:func:`within_limit`): a
        schedule exactly at a bound, slew or RMS limit passes despite float round-off.

        The result is remembered per limits *value* (the schedule cannot change, see the class
        notes): a second call with equal limits, the same object or not, returns the same
        violations without scanning again. A few distinct limits values are remembered.

        Parameters
        ----------
        limits : HardwareLimits or None
            ``None`` checks nothing.

        Returns
        -------
        list of tuple (str, str or None, float, str)
            Message, channel name (``None`` for the time step), time in s, and the limit broken
            (``"upper"``, ``"lower"``, ``"slew_rate"``, ``"min_dwell"``, ``"rms"``, ``"time_step"``).
            A new list on each call: changing it changes nothing remembered.
        """
        if limits is None:
            return []
        key = _limits_key(limits)
        found = self._memo.pop(key, None)
        if found is None:
            found = tuple(self._scan(limits))
            if len(self._memo) >= self._MEMO_SIZE:
                del self._memo[next(iter(self._memo))]   # dicts keep order: the least recently used
        self._memo[key] = found                          # (re)inserted last: most recently used
        return list(found)

    def _scan(self, limits):
        """The full check behind :meth:`violations` (bounds, slew, dwell, windowed RMS, time step)."""
        out = []
        ts = limits.time_step

        def q(v, unit):
            return format_quantity(v, unit, 6)

        for k, c in enumerate(self.channels):
            lim = limits.get(c.name)
            col = self.values[:, k]
            u = c.unit
            lo = c.lower if lim.lower is None else max(c.lower, lim.lower)
            hi = c.upper if lim.upper is None else min(c.upper, lim.upper)
            # Relative to the larger bound, so a bound at 0 still has round-off slack.
            span = max(abs(lo), abs(hi), 1e-300) * LIMIT_RTOL
            for j in np.flatnonzero(col > hi + span)[:3]:
                out.append((f"channel {c.name!r} = {q(col[j], u)} at t = {q(self.starts[j], 's')} exceeds the "
                            f"upper limit {q(hi, u)}", c.name, float(self.starts[j]), "upper"))
            for j in np.flatnonzero(col < lo - span)[:3]:
                out.append((f"channel {c.name!r} = {q(col[j], u)} at t = {q(self.starts[j], 's')} is below the "
                            f"lower limit {q(lo, u)}", c.name, float(self.starts[j]), "lower"))
            if lim.slew_rate is not None and len(col) > 1:
                dv = np.abs(np.diff(col))
                dt = np.full(len(dv), ts) if ts else self.durations[1:]
                allowed = lim.slew_rate * dt
                for j in np.flatnonzero(dv > allowed * (1 + LIMIT_RTOL) + 1e-300)[:3]:
                    out.append((f"channel {c.name!r} changes by {q(dv[j], u)} at t = {q(self.starts[j + 1], 's')}; "
                                f"the slew limit {q(lim.slew_rate, u + '/s' if u not in ('', '1') else '1/s')} "
                                f"allows {q(allowed[j], u)} over {q(dt[j], 's')}", c.name,
                                float(self.starts[j + 1]), "slew_rate"))
            dwell = lim.min_dwell if lim.min_dwell is not None else limits.min_dwell
            if dwell is not None:
                short = (self.durations < dwell * (1 - LIMIT_RTOL)) & (col != c.idle)
                for j in np.flatnonzero(short)[:3]:
                    out.append((f"channel {c.name!r} holds {q(col[j], u)} for only {q(self.durations[j], 's')} at "
                                f"t = {q(self.starts[j], 's')}; the minimum dwell is {q(dwell, 's')}", c.name,
                                float(self.starts[j]), "min_dwell"))
            if lim.rms is not None:
                r = self.rms(lim.rms_window)[k]
                if not within_limit(r, lim.rms):
                    win = f"{q(lim.rms_window, 's')} window" if lim.rms_window else "whole schedule"
                    out.append((f"channel {c.name!r} has RMS {q(r, u)} over a {win}, above its limit "
                                f"{q(lim.rms, u)}", c.name, self.start, "rms"))
        if ts:
            for name, arr in (("start", self.starts), ("duration", self.durations)):
                steps = arr / ts
                bad = np.flatnonzero(np.abs(steps - np.round(steps)) > 1e-6)
                for j in bad[:3]:
                    out.append((f"segment {j} {name} {q(arr[j], 's')} is not a multiple of the hardware time step "
                                f"{q(ts, 's')}", None, float(self.starts[j]), "time_step"))
        return out

    def check(self, limits):
        """Raise :class:`LimitError` for the first violation of ``limits`` (naming channel and time).

        Uses :meth:`violations`, so checking again against equal limits does not scan again.

        Returns
        -------
        Schedule
            ``self``, so ``schedule.check(limits).write_csv(path)`` reads naturally.
        """
        v = self.violations(limits)
        if v:
            msg, ch, t, lim = v[0]
            more = f" (and {len(v) - 1} more)" if len(v) > 1 else ""
            raise LimitError(msg + more + ".", channel=ch, time=t, limit=lim)
        return self

    def quantise(self, time_step, min_dwell=0.0):
        """Snap segments to the hardware time grid, preserving total duration to one step.

        Segment boundaries are rounded to the nearest multiple of ``time_step`` (cumulatively, so
        rounding errors do not pile up); segments that become shorter than ``min_dwell`` (or empty)
        are merged into their longer neighbour, whose value then holds.

        Parameters
        ----------
        time_step : float
            s.
        min_dwell : float
            s.

        Returns
        -------
        Schedule
        """
        if not time_step > 0:
            raise FieldplanError(f"quantise: time_step must be > 0 s, got {time_step}.")
        if not self.n_segments:
            return self
        t0 = round(self.start / time_step) * time_step
        edges = np.concatenate([[0.0], np.cumsum(self.durations)])
        q = np.round(edges / time_step).astype(np.int64)
        dur = np.diff(q)
        vals = list(self.values)
        labels = list(self.labels)
        d = list(dur)
        min_steps = int(math.ceil(min_dwell / time_step - 1e-9)) if min_dwell else 0
        changed = True
        while changed and len(d) > 1:
            changed = False
            for j in range(len(d)):
                if d[j] == 0 or d[j] < min_steps:
                    if len(d) == 1:
                        break
                    left = d[j - 1] if j > 0 else -1
                    right = d[j + 1] if j + 1 < len(d) else -1
                    tgt = j - 1 if left >= right else j + 1
                    d[tgt] += d[j]
                    del d[j], vals[j], labels[j]
                    changed = True
                    break
        d = np.asarray(d, dtype=float) * time_step
        starts = t0 + np.concatenate([[0.0], np.cumsum(d)[:-1]])
        return Schedule(self.channels, starts, d, np.asarray(vals), labels, self.meta)

    def quantise_values(self, limits=None):
        """Snap channel values to each channel's resolution and times to the hardware time step.

        Each continuous channel's values become multiples of its resolution (``ChannelLimit.resolution``,
        else :func:`default_resolution`), written as the nearest float to that decimal, so exported
        files hold ``13.35`` and not ``13.350000000000001``. The snapping never creates a violation:
        values stay inside the bounds (the grid points inside them), a change between segments
        stays within the slew limit (each value is chosen within the allowed step of the previous
        one), and on channels with an RMS limit values are rounded towards zero, which cannot raise
        any window's RMS. Channels with a discrete set of values (``Channel.values``, e.g. tones)
        are left exactly as they are. Starts and durations that are multiples of ``time_step`` are
        rewritten as exact decimals of it. Quantising a quantised schedule changes nothing, and
        then ``self`` is returned, with what :meth:`violations` remembers: the writers' check of a
        schedule already checked against equal limits costs nothing.

        Parameters
        ----------
        limits : HardwareLimits, optional
            Resolutions, bounds, slew and RMS limits and the time step; without it, the channels'
            own bounds and the default resolution.

        Returns
        -------
        Schedule
            ``self`` if no value, start or duration changes (bit for bit), else a new schedule.
        """
        if not self.n_segments:
            return self
        limits = limits if limits is not None else HardwareLimits()
        ts = limits.time_step
        vals = self.values.copy()
        for k, c in enumerate(self.channels):
            if c.values:
                continue
            lim = limits.get(c.name)
            res = lim.resolution or default_resolution(c)
            dec = _decimals(res)
            lo = c.lower if lim.lower is None else max(c.lower, lim.lower)
            hi = c.upper if lim.upper is None else min(c.upper, lim.upper)
            v = vals[:, k]
            x = v / res
            if lim.rms is not None:
                kk = np.sign(x) * np.floor(np.abs(x) + 1e-6)
            else:
                kk = np.round(x)
            # Only values that meet a limit are kept meeting it; a real violation is left for
            # check() to refuse, never hidden by the snapping.
            # Grid points inside the bounds (a bound off the grid is never rounded outward).
            klo, khi = math.ceil(lo / res - 1e-9), math.floor(hi / res + 1e-9)
            if klo <= khi:
                ok = within_limit(v, hi) & within_limit(v, lo, lower=True)
                kk = np.where(ok, np.clip(kk, klo, khi), kk)
            if lim.slew_rate is not None and len(kk) > 1:
                dt = np.full(len(kk) - 1, ts) if ts else self.durations[1:]
                allowed = lim.slew_rate * dt
                met = np.abs(np.diff(v)) <= allowed * (1 + LIMIT_RTOL)
                steps = np.floor(allowed / res + 1e-9)
                for j in np.flatnonzero(met) + 1:  # sequential: each step depends on the one before
                    kk[j] = min(max(kk[j], kk[j - 1] - steps[j - 1]), kk[j - 1] + steps[j - 1])
            vals[:, k] = np.round(kk * res, dec)
        starts, durs = self.starts, self.durations
        if ts:
            dec = _decimals(ts)
            on_grid = (np.all(np.abs(starts / ts - np.round(starts / ts)) <= 1e-6)
                       and np.all(np.abs(durs / ts - np.round(durs / ts)) <= 1e-6))
            if on_grid:
                durs = np.round(np.round(durs / ts) * ts, dec)
                starts = np.round(np.round(starts / ts) * ts, dec)
        if _same(vals, self.values) and _same(starts, self.starts) and _same(durs, self.durations):
            return self
        return Schedule(self.channels, starts, durs, vals, self.labels, self.meta)

    # -- export ----------------------------------------------------------------------------------
    def to_csv_text(self):
        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(["start [s]", "duration [s]"] + [f"{c.name} [{c.unit}]" for c in self.channels] + ["label"])
        for t, d, v, lab in zip(self.starts, self.durations, self.values, self.labels):
            w.writerow([repr(float(t)), repr(float(d))] + [repr(float(x)) for x in v] + [lab])
        return buf.getvalue()

    def write_csv(self, path, limits=None):
        """Write one row per segment (start, duration, one column per channel with its unit).

        The values written are :meth:`quantise_values` of this schedule (with ``limits``' resolutions
        and time step). If ``limits`` is given, that quantised schedule is checked first and nothing
        is written on a violation.
        """
        q = self.quantise_values(limits)
        if limits is not None:
            q.check(limits)
        atomic_write(path, q.to_csv_text())
        return path

    @classmethod
    def read_csv(cls, path, channels=None):
        """Read a CSV written by :meth:`write_csv`; channel bounds come from ``channels`` if given."""
        with open(path, newline="") as fh:
            rows = list(csv.reader(fh))
        if not rows:
            raise FieldplanError(f"{path}: empty schedule file.")
        head = rows[0]
        if len(head) < 3 or not head[0].startswith("start") or not head[1].startswith("duration"):
            raise FieldplanError(f"{path}: first columns must be 'start [s]' and 'duration [s]', got {head[:2]}.")
        has_label = head[-1] == "label"
        cols = head[2:-1] if has_label else head[2:]
        parsed = []
        for h in cols:
            m = _HEADER.match(h)
            if not m:
                raise FieldplanError(f"{path}: column header {h!r} must look like 'name [unit]'.")
            parsed.append((m["name"], m["unit"]))
        body = rows[1:]
        arr = np.array([[float(x) for x in r[: 2 + len(cols)]] for r in body]) if body else np.zeros((0, 2 + len(cols)))
        labels = [r[-1] if has_label else "" for r in body]
        if channels is None:
            vals = arr[:, 2:]
            channels = tuple(Channel(n, u, float(np.min(vals[:, k], initial=0.0)), float(np.max(vals[:, k], initial=0.0)))
                             for k, (n, u) in enumerate(parsed))
        elif [c.name for c in channels] != [n for n, _ in parsed]:
            raise FieldplanError(f"{path}: columns {[n for n, _ in parsed]} do not match channels "
                                 f"{[c.name for c in channels]}.")
        return cls(channels, arr[:, 0], arr[:, 1], arr[:, 2:], labels)

    def to_dict(self, limits=None, extra=None):
        d = {
            "format": "fieldplan-schedule",
            "format_version": 1,
            "time_unit": "s",
            "channels": [_channel_to_dict(c) for c in self.channels],
            "segments": [{"start": float(t), "duration": float(dd), "values": [float(x) for x in v], "label": lab}
                         for t, dd, v, lab in zip(self.starts, self.durations, self.values, self.labels)],
            "limits_checked": limits.to_dict() if limits is not None else None,
            "meta": self.meta,
        }
        if extra:
            d.update(extra)
        return d

    def write_json(self, path, limits=None, extra=None):
        """Write channels, units, segments and the limits it was checked against (checked first).

        As :meth:`write_csv`, the values written are :meth:`quantise_values` of this schedule.
        """
        q = self.quantise_values(limits)
        if limits is not None:
            q.check(limits)
        # deferred import: import cycle: fieldplan (the package root) imports fieldplan.contract.schedule
        from .. import __version__

        extra = dict(extra or {})
        extra.setdefault("package_version", __version__)
        atomic_write(path, json.dumps(q.to_dict(limits, extra), indent=1))
        return path

    @classmethod
    def read_json(cls, path):
        with open(path) as fh:
            d = json.load(fh)
        if d.get("format") != "fieldplan-schedule":
            raise FieldplanError(f"{path}: not a fieldplan schedule (format key {d.get('format')!r}).")
        chans = tuple(_channel_from_dict(c) for c in d["channels"])
        segs = d["segments"]
        return cls(chans, [s["start"] for s in segs], [s["duration"] for s in segs],
                   np.array([s["values"] for s in segs], dtype=float).reshape(len(segs), len(chans)),
                   [s.get("label", "") for s in segs], d.get("meta"))
