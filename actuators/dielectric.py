"""Planar electrode array: dielectrophoresis (DEP) of beads and cells by electrode voltages.

Physics, in the order the actuator uses it:

* Complex permittivities ``eps* = eps - j sigma / omega`` of the medium and of the particle: a
  homogeneous sphere (``Body.permittivity``, ``Body.conductivity``, with a surface conductance
  ``K_s`` adding ``2 K_s / r`` to the bulk conductivity), or the single-shell model of a cell
  (``Body.shell``; Irimajiri, Hanai & Inouye, J. Theor. Biol. 78, 1979).
* The Clausius-Mossotti factor ``K = (eps_p* - eps_m*) / (eps_p* + 2 eps_m*)``; its real part lies in
  ``[-0.5, 1]`` and changes sign at crossover frequencies (:func:`crossover_frequencies`).
* The time-averaged DEP force ``F = 2 pi eps_m r^3 Re[K] grad |E_rms|^2`` (Jones, Electromechanics
  of Particles, 1995; Morgan & Green, AC Electrokinetics, 2003), with the field of the electrode
  pattern from :mod:`actuators.electrostatics` at the height of the body's centre.
* Overdamped motion: in-plane velocity = in-plane force / (Stokes drag with the exact wall factor of
  a sphere near a plane), :func:`fieldplan.world.physics.drag_coefficient`.

Model limits (stated, not hidden): the body stays at ``Body.height`` (the vertical DEP force,
which can levitate a particle under negative DEP, is not integrated); the particle is small
compared with the field's length scale (dipole approximation; higher multipoles matter at field
nulls); electrothermal and AC-electro-osmotic flows, electrode polarisation and the induced
change of the field by the particle itself are not modelled; the bare floor between electrodes
is an insulator (the exact mixed problem, :mod:`actuators.electrostatics`; ``gap_model="linear"``
selects the earlier linear-gap approximation).

Drive convention: every electrode carries ``V_k cos(omega t)`` with the same frequency; a
channel value is the signed **peak** amplitude ``V_k`` (negative = antiphase), so
``|E_rms|^2 = |E_peak|^2 / 2``.
"""

from __future__ import annotations

import collections
import warnings

import numpy as np
from scipy.constants import epsilon_0
from scipy.optimize import brentq

from fieldplan.contract.actuator import Actuator, Channel, FieldBasis, Primitive
from fieldplan.errors import ActuatorError
from fieldplan.units import to_si
from fieldplan.world.physics import drag_coefficient

from .electrostatics import (
    RESOLUTION_SPACINGS,
    ElectrodeLayout,
    FloorSolver,
    Grid,
    SplineMaps,
    UnitResponses,
    finger_array,
    interdigitated,
    layout_from_spec,
    pad_array,
    quadrupole,
    resolution_problems,
    square_field_gradient,
)

__all__ = [
    "complex_permittivity",
    "medium_complex_permittivity",
    "clausius_mossotti",
    "crossover_frequencies",
    "dep_force",
    "joule_heating_estimate",
    "ElectrodeArray",
    "DielectrophoresisWarning",
    "ElectrolysisWarning",
    "JouleHeatingWarning",
    "FieldLimitWarning",
    "ResolutionWarning",
    "plot_field_magnitude",
    "plot_velocity_fields",
    "plot_clausius_mossotti",
    "ElectrodeLayout",
    "Grid",
    "pad_array",
    "interdigitated",
    "finger_array",
    "quadrupole",
]

#: Thermal conductivity of water near 20 degC, W/(m K) (from memory; IAPWS gives 0.598 at 20 degC).
WATER_THERMAL_CONDUCTIVITY = 0.6


# ------------------------------------------------------------------------------------------------
# Warnings
# ------------------------------------------------------------------------------------------------
class DielectrophoresisWarning(UserWarning):
    """Base class: an operating point of an electrode array where the physics bites."""


class ElectrolysisWarning(DielectrophoresisWarning):
    """Low drive frequency in a conductive medium: electrode reactions and gas may form."""


class JouleHeatingWarning(DielectrophoresisWarning):
    """The estimated Joule heating of the medium exceeds the declared limit."""


class FieldLimitWarning(DielectrophoresisWarning):
    """The field strength at a body's height exceeds the declared limit."""


class ResolutionWarning(DielectrophoresisWarning):
    """The field grid is too coarse for the height where the field is evaluated, or for the
    narrowest electrode or gap of the layout."""


# ------------------------------------------------------------------------------------------------
# Clausius-Mossotti
# ------------------------------------------------------------------------------------------------
def _frequency(frequency, name="frequency"):
    f = np.asarray(frequency, dtype=float)
    if f.size == 0 or not np.all(np.isfinite(f)) or np.any(f <= 0):
        raise ActuatorError(f"{name} must be finite and > 0 Hz, got {frequency!r}.")
    return f


def medium_complex_permittivity(frequency, medium):
    """``eps_m* = eps_m - j sigma_m / omega`` of the medium, F/m.

    Parameters
    ----------
    frequency : float or array_like
        Hz, > 0.
    medium : fieldplan.Medium

    Returns
    -------
    complex or ndarray of complex, shape of ``frequency``
    """
    w = 2 * np.pi * _frequency(frequency)
    return medium.relative_permittivity * epsilon_0 - 1j * medium.conductivity / w


