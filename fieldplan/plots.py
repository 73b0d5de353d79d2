"""Figures of a run: workspace with routes and trajectories, positions and errors over time, inputs.

Every function returns a matplotlib ``Figure`` (no ``plt.show()``); lengths are drawn in the unit
that suits the workspace (µm, mm or m) and every axis names its unit. :func:`animate` writes a GIF
with matplotlib's Pillow writer.
"""

from __future__ import annotations

import os

import numpy as np

__all__ = ["length_unit", "plot_workspace", "plot_timeline", "plot_inputs", "plot_primitive_fields",
           "animate", "save", "speed_backdrop"]


def length_unit(span):
    """Display factor and label for lengths of about ``span`` m: (1e6, "µm"), (1e3, "mm") or (1, "m")."""
    if span < 5e-3:
        return 1e6, "µm"
    if span < 5.0:
        return 1e3, "mm"
    return 1.0, "m"


def _speed_unit(v):
    if v < 1e-3:
        return 1e6, "µm/s"
    if v < 1.0:
        return 1e3, "mm/s"
    return 1.0, "m/s"


def _figure(**kw):
    from matplotlib.figure import Figure  # noqa: PLC0415 - no pyplot state, safe in worker processes

    return Figure(**kw)


def save(fig, path, dpi=120):
    """Save ``fig`` to ``path`` (PNG) through a temporary file, then rename."""
    path = os.fspath(path)
    tmp = f"{path}.tmp-{os.getpid()}.png"
    fig.savefig(tmp, dpi=dpi)
    os.replace(tmp, path)
    return path


