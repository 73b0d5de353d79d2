"""Figures of the steerability analysis: worst-direction speed maps and the body-count curve."""

from __future__ import annotations

import numpy as np
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from ..analysis import CountCurve, DesignComparison, SpeedMap, counting_rule
from ..errors import ActuatorError
from ..units import si_scale
from . import axis_label, draw_outlines, length_unit

__all__ = ["plot_speed_map", "plot_count_curve", "plot_comparison"]

def plot_speed_map(speed_map, *, workspace=None, title=None, directions=True, ax=None, actuator=None):
    """Colour map of the single-body worst-direction speed; dead cells shown in grey.

    Parameters
    ----------
    speed_map : SpeedMap
    workspace : Workspace, optional
        Its walls and obstacles are outlined.
    title : str, optional
    directions : bool
        Mark the blocked direction in dead cells with short line segments.
    ax : matplotlib Axes, optional
        Draw into this axes (its figure is returned).
    actuator : Actuator, optional
        Its ``outlines()`` (electrode pads), if any, are drawn.

    Returns
    -------
    matplotlib.figure.Figure
    """
    if not isinstance(speed_map, SpeedMap):
        raise ActuatorError(f"plot_speed_map: expected a SpeedMap, got {type(speed_map).__name__}.")
    if ax is None:
        fig = Figure(figsize=(6.0, 5.0), layout="constrained")
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    xs, ys = speed_map.xs, speed_map.ys
    span = max(np.ptp(xs) if xs.size > 1 else 0, np.ptp(ys) if ys.size > 1 else 0, 1e-9)
    # Display factors are divisors here (value / lf); the shared helpers give multipliers.
    lm, lname = length_unit(span)
    lf = 1.0 / lm
    vmax = float(np.nanmax(speed_map.speed)) if np.any(np.isfinite(speed_map.speed)) else 0.0
    sm, sname = si_scale(vmax if vmax > 0 else 1e-6, "m/s")
    sf = 1.0 / sm
    dx = xs[1] - xs[0] if xs.size > 1 else 1.0
    dy = ys[1] - ys[0] if ys.size > 1 else 1.0
    ext = [(xs[0] - dx / 2) / lf, (xs[-1] + dx / 2) / lf, (ys[0] - dy / 2) / lf, (ys[-1] + dy / 2) / lf]
    img = ax.imshow(np.ma.masked_invalid(speed_map.speed / sf), origin="lower", extent=ext, cmap="viridis",
                    vmin=0.0, vmax=max(vmax / sf, 1e-12), interpolation="nearest", aspect="equal")
    fig.colorbar(img, ax=ax, label=axis_label("worst-direction speed", sname))
    dead = np.ma.masked_where(~speed_map.dead, np.ones_like(speed_map.speed))
    ax.imshow(dead, origin="lower", extent=ext, cmap=ListedColormap(["0.6"]), vmin=0, vmax=1,
              interpolation="nearest", aspect="equal")
    handles = [Patch(color="0.6", label=f"dead: some direction unavailable ({100 * speed_map.dead_fraction:.1f} %)")]
    if directions and speed_map.dead.any():
        iy, ix = np.nonzero(speed_map.dead)
        d = speed_map.direction[iy, ix]
        L = 0.4 * min(abs(dx), abs(dy)) / lf
        X, Y = xs[ix] / lf, ys[iy] / lf
        segs_x = np.stack([X - L * d[:, 0], X + L * d[:, 0], np.full_like(X, np.nan)], axis=1).ravel()
        segs_y = np.stack([Y - L * d[:, 1], Y + L * d[:, 1], np.full_like(Y, np.nan)], axis=1).ravel()
        ax.plot(segs_x, segs_y, color="crimson", lw=0.8)
        handles.append(Line2D([], [], color="crimson", lw=0.8, label="blocked direction"))
    if actuator is not None:
        draw_outlines(ax, actuator, 1.0 / lf)
    if workspace is not None:
        _outline(ax, workspace, lf)
    ax.set_xlabel(axis_label("x", lname))
    ax.set_ylabel(axis_label("y", lname))
    ax.set_title(title or "single-body worst-direction speed")
    ax.legend(handles=handles, loc="upper right", fontsize="small", framealpha=0.8)
    return fig


