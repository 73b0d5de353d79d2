"""``apply(segment)`` adapters for instruments: a PyVISA tone generator, a serial line, analog-output waveforms.

Every driver is a context manager and a callable ``driver(segment)`` for
:func:`fieldplan.planning.live.run_live` or :func:`fieldplan.lab.play.play`. Before sending a segment it
checks it again against the declared :class:`~fieldplan.HardwareLimits` (channel bounds, slew from
the previous segment sent, minimum dwell, time step, RMS over the declared window;
:class:`LimitGuard`) and refuses it with :class:`~fieldplan.errors.LimitError`, sending nothing. On
a refused segment, an instrument error, ``KeyboardInterrupt``, any exception and at the end
(leaving the ``with`` block, or :meth:`Driver.close`) it returns the instrument to the idle input
(every channel at its ``idle`` value, output off). Every command sent is logged with its time
(:attr:`Driver.log_rows`; written as an input log, :mod:`fieldplan.lab.inputlog`, on close
when ``log`` names a file).

A driver sends and returns; it does not wait for the segment to end. Holding each segment for its
duration on the wall clock is :mod:`fieldplan.lab.pacing`'s job (and, for the analog-output
driver, the DAQ's sample clock's).

Command text is configurable per instrument, never fixed to one vendor: an
:class:`InstrumentProfile` (from a YAML file, :func:`load_profile`) gives a template per channel,
the output on/off commands, the acknowledgement to expect and an error query. Templates are
Python format strings over named fields only (``{value:.6g}``, ``{index}``, ``{duration_ms}``,
``{coil_1}``...); attribute and item access are refused, so a profile file cannot reach into the
program.
"""

from __future__ import annotations

import abc
import collections
import datetime as _dt
import math
import os
import re
import string
import time
from dataclasses import dataclass, field

import numpy as np

# The tracking reader's own naming of unnamed settings (imported here, not on the first segment:
# importing scipy.signal mid-play would delay that segment by seconds).
from ..calibration.tracking import setting_name
from ..contract.actuator import Segment
from ..contract.schedule import HardwareLimits, Schedule
from ..errors import FieldplanError, LimitError
from . import require
from .inputlog import write_log

__all__ = ["DriverError", "InstrumentProfile", "load_profile", "LimitGuard", "Driver", "VisaTransport",
           "SerialTransport", "RecordingTransport", "ToneGenerator", "SerialLine", "WaveformDriver", "ArrayWriter",
           "NidaqmxWriter", "waveforms", "open_driver"]


class DriverError(FieldplanError):
    """An instrument refused a command, did not acknowledge it in time, or a driver is misconfigured."""


# ---------------------------------------------------------------------------------------------
# templates
# ---------------------------------------------------------------------------------------------
_FORMATTER = string.Formatter()


def check_template(text, fields, where):
    """Refuse a template that uses anything but the named ``fields`` (no attribute or item access)."""
    if not isinstance(text, str):
        raise DriverError(f"{where}: a command template must be text, got {type(text).__name__}.")
    try:
        parts = list(_FORMATTER.parse(text))
    except ValueError as exc:
        raise DriverError(f"{where}: template {text!r} is not a valid format string ({exc}).") from None
    for _, name, spec, _conv in parts:
        if name is None:
            continue
        if name == "" or not name.isidentifier():
            raise DriverError(f"{where}: template {text!r} uses field {{{name}}}; only named fields are allowed "
                              f"({', '.join(sorted(fields))}), without attribute or index access.")
        if name not in fields:
            raise DriverError(f"{where}: template {text!r} uses unknown field {{{name}}}; known fields: "
                              f"{', '.join(sorted(fields))}.")
        if spec and "{" in spec:
            raise DriverError(f"{where}: template {text!r} nests fields in a format spec.")
        if spec and any(int(d) > 64 for d in re.findall(r"\d+", spec)):
            # A width like {value:999999999} would build a gigabyte of padding.
            raise DriverError(f"{where}: template {text!r} asks for a width or precision above 64 in {{{name}:{spec}}}.")
    return text


def _fill(text, values):
    return _FORMATTER.vformat(text, (), values)


