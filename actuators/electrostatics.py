"""Quasi-static potential of a planar electrode pattern on the chip floor, in the half-space above it.

The chain, each step a plain function or small class over arrays:

1. :class:`ElectrodeLayout` - electrodes as shapely polygons on the floor (``z = 0``), metres, with
   helpers for the common patterns (:func:`pad_array`, :func:`interdigitated`,
   :func:`finger_array`, :func:`quadrupole`).
2. :class:`Grid` and :class:`FloorSolver` - the floor data on a regular grid. **Default model
   (``gap_model="insulating"``):** the bare floor between electrodes is an insulator, so the normal
   field vanishes there (``dphi/dz = 0``) while every electrode holds its voltage - the mixed
   boundary-value problem, solved for the normal field ``E_z`` on the electrodes with the
   half-space single-layer operator (FFT, exact free-space convolution or periodic) by
   preconditioned conjugate gradients. Electrode edges fall inside grid cells (area fractions with
   a fitted Robin blend), so errors are second order in the spacing. Measured against the exact
   conformal-map solution of an infinite interdigitated array (tests/actuators/test_electrostatics.py):
   with 8 spacings across the narrowest strip or gap, ``|E|^2`` and ``d|E|^2/dz`` are within
   0.2-0.4 % at a height of one strip width and 0.1 % far above; with 4 spacings about 1 %
   (a ResolutionWarning from the actuator below that, :func:`resolution_problems`). Isolated
   disc and square plates give their published capacitances to 3e-4 at 24 spacings across.
   **Kept for comparison (``gap_model="linear"``):** electrode nodes hold their voltage and the
   bare floor solves the 2-D Laplace equation in the floor plane (a linear ramp across a straight
   gap, 0 V on the window edge; Shortley-Weller stencils at the outlines). That is not the physics
   of an insulating gap: it overestimates the far-field ``|E|^2`` of an interdigitated array by a
   factor that does not fade with height - 1.13 for equal strips and gaps, 1.44 for strips a third
   of the gap, 1.03 for strips three times the gap - and near the floor by more.
3. :func:`half_space_fields` - the potential above the floor from the half-space Fourier solution
   of Laplace's equation with Dirichlet data on ``z = 0``: ``phi_hat(k, z) = phi_hat_0(k) exp(-|k| z)``,
   on a zero-padded grid (FFT), with gradient and Hessian by spectral differentiation (linear
   model); :func:`normal_field_fields` - the same from Neumann data,
   ``phi_hat(k, z) = E_z_hat(k) exp(-|k| z) / |k|`` (insulating model).
4. :class:`UnitResponses` - one floor solution and one set of height maps per electrode at 1 V
   (superposition holds because every step is linear in the electrode voltages), cached in memory
   and on disk, keyed by a hash of layout, grid, padding, gap model and height.
5. :class:`SplineMaps` - cubic B-spline interpolation of stacks of maps at arbitrary points,
   vectorised over maps and points.

Quasi-statics hold for the drive frequencies of dielectrophoresis (10 kHz-10 MHz): the
wavelength is metres while the chip is millimetres, and a homogeneous medium has the same
Laplace equation for conduction and displacement currents, so the field pattern does not depend
on frequency. Electrode polarisation (the double layer) is not modelled.
"""

from __future__ import annotations

import collections
import hashlib
import json
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np
import scipy.fft
import scipy.sparse as sp
import scipy.sparse.linalg as spla
import shapely
from scipy import ndimage
from shapely.geometry import MultiPolygon, Polygon, box
from shapely.validation import explain_validity

from fieldplan.errors import ActuatorError
from fieldplan.fileio import atomic_open
from fieldplan.units import to_si

__all__ = [
    "ElectrodeLayout",
    "pad_array",
    "interdigitated",
    "finger_array",
    "quadrupole",
    "layout_from_spec",
    "Grid",
    "FloorSolver",
    "resolution_problems",
    "RESOLUTION_SPACINGS",
    "HalfSpaceField",
    "half_space_fields",
    "square_field_gradient",
    "normal_field_fields",
    "UnitResponses",
    "SplineMaps",
    "CacheWarning",
    "clear_memory_cache",
    "GRADIENT_COMPONENTS",
    "HESSIAN_COMPONENTS",
]

#: Order of the gradient components in every ``gradient`` array.
GRADIENT_COMPONENTS = ("x", "y", "z")
#: Order of the (independent) second derivatives in every ``hessian`` array; ``zz = -(xx + yy)``.
HESSIAN_COMPONENTS = ("xx", "xy", "xz", "yy", "yz")

# Bumped whenever the meaning of a cached array changes, so old cache files are never reused.
_SCHEMA = "fieldplan-electrostatics-2"


class CacheWarning(UserWarning):
    """The on-disk cache of unit responses could not be read or written (results are still correct)."""


# ------------------------------------------------------------------------------------------------
# Layouts
# ------------------------------------------------------------------------------------------------
class ElectrodeLayout:
    """Named electrodes on the floor plane ``z = 0``.

    Parameters
    ----------
    electrodes : dict of str to shapely Polygon/MultiPolygon, or sequence of them
        Electrode shapes, coordinates in m. A sequence is named ``e0, e1, ...``.
    names : sequence of str, optional
        Names for a sequence of electrodes.

    Raises
    ------
    ActuatorError
        A shape that is not a polygon, is empty, self-intersecting (invalid) or has zero area;
        two electrodes that overlap or touch (they would short); duplicate or reserved names.

    Examples
    --------
    >>> from shapely.geometry import box
    >>> lay = ElectrodeLayout({"left": box(-60e-6, 0, -10e-6, 50e-6), "right": box(10e-6, 0, 60e-6, 50e-6)})
    >>> lay.names, round(lay.min_gap * 1e6, 6)
    (('left', 'right'), 20.0)
    """

    #: Names an electrode may not take (the actuator uses them for other channels).
    RESERVED = ("frequency",)

    def __init__(self, electrodes, names=None):
        if isinstance(electrodes, dict):
            if names is not None:
                raise ActuatorError("ElectrodeLayout: give names either as dict keys or as names=, not both.")
            names = list(electrodes.keys())
            shapes = list(electrodes.values())
        else:
            shapes = list(electrodes)
            names = [f"e{k}" for k in range(len(shapes))] if names is None else list(names)
        if not shapes:
            raise ActuatorError("ElectrodeLayout: at least one electrode is needed, got none.")
        if len(names) != len(shapes):
            raise ActuatorError(f"ElectrodeLayout: {len(names)} names for {len(shapes)} electrodes.")
        for n in names:
            if not isinstance(n, str) or not n:
                raise ActuatorError(f"ElectrodeLayout: electrode names must be non-empty strings, got {n!r}.")
            if n in self.RESERVED:
                raise ActuatorError(f"ElectrodeLayout: electrode name {n!r} is reserved; choose another.")
        if len(set(names)) != len(names):
            dup = sorted({n for n in names if names.count(n) > 1})
            raise ActuatorError(f"ElectrodeLayout: electrode names must be unique, repeated: {dup}.")
        polys = []
        for n, g in zip(names, shapes):
            if not isinstance(g, (Polygon, MultiPolygon)):
                raise ActuatorError(
                    f"ElectrodeLayout: electrode {n!r} must be a shapely Polygon or MultiPolygon (m), "
                    f"got {type(g).__name__}."
                )
            if g.is_empty or not np.all(np.isfinite(shapely.get_coordinates(g))):
                raise ActuatorError(f"ElectrodeLayout: electrode {n!r} is empty or has non-finite coordinates.")
            if not g.is_valid:
                raise ActuatorError(
                    f"ElectrodeLayout: electrode {n!r} is not a valid polygon ({explain_validity(g)}); "
                    "a self-intersecting outline has no well-defined area - redraw it without crossings."
                )
            if not g.area > 0:
                raise ActuatorError(f"ElectrodeLayout: electrode {n!r} has zero area.")
            polys.append(shapely.normalize(g))
        for i in range(len(polys)):
            for j in range(i + 1, len(polys)):
                a, b = polys[i], polys[j]
                if a.intersects(b):
                    what = "overlap" if a.intersection(b).area > 0 else "touch"
                    raise ActuatorError(
                        f"ElectrodeLayout: electrodes {names[i]!r} and {names[j]!r} {what}; electrodes at "
                        "different voltages must be separated by a gap > 0 (merge them into one "
                        "polygon if they are meant to be one electrode)."
                    )
        self.names = tuple(names)
        self.polygons = tuple(polys)

    def __len__(self):
        return len(self.polygons)

    def __repr__(self):
        return f"ElectrodeLayout({len(self)} electrodes: {', '.join(self.names[:6])}{'...' if len(self) > 6 else ''})"

    def __eq__(self, other):
        return isinstance(other, ElectrodeLayout) and self.key() == other.key()

    def __hash__(self):
        return hash(self.key())

    @property
    def bounds(self):
        """(xmin, ymin, xmax, ymax) of all electrodes, m."""
        return tuple(float(v) for v in shapely.total_bounds(list(self.polygons)))

    @property
    def min_gap(self):
        """Smallest distance between two electrodes, m (``inf`` for a single electrode)."""
        d = self.distances()
        return float(np.min(d[np.triu_indices(len(self), 1)])) if len(self) > 1 else float("inf")

    def distances(self):
        """Pairwise electrode distances, shape (K, K), m (zero on the diagonal)."""
        k = len(self)
        d = np.zeros((k, k))
        for i in range(k):
            d[i, i + 1:] = shapely.distance(self.polygons[i], list(self.polygons[i + 1:]))
        return d + d.T

    def neighbours(self, factor=1.2):
        """Pairs ``(i, j)``, ``i < j``, closer than ``factor`` times the smallest gap of each electrode."""
        d = self.distances()
        k = len(self)
        if k < 2:
            return []
        dd = d + np.diag(np.full(k, np.inf))
        nearest = dd.min(axis=1)
        return [(i, j) for i in range(k) for j in range(i + 1, k)
                if d[i, j] <= factor * min(nearest[i], nearest[j]) * (1 + 1e-9)]

    def key(self):
        """Stable text identifying the geometry (names and normalised WKB), for cache keys."""
        parts = [f"{n}:{shapely.to_wkb(p, hex=True, output_dimension=2)}" for n, p in zip(self.names, self.polygons)]
        return "|".join(parts)

    def index(self, name):
        """Position of electrode ``name`` in :attr:`names`."""
        try:
            return self.names.index(name)
        except ValueError:
            raise ActuatorError(f"no electrode named {name!r}; electrodes are {list(self.names)}.") from None


