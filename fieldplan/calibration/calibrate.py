"""Calibrated actuators: velocity fields fitted to tracking data, and grey-box parameter fits.

No physics model matches a real set-up exactly, so a researcher records how bodies actually move
under each input setting and plans with *that*:

1. :func:`fieldplan.calibration.tracking.read_tracks` and :func:`fieldplan.calibration.tracking.velocity_samples` turn a
   tracking CSV into velocity samples;
2. :func:`fit_field` fits one smooth field per body kind and primitive (thin-plate-spline RBF,
   smoothing chosen by cross-validation holding out whole tracks) and reports the
   cross-validated error, a per-point standard error and a data-coverage map;
3. :class:`CalibratedActuator` is an actuator backed by those fields (timeshare planning over the
   calibrated primitives; its field basis carries ``meta["coverage"]``, shape (K, n), so a
   planner can penalise primitives where they are not backed by data), saved as a file pair
   ``<name>.npz`` + ``<name>.json``;
4. :func:`fit_parameters` fits chosen parameters of any actuator to the same samples by nonlinear
   least squares, with Student-t confidence intervals;
5. :func:`fieldplan.workflows.fit.calibrate_command` does 1-3 and writes the report figures
   (:mod:`fieldplan.plots.calibration`).

File pair written by :meth:`CalibratedActuator.save` (format ``fieldplan.calibrated-actuator``
version 1; both files are written to a temporary name and renamed, the NPZ first):

``<name>.npz``
    For field ``j``: ``field{j}_xy`` (N, 2) m sample positions; ``field{j}_velocity`` (N, 2) m/s
    measured velocities; ``field{j}_sigma`` (N,) m/s noise estimate; ``field{j}_segment`` (N,)
    int segment ids; ``field{j}_track`` (N,) str track ids; ``field{j}_oof`` (N, 2) m/s out-of-fold (cross-validated) predictions;
    ``field{j}_cv`` (C, 2) smoothing candidates and their CV error (m/s).
``<name>.json``
    ``format``, ``version``, ``npz`` (file name) and ``npz_sha256``; ``channels`` (name, unit,
    lower, upper, idle, values); ``primitives`` (name, values); ``idle_primitive``;
    ``extent_m``; ``fields`` (one entry per field: ``arrays`` prefix, ``kind``, ``primitive``,
    ``kernel``, ``epsilon``, ``smoothing``, ``origin_m``, ``length_m``, ``bandwidth_m``,
    ``coverage_samples``, ``n_samples``, ``n_segments``, ``cv_rmse_m_per_s``,
    ``noise_rms_m_per_s``, ``rms_speed_m_per_s``, ``cv_folds``, ``cv_grouping``);
    ``tracking`` (Savitzky-Golay settings, position noise); ``source`` (file, sha256); ``created``.

The field is rebuilt on load from the stored samples and settings (the RBF fit is deterministic),
so the file holds data, not solver internals.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import os
import re
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.interpolate import RBFInterpolator
from scipy.spatial import cKDTree

from ..contract.actuator import Actuator, Channel, Primitive
from ..errors import ActuatorError, FieldplanError
from ..fileio import atomic_open, atomic_write, plain
from ..units import to_si
from ..world.body import Body
from .tracking import TrackingData, TrackingDataError, VelocitySamples, read_tracks, velocity_samples

__all__ = [
    "CalibrationError",
    "CalibrationWarning",
    "PrimitiveField",
    "FieldFit",
    "fit_field",
    "CalibratedActuator",
    "load_calibrated",
    "channels_from_data",
    "ParameterFit",
    "fit_parameters",
    "FORMAT",
    "FORMAT_VERSION",
]

FORMAT = "fieldplan.calibrated-actuator"
FORMAT_VERSION = 1

#: Coverage is ``1 - exp(-n_eff / COVERAGE_SAMPLES)`` with ``n_eff`` the Gaussian-kernel count
#: of samples within a bandwidth: 2 effective samples give 0.63, 6 give 0.95 (common practice,
#: no source: a saturating transform of a kernel density).
COVERAGE_SAMPLES = 2.0

# Coarse smoothing grid (in units where the data span is 1), refined around the best value.
_COARSE = np.logspace(-7.0, 3.0, 11)
_REFINE = 10.0 ** np.array([-0.5, -0.25, 0.25, 0.5])


class CalibrationError(FieldplanError):
    """Calibration cannot proceed: too little data, an unknown primitive, an unusable file pair."""


class CalibrationWarning(UserWarning):
    """Part of the data could not be used (a primitive with too few samples, a poorly covered field)."""


# ------------------------------------------------------------------------------------------------
# one fitted field
# ------------------------------------------------------------------------------------------------
@dataclass
class PrimitiveField:
    """The fitted velocity field of one body kind under one primitive.

    Calling it, ``field(xy)``, evaluates the smoothed thin-plate-spline (or other RBF) fit.

    Attributes
    ----------
    kind : str or None
        Body kind (``None``: data without a kind column, the field serves any body).
    primitive : str
    xy : ndarray, shape (N, 2)
        Sample positions, m.
    velocity : ndarray, shape (N, 2)
        Measured velocities, m/s.
    sigma : ndarray, shape (N,)
        Noise estimate per sample, m/s (sets the relative smoothing weights).
    segment : ndarray of int, shape (N,)
    track : ndarray of str, shape (N,)
    kernel : str
        ``scipy.interpolate.RBFInterpolator`` kernel.
    epsilon : float or None
        Shape parameter for kernels that need one, in units of ``length``.
    smoothing : float
        Chosen smoothing (in the normalised units where the data span is 1).
    origin : ndarray, shape (2,)
        m; positions are normalised as ``(xy - origin) / length``.
    length : float
        m.
    bandwidth : float
        Coverage kernel width, m.
    cv : ndarray, shape (C, 2)
        Smoothing candidates and their cross-validated RMS vector error, m/s.
    oof : ndarray, shape (N, 2)
        Out-of-fold predictions at the samples, m/s.
    cv_folds : int
    cv_grouping : str
        What the folds held out together: ``"track"`` (whole tracks), ``"segment"`` (fewer tracks
        than folds) or ``"sample"`` (fewer segments than folds).
    """

    kind: str | None
    primitive: str
    xy: np.ndarray
    velocity: np.ndarray
    sigma: np.ndarray
    segment: np.ndarray
    track: np.ndarray
    kernel: str
    epsilon: float | None
    smoothing: float
    origin: np.ndarray
    length: float
    bandwidth: float
    cv: np.ndarray
    oof: np.ndarray
    cv_folds: int
    cv_grouping: str
    coverage_samples: float = COVERAGE_SAMPLES
    _rbf: object = field(default=None, repr=False)
    _hat: object = field(default=None, repr=False)
    _tree: object = field(default=None, repr=False)

    def __post_init__(self):
        if self._rbf is None:
            self._rbf = _make_rbf(self._norm(self.xy), self.velocity, self.smoothing * _weights(self.sigma),
                                  self.kernel, self.epsilon)

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_hat"] = None      # large cache, rebuilt on demand
        return state

    def _norm(self, xy):
        return (np.asarray(xy, dtype=float) - self.origin) / self.length

    def __call__(self, xy):
        """Fitted velocity at ``xy`` (n, 2) m, in m/s, shape (n, 2)."""
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        if len(xy) == 0:
            return np.zeros((0, 2))
        return self._rbf(self._norm(xy))

    # -- quality -----------------------------------------------------------------------------
    @property
    def n_samples(self):
        return len(self.xy)

    @property
    def cv_rmse(self):
        """Cross-validated RMS vector error at the chosen smoothing, m/s."""
        return float(np.sqrt(np.mean(np.sum((self.oof - self.velocity) ** 2, axis=1))))

    @property
    def noise_rms(self):
        """RMS vector noise expected from tracking noise alone, m/s (the floor of ``cv_rmse``)."""
        s = self.sigma[np.isfinite(self.sigma)]
        return float(np.sqrt(2.0 * np.mean(s * s))) if len(s) else float("nan")

    @property
    def rms_speed(self):
        """RMS measured speed, m/s."""
        return float(np.sqrt(np.mean(np.sum(self.velocity**2, axis=1))))

    def coverage(self, xy):
        """Data coverage in [0, 1] at ``xy`` (n, 2) m: 0 far from any sample, near 1 among many.

        ``1 - exp(-n_eff / coverage_samples)``, ``n_eff = sum_i exp(-|x - x_i|^2 / (2 h^2))`` with
        ``h = bandwidth``.
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        if self._tree is None:
            self._tree = cKDTree(self.xy)
        tree = self._tree
        # Samples beyond 6 bandwidths add < exp(-18) each: leave them out of the sum.
        d = tree.sparse_distance_matrix(cKDTree(xy), 6.0 * self.bandwidth, output_type="coo_matrix")
        n_eff = np.bincount(d.col, weights=np.exp(-0.5 * (d.data / self.bandwidth) ** 2), minlength=len(xy))
        return 1.0 - np.exp(-n_eff / self.coverage_samples)

    def uncertainty(self, xy):
        """Standard error of each fitted velocity component at ``xy`` (n, 2) m, m/s, shape (n,).

        The fit is a linear smoother, ``f(x) = sum_i W_i(x) v_i``; its variance from measurement
        noise is ``s^2 sum_i W_i(x)^2 w_i`` with relative noise weights ``w_i`` and ``s^2`` the
        residual variance over the residual degrees of freedom ``N - tr(W)`` (the smoothing-spline
        estimate). It grows where data are sparse and outside the data; it excludes the bias of
        the smoother, which the cross-validated error includes.
        """
        xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        hat, scale2, w = self._hat_model()
        W = hat(self._norm(xy))                   # (n, N)
        return np.sqrt(scale2 * np.sum(W * W * w[None, :], axis=1))

    def _hat_model(self):
        if self._hat is None:
            N = self.n_samples
            w = _weights(self.sigma)
            hat = _make_rbf(self._norm(self.xy), np.eye(N), self.smoothing * w, self.kernel, self.epsilon)
            trace = float(np.trace(hat(self._norm(self.xy))))
            r = self.velocity - self(self.xy)
            dof = max(N - trace, 1.0)
            scale2 = float(np.sum(np.sum(r * r, axis=1) / w) / (2.0 * dof))
            self._hat = (hat, scale2, w)
        return self._hat

    def row(self):
        """Summary of this field as a dict (SI units; keys name the units)."""
        return {
            "kind": self.kind, "primitive": self.primitive, "n_samples": self.n_samples,
            "n_segments": int(len(np.unique(self.segment))), "smoothing": self.smoothing,
            "cv_rmse_m_per_s": self.cv_rmse, "noise_rms_m_per_s": self.noise_rms,
            "rms_speed_m_per_s": self.rms_speed,
            "cv_relative": self.cv_rmse / self.rms_speed if self.rms_speed > 0 else float("nan"),
            "bandwidth_m": self.bandwidth, "cv_folds": self.cv_folds, "cv_grouping": self.cv_grouping,
        }