# ---------------------------------------------------------------------------------------------
# instrument profiles
# ---------------------------------------------------------------------------------------------
_PROFILE_KEYS = {
    "commands": "channel name -> command template for its value ({value}), e.g. 'SOUR1:FREQ {value:.6f}'",
    "scale": "channel name -> factor applied before sending (e.g. 2.828 for V rms -> V peak-to-peak)",
    "output_on": "commands that switch the output on (sent after the values of a non-idle segment)",
    "output_off": "commands that switch the output off (sent first when going idle)",
    "init": "commands sent once when the instrument is opened (e.g. a waveform shape, units)",
    "line": "serial: one line per segment, a template over index, start, duration, duration_ms, label, values "
            "and the channel names",
    "idle_line": "serial: the line that sets the idle input (default: 'line' with the idle values)",
    "values_separator": "serial: text between values in {values} (default ' ')",
    "ack": "regular expression the reply to each command (each line on serial) must match; omit for none",
    "error_query": "query sent after each segment (e.g. 'SYST:ERR?')",
    "error_ok": "regular expression its reply must match (e.g. '^[+]?0,')",
    "timeout": "s to wait for a reply",
    "write_termination": "end of each command (default '\\n')",
    "read_termination": "end of each reply (default '\\n')",
    "baudrate": "serial: bits per second (default 115200)",
}


@dataclass
class InstrumentProfile:
    """What to send to one instrument (see the keys in ``_PROFILE_KEYS`` / :func:`load_profile`).

    Parameters
    ----------
    commands : dict of str to str
        VISA: channel name -> template with ``{value}`` (and the segment fields).
    scale : dict of str to float
        Channel name -> factor applied to the value before sending.
    output_on, output_off, init : list of str
    line, idle_line : str, optional
        Serial: the line per segment.
    values_separator : str
    ack : str, optional
        Regular expression every reply must match; ``None``: commands get no reply.
    error_query, error_ok : str, optional
    timeout : float
        s.
    write_termination, read_termination : str
    baudrate : int
    source : str, optional
        File it came from.
    """

    commands: dict = field(default_factory=dict)
    scale: dict = field(default_factory=dict)
    output_on: list = field(default_factory=list)
    output_off: list = field(default_factory=list)
    init: list = field(default_factory=list)
    line: str | None = None
    idle_line: str | None = None
    values_separator: str = " "
    ack: str | None = None
    error_query: str | None = None
    error_ok: str | None = None
    timeout: float = 2.0
    write_termination: str = "\n"
    read_termination: str = "\n"
    baudrate: int = 115200
    source: str | None = None

    def __post_init__(self):
        where = self.source or "instrument profile"
        for key in ("ack", "error_ok"):
            v = getattr(self, key)
            if v is not None:
                try:
                    re.compile(v)
                except re.error as exc:
                    raise DriverError(f"{where}: {key} {v!r} is not a regular expression ({exc}).") from None
        if not (isinstance(self.timeout, (int, float)) and 0 < self.timeout <= 600):
            raise DriverError(f"{where}: timeout must be a number of seconds in (0, 600], got {self.timeout!r}.")
        for key in ("output_on", "output_off", "init"):
            v = getattr(self, key)
            if isinstance(v, str):
                setattr(self, key, [v])
        for name, f in self.scale.items():
            if not (isinstance(f, (int, float)) and math.isfinite(f) and f != 0):
                raise DriverError(f"{where}: scale of channel {name!r} must be a finite non-zero number, got {f!r}.")

    def check_channels(self, channels, kind):
        """Check the profile covers ``channels`` (names) for a ``kind`` ("visa" or "serial") driver."""
        where = self.source or "instrument profile"
        names = [c.name for c in channels]
        fields = {"index", "start", "duration", "duration_ms", "label", "value", "values", *names}
        for key in self.scale:
            if key not in names:
                raise DriverError(f"{where}: scale names channel {key!r}, which the schedule does not have ({names}).")
        if kind == "visa":
            missing = [n for n in names if n not in self.commands]
            if missing:
                raise DriverError(f"{where}: no command template for channel(s) {missing}; add them under 'commands'.")
            extra = [k for k in self.commands if k not in names]
            if extra:
                raise DriverError(f"{where}: commands name channel(s) {extra}, which the schedule does not have ({names}).")
            for k, v in self.commands.items():
                check_template(v, fields, f"{where}: commands.{k}")
        else:
            if not self.line:
                raise DriverError(f"{where}: a serial profile needs 'line', e.g. 'SEG {{duration_ms:.0f}} {{values}}'.")
            check_template(self.line, fields - {"value"}, f"{where}: line")
            if self.idle_line:
                check_template(self.idle_line, fields - {"value"}, f"{where}: idle_line")
        for key in ("output_on", "output_off", "init"):
            for j, v in enumerate(getattr(self, key)):
                check_template(v, set(), f"{where}: {key}[{j}]")


