"""Figures of a calibration: measured and fitted vectors, residuals, data coverage (one panel per primitive)."""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from ..calibration.calibrate import CalibratedActuator, CalibrationError, FieldFit

__all__ = ["plot_vectors", "plot_residuals", "plot_coverage"]


# ------------------------------------------------------------------------------------------------
# report figures of a calibration
# ------------------------------------------------------------------------------------------------
def _fields_of(obj, kind):
    fit = obj.fit if isinstance(obj, CalibratedActuator) else obj
    if not isinstance(fit, FieldFit):
        raise CalibrationError(f"expected a FieldFit or CalibratedActuator, got {type(obj).__name__}.")
    kinds = fit.kinds
    if kind is None:
        kind = kinds[0]
    elif kind not in kinds:
        raise CalibrationError(f"no fields for body kind {kind!r}; kinds: {kinds}.")
    return [f for f in fit.fields if f.kind == kind], kind


def _grid_axes(n):
    cols = min(n, 3)
    rows = int(np.ceil(n / cols))
    fig = Figure(figsize=(4.6 * cols, 4.2 * rows), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False).ravel())
    for ax in axes[n:]:
        ax.set_visible(False)
    return fig, axes[:n]


def _label(ax, title):
    ax.set_xlabel("x [µm]")
    ax.set_ylabel("y [µm]")
    ax.set_aspect("equal")
    ax.set_title(title, fontsize=10)


def plot_vectors(fit, *, kind=None, max_arrows=300, rng=0):
    """Measured and fitted velocity vectors at the samples, one panel per primitive.

    Parameters
    ----------
    fit : FieldFit or CalibratedActuator
    kind : str, optional
        Body kind (default the first).
    max_arrows : int
        Arrows per panel (a seeded random subset beyond that).
    rng : int

    Returns
    -------
    matplotlib.figure.Figure
    """
    fields, kind = _fields_of(fit, kind)
    fig, axes = _grid_axes(len(fields))
    gen = np.random.default_rng(rng)
    for ax, f in zip(axes, fields):
        idx = np.arange(f.n_samples)
        if len(idx) > max_arrows:
            idx = np.sort(gen.choice(idx, max_arrows, replace=False))
        p = f.xy[idx] * 1e6
        vm = f.velocity[idx] * 1e6
        vf = f(f.xy[idx]) * 1e6
        ref = float(np.percentile(np.linalg.norm(vm, axis=1), 90)) or 1.0
        span = float(np.max(np.ptp(p, axis=0))) or 1.0
        # Arrows drawn so that the 90th-percentile speed spans 8 % of the panel.
        sc = ref / (0.08 * span)
        q = ax.quiver(p[:, 0], p[:, 1], vm[:, 0], vm[:, 1], angles="xy", scale_units="xy", scale=sc,
                      color="0.2", width=0.004, label="measured")
        ax.quiver(p[:, 0], p[:, 1], vf[:, 0], vf[:, 1], angles="xy", scale_units="xy", scale=sc,
                  color="tab:red", width=0.003, alpha=0.8, label="fitted")
        ax.quiverkey(q, 0.70, 0.06, ref, f"{ref:.2g} µm/s", labelpos="E", coordinates="axes")
        ax.legend(loc="lower left", fontsize=8)
        _label(ax, f"{f.primitive}" + (f" ({kind})" if kind is not None else "")
               + f": CV error {f.cv_rmse * 1e6:.2g} µm/s")
    fig.suptitle("Measured vs fitted velocity")
    return fig


def plot_residuals(fit, *, kind=None):
    """Map of cross-validated residuals ``|v_out-of-fold - v_measured|`` at the samples.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fields, kind = _fields_of(fit, kind)
    fig, axes = _grid_axes(len(fields))
    for ax, f in zip(axes, fields):
        r = np.linalg.norm(f.oof - f.velocity, axis=1) * 1e6
        sc = ax.scatter(f.xy[:, 0] * 1e6, f.xy[:, 1] * 1e6, c=r, s=12, cmap="viridis",
                        vmin=0, vmax=float(np.percentile(r, 98)) or None, label="sample")
        fig.colorbar(sc, ax=ax, label="cross-validated residual [µm/s]")
        ax.legend(loc="lower left", fontsize=8)
        _label(ax, f"{f.primitive}: noise floor {f.noise_rms * 1e6:.2g} µm/s")
    fig.suptitle("Residual map (held-out predictions)")
    return fig


def plot_coverage(fit, *, kind=None, extent=None, resolution=90):
    """Data coverage (0 = no data near, 1 = well covered) per primitive, samples overlaid.

    Parameters
    ----------
    fit : FieldFit or CalibratedActuator
    kind : str, optional
    extent : tuple (xmin, xmax, ymin, ymax), optional
        m; default the actuator's extent or the samples' box, padded by 10 %.
    resolution : int
        Grid points per side.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fields, kind = _fields_of(fit, kind)
    if extent is None:
        allxy = np.vstack([f.xy for f in fields])
        lo, hi = allxy.min(axis=0), allxy.max(axis=0)
        pad = 0.1 * (hi - lo)
        extent = (lo[0] - pad[0], hi[0] + pad[0], lo[1] - pad[1], hi[1] + pad[1])
    x0, x1, y0, y1 = extent
    gx, gy = np.meshgrid(np.linspace(x0, x1, resolution), np.linspace(y0, y1, resolution))
    pts = np.column_stack([gx.ravel(), gy.ravel()])
    fig, axes = _grid_axes(len(fields))
    for ax, f in zip(axes, fields):
        c = f.coverage(pts).reshape(gx.shape)
        im = ax.imshow(c, origin="lower", extent=[v * 1e6 for v in extent], vmin=0, vmax=1, cmap="magma",
                       aspect="equal")
        ax.plot(f.xy[:, 0] * 1e6, f.xy[:, 1] * 1e6, ".", ms=2, color="tab:cyan", label="samples")
        fig.colorbar(im, ax=ax, label="coverage [1]")
        ax.legend(loc="lower left", fontsize=8)
        _label(ax, f"{f.primitive}: bandwidth {f.bandwidth * 1e6:.3g} µm")
    fig.suptitle("Data coverage")
    return fig
