"""Vibrating-plate actuator: a thin plate driven at chosen tones moves grains resting on it.

A shaker (or piezo) drives a thin plate at one tone at a time; the plate's standing-wave pattern
at that tone makes particles on it drift. The inputs are the drive frequency, taken from a
discrete set of tones, and the drive amplitude. Many tones, time-shared, give the planner many
different drift fields.

Plate response
    The plate's bending modes come from :func:`actuators.plate_modes.plate_modes` (Kirchhoff
    theory, Rayleigh-Ritz). The steady response to a harmonic drive is a modal superposition with
    modal damping ratio zeta (mass-normalised modes ``phi_m``, eigenfrequencies ``omega_m``):

    * ``excitation="force"``: a point force ``F = gain * amplitude`` (N) at ``drive_point``::

          w(x) = F * sum_m phi_m(x) phi_m(x_d) / (omega_m^2 - omega^2 + 2 i zeta omega_m omega)

    * ``excitation="base"``: the supports (point supports and supported edges) move together
      with displacement ``u_b = gain * amplitude`` (m), as when a post bolted to a shaker carries
      the plate. Writing ``w = u_b + v`` with ``v`` the motion relative to the supports, the
      inertial load ``rho h omega^2 u_b`` drives the supported plate's modes (absolute deflection)::

          w(x) = u_b * [1 + omega^2 sum_m phi_m(x) Gamma_m / (omega_m^2 - omega^2 + 2 i zeta omega_m omega)]

      with participation ``Gamma_m = integral(rho h phi_m) dA``.

    ``w`` is a complex amplitude: the plate moves as ``Re(w e^{i omega t})``. Velocity and
    acceleration fields are ``i omega w`` and ``-omega^2 w``. Modes are kept up to
    ``mode_margin`` times the highest tone (default 2).

Residual flexibility of the truncated modes
    The margin alone does not bound the truncation error. Near a point force the modal sum
    converges slowly (the terms of the drive-point receptance fall only as ``1/omega_m``, with a
    constant modal density), so modes to twice the top tone leave the driving-point receptance
    14-23 % off between resonances (median, on the plates measured below). For ``excitation="force"`` the modes above the cut-off
    ``omega_c = 2 pi mode_margin f_top`` are therefore added as a residual term, the
    short-wavelength part of the infinite plate's point-force response (the plate equation
    ``D lap^2 w - rho h omega^2 w = F delta`` in wavenumber space, kept for ``k > k_c``,
    ``k_c^4 = rho h omega_c^2 / D``)::

        w_res(r) = F / (2 pi D k_c^2) * tau(k_c r) * atanh(x) / x,     x = (omega / omega_c)^2
        tau(s)   = integral_1^inf J0(s q) q^-3 dq
                 = J0(s)/2 - s J1(s)/4 - (s^2/4) [-gamma - ln(s/2) + integral_0^s (1 - J0(t))/t dt]

    (r the distance from the drive point; the last factor is the exact frequency dependence at the
    drive point, where ``w_res = F atanh(x) / (4 pi sqrt(D rho h) omega_c x)``; elsewhere the
    static profile ``tau`` is used). It is the modal density of the plate interior (Weyl's law,
    ``A k^2 / 4 pi`` modes below ``k``) times the mean ``phi_m^2 = 1/(rho h A)`` of mass-normalised
    modes: exact for a drive point more than a few ``1/k_c`` from edges and supports, and an
    approximation closer to them. Against modes to four times the cut-off (plus this tail), it
    brings the median error of the drive-point receptance between the resonances from 14 % to
    0.3 % (200 x 200 mm plate, drive 36 mm off centre) and from 23 % to 2 % (120 x 100 mm, drive
    24 mm off centre, nearer the edges), and that of grad |w|^2 within 10 mm of the drive from 30 %
    to 2.5 % (tests/actuators/test_acoustic.py). A base drive loads the plate uniformly, whose
    high modes take part only weakly (their participation ``Gamma_m`` falls with order), so no
    residual is added there; the tests check that its response has converged at the default margin.

Particle drift (phenomenological)
    A grain's drift velocity, averaged over many cycles, is modelled as ::

        v = s * mu * omega * G(Gamma) * grad(|w|^2)

    * ``grad(|w|^2)`` (m) is the gradient of the squared displacement amplitude at the grain.
    * ``mu`` is the dimensionless drift mobility of the body kind: the drift per radian of
      oscillation per unit gradient of the squared amplitude (so ``2 pi mu grad|w|^2`` is the
      drift per cycle). It is :attr:`fieldplan.Body.drift_mobility`, or the plate's ``mobility``
      when the body leaves it unset. Default :data:`DEFAULT_MOBILITY` = 100, uncertain by
      about a factor of ten either way (:data:`MOBILITY_RANGE`, 10 to 1000): the value was
      chosen so that a 20 um standing wave moves grains at a few mm/s at a few hundred Hz and
      at 1-2 cm/s at 1 kHz on a 1 mm aluminium plate, the mm/s to cm/s speeds of pattern
      formation on demonstration plates (from memory, not a measurement). The law makes the
      speed grow as ``omega k A^2`` (k the bending wavenumber, A the amplitude). It is not
      derived from first principles: calibrate it by tracking grains under one tone and fitting
      the speed.
    * ``s`` is the regime's sign. In air (``medium.submerged`` False) heavy grains collect on
      nodal lines (Faraday, Phil. Trans. 121, 1831): ``s = -1``. On a plate under liquid, heavy
      sub-millimetre beads collect at antinodes (Phys. Rev. Lett. 122, 184301, 2019): ``s = +1``.
      Very light powders in air go to antinodes instead (van Gerner et al., J. Fluid Mech. 689,
      2011); this model does not cover them.
    * ``G`` is the hop gate. In air a grain resting on the plate leaves it, and so moves, only
      where the plate's peak acceleration exceeds gravity, ``Gamma = omega^2 |w| / g > 1`` (the
      bouncing-ball criterion). ``G(Gamma) = S((Gamma - 1) / width)`` with the C1 ramp
      ``S(t) = 3t^2 - 2t^3`` on [0, 1] (0 below, 1 above): exactly zero wherever the plate cannot
      lift the grain, full drift from ``Gamma = 1 + width`` (default ``gate_width`` 0.2), and a
      continuous velocity gradient for the planner. Under liquid ``G = 1``.

    Only the direction rests on observation (the sources above). The speed law itself, drift
    proportional to ``grad |w|^2``, is phenomenological, and its coefficient mu is a calibration
    parameter: treat predicted speeds as order-of-magnitude until mu is fitted to your grains.

Fields for the planner
    The actuator is not affine in its input (the gate and the amplitude squared), so the planner
    time-shares primitives: one primitive per tone (frequency, amplitude). Tones are given by the
    user or generated by :func:`tone_set` (at resonances of modes the drive can excite, and
    between them: off-resonance tones mix mode patterns, adding diversity). Each tone's complex
    deflection and its gradient (per unit drive) are computed once on a grid and interpolated
    (Keys cubic convolution); the grid set is cached on disk, keyed by a hash of every plate,
    drive and tone parameter, so a second run does not recompute.

Symmetry
    A drive at a symmetry point excites only modes that are symmetric about it (a mode odd under
    a symmetry through the drive point vanishes there, and so does its participation). A square
    plate driven at its centre therefore has fields with the plate's mirror symmetries: bodies at
    mirror-image positions move as mirror images. Drive off-centre to break this.
"""

from __future__ import annotations

