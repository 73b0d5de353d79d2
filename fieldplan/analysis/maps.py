"""Speed maps: the worst-direction speed of one body over a grid of the workspace, and where it is zero (dead zones).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import ActuatorError
from ..units import format_quantity
from .steerability import RTOL, body_speeds

__all__ = ['SpeedMap', 'speed_map']

# -- maps ------------------------------------------------------------------------------------------
@dataclass
class SpeedMap:
    """Worst-direction speed of a single body over a grid of the workspace.

    Attributes
    ----------
    xs, ys : ndarray
        Cell-centre coordinates, m.
    speed : ndarray, shape (ny, nx)
        m/s; nan outside the free space.
    direction : ndarray, shape (ny, nx, 2)
        Unit slowest (or blocked) direction.
    free : ndarray of bool, shape (ny, nx)
    dead : ndarray of bool, shape (ny, nx)
        Free cells where the body cannot move in some direction (speed 0).
    """

    xs: np.ndarray
    ys: np.ndarray
    speed: np.ndarray
    direction: np.ndarray
    free: np.ndarray
    dead: np.ndarray

    @property
    def dead_fraction(self):
        """Fraction of free cells that are dead."""
        return float(self.dead.sum() / max(self.free.sum(), 1))

    @property
    def mean_speed(self):
        """m/s, mean over free cells (dead cells count as 0)."""
        return float(np.nanmean(np.where(self.free, self.speed, np.nan))) if self.free.any() else 0.0

    def summary(self):
        """One line: mean and lowest speed over the free space, dead fraction."""
        vals = self.speed[self.free]
        low = float(vals.min()) if vals.size else 0.0
        return (f"single body over {int(self.free.sum())} free cells: mean worst-direction speed "
                f"{format_quantity(self.mean_speed, 'm/s', 4)}, lowest {format_quantity(low, 'm/s', 4)}, "
                f"dead {100 * self.dead_fraction:.1f} %")


def speed_map(basis_at, workspace, *, shape=(48, 48), radius=None, rtol=RTOL):
    """Worst-direction speed of one body over the workspace (dead zones where it is 0).

    Parameters
    ----------
    basis_at : callable
        ``basis_at(xy (G, 2)) -> FieldBasis`` for G independent bodies of one kind at those
        positions (see :class:`basis_function`); called once with every free grid point.
    workspace : Workspace
    shape : tuple (ny, nx)
        Grid size over the workspace bounds.
    radius : float, optional
        Body radius, m, for the free space; default ``basis_at.radius`` if defined, else 0.
    rtol : float

    Returns
    -------
    SpeedMap
    """
    ny, nx = (int(shape[0]), int(shape[1]))
    if ny < 1 or nx < 1:
        raise ActuatorError(f"speed_map: shape must be two positive integers, got {shape!r}.")
    if radius is None:
        radius = float(getattr(basis_at, "radius", 0.0))
    xmin, ymin, xmax, ymax = workspace.bounds
    xs = xmin + (np.arange(nx) + 0.5) * (xmax - xmin) / nx
    ys = ymin + (np.arange(ny) + 0.5) * (ymax - ymin) / ny
    X, Y = np.meshgrid(xs, ys)
    xy = np.c_[X.ravel(), Y.ravel()]
    free = workspace.contains(xy, radius)
    speed = np.full(len(xy), np.nan)
    direction = np.zeros((len(xy), 2))
    if free.any():
        b = basis_at(xy[free])
        sp_, dr = body_speeds(b, rtol=rtol)
        speed[free] = sp_
        direction[free] = dr
    free = free.reshape(ny, nx)
    speed = speed.reshape(ny, nx)
    dead = free & (np.nan_to_num(speed) <= 0)
    return SpeedMap(xs, ys, speed, direction.reshape(ny, nx, 2), free, dead)