def load_profile(path):
    """Read an :class:`InstrumentProfile` from a YAML file (unknown keys are errors naming the key and line).

    Example file (a tone generator; the commands are this instrument's, not a standard)::

        commands:
          tone_freq: "SOUR1:FREQ {value:.3f}"
          tone_amp:  "SOUR1:VOLT {value:.4f}"
        output_on:  ["OUTP1 ON"]
        output_off: ["OUTP1 OFF"]
        error_query: "SYST:ERR?"
        error_ok: "^[+]?0,"
    """
    import yaml  # noqa: PLC0415

    path = os.fspath(path)
    if not os.path.exists(path):
        raise DriverError(f"{path}: instrument profile not found.")
    with open(path, encoding="utf-8") as fh:
        text = fh.read()
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise DriverError(f"{path}: not valid YAML ({exc}).") from None
    if not isinstance(data, dict):
        raise DriverError(f"{path}: an instrument profile is a mapping of keys ({', '.join(_PROFILE_KEYS)}).")
    lines = {}
    if node is not None and hasattr(node, "value"):
        for k, _v in node.value:
            lines[k.value] = k.start_mark.line + 1
    for k in data:
        if k not in _PROFILE_KEYS:
            raise DriverError(f"{path}:{lines.get(k, '?')}: unknown key {k!r}; known keys: "
                              + "; ".join(f"{kk} ({doc})" for kk, doc in _PROFILE_KEYS.items()))
    for k in ("commands", "scale"):
        if k in data and not isinstance(data[k], dict):
            raise DriverError(f"{path}:{lines.get(k, '?')}: {k!r} must map channel names to values.")
    return InstrumentProfile(**{k: v for k, v in data.items()}, source=path)


# ---------------------------------------------------------------------------------------------
# the limit check before each segment
# ---------------------------------------------------------------------------------------------
class LimitGuard:
    """Checks each segment, as it is about to be sent, against ``limits`` and what was sent before.

    Bounds (channel bounds intersected with the declared limits), minimum dwell and time step use
    the segment alone; the slew limit its step from the previous segment sent (not for the first,
    as :meth:`Schedule.check` does not check the step into a schedule); windowed RMS the window
    ending with the segment, the instrument idle before the first segment (so nothing that passes
    :meth:`Schedule.check` is refused); whole-run RMS the mean square of everything sent so far over
    ``horizon`` (the planned length, set by :func:`fieldplan.lab.play.play`) or, in a live run of
    unknown length, over the time so far (stricter than the final schedule's RMS).
    """

    def __init__(self, channels, limits):
        self.channels = tuple(channels)
        self.limits = limits if limits is not None else HardwareLimits()
        if not isinstance(self.limits, HardwareLimits):
            raise DriverError(f"limits must be a HardwareLimits, got {type(limits).__name__}.")
        self.prev = None
        windows = [self.limits.get(c.name).rms_window for c in self.channels if self.limits.get(c.name).rms is not None]
        self.window = max((w for w in windows if w), default=0.0)
        self.recent = collections.deque()
        self.energy = np.zeros(len(self.channels))
        self.elapsed = 0.0
        #: Planned length of the run, s (set by play); whole-run RMS is measured over it.
        self.horizon = None

    def idle_segment(self, start=0.0):
        return Segment(start, 0.0, [c.idle for c in self.channels], "idle")

    def check(self, segment):
        """Raise :class:`LimitError` (channel, time and limit named) if sending ``segment`` breaks a limit."""
        vals = np.asarray(segment.values, dtype=float)
        if vals.shape != (len(self.channels),):
            raise DriverError(f"segment has {vals.size} values but the driver has {len(self.channels)} channels "
                              f"({[c.name for c in self.channels]}).")
        if not np.all(np.isfinite(vals)) or not (math.isfinite(segment.duration) and segment.duration >= 0):
            raise LimitError(f"segment at t = {segment.start:g} s has a non-finite value or duration; refused.")
        # The first segment (and the first after an idle) is not slew-checked, as Schedule.check
        # does not check the step from idle into a schedule's first segment.
        prev = self.prev or Segment(segment.start, max(segment.duration, 1e-9), vals, "")
        prev = Segment(segment.start - prev.duration, prev.duration, prev.values, prev.label)
        pair = Schedule(self.channels, [prev.start, segment.start], [prev.duration, segment.duration],
                        [prev.values, vals])
        lim = self._without_rms()
        for msg, ch, t, kind in pair.violations(lim):
            if t >= segment.start - 1e-12 or kind == "slew_rate":
                raise LimitError(f"refused before sending: {msg}.", channel=ch, time=t, limit=kind)
        for k, c in enumerate(self.channels):
            cl = self.limits.get(c.name)
            if cl.rms is None:
                continue
            total = self.elapsed + segment.duration
            if cl.rms_window:
                # The window ending with this segment, exactly, idle before the first segment sent
                # (the driver idled the instrument when it opened); earlier windows were checked before.
                end = segment.start + segment.duration
                lo = end - cl.rms_window
                e = sum(s.values[k] ** 2 * max(0.0, min(s.start + s.duration, end) - max(s.start, lo))
                        for s in [*self.recent, segment])
                r = math.sqrt(e / cl.rms_window)
            else:
                # Whole-run RMS: what was sent so far over the planned length when it is known
                # (play sets `horizon`), else over the time so far.
                span = max(total, self.horizon or 0.0, 1e-300)
                r = math.sqrt((self.energy[k] + vals[k] ** 2 * segment.duration) / span)
            if r > cl.rms * (1 + 1e-9):
                win = f"{cl.rms_window:g} s window" if cl.rms_window else "run so far"
                raise LimitError(f"refused before sending: channel {c.name!r} would reach RMS {r:g} {c.unit} over the "
                                 f"{win} at t = {segment.start:g} s, above its limit {cl.rms:g} {c.unit}.",
                                 channel=c.name, time=segment.start, limit="rms")

    def _without_rms(self):
        import dataclasses  # noqa: PLC0415

        chans = {k: dataclasses.replace(v, rms=None, rms_window=None) for k, v in self.limits.channels.items()}
        return HardwareLimits(chans, time_step=self.limits.time_step, min_dwell=self.limits.min_dwell)

    def accept(self, segment):
        """Record ``segment`` as sent."""
        seg = Segment(segment.start, segment.duration, segment.values, segment.label)
        self.prev = seg
        vals = np.asarray(seg.values)
        self.energy += vals**2 * seg.duration
        self.elapsed += seg.duration
        if self.window:
            self.recent.append(seg)
            while self.recent and self.recent[0].start + self.recent[0].duration < seg.start - self.window:
                self.recent.popleft()

    def reset_to_idle(self):
        """The hardware was put at idle: the next slew is measured from the idle input."""
        self.prev = None