def complex_permittivity(frequency, particle):
    """Effective complex permittivity of a particle, F/m.

    Homogeneous sphere: ``eps_p* = eps_p eps_0 - j (sigma_p + 2 K_s / r) / omega`` (surface
    conductance ``K_s`` in S; a missing conductivity counts as 0). Single shell (Irimajiri, Hanai &
    Inouye, J. Theor. Biol. 78, 1979): ``eps_p* = eps_mem* (g^3 + 2 K_i) / (g^3 - K_i)`` with
    ``K_i = (eps_i* - eps_mem*) / (eps_i* + 2 eps_mem*)`` and ``g = R / (R - d)``.

    Parameters
    ----------
    frequency : float or array_like
        Hz, > 0.
    particle : fieldplan.Body
        With ``permittivity`` (relative) and optionally ``conductivity`` and
        ``surface_conductance``, or with ``shell``.

    Returns
    -------
    complex or ndarray of complex, shape of ``frequency``

    Raises
    ------
    ActuatorError
        No dielectric properties, a shell thicker than the radius, surface conductance given with
        a shell, or a frequency <= 0.
    """
    w = 2 * np.pi * _frequency(frequency)
    name = getattr(particle, "name", "?")
    shell = getattr(particle, "shell", None)
    r = float(particle.radius)
    if shell is not None:
        if getattr(particle, "surface_conductance", None):
            raise ActuatorError(
                f"body {name!r}: surface_conductance is defined for homogeneous spheres only; a shelled "
                "cell carries its surface conduction in the membrane conductivity - remove one of them."
            )
        d = float(shell.thickness)
        if not d < r:
            raise ActuatorError(f"body {name!r}: shell thickness {d} m must be smaller than the radius {r} m.")
        e_mem = shell.membrane_permittivity * epsilon_0 - 1j * shell.membrane_conductivity / w
        e_int = shell.interior_permittivity * epsilon_0 - 1j * shell.interior_conductivity / w
        ki = (e_int - e_mem) / (e_int + 2 * e_mem)
        g3 = (r / (r - d)) ** 3
        return e_mem * (g3 + 2 * ki) / (g3 - ki)
    if getattr(particle, "permittivity", None) is None:
        raise ActuatorError(
            f"body {name!r} has no dielectric properties: set Body.permittivity (relative; with "
            "conductivity and surface_conductance as needed) or Body.shell for a cell."
        )
    sigma = float(particle.conductivity or 0.0) + 2.0 * float(particle.surface_conductance or 0.0) / r
    return particle.permittivity * epsilon_0 - 1j * sigma / w


def clausius_mossotti(frequency, particle, medium):
    """Clausius-Mossotti factor ``K = (eps_p* - eps_m*) / (eps_p* + 2 eps_m*)``.

    Parameters
    ----------
    frequency : float or array_like
        Hz, > 0.
    particle : fieldplan.Body
    medium : fieldplan.Medium

    Returns
    -------
    complex or ndarray of complex, shape of ``frequency``
        ``Re K`` lies in ``[-0.5, 1]``: positive DEP (towards strong field) where it is > 0.

    Examples
    --------
    >>> from fieldplan import Body, Medium
    >>> bead = Body("ps", radius=0.5e-6, density=1050.0, permittivity=2.55, surface_conductance=1e-9)
    >>> m = Medium("buffer", relative_permittivity=78.0, conductivity=1e-3)
    >>> round(float(clausius_mossotti(1e3, bead, m).real), 3), round(float(clausius_mossotti(1e8, bead, m).real), 3)
    (0.5, -0.476)
    """
    ep = complex_permittivity(frequency, particle)
    em = medium_complex_permittivity(frequency, medium)
    return (ep - em) / (ep + 2 * em)


def crossover_frequencies(particle, medium, f_min=1e3, f_max=1e10, points_per_decade=40):
    """Frequencies where ``Re K`` changes sign, by bracketing on a log grid and ``brentq``.

    Parameters
    ----------
    particle : fieldplan.Body
    medium : fieldplan.Medium
    f_min, f_max : float
        Search range, Hz, ``0 < f_min < f_max``.
    points_per_decade : int
        Density of the bracketing grid; two crossovers closer than one grid step may be missed.

    Returns
    -------
    ndarray, shape (c,)
        Hz, ascending (empty if ``Re K`` keeps one sign over the range).

    Examples
    --------
    >>> from fieldplan import Body, Medium
    >>> bead = Body("ps", radius=0.5e-6, density=1050.0, permittivity=2.55, surface_conductance=1e-9)
    >>> m = Medium("buffer", relative_permittivity=78.0, conductivity=1e-3)
    >>> [round(float(f) / 1e3, 2) for f in crossover_frequencies(bead, m)]
    [697.26]
    """
    _frequency(f_min, "f_min")
    _frequency(f_max, "f_max")
    if not f_max > f_min:
        raise ActuatorError(f"crossover search needs f_max > f_min, got f_min={f_min}, f_max={f_max}.")
    if int(points_per_decade) != points_per_decade or points_per_decade < 2:
        raise ActuatorError(f"points_per_decade must be an integer >= 2, got {points_per_decade!r}.")
    lo, hi = np.log10(f_min), np.log10(f_max)
    n = int(np.ceil((hi - lo) * points_per_decade)) + 1
    s = np.linspace(lo, hi, n)

    def re_k(logf):
        return float(np.real(clausius_mossotti(10.0**logf, particle, medium)))

    vals = np.real(clausius_mossotti(10.0**s, particle, medium))
    out = []
    for i in range(n - 1):
        a, b = vals[i], vals[i + 1]
        if a == 0.0:
            out.append(10.0 ** s[i])
        elif a * b < 0:
            out.append(10.0 ** brentq(re_k, s[i], s[i + 1], xtol=1e-14, rtol=1e-13))
    if vals[-1] == 0.0:
        out.append(10.0 ** s[-1])
    return np.asarray(out)


