"""Free vibration of thin rectangular (Kirchhoff) plates: eigenfrequencies and mass-normalised modes.

The Rayleigh-Ritz method is used with a tensor-product basis of Legendre polynomials. Each edge is
free, clamped or simply supported; the essential conditions (zero deflection, and zero slope for a
clamped edge) are built into the one-dimensional bases by taking the null space of the end
conditions in the space of orthonormal Legendre polynomials, so the bases are orthonormal and well
conditioned at any degree. Point supports are linear constraints on the Ritz coefficients,
imposed by eliminating constrained coefficients (null-space projection). A pin (zero deflection at
a point) makes the exact modes singular there (deflection ~ r^2 ln r, the biharmonic fundamental
solution), which polynomials approximate only algebraically; each pin therefore adds that singular
function to the Ritz space, restoring fast convergence. A clamped disc (a plate bolted to a post of
finite radius) holds zero deflection on its rim and centre. A plate with all four edges
simply supported uses the exact sine modes instead.

Energy functionals (Leissa, Vibration of Plates, NASA SP-160, 1969, ch. 1)::

    U = D/2 * integral[ w_xx^2 + w_yy^2 + 2 nu w_xx w_yy + 2 (1 - nu) w_xy^2 ] dA
    T = rho h omega^2 / 2 * integral[ w^2 ] dA,      D = E h^3 / (12 (1 - nu^2))

The modes are normalised to unit modal mass, ``integral(rho h phi_m phi_n) dA = delta_mn``, so a
mode shape has units of kg^-1/2.
"""

from __future__ import annotations

import functools
import json
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.polynomial import legendre as npleg

from fieldplan.errors import ActuatorError
from fieldplan.units import to_si

__all__ = [
    "PlateModes",
    "plate_modes",
    "flexural_rigidity",
    "bending_wavenumber",
    "parse_edges",
    "parse_supports",
    "EDGE_ORDER",
]

#: Order of the four edges in a 4-letter edge code such as ``"SCSC"``: going round the plate
#: anticlockwise from the edge x = x_min.
EDGE_ORDER = ("x_min", "y_min", "x_max", "y_max")

_EDGE_WORDS = {
    "f": "F", "free": "F",
    "c": "C", "clamped": "C", "fixed": "C",
    "s": "S", "ss": "S", "simply_supported": "S", "simply-supported": "S", "simply supported": "S",
    "simple": "S", "hinged": "S",
}
_EDGE_NAMES = {"F": "free", "C": "clamped", "S": "simply supported"}
_SUPPORT_KINDS = ("pinned", "clamped")

#: Default relative frequency tolerance of :func:`plate_modes` for plates held only at their edges.
DEFAULT_TOL = 1e-4
#: Default for plates held by a clamped disc: the rim constraint converges only algebraically.
DEFAULT_TOL_CLAMPED_DISC = 1e-2

# Bump when the algorithm or the stored layout changes: it is part of every cache key.
ALGORITHM_VERSION = 1


# ---------------------------------------------------------------------------------------------
# plate parameters
# ---------------------------------------------------------------------------------------------
def flexural_rigidity(thickness, youngs_modulus, poisson_ratio):
    """Bending stiffness ``D = E h^3 / (12 (1 - nu^2))`` of a thin isotropic plate.

    Parameters
    ----------
    thickness : float
        h, m.
    youngs_modulus : float
        E, Pa.
    poisson_ratio : float
        nu, dimensionless.

    Returns
    -------
    float
        D, N m.

    Examples
    --------
    >>> round(flexural_rigidity(1e-3, 69e9, 0.33), 3)
    6.453
    """
    return youngs_modulus * thickness**3 / (12.0 * (1.0 - poisson_ratio**2))


def bending_wavenumber(frequency, thickness, youngs_modulus, poisson_ratio, density):
    """Free bending wavenumber ``k = (rho h omega^2 / D)^(1/4)`` of an infinite plate, rad/m.

    Parameters
    ----------
    frequency : float or ndarray
        Hz.
    thickness, youngs_modulus, poisson_ratio, density : float
        m, Pa, dimensionless, kg/m^3.
    """
    d = flexural_rigidity(thickness, youngs_modulus, poisson_ratio)
    omega = 2.0 * np.pi * np.asarray(frequency, dtype=float)
    return (density * thickness * omega**2 / d) ** 0.25


def _positive(name, value, unit):
    v = to_si(value, unit, name)
    if not (np.isfinite(v) and v > 0):
        raise ActuatorError(f"plate {name} must be a finite number > 0 {unit}, got {value!r}.")
    return v


def _check_material(length_x, length_y, thickness, youngs_modulus, poisson_ratio, density):
    a = _positive("length_x", length_x, "m")
    b = _positive("length_y", length_y, "m")
    h = _positive("thickness", thickness, "m")
    e = _positive("youngs_modulus", youngs_modulus, "Pa")
    nu = to_si(poisson_ratio, "dimensionless", "poisson_ratio")
    if not (-1.0 < nu < 0.5):
        raise ActuatorError(
            f"plate poisson_ratio must satisfy -1 < nu < 0.5 for an isotropic solid (positive "
            f"definite strain energy), got {poisson_ratio!r}."
        )
    rho = _positive("density", density, "kg/m^3")
    if h > 0.2 * min(a, b):
        raise ActuatorError(
            f"plate thickness {h:g} m is more than a fifth of its shorter side {min(a, b):g} m: "
            "thin-plate (Kirchhoff) theory does not apply."
        )
    return a, b, h, e, nu, rho


def parse_edges(edges):
    """Normalise an edge specification to a 4-tuple of codes ``F``/``C``/``S`` in :data:`EDGE_ORDER`.

    Parameters
    ----------
    edges : str, sequence of 4 str, or dict
        One word for all edges (``"free"``, ``"clamped"``, ``"simply_supported"``, or ``F``/``C``/``S``);
        a 4-letter code such as ``"SCSC"`` in the order (x_min, y_min, x_max, y_max), i.e. going
        round the plate anticlockwise from the edge x = x_min; a sequence of 4 such words in the
        same order; or a dict with keys ``x_min``, ``y_min``, ``x_max``, ``y_max``.

    Returns
    -------
    tuple of 4 str

    Examples
    --------
    >>> parse_edges("SCSC")
    ('S', 'C', 'S', 'C')
    >>> parse_edges({"x_min": "clamped", "x_max": "free", "y_min": "free", "y_max": "free"})
    ('C', 'F', 'F', 'F')
    """

    def one(word, where):
        key = str(word).strip().lower()
        if key not in _EDGE_WORDS:
            raise ActuatorError(
                f"plate edges: {where} = {word!r} is not an edge condition; use 'free' (F), "
                f"'clamped' (C) or 'simply_supported' (S)."
            )
        return _EDGE_WORDS[key]

    if isinstance(edges, dict):
        unknown = set(edges) - set(EDGE_ORDER)
        missing = set(EDGE_ORDER) - set(edges)
        if unknown or missing:
            raise ActuatorError(
                f"plate edges dict needs exactly the keys {list(EDGE_ORDER)}; unknown {sorted(unknown)}, "
                f"missing {sorted(missing)}."
            )
        return tuple(one(edges[k], k) for k in EDGE_ORDER)
    if isinstance(edges, str):
        key = edges.strip().lower()
        if key in _EDGE_WORDS:
            return (_EDGE_WORDS[key],) * 4
        if len(key) == 4 and all(ch in "fcs" for ch in key):
            return tuple(ch.upper() for ch in key)
        raise ActuatorError(
            f"plate edges {edges!r} is neither one edge condition ('free', 'clamped', "
            f"'simply_supported') nor a 4-letter code of F/C/S in the order {EDGE_ORDER}."
        )
    try:
        seq = list(edges)
    except TypeError:
        raise ActuatorError(f"plate edges must be a string, 4 strings or a dict, got {edges!r}.") from None
    if len(seq) != 4:
        raise ActuatorError(f"plate edges needs 4 conditions in the order {EDGE_ORDER}, got {len(seq)}.")
    return tuple(one(w, k) for w, k in zip(seq, EDGE_ORDER))


