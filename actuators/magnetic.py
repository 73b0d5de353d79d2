"""Magnetic coil array pulling magnetic beads: exact loop fields, finite coils, bead forces, the actuator.

Physics, from the wire up:

* :func:`loop_field`, :func:`loop_field_gradient` -- the exact field of a circular current loop from
  complete elliptic integrals (Simpson, Lane, Immer and Youngquist 2001), rewritten so that it stays
  accurate near the axis and in the far field (see *Numerical form* below), and its analytic
  Jacobian.
* :class:`Coil` -- a finite multi-layer coil: a uniform current density over the rectangular winding
  cross-section, integrated by Gauss-Legendre quadrature over loops, with the node count chosen from
  the distance to the evaluation points so that the quadrature error stays below a stated bound.
* :func:`bead_force` -- force on a fixed-moment, a linear soft or a saturating bead (Jackson §5.7;
  Furlani 2001).
* :class:`CoilArray` -- the :class:`fieldplan.Actuator`: one current per coil, beads on the floor of a
  dish at a given height, velocity = in-plane force / wall-corrected Stokes drag.

Numerical form
--------------
With ``alpha^2 = (a - rho)^2 + z^2``, ``beta^2 = (a + rho)^2 + z^2``, ``m = 4 a rho / beta^2`` and
``C = mu0 I / pi``, the textbook expressions cancel catastrophically for small ``m`` (near the axis and
far away). Integrating by parts in the elliptic integrals gives, exactly,

``B_rho = 4 C a^2 rho z J(m) / beta^5``, ``B_z = C a^2 [E(m) / (alpha^2 beta) - 4 rho^2 J(m) / beta^5]``,

with ``J(m) = int_0^{pi/2} sin^4 t (1 - m sin^2 t)^{-3/2} dt = (3 pi / 16) 2F1(3/2, 5/2; 3; m)``
-- a positive integral without cancellation. ``J`` is summed as its hypergeometric series for
``m < 0.25`` (40 terms, truncation below 1e-17 relative) and from ``K`` and ``E`` above, where the
cancellation costs at most about 70 ulp. ``B_z`` uses the original form for ``m >= 0.25`` (it is the
accurate one next to the wire). ``1 - m`` is always computed as ``alpha^2 / beta^2``, and ``K`` from
``scipy.special.ellipkm1``, so that points a hair off the wire keep full precision. Exactly on the
wire the ideal filament's field is infinite and the functions return non-finite values there.

Conventions: SI units throughout; Jacobians are ``G[..., i, j] = dB_i / dx_j`` in T/m.
"""

from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.constants import g as _GRAVITY
from scipy.constants import mu_0
from scipy.special import ellipe, ellipkm1

from fieldplan.contract.actuator import Actuator, Channel, FieldBasis, Primitive
from fieldplan.contract.schedule import ChannelLimit, HardwareLimits
from fieldplan.errors import ActuatorError, LimitError
from fieldplan.world.physics import drag_coefficient

__all__ = [
    "loop_field",
    "loop_field_gradient",
    "Coil",
    "helmholtz_pair",
    "maxwell_pair",
    "effective_susceptibility",
    "bead_model",
    "bead_force",
    "CoilArray",
    "BEAD_MODELS",
    "plot_field",
]

#: Bead models a :class:`CoilArray` can accept, and what each needs on the :class:`fieldplan.Body`.
BEAD_MODELS = {
    "fixed": "Body.moment (A m^2): a permanent moment of fixed orientation; F = grad(m . B)",
    "linear": "Body.susceptibility (intrinsic chi): induced moment V chi_eff B / mu0; F = V chi_eff/(2 mu0) grad|B|^2",
    "saturating": "Body.susceptibility and Body.saturation_magnetization: the linear moment capped at M_sat V along B",
}

# Below this elliptic parameter J(m) is summed as a series (see the module docstring).
_M_SWITCH = 0.25
_N_SERIES = 40


def _series_coefficients(n):
    # 2F1(3/2, 5/2; 3; m) = sum t_k m^k, t_{k+1}/t_k = (k + 3/2)(k + 5/2) / ((k + 3)(k + 1)).
    t = np.empty(n)
    t[0] = 1.0
    for k in range(n - 1):
        t[k + 1] = t[k] * (k + 1.5) * (k + 2.5) / ((k + 3.0) * (k + 1.0))
    return 3.0 * np.pi / 16.0 * t


_J_COEF = _series_coefficients(_N_SERIES)
_DJ_COEF = _J_COEF[1:] * np.arange(1, _N_SERIES)


def _horner(coef, x):
    out = np.full_like(x, coef[-1])
    for c in coef[-2::-1]:
        out = out * x + c
    return out


def _j_function(m, p, derivative):
    """``J(m)`` and optionally ``dJ/dm``; ``p = 1 - m`` given separately (computed without cancellation)."""
    J = np.empty_like(m)
    dJ = np.empty_like(m) if derivative else None
    small = m < _M_SWITCH
    if np.any(small):
        ms = m[small]
        J[small] = _horner(_J_COEF, ms)
        if derivative:
            dJ[small] = _horner(_DJ_COEF, ms)
    big = ~small
    K = E = None
    if np.any(big):
        mb, pb = m[big], p[big]
        with np.errstate(divide="ignore", invalid="ignore"):
            K = ellipkm1(pb)
            E = ellipe(mb)
            m2p = mb * mb * pb
            Jb = ((2.0 - mb) * E - 2.0 * pb * K) / m2p
            J[big] = Jb
            if derivative:
                dJ[big] = (1.5 * (K - E) - Jb * mb * (2.0 - 3.0 * mb)) / m2p
    return J, dJ, small, K, E


def _loop_terms(rho, z, a, gradient=False):
    """Cylindrical field terms of a unit loop, per ``C = mu0 I / pi``.

    Parameters
    ----------
    rho, z : ndarray
        Cylindrical coordinates about the loop's axis and centre, m (any shape, same as ``a``).
    a : ndarray
        Loop radius, m.

    Returns
    -------
    F : ndarray
        ``B_rho / rho`` per C, 1/m^2 (finite on the axis).
    Bz : ndarray
        ``B_z`` per C, 1/m.
    P, Q : ndarray or None
        With ``gradient``: ``rho dF/drho`` and ``dF/dz`` per C, 1/m^3. The whole Jacobian follows from
        F, P and Q because the field is curl- and divergence-free.
    """
    ap = a + rho
    am = a - rho
    z2 = z * z
    beta2 = ap * ap + z2
    alpha2 = am * am + z2
    beta = np.sqrt(beta2)
    # Rounding can push m a hair above 1 next to the wire, where ellipe is undefined.
    m = np.minimum(4.0 * a * rho / beta2, 1.0)
    p = alpha2 / beta2
    J, dJ, small, K_big, E_big = _j_function(m, p, gradient)
    inv_b5 = 1.0 / (beta2 * beta2 * beta)
    a2 = a * a
    S = 4.0 * a2 * inv_b5
    F = S * z * J
    Bz = np.empty_like(rho)
    with np.errstate(divide="ignore", invalid="ignore"):
        if np.any(small):
            s = small
            Bz[s] = a2[s] * ellipe(m[s]) / (alpha2[s] * beta[s]) - S[s] * rho[s] ** 2 * J[s]
        big = ~small
        if np.any(big):
            Bz[big] = ((am[big] * ap[big] - z2[big]) * E_big + alpha2[big] * K_big) / (
                2.0 * alpha2[big] * beta[big])
    if not gradient:
        return F, Bz, None, None
    inv_b2 = 1.0 / beta2
    P = S * z * rho * (dJ * 4.0 * a * (am * ap + z2) * inv_b2 * inv_b2 - 5.0 * J * ap * inv_b2)
    Q = S * (J - 8.0 * a * rho * z2 * dJ * inv_b2 * inv_b2 - 5.0 * J * z2 * inv_b2)
    return F, Bz, P, Q


def _as_points(points, name="points"):
    pts = np.asarray(points, dtype=float)
    if pts.shape == (3,):
        pts = pts[None, :]
    if pts.ndim != 2 or pts.shape[1] != 3:
        raise ActuatorError(f"{name} must have shape (n, 3) in metres, got shape {pts.shape}.")
    if not np.all(np.isfinite(pts)):
        raise ActuatorError(f"{name} must be finite.")
    return pts


def _unit_vector(v, name):
    arr = np.asarray(v, dtype=float)
    if arr.shape != (3,) or not np.all(np.isfinite(arr)):
        raise ActuatorError(f"{name} must be 3 finite numbers, got {v!r}.")
    n = float(np.linalg.norm(arr))
    if not n > 0:
        raise ActuatorError(f"{name} must be a non-zero vector (it gives a direction), got {v!r}.")
    return arr / n


def _positive(name, value, allow_zero=False):
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    ok = ok and math.isfinite(value) and (value >= 0 if allow_zero else value > 0)
    if not ok:
        rule = ">= 0" if allow_zero else "> 0"
        raise ActuatorError(f"{name} must be a finite number {rule}, got {value!r}.")
    return float(value)


