"""Figures of a run: workspace with routes and trajectories, positions and errors over time, inputs.

Every function returns a matplotlib ``Figure`` (no ``plt.show()``); lengths are drawn in the unit
that suits the workspace (µm, mm or m) and every axis names its unit in one style,
:func:`axis_label` (``x [µm]``, a dimensionless quantity ``[1]``). :func:`animate` writes a GIF
with matplotlib's Pillow writer.

An actuator may offer ``outlines()``: shapely polygons on the plane, m, of hardware worth seeing
under the bodies (electrode pads); the workspace, field and animation figures draw them.
"""

from __future__ import annotations

import os

import numpy as np

from ..fileio import atomic_path
from ..units import format_quantity
from .style import axis_label, draw_outlines, draw_workspace, figure, length_unit, save, speed_unit

__all__ = ["length_unit", "axis_label", "plot_workspace", "plot_timeline", "plot_inputs", "plot_primitive_fields",
           "animate", "save", "speed_backdrop"]

def _primitive_velocities(actuator, body, medium, pts, prims):
    """Velocity (n, 2) m/s of ``body`` at ``pts`` under each primitive, yielded in order."""
    prims = list(prims)
    chans = actuator.channels
    if "affine_in_input" in actuator.tags and len(prims) > len(chans) + 1:
        # Affine in the input: m + 1 evaluations give every primitive's velocity exactly.
        lo = np.array([c.lower for c in chans], dtype=float)
        hi = np.array([c.upper for c in chans], dtype=float)
        u0 = np.clip(np.zeros(len(chans)), lo, hi)
        v0 = actuator.velocity(body, medium, pts, u0)
        steps = np.where(np.abs(hi - u0) >= np.abs(lo - u0), hi, lo) - u0
        cols = []
        for k in range(len(chans)):
            u = u0.copy()
            u[k] += steps[k]
            cols.append((actuator.velocity(body, medium, pts, u) - v0) / (steps[k] if steps[k] else 1.0))
        B = np.stack(cols, axis=-1)  # (n, 2, m)
        for p in prims:
            yield v0 + B @ (np.asarray(p.values, dtype=float) - u0)
    else:
        for p in prims:
            yield actuator.velocity(body, medium, pts, p.values)


def speed_backdrop(actuator, body, medium, workspace, n=48, radius=None):
    """Fastest speed one body reaches under any single primitive, on a grid.

    Parameters
    ----------
    actuator : Actuator
    body : Body
    medium : Medium
    workspace : Workspace
    n : int
        Grid points along the longer side.
    radius : float, optional
        Clearance from walls and obstacles, m (default the body's radius: the free space of its
        centre; 0 fills the field up to the solid edges, which is how a backdrop should look).

    Returns
    -------
    xs, ys : ndarray
        m.
    speed : ndarray, shape (ny, nx)
        m/s; nan outside the free space.
    """
    xmin, ymin, xmax, ymax = workspace.bounds
    w, h = xmax - xmin, ymax - ymin
    nx = max(int(n * w / max(w, h)), 8)
    ny = max(int(n * h / max(w, h)), 8)
    xs = xmin + (np.arange(nx) + 0.5) * w / nx
    ys = ymin + (np.arange(ny) + 0.5) * h / ny
    X, Y = np.meshgrid(xs, ys)
    xy = np.c_[X.ravel(), Y.ravel()]
    if radius is None:
        free = workspace.contains(xy, body.radius)
    else:
        # Ignore the obstacles (drawn over the field) and pad the wall by a cell and a half, so an
        # image clipped to the wall has no blank cells along its edges.
        import shapely  # noqa: PLC0415

        pad = 1.5 * max(w / nx, h / ny)
        free = shapely.contains_xy(workspace.boundary.buffer(pad - float(radius)), xy[:, 0], xy[:, 1])
    speed = np.full(len(xy), np.nan)
    if free.any():
        pts = xy[free]
        idle = actuator.idle_input()
        best = np.linalg.norm(actuator.velocity(body, medium, pts, idle), axis=1)
        for v in _primitive_velocities(actuator, body, medium, pts, actuator.primitives()):
            best = np.maximum(best, np.linalg.norm(v, axis=1))
        speed[free] = best
    return xs, ys, speed.reshape(ny, nx)


