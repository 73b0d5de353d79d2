"""The one style of fieldplan's figures: units on axes, display factors, a figure, saving, walls and outlines.

Every figure names its axis units as :func:`axis_label` does (``x [µm]``, a dimensionless
quantity ``[1]``). Display factors are multipliers: shown value = SI value · factor
(:func:`length_unit`, :func:`speed_unit`).
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure
from matplotlib.patches import Polygon as MplPolygon

from ..fileio import save_figure
from ..units import si_scale

__all__ = ["axis_label", "length_unit", "speed_unit", "figure", "save", "draw_workspace", "draw_outlines"]

_DIMENSIONLESS = ("", "1", "-", "dimensionless")


def axis_label(name, unit):
    """The one axis-label style of fieldplan's figures: ``name [unit]``.

    Examples
    --------
    >>> axis_label("x", "µm"), axis_label("fraction steerable", "1"), axis_label("count", "")
    ('x [µm]', 'fraction steerable [1]', 'count [1]')
    """
    u = (unit or "").strip()
    return f"{name} [{'1' if u in _DIMENSIONLESS else u}]"


def length_unit(span):
    """Display factor and label for lengths of about ``span`` m: (1e6, "µm"), (1e3, "mm") or (1, "m")."""
    if span < 5e-3:
        return 1e6, "µm"
    if span < 5.0:
        return 1e3, "mm"
    return 1.0, "m"


def speed_unit(v):
    """Display factor and label for speeds of about ``v`` m/s: shown value = speed · factor.

    The same convention as :func:`length_unit` (a multiplier), from :func:`fieldplan.units.si_scale`.

    Examples
    --------
    >>> speed_unit(3e-6)
    (1000000.0, 'µm/s')
    """
    return si_scale(v, "m/s")


def figure(**kw):
    """A matplotlib ``Figure`` without pyplot state (safe in worker processes and threads)."""
    return Figure(**kw)


def save(fig, path, dpi=120):
    """Save ``fig`` to ``path`` (PNG) through a temporary file, then rename."""
    return save_figure(fig, path, dpi=dpi)


def draw_outlines(ax, actuator, f):
    """Draw the actuator's ``outlines()`` (e.g. electrode pads), if it has any; returns whether it did."""
    get = getattr(actuator, "outlines", None)
    shapes = list(get()) if callable(get) else []
    for g in shapes:
        for part in getattr(g, "geoms", [g]):
            for ring in [part.exterior, *part.interiors]:
                x, y = (np.asarray(c) * f for c in ring.xy)
                # A dark line under a light one reads on every colour of a backdrop.
                ax.plot(x, y, color="k", lw=1.3, alpha=0.6, zorder=2.5)
                ax.plot(x, y, color="w", lw=0.6, alpha=0.95, zorder=2.6)
    return bool(shapes)


def draw_workspace(ax, workspace, f):
    """Draw the workspace's wall and obstacles into ``ax``, lengths times the display factor ``f``."""
    bx, by = workspace.boundary.exterior.xy
    ax.plot(np.asarray(bx) * f, np.asarray(by) * f, color="k", lw=1.5, label="wall")
    for i, o in enumerate(workspace.obstacles):
        geoms = getattr(o, "geoms", [o])
        for g in geoms:
            ax.add_patch(MplPolygon(np.asarray(g.exterior.coords) * f, closed=True, facecolor="0.55",
                                    edgecolor="k", lw=0.8, label="obstacle" if i == 0 else None, zorder=2))
