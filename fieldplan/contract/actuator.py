"""The actuator contract: channels, primitives, the input -> velocity-field interface and field bases.

Every actuator, built-in or a user's, subclasses :class:`Actuator` and implements
``_velocity(body, medium, xy, u)``; the public :meth:`Actuator.velocity` validates input first, so
a malformed call fails the same clear way for every model. The planner only ever sees
:class:`FieldBasis` objects made by :meth:`Actuator.basis`.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass, field

import numpy as np

from ..errors import ActuatorError
from ..world.body import group_bodies

__all__ = ["Channel", "Primitive", "Actuator", "FieldBasis", "Segment", "TAGS"]

#: Capability tags an actuator may declare, and what each promises (the contract suite checks them).
TAGS = {
    "affine_in_input": "velocity = drift(x) + J(x) u exactly, for every body the actuator accepts",
    "zero_idle": "the idle input (all channels at their idle value) gives zero velocity",
    "discrete_channels": "some channels take only listed values (e.g. a drive frequency); plan with primitives",
}

# Relative slack when checking an input against its channel bounds (float round-off of solvers).
_BOUND_RTOL = 1e-9


@dataclass(frozen=True)
class Channel:
    """One scalar hardware input.

    Parameters
    ----------
    name : str
        Unique within an actuator, e.g. ``"coil_3"``.
    unit : str
        SI unit of the value (``"A"``, ``"V"``, ``"Hz"``, ...).
    lower, upper : float
        Inclusive bounds, in ``unit``.
    idle : float
        The value held when the channel is at rest (default 0, clipped into the bounds).
    values : tuple of float, optional
        For a discrete channel (a drive frequency chosen from a set), the allowed values.
    """

    name: str
    unit: str
    lower: float
    upper: float
    idle: float = 0.0
    values: tuple = ()

    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name:
            raise ActuatorError(f"Channel name must be a non-empty string, got {self.name!r}.")
        lo, hi = float(self.lower), float(self.upper)
        if not (np.isfinite(lo) and np.isfinite(hi) and lo <= hi):
            raise ActuatorError(
                f"Channel {self.name!r}: bounds must be finite with lower <= upper, got [{self.lower}, {self.upper}]."
            )
        object.__setattr__(self, "lower", lo)
        object.__setattr__(self, "upper", hi)
        object.__setattr__(self, "idle", float(np.clip(self.idle, lo, hi)))
        vals = tuple(float(v) for v in self.values)
        for v in vals:
            if not lo <= v <= hi:
                raise ActuatorError(f"Channel {self.name!r}: allowed value {v} lies outside [{lo}, {hi}].")
        object.__setattr__(self, "values", vals)


@dataclass(frozen=True)
class Primitive:
    """One fixed, named setting of all channels (e.g. a tone at an amplitude, a coil pattern).

    Parameters
    ----------
    name : str
        Unique within an actuator's primitives.
    values : tuple of float
        One value per channel, in channel order and units.
    """

    name: str
    values: tuple

    def __post_init__(self):
        object.__setattr__(self, "values", tuple(float(v) for v in np.ravel(self.values)))


@dataclass(frozen=True)
class Segment:
    """The unit of a schedule: hold ``values`` from ``start`` for ``duration`` seconds."""

    start: float
    duration: float
    values: tuple
    label: str = ""

    def __post_init__(self):
        object.__setattr__(self, "values", tuple(float(v) for v in np.ravel(self.values)))


@dataclass
class FieldBasis:
    """What the planner may mix during one period, linear in the decision weights ``w``.

    Both modes predict the displacement of body ``i`` over a period ``T`` as
    ``T * drift[i] + sum_k w_k * fields[k, i]``:

    * ``linear``: ``w_k = T * u_k`` with ``u`` the channel values in the box ``[lower, upper]``
      (``fields[k]`` is the velocity per unit of channel ``k``; exact for affine actuators).
    * ``timeshare``: ``w_k >= 0`` seconds of primitive ``k`` with ``sum_k w_k <= T``, the rest of
      the period at the idle input; ``fields[k]`` is the velocity under primitive ``k`` minus the
      idle velocity ``drift``. Any actuator becomes plannable by a convex program this way.

    Attributes
    ----------
    mode : {"linear", "timeshare"}
    fields : ndarray, shape (K, n, 2)
        m/s per unit weight rate (see above).
    drift : ndarray, shape (n, 2)
        m/s, velocity at the idle input (or zero input in linear mode).
    channels : tuple of Channel
    primitives : tuple of Primitive
        Timeshare mode only; ``len(primitives) == K``.
    idle : ndarray, shape (m,)
        The channel values held for the unused part of a period.
    """

    mode: str
    fields: np.ndarray
    drift: np.ndarray
    channels: tuple
    primitives: tuple = ()
    idle: np.ndarray | None = None
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.mode not in ("linear", "timeshare"):
            raise ActuatorError(f"FieldBasis mode must be 'linear' or 'timeshare', got {self.mode!r}.")
        self.fields = np.asarray(self.fields, dtype=float)
        self.drift = np.asarray(self.drift, dtype=float)
        if self.fields.ndim != 3 or self.fields.shape[2] != 2:
            raise ActuatorError(f"FieldBasis fields must have shape (K, n, 2), got {self.fields.shape}.")
        if self.drift.shape != self.fields.shape[1:]:
            raise ActuatorError(f"FieldBasis drift must have shape {self.fields.shape[1:]}, got {self.drift.shape}.")
        if self.idle is None:
            self.idle = np.array([c.idle for c in self.channels], dtype=float)
        if self.mode == "linear" and self.fields.shape[0] != len(self.channels):
            raise ActuatorError("linear FieldBasis needs one field per channel.")
        if self.mode == "timeshare" and self.fields.shape[0] != len(self.primitives):
            raise ActuatorError("timeshare FieldBasis needs one field per primitive.")

    @property
    def size(self):
        """K, the number of mixable fields."""
        return self.fields.shape[0]

    @property
    def n_bodies(self):
        return self.fields.shape[1]

    @property
    def lower(self):
        """Lower bounds of the per-second weight rates (channel lower bounds, or 0), shape (K,)."""
        if self.mode == "linear":
            return np.array([c.lower for c in self.channels])
        return np.zeros(self.size)

    @property
    def upper(self):
        """Upper bounds of the per-second weight rates (channel upper bounds, or 1), shape (K,)."""
        if self.mode == "linear":
            return np.array([c.upper for c in self.channels])
        return np.ones(self.size)

    def matrix(self):
        """The 2n x K matrix of fields, rows ordered (x0, y0, x1, y1, ...), m/s per unit rate."""
        return self.fields.reshape(self.size, -1).T

    def displacement(self, weights, period):
        """Predicted displacement over ``period`` seconds, shape (n, 2), m.

        ``weights`` are channel values ``u`` (linear mode) or seconds per primitive (timeshare).
        """
        w = np.asarray(weights, dtype=float)
        if self.mode == "linear":
            return period * (self.drift + np.tensordot(w, self.fields, axes=1))
        return period * self.drift + np.tensordot(w, self.fields, axes=1)

    def to_segments(self, weights, period, start=0.0, min_duration=0.0):
        """Turn one period's solution into segments.

        Parameters
        ----------
        weights : array_like, shape (K,)
            Channel values (linear) or seconds per primitive (timeshare).
        period : float
            s.
        start : float
            s, start time of the first segment.
        min_duration : float
            s; timeshare slices shorter than this are dropped (their time goes to idle).

        Returns
        -------
        list of Segment
        """
        w = np.asarray(weights, dtype=float)
        if self.mode == "linear":
            lo = np.array([c.lower for c in self.channels])
            hi = np.array([c.upper for c in self.channels])
            return [Segment(start, period, np.clip(w, lo, hi), "mix")]
        w = np.clip(w, 0.0, None)
        total = w.sum()
        if total > period:
            w = w * (period / total)
        segs = []
        t = start
        for k in np.argsort(-w):
            if w[k] <= max(min_duration, 1e-12 * period):
                continue
            segs.append(Segment(t, float(w[k]), self.primitives[k].values, self.primitives[k].name))
            t += float(w[k])
        rest = start + period - t
        if rest > 1e-12 * period:
            segs.append(Segment(t, rest, self.idle, "idle"))
        return segs


class Actuator(abc.ABC):
    """Base class of every actuator model: ``(body, medium, positions, input) -> planar velocity``.

    Subclasses set :attr:`channels` (a tuple of :class:`Channel`) and :attr:`tags`, implement
    :meth:`_velocity`, and, unless tagged ``affine_in_input``, :meth:`primitives`. They may
    override :meth:`basis` with something faster or exact.

    Attributes
    ----------
    tags : frozenset of str
        Declared capabilities, keys of :data:`TAGS`.
    extent : tuple (xmin, xmax, ymin, ymax) or None
        The region, in m, where the model is meant to be used (plots, maps, contract checks).
    """

    tags: frozenset = frozenset()
    extent: tuple | None = None

    @property
    @abc.abstractmethod
    def channels(self):
        """Tuple of :class:`Channel`."""

    @abc.abstractmethod
    def _velocity(self, body, medium, xy, u):
        """Velocity of ``body`` at validated positions ``xy`` (n, 2) m under validated input ``u`` (m,), m/s."""

    def primitives(self):
        """Named settings the planner may time-share (tuple of :class:`Primitive`).

        The default, for affine actuators, is each channel alone at its lower and upper bound.
        """
        out = []
        for k, c in enumerate(self.channels):
            for side, val in (("-", c.lower), ("+", c.upper)):
                if val == c.idle:
                    continue
                v = self.idle_input().copy()
                v[k] = val
                out.append(Primitive(f"{c.name}{side}", v))
        return tuple(out)

    def idle_input(self):
        """Channel values at rest, shape (m,)."""
        return np.array([c.idle for c in self.channels], dtype=float)

    def hardware_limits(self):
        """The limits the hardware itself declares; scenarios start from these and may only tighten them.

        The default is the channel bounds. A model that knows more overrides it (a coil array
        declares each coil's RMS current over its thermal time constant), so a limit of the
        hardware is written once, in the actuator, and reaches every schedule planned for it.

        Returns
        -------
        fieldplan.contract.schedule.HardwareLimits
        """
        # deferred import: import cycle: fieldplan.contract.schedule imports this module (Channel, Segment)
        from .schedule import HardwareLimits  # noqa: PLC0415

        return HardwareLimits.from_channels(self.channels)

    def describe(self):
        """One-line human summary."""
        return f"{type(self).__name__} with {len(self.channels)} channels, tags {sorted(self.tags)}"

    # -- validation -------------------------------------------------------------------------
    def check_input(self, u):
        """Validate one input vector against the channels; returns it as a float array (m,).

        Raises
        ------
        ActuatorError
            Wrong length, non-finite value, value outside a channel's bounds, or a value not in a
            discrete channel's allowed set.
        """
        chans = self.channels
        u = np.asarray(u, dtype=float)
        if u.shape != (len(chans),):
            raise ActuatorError(
                f"{type(self).__name__}: input must have shape ({len(chans)},) - one value per channel "
                f"{[c.name for c in chans]} - got shape {u.shape}."
            )
        if not np.all(np.isfinite(u)):
            bad = [c.name for c, v in zip(chans, u) if not np.isfinite(v)]
            raise ActuatorError(f"{type(self).__name__}: input is not finite on channel(s) {bad}.")
        for c, v in zip(chans, u):
            span = max(abs(c.lower), abs(c.upper), 1e-300)
            if v < c.lower - _BOUND_RTOL * span or v > c.upper + _BOUND_RTOL * span:
                raise ActuatorError(
                    f"{type(self).__name__}: channel {c.name!r} = {v:g} {c.unit} is outside its bounds "
                    f"[{c.lower:g}, {c.upper:g}] {c.unit}."
                )
            if c.values and v != c.idle and not np.any(np.isclose(v, c.values, rtol=1e-9, atol=0)):
                raise ActuatorError(
                    f"{type(self).__name__}: channel {c.name!r} = {v:g} {c.unit} is not one of its allowed "
                    f"values {list(c.values)[:8]}{'...' if len(c.values) > 8 else ''}."
                )
        return u

    @staticmethod
    def check_points(xy):
        """Validate positions; returns a float array (n, 2) in m."""
        xy = np.asarray(xy, dtype=float)
        if xy.ndim == 1 and xy.shape == (2,):
            xy = xy[None, :]
        if xy.ndim != 2 or xy.shape[1] != 2:
            raise ActuatorError(f"positions must have shape (n, 2) in metres, got shape {xy.shape}.")
        if not np.all(np.isfinite(xy)):
            raise ActuatorError("positions must be finite.")
        return xy

    def check_body(self, body, medium):
        """Hook: raise :class:`ActuatorError` if this actuator cannot move ``body`` in ``medium``."""

    # -- public interface --------------------------------------------------------------------
    def velocity(self, body, medium, xy, u):
        """Planar velocity of ``body`` at positions ``xy`` under input ``u``.

        Parameters
        ----------
        body : Body
        medium : Medium
        xy : array_like, shape (n, 2)
            Positions, m.
        u : array_like, shape (m,)
            One value per channel, in channel units.

        Returns
        -------
        ndarray, shape (n, 2)
            m/s.
        """
        xy = self.check_points(xy)
        u = self.check_input(u)
        self.check_body(body, medium)
        v = np.asarray(self._velocity(body, medium, xy, u), dtype=float)
        if v.shape != xy.shape:
            raise ActuatorError(
                f"{type(self).__name__}._velocity returned shape {v.shape}, expected {xy.shape}."
            )
        return v

    def basis(self, bodies, medium, xy):
        """The field basis at the bodies' current positions.

        Parameters
        ----------
        bodies : sequence of Body, length n
        medium : Medium
        xy : array_like, shape (n, 2)
            Position of each body, m.

        Returns
        -------
        FieldBasis
            ``linear`` if the actuator is tagged ``affine_in_input``, else ``timeshare`` over
            :meth:`primitives`.
        """
        xy = self.check_points(xy)
        if len(bodies) != len(xy):
            raise ActuatorError(f"basis: {len(bodies)} bodies but {len(xy)} positions.")
        chans = self.channels
        idle = self.idle_input()
        groups = group_bodies(bodies)
        if "affine_in_input" in self.tags:
            zero = np.clip(np.zeros(len(chans)), [c.lower for c in chans], [c.upper for c in chans])
            drift = self._eval_groups(groups, medium, xy, zero)
            fields = np.empty((len(chans),) + xy.shape)
            for k, c in enumerate(chans):
                # Unit steps are exact for an affine map; use the larger bound for a non-symmetric box.
                step = c.upper if abs(c.upper) >= abs(c.lower) else c.lower
                if step == 0:
                    fields[k] = 0.0
                    continue
                u = zero.copy()
                u[k] = step
                fields[k] = (self._eval_groups(groups, medium, xy, u) - drift) / (step - zero[k])
            return FieldBasis("linear", fields, drift, chans, idle=zero)
        prims = self.primitives()
        if not prims:
            raise ActuatorError(f"{type(self).__name__} is not affine in its input and has no primitives.")
        drift = self._eval_groups(groups, medium, xy, idle)
        fields = np.empty((len(prims),) + xy.shape)
        for k, p in enumerate(prims):
            fields[k] = self._eval_groups(groups, medium, xy, p.values) - drift
        return FieldBasis("timeshare", fields, drift, chans, primitives=tuple(prims), idle=idle)

    def _eval_groups(self, groups, medium, xy, u):
        out = np.empty_like(xy)
        for body, idx in groups:
            out[idx] = self.velocity(body, medium, xy[idx], u)
        return out