import hashlib
import json
import os
import warnings
from pathlib import Path

import numpy as np
from scipy import special
from scipy.constants import g as STANDARD_GRAVITY

from fieldplan.contract.actuator import Actuator, Channel, FieldBasis, Primitive
from fieldplan.errors import ActuatorError
from fieldplan.fileio import atomic_open
from fieldplan.units import to_si

from .plate_modes import (
    ALGORITHM_VERSION,
    PlateModes,
    _check_material,
    bending_wavenumber,
    flexural_rigidity,
    parse_edges,
    parse_supports,
    plate_modes,
)

__all__ = [
    "Plate",
    "tone_set",
    "hop_threshold",
    "hop_gate",
    "drift_law",
    "cache_directory",
    "plot_modes",
    "plot_drift",
    "plot_response",
    "MATERIALS",
    "DEFAULT_MOBILITY",
    "MOBILITY_RANGE",
]

#: Default dimensionless drift mobility mu (see the module docstring for its definition).
DEFAULT_MOBILITY = 100.0
#: Plausible range of mu, a factor of ten either side of the default (uncalibrated).
MOBILITY_RANGE = (10.0, 1000.0)

#: Typical handbook constants (Young's modulus Pa, Poisson ratio, density kg/m^3), from memory:
#: check against your supplier's sheet.
MATERIALS = {
    "aluminium": (69e9, 0.33, 2700.0),
    "steel": (200e9, 0.29, 7850.0),
    "stainless_steel": (193e9, 0.29, 8000.0),
    "brass": (100e9, 0.34, 8500.0),
    "glass": (70e9, 0.22, 2500.0),
}

_GRID_VERSION = 2          # 2: residual flexibility of the truncated modes (force drive)


def _tail_profile(s):
    """``tau(s) = integral_1^inf J0(s q) q^-3 dq`` and ``d tau / ds`` (module docstring), s >= 0."""
    s = np.asarray(s, dtype=float)
    tau = np.empty_like(s)
    dtau = np.empty_like(s)
    small = s < 1e-3
    # Series at the drive point: tau = 1/2 - s^2/4 + (s^2/4)(gamma + ln(s/2)) + O(s^4 ln s).
    q = s[small]
    lg = np.euler_gamma + np.log(np.maximum(q, 1e-300) / 2.0)
    tau[small] = 0.5 - q * q / 4.0 + q * q / 4.0 * lg
    dtau[small] = q * (lg / 2.0 - 0.25)
    q = s[~small]
    j0, j1 = special.j0(q), special.j1(q)
    inner = special.it2j0y0(q)[0]                    # integral_0^s (1 - J0(t))/t dt
    tau[~small] = j0 / 2.0 - q * j1 / 4.0 - q * q / 4.0 * (-np.euler_gamma - np.log(q / 2.0) + inner)
    dtau[~small] = (2.0 * tau[~small] - j0) / q      # from d/ds [s^2 integral_s^inf J0(u) u^-3 du]
    return tau, dtau


# ---------------------------------------------------------------------------------------------
# the drift law
# ---------------------------------------------------------------------------------------------
def hop_threshold(frequency):
    """Displacement amplitude at which the plate's peak acceleration equals g: ``g / omega^2``.

    Parameters
    ----------
    frequency : float or ndarray
        Hz.

    Returns
    -------
    float or ndarray
        m. A grain resting on the plate leaves it only where ``|w|`` exceeds this.

    Examples
    --------
    >>> round(float(hop_threshold(500.0)) * 1e6, 4)
    0.9936
    """
    omega = 2.0 * np.pi * np.asarray(frequency, dtype=float)
    return STANDARD_GRAVITY / omega**2