# ---------------------------------------------------------------------------------------------
# transports
# ---------------------------------------------------------------------------------------------
class RecordingTransport:
    """Sends nothing: keeps every command (dry runs). ``read`` returns ``reply`` (``None``: no reply
    is expected, so acknowledgements and error queries are not checked)."""

    def __init__(self, reply=None):
        self.sent = []
        self.reply = reply

    def write(self, text):
        self.sent.append(text)

    def read(self):
        return self.reply

    def close(self):
        pass


class VisaTransport:
    """A PyVISA message-based resource (``pyvisa.ResourceManager(backend).open_resource(name)``).

    Parameters
    ----------
    resource : str
        VISA resource name, e.g. ``"USB0::0x1234::0x5678::SN::INSTR"`` or ``"TCPIP::10.0.0.7::INSTR"``.
    backend : str, optional
        PyVISA backend (``"@py"`` for pyvisa-py, ``"path/to/devices.yaml@sim"`` for pyvisa-sim).
    """

    def __init__(self, resource, *, backend=None, timeout=2.0, write_termination="\n", read_termination="\n"):
        pyvisa = require("pyvisa", what="VISA instruments")
        try:
            self.rm = pyvisa.ResourceManager(backend) if backend else pyvisa.ResourceManager()
            self.inst = self.rm.open_resource(resource, write_termination=write_termination,
                                              read_termination=read_termination)
        except Exception as exc:  # noqa: BLE001 - pyvisa raises many types (VisaIOError, ValueError, OSError)
            raise DriverError(f"cannot open VISA resource {resource!r}"
                              + (f" with backend {backend!r}" if backend else "") + f": {exc}") from None
        self.inst.timeout = int(1000 * timeout)
        self.resource = resource

    def write(self, text):
        try:
            self.inst.write(text)
        except Exception as exc:  # noqa: BLE001
            raise DriverError(f"VISA {self.resource}: writing {text!r} failed: {exc}") from None

    def read(self):
        try:
            return self.inst.read()
        except Exception as exc:  # noqa: BLE001
            raise DriverError(f"VISA {self.resource}: no reply ({exc}).") from None

    def query(self, text):
        self.write(text)
        return self.read()

    def close(self):
        # Only the instrument session: pyvisa hands every caller in a process the same resource
        # manager per library, so closing it would cut off other instruments opened elsewhere.
        self.inst.close()


class SerialTransport:
    """A pyserial port by URL (``"/dev/ttyUSB0"``, ``"COM3"``, ``"loop://"``, ``"socket://host:port"``)."""

    def __init__(self, url, *, baudrate=115200, timeout=2.0, write_termination="\n", read_termination="\n"):
        serial = require("serial", what="serial instruments (pyserial)")
        try:
            self.port = serial.serial_for_url(url, baudrate=int(baudrate), timeout=float(timeout))
        except (serial.SerialException, ValueError) as exc:
            raise DriverError(f"cannot open serial port {url!r}: {exc}") from None
        self.url = url
        self.timeout = float(timeout)
        self.wterm = write_termination.encode()
        self.rterm = read_termination.encode()

    def write(self, text):
        self.port.write(text.encode() + self.wterm)
        self.port.flush()

    def read(self):
        raw = self.port.read_until(self.rterm, size=4096)
        if not raw.endswith(self.rterm):
            raise DriverError(f"serial {self.url}: no complete reply within {self.timeout:g} s (got {raw!r}).")
        return raw[: -len(self.rterm)].decode(errors="replace")

    def close(self):
        self.port.close()


