"""Steered objects: radius, density and the magnetic, dielectric or plate-drift properties actuators read."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..errors import FieldplanError

__all__ = ["Body", "Shell", "DEFAULT_GAP", "check_positions", "check_bodies", "group_bodies"]

#: Default gap between a sedimented body's surface and the floor, m. Common practice, from memory:
#: a colloid resting on glass in water floats on its electrostatic double layer (Debye length
#: about 10 nm at 1 mM salt), and total-internal-reflection microscopy of sedimented micrometre
#: beads finds most-probable gaps of a few tens to a few hundred nanometres (Prieve, Adv. Colloid
#: Interface Sci. 82, 93, 1999); surface roughness of commercial beads is of the same order. A
#: fixed gap, not a fraction of the radius: a 100 um sphere does not float 10 um up.
DEFAULT_GAP = 100e-9


def _positive(owner, key, value, allow_none=False, allow_zero=False):
    if value is None and allow_none:
        return
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    ok = ok and np.isfinite(value) and (value >= 0 if allow_zero else value > 0)
    if not ok:
        rule = ">= 0" if allow_zero else "> 0"
        raise FieldplanError(f"{owner}: {key} must be a finite number {rule}, got {value!r}.")


@dataclass(frozen=True)
class Shell:
    """Single-shell dielectric model of a cell (membrane around a homogeneous interior).

    Parameters
    ----------
    thickness : float
        Membrane thickness, m (about 5-10 nm for a cell membrane).
    membrane_permittivity, interior_permittivity : float
        Relative permittivities (dimensionless).
    membrane_conductivity, interior_conductivity : float
        S/m.
    """

    # Unit and one-line meaning per field (metadata): what scenario files and their reference read.
    thickness: float = field(metadata={"unit": "m", "doc": "Membrane thickness."})
    membrane_permittivity: float = field(metadata={"doc": "Relative permittivity of the membrane."})
    membrane_conductivity: float = field(metadata={"unit": "S/m", "doc": "Membrane conductivity."})
    interior_permittivity: float = field(metadata={"doc": "Relative permittivity of the interior."})
    interior_conductivity: float = field(metadata={"unit": "S/m", "doc": "Interior conductivity."})

    def __post_init__(self):
        _positive("Shell", "thickness", self.thickness)
        _positive("Shell", "membrane_permittivity", self.membrane_permittivity)
        _positive("Shell", "interior_permittivity", self.interior_permittivity)
        _positive("Shell", "membrane_conductivity", self.membrane_conductivity, allow_zero=True)
        _positive("Shell", "interior_conductivity", self.interior_conductivity, allow_zero=True)


@dataclass(frozen=True)
class Body:
    """One steered object (plain data, validated on construction).

    Parameters
    ----------
    name : str
        Kind label, e.g. ``"bead-2um"``; bodies with equal parameters behave the same.
    radius : float
        m.
    density : float
        kg/m^3.
    height : float, optional
        Height of the centre above the floor, m. Default ``radius + gap``: a sedimented body
        resting on the floor. Must exceed ``radius`` (the wall drag grows without bound at contact).
    moment : tuple of 3 floats, optional
        Fixed magnetic moment, A m^2 (a permanent-magnet body that keeps its orientation).
    susceptibility : float, optional
        Intrinsic volume susceptibility chi of a linear soft bead (dimensionless); the sphere's
        demagnetisation is applied by the magnetic actuator.
    saturation_magnetization : float, optional
        A/m; with ``susceptibility``, the moment saturates at ``M_sat * V``.
    permittivity : float, optional
        Relative permittivity of a homogeneous dielectric particle.
    conductivity : float, optional
        Bulk conductivity, S/m.
    surface_conductance : float, optional
        S; adds ``2 K_s / r`` to the bulk conductivity.
    shell : Shell, optional
        Single-shell model (cells); replaces ``permittivity``/``conductivity``.
    drift_mobility : float, optional
        Plate-drift mobility, the calibration parameter of the vibrating-plate actuator (its units
        and default are documented in ``actuators.acoustic``).
    gap : float, optional
        Gap between the body's surface and the floor, m, used when ``height`` is not given
        (``height = radius + gap``); with neither, the gap is :data:`DEFAULT_GAP` (100 nm). Kept as
        given (``None`` if not); if both are given they must agree to 1e-9 of the radius. It takes
        no part in equality, which ``height`` decides; :attr:`clearance` is always ``height - radius``.
    """

    # Unit, one-line meaning and kind per field (metadata): what scenario files (`bodies:`), `fieldplan
    # schema` and the README reference read (fieldplan.scenario.fields); the checks are in __post_init__.
    name: str = field(metadata={"doc": "Name of this kind of body (used in outputs)."})
    radius: float = field(metadata={"unit": "m", "doc": "Radius."})
    density: float = field(metadata={"unit": "kg/m^3", "doc": "Density."})
    height: float | None = field(default=None, metadata={
        "unit": "m", "doc": "Centre height above the floor (default radius + gap)."})
    moment: tuple | None = field(default=None, metadata={
        "unit": "A*m^2", "kind": "vector3", "doc": "Fixed magnetic moment [mx, my, mz]."})
    susceptibility: float | None = field(default=None, metadata={
        "doc": "Intrinsic volume susceptibility of a soft bead."})
    saturation_magnetization: float | None = field(default=None, metadata={
        "unit": "A/m", "doc": "Saturation magnetisation (with susceptibility)."})
    permittivity: float | None = field(default=None, metadata={
        "doc": "Relative permittivity of a homogeneous particle."})
    conductivity: float | None = field(default=None, metadata={"unit": "S/m", "doc": "Bulk conductivity."})
    surface_conductance: float | None = field(default=None, metadata={
        "unit": "S", "doc": "Surface conductance (adds 2 K_s / r to the bulk conductivity)."})
    shell: Shell | None = field(default=None, metadata={
        "kind": "section", "doc": "Single-shell cell model; replaces permittivity and conductivity."})
    drift_mobility: float | None = field(default=None, metadata={
        "doc": "Plate-drift mobility (calibration parameter of the plate actuator; units in actuators.acoustic)."})
    extra: tuple = field(default=(), compare=True, metadata={
        "doc": "Further hashable properties, part of equality (not read from scenario files)."})
    gap: float | None = field(default=None, compare=False, metadata={
        "unit": "m", "doc": "Gap between body and floor, if height is not given (default 100 nm)."})

    def __post_init__(self):
        owner = f"Body {self.name!r}"
        if not isinstance(self.name, str) or not self.name:
            raise FieldplanError(f"Body name must be a non-empty string, got {self.name!r}.")
        _positive(owner, "radius", self.radius)
        _positive(owner, "density", self.density)
        _positive(owner, "gap", self.gap, allow_none=True)
        if self.height is None:
            gap = DEFAULT_GAP if self.gap is None else float(self.gap)
            object.__setattr__(self, "height", float(self.radius) + gap)
        _positive(owner, "height", self.height)
        if self.height < self.radius * (1 - 1e-12):
            raise FieldplanError(
                f"{owner}: height {self.height} m is below its radius {self.radius} m: the body "
                "would be inside the floor."
            )
        if self.gap is not None and abs(self.height - self.radius - self.gap) > 1e-9 * self.radius:
            # No silent winner: with dataclasses.replace, change one of them and pass the other as None.
            raise FieldplanError(
                f"{owner}: height {self.height} m and gap {self.gap} m disagree (height = radius + gap would be "
                f"{self.radius + self.gap} m); give only one of them.")
        if not self.height > self.radius:
            raise FieldplanError(
                f"{owner}: height {self.height} m equals its radius: a body touching the floor has unbounded "
                f"wall drag. Give it a gap (e.g. gap={DEFAULT_GAP:g} m, a resting bead's double-layer gap).")
        if self.moment is not None:
            m = np.asarray(self.moment, dtype=float)
            if m.shape != (3,) or not np.all(np.isfinite(m)):
                raise FieldplanError(f"{owner}: moment must be 3 finite numbers (A m^2), got {self.moment!r}.")
            object.__setattr__(self, "moment", tuple(float(x) for x in m))
        if self.susceptibility is not None:
            _positive(owner, "susceptibility", self.susceptibility)
        _positive(owner, "saturation_magnetization", self.saturation_magnetization, allow_none=True)
        _positive(owner, "permittivity", self.permittivity, allow_none=True)
        if self.conductivity is not None:
            _positive(owner, "conductivity", self.conductivity, allow_zero=True)
        if self.surface_conductance is not None:
            _positive(owner, "surface_conductance", self.surface_conductance, allow_zero=True)
        if self.shell is not None and not isinstance(self.shell, Shell):
            raise FieldplanError(f"{owner}: shell must be a fieldplan.Shell, got {type(self.shell).__name__}.")
        _positive(owner, "drift_mobility", self.drift_mobility, allow_none=True)

    @property
    def clearance(self):
        """Gap between the body's surface and the floor, ``height - radius``, m."""
        return self.height - self.radius

    @property
    def volume(self):
        """m^3."""
        return 4.0 / 3.0 * np.pi * self.radius**3

    @property
    def mass(self):
        """kg."""
        return self.density * self.volume

    @property
    def is_magnetic(self):
        """True if the body has a fixed moment or a susceptibility."""
        return self.moment is not None or self.susceptibility is not None

    @property
    def is_dielectric(self):
        """True if the body has homogeneous or shell dielectric properties."""
        return self.shell is not None or self.permittivity is not None