def parse_supports(supports, extent):
    """Normalise point supports to a tuple of ``(x, y, kind, radius)``.

    Parameters
    ----------
    supports : sequence
        Each ``(x, y)`` or ``(x, y, "pinned")``: zero deflection at a point (a pin, a knife point,
        or any mount that does not resist rotation); or ``(x, y, "clamped", radius)``: the plate
        is held flat on a disc of ``radius`` m (a plate bolted to a stiff post). Coordinates m.
        A clamp needs a radius: in thin-plate theory the slope at a single point is not a
        well-defined constraint (a clamped point of zero radius acts as a pin).
    extent : tuple (xmin, xmax, ymin, ymax)
        The plate, m; supports must lie on it.

    Examples
    --------
    >>> parse_supports([(0, 0), (0.01, 0, "clamped", 0.004)], (-0.1, 0.1, -0.1, 0.1))
    ((0.0, 0.0, 'pinned', 0.0), (0.01, 0.0, 'clamped', 0.004))
    """
    out = []
    xmin, xmax, ymin, ymax = extent
    try:
        items = list(supports)
    except TypeError:
        raise ActuatorError(f"plate supports must be a sequence of (x, y[, kind[, radius]]), got {supports!r}.") from None
    for i, s in enumerate(items):
        try:
            s = tuple(s)
        except TypeError:
            raise ActuatorError(f"plate supports[{i}] must be (x, y[, kind[, radius]]), got {s!r}.") from None
        if len(s) not in (2, 3, 4):
            raise ActuatorError(f"plate supports[{i}] must be (x, y), (x, y, 'pinned') or "
                                f"(x, y, 'clamped', radius), got {s!r}.")
        kind = str(s[2]).lower() if len(s) > 2 else "pinned"
        if kind not in _SUPPORT_KINDS:
            raise ActuatorError(f"plate supports[{i}] kind must be one of {_SUPPORT_KINDS}, got {s[2]!r}.")
        x = to_si(s[0], "m", f"supports[{i}].x")
        y = to_si(s[1], "m", f"supports[{i}].y")
        radius = 0.0
        if kind == "clamped":
            if len(s) < 4:
                raise ActuatorError(
                    f"plate supports[{i}] is clamped but has no radius: give (x, y, 'clamped', radius) "
                    "with the radius of the clamping disc in m (a clamped point of zero radius acts as a pin)."
                )
            radius = to_si(s[3], "m", f"supports[{i}].radius")
            if not radius > 0:
                raise ActuatorError(f"plate supports[{i}] radius must be > 0 m, got {s[3]!r}.")
        elif len(s) == 4 and to_si(s[3], "m", f"supports[{i}].radius") != 0:
            raise ActuatorError(f"plate supports[{i}] is pinned (a point); a radius applies only to 'clamped'.")
        tol = 1e-12 * max(xmax - xmin, ymax - ymin)
        if not (xmin + radius - tol <= x <= xmax - radius + tol and ymin + radius - tol <= y <= ymax - radius + tol):
            raise ActuatorError(
                f"plate supports[{i}] at ({x:g}, {y:g}) m (radius {radius:g} m) does not lie on the plate "
                f"[{xmin:g}, {xmax:g}] x [{ymin:g}, {ymax:g}] m."
            )
        out.append((x, y, kind, radius))
    return tuple(out)


# ---------------------------------------------------------------------------------------------
# one-dimensional bases
# ---------------------------------------------------------------------------------------------
class _LegendreAxis:
    """Legendre polynomials of degree <= N on [lo, hi], evaluated with their derivatives.

    ``values(x, d)`` returns the d-th physical derivative of the raw Legendre polynomials
    P_0..P_N of the mapped coordinate, shape (n, N+1); mode coefficients live in that raw space.
    """

    kind = "legendre"

    def __init__(self, lo, hi, degree):
        self.lo, self.hi, self.degree = float(lo), float(hi), int(degree)
        n = self.degree + 1
        # d/dxi acting on Legendre coefficient vectors (legder drops the top order; pad it back).
        self._dmat = np.vstack([npleg.legder(np.eye(n), axis=0), np.zeros((1, n))])
        self._scale = 2.0 / (self.hi - self.lo)

    @property
    def size(self):
        return self.degree + 1

    def values(self, x, deriv=0):
        xi = (np.asarray(x, dtype=float) - self.lo) * self._scale - 1.0
        v = npleg.legvander(xi, self.degree)
        for _ in range(deriv):
            v = v @ self._dmat
        return v * self._scale**deriv if deriv else v

    def basis_values(self, x, coeffs, max_deriv=2):
        """Values of the functions with Legendre coefficients ``coeffs`` (N+1, K) and derivatives.

        One Vandermonde evaluation serves every derivative order: list of (n, K) arrays.
        """
        v = npleg.legvander((np.asarray(x, dtype=float) - self.lo) * self._scale - 1.0, self.degree)
        out, c = [], np.asarray(coeffs)
        for d in range(max_deriv + 1):
            out.append(v @ c * self._scale**d)
            c = self._dmat @ c
        return out

    def integrals(self):
        """Integral of each basis function over [lo, hi], shape (N+1,)."""
        out = np.zeros(self.size)
        out[0] = self.hi - self.lo  # only P_0 has a non-zero mean on [-1, 1]
        return out

    def constrained(self, left, right):
        """Raw-Legendre coefficients of an orthonormal basis meeting the end conditions.

        Returns B, shape (N+1, K): column j holds the Legendre coefficients of basis function j.
        Built from the null space of the essential end conditions in orthonormal Legendre
        coefficients, so the functions are L2-orthonormal on [-1, 1] and the basis stays well
        conditioned at high degree (unlike boundary-factor-times-polynomial bases).
        """
        n = self.size
        k = np.arange(n)
        norm = np.sqrt(k + 0.5)  # P_k * sqrt(k + 1/2) is orthonormal on [-1, 1]
        rows = []
        for end, code in ((-1.0, left), (1.0, right)):
            if code in ("S", "C"):
                rows.append(end**k * norm)
            if code == "C":
                rows.append(end ** (k + 1) * k * (k + 1) / 2.0 * norm)
        if rows:
            t = scipy.linalg.null_space(np.array(rows))
        else:
            t = np.eye(n)
        return t * norm[:, None]