def _positive_length(name, value):
    v = float(value)
    if not (np.isfinite(v) and v > 0):
        raise ActuatorError(f"{name} must be a finite length > 0 m, got {value!r}.")
    return v


def _count(name, value, minimum=1):
    if isinstance(value, bool) or int(value) != value or int(value) < minimum:
        raise ActuatorError(f"{name} must be an integer >= {minimum}, got {value!r}.")
    return int(value)


def pad_array(rows, cols, pad, gap, center=(0.0, 0.0)):
    """A ``rows x cols`` grid of square pads, each its own electrode.

    Parameters
    ----------
    rows, cols : int
    pad : float
        Pad side, m (10-200 um in practice).
    gap : float
        Edge-to-edge spacing between neighbouring pads, m (5-50 um).
    center : (float, float)
        Centre of the array, m.

    Returns
    -------
    ElectrodeLayout
        Electrodes ``pad_<row>_<col>``, row 0 at the bottom (smallest y), column 0 at the left.

    Examples
    --------
    >>> lay = pad_array(2, 3, 50e-6, 20e-6)
    >>> lay.names[:2], len(lay)
    (('pad_0_0', 'pad_0_1'), 6)
    """
    rows, cols = _count("pad_array rows", rows), _count("pad_array cols", cols)
    pad, gap = _positive_length("pad_array pad", pad), _positive_length("pad_array gap", gap)
    pitch = pad + gap
    x0 = center[0] - (cols * pad + (cols - 1) * gap) / 2
    y0 = center[1] - (rows * pad + (rows - 1) * gap) / 2
    shapes = {}
    for r in range(rows):
        for c in range(cols):
            x, y = x0 + c * pitch, y0 + r * pitch
            shapes[f"pad_{r}_{c}"] = box(x, y, x + pad, y + pad)
    return ElectrodeLayout(shapes)


def finger_array(n_fingers, finger_width, gap, finger_length, center=(0.0, 0.0)):
    """Parallel bars along y, each its own electrode (an addressable finger array).

    Parameters
    ----------
    n_fingers : int
    finger_width, gap, finger_length : float
        m.
    center : (float, float)
        m.

    Returns
    -------
    ElectrodeLayout
        Electrodes ``finger_<k>``, k = 0 at the left.
    """
    n = _count("finger_array n_fingers", n_fingers)
    w = _positive_length("finger_array finger_width", finger_width)
    g = _positive_length("finger_array gap", gap)
    length = _positive_length("finger_array finger_length", finger_length)
    x0 = center[0] - (n * w + (n - 1) * g) / 2
    y0 = center[1] - length / 2
    return ElectrodeLayout({f"finger_{k}": box(x0 + k * (w + g), y0, x0 + k * (w + g) + w, y0 + length)
                            for k in range(n)})


def interdigitated(n_fingers, finger_width, gap, finger_length, bus_width=None, center=(0.0, 0.0)):
    """Two interleaved combs (the classical interdigitated electrode), fingers along y.

    Comb ``comb_a`` has its bus bar at the bottom and fingers 0, 2, 4, ...; ``comb_b`` has its bus
    at the top and fingers 1, 3, .... Each finger tip clears the opposite bus bar by ``gap``.

    Parameters
    ----------
    n_fingers : int
        Total number of fingers, >= 2.
    finger_width, gap, finger_length : float
        m; ``gap`` is both the finger-to-finger spacing and the tip-to-bus clearance.
    bus_width : float, optional
        m; default ``finger_width``.
    center : (float, float)
        Centre of the finger region, m.

    Returns
    -------
    ElectrodeLayout
    """
    n = _count("interdigitated n_fingers", n_fingers, minimum=2)
    w = _positive_length("interdigitated finger_width", finger_width)
    g = _positive_length("interdigitated gap", gap)
    length = _positive_length("interdigitated finger_length", finger_length)
    bw = w if bus_width is None else _positive_length("interdigitated bus_width", bus_width)
    span = n * w + (n - 1) * g
    x0 = center[0] - span / 2
    ybot = center[1] - (length + g) / 2       # fingers of comb a run from here up to ybot + length
    ytop = ybot + length + g                  # fingers of comb b run from ytop - length up to here
    a = [box(x0, ybot - bw, x0 + span, ybot)]
    b = [box(x0, ytop, x0 + span, ytop + bw)]
    for k in range(n):
        x = x0 + k * (w + g)
        if k % 2 == 0:
            a.append(box(x, ybot - bw / 2, x + w, ybot + length))
        else:
            b.append(box(x, ytop - length, x + w, ytop + bw / 2))
    return ElectrodeLayout({"comb_a": shapely.unary_union(a), "comb_b": shapely.unary_union(b)})


def quadrupole(centre_gap, arm_length, center=(0.0, 0.0)):
    """Four wedge electrodes around a centre (east, north, west, south), a classical DEP trap.

    Each electrode is a right-angled wedge with its tip on an axis at ``centre_gap / 2`` from the
    centre; neighbouring wedges have parallel edges ``centre_gap / sqrt(2)`` apart. Wedge tips
    approximate the hyperbolic tips of a polynomial quadrupole near the centre.

    Parameters
    ----------
    centre_gap : float
        Distance between opposite tips, m.
    arm_length : float
        Radial extent of each wedge beyond its tip, m.
    center : (float, float)
        m.

    Returns
    -------
    ElectrodeLayout
        Electrodes ``quad_e``, ``quad_n``, ``quad_w``, ``quad_s``.
    """
    r0 = _positive_length("quadrupole centre_gap", centre_gap) / 2
    L = _positive_length("quadrupole arm_length", arm_length)
    cx, cy = center
    east = Polygon([(r0, 0.0), (r0 + L, L), (r0 + L, -L)])
    shapes = {}
    for name, angle in (("quad_e", 0), ("quad_n", 90), ("quad_w", 180), ("quad_s", 270)):
        g = shapely.affinity.rotate(east, angle, origin=(0, 0))
        shapes[name] = shapely.affinity.translate(g, cx, cy)
    return ElectrodeLayout(shapes)


_SPEC_BUILDERS = {"pad_array": pad_array, "interdigitated": interdigitated, "finger_array": finger_array,
                  "quadrupole": quadrupole}


def layout_from_spec(spec):
    """Build a layout from plain data (scenario files): ``{"pad_array": {"rows": 4, ...}}``.

    Parameters
    ----------
    spec : ElectrodeLayout or dict
        Either one key among ``pad_array``, ``interdigitated``, ``finger_array``, ``quadrupole``
        mapping to that helper's keyword arguments (lengths as SI numbers or unit strings), or
        ``{"electrodes": {name: [[x, y], ...], ...}}`` with polygon vertices in m.

    Examples
    --------
    >>> len(layout_from_spec({"pad_array": {"rows": 2, "cols": 2, "pad": "50 um", "gap": "20 um"}}))
    4
    """
    if isinstance(spec, ElectrodeLayout):
        return spec
    if not isinstance(spec, dict) or len(spec) != 1:
        raise ActuatorError(
            f"layout spec must be a dict with exactly one key among {sorted(_SPEC_BUILDERS) + ['electrodes']}, "
            f"got {spec!r}."
        )
    (kind, args), = spec.items()
    if kind == "electrodes":
        if not isinstance(args, dict):
            raise ActuatorError("layout spec 'electrodes' must map names to vertex lists [[x, y], ...] in m.")
        shapes = {}
        for n, pts in args.items():
            try:
                shapes[n] = Polygon(np.asarray(pts, dtype=float))
            except (ValueError, TypeError) as exc:
                raise ActuatorError(
                    f"layout spec electrode {n!r}: vertices must be [[x, y], ...] in m ({exc})."
                ) from None
        return ElectrodeLayout(shapes)
    if kind not in _SPEC_BUILDERS:
        raise ActuatorError(f"unknown layout kind {kind!r}; known: {sorted(_SPEC_BUILDERS) + ['electrodes']}.")
    import inspect

    params = inspect.signature(_SPEC_BUILDERS[kind]).parameters
    unknown = set(args) - set(params)
    if unknown:
        raise ActuatorError(f"layout spec {kind}: unknown keys {sorted(unknown)}; allowed: {list(params)}.")
    kw = {}
    for k, v in args.items():
        if k in ("rows", "cols", "n_fingers"):
            kw[k] = v
        elif k == "center":
            kw[k] = tuple(to_si(c, "m", f"{kind}.center") for c in v)
        else:
            kw[k] = to_si(v, "m", f"{kind}.{k}")
    return _SPEC_BUILDERS[kind](**kw)


