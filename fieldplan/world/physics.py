"""Low-Reynolds-number helpers shared by all actuators: drag, wall correction, diffusion, regime checks."""

from __future__ import annotations

import functools
import warnings

import numpy as np
from scipy.constants import Boltzmann
from scipy.linalg import solve_banded

from ..errors import FieldplanError

__all__ = [
    "stokes_drag",
    "faxen_parallel",
    "wall_resistance_parallel",
    "wall_drag_parallel",
    "drag_coefficient",
    "diffusion_coefficient",
    "reynolds_number",
    "inertial_relaxation_time",
    "FAXEN_MIN_RATIO",
    "WALL_MIN_GAP_RATIO",
    "regime_warnings",
]

#: Below this ratio h/r of centre height to radius the Faxen series is no longer accurate
#: (Happel & Brenner); :func:`faxen_parallel` clips to it and says so. Drag and diffusion do not use
#: the Faxen series near the wall: they use :func:`wall_drag_parallel`, exact down to contact.
FAXEN_MIN_RATIO = 1.1

#: Smallest gap-to-radius ratio (h - r)/r the exact wall solution accepts. Below it the number of
#: series terms (about 40/sqrt(2 delta)) grows past 3e5, and a gap of 1e-8 r is in any case far
#: below the roughness and double-layer scales at which continuum lubrication stops describing
#: a real contact.
WALL_MIN_GAP_RATIO = 1e-8

#: Above this ratio h/r the bispherical series loses digits to round-off in the (vanishing)
#: translation-rotation coupling; there Faxen's series is exact to (r/h)^6 < 1e-12 and is used.
_WALL_FAR_RATIO = 100.0


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
    Low Reynolds Number Hydrodynamics). The series is accurate only for ``h/r >= 1.1`` (4 % low in
    drag there already); closer to the wall the ratio is clipped to 1.1 (with a warning), which
    underestimates the true drag without bound. Drag and diffusion use the exact
    :func:`wall_drag_parallel` instead; this far-field series stays as a check and for ``h/r > 100``.

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


def _csch(x):
    """1/sinh(x) without overflow for large x."""
    e = np.exp(-x)
    return 2.0 * e / (1.0 - e * e)