# -- argument checks shared by the public API (plan, closed_loop, Workspace, ...) ----------------
def check_positions(xy, name="positions", n=None, error=FieldplanError):
    """Validate planar positions given to the API; returns a float array (n, 2), m.

    The API's counterpart of the scenario loader's checks: a non-numeric entry, a ragged list, a
    wrong shape, a count that does not match or a non-finite value raises ``error`` naming the
    argument, never a bare ``ValueError`` from numpy.

    Parameters
    ----------
    xy : array_like, shape (n, 2) or (2,)
        Positions in metres (plain numbers; unit strings belong in scenario files).
    name : str
        The argument's name, used in the message (``"starts"``, ``"goals"``, ``"xy"``).
    n : int, optional
        Required number of positions (e.g. one per body).
    error : type
        Exception class raised, a :class:`~fieldplan.errors.FieldplanError` subclass
        (``WorkspaceError`` for a workspace's methods).

    Returns
    -------
    ndarray, shape (n, 2)

    Examples
    --------
    >>> check_positions([1e-4, 2e-4], "start").tolist()
    [[0.0001, 0.0002]]
    >>> check_positions([["a", 0]], "goals")
    Traceback (most recent call last):
    ...
    fieldplan.errors.FieldplanError: goals must be numbers in metres, shape (n, 2); got [['a', 0]] (entry 'a' is a str). Convert unit strings first, e.g. fieldplan.to_si('150 um', 'm').
    """
    def fail(why, hint=""):
        text = repr(xy)
        text = text if len(text) <= 120 else text[:117] + "..."
        raise error(f"{name} must be numbers in metres, shape (n, 2); got {text} ({why}){hint}.")

    strings = ". Convert unit strings first, e.g. fieldplan.to_si('150 um', 'm')"
    if isinstance(xy, (str, bytes)) or xy is None:
        fail(f"a {type(xy).__name__}, not an array", strings if isinstance(xy, str) else "")
    try:
        raw = np.asarray(xy)
    except (TypeError, ValueError):
        fail("a ragged list: every position needs two numbers")
    if raw.dtype.kind in "USbO":
        # Find the first entry that is not a plain number, to name it.
        flat = np.ravel(np.asarray(xy, dtype=object)) if raw.dtype.kind == "O" else np.ravel(raw)
        bad = next((v for v in flat if isinstance(v, (str, bytes, bool, np.bool_))
                    or not isinstance(v, (int, float, np.integer, np.floating))), None)
        if bad is not None:
            bad = bad.item() if isinstance(bad, np.generic) else bad
            fail(f"entry {bad!r} is a {type(bad).__name__}", strings if isinstance(bad, str) else "")
        if raw.dtype.kind == "O":
            fail("a ragged list: every position needs two coordinates")
    arr = raw.astype(float)
    if arr.ndim == 1 and arr.shape == (2,):
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != 2:
        fail(f"shape {raw.shape}")
    if n is not None and len(arr) != n:
        fail(f"{len(arr)} position{'s' if len(arr) != 1 else ''} for {n} bod{'ies' if n != 1 else 'y'}")
    if not np.all(np.isfinite(arr)):
        fail(f"non-finite value at row {int(np.flatnonzero(~np.isfinite(arr).all(axis=1))[0])}")
    return arr


