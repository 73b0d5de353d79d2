"""The plane region bodies move in: boundary, obstacles (shapely geometries) and the medium."""

from __future__ import annotations

import functools

import numpy as np
import shapely
from shapely.geometry import MultiPolygon, Point, Polygon, box

from .body import check_positions
from .errors import WorkspaceError
from .medium import Medium

__all__ = ["Workspace", "rectangle", "circle", "polygon"]


def rectangle(xmin, ymin, xmax, ymax):
    """Axis-aligned rectangle (m) as a shapely Polygon."""
    if not (xmax > xmin and ymax > ymin):
        raise WorkspaceError(f"rectangle needs xmax > xmin and ymax > ymin, got ({xmin}, {ymin}, {xmax}, {ymax}).")
    return box(xmin, ymin, xmax, ymax)


def circle(center, radius, resolution=32):
    """Disc of ``radius`` m around ``center`` (m) as a shapely Polygon (``4*resolution`` vertices)."""
    if not radius > 0:
        raise WorkspaceError(f"circle radius must be > 0 m, got {radius}.")
    return Point(float(center[0]), float(center[1])).buffer(float(radius), quad_segs=resolution)


def polygon(points):
    """Simple polygon through ``points`` (m); self-intersecting outlines are rejected."""
    pts = np.asarray(points, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 2 or len(pts) < 3:
        raise WorkspaceError(f"polygon needs at least 3 points of 2 coordinates, got shape {pts.shape}.")
    poly = Polygon(pts)
    if not poly.is_valid:
        raise WorkspaceError(f"polygon is not simple ({shapely.is_valid_reason(poly)}).")
    if poly.area <= 0:
        raise WorkspaceError("polygon has zero area.")
    return poly


class Workspace:
    """The plane region: a boundary polygon minus obstacles, and the medium filling it.

    Parameters
    ----------
    boundary : shapely Polygon or tuple (xmin, ymin, xmax, ymax)
        Outer wall, m.
    obstacles : sequence of shapely Polygon
        Solid regions bodies cannot enter, m. Obstacles may overlap each other.
    medium : Medium
        Fluid or gas.

    Raises
    ------
    WorkspaceError
        If the boundary is invalid, an obstacle is invalid, or the obstacles leave no free space or
        split it into disconnected pieces (a body could then never reach part of the dish).

    Examples
    --------
    >>> ws = Workspace((0, 0, 1e-3, 1e-3), [circle((5e-4, 5e-4), 1e-4)])
    >>> bool(ws.contains([[1e-4, 1e-4]])[0]), bool(ws.contains([[5e-4, 5e-4]])[0])
    (True, False)
    """

    def __init__(self, boundary, obstacles=(), medium=None):
        if isinstance(boundary, (tuple, list)) and len(boundary) == 4 and np.isscalar(boundary[0]):
            boundary = rectangle(*boundary)
        if not isinstance(boundary, Polygon) or not boundary.is_valid or boundary.area <= 0:
            raise WorkspaceError("workspace boundary must be a valid polygon with positive area.")
        obs = []
        for i, o in enumerate(obstacles):
            if not isinstance(o, (Polygon, MultiPolygon)) or not o.is_valid or o.area <= 0:
                raise WorkspaceError(f"obstacle {i} is not a valid polygon with positive area.")
            obs.append(o)
        self.boundary = boundary
        self.obstacles = tuple(obs)
        self.medium = medium if medium is not None else Medium()
        free = self.free_space(0.0)
        if free.is_empty:
            raise WorkspaceError("the obstacles cover the whole workspace: no free space is left.")
        if isinstance(free, MultiPolygon) and len(free.geoms) > 1:
            areas = sorted((g.area for g in free.geoms), reverse=True)
            raise WorkspaceError(
                f"the obstacles split the free space into {len(free.geoms)} disconnected regions "
                f"(areas {', '.join(f'{a:.3g}' for a in areas[:4])} m^2); join or move obstacles so "
                "every region can be reached."
            )

    # -- geometry -----------------------------------------------------------------------------
    @property
    def bounds(self):
        """(xmin, ymin, xmax, ymax) of the boundary, m."""
        return tuple(self.boundary.bounds)

    @functools.cached_property
    def _solid(self):
        return shapely.union_all(self.obstacles) if self.obstacles else Polygon()

    @functools.lru_cache(maxsize=32)
    def free_space(self, radius):
        """Region where the centre of a body of ``radius`` m may be (boundary shrunk, obstacles grown)."""
        inner = self.boundary.buffer(-float(radius)) if radius > 0 else self.boundary
        if self.obstacles:
            grown = self._solid.buffer(float(radius)) if radius > 0 else self._solid
            inner = inner.difference(grown)
        shapely.prepare(inner)
        return inner

    def walls(self):
        """All wall lines (boundary and obstacle outlines) as one shapely geometry."""
        parts = [self.boundary.exterior] + [shapely.boundary(o) for o in self.obstacles]
        return shapely.union_all(parts)

    def contains(self, xy, radius=0.0):
        """Whether each centre in ``xy`` (n, 2) m is free for a body of ``radius`` m, bool (n,)."""
        xy = check_positions(xy, "xy", error=WorkspaceError)
        return shapely.contains_xy(self.free_space(float(radius)), xy[:, 0], xy[:, 1])

    def clearance(self, xy):
        """Distance (m) from each point to the nearest wall or obstacle; negative inside a solid."""
        xy = check_positions(xy, "xy", error=WorkspaceError)
        pts = shapely.points(xy)
        d = shapely.distance(self._walls_geom, pts)
        inside = self.contains(xy, 0.0)
        return np.where(inside, d, -d)

    @functools.cached_property
    def _walls_geom(self):
        g = self.walls()
        shapely.prepare(g)
        return g

    def nearest_wall(self, xy):
        """Nearest wall point and the unit normal pointing from it into free space.

        Parameters
        ----------
        xy : array_like, shape (n, 2)
            Points in free space, m.

        Returns
        -------
        points : ndarray, shape (n, 2)
            m.
        normals : ndarray, shape (n, 2)
            Unit vectors; the keep-out half-plane for a body of radius r at x is
            ``normals . (x - points) >= r``.
        """
        xy = check_positions(xy, "xy", error=WorkspaceError)
        pts = shapely.points(xy)
        near = shapely.get_coordinates(shapely.shortest_line(self._walls_geom, pts))
        wall_pts = near[0::2]
        diff = xy - wall_pts
        dist = np.linalg.norm(diff, axis=1)
        normals = np.zeros_like(xy)
        ok = dist > 0
        normals[ok] = diff[ok] / dist[ok, None]
        inside = self.contains(xy, 0.0)
        normals[~inside] *= -1.0
        return wall_pts, normals

    def project(self, xy, radius):
        """Move points outside the free space of ``radius`` to its nearest point (m); returns (xy, moved)."""
        xy = check_positions(xy, "xy", error=WorkspaceError).copy()
        free = self.free_space(float(radius))
        ok = shapely.contains_xy(free, xy[:, 0], xy[:, 1])
        if np.all(ok):
            return xy, ~ok
        edge = shapely.boundary(free)
        for i in np.flatnonzero(~ok):
            p = shapely.Point(xy[i])
            q = np.array(shapely.line_interpolate_point(edge, shapely.line_locate_point(edge, p)).coords[0])
            # p lies outside, so p -> q points into the free space; step a hair past the edge
            # so the next containment test passes.
            d = q - xy[i]
            n = np.linalg.norm(d)
            xy[i] = q + (d / n) * 1e-9 * max(radius, 1e-6) if n > 0 else q
        return xy, ~ok

    def occupancy(self, resolution, radius=0.0):
        """Raster of free cells for a body of ``radius``.

        Parameters
        ----------
        resolution : float
            Cell size, m.
        radius : float
            m.

        Returns
        -------
        free : ndarray of bool, shape (ny, nx)
        xs, ys : ndarray
            Cell-centre coordinates, m.
        """
        xmin, ymin, xmax, ymax = self.bounds
        xs = np.arange(xmin + resolution / 2, xmax, resolution)
        ys = np.arange(ymin + resolution / 2, ymax, resolution)
        X, Y = np.meshgrid(xs, ys)
        free = shapely.contains_xy(self.free_space(float(radius)), X, Y)
        return free, xs, ys

    def sample(self, n, radius, rng, region=None, separation=0.0, max_tries=10000):
        """Draw ``n`` free positions (m) at least ``separation`` m apart (centre to centre)."""
        rng = np.random.default_rng(rng)
        area = self.free_space(float(radius))
        if region is not None:
            area = area.intersection(region)
        xmin, ymin, xmax, ymax = area.bounds
        out = []
        tries = 0
        while len(out) < n:
            tries += 1
            if tries > max_tries:
                raise WorkspaceError(f"could not place {n} bodies {separation:g} m apart in the region given.")
            p = rng.uniform([xmin, ymin], [xmax, ymax])
            if not shapely.contains_xy(area, p[0], p[1]):
                continue
            if out and np.min(np.linalg.norm(np.asarray(out) - p, axis=1)) < separation:
                continue
            out.append(p)
        return np.asarray(out)
