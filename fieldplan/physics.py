"""Low-Reynolds-number helpers shared by all actuators: drag, wall correction, diffusion, regime checks."""

from __future__ import annotations

import warnings

import numpy as np
from scipy.constants import Boltzmann

__all__ = [
    "stokes_drag",
    "faxen_parallel",
    "drag_coefficient",
    "diffusion_coefficient",
    "reynolds_number",
    "inertial_relaxation_time",
    "FAXEN_MIN_RATIO",
    "regime_warnings",
]

#: Below this ratio h/r of centre height to radius the Faxen series is no longer accurate
#: (Happel & Brenner); we clip to it and say so.
FAXEN_MIN_RATIO = 1.1


def stokes_drag(radius, viscosity):
    """Stokes drag coefficient ``6 pi eta r`` of a sphere in unbounded fluid, N s/m.

    Parameters
    ----------
    radius : float
        m.
    viscosity : float
        Pa s.
    """
    return 6.0 * np.pi * viscosity * radius


def faxen_parallel(radius, height, warn=True):
    """Faxen correction D_par/D0 for a sphere moving parallel to a plane wall.

    ``1 - 9/16 (r/h) + 1/8 (r/h)^3 - 45/256 (r/h)^4 - 1/16 (r/h)^5`` (Faxen; Happel & Brenner,
    Low Reynolds Number Hydrodynamics). The series is accurate only for ``h/r >= 1.1``; closer to
    the wall the ratio is clipped to 1.1 (with a warning), which underestimates the true drag.

    Parameters
    ----------
    radius : float
        m.
    height : float
        Height of the sphere's centre above the wall, m.

    Returns
    -------
    float
        The factor, in (0, 1].

    Examples
    --------
    >>> round(faxen_parallel(1.0, 2.0), 5)
    0.72144
    """
    ratio = height / radius
    if ratio < FAXEN_MIN_RATIO:
        if warn and ratio < FAXEN_MIN_RATIO * (1 - 1e-9):
            warnings.warn(
                f"Faxen wall correction used at h/r = {ratio:.3g}, below its validity limit "
                f"{FAXEN_MIN_RATIO}; clipped to {FAXEN_MIN_RATIO}.",
                RuntimeWarning,
                stacklevel=2,
            )
        ratio = FAXEN_MIN_RATIO
    s = 1.0 / ratio
    return 1.0 - 9.0 / 16.0 * s + s**3 / 8.0 - 45.0 / 256.0 * s**4 - s**5 / 16.0


def drag_coefficient(body, medium):
    """Drag coefficient for in-plane motion of ``body`` near the floor, N s/m (Stokes / Faxen)."""
    if not medium.submerged:
        # A particle resting on a plate in air is not Stokes-dragged; actuators in air use their own law.
        return stokes_drag(body.radius, medium.viscosity)
    return stokes_drag(body.radius, medium.viscosity) / faxen_parallel(body.radius, body.height, warn=False)


def diffusion_coefficient(body, medium, wall=True):
    """Stokes-Einstein diffusion coefficient ``kT / (6 pi eta r)``, m^2/s, with the Faxen factor.

    Examples
    --------
    >>> from fieldplan import Body, water
    >>> b = Body("bead", radius=0.5e-6, density=1050.0, height=1.0)   # far from the wall
    >>> round(diffusion_coefficient(b, water(293.15), wall=False) * 1e12, 4)
    0.4288
    """
    d0 = Boltzmann * medium.temperature / stokes_drag(body.radius, medium.viscosity)
    if wall and medium.submerged:
        d0 *= faxen_parallel(body.radius, body.height, warn=False)
    return d0


def reynolds_number(speed, radius, medium):
    """Particle Reynolds number ``rho v d / eta`` (dimensionless), with d the diameter."""
    return medium.density * abs(speed) * 2.0 * radius / medium.viscosity


def inertial_relaxation_time(body, medium):
    """Momentum relaxation time ``2 rho_p r^2 / (9 eta)`` of a sphere, s."""
    return 2.0 * body.density * body.radius**2 / (9.0 * medium.viscosity)


def regime_warnings(bodies, medium, speed, period):
    """Reasons the overdamped model may not hold, as sentences (empty list if it holds).

    Common practice (no single source): the Reynolds number ``rho v d / eta`` should be well below
    1 and the inertial relaxation time ``2 rho_p r^2 / (9 eta)`` well below the control period; we
    flag ``Re > 0.1`` and ``tau > period / 10``. Plate grains in air hop rather than glide and are
    exempt (their drift law is empirical).

    Parameters
    ----------
    bodies : sequence of Body
    medium : Medium
    speed : float
        Largest expected speed, m/s.
    period : float
        Control period, s.
    """
    out = []
    if not medium.submerged:
        return out
    for b in {b.name: b for b in bodies}.values():
        re = reynolds_number(speed, b.radius, medium)
        tau = inertial_relaxation_time(b, medium)
        if re > 0.1:
            out.append(f"body kind {b.name!r}: Reynolds number {re:.2g} at {speed:.3g} m/s is not << 1; "
                       "the overdamped (Stokes) model underestimates drag and ignores inertia.")
        if tau > 0.1 * period:
            out.append(f"body kind {b.name!r}: inertial relaxation time {tau:.3g} s is not << the control "
                       f"period {period:.3g} s; velocity does not follow force at once.")
    return out