def dep_force(radius, medium, re_k, grad_e2_rms):
    """Time-averaged dipole DEP force ``F = 2 pi eps_m r^3 Re[K] grad |E_rms|^2``, N.

    (Jones, Electromechanics of Particles, 1995; equal to ``pi eps_m r^3 Re[K] grad |E_peak|^2``.)

    Parameters
    ----------
    radius : float
        m.
    medium : fieldplan.Medium
        Its absolute permittivity is used.
    re_k : float or array_like
        Real part of the Clausius-Mossotti factor.
    grad_e2_rms : array_like, shape (..., d)
        Gradient of the squared rms field, V^2/m^3.

    Returns
    -------
    ndarray, shape of ``re_k * grad_e2_rms``
        N.

    Examples
    --------
    >>> from fieldplan import Medium
    >>> f = dep_force(5e-6, Medium(relative_permittivity=78.0), 1.0, np.array([1e13]))
    >>> round(float(f[0]) * 1e12, 5)
    5.42417
    """
    return 2 * np.pi * medium.permittivity * radius**3 * np.asarray(re_k) * np.asarray(grad_e2_rms)


def joule_heating_estimate(voltage_rms, conductivity, thermal_conductivity=WATER_THERMAL_CONDUCTIVITY):
    """Order-of-magnitude temperature rise of the medium by Joule heating, ``dT ~ sigma V_rms^2 / k``, K.

    Dimensional estimate: power density ``sigma E^2`` with ``E ~ V / l`` over a region of size ``l``
    balanced by conduction ``k dT / l^2``; the length cancels. It is an order-of-magnitude rule
    (from memory: Ramos, Morgan, Green & Castellanos, J. Phys. D 31, 1998 use this form for
    microelectrodes), not a prediction: the substrate and the chip's heat sinking change it by
    factors of a few.

    Parameters
    ----------
    voltage_rms : float or array_like
        rms voltage across the electrodes, V.
    conductivity : float
        Medium conductivity, S/m.
    thermal_conductivity : float
        Medium thermal conductivity, W/(m K).

    Examples
    --------
    >>> round(joule_heating_estimate(5.0, 0.1), 2)
    4.17
    """
    out = conductivity * np.asarray(voltage_rms, dtype=float) ** 2 / thermal_conductivity
    return float(out) if out.ndim == 0 else out


# ------------------------------------------------------------------------------------------------
# The actuator
# ------------------------------------------------------------------------------------------------
def _si(value, unit, name):
    try:
        return to_si(value, unit, name)
    except ValueError as exc:
        raise ActuatorError(str(exc)) from None


def _freq_label(f):
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if f >= scale:
            return f"{f / scale:.6g}{unit}"
    return f"{f:.6g}Hz"