def _weights(sigma):
    """Relative noise variances (mean 1); uniform when no noise estimate is available."""
    s2 = np.asarray(sigma, dtype=float) ** 2
    m = np.mean(s2) if len(s2) else 0.0
    if not np.isfinite(m) or m <= 0 or not np.all(np.isfinite(s2)):
        return np.ones(len(s2))
    return np.maximum(s2 / m, 1e-6)


def _make_rbf(xn, values, smoothing, kernel, epsilon):
    kw = {"kernel": kernel, "smoothing": smoothing}
    if epsilon is not None:
        kw["epsilon"] = epsilon
    try:
        return RBFInterpolator(xn, values, **kw)
    except (ValueError, np.linalg.LinAlgError) as exc:
        raise CalibrationError(
            f"RBF fit failed with kernel {kernel!r}, smoothing {np.mean(smoothing):.3g}: {exc}. "
            "Samples may be collinear (all on one line) or too few for the kernel's polynomial.") from None


# ------------------------------------------------------------------------------------------------
# fitting
# ------------------------------------------------------------------------------------------------
@dataclass
class FieldFit:
    """The fields fitted by :func:`fit_field`, with what a calibrated actuator needs.

    Attributes
    ----------
    fields : list of PrimitiveField
    channels : tuple of (name, unit)
        Channel columns of the tracking data.
    primitive_values : dict
        Primitive name -> channel values (SI), for the fitted primitives.
    skipped : list of str
        Why a (kind, primitive) was not fitted.
    tracking : dict
        Savitzky-Golay settings and position noise of the samples.
    source : str or None
    """

    fields: list
    channels: tuple
    primitive_values: dict
    skipped: list = field(default_factory=list)
    tracking: dict = field(default_factory=dict)
    source: str | None = None

    @property
    def kinds(self):
        return list(dict.fromkeys(f.kind for f in self.fields))

    @property
    def primitives(self):
        return list(dict.fromkeys(f.primitive for f in self.fields))

    def get(self, primitive, kind=None):
        """The :class:`PrimitiveField` of ``primitive`` for body ``kind``."""
        for f in self.fields:
            if f.primitive == primitive and f.kind == kind:
                return f
        raise CalibrationError(
            f"no fitted field for primitive {primitive!r} and body kind {kind!r}; fitted: "
            f"{[(f.kind, f.primitive) for f in self.fields]}.")

    def report(self):
        """One dict per field (see :meth:`PrimitiveField.row`)."""
        return [f.row() for f in self.fields]

    def table(self):
        """The report as aligned text (speeds in um/s)."""
        head = f"{'kind':<12} {'primitive':<24} {'N':>5} {'CV rmse':>9} {'noise':>8} {'speed':>8} {'rel':>6}"
        lines = [head, "-" * len(head)]
        for r in self.report():
            lines.append(
                f"{str(r['kind']):<12} {r['primitive']:<24} {r['n_samples']:>5d} "
                f"{r['cv_rmse_m_per_s'] * 1e6:>9.3g} {r['noise_rms_m_per_s'] * 1e6:>8.3g} "
                f"{r['rms_speed_m_per_s'] * 1e6:>8.3g} {r['cv_relative']:>6.2f}")
        lines.append("(speeds and errors in um/s; rel = CV rmse / RMS speed)")
        return "\n".join(lines)


