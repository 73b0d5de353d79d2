"""The plane region bodies move in: boundary, obstacles (shapely geometries) and the medium."""

from __future__ import annotations

import functools

import numpy as np
import shapely
from shapely.geometry import MultiPolygon, Point, Polygon, box

from ..errors import WorkspaceError
from .body import check_positions
from .medium import Medium

__all__ = ["Workspace", "rectangle", "circle", "polygon"]


def rectangle(xmin, ymin, xmax, ymax):
    """Axis-aligned rectangle (m) as a shapely Polygon."""
    if not (xmax > xmin and ymax > ymin):
        raise WorkspaceError(f"rectangle needs xmax > xmin and ymax > ymin, got ({xmin}, {ymin}, {xmax}, {ymax}).")
    return box(xmin, ymin, xmax, ymax)


#: Segments per quarter circle of the polygon a circle is drawn as.
CIRCLE_RESOLUTION = 32


def circle(center, radius, resolution=CIRCLE_RESOLUTION):
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


def _disjoint_union(geoms):
    """The union of polygons ``geoms`` (array) as a MultiPolygon of disjoint parts.

    An STRtree finds which polygons touch or overlap; only those groups are merged with
    ``union_all`` (one call each), the rest are kept as they are. For many small, mostly separate
    obstacles this is far faster than one ``union_all`` of everything.
    """
    parts = shapely.get_parts(np.asarray(geoms, dtype=object))
    parts = parts[~shapely.is_empty(parts)]
    if len(parts) == 0:
        return Polygon()
    tree = shapely.STRtree(parts)
    i, j = tree.query(parts, predicate="intersects")
    keep = i < j
    if not keep.any():
        return shapely.multipolygons(parts)
    from scipy.sparse import coo_matrix  # noqa: PLC0415
    from scipy.sparse.csgraph import connected_components  # noqa: PLC0415

    n = len(parts)
    _, label = connected_components(coo_matrix((np.ones(keep.sum()), (i[keep], j[keep])), shape=(n, n)),
                                    directed=False)
    order = np.argsort(label, kind="stable")
    cuts = np.flatnonzero(np.diff(label[order])) + 1
    merged = []
    for group in np.split(order, cuts):
        merged.append(parts[group[0]] if len(group) == 1 else shapely.union_all(parts[group]))
    out = shapely.get_parts(np.asarray(merged, dtype=object))
    return shapely.multipolygons(out[shapely.get_type_id(out) == 3])


def _cut_out(region, solid):
    """``region`` minus the disjoint polygons of ``solid`` (a MultiPolygon from :func:`_disjoint_union`).

    Parts lying strictly inside a polygonal ``region`` without holes of their own simply become holes
    of it (no overlay needed); only the others go through one ``difference``.
    """
    parts = shapely.get_parts(solid)
    if len(parts) == 0 or not isinstance(region, Polygon) or region.is_empty:
        return region.difference(solid)
    simple = shapely.contains_properly(region, parts) & (shapely.get_num_interior_rings(parts) == 0)
    if simple.any() and region.interiors:
        # holes of the region itself may touch parts: leave those to the overlay
        holes = shapely.multipolygons([Polygon(r) for r in region.interiors])
        simple &= ~shapely.intersects(holes, parts)
    rest = parts[~simple]
    out = Polygon(region.exterior, list(region.interiors) + list(shapely.get_exterior_ring(parts[simple])))
    if len(rest):
        out = out.difference(shapely.multipolygons(rest))
    return out


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
        obs = list(obstacles)
        arr = np.empty(len(obs), dtype=object)
        for i, o in enumerate(obs):          # one by one: numpy would unpack a tuple given by mistake
            arr[i] = o
        kind_ok = np.fromiter((isinstance(o, (Polygon, MultiPolygon)) for o in obs), bool, len(obs))
        ok = kind_ok.copy()
        if kind_ok.any():            # checked all at once: shapely 2 works on arrays of geometries
            ok[kind_ok] = shapely.is_valid(arr[kind_ok]) & (shapely.area(arr[kind_ok]) > 0)
        if not ok.all():
            raise WorkspaceError(f"obstacle {int(np.argmin(ok))} is not a valid polygon with positive area.")
        self.boundary = boundary
        self.obstacles = tuple(obs)
        self._obstacle_array = arr
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
        return _disjoint_union(self._obstacle_array) if self.obstacles else Polygon()

    @functools.cached_property
    def obstacle_index(self):
        """``shapely.STRtree`` of :attr:`obstacles` (query it for the obstacles near a point or shape)."""
        return shapely.STRtree(self._obstacle_array)

    @functools.lru_cache(maxsize=32)
    def free_space(self, radius):
        """Region where the centre of a body of ``radius`` m may be (boundary shrunk, obstacles grown)."""
        inner = self.boundary.buffer(-float(radius)) if radius > 0 else self.boundary
        if self.obstacles:
            if radius > 0:
                # Grow each obstacle on its own (vectorised), then merge the ones that now overlap:
                # buffering one union of many obstacles is far slower.
                grown = _disjoint_union(shapely.buffer(shapely.get_parts(self._solid), float(radius)))
            else:
                grown = self._solid
            inner = _cut_out(inner, grown)
        shapely.prepare(inner)
        return inner

    def walls(self):
        """All wall lines (boundary and the outlines of the solid region) as one shapely geometry."""
        rings = [self.boundary.exterior]
        if self.obstacles:
            rings += list(shapely.get_rings(shapely.get_parts(self._solid)))
        return shapely.multilinestrings(rings) if len(rings) > 1 else rings[0]

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