class _SineAxis:
    """Sine functions sin(j pi (x - lo) / L), j = 1..J, with physical derivatives."""

    kind = "sine"

    def __init__(self, lo, hi, count):
        self.lo, self.hi, self.count = float(lo), float(hi), int(count)
        self._k = np.arange(1, self.count + 1) * np.pi / (self.hi - self.lo)

    @property
    def size(self):
        return self.count

    def values(self, x, deriv=0):
        arg = (np.asarray(x, dtype=float)[..., None] - self.lo) * self._k
        kd = self._k**deriv
        # d/dx cycles sin -> cos -> -sin -> -cos
        if deriv % 4 == 0:
            return np.sin(arg) * kd
        if deriv % 4 == 1:
            return np.cos(arg) * kd
        if deriv % 4 == 2:
            return -np.sin(arg) * kd
        return -np.cos(arg) * kd

    def integrals(self):
        j = np.arange(1, self.count + 1)
        return (1.0 - np.cos(j * np.pi)) / self._k


def _make_axis(state):
    kind, lo, hi, size = state
    return _LegendreAxis(lo, hi, size - 1) if kind == "legendre" else _SineAxis(lo, hi, size)


# the result
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class PlateModes:
    """Mass-normalised bending modes of a rectangular plate (result of :func:`plate_modes`).

    Mode ``m`` is ``phi_m(x, y) = sum_kl coef[m, k, l] X_k(x) Y_l(y) + sum_j sing[m, j] s_j(x, y)``
    with ``X``, ``Y`` the one-dimensional bases (Legendre polynomials, or sines for the exact
    solution) and ``s_j`` the singular enrichment of pinned support j (see :func:`plate_modes`).

    Attributes
    ----------
    omega : ndarray, shape (M,)
        Angular eigenfrequencies, rad/s, ascending; rigid-body modes (a free or point-supported
        plate) appear as exact zeros.
    coef : ndarray, shape (M, Kx, Ky)
        Polynomial (or sine) coefficients, kg^-1/2.
    sing : ndarray, shape (M, J)
        Coefficients of the singular functions of the J pinned supports, kg^-1/2 m^-2.
    params : dict
        The plate: ``length_x``, ``length_y`` (m), ``thickness`` (m), ``youngs_modulus`` (Pa),
        ``poisson_ratio``, ``density`` (kg/m^3), ``edges`` (4 codes, :data:`EDGE_ORDER`),
        ``supports`` (tuple of (x, y, kind, radius)), ``center`` (m).
    method : {"ritz", "exact"}
    degree : int or None
        Polynomial degree per axis of the Ritz basis (None for exact modes).
    tolerance : float
        Requested relative accuracy of the frequencies.
    achieved : float
        Estimated relative error of the elastic frequencies (0 for exact modes), from the
        changes between successive bases.
    converged : bool
        ``achieved <= tolerance``.
    """

    omega: np.ndarray
    coef: np.ndarray
    sing: np.ndarray
    params: dict
    method: str
    degree: int | None
    tolerance: float
    achieved: float
    converged: bool
    _axes: tuple           # (x-axis state, y-axis state): (kind, lo, hi, size)
    _sing_integrals: np.ndarray  # integral of each s_j over the plate, m^2 * m^2

    # -- derived quantities -----------------------------------------------------------------
    @property
    def n_modes(self):
        return len(self.omega)

    @property
    def frequencies(self):
        """Eigenfrequencies, Hz, shape (M,)."""
        return self.omega / (2.0 * np.pi)

    @property
    def flexural_rigidity(self):
        """D, N m."""
        p = self.params
        return flexural_rigidity(p["thickness"], p["youngs_modulus"], p["poisson_ratio"])

    @property
    def mass_per_area(self):
        """rho h, kg/m^2."""
        return self.params["density"] * self.params["thickness"]

    @property
    def lambda2(self):
        """Frequency parameters ``lambda^2 = omega a^2 sqrt(rho h / D)`` with a = length_x, shape (M,)."""
        a = self.params["length_x"]
        return self.omega * a**2 * np.sqrt(self.mass_per_area / self.flexural_rigidity)

    @property
    def extent(self):
        """(xmin, xmax, ymin, ymax) of the plate, m."""
        return _extent(self.params)

    @property
    def n_rigid(self):
        """Number of rigid-body (zero-frequency) modes among those computed."""
        return int(np.sum(self.omega == 0.0))

    def axes(self):
        """The one-dimensional bases (x, y)."""
        return _make_axis(self._axes[0]), _make_axis(self._axes[1])

    def _singular(self):
        return _Singular(self.params)

    # -- evaluation ---------------------------------------------------------------------------
    def evaluate(self, coef, xy, dx=0, dy=0, sing=None):
        """Evaluate a field given by coefficients in this mode set's functions, at points.

        Parameters
        ----------
        coef : ndarray, shape (..., Kx, Ky)
            Coefficients of the tensor functions (real or complex).
        xy : array_like, shape (n, 2)
            m.
        dx, dy : int
            Derivative orders in x and y (0, 1 or 2; the singular part up to first order).
        sing : ndarray, shape (..., J), optional
            Coefficients of the singular functions.

        Returns
        -------
        ndarray, shape (n, ...)
        """
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        ax, ay = self.axes()
        vx = ax.values(xy[:, 0], dx)          # (n, Kx)
        vy = ay.values(xy[:, 1], dy)          # (n, Ky)
        c = np.asarray(coef)
        lead = c.shape[:-2]
        c2 = c.reshape((-1,) + c.shape[-2:])
        t = np.einsum("nk,mkl->nml", vx, c2, optimize=True)
        out = np.einsum("nml,nl->nm", t, vy, optimize=True)
        if sing is not None and np.size(sing):
            sv = self._singular().values(xy[:, 0], xy[:, 1], dx, dy)        # (n, J)
            out = out + sv @ np.asarray(sing).reshape(-1, sv.shape[1]).T
        return out.reshape((len(xy),) + lead)

    def evaluate_grid(self, coef, xs, ys, dx=0, dy=0, sing=None):
        """Evaluate on the tensor grid ``xs`` x ``ys``; returns shape (..., len(ys), len(xs))."""
        ax, ay = self.axes()
        xs = np.asarray(xs, dtype=float)
        ys = np.asarray(ys, dtype=float)
        vx = ax.values(xs, dx)
        vy = ay.values(ys, dy)
        out = np.einsum("jl,...kl,ik->...ji", vy, np.asarray(coef), vx, optimize=True)
        if sing is not None and np.size(sing):
            X, Y = np.meshgrid(xs, ys)
            sv = self._singular().values(X.ravel(), Y.ravel(), dx, dy)      # (ny*nx, J)
            s = np.asarray(sing)
            extra = np.tensordot(s, sv, axes=([-1], [1])).reshape(s.shape[:-1] + X.shape)
            out = out + extra
        return out

    def shape(self, xy, modes=None):
        """Mode shapes at points.

        Parameters
        ----------
        xy : array_like, shape (n, 2)
            m.
        modes : array_like of int, optional
            Which modes (default all).

        Returns
        -------
        ndarray, shape (n, M)
            kg^-1/2 (unit modal mass).
        """
        sel = slice(None) if modes is None else np.asarray(modes)
        return self.evaluate(self.coef[sel], xy, sing=self.sing[sel])

    def gradient(self, xy, modes=None):
        """Gradients of the mode shapes, shape (n, M, 2), kg^-1/2 m^-1."""
        sel = slice(None) if modes is None else np.asarray(modes)
        c, s = self.coef[sel], self.sing[sel]
        return np.stack([self.evaluate(c, xy, 1, 0, s), self.evaluate(c, xy, 0, 1, s)], axis=-1)

    def grid(self, xs, ys, modes=None):
        """Mode shapes on a tensor grid, shape (M, len(ys), len(xs)), kg^-1/2."""
        sel = slice(None) if modes is None else np.asarray(modes)
        return self.evaluate_grid(self.coef[sel], xs, ys, sing=self.sing[sel])

    def participation(self):
        """Modal participation ``Gamma_m = integral(rho h phi_m) dA`` for uniform base motion, kg^1/2, (M,).

        ``sum_m Gamma_m^2`` tends to the plate mass as the mode count grows (each Gamma_m is the
        projection of the rigid translation onto mode m).
        """
        ax, ay = self.axes()
        poly = np.einsum("mkl,k,l->m", self.coef, ax.integrals(), ay.integrals())
        return self.mass_per_area * (poly + self.sing @ self._sing_integrals)

    def summary(self, count=10):
        """Text table of the first ``count`` modes (index, Hz, lambda^2)."""
        lines = [f"{'mode':>4} {'f (Hz)':>12} {'lambda^2':>10}"]
        for m in range(min(count, self.n_modes)):
            lines.append(f"{m:>4} {self.frequencies[m]:>12.4f} {self.lambda2[m]:>10.4f}")
        return "\n".join(lines)

    def to_arrays(self):
        """Plain arrays and JSON-able metadata (for a disk cache); inverse of :meth:`from_arrays`."""
        p = dict(self.params)
        meta = {"params": {**p, "edges": list(p["edges"]), "supports": [list(s) for s in p["supports"]],
                           "center": list(p["center"])},
                "method": self.method, "degree": self.degree, "tolerance": self.tolerance,
                "achieved": self.achieved, "converged": bool(self.converged),
                "axes": [list(a) for a in self._axes]}
        return {"omega": self.omega, "coef": self.coef, "sing": self.sing,
                "sing_integrals": self._sing_integrals, "meta": np.array(json.dumps(meta))}

    @classmethod
    def from_arrays(cls, data):
        """Rebuild from :meth:`to_arrays` output."""
        meta = json.loads(str(data["meta"]))
        p = meta["params"]
        p["edges"] = tuple(p["edges"])
        p["supports"] = tuple(tuple(s) for s in p["supports"])
        p["center"] = tuple(p["center"])
        return cls(np.asarray(data["omega"]), np.asarray(data["coef"]), np.asarray(data["sing"]), p,
                   meta["method"], meta["degree"], meta["tolerance"], meta["achieved"], meta["converged"],
                   tuple(tuple(a) for a in meta["axes"]), np.asarray(data["sing_integrals"]))

    def __repr__(self):
        p = self.params
        return (f"PlateModes({self.n_modes} modes, {p['length_x']:g} x {p['length_y']:g} x "
                f"{p['thickness']:g} m, edges {''.join(p['edges'])}, {len(p['supports'])} point supports, "
                f"{self.method}, f = {self.frequencies[0]:.4g}..{self.frequencies[-1]:.4g} Hz)")