def _folds(track, segment, folds, rng):
    """Fold label per sample; whole tracks (else segments) are held out together when there are enough.

    A body under one primitive often passes the same place twice (cycled inputs), so holding out
    only a segment would leave its twin in the training set and flatter the error.
    """
    for groups, name in ((track, "track"), (segment, "segment")):
        out = _group_folds(groups, folds, rng)
        if out is not None:
            return out, name
    return rng.permutation(np.arange(len(segment)) % folds), "sample"


def _group_folds(groups, folds, rng):
    segs, inv, counts = np.unique(groups, return_inverse=True, return_counts=True)
    if len(segs) >= folds:
        order = rng.permutation(len(segs))
        load = np.zeros(folds)
        seg_fold = np.empty(len(segs), dtype=int)
        # Largest segments first into the emptiest fold keeps folds of similar size.
        for s in order[np.argsort(-counts[order], kind="stable")]:
            k = int(np.argmin(load))
            seg_fold[s] = k
            load[k] += counts[s]
        return seg_fold[inv]
    return None


def _cv_predict(xn, v, w, lam, fold, kernel, epsilon):
    pred = np.empty_like(v)
    for k in np.unique(fold):
        test = fold == k
        rbf = _make_rbf(xn[~test], v[~test], lam * w[~test], kernel, epsilon)
        pred[test] = rbf(xn[test])
    return pred


def _rmse(a, b):
    return float(np.sqrt(np.mean(np.sum((a - b) ** 2, axis=1))))


def fit_field(samples, *, kernel="thin_plate_spline", epsilon=None, smoothing=None, folds=5,
              min_samples=20, max_samples=800, bandwidth=None, primitives=None, rng=0):
    """Fit a smooth velocity field per body kind and primitive.

    Each field is a ``scipy.interpolate.RBFInterpolator`` through the samples' positions and
    velocities with per-sample smoothing ``smoothing * sigma_i^2 / mean(sigma^2)``; the smoothing
    level is chosen by k-fold cross-validation that holds out whole tracks (else whole segments,
    if there are fewer tracks than folds), so the reported error is that of predicting where a
    body has not been, not of re-predicting a neighbour on the same track.

    Parameters
    ----------
    samples : VelocitySamples
    kernel : str
        RBF kernel (``"thin_plate_spline"`` needs no shape parameter).
    epsilon : float, optional
        Shape parameter for kernels that need one, relative to the data span.
    smoothing : float, optional
        Fixed smoothing level instead of cross-validation (normalised units).
    folds : int
        Cross-validation folds (>= 2).
    min_samples : int
        A (kind, primitive) with fewer samples is skipped with a :class:`CalibrationWarning`.
    max_samples : int
        Larger groups are thinned to this many samples (random, seeded) to bound the O(N^3) fit.
    bandwidth : float or str, optional
        Coverage kernel width, m; default the median distance from a sample to the nearest sample
        of another track (the typical spacing between neighbouring tracks).
    primitives : sequence of str, optional
        Fit only these primitives.
    rng : int or numpy.random.Generator
        Seeds fold assignment and thinning.

    Returns
    -------
    FieldFit

    Raises
    ------
    CalibrationError
        Unknown primitive requested, or no group has enough samples.

    Examples
    --------
    >>> import numpy as np, fieldplan
    >>> from fieldplan.contract.testing import SourceArray
    >>> from fieldplan.calibration.tracking import synthetic_tracks, velocity_samples
    >>> act = SourceArray([[0, 0], [1e-3, 0]], core=3e-4, affine=False, extent=(0, 1e-3, 0, 1e-3))
    >>> bead = fieldplan.Body("bead", radius=2e-6, density=1100.0)
    >>> starts = np.random.default_rng(0).uniform(1e-4, 9e-4, (30, 2))
    >>> data = synthetic_tracks(act, bead, fieldplan.water(), starts, [("left", [1, 0], 5.0)],
    ...                         noise=1e-7, rng=1)
    >>> fit = fit_field(velocity_samples(data))
    >>> fit.primitives, fit.fields[0].cv_rmse < 0.2 * fit.fields[0].rms_speed
    (['left'], True)
    """
    if isinstance(samples, TrackingData):
        samples = velocity_samples(samples)
    if not isinstance(samples, VelocitySamples):
        raise CalibrationError(f"fit_field expects VelocitySamples, got {type(samples).__name__}.")
    folds = int(folds)
    if folds < 2:
        raise CalibrationError(f"folds must be >= 2, got {folds}.")
    if smoothing is not None and not (np.isfinite(smoothing) and smoothing >= 0):
        raise CalibrationError(f"smoothing must be a finite number >= 0, got {smoothing!r}.")
    if bandwidth is not None:
        bandwidth = to_si(bandwidth, "m", name="bandwidth")
        if not bandwidth > 0:
            raise CalibrationError(f"bandwidth must be > 0 m, got {bandwidth}.")
    rng = np.random.default_rng(rng)
    present = list(dict.fromkeys(str(p) for p in samples.primitive))
    if primitives is not None:
        primitives = [str(p) for p in primitives]
        unknown = [p for p in primitives if p not in present]
        if unknown:
            raise CalibrationError(f"primitive(s) {unknown} are not in the data; present: {present}.")
    out, skipped = [], []
    for kind, prim, idx in samples.groups():
        if primitives is not None and prim not in primitives:
            continue
        n_seg = len(np.unique(samples.segment[idx]))
        if len(idx) < max(min_samples, 4):
            tracks = sorted(set(samples.track[idx].tolist()))
            msg = (f"primitive {prim!r}" + (f", body kind {kind!r}" if kind is not None else "")
                   + f": {len(idx)} velocity sample(s) from {n_seg} segment(s) (tracks {tracks[:6]}"
                   + ("..." if len(tracks) > 6 else "")
                   + f", t = {samples.time[idx].min():.4g}-{samples.time[idx].max():.4g} s), "
                   f"fewer than min_samples={min_samples}; not fitted. Record longer or more tracks "
                   "under it, or lower min_samples.")
            skipped.append(msg)
            warnings.warn(msg, CalibrationWarning, stacklevel=2)
            continue
        if len(idx) > max_samples:
            idx = np.sort(rng.choice(idx, size=max_samples, replace=False))
        out.append(_fit_one(samples, kind, prim, idx, kernel, epsilon, smoothing, folds, bandwidth, rng))
    if not out:
        raise CalibrationError(
            "no primitive has enough velocity samples to fit a field:\n  " + "\n  ".join(skipped)
            if skipped else "no samples to fit (check the primitives= selection).")
    fitted = list(dict.fromkeys(f.primitive for f in out))
    pv = {p: samples.primitive_values.get(p, ()) for p in fitted}
    tracking = {"window": samples.window, "polyorder": samples.polyorder, "stride": samples.stride,
                "position_noise_m": samples.position_noise}
    return FieldFit(out, tuple(samples.channels), pv, skipped, tracking, samples.source)