def _coaxial_sum(points, origins, axes, starts, offsets, radii, weights, gradient):
    """Field (and Jacobian) of groups of coaxial loops at many points, summed per group.

    Parameters
    ----------
    points : (n, 3) m
    origins, axes : (G, 3)
        A point on each group's common axis, m, and the unit axis.
    starts : (G,) int
        Index of each group's first loop in the loop arrays (loops sorted by group).
    offsets : (L,) m
        Loop centre = origin + offset * axis.
    radii : (L,) m
    weights : (L,) A (current times turns share)

    Returns
    -------
    B : (G, n, 3) T; G : (G, n, 3, 3) T/m or None

    Notes
    -----
    Loops of one group share the cylindrical frame, so only four scalars per loop and point are
    computed (``F``, ``Bz`` and the two gradient terms of :func:`_loop_terms`); they are summed per
    group before the vectors and tensors are assembled.
    """
    n = len(points)
    ng = len(starts)
    L = len(radii)
    if n == 0 or L == 0:
        return np.zeros((ng, n, 3)), (np.zeros((ng, n, 3, 3)) if gradient else None)
    d = points[None, :, :] - origins[:, None, :]
    z0 = np.einsum("gnk,gk->gn", d, axes)
    rv = d - z0[..., None] * axes[:, None, :]
    rho = np.sqrt(np.einsum("gnk,gnk->gn", rv, rv))
    sums = _coaxial_scalars(rho, z0, starts, offsets, radii, weights, gradient)
    return _assemble(rv, rho, axes, *sums) if gradient else _assemble(rv, rho, axes, sums[0], sums[1])