class ElectrodeArray(Actuator):
    """Electrodes on the chip floor driven at one frequency with signed amplitudes: DEP actuator.

    Channels: one per electrode, the signed peak amplitude in V (in phase for > 0, antiphase for
    < 0; bounds ``+-voltage_limit``), then ``frequency`` in Hz taking only the listed values. The
    velocity of a body at ``xy`` is the in-plane DEP force on it at its centre height, divided by its
    Stokes drag with the wall factor of :func:`fieldplan.world.physics.wall_drag_parallel`. It is quadratic in the voltages, so the planner
    time-shares :meth:`primitives` (voltage patterns x frequencies). Bodies with different
    Clausius-Mossotti factors at a frequency move differently under the same voltages - opposite
    ways across a crossover.

    Parameters
    ----------
    layout : ElectrodeLayout, dict of name to polygon, or a spec dict (:func:`layout_from_spec`)
    frequencies : sequence of float or str
        Allowed drive frequencies (> 0, distinct), Hz.
    voltage_limit : float or str
        Largest peak amplitude on any electrode, V.
    patterns : dict of str to sequence, array_like (P, K), or None
        Voltage patterns (V, one value per electrode) to combine with every frequency as primitives.
        Default: each electrode alone at ``+voltage_limit``, and each pair of nearest neighbours
        in antiphase at ``+-voltage_limit``.
    grid : Grid, optional
        Field grid; default ``Grid.around(layout, grid_points, margin)``.
    grid_points : int
        Nodes along the longer side of the default grid (the grid spacing should stay below half
        the lowest body height; a ResolutionWarning says when it does not).
    margin : float or str, optional
        Bare floor around the electrodes inside the default grid window (where fields are
        defined), m; with ``gap_model="linear"`` the window edge is held at 0 V.
    pad : int
        FFT zero-padding factor of the linear gap model (see
        :func:`actuators.electrostatics.half_space_fields`); the insulating model needs none.
    gap_model : {"insulating", "linear"}
        Bare floor between electrodes: an insulator (no normal field, the exact mixed problem;
        default) or the earlier linear-gap approximation, kept for comparison
        (:class:`actuators.electrostatics.FloorSolver`).
    cache_dir : str, Path, None or False
        Disk cache of unit responses; None uses ``$FIELDPLAN_CACHE`` if set.
    field_limit : float or None
        Largest ``|E_rms|`` at a body's height before a warning, V/m. Default 1e6 V/m (common
        practice, no source: around there electro-thermal flow and stress on cell membranes grow;
        set it for your particles). None: no check.
    heating_limit : float or None
        Largest estimated temperature rise of the medium, K, allowed before a warning. Default 1 K (common
        practice, no source, for live cells); the estimate is :func:`joule_heating_estimate`.
    thermal_conductivity : float
        Thermal conductivity of the medium for the heating estimate, W/m/K (default water).
    electrolysis_frequency : float or None
        Frequency below which a nonzero pattern in a medium with conductivity > 0 warns, Hz.
        Default 10 kHz (common practice, no source: electrode reactions and bubbles appear at low
        frequency in salt solutions, more so at higher voltage).
    neighbour_factor : float
        Electrode pairs closer than this times the nearest gap of each count as neighbours for
        the default antiphase patterns.

    Examples
    --------
    >>> from fieldplan import Body, Medium
    >>> arr = ElectrodeArray(pad_array(2, 2, 50e-6, 20e-6), [1e5, 1e6], voltage_limit=2.0, grid_points=48,
    ...                      cache_dir=False)
    >>> [c.name for c in arr.channels]
    ['pad_0_0', 'pad_0_1', 'pad_1_0', 'pad_1_1', 'frequency']
    >>> len(arr.primitives())   # (4 singles + 4 neighbour pairs) x 2 frequencies
    16
    """

    tags = frozenset({"discrete_channels", "zero_idle"})

    def __init__(self, layout, frequencies, *, voltage_limit=5.0, patterns=None, grid=None, grid_points=128,
                 margin=None, pad=1, cache_dir=None, field_limit=1e6, heating_limit=1.0,
                 thermal_conductivity=WATER_THERMAL_CONDUCTIVITY, electrolysis_frequency=1e4,
                 neighbour_factor=1.2, gap_model="insulating"):
        if not isinstance(layout, ElectrodeLayout):
            if isinstance(layout, dict) and len(layout) == 1 and next(iter(layout)) in (
                    "pad_array", "interdigitated", "finger_array", "quadrupole", "electrodes"):
                layout = layout_from_spec(layout)
            else:
                layout = ElectrodeLayout(layout)
        self.layout = layout
        freqs = [_si(f, "Hz", "frequencies") for f in np.atleast_1d(np.asarray(frequencies, dtype=object))]
        _frequency(freqs, "frequencies")
        if len(set(freqs)) != len(freqs):
            raise ActuatorError(f"frequencies must be distinct, got {freqs}.")
        self.frequencies = tuple(sorted(float(f) for f in freqs))
        self.voltage_limit = _si(voltage_limit, "V", "voltage_limit")
        if not self.voltage_limit > 0:
            raise ActuatorError(f"voltage_limit must be > 0 V, got {voltage_limit!r}.")
        self.pad = pad
        self.grid_points = grid_points
        self.margin = None if margin is None else _si(margin, "m", "margin")
        if grid is None:
            grid = Grid.around(layout, grid_points, self.margin)
        elif not isinstance(grid, Grid):
            raise ActuatorError(f"grid must be an actuators.electrostatics.Grid, got {type(grid).__name__}.")
        self.grid = grid
        if gap_model not in FloorSolver.GAP_MODELS:
            raise ActuatorError(f"gap_model must be one of {list(FloorSolver.GAP_MODELS)}, got {gap_model!r}.")
        self.gap_model = gap_model
        problems = resolution_problems(layout, grid)
        if problems:
            warnings.warn(
                f"electrode grid spacing {max(grid.dx, grid.dy) * 1e6:.3g} um is coarse for the layout: "
                f"{'; '.join(problems)}. With fewer than {RESOLUTION_SPACINGS} spacings across a feature, "
                "|E|^2 at a height of its width is off by more than about 1 %; use more grid_points.",
                ResolutionWarning, stacklevel=2)
        self.cache_dir = cache_dir
        self.field_limit = None if field_limit is None else _si(field_limit, "V/m", "field_limit")
        self.heating_limit = None if heating_limit is None else float(heating_limit)
        self.thermal_conductivity = float(thermal_conductivity)
        if not self.thermal_conductivity > 0:
            raise ActuatorError(f"thermal_conductivity must be > 0 W/(m K), got {thermal_conductivity!r}.")
        self.electrolysis_frequency = (None if electrolysis_frequency is None
                                       else _si(electrolysis_frequency, "Hz", "electrolysis_frequency"))
        self.neighbour_factor = float(neighbour_factor)
        self.extent = tuple(float(v) for v in grid.extent)
        names = self.layout.names
        self._channels = tuple(Channel(n, "V", -self.voltage_limit, self.voltage_limit) for n in names) + (
            Channel("frequency", "Hz", self.frequencies[0], self.frequencies[-1], idle=self.frequencies[0],
                    values=self.frequencies),)
        self.patterns = self._make_patterns(patterns)
        self._init_caches()

    # -- construction helpers --------------------------------------------------------------------
    def _make_patterns(self, patterns):
        K = len(self.layout)
        names = self.layout.names
        V = self.voltage_limit
        if patterns is None:
            out = {}
            for k in range(K):
                v = np.zeros(K)
                v[k] = V
                out[f"{names[k]}+"] = v
            for i, j in self.layout.neighbours(self.neighbour_factor):
                v = np.zeros(K)
                v[i], v[j] = V, -V
                out[f"{names[i]}+{names[j]}-"] = v
        elif isinstance(patterns, dict):
            out = {str(n): np.asarray(p, dtype=float) for n, p in patterns.items()}
        else:
            arr = np.asarray(patterns, dtype=float)
            if arr.ndim != 2:
                raise ActuatorError(f"patterns must be a dict or an array of shape (P, {K}), got shape {arr.shape}.")
            out = {f"pattern_{p}": arr[p] for p in range(len(arr))}
        if not out:
            raise ActuatorError("patterns: at least one voltage pattern is needed.")
        for n, p in out.items():
            if p.shape != (K,) or not np.all(np.isfinite(p)):
                raise ActuatorError(f"pattern {n!r} must be {K} finite voltages (one per electrode), got {p!r}.")
            if np.any(np.abs(p) > self.voltage_limit * (1 + 1e-12)):
                raise ActuatorError(
                    f"pattern {n!r} has |V| = {np.max(np.abs(p)):g} V, above voltage_limit {self.voltage_limit:g} V."
                )
            if not np.any(p):
                raise ActuatorError(f"pattern {n!r} is all zeros; it would not move anything.")
        return out

    def _init_caches(self):
        self._units = UnitResponses(self.layout, self.grid, self.pad, self.cache_dir,
                                    getattr(self, "gap_model", "insulating"))
        self._splines = collections.OrderedDict()    # (height, voltage bytes) -> (SplineMaps, max |E_rms|), LRU
        self._stacks = {}                            # height -> stacked SplineMaps of all patterns
        self._views = {}                             # (height, pattern bytes) -> (view into a stack, max |E_rms|)
        self._pattern_index = {p.tobytes(): i for i, p in enumerate(self.patterns.values())}
        self._coef = {}                              # (body, medium) -> (F,) m/s per V^2/m^3
        self._checked = set()
        self._warned = set()
        self._prims = None

    def __getstate__(self):
        state = self.__dict__.copy()
        for k in ("_units", "_splines", "_stacks", "_views", "_pattern_index", "_coef", "_checked", "_warned",
                  "_prims"):
            state.pop(k, None)
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._init_caches()

    # -- contract ----------------------------------------------------------------------------------
    @property
    def channels(self):
        return self._channels

    def describe(self):
        return (f"ElectrodeArray: {len(self.layout)} electrodes, {len(self.frequencies)} frequencies "
                f"({', '.join(_freq_label(f) for f in self.frequencies)}), |V| <= {self.voltage_limit:g} V, "
                f"{len(self.primitives())} primitives")

    def outlines(self):
        """Electrode shapes on the floor (shapely polygons, m), drawn under the run figures."""
        return self.layout.polygons

    def primitives(self):
        """Every voltage pattern at every allowed frequency, named ``<pattern>@<frequency>``."""
        if self._prims is None:
            self._prims = tuple(Primitive(f"{n}@{_freq_label(f)}", tuple(p) + (f,))
                                for f in self.frequencies for n, p in self.patterns.items())
        return self._prims

    def check_body(self, body, medium):
        """Raise :class:`ActuatorError` unless ``body`` is dielectric and its centre is above the floor."""
        key = (body, medium)
        if key in self._checked:
            return
        name = getattr(body, "name", "?")
        h, r = float(body.height), float(body.radius)
        if not (np.isfinite(h) and h > 0 and h >= r * (1 - 1e-12)):
            raise ActuatorError(
                f"body {name!r}: centre height {h:g} m is below its radius {r:g} m (the body would be "
                "inside the floor); set Body.height >= radius."
            )
        clausius_mossotti(self.frequencies[0], body, medium)    # raises if not dielectric
        spacing = max(self.grid.dx, self.grid.dy)
        if h < 2 * spacing:
            key_w = ("resolution", h)
            if key_w not in self._warned:
                self._warned.add(key_w)
                warnings.warn(
                    f"body {name!r} sits at {h * 1e6:.3g} um, less than two grid spacings "
                    f"(2 x {spacing * 1e6:.3g} um) above the floor: the field gradient there is under-resolved; "
                    "use more grid_points.", ResolutionWarning, stacklevel=3)
        self._checked.add(key)

    def _coefficients(self, body, medium):
        """Velocity per unit ``grad |E_rms|^2`` at each allowed frequency, shape (F,), m/s / (V^2/m^3)."""
        key = (body, medium)
        c = self._coef.get(key)
        if c is None:
            self.check_body(body, medium)
            re_k = np.real(clausius_mossotti(np.asarray(self.frequencies), body, medium))
            c = dep_force(body.radius, medium, re_k, 1.0) / drag_coefficient(body, medium)
            self._coef[key] = c
        return c

    def _freq_index(self, f):
        i = int(np.argmin(np.abs(np.asarray(self.frequencies) - f)))
        return i

    def _inside(self, xy):
        x0, x1, y0, y1 = self.extent
        tol = 1e-9 * max(x1 - x0, y1 - y0)
        bad = (xy[:, 0] < x0 - tol) | (xy[:, 0] > x1 + tol) | (xy[:, 1] < y0 - tol) | (xy[:, 1] > y1 + tol)
        if np.any(bad) and not self.grid.periodic:
            p = xy[np.argmax(bad)]
            raise ActuatorError(
                f"position ({p[0]:.6g}, {p[1]:.6g}) m lies outside the field grid window "
                f"x in [{x0:.6g}, {x1:.6g}], y in [{y0:.6g}, {y1:.6g}] m; enlarge the grid margin."
            )

    def _pattern_spline(self, voltages, height):
        """Spline of ``grad |E_rms|^2`` (2 maps) of one voltage pattern at one height, and max |E_rms|.

        The actuator's own patterns come from the stacked per-height splines of :meth:`_stack`
        (views, shared with :meth:`basis`, so both give identical numbers); any other voltage
        vector is computed on demand and kept in a small LRU cache.
        """
        v = np.asarray(voltages, dtype=float)
        key = (float(height), v.tobytes())
        hit = self._views.get(key)
        if hit is not None:
            return hit
        if key[1] in self._pattern_index:
            self._stack(key[0])
            return self._views[key]
        hit = self._splines.get(key)
        if hit is not None:
            self._splines.move_to_end(key)
            return hit
        grad, hess = self._units.pattern(v, key[0])
        g2 = 0.5 * square_field_gradient(grad, hess)      # peak amplitudes: |E_rms|^2 = |grad phi|^2 / 2
        hit = (SplineMaps(g2, self.grid), float(np.sqrt(0.5 * np.max(np.sum(grad**2, axis=0)))))
        self._splines[key] = hit
        while len(self._splines) > 32:
            self._splines.popitem(last=False)
        return hit

    def _stack(self, height):
        """Splines of all patterns at one height, stacked (2 maps per pattern, pattern-major)."""
        height = float(height)
        st = self._stacks.get(height)
        if st is not None:
            return st
        pats = list(self.patterns.values())
        parts = []
        emax = []
        # Chunks bound the temporary (chunk, 8, ny, nx) arrays to a few tens of MB.
        for start in range(0, len(pats), 8):
            grad, hess = self._units.pattern(np.asarray(pats[start:start + 8]), height)
            g2 = 0.5 * square_field_gradient(grad, hess)
            parts.append(SplineMaps(g2.reshape((-1,) + self.grid.shape), self.grid))
            emax.extend(np.sqrt(0.5 * np.max(np.sum(grad**2, axis=1), axis=(1, 2))))
        st = SplineMaps.stack(parts)
        self._stacks[height] = st
        for i, p in enumerate(pats):
            self._views[(height, p.tobytes())] = (SplineMaps.from_coefficients(st.coef[2 * i:2 * i + 2], self.grid),
                                                  float(emax[i]))
        return st

    def _velocity(self, body, medium, xy, u):
        K = len(self.layout)
        volts, f = u[:K], float(u[K])
        if not np.any(volts):
            return np.zeros_like(xy)
        self._inside(xy)
        coef = self._coefficients(body, medium)[self._freq_index(f)]
        spline, emax = self._pattern_spline(volts, body.height)
        self._warn_operation(medium, volts, f, body.height, emax)
        return coef * spline(xy).T

    def basis(self, bodies, medium, xy):
        """Timeshare field basis over :meth:`primitives`, from precomputed per-pattern maps (fast, exact).

        Same values as the generic :meth:`fieldplan.Actuator.basis`, since :meth:`velocity` uses the
        same maps; the idle input (all electrodes at 0 V) gives zero drift.
        """
        xy = self.check_points(xy)
        n = len(bodies)
        if n != len(xy):
            raise ActuatorError(f"basis: {n} bodies but {len(xy)} positions.")
        self._inside(xy)
        prims = self.primitives()
        P, F = len(self.patterns), len(self.frequencies)
        coef = np.empty((n, F))
        heights = np.empty(n)
        for i, b in enumerate(bodies):
            coef[i] = self._coefficients(b, medium)
            heights[i] = b.height
        # g[p, c, i]: component c of grad |E_rms|^2 of pattern p at body i.
        g = np.empty((P, 2, n))
        for h in np.unique(heights):
            idx = np.flatnonzero(heights == h)
            g[:, :, idx] = self._stack(float(h))(xy[idx]).reshape(P, 2, len(idx))
            self._warn_primitives(medium, float(h))
        # primitives are ordered frequency-major: k = f * P + p
        fields = (coef.T[:, None, :, None] * g.transpose(0, 2, 1)[None, :, :, :]).reshape(F * P, n, 2)
        chans = self.channels
        return FieldBasis("timeshare", fields, np.zeros((n, 2)), chans, primitives=prims, idle=self.idle_input())

    # -- operating warnings -------------------------------------------------------------------------
    def operating_warnings(self, medium, voltages, frequency, height=None):
        """Physics warnings for one operating point, as a list of ``(category, message)``.

        Parameters
        ----------
        medium : fieldplan.Medium
        voltages : array_like, shape (K,)
            Peak amplitudes, V.
        frequency : float
            Hz.
        height : float, optional
            m; with it, the field strength at that height is compared with ``field_limit``.
        """
        v = np.asarray(voltages, dtype=float)
        out = []
        if not np.any(v):
            return out
        f = float(frequency)
        sigma = medium.conductivity
        if self.electrolysis_frequency is not None and sigma > 0 and f < self.electrolysis_frequency:
            out.append((ElectrolysisWarning,
                        f"drive at {_freq_label(f)} in a conductive medium ({sigma:g} S/m) with up to "
                        f"{np.max(np.abs(v)):g} V: below {_freq_label(self.electrolysis_frequency)} electrode "
                        "electrolysis and bubbles are likely (threshold is common practice, no source)."))
        if self.heating_limit is not None:
            # Largest rms difference between two electrodes, or an electrode and the 0 V reference.
            ext = np.concatenate([v, [0.0]])
            v_rms = (ext.max() - ext.min()) / np.sqrt(2)
            dT = float(joule_heating_estimate(v_rms, sigma, self.thermal_conductivity))
            if dT > self.heating_limit:
                out.append((JouleHeatingWarning,
                            f"Joule heating of the medium estimated at ~{dT:.2g} K (order of magnitude, "
                            f"sigma V_rms^2 / k with sigma = {sigma:g} S/m, V_rms = {v_rms:.3g} V), above the "
                            f"declared {self.heating_limit:g} K: lower the voltage or the medium conductivity."))
        if height is not None and self.field_limit is not None:
            _, emax = self._pattern_spline(v, height)
            if emax > self.field_limit:
                out.append((FieldLimitWarning,
                            f"|E_rms| reaches {emax:.3g} V/m at {height * 1e6:.3g} um above the floor, above "
                            f"the declared limit {self.field_limit:.3g} V/m."))
        return out

    def _warn_operation(self, medium, volts, f, height, emax=None):
        key = (medium, volts.tobytes(), f, float(height))
        if key in self._warned:
            return
        self._warned.add(key)
        for cat, msg in self.operating_warnings(medium, volts, f, height):
            warnings.warn(msg, cat, stacklevel=4)

    def _warn_primitives(self, medium, height):
        key = ("primitives", medium, height)
        if key in self._warned:
            return
        self._warned.add(key)
        seen = set()
        for p in self.primitives():
            u = np.asarray(p.values)
            for cat, msg in self.operating_warnings(medium, u[:-1], u[-1], height):
                if (cat, msg) not in seen:
                    seen.add((cat, msg))
                    warnings.warn(f"primitive {p.name!r}: {msg}", cat, stacklevel=3)

    # -- field access for users and plots ------------------------------------------------------------
    def _voltages(self, voltages):
        if isinstance(voltages, Primitive):
            voltages = voltages.values
        if isinstance(voltages, str):
            if voltages in self.patterns:
                return np.asarray(self.patterns[voltages], dtype=float)
            byname = {p.name: p for p in self.primitives()}
            if voltages not in byname:
                raise ActuatorError(f"no pattern or primitive named {voltages!r}.")
            voltages = byname[voltages].values
        v = np.asarray(voltages, dtype=float)
        K = len(self.layout)
        if v.shape == (K + 1,):
            v = v[:K]
        if v.shape != (K,) or not np.all(np.isfinite(v)):
            raise ActuatorError(f"voltages must be {K} finite values (V, one per electrode), got shape {v.shape}.")
        return v

    def field_maps(self, voltages, height):
        """``|E_rms|`` and ``grad |E_rms|^2`` of a voltage pattern on the grid at one height.

        Parameters
        ----------
        voltages : array_like (K,) or (K+1,), a Primitive, or a pattern/primitive name
            Peak amplitudes, V.
        height : float
            m above the floor, > 0.

        Returns
        -------
        dict
            ``x`` (nx,) m, ``y`` (ny,) m, ``e_rms`` (ny, nx) V/m, ``grad_e2`` (2, ny, nx) V^2/m^3.
        """
        v = self._voltages(voltages)
        h = float(height)
        if not (np.isfinite(h) and h > 0):
            raise ActuatorError(f"height must be > 0 m, got {height!r}.")
        grad, hess = self._units.pattern(v, h)
        return {"x": self.grid.x, "y": self.grid.y,
                "e_rms": np.sqrt(0.5 * np.sum(grad**2, axis=0)),
                "grad_e2": 0.5 * square_field_gradient(grad, hess)}

    def force(self, body, medium, xy, u):
        """In-plane DEP force on ``body`` at ``xy`` (n, 2) m under input ``u``, shape (n, 2), N."""
        v = self.velocity(body, medium, xy, u)
        return v * drag_coefficient(body, medium)

    @property
    def unit_responses(self):
        """The :class:`actuators.electrostatics.UnitResponses` of this array (built lazily)."""
        return self._units