def _extent(params):
    cx, cy = params["center"]
    a, b = params["length_x"], params["length_y"]
    return (cx - a / 2, cx + a / 2, cy - b / 2, cy + b / 2)


# ---------------------------------------------------------------------------------------------
# singular enrichment of pinned supports
# ---------------------------------------------------------------------------------------------
_EDGE_POWER = {"F": 0, "S": 1, "C": 2}


class _Singular:
    """Singular functions ``s_j = r_j^2 ln(r_j) B(x, y)`` of the pinned supports.

    A point reaction on a Kirchhoff plate makes the deflection behave like ``r^2 ln r`` about
    the support (the fundamental solution of the biharmonic operator, ``Delta^2 (r^2 ln r) =
    8 pi delta``). Polynomials approximate it only algebraically, so each pinned support adds
    this function to the Ritz space; ``B`` is the boundary factor that keeps the essential edge
    conditions (``(x - x_min)^p`` with p = 0, 1, 2 for a free, simply supported, clamped edge).
    With it the frequencies converge as fast as for a plate held at its edges only.
    """

    def __init__(self, params):
        xmin, xmax, ymin, ymax = _extent(params)
        e = params["edges"]
        a, b = params["length_x"], params["length_y"]
        P = np.polynomial.Polynomial
        self.bx = P([-xmin / a, 1 / a]) ** _EDGE_POWER[e[0]] * P([xmax / a, -1 / a]) ** _EDGE_POWER[e[2]]
        self.by = P([-ymin / b, 1 / b]) ** _EDGE_POWER[e[1]] * P([ymax / b, -1 / b]) ** _EDGE_POWER[e[3]]
        self.points = np.array([(s[0], s[1]) for s in params["supports"] if s[2] == "pinned"]).reshape(-1, 2)

    @property
    def count(self):
        return len(self.points)

    def _parts(self, x, y, order):
        """q = r^2 ln r and its derivatives up to ``order`` for every support, each (n, J)."""
        u = x[:, None] - self.points[None, :, 0]
        v = y[:, None] - self.points[None, :, 1]
        r2 = u * u + v * v
        pos = r2 > 0
        lg = np.log(np.where(pos, r2, 1.0))
        out = {"q": 0.5 * r2 * lg}
        if order >= 1:
            out["qx"] = u * (lg + 1.0)
            out["qy"] = v * (lg + 1.0)
        if order >= 2:
            inv = np.where(pos, 1.0 / np.where(pos, r2, 1.0), 0.0)
            out["qxx"] = lg + 2.0 * u * u * inv + 1.0
            out["qyy"] = lg + 2.0 * v * v * inv + 1.0
            out["qxy"] = 2.0 * u * v * inv
        return out

    def all_derivatives(self, x, y):
        """s and its derivatives up to second order at points: dict of (n, J) arrays."""
        q = self._parts(x, y, 2)
        bx = [self.bx.deriv(k)(x)[:, None] if k else self.bx(x)[:, None] for k in range(3)]
        by = [self.by.deriv(k)(y)[:, None] if k else self.by(y)[:, None] for k in range(3)]
        B, Bx, By = bx[0] * by[0], bx[1] * by[0], bx[0] * by[1]
        Bxx, Byy, Bxy = bx[2] * by[0], bx[0] * by[2], bx[1] * by[1]
        return {
            "s": q["q"] * B,
            "sx": q["qx"] * B + q["q"] * Bx,
            "sy": q["qy"] * B + q["q"] * By,
            "sxx": q["qxx"] * B + 2 * q["qx"] * Bx + q["q"] * Bxx,
            "syy": q["qyy"] * B + 2 * q["qy"] * By + q["q"] * Byy,
            "sxy": q["qxy"] * B + q["qx"] * By + q["qy"] * Bx + q["q"] * Bxy,
        }

    def values(self, x, y, dx=0, dy=0):
        """s_j or a first derivative at points, shape (n, J)."""
        x = np.asarray(x, dtype=float).ravel()
        y = np.asarray(y, dtype=float).ravel()
        if (dx, dy) not in ((0, 0), (1, 0), (0, 1)):
            raise ValueError("singular functions are evaluated up to first derivatives only")
        q = self._parts(x, y, 1)
        B = self.bx(x)[:, None] * self.by(y)[:, None]
        if (dx, dy) == (0, 0):
            return q["q"] * B
        if dx:
            return q["qx"] * B + q["q"] * (self.bx.deriv()(x) * self.by(y))[:, None]
        return q["qy"] * B + q["q"] * (self.bx(x) * self.by.deriv()(y))[:, None]