# ------------------------------------------------------------------------------------------------
# Grid and floor potential
# ------------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Grid:
    """Regular grid of floor nodes ``x_i = xmin + i dx``, ``y_j = ymin + j dy``.

    Parameters
    ----------
    xmin, ymin : float
        m, position of node (0, 0).
    dx, dy : float
        Node spacing, m.
    nx, ny : int
        Number of nodes.
    periodic : bool
        If True the window is one period of an infinite pattern (period ``nx dx`` by ``ny dy``);
        otherwise the floor outside the window is at 0 V.
    """

    xmin: float
    ymin: float
    dx: float
    dy: float
    nx: int
    ny: int
    periodic: bool = False

    def __post_init__(self):
        for k in ("dx", "dy"):
            _positive_length(f"Grid {k}", getattr(self, k))
        for k in ("nx", "ny"):
            _count(f"Grid {k}", getattr(self, k), minimum=4)
        for k in ("xmin", "ymin", "dx", "dy"):
            object.__setattr__(self, k, float(getattr(self, k)))
        object.__setattr__(self, "nx", int(self.nx))
        object.__setattr__(self, "ny", int(self.ny))
        object.__setattr__(self, "periodic", bool(self.periodic))

    @classmethod
    def around(cls, layout, points=128, margin=None):
        """A square-spaced grid covering ``layout`` plus ``margin`` on every side.

        Parameters
        ----------
        layout : ElectrodeLayout
        points : int
            Nodes along the longer side of the window.
        margin : float, optional
            Bare floor between the electrodes and the window edge, m. Default a quarter of the
            layout's larger side. The insulating gap model treats the floor beyond the window as
            insulating too (the margin only bounds where maps exist); the linear model holds the
            window edge at 0 V, and the field near the outer electrodes then depends little on it.
        """
        points = _count("grid points", points, minimum=8)
        x0, y0, x1, y1 = layout.bounds
        span = max(x1 - x0, y1 - y0)
        m = 0.25 * span if margin is None else float(margin)
        if not (np.isfinite(m) and m >= 0):
            raise ActuatorError(f"grid margin must be a finite length >= 0 m, got {margin!r}.")
        x0, y0, x1, y1 = x0 - m, y0 - m, x1 + m, y1 + m
        h = max(x1 - x0, y1 - y0) / (points - 1)
        nx = int(np.ceil((x1 - x0) / h - 1e-9)) + 1
        ny = int(np.ceil((y1 - y0) / h - 1e-9)) + 1
        # Centre the node lattice on the padded bounds.
        xs = 0.5 * (x0 + x1) - 0.5 * (nx - 1) * h
        ys = 0.5 * (y0 + y1) - 0.5 * (ny - 1) * h
        return cls(xs, ys, h, h, max(nx, 4), max(ny, 4), False)

    @classmethod
    def cell(cls, extent, nx, ny):
        """A periodic grid whose window ``(xmin, xmax, ymin, ymax)`` is one period."""
        x0, x1, y0, y1 = (float(v) for v in extent)
        if not (x1 > x0 and y1 > y0):
            raise ActuatorError(f"periodic cell extent must have xmax > xmin and ymax > ymin, got {extent}.")
        return cls(x0, y0, (x1 - x0) / nx, (y1 - y0) / ny, nx, ny, True)

    @property
    def x(self):
        """Node x coordinates, shape (nx,), m."""
        return self.xmin + self.dx * np.arange(self.nx)

    @property
    def y(self):
        """Node y coordinates, shape (ny,), m."""
        return self.ymin + self.dy * np.arange(self.ny)

    @property
    def shape(self):
        """(ny, nx): arrays on the grid are indexed ``[j, i]`` (y first)."""
        return (self.ny, self.nx)

    @property
    def spacing(self):
        """(dx, dy), m."""
        return (self.dx, self.dy)

    @property
    def extent(self):
        """(xmin, xmax, ymin, ymax) of the region where maps are defined, m."""
        if self.periodic:
            return (self.xmin, self.xmin + self.nx * self.dx, self.ymin, self.ymin + self.ny * self.dy)
        return (self.xmin, self.xmin + (self.nx - 1) * self.dx, self.ymin, self.ymin + (self.ny - 1) * self.dy)

    def key(self):
        """Stable text identifying the grid, for cache keys."""
        return json.dumps([repr(self.xmin), repr(self.ymin), repr(self.dx), repr(self.dy), self.nx, self.ny,
                           self.periodic])