def speed_backdrop(actuator, body, medium, workspace, n=48):
    """Fastest speed one body reaches under any single primitive, on a grid.

    Parameters
    ----------
    actuator : Actuator
    body : Body
    medium : Medium
    workspace : Workspace
    n : int
        Grid points along the longer side.

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
    free = workspace.contains(xy, body.radius)
    speed = np.full(len(xy), np.nan)
    if free.any():
        pts = xy[free]
        idle = actuator.idle_input()
        best = np.linalg.norm(actuator.velocity(body, medium, pts, idle), axis=1)
        for p in actuator.primitives():
            v = np.linalg.norm(actuator.velocity(body, medium, pts, p.values), axis=1)
            best = np.maximum(best, v)
        speed[free] = best
    return xs, ys, speed.reshape(ny, nx)


def _draw_workspace(ax, workspace, f):
    from matplotlib.patches import Polygon as MplPolygon  # noqa: PLC0415

    bx, by = workspace.boundary.exterior.xy
    ax.plot(np.asarray(bx) * f, np.asarray(by) * f, color="k", lw=1.5, label="wall")
    for i, o in enumerate(workspace.obstacles):
        geoms = getattr(o, "geoms", [o])
        for g in geoms:
            ax.add_patch(MplPolygon(np.asarray(g.exterior.coords) * f, closed=True, facecolor="0.55",
                                    edgecolor="k", lw=0.8, label="obstacle" if i == 0 else None, zorder=2))


def plot_workspace(workspace, bodies, starts, goals, *, routes=None, trajectories=None, predicted=None,
                   actuator=None, tolerance=None, title=None, backdrop_points=48):
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
    from matplotlib.patches import Circle  # noqa: PLC0415

    xmin, ymin, xmax, ymax = workspace.bounds
    f, unit = length_unit(max(xmax - xmin, ymax - ymin))
    aspect = (ymax - ymin) / (xmax - xmin)
    fig = _figure(figsize=(7.2, max(3.5, min(7.5, 6.0 * aspect + 0.8))), layout="constrained")
    ax = fig.add_subplot()
    if actuator is not None and bodies:
        xs, ys, sp = speed_backdrop(actuator, bodies[0], workspace.medium, workspace, backdrop_points)
        if np.any(np.isfinite(sp)):
            sf, su = _speed_unit(float(np.nanmax(sp)))
            mesh = ax.pcolormesh(xs * f, ys * f, sp * sf, shading="auto", cmap="viridis", alpha=0.55, zorder=0)
            fig.colorbar(mesh, ax=ax, shrink=0.85, label=f"fastest single-primitive speed of {bodies[0].name} [{su}]")
    _draw_workspace(ax, workspace, f)
    colours = [f"C{i % 10}" for i in range(len(bodies))]
    starts = np.asarray(starts, dtype=float)
    goals = np.asarray(goals, dtype=float)
    if routes is not None:
        for i, r in enumerate(routes):
            r = np.asarray(r, dtype=float)
            if len(r):
                ax.plot(r[:, 0] * f, r[:, 1] * f, ls="--", lw=1.0, color=colours[i],
                        label="route" if i == 0 else None, zorder=3)
    if predicted is not None:
        p = np.asarray(predicted, dtype=float)
        for i in range(p.shape[1]):
            ax.plot(p[:, i, 0] * f, p[:, i, 1] * f, ls=":", lw=1.2, color=colours[i],
                    label="predicted" if i == 0 else None, zorder=4)
    for k, (label, pos) in enumerate(trajectories or []):
        pos = np.asarray(pos, dtype=float)
        for i in range(pos.shape[1]):
            ax.plot(pos[:, i, 0] * f, pos[:, i, 1] * f, lw=1.0 if k else 1.5, alpha=0.9 if k == 0 else 0.45,
                    color=colours[i], label="simulated" if (i == 0 and k == 0) else None, zorder=5)
    for i, b in enumerate(bodies):
        tol = b.radius if tolerance is None else tolerance
        ax.add_patch(Circle(goals[i] * f, tol * f, fill=False, ls="-", lw=0.8, color=colours[i], zorder=6))
        ax.add_patch(Circle(starts[i] * f, b.radius * f, color=colours[i], alpha=0.6, zorder=6))
    ax.scatter(starts[:, 0] * f, starts[:, 1] * f, marker="o", s=14, c=colours, zorder=7, label="start")
    ax.scatter(goals[:, 0] * f, goals[:, 1] * f, marker="x", s=30, c=colours, zorder=7, label="goal")
    for i in range(len(bodies)):
        ax.annotate(str(i), starts[i] * f, textcoords="offset points", xytext=(4, 4), fontsize=7)
    ax.set_xlim(xmin * f, xmax * f)
    ax.set_ylim(ymin * f, ymax * f)
    ax.set_aspect("equal")
    ax.set_xlabel(f"x [{unit}]")
    ax.set_ylabel(f"y [{unit}]")
    ax.set_title(title or "workspace")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.1), ncol=4, fontsize=7, frameon=False)
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
    fig = _figure(figsize=(7.5, 7.0), layout="constrained")
    axes = fig.subplots(3, 1, sharex=True)
    err = np.linalg.norm(pos - goals[None], axis=2)
    for i, b in enumerate(bodies):
        c = f"C{i % 10}"
        lab = f"body {i} ({b.name})"
        axes[0].plot(times, pos[:, i, 0] * f, color=c, label=lab)
        axes[1].plot(times, pos[:, i, 1] * f, color=c, label=lab)
        axes[2].plot(times, np.maximum(err[:, i], 1e-12) * f, color=c, label=lab)
        axes[0].axhline(goals[i, 0] * f, color=c, lw=0.6, ls="--")
        axes[1].axhline(goals[i, 1] * f, color=c, lw=0.6, ls="--")
        if predicted is not None:
            pt, pp = predicted
            pp = np.asarray(pp, dtype=float)
            axes[0].plot(pt, pp[:, i, 0] * f, color=c, ls=":", lw=1.0)
            axes[1].plot(pt, pp[:, i, 1] * f, color=c, ls=":", lw=1.0)
            axes[2].plot(pt, np.maximum(np.linalg.norm(pp[:, i] - goals[i], axis=1), 1e-12) * f, color=c,
                         ls=":", lw=1.0)
    tol = [b.radius for b in bodies] if tolerance is None else [tolerance]
    axes[2].axhline(min(tol) * f, color="k", ls="--", lw=0.8, label="arrival radius")
    axes[2].set_yscale("log")
    axes[0].set_ylabel(f"x [{unit}]")
    axes[1].set_ylabel(f"y [{unit}]")
    axes[2].set_ylabel(f"distance to goal [{unit}]")
    axes[2].set_xlabel("time [s]")
    axes[0].set_title("positions (solid: simulated, dotted: predicted, dashed: goal) and errors")
    axes[2].legend(fontsize=7, loc="upper right", ncol=2)
    for ax in axes:
        ax.grid(alpha=0.3)
    return fig


def plot_inputs(schedule, *, limits=None):
    """Channel values over time, one panel per unit, with the declared limits as dashed lines.

    Parameters
    ----------
    schedule : Schedule
    limits : HardwareLimits, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    units = []
    for c in schedule.channels:
        if c.unit not in units:
            units.append(c.unit)
    # Time-shared primitives (tones, current patterns) read better as a raster of which one played.
    names = [lab for lab in dict.fromkeys(schedule.labels) if lab and lab != "mix"]
    raster = 1 < len(names) <= 40
    panels = len(units) + (1 if raster else 0)
    fig = _figure(figsize=(7.5, 1.2 + 2.2 * len(units) + (0.18 * len(names) + 0.8 if raster else 0)),
                  layout="constrained")
    axes = np.atleast_1d(fig.subplots(panels, 1, sharex=True, squeeze=False)[:, 0])
    if raster:
        ax = axes[-1]
        for i, name in enumerate(names):
            spans = [(t, d) for t, d, lab in zip(schedule.starts, schedule.durations, schedule.labels) if lab == name]
            ax.broken_barh(spans, (i - 0.4, 0.8), color="0.3" if name == "idle" else f"C{i % 10}")
        ax.set_yticks(range(len(names)), names, fontsize=6)
        ax.set_ylim(-0.6, len(names) - 0.4)
        ax.set_ylabel("primitive played")
        ax.grid(axis="x", alpha=0.3)
        axes = axes[:-1]
    t = np.append(schedule.starts, schedule.end)
    for ax, unit in zip(axes, units):
        for k, c in enumerate(schedule.channels):
            if c.unit != unit:
                continue
            v = np.append(schedule.values[:, k], schedule.values[-1, k])
            line, = ax.step(t, v, where="post", lw=1.0, label=c.name)
            if limits is not None:
                lim = limits.get(c.name)
                for val in (lim.lower, lim.upper):
                    if val is not None:
                        ax.axhline(val, color=line.get_color(), ls="--", lw=0.6)
        shown = "" if unit in ("1", "") else f" [{unit}]"
        ax.set_ylabel(f"value{shown}" if shown else "value [dimensionless]")
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="upper right", ncol=min(4, len(schedule.channels)))
    fig.axes[-1].set_xlabel("time [s]")
    axes[0].set_title("inputs (dashed: declared limits)")
    return fig


