"""Steered objects: radius, density and the magnetic, dielectric or plate-drift properties actuators read."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import FieldplanError

__all__ = ["Body", "Shell", "DEFAULT_GAP"]

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

    thickness: float
    membrane_permittivity: float
    membrane_conductivity: float
    interior_permittivity: float
    interior_conductivity: float

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

    name: str
    radius: float
    density: float
    height: float | None = None
    moment: tuple | None = None
    susceptibility: float | None = None
    saturation_magnetization: float | None = None
    permittivity: float | None = None
    conductivity: float | None = None
    surface_conductance: float | None = None
    shell: Shell | None = None
    drift_mobility: float | None = None
    extra: tuple = field(default=(), compare=True)
    gap: float | None = field(default=None, compare=False)

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