# ------------------------------------------------------------------------------------------------
# Plots
# ------------------------------------------------------------------------------------------------
def _outline(ax, layout, scale=1e6):
    for poly in layout.polygons:
        for part in getattr(poly, "geoms", [poly]):
            x, y = np.asarray(part.exterior.coords).T
            ax.plot(x * scale, y * scale, color="white", lw=0.8, alpha=0.9)


def plot_field_magnitude(array, voltages, height, ax=None):
    """Map of ``|E_rms|`` at one height, with the electrode outlines.

    Parameters
    ----------
    array : ElectrodeArray
    voltages : array_like, Primitive or name
        Peak amplitudes, V (see :meth:`ElectrodeArray.field_maps`).
    height : float
        m above the floor.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    maps = array.field_maps(voltages, height)
    fig = ax.figure if ax is not None else plt.figure(figsize=(5.6, 4.6))
    ax = ax if ax is not None else fig.add_subplot(111)
    im = ax.pcolormesh(maps["x"] * 1e6, maps["y"] * 1e6, maps["e_rms"] / 1e3, shading="auto", cmap="viridis")
    _outline(ax, array.layout)
    ax.set_aspect("equal")
    ax.set_xlabel("x (um)")
    ax.set_ylabel("y (um)")
    ax.set_title(f"|E_rms| at z = {height * 1e6:.3g} um")
    fig.colorbar(im, ax=ax, label="|E_rms| (kV/m)")
    return fig


def plot_velocity_fields(array, bodies, medium, u, n=100, arrows=20, axes=None, log=True):
    """One panel per body: DEP speed (colour) and direction (arrows) under one input.

    Parameters
    ----------
    array : ElectrodeArray
    bodies : sequence of fieldplan.Body
        One panel each, evaluated at each body's own height.
    medium : fieldplan.Medium
    u : array_like (K+1,) or Primitive or primitive name
        Full input (voltages and frequency).
    n : int
        Points per side of the speed map.
    arrows : int
        Arrows per side.
    axes : sequence of matplotlib Axes, optional
        One per body (to compose with other plots); default a new figure.
    log : bool
        Logarithmic speed colour scale (speeds span decades between gaps and pad centres).

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    if isinstance(u, str):
        byname = {p.name: p for p in array.primitives()}
        if u not in byname:
            raise ActuatorError(f"no primitive named {u!r}.")
        u = byname[u]
    if isinstance(u, Primitive):
        u = np.asarray(u.values)
    u = np.asarray(u, dtype=float)
    x0, x1, y0, y1 = array.extent
    from matplotlib.colors import LogNorm

    if axes is None:
        fig, axes = plt.subplots(1, len(bodies), figsize=(5.2 * len(bodies), 4.4), squeeze=False)
        axes = axes[0]
        own = True
    else:
        axes = list(axes)
        if len(axes) != len(bodies):
            raise ActuatorError(f"plot_velocity_fields: {len(bodies)} bodies but {len(axes)} axes.")
        fig = axes[0].figure
        own = False
    for ax, body in zip(axes, bodies):
        xs, ys = np.linspace(x0, x1, n), np.linspace(y0, y1, n)
        X, Y = np.meshgrid(xs, ys)
        v = array.velocity(body, medium, np.column_stack([X.ravel(), Y.ravel()]), u).reshape(n, n, 2)
        speed = np.hypot(v[..., 0], v[..., 1]) * 1e6
        top = max(float(speed.max()), 1e-30)
        norm = LogNorm(vmin=top * 1e-3, vmax=top) if log else None
        im = ax.pcolormesh(xs * 1e6, ys * 1e6, np.maximum(speed, top * 1e-3) if log else speed,
                           shading="auto", cmap="magma", norm=norm)
        _outline(ax, array.layout)
        xa, ya = np.linspace(x0, x1, arrows + 2)[1:-1], np.linspace(y0, y1, arrows + 2)[1:-1]
        XA, YA = np.meshgrid(xa, ya)
        va = array.velocity(body, medium, np.column_stack([XA.ravel(), YA.ravel()]), u)
        norm = np.hypot(va[:, 0], va[:, 1])
        # Directions where the body hardly moves (below the colour floor) would only be clutter.
        show = norm > 1e-3 * top * 1e-6
        norm[norm == 0] = 1.0
        ax.quiver(XA.ravel()[show] * 1e6, YA.ravel()[show] * 1e6, va[show, 0] / norm[show], va[show, 1] / norm[show],
                  color="cyan", scale=arrows * 1.6, width=0.004, label="direction")
        re_k = float(np.real(clausius_mossotti(u[-1], body, medium)))
        ax.set_title(f"{body.name}: Re K = {re_k:+.2f} at {_freq_label(u[-1])}, z = {body.height * 1e6:.3g} um")
        ax.set_aspect("equal")
        ax.set_xlabel("x (um)")
        ax.set_ylabel("y (um)")
        ax.legend(loc="upper right", fontsize=7)
        fig.colorbar(im, ax=ax, label="speed (um/s)")
    if own:
        fig.tight_layout()
    return fig


def plot_clausius_mossotti(particles, medium, f_min=1e3, f_max=1e9, ax=None):
    """``Re K`` against frequency for several particles, crossovers marked.

    Parameters
    ----------
    particles : sequence of fieldplan.Body
    medium : fieldplan.Medium
    f_min, f_max : float
        Hz.
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    fig = ax.figure if ax is not None else plt.figure(figsize=(5.6, 3.8))
    ax = ax if ax is not None else fig.add_subplot(111)
    f = np.logspace(np.log10(f_min), np.log10(f_max), 400)
    for p in particles:
        line, = ax.semilogx(f, np.real(clausius_mossotti(f, p, medium)), label=p.name)
        for fc in crossover_frequencies(p, medium, f_min, f_max):
            ax.plot([fc], [0.0], "o", color=line.get_color(), ms=4)
    ax.axhline(0.0, color="0.5", lw=0.6)
    ax.set_ylim(-0.55, 1.05)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("Re K (dimensionless)")
    ax.set_title(f"Clausius-Mossotti factor in {medium.name} ({medium.conductivity:g} S/m)")
    ax.legend(fontsize=8)
    return fig