def _graded_rules(xa, xb, ya, yb, corner, nq, layers=14, ratio=0.15):
    """Tensor Gauss rules on rectangles graded geometrically toward one corner of a cell.

    The log singularity of the enrichment's curvature sits at that corner; L-shaped layers that
    shrink by ``ratio`` make the composite rule converge exponentially in the number of layers.
    """
    cx, cy = corner
    sx = 1.0 if np.isclose(cx, xa) else -1.0
    sy = 1.0 if np.isclose(cy, ya) else -1.0
    A, B = xb - xa, yb - ya
    boxes = []
    for k in range(layers):
        o, i = ratio**k, ratio ** (k + 1)
        boxes.append((i * A, o * A, 0.0, o * B))
        boxes.append((0.0, i * A, i * B, o * B))
    c = ratio**layers
    boxes.append((0.0, c * A, 0.0, c * B))
    rules = []
    for k, (u0, u1, v0, v1) in enumerate(boxes):
        x0, x1 = sorted((cx + sx * u0, cx + sx * u1))
        y0, y1 = sorted((cy + sy * v0, cy + sy * v1))
        # A degree-N polynomial is nearly linear on the small inner layers: fewer points suffice.
        n = min(nq, max(12, int(nq * ratio ** (k // 2)) + 10))
        rules.append(_gauss_rect(x0, x1, y0, y1, n))
    return rules


@functools.lru_cache(maxsize=64)
def _leggauss(n):
    return npleg.leggauss(n)


def _gauss_rect(x0, x1, y0, y1, nq):
    t, w = _leggauss(nq)
    hx, hy = 0.5 * (x1 - x0), 0.5 * (y1 - y0)
    return x0 + (t + 1) * hx, w * hx, y0 + (t + 1) * hy, w * hy


def _singular_quadrature(extent, points, nq):
    """Composite tensor rules over the plate, graded toward every singular point (list of rules)."""
    xmin, xmax, ymin, ymax = extent
    tol = 1e-12 * max(xmax - xmin, ymax - ymin)
    xl = np.unique(np.concatenate([[xmin, xmax], points[:, 0]]))
    yl = np.unique(np.concatenate([[ymin, ymax], points[:, 1]]))
    rules = []

    def cell(x0, x1, y0, y1, depth=0):
        corners = [(px, py) for px, py in points
                   if (abs(px - x0) < tol or abs(px - x1) < tol) and (abs(py - y0) < tol or abs(py - y1) < tol)]
        if not corners:
            rules.append(_gauss_rect(x0, x1, y0, y1, nq))
        elif len(corners) == 1:
            rules.extend(_graded_rules(x0, x1, y0, y1, corners[0], nq))
        else:  # several singular corners: quarter the cell so each piece has at most one
            xm, ym = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
            for a, b in ((x0, xm), (xm, x1)):
                for c, d in ((y0, ym), (ym, y1)):
                    cell(a, b, c, d, depth + 1)

    for x0, x1 in zip(xl[:-1], xl[1:]):
        if x1 - x0 <= tol:
            continue
        for y0, y1 in zip(yl[:-1], yl[1:]):
            if y1 - y0 > tol:
                cell(x0, x1, y0, y1)
    return rules


def _enrichment_matrices(sing, ax, ay, bx, by, d, nu, rho_h, extent):
    """Energy and mass products of the singular functions with the tensor basis and each other.

    Returns ``ks`` (J, Kx*Ky) and ``ms`` (J, Kx*Ky): a(s_j, f) and m(s_j, f); ``kss``, ``mss``
    (J, J); and ``ints`` (J,): the integral of s_j over the plate.
    """
    J = sing.count
    nq = max(ax.degree, ay.degree) + 4
    ks = np.zeros((J, bx.shape[1], by.shape[1]))
    ms = np.zeros_like(ks)
    kss = np.zeros((J, J))
    mss = np.zeros((J, J))
    ints = np.zeros(J)
    rules = _singular_quadrature(extent, sing.points, nq)
    # One Vandermonde evaluation for the nodes of all rules together, sliced per rule below.
    fx_all = ax.basis_values(np.concatenate([r[0] for r in rules]), bx)
    hy_all = ay.basis_values(np.concatenate([r[2] for r in rules]), by)
    ox = oy = 0
    for x, wx, y, wy in rules:
        nx, ny = len(x), len(y)
        f = [g[ox:ox + nx] for g in fx_all]
        h = [g[oy:oy + ny] for g in hy_all]
        ox, oy = ox + nx, oy + ny
        X, Y = np.meshgrid(x, y, indexing="ij")
        s = sing.all_derivatives(X.ravel(), Y.ravel())
        W = (wx[:, None] * wy[None, :]).ravel()

        def proj(vals, fx, hy):
            # sum_q W_q vals_q[j] fx(x_q) hy(y_q) over the tensor nodes -> (J, Kx, Ky)
            g = (vals * W[:, None]).reshape(nx, ny, J)
            t = np.tensordot(fx, g, axes=([0], [0]))                 # (Kx, ny, J)
            return np.tensordot(t, hy, axes=([1], [0])).transpose(1, 0, 2)

        ks += d * (proj(s["sxx"] + nu * s["syy"], f[2], h[0]) + proj(s["syy"] + nu * s["sxx"], f[0], h[2])
                   + 2.0 * (1.0 - nu) * proj(s["sxy"], f[1], h[1]))
        ms += rho_h * proj(s["s"], f[0], h[0])
        sw = {k: v * W[:, None] for k, v in s.items()}
        kss += d * (sw["sxx"].T @ s["sxx"] + sw["syy"].T @ s["syy"]
                    + nu * (sw["sxx"].T @ s["syy"] + sw["syy"].T @ s["sxx"])
                    + 2.0 * (1.0 - nu) * sw["sxy"].T @ s["sxy"])
        mss += rho_h * sw["s"].T @ s["s"]
        ints += W @ s["s"]
    return ks.reshape(J, -1), ms.reshape(J, -1), 0.5 * (kss + kss.T), 0.5 * (mss + mss.T), ints


# ---------------------------------------------------------------------------------------------
# solvers
# ---------------------------------------------------------------------------------------------
def _exact_simply_supported(a, b, rho_h, d, n_modes, extent):
    """All edges simply supported: phi_mn = 2/sqrt(rho h a b) sin(m pi x/a) sin(n pi y/b) (Leissa 1969)."""
    j = np.arange(1, n_modes + 1)
    m, n = np.meshgrid(j, j, indexing="ij")
    omega = np.pi**2 * ((m / a) ** 2 + (n / b) ** 2) * np.sqrt(d / rho_h)
    # Stable sort on (omega, m): degenerate pairs come out in a fixed order.
    order = np.lexsort((m.ravel(), omega.ravel()))[:n_modes]
    mm, nn = m.ravel()[order], n.ravel()[order]
    count = int(max(mm.max(), nn.max()))
    coef = np.zeros((n_modes, count, count))
    coef[np.arange(n_modes), mm - 1, nn - 1] = 2.0 / np.sqrt(rho_h * a * b)
    xmin, xmax, ymin, ymax = extent
    axes = (("sine", xmin, xmax, count), ("sine", ymin, ymax, count))
    return omega.ravel()[order], coef, axes


def _axis_matrices(axis, left, right):
    """Gram matrices of a constrained 1-D basis: E[(p, q)] = integral f^(p) f^(q) dx, physical units."""
    b0 = axis.constrained(left, right)
    nq = axis.degree + 2  # integrands have degree <= 2N: N + 1 Gauss points are exact
    xq, wq = npleg.leggauss(nq)
    half = 0.5 * (axis.hi - axis.lo)
    x = axis.lo + (xq + 1.0) * half
    w = wq * half
    g = axis.basis_values(x, b0)
    e = {(p, q): (g[p] * w[:, None]).T @ g[q] for p in range(3) for q in range(3)}
    return b0, e


def _reduce(a, basic, free, x):
    """T^T A T for T with rows ``free`` = identity and rows ``basic`` = x (the constraint null space)."""
    a_fb = a[np.ix_(free, basic)]
    t = a_fb @ x
    return a[np.ix_(free, free)] + t + t.T + x.T @ a[np.ix_(basic, basic)] @ x


def _ritz(ax, ay, params, n_modes):
    """One Rayleigh-Ritz solve at the axes' degree.

    Returns omega (n_modes,), coef (n_modes, Nx+1, Ny+1) in raw Legendre coefficients, sing
    (n_modes, J) and the integrals of the singular functions (J,).
    """
    edges, supports = params["edges"], params["supports"]
    d = flexural_rigidity(params["thickness"], params["youngs_modulus"], params["poisson_ratio"])
    nu = params["poisson_ratio"]
    rho_h = params["density"] * params["thickness"]
    extent = _extent(params)
    bx, ex = _axis_matrices(ax, edges[0], edges[2])
    by, ey = _axis_matrices(ay, edges[1], edges[3])
    kron = np.kron
    stiff = d * (kron(ex[2, 2], ey[0, 0]) + kron(ex[0, 0], ey[2, 2])
                 + nu * (kron(ex[2, 0], ey[0, 2]) + kron(ex[0, 2], ey[2, 0]))
                 + 2.0 * (1.0 - nu) * kron(ex[1, 1], ey[1, 1]))
    mass = rho_h * kron(ex[0, 0], ey[0, 0])
    npoly = stiff.shape[0]
    sing = _Singular(params)
    J = sing.count
    ints = np.zeros(J)
    couple = np.zeros((J, npoly))      # s_bar = E (s - C f): rows of E @ C, to rebuild modes
    emat = np.zeros((J, J))
    if J:
        ks, ms, kss, mss, ints = _enrichment_matrices(sing, ax, ay, bx, by, d, nu, rho_h, extent)
        # Mass-orthogonalise the singular functions against the (mass-orthonormal up to a
        # constant) tensor basis, then orthonormalise them: the Ritz mass matrix stays diagonal
        # however well the polynomials already approximate r^2 ln r.
        cmat = ms / np.diag(mass)[None, :]                     # (J, npoly)
        m_t = mss - ms @ cmat.T
        k_t = ks - cmat @ stiff
        a_t = kss - ks @ cmat.T - cmat @ ks.T + cmat @ stiff @ cmat.T
        lchol = np.linalg.cholesky(0.5 * (m_t + m_t.T))
        emat = np.linalg.inv(lchol)
        k_b = emat @ k_t
        a_b = emat @ a_t @ emat.T
        stiff = np.block([[stiff, k_b.T], [k_b, a_b]])
        mass = np.block([[mass, np.zeros((npoly, J))], [np.zeros((J, npoly)), np.eye(J)]])
        couple = emat @ cmat
    proj = None
    if supports:
        rows = []
        for x, y, kind, radius in supports:
            if kind == "pinned":
                px, py = np.array([x]), np.array([y])
            else:
                # A clamping disc: w = 0 at its centre and on its rim. 4N + 4 rim points determine
                # the restriction of a degree-(N, N) polynomial to the circle.
                t = np.linspace(0.0, 2.0 * np.pi, 4 * ax.degree + 4, endpoint=False)
                px = np.concatenate([[x], x + radius * np.cos(t)])
                py = np.concatenate([[y], y + radius * np.sin(t)])
            fx = ax.values(px) @ bx
            fy = ay.values(py) @ by
            poly_rows = np.einsum("pi,pj->pij", fx, fy).reshape(len(px), -1)
            if J:
                sv = sing.values(px, py)                        # (p, J)
                sing_rows = (sv - poly_rows @ cmat.T) @ emat.T   # values of s_bar
                poly_rows = np.hstack([poly_rows, sing_rows])
            rows.append(poly_rows)
        c = np.vstack(rows)
        # Eliminate constrained coefficients: pivoted QR of C picks r well-conditioned "basic"
        # columns B, and c_B = X c_N with X = -R_B^-1 R_N spans the null space. Forming
        # T^T K T this way costs O(n^2 r) instead of O(n^3) for an orthonormal null-space basis.
        # Rim harmonics of a small clamping disc that fall below round-off are dropped as void.
        _, r, piv = scipy.linalg.qr(c, mode="economic", pivoting=True)
        diag = np.abs(np.diag(r))
        rank = int(np.sum(diag > 1e-10 * diag[0]))
        basic, free = piv[:rank], piv[rank:]
        x = -scipy.linalg.solve_triangular(r[:rank, :rank], r[:rank, rank:])
        proj = (basic, free, x)
        stiff = _reduce(stiff, basic, free, x)
        mass = _reduce(mass, basic, free, x)
    stiff = 0.5 * (stiff + stiff.T)
    mass = 0.5 * (mass + mass.T)
    if n_modes > stiff.shape[0]:
        raise ActuatorError(f"plate_modes: the Ritz space at degree {ax.degree} has {stiff.shape[0]} functions "
                            f"and cannot give n_modes={n_modes}; raise the degree or ask for fewer modes.")
    # The bisection/inverse-iteration driver is several times faster than the default when only
    # the lowest part of the spectrum is wanted.
    driver = "gvx" if n_modes < stiff.shape[0] // 3 else None
    lam, vec = scipy.linalg.eigh(stiff, mass, subset_by_index=[0, n_modes - 1], driver=driver)
    if proj is not None:
        basic, free, x = proj
        full = np.empty((len(basic) + len(free), vec.shape[1]))
        full[free] = vec
        full[basic] = x @ vec
        vec = full
    beta = vec[npoly:].T                                        # (M, J), coefficients of s_bar
    poly = vec[:npoly].T - beta @ couple                        # s_bar = E s - (E C) f
    poly = poly.reshape(n_modes, bx.shape[1], by.shape[1])
    coef = np.einsum("ik,mkl,jl->mij", bx, poly, by)
    return np.sqrt(np.clip(lam, 0.0, None)), coef, beta @ emat, ints


def _fix_signs(modes):
    """Make each mode's largest sample on a coarse grid positive (a reproducible sign convention)."""
    xmin, xmax, ymin, ymax = modes.extent
    vals = modes.grid(np.linspace(xmin, xmax, 9), np.linspace(ymin, ymax, 9)).reshape(modes.n_modes, -1)
    idx = np.argmax(np.abs(vals) > 0.999 * np.max(np.abs(vals), axis=1, keepdims=True), axis=1)
    sign = np.sign(vals[np.arange(modes.n_modes), idx])
    sign[sign == 0] = 1.0
    return sign


def _rigid_count(edges, supports, extent):
    """Number of rigid-body modes: rigid motions a + b x + c y left free by the edges and supports."""
    xmin, xmax, ymin, ymax = extent
    cx, cy = 0.5 * (xmin + xmax), 0.5 * (ymin + ymax)
    rows = []
    for code, axis, pos in zip(edges, "xyxy", (xmin, ymin, xmax, ymax)):
        if code == "F":
            continue
        if axis == "x":  # w = 0 along x = pos for every y; clamped also w_x = 0
            rows += [[1.0, pos - cx, 0.0], [0.0, 0.0, 1.0]] + ([[0.0, 1.0, 0.0]] if code == "C" else [])
        else:
            rows += [[1.0, 0.0, pos - cy], [0.0, 1.0, 0.0]] + ([[0.0, 0.0, 1.0]] if code == "C" else [])
    for x, y, kind, radius in supports:
        rows.append([1.0, x - cx, y - cy])
        if kind == "clamped":
            rows += [[0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]
    if not rows:
        return 3
    return 3 - int(np.linalg.matrix_rank(np.array(rows) / np.array([1.0, xmax - xmin, ymax - ymin])))


def _error_estimate(changes):
    """Relative error of the last Ritz solve from the history of changes between successive bases.

    With fewer than two changes, the last change itself. Otherwise the geometric tail
    ``d_k r / (1 - r)`` with ratio ``r = d_k / d_(k-1)`` (capped at 0.9 so a stalled, algebraic
    convergence gives a pessimistic estimate rather than a division by zero), and never less than
    the last change: Ritz frequencies fall monotonically to the true values from above.
    """
    if len(changes) < 2 or changes[-2] <= 0:
        return changes[-1]
    r = min(changes[-1] / changes[-2], 0.9)
    return max(changes[-1], changes[-1] * r / (1.0 - r))


def _weyl_count(a, b, rho_h, d, omega):
    """Asymptotic number of plate modes below omega (Weyl law with a perimeter term)."""
    k = (rho_h * omega**2 / d) ** 0.25
    return a * b * k**2 / (4.0 * np.pi) + 2.0 * (a + b) * k / (4.0 * np.pi) + 4.0


def plate_modes(length_x, length_y, thickness, youngs_modulus, poisson_ratio, density, edges="free",
                supports=(), n_modes=None, *, max_frequency=None, center=(0.0, 0.0), tol=None,
                max_degree=44, method="auto", degree=None):
    """Bending modes of a thin rectangular plate (Kirchhoff theory) by Rayleigh-Ritz.

    The Ritz space is a tensor product of Legendre polynomials of degree N in x and in y, each
    one-dimensional basis made orthonormal and meeting its essential edge conditions exactly;
    each pinned support adds its singular function ``r^2 ln r`` (times the edge factor) and is
    imposed as a constraint ``w = 0`` by elimination (null-space projection); a clamped support
    of radius R holds ``w = 0`` on the rim and centre of its disc. Stiffness and mass integrals
    use Gauss-Legendre quadrature (exact for the polynomial part; graded composite rules for
    the singular functions). N starts near ``sqrt(2.5 n_modes) + 6`` and grows in steps of 4
    until the frequencies are converged to ``tol``.

    Parameters
    ----------
    length_x, length_y : float or str
        Side lengths, m (strings with units accepted, e.g. ``"200 mm"``).
    thickness : float or str
        h, m.
    youngs_modulus : float or str
        E, Pa.
    poisson_ratio : float
        nu, dimensionless, -1 < nu < 0.5.
    density : float or str
        rho, kg/m^3.
    edges : str, sequence or dict
        Edge conditions, see :func:`parse_edges` (e.g. ``"free"``, ``"CCCC"``, ``"SCSC"``).
    supports : sequence
        Point supports, see :func:`parse_supports`: ``(x, y)`` pins or
        ``(x, y, "clamped", radius)`` discs, in plate coordinates (m; the plate spans
        ``center -+ length / 2``).
    n_modes : int, optional
        Number of modes, counting rigid-body modes. Give this or ``max_frequency``.
    max_frequency : float, optional
        Hz: return every mode up to this frequency (the count is found by growing it).
    center : (float, float)
        Centre of the plate, m.
    tol : float, optional
        Relative frequency tolerance: the polynomial degree is raised in steps of 4 until the
        estimated relative error of every requested elastic frequency (from the changes between
        successive bases, see ``_error_estimate``) is below ``tol``. Default
        :data:`DEFAULT_TOL` (1e-4), or :data:`DEFAULT_TOL_CLAMPED_DISC` (1e-2) with a clamped
        disc support, whose rim constraint converges only algebraically.
    max_degree : int
        Largest polynomial degree per axis; past it a ``RuntimeWarning`` says the tolerance was
        not met and :attr:`PlateModes.converged` is False.
    method : {"auto", "ritz", "exact"}
        ``"exact"`` (sine modes) needs all edges simply supported and no point supports; ``"auto"``
        uses it whenever it applies.
    degree : int, optional
        Fix the polynomial degree per axis (one Ritz solve, no convergence loop; ``achieved`` is
        then NaN and ``converged`` False). For convergence studies.

    Returns
    -------
    PlateModes

    Raises
    ------
    ActuatorError
        Non-positive dimension or material constant, ``nu`` outside (-1, 0.5), unknown edge code,
        support off the plate, or an impossible request.

    Examples
    --------
    Square plate, all edges simply supported: lambda^2 = 2 pi^2 for the first mode (Leissa 1969).

    >>> m = plate_modes(0.2, 0.2, 1e-3, 69e9, 0.33, 2700.0, edges="simply_supported", n_modes=4)
    >>> [round(float(v) / np.pi**2, 6) for v in m.lambda2]
    [2.0, 5.0, 5.0, 8.0]
    """
    a, b, h, e, nu, rho = _check_material(length_x, length_y, thickness, youngs_modulus,
                                          poisson_ratio, density)
    edges = parse_edges(edges)
    try:
        cx, cy = (to_si(c, "m", "center") for c in center)
    except (TypeError, ValueError):
        raise ActuatorError(f"plate center must be two coordinates in m, got {center!r}.") from None
    extent = (cx - a / 2, cx + a / 2, cy - b / 2, cy + b / 2)
    supports = parse_supports(supports, extent)
    if method not in ("auto", "ritz", "exact"):
        raise ActuatorError(f"plate_modes method must be 'auto', 'ritz' or 'exact', got {method!r}.")
    if tol is None:
        tol = DEFAULT_TOL_CLAMPED_DISC if any(s[2] == "clamped" for s in supports) else DEFAULT_TOL
    if not (isinstance(tol, (int, float)) and 0 < tol < 0.1):
        raise ActuatorError(f"plate_modes tol must be a relative tolerance in (0, 0.1), got {tol!r}.")
    if (n_modes is None) == (max_frequency is None):
        raise ActuatorError("plate_modes: give exactly one of n_modes (a count) and max_frequency (Hz).")
    d = flexural_rigidity(h, e, nu)
    rho_h = rho * h
    params = {"length_x": a, "length_y": b, "thickness": h, "youngs_modulus": e, "poisson_ratio": nu,
              "density": rho, "edges": edges, "supports": supports, "center": (cx, cy)}
    exact_ok = all(c == "S" for c in edges) and not supports
    if method == "exact" and not exact_ok:
        raise ActuatorError("plate_modes method='exact' needs all four edges simply supported and no point supports.")
    use_exact = exact_ok and method in ("auto", "exact")

    if max_frequency is not None:
        fmax = to_si(max_frequency, "Hz", "max_frequency")
        if not fmax > 0:
            raise ActuatorError(f"plate_modes max_frequency must be > 0 Hz, got {max_frequency!r}.")
        count = int(np.ceil(1.2 * _weyl_count(a, b, rho_h, d, 2 * np.pi * fmax))) + 4
        while True:
            res = plate_modes(a, b, h, e, nu, rho, edges, supports, count, center=(cx, cy), tol=tol,
                              max_degree=max_degree, method=method, degree=degree)
            if res.frequencies[-1] > fmax or count > 2000:
                break
            count = int(count * 1.5) + 4
        keep = max(int(np.searchsorted(res.frequencies, fmax, side="right")), 1)
        return PlateModes(res.omega[:keep], res.coef[:keep], res.sing[:keep], params, res.method, res.degree,
                          tol, res.achieved, res.converged, res._axes, res._sing_integrals)

    if not (isinstance(n_modes, (int, np.integer)) and n_modes >= 1):
        raise ActuatorError(f"plate_modes n_modes must be a positive integer, got {n_modes!r}.")
    n_modes = int(n_modes)
    if use_exact:
        omega, coef, axes = _exact_simply_supported(a, b, rho_h, d, n_modes, extent)
        return PlateModes(omega, coef, np.zeros((n_modes, 0)), params, "exact", None, tol, 0.0, True, axes,
                          np.zeros(0))

    n_constraints = sum(1 if s[2] == "pinned" else 3 for s in supports)  # effective, for sizing
    n_rigid = _rigid_count(edges, supports, extent)
    fixed = degree is not None
    if fixed:
        if not (isinstance(degree, (int, np.integer)) and 2 <= degree <= 80):
            raise ActuatorError(f"plate_modes degree must be an integer in [2, 80], got {degree!r}.")
        degree = int(degree)
    else:
        # Start where the Ritz space comfortably holds the modes asked for.
        degree = max(10, int(np.ceil(np.sqrt(2.5 * n_modes + n_constraints))) + 6)
    changes = []
    prev = None
    achieved = np.inf
    while True:
        ax = _LegendreAxis(extent[0], extent[1], degree)
        ay = _LegendreAxis(extent[2], extent[3], degree)
        omega, coef, sing, ints = _ritz(ax, ay, params, n_modes)
        # Rigid-body eigenvalues are round-off (about eps * |K|): they are exact zeros.
        omega[:n_rigid] = 0.0
        if prev is not None:
            el = slice(n_rigid, None)
            changes.append(float(np.max(np.abs(omega[el] - prev[el]) / omega[el])) if n_modes > n_rigid else 0.0)
            achieved = _error_estimate(changes)
            if achieved <= tol:
                break
        if fixed or degree + 4 > max_degree:
            break
        prev = omega
        degree += 4
    if fixed:
        achieved = float("nan")
    converged = achieved <= tol
    if not converged and not fixed:
        warnings.warn(
            f"plate_modes: {n_modes} modes not converged to tol={tol:g} at polynomial degree {degree} "
            f"(estimated relative error {achieved:.2g}); raise max_degree, loosen tol or ask for fewer modes.",
            RuntimeWarning, stacklevel=2,
        )
    axes = (("legendre", extent[0], extent[1], degree + 1), ("legendre", extent[2], extent[3], degree + 1))
    modes = PlateModes(omega, coef, sing, params, "ritz", degree, tol, achieved, converged, axes, ints)
    sign = _fix_signs(modes)
    return PlateModes(omega, coef * sign[:, None, None], sing * sign[:, None], params, "ritz", degree, tol,
                      achieved, converged, axes, ints)