@functools.lru_cache(maxsize=1024)
def _bispherical_parallel(gap_ratio, reach=40.0):
    """O'Neill (1964) and Dean & O'Neill (1963) series at ``delta = (h - r)/r``: (F_t, T_t, F_r, T_r).

    ``reach``: the series is cut after ``reach / alpha`` terms, where its terms have fallen by
    about ``exp(-2 reach)`` (the tests double it to show convergence).
    """
    d = float(gap_ratio)
    # alpha = arccosh(h/r), written with log1p so that small gaps keep their digits.
    al = np.log1p(d + np.sqrt(d * (2.0 + d)))
    # The coefficients fall off like exp(-(2n+1) alpha): 40/alpha terms leave exp(-80) behind.
    N = int(max(30, np.ceil(reach / al)))
    n = np.arange(N + 2, dtype=float)                       # 0 .. N+1
    sha, cotha = np.sinh(al), 1.0 / np.tanh(al)
    k = (n + 0.5) / np.tanh((n + 0.5) * al) - cotha          # k_n, O'Neill's notation
    m = n[1:N + 1]                                           # rows n = 1 .. N of the recurrence
    a = (2 * m - 1) * k[0:N] - (2 * m - 3) * k[1:N + 1]
    b = (2 * m + 5) * k[1:N + 1] - (2 * m + 3) * k[2:N + 2]
    band = np.zeros((3, N))
    band[0, 1:] = (b * (m + 2) / (2 * m + 3))[:-1]          # coefficient of A_{n+1}
    band[1] = -(a * m + b * (m + 1)) / (2 * m + 1)           # coefficient of A_n
    band[2, :-1] = (a * (m - 1) / (2 * m - 1))[1:]           # coefficient of A_{n-1}
    x0, xm, xp = (m + 0.5) * al, (m - 0.5) * al, (m + 1.5) * al
    coth = lambda x: 1.0 / np.tanh(x)                        # noqa: E731
    rhs_translate = np.sqrt(2.0) * (2.0 * coth(x0) - coth(xm) - coth(xp))
    rhs_rotate = -np.sqrt(2.0) * np.exp(-x0) / ((2 * m + 1) * sha) * (
        (2 * m + 1) ** 2 * (np.exp(al) / (2 * m - 1) + np.exp(-al) / (2 * m + 3)) * _csch(x0)
        - (2 * m - 1) * _csch(xm) - (2 * m + 3) * _csch(xp))
    nn, kk = n[:N + 1], k[:N + 1]
    e = np.exp(-(2 * nn + 1) * al)
    out = []
    for rhs, rotating in ((rhs_translate, False), (rhs_rotate, True)):
        A = np.zeros(N + 2)                                  # A_0 = 0 and A_{N+1} = 0 (truncation)
        A[1:N + 1] = solve_banded((1, 1), band, rhs)
        Am, A0, Ap = np.concatenate(([0.0], A[:N])), A[:N + 1], A[1:N + 2]
        E = kk * ((nn - 1) * nn / (2 * nn - 1) * Am - (nn + 1) * (nn + 2) / (2 * nn + 3) * Ap)
        C = -2.0 * kk * ((nn - 1) / (2 * nn - 1) * Am - A0 + (nn + 2) / (2 * nn + 3) * Ap)
        if rotating:
            L = -(np.exp(-(nn - 0.5) * al) / (2 * nn - 1) - np.exp(-(nn + 1.5) * al) / (2 * nn + 3)) / np.sqrt(2.0)
            E += (np.sqrt(2.0) * (2 * nn + 1) * np.exp(-(nn + 0.5) * al) - L / sha) * _csch((nn + 0.5) * al)
            C += 4.0 * L / sha * _csch((nn + 0.5) * al)
        else:
            E += 4.0 * np.sqrt(2.0) * e / (1.0 - e)          # 2 sqrt2 exp(-(n+1/2)a) / sinh((n+1/2)a)
        C[0] = 0.0
        B = (nn - 1) * Am - (2 * nn + 1) * A0 + (nn + 2) * Ap
        B[0] = 0.0
        D = 0.5 * ((nn + 1) * (nn + 2) * Ap - (nn - 1) * nn * Am)
        force_sum = np.sum(E + nn * (nn + 1) * C)
        torque_sum = np.sum((2 + e) * (nn * (nn + 1) * (2 * A0 + C * cotha) - (2 * nn + 1 - cotha) * E)
                            + (2 - e) * (nn * (nn + 1) * B * cotha - (2 * nn + 1 - cotha) * D))
        if rotating:
            out += [-np.sqrt(2.0) / 6.0 * sha**2 * force_sum, (1.0 - sha**3 * torque_sum / (4.0 * np.sqrt(2.0))) / 3.0]
        else:
            out += [np.sqrt(2.0) / 6.0 * sha * force_sum, sha**2 * torque_sum / (12.0 * np.sqrt(2.0))]
    return tuple(float(v) for v in out)


def wall_resistance_parallel(radius, height):
    """Resistance of a sphere moving parallel to a plane wall, exact down to contact.

    Bispherical-coordinate series solutions of the Stokes equations: translation without rotation
    (O'Neill, Mathematika 11, 67, 1964) and rotation without translation (Dean & O'Neill,
    Mathematika 10, 13, 1963), in the normalisation of Goldman, Cox & Brenner (Chem. Eng. Sci. 22,
    637, 1967). With ``U`` the speed parallel to the wall and ``Omega`` the rotation rate about the
    horizontal axis normal to ``U``, counted positive in the rolling sense (the sense of a wheel
    rolling along the wall in the direction of ``U``), the drag and the retarding torque are
    ``F = 6 pi eta r (f_tt U - f_tr r Omega)`` and ``T = 8 pi eta r^2 (t_rr r Omega - t_tt U)``,
    all four coefficients positive: a translating sphere is turned in the rolling sense, and
    a free one spins at ``r Omega = (t_tt / t_rr) U``.
    Each recurrence is solved as a tridiagonal system truncated after about ``40/alpha`` terms
    (``alpha = arccosh(h/r)``), where the coefficients have fallen by ``exp(-80)``; results are
    converged to round-off (the tests check doubling the number of terms and Lorentz reciprocity,
    ``t_tt = 3/4 f_tr``). Above ``h/r = 100`` Faxen's series (exact to ``(r/h)^6``) replaces the
    series, which there only loses digits.

    Parameters
    ----------
    radius : float
        m.
    height : float
        Height of the sphere's centre above the wall, m; ``(height - radius) / radius`` must be at
        least :data:`WALL_MIN_GAP_RATIO`.

    Returns
    -------
    tuple of 4 floats
        ``(f_tt, t_tt, f_tr, t_rr)``, dimensionless: drag on a translating non-rotating sphere, torque
        on it, force on a rotating non-translating sphere, torque on it. Far from the wall
        ``(1, 0, 0, 1)``.

    Examples
    --------
    >>> f_tt, t_tt, f_tr, t_rr = wall_resistance_parallel(1.0, np.cosh(0.5))
    >>> round(f_tt, 4)                     # O'Neill (1964), alpha = 0.5
    2.1515
    """
    r, h = float(radius), float(height)
    if not (np.isfinite(r) and np.isfinite(h) and r > 0):
        raise FieldplanError(f"wall resistance: radius and height must be finite with radius > 0, got {r!r}, {h!r}.")
    gap = (h - r) / r
    if not gap >= WALL_MIN_GAP_RATIO:
        raise FieldplanError(
            f"wall resistance: gap (h - r)/r = {gap:.3g} is below {WALL_MIN_GAP_RATIO:g} (height {h:.6g} m, "
            f"radius {r:.6g} m); give the body a physical gap above the floor (Body.gap).")
    if h / r > _WALL_FAR_RATIO:
        return (1.0 / faxen_parallel(r, h), 0.0, 0.0, 1.0 + 5.0 / 16.0 * (r / h) ** 3)
    return _bispherical_parallel(gap)


