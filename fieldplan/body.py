"""Steered objects: radius, density and the magnetic, dielectric or plate-drift properties actuators read."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .errors import FieldplanError

__all__ = ["Body", "Shell"]


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
        Height of the centre above the floor, m. Default ``1.1 * radius``: a sedimented bead
        resting a small gap above the floor (common practice, no source; the Faxen series is
        valid from h/r = 1.1).
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

    def __post_init__(self):
        owner = f"Body {self.name!r}"
        if not isinstance(self.name, str) or not self.name:
            raise FieldplanError(f"Body name must be a non-empty string, got {self.name!r}.")
        _positive(owner, "radius", self.radius)
        _positive(owner, "density", self.density)
        if self.height is None:
            object.__setattr__(self, "height", 1.1 * float(self.radius))
        _positive(owner, "height", self.height)
        if self.height < self.radius * (1 - 1e-12):
            raise FieldplanError(
                f"{owner}: height {self.height} m is below its radius {self.radius} m: the body "
                "would be inside the floor."
            )
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