class FloorSolver:
    """Floor data of a layout on a grid, linear in the electrode voltages.

    Two models of the bare floor between electrodes (``gap_model``):

    ``"insulating"`` (default, the physical one)
        The floor between electrodes is an insulator under a conducting (or much higher
        permittivity) medium: no normal field there, ``dphi/dz = 0``, while each electrode holds its
        voltage - the mixed boundary-value problem. The unknown is the normal field on the
        electrodes, ``E_z = -dphi/dz`` at ``z = 0`` (V/m; proportional to the surface charge), and the
        floor potential is its single-layer potential ``phi_0 = S E_z`` with ``S`` the operator of
        multiplier ``1/|k|`` (half-space Green's function ``1 / (2 pi r)``). ``S`` is applied by FFT:
        on a periodic grid as the periodic spectral operator (zero mean normal field per period,
        the floating average potential is solved for); otherwise in free space (0 V at infinity,
        net charge allowed), by a convolution on the doubled bounding box of the electrodes (the
        solve needs the potential on the electrodes only) whose kernel is the point-sampled
        Green's function lifted to ``z0 = 3`` spacings plus the spectral remainder
        ``(1 - exp(-|k| z0)) / |k|`` (so it equals the band-limited ``1/|k|`` of the periodic case
        up to the aliasing of the sampled part, below ``exp(-pi z0 / h)`` = 8e-5 relative at the
        Nyquist wavenumber and far less below it). The symmetric positive-definite
        system ``(S + D) E_z = V`` on the covered nodes is solved by preconditioned conjugate
        gradients (preconditioner: the inverse operator ``|k|`` restricted to the covered nodes,
        with a diagonal scaling for the partially covered ones),
        stopped when the residual of every right-hand side is below :attr:`TOLERANCE` times its
        norm; no convergence within :attr:`MAX_ITERATIONS` raises.

    ``"linear"`` (the earlier approximation, kept for comparison)
        Electrode nodes hold their voltage and the bare floor solves the 2-D Laplace equation in the
        floor plane (a linear ramp across a straight gap) with 0 V on the window edge. Against the
        exact periodic solution this overestimates the far-field ``|E|^2`` of an interdigitated
        array by a factor that does not fade with height (about 1.13 for equal widths and gaps).
        Nodes inside an outline hold its voltage; the free nodes next to it use the distance to the
        outline along the grid line (Shortley-Weller stencil), so edges between nodes keep the
        error second order.

    Partial cells (insulating model). Each node owns the cell of one spacing around it; the
    fraction ``f`` of that cell covered by the electrode (its outline moved outward by
    :attr:`EDGE_SHIFT` spacings) decides its condition: ``f = 1`` holds the voltage,
    ``0 < f < 1`` holds it through a Robin blend ``phi_i + BLEND h (1 - f) / f * E_z,i = V``
    (``h = sqrt(dx dy)``; the constants were fitted on square cells)
    (the diagonal ``D``), ``f = 0`` is bare floor. The edge then moves continuously with the true
    outline instead of jumping by a node. The two constants were fitted once on the lattice
    problem of a straight edge (a periodic array of equal strips and gaps at 8 sub-cell offsets,
    64-512 nodes per period, against the exact conformal-map solution): with them the largest
    error of the far-field ``|E|^2`` of that array over 8 edge positions falls from first order
    (node snapping: 3e-2 at 64 and 3.5e-3 at 512 nodes per period) to 9e-4 at 64, 1.4e-4 at 128 and
    2e-5 at 512, and hardly depends on where the edge sits in its cell. Oblique edges and corners
    use the same area fractions (not separately fitted; the disc and square-plate capacitances in
    the tests check them).

    Parameters
    ----------
    layout : ElectrodeLayout
    grid : Grid
    gap_model : {"insulating", "linear"}
        Boundary condition on the bare floor (see above).

    Attributes
    ----------
    labels : ndarray of int, shape (ny, nx)
        Electrode index of each node, -1 on bare floor (insulating model: every node whose cell
        the electrode covers in part).
    coverage : ndarray, shape (ny, nx)
        Covered fraction of each node's cell (0 or 1 in the linear model).
    iterations : int or None
        Conjugate-gradient iterations of the last insulating solve.

    Raises
    ------
    ActuatorError
        An electrode covers too little of the grid (grid too coarse), two electrodes claim the
        same grid cell (gap below about one spacing), or (non-periodic) an electrode reaches outside
        the grid window.
    """

    GAP_MODELS = ("insulating", "linear")
    #: Robin blend constant of partially covered cells (fitted, see the class docstring).
    BLEND = 0.85
    #: Outward shift of electrode outlines before the area fractions are taken, in spacings (fitted).
    EDGE_SHIFT = 0.19
    #: Cells covered less than this are treated as bare floor (their Robin term would be huge).
    MIN_FRACTION = 0.01
    #: Relative residual at which the conjugate-gradient solve stops.
    TOLERANCE = 1e-9
    MAX_ITERATIONS = 3000

    def __init__(self, layout, grid, gap_model="insulating"):
        if gap_model not in self.GAP_MODELS:
            raise ActuatorError(f"gap_model must be one of {list(self.GAP_MODELS)}, got {gap_model!r}.")
        self.layout = layout
        self.grid = grid
        self.gap_model = gap_model
        self.matrix = self.coupling = None
        self.iterations = None
        self._lu = None
        self._b = None
        self._kernel = None
        if gap_model == "linear":
            self.labels = self._rasterise()
            self.coverage = (self.labels >= 0).astype(float)
        else:
            self.labels, self.coverage = self._cover()

    def _cover(self):
        """Per node: the electrode whose (shifted) outline covers part of its cell, and the fraction."""
        g = self.grid
        labels = np.full(g.shape, -1, dtype=np.int32)
        frac = np.zeros(g.shape)
        h = float(np.sqrt(g.dx * g.dy))
        x0, x1, y0, y1 = g.extent
        eps = 1e-6 * min(g.dx, g.dy)
        window = box(x0 - eps, y0 - eps, x1 + eps, y1 + eps)
        px, py = g.nx * g.dx, g.ny * g.dy
        half = 0.5 * np.hypot(g.dx, g.dy)
        if self.layout.min_gap < max(g.dx, g.dy):
            i, j = np.unravel_index(np.argmin(self.layout.distances() + np.diag(np.full(len(self.layout), np.inf))),
                                    (len(self.layout),) * 2)
            raise ActuatorError(
                f"electrodes {self.layout.names[i]!r} and {self.layout.names[j]!r} are {self.layout.min_gap:.3g} m "
                f"apart, less than the grid spacing {max(g.dx, g.dy):.3g} m: the gap is not resolved; refine the "
                "grid (more points) to at least a few nodes per gap."
            )
        for k, (name, poly) in enumerate(zip(self.layout.names, self.layout.polygons)):
            if not g.periodic and not window.contains(poly):
                raise ActuatorError(
                    f"electrode {name!r} reaches outside the grid window {tuple(round(v, 9) for v in g.extent)} m; "
                    "enlarge the grid (margin) so every electrode lies inside it."
                )
            shape = poly.buffer(self.EDGE_SHIFT * h, join_style="mitre")
            if g.periodic:
                # Wrap parts that lie outside the periodic cell back into it.
                shape = shapely.unary_union([shapely.affinity.translate(shape, a * px, b * py)
                                             for a in (-1, 0, 1) for b in (-1, 0, 1)])
            bx0, by0, bx1, by1 = shape.bounds
            i0 = max(int(np.floor((bx0 - g.xmin) / g.dx)) - 1, 0)
            i1 = min(int(np.ceil((bx1 - g.xmin) / g.dx)) + 2, g.nx)
            j0 = max(int(np.floor((by0 - g.ymin) / g.dy)) - 1, 0)
            j1 = min(int(np.ceil((by1 - g.ymin) / g.dy)) + 2, g.ny)
            if i1 <= i0 or j1 <= j0:
                continue
            X, Y = np.meshgrid(g.x[i0:i1], g.y[j0:j1])
            shapely.prepare(shape)
            f = shapely.contains_xy(shape, X, Y).astype(float)
            near = shapely.distance(shape.boundary, shapely.points(X, Y)) < half * (1 + 1e-9)
            if np.any(near):
                cells = shapely.box(X[near] - g.dx / 2, Y[near] - g.dy / 2, X[near] + g.dx / 2, Y[near] + g.dy / 2)
                f[near] = np.clip(shapely.area(shapely.intersection(cells, shape)) / (g.dx * g.dy), 0.0, 1.0)
            f[f < self.MIN_FRACTION] = 0.0
            if f.sum() < 1.0:
                raise ActuatorError(
                    f"electrode {name!r} covers less than one grid cell (grid spacing {g.dx:.3g} m); refine "
                    "the grid so that every electrode spans at least a few nodes."
                )
            sub_lab, sub_frac = labels[j0:j1, i0:i1], frac[j0:j1, i0:i1]
            clash = (f > 0) & (sub_lab >= 0)
            if np.any(clash):
                other = self.layout.names[int(sub_lab[clash][0])]
                raise ActuatorError(
                    f"electrodes {other!r} and {name!r} share a grid cell: their gap is not resolved by the grid "
                    f"spacing {g.dx:.3g} m; refine the grid (more points) to at least a few nodes per gap."
                )
            sub_lab[f > 0] = k
            sub_frac[f > 0] = f[f > 0]
        return labels, frac

    def _rasterise(self):
        """Linear gap model: nodes covered by an electrode (boundary included) hold its voltage."""
        g = self.grid
        X, Y = np.meshgrid(g.x, g.y)
        labels = np.full(g.shape, -1, dtype=np.int32)
        count = np.zeros(g.shape, dtype=np.int32)
        self._shapes = []
        # A node exactly on an electrode edge belongs to it; the tiny buffer absorbs float round-off.
        eps = 1e-6 * min(g.dx, g.dy)
        x0, x1, y0, y1 = g.extent
        window = box(x0 - eps, y0 - eps, x1 + eps, y1 + eps)
        for k, (name, poly) in enumerate(zip(self.layout.names, self.layout.polygons)):
            if not g.periodic and not window.contains(poly):
                raise ActuatorError(
                    f"electrode {name!r} reaches outside the grid window {tuple(round(v, 9) for v in g.extent)} m; "
                    "enlarge the grid (margin) so every electrode lies inside it."
                )
            shape = poly.buffer(eps)
            if g.periodic:
                # Wrap parts that lie outside the periodic cell back into it.
                px, py = g.nx * g.dx, g.ny * g.dy
                shape = shapely.unary_union([shapely.affinity.translate(shape, a * px, b * py)
                                             for a in (-1, 0, 1) for b in (-1, 0, 1)])
            shapely.prepare(shape)
            self._shapes.append(shape)
            m = shapely.intersects_xy(shape, X, Y)
            if not m.any():
                raise ActuatorError(
                    f"electrode {name!r} covers no grid node (grid spacing {g.dx:.3g} m); refine the grid "
                    "so that every electrode spans at least a few nodes."
                )
            labels[m] = k
            count += m
        if np.any(count > 1):
            raise ActuatorError(
                "two electrodes claim the same grid node: their gap is below the grid spacing "
                f"({g.dx:.3g} m); refine the grid."
            )
        # Neighbouring nodes on two different electrodes leave no gap node between them: the gap
        # would be modelled as one grid spacing wide whatever its true width.
        for a, b in ((labels[:, 1:], labels[:, :-1]), (labels[1:, :], labels[:-1, :])):
            clash = (a >= 0) & (b >= 0) & (a != b)
            if np.any(clash):
                k1, k2 = int(a[clash][0]), int(b[clash][0])
                raise ActuatorError(
                    f"electrodes {self.layout.names[k1]!r} and {self.layout.names[k2]!r} sit on neighbouring grid "
                    f"nodes with no gap node between them: their gap is not resolved by the grid spacing "
                    f"{g.dx:.3g} m; refine the grid (more points) to at least a few nodes per gap."
                )
        return labels

    def assemble(self):
        """Build the gap Laplacian :attr:`matrix` (free x free nodes) and :attr:`coupling` (free nodes x K).

        Linear model. Next to an electrode the 5-point stencil uses the true distance to the
        electrode's outline along the grid line (Shortley-Weller: arms ``h+`` and ``h-``, weights
        ``2 / (h+- (h+ + h-))``), so the edge sits where the outline is, not on the nearest node.
        """
        g = self.grid
        ny, nx = g.shape
        lab = self.labels.ravel()
        free = lab < 0
        nfree = int(free.sum())
        index = np.full(lab.size, -1, dtype=np.int64)
        index[free] = np.arange(nfree)
        jj, ii = np.divmod(np.arange(lab.size), nx)
        rows, cols, vals = [], [], []
        brow, bcol, bval = [], [], []
        fnode = np.flatnonzero(free)
        fi, fj = ii[fnode], jj[fnode]
        px, py = g.xmin + fi * g.dx, g.ymin + fj * g.dy
        diag = np.zeros(nfree)
        for axis, step in ((0, g.dx), (1, g.dy)):
            arms, kinds = [], []
            for sign in (1, -1):
                di, dj = (sign, 0) if axis == 0 else (0, sign)
                ni, nj = fi + di, fj + dj
                if g.periodic:
                    ni, nj = ni % nx, nj % ny
                    inside = np.ones(nfree, dtype=bool)
                else:
                    # Outside the window the floor is at 0 V: the neighbour contributes nothing.
                    inside = (ni >= 0) & (ni < nx) & (nj >= 0) & (nj < ny)
                nb = np.where(inside, nj * nx + ni, 0)
                nb_lab = np.where(inside, lab[nb], -2)
                arm = np.full(nfree, step)
                for k in np.unique(nb_lab[nb_lab >= 0]):
                    sel = np.flatnonzero(nb_lab == k)
                    qx, qy = px[sel] + di * g.dx, py[sel] + dj * g.dy
                    seg = shapely.linestrings(np.stack([np.column_stack([px[sel], py[sel]]),
                                                        np.column_stack([qx, qy])], axis=1))
                    cut = shapely.intersection(seg, self._shapes[k])
                    d = shapely.distance(shapely.points(px[sel], py[sel]), cut)
                    d = np.where(np.isfinite(d), d, step)
                    # the outline never sits on a free node (that node would be an electrode node)
                    arm[sel] = np.clip(d, 1e-3 * step, step)
                arms.append(arm)
                kinds.append((inside, nb, nb_lab))
            total = arms[0] + arms[1]
            for arm, (inside, nb, nb_lab) in zip(arms, kinds):
                w = 2.0 / (arm * total)
                diag -= w
                unk = inside & (nb_lab == -1)
                rows.append(index[fnode[unk]])
                cols.append(index[nb[unk]])
                vals.append(w[unk])
                ele = inside & (nb_lab >= 0)
                brow.append(index[fnode[ele]])
                bcol.append(nb_lab[ele])
                bval.append(w[ele])
        rows.append(np.arange(nfree))
        cols.append(np.arange(nfree))
        vals.append(diag)
        A = sp.csc_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                          shape=(nfree, nfree))
        B = sp.csr_matrix((np.concatenate(bval), (np.concatenate(brow), np.concatenate(bcol))),
                          shape=(nfree, len(self.layout)))
        self._free = free
        self.matrix, self.coupling = A, B

    def _factorise(self):
        if self.matrix is None:
            self.assemble()
        self._b = self.coupling
        self._lu = spla.splu(self.matrix) if self.matrix.shape[0] else None

    # -- insulating gaps: mixed boundary-value problem --------------------------------------------
    def _prepare_insulating(self):
        g = self.grid
        lab = self.labels.ravel()
        self._act = np.flatnonzero(lab >= 0)
        self._act_label = lab[self._act]
        f = self.coverage.ravel()[self._act]
        h = float(np.sqrt(g.dx * g.dy))
        self._diag = self.BLEND * h * (1.0 - f) / f
        self._kernel = _single_layer_multipliers(g, 0.0, "potential")[0]
        # The solve only needs the potential on the covered nodes: in free space it runs on the
        # bounding box of the electrodes (its doubled grid), not on the whole window with its margin.
        if g.periodic:
            sub, (j0, i0) = g, (0, 0)
        else:
            jj, ii = np.divmod(self._act, g.nx)
            j0, j1 = _span(jj.min(), jj.max() + 1, g.ny)
            i0, i1 = _span(ii.min(), ii.max() + 1, g.nx)
            sub = Grid(g.xmin + i0 * g.dx, g.ymin + j0 * g.dy, g.dx, g.dy, i1 - i0, j1 - j0, False)
        self._sub = sub
        self._act_sub = (jj - j0) * sub.nx + (ii - i0) if not g.periodic else self._act
        self._sub_kernel = self._kernel if g.periodic else _single_layer_multipliers(sub, 0.0, "potential")[0]
        # Preconditioner: the inverse operator |k|, on the box only (periodic there, cheaper than
        # the doubled grid; an approximate inverse is all a preconditioner needs) ...
        # The mean mode gets the lowest nonzero wavenumber instead of 0, so the preconditioner stays
        # definite when an electrode fills the whole box.
        K = _wavenumbers(sub.shape, sub.spacing)[-1]
        self._precond = np.where(K > 0, K, np.min(K[K > 0]))
        # ... scaled symmetrically by sqrt(S_ii / (S_ii + D_ii)), so that the large Robin terms of
        # nearly bare cells do not spoil it (cuts the iterations about fourfold on pad arrays).
        s_self = float(scipy.fft.irfft2(self._sub_kernel, s=_solve_shape(sub))[0, 0])
        self._scale = np.sqrt(s_self / (s_self + self._diag))

    def _apply(self, x, mult, shape=None):
        """``R F^-1 mult F R^T x`` for x of shape (M, m) on the covered nodes (solve box)."""
        g = self._sub
        full = np.zeros((x.shape[0], g.ny * g.nx))
        full[:, self._act_sub] = x
        out = _convolve(full.reshape(-1, g.ny, g.nx), mult, _solve_shape(g) if shape is None else shape)
        return out.reshape(x.shape[0], -1)[:, self._act_sub]

    def _solve_insulating(self, v):
        """Normal field on the covered nodes, shape (M, m) V/m, and the floating potential (M,) V."""
        if self._kernel is None:
            self._prepare_insulating()
        b = v[:, self._act_label]
        periodic = self.grid.periodic
        if periodic:
            def proj(x):
                return x - x.mean(axis=1, keepdims=True)
        else:
            def proj(x):
                return x

        def A(x):
            return proj(self._apply(proj(x), self._sub_kernel) + self._diag * proj(x))

        def M(r):
            return proj(self._scale * self._apply(self._scale * proj(r), self._precond, self._sub.shape))

        x, self.iterations = _block_pcg(A, M, proj(b), self.TOLERANCE, self.MAX_ITERATIONS)
        c = (b - self._apply(x, self._sub_kernel) - self._diag * x).mean(axis=1) if periodic else np.zeros(len(v))
        return x, c

    def _voltages(self, voltages):
        v = np.asarray(voltages, dtype=float)
        single = v.ndim == 1
        v = np.atleast_2d(v)
        if v.ndim != 2 or v.shape[1] != len(self.layout):
            raise ActuatorError(f"voltages must have shape (K,) or (M, K) with K = {len(self.layout)}, got {v.shape}.")
        if not np.all(np.isfinite(v)):
            raise ActuatorError("voltages must be finite numbers (V).")
        return v, single

    def normal_field(self, voltages):
        """Normal field ``E_z = -dphi/dz`` on the floor for electrode voltages (insulating model).

        It is zero on the bare floor and proportional to the surface charge on the electrodes
        (``epsilon E_z``); the field above the floor follows from it alone (:func:`normal_field_fields`).

        Parameters
        ----------
        voltages : array_like, shape (K,) or (M, K)
            V, one per electrode (layout order).

        Returns
        -------
        ndarray, shape (ny, nx) or (M, ny, nx)
            V/m on the grid nodes.
        """
        if self.gap_model != "insulating":
            raise ActuatorError("normal_field needs gap_model='insulating' (the linear model has no floor charge).")
        v, single = self._voltages(voltages)
        x, _ = self._solve_insulating(v)
        out = np.zeros((len(v), self.grid.ny * self.grid.nx))
        out[:, self._act] = x
        out = out.reshape((len(v),) + self.grid.shape)
        return out[0] if single else out

    def unit_normal_fields(self):
        """Normal field of each electrode at 1 V with all others at 0 V, shape (K, ny, nx), V/m per V."""
        return self.normal_field(np.eye(len(self.layout)))

    def potential_of(self, normal_field, voltages):
        """Floor potential (V) of a normal field from :meth:`normal_field` with its voltages.

        On a periodic grid the floating average potential is recovered from the voltages.
        """
        ez = np.asarray(normal_field, dtype=float)
        v, single = self._voltages(voltages)
        ez = ez.reshape((len(v), -1))
        if self._kernel is None:
            self._prepare_insulating()
        g = self.grid
        phi = _convolve(ez.reshape(-1, g.ny, g.nx), self._kernel, _solve_shape(g)).reshape(len(v), -1)
        if g.periodic:
            x = ez[:, self._act]
            phi += (v[:, self._act_label] - phi[:, self._act] - self._diag * x).mean(axis=1, keepdims=True)
        phi = phi.reshape((len(v),) + g.shape)
        return phi[0] if single else phi

    def fields(self, voltages, z, pad=1):
        """Gradient and Hessian of the potential at height ``z`` for electrode voltages.

        Parameters
        ----------
        voltages : array_like, shape (K,) or (M, K)
            V.
        z : float
            Height above the floor, m.
        pad : int
            FFT zero padding of the linear model (the insulating model is exact in free space).

        Returns
        -------
        HalfSpaceField
            ``gradient`` (..., 3, ny, nx) V/m and ``hessian`` (..., 5, ny, nx) V/m^2.
        """
        if self.gap_model == "insulating":
            return normal_field_fields(self.normal_field(voltages), self.grid, z)
        return half_space_fields(self.solve(voltages), self.grid.spacing, z, pad=0 if self.grid.periodic else pad)

    # -- both models -------------------------------------------------------------------------------
    def solve(self, voltages):
        """Floor potential for electrode voltages.

        Parameters
        ----------
        voltages : array_like, shape (K,) or (M, K)
            V, one per electrode (layout order).

        Returns
        -------
        ndarray, shape (ny, nx) or (M, ny, nx)
            V on the grid nodes.
        """
        v, single = self._voltages(voltages)
        if self.gap_model == "insulating":
            x, _ = self._solve_insulating(v)
            ez = np.zeros((len(v), self.grid.ny * self.grid.nx))
            ez[:, self._act] = x
            phi = self.potential_of(ez.reshape((len(v),) + self.grid.shape), v)
            return phi[0] if single else phi
        if self._b is None:
            self._factorise()
        lab = self.labels.ravel()
        out = np.zeros((len(v), lab.size))
        ele = lab >= 0
        out[:, ele] = v[:, lab[ele]]
        if self._lu is not None:
            rhs = -(self._b @ v.T)
            out[:, self._free] = np.asarray(self._lu.solve(np.ascontiguousarray(rhs))).reshape(-1, len(v)).T
        out = out.reshape((len(v),) + self.grid.shape)
        return out[0] if single else out

    def unit_responses(self):
        """Floor potential of each electrode at 1 V with all others at 0 V, shape (K, ny, nx), V."""
        return self.solve(np.eye(len(self.layout)))