def _coaxial_scalars(rho, z0, starts, offsets, radii, weights, gradient):
    """Per-group sums of the scalars of :func:`_loop_terms`, times ``mu0 w / pi``: (2 or 4, G, n).

    ``rho`` and ``z0`` (G, n) are cylindrical coordinates about each group's axis and origin.
    """
    ng, n = rho.shape
    L = len(radii)
    group = np.repeat(np.arange(ng), np.diff(np.append(starts, L)))
    coef = (mu_0 / np.pi) * weights
    sums = np.zeros((4 if gradient else 2, ng, n))
    # Chunk over points so that the (L, chunk) work arrays stay small.
    chunk = max(1, int(2e5 // L))
    for s0 in range(0, n, chunk):
        sl = slice(s0, s0 + chunk)
        rl = rho[group, sl]
        zl = z0[group, sl] - offsets[:, None]
        terms = _loop_terms(rl, zl, np.broadcast_to(radii[:, None], rl.shape), gradient)
        for i, t in enumerate(terms[:len(sums)]):
            sums[i, :, sl] = np.add.reduceat(t * coef[:, None], starts, axis=0)
    return sums


def _assemble(rv, rho, axes, F, Bz, P=None, Q=None):
    """Vectors and tensors from the cylindrical scalars of :func:`_loop_terms` (summed per group).

    ``rv`` (G, n, 3) is the radial vector from each group's axis, ``rho`` its length, ``axes`` (G, 3).
    Returns B (G, n, 3) and, when ``P`` and ``Q`` are given, G (G, n, 3, 3).
    """
    B = F[..., None] * rv + Bz[..., None] * axes[:, None, :]
    if P is None:
        return B, None
    with np.errstate(invalid="ignore", divide="ignore"):
        rhat = np.where(rho[..., None] > 0, rv / rho[..., None], 0.0)
    nn = np.einsum("gi,gj->gij", axes, axes)[:, None]
    G = (P[..., None, None] * rhat[..., :, None] * rhat[..., None, :]
         + F[..., None, None] * (np.eye(3) - nn)
         + Q[..., None, None] * (rv[..., :, None] * axes[:, None, None, :]
                                 + axes[:, None, :, None] * rv[..., None, :])
         - (P + 2.0 * F)[..., None, None] * nn)
    return B, G


def _single_loop(points, radius, center, axis, current, gradient):
    r, c, n, cur = _check_loop_args(radius, center, axis, current)
    pts = _as_points(points)
    return _coaxial_sum(pts, c[None], n[None], np.array([0]), np.zeros(1), np.array([r]),
                        np.array([cur]), gradient)


def _check_loop_args(radius, center, axis, current):
    r = _positive("loop radius", radius)
    c = np.asarray(center, dtype=float)
    if c.shape != (3,) or not np.all(np.isfinite(c)):
        raise ActuatorError(f"loop center must be 3 finite numbers (m), got {center!r}.")
    n = _unit_vector(axis, "loop axis")
    cur = float(current)
    if not math.isfinite(cur):
        raise ActuatorError(f"loop current must be finite (A), got {current!r}.")
    return r, c, n, cur


def loop_field(points, radius, center=(0.0, 0.0, 0.0), axis=(0.0, 0.0, 1.0), current=1.0):
    """Magnetic flux density of a circular filament loop, exact (complete elliptic integrals).

    Parameters
    ----------
    points : array_like, shape (n, 3) or (3,)
        Evaluation points, m.
    radius : float
        Loop radius, m, > 0.
    center : array_like, shape (3,)
        Loop centre, m.
    axis : array_like, shape (3,)
        Loop normal (need not be unit length); the current circulates right-handed about it.
    current : float
        A.

    Returns
    -------
    ndarray, shape (n, 3)
        B in tesla. Finite everywhere off the wire; non-finite exactly on it.

    Raises
    ------
    ActuatorError
        Non-positive radius, zero axis, malformed points.

    Notes
    -----
    Simpson, Lane, Immer and Youngquist (2001) in the cancellation-free form given in the module
    docstring. Accuracy: about 1e-14 relative to |B| per component away from the wire, also within
    1e-9 radius of the axis; within a distance ``d`` of the wire about ``1e-16 a / d``.

    Examples
    --------
    >>> b = loop_field([0.0, 0.0, 0.0], radius=1.0)      # centre: mu0 I / (2 a)
    >>> print(f"{b[0, 2]:.6e} T")
    6.283185e-07 T
    """
    return _single_loop(points, radius, center, axis, current, False)[0][0]


def loop_field_gradient(points, radius, center=(0.0, 0.0, 0.0), axis=(0.0, 0.0, 1.0), current=1.0):
    """Spatial Jacobian ``G[n, i, j] = dB_i/dx_j`` of a circular loop's field, analytic, T/m.

    Same parameters as :func:`loop_field`. The Jacobian is assembled from ``dB_rho/drho``,
    ``B_rho/rho`` and ``dB_rho/dz`` (each from the derivative ``J'(m)`` in closed form or series);
    the other entries follow from curl B = 0 and div B = 0, so the result is symmetric and traceless
    by construction. Its accuracy is that of :func:`loop_field` (tested against central differences).

    Returns
    -------
    ndarray, shape (n, 3, 3)
        T/m.

    Examples
    --------
    >>> g = loop_field_gradient([0.0, 0.0, 0.0], radius=1.0)
    >>> bool(abs(g[0, 2, 2]) < 1e-20)             # dBz/dz vanishes at the centre by symmetry
    True
    """
    return _single_loop(points, radius, center, axis, current, True)[1][0]


# --------------------------------------------------------------------------------------------
# Finite coils
# --------------------------------------------------------------------------------------------

# Largest Gauss-Legendre order per direction (points inside a winding would need infinitely many).
_MAX_NODES = 64


def _bernstein_radius(zeta):
    """Radius of the Bernstein ellipse of [-1, 1] through the complex point ``zeta`` (>= 1)."""
    zeta = np.asarray(zeta, dtype=complex)
    w = zeta + np.sqrt(zeta - 1.0) * np.sqrt(zeta + 1.0)
    return np.abs(w)


def _nodes_for(rho_b, rtol):
    """Gauss-Legendre order whose error estimate ``rho_b^(-2n)`` stays below ``rtol / 100``."""
    rho_b = float(np.min(rho_b))
    if not rho_b > 1.0 + 1e-12:
        return _MAX_NODES
    n = math.ceil(math.log(100.0 / rtol) / (2.0 * math.log(rho_b)))
    return int(min(max(n, 1), _MAX_NODES))


@dataclass(frozen=True)
class Coil:
    """A finite coil: a uniform current density over a rectangular winding cross-section.

    Parameters
    ----------
    center : tuple of 3 floats
        Centre of the winding, m.
    axis : tuple of 3 floats
        Coil axis (normalised on use); positive current circulates right-handed about it.
    radius : float
        Mean winding radius, m.
    turns : float
        Number of turns, > 0.
    length : float
        Axial winding length, m (0 for a flat coil or a single loop).
    layers : int
        Number of radial winding layers (sets the default ``thickness``).
    thickness : float, optional
        Radial build of the winding, m. Default: 0 for one layer, otherwise ``layers`` times the axial
        wire pitch ``length / (turns / layers)`` (round wire, square packing: common practice, no
        source). Must be less than ``2 * radius``.
    current_limit : float
        Largest current magnitude the driver may apply, A (keyword only, required).
    resistance : float, optional
        Ohm, for the dissipated power ``I^2 R``.
    rms_current : float, optional
        Continuous (thermal) RMS current rating, A.
    thermal_time_constant : float, optional
        s; the window over which the RMS current is limited (the coil's thermal time constant).
    core_gain : float
        Multiplier on the field for a soft-iron core, >= 1 (1 = air core). A documented crude model:
        a core concentrates flux and also changes the field's shape; a constant gain is only good well
        below core saturation and far from the pole piece. Calibrate it against a measurement.

    Notes
    -----
    Field model: the winding is a uniform current density ``turns * I / (length * thickness)`` over
    ``[radius - thickness/2, radius + thickness/2] x [-length/2, length/2]`` (local coordinates),
    integrated by a tensor Gauss-Legendre rule of circular loops. Discrete-turn ripple (of relative size
    ``exp(-2 pi d / pitch)`` at a distance ``d``), the helical pitch and the leads are neglected. The
    node count per direction is chosen from the Bernstein ellipse of the nearest evaluation point's
    complex singularity so that the estimated quadrature error is below ``rtol / 100`` relative; the
    tests check that the realised error is below ``rtol`` from 0.05 to 10 radii from the winding.
    Points inside the winding get no accuracy guarantee.
    """

    center: tuple
    axis: tuple
    radius: float
    turns: float
    length: float = 0.0
    layers: int = 1
    thickness: float | None = None
    current_limit: float = field(default=None, kw_only=True)
    resistance: float | None = field(default=None, kw_only=True)
    rms_current: float | None = field(default=None, kw_only=True)
    thermal_time_constant: float | None = field(default=None, kw_only=True)
    core_gain: float = field(default=1.0, kw_only=True)

    def __post_init__(self):
        c = np.asarray(self.center, dtype=float)
        if c.shape != (3,) or not np.all(np.isfinite(c)):
            raise ActuatorError(f"Coil center must be 3 finite numbers (m), got {self.center!r}.")
        object.__setattr__(self, "center", tuple(float(v) for v in c))
        _unit_vector(self.axis, "Coil axis")      # validates; the axis is stored as given
        object.__setattr__(self, "axis", tuple(float(v) for v in np.asarray(self.axis, dtype=float)))
        object.__setattr__(self, "radius", _positive("Coil radius", self.radius))
        object.__setattr__(self, "turns", _positive("Coil turns", self.turns))
        object.__setattr__(self, "length", _positive("Coil length", self.length, allow_zero=True))
        if not (isinstance(self.layers, (int, np.integer)) and not isinstance(self.layers, bool)
                and self.layers >= 1):
            raise ActuatorError(f"Coil layers must be an integer >= 1, got {self.layers!r}.")
        if self.layers > self.turns:
            raise ActuatorError(f"Coil layers ({self.layers}) cannot exceed turns ({self.turns}).")
        if self.thickness is None:
            t = 0.0 if self.layers == 1 else self.layers * self.length / (self.turns / self.layers)
        else:
            t = _positive("Coil thickness", self.thickness, allow_zero=True)
        if not t < 2.0 * self.radius:
            raise ActuatorError(
                f"Coil thickness {t:g} m must be less than twice the mean radius {self.radius:g} m "
                "(the inner radius would be <= 0); give a smaller thickness or fewer layers.")
        object.__setattr__(self, "thickness", float(t))
        if self.current_limit is None:
            raise ActuatorError("Coil current_limit (A) is required: the driver's largest |current|.")
        object.__setattr__(self, "current_limit", _positive("Coil current_limit", self.current_limit))
        for key in ("resistance", "rms_current", "thermal_time_constant"):
            v = getattr(self, key)
            if v is not None:
                object.__setattr__(self, key, _positive(f"Coil {key}", v))
        gain = _positive("Coil core_gain", self.core_gain)
        if gain < 1.0:
            raise ActuatorError(f"Coil core_gain must be >= 1 (1 = air core), got {self.core_gain!r}.")
        object.__setattr__(self, "core_gain", gain)

    # -- geometry ---------------------------------------------------------------------------
    @property
    def unit_axis(self):
        """Unit axis vector, shape (3,)."""
        a = np.asarray(self.axis, dtype=float)
        return a / np.linalg.norm(a)

    @property
    def inner_radius(self):
        """m."""
        return self.radius - 0.5 * self.thickness

    @property
    def outer_radius(self):
        """m."""
        return self.radius + 0.5 * self.thickness

    def local_coordinates(self, points):
        """Cylindrical coordinates ``(rho, z)`` of ``points`` (n, 3) m about the coil, each (n,) m."""
        pts = _as_points(points)
        d = pts - np.asarray(self.center)
        n = self.unit_axis
        z = d @ n
        rho = np.linalg.norm(d - z[:, None] * n, axis=1)
        return rho, z

    def nodes(self, points, rtol=1e-7):
        """Gauss-Legendre orders ``(n_axial, n_radial)`` for the field at ``points`` to ``rtol``.

        Parameters
        ----------
        points : array_like, shape (n, 3)
            m; the order is chosen for the point nearest the winding.
        rtol : float
            Target relative field error.
        """
        rtol = _positive("rtol", rtol)
        rho, z = self.local_coordinates(points)
        h = 0.5 * self.length
        t2 = 0.5 * self.thickness
        r1, r2 = self.inner_radius, self.outer_radius
        n_ax = n_rad = 1
        if h > 0:
            dr = np.maximum(0.0, np.maximum(r1 - rho, rho - r2))
            n_ax = _nodes_for(_bernstein_radius((z + 1j * dr) / h), rtol)
        if t2 > 0:
            dz = np.maximum(0.0, np.abs(z) - h)
            n_rad = _nodes_for(_bernstein_radius((rho - self.radius + 1j * dz) / t2), rtol)
        return n_ax, n_rad

    def loops(self, n_axial=1, n_radial=1):
        """The quadrature loops for given Gauss-Legendre orders.

        Returns
        -------
        offsets : ndarray (L,)
            Loop centres along the axis from :attr:`center`, m.
        radii : ndarray (L,)
            m.
        weights : ndarray (L,)
            Ampere-turns per ampere of coil current (they sum to ``turns * core_gain``).
        """
        if self.length == 0:
            xa, wa = np.zeros(1), np.full(1, 2.0)
        else:
            xa, wa = np.polynomial.legendre.leggauss(int(n_axial))
        if self.thickness == 0:
            xr, wr = np.zeros(1), np.full(1, 2.0)
        else:
            xr, wr = np.polynomial.legendre.leggauss(int(n_radial))
        s = np.repeat(xa * 0.5 * self.length, len(xr))
        r = np.tile(self.radius + xr * 0.5 * self.thickness, len(xa))
        w = np.outer(wa, wr).ravel() * 0.25 * self.turns * self.core_gain
        return s, r, w

    def field(self, points, current=1.0, rtol=1e-7, gradient=False):
        """Flux density of the coil at ``points``.

        Parameters
        ----------
        points : array_like, shape (n, 3)
            m, outside the winding.
        current : float
            A.
        rtol : float
            Target relative error of the quadrature (see the class notes).
        gradient : bool
            Also return the Jacobian (n, 3, 3), T/m.

        Returns
        -------
        B : ndarray (n, 3), T  [, G : ndarray (n, 3, 3), T/m]

        Examples
        --------
        >>> c = Coil((0, 0, 0), (0, 0, 1), 0.01, 100, current_limit=1.0)    # one thin loop of 100 turns
        >>> print(f"{c.field([0, 0, 0], 1.0)[0, 2]:.6e} T")                  # mu0 N I / (2 a)
        6.283185e-03 T
        """
        pts = _as_points(points)
        s, r, w = self.loops(*self.nodes(pts, rtol))
        B, G = _coaxial_sum(pts, np.asarray(self.center)[None], self.unit_axis[None], np.array([0]), s, r,
                            w * float(current), gradient)
        return (B[0], G[0]) if gradient else B[0]

    def power(self, current):
        """Dissipated power ``I^2 R``, W (requires ``resistance``)."""
        if self.resistance is None:
            raise ActuatorError("Coil.power needs the coil's resistance (Ohm); none was given.")
        return np.asarray(current, dtype=float) ** 2 * self.resistance

    def winding_z_range(self):
        """Bounding interval ``(zmin, zmax)`` of the winding volume along the global z axis, m."""
        n = self.unit_axis
        nz = abs(n[2])
        half = nz * 0.5 * self.length + self.outer_radius * math.sqrt(max(0.0, 1.0 - nz * nz))
        return self.center[2] - half, self.center[2] + half


def helmholtz_pair(radius, turns, *, center=(0.0, 0.0, 0.0), axis=(0.0, 0.0, 1.0), current_limit,
                   opposed=False, spacing=None, **coil_kw):
    """Two thin coaxial coils (a Helmholtz pair, or with ``opposed`` a gradient pair).

    Parameters
    ----------
    radius : float
        m.
    turns : float
        Turns per coil.
    center, axis : tuple of 3 floats
        Midpoint of the pair, m, and the common axis.
    current_limit : float
        A.
    opposed : bool
        If True the second coil is wound the other way (anti-Helmholtz / Maxwell gradient pair).
    spacing : float, optional
        Coil separation, m; default ``radius`` (Helmholtz) or ``sqrt(3) radius`` when ``opposed``
        (Maxwell).
    **coil_kw
        Passed on to both :class:`Coil` (e.g. ``resistance``).

    Returns
    -------
    tuple of two Coil
    """
    n = _unit_vector(axis, "helmholtz_pair axis")
    if spacing is None:
        spacing = math.sqrt(3.0) * radius if opposed else radius
    spacing = _positive("helmholtz_pair spacing", spacing)
    c = np.asarray(center, dtype=float)
    c1 = tuple(c - 0.5 * spacing * n)
    c2 = tuple(c + 0.5 * spacing * n)
    ax2 = tuple(-n) if opposed else tuple(n)
    return (Coil(c1, tuple(n), radius, turns, current_limit=current_limit, **coil_kw),
            Coil(c2, ax2, radius, turns, current_limit=current_limit, **coil_kw))


def maxwell_pair(radius, turns, **kw):
    """Opposed pair at the Maxwell spacing ``sqrt(3) radius`` (uniform gradient at the centre)."""
    return helmholtz_pair(radius, turns, opposed=True, **kw)


# --------------------------------------------------------------------------------------------
# Beads
# --------------------------------------------------------------------------------------------

def effective_susceptibility(chi):
    """Apparent susceptibility of a sphere, ``3 chi / (3 + chi)`` (demagnetisation factor 1/3).

    Parameters
    ----------
    chi : float
        Intrinsic volume susceptibility (dimensionless).

    Examples
    --------
    >>> effective_susceptibility(1.0)
    0.75
    """
    return 3.0 * chi / (3.0 + chi)


def bead_model(body):
    """Which bead model a body follows: ``"fixed"``, ``"linear"`` or ``"saturating"``.

    Raises
    ------
    ActuatorError
        The body has no magnetic properties, or both a fixed moment and a susceptibility (ambiguous).
    """
    name = getattr(body, "name", "?")
    moment = getattr(body, "moment", None)
    chi = getattr(body, "susceptibility", None)
    msat = getattr(body, "saturation_magnetization", None)
    if moment is not None and chi is not None:
        raise ActuatorError(
            f"Body {name!r} has both a fixed moment and a susceptibility; the magnetic actuator needs "
            "exactly one bead model: give `moment` (permanent magnet) or `susceptibility` (soft bead).")
    if moment is not None:
        return "fixed"
    if chi is not None:
        return "saturating" if msat is not None else "linear"
    raise ActuatorError(
        f"Body {name!r} has no magnetic properties: set `moment` (A m^2) for a permanent-magnet body "
        "or `susceptibility` (intrinsic chi, optionally with `saturation_magnetization`, A/m) for a "
        "soft bead.")


def bead_force(body, B, G):
    """Magnetic force on a bead from the local field and its Jacobian.

    Parameters
    ----------
    body : fieldplan.Body
        Magnetic properties select the model (:func:`bead_model`).
    B : ndarray, shape (..., 3)
        Flux density at the bead centre, T.
    G : ndarray, shape (..., 3, 3)
        ``G[..., i, j] = dB_i/dx_j``, T/m.

    Returns
    -------
    ndarray, shape (..., 3)
        Force, N.

    Notes
    -----
    Jackson, Classical Electrodynamics §5.7; Furlani, Permanent Magnet and Electromechanical Devices
    (2001). Fixed moment: ``F = grad(m . B)``. Linear soft sphere: ``m = V chi_eff B / mu0`` with
    ``chi_eff = 3 chi / (3 + chi)``, ``F = V chi_eff / (2 mu0) grad|B|^2``. Saturating: the same moment
    capped at ``m_sat = M_sat V`` along B, so ``F = m_sat grad|B|`` above ``|B| = mu0 M_sat / chi_eff``;
    both forms agree at the switch (the force is continuous). The induced moment is taken along the
    local B (no remanence, no hysteresis, no Neel/Brown relaxation lag).
    """
    model = bead_model(body)
    B = np.asarray(B, dtype=float)
    G = np.asarray(G, dtype=float)
    if model == "fixed":
        return np.einsum("...ij,i->...j", G, np.asarray(body.moment, dtype=float))
    GtB = np.einsum("...ij,...i->...j", G, B)
    chi_eff = effective_susceptibility(body.susceptibility)
    lin = body.volume * chi_eff / mu_0
    if model == "linear":
        return lin * GtB
    Bn = np.sqrt(np.einsum("...i,...i->...", B, B))
    b_switch = mu_0 * body.saturation_magnetization / chi_eff
    with np.errstate(divide="ignore", invalid="ignore"):
        coef = np.where(Bn <= b_switch, lin, body.saturation_magnetization * body.volume / Bn)
    return coef[..., None] * GtB


# --------------------------------------------------------------------------------------------
# Grid interpolation on a working plane
# --------------------------------------------------------------------------------------------

# Interpolation on the working plane. Coils whose axis is normal to the plane have a field that
# depends on the distance rho from their axis only, so their unit-current scalars F, Bz, P, Q
# (see _loop_terms) are tabulated against rho and interpolated with cubic splines (one dimension,
# cheap to make fine). Tilted coils are tabulated on an (x, y) grid of the plane (tensor cubic
# splines of B and the five independent Jacobian entries). Both are refined until an a posteriori
# check at interval midpoints / cell centres meets grid_rtol.
_MAX_RADIAL = 20000
_MAX_GRID = 400


class _PlaneModel:
    """Interpolated unit-current fields of a CoilArray on one plane z = const."""

    def __init__(self, array, z):
        from scipy.interpolate import make_interp_spline

        self.z = z
        coils = array._all_coils()
        tol = array.grid_rtol
        self.vertical = [k for k, c in enumerate(coils) if abs(abs(c.unit_axis[2]) - 1.0) < 1e-12]
        self.tilted = [k for k in range(len(coils)) if k not in self.vertical]
        self.error = {"field": 0.0, "gradient": 0.0, "radial_samples": None, "grid_nodes": None}
        x0, x1, y0, y1 = array.extent
        corners = np.array([[x0, y0], [x0, y1], [x1, y0], [x1, y1]])
        self.radial = None
        if self.vertical:
            vc = [coils[k] for k in self.vertical]
            cxy = np.array([c.center[:2] for c in vc])
            zl = np.array([(z - c.center[2]) * c.unit_axis[2] for c in vc])
            rmax = max(float(np.max(np.linalg.norm(corners - p, axis=1))) for p in cxy)
            gap = np.array([max(abs(zz) - 0.5 * c.length, 0.0) for zz, c in zip(zl, vc)])
            gap = np.maximum(gap, 1e-3 * np.array([c.radius for c in vc]))
            loops = array._loop_subset(self.vertical)
            axes = loops[1]
            h = float(np.min(gap)) / 8.0
            while True:
                nr = int(min(_MAX_RADIAL, math.ceil(rmax / h) + 1))
                h = rmax / (nr - 1)
                r = np.arange(-3, nr + 3) * h          # the scalars are even in rho: mirror the ends
                vals = self._scalars(loops, np.abs(r), zl)             # (4, Kv, N)
                spl = make_interp_spline(r, np.moveaxis(vals, 2, 0).reshape(len(r), -1), k=3)
                mid = 0.5 * (r[3:-4] + r[4:-3])
                exact = self._scalars(loops, mid, zl)
                approx = np.moveaxis(spl(mid).reshape(len(mid), 4, -1), 0, 2)
                eb, eg = self._radial_error(vals, exact, approx, r, mid, axes)
                if max(eb, eg) <= tol or nr >= _MAX_RADIAL:
                    break
                h *= 0.9 * (tol / max(eb, eg)) ** 0.25
            self.radial = spl
            self.cxy = cxy
            self.axes_v = axes
            self.error.update(field=eb, gradient=eg, radial_samples=nr)
            if max(eb, eg) > tol:
                warnings.warn(f"CoilArray radial tables at z = {z:g} m reached {nr} samples with relative "
                              f"error {max(eb, eg):.2g} > grid_rtol {tol:g}.", RuntimeWarning, stacklevel=4)
        self.grid = None
        if self.tilted:
            self._build_grid(array, z, tol)

    @staticmethod
    def _scalars(loops, rho, zl):
        """Scalars (4, Kv, N) of vertical coils at radii ``rho`` (N,) on their local heights ``zl``."""
        origins, axes, starts, offsets, radii, weights = loops
        R = np.broadcast_to(rho, (len(starts), len(rho)))
        Z = np.broadcast_to(zl[:, None], R.shape)
        return _coaxial_scalars(R, Z, starts, offsets, radii, weights, True)

    @staticmethod
    def _radial_error(vals, exact, approx, r, mid, axes):
        def tensors(s, rho):
            rv = np.zeros(s.shape[1:] + (3,))
            rv[..., 0] = rho
            return _assemble(rv, np.broadcast_to(np.abs(rho), s.shape[1:]), axes, *s)
        Bs, Gs = tensors(vals, r)
        Be, Ge = tensors(exact, mid)
        Ba, Ga = tensors(approx, mid)
        bscale = np.linalg.norm(Bs, axis=-1).max(axis=1)[:, None]
        gscale = np.linalg.norm(Gs, axis=(-2, -1)).max(axis=1)[:, None]
        eb = float((np.linalg.norm(Ba - Be, axis=-1) / bscale).max())
        eg = float((np.linalg.norm(Ga - Ge, axis=(-2, -1)) / gscale).max())
        return eb, eg

    def _build_grid(self, array, z, tol):
        from scipy.interpolate import NdBSpline, make_interp_spline

        x0, x1, y0, y1 = array.extent
        coils = array._all_coils()
        loops = array._loop_subset(self.tilted)
        span = max(x1 - x0, y1 - y0)
        dmin = span
        for k in self.tilted:
            lo, hi = coils[k].winding_z_range()
            dmin = min(dmin, max(lo - z, z - hi, 1e-6))
        # Cubic tensor splines reach about 1e-4 at spacing 0.2 dmin here (measured), error ~ h^4.
        h = min(0.2 * dmin * (tol / 1e-4) ** 0.25, span / 16.0)
        while True:
            nx = int(min(_MAX_GRID, max(8, math.ceil((x1 - x0) / h) + 1)))
            ny = int(min(_MAX_GRID, max(8, math.ceil((y1 - y0) / h) + 1)))
            # Three extra cells beyond the extent keep the splines' end conditions away from it.
            hx, hy = (x1 - x0) / (nx - 1), (y1 - y0) / (ny - 1)
            x = np.linspace(x0 - 3 * hx, x1 + 3 * hx, nx + 6)
            y = np.linspace(y0 - 3 * hy, y1 + 3 * hy, ny + 6)
            gx, gy = np.meshgrid(x, y, indexing="ij")
            B, G = _coaxial_sum(np.column_stack([gx.ravel(), gy.ravel(), np.full(gx.size, z)]), *loops, True)
            values = _pack(B, G).reshape(len(x), len(y), -1)
            sx = make_interp_spline(x, values, k=3, axis=0)
            sy = make_interp_spline(y, sx.c, k=3, axis=1)
            spline = NdBSpline((sx.t, sy.t), np.moveaxis(sy.c, 0, 1), 3)
            cx = 0.5 * (x[3:-4] + x[4:-3])
            cy = 0.5 * (y[3:-4] + y[4:-3])
            cx = cx[np.unique(np.linspace(0, len(cx) - 1, min(len(cx), 50)).astype(int))]
            cy = cy[np.unique(np.linspace(0, len(cy) - 1, min(len(cy), 50)).astype(int))]
            mx, my = np.meshgrid(cx, cy, indexing="ij")
            cp = np.column_stack([mx.ravel(), my.ravel()])
            Be, Ge = _coaxial_sum(np.column_stack([cp, np.full(len(cp), z)]), *loops, True)
            Ba, Ga = _unpack(np.moveaxis(spline(cp).reshape(len(cp), len(self.tilted), 8), 1, 0))
            bscale = np.linalg.norm(B, axis=-1).max(axis=1)[:, None]
            gscale = np.linalg.norm(G, axis=(-2, -1)).max(axis=1)[:, None]
            eb = float((np.linalg.norm(Ba - Be, axis=-1) / bscale).max())
            eg = float((np.linalg.norm(Ga - Ge, axis=(-2, -1)) / gscale).max())
            done = max(eb, eg) <= tol or (nx >= _MAX_GRID and ny >= _MAX_GRID)
            if done:
                break
            h = min(hx, hy) * max(0.25, 0.9 * (tol / max(eb, eg)) ** 0.25)
        if max(eb, eg) > tol:
            warnings.warn(f"CoilArray plane grid at z = {z:g} m reached {nx} x {ny} nodes with relative error "
                          f"{max(eb, eg):.2g} > grid_rtol {tol:g}; use method='exact' for more.",
                          RuntimeWarning, stacklevel=4)
        self.grid = spline
        self.error.update(field=max(self.error["field"], eb), gradient=max(self.error["gradient"], eg),
                          grid_nodes=(nx, ny))

    def __call__(self, xy):
        n = len(xy)
        K = len(self.vertical) + len(self.tilted)
        B = np.empty((K, n, 3))
        G = np.empty((K, n, 3, 3))
        if self.vertical:
            Kv = len(self.vertical)
            d = xy[None, :, :] - self.cxy[:, None, :]               # (Kv, n, 2)
            rho = np.sqrt(np.einsum("knc,knc->kn", d, d))
            s = self.radial(rho.ravel()).reshape(Kv, n, 4, Kv)
            s = s[np.arange(Kv), :, :, np.arange(Kv)]              # each coil's own scalars: (Kv, n, 4)
            rv = np.zeros((Kv, n, 3))
            rv[..., :2] = d
            Bv, Gv = _assemble(rv, rho, self.axes_v, *np.moveaxis(s, 2, 0))
            B[self.vertical], G[self.vertical] = Bv, Gv
        if self.tilted:
            v = self.grid(xy).reshape(n, len(self.tilted), 8)
            B[self.tilted], G[self.tilted] = _unpack(np.moveaxis(v, 1, 0))
        return B, G


def _pack(B, G):
    """(K, n, 3), (K, n, 3, 3) -> (n, K * 8) of B and the 5 independent Jacobian entries."""
    v = np.concatenate([B, G[..., 0, 0:3], G[..., 1, 1:3]], axis=-1)  # (K, n, 8)
    return np.moveaxis(v, 0, 1).reshape(B.shape[1], -1)


def _unpack(v):
    """(K, n, 8) -> B (K, n, 3), G (K, n, 3, 3) using curl B = 0 and div B = 0."""
    B = v[..., 0:3]
    gxx, gxy, gxz, gyy, gyz = (v[..., 3 + i] for i in range(5))
    G = np.empty(v.shape[:-1] + (3, 3))
    G[..., 0, 0] = gxx
    G[..., 0, 1] = G[..., 1, 0] = gxy
    G[..., 0, 2] = G[..., 2, 0] = gxz
    G[..., 1, 1] = gyy
    G[..., 1, 2] = G[..., 2, 1] = gyz
    G[..., 2, 2] = -gxx - gyy
    return B, G


# --------------------------------------------------------------------------------------------
# The actuator
# --------------------------------------------------------------------------------------------

def _as_coil(c, where):
    if isinstance(c, Coil):
        return c
    if isinstance(c, dict):
        try:
            return Coil(**c)
        except TypeError as exc:
            raise ActuatorError(f"{where}: cannot build a Coil from {c!r} ({exc}).") from None
    raise ActuatorError(f"{where} must be a Coil (or a mapping of Coil parameters), got {type(c).__name__}.")


class CoilArray(Actuator):
    """An array of coils steering magnetic beads on the floor of a dish: one current per coil.

    Parameters
    ----------
    coils : sequence of Coil
        The driven coils (or mappings of :class:`Coil` parameters); channel ``coil_k`` (A, bounds
        +-``current_limit``) is the k-th (1-based).
    plane_height : float
        z of the dish floor in the coils' frame, m. A bead's centre is at ``plane_height +
        body.height``. The floor must not cut through a winding.
    bias : None, array_like (3,), or sequence of (Coil, float)
        A constant field that magnetises beads: a uniform field in T, or coils with fixed currents
        (A), e.g. a :func:`helmholtz_pair`, given as ``(coil, current)`` pairs or
        ``{"coil": {...}, "current": ...}`` mappings. Bias coils are not channels.
    bead_models : str or sequence of str
        Bead models this actuator accepts (keys of :data:`BEAD_MODELS`); bodies of other models are
        rejected by :meth:`check_body`. The tags hold for every accepted body: ``affine_in_input``
        only when this is ``"fixed"`` alone (the fixed-moment force is affine in the currents, also
        with a bias), so build one array per bead family to let the planner use currents directly.
    primitives : {"pairs", "singles"} or sequence
        Current patterns for time-sharing: ``"singles"`` -- each coil alone at +-its limit;
        ``"pairs"`` -- singles and every pair of coils at their limits with both relative signs.
        Sign-mirrored patterns are dropped when they give the same force (induced beads, no bias).
        Or a sequence of :class:`fieldplan.Primitive` or ``(name, values)``.
    extent : tuple (xmin, xmax, ymin, ymax), optional
        Working region, m. Default: the bounding box of the coils' outlines projected on the plane.
    method : {"grid", "exact"}
        ``"grid"``: unit-current fields and Jacobians are precomputed on the working plane (lazily,
        once per bead-centre height) and interpolated with tensor cubic splines; points outside the
        grid are evaluated exactly. ``"exact"``: sum of quadrature loops at every call.
    grid_rtol : float
        Target interpolation error of the grid, relative to each coil's largest value on the plane
        (separately for B and for its Jacobian). The spacing is refined until a check at cell centres
        meets it (or the grid reaches 400 nodes a side); the achieved value is :meth:`grid_error`.
    coil_rtol : float
        Target relative quadrature error of each coil's field on the working plane (see
        :class:`Coil`). The quadrature orders are fixed at construction for the extent from the floor
        to 1 mm above it, so every call uses the same loops.

    Attributes
    ----------
    tags : frozenset
        ``affine_in_input`` (fixed-moment beads only) and ``zero_idle`` (no bias, or a uniform one).
    quadrature_orders : tuple of (int, int)
        Gauss-Legendre orders (axial, radial) of each coil, driven then bias coils.

    Notes
    -----
    Speed (tests/benchmarks/test_bench_magnetic.py): for 8 coils and 20 bodies ``basis()`` takes
    about 0.2-0.3 ms with the interpolated tables against about 1.2 ms exact; the tables add an
    error of about 1e-5 of the largest field (below ``grid_rtol``) and cost about 0.2 s to build per
    bead height for vertical coils, a few seconds for tilted ones.

    Examples
    --------
    >>> from fieldplan import Body, water
    >>> coils = [Coil((x, 0.0, -0.006), (0, 0, 1), 0.005, 200, 0.008, layers=4, current_limit=2.0)
    ...          for x in (-0.01, 0.01)]
    >>> arr = CoilArray(coils, plane_height=0.0, bead_models="linear")
    >>> bead = Body("bead", radius=2.5e-6, density=1800.0, susceptibility=1.0)
    >>> v = arr.velocity(bead, water(), [[0.004, 0.0]], [2.0, 0.0])
    >>> bool(v[0, 0] < 0)                # pulled toward the energised coil at x = -10 mm
    True
    """

    def __init__(self, coils, plane_height=0.0, *, bias=None, bead_models=("fixed", "linear", "saturating"),
                 primitives="pairs", extent=None, method="grid", grid_rtol=1e-4, coil_rtol=1e-7):
        coils = tuple(_as_coil(c, f"CoilArray coils[{k}]") for k, c in enumerate(coils))
        if not coils:
            raise ActuatorError("CoilArray needs at least one coil, got none.")
        self.coils = coils
        self.plane_height = float(plane_height)
        if not math.isfinite(self.plane_height):
            raise ActuatorError(f"CoilArray plane_height must be finite (m), got {plane_height!r}.")
        self._bias = self._check_bias(bias)
        # The parameter as given, normalised to plain values (for to_config and scenario files).
        if self._bias["coils"]:
            self.bias = tuple((c, float(i)) for c, i in zip(self._bias["coils"], self._bias["currents"]))
        elif bias is not None:
            self.bias = tuple(float(v) for v in self._bias["uniform"])
        else:
            self.bias = None
        if isinstance(bead_models, str):
            bead_models = (bead_models,)
        bead_models = tuple(bead_models)
        bad = [b for b in bead_models if b not in BEAD_MODELS]
        if bad or not bead_models:
            raise ActuatorError(
                f"CoilArray bead_models must be a non-empty subset of {sorted(BEAD_MODELS)}, got {bead_models!r}.")
        self.bead_models = bead_models
        if method not in ("grid", "exact"):
            raise ActuatorError(f"CoilArray method must be 'grid' or 'exact', got {method!r}.")
        self.method = method
        self.grid_rtol = _positive("CoilArray grid_rtol", grid_rtol)
        self.coil_rtol = _positive("CoilArray coil_rtol", coil_rtol)
        all_coils = self._all_coils()
        if extent is None:
            pts = []
            for c in all_coils[:len(coils)]:
                n = c.unit_axis
                horiz = math.sqrt(max(0.0, 1.0 - n[2] ** 2))
                reach = c.outer_radius * max(abs(n[2]), 1.0) + 0.5 * c.length * horiz
                pts.append((c.center[0] - reach, c.center[0] + reach, c.center[1] - reach, c.center[1] + reach))
            pts = np.array(pts)
            extent = (pts[:, 0].min(), pts[:, 1].max(), pts[:, 2].min(), pts[:, 3].max())
        ext = np.asarray(extent, dtype=float)
        if ext.shape != (4,) or not np.all(np.isfinite(ext)) or not (ext[1] > ext[0] and ext[3] > ext[2]):
            raise ActuatorError(f"CoilArray extent must be (xmin, xmax, ymin, ymax) with max > min, got {extent!r}.")
        self.extent = tuple(float(v) for v in ext)
        for k, c in enumerate(all_coils):
            z0, z1 = c.winding_z_range()
            if z0 < self.plane_height < z1:
                which = f"coil_{k + 1}" if k < len(coils) else f"bias coil {k - len(coils) + 1}"
                raise ActuatorError(
                    f"CoilArray: the floor plane z = {self.plane_height:g} m cuts through the winding of "
                    f"{which} (its winding spans z = {z0:g} to {z1:g} m); move the coil or the plane.")
        self._channels = tuple(Channel(f"coil_{k + 1}", "A", -c.current_limit, c.current_limit)
                               for k, c in enumerate(self.coils))
        self._setup_loops()
        self._primitive_spec = primitives if isinstance(primitives, str) else None
        self._primitives = self._make_primitives(primitives)
        # Idle input first, then each primitive: the rows basis() evaluates.
        self._prim_matrix = np.vstack([self.idle_input()] + [np.asarray(p.values) for p in self._primitives])
        self._grids = {}
        tags = set()
        if set(self.bead_models) == {"fixed"}:
            tags.add("affine_in_input")
        if not self._bias["coils"]:
            tags.add("zero_idle")
        self.tags = frozenset(tags)

    # -- construction helpers -------------------------------------------------------------------
    @staticmethod
    def _check_bias(bias):
        out = {"uniform": np.zeros(3), "coils": (), "currents": np.zeros(0)}
        if bias is None:
            return out
        arr = None
        try:
            arr = np.asarray(bias, dtype=float)
        except (TypeError, ValueError):
            arr = None
        if arr is not None and arr.shape == (3,):
            if not np.all(np.isfinite(arr)):
                raise ActuatorError(f"CoilArray bias field must be finite (T), got {bias!r}.")
            out["uniform"] = arr
            return out
        coils, currents = [], []
        rule = ("CoilArray bias must be None, a uniform field (3 numbers, T) or a sequence of (Coil, current "
                "in A) pairs or {'coil': {...}, 'current': A} mappings")
        for k, item in enumerate(bias):
            if isinstance(item, dict):
                if set(item) != {"coil", "current"}:
                    raise ActuatorError(f"{rule}; bias[{k}] has keys {sorted(item)}.")
                coil, cur = item["coil"], item["current"]
            else:
                try:
                    coil, cur = item
                except (TypeError, ValueError):
                    raise ActuatorError(f"{rule}; got bias[{k}] = {item!r}.") from None
            coil = _as_coil(coil, f"CoilArray bias[{k}] coil")
            try:
                cur = float(cur)
            except (TypeError, ValueError):
                cur = math.nan
            if not math.isfinite(cur):
                raise ActuatorError(f"{rule}; bias[{k}] current must be a finite number (A), got {item!r}.")
            coils.append(coil)
            currents.append(cur)
        out["coils"] = tuple(coils)
        out["currents"] = np.array(currents)
        return out

    def _all_coils(self):
        return self.coils + self._bias["coils"]

    def _setup_loops(self):
        x0, x1, y0, y1 = self.extent
        gx, gy = np.meshgrid(np.linspace(x0, x1, 41), np.linspace(y0, y1, 41))
        probe = []
        for dz in (0.0, 1e-3):
            probe.append(np.column_stack([gx.ravel(), gy.ravel(), np.full(gx.size, self.plane_height + dz)]))
        probe = np.vstack(probe)
        ss, rs, ws, starts, orders = [], [], [], [], []
        count = 0
        for c in self._all_coils():
            order = c.nodes(probe, self.coil_rtol)
            s, r, w = c.loops(*order)
            starts.append(count)
            count += len(r)
            ss.append(s), rs.append(r), ws.append(w)
            orders.append(order)
        self._coil_loops = tuple(zip(ss, rs, ws))
        self._loops = self._loop_subset(range(len(orders)))
        #: Gauss-Legendre orders (axial, radial) used for each coil (driven coils, then bias coils).
        self.quadrature_orders = tuple(orders)

    def _loop_subset(self, idx):
        """Quadrature loop arrays of the coils ``idx`` (indices into driven + bias coils)."""
        idx = list(idx)
        coils = self._all_coils()
        parts = [self._coil_loops[k] for k in idx]
        starts = np.cumsum([0] + [len(p[1]) for p in parts[:-1]])
        return (np.array([coils[k].center for k in idx]).reshape(-1, 3),
                np.array([coils[k].unit_axis for k in idx]).reshape(-1, 3),
                starts.astype(int), np.concatenate([p[0] for p in parts]),
                np.concatenate([p[1] for p in parts]), np.concatenate([p[2] for p in parts]))

    def _make_primitives(self, spec):
        chans = self.channels
        K = len(chans)
        limits = np.array([c.upper for c in chans])
        if isinstance(spec, str):
            if spec not in ("pairs", "singles"):
                raise ActuatorError(f"CoilArray primitives must be 'pairs', 'singles' or a sequence, got {spec!r}.")
            # Induced beads without bias feel the same force under u and -u.
            mirror = set(self.bead_models) <= {"linear", "saturating"} and self._bias_is_zero()
            out = []
            for k in range(K):
                for sgn in ((1,) if mirror else (1, -1)):
                    v = np.zeros(K)
                    v[k] = sgn * limits[k]
                    out.append(Primitive(f"{chans[k].name}{'+' if sgn > 0 else '-'}", v))
            if spec == "pairs":
                signs = ((1, 1), (1, -1)) if mirror else ((1, 1), (1, -1), (-1, 1), (-1, -1))
                for i, j in itertools.combinations(range(K), 2):
                    for si, sj in signs:
                        v = np.zeros(K)
                        v[i], v[j] = si * limits[i], sj * limits[j]
                        name = f"{chans[i].name}{'+' if si > 0 else '-'}{chans[j].name}{'+' if sj > 0 else '-'}"
                        out.append(Primitive(name, v))
            return tuple(out)
        out = []
        for item in spec:
            p = item if isinstance(item, Primitive) else Primitive(*item)
            if len(p.values) != K:
                raise ActuatorError(f"CoilArray primitive {p.name!r} has {len(p.values)} values, expected {K}.")
            self.check_input(p.values)
            out.append(p)
        names = [p.name for p in out]
        if len(set(names)) != len(names):
            raise ActuatorError(f"CoilArray primitive names must be unique, got {names}.")
        if not out:
            raise ActuatorError("CoilArray primitives: an explicit sequence must not be empty.")
        return tuple(out)

    def _bias_is_zero(self):
        return not self._bias["coils"] and not np.any(self._bias["uniform"])

    def to_config(self):
        """Constructor parameters as plain data (SI numbers): ``CoilArray(**cfg)`` rebuilds the array."""
        import dataclasses

        def coil(c):
            return {k: (list(v) if isinstance(v, tuple) else v) for k, v in dataclasses.asdict(c).items()}

        if self.bias is None:
            bias = None
        elif self._bias["coils"]:
            bias = [{"coil": coil(c), "current": i} for c, i in self.bias]
        else:
            bias = list(self.bias)
        prims = self._primitive_spec
        if prims is None:
            prims = [[p.name, list(p.values)] for p in self._primitives]
        return {"coils": [coil(c) for c in self.coils], "plane_height": self.plane_height, "bias": bias,
                "bead_models": list(self.bead_models), "primitives": prims, "extent": list(self.extent),
                "method": self.method, "grid_rtol": self.grid_rtol, "coil_rtol": self.coil_rtol}

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_grids"] = {}
        return state

    # -- contract -------------------------------------------------------------------------------
    @property
    def channels(self):
        return self._channels

    def primitives(self):
        return self._primitives

    def check_body(self, body, medium):
        model = bead_model(body)
        if model not in self.bead_models:
            raise ActuatorError(
                f"Body {body.name!r} is a {model!r} bead but this CoilArray accepts only "
                f"{list(self.bead_models)}; build it with bead_models including {model!r}.")

    def describe(self):
        return (f"CoilArray of {len(self.coils)} coils (bias: "
                f"{'coils' if self._bias['coils'] else ('uniform' if np.any(self._bias['uniform']) else 'none')}), "
                f"beads {list(self.bead_models)}, method {self.method}, tags {sorted(self.tags)}")

    # -- fields ---------------------------------------------------------------------------------
    def _exact_unit_fields(self, points):
        return _coaxial_sum(points, *self._loops, True)

    def _plane(self, z):
        model = self._grids.get(z)
        if model is None:
            model = _PlaneModel(self, z)
            self._grids[z] = model
        return model

    def grid_error(self, height=0.0):
        """Measured interpolation error for bead centres ``height`` m above the floor.

        Returns
        -------
        dict
            ``field`` and ``gradient``: the largest error found at the check points (midpoints of the
            radial tables, cell centres of the plane grid), relative to each coil's largest |B|
            (resp. Frobenius norm of its Jacobian) over the working region; ``radial_samples`` and
            ``grid_nodes`` (None where unused). Builds the tables if needed.
        """
        return dict(self._plane(self.plane_height + float(height)).error)

    def unit_fields(self, xy, z):
        """Fields and Jacobians of every coil at unit current (driven coils, then bias coils).

        Parameters
        ----------
        xy : ndarray, shape (n, 2)
            m.
        z : float
            Absolute height of the evaluation plane, m.

        Returns
        -------
        B : ndarray (K, n, 3), T/A
        G : ndarray (K, n, 3, 3), T/(m A)
        """
        xy = self.check_points(xy)
        z = float(z)
        if self.method == "exact":
            return self._exact_unit_fields(np.column_stack([xy, np.full(len(xy), z)]))
        model = self._plane(z)
        x0, x1, y0, y1 = self.extent
        inside = (xy[:, 0] >= x0) & (xy[:, 0] <= x1) & (xy[:, 1] >= y0) & (xy[:, 1] <= y1)
        if inside.all():
            return model(xy)
        K = len(self._loops[2])
        B = np.empty((K, len(xy), 3))
        G = np.empty((K, len(xy), 3, 3))
        if inside.any():
            B[:, inside], G[:, inside] = model(xy[inside])
        out = ~inside
        B[:, out], G[:, out] = self._exact_unit_fields(np.column_stack([xy[out], np.full(out.sum(), z)]))
        return B, G

    def _total(self, Bu, Gu, U):
        """Combine unit fields with currents ``U`` (..., K) plus the bias -> B (..., n, 3), G (..., n, 3, 3)."""
        K = len(self.coils)
        B = np.tensordot(U, Bu[:K], axes=(-1, 0))
        G = np.tensordot(U, Gu[:K], axes=(-1, 0))
        B = B + self._bias["uniform"]
        if self._bias["coils"]:
            I = self._bias["currents"]
            B = B + np.tensordot(I, Bu[K:], axes=(0, 0))
            G = G + np.tensordot(I, Gu[K:], axes=(0, 0))
        return B, G

    def field(self, xy, u, height=0.0, gradient=False):
        """Total flux density on the plane ``height`` m above the floor, under currents ``u``.

        Parameters
        ----------
        xy : array_like, shape (n, 2)
            m.
        u : array_like, shape (K,)
            A, one current per driven coil.
        height : float
            m above the floor (``plane_height``).
        gradient : bool
            Also return the Jacobian (n, 3, 3), T/m.

        Returns
        -------
        B : ndarray (n, 3), T  [, G : ndarray (n, 3, 3), T/m]
        """
        u = self.check_input(u)
        Bu, Gu = self.unit_fields(xy, self.plane_height + float(height))
        B, G = self._total(Bu, Gu, u)
        return (B, G) if gradient else B

    def force(self, body, xy, u):
        """Magnetic force on ``body`` at floor positions ``xy`` under currents ``u``.

        Parameters
        ----------
        body : fieldplan.Body
        xy : array_like, shape (n, 2)
            m.
        u : array_like, shape (K,)
            A.

        Returns
        -------
        ndarray, shape (n, 3)
            N. ``F[:, 2] > 0`` pulls the bead up, off the floor (compare :meth:`lift_ratio`).
        """
        self.check_body(body, None)
        B, G = self.field(xy, u, height=body.height, gradient=True)
        return bead_force(body, B, G)

    def lift_ratio(self, body, medium, xy, u):
        """Upward magnetic force over the bead's buoyant weight, shape (n,); > 1 lifts it off the floor.

        Parameters
        ----------
        body : fieldplan.Body
        medium : fieldplan.Medium
        xy : array_like (n, 2), m
        u : array_like (K,), A

        Notes
        -----
        Weight ``(rho_p - rho_m) V g`` with standard gravity (scipy.constants.g). A bead lighter than
        the medium floats anyway; the ratio is then reported as +inf where the force is upward.
        """
        fz = self.force(body, xy, u)[:, 2]
        w = (body.density - medium.density) * body.volume * _GRAVITY
        if w <= 0:
            return np.where(fz >= 0, np.inf, -np.inf)
        return fz / w

    def _velocity(self, body, medium, xy, u):
        Bu, Gu = self.unit_fields(xy, self.plane_height + body.height)
        B, G = self._total(Bu, Gu, u)
        return bead_force(body, B, G)[:, :2] / drag_coefficient(body, medium)

    def basis(self, bodies, medium, xy):
        """Field basis at the bodies' positions (exactly what :meth:`velocity` gives, computed in bulk).

        ``linear`` for a fixed-moment array (velocity per ampere of each coil), otherwise
        ``timeshare`` over :meth:`primitives`.
        """
        xy = self.check_points(xy)
        bodies = list(bodies)
        if len(bodies) != len(xy):
            raise ActuatorError(f"basis: {len(bodies)} bodies but {len(xy)} positions.")
        kinds = {}
        for i, b in enumerate(bodies):
            kinds.setdefault(b, []).append(i)
        for b in kinds:
            self.check_body(b, medium)
        n = len(xy)
        Kall = len(self._loops[2])
        Bu = np.empty((Kall, n, 3))
        Gu = np.empty((Kall, n, 3, 3))
        heights = {}
        for b, idx in kinds.items():
            heights.setdefault(b.height, []).extend(idx)
        for hgt, idx in heights.items():
            idx = np.asarray(idx)
            Bu[:, idx], Gu[:, idx] = self.unit_fields(xy[idx], self.plane_height + hgt)
        chans = self.channels
        K = len(chans)
        drag = np.empty(n)
        for b, idx in kinds.items():
            drag[idx] = drag_coefficient(b, medium)
        if "affine_in_input" in self.tags:
            zero = np.zeros(K)
            B0, G0 = self._total(Bu, Gu, zero)
            moments = np.empty((n, 3))
            for b, idx in kinds.items():
                moments[idx] = b.moment
            drift = np.einsum("nij,ni->nj", G0, moments)[:, :2] / drag[:, None]
            fields = np.einsum("knij,ni->knj", Gu[:K], moments)[..., :2] / drag[None, :, None]
            return FieldBasis("linear", fields, drift, chans, idle=zero)
        prims = self._primitives
        U = self._prim_matrix
        idle = U[0].copy()
        B, G = self._total(Bu, Gu, U)  # (P+1, n, 3), (P+1, n, 3, 3)
        v = np.empty(B.shape[:2] + (2,))
        for b, idx in kinds.items():
            v[:, idx] = bead_force(b, B[:, idx], G[:, idx])[..., :2] / drag[idx][None, :, None]
        return FieldBasis("timeshare", v[1:] - v[0], v[0], chans, primitives=prims, idle=idle)

    # -- heat -----------------------------------------------------------------------------------
    def power(self, u):
        """Power dissipated in each driven coil, ``I^2 R``, W, shape (K,) (coils without R give nan)."""
        u = self.check_input(u)
        return np.array([c.power(i) if c.resistance is not None else np.nan for c, i in zip(self.coils, u)])

    def rms_limits(self):
        """Per-channel limits for :class:`fieldplan.contract.schedule.HardwareLimits`.

        Returns
        -------
        dict of str -> fieldplan.contract.schedule.ChannelLimit
            Bounds +-``current_limit``; ``rms`` = the coil's ``rms_current`` and ``rms_window`` = its
            ``thermal_time_constant`` where given.
        """
        out = {}
        for ch, c in zip(self.channels, self.coils):
            out[ch.name] = ChannelLimit(lower=ch.lower, upper=ch.upper, rms=c.rms_current,
                                        rms_window=c.thermal_time_constant)
        return out

    def hardware_limits(self, **kwargs):
        """The coils' declared limits (:meth:`rms_limits`): current bounds, RMS current over the thermal time constant.

        ``kwargs`` (``time_step``, ``min_dwell``) are passed to
        :class:`fieldplan.contract.schedule.HardwareLimits`. Scenarios start from these limits.
        """
        return HardwareLimits(self.rms_limits(), **kwargs)

    def thermal_report(self, schedule):
        """Heat per coil over a schedule.

        Parameters
        ----------
        schedule : fieldplan.contract.schedule.Schedule
            Its channels must be this array's channels (same names, same order).

        Returns
        -------
        list of dict
            Per coil: ``channel``, ``rms_current`` (A, whole schedule), ``window_rms`` (A, largest
            RMS over the coil's thermal time constant, or None), ``rms_limit`` (A or None),
            ``mean_power`` and ``peak_power`` (W, nan without resistance), ``energy`` (J), ``ok``.
        """
        names = [c.name for c in self.channels]
        sch_names = [getattr(c, "name", c) for c in schedule.channels]
        if list(sch_names) != names:
            raise ActuatorError(f"thermal_report: schedule channels {sch_names} do not match {names}.")
        T = float(schedule.duration)
        v2t = np.asarray(schedule.energy(), dtype=float)  # integral of I^2 dt per channel, A^2 s
        vals = np.asarray(schedule.values, dtype=float).reshape(-1, len(names))
        out = []
        for k, (name, c) in enumerate(zip(names, self.coils)):
            rms = math.sqrt(v2t[k] / T) if T > 0 else 0.0
            wrms = None
            if c.thermal_time_constant is not None and T > 0:
                wrms = float(np.atleast_1d(schedule.rms(c.thermal_time_constant))[k])
            R = c.resistance if c.resistance is not None else np.nan
            peak = float(np.max(vals[:, k] ** 2)) * R if len(vals) else 0.0
            check = wrms if wrms is not None else rms
            ok = c.rms_current is None or check <= c.rms_current * (1 + 1e-9)
            out.append({"channel": name, "rms_current": rms, "window_rms": wrms, "rms_limit": c.rms_current,
                        "mean_power": rms * rms * R, "peak_power": peak, "energy": v2t[k] * R, "ok": bool(ok)})
        return out

    def check_thermal(self, schedule):
        """Raise :class:`fieldplan.errors.LimitError` if any coil's RMS current exceeds its rating.

        The RMS is taken over each coil's ``thermal_time_constant`` window when given, else over the
        whole schedule.
        """
        for row in self.thermal_report(schedule):
            if not row["ok"]:
                got = row["window_rms"] if row["window_rms"] is not None else row["rms_current"]
                raise LimitError(
                    f"channel {row['channel']!r}: RMS current {got:.4g} A exceeds the coil's thermal rating "
                    f"{row['rms_limit']:.4g} A (mean power {row['mean_power']:.3g} W); lower the duty or "
                    "the currents.", channel=row["channel"], time=None, limit="rms")


# --------------------------------------------------------------------------------------------
# Plots
# --------------------------------------------------------------------------------------------

def plot_field(array, body, medium, u, *, resolution=81, arrows=21, log_speed=True, figsize=(11.0, 4.6)):
    """Two-panel figure: |B| on the bead plane, and the bead's velocity field, with colour bars.

    Parameters
    ----------
    array : CoilArray
    body : fieldplan.Body
        The bead type whose velocity is drawn (its centre height sets the plane).
    medium : fieldplan.Medium
    u : array_like, shape (K,)
        Coil currents, A.
    resolution : int
        Samples per side of the colour maps.
    arrows : int
        Arrows per side of the velocity quiver (direction only; the colour map gives the speed).
    log_speed : bool
        Logarithmic speed colour scale (speeds span decades across a dish), over three decades.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt
    from matplotlib.patches import Ellipse

    u = array.check_input(u)
    x0, x1, y0, y1 = array.extent
    gx, gy = np.meshgrid(np.linspace(x0, x1, resolution), np.linspace(y0, y1, resolution))
    pts = np.column_stack([gx.ravel(), gy.ravel()])
    Bmag = np.linalg.norm(array.field(pts, u, height=body.height), axis=1).reshape(gx.shape)
    v = array.velocity(body, medium, pts, u)
    speed = np.linalg.norm(v, axis=1).reshape(gx.shape)
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=figsize, constrained_layout=True)
    mm = 1e3
    im1 = ax1.pcolormesh(gx * mm, gy * mm, Bmag * 1e3, shading="auto", cmap="viridis")
    fig.colorbar(im1, ax=ax1, label="|B| (mT)")
    ax1.set_title(f"|B| on the bead plane ({body.height * 1e6:.3g} µm above the floor)")
    norm = None
    if log_speed and np.max(speed) > 0:
        from matplotlib.colors import LogNorm

        top = float(np.max(speed)) * 1e6
        norm = LogNorm(vmin=top * 1e-3, vmax=top)
    im2 = ax2.pcolormesh(gx * mm, gy * mm, np.maximum(speed * 1e6, 1e-300), shading="auto", cmap="magma",
                         norm=norm)
    fig.colorbar(im2, ax=ax2, label="bead speed (µm/s)")
    qx, qy = np.meshgrid(np.linspace(x0, x1, arrows), np.linspace(y0, y1, arrows))
    qp = np.column_stack([qx.ravel(), qy.ravel()])
    qv = array.velocity(body, medium, qp, u)
    qn = np.linalg.norm(qv, axis=1)
    qd = qv / np.where(qn > 0, qn, 1.0)[:, None]  # direction only: speeds span decades
    ax2.quiver(qp[:, 0] * mm, qp[:, 1] * mm, qd[:, 0], qd[:, 1], color="white", alpha=0.8,
               angles="xy", scale=arrows * 1.3, width=0.003)
    ax2.set_title(f"{body.name} ({bead_model(body)} bead): speed, direction")
    for ax in (ax1, ax2):
        for k, c in enumerate(array.coils):
            n = c.unit_axis
            w = 2 * c.radius * mm
            ax.add_patch(Ellipse((c.center[0] * mm, c.center[1] * mm), w, w * abs(n[2]) if abs(n[2]) > 0.05 else w,
                                 fill=False, ec="cyan" if u[k] > 0 else ("orange" if u[k] < 0 else "0.6"),
                                 lw=1.2, ls="-" if u[k] != 0 else ":"))
            ax.annotate(f"{k + 1}\n{u[k]:+.2g} A", (c.center[0] * mm, c.center[1] * mm), color="w",
                        ha="center", va="center", fontsize=7)
        ax.set_xlabel("x (mm)")
        ax.set_ylabel("y (mm)")
        ax.set_aspect("equal")
        ax.set_xlim(x0 * mm, x1 * mm)
        ax.set_ylim(y0 * mm, y1 * mm)
    ax1.plot([], [], color="cyan", label="coil, I > 0")
    ax1.plot([], [], color="orange", label="coil, I < 0")
    ax1.plot([], [], color="0.6", ls=":", label="coil, off")
    ax1.legend(loc="lower left", fontsize=7, framealpha=0.6)
    return fig