def hop_gate(gamma, width=0.2):
    """Smooth hop gate ``G(Gamma)``: 0 for Gamma <= 1, C1 ramp ``3t^2 - 2t^3`` to 1 at ``1 + width``.

    Parameters
    ----------
    gamma : array_like
        Dimensionless peak acceleration ``omega^2 |w| / g``.
    width : float
        Width of the ramp in Gamma (> 0).

    Examples
    --------
    >>> [round(float(v), 9) for v in hop_gate([0.5, 1.0, 1.1, 1.2, 3.0])]
    [0.0, 0.0, 0.5, 1.0, 1.0]
    """
    t = np.clip((np.asarray(gamma, dtype=float) - 1.0) / width, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def drift_law(omega, amp2, grad_amp2, mobility, submerged, gate_width=0.2):
    """Drift velocity of a grain, ``s * mu * omega * G(Gamma) * grad(|w|^2)`` (module docstring).

    Parameters
    ----------
    omega : float
        Angular drive frequency, rad/s.
    amp2 : ndarray, shape (...)
        Squared displacement amplitude ``|w|^2`` at the grains, m^2.
    grad_amp2 : ndarray, shape (..., 2)
        Its gradient, m.
    mobility : float or ndarray broadcastable to ``amp2``
        mu, dimensionless.
    submerged : bool
        Plate under liquid (drift to antinodes, no hop gate) or in air (to nodal lines, gated).
    gate_width : float
        Width of the hop gate ramp in Gamma.

    Returns
    -------
    ndarray, shape (..., 2)
        m/s.
    """
    if submerged:
        factor = mobility * omega * np.ones_like(amp2)
    else:
        gamma = omega**2 * np.sqrt(amp2) / STANDARD_GRAVITY
        factor = -mobility * omega * hop_gate(gamma, gate_width)
    return factor[..., None] * grad_amp2


# ---------------------------------------------------------------------------------------------
# tones
# ---------------------------------------------------------------------------------------------
def tone_set(resonances, band, n_tones=64):
    """Tone frequencies at resonances and between them.

    Every resonance inside the band gets a tone (its pattern is one clean mode); the remaining
    tones go into the widest gaps (in log frequency) between neighbouring tones and the band
    edges, each at the gap's geometric middle, where the response mixes the neighbouring modes.
    If there are more resonances than tones, an evenly spaced selection of them is kept.

    Parameters
    ----------
    resonances : array_like
        Modal frequencies the drive can excite, Hz (others are ignored if outside the band).
    band : (float, float)
        Lowest and highest allowed tone, Hz.
    n_tones : int
        Number of tones wanted.

    Returns
    -------
    ndarray, shape (n_tones,)
        Hz, ascending, all inside the band.

    Examples
    --------
    >>> [round(float(f), 1) for f in tone_set([250.0, 900.0], (100.0, 1000.0), 4)]
    [158.1, 250.0, 474.3, 900.0]
    """
    lo, hi = (float(v) for v in band)
    if not (0 < lo < hi):
        raise ActuatorError(f"tone_set band must satisfy 0 < low < high (Hz), got {band!r}.")
    if not (isinstance(n_tones, (int, np.integer)) and n_tones >= 1):
        raise ActuatorError(f"tone_set n_tones must be a positive integer, got {n_tones!r}.")
    res = np.sort(np.asarray(resonances, dtype=float).ravel())
    res = res[(res >= lo) & (res <= hi)]
    # Degenerate modes (a square's pairs) share one tone.
    if len(res):
        res = res[np.concatenate([[True], np.diff(res) > 1e-6 * res[1:]])]
    if len(res) >= n_tones:
        pick = np.unique(np.round(np.linspace(0, len(res) - 1, n_tones)).astype(int))
        return res[pick]
    tones = list(res)
    while len(tones) < n_tones:
        edges = np.concatenate([[np.log(lo)], np.log(np.sort(tones)), [np.log(hi)]])
        gaps = np.diff(edges)
        best = int(np.argmax(gaps))  # ties go to the lowest gap
        tones.append(float(np.exp(0.5 * (edges[best] + edges[best + 1]))))
    return np.array(sorted(tones))


# ---------------------------------------------------------------------------------------------
# disk cache
# ---------------------------------------------------------------------------------------------
def cache_directory(cache_dir=None):
    """Where field grids and modes are cached.

    Parameters
    ----------
    cache_dir : str, path, None or False
        An explicit directory wins; ``None`` uses the environment variable ``FIELDPLAN_CACHE``
        if set, else ``$XDG_CACHE_HOME/fieldplan`` or ``~/.cache/fieldplan``; ``False`` disables
        the disk cache.

    Returns
    -------
    pathlib.Path or None
    """
    if cache_dir is False:
        return None
    if cache_dir is not None:
        return Path(cache_dir)
    env = os.environ.get("FIELDPLAN_CACHE")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "fieldplan"


def _digest(key):
    return hashlib.sha256(key.encode()).hexdigest()[:32]


def _cache_load(directory, stem, key):
    """Arrays stored under ``stem`` if the stored key matches, else None."""
    if directory is None:
        return None
    path = directory / f"{stem}-{_digest(key)}.npz"
    try:
        with np.load(path, allow_pickle=False) as data:
            if str(data["key"]) != key:
                return None
            return {k: data[k] for k in data.files}
    except (OSError, KeyError, ValueError, EOFError):
        return None


def _cache_save(directory, stem, key, arrays):
    """Store arrays atomically (:func:`fieldplan.fileio.atomic_open`: temporary file, then rename)."""
    if directory is None:
        return False
    try:
        directory.mkdir(parents=True, exist_ok=True)
        path = directory / f"{stem}-{_digest(key)}.npz"
        with atomic_open(path, "wb") as fh:
            np.savez(fh, key=np.array(key), **arrays)
        return True
    except OSError as exc:
        warnings.warn(f"plate field cache not written to {directory} ({exc}); it will be recomputed next time.",
                      RuntimeWarning, stacklevel=3)
        return False


# ---------------------------------------------------------------------------------------------
# interpolation on a uniform grid
# ---------------------------------------------------------------------------------------------
def _keys_weights(u):
    """Cubic-convolution (Keys, a = -1/2) taps and weights for fractional grid coordinates ``u``.

    Returns the index of the first of 4 taps (n,) and the weights (n, 4).
    """
    i = np.floor(u).astype(np.intp)
    t = u - i
    t2, t3 = t * t, t * t * t
    w = np.empty(u.shape + (4,))
    w[..., 0] = -0.5 * t3 + t2 - 0.5 * t
    w[..., 1] = 1.5 * t3 - 2.5 * t2 + 1.0
    w[..., 2] = -1.5 * t3 + 2.0 * t2 + 0.5 * t
    w[..., 3] = 0.5 * t3 - 0.5 * t2
    return i - 1, w


class _ToneGrid:
    """Per-unit-drive complex deflection and gradient of every tone frequency on a uniform grid.

    ``data`` has shape (ny * nx, F * 6): for node (j, i) and frequency f the six numbers are
    Re w, Im w, Re w_x, Im w_x, Re w_y, Im w_y. Node-major storage makes the 16-tap gather of a
    few points one contiguous read per tap.
    """

    def __init__(self, x0, dx, nx, y0, dy, ny, data, n_freq):
        self.x0, self.dx, self.nx = float(x0), float(dx), int(nx)
        self.y0, self.dy, self.ny = float(y0), float(dy), int(ny)
        self.data = data
        self.n_freq = int(n_freq)

    def sample(self, xy):
        """Interpolated values at points, shape (n, F, 6)."""
        ix, wx = _keys_weights((xy[:, 0] - self.x0) / self.dx)
        iy, wy = _keys_weights((xy[:, 1] - self.y0) / self.dy)
        # Points are clipped onto the plate, and the grid has two nodes of margin outside it.
        ix = np.clip(ix, 0, self.nx - 4)
        iy = np.clip(iy, 0, self.ny - 4)
        off = np.arange(4)
        flat = ((iy[:, None] + off)[:, :, None] * self.nx + (ix[:, None] + off)[:, None, :]).reshape(len(xy), 16)
        w = (wy[:, :, None] * wx[:, None, :]).reshape(len(xy), 16)
        taps = self.data[flat]                       # (n, 16, F*6)
        out = np.einsum("nq,nqc->nc", w, taps)
        return out.reshape(len(xy), self.n_freq, 6)


def _amplitude_fields(vals):
    """|w|^2 (n, F) and grad |w|^2 (n, F, 2) per unit drive squared, from sampled (n, F, 6)."""
    re, im = vals[..., 0], vals[..., 1]
    amp2 = re * re + im * im
    gx = 2.0 * (re * vals[..., 2] + im * vals[..., 3])
    gy = 2.0 * (re * vals[..., 4] + im * vals[..., 5])
    return amp2, np.stack([gx, gy], axis=-1)


# ---------------------------------------------------------------------------------------------
# the actuator
# ---------------------------------------------------------------------------------------------
class Plate(Actuator):
    """A thin rectangular plate driven at one tone at a time; grains on it drift (module docstring).

    Parameters
    ----------
    length_x, length_y : float or str
        Side lengths, m (e.g. ``0.2`` or ``"200 mm"``).
    thickness : float or str
        m.
    material : str
        Key of :data:`MATERIALS` used for any of ``youngs_modulus``, ``poisson_ratio``,
        ``density`` left as None. Default ``"aluminium"``.
    youngs_modulus : float or str, optional
        Pa.
    poisson_ratio : float, optional
        Dimensionless, -1 < nu < 0.5.
    density : float or str, optional
        kg/m^3.
    edges : str, sequence or dict
        Edge conditions, see :func:`actuators.plate_modes.parse_edges`. Default ``"free"``.
    supports : sequence
        Point supports, see :func:`actuators.plate_modes.parse_supports`; plate coordinates, m.
    center : (float, float)
        Centre of the plate, m; the plate spans ``center -+ length / 2``.
    excitation : {"force", "base"}
        A point force at ``drive_point``, or motion of the supports (a post on a shaker).
    drive_point : (float, float), optional
        m; where the force acts (``"force"`` only). Default the plate centre.
    gain : float, optional
        Force per drive unit (N per ``drive_unit``) for ``"force"``, default 1; or support
        displacement per drive unit (m per ``drive_unit``) for ``"base"``, default 1e-6.
    drive_unit : str
        Unit of the amplitude channel (the amplifier's input), default ``"V"``.
    max_amplitude : float
        Upper bound of the amplitude channel, in ``drive_unit``.
    damping : float
        Modal damping ratio zeta of every mode, 0 < zeta < 1 (default 0.01, a lightly damped
        metal plate with its mount; common practice, no source).
    band : (float, float)
        Lowest and highest tone the hardware plays, Hz (default 100 Hz to 5 kHz).
    tones : sequence of (frequency, amplitude), optional
        The primitives: tone frequency (Hz) and drive amplitude (``drive_unit``). Default:
        ``n_tones`` tones from :func:`tone_set` at the excitable resonances and between them,
        each at the amplitude that makes the plate's peak displacement ``peak_displacement``
        (capped at ``max_amplitude``).
    n_tones : int
        Number of generated tones (when ``tones`` is None).
    peak_displacement : float
        m, the target peak displacement amplitude of generated tones (default 20 um).
    mobility : float
        Default drift mobility mu for bodies whose ``drift_mobility`` is None (dimensionless,
        :data:`DEFAULT_MOBILITY`).
    gate_width : float
        Width of the hop-gate ramp in Gamma (air only).
    mode_margin : float
        Modes are kept up to ``mode_margin`` times the highest tone frequency (>= 1.2); for a
        point force the modes above are added as a residual flexibility (module docstring).
    points_per_wavelength : float
        Grid nodes per bending wavelength at the highest tone (>= 6; default 20, which keeps the
        interpolation error of the drift velocity near 1e-3 of its peak).
    mode_tol : float, optional
        Relative frequency tolerance of the mode solver (default that of :func:`plate_modes`).
    cache_dir : str, path, None or False
        Disk cache, see :func:`cache_directory`.
    use_grid : bool
        Interpolate tone fields from the cached grid (fast, default) or evaluate the modal sum
        at every call (exact; the benchmark's baseline).

    Attributes
    ----------
    extent : tuple
        The plate (xmin, xmax, ymin, ymax), m.

    Examples
    --------
    >>> import fieldplan
    >>> plate = Plate(0.2, 0.2, 1e-3, edges="free", supports=[(0.0, 0.0)], excitation="base",
    ...               band=(150.0, 800.0), n_tones=6, cache_dir=False)
    >>> grain = fieldplan.Body("sand", radius=2.5e-4, density=2600.0)
    >>> u = plate.primitives()[0].values
    >>> plate.velocity(grain, fieldplan.air(), [[0.03, 0.02]], u).shape
    (1, 2)
    """

    tags = frozenset({"discrete_channels", "zero_idle"})

    def __init__(self, length_x=0.2, length_y=0.2, thickness=1e-3, *, material="aluminium",
                 youngs_modulus=None, poisson_ratio=None, density=None, edges="free", supports=(),
                 center=(0.0, 0.0), excitation="force", drive_point=None, gain=None, drive_unit="V",
                 max_amplitude=10.0, damping=0.01, band=(100.0, 5000.0), tones=None, n_tones=64,
                 peak_displacement=20e-6, mobility=DEFAULT_MOBILITY, gate_width=0.2, mode_margin=2.0,
                 points_per_wavelength=20, mode_tol=None, cache_dir=None, use_grid=True):
        if material not in MATERIALS:
            raise ActuatorError(f"Plate material must be one of {sorted(MATERIALS)}, got {material!r}.")
        e0, nu0, rho0 = MATERIALS[material]
        self.material = material
        self.youngs_modulus = e0 if youngs_modulus is None else youngs_modulus
        self.poisson_ratio = nu0 if poisson_ratio is None else poisson_ratio
        self.density = rho0 if density is None else density
        # plate_modes validates the plate too; check here so errors surface at construction.
        (self.length_x, self.length_y, self.thickness, self.youngs_modulus, self.poisson_ratio,
         self.density) = _check_material(length_x, length_y, thickness, self.youngs_modulus,
                                         self.poisson_ratio, self.density)
        self.edges = parse_edges(edges)
        try:
            self.center = tuple(to_si(c, "m", "center") for c in center)
            assert len(self.center) == 2
        except (TypeError, AssertionError):
            raise ActuatorError(f"Plate center must be two coordinates in m, got {center!r}.") from None
        cx, cy = self.center
        self.extent = (cx - self.length_x / 2, cx + self.length_x / 2,
                       cy - self.length_y / 2, cy + self.length_y / 2)
        self.supports = parse_supports(supports, self.extent)

        if excitation not in ("force", "base"):
            raise ActuatorError(f"Plate excitation must be 'force' or 'base', got {excitation!r}.")
        self.excitation = excitation
        if excitation == "force":
            dp = (cx, cy) if drive_point is None else drive_point
            try:
                self.drive_point = tuple(to_si(v, "m", "drive_point") for v in dp)
                assert len(self.drive_point) == 2
            except (TypeError, AssertionError):
                raise ActuatorError(f"Plate drive_point must be (x, y) in m, got {drive_point!r}.") from None
            x0, x1, y0, y1 = self.extent
            px, py = self.drive_point
            if not (x0 <= px <= x1 and y0 <= py <= y1):
                raise ActuatorError(
                    f"Plate drive_point ({px:g}, {py:g}) m lies off the plate [{x0:g}, {x1:g}] x [{y0:g}, {y1:g}] m."
                )
            for s in self.supports:
                if np.hypot(s[0] - px, s[1] - py) <= max(s[3], 1e-9 * self.length_x):
                    raise ActuatorError(
                        f"Plate drive_point {self.drive_point} m is on a support: the force would go "
                        "straight into it. Use excitation='base' for a plate driven through its post."
                    )
        else:
            if drive_point is not None:
                raise ActuatorError("Plate drive_point applies to excitation='force'; a base drive moves the supports.")
            if not self.supports and all(c == "F" for c in self.edges):
                raise ActuatorError(
                    "Plate excitation='base' needs supports or a clamped/simply supported edge to move; "
                    "a plate with all edges free and no support is not held by anything."
                )
            self.drive_point = None
        self.gain = _positive_float("gain", (1.0 if excitation == "force" else 1e-6) if gain is None else gain)
        if not isinstance(drive_unit, str) or not drive_unit:
            raise ActuatorError(f"Plate drive_unit must be a non-empty string, got {drive_unit!r}.")
        self.drive_unit = drive_unit
        self.max_amplitude = _positive_float("max_amplitude", max_amplitude)
        self.damping = float(damping)
        if not (0.0 < self.damping < 1.0):
            raise ActuatorError(f"Plate damping (modal damping ratio) must satisfy 0 < zeta < 1, got {damping!r}.")
        try:
            lo, hi = (to_si(v, "Hz", "band") for v in band)
        except (TypeError, ValueError):
            raise ActuatorError(f"Plate band must be (low, high) in Hz, got {band!r}.") from None
        if not (0.0 < lo < hi):
            raise ActuatorError(f"Plate band must satisfy 0 < low < high (Hz), got {band!r}.")
        self.band = (lo, hi)
        if not (isinstance(n_tones, (int, np.integer)) and n_tones >= 1):
            raise ActuatorError(f"Plate n_tones must be an integer >= 1, got {n_tones!r}.")
        self.n_tones = int(n_tones)
        if self.n_tones < 1:
            raise ActuatorError(f"Plate n_tones must be >= 1, got {n_tones!r}.")
        self.peak_displacement = _positive_float("peak_displacement", peak_displacement)
        self.mobility = _positive_float("mobility", mobility)
        self.gate_width = _positive_float("gate_width", gate_width)
        self.mode_margin = float(mode_margin)
        if not self.mode_margin >= 1.2:
            raise ActuatorError(f"Plate mode_margin must be >= 1.2 (modes above the highest tone), got {mode_margin!r}.")
        self.points_per_wavelength = float(points_per_wavelength)
        if not self.points_per_wavelength >= 6:
            raise ActuatorError(f"Plate points_per_wavelength must be >= 6, got {points_per_wavelength!r}.")
        self.mode_tol = mode_tol
        self.cache_dir = cache_dir
        self.use_grid = bool(use_grid)
        self.tones = None if tones is None else self._check_tones(tones)
        self._state = {}
        # Kirchhoff theory needs the bending wavelength well above the thickness (common
        # practice: ten times); beyond, shear and rotary inertia (Mindlin theory) matter.
        k = bending_wavenumber(self._mode_frequency_limit(), self.thickness, self.youngs_modulus,
                               self.poisson_ratio, self.density)
        if 2 * np.pi / k < 10 * self.thickness:
            warnings.warn(
                f"Plate: the bending wavelength at {self._mode_frequency_limit():.4g} Hz is "
                f"{2 * np.pi / k * 1e3:.3g} mm, under ten thicknesses ({self.thickness * 1e3:.3g} mm): "
                "thin-plate (Kirchhoff) theory overestimates those frequencies.", RuntimeWarning, stacklevel=2)

    # -- parameters -------------------------------------------------------------------------
    def _check_tones(self, tones):
        try:
            arr = np.asarray(tones, dtype=float)
        except (TypeError, ValueError):
            raise ActuatorError(f"Plate tones must be a sequence of (frequency Hz, amplitude), got {tones!r}.") from None
        if arr.ndim != 2 or arr.shape[1] != 2 or len(arr) == 0:
            raise ActuatorError(f"Plate tones must have shape (K, 2): (frequency Hz, amplitude {self.drive_unit}); "
                                f"got shape {arr.shape}.")
        lo, hi = self.band
        for k, (f, a) in enumerate(arr):
            if not (np.isfinite(f) and lo <= f <= hi):
                raise ActuatorError(f"Plate tones[{k}] frequency {f:g} Hz is outside the declared band "
                                    f"[{lo:g}, {hi:g}] Hz.")
            if not (np.isfinite(a) and 0 < a <= self.max_amplitude):
                raise ActuatorError(f"Plate tones[{k}] amplitude {a:g} {self.drive_unit} must be in "
                                    f"(0, {self.max_amplitude:g}] (max_amplitude).")
        return tuple((float(f), float(a)) for f, a in arr)

    def plate_parameters(self):
        """The plate as plain data (SI), as :func:`plate_modes` takes it."""
        return {"length_x": self.length_x, "length_y": self.length_y, "thickness": self.thickness,
                "youngs_modulus": self.youngs_modulus, "poisson_ratio": self.poisson_ratio,
                "density": self.density, "edges": "".join(self.edges),
                "supports": [list(s) for s in self.supports], "center": list(self.center)}

    def _mode_frequency_limit(self):
        top = max(f for f, _ in self.tones) if self.tones is not None else self.band[1]
        return self.mode_margin * top

    def _modes_key(self):
        return json.dumps({"v": ALGORITHM_VERSION, "plate": self.plate_parameters(),
                           "max_frequency": self._mode_frequency_limit(), "tol": self.mode_tol},
                          sort_keys=True)

    # -- derived state (lazy, cached in memory and on disk) ----------------------------------
    @property
    def modes(self):
        """The plate's :class:`~actuators.plate_modes.PlateModes` up to ``mode_margin`` x the top tone."""
        if "modes" not in self._state:
            self._state["modes"] = self._load_or_compute_modes()
        return self._state["modes"]

    def _load_or_compute_modes(self):
        directory = cache_directory(self.cache_dir)
        key = self._modes_key()
        data = _cache_load(directory, "plate-modes", key)
        if data is not None:
            return PlateModes.from_arrays(data)
        p = self.plate_parameters()
        modes = plate_modes(p["length_x"], p["length_y"], p["thickness"], p["youngs_modulus"],
                            p["poisson_ratio"], p["density"], self.edges, self.supports,
                            max_frequency=self._mode_frequency_limit(), center=self.center,
                            tol=self.mode_tol)
        _cache_save(directory, "plate-modes", key, modes.to_arrays())
        return modes

    def _participation(self):
        """Modal excitation per unit drive: phi_m(x_d) for a force, Gamma_m for a base drive (times omega^2)."""
        m = self.modes
        if self.excitation == "force":
            return m.shape(np.array([self.drive_point]))[0]
        return m.participation()

    def excitable_modes(self, threshold=1e-3):
        """Indices of the modes this drive excites.

        A mode is excited if its participation, relative to the largest it could have, exceeds
        ``threshold``: ``|phi_m(x_d)| / max|phi_m|`` for a point force, ``|Gamma_m| / sqrt(M)``
        (M the plate mass) for a base drive. Modes odd about a symmetric drive point drop out.
        """
        m = self.modes
        p = self._participation()
        if self.excitation == "force":
            x0, x1, y0, y1 = self.extent
            xs, ys = np.linspace(x0, x1, 41), np.linspace(y0, y1, 41)
            peak = np.max(np.abs(m.grid(xs, ys)).reshape(m.n_modes, -1), axis=1)
            rel = np.abs(p) / peak
        else:
            rel = np.abs(p) / np.sqrt(m.mass_per_area * self.length_x * self.length_y)
        elastic = m.omega > 0
        return np.flatnonzero((rel > threshold) & elastic)

    def resonances(self):
        """Frequencies (Hz) of the excitable modes inside the band, ascending."""
        f = self.modes.frequencies[self.excitable_modes()]
        return f[(f >= self.band[0]) & (f <= self.band[1])]

    def _tone_frequencies(self):
        if self.tones is not None:
            return np.unique([f for f, _ in self.tones])
        return tone_set(self.resonances(), self.band, self.n_tones)

    # -- forced response ---------------------------------------------------------------------
    def _modal_factors(self, frequencies):
        """Complex modal amplitudes per unit drive a[f, m] and the rigid offset per frequency."""
        m = self.modes
        omega = 2.0 * np.pi * np.atleast_1d(np.asarray(frequencies, dtype=float))
        wm = m.omega
        denom = wm[None, :] ** 2 - omega[:, None] ** 2 + 2j * self.damping * wm[None, :] * omega[:, None]
        p = self._participation()
        if self.excitation == "force":
            return p[None, :] / denom, np.zeros(len(omega))
        return omega[:, None] ** 2 * p[None, :] / denom, np.ones(len(omega))

    def _combined(self, frequencies):
        """Per-unit-drive deflection as coefficients: tensor (F, Kx, Ky), singular (F, J), offsets (F,)."""
        a, off = self._modal_factors(frequencies)
        m = self.modes
        return np.tensordot(a, m.coef, axes=1), a @ m.sing, off

    def _check_frequencies(self, frequency):
        f = np.atleast_1d(np.asarray(frequency, dtype=float))
        lo, hi = self.band
        bad = f[~((f >= lo * (1 - 1e-12)) & (f <= hi * (1 + 1e-12)))] if np.all(np.isfinite(f)) else f
        if len(bad):
            raise ActuatorError(f"Plate: frequency {bad[0]:g} Hz is outside the declared band [{lo:g}, {hi:g}] Hz.")
        return f

    def _residual(self, frequencies, xy, gradient=False):
        """Residual flexibility of the modes above the cut-off, per unit drive (module docstring).

        Returns ``w_res`` of shape (F, n), and with ``gradient`` also ``(d/dx, d/dy)`` of shape
        (F, n) each; all zero for a base drive. Real: the truncated modes respond in phase.
        """
        f = np.atleast_1d(np.asarray(frequencies, dtype=float))
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        zero = np.zeros((len(f), len(xy)))
        if self.excitation != "force":
            return (zero, zero, zero) if gradient else zero
        d = flexural_rigidity(self.thickness, self.youngs_modulus, self.poisson_ratio)
        rho_h = self.density * self.thickness
        omega_c = 2.0 * np.pi * self._mode_frequency_limit()
        kc = (rho_h * omega_c**2 / d) ** 0.25
        x = (f / self._mode_frequency_limit()) ** 2             # < 1 / mode_margin^2 <= 0.7
        dyn = np.where(x > 1e-12, np.arctanh(np.maximum(x, 1e-12)) / np.maximum(x, 1e-12), 1.0)
        rel = xy - np.asarray(self.drive_point, dtype=float)
        r = np.hypot(rel[:, 0], rel[:, 1])
        tau, dtau = _tail_profile(kc * r)
        scale = self.gain / (2.0 * np.pi * d * kc**2)
        w = dyn[:, None] * (scale * tau)[None, :]
        if not gradient:
            return w
        radial = scale * kc * dtau / np.maximum(r, 1e-300)    # d tau/dr / r; dtau ~ s ln s -> 0
        return w, dyn[:, None] * (radial * rel[:, 0])[None, :], dyn[:, None] * (radial * rel[:, 1])[None, :]

    def frequency_response(self, frequencies, xy):
        """Complex deflection per unit drive at points, shape (F, n).

        Parameters
        ----------
        frequencies : array_like, shape (F,)
            Hz, inside the band.
        xy : array_like, shape (n, 2)
            m.

        Returns
        -------
        ndarray, complex, shape (F, n)
            m per ``drive_unit``.
        """
        f = self._check_frequencies(frequencies)
        xy = self.check_points(xy)
        coef, sing, off = self._combined(f)
        w = self.modes.evaluate(coef, xy, sing=sing)   # (n, F)
        return (w + off[None, :]).T * self.gain + self._residual(f, xy)

    def deflection(self, frequency, amplitude, xy):
        """Complex deflection amplitude ``w`` at points, m, shape (n,) (the plate moves as Re(w e^{i omega t}))."""
        return self.frequency_response([frequency], xy)[0] * float(amplitude)

    def deflection_gradient(self, frequency, amplitude, xy):
        """Complex gradient of the deflection at points, shape (n, 2), dimensionless (m/m)."""
        f = self._check_frequencies([frequency])
        xy = self.check_points(xy)
        coef, sing, _ = self._combined(f)
        m = self.modes
        g = np.stack([m.evaluate(coef, xy, 1, 0, sing)[:, 0], m.evaluate(coef, xy, 0, 1, sing)[:, 0]], axis=-1)
        _, rx, ry = self._residual(f, xy, gradient=True)
        return (g * self.gain + np.stack([rx[0], ry[0]], axis=-1)) * float(amplitude)

    def surface_velocity(self, frequency, amplitude, xy):
        """Complex normal velocity of the plate surface ``i omega w``, m/s, shape (n,)."""
        return 2j * np.pi * float(frequency) * self.deflection(frequency, amplitude, xy)

    def surface_acceleration(self, frequency, amplitude, xy):
        """Complex normal acceleration of the plate surface ``-omega^2 w``, m/s^2, shape (n,)."""
        return -(2.0 * np.pi * float(frequency)) ** 2 * self.deflection(frequency, amplitude, xy)

    def _exact_samples(self, frequencies, xy):
        """Per-unit-drive (n, F, 6) samples by direct modal evaluation (no grid)."""
        coef, sing, off = self._combined(frequencies)
        m = self.modes
        rw, rx, ry = self._residual(frequencies, xy, gradient=True)
        w = (m.evaluate(coef, xy, sing=sing) + off[None, :]) * self.gain + rw.T
        wx = m.evaluate(coef, xy, 1, 0, sing) * self.gain + rx.T
        wy = m.evaluate(coef, xy, 0, 1, sing) * self.gain + ry.T
        return np.stack([w.real, w.imag, wx.real, wx.imag, wy.real, wy.imag], axis=-1)

    # -- tone grid -----------------------------------------------------------------------------
    def _grid_spec(self, freqs):
        """Uniform grid over the plate with two nodes of margin, resolving the top tone's wavelength."""
        k = bending_wavenumber(float(np.max(freqs)), self.thickness, self.youngs_modulus,
                               self.poisson_ratio, self.density)
        h = 2.0 * np.pi / k / self.points_per_wavelength
        x0, x1, y0, y1 = self.extent
        ncx = int(np.clip(np.ceil((x1 - x0) / h), 16, 600))
        ncy = int(np.clip(np.ceil((y1 - y0) / h), 16, 600))
        dx, dy = (x1 - x0) / ncx, (y1 - y0) / ncy
        return x0 - 2 * dx, dx, ncx + 5, y0 - 2 * dy, dy, ncy + 5

    def _grid_key(self, freqs):
        return json.dumps({"v": _GRID_VERSION, "modes": self._modes_key(), "excitation": self.excitation,
                           "drive_point": self.drive_point, "damping": self.damping,
                           "ppw": self.points_per_wavelength, "gain": self.gain,
                           "frequencies": [float(f) for f in freqs]}, sort_keys=True)

    def _build_grid(self, freqs):
        gx0, dx, nx, gy0, dy, ny = self._grid_spec(freqs)
        xs = gx0 + dx * np.arange(nx)
        ys = gy0 + dy * np.arange(ny)
        coef, sing, off = self._combined(freqs)
        m = self.modes
        X, Y = np.meshgrid(xs, ys)
        rw, rx, ry = (c.reshape(len(freqs), ny, nx) for c in
                      self._residual(freqs, np.column_stack([X.ravel(), Y.ravel()]), gradient=True))
        w = (m.evaluate_grid(coef, xs, ys, sing=sing) + off[:, None, None]) * self.gain + rw    # (F, ny, nx)
        wx = m.evaluate_grid(coef, xs, ys, 1, 0, sing) * self.gain + rx
        wy = m.evaluate_grid(coef, xs, ys, 0, 1, sing) * self.gain + ry
        stack = np.stack([w.real, w.imag, wx.real, wx.imag, wy.real, wy.imag], axis=-1)
        # float32 halves memory and disk; its 6e-8 relative precision is far below the
        # interpolation error.
        data = np.ascontiguousarray(stack.transpose(1, 2, 0, 3).reshape(ny * nx, len(freqs) * 6), dtype=np.float32)
        return (gx0, dx, nx, gy0, dy, ny), data

    def _prepared(self):
        """Build (or load) the tone set, its grid and the primitives once."""
        st = self._state
        if "primitives" in st:
            return st
        freqs = self._tone_frequencies()
        st["frequencies"] = freqs
        if self.use_grid:
            directory = cache_directory(self.cache_dir)
            key = self._grid_key(freqs)
            data = _cache_load(directory, "plate-grid", key)
            if data is not None:
                spec = tuple(data["spec"])
                arr = data["data"]
                st["saved"] = True
            else:
                spec, arr = self._build_grid(freqs)
                st["saved"] = _cache_save(directory, "plate-grid", key,
                                          {"spec": np.array(spec, dtype=float), "data": arr})
            gx0, dx, nx, gy0, dy, ny = spec
            st["grid"] = _ToneGrid(gx0, dx, int(nx), gy0, dy, int(ny), arr, len(freqs))
        # Tone amplitudes: given, or the amplitude giving the target peak displacement.
        if self.tones is not None:
            tones = list(self.tones)
        else:
            peak = self._peak_unit_displacement(freqs)
            amps = np.minimum(self.peak_displacement / np.maximum(peak, 1e-300), self.max_amplitude)
            tones = [(float(f), float(a)) for f, a in zip(freqs, amps)]
        st["tone_index"] = np.array([int(np.argmin(np.abs(freqs - f))) for f, _ in tones])
        st["tone_amplitude"] = np.array([a for _, a in tones])
        st["tone_list"] = tuple(tones)
        unit = self.drive_unit
        prims = tuple(Primitive(f"{f:.6g}Hz@{a:.4g}{unit}", (f, a)) for f, a in tones)
        if len({p.name for p in prims}) != len(prims):
            raise ActuatorError("Plate tones contain duplicate (frequency, amplitude) pairs.")
        st["channels"] = (
            Channel("frequency", "Hz", self.band[0], self.band[1], idle=float(freqs[0]),
                    values=tuple(float(f) for f in freqs)),
            Channel("amplitude", unit, 0.0, self.max_amplitude, idle=0.0),
        )
        st["primitives"] = prims
        return st

    def _peak_unit_displacement(self, freqs):
        """Largest |w| per unit drive over the plate, for each frequency, (F,)."""
        x0, x1, y0, y1 = self.extent
        n = 61
        xs, ys = np.linspace(x0, x1, n), np.linspace(y0, y1, n)
        coef, sing, off = self._combined(freqs)
        X, Y = np.meshgrid(xs, ys)
        res = self._residual(freqs, np.column_stack([X.ravel(), Y.ravel()])).reshape(len(freqs), n, n)
        w = (self.modes.evaluate_grid(coef, xs, ys, sing=sing) + off[:, None, None]) * self.gain + res
        return np.max(np.abs(w).reshape(len(freqs), -1), axis=1)

    def prepare(self):
        """Compute or load the modes, tones and field grids now (otherwise done on first use)."""
        self._prepared()
        return self

    def tone_table(self):
        """One dict per tone: name, frequency (Hz), amplitude, peak displacement (m), peak Gamma."""
        st = self._prepared()
        freqs = st["frequencies"]
        peak = self._peak_unit_displacement(freqs)
        out = []
        for p, j, a in zip(st["primitives"], st["tone_index"], st["tone_amplitude"]):
            w = peak[j] * a
            om = 2 * np.pi * freqs[j]
            out.append({"name": p.name, "frequency": float(freqs[j]), "amplitude": float(a),
                        "peak_displacement": float(w), "peak_gamma": float(om**2 * w / STANDARD_GRAVITY)})
        return out

    # -- the actuator contract -----------------------------------------------------------------
    @property
    def channels(self):
        return self._prepared()["channels"]

    def primitives(self):
        return self._prepared()["primitives"]

    def _mobility(self, body):
        return self.mobility if body.drift_mobility is None else float(body.drift_mobility)

    def _samples(self, xy):
        """Per-unit-drive samples (n, F, 6) of every tone frequency at points clipped onto the plate."""
        st = self._prepared()
        p = self._clip(xy)
        if self.use_grid:
            return st["grid"].sample(p)
        return self._exact_samples(st["frequencies"], p)

    def _clip(self, xy):
        # A position off the plate sees the field at the nearest rim point: finite and continuous.
        x0, x1, y0, y1 = self.extent
        return np.column_stack([np.clip(xy[:, 0], x0, x1), np.clip(xy[:, 1], y0, y1)])

    def _velocity(self, body, medium, xy, u):
        f, a = float(u[0]), float(u[1])
        if a == 0.0:
            return np.zeros_like(xy)
        st = self._prepared()
        freqs = st["frequencies"]
        hit = np.flatnonzero(np.isclose(freqs, f, rtol=1e-9, atol=0))
        p = self._clip(xy)
        if self.use_grid and len(hit):
            vals = st["grid"].sample(p)[:, hit[0], :]
        else:
            vals = self._exact_samples(np.array([f]), p)[:, 0, :]
        amp2, grad = _amplitude_fields(vals)
        return drift_law(2 * np.pi * f, a * a * amp2, a * a * grad, self._mobility(body),
                         medium.submerged, self.gate_width)

    def drift(self, body, medium, xy, frequency, amplitude):
        """Drift velocity (n, 2) m/s at any frequency in the band by direct modal evaluation.

        Unlike :meth:`velocity`, the frequency need not be one of the tones, and no grid is used.
        """
        xy = self.check_points(xy)
        f = float(self._check_frequencies([frequency])[0])
        a = float(amplitude)
        if not (np.isfinite(a) and 0 <= a <= self.max_amplitude):
            raise ActuatorError(f"Plate amplitude {amplitude!r} must be in [0, {self.max_amplitude:g}] {self.drive_unit}.")
        self.check_body(body, medium)
        p = self._clip(xy)
        vals = self._exact_samples(np.array([f]), p)[:, 0, :]
        amp2, grad = _amplitude_fields(vals)
        return drift_law(2 * np.pi * f, a * a * amp2, a * a * grad, self._mobility(body),
                         medium.submerged, self.gate_width)

    def basis(self, bodies, medium, xy):
        """Timeshare field basis over the tones, evaluated in one vectorised pass.

        Same result as :meth:`fieldplan.Actuator.basis` (each tone's velocity minus the idle
        velocity, which is zero), but all tones and bodies are interpolated together.
        """
        xy = self.check_points(xy)
        if len(bodies) != len(xy):
            raise ActuatorError(f"basis: {len(bodies)} bodies but {len(xy)} positions.")
        st = self._prepared()
        mob = {}
        for b in bodies:
            if b not in mob:
                self.check_body(b, medium)
                mob[b] = self._mobility(b)
        mu = np.array([mob[b] for b in bodies])
        vals = self._samples(xy)                                # (n, F, 6)
        amp2, grad = _amplitude_fields(vals)                    # (n, F), (n, F, 2)
        j = st["tone_index"]
        a2 = st["tone_amplitude"] ** 2
        omega = 2.0 * np.pi * st["frequencies"][j]              # (K,)
        amp2_k = amp2[:, j] * a2                                # (n, K)
        grad_k = grad[:, j, :] * a2[None, :, None]              # (n, K, 2)
        if medium.submerged:
            factor = mu[:, None] * omega[None, :]
        else:
            gamma = omega[None, :] ** 2 * np.sqrt(amp2_k) / STANDARD_GRAVITY
            factor = -mu[:, None] * omega[None, :] * hop_gate(gamma, self.gate_width)
        fields = np.ascontiguousarray((factor[..., None] * grad_k).transpose(1, 0, 2))
        chans = st["channels"]
        return FieldBasis("timeshare", fields, np.zeros_like(xy), chans, primitives=st["primitives"],
                          idle=np.array([c.idle for c in chans]))

    def describe(self):
        p = self
        return (f"Plate {p.length_x * 1e3:g} x {p.length_y * 1e3:g} x {p.thickness * 1e3:g} mm {p.material}, "
                f"edges {''.join(p.edges)}, {len(p.supports)} supports, {p.excitation} drive, "
                f"band {p.band[0]:g}-{p.band[1]:g} Hz")

    # -- pickling: parameters travel, derived arrays reload from the disk cache ------------------
    def __getstate__(self):
        state = dict(self.__dict__)
        st = state.get("_state", {})
        if st.get("saved"):
            state["_state"] = {}
        return state


def _positive_float(name, value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ActuatorError(f"Plate {name} must be a number > 0, got {value!r}.") from None
    if not (np.isfinite(v) and v > 0):
        raise ActuatorError(f"Plate {name} must be a finite number > 0, got {value!r}.")
    return v


# ---------------------------------------------------------------------------------------------
# plots
# ---------------------------------------------------------------------------------------------
def plot_modes(modes, count=6, columns=3, skip_rigid=True, resolution=101, indices=None):
    """Mode shapes with their nodal lines.

    Parameters
    ----------
    modes : PlateModes
    count : int
        Number of modes drawn.
    indices : sequence of int, optional
        Exactly which modes to draw (e.g. ``plate.excitable_modes()``); overrides ``count``.
    columns : int
    skip_rigid : bool
        Leave out zero-frequency (rigid-body) modes.
    resolution : int
        Samples per side.

    Returns
    -------
    matplotlib.figure.Figure
        Each panel: deflection normalised to its peak (colour, shared colour bar), nodal lines
        (black), axes in mm, title with frequency (Hz) and lambda^2.
    """
    import matplotlib.pyplot as plt

    if indices is not None:
        idx = [int(m) for m in indices]
    else:
        idx = [m for m in range(modes.n_modes) if not (skip_rigid and modes.omega[m] == 0)][:count]
    if not idx:
        raise ActuatorError("plot_modes: no modes to draw.")
    rows = int(np.ceil(len(idx) / columns))
    fig, axes = plt.subplots(rows, columns, figsize=(3.2 * columns + 0.8, 3.0 * rows), squeeze=False,
                             constrained_layout=True)
    x0, x1, y0, y1 = modes.extent
    xs, ys = np.linspace(x0, x1, resolution), np.linspace(y0, y1, resolution)
    shapes = modes.grid(xs, ys, idx)
    image = None
    for k, ax in enumerate(axes.flat):
        if k >= len(idx):
            ax.set_visible(False)
            continue
        z = shapes[k] / np.max(np.abs(shapes[k]))
        image = ax.pcolormesh(xs * 1e3, ys * 1e3, z, cmap="RdBu_r", vmin=-1, vmax=1, shading="auto")
        ax.contour(xs * 1e3, ys * 1e3, z, levels=[0.0], colors="k", linewidths=1.2)
        for s in modes.params["supports"]:
            ax.plot(s[0] * 1e3, s[1] * 1e3, "k^", ms=6)
        m = idx[k]
        ax.set_title(f"mode {m}: {modes.frequencies[m]:.1f} Hz, $\\lambda^2$={modes.lambda2[m]:.2f}", fontsize=9)
        ax.set_aspect("equal")
        ax.set_xlabel("x (mm)")
        ax.set_ylabel("y (mm)")
    if image is not None:
        fig.colorbar(image, ax=axes.ravel().tolist(), label="deflection / peak (1); black: nodal lines", shrink=0.8)
    return fig


def plot_drift(plate, body, medium, tone=0, resolution=81, arrows=25):
    """One tone's displacement amplitude and the drift field it gives a body.

    Parameters
    ----------
    plate : Plate
    body : fieldplan.Body
    medium : fieldplan.Medium
    tone : int or str
        Index or name of the primitive (tone) drawn.
    resolution : int
        Samples per side of the background.
    arrows : int
        Arrows per side.

    Returns
    -------
    matplotlib.figure.Figure
        Background |w| (um, colour bar), nodal region where the plate cannot lift grains
        (Gamma = 1 contour, in air), arrows of drift velocity coloured by speed (mm/s, colour bar).
    """
    import matplotlib.pyplot as plt

    prims = plate.primitives()
    if isinstance(tone, str):
        names = [p.name for p in prims]
        if tone not in names:
            raise ActuatorError(f"plot_drift: no tone named {tone!r}; tones: {names[:6]}...")
        tone = names.index(tone)
    prim = prims[int(tone)]
    f, a = prim.values
    x0, x1, y0, y1 = plate.extent
    xs, ys = np.linspace(x0, x1, resolution), np.linspace(y0, y1, resolution)
    X, Y = np.meshgrid(xs, ys)
    w = np.abs(plate.deflection(f, a, np.column_stack([X.ravel(), Y.ravel()]))).reshape(X.shape)
    xa, ya = np.linspace(x0, x1, arrows + 2)[1:-1], np.linspace(y0, y1, arrows + 2)[1:-1]
    XA, YA = np.meshgrid(xa, ya)
    pts = np.column_stack([XA.ravel(), YA.ravel()])
    v = plate.velocity(body, medium, pts, prim.values)
    speed = np.hypot(v[:, 0], v[:, 1])
    fig, ax = plt.subplots(figsize=(7.2, 5.6), constrained_layout=True)
    im = ax.pcolormesh(xs * 1e3, ys * 1e3, w * 1e6, cmap="Greys", shading="auto")
    fig.colorbar(im, ax=ax, label="displacement amplitude |w| (µm)")
    if not medium.submerged:
        thr = hop_threshold(f)
        ax.contour(xs * 1e3, ys * 1e3, w, levels=[thr], colors="tab:orange", linewidths=1.0, linestyles="--")
    vmax = max(np.max(speed), 1e-300)
    unit = np.where(speed > 0, 1.0 / np.maximum(speed, 1e-300), 0.0)
    q = ax.quiver(pts[:, 0] * 1e3, pts[:, 1] * 1e3, v[:, 0] * unit, v[:, 1] * unit, speed * 1e3,
                  cmap="viridis", clim=(0, vmax * 1e3), scale=arrows * 1.3, width=0.004)
    fig.colorbar(q, ax=ax, label=f"drift speed of {body.name} (mm/s)")
    for s in plate.supports:
        ax.plot(s[0] * 1e3, s[1] * 1e3, "r^", ms=8, label="support")
    if plate.drive_point is not None:
        ax.plot(plate.drive_point[0] * 1e3, plate.drive_point[1] * 1e3, "r*", ms=10, label="drive point")
    regime = "submerged: to antinodes" if medium.submerged else "in air: to nodal lines (dashed: |w| = g/ω²)"
    ax.set_title(f"tone {prim.name}, {regime}", fontsize=10)
    ax.set_xlabel("x (mm)")
    ax.set_ylabel("y (mm)")
    ax.set_aspect("equal")
    if plate.supports or plate.drive_point is not None:
        ax.legend(loc="upper right", fontsize=8)
    return fig


def plot_response(plate, xy, frequencies=None, n=2000):
    """Frequency response |w| per unit drive at points, with the excitable resonances marked.

    Parameters
    ----------
    plate : Plate
    xy : array_like, shape (p, 2)
        Probe points, m.
    frequencies : array_like, optional
        Hz; default ``n`` log-spaced over the band.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    xy = plate.check_points(xy)
    f = np.geomspace(*plate.band, n) if frequencies is None else np.asarray(frequencies, dtype=float)
    h = np.abs(plate.frequency_response(f, xy))
    fig, ax = plt.subplots(figsize=(7.5, 4.2), constrained_layout=True)
    for k in range(len(xy)):
        ax.loglog(f, h[:, k] * 1e6, label=f"at ({xy[k, 0] * 1e3:.0f}, {xy[k, 1] * 1e3:.0f}) mm")
    for fr in plate.resonances():
        ax.axvline(fr, color="0.8", lw=0.6, zorder=0)
    tone_f = [p.values[0] for p in plate.primitives()]
    ax.plot(tone_f, np.full(len(tone_f), np.min(h) * 1e6), "k|", ms=12, label="tones")
    ax.set_xlabel("drive frequency (Hz)")
    ax.set_ylabel(f"|w| per unit drive (µm/{plate.drive_unit})")
    ax.legend(fontsize=8)
    ax.set_title("forced response (grey: excitable resonances)", fontsize=10)
    return fig