def check_bodies(bodies, name="bodies"):
    """Validate the bodies given to the API; returns them as a tuple of :class:`Body`.

    Parameters
    ----------
    bodies : sequence of Body
    name : str
        The argument's name, used in the message.

    Returns
    -------
    tuple of Body

    Raises
    ------
    FieldplanError
        ``bodies`` is a single Body, a string, empty, or holds anything but Body objects (the
        message names the index and what was given instead).

    Examples
    --------
    >>> b = Body("bead", 5e-6, 1050.0)
    >>> len(check_bodies([b, b]))
    2
    >>> check_bodies(["bead"])
    Traceback (most recent call last):
    ...
    fieldplan.errors.FieldplanError: bodies[0] must be a fieldplan.Body, got the string 'bead'; build one with fieldplan.Body('bead', radius=..., density=...).
    """
    if isinstance(bodies, Body):
        raise FieldplanError(f"{name} must be a sequence of fieldplan.Body, got a single Body {bodies.name!r}; "
                             f"pass [{bodies.name}] (a list).")
    if isinstance(bodies, (str, bytes)):
        raise FieldplanError(f"{name} must be a sequence of fieldplan.Body, got the string {bodies!r}; build "
                             f"bodies with fieldplan.Body({bodies!r}, radius=..., density=...).")
    try:
        items = tuple(bodies)
    except TypeError:
        raise FieldplanError(f"{name} must be a sequence of fieldplan.Body, got {type(bodies).__name__} "
                             f"{bodies!r}.") from None
    if not items:
        raise FieldplanError(f"{name} must hold at least one fieldplan.Body, got an empty {type(bodies).__name__}.")
    for i, b in enumerate(items):
        if isinstance(b, Body):
            continue
        if isinstance(b, str):
            raise FieldplanError(f"{name}[{i}] must be a fieldplan.Body, got the string {b!r}; build one with "
                                 f"fieldplan.Body({b!r}, radius=..., density=...).")
        raise FieldplanError(f"{name}[{i}] must be a fieldplan.Body, got {type(b).__name__} {b!r}.")
    return items


def group_bodies(bodies):
    """Indices of equal bodies, grouped so that each kind is evaluated in one vectorised call.

    Returns
    -------
    list of (Body, ndarray of int)

    Examples
    --------
    >>> a, b = Body("bead", 1e-6, 1500.0), Body("cell", 2e-6, 1050.0)
    >>> [(g.radius, idx.tolist()) for g, idx in group_bodies([a, b, a])]
    [(1e-06, [0, 2]), (2e-06, [1])]
    """
    groups = {}
    for i, b in enumerate(bodies):
        groups.setdefault(b, []).append(i)
    return [(b, np.asarray(idx)) for b, idx in groups.items()]