# ---------------------------------------------------------------------------------------------
# the base driver
# ---------------------------------------------------------------------------------------------
def _setting_label(channels, segment):
    lab = segment.label
    if lab and lab not in ("mix",):
        return lab
    return setting_name([(c.name, c.unit) for c in channels], segment.values)


class Driver(abc.ABC):
    """Base of the drivers: the limit check, the idle input, the log, the context manager.

    Parameters
    ----------
    channels : sequence of Channel
        The schedule's channels, in order (each segment's values follow it).
    limits : HardwareLimits, optional
        Declared limits (the channels' own bounds always apply).
    log : str, optional
        Write the log of everything sent here (an input log, atomically) on close.
    """

    kind = "driver"

    def __init__(self, channels, limits=None, *, log=None):
        self.channels = tuple(channels)
        if not self.channels:
            raise DriverError("a driver needs at least one channel.")
        self.limits = limits
        self.guard = LimitGuard(self.channels, limits)
        self.log_path = os.fspath(log) if log is not None else None
        self.log_rows = []
        self._t0 = None
        self.is_open = False
        self.at_idle = None
        self.segments_sent = 0

    # -- subclass hooks -------------------------------------------------------------------
    def _open(self):
        """Connect and send any set-up commands; return a list of (text, reply)."""
        return []

    @abc.abstractmethod
    def _send(self, segment, index):
        """Send one segment; return (text sent, reply)."""

    @abc.abstractmethod
    def _send_idle(self):
        """Put the instrument at the idle input; return (text sent, reply)."""

    def _close(self):
        pass

    # -- public -----------------------------------------------------------------------------
    def open(self):
        if self.is_open:
            return self
        self._t0 = time.perf_counter()
        self._open()
        self.is_open = True
        # Whatever the instrument held before, start from the idle input.
        self.idle()
        return self

    def __enter__(self):
        return self.open()

    def __exit__(self, exc_type, exc, tb):
        self.close()
        return False

    def __call__(self, segment):
        """Check ``segment`` against the limits, send it, log it. Idle on any failure, then re-raise."""
        if not self.is_open:
            self.open()
        try:
            self.guard.check(segment)
            text, reply = self._send(segment, self.segments_sent)
        except BaseException:
            self._safe_idle()
            raise
        self.guard.accept(segment)
        self.segments_sent += 1
        self.at_idle = bool(np.allclose(segment.values, [c.idle for c in self.channels]))
        self._log(segment.start, _setting_label(self.channels, segment), segment.values, text, reply)

    def idle(self):
        """Put the instrument at the idle input (output off) and log it."""
        text, reply = self._send_idle()
        self.guard.reset_to_idle()
        self.at_idle = True
        self._log(None, "idle", [c.idle for c in self.channels], text, reply)

    def _safe_idle(self):
        try:
            self.idle()
        except Exception as exc:  # noqa: BLE001 - the original error matters more; note this one
            self._log(None, "idle", [c.idle for c in self.channels], "", f"idle failed: {exc}")

    def close(self):
        """Idle, disconnect and write the log (always, even if idling fails)."""
        if not self.is_open:
            return
        try:
            self._safe_idle()
        finally:
            try:
                self._close()
            finally:
                self.is_open = False
                if self.log_path:
                    write_log(self.log_path, self.channels, self.log_rows)

    def _log(self, schedule_time, label, values, text, reply):
        now = time.perf_counter() - (self._t0 or time.perf_counter())
        wall = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")
        self.log_rows.append((now, label, tuple(float(v) for v in values), text, reply, wall, schedule_time))

    def describe(self):
        return f"{type(self).__name__} ({self.kind}) on {len(self.channels)} channel(s)"