def wall_drag_parallel(radius, height, rotation="free"):
    """Wall drag factor ``F / (6 pi eta r U)`` (>= 1) for motion parallel to a plane wall.

    ``rotation="free"``: the torque-free sphere, free to roll, whose rotation the flow sets
    (``f_tt - f_tr t_tt / t_rr``, Goldman, Cox & Brenner 1967); ``"fixed"``: the sphere held
    against rotation (``f_tt``, O'Neill 1964). The free sphere has the smaller drag; the two differ
    by under 0.1 % above ``h/r = 1.5``, 1.7 % at a gap of 0.5 % of the radius and 3 % at 0.02 %. Its inverse is
    the translational mobility, ``D_par / D0``. Near contact the "fixed" factor grows as
    ``(8/15) ln(r/delta)`` (``delta = h - r``) and the "free" one as ``(1/2) ln(r/delta)`` to
    leading order: the drag is finite at any gap, and the Faxen series (which saturates near 3.1)
    no longer applies.
    See :func:`wall_resistance_parallel` for the method.

    Parameters
    ----------
    radius, height : float
        m (centre height above the wall).
    rotation : {"free", "fixed"}

    Returns
    -------
    float

    Examples
    --------
    >>> round(wall_drag_parallel(1.0, 2.0), 4)
    1.3827
    """
    f_tt, t_tt, f_tr, t_rr = wall_resistance_parallel(radius, height)
    if rotation == "fixed":
        return f_tt
    if rotation != "free":
        raise FieldplanError(f"wall drag: rotation must be 'free' or 'fixed', got {rotation!r}.")
    return f_tt - f_tr * t_tt / t_rr


def _body_rotation(body):
    # A permanent-magnet body is held in its orientation by the field (Body.moment keeps its
    # direction), so it slides without rolling; every other body is pushed through its centre by a
    # force with no applied torque, so it turns as freely as the flow makes it (torque-free).
    return "fixed" if body.moment is not None else "free"


def drag_coefficient(body, medium):
    """Drag coefficient for in-plane motion of ``body`` near the floor, N s/m.

    Stokes drag times the exact wall factor :func:`wall_drag_parallel` at ``body.height``: the
    torque-free factor for bodies that can roll (a sedimented bead pushed by a field force has no
    applied torque), the non-rotating factor for fixed-moment bodies, whose orientation the field
    holds.
    """
    if not medium.submerged:
        # A particle resting on a plate in air is not Stokes-dragged; actuators in air use their own law.
        return stokes_drag(body.radius, medium.viscosity)
    return stokes_drag(body.radius, medium.viscosity) * wall_drag_parallel(body.radius, body.height,
                                                                            _body_rotation(body))


def diffusion_coefficient(body, medium, wall=True):
    """Stokes-Einstein diffusion coefficient ``kT / (6 pi eta r)``, m^2/s, with the exact wall factor.

    Parallel to the floor the Brownian diffusivity is ``kT`` times the translational mobility,
    ``D_par = kT / drag_coefficient(body, medium)`` (fluctuation-dissipation), so the simulator's
    Brownian steps and the drift velocity use one wall factor.

    Examples
    --------
    >>> from fieldplan import Body, water
    >>> b = Body("bead", radius=0.5e-6, density=1050.0, height=1.0)   # far from the wall
    >>> round(diffusion_coefficient(b, water(293.15), wall=False) * 1e12, 4)
    0.4288
    """
    d0 = Boltzmann * medium.temperature / stokes_drag(body.radius, medium.viscosity)
    if wall and medium.submerged:
        d0 /= wall_drag_parallel(body.radius, body.height, _body_rotation(body))
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