def _span(lo, hi, n, minimum=4):
    """Index range ``[lo, hi)`` widened to at least ``minimum`` inside ``[0, n)``."""
    while hi - lo < minimum:
        lo, hi = max(lo - 1, 0), min(hi + 1, n)
    return int(lo), int(hi)


def _block_pcg(A, M, b, tol, maxiter):
    """Preconditioned conjugate gradients for several right-hand sides at once (rows of ``b``).

    ``A`` and ``M`` map arrays of shape (R, m) to (R, m), symmetric positive definite on the
    subspace the iterates live in. Stops when ``|r| <= tol |b|`` for every row; raises otherwise.
    Returns the solution and the number of iterations.
    """
    x = np.zeros_like(b)
    r = b.copy()
    bn = np.linalg.norm(b, axis=1)
    done = bn == 0
    z = M(r)
    p = z.copy()
    rz = np.sum(r * z, axis=1)
    for it in range(1, maxiter + 1):
        Ap = A(p)
        pAp = np.sum(p * Ap, axis=1)
        alpha = np.where(done | (pAp <= 0), 0.0, rz / np.where(pAp > 0, pAp, 1.0))
        x += alpha[:, None] * p
        r -= alpha[:, None] * Ap
        done |= np.linalg.norm(r, axis=1) <= tol * bn
        if np.all(done):
            return x, it
        z = M(r)
        rz_new = np.sum(r * z, axis=1)
        beta = np.where(done, 0.0, rz_new / np.where(rz != 0, rz, 1.0))
        p = z + beta[:, None] * p
        rz = rz_new
    worst = float(np.max(np.linalg.norm(r, axis=1) / np.where(bn > 0, bn, 1.0)))
    raise ActuatorError(f"floor solve did not converge in {maxiter} iterations (relative residual {worst:.2e}); "
                        "the grid may be too coarse or the layout degenerate.")