# ---------------------------------------------------------------------------------------------
# message-based instruments
# ---------------------------------------------------------------------------------------------
class _MessageDriver(Driver):
    def __init__(self, channels, limits, transport, profile, *, log=None):
        super().__init__(channels, limits, log=log)
        if not isinstance(profile, InstrumentProfile):
            raise DriverError(f"profile must be an InstrumentProfile (see load_profile), got {type(profile).__name__}.")
        self.profile = profile
        self.profile.check_channels(self.channels, "visa" if isinstance(self, ToneGenerator) else "serial")
        self.transport = transport
        self._ack = re.compile(profile.ack) if profile.ack else None
        self._err_ok = re.compile(profile.error_ok) if profile.error_ok else None

    def _command(self, text):
        self.transport.write(text)
        if self._ack is None:
            return ""
        reply = self.transport.read()
        if reply is None:           # a dry run: nothing answers
            return ""
        if not self._ack.search(reply):
            raise DriverError(f"{self.describe()}: command {text!r} answered {reply!r}, which does not match the "
                              f"expected acknowledgement {self.profile.ack!r}.")
        return reply

    def _error_check(self):
        if not self.profile.error_query:
            return ""
        self.transport.write(self.profile.error_query)
        reply = self.transport.read()
        if reply is None:
            return ""
        if self._err_ok is not None and not self._err_ok.search(reply):
            raise DriverError(f"{self.describe()}: the instrument reports an error: {self.profile.error_query!r} -> "
                              f"{reply!r}.")
        return reply

    def _fields(self, segment, index, values):
        f = {"index": index, "start": segment.start, "duration": segment.duration,
             "duration_ms": 1e3 * segment.duration, "label": segment.label or "",
             "values": self.profile.values_separator.join(f"{v:.9g}" for v in values)}
        f.update({c.name: v for c, v in zip(self.channels, values)})
        return f

    def _scaled(self, values):
        return [float(v) * float(self.profile.scale.get(c.name, 1.0)) for c, v in zip(self.channels, values)]

    def _close(self):
        self.transport.close()


class ToneGenerator(_MessageDriver):
    """A function/tone generator (or any SCPI-like instrument) over a message transport (PyVISA).

    Per segment: each channel whose value changed gets its command (``profile.commands``), then
    the output is switched on (``profile.output_on``) if it was off and the segment is not idle;
    an all-idle segment switches the output off first. Idle: output off, then every channel at
    its idle value.

    Parameters
    ----------
    channels : sequence of Channel
    limits : HardwareLimits or None
    transport : VisaTransport or RecordingTransport (anything with write/read/close)
    profile : InstrumentProfile
    log : str, optional
    """

    kind = "visa"

    def __init__(self, channels, limits, transport, profile, *, log=None):
        super().__init__(channels, limits, transport, profile, log=log)
        self._held = [None] * len(self.channels)
        self.output_on = None

    def _open(self):
        return [(c, self._command(c)) for c in self.profile.init]

    def _set_values(self, segment, index, values, force=False):
        sent, replies = [], []
        scaled = self._scaled(values)
        for k, c in enumerate(self.channels):
            if force or self._held[k] is None or scaled[k] != self._held[k]:
                f = self._fields(segment, index, scaled)
                f["value"] = scaled[k]
                text = _fill(self.profile.commands[c.name], f)
                replies.append(self._command(text))
                sent.append(text)
                self._held[k] = scaled[k]
        return sent, replies

    def _switch(self, on):
        sent, replies = [], []
        for text in (self.profile.output_on if on else self.profile.output_off):
            replies.append(self._command(text))
            sent.append(text)
        self.output_on = on
        return sent, replies

    def _send(self, segment, index):
        idle = np.allclose(segment.values, [c.idle for c in self.channels])
        sent, replies = [], []
        if idle and self.output_on is not False:
            s, r = self._switch(False)
            sent += s
            replies += r
        s, r = self._set_values(segment, index, segment.values)
        sent += s
        replies += r
        if not idle and self.output_on is not True:
            s, r = self._switch(True)
            sent += s
            replies += r
        e = self._error_check()
        return "; ".join(sent), "; ".join(x for x in replies + [e] if x)

    def _send_idle(self):
        seg = Segment(0.0, 0.0, [c.idle for c in self.channels], "idle")
        s1, r1 = self._switch(False)
        s2, r2 = self._set_values(seg, -1, seg.values, force=True)
        e = self._error_check()
        return "; ".join(s1 + s2), "; ".join(x for x in r1 + r2 + [e] if x)


class SerialLine(_MessageDriver):
    """A microcontroller (or amplifier) taking one text line per segment over a serial port.

    Per segment the line ``profile.line`` is sent with the segment's fields and, if ``profile.ack``
    is set, one reply line matching it must come back within ``profile.timeout`` s (else
    :class:`DriverError`, and the idle line is sent). Idle: ``profile.idle_line`` (default the same
    template with the idle values and label ``idle``).
    """

    kind = "serial"

    def _send(self, segment, index):
        values = self._scaled(segment.values)
        text = _fill(self.profile.line, self._fields(segment, index, values))
        return text, self._command(text)

    def _send_idle(self):
        seg = Segment(0.0, 0.0, [c.idle for c in self.channels], "idle")
        values = self._scaled(seg.values)
        tpl = self.profile.idle_line or self.profile.line
        text = _fill(tpl, self._fields(seg, -1, values))
        return text, self._command(text)