def _fit_one(samples, kind, prim, idx, kernel, epsilon, smoothing, folds, bandwidth, rng):
    xy = samples.xy[idx]
    v = samples.velocity[idx]
    sig = samples.sigma[idx]
    seg = samples.segment[idx]
    trk = samples.track[idx].astype(str)
    origin = xy.mean(axis=0)
    length = float(max(np.max(np.ptp(xy, axis=0)), 1e-12))
    xn = (xy - origin) / length
    w = _weights(sig)
    fold, grouping = _folds(trk, seg, folds, rng)
    nf = len(np.unique(fold))
    if smoothing is None:
        table = {}
        for lam in _COARSE:
            table[float(lam)] = _rmse(_cv_predict(xn, v, w, lam, fold, kernel, epsilon), v)
        best = min(table, key=table.get)
        for f in _REFINE:
            lam = float(best * f)
            table[lam] = _rmse(_cv_predict(xn, v, w, lam, fold, kernel, epsilon), v)
        best = min(table, key=table.get)
        lam = best
    else:
        lam = float(smoothing)
        table = {}
    oof = _cv_predict(xn, v, w, lam, fold, kernel, epsilon)
    table[lam] = _rmse(oof, v)
    cv = np.array(sorted(table.items()))
    if bandwidth is None:
        bandwidth = _auto_bandwidth(xy, trk, length)
    return PrimitiveField(kind, prim, xy, v, sig, seg, trk, kernel, epsilon, lam, origin, length, bandwidth,
                          cv, oof, nf, grouping)


def _auto_bandwidth(xy, track, length):
    """Median distance from a sample to the nearest sample of another track, m."""
    names = np.unique(track)
    if len(names) < 2:
        return 0.1 * length
    dist = np.empty(len(xy))
    for name in names:        # one KD-tree per track, not per point
        mine = track == name
        dist[mine] = cKDTree(xy[~mine]).query(xy[mine])[0]
    h = float(np.median(dist))
    return h if h > 0 else 0.1 * length


# ------------------------------------------------------------------------------------------------
# the calibrated actuator
# ------------------------------------------------------------------------------------------------
def channels_from_data(channels, primitive_values, idle_primitive=None):
    """Channels of a calibrated actuator and the values of its primitives.

    With channel columns in the data, each channel keeps its name and SI unit, its bounds span
    the values seen and 0 (the idle input), and it lists the values seen as its allowed values.
    Without, one dimensionless channel ``primitive`` takes the value ``k`` for the ``k``-th
    primitive (1-based) and 0 when idle (and for ``idle_primitive``, if given).

    Parameters
    ----------
    channels : tuple of (name, unit)
    primitive_values : dict
        Primitive name -> channel values (empty tuples when the data had no channels).
    idle_primitive : str, optional

    Returns
    -------
    channels : tuple of Channel
    values : dict
        Primitive name -> tuple of channel values.
    """
    names = list(primitive_values)
    if idle_primitive is not None and idle_primitive not in names:
        raise CalibrationError(f"idle primitive {idle_primitive!r} was not fitted; fitted: {names}.")
    if channels:
        vals = np.array([primitive_values[p] for p in names], dtype=float).reshape(len(names), len(channels))
        if idle_primitive is not None:
            iv = vals[names.index(idle_primitive)]
            if np.any(iv != 0):
                raise CalibrationError(
                    f"idle primitive {idle_primitive!r} has channel values {iv.tolist()}, not all 0: the idle "
                    "input of a calibrated actuator is every channel at 0.")
        out = []
        for j, (n, u) in enumerate(channels):
            col = np.unique(vals[:, j])
            out.append(Channel(n, u, min(0.0, float(col.min())), max(0.0, float(col.max())), 0.0,
                               tuple(float(v) for v in col)))
        return tuple(out), {p: tuple(float(v) for v in vals[k]) for k, p in enumerate(names)}
    others = [p for p in names if p != idle_primitive]
    values = {p: (float(k + 1),) for k, p in enumerate(others)}
    if idle_primitive is not None:
        values[idle_primitive] = (0.0,)
    chan = Channel("primitive", "1", 0.0, float(max(len(others), 1)), 0.0,
                   tuple(float(k + 1) for k in range(len(others))))
    return (chan,), values