def _outline(ax, workspace, lf):
    geoms = [workspace.boundary] + list(workspace.obstacles)
    for g in geoms:
        polys = getattr(g, "geoms", [g])
        for p in polys:
            x, y = p.exterior.xy
            ax.plot(np.asarray(x) / lf, np.asarray(y) / lf, color="k", lw=1.0)


def plot_count_curve(curves, *, title=None, ax=None):
    """Fraction of random configurations steerable against the number of bodies N.

    Parameters
    ----------
    curves : CountCurve or dict of str -> CountCurve
    title : str, optional
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.figure.Figure
        Points with 95 % Wilson intervals; a dashed line per curve at its counting limit
        (:func:`fieldplan.analysis.counting_limit`).
    """
    if isinstance(curves, CountCurve):
        curves = {"": curves}
    if not isinstance(curves, dict) or not curves or not all(isinstance(c, CountCurve) for c in curves.values()):
        raise ActuatorError("plot_count_curve: expected a CountCurve or a dict of name -> CountCurve.")
    if ax is None:
        fig = Figure(figsize=(6.0, 4.0), layout="constrained")
        ax = fig.add_subplot()
    else:
        fig = ax.figure
    m = len(curves)
    for i, (name, c) in enumerate(curves.items()):
        color = f"C{i}"
        label = (f"{name + ': ' if name else ''}{'K' if c.mode == 'linear' else 'M'} = {c.size} ({c.mode}), "
                 f"{c.trials} trials per N; limit {counting_rule(c.mode)}")
        yerr = np.vstack([c.fraction - c.low, c.high - c.fraction])
        # Dodge the curves sideways a little so equal curves stay visible.
        x = c.counts + 0.08 * (i - (m - 1) / 2)
        ax.errorbar(x, c.fraction, yerr=yerr, marker="o", capsize=3, color=color, label=label)
        limit = c.rank_limit if np.isfinite(c.rank_limit) else c.counting_limit
        if limit <= np.max(c.counts) + 1:   # a limit far beyond the counts would squash the curves
            ax.axvline(limit, color=color, ls="--", lw=0.8)
    ax.plot([], [], color="0.3", ls="--", lw=0.8,
            label="counting limit: K/2 (K channels) or (M - 1)/2 (M primitives), or field rank/2 if lower")
    # Say what the whiskers are: a binomial proportion's 95 % Wilson score interval over the trials.
    ax.errorbar([], [], yerr=[], color="0.3", capsize=3, ls="none", label="bars: 95 % Wilson interval")
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.grid(alpha=0.3)
    ax.set_xlabel(axis_label("number of bodies N", "1"))
    ax.set_ylabel(axis_label("fraction of configurations steerable", "1"))
    ax.set_ylim(-0.03, 1.03)
    ax.set_title(title or "how many bodies can be steered at once")
    ax.legend(fontsize="small")
    return fig


def plot_comparison(comparison):
    """Count curves of all designs side by side with their single-body speed maps.

    Parameters
    ----------
    comparison : DesignComparison

    Returns
    -------
    matplotlib.figure.Figure
    """
    if not isinstance(comparison, DesignComparison):
        raise ActuatorError(f"plot_comparison: expected a DesignComparison, got {type(comparison).__name__}.")
    n = len(comparison.maps)
    fig = Figure(figsize=(4.5 * (n + 1), 4.0), layout="constrained")
    axes = fig.subplots(1, n + 1, squeeze=False)[0]
    plot_count_curve(comparison.curves, ax=axes[0])
    for ax, (name, m) in zip(axes[1:], comparison.maps.items()):
        plot_speed_map(m, title=name, ax=ax, directions=False)
    return fig