# ---------------------------------------------------------------------------------------------
# analog output
# ---------------------------------------------------------------------------------------------
def waveforms(schedule, rate, *, scale=None, offset=None):
    """The schedule resampled at the DAQ rate as one array per channel (held values, no interpolation).

    Parameters
    ----------
    schedule : Schedule
    rate : float
        Samples per second, Hz.
    scale, offset : array_like (m,), optional
        Output = scale * value + offset per channel (e.g. V per A of a current amplifier), default 1 and 0.

    Returns
    -------
    t : ndarray (N,)
        s.
    data : ndarray (m, N)
        Output units (V for an analog output).
    """
    t, vals = schedule.resample(rate)
    m = len(schedule.channels)
    s = np.ones(m) if scale is None else np.broadcast_to(np.asarray(scale, float), (m,))
    o = np.zeros(m) if offset is None else np.broadcast_to(np.asarray(offset, float), (m,))
    return t, (vals * s + o).T.copy()


class ArrayWriter:
    """Keeps what would be written to analog outputs (dry runs and tests): ``blocks`` of (rate, data (m, N))."""

    def __init__(self, n_channels, *, min_val=-10.0, max_val=10.0):
        self.n_channels = int(n_channels)
        self.min_val, self.max_val = float(min_val), float(max_val)
        self.blocks = []
        self.level = None

    def write(self, data, rate):
        self.blocks.append((float(rate), np.array(data, dtype=float)))
        self.level = np.array(data, dtype=float)[:, -1].copy()

    def write_static(self, values):
        self.level = np.array(values, dtype=float)
        self.blocks.append((0.0, self.level[:, None].copy()))

    def close(self):
        pass

    def describe(self):
        return f"in-memory writer, {self.n_channels} channel(s)"


class NidaqmxWriter:
    """Analog outputs of an NI-DAQmx device (the ``daq`` extra: ``pip install 'fieldplan[daq]'``).

    Parameters
    ----------
    physical_channels : sequence of str
        E.g. ``["Dev1/ao0", "Dev1/ao1"]``, one per schedule channel, in order.
    min_val, max_val : float
        Output range, V (the device refuses samples outside it; this driver checks first).
    """

    def __init__(self, physical_channels, *, min_val=-10.0, max_val=10.0, timeout_margin=2.0):
        self.nidaqmx = require("nidaqmx", extra="daq", what="NI-DAQmx analog outputs")
        self.physical = list(physical_channels)
        self.n_channels = len(self.physical)
        self.min_val, self.max_val = float(min_val), float(max_val)
        self.margin = float(timeout_margin)
        try:
            # Touch the driver now, so a missing NI-DAQmx runtime fails before anything is played.
            self.nidaqmx.system.System.local().driver_version  # noqa: B018
        except Exception as exc:  # noqa: BLE001 - nidaqmx raises DaqNotFoundError, OSError, ...
            raise DriverError(f"the NI-DAQmx driver is not available on this machine ({exc}).") from None

    def _task(self):
        task = self.nidaqmx.Task()
        for ch in self.physical:
            task.ao_channels.add_ao_voltage_chan(ch, min_val=self.min_val, max_val=self.max_val)
        return task

    def write(self, data, rate):
        from nidaqmx.constants import AcquisitionType  # noqa: PLC0415

        data = np.asarray(data, dtype=float)
        with self._task() as task:
            task.timing.cfg_samp_clk_timing(rate, sample_mode=AcquisitionType.FINITE, samps_per_chan=data.shape[1])
            task.write(data if self.n_channels > 1 else data[0], auto_start=True)
            task.wait_until_done(timeout=data.shape[1] / rate + self.margin)

    def write_static(self, values):
        with self._task() as task:
            v = [float(x) for x in values]
            task.write(v if self.n_channels > 1 else v[0], auto_start=True)

    def close(self):
        pass

    def describe(self):
        return f"NI-DAQmx {', '.join(self.physical)}"