class CalibratedActuator(Actuator):
    """An actuator whose velocity fields were fitted to tracking data.

    Only the recorded settings are known, so the actuator is planned by time-sharing them: its
    :meth:`primitives` are the calibrated primitives (except the idle one), its channels are the
    data's channels restricted to the values recorded (or one ``primitive`` index channel when the
    data named settings only). ``velocity(body, medium, xy, u)`` with ``u`` equal to a calibrated
    primitive's values returns that primitive's fitted field for the body's kind; the idle input
    (all channels 0) returns the fitted idle field if one was recorded, else zero (tag
    ``zero_idle``); any other input raises :class:`ActuatorError`.

    The medium argument is not used: the fields were measured in the medium of the experiment.
    Outside the data the thin-plate spline continues linearly, which is a guess: :meth:`coverage`
    (0 = no data near, 1 = well covered) and :meth:`uncertainty` say where the fields are backed by
    data, so a planner can penalise or avoid the rest.

    Parameters
    ----------
    fit : FieldFit
    idle_primitive : str, optional
        Name of a recorded primitive that is the idle (all-off) input; with channel columns a
        primitive whose channels are all 0 is found automatically.
    extent : tuple (xmin, xmax, ymin, ymax), optional
        m; default the bounding box of the samples.

    Examples
    --------
    >>> import numpy as np, fieldplan
    >>> from fieldplan.contract.testing import SourceArray, check_actuator
    >>> from fieldplan.calibration.tracking import synthetic_tracks, velocity_samples
    >>> truth = SourceArray([[0, 0], [1e-3, 0]], core=3e-4, affine=False, extent=(0, 1e-3, 0, 1e-3))
    >>> bead = fieldplan.Body("bead", radius=2e-6, density=1100.0)
    >>> starts = np.random.default_rng(0).uniform(1e-4, 9e-4, (20, 2))
    >>> data = synthetic_tracks(truth, bead, fieldplan.water(), starts,
    ...                         [("left", [1, 0], 4.0), ("right", [0, 1], 4.0)], noise=1e-7, rng=1)
    >>> act = CalibratedActuator(fit_field(velocity_samples(data)))
    >>> [p.name for p in act.primitives()]
    ['left', 'right']
    >>> check_actuator(act, [bead], fieldplan.water())
    """

    def __init__(self, fit, *, idle_primitive=None, extent=None):
        if not isinstance(fit, FieldFit):
            raise ActuatorError(f"CalibratedActuator needs a FieldFit (from fit_field), got {type(fit).__name__}.")
        self.fit = fit
        pv = fit.primitive_values
        if idle_primitive is None and fit.channels:
            zero = [p for p, v in pv.items() if len(v) and all(x == 0 for x in v)]
            idle_primitive = zero[0] if zero else None
        self.idle_primitive = idle_primitive
        self._channels, self._values = channels_from_data(fit.channels, pv, idle_primitive)
        self._names = [p for p in self._values if p != idle_primitive]
        self._table = np.array([self._values[p] for p in self._names], dtype=float).reshape(
            len(self._names), len(self._channels))
        self._fields = {(f.kind, f.primitive): f for f in fit.fields}
        self._kinds = fit.kinds
        if extent is None:
            allxy = np.vstack([f.xy for f in fit.fields])
            lo, hi = allxy.min(axis=0), allxy.max(axis=0)
            extent = (float(lo[0]), float(hi[0]), float(lo[1]), float(hi[1]))
        self.extent = tuple(float(v) for v in extent)
        tags = {"discrete_channels"}
        if idle_primitive is None:
            tags.add("zero_idle")
        self.tags = frozenset(tags)

    @property
    def channels(self):
        return self._channels

    def primitives(self):
        """The calibrated primitives (the idle one excluded), in the order they were fitted."""
        return tuple(Primitive(p, self._values[p]) for p in self._names)

    @property
    def kinds(self):
        """Body kinds with fields (``[None]``: any body)."""
        return list(self._kinds)

    def describe(self):
        k = "any body" if self._kinds == [None] else f"body kinds {self._kinds}"
        return (f"CalibratedActuator: {len(self._names)} primitive(s) {self._names}, {k}, "
                f"channels {[c.name for c in self._channels]}")

    def _kind(self, body):
        return None if self._kinds == [None] else body.name

    def check_body(self, body, medium):
        if self._kinds != [None] and body.name not in self._kinds:
            raise ActuatorError(
                f"CalibratedActuator: no calibration for body kind {body.name!r}; the tracking data had "
                f"kinds {self._kinds}. Name the body like the 'kind' column of the data.")

    def setting(self, u):
        """Name of the calibrated setting ``u`` is (``None`` for the uncalibrated idle input).

        Raises
        ------
        ActuatorError
            If ``u`` is neither a calibrated primitive nor the idle input.
        """
        return self._setting(self.check_input(u))

    def _setting(self, u):
        scale = np.maximum(np.abs(self._table), 1e-300) if len(self._table) else 1.0
        hit = np.flatnonzero(np.all(np.abs(self._table - u) <= 1e-9 * scale + 1e-300, axis=1))
        if len(hit):
            return self._names[int(hit[0])]
        if np.all(u == self.idle_input()):
            return self.idle_primitive
        shown = {c.name: float(v) for c, v in zip(self._channels, u)}
        raise ActuatorError(
            f"CalibratedActuator: input {shown} is not a calibrated setting. Only the recorded "
            f"primitives {self._names} (and the idle input) have fitted fields; plan by time-sharing "
            "primitives() (FieldBasis mode 'timeshare') or record this setting and calibrate again.")

    def _velocity(self, body, medium, xy, u):
        name = self._setting(u)
        if name is None:
            return np.zeros_like(xy)
        return self.field(name, body)(xy)

    def field(self, primitive, body=None):
        """The :class:`PrimitiveField` of ``primitive`` for ``body`` (a Body, a kind or None)."""
        kind = body.name if hasattr(body, "name") else body
        if self._kinds == [None] or (kind is None and len(self._kinds) == 1):
            kind = self._kinds[0]
        f = self._fields.get((kind, primitive))
        if f is None:
            have = sorted(p for k, p in self._fields if k == kind)
            raise ActuatorError(
                f"CalibratedActuator: no data for primitive {primitive!r} with body kind {kind!r} "
                f"(that kind was recorded under {have}); record it or plan without it.")
        return f

    def coverage(self, xy, primitive=None, body=None):
        """Data coverage in [0, 1] at positions ``xy`` (n, 2) m, shape (n,).

        Parameters
        ----------
        xy : array_like, shape (n, 2)
            m.
        primitive : str, optional
            One primitive; default the minimum over all primitives (a position is only as well
            known as its worst-known field).
        body : Body or str, optional
            Body kind; default the minimum over all kinds.
        """
        xy = self.check_points(xy)
        fields = [f for (k, p), f in self._fields.items()
                  if (primitive is None or p == primitive)
                  and (body is None or self._kinds == [None] or k == (body.name if hasattr(body, "name") else body))]
        if not fields:
            raise ActuatorError(f"coverage: no field for primitive {primitive!r} and body {body!r}.")
        return np.min([f.coverage(xy) for f in fields], axis=0)

    def basis(self, bodies, medium, xy):
        """The timeshare field basis (see :meth:`fieldplan.Actuator.basis`), with coverage attached.

        ``basis.meta["coverage"]`` is an array (K, n) in [0, 1]: the data coverage of primitive
        ``k``'s field at body ``i``'s position, for that body's kind; ``basis.meta["drift_coverage"]``
        (n,) is that of the idle field (ones when the idle velocity is zero by assumption). A planner
        may penalise time on primitive ``k`` in proportion to ``1 - coverage[k, i]``.
        """
        basis = super().basis(bodies, medium, xy)
        xy = self.check_points(xy)
        cov = np.ones((basis.size, len(xy)))
        drift_cov = np.ones(len(xy))
        kinds = [None if self._kinds == [None] else b.name for b in bodies]
        for kind in dict.fromkeys(kinds):
            idx = np.flatnonzero([k == kind for k in kinds])
            for k, p in enumerate(basis.primitives):
                cov[k, idx] = self.field(p.name, kind).coverage(xy[idx])
            if self.idle_primitive is not None:
                drift_cov[idx] = self.field(self.idle_primitive, kind).coverage(xy[idx])
        basis.meta["coverage"] = cov
        basis.meta["drift_coverage"] = drift_cov
        return basis

    def uncertainty(self, xy, primitive, body=None):
        """Standard error of each velocity component of ``primitive``'s field at ``xy``, m/s, (n,)."""
        xy = self.check_points(xy)
        return self.field(primitive, body).uncertainty(xy)

    # -- files ---------------------------------------------------------------------------------
    def save(self, path, *, note=None):
        """Write the file pair ``<stem>.npz`` and ``<stem>.json`` (layout in the module docstring).

        Parameters
        ----------
        path : str or os.PathLike
            ``<stem>``, ``<stem>.json`` or ``<stem>.npz``.
        note : str, optional
            Free text stored in the JSON (e.g. "invented data").

        Returns
        -------
        (str, str)
            Paths of the JSON and NPZ files.
        """
        stem = _stem(path)
        npz_path, json_path = stem + ".npz", stem + ".json"
        arrays = {}
        meta_fields = []
        for j, f in enumerate(self.fit.fields):
            pre = f"field{j}"
            arrays.update({f"{pre}_xy": f.xy, f"{pre}_velocity": f.velocity, f"{pre}_sigma": f.sigma,
                           f"{pre}_segment": f.segment.astype(np.int64), f"{pre}_track": f.track.astype(str),
                           f"{pre}_oof": f.oof, f"{pre}_cv": f.cv})
            meta_fields.append({
                "arrays": pre, "kind": f.kind, "primitive": f.primitive, "kernel": f.kernel,
                "epsilon": f.epsilon, "smoothing": f.smoothing, "origin_m": [float(v) for v in f.origin],
                "length_m": f.length, "bandwidth_m": f.bandwidth, "coverage_samples": f.coverage_samples,
                "n_samples": f.n_samples, "n_segments": int(len(np.unique(f.segment))),
                "cv_rmse_m_per_s": f.cv_rmse, "noise_rms_m_per_s": f.noise_rms,
                "rms_speed_m_per_s": f.rms_speed, "cv_folds": f.cv_folds, "cv_grouping": f.cv_grouping,
            })
        with atomic_open(npz_path, "wb") as fh:
            np.savez(fh, **arrays)
        src = self.fit.source
        meta = {
            "format": FORMAT, "version": FORMAT_VERSION,
            "npz": os.path.basename(npz_path), "npz_sha256": _sha256(npz_path),
            "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "note": note,
            "channels": [{"name": c.name, "unit": c.unit, "lower": c.lower, "upper": c.upper, "idle": c.idle,
                          "values": list(c.values)} for c in self._channels],
            "data_channels": [list(c) for c in self.fit.channels],
            "primitives": [{"name": p, "values": list(self.fit.primitive_values[p])} for p in self.fit.primitives],
            "idle_primitive": self.idle_primitive,
            "extent_m": list(self.extent),
            "fields": meta_fields,
            "skipped": list(self.fit.skipped),
            "tracking": plain(self.fit.tracking),
            "source": {"file": src, "sha256": _sha256(src) if src and os.path.exists(src) else None},
        }
        atomic_write(json_path, json.dumps(meta, indent=2, allow_nan=True) + "\n")
        return json_path, npz_path

    @classmethod
    def load(cls, path):
        """Read a file pair written by :meth:`save` (``path``: stem, ``.json`` or ``.npz``).

        Raises
        ------
        CalibrationError
            Missing file, wrong format or version, or an NPZ that is not the one the JSON names
            (checksum mismatch: the pair comes from two different runs).
        """
        stem = _stem(path)
        json_path = stem + ".json"
        if not os.path.exists(json_path):
            raise CalibrationError(f"{json_path}: calibrated-actuator metadata file not found.")
        try:
            with open(json_path, encoding="utf-8") as fh:
                meta = json.load(fh)
        except json.JSONDecodeError as exc:
            raise CalibrationError(f"{json_path}: not valid JSON ({exc}).") from None
        if meta.get("format") != FORMAT:
            raise CalibrationError(f"{json_path}: format is {meta.get('format')!r}, expected {FORMAT!r}.")
        if meta.get("version") != FORMAT_VERSION:
            raise CalibrationError(f"{json_path}: version {meta.get('version')!r} is not supported "
                                   f"(this fieldplan reads version {FORMAT_VERSION}).")
        npz_path = os.path.join(os.path.dirname(json_path), meta["npz"])
        if not os.path.exists(npz_path):
            raise CalibrationError(f"{json_path}: its arrays file {npz_path} is missing.")
        if _sha256(npz_path) != meta.get("npz_sha256"):
            raise CalibrationError(
                f"{npz_path} does not match {json_path} (checksum differs): the two files come from "
                "different calibration runs; copy them together.")
        fields = []
        with np.load(npz_path, allow_pickle=False) as z:
            for m in meta["fields"]:
                pre = m["arrays"]
                fields.append(PrimitiveField(
                    m["kind"], m["primitive"], z[f"{pre}_xy"], z[f"{pre}_velocity"], z[f"{pre}_sigma"],
                    z[f"{pre}_segment"], z[f"{pre}_track"], m["kernel"], m["epsilon"], float(m["smoothing"]),
                    np.asarray(m["origin_m"], dtype=float), float(m["length_m"]), float(m["bandwidth_m"]),
                    z[f"{pre}_cv"], z[f"{pre}_oof"], int(m["cv_folds"]), m["cv_grouping"],
                    float(m["coverage_samples"])))
        chans = tuple(tuple(c) for c in meta["data_channels"])
        pv = {p["name"]: tuple(float(v) for v in p["values"]) for p in meta["primitives"]}
        fit = FieldFit(fields, chans, pv, list(meta.get("skipped", [])), dict(meta.get("tracking", {})),
                       (meta.get("source") or {}).get("file"))
        act = cls(fit, idle_primitive=meta.get("idle_primitive"), extent=tuple(meta["extent_m"]))
        stored = [(c["name"], c["unit"], c["lower"], c["upper"], tuple(c["values"])) for c in meta["channels"]]
        rebuilt = [(c.name, c.unit, c.lower, c.upper, c.values) for c in act.channels]
        if stored != rebuilt:
            raise CalibrationError(f"{json_path}: stored channels {stored} disagree with the primitives' values "
                                   f"({rebuilt}); the file was edited inconsistently.")
        return act