def plot_workspace(workspace, bodies, starts, goals, *, routes=None, trajectories=None, predicted=None,
                   actuator=None, tolerance=None, title=None, backdrop_points=96):
    """Workspace with obstacles, routes, trajectories, starts, goals and a field backdrop.

    Parameters
    ----------
    workspace : Workspace
    bodies : sequence of Body
    starts, goals : array_like, shape (n, 2)
        m.
    routes : list of ndarray (P_i, 2), optional
        Planned routes, m.
    trajectories : list of (label, ndarray (T, n, 2)), optional
        Simulated true paths, m.
    predicted : ndarray, shape (T, n, 2), optional
        The planner's predicted path, m.
    actuator : Actuator, optional
        Shade the free space by the fastest single-primitive speed of the first body kind.
    tolerance : float, optional
        Arrival radius drawn around each goal, m (default each body's radius).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.lines import Line2D  # noqa: PLC0415
    from matplotlib.patches import Circle, Patch  # noqa: PLC0415

    xmin, ymin, xmax, ymax = workspace.bounds
    f, unit = length_unit(max(xmax - xmin, ymax - ymin))
    aspect = (ymax - ymin) / (xmax - xmin)
    fig = figure(figsize=(7.2, max(3.8, min(8.0, 6.0 * aspect + 1.3))), layout="constrained")
    ax = fig.add_subplot()
    extra = []
    if actuator is not None and bodies:
        # Sample up to the solid edges (radius 0) so the obstacles drawn on top keep their true size.
        n = backdrop_points
        if "affine_in_input" not in actuator.tags:
            # One evaluation per primitive per point: cap the work (~8e4 evaluations, well under a second
            # for the built-in actuators); the bilinear image hides the coarser grid.
            n = max(32, min(n, int(np.sqrt(8e4 / max(len(list(actuator.primitives())), 1)))))
        xs, ys, sp = speed_backdrop(actuator, bodies[0], workspace.medium, workspace, n, radius=0.0)
        if np.any(np.isfinite(sp)):
            sf, su = speed_unit(float(np.nanmax(sp)))
            dx, dy = xs[1] - xs[0], ys[1] - ys[0]
            ext = ((xs[0] - dx / 2) * f, (xs[-1] + dx / 2) * f, (ys[0] - dy / 2) * f, (ys[-1] + dy / 2) * f)
            img = ax.imshow(np.ma.masked_invalid(sp * sf), origin="lower", extent=ext, cmap="viridis", alpha=0.6,
                            interpolation="bilinear", aspect="equal", zorder=0)
            from matplotlib.patches import Polygon as MplPolygon  # noqa: PLC0415

            clip = MplPolygon(np.asarray(workspace.boundary.exterior.coords) * f, closed=True,
                              transform=ax.transData, fill=False)
            img.set_clip_path(clip)
            fig.colorbar(img, ax=ax, shrink=0.85, label=f"fastest single-primitive speed of {bodies[0].name} [{su}]")
            box = getattr(actuator, "extent", None)
            if box is not None:
                # Grey out where the actuator model is not meant to be used (e.g. outside a calibration).
                X, Y = np.meshgrid(xs, ys)
                out = (X < box[0]) | (X > box[1]) | (Y < box[2]) | (Y > box[3])
                if out.any():
                    ax.imshow(np.ma.masked_where(~out, np.ones_like(sp)), origin="lower", extent=ext,
                              cmap="Greys", vmin=0, vmax=1.6, alpha=0.75, interpolation="nearest",
                              aspect="equal", zorder=1).set_clip_path(clip)
                    extra.append(Patch(color="0.55", alpha=0.75, label="outside the actuator's extent"))
    outlined = draw_outlines(ax, actuator, f) if actuator is not None else False
    draw_workspace(ax, workspace, f)
    colours = [f"C{i % 10}" for i in range(len(bodies))]
    starts = np.asarray(starts, dtype=float)
    goals = np.asarray(goals, dtype=float)
    # Simulated paths go underneath, wide and translucent; the thinner route and prediction lines
    # stay visible on top of them.
    for k, (label, pos) in enumerate(trajectories or []):
        pos = np.asarray(pos, dtype=float)
        for i in range(pos.shape[1]):
            ax.plot(pos[:, i, 0] * f, pos[:, i, 1] * f, lw=2.6 if k == 0 else 1.4, alpha=0.5 if k == 0 else 0.3,
                    color=colours[i], solid_capstyle="round", zorder=3)
    if routes is not None:
        for i, r in enumerate(routes):
            r = np.asarray(r, dtype=float)
            if len(r):
                ax.plot(r[:, 0] * f, r[:, 1] * f, ls="--", lw=1.1, color=colours[i], zorder=5)
    if predicted is not None:
        p = np.asarray(predicted, dtype=float)
        for i in range(p.shape[1]):
            ax.plot(p[:, i, 0] * f, p[:, i, 1] * f, ls=":", lw=1.4, color="k", alpha=0.8, zorder=6)
            ax.plot(p[:, i, 0] * f, p[:, i, 1] * f, ls=":", lw=1.0, color=colours[i], zorder=6)
    for i, b in enumerate(bodies):
        tol = b.radius if tolerance is None else tolerance
        ax.add_patch(Circle(goals[i] * f, tol * f, fill=False, ls="-", lw=0.8, color=colours[i], zorder=7))
        ax.add_patch(Circle(starts[i] * f, b.radius * f, color=colours[i], alpha=0.6, zorder=7))
    ax.scatter(starts[:, 0] * f, starts[:, 1] * f, marker="o", s=14, c=colours, edgecolors="k", linewidths=0.5,
               zorder=8)
    ax.scatter(goals[:, 0] * f, goals[:, 1] * f, marker="x", s=30, c=colours, zorder=8)
    for i in range(len(bodies)):
        ax.annotate(str(i), starts[i] * f, textcoords="offset points", xytext=(4, 4), fontsize=7, zorder=9)
    ax.set_xlim(xmin * f, xmax * f)
    ax.set_ylim(ymin * f, ymax * f)
    ax.set_aspect("equal")
    ax.set_xlabel(f"x [{unit}]")
    ax.set_ylabel(f"y [{unit}]")
    ax.set_title(title or "workspace")
    # Line styles in neutral grey, then one entry per body colour naming its kind.
    g = "0.25"
    handles = [Line2D([], [], color="k", lw=1.5, label="wall")]
    if workspace.obstacles:
        handles.append(Patch(facecolor="0.55", edgecolor="k", label="obstacle"))
    if outlined:
        handles.append(Patch(facecolor="none", edgecolor="0.3", label="electrode / hardware outline"))
    if routes is not None:
        handles.append(Line2D([], [], color=g, ls="--", lw=1.1, label="planned route"))
    if predicted is not None:
        handles.append(Line2D([], [], color=g, ls=":", lw=1.4, label="predicted path"))
    if trajectories:
        handles.append(Line2D([], [], color=g, lw=2.6, alpha=0.5, label="simulated path"
                              + (f" ({len(trajectories)} trials)" if len(trajectories) > 1 else "")))
    handles += [Line2D([], [], color=g, marker="o", ls="none", ms=4, label="start"),
                Line2D([], [], color=g, marker="x", ls="none", ms=5, label="goal (circle: arrival radius)")]
    handles += extra
    handles += [Patch(color=colours[i], label=f"body {i}: {b.name}") for i, b in enumerate(bodies[:12])]
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, -0.1), ncol=3, fontsize=7, frameon=False)
    return fig


def plot_timeline(times, positions, goals, bodies, *, tolerance=None, predicted=None, extent=None):
    """Positions and distance to goal over time, per body.

    Parameters
    ----------
    times : ndarray, shape (T,)
        s.
    positions : ndarray, shape (T, n, 2)
        m.
    goals : ndarray, shape (n, 2)
        m.
    bodies : sequence of Body
    tolerance : float, optional
        Arrival radius, m, drawn as a dashed line on the error panel.
    predicted : tuple (times, positions), optional
        Planner prediction, drawn dotted.
    extent : tuple, optional
        (xmin, ymin, xmax, ymax) m, to choose the display unit.

    Returns
    -------
    matplotlib.figure.Figure
    """
    times = np.asarray(times, dtype=float)
    pos = np.asarray(positions, dtype=float)
    goals = np.asarray(goals, dtype=float)
    span = (max(extent[2] - extent[0], extent[3] - extent[1]) if extent is not None
            else float(np.ptp(pos.reshape(-1, 2), axis=0).max() or 1e-3))
    f, unit = length_unit(span)
    fig = figure(figsize=(7.5, 7.0), layout="constrained")
    axes = fig.subplots(3, 1, sharex=True)
    err = np.linalg.norm(pos - goals[None], axis=2)
    n = len(bodies)
    # Identical or mirror-image bodies share x, y or error curves exactly: each body has its own
    # width (earlier bodies wider, underneath) and dash pattern, so a curve on top never hides one.
    widths = [1.3 + 2.4 * (n - 1 - i) / max(n - 1, 1) for i in range(n)]
    dashes = [(None if i == 0 else (6, 2) if i % 3 == 1 else (2, 1.5) if i % 3 == 2 else (8, 2, 2, 2))
              for i in range(n)]

    def style(i):
        st = {"color": f"C{i % 10}", "lw": widths[i], "alpha": 0.85 if i == 0 else 0.95, "zorder": 2 + i}
        if dashes[i] is not None:
            st["dashes"] = dashes[i]
        return st

    for i, b in enumerate(bodies):
        c = f"C{i % 10}"
        axes[0].plot(times, pos[:, i, 0] * f, **style(i))
        axes[1].plot(times, pos[:, i, 1] * f, **style(i))
        axes[2].plot(times, np.maximum(err[:, i], 1e-12) * f, **style(i))
        axes[0].axhline(goals[i, 0] * f, color=c, lw=0.6, ls="--")
        axes[1].axhline(goals[i, 1] * f, color=c, lw=0.6, ls="--")
        if predicted is not None:
            pt, pp = predicted
            pp = np.asarray(pp, dtype=float)
            # On top of every simulated curve, dark so it shows over a wide one of the same colour.
            pred = {"color": "0.1", "ls": ":", "lw": 1.0, "alpha": 0.8, "zorder": 3 + n}
            axes[0].plot(pt, pp[:, i, 0] * f, **pred)
            axes[1].plot(pt, pp[:, i, 1] * f, **pred)
            axes[2].plot(pt, np.maximum(np.linalg.norm(pp[:, i] - goals[i], axis=1), 1e-12) * f, **pred)
    tol = [b.radius for b in bodies] if tolerance is None else [tolerance]
    axes[2].axhline(min(tol) * f, color="k", ls="--", lw=0.8)
    axes[2].set_yscale("log")
    axes[0].set_ylabel(axis_label("x", unit))
    axes[1].set_ylabel(axis_label("y", unit))
    axes[2].set_ylabel(axis_label("distance to goal", unit))
    axes[2].set_xlabel(axis_label("time", "s"))
    axes[0].set_title("positions and distance to goal")
    from matplotlib.lines import Line2D  # noqa: PLC0415

    # Outside the axes, so it never hides a curve.
    handles = [Line2D([], [], **style(i), label=f"body {i} ({b.name})") for i, b in enumerate(bodies)]
    handles += [Line2D([], [], color="0.3", lw=1.5, label="simulated")]
    if predicted is not None:
        handles.append(Line2D([], [], color="0.1", ls=":", lw=1.0, alpha=0.8, label="predicted"))
    handles += [Line2D([], [], color="0.3", ls="--", lw=0.6, label="goal"),
                Line2D([], [], color="k", ls="--", lw=0.8, label="arrival radius")]
    axes[0].legend(handles=handles, fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    for ax in axes:
        ax.grid(alpha=0.3)
    return fig


_DENSE = 150          # more segments than this: draw per-bin summaries, not every switch
_BINS = 160           # bins across the schedule when summarising
_STYLES = ("-", "--", "-.", ":")
_MARKERS = ("o", "s", "^", "v", "D", "P", "X", "<", ">", "*")


def _short_label(name):
    """Primitive label with its numbers at 3 significant digits ("420.666Hz@8.707V" -> "421 Hz @ 8.71 V")."""
    import re  # noqa: PLC0415

    def num(m):
        v, u = float(m.group(1)), m.group(2) or ""
        if u == "Hz":
            for f, pre in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
                if v >= f:
                    v, u = v / f, pre + u
                    break
        return f"{v:.3g}" + (f" {u}" if u else "")

    out = re.sub(r"(?<![\w.])(\d+(?:\.\d+)?(?:e[+-]?\d+)?)(Hz|kHz|MHz|V|mV|A|mA|T|mT)?(?![\w.])", num, name)
    return out.replace("@", " @ ")


def _bin_average(starts, durations, values, edges):
    """Time-weighted mean of a piecewise-constant signal over each bin, shape (nb, m)."""
    # The running integral is piecewise linear, so interpolating it at the bin edges is exact.
    ends = starts + durations
    knots = np.r_[starts, ends]
    order = np.argsort(knots, kind="stable")
    cum = np.vstack([np.zeros((1, values.shape[1])), np.cumsum(values * durations[:, None], axis=0)])
    # Integral at each segment start is cum[k], at each end cum[k+1]; merge both sets of knots.
    kv = np.vstack([cum[:-1], cum[1:]])[order]
    kt = knots[order]
    F = np.column_stack([np.interp(edges, kt, kv[:, j]) for j in range(values.shape[1])])
    return np.diff(F, axis=0) / np.diff(edges)[:, None]


def _bin_range(starts, durations, values, edges):
    """Smallest and largest value played in each bin, shapes (nb, m); nan where nothing played."""
    ends = starts + durations
    nb = len(edges) - 1
    lo = np.full((nb, values.shape[1]), np.nan)
    hi = np.full_like(lo, np.nan)
    i0 = np.searchsorted(ends, edges[:-1], side="right")
    i1 = np.searchsorted(starts, edges[1:], side="left")
    for j in range(nb):  # a loop over ~160 bins, not over points
        if i1[j] > i0[j]:
            lo[j] = values[i0[j]:i1[j]].min(axis=0)
            hi[j] = values[i0[j]:i1[j]].max(axis=0)
    return lo, hi


def _duty_norm():
    """Square-root colour scale for duty fractions, so a primitive played 5 % of a bin still shows."""
    from matplotlib.colors import PowerNorm  # noqa: PLC0415

    return PowerNorm(gamma=0.5, vmin=0.0, vmax=1.0)


def _hz_axis(ax, lo, hi):
    from matplotlib.ticker import EngFormatter  # noqa: PLC0415

    if lo > 0 and hi / lo > 10:
        ax.set_yscale("log")
    ax.yaxis.set_major_formatter(EngFormatter(unit="Hz"))


def _limit_lines(ax, lim, colour, unit):
    """Dashed lines at the declared bounds; dash-dot at +-RMS. Returns legend handles added."""
    for val in (lim.lower, lim.upper):
        if val is not None:
            ax.axhline(val, color=colour, ls="--", lw=0.7, alpha=0.8)
    if lim.rms is not None:
        win = f", {format_quantity(lim.rms_window, 's')} window" if lim.rms_window else ""
        for s in (-1, 1):
            ax.axhline(s * lim.rms, color=colour, ls="-.", lw=0.7, alpha=0.8)
        return f"RMS limit {format_quantity(lim.rms, '1' if unit == 'dimensionless' else unit)}{win}"
    return None


def plot_inputs(schedule, *, limits=None):
    """Channel values over time, one panel per unit, with the declared limits as dashed lines.

    Short schedules are drawn as step lines, one style and marker per channel so equal channels stay
    visible. Long schedules (more than 150 segments, switching far faster than a figure can show) are
    summarised per time bin: the time-weighted mean of each channel as a colour raster (several
    channels) or as a line with the min-max range shaded (one or two channels); channels that take
    only a few discrete values (tones) show the fraction of each bin spent on each value.

    Parameters
    ----------
    schedule : Schedule
    limits : HardwareLimits, optional
        Bounds drawn dashed, RMS limits dash-dotted (lines only; a colour raster names them in its
        colour-bar label).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.lines import Line2D  # noqa: PLC0415
    from matplotlib.patches import Patch  # noqa: PLC0415

    chans = list(schedule.channels)
    starts = np.asarray(schedule.starts, dtype=float)
    durs = np.asarray(schedule.durations, dtype=float)
    vals = np.asarray(schedule.values, dtype=float)
    t0, t1 = float(starts[0]), float(schedule.end)
    dense = schedule.n_segments > _DENSE
    units = list(dict.fromkeys(c.unit for c in chans))
    # A channel with few distinct values (a tone selector) reads better as "which value, how often".
    discrete = {}
    if dense:
        for k, c in enumerate(chans):
            u = np.unique(vals[:, k])
            if 1 < len(u) <= 6 and len(chans) > 1 and sum(ch.unit == c.unit for ch in chans) == 1:
                discrete[k] = u
    names = [lab for lab in dict.fromkeys(schedule.labels) if lab and lab != "mix"]
    if len(names) > 1:
        # Most-played primitive on top, idle at the bottom: the rows that matter are read first.
        lab_arr = np.asarray(schedule.labels, dtype=object)
        played = {n: float(durs[lab_arr == n].sum()) for n in names}
        names.sort(key=lambda n: (n == "idle", -played[n]))
        names.reverse()
    raster = 1 < len(names) <= 40
    panels = []  # (kind, payload, height)
    for unit in units:
        ks = [k for k, c in enumerate(chans) if c.unit == unit and k not in discrete]
        if ks and dense and len(ks) >= 3:
            panels.append(("heat", (unit, ks), max(1.6, 0.22 * len(ks) + 0.6)))
        elif ks and len(ks) >= 4:
            # Small multiples: four or more step lines on one axis hide each other where they coincide.
            panels += [("lines", (unit, [k]), 1.05) for k in ks]
        elif ks:
            panels.append(("lines", (unit, ks), 2.2))
    for k, u in discrete.items():
        panels.append(("tones", (k, u), 0.3 * len(u) + 0.9))
    if raster:
        panels.append(("raster", names, 0.17 * len(names) + 0.8))
    fig = figure(figsize=(8.6, 0.9 + sum(p[2] for p in panels)), layout="constrained")
    axes = np.atleast_1d(fig.subplots(len(panels), 1, sharex=True, squeeze=False,
                                      gridspec_kw={"height_ratios": [p[2] for p in panels]})[:, 0])
    edges = np.linspace(t0, t1, _BINS + 1) if dense else None
    width = (t1 - t0) / _BINS
    wlab = format_quantity(width, "s")
    t = np.append(starts, t1)
    for ax, (kind, payload, _) in zip(axes, panels):
        if kind in ("lines", "heat"):
            unit, ks = payload
            shown = "dimensionless" if unit in ("1", "") else unit
            if kind == "heat":
                mean = _bin_average(starts, durs, vals[:, ks], edges)
                lo = [c.lower for c in (chans[k] for k in ks) if np.isfinite(c.lower)]
                hi = [c.upper for c in (chans[k] for k in ks) if np.isfinite(c.upper)]
                vmax = max([abs(v) for v in lo + hi] or [float(np.nanmax(np.abs(mean))) or 1.0])
                signed = bool(lo) and min(lo) < 0
                img = ax.imshow(mean.T, aspect="auto", origin="lower", interpolation="nearest",
                                extent=(t0, t1, -0.5, len(ks) - 0.5), cmap="RdBu_r" if signed else "viridis",
                                vmin=-vmax if signed else 0.0, vmax=vmax)
                fig.colorbar(img, ax=ax, pad=0.01, label=axis_label(f"mean per {wlab}", shown))
                ax.set_yticks(range(len(ks)), [chans[k].name for k in ks], fontsize=7)
                ax.set_ylabel("channel")
                continue
            handles, notes = [], []
            single = len(ks) == 1 and sum(ch.unit == unit for ch in chans) >= 4
            for j, k in enumerate(ks):
                c = chans[k]
                colour = f"C{k % 10}"
                if dense:
                    lo, hi = _bin_range(starts, durs, vals[:, [k]], edges)
                    ax.fill_between(edges, np.append(lo[:, 0], lo[-1, 0]), np.append(hi[:, 0], hi[-1, 0]),
                                    step="post", color=colour, alpha=0.2, lw=0)
                    if c.values:
                        # A discrete channel (a tone selector) has no meaningful mean: a time average
                        # of two tones is a third tone never played. Show the value held longest.
                        u = np.unique(vals[:, k])
                        share = _bin_average(starts, durs, (vals[:, [k]] == u[None, :]).astype(float), edges)
                        most = u[np.argmax(share, axis=1)]
                        ax.plot((edges[:-1] + edges[1:]) / 2, most, ls="none", marker="_", ms=5, mew=1.4,
                                color=colour)
                        handles.append(Line2D([], [], color=colour, ls="none", marker="_", ms=5, mew=1.4,
                                              label=f"{c.name}: held longest per {wlab}"))
                    else:
                        mean = _bin_average(starts, durs, vals[:, [k]], edges)[:, 0]
                        ax.step(edges, np.append(mean, mean[-1]), where="post", lw=1.0, color=colour)
                        handles.append(Line2D([], [], color=colour, lw=1.0, label=f"{c.name}: mean per {wlab}"))
                    handles.append(Patch(color=colour, alpha=0.2, label=f"{c.name}: min-max per {wlab}"))
                else:
                    # Equal channels overlap exactly: vary width, dash and marker so each stays visible.
                    ls, mk = _STYLES[j % len(_STYLES)], _MARKERS[j % len(_MARKERS)]
                    lw = 2.6 - 1.6 * j / max(len(ks) - 1, 1)
                    v = np.append(vals[:, k], vals[-1, k])
                    if single:
                        ax.step(t, v, where="post", lw=1.4, color=colour)
                        handles.append(Line2D([], [], color=colour, lw=1.4, label=c.name))
                    else:
                        ax.step(t, v, where="post", lw=lw, ls=ls, color=colour, alpha=0.85)
                        mid = starts + durs / 2
                        every = max(1, len(mid) // 12)
                        ax.plot(mid[j % every::every], vals[j % every::every, k], ls="none", marker=mk, ms=4,
                                color=colour, mfc="none" if j % 2 else colour)
                        handles.append(Line2D([], [], color=colour, lw=lw, ls=ls, marker=mk, ms=4,
                                              mfc="none" if j % 2 else colour, label=c.name))
                if limits is not None:
                    note = _limit_lines(ax, limits.get(c.name), colour, shown)
                    if note and note not in notes:
                        notes.append(note)
            if limits is not None:
                handles.append(Line2D([], [], color="0.3", ls="--", lw=0.7, label="declared bounds"))
                handles += [Line2D([], [], color="0.3", ls="-.", lw=0.7, label=n) for n in notes]
            if unit == "Hz":
                lo = float(np.nanmin(vals[:, ks]))
                _hz_axis(ax, lo, float(np.nanmax(vals[:, ks])))
                ax.set_ylabel(axis_label("frequency", "Hz"))
            else:
                ax.set_ylabel(axis_label(chans[ks[0]].name + "\n", shown).replace("\n ", "\n") if single
                              else axis_label(chans[ks[0]].name if len(ks) == 1 else "value", shown),
                              fontsize=8 if single else None)
            if single:
                handles = handles[1:]
                if ks[0] != next(k for k, ch in enumerate(chans) if ch.unit == unit):
                    handles = []
            if handles:
                ax.legend(handles=handles, fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                          frameon=False, ncol=1 if len(handles) <= 10 else 2)
            ax.grid(alpha=0.3)
        elif kind == "tones":
            k, u = payload
            c = chans[k]
            ind = (vals[:, [k]] == u[None, :]).astype(float)
            duty = _bin_average(starts, durs, ind, edges)
            img = ax.imshow(duty.T, aspect="auto", origin="lower", interpolation="nearest",
                            extent=(t0, t1, -0.5, len(u) - 0.5), cmap="Greys", norm=_duty_norm())
            fig.colorbar(img, ax=ax, pad=0.01, label=axis_label("share of bin", "1"))
            if c.unit == "Hz":
                from matplotlib.ticker import EngFormatter  # noqa: PLC0415

                labs = [EngFormatter(unit="Hz", places=0)(x) for x in u]
            else:
                labs = [format_quantity(x, c.unit) for x in u]
            ax.set_yticks(range(len(u)), labs, fontsize=7)
            ax.set_ylabel(f"{c.name} played")
        else:
            ax.tick_params(axis="y", labelsize=7)
            if dense:
                lab = np.asarray(schedule.labels, dtype=object)
                ind = np.column_stack([(lab == n).astype(float) for n in payload])
                duty = _bin_average(starts, durs, ind, edges)
                img = ax.imshow(duty.T, aspect="auto", origin="lower", interpolation="nearest",
                                extent=(t0, t1, -0.5, len(payload) - 0.5), cmap="Greys", norm=_duty_norm())
                fig.colorbar(img, ax=ax, pad=0.01, label=axis_label("share of bin, sqrt scale", "1"))
            else:
                for i, name in enumerate(payload):
                    spans = [(s, d) for s, d, lab in zip(starts, durs, schedule.labels) if lab == name]
                    ax.broken_barh(spans, (i - 0.4, 0.8), color="0.3" if name == "idle" else f"C{i % 10}")
            ax.set_yticks(range(len(payload)), [_short_label(n) for n in payload], fontsize=7)
            ax.set_ylim(-0.6, len(payload) - 0.4)
            ax.set_ylabel("primitive played")
            ax.grid(axis="x", alpha=0.3)
    has_rms = limits is not None and any(limits.get(c.name).rms is not None for c in chans)
    axes[-1].set_xlabel(axis_label("time", "s"))
    axes[-1].set_xlim(t0, t1)
    axes[0].set_title("inputs" + (f" ({schedule.n_segments} segments, summarised per {wlab} bin)" if dense
                                  else " (dashed: declared bounds" + ("; dash-dot: ±RMS limit)" if has_rms else ")")))
    return fig


def plot_primitive_fields(actuator, body, medium, workspace, *, max_panels=12, n=12, resolution=64):
    """Velocity field of one body under each primitive: direction arrows over its speed (colour).

    Parameters
    ----------
    actuator : Actuator
    body : Body
    medium : Medium
    workspace : Workspace
    max_panels : int
        Draw at most this many primitives (the first ones).
    n : int
        Arrows along the longer side.
    resolution : int
        Speed-image points along the longer side.

    Returns
    -------
    matplotlib.figure.Figure
    """
    import shapely  # noqa: PLC0415
    from matplotlib.patches import Polygon as MplPolygon  # noqa: PLC0415

    every = list(actuator.primitives())
    prims = every[:max_panels]
    xmin, ymin, xmax, ymax = workspace.bounds
    f, unit = length_unit(max(xmax - xmin, ymax - ymin))
    w, h = xmax - xmin, ymax - ymin

    def grid(m):
        nx, ny = max(int(m * w / max(w, h)), 4), max(int(m * h / max(w, h)), 4)
        X, Y = np.meshgrid(xmin + (np.arange(nx) + 0.5) * w / nx, ymin + (np.arange(ny) + 0.5) * h / ny)
        return nx, ny, np.c_[X.ravel(), Y.ravel()]

    # Colour: sampled up to the solid edges (obstacles are drawn on top) and clipped to the wall.
    fx, fy, fxy = grid(resolution)
    pad = 1.5 * max(w / fx, h / fy)
    inside = shapely.contains_xy(workspace.boundary.buffer(pad), fxy[:, 0], fxy[:, 1])
    speeds = []
    for v in _primitive_velocities(actuator, body, medium, fxy[inside], prims):
        s = np.full(len(fxy), np.nan)
        s[inside] = np.linalg.norm(v, axis=1)
        speeds.append(s.reshape(fy, fx))
    # Arrows: a coarse grid of free centres, so each arrow is big enough to read.
    ax_, ay_, axy = grid(n)
    free = workspace.contains(axy, body.radius)
    arrows = list(_primitive_velocities(actuator, body, medium, axy[free], prims)) if free.any() else []
    vmax = max([float(np.nanmax(s)) for s in speeds if np.any(np.isfinite(s))] or [1.0])
    sf, su = speed_unit(vmax)
    cols = min(4, max(len(prims), 1))
    rows = int(np.ceil(len(prims) / cols)) or 1
    fig = figure(figsize=(3.4 * cols + 1.0, 3.5 * rows * max(h / w, 0.5) + 0.6), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    ext = (xmin * f, xmax * f, ymin * f, ymax * f)
    cell = 0.75 * min(w / ax_, h / ay_) * f
    mappable = None
    for j, (ax, p, s) in enumerate(zip(axes, prims, speeds)):
        mappable = ax.imshow(np.ma.masked_invalid(s * sf), origin="lower", extent=ext, cmap="viridis", vmin=0,
                             vmax=vmax * sf, interpolation="bilinear", aspect="equal")
        mappable.set_clip_path(MplPolygon(np.asarray(workspace.boundary.exterior.coords) * f, closed=True,
                                          transform=ax.transData, fill=False))
        if arrows:
            # Arrows show direction only (all the same length); the colour shows the speed, whose range
            # across a workspace spans decades.
            v = arrows[j]
            norm = np.linalg.norm(v, axis=1, keepdims=True)
            d = np.divide(v, norm, out=np.zeros_like(v), where=norm > 0) * cell
            pts = axy[free]
            ax.quiver((pts[:, 0] - d[:, 0] / (2 * f)) * f, (pts[:, 1] - d[:, 1] / (2 * f)) * f, d[:, 0], d[:, 1],
                      color="w", edgecolor="k", linewidth=0.4, scale_units="xy", angles="xy", scale=1.0,
                      width=0.007, headwidth=3.5, headlength=3.5, headaxislength=3.2, zorder=4)
        draw_outlines(ax, actuator, f)
        draw_workspace(ax, workspace, f)
        ax.set_xlim(xmin * f, xmax * f)
        ax.set_ylim(ymin * f, ymax * f)
        ax.set_title(_short_label(p.name), fontsize=9)
        ax.set_xlabel(axis_label("x", unit))
        ax.set_ylabel(axis_label("y", unit))
    for ax in axes[len(prims):]:
        ax.set_visible(False)
    if mappable is not None:
        fig.colorbar(mappable, ax=list(axes[:len(prims)]), label=f"speed of {body.name} [{su}]")
    shown = f" ({len(prims)} of {len(every)} primitives: the first ones)" if len(every) > len(prims) else ""
    fig.suptitle(f"{type(actuator).__name__}: velocity of {body.name} under each primitive{shown}\n"
                 "arrows: direction of motion (equal length); colour: speed", fontsize=10)
    return fig


def animate(path, workspace, bodies, times, positions, goals, *, frames=48, fps=12, dpi=80, actuator=None):
    """Write a GIF of the bodies moving (matplotlib's PillowWriter).

    Parameters
    ----------
    path : str or os.PathLike
        Output ``.gif``.
    workspace : Workspace
    bodies : sequence of Body
    times : ndarray, shape (T,)
        s.
    positions : ndarray, shape (T, n, 2)
        m.
    goals : ndarray, shape (n, 2)
        m.
    frames : int
        Number of frames (evenly spaced in time).
    actuator : Actuator, optional
        Its ``outlines()`` (electrode pads), if any, are drawn under the bodies.

    Returns
    -------
    str
        ``path``.
    """
    from matplotlib.animation import FuncAnimation, PillowWriter  # noqa: PLC0415
    from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: PLC0415

    times = np.asarray(times, dtype=float)
    pos = np.asarray(positions, dtype=float)
    xmin, ymin, xmax, ymax = workspace.bounds
    f, unit = length_unit(max(xmax - xmin, ymax - ymin))
    fig = figure(figsize=(5.0, 5.0 * (ymax - ymin) / (xmax - xmin) + 0.6), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    if actuator is not None:
        draw_outlines(ax, actuator, f)
    draw_workspace(ax, workspace, f)
    goals = np.asarray(goals, dtype=float)
    ax.scatter(goals[:, 0] * f, goals[:, 1] * f, marker="x", c=[f"C{i % 10}" for i in range(len(bodies))],
               label="goal")
    dots = ax.scatter(pos[0, :, 0] * f, pos[0, :, 1] * f, c=[f"C{i % 10}" for i in range(len(bodies))],
                      s=30, label="body")
    ax.set_xlim(xmin * f, xmax * f)
    ax.set_ylim(ymin * f, ymax * f)
    ax.set_aspect("equal")
    ax.set_xlabel(f"x [{unit}]")
    ax.set_ylabel(f"y [{unit}]")
    ax.legend(loc="upper right", fontsize=7)
    title = ax.set_title("")
    ts = np.linspace(times[0], times[-1], max(int(frames), 2))
    idx = np.clip(np.searchsorted(times, ts), 0, len(times) - 1)

    def update(j):
        dots.set_offsets(pos[idx[j]] * f)
        title.set_text(f"t = {ts[j]:.3g} s")
        return dots, title

    # Lay the figure out once; re-solving the constrained layout on every frame dominates the cost.
    fig.draw_without_rendering()
    fig.set_layout_engine("none")
    anim = FuncAnimation(fig, update, frames=len(ts), blit=False)
    with atomic_path(path) as tmp:
        anim.save(tmp, writer=PillowWriter(fps=fps), dpi=dpi)
    return os.fspath(path)