class WaveformDriver(Driver):
    """Analog-output waveforms: each segment as held samples at ``rate`` Hz on ``writer``.

    Output per channel = ``scale * value + offset`` (V), checked against the writer's range
    before writing. Idle: a static write of the idle values. The DAQ's sample clock holds each
    segment for its duration (``writer.write`` returns when the samples are out).

    Parameters
    ----------
    channels : sequence of Channel
    limits : HardwareLimits or None
    writer : ArrayWriter or NidaqmxWriter
    rate : float
        Hz.
    scale, offset : array_like (m,), optional
        V per channel unit, V.
    log : str, optional
    """

    kind = "daq"

    def __init__(self, channels, limits, writer, rate, *, scale=None, offset=None, log=None):
        super().__init__(channels, limits, log=log)
        m = len(self.channels)
        if getattr(writer, "n_channels", m) != m:
            raise DriverError(f"the writer has {writer.n_channels} output(s) but the schedule {m} channel(s).")
        if not (isinstance(rate, (int, float)) and math.isfinite(rate) and rate > 0):
            raise DriverError(f"DAQ rate must be > 0 Hz, got {rate!r}.")
        self.writer, self.rate = writer, float(rate)
        self.scale = np.ones(m) if scale is None else np.broadcast_to(np.asarray(scale, float), (m,)).copy()
        self.offset = np.zeros(m) if offset is None else np.broadcast_to(np.asarray(offset, float), (m,)).copy()
        lo, hi = writer.min_val, writer.max_val
        for k, c in enumerate(self.channels):
            ends = self.scale[k] * np.array([c.lower, c.upper]) + self.offset[k]
            if ends.min() < lo - 1e-12 or ends.max() > hi + 1e-12:
                raise DriverError(f"channel {c.name!r}: its bounds [{c.lower:g}, {c.upper:g}] {c.unit} map to "
                                  f"[{ends.min():g}, {ends.max():g}] V, outside the output range [{lo:g}, {hi:g}] V.")

    def _volts(self, values):
        return self.scale * np.asarray(values, float) + self.offset

    def _send(self, segment, index):
        n = max(int(round(segment.duration * self.rate)), 1)
        v = self._volts(segment.values)
        self.writer.write(np.repeat(v[:, None], n, axis=1), self.rate)
        return f"{n} samples at {self.rate:g} Hz: " + ", ".join(f"{x:.6g} V" for x in v), ""

    def _send_idle(self):
        v = self._volts([c.idle for c in self.channels])
        self.writer.write_static(v)
        return "static " + ", ".join(f"{x:.6g} V" for x in v), ""

    def _close(self):
        self.writer.close()


# ---------------------------------------------------------------------------------------------
# driver URLs
# ---------------------------------------------------------------------------------------------
def open_driver(url, channels, limits, *, profile=None, log=None, dry_run=False, rate=None, scale=None, offset=None):
    """A driver from a URL: ``visa://RESOURCE[@backend]``, ``serial://PORT_OR_URL``, ``daq://Dev1/ao0,Dev1/ao1``.

    Parameters
    ----------
    url : str
        ``visa://TCPIP::10.0.0.7::INSTR``, ``visa://ASRL1::INSTR@devices.yaml@sim`` (a pyvisa-sim
        definition), ``serial:///dev/ttyUSB0``, ``serial://loop://``, ``daq://Dev1/ao0,Dev1/ao1``.
    channels : sequence of Channel
    limits : HardwareLimits or None
    profile : InstrumentProfile or str, optional
        Required for visa and serial (a path is read with :func:`load_profile`).
    dry_run : bool
        Open nothing: commands are formatted and logged exactly as they would be sent
        (:class:`RecordingTransport`; an :class:`ArrayWriter` for daq).
    rate : float, optional
        DAQ samples per second (default 10 kHz).
    scale, offset : optional
        DAQ volts per channel unit and offset.
    """
    if not isinstance(url, str) or "://" not in url:
        raise DriverError(f"driver {url!r}: expected visa://..., serial://... or daq://...")
    scheme, rest = url.split("://", 1)
    scheme = scheme.lower()
    if scheme in ("visa", "serial"):
        if profile is None:
            raise DriverError(f"a {scheme} driver needs an instrument profile (--profile FILE): the commands to send.")
        prof = profile if isinstance(profile, InstrumentProfile) else load_profile(profile)
        opts = {"timeout": prof.timeout, "write_termination": prof.write_termination,
                "read_termination": prof.read_termination}
        if scheme == "visa":
            resource, _, backend = rest.partition("@")
            tr = RecordingTransport() if dry_run else VisaTransport(resource, backend=backend or None, **opts)
            return ToneGenerator(channels, limits, tr, prof, log=log)
        tr = RecordingTransport() if dry_run else SerialTransport(rest, baudrate=prof.baudrate, **opts)
        return SerialLine(channels, limits, tr, prof, log=log)
    if scheme == "daq":
        phys = [p.strip() for p in rest.split(",") if p.strip()]
        if len(phys) != len(channels):
            raise DriverError(f"daq://: {len(phys)} output(s) named ({phys}) for {len(channels)} channel(s) "
                              f"({[c.name for c in channels]}).")
        writer = ArrayWriter(len(phys)) if dry_run else NidaqmxWriter(phys)
        return WaveformDriver(channels, limits, writer, rate or 10_000.0, scale=scale, offset=offset, log=log)
    raise DriverError(f"driver {url!r}: unknown scheme {scheme!r}; use visa://, serial:// or daq://.")