def load_calibrated(path):
    """Load a calibrated actuator file pair (for scenarios: ``fieldplan.calibration.calibrate:load_calibrated``).

    Parameters
    ----------
    path : str
        ``<stem>``, ``<stem>.json`` or ``<stem>.npz``.
    """
    return CalibratedActuator.load(path)


def _stem(path):
    p = os.fspath(path)
    for ext in (".json", ".npz"):
        if p.endswith(ext):
            return p[: -len(ext)]
    return p


def _sha256(path):
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


# ------------------------------------------------------------------------------------------------
# grey-box parameter fitting
# ------------------------------------------------------------------------------------------------
@dataclass
class ParameterFit:
    """Result of :func:`fit_parameters`.

    Attributes
    ----------
    names : tuple of str
    estimate : ndarray, shape (p,)
        Fitted values, in the parameters' own units.
    stderr : ndarray, shape (p,)
        Standard errors (``inf`` for a parameter the data cannot determine).
    lower, upper : ndarray, shape (p,)
        Confidence interval bounds.
    confidence : float
    covariance, correlation : ndarray, shape (p, p)
    dof : int
        Residual degrees of freedom (2 N - p).
    residual_scale : float
        RMS of the noise-weighted residuals (about 1 when the model and the noise estimate fit).
    rms_residual : float
        RMS vector residual, m/s.
    n_samples : int
    success : bool
    status : int
    message : str
    nfev : int
    """

    names: tuple
    estimate: np.ndarray
    stderr: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    confidence: float
    covariance: np.ndarray
    correlation: np.ndarray
    dof: int
    residual_scale: float
    rms_residual: float
    n_samples: int
    success: bool
    status: int
    message: str
    nfev: int

    def as_dict(self):
        """``{name: {"estimate", "stderr", "lower", "upper"}}``."""
        return {n: {"estimate": float(e), "stderr": float(s), "lower": float(lo), "upper": float(hi)}
                for n, e, s, lo, hi in zip(self.names, self.estimate, self.stderr, self.lower, self.upper)}

    def table(self):
        pct = f"{100 * self.confidence:g}%"
        lines = [f"{'parameter':<20} {'estimate':>12} {'std err':>11} {pct + ' interval':>27}"]
        for n, e, s, lo, hi in zip(self.names, self.estimate, self.stderr, self.lower, self.upper):
            lines.append(f"{n:<20} {e:>12.5g} {s:>11.3g}   [{lo:.5g}, {hi:.5g}]")
        lines.append(f"N = {self.n_samples} samples, dof = {self.dof}, residual scale {self.residual_scale:.3g}, "
                     f"RMS residual {self.rms_residual * 1e6:.3g} um/s; {self.message}")
        return "\n".join(lines)