def _convolve(data, mult, shape):
    """``irfft2(rfft2(data, s=shape) * mult)`` cropped to ``data``'s window, skipping the zero padding.

    The padded rows and columns of ``data`` are zero, so the first (x) transform runs on the
    window's rows only and the last inverse (x) transform only on the rows kept.
    """
    ny, nx = data.shape[-2:]
    Ny, Nx = shape
    if (Ny, Nx) == (ny, nx):
        return scipy.fft.irfft2(scipy.fft.rfft2(data, workers=-1) * mult, s=shape, workers=-1)
    a = scipy.fft.rfft(data, n=Nx, axis=-1, workers=-1)
    a = scipy.fft.fft(a, n=Ny, axis=-2, workers=-1)
    a *= mult
    a = scipy.fft.ifft(a, axis=-2, workers=-1)[..., :ny, :]
    return scipy.fft.irfft(a, n=Nx, axis=-1, workers=-1)[..., :nx]


def _solve_shape(grid):
    """FFT shape of the floor operator: the window if periodic, else doubled (exact free-space convolution)."""
    if grid.periodic:
        return grid.shape
    return (scipy.fft.next_fast_len(2 * grid.ny, real=True), scipy.fft.next_fast_len(2 * grid.nx, real=True))


_MEMO_KERNELS = collections.OrderedDict()

#: Height, in spacings, to which the point-sampled Green's function is lifted (see FloorSolver).
_LIFT = 3.0