def plot_primitive_fields(actuator, body, medium, workspace, *, max_panels=12, n=24):
    """Velocity field of one body under each primitive (arrows) over its speed (colour).

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

    Returns
    -------
    matplotlib.figure.Figure
    """
    prims = list(actuator.primitives())[:max_panels]
    xmin, ymin, xmax, ymax = workspace.bounds
    f, unit = length_unit(max(xmax - xmin, ymax - ymin))
    w, h = xmax - xmin, ymax - ymin
    nx, ny = max(int(n * w / max(w, h)), 6), max(int(n * h / max(w, h)), 6)
    X, Y = np.meshgrid(xmin + (np.arange(nx) + 0.5) * w / nx, ymin + (np.arange(ny) + 0.5) * h / ny)
    xy = np.c_[X.ravel(), Y.ravel()]
    free = workspace.contains(xy, body.radius)
    vel = []
    for p in prims:
        v = np.full_like(xy, np.nan)
        if free.any():
            v[free] = actuator.velocity(body, medium, xy[free], p.values)
        vel.append(v)
    vmax = max([float(np.nanmax(np.linalg.norm(v, axis=1))) for v in vel if np.any(np.isfinite(v))] or [1.0])
    sf, su = _speed_unit(vmax)
    cols = min(4, max(len(prims), 1))
    rows = int(np.ceil(len(prims) / cols)) or 1
    fig = _figure(figsize=(3.4 * cols + 1.0, 3.2 * rows * max(h / w, 0.5)), layout="constrained")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    mappable = None
    for ax, p, v in zip(axes, prims, vel):
        s = np.linalg.norm(v, axis=1).reshape(ny, nx) * sf
        mappable = ax.pcolormesh(X * f, Y * f, s, shading="auto", cmap="viridis", vmin=0, vmax=vmax * sf)
        # Arrows show direction only (unit length, 0.8 of a cell); the colour shows the speed, whose
        # range across a workspace spans decades.
        norm = np.linalg.norm(v, axis=1, keepdims=True)
        d = np.divide(v, norm, out=np.zeros_like(v), where=norm > 0) * 0.8 * min(w / nx, h / ny) * f
        ax.quiver(xy[:, 0] * f, xy[:, 1] * f, d[:, 0], d[:, 1], color="w", scale_units="xy", angles="xy",
                  scale=1.0, width=0.004)
        _draw_workspace(ax, workspace, f)
        ax.set_aspect("equal")
        ax.set_title(p.name, fontsize=9)
        ax.set_xlabel(f"x [{unit}]")
        ax.set_ylabel(f"y [{unit}]")
    for ax in axes[len(prims):]:
        ax.set_visible(False)
    if mappable is not None:
        fig.colorbar(mappable, ax=list(axes[:len(prims)]), label=f"speed of {body.name} [{su}]")
    fig.suptitle(f"{type(actuator).__name__}: velocity of {body.name} under each primitive"
                 + (f" (first {max_panels})" if len(list(actuator.primitives())) > max_panels else ""))
    return fig


def animate(path, workspace, bodies, times, positions, goals, *, frames=48, fps=12, dpi=80):
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
    fig = _figure(figsize=(5.0, 5.0 * (ymax - ymin) / (xmax - xmin) + 0.6), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    _draw_workspace(ax, workspace, f)
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
    path = os.fspath(path)
    tmp = f"{path}.tmp-{os.getpid()}.gif"
    anim.save(tmp, writer=PillowWriter(fps=fps), dpi=dpi)
    os.replace(tmp, path)
    return path