def _resolve_bodies(bodies, kinds):
    if isinstance(bodies, Body):
        return {k: bodies for k in kinds}
    if isinstance(bodies, dict):
        table = dict(bodies)
    else:
        seq = list(bodies)
        if len(seq) == 1 and all(k is None for k in kinds):
            return {None: seq[0]}
        table = {b.name: b for b in seq}
    out = {}
    for k in kinds:
        if k is None:
            if len(table) != 1:
                raise CalibrationError(
                    f"the samples have no body kind, so give one Body (got {len(table)}: {sorted(table)}).")
            out[k] = next(iter(table.values()))
        elif k in table:
            out[k] = table[k]
        else:
            raise CalibrationError(f"no Body given for kind {k!r} of the samples; bodies given: {sorted(table)}.")
    return out


def _body_param(name, body_of):
    """``"body.radius"`` -> (None, "radius"); ``"body[bead-2um].radius"`` -> ("bead-2um", "radius")."""
    m = re.fullmatch(r"body(?:\[([^\]]+)\])?\.(\w+)", name)
    allowed = [f.name for f in dataclasses.fields(Body) if f.name not in ("name", "extra", "shell")]
    if not m or m.group(2) not in allowed:
        raise CalibrationError(f"parameter {name!r}: body parameters are written 'body.<field>' or "
                               f"'body[<kind>].<field>' with a numeric Body field {allowed}.")
    kind = m.group(1)
    if kind is not None and kind not in body_of:
        raise CalibrationError(f"parameter {name!r}: no body of kind {kind!r}; kinds: {sorted(map(str, body_of))}.")
    return kind, m.group(2)


def _resolve_inputs(actuator, samples, inputs):
    chans = actuator.channels
    names = [c.name for c in chans]
    prims = list(dict.fromkeys(str(p) for p in samples.primitive))
    out = {}
    if inputs is not None:
        for p in prims:
            if p not in inputs:
                raise CalibrationError(f"inputs= has no channel values for primitive {p!r}; needed for {prims}.")
            out[p] = actuator.check_input(inputs[p])
        return out
    data_names = [n for n, _ in samples.channels]
    if data_names and sorted(data_names) == sorted(names):
        units = dict(samples.channels)
        for c in chans:
            if units[c.name] != c.unit:
                raise CalibrationError(
                    f"channel {c.name!r} is in {units[c.name]} in the data but in {c.unit} in the actuator.")
        for p in prims:
            vals = dict(zip(data_names, samples.primitive_values[p]))
            out[p] = actuator.check_input([vals[n] for n in names])
        return out
    by_name = {q.name: q.values for q in actuator.primitives()}
    missing = [p for p in prims if p not in by_name]
    if missing:
        raise CalibrationError(
            f"cannot tell which input primitives {missing} were: the data's channels "
            f"{data_names or 'none'} are not the actuator's {names}, and the actuator has no primitive of "
            f"that name (it has {sorted(by_name)}). Pass inputs={{name: channel values}}.")
    return {p: np.asarray(by_name[p], dtype=float) for p in prims}