def _single_layer_multipliers(grid, z, which):
    """FFT multipliers mapping the spectrum of a floor normal field to the potential or its derivatives.

    Parameters
    ----------
    grid : Grid
    z : float
        Height, m.
    which : {"potential", "fields"}
        ``"potential"``: one multiplier (the potential); ``"fields"``: eight (gradient x, y, z, then
        Hessian :data:`HESSIAN_COMPONENTS`).

    Returns
    -------
    ndarray, shape (C, Ny, Nx // 2 + 1), complex
        On the grid of :func:`_solve_shape`. Periodic: the spectral half-space operator
        ``exp(-|k| z) / |k|`` times the derivative symbols (mean mode dropped). Free space: the
        point-sampled half-space Green's function ``1 / (2 pi R)`` at height ``z + z1`` and its
        derivatives, plus the spectral remainder ``(exp(-|k| z) - exp(-|k| (z + z1))) / |k|``, with
        ``z1 = max(0, 3 h - z)`` so that the sampled part is smooth on the grid (aliasing below
        ``exp(-3 pi)`` = 8e-5 relative at the Nyquist wavenumber).
    """
    key = (grid.key(), repr(float(z)), which)
    if key in _MEMO_KERNELS:
        _MEMO_KERNELS.move_to_end(key)
        return _MEMO_KERNELS[key]
    shape = _solve_shape(grid)
    KX, KY, KXo, KYo, K = _wavenumbers(shape, grid.spacing)
    symbols = [np.ones_like(K)]
    if which == "fields":
        symbols = [1j * KXo + 0 * K, 1j * KYo + 0 * K, -K, -KX**2 + 0 * K, -KXo * KYo, -1j * KXo * K,
                   -KY**2 + 0 * K, -1j * KYo * K]
    Kn = np.where(K > 0, K, 1.0)
    if grid.periodic:
        base = np.where(K > 0, np.exp(-K * z) / Kn, 0.0)
        out = np.stack([s * base for s in symbols])
    else:
        h = max(grid.dx, grid.dy)
        z1 = max(0.0, _LIFT * h - z)
        Z = z + z1
        Ny, Nx = shape
        ox = np.arange(Nx)
        ox = np.where(ox <= Nx // 2, ox, ox - Nx) * grid.dx
        oy = np.arange(Ny)
        oy = np.where(oy <= Ny // 2, oy, oy - Ny) * grid.dy
        X, Y = np.meshgrid(ox, oy)
        R2 = X * X + Y * Y + Z * Z
        R = np.sqrt(R2)
        c = grid.dx * grid.dy / (2 * np.pi)
        if which == "potential":
            samples = [c / R]
        else:
            R3, R5 = R2 * R, R2 * R2 * R
            samples = [-c * X / R3, -c * Y / R3, -c * Z / R3, c * (3 * X * X - R2) / R5, c * 3 * X * Y / R5,
                       c * 3 * X * Z / R5, c * (3 * Y * Y - R2) / R5, c * 3 * Y * Z / R5]
        out = np.stack([scipy.fft.rfft2(smp) for smp in samples])
        if z1 > 0:
            # The field kernels decay faster than the potential's (1/r^4, 1/r^5): a smaller grid will do.
            out += _remainder_multipliers(grid, shape, z, Z, which, grow=4 if which == "potential" else 2)
    _memo_put(_MEMO_KERNELS, key, out, 4)
    return out


def _remainder_multipliers(grid, shape, z, Z, which, grow=4):
    """Multipliers of the short-range remainder ``(exp(-|k| z) - exp(-|k| Z)) / |k|`` (and derivatives).

    The remainder decays like ``(Z - z)^2 / r^3`` in real space. Evaluated directly on the doubled
    grid its periodic images would sit one window away and shift the potential by ~1e-4 on small
    windows; so it is transformed on a grid ``grow`` times larger, cut to the offsets the doubled
    grid needs, and transformed back (images ``grow`` times farther, ~1e-6).
    """
    Ny, Nx = shape
    # Bounded memory: at most ~16 M points for the enlarged grid (large windows need it least, their
    # images being far away already).
    grow = int(max(1, min(grow, np.floor(np.sqrt(16e6 / (Ny * Nx))))))
    big = (grow * Ny, grow * Nx)
    KX, KY, KXo, KYo, K = _wavenumbers(big, grid.spacing)
    Kn = np.where(K > 0, K, 1.0)
    rem = np.where(K > 0, (np.exp(-K * z) - np.exp(-K * Z)) / Kn, Z - z)
    symbols = [np.ones_like(K)]
    if which == "fields":
        symbols = [1j * KXo + 0 * K, 1j * KYo + 0 * K, -K, -KX**2 + 0 * K, -KXo * KYo, -1j * KXo * K,
                   -KY**2 + 0 * K, -1j * KYo * K]
    iy = np.r_[0:Ny // 2 + 1, big[0] - (Ny - Ny // 2 - 1):big[0]]
    ix = np.r_[0:Nx // 2 + 1, big[1] - (Nx - Nx // 2 - 1):big[1]]
    out = []
    for sym in symbols:
        kern = scipy.fft.irfft2(sym * rem, s=big)[np.ix_(iy, ix)]
        out.append(scipy.fft.rfft2(kern))
    return np.stack(out)


def normal_field_fields(normal_field, grid, z, *, _spectrum=None):
    """Gradient and Hessian of the potential at height ``z`` from the floor normal field.

    The half-space potential with Neumann data ``-dphi/dz = E_z`` on ``z = 0`` (zero on the bare
    floor) is ``phi_hat(k, z) = E_z_hat(k) exp(-|k| z) / |k|``; in free space the convolution is
    exact (doubled grid, see :func:`_single_layer_multipliers`), on a periodic grid spectral.

    Parameters
    ----------
    normal_field : ndarray, shape (..., ny, nx)
        ``E_z`` on the floor nodes, V/m (:meth:`FloorSolver.normal_field`).
    grid : Grid
    z : float
        Height, m, >= 0.

    Returns
    -------
    HalfSpaceField
        ``potential`` None, ``gradient`` (..., 3, ny, nx) V/m, ``hessian`` (..., 5, ny, nx) V/m^2.
    """
    ez = np.asarray(normal_field, dtype=float)
    z = float(z)
    if not (np.isfinite(z) and z >= 0):
        raise ActuatorError(f"height z must be a finite number >= 0 m, got {z!r}.")
    shape = _solve_shape(grid)
    spec = _spectrum if _spectrum is not None else scipy.fft.rfft2(ez, s=shape, workers=-1)
    mult = _single_layer_multipliers(grid, z, "fields")
    lead = ez.shape[:-2]
    ny, nx = grid.shape
    parts = np.empty(lead + (8, ny, nx))
    for c in range(8):
        parts[..., c, :, :] = scipy.fft.irfft2(spec * mult[c], s=shape, workers=-1)[..., :ny, :nx]
    return HalfSpaceField(None, parts[..., :3, :, :], parts[..., 3:, :, :])


#: Fewest grid spacings across the narrowest electrode or gap before :func:`resolution_problems`
#: reports it. Measured against the exact periodic solution (tests/actuators/test_electrostatics.py): with 4
#: spacings across the narrowest feature the insulating model's |E|^2 is within about 1 % at a height
#: of that feature's width; the error grows fast below.
RESOLUTION_SPACINGS = 4


def resolution_problems(layout, grid, spacings=RESOLUTION_SPACINGS):
    """Electrodes and gaps of ``layout`` narrower than ``spacings`` grid spacings, as sentences.

    An electrode part is narrower than ``w`` when a morphological opening of the outline by a
    square of side ``w`` (mitred buffer ``-w/2`` then ``+w/2``, exact for rectangles and convex
    polygons) removes area from it.

    Parameters
    ----------
    layout : ElectrodeLayout
    grid : Grid
    spacings : float
        Fewest grid spacings wanted across every electrode and gap.

    Returns
    -------
    list of str
        Empty when everything is resolved.
    """
    h = max(grid.dx, grid.dy)
    w = spacings * h
    out = []
    gap = layout.min_gap
    if gap < w * (1 - 1e-9):
        out.append(f"the narrowest gap between electrodes ({gap * 1e6:.3g} um) spans {gap / h:.2g} grid spacings")
    narrow = []
    for name, poly in zip(layout.names, layout.polygons):
        a = 0.5 * w * (1 - 1e-6)      # a feature exactly w wide is resolved
        opened = poly.buffer(-a, join_style="mitre").buffer(a, join_style="mitre")
        if poly.area - opened.intersection(poly).area > 1e-6 * poly.area:
            narrow.append(name)
    if narrow:
        out.append(f"electrode{'s' if len(narrow) > 1 else ''} {', '.join(repr(n) for n in narrow[:4])}"
                   f"{'...' if len(narrow) > 4 else ''} {'have' if len(narrow) > 1 else 'has'} parts narrower than "
                   f"{spacings:g} grid spacings ({w * 1e6:.3g} um)")
    return out


# ------------------------------------------------------------------------------------------------
# Half-space solution
# ------------------------------------------------------------------------------------------------
class HalfSpaceField(NamedTuple):
    """Potential and its derivatives at one height; ``None`` for parts not asked for."""

    potential: np.ndarray | None   #: (..., ny, nx), V
    gradient: np.ndarray | None    #: (..., 3, ny, nx), V/m: d/dx, d/dy, d/dz of the potential
    hessian: np.ndarray | None     #: (..., 5, ny, nx), V/m^2: xx, xy, xz, yy, yz


def _padded_shape(shape, pad):
    ny, nx = shape
    if pad == 0:
        return ny, nx
    return (scipy.fft.next_fast_len(int(ny * (1 + pad)), real=True),
            scipy.fft.next_fast_len(int(nx * (1 + pad)), real=True))


def _wavenumbers(shape, spacing):
    ny, nx = shape
    dx, dy = spacing
    kx = 2 * np.pi * scipy.fft.rfftfreq(nx, dx)
    ky = 2 * np.pi * scipy.fft.fftfreq(ny, dy)
    # Odd derivatives of the Nyquist mode have no real representation on the grid: drop them.
    kx_odd = kx.copy()
    if nx % 2 == 0:
        kx_odd[-1] = 0.0
    ky_odd = ky.copy()
    if ny % 2 == 0:
        ky_odd[ny // 2] = 0.0
    KX, KY = kx[None, :], ky[:, None]
    return KX, KY, kx_odd[None, :], ky_odd[:, None], np.sqrt(KX**2 + KY**2)


def half_space_fields(phi0, spacing, z, *, pad=1, potential=False, gradient=True, hessian=True, workers=None,
                      _spectrum=None):
    """Potential above the floor from its values on the floor (Dirichlet data), by FFT.

    Solves Laplace's equation in ``z > 0`` with ``phi(x, y, 0) = phi0`` and decay as ``z -> inf``:
    ``phi_hat(k, z) = phi_hat_0(k) exp(-|k| z)`` (the textbook half-space Fourier solution).
    Derivatives are spectral: ``d/dx -> i k_x``, ``d/dz -> -|k|``.

    Parameters
    ----------
    phi0 : array_like, shape (..., ny, nx)
        Floor potential on grid nodes, V.
    spacing : float or (float, float)
        Node spacing (dx, dy), m.
    z : float
        Height above the floor, m, >= 0.
    pad : int
        Zero-padding factor: the grid is extended to about ``(1 + pad)`` times its size with 0 V
        before the FFT, so the periodic images of the window are far away. ``pad=0`` treats
        ``phi0`` as one period of a periodic pattern (exact for periodic data).
    potential, gradient, hessian : bool
        Which parts to compute.

    Returns
    -------
    HalfSpaceField
        Arrays on the original (unpadded) window.

    Examples
    --------
    >>> n, L = 64, 1e-4
    >>> x = np.arange(n) * L / n
    >>> phi0 = np.tile(np.cos(2 * np.pi * x / L), (4, 1))
    >>> out = half_space_fields(phi0, (L / n, L / 4), 1e-5, pad=0, potential=True, hessian=False)
    >>> bool(np.allclose(out.potential, phi0 * np.exp(-2 * np.pi / L * 1e-5)))
    True
    """
    phi0 = np.asarray(phi0, dtype=float)
    if phi0.ndim < 2:
        raise ActuatorError(f"phi0 must have shape (..., ny, nx), got {phi0.shape}.")
    dx, dy = (float(spacing), float(spacing)) if np.ndim(spacing) == 0 else (float(spacing[0]), float(spacing[1]))
    z = float(z)
    if not (np.isfinite(z) and z >= 0):
        raise ActuatorError(f"height z must be a finite number >= 0 m, got {z!r}.")
    if int(pad) != pad or pad < 0:
        raise ActuatorError(f"pad must be an integer >= 0, got {pad!r}.")
    ny, nx = phi0.shape[-2:]
    Ny, Nx = _padded_shape((ny, nx), int(pad))
    spec = _spectrum if _spectrum is not None else scipy.fft.rfft2(phi0, s=(Ny, Nx), workers=workers)
    KX, KY, KXo, KYo, K = _wavenumbers((Ny, Nx), (dx, dy))
    damp = np.exp(-K * z)
    base = spec * damp

    def back(mult):
        return scipy.fft.irfft2(base * mult, s=(Ny, Nx), workers=workers)[..., :ny, :nx]

    lead = phi0.shape[:-2]
    pot = back(1.0) if potential else None
    grad = hess = None
    if gradient:
        grad = np.empty(lead + (3, ny, nx))
        grad[..., 0, :, :] = back(1j * KXo)
        grad[..., 1, :, :] = back(1j * KYo)
        grad[..., 2, :, :] = back(-K)
    if hessian:
        hess = np.empty(lead + (5, ny, nx))
        hess[..., 0, :, :] = back(-KX**2)
        hess[..., 1, :, :] = back(-KXo * KYo)
        hess[..., 2, :, :] = back(-1j * KXo * K)
        hess[..., 3, :, :] = back(-KY**2)
        hess[..., 4, :, :] = back(-1j * KYo * K)
    return HalfSpaceField(pot, grad, hess)


def square_field_gradient(gradient, hessian):
    """In-plane gradient of ``|grad phi|^2`` from the potential's gradient and Hessian.

    ``d/dx |grad phi|^2 = 2 (phi_x phi_xx + phi_y phi_xy + phi_z phi_xz)`` and likewise for y
    (product rule, exact given the spectral derivatives).

    Parameters
    ----------
    gradient : ndarray, shape (..., 3, ny, nx)
        V/m.
    hessian : ndarray, shape (..., 5, ny, nx)
        V/m^2, components :data:`HESSIAN_COMPONENTS`.

    Returns
    -------
    ndarray, shape (..., 2, ny, nx)
        V^2/m^3.
    """
    gx, gy, gz = gradient[..., 0, :, :], gradient[..., 1, :, :], gradient[..., 2, :, :]
    hxx, hxy, hxz, hyy, hyz = (hessian[..., c, :, :] for c in range(5))
    out = np.empty(gradient.shape[:-3] + (2,) + gradient.shape[-2:])
    out[..., 0, :, :] = 2.0 * (gx * hxx + gy * hxy + gz * hxz)
    out[..., 1, :, :] = 2.0 * (gx * hxy + gy * hyy + gz * hyz)
    return out


# ------------------------------------------------------------------------------------------------
# Unit responses with memory and disk caches
# ------------------------------------------------------------------------------------------------
_MEMO_FLOOR = collections.OrderedDict()
_MEMO_MAPS = collections.OrderedDict()
_MEMO_FLOOR_MAX = 8
_MEMO_MAPS_MAX = 6


def clear_memory_cache():
    """Forget the unit responses kept in memory by this process (the disk cache is untouched)."""
    _MEMO_FLOOR.clear()
    _MEMO_MAPS.clear()


def _memo_put(memo, key, value, limit):
    memo[key] = value
    memo.move_to_end(key)
    while len(memo) > limit:
        memo.popitem(last=False)


def _resolve_cache_dir(cache_dir):
    """``cache_dir`` argument, else $FIELDPLAN_CACHE, else None (no disk cache); False disables."""
    if cache_dir is False:
        return None
    if cache_dir is None:
        env = os.environ.get("FIELDPLAN_CACHE")
        return Path(env) if env else None
    return Path(cache_dir)


def _atomic_save(path, array):
    """Write ``array`` to ``path`` (.npy) so that readers never see a partial file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_open(path, "wb") as fh:
        np.save(fh, array, allow_pickle=False)


def _try_load(path, shape):
    if path is None or not path.exists():
        return None
    try:
        arr = np.load(path, allow_pickle=False)
    except (OSError, ValueError) as exc:
        warnings.warn(f"ignoring unreadable cache file {path} ({exc}); recomputing.", CacheWarning, stacklevel=3)
        return None
    if arr.shape != shape or arr.dtype != np.float64 or not np.all(np.isfinite(arr)):
        warnings.warn(f"ignoring cache file {path} with unexpected content; recomputing.", CacheWarning, stacklevel=3)
        return None
    return arr


def _try_save(path, array):
    if path is None:
        return
    try:
        _atomic_save(path, array)
    except OSError as exc:
        warnings.warn(f"could not write cache file {path} ({exc}); continuing without it.", CacheWarning,
                      stacklevel=3)


class UnitResponses:
    """Per-electrode unit responses of a layout: floor potentials and height maps.

    Electrode ``k`` at 1 V with all others at 0 V gives a floor potential (``floor[k]``) and, at
    each height ``z``, the gradient and Hessian of the potential on the grid window
    (:meth:`maps`). Any voltage vector's field is the superposition ``sum_k V_k * response_k``.

    Results are kept in memory (per process, a few entries) and, when a cache directory is set,
    on disk as ``.npy`` files named by a SHA-256 hash of the layout, the grid, the padding, the gap
    model (with its partial-cell constants) and the height (written atomically: temporary file, then rename).

    Parameters
    ----------
    layout : ElectrodeLayout
    grid : Grid
    pad : int
        Zero-padding factor of the FFT of the linear gap model (ignored on a periodic grid and by
        the insulating model, whose free-space convolution is exact).
    cache_dir : str, Path, None or False
        Directory of the disk cache. None: the ``FIELDPLAN_CACHE`` environment variable if set,
        else no disk cache. False: no disk cache.
    gap_model : {"insulating", "linear"}
        Boundary condition on the bare floor between electrodes (:class:`FloorSolver`); part of
        the cache key.
    """

    def __init__(self, layout, grid, pad=1, cache_dir=None, gap_model="insulating"):
        if gap_model not in FloorSolver.GAP_MODELS:
            raise ActuatorError(f"gap_model must be one of {list(FloorSolver.GAP_MODELS)}, got {gap_model!r}.")
        self.layout = layout
        self.grid = grid
        self.gap_model = gap_model
        # The insulating model convolves exactly in free space: FFT padding does not apply to it.
        self.pad = 0 if (grid.periodic or gap_model == "insulating") else int(pad)
        self.cache_dir = cache_dir
        self._solver = None
        self._floor = None
        self._normal = None
        self._spectrum = None

    def __getstate__(self):
        return {"layout": self.layout, "grid": self.grid, "pad": self.pad, "cache_dir": self.cache_dir,
                "gap_model": self.gap_model}

    def __setstate__(self, state):
        self.__init__(state["layout"], state["grid"], state["pad"], state["cache_dir"],
                      state.get("gap_model", "insulating"))

    def key(self, z=None):
        """Hex SHA-256 of everything the cached arrays depend on (and the height, if given)."""
        text = json.dumps([_SCHEMA, self.layout.key(), self.grid.key(), self.pad, self.gap_model,
                           FloorSolver.BLEND, FloorSolver.EDGE_SHIFT, None if z is None else repr(float(z))])
        return hashlib.sha256(text.encode()).hexdigest()

    def _path(self, kind, z=None):
        d = _resolve_cache_dir(self.cache_dir)
        return None if d is None else d / f"dep-{kind}-{self.key(z)[:32]}.npy"

    @property
    def solver(self):
        """The :class:`FloorSolver` (built on first use)."""
        if self._solver is None:
            self._solver = FloorSolver(self.layout, self.grid, self.gap_model)
        return self._solver

    def _unit_floor_data(self):
        """What the model caches: unit normal fields (insulating) or unit floor potentials (linear)."""
        kind = "normal" if self.gap_model == "insulating" else "floor"
        key = self.key()
        if key in _MEMO_FLOOR:
            return _MEMO_FLOOR[key]
        shape = (len(self.layout),) + self.grid.shape
        path = self._path(kind)
        arr = _try_load(path, shape)
        if arr is None:
            arr = self.solver.unit_normal_fields() if kind == "normal" else self.solver.unit_responses()
            _try_save(path, arr)
        arr.setflags(write=False)
        _memo_put(_MEMO_FLOOR, key, arr, _MEMO_FLOOR_MAX)
        return arr

    @property
    def normal_field(self):
        """Unit normal fields ``E_z`` on the floor, shape (K, ny, nx), V/m per V (insulating model only)."""
        if self.gap_model != "insulating":
            raise ActuatorError("normal_field needs gap_model='insulating'.")
        if self._normal is None:
            self._normal = self._unit_floor_data()
        return self._normal

    @property
    def floor(self):
        """Unit floor potentials, shape (K, ny, nx), V per V."""
        if self._floor is None:
            if self.gap_model == "insulating":
                arr = self.solver.potential_of(self.normal_field, np.eye(len(self.layout)))
                arr.setflags(write=False)
            else:
                arr = self._unit_floor_data()
            self._floor = arr
        return self._floor

    def maps(self, z):
        """Unit gradient and Hessian maps at height ``z``.

        Parameters
        ----------
        z : float
            Height above the floor, m.

        Returns
        -------
        ndarray, shape (K, 8, ny, nx)
            Per electrode (1 V): the potential gradient (components 0-2, V/m per V) and Hessian
            (components 3-7, :data:`HESSIAN_COMPONENTS`, V/m^2 per V).
        """
        z = float(z)
        key = self.key(z)
        if key in _MEMO_MAPS:
            _MEMO_MAPS.move_to_end(key)
            return _MEMO_MAPS[key]
        shape = (len(self.layout), 8) + self.grid.shape
        path = self._path("maps", z)
        arr = _try_load(path, shape)
        if arr is None:
            if self.gap_model == "insulating":
                ez = self.normal_field
                if self._spectrum is None:
                    self._spectrum = scipy.fft.rfft2(ez, s=_solve_shape(self.grid), workers=-1)
                out = normal_field_fields(ez, self.grid, z, _spectrum=self._spectrum)
            else:
                floor = self.floor
                if self._spectrum is None:
                    Ny, Nx = _padded_shape(self.grid.shape, self.pad)
                    self._spectrum = scipy.fft.rfft2(floor, s=(Ny, Nx), workers=-1)
                out = half_space_fields(floor, self.grid.spacing, z, pad=self.pad, workers=-1,
                                        _spectrum=self._spectrum)
            arr = np.concatenate([out.gradient, out.hessian], axis=1)
            _try_save(path, arr)
        arr.setflags(write=False)
        _memo_put(_MEMO_MAPS, key, arr, _MEMO_MAPS_MAX)
        return arr

    def pattern(self, voltages, z):
        """Gradient and Hessian of the potential of a voltage pattern at height ``z``.

        Parameters
        ----------
        voltages : array_like, shape (K,) or (P, K)
            V.
        z : float
            m.

        Returns
        -------
        gradient : ndarray, shape (..., 3, ny, nx), V/m
        hessian : ndarray, shape (..., 5, ny, nx), V/m^2
        """
        v = np.asarray(voltages, dtype=float)
        m = self.maps(z)
        k = len(self.layout)
        if v.shape[-1] != k:
            raise ActuatorError(f"voltages must have {k} entries (one per electrode), got shape {v.shape}.")
        flat = m.reshape(k, -1)
        out = (v.reshape(-1, k) @ flat).reshape(v.shape[:-1] + m.shape[1:])
        return out[..., :3, :, :], out[..., 3:, :, :]


# ------------------------------------------------------------------------------------------------
# Interpolation
# ------------------------------------------------------------------------------------------------
def _bspline_weights(t):
    """Cubic B-spline weights of the four nodes around fractional position ``t`` in [0, 1)."""
    t2, t3 = t * t, t * t * t
    w0 = (1 - t) ** 3 / 6.0
    w1 = (3 * t3 - 6 * t2 + 4) / 6.0
    w2 = (-3 * t3 + 3 * t2 + 3 * t + 1) / 6.0
    w3 = t3 / 6.0
    return np.stack([w0, w1, w2, w3], axis=-1)


class SplineMaps:
    """Cubic B-spline interpolant of a stack of maps on a :class:`Grid`, evaluated at many points.

    Equivalent to ``scipy.ndimage.map_coordinates(order=3)`` with mode ``mirror`` (or
    ``grid-wrap`` on a periodic grid), but the spline coefficients are computed once and the
    evaluation is vectorised over all maps and points in one gather.

    Parameters
    ----------
    maps : ndarray, shape (M, ny, nx)
    grid : Grid
    """

    def __init__(self, maps, grid):
        maps = np.asarray(maps, dtype=float)
        if maps.ndim != 3 or maps.shape[1:] != grid.shape:
            raise ActuatorError(f"maps must have shape (M, {grid.ny}, {grid.nx}), got {maps.shape}.")
        self.grid = grid
        mode = "grid-wrap" if grid.periodic else "mirror"
        coef = np.stack([ndimage.spline_filter(m, order=3, mode=mode) for m in maps])
        self.coef = np.pad(coef, ((0, 0), (2, 2), (2, 2)), mode="wrap" if grid.periodic else "reflect")

    @property
    def size(self):
        return self.coef.shape[0]

    @classmethod
    def from_coefficients(cls, coef, grid):
        """Wrap already computed, padded coefficients (shape (M, ny + 4, nx + 4)); no copy."""
        out = object.__new__(cls)
        out.grid = grid
        out.coef = coef
        return out

    @staticmethod
    def stack(splines):
        """One :class:`SplineMaps` holding the maps of several (same grid), in order."""
        return SplineMaps.from_coefficients(np.concatenate([s.coef for s in splines], axis=0), splines[0].grid)

    def _locate(self, xy):
        g = self.grid
        u = (xy[:, 0] - g.xmin) / g.dx
        v = (xy[:, 1] - g.ymin) / g.dy
        if g.periodic:
            u, v = np.mod(u, g.nx), np.mod(v, g.ny)
        iu = np.clip(np.floor(u), 0, g.nx - 1).astype(np.intp)
        iv = np.clip(np.floor(v), 0, g.ny - 1).astype(np.intp)
        wx = _bspline_weights(u - iu)
        wy = _bspline_weights(v - iv)
        # Padded coefficient index of node i is i + 2; the support is nodes i-1 .. i+2.
        off = np.arange(4) + 1
        return iv[:, None] + off, iu[:, None] + off, wy, wx

    def __call__(self, xy, rows=None):
        """Interpolated values, shape (M, n) (or (len(rows), n)), at points ``xy`` (n, 2) m."""
        iy, ix, wy, wx = self._locate(np.asarray(xy, dtype=float))
        c = self.coef if rows is None else self.coef[rows]
        vals = c[:, iy[:, :, None], ix[:, None, :]]           # (M, n, 4, 4)
        return np.einsum("mnab,na,nb->mn", vals, wy, wx)