def fit_parameters(actuator_factory, param_names, initial, samples, bodies, medium, *, inputs=None,
                   fixed=None, bounds=None, confidence=0.95, weighted=True, loss="linear", f_scale=1.0,
                   max_nfev=None):
    """Fit chosen parameters of an actuator model to measured velocities (grey-box fit).

    Minimises ``sum_i |v_model(x_i; p) - v_i|^2 / sigma_i^2`` over the parameters ``p`` with
    ``scipy.optimize.least_squares`` (parameters scaled by their initial values), then estimates
    the covariance as ``s^2 (J^T J)^-1`` from the Jacobian ``J`` at the solution and the residual
    variance ``s^2 = sum r^2 / (2N - p)``, and gives Student-t intervals with ``2N - p`` degrees of
    freedom. The intervals assume independent sample errors (the default non-overlapping
    Savitzky-Golay windows give that) and a model that is linear enough over the interval.

    Parameters
    ----------
    actuator_factory : callable or Actuator
        ``actuator_factory(**params) -> Actuator`` (a class works); an Actuator instance when
        only body parameters are fitted.
    param_names : sequence of str
        Parameters to fit: keyword arguments of the factory, and body fields written
        ``"body.<field>"`` (every body) or ``"body[<kind>].<field>"`` (one kind), e.g.
        ``"body.drift_mobility"``; other body fields are kept (``dataclasses.replace``).
    initial : sequence of float or dict
        Starting values, in the parameters' units.
    samples : VelocitySamples or TrackingData
    bodies : Body, sequence of Body or dict
        The body of each sample kind (matched by ``Body.name``); one Body serves all.
    medium : Medium
    inputs : dict, optional
        Primitive name -> channel values of the actuator. Default: the data's channel columns when
        they are the actuator's channels, else the actuator's primitives of the same names.
    fixed : dict, optional
        Further keyword arguments passed unchanged to the factory.
    bounds : (sequence, sequence), optional
        Lower and upper bounds of the parameters (``-inf``/``inf`` allowed).
    confidence : float
        Interval level in (0, 1).
    weighted : bool
        Weight residuals by the samples' noise estimate ``sigma``.
    loss, f_scale : str, float
        Passed to ``least_squares`` (a robust loss makes the intervals approximate).
    max_nfev : int, optional

    Returns
    -------
    ParameterFit

    Raises
    ------
    CalibrationError
        Mismatched names and values, unknown primitive inputs, missing bodies, or a factory that
        rejects the parameter values (give bounds).

    Examples
    --------
    >>> import numpy as np, fieldplan
    >>> from fieldplan.contract.testing import SourceArray
    >>> from fieldplan.calibration.tracking import synthetic_tracks, velocity_samples
    >>> src = [[0, 0], [1e-3, 0]]
    >>> truth = SourceArray(src, force=1.2e-12, core=3e-4, affine=False)
    >>> bead = fieldplan.Body("bead", radius=2e-6, density=1100.0)
    >>> starts = np.random.default_rng(0).uniform(1e-4, 9e-4, (10, 2))
    >>> data = synthetic_tracks(truth, bead, fieldplan.water(), starts, [("left", [1, 0], 4.0)],
    ...                         noise=1e-7, rng=1)
    >>> res = fit_parameters(lambda force: SourceArray(src, force=force, core=3e-4, affine=False),
    ...                      ["force"], [1e-12], velocity_samples(data), bead, fieldplan.water())
    >>> bool(res.lower[0] < 1.2e-12 < res.upper[0])
    True
    """
    from scipy.optimize import least_squares
    from scipy.stats import t as student_t

    if isinstance(samples, TrackingData):
        samples = velocity_samples(samples)
    if not isinstance(samples, VelocitySamples):
        raise CalibrationError(f"fit_parameters expects VelocitySamples or TrackingData, got {type(samples).__name__}.")
    names = tuple(str(n) for n in param_names)
    if isinstance(initial, dict):
        missing = [n for n in names if n not in initial]
        if missing:
            raise CalibrationError(f"initial has no value for {missing}.")
        p0 = np.array([initial[n] for n in names], dtype=float)
    else:
        p0 = np.asarray(initial, dtype=float).ravel()
    if len(names) == 0 or len(p0) != len(names):
        raise CalibrationError(f"param_names {list(names)} and initial {p0.tolist()} must have the same non-zero length.")
    if not np.all(np.isfinite(p0)):
        raise CalibrationError(f"initial values must be finite, got {p0.tolist()}.")
    if not 0 < confidence < 1:
        raise CalibrationError(f"confidence must be in (0, 1), got {confidence}.")
    fixed = dict(fixed or {})
    clash = sorted(set(fixed) & set(names))
    if clash:
        raise CalibrationError(f"parameter(s) {clash} are both fitted and fixed.")
    scale = np.where(p0 != 0, np.abs(p0), 1.0)
    if bounds is None:
        lb, ub = np.full(len(names), -np.inf), np.full(len(names), np.inf)
    else:
        lb = np.broadcast_to(np.asarray(bounds[0], dtype=float), p0.shape).copy()
        ub = np.broadcast_to(np.asarray(bounds[1], dtype=float), p0.shape).copy()
        if np.any(lb >= ub) or np.any(p0 < lb) or np.any(p0 > ub):
            raise CalibrationError(f"bounds must have lower < upper and contain initial; got {lb.tolist()}, "
                                   f"{ub.tolist()}, initial {p0.tolist()}.")

    kinds = list(dict.fromkeys(samples.kind.tolist()))
    body_of = _resolve_bodies(bodies, kinds)
    body_params = {n: _body_param(n, body_of) for n in names if n.startswith("body")}
    if isinstance(actuator_factory, Actuator):
        act_names = [n for n in names if n not in body_params]
        if act_names:
            raise CalibrationError(f"parameters {act_names} need an actuator factory, but an Actuator instance "
                                   "was given (it can only be combined with 'body.<field>' parameters).")
        fixed_actuator = actuator_factory
    else:
        fixed_actuator = None

    def build(theta):
        params = dict(zip(names, (theta * scale).tolist()))
        act_kw = {n: v for n, v in params.items() if n not in body_params}
        try:
            act = fixed_actuator if fixed_actuator is not None else actuator_factory(**act_kw, **fixed)
            bodies_now = dict(body_of)
            for n, (kind_sel, attr) in body_params.items():
                for k in bodies_now:
                    if kind_sel is None or k == kind_sel:
                        bodies_now[k] = dataclasses.replace(bodies_now[k], **{attr: params[n]})
        except FieldplanError as exc:
            raise CalibrationError(
                f"the actuator factory or Body rejected parameters {params} ({exc}); constrain them with "
                "bounds=.") from None
        return act, bodies_now

    act0, _ = build(p0 / scale)
    u_of = _resolve_inputs(act0, samples, inputs)
    groups = [(k, u_of[p], idx) for k, p, idx in samples.groups()]
    w = 1.0 / samples.sigma if weighted else np.ones(len(samples))
    if weighted and not np.all(np.isfinite(w) & (w > 0)):
        w = np.ones(len(samples))
    w = w / np.mean(w)

    def residuals(theta):
        act, body_now = build(theta)
        r = np.empty_like(samples.velocity)
        for kind, u, idx in groups:
            try:
                r[idx] = act.velocity(body_now[kind], medium, samples.xy[idx], u) - samples.velocity[idx]
            except FieldplanError as exc:
                raise CalibrationError(
                    f"the actuator with parameters {dict(zip(names, (theta * scale).tolist()))} failed to "
                    f"evaluate ({exc}); constrain the parameters with bounds=.") from None
        return (r * w[:, None]).ravel()

    # Residuals are m/s ~ 1e-6; least_squares' tolerances are relative, but scaling them to O(1)
    # keeps the finite-difference Jacobian and the convergence tests well conditioned.
    r0 = residuals(p0 / scale)
    rs = float(np.sqrt(np.mean(r0**2))) or 1.0
    res = least_squares(lambda th: residuals(th) / rs, p0 / scale, jac="3-point", bounds=(lb / scale, ub / scale),
                        x_scale=1.0, loss=loss, f_scale=f_scale, max_nfev=max_nfev)
    m, p = res.fun.size, len(names)
    dof = m - p
    if dof <= 0:
        raise CalibrationError(f"{m} residuals cannot determine {p} parameters.")
    s2 = float(np.sum(res.fun**2) / dof)
    J = res.jac
    U, sv, Vt = np.linalg.svd(J, full_matrices=False)
    tol = np.finfo(float).eps * max(J.shape) * (sv[0] if len(sv) else 0.0)
    ok = sv > tol
    cov_t = (Vt[ok].T / sv[ok] ** 2) @ Vt[ok] * s2
    cov = cov_t * np.outer(scale, scale)
    stderr = np.sqrt(np.maximum(np.diag(cov), 0.0))
    message = res.message
    if not np.all(ok):
        # A null direction of J: those parameter combinations are not determined by the data.
        bad = [names[i] for i in np.flatnonzero(np.any(np.abs(Vt[~ok]) > 0.1, axis=0))]
        stderr[[names.index(b) for b in bad]] = np.inf
        message += f"; not identifiable from these data: {bad}"
        warnings.warn(f"fit_parameters: {bad} are not identifiable from these data.", CalibrationWarning, stacklevel=2)
    est = res.x * scale
    q = float(student_t.ppf(0.5 + confidence / 2.0, dof))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(stderr, stderr)
    raw = (residuals(res.x) / np.repeat(w, 2)).reshape(-1, 2)          # m/s
    sig = samples.sigma if np.all(np.isfinite(samples.sigma) & (samples.sigma > 0)) else None
    scaled = np.sqrt(np.sum((raw / sig[:, None]) ** 2) / dof) if sig is not None else float("nan")
    return ParameterFit(names, est, stderr, est - q * stderr, est + q * stderr, float(confidence), cov, corr,
                        int(dof), float(scaled), float(np.sqrt(np.mean(np.sum(raw**2, axis=1)))), len(samples),
                        bool(res.success), int(res.status), message, int(res.nfev))


def __getattr__(name):
    # The report figures live in fieldplan.plots.calibration and the whole job in
    # fieldplan.workflows.fit (both import this module); the earlier names keep working.
    if name in ("plot_vectors", "plot_residuals", "plot_coverage"):
        # deferred import: import cycle: fieldplan.plots.calibration imports this module (plots is the layer above)
        from ..plots import calibration as module  # noqa: PLC0415
    elif name == "calibrate_command":
        # deferred import: import cycle: fieldplan.workflows.fit imports this module (workflows is the layer above)
        from ..workflows import fit as module  # noqa: PLC0415
    else:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    return getattr(module, name)
